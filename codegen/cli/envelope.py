"""``pdgc envelope``: run a dispersed campaign on a generated solver and report it."""

from __future__ import annotations

import os
import sys
from pathlib import Path

from codegen.cli.common import int_at_least, print_table
from codegen.errors import InputError


def register(subparsers) -> None:
    s = subparsers.add_parser(
        "envelope", help="Monte Carlo campaign over dispersed initial states, with a report",
        description="Solve N dispersed cases with the generated solver in DIR (and the "
                    "reference on every M-th case and on cases that stand out), append one "
                    "JSON line per case to RUN_DIR/results.jsonl, and write RUN_DIR/report.html "
                    "and RUN_DIR/summary.json. Running the same command again resumes.")
    s.add_argument("dir", metavar="DIR", help="generated solver tree (with manifest.json, vehicle.toml)")
    s.add_argument("--dispersions", required=True, metavar="FILE", help="dispersion file (TOML)")
    s.add_argument("--cases", required=True, type=int_at_least("--cases", 1), metavar="N",
                   help="number of cases; case i is the same for a given seed whatever N is")
    s.add_argument("--seed", type=int_at_least("--seed", 0), default=None, metavar="S",
                   help="overrides the seed of the dispersion file")
    s.add_argument("--workers", type=int_at_least("--workers", 1), default=None, metavar="K",
                   help="local worker processes (default: number of cores)")
    s.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run on this Dask distributed scheduler (e.g. tcp://127.0.0.1:8786)")
    s.add_argument("--reference-every", type=int_at_least("--reference-every", 0), default=50,
                   metavar="M", help="reference solve on every M-th case (default 50; 0: only "
                   "on cases that stand out)")
    s.add_argument("--stand-out-iterations", type=int_at_least("--stand-out-iterations", 1),
                   default=None, metavar="K",
                   help="a case with more than K iterations in one solve stands out and gets a "
                   "reference solve (default: 1.5 x the median of the first 16 cases)")
    s.add_argument("--out", default=None, metavar="RUN_DIR",
                   help="run directory (default: envelope-<tree name>-seed<S>)")
    s.add_argument("--worst", type=int_at_least("--worst", 1), default=10, metavar="K",
                   help="cases listed per worst-case criterion in the report (default 10)")
    s.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")
    s.set_defaults(func=run)


def run(args) -> int:
    from codegen.verify.envelope.report import write_report
    from codegen.verify.envelope.run import prepare_run, run_campaign
    from codegen.verify.envelope.solvers import read_tree
    from codegen.verify.dispersions import load_dispersions
    from codegen.model.vehicle import load_vehicle

    tree = read_tree(args.dir)
    vehicle = load_vehicle(Path(args.dir) / "vehicle.toml")
    disp = load_dispersions(args.dispersions, vehicle)
    if args.seed is not None:
        disp = disp.with_seed(args.seed)
    if args.workers is not None and args.scheduler:
        raise InputError("--workers", args.workers,
                         "applies to the local pool only; a Dask cluster has its own workers")
    workers = args.workers or os.cpu_count() or 1
    out = Path(args.out) if args.out else Path(f"envelope-{Path(args.dir).resolve().name}-seed{disp.seed}")
    man = prepare_run(out, args.dir, disp, args.dispersions, args.cases, args.reference_every,
                        args.stand_out_iterations)
    info = run_campaign(out, man, workers=workers, scheduler=args.scheduler,
                          progress=not args.no_progress)
    summary = write_report(out, args.worst)
    g = summary["generated"]
    a = summary["accuracy"]

    def pct(st, key, scale=1.0, unit=""):
        if st is None:
            return "-"
        v = st[key]
        return f"{v * scale:.4g}{unit}" if isinstance(v, float) else f"{v}{unit}"

    rows = [
        ("solver", f"{tree['backend']} backend, N = {tree['horizon']}"),
        ("cases", f"{summary['cases_done']} of {summary['cases_planned']} "
                  f"({info['resumed_from']} already recorded, {info['ran']} run now)"),
        ("engine", f"{info['engine']}, wall time {info['wall_s']:.1f} s "
                   f"(all sessions of the run: {sum(x['wall_s'] for x in summary['sessions']):.1f} s)"),
        ("statuses", ", ".join(f"{k} {v}" for k, v in g["status_counts"].items())),
        ("plans that break a real constraint",
         f"{g['plans_breaking_constraints']} of {g['plans_judged']} judged"),
        ("solves above the per-solve cap",
         "-" if g["solves_above_cap"] is None else
         f"{g['solves_above_cap']} (cap {g['iterations_per_solve_cap']}, "
         f"call bound {g['iterations_per_call_bound']})"),
        ("iterations in one solve: worst / p99.9",
         f"{pct(g['iterations_max'], 'worst')} / {pct(g['iterations_max'], 'p99.9')}"),
        ("iterations in the search: worst / p99.9",
         f"{pct(g['iterations_total'], 'worst')} / {pct(g['iterations_total'], 'p99.9')}"),
        ("solve time: worst / p99.9",
         f"{pct(g['solve_time_s'], 'worst', 1e3, ' ms')} / {pct(g['solve_time_s'], 'p99.9', 1e3, ' ms')}"),
        ("reference cases", f"{summary['reference']['cases']} (status agrees on "
                            f"{a['status_matches']} of {a['compared']})"),
    ]
    w = a["worst_fuel_rel_diff"]
    if w is not None:
        rows.append(("worst relative fuel difference", f"{w['value']:.3g} (case {w['case']})"))
    print_table(rows + [("report", out / "report.html"), ("summary", out / "summary.json")])
    if not summary["complete"]:
        print("pdgc: campaign incomplete; run the same command again to resume", file=sys.stderr)
        return 1
    return 0
