"""The generated C's guidance call: the stated bounds hold, and a perturbed
re-plan near touchdown still gets a plan the vehicle can fly.

A native tree at N = 10 (small, so that the whole file runs in seconds).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from codegen.bind import load_solver
from codegen.emit import generate
from codegen.model.trajectory import BEST_REACHABLE, TARGET_MET, SOLVED
from codegen.reference import ReferenceSolver
from codegen.verify.check import draw_cases, judge
from conftest import DEMO_STATE

ROOT = Path(__file__).resolve().parent.parent
VEHICLE = ROOT / "examples" / "demo_vehicle.toml"
N = 10


@pytest.fixture(scope="module")
def tree(tmp_path_factory):
    out = tmp_path_factory.mktemp("gen") / "tree"
    generate(VEHICLE, N, out)
    return out


@pytest.fixture(scope="module")
def gen(tree):
    return load_solver(tree)


def test_the_per_solve_cap_and_the_call_bound_hold(gen, tree):
    # The cap is the cap, the adapter's retry included; a searched call
    # makes at most the header's worst-case number of solves.
    opts = json.loads((tree / "manifest.json").read_text())["options"]
    cap, solves_max = opts["iterations_per_solve_max_default"], opts["solves_per_call_max_search"]
    header = (tree / "include" / "pdg_guidance.h").read_text()
    assert f"#define PDG_MAX_SOLVES {solves_max}" in header
    cases = draw_cases(gen.vehicle, 30, 5, search_every=3)
    for c in cases:
        tr = gen.solve(c.position_m, c.velocity_mps, c.mass_kg, c.time_of_flight_s)
        assert tr.iterations_max <= cap, (c, tr.iterations_max)
        assert tr.solves <= solves_max
        assert tr.iterations_total <= cap * solves_max
    # A small cap and a call budget: neither is exceeded, and a call cut
    # short says so.
    gen.settings(iterations_per_solve_max=9, iterations_per_call_max=60)
    try:
        for c in cases[:12]:
            tr = gen.solve(c.position_m, c.velocity_mps, c.mass_kg, c.time_of_flight_s)
            assert tr.iterations_max <= 9
            assert tr.iterations_total <= 60, (c, tr.iterations_total)
    finally:
        gen.settings(iterations_per_solve_max=cap, iterations_per_call_max=0)


@pytest.mark.parametrize("to_go_s", [3.5, 7.0])
def test_a_perturbed_replan_near_touchdown_is_flyable(gen, demo_vehicle, to_go_s):
    # A plan flown to a few seconds before touchdown, then re-planned from a
    # state 0.5 m higher and 0.3 % lighter than the plan says (navigation and
    # mass-estimate errors of the size the closed loop sees): a fixed time to
    # go whose exact target the rocket equation may not allow. The call must
    # return a plan (target met, or the best reachable one with its predicted
    # error), and the plan must meet the real constraints when judged here.
    plan = ReferenceSolver(demo_vehicle, N).solve(*DEMO_STATE)
    assert plan.status == TARGET_MET
    dt = plan.time_of_flight_s / N
    k = N - int(round(to_go_s / dt))
    pos = np.array(plan.position_m[k]) + [0.0, 0.0, 0.5]
    vel = np.array(plan.velocity_mps[k])
    mass = float(plan.mass_kg[k]) * 0.997
    tof = plan.time_of_flight_s - k * dt
    tr = gen.solve(pos, vel, mass, tof)
    assert tr.status in SOLVED, (tr.status, tr.message)
    v = judge(demo_vehicle, tr)
    assert v is not None and v.flyable, v.violations
    if tr.status == BEST_REACHABLE:
        predicted = np.linalg.norm(np.array(tr.position_m[-1]) - np.array(tr.target_m))
        assert np.allclose(tr.terminal_position_error_m,
                           np.array(tr.position_m[-1]) - np.array(tr.target_m), atol=1e-9)
        assert predicted < 5.0
