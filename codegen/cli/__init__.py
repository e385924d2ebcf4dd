"""The ``pdgc`` command line: one thin module per verb.

Each verb module offers ``register(subparsers)``, which adds its parser and
sets ``func`` to its ``run(args)``; ``run`` parses what argparse left as
text, calls into the stage that does the work and prints the outcome.
Shared argument types and console output are in :mod:`codegen.cli.common`.
Nothing outside this package imports it.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from codegen import __version__
from codegen.errors import InputError

#: The verbs, in the order ``pdgc --help`` lists them.
VERBS = ("init", "solve", "generate", "check", "envelope", "simulate", "handoff")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="pdgc", description="Powered-descent guidance compiler.")
    p.add_argument("--version", action="version", version=f"pdgc {__version__}")
    sub = p.add_subparsers(dest="command", required=True)
    for verb in VERBS:
        importlib.import_module(f"codegen.cli.{verb}").register(sub)
    return p


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
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
