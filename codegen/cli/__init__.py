"""The ``pdgc`` command line."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from codegen import __version__
from codegen.errors import InputError
from codegen.fsutil import REPO_DIR

DEMO_VEHICLE = REPO_DIR / "examples" / "demo_vehicle.toml"


def _demo_vehicle_text() -> str:
    from importlib import resources
    try:
        return resources.files("codegen").joinpath("data/demo_vehicle.toml").read_text()
    except (FileNotFoundError, ModuleNotFoundError):
        return DEMO_VEHICLE.read_text()


def parse_state(text: str):
    """'X,Y,Z,VX,VY,VZ,MASS' -> (position, velocity, mass)."""
    parts = [p.strip() for p in text.split(",")]
    if len(parts) != 7:
        raise InputError("--state", text, "must be seven comma-separated numbers X,Y,Z,VX,VY,VZ,MASS")
    vals = []
    for i, p in enumerate(parts):
        try:
            vals.append(float(p))
        except ValueError:
            raise InputError(f"--state[{i}]", p, "must be a number") from None
    return vals[0:3], vals[3:6], vals[6]


def parse_vector3(name: str, text: str):
    parts = text.split(",")
    if len(parts) != 3:
        raise InputError(name, text, "must be three comma-separated numbers")
    try:
        return [float(p) for p in parts]
    except ValueError:
        raise InputError(name, text, "must be three comma-separated numbers") from None


def int_at_least(name, low):
    """argparse type: an integer >= low, with an error naming the option."""
    def conv(text):
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} = {text!r}: must be an integer") from None
        if v < low:
            raise argparse.ArgumentTypeError(f"{name} = {v}: must be >= {low}")
        return v
    return conv


def positive_int(name):
    """A horizon-like count: an integer >= 2."""
    return int_at_least(name, 2)


def cmd_init(args) -> int:
    from codegen.fsutil import write_atomic
    out = Path(args.dir) / "vehicle.toml"
    if out.exists() and not args.force:
        print(f"pdgc: {out} exists; use --force to overwrite", file=sys.stderr)
        return 2
    write_atomic(out, _demo_vehicle_text())
    print(f"wrote {out} (invented demo vehicle; edit it for yours)")
    return 0


def print_table(rows, out=None):
    out = out or sys.stdout
    width = max(len(k) for k, _ in rows)
    for k, v in rows:
        print(f"  {k:<{width}}  {v}", file=out)


def cmd_solve(args) -> int:
    from codegen.model.analysis import margins
    from codegen.reference import ReferenceSolver
    from codegen.model.vehicle import load_vehicle

    vehicle = load_vehicle(args.vehicle)
    for w in vehicle.warnings:
        print(f"pdgc: warning: {w}", file=sys.stderr)
    pos, vel, mass = parse_state(args.state)
    target = parse_vector3("--target", args.target) if args.target else (0.0, 0.0, 0.0)
    if args.solver_dir:
        from codegen.bind import load_solver
        solver = load_solver(args.solver_dir)
        if solver.horizon != args.horizon and args.horizon_given:
            raise InputError("--horizon", args.horizon,
                             f"the generated solver in {args.solver_dir} has horizon {solver.horizon}")
    else:
        solver = ReferenceSolver(vehicle, args.horizon)
    if args.solver_dir:
        traj = solver.solve(pos, vel, mass, args.tof, target)
    else:
        traj = solver.solve(pos, vel, mass, args.tof, target, fallback=not args.no_fallback)
    if args.json:
        print(traj.to_json())
    else:
        m = margins(traj, vehicle, target)
        rows = [("status", traj.status)]
        if traj.message:
            rows.append(("message", traj.message))
        if traj.solved:
            rows += [
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
        print_table(rows)
    if args.plot:
        if traj.solved:
            from codegen.plot import plot_trajectory
            plot_trajectory(traj, vehicle, args.plot, target)
            if not args.json:
                print(f"  plot written to {args.plot}")
        else:
            print(f"pdgc: no plot: status {traj.status}", file=sys.stderr)
    return 0 if traj.solved else 1


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="pdgc", description="Powered-descent guidance compiler.")
    p.add_argument("--version", action="version", version=f"pdgc {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    s = sub.add_parser("init", help="write the invented demo vehicle file")
    s.add_argument("dir", nargs="?", default=".")
    s.add_argument("--force", action="store_true", help="overwrite an existing vehicle.toml")
    s.set_defaults(func=cmd_init)

    s = sub.add_parser("solve", help="plan one descent (reference solve, or a generated solver)")
    s.add_argument("vehicle")
    s.add_argument("--state", required=True, help="X,Y,Z,VX,VY,VZ,MASS in m, m/s, kg")
    s.add_argument("--tof", type=float, default=None, help="time of flight [s]; searched if absent")
    s.add_argument("--horizon", type=positive_int("--horizon"), default=None)
    s.add_argument("--target", default=None, help="X,Y,Z of the landing target [m]")
    s.add_argument("--solver-dir", default=None,
                   help="use the generated solver in this tree instead of the reference")
    s.add_argument("--no-fallback", action="store_true",
                   help="report 'infeasible' when the target is out of reach instead of the "
                        "two-stage least-miss plan (as generated solvers do)")
    s.add_argument("--json", action="store_true", help="print one JSON object")
    s.add_argument("--plot", default=None, metavar="FILE.png")
    s.set_defaults(func=cmd_solve)

    for register in _EXTRA_COMMANDS:
        register(sub)
    return p


# Later stages register their sub-commands here (module-level functions
# taking the subparsers object), keeping this file free of their imports.
_EXTRA_COMMANDS = []


def _load_extras():
    import importlib
    _EXTRA_COMMANDS.clear()
    for mod in ("codegen.cli.generate", "codegen.cli.envelope", "codegen.cli.simulate",
                "codegen.cli.handoff"):
        try:
            m = importlib.import_module(mod)
        except ModuleNotFoundError as exc:
            if exc.name != mod:
                raise
            continue
        _EXTRA_COMMANDS.append(m.register)


def main(argv=None) -> int:
    _load_extras()
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "command", None) == "solve":
        args.horizon_given = args.horizon is not None
        if args.horizon is None:
            args.horizon = 50
    try:
        return args.func(args)
    except InputError as exc:
        print(f"pdgc: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("pdgc: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
