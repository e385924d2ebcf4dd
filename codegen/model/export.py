"""A plan in the files engineers open: JSON, CSV (spreadsheets) and MATLAB .mat.

``save(traj, path)`` picks the format from the suffix and writes atomically
(codegen/fsutil.py), so a reader never sees half a file.

- **JSON**: ``Trajectory.to_dict()``, the schema of ``pdgc solve --json``.
- **CSV**: one row per node k = 0..N, SI units in the column names:
  ``t_s``, ``x_m, y_m, up_m``, ``vx_mps, vy_mps, vup_mps``, ``mass_kg``,
  then the interval quantities held from node k to k+1 (``thrust_*_n``,
  ``accel_*_mps2``, ``accel_slack_mps2``, ``throttle``), empty on the last
  node, which starts no interval. The scalars (status, time of flight, fuel,
  message, ...) come first as comment lines ``# key: value``; spreadsheet
  programs and ``numpy.loadtxt(comments="#")`` skip them or show them as
  text. RFC 4180 quoting (Python's csv module).
- **MAT**: MATLAB level 5 (``scipy.io.savemat``): every field of the JSON
  as a variable of the same name (arrays as double matrices, N+1 by 3 for
  the nodes; null as NaN; the verdict as a struct).
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np

from codegen.errors import InputError
from codegen.fsutil import write_atomic

#: File suffixes save() knows, with what they hold.
FORMATS = {".json": "the JSON of pdgc solve --json",
           ".csv": "one row per node, scalars as '# key: value' lines first",
           ".mat": "MATLAB level 5 (scipy.io.savemat), one variable per JSON field"}

_NODE_COLUMNS = (("t_s", "t_s", None), ("x_m", "position_m", 0), ("y_m", "position_m", 1),
                 ("up_m", "position_m", 2), ("vx_mps", "velocity_mps", 0),
                 ("vy_mps", "velocity_mps", 1), ("vup_mps", "velocity_mps", 2),
                 ("mass_kg", "mass_kg", None))
_INTERVAL_COLUMNS = (("thrust_x_n", "thrust_n", 0), ("thrust_y_n", "thrust_n", 1),
                     ("thrust_up_n", "thrust_n", 2), ("accel_x_mps2", "accel_mps2", 0),
                     ("accel_y_mps2", "accel_mps2", 1), ("accel_up_mps2", "accel_mps2", 2),
                     ("accel_slack_mps2", "accel_slack_mps2", None), ("throttle", "throttle", None))
_SCALARS = ("status", "degraded", "message", "solver", "horizon", "time_of_flight_s", "fuel_kg",
            "landing_miss_m", "terminal_error", "plan_mode", "throttle_limit", "objective",
            "iterations", "iterations_max", "iterations_total", "solves", "solve_time_s")


def _cell(x) -> str:
    return repr(float(x))


def to_csv(traj) -> str:
    """The plan as CSV text (see the module docstring)."""
    d = traj.to_dict()
    buf = io.StringIO()
    for key in _SCALARS:
        value = d[key]
        text = "" if value is None else str(value).replace("\n", " ")
        buf.write(f"# {key}: {text}\n")
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([c for c, _, _ in _NODE_COLUMNS + _INTERVAL_COLUMNS])
    nodes = len(d["t_s"])
    for k in range(nodes):
        row = []
        for cols, limit in ((_NODE_COLUMNS, nodes), (_INTERVAL_COLUMNS, nodes - 1)):
            for _, key, j in cols:
                if k >= limit:
                    row.append("")
                else:
                    value = d[key][k] if j is None else d[key][k][j]
                    row.append(_cell(value))
        w.writerow(row)
    return buf.getvalue()


def mat_variables(traj) -> dict:
    """The variables of the .mat file: the JSON's fields, null as NaN."""
    out = {}
    for key, value in traj.to_dict().items():
        if value is None:
            out[key] = math.nan
        elif isinstance(value, bool):
            out[key] = np.array(value)
        elif isinstance(value, (list, tuple)):
            out[key] = np.asarray(value, dtype=float)
        elif isinstance(value, dict):
            out[key] = {k: (math.nan if v is None else v) for k, v in value.items()}
        else:
            out[key] = value
    return out


def to_mat_bytes(traj) -> bytes:
    from scipy.io import savemat
    buf = io.BytesIO()
    savemat(buf, mat_variables(traj), format="5", do_compression=False, oned_as="column")
    return buf.getvalue()


def save(traj, path) -> Path:
    """Write ``traj`` to ``path`` in the format its suffix names (FORMATS)."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in FORMATS:
        raise InputError("--out", str(path), "must end in " + ", ".join(FORMATS)
                         + " (JSON, CSV or MATLAB)")
    if suffix == ".json":
        write_atomic(path, json.dumps(traj.to_dict(), indent=1) + "\n")
    elif suffix == ".csv":
        write_atomic(path, to_csv(traj))
    else:
        write_atomic(path, to_mat_bytes(traj))
    return path
