"""The truth model: 3-DoF translation with variable mass and an imperfect engine, RK4."""

from __future__ import annotations

import math

from codegen.model.vehicle import Vehicle
from codegen.sim.error_model import ErrorModel
from codegen.sim.settings import Draw


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
