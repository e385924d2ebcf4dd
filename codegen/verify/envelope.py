"""Envelope campaign: a dispersed Monte Carlo run of a generated solver.

A campaign draws N cases from a dispersion file (:mod:`codegen.verify.dispersions`),
solves every case with the generated solver and, on every M-th case and on
every case whose status or iteration count stands out, with the reference too.
Each finished case is one JSON line appended to ``RUN_DIR/results.jsonl``
(one ``write`` + flush + fsync per record), beside ``RUN_DIR/manifest.json``
that fixes what the run is. Running the same command again resumes: cases
already recorded are not solved again, a torn last line (a kill mid-write) is
dropped and that case is solved again.

Everything in a record but the measured times (:data:`MEASURED_KEYS`) is a
function of (solver tree, dispersions, seed, case index, reference-every,
stand-out threshold) alone: workers open the solvers themselves from the tree
(compiled solvers do not pickle), and case inputs come from (seed, index).
So the local process pool, a Dask cluster, any worker count and any number of
interruptions give the same records.

Engines: :func:`run_local` (a process pool; ``workers == 1`` runs in this
process) and :func:`run_dask` (a ``distributed`` scheduler at an address).
"""

from __future__ import annotations

import json
import math
import os
import shlex
import sys
import threading
import time
from collections import deque
from dataclasses import dataclass, replace
from pathlib import Path

from codegen import __version__
from codegen.verify.dispersions import Dispersions
from codegen.errors import InputError
from codegen.fsutil import PACKAGE_DIR, complete_lines, write_atomic
from codegen.model.trajectory import OPTIMAL, SOLVED

RUN_FORMAT = "pdgc-envelope-run/1"
RESULTS_NAME = "results.jsonl"
MANIFEST_NAME = "manifest.json"

#: Record keys that hold measured times: they differ between two runs of the
#: same case and are left out when records are compared.
MEASURED_KEYS = ("solve_time_s", "wall_s")

#: Cases of the run used to set the stand-out threshold when none is given:
#: the threshold is STAND_OUT_FACTOR times the median of their most
#: iterations in one solve (rounded up).
CALIBRATION_CASES = 16
STAND_OUT_FACTOR = 1.5

#: Backend name in a tree's manifest.json that marks a dry-run tree: the
#: "generated" solver is then the reference itself (tests, and trying a
#: dispersion file before a solver is generated).
DRY_RUN_BACKEND = "reference"


# -- opening solvers ------------------------------------------------------------

def read_tree(solver_dir) -> dict:
    """Read ``DIR/manifest.json`` of a solver tree; InputError if unusable."""
    d = Path(solver_dir)
    man_path = d / "manifest.json"
    try:
        raw = man_path.read_bytes()
    except OSError as exc:
        raise InputError("DIR", str(solver_dir),
                         f"must be a solver tree with a manifest.json ({exc.strerror})") from None
    try:
        man = json.loads(raw)
    except json.JSONDecodeError as exc:
        raise InputError("DIR", str(man_path), f"manifest.json is not valid JSON: {exc}") from None
    for key in ("backend", "horizon"):
        if key not in man:
            raise InputError(f"{man_path}: {key}", None, "missing from the solver tree's manifest")
    if not (d / "vehicle.toml").is_file():
        raise InputError("DIR", str(solver_dir), "must hold vehicle.toml (the vehicle it was generated for)")
    import hashlib
    man["_sha256"] = hashlib.sha256(raw).hexdigest()
    return man


def open_solvers(solver_dir, thrust_derate: float | None = None):
    """Open ``(generated, reference)`` for the tree in ``solver_dir``.

    The generated solver comes from :func:`codegen.bind.load_solver`. A tree
    whose manifest says backend ``"reference"`` is a dry-run tree (used by the
    tests, and to try a dispersion file before any C exists): its "generated"
    solver is a :class:`~codegen.reference.ReferenceSolver` for the tree's
    vehicle and horizon, named ``dry-run``.

    With ``thrust_derate`` the vehicle's ``thrust_max_n`` is scaled by it. The
    reference takes that by being built on a derated copy of the vehicle; a
    compiled solver has the vehicle baked in, so it is refused (InputError
    naming the field) unless it declares ``supports_thrust_derate`` and offers
    ``derated(fraction) -> solver``.
    """
    from codegen.reference import ReferenceSolver
    from codegen.model.vehicle import load_vehicle

    man = read_tree(solver_dir)
    vehicle = load_vehicle(Path(solver_dir) / "vehicle.toml")
    horizon = int(man["horizon"])
    if thrust_derate is not None:
        vehicle = replace(vehicle, thrust_max_n=vehicle.thrust_max_n * thrust_derate)
    reference = FreshEachCase(ReferenceSolver(vehicle, horizon))
    if man["backend"] == DRY_RUN_BACKEND:
        generated = FreshEachCase(ReferenceSolver(vehicle, horizon), name="dry-run")
    else:
        generated = _load_generated(solver_dir, man)
        if thrust_derate is not None:
            if not getattr(generated, "supports_thrust_derate", False):
                raise InputError("thrust_derate", thrust_derate, derate_refusal(solver_dir, man))
            generated = generated.derated(thrust_derate)
    return generated, reference


def _load_generated(solver_dir, man):
    """The compiled solver of a generated tree (codegen.bind)."""
    try:
        from codegen.bind import load_solver
    except ModuleNotFoundError as exc:
        if exc.name != "codegen.bind":
            raise
        raise InputError("DIR", str(solver_dir),
                         f"is a generated tree (backend {man['backend']}) but this installation "
                         "has no codegen.bind to load it") from None
    return load_solver(solver_dir)


class FreshEachCase:
    """A reference solver that starts every case as a new instance would.

    CVXPY keeps the solver of a problem between solves and, with
    ``warm_start=True`` (its default), updates it in place; the answer of a
    case then depended on the cases the instance had solved before (seen: a
    few iterations and ~1e-3 relative fuel between a fresh and a used
    instance). A campaign must not depend on which worker ran what before,
    and its replay line (``pdgc solve``, a fresh process) must give the same
    answer. The reference passes ``warm_start=False``, CVXPY's public switch,
    on every solve (and refuses a ``warm_start`` option), so each solve builds
    a new Clarabel or ECOS solver from the problem data; what the instance
    keeps between cases is the compiled problem, whose data are a function of
    the parameters alone. tests/test_envelope.py checks that a used instance
    answers as a fresh one, byte for byte.
    """

    def __init__(self, solver, name: str | None = None):
        self._solver = solver
        self.name = name or solver.name
        self.vehicle = solver.vehicle
        self.horizon = solver.horizon

    def solve(self, *args, **kwargs):
        # Without the two-stage fallback: generated code has none, so a target
        # out of reach must read "infeasible" on both sides of the comparison.
        kwargs.setdefault("fallback", False)
        return self._solver.solve(*args, **kwargs)


def derate_refusal(solver_dir, man) -> str:
    return (f"the generated solver in {solver_dir} (backend {man['backend']}) has thrust_max_n "
            "baked in and takes no derating at run time; remove [thrust_derate] from the "
            "dispersion file, or generate a solver for the derated vehicle")


def check_derate_supported(solver_dir, dispersions: Dispersions) -> None:
    """Refuse a derating campaign up front when the solver cannot take it."""
    if dispersions.thrust_derate is None:
        return
    man = read_tree(solver_dir)
    if man["backend"] == DRY_RUN_BACKEND:
        return
    if not getattr(_load_generated(solver_dir, man), "supports_thrust_derate", False):
        raise InputError("thrust_derate", dispersions.thrust_derate.describe(),
                         derate_refusal(solver_dir, man))


# -- one case ---------------------------------------------------------------------

@dataclass(frozen=True)
class CaseContext:
    """What a worker needs to run any case: plain data, picklable."""

    solver_dir: str
    dispersions: Dispersions
    reference_every: int
    stand_out_iterations: int


_local = threading.local()


def _solvers(solver_dir: str, derate):
    """Per-thread cache of the undamaged solvers; derated ones are built per case."""
    if derate is not None:
        return open_solvers(solver_dir, derate)
    cache = getattr(_local, "cache", None)
    if cache is None:
        cache = _local.cache = {}
    if solver_dir not in cache:
        cache[solver_dir] = open_solvers(solver_dir)
    return cache[solver_dir]


def _num(x):
    return None if x is None or not math.isfinite(x) else float(x)


def outcome(traj) -> dict:
    """The scalar part of a Trajectory that a campaign records."""
    return {
        "status": traj.status,
        "iterations": int(traj.iterations),
        "iterations_max": int(traj.iterations_max),
        "iterations_total": int(traj.iterations_total),
        "solves": int(traj.solves),
        "solve_time_s": float(traj.solve_time_s),
        "fuel_kg": _num(traj.fuel_kg),
        "time_of_flight_s": _num(traj.time_of_flight_s),
        "landing_miss_m": _num(traj.landing_miss_m),
        "objective": _num(traj.objective),
        "message": traj.message,
    }


def accuracy(gen: dict, ref: dict) -> dict:
    """Generated against reference: signed differences (generated - reference)."""
    out = {"status_match": gen["status"] == ref["status"], "fuel_diff_kg": None,
           "fuel_rel_diff": None, "time_of_flight_diff_s": None, "objective_rel_diff": None,
           "landing_miss_diff_m": None}
    if gen["status"] in SOLVED and ref["status"] in SOLVED:
        out["fuel_diff_kg"] = gen["fuel_kg"] - ref["fuel_kg"]
        out["fuel_rel_diff"] = out["fuel_diff_kg"] / ref["fuel_kg"] if ref["fuel_kg"] else None
        out["time_of_flight_diff_s"] = gen["time_of_flight_s"] - ref["time_of_flight_s"]
        if ref["objective"]:
            out["objective_rel_diff"] = (gen["objective"] - ref["objective"]) / abs(ref["objective"])
        out["landing_miss_diff_m"] = gen["landing_miss_m"] - ref["landing_miss_m"]
    return out


def reference_reasons(ctx: CaseContext, index: int, gen: dict) -> list:
    why = []
    if ctx.reference_every > 0 and index % ctx.reference_every == 0:
        why.append("every_m")
    if gen["status"] != OPTIMAL:
        why.append("status")
    if ctx.stand_out_iterations > 0 and gen["iterations_max"] > ctx.stand_out_iterations:
        why.append("iterations")
    return why


def run_case(ctx: CaseContext, index: int) -> dict:
    """Solve case ``index`` and return its record (a JSON-ready dict)."""
    t0 = time.perf_counter()
    case = ctx.dispersions.case(index)
    generated, reference = _solvers(ctx.solver_dir, case.thrust_derate)
    args = (list(case.position_m), list(case.velocity_mps), case.mass_kg, case.time_of_flight_s)
    gen = outcome(generated.solve(*args))
    why = reference_reasons(ctx, index, gen)
    ref = acc = None
    if why:
        # Without the two-stage fallback: the generated code has none, so a
        # target out of reach must read "infeasible" on both sides.
        ref = outcome(reference.solve(*args))
        acc = accuracy(gen, ref)
    return {"case": index, "inputs": case.as_dict(), "generated": gen, "reference": ref,
            "reference_why": why, "accuracy": acc, "wall_s": time.perf_counter() - t0}


def strip_measured(record):
    """A copy of ``record`` without measured times (for comparing runs)."""
    if isinstance(record, dict):
        return {k: strip_measured(v) for k, v in record.items() if k not in MEASURED_KEYS}
    if isinstance(record, list):
        return [strip_measured(v) for v in record]
    return record


# -- engines ------------------------------------------------------------------------

_worker_ctx = None


def _pool_init(ctx: CaseContext) -> None:
    global _worker_ctx
    _worker_ctx = ctx


def _pool_run(index: int) -> dict:
    return run_case(_worker_ctx, index)


def run_local(ctx: CaseContext, indices, workers: int, on_record) -> None:
    """Run ``indices`` on a local process pool (in this process if workers == 1)."""
    indices = list(indices)
    if workers <= 1:
        for i in indices:
            on_record(run_case(ctx, i))
        return
    import multiprocessing
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    # spawn: a fresh interpreter per worker; nothing compiled or loaded in this
    # process is shared with the workers.
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=_pool_init, initargs=(ctx,))
    todo = deque(indices)
    running = set()
    try:
        while todo or running:
            while todo and len(running) < 4 * workers:
                running.add(pool.submit(_pool_run, todo.popleft()))
            done, running = wait(running, return_when=FIRST_COMPLETED)
            for fut in done:
                on_record(fut.result())
    finally:
        pool.shutdown(wait=not running, cancel_futures=True)


def run_dask(ctx: CaseContext, indices, address: str, on_record) -> None:
    """Run ``indices`` on the Dask distributed scheduler at ``address``."""
    try:
        from distributed import Client, as_completed
    except ImportError:  # pragma: no cover - dask is a dependency
        raise InputError("--scheduler", address, "needs the 'distributed' package") from None
    try:
        client = Client(address, timeout=30, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise InputError("--scheduler", address, f"cannot connect to a Dask scheduler: {exc}") from None
    try:
        threads = max(1, sum(client.nthreads().values()))
        todo = deque(indices)
        if not todo:
            return

        def submit_one():
            return client.submit(run_case, ctx, todo.popleft(), pure=False)

        window = as_completed([submit_one() for _ in range(min(len(todo), 4 * threads))],
                              loop=client.loop)
        for fut in window:
            on_record(fut.result())
            fut.release()
            if todo:
                window.add(submit_one())
    finally:
        client.close()


# -- the results log --------------------------------------------------------------

def read_results(path) -> list:
    """Records of ``results.jsonl``; a torn last line is cut off the file.

    A line that ends with a newline was written whole (one write per record);
    only the text after the last newline can be torn by a kill, and it is
    removed so that the next append starts on a fresh line.
    """
    records = []
    for n, line in complete_lines(path):
        try:
            rec = json.loads(line)
        except json.JSONDecodeError as exc:
            raise InputError(f"{path}: line {n}", line[:60].decode("utf-8", "replace"),
                             f"is not a JSON record ({exc.msg}); the results file is damaged") from None
        if not isinstance(rec, dict) or not isinstance(rec.get("case"), int):
            raise InputError(f"{path}: line {n}", line[:60].decode("utf-8", "replace"),
                             "is not a case record")
        records.append(rec)
    return records


class ResultsLog:
    """Append-only JSONL: one ``os.write`` of a whole line, then fsync."""

    def __init__(self, path):
        self.path = Path(path)
        self.fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)

    def append(self, record: dict) -> None:
        line = (json.dumps(record, separators=(",", ":"), allow_nan=False) + "\n").encode()
        view = memoryview(line)
        while view:
            view = view[os.write(self.fd, view):]
        os.fsync(self.fd)

    def close(self) -> None:
        os.close(self.fd)


# -- progress -----------------------------------------------------------------------

def _hms(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "--:--"
    s = int(round(seconds))
    h, s = divmod(s, 3600)
    m, s = divmod(s, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m:02d}:{s:02d}"


class Progress:
    """A progress bar with rate and ETA on stderr.

    On a terminal it redraws one line; otherwise it prints a line every
    ``every_s`` seconds (log files stay short)."""

    def __init__(self, total: int, done: int = 0, stream=None, enabled: bool = True,
                 every_s: float = 10.0):
        self.total, self.done, self.start_done = total, done, done
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = enabled
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.every_s = 0.2 if self.tty else every_s
        self.t0 = time.monotonic()
        self.last = -math.inf

    def line(self) -> str:
        elapsed = time.monotonic() - self.t0
        new = self.done - self.start_done
        rate = new / elapsed if elapsed > 0 and new else 0.0
        eta = (self.total - self.done) / rate if rate else math.inf
        frac = self.done / self.total if self.total else 1.0
        width = 30
        bar = "#" * int(frac * width) + "." * (width - int(frac * width))
        return (f"[{bar}] {self.done}/{self.total} {100 * frac:5.1f}%  "
                f"{rate:6.1f} cases/s  elapsed {_hms(elapsed)}  ETA {_hms(eta)}")

    def update(self, n: int = 1, force: bool = False) -> None:
        self.done += n
        now = time.monotonic()
        if not self.enabled or (not force and now - self.last < self.every_s):
            return
        self.last = now
        if self.tty:
            self.stream.write("\r" + self.line())
        else:
            self.stream.write(self.line() + "\n")
        self.stream.flush()

    def finish(self) -> None:
        self.update(0, force=True)
        if self.enabled and self.tty:
            self.stream.write("\n")
            self.stream.flush()


# -- the run ------------------------------------------------------------------------

#: Manifest fields that must not change when a run is resumed.
IDENTITY = ("solver_dir", "solver_manifest_sha256", "vehicle_sha256", "seed", "dispersions",
            "reference_every", "stand_out_iterations")


def code_sha256() -> str:
    """Hash of the pdgc package's Python sources (the reference and the
    parameter map live there): a run resumed under other code is flagged."""
    import hashlib
    h = hashlib.sha256()
    pkg = PACKAGE_DIR
    for f in sorted(pkg.rglob("*.py")):
        h.update(str(f.relative_to(pkg)).encode() + b"\0" + f.read_bytes() + b"\0")
    return h.hexdigest()


def calibrate_stand_out(solver_dir: str, dispersions: Dispersions, cases: int) -> int:
    """Stand-out threshold from the first few cases (deterministic)."""
    n = min(cases, CALIBRATION_CASES)
    if n == 0:
        return 0
    generated, _ = open_solvers(solver_dir)
    counts = []
    for i in range(n):
        c = dispersions.case(i)
        if c.thrust_derate is not None:
            generated, _ = open_solvers(solver_dir, c.thrust_derate)
        tr = generated.solve(list(c.position_m), list(c.velocity_mps), c.mass_kg, c.time_of_flight_s)
        counts.append(tr.iterations_max)
    counts.sort()
    median = counts[(n - 1) // 2]
    return max(1, math.ceil(STAND_OUT_FACTOR * median))


def prepare_run(run_dir, solver_dir, dispersions: Dispersions, dispersions_path, cases: int,
                reference_every: int, stand_out_iterations: int | None) -> dict:
    """Create or check ``RUN_DIR/manifest.json``; return the manifest."""
    if isinstance(cases, bool) or not isinstance(cases, int) or cases < 1:
        raise InputError("--cases", cases, "must be an integer >= 1")
    if isinstance(reference_every, bool) or not isinstance(reference_every, int) or reference_every < 0:
        raise InputError("--reference-every", reference_every,
                         "must be an integer >= 0 (0: only on cases that stand out)")
    if stand_out_iterations is not None and stand_out_iterations < 1:
        raise InputError("--stand-out-iterations", stand_out_iterations, "must be an integer >= 1")
    from codegen.model.vehicle import load_vehicle
    solver_dir = str(Path(solver_dir).resolve())
    tree = read_tree(solver_dir)
    vehicle = load_vehicle(Path(solver_dir) / "vehicle.toml")
    # Check the dispersions against the tree's vehicle (mass range).
    from codegen.verify.dispersions import parse_dispersions
    parse_dispersions(_as_file_dict(dispersions), vehicle)
    check_derate_supported(solver_dir, dispersions)

    run_dir = Path(run_dir)
    man_path = run_dir / MANIFEST_NAME
    old = None
    if man_path.exists():
        try:
            old = json.loads(man_path.read_text())
        except json.JSONDecodeError as exc:
            raise InputError("--out", str(run_dir), f"has a damaged {MANIFEST_NAME}: {exc}") from None
        if old.get("format") != RUN_FORMAT:
            raise InputError("--out", str(run_dir), f"holds no pdgc envelope run ({RUN_FORMAT})")
    elif run_dir.exists() and any(run_dir.iterdir()):
        raise InputError("--out", str(run_dir), "exists, is not empty and holds no envelope run; "
                         "choose a new directory")

    man = {
        "format": RUN_FORMAT,
        "pdgc_version": __version__,
        "code_sha256": code_sha256(),
        "solver_dir": solver_dir,
        "solver_backend": tree["backend"],
        "solver_manifest_sha256": tree["_sha256"],
        "horizon": int(tree["horizon"]),
        "vehicle_sha256": vehicle.source_sha256,
        "dispersions_file": str(Path(dispersions_path).resolve()) if dispersions_path else None,
        "dispersions": dispersions.as_dict(),
        "seed": dispersions.seed,
        "cases": cases,
        "reference_every": reference_every,
        "stand_out_iterations": stand_out_iterations,
    }
    if old is not None:
        if stand_out_iterations is None:
            man["stand_out_iterations"] = old.get("stand_out_iterations")
        for key in IDENTITY:
            if old.get(key) != man[key]:
                shown = man[key] if key != "dispersions" else "(the dispersion file's distributions)"
                raise InputError(key if key != "dispersions" else "--dispersions", shown,
                                 f"differs from the run in {run_dir} "
                                 f"({'its own' if key == 'dispersions' else repr(old.get(key))}); "
                                 "resume with the same command or choose a new --out")
        if old.get("code_sha256") != man["code_sha256"]:
            print(f"pdgc: warning: the pdgc sources changed since the run in {run_dir} started; "
                  "records written before and after may differ (start a new --out for a clean run)",
                  file=sys.stderr)
        man["created_utc"] = old.get("created_utc")
        man["sessions"] = old.get("sessions", [])
        man["stand_out_calibrated"] = old.get("stand_out_calibrated", False)
    else:
        man["created_utc"] = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
        man["stand_out_calibrated"] = stand_out_iterations is None
        if stand_out_iterations is None:
            man["stand_out_iterations"] = calibrate_stand_out(solver_dir, dispersions, cases)
    run_dir.mkdir(parents=True, exist_ok=True)
    write_atomic(man_path, json.dumps(man, indent=2) + "\n")
    return man


def _as_file_dict(d) -> dict:
    """A Dispersions (or its as_dict()) as a document parse_dispersions takes."""
    out = dict(d.as_dict() if isinstance(d, Dispersions) else d)
    if out["thrust_derate"] is None:
        del out["thrust_derate"]
    return out


def run_campaign(run_dir, manifest: dict, workers: int = 1, scheduler: str | None = None,
                 progress: bool = True, stream=None) -> dict:
    """Run every case of the manifest not yet in the results; return counts."""
    run_dir = Path(run_dir)
    results = run_dir / RESULTS_NAME
    records = read_results(results)
    done = set()
    duplicates = 0
    for r in records:
        duplicates += r["case"] in done
        done.add(r["case"])
    todo = [i for i in range(manifest["cases"]) if i not in done]
    from codegen.verify.dispersions import parse_dispersions
    disp = parse_dispersions(_as_file_dict(manifest["dispersions"]))
    ctx = CaseContext(solver_dir=manifest["solver_dir"], dispersions=disp,
                      reference_every=manifest["reference_every"],
                      stand_out_iterations=int(manifest["stand_out_iterations"] or 0))
    bar = Progress(manifest["cases"], done=sum(1 for i in done if i < manifest["cases"]),
                   stream=stream, enabled=progress)
    log = ResultsLog(results)
    t0 = time.monotonic()
    started = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    ran = [0]
    engine = f"dask scheduler {scheduler}" if scheduler else \
        f"local pool, {workers} worker{'s' if workers != 1 else ''}"
    try:
        def on_record(rec):
            log.append(rec)
            ran[0] += 1
            bar.update(1)

        if todo:
            if scheduler:
                run_dask(ctx, todo, scheduler, on_record)
            else:
                run_local(ctx, todo, workers, on_record)
    finally:
        log.close()
        bar.finish()
        wall = time.monotonic() - t0
        if ran[0]:
            manifest.setdefault("sessions", []).append(
                {"started_utc": started, "engine": engine, "ran": ran[0], "wall_s": wall})
            write_atomic(run_dir / MANIFEST_NAME, json.dumps(manifest, indent=2) + "\n")
    return {"resumed_from": len(done), "ran": ran[0], "todo": len(todo), "duplicates": duplicates,
            "wall_s": wall, "engine": engine}


# -- replay ------------------------------------------------------------------------

def replay_command(manifest: dict, record: dict, vehicle_path=None) -> str:
    """The ``pdgc solve`` line that replays ``record`` with the same solver."""
    inp = record["inputs"]
    state = ",".join(repr(float(x)) for x in
                     list(inp["position_m"]) + list(inp["velocity_mps"]) + [inp["mass_kg"]])
    solver_dir = manifest["solver_dir"]
    vehicle = vehicle_path or str(Path(solver_dir) / "vehicle.toml")
    parts = ["pdgc", "solve", shlex.quote(str(vehicle)), f"--state={state}"]
    if inp.get("time_of_flight_s") is not None:
        parts.append(f"--tof={float(inp['time_of_flight_s'])!r}")
    if manifest["solver_backend"] == DRY_RUN_BACKEND:
        parts.append(f"--horizon={manifest['horizon']}")
        parts.append("--no-fallback")
    else:
        parts.append(f"--solver-dir={shlex.quote(solver_dir)}")
    parts.append("--json")
    return " ".join(parts)


def derated_vehicle_file(manifest: dict, record: dict, out_dir) -> Path:
    """Write the derated vehicle of a derated case (for its replay line)."""
    import tomllib
    src = Path(manifest["solver_dir"]) / "vehicle.toml"
    data = tomllib.loads(src.read_text())
    derate = record["inputs"]["thrust_derate"]
    lines = [f"# Vehicle of {src} with thrust_max_n derated by {derate!r} "
             f"(case {record['case']} of an envelope run).", ""]
    env = data.pop("envelope", {})
    data["thrust_max_n"] = float(data["thrust_max_n"]) * derate
    for k, v in data.items():
        lines.append(f"{k} = {_toml_value(v)}")
    lines += ["", "[envelope]"] + [f"{k} = {_toml_value(v)}" for k, v in env.items()]
    path = Path(out_dir) / f"case-{record['case']}-vehicle.toml"
    write_atomic(path, "\n".join(lines) + "\n")
    return path


def _toml_value(v):
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return repr(float(v)) if isinstance(v, float) else repr(v)


# -- summary and report --------------------------------------------------------------

PERCENTILES = (50.0, 90.0, 99.0, 99.9)
WORST_CASES = 10


def nearest_rank(sorted_values, p: float):
    """Nearest-rank percentile: the smallest value with at least p % of values at or below it."""
    n = len(sorted_values)
    k = min(n, max(1, math.ceil(p / 100.0 * n)))
    return sorted_values[k - 1]


def stats(values) -> dict | None:
    vals = sorted(v for v in values if v is not None)
    if not vals:
        return None
    out = {"count": len(vals), "worst": vals[-1], "best": vals[0],
           "mean": float(sum(vals)) / len(vals)}
    for p in PERCENTILES:
        out[f"p{p:g}"] = nearest_rank(vals, p)
    return out


def load_run(run_dir):
    run_dir = Path(run_dir)
    man_path = run_dir / MANIFEST_NAME
    try:
        man = json.loads(man_path.read_text())
    except OSError as exc:
        raise InputError("RUN_DIR", str(run_dir), f"holds no envelope run ({exc.strerror})") from None
    records = {}
    for r in read_results(run_dir / RESULTS_NAME):
        if r["case"] < man["cases"]:
            records.setdefault(r["case"], r)
    return man, [records[k] for k in sorted(records)]


def _counts(items) -> dict:
    out = {}
    for s in items:
        out[s] = out.get(s, 0) + 1
    return dict(sorted(out.items(), key=lambda kv: (-kv[1], kv[0])))


def _worst_by(records, key, count, value):
    scored = [(value(r), r["case"]) for r in records]
    scored = [(v, c) for v, c in scored if v is not None]
    scored.sort(key=lambda vc: (-vc[0], vc[1]))
    return [c for _, c in scored[:count]]


def summarise(run_dir, worst: int = WORST_CASES, write_replay_vehicles: bool = True) -> dict:
    """The JSON summary of a run (complete or not)."""
    man, records = load_run(run_dir)
    gens = [r["generated"] for r in records]
    refs = [r for r in records if r["reference"] is not None]
    accs = [r for r in refs if r["accuracy"] is not None]

    def absval(x):
        return None if x is None else abs(x)

    def worst_acc(field):
        cands = [(abs(r["accuracy"][field]), r["case"], r["accuracy"][field]) for r in accs
                 if r["accuracy"][field] is not None]
        if not cands:
            return None
        cands.sort(key=lambda t: (-t[0], t[1]))
        return {"case": cands[0][1], "value": cands[0][2]}

    by_case = {r["case"]: r for r in records}
    why = {}

    def mark(cases, reason):
        for c in cases:
            why.setdefault(c, []).append(reason)

    mark(_worst_by(records, "iterations_max", worst, lambda r: r["generated"]["iterations_max"]),
         "most iterations in one solve")
    mark(_worst_by(records, "iterations_total", worst, lambda r: r["generated"]["iterations_total"]),
         "most iterations in the search")
    mark(_worst_by(records, "solve_time_s", worst, lambda r: r["generated"]["solve_time_s"]),
         "longest solve time")
    mark([r["case"] for r in records if r["generated"]["status"] not in SOLVED][:worst], "not solved")
    mark([r["case"] for r in accs if not r["accuracy"]["status_match"]][:worst],
         "status differs from the reference")
    mark(_worst_by(accs, "fuel", worst, lambda r: absval(r["accuracy"]["fuel_rel_diff"]) or None),
         "largest fuel difference from the reference")
    replay_dir = Path(run_dir) / "replay"
    worst_rows = []
    for c in sorted(why, key=lambda c: (-by_case[c]["generated"]["iterations_max"], c)):
        r = by_case[c]
        g = r["generated"]
        vehicle_path = None
        if r["inputs"].get("thrust_derate") is not None and write_replay_vehicles:
            vehicle_path = derated_vehicle_file(man, r, replay_dir)
        worst_rows.append({
            "case": c, "why": why[c], "status": g["status"], "iterations": g["iterations"],
            "iterations_max": g["iterations_max"], "iterations_total": g["iterations_total"],
            "solve_time_s": g["solve_time_s"], "fuel_kg": g["fuel_kg"],
            "time_of_flight_s": g["time_of_flight_s"], "landing_miss_m": g["landing_miss_m"],
            "reference_status": r["reference"]["status"] if r["reference"] else None,
            "fuel_rel_diff": r["accuracy"]["fuel_rel_diff"] if r["accuracy"] else None,
            "inputs": r["inputs"],
            "replay": replay_command(man, r, vehicle_path),
        })

    reasons = _counts(w for r in refs for w in r["reference_why"])
    return {
        "format": "pdgc-envelope-summary/1",
        "solver_dir": man["solver_dir"],
        "solver_backend": man["solver_backend"],
        "horizon": man["horizon"],
        "seed": man["seed"],
        "cases_planned": man["cases"],
        "cases_done": len(records),
        "complete": len(records) == man["cases"],
        "reference_every": man["reference_every"],
        "stand_out_iterations": man["stand_out_iterations"],
        "generated": {
            "status_counts": _counts(g["status"] for g in gens),
            "iterations": stats(g["iterations"] for g in gens),
            "iterations_max": stats(g["iterations_max"] for g in gens),
            "iterations_total": stats(g["iterations_total"] for g in gens),
            "solves": stats(g["solves"] for g in gens),
            "solve_time_s": stats(g["solve_time_s"] for g in gens),
        },
        "reference": {
            "cases": len(refs),
            "reasons": reasons,
            "status_counts": _counts(r["reference"]["status"] for r in refs),
            "iterations_max": stats(r["reference"]["iterations_max"] for r in refs),
            "solve_time_s": stats(r["reference"]["solve_time_s"] for r in refs),
        },
        "accuracy": {
            "compared": len(accs),
            "status_matches": sum(1 for r in accs if r["accuracy"]["status_match"]),
            "status_mismatch_cases": [r["case"] for r in accs if not r["accuracy"]["status_match"]][:100],
            "status_pairs": [{"generated": g, "reference": rf, "cases": n} for (g, rf), n in
                             _counts((r["generated"]["status"], r["reference"]["status"])
                                     for r in accs).items()],
            "both_solved": sum(1 for r in accs if r["accuracy"]["fuel_diff_kg"] is not None),
            "fuel_rel_diff_abs": stats(absval(r["accuracy"]["fuel_rel_diff"]) for r in accs),
            "worst_fuel_rel_diff": worst_acc("fuel_rel_diff"),
            "worst_fuel_diff_kg": worst_acc("fuel_diff_kg"),
            "worst_time_of_flight_diff_s": worst_acc("time_of_flight_diff_s"),
            "worst_objective_rel_diff": worst_acc("objective_rel_diff"),
            "worst_landing_miss_diff_m": worst_acc("landing_miss_diff_m"),
        },
        "sessions": man.get("sessions", []),
        "worst_cases": worst_rows,
    }


STATUS_COLOURS = {"optimal": "#2a7f2a", "least_miss": "#e08a00", "infeasible": "#c02020",
                  "iteration_limit": "#7a1fa2", "numerical_trouble": "#1f5fbf", "bad_input": "#555555"}


def _figures(records) -> dict:
    """The report's pictures, as data URIs."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import matplotlib.ticker
    import numpy as np

    from codegen.report import figure_png_base64

    figs = {}
    gens = [r["generated"] for r in records]
    statuses = np.array([g["status"] for g in gens])
    it_max = np.array([g["iterations_max"] for g in gens])
    it_tot = np.array([g["iterations_total"] for g in gens])

    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6))
    for ax, data, label in ((axes[0], it_max, "most iterations in one solve"),
                            (axes[1], it_tot, "iterations in the whole time-of-flight search")):
        lo, hi = int(data.min()), int(data.max())
        step = max(1, (hi - lo + 1) // 60)
        bins = np.arange(lo, hi + step + 1, step) - 0.5
        ax.hist(data, bins=bins, color="#3b6ea5")
        ax.set_xlabel(label)
        ax.set_ylabel("cases")
        ax.set_yscale("log")
        ax.yaxis.set_major_formatter(matplotlib.ticker.ScalarFormatter())
        ax.yaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
        ax.axvline(hi, color="#c02020", lw=1, ls="--", label=f"worst {hi}")
        ax.legend(fontsize=8)
    figs["iterations"] = figure_png_base64(fig)

    t_ms = np.array([g["solve_time_s"] for g in gens]) * 1e3
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6))
    pos = t_ms[t_ms > 0]
    if len(pos):
        bins = np.logspace(math.log10(pos.min()), math.log10(pos.max()) + 1e-9, 50)
        axes[0].hist(pos, bins=bins, color="#3b6ea5")
        axes[0].set_xscale("log")
        srt = np.sort(pos)
        surv = 1.0 - np.arange(len(srt)) / len(srt)
        axes[1].step(srt, surv, where="post", color="#3b6ea5")
        axes[1].set_xscale("log")
        axes[1].set_yscale("log")
    for ax in axes:
        ax.xaxis.set_major_locator(matplotlib.ticker.LogLocator(subs=(1.0, 2.0, 5.0)))
        ax.xaxis.set_major_formatter(matplotlib.ticker.FormatStrFormatter("%g"))
        ax.xaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
    axes[0].set_xlabel("solve time [ms] (whole search)")
    axes[0].set_ylabel("cases")
    axes[1].set_xlabel("solve time [ms]")
    axes[1].set_ylabel("fraction of cases slower or equal")
    figs["solve_time"] = figure_png_base64(fig)

    x = np.array([r["inputs"]["position_m"][0] for r in records])
    y = np.array([r["inputs"]["position_m"][1] for r in records])
    up = np.array([r["inputs"]["position_m"][2] for r in records])
    fig, ax = plt.subplots(figsize=(8, 5))
    size = 12 if len(records) < 2000 else 4
    for st in sorted(set(statuses), key=lambda s: (s != "optimal", s)):
        sel = statuses == st
        ax.scatter(x[sel], up[sel], s=size, c=STATUS_COLOURS.get(st, "#000"),
                   label=f"{st} ({int(sel.sum())})", alpha=0.8, linewidths=0)
    ax.set_xlabel("initial downrange x [m]")
    ax.set_ylabel("initial altitude [m]")
    ax.legend(fontsize=8, markerscale=2)
    figs["feasibility"] = figure_png_base64(fig)

    divert = np.hypot(x, y)
    fuel = np.array([g["fuel_kg"] if g["fuel_kg"] is not None else np.nan for g in gens])
    fig, ax = plt.subplots(figsize=(8, 5))
    for st in sorted(set(statuses), key=lambda s: (s != "optimal", s)):
        sel = (statuses == st) & np.isfinite(fuel)
        if sel.any():
            ax.scatter(divert[sel], fuel[sel], s=size, c=STATUS_COLOURS.get(st, "#000"),
                       label=f"{st} ({int(sel.sum())})", alpha=0.8, linewidths=0)
    ax.set_xlabel("divert distance: initial horizontal distance to the target [m]")
    ax.set_ylabel("fuel [kg]")
    if np.isfinite(fuel).any():
        ax.legend(fontsize=8, markerscale=2)
    figs["fuel_divert"] = figure_png_base64(fig)

    rel = [abs(r["accuracy"]["fuel_rel_diff"]) for r in records
           if r["accuracy"] and r["accuracy"]["fuel_rel_diff"] is not None]
    if rel and max(rel) > 0.0:
        fig, ax = plt.subplots(figsize=(8, 3.4))
        floor = 1e-16
        vals = np.maximum(np.array(rel), floor)
        bins = np.logspace(math.log10(vals.min()), math.log10(vals.max()) + 1e-9, 40)
        ax.hist(vals, bins=bins, color="#3b6ea5")
        ax.set_xscale("log")
        ax.set_xlabel(f"|fuel generated - fuel reference| / fuel reference (floored at {floor:g})")
        ax.set_ylabel("cases")
        figs["accuracy"] = figure_png_base64(fig)
    return figs


def render_report(summary: dict, records: list, manifest: dict) -> str:
    """report.html as text: self-contained, images inline."""
    from codegen import report as R

    figs = _figures(records) if records else {}
    g = summary["generated"]

    def stat_rows(label, st, scale=1.0, unit=""):
        if st is None:
            return [label + unit] + ["-"] * 6
        return [label + unit, st["count"]] + [
            st[k] * scale if isinstance(st[k], float) else st[k]
            for k in ("p50", "p90", "p99", "p99.9", "worst")]

    head = ["quantity", "cases", "p50", "p90", "p99", "p99.9", "worst"]
    overview = R.table(head, [
        stat_rows("most iterations in one solve", g["iterations_max"]),
        stat_rows("iterations of the answer's solve", g["iterations"]),
        stat_rows("iterations in the whole search", g["iterations_total"]),
        stat_rows("solves per case", g["solves"]),
        stat_rows("solve time", g["solve_time_s"], 1e3, " [ms]"),
        stat_rows("reference: most iterations in one solve", summary["reference"]["iterations_max"]),
        stat_rows("reference: solve time", summary["reference"]["solve_time_s"], 1e3, " [ms]"),
    ], text_columns=(0,))
    pct_note = ('<p class="note">Percentiles are nearest-rank: the smallest value with at least '
                "that share of cases at or below it. Solve times are measured, so they vary "
                "between runs; everything else in a record is reproducible.</p>")

    status_rows = [[s, n, f"{100.0 * n / max(1, summary['cases_done']):.2f} %"]
                   for s, n in g["status_counts"].items()]
    statuses = R.table(["status (generated solver)", "cases", "share"], status_rows, text_columns=(0,))
    ref_status = R.table(["status (reference)", "cases"],
                         list(summary["reference"]["status_counts"].items()), text_columns=(0,))
    reasons = R.table(["why the reference ran", "cases"],
                      [[{"every_m": f"every {summary['reference_every']}-th case",
                         "status": "status other than optimal",
                         "iterations": f"more than {summary['stand_out_iterations']} iterations in one solve"
                         }.get(k, k), n] for k, n in summary["reference"]["reasons"].items()],
                      text_columns=(0,))

    a = summary["accuracy"]
    acc_rows = []
    for key, label in (("worst_fuel_rel_diff", "fuel, relative"), ("worst_fuel_diff_kg", "fuel [kg]"),
                       ("worst_time_of_flight_diff_s", "time of flight [s]"),
                       ("worst_objective_rel_diff", "objective, relative"),
                       ("worst_landing_miss_diff_m", "landing miss [m]")):
        w = a[key]
        acc_rows.append([label, None if w is None else w["value"], None if w is None else w["case"]])
    acc_body = (f"<p>Compared with the reference on {a['compared']} cases; status agrees on "
                f"{a['status_matches']}, both solved on {a['both_solved']}. Differences are "
                "generated minus reference.</p>"
                + R.table(["worst difference", "value", "case"], acc_rows, text_columns=(0,)))
    acc_body += R.table(["status (generated)", "status (reference)", "cases"],
                        [[p["generated"], p["reference"], p["cases"]] for p in a["status_pairs"]],
                        text_columns=(0, 1))
    if a["status_mismatch_cases"]:
        first = a["status_mismatch_cases"][:20]
        acc_body += ("<p>Cases whose status differs from the reference"
                     + (f" (first {len(first)})"
                        if len(first) < a["compared"] - a["status_matches"] else "") + ": "
                     + ", ".join(str(c) for c in first) + "</p>")
    if "accuracy" in figs:
        acc_body += R.image(figs["accuracy"], "relative fuel difference from the reference")

    worst_rows = []
    for w in summary["worst_cases"]:
        worst_rows.append([w["case"], "; ".join(w["why"]), w["status"],
                           f"{w['iterations']} / {w['iterations_max']} / {w['iterations_total']}",
                           w["solve_time_s"] * 1e3, w["fuel_kg"], w["time_of_flight_s"],
                           w["landing_miss_m"], w["reference_status"], w["fuel_rel_diff"]])
    worst = R.table(["case", "listed for", "status", "iterations answer / max / total",
                     "solve time [ms]", "fuel [kg]", "tof [s]", "miss [m]", "reference",
                     "fuel rel. diff"], worst_rows, text_columns=(1, 2, 8),
                    notes=[f"replay: <code>{R.esc(w['replay'])}</code>"
                           for w in summary["worst_cases"]])

    sessions = R.table(["started (UTC)", "engine", "cases run", "wall time [s]"],
                       [[s.get("started_utc"), s.get("engine"), s.get("ran"), s.get("wall_s")]
                        for s in summary["sessions"]], text_columns=(0, 1))
    disp = manifest["dispersions"]
    disp_rows = []
    from codegen.verify.dispersions import parse_distribution
    for table_name in ("position_m", "velocity_mps"):
        for axis, d in disp[table_name].items():
            disp_rows.append([f"{table_name}.{axis}", parse_distribution("x", d).describe()])
    for name in ("mass_kg", "time_of_flight_s", "thrust_derate"):
        d = disp.get(name)
        disp_rows.append([name, "searched" if d == "search" else
                          ("none" if d is None else parse_distribution(name, d).describe())])
    inputs = (R.table(["run", ""], [
        ["solver tree", manifest["solver_dir"]], ["backend", manifest["solver_backend"]],
        ["horizon N", manifest["horizon"]], ["seed", manifest["seed"]],
        ["cases", f"{summary['cases_done']} of {summary['cases_planned']}"],
        ["dispersion file", manifest.get("dispersions_file") or "-"],
        ["vehicle sha256", manifest["vehicle_sha256"]],
    ], text_columns=(0, 1)) + R.table(["drawn quantity", "distribution"], disp_rows, text_columns=(0, 1))
        + sessions)

    sections = [
        ("overview", "Worst case and percentiles", overview + pct_note),
        ("statuses", "Status counts", statuses + ref_status + reasons),
        ("iterations", "Iteration histogram",
         R.image(figs["iterations"], "iteration histogram") if figs else "<p>no cases</p>"),
        ("solve-time", "Solve-time distribution",
         R.image(figs["solve_time"], "solve-time distribution") if figs else "<p>no cases</p>"),
        ("accuracy", "Accuracy against the reference", acc_body),
        ("feasibility", "Feasibility over initial downrange and altitude (divert footprint)",
         (R.image(figs["feasibility"], "feasibility map") if figs else "")
         + '<p class="note">Each dot is one case at its initial downrange and altitude, '
         "coloured by the generated solver's status.</p>"),
        ("fuel-divert", "Fuel versus divert distance",
         R.image(figs["fuel_divert"], "fuel versus divert distance") if figs else ""),
        ("worst-cases", "Worst cases and how to replay them",
         worst + '<p class="note">Each replay line runs the same case with <code>pdgc solve</code> '
         "on the same solver and prints its status and iterations.</p>"),
        ("inputs", "What was run", inputs),
    ]
    done = "complete" if summary["complete"] else "INCOMPLETE (resume with the same command)"
    intro = (f'<p>Envelope campaign of the solver in <code>{R.esc(manifest["solver_dir"])}</code>: '
             f"{summary['cases_done']} of {summary['cases_planned']} cases, {done}.</p>"
             '<p class="caution">Not flight-qualified. These figures come from a desktop run; '
             "they must be confirmed by independent verification and validation on the target "
             "before any use on a vehicle.</p>")
    return R.page("pdgc envelope report", sections, intro)


def write_report(run_dir, worst: int = WORST_CASES) -> dict:
    """Write ``summary.json`` and ``report.html`` into the run; return the summary."""
    run_dir = Path(run_dir)
    summary = summarise(run_dir, worst)
    man, records = load_run(run_dir)
    write_atomic(run_dir / "summary.json", json.dumps(summary, indent=2) + "\n")
    write_atomic(run_dir / "report.html", render_report(summary, records, man))
    return summary
