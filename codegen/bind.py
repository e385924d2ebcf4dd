"""Load a generated tree into Python through cffi (API mode, -O2).

The compiled module is cached under ``$PDGC_CACHE`` (default
``~/.cache/pdgc``) keyed by the sha256 of the tree's manifest.json, which
hashes every file: any change to the tree gives a new build. Builds happen in
a private temporary directory and the finished module is renamed into the
cache, so concurrent processes (a campaign's workers) never load half a file.

``load_solver(DIR)`` returns a :class:`GeneratedSolver` with the same
``solve`` interface as :class:`codegen.reference.ReferenceSolver`.
"""

from __future__ import annotations

import hashlib
import importlib.util
import math
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from codegen.emit import verify_tree
from codegen.errors import InputError
from codegen.model.diagnose import explain_unreachable
from codegen.model.trajectory import STATUSES, Trajectory
from codegen.model.vehicle import load_vehicle
from codegen.model.verdict import CHECKS

#: The C enum {prefix}_status, in order (templates/guidance.h.j2): the
#: statuses of codegen.model.trajectory, which keeps that order.
_STATUS_NAMES = STATUSES
#: The C enum {prefix}_mode, in order.
_MODE_NAMES = ("target", "merit", "least_error", "fuel_at_error")


def cache_root() -> Path:
    return Path(os.environ.get("PDGC_CACHE", Path.home() / ".cache" / "pdgc"))


def cdef_text(prefix: str, n: int) -> str:
    """The part of {prefix}_guidance.h that Python needs (sizes filled in)."""
    P = prefix.upper()
    nc = len(CHECKS)
    return f"""
typedef enum {{ {P}_TARGET_MET = 0, {P}_UNREACHABLE = 1, {P}_ITERATIONS_EXHAUSTED = 2,
               {P}_SOLVER_BREAKDOWN = 3, {P}_INPUT_REFUSED = 4, {P}_BEST_REACHABLE = 5,
               {P}_LIMITS_VIOLATED = 6 }} {prefix}_status;
typedef enum {{ {P}_MODE_TARGET = 0, {P}_MODE_MERIT = 1, {P}_MODE_LEAST_ERROR = 2,
               {P}_MODE_FUEL_AT_ERROR = 3 }} {prefix}_mode;
typedef struct {{
    double position_m[3]; double velocity_mps[3]; double mass_kg;
    double time_of_flight_s; double target_m[3]; double velocity_target_mps[3];
    double throttle_max;
}} {prefix}_input;
typedef struct {{ int iterations_per_solve_max; double tof_tolerance_s; int iterations_per_call_max;
    double reserve_throttle_max; int reserve_steps; int allow_terminal_error; }} {prefix}_guidance_config;
typedef struct {{
    {prefix}_status status;
    double time_of_flight_s; double fuel_kg; double landing_miss_m; double objective;
    int iterations; int iterations_max; int iterations_total; int solves; int budget_exhausted;
    {prefix}_mode mode; double throttle_limit;
    double terminal_position_error_m[3]; double terminal_velocity_error_mps[3];
    double terminal_error; double violation[{nc}]; int worst_check;
    double t_s[{n + 1}]; double position_m[{n + 1}][3]; double velocity_mps[{n + 1}][3];
    double mass_kg[{n + 1}]; double thrust_n[{n}][3]; double accel_mps2[{n}][3];
    double accel_slack_mps2[{n}];
}} {prefix}_plan;
typedef struct {{ ...; }} {prefix}_workspace;
void {prefix}_guidance_config_init({prefix}_guidance_config *settings);
{prefix}_status {prefix}_plan_descent({prefix}_workspace *work, const {prefix}_input *input,
    const {prefix}_guidance_config *settings, {prefix}_plan *plan);
const char *{prefix}_status_name({prefix}_status status);
"""


def build_module(tree_dir, quiet: bool = True):
    """Compile (or find in the cache) the cffi module for a tree; returns (module, manifest)."""
    tree_dir = Path(tree_dir).resolve()
    manifest = verify_tree(tree_dir)
    key = hashlib.sha256((tree_dir / "manifest.json").read_bytes()).hexdigest()[:20]
    tag = f"{sys.implementation.cache_tag}"
    name = f"_pdgc_{key}"
    cache = cache_root() / tag
    cache.mkdir(parents=True, exist_ok=True)
    found = sorted(cache.glob(f"{name}.*.so")) + sorted(cache.glob(f"{name}.so"))
    if not found:
        _compile(tree_dir, manifest, name, cache, quiet)
        found = sorted(cache.glob(f"{name}.*.so")) + sorted(cache.glob(f"{name}.so"))
    spec = importlib.util.spec_from_file_location(name, found[0])
    mod = sys.modules.get(name)
    if mod is None:
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
        sys.modules[name] = mod
    return mod, manifest


def _compile(tree_dir: Path, manifest: dict, name: str, cache: Path, quiet: bool) -> None:
    import cffi

    prefix = manifest["c_name"]
    b = manifest["build"]
    ffi = cffi.FFI()
    ffi.cdef(cdef_text(prefix, manifest["horizon"]))
    sources = [str(tree_dir / s) for s in b["guidance_sources"] + b["solver_sources"]]
    macros = []
    for d in b["defines"]:
        k, _, v = d.partition("=")
        macros.append((k, v or None))
    ffi.set_source(name, f'#include "{prefix}_guidance.h"\n', sources=sources,
                   include_dirs=[str(tree_dir / d) for d in b["include_dirs"]],
                   define_macros=macros, extra_compile_args=["-O2"], libraries=["m"])
    with tempfile.TemporaryDirectory(prefix="pdgc-build-", dir=cache) as tmp:
        if quiet:
            devnull = os.open(os.devnull, os.O_WRONLY)
            saved = os.dup(1), os.dup(2)
            os.dup2(devnull, 1)
            os.dup2(devnull, 2)
        try:
            so = ffi.compile(tmpdir=tmp, verbose=False)
        except Exception as exc:  # compiler error: say where
            raise InputError("DIR", str(tree_dir), f"does not compile: {exc}") from None
        finally:
            if quiet:
                os.dup2(saved[0], 1)
                os.dup2(saved[1], 2)
                os.close(devnull)
                os.close(saved[0])
                os.close(saved[1])
        target = cache / Path(so).name
        tmp_target = Path(tmp) / (Path(so).name + ".ready")
        shutil.copyfile(so, tmp_target)
        os.replace(tmp_target, target)


class GeneratedSolver:
    """A generated C solver, called through cffi. Same interface as the reference."""

    def __init__(self, tree_dir, quiet: bool = True, module=None):
        """``module``: an already built cffi module for this tree (the bench
        links one against the tree's own archive); by default bind builds it."""
        self.tree_dir = Path(tree_dir).resolve()
        if module is None:
            self._mod, self.manifest = build_module(self.tree_dir, quiet)
        else:
            self._mod, self.manifest = module, verify_tree(self.tree_dir)
        self.ffi, self.lib = self._mod.ffi, self._mod.lib
        self.prefix = self.manifest["c_name"]
        self.horizon = int(self.manifest["horizon"])
        self.backend = self.manifest["backend"]
        self.name = f"generated:{self.backend}"
        self.vehicle = load_vehicle(self.tree_dir / "vehicle.toml")
        p = self.prefix
        self._plan_fn = getattr(self.lib, f"{p}_plan_descent")
        self._work = self.ffi.new(f"{p}_workspace *")
        self._plan = self.ffi.new(f"{p}_plan *")
        self._input = self.ffi.new(f"{p}_input *")
        self._settings = self.ffi.new(f"{p}_guidance_config *")
        getattr(self.lib, f"{p}_guidance_config_init")(self._settings)
        self.default_iterations_per_solve_max = int(self._settings.iterations_per_solve_max)
        self._default_reserve_steps = int(self._settings.reserve_steps)

    def settings(self, iterations_per_solve_max=None, tof_tolerance_s=None,
                 iterations_per_call_max=None) -> None:
        if iterations_per_solve_max is not None:
            self._settings.iterations_per_solve_max = int(iterations_per_solve_max)
        if tof_tolerance_s is not None:
            self._settings.tof_tolerance_s = float(tof_tolerance_s)
        if iterations_per_call_max is not None:
            self._settings.iterations_per_call_max = int(iterations_per_call_max)

    def solve(self, position_m, velocity_mps, mass_kg, time_of_flight_s=None,
              target_m=(0.0, 0.0, 0.0), fallback: bool = True,
              velocity_target_mps=(0.0, 0.0, 0.0), throttle_max=None,
              reserve_throttle_max=None, reserve_steps=None) -> Trajectory:
        """As ReferenceSolver.solve; the C checks the inputs (INPUT_REFUSED)."""
        inp, st = self._input, self._settings
        for i in range(3):
            inp.position_m[i] = float(position_m[i])
            inp.velocity_mps[i] = float(velocity_mps[i])
            inp.target_m[i] = float(target_m[i])
            inp.velocity_target_mps[i] = float(velocity_target_mps[i])
        inp.mass_kg = float(mass_kg)
        inp.time_of_flight_s = 0.0 if time_of_flight_s is None else float(time_of_flight_s)
        if time_of_flight_s is not None and inp.time_of_flight_s == 0.0:
            inp.time_of_flight_s = -1.0   # 0 means "search" in C; a given 0 s is bad input
        inp.throttle_max = 0.0 if throttle_max is None else float(throttle_max)
        if throttle_max is not None and inp.throttle_max == 0.0:
            inp.throttle_max = -1.0       # 0 means "the vehicle's"; a given 0 is bad input
        st.reserve_throttle_max = 0.0 if reserve_throttle_max is None else float(reserve_throttle_max)
        st.reserve_steps = self._default_reserve_steps if reserve_steps is None else int(reserve_steps)
        st.allow_terminal_error = 1 if fallback else 0
        t0 = time.perf_counter()
        code = int(self._plan_fn(self._work, inp, st, self._plan))
        elapsed = time.perf_counter() - t0
        status = _STATUS_NAMES[code] if 0 <= code < len(_STATUS_NAMES) else "solver_breakdown"
        n = self.horizon
        if status == "input_refused":
            return Trajectory(status=status, solver=self.name, horizon=n, solve_time_s=elapsed,
                              message="input refused by the generated solver (see its header)")
        pl = self._plan
        buf = self.ffi.buffer

        def arr(field, shape):
            return np.frombuffer(buf(field), dtype=np.float64).reshape(shape).copy()

        traj = Trajectory(status=status, solver=self.name, horizon=n,
                          time_of_flight_s=float(pl.time_of_flight_s),
                          iterations=int(pl.iterations), iterations_total=int(pl.iterations_total),
                          iterations_max=int(pl.iterations_max), solves=int(pl.solves),
                          solve_time_s=elapsed)
        if pl.budget_exhausted:
            traj.message = "stopped by the call's iteration budget (iterations_per_call_max)"
        if status in ("target_met", "best_reachable", "limits_violated"):
            traj.t_s = arr(pl.t_s, (n + 1,))
            traj.position_m = arr(pl.position_m, (n + 1, 3))
            traj.velocity_mps = arr(pl.velocity_mps, (n + 1, 3))
            traj.mass_kg = arr(pl.mass_kg, (n + 1,))
            traj.thrust_n = arr(pl.thrust_n, (n, 3))
            traj.accel_mps2 = arr(pl.accel_mps2, (n, 3))
            traj.accel_slack_mps2 = arr(pl.accel_slack_mps2, (n,))
            full = self.vehicle.thrust_max_n * math.cos(math.radians(self.vehicle.engine_cant_deg))
            traj.throttle = np.linalg.norm(traj.thrust_n, axis=1) / full
            traj.fuel_kg = float(pl.fuel_kg)
            traj.objective = float(pl.objective)
            traj.plan_mode = _MODE_NAMES[int(pl.mode)]
            traj.throttle_limit = float(pl.throttle_limit)
            traj.target_m = np.asarray(target_m, float)
            traj.velocity_target_mps = np.asarray(velocity_target_mps, float)
            traj.terminal_position_error_m = arr(pl.terminal_position_error_m, (3,))
            traj.terminal_velocity_error_mps = arr(pl.terminal_velocity_error_mps, (3,))
            traj.terminal_error = float(pl.terminal_error)
            traj.landing_miss_m = float(pl.landing_miss_m)
            viol = arr(pl.violation, (len(CHECKS),))
            worst = int(pl.worst_check)
            traj.verdict = {"flyable": status != "limits_violated",
                            "worst": CHECKS[worst][0] if 0 <= worst < len(CHECKS) else "",
                            "violations": {name: float(x) for (name, _, _), x in zip(CHECKS, viol)}}
            if status == "limits_violated":
                traj.message = (f"plan breaks a real constraint: {traj.verdict['worst']} "
                                f"{viol[worst]:.3g}")
        if status == "unreachable":
            traj.message = explain_unreachable(self.vehicle, position_m, velocity_mps, mass_kg,
                                               time_of_flight_s, target_m, velocity_target_mps,
                                               throttle_max, traj.message)
        return traj


def load_solver(tree_dir, quiet: bool = True) -> GeneratedSolver:
    return GeneratedSolver(tree_dir, quiet)
