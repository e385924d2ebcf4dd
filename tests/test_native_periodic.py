"""The stage-periodic KKT ordering and its straight-line stage kernel
(codegen/backends/native/periodic.py, codegen/backends/native/kernel.py).

The kernel is checked three ways: its range is periodic in the pattern of L
itself (not only in the program the kernel was built from), programs without
stage structure fall back to the generic code unchanged, and solutions with
the kernel equal those of the generic loops over the same ordering.
"""

from __future__ import annotations

import numpy as np
import pytest

from codegen.model.canonical import extract
from codegen.backends.native import describe, render
from codegen.backends.native.cbuild import NativeSolver, compile_shared
from codegen.backends.native.kernel import find_kernel
from codegen.backends.native.measure import dispersed
from codegen.backends.native.periodic import kkt_stages, variable_stages
from codegen.backends.native.symbolic import analyse
from codegen.model.problem import DescentProblem

from test_native_solver import FAMILIES, RandomFamily


def _periodic(prog):
    stages = kkt_stages(prog, variable_stages(prog), "min")
    sym = analyse(prog.n, prog.p, prog.m, prog.A.indptr, prog.A.indices, prog.G.indptr,
                  prog.G.indices, prog.nonneg, prog.soc, "auto", stages)
    return stages, sym


@pytest.mark.parametrize("horizon", [20, 50])
def test_descent_program_is_periodic_over_its_interior_stages(demo_vehicle, horizon):
    prog = extract(DescentProblem(demo_vehicle, horizon))
    vstage = variable_stages(prog)
    assert vstage is not None and vstage.max() == horizon
    r_off, _ = prog.variables["r"]
    u_off, _ = prog.variables["u"]
    assert vstage[r_off + 3 * 7 + 2] == 7 and vstage[u_off + 3 * 4] == 4
    stages, sym = _periodic(prog)
    assert sym.ordering == "periodic"
    kern = sym.kernel
    assert kern is not None
    # found at N = 20, 50, 100: stages [2, N) of the factorisation
    assert (kern.first, kern.first + kern.count) == (2, horizon)
    assert kern.bwd["count"] >= horizon - 3
    # the ordering is stage by stage
    spos = stages[sym.perm]
    assert np.all(np.diff(spos) >= 0)
    # periodicity of the pattern itself: every row of stage s + 1 is the same
    # row of stage s shifted by P, and so are the columns of the KKT values
    k0, P = kern.rows
    for s in range(kern.count - 1):
        for c in range(P):
            k = k0 + s * P + c
            r1 = sym.Rj[sym.Rp[k]:sym.Rp[k + 1]]
            r2 = sym.Rj[sym.Rp[k + P]:sym.Rp[k + P + 1]]
            assert np.array_equal(r1 + P, r2), (s, c)
            c1 = sym.Ki[sym.Kp[k]:sym.Kp[k + 1]]
            c2 = sym.Ki[sym.Kp[k + P]:sym.Kp[k + P + 1]]
            assert np.array_equal(c1 + P, c2), (s, c)
        assert sym.Lp[k0 + (s + 1) * P] - sym.Lp[k0 + s * P] == kern.l_val[1]
        assert sym.Kp[k0 + (s + 1) * P] - sym.Kp[k0 + s * P] == kern.kkt[1]
    # and not beyond it: the last stage (no dynamics out of it) is smaller
    end = k0 + kern.count * P
    assert end < sym.dim and sym.dim - end != P and np.all(spos[end:] == horizon)


def test_broken_periodicity_is_not_given_to_the_kernel(demo_vehicle):
    """find_kernel compares the work of every stage: make one interior stage
    differ (the expected sign of one pivot) and the range must avoid it."""
    prog = extract(DescentProblem(demo_vehicle, 20))
    stages, sym = _periodic(prog)
    k0, P = sym.kernel.rows
    sign = np.where(sym.perm < prog.n, 1, -1)
    bad_stage = sym.kernel.first + 5
    sign[k0 + 5 * P + 3] *= -1
    kern = find_kernel(stages[sym.perm], sym.Kp, sym.Ki, sym.Lp, sym.Li, sym.Rp, sym.Rj, sign)
    assert kern is not None
    assert not (kern.first <= bad_stage < kern.first + kern.count)
    assert kern.count == max(5, sym.kernel.count - 6)


@pytest.mark.parametrize("name", sorted(FAMILIES))
def test_random_socp_falls_back_to_the_generic_code(name):
    fam = RandomFamily(**FAMILIES[name])
    prog = fam.prog
    assert variable_stages(prog) is None
    info = describe(prog)
    assert info["stage_kernel"] is None and info["ordering"] != "periodic"
    plain = analyse(prog.n, prog.p, prog.m, prog.A.indptr, prog.A.indices, prog.G.indptr,
                    prog.G.indices, prog.nonneg, prog.soc, "auto")
    assert info["ordering"] == plain.ordering and info["L_nnz"] == plain.nnz_L
    files = render(prog)
    assert "factor_stage" not in files["pdg_socp.c"]
    assert files == render(prog, stage_kernel=False)


def test_stage_kernel_solves_as_the_generic_loops(demo_vehicle, tmp_path_factory):
    """Same periodic ordering, rendered with and without the kernel: the
    kernel adds in the order of the generic loops, so with contraction off
    (-std=c99) statuses, iteration counts and solutions agree bit for bit."""
    dp = DescentProblem(demo_vehicle, 20)
    prog = extract(dp)
    solvers = {}
    for kern in (True, False):
        files = render(prog, stage_kernel=kern)
        assert ("factor_stage" in files["pdg_socp.c"]) == kern
        out = tmp_path_factory.mktemp(f"periodic_kernel_{int(kern)}")
        lib = compile_shared(files, out)
        solvers[kern] = NativeSolver(lib, out / "pdg_socp.h")
    statuses = set()
    for params in dispersed(demo_vehicle, dp, 12, seed=3):
        a = solvers[True].solve(params, sizes=(prog.n, prog.p, prog.m))
        b = solvers[False].solve(params, sizes=(prog.n, prog.p, prog.m))
        statuses.add(a["status"])
        assert a["status"] == b["status"] and a["iterations"] == b["iterations"]
        assert np.array_equal(a["x"], b["x"]) and a["objective"] == b["objective"]
    assert 0 in statuses                 # some solved


def test_single_precision_keeps_the_staged_ordering(demo_vehicle):
    prog = extract(DescentProblem(demo_vehicle, 20))
    info = describe(prog, precision="single")
    assert info["ordering"] == "staged" and info["stage_kernel"] is None
