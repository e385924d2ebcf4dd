"""What a batch does besides the errors (Settings), and the per-run draws (Draw)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from codegen.errors import InputError
from codegen.model.vehicle import Vehicle
from codegen.sim.error_model import ErrorModel


#: The terminal descent starts from rest and reaches its speed at this
#: downward acceleration (m/s^2).
DESCENT_ACCEL_MPS2 = 1.0
#: A touchdown faster than this (m/s, magnitude) is a crash, whatever the
#: limits (common practice: landing gear absorbs a few m/s, not more).
CRASH_SPEED_MPS = 5.0
#: Re-plans may use the engine's reserve above the planning limit up to this
#: throttle (fraction of thrust_max_n: all of it), searching the lowest limit
#: that meets the target in this many bisection steps. Measured on the demo
#: (20 runs, seed 1, demo errors, reference dry run): without the reserve
#: 76 of 166 re-plans could not meet the target and the best-reachable plans
#: they gave led the vehicle 117 m off on average; with 2, 3, 4, 5 steps every
#: re-plan met it, touchdown miss mean 1.117 / 1.118 / 1.113 / 1.099 m and
#: velocity error worst 0.236 / 0.186 / 0.234 / 0.213 m/s; one fixed limit
#: instead (0.925 or 1.0 for every re-plan) missed by metres (DEVELOPERS.md).
RESERVE_THROTTLE = 1.0
RESERVE_STEPS = 4
#: No re-plan below this time to go (the terminal phase, codegen/sim/__init__).
#: Measured on the demo (200 runs, seed 1, demo errors, generated N = 50 tree):
#: terminal_s 1 / 3 / 4 / 6 / 8 / 10 / 15 s gave touchdown velocity error
#: mean 0.131 / 0.120 / 0.115 / 0.109 / 0.107 / 0.114 / 0.125 m/s (3-sigma
#: 0.162 / 0.162 / 0.148 / 0.156 / 0.144 / 0.142 / 0.162), miss mean 1.31 to
#: 1.32 m whatever the window (the navigation errors set it: 0.04 m without
#: them), fuel 172.4 to 169.9 kg falling with the window, and 20 calls without
#: a flyable plan at 1 s, none from 3 s on. Late re-plans pass each
#: navigation sample's noise straight into the touchdown velocity; the
#: tracking loop flies the last plan out more smoothly. At 500 runs, 8 s
#: against 3 s: velocity error 0.109 / 0.147 / 0.268 against 0.119 / 0.160 /
#: 0.301 m/s (mean / 3-sigma / worst), miss 1.262 / 1.996 / 4.017 against
#: 1.265 / 1.981 / 4.078 m. Planning at a throttle margin alone (no reserve,
#: --reserve-throttle 0.85) crashed 33 of 200 runs at 3 s and 34 at 8 s.
TERMINAL_S = 8.0


@dataclass(frozen=True)
class Settings:
    """What a batch does besides the errors. ``rate_hz = 0``: open loop."""

    rate_hz: float = 1.0
    step_s: float = 0.01
    terminal_s: float = TERMINAL_S
    control_rate_hz: float = 10.0
    tracking_bandwidth_rad_s: float = 0.5
    descent_altitude_m: float = 4.0
    descent_speed_mps: float = 1.0
    position_m: tuple = (1500.0, 0.0, 1500.0)
    velocity_mps: tuple = (-50.0, 0.0, -40.0)
    mass_kg: float = 1900.0
    target_m: tuple = (0.0, 0.0, 0.0)
    history_dt_s: float = 0.5
    reserve_throttle: float = RESERVE_THROTTLE
    reserve_steps: int = RESERVE_STEPS
    #: Touchdown requirements; None: the vehicle file's [touchdown] table.
    miss_max_m: float | None = None
    speed_vertical_max_mps: float | None = None
    speed_horizontal_max_mps: float | None = None
    crash_speed_mps: float = CRASH_SPEED_MPS

    def requirements(self, vehicle: Vehicle) -> dict:
        """The touchdown limits a run is judged by (SI)."""
        td = vehicle.touchdown
        return {
            "miss_max_m": td.miss_max_m if self.miss_max_m is None else self.miss_max_m,
            "speed_vertical_max_mps": (td.speed_vertical_max_mps
                                       if self.speed_vertical_max_mps is None
                                       else self.speed_vertical_max_mps),
            "speed_horizontal_max_mps": (td.speed_horizontal_max_mps
                                         if self.speed_horizontal_max_mps is None
                                         else self.speed_horizontal_max_mps),
            "crash_speed_mps": self.crash_speed_mps,
        }

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
        if not (math.isfinite(self.reserve_throttle)
                and vehicle.throttle_max <= self.reserve_throttle <= 1.0):
            raise InputError("--reserve-throttle", self.reserve_throttle,
                             f"must lie in [throttle_max, 1] = [{vehicle.throttle_max!r}, 1] "
                             "(throttle_max: no reserve)")
        if isinstance(self.reserve_steps, bool) or not isinstance(self.reserve_steps, int) \
                or not 0 <= self.reserve_steps <= 12:
            raise InputError("--reserve-steps", self.reserve_steps, "must be an integer in [0, 12]")
        for name, value in (("--touchdown-miss", self.miss_max_m),
                            ("--touchdown-vertical-speed", self.speed_vertical_max_mps),
                            ("--touchdown-horizontal-speed", self.speed_horizontal_max_mps),
                            ("--crash-speed", self.crash_speed_mps)):
            if value is not None and not (math.isfinite(value) and value > 0.0):
                raise InputError(name, value, "must be a finite number > 0")


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
