"""``pdgc generate``: a C guidance solver tree for a vehicle and a horizon."""

from __future__ import annotations

import sys

from codegen.cli.common import positive_int


def register(sub) -> None:
    from codegen.backends import DEFAULT_BACKEND
    from codegen.emit import DEFAULT_C_NAME

    s = sub.add_parser("generate", help="generate a C guidance solver tree",
                       description="Write a dependency-free C99 guidance solver for one vehicle "
                                   "and horizon into a tree (sources, Makefile, CMakeLists.txt, "
                                   "README, manifest.json). Exit 0 when written, 2 on bad input.")
    s.add_argument("vehicle", help="vehicle file (TOML, with its [envelope]; see README)")
    s.add_argument("--horizon", type=positive_int("--horizon"), required=True,
                   help="number of intervals N of the plan (>= 2); the C's sizes are fixed by it")
    s.add_argument("--backend", default=DEFAULT_BACKEND,
                   help=f"native, cvxpygen-ecos or cvxpygen-qoco (default {DEFAULT_BACKEND})")
    s.add_argument("--out", required=True, help="directory of the tree")
    s.add_argument("--c-name", default=DEFAULT_C_NAME,
                   help=f"prefix of the tree's C identifiers and file names (default {DEFAULT_C_NAME})")
    s.add_argument("--precision", default="double", choices=("double", "single"),
                   help="floating-point type of the native solver (default double; single for "
                        "an FPU without double precision)")
    s.set_defaults(func=run)


def run(args) -> int:
    from codegen.emit import generate
    from codegen.model.vehicle import load_vehicle

    def say(msg):
        print(f"pdgc: {msg}", file=sys.stderr)

    # The warnings `pdgc solve` prints (cannot hover, unusual magnitudes),
    # before the minutes of generation.
    for w in load_vehicle(args.vehicle).warnings:
        say(f"warning: {w}")

    m = generate(args.vehicle, args.horizon, args.out, backend=args.backend, c_name=args.c_name,
                 precision=args.precision, progress=say)
    print(f"generated {args.out}: backend {m['backend']}, N = {m['horizon']}, "
          f"{len(m['files']) + 1} files (manifest.json included), "
          f"{m['generation_seconds']:.1f} s")
    return 0
