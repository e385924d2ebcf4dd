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
from codegen.model.problem import (Scaling, reach_bracket, target_possible,
                                   time_of_flight_bracket)
from codegen.reference import ReferenceSolver
from codegen.model.trajectory import UNREACHABLE, ITERATIONS_EXHAUSTED, SOLVER_BREAKDOWN, Trajectory
from conftest import DEMO_STATE, DEMO_VEHICLE

TOL = tofsearch.TOLERANCE_S
SHIFT = tofsearch.RETRY_SHIFT * TOL
GRID = tofsearch.GRID_POINTS
#: Weight of the distance to the window in the synthetic merit.
MERIT_WEIGHT = 50.0


class Synthetic:
    """evaluate(t, mode) for tofsearch.search, with a log of (t, mode).

    Target mode: feasible on [win_lo, win_hi] with cost (t - t_opt)^2 + 100.
    Merit mode: that cost plus MERIT_WEIGHT times the distance from the
    window (the terminal error grows away from it), feasible on
    [merit_lo, merit_hi]. Fails (reports FAILED) at the call numbers in
    ``fail_calls`` and everywhere in the closed bands ``fail_bands``;
    ``fail_as`` turns those failures into another outcome (INFEASIBLE: how
    the old search counted them).
    """

    def __init__(self, win=(-math.inf, math.inf), t_opt=0.0, fail_calls=(), fail_bands=(),
                 fail_as=tofsearch.FAILED, merit_win=(-math.inf, math.inf)):
        self.win, self.t_opt, self.merit_win = win, t_opt, merit_win
        self.fail_calls, self.fail_bands, self.fail_as = set(fail_calls), fail_bands, fail_as
        self.log = []

    def cost(self, t):
        return (t - self.t_opt) ** 2 + 100.0

    def merit(self, t):
        dist = max(self.win[0] - t, 0.0, t - self.win[1])
        return self.cost(t) + MERIT_WEIGHT * dist

    def __call__(self, t, mode):
        k = len(self.log)
        self.log.append((t, mode))
        if k in self.fail_calls or any(lo <= t <= hi for lo, hi in self.fail_bands):
            return self.fail_as, math.nan, ("failed", t)
        if mode == "target":
            if not self.win[0] <= t <= self.win[1]:
                return tofsearch.INFEASIBLE, math.inf, ("unreachable", t)
            return tofsearch.SOLVED, self.cost(t), ("solved", t)
        if not self.merit_win[0] <= t <= self.merit_win[1]:
            return tofsearch.INFEASIBLE, math.inf, ("unreachable", t)
        return tofsearch.SOLVED, self.merit(t), ("merit", t)

    def times(self, mode=None):
        return [t for t, m in self.log if mode is None or m == mode]


def grid(t_lo, t_hi):
    return [t_lo + (t_hi - t_lo) * i / (GRID - 1) for i in range(GRID)]


# -- Python search -----------------------------------------------------------

def test_the_target_phase_ends_the_search_when_a_grid_point_meets_the_target():
    ev = Synthetic(win=(30.0, 100.0), t_opt=41.3)
    res = tofsearch.search(ev, 1.0, 101.0, reach=(1.0, 101.0))
    assert res.phase == "target" and abs(res.t_best - 41.3) <= TOL
    assert res.payload_best == ("solved", res.t_best) and res.cost_best == ev.cost(res.t_best)
    assert ev.times()[:GRID] == grid(1.0, 101.0)
    assert {m for _, m in ev.log} == {"target"} and res.evaluations == len(ev.log)


def test_brent_needs_fewer_probes_than_golden_section_on_a_smooth_cost():
    # Golden section from a bracket of two grid spacings (25 s) to 0.05 s
    # takes ceil(ln(25 / 0.05) / ln(1.618)) + 1 = 14 probes; Brent's parabolic
    # steps on a quadratic (R. P. Brent 1973, ch. 5) take far fewer.
    ev = Synthetic(win=(1.0, 101.0), t_opt=41.3)
    res = tofsearch.search(ev, 1.0, 101.0, reach=(1.0, 101.0))
    assert res.evaluations - GRID <= 8
    assert abs(res.t_best - 41.3) <= TOL


def test_a_narrow_window_missed_by_the_grid_is_found_by_the_merit_phase():
    # Window [40, 42] between grid points (spacing 12.5 s): the target phase
    # finds nothing; the merit falls toward the window, so the merit phase's
    # grid and Brent's minimiser find it without refining the grid.
    ev = Synthetic(win=(40.0, 42.0), t_opt=41.3)
    res = tofsearch.search(ev, 1.0, 101.0, reach=(1.0, 101.0))
    assert res.phase == "merit" and abs(res.t_best - 41.3) <= TOL
    assert ev.times("target") == grid(1.0, 101.0)
    assert ev.times("merit")[:GRID] == grid(1.0, 101.0)
    assert res.evaluations <= 2 * GRID + tofsearch.BRENT_MAX_STEPS


def test_without_a_reach_bracket_the_merit_phase_runs_alone():
    ev = Synthetic(win=(200.0, 300.0), t_opt=250.0)   # out of reach in [1, 101]
    res = tofsearch.search(ev, 1.0, 101.0, reach=None)
    assert res.phase == "merit" and {m for _, m in ev.log} == {"merit"}
    # The least terminal error is at the top of the bracket.
    assert res.t_best >= 101.0 - TOL


def test_the_search_reports_nothing_feasible():
    ev = Synthetic(win=(5.0, 6.0), merit_win=(500.0, 600.0))
    res = tofsearch.search(ev, 1.0, 2.0, reach=(1.0, 2.0))
    assert res.t_best is None and math.isinf(res.cost_best)
    assert res.payload_best == ("unreachable", ev.log[-1][0])
    # Proven infeasible probes are never retried: two grids and nothing else.
    assert res.evaluations == 2 * GRID


@pytest.mark.parametrize("where", ["grid point", "first Brent probe"])
def test_one_failed_probe_in_the_window_does_not_send_the_search_away(where):
    # Window [30, 100] of [1, 101], optimum at 31: least fuel near the short
    # end of the window, as is usual for a descent. One solve fails: the grid
    # point next to the optimum (38.5), or the first probe of Brent's method.
    t_lo, t_hi, t_opt = 1.0, 101.0, 31.0
    call = 3 if where == "grid point" else GRID
    ev = Synthetic(win=(30.0, 100.0), t_opt=t_opt, fail_calls={call})
    res = tofsearch.search(ev, t_lo, t_hi, reach=(t_lo, t_hi))
    assert abs(res.t_best - t_opt) <= TOL
    # The failed probe was retried once, a small shift later, and solved.
    assert ev.log[call + 1][0] == ev.log[call][0] + SHIFT
    assert res.evaluations == len(ev.log)
    if where == "grid point":
        # The same probe counted as infeasible (no retry: what the search did
        # with every failure once) leaves 51 the best grid point and the
        # optimum outside its bracket [38.5, 63.5].
        old = Synthetic(win=(30.0, 100.0), t_opt=t_opt, fail_calls={call},
                        fail_as=tofsearch.INFEASIBLE)
        res_old = tofsearch.search(old, t_lo, t_hi, reach=(t_lo, t_hi))
        assert res_old.t_best - t_opt > 4.0 and res_old.cost_best - res.cost_best > 16.0


def test_a_failure_band_beside_the_optimum_does_not_push_the_search_off_it():
    # Solves fail within 0.5 s of the first probe of Brent's method (21.2 s,
    # beside the optimum; the retry too): that probe stays unknown, ranks
    # worse than any solved one, and the bracket keeps the best point.
    t_opt = 31.0
    clean = Synthetic(win=(1.0, 101.0), t_opt=t_opt)
    tofsearch.search(clean, 1.0, 101.0, reach=(1.0, 101.0))
    bands = [(x - 0.5, x + 0.5) for x in clean.times()[GRID:GRID + 1]]
    assert abs(clean.times()[GRID] - t_opt) > 5.0
    ev = Synthetic(win=(1.0, 101.0), t_opt=t_opt, fail_bands=bands)
    res = tofsearch.search(ev, 1.0, 101.0, reach=(1.0, 101.0))
    assert abs(res.t_best - t_opt) <= TOL
    assert sum(lo <= x <= hi for x in ev.times() for lo, hi in bands) >= 2   # the band was hit


def test_a_failure_at_the_top_of_the_bracket_is_retried_below_it():
    ev = Synthetic(win=(1.0, 101.0), t_opt=90.0, fail_calls={GRID - 1})
    res = tofsearch.search(ev, 1.0, 101.0, reach=(1.0, 101.0))
    k = GRID - 1
    assert ev.log[k][0] == 101.0 and ev.log[k + 1][0] == 101.0 - SHIFT
    assert abs(res.t_best - 90.0) <= TOL


def test_evaluation_count_stays_within_the_documented_bound():
    doc = " ".join(tofsearch.__doc__.split())
    bound = tofsearch.max_evaluations()
    assert bound == 2 * (GRID + tofsearch.BRENT_MAX_STEPS) + tofsearch.RETRY_BUDGET
    assert f"= {bound} in all" in doc
    # Everything fails: the budget of retries, then both grids.
    ev = Synthetic(fail_bands=[(-math.inf, math.inf)])
    res = tofsearch.search(ev, 1.0, 101.0, reach=(1.0, 101.0))
    assert res.t_best is None and res.payload_best[0] == "failed"
    assert res.evaluations == 2 * GRID + tofsearch.RETRY_BUDGET
    # Random windows, optima and failures (seeded): never above the bound,
    # and the answer within the tolerance of the optimum whenever no probe
    # near it failed.
    rng = np.random.default_rng(20261202)
    for _ in range(300):
        lo = rng.uniform(0.0, 120.0)
        win = (lo, lo + rng.uniform(0.0, 30.0))
        fails = set(np.flatnonzero(rng.random(bound) < rng.uniform(0.0, 0.5)).tolist())
        bands = [(x, x + rng.uniform(0.0, 3.0)) for x in rng.uniform(0.0, 100.0, 2)]
        ev = Synthetic(win=win, t_opt=rng.uniform(*win), fail_calls=fails, fail_bands=bands)
        reach = (1.0, 101.0) if rng.random() < 0.8 else None
        res = tofsearch.search(ev, 1.0, 101.0, tolerance_s=float(rng.choice([1e-3, TOL])),
                               reach=reach)
        assert res.evaluations == len(ev.log) <= bound


def test_bad_arguments_name_the_field():
    with pytest.raises(InputError, match=r"evaluate\(t\) outcome = 'ok'"):
        tofsearch.search(lambda t, m: ("ok", 1.0, None), 1.0, 2.0)
    with pytest.raises(InputError, match=r"evaluate\(t\) cost = inf: must be a finite"):
        tofsearch.search(lambda t, m: (tofsearch.SOLVED, math.inf, None), 1.0, 2.0)
    with pytest.raises(InputError, match=r"t_lo = nan: must be a finite number"):
        tofsearch.search(Synthetic(), math.nan, 2.0)
    with pytest.raises(InputError, match=r"tolerance_s = 0.0: must be > 0"):
        tofsearch.search(Synthetic(), 1.0, 2.0, tolerance_s=0.0)
    with pytest.raises(InputError, match=r"reach = \(0.5, 2.0\): must lie inside"):
        tofsearch.search(Synthetic(), 1.0, 2.0, reach=(0.5, 2.0))


@pytest.mark.parametrize("status,retried", [(SOLVER_BREAKDOWN, True), (ITERATIONS_EXHAUSTED, True),
                                            (UNREACHABLE, False)])
def test_reference_retries_a_failed_probe_but_not_an_infeasible_one(demo_vehicle, monkeypatch,
                                                                    status, retried):
    # The reference says "failed" for numerical trouble and the iteration
    # limit, "unreachable" only for a proven infeasible status.
    rs = ReferenceSolver(demo_vehicle, 10)
    calls = []

    def fake(mode, position_m, velocity_mps, mass_kg, tof, *args, **kwargs):
        calls.append((tof, mode))
        return Trajectory(status=status if len(calls) == 1 else UNREACHABLE, solver="fake",
                          horizon=10, time_of_flight_s=tof)

    monkeypatch.setattr(rs, "solve_mode", fake)
    tr = rs.solve(*DEMO_STATE, fallback=False)
    assert tr.status == UNREACHABLE
    lo, hi = time_of_flight_bracket(demo_vehicle, *DEMO_STATE)
    reach = reach_bracket(demo_vehicle, DEMO_STATE[1], DEMO_STATE[2], max(lo, 1e-3 * hi), hi,
                          position_m=DEMO_STATE[0], horizon=10)
    g = grid(*reach)
    # Target probes that need more delta-v than the propellant gives are
    # infeasible without a solve (problem.target_possible): no call.
    possible = [t for t in g if target_possible(demo_vehicle, DEMO_STATE[0], DEMO_STATE[1],
                                                 DEMO_STATE[2], t, 10)]
    assert 0 < len(possible) < GRID
    assert calls[0] == (g[0], "target")
    assert calls[1][0] == (g[0] + SHIFT if retried else g[1])
    assert len(calls) == len(possible) + GRID + (1 if retried else 0)


# -- the C mirror --------------------------------------------------------------

N_C = 4
#: Strict flags of the generated guidance layer (DEVELOPERS.md, Rules).
STRICT = ["-std=c99", "-Wall", "-Wextra", "-Wpedantic", "-Wshadow", "-Werror"]

STUB_C = r"""
#include "pdg_guidance.h"
#include <math.h>

/* Stub backend: the synthetic rules of Synthetic, in scaled dt; the mode
 * from the parameters (kappa 0: target; w_err > 1: merit). */
#define STUB_LOG 512
static double stub_win_lo, stub_win_hi, stub_opt, stub_band_lo, stub_band_hi, stub_weight;
static int stub_fail_call = -1, stub_fail_status = 3, stub_dt_index, stub_kappa_index,
           stub_werr_index, stub_calls;
static double stub_log[STUB_LOG];
static int stub_mode[STUB_LOG];

void stub_config(double win_lo, double win_hi, double opt, double band_lo, double band_hi,
                 int fail_call, int fail_status, int dt_index, int kappa_index, int werr_index,
                 double weight)
{
    stub_win_lo = win_lo; stub_win_hi = win_hi; stub_opt = opt;
    stub_band_lo = band_lo; stub_band_hi = band_hi;
    stub_fail_call = fail_call; stub_fail_status = fail_status;
    stub_dt_index = dt_index; stub_kappa_index = kappa_index; stub_werr_index = werr_index;
    stub_weight = weight; stub_calls = 0;
}

int stub_calls_made(void) { return stub_calls; }
double stub_dt(int i) { return stub_log[i]; }
int stub_mode_of(int i) { return stub_mode[i]; }

int pdg_backend_solve(pdg_backend_work *bw, const double *params, int iteration_cap,
                      int probe, double *objective, int *iterations)
{
    const double dt = params[stub_dt_index];
    const int merit = params[stub_kappa_index] != 0.0 && params[stub_werr_index] > 1.0;
    const int k = stub_calls;
    double dist;
    (void)bw;
    (void)iteration_cap;
    (void)probe;
    if (k < STUB_LOG) {
        stub_log[k] = dt;
        stub_mode[k] = params[stub_kappa_index] == 0.0 ? 0 : (merit ? 1 : 2);
    }
    stub_calls += 1;
    *iterations = 1;
    *objective = 0.0;
    if (k == stub_fail_call || (dt >= stub_band_lo && dt <= stub_band_hi)) {
        return stub_fail_status;
    }
    dist = fmax(stub_win_lo - dt, fmax(0.0, dt - stub_win_hi));
    if (!merit && params[stub_kappa_index] == 0.0 && dist > 0.0) {
        return 1;
    }
    *objective = (dt - stub_opt) * (dt - stub_opt) + 1.0 + (merit ? stub_weight * dist : 0.0);
    return 0;
}

void pdg_backend_solution(const pdg_backend_work *bw, double *r, double *v, double *z,
                          double *u, double *sigma, double *error_norm)
{
    int i;
    (void)bw;
    for (i = 0; i < 3 * (PDG_HORIZON + 1); i++) { r[i] = 0.0; v[i] = 0.0; }
    for (i = 0; i < PDG_HORIZON + 1; i++) { z[i] = 0.0; }
    for (i = 0; i < 3 * PDG_HORIZON; i++) { u[i] = 0.0; }
    for (i = 0; i < PDG_HORIZON; i++) { sigma[i] = 0.0; }
    *error_norm = 0.0;
}
"""

STUB_CDEF = """
void stub_config(double win_lo, double win_hi, double opt, double band_lo, double band_hi,
                 int fail_call, int fail_status, int dt_index, int kappa_index, int werr_index,
                 double weight);
int stub_calls_made(void);
double stub_dt(int i);
int stub_mode_of(int i);
"""


@pytest.fixture(scope="module")
def c_search(tmp_path_factory, demo_vehicle):
    """The generated guidance layer linked to the stub backend (cffi API mode)."""
    import cffi

    # The cvxpygen-ecos tree: its backend header includes no solver header,
    # so the guidance layer builds alone against the stub.
    tree = tmp_path_factory.mktemp("tofs") / "tree"
    generate(DEMO_VEHICLE, N_C, tree, backend="cvxpygen-ecos")
    sources = [tree / "src" / "pdg_guidance.c", tree / "src" / "pdg_verdict.c"]
    for src in sources:
        r = subprocess.run(["gcc", *STRICT, "-fsyntax-only", "-I", str(tree / "include"),
                            str(src)], capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
    text = sources[0].read_text()
    index = {name: int(re.search(rf"^#define P_{name} (\d+)$", text, re.M).group(1))
             for name in ("DT", "KAPPA", "W_ERR")}
    ffi = cffi.FFI()
    ffi.cdef(cdef_text("pdg", N_C) + STUB_CDEF)
    name = "_pdgc_tofsearch_stub"
    ffi.set_source(name, STUB_C, sources=[str(s) for s in sources],
                   include_dirs=[str(tree / "include")], extra_compile_args=["-O2"],
                   libraries=["m"])
    build = tmp_path_factory.mktemp("tofs_build")
    so = ffi.compile(tmpdir=str(build), verbose=False)
    spec = importlib.util.spec_from_file_location(name, so)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod, index, Scaling.for_vehicle(demo_vehicle).time_s


#: (name, window, optimum, failing call, failing status, call whose time is
#: the centre of a failure band of +-0.01 s (wider than the retry's shift);
#: times in s. The state below has the bracket [1.6, 246.1] s and the reach
#: bracket [23.9, 153.3] s (the speed limit sets its short end); the optimum
#: sits near the window's short end.
C_CASES = [
    ("no failure", (40.0, 140.0), 45.0, -1, 3, -1),
    ("one failed grid point", (40.0, 140.0), 45.0, 2, 3, -1),
    ("one failed Brent probe", (40.0, 140.0), 45.0, tofsearch.GRID_POINTS, 3, -1),
    ("one iteration limit", (40.0, 140.0), 45.0, tofsearch.GRID_POINTS + 1, 2, -1),
    ("failure band at a Brent probe", (40.0, 140.0), 45.0, -1, 3, tofsearch.GRID_POINTS + 2),
    ("failure band at the first Brent probe", (40.0, 140.0), 45.0, -1, 3,
     tofsearch.GRID_POINTS),
    ("failure at the top of the bracket", (40.0, 1e3), 140.0, tofsearch.GRID_POINTS - 1, 3, -1),
    ("narrow window, the merit phase", (100.0, 103.0), 101.3, -1, 3, -1),
    ("narrow window and a failure", (100.0, 103.0), 101.3, 3, 3, -1),
    ("out of reach, least error", (500.0, 600.0), 550.0, -1, 3, -1),
    ("everything fails", (40.0, 140.0), 45.0, -1, 3, "all"),
]

#: Weight of the distance to the window in the stub's merit (scaled dt units).
STUB_MERIT_WEIGHT = 5.0


@pytest.mark.parametrize("case", C_CASES, ids=[c[0] for c in C_CASES])
def test_c_search_tries_the_same_times_as_python(c_search, demo_vehicle, case):
    mod, index, time_unit = c_search
    ffi, lib = mod.ffi, mod.lib
    _, win, t_opt, fail_call, fail_status, band_call = case
    pos, vel, mass = [1500.0, 0.0, 1500.0], [-30.0, 0.0, -40.0], 1900.0
    lo, hi = time_of_flight_bracket(demo_vehicle, pos, vel, mass)
    t_lo = max(lo, 1e-3 * hi)
    reach = reach_bracket(demo_vehicle, vel, mass, t_lo, hi, position_m=pos, horizon=N_C)

    def dt(t):   # as compute_params: tf = t / TIME_UNIT_S, dt = tf / N
        return (t / time_unit) / N_C

    def python_search(band_dt):
        times, dts = [], []

        def evaluate(t, mode):
            if mode == "target" and not target_possible(demo_vehicle, pos, vel, mass, t, N_C):
                return tofsearch.INFEASIBLE, math.inf, None   # no solve: the stub is not called
            x = dt(t)
            k = len(dts)
            times.append(t)
            dts.append(x)
            if k == fail_call or band_dt[0] <= x <= band_dt[1]:
                return tofsearch.FAILED, math.nan, None
            dist = max(dt(win[0]) - x, 0.0, x - dt(win[1]))
            if mode == "target" and dist > 0.0:
                return tofsearch.INFEASIBLE, math.inf, None
            cost = (x - dt(t_opt)) * (x - dt(t_opt)) + 1.0
            return tofsearch.SOLVED, cost + (STUB_MERIT_WEIGHT * dist if mode == "merit"
                                             else 0.0), None

        return tofsearch.search(evaluate, t_lo, hi, reach=reach), times, dts

    band_dt = (math.inf, -math.inf)
    if band_call == "all":
        band_dt = (-math.inf, math.inf)
    elif band_call >= 0:
        # The time of that call in the search without the band.
        t_band = python_search(band_dt)[1][band_call]
        band_dt = (dt(t_band - 0.01), dt(t_band + 0.01))
    res, py_times, py_dts = python_search(band_dt)
    count = len(py_dts)   # solves made (skipped target probes are evaluations without one)
    if band_call != -1:
        assert sum(band_dt[0] <= x <= band_dt[1] for x in py_dts) >= 2   # probe and retry
    if fail_call >= 0:   # retried a shift later, or earlier at the top of the bracket
        assert abs(py_times[fail_call + 1] - py_times[fail_call]) == pytest.approx(SHIFT)

    lib.stub_config(dt(win[0]), dt(win[1]), dt(t_opt), band_dt[0], band_dt[1], fail_call,
                    fail_status, index["DT"], index["KAPPA"], index["W_ERR"], STUB_MERIT_WEIGHT)
    work, plan = ffi.new("pdg_workspace *"), ffi.new("pdg_plan *")
    inp = ffi.new("pdg_input *", {"position_m": pos, "velocity_mps": vel, "mass_kg": mass,
                                  "time_of_flight_s": 0.0, "target_m": [0.0, 0.0, 0.0],
                                  "velocity_target_mps": [0.0, 0.0, 0.0], "throttle_max": 0.0})
    status = lib.pdg_plan_descent(work, inp, ffi.NULL, plan)
    made = lib.stub_calls_made()
    c_dts = [lib.stub_dt(i) for i in range(made)]
    assert c_dts[:count] == py_dts   # bit for bit: the same times in the same order
    modes = [lib.stub_mode_of(i) for i in range(count)]
    assert set(modes) <= {0, 1}               # probes: target (0) or merit (1) only
    if res.t_best is None:
        assert made == count and status == fail_status
        assert count <= 2 * tofsearch.GRID_POINTS + tofsearch.RETRY_BUDGET
    else:
        # Then the tight solves at the time found, the first of them there.
        assert made > count and c_dts[count] == dt(res.t_best)
        assert (res.phase == "target") == (modes[-1] == 0)
        if res.phase == "target":
            assert set(modes) == {0} and abs(res.t_best - t_opt) <= TOL
        elif band_call == -1 and win[1] < hi:
            # the merit phase finds a window the target grid missed
            assert abs(res.t_best - t_opt) <= TOL
    assert plan.solves == made
