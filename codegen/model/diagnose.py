"""Why a state has no plan: cheap diagnoses, no solve.

A call that ends ``unreachable`` says why in ``Trajectory.message``. The
reasons here are computed from the vehicle and the state alone, in
microseconds, and do not change the sequence of solves (the reference and
the generated C must make the same solves; tests/test_generate.py and
``pdgc check`` compare them). Each reason is a necessary condition of the
discretised problem that the state breaks, so a reason given is a proof that
no plan exists, not a guess:

- **hover**: the net thrust at the throttle limit cannot hold even the dry
  mass against gravity, and the vehicle is not climbing: the vertical speed
  can only grow downward (v_up' = T_up/m - g < 0), so it cannot come to
  rest;
- **rocket equation**: the velocity change needed, at least
  min over t in the bracket of |v_target - v_0 - g t|, is more than the
  propellant gives, Isp g0 cos(cant) ln(m_0 / m_dry) (the bound of
  ``problem.reach_bracket``, spelled out);
- **below the ground / outside the glide slope**: node 0 is the start, and
  the glide-slope cone (apex at the target) holds at node 0 in every mode
  (problem.py), so a start below it has no plan at all;
- **pointing**: the thrust may lean at most ``pointing_max_deg`` from
  vertical, so the horizontal acceleration is at most
  (rho2 / m_dry) sin(min(pointing, 90 deg)); bringing the horizontal offset
  and velocity to rest at the target then takes at least the minimum time of
  a double integrator with that bound, on the line of the offset and on the
  line of the velocity (each a lower bound; bang-bang, a textbook result of
  optimal control, e.g. Bryson & Ho 1975, "Applied Optimal Control", 3.9),
  which may exceed the longest flight the propellant allows (the bracket's
  upper end, burning at the minimum thrust: Acikmese & Ploen 2007).

When none applies, the message says where the search looked: "no feasible
time of flight in [a, b] s" (searched) or at which time of flight (fixed).
"""

from __future__ import annotations

import math

from codegen.model.problem import thrust_upper_n, time_of_flight_bracket
from codegen.model.vehicle import G0_MPS2, Vehicle


def _double_integrator_time(p: float, q: float, accel: float) -> float:
    """Least time to bring x = p, x' = q to rest at 0 with |x''| <= accel."""
    if accel <= 0.0:
        return 0.0 if p == 0.0 and q == 0.0 else math.inf
    s = p + q * abs(q) / (2.0 * accel)
    if s == 0.0:
        return abs(q) / accel
    sigma = 1.0 if s > 0.0 else -1.0
    return (sigma * q + 2.0 * math.sqrt(sigma * p * accel + 0.5 * q * q)) / accel


def search_bracket(vehicle: Vehicle, position_m, velocity_mps, mass_kg, throttle_max=None):
    """The bracket the searched call looks in (reference.py's, same clipping)."""
    lo, hi = time_of_flight_bracket(vehicle, position_m, velocity_mps, mass_kg, throttle_max)
    return max(lo, 1e-3 * hi), hi


def reasons(vehicle: Vehicle, position_m, velocity_mps, mass_kg, time_of_flight_s=None,
            target_m=(0.0, 0.0, 0.0), velocity_target_mps=(0.0, 0.0, 0.0),
            throttle_max=None) -> list:
    """Proofs, in words, that no plan exists from this state (empty: none found)."""
    r = [float(x) - float(t) for x, t in zip(position_m, target_m)]
    v = [float(x) for x in velocity_mps]
    a = [float(t) - x for t, x in zip(velocity_target_mps, v)]
    g = vehicle.gravity_mps2
    out = []
    if time_of_flight_s is None:
        t_lo, t_hi = search_bracket(vehicle, position_m, velocity_mps, mass_kg, throttle_max)
    else:
        t_lo = t_hi = float(time_of_flight_s)
    upper = thrust_upper_n(vehicle, throttle_max)

    hover = vehicle.mass_dry_kg * g
    if upper <= hover and a[2] >= 0.0:
        out.append(f"the net thrust at the throttle limit ({upper:.6g} N) cannot hold even the "
                   f"dry mass against gravity ({hover:.6g} N), so the descent cannot be stopped"
                   + (" (is thrust_max_n in newtons, not kN?)" if 1000.0 * upper > hover else ""))

    c_exhaust = vehicle.isp_s * G0_MPS2 * math.cos(math.radians(vehicle.engine_cant_deg))
    dv_have = c_exhaust * math.log(mass_kg / vehicle.mass_dry_kg)
    # |a - g t| with g = (0, 0, -g): a_h stays, a_up + g t varies; least over [t_lo, t_hi].
    t_star = min(max(-a[2] / g, t_lo), t_hi)
    dv_need = math.hypot(math.hypot(a[0], a[1]), a[2] + g * t_star)
    if dv_need > dv_have:
        span = (f"at {t_lo:.4g} s" if t_lo == t_hi else
                f"over any time of flight in [{t_lo:.4g}, {t_hi:.4g}] s")
        out.append(f"not enough propellant: the rocket equation gives at most {dv_have:.5g} m/s "
                   f"of velocity change (isp_s = {vehicle.isp_s:.6g}, mass {mass_kg:.6g} kg down "
                   f"to mass_dry_kg = {vehicle.mass_dry_kg:.6g}), and stopping at the target "
                   f"needs at least {dv_need:.5g} m/s {span}")

    horiz = math.hypot(r[0], r[1])
    if r[2] < 0.0:
        out.append(f"the start is below the target: up = {float(position_m[2]):.6g} m, the "
                   f"target's up = {float(target_m[2]):.6g} m")
    elif vehicle.glide_slope_deg > 0.0 and \
            math.tan(math.radians(vehicle.glide_slope_deg)) * horiz > r[2]:
        elev = math.degrees(math.atan2(r[2], horiz))
        out.append(f"the start lies outside the glide-slope cone: seen from the target it is "
                   f"{elev:.4g} deg above the horizon ({horiz:.6g} m away, {r[2]:.6g} m up), "
                   f"below glide_slope_deg = {vehicle.glide_slope_deg:.6g}")

    side = upper / vehicle.mass_dry_kg * math.sin(math.radians(min(vehicle.pointing_max_deg, 90.0)))
    vh = [v[0] - float(velocity_target_mps[0]), v[1] - float(velocity_target_mps[1])]
    need = 0.0
    for d in ((r[0], r[1]), (vh[0], vh[1])):
        n = math.hypot(*d)
        if n > 0.0:
            p = (r[0] * d[0] + r[1] * d[1]) / n
            q = (vh[0] * d[0] + vh[1] * d[1]) / n
            need = max(need, _double_integrator_time(p, q, side))
    if need > t_hi:
        out.append(f"pointing_max_deg = {vehicle.pointing_max_deg:.6g} allows at most "
                   f"{side:.4g} m/s^2 of horizontal acceleration, and bringing the horizontal "
                   f"offset ({horiz:.6g} m) and velocity ({math.hypot(*vh):.6g} m/s) to rest at "
                   f"the target takes at least {need:.4g} s, longer than the "
                   + ("time of flight" if time_of_flight_s is not None else
                      "longest flight the propellant allows") + f" ({t_hi:.4g} s)"
                   + (" (is the limit in degrees, not radians?)"
                      if vehicle.pointing_max_deg <= math.pi else ""))
    return out


def explain_unreachable(vehicle: Vehicle, position_m, velocity_mps, mass_kg, time_of_flight_s=None,
                        target_m=(0.0, 0.0, 0.0), velocity_target_mps=(0.0, 0.0, 0.0),
                        throttle_max=None, message: str = "") -> str:
    """The message of an ``unreachable`` call: the reasons found, else what
    the solves said (``message``), else where the call looked."""
    found = reasons(vehicle, position_m, velocity_mps, mass_kg, time_of_flight_s, target_m,
                    velocity_target_mps, throttle_max)
    if not found:
        if message:
            return message
        if time_of_flight_s is None:
            lo, hi = search_bracket(vehicle, position_m, velocity_mps, mass_kg, throttle_max)
            return f"no feasible time of flight in [{lo:.4g}, {hi:.4g}] s"
        return f"no feasible plan at the time of flight {float(time_of_flight_s):.6g} s"
    return "no plan: " + "; ".join(found)
