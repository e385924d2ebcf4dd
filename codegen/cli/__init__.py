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


#: Options whose value is a comma-separated list that may start with a minus
#: sign (a state or target west or south of the pad).
_LIST_OPTIONS = ("--state", "--target")


def join_negative_lists(argv: list) -> list:
    """``--state -1500,0,...`` as ``--state=-1500,0,...``: argparse would read a
    value starting with '-' as an option and refuse it ("expected one
    argument")."""
    out, i = [], 0
    while i < len(argv):
        tok = argv[i]
        if tok in _LIST_OPTIONS and i + 1 < len(argv) and argv[i + 1].startswith("-") \
                and "," in argv[i + 1]:
            out.append(f"{tok}={argv[i + 1]}")
            i += 2
            continue
        out.append(tok)
        i += 1
    return out


def main(argv=None) -> int:
    parser = build_parser()
    argv = join_negative_lists(list(sys.argv[1:] if argv is None else argv))
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except InputError as exc:
        print(f"pdgc: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("pdgc: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader went away (`pdgc solve --json | head`): nothing to say.
        _silence_stdout()
        return 1
    except OSError as exc:
        # A file the verb reads or writes: read-only, full disk, gone. The
        # path and the system's reason, without a traceback; the outputs are
        # written atomically, so what was there before is intact.
        where = f" {exc.filename}" if getattr(exc, "filename", None) else ""
        print(f"pdgc: error: cannot read or write{where}: {exc.strerror or exc}", file=sys.stderr)
        return 2


def _silence_stdout() -> None:
    import os
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):
        pass


if __name__ == "__main__":
    sys.exit(main())
