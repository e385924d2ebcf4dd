"""The discretised descent SOCP with parameters: the one source of truth.

Every solver in the project, the Python reference and every generated C
solver, solves the problem built here, and every one of them computes its
parameters with the same rules as :func:`parameter_values` (the C guidance
layer mirrors it line for line).

Formulation (published sources named below; the points decided in code are
listed in DEVELOPERS.md, section "The formulation"):
  change of variables u = T/m, sigma = Gamma/m, z = ln m (Acikmese & Ploen
  2007); thrust bounds convexified losslessly with a second-order lower and a
  first-order upper Taylor bound (Acikmese & Ploen 2007); pointing as a
  linear bound on u (Acikmese, Carson & Blackmore 2013); glide slope and
  speed as second-order cones; zero-order hold on u and sigma, which is
  exact for the double integrator.

What the plan means: the acceleration u_k (and sigma_k) is held on interval
k, so the thrust is T(t) = m(t) u_k with the mass falling as
m' = -alpha m |u_k|; the dynamics rows below are then exact. |T(t)| is
largest at the start of an interval and smallest at its end, so the upper
thrust bound is taken at node k (the interval's start) and the lower bound
at node k + 1 (its end), each around its own Taylor point: the engine's
range then holds over the whole interval, not only at the nodes (with the
lower bound at node k, a plan at minimum thrust fell 0.2 to 0.4 % below it
by each interval's end at N = 20 on the demo vehicle).

Terminal conditions, one program for four uses (``MODES``): the terminal
rows read r_N - target = kappa d_r and v_N - v_target = kappa d_v, with a
weighted error ||W d|| <= eps <= err_max and the objective
w_fuel_dt sum(sigma) + w_err eps. The weights W normalise the error by the
vehicle's touchdown speed limits and error_position_scale_m (eps = 1 at a speed limit). ``kappa = 0`` is the least-
fuel problem with the terminal state fixed; ``kappa = 1`` lets the plan end
off the target, which is how a re-plan from a perturbed state always has an
answer (the minimum-landing-error problem of Blackmore, Acikmese & Scharf
2010, extended to the velocity). The glide-slope cone keeps its apex at the
target in every mode.

Everything is scaled to order one: lengths by ``length_m``, accelerations by
``accel_mps2`` (the largest thrust acceleration at wet mass), times by
``time_s = sqrt(length_m / accel_mps2)``, masses by the wet mass (so that
z = ln(m / mass_wet_kg) <= 0).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import cvxpy as cp
import numpy as np

from codegen.model.vehicle import Vehicle

#: Uses of the one program, by parameter values (see parameter_values):
#:   ``target``        least fuel, terminal position and velocity fixed;
#:   ``merit``         least fuel + MERIT_ERROR_WEIGHT * terminal error: never
#:                     infeasible for want of reach, so a time-of-flight probe
#:                     always says how far from the target it ends;
#:   ``least_error``   least terminal error, fuel (weight LEAST_ERROR_FUEL_WEIGHT)
#:                     breaking ties (stage 1 of Blackmore et al. 2010);
#:   ``fuel_at_error`` least fuel with the error held at most ``err_max`` (stage 2).
MODES = ("target", "merit", "least_error", "fuel_at_error")

#: Weight of the normalised terminal error against scaled fuel in ``merit``.
#: It must exceed the terminal multipliers for the merit to be exact (the same
#: answer as ``target`` where the target is reachable); measured on the demo
#: vehicle, see DEVELOPERS.md.
MERIT_ERROR_WEIGHT = 10.0
#: Fuel weight relative to the error in ``least_error``: a tie-breaker. Without
#: one the least-error plan is not unique and the solve ended inaccurate.
LEAST_ERROR_FUEL_WEIGHT = 1e-3
#: Bound on the error in the free modes (weighted, 1 = a touchdown speed limit):
#: far above any plan's error, it only keeps the error's cone bounded.
ERROR_BOUND_FREE = 1e6

#: Floor, as a fraction of the dry mass, under the masses whose logarithm the
#: parameter map takes. Inside the time-of-flight bracket it never binds.
MASS_FLOOR_FRACTION = 1e-3


@dataclass(frozen=True)
class Scaling:
    """Characteristic length, time and mass; SI value = scaled value * unit."""

    length_m: float
    time_s: float
    mass_kg: float

    @property
    def speed_mps(self) -> float:
        return self.length_m / self.time_s

    @property
    def accel_mps2(self) -> float:
        return self.length_m / self.time_s**2

    @classmethod
    def for_vehicle(cls, vehicle: Vehicle) -> "Scaling":
        env = vehicle.envelope
        length = max(abs(x) for x in env.position_min_m + env.position_max_m)
        accel = vehicle.thrust_upper_n / vehicle.mass_wet_kg
        return cls(length_m=length, time_s=math.sqrt(length / accel), mass_kg=vehicle.mass_wet_kg)


@dataclass(frozen=True)
class Constants:
    """Vehicle constants in scaled units, as baked into generated code."""

    thrust_lower: float      # rho1 / (mass_kg * accel)  (force per unit scaled mass)
    thrust_upper: float      # rho2 / (mass_kg * accel)
    mass_flow: float         # alpha * accel * time (per scaled time, per scaled accel)
    gravity_up: float        # -|g| / accel
    cos_pointing: float
    tan_glide_slope: float
    speed_max: float
    z_dry: float             # ln(mass_dry / mass_kg)
    mass_dry: float          # mass_dry / mass_kg
    mass_wet: float          # mass_wet / mass_kg (= 1)
    error_weights: tuple     # W of the terminal error (r_N - target, v_N - v_target), scaled

    def thrust_upper_at(self, vehicle: Vehicle, throttle_max: float) -> float:
        """The scaled upper thrust bound at a run-time throttle limit
        (a fraction of thrust_max_n, as the vehicle's throttle_max)."""
        return throttle_max * self.thrust_upper / vehicle.throttle_max

    @classmethod
    def of(cls, vehicle: Vehicle, s: Scaling) -> "Constants":
        force_unit = s.mass_kg * s.accel_mps2
        return cls(
            thrust_lower=vehicle.thrust_lower_n / force_unit,
            thrust_upper=vehicle.thrust_upper_n / force_unit,
            mass_flow=vehicle.mass_flow_per_n * s.accel_mps2 * s.time_s,
            gravity_up=-vehicle.gravity_mps2 / s.accel_mps2,
            cos_pointing=math.cos(math.radians(vehicle.pointing_max_deg)),
            tan_glide_slope=math.tan(math.radians(vehicle.glide_slope_deg)),
            speed_max=vehicle.speed_max_mps / s.speed_mps,
            z_dry=math.log(vehicle.mass_dry_kg / s.mass_kg),
            mass_dry=vehicle.mass_dry_kg / s.mass_kg,
            mass_wet=vehicle.mass_wet_kg / s.mass_kg,
            error_weights=terminal_error_weights(vehicle, s),
        )


def terminal_error_weights(vehicle: Vehicle, s: Scaling) -> tuple:
    """W, so that ||W d|| is the weighted terminal error: position (all three
    axes) by touchdown.error_position_scale_m, horizontal velocity by
    speed_horizontal_max_mps, vertical velocity by speed_vertical_max_mps."""
    td = vehicle.touchdown
    wr = s.length_m / td.error_position_scale_m
    wh = s.speed_mps / td.speed_horizontal_max_mps
    wv = s.speed_mps / td.speed_vertical_max_mps
    return (wr, wr, wr, wh, wh, wv)


# Parameter names, shapes (as functions of N) and meaning, in a fixed order:
# this order is the order of the flat parameter vector used by the generated
# code. Every entry is computed by parameter_values().
PARAMETERS = (
    ("r0", lambda n: (3,), "initial position"),
    ("v0", lambda n: (3,), "initial velocity"),
    ("z0", lambda n: (1,), "ln of initial mass"),
    ("target", lambda n: (3,), "landing target"),
    ("dt", lambda n: (1,), "interval length"),
    ("dt2h", lambda n: (1,), "dt^2 / 2"),
    ("adt", lambda n: (1,), "mass_flow * dt"),
    ("zlo", lambda n: (n,), "ln(m0 - alpha rho2 t_k), nodes 1..N (Taylor point)"),
    ("zhi", lambda n: (n,), "ln(m0 - alpha rho1 t_k), nodes 1..N"),
    ("mu_lo", lambda n: (n,), "rho1 exp(-z_{k+1}^0), intervals 0..N-1 (lower bound at the end)"),
    ("mu_hi", lambda n: (n,), "rho2 exp(-z_k^0) (upper bound at the start)"),
    ("p_lo", lambda n: (n,), "mu_lo (1 + z_{k+1}^0)"),
    ("p_hi", lambda n: (n,), "mu_hi (1 + z_k^0)"),
    ("s_lo", lambda n: (n,), "sqrt(mu_lo / 2)"),
    ("c_lo", lambda n: (n,), "s_lo z_{k+1}^0"),
    ("v_target", lambda n: (3,), "touchdown velocity"),
    ("kappa", lambda n: (1,), "0: terminal state fixed; 1: terminal error allowed"),
    ("w_fuel_dt", lambda n: (1,), "weight of sum(sigma): dt times the fuel weight"),
    ("w_err", lambda n: (1,), "weight of the terminal error eps"),
    ("err_max", lambda n: (1,), "bound on the terminal error eps"),
)


def parameter_values(c: Constants, s: Scaling, horizon: int, position_m, velocity_mps,
                     mass_kg: float, time_of_flight_s: float, target_m=(0.0, 0.0, 0.0),
                     mode: str = "target", err_max: float = 0.0,
                     velocity_target_mps=(0.0, 0.0, 0.0), thrust_upper: float | None = None) -> dict:
    """Map physical run-time inputs to scaled parameter values.

    ``z_k^0`` is the Taylor point at node k: ln(m0 - alpha rho2 t_k) (= z0 at
    k = 0), floored at the dry mass so that the logarithm stays defined past
    the time the engine could burn out; the bounds stay conservative there
    because z_k >= ln(m_dry) anyway. The upper thrust bound of interval k is
    taken around z_k^0, the lower one around z_{k+1}^0 (module docstring).
    ``mode`` is one of MODES; ``err_max`` (weighted terminal error) is
    used by ``fuel_at_error`` only. ``thrust_upper`` is the upper thrust bound
    in scaled units when it differs from the vehicle's (a run-time throttle
    limit: see ``Constants.thrust_upper_at``).
    """
    if mode not in MODES:
        raise ValueError(f"mode = {mode!r}: must be one of {', '.join(MODES)}")
    n = horizon
    rho2 = c.thrust_upper if thrust_upper is None else float(thrust_upper)
    m0 = mass_kg / s.mass_kg
    tf = time_of_flight_s / s.time_s
    dt = tf / n
    t = dt * np.arange(n + 1)
    floor = c.mass_dry * MASS_FLOOR_FRACTION
    m_lo = np.maximum(m0 - c.mass_flow * rho2 * t, c.mass_dry)
    m_hi = np.maximum(m0 - c.mass_flow * c.thrust_lower * t, floor)
    z_lo = np.log(m_lo)
    z_lo[0] = math.log(m0)
    zk = z_lo[:n]
    zk1 = z_lo[1:]
    mu_lo = c.thrust_lower * np.exp(-zk1)
    mu_hi = rho2 * np.exp(-zk)
    s_lo = np.sqrt(mu_lo / 2.0)
    if mode == "target":
        kappa, w_fuel, w_err, e_max = 0.0, 1.0, 0.0, 1.0
    elif mode == "merit":
        kappa, w_fuel, w_err, e_max = 1.0, 1.0, MERIT_ERROR_WEIGHT, ERROR_BOUND_FREE
    elif mode == "least_error":
        kappa, w_fuel, w_err, e_max = 1.0, LEAST_ERROR_FUEL_WEIGHT, 1.0, ERROR_BOUND_FREE
    else:
        kappa, w_fuel, w_err, e_max = 1.0, 1.0, 0.0, float(err_max)
    return {
        "r0": np.asarray(position_m, float) / s.length_m,
        "v0": np.asarray(velocity_mps, float) / s.speed_mps,
        "z0": np.array([math.log(m0)]),
        "target": np.asarray(target_m, float) / s.length_m,
        "dt": np.array([dt]),
        "dt2h": np.array([dt * dt / 2.0]),
        "adt": np.array([c.mass_flow * dt]),
        "zlo": z_lo[1:],
        "zhi": np.log(m_hi[1:]),
        "mu_lo": mu_lo,
        "mu_hi": mu_hi,
        "p_lo": mu_lo * (1.0 + zk1),
        "p_hi": mu_hi * (1.0 + zk),
        "s_lo": s_lo,
        "c_lo": s_lo * zk1,
        "v_target": np.asarray(velocity_target_mps, float) / s.speed_mps,
        "kappa": np.array([kappa]),
        "w_fuel_dt": np.array([w_fuel * dt]),
        "w_err": np.array([w_err]),
        "err_max": np.array([e_max]),
    }


def thrust_upper_n(vehicle: Vehicle, throttle_max=None) -> float:
    """Net upper thrust bound (N) at a run-time throttle limit, or the vehicle's."""
    if throttle_max is None:
        return vehicle.thrust_upper_n
    return throttle_max * vehicle.thrust_max_n * math.cos(math.radians(vehicle.engine_cant_deg))


def time_of_flight_bracket(vehicle: Vehicle, position_m, velocity_mps, mass_kg,
                           throttle_max=None):
    """Search bracket for the time of flight (Acikmese & Ploen 2007).

    t_min = (m0 - m_dry) |v0| / rho2 and t_max = (m0 - m_dry) / (alpha rho1),
    with the current mass m0 in place of the wet mass.
    """
    fuel = mass_kg - vehicle.mass_dry_kg
    vx, vy, vz = (float(x) for x in velocity_mps)
    # Scalar arithmetic in a fixed order: the generated C computes the same bits.
    speed = math.sqrt(vx * vx + vy * vy + vz * vz)
    t_min = fuel * speed / thrust_upper_n(vehicle, throttle_max)
    t_max = fuel / (vehicle.mass_flow_per_n * vehicle.thrust_lower_n)
    return t_min, t_max


def _quadratic_below(a: float, b: float, c: float):
    """{t : a t^2 + b t + c <= 0} as a closed interval (lo, hi) with
    infinite ends allowed, or None when empty. Only a <= 0 opens outward;
    callers use a < 0 (outward) or a > 0 (inward)."""
    if a == 0.0:
        if b == 0.0:
            return (-math.inf, math.inf) if c <= 0.0 else None
        root = -c / b
        return (-math.inf, root) if b > 0.0 else (root, math.inf)
    disc = b * b - 4.0 * a * c
    if disc < 0.0:
        return None if a > 0.0 else (-math.inf, math.inf)
    q = math.sqrt(disc)
    r1, r2 = sorted(((-b - q) / (2.0 * a), (-b + q) / (2.0 * a)))
    if a > 0.0:
        return (r1, r2)
    # outward: t <= r1 or t >= r2; for t > 0 with a hover-capable vehicle
    # the relevant part is t >= r2 (r1 is then <= 0)
    return (r2, math.inf) if r1 <= 0.0 else (r1, r2)


def reach_bracket(vehicle: Vehicle, velocity_mps, mass_kg: float, t_lo: float, t_hi: float,
                  velocity_target_mps=(0.0, 0.0, 0.0), throttle_max=None, position_m=None,
                  target_m=(0.0, 0.0, 0.0), horizon=None):
    """The part of [t_lo, t_hi] where the target can possibly be met, or None.

    Necessary conditions of the discretised problem with the terminal velocity
    fixed (kappa = 0): the dynamics rows sum to
    v_N - v_0 = dt sum_k (u_k + g), so with a = v_target - v_0,
    |a - g t| = |dt sum u_k| <= dt sum |u_k| <= dt sum sigma_k, and
    dt sum sigma_k = c (z_0 - z_N) <= c ln(m_0 / m_dry) (the mass rows and
    z_N >= ln m_dry; c = Isp g0 cos(cant), the rocket equation), and
    dt sum sigma_k <= t rho2 / m_dry (the upper thrust bound, sigma_k <=
    rho2 exp(-z_k) <= rho2 / m_dry, the tangent being below the convex
    exp). Both are quadratic in t; a time outside either interval has no
    solution with the target met, whatever the solver says.

    With ``position_m`` and ``horizon`` given, also the speed limit: the
    position rows give r_{k+1} - r_k = dt (v_k + v_{k+1}) / 2 exactly (the
    acceleration is held on each interval), and |v_k| <= v_max at nodes
    1..N-1, so |r_target - r_0| <= dt (|v_0| + 2 (N - 1) v_max + |v_target|) / 2,
    a lower bound on t = N dt (``speed_lower_bound``).

    Returns (lo, hi) inside [t_lo, t_hi], or None when no such time is left.
    """
    # Scalar arithmetic in a fixed order: the generated C computes the same bits.
    g = [float(x) for x in vehicle.gravity_vector]
    a = [float(t) - float(v) for t, v in zip(velocity_target_mps, velocity_mps)]
    c_exhaust = 1.0 / vehicle.mass_flow_per_n
    reach = c_exhaust * math.log(mass_kg / vehicle.mass_dry_kg)
    accel = thrust_upper_n(vehicle, throttle_max) / vehicle.mass_dry_kg
    gg = g[0] * g[0] + g[1] * g[1] + g[2] * g[2]
    ag = a[0] * g[0] + a[1] * g[1] + a[2] * g[2]
    aa = a[0] * a[0] + a[1] * a[1] + a[2] * a[2]
    # |a - g t|^2 <= reach^2:  gg t^2 - 2 ag t + aa - reach^2 <= 0
    first = _quadratic_below(gg, -2.0 * ag, aa - reach * reach)
    # |a - g t|^2 <= accel^2 t^2:  (gg - accel^2) t^2 - 2 ag t + aa <= 0
    second = _quadratic_below(gg - accel * accel, -2.0 * ag, aa)
    if first is None or second is None:
        return None
    lo = max(t_lo, first[0], second[0])
    hi = min(t_hi, first[1], second[1])
    if position_m is not None and horizon is not None:
        lo = max(lo, speed_lower_bound(vehicle, position_m, velocity_mps, horizon, target_m,
                                       velocity_target_mps))
    return (lo, hi) if lo <= hi else None


def _norm3(x, y, z) -> float:
    # One fixed order of operations: the generated C computes the same bits.
    return math.sqrt(x * x + y * y + z * z)


def speed_lower_bound(vehicle: Vehicle, position_m, velocity_mps, horizon: int,
                      target_m=(0.0, 0.0, 0.0), velocity_target_mps=(0.0, 0.0, 0.0)) -> float:
    """Shortest time of flight at which the speed limit lets the vehicle
    reach the target (reach_bracket's third condition):
    t >= 2 N |r_target - r_0| / (|v_0| + 2 (N - 1) v_max + |v_target|)."""
    n = int(horizon)
    d = [float(t) - float(r) for t, r in zip(target_m, position_m)]
    v0 = [float(x) for x in velocity_mps]
    vt = [float(x) for x in velocity_target_mps]
    dist = _norm3(d[0], d[1], d[2])
    speeds = (_norm3(v0[0], v0[1], v0[2]) + 2.0 * (n - 1) * vehicle.speed_max_mps
              + _norm3(vt[0], vt[1], vt[2]))
    return 2.0 * n * dist / speeds


def impulse_delta_v(vehicle: Vehicle, position_m, velocity_mps, tof_s: float, horizon: int,
                    target_m=(0.0, 0.0, 0.0), velocity_target_mps=(0.0, 0.0, 0.0)) -> float:
    """The least sum of dt |u_k| over every acceleration sequence that meets
    the target at time of flight tof_s, thrust limits aside: a lower bound
    on the delta-v any plan with the target met needs (DEVELOPERS.md,
    "Time-of-flight search").

    Summing the zero-order-hold rows, with U_k = dt u_k and
    c_k = dt (N - k - 1/2): sum U_k = A = v_target - v_0 - g t and
    sum c_k U_k = B = r_target - r_0 - v_0 t - g t^2 / 2. Each c_k lies in
    [c_{N-1}, c_0], so U_k can be split between intervals 0 and N-1 keeping
    both sums and |U_k|, and the triangle inequality merges the parts: the
    least sum of |U_k| is |U_0| + |U_{N-1}| of the unique two-interval
    solution U_0 = (B - c_{N-1} A) / (c_0 - c_{N-1}), U_{N-1} = A - U_0.
    """
    n = int(horizon)
    t = float(tof_s)
    dt = t / n
    g = [float(x) for x in vehicle.gravity_vector]
    a = [0.0, 0.0, 0.0]
    b = [0.0, 0.0, 0.0]
    for i in range(3):
        v0 = float(velocity_mps[i])
        a[i] = float(velocity_target_mps[i]) - v0 - g[i] * t
        b[i] = float(target_m[i]) - float(position_m[i]) - v0 * t - 0.5 * g[i] * t * t
    span = dt * (n - 1)
    first = [(b[i] - 0.5 * dt * a[i]) / span for i in range(3)]
    last = [a[i] - first[i] for i in range(3)]
    return _norm3(first[0], first[1], first[2]) + _norm3(last[0], last[1], last[2])


def target_possible(vehicle: Vehicle, position_m, velocity_mps, mass_kg: float, tof_s: float,
                    horizon: int, target_m=(0.0, 0.0, 0.0),
                    velocity_target_mps=(0.0, 0.0, 0.0)) -> bool:
    """False when the target cannot be met at tof_s: the least delta-v
    (impulse_delta_v) exceeds what the propellant gives,
    dt sum |u_k| <= dt sum sigma_k = c (z_0 - z_N) <= c ln(m_0 / m_dry)."""
    budget = (1.0 / vehicle.mass_flow_per_n) * math.log(mass_kg / vehicle.mass_dry_kg)
    return impulse_delta_v(vehicle, position_m, velocity_mps, tof_s, horizon, target_m,
                           velocity_target_mps) <= budget


class DescentProblem:
    """The parametric SOCP for one vehicle and horizon (every mode)."""

    def __init__(self, vehicle: Vehicle, horizon: int):
        if not isinstance(horizon, int) or isinstance(horizon, bool) or horizon < 2:
            from codegen.errors import InputError
            raise InputError("horizon", horizon, "must be an integer >= 2")
        self.vehicle = vehicle
        self.horizon = horizon
        self.scaling = Scaling.for_vehicle(vehicle)
        self.constants = Constants.of(vehicle, self.scaling)
        self._build()

    def _build(self) -> None:
        n, c = self.horizon, self.constants
        P = {name: cp.Parameter(shape(n) if shape(n) != (1,) else (), name=name)
             for name, shape, _ in PARAMETERS}
        self.params = P
        r = cp.Variable((3, n + 1), name="r")
        v = cp.Variable((3, n + 1), name="v")
        z = cp.Variable(n + 1, name="z")
        u = cp.Variable((3, n), name="u")
        sig = cp.Variable(n, name="sigma")
        # Terminal error (scaled r_N - target, v_N - v_target when kappa = 1),
        # as a (6, 1) column so that no horizon mistakes it for a time axis.
        d = cp.Variable((6, 1), name="terminal_error")
        eps = cp.Variable(name="error_norm")
        self.vars = {"r": r, "v": v, "z": z, "u": u, "sigma": sig, "terminal_error": d,
                     "error_norm": eps}
        g = np.array([0.0, 0.0, c.gravity_up])
        G = np.tile(g[:, None], (1, n))

        cons = [r[:, 0] == P["r0"], v[:, 0] == P["v0"], z[0] == P["z0"]]
        # Zero-order-hold dynamics (exact for the double integrator).
        cons += [
            r[:, 1:] == r[:, :-1] + P["dt"] * v[:, :-1] + P["dt2h"] * (u + G),
            v[:, 1:] == v[:, :-1] + P["dt"] * (u + G),
            z[1:] == z[:-1] - P["adt"] * sig,
        ]
        # Lossless convexification of rho1 <= |T| <= rho2.
        # The other cones below are written as cones (cp.SOC) rather than as
        # norm and square atoms: an atom adds an epigraph variable and a
        # linear row to the canonical program, which every solver then
        # carries (about 50 of each per atom at N = 50). The thrust cone
        # keeps its norm atom: written as a cone it left the native solver in
        # single precision without a solved demo state (0 of 32 against 28
        # of 32; double precision solved both alike).
        cons += [cp.norm(u, 2, axis=0) <= sig]
        # Lower bound at the interval's end, around z_{k+1}^0:
        # p_lo - mu_lo z + (s_lo z - c_lo)^2 <= sigma with z = z_{k+1}, i.e.
        # a^2 <= w with a = s_lo z - c_lo, w = sigma - p_lo + mu_lo z, as the
        # rotated cone || (2a, w - 1) || <= w + 1.
        z_end = z[1:]
        a_lo = cp.multiply(P["s_lo"], z_end) - P["c_lo"]
        w_lo = sig - P["p_lo"] + cp.multiply(P["mu_lo"], z_end)
        cons += [cp.SOC(w_lo + 1.0, cp.vstack([2.0 * a_lo, w_lo - 1.0]), axis=0)]
        # Upper bound at the interval's start, around z_k^0.
        cons += [sig <= P["p_hi"] - cp.multiply(P["mu_hi"], z[:-1])]
        # Mass corridor at nodes 1..N; dry mass at touchdown.
        cons += [z[1:] >= P["zlo"], z[1:] <= P["zhi"], z[n] >= c.z_dry]
        # Pointing (linear in u), speed and glide slope.
        if c.cos_pointing > -1.0:
            cons += [u[2, :] >= c.cos_pointing * sig]
        cons += [cp.SOC(np.full(n - 1, c.speed_max), v[:, 1:n], axis=0)]
        if c.tan_glide_slope > 0.0:
            # Apex of the approach cone: the target, in every mode. Blackmore,
            # Acikmese & Scharf (2010) put it at the landing point when that
            # is free; here that would couple every stage to the last node
            # and cost the native solver its banded KKT structure
            # (tests/test_native_periodic.py), while a best reachable plan
            # near touchdown ends metres from the target. A state below the
            # target's cone therefore has no plan (infeasible).
            rel = r[:, :n] - cp.reshape(P["target"], (3, 1), order="F")
            cons += [cp.SOC(rel[2, :], c.tan_glide_slope * rel[:2, :], axis=0)]
        # Touchdown: at the target with the target's velocity (kappa = 0), or
        # off it by the terminal error (kappa = 1).
        cons += [r[:, n] - P["target"] == P["kappa"] * d[:3, 0],
                 v[:, n] - P["v_target"] == P["kappa"] * d[3:, 0]]
        cons += [cp.SOC(eps, cp.multiply(np.asarray(c.error_weights), d[:, 0])),
                 eps <= P["err_max"]]
        self.problem = cp.Problem(cp.Minimize(P["w_fuel_dt"] * cp.sum(sig) + P["w_err"] * eps),
                                  cons)

    def set_parameters(self, values: dict) -> None:
        for name, p in self.params.items():
            val = values[name]
            p.value = float(val[0]) if p.shape == () else np.asarray(val, float)

    def values(self, position_m, velocity_mps, mass_kg, time_of_flight_s,
               target_m=(0.0, 0.0, 0.0), mode="target", err_max=0.0,
               velocity_target_mps=(0.0, 0.0, 0.0), throttle_max=None) -> dict:
        upper = None if throttle_max is None else \
            self.constants.thrust_upper_at(self.vehicle, throttle_max)
        return parameter_values(self.constants, self.scaling, self.horizon, position_m,
                                velocity_mps, mass_kg, time_of_flight_s, target_m, mode,
                                err_max, velocity_target_mps, upper)

    @cached_property
    def parameter_layout(self) -> list:
        """[(name, offset, size)] of the flat parameter vector."""
        out, off = [], 0
        for name, shape, _ in PARAMETERS:
            size = int(np.prod(shape(self.horizon)))
            out.append((name, off, size))
            off += size
        return out
