"""The error file of a closed-loop simulation: what goes wrong in flight.

An error file is TOML with SI units in every key name. Every table and every
key is optional; what is absent is zero (or "no limit"), so an empty file, or
no file at all, is the ideal loop: perfect navigation, perfect engine, no
latency, no disturbance. Example (see examples/demo_errors.toml)::

    [navigation]                      # estimate = truth + bias + noise
    position_bias_sigma_m = [0.5, 0.5, 0.3]     # drawn once per run, per axis
    position_noise_sigma_m = [0.3, 0.3, 0.2]    # drawn at every guidance call
    velocity_bias_sigma_mps = [0.02, 0.02, 0.02]
    velocity_noise_sigma_mps = [0.02, 0.02, 0.02]
    mass_bias_sigma_kg = 5.0                    # drawn once per run

    [thrust]
    magnitude_error_sigma = 0.01      # delivered / commanded - 1, once per run
    misalignment_sigma_deg = 0.3      # about each horizontal axis, once per run
    throttle_lag_s = 0.1              # first-order lag of the delivered thrust
    throttle_rate_max_per_s = 0.5     # slew limit, fraction of thrust_max_n per s
    clamp_to_throttle_range = true    # engine held in [throttle_min, 1] (full throttle)

    [guidance]
    latency_s = 0.05                  # measurement to new plan in force

    [disturbance]                     # constant acceleration, e.g. wind-like
    accel_mps2 = [0.01, 0.0, 0.0]     # the same in every run
    accel_sigma_mps2 = [0.01, 0.01, 0.0]        # plus a per-run draw

    [initial]                         # dispersion of the TRUE start state
    position_sigma_m = [20.0, 20.0, 20.0]
    velocity_sigma_mps = [1.0, 1.0, 1.0]
    mass_sigma_kg = 5.0

All spreads are one standard deviation of a zero-mean normal draw. Every
fault (unknown table or key, with the nearest known one suggested; a value
that is not a finite number; a negative spread; a value outside its
physical range) is refused with an :class:`~codegen.errors.InputError` naming
the key, the value and the rule. Rules that depend on the simulation settings
(lag against the truth step, latency against the guidance period) are checked
by :func:`check_against_settings`.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

from codegen.errors import InputError
from codegen.fsutil import read_toml
from codegen.errors import finite_number as _number
from codegen.errors import suggest_key as _suggest

# table -> key -> (kind, description). kind: "vec" (three spreads >= 0),
# "vec_any" (three numbers), "nonneg", "bool", "positive".
SCHEMA = {
    "navigation": {
        "position_bias_sigma_m": ("vec", "per-run bias of the position estimate, 1-sigma per axis"),
        "position_noise_sigma_m": ("vec", "white noise of the position estimate at each guidance call"),
        "velocity_bias_sigma_mps": ("vec", "per-run bias of the velocity estimate, 1-sigma per axis"),
        "velocity_noise_sigma_mps": ("vec", "white noise of the velocity estimate at each guidance call"),
        "mass_bias_sigma_kg": ("nonneg", "per-run bias of the mass estimate, 1-sigma"),
    },
    "thrust": {
        "magnitude_error_sigma": ("nonneg", "per-run relative thrust magnitude error, 1-sigma"),
        "misalignment_sigma_deg": ("nonneg", "per-run thrust misalignment about each horizontal axis, 1-sigma"),
        "throttle_lag_s": ("nonneg", "time constant of the first-order lag of the delivered thrust (0: none)"),
        "throttle_rate_max_per_s": ("positive", "largest throttle slew rate, fraction of thrust_max_n per second"),
        "clamp_to_throttle_range": ("bool", "engine held in [throttle_min, 1]: full throttle is thrust_max_n; throttle_max is the planning limit"),
    },
    "guidance": {
        "latency_s": ("nonneg", "time from the navigation sample to the new plan taking effect"),
    },
    "disturbance": {
        "accel_mps2": ("vec_any", "constant disturbance acceleration, every run"),
        "accel_sigma_mps2": ("vec", "per-run constant disturbance acceleration, 1-sigma per axis"),
    },
    "initial": {
        "position_sigma_m": ("vec", "dispersion of the true initial position, 1-sigma per axis"),
        "velocity_sigma_mps": ("vec", "dispersion of the true initial velocity, 1-sigma per axis"),
        "mass_sigma_kg": ("nonneg", "dispersion of the true initial mass, 1-sigma"),
    },
}

#: Upper limits with their reasons (a larger value is not a dispersion but a
#: different vehicle, and would make the draws meaningless).
MAGNITUDE_ERROR_SIGMA_MAX = 0.1       # 3-sigma stays well inside (0, 2) x command
MISALIGNMENT_SIGMA_DEG_MAX = 10.0     # small-angle error, not a different thrust axis
LAG_STEPS_MIN = 4                     # RK4 is stable for step/lag < 2.78; we ask for 4 steps


@dataclass(frozen=True)
class ErrorModel:
    """Validated error settings. Spreads are 1-sigma; zero means none."""

    position_bias_sigma_m: tuple = (0.0, 0.0, 0.0)
    position_noise_sigma_m: tuple = (0.0, 0.0, 0.0)
    velocity_bias_sigma_mps: tuple = (0.0, 0.0, 0.0)
    velocity_noise_sigma_mps: tuple = (0.0, 0.0, 0.0)
    mass_bias_sigma_kg: float = 0.0
    magnitude_error_sigma: float = 0.0
    misalignment_sigma_deg: float = 0.0
    throttle_lag_s: float = 0.0
    throttle_rate_max_per_s: float = math.inf
    clamp_to_throttle_range: bool = False
    latency_s: float = 0.0
    accel_mps2: tuple = (0.0, 0.0, 0.0)
    accel_sigma_mps2: tuple = (0.0, 0.0, 0.0)
    position_sigma_m: tuple = (0.0, 0.0, 0.0)
    velocity_sigma_mps: tuple = (0.0, 0.0, 0.0)
    mass_sigma_kg: float = 0.0
    source: str = ""
    source_sha256: str = ""

    def as_dict(self) -> dict:
        d = asdict(self)
        if math.isinf(d["throttle_rate_max_per_s"]):
            d["throttle_rate_max_per_s"] = None
        return d


def _value(where: str, kind: str, value):
    if kind == "bool":
        if not isinstance(value, bool):
            raise InputError(where, value, "must be true or false")
        return value
    if kind in ("vec", "vec_any"):
        if not isinstance(value, list) or len(value) != 3:
            raise InputError(where, value, "must be a list of three numbers [x, y, up]")
        out = tuple(_number(f"{where}[{i}]", x) for i, x in enumerate(value))
        if kind == "vec":
            for i, x in enumerate(out):
                if x < 0.0:
                    raise InputError(f"{where}[{i}]", x, "a standard deviation must be >= 0")
        return out
    v = _number(where, value)
    if kind == "nonneg" and v < 0.0:
        rule = "a standard deviation must be >= 0" if "sigma" in where else "must be >= 0"
        raise InputError(where, v, rule)
    if kind == "positive" and v <= 0.0:
        raise InputError(where, v, "must be > 0 (leave the key out for no limit)")
    return v


def parse_errors(data: dict, source: str = "", source_sha256: str = "") -> ErrorModel:
    """Validate a parsed TOML document and return an :class:`ErrorModel`."""
    values = {}
    for table, body in data.items():
        if table not in SCHEMA:
            raise InputError(table, body, "unknown table", _suggest(table, SCHEMA))
        if not isinstance(body, dict):
            raise InputError(table, body, "must be a table ([" + table + "])")
        known = SCHEMA[table]
        for key, value in body.items():
            if key not in known:
                raise InputError(f"{table}.{key}", value, "unknown key", _suggest(key, known))
            values[key] = _value(f"{table}.{key}", known[key][0], value)

    if values.get("magnitude_error_sigma", 0.0) > MAGNITUDE_ERROR_SIGMA_MAX:
        raise InputError("thrust.magnitude_error_sigma", values["magnitude_error_sigma"],
                         f"must be <= {MAGNITUDE_ERROR_SIGMA_MAX} (a fraction of the command; "
                         "a larger spread is a different engine, not an error)")
    if values.get("misalignment_sigma_deg", 0.0) > MISALIGNMENT_SIGMA_DEG_MAX:
        raise InputError("thrust.misalignment_sigma_deg", values["misalignment_sigma_deg"],
                         f"must be <= {MISALIGNMENT_SIGMA_DEG_MAX} deg (small-angle error model)")
    if "throttle_rate_max_per_s" in values and values.get("throttle_lag_s", 0.0) == 0.0:
        raise InputError("thrust.throttle_rate_max_per_s", values["throttle_rate_max_per_s"],
                         "needs thrust.throttle_lag_s > 0: the slew limit acts on the lagged "
                         "thrust state")
    return ErrorModel(source=source, source_sha256=source_sha256, **values)


def load_errors(path) -> ErrorModel:
    """Read and validate an error file. Raises InputError on any fault."""
    data, digest = read_toml(path, "error file")
    return parse_errors(data, str(path), digest)


def check_against_settings(errors: ErrorModel, step_s: float, rate_hz: float) -> None:
    """Refuse error settings that the chosen truth step or guidance rate cannot honour."""
    lag = errors.throttle_lag_s
    if 0.0 < lag < LAG_STEPS_MIN * step_s:
        raise InputError("thrust.throttle_lag_s", lag,
                         f"must be 0 (no lag) or >= {LAG_STEPS_MIN} truth steps = "
                         f"{LAG_STEPS_MIN * step_s:g} s, so that the fixed-step RK4 "
                         "integration of the lag is stable and accurate", "or lower --step")
    if rate_hz > 0.0 and errors.latency_s >= 1.0 / rate_hz:
        raise InputError("guidance.latency_s", errors.latency_s,
                         f"must be shorter than the guidance period 1/--rate = {1.0 / rate_hz:g} s "
                         "(a plan must take effect before the next one is computed)")
