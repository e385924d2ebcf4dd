"""Reference guidance: the descent SOCP solved in Python with Clarabel.

This is the yardstick every generated solver is checked against. It uses the
same problem definition, the same time-of-flight search and the same
sequence of solves as the generated guidance layer, solved by an
independent, general-purpose interior-point solver, and checks every plan
against the real constraints (codegen/model/verdict.py).

One call (``solve``):

- **fixed time of flight** (a re-plan, or ``time_of_flight_s`` given): the
  target mode at tight tolerances, unless necessary conditions (the
  rocket-equation and speed bounds of ``problem.reach_bracket``, the least
  delta-v of ``problem.target_possible``) already rule the target out at
  that time; if
  it does not give a flyable plan that meets the target, and terminal error
  is allowed, the least terminal error, then the least fuel with that error
  held (Blackmore, Acikmese & Scharf 2010, extended to the velocity): the
  plan the vehicle can fly that ends closest to the target;
- **searched time of flight**: ``tofsearch.search`` with probes at
  ``PROBE_TOLERANCE`` (their ranking is all the search needs; a target
  probe that ``problem.target_possible`` rules out is infeasible without a
  solve), then the
  same sequence of tight solves at the time it found.

The answer is the first plan of that sequence that converged and passed the
verdict. Statuses (codegen/model/trajectory.py): the target met; the best
reachable plan, with its predicted terminal error; a plan that converged but
breaks a real constraint beyond tolerance (``limits_violated``, with the
violation); proven infeasible; the solver's failures.
"""

from __future__ import annotations

import math
import time
import warnings

import cvxpy as cp
import numpy as np

from codegen.errors import InputError
from codegen.model import tofsearch
from codegen.model import library_options
from codegen.model.diagnose import explain_unreachable
from codegen.model.canonical import CLARABEL_TIGHT
from codegen.model.policy import (ERROR_SLACK_ABS, ERROR_SLACK_REL, MERIT_MEETS_TARGET, NEARBY_TOF_STEPS,
                                  PROBE_TOLERANCE, RESERVE_STEPS, RESERVE_STEPS_MAX)
from codegen.model.problem import (DescentProblem, reach_bracket, target_possible,
                                   time_of_flight_bracket)
from codegen.model.trajectory import (INPUT_REFUSED, UNREACHABLE, ITERATIONS_EXHAUSTED, BEST_REACHABLE,
                                      LIMITS_VIOLATED, SOLVER_BREAKDOWN, TARGET_MET, Trajectory)
from codegen.model.vehicle import Vehicle
from codegen.model.verdict import check_plan


CLARABEL_PROBE = library_options.clarabel(PROBE_TOLERANCE, iterations=200)

#: When the tight tolerances stall, the reference retries at Clarabel's
#: defaults (1e-8), then at 1e-7: the worst accuracy of a reference answer.
#: Last, an independent interior-point solver (ECOS at 1e-9): on some
#: instances Clarabel stalls with a zero step at a gap of about 1e-7.
CLARABEL_RETRIES = (
    ("Clarabel's default tolerances (1e-8)", "CLARABEL", {}),
    ("relaxed tolerances (1e-7)", "CLARABEL",
     library_options.clarabel(1e-7, certificates=False, iterations=None)),
    ("ECOS at 1e-9", "ECOS", library_options.ecos(1e-9, iterations=200)),
)

_STATUS = {
    cp.OPTIMAL: TARGET_MET,
    cp.INFEASIBLE: UNREACHABLE,
    cp.OPTIMAL_INACCURATE: SOLVER_BREAKDOWN,
    cp.INFEASIBLE_INACCURATE: SOLVER_BREAKDOWN,
    cp.UNBOUNDED: SOLVER_BREAKDOWN,
    cp.UNBOUNDED_INACCURATE: SOLVER_BREAKDOWN,
    cp.USER_LIMIT: ITERATIONS_EXHAUSTED,
    cp.SOLVER_ERROR: SOLVER_BREAKDOWN,
}


def validate_state(vehicle: Vehicle, position_m, velocity_mps, mass_kg, time_of_flight_s=None,
                   target_m=(0.0, 0.0, 0.0), velocity_target_mps=(0.0, 0.0, 0.0)):
    """Refuse non-finite or meaningless run-time inputs before any solve."""
    for name, vec in (("position_m", position_m), ("velocity_mps", velocity_mps),
                      ("target_m", target_m), ("velocity_target_mps", velocity_target_mps)):
        arr = np.asarray(vec, dtype=float)
        if arr.shape != (3,):
            raise InputError(name, vec, "must have three components")
        for i, x in enumerate(arr):
            if not math.isfinite(x):
                raise InputError(f"{name}[{i}]", float(x), "must be finite")
    if not (isinstance(mass_kg, (int, float)) and math.isfinite(mass_kg)):
        raise InputError("mass_kg", float(mass_kg) if isinstance(mass_kg, (int, float)) else mass_kg,
                         "must be a finite number")
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
        self.probe_options = dict(CLARABEL_PROBE) if solver == "CLARABEL" else dict(solver_options)
        self.retry_options = CLARABEL_RETRIES if solver == "CLARABEL" else ()
        self._problem = None

    def problem(self) -> DescentProblem:
        if self._problem is None:
            self._problem = DescentProblem(self.vehicle, self.horizon)
        return self._problem

    # -- one solve at a fixed time of flight ---------------------------------
    def solve_mode(self, mode, position_m, velocity_mps, mass_kg, time_of_flight_s,
                   target_m=(0.0, 0.0, 0.0), err_max=0.0, velocity_target_mps=(0.0, 0.0, 0.0),
                   probe: bool = False, throttle_max=None) -> Trajectory:
        """One solve in one mode (problem.MODES). ``probe``: at the search's
        loose tolerance, without the retries. The plan is filled in SI units
        when the solve converged; the verdict is not taken here."""
        dp = self.problem()
        dp.set_parameters(dp.values(position_m, velocity_mps, mass_kg, time_of_flight_s,
                                    target_m, mode, err_max, velocity_target_mps, throttle_max))
        t0 = time.perf_counter()
        status, msg, iters = self._solve_once(dp, self.probe_options if probe else
                                              self.solver_options)
        for label, solver, options in (() if probe else self.retry_options):
            if status != SOLVER_BREAKDOWN:
                break
            # Tight tolerances can stall just short of them ("almost
            # solved"); then a looser one is the reference, and we say so.
            status, msg, more = self._solve_once(dp, options, solver)
            iters += more
            if status == TARGET_MET:
                msg = f"solved at {label} (tighter tolerances stalled)"
        elapsed = time.perf_counter() - t0
        traj = Trajectory(status=status, solver=self.name, horizon=self.horizon,
                          time_of_flight_s=float(time_of_flight_s), iterations=iters,
                          iterations_total=iters, iterations_max=iters, solves=1,
                          solve_time_s=elapsed, message=msg, plan_mode=mode)
        if status == TARGET_MET:
            fill_from_scaled(traj, dp, {k: v.value for k, v in dp.vars.items()},
                             float(dp.problem.value), target_m, velocity_target_mps)
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
            status, msg = _STATUS.get(dp.problem.status, SOLVER_BREAKDOWN), ""
        except cp.error.SolverError as exc:
            status, msg = SOLVER_BREAKDOWN, str(exc)
        stats = dp.problem.solver_stats
        iters = int(stats.num_iters or 0) if stats is not None else 0
        return status, msg, iters

    # -- guidance: the search and the sequence of final solves ----------------
    def solve(self, position_m, velocity_mps, mass_kg, time_of_flight_s=None,
              target_m=(0.0, 0.0, 0.0), fallback: bool = True,
              velocity_target_mps=(0.0, 0.0, 0.0), throttle_max=None,
              reserve_throttle_max=None, reserve_steps: int = RESERVE_STEPS) -> Trajectory:
        """Plan a descent from the given state.

        Without a time of flight, search it over the published bracket.
        ``fallback`` allows a plan that ends off the target when the target
        cannot be met (status ``best_reachable``: the best reachable plan, with
        its predicted terminal error); without it such a state is reported
        ``unreachable``. ``throttle_max`` is a run-time limit on the throttle
        (fraction of thrust_max_n, in [throttle_min, 1]) in place of the
        vehicle's planning limit (a derated engine, say).
        ``reserve_throttle_max``: at a fixed time of flight, when the target
        cannot be met at the planning limit, the highest limit the call may
        use instead (the engine's reserve; None: none); the plan then uses the
        lowest limit found by ``reserve_steps`` bisection steps that meets the
        target, and ``Trajectory.throttle_limit`` says which.
        """
        try:
            validate_state(self.vehicle, position_m, velocity_mps, mass_kg, time_of_flight_s,
                           target_m, velocity_target_mps)
            for name, value in (("throttle_max", throttle_max),
                                ("reserve_throttle_max", reserve_throttle_max)):
                if value is None:
                    continue
                if isinstance(value, bool) or not isinstance(value, (int, float)) \
                        or not self.vehicle.throttle_min <= value <= 1.0:
                    raise InputError(name, value, f"must lie in [throttle_min, 1] = "
                                                  f"[{self.vehicle.throttle_min!r}, 1]")
            if isinstance(reserve_steps, bool) or not isinstance(reserve_steps, int) \
                    or not 0 <= reserve_steps <= RESERVE_STEPS_MAX:
                raise InputError("reserve_steps", reserve_steps,
                                 f"must be an integer in [0, {RESERVE_STEPS_MAX}]")
        except InputError as exc:
            return Trajectory(status=INPUT_REFUSED, solver=self.name, horizon=self.horizon,
                              message=str(exc))
        t0 = time.perf_counter()
        spent = {"iters": 0, "max": 0, "solves": 0}

        planning = self.vehicle.throttle_max if throttle_max is None else float(throttle_max)

        def run(mode, tof, err_max=0.0, probe=False, limit=None):
            limit = planning if limit is None else limit
            tr = self.solve_mode(mode, position_m, velocity_mps, mass_kg, tof, target_m, err_max,
                                 velocity_target_mps, probe=probe,
                                 throttle_max=None if limit == self.vehicle.throttle_max
                                 else limit)
            tr.throttle_limit = limit
            spent["iters"] += tr.iterations
            spent["max"] = max(spent["max"], tr.iterations)
            spent["solves"] += 1
            return tr

        def possible_at(t):
            return target_possible(self.vehicle, position_m, velocity_mps, mass_kg, t,
                                   self.horizon, target_m, velocity_target_mps)

        lo, hi = time_of_flight_bracket(self.vehicle, position_m, velocity_mps, mass_kg,
                                        throttle_max)
        lo = max(lo, 1e-3 * hi)
        if time_of_flight_s is not None:
            reach = reach_bracket(self.vehicle, velocity_mps, mass_kg, time_of_flight_s,
                                  time_of_flight_s, velocity_target_mps, throttle_max,
                                  position_m, target_m, self.horizon)
            possible = reach is not None and possible_at(time_of_flight_s)
            reserve = None
            if reserve_throttle_max is not None and reserve_throttle_max > planning:
                reserve = (float(reserve_throttle_max), reserve_steps)
            traj = self._finish(run, time_of_flight_s, possible, fallback, planning,
                                reserve)
        else:
            reach = reach_bracket(self.vehicle, velocity_mps, mass_kg, lo, hi,
                                  velocity_target_mps, throttle_max, position_m, target_m,
                                  self.horizon)

            def evaluate(t, mode):
                # A target probe that needs more delta-v than the propellant
                # gives is infeasible without a solve (problem.target_possible).
                if mode == "target" and not possible_at(t):
                    return tofsearch.INFEASIBLE, math.inf, Trajectory(
                        status=UNREACHABLE, solver=self.name, horizon=self.horizon,
                        time_of_flight_s=float(t), message=OUT_OF_REACH)
                # Only a proven infeasible status steers the search as
                # infeasible; numerical trouble or an iteration limit says
                # nothing about t (tofsearch's rule for failures).
                tr = run(mode, t, probe=True)
                if tr.status == TARGET_MET and math.isfinite(tr.objective):
                    return tofsearch.SOLVED, tr.objective, tr
                if tr.status == UNREACHABLE:
                    return tofsearch.INFEASIBLE, math.inf, tr
                return tofsearch.FAILED, math.nan, tr

            found = tofsearch.search(evaluate, lo, hi, reach=reach)
            if found.t_best is None:
                traj = found.payload_best
                if traj is None:      # cannot happen: a search evaluates at least once
                    traj = Trajectory(status=SOLVER_BREAKDOWN, solver=self.name,
                                      horizon=self.horizon)
                traj = _without_plan(traj)
            else:
                met = found.phase == "target" or \
                    found.payload_best.terminal_error <= MERIT_MEETS_TARGET
                traj = self._finish(run, found.t_best, met, fallback, planning, nearby=True)
        if traj.status == UNREACHABLE:
            traj.message = explain_unreachable(self.vehicle, position_m, velocity_mps, mass_kg,
                                               time_of_flight_s, target_m, velocity_target_mps,
                                               throttle_max, traj.message)
        traj.iterations_total = spent["iters"]
        traj.iterations_max = spent["max"]
        traj.solves = spent["solves"]
        traj.solve_time_s = time.perf_counter() - t0
        return traj

    def _finish(self, run, tof, try_target, fallback, planning, reserve=None, nearby=False):
        """The tight solves at one time of flight, in order: the target at the
        planning limit (when the rocket equation allows it); with a reserve,
        the target at the reserve's limit and, if met, bisection for the
        lowest limit that still meets it; then the least error and the least
        fuel at that error, at the highest limit (when allowed). ``nearby``
        (a searched time of flight): when the target plan converged but is
        not flyable, the target at the nearby times NEARBY_TOF_STEPS first.
        Returns the first flyable plan, or else the most telling failure."""
        tried = []
        if try_target:
            tr = run("target", tof)
            if tr.status == TARGET_MET:
                if self._judge(tr, meets_target=True):
                    return tr
                if nearby:
                    for step in NEARBY_TOF_STEPS:
                        t = tof + step * tofsearch.TOLERANCE_S
                        if t <= 0.0:
                            continue
                        near = run("target", t)
                        if near.status == TARGET_MET and self._judge(near, meets_target=True):
                            near.message = (f"target met at a nearby time of flight ({t:.6g} s): "
                                            f"at {tof:.6g} s the plan broke "
                                            f"{tr.verdict.get('worst')}")
                            return near
            tried.append(tr)
        limit = None
        if reserve is not None:
            top, steps = reserve
            limit = top
            best = run("target", tof, limit=top)
            if best.status == TARGET_MET and self._judge(best, meets_target=True):
                lo, hi = planning, top
                for _ in range(steps):
                    mid = 0.5 * (lo + hi)
                    tr = run("target", tof, limit=mid)
                    if tr.status == TARGET_MET and self._judge(tr, meets_target=True):
                        hi, best = mid, tr
                    else:
                        lo = mid
                best.message = (f"target met with the engine's reserve: throttle up to "
                                f"{best.throttle_limit:.4g} (planning limit {planning:.4g})")
                return best
            tried.append(best)
        if fallback:
            first = run("least_error", tof, limit=limit)
            tried.append(first)
            candidates = []
            if first.status == TARGET_MET:
                for slack in ERROR_SLACK_REL:
                    bound = first.terminal_error * (1.0 + slack) + ERROR_SLACK_ABS
                    second = run("fuel_at_error", tof, err_max=bound, limit=limit)
                    tried.append(second)
                    candidates.append(second)
                    if second.status == TARGET_MET and self._judge(second, meets_target=False):
                        break
                    if second.status != TARGET_MET:
                        break
                candidates.append(first)
                for tr in candidates:
                    if tr.status == TARGET_MET and self._judge(tr, meets_target=False):
                        tr.status = BEST_REACHABLE
                        tr.message = (f"target out of reach: best reachable plan ends "
                                      f"weighted error {tr.terminal_error:.4g} "
                                      f"({tr.terminal_miss_m:.4g} m, "
                                      f"{tr.terminal_speed_error_mps:.4g} m/s)")
                        return tr
        # No flyable plan. A converged plan that breaks a real constraint is
        # reported with its violation; otherwise the first failure says why.
        for tr in tried:
            if tr.status == TARGET_MET:
                tr.status = LIMITS_VIOLATED
                tr.message = f"plan breaks a real constraint: {tr.verdict_text}"
                return tr
        for tr in tried:
            if tr.status != UNREACHABLE:
                return _without_plan(tr)
        if tried:
            return _without_plan(tried[-1])
        return Trajectory(status=UNREACHABLE, solver=self.name, horizon=self.horizon,
                          time_of_flight_s=float(tof), message=OUT_OF_REACH)

    def _judge(self, tr: Trajectory, meets_target: bool) -> bool:
        """Take the verdict of the real constraints into ``tr``; True if flyable."""
        v = check_plan(self.vehicle, tr.time_of_flight_s, tr.position_m, tr.velocity_mps,
                       tr.mass_kg, tr.accel_mps2, tr.accel_slack_mps2, tr.target_m,
                       tr.velocity_target_mps, meets_target=meets_target,
                       throttle_max=tr.throttle_limit)
        tr.verdict = v.as_dict()
        tr.verdict_text = v.summary()
        return v.flyable


#: Why a target solve was skipped (problem.reach_bracket, problem.target_possible).
OUT_OF_REACH = ("target out of reach at this time of flight (rocket equation, speed limit "
                "or least delta-v)")


def _without_plan(tr: Trajectory) -> Trajectory:
    """A copy of the outcome with no plan arrays (a failed or proven
    infeasible solve has none worth flying)."""
    return Trajectory(status=tr.status, solver=tr.solver, horizon=tr.horizon,
                      time_of_flight_s=tr.time_of_flight_s, iterations=tr.iterations,
                      solves=1, message=tr.message, plan_mode=tr.plan_mode)


def fill_from_scaled(traj: Trajectory, dp: DescentProblem, x: dict, objective: float,
                     target_m, velocity_target_mps=(0.0, 0.0, 0.0)) -> None:
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
    traj.target_m = np.asarray(target_m, float)
    traj.velocity_target_mps = np.asarray(velocity_target_mps, float)
    traj.set_terminal_error(dp.vehicle.touchdown)
    traj.objective = objective
