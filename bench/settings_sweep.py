"""Settings sweep of the native solver core: the measurement behind its defaults.

    .venv/bin/python -m bench.settings_sweep [--horizon 50] [--cases 1000] [--seed 7]
        [--precision double] [--only kkt_shift,boundary_step_share] [--json FILE]
        [--edge-states K]
    .venv/bin/python -m bench.settings_sweep --condense A.json B.json ...

Generates the demo vehicle's solver core once (its compiled-in defaults), and
solves a fixed set of dispersed states with run-time settings (the
``{c_name}_socp_config`` passed to ``{c_name}_socp_solve``), one setting at a time
over a few candidate values, all other settings at their defaults.

States: ``pdgc check``'s draw (codegen.verify.check.draw_cases: 70 % inside the
envelope, 20 % on its faces, 10 % beyond it) at the given seed, every case at a
fixed time of flight over the lower 40 % of its bracket (so that many are too
short to be feasible). Reference: Clarabel on the same cone program at the
reference's tolerances (codegen.model.canonical.CLARABEL_TIGHT, 1e-9); its answers
are computed once and cached (under ``PDGC_CACHE``, default ~/.cache/pdgc,
keyed by the program's data, the states and Clarabel's version), so a sweep
does not re-run the reference. Cases where Clarabel itself is inexact
("Almost ...") are left out.

For each candidate value: over the cases Clarabel solves, iterations median
and worst, CONVERGED_COARSE answers, the worst relative objective error
against Clarabel (|f - f_ref| / |f_ref|, as ``pdgc check``); over the cases
Clarabel proves infeasible, iterations median and worst; failures: a case
without the reference's verdict after the guidance adapter's one retry
(BREAKDOWN other than NO_PROGRESS: again with ten times kkt_shift), split into
wrong verdicts (a different verdict) and no verdict (iteration cap,
breakdown); and, over all cases, the refinement passes (a load-independent
measure of the work they cost), pivots replaced by the dynamic rule and
iterations redone with a larger shift. No timings: the machine is shared.

``--edge-states K`` also probes, for K states of the same draw, the
shortest feasible time of flight (found by bisection with Clarabel, cached):
the verdict for each candidate certificate_stop at 1e-2 .. 1e-6 s before and
after it, where a loose certificate would first call a feasible problem
infeasible.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import sys
import tempfile
from pathlib import Path

import numpy as np

from codegen.backends.native import (BREAKDOWN, CAUSE_NO_PROGRESS, CONVERGED, CONVERGED_COARSE,
                                     DEFAULTS, INFEASIBLE_CERTIFIED, UNBOUNDED_CERTIFIED,
                                     render)
from codegen.backends.native.cbuild import NativeSolver, compile_shared
from codegen.backends.native.measure import DEMO, clarabel_reference
from codegen.fsutil import write_atomic
from codegen.model.canonical import CLARABEL_TIGHT, extract, flat_parameters
from codegen.model.problem import DescentProblem
from codegen.model.vehicle import load_vehicle
from codegen.verify.check import draw_cases

VERDICT = {"Solved": CONVERGED, "PrimalInfeasible": INFEASIBLE_CERTIFIED,
           "DualInfeasible": UNBOUNDED_CERTIFIED}

#: Candidate values by precision and setting (a "+" joins settings swept
#: together). Each list holds the default.
CANDIDATES = {
    "double": {
        "residual_stop": [1e-7, 1e-8, 1e-9],
        "gap_abs_stop+gap_rel_stop": [1e-7, 1e-8, 1e-9],
        "certificate_stop": [1e-6, 1e-7, 1e-8, 1e-9],
        "residual_stop_coarse": [1e-5, 1e-6, 1e-7],
        "gap_stop_coarse": [1e-6, 1e-7, 1e-8],
        "iteration_cap": [40, 60, 100, 200],
        "kkt_shift": [1e-10, 1e-9, 1e-8, 1e-7, 1e-6],
        "pivot_floor": [1e-15, 1e-13, 1e-11, 1e-9],
        "pivot_replacement": [2e-8, 2e-7, 2e-6, 2e-5],
        "correction_passes_max": [1, 2, 3, 5, 10],
        "correction_stop": [1e-14, 1e-13, 1e-12, 1e-11, 1e-10, 1e-9, 1e-8],
        "boundary_step_share": [0.9, 0.95, 0.98, 0.99, 0.995, 0.999],
    },
    "single": {
        "residual_stop+gap_abs_stop+gap_rel_stop+certificate_stop": [3e-5, 1e-4, 3e-4],
        "kkt_shift": [1e-5, 1e-4, 1e-3],
        "pivot_floor": [1e-6, 1e-5, 1e-4],
        "pivot_replacement": [1e-4, 1e-3, 1e-2],
        "correction_passes_max": [5, 10, 20],
        "correction_stop": [1e-7, 1e-6, 1e-5],
        "boundary_step_share": [0.95, 0.98, 0.99, 0.995],
    },
}


def _states(vehicle, count: int, seed: int) -> list:
    return [(c.position_m, c.velocity_mps, c.mass_kg, c.time_of_flight_s)
            for c in draw_cases(vehicle, count, seed, search_every=0)]


def reference_answers(prog, params: list, states: list, cache_dir: Path, say) -> list:
    """[(Clarabel status, objective)] per case, from the cache when it has them."""
    import clarabel
    h = hashlib.sha256()
    for key in "cdbhAG":
        aff = getattr(prog, key)
        mp = aff.map.tocsr()
        for arr in (mp.data, mp.indices, mp.indptr, aff.indices, aff.indptr):
            h.update(np.ascontiguousarray(arr).tobytes())
    h.update(json.dumps([prog.nonneg, list(prog.soc), states, CLARABEL_TIGHT,
                         clarabel.__version__]).encode())
    path = cache_dir / f"reference-{h.hexdigest()[:24]}.json"
    if path.exists():
        say(f"reference answers from {path}")
        return [tuple(r) for r in json.loads(path.read_text())["answers"]]
    answers = []
    for i, p in enumerate(params):
        if i % 100 == 0:
            say(f"reference {i}/{len(params)}")
        status, obj = clarabel_reference(prog, p)
        answers.append((status, float(obj)))
    write_atomic(path, json.dumps({"states": states, "answers": answers}) + "\n")
    say(f"reference answers cached in {path}")
    return answers


def solve_like_the_adapter(solver: NativeSolver, params, overrides: dict) -> dict:
    """One solve with the run-time settings, and the adapter's one retry with
    ten times kkt_shift after a breakdown other than NO_PROGRESS
    (templates/backend_native.c.j2)."""
    res = solver.solve(params, settings=solver.settings(**overrides))
    iterations, passes = res["iterations"], res["correction_passes"]
    pivots, redone = res["pivots_replaced"], int(res["work"].recoveries)
    if res["status"] == BREAKDOWN and res["breakdown_cause"] != CAUSE_NO_PROGRESS:
        st = solver.settings(**overrides)
        st.kkt_shift = st.kkt_shift * 10
        res = solver.solve(params, settings=st)
        iterations += res["iterations"]
        passes += res["correction_passes"]
        pivots += res["pivots_replaced"]
        redone += int(res["work"].recoveries)
    return {"status": res["status"], "objective": res["objective"], "iterations": iterations,
            "correction_passes": passes, "pivots_replaced": pivots, "recoveries": redone}


def evaluate(solver, params: list, answers: list, overrides: dict) -> dict:
    it_ok, it_inf, errs = [], [], []
    wrong = none = coarse = passes = pivots = redone = 0
    for p, (ref, ref_obj) in zip(params, answers):
        expect = VERDICT.get(ref)
        if expect is None:
            continue
        r = solve_like_the_adapter(solver, p, overrides)
        passes += r["correction_passes"]
        pivots += r["pivots_replaced"]
        redone += r["recoveries"]
        got = CONVERGED if r["status"] == CONVERGED_COARSE else r["status"]
        if got != expect:
            if got in (CONVERGED, INFEASIBLE_CERTIFIED, UNBOUNDED_CERTIFIED):
                wrong += 1
            else:
                none += 1
            continue
        if expect == CONVERGED:
            coarse += r["status"] == CONVERGED_COARSE
            it_ok.append(r["iterations"])
            errs.append(abs(r["objective"] - ref_obj) / max(abs(ref_obj), 1e-9))
        else:
            it_inf.append(r["iterations"])

    def stat(xs, f):
        return int(f(xs)) if xs else None

    return {"failures": wrong + none, "wrong_verdict": wrong, "no_verdict": none,
            "coarse": coarse, "feasible": len(it_ok), "infeasible": len(it_inf),
            "iterations_median": stat(it_ok, np.median), "iterations_worst": stat(it_ok, max),
            "infeasible_iterations_median": stat(it_inf, np.median),
            "infeasible_iterations_worst": stat(it_inf, max),
            "worst_objective_rel": max(errs) if errs else None,
            "correction_passes": passes, "pivots_replaced": pivots, "recoveries": redone}


def _fmt(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.2g}"
    return str(v)


def table(setting: str, rows: list, default) -> str:
    head = ("| value | failures (wrong / none) | coarse | iterations median / worst | "
            "infeasible median / worst | worst objective error | refinement passes | "
            "pivots replaced | iterations redone |")
    out = [f"{setting} (default {default}):", "", head, "|---|---|---|---|---|---|---|---|---|"]
    for value, r in rows:
        mark = " (default)" if value == default else ""
        out.append(f"| {value}{mark} | {r['failures']} ({r['wrong_verdict']} / {r['no_verdict']}) "
                   f"| {r['coarse']} | {_fmt(r['iterations_median'])} / "
                   f"{_fmt(r['iterations_worst'])} | {_fmt(r['infeasible_iterations_median'])} / "
                   f"{_fmt(r['infeasible_iterations_worst'])} | {_fmt(r['worst_objective_rel'])} "
                   f"| {r['correction_passes']} | {r['pivots_replaced']} | {r['recoveries']} |")
    return "\n".join(out)


#: Settings and candidates for the edge probe (--edge-states).
EDGE_CANDIDATES = {"certificate_stop": (1e-6, 1e-7, 1e-8), "iteration_cap": (40, 60, 100, 200)}
#: Distances (s) from the feasibility edge in time of flight at which the edge probe solves.
EDGE_OFFSETS_S = (1e-2, 1e-3, 1e-4, 1e-5, 1e-6)


def feasibility_edges(vehicle, dp, prog, count: int, seed: int, cache_dir: Path, say) -> list:
    """For ``count`` states of pdgc check's draw, the shortest feasible time of
    flight as Clarabel sees it (12-point scan of the bracket, then 40
    bisections): [(state, edge_s)], cached like the reference answers."""
    import clarabel
    key = hashlib.sha256(json.dumps([vehicle.source_sha256, dp.horizon, count, seed,
                                     CLARABEL_TIGHT, clarabel.__version__]).encode())
    path = cache_dir / f"edges-{key.hexdigest()[:24]}.json"
    if path.exists():
        say(f"feasibility edges from {path}")
        return [(tuple(s), e) for s, e in json.loads(path.read_text())]
    from codegen.model.problem import time_of_flight_bracket
    out = []
    for i, case in enumerate(draw_cases(vehicle, count, seed, search_every=0)):
        if i % 10 == 0:
            say(f"edge {i}/{count}")
        st = (case.position_m, case.velocity_mps, case.mass_kg)
        lo, hi = time_of_flight_bracket(vehicle, *st)

        def ref(t):
            return clarabel_reference(prog, flat_parameters(dp, dp.values(*st, t)))[0]

        ts = np.linspace(lo, hi, 12)
        stat = [ref(t) for t in ts]
        k = next((j for j, x in enumerate(stat) if x == "Solved"), None)
        if k is None or k == 0 or stat[k - 1] != "PrimalInfeasible":
            continue
        a, b = float(ts[k - 1]), float(ts[k])
        for _ in range(40):
            mid = 0.5 * (a + b)
            r = ref(mid)
            if r == "Solved":
                b = mid
            elif r == "PrimalInfeasible":
                a = mid
            else:
                break
        out.append((st, b))
    write_atomic(path, json.dumps(out) + "\n")
    return out


def edge_probe(solver, dp, prog, edges: list) -> list:
    """Verdicts at EDGE_OFFSETS_S before and after each edge, for each
    candidate of EDGE_CANDIDATES: rows of (setting, value, solves,
    disagreements, wrong verdicts, iterations median, worst)."""
    probes = []
    for st, edge in edges:
        for d in EDGE_OFFSETS_S:
            for sign in (-1.0, 1.0):
                p = flat_parameters(dp, dp.values(*st, edge + sign * d))
                probes.append((p, VERDICT.get(clarabel_reference(prog, p)[0])))
    rows = []
    for setting, values in EDGE_CANDIDATES.items():
        for value in values:
            bad = wrong = 0
            its = []
            for p, expect in probes:
                if expect is None:
                    continue
                r = solve_like_the_adapter(solver, p, {setting: value})
                its.append(r["iterations"])
                got = CONVERGED if r["status"] == CONVERGED_COARSE else r["status"]
                if got != expect:
                    bad += 1
                    wrong += got in (CONVERGED, INFEASIBLE_CERTIFIED, UNBOUNDED_CERTIFIED)
            rows.append((setting, value, len(its), bad, wrong, int(np.median(its)), max(its)))
    return rows


def condensed(paths: list) -> str:
    """One table from several --json results of the same sweeps: each cell
    lists the runs' figures in the order given, separated by " / "."""
    runs = [json.loads(Path(p).read_text()) for p in paths]
    out = ["| setting | value | failures | iterations median, worst | infeasible median, worst "
           "| worst objective error | refinement passes |", "|---|---|---|---|---|---|---|"]
    for group in runs[0]["sweeps"]:
        for rows in zip(*(run["sweeps"][group] for run in runs)):
            cells = [" / ".join(str(r["failures"]) for r in rows),
                     " / ".join(f"{r['iterations_median']}, {r['iterations_worst']}" for r in rows),
                     " / ".join(f"{r['infeasible_iterations_median']}, "
                                f"{r['infeasible_iterations_worst']}" for r in rows),
                     " / ".join("-" if r["worst_objective_rel"] is None
                                else f"{r['worst_objective_rel']:.1e}" for r in rows),
                     " / ".join(str(r["correction_passes"]) for r in rows)]
            names = "`, `".join(group.split("+"))
            out.append(f"| `{names}` | {rows[0]['value']:g} | " + " | ".join(cells) + " |")
    return "\n".join(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--horizon", type=int, default=50)
    ap.add_argument("--cases", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--precision", default="double", choices=("double", "single"))
    ap.add_argument("--only", default="", help="comma-separated settings (default: all)")
    ap.add_argument("--json", default=None, metavar="FILE")
    ap.add_argument("--edge-states", type=int, default=0, metavar="K",
                    help="also probe the feasibility edge of K states for the certificate stop")
    ap.add_argument("--condense", nargs="+", default=None, metavar="JSON",
                    help="print one table from earlier --json results and stop")
    args = ap.parse_args(argv)
    if args.condense:
        print(condensed(args.condense))
        return 0

    def say(msg):
        print(f"sweep: {msg}", file=sys.stderr, flush=True)

    from codegen.bind import cache_root
    vehicle = load_vehicle(DEMO)
    dp = DescentProblem(vehicle, args.horizon)
    prog = extract(dp)
    states = _states(vehicle, args.cases, args.seed)
    params = [flat_parameters(dp, dp.values(*s)) for s in states]
    answers = reference_answers(prog, params, states, cache_root() / "sweep", say)
    counts = {k: sum(a[0] == k for a in answers) for k in sorted({a[0] for a in answers})}
    say(f"N = {args.horizon}, {args.cases} states (seed {args.seed}), reference: {counts}")
    defaults = DEFAULTS[args.precision]
    wanted = [s for s in args.only.split(",") if s]
    results = {"horizon": args.horizon, "cases": args.cases, "seed": args.seed,
               "precision": args.precision, "reference": counts, "sweeps": {}}
    with tempfile.TemporaryDirectory() as tmp:
        lib = compile_shared(render(prog, precision=args.precision), Path(tmp))
        solver = NativeSolver(lib, Path(tmp) / "pdg_socp.h")
        base = evaluate(solver, params, answers, {})
        say(f"defaults: {base}")
        results["defaults"] = base
        print(f"N = {args.horizon}, {args.precision}, {args.cases} states of pdgc check's draw at "
              f"seed {args.seed} (fixed times of flight); Clarabel: {counts}\n")
        for group, values in CANDIDATES[args.precision].items():
            names = group.split("+")
            if wanted and not any(n in wanted for n in names):
                continue
            rows = []
            for value in values:
                overrides = {n: value for n in names}
                say(f"{group} = {value}")
                rows.append((value, base if value == defaults[names[0]] and all(
                    defaults[n] == value for n in names) else
                    evaluate(solver, params, answers, overrides)))
            results["sweeps"][group] = [{"value": v, **r} for v, r in rows]
            print(table(group, rows, defaults[names[0]]) + "\n", flush=True)
        if args.edge_states:
            edges = feasibility_edges(vehicle, dp, prog, args.edge_states, args.seed,
                                      cache_root() / "sweep", say)
            rows = edge_probe(solver, dp, prog, edges)
            results["edge"] = [dict(setting=s, value=v, solves=n, disagreements=b, wrong=w,
                                    iterations_median=im, iterations_worst=iw)
                               for s, v, n, b, w, im, iw in rows]
            print(f"At the feasibility edge: {len(edges)} states, solved "
                  f"{', '.join(f'{d:g}' for d in EDGE_OFFSETS_S)} s before and after the "
                  f"shortest feasible time of flight (Clarabel, 40 bisections):\n")
            print("| setting | value | solves | no or other verdict | wrong verdict | "
                  "iterations median / worst (with the retry) |")
            print("|---|---|---|---|---|---|")
            for s, v, n, b, w, im, iw in rows:
                mark = " (default)" if defaults[s] == v else ""
                print(f"| {s} | {v:g}{mark} | {n} | {b} | {w} | {im} / {iw} |")
            print()
    if args.json:
        write_atomic(args.json, json.dumps(results, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
