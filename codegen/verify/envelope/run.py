"""A campaign run: its manifest (created, or checked on resume) and running its cases."""

from __future__ import annotations

import json
import math
import sys
import time
from pathlib import Path

from codegen import __version__
from codegen.errors import InputError
from codegen.fsutil import PACKAGE_DIR, write_atomic
from codegen.progress import Progress
from codegen.verify.dispersions import Dispersions
from codegen.verify.envelope.cases import CaseContext
from codegen.verify.envelope.engines import run_dask, run_local
from codegen.verify.envelope.records import (MANIFEST_NAME, RESULTS_NAME, RUN_FORMAT, ResultsLog,
                                             read_results)
from codegen.verify.envelope.solvers import check_derate_supported, open_solvers, read_tree


#: Cases of the run used to set the stand-out threshold when none is given:
#: the threshold is STAND_OUT_FACTOR times the median of their most
#: iterations in one solve (rounded up).
CALIBRATION_CASES = 16
STAND_OUT_FACTOR = 1.5
#: Off a terminal, a progress line this often (log files stay short).
PROGRESS_LINE_EVERY_S = 10.0


#: A running session rewrites its entry in the manifest this often.
SESSION_UPDATE_S = 5.0


def check_inputs(records: list, dispersions, results_path) -> None:
    """Each record's inputs are the draw of its case (a function of the seed
    and the index alone): a record from another run or an edited one is
    refused rather than summarised as this run's."""
    for rec in records:
        want = json.loads(json.dumps(dispersions.case(rec["case"]).as_dict()))
        if rec["inputs"] != want:
            raise InputError(f"{results_path}: case {rec['case']}", rec["inputs"],
                             "is not the draw of this case from the run's seed and dispersions "
                             "(a record from another run, or edited); remove the line or start "
                             "a new --out")


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
    check_inputs(records, disp, results)
    ctx = CaseContext(solver_dir=manifest["solver_dir"], dispersions=disp,
                      reference_every=manifest["reference_every"],
                      stand_out_iterations=int(manifest["stand_out_iterations"] or 0))
    bar = Progress(manifest["cases"], "pdgc envelope", "cases",
                   initial=sum(1 for i in done if i < manifest["cases"]), stream=stream,
                   enabled=progress, line_every_s=PROGRESS_LINE_EVERY_S)
    log = ResultsLog(results)
    t0 = time.monotonic()
    started = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    ran = [0]
    engine = f"dask scheduler {scheduler}" if scheduler else \
        f"local pool, {workers} worker{'s' if workers != 1 else ''}"
    # The session is in the manifest from its start and brought up to date
    # every SESSION_UPDATE_S, so a session that is killed still counts (its
    # wall time short by at most that much); "finished" says which ended.
    session = {"started_utc": started, "engine": engine, "ran": 0, "wall_s": 0.0,
               "finished": False}
    last_update = [t0]

    def write_session(final=False):
        session["ran"], session["wall_s"] = ran[0], time.monotonic() - t0
        session["finished"] = final
        write_atomic(run_dir / MANIFEST_NAME, json.dumps(manifest, indent=2) + "\n")
        last_update[0] = time.monotonic()

    if todo:
        manifest.setdefault("sessions", []).append(session)
        write_session()
    try:
        def on_record(rec):
            log.append(rec)
            ran[0] += 1
            bar.update(1)
            if time.monotonic() - last_update[0] >= SESSION_UPDATE_S:
                write_session()

        if todo:
            if scheduler:
                run_dask(ctx, todo, scheduler, on_record)
            else:
                run_local(ctx, todo, workers, on_record)
    finally:
        log.close()
        bar.close()
        wall = time.monotonic() - t0
        if todo:
            write_session(final=True)
    return {"resumed_from": len(done), "ran": ran[0], "todo": len(todo), "duplicates": duplicates,
            "wall_s": wall, "engine": engine}
