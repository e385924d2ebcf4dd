"""Generation-time symbolic work for the native SOCP solver's KKT system.

The interior-point method of :mod:`codegen.backends.native` solves, at every
iteration, a quasi-definite system with the fixed sparsity pattern

    [ 0   A'  G'      ]   n rows    (static regularisation +eps)
    [ A   0   0       ]   p rows    (-eps)
    [ G   0  -W'W     ]   m rows    (-eps; W'W block diagonal per cone)

Everything that depends only on the pattern is done here, once, in Python:
the fill-reducing ordering, the permuted upper-triangular pattern, where each
piece of data lands in it, the elimination tree and the pattern of the
factor L (column-wise and row-wise).  The generated C only runs loops over
the index arrays produced here.

Orderings tried (the smaller nnz(L) wins; ties go to the first):
 - minimum local fill (deficiency) on the elimination graph,
 - minimum degree on the elimination graph (our own plain implementations:
   exact degrees, lazy heap, ties broken by index), and
 - reverse Cuthill-McKee (scipy.sparse.csgraph), a banded ordering that
   suits the time-stage structure.
"periodic" (given the stage of every node; codegen.backends.native.periodic) orders
stage by stage with one local order, for the straight-line stage kernel.
"staged" instead constrains minimum fill to eliminate the cone rows first,
then x, then y: pivots never need the tiny static regularisation of the x
block to carry large Schur-complement entries, which keeps single precision
from cancelling catastrophically.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from codegen.backends.native.orderings import minimum_degree, minimum_fill, rcm


@dataclass(frozen=True)
class KKTSymbolic:
    """Everything the C needs to assemble and factor the KKT matrix."""

    dim: int                    # n + p + m
    perm: np.ndarray            # perm[k] = original index at permuted position k
    iperm: np.ndarray           # inverse
    sign: np.ndarray            # +1 for x positions, -1 for y and z (permuted order)
    Kp: np.ndarray              # permuted upper-triangular CSC pattern (diagonal included)
    Ki: np.ndarray
    pos_xdiag: np.ndarray       # position in Kx of each x diagonal (original order)
    pos_ydiag: np.ndarray
    pos_zdiag: np.ndarray       # every cone row's diagonal
    pos_A: np.ndarray           # position of each stored A entry (A's CSC order)
    pos_G: np.ndarray
    pos_zoff: np.ndarray        # SOC off-diagonal W'W entries, per cone, (a<b) row-major
    Lp: np.ndarray              # column pointers of strictly lower L
    Li: np.ndarray              # row indices (ascending in each column)
    Rp: np.ndarray              # row pointers of L (pattern of each row, ascending columns)
    Rj: np.ndarray
    ordering: str
    nnz_L_tried: dict           # ordering name -> nnz(L)
    kernel: object = None       # codegen.backends.native.kernel.StageKernel of a periodic ordering

    @property
    def nnz_kkt(self) -> int:
        return int(self.Kp[-1])

    @property
    def nnz_L(self) -> int:
        return int(self.Lp[-1])


def kkt_upper_entries(n: int, p: int, m: int, A_indptr, A_indices, G_indptr, G_indices,
                      nonneg: int, soc) -> dict:
    """Original-order upper-triangular entries of the KKT pattern, by source."""
    ent = {"xdiag": [(j, j) for j in range(n)],
           "ydiag": [(n + i, n + i) for i in range(p)],
           "zdiag": [(n + p + i, n + p + i) for i in range(m)],
           "A": [], "G": [], "zoff": []}
    for j in range(n):
        for k in range(A_indptr[j], A_indptr[j + 1]):
            ent["A"].append((j, n + int(A_indices[k])))
        for k in range(G_indptr[j], G_indptr[j + 1]):
            ent["G"].append((j, n + p + int(G_indices[k])))
    row = n + p + nonneg
    for q in soc:
        for a in range(q):
            for b in range(a + 1, q):
                ent["zoff"].append((row + a, row + b))
        row += q
    return ent


def _adjacency(dim: int, entries: dict) -> list:
    adj = [set() for _ in range(dim)]
    for lst in entries.values():
        for i, j in lst:
            if i != j:
                adj[i].add(j)
                adj[j].add(i)
    return adj


def _permuted_upper(dim: int, entries: dict, iperm: np.ndarray):
    """CSC of the permuted upper triangle; returns (Kp, Ki, positions by source)."""
    allent = []
    for key, lst in entries.items():
        for t, (i, j) in enumerate(lst):
            a, b = int(iperm[i]), int(iperm[j])
            if a > b:
                a, b = b, a
            allent.append((b, a, key, t))        # column b, row a
    allent.sort(key=lambda e: (e[0], e[1]))
    Kp = np.zeros(dim + 1, dtype=np.int64)
    Ki = np.empty(len(allent), dtype=np.int64)
    pos = {key: np.empty(len(lst), dtype=np.int64) for key, lst in entries.items()}
    prev = None
    for k, (col, row, key, t) in enumerate(allent):
        if prev == (col, row):
            raise ValueError("duplicate KKT entry")
        prev = (col, row)
        Kp[col + 1] += 1
        Ki[k] = row
        pos[key][t] = k
    Kp = np.cumsum(Kp)
    return Kp, Ki, pos


def symbolic_factor(dim: int, Kp: np.ndarray, Ki: np.ndarray):
    """Elimination tree and the row/column patterns of L for an upper CSC."""
    parent = np.full(dim, -1, dtype=np.int64)
    flag = np.full(dim, -1, dtype=np.int64)
    rows = []
    for k in range(dim):
        flag[k] = k
        pat = []
        for t in range(Kp[k], Kp[k + 1]):
            i = int(Ki[t])
            if i >= k:
                continue
            while flag[i] != k:          # bounded by dim steps (tree path)
                if parent[i] == -1:
                    parent[i] = k
                pat.append(i)
                flag[i] = k
                i = int(parent[i])
        pat.sort()
        rows.append(pat)
    Rp = np.zeros(dim + 1, dtype=np.int64)
    for k, pat in enumerate(rows):
        Rp[k + 1] = Rp[k] + len(pat)
    Rj = np.fromiter((j for pat in rows for j in pat), dtype=np.int64, count=int(Rp[-1]))
    counts = np.bincount(Rj, minlength=dim) if len(Rj) else np.zeros(dim, dtype=np.int64)
    Lp = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    Li = np.empty(int(Lp[-1]), dtype=np.int64)
    fill = Lp[:-1].copy()
    for k, pat in enumerate(rows):      # rows ascending -> Li ascending per column
        for j in pat:
            Li[fill[j]] = k
            fill[j] += 1
    return parent, Lp, Li, Rp, Rj


def factor_madds(Lp: np.ndarray) -> int:
    """Multiply-adds of the up-looking factorisation: sum over columns j of
    c_j (c_j - 1) / 2 updates, plus one per entry of L for the pivot."""
    c = np.diff(np.asarray(Lp, dtype=np.int64))
    return int((c * (c - 1) // 2).sum() + Lp[-1])


#: A periodic ordering is taken under "auto" when its factorisation costs at
#: most this many times the multiply-adds of the best other ordering (its
#: straight-line stage kernel runs 2-4 instructions per multiply-add against
#: 10-20 for the generic loops; at N = 50 on the demo it costs 0.96 times).
PERIODIC_MAX_COST = 1.3


def _signs(perm: np.ndarray, n: int) -> np.ndarray:
    """Expected pivot sign at each permuted position: + for x, - for y and z."""
    return np.where(perm < n, 1, -1).astype(np.int64)


def analyse(n: int, p: int, m: int, A_indptr, A_indices, G_indptr, G_indices,
            nonneg: int, soc, ordering: str = "auto", stages=None) -> KKTSymbolic:
    """Order, permute and symbolically factor the KKT pattern.  ``stages``
    (optional): the time stage of every KKT node (x, y, z in original
    order), which enables the "periodic" ordering (codegen.backends.native.periodic)
    and its straight-line stage kernel (codegen.backends.native.kernel)."""
    from codegen.backends.native.kernel import find_kernel
    from codegen.backends.native.periodic import periodic_ordering
    dim = n + p + m
    entries = kkt_upper_entries(n, p, m, A_indptr, A_indices, G_indptr, G_indices, nonneg, soc)
    adj = _adjacency(dim, entries)
    candidates = {}
    if ordering == "periodic" and stages is None:
        raise ValueError("the periodic ordering needs the stage of every KKT node")
    if ordering in ("auto", "periodic") and stages is not None:
        stages = np.asarray(stages, dtype=np.int64)
        candidates["periodic"] = periodic_ordering(dim, adj, stages, n, p)
    if ordering == "staged":
        # cone rows first, then x, then y: every pivot then has the sign and
        # size of a well-posed Schur complement (normal-equations order), at
        # a little more fill; the choice for single precision.
        classes = [1] * n + [2] * p + [0] * m
        candidates["staged"] = minimum_fill(dim, adj, classes)
    if ordering in ("auto", "minfill"):
        candidates["minfill"] = minimum_fill(dim, adj)
    if ordering in ("auto", "mindegree"):
        candidates["mindegree"] = minimum_degree(dim, adj)
    if ordering in ("auto", "rcm"):
        candidates["rcm"] = rcm(dim, adj)
    if ordering == "natural":
        candidates["natural"] = np.arange(dim, dtype=np.int64)
    if not candidates:
        raise ValueError(f"unknown ordering {ordering!r}")
    best = None
    tried = {}
    results = {}
    for name, perm in candidates.items():
        iperm = np.empty(dim, dtype=np.int64)
        iperm[perm] = np.arange(dim)
        Kp, Ki, pos = _permuted_upper(dim, entries, iperm)
        _, Lp, Li, Rp, Rj = symbolic_factor(dim, Kp, Ki)
        tried[name] = int(Lp[-1])
        results[name] = (int(Lp[-1]), name, perm, iperm, Kp, Ki, pos, Lp, Li, Rp, Rj)
        if name != "periodic" and (best is None or Lp[-1] < best[0]):
            best = results[name]
    kern = None
    if "periodic" in results:
        per = results["periodic"]
        perm, Kp, Ki, Lp, Li, Rp, Rj = per[2], per[4], per[5], per[7], per[8], per[9], per[10]
        kern = find_kernel(stages[perm], Kp, Ki, Lp, Li, Rp, Rj, _signs(perm, n))
        if ordering == "periodic" or (
                kern is not None
                and factor_madds(Lp) <= PERIODIC_MAX_COST * factor_madds(best[7])):
            best = per
        else:
            kern = None
    _, name, perm, iperm, Kp, Ki, pos, Lp, Li, Rp, Rj = best
    return KKTSymbolic(dim=dim, perm=perm, iperm=iperm, sign=_signs(perm, n), Kp=Kp, Ki=Ki,
                       pos_xdiag=pos["xdiag"], pos_ydiag=pos["ydiag"], pos_zdiag=pos["zdiag"],
                       pos_A=pos["A"], pos_G=pos["G"], pos_zoff=pos["zoff"],
                       Lp=Lp, Li=Li, Rp=Rp, Rj=Rj, ordering=name, nnz_L_tried=tried,
                       kernel=kern)
