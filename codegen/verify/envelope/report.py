"""report.html and summary.json of a run."""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

from codegen.fsutil import write_atomic
from codegen.verify.envelope.figures import figures
from codegen.verify.envelope.records import load_run
from codegen.verify.envelope.summary import WORST_CASES, summarise


def _envelope_of(manifest: dict):
    """The [envelope] of the run's vehicle (the tree's copy), or None when the
    tree is no longer where the run found it (the map then has no box)."""
    from codegen.errors import InputError
    from codegen.model.vehicle import load_vehicle
    try:
        return load_vehicle(Path(manifest["solver_dir"]) / "vehicle.toml").envelope
    except (InputError, OSError, KeyError):
        return None


def render_report(summary: dict, records: list, manifest: dict) -> str:
    """report.html as text: self-contained, images inline (templates/reports/envelope.html.j2)."""
    from codegen.report import render
    from codegen.verify.dispersions import parse_distribution

    g = summary["generated"]
    figs = figures(records, g.get("iterations_per_solve_cap"),
                   g.get("iterations_per_call_bound"), _envelope_of(manifest)) if records else {}

    def stat_row(label, st, scale=1.0, unit=""):
        if st is None:
            return [label + unit] + ["-"] * 6
        return [label + unit, st["count"]] + [
            st[k] * scale if isinstance(st[k], float) else st[k]
            for k in ("p50", "p90", "p99", "p99.9", "worst")]

    ref = summary["reference"]
    overview = [
        stat_row("most iterations in one solve", g["iterations_max"]),
        stat_row("iterations of the answer's solve", g["iterations"]),
        stat_row("iterations in the whole search", g["iterations_total"]),
        stat_row("solves per case", g["solves"]),
        stat_row("solve time", g["solve_time_s"], 1e3, " [ms]"),
        stat_row("reference: most iterations in one solve", ref["iterations_max"]),
        stat_row("reference: solve time", ref["solve_time_s"], 1e3, " [ms]"),
    ]
    why = {"every_m": f"every {summary['reference_every']}-th case",
           "status": "status other than target_met",
           "iterations": f"more than {summary['stand_out_iterations']} iterations in one solve"}
    a = summary["accuracy"]
    accuracy_rows = []
    for key, label in (("worst_fuel_rel_diff", "fuel, relative"), ("worst_fuel_diff_kg", "fuel [kg]"),
                       ("worst_time_of_flight_diff_s", "time of flight [s]"),
                       ("worst_objective_rel_diff", "objective, relative"),
                       ("worst_landing_miss_diff_m", "landing miss [m]")):
        w = a[key]
        accuracy_rows.append([label, None if w is None else w["value"],
                              None if w is None else w["case"]])
    mismatch = a["status_mismatch_cases"][:20]
    worst_rows = [[w["case"], "; ".join(w["why"]), w["status"],
                   f"{w['iterations']} / {w['iterations_max']} / {w['iterations_total']}",
                   w["solve_time_s"] * 1e3, w["fuel_kg"], w["time_of_flight_s"],
                   w["landing_miss_m"], w["reference_status"], w["fuel_rel_diff"]]
                  for w in summary["worst_cases"]]
    disp = manifest["dispersions"]
    dispersion_rows = []
    for table_name in ("position_m", "velocity_mps"):
        for axis, d in disp[table_name].items():
            dispersion_rows.append([f"{table_name}.{axis}", parse_distribution("x", d).describe()])
    for name in ("mass_kg", "time_of_flight_s", "thrust_derate"):
        d = disp.get(name)
        dispersion_rows.append([name, "searched" if d == "search" else
                                ("none" if d is None else parse_distribution(name, d).describe())])
    return render(
        "envelope.html.j2", figs=figs, solver_dir=manifest["solver_dir"],
        vehicle_name=_vehicle_name(manifest),
        cases_done=summary["cases_done"], cases_planned=summary["cases_planned"],
        complete=summary["complete"], overview_rows=overview,
        status_rows=[[s, n, f"{100.0 * n / max(1, summary['cases_done']):.2f} %"]
                     for s, n in g["status_counts"].items()],
        reference_status_rows=list(ref["status_counts"].items()),
        bound_rows=[
            ["plans handed out that break a real constraint (judged from their arrays)",
             f"{g.get('plans_breaking_constraints', '-')} of {g.get('plans_judged', '-')}"],
            ["solves above the per-solve cap",
             "-" if g.get("solves_above_cap") is None else
             f"{g['solves_above_cap']} (cap {g['iterations_per_solve_cap']})"],
            ["stated bound of one call [iterations]",
             g.get("iterations_per_call_bound") or "-"]],
        reason_rows=[[why.get(k, k), n] for k, n in ref["reasons"].items()],
        acc=a, accuracy_rows=accuracy_rows,
        status_pair_rows=[[p["generated"], p["reference"], p["cases"]] for p in a["status_pairs"]],
        mismatch_cases=mismatch,
        mismatch_first_only=len(mismatch) < a["compared"] - a["status_matches"],
        worst_rows=worst_rows, replay_lines=[w["replay"] for w in summary["worst_cases"]],
        run_rows=[["solver tree", manifest["solver_dir"]], ["backend", manifest["solver_backend"]],
                  ["horizon N", manifest["horizon"]], ["seed", manifest["seed"]],
                  ["cases", f"{summary['cases_done']} of {summary['cases_planned']}"],
                  ["dispersion file", manifest.get("dispersions_file") or "-"],
                  ["vehicle sha256", manifest["vehicle_sha256"]]],
        dispersion_rows=dispersion_rows,
        session_rows=[[x.get("started_utc"), x.get("engine"), x.get("ran"), x.get("wall_s")]
                      for x in summary["sessions"]])


def _vehicle_name(manifest: dict):
    """The name in the tree's vehicle.toml, or None when it cannot be read
    (the caution then speaks of the vehicle file in general)."""
    try:
        name = tomllib.loads((Path(manifest["solver_dir"]) / "vehicle.toml").read_text())["name"]
    except (OSError, KeyError, tomllib.TOMLDecodeError):
        return None
    return name if isinstance(name, str) else None


def write_report(run_dir, worst: int = WORST_CASES) -> dict:
    """Write ``summary.json`` and ``report.html`` into the run; return the summary."""
    run_dir = Path(run_dir)
    summary = summarise(run_dir, worst)
    man, records = load_run(run_dir)
    write_atomic(run_dir / "summary.json", json.dumps(summary, indent=2) + "\n")
    write_atomic(run_dir / "report.html", render_report(summary, records, man))
    return summary
