"""Time-of-flight search: coarse grid, then golden section with a known feasible point.

Fuel is unimodal in the time of flight in practice (Blackmore et al. 2010),
and the feasible times form an interval, but the window can be narrow: plain
golden section can step past it. So:

1. evaluate ``GRID_POINTS`` times evenly spread over the bracket (both ends
   included); if none is feasible, evaluate the midpoints between them, up to
   ``GRID_REFINEMENTS`` times;
2. take the best grid point and its two neighbours as the bracket, and run
   golden section until the bracket is shorter than ``tolerance_s``;
3. the answer is the best point evaluated (no re-solve).

Each evaluation ends one of three ways: *solved* (a finite cost), *proven
infeasible*, or *failed* (numerical trouble, iteration limit: nothing is
known about that time). Only the first two carry information about where
the window is; counting a failure as infeasible sends golden section into
the wrong bracket. Failures are handled in two steps:

- a failed probe at t is retried once at ``t + shift`` (``t - shift`` when
  that would leave the bracket; no retry when both would), with
  ``shift = RETRY_SHIFT * tolerance_s``, well inside the tolerance; the
  retry's outcome stands for the probe. A failure is often a property of
  the exact data rather than of the time of flight (a one-ulp change of the
  data made a feasible N = 50 instance fail, see DEVELOPERS.md), so a nearby
  time has a fair chance to solve. At most ``RETRY_BUDGET`` retries
  per search: a backend without infeasibility certificates reports every
  infeasible time as a failure, and the budget keeps the worst case close to
  that of a search without retries;
- a probe that is still failed is *unknown*. It never ranks as a grid's best
  point. A golden-section step compares its two probes c < d as before when
  both are known (solved or proven infeasible) and not both infeasible: a
  proven-infeasible probe beside a feasible one tells which side the window
  is on. Otherwise the bracket shrinks toward the best point found so far,
  never away from it: with one unknown probe the known one separates and the
  best point decides (keep [a, d] if best < d when c is unknown, if
  best <= c when d is unknown; this is golden section's own comparison with
  the unknown value replaced by the best one, so it is right for a unimodal
  cost and, when the known probe is infeasible, for an interval of feasible
  times); with two unknown or two infeasible probes, keep [a, d] if
  best <= c.

A feasible window narrower than (bracket length) / 64 may be missed: the
grid is then at its finest (GRID_POINTS = 9, three refinements). Evaluations:
the grid takes at most 9 + 8 + 16 + 32 = 65 probes, golden section 2 + 40,
and each probe one evaluation plus the shared budget of 4 retries: at most
65 + 4 = 69 when nothing is feasible and 65 + 42 + 4 = 111 in all
(``max_evaluations()``).

The generated C runs the same algorithm, step for step (templates/guidance.c.j2,
search_tof and probe), so the two agree on the sequence of times they try.
Every loop is bounded.
"""

from __future__ import annotations

import math

from codegen.errors import InputError

GRID_POINTS = 9
GRID_REFINEMENTS = 3
GOLDEN_MAX_STEPS = 40
TOLERANCE_S = 0.05
INV_PHI = (math.sqrt(5.0) - 1.0) / 2.0
#: A failed probe is retried once at a time shifted by this fraction of the tolerance.
RETRY_SHIFT = 0.125
#: Retries per search, at most.
RETRY_BUDGET = 4

#: What ``evaluate(t)`` reports.
SOLVED = "solved"
INFEASIBLE = "infeasible"
FAILED = "failed"
OUTCOMES = (SOLVED, INFEASIBLE, FAILED)


def grid_max() -> int:
    """Points of the finest grid."""
    return (GRID_POINTS - 1) * 2 ** GRID_REFINEMENTS + 1


def max_evaluations() -> int:
    """Worst-case number of evaluations of one search."""
    # every point of the finest grid is evaluated once at most
    return grid_max() + 2 + GOLDEN_MAX_STEPS + RETRY_BUDGET


def search(evaluate, t_lo: float, t_hi: float, tolerance_s: float = TOLERANCE_S):
    """Minimise over [t_lo, t_hi] with ``evaluate(t) -> (outcome, cost, payload)``.

    ``outcome`` is ``SOLVED`` (``cost`` a finite number), ``INFEASIBLE``
    (proven infeasible) or ``FAILED`` (solver failure: unknown); ``cost`` is
    ignored unless solved. Returns ``(t_best, cost_best, payload_best,
    evaluations)``; ``t_best`` is None when no feasible time was found, and
    ``payload_best`` is then the payload of the last evaluation.
    """
    for name, value in (("t_lo", t_lo), ("t_hi", t_hi), ("tolerance_s", tolerance_s)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value):
            raise InputError(name, value, "must be a finite number")
    if not tolerance_s > 0.0:
        raise InputError("tolerance_s", tolerance_s, "must be > 0")

    best = [None, math.inf, None]
    last = [None]
    count = [0]
    retries = [0]

    def f(t):
        """One evaluation: the cost, math.inf if proven infeasible, math.nan if failed."""
        outcome, cost, payload = evaluate(t)
        count[0] += 1
        last[0] = payload
        if outcome not in OUTCOMES:
            raise InputError("evaluate(t) outcome", outcome, f"must be one of {', '.join(OUTCOMES)}")
        if outcome == INFEASIBLE:
            return math.inf
        if outcome == FAILED:
            return math.nan
        if isinstance(cost, bool) or not isinstance(cost, (int, float)) or not math.isfinite(cost):
            raise InputError("evaluate(t) cost", cost, "must be a finite number when solved")
        if cost < best[1]:
            best[:] = [t, cost, payload]
        return cost

    def probe(t):
        """One probe: an evaluation, retried once nearby if it failed (budget allowing)."""
        value = f(t)
        shift = RETRY_SHIFT * tolerance_s
        t_retry = t + shift
        if t_retry > t_hi:
            t_retry = t - shift
        if math.isnan(value) and retries[0] < RETRY_BUDGET and t_retry >= t_lo:
            retries[0] += 1
            value = f(t_retry)
        return value

    def rank(value):
        """Grid ranking: an unknown probe is never the best."""
        return math.inf if math.isnan(value) else value

    times = [t_lo + (t_hi - t_lo) * i / (GRID_POINTS - 1) for i in range(GRID_POINTS)]
    costs = [rank(probe(t)) for t in times]
    for _ in range(GRID_REFINEMENTS):
        if best[0] is not None:
            break
        mids = [(times[i] + times[i + 1]) / 2.0 for i in range(len(times) - 1)]
        mid_costs = [rank(probe(t)) for t in mids]
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
    fc, fd = probe(c), probe(d)
    for _ in range(GOLDEN_MAX_STEPS):
        if b - a <= tolerance_s:
            break
        if math.isnan(fc) and not math.isnan(fd):
            # c unknown: d separates, the best point so far decides.
            keep_left = best[0] < d
        elif math.isnan(fd) or (math.isinf(fc) and math.isinf(fd)):
            # d unknown (c known or not), or both infeasible: c separates.
            keep_left = best[0] <= c
        else:
            keep_left = fc < fd
        if keep_left:
            b, d, fd = d, c, fc
            c = b - INV_PHI * (b - a)
            fc = probe(c)
        else:
            a, c, fc = c, d, fd
            d = a + INV_PHI * (b - a)
            fd = probe(d)
    return best[0], best[1], best[2], count[0]
