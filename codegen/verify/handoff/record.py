"""The verification record: its sections (data), then Markdown and HTML."""

from __future__ import annotations

import json
import re

from markupsafe import Markup, escape

from codegen import versions
from codegen.emit import environment
from codegen.model import tofsearch
from codegen.report import caution_text, render
from codegen.verify.handoff.checks import Checks
from codegen.verify.handoff.record_blocks import _code, _g, _table, _text
from codegen.verify.handoff.record_checks import _check_sections
from codegen.verify.handoff.tools import _sha256


def record_sections(manifest, vehicle, vectors, tol, checks: Checks | None, campaign,
                    files: dict, solver_check: dict | None = None) -> list:
    prefix, n = manifest["c_name"], manifest["horizon"]
    sec = []

    sec.append({"title": "Caution", "blocks": [_text(f"**{caution_text(vehicle.name)}**")]})

    ident = [("vehicle", vehicle.name), ("vehicle file sha256", manifest["vehicle"]["sha256"]),
             ("horizon N (intervals)", n), ("precision", manifest["precision"]),
             ("backend", "native (pdgc interior-point SOCP solver)"), ("C name", prefix),
             ("reentrant", manifest.get("reentrant")), ("heap-free", manifest.get("heap_free")),
             ("generator", f"pdgc {manifest.get('version')}"),
             ("problem size", ", ".join(f"{k} {v}" for k, v in sorted(manifest["problem"].items()))),
             ("generation manifest sha256",
              _sha256(files["generation-manifest.json"]))]
    sec.append({"title": "Identification", "blocks": [_table(("item", "value"), ident)]})
    sec.append({"title": "Software versions",
                "blocks": _version_blocks(manifest.get("environment"), versions.installed())})

    from codegen.model.vehicle import VEHICLE_KEYS
    vrows = [(k, getattr(vehicle, k), VEHICLE_KEYS[k][1]) for k in VEHICLE_KEYS]
    env = vehicle.envelope
    for k in ("position_min_m", "position_max_m", "velocity_min_mps", "velocity_max_mps",
              "mass_min_kg", "mass_max_kg"):
        vrows.append((f"envelope.{k}", getattr(env, k), "box of initial states checked"))
    sec.append({"title": "Vehicle constants", "blocks": [
        _text("From `vehicle.toml` (SI units in the key names); compiled into the C sources."),
        _table(("key", "value", "meaning"), vrows)]})

    opts = manifest.get("options", {})
    srows = [("iterations_per_solve_max (default / cap)",
              f"{opts.get('iterations_per_solve_max_default')} / {opts.get('iterations_per_solve_max_limit')}",
              f"`{prefix}_guidance_config.iterations_per_solve_max`, per solve"),
             ("tof_tolerance_s (default)", opts.get("tof_tolerance_s"),
              "time-of-flight search stops when its bracket is shorter"),
             ("time-of-flight search",
              f"two phases (target, then merit) of a grid of {tofsearch.GRID_POINTS} and Brent's "
              f"minimiser (at most {tofsearch.BRENT_MAX_STEPS} steps); a failed probe is retried "
              f"once nearby (at most {tofsearch.RETRY_BUDGET} retries); at most "
              f"{tofsearch.max_evaluations()} probes",
              "bracket of Acikmese & Ploen (2007) from the current state")]
    sec.append({"title": "Horizon and settings", "blocks": [
        _text(f"N = {n} intervals ({n + 1} nodes), zero-order hold on thrust. "
              "Settings of the generated code:"),
        _table(("setting", "value", "meaning"), srows)]})

    # test vectors
    kinds = {}
    for v in vectors:
        kinds[v.kind] = kinds.get(v.kind, 0) + 1
    trows = [
        ("status", "all", "equal to the expected status", "-"),
        ("time of flight", "fixed", "equal to the input (bit for bit)", "0"),
        ("fuel", "fixed", "relative error", _g(tol["fuel_rel_fixed"])),
        ("objective (scaled)", "fixed", "relative error", _g(tol["objective_rel_fixed"])),
        ("position, all nodes", "fixed, and searched at the same tof", "largest absolute error [m]",
         f"{_g(tol['position_abs_m'])} ({tol['position_rel_of_length']:g} x length unit {_g(tol['length_m'])} m)"),
        ("thrust, all intervals", "fixed, and searched at the same tof", "largest absolute error [N]",
         f"{_g(tol['thrust_abs_n'])} ({tol['thrust_rel_of_upper']:g} x upper thrust bound)"),
        ("time of flight", "searched", "absolute error [s] (the search tolerance)",
         _g(tol["tof_abs_searched_s"])),
        ("fuel", "searched", "relative error", _g(tol["fuel_rel_searched"])),
        ("same-tof test", "searched", "arrays compared when |dtof| <= this x tof",
         _g(tol["same_tof_rel"])),
        ("refused input", "input_refused", "plan left untouched (sentinels unchanged)", "-"),
    ]
    vrows = [(i, v.name, v.kind, v.source,
              "searched" if v.searched else _g(v.time_of_flight_s, 8), v.status,
              _g(v.expect_tof_s, 8) if v.status == "target_met" else "-",
              _g(v.fuel_kg, 10) if v.status == "target_met" else "-")
             for i, v in enumerate(vectors)]
    sec.append({"title": "Test vectors", "blocks": [
        _text(f"{len(vectors)} vectors in `test/{prefix}_vectors.c` "
              f"({', '.join(f'{k} {c}' for k, c in kinds.items())}). Expected outputs come "
              "from the reference solve (Clarabel through CVXPY at tight tolerances, 1e-9, with "
              "the generated code's default sequence of solves), except `contract` "
              "vectors, whose expected status is the behaviour the header promises. "
              "Tolerances are those of `pdgc check` for this precision. Fixed-time-of-flight "
              "vectors carry the tight checks; a searched time of flight may land on a "
              "neighbouring point of the search on another FPU or compiler, so searched "
              "vectors are checked on time of flight within the search tolerance and fuel "
              "within a looser relative tolerance, and their arrays only when both answers "
              "settled on the same time of flight."),
        _table(("output", "vectors", "check", "tolerance"), trows),
        _table(("#", "name", "kind", "source", "tof input [s]", "expected status",
                "expected tof [s]", "expected fuel [kg]"), vrows)]})

    if checks is None:
        sec.append({"title": "Target checks", "blocks": [_text("Not run (--no-checks).")]})
    else:
        sec += _check_sections(checks, prefix)

    if solver_check is not None:
        sec.append({"title": "Generated solver against the reference",
                    "blocks": _solver_check_blocks(solver_check)})
    if campaign is None:
        sec.append({"title": "Envelope campaign", "blocks": [
            _text("No campaign given (`--campaign RUN_DIR`): none summarised here.")]})
    else:
        sec.append({"title": "Envelope campaign", "blocks": _campaign_blocks(campaign)})

    mrows = [(p, _sha256(files[p])) for p in sorted(files)]
    gen = json.loads(files["generation-manifest.json"])
    changed = [p for p, h in sorted(gen["files"].items())
               if p not in files or _sha256(files[p]) != h]
    sec.append({"title": "Manifest", "blocks": [
        _text("sha256 of every file of the package except this record and MANIFEST.sha256 "
              "(which lists all files, this record included: `sha256sum -c MANIFEST.sha256`). "
              "Files of the generated tree that the package replaces: "
              + (", ".join(f"`{p}`" for p in changed) if changed else "none") + "."),
        _table(("file", "sha256"), mrows)]})
    return sec


def _solver_check_blocks(c: dict) -> list:
    tol = c["tolerances"]
    rows = [("cases (seed)", f"{c['cases']} ({c['seed']}); every 5th searches the time of flight"),
            ("status agreement", f"{c['status_agreement']} of {c['cases']}"),
            ("status pairs (generated/reference)",
             ", ".join(f"{k}: {v}" for k, v in c["status_pairs"].items())),
            ("worst relative objective error (same tof)",
             f"{_g(c['worst_objective_rel'])} (tolerance {_g(tol['objective_rel'])})"),
            ("worst relative fuel error", f"{_g(c['worst_fuel_rel'])} (searched: tolerance "
                                           f"{_g(tol['fuel_rel_search'])})"),
            ("worst position difference [m]",
             f"{_g(c['worst_position_m'])} (tolerance {_g(tol['position_rel'] * c['length_m'])})"),
            ("worst thrust difference [N]",
             f"{_g(c['worst_thrust_n'])} (tolerance {_g(tol['thrust_rel'] * c['thrust_upper_n'])})"),
            ("iterations per solve (median / worst)",
             f"{_g(c['iterations_median'])} / {c['iterations_worst']}"),
            ("failing cases", c["failures"])]
    blocks = [_text("`pdgc check` on the tree: the generated solver (compiled on the host "
                    "through cffi) against the reference on dispersed states drawn from the "
                    "envelope (70 % inside, 20 % on its faces, 10 % beyond), fixed times of "
                    "flight over the lower part of the bracket, both running the same sequence of "
                    "solves; every plan the generated solver hands out is also judged against "
                    "the real constraints, independently of the C's own checks."),
              _table(("item", "value"), rows)]
    if c["failed_cases"]:
        blocks.append(_code("\n".join(f"case {f['index']} ({f['kind']}): {'; '.join(f['why'])}"
                                      for f in c["failed_cases"])))
    return blocks


def _campaign_blocks(s: dict) -> list:
    g = s.get("generated", {})
    a = s.get("accuracy", {})

    def st(d, scale=1.0):
        if not d:
            return "-"
        return (f"median {_g(d.get('p50') * scale)}, p99 {_g(d.get('p99') * scale)}, "
                f"worst {_g(d.get('worst') * scale)}")

    rows = [("cases", f"{s.get('cases_done')} of {s.get('cases_planned')}"
             + ("" if s.get("complete") else " (INCOMPLETE)")),
            ("seed", s.get("seed")), ("horizon", s.get("horizon")),
            ("generated: statuses", ", ".join(f"{k} {v}" for k, v in g.get("status_counts", {}).items())),
            ("generated: most iterations in one solve", st(g.get("iterations_max"))),
            ("generated: solves per plan", st(g.get("solves"))),
            ("generated: plan time [ms] (campaign machine)", st(g.get("solve_time_s"), 1e3)),
            ("reference solves", s.get("reference", {}).get("cases")),
            ("reference: statuses", ", ".join(f"{k} {v}" for k, v in
                                              s.get("reference", {}).get("status_counts", {}).items())),
            ("status agreement with the reference",
             f"{a.get('status_matches')} of {a.get('compared')}"),
            ("|relative fuel difference|", st(a.get("fuel_rel_diff_abs")))]
    for key in ("worst_fuel_rel_diff", "worst_time_of_flight_diff_s", "worst_objective_rel_diff"):
        w = a.get(key)
        if w:
            rows.append((key.replace("_", " "), f"{_g(w['value'])} (case {w['case']})"))
    return [_text("Summary of the envelope campaign (`pdgc envelope`) run on this tree "
                  "(its summary.json; the run's manifest names this tree's manifest hash). "
                  "Both sides run the same sequence of solves: where the target is out of "
                  "reach, both answer `best_reachable` (the best reachable plan)."),
            _table(("item", "value"), rows)]


def render_record(sections: list, title: str, intro: list) -> tuple:
    """(Markdown, HTML) of the record."""
    env = environment()
    md = env.get_template("handoff/record.md.j2").render(
        title=title, intro=intro, sections=[{"title": s["title"], "blocks": [
            dict(b, headers=[h.replace("|", "\\|") for h in b["headers"]],
                 rows=[[c.replace("|", "\\|").replace("\n", " ") for c in r] for r in b["rows"]])
            if b["kind"] == "table" else b for b in s["blocks"]]} for s in sections])

    html = render("handoff_record.html.j2", title=title, intro=[_inline(p) for p in intro],
                  sections=[{"anchor": re.sub(r"[^a-z0-9]+", "-", s["title"].lower()).strip("-"),
                             "title": s["title"], "caution": s["title"] == "Caution",
                             "blocks": [_html_block(b) for b in s["blocks"]]}
                            for s in sections])
    return md, html


def _inline(text: str) -> Markup:
    """Escaped text with the record's **bold** and `code` as tags."""
    h = str(escape(text))
    h = re.sub(r"\*\*(.+?)\*\*", r"<strong>\1</strong>", h)
    return Markup(re.sub(r"`([^`]+)`", r"<code>\1</code>", h))


def _html_block(b: dict) -> dict:
    if b["kind"] == "text":
        return {"kind": "text", "text": _inline(b["text"])}
    if b["kind"] == "code":
        return b
    return {"kind": "table", "headers": b["headers"],
            "rows": [[_inline(c) for c in r] for r in b["rows"]]}


def _version_blocks(generated: dict | None, now: dict) -> list:
    """Python and package versions: the tree's (its manifest) beside this hand-off's."""
    def shown(table, key):
        if table is None or key not in table:
            return "not recorded"
        return table[key] or "not installed"

    gen_pk = None if generated is None else generated.get("packages", {})
    rows = [("Python", shown(generated, "python"), now["python"])]
    rows += [(name, shown(gen_pk, name), shown(now["packages"], name))
             for name in now["packages"]]
    diff = versions.differences(generated, now)
    text = ("The tree was generated under the versions of the first column (its "
            "manifest.json); this package's test vectors were computed by the reference "
            "under those of the second. pdgc pins them in its requirements.lock. ")
    if not diff:
        text += "The two columns agree."
    elif generated is None:
        text += ("The tree's manifest records no versions (generated by an older pdgc): "
                 "regenerate it to have them recorded.")
    else:
        text += ("**They differ** (" + ", ".join(name for name, _, _ in diff) + "): the "
                 "expected outputs come from the versions of this hand-off; regenerate the "
                 "tree under them, or review the difference.")
    return [_text(text), _table(("software", "generated the tree", "ran this hand-off"), rows)]
