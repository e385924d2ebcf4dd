"""`pdgc check`: a generated solver against the reference, case by case.

Cases are drawn from the vehicle file's envelope: most inside it, some on its
faces and some beyond it (near and past the edge of feasibility), with fixed
times of flight drawn over the lower part of the bracket (so that many are
too short to be feasible) and every K-th case searching the time of flight.
Both sides run the same sequence of solves (the target; when it is out of
reach, the best reachable plan), so they must say the same thing. Every plan
the generated solver hands out (target_met or best_reachable) is also judged, in
Python and independently of the C's own checks, against the real
constraints (codegen.model.verdict.check_plan): two solvers can share one
mistake, the constraints cannot.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from codegen.model.problem import time_of_flight_bracket
from codegen.reference import ReferenceSolver
from codegen.model.policy import ERROR_SLACK_ABS, ERROR_SLACK_REL
from codegen.model.trajectory import BEST_REACHABLE, TARGET_MET, SOLVED
from codegen.model.verdict import check_plan

#: Stated tolerances by precision: relative objective error (fixed time of
#: flight), relative fuel error (searched time of flight, where the two
#: searches may settle a tolerance apart), position difference as a fraction
#: of the scaling length, thrust difference as a fraction of the upper bound.
TOLERANCES = {
    "double": {"objective_rel": 1e-6, "fuel_rel_search": 1e-4, "position_rel": 1e-4,
               "thrust_rel": 1e-3},
    "single": {"objective_rel": 1e-3, "fuel_rel_search": 1e-3, "position_rel": 1e-2,
               "thrust_rel": 5e-2},
}


@dataclass
class Case:
    index: int
    kind: str            # inside, edge, beyond
    position_m: list
    velocity_mps: list
    mass_kg: float
    time_of_flight_s: float | None


def draw_cases(vehicle, count: int, seed: int, search_every: int = 5) -> list:
    """Dispersed initial states: 70 % inside the envelope, 20 % on its faces,
    10 % beyond it (position and speed scaled up by 1.2 to 2)."""
    rng = np.random.default_rng(seed)
    env = vehicle.envelope
    plo, phi = np.array(env.position_min_m), np.array(env.position_max_m)
    vlo, vhi = np.array(env.velocity_min_mps), np.array(env.velocity_max_mps)
    cases = []
    for i in range(count):
        u = rng.random()
        kind = "inside" if u < 0.7 else ("edge" if u < 0.9 else "beyond")
        pos = plo + (phi - plo) * rng.random(3)
        vel = vlo + (vhi - vlo) * rng.random(3)
        if kind == "edge":
            j = int(rng.integers(3))
            pos[j] = plo[j] if rng.random() < 0.5 else phi[j]
            j = int(rng.integers(3))
            vel[j] = vlo[j] if rng.random() < 0.5 else vhi[j]
        elif kind == "beyond":
            pos[:2] *= rng.uniform(1.2, 2.0)
            vel *= rng.uniform(1.2, 2.0)
        mass = float(rng.uniform(env.mass_min_kg, env.mass_max_kg))
        tof = None
        if search_every <= 0 or i % search_every != 0:
            lo, hi = time_of_flight_bracket(vehicle, pos, vel, mass)
            tof = float(rng.uniform(lo, lo + 0.4 * (hi - lo)))
        cases.append(Case(i, kind, [float(x) for x in pos], [float(x) for x in vel], mass, tof))
    return cases


def replay_line(tree_dir, case: Case, horizon: int) -> str:
    state = ",".join(repr(float(x)) for x in case.position_m + case.velocity_mps + [case.mass_kg])
    tof = f" --tof {case.time_of_flight_s!r}" if case.time_of_flight_s is not None else ""
    # --state=...: a state that starts with a minus sign stays one argument.
    return (f"pdgc solve {tree_dir}/vehicle.toml --state={state}{tof} --horizon {horizon} "
            f"--solver-dir {tree_dir}")


@dataclass
class CaseResult:
    case: Case
    generated: str
    reference: str
    objective_rel: float = math.nan
    fuel_rel: float = math.nan
    position_m: float = math.nan
    thrust_n: float = math.nan
    iterations_max: int = 0
    solve_time_s: float = 0.0
    failures: list = field(default_factory=list)


def judge(vehicle, traj, precision: str = "double"):
    """The real-constraint checks of a plan (codegen.model.verdict.check_plan),
    recomputed here from the plan's own arrays; None when it carries no plan."""
    if traj.status not in SOLVED or len(traj.accel_mps2) == 0:
        return None
    limit = traj.throttle_limit if math.isfinite(traj.throttle_limit) else None
    return check_plan(vehicle, traj.time_of_flight_s, traj.position_m, traj.velocity_mps,
                      traj.mass_kg, traj.accel_mps2, traj.accel_slack_mps2, traj.target_m,
                      traj.velocity_target_mps, meets_target=traj.status == TARGET_MET,
                      precision=precision, throttle_max=limit)


def compare(gen, ref, case: Case, tol: dict, vehicle, length_m: float,
            precision: str = "double") -> CaseResult:
    args = (case.position_m, case.velocity_mps, case.mass_kg, case.time_of_flight_s)
    g = gen.solve(*args)
    r = ref.solve(*args)
    res = CaseResult(case, g.status, r.status, iterations_max=g.iterations_max,
                     solve_time_s=g.solve_time_s)
    if g.status in (TARGET_MET, BEST_REACHABLE):
        v = judge(vehicle, g, precision)
        if v is not None and not v.flyable:
            res.failures.append(f"{g.status} plan breaks {v.worst} "
                                f"({v.violations[v.worst]:.3g}; independent check)")
    if g.status != r.status:
        res.failures.append(f"status {g.status} vs reference {r.status}")
        return res
    if g.status == BEST_REACHABLE:
        # Best reachable plans: the least terminal error, then the least fuel
        # with that error relaxed by at most the largest slack
        # (codegen.model.policy); the two may settle anywhere in that band.
        band = ERROR_SLACK_REL[-1] * max(g.terminal_error, r.terminal_error) + ERROR_SLACK_ABS
        if not abs(g.terminal_error - r.terminal_error) <= band:
            res.failures.append(f"terminal error {g.terminal_error:.4g} vs reference "
                                f"{r.terminal_error:.4g} (band {band:.3g})")
        return res
    if g.status != TARGET_MET:
        return res
    res.fuel_rel = abs(g.fuel_kg - r.fuel_kg) / max(abs(r.fuel_kg), 1e-9)
    if case.time_of_flight_s is None:
        if res.fuel_rel > tol["fuel_rel_search"]:
            res.failures.append(f"fuel error {res.fuel_rel:.3g} > {tol['fuel_rel_search']:.3g}")
    res.objective_rel = abs(g.objective - r.objective) / max(abs(r.objective), 1e-9)
    same_tof = abs(g.time_of_flight_s - r.time_of_flight_s) <= 1e-9 * r.time_of_flight_s
    if same_tof:
        res.position_m = float(np.max(np.abs(g.position_m - r.position_m)))
        res.thrust_n = float(np.max(np.abs(g.thrust_n - r.thrust_n)))
        if res.objective_rel > tol["objective_rel"]:
            res.failures.append(f"objective error {res.objective_rel:.3g} > {tol['objective_rel']:.3g}")
        if res.position_m > tol["position_rel"] * length_m:
            res.failures.append(f"position difference {res.position_m:.3g} m > "
                                f"{tol['position_rel'] * length_m:.3g} m")
        if res.thrust_n > tol["thrust_rel"] * vehicle.thrust_upper_n:
            res.failures.append(f"thrust difference {res.thrust_n:.3g} N > "
                                f"{tol['thrust_rel'] * vehicle.thrust_upper_n:.3g} N")
    return res


def summarise(results: list, tol: dict) -> dict:
    agree = sum(r.generated == r.reference for r in results)
    counts = {}
    for r in results:
        key = f"{r.generated}/{r.reference}"
        counts[key] = counts.get(key, 0) + 1

    def worst(attr):
        vals = [getattr(r, attr) for r in results if not math.isnan(getattr(r, attr))]
        return max(vals) if vals else math.nan

    fixed_t = [r.solve_time_s for r in results if r.case.time_of_flight_s is not None]
    search_t = [r.solve_time_s for r in results if r.case.time_of_flight_s is None]
    iters = [r.iterations_max for r in results]
    return {
        "cases": len(results),
        "status_agreement": agree,
        "status_pairs": dict(sorted(counts.items())),
        "worst_objective_rel": worst("objective_rel"),
        "worst_fuel_rel": worst("fuel_rel"),
        "worst_position_m": worst("position_m"),
        "worst_thrust_n": worst("thrust_n"),
        "iterations_median": float(np.median(iters)) if iters else math.nan,
        "iterations_worst": int(max(iters)) if iters else 0,
        "solve_time_fixed_median_s": float(np.median(fixed_t)) if fixed_t else math.nan,
        "solve_time_fixed_worst_s": float(max(fixed_t)) if fixed_t else math.nan,
        "solve_time_search_median_s": float(np.median(search_t)) if search_t else math.nan,
        "solve_time_search_worst_s": float(max(search_t)) if search_t else math.nan,
        "failures": sum(bool(r.failures) for r in results),
        "tolerances": tol,
    }


@dataclass
class CheckRun:
    """A finished check of a generated tree: its solver, tolerances, results, summary."""

    solver: object
    precision: str
    tolerances: dict
    length_m: float
    results: list
    summary: dict


def check_tree(tree_dir, cases: int, seed: int, search_every: int = 5,
               tol_objective: float | None = None, on_case=None) -> CheckRun:
    """Compare the generated solver in ``tree_dir`` with the reference on
    ``cases`` dispersed cases; ``on_case(done, total)`` after each one."""
    from codegen.bind import load_solver
    from codegen.model.problem import Scaling

    gen = load_solver(tree_dir)
    vehicle = gen.vehicle
    ref = ReferenceSolver(vehicle, gen.horizon)
    precision = gen.manifest.get("precision", "double")
    tol = dict(TOLERANCES[precision])
    if tol_objective is not None:
        tol["objective_rel"] = tol_objective
    length = Scaling.for_vehicle(vehicle).length_m
    drawn = draw_cases(vehicle, cases, seed, search_every)
    results = []
    for i, case in enumerate(drawn):
        results.append(compare(gen, ref, case, tol, vehicle, length, precision))
        if on_case is not None:
            on_case(i + 1, len(drawn))
    return CheckRun(gen, precision, tol, length, results, summarise(results, tol))


def results_json(run: CheckRun) -> str:
    """The text of ``pdgc check --json``: the summary and every case."""
    payload = {"summary": run.summary, "cases": [
        {"index": r.case.index, "kind": r.case.kind, "position_m": r.case.position_m,
         "velocity_mps": r.case.velocity_mps, "mass_kg": r.case.mass_kg,
         "time_of_flight_s": r.case.time_of_flight_s, "generated": r.generated,
         "reference": r.reference, "objective_rel": _num(r.objective_rel),
         "position_m_diff": _num(r.position_m), "thrust_n_diff": _num(r.thrust_n),
         "iterations_max": r.iterations_max, "solve_time_s": r.solve_time_s,
         "failures": r.failures} for r in run.results]}
    return json.dumps(payload, indent=1, default=_num)


def _num(x):
    try:
        return None if not math.isfinite(x) else x
    except TypeError:
        return x
