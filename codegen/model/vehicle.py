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
    #: Booster additions (issue 19): drag, atmosphere, thrust-rate limit,
    #: final vertical approach; None when the file has none of them.
    booster: "Booster | None" = None

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
        if self.booster is not None:
            out.update(self.booster.as_dict())
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
    booster_raw = _pop_booster_keys(top)
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
    booster = _parse_booster(booster_raw, v, e, warnings)
    return Vehicle(name=name, envelope=None if e is None else Envelope(**e), touchdown=Touchdown(**touchdown),
                   source_sha256=source_sha256,
                   warnings=tuple(warnings), booster=booster, **v)


def load_vehicle(path, require_envelope: bool = True) -> Vehicle:
    """Read and validate a vehicle file. Raises InputError on any fault.
    ``require_envelope=False``: [envelope] may be absent (planning only)."""
    data, digest = read_toml(path, "vehicle file")
    return parse_vehicle(data, digest, require_envelope)


# ---------------------------------------------------------------------------
# Booster additions (issue 19): all optional. A file with none of them is
# the lander of the sections above and loads exactly as before.
# ---------------------------------------------------------------------------

#: Top-level keys of the booster additions (beside VEHICLE_KEYS).
BOOSTER_TOP_KEYS = {
    "thrust_rate_max_nps": (False, "largest change of thrust magnitude per second between "
                                   "consecutive intervals"),
}
#: The optional tables and their keys.
DRAG_KEYS = {
    "drag_area_m2": (False, "drag coefficient times reference area (constant drag coefficient)"),
    "reference_area_m2": (False, "reference area of a drag coefficient table"),
    "mach": (False, "Mach numbers of the table, strictly increasing, from >= 0"),
    "drag_coefficient": (False, "drag coefficient at each Mach number of the table"),
}
ATMOSPHERE_KEYS = {
    "model": (True, "'standard_1976' (U.S. Standard Atmosphere, 1976) or 'exponential'"),
    "site_altitude_m": (False, "altitude of the frame's origin above mean sea level (default 0)"),
    "density_sea_level_kgpm3": (False, "exponential model: density at sea level"),
    "scale_height_m": (False, "exponential model: density scale height"),
    "sound_speed_mps": (False, "exponential model: speed of sound (needed by a Mach table)"),
}
FINAL_APPROACH_KEYS = {
    "duration_s": (True, "length of the final approach before touchdown"),
    "cone_half_angle_deg": (False, "in the final approach, largest angle from the vertical "
                                   "above the pad"),
    "altitude_min_m": (False, "before the final approach, lowest height above the pad"),
}
BOOSTER_TABLES = {"drag": DRAG_KEYS, "atmosphere": ATMOSPHERE_KEYS,
                  "final_approach": FINAL_APPROACH_KEYS}
ATMOSPHERE_MODELS = ("standard_1976", "exponential")


@dataclass(frozen=True)
class Drag:
    """Drag D = -1/2 rho |v| v Cd(M) A, air at rest in the landing frame.
    Constant: ``mach`` empty and ``drag_coefficient = (cd,)``, area so that
    cd * area = drag_area_m2 (area 1). Table: linear in Mach between the
    points, held at its ends."""

    reference_area_m2: float
    mach: tuple
    drag_coefficient: tuple

    @property
    def is_table(self) -> bool:
        return len(self.mach) > 0

    @property
    def is_zero(self) -> bool:
        return self.reference_area_m2 == 0.0 or max(self.drag_coefficient) == 0.0


@dataclass(frozen=True)
class Atmosphere:
    model: str
    site_altitude_m: float = 0.0
    density_sea_level_kgpm3: float = math.nan
    scale_height_m: float = math.nan
    sound_speed_mps: float = math.nan


@dataclass(frozen=True)
class FinalApproach:
    """The last ``duration_s`` seconds: inside a vertical cone over the pad
    (``cone_half_angle_deg``) or, before them, above ``altitude_min_m``."""

    duration_s: float
    cone_half_angle_deg: float = math.nan
    altitude_min_m: float = math.nan


@dataclass(frozen=True)
class Booster:
    drag: Drag | None = None
    atmosphere: Atmosphere | None = None
    thrust_rate_max_nps: float | None = None
    final_approach: FinalApproach | None = None

    @property
    def has_drag(self) -> bool:
        return self.drag is not None and not self.drag.is_zero

    def as_dict(self) -> dict:
        out = {}
        if self.thrust_rate_max_nps is not None:
            out["thrust_rate_max_nps"] = self.thrust_rate_max_nps
        if self.drag is not None:
            d = self.drag
            out["drag"] = ({"reference_area_m2": d.reference_area_m2, "mach": list(d.mach),
                            "drag_coefficient": list(d.drag_coefficient)} if d.is_table
                           else {"drag_area_m2": d.reference_area_m2 * d.drag_coefficient[0]})
        if self.atmosphere is not None:
            out["atmosphere"] = {k: getattr(self.atmosphere, k) for k in ATMOSPHERE_KEYS
                                 if not (isinstance(getattr(self.atmosphere, k), float)
                                         and math.isnan(getattr(self.atmosphere, k)))}
        if self.final_approach is not None:
            out["final_approach"] = {k: getattr(self.final_approach, k) for k in FINAL_APPROACH_KEYS
                                     if not math.isnan(getattr(self.final_approach, k))}
        return out


def _pop_booster_keys(top: dict) -> dict:
    """Take the booster additions out of the top-level table (so that the
    lander's key check sees only its own keys)."""
    out = {}
    for key in list(BOOSTER_TOP_KEYS) + list(BOOSTER_TABLES):
        if key in top:
            out[key] = top.pop(key)
    return out


def _number_list(where: str, value) -> tuple:
    if not isinstance(value, list) or len(value) < 2:
        raise InputError(where, value, "must be a list of at least two numbers")
    return tuple(_number(f"{where}[{i}]", x) for i, x in enumerate(value))


def _parse_booster(raw: dict, v: dict, e: dict, warnings: list):
    """Validate the booster additions; None when the file has none."""
    if not raw:
        return None
    tables = {}
    for name, known in BOOSTER_TABLES.items():
        if name in raw:
            if not isinstance(raw[name], dict):
                raise InputError(name, raw[name], "must be a table")
            _check_keys(raw[name], known, name + ".")
            tables[name] = raw[name]

    rate = None
    if "thrust_rate_max_nps" in raw:
        rate = _number("thrust_rate_max_nps", raw["thrust_rate_max_nps"])
        if not rate > 0.0:
            raise InputError("thrust_rate_max_nps", rate, "must be > 0")

    atmosphere = None
    if "atmosphere" in tables:
        a = tables["atmosphere"]
        model = a["model"]
        if model not in ATMOSPHERE_MODELS:
            raise InputError("atmosphere.model", model,
                             f"must be one of {', '.join(repr(m) for m in ATMOSPHERE_MODELS)}")
        site = _number("atmosphere.site_altitude_m", a.get("site_altitude_m", 0.0))
        vals = {}
        exp_keys = ("density_sea_level_kgpm3", "scale_height_m", "sound_speed_mps")
        for k in exp_keys:
            if k in a:
                if model != "exponential":
                    raise InputError("atmosphere." + k, a[k],
                                     "only for model = 'exponential' (the 1976 standard "
                                     "fixes it)")
                vals[k] = _number("atmosphere." + k, a[k])
                if not vals[k] > 0.0:
                    raise InputError("atmosphere." + k, vals[k], "must be > 0")
        if model == "exponential":
            for k in exp_keys[:2]:
                if k not in vals:
                    raise InputError("atmosphere." + k, None,
                                     f"missing: required by model = 'exponential' "
                                     f"({ATMOSPHERE_KEYS[k][1]})")
        else:
            from codegen.model.atmosphere import ALTITUDE_MAX_M, ALTITUDE_MIN_M
            # Without [envelope] (planning only) the flight's top is not known here.
            top_m = site + (e["position_max_m"][2] if e is not None else 0.0)
            if not ALTITUDE_MIN_M <= site <= ALTITUDE_MAX_M:
                raise InputError("atmosphere.site_altitude_m", site,
                                 f"must lie in [{ALTITUDE_MIN_M:g}, {ALTITUDE_MAX_M:g}] m, "
                                 "the range of the 1976 standard atmosphere")
            if top_m > ALTITUDE_MAX_M:
                raise InputError("atmosphere.site_altitude_m", site,
                                 f"with envelope.position_max_m[2] the flight reaches "
                                 f"{top_m:g} m above sea level, above the 1976 standard "
                                 f"atmosphere's {ALTITUDE_MAX_M:g} m")
        atmosphere = Atmosphere(model=model, site_altitude_m=site, **vals)

    drag = None
    if "drag" in tables:
        d = tables["drag"]
        if atmosphere is None:
            raise InputError("drag", d, "needs an [atmosphere] table (the density it acts in)")
        table_keys = ("reference_area_m2", "mach", "drag_coefficient")
        if "drag_area_m2" in d:
            for k in table_keys:
                if k in d:
                    raise InputError("drag." + k, d[k],
                                     "give drag_area_m2 or a table (reference_area_m2, mach, "
                                     "drag_coefficient), not both")
            cda = _number("drag.drag_area_m2", d["drag_area_m2"])
            if not cda >= 0.0:
                raise InputError("drag.drag_area_m2", cda, "must be >= 0")
            drag = Drag(reference_area_m2=1.0, mach=(), drag_coefficient=(cda,))
        else:
            for k in table_keys:
                if k not in d:
                    raise InputError("drag." + k, None,
                                     "missing: give drag_area_m2, or all of reference_area_m2, "
                                     "mach and drag_coefficient")
            area = _number("drag.reference_area_m2", d["reference_area_m2"])
            if not area > 0.0:
                raise InputError("drag.reference_area_m2", area, "must be > 0")
            mach = _number_list("drag.mach", d["mach"])
            cd = _number_list("drag.drag_coefficient", d["drag_coefficient"])
            if len(cd) != len(mach):
                raise InputError("drag.drag_coefficient", d["drag_coefficient"],
                                 f"must have as many entries as drag.mach ({len(mach)})")
            if mach[0] < 0.0:
                raise InputError("drag.mach[0]", mach[0], "must be >= 0")
            for i in range(1, len(mach)):
                if not mach[i] > mach[i - 1]:
                    raise InputError(f"drag.mach[{i}]", mach[i],
                                     f"must be > drag.mach[{i - 1}] = {mach[i - 1]!r} "
                                     "(strictly increasing)")
            for i, x in enumerate(cd):
                if x < 0.0:
                    raise InputError(f"drag.drag_coefficient[{i}]", x, "must be >= 0")
            if atmosphere.model == "exponential" and math.isnan(atmosphere.sound_speed_mps):
                raise InputError("atmosphere.sound_speed_mps", None,
                                 "missing: a drag table by Mach number needs the speed of "
                                 "sound of the exponential model")
            drag = Drag(reference_area_m2=area, mach=mach, drag_coefficient=cd)
    elif atmosphere is not None:
        warnings.append("[atmosphere] given without [drag]: it has no effect on the plan")

    approach = None
    if "final_approach" in tables:
        f = tables["final_approach"]
        dur = _number("final_approach.duration_s", f["duration_s"])
        if not dur > 0.0:
            raise InputError("final_approach.duration_s", dur, "must be > 0")
        given = [k for k in ("cone_half_angle_deg", "altitude_min_m") if k in f]
        if len(given) != 1:
            raise InputError("final_approach", f,
                             "must give exactly one of cone_half_angle_deg and altitude_min_m")
        k = given[0]
        x = _number("final_approach." + k, f[k])
        if k == "cone_half_angle_deg" and not 0.0 < x < 90.0:
            raise InputError("final_approach.cone_half_angle_deg", x, "must lie in (0, 90)")
        if k == "altitude_min_m":
            if not x > 0.0:
                raise InputError("final_approach.altitude_min_m", x, "must be > 0")
            if e is not None and x >= e["position_min_m"][2]:
                raise InputError("final_approach.altitude_min_m", x,
                                 f"must be < envelope.position_min_m[2] = "
                                 f"{e['position_min_m'][2]!r} (the lowest start)")
        approach = FinalApproach(duration_s=dur, **{k: x})
    return Booster(drag=drag, atmosphere=atmosphere, thrust_rate_max_nps=rate,
                   final_approach=approach)
