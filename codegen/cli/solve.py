"""``pdgc solve``: plan one descent with the reference or a generated solver."""

from __future__ import annotations

import sys

from codegen.cli.common import finite_float, parse_state, parse_vector3, positive_int, print_table
from codegen.errors import InputError
from codegen.model.trajectory import INPUT_REFUSED, LIMITS_VIOLATED

#: The horizon when --horizon is not given.
DEFAULT_HORIZON = 50


def register(sub) -> None:
    s = sub.add_parser("solve", help="plan one descent (reference solve, or a generated solver)")
    s.add_argument("vehicle", help="vehicle file (TOML); its [envelope] is optional here")
    s.add_argument("--state", required=True, help="X,Y,Z,VX,VY,VZ,MASS in m, m/s, kg")
    s.add_argument("--tof", type=finite_float("--tof"), default=None,
                   help="time of flight [s]; searched if absent")
    s.add_argument("--horizon", type=positive_int("--horizon"), default=None,
                   help=f"number of intervals N (default {DEFAULT_HORIZON}; with --solver-dir, "
                        "the tree's)")
    s.add_argument("--target", default=None, help="X,Y,Z of the landing target [m] (with "
                   "--target-velocity: where the moving pad is at the start)")
    s.add_argument("--target-velocity", default=None, metavar="VX,VY,VZ",
                   help="velocity of a moving pad [m/s], constant; touchdown matches it "
                        "(planned by the successive-convexification reference)")
    s.add_argument("--solver-dir", default=None,
                   help="use the generated solver in this tree instead of the reference")
    s.add_argument("--no-fallback", action="store_true",
                   help="report 'unreachable' when the target is out of reach instead of the "
                        "best reachable plan (least terminal error, then least fuel)")
    s.add_argument("--reserve-throttle", type=float, default=None, metavar="FRACTION",
                   help="with --tof: the highest throttle the plan may use when the target is "
                        "out of reach at the vehicle's throttle_max (a re-plan's reserve)")
    s.add_argument("--json", action="store_true", help="print one JSON object")
    s.add_argument("--out", default=None, metavar="FILE",
                   help="also write the plan to FILE: .json, .csv (one row per node) or .mat "
                        "(MATLAB), by its suffix")
    s.add_argument("--plot", default=None, metavar="FILE.png",
                   help="picture of the plan (trajectory, 3-D view, throttle, speed)")
    s.set_defaults(func=run)


def run(args) -> int:
    """Exit code: 0 a plan was found (a degraded one warns on stderr), 1 none
    was (the message says why), 2 bad input."""
    from codegen.model.analysis import margins
    from codegen.model.export import FORMATS
    from codegen.model.vehicle import load_vehicle
    from codegen.reference import ReferenceSolver

    horizon_given = args.horizon is not None
    horizon = args.horizon if horizon_given else DEFAULT_HORIZON
    if args.out is not None:
        from pathlib import Path
        if Path(args.out).suffix.lower() not in FORMATS:
            raise InputError("--out", args.out, "must end in " + ", ".join(FORMATS))
    vehicle = load_vehicle(args.vehicle, require_envelope=False)
    for w in vehicle.warnings:
        print(f"pdgc: warning: {w}", file=sys.stderr)
    pos, vel, mass = parse_state(args.state)
    target = parse_vector3("--target", args.target) if args.target else (0.0, 0.0, 0.0)
    pad_velocity = parse_vector3("--target-velocity", args.target_velocity) \
        if args.target_velocity else None
    if vehicle.booster is not None or pad_velocity is not None:
        return _run_booster(args, vehicle, horizon, pos, vel, mass, target,
                            pad_velocity or (0.0, 0.0, 0.0))
    if args.solver_dir:
        from codegen.bind import load_solver
        solver = load_solver(args.solver_dir)
        if solver.horizon != horizon and horizon_given:
            raise InputError("--horizon", horizon,
                             f"the generated solver in {args.solver_dir} has horizon {solver.horizon}")
    else:
        # A vehicle file without [envelope] plans from its start state alone.
        solver = ReferenceSolver(vehicle.at_state(pos, vel, mass), horizon)
    traj = solver.solve(pos, vel, mass, args.tof, target, fallback=not args.no_fallback,
                        reserve_throttle_max=args.reserve_throttle)
    if traj.status == INPUT_REFUSED:
        print(f"pdgc: error: {traj.message}", file=sys.stderr)
        return 2
    if traj.degraded:
        print(f"pdgc: warning: {traj.message}", file=sys.stderr)
    elif not traj.solved:
        print(f"pdgc: {traj.status}: {traj.message}", file=sys.stderr)
    if args.json:
        print(traj.to_json())
    else:
        print_table(_rows(traj, margins(traj, vehicle, target)))
    if args.out:
        traj.save(args.out)
        if not args.json:
            print(f"  plan written to {args.out}")
    if args.plot:
        if traj.solved:
            from codegen.plot import plot_trajectory
            plot_trajectory(traj, vehicle, args.plot, target)
            if not args.json:
                print(f"  plot written to {args.plot}")
        else:
            print(f"pdgc: no plot: status {traj.status}", file=sys.stderr)
    return 0 if traj.solved else 1


def _rows(traj, m) -> list:
    rows = [("status", traj.status + ("  (DEGRADED: see the message)" if traj.degraded else ""))]
    if traj.message:
        rows.append(("message", traj.message))
    if traj.solved or traj.status == LIMITS_VIOLATED:
        rows += [
            ("plan", f"{traj.plan_mode}, throttle limit {traj.throttle_limit:.4g}"),
            ("terminal error", f"{traj.terminal_error:.3g} weighted "
                               f"({traj.terminal_miss_m:.3g} m horizontal, "
                               f"{traj.terminal_speed_error_mps:.3g} m/s)"),
            ("checks of the real constraints",
             "all met" if traj.verdict.get("flyable") else f"FAILED: {traj.verdict.get('worst')}"),
            ("time of flight", f"{traj.time_of_flight_s:.4f} s"),
            ("fuel", f"{traj.fuel_kg:.4f} kg"),
            ("landing miss", f"{traj.landing_miss_m:.3g} m"),
            ("throttle min / max", f"{m['throttle_min']:.4f} / {m['throttle_max']:.4f}"),
            ("pointing margin", f"{m['pointing_margin_deg']:.3f} deg"),
            ("glide-slope margin", f"{m['glide_slope_margin_m']:.3f} m"),
            ("speed margin", f"{m['speed_margin_mps']:.3f} m/s"),
            ("tightness gap |u| vs sigma", f"{m['tightness_gap']:.3g}"),
        ]
    rows += [
        ("solver", f"{traj.solver}, N = {traj.horizon}"),
        ("solves", str(traj.solves)),
        ("iterations (answer / max / total)",
         f"{traj.iterations} / {traj.iterations_max} / {traj.iterations_total}"),
        ("solve time", f"{traj.solve_time_s * 1e3:.2f} ms"),
    ]
    return rows


def _run_booster(args, vehicle, horizon, pos, vel, mass, pad, pad_velocity) -> int:
    """Vehicles with booster additions (drag, thrust-rate limit, final
    approach) and moving pads: the successive-convexification reference
    (codegen/model/scvx.py). No generated solver plans them yet, and the
    plan meets the pad or there is none (no best reachable plan)."""
    from codegen.model.analysis import margins
    from codegen.booster import BoosterReference
    for option, given in (("--solver-dir", args.solver_dir),
                          ("--reserve-throttle", args.reserve_throttle)):
        if given is not None:
            raise InputError(option, given, "not available for a booster vehicle or a moving "
                                            "pad (planned by the successive-convexification "
                                            "reference only)")
    solver = BoosterReference(vehicle, horizon)
    traj = solver.solve(pos, vel, mass, args.tof, pad, pad_velocity)
    if traj.status == "input_refused":
        raise InputError("input", traj.message, "refused by the solver")
    if args.json:
        print(traj.to_json())
    else:
        rows = _rows(traj, margins(traj, vehicle, traj.target_m))
        rows[1:1] = [
            ("convexification", f"{traj.convergence} after {traj.passes} passes "
                                f"(defect {traj.defect_position_m:.3g} m, "
                                f"{traj.defect_velocity_mps:.3g} m/s)"),
            ("predicted terminal error",
             f"{_norm(traj.predicted_position_error_m):.3g} m, "
             f"{_norm(traj.predicted_velocity_error_mps):.3g} m/s (plan flown open loop "
             f"under drag)"),
        ]
        print_table(rows)
    if args.plot:
        if traj.solved:
            from codegen.plot import plot_trajectory
            plot_trajectory(traj, vehicle, args.plot, traj.target_m)
            if not args.json:
                print(f"  plot written to {args.plot}")
        else:
            print(f"pdgc: no plot: status {traj.status}", file=sys.stderr)
    return 0 if traj.solved else 1


def _norm(x) -> float:
    import math
    vals = [float(v) for v in x]
    return math.sqrt(sum(v * v for v in vals))
