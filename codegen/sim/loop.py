"""One closed-loop run: guidance, tracking loop, terminal phase, touchdown."""

from __future__ import annotations

import math
from dataclasses import asdict

import numpy as np

from codegen.errors import InputError
from codegen.model.trajectory import BAD_INPUT
from codegen.sim.error_model import ErrorModel
from codegen.sim.plans import EVENT_EPS_S, _Descent, _Plan
from codegen.sim.settings import Settings, draw_run
from codegen.sim.truth import TruthModel


#: A run that has not touched the ground this long after the planned
#: touchdown time is stopped (status ``no_contact``).
FREE_FALL_MAX_S = 120.0


#: Anti-windup: the integral term of the tracking loop is clamped to this
#: acceleration per axis (m/s^2); it only has to cancel small persistent
#: errors (thrust magnitude, mass estimate, disturbance).
TRACKING_INTEGRAL_MAX_MPS2 = 0.5


#: Landed runs; other statuses say why a run has no touchdown.
LANDED = "landed"


NO_INITIAL_PLAN = "no_initial_plan"


NO_CONTACT = "no_contact"


RUN_STATUSES = (LANDED, NO_INITIAL_PLAN, NO_CONTACT)


def _r(x, nd=6):
    return None if x is None or not math.isfinite(x) else round(float(x), nd)


def fly(solver, errors: ErrorModel, settings: Settings, seed: int, index: int,
        keep_plans: bool = False) -> dict:
    """Fly run ``index`` of a batch with ``seed``; return its record (JSON-able).

    With ``keep_plans`` the record also holds the plans flown under
    ``"_plans"`` as (time taken effect, Trajectory) pairs (not JSON; tests).
    """
    vehicle = solver.vehicle
    rng = np.random.default_rng([int(seed), int(index)])
    draw = draw_run(errors, settings, vehicle, rng)
    model = TruthModel(vehicle, errors, draw)
    target = tuple(float(x) for x in settings.target_m)
    ground = target[2]
    # Guidance aims at rest above the target when a terminal descent follows.
    aim = (target[0], target[1], target[2] + settings.descent_altitude_m)
    h_max = settings.step_s
    period = 1.0 / settings.rate_hz if settings.rate_hz > 0.0 else math.inf
    m_lo = vehicle.mass_dry_kg + 1e-6 * (vehicle.mass_wet_kg - vehicle.mass_dry_kg)

    def estimate(y):
        n_r = rng.normal(0.0, 1.0, 3) * np.asarray(errors.position_noise_sigma_m)
        n_v = rng.normal(0.0, 1.0, 3) * np.asarray(errors.velocity_noise_sigma_mps)
        r = [y[i] + draw.position_bias_m[i] + float(n_r[i]) for i in range(3)]
        v = [y[3 + i] + draw.velocity_bias_mps[i] + float(n_v[i]) for i in range(3)]
        m = min(max(y[6] + draw.mass_bias_kg, m_lo), vehicle.mass_wet_kg)
        return r, v, m

    stats = {"solves": 0, "failures": 0, "worst_solve_time_s": 0.0, "worst_replan_time_s": 0.0,
             "failure_statuses": {}, "failure_time_to_go_s": []}

    def solve(y, tof):
        r, v, m = estimate(y)
        try:
            traj = solver.solve(r, v, m, tof, aim)
            status, ok = traj.status, traj.solved
        except InputError as exc:          # a binding that raises on bad input
            traj, status, ok = None, BAD_INPUT, False
            del exc
        stats["solves"] += 1
        if traj is not None:
            stats["worst_solve_time_s"] = max(stats["worst_solve_time_s"], traj.solve_time_s)
            if tof is not None:
                stats["worst_replan_time_s"] = max(stats["worst_replan_time_s"], traj.solve_time_s)
        if not ok:
            stats["failures"] += 1
            stats["failure_statuses"][status] = stats["failure_statuses"].get(status, 0) + 1
            if tof is not None:
                stats["failure_time_to_go_s"].append(round(float(tof), 4))
            return None
        return traj

    y = [*draw.position_m, *draw.velocity_mps, draw.mass_kg, 0.0]
    record = {
        "run": int(index), "seed": int(seed), "status": NO_INITIAL_PLAN,
        "start_position_m": [_r(x) for x in draw.position_m],
        "start_velocity_mps": [_r(x) for x in draw.velocity_mps],
        "start_mass_kg": _r(draw.mass_kg),
        "draw": {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(draw).items()},
    }
    first = solve(y, None)
    record["first_solve_time_s"] = stats["worst_solve_time_s"]
    if first is None:
        record.update(stats)
        return record
    t_end = float(first.time_of_flight_s)
    active = _Plan(first, 0.0)
    plans = [(0.0, first)]
    y[7] = model.commanded_magnitude(y[6], active.accel[0])
    pending = None                      # (plan, time it takes effect)
    k_tick = 1
    next_tick = period if settings.rate_hz > 0.0 else None
    wn = settings.tracking_bandwidth_rad_s
    # Position loop with integral action, poles placed at -wn (triple):
    # (s + wn)^3 = s^3 + 3 wn s^2 + 3 wn^2 s + wn^3.
    gain_v, gain_r, gain_i = 3.0 * wn, 3.0 * wn * wn, wn ** 3
    integ = [0.0, 0.0, 0.0]
    control_period = 1.0 / settings.control_rate_hz
    k_ctl = 1
    next_ctl = control_period if wn > 0.0 else None
    corr = (0.0, 0.0, 0.0)              # tracking correction held between control ticks
    g = vehicle.gravity_mps2
    t = 0.0
    engine_on = True
    descending = False
    guided_end = None
    terminal_from = None
    cutoff_alt = None
    hist_t, hist_r, hist_thr = [0.0], [[_r(x, 3) for x in y[:3]]], [_r(model.throttle(y, active.accel[0]), 5)]
    next_hist = settings.history_dt_s
    contact = False

    def command(t_mid):
        u = active.command(t_mid)
        return (u[0] + corr[0], u[1] + corr[1], u[2] + corr[2])

    while True:
        events = [t + h_max]
        if engine_on:
            events.append(active.next_boundary(t))
            if not descending:
                events.append(t_end)
            for e in (next_tick, next_ctl):
                if e is not None:
                    events.append(e)
            if pending is not None:
                events.append(pending[1])
        t_next = min(events)
        if t_next - t > EVENT_EPS_S * 1e-3:
            cmd = command(0.5 * (t + t_next)) if engine_on else None
            h = t_next - t
            y_new = model.step(y, h, cmd)
            if y_new[2] <= ground:
                lo, hi = 0.0, h              # altitude above at lo, at or below at hi
                for _ in range(60):
                    mid = 0.5 * (lo + hi)
                    if model.step(y, mid, cmd)[2] > ground:
                        lo = mid
                    else:
                        hi = mid
                    if hi - lo < 1e-13:
                        break
                y = model.step(y, hi, cmd)
                t += hi
                contact = True
                if engine_on:
                    cutoff_alt = 0.0
            else:
                y = y_new
                t = t_next
        else:
            t = t_next
        if t >= next_hist - EVENT_EPS_S or contact:
            hist_t.append(_r(t, 4))
            hist_r.append([_r(x, 3) for x in y[:3]])
            hist_thr.append(_r(model.throttle(y, command(t)) if engine_on and not contact else 0.0, 5))
            next_hist = (math.floor(t / settings.history_dt_s + 1e-9) + 1) * settings.history_dt_s
        if contact:
            break
        if engine_on and not descending and t >= t_end - EVENT_EPS_S:
            pending = None
            next_tick = None
            guided_end = [float(x) for x in y[:7]]
            if settings.descent_altitude_m > 0.0:
                descending = True
                active = _Descent(t, aim, settings.descent_speed_mps, g)
            else:
                engine_on = False
                cutoff_alt = y[2] - ground
                continue
        if t > t_end + FREE_FALL_MAX_S:
            break
        if not engine_on:
            continue
        if pending is not None and t >= pending[1] - EVENT_EPS_S:
            active = pending[0]
            pending = None
            corr = tuple(gain_i * x for x in integ)   # new plan: keep the bias estimate
        if next_ctl is not None and t >= next_ctl - EVENT_EPS_S:
            r_est, v_est, _ = estimate(y)
            r_ref, v_ref = active.reference(t, g)
            # In the terminal descent the vertical channel holds the speed only
            # (contact, not altitude, ends it); its integral term is frozen.
            axes = 2 if descending else 3
            for i in range(axes):
                integ[i] += (r_ref[i] - r_est[i]) * control_period
                lim = TRACKING_INTEGRAL_MAX_MPS2 / gain_i
                integ[i] = min(max(integ[i], -lim), lim)
            corr = tuple((gain_r * (r_ref[i] - r_est[i]) if i < axes else 0.0)
                         + gain_v * (v_ref[i] - v_est[i]) + gain_i * integ[i] for i in range(3))
            k_ctl += 1
            next_ctl = k_ctl * control_period
        if next_tick is not None and t >= next_tick - EVENT_EPS_S:
            t_go = t_end - t
            if t_go < settings.terminal_s:
                terminal_from = t
                next_tick = None
            else:
                traj = solve(y, t_go)
                if traj is not None:
                    plan = _Plan(traj, t)
                    if keep_plans:
                        plans.append((t + errors.latency_s, traj))
                    if errors.latency_s > 0.0:
                        pending = (plan, t + errors.latency_s)
                    else:
                        active = plan
                        corr = tuple(gain_i * x for x in integ)
                k_tick += 1
                next_tick = k_tick * period

    m_end = y[6]
    v_aim = settings.descent_speed_mps if settings.descent_altitude_m > 0.0 else 0.0
    record.update(stats)
    record.update({
        "status": LANDED if contact else NO_CONTACT,
        "planned_time_of_flight_s": _r(t_end),
        "planned_fuel_kg": _r(first.fuel_kg),
        "touchdown_time_s": _r(t),
        "touchdown_position_m": [_r(x) for x in y[:3]],
        "touchdown_velocity_mps": [_r(x, 9) for x in y[3:6]],
        "position_error_m": _r(math.hypot(y[0] - target[0], y[1] - target[1]), 9),
        "touchdown_velocity_aim_mps": [0.0, 0.0, -v_aim],
        "velocity_error_mps": _r(math.sqrt(y[3] ** 2 + y[4] ** 2 + (y[5] + v_aim) ** 2), 9),
        "vertical_speed_mps": _r(-y[5], 9),
        "horizontal_speed_mps": _r(math.hypot(y[3], y[4]), 9),
        "fuel_kg": _r(draw.mass_kg - m_end),
        "propellant_left_kg": _r(m_end - vehicle.mass_dry_kg),
        "propellant_exhausted": bool(m_end <= vehicle.mass_dry_kg),
        "cutoff_altitude_m": _r(cutoff_alt, 9),
        "guided_end_time_s": _r(t_end) if guided_end is not None else None,
        "guided_end_position_m": guided_end[:3] if guided_end is not None else None,
        "guided_end_velocity_mps": guided_end[3:6] if guided_end is not None else None,
        "guided_end_mass_kg": guided_end[6] if guided_end is not None else None,
        "terminal_from_s": _r(terminal_from),
        "history": {"t_s": hist_t, "position_m": hist_r, "throttle": hist_thr},
    })
    if keep_plans:
        record["_plans"] = plans
    return record
