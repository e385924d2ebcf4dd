"""report.html of a batch: one self-contained file."""

from __future__ import annotations

import json

from codegen.fsutil import write_atomic
from codegen.model.vehicle import Vehicle
from codegen.sim.error_model import ErrorModel
from codegen.sim.figures import figures
from codegen.sim.settings import Settings


def write_report(path, records, summary: dict, vehicle: Vehicle, errors: ErrorModel,
                 settings: Settings) -> None:
    """The batch as one self-contained HTML file (images inline)."""
    from codegen.report import render

    rows = []
    for key, label in (("position_error_m", "touchdown position error (horizontal miss) [m]"),
                       ("velocity_error_mps", "touchdown velocity error (speed) [m/s]"),
                       ("vertical_speed_mps", "downward speed at touchdown [m/s]"),
                       ("horizontal_speed_mps", "horizontal speed at touchdown [m/s]"),
                       ("fuel_kg", "fuel used [kg]")):
        d = summary[key]
        rows.append([label, d["n"], d["mean"], d["std"], d["three_sigma"],
                     d["mean_plus_three_sigma"], d["worst"]])
    failures = ", ".join(f"{k}: {v}" for k, v in sorted(summary["failure_statuses"].items()))
    req = settings.requirements(vehicle)
    exceeded = ", ".join(f"{k}: {v}" for k, v in summary["limits_exceeded"].items())
    rate = f"{summary['no_plan_rate']:.3%}"
    if summary["no_plan_rate_flagged"]:
        rate += "  (HIGH: above 1 % of calls)"
    counts = [
        ["runs", summary["runs"]],
        ["landed (within every touchdown requirement)", summary["landed"]],
        ["out of limits", summary["out_of_limits"]],
        ["crashed (touchdown faster than the crash speed)", summary["crashed"]],
        ["no initial plan", summary["no_initial_plan"]], ["no ground contact", summary["no_contact"]],
        ["requirements: miss, vertical, horizontal speed, crash speed",
         f"{req['miss_max_m']:g} m, {req['speed_vertical_max_mps']:g} m/s, "
         f"{req['speed_horizontal_max_mps']:g} m/s, {req['crash_speed_mps']:g} m/s"],
        ["runs past each limit", exceeded],
        ["propellant exhausted", summary["propellant_exhausted"]],
        ["guidance calls", summary["solves"]],
        ["calls without a flyable plan", summary["solve_failures"]],
        ["share of calls without a flyable plan", rate],
        ["calls without a flyable plan, by cause", failures or "none"],
        ["runs with such a call", summary["runs_with_failures"]],
        ["best-reachable plans flown (target out of reach)", summary["best_reachable_plans"]],
        ["re-plans that used the engine's reserve", summary["reserve_plans"]],
        ["highest throttle limit of a plan", summary["throttle_limit_max"]],
        ["most iterations of one guidance call", summary["worst_call_iterations"]],
        ["worst solve time (any, incl. first search) [s]", summary["worst_solve_time_s"]],
        ["worst re-plan solve time [s]", summary["worst_replan_time_s"]],
    ]
    run_rows = [[r["run"], r["status"], r.get("position_error_m"), r.get("velocity_error_mps"),
                 r.get("fuel_kg"), r.get("planned_fuel_kg"), r.get("cutoff_altitude_m"),
                 r["solves"], r["failures"], r["worst_solve_time_s"]] for r in records]
    err_rows = [[k, json.dumps(v)] for k, v in errors.as_dict().items()
                if k not in ("source", "source_sha256")]
    html = render("simulation.html.j2", runs=summary["runs"], vehicle_name=vehicle.name,
                  batch=summary.get("batch", {}), s=settings, errors_file=errors.source,
                  stat_rows=rows, count_rows=counts, run_rows=run_rows, error_rows=err_rows,
                  figs=figures(records, vehicle, settings.target_m, req))
    write_atomic(path, html)
