"""``pdgc init``: write the invented demo vehicle file."""

from __future__ import annotations

import sys
from pathlib import Path

from codegen.fsutil import REPO_DIR, write_atomic

DEMO_VEHICLE = REPO_DIR / "examples" / "demo_vehicle.toml"


def register(sub) -> None:
    s = sub.add_parser("init", help="write the invented demo vehicle file")
    s.add_argument("dir", nargs="?", default=".")
    s.add_argument("--force", action="store_true", help="overwrite an existing vehicle.toml")
    s.set_defaults(func=run)


def _demo_vehicle_text() -> str:
    from importlib import resources
    try:
        return resources.files("codegen").joinpath("data/demo_vehicle.toml").read_text()
    except (FileNotFoundError, ModuleNotFoundError):
        return DEMO_VEHICLE.read_text()


def run(args) -> int:
    out = Path(args.dir) / "vehicle.toml"
    if out.exists() and not args.force:
        print(f"pdgc: {out} exists; use --force to overwrite", file=sys.stderr)
        return 2
    write_atomic(out, _demo_vehicle_text())
    print(f"wrote {out} (invented demo vehicle; edit it for yours)")
    return 0
