"""The time-of-flight search (codegen/model/tofsearch.py) and its C mirror.

Synthetic costs stand in for the solver: a window of feasible times (an
interval, as for the descent problem), a unimodal cost inside it, and solver
failures placed where a test wants them. The C search runs the generated
guidance layer (src/pdg_guidance.c) against a stub backend that answers with
the same synthetic rules, so C and Python must try the same times.
"""

import importlib.util
import math
import re
import subprocess

import numpy as np
import pytest

from codegen.model import tofsearch
from codegen.bind import cdef_text
from codegen.emit import generate
from codegen.errors import InputError
from codegen.model.problem import Scaling, time_of_flight_bracket
from codegen.reference import ReferenceSolver
from codegen.model.trajectory import INFEASIBLE, ITERATION_LIMIT, NUMERICAL_TROUBLE, Trajectory
from conftest import DEMO_STATE, DEMO_VEHICLE

TOL = tofsearch.TOLERANCE_S
SHIFT = tofsearch.RETRY_SHIFT * TOL
#: The finest grid: 9 + 8 + 16 + 32 probes.
GRID_PROBES = tofsearch.GRID_POINTS + sum((tofsearch.GRID_POINTS - 1) * 2 ** r
                                          for r in range(tofsearch.GRID_REFINEMENTS))


class Synthetic:
    """evaluate(t) for tofsearch.search, with a log of the times tried.

    Feasible on [win_lo, win_hi] with cost (t - t_opt)^2 + 100; fails
    (reports FAILED) at the call numbers in ``fail_calls`` and everywhere in
    the closed bands ``fail_bands``; ``fail_as`` turns those failures into
    another outcome (INFEASIBLE: how the old search counted them).
    """

    def __init__(self, win=(-math.inf, math.inf), t_opt=0.0, fail_calls=(), fail_bands=(),
                 fail_as=tofsearch.FAILED):
        self.win, self.t_opt = win, t_opt
        self.fail_calls, self.fail_bands, self.fail_as = set(fail_calls), fail_bands, fail_as
        self.log = []

    def cost(self, t):
        return (t - self.t_opt) ** 2 + 100.0

    def __call__(self, t):
        k = len(self.log)
        self.log.append(t)
        if k in self.fail_calls or any(lo <= t <= hi for lo, hi in self.fail_bands):
            return self.fail_as, math.nan, ("failed", t)
        if not self.win[0] <= t <= self.win[1]:
            return tofsearch.INFEASIBLE, math.inf, ("infeasible", t)
        return tofsearch.SOLVED, self.cost(t), ("solved", t)


def grid(t_lo, t_hi):
    return [t_lo + (t_hi - t_lo) * i / (tofsearch.GRID_POINTS - 1)
            for i in range(tofsearch.GRID_POINTS)]


# -- Python search -----------------------------------------------------------

def test_search_finds_a_narrow_feasible_window():
    # The grid-then-golden search must not step past a narrow feasible window
    # (common practice: golden section alone assumes unimodality everywhere).
    ev = Synthetic(win=(40.0, 42.0), t_opt=41.3)
    t, cost, payload, count = tofsearch.search(ev, 0.0, 100.0)
    assert t is not None and abs(t - 41.3) < TOL and count == len(ev.log)
    assert payload == ("solved", t) and cost == ev.cost(t)


def test_search_reports_nothing_feasible():
    ev = Synthetic(win=(5.0, 6.0))
    t, cost, payload, count = tofsearch.search(ev, 1.0, 2.0)
    assert t is None and math.isinf(cost) and payload == ("infeasible", ev.log[-1])
    # Proven infeasible probes are never retried: the grid alone, refined to the end.
    assert count == GRID_PROBES == 65


@pytest.mark.parametrize("where", ["grid point", "first golden probe"])
def test_one_failed_probe_in_the_window_does_not_send_the_search_away(where):
    # Window [30, 100] of [1, 101], optimum at 31: least fuel near the short
    # end of the window, as is usual for a descent. One solve fails: the grid
    # point next to the optimum (38.5), or the first golden-section probe.
    t_lo, t_hi, t_opt = 1.0, 101.0, 31.0
    call = 3 if where == "grid point" else tofsearch.GRID_POINTS
    ev = Synthetic(win=(30.0, 100.0), t_opt=t_opt, fail_calls={call})
    t, cost, _, count = tofsearch.search(ev, t_lo, t_hi)
    assert abs(t - t_opt) <= TOL
    # The failed probe was retried once, a small shift later, and solved.
    assert ev.log[call + 1] == ev.log[call] + SHIFT
    assert count == len(ev.log)
    # The same probe counted as infeasible (what the search did with every
    # failure before) sends golden section into the wrong bracket.
    old = Synthetic(win=(30.0, 100.0), t_opt=t_opt, fail_calls={call},
                    fail_as=tofsearch.INFEASIBLE)
    t_old, cost_old, _, _ = tofsearch.search(old, t_lo, t_hi)
    assert t_old - t_opt > 4.0 and cost_old - cost > 16.0


def test_a_failure_band_beside_the_optimum_does_not_push_the_search_off_it():
    # Solves fail on [28, 29.5] (the retry too): those probes stay unknown,
    # and the bracket keeps the best point. Counted as infeasible, the band
    # would close the window on the optimum's left and end the search at 28.5.
    t_opt = 31.0
    ev = Synthetic(win=(1.0, 101.0), t_opt=t_opt, fail_bands=[(28.0, 29.5)])
    t, cost, _, _ = tofsearch.search(ev, 1.0, 101.0)
    assert abs(t - t_opt) <= TOL
    assert any(28.0 <= x <= 29.5 for x in ev.log)   # the band was hit
    old = Synthetic(win=(1.0, 101.0), t_opt=t_opt, fail_bands=[(28.0, 29.5)],
                    fail_as=tofsearch.INFEASIBLE)
    t_old, _, _, _ = tofsearch.search(old, 1.0, 101.0)
    assert t_opt - t_old > 2.0


def _golden_start(t_lo, t_hi, best_index):
    g = grid(t_lo, t_hi)
    a, b = g[best_index - 1], g[best_index + 1]
    return a, b, b - tofsearch.INV_PHI * (b - a), a + tofsearch.INV_PHI * (b - a)


def test_a_proven_infeasible_probe_still_steers_golden_section():
    # Window [10, 40], optimum 38: grid best 38.5, bracket [26, 51], probes
    # c = 35.5 (feasible) and d = 41.5 (infeasible). By the interval property
    # the window lies left of d: the next probe is a new c left of the old one.
    n = tofsearch.GRID_POINTS
    a, b, c, d = _golden_start(1.0, 101.0, 3)
    ev = Synthetic(win=(10.0, 40.0), t_opt=38.0)
    t, _, _, _ = tofsearch.search(ev, 1.0, 101.0)
    assert ev.log[n:n + 2] == [c, d]
    assert ev.log[n + 2] == d - tofsearch.INV_PHI * (d - a) < c   # no retry, bracket [a, d]
    assert abs(t - 38.0) <= TOL
    # The same d failed twice is unknown: c separates and the best point so
    # far (38.5 > c) decides, so the bracket becomes [c, b]; the search still
    # ends at the optimum.
    ev = Synthetic(win=(10.0, 40.0), t_opt=38.0, fail_bands=[(d - 0.01, d + 0.01)])
    t, _, _, _ = tofsearch.search(ev, 1.0, 101.0)
    assert ev.log[n:n + 3] == [c, d, d + SHIFT]
    assert ev.log[n + 3] == c + tofsearch.INV_PHI * (b - c) > d
    assert abs(t - 38.0) <= TOL


def test_an_unknown_first_probe_is_judged_through_the_best_point():
    # Feasible everywhere, optimum 38; c = 35.5 fails twice. The best point
    # so far (grid point 38.5) lies left of d = 41.5 and costs less than d:
    # for a unimodal cost the minimum is left of d, so keep [a, d]. Counting
    # c as infeasible keeps [c, b] instead.
    n = tofsearch.GRID_POINTS
    a, b, c, d = _golden_start(1.0, 101.0, 3)
    ev = Synthetic(win=(1.0, 101.0), t_opt=38.0, fail_bands=[(c - 0.01, c + 0.01)])
    t, _, _, _ = tofsearch.search(ev, 1.0, 101.0)
    assert ev.log[n:n + 3] == [c, c + SHIFT, d]
    assert ev.log[n + 3] == d - tofsearch.INV_PHI * (d - a)   # new c: bracket [a, d]
    assert abs(t - 38.0) <= TOL


def test_a_failure_at_the_top_of_the_bracket_is_retried_below_it():
    ev = Synthetic(win=(1.0, 101.0), t_opt=90.0, fail_calls={tofsearch.GRID_POINTS - 1})
    t, _, _, _ = tofsearch.search(ev, 1.0, 101.0)
    k = tofsearch.GRID_POINTS - 1
    assert ev.log[k] == 101.0 and ev.log[k + 1] == 101.0 - SHIFT
    assert abs(t - 90.0) <= TOL


def test_evaluation_count_stays_within_the_documented_bound():
    doc = tofsearch.__doc__
    bound = tofsearch.max_evaluations()
    assert bound == GRID_PROBES + 2 + tofsearch.GOLDEN_MAX_STEPS + tofsearch.RETRY_BUDGET
    assert f"= {bound} in all" in doc
    assert f"= {GRID_PROBES + tofsearch.RETRY_BUDGET} when nothing is feasible" in doc
    # Everything fails: the budget of retries, then the grid to its finest.
    ev = Synthetic(fail_bands=[(-math.inf, math.inf)])
    t, _, payload, count = tofsearch.search(ev, 1.0, 101.0)
    assert t is None and payload[0] == "failed"
    assert count == GRID_PROBES + tofsearch.RETRY_BUDGET
    # The worst case is reached: the window shows only on the finest grid
    # (one point, 2.5625 s), the budget is spent on the first four probes, and
    # a tolerance far below golden section's reach runs all its steps.
    ev = Synthetic(win=(2.3, 2.8), t_opt=2.6, fail_calls=range(2 * tofsearch.RETRY_BUDGET))
    t, _, _, count = tofsearch.search(ev, 1.0, 101.0, tolerance_s=1e-12)
    assert t is not None and abs(t - 2.6) < 1e-6
    assert count == bound
    # Random windows, optima and failures (seeded): never above the bound.
    rng = np.random.default_rng(20261202)
    for _ in range(300):
        lo = rng.uniform(0.0, 120.0)
        win = (lo, lo + rng.uniform(0.0, 30.0))
        fails = set(np.flatnonzero(rng.random(bound) < rng.uniform(0.0, 0.5)).tolist())
        bands = [(x, x + rng.uniform(0.0, 3.0)) for x in rng.uniform(0.0, 100.0, 2)]
        ev = Synthetic(win=win, t_opt=rng.uniform(*win), fail_calls=fails, fail_bands=bands)
        t, _, _, count = tofsearch.search(ev, 1.0, 101.0, tolerance_s=float(rng.choice([1e-3, TOL])))
        assert count == len(ev.log) <= (bound if t is not None else GRID_PROBES
                                        + tofsearch.RETRY_BUDGET)


def test_bad_arguments_name_the_field():
    with pytest.raises(InputError, match=r"evaluate\(t\) outcome = 'ok'"):
        tofsearch.search(lambda t: ("ok", 1.0, None), 1.0, 2.0)
    with pytest.raises(InputError, match=r"evaluate\(t\) cost = inf: must be a finite"):
        tofsearch.search(lambda t: (tofsearch.SOLVED, math.inf, None), 1.0, 2.0)
    with pytest.raises(InputError, match=r"t_lo = nan: must be a finite number"):
        tofsearch.search(Synthetic(), math.nan, 2.0)
    with pytest.raises(InputError, match=r"tolerance_s = 0.0: must be > 0"):
        tofsearch.search(Synthetic(), 1.0, 2.0, tolerance_s=0.0)


@pytest.mark.parametrize("status,retried", [(NUMERICAL_TROUBLE, True), (ITERATION_LIMIT, True),
                                            (INFEASIBLE, False)])
def test_reference_retries_a_failed_solve_but_not_an_infeasible_one(demo_vehicle, monkeypatch,
                                                                   status, retried):
    # The reference says "failed" for numerical trouble and the iteration
    # limit, "infeasible" only for a proven infeasible status.
    rs = ReferenceSolver(demo_vehicle, 10)
    calls = []

    def fake(kind, position_m, velocity_mps, mass_kg, tof, target_m=(0, 0, 0), miss_max_m=0.0):
        calls.append(tof)
        return Trajectory(status=status if len(calls) == 1 else INFEASIBLE, solver="fake",
                          horizon=10, time_of_flight_s=tof)

    monkeypatch.setattr(rs, "solve_fixed", fake)
    tr = rs.solve(*DEMO_STATE, fallback=False)
    assert tr.status == INFEASIBLE
    lo, hi = time_of_flight_bracket(demo_vehicle, *DEMO_STATE)
    g = grid(max(lo, 1e-3 * hi), hi)
    assert calls[0] == g[0]
    assert calls[1] == (g[0] + SHIFT if retried else g[1])
    assert len(calls) == GRID_PROBES + (1 if retried else 0)


# -- the C mirror --------------------------------------------------------------

N_C = 4
#: Strict flags of the generated guidance layer (DEVELOPERS.md, Rules).
STRICT = ["-std=c99", "-Wall", "-Wextra", "-Wpedantic", "-Wshadow", "-Werror"]

STUB_C = r"""
#include "pdg_guidance.h"
#include <math.h>

/* Stub backend: the synthetic rules of Synthetic, in scaled dt. */
#define STUB_LOG 256
static double stub_win_lo, stub_win_hi, stub_opt, stub_band_lo, stub_band_hi;
static int stub_fail_call = -1, stub_fail_status = 3, stub_dt_index, stub_calls;
static double stub_log[STUB_LOG];

void stub_config(double win_lo, double win_hi, double opt, double band_lo, double band_hi,
                 int fail_call, int fail_status, int dt_index)
{
    stub_win_lo = win_lo; stub_win_hi = win_hi; stub_opt = opt;
    stub_band_lo = band_lo; stub_band_hi = band_hi;
    stub_fail_call = fail_call; stub_fail_status = fail_status;
    stub_dt_index = dt_index; stub_calls = 0;
}

int stub_calls_made(void) { return stub_calls; }
double stub_dt(int i) { return stub_log[i]; }

int pdg_backend_solve(pdg_backend_work *bw, const double *params, int iteration_cap,
                      double *objective, int *iterations)
{
    const double dt = params[stub_dt_index];
    const int k = stub_calls;
    (void)bw;
    (void)iteration_cap;
    if (k < STUB_LOG) {
        stub_log[k] = dt;
    }
    stub_calls += 1;
    *iterations = 1;
    *objective = 0.0;
    if (k == stub_fail_call || (dt >= stub_band_lo && dt <= stub_band_hi)) {
        return stub_fail_status;
    }
    if (dt < stub_win_lo || dt > stub_win_hi) {
        return 1;
    }
    *objective = (dt - stub_opt) * (dt - stub_opt) + 1.0;
    return 0;
}

void pdg_backend_solution(const pdg_backend_work *bw, double *r, double *v, double *z,
                          double *u, double *sigma)
{
    int i;
    (void)bw;
    for (i = 0; i < 3 * (PDG_HORIZON + 1); i++) { r[i] = 0.0; v[i] = 0.0; }
    for (i = 0; i < PDG_HORIZON + 1; i++) { z[i] = 0.0; }
    for (i = 0; i < 3 * PDG_HORIZON; i++) { u[i] = 0.0; }
    for (i = 0; i < PDG_HORIZON; i++) { sigma[i] = 0.0; }
}
"""

STUB_CDEF = """
void stub_config(double win_lo, double win_hi, double opt, double band_lo, double band_hi,
                 int fail_call, int fail_status, int dt_index);
int stub_calls_made(void);
double stub_dt(int i);
"""


@pytest.fixture(scope="module")
def c_search(tmp_path_factory, demo_vehicle):
    """The generated guidance layer linked to the stub backend (cffi API mode)."""
    import cffi

    # The cvxpygen-ecos tree: its backend header includes no solver header,
    # so the guidance layer builds alone against the stub.
    tree = tmp_path_factory.mktemp("tofs") / "tree"
    generate(DEMO_VEHICLE, N_C, tree, backend="cvxpygen-ecos")
    guidance = tree / "src" / "pdg_guidance.c"
    r = subprocess.run(["gcc", *STRICT, "-fsyntax-only", "-I", str(tree / "include"),
                        str(guidance)], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    dt_index = int(re.search(r"^#define P_DT (\d+)$", guidance.read_text(), re.M).group(1))
    ffi = cffi.FFI()
    ffi.cdef(cdef_text("pdg", N_C) + STUB_CDEF)
    name = "_pdgc_tofsearch_stub"
    ffi.set_source(name, STUB_C, sources=[str(guidance)], include_dirs=[str(tree / "include")],
                   extra_compile_args=["-O2"], libraries=["m"])
    build = tmp_path_factory.mktemp("tofs_build")
    so = ffi.compile(tmpdir=str(build), verbose=False)
    spec = importlib.util.spec_from_file_location(name, so)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod, dt_index, Scaling.for_vehicle(demo_vehicle).time_s


#: (name, window, optimum, failing call, failing status, call whose time is
#: the centre of a failure band of +-0.01 s (wider than the retry's shift);
#: times in s. The search bracket of the state below is [1.6, 246.1] s, its
#: grid spacing 30.6 s; the optimum sits near the window's short end.
C_CASES = [
    ("no failure", (40.0, 200.0), 45.0, -1, 3, -1),
    ("one failed grid point", (40.0, 200.0), 45.0, 2, 3, -1),
    ("one failed golden probe", (40.0, 200.0), 45.0, tofsearch.GRID_POINTS, 3, -1),
    ("one iteration limit", (40.0, 200.0), 45.0, tofsearch.GRID_POINTS + 1, 2, -1),
    ("failure band at a golden probe", (40.0, 200.0), 45.0, -1, 3, tofsearch.GRID_POINTS + 3),
    ("failure band at the first golden probe", (40.0, 200.0), 45.0, -1, 3,
     tofsearch.GRID_POINTS),
    ("failure at the top of the bracket", (40.0, 1e3), 45.0, tofsearch.GRID_POINTS - 1, 3, -1),
    ("narrow window, infeasible probes", (100.0, 103.0), 101.3, -1, 3, -1),
    ("narrow window and a failure", (100.0, 103.0), 101.3, 3, 3, -1),
    ("nothing feasible", (500.0, 600.0), 550.0, -1, 3, -1),
    ("everything fails", (40.0, 200.0), 45.0, -1, 3, "all"),
]


@pytest.mark.parametrize("case", C_CASES, ids=[c[0] for c in C_CASES])
def test_c_search_tries_the_same_times_as_python(c_search, demo_vehicle, case):
    mod, dt_index, time_unit = c_search
    ffi, lib = mod.ffi, mod.lib
    _, win, t_opt, fail_call, fail_status, band_call = case
    pos, vel, mass = [1500.0, 0.0, 1500.0], [-30.0, 0.0, -40.0], 1900.0   # |v| = 50 exactly
    lo, hi = time_of_flight_bracket(demo_vehicle, pos, vel, mass)
    t_lo = max(lo, 1e-3 * hi)

    def dt(t):   # as compute_params: tf = t / TIME_UNIT_S, dt = tf / N
        return (t / time_unit) / N_C

    def python_search(band_dt):
        times, dts = [], []

        def evaluate(t):
            x = dt(t)
            k = len(dts)
            times.append(t)
            dts.append(x)
            if k == fail_call or band_dt[0] <= x <= band_dt[1]:
                return tofsearch.FAILED, math.nan, None
            if not dt(win[0]) <= x <= dt(win[1]):
                return tofsearch.INFEASIBLE, math.inf, None
            return tofsearch.SOLVED, (x - dt(t_opt)) * (x - dt(t_opt)) + 1.0, None

        return tofsearch.search(evaluate, t_lo, hi), times, dts

    band_dt = (math.inf, -math.inf)
    if band_call == "all":
        band_dt = (-math.inf, math.inf)
    elif band_call >= 0:
        # The time of that call in the search without the band.
        t_band = python_search(band_dt)[1][band_call]
        band_dt = (dt(t_band - 0.01), dt(t_band + 0.01))
    (t_py, cost_py, _, count), py_times, py_dts = python_search(band_dt)
    if band_call != -1:
        assert sum(band_dt[0] <= x <= band_dt[1] for x in py_dts) >= 2   # probe and retry
    if fail_call >= 0:   # retried a shift later, or earlier at the top of the bracket
        assert abs(py_times[fail_call + 1] - py_times[fail_call]) == pytest.approx(SHIFT)

    lib.stub_config(dt(win[0]), dt(win[1]), dt(t_opt), band_dt[0], band_dt[1], fail_call,
                    fail_status, dt_index)
    work, plan = ffi.new("pdg_workspace *"), ffi.new("pdg_plan *")
    inp = ffi.new("pdg_input *", {"position_m": pos, "velocity_mps": vel, "mass_kg": mass,
                                  "time_of_flight_s": 0.0, "target_m": [0.0, 0.0, 0.0]})
    status = lib.pdg_plan_descent(work, inp, ffi.NULL, plan)
    c_dts = [lib.stub_dt(i) for i in range(lib.stub_calls_made())]
    assert c_dts == py_dts   # bit for bit: the same times in the same order
    assert plan.solves == count == len(py_dts)
    if t_py is None:
        assert status == (fail_status if band_call == "all" else lib.PDG_INFEASIBLE)
        assert count <= GRID_PROBES + tofsearch.RETRY_BUDGET
    else:
        assert status == lib.PDG_OPTIMAL
        assert plan.time_of_flight_s == t_py and plan.objective == cost_py
        assert abs(t_py - t_opt) <= TOL
