"""One case of a campaign: solve it, and the record it makes."""

from __future__ import annotations

import math
import threading
import time
from dataclasses import dataclass

from codegen.model.trajectory import TARGET_MET, SOLVED
from codegen.verify.dispersions import Dispersions
from codegen.verify.envelope.solvers import open_solvers


#: Record keys that hold measured times: they differ between two runs of the
#: same case and are left out when records are compared.
MEASURED_KEYS = ("solve_time_s", "wall_s")


@dataclass(frozen=True)
class CaseContext:
    """What a worker needs to run any case: plain data, picklable."""

    solver_dir: str
    dispersions: Dispersions
    reference_every: int
    stand_out_iterations: int


_local = threading.local()


def _solvers(solver_dir: str, derate):
    """Per-thread cache of the undamaged solvers; derated ones are built per case."""
    if derate is not None:
        return open_solvers(solver_dir, derate)
    cache = getattr(_local, "cache", None)
    if cache is None:
        cache = _local.cache = {}
    if solver_dir not in cache:
        cache[solver_dir] = open_solvers(solver_dir)
    return cache[solver_dir]


def _num(x):
    return None if x is None or not math.isfinite(x) else float(x)


def outcome(traj, vehicle=None, precision: str = "double") -> dict:
    """The scalar part of a Trajectory that a campaign records. With
    ``vehicle``, also the plan's real-constraint checks recomputed here from
    its arrays (codegen.verify.check.judge; None when it carries no plan)."""
    from codegen.verify.check import judge
    verdict = judge(vehicle, traj, precision) if vehicle is not None else None
    return {
        "status": traj.status,
        "iterations": int(traj.iterations),
        "iterations_max": int(traj.iterations_max),
        "iterations_total": int(traj.iterations_total),
        "solves": int(traj.solves),
        "solve_time_s": float(traj.solve_time_s),
        "fuel_kg": _num(traj.fuel_kg),
        "time_of_flight_s": _num(traj.time_of_flight_s),
        "landing_miss_m": _num(traj.landing_miss_m),
        "objective": _num(traj.objective),
        "message": traj.message,
        "terminal_error": _num(traj.terminal_error),
        "throttle_limit": _num(traj.throttle_limit),
        "flyable": None if verdict is None else bool(verdict.flyable),
        "worst_check": None if verdict is None else verdict.worst,
    }


def accuracy(gen: dict, ref: dict) -> dict:
    """Generated against reference: signed differences (generated - reference)."""
    out = {"status_match": gen["status"] == ref["status"], "fuel_diff_kg": None,
           "fuel_rel_diff": None, "time_of_flight_diff_s": None, "objective_rel_diff": None,
           "landing_miss_diff_m": None}
    if gen["status"] in SOLVED and ref["status"] in SOLVED:
        out["fuel_diff_kg"] = gen["fuel_kg"] - ref["fuel_kg"]
        out["fuel_rel_diff"] = out["fuel_diff_kg"] / ref["fuel_kg"] if ref["fuel_kg"] else None
        out["time_of_flight_diff_s"] = gen["time_of_flight_s"] - ref["time_of_flight_s"]
        if ref["objective"]:
            out["objective_rel_diff"] = (gen["objective"] - ref["objective"]) / abs(ref["objective"])
        out["landing_miss_diff_m"] = gen["landing_miss_m"] - ref["landing_miss_m"]
    return out


def reference_reasons(ctx: CaseContext, index: int, gen: dict) -> list:
    why = []
    if ctx.reference_every > 0 and index % ctx.reference_every == 0:
        why.append("every_m")
    if gen["status"] != TARGET_MET:
        why.append("status")
    if ctx.stand_out_iterations > 0 and gen["iterations_max"] > ctx.stand_out_iterations:
        why.append("iterations")
    return why


def run_case(ctx: CaseContext, index: int) -> dict:
    """Solve case ``index`` and return its record (a JSON-ready dict)."""
    t0 = time.perf_counter()
    case = ctx.dispersions.case(index)
    generated, reference = _solvers(ctx.solver_dir, case.thrust_derate)
    args = (list(case.position_m), list(case.velocity_mps), case.mass_kg, case.time_of_flight_s)
    precision = getattr(generated, "manifest", {}).get("precision", "double")
    gen = outcome(generated.solve(*args), generated.vehicle, precision)
    why = reference_reasons(ctx, index, gen)
    ref = acc = None
    if why:
        ref = outcome(reference.solve(*args), reference.vehicle)
        acc = accuracy(gen, ref)
    return {"case": index, "inputs": case.as_dict(), "generated": gen, "reference": ref,
            "reference_why": why, "accuracy": acc, "wall_s": time.perf_counter() - t0}


def strip_measured(record):
    """A copy of ``record`` without measured times (for comparing runs)."""
    if isinstance(record, dict):
        return {k: strip_measured(v) for k, v in record.items() if k not in MEASURED_KEYS}
    if isinstance(record, list):
        return [strip_measured(v) for v in record]
    return record
