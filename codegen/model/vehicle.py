"""The vehicle file: load, validate, describe.

A vehicle file is TOML with SI units in every key name. Validation is strict:
unknown keys (with the nearest known key suggested), missing keys, non-finite
numbers and physically meaningless values are refused with an
:class:`~codegen.errors.InputError` naming the key, the value and the rule.
Values that are legal but suspicious (too little thrust to hover) come back as
warnings on the loaded :class:`Vehicle`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

from codegen.errors import InputError
from codegen.model import plausible
from codegen.fsutil import read_toml
from codegen.errors import finite_number as _number
from codegen.errors import suggest_key as _suggest

#: Standard gravity, exact by definition (3rd CGPM, 1901; BIPM SI Brochure).
G0_MPS2 = 9.80665

# key -> (required, description). Order here is the order of the docs.
#: Name of the invented demo vehicle (examples/demo_vehicle.toml, `pdgc init`):
#: the caution of a tree or report says it is invented only for this one.
DEMO_VEHICLE_NAME = "demo-lander"

VEHICLE_KEYS = {
    "name": (True, "short identifier of the vehicle (letters, digits, - and _)"),
    "mass_wet_kg": (True, "mass with full propellant"),
    "mass_dry_kg": (True, "mass with no usable propellant"),
    "thrust_max_n": (True, "total thrust of all engines at full throttle"),
    "throttle_min": (True, "lowest throttle setting, fraction of thrust_max_n"),
    "throttle_max": (True, "highest throttle setting, fraction of thrust_max_n"),
    "isp_s": (True, "specific impulse"),
    "engine_cant_deg": (False, "cant of the engines from the thrust axis (default 0)"),
    "pointing_max_deg": (True, "largest angle of the thrust axis from vertical"),
    "glide_slope_deg": (True, "smallest elevation of the vehicle seen from the target"),
    "speed_max_mps": (True, "largest speed at any node"),
    "gravity_mps2": (True, "magnitude of the constant gravity, acting along -up"),
}

#: Touchdown requirements (the optional [touchdown] table). Defaults are common
#: practice for a legged lander of the demo's size, not a requirement of any
#: program: set your program's own. They weight the terminal error of a plan
#: that cannot meet the target exactly (an error of 1 = at one limit), and
#: `pdgc simulate` judges landings by them.
TOUCHDOWN_KEYS = {
    "miss_max_m": (False, "largest horizontal distance from the target at touchdown (default 5)"),
    "speed_vertical_max_mps": (False, "largest downward speed at touchdown (default 2)"),
    "speed_horizontal_max_mps": (False, "largest horizontal speed at touchdown (default 1)"),
    "error_position_scale_m": (False, "position error that weighs as much as one speed limit "
                                      "in a plan that cannot meet the target (default 100)"),
}
#: error_position_scale_m: a best-reachable plan trades position against
#: speed at touchdown with this exchange rate; 100 m per speed limit prefers a
#: soft landing off the target to a hard one on it (common practice: the
#: vehicle survives the first, not the second).
TOUCHDOWN_DEFAULTS = {"miss_max_m": 5.0, "speed_vertical_max_mps": 2.0,
                      "speed_horizontal_max_mps": 1.0, "error_position_scale_m": 100.0}

ENVELOPE_KEYS = {
    "position_min_m": (True, "lowest initial position [x, y, up]"),
    "position_max_m": (True, "highest initial position [x, y, up]"),
    "velocity_min_mps": (True, "lowest initial velocity [vx, vy, vup]"),
    "velocity_max_mps": (True, "highest initial velocity [vx, vy, vup]"),
    "mass_min_kg": (False, "lowest initial mass (default: wet mass)"),
    "mass_max_kg": (False, "highest initial mass (default: wet mass)"),
}


@dataclass(frozen=True)
class Envelope:
    """Box of initial states the solver must handle (for checks and campaigns)."""

    position_min_m: tuple
    position_max_m: tuple
    velocity_min_mps: tuple
    velocity_max_mps: tuple
    mass_min_kg: float
    mass_max_kg: float


@dataclass(frozen=True)
class Touchdown:
    """Touchdown requirements: limits on miss and speed at ground contact."""

    miss_max_m: float = TOUCHDOWN_DEFAULTS["miss_max_m"]
    speed_vertical_max_mps: float = TOUCHDOWN_DEFAULTS["speed_vertical_max_mps"]
    speed_horizontal_max_mps: float = TOUCHDOWN_DEFAULTS["speed_horizontal_max_mps"]
    error_position_scale_m: float = TOUCHDOWN_DEFAULTS["error_position_scale_m"]


@dataclass(frozen=True)
class Vehicle:
    """A validated vehicle. All values SI; derived bounds as properties."""

    name: str
    mass_wet_kg: float
    mass_dry_kg: float
    thrust_max_n: float
    throttle_min: float
    throttle_max: float
    isp_s: float
    engine_cant_deg: float
    pointing_max_deg: float
    glide_slope_deg: float
    speed_max_mps: float
    gravity_mps2: float
    #: None when the file has no [envelope]: enough to plan (``pdgc solve``,
    #: see ``at_state``), not to generate, check or run campaigns.
    envelope: Envelope | None
    touchdown: Touchdown = Touchdown()
    source_sha256: str = ""
    warnings: tuple = field(default=(), compare=False)

    # Net thrust bounds along the thrust axis (engine cant loses cos(cant)).
    @property
    def thrust_lower_n(self) -> float:
        return self.throttle_min * self.thrust_max_n * math.cos(math.radians(self.engine_cant_deg))

    @property
    def thrust_upper_n(self) -> float:
        return self.throttle_max * self.thrust_max_n * math.cos(math.radians(self.engine_cant_deg))

    @property
    def mass_flow_per_n(self) -> float:
        """alpha in m' = -alpha |T|: 1/(Isp g0 cos(cant)) (Acikmese & Ploen 2007)."""
        return 1.0 / (self.isp_s * G0_MPS2 * math.cos(math.radians(self.engine_cant_deg)))

    @property
    def gravity_vector(self) -> tuple:
        return (0.0, 0.0, -self.gravity_mps2)

    def at_state(self, position_m, velocity_mps, mass_kg) -> "Vehicle":
        """This vehicle, with the one-point envelope of a start state when it
        has no [envelope] (the problem's scaling needs a length: the start's
        largest coordinate, at least 1 m). A vehicle with an envelope is
        returned as it is."""
        if self.envelope is not None:
            return self
        pos = tuple(float(x) for x in position_m)
        if max(abs(x) for x in pos) < 1.0:
            pos = (pos[0], pos[1], 1.0)
        vel = tuple(float(x) for x in velocity_mps)
        mass = min(max(float(mass_kg), self.mass_dry_kg), self.mass_wet_kg)
        return replace(self, envelope=Envelope(pos, pos, vel, vel, mass, mass))

    def require_envelope(self, what: str) -> Envelope:
        """The envelope, or an InputError saying ``what`` needs it."""
        if self.envelope is None:
            raise InputError("envelope", None, f"missing table [envelope] (box of initial "
                                               f"states): {what} needs it")
        return self.envelope

    def as_dict(self) -> dict:
        out = {k: getattr(self, k) for k in VEHICLE_KEYS}
        if self.envelope is not None:
            out["envelope"] = {k: getattr(self.envelope, k) for k in ENVELOPE_KEYS}
        out["touchdown"] = {k: getattr(self.touchdown, k) for k in TOUCHDOWN_KEYS}
        return out


def _vector3(where: str, value) -> tuple:
    if not isinstance(value, list) or len(value) != 3:
        raise InputError(where, value, "must be a list of three numbers")
    return tuple(_number(f"{where}[{i}]", x) for i, x in enumerate(value))


def _check_keys(table: dict, known: dict, prefix: str) -> None:
    for key in table:
        if key not in known:
            raise InputError(prefix + key, table[key], "unknown key", _suggest(key, known))
    for key, (required, desc) in known.items():
        if required and key not in table:
            raise InputError(prefix + key, None, f"missing required key ({desc})")


def _parse_envelope(env: dict, v: dict) -> dict:
    e = {}
    for k in ("position_min_m", "position_max_m", "velocity_min_mps", "velocity_max_mps"):
        e[k] = _vector3("envelope." + k, env[k])
    for lo, hi in (("position_min_m", "position_max_m"), ("velocity_min_mps", "velocity_max_mps")):
        for i in range(3):
            if e[lo][i] > e[hi][i]:
                raise InputError(f"envelope.{lo}[{i}]", e[lo][i],
                                 f"must be <= envelope.{hi}[{i}] = {e[hi][i]!r}")
    if e["position_min_m"][2] <= 0.0:
        raise InputError("envelope.position_min_m[2]", e["position_min_m"][2],
                         "initial altitude must be > 0 (above the target)")
    for k in ("mass_min_kg", "mass_max_kg"):
        e[k] = _number("envelope." + k, env[k]) if k in env else v["mass_wet_kg"]
        if not v["mass_dry_kg"] < e[k] <= v["mass_wet_kg"]:
            raise InputError("envelope." + k, e[k],
                             f"must lie in (mass_dry_kg, mass_wet_kg] = "
                             f"({v['mass_dry_kg']!r}, {v['mass_wet_kg']!r}]")
    if e["mass_min_kg"] > e["mass_max_kg"]:
        raise InputError("envelope.mass_min_kg", e["mass_min_kg"],
                         f"must be <= envelope.mass_max_kg = {e['mass_max_kg']!r}")

    return e


def parse_vehicle(data: dict, source_sha256: str = "", require_envelope: bool = True) -> Vehicle:
    """Validate a parsed TOML document and return a :class:`Vehicle`.
    ``require_envelope=False``: a file without [envelope] is accepted (its
    Vehicle's envelope is None), for planning only."""
    top = dict(data)
    env = top.pop("envelope", None)
    td = top.pop("touchdown", {})
    _check_keys(top, VEHICLE_KEYS, "")
    if not isinstance(td, dict):
        raise InputError("touchdown", td, "must be a table")
    _check_keys(td, TOUCHDOWN_KEYS, "touchdown.")
    if env is None and require_envelope:
        raise InputError("envelope", None, "missing required table [envelope] (box of initial "
                                           "states): generate, check, envelope, simulate and "
                                           "handoff need it; pdgc solve does not")
    if env is not None and not isinstance(env, dict):
        raise InputError("envelope", env, "must be a table")
    if env is not None:
        _check_keys(env, ENVELOPE_KEYS, "envelope.")

    name = top["name"]
    if not isinstance(name, str) or not name or not all(c.isalnum() or c in "-_" for c in name):
        raise InputError("name", name, "must be a non-empty string of letters, digits, '-' and '_'")
    v = {k: _number(k, top[k]) for k in VEHICLE_KEYS if k != "name" and k in top}
    v.setdefault("engine_cant_deg", 0.0)

    for k in ("mass_wet_kg", "mass_dry_kg", "thrust_max_n", "isp_s", "speed_max_mps", "gravity_mps2"):
        if v[k] <= 0.0:
            raise InputError(k, v[k], "must be > 0")
    if v["mass_dry_kg"] >= v["mass_wet_kg"]:
        raise InputError("mass_dry_kg", v["mass_dry_kg"],
                         f"must be < mass_wet_kg = {v['mass_wet_kg']!r}")
    for k in ("throttle_min", "throttle_max"):
        if not 0.0 < v[k] <= 1.0:
            raise InputError(k, v[k], "must lie in (0, 1]")
    if v["throttle_min"] > v["throttle_max"]:
        raise InputError("throttle_min", v["throttle_min"],
                         f"must be <= throttle_max = {v['throttle_max']!r}")
    if not 0.0 <= v["engine_cant_deg"] < 90.0:
        raise InputError("engine_cant_deg", v["engine_cant_deg"], "must lie in [0, 90)")
    if not 0.0 < v["pointing_max_deg"] <= 180.0:
        raise InputError("pointing_max_deg", v["pointing_max_deg"], "must lie in (0, 180]")
    if not 0.0 <= v["glide_slope_deg"] < 90.0:
        raise InputError("glide_slope_deg", v["glide_slope_deg"], "must lie in [0, 90)")

    e = None if env is None else _parse_envelope(env, v)
    warnings = plausible.check(v, e)

    touchdown = {}
    for k, default in TOUCHDOWN_DEFAULTS.items():
        touchdown[k] = _number("touchdown." + k, td[k]) if k in td else default
        if not touchdown[k] > 0.0:
            raise InputError("touchdown." + k, touchdown[k], "must be > 0")

    cant = math.cos(math.radians(v["engine_cant_deg"]))
    hover_n = v["mass_dry_kg"] * v["gravity_mps2"]
    upper_n = v["throttle_max"] * v["thrust_max_n"] * cant
    if upper_n <= hover_n:
        warnings.append(
            f"thrust_max_n = {v['thrust_max_n']!r}: net thrust at throttle_max "
            f"({upper_n:.6g} N) cannot hover the dry mass ({hover_n:.6g} N): "
            "no soft landing is possible")
    return Vehicle(name=name, envelope=None if e is None else Envelope(**e), touchdown=Touchdown(**touchdown),
                   source_sha256=source_sha256,
                   warnings=tuple(warnings), **v)


def load_vehicle(path, require_envelope: bool = True) -> Vehicle:
    """Read and validate a vehicle file. Raises InputError on any fault.
    ``require_envelope=False``: [envelope] may be absent (planning only)."""
    data, digest = read_toml(path, "vehicle file")
    return parse_vehicle(data, digest, require_envelope)
