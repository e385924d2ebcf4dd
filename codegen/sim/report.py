"""report.html of a batch: one self-contained file."""

from __future__ import annotations

import json

from codegen.fsutil import write_atomic
from codegen.model.vehicle import Vehicle
from codegen.sim.error_model import ErrorModel
from codegen.sim.figures import _figures
from codegen.sim.settings import Settings


def write_report(path, records, summary: dict, vehicle: Vehicle, errors: ErrorModel,
                 settings: Settings) -> None:
    """The batch as one self-contained HTML file (images inline)."""
    from codegen.report import esc, image, page, table

    b = summary.get("batch", {})
    intro = (f"<p>{esc(summary['runs'])} runs of the closed loop on <code>{esc(vehicle.name)}</code> "
             f"with solver <code>{esc(b.get('solver'))}</code> (N = {esc(b.get('horizon'))}), "
             f"seed {esc(b.get('seed'))}, guidance at {esc(settings.rate_hz)} Hz "
             f"({'open loop' if settings.rate_hz == 0 else 're-planned'}), truth RK4 step "
             f"{esc(settings.step_s)} s, tracking loop at {esc(settings.control_rate_hz)} Hz with "
             f"bandwidth {esc(settings.tracking_bandwidth_rad_s)} rad/s, no re-plans below "
             f"{esc(settings.terminal_s)} s to go, terminal descent from "
             f"{esc(settings.descent_altitude_m)} m at {esc(settings.descent_speed_mps)} m/s. "
             f"Errors: <code>{esc(errors.source or 'none (ideal loop)')}</code>.</p>")
    rows = []
    for key, label in (("position_error_m", "touchdown position error (horizontal miss) [m]"),
                       ("velocity_error_mps", "touchdown velocity error (speed) [m/s]"),
                       ("vertical_speed_mps", "downward speed at touchdown [m/s]"),
                       ("horizontal_speed_mps", "horizontal speed at touchdown [m/s]"),
                       ("fuel_kg", "fuel used [kg]")):
        d = summary[key]
        rows.append([label, d["n"], d["mean"], d["std"], d["three_sigma"],
                     d["mean_plus_three_sigma"], d["worst"]])
    stats = table(["quantity", "runs", "mean", "std", "3-sigma", "mean + 3-sigma", "worst"],
                  rows, text_columns=(0,))
    counts = table(["item", "value"], [
        ["runs", summary["runs"]], ["landed", summary["landed"]],
        ["no initial plan", summary["no_initial_plan"]], ["no ground contact", summary["no_contact"]],
        ["propellant exhausted", summary["propellant_exhausted"]],
        ["solves", summary["solves"]], ["solve failures", summary["solve_failures"]],
        ["runs with a failed solve", summary["runs_with_failures"]],
        ["failures by status", ", ".join(f"{k}: {v}" for k, v in sorted(summary["failure_statuses"].items())) or "none"],
        ["worst solve time (any, incl. first search) [s]", summary["worst_solve_time_s"]],
        ["worst re-plan solve time [s]", summary["worst_replan_time_s"]],
    ], text_columns=(0,))
    run_rows = [[r["run"], r["status"], r.get("position_error_m"), r.get("velocity_error_mps"),
                 r.get("fuel_kg"), r.get("planned_fuel_kg"), r.get("cutoff_altitude_m"),
                 r["solves"], r["failures"], r["worst_solve_time_s"]] for r in records]
    per_run = table(["run", "status", "miss [m]", "speed [m/s]", "fuel [kg]", "planned fuel [kg]",
                     "altitude at cut-off [m]", "solves", "failures", "worst solve [s]"],
                    run_rows, text_columns=(1,))
    figs = "\n".join(f"<h3>{esc(t)}</h3>\n{image(uri, t)}" for t, uri in _figures(records, vehicle, settings.target_m))
    model = ("<p>Truth: 3-DoF translation with variable mass, m' = -|T|/(Isp g0 cos(cant)), "
             "g0 = 9.80665 m/s^2, constant gravity and disturbance, fixed-step RK4 with steps "
             "ending on every event. Guidance commands the plan's acceleration times the mass "
             "estimate; it re-plans from the navigation estimate with the time to go, follows "
             "the last good plan when a solve fails, and stops re-planning below the terminal "
             "time to go (flying the last plan). A tracking loop (PID on position, poles at "
             "minus the bandwidth) steers onto the plan between re-plans. The plans aim at rest "
             "above the target; a constant-speed vertical descent follows until ground contact, "
             "when the engine cuts off. Position error: horizontal miss; velocity error: "
             "distance from the intended touchdown velocity. 3-sigma is three sample standard "
             "deviations. Solve times are wall-clock times measured by the solver and depend "
             "on the machine and its load.</p>")
    err_rows = [[k, json.dumps(v)] for k, v in errors.as_dict().items() if k not in ("source", "source_sha256")]
    sections = [
        ("statistics", "Touchdown statistics", stats + counts),
        ("figures", "Figures", figs),
        ("runs", "Per run", per_run),
        ("model", "Model and settings", model + table(["error setting", "value"], err_rows, text_columns=(0, 1))),
    ]
    write_atomic(path, page(f"pdgc closed-loop simulation: {vehicle.name}", sections, intro))
