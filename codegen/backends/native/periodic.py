"""Stage structure of a cone program, a stage-periodic KKT ordering, and the
verification that the factorisation's work is periodic over interior stages.

A discretised trajectory problem is a chain of identical time stages: the
variables of node k, the equalities that couple node k to node k+1 and the
cones of node k.  If the KKT matrix is ordered stage by stage with the same
local order in every interior stage, the pattern of L is periodic over those
stages: the rows of stage s+1 are those of stage s shifted by a constant P
in index, Q in positions of L and R in positions of the KKT values.  Then
the numeric work of one interior stage can be emitted once as straight-line
C with constant offsets from base pointers (codegen.backends.native.kernel).

Everything here is generation-time Python; nothing here is trusted without a
check: ``periodic_range`` compares the work of every stage, entry by entry
(after subtracting the stage's base offsets), with the work of the first
interior stage, and only the stages that agree exactly are given to the
kernel.
"""

from __future__ import annotations

import numpy as np

from codegen.backends.native.orderings import minimum_fill


def variable_stages(prog) -> np.ndarray | None:
    """Stage of every variable of a ConeProgram from its named variables
    (a trailing dimension of length N or N+1 is the time index), or None when
    the program has no time-staged named variables: at least two named
    variables must have a trailing dimension T or T - 1 (T >= 3 the largest);
    a lone vector variable is not a time axis.  Variables that are not
    named (auxiliaries of canonicalisation) take the smallest stage of the
    named variables they share an equality row or a cone with."""
    variables = getattr(prog, "variables", None) or {}
    n = prog.n
    shapes = [(int(off), tuple(int(d) for d in shape)) for off, shape in variables.values()]
    shapes = [(off, shape) for off, shape in shapes if int(np.prod(shape)) > 1]
    if not shapes:
        return None
    T = max(shape[-1] for _, shape in shapes)
    timed = [(off, shape) for off, shape in shapes if shape[-1] in (T, T - 1)]
    if T < 3 or len(timed) < 2:
        return None
    stage = np.full(n, -1, dtype=np.int64)
    for off, shape in timed:
        idx = np.arange(int(np.prod(shape))).reshape(shape, order="F")
        for k in range(shape[-1]):
            stage[off + idx[..., k].ravel()] = k
    groups = _row_groups(prog)
    # propagate to auxiliaries through shared rows (bounded: n sweeps at most)
    for _ in range(n):
        changed = False
        for cols in groups:
            known = [stage[j] for j in cols if stage[j] >= 0]
            if not known:
                continue
            sk = min(known)
            for j in cols:
                if stage[j] < 0:
                    stage[j] = sk
                    changed = True
        if not changed:
            break
    if (stage < 0).any():
        return None
    return stage


def _row_groups(prog):
    """Column sets of every equality row, every nonnegative row and every
    second-order cone (whole), as lists of variable indices."""
    n, p, m = prog.n, prog.p, prog.m
    arows = [[] for _ in range(p)]
    grows = [[] for _ in range(m)]
    for j in range(n):
        for k in range(prog.A.indptr[j], prog.A.indptr[j + 1]):
            arows[int(prog.A.indices[k])].append(j)
        for k in range(prog.G.indptr[j], prog.G.indptr[j + 1]):
            grows[int(prog.G.indices[k])].append(j)
    groups = list(arows) + grows[:prog.nonneg]
    row = prog.nonneg
    for q in prog.soc:
        cols = []
        for r in range(row, row + int(q)):
            cols.extend(grows[r])
        groups.append(sorted(set(cols)))
        row += int(q)
    return groups


def kkt_stages(prog, vstage: np.ndarray, rule: str = "min") -> np.ndarray:
    """Stage of every KKT node (x, then y, then z in original order): variables
    their own; equality rows and cones the smallest ("min") or largest
    ("max") stage of their variables (a whole cone in one stage); a row with
    no variable goes to stage 0."""
    n, p, m = prog.n, prog.p, prog.m
    pick = min if rule == "min" else max
    out = np.zeros(n + p + m, dtype=np.int64)
    out[:n] = vstage
    groups = _row_groups(prog)
    for i in range(p):
        out[n + i] = pick(vstage[groups[i]]) if groups[i] else 0
    for i in range(prog.nonneg):
        cols = groups[p + i]
        out[n + p + i] = pick(vstage[cols]) if cols else 0
    row = prog.nonneg
    for c, q in enumerate(prog.soc):
        cols = groups[p + prog.nonneg + c]
        out[n + p + row:n + p + row + int(q)] = pick(vstage[cols]) if cols else 0
        row += int(q)
    return out


def periodic_ordering(dim: int, adj: list, stages: np.ndarray, n: int, p: int,
                      local: str = "minfill") -> np.ndarray:
    """Stage-by-stage elimination order with one local order for all stages
    of the most common size.  ``local``: "minfill" (minimum fill constrained
    stage by stage; the order it picks in the middle stage of the common
    size is imposed on all stages of that size) or "staged" (the same, with
    cone rows, then x, then y inside each stage)."""
    stages = np.asarray(stages, dtype=np.int64)
    nst = int(stages.max()) + 1
    kind = np.where(np.arange(dim) < n, 1, np.where(np.arange(dim) < n + p, 2, 0))
    if local == "staged":
        classes = stages * 3 + kind
    else:
        classes = stages.copy()
    base = minimum_fill(dim, adj, classes)
    members = [np.flatnonzero(stages == s) for s in range(nst)]   # ascending original index
    sizes = np.array([len(mb) for mb in members])
    vals, counts = np.unique(sizes, return_counts=True)
    common = int(vals[np.argmax(counts)])
    same = [s for s in range(nst) if sizes[s] == common]
    # the local order of the middle stage of the common size (by the rank of
    # each node in its stage's ascending original index)
    mid = same[len(same) // 2]
    rank_in_mid = {int(v): r for r, v in enumerate(members[mid])}
    local_order = [rank_in_mid[int(v)] for v in base if stages[v] == mid]
    perm = []
    for s in range(nst):
        if sizes[s] == common and _same_kinds(members[s], members[mid], kind):
            perm.extend(int(members[s][r]) for r in local_order)
        else:
            perm.extend(int(v) for v in base if stages[v] == s)
    return np.asarray(perm, dtype=np.int64)


def _same_kinds(a, b, kind) -> bool:
    return bool(np.array_equal(kind[a], kind[b]))
