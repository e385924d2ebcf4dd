"""The JSON summary of a run: percentiles, status counts, accuracy, worst cases."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from codegen.model.trajectory import SOLVED
from codegen.verify.envelope.records import derated_vehicle_file, load_run, replay_command


PERCENTILES = (50.0, 90.0, 99.0, 99.9)
WORST_CASES = 10


def stats(values) -> dict | None:
    """Count, best, worst, mean and nearest-rank percentiles (the smallest value
    with at least p % of values at or below it: numpy's "inverted_cdf")."""
    vals = sorted(v for v in values if v is not None)
    if not vals:
        return None
    out = {"count": len(vals), "worst": vals[-1], "best": vals[0],
           "mean": float(sum(vals)) / len(vals)}
    ranks = np.percentile(np.asarray(vals), PERCENTILES, method="inverted_cdf")
    for p, v in zip(PERCENTILES, ranks.tolist()):      # ints stay ints, as recorded
        out[f"p{p:g}"] = v
    return out


def _counts(items) -> dict:
    out = {}
    for s in items:
        out[s] = out.get(s, 0) + 1
    return dict(sorted(out.items(), key=lambda kv: (-kv[1], kv[0])))


def _worst_by(records, key, count, value):
    scored = [(value(r), r["case"]) for r in records]
    scored = [(v, c) for v, c in scored if v is not None]
    scored.sort(key=lambda vc: (-vc[0], vc[1]))
    return [c for _, c in scored[:count]]


def iteration_limits(solver_dir) -> dict:
    """The tree's stated bounds: the per-solve cap (its default setting) and
    the iterations of a whole call (cap x worst-case solves of a searched
    call); {} when the solver is not a generated tree (a dry run)."""
    import json
    from pathlib import Path
    try:
        opts = json.loads((Path(solver_dir) / "manifest.json").read_text())["options"]
        cap = int(opts["iterations_per_solve_max_default"])
        return {"cap": cap, "call_bound": cap * int(opts["solves_per_call_max_search"])}
    except (OSError, ValueError, KeyError, TypeError):
        return {}


def summarise(run_dir, worst: int = WORST_CASES, write_replay_vehicles: bool = True) -> dict:
    """The JSON summary of a run (complete or not)."""
    man, records = load_run(run_dir)
    limits = iteration_limits(man["solver_dir"])
    gens = [r["generated"] for r in records]
    refs = [r for r in records if r["reference"] is not None]
    accs = [r for r in refs if r["accuracy"] is not None]

    def absval(x):
        return None if x is None else abs(x)

    def worst_acc(field):
        cands = [(abs(r["accuracy"][field]), r["case"], r["accuracy"][field]) for r in accs
                 if r["accuracy"][field] is not None]
        if not cands:
            return None
        cands.sort(key=lambda t: (-t[0], t[1]))
        return {"case": cands[0][1], "value": cands[0][2]}

    by_case = {r["case"]: r for r in records}
    why = {}

    def mark(cases, reason):
        for c in cases:
            why.setdefault(c, []).append(reason)

    mark(_worst_by(records, "iterations_max", worst, lambda r: r["generated"]["iterations_max"]),
         "most iterations in one solve")
    mark(_worst_by(records, "iterations_total", worst, lambda r: r["generated"]["iterations_total"]),
         "most iterations in the search")
    mark(_worst_by(records, "solve_time_s", worst, lambda r: r["generated"]["solve_time_s"]),
         "longest solve time")
    mark([r["case"] for r in records if r["generated"]["status"] not in SOLVED][:worst], "not solved")
    mark([r["case"] for r in accs if not r["accuracy"]["status_match"]][:worst],
         "status differs from the reference")
    mark(_worst_by(accs, "fuel", worst, lambda r: absval(r["accuracy"]["fuel_rel_diff"]) or None),
         "largest fuel difference from the reference")
    replay_dir = Path(run_dir) / "replay"
    worst_rows = []
    for c in sorted(why, key=lambda c: (-by_case[c]["generated"]["iterations_max"], c)):
        r = by_case[c]
        g = r["generated"]
        vehicle_path = None
        if r["inputs"].get("thrust_derate") is not None and write_replay_vehicles:
            vehicle_path = derated_vehicle_file(man, r, replay_dir)
        worst_rows.append({
            "case": c, "why": why[c], "status": g["status"], "iterations": g["iterations"],
            "iterations_max": g["iterations_max"], "iterations_total": g["iterations_total"],
            "solve_time_s": g["solve_time_s"], "fuel_kg": g["fuel_kg"],
            "time_of_flight_s": g["time_of_flight_s"], "landing_miss_m": g["landing_miss_m"],
            "reference_status": r["reference"]["status"] if r["reference"] else None,
            "fuel_rel_diff": r["accuracy"]["fuel_rel_diff"] if r["accuracy"] else None,
            "inputs": r["inputs"],
            "replay": replay_command(man, r, vehicle_path),
        })

    reasons = _counts(w for r in refs for w in r["reference_why"])
    return {
        "format": "pdgc-envelope-summary/1",
        "solver_dir": man["solver_dir"],
        "solver_backend": man["solver_backend"],
        "horizon": man["horizon"],
        "seed": man["seed"],
        "cases_planned": man["cases"],
        "cases_done": len(records),
        "complete": len(records) == man["cases"],
        "reference_every": man["reference_every"],
        "stand_out_iterations": man["stand_out_iterations"],
        "generated": {
            "status_counts": _counts(g["status"] for g in gens),
            # Plans handed out (target_met, best_reachable) that break a real
            # constraint beyond tolerance, judged here from their own arrays.
            "plans_judged": sum(1 for g in gens if g.get("flyable") is not None),
            "plans_breaking_constraints": sum(1 for g in gens if g.get("flyable") is False),
            "plans_breaking_constraints_cases": [r["case"] for r in records
                                                 if r["generated"].get("flyable") is False][:100],
            "solves_above_cap": sum(1 for g in gens if g["iterations_max"] > limits["cap"])
            if limits.get("cap") else None,
            "iterations_per_solve_cap": limits.get("cap"),
            "iterations_per_call_bound": limits.get("call_bound"),
            "iterations": stats(g["iterations"] for g in gens),
            "iterations_max": stats(g["iterations_max"] for g in gens),
            "iterations_total": stats(g["iterations_total"] for g in gens),
            "solves": stats(g["solves"] for g in gens),
            "solve_time_s": stats(g["solve_time_s"] for g in gens),
        },
        "reference": {
            "cases": len(refs),
            "reasons": reasons,
            "status_counts": _counts(r["reference"]["status"] for r in refs),
            "iterations_max": stats(r["reference"]["iterations_max"] for r in refs),
            "solve_time_s": stats(r["reference"]["solve_time_s"] for r in refs),
        },
        "accuracy": {
            "compared": len(accs),
            "status_matches": sum(1 for r in accs if r["accuracy"]["status_match"]),
            "status_mismatch_cases": [r["case"] for r in accs if not r["accuracy"]["status_match"]][:100],
            "status_pairs": [{"generated": g, "reference": rf, "cases": n} for (g, rf), n in
                             _counts((r["generated"]["status"], r["reference"]["status"])
                                     for r in accs).items()],
            "both_solved": sum(1 for r in accs if r["accuracy"]["fuel_diff_kg"] is not None),
            "fuel_rel_diff_abs": stats(absval(r["accuracy"]["fuel_rel_diff"]) for r in accs),
            "worst_fuel_rel_diff": worst_acc("fuel_rel_diff"),
            "worst_fuel_diff_kg": worst_acc("fuel_diff_kg"),
            "worst_time_of_flight_diff_s": worst_acc("time_of_flight_diff_s"),
            "worst_objective_rel_diff": worst_acc("objective_rel_diff"),
            "worst_landing_miss_diff_m": worst_acc("landing_miss_diff_m"),
        },
        "sessions": man.get("sessions", []),
        "worst_cases": worst_rows,
    }
