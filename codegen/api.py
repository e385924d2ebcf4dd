"""The Python API of pdgc: the few calls a script or a notebook needs.

    import codegen.api as pdgc

    vehicle = pdgc.load_vehicle("examples/demo_vehicle.toml")
    plan = pdgc.plan(vehicle, [1500, 0, 1500], [-50, 0, -40], 1900)   # reference solve
    plan.save("plan.mat")                                             # or .csv, .json
    tree = pdgc.generate("examples/demo_vehicle.toml", "mytree", horizon=20)
    solver = pdgc.load_generated(tree)                                # builds it with cffi
    same = solver.solve([1500, 0, 1500], [-50, 0, -40], 1900)

Every solver, the reference and a generated one, answers ``solve(position_m,
velocity_mps, mass_kg, time_of_flight_s=None, target_m=(0, 0, 0), ...)``
with one :class:`Trajectory` (SI units; ``status``, ``message``,
``solved``, ``degraded``; ``to_dict``, ``to_csv``, ``save``). Bad input to
``load_vehicle`` and ``generate`` raises :class:`InputError` (naming the
field, the value and the rule); bad input to a solve comes back as status
``input_refused`` with the rule in ``message``, as from the C.

This module only gathers what the stages offer; it adds no behaviour.
"""

from __future__ import annotations

from pathlib import Path

from codegen.errors import InputError
from codegen.model.export import FORMATS
from codegen.model.trajectory import SOLVED, STATUSES, Trajectory
from codegen.model.vehicle import Vehicle
from codegen.model.vehicle import load_vehicle as _load_vehicle

#: The horizon of plan() and generate() when none is given (pdgc solve's).
DEFAULT_HORIZON = 50

__all__ = ["DEFAULT_HORIZON", "FORMATS", "InputError", "SOLVED", "STATUSES", "Trajectory", "Vehicle",
           "generate", "load_generated", "load_vehicle", "plan", "reference_solver", "save"]


def load_vehicle(path, require_envelope: bool = False) -> Vehicle:
    """Read and validate a vehicle file (TOML). Its [envelope] is needed only
    to generate, check and run campaigns; ``require_envelope`` refuses a file
    without it. ``Vehicle.warnings`` holds what is legal but suspicious."""
    return _load_vehicle(path, require_envelope=require_envelope)


def _vehicle(vehicle) -> Vehicle:
    return vehicle if isinstance(vehicle, Vehicle) else load_vehicle(vehicle)


def reference_solver(vehicle, horizon: int = DEFAULT_HORIZON, state=None):
    """The reference (CVXPY + Clarabel) for a Vehicle or a vehicle file.
    A vehicle without [envelope] needs ``state`` = (position, velocity, mass)
    for the problem's scaling (Vehicle.at_state)."""
    from codegen.reference import ReferenceSolver
    v = _vehicle(vehicle)
    if v.envelope is None:
        if state is None:
            v.require_envelope("reference_solver() without a state")
        v = v.at_state(*state)
    return ReferenceSolver(v, horizon)


def plan(vehicle, position_m, velocity_mps, mass_kg, time_of_flight_s=None,
         target_m=(0.0, 0.0, 0.0), horizon: int = DEFAULT_HORIZON, **options) -> Trajectory:
    """Plan one descent with the reference, as ``pdgc solve`` does. ``options``
    go to ReferenceSolver.solve (fallback, velocity_target_mps, throttle_max,
    reserve_throttle_max, reserve_steps)."""
    solver = reference_solver(vehicle, horizon, (position_m, velocity_mps, mass_kg))
    return solver.solve(position_m, velocity_mps, mass_kg, time_of_flight_s, target_m, **options)


def generate(vehicle_path, out_dir, horizon: int = DEFAULT_HORIZON, backend: str | None = None,
             c_name: str | None = None, precision: str = "double") -> Path:
    """Write a C solver tree for the vehicle file into ``out_dir`` (atomically:
    an interrupted call leaves the old tree or the new one); returns its path."""
    from codegen.backends import DEFAULT_BACKEND
    from codegen.emit import DEFAULT_C_NAME
    from codegen.emit import generate as _generate
    _generate(vehicle_path, horizon, out_dir, backend=backend or DEFAULT_BACKEND,
              c_name=c_name or DEFAULT_C_NAME, precision=precision)
    return Path(out_dir)


def load_generated(tree_dir):
    """The generated solver of a tree, compiled and bound with cffi (cached by
    the manifest's hash). It has ``solve``, ``vehicle``, ``horizon``, ``name``."""
    from codegen.bind import load_solver
    return load_solver(tree_dir)


def save(traj: Trajectory, path) -> Path:
    """Write a plan to ``path``: .json, .csv or .mat (MATLAB), by its suffix."""
    return traj.save(path)
