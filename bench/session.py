"""The whole run: builds and measures lazily, one horizon at a time, and its metadata."""

from __future__ import annotations

import math
import os
import platform
import shutil
import subprocess
import time
from dataclasses import asdict
from pathlib import Path

from bench.builds import ArchiveSolver, Build, _cc, build, load_cffi
from bench.config import BACKENDS, PROGRESS, QOCO_CAP_REASON, ROOT, Config, make_instances, say
from bench.measure import callgrind_ir, growth, measure_horizon, summarise


class Session:
    """Lazily builds and measures, one horizon at a time; collects the rows."""

    def __init__(self, cfg: Config):
        self.cfg = cfg
        PROGRESS["terminal"] = cfg.progress
        self.builds: dict = {}
        self.solvers: dict = {}
        self.measurements: dict = {}
        self.rows: dict = {}
        self.failures: dict = {}
        self._instances = None
        self.started = time.time()
        self.load_start = os.getloadavg()

    @property
    def instances(self) -> list:
        if self._instances is None:
            say(f"choosing {self.cfg.instances} instances (seed {self.cfg.seed})")
            self._instances = make_instances(self.cfg)
        return self._instances

    def build(self, backend: str, horizon: int) -> Build:
        """Build once; a failure is remembered (and raised again), never retried."""
        key = (backend, horizon)
        if key in self.failures:
            raise RuntimeError(f"{backend} N={horizon} failed earlier: {self.failures[key]}")
        if key not in self.builds:
            try:
                self.builds[key] = build(self.cfg, backend, horizon)
                self.solvers[key] = load_cffi(self.builds[key])
            except Exception as exc:
                self.builds.pop(key, None)
                self.failures[key] = f"{type(exc).__name__}: {exc}"[:2000]
                say(f"FAILED {backend} N={horizon}: {self.failures[key][:300]}")
                raise
        return self.builds[key]

    def solver(self, backend: str, horizon: int) -> ArchiveSolver:
        self.build(backend, horizon)
        return self.solvers[(backend, horizon)]

    def measure(self, horizon: int) -> list:
        """Measure a horizon once, with every backend that builds."""
        if horizon not in self.rows:
            insts = self.instances
            builds = {}
            for b in self.cfg.backends_at(horizon):
                try:
                    builds[b] = self.build(b, horizon)
                except Exception:   # noqa: BLE001  (recorded; its own tests fail)
                    continue
            if not builds:
                raise RuntimeError(f"N={horizon}: no backend builds: {self.failures}")
            solvers = {b: self.solvers[(b, horizon)] for b in builds}
            self.measurements[horizon] = measure_horizon(self.cfg, builds, solvers, insts)
            self.rows[horizon] = summarise(self.cfg, builds, self.measurements[horizon])
        return self.rows[horizon]

    def row(self, backend: str, horizon: int) -> dict:
        rows = self.measure(horizon)
        for r in rows:
            if r["backend"] == backend:
                return r
        raise RuntimeError(f"{backend} N={horizon}: not measured: "
                           f"{self.failures.get((backend, horizon), 'not in this run')}")

    def run_callgrind(self) -> None:
        """Instructions of one call at every measured (backend, N), into the rows."""
        if not self.cfg.callgrind or shutil.which("valgrind") is None:
            return
        for n in sorted(self.rows):
            rows = {r["backend"]: r for r in self.rows[n]}
            for b in BACKENDS:
                if b not in rows or "instructions" in rows[b]:
                    continue
                say(f"callgrind: {b} N={n}")
                rows[b]["instructions"] = callgrind_ir(self.builds[(b, n)], self.instances[0])
            nat = rows.get("native", {}).get("instructions")
            for r in rows.values():
                ir = r.get("instructions")
                r["instructions_ratio_to_native"] = (ir / nat) if ir and nat else math.nan

    def run_all(self) -> dict:
        for n in self.cfg.horizons:
            self.measure(n)
        self.run_callgrind()
        return self.results()

    def results(self) -> dict:
        rows = [r for n in sorted(self.rows) for r in self.rows[n]]
        extra = []
        qoco = sorted(n for (b, n) in self.builds if b == "cvxpygen-qoco")
        if qoco:
            q = self.builds[("cvxpygen-qoco", qoco[-1])]
            extra.append(f"This run: QOCOGEN at N={q.horizon} took {q.generation_s:.0f} s to "
                         f"generate and {q.compile_s:.0f} s to compile (native at the same N: "
                         + (f"{self.builds[('native', q.horizon)].generation_s:.1f} s + "
                            f"{self.builds[('native', q.horizon)].compile_s:.1f} s)."
                            if ("native", q.horizon) in self.builds else "not built)."))
        return {"meta": machine_meta(self), "config": _config_dict(self.cfg),
                "instances": [asdict(i) for i in (self._instances or [])],
                "rows": rows, "growth": growth(rows),
                "failures": {f"{b} N={n}": msg for (b, n), msg in sorted(self.failures.items())},
                "notes": notes(self.cfg) + extra}


def _config_dict(cfg: Config) -> dict:
    d = asdict(cfg)
    for k in ("vehicle_path", "out_dir", "work_dir"):
        p = Path(d[k])
        d[k] = str(p.relative_to(ROOT)) if p.is_relative_to(ROOT) else p.name
    d["horizons"] = list(cfg.horizons)
    d["backends"] = list(cfg.backends)
    return d


def _git(*args) -> str:
    try:
        r = subprocess.run(["git", *args], cwd=ROOT, capture_output=True, text=True, timeout=30)
        return r.stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return ""


def machine_meta(sess: Session) -> dict:
    cpu = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    cc = subprocess.run([_cc(), "--version"], capture_output=True, text=True).stdout.splitlines()
    dirty = _git("status", "--porcelain", "--", "codegen", "templates")
    return {"date_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "elapsed_s": round(time.time() - sess.started, 1),
            "cpu": cpu, "cpus": os.cpu_count(), "python": platform.python_version(),
            "cc": cc[0] if cc else "", "cflags": sess.cfg.cflags, "git_commit": _git("rev-parse", "--short", "HEAD"),
            "codegen_or_templates_modified": bool(dirty),
            "load_average_start": [round(x, 2) for x in sess.load_start],
            "load_average_end": [round(x, 2) for x in os.getloadavg()]}


def notes(cfg: Config) -> list:
    out = [
        "Times are wall-clock on a shared machine; compare the ratios (measured in the same run, "
        "backends interleaved instance by instance), not the absolute values.",
        f"Fixed time of flight {cfg.time_of_flight_s:g} s; instances: the nominal state and states "
        f"drawn from the vehicle's envelope (seed {cfg.seed}) that the reference solves at "
        "that time of flight. 'median' is the median over instances of each instance's median "
        "over its repetitions; 'worst' is the slowest single call of any instance (on a shared "
        "machine mostly preemption), 'p99' the largest per-instance 99th percentile; 'best' "
        "is the median over instances of each one's fastest call, the figure least disturbed by "
        f"other jobs. Each instance's repetitions are spent in {cfg.rounds} short rounds, the "
        "backend order rotating every round, so that a slow phase of the shared host falls on "
        "all backends alike; an instance's median is the median of its rounds' medians.",
        "C times are measured inside C by a bench-only harness around <prefix>_plan_descent "
        "(clock_gettime(CLOCK_MONOTONIC)); that call includes the guidance layer (parameters from "
        "the state, one solve, SI conversion). 'cffi call' is the same call from Python; "
        "'Python solve()' adds codegen.bind's input and output handling. The overhead in "
        "parentheses is that of the call alone: a call refused at input validation (mass 0 kg) "
        "through cffi minus the same in C (medians of 2000).",
        "Reference: ReferenceSolver.solve (CVXPY parameter update + Clarabel at tight "
        "tolerances, 1e-9); 'Clarabel core' is Clarabel's own solve time.",
        "Relative objective error: |objective - reference| / |reference| at the same instance, "
        "worst over instances.",
        f"Machine code: `size -t` text (code + read-only data) of the compiled archive "
        f"({cfg.cflags} -fPIC); static RAM: data + bss of the same. The native backend keeps all its state "
        "in the caller-owned workspace (sizeof(<prefix>_workspace), from the harness; in "
        "parentheses the size the generated header states, computed at generation time); the "
        "cvxpygen backends keep theirs in global data (static RAM). Heap: the harness wraps "
        "malloc/calloc/realloc/free at link time and reports the peak of bytes live (worst "
        "instance), the allocations of a process's first call (set-up) and those per later "
        "call; all 0 means no heap at run time. Every timed call is preceded by warm-up calls, "
        "so one-time set-up (ECOS allocates and factors its pattern on the first call) is not "
        "in the times.",
        "Compile seconds: the tree's own Makefile, `make -j2` on this machine.",
    ]
    if cfg.capped():
        out.append(f"QOCOGEN capped at N <= {cfg.qoco_max_horizon}: "
                   + QOCO_CAP_REASON.format(cap=cfg.qoco_max_horizon))
    return out
