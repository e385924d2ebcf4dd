"""Closed-loop software-in-the-loop landing simulation.

A guidance solver (the generated C through cffi, or a dry-run tree backed by
the reference) flies a truth model in a loop, as it would on board:

Truth model
    3-DoF translation with variable mass in the landing-site frame (third
    axis up): r' = v, v' = T/m + g + d, m' = -|T| / (Isp g0 cos(cant)), with
    g0 = 9.80665 m/s^2 exact (3rd CGPM 1901) and the vehicle's mass-flow
    constant (rocket equation in rate form). Constant gravity; an optional
    constant disturbance acceleration d. Integrated by classical fixed-step
    RK4 at ``step_s`` (default 0.01 s, at least ten steps per guidance
    period). A step is shortened so that it ends exactly on every event
    (guidance call, plan taking effect, boundary of a plan interval, engine
    cut-off), so the command is constant within each step and RK4 keeps its
    order. The engine state (the lagged thrust magnitude, when a lag is set)
    is integrated with the rest.

Command: acceleration, not force
    A plan holds the acceleration u = T/m constant on each interval (the
    change of variables of the formulation; its zero-order hold is exact for
    the double integrator). So the flight software commands the plan's
    acceleration and turns it into a thrust with its current mass estimate,
    T_cmd = u * m_est. With a perfect mass estimate the vehicle then flies
    exactly the plan's dynamics; holding the plan's force instead would
    accelerate more and more as propellant burns (about 0.8 % over one
    interval of the demo plan) and miss even with no error at all. A mass
    estimate error then shows as an acceleration error, as it does in flight.

Engine
    Commanded magnitude clamped to the engine's range when the error file
    says so: throttle_min to full throttle (thrust_max_n). The vehicle's
    throttle_max is read as the planning limit below full throttle (a plan
    that rides the engine's true maximum leaves nothing to correct with);
    the margin above it is the tracking loop's authority. Then a
    first-order lag with an optional slew limit (the lag state starts at the first command: the run starts at powered
    descent with the engine settled), then the per-run magnitude error and
    misalignment (a fixed small rotation of the thrust direction about the
    two horizontal axes: a 3-DoF model has no attitude). Mass flow follows
    the delivered thrust. No thrust once the propellant is gone.

Guidance loop
    Navigation: estimate = truth + per-run bias + white noise per sample; the
    mass estimate = truth + per-run bias. The first plan searches the time of
    flight (``time_of_flight_s=None``) and fixes the end of the guided phase
    t_end. Then every 1/rate seconds guidance re-solves from the estimate
    with the time to go t_end - t (horizon N fixed, so the intervals shrink).
    A new plan takes effect ``latency_s`` after its navigation sample and is
    indexed from that sample's time. A solve that fails (any status but
    optimal / least_miss) changes nothing: the last good plan is followed.
    The mass handed to the solver is clamped into (dry, wet] (an estimate
    above the wet mass is a known impossibility; flight software would clamp).
    ``rate_hz = 0`` flies the first plan open loop.

Tracking loop
    A fuel-optimal plan ends on a full-thrust arc: from a state a little
    behind it, no plan with the same thrust bound and touchdown time exists,
    so re-plans there fail and the vehicle would fly the last plan blind.
    Between re-plans a tracking loop (``control_rate_hz``, default 10 Hz,
    with its own navigation samples) adds to the plan's acceleration
    3 w (v_ref - v_est) + 3 w^2 (r_ref - r_est) + w^3 * integral(r_ref - r_est),
    poles at -w (triple; w = ``tracking_bandwidth_rad_s``, default 0.5 rad/s),
    the integral clamped (anti-windup) and kept across plans (it estimates
    persistent errors: thrust magnitude, mass estimate, disturbance). r_ref,
    v_ref follow the plan's nodes under its own zero-order hold. w = 0 flies
    the plan's accelerations alone.

Terminal phase (rules chosen here, both common practice)
    1. When the time to go falls below ``terminal_s`` (default 3 s), guidance
       stops re-planning and flies (tracks) the last good plan to its end: a
       re-plan over a vanishing horizon has tiny intervals, its thrust bounds
       leave no room, and a new plan cannot change much.
    2. The plans aim at rest ``descent_altitude_m`` (default 4 m) above the
       target; from there a vertical descent at constant speed
       ``descent_speed_mps`` (default 1 m/s, reached at 1 m/s^2) under the
       same tracking loop (vertical channel: speed only) until ground
       contact, when the engine cuts off. A plan that ends at rest exactly on
       the ground turns an altitude error d into a touchdown speed of about
       sqrt(2 a d); the constant-speed descent makes the touchdown speed
       independent of altitude errors. ``descent_altitude_m = 0``: no
       descent; the engine cuts off at t_end or at contact, and a vehicle
       still above the ground falls freely to it.

Touchdown
    Ground contact is the first time the altitude reaches the target's
    altitude (located within a step by bisection on the RK4 step length).
    Position error: horizontal distance from the target. Velocity error:
    distance of the touchdown velocity from the intended one (0, 0,
    -descent_speed_mps), or from rest without a descent.

Reproducibility and resumption
    Run i of a batch with seed s takes all its randomness from
    ``numpy.random.default_rng([s, i])``: per-run draws first in a fixed
    order, then the navigation noise of each guidance call. So a run does not
    depend on which other runs were done, in which order, or on resumption.
    Each finished run is appended to ``runs.jsonl`` (one write, flush, fsync);
    ``manifest.json`` holds the settings. Running the same command again
    skips the runs already recorded (a torn last line is cut off) and refuses
    a run directory made with other settings.
"""

from __future__ import annotations

import json
import math
import os
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from codegen import __version__
from codegen.errors import InputError
from codegen.fsutil import complete_lines, write_atomic
from codegen.sim.error_model import ErrorModel, check_against_settings
from codegen.model.trajectory import BAD_INPUT
from codegen.model.vehicle import Vehicle, load_vehicle

#: A run that has not touched the ground this long after the planned
#: touchdown time is stopped (status ``no_contact``).
FREE_FALL_MAX_S = 120.0
#: Anti-windup: the integral term of the tracking loop is clamped to this
#: acceleration per axis (m/s^2); it only has to cancel small persistent
#: errors (thrust magnitude, mass estimate, disturbance).
TRACKING_INTEGRAL_MAX_MPS2 = 0.5
#: The terminal descent starts from rest and reaches its speed at this
#: downward acceleration (m/s^2).
DESCENT_ACCEL_MPS2 = 1.0
#: Times closer than this are the same event.
EVENT_EPS_S = 1e-9
#: Landed runs; other statuses say why a run has no touchdown.
LANDED = "landed"
NO_INITIAL_PLAN = "no_initial_plan"
NO_CONTACT = "no_contact"
RUN_STATUSES = (LANDED, NO_INITIAL_PLAN, NO_CONTACT)

RECORDS_FILE = "runs.jsonl"
MANIFEST_FILE = "manifest.json"
SUMMARY_FILE = "summary.json"
REPORT_FILE = "report.html"


# ---------------------------------------------------------------------------
# The solver to fly
# ---------------------------------------------------------------------------

def load_guidance_solver(solver_dir):
    """The solver in a tree ``solver_dir``, with the common solve interface.

    A generated tree is loaded through :func:`codegen.bind.load_solver`. A
    tree whose ``manifest.json`` says ``"backend": "reference"`` is a DRY RUN:
    its ``vehicle.toml`` is solved by :class:`~codegen.reference.ReferenceSolver`
    at the manifest's horizon (for tests, and to try the loop before any C is
    generated). :func:`write_dry_run_tree` makes one.
    """
    d = Path(solver_dir)
    man_path = d / "manifest.json"
    if not d.is_dir():
        raise InputError("solver directory", str(d), "does not exist or is not a directory")
    try:
        manifest = json.loads(man_path.read_text())
    except OSError as exc:
        raise InputError("solver directory", str(d),
                         f"has no readable manifest.json ({exc.strerror}); "
                         "make one with `pdgc generate`") from None
    except json.JSONDecodeError as exc:
        raise InputError(str(man_path), "", f"is not valid JSON: {exc}") from None
    if not isinstance(manifest, dict):
        raise InputError(str(man_path), manifest, "must hold a JSON object")
    if manifest.get("backend") == "reference":
        from codegen.reference import ReferenceSolver
        horizon = manifest.get("horizon")
        if isinstance(horizon, bool) or not isinstance(horizon, int) or horizon < 2:
            raise InputError(f"{man_path}: horizon", horizon, "must be an integer >= 2")
        solver = ReferenceSolver(load_vehicle(d / "vehicle.toml"), horizon)
        solver.name = "reference (dry run)"
        return solver
    try:
        from codegen.bind import load_solver
    except ModuleNotFoundError as exc:
        if exc.name != "codegen.bind":
            raise
        raise InputError("solver directory", str(d),
                         "needs codegen.bind to load generated C, which this installation "
                         "lacks; only dry-run trees (manifest backend 'reference') can be flown")
    return load_solver(d)


def write_dry_run_tree(directory, vehicle_path, horizon: int) -> Path:
    """Make a dry-run solver tree: the vehicle file and a manifest that says
    ``backend = "reference"``. No C; the reference solver stands in."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    write_atomic(d / "vehicle.toml", Path(vehicle_path).read_bytes())
    write_atomic(d / "manifest.json", json.dumps(
        {"backend": "reference", "horizon": int(horizon), "c_name": "dryrun",
         "note": "dry run: the reference solver stands in for generated C"}, indent=2) + "\n")
    return d


def _tree_identity(solver_dir) -> dict:
    import hashlib
    d = Path(solver_dir)
    out = {}
    for name in ("manifest.json", "vehicle.toml"):
        p = d / name
        out[name] = hashlib.sha256(p.read_bytes()).hexdigest() if p.exists() else None
    return out


# ---------------------------------------------------------------------------
# Settings and per-run draws
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Settings:
    """What a batch does besides the errors. ``rate_hz = 0``: open loop."""

    rate_hz: float = 1.0
    step_s: float = 0.01
    terminal_s: float = 3.0
    control_rate_hz: float = 10.0
    tracking_bandwidth_rad_s: float = 0.5
    descent_altitude_m: float = 4.0
    descent_speed_mps: float = 1.0
    position_m: tuple = (1500.0, 0.0, 1500.0)
    velocity_mps: tuple = (-50.0, 0.0, -40.0)
    mass_kg: float = 1900.0
    target_m: tuple = (0.0, 0.0, 0.0)
    history_dt_s: float = 0.5

    def check(self, vehicle: Vehicle) -> None:
        if not (math.isfinite(self.rate_hz) and self.rate_hz >= 0.0):
            raise InputError("--rate", self.rate_hz, "must be a finite number >= 0 (0: open loop)")
        if not (math.isfinite(self.step_s) and self.step_s > 0.0):
            raise InputError("--step", self.step_s, "must be a finite number > 0")
        if self.rate_hz > 0.0 and self.step_s > 0.1 / self.rate_hz:
            raise InputError("--step", self.step_s,
                             f"must be at most a tenth of the guidance period 1/--rate = "
                             f"{1.0 / self.rate_hz:g} s (truth integrated well above the "
                             "guidance rate)")
        if not (math.isfinite(self.control_rate_hz) and self.control_rate_hz > 0.0):
            raise InputError("--control-rate", self.control_rate_hz, "must be a finite number > 0")
        if self.control_rate_hz < self.rate_hz:
            raise InputError("--control-rate", self.control_rate_hz,
                             f"must be at least the guidance rate --rate = {self.rate_hz:g} Hz")
        if self.step_s > 0.25 / self.control_rate_hz:
            raise InputError("--step", self.step_s,
                             f"must be at most a quarter of the control period 1/--control-rate = "
                             f"{1.0 / self.control_rate_hz:g} s")
        if not (math.isfinite(self.tracking_bandwidth_rad_s) and self.tracking_bandwidth_rad_s >= 0.0):
            raise InputError("--tracking-bandwidth", self.tracking_bandwidth_rad_s,
                             "must be a finite number >= 0 (0: fly the plan's accelerations only)")
        if self.tracking_bandwidth_rad_s > 0.5 * math.pi * self.control_rate_hz:
            raise InputError("--tracking-bandwidth", self.tracking_bandwidth_rad_s,
                             f"must be at most a quarter of the control sampling frequency, "
                             f"2 pi --control-rate / 4 = {0.5 * math.pi * self.control_rate_hz:g} rad/s "
                             "(a sampled loop near its sampling rate is not the loop designed)")
        if not (math.isfinite(self.descent_altitude_m) and self.descent_altitude_m >= 0.0):
            raise InputError("--descent-altitude", self.descent_altitude_m,
                             "must be a finite number >= 0 (0: the plan lands by itself)")
        if self.descent_altitude_m > 0.0 and not (math.isfinite(self.descent_speed_mps)
                                                   and self.descent_speed_mps > 0.0):
            raise InputError("--descent-speed", self.descent_speed_mps, "must be a finite number > 0")
        if self.descent_altitude_m > 0.0 and self.descent_speed_mps ** 2 / (2 * DESCENT_ACCEL_MPS2) > self.descent_altitude_m:
            raise InputError("--descent-speed", self.descent_speed_mps,
                             f"cannot be reached from --descent-altitude {self.descent_altitude_m:g} m "
                             f"at {DESCENT_ACCEL_MPS2:g} m/s^2 before contact")
        if not (math.isfinite(self.terminal_s) and self.terminal_s >= 0.0):
            raise InputError("--terminal-s", self.terminal_s, "must be a finite number >= 0")
        for name, vec in (("--state position", self.position_m),
                          ("--state velocity", self.velocity_mps), ("--target", self.target_m)):
            if len(vec) != 3 or not all(math.isfinite(x) for x in vec):
                raise InputError(name, vec, "must be three finite numbers")
        if not vehicle.mass_dry_kg < self.mass_kg <= vehicle.mass_wet_kg:
            raise InputError("--state mass", self.mass_kg,
                             f"must lie in (mass_dry_kg, mass_wet_kg] = "
                             f"({vehicle.mass_dry_kg!r}, {vehicle.mass_wet_kg!r}]")
        if self.position_m[2] <= self.target_m[2]:
            raise InputError("--state position[2]", self.position_m[2],
                             f"must be above the target altitude {self.target_m[2]!r}")


def default_settings(vehicle: Vehicle, **overrides) -> Settings:
    """Settings whose nominal start is the centre of the vehicle's envelope
    (mass: the envelope's largest)."""
    env = vehicle.envelope
    base = dict(
        position_m=tuple((a + b) / 2.0 for a, b in zip(env.position_min_m, env.position_max_m)),
        velocity_mps=tuple((a + b) / 2.0 for a, b in zip(env.velocity_min_mps, env.velocity_max_mps)),
        mass_kg=env.mass_max_kg,
    )
    base.update({k: v for k, v in overrides.items() if v is not None})
    return Settings(**base)


@dataclass
class Draw:
    """Everything random about one run that is fixed for the whole run."""

    position_m: tuple
    velocity_mps: tuple
    mass_kg: float
    position_bias_m: tuple
    velocity_bias_mps: tuple
    mass_bias_kg: float
    thrust_scale: float
    misalignment_rad: tuple          # rotation about x and y
    disturbance_mps2: tuple


def draw_run(errors: ErrorModel, settings: Settings, vehicle: Vehicle, rng) -> Draw:
    """Per-run draws, always in this order (each draw consumed even when its
    spread is zero, so that one spread does not shift the others)."""
    def vec(sigma):
        return tuple(float(x) for x in rng.normal(0.0, 1.0, 3) * np.asarray(sigma, float))

    def one(sigma):
        return float(rng.normal(0.0, 1.0) * sigma)

    dpos, dvel, dmass = vec(errors.position_sigma_m), vec(errors.velocity_sigma_mps), one(errors.mass_sigma_kg)
    pos_bias, vel_bias = vec(errors.position_bias_sigma_m), vec(errors.velocity_bias_sigma_mps)
    mass_bias = one(errors.mass_bias_sigma_kg)
    scale = 1.0 + one(errors.magnitude_error_sigma)
    mis = vec((math.radians(errors.misalignment_sigma_deg),) * 2 + (0.0,))[:2]
    dist = vec(errors.accel_sigma_mps2)
    position = tuple(p + d for p, d in zip(settings.position_m, dpos))
    # The tanks cannot hold more than full: the true start mass is capped at wet.
    mass = min(settings.mass_kg + dmass, vehicle.mass_wet_kg)
    return Draw(
        position_m=position,
        velocity_mps=tuple(v + d for v, d in zip(settings.velocity_mps, dvel)),
        mass_kg=mass,
        position_bias_m=pos_bias, velocity_bias_mps=vel_bias, mass_bias_kg=mass_bias,
        thrust_scale=scale, misalignment_rad=mis,
        disturbance_mps2=tuple(a + b for a, b in zip(errors.accel_mps2, dist)),
    )


def _rotation(rx: float, ry: float):
    """Rotation matrix (row-major 3x3 tuple) of the rotation vector (rx, ry, 0), Rodrigues."""
    th = math.hypot(rx, ry)
    if th == 0.0:
        return None
    kx, ky, kz = rx / th, ry / th, 0.0
    c, s = math.cos(th), math.sin(th)
    C = 1.0 - c
    return ((c + kx * kx * C, kx * ky * C - kz * s, kx * kz * C + ky * s),
            (ky * kx * C + kz * s, c + ky * ky * C, ky * kz * C - kx * s),
            (kz * kx * C - ky * s, kz * ky * C + kx * s, c + kz * kz * C))


# ---------------------------------------------------------------------------
# Truth model
# ---------------------------------------------------------------------------

class TruthModel:
    """Translational dynamics with variable mass and an imperfect engine.

    State y = [x, y, up, vx, vy, vup, mass_kg, lag_n] (lag_n: the lagged
    thrust magnitude before the magnitude error; unused without a lag). The
    command is an acceleration vector (m/s^2) held over a step, or None for
    engine off.
    """

    def __init__(self, vehicle: Vehicle, errors: ErrorModel | None = None, draw: Draw | None = None):
        errors = errors or ErrorModel()
        self.vehicle = vehicle
        self.alpha = vehicle.mass_flow_per_n          # 1/(Isp g0 cos(cant))
        self.mass_dry_kg = vehicle.mass_dry_kg
        self.full_n = vehicle.thrust_max_n * math.cos(math.radians(vehicle.engine_cant_deg))
        # The engine's own range: throttle_min to full throttle (thrust_max_n).
        # The vehicle's throttle_max is the planning limit below it; the
        # margin is what the tracking loop corrects with.
        self.thrust_lo_n = vehicle.thrust_lower_n
        self.thrust_hi_n = self.full_n
        self.clamp = errors.clamp_to_throttle_range
        self.lag_s = errors.throttle_lag_s
        self.slew_n_per_s = errors.throttle_rate_max_per_s * self.full_n
        dist = draw.disturbance_mps2 if draw else errors.accel_mps2
        self.accel_ext = (dist[0], dist[1], dist[2] - vehicle.gravity_mps2)
        self.mass_bias_kg = draw.mass_bias_kg if draw else 0.0
        self.scale = draw.thrust_scale if draw else 1.0
        self.rot = _rotation(*draw.misalignment_rad) if draw else None

    def commanded_magnitude(self, mass_kg: float, cmd) -> float:
        """Thrust magnitude the flight software asks for: |u| * m_est, clamped."""
        mag = math.sqrt(cmd[0] * cmd[0] + cmd[1] * cmd[1] + cmd[2] * cmd[2]) * (mass_kg + self.mass_bias_kg)
        if self.clamp:
            mag = min(max(mag, self.thrust_lo_n), self.thrust_hi_n)
        return mag

    def thrust(self, y, cmd):
        """Delivered thrust vector (N) and d(lag_n)/dt."""
        if cmd is None or y[6] <= self.mass_dry_kg:
            return 0.0, 0.0, 0.0, 0.0
        fc = self.commanded_magnitude(y[6], cmd)
        if self.lag_s > 0.0:
            f = y[7]
            df = (fc - f) / self.lag_s
            if df > self.slew_n_per_s:
                df = self.slew_n_per_s
            elif df < -self.slew_n_per_s:
                df = -self.slew_n_per_s
        else:
            f, df = fc, 0.0
        n = math.sqrt(cmd[0] * cmd[0] + cmd[1] * cmd[1] + cmd[2] * cmd[2])
        if n > 0.0:
            dx, dy, dz = cmd[0] / n, cmd[1] / n, cmd[2] / n
        else:
            dx, dy, dz = 0.0, 0.0, 1.0
        if self.rot is not None:
            R = self.rot
            dx, dy, dz = (R[0][0] * dx + R[0][1] * dy + R[0][2] * dz,
                          R[1][0] * dx + R[1][1] * dy + R[1][2] * dz,
                          R[2][0] * dx + R[2][1] * dy + R[2][2] * dz)
        f *= self.scale
        return f * dx, f * dy, f * dz, df

    def derivative(self, y, cmd):
        tx, ty, tz, df = self.thrust(y, cmd)
        m = y[6]
        g = self.accel_ext
        return (y[3], y[4], y[5], tx / m + g[0], ty / m + g[1], tz / m + g[2],
                -self.alpha * math.sqrt(tx * tx + ty * ty + tz * tz), df)

    def step(self, y, h: float, cmd):
        """One classical RK4 step of length h with the command held."""
        k1 = self.derivative(y, cmd)
        k2 = self.derivative([a + 0.5 * h * b for a, b in zip(y, k1)], cmd)
        k3 = self.derivative([a + 0.5 * h * b for a, b in zip(y, k2)], cmd)
        k4 = self.derivative([a + h * b for a, b in zip(y, k3)], cmd)
        return [a + h / 6.0 * (b + 2.0 * c + 2.0 * d + e)
                for a, b, c, d, e in zip(y, k1, k2, k3, k4)]

    def throttle(self, y, cmd) -> float:
        tx, ty, tz, _ = self.thrust(y, cmd)
        return math.sqrt(tx * tx + ty * ty + tz * tz) / self.full_n


def propagate(model: TruthModel, y0, segments, step_s: float):
    """Integrate through ``segments`` = [(duration_s, command), ...] with
    steps of at most ``step_s`` that end on every segment boundary.
    Returns the state at the end of each segment (for tests and checks)."""
    y, out = list(y0), []
    for duration, cmd in segments:
        n = max(1, math.ceil(duration / step_s - 1e-9))
        h = duration / n
        for _ in range(n):
            y = model.step(y, h, cmd)
        out.append(list(y))
    return out


# ---------------------------------------------------------------------------
# One run
# ---------------------------------------------------------------------------

class _Plan:
    """A plan being flown: accelerations per interval, indexed from t0_s."""

    def __init__(self, traj, t0_s: float):
        self.traj = traj
        self.t0_s = t0_s
        self.n = len(traj.thrust_n)
        self.dt_s = traj.time_of_flight_s / self.n
        thrust = np.asarray(traj.thrust_n, float)
        mass = np.asarray(traj.mass_kg, float)[: self.n]
        # u = T/m on each interval (the plan's control, see the module docstring).
        self.accel = [tuple(float(x) for x in row) for row in thrust / mass[:, None]]

    def command(self, t_s: float):
        k = int(math.floor((t_s - self.t0_s) / self.dt_s))
        return self.accel[min(max(k, 0), self.n - 1)]

    def reference(self, t_s: float, gravity_mps2: float):
        """The plan's own state at t_s (its zero-order-hold dynamics between nodes)."""
        tau = min(max(t_s - self.t0_s, 0.0), self.n * self.dt_s)
        k = min(int(math.floor(tau / self.dt_s)), self.n - 1)
        s = tau - k * self.dt_s
        r = self.traj.position_m[k]
        v = self.traj.velocity_mps[k]
        a = (self.accel[k][0], self.accel[k][1], self.accel[k][2] - gravity_mps2)
        return ([float(r[i] + v[i] * s + 0.5 * a[i] * s * s) for i in range(3)],
                [float(v[i] + a[i] * s) for i in range(3)])

    def next_boundary(self, t_s: float) -> float:
        k = math.floor((t_s - self.t0_s) / self.dt_s) + 1
        b = self.t0_s + k * self.dt_s
        if b <= t_s + EVENT_EPS_S:
            b = self.t0_s + (k + 1) * self.dt_s
        return b


class _Descent:
    """Terminal descent: from rest at the end of the guided phase, straight
    down at constant speed until contact. Same interface as _Plan: a
    reference trajectory and its feed-forward thrust acceleration."""

    def __init__(self, t0_s: float, start_m, speed_mps: float, gravity_mps2: float):
        self.t0_s = t0_s
        self.start = tuple(start_m)
        self.speed = speed_mps
        self.t_ramp = speed_mps / DESCENT_ACCEL_MPS2
        self.g = gravity_mps2

    def command(self, t_s: float):
        ramp = (t_s - self.t0_s) < self.t_ramp
        return (0.0, 0.0, self.g - (DESCENT_ACCEL_MPS2 if ramp else 0.0))

    def next_boundary(self, t_s: float) -> float:
        b = self.t0_s + self.t_ramp
        return b if b > t_s + EVENT_EPS_S else math.inf

    def reference(self, t_s: float, gravity_mps2: float):
        tau = max(t_s - self.t0_s, 0.0)
        if tau < self.t_ramp:
            dz, vz = -0.5 * DESCENT_ACCEL_MPS2 * tau * tau, -DESCENT_ACCEL_MPS2 * tau
        else:
            dz = -0.5 * DESCENT_ACCEL_MPS2 * self.t_ramp ** 2 - self.speed * (tau - self.t_ramp)
            vz = -self.speed
        return [self.start[0], self.start[1], self.start[2] + dz], [0.0, 0.0, vz]


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


# ---------------------------------------------------------------------------
# A batch: manifest, append-only records, resumption, statistics
# ---------------------------------------------------------------------------

def read_records(path) -> dict:
    """{run index: record} from a JSONL file; a torn last line is cut off the
    file (so the next append starts on a clean line) and ignored."""
    out = {}
    for n, line in complete_lines(path):
        try:
            rec = json.loads(line)
        except json.JSONDecodeError:
            raise InputError(str(path), f"line {n}", "is not valid JSON (a record file "
                             "is only appended to; was it edited?)") from None
        out.setdefault(int(rec["run"]), rec)
    return out


def batch_identity(solver_dir, solver, errors: ErrorModel, settings: Settings, seed: int) -> dict:
    """What must match for a run directory to be resumed."""
    err = errors.as_dict()
    err.pop("source", None)
    err.pop("source_sha256", None)
    return {
        "solver_tree_sha256": _tree_identity(solver_dir),
        "solver": solver.name,
        "horizon": solver.horizon,
        "vehicle": solver.vehicle.name,
        "seed": int(seed),
        "errors": err,
        "settings": {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(settings).items()},
    }


def run_batch(solver_dir, runs: int, seed: int, errors: ErrorModel, settings: Settings,
              out_dir, progress=None, solver=None) -> dict:
    """Fly runs 0..runs-1 that ``out_dir`` does not hold yet; write the summary
    and the report; return the summary."""
    if isinstance(runs, bool) or not isinstance(runs, int) or runs < 1:
        raise InputError("--runs", runs, "must be an integer >= 1")
    solver = solver or load_guidance_solver(solver_dir)
    vehicle = solver.vehicle
    settings.check(vehicle)
    check_against_settings(errors, settings.step_s, settings.rate_hz)
    out = Path(out_dir)
    ident = batch_identity(solver_dir, solver, errors, settings, seed)
    man_path = out / MANIFEST_FILE
    if man_path.exists():
        try:
            old = json.loads(man_path.read_text())
        except json.JSONDecodeError as exc:
            raise InputError(str(man_path), "", f"is not valid JSON: {exc}") from None
        old_id = old.get("identity", {})
        for key in ident:
            if old_id.get(key) != json.loads(json.dumps(ident[key])):
                raise InputError("--out", str(out),
                                 f"holds a batch made with other settings ({key}: "
                                 f"{old_id.get(key)!r} there, {ident[key]!r} now)",
                                 "repeat the original command to resume, or choose another --out")
    manifest = {
        "kind": "pdgc closed-loop simulation",
        "pdgc_version": __version__,
        "solver_dir": str(Path(solver_dir).resolve()),
        "errors_file": errors.source,
        "errors_file_sha256": errors.source_sha256,
        "runs_requested": int(runs),
        "identity": ident,
    }
    if man_path.exists():
        old_runs = json.loads(man_path.read_text()).get("runs_requested", 0)
        manifest["runs_requested"] = max(int(runs), int(old_runs))
    write_atomic(man_path, json.dumps(manifest, indent=2) + "\n")

    rec_path = out / RECORDS_FILE
    done = read_records(rec_path)
    todo = [i for i in range(runs) if i not in done]
    if progress:
        progress("start", {"runs": runs, "done": len(done), "todo": len(todo)})
    with open(rec_path, "ab") as fh:
        for i in todo:
            t0 = time.perf_counter()
            rec = fly(solver, errors, settings, seed, i)
            rec["wall_time_s"] = round(time.perf_counter() - t0, 4)
            fh.write((json.dumps(rec, separators=(",", ":")) + "\n").encode("utf-8"))
            fh.flush()
            os.fsync(fh.fileno())
            done[i] = rec
            if progress:
                progress("run", rec)
    records = [done[i] for i in sorted(done) if i < runs]
    summary = summarise(records)
    summary["batch"] = {"runs": runs, "seed": int(seed), "solver": solver.name,
                        "horizon": solver.horizon, "vehicle": vehicle.name,
                        "rate_hz": settings.rate_hz, "step_s": settings.step_s,
                        "terminal_s": settings.terminal_s, "latency_s": errors.latency_s,
                        "errors_file": errors.source or None}
    write_atomic(out / SUMMARY_FILE, json.dumps(summary, indent=2) + "\n")
    write_report(out / REPORT_FILE, records, summary, vehicle, errors, settings)
    return summary


def describe(values) -> dict:
    """Mean, sample standard deviation, 3-sigma (= 3 std), mean + 3 sigma, worst (max)."""
    a = np.asarray([v for v in values if v is not None], float)
    if a.size == 0:
        return {"n": 0, "mean": None, "std": None, "three_sigma": None,
                "mean_plus_three_sigma": None, "worst": None}
    std = float(a.std(ddof=1)) if a.size > 1 else 0.0
    return {"n": int(a.size), "mean": float(a.mean()), "std": std, "three_sigma": 3.0 * std,
            "mean_plus_three_sigma": float(a.mean()) + 3.0 * std, "worst": float(a.max())}


def summarise(records) -> dict:
    landed = [r for r in records if r["status"] == LANDED]
    statuses = {}
    for r in records:
        for s, c in r.get("failure_statuses", {}).items():
            statuses[s] = statuses.get(s, 0) + c
    return {
        "runs": len(records),
        "landed": len(landed),
        "no_initial_plan": sum(r["status"] == NO_INITIAL_PLAN for r in records),
        "no_contact": sum(r["status"] == NO_CONTACT for r in records),
        "propellant_exhausted": sum(bool(r.get("propellant_exhausted")) for r in records),
        "position_error_m": describe(r["position_error_m"] for r in landed),
        "velocity_error_mps": describe(r["velocity_error_mps"] for r in landed),
        "vertical_speed_mps": describe(r["vertical_speed_mps"] for r in landed),
        "horizontal_speed_mps": describe(r["horizontal_speed_mps"] for r in landed),
        "fuel_kg": describe(r["fuel_kg"] for r in landed),
        "solves": int(sum(r["solves"] for r in records)),
        "solve_failures": int(sum(r["failures"] for r in records)),
        "runs_with_failures": int(sum(r["failures"] > 0 for r in records)),
        "failure_statuses": statuses,
        "worst_solve_time_s": max((r["worst_solve_time_s"] for r in records), default=None),
        "worst_replan_time_s": max((r["worst_replan_time_s"] for r in records), default=None),
    }


# ---------------------------------------------------------------------------
# The report: one self-contained HTML file (helpers from codegen.report)
# ---------------------------------------------------------------------------

def _figures(records, vehicle: Vehicle, target_m) -> list:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from codegen.report import figure_png_base64

    landed = [r for r in records if r["status"] == LANDED]
    tx, ty = target_m[0], target_m[1]
    figs = []

    fig, ax = plt.subplots(1, 3, figsize=(16, 5))
    tan_gs = math.tan(math.radians(vehicle.glide_slope_deg))
    span = 1.0
    for r in landed:
        p = np.asarray(r["history"]["position_m"], float)
        horiz = np.hypot(p[:, 0] - tx, p[:, 1] - ty)
        span = max(span, float(horiz.max()))
        ax[0].plot(horiz, p[:, 2] - target_m[2], lw=0.6, alpha=0.4, color="tab:blue")
        ax[1].plot(p[:, 0] - tx, p[:, 1] - ty, lw=0.6, alpha=0.4, color="tab:blue")
        ax[2].plot(horiz, p[:, 2] - target_m[2], lw=0.6, alpha=0.4, color="tab:blue")
    hs = np.linspace(0.0, span * 1.05, 50)
    ax[0].fill_between(hs, 0.0, hs * tan_gs, color="tab:red", alpha=0.2, label="outside glide slope")
    ax[0].set_xlabel("horizontal distance to target [m]")
    ax[0].set_ylabel("altitude above target [m]")
    ax[0].set_title(f"side view, {len(landed)} runs")
    ax[0].legend()
    ax[1].plot([0], [0], "kx", ms=10, label="target")
    ax[1].set_xlabel("x [m]")
    ax[1].set_ylabel("y [m]")
    ax[1].set_title("ground track")
    ax[1].legend()
    ax[2].set_xlim(0.0, 30.0)
    ax[2].set_ylim(-0.5, 30.0)
    ax[2].set_xlabel("horizontal distance to target [m]")
    ax[2].set_ylabel("altitude above target [m]")
    ax[2].set_title("last 30 m (history sampled every 0.5 s)")
    figs.append(("Trajectory fan", figure_png_base64(fig)))

    fig, ax = plt.subplots(1, 2, figsize=(13, 5))
    if landed:
        p = np.asarray([r["touchdown_position_m"] for r in landed], float)
        ax[0].scatter(p[:, 0] - tx, p[:, 1] - ty, s=8, alpha=0.6)
        v = np.asarray([[r["horizontal_speed_mps"], r["vertical_speed_mps"]] for r in landed], float)
        ax[1].scatter(v[:, 0], v[:, 1], s=8, alpha=0.6)
    ax[0].plot([0], [0], "kx", ms=10, label="target")
    ax[0].set_xlabel("x miss [m]")
    ax[0].set_ylabel("y miss [m]")
    ax[0].set_title("touchdown position")
    ax[0].axis("equal")
    ax[0].legend()
    ax[1].set_xlabel("horizontal speed at touchdown [m/s]")
    ax[1].set_ylabel("downward speed at touchdown [m/s]")
    ax[1].set_title("touchdown velocity")
    figs.append(("Touchdown scatter", figure_png_base64(fig)))

    fig, ax = plt.subplots(figsize=(13, 4.5))
    for r in landed:
        h = r["history"]
        ax.plot(h["t_s"], h["throttle"], lw=0.6, alpha=0.4, color="tab:blue")
    ax.axhline(vehicle.throttle_min, color="k", ls="--", label="throttle_min")
    ax.axhline(vehicle.throttle_max, color="tab:red", ls=":", label="throttle_max (planning limit)")
    ax.set_xlabel("time [s]")
    ax.set_ylabel("delivered throttle")
    ax.set_title("throttle histories (sampled every history step; the engine cuts off at touchdown)")
    ax.legend()
    figs.append(("Throttle histories", figure_png_base64(fig)))

    fig, ax = plt.subplots(figsize=(13, 4))
    tgo = [x for r in records for x in r.get("failure_time_to_go_s", [])]
    if tgo:
        ax.hist(tgo, bins=40, color="tab:red", alpha=0.7)
    ax.set_xlabel("time to go at the failed re-plan [s]")
    ax.set_ylabel("failed re-plans")
    ax.set_title(f"re-plan failures by time to go ({len(tgo)} in all runs; the last good plan "
                 "was followed each time)")
    figs.append(("Re-plan failures", figure_png_base64(fig)))
    return figs


def write_report(path, records, summary: dict, vehicle: Vehicle, errors: ErrorModel,
                 settings: Settings) -> None:
    """The batch as one self-contained HTML file (images inline)."""
    from codegen.report import esc, image, page, table

    b = summary.get("batch", {})
    intro = (f"<p>{esc(summary['runs'])} runs of the closed loop on <code>{esc(vehicle.name)}</code> "
             f"with solver <code>{esc(b.get('solver'))}</code> (N = {esc(b.get('horizon'))}), "
             f"seed {esc(b.get('seed'))}, guidance at {esc(settings.rate_hz)} Hz "
             f"({'open loop' if settings.rate_hz == 0 else 're-planned'}), truth RK4 step "
             f"{esc(settings.step_s)} s, tracking loop at {esc(settings.control_rate_hz)} Hz with "
             f"bandwidth {esc(settings.tracking_bandwidth_rad_s)} rad/s, no re-plans below "
             f"{esc(settings.terminal_s)} s to go, terminal descent from "
             f"{esc(settings.descent_altitude_m)} m at {esc(settings.descent_speed_mps)} m/s. "
             f"Errors: <code>{esc(errors.source or 'none (ideal loop)')}</code>.</p>")
    rows = []
    for key, label in (("position_error_m", "touchdown position error (horizontal miss) [m]"),
                       ("velocity_error_mps", "touchdown velocity error (speed) [m/s]"),
                       ("vertical_speed_mps", "downward speed at touchdown [m/s]"),
                       ("horizontal_speed_mps", "horizontal speed at touchdown [m/s]"),
                       ("fuel_kg", "fuel used [kg]")):
        d = summary[key]
        rows.append([label, d["n"], d["mean"], d["std"], d["three_sigma"],
                     d["mean_plus_three_sigma"], d["worst"]])
    stats = table(["quantity", "runs", "mean", "std", "3-sigma", "mean + 3-sigma", "worst"],
                  rows, text_columns=(0,))
    counts = table(["item", "value"], [
        ["runs", summary["runs"]], ["landed", summary["landed"]],
        ["no initial plan", summary["no_initial_plan"]], ["no ground contact", summary["no_contact"]],
        ["propellant exhausted", summary["propellant_exhausted"]],
        ["solves", summary["solves"]], ["solve failures", summary["solve_failures"]],
        ["runs with a failed solve", summary["runs_with_failures"]],
        ["failures by status", ", ".join(f"{k}: {v}" for k, v in sorted(summary["failure_statuses"].items())) or "none"],
        ["worst solve time (any, incl. first search) [s]", summary["worst_solve_time_s"]],
        ["worst re-plan solve time [s]", summary["worst_replan_time_s"]],
    ], text_columns=(0,))
    run_rows = [[r["run"], r["status"], r.get("position_error_m"), r.get("velocity_error_mps"),
                 r.get("fuel_kg"), r.get("planned_fuel_kg"), r.get("cutoff_altitude_m"),
                 r["solves"], r["failures"], r["worst_solve_time_s"]] for r in records]
    per_run = table(["run", "status", "miss [m]", "speed [m/s]", "fuel [kg]", "planned fuel [kg]",
                     "altitude at cut-off [m]", "solves", "failures", "worst solve [s]"],
                    run_rows, text_columns=(1,))
    figs = "\n".join(f"<h3>{esc(t)}</h3>\n{image(uri, t)}" for t, uri in _figures(records, vehicle, settings.target_m))
    model = ("<p>Truth: 3-DoF translation with variable mass, m' = -|T|/(Isp g0 cos(cant)), "
             "g0 = 9.80665 m/s^2, constant gravity and disturbance, fixed-step RK4 with steps "
             "ending on every event. Guidance commands the plan's acceleration times the mass "
             "estimate; it re-plans from the navigation estimate with the time to go, follows "
             "the last good plan when a solve fails, and stops re-planning below the terminal "
             "time to go (flying the last plan). A tracking loop (PID on position, poles at "
             "minus the bandwidth) steers onto the plan between re-plans. The plans aim at rest "
             "above the target; a constant-speed vertical descent follows until ground contact, "
             "when the engine cuts off. Position error: horizontal miss; velocity error: "
             "distance from the intended touchdown velocity. 3-sigma is three sample standard "
             "deviations. Solve times are wall-clock times measured by the solver and depend "
             "on the machine and its load.</p>")
    err_rows = [[k, json.dumps(v)] for k, v in errors.as_dict().items() if k not in ("source", "source_sha256")]
    sections = [
        ("statistics", "Touchdown statistics", stats + counts),
        ("figures", "Figures", figs),
        ("runs", "Per run", per_run),
        ("model", "Model and settings", model + table(["error setting", "value"], err_rows, text_columns=(0, 1))),
    ]
    write_atomic(path, page(f"pdgc closed-loop simulation: {vehicle.name}", sections, intro))
