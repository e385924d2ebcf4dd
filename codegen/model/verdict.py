"""A plan checked against the real constraints, not the convexified ones.

The solver solves the lossless convexification of the descent problem; the
vehicle flies the original, non-convex one. Two solvers can share one
mistake, so every plan is checked here from its own numbers, as the vehicle
would fly it (codegen/model/problem.py: the acceleration u_k is held on
interval k and the thrust is T(t) = m(t) u_k):

- **mass**: re-integrated from |u_k| alone (m' = -alpha m |u_k| gives
  m_{k+1} = m_k exp(-alpha |u_k| dt), exactly), not taken from the plan's
  slack sigma; the plan's own masses assume |u_k| = sigma_k;
- **thrust**: |T(t)| = m(t) |u_k| falls over an interval, so the upper bound
  rho2 is checked at its start (m_k) and the lower bound rho1 at its end
  (m_{k+1}), with the re-integrated masses;
- **tightness**: sigma_k - |u_k| relative to sigma_k (zero at a lossless
  optimum, Acikmese & Ploen 2007); a plan whose relaxation is not tight
  burns fuel its thrust does not account for;
- **pointing**: the angle of u_k from the up axis;
- **glide slope** at nodes 0..N-1 and **speed** at nodes 1..N-1, where the
  problem imposes them;
- **dynamics**: positions and velocities re-integrated from r_0, v_0 under the
  plan's accelerations (zero-order hold, exact for the double integrator)
  against the plan's nodes;
- **touchdown**: the final mass above the dry mass, and, for a plan that says
  it meets the target, the terminal position and velocity at the target.

Each check gives a violation >= 0 in the unit its name says (0 when met)
and is compared with its tolerance in ``TOLERANCES``, which are far below
anything a vehicle could notice and far above the solver's own residuals: a
plan that fails one is not a rounding matter.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

#: Tolerances by precision of the solver that made the plan. Names say the
#: unit: ``_rel`` relative to the bound, ``_m`` metres, ``_mps`` m/s,
#: ``_deg`` degrees. Double: the solver stops at residuals of 1e-8 relative
#: (about 2e-5 m and 1e-6 m/s on the demo), the reference at 1e-7 at worst;
#: the tolerances are a thousand times that and still far below anything a
#: vehicle could notice (1 cm, 1 mm/s, 0.01 % of a thrust bound). The thrust
#: tolerance matches the tightness one: a gap g leaves the re-integrated mass
#: above the plan's by at most about g times the fuel fraction. Single: float
#: keeps about 7 digits and the solver stops at 1e-4 relative.
TOLERANCES = {
    "double": {"thrust_rel": 1e-4, "tightness_rel": 1e-4, "pointing_deg": 1e-3,
               "glide_slope_m": 1e-2, "speed_rel": 1e-5, "dynamics_m": 1e-2,
               "dynamics_mps": 1e-3, "target_m": 1e-2, "target_mps": 1e-3,
               "dry_mass_kg": 1e-3},
    "single": {"thrust_rel": 1e-2, "tightness_rel": 1e-2, "pointing_deg": 0.1,
               "glide_slope_m": 0.5, "speed_rel": 1e-3, "dynamics_m": 0.5,
               "dynamics_mps": 0.05, "target_m": 0.5, "target_mps": 0.05,
               "dry_mass_kg": 0.1},
}

#: The checks, in report order: name, tolerance key, meaning.
CHECKS = (
    ("thrust_above_max", "thrust_rel", "largest |T| / upper bound - 1, at interval starts"),
    ("thrust_below_min", "thrust_rel", "largest 1 - |T| / lower bound, at interval ends"),
    ("tightness_gap", "tightness_rel", "largest (sigma - |u|) / sigma"),
    ("pointing_excess_deg", "pointing_deg", "largest thrust angle from vertical past the limit"),
    ("glide_slope_depth_m", "glide_slope_m", "deepest node below the glide-slope cone"),
    ("speed_excess", "speed_rel", "largest node speed / limit - 1"),
    ("dynamics_position_m", "dynamics_m", "nodes against the re-integrated positions"),
    ("dynamics_velocity_mps", "dynamics_mps", "nodes against the re-integrated velocities"),
    ("below_dry_mass_kg", "dry_mass_kg", "re-integrated final mass below the dry mass"),
    ("target_position_m", "target_m", "last node from the target (when the target is met)"),
    ("target_velocity_mps", "target_mps", "last velocity from the target's"),
)
_KEY = {name: key for name, key, _ in CHECKS}


@dataclass
class Verdict:
    """Violations of the real constraints (>= 0, 0 when met) and whether the
    plan is flyable within the tolerances. ``worst`` names the check that is
    furthest past its tolerance (or "" when none is)."""

    violations: dict = field(default_factory=dict)
    tolerances: dict = field(default_factory=dict)
    flyable: bool = True
    worst: str = ""
    true_mass_kg: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def failed(self) -> list:
        return [name for name, key, _ in CHECKS
                if not self.violations.get(name, 0.0) <= self.tolerances[key]]

    def summary(self) -> str:
        bad = self.failed()
        if not bad:
            return "meets every constraint"
        return "; ".join(f"{name} {self.violations[name]:.3g} (tolerance "
                         f"{self.tolerances[_KEY[name]]:.1g})" for name in bad)

    def as_dict(self) -> dict:
        return {"flyable": self.flyable, "worst": self.worst,
                "violations": {k: float(v) for k, v in self.violations.items()}}


def check_plan(vehicle, time_of_flight_s: float, position_m, velocity_mps, mass_kg,
               accel_mps2, accel_slack_mps2, target_m=(0.0, 0.0, 0.0),
               velocity_target_mps=(0.0, 0.0, 0.0), meets_target: bool = True,
               precision: str = "double", throttle_max=None) -> Verdict:
    """Check one plan (SI arrays: nodes N+1, intervals N). ``throttle_max``:
    the run-time throttle limit the plan was made for (default the vehicle's)."""
    from codegen.model.problem import thrust_upper_n
    tol = TOLERANCES[precision]
    r = np.asarray(position_m, float)
    v = np.asarray(velocity_mps, float)
    m_plan = np.asarray(mass_kg, float)
    u = np.asarray(accel_mps2, float)
    sig = np.asarray(accel_slack_mps2, float)
    n = len(u)
    dt = float(time_of_flight_s) / n
    alpha = vehicle.mass_flow_per_n
    un = np.linalg.norm(u, axis=1)

    m = np.empty(n + 1)
    m[0] = m_plan[0]
    for k in range(n):
        m[k + 1] = m[k] * math.exp(-alpha * un[k] * dt)
    rho1, rho2 = vehicle.thrust_lower_n, thrust_upper_n(vehicle, throttle_max)
    out = {}
    out["thrust_above_max"] = max(0.0, float(np.max(m[:-1] * un)) / rho2 - 1.0)
    out["thrust_below_min"] = max(0.0, 1.0 - float(np.min(m[1:] * un)) / rho1)
    out["tightness_gap"] = max(0.0, float(np.max((sig - un) / np.maximum(sig, 1e-300))))
    cos_angle = np.clip(u[:, 2] / np.maximum(un, 1e-300), -1.0, 1.0)
    angle = np.degrees(np.arccos(cos_angle))
    out["pointing_excess_deg"] = max(0.0, float(np.max(angle)) - vehicle.pointing_max_deg)
    tgt = np.asarray(target_m, float)
    rel = r[:n] - tgt           # the cone's apex: the target (problem.py)
    if vehicle.glide_slope_deg > 0.0:
        tan_gs = math.tan(math.radians(vehicle.glide_slope_deg))
        # Depth below the cone, measured vertically: tan(gs) |horizontal| - up.
        depth = tan_gs * np.linalg.norm(rel[:, :2], axis=1) - rel[:, 2]
        out["glide_slope_depth_m"] = max(0.0, float(np.max(depth)))
    else:
        out["glide_slope_depth_m"] = 0.0
    if n >= 2:
        speed = np.linalg.norm(v[1:n], axis=1)
        out["speed_excess"] = max(0.0, float(np.max(speed)) / vehicle.speed_max_mps - 1.0)
    else:
        out["speed_excess"] = 0.0
    g = np.asarray(vehicle.gravity_vector, float)
    rr, vv = r[0].copy(), v[0].copy()
    worst_r = worst_v = 0.0
    for k in range(n):
        a = u[k] + g
        rr = rr + dt * vv + 0.5 * dt * dt * a
        vv = vv + dt * a
        worst_r = max(worst_r, float(np.linalg.norm(rr - r[k + 1])))
        worst_v = max(worst_v, float(np.linalg.norm(vv - v[k + 1])))
    out["dynamics_position_m"] = worst_r
    out["dynamics_velocity_mps"] = worst_v
    out["below_dry_mass_kg"] = max(0.0, vehicle.mass_dry_kg - float(m[-1]))
    if meets_target:
        out["target_position_m"] = float(np.linalg.norm(r[n] - tgt))
        out["target_velocity_mps"] = float(np.linalg.norm(v[n] - np.asarray(velocity_target_mps,
                                                                              float)))
    else:
        out["target_position_m"] = out["target_velocity_mps"] = 0.0
    verdict = Verdict(violations=out, tolerances=tol, true_mass_kg=m)
    bad = verdict.failed()
    verdict.flyable = not bad
    if bad:
        verdict.worst = max(bad, key=lambda name: out[name] / tol[_KEY[name]])
    return verdict
