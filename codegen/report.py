"""Self-contained HTML reports rendered from templates/reports/ (jinja2).

A report is data the code computes, laid out by a template: :func:`render`
renders ``templates/reports/NAME`` with HTML autoescaping, and the templates
share ``page.html.j2`` (the document, its CSS and a few lines of script
that mark it rendered, ``<body data-rendered="yes">``, and count the images
that decoded, ``data-images-ok``, so a headless browser can check it) and
its ``table`` macro. Numbers in tables go through :func:`fmt`. Pictures are
inline data URIs (:func:`codegen.plot.figure_png_base64`), so a report opens
anywhere with no network and no companion files.
"""

from __future__ import annotations

import math
from functools import lru_cache

import jinja2
from markupsafe import Markup

from codegen.fsutil import TEMPLATES_DIR
from codegen.model.vehicle import DEMO_VEHICLE_NAME


def fmt(x, digits: int = 4):
    """A table cell: '-' for missing, yes/no, compact numbers; Markup as it is."""
    if isinstance(x, Markup):
        return x
    if x is None:
        return "-"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return str(x)
    if isinstance(x, float):
        if not math.isfinite(x):
            return "-"
        return f"{x:.{digits}g}"
    return str(x)


@lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    """The environment of templates/ with HTML autoescaping (reports and their includes)."""
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(TEMPLATES_DIR)),
                             undefined=jinja2.StrictUndefined, keep_trailing_newline=True,
                             autoescape=True, trim_blocks=True, lstrip_blocks=True)
    env.filters["cell"] = fmt
    env.globals["demo_vehicle_name"] = DEMO_VEHICLE_NAME     # for templates/caution.j2
    return env


def render(name: str, **context) -> str:
    """templates/reports/NAME rendered with ``context``."""
    return environment().get_template(f"reports/{name}").render(**context)


def caution_text(vehicle_name: str | None = None) -> str:
    """The caution of templates/caution.j2 as plain text (vehicle names are
    letters, digits, '-' and '_', so escaping leaves them as they are)."""
    module = environment().get_template("caution.j2").module
    return str(module.caution(vehicle_name))
