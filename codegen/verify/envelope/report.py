"""report.html and summary.json of a run."""

from __future__ import annotations

import json
from pathlib import Path

from codegen.fsutil import write_atomic
from codegen.verify.envelope.figures import _figures
from codegen.verify.envelope.records import load_run
from codegen.verify.envelope.summary import WORST_CASES, summarise


def render_report(summary: dict, records: list, manifest: dict) -> str:
    """report.html as text: self-contained, images inline."""
    from codegen import report as R

    figs = _figures(records) if records else {}
    g = summary["generated"]

    def stat_rows(label, st, scale=1.0, unit=""):
        if st is None:
            return [label + unit] + ["-"] * 6
        return [label + unit, st["count"]] + [
            st[k] * scale if isinstance(st[k], float) else st[k]
            for k in ("p50", "p90", "p99", "p99.9", "worst")]

    head = ["quantity", "cases", "p50", "p90", "p99", "p99.9", "worst"]
    overview = R.table(head, [
        stat_rows("most iterations in one solve", g["iterations_max"]),
        stat_rows("iterations of the answer's solve", g["iterations"]),
        stat_rows("iterations in the whole search", g["iterations_total"]),
        stat_rows("solves per case", g["solves"]),
        stat_rows("solve time", g["solve_time_s"], 1e3, " [ms]"),
        stat_rows("reference: most iterations in one solve", summary["reference"]["iterations_max"]),
        stat_rows("reference: solve time", summary["reference"]["solve_time_s"], 1e3, " [ms]"),
    ], text_columns=(0,))
    pct_note = ('<p class="note">Percentiles are nearest-rank: the smallest value with at least '
                "that share of cases at or below it. Solve times are measured, so they vary "
                "between runs; everything else in a record is reproducible.</p>")

    status_rows = [[s, n, f"{100.0 * n / max(1, summary['cases_done']):.2f} %"]
                   for s, n in g["status_counts"].items()]
    statuses = R.table(["status (generated solver)", "cases", "share"], status_rows, text_columns=(0,))
    ref_status = R.table(["status (reference)", "cases"],
                         list(summary["reference"]["status_counts"].items()), text_columns=(0,))
    reasons = R.table(["why the reference ran", "cases"],
                      [[{"every_m": f"every {summary['reference_every']}-th case",
                         "status": "status other than optimal",
                         "iterations": f"more than {summary['stand_out_iterations']} iterations in one solve"
                         }.get(k, k), n] for k, n in summary["reference"]["reasons"].items()],
                      text_columns=(0,))

    a = summary["accuracy"]
    acc_rows = []
    for key, label in (("worst_fuel_rel_diff", "fuel, relative"), ("worst_fuel_diff_kg", "fuel [kg]"),
                       ("worst_time_of_flight_diff_s", "time of flight [s]"),
                       ("worst_objective_rel_diff", "objective, relative"),
                       ("worst_landing_miss_diff_m", "landing miss [m]")):
        w = a[key]
        acc_rows.append([label, None if w is None else w["value"], None if w is None else w["case"]])
    acc_body = (f"<p>Compared with the reference on {a['compared']} cases; status agrees on "
                f"{a['status_matches']}, both solved on {a['both_solved']}. Differences are "
                "generated minus reference.</p>"
                + R.table(["worst difference", "value", "case"], acc_rows, text_columns=(0,)))
    acc_body += R.table(["status (generated)", "status (reference)", "cases"],
                        [[p["generated"], p["reference"], p["cases"]] for p in a["status_pairs"]],
                        text_columns=(0, 1))
    if a["status_mismatch_cases"]:
        first = a["status_mismatch_cases"][:20]
        acc_body += ("<p>Cases whose status differs from the reference"
                     + (f" (first {len(first)})"
                        if len(first) < a["compared"] - a["status_matches"] else "") + ": "
                     + ", ".join(str(c) for c in first) + "</p>")
    if "accuracy" in figs:
        acc_body += R.image(figs["accuracy"], "relative fuel difference from the reference")

    worst_rows = []
    for w in summary["worst_cases"]:
        worst_rows.append([w["case"], "; ".join(w["why"]), w["status"],
                           f"{w['iterations']} / {w['iterations_max']} / {w['iterations_total']}",
                           w["solve_time_s"] * 1e3, w["fuel_kg"], w["time_of_flight_s"],
                           w["landing_miss_m"], w["reference_status"], w["fuel_rel_diff"]])
    worst = R.table(["case", "listed for", "status", "iterations answer / max / total",
                     "solve time [ms]", "fuel [kg]", "tof [s]", "miss [m]", "reference",
                     "fuel rel. diff"], worst_rows, text_columns=(1, 2, 8),
                    notes=[f"replay: <code>{R.esc(w['replay'])}</code>"
                           for w in summary["worst_cases"]])

    sessions = R.table(["started (UTC)", "engine", "cases run", "wall time [s]"],
                       [[s.get("started_utc"), s.get("engine"), s.get("ran"), s.get("wall_s")]
                        for s in summary["sessions"]], text_columns=(0, 1))
    disp = manifest["dispersions"]
    disp_rows = []
    from codegen.verify.dispersions import parse_distribution
    for table_name in ("position_m", "velocity_mps"):
        for axis, d in disp[table_name].items():
            disp_rows.append([f"{table_name}.{axis}", parse_distribution("x", d).describe()])
    for name in ("mass_kg", "time_of_flight_s", "thrust_derate"):
        d = disp.get(name)
        disp_rows.append([name, "searched" if d == "search" else
                          ("none" if d is None else parse_distribution(name, d).describe())])
    inputs = (R.table(["run", ""], [
        ["solver tree", manifest["solver_dir"]], ["backend", manifest["solver_backend"]],
        ["horizon N", manifest["horizon"]], ["seed", manifest["seed"]],
        ["cases", f"{summary['cases_done']} of {summary['cases_planned']}"],
        ["dispersion file", manifest.get("dispersions_file") or "-"],
        ["vehicle sha256", manifest["vehicle_sha256"]],
    ], text_columns=(0, 1)) + R.table(["drawn quantity", "distribution"], disp_rows, text_columns=(0, 1))
        + sessions)

    sections = [
        ("overview", "Worst case and percentiles", overview + pct_note),
        ("statuses", "Status counts", statuses + ref_status + reasons),
        ("iterations", "Iteration histogram",
         R.image(figs["iterations"], "iteration histogram") if figs else "<p>no cases</p>"),
        ("solve-time", "Solve-time distribution",
         R.image(figs["solve_time"], "solve-time distribution") if figs else "<p>no cases</p>"),
        ("accuracy", "Accuracy against the reference", acc_body),
        ("feasibility", "Feasibility over initial downrange and altitude (divert footprint)",
         (R.image(figs["feasibility"], "feasibility map") if figs else "")
         + '<p class="note">Each dot is one case at its initial downrange and altitude, '
         "coloured by the generated solver's status.</p>"),
        ("fuel-divert", "Fuel versus divert distance",
         R.image(figs["fuel_divert"], "fuel versus divert distance") if figs else ""),
        ("worst-cases", "Worst cases and how to replay them",
         worst + '<p class="note">Each replay line runs the same case with <code>pdgc solve</code> '
         "on the same solver and prints its status and iterations.</p>"),
        ("inputs", "What was run", inputs),
    ]
    done = "complete" if summary["complete"] else "INCOMPLETE (resume with the same command)"
    intro = (f'<p>Envelope campaign of the solver in <code>{R.esc(manifest["solver_dir"])}</code>: '
             f"{summary['cases_done']} of {summary['cases_planned']} cases, {done}.</p>"
             '<p class="caution">Not flight-qualified. These figures come from a desktop run; '
             "they must be confirmed by independent verification and validation on the target "
             "before any use on a vehicle.</p>")
    return R.page("pdgc envelope report", sections, intro)


def write_report(run_dir, worst: int = WORST_CASES) -> dict:
    """Write ``summary.json`` and ``report.html`` into the run; return the summary."""
    run_dir = Path(run_dir)
    summary = summarise(run_dir, worst)
    man, records = load_run(run_dir)
    write_atomic(run_dir / "summary.json", json.dumps(summary, indent=2) + "\n")
    write_atomic(run_dir / "report.html", render_report(summary, records, man))
    return summary
