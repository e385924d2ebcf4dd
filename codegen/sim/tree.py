"""The solver a simulation flies: a generated tree, or a dry-run tree (the reference)."""

from __future__ import annotations

import json
from pathlib import Path

from codegen.errors import InputError
from codegen.fsutil import write_atomic
from codegen.model.vehicle import load_vehicle


def load_guidance_solver(solver_dir):
    """The solver in a tree ``solver_dir``, with the common solve interface.

    A generated tree is loaded through :func:`codegen.bind.load_solver`. A
    tree whose ``manifest.json`` says ``"backend": "reference"`` is a DRY RUN:
    its ``vehicle.toml`` is solved by :class:`~codegen.reference.ReferenceSolver`
    at the manifest's horizon (for tests, and to try the loop before any C is
    generated). :func:`write_dry_run_tree` makes one.
    """
    d = Path(solver_dir)
    man_path = d / "manifest.json"
    if not d.is_dir():
        raise InputError("solver directory", str(d), "does not exist or is not a directory")
    try:
        manifest = json.loads(man_path.read_text())
    except OSError as exc:
        raise InputError("solver directory", str(d),
                         f"has no readable manifest.json ({exc.strerror}); "
                         "make one with `pdgc generate`") from None
    except json.JSONDecodeError as exc:
        raise InputError(str(man_path), "", f"is not valid JSON: {exc}") from None
    if not isinstance(manifest, dict):
        raise InputError(str(man_path), manifest, "must hold a JSON object")
    if manifest.get("backend") == "reference":
        from codegen.reference import ReferenceSolver
        horizon = manifest.get("horizon")
        if isinstance(horizon, bool) or not isinstance(horizon, int) or horizon < 2:
            raise InputError(f"{man_path}: horizon", horizon, "must be an integer >= 2")
        solver = ReferenceSolver(load_vehicle(d / "vehicle.toml"), horizon)
        solver.name = "reference (dry run)"
        return solver
    try:
        from codegen.bind import load_solver
    except ModuleNotFoundError as exc:
        if exc.name != "codegen.bind":
            raise
        raise InputError("solver directory", str(d),
                         "needs codegen.bind to load generated C, which this installation "
                         "lacks; only dry-run trees (manifest backend 'reference') can be flown")
    return load_solver(d)


def write_dry_run_tree(directory, vehicle_path, horizon: int) -> Path:
    """Make a dry-run solver tree: the vehicle file and a manifest that says
    ``backend = "reference"``. No C; the reference solver stands in."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    write_atomic(d / "vehicle.toml", Path(vehicle_path).read_bytes())
    write_atomic(d / "manifest.json", json.dumps(
        {"backend": "reference", "horizon": int(horizon), "c_name": "dryrun",
         "note": "dry run: the reference solver stands in for generated C"}, indent=2) + "\n")
    return d


def _tree_identity(solver_dir) -> dict:
    import hashlib
    d = Path(solver_dir)
    out = {}
    for name in ("manifest.json", "vehicle.toml"):
        p = d / name
        out[name] = hashlib.sha256(p.read_bytes()).hexdigest() if p.exists() else None
    return out
