"""``pdgc handoff``: the package for flight-software engineers (see codegen/verify/handoff/)."""

from __future__ import annotations

import sys
from pathlib import Path

from codegen.cli.common import int_at_least


def register(subparsers) -> None:
    s = subparsers.add_parser(
        "handoff", help="package a native tree for flight software: vectors, runner, record",
        description="Write PKG/ and PKG.tar.gz from the generated native tree in DIR: the "
                    "sources and build files, test vectors with a C runner, and a verification "
                    "record (Markdown and HTML) with the results of the target checks (strict "
                    "build, cppcheck, host and qemu-arm runs, Cortex-M7 sizes and stack, "
                    "coverage). Exit status 0 when every check passed, 1 when one failed or "
                    "could not run, 2 on bad input.")
    s.add_argument("dir", metavar="DIR", help="generated tree (native backend)")
    s.add_argument("--campaign", default=None, metavar="RUN_DIR",
                   help="envelope campaign run on this tree, summarised in the record")
    s.add_argument("--out", default=None, metavar="PKG",
                   help="package directory (default: <DIR name>-handoff); PKG.tar.gz beside it")
    s.add_argument("--check-cases", type=int_at_least("--check-cases", 0), default=50, metavar="K",
                   help="cases of `pdgc check` (generated against reference) summarised in the "
                        "record (default 50; 0: none)")
    s.add_argument("--no-checks", action="store_true",
                   help="skip the target checks (the record then says so)")
    s.set_defaults(func=run)


def run(args) -> int:
    from codegen.verify.handoff.run import handoff

    def say(msg):
        print(f"pdgc handoff: {msg}", file=sys.stderr)

    out = args.out or f"{Path(args.dir).resolve().name}-handoff"
    r = handoff(args.dir, out, campaign=args.campaign, checks=not args.no_checks, progress=say,
                check_cases=args.check_cases)
    print(f"wrote {r['package_dir']}/ and {r['tarball']}: {r['vectors']} test vectors")
    if r["checks"] is not None:
        c = r["checks"]
        for label, key in (("host", "host"), ("qemu-arm", "qemu")):
            res = c.get(key)
            if res is not None:
                print(f"  test vectors, {label}: {res.get('passed_count')}/{res.get('vectors')} pass")
        sc = r.get("solver_check")
        if sc is not None:
            print(f"  pdgc check: {sc['status_agreement']}/{sc['cases']} statuses agree, "
                  f"{sc['failures']} failing cases")
        for what, why in c["not_run"]:
            print(f"  NOT RUN: {what}: {why}")
        print("all checks passed" if r["all_checks_passed"] else
              "SOME CHECKS FAILED OR DID NOT RUN: see record/verification.md")
        return 0 if r["all_checks_passed"] else 1
    return 0
