"""A batch: manifest, append-only records, resumption, statistics."""

from __future__ import annotations

import json
import os
import time
from dataclasses import asdict
from pathlib import Path

import numpy as np

from codegen import __version__
from codegen.errors import InputError
from codegen.fsutil import complete_lines, write_atomic
from codegen.sim.error_model import ErrorModel, check_against_settings
from codegen.sim.loop import (CRASHED, LANDED, NO_CONTACT, NO_INITIAL_PLAN, OUT_OF_LIMITS,
                              TOUCHED_DOWN, fly)
from codegen.sim.report import write_report
from codegen.sim.settings import Settings
from codegen.sim.tree import _tree_identity, load_guidance_solver


RECORDS_FILE = "runs.jsonl"
MANIFEST_FILE = "manifest.json"
SUMMARY_FILE = "summary.json"
REPORT_FILE = "report.html"


def read_records(path) -> dict:
    """{run index: record} from a JSONL file; a torn last line is cut off the
    file (so the next append starts on a clean line) and ignored."""
    out = {}
    for n, line in complete_lines(path):
        try:
            rec = json.loads(line)
        except json.JSONDecodeError:
            raise InputError(str(path), f"line {n}", "is not valid JSON (a record file "
                             "is only appended to; was it edited?)") from None
        out.setdefault(int(rec["run"]), rec)
    return out


def batch_identity(solver_dir, solver, errors: ErrorModel, settings: Settings, seed: int) -> dict:
    """What must match for a run directory to be resumed."""
    err = errors.as_dict()
    err.pop("source", None)
    err.pop("source_sha256", None)
    return {
        "solver_tree_sha256": _tree_identity(solver_dir),
        "solver": solver.name,
        "horizon": solver.horizon,
        "vehicle": solver.vehicle.name,
        "seed": int(seed),
        "errors": err,
        "settings": {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(settings).items()},
    }


_worker = {}


def _worker_init(solver_dir, errors, settings, seed) -> None:
    _worker.update(solver=load_guidance_solver(solver_dir), errors=errors, settings=settings,
                   seed=seed)


def _fly_timed(solver, errors, settings, seed, i) -> dict:
    t0 = time.perf_counter()
    rec = fly(solver, errors, settings, seed, i)
    rec["wall_time_s"] = round(time.perf_counter() - t0, 4)
    return rec


def _worker_fly(i: int) -> dict:
    w = _worker
    return _fly_timed(w["solver"], w["errors"], w["settings"], w["seed"], i)


def _flights(solver_dir, solver, errors, settings, seed, todo, workers):
    """Records of the runs ``todo``, in the order they finish. One worker:
    in this process. More: a pool of fresh interpreters (spawn), each
    opening the tree itself; run i depends on (seed, i) alone, so a record
    does not depend on the worker that flew it (tests/test_simulate.py)."""
    if workers <= 1 or len(todo) <= 1:
        for i in todo:
            yield _fly_timed(solver, errors, settings, seed, i)
        return
    from codegen.progress import bounded_map
    yield from bounded_map(_worker_fly, todo, workers, _worker_init,
                           (str(solver_dir), errors, settings, seed), in_flight=2 * workers)


def run_batch(solver_dir, runs: int, seed: int, errors: ErrorModel, settings: Settings,
              out_dir, progress=None, solver=None, workers: int = 1) -> dict:
    """Fly runs 0..runs-1 that ``out_dir`` does not hold yet; write the summary
    and the report; return the summary. ``workers``: local processes."""
    if isinstance(runs, bool) or not isinstance(runs, int) or runs < 1:
        raise InputError("--runs", runs, "must be an integer >= 1")
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise InputError("--workers", workers, "must be an integer >= 1")
    solver = solver or load_guidance_solver(solver_dir)
    vehicle = solver.vehicle
    settings.check(vehicle)
    check_against_settings(errors, settings.step_s, settings.rate_hz)
    out = Path(out_dir)
    ident = batch_identity(solver_dir, solver, errors, settings, seed)
    man_path = out / MANIFEST_FILE
    if man_path.exists():
        try:
            old = json.loads(man_path.read_text())
        except json.JSONDecodeError as exc:
            raise InputError(str(man_path), "", f"is not valid JSON: {exc}") from None
        old_id = old.get("identity", {})
        for key in ident:
            if old_id.get(key) != json.loads(json.dumps(ident[key])):
                raise InputError("--out", str(out),
                                 f"holds a batch made with other settings ({key}: "
                                 f"{old_id.get(key)!r} there, {ident[key]!r} now)",
                                 "repeat the original command to resume, or choose another --out")
    manifest = {
        "kind": "pdgc closed-loop simulation",
        "pdgc_version": __version__,
        "solver_dir": str(Path(solver_dir).resolve()),
        "errors_file": errors.source,
        "errors_file_sha256": errors.source_sha256,
        "runs_requested": int(runs),
        "identity": ident,
    }
    if man_path.exists():
        old_runs = json.loads(man_path.read_text()).get("runs_requested", 0)
        manifest["runs_requested"] = max(int(runs), int(old_runs))
    write_atomic(man_path, json.dumps(manifest, indent=2) + "\n")

    rec_path = out / RECORDS_FILE
    done = read_records(rec_path)
    todo = [i for i in range(runs) if i not in done]
    if progress:
        progress("start", {"runs": runs, "done": len(done), "todo": len(todo)})
    with open(rec_path, "ab") as fh:
        for rec in _flights(solver_dir, solver, errors, settings, seed, todo, workers):
            i = int(rec["run"])
            fh.write((json.dumps(rec, separators=(",", ":")) + "\n").encode("utf-8"))
            fh.flush()
            os.fsync(fh.fileno())
            done[i] = rec
            if progress:
                progress("run", rec)
    records = [done[i] for i in sorted(done) if i < runs]
    summary = summarise(records)
    summary["batch"] = {"runs": runs, "seed": int(seed), "solver": solver.name,
                        "horizon": solver.horizon, "vehicle": vehicle.name,
                        "rate_hz": settings.rate_hz, "step_s": settings.step_s,
                        "terminal_s": settings.terminal_s, "latency_s": errors.latency_s,
                        "errors_file": errors.source or None}
    write_atomic(out / SUMMARY_FILE, json.dumps(summary, indent=2) + "\n")
    write_report(out / REPORT_FILE, records, summary, vehicle, errors, settings)
    return summary


def describe(values) -> dict:
    """Mean, sample standard deviation, 3-sigma (= 3 std), mean + 3 sigma, worst (max)."""
    a = np.asarray([v for v in values if v is not None], float)
    if a.size == 0:
        return {"n": 0, "mean": None, "std": None, "three_sigma": None,
                "mean_plus_three_sigma": None, "worst": None}
    std = float(a.std(ddof=1)) if a.size > 1 else 0.0
    return {"n": int(a.size), "mean": float(a.mean()), "std": std, "three_sigma": 3.0 * std,
            "mean_plus_three_sigma": float(a.mean()) + 3.0 * std, "worst": float(a.max())}


#: A share of guidance calls without a flyable plan above this is flagged in
#: the console summary and the report (common practice: any is worth a look;
#: one in a hundred is a design problem).
NO_PLAN_RATE_FLAG = 0.01


def summarise(records) -> dict:
    """Statistics over the runs that touched down (landed, out of limits or
    crashed), the count of each run status, and the guidance calls that gave
    no flyable plan, by cause."""
    down = [r for r in records if r["status"] in TOUCHED_DOWN]
    statuses = {}
    for r in records:
        for s, c in r.get("failure_statuses", {}).items():
            statuses[s] = statuses.get(s, 0) + c
    solves = int(sum(r["solves"] for r in records))
    failures = int(sum(r["failures"] for r in records))
    rate = failures / solves if solves else 0.0
    limits = [r.get("throttle_limit_max") for r in records if r.get("throttle_limit_max")]
    return {
        "runs": len(records),
        "landed": sum(r["status"] == LANDED for r in records),
        "out_of_limits": sum(r["status"] == OUT_OF_LIMITS for r in records),
        "crashed": sum(r["status"] == CRASHED for r in records),
        "no_initial_plan": sum(r["status"] == NO_INITIAL_PLAN for r in records),
        "no_contact": sum(r["status"] == NO_CONTACT for r in records),
        "limits_exceeded": {name: sum(name in r.get("limits_exceeded", []) for r in records)
                            for name in ("miss", "vertical_speed", "horizontal_speed")},
        "propellant_exhausted": sum(bool(r.get("propellant_exhausted")) for r in records),
        "position_error_m": describe(r["position_error_m"] for r in down),
        "velocity_error_mps": describe(r["velocity_error_mps"] for r in down),
        "vertical_speed_mps": describe(r["vertical_speed_mps"] for r in down),
        "horizontal_speed_mps": describe(r["horizontal_speed_mps"] for r in down),
        "fuel_kg": describe(r["fuel_kg"] for r in down),
        "solves": solves,
        "solve_failures": failures,
        "no_plan_rate": rate,
        "no_plan_rate_flagged": rate > NO_PLAN_RATE_FLAG,
        "runs_with_failures": int(sum(r["failures"] > 0 for r in records)),
        "failure_statuses": statuses,
        "best_reachable_plans": int(sum(r.get("best_reachable_plans", 0) for r in records)),
        "reserve_plans": int(sum(r.get("reserve_plans", 0) for r in records)),
        "throttle_limit_max": max(limits) if limits else None,
        "worst_call_iterations": max((r.get("worst_call_iterations", 0) for r in records),
                                     default=0),
        "worst_solve_time_s": max((r["worst_solve_time_s"] for r in records), default=None),
        "worst_replan_time_s": max((r["worst_replan_time_s"] for r in records), default=None),
    }
