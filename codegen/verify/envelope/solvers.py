"""Opening the solvers of a campaign: the generated one of a tree, and the reference.

A tree whose manifest says backend ``reference`` is a dry run: its
"generated" solver is the reference itself.
"""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

from codegen.errors import InputError
from codegen.verify.dispersions import Dispersions


#: Backend name in a tree's manifest.json that marks a dry-run tree: the
#: "generated" solver is then the reference itself (tests, and trying a
#: dispersion file before a solver is generated).
DRY_RUN_BACKEND = "reference"


def read_tree(solver_dir) -> dict:
    """Read ``DIR/manifest.json`` of a solver tree; InputError if unusable."""
    d = Path(solver_dir)
    man_path = d / "manifest.json"
    try:
        raw = man_path.read_bytes()
    except OSError as exc:
        raise InputError("DIR", str(solver_dir),
                         f"must be a solver tree with a manifest.json ({exc.strerror})") from None
    try:
        man = json.loads(raw)
    except json.JSONDecodeError as exc:
        raise InputError("DIR", str(man_path), f"manifest.json is not valid JSON: {exc}") from None
    for key in ("backend", "horizon"):
        if key not in man:
            raise InputError(f"{man_path}: {key}", None, "missing from the solver tree's manifest")
    if not (d / "vehicle.toml").is_file():
        raise InputError("DIR", str(solver_dir), "must hold vehicle.toml (the vehicle it was generated for)")
    import hashlib
    man["_sha256"] = hashlib.sha256(raw).hexdigest()
    return man


def open_solvers(solver_dir, thrust_derate: float | None = None):
    """Open ``(generated, reference)`` for the tree in ``solver_dir``.

    The generated solver comes from :func:`codegen.bind.load_solver`. A tree
    whose manifest says backend ``"reference"`` is a dry-run tree (used by the
    tests, and to try a dispersion file before any C exists): its "generated"
    solver is a :class:`~codegen.reference.ReferenceSolver` for the tree's
    vehicle and horizon, named ``dry-run``.

    With ``thrust_derate`` the vehicle's ``thrust_max_n`` is scaled by it. The
    reference takes that by being built on a derated copy of the vehicle; a
    compiled solver has the vehicle baked in, so it is refused (InputError
    naming the field) unless it declares ``supports_thrust_derate`` and offers
    ``derated(fraction) -> solver``.
    """
    from codegen.reference import ReferenceSolver
    from codegen.model.vehicle import load_vehicle

    man = read_tree(solver_dir)
    vehicle = load_vehicle(Path(solver_dir) / "vehicle.toml")
    horizon = int(man["horizon"])
    if thrust_derate is not None:
        vehicle = replace(vehicle, thrust_max_n=vehicle.thrust_max_n * thrust_derate)
    reference = FreshEachCase(ReferenceSolver(vehicle, horizon))
    if man["backend"] == DRY_RUN_BACKEND:
        generated = FreshEachCase(ReferenceSolver(vehicle, horizon), name="dry-run")
    else:
        generated = _load_generated(solver_dir, man)
        if thrust_derate is not None:
            if not getattr(generated, "supports_thrust_derate", False):
                raise InputError("thrust_derate", thrust_derate, derate_refusal(solver_dir, man))
            generated = generated.derated(thrust_derate)
    return generated, reference


def _load_generated(solver_dir, man):
    """The compiled solver of a generated tree (codegen.bind)."""
    try:
        from codegen.bind import load_solver
    except ModuleNotFoundError as exc:
        if exc.name != "codegen.bind":
            raise
        raise InputError("DIR", str(solver_dir),
                         f"is a generated tree (backend {man['backend']}) but this installation "
                         "has no codegen.bind to load it") from None
    return load_solver(solver_dir)


class FreshEachCase:
    """A reference solver that starts every case as a new instance would.

    CVXPY keeps the solver of a problem between solves and, with
    ``warm_start=True`` (its default), updates it in place; the answer of a
    case then depended on the cases the instance had solved before (seen: a
    few iterations and ~1e-3 relative fuel between a fresh and a used
    instance). A campaign must not depend on which worker ran what before,
    and its replay line (``pdgc solve``, a fresh process) must give the same
    answer. The reference passes ``warm_start=False``, CVXPY's public switch,
    on every solve (and refuses a ``warm_start`` option), so each solve builds
    a new Clarabel or ECOS solver from the problem data; what the instance
    keeps between cases is the compiled problem, whose data are a function of
    the parameters alone. tests/test_envelope.py checks that a used instance
    answers as a fresh one, byte for byte.
    """

    def __init__(self, solver, name: str | None = None):
        self._solver = solver
        self.name = name or solver.name
        self.vehicle = solver.vehicle
        self.horizon = solver.horizon

    def solve(self, *args, **kwargs):
        # The reference runs the generated code's default sequence of solves
        # (the best reachable plan when the target is out of reach), so that
        # both sides of a comparison answer the same question.
        return self._solver.solve(*args, **kwargs)


def derate_refusal(solver_dir, man) -> str:
    return (f"the generated solver in {solver_dir} (backend {man['backend']}) has thrust_max_n "
            "baked in and takes no derating at run time; remove [thrust_derate] from the "
            "dispersion file, or generate a solver for the derated vehicle")


def check_derate_supported(solver_dir, dispersions: Dispersions) -> None:
    """Refuse a derating campaign up front when the solver cannot take it."""
    if dispersions.thrust_derate is None:
        return
    man = read_tree(solver_dir)
    if man["backend"] == DRY_RUN_BACKEND:
        return
    if not getattr(_load_generated(solver_dir, man), "supports_thrust_derate", False):
        raise InputError("thrust_derate", dispersions.thrust_derate.describe(),
                         derate_refusal(solver_dir, man))
