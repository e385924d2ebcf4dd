"""Instruction counts of the native solver on the bench's instances (callgrind).

    .venv/bin/python -m bench.instructions [--horizon 50] [--instances 8]
        [--precision double|single] [--cflags "-O2"] [--json out.json] [--functions] [--keep DIR]

Generates the native tree at one horizon (in a scratch directory), builds it
and the bench harness as `make bench` does, and runs each of the bench's
instances (``make_instances``: the nominal state and dispersed states, fixed
time of flight) once under valgrind's callgrind, counting the instructions
inside ``<prefix>_plan_descent``. Prints, per instance, the count, the
status, the iterations and the objective, then the total; ``--functions``
adds the inclusive count of each solver function, summed over the
instances. Callgrind's counts do not depend on the machine's load, so two
versions of the generator can be compared on a shared machine: the before
and after figures in DEVELOPERS.md ("The native solver core") come from
this command.
"""

from __future__ import annotations

import argparse
import json
import re
import subprocess
import sys
import tempfile
from pathlib import Path

from bench.builds import build, run_harness
from bench.config import PROGRESS, Config, make_instances


def _callgrind(harness: Path, prefix: str, line: str, out: Path) -> int:
    r = subprocess.run(["valgrind", "--tool=callgrind", f"--callgrind-out-file={out}",
                        f"--toggle-collect={prefix}_plan_descent", str(harness)],
                       input=line, capture_output=True, text=True, timeout=1800)
    if r.returncode != 0:
        raise RuntimeError(f"callgrind failed: {r.stderr[-2000:]}")
    for text in out.read_text().splitlines():
        if text.startswith(("totals:", "summary:")):
            return int(text.split()[1])
    raise RuntimeError("callgrind wrote no totals")


def _functions(out: Path) -> dict:
    """Inclusive instructions per function from callgrind_annotate."""
    r = subprocess.run(["callgrind_annotate", "--inclusive=yes", str(out)],
                       capture_output=True, text=True, check=True)
    found = {}
    for text in r.stdout.splitlines():
        m = re.match(r"\s*([\d,]+)\s+\(\s*[\d.]+%\)\s+\S*:(\w+)", text) or \
            re.match(r"\s*([\d,]+)\s+\S*:(\w+)", text)
        if m:
            found[m.group(2)] = found.get(m.group(2), 0) + int(m.group(1).replace(",", ""))
    return found


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m bench.instructions", description=__doc__.split("\n")[0])
    ap.add_argument("--horizon", type=int, default=50)
    ap.add_argument("--instances", type=int, default=8)
    ap.add_argument("--precision", choices=("double", "single"), default="double")
    ap.add_argument("--cflags", default="-O2", help="CFLAGS of the tree's build (default -O2)")
    ap.add_argument("--json", type=Path)
    ap.add_argument("--functions", action="store_true")
    ap.add_argument("--keep", type=Path, help="build and keep the tree and callgrind files here")
    args = ap.parse_args(argv)
    PROGRESS["terminal"] = False
    with tempfile.TemporaryDirectory(prefix="pdgc-ir-") as scratch:
        tmp = str(args.keep) if args.keep else scratch
        cfg = Config(horizons=(args.horizon,), backends=("native",), instances=args.instances,
                     work_dir=Path(tmp), out_dir=Path(tmp), callgrind=True, progress=False)
        b = build(cfg, "native", args.horizon, precision=args.precision, cflags=args.cflags)
        # the bench's own instances (kept when feasible at its smallest and largest horizon)
        insts = make_instances(Config(instances=args.instances))
        rows, funcs = [], {}
        for k, inst in enumerate(insts):
            rec = run_harness(b, [inst.line(1, 0)])[1]
            out = Path(tmp) / f"cg-{k}.out"
            ir = _callgrind(b.harness, b.prefix, inst.line(1, 0), out)
            if args.functions:
                for name, v in _functions(out).items():
                    funcs[name] = funcs.get(name, 0) + v
            rows.append({"instance": inst.name, "instructions": ir, "status": rec["status"],
                         "iterations": rec["iterations_total"], "solves": rec["solves"],
                         "objective": rec["objective"]})
            print(f"{inst.name:>10}  {ir:>12,}  {rec['status']:<14} it {rec['iterations_total']:>3}"
                  f"  solves {rec['solves']}  objective {rec['objective']!r}")
        total = sum(r["instructions"] for r in rows)
        print(f"{'total':>10}  {total:>12,}  mean {total / len(rows):,.0f}  "
              f"workspace {b.sizeof['sizeof_workspace']:,} B  source {b.source_bytes:,} B "
              f"(solver {b.source_bytes_solver:,})  text {b.text_bytes:,} B  "
              f"data+bss {b.data_bytes + b.bss_bytes:,} B")
        if args.functions:
            for name, v in sorted(funcs.items(), key=lambda kv: -kv[1])[:40]:
                print(f"  {v:>14,}  {100 * v / total:5.1f}%  {name}")
        if args.json:
            args.json.write_text(json.dumps({"horizon": args.horizon, "precision": args.precision,
                                             "cflags": args.cflags, "rows": rows,
                                             "functions": funcs, "sizeof": b.sizeof,
                                             "source_bytes": b.source_bytes,
                                             "text_bytes": b.text_bytes}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
