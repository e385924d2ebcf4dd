"""What the verbs share: argument types with errors that name the option,
and the console table."""

from __future__ import annotations

import argparse
import math
import sys

from codegen.errors import InputError


def parse_state(text: str):
    """'X,Y,Z,VX,VY,VZ,MASS' -> (position, velocity, mass)."""
    parts = [p.strip() for p in text.split(",")]
    if len(parts) != 7:
        raise InputError("--state", text, "must be seven comma-separated numbers X,Y,Z,VX,VY,VZ,MASS")
    vals = []
    for i, p in enumerate(parts):
        try:
            vals.append(float(p))
        except ValueError:
            raise InputError(f"--state[{i}]", p, "must be a number") from None
    return vals[0:3], vals[3:6], vals[6]


def parse_vector3(name: str, text: str):
    parts = text.split(",")
    if len(parts) != 3:
        raise InputError(name, text, "must be three comma-separated numbers")
    try:
        return [float(p) for p in parts]
    except ValueError:
        raise InputError(name, text, "must be three comma-separated numbers") from None


def int_at_least(name, low):
    """argparse type: an integer >= low, with an error naming the option."""
    def conv(text):
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} = {text!r}: must be an integer") from None
        if v < low:
            raise argparse.ArgumentTypeError(f"{name} = {v}: must be >= {low}")
        return v
    return conv


def positive_int(name):
    """A horizon-like count: an integer >= 2."""
    return int_at_least(name, 2)


def finite_float(name):
    """argparse type: a finite number, with an error naming the option."""
    def conv(text):
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} = {text!r}: must be a number") from None
        if not math.isfinite(v):
            raise argparse.ArgumentTypeError(f"{name} = {text!r}: must be finite")
        return v
    return conv


def print_table(rows, out=None):
    """Rows of (label, value), the labels padded to one width."""
    out = out or sys.stdout
    width = max(len(k) for k, _ in rows)
    for k, v in rows:
        print(f"  {k:<{width}}  {v}", file=out)
