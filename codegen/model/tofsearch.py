"""Time-of-flight search: two phases of a coarse grid then Brent's minimiser.

Fuel is unimodal in the time of flight in practice (Blackmore et al. 2010),
and the times at which the target can be met form an interval, which can be
narrow. Each evaluation solves the descent problem at one time of flight in
one of two modes (codegen/model/problem.py, MODES):

1. **target**: least fuel with the target met. Over the part of the bracket
   where the target can be met at all (``problem.reach_bracket``, necessary
   conditions of the rocket equation and the speed limit; the caller's
   ``evaluate`` may also call a probe infeasible without a solve,
   ``problem.target_possible``), ``GRID_POINTS`` times evenly spread,
   both ends included. If any is feasible, Brent's minimiser runs from the
   best of them over its two neighbours until the bracket is shorter than
   ``tolerance_s``, and the search ends there.
2. **merit**: when no grid time of phase 1 met the target (or the reach
   bracket is empty), least fuel plus ``MERIT_ERROR_WEIGHT`` times the
   terminal error. It is feasible wherever the rest of the constraints are,
   and its cost falls toward the window where the target can be met, so a
   grid of ``GRID_POINTS`` over the whole bracket and Brent's minimiser find
   that window without refining the grid (the old search refined it three
   times, up to 65 probes for a state that could not land), or, when there
   is no such window, the time of least terminal error.

The caller then solves once more at the time found, at tight tolerances
(``codegen.reference`` and the generated guidance layer): the probes may be
solved at loose tolerances, since only their ranking steers the search.

Brent's minimiser (R. P. Brent, *Algorithms for Minimization without
Derivatives*, Prentice-Hall 1973, ch. 5): golden-section steps, replaced by a
parabola through the three best points when that parabola's minimum falls
well inside the bracket and the step shrinks; it stops when the best point
is within ``tolerance_s / 2`` of both ends of the bracket, so the bracket is
then at most ``tolerance_s`` long. On the demo vehicle it took 20 probes in
all where grid and golden section took 26 (60 dispersed states, N = 20).

Each evaluation ends one of three ways: *solved* (a finite cost), *proven
infeasible*, or *failed* (numerical trouble, iteration limit: nothing is
known about that time). Only the first two carry information about where
the window is. Failures are handled in two steps:

- a failed probe at t is retried once at ``t + shift`` (``t - shift`` when
  that would leave the phase's bracket; no retry when both would), with
  ``shift = RETRY_SHIFT * tolerance_s``; the retry's outcome stands for the
  probe. A failure is often a property of the exact data rather than of the
  time of flight, so a nearby time has a fair chance to solve. At most
  ``RETRY_BUDGET`` retries per search, over both phases;
- a probe that is still failed is *unknown*: it never ranks as the best, and
  Brent's minimiser ranks it (and a proven infeasible one) worse than every
  solved probe, which shrinks the bracket toward the best point found so far,
  never away from it.

Evaluations: each phase takes at most ``GRID_POINTS + BRENT_MAX_STEPS``
probes, and the retries at most ``RETRY_BUDGET``: ``max_evaluations()`` =
2 (9 + 40) + 4 = 102 in all (the old search: 111). Every loop is bounded.

The generated C runs the same algorithm, step for step (templates/guidance.c.j2),
so the two agree on the sequence of times they try, bit for bit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from codegen.errors import InputError

GRID_POINTS = 9
BRENT_MAX_STEPS = 40
TOLERANCE_S = 0.05
#: A failed probe is retried once at a time shifted by this fraction of the tolerance.
RETRY_SHIFT = 0.125
#: Retries per search, at most.
RETRY_BUDGET = 4
#: Brent's golden-section fraction, (3 - sqrt 5) / 2.
GOLDEN_STEP = (3.0 - math.sqrt(5.0)) / 2.0

#: What ``evaluate(t, mode)`` reports.
SOLVED = "solved"
INFEASIBLE = "infeasible"
FAILED = "failed"
OUTCOMES = (SOLVED, INFEASIBLE, FAILED)

#: The two phases, named after the problem mode each probes with.
PHASES = ("target", "merit")


def max_evaluations() -> int:
    """Worst-case number of evaluations of one search."""
    return 2 * (GRID_POINTS + BRENT_MAX_STEPS) + RETRY_BUDGET


@dataclass
class SearchResult:
    """Where a search ended. ``t_best`` is None when no probe solved;
    ``payload_best`` is then the payload of the last evaluation."""

    phase: str
    t_best: float | None
    cost_best: float
    payload_best: object
    evaluations: int


def _check_number(name, value):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(name, value, "must be a finite number")


class _Search:
    """The state one search shares across its phases: the count and the retries."""

    def __init__(self, evaluate, tolerance_s):
        self.evaluate = evaluate
        self.tolerance_s = tolerance_s
        self.count = 0
        self.retries = 0
        self.last = None

    def phase(self, mode, lo, hi):
        best = [None, math.inf, None]

        def f(t):
            """One evaluation: the cost, inf if proven infeasible, nan if failed."""
            outcome, cost, payload = self.evaluate(t, mode)
            self.count += 1
            self.last = payload
            if outcome not in OUTCOMES:
                raise InputError("evaluate(t) outcome", outcome,
                                 f"must be one of {', '.join(OUTCOMES)}")
            if outcome == INFEASIBLE:
                return math.inf
            if outcome == FAILED:
                return math.nan
            if isinstance(cost, bool) or not isinstance(cost, (int, float)) \
                    or not math.isfinite(cost):
                raise InputError("evaluate(t) cost", cost, "must be a finite number when solved")
            if cost < best[1]:
                best[:] = [t, cost, payload]
            return cost

        def probe(t):
            """An evaluation, retried once nearby if it failed (budget allowing);
            ranked: solved -> its cost, anything else -> inf."""
            value = f(t)
            shift = RETRY_SHIFT * self.tolerance_s
            t_retry = t + shift
            if t_retry > hi:
                t_retry = t - shift
            if math.isnan(value) and self.retries < RETRY_BUDGET and t_retry >= lo:
                self.retries += 1
                value = f(t_retry)
            return math.inf if math.isnan(value) else value

        times = [lo + (hi - lo) * i / (GRID_POINTS - 1) for i in range(GRID_POINTS)]
        costs = [probe(t) for t in times]
        if best[0] is None:
            return best
        i = min(range(GRID_POINTS), key=lambda k: (costs[k], k))
        a = times[max(i - 1, 0)]
        b = times[min(i + 1, GRID_POINTS - 1)]
        _brent(probe, a, b, times[i], costs[i], self.tolerance_s)
        return best


def _brent(probe, a, b, x, fx, tolerance_s):
    """Brent's minimiser on [a, b] from the point x (value fx, finite), with
    the absolute tolerance tolerance_s on the final bracket. A non-finite value
    (inf) is worse than every finite one; parabolic steps need three finite
    points. At most BRENT_MAX_STEPS probes."""
    w = v = x
    fw = fv = fx
    d = 0.0
    e = 0.0
    step_min = tolerance_s / 4.0
    for _ in range(BRENT_MAX_STEPS):
        m = 0.5 * (a + b)
        if abs(x - m) <= 2.0 * step_min - 0.5 * (b - a):
            break
        parabolic = False
        if abs(e) > step_min and math.isfinite(fw) and math.isfinite(fv):
            # Minimum of the parabola through (v, fv), (w, fw), (x, fx): x + p / q.
            r = (x - w) * (fx - fv)
            q = (x - v) * (fx - fw)
            p = (x - v) * q - (x - w) * r
            q = 2.0 * (q - r)
            if q > 0.0:
                p = -p
            q = abs(q)
            e_prev = e
            if abs(p) < abs(0.5 * q * e_prev) and p > q * (a - x) and p < q * (b - x):
                e = d
                d = p / q
                if (x + d) - a < 2.0 * step_min or b - (x + d) < 2.0 * step_min:
                    d = step_min if m >= x else -step_min
                parabolic = True
        if not parabolic:
            e = (a - x) if x >= m else (b - x)
            d = GOLDEN_STEP * e
        if abs(d) >= step_min:
            u = x + d
        else:
            u = x + (step_min if d > 0.0 else -step_min)
        fu = probe(u)
        if fu <= fx:
            if u >= x:
                a = x
            else:
                b = x
            v, fv = w, fw
            w, fw = x, fx
            x, fx = u, fu
        else:
            if u < x:
                a = u
            else:
                b = u
            if fu <= fw or w == x:
                v, fv = w, fw
                w, fw = u, fu
            elif fu <= fv or v == x or v == w:
                v, fv = u, fu


def search(evaluate, t_lo: float, t_hi: float, tolerance_s: float = TOLERANCE_S,
           reach=None) -> SearchResult:
    """Minimise over [t_lo, t_hi] with ``evaluate(t, mode) -> (outcome, cost, payload)``.

    ``mode`` is "target" or "merit" (PHASES); ``outcome`` is ``SOLVED``
    (``cost`` a finite number), ``INFEASIBLE`` (proven infeasible) or
    ``FAILED`` (solver failure: unknown); ``cost`` is ignored unless solved.
    ``reach`` is the (lo, hi) part of the bracket where the target can be met
    (``problem.reach_bracket``), or None when there is none.
    """
    for name, value in (("t_lo", t_lo), ("t_hi", t_hi), ("tolerance_s", tolerance_s)):
        _check_number(name, value)
    if not tolerance_s > 0.0:
        raise InputError("tolerance_s", tolerance_s, "must be > 0")
    if not t_lo <= t_hi:
        raise InputError("t_lo", t_lo, f"must be <= t_hi = {t_hi!r}")
    s = _Search(evaluate, tolerance_s)
    if reach is not None:
        lo, hi = reach
        _check_number("reach[0]", lo)
        _check_number("reach[1]", hi)
        if not t_lo <= lo <= hi <= t_hi:
            raise InputError("reach", reach, f"must lie inside [t_lo, t_hi] = [{t_lo!r}, {t_hi!r}]")
        best = s.phase("target", lo, hi)
        if best[0] is not None:
            return SearchResult("target", best[0], best[1], best[2], s.count)
    best = s.phase("merit", t_lo, t_hi)
    if best[0] is not None:
        return SearchResult("merit", best[0], best[1], best[2], s.count)
    return SearchResult("merit", None, math.inf, s.last, s.count)
