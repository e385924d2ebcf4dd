"""Plausibility of a vehicle's magnitudes: absurd values refused, unusual ones warned.

The structural rules (mass_dry_kg < mass_wet_kg, a throttle in (0, 1], ...)
are in vehicle.py. These bounds catch a value that is legal but cannot be
meant: a thrust of 1e308 N, an Isp of 1e-300 s. Such a file used to build a
tree whose every plan then failed; the solver's scaling (problem.Scaling)
divides and multiplies these numbers, and far outside the ranges below the
scaled problem loses every significant digit.

Each key has a hard range (outside it the file is refused, the rule in the
message) and a usual range (outside it a warning on the loaded Vehicle).
The hard ranges are wide on purpose: a factor of about ten to a hundred
beyond anything built, so that no real design is refused. The basis of each
is in ``BOUNDS``; the figures of real propulsion and gravity are values of
the trade recalled from memory (common practice), not taken from a
particular document, and are only orders of magnitude.
"""

from __future__ import annotations

import math

from codegen.errors import InputError

#: key -> (hard low, hard high, usual low, usual high, basis). Open lower
#: bound: the structural rule (> 0) is vehicle.py's; a hard low here is
#: inclusive.
BOUNDS = {
    "mass_wet_kg": (1e-2, 1e8, 1.0, 1e7,
                    "the heaviest rockets built weigh under 1e7 kg at lift-off (order of magnitude, "
                    "recalled from memory)"),
    "mass_dry_kg": (1e-2, 1e8, 1.0, 1e7, "as mass_wet_kg"),
    "thrust_max_n": (1e-3, 1e9, 1.0, 1e8,
                     "the largest first stages make under 1e8 N (order of magnitude, recalled "
                     "from memory); a value near 1000 times too small is often kN typed as N"),
    "isp_s": (1.0, 1e5, 30.0, 500.0,
              "chemical engines: about 30 s (cold gas) to 470 s (hydrogen-oxygen); electric "
              "propulsion reaches about 1e4 s (recalled from memory)"),
    "gravity_mps2": (1e-6, 1e3, 0.05, 30.0,
                     "planets and moons of the solar system: about 0.1 to 25 m/s^2; small bodies "
                     "below, where constant gravity is a poor model (recalled from memory)"),
    "speed_max_mps": (1e-3, 1e5, 1.0, 1e4,
                      "orbital speeds are under 1e4 m/s for bodies one lands on (recalled "
                      "from memory)"),
}

#: Envelope coordinates: powered descent starts within some tens of km of
#: the target (common practice); beyond 1e7 m the flat-ground, constant
#: gravity model of the formulation is meaningless (Earth's radius is 6.4e6 m).
POSITION_HARD_M = 1e7
POSITION_USUAL_M = 1e5
#: Thrust-to-weight at wet mass, at full throttle: above 100 the numbers are
#: more likely a unit slip than a lander (common practice: landers and
#: boosters fly at 1 to 10).
THRUST_TO_WEIGHT_USUAL = 100.0
#: Wet over dry mass: above 50 no staged vehicle has flown one stage
#: (single stages are under 30; recalled from memory).
MASS_RATIO_USUAL = 50.0


def check(values: dict, envelope: dict | None) -> list:
    """Refuse absurd magnitudes (InputError); return warnings for unusual ones."""
    warnings = []
    for key, (lo, hi, ulo, uhi, basis) in BOUNDS.items():
        x = values[key]
        if not lo <= x <= hi:
            raise InputError(key, x, f"must lie in [{lo:g}, {hi:g}] (plausibility bound: {basis})")
        if not ulo <= x <= uhi:
            warnings.append(f"{key} = {x!r} is outside the usual range [{ulo:g}, {uhi:g}] "
                            f"({basis}); check the unit")
    if envelope is not None:
        for k in ("position_min_m", "position_max_m"):
            for i, x in enumerate(envelope[k]):
                if abs(x) > POSITION_HARD_M:
                    raise InputError(f"envelope.{k}[{i}]", x,
                                     f"must lie within +-{POSITION_HARD_M:g} m (plausibility "
                                     "bound: the flat-ground, constant-gravity model)")
                if abs(x) > POSITION_USUAL_M:
                    warnings.append(f"envelope.{k}[{i}] = {x!r} m is beyond "
                                    f"{POSITION_USUAL_M:g} m: unusually far for powered descent")
        for k in ("velocity_min_mps", "velocity_max_mps"):
            for i, x in enumerate(envelope[k]):
                if abs(x) > BOUNDS["speed_max_mps"][1]:
                    raise InputError(f"envelope.{k}[{i}]", x,
                                     f"must lie within +-{BOUNDS['speed_max_mps'][1]:g} m/s "
                                     "(plausibility bound, as speed_max_mps)")
    cant = math.cos(math.radians(values["engine_cant_deg"]))
    twr = values["thrust_max_n"] * cant / (values["mass_wet_kg"] * values["gravity_mps2"])
    if twr > THRUST_TO_WEIGHT_USUAL:
        warnings.append(f"thrust-to-weight at wet mass is {twr:.4g}, above "
                        f"{THRUST_TO_WEIGHT_USUAL:g}: check the units of thrust_max_n, "
                        "mass_wet_kg and gravity_mps2")
    ratio = values["mass_wet_kg"] / values["mass_dry_kg"]
    if ratio > MASS_RATIO_USUAL:
        warnings.append(f"mass_wet_kg / mass_dry_kg = {ratio:.4g}, above {MASS_RATIO_USUAL:g}: "
                        "check the masses")
    return warnings
