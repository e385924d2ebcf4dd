"""What guidance follows: a plan (accelerations per interval) or the terminal descent."""

from __future__ import annotations

import math

import numpy as np

from codegen.sim.settings import DESCENT_ACCEL_MPS2


#: Times closer than this are the same event.
EVENT_EPS_S = 1e-9


class _Plan:
    """A plan being flown: accelerations per interval, indexed from t0_s."""

    def __init__(self, traj, t0_s: float):
        self.traj = traj
        self.t0_s = t0_s
        self.n = len(traj.accel_mps2)
        self.dt_s = traj.time_of_flight_s / self.n
        # The plan's control: the acceleration u_k held on interval k (the
        # thrust is the current mass times it; codegen/model/problem.py).
        self.accel = [tuple(float(x) for x in row) for row in np.asarray(traj.accel_mps2, float)]

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
