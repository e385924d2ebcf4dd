"""Smoke run of the benchmark suite (bench/), so that it cannot rot between
`make bench` runs: one small horizon, the native and ECOS backends, few
repetitions, every step of the real run (generate, compile with the tree's
Makefile, C harness, cffi on the same archive, reference, table, JSON, plot).
No timed assertions: only that the pieces fit and the answers agree.
"""

import json
import math
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from bench import benchlib  # noqa: E402

N_SMOKE = 8


@pytest.fixture(scope="module")
def smoke(tmp_path_factory):
    base = tmp_path_factory.mktemp("bench")
    cfg = benchlib.Config(horizons=(N_SMOKE,), backends=("native", "cvxpygen-ecos"), instances=3,
                          c_budget_s=0.02, min_reps=5, cffi_reps_max=5, search_reps=1,
                          reference_reps=1, callgrind=False, progress=False, out_dir=base / "results",
                          work_dir=base / "work")
    sess = benchlib.Session(cfg)
    results = sess.run_all()
    paths = benchlib.write_results(results, cfg.out_dir)
    return sess, results, paths


def test_rows_cover_backends_and_reference(smoke):
    _, results, _ = smoke
    rows = {r["backend"]: r for r in results["rows"]}
    assert set(rows) == {"native", "cvxpygen-ecos", "reference"}
    assert all(r["horizon"] == N_SMOKE for r in rows.values())
    assert rows["native"]["ratio_to_native"] == 1.0
    for b in ("native", "cvxpygen-ecos"):
        r = rows[b]
        assert r["target_met"] == r["instances"] == 3
        assert r["search_optimal"] == 3
        assert r["cffi_matches_c"]
        # Both solvers stop at relative gaps near 1e-8; the reference at 1e-9.
        assert r["rel_objective_error_max"] < 1e-6
        assert 0 < r["median_s"] <= r["p99_s"] <= r["worst_s"]
        assert r["iterations_median"] >= 1
        # The call-overhead probe must really be refused before any solve.
        assert r["refused_status"] == "input_refused" and math.isfinite(r["call_overhead_s"])
        assert r["search_solves_median"] > 1
        assert r["source_bytes"] == r["source_bytes_solver"] + r["source_bytes_guidance"]
        assert r["text_bytes"] > 0 and r["workspace_bytes"] > 0
    # The native solver keeps all its state in the caller's workspace: no
    # writable static data; cvxpygen's ECOS code keeps its state in globals.
    assert rows["native"]["static_ram_bytes"] == 0
    assert rows["cvxpygen-ecos"]["static_ram_bytes"] > 0
    # No heap at run time in the native solver (counted by the harness's
    # malloc wrappers); ECOS's set-up allocates on the first solve.
    assert rows["native"]["heap_peak_bytes"] == 0
    assert rows["native"]["heap_allocations_first_call"] == 0
    assert rows["native"]["heap_allocations_per_call"] == 0
    assert rows["cvxpygen-ecos"]["heap_peak_bytes"] > 0
    assert rows["cvxpygen-ecos"]["heap_allocations_first_call"] > 0
    assert rows["native"]["workspace_bytes"] > rows["cvxpygen-ecos"]["workspace_bytes"]


def test_instances_are_nominal_then_envelope_draws(smoke):
    sess, _, _ = smoke
    insts = sess.instances
    assert insts[0].name == "nominal" and len(insts) == 3
    env = sess.solver("native", N_SMOKE).vehicle.envelope
    for inst in insts[1:]:
        for x, lo, hi in zip(inst.position_m, env.position_min_m, env.position_max_m):
            assert lo <= x <= hi
        assert env.mass_min_kg <= inst.mass_kg <= env.mass_max_kg


def test_files_written(smoke):
    _, results, paths = smoke
    data = json.loads(paths["json"].read_text())
    assert len(data["rows"]) == 3 and data["config"]["horizons"] == [N_SMOKE]
    md = paths["md"].read_text()
    assert f"| {N_SMOKE} | native |" in md and f"| {N_SMOKE} | ECOS (cvxpygen) |" in md
    assert f"N={N_SMOKE}: native/ECOS (cvxpygen) = " in md
    assert paths["png"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_fit_exponent():
    ns = [10, 20, 50, 100]
    assert benchlib.fit_exponent(ns, [3e-6 * n ** 1.5 for n in ns]) == pytest.approx(1.5)
    assert benchlib.fit_exponent(ns, [7.0 * n for n in ns]) == pytest.approx(1.0)
    assert math.isnan(benchlib.fit_exponent([20], [1.0]))
    assert math.isnan(benchlib.fit_exponent([20, 50], [1.0, math.nan]))


def test_config_refuses_unknown_backend_and_caps_qoco():
    with pytest.raises(benchlib.InputError):
        benchlib.Config(backends=("native", "cvxpygen-osqp"))
    cfg = benchlib.Config(horizons=(20, 50, 100), qoco_max_horizon=20)
    assert "cvxpygen-qoco" in cfg.backends_at(20)
    assert "cvxpygen-qoco" not in cfg.backends_at(50)
    assert cfg.capped() == [50, 100]
