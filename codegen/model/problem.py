"""The discretised descent SOCP with parameters: the one source of truth.

Every solver in the project, the Python reference and every generated C
solver, solves the problem built here, and every one of them computes its
parameters with the same rules as :func:`parameter_values` (the C guidance
layer mirrors it line for line).

Formulation (published sources named below; the points decided in code are
listed in DEVELOPERS.md, section "The formulation"):
  change of variables u = T/m, sigma = Gamma/m, z = ln m (Acikmese & Ploen
  2007); thrust bounds convexified losslessly with a second-order lower and a
  first-order upper Taylor bound around z0(t) = ln(m0 - alpha rho2 t);
  pointing as a linear bound on u (Acikmese, Carson & Blackmore 2013); glide
  slope and speed as second-order cones; zero-order hold on u and sigma, which
  is exact for the double integrator.

Everything is scaled to order one: lengths by ``length_m``, accelerations by
``accel_mps2`` (the largest thrust acceleration at wet mass), times by
``time_s = sqrt(length_m / accel_mps2)``, masses by the wet mass (so that
z = ln(m / mass_wet_kg) <= 0).

Problem kinds:
  ``fuel``        least fuel, landing point fixed (the onboard problem);
  ``miss``        least horizontal landing miss (Blackmore et al. 2010, stage 1);
                  the glide-slope cone then has its apex at the landing point;
  ``fuel_within`` least fuel with the miss bounded by a parameter (stage 2).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import cvxpy as cp
import numpy as np

from codegen.model.vehicle import Vehicle

KINDS = ("fuel", "miss", "fuel_within")

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
        )


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
    ("mu_lo", lambda n: (n,), "rho1 exp(-z_k^0), intervals 0..N-1"),
    ("mu_hi", lambda n: (n,), "rho2 exp(-z_k^0)"),
    ("p_lo", lambda n: (n,), "mu_lo (1 + z_k^0)"),
    ("p_hi", lambda n: (n,), "mu_hi (1 + z_k^0)"),
    ("s_lo", lambda n: (n,), "sqrt(mu_lo / 2)"),
    ("c_lo", lambda n: (n,), "s_lo z_k^0"),
    ("miss_max", lambda n: (1,), "bound on the landing miss (fuel_within only)"),
)


def parameter_values(c: Constants, s: Scaling, horizon: int, position_m, velocity_mps,
                     mass_kg: float, time_of_flight_s: float, target_m=(0.0, 0.0, 0.0),
                     miss_max_m: float = 0.0) -> dict:
    """Map physical run-time inputs to scaled parameter values.

    ``z_k^0`` is the Taylor point of interval k: ln(m0 - alpha rho2 t_k) at
    the start of the interval (= z0 at k = 0), floored at the dry mass so that
    the logarithm stays defined past the time the engine could burn out; the
    bounds stay conservative there because z_k >= ln(m_dry) anyway.
    """
    n = horizon
    m0 = mass_kg / s.mass_kg
    tf = time_of_flight_s / s.time_s
    dt = tf / n
    t = dt * np.arange(n + 1)
    floor = c.mass_dry * MASS_FLOOR_FRACTION
    m_lo = np.maximum(m0 - c.mass_flow * c.thrust_upper * t, c.mass_dry)
    m_hi = np.maximum(m0 - c.mass_flow * c.thrust_lower * t, floor)
    z_lo = np.log(m_lo)
    z_lo[0] = math.log(m0)
    zk = z_lo[:n]
    mu_lo = c.thrust_lower * np.exp(-zk)
    mu_hi = c.thrust_upper * np.exp(-zk)
    s_lo = np.sqrt(mu_lo / 2.0)
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
        "p_lo": mu_lo * (1.0 + zk),
        "p_hi": mu_hi * (1.0 + zk),
        "s_lo": s_lo,
        "c_lo": s_lo * zk,
        "miss_max": np.array([miss_max_m / s.length_m]),
    }


def time_of_flight_bracket(vehicle: Vehicle, position_m, velocity_mps, mass_kg):
    """Search bracket for the time of flight (Acikmese & Ploen 2007).

    t_min = (m0 - m_dry) |v0| / rho2 and t_max = (m0 - m_dry) / (alpha rho1),
    with the current mass m0 in place of the wet mass.
    """
    fuel = mass_kg - vehicle.mass_dry_kg
    speed = float(np.linalg.norm(velocity_mps))
    t_min = fuel * speed / vehicle.thrust_upper_n
    t_max = fuel / (vehicle.mass_flow_per_n * vehicle.thrust_lower_n)
    return t_min, t_max


class DescentProblem:
    """The parametric SOCP of one kind for one vehicle and horizon."""

    def __init__(self, vehicle: Vehicle, horizon: int, kind: str = "fuel"):
        if kind not in KINDS:
            raise ValueError(f"kind = {kind!r}: must be one of {', '.join(KINDS)}")
        if not isinstance(horizon, int) or isinstance(horizon, bool) or horizon < 2:
            from codegen.errors import InputError
            raise InputError("horizon", horizon, "must be an integer >= 2")
        self.vehicle = vehicle
        self.horizon = horizon
        self.kind = kind
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
        self.vars = {"r": r, "v": v, "z": z, "u": u, "sigma": sig}
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
        zk = z[:-1]
        # p_lo - mu_lo z + (s_lo z - c_lo)^2 <= sigma, i.e. a^2 <= w with
        # a = s_lo z - c_lo, w = sigma - p_lo + mu_lo z, as the rotated cone
        # || (2a, w - 1) || <= w + 1.
        a_lo = cp.multiply(P["s_lo"], zk) - P["c_lo"]
        w_lo = sig - P["p_lo"] + cp.multiply(P["mu_lo"], zk)
        cons += [cp.SOC(w_lo + 1.0, cp.vstack([2.0 * a_lo, w_lo - 1.0]), axis=0)]
        cons += [sig <= P["p_hi"] - cp.multiply(P["mu_hi"], zk)]
        # Mass corridor at nodes 1..N; dry mass at touchdown.
        cons += [z[1:] >= P["zlo"], z[1:] <= P["zhi"], z[n] >= c.z_dry]
        # Pointing (linear in u), speed and glide slope.
        if c.cos_pointing > -1.0:
            cons += [u[2, :] >= c.cos_pointing * sig]
        cons += [cp.SOC(np.full(n - 1, c.speed_max), v[:, 1:n], axis=0)]
        if c.tan_glide_slope > 0.0:
            # Apex of the approach cone: the target when the landing point is
            # fixed; the actual landing point when it is free (the terrain the
            # cone protects is where the vehicle lands).
            apex = P["target"] if self.kind == "fuel" else r[:, n]
            rel = r[:, :n] - cp.reshape(apex, (3, 1), order="F")
            cons += [cp.SOC(rel[2, :], c.tan_glide_slope * rel[:2, :], axis=0)]
        # Touchdown: at rest, on the target's altitude.
        cons += [v[:, n] == 0, r[2, n] == P["target"][2]]
        miss = cp.norm(r[:2, n] - P["target"][:2], 2)
        fuel = P["dt"] * cp.sum(sig)
        if self.kind == "fuel":
            cons += [r[:2, n] == P["target"][:2]]
            obj = fuel
        elif self.kind == "miss":
            obj = miss
        else:
            cons += [miss <= P["miss_max"]]
            obj = fuel
        self.problem = cp.Problem(cp.Minimize(obj), cons)

    def set_parameters(self, values: dict) -> None:
        for name, p in self.params.items():
            val = values[name]
            p.value = float(val[0]) if p.shape == () else np.asarray(val, float)

    def values(self, position_m, velocity_mps, mass_kg, time_of_flight_s,
               target_m=(0.0, 0.0, 0.0), miss_max_m=0.0) -> dict:
        return parameter_values(self.constants, self.scaling, self.horizon, position_m,
                                velocity_mps, mass_kg, time_of_flight_s, target_m, miss_max_m)

    @cached_property
    def parameter_layout(self) -> list:
        """[(name, offset, size)] of the flat parameter vector."""
        out, off = [], 0
        for name, shape, _ in PARAMETERS:
            size = int(np.prod(shape(self.horizon)))
            out.append((name, off, size))
            off += size
        return out
