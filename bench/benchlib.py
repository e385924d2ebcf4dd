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
"""

from __future__ import annotations

import hashlib
import importlib.util
import json
import math
import os
import platform
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from codegen.bind import GeneratedSolver, cdef_text
from codegen.emit import generate
from codegen.errors import InputError
from codegen.fsutil import write_atomic
from codegen.reference import ReferenceSolver
from codegen.model.trajectory import OPTIMAL
from codegen.model.vehicle import load_vehicle

ROOT = Path(__file__).resolve().parent.parent
BENCH_DIR = Path(__file__).resolve().parent
DEMO_VEHICLE = ROOT / "examples" / "demo_vehicle.toml"
RESULTS_DIR = BENCH_DIR / "results"

#: The demo's nominal state and a time of flight feasible at every horizon.
NOMINAL = ((1500.0, 0.0, 1500.0), (-50.0, 0.0, -40.0), 1900.0)
FIXED_TOF_S = 40.0

BACKENDS = ("native", "cvxpygen-ecos", "cvxpygen-qoco")
LABELS = {"native": "native", "cvxpygen-ecos": "ECOS (cvxpygen)",
          "cvxpygen-qoco": "QOCOGEN (cvxpygen)", "reference": "reference (CVXPY+Clarabel)"}
REFERENCE = "reference"

#: Why QOCOGEN stops early. Measured on this project's 2-core machine:
#: N = 5 about 5 s to generate and 20 s to compile; N = 20 about 16-45 s
#: and 160-235 s; N = 50 about 90 s and 160 s (4.6 MB of C). cvxpygen's
#: QOCOGEN path writes the KKT factorisation out as straight-line code, so
#: both grow much faster than the problem. N = 50 is measured by default
#: because the native backend's speed target is stated there.
QOCO_CAP_REASON = ("QOCOGEN writes its KKT factorisation out as straight-line C, so generation "
                   "and compile time grow steeply with N (measured on this 2-core machine: "
                   "N=20 about 16-45 s + 160-235 s, N=50 about 90 s + 160 s); above N={cap} one "
                   "tree alone would take a large share of the 30-minute budget of `make bench`.")

MAX_REPS = 20000

#: Progress lines on the terminal (the smoke test turns them off). Under
#: pytest, bench/conftest.py points "stream" at a copy of the terminal's stderr
#: taken before output capture, so the lines show while the tests run.
PROGRESS = {"terminal": True, "stream": None}


def say(msg: str) -> None:
    """A progress line on the terminal and in $PDGC_BENCH_LOG."""
    line = f"[bench {time.strftime('%H:%M:%S')}] {msg}"
    if PROGRESS["terminal"]:
        stream = PROGRESS["stream"] or sys.__stderr__
        try:
            stream.write(line + "\n")
            stream.flush()
        except (AttributeError, ValueError, OSError):
            pass
    log = os.environ.get("PDGC_BENCH_LOG")
    if log:
        with open(log, "a") as fh:
            fh.write(line + "\n")


# --------------------------------------------------------------------------
# Configuration
# --------------------------------------------------------------------------

def _env_ints(name, default):
    text = os.environ.get(name)
    if not text:
        return tuple(default)
    try:
        return tuple(int(x) for x in text.split(",") if x.strip())
    except ValueError:
        raise InputError(name, text, "must be a comma-separated list of integers") from None


def _env_int(name, default):
    text = os.environ.get(name)
    if not text:
        return default
    try:
        return int(text)
    except ValueError:
        raise InputError(name, text, "must be an integer") from None


def _env_float(name, default):
    text = os.environ.get(name)
    if not text:
        return default
    try:
        return float(text)
    except ValueError:
        raise InputError(name, text, "must be a number") from None


@dataclass
class Config:
    """What to measure. ``from_env`` reads PDGC_BENCH_* overrides."""

    horizons: tuple = (10, 20, 50, 100)
    backends: tuple = BACKENDS
    qoco_max_horizon: int = 50
    instances: int = 8                 # nominal + dispersed, all feasible at FIXED_TOF_S
    seed: int = 2026
    time_of_flight_s: float = FIXED_TOF_S
    c_budget_s: float = 0.3            # C timing per instance and backend (sets repetitions)
    rounds: int = 10                   # the budget is spent in this many rotating rounds
    min_reps: int = 15
    max_reps: int = 3000
    cffi_reps_max: int = 200           # cffi calls per instance and backend
    search_reps: int = 3               # C calls with the time-of-flight search per instance
    reference_reps: int = 3            # reference solves per instance (after one warm-up)
    reference_search: bool = True      # one reference search (nominal) per horizon
    callgrind: bool = True             # instruction counts (valgrind) if available
    progress: bool = True              # progress lines on the terminal
    vehicle_path: Path = DEMO_VEHICLE
    out_dir: Path = RESULTS_DIR
    work_dir: Path = RESULTS_DIR / ".work"

    def __post_init__(self):
        for b in self.backends:
            if b not in BACKENDS:
                raise InputError("backends", b, f"must be one of {', '.join(BACKENDS)}")
        for n in self.horizons:
            if not 2 <= n <= 1000:
                raise InputError("horizons", n, "must lie in 2..1000")
        if self.instances < 1:
            raise InputError("instances", self.instances, "must be at least 1")
        self.horizons = tuple(sorted(set(self.horizons)))
        self.vehicle_path = Path(self.vehicle_path)
        self.out_dir = Path(self.out_dir)
        self.work_dir = Path(self.work_dir)

    @classmethod
    def from_env(cls) -> "Config":
        d = cls()
        backends = os.environ.get("PDGC_BENCH_BACKENDS")
        return cls(horizons=_env_ints("PDGC_BENCH_HORIZONS", d.horizons),
                   backends=tuple(b.strip() for b in backends.split(",")) if backends else d.backends,
                   qoco_max_horizon=_env_int("PDGC_BENCH_QOCO_MAX", d.qoco_max_horizon),
                   instances=_env_int("PDGC_BENCH_INSTANCES", d.instances),
                   c_budget_s=_env_float("PDGC_BENCH_C_BUDGET_S", d.c_budget_s),
                   callgrind=os.environ.get("PDGC_BENCH_CALLGRIND", "1") != "0")

    def backends_at(self, horizon: int) -> list:
        return [b for b in self.backends
                if not (b == "cvxpygen-qoco" and horizon > self.qoco_max_horizon)]

    def capped(self) -> list:
        return [n for n in self.horizons if "cvxpygen-qoco" in self.backends
                and n > self.qoco_max_horizon]


# --------------------------------------------------------------------------
# Instances
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class Instance:
    name: str
    position_m: tuple
    velocity_mps: tuple
    mass_kg: float
    time_of_flight_s: float

    def args(self, search: bool = False):
        return (self.position_m, self.velocity_mps, self.mass_kg,
                None if search else self.time_of_flight_s)

    def line(self, reps: int, warmup: int, search: bool = False) -> str:
        tof = 0.0 if search else self.time_of_flight_s
        nums = list(self.position_m) + list(self.velocity_mps) + [self.mass_kg, tof]
        return " ".join(repr(float(x)) for x in nums) + f" {int(reps)} {int(warmup)}\n"


def make_instances(cfg: Config) -> list:
    """The nominal state, then states drawn uniformly from the vehicle's envelope
    (case i from default_rng([seed, i])), kept when the reference finds the
    fixed time of flight feasible at the smallest and largest horizon."""
    vehicle = load_vehicle(cfg.vehicle_path)
    env = vehicle.envelope
    out = [Instance("nominal", NOMINAL[0], NOMINAL[1], NOMINAL[2], cfg.time_of_flight_s)]
    lo = np.r_[env.position_min_m, env.velocity_min_mps, env.mass_min_kg]
    hi = np.r_[env.position_max_m, env.velocity_max_mps, env.mass_max_kg]
    refs = [ReferenceSolver(vehicle, n) for n in sorted({cfg.horizons[0], cfg.horizons[-1]})]
    i = 0
    while len(out) < cfg.instances and i < 20 * cfg.instances:
        x = lo + (hi - lo) * np.random.default_rng([cfg.seed, i]).random(7)
        inst = Instance(f"draw{i}", tuple(float(v) for v in x[:3]),
                        tuple(float(v) for v in x[3:6]), float(x[6]), cfg.time_of_flight_s)
        if all(r.solve(*inst.args(), fallback=False).status == OPTIMAL for r in refs):
            out.append(inst)
        i += 1
    return out


# --------------------------------------------------------------------------
# Build: generate, compile, measure sizes, link the C harness
# --------------------------------------------------------------------------

@dataclass
class Build:
    backend: str
    horizon: int
    tree: Path
    manifest: dict
    generation_s: float
    compile_s: float
    archive: Path
    harness: Path
    source_bytes_guidance: int
    source_bytes_solver: int
    text_bytes: int
    data_bytes: int
    bss_bytes: int
    sizeof: dict = field(default_factory=dict)

    @property
    def prefix(self) -> str:
        return self.manifest["c_name"]

    @property
    def source_bytes(self) -> int:
        return self.source_bytes_guidance + self.source_bytes_solver


def _cc() -> str:
    return os.environ.get("CC", "cc")


def source_bytes(tree: Path, manifest: dict) -> tuple:
    """Bytes of C sources and headers: (guidance layer + adapter, solver)."""
    guidance = solver = 0
    for rel in manifest["files"]:
        if not rel.endswith((".c", ".h")):
            continue
        n = (tree / rel).stat().st_size
        if rel.startswith("solver/"):
            solver += n
        elif rel.startswith(("src/", "include/")):
            guidance += n
    return guidance, solver


def size_totals(archive: Path) -> tuple:
    """(text, data, bss) of all objects of an archive, from binutils' `size -t`."""
    r = subprocess.run(["size", "-t", str(archive)], capture_output=True, text=True, check=True)
    last = r.stdout.strip().splitlines()[-1].split()
    return int(last[0]), int(last[1]), int(last[2])


def build(cfg: Config, backend: str, horizon: int) -> Build:
    base = cfg.work_dir / f"{backend}-N{horizon}"
    tree = base / "tree"
    say(f"generating {backend} N={horizon}")
    manifest = generate(cfg.vehicle_path, horizon, tree, backend=backend)
    gen_s = float(manifest["generation_seconds"])
    prefix = manifest["c_name"]
    lib = f"build/lib{prefix}_guidance.a"
    shutil.rmtree(tree / "build", ignore_errors=True)
    say(f"compiling {backend} N={horizon} (generated in {gen_s:.1f} s)")
    # The tree's own Makefile, with position-independent code so that the
    # archive links into the cffi module too, and without -Werror: QOCOGEN's
    # headers trip -Wunused-variable in our adapter (the flags do not change
    # the machine code).
    t0 = time.perf_counter()
    r = subprocess.run(["make", "-j2", "CFLAGS=-O2 -fPIC", "STRICT=-std=c99 -Wall -Wextra", lib],
                       cwd=tree, capture_output=True, text=True)
    compile_s = time.perf_counter() - t0
    if r.returncode != 0:
        raise RuntimeError(f"{backend} N={horizon}: make failed:\n{r.stderr[-3000:]}")
    archive = tree / lib
    text, data, bss = size_totals(archive)
    g_bytes, s_bytes = source_bytes(tree, manifest)
    harness = build_harness(tree, manifest, archive, base / "harness")
    b = Build(backend, horizon, tree, manifest, gen_s, compile_s, archive, harness, g_bytes, s_bytes,
              text, data, bss)
    b.sizeof = run_harness(b, [])[0]
    # What the generated header tells its reader the workspace takes (computed
    # in Python at generation time), to set beside the compiler's sizeof.
    header = (tree / "include" / f"{prefix}_guidance.h").read_text()
    m = re.search(r"Caller-owned workspace \((?:about )?(\d+) bytes", header)
    b.sizeof["workspace_bytes_stated"] = int(m.group(1)) if m else None
    say(f"built {backend} N={horizon}: compile {compile_s:.1f} s, text {text} B, "
        f"data+bss {data + bss} B, workspace {b.sizeof['sizeof_workspace']} B")
    return b


def render_harness(prefix: str) -> str:
    import jinja2
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(BENCH_DIR)),
                             undefined=jinja2.StrictUndefined, keep_trailing_newline=True)
    return env.get_template("harness.c.j2").render(prefix=prefix, PREFIX=prefix.upper(),
                                                    max_reps=MAX_REPS)


def build_harness(tree: Path, manifest: dict, archive: Path, out_dir: Path) -> Path:
    prefix = manifest["c_name"]
    out_dir.mkdir(parents=True, exist_ok=True)
    src = out_dir / f"{prefix}_bench_harness.c"
    write_atomic(src, render_harness(prefix))
    exe = out_dir / f"{prefix}_bench_harness"
    b = manifest["build"]
    cmd = [_cc(), "-std=c99", "-O2", "-Wall", "-Wextra"]
    cmd += [f"-I{tree / d}" for d in b["include_dirs"]] + [f"-D{d}" for d in b["defines"]]
    cmd += [str(src), str(archive), "-lm", "-o", str(exe),
            "-Wl,--wrap=malloc,--wrap=free,--wrap=calloc,--wrap=realloc"]
    r = subprocess.run(cmd, capture_output=True, text=True)
    if r.returncode != 0:
        raise RuntimeError(f"harness does not compile:\n{r.stderr[-3000:]}")
    return exe


_NONFINITE = re.compile(r"(?<=[:\s])(-?)(nan|inf)\b", re.IGNORECASE)


def _json_line(text: str) -> dict:
    return json.loads(_NONFINITE.sub(lambda m: "null", text))


def run_harness(b: Build, lines: list, timeout_s: float = 1200.0) -> list:
    """Run the harness on input lines; returns [sizeof record, one record per line]."""
    r = subprocess.run([str(b.harness)], input="".join(lines), capture_output=True, text=True,
                       timeout=timeout_s)
    if r.returncode != 0:
        raise RuntimeError(f"harness {b.harness} failed ({r.returncode}): {r.stderr[-2000:]}")
    return [_json_line(x) for x in r.stdout.splitlines() if x.strip()]


def time_in_c(b: Build, inst: Instance, reps: int, warmup: int = 2, search: bool = False) -> dict:
    return run_harness(b, [inst.line(reps, warmup, search)])[1]


# --------------------------------------------------------------------------
# cffi: the same archive behind the codegen.bind solver interface
# --------------------------------------------------------------------------

class ArchiveSolver(GeneratedSolver):
    """codegen.bind's solver, on a module linked against an already built archive
    (bind itself compiles the sources again, which for QOCOGEN takes minutes).
    ``solve`` is bind's own; only the loading differs."""

    def __init__(self, tree_dir, module):
        super().__init__(tree_dir, module=module)


def load_cffi(b: Build) -> ArchiveSolver:
    import cffi

    prefix = b.prefix
    key = hashlib.sha256((b.tree / "manifest.json").read_bytes()
                         + b.archive.read_bytes()).hexdigest()[:16]
    name = f"_pdgc_bench_{key}"
    mod = sys.modules.get(name)
    if mod is None:
        out = b.tree.parent / "cffi"
        found = sorted(out.glob(f"{name}*.so")) if out.exists() else []
        if not found:
            out.mkdir(parents=True, exist_ok=True)
            ffi = cffi.FFI()
            ffi.cdef(cdef_text(prefix, b.horizon))
            bb = b.manifest["build"]
            macros = [(k, v or None) for k, _, v in (d.partition("=") for d in bb["defines"])]
            ffi.set_source(name, f'#include "{prefix}_guidance.h"\n',
                           include_dirs=[str(b.tree / d) for d in bb["include_dirs"]],
                           define_macros=macros, extra_compile_args=["-O2"],
                           extra_objects=[str(b.archive)], libraries=["m"])
            with tempfile.TemporaryDirectory(prefix="cffi-", dir=out) as tmp:
                so = Path(ffi.compile(tmpdir=tmp, verbose=False))
                shutil.copyfile(so, out / so.name)
            found = sorted(out.glob(f"{name}*.so"))
        spec = importlib.util.spec_from_file_location(name, found[0])
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
        sys.modules[name] = mod
    return ArchiveSolver(b.tree, mod)


# --------------------------------------------------------------------------
# Measurement
# --------------------------------------------------------------------------

def _median(xs):
    xs = [x for x in xs if x is not None and math.isfinite(x)]
    return statistics.median(xs) if xs else math.nan


def _max(xs):
    xs = [x for x in xs if x is not None and math.isfinite(x)]
    return max(xs) if xs else math.nan


def rel_error(x, ref) -> float:
    if x is None or ref is None or not (math.isfinite(x) and math.isfinite(ref)):
        return math.nan
    return abs(x - ref) / max(abs(ref), 1e-12)


def reference_fixed(ref: ReferenceSolver, inst: Instance) -> dict:
    tr = ref.solve(*inst.args(), fallback=False)
    stats = ref.problem("fuel").problem.solver_stats
    core = float(stats.solve_time) if stats is not None and stats.solve_time is not None else math.nan
    return {"status": tr.status, "objective": tr.objective, "iterations": tr.iterations,
            "wall_s": tr.solve_time_s, "core_s": core}


def measure_horizon(cfg: Config, builds: dict, solvers: dict, instances: list) -> dict:
    """Interleaved measurements at one horizon; returns raw per-instance records."""
    n = next(iter(builds.values())).horizon
    vehicle = load_vehicle(cfg.vehicle_path)
    ref = ReferenceSolver(vehicle, n)
    order = [b for b in BACKENDS if b in builds]
    raw = {b: [] for b in order}
    raw[REFERENCE] = []
    say(f"N={n}: calibrating repetitions")
    reps = {}
    for b in order:
        first = time_in_c(builds[b], instances[0], reps=5, warmup=1)
        t = first["median_s"] or 1e-3
        reps[b] = int(min(cfg.max_reps, max(cfg.min_reps, round(cfg.c_budget_s / t))))
    # The cost of crossing from Python into C, without the solver's noise: a
    # call refused at input validation (mass 0 kg), timed in C and through cffi.
    refused = Instance("refused", NOMINAL[0], NOMINAL[1], 0.0, cfg.time_of_flight_s)
    overhead = {}
    for b in order:
        c = time_in_c(builds[b], refused, reps=2000, warmup=50)
        calls = [solvers[b].solve(*refused.args()).solve_time_s for _ in range(2050)][50:]
        overhead[b] = {"c_median_s": c["median_s"], "cffi_median_s": statistics.median(calls),
                       "status_c": c["status"]}
    reference_fixed(ref, instances[0])    # warm-up: CVXPY's first solve compiles the problem
    rounds = max(1, cfg.rounds)
    for i, inst in enumerate(instances):
        runs = {b: [] for b in order}
        calls = {b: [] for b in order}
        walls = {b: [] for b in order}
        last = {}
        # Several short rounds per instance, the backend order rotating each
        # time, so that a burst of load on the shared machine hits all alike.
        for rnd in range(rounds):
            j = (i + rnd) % len(order)
            for b in order[j:] + order[:j]:
                runs[b].append(time_in_c(builds[b], inst, max(1, reps[b] // rounds), warmup=2))
                s = solvers[b]
                tr = s.solve(*inst.args())
                for _ in range(max(1, min(reps[b], cfg.cffi_reps_max) // rounds)):
                    t0 = time.perf_counter()
                    tr = s.solve(*inst.args())
                    walls[b].append(time.perf_counter() - t0)
                    calls[b].append(tr.solve_time_s)
                last[b] = tr
        for b in order:
            c = dict(runs[b][-1])
            c["median_s"] = statistics.median(x["median_s"] for x in runs[b])
            c["p99_s"] = max(x["p99_s"] for x in runs[b])
            c["worst_s"] = max(x["worst_s"] for x in runs[b])
            c["best_s"] = min(x["best_s"] for x in runs[b])
            c["heap_peak_bytes"] = max(x["heap_peak_bytes"] for x in runs[b])
            c["heap_allocations_per_call"] = max(x["heap_allocations_per_call"] for x in runs[b])
            c["heap_allocations_first_call"] = max(x["heap_allocations_first_call"]
                                                   for x in runs[b])
            c["repetitions"] = sum(x["repetitions"] for x in runs[b])
            raw[b].append({"instance": inst.name, "c": c,
                           "cffi_call_median_s": statistics.median(calls[b]),
                           "cffi_call_worst_s": max(calls[b]),
                           "py_solve_median_s": statistics.median(walls[b]),
                           "cffi_reps": len(calls[b]), "cffi_status": last[b].status,
                           "cffi_objective": last[b].objective})
        recs = [reference_fixed(ref, inst) for _ in range(cfg.reference_reps)]
        raw[REFERENCE].append({"instance": inst.name, "status": recs[-1]["status"],
                               "objective": recs[-1]["objective"],
                               "iterations": recs[-1]["iterations"],
                               "wall_median_s": statistics.median(r["wall_s"] for r in recs),
                               "wall_worst_s": max(r["wall_s"] for r in recs),
                               "wall_best_s": min(r["wall_s"] for r in recs),
                               "core_median_s": _median([r["core_s"] for r in recs])})
        say(f"N={n}: fixed time of flight, instance {i + 1}/{len(instances)} done")
    search = {b: [] for b in order}
    for i, inst in enumerate(instances):
        rot = order[i % len(order):] + order[:i % len(order)]
        for b in rot:
            search[b].append(time_in_c(builds[b], inst, cfg.search_reps, warmup=1, search=True))
    say(f"N={n}: time-of-flight search timed in C")
    ref_search = None
    if cfg.reference_search:
        tr = ref.solve(*instances[0].args(search=True), fallback=False)
        ref_search = {"status": tr.status, "objective": tr.objective, "wall_s": tr.solve_time_s,
                      "solves": tr.solves, "time_of_flight_s": tr.time_of_flight_s}
        say(f"N={n}: reference search {tr.solve_time_s:.2f} s ({tr.solves} solves)")
    return {"horizon": n, "reps": reps, "raw": raw, "search": search, "reference_search": ref_search,
            "overhead": overhead}


def summarise(cfg: Config, builds: dict, meas: dict) -> list:
    """Rows of the table at one horizon (generated backends, then the reference)."""
    n = meas["horizon"]
    raw = meas["raw"]
    ref_obj = {r["instance"]: r["objective"] for r in raw[REFERENCE]}
    rows = []
    for b in [x for x in BACKENDS if x in builds]:
        recs = raw[b]
        bd = builds[b]
        srch = meas["search"][b]
        errs = [rel_error(r["c"]["objective"], ref_obj[r["instance"]]) for r in recs]
        rows.append({
            "backend": b, "label": LABELS[b], "horizon": n, "instances": len(recs),
            "optimal": sum(r["c"]["status"] == OPTIMAL for r in recs),
            "optimal_cffi": sum(r["cffi_status"] == OPTIMAL for r in recs),
            "repetitions": meas["reps"][b],
            "median_s": _median([r["c"]["median_s"] for r in recs]),
            "worst_s": _max([r["c"]["worst_s"] for r in recs]),
            "p99_s": _max([r["c"]["p99_s"] for r in recs]),
            "best_s": _median([r["c"]["best_s"] for r in recs]),
            "cffi_call_median_s": _median([r["cffi_call_median_s"] for r in recs]),
            "py_solve_median_s": _median([r["py_solve_median_s"] for r in recs]),
            "call_overhead_s": (meas["overhead"][b]["cffi_median_s"]
                                - meas["overhead"][b]["c_median_s"]),
            "refused_call_c_s": meas["overhead"][b]["c_median_s"],
            "refused_call_cffi_s": meas["overhead"][b]["cffi_median_s"],
            "refused_status": meas["overhead"][b]["status_c"],
            "iterations_median": _median([r["c"]["iterations"] for r in recs]),
            "iterations_max": _max([r["c"]["iterations"] for r in recs]),
            "rel_objective_error_max": _max(errs),
            "cffi_matches_c": all(r["cffi_objective"] == r["c"]["objective"]
                                  or rel_error(r["cffi_objective"], r["c"]["objective"]) < 1e-12
                                  for r in recs),
            "search_median_s": _median([s["median_s"] for s in srch]),
            "search_worst_s": _max([s["worst_s"] for s in srch]),
            "search_solves_median": _median([s["solves"] for s in srch]),
            "search_optimal": sum(s["status"] == OPTIMAL for s in srch),
            "source_bytes_guidance": bd.source_bytes_guidance,
            "source_bytes_solver": bd.source_bytes_solver,
            "source_bytes": bd.source_bytes,
            "text_bytes": bd.text_bytes, "data_bytes": bd.data_bytes, "bss_bytes": bd.bss_bytes,
            "static_ram_bytes": bd.data_bytes + bd.bss_bytes,
            "heap_peak_bytes": _max([r["c"].get("heap_peak_bytes") for r in recs]),
            "heap_allocations_per_call": _max([r["c"].get("heap_allocations_per_call")
                                               for r in recs]),
            "heap_allocations_first_call": _max([r["c"].get("heap_allocations_first_call")
                                                 for r in recs]),
            "workspace_bytes": bd.sizeof.get("sizeof_workspace"),
            "workspace_bytes_stated": bd.sizeof.get("workspace_bytes_stated"),
            "plan_bytes": bd.sizeof.get("sizeof_plan"),
            "generation_s": bd.generation_s, "compile_s": bd.compile_s,
        })
    rr = raw[REFERENCE]
    rs = meas.get("reference_search") or {}
    rows.append({
        "backend": REFERENCE, "label": LABELS[REFERENCE], "horizon": n, "instances": len(rr),
        "optimal": sum(r["status"] == OPTIMAL for r in rr), "repetitions": cfg.reference_reps,
        "median_s": _median([r["wall_median_s"] for r in rr]),
        "worst_s": _max([r["wall_worst_s"] for r in rr]),
        "best_s": _median([r["wall_best_s"] for r in rr]),
        "core_median_s": _median([r["core_median_s"] for r in rr]),
        "iterations_median": _median([r["iterations"] for r in rr]),
        "iterations_max": _max([r["iterations"] for r in rr]),
        "rel_objective_error_max": 0.0,
        "search_median_s": rs.get("wall_s", math.nan), "search_worst_s": rs.get("wall_s", math.nan),
        "search_solves_median": rs.get("solves", math.nan),
    })
    native = next((r for r in rows if r["backend"] == "native"), None)
    for r in rows:
        r["ratio_to_native"] = (r["median_s"] / native["median_s"]) if native else math.nan
        r["best_ratio_to_native"] = ((r["best_s"] / native["best_s"])
                                     if native and r.get("best_s") else math.nan)
        r["search_ratio_to_native"] = ((r["search_median_s"] / native["search_median_s"])
                                       if native else math.nan)
    return rows


def fit_exponent(horizons, values) -> float:
    """Least-squares slope of log(value) against log(N): value ~ c N^slope."""
    pts = [(math.log(n), math.log(v)) for n, v in zip(horizons, values)
           if v is not None and math.isfinite(v) and v > 0]
    if len(pts) < 2:
        return math.nan
    x = np.array([p[0] for p in pts])
    y = np.array([p[1] for p in pts])
    slope, _ = np.polyfit(x, y, 1)
    return float(slope)


def growth(rows: list) -> dict:
    out = {}
    for b in BACKENDS + (REFERENCE,):
        rs = sorted((r for r in rows if r["backend"] == b), key=lambda r: r["horizon"])
        if not rs:
            continue
        ns = [r["horizon"] for r in rs]
        out[b] = {"horizons": ns,
                  "time_exponent": fit_exponent(ns, [r["median_s"] for r in rs]),
                  "source_exponent": (fit_exponent(ns, [r["source_bytes"] for r in rs])
                                      if b != REFERENCE else math.nan),
                  "instructions_exponent": fit_exponent(ns, [r.get("instructions") or math.nan
                                                             for r in rs])}
    return out


def callgrind_ir(b: Build, inst: Instance) -> int | None:
    """Instructions executed by one fixed-time-of-flight call, under valgrind's callgrind."""
    if shutil.which("valgrind") is None:
        return None
    with tempfile.TemporaryDirectory(prefix="cg-") as tmp:
        out = Path(tmp) / "callgrind.out"
        r = subprocess.run(["valgrind", "--tool=callgrind", f"--callgrind-out-file={out}",
                            f"--toggle-collect={b.prefix}_plan_descent", str(b.harness)],
                           input=inst.line(1, 0), capture_output=True, text=True, timeout=1800)
        if r.returncode != 0 or not out.exists():
            return None
        for line in out.read_text().splitlines():
            if line.startswith(("totals:", "summary:")):
                return int(line.split()[1])
    return None


# --------------------------------------------------------------------------
# The whole run (used by the smoke test; the pytest suite drives the same steps)
# --------------------------------------------------------------------------

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
            "cc": cc[0] if cc else "", "git_commit": _git("rev-parse", "--short", "HEAD"),
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
        "Machine code: `size -t` text (code + read-only data) of the compiled archive "
        "(-O2 -fPIC); static RAM: data + bss of the same. The native backend keeps all its state "
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


# --------------------------------------------------------------------------
# Output: table, files, plot
# --------------------------------------------------------------------------

def _t(x) -> str:
    """A time in engineering units."""
    if x is None or not isinstance(x, (int, float)) or not math.isfinite(x):
        return "-"
    if x >= 1.0:
        return f"{x:.2f} s"
    if x >= 1e-3:
        return f"{x * 1e3:.3g} ms"
    return f"{x * 1e6:.3g} us"


def _n(x, fmt="{:,.0f}") -> str:
    if x is None or not isinstance(x, (int, float)) or not math.isfinite(x):
        return "-"
    return fmt.format(x)


def _bytes(x) -> str:
    return _n(x)


def table_markdown(results: dict) -> str:
    rows = results["rows"]
    cfg = results["config"]
    meta = results["meta"]
    lines = ["# pdgc benchmark: latest run", "",
             f"Run {meta['date_utc']}, {meta['elapsed_s']:.0f} s, commit {meta['git_commit']}"
             + (" (with uncommitted changes in codegen/ or templates/)"
                if meta["codegen_or_templates_modified"] else "")
             + f"; {meta['cpus']} CPUs ({meta['cpu']}), {meta['cc']}; "
             f"load average at start {meta['load_average_start'][0]}, at end "
             f"{meta['load_average_end'][0]} (a shared machine: read the ratios).", "",
             f"Horizons {', '.join(map(str, cfg['horizons']))}; {len(results['instances'])} "
             f"instances; fixed time of flight {cfg['time_of_flight_s']:g} s.", "",
             "## Solve time and accuracy (fixed time of flight)", "",
             "| N | backend | median | worst (p99) | x native | best | best x native | "
             "cffi call (overhead) | Python solve() | "
             "iterations med/max | rel. objective error | optimal | search median (solves) | "
             "search x native |",
             "|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for r in rows:
        cffi = (f"{_t(r.get('cffi_call_median_s'))} (+{_t(r.get('call_overhead_s'))})"
                if r["backend"] != REFERENCE else f"core {_t(r.get('core_median_s'))}")
        lines.append(
            f"| {r['horizon']} | {r['label']} | {_t(r['median_s'])} | {_t(r['worst_s'])}"
            + (f" ({_t(r['p99_s'])})" if r.get("p99_s") else "") + " | "
            f"{_n(r['ratio_to_native'], '{:.2f}')} | {_t(r.get('best_s'))} | "
            f"{_n(r.get('best_ratio_to_native'), '{:.2f}')} | {cffi} | "
            f"{_t(r.get('py_solve_median_s'))} | "
            f"{_n(r['iterations_median'], '{:.0f}')}/{_n(r['iterations_max'], '{:.0f}')} | "
            f"{_n(r['rel_objective_error_max'], '{:.1e}')} | {r['optimal']}/{r['instances']} | "
            f"{_t(r['search_median_s'])} ({_n(r['search_solves_median'], '{:.0f}')}) | "
            f"{_n(r['search_ratio_to_native'], '{:.2f}')} |")
    lines += ["", "## Size, memory, build", "",
              "| N | backend | source bytes (solver + guidance) | machine code (text) | "
              "static RAM (data+bss) | workspace sizeof (header says) | heap peak (allocations: "
              "first call, per later call) | generation | compile |",
              "|---:|---|---:|---:|---:|---:|---:|---:|---:|"]
    for r in rows:
        if r["backend"] == REFERENCE:
            continue
        lines.append(
            f"| {r['horizon']} | {r['label']} | {_bytes(r['source_bytes'])} "
            f"({_bytes(r['source_bytes_solver'])} + {_bytes(r['source_bytes_guidance'])}) | "
            f"{_bytes(r['text_bytes'])} | {_bytes(r['static_ram_bytes'])} | "
            f"{_bytes(r['workspace_bytes'])} ({_bytes(r.get('workspace_bytes_stated'))}) | "
            f"{_bytes(r.get('heap_peak_bytes'))} "
            f"({_n(r.get('heap_allocations_first_call'))}, "
            f"{_n(r.get('heap_allocations_per_call'), '{:.3g}')}) | "
            f"{r['generation_s']:.1f} s | {r['compile_s']:.1f} s |")
    lines += ["", "## Growth with the horizon (least squares on log-log)", "",
              "| backend | horizons | solve time ~ N^k, k | instructions ~ N^k, k | "
              "source bytes ~ N^k, k |",
              "|---|---|---:|---:|---:|"]
    for b, g in results["growth"].items():
        lines.append(f"| {LABELS[b]} | {', '.join(map(str, g['horizons']))} | "
                     f"{_n(g['time_exponent'], '{:.2f}')} | "
                     f"{_n(g.get('instructions_exponent'), '{:.2f}')} | "
                     f"{_n(g['source_exponent'], '{:.2f}')} |")
    ratios = headline_ratios(results)
    if ratios:
        lines += ["", "## Headline ratios (native time / other time, same run)", ""]
        for line in ratios:
            lines.append(f"- {line}")
    counted = [r for r in rows if r.get("instructions")]
    if counted:
        lines += ["", "## Instructions per call (valgrind callgrind: nominal instance, fixed time "
                  "of flight, inside <prefix>_plan_descent; independent of the machine's load)", "",
                  "| N | backend | instructions | x native |", "|---:|---|---:|---:|"]
        for r in counted:
            lines.append(f"| {r['horizon']} | {r['label']} | {_n(r['instructions'])} | "
                         f"{_n(r.get('instructions_ratio_to_native'), '{:.2f}')} |")
    if results.get("failures"):
        lines += ["", "## FAILED in this run", ""]
        lines += [f"- {k}: {v.splitlines()[0][:300]}" for k, v in results["failures"].items()]
    lines += ["", "## Notes", ""] + [f"- {x}" for x in results["notes"]]
    return "\n".join(lines) + "\n"


def headline_ratios(results: dict) -> list:
    """native/other per horizon, in wall time and (when counted) in instructions."""
    rows = results["rows"]
    by = {(r["backend"], r["horizon"]): r for r in rows}
    out = []
    for n in sorted({r["horizon"] for r in rows}):
        nat = by.get(("native", n))
        if nat is None:
            continue
        for b in ("cvxpygen-qoco", "cvxpygen-ecos", REFERENCE):
            o = by.get((b, n))
            if o is None or not (o["median_s"] > 0):
                continue
            line = (f"N={n}: native/{LABELS[b]} = {nat['median_s'] / o['median_s']:.3f} "
                    f"({LABELS[b]} takes {o['median_s'] / nat['median_s']:.2f}x the native time)")
            if o.get("best_s") and nat.get("best_s"):
                line += f"; best calls native/{LABELS[b]} = {nat['best_s'] / o['best_s']:.3f}"
            if o.get("instructions") and nat.get("instructions"):
                line += (f"; in instructions native/{LABELS[b]} = "
                         f"{nat['instructions'] / o['instructions']:.3f}")
            out.append(line)
        q = "cvxpygen-qoco"
        gq = results["growth"].get(q)
        if (q, n) in by or not gq:
            continue
        top = max(gq["horizons"])
        guesses = []
        for key, field_, what, mine in (("time_exponent", "median_s", "time", nat["median_s"]),
                                        ("instructions_exponent", "instructions", "instructions",
                                         nat.get("instructions"))):
            k = gq.get(key)
            base = by[(q, top)].get(field_)
            if k is None or not math.isfinite(k) or not base or not mine:
                continue
            guesses.append(f"{mine / (base * (n / top) ** k):.2f} from its {what} fit "
                           f"(k={k:.2f} over N={', '.join(map(str, gq['horizons']))})")
        if guesses:
            out.append(f"N={n}: native/{LABELS[q]} NOT MEASURED (QOCOGEN capped at N={top}); "
                       f"extrapolated, an estimate only: about " + "; ".join(guesses))
    return out


def plot_growth(results: dict, path: Path) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = results["rows"]
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 4.2))
    styles = {"native": "o-", "cvxpygen-ecos": "s-", "cvxpygen-qoco": "^-", REFERENCE: "d--"}
    for b in BACKENDS + (REFERENCE,):
        rs = sorted((r for r in rows if r["backend"] == b), key=lambda r: r["horizon"])
        if not rs:
            continue
        ns = [r["horizon"] for r in rs]
        k = results["growth"].get(b, {}).get("time_exponent", math.nan)
        lab = LABELS[b] + (f" (k={k:.2f})" if math.isfinite(k) else "")
        ax1.plot(ns, [r["median_s"] for r in rs], styles[b], label=lab)
        if b != REFERENCE:
            ks = results["growth"].get(b, {}).get("source_exponent", math.nan)
            ax2.plot(ns, [r["source_bytes"] for r in rs], styles[b],
                     label=LABELS[b] + (f" (k={ks:.2f})" if math.isfinite(ks) else ""))
    for ax, title, ylabel in ((ax1, "Solve time, fixed time of flight (median)", "seconds"),
                              (ax2, "Generated C source (solver + guidance)", "bytes")):
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("horizon N")
        ax.set_ylabel(ylabel)
        ax.set_title(title, fontsize=10)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=8)
    fig.suptitle(f"pdgc bench {results['meta']['date_utc']} (shared machine: compare ratios)",
                 fontsize=9)
    fig.tight_layout()
    import io
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, metadata={"Software": None})
    plt.close(fig)
    write_atomic(path, buf.getvalue())


def _jsonable(x):
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, (np.floating, np.integer)):
        return _jsonable(x.item())
    return x


def write_results(results: dict, out_dir: Path) -> dict:
    """latest.json, latest.md and growth.png in out_dir; returns their paths."""
    out_dir = Path(out_dir)
    paths = {"json": out_dir / "latest.json", "md": out_dir / "latest.md",
             "png": out_dir / "growth.png"}
    write_atomic(paths["json"], json.dumps(_jsonable(results), indent=2, sort_keys=True) + "\n")
    write_atomic(paths["md"], table_markdown(results))
    plot_growth(results, paths["png"])
    return paths
