"""The reference successive convexification for booster landings
(codegen/model/scvx.py, issue 19). Small horizons keep it fast."""

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest

from codegen.model import scvx
from codegen.model.drag import DragModel
from codegen.booster import BoosterReference
from codegen.model.trajectory import ITERATIONS_EXHAUSTED, TARGET_MET, UNREACHABLE
from codegen.model.vehicle import Booster, FinalApproach, load_vehicle
from codegen.reference import ReferenceSolver
from conftest import DEMO_STATE

BOOSTER = Path(__file__).resolve().parent.parent / "examples" / "demo_booster.toml"
#: A nominal state of the demo booster: 3 km up, falling at 250 m/s, 30 t.
STATE = ([100.0, 0.0, 3000.0], [-10.0, 0.0, -250.0], 30000.0)
TOF_S = 20.0


@pytest.fixture(scope="module")
def booster():
    return load_vehicle(BOOSTER)


@pytest.fixture(scope="module")
def plan20(booster):
    return BoosterReference(booster, 20).solve_fixed(*STATE, TOF_S)


def without(vehicle, **changes):
    return dataclasses.replace(vehicle, booster=dataclasses.replace(vehicle.booster, **changes))


def reintegrate(vehicle, plan):
    """The plan's held accelerations flown with scipy's solve_ivp (DOP853,
    rtol 1e-12) under the full nonlinear drag (codegen/model/drag.py) and
    the mass flow m' = -alpha m |u_k| (the thrust T = m u_k of the plan)."""
    from scipy.integrate import solve_ivp
    drag = DragModel(vehicle.booster) if vehicle.booster and vehicle.booster.has_drag else None
    g = np.asarray(vehicle.gravity_vector)
    alpha = vehicle.mass_flow_per_n
    n = plan.horizon
    dt = plan.time_of_flight_s / n
    y = np.concatenate([plan.position_m[0], plan.velocity_mps[0], [plan.mass_kg[0]]])
    for k in range(n):
        u = plan.accel_mps2[k]
        un = float(np.linalg.norm(u))

        def f(t, y):
            a = np.zeros(3) if drag is None else drag.acceleration(
                np.array([y[2]]), y[None, 3:6], np.array([y[6]]))[0]
            return np.concatenate([y[3:6], u + g + a, [-alpha * y[6] * un]])
        y = solve_ivp(f, (0.0, dt), y, method="DOP853", rtol=1e-12, atol=1e-10).y[:, -1]
    return y


def test_zero_drag_gives_the_lossless_plan(demo_vehicle):
    # Issue 19: without drag the passes give the lossless-convexification
    # plan of codegen/reference.py (Acikmese & Ploen 2007): relative fuel
    # error below 1e-6, in one pass.
    ref = ReferenceSolver(demo_vehicle, 15)
    scv = BoosterReference(demo_vehicle, 15)
    for state in (DEMO_STATE, ([1200.0, 100.0, 1300.0], [-30.0, 5.0, -30.0], 1880.0)):
        r = ref.solve(*state)
        p = scv.solve_fixed(*state, r.time_of_flight_s)
        assert r.status == TARGET_MET and p.status == TARGET_MET
        assert p.passes == 1 and p.convergence == scvx.CONVERGED
        assert abs(p.fuel_kg / r.fuel_kg - 1.0) < 1e-6
        assert np.max(np.abs(p.position_m - r.position_m)) < 1e-2


def test_booster_with_zero_drag_area_equals_lossless(booster):
    d = dataclasses.replace(booster.booster.drag, reference_area_m2=0.0)
    v = dataclasses.replace(booster, booster=Booster(drag=d, atmosphere=booster.booster.atmosphere))
    r = ReferenceSolver(v, 12).solve_mode("target", *STATE, TOF_S)
    p = BoosterReference(v, 12).solve_fixed(*STATE, TOF_S)
    assert r.status == TARGET_MET and p.status == TARGET_MET and p.passes == 1
    assert abs(p.fuel_kg / r.fuel_kg - 1.0) < 1e-6


def test_converged_plan_reintegrated_with_scipy_lands(booster, plan20):
    # Checked against scipy's solve_ivp (an independent integrator): the
    # plan flown under the full nonlinear drag and mass flow ends within
    # 1 cm and 1 mm/s of the pad (the verdict's dynamics tolerances;
    # measured: 3e-4 m and 2e-5 m/s at N = 20, 2e-5 m and 9e-7 m/s at N = 50).
    p = plan20
    assert p.status == TARGET_MET and p.convergence == scvx.CONVERGED
    assert p.verdict["flyable"], p.verdict_text
    y = reintegrate(booster, p)
    assert np.linalg.norm(y[0:3] - p.target_m) < 1e-2
    assert np.linalg.norm(y[3:6] - p.velocity_target_mps) < 1e-3
    assert abs(y[6] - p.mass_kg[-1]) < 1e-3
    # The plan's own prediction (RK4) agrees with scipy's.
    assert np.linalg.norm(p.predicted_position_error_m) < 1e-2
    assert np.linalg.norm(p.predicted_velocity_error_mps) < 1e-3


def test_drag_lowers_the_fuel(booster, plan20):
    # Physical sanity check (issue 19): on a descending booster drag does
    # part of the braking, so less fuel is needed at the same time of flight.
    d = dataclasses.replace(booster.booster.drag, reference_area_m2=0.0)
    free = BoosterReference(without(booster, drag=d), 20).solve_fixed(*STATE, TOF_S)
    assert free.status == TARGET_MET
    assert plan20.fuel_kg < free.fuel_kg - 100.0


def test_pass_statuses(booster, plan20):
    ref = BoosterReference(booster, 12, pass_cap=2)
    capped = ref.solve_fixed(*STATE, TOF_S)
    assert capped.status == ITERATIONS_EXHAUSTED and capped.convergence == scvx.PASS_CAP_REACHED
    assert capped.passes == 2 and "not converged in 2 passes" in capped.message
    assert capped.defect_position_m > scvx.DEFECT_POSITION_MAX_M
    # 14 s is too short to get down from 3 km against the drag.
    short = BoosterReference(booster, 12).solve_fixed(*STATE, 14.0)
    assert short.status == UNREACHABLE and short.convergence == scvx.NO_PLAN
    assert plan20.passes <= scvx.PASS_CAP and len(plan20.fuel_by_pass_kg) == plan20.passes
    steps = np.abs(np.diff(plan20.fuel_by_pass_kg))
    assert steps[-1] <= scvx.FUEL_STEP_REL * plan20.fuel_kg


def test_virtual_control_weight_exceeds_the_multipliers(booster):
    # Measurement behind W_VIRTUAL: the exact-penalty condition (Mao et al.
    # 2018) asks the weight to exceed every multiplier of a dynamics row.
    ref = BoosterReference(booster, 20)
    p = ref.solve_fixed(*STATE, TOF_S)
    assert p.status == TARGET_MET
    duals = max(float(np.max(np.abs(c.dual_value))) for c in ref.dynamics_rows)
    assert duals < scvx.W_VIRTUAL / 10.0


def test_discretisation_is_the_linearised_flow(booster):
    # A_k, B_k, c_k reproduce the flow at the reference point, and A_k is
    # its derivative (central differences of the flow itself).
    ref = BoosterReference(booster, 10)
    p = ref.solve_fixed(*STATE, TOF_S)
    s = ref.scaling
    x = np.vstack([p.position_m.T / s.length_m, p.velocity_mps.T / s.speed_mps,
                   np.log(p.mass_kg / s.mass_kg)[None, :]])
    w = np.vstack([p.accel_mps2.T, p.accel_slack_mps2[None, :]]) / s.accel_mps2
    dt = p.time_of_flight_s / s.time_s / 10
    phi, sm, c, x_end = ref._linearise(ref.dynamics, x, w, dt)
    lin = np.einsum("nij,nj->ni", phi, x[:, :-1].T) + np.einsum("nij,nj->ni", sm, w.T) + c
    np.testing.assert_allclose(lin, x_end, atol=1e-12)
    h = 1e-6
    for j in (2, 3, 5, 6):
        e = np.zeros(7)
        e[j] = h
        hi = ref.dynamics.flow(x[:, :-1].T + e, w.T, dt, scvx.RK4_STEPS, False)[0]
        lo = ref.dynamics.flow(x[:, :-1].T - e, w.T, dt, scvx.RK4_STEPS, False)[0]
        np.testing.assert_allclose((hi - lo) / (2 * h), phi[:, :, j], atol=1e-6)


@pytest.mark.parametrize("table", [True, False])
def test_drag_jacobian_matches_finite_differences(booster, table):
    b = booster.booster
    if not table:
        b = dataclasses.replace(b, drag=dataclasses.replace(b.drag, mach=(),
                                                            drag_coefficient=(8.0,),
                                                            reference_area_m2=1.0))
    model = DragModel(b)
    up = np.array([3000.0, 1500.0, 200.0])
    vel = np.array([[-10.0, 2.0, -250.0], [5.0, -3.0, -330.0], [1.0, 0.0, -40.0]])
    mass = np.array([30000.0, 28000.0, 26000.0])
    a, da_dh, da_dv, da_dm = model.derivatives(up, vel, mass)
    h = 1e-3
    np.testing.assert_allclose((model.acceleration(up + h, vel, mass)
                                - model.acceleration(up - h, vel, mass)) / (2 * h),
                               da_dh, rtol=1e-5, atol=1e-10)
    for j in range(3):
        e = np.zeros(3)
        e[j] = h
        num = (model.acceleration(up, vel + e, mass) - model.acceleration(up, vel - e, mass)) / (2 * h)
        np.testing.assert_allclose(num, da_dv[:, :, j], rtol=1e-5, atol=1e-9)
    num = (model.acceleration(up, vel, mass + 1.0) - model.acceleration(up, vel, mass - 1.0)) / 2.0
    np.testing.assert_allclose(num, da_dm, rtol=1e-6)


def test_thrust_rate_limit_holds_between_intervals(booster):
    rate = 150000.0
    v = without(booster, thrust_rate_max_nps=rate)
    p = BoosterReference(v, 20).solve_fixed(*STATE, TOF_S)
    free = BoosterReference(without(booster, thrust_rate_max_nps=None), 20).solve_fixed(*STATE, TOF_S)
    assert p.status == TARGET_MET and free.status == TARGET_MET
    dt = TOF_S / 20
    thrust = np.linalg.norm(p.thrust_n, axis=1)
    assert np.max(np.abs(np.diff(thrust))) <= rate * dt * (1 + 1e-4)
    # It binds: without it the thrust steps further, and the fuel is lower.
    assert np.max(np.abs(np.diff(np.linalg.norm(free.thrust_n, axis=1)))) > 1.5 * rate * dt
    assert free.fuel_kg < p.fuel_kg


@pytest.mark.parametrize("approach", [FinalApproach(duration_s=4.0, cone_half_angle_deg=5.0),
                                      FinalApproach(duration_s=6.0, altitude_min_m=400.0)])
def test_final_approach(booster, approach):
    v = without(booster, final_approach=approach)
    p = BoosterReference(v, 20).solve_fixed(*STATE, TOF_S)
    assert p.status == TARGET_MET, p.message
    inside = p.t_s >= TOF_S - approach.duration_s - 1e-9
    rel = p.position_m - p.target_m
    if not math.isnan(approach.cone_half_angle_deg):
        tan_c = math.tan(math.radians(approach.cone_half_angle_deg))
        assert np.all(np.linalg.norm(rel[inside, :2], axis=1) <= tan_c * rel[inside, 2] + 1e-3)
    else:
        assert np.all(rel[~inside, 2] >= approach.altitude_min_m - 1e-3)


def test_moving_pad_touchdown_matches_the_pad(booster):
    pad0, pad_v = np.array([50.0, -20.0, 0.0]), np.array([3.0, 1.0, 0.0])
    p = BoosterReference(booster, 20).solve_fixed(*STATE, TOF_S, pad0, pad_v)
    assert p.status == TARGET_MET, p.message
    np.testing.assert_allclose(p.position_m[-1], pad0 + pad_v * TOF_S, atol=1e-6)
    np.testing.assert_allclose(p.velocity_mps[-1], pad_v, atol=1e-7)
    y = reintegrate(booster, p)      # scipy's solve_ivp, as above
    assert np.linalg.norm(y[0:3] - (pad0 + pad_v * TOF_S)) < 1e-2
    assert np.linalg.norm(y[3:6] - pad_v) < 1e-3


def test_searched_time_of_flight(booster):
    ref = BoosterReference(booster, 10)
    p = ref.solve(*STATE)
    assert p.status == TARGET_MET and p.convergence == scvx.CONVERGED
    # No probe of the search ranked better than the answer, within the
    # search's tolerance: the fixed-time plans either side cost more fuel.
    for dt in (-1.0, 1.0):
        q = ref.solve_fixed(*STATE, p.time_of_flight_s + dt)
        assert q.status != TARGET_MET or q.fuel_kg > p.fuel_kg - 1e-6 * p.fuel_kg
    assert p.solves > p.passes


def test_bad_input_is_refused_without_a_solve(booster):
    p = BoosterReference(booster, 10).solve_fixed(*STATE[:2], 100.0, TOF_S)
    assert p.status == "input_refused" and "mass_kg" in p.message
    p = BoosterReference(booster, 10).solve_fixed(*STATE, TOF_S, pad_velocity_mps=(1.0, math.nan, 0))
    assert p.status == "input_refused" and "velocity_target_mps[1]" in p.message


def test_final_approach_cone_binds(booster):
    # From 400 m off the pad the plan without a final approach comes in at
    # 23 degrees from the vertical in its last 6 s (measured); with a 5 degree
    # cone it keeps to 5 degrees, and pays a little fuel for it.
    state = ([400.0, 0.0, 3000.0], [-30.0, 0.0, -250.0], 30000.0)
    plans = []
    for ap in (None, FinalApproach(duration_s=6.0, cone_half_angle_deg=5.0)):
        p = BoosterReference(without(booster, final_approach=ap), 20).solve_fixed(*state, 22.0)
        assert p.status == TARGET_MET, p.message
        inside = (p.t_s >= 22.0 - 6.0 - 1e-9) & (p.t_s < 22.0 - 1e-9)
        rel = p.position_m[inside] - p.target_m
        plans.append((p, float(np.max(np.degrees(np.arctan2(
            np.linalg.norm(rel[:, :2], axis=1), rel[:, 2]))))))
    (free, free_angle), (coned, angle) = plans
    assert free_angle > 10.0
    assert angle <= 5.0 + 1e-4
    assert coned.fuel_kg > free.fuel_kg
