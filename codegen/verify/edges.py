"""Sweeps of fixed times of flight across both edges of the feasible window.

Near the edges of the window of times at which the target can be met, the
descent problem is nearly infeasible: the solver's iterates drift, and the
relaxation can stop being tight. `pdgc check --edge-states K` (this module)
finds, for K dispersed states, both edges of that window with the reference
(bisection on the target mode's feasibility to ``EDGE_RESOLUTION_S``), then
solves at fixed times ``OFFSETS_S`` inside and outside each edge with the
generated solver and the reference, and counts:

- **false flyable**: a solver says the target is met (or a best-reachable
  plan), yet the plan fails the real constraints when checked here, from its
  own numbers (codegen/model/verdict.py), not against the other solver;
- **failures inside the window**: solver failures (numerical trouble,
  iteration limit) at times where the target can be met;
- **status disagreements** between the generated solver and the reference.

Times inside an edge closer than the bisection's resolution are not counted
as inside (the edge is only known that well).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from codegen.model.problem import time_of_flight_bracket
from codegen.model.trajectory import UNREACHABLE, SOLVED

#: Offsets from each edge, in s (both sides).
OFFSETS_S = (1e-7, 1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 0.05, 0.1, 0.2, 0.5)
#: Bisection stops when the edge is bracketed this closely (s).
EDGE_RESOLUTION_S = 2e-8
#: Points of the scan that looks for a feasible time before bisecting.
SCAN_POINTS = 60


@dataclass
class EdgeSolve:
    state: int
    edge: str            # "lower" or "upper"
    side: str            # "inside" or "outside"
    offset_s: float
    time_of_flight_s: float
    generated: str
    reference: str
    generated_flyable: bool | None
    reference_flyable: bool | None
    generated_iterations: int


@dataclass
class EdgeSweep:
    states: int = 0
    solves: list = field(default_factory=list)

    def summary(self) -> dict:
        inside = [s for s in self.solves if s.side == "inside"]
        failed = {"generated": sum(s.generated not in SOLVED and s.generated != UNREACHABLE
                                   for s in inside),
                  "reference": sum(s.reference not in SOLVED and s.reference != UNREACHABLE
                                   for s in inside)}
        false_flyable = {
            "generated": sum(s.generated in SOLVED and s.generated_flyable is False
                             for s in self.solves),
            "reference": sum(s.reference in SOLVED and s.reference_flyable is False
                             for s in self.solves)}
        return {
            "states": self.states,
            "solves": len(self.solves),
            "inside": len(inside),
            "false_flyable": false_flyable,
            "failures_inside": failed,
            "status_disagreements": sum(s.generated != s.reference for s in self.solves),
            "generated_iterations_worst": max((s.generated_iterations for s in self.solves),
                                              default=0),
        }



def find_edges(reference, position_m, velocity_mps, mass_kg):
    """[(name, infeasible side, feasible side)] of the target window, or []."""
    lo, hi = time_of_flight_bracket(reference.vehicle, position_m, velocity_mps, mass_kg)
    lo = max(lo, 1e-3 * hi)

    def meets(t):
        return reference.solve_mode("target", position_m, velocity_mps, mass_kg, t).status \
            == "target_met"

    ts = np.linspace(lo, hi, SCAN_POINTS)
    ok = [meets(t) for t in ts]
    idx = [i for i, x in enumerate(ok) if x]
    if not idx:
        return []

    def bisect(bad, good):
        for _ in range(200):
            if abs(good - bad) <= EDGE_RESOLUTION_S:
                break
            mid = 0.5 * (bad + good)
            if meets(mid):
                good = mid
            else:
                bad = mid
        return bad, good

    edges = []
    if idx[0] > 0:
        edges.append(("lower", *bisect(ts[idx[0] - 1], ts[idx[0]])))
    if idx[-1] < len(ts) - 1:
        edges.append(("upper", *bisect(ts[idx[-1] + 1], ts[idx[-1]])))
    return edges


def sweep(generated, reference, states, progress=None) -> EdgeSweep:
    """``states``: [(position, velocity, mass)]; both solvers are asked at
    fixed times of flight, with terminal error allowed (their default)."""
    out = EdgeSweep()
    vehicle = reference.vehicle
    precision = getattr(generated, "manifest", {}).get("precision", "double")
    for k, (pos, vel, mass) in enumerate(states):
        edges = find_edges(reference, pos, vel, mass)
        if not edges:
            continue
        out.states += 1
        for name, bad, good in edges:
            inward = 1.0 if good > bad else -1.0
            for side, base, sign in (("inside", good, inward), ("outside", bad, -inward)):
                for d in OFFSETS_S:
                    t = base + sign * d
                    g = generated.solve(pos, vel, mass, t)
                    r = reference.solve(pos, vel, mass, t)
                    out.solves.append(EdgeSolve(
                        state=k, edge=name, side=side, offset_s=d, time_of_flight_s=t,
                        generated=g.status, reference=r.status,
                        generated_flyable=_flyable(vehicle, g, precision),
                        reference_flyable=_flyable(vehicle, r, "double"),
                        generated_iterations=g.iterations_total))
        if progress is not None:
            progress(k + 1)
    return out


def _flyable(vehicle, traj, precision) -> bool | None:
    """The verdict taken here from the plan's own numbers (None: no plan)."""
    from codegen.verify.check import judge
    v = judge(vehicle, traj, precision)
    return None if v is None else v.flyable
