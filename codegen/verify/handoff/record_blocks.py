"""The blocks a record section is made of (text, code, table), and cell formats."""

from __future__ import annotations

import math


def _text(t):
    return {"kind": "text", "text": t}


def _code(t):
    return {"kind": "code", "text": t}


def _table(headers, rows):
    return {"kind": "table", "headers": list(headers), "rows": [[str(c) for c in r] for r in rows]}


def _g(x, digits=4):
    if x is None:
        return "-"
    if isinstance(x, float):
        return "-" if not math.isfinite(x) else f"{x:.{digits}g}"
    return str(x)


def _yes(ok):
    return "pass" if ok else "FAIL"
