"""Errors that carry the field, the value and the rule that was broken,
and the small checks every input file (vehicle, dispersions, errors) shares."""

import difflib
import math


class InputError(ValueError):
    """Bad user input: a vehicle file, a state, an option.

    The message always names the field, the offending value and the rule,
    so that the engineer can fix the file without reading our code.
    """

    def __init__(self, field: str, value, rule: str, hint: str = ""):
        self.field = field
        self.value = value
        self.rule = rule
        # A missing key or table has no value to show.
        msg = f"{field}: {rule}" if value is None else f"{field} = {value!r}: {rule}"
        if hint:
            msg += f" ({hint})"
        super().__init__(msg)


def suggest_key(key, known) -> str:
    """'did you mean ...?' for an unknown key, or '' when nothing is close."""
    near = difflib.get_close_matches(str(key), list(known), n=1, cutoff=0.5)
    return f"did you mean '{near[0]}'?" if near else ""


def finite_number(where: str, value) -> float:
    """A TOML number (not a bool), finite, as float; InputError otherwise."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(where, value, "must be a number")
    v = float(value)
    if not math.isfinite(v):
        raise InputError(where, value, "must be a finite number (no nan or inf)")
    return v
