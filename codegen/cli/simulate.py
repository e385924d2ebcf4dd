"""`pdgc simulate`: closed-loop Monte Carlo landings with a guidance solver tree."""

from __future__ import annotations

import sys

from codegen.cli.common import (finite_float, int_at_least, parse_state, parse_vector3,
                                 print_table)
from codegen.progress import Progress


def register(sub) -> None:
    s = sub.add_parser(
        "simulate",
        help="fly a guidance solver tree in a closed-loop Monte Carlo (resumable)",
        description="Closed-loop landing simulation: a truth model (3-DoF, variable mass, RK4) "
                    "flown by the solver in DIR re-planning at --rate from navigation estimates, "
                    "with the errors of --errors. Runs are appended to RUN_DIR/runs.jsonl; the "
                    "same command resumes an interrupted batch. Writes summary.json and a "
                    "self-contained report.html.")
    s.add_argument("dir", help="generated solver tree (or a dry-run tree, see DEVELOPERS.md)")
    s.add_argument("--runs", type=int_at_least("--runs", 1), required=True, help="number of runs")
    s.add_argument("--seed", type=int_at_least("--seed", 0), default=1, help="batch seed (default 1)")
    s.add_argument("--errors", default=None, metavar="FILE",
                   help="error file (TOML); default: no errors (ideal loop)")
    s.add_argument("--rate", type=finite_float("--rate"), default=1.0, metavar="HZ",
                   help="guidance re-plan rate (default 1 Hz; 0 flies the first plan open loop)")
    s.add_argument("--out", default="sim-out", metavar="RUN_DIR",
                   help="run directory (default sim-out)")
    s.add_argument("--step", type=finite_float("--step"), default=None, metavar="S",
                   help="truth RK4 step (default 0.01 s)")
    s.add_argument("--control-rate", type=finite_float("--control-rate"), default=None, metavar="HZ",
                   help="rate of the tracking loop around the plan (default 10 Hz)")
    s.add_argument("--tracking-bandwidth", type=finite_float("--tracking-bandwidth"), default=None,
                   metavar="RAD_S", help="tracking loop bandwidth (default 0.5 rad/s; 0: none)")
    s.add_argument("--terminal-s", type=finite_float("--terminal-s"), default=None, metavar="S",
                   help="stop re-planning below this time to go (default 8 s)")
    s.add_argument("--descent-altitude", type=finite_float("--descent-altitude"), default=None,
                   metavar="M", help="guidance aims at rest this high above the target, then a "
                   "constant-speed vertical descent to contact (default 4 m; 0: none)")
    s.add_argument("--descent-speed", type=finite_float("--descent-speed"), default=None, metavar="MPS",
                   help="speed of the terminal descent (default 1 m/s)")
    s.add_argument("--state", default=None, help="nominal start X,Y,Z,VX,VY,VZ,MASS "
                   "(default: centre of the vehicle's envelope, its largest mass)")
    s.add_argument("--target", default=None, help="X,Y,Z of the landing target [m]")
    s.add_argument("--reserve-throttle", type=finite_float("--reserve-throttle"), default=None,
                   metavar="FRACTION", help="highest throttle a re-plan may use when the target "
                   "is out of reach at the vehicle's throttle_max (the engine's reserve; "
                   "default 1, all of it; throttle_max: none)")
    s.add_argument("--reserve-steps", type=int_at_least("--reserve-steps", 0), default=None,
                   metavar="K", help="bisection steps for the lowest throttle limit that meets "
                   "the target (default 4)")
    s.add_argument("--touchdown-miss", type=finite_float("--touchdown-miss"), default=None,
                   metavar="M", help="largest horizontal miss of a landing (default: the vehicle "
                   "file's [touchdown] miss_max_m)")
    s.add_argument("--touchdown-vertical-speed", type=finite_float("--touchdown-vertical-speed"),
                   default=None, metavar="MPS", help="largest downward speed of a landing "
                   "(default: [touchdown] speed_vertical_max_mps)")
    s.add_argument("--touchdown-horizontal-speed",
                   type=finite_float("--touchdown-horizontal-speed"), default=None, metavar="MPS",
                   help="largest horizontal speed of a landing (default: [touchdown] "
                   "speed_horizontal_max_mps)")
    s.add_argument("--crash-speed", type=finite_float("--crash-speed"), default=None, metavar="MPS",
                   help="a touchdown faster than this is a crash (default 5 m/s, common practice)")
    s.add_argument("--workers", type=int_at_least("--workers", 1), default=1, metavar="K",
                   help="local worker processes (default 1); the records do not depend on it")
    s.add_argument("--quiet", action="store_true", help="no line per run")
    s.set_defaults(func=run)


def run(args) -> int:
    from codegen.sim.error_model import ErrorModel, load_errors
    from codegen.sim.batch import run_batch
    from codegen.sim.settings import default_settings
    from codegen.sim.tree import load_guidance_solver

    errors = load_errors(args.errors) if args.errors else ErrorModel()
    solver = load_guidance_solver(args.dir)
    overrides = dict(rate_hz=args.rate, step_s=args.step, control_rate_hz=args.control_rate,
                     tracking_bandwidth_rad_s=args.tracking_bandwidth, terminal_s=args.terminal_s,
                     descent_altitude_m=args.descent_altitude, descent_speed_mps=args.descent_speed,
                     reserve_throttle=args.reserve_throttle, reserve_steps=args.reserve_steps,
                     miss_max_m=args.touchdown_miss,
                     speed_vertical_max_mps=args.touchdown_vertical_speed,
                     speed_horizontal_max_mps=args.touchdown_horizontal_speed,
                     crash_speed_mps=args.crash_speed)
    if args.state:
        pos, vel, mass = parse_state(args.state)
        overrides.update(position_m=tuple(pos), velocity_mps=tuple(vel), mass_kg=mass)
    if args.target:
        overrides["target_m"] = tuple(parse_vector3("--target", args.target))
    settings = default_settings(solver.vehicle, **overrides)

    # A bar on a terminal only; the line per run (unless --quiet) is written
    # above it, and is all there is in a log, as before the bar.
    bar = Progress(0, "pdgc simulate", "runs", enabled=False)

    def progress(kind, info):
        nonlocal bar
        if kind == "start":
            print(f"pdgc: simulate: {info['runs']} runs, {info['done']} already in {args.out}, "
                  f"{info['todo']} to fly", file=sys.stderr, flush=True)
            bar = Progress(info["runs"], "pdgc simulate", "runs", initial=info["done"],
                           enabled=sys.stderr.isatty())
            return
        r = info
        if not args.quiet:
            if r["status"] in ("landed", "out_of_limits", "crashed"):
                tag = "" if r["status"] == "landed" else f" {r['status'].upper()}"
                bar.write(f"run {r['run']:5d}:{tag} miss {r['position_error_m']:.3f} m, velocity error "
                          f"{r['velocity_error_mps']:.3f} m/s, fuel {r['fuel_kg']:.2f} kg, "
                          f"solves {r['solves']} ({r['failures']} failed), "
                          f"worst solve {r['worst_solve_time_s'] * 1e3:.2f} ms")
            else:
                bar.write(f"run {r['run']:5d}: {r['status']}")
        bar.update()

    try:
        summary = run_batch(args.dir, args.runs, args.seed, errors, settings, args.out,
                            progress=progress, solver=solver, workers=args.workers)
    finally:
        bar.close()

    def stat(d, unit, digits=4):
        if not d["n"]:
            return "-"
        return (f"mean {d['mean']:.{digits}g}, 3-sigma {d['three_sigma']:.{digits}g}, "
                f"worst {d['worst']:.{digits}g} {unit}")

    rate = f"{summary['no_plan_rate']:.2%}"
    if summary["no_plan_rate_flagged"]:
        rate += " (HIGH)"
    causes = ", ".join(f"{k}: {v}" for k, v in sorted(summary["failure_statuses"].items()))
    rows = [
        ("runs / landed / out of limits / crashed",
         f"{summary['runs']} / {summary['landed']} / {summary['out_of_limits']} / "
         f"{summary['crashed']}"),
        ("touchdown position error", stat(summary["position_error_m"], "m")),
        ("touchdown velocity error", stat(summary["velocity_error_mps"], "m/s")),
        ("fuel", stat(summary["fuel_kg"], "kg")),
        ("guidance calls / without a flyable plan",
         f"{summary['solves']} / {summary['solve_failures']} ({rate}"
         + (f"; {causes}" if causes else "") + ")"),
        ("best-reachable plans / re-plans on the reserve",
         f"{summary['best_reachable_plans']} / {summary['reserve_plans']}"),
        ("worst solve time", f"{(summary['worst_solve_time_s'] or 0) * 1e3:.3f} ms (re-plans: "
                             f"{(summary['worst_replan_time_s'] or 0) * 1e3:.3f} ms)"),
        ("report", f"{args.out}/report.html"),
    ]
    print_table(rows)
    if summary["no_plan_rate_flagged"]:
        print(f"pdgc: warning: {summary['no_plan_rate']:.2%} of guidance calls returned no "
              "flyable plan (more than 1 %)", file=sys.stderr)
    return 0
