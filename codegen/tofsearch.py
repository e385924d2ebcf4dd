"""Time-of-flight search: coarse grid, then golden section with a known feasible point.

Fuel is unimodal in the time of flight in practice (Blackmore et al. 2010),
but infeasible times count as infinite cost, and the feasible window can be
narrow; plain golden section can step past it. So:

1. evaluate ``GRID_POINTS`` times evenly spread over the bracket (both ends
   included); if none is feasible, evaluate the midpoints between them, up to
   ``GRID_REFINEMENTS`` times;
2. take the best grid point and its two neighbours as the bracket, and run
   golden section until the bracket is shorter than ``tolerance_s``. When
   both probes are infeasible, the bracket shrinks around the best point
   found so far, never away from it.
3. the answer is the best point evaluated (no re-solve).

A feasible window narrower than (bracket length) / 64 may be missed: the
grid is then at its finest (GRID_POINTS = 9, three refinements). The worst
case (nothing feasible) costs 9 + 8 + 16 + 32 = 65 solves.

The generated C runs the same algorithm, step for step (templates/), so the
two agree on the sequence of times they try. Every loop is bounded.
"""

from __future__ import annotations

import math

GRID_POINTS = 9
GRID_REFINEMENTS = 3
GOLDEN_MAX_STEPS = 40
TOLERANCE_S = 0.05
INV_PHI = (math.sqrt(5.0) - 1.0) / 2.0


def search(evaluate, t_lo: float, t_hi: float, tolerance_s: float = TOLERANCE_S):
    """Minimise ``evaluate(t) -> (cost, payload)`` over [t_lo, t_hi].

    ``cost`` is ``math.inf`` when t is infeasible. Returns
    ``(t_best, cost_best, payload_best, evaluations)``; ``t_best`` is None
    when no feasible time was found, and ``payload_best`` is then the payload
    of the last evaluation.
    """
    best = [None, math.inf, None]
    last = [None]
    count = [0]

    def f(t):
        cost, payload = evaluate(t)
        count[0] += 1
        last[0] = payload
        if cost < best[1]:
            best[:] = [t, cost, payload]
        return cost

    times = [t_lo + (t_hi - t_lo) * i / (GRID_POINTS - 1) for i in range(GRID_POINTS)]
    costs = [f(t) for t in times]
    for _ in range(GRID_REFINEMENTS):
        if best[0] is not None:
            break
        mids = [(times[i] + times[i + 1]) / 2.0 for i in range(len(times) - 1)]
        mid_costs = [f(t) for t in mids]
        merged_t, merged_c = [], []
        for i in range(len(mids)):
            merged_t += [times[i], mids[i]]
            merged_c += [costs[i], mid_costs[i]]
        times = merged_t + [times[-1]]
        costs = merged_c + [costs[-1]]
    if best[0] is None:
        return None, math.inf, last[0], count[0]

    i = min(range(len(times)), key=lambda k: (costs[k], k))
    a = times[max(i - 1, 0)]
    b = times[min(i + 1, len(times) - 1)]
    c = b - INV_PHI * (b - a)
    d = a + INV_PHI * (b - a)
    fc, fd = f(c), f(d)
    for _ in range(GOLDEN_MAX_STEPS):
        if b - a <= tolerance_s:
            break
        if math.isinf(fc) and math.isinf(fd):
            tb = best[0]
            if tb <= c:
                b, d, fd = d, c, fc
                c = b - INV_PHI * (b - a)
                fc = f(c)
            else:
                a, c, fc = c, d, fd
                d = a + INV_PHI * (b - a)
                fd = f(d)
        elif fc < fd:
            b, d, fd = d, c, fc
            c = b - INV_PHI * (b - a)
            fc = f(c)
        else:
            a, c, fc = c, d, fd
            d = a + INV_PHI * (b - a)
            fd = f(d)
    return best[0], best[1], best[2], count[0]
