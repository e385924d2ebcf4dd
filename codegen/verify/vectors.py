"""Test vectors for the hand-off package: inputs and expected outputs.

Every vector is one call of ``<prefix>_plan_descent()``: the inputs (state,
time of flight or 0 for a search, target, settings) and what the answer must
be. Expected outputs come from the reference solve
(:class:`codegen.reference.ReferenceSolver`, Clarabel at tight tolerances,
with the generated code's default sequence of solves: the best reachable
plan when the target cannot be met), except for the
few vectors that test the C API's own contract (settings out of range, an
iteration cap too small to converge), which have no Python counterpart; those
say ``source = "contract"``.

The states are chosen, not drawn at random at run time: the middle of the
vehicle's envelope, its corners, a few points inside it drawn with a fixed
seed, points beyond it, times of flight too short and too long to be
feasible, and bad inputs. For each state that is solved with a searched time
of flight, a second vector fixes the time of flight at the reference's answer:
those fixed vectors carry the tight checks (the searched ones may settle on a
slightly different time on another FPU or compiler).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from codegen.verify.check import TOLERANCES, draw_cases
from codegen.model.problem import Scaling, time_of_flight_bracket
from codegen.reference import ReferenceSolver
from codegen.model.policy import ERROR_SLACK_ABS, ERROR_SLACK_REL
from codegen.model.trajectory import INPUT_REFUSED, ITERATIONS_EXHAUSTED, SOLVED, TARGET_MET

#: Seed of the few dispersed inside points (fixed: the vectors are the same every run).
INSIDE_SEED = 20260
INSIDE_POINTS = 3
#: Scale factors of the states beyond the envelope (horizontal position and velocity).
OUTSIDE_FACTORS = (1.4, 3.0)
#: Iteration cap small enough that no descent problem converges in it.
TINY_ITERATION_CAP = 2


@dataclass
class Vector:
    name: str
    kind: str                 # middle, inside, edge, outside, infeasible, bad_input, contract
    source: str               # "reference" or "contract"
    position_m: list
    velocity_mps: list
    mass_kg: float
    time_of_flight_s: float   # 0.0: searched
    target_m: list = field(default_factory=lambda: [0.0, 0.0, 0.0])
    iterations_per_solve_max: int | None = None     # None: the default settings
    tof_tolerance_s: float | None = None
    null_workspace: bool = False
    status: str = TARGET_MET
    expect_tof_s: float = math.nan
    fuel_kg: float = math.nan
    objective: float = math.nan
    terminal_error: float = math.nan   # weighted terminal error (best_reachable)
    position: list | None = None    # (N+1) x 3 expected positions [m]
    thrust: list | None = None      # N x 3 expected thrust [N]
    note: str = ""

    @property
    def searched(self) -> bool:
        return self.time_of_flight_s == 0.0


def tolerances(precision: str, vehicle, tof_tolerance_s: float) -> dict:
    """The stated tolerances of the vectors, in absolute and relative terms.

    They are the project's ``pdgc check`` tolerances (codegen/check.py) for
    the tree's precision, expressed in SI units for this vehicle.
    """
    t = TOLERANCES[precision]
    length = Scaling.for_vehicle(vehicle).length_m
    return {
        "fuel_rel_fixed": t["objective_rel"],
        "objective_rel_fixed": t["objective_rel"],
        "fuel_rel_searched": t["fuel_rel_search"],
        "tof_abs_searched_s": tof_tolerance_s,
        "position_abs_m": t["position_rel"] * length,
        "thrust_abs_n": t["thrust_rel"] * vehicle.thrust_upper_n,
        "same_tof_rel": 1e-9,
        # A best reachable plan: the least terminal error, then the least
        # fuel with that error relaxed by at most the largest slack of the
        # sequence of solves (codegen.model.policy); two solvers may settle
        # anywhere in that band, so it is the tolerance.
        "terminal_error_rel": ERROR_SLACK_REL[-1],
        "terminal_error_abs": ERROR_SLACK_ABS,
        "position_rel_of_length": t["position_rel"],
        "thrust_rel_of_upper": t["thrust_rel"],
        "length_m": length,
    }


def _fill(vec: Vector, traj) -> Vector:
    vec.status = traj.status
    if traj.status in SOLVED:
        vec.expect_tof_s = float(traj.time_of_flight_s)
        vec.fuel_kg = float(traj.fuel_kg)
        vec.objective = float(traj.objective)
        vec.terminal_error = float(traj.terminal_error)
    if traj.status == TARGET_MET:
        vec.position = np.asarray(traj.position_m, float).tolist()
        vec.thrust = np.asarray(traj.thrust_n, float).tolist()
    return vec


def build_vectors(vehicle, horizon: int, progress=None) -> list:
    """All vectors for one vehicle and horizon, expected outputs filled in."""
    say = progress or (lambda msg: None)
    ref = ReferenceSolver(vehicle, horizon)
    env = vehicle.envelope
    plo, phi = np.array(env.position_min_m), np.array(env.position_max_m)
    vlo, vhi = np.array(env.velocity_min_mps), np.array(env.velocity_max_mps)
    mid_p = ((plo + phi) / 2.0).tolist()
    mid_v = ((vlo + vhi) / 2.0).tolist()
    mid_m = (env.mass_min_kg + env.mass_max_kg) / 2.0
    out: list = []

    def solve(vec: Vector) -> Vector:
        tof = None if vec.searched else vec.time_of_flight_s
        return _fill(vec, ref.solve(vec.position_m, vec.velocity_mps, vec.mass_kg, tof,
                                    vec.target_m))

    def pair(name, kind, p, v, m, target=(0.0, 0.0, 0.0), also=()):
        """A searched vector and, when solved, fixed ones at its time of flight (x factors)."""
        say(f"reference solve: {name}")
        s = solve(Vector(f"{name}-searched", kind, "reference", list(map(float, p)),
                         list(map(float, v)), float(m), 0.0, list(map(float, target))))
        out.append(s)
        if s.status == TARGET_MET:
            for factor in (1.0,) + tuple(also):
                tof = s.expect_tof_s * factor
                label = "fixed" if factor == 1.0 else f"fixed-x{factor:g}"
                out.append(solve(Vector(f"{name}-{label}", kind, "reference", s.position_m,
                                        s.velocity_mps, s.mass_kg, tof, s.target_m)))
        return s

    # Middle of the envelope, also with a target off the origin.
    mid = pair("middle", "middle", mid_p, mid_v, mid_m, also=(1.15,))
    pair("middle-target", "middle", mid_p, mid_v, mid_m, target=(60.0, -40.0, 0.0))
    # A few inside points, drawn with a fixed seed.
    inside = [c for c in draw_cases(vehicle, 40, INSIDE_SEED, search_every=0) if c.kind == "inside"]
    for i, c in enumerate(inside[:INSIDE_POINTS]):
        pair(f"inside-{i + 1}", "inside", c.position_m, c.velocity_mps, c.mass_kg)
    # Corners: farthest and fastest at the lightest mass; nearest and slowest at full mass.
    far_v = [vlo[0], vhi[1], vlo[2]]
    pair("edge-far-fast", "edge", phi.tolist(), far_v, env.mass_min_kg)
    near_v = [vhi[0], vlo[1], vhi[2]]
    pair("edge-near-slow", "edge", [plo[0], plo[1], plo[2]], near_v, env.mass_max_kg)
    # Beyond the envelope: horizontal position and velocity scaled up.
    for f in OUTSIDE_FACTORS:
        p = [phi[0] * f, phi[1] * f, phi[2]]
        v = [vlo[0] * f, vhi[1] * f, vlo[2]]
        pair(f"outside-x{f:g}", "outside", p, v, env.mass_min_kg)
    # Times of flight outside the feasible window, from the middle state.
    t_min, t_max = time_of_flight_bracket(vehicle, mid_p, mid_v, mid_m)
    for name, tof in (("tof-too-short", 0.5 * t_min), ("tof-too-long", 1.5 * t_max)):
        say(f"reference solve: {name}")
        out.append(solve(Vector(name, "unreachable", "reference", mid_p, mid_v, mid_m, tof)))
    # Bad inputs: the reference refuses them too (status input_refused).
    dry, wet = vehicle.mass_dry_kg, vehicle.mass_wet_kg
    bad = [
        ("mass-at-dry", dict(mass_kg=dry)),
        ("mass-above-wet", dict(mass_kg=wet * 1.01)),
        ("position-nan", dict(position_m=[math.nan, mid_p[1], mid_p[2]])),
        ("velocity-inf", dict(velocity_mps=[mid_v[0], math.inf, mid_v[2]])),
        ("target-nan", dict(target_m=[0.0, 0.0, math.nan])),
        ("tof-negative", dict(time_of_flight_s=-1.0)),
        ("mass-nan", dict(mass_kg=math.nan)),
    ]
    for name, change in bad:
        fields = dict(position_m=list(mid_p), velocity_mps=list(mid_v), mass_kg=mid_m,
                      time_of_flight_s=0.0, target_m=[0.0, 0.0, 0.0])
        fields.update(change)
        vec = Vector(f"bad-{name}", "input_refused", "reference", **fields)
        tof = None if vec.time_of_flight_s == 0.0 else vec.time_of_flight_s
        traj = ref.solve(vec.position_m, vec.velocity_mps, vec.mass_kg, tof, vec.target_m)
        out.append(_fill(vec, traj))
    # The C API's own contract: settings out of range, NULL workspace, tiny iteration cap.
    fixed_tof = mid.expect_tof_s if mid.status == TARGET_MET else 0.5 * (t_min + t_max)
    contract = [
        ("settings-iterations-zero", dict(iterations_per_solve_max=0), INPUT_REFUSED),
        ("settings-tolerance-zero", dict(tof_tolerance_s=0.0), INPUT_REFUSED),
        ("null-workspace", dict(null_workspace=True), INPUT_REFUSED),
        ("iteration-cap", dict(iterations_per_solve_max=TINY_ITERATION_CAP, time_of_flight_s=fixed_tof),
         ITERATIONS_EXHAUSTED),
    ]
    for name, change, status in contract:
        fields = dict(position_m=list(mid_p), velocity_mps=list(mid_v), mass_kg=mid_m,
                      time_of_flight_s=0.0)
        fields.update(change)
        out.append(Vector(f"api-{name}", "contract", "contract", status=status, **fields,
                          note="expected status from the API contract in the header"))
    return out
