"""Benchmarks of every backend and horizon, side by side (issue 5).

pytest-benchmark times what Python can time itself: the generated solver's
call through cffi (codegen.bind's solve interface) at a fixed time of flight,
the full guidance call with the time-of-flight search, and the reference
solve. The in-C times (bench-only harness), sizes and the accuracy against the
reference come from the session's interleaved measurement of each horizon
(bench/benchlib.py) and are attached as extra_info and printed in the closing
table. The asserts check answers, never times.
"""

from __future__ import annotations

import pytest

from bench import benchlib
from bench.conftest import CONFIG
from codegen.reference import ReferenceSolver
from codegen.model.trajectory import TARGET_MET
from codegen.model.vehicle import load_vehicle

#: Relative objective error allowed against the reference (Clarabel at 1e-9):
#: all three solvers stop at relative gaps of about 1e-8 (their defaults; common
#: practice), so 1e-6 leaves two orders of margin.
OBJECTIVE_RTOL = 1e-6
#: With the search, both sides run the same grid and golden section
#: (codegen/model/tofsearch.py and its C mirror) but may stop at slightly different
#: times of flight within the search tolerance; the objective is flat there.
SEARCH_RTOL = 1e-3

CASES = [(n, b) for n in CONFIG.horizons for b in CONFIG.backends_at(n)]
IDS = [f"N{n}-{b}" for n, b in CASES]
KEEP = ("median_s", "worst_s", "p99_s", "ratio_to_native", "cffi_call_median_s",
        "iterations_median", "rel_objective_error_max", "text_bytes", "static_ram_bytes",
        "workspace_bytes", "source_bytes", "generation_s", "compile_s")


@pytest.mark.parametrize("horizon,backend", CASES, ids=IDS)
def test_fixed_time_of_flight(benchmark, bench_session, horizon, backend):
    row = bench_session.row(backend, horizon)      # builds and measures this horizon once
    solver = bench_session.solver(backend, horizon)
    nominal = bench_session.instances[0]
    benchmark.group = f"N={horizon:3d} fixed time of flight, Python solve() through cffi"
    benchmark.extra_info.update({f"c_{k}" if k.endswith("_s") else k: row[k] for k in KEEP})
    rounds = max(5, min(CONFIG.cffi_reps_max, row["repetitions"]))
    traj = benchmark.pedantic(solver.solve, args=nominal.args(), rounds=rounds, warmup_rounds=1,
                              iterations=1)
    assert traj.status == TARGET_MET
    assert row["target_met"] == row["instances"], row
    assert row["optimal_cffi"] == row["instances"], row
    # The C harness and the cffi call run the same archive: the same answer.
    assert row["cffi_matches_c"]
    assert row["rel_objective_error_max"] < OBJECTIVE_RTOL, row


@pytest.mark.parametrize("horizon,backend", CASES, ids=IDS)
def test_guidance_with_search(benchmark, bench_session, horizon, backend):
    row = bench_session.row(backend, horizon)
    solver = bench_session.solver(backend, horizon)
    nominal = bench_session.instances[0]
    benchmark.group = f"N={horizon:3d} guidance call with time-of-flight search, through cffi"
    benchmark.extra_info.update({"c_search_median_s": row["search_median_s"],
                                 "search_solves_median": row["search_solves_median"]})
    traj = benchmark.pedantic(solver.solve, args=nominal.args(search=True),
                              rounds=CONFIG.search_reps, warmup_rounds=0, iterations=1)
    assert traj.status == TARGET_MET
    assert row["search_optimal"] == row["instances"], row
    ref = bench_session.measurements[horizon]["reference_search"]
    if ref is not None and ref["status"] == TARGET_MET:
        assert benchlib.rel_error(traj.objective, ref["objective"]) < SEARCH_RTOL, (traj, ref)


@pytest.mark.parametrize("horizon", CONFIG.horizons, ids=[f"N{n}" for n in CONFIG.horizons])
def test_reference_fixed_time_of_flight(benchmark, bench_session, horizon):
    row = bench_session.row(benchlib.REFERENCE, horizon)
    ref = ReferenceSolver(load_vehicle(CONFIG.vehicle_path), horizon)
    nominal = bench_session.instances[0]
    benchmark.group = f"N={horizon:3d} reference (CVXPY + Clarabel), fixed time of flight"
    benchmark.extra_info.update({"median_s": row["median_s"], "core_median_s": row["core_median_s"],
                                 "search_s": row["search_median_s"]})
    traj = benchmark.pedantic(ref.solve, args=nominal.args(), kwargs={"fallback": False},
                              rounds=5, warmup_rounds=1, iterations=1)
    assert traj.status == TARGET_MET
    assert row["target_met"] == row["instances"]
