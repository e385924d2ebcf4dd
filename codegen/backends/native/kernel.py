"""Straight-line C for the factorisation and the triangular sweeps of one
interior stage of a stage-periodic KKT ordering (codegen.backends.native.periodic).

For each stage s the work of the up-looking LDL' (and of the two sweeps) is
written down as a list of operations on absolute indices; subtracting the
stage's base offsets (first row k0, first position of its columns in l_val,
of its rows in the row-wise order of L, of its columns in the KKT values)
gives its *relative* program.  The stages whose relative programs are identical, and whose bases
advance by the same amounts, form the periodic range; the C emitted here
runs that one program with the bases as arguments, and the generic loops
do every other row.

The factor step of row k (pattern of row k of L: j_1 < j_2 < ...):
    y_j  = K(j, k) - sum_{i in row k, i < j, L(j,i) != 0} L(j, i) y_i   (i ascending)
    L(k, j) = y_j / d_j,   d_k = K(k, k) - sum_j L(k, j) y_j            (j ascending)
which is what the generic scatter loop computes, in the same order of
additions; with the forward sweeps of the two right-hand sides and the
regularisation of the pivot, as the generic rows do.  The forward sweeps of
the kernel's rows (forward_stage) read l_val at positions known at generation
time.  The backward sweeps subtract a column's entries rows descending, as
the generic backward loops do: the entries of t computed last come last in
the chain (a latency-bound sweep otherwise waits for the whole chain per
column).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class StageKernel:
    first: int          # first stage of the periodic range
    count: int          # number of stages in it (>= 2)
    rows: tuple         # (k0 of the first stage, P): rows per stage
    l_val: tuple        # (base, Q) of l_val (column-wise positions)
    lr: tuple           # (base, Q) of the row-wise order of L (r_pos)
    kkt: tuple          # (base, R) of the KKT values
    factor_ops: list    # relative program of one stage (see _factor_program)
    bwd: dict           # backward sweep: {"first", "count", "rows", "l_val", "ops"}

    @property
    def row_begin(self) -> int:
        return self.rows[0]

    @property
    def row_end(self) -> int:
        return self.rows[0] + self.count * self.rows[1]


def _factor_program(k0, P, Kp, Ki, Lp, Li, Rp, Rj, sign):
    """Relative program of rows k0..k0+P-1 (tuples of ints), bases
    (k0, Lp[k0], Rp[k0], Kp[k0])."""
    lb, rb, kb = int(Lp[k0]), int(Rp[k0]), int(Kp[k0])
    ops = []
    for k in range(k0, k0 + P):
        pat = [int(j) for j in Rj[Rp[k]:Rp[k + 1]]]
        where = {j: a for a, j in enumerate(pat)}
        kpos = {int(Ki[t]): int(t) for t in range(Kp[k], Kp[k + 1])}
        entries = []
        for a, j in enumerate(pat):
            init = kpos.get(j)
            upd = []
            # column i of L: rows above k that are in row k's pattern
            for i in pat[:a]:
                lo, hi = int(Lp[i]), int(Lp[i + 1])
                col = Li[lo:hi]
                q = lo + int(np.searchsorted(col, j))
                if q < hi and int(Li[q]) == j:
                    upd.append((q - lb, where[i]))
            # position of L(k, j) in column j
            lo, hi = int(Lp[j]), int(Lp[j + 1])
            qk = lo + int(np.searchsorted(Li[lo:hi], k))
            assert int(Li[qk]) == k
            entries.append((None if init is None else init - kb, tuple(upd), j - k0,
                            qk - lb, int(Rp[k]) + a - rb))
        ops.append((k - k0, int(sign[k]), kpos[k] - kb, tuple(entries)))
    return tuple(ops)


def _backward_program(k0, P, Lp, Li):
    """Relative program of the backward sweep over columns k0..k0+P-1."""
    lb = int(Lp[k0])
    ops = []
    for k in range(k0, k0 + P):
        ops.append((k - k0, tuple((int(q) - lb, int(Li[q]) - k0)
                                  for q in range(Lp[k], Lp[k + 1]))))
    return tuple(ops)


def _longest_run(progs, bases):
    """Longest run of consecutive equal programs with constant base steps:
    (first, count)."""
    best = (0, 0)
    s = 0
    nst = len(progs)
    while s < nst:
        if progs[s] is None:
            s += 1
            continue
        e = s + 1
        while e < nst and progs[e] == progs[s] and (
                e == s + 1 or tuple(np.subtract(bases[e], bases[e - 1]))
                == tuple(np.subtract(bases[s + 1], bases[s]))):
            e += 1
        if e - s > best[1]:
            best = (s, e - s)
        s = e if e > s + 1 else s + 1
    return best


def find_kernel(stage_of_pos: np.ndarray, Kp, Ki, Lp, Li, Rp, Rj, sign,
                min_stages: int = 2) -> StageKernel | None:
    """The periodic range of a stage-by-stage ordering (stage_of_pos: stage
    of each permuted position, nondecreasing), or None if fewer than
    ``min_stages`` consecutive stages share one program."""
    stage_of_pos = np.asarray(stage_of_pos)
    if len(stage_of_pos) == 0 or np.any(np.diff(stage_of_pos) < 0):
        return None
    nst = int(stage_of_pos[-1]) + 1
    starts = np.searchsorted(stage_of_pos, np.arange(nst + 1))
    sizes = np.diff(starts)
    vals, counts = np.unique(sizes, return_counts=True)
    P = int(vals[np.argmax(counts)])
    fprogs, fbases, bprogs, bbases = [], [], [], []
    for s in range(nst):
        k0 = int(starts[s])
        if sizes[s] != P:
            fprogs.append(None)
            bprogs.append(None)
            fbases.append(None)
            bbases.append(None)
            continue
        fprogs.append(_factor_program(k0, P, Kp, Ki, Lp, Li, Rp, Rj, sign))
        fbases.append((k0, int(Lp[k0]), int(Rp[k0]), int(Kp[k0])))
        bprogs.append(_backward_program(k0, P, Lp, Li))
        bbases.append((k0, int(Lp[k0])))
    first, count = _longest_run(fprogs, fbases)
    # a stage without entries of L (no coupling at all) gets no kernel: the
    # emitted functions would have unused pointers
    if count < min_stages or not any(e for *_, e in fprogs[first]):
        return None
    bfirst, bcount = _longest_run(bprogs, bbases)
    if bcount < min_stages or not any(e for _, e in bprogs[bfirst]):
        bwd = {"first": 0, "count": 0, "rows": (0, P), "l_val": (0, 0), "ops": ()}
    else:
        b0 = bbases[bfirst]
        b1 = bbases[bfirst + 1]
        bwd = {"first": bfirst, "count": bcount, "rows": (b0[0], P),
               "l_val": (b0[1], b1[1] - b0[1]), "ops": bprogs[bfirst]}
    f0, f1 = fbases[first], fbases[first + 1]
    return StageKernel(first=first, count=count, rows=(f0[0], P),
                       l_val=(f0[1], f1[1] - f0[1]), lr=(f0[2], f1[2] - f0[2]),
                       kkt=(f0[3], f1[3] - f0[3]), factor_ops=list(fprogs[first]), bwd=bwd)


# ----------------------------------------------------------------------------- C text
def _stmt(lhs: str, first: str, terms, indent: str = "    ", width: int = 96) -> list:
    """``lhs = first - terms...;`` wrapped at ``width`` columns."""
    lines = []
    cur = f"{indent}{lhs} = {first}"
    for t in terms:
        piece = f" - {t}"
        if len(cur) + len(piece) > width:
            lines.append(cur)
            cur = indent + "   " + piece
        else:
            cur += piece
    lines.append(cur + ";")
    return lines


def _c_factor(ops) -> str:
    width = max((len(e) for _, _, _, e in ops), default=1) or 1
    out = [f"    real yv[{width}];", "    real d, f1, f2, l;"]
    for c, sgn, kdiag, entries in ops:
        out.append(f"    /* row {c} */")
        out.append(f"    d = kk[{kdiag}];")
        out.append(f"    f1 = w->rhs[perm[k0 + {c}]];")
        out.append(f"    f2 = w->rhs2[perm[k0 + {c}]];")
        for a, (init, upd, jr, qk, tr) in enumerate(entries):
            first = f"kk[{init}]" if init is not None else "R(0)"
            out.extend(_stmt(f"yv[{a}]", first, [f"lv[{q}] * yv[{ia}]" for q, ia in upd]))
            out.append(f"    l = yv[{a}] * pinv[{jr}]; d -= l * yv[{a}]; lv[{qk}] = l;")
            out.append(f"    f1 -= l * y1[{jr}]; f2 -= l * y2[{jr}];")
        sg = "R(1)" if sgn > 0 else "R(-1)"
        out.append(f"    y1[{c}] = f1; y2[{c}] = f2;")
        out.append(f"    if (pivot_fix(w, st, &d, {sg}) != 0) {{")
        out.append("        return -1;")
        out.append("    }")
        out.append(f"    pinv[{c}] = R(1) / d;")
    return "\n".join(out)


def _c_forward(ops) -> str:
    """Forward sweep t = L^{-1} b(perm) of one stage, from the factor program
    (row k: the entries of row k of L, columns ascending, read from l_val: the
    kernel knows where each sits, so no row-wise pattern is read)."""
    out = []
    for c, _sgn, _kd, entries in ops:
        out.extend(_stmt(f"t[{c}]", f"b[perm[k0 + {c}]]",
                         [f"lv[{qk}] * t[{jr}]" for (_i, _u, jr, qk, _t) in entries]))
    return "\n".join(out)


def _backward_stmt(vec: str, c: int, ents) -> list:
    """``vec[c] = vec[c] * pinv[c] - ...`` with the column's rows descending
    (the entries computed last come last in the chain)."""
    return _stmt(f"{vec}[{c}]", f"{vec}[{c}] * pinv[{c}]",
                 [f"lv[{q}] * {vec}[{ir}]" for q, ir in reversed(ents)])


def _c_backward(ops) -> str:
    out = []
    for c, ents in reversed(ops):
        out.extend(_backward_stmt("t", c, ents))
        out.append(f"    x[perm[k0 + {c}]] = t[{c}];")
    return "\n".join(out)


def _c_backward2(ops) -> str:
    out = []
    for c, ents in reversed(ops):
        out.extend(_backward_stmt("t", c, ents))
        out.extend(_backward_stmt("t2", c, ents))
        out.append(f"    x1[perm[k0 + {c}]] = t[{c}]; x2[perm[k0 + {c}]] = t2[{c}];")
    return "\n".join(out)


def context(kern: StageKernel | None) -> dict:
    """Template variables for socp.c.j2 (``stage_kernel`` false without one)."""
    if kern is None:
        return {"stage_kernel": False}
    b = kern.bwd
    return {
        "stage_kernel": True,
        "sk_first": kern.first, "sk_count": kern.count,
        "sk_k0": kern.rows[0], "sk_p": kern.rows[1],
        "sk_l0": kern.l_val[0], "sk_lq": kern.l_val[1],
        "sk_q0": kern.kkt[0], "sk_qr": kern.kkt[1],
        "sk_factor": _c_factor(kern.factor_ops),
        "sk_forward": _c_forward(kern.factor_ops),
        "sk_bfirst": b["first"], "sk_bcount": b["count"], "sk_bk0": b["rows"][0], "sk_bl0": b["l_val"][0],
        "sk_blq": b["l_val"][1],
        "sk_backward": _c_backward(b["ops"]) if b["count"] else "",
        "sk_backward2": _c_backward2(b["ops"]) if b["count"] else "",
    }
