"""The closed loop flying a real generated tree (C through cffi), as on board.

Horizon 10, two runs: enough to show the binding is flown through the same
loop, that the ideal loop still lands where its plan says, and that the
errors-on statistics repeat for a seed.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from codegen.emit import generate
from codegen.sim.error_model import ErrorModel, load_errors
from codegen.sim.batch import run_batch
from codegen.sim.loop import fly
from codegen.sim.settings import default_settings
from codegen.sim.tree import load_guidance_solver

ROOT = Path(__file__).resolve().parent.parent
VEHICLE = ROOT / "examples" / "demo_vehicle.toml"
DEMO_ERRORS = ROOT / "examples" / "demo_errors.toml"
EPS = np.finfo(float).eps


@pytest.fixture(scope="module")
def tree(tmp_path_factory):
    out = tmp_path_factory.mktemp("gen") / "tree"
    generate(VEHICLE, 10, out, backend="cvxpygen-ecos")
    return out


@pytest.fixture(scope="module")
def solver(tree):
    s = load_guidance_solver(tree)
    assert s.name != "reference (dry run)"
    return s


def test_generated_ideal_open_loop_lands_where_the_plan_says(solver):
    s = default_settings(solver.vehicle, rate_hz=0.0, tracking_bandwidth_rad_s=0.0)
    rec = fly(solver, ErrorModel(), s, seed=5, index=0, keep_plans=True)
    plan = rec["_plans"][0][1]
    assert rec["status"] == "landed" and plan.solved
    n = len(plan.thrust_n)
    dt = plan.time_of_flight_s / n
    u = np.asarray(plan.thrust_n) / np.asarray(plan.mass_kg)[:n, None]
    r, v = np.array(plan.position_m[0]), np.array(plan.velocity_mps[0])
    g = np.array([0.0, 0.0, -solver.vehicle.gravity_mps2])
    for k in range(n):                       # the plan's own controls, exact ZOH
        r, v = r + dt * v + 0.5 * dt * dt * (u[k] + g), v + dt * (u[k] + g)
    # Integration tolerance from the step (see test_simulate.py): no truncation
    # for piecewise-constant acceleration, 8 ulps of rounding per step over
    # twice duration / step steps.
    steps = 2.0 * plan.time_of_flight_s / s.step_s
    tol_r = steps * 8 * EPS * float(np.max(np.abs(plan.position_m)))
    tol_v = steps * 8 * EPS * float(np.max(np.abs(plan.velocity_mps)))
    assert np.max(np.abs(np.asarray(rec["guided_end_position_m"]) - r)) <= tol_r
    assert np.max(np.abs(np.asarray(rec["guided_end_velocity_mps"]) - v)) <= tol_v


def test_generated_closed_loop_with_errors_repeats_for_a_seed(tree, solver, tmp_path):
    errors = load_errors(DEMO_ERRORS)
    s = default_settings(solver.vehicle, rate_hz=0.5)
    a = run_batch(tree, 2, 21, errors, s, tmp_path / "a", solver=solver)
    b = run_batch(tree, 2, 21, errors, s, tmp_path / "b", solver=solver)
    assert a["landed"] == 2
    for key in ("position_error_m", "velocity_error_mps", "fuel_kg"):
        assert a[key] == b[key]
    assert a["solves"] == b["solves"] > 2
    assert a["worst_solve_time_s"] > 0.0
