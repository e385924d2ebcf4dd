"""The benchmark's machinery: build trees, time them in C and through cffi, compare.

Used by the pytest-benchmark suite (bench/test_bench.py, bench/conftest.py)
and by the smoke test (tests/test_bench_smoke.py), so that the suite cannot
rot unnoticed.

For every backend and horizon:
  * generate the tree (``codegen.emit.generate``) and compile it once with the
    tree's own Makefile into ``build/lib<prefix>_guidance.a`` (``-O2 -fPIC``,
    so that the same objects serve both consumers below);
  * link a small C timing harness (bench/harness.c.j2, bench-only code, never
    part of the tree) against that archive: it calls ``<prefix>_plan_descent``
    many times and reports median and worst with ``clock_gettime``;
  * link a cffi module against the same archive and call it through the
    solver interface of ``codegen.bind`` (to show the call overhead);
  * solve the same instances with the reference (CVXPY + Clarabel).

Backends are interleaved instance by instance (the starting backend rotates),
so slow drift of a shared machine hits them all alike; every figure that
matters is a ratio measured in the same run. Nothing here asserts a time.

The pieces: ``config`` (Config, instances, progress lines), ``builds``
(generate, compile, harness, cffi), ``measure`` (interleaved timing, rows,
growth, callgrind), ``session`` (the whole run), ``output`` (table, JSON,
plot). This module gathers what the suite and the smoke test use.
"""

from bench.builds import ArchiveSolver, Build, build, load_cffi, run_harness, time_in_c
from bench.config import (BACKENDS, LABELS, PROGRESS, QOCO_CAP_REASON, REFERENCE, Config,
                          Instance, make_instances, say)
from bench.measure import fit_exponent, growth, measure_horizon, rel_error, summarise
from bench.output import headline_ratios, plot_growth, table_markdown, write_results
from bench.session import Session, machine_meta, notes
from codegen.errors import InputError

__all__ = [
    "ArchiveSolver", "Build", "build", "load_cffi", "run_harness", "time_in_c", "BACKENDS",
    "LABELS", "PROGRESS", "QOCO_CAP_REASON", "REFERENCE", "Config", "Instance",
    "make_instances", "say", "fit_exponent", "growth", "measure_horizon", "rel_error",
    "summarise", "headline_ratios", "plot_growth", "table_markdown", "write_results",
    "Session", "machine_meta", "notes", "InputError"
]
