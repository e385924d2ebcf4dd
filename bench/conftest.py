"""pytest-benchmark suite of pdgc: shared session state and the closing table.

`make bench` runs this directory with --benchmark-only. The session state
(bench/benchlib.py, Session) builds each (backend, horizon) once and measures
each horizon once, interleaving backends instance by instance; the tests ask
it for their rows. At the end the side-by-side table is printed and written
to bench/results/latest.{md,json} with growth.png beside them.

Knobs (environment): PDGC_BENCH_HORIZONS=10,20,50,100, PDGC_BENCH_BACKENDS,
PDGC_BENCH_QOCO_MAX=50, PDGC_BENCH_INSTANCES=8, PDGC_BENCH_C_BUDGET_S,
PDGC_BENCH_CALLGRIND=0 to skip valgrind.
"""

from __future__ import annotations

import os

import pytest

from bench import benchlib

CONFIG = benchlib.Config.from_env()
_SESSION = benchlib.Session(CONFIG)


def pytest_configure(config):
    os.environ.setdefault("PDGC_BENCH_LOG", str(CONFIG.out_dir / "progress.log"))
    CONFIG.out_dir.mkdir(parents=True, exist_ok=True)
    log = os.environ["PDGC_BENCH_LOG"]
    if os.path.exists(log):
        os.remove(log)
    # Output capture is suspended while plugins configure: fd 2 is still the
    # terminal here. Keep a copy for progress lines during the tests.
    try:
        benchlib.PROGRESS["stream"] = os.fdopen(os.dup(2), "w", buffering=1)
    except OSError:
        pass
    benchlib.say(f"progress also in {log}")
    capped = CONFIG.capped()
    if capped:
        benchlib.say(f"QOCOGEN not run at N={', '.join(map(str, capped))}: "
                     + benchlib.QOCO_CAP_REASON.format(cap=CONFIG.qoco_max_horizon))


@pytest.fixture(scope="session")
def bench_session():
    return _SESSION


@pytest.hookimpl(trylast=True)   # after pytest-benchmark's own tables: ours closes the run
def pytest_terminal_summary(terminalreporter, exitstatus, config):
    if not _SESSION.rows:
        return
    _SESSION.run_callgrind()
    results = _SESSION.results()
    paths = benchlib.write_results(results, CONFIG.out_dir)
    tr = terminalreporter
    tr.section("pdgc side-by-side table")
    tr.write(benchlib.table_markdown(results))
    tr.write_line("")
    for key, path in paths.items():
        tr.write_line(f"written: {path}")
