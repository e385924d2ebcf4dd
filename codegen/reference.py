"""Reference guidance: the descent SOCP solved in Python with Clarabel.

This is the yardstick every generated solver is checked against. It uses the
same problem definition and the same time-of-flight search as the generated
code, solved by an independent, general-purpose interior-point solver at
tight tolerances.
"""

from __future__ import annotations

import math
import time
import warnings

import cvxpy as cp
import numpy as np

from codegen.model import tofsearch
from codegen.errors import InputError
from codegen.model.canonical import CLARABEL_TIGHT
from codegen.model.problem import DescentProblem, time_of_flight_bracket
from codegen.model.trajectory import (BAD_INPUT, INFEASIBLE, ITERATION_LIMIT, LEAST_MISS, NUMERICAL_TROUBLE, OPTIMAL, Trajectory)
from codegen.model.vehicle import Vehicle


#: When the tight tolerances stall, the reference retries at Clarabel's
#: defaults (1e-8), then at 1e-7: the worst accuracy of a reference answer.
#: Last, an independent interior-point solver (ECOS at 1e-9): on some
#: instances Clarabel stalls with a zero step at a gap of about 1e-7.
CLARABEL_RETRIES = (
    ("Clarabel's default tolerances (1e-8)", "CLARABEL", {}),
    ("relaxed tolerances (1e-7)", "CLARABEL",
     {"tol_gap_abs": 1e-7, "tol_gap_rel": 1e-7, "tol_feas": 1e-7}),
    ("ECOS at 1e-9", "ECOS", {"abstol": 1e-9, "reltol": 1e-9, "feastol": 1e-9, "max_iters": 200}),
)

#: Slack on the landing miss in the second stage of the two-stage path,
#: relative to the least miss and absolute (m).
MISS_SLACK_REL = 1e-6
MISS_SLACK_M = 1e-3

_STATUS = {
    cp.OPTIMAL: OPTIMAL,
    cp.INFEASIBLE: INFEASIBLE,
    cp.OPTIMAL_INACCURATE: NUMERICAL_TROUBLE,
    cp.INFEASIBLE_INACCURATE: NUMERICAL_TROUBLE,
    cp.UNBOUNDED: NUMERICAL_TROUBLE,
    cp.UNBOUNDED_INACCURATE: NUMERICAL_TROUBLE,
    cp.USER_LIMIT: ITERATION_LIMIT,
    cp.SOLVER_ERROR: NUMERICAL_TROUBLE,
}


def validate_state(vehicle: Vehicle, position_m, velocity_mps, mass_kg, time_of_flight_s=None,
                   target_m=(0.0, 0.0, 0.0)):
    """Refuse non-finite or meaningless run-time inputs before any solve."""
    for name, vec in (("position_m", position_m), ("velocity_mps", velocity_mps),
                      ("target_m", target_m)):
        arr = np.asarray(vec, dtype=float)
        if arr.shape != (3,):
            raise InputError(name, vec, "must have three components")
        for i, x in enumerate(arr):
            if not math.isfinite(x):
                raise InputError(f"{name}[{i}]", x, "must be finite")
    if not (isinstance(mass_kg, (int, float)) and math.isfinite(mass_kg)):
        raise InputError("mass_kg", mass_kg, "must be a finite number")
    if not vehicle.mass_dry_kg < mass_kg <= vehicle.mass_wet_kg:
        raise InputError("mass_kg", mass_kg,
                         f"must lie in (mass_dry_kg, mass_wet_kg] = "
                         f"({vehicle.mass_dry_kg!r}, {vehicle.mass_wet_kg!r}]")
    if time_of_flight_s is not None:
        if not (math.isfinite(time_of_flight_s) and time_of_flight_s > 0.0):
            raise InputError("time_of_flight_s", time_of_flight_s, "must be finite and > 0")


class ReferenceSolver:
    """solve(state) -> Trajectory, with CVXPY and Clarabel."""

    name = "reference"

    def __init__(self, vehicle: Vehicle, horizon: int, solver: str = "CLARABEL",
                 solver_options: dict | None = None):
        self.vehicle = vehicle
        self.horizon = horizon
        self.solver = solver
        if solver_options is None:
            solver_options = CLARABEL_TIGHT if solver == "CLARABEL" else {}
        if "warm_start" in solver_options:
            # Every solve starts a new solver (see _solve_once): campaigns and
            # replays rely on it (codegen.verify.envelope.FreshEachCase).
            raise ValueError("the reference always solves with warm_start=False; "
                             "remove warm_start from solver_options")
        self.solver_options = dict(solver_options)
        self.retry_options = CLARABEL_RETRIES if solver == "CLARABEL" else ()
        self._problems: dict = {}

    def problem(self, kind: str) -> DescentProblem:
        if kind not in self._problems:
            self._problems[kind] = DescentProblem(self.vehicle, self.horizon, kind)
        return self._problems[kind]

    # -- one solve at a fixed time of flight ---------------------------------
    def solve_fixed(self, kind, position_m, velocity_mps, mass_kg, time_of_flight_s,
                    target_m=(0.0, 0.0, 0.0), miss_max_m=0.0) -> Trajectory:
        dp = self.problem(kind)
        dp.set_parameters(dp.values(position_m, velocity_mps, mass_kg, time_of_flight_s,
                                    target_m, miss_max_m))
        t0 = time.perf_counter()
        status, msg, iters = self._solve_once(dp, self.solver_options)
        for label, solver, options in self.retry_options:
            if status != NUMERICAL_TROUBLE:
                break
            # Tight tolerances can stall just short of them ("almost
            # solved"); then a looser one is the reference, and we say so.
            status, msg, more = self._solve_once(dp, options, solver)
            iters += more
            if status == OPTIMAL:
                msg = f"solved at {label} (tighter tolerances stalled)"
        elapsed = time.perf_counter() - t0
        traj = Trajectory(status=status, solver=self.name, horizon=self.horizon,
                          time_of_flight_s=float(time_of_flight_s), iterations=iters,
                          iterations_total=iters, iterations_max=iters, solves=1,
                          solve_time_s=elapsed, message=msg)
        if status == OPTIMAL:
            fill_from_scaled(traj, dp, {k: v.value for k, v in dp.vars.items()},
                             float(dp.problem.value), target_m)
        return traj

    def _solve_once(self, dp, options, solver=None):
        try:
            with warnings.catch_warnings():
                # An inaccurate answer is reported through the status instead.
                warnings.simplefilter("ignore", UserWarning)
                # warm_start=False: a fresh solver every time. Reusing the
                # previous one (CVXPY's default) made answers depend on the
                # order of solves: after an infeasible instance a feasible one
                # came back "almost solved".
                dp.problem.solve(solver=solver or self.solver, warm_start=False, **options)
            status, msg = _STATUS.get(dp.problem.status, NUMERICAL_TROUBLE), ""
        except cp.error.SolverError as exc:
            status, msg = NUMERICAL_TROUBLE, str(exc)
        stats = dp.problem.solver_stats
        iters = int(stats.num_iters or 0) if stats is not None else 0
        return status, msg, iters

    # -- guidance: search and two-stage fallback -----------------------------
    def solve(self, position_m, velocity_mps, mass_kg, time_of_flight_s=None,
              target_m=(0.0, 0.0, 0.0), fallback: bool = True) -> Trajectory:
        """Plan a descent from the given state.

        Without a time of flight, search it over the published bracket. When
        least fuel with the landing point fixed is infeasible and
        ``fallback`` is on, solve the two-stage problem: least landing miss,
        then least fuel at that miss (status ``least_miss``).
        """
        try:
            validate_state(self.vehicle, position_m, velocity_mps, mass_kg, time_of_flight_s,
                           target_m)
        except InputError as exc:
            return Trajectory(status=BAD_INPUT, solver=self.name, horizon=self.horizon,
                              message=str(exc))
        t0 = time.perf_counter()
        spent = {"iters": 0, "max": 0, "solves": 0}

        def run(kind, tof, miss_max_m=0.0):
            tr = self.solve_fixed(kind, position_m, velocity_mps, mass_kg, tof, target_m, miss_max_m)
            spent["iters"] += tr.iterations
            spent["max"] = max(spent["max"], tr.iterations)
            spent["solves"] += 1
            return tr

        def search(kind):
            if time_of_flight_s is not None:
                tr = run(kind, time_of_flight_s)
                return tr
            lo, hi = time_of_flight_bracket(self.vehicle, position_m, velocity_mps, mass_kg)
            lo = max(lo, 1e-3 * hi)

            def evaluate(t):
                # Only a proven infeasible status steers the search as
                # infeasible; numerical trouble or an iteration limit says
                # nothing about t (tofsearch's rule for failures).
                tr = run(kind, t)
                if tr.status == OPTIMAL and math.isfinite(tr.objective):
                    return tofsearch.SOLVED, tr.objective, tr
                if tr.status == INFEASIBLE:
                    return tofsearch.INFEASIBLE, math.inf, tr
                return tofsearch.FAILED, math.nan, tr

            _, _, tr, _ = tofsearch.search(evaluate, lo, hi)
            return tr

        traj = search("fuel")
        if traj.status == INFEASIBLE and fallback:
            first = search("miss")
            if first.status == OPTIMAL:
                miss = first.landing_miss_m
                second = run("fuel_within", first.time_of_flight_s,
                             miss * (1.0 + MISS_SLACK_REL) + MISS_SLACK_M)
                if second.status == OPTIMAL:
                    second.status = LEAST_MISS
                    second.message = (f"target out of reach: least landing miss {miss:.6g} m "
                                      "(two-stage solve)")
                traj = second
        traj.iterations_total = spent["iters"]
        traj.iterations_max = spent["max"]
        traj.solves = spent["solves"]
        traj.solve_time_s = time.perf_counter() - t0
        return traj


def fill_from_scaled(traj: Trajectory, dp: DescentProblem, x: dict, objective: float,
                     target_m) -> None:
    """Convert a scaled primal solution to SI units into ``traj``."""
    s, n = dp.scaling, dp.horizon
    r = np.asarray(x["r"]).T * s.length_m
    v = np.asarray(x["v"]).T * s.speed_mps
    m = np.exp(np.asarray(x["z"])) * s.mass_kg
    u = np.asarray(x["u"]).T * s.accel_mps2
    sig = np.asarray(x["sigma"]) * s.accel_mps2
    traj.t_s = np.linspace(0.0, traj.time_of_flight_s, n + 1)
    traj.position_m, traj.velocity_mps, traj.mass_kg = r, v, m
    traj.accel_mps2, traj.accel_slack_mps2 = u, sig
    traj.thrust_n = u * m[:n, None]
    full = dp.vehicle.thrust_max_n * math.cos(math.radians(dp.vehicle.engine_cant_deg))
    traj.throttle = np.linalg.norm(traj.thrust_n, axis=1) / full
    traj.fuel_kg = float(m[0] - m[-1])
    traj.landing_miss_m = float(np.linalg.norm(r[-1, :2] - np.asarray(target_m, float)[:2]))
    traj.objective = objective
