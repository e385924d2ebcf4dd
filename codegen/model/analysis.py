"""Constraint margins of a plan, as an engineer reads them."""

from __future__ import annotations

import math

import numpy as np

from codegen.model.trajectory import Trajectory
from codegen.model.vehicle import Vehicle


def margins(traj: Trajectory, vehicle: Vehicle, target_m=(0.0, 0.0, 0.0)) -> dict:
    """Worst margins over the plan (positive = inside the limit)."""
    if not traj.solved:
        return {}
    thrust = np.asarray(traj.thrust_n)
    tn = np.linalg.norm(thrust, axis=1)
    angle = np.degrees(np.arccos(np.clip(thrust[:, 2] / np.maximum(tn, 1e-12), -1.0, 1.0)))
    rel = np.asarray(traj.position_m)[:-1] - np.asarray(target_m, float)
    horiz = np.linalg.norm(rel[:, :2], axis=1)
    tan_gs = math.tan(math.radians(vehicle.glide_slope_deg))
    speed = np.linalg.norm(traj.velocity_mps, axis=1)
    return {
        "throttle_min": float(np.min(traj.throttle)),
        "throttle_max": float(np.max(traj.throttle)),
        "thrust_lower_margin_n": float(np.min(tn) - vehicle.thrust_lower_n),
        "thrust_upper_margin_n": float(vehicle.thrust_upper_n - np.max(tn)),
        "pointing_margin_deg": float(vehicle.pointing_max_deg - np.max(angle)),
        "glide_slope_margin_m": float(np.min(rel[:, 2] - tan_gs * horiz)),
        "speed_margin_mps": float(vehicle.speed_max_mps - np.max(speed)),
        "tightness_gap": traj.tightness_gap,
    }
