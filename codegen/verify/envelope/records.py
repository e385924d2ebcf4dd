"""The files of a run: manifest.json, results.jsonl, replay lines and vehicles."""

from __future__ import annotations

import json
import os
import shlex
import tomllib
from pathlib import Path

import tomli_w

from codegen.errors import InputError
from codegen.fsutil import complete_lines, write_atomic
from codegen.verify.envelope.solvers import DRY_RUN_BACKEND


RUN_FORMAT = "pdgc-envelope-run/1"
RESULTS_NAME = "results.jsonl"
MANIFEST_NAME = "manifest.json"


#: What every record holds (cases.run_case), and the fields of an outcome
#: (cases.outcome) the summary reads: a record without them is a stub.
RECORD_FIELDS = {"case": int, "inputs": dict, "generated": dict, "reference": (dict, type(None)),
                 "reference_why": list, "accuracy": (dict, type(None))}
INPUT_FIELDS = ("position_m", "velocity_mps", "mass_kg", "time_of_flight_s", "thrust_derate")
OUTCOME_FIELDS = {"status": str, "iterations": int, "iterations_max": int, "iterations_total": int,
                  "solves": int, "solve_time_s": (int, float)}
#: Fields of an outcome that may be null but must be there.
OUTCOME_PRESENT = ("fuel_kg", "time_of_flight_s", "landing_miss_m", "objective", "message",
                   "terminal_error", "throttle_limit", "flyable", "worst_check")
_DAMAGED = ("; the results file is damaged: remove the line (its case is then solved again) "
            "or start a new --out")


def record_fault(rec) -> str:
    """What is wrong with one parsed record ('' when it is whole)."""
    from codegen.model.trajectory import STATUSES
    if not isinstance(rec, dict):
        return "is not a case record (a JSON object)"
    for key, kind in RECORD_FIELDS.items():
        if key not in rec:
            return f"lacks '{key}' (a stub record)"
        if not isinstance(rec[key], kind) or isinstance(rec[key], bool):
            return f"has '{key}' = {rec[key]!r}, not a {getattr(kind, '__name__', 'valid value')}"
    if rec["case"] < 0:
        return f"has case {rec['case']} (must be >= 0)"
    for key in INPUT_FIELDS:
        if key not in rec["inputs"]:
            return f"lacks 'inputs.{key}'"
    for side in ("generated", "reference"):
        out = rec[side]
        if out is None:
            continue
        for key, kind in OUTCOME_FIELDS.items():
            if not isinstance(out.get(key), kind) or isinstance(out.get(key), bool):
                return f"has '{side}.{key}' = {out.get(key)!r} (missing or not a number)"
        for key in OUTCOME_PRESENT:
            if key not in out:
                return f"lacks '{side}.{key}'"
        if out["status"] not in STATUSES:
            return f"has '{side}.status' = {out['status']!r}, not one of {', '.join(STATUSES)}"
    return ""


def read_results(path) -> list:
    """Records of ``results.jsonl``; a torn last line is cut off the file.

    A line that ends with a newline was written whole (one write per record);
    only the text after the last newline can be torn by a kill, and it is
    removed so that the next append starts on a fresh line. Every record is
    checked (record_fault) and a case recorded twice is refused: neither can
    come from a run, so the file was edited or damaged.
    """
    records, lines = [], {}
    for n, line in complete_lines(path):
        shown = line[:60].decode("utf-8", "replace")
        try:
            rec = json.loads(line)
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise InputError(f"{path}: line {n}", shown,
                             f"is not a JSON record ({getattr(exc, 'msg', exc)})" + _DAMAGED) from None
        fault = record_fault(rec)
        if fault:
            raise InputError(f"{path}: line {n}", shown, fault + _DAMAGED)
        if rec["case"] in lines:
            raise InputError(f"{path}: line {n}", shown,
                             f"records case {rec['case']} again (first on line "
                             f"{lines[rec['case']]})" + _DAMAGED)
        lines[rec["case"]] = n
        records.append(rec)
    return records


class ResultsLog:
    """Append-only JSONL: one ``os.write`` of a whole line, then fsync."""

    def __init__(self, path):
        self.path = Path(path)
        self.fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)

    def append(self, record: dict) -> None:
        line = (json.dumps(record, separators=(",", ":"), allow_nan=False) + "\n").encode()
        view = memoryview(line)
        while view:
            view = view[os.write(self.fd, view):]
        os.fsync(self.fd)

    def close(self) -> None:
        os.close(self.fd)


def load_run(run_dir):
    run_dir = Path(run_dir)
    man_path = run_dir / MANIFEST_NAME
    try:
        man = json.loads(man_path.read_text())
    except OSError as exc:
        raise InputError("RUN_DIR", str(run_dir), f"holds no envelope run ({exc.strerror})") from None
    records = {}
    for r in read_results(run_dir / RESULTS_NAME):
        if r["case"] < man["cases"]:
            records.setdefault(r["case"], r)
    return man, [records[k] for k in sorted(records)]


def replay_command(manifest: dict, record: dict, vehicle_path=None) -> str:
    """The ``pdgc solve`` line that replays ``record`` with the same solver."""
    inp = record["inputs"]
    state = ",".join(repr(float(x)) for x in
                     list(inp["position_m"]) + list(inp["velocity_mps"]) + [inp["mass_kg"]])
    solver_dir = manifest["solver_dir"]
    vehicle = vehicle_path or str(Path(solver_dir) / "vehicle.toml")
    parts = ["pdgc", "solve", shlex.quote(str(vehicle)), f"--state={state}"]
    if inp.get("time_of_flight_s") is not None:
        parts.append(f"--tof={float(inp['time_of_flight_s'])!r}")
    if manifest["solver_backend"] == DRY_RUN_BACKEND:
        parts.append(f"--horizon={manifest['horizon']}")
    else:
        parts.append(f"--solver-dir={shlex.quote(solver_dir)}")
    parts.append("--json")
    return " ".join(parts)


def derated_vehicle_file(manifest: dict, record: dict, out_dir) -> Path:
    """Write the derated vehicle of a derated case (for its replay line)."""
    src = Path(manifest["solver_dir"]) / "vehicle.toml"
    data = tomllib.loads(src.read_text())
    derate = record["inputs"]["thrust_derate"]
    data["thrust_max_n"] = float(data["thrust_max_n"]) * derate
    head = (f"# Vehicle of {src} with thrust_max_n derated by {derate!r} "
            f"(case {record['case']} of an envelope run).\n\n")
    path = Path(out_dir) / f"case-{record['case']}-vehicle.toml"
    write_atomic(path, head + tomli_w.dumps(data))
    return path
