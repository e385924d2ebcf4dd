"""The dispersion file: how the initial states of an envelope campaign are drawn.

A dispersion file is TOML, beside the vehicle file, with SI units in the table
names. Every scalar quantity is one distribution::

    seed = 20261202
    time_of_flight_s = "search"          # or a distribution table

    [position_m.x]                       # components x, y, up (the vehicle frame)
    distribution = "uniform"
    low = 1000.0
    high = 2000.0

    [position_m.up]
    distribution = "truncated_normal"
    mean = 1500.0
    std = 150.0
    low = 1200.0
    high = 1800.0

    [thrust_derate]                      # optional: fraction of thrust_max_n
    distribution = "uniform"
    low = 0.9
    high = 1.0

Distributions: ``fixed`` (``value``), ``uniform`` (``low`` < ``high``),
``normal`` (``mean``, ``std`` > 0), ``truncated_normal`` (``mean``, ``std`` >
0, ``low`` < ``high``). Quantities whose range has a physical limit (altitude,
mass, time of flight, derating) must be bounded (fixed, uniform or truncated
normal) and their bounds must respect the limit, so that no drawn case is
meaningless. A missing component is an error: a campaign says what it draws.

Drawing is by inverse transform: case ``i`` of a campaign with seed ``s``
takes its uniforms from ``numpy.random.default_rng([s, i])``, one per
component in the fixed order of :data:`COMPONENTS` (fixed values consume theirs
too). So a case depends on (seed, case index) alone, never on the engine, the
worker count, the order of completion or a resumption.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from codegen.errors import InputError
from codegen.fsutil import read_toml
from codegen.model import plausible
from codegen.errors import finite_number as _number
from codegen.errors import suggest_key as _suggest

DISTRIBUTIONS = {
    "fixed": ("value",),
    "uniform": ("low", "high"),
    "normal": ("mean", "std"),
    "truncated_normal": ("mean", "std", "low", "high"),
}

AXES = ("x", "y", "up")

#: Every drawn component, in drawing order. (table, component or None)
COMPONENTS = (
    [("position_m", a) for a in AXES]
    + [("velocity_mps", a) for a in AXES]
    + [("mass_kg", None), ("time_of_flight_s", None), ("thrust_derate", None)]
)

TOP_KEYS = {
    "seed": (False, "integer seed of the campaign (default 0; --seed overrides it)"),
    "position_m": (True, "table with x, y, up: initial position in the landing-site frame"),
    "velocity_mps": (True, "table with x, y, up: initial velocity"),
    "mass_kg": (True, "distribution of the initial mass"),
    "time_of_flight_s": (False, '"search" (default) or a distribution of the time of flight'),
    "thrust_derate": (False, "distribution of the fraction of thrust_max_n available (0, 1]"),
}

#: Smallest probability a truncated normal may keep between its bounds.
TRUNCATION_MASS_MIN = 1e-6


@dataclass(frozen=True)
class Distribution:
    """One scalar distribution, validated."""

    kind: str
    value: float = math.nan
    low: float = math.nan
    high: float = math.nan
    mean: float = math.nan
    std: float = math.nan

    @property
    def bounded(self) -> bool:
        return self.kind != "normal"

    @property
    def support(self) -> tuple:
        """(lowest, highest) value that can be drawn."""
        if self.kind == "fixed":
            return (self.value, self.value)
        if self.kind == "normal":
            return (-math.inf, math.inf)
        return (self.low, self.high)

    def draw(self, u: float) -> float:
        """Map a uniform ``u`` in [0, 1) to a sample (inverse transform)."""
        if self.kind == "fixed":
            return self.value
        if self.kind == "uniform":
            return self.low + u * (self.high - self.low)
        if self.kind == "normal":
            # ndtri(0) = -inf; numpy's random() can return exactly 0.
            return self.mean + self.std * float(special.ndtri(max(u, 1e-300)))
        # Truncated normal, drawn on the side of the mean farther from the
        # tails so that the complement keeps its precision.
        a = (self.low - self.mean) / self.std
        b = (self.high - self.mean) / self.std
        if a > 0.0:   # both bounds above the mean: work with the upper tail
            qa, qb = special.ndtr(-a), special.ndtr(-b)
            x = -float(special.ndtri(qa - u * (qa - qb)))
        else:
            pa, pb = special.ndtr(a), special.ndtr(b)
            x = float(special.ndtri(pa + u * (pb - pa)))
        return min(max(self.mean + self.std * x, self.low), self.high)

    def describe(self) -> str:
        if self.kind == "fixed":
            return f"fixed {self.value:g}"
        if self.kind == "uniform":
            return f"uniform [{self.low:g}, {self.high:g}]"
        if self.kind == "normal":
            return f"normal mean {self.mean:g} std {self.std:g}"
        return f"normal mean {self.mean:g} std {self.std:g} truncated to [{self.low:g}, {self.high:g}]"

    def as_dict(self) -> dict:
        out = {"distribution": self.kind}
        for k in DISTRIBUTIONS[self.kind]:
            out[k] = getattr(self, k)
        return out


@dataclass(frozen=True)
class Case:
    """The inputs of one case of a campaign, SI units."""

    index: int
    position_m: tuple
    velocity_mps: tuple
    mass_kg: float
    time_of_flight_s: float | None
    thrust_derate: float | None

    def as_dict(self) -> dict:
        return {"position_m": list(self.position_m), "velocity_mps": list(self.velocity_mps),
                "mass_kg": self.mass_kg, "time_of_flight_s": self.time_of_flight_s,
                "thrust_derate": self.thrust_derate}


@dataclass(frozen=True)
class Dispersions:
    """A validated dispersion file."""

    seed: int
    position_m: tuple          # three Distributions, x, y, up
    velocity_mps: tuple
    mass_kg: Distribution
    time_of_flight_s: Distribution | None   # None: searched
    thrust_derate: Distribution | None      # None: full thrust
    source_sha256: str = ""

    def component(self, table: str, axis):
        if axis is None:
            return getattr(self, table)
        return getattr(self, table)[AXES.index(axis)]

    def with_seed(self, seed: int) -> "Dispersions":
        from dataclasses import replace
        return replace(self, seed=check_seed("--seed", seed))

    def case(self, index: int) -> Case:
        """Draw case ``index``: a function of (seed, index) only."""
        if isinstance(index, bool) or not isinstance(index, (int, np.integer)) or index < 0:
            raise InputError("case index", index, "must be an integer >= 0")
        rng = np.random.default_rng([self.seed, int(index)])
        u = rng.random(len(COMPONENTS))
        vals = {}
        for k, (table, axis) in enumerate(COMPONENTS):
            dist = self.component(table, axis)
            vals[(table, axis)] = None if dist is None else float(dist.draw(float(u[k])))
        return Case(index=int(index),
                    position_m=tuple(vals[("position_m", a)] for a in AXES),
                    velocity_mps=tuple(vals[("velocity_mps", a)] for a in AXES),
                    mass_kg=vals[("mass_kg", None)],
                    time_of_flight_s=vals[("time_of_flight_s", None)],
                    thrust_derate=vals[("thrust_derate", None)])

    def as_dict(self) -> dict:
        return {
            "seed": self.seed,
            "position_m": {a: d.as_dict() for a, d in zip(AXES, self.position_m)},
            "velocity_mps": {a: d.as_dict() for a, d in zip(AXES, self.velocity_mps)},
            "mass_kg": self.mass_kg.as_dict(),
            "time_of_flight_s": "search" if self.time_of_flight_s is None
            else self.time_of_flight_s.as_dict(),
            "thrust_derate": None if self.thrust_derate is None else self.thrust_derate.as_dict(),
        }


# -- validation ---------------------------------------------------------------

def check_seed(where: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise InputError(where, value, "must be an integer")
    if not 0 <= int(value) < 2**63:
        raise InputError(where, value, "must lie in [0, 2**63)")
    return int(value)


def parse_distribution(where: str, table) -> Distribution:
    """Validate one distribution table; ``where`` names it in errors."""
    if not isinstance(table, dict):
        raise InputError(where, table, "must be a table with a 'distribution' key",
                         'for example { distribution = "uniform", low = 0.0, high = 1.0 }')
    if "distribution" not in table:
        raise InputError(where + ".distribution", None,
                         "missing required key (one of " + ", ".join(DISTRIBUTIONS) + ")")
    kind = table["distribution"]
    if kind not in DISTRIBUTIONS:
        raise InputError(where + ".distribution", kind,
                         "must be one of " + ", ".join(DISTRIBUTIONS), _suggest(kind, DISTRIBUTIONS))
    needed = DISTRIBUTIONS[kind]
    for key in table:
        if key != "distribution" and key not in needed:
            raise InputError(f"{where}.{key}", table[key],
                             f"unknown key for a {kind} distribution (takes {', '.join(needed)})",
                             _suggest(key, needed))
    for key in needed:
        if key not in table:
            raise InputError(f"{where}.{key}", None,
                             f"missing required key of a {kind} distribution")
    v = {k: _number(f"{where}.{k}", table[k]) for k in needed}
    if "std" in v and v["std"] <= 0.0:
        raise InputError(f"{where}.std", v["std"], "must be > 0")
    if "low" in v and not v["low"] < v["high"]:
        raise InputError(f"{where}.low", v["low"], f"must be < {where}.high = {v['high']!r}")
    if kind == "truncated_normal":
        a = (v["low"] - v["mean"]) / v["std"]
        b = (v["high"] - v["mean"]) / v["std"]
        kept = float(special.ndtr(b) - special.ndtr(a)) if a <= 0 else \
            float(special.ndtr(-a) - special.ndtr(-b))
        if not kept >= TRUNCATION_MASS_MIN:
            raise InputError(f"{where}.mean", v["mean"],
                             f"leaves probability {kept:.3g} between low and high; "
                             f"must keep at least {TRUNCATION_MASS_MIN:g} (bounds far in a tail)")
    return Distribution(kind=kind, **v)


def _require_support(where: str, dist: Distribution, lo: float, hi: float, rule: str,
                     lo_open: bool = True, hi_open: bool = False) -> None:
    if not dist.bounded:
        raise InputError(where + ".distribution", dist.kind,
                         f"must be bounded (fixed, uniform or truncated_normal): {rule}")
    s_lo, s_hi = dist.support
    bad_lo = s_lo <= lo if lo_open else s_lo < lo
    bad_hi = s_hi >= hi if hi_open else s_hi > hi
    if bad_lo or bad_hi:
        key = "value" if dist.kind == "fixed" else ("low" if bad_lo else "high")
        raise InputError(f"{where}.{key}", getattr(dist, key), rule)


#: The smallest uniform a draw can see is 1e-300 (Distribution.draw), and
#: -ndtri(1e-300) < 38: the widest normal draw is mean +- 38 std.
NORMAL_REACH_STD = 38.0
#: Largest magnitude a drawn quantity may reach: the vehicle file's
#: plausibility bounds (codegen/model/plausible.py) for positions and
#: velocities; for a time of flight, 1e6 s (11 days: powered descent lasts
#: seconds to minutes, common practice). Beyond them a draw overflowed the
#: records (JSON has no inf), the figures and the solvers.
MAGNITUDE_MAX = {"position_m": plausible.POSITION_HARD_M,
                 "velocity_mps": plausible.BOUNDS["speed_max_mps"][1],
                 "mass_kg": plausible.BOUNDS["mass_wet_kg"][1],
                 "time_of_flight_s": 1e6, "thrust_derate": 1.0}


def _require_magnitude(where: str, dist: Distribution, limit: float) -> None:
    """Every value the distribution can draw lies within +-limit."""
    if dist.kind == "fixed":
        widest, key = abs(dist.value), "value"
    elif dist.kind == "uniform":
        widest, key = max(abs(dist.low), abs(dist.high)), "low" if abs(dist.low) > abs(dist.high) \
            else "high"
    else:
        widest, key = abs(dist.mean) + NORMAL_REACH_STD * dist.std, "std"
        if dist.kind == "truncated_normal" and math.isfinite(widest):
            widest, key = max(abs(dist.low), abs(dist.high)), "low" if abs(dist.low) > \
                abs(dist.high) else "high"
    if not widest <= limit:
        shown = getattr(dist, key)
        rule = (f"draws must stay within +-{limit:g} (plausibility bound); this distribution "
                f"reaches {widest:.3g}")
        if key == "std":
            rule += f" (|mean| + {NORMAL_REACH_STD:g} std, the widest normal draw)"
        raise InputError(f"{where}.{key}", shown, rule)


def parse_dispersions(data: dict, vehicle=None, source_sha256: str = "") -> Dispersions:
    """Validate a parsed dispersion document.

    With a vehicle, the mass range is checked against its masses too.
    """
    if not isinstance(data, dict):
        raise InputError("dispersion file", data, "must be a TOML table")
    for key in data:
        if key not in TOP_KEYS:
            raise InputError(key, data[key], "unknown key", _suggest(key, TOP_KEYS))
    for key, (required, desc) in TOP_KEYS.items():
        if required and key not in data:
            raise InputError(key, None, f"missing required key ({desc})")
    seed = check_seed("seed", data.get("seed", 0))

    vectors = {}
    for table in ("position_m", "velocity_mps"):
        t = data[table]
        if not isinstance(t, dict) or "distribution" in t:
            raise InputError(table, t, "must be a table with one distribution for each of x, y, up",
                             f"for example [{table}.x]")
        for key in t:
            if key not in AXES:
                raise InputError(f"{table}.{key}", t[key], "unknown component (x, y, up)",
                                 _suggest(key, AXES))
        for a in AXES:
            if a not in t:
                raise InputError(f"{table}.{a}", None, "missing component: give a distribution "
                                 "(fixed, uniform, normal or truncated_normal)")
        vectors[table] = tuple(parse_distribution(f"{table}.{a}", t[a]) for a in AXES)
        for a, dist in zip(AXES, vectors[table]):
            _require_magnitude(f"{table}.{a}", dist, MAGNITUDE_MAX[table])
    _require_support("position_m.up", vectors["position_m"][2], 0.0, math.inf,
                     "initial altitude must be > 0 (above the target)")

    mass = parse_distribution("mass_kg", data["mass_kg"])
    _require_magnitude("mass_kg", mass, MAGNITUDE_MAX["mass_kg"])
    if vehicle is not None:
        _require_support("mass_kg", mass, vehicle.mass_dry_kg, vehicle.mass_wet_kg,
                         f"must lie in (mass_dry_kg, mass_wet_kg] = "
                         f"({vehicle.mass_dry_kg!r}, {vehicle.mass_wet_kg!r}]")
    else:
        _require_support("mass_kg", mass, 0.0, math.inf, "must be > 0")

    tof_raw = data.get("time_of_flight_s", "search")
    if isinstance(tof_raw, str):
        if tof_raw != "search":
            raise InputError("time_of_flight_s", tof_raw,
                             'must be "search" or a distribution table', _suggest(tof_raw, ["search"]))
        tof = None
    else:
        tof = parse_distribution("time_of_flight_s", tof_raw)
        _require_magnitude("time_of_flight_s", tof, MAGNITUDE_MAX["time_of_flight_s"])
        _require_support("time_of_flight_s", tof, 0.0, math.inf, "must be > 0")

    derate = None
    if "thrust_derate" in data:
        derate = parse_distribution("thrust_derate", data["thrust_derate"])
        _require_support("thrust_derate", derate, 0.0, 1.0,
                         "must lie in (0, 1] (fraction of thrust_max_n available)")
    return Dispersions(seed=seed, position_m=vectors["position_m"],
                       velocity_mps=vectors["velocity_mps"], mass_kg=mass,
                       time_of_flight_s=tof, thrust_derate=derate, source_sha256=source_sha256)


def load_dispersions(path, vehicle=None) -> Dispersions:
    """Read and validate a dispersion file. Raises InputError on any fault."""
    data, digest = read_toml(path, "dispersion file")
    return parse_dispersions(data, vehicle, digest)
