"""Figures of the native solver core alone (not a benchmark suite; no asserts).

    .venv/bin/python -m codegen.backends.native.measure 20 50 100 [--precision single] [--cases 200]

For each horizon N on the demo vehicle: generation and compile seconds
(gcc -O2), source bytes, nnz of KKT and L, solve time on the nominal demo
state (wall median and minimum, and thread CPU-time median, of repeated
solves in one process: on a shared machine the CPU time is the steadier
figure), and over
``--cases`` dispersed states with times of flight across the bracket: status
agreement with Clarabel (reference library, tolerances 1e-9), worst relative
objective error and worst iterations of the feasible ones.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from codegen.model.canonical import CLARABEL_TIGHT, extract, flat_parameters
from codegen.model.problem import DescentProblem, time_of_flight_bracket
from codegen.model.vehicle import load_vehicle
from codegen.fsutil import REPO_DIR
from codegen.backends.native import (CONVERGED, INFEASIBLE_CERTIFIED, UNBOUNDED_CERTIFIED, describe,
                                     render)
from codegen.backends.native.cbuild import NativeSolver, compile_shared

DEMO = REPO_DIR / "examples" / "demo_vehicle.toml"
STATUS = {"Solved": CONVERGED, "PrimalInfeasible": INFEASIBLE_CERTIFIED,
          "DualInfeasible": UNBOUNDED_CERTIFIED}


def clarabel_reference(prog, params):
    import clarabel
    data = prog.evaluate(params)
    a_all = sp.vstack([data["A"], data["G"]]).tocsc()
    b_all = np.concatenate([data["b"], data["h"]])
    cones = [clarabel.ZeroConeT(prog.p), clarabel.NonnegativeConeT(prog.nonneg)]
    cones += [clarabel.SecondOrderConeT(int(q)) for q in prog.soc]
    st = clarabel.DefaultSettings()
    st.verbose = False
    for key, val in CLARABEL_TIGHT.items():      # the reference's own settings
        setattr(st, key, val)
    sol = clarabel.DefaultSolver(sp.csc_matrix((prog.n, prog.n)), data["c"], a_all, b_all,
                                 cones, st).solve()
    return str(sol.status), sol.obj_val + data["d"]


def dispersed(vehicle, dp, count, seed=5):
    rng = np.random.default_rng(seed)
    env = vehicle.envelope
    for _ in range(count):
        r0 = rng.uniform(env.position_min_m, env.position_max_m)
        v0 = rng.uniform(env.velocity_min_mps, env.velocity_max_mps)
        m0 = rng.uniform(env.mass_min_kg, env.mass_max_kg)
        t_min, t_max = time_of_flight_bracket(vehicle, r0, v0, m0)
        hi = min(t_max, 3 * t_min + 40.0)
        yield flat_parameters(dp, dp.values(r0, v0, m0, rng.uniform(t_min + 0.3 * (hi - t_min), hi)))


def measure(horizon: int, precision: str, cases: int, repeats: int, workdir: Path) -> dict:
    vehicle = load_vehicle(DEMO)
    dp = DescentProblem(vehicle, horizon)
    prog = extract(dp)
    t0 = time.perf_counter()
    files = render(prog, precision=precision)
    t_gen = time.perf_counter() - t0
    info = describe(prog, precision=precision)
    t0 = time.perf_counter()
    out = workdir / f"n{horizon}_{precision}"
    lib = compile_shared(files, out)
    t_cc = time.perf_counter() - t0
    solver = NativeSolver(lib, out / "pdg_socp.h")
    nominal = flat_parameters(dp, dp.values([1500, 0, 1500], [-50, 0, -40], 1900, 40.0))
    work = solver.new_work()
    times, cpu = [], []
    res = None
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.thread_time()
        res = solver.solve(nominal, work=work)
        times.append(time.perf_counter() - t0)
        cpu.append(time.thread_time() - c0)
    agree = total = 0
    worst_it = worst_err = 0.0
    unsolved = 0
    for params in dispersed(vehicle, dp, cases):
        ref, ref_obj = clarabel_reference(prog, params)
        if ref not in STATUS:
            continue
        total += 1
        r = solver.solve(params)
        agree += r["status"] == STATUS[ref]
        if STATUS[ref] == CONVERGED:
            if r["status"] == CONVERGED:
                worst_it = max(worst_it, r["iterations"])
                worst_err = max(worst_err, abs(r["objective"] - ref_obj) / max(1.0, abs(ref_obj)))
            else:
                unsolved += 1
    return {"N": horizon, "precision": precision, "generate_s": round(t_gen, 3),
            "compile_s": round(t_cc, 3), "source_bytes": sum(len(t.encode()) for t in files.values()),
            "kkt_nnz": info["kkt_nnz"], "L_nnz": info["L_nnz"], "ordering": info["ordering"],
            "workspace_bytes": info["workspace_bytes"],
            "nominal_status": res["status"], "nominal_iterations": res["iterations"],
            "solve_ms_median": round(1e3 * float(np.median(times)), 3),
            "solve_ms_min": round(1e3 * float(np.min(times)), 3),
            "solve_cpu_ms_median": round(1e3 * float(np.median(cpu)), 3),
            "cases_compared": total, "status_agreement": f"{agree}/{total}",
            "feasible_not_solved": unsolved,
            "worst_iterations_feasible": int(worst_it), "worst_rel_objective_error": worst_err}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("horizons", nargs="*", type=int, default=[20, 50])
    ap.add_argument("--precision", default="double", choices=["double", "single"])
    ap.add_argument("--cases", type=int, default=100)
    ap.add_argument("--repeats", type=int, default=200)
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        for n in args.horizons:
            print(f"N={n} ...", file=sys.stderr, flush=True)
            print(measure(n, args.precision, args.cases, args.repeats, Path(tmp)), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
