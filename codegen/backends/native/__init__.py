"""Native backend: our own static-memory interior-point SOCP solver, as C.

``render(prog)`` turns a :class:`codegen.model.canonical.ConeProgram` into the text
of ``{prefix}_socp.h`` and ``{prefix}_socp.c``: a primal-dual interior-point
method (homogeneous self-dual embedding, Nesterov-Todd scaling, Mehrotra
predictor-corrector) over a sparse LDL' of the KKT system whose ordering and
symbolic factorisation are done here, in Python, at generation time
(:mod:`codegen.backends.native.symbolic`). The C runs loops over the ``const``
index arrays emitted here; its size grows with the number of nonzeros only
through those arrays. For a time-staged program with a stage-periodic
ordering, one interior stage's factorisation and sweeps are also emitted as
straight-line code (:mod:`codegen.backends.native.kernel`), called once per stage:
a constant amount of code, independent of the horizon.

The C API (prefix = ``c_name``, PREFIX = its upper case) is described in the generated header:
``{prefix}_socp_config_init``, ``{prefix}_socp_solve``, the workspace
struct ``{prefix}_socp_work`` (``x``, ``y``, ``z``, ``s``, ``objective``,
``iterations``, ``status``, ...) and ``enum {prefix}_socp_status``.
"""

from __future__ import annotations

import re
import textwrap
from pathlib import Path

import jinja2
import numpy as np

from codegen.model.canonical import ConeProgram
from codegen.errors import InputError
from codegen.fsutil import TEMPLATES_DIR
from codegen.backends.native.cones import kernels as cone_kernels, specialised_sizes
from codegen.backends.native.kernel import context as kernel_context
from codegen.backends.native.periodic import kkt_stages, variable_stages
from codegen.backends.native.symbolic import KKTSymbolic, analyse

TEMPLATE_DIR = TEMPLATES_DIR / "native"

#: Default KKT ordering by precision (see codegen.backends.native.symbolic).
DEFAULT_ORDERING = {"double": "auto", "single": "staged"}

#: Compile-time bound on the iteration_cap setting (a larger one is clamped to it).
ITERATIONS_HARD_LIMIT = 200

#: Statuses of the solver core (enum {c_name}_socp_status): value, name, meaning.
STATUSES = (
    (0, "CONVERGED", "residuals below residual_stop and gap below the gap stops: "
                     "x, y, z, s are the solution"),
    (1, "INFEASIBLE_CERTIFIED", "primal infeasibility proven: y, z hold a Farkas certificate, "
                                "scaled so that b'y + h'z = -1"),
    (2, "UNBOUNDED_CERTIFIED", "dual infeasibility proven (objective unbounded below): x, s hold "
                               "an improving ray, scaled so that c'x = -1"),
    (3, "ITERATION_CAP", "iteration_cap reached with no verdict and no coarse fallback "
                         "(x, y, z, s: the last iterate divided by tau)"),
    (4, "BREAKDOWN", "the iteration broke down even with the raised kkt_shift, or no verdict "
                     "came closer (breakdown_cause says which); no answer"),
    (5, "CONVERGED_COARSE", "only the coarse stops were met: a breakdown or the iteration cap "
                            "came first (breakdown_cause says which); x, y, z, s are the best "
                            "iterate that met them"),
)
CONVERGED, INFEASIBLE_CERTIFIED, UNBOUNDED_CERTIFIED, ITERATION_CAP, BREAKDOWN, \
    CONVERGED_COARSE = (value for value, _, _ in STATUSES)

#: Causes of a breakdown (enum {c_name}_socp_cause): value, name, meaning.
CAUSES = (
    (0, "NONE", "no breakdown"),
    (1, "PIVOT_NOT_FINITE", "a pivot of the factorisation was not finite at the largest "
                            "kkt_shift allowed"),
    (2, "LOST_INTERIOR", "rounding in a step put s or z on or outside the boundary of the cone"),
    (3, "STEP_VANISHED", "the step length to take fell below 1e-10"),
    (4, "NOT_A_NUMBER", "a residual or mu was not a number (bad parameters or overflow)"),
    (5, "NO_PARAMS", "params was NULL"),
    (6, "NO_PROGRESS", "progress guard: no verdict (optimal, infeasible, unbounded) came twice "
                       "as close to its stop in 20 iterations"),
)
CAUSE_NONE, CAUSE_PIVOT_NOT_FINITE, CAUSE_LOST_INTERIOR, CAUSE_STEP_VANISHED, \
    CAUSE_NOT_A_NUMBER, CAUSE_NO_PARAMS, CAUSE_NO_PROGRESS = (value for value, _, _ in CAUSES)

#: The run-time settings ({c_name}_socp_config), in struct order: name, C type,
#: one-line meaning. All are relative to the scaled problem's data.
SETTINGS = (
    ("gap_abs_stop", "real", "converged needs s'z/tau^2 and the duality gap below the larger "
                             "of this ..."),
    ("gap_rel_stop", "real", "... and this times the smaller |objective|"),
    ("residual_stop", "real", "converged needs the relative primal and dual residuals below this"),
    ("certificate_stop", "real", "an infeasibility or unboundedness certificate is accepted when "
                                 "its residual is below this times its margin"),
    ("residual_stop_coarse", "real", "CONVERGED_COARSE needs the residuals below this ..."),
    ("gap_stop_coarse", "real", "... and the gap below this, absolute and relative"),
    ("iteration_cap", "int", "most interior-point iterations per solve; clamped to "
                             "[0, ITERATIONS_HARD_LIMIT]"),
    ("kkt_shift", "real", "static diagonal shift of the KKT matrix: +shift on the x block, "
                          "-shift on the y and z blocks"),
    ("pivot_floor", "real", "a pivot of the wrong sign or below this in magnitude ..."),
    ("pivot_replacement", "real", "... is replaced by this, with the expected sign"),
    ("correction_passes_max", "int", "most iterative-refinement passes per KKT solve"),
    ("correction_stop", "real", "iterative refinement stops when the KKT residual is below this "
                                "times (1 + the largest |c|, |b|, |h|), or below CORRECTION_MU_FACTOR "
                                "(socp.c) times mu"),
    ("boundary_step_share", "real", "share of the step to the cone's boundary that is taken, "
                                    "in (0, 1)"),
)
_INT_SETTINGS = tuple(name for name, ctype, _ in SETTINGS if ctype == "int")

#: Settings defaults by precision (keys: SETTINGS). Each has its reason
#: beside it: a measurement by ``python -m bench.settings_sweep``
#: (1000 states of pdgc check's draw at fixed times of flight, Clarabel at
#: 1e-9 as the reference; figures as N = 50 seed 7 / N = 50 seed 11 /
#: N = 20 seed 7; all tables in DEVELOPERS.md, "Where the solver core's
#: defaults come from"), or an argument from the method. "Failures": cases
#: without the reference's verdict after the adapter's retry.
DEFAULTS = {
    "double": {
        # Gap stops: 1e-8 keeps the worst objective error at 2.8e-9 / 2.0e-9 /
        # 1.3e-9, 350x inside pdgc check's 1e-6; 1e-7 saves one iteration in
        # the median but lets it reach 4.9e-8; 1e-9 costs one iteration more
        # in the median, 500 to 1100 replaced pivots per 1000 solves and a
        # CONVERGED_COARSE answer (the edge of double).
        "gap_abs_stop": 1e-8, "gap_rel_stop": 1e-8,
        # Residual stop: 1e-7 and 1e-8 give identical solves (the gap decides
        # when to stop); 1e-9 is out of reach for some states (a coarse
        # answer): 1e-8 keeps a decade of margin to that.
        "residual_stop": 1e-8,
        # Certificate stop: no wrong verdict at 1e-6 .. 1e-9; each decade
        # looser saves about one iteration on infeasible states (median 9, 8,
        # 7, 6 from 1e-9 to 1e-6 at N = 50).
        "certificate_stop": 1e-8,
        # Coarse stops: a fallback only. Double 1e-6 on the residuals, 1e-7 on
        # the gap, so that the objective still meets the 1e-6 agreement asked
        # of pdgc check; measured case: a state near the fuel limit whose
        # residuals stalled at 2e-7 with the gap at 6e-10 (objective within
        # 1e-10 of Clarabel). The sweep never needed them at the defaults.
        "residual_stop_coarse": 1e-6, "gap_stop_coarse": 1e-7,
        # Iteration cap: the fixed-time states need at most 23; at the edge of
        # feasibility (--edge-states 100: 932 solves within 1e-2 s of the
        # shortest feasible time of flight) a cap of 40, 60, 100, 200 leaves
        # 106, 35, 10, 9 solves without a verdict.
        "iteration_cap": 100,
        # Static shift: 1e-10 fails 42 / 36 / 19 states, 1e-9 fails one at
        # N = 20; 1e-7 raises the worst iterations to 41 at N = 50 and 1e-6
        # to 56 (objective error 1.8e-5): 1e-8 is the only value without a
        # failure or a coarse answer in all three runs.
        "kkt_shift": 1e-8,
        # Dynamic pivot rule: with the shift the KKT matrix is quasi-definite
        # (Vanderbei 1995, SIAM J. Optimization 5(1), recalled: its LDL'
        # exists in any symmetric order), and every exact pivot has the
        # expected sign and |d| >= kkt_shift (a pivot is 1 / a diagonal entry
        # of the inverse of a leading block [P B'; B -N], P, N >= shift I,
        # whose blocks are (P + B'N^-1 B)^-1 <= I/shift and
        # -(N + B P^-1 B')^-1 >= -I/shift), so the rule only catches rounding: a floor of 1e-15 .. 1e-9 and a
        # replacement of 2e-8 .. 2e-5 give the same solves (9 / 10 / 6 pivots
        # replaced in 1000 solves). 1e-13 and 2e-7 sit inside that range,
        # five decades and one decade from the shift.
        "pivot_floor": 1e-13, "pivot_replacement": 2e-7,
        # Refinement passes: 1 .. 10 give the same statuses, iterations within
        # one of each other; the loop ends itself once the residual stops halving (8048 passes in all
        # at 5 against 8201 at 10); 5 keeps headroom for the last iterations.
        "correction_passes_max": 5,
        # Refinement stop: 1e-14 .. 1e-11 give the same statuses, 1e-10 fails
        # one state at N = 50 seed 11 and two at N = 20; 1e-12 keeps two
        # decades to that (1e-11 would save 2 to 10% of the passes with one).
        "correction_stop": 1e-12,
        # Share of the step to the boundary: 0.9 and 0.95 take 2 to 3 and 1
        # more iterations in the median; 0.999 raises the worst to 27 / 25 / 25;
        # 0.98 .. 0.995 are a plateau, 0.99 in its middle.
        "boundary_step_share": 0.99,
    },
    # Single: float has about 7 significant digits (unit roundoff 6e-8) and
    # the KKT system's condition number grows like 1/mu near the optimum, so
    # feasibility, gap and infeasibility are asked to 1e-4 relative, with a
    # much stronger shift and pivot rule and more refinement passes, and the
    # "staged" ordering (codegen.backends.native.symbolic). Sweep at N = 50,
    # seed 7 (DEVELOPERS.md): 17 of 997 states without the reference's
    # verdict and 133 CONVERGED_COARSE at these values, never a wrong
    # verdict. Looser stops (3e-4) measured better (3 failures, 1 coarse)
    # but would loosen the stated single-precision accuracy: kept. Shift
    # 1e-5 or 1e-3 fail as many or more states, a pivot floor of 1e-6 or
    # 1e-4 and 5 or 20 passes as many; a replacement of 1e-4 or a refinement stop of 1e-7 fails fewer
    # states (8) but raises the worst iterations to 45 and 49.
    "single": {"gap_abs_stop": 1e-4, "gap_rel_stop": 1e-4, "residual_stop": 1e-4,
               "certificate_stop": 1e-4, "residual_stop_coarse": 1e-3, "gap_stop_coarse": 1e-3,
               "iteration_cap": 100, "kkt_shift": 1e-4, "pivot_floor": 1e-5,
               "pivot_replacement": 1e-3, "correction_passes_max": 10, "correction_stop": 1e-6,
               "boundary_step_share": 0.99},
}
assert all(list(d) == [name for name, _, _ in SETTINGS] for d in DEFAULTS.values())

#: Iterative refinement of a KKT solve stops once its residual is below this times mu
#: (inexact Newton directions: the error only has to be small next to the
#: complementarity it is reducing). Measured on the demo at N = 50 (pdgc
#: check --cases 1000 --seed 11, and the example's 26-solve search under
#: callgrind): 1e-6 -> 840M instructions, 1e-2 -> 684M, 1e-1 -> 662M, with
#: the same statuses and worst objective error 4e-9, 4e-9, 6e-9; 1e-1 took
#: 2.5% more iterations, so 1e-2. Single precision keeps 1e-6: with 1e-2 a
#: demo state stopped at residual 1.4e-4 against its 1e-4.
_CORRECTION_MU_FACTOR = {"double": 1e-2, "single": 1e-6}

#: On a breakdown the static shift (kkt_shift) is multiplied by the first
#: number, up to the second times the setting (double: 1e-8 -> at most 1e-4;
#: single: 1e-4 -> at most 1e-1 in tenfold steps, which the sweeps preferred).
_SHIFT_RAISE = {"double": (100.0, 1e4), "single": (10.0, 1e3)}

_C_NAME_RE = re.compile(r"^[a-z][a-z0-9_]{0,30}$")


def _check_args(c_name: str, precision: str, settings):
    if not isinstance(c_name, str) or not _C_NAME_RE.match(c_name):
        raise InputError("c_name", c_name, "must be a lower-case C identifier of at most 31 "
                         "characters (letters, digits, _; starting with a letter)")
    if precision not in DEFAULTS:
        raise InputError("precision", precision, "must be 'double' or 'single'")
    merged = dict(DEFAULTS[precision])
    for key, val in (settings or {}).items():
        if key not in merged:
            raise InputError(f"settings.{key}", val,
                             f"unknown setting; known: {', '.join(sorted(merged))}")
        if key in _INT_SETTINGS:
            if not isinstance(val, int) or isinstance(val, bool) or val < 0:
                raise InputError(f"settings.{key}", val, "must be a non-negative integer")
            if key == "iteration_cap" and val > ITERATIONS_HARD_LIMIT:
                raise InputError("settings.iteration_cap", val, f"must be <= {ITERATIONS_HARD_LIMIT}")
            if key == "correction_passes_max" and val > 32:
                raise InputError("settings.correction_passes_max", val, "must be <= 32")
        else:
            try:
                fval = float(val)
            except (TypeError, ValueError):
                raise InputError(f"settings.{key}", val, "must be a number") from None
            if not (np.isfinite(fval) and fval > 0):
                raise InputError(f"settings.{key}", val, "must be a finite positive number")
            if key == "boundary_step_share" and not fval < 1:
                raise InputError("settings.boundary_step_share", val, "must lie in (0, 1)")
            val = fval
        merged[key] = val
    return merged


def real_literal(value: float, precision: str) -> str:
    """An exact C literal: the shortest round-trip decimal of the double (or of
    the value rounded to float, with an f suffix)."""
    if precision == "single":
        f32 = np.float32(value)
        if not np.isfinite(f32):
            raise InputError("data value", value, "does not fit in single precision")
        txt = np.format_float_scientific(f32, unique=True, trim="-")
        if "." not in txt:
            mant, exp = txt.split("e")
            txt = f"{mant}.0e{exp}"
        return txt + "f"
    v = float(value)
    if not np.isfinite(v):
        raise InputError("data value", value, "must be finite")
    txt = repr(v)
    if "." not in txt and "e" not in txt and "inf" not in txt:
        txt += ".0"
    return txt


def _wrap(items, per_line: int = 16) -> str:
    items = list(items)
    if not items:
        return "0"
    lines = []
    for i in range(0, len(items), per_line):
        lines.append(",".join(items[i:i + per_line]))
    return ",\n".join(lines)


def _ints(arr) -> str:
    return _wrap([str(int(v)) for v in arr], 24)


def _reals(arr, precision) -> str:
    return _wrap([real_literal(v, precision) for v in arr], 6)


def _affine_layout(prog: ConeProgram):
    """The parameter map of all data, as one table over the data vector
    data = [c | d | b | h | A values | G values]."""
    n, p, m = prog.n, prog.p, prog.m
    offs = {"c": 0, "d": n, "b": n + 1, "h": n + 1 + p, "A": n + 1 + p + m,
            "G": n + 1 + p + m + prog.A.nnz}
    ndata = offs["G"] + prog.G.nnz
    base = np.zeros(ndata)
    rows = {}                        # data index -> {param col: coef}
    for key in "cdbhAG":
        aff = getattr(prog, key)
        mp = aff.map.tocsr()
        if mp.shape[1] != prog.n_params + 1:
            raise ValueError(f"{key}: map has {mp.shape[1]} columns, expected {prog.n_params + 1}")
        if key in "cdbh":
            targets = offs[key] + np.asarray(aff.indices, dtype=np.int64)
        else:
            targets = offs[key] + np.arange(aff.nnz)
        for k in range(aff.nnz):
            t = int(targets[k])
            lo, hi = mp.indptr[k], mp.indptr[k + 1]
            for q in range(lo, hi):
                col, val = int(mp.indices[q]), float(mp.data[q])
                if val == 0.0:
                    continue
                if col == prog.n_params:
                    base[t] += val
                else:
                    d = rows.setdefault(t, {})
                    d[col] = d.get(col, 0.0) + val
    base_idx = np.flatnonzero(base)
    prow_idx = sorted(rows)
    prow_ptr = [0]
    pcol, pcoef = [], []
    for t in prow_idx:
        for col in sorted(rows[t]):
            if rows[t][col] != 0.0:
                pcol.append(col)
                pcoef.append(rows[t][col])
        prow_ptr.append(len(pcol))
    return dict(offs=offs, ndata=ndata, base_idx=base_idx, base_val=base[base_idx],
                prow_idx=np.asarray(prow_idx, dtype=np.int64), prow_ptr=np.asarray(prow_ptr),
                pcol=np.asarray(pcol, dtype=np.int64), pcoef=np.asarray(pcoef))


def _check_program(prog: ConeProgram):
    if prog.nonneg + sum(prog.soc) != prog.m:
        raise InputError("ConeProgram.soc", prog.soc,
                         f"nonneg ({prog.nonneg}) + sum of SOC sizes must equal m = {prog.m}")
    for q in prog.soc:
        if int(q) < 1:
            raise InputError("ConeProgram.soc", prog.soc, "every SOC size must be >= 1")
    if prog.n < 1:
        raise InputError("ConeProgram.n", prog.n, "must be >= 1")


_CACHE: dict = {}


def _symbolic(prog: ConeProgram, ordering: str) -> KKTSymbolic:
    key = (id(prog), ordering)
    hit = _CACHE.get(key)
    if hit is not None and hit[0] is prog:
        return hit[1]
    stages = None
    if ordering in ("auto", "periodic"):
        vstage = variable_stages(prog)
        if vstage is not None:
            # equality rows and cones in the earliest stage of their
            # variables: less fill than the latest since the lower thrust
            # bound couples sigma_k with z_{k+1} (demo N = 50: nnz(L) 8631
            # against 10151, multiply-adds 29813 against 40178; with the
            # bound on z_k the latest had won, 8497 against 8569)
            stages = kkt_stages(prog, vstage, "min")
    sym = analyse(prog.n, prog.p, prog.m, prog.A.indptr, prog.A.indices, prog.G.indptr,
                  prog.G.indices, prog.nonneg, prog.soc, ordering, stages)
    _CACHE.clear()
    _CACHE[key] = (prog, sym)
    return sym


def _context(prog, c_name, precision, settings, ordering, stage_kernel=True):
    _check_program(prog)
    defaults = _check_args(c_name, precision, settings)
    prefix = c_name
    if ordering is None:
        ordering = DEFAULT_ORDERING[precision]
    if ordering not in ("auto", "periodic", "staged", "minfill", "mindegree", "rcm", "natural"):
        raise InputError("ordering", ordering,
                         "must be one of auto, periodic, staged, minfill, mindegree, rcm, natural")
    sym = _symbolic(prog, ordering)
    aff = _affine_layout(prog)
    soc = [int(q) for q in prog.soc]
    soc_start = list(np.cumsum([prog.nonneg] + soc[:-1])) if soc else []
    nnz_zoff = sum(q * (q - 1) // 2 for q in soc)

    def alloc(v):
        return max(1, int(v))

    largest = max(sym.dim, sym.nnz_kkt, sym.nnz_L, aff["ndata"], prog.n_params,
                  len(aff["pcol"]), prog.A.nnz, prog.G.nnz)
    idx_type = "unsigned short" if largest < 65535 else "int"
    lit = {k: real_literal(v, precision) for k, v in defaults.items()
           if k not in _INT_SETTINGS}
    ctx = dict(
        prefix=prefix, PREFIX=prefix.upper(), precision=precision, idx_type=idx_type,
        correction_mu_factor=_CORRECTION_MU_FACTOR[precision],
        shift_raise=_SHIFT_RAISE[precision][0], shift_raise_cap=_SHIFT_RAISE[precision][1],
        single=precision == "single", ctype="float" if precision == "single" else "double",
        n_params=prog.n_params, n=prog.n, p=prog.p, m=prog.m, nonneg=prog.nonneg, num_soc=len(soc),
        dim=sym.dim, nnz_kkt=sym.nnz_kkt, nnz_L=sym.nnz_L, ndata=aff["ndata"],
        iterations_hard_limit=ITERATIONS_HARD_LIMIT, off_d=aff["offs"]["d"], off_b=aff["offs"]["b"],
        off_h=aff["offs"]["h"], off_A=aff["offs"]["A"], off_G=aff["offs"]["G"],
        nnz_A=prog.A.nnz, nnz_G=prog.G.nnz, nnz_zoff=nnz_zoff,
        nbase=len(aff["base_idx"]), nprow=len(aff["prow_idx"]),
        defaults=defaults, lit=lit, ordering=sym.ordering, statuses=STATUSES, causes=CAUSES,
        setting_rows=SETTINGS,
        alloc=dict(p=alloc(prog.p), m=alloc(prog.m), num_soc=alloc(len(soc)),
                   nnz_L=alloc(sym.nnz_L), nnz_A=alloc(prog.A.nnz), nnz_G=alloc(prog.G.nnz),
                   nnz_zoff=alloc(nnz_zoff), nbase=alloc(len(aff["base_idx"])),
                   nprow=alloc(len(aff["prow_idx"])), npcoef=alloc(len(aff["pcol"]))),
        base_idx=_ints(aff["base_idx"]), base_val=_reals(aff["base_val"], precision),
        prow_idx=_ints(aff["prow_idx"]), prow_ptr=_ints(aff["prow_ptr"]),
        pcol=_ints(aff["pcol"]), pcoef=_reals(aff["pcoef"], precision),
        a_ptr=_ints(prog.A.indptr), a_row=_ints(prog.A.indices),
        g_ptr=_ints(prog.G.indptr), g_row=_ints(prog.G.indices),
        soc_start=_ints(soc_start), soc_size=_ints(soc),
        perm=_ints(sym.perm),
        pos_xdiag=_ints(sym.pos_xdiag), pos_ydiag=_ints(sym.pos_ydiag),
        pos_zdiag=_ints(sym.pos_zdiag), pos_A=_ints(sym.pos_A), pos_G=_ints(sym.pos_G),
        pos_zoff=_ints(sym.pos_zoff), l_ptr=_ints(sym.Lp),
    )
    ctx["cone_sizes"] = specialised_sizes(soc)
    ctx["cone_kernels"] = "\n".join(cone_kernels(q, prefix) for q in ctx["cone_sizes"])
    kern = sym.kernel if stage_kernel else None
    ctx.update(kernel_context(kern))
    ctx.update(_row_pattern(sym, kern))
    ctx["alloc"]["nnz_R"] = alloc(ctx["nnz_R"])
    ctx["alloc"]["nnz_Kg"] = alloc(ctx["nnz_Kg"])
    ctx["alloc"]["nnz_Lg"] = alloc(ctx["nnz_Lg"])
    return ctx, sym, defaults


def _row_pattern(sym: KKTSymbolic, kern) -> dict:
    """The row-wise pattern of L for the rows the generic loops factor and
    sweep (all rows without a stage kernel; with one, those before and after
    its periodic range), as const arrays: r_ptr over those rows (the rows
    after the range at offset r_skip = rows skipped), r_col the column of
    each entry, r_pos its position in l_val (column-wise). Computed here once
    instead of per solve: the transpose had cost about 1% of a solve's wall
    time and 83 KB of workspace at N = 50."""
    if kern is None:
        ranges = [(0, sym.dim)]
    else:
        ranges = [(0, kern.row_begin), (kern.row_end, sym.dim)]
    Lp, Li, Rp, Rj = sym.Lp, sym.Li, sym.Rp, sym.Rj
    ptr, col, pos = [0], [], []
    for lo, hi in ranges:
        for k in range(lo, hi):
            for t in range(int(Rp[k]), int(Rp[k + 1])):
                j = int(Rj[t])
                q = int(Lp[j]) + int(np.searchsorted(Li[Lp[j]:Lp[j + 1]], k))
                if int(Li[q]) != k:
                    raise AssertionError(f"row pattern: L({k}, {j}) not in column {j}")
                col.append(j)
                pos.append(q)
            ptr.append(len(col))
    skip = 0 if kern is None else kern.row_end - kern.row_begin
    out = {"r_ptr": _ints(ptr), "r_col": _ints(col), "r_pos": _ints(pos), "nnz_R": len(col),
           "nrows_R": len(ptr) - 1, "r_skip": skip}
    out.update(_generic_patterns(sym, kern, ranges, col))
    return out


def _generic_patterns(sym: KKTSymbolic, kern, ranges, r_cols) -> dict:
    """The KKT pattern (k_ptr, k_row) and the row indices of L (l_row) as far
    as the generic loops read them; the stage kernel has its positions
    written into its code. k_ptr/k_row: the rows of ``ranges`` only (indexed
    like r_ptr; the KKT values of the rows after the range sit k_skip
    positions further on). l_row: the columns [0, l_lo) and [l_hi, dim),
    the generic backward sweeps and factor rows read, [l_lo, l_hi) being the
    run of unread columns with the most entries (the positions from l_hi on
    sit l_skip further on in l_val). Without a kernel both are
    whole. At N = 50 this took 61 KB off the solver source (k_row, k_ptr,
    l_row had been whole)."""
    Kp, Ki, Lp, Li, dim = sym.Kp, sym.Ki, sym.Lp, sym.Li, sym.dim
    kptr, krow = [0], []
    for lo, hi in ranges:
        for k in range(lo, hi):
            krow.extend(int(i) for i in Ki[Kp[k]:Kp[k + 1]])
            kptr.append(len(krow))
    if kern is None:
        k_skip, l_lo, l_hi = 0, dim, dim
    else:
        k_skip = int(Kp[kern.row_end]) - int(Kp[kern.row_begin])
        b = kern.bwd
        lo = b["rows"][0] if b["count"] else dim
        hi = b["rows"][0] + b["count"] * b["rows"][1] if b["count"] else dim
        needed = sorted(set(range(0, lo)) | set(range(hi, dim)) | {int(j) for j in r_cols})
        # the run of unread columns that holds the most entries of L
        l_lo, l_hi = dim, dim
        for a, b2 in zip(needed, needed[1:]):
            if int(Lp[b2]) - int(Lp[a + 1]) > int(Lp[l_hi]) - int(Lp[l_lo]):
                l_lo, l_hi = a + 1, b2
    l_skip = int(Lp[l_hi]) - int(Lp[l_lo])
    lrow = [int(i) for i in Li[:Lp[l_lo]]] + [int(i) for i in Li[Lp[l_hi]:]]
    return {"k_ptr": _ints(kptr), "k_row": _ints(krow), "nrows_K": len(kptr) - 1,
            "nnz_Kg": len(krow), "k_skip": k_skip, "l_row": _ints(lrow), "nnz_Lg": len(lrow),
            "l_hi": l_hi, "l_skip": l_skip}


def c_comment(text: str, indent: int, width: int = 96) -> str:
    """``/* text */`` wrapped to ``width`` columns, continuation lines
    indented by ``indent`` + 3 (the first line's indent is the caller's)."""
    lines = textwrap.wrap(text, width - indent - 6) or [""]
    pad = " " * (indent + 3)
    return "/* " + ("\n" + pad).join(lines) + " */"


def _env() -> jinja2.Environment:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(TEMPLATE_DIR)),
                             undefined=jinja2.StrictUndefined, keep_trailing_newline=True,
                             autoescape=False)
    env.filters["ccomment"] = c_comment
    return env


def render(prog: ConeProgram, c_name: str = "pdg", precision: str = "double",
           settings: dict | None = None, ordering: str | None = None,
           stage_kernel: bool = True) -> dict:
    """C source of the solver for ``prog``: {filename: text}.

    ``settings`` overrides the defaults compiled into
    ``{prefix}_socp_config_init`` (keys as in :data:`DEFAULTS`).
    ``ordering`` (default: by precision, :data:`DEFAULT_ORDERING`): "auto"
    (the stage-periodic ordering when the program's named variables have a
    time axis, its stage kernel applies and it costs at most
    symbolic.PERIODIC_MAX_COST times the multiply-adds of the best other;
    otherwise the smallest nnz(L) of minimum fill, minimum degree and
    reverse Cuthill-McKee), "periodic", "staged" (cone rows, then x, then
    y; default in single precision), "minfill", "mindegree", "rcm" or
    "natural". ``stage_kernel=False`` keeps the generic loops for every row
    even when a periodic range exists (for comparison).
    Deterministic: the same input gives the same bytes.
    """
    ctx, _, _ = _context(prog, c_name, precision, settings, ordering, stage_kernel)
    prefix = c_name
    env = _env()
    return {f"{prefix}_socp.h": env.get_template("socp.h.j2").render(**ctx),
            f"{prefix}_socp.c": env.get_template("socp.c.j2").render(**ctx)}


def _kernel_info(kern):
    """The periodic range of the stage kernel (stages [first, end) of the
    factorisation and forward sweep; of the backward sweep), or None."""
    if kern is None:
        return None
    b = kern.bwd
    return {"stages": [kern.first, kern.first + kern.count], "rows_per_stage": kern.rows[1],
            "backward_stages": [b["first"], b["first"] + b["count"]]}


def describe(prog: ConeProgram, c_name: str = "pdg", precision: str = "double",
             settings: dict | None = None, ordering: str | None = None) -> dict:
    """Sizes and defaults of the solver ``render`` would generate."""
    ctx, sym, defaults = _context(prog, c_name, precision, settings, ordering)
    rb = 4 if precision == "single" else 8
    a = ctx["alloc"]
    dim, n, p, m = sym.dim, prog.n, a["p"], a["m"]
    num_soc = a["num_soc"]
    # the members of {prefix}_socp_work, as declared in socp.h.j2
    reals = (ctx["ndata"] + n + p + 2 * m + 2         # data, x, y, z, s, tau, kappa
             + 2 * m + 10 * num_soc                  # lambda, ntw, eta, rw, geo_s, geo_z
             + sym.nnz_kkt + a["nnz_L"] + 2 * dim     # kkt, l_val, pivot_inv, scat
             + 6 * dim                               # rhs, rhs2, u0, u1, res, corr
             + 2 * n + 2 * p + 7 * m                 # rx, ry, rz, dx, dy, dz, ds, dsa, dza, t1, t2
             + 5                                     # dtau, dkappa, data_norm, shift, correction_floor
             + n + p + 2 * m + 2                     # xb, yb, zb, sb, taub, kappab
             + n + p + 2 * m + 7                     # x_coarse .. duality_gap_coarse, best_merit
             + 5)                                    # objective, primal_residual .. mu
    ints = 10                                       # counters
    return {
        "precision": precision, "c_name": c_name,
        "n_params": prog.n_params, "n": prog.n, "p": prog.p, "m": prog.m,
        "nonneg": prog.nonneg, "soc": len(prog.soc),
        "soc_sizes": sorted(set(int(q) for q in prog.soc)),
        "kkt_dim": dim, "kkt_nnz": sym.nnz_kkt, "L_nnz": sym.nnz_L,
        "ordering": sym.ordering, "L_nnz_by_ordering": dict(sym.nnz_L_tried),
        "stage_kernel": _kernel_info(sym.kernel),
        "workspace_bytes": int(reals * rb + ints * 4),
        "iterations_hard_limit": ITERATIONS_HARD_LIMIT,
        "settings": dict(defaults),
    }
