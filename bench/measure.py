"""Measure a horizon (backends interleaved), its table rows, growth, instruction counts."""

from __future__ import annotations

import math
import shutil
import statistics
import subprocess
import tempfile
import time
from pathlib import Path

import numpy as np

from bench.builds import Build, time_in_c
from bench.config import BACKENDS, LABELS, NOMINAL, REFERENCE, Config, Instance, say
from codegen.model.trajectory import TARGET_MET
from codegen.model.vehicle import load_vehicle
from codegen.reference import ReferenceSolver


def _median(xs):
    xs = [x for x in xs if x is not None and math.isfinite(x)]
    return statistics.median(xs) if xs else math.nan


def _max(xs):
    xs = [x for x in xs if x is not None and math.isfinite(x)]
    return max(xs) if xs else math.nan


def rel_error(x, ref) -> float:
    if x is None or ref is None or not (math.isfinite(x) and math.isfinite(ref)):
        return math.nan
    return abs(x - ref) / max(abs(ref), 1e-12)


def reference_fixed(ref: ReferenceSolver, inst: Instance) -> dict:
    tr = ref.solve(*inst.args(), fallback=False)
    stats = ref.problem().problem.solver_stats
    core = float(stats.solve_time) if stats is not None and stats.solve_time is not None else math.nan
    return {"status": tr.status, "objective": tr.objective, "iterations": tr.iterations,
            "wall_s": tr.solve_time_s, "core_s": core}


def measure_horizon(cfg: Config, builds: dict, solvers: dict, instances: list) -> dict:
    """Interleaved measurements at one horizon; returns raw per-instance records."""
    n = next(iter(builds.values())).horizon
    vehicle = load_vehicle(cfg.vehicle_path)
    ref = ReferenceSolver(vehicle, n)
    order = [b for b in BACKENDS if b in builds]
    raw = {b: [] for b in order}
    raw[REFERENCE] = []
    say(f"N={n}: calibrating repetitions")
    reps = {}
    for b in order:
        first = time_in_c(builds[b], instances[0], reps=5, warmup=1)
        t = first["median_s"] or 1e-3
        reps[b] = int(min(cfg.max_reps, max(cfg.min_reps, round(cfg.c_budget_s / t))))
    # The cost of crossing from Python into C, without the solver's noise: a
    # call refused at input validation (mass 0 kg), timed in C and through cffi.
    refused = Instance("refused", NOMINAL[0], NOMINAL[1], 0.0, cfg.time_of_flight_s)
    overhead = {}
    for b in order:
        c = time_in_c(builds[b], refused, reps=2000, warmup=50)
        calls = [solvers[b].solve(*refused.args()).solve_time_s for _ in range(2050)][50:]
        overhead[b] = {"c_median_s": c["median_s"], "cffi_median_s": statistics.median(calls),
                       "status_c": c["status"]}
    reference_fixed(ref, instances[0])    # warm-up: CVXPY's first solve compiles the problem
    rounds = max(1, cfg.rounds)
    for i, inst in enumerate(instances):
        runs = {b: [] for b in order}
        calls = {b: [] for b in order}
        walls = {b: [] for b in order}
        last = {}
        # Several short rounds per instance, the backend order rotating each
        # time, so that a burst of load on the shared machine hits all alike.
        for rnd in range(rounds):
            j = (i + rnd) % len(order)
            for b in order[j:] + order[:j]:
                runs[b].append(time_in_c(builds[b], inst, max(1, reps[b] // rounds), warmup=2))
                s = solvers[b]
                tr = s.solve(*inst.args())
                for _ in range(max(1, min(reps[b], cfg.cffi_reps_max) // rounds)):
                    t0 = time.perf_counter()
                    tr = s.solve(*inst.args())
                    walls[b].append(time.perf_counter() - t0)
                    calls[b].append(tr.solve_time_s)
                last[b] = tr
        for b in order:
            c = dict(runs[b][-1])
            c["median_s"] = statistics.median(x["median_s"] for x in runs[b])
            c["p99_s"] = max(x["p99_s"] for x in runs[b])
            c["worst_s"] = max(x["worst_s"] for x in runs[b])
            c["best_s"] = min(x["best_s"] for x in runs[b])
            c["heap_peak_bytes"] = max(x["heap_peak_bytes"] for x in runs[b])
            c["heap_allocations_per_call"] = max(x["heap_allocations_per_call"] for x in runs[b])
            c["heap_allocations_first_call"] = max(x["heap_allocations_first_call"]
                                                   for x in runs[b])
            c["repetitions"] = sum(x["repetitions"] for x in runs[b])
            raw[b].append({"instance": inst.name, "c": c,
                           "cffi_call_median_s": statistics.median(calls[b]),
                           "cffi_call_worst_s": max(calls[b]),
                           "py_solve_median_s": statistics.median(walls[b]),
                           "cffi_reps": len(calls[b]), "cffi_status": last[b].status,
                           "cffi_objective": last[b].objective})
        recs = [reference_fixed(ref, inst) for _ in range(cfg.reference_reps)]
        raw[REFERENCE].append({"instance": inst.name, "status": recs[-1]["status"],
                               "objective": recs[-1]["objective"],
                               "iterations": recs[-1]["iterations"],
                               "wall_median_s": statistics.median(r["wall_s"] for r in recs),
                               "wall_worst_s": max(r["wall_s"] for r in recs),
                               "wall_best_s": min(r["wall_s"] for r in recs),
                               "core_median_s": _median([r["core_s"] for r in recs])})
        say(f"N={n}: fixed time of flight, instance {i + 1}/{len(instances)} done")
    search = {b: [] for b in order}
    for i, inst in enumerate(instances):
        rot = order[i % len(order):] + order[:i % len(order)]
        for b in rot:
            search[b].append(time_in_c(builds[b], inst, cfg.search_reps, warmup=1, search=True))
    say(f"N={n}: time-of-flight search timed in C")
    ref_search = None
    if cfg.reference_search:
        tr = ref.solve(*instances[0].args(search=True), fallback=False)
        ref_search = {"status": tr.status, "objective": tr.objective, "wall_s": tr.solve_time_s,
                      "solves": tr.solves, "time_of_flight_s": tr.time_of_flight_s}
        say(f"N={n}: reference search {tr.solve_time_s:.2f} s ({tr.solves} solves)")
    return {"horizon": n, "reps": reps, "raw": raw, "search": search, "reference_search": ref_search,
            "overhead": overhead}


def summarise(cfg: Config, builds: dict, meas: dict) -> list:
    """Rows of the table at one horizon (generated backends, then the reference)."""
    n = meas["horizon"]
    raw = meas["raw"]
    ref_obj = {r["instance"]: r["objective"] for r in raw[REFERENCE]}
    rows = []
    for b in [x for x in BACKENDS if x in builds]:
        recs = raw[b]
        bd = builds[b]
        srch = meas["search"][b]
        errs = [rel_error(r["c"]["objective"], ref_obj[r["instance"]]) for r in recs]
        rows.append({
            "backend": b, "label": LABELS[b], "horizon": n, "instances": len(recs),
            "target_met": sum(r["c"]["status"] == TARGET_MET for r in recs),
            "optimal_cffi": sum(r["cffi_status"] == TARGET_MET for r in recs),
            "repetitions": meas["reps"][b],
            "median_s": _median([r["c"]["median_s"] for r in recs]),
            "worst_s": _max([r["c"]["worst_s"] for r in recs]),
            "p99_s": _max([r["c"]["p99_s"] for r in recs]),
            "best_s": _median([r["c"]["best_s"] for r in recs]),
            "cffi_call_median_s": _median([r["cffi_call_median_s"] for r in recs]),
            "py_solve_median_s": _median([r["py_solve_median_s"] for r in recs]),
            "call_overhead_s": (meas["overhead"][b]["cffi_median_s"]
                                - meas["overhead"][b]["c_median_s"]),
            "refused_call_c_s": meas["overhead"][b]["c_median_s"],
            "refused_call_cffi_s": meas["overhead"][b]["cffi_median_s"],
            "refused_status": meas["overhead"][b]["status_c"],
            "iterations_median": _median([r["c"]["iterations"] for r in recs]),
            "iterations_max": _max([r["c"]["iterations"] for r in recs]),
            "rel_objective_error_max": _max(errs),
            "cffi_matches_c": all(r["cffi_objective"] == r["c"]["objective"]
                                  or rel_error(r["cffi_objective"], r["c"]["objective"]) < 1e-12
                                  for r in recs),
            "search_median_s": _median([s["median_s"] for s in srch]),
            "search_worst_s": _max([s["worst_s"] for s in srch]),
            "search_solves_median": _median([s["solves"] for s in srch]),
            "search_optimal": sum(s["status"] == TARGET_MET for s in srch),
            "source_bytes_guidance": bd.source_bytes_guidance,
            "source_bytes_solver": bd.source_bytes_solver,
            "source_bytes": bd.source_bytes,
            "text_bytes": bd.text_bytes, "data_bytes": bd.data_bytes, "bss_bytes": bd.bss_bytes,
            "static_ram_bytes": bd.data_bytes + bd.bss_bytes,
            "heap_peak_bytes": _max([r["c"].get("heap_peak_bytes") for r in recs]),
            "heap_allocations_per_call": _max([r["c"].get("heap_allocations_per_call")
                                               for r in recs]),
            "heap_allocations_first_call": _max([r["c"].get("heap_allocations_first_call")
                                                 for r in recs]),
            "workspace_bytes": bd.sizeof.get("sizeof_workspace"),
            "workspace_bytes_stated": bd.sizeof.get("workspace_bytes_stated"),
            "plan_bytes": bd.sizeof.get("sizeof_plan"),
            "generation_s": bd.generation_s, "compile_s": bd.compile_s,
        })
    rr = raw[REFERENCE]
    rs = meas.get("reference_search") or {}
    rows.append({
        "backend": REFERENCE, "label": LABELS[REFERENCE], "horizon": n, "instances": len(rr),
        "target_met": sum(r["status"] == TARGET_MET for r in rr), "repetitions": cfg.reference_reps,
        "median_s": _median([r["wall_median_s"] for r in rr]),
        "worst_s": _max([r["wall_worst_s"] for r in rr]),
        "best_s": _median([r["wall_best_s"] for r in rr]),
        "core_median_s": _median([r["core_median_s"] for r in rr]),
        "iterations_median": _median([r["iterations"] for r in rr]),
        "iterations_max": _max([r["iterations"] for r in rr]),
        "rel_objective_error_max": 0.0,
        "search_median_s": rs.get("wall_s", math.nan), "search_worst_s": rs.get("wall_s", math.nan),
        "search_solves_median": rs.get("solves", math.nan),
    })
    native = next((r for r in rows if r["backend"] == "native"), None)
    for r in rows:
        r["ratio_to_native"] = (r["median_s"] / native["median_s"]) if native else math.nan
        r["best_ratio_to_native"] = ((r["best_s"] / native["best_s"])
                                     if native and r.get("best_s") else math.nan)
        r["search_ratio_to_native"] = ((r["search_median_s"] / native["search_median_s"])
                                       if native else math.nan)
    return rows


def fit_exponent(horizons, values) -> float:
    """Least-squares slope of log(value) against log(N): value ~ c N^slope."""
    pts = [(math.log(n), math.log(v)) for n, v in zip(horizons, values)
           if v is not None and math.isfinite(v) and v > 0]
    if len(pts) < 2:
        return math.nan
    x = np.array([p[0] for p in pts])
    y = np.array([p[1] for p in pts])
    slope, _ = np.polyfit(x, y, 1)
    return float(slope)


def growth(rows: list) -> dict:
    out = {}
    for b in BACKENDS + (REFERENCE,):
        rs = sorted((r for r in rows if r["backend"] == b), key=lambda r: r["horizon"])
        if not rs:
            continue
        ns = [r["horizon"] for r in rs]
        out[b] = {"horizons": ns,
                  "time_exponent": fit_exponent(ns, [r["median_s"] for r in rs]),
                  "source_exponent": (fit_exponent(ns, [r["source_bytes"] for r in rs])
                                      if b != REFERENCE else math.nan),
                  "instructions_exponent": fit_exponent(ns, [r.get("instructions") or math.nan
                                                             for r in rs])}
    return out


def callgrind_ir(b: Build, inst: Instance) -> int | None:
    """Instructions executed by one fixed-time-of-flight call, under valgrind's callgrind."""
    if shutil.which("valgrind") is None:
        return None
    with tempfile.TemporaryDirectory(prefix="cg-") as tmp:
        out = Path(tmp) / "callgrind.out"
        r = subprocess.run(["valgrind", "--tool=callgrind", f"--callgrind-out-file={out}",
                            f"--toggle-collect={b.prefix}_plan_descent", str(b.harness)],
                           input=inst.line(1, 0), capture_output=True, text=True, timeout=1800)
        if r.returncode != 0 or not out.exists():
            return None
        for line in out.read_text().splitlines():
            if line.startswith(("totals:", "summary:")):
                return int(line.split()[1])
    return None
