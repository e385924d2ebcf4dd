"""One closed-loop run: guidance, tracking loop, terminal phase, touchdown."""

from __future__ import annotations

import math
from dataclasses import asdict

import numpy as np

from codegen.errors import InputError
from codegen.model.trajectory import INPUT_REFUSED, BEST_REACHABLE
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
#: How a run ended. With ground contact: ``landed`` (within every touchdown
#: requirement: miss, vertical and horizontal speed), ``out_of_limits``
#: (outside one, below the crash speed) or ``crashed`` (faster than the crash
#: speed). Without: no plan to start with, or no contact in time.
LANDED = "landed"
OUT_OF_LIMITS = "out_of_limits"
CRASHED = "crashed"
NO_INITIAL_PLAN = "no_initial_plan"
NO_CONTACT = "no_contact"
RUN_STATUSES = (LANDED, OUT_OF_LIMITS, CRASHED, NO_INITIAL_PLAN, NO_CONTACT)
TOUCHED_DOWN = (LANDED, OUT_OF_LIMITS, CRASHED)


def _r(x, nd=6):
    return None if x is None or not math.isfinite(x) else round(float(x), nd)


def fly(solver, errors: ErrorModel, settings: Settings, seed: int, index: int,
        keep_plans: bool = False) -> dict:
    """Fly run ``index`` of a batch with ``seed``; return its record (JSON-able).

    With ``keep_plans`` the record also holds the plans flown under
    ``"_plans"`` as (time taken effect, Trajectory) pairs (not JSON; tests).
    """
    run = _Run(solver, errors, settings, seed, index)
    first = run.solve(run.y, None)
    run.record["first_solve_time_s"] = run.stats["worst_solve_time_s"]
    if first is None:
        run.record.update(run.stats)
        return run.record
    flight = _Flight(run, first, keep_plans)
    flight.fly()
    return flight.finish()


class _Run:
    """What one run draws and measures: the truth model, the navigation
    estimates (one draw of noise per sample, in time order) and the solves."""

    def __init__(self, solver, errors: ErrorModel, settings: Settings, seed: int, index: int):
        vehicle = solver.vehicle
        self.solver, self.errors, self.settings, self.vehicle = solver, errors, settings, vehicle
        self.rng = np.random.default_rng([int(seed), int(index)])
        self.draw = draw = draw_run(errors, settings, vehicle, self.rng)
        self.model = TruthModel(vehicle, errors, draw)
        self.target = target = tuple(float(x) for x in settings.target_m)
        # Guidance aims at rest above the target when a terminal descent follows.
        self.aim = (target[0], target[1], target[2] + settings.descent_altitude_m)
        self.m_lo = vehicle.mass_dry_kg + 1e-6 * (vehicle.mass_wet_kg - vehicle.mass_dry_kg)
        self.stats = {"solves": 0, "failures": 0, "worst_solve_time_s": 0.0,
                      "worst_replan_time_s": 0.0, "failure_statuses": {},
                      "failure_time_to_go_s": [], "best_reachable_plans": 0,
                      "reserve_plans": 0, "throttle_limit_max": None,
                      "worst_call_iterations": 0}
        self.y = [*draw.position_m, *draw.velocity_mps, draw.mass_kg, 0.0]
        self.record = {
            "run": int(index), "seed": int(seed), "status": NO_INITIAL_PLAN,
            "start_position_m": [_r(x) for x in draw.position_m],
            "start_velocity_mps": [_r(x) for x in draw.velocity_mps],
            "start_mass_kg": _r(draw.mass_kg),
            "draw": {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(draw).items()},
        }

    def estimate(self, y):
        """Navigation: truth + per-run bias + white noise (position, velocity); mass + bias."""
        errors, draw = self.errors, self.draw
        n_r = self.rng.normal(0.0, 1.0, 3) * np.asarray(errors.position_noise_sigma_m)
        n_v = self.rng.normal(0.0, 1.0, 3) * np.asarray(errors.velocity_noise_sigma_mps)
        r = [y[i] + draw.position_bias_m[i] + float(n_r[i]) for i in range(3)]
        v = [y[3 + i] + draw.velocity_bias_mps[i] + float(n_v[i]) for i in range(3)]
        m = min(max(y[6] + draw.mass_bias_kg, self.m_lo), self.vehicle.mass_wet_kg)
        return r, v, m

    def solve(self, y, tof):
        """A plan from the estimate of ``y`` (None when the solve fails)."""
        stats = self.stats
        r, v, m = self.estimate(y)
        s = self.settings
        reserve = {}
        if tof is not None and s.reserve_throttle > self.vehicle.throttle_max:
            # A re-plan may use the engine's reserve (settings.RESERVE_THROTTLE).
            reserve = {"reserve_throttle_max": s.reserve_throttle,
                       "reserve_steps": s.reserve_steps}
        try:
            traj = self.solver.solve(r, v, m, tof, self.aim, **reserve)
            status, ok = traj.status, traj.solved
        except InputError:                 # a binding that raises on bad input
            traj, status, ok = None, INPUT_REFUSED, False
        stats["solves"] += 1
        if traj is not None:
            stats["worst_call_iterations"] = max(stats["worst_call_iterations"],
                                                 int(traj.iterations_total))
            stats["worst_solve_time_s"] = max(stats["worst_solve_time_s"], traj.solve_time_s)
            if tof is not None:
                stats["worst_replan_time_s"] = max(stats["worst_replan_time_s"], traj.solve_time_s)
        if not ok:
            stats["failures"] += 1
            stats["failure_statuses"][status] = stats["failure_statuses"].get(status, 0) + 1
            if tof is not None:
                stats["failure_time_to_go_s"].append(round(float(tof), 4))
            return None
        if traj.status == BEST_REACHABLE:
            stats["best_reachable_plans"] += 1
        limit = traj.throttle_limit
        if math.isfinite(limit):
            if limit > self.vehicle.throttle_max:
                stats["reserve_plans"] += 1
            prev = stats["throttle_limit_max"]
            stats["throttle_limit_max"] = limit if prev is None else max(prev, limit)
        return traj


class _Flight:
    """The loop of one run after its first plan: events, RK4 steps, guidance
    and control ticks, the terminal phase, touchdown."""

    def __init__(self, run: _Run, first, keep_plans: bool):
        settings = run.settings
        self.run, self.first, self.keep_plans = run, first, keep_plans
        self.model, self.y, self.settings = run.model, run.y, settings
        self.ground = run.target[2]
        self.g = run.vehicle.gravity_mps2
        self.t_end = float(first.time_of_flight_s)
        self.active = _Plan(first, 0.0)
        self.plans = [(0.0, first)]
        self.y[7] = self.model.commanded_magnitude(self.y[6], self.active.accel[0])
        self.pending = None                 # (plan, time it takes effect)
        self.period = 1.0 / settings.rate_hz if settings.rate_hz > 0.0 else math.inf
        self.k_tick = 1
        self.next_tick = self.period if settings.rate_hz > 0.0 else None
        wn = settings.tracking_bandwidth_rad_s
        # Position loop with integral action, poles placed at -wn (triple):
        # (s + wn)^3 = s^3 + 3 wn s^2 + 3 wn^2 s + wn^3.
        self.gain_v, self.gain_r, self.gain_i = 3.0 * wn, 3.0 * wn * wn, wn ** 3
        self.integ = [0.0, 0.0, 0.0]
        self.control_period = 1.0 / settings.control_rate_hz
        self.k_ctl = 1
        self.next_ctl = self.control_period if wn > 0.0 else None
        self.corr = (0.0, 0.0, 0.0)         # tracking correction held between control ticks
        self.t = 0.0
        self.engine_on = True
        self.descending = False
        self.guided_end = None
        self.terminal_from = None
        self.cutoff_alt = None
        self.contact = False
        y = self.y
        self.hist_t = [0.0]
        self.hist_r = [[_r(x, 3) for x in y[:3]]]
        self.hist_thr = [_r(self.model.throttle(y, self.active.accel[0]), 5)]
        self.next_hist = settings.history_dt_s

    def command(self, t_mid):
        u = self.active.command(t_mid)
        c = self.corr
        return (u[0] + c[0], u[1] + c[1], u[2] + c[2])

    def fly(self) -> None:
        while True:
            self.advance()
            self.sample_history()
            if self.contact:
                break
            if self.engine_on and not self.descending and self.t >= self.t_end - EVENT_EPS_S:
                if not self.end_guided_phase():
                    continue
            if self.t > self.t_end + FREE_FALL_MAX_S:
                break
            if not self.engine_on:
                continue
            if self.pending is not None and self.t >= self.pending[1] - EVENT_EPS_S:
                self.active = self.pending[0]
                self.pending = None
                self.corr = tuple(self.gain_i * x for x in self.integ)   # keep the bias estimate
            if self.next_ctl is not None and self.t >= self.next_ctl - EVENT_EPS_S:
                self.control_tick()
            if self.next_tick is not None and self.t >= self.next_tick - EVENT_EPS_S:
                self.guidance_tick()

    def next_event(self) -> float:
        t = self.t
        events = [t + self.settings.step_s]
        if self.engine_on:
            events.append(self.active.next_boundary(t))
            if not self.descending:
                events.append(self.t_end)
            for e in (self.next_tick, self.next_ctl):
                if e is not None:
                    events.append(e)
            if self.pending is not None:
                events.append(self.pending[1])
        return min(events)

    def advance(self) -> None:
        """One RK4 step to the next event, or to ground contact within it."""
        t_next = self.next_event()
        if not t_next - self.t > EVENT_EPS_S * 1e-3:
            self.t = t_next
            return
        model, y = self.model, self.y
        cmd = self.command(0.5 * (self.t + t_next)) if self.engine_on else None
        h = t_next - self.t
        y_new = model.step(y, h, cmd)
        if y_new[2] > self.ground:
            self.y[:] = y_new
            self.t = t_next
            return
        lo, hi = 0.0, h              # altitude above at lo, at or below at hi
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            if model.step(y, mid, cmd)[2] > self.ground:
                lo = mid
            else:
                hi = mid
            if hi - lo < 1e-13:
                break
        self.y[:] = model.step(y, hi, cmd)
        self.t += hi
        self.contact = True
        if self.engine_on:
            self.cutoff_alt = 0.0

    def sample_history(self) -> None:
        t, y, dt = self.t, self.y, self.settings.history_dt_s
        if t >= self.next_hist - EVENT_EPS_S or self.contact:
            self.hist_t.append(_r(t, 4))
            self.hist_r.append([_r(x, 3) for x in y[:3]])
            on = self.engine_on and not self.contact
            self.hist_thr.append(_r(self.model.throttle(y, self.command(t)) if on else 0.0, 5))
            self.next_hist = (math.floor(t / dt + 1e-9) + 1) * dt

    def end_guided_phase(self) -> bool:
        """At the planned touchdown time: start the terminal descent, or cut the
        engine. False when the engine was cut (the loop starts over)."""
        self.pending = None
        self.next_tick = None
        self.guided_end = [float(x) for x in self.y[:7]]
        if self.settings.descent_altitude_m > 0.0:
            self.descending = True
            self.active = _Descent(self.t, self.run.aim, self.settings.descent_speed_mps, self.g)
            return True
        self.engine_on = False
        self.cutoff_alt = self.y[2] - self.ground
        return False

    def control_tick(self) -> None:
        """The tracking loop: a correction onto the plan from a navigation sample."""
        r_est, v_est, _ = self.run.estimate(self.y)
        r_ref, v_ref = self.active.reference(self.t, self.g)
        gain_r, gain_v, gain_i, integ = self.gain_r, self.gain_v, self.gain_i, self.integ
        # In the terminal descent the vertical channel holds the speed only
        # (contact, not altitude, ends it); its integral term is frozen.
        axes = 2 if self.descending else 3
        for i in range(axes):
            integ[i] += (r_ref[i] - r_est[i]) * self.control_period
            lim = TRACKING_INTEGRAL_MAX_MPS2 / gain_i
            integ[i] = min(max(integ[i], -lim), lim)
        self.corr = tuple((gain_r * (r_ref[i] - r_est[i]) if i < axes else 0.0)
                          + gain_v * (v_ref[i] - v_est[i]) + gain_i * integ[i] for i in range(3))
        self.k_ctl += 1
        self.next_ctl = self.k_ctl * self.control_period

    def guidance_tick(self) -> None:
        """A re-plan with the time to go, or the start of the terminal phase."""
        t = self.t
        t_go = self.t_end - t
        if t_go < self.settings.terminal_s:
            self.terminal_from = t
            self.next_tick = None
            return
        traj = self.run.solve(self.y, t_go)
        if traj is not None:
            plan = _Plan(traj, t)
            latency = self.run.errors.latency_s
            if self.keep_plans:
                self.plans.append((t + latency, traj))
            if latency > 0.0:
                self.pending = (plan, t + latency)
            else:
                self.active = plan
                self.corr = tuple(self.gain_i * x for x in self.integ)
        self.k_tick += 1
        self.next_tick = self.k_tick * self.period

    def finish(self) -> dict:
        """The run's record."""
        y, s, vehicle, target = self.y, self.settings, self.run.vehicle, self.run.target
        m_end = y[6]
        v_aim = s.descent_speed_mps if s.descent_altitude_m > 0.0 else 0.0
        guided_end = self.guided_end
        record = self.run.record
        record.update(self.run.stats)
        req = s.requirements(vehicle)
        miss = math.hypot(y[0] - target[0], y[1] - target[1])
        v_down, v_side = -y[5], math.hypot(y[3], y[4])
        exceeded = [name for name, value, limit in (
            ("miss", miss, req["miss_max_m"]),
            ("vertical_speed", v_down, req["speed_vertical_max_mps"]),
            ("horizontal_speed", v_side, req["speed_horizontal_max_mps"])) if value > limit]
        if not self.contact:
            status = NO_CONTACT
        elif math.sqrt(y[3] ** 2 + y[4] ** 2 + y[5] ** 2) > req["crash_speed_mps"]:
            status = CRASHED
        else:
            status = OUT_OF_LIMITS if exceeded else LANDED
        record.update({
            "status": status,
            "limits_exceeded": exceeded if self.contact else [],
            "planned_time_of_flight_s": _r(self.t_end),
            "planned_fuel_kg": _r(self.first.fuel_kg),
            "touchdown_time_s": _r(self.t),
            "touchdown_position_m": [_r(x) for x in y[:3]],
            "touchdown_velocity_mps": [_r(x, 9) for x in y[3:6]],
            "position_error_m": _r(math.hypot(y[0] - target[0], y[1] - target[1]), 9),
            "touchdown_velocity_aim_mps": [0.0, 0.0, -v_aim],
            "velocity_error_mps": _r(math.sqrt(y[3] ** 2 + y[4] ** 2 + (y[5] + v_aim) ** 2), 9),
            "vertical_speed_mps": _r(-y[5], 9),
            "horizontal_speed_mps": _r(math.hypot(y[3], y[4]), 9),
            "fuel_kg": _r(self.run.draw.mass_kg - m_end),
            "propellant_left_kg": _r(m_end - vehicle.mass_dry_kg),
            "propellant_exhausted": bool(m_end <= vehicle.mass_dry_kg),
            "cutoff_altitude_m": _r(self.cutoff_alt, 9),
            "guided_end_time_s": _r(self.t_end) if guided_end is not None else None,
            "guided_end_position_m": guided_end[:3] if guided_end is not None else None,
            "guided_end_velocity_mps": guided_end[3:6] if guided_end is not None else None,
            "guided_end_mass_kg": guided_end[6] if guided_end is not None else None,
            "terminal_from_s": _r(self.terminal_from),
            "history": {"t_s": self.hist_t, "position_m": self.hist_r, "throttle": self.hist_thr},
        })
        if self.keep_plans:
            record["_plans"] = self.plans
        return record
