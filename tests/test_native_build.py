"""Hygiene of the generated native solver as C: no heap, strict C99, sanitizers.

Rules checked (issue 4 and the project's C rules; common practice for
flight code, cf. the "Power of Ten" rules): no malloc/calloc/realloc/free in
the object's undefined symbols; compiles with -std=c99 -Wall -Wextra
-Wpedantic -Wshadow -Werror in both precisions; a C driver built with
AddressSanitizer and UndefinedBehaviorSanitizer runs clean and agrees with
the cffi-loaded build.
"""

from __future__ import annotations

import shutil
import subprocess

import numpy as np
import pytest

from codegen.model.canonical import extract, flat_parameters
from codegen.backends.native import render
from codegen.backends.native.cbuild import (STRICT_FLAGS, NativeSolver, compile_shared, write_sources)
from codegen.model.problem import DescentProblem

pytestmark = pytest.mark.skipif(shutil.which("gcc") is None, reason="needs gcc")

DRIVER = r"""
/* Test driver: reads NPARAM parameters per case from argv[1], solves each
 * case twice in two interleaved workspaces, prints status and objective. */
#include <stdio.h>
#include "pdg_socp.h"

static pdg_socp_work wa, wb;

int main(int argc, char **argv)
{
    static pdg_real p[PDG_SOCP_NUM_PARAMS];
    pdg_socp_config st;
    FILE *f;
    int ncase, c, i;
    if (argc < 2 || (f = fopen(argv[1], "r")) == NULL) {
        return 2;
    }
    if (fscanf(f, "%d", &ncase) != 1) {
        return 3;
    }
    pdg_socp_config_init(&st);
    for (c = 0; c < ncase; ++c) {
        int sa, sb;
        for (i = 0; i < PDG_SOCP_NUM_PARAMS; ++i) {
            double v;
            if (fscanf(f, "%lf", &v) != 1) {
                return 4;
            }
            p[i] = (pdg_real)v;
        }
        sa = pdg_socp_solve(&wa, p, &st);
        sb = pdg_socp_solve(&wb, p, NULL);
        printf("%d %d %.17g %.17g %d\n", sa, sb, (double)wa.objective, (double)wb.objective,
               wa.iterations);
    }
    fclose(f);
    return 0;
}
"""


@pytest.fixture(scope="module")
def demo20(demo_vehicle):
    dp = DescentProblem(demo_vehicle, 20)
    prog = extract(dp)
    cases = [flat_parameters(dp, dp.values([1500, 0, 1500], [-50, 0, -40], 1900, 40.0)),
             flat_parameters(dp, dp.values([1800, 200, 1300], [-30, 10, -50], 1880, 45.0)),
             flat_parameters(dp, dp.values([1500, 0, 1500], [-50, 0, -40], 1900, 5.0))]
    return prog, cases


@pytest.mark.parametrize("precision", ["double", "single"])
def test_strict_compile_and_no_heap_symbols(demo20, tmp_path, precision):
    prog, _ = demo20
    files = write_sources(render(prog, precision=precision), tmp_path)
    obj = tmp_path / "pdg_socp.o"
    subprocess.run(["gcc", "-O2", *STRICT_FLAGS, "-c", str(files / "pdg_socp.c"), "-o", str(obj)],
                   check=True, capture_output=True, text=True)
    undefined = subprocess.run(["nm", "-u", str(obj)], check=True, capture_output=True,
                               text=True).stdout.split()
    for sym in ("malloc", "calloc", "realloc", "free"):
        assert sym not in undefined, undefined
    defined = subprocess.run(["nm", "--defined-only", "-g", str(obj)], check=True,
                             capture_output=True, text=True).stdout
    exported = sorted(line.split()[-1] for line in defined.splitlines() if line.strip())
    assert exported == ["pdg_socp_config_init", "pdg_socp_solve"]


def test_sanitizers_find_nothing_and_agree_with_cffi_build(demo20, tmp_path):
    prog, cases = demo20
    files = render(prog)
    src = write_sources(files, tmp_path / "src")
    (src / "driver.c").write_text(DRIVER)
    exe = tmp_path / "driver_asan"
    subprocess.run(["gcc", "-O1", "-g", *STRICT_FLAGS, "-fsanitize=address,undefined",
                    "-fno-sanitize-recover=all", "-fno-omit-frame-pointer",
                    str(src / "driver.c"), str(src / "pdg_socp.c"), "-o", str(exe), "-lm"],
                   check=True, capture_output=True, text=True)
    pfile = tmp_path / "params.txt"
    pfile.write_text(f"{len(cases)}\n" + "\n".join(
        " ".join(repr(float(v)) for v in p) for p in cases) + "\n")
    run = subprocess.run([str(exe), str(pfile)], capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    assert "runtime error" not in run.stderr and "AddressSanitizer" not in run.stderr
    lines = run.stdout.split("\n")
    lib = compile_shared(files, tmp_path / "lib")
    solver = NativeSolver(lib, tmp_path / "lib" / "pdg_socp.h")
    statuses = []
    for line, params in zip(lines, cases):
        sa, sb, oa, ob, _ = line.split()
        assert sa == sb and oa == ob          # two workspaces, same answer
        res = solver.solve(params)
        assert int(sa) == res["status"]
        statuses.append(res["status"])
        if res["status"] == 0:
            assert float(oa) == pytest.approx(res["objective"], rel=1e-9)
    assert statuses == [0, 0, 1]


@pytest.mark.slow
def test_n50_source_size_and_no_unrolling(demo_vehicle):
    """Issue 4 target: generated solver source under 300 KB at N = 50; and
    the code (not the const arrays) does not grow with the problem."""
    sizes, code_lines = {}, {}
    for n in (20, 50):
        prog = extract(DescentProblem(demo_vehicle, n))
        files = render(prog)
        sizes[n] = sum(len(t.encode()) for t in files.values())
        text = files["pdg_socp.c"]
        # lines that are not array initialisers (digits, commas, literals)
        code_lines[n] = sum(1 for ln in text.splitlines()
                            if ln.strip() and not all(ch in "0123456789.,-+eEf" for ch in ln.strip()))
    assert sizes[50] < 300_000, sizes
    assert code_lines[50] == code_lines[20], code_lines


UNINIT_DRIVER = r"""
/* Test driver: one solve in a workspace that was never initialised. */
#include <stdio.h>
#include <stdlib.h>
#include "pdg_socp.h"

int main(int argc, char **argv)
{
    static pdg_real p[PDG_SOCP_NUM_PARAMS];
    pdg_socp_work *w = malloc(sizeof *w);    /* the driver's heap, not the solver's */
    FILE *f;
    int i, st;
    if (argc < 2 || w == NULL || (f = fopen(argv[1], "r")) == NULL) {
        return 2;
    }
    for (i = 0; i < PDG_SOCP_NUM_PARAMS; ++i) {
        double v;
        if (fscanf(f, "%lf", &v) != 1) {
            return 3;
        }
        p[i] = (pdg_real)v;
    }
    fclose(f);
    st = pdg_socp_solve(w, p, NULL);
    printf("%d %.17g\n", st, (double)w->objective);
    free(w);
    return 0;
}
"""


@pytest.mark.skipif(shutil.which("valgrind") is None, reason="needs valgrind")
def test_no_read_of_uninitialised_workspace(demo20, tmp_path):
    """The caller need not clear the workspace: valgrind (memcheck) sees no
    use of uninitialised memory in a solve."""
    prog, cases = demo20
    src = write_sources(render(prog), tmp_path)
    (src / "driver.c").write_text(UNINIT_DRIVER)
    exe = tmp_path / "driver"
    subprocess.run(["gcc", "-O1", "-g", *STRICT_FLAGS, str(src / "driver.c"),
                    str(src / "pdg_socp.c"), "-o", str(exe), "-lm"],
                   check=True, capture_output=True, text=True)
    pfile = tmp_path / "params.txt"
    pfile.write_text(" ".join(repr(float(v)) for v in cases[0]) + "\n")
    run = subprocess.run(["valgrind", "--error-exitcode=9", "--track-origins=yes", str(exe),
                          str(pfile)], capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stderr[-3000:]
    assert run.stdout.split()[0] == "0"



def test_cone_kernels_match_generic_loops(demo20, tmp_path, monkeypatch):
    """The cone kernels written out by size (codegen/backends/native/cones.py)
    do the generic loops' arithmetic in the same order: with contraction off
    (-std=c99) every iterate, hence every output, is bit for bit the same
    as with no kernels at all (cones.SIZES emptied)."""
    from codegen.backends.native import cones

    prog, cases = demo20
    with_kernels = render(prog)
    assert "static inline int nt_cone_3(" in with_kernels["pdg_socp.c"]
    assert "static inline int nt_cone_4(" in with_kernels["pdg_socp.c"]
    monkeypatch.setattr(cones, "SIZES", ())
    loops_only = render(prog)
    assert "nt_cone_3(" not in loops_only["pdg_socp.c"]
    results = []
    for name, files in (("kernels", with_kernels), ("loops", loops_only)):
        lib = compile_shared(files, tmp_path / name)
        solver = NativeSolver(lib, tmp_path / name / "pdg_socp.h")
        results.append([solver.solve(p) for p in cases])
    for a, b in zip(*results):
        assert a["status"] == b["status"]
        assert a["iterations"] == b["iterations"]
        assert a["objective"] == b["objective"] or (a["objective"] != a["objective"]
                                                    and b["objective"] != b["objective"])
        assert a["primal_residual"] == b["primal_residual"]
        assert a["duality_gap"] == b["duality_gap"]
