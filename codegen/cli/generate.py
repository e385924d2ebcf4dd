"""`pdgc generate` and `pdgc check`."""

from __future__ import annotations

import sys


def register(sub) -> None:
    from codegen.backends import DEFAULT_BACKEND
    from codegen.cli import positive_int
    from codegen.emit import DEFAULT_C_NAME

    s = sub.add_parser("generate", help="generate a C guidance solver tree")
    s.add_argument("vehicle")
    s.add_argument("--horizon", type=positive_int("--horizon"), required=True)
    s.add_argument("--backend", default=DEFAULT_BACKEND,
                   help=f"native, cvxpygen-ecos or cvxpygen-qoco (default {DEFAULT_BACKEND})")
    s.add_argument("--out", required=True, help="directory of the tree")
    s.add_argument("--c-name", default=DEFAULT_C_NAME,
                   help=f"prefix of the tree's C identifiers and file names (default {DEFAULT_C_NAME})")
    s.add_argument("--precision", default="double", choices=("double", "single"))
    s.set_defaults(func=cmd_generate)

    s = sub.add_parser("check", help="check a generated solver against the reference")
    s.add_argument("dir")
    s.add_argument("--cases", type=int, default=200)
    s.add_argument("--seed", type=int, default=1)
    s.add_argument("--tol-objective", type=float, default=None,
                   help="relative objective tolerance (default by precision)")
    s.add_argument("--search-every", type=int, default=5,
                   help="every K-th case searches the time of flight (default 5)")
    s.add_argument("--json", default=None, metavar="FILE", help="also write the results as JSON")
    s.set_defaults(func=cmd_check)


def cmd_generate(args) -> int:
    from codegen.emit import generate

    def say(msg):
        print(f"pdgc: {msg}", file=sys.stderr)

    m = generate(args.vehicle, args.horizon, args.out, backend=args.backend, c_name=args.c_name,
                 precision=args.precision, progress=say)
    print(f"generated {args.out}: backend {m['backend']}, N = {m['horizon']}, "
          f"{len(m['files'])} files, {m['generation_seconds']:.1f} s")
    return 0


def cmd_check(args) -> int:
    from codegen.verify.check import run_check
    return run_check(args)
