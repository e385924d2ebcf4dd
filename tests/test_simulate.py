"""Closed-loop simulation: truth integrator, ideal loop, reproducibility, bad error files.

Small horizons (N = 10), few runs and a low guidance rate keep this file fast.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from codegen.errors import InputError
from codegen.sim.error_model import (ErrorModel, check_against_settings, load_errors, parse_errors)
from codegen.sim.batch import read_records, run_batch
from codegen.sim.loop import fly
from codegen.sim.settings import Draw, Settings, default_settings
from codegen.sim.tree import load_guidance_solver, write_dry_run_tree
from codegen.sim.truth import TruthModel, propagate
from codegen.model.vehicle import G0_MPS2, load_vehicle
from conftest import render_in_chromium

ROOT = Path(__file__).resolve().parent.parent
VEHICLE = ROOT / "examples" / "demo_vehicle.toml"
DEMO_ERRORS = ROOT / "examples" / "demo_errors.toml"
EPS = np.finfo(float).eps
HORIZON = 10


@pytest.fixture(scope="module")
def dry_tree(tmp_path_factory):
    return write_dry_run_tree(tmp_path_factory.mktemp("dry") / "tree", VEHICLE, HORIZON)


@pytest.fixture(scope="module")
def solver(dry_tree):
    return load_guidance_solver(dry_tree)


# ---------------------------------------------------------------------------
# Truth integrator against an independent reference library
# ---------------------------------------------------------------------------

def _independent_rhs(vehicle, draw, lag_s, cmd):
    """The truth equations written again, from the model statement, in numpy:
    T_cmd = |u| (m + mass bias) along u, first-order lag of the magnitude,
    scale and fixed rotation (Rodrigues), v' = T/m + g + d,
    m' = -|T| / (Isp g0 cos(cant)) with g0 = 9.80665 (exact, 3rd CGPM 1901)."""
    u = np.asarray(cmd, float)
    rot = np.array([draw.misalignment_rad[0], draw.misalignment_rad[1], 0.0])
    th = np.linalg.norm(rot)
    k = rot / th
    K = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
    R = np.eye(3) + math.sin(th) * K + (1 - math.cos(th)) * K @ K
    cant = math.cos(math.radians(vehicle.engine_cant_deg))
    g = np.array([0.0, 0.0, -vehicle.gravity_mps2]) + np.asarray(draw.disturbance_mps2)

    def f(t, y):
        m, lag = y[6], y[7]
        fc = np.linalg.norm(u) * (m + draw.mass_bias_kg)
        thrust = draw.thrust_scale * lag * (R @ (u / np.linalg.norm(u)))
        dv = thrust / m + g
        dm = -np.linalg.norm(thrust) / (vehicle.isp_s * G0_MPS2 * cant)
        return np.concatenate([y[3:6], dv, [dm, (fc - lag) / lag_s]])
    return f


def test_truth_rk4_matches_solve_ivp_and_is_fourth_order():
    """Reference: scipy.integrate.solve_ivp (DOP853, rtol 1e-12) on the same
    thrust profile, with the equations written independently above. The
    profile has a mass-estimate bias and a thrust lag, so the acceleration
    varies within each segment and RK4 has real truncation error to show."""
    vehicle = load_vehicle(VEHICLE)
    lag_s = 1.0
    errors = ErrorModel(throttle_lag_s=lag_s)
    draw = Draw(position_m=(0, 0, 0), velocity_mps=(0, 0, 0), mass_kg=1900.0,
                position_bias_m=(0, 0, 0), velocity_bias_mps=(0, 0, 0), mass_bias_kg=40.0,
                thrust_scale=1.03, misalignment_rad=(0.01, -0.02),
                disturbance_mps2=(0.05, -0.02, 0.01))
    model = TruthModel(vehicle, errors, draw)
    segments = [(4.0, (1.0, 0.5, 6.0)), (6.0, (-2.0, 0.0, 8.0)), (5.0, (0.5, -1.0, 3.0))]
    y0 = [1500.0, 0.0, 1500.0, -50.0, 0.0, -40.0, 1900.0, 1900.0 * 6.1]

    y = np.array(y0)
    for duration, cmd in segments:
        sol = solve_ivp(_independent_rhs(vehicle, draw, lag_s, cmd), (0.0, duration), y,
                        method="DOP853", rtol=1e-12, atol=1e-10)
        assert sol.success
        y = sol.y[:, -1]
    ref = y
    scale = np.maximum(np.abs(ref), 1.0)

    def err(h):
        return float(np.max(np.abs(np.asarray(propagate(model, y0, segments, h)[-1]) - ref) / scale))

    e_coarse, e_fine = err(0.4), err(0.2)
    # Fourth order: halving the step divides the error by 2^4 = 16.
    assert 12.0 < e_coarse / e_fine < 20.0, (e_coarse, e_fine)
    # At the default step the error is the Richardson estimate |y_h - y_2h| / 15
    # of a fourth-order method; allow twice that, plus the reference's own tolerance.
    h = 0.01
    y_h = np.asarray(propagate(model, y0, segments, h)[-1])
    y_2h = np.asarray(propagate(model, y0, segments, 2 * h)[-1])
    richardson = float(np.max(np.abs(y_h - y_2h) / scale)) / 15.0
    assert err(h) <= 2.0 * richardson + 1e-11


def test_mass_estimate_error_shows_as_acceleration_error():
    """The command is an acceleration turned into thrust with the mass estimate:
    a bias b gives an acceleration u (m + b) / m."""
    vehicle = load_vehicle(VEHICLE)
    for bias in (0.0, 25.0, -25.0):
        draw = Draw((0, 0, 0), (0, 0, 0), 1800.0, (0, 0, 0), (0, 0, 0), bias, 1.0, (0.0, 0.0),
                    (0.0, 0.0, 0.0))
        model = TruthModel(vehicle, ErrorModel(), draw)
        u = (0.3, -0.2, 6.0)
        d = model.derivative([0, 0, 100, 0, 0, 0, 1800.0, 0.0], u)
        for i in range(3):
            want = u[i] * (1800.0 + bias) / 1800.0 - (vehicle.gravity_mps2 if i == 2 else 0.0)
            assert d[3 + i] == pytest.approx(want, rel=1e-14, abs=1e-14)
        thrust = math.sqrt(sum(x * x for x in u)) * (1800.0 + bias)
        assert d[6] == pytest.approx(-thrust / (vehicle.isp_s * G0_MPS2), rel=1e-14)


# ---------------------------------------------------------------------------
# Ideal loop: lands where the plan says
# ---------------------------------------------------------------------------

def _zoh_end(traj, gravity):
    """Exact propagation of a plan's own accelerations (zero-order hold,
    exact for the double integrator) from its first node."""
    n = len(traj.thrust_n)
    dt = traj.time_of_flight_s / n
    u = np.asarray(traj.thrust_n) / np.asarray(traj.mass_kg)[:n, None]
    r = np.array(traj.position_m[0], float)
    v = np.array(traj.velocity_mps[0], float)
    g = np.array([0.0, 0.0, -gravity])
    for k in range(n):
        a = u[k] + g
        r = r + dt * v + 0.5 * dt * dt * a
        v = v + dt * a
    return r, v


def _integration_tolerance(duration_s, step_s, r_max, v_max):
    """Tolerance of the truth integration in the ideal loop, from the step size.

    With no errors the delivered acceleration is exactly the plan's u, constant
    between events, and every step ends on an event; r and v are then
    polynomials of degree <= 2 in t, which RK4 integrates with no truncation
    error. What remains is rounding: at most a few ulps of |r| (resp. |v|) per
    step over n = duration / step steps, and at most as many again for the
    steps that events split. We allow 8 ulps per step: tol = 2 n * 8 eps * scale.
    """
    n = 2.0 * duration_s / step_s
    return n * 8 * EPS * r_max, n * 8 * EPS * v_max


def test_ideal_open_loop_lands_where_the_plan_says(solver):
    s = default_settings(solver.vehicle, rate_hz=0.0, tracking_bandwidth_rad_s=0.0)
    rec = fly(solver, ErrorModel(), s, seed=3, index=0, keep_plans=True)
    plan = rec["_plans"][0][1]
    assert rec["status"] == "landed"
    tol_r, tol_v = _integration_tolerance(plan.time_of_flight_s, s.step_s,
                                          float(np.max(np.abs(plan.position_m))),
                                          float(np.max(np.abs(plan.velocity_mps))))
    r_zoh, v_zoh = _zoh_end(plan, solver.vehicle.gravity_mps2)
    r_end = np.asarray(rec["guided_end_position_m"])
    v_end = np.asarray(rec["guided_end_velocity_mps"])
    assert np.max(np.abs(r_end - r_zoh)) <= tol_r
    assert np.max(np.abs(v_end - v_zoh)) <= tol_v
    # ... which is the plan's own end node, up to the plan's own residual
    # (its nodes against its controls, measured here, not assumed).
    resid_r = float(np.max(np.abs(r_zoh - plan.position_m[-1])))
    resid_v = float(np.max(np.abs(v_zoh - plan.velocity_mps[-1])))
    assert np.max(np.abs(r_end - plan.position_m[-1])) <= tol_r + resid_r
    assert np.max(np.abs(v_end - plan.velocity_mps[-1])) <= tol_v + resid_v
    # Fuel: the plan's mass is exp(z) of the exact discrete law; RK4 on
    # m' = -alpha |u| m has local error (lambda h)^5 / 120 relative
    # (lambda = alpha |u| < 1e-2 /s here: nothing at h = 0.01 s) plus rounding.
    n = 2.0 * plan.time_of_flight_s / s.step_s
    lam = solver.vehicle.mass_flow_per_n * solver.vehicle.thrust_upper_n / solver.vehicle.mass_dry_kg
    tol_m = plan.mass_kg[0] * (n * 8 * EPS + plan.time_of_flight_s * lam ** 5 * s.step_s ** 4 / 120)
    assert abs(rec["guided_end_mass_kg"] - plan.mass_kg[-1]) <= tol_m + 1e-9 * plan.mass_kg[0]


def test_ideal_closed_loop_lands_where_its_plans_say(solver):
    """Re-planning at 1 Hz with no errors, then the terminal descent: the
    guided phase ends on the last plan's end node and the vehicle touches down
    on the target at the descent speed, to integration tolerance.

    The tracking loop is off here: it steers toward the plan's nodes, which
    agree with the plan's own controls only to the solver's tolerance (about
    1e-7 m for the reference), and that is not integration error."""
    s = default_settings(solver.vehicle, rate_hz=1.0, tracking_bandwidth_rad_s=0.0)
    rec = fly(solver, ErrorModel(), s, seed=3, index=0, keep_plans=True)
    assert rec["status"] == "landed"
    assert rec["failures"] == 0
    assert rec["solves"] > 20                      # it did re-plan
    last = rec["_plans"][-1][1]
    tol_r, tol_v = _integration_tolerance(rec["touchdown_time_s"], s.step_s, 2500.0, 120.0)
    r_zoh, v_zoh = _zoh_end(last, solver.vehicle.gravity_mps2)
    assert np.max(np.abs(np.asarray(rec["guided_end_position_m"]) - r_zoh)) <= tol_r
    assert np.max(np.abs(np.asarray(rec["guided_end_velocity_mps"]) - v_zoh)) <= tol_v
    # The plan aims at rest above the target (equality constraints of the
    # solve, met to the solver's tolerance: 1e-9 scaled, about 2e-6 m here).
    aim = np.array([0.0, 0.0, s.descent_altitude_m])
    assert np.max(np.abs(last.position_m[-1] - aim)) < 1e-5
    # Terminal descent from there: straight down, contact at the descent speed.
    resid = float(np.max(np.abs(r_zoh - aim)))
    assert rec["position_error_m"] <= tol_r + resid
    assert rec["velocity_error_mps"] <= tol_v + 1e-9
    assert rec["touchdown_velocity_mps"][2] == pytest.approx(-s.descent_speed_mps, abs=1e-8)


class _FailingReplans:
    """Wraps a solver: the first solve works, every re-plan reports failure."""

    def __init__(self, inner):
        self.inner = inner
        self.vehicle, self.horizon, self.name = inner.vehicle, inner.horizon, "failing-replans"

    def solve(self, position_m, velocity_mps, mass_kg, time_of_flight_s=None, target_m=(0, 0, 0),
              **options):
        traj = self.inner.solve(position_m, velocity_mps, mass_kg, time_of_flight_s, target_m,
                                **options)
        if time_of_flight_s is not None:
            traj.status = "solver_breakdown"
        return traj


def test_failed_replans_follow_the_last_good_plan(solver):
    s = default_settings(solver.vehicle, rate_hz=1.0)
    rec = fly(_FailingReplans(solver), ErrorModel(), s, seed=3, index=0, keep_plans=True)
    open_loop = fly(solver, ErrorModel(), dataclasses.replace(s, rate_hz=0.0), seed=3, index=0)
    assert rec["solves"] > 20
    assert rec["failures"] == rec["solves"] - 1
    assert rec["failure_statuses"] == {"solver_breakdown": rec["solves"] - 1}
    # Following the first plan throughout is the open-loop flight, exactly.
    assert rec["guided_end_position_m"] is not None
    assert rec["guided_end_position_m"] == open_loop["guided_end_position_m"]
    assert rec["touchdown_velocity_mps"] == open_loop["touchdown_velocity_mps"]


def test_terminal_phase_stops_replanning(solver):
    s = default_settings(solver.vehicle, rate_hz=1.0, terminal_s=10.0)
    rec = fly(solver, ErrorModel(), s, seed=3, index=0)
    t_end = rec["planned_time_of_flight_s"]
    assert t_end - 10.0 <= rec["terminal_from_s"] < t_end - 10.0 + 1.0
    # one search plus one re-plan per second until the terminal phase
    assert rec["solves"] == 1 + math.floor(rec["terminal_from_s"]) - 1


@pytest.mark.parametrize("errors", [
    ErrorModel(magnitude_error_sigma=0.02),
    ErrorModel(throttle_lag_s=0.2, throttle_rate_max_per_s=0.3),
    ErrorModel(accel_mps2=(0.05, -0.05, 0.02)),
], ids=["thrust-magnitude", "lag-and-slew", "disturbance"])
def test_tracking_loop_absorbs_engine_and_disturbance_errors(solver, errors):
    """With perfect navigation, errors the guidance cannot see in its plan
    (engine, disturbance) must be absorbed by the loop. The bounds, 0.5 m and
    0.2 m/s, are requirements chosen here for the invented demo lander, not
    published figures. Without the tracking loop the same run lands worse:
    re-plans fail on the final full-thrust arc and the stale plan is flown
    blind."""
    s = default_settings(solver.vehicle, rate_hz=0.5)
    rec = fly(solver, errors, s, seed=4, index=0)
    assert rec["status"] == "landed"
    assert rec["position_error_m"] < 0.5
    assert rec["velocity_error_mps"] < 0.2
    blind = fly(solver, errors, dataclasses.replace(s, tracking_bandwidth_rad_s=0.0), seed=4, index=0)
    assert blind["velocity_error_mps"] > rec["velocity_error_mps"]
    assert blind["position_error_m"] > rec["position_error_m"]


# ---------------------------------------------------------------------------
# Errors on: reproducible statistics, resumption
# ---------------------------------------------------------------------------

LANDING_KEYS = ("position_error_m", "velocity_error_mps", "fuel_kg", "vertical_speed_mps",
                "horizontal_speed_mps")


def _landing_stats(summary):
    return {k: summary[k] for k in LANDING_KEYS} | {"solve_failures": summary["solve_failures"],
                                                     "landed": summary["landed"]}


@pytest.fixture(scope="module")
def demo_batch(dry_tree, tmp_path_factory, solver):
    errors = load_errors(DEMO_ERRORS)
    s = default_settings(solver.vehicle, rate_hz=0.5)
    out = tmp_path_factory.mktemp("batch") / "a"
    summary = run_batch(dry_tree, 3, 11, errors, s, out, solver=solver)
    return errors, s, out, summary


def test_errors_on_statistics_reproducible_for_a_seed(demo_batch, dry_tree, tmp_path, solver):
    errors, s, out_a, summary_a = demo_batch
    summary_b = run_batch(dry_tree, 3, 11, errors, s, tmp_path / "b", solver=solver)
    assert _landing_stats(summary_a) == _landing_stats(summary_b)
    # The errors do act, and the seed matters.
    assert summary_a["position_error_m"]["mean"] > 1e-3
    summary_c = run_batch(dry_tree, 3, 12, errors, s, tmp_path / "c", solver=solver)
    assert _landing_stats(summary_c) != _landing_stats(summary_a)


def test_interrupted_batch_resumes_without_repeating_a_run(demo_batch, dry_tree, tmp_path, solver):
    errors, s, out_a, summary_a = demo_batch
    out = tmp_path / "resumed"
    run_batch(dry_tree, 1, 11, errors, s, out, solver=solver)
    # An interruption mid-write leaves a torn last line.
    with open(out / "runs.jsonl", "ab") as fh:
        fh.write(b'{"run": 1, "seed": 11, "stat')
    flown = []
    summary = run_batch(dry_tree, 3, 11, errors, s, out, solver=solver,
                        progress=lambda kind, info: flown.append(info["run"]) if kind == "run" else None)
    assert flown == [1, 2]
    lines = (out / "runs.jsonl").read_bytes().splitlines()
    assert sorted(json.loads(x)["run"] for x in lines) == [0, 1, 2]
    assert _landing_stats(summary) == _landing_stats(summary_a)
    # The same command again flies nothing.
    flown.clear()
    run_batch(dry_tree, 3, 11, errors, s, out, solver=solver,
              progress=lambda kind, info: flown.append(info["run"]) if kind == "run" else None)
    assert flown == []
    assert len(read_records(out / "runs.jsonl")) == 3


def test_resume_refuses_other_settings(demo_batch, dry_tree, solver):
    errors, s, out_a, _ = demo_batch
    with pytest.raises(InputError, match="seed"):
        run_batch(dry_tree, 3, 99, errors, s, out_a, solver=solver)
    with pytest.raises(InputError, match="settings"):
        run_batch(dry_tree, 3, 11, errors, dataclasses.replace(s, rate_hz=1.0), out_a, solver=solver)


def test_report_is_self_contained(demo_batch, tmp_path):
    _, _, out, summary = demo_batch
    html = (out / "report.html").read_text()
    assert html.count('src="data:image/png;base64,') == 4
    assert "http://" not in html and "https://" not in html
    page = render_in_chromium(out / "report.html", tmp_path)
    assert page["rendered"] and page["images"] == page["images_ok"] == 4
    for anchor in ("statistics", "figures", "runs", "model"):
        assert f'id="{anchor}"' in page["dom"]
    assert page["errors"] == []
    assert json.loads((out / "summary.json").read_text())["runs"] == 3 == summary["runs"]


# ---------------------------------------------------------------------------
# Bad error files are refused with a clear message
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("text, field, words", [
    ("[navigation]\nposition_bias_sigma_m = [1.0, -0.5, 0.2]\n",
     "navigation.position_bias_sigma_m[1]", ">= 0"),
    ("[navigation]\nposition_bias_sigma_m = [1.0, 0.5]\n",
     "navigation.position_bias_sigma_m", "three numbers"),
    ("[navigation]\nmass_bias_sigma_kg = nan\n", "navigation.mass_bias_sigma_kg", "finite"),
    ("[navigation]\nmass_bias_sigma_kg = \"5\"\n", "navigation.mass_bias_sigma_kg", "number"),
    ("[thrust]\nmagnitude_eror_sigma = 0.01\n", "thrust.magnitude_eror_sigma",
     "did you mean 'magnitude_error_sigma'"),
    ("[thrust]\nmagnitude_error_sigma = 0.5\n", "thrust.magnitude_error_sigma", "<= 0.1"),
    ("[thrust]\nthrottle_rate_max_per_s = 0.5\n", "thrust.throttle_rate_max_per_s",
     "throttle_lag_s > 0"),
    ("[thrust]\nthrottle_lag_s = 0.1\nthrottle_rate_max_per_s = 0.0\n",
     "thrust.throttle_rate_max_per_s", "> 0"),
    ("[thrust]\nclamp_to_throttle_range = 1\n", "thrust.clamp_to_throttle_range", "true or false"),
    ("[guidance]\nlatency_s = -0.01\n", "guidance.latency_s", ">= 0"),
    ("[navigaton]\n", "navigaton", "did you mean 'navigation'"),
    ("[guidance\n", "error file", "not valid TOML"),
])
def test_bad_errors_file_refused(tmp_path, text, field, words):
    p = tmp_path / "errors.toml"
    p.write_text(text)
    with pytest.raises(InputError) as exc:
        load_errors(p)
    msg = str(exc.value)
    assert msg.startswith(field) and words in msg, msg


def test_errors_refused_against_settings():
    with pytest.raises(InputError, match=r"thrust.throttle_lag_s = 0.02: .*4 truth steps"):
        check_against_settings(parse_errors({"thrust": {"throttle_lag_s": 0.02}}), 0.01, 1.0)
    with pytest.raises(InputError, match=r"guidance.latency_s = 1.0: .*guidance period"):
        check_against_settings(parse_errors({"guidance": {"latency_s": 1.0}}), 0.01, 1.0)


def test_demo_errors_file_is_valid_and_invented():
    e = load_errors(DEMO_ERRORS)
    assert e.throttle_lag_s > 0 and e.latency_s > 0 and e.clamp_to_throttle_range
    assert "INVENTED" in DEMO_ERRORS.read_text()


def test_cli_refuses_bad_errors_file(dry_tree, tmp_path, capsys):
    from codegen.cli import main
    bad = tmp_path / "bad.toml"
    bad.write_text("[thrust]\nmisalignment_sigma_deg = -1.0\n")
    rc = main(["simulate", str(dry_tree), "--runs", "1", "--errors", str(bad),
               "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert rc == 2
    assert "thrust.misalignment_sigma_deg = -1.0" in err and ">= 0" in err
    assert not (tmp_path / "out" / "runs.jsonl").exists()


def test_settings_refused():
    v = load_vehicle(VEHICLE)
    with pytest.raises(InputError, match="--step"):
        Settings(rate_hz=10.0, step_s=0.05).check(v)
    with pytest.raises(InputError, match="--state mass"):
        default_settings(v, mass_kg=v.mass_wet_kg + 1.0).check(v)


def test_workers_fly_the_same_runs(demo_batch, dry_tree, tmp_path):
    # Issue 18, item 18: --workers, as pdgc envelope has; run i depends on
    # (seed, i) alone, so the records are those of one worker but for the
    # measured times.
    errors, s, out_a, summary_a = demo_batch
    summary = run_batch(dry_tree, 3, 11, errors, s, tmp_path / "w", workers=2)
    assert _landing_stats(summary) == _landing_stats(summary_a)

    def unmeasured(path):
        recs = read_records(path / "runs.jsonl")

        def strip(x):
            if isinstance(x, dict):
                return {k: strip(v) for k, v in x.items() if "time_s" not in k}
            if isinstance(x, list):
                return [strip(v) for v in x]
            return x
        return {k: strip(v) for k, v in recs.items()}

    assert unmeasured(tmp_path / "w") == unmeasured(out_a)
    with pytest.raises(InputError, match="--workers"):
        run_batch(dry_tree, 3, 11, errors, s, tmp_path / "w0", workers=0)
