"""The package's files: inputs checked, sources, vectors, build files, tarball."""

from __future__ import annotations

import gzip
import io
import json
import math
import shutil
import tarfile
import tempfile
from dataclasses import dataclass
from pathlib import Path

from codegen import __version__
from codegen.emit import c_literal, environment, verify_tree
from codegen.errors import InputError
from codegen.model.trajectory import SOLVED
from codegen.verify.handoff.tools import (CPPCHECK_FLAGS, M7_DP_FLAGS, RELAXED_FLAGS, STRICT_FLAGS,
                                          _sha256)


#: Fixed modification time of every tar entry (2000-01-01T00:00:00Z).
TAR_MTIME = 946684800


def _c(x) -> str:
    """A C double literal, with NAN / INFINITY for non-finite values."""
    x = float(x)
    if math.isnan(x):
        return "NAN"
    if math.isinf(x):
        return "INFINITY" if x > 0 else "-INFINITY"
    return c_literal(x)


@dataclass
class Obj:
    src: str
    obj: str
    flags: str = "STRICT"        # Makefile variable
    cmake_flags: str = ""


def open_tree(tree_dir) -> dict:
    tree_dir = Path(tree_dir)
    if not tree_dir.is_dir():
        raise InputError("DIR", str(tree_dir), "must be a generated tree (a directory)")
    manifest = verify_tree(tree_dir)
    backend = manifest.get("backend")
    if backend != "native":
        raise InputError("DIR", str(tree_dir),
                         f"was generated with backend {backend!r}; the hand-off package needs "
                         "the native backend (heap-free, reentrant C99): cvxpygen solvers use "
                         "the heap and global state. Regenerate with --backend native")
    return manifest


def read_campaign(run_dir, tree_dir) -> dict:
    """The envelope campaign's JSON summary, checked to belong to this tree."""
    from codegen.verify.envelope.summary import summarise
    run_dir = Path(run_dir)
    man_path = run_dir / "manifest.json"
    try:
        run_man = json.loads(man_path.read_text())
    except OSError as exc:
        raise InputError("--campaign", str(run_dir),
                         f"must be an envelope run directory with manifest.json ({exc.strerror})") from None
    except json.JSONDecodeError as exc:
        raise InputError("--campaign", str(run_dir), f"has a damaged manifest.json: {exc}") from None
    if run_man.get("format") != "pdgc-envelope-run/1":
        raise InputError("--campaign", str(run_dir), "holds no pdgc envelope run (pdgc-envelope-run/1)")
    tree_sha = _sha256((Path(tree_dir) / "manifest.json").read_bytes())
    if run_man.get("solver_manifest_sha256") != tree_sha:
        raise InputError("--campaign", str(run_dir),
                         "was run on a different tree (its solver_manifest_sha256 is not the "
                         "sha256 of DIR/manifest.json)")
    summary_path = run_dir / "summary.json"
    if summary_path.is_file():
        try:
            summary = json.loads(summary_path.read_text())
        except json.JSONDecodeError as exc:
            raise InputError("--campaign", str(summary_path), f"is not valid JSON: {exc}") from None
    else:
        summary = summarise(run_dir, write_replay_vehicles=False)
    if summary.get("format") != "pdgc-envelope-summary/1":
        raise InputError("--campaign", str(summary_path), "is not a pdgc envelope summary "
                         "(pdgc-envelope-summary/1)")
    return summary


def _objects(manifest: dict, prefix: str, failing: set) -> tuple:
    b = manifest["build"]

    def mk(src):
        flags = "RELAXED" if src in failing else "STRICT"
        chosen = RELAXED_FLAGS if src in failing else STRICT_FLAGS
        cm = ";".join(f for f in chosen.split() if not f.startswith("-std="))
        return Obj(src, Path(src).stem + ".o", flags, cm)

    lib = [mk(s) for s in b["guidance_sources"] + b["solver_sources"]]
    program = mk(f"app/{prefix}_plan_once.c")
    runner = [mk(f"test/{prefix}_test_runner.c"), mk(f"test/{prefix}_vectors.c")]
    return lib, program, runner


def _vector_rows(vectors) -> list:
    rows = []
    for v in vectors:
        rows.append({
            "name": v.name, "kind": v.kind, "source": v.source,
            "position_m": [_c(x) for x in v.position_m],
            "velocity_mps": [_c(x) for x in v.velocity_mps],
            "mass_kg": _c(v.mass_kg), "time_of_flight_s": _c(v.time_of_flight_s),
            "target_m": [_c(x) for x in v.target_m],
            "set_iterations_per_solve_max": int(v.iterations_per_solve_max is not None),
            "iterations_per_solve_max": int(v.iterations_per_solve_max or 0),
            "set_tof_tolerance": int(v.tof_tolerance_s is not None),
            "tof_tolerance_s": _c(v.tof_tolerance_s or 0.0),
            "null_workspace": int(v.null_workspace), "status": v.status,
            "expect_tof_s": _c(v.expect_tof_s if v.status in SOLVED else 0.0),
            "fuel_kg": _c(v.fuel_kg if v.status in SOLVED else 0.0),
            "objective": _c(v.objective if v.status in SOLVED else 0.0),
            "terminal_error": _c(v.terminal_error if v.status in SOLVED else 0.0),
            "position": [[_c(x) for x in r] for r in v.position] if v.position else None,
            "thrust": [[_c(x) for x in r] for r in v.thrust] if v.thrust else None,
        })
    return rows


def package_files(tree_dir, manifest, vehicle, vectors, tol, failing=frozenset()) -> dict:
    """Every file of the package but the record and MANIFEST.sha256: path -> bytes."""
    tree_dir = Path(tree_dir)
    prefix, n = manifest["c_name"], manifest["horizon"]
    env = environment()
    lib, program, runner = _objects(manifest, prefix, set(failing))
    headers = sorted(p for p in manifest["files"] if p.endswith(".h"))
    headers += [f"test/{prefix}_vectors.h"]
    ctx = {"prefix": prefix, "PREFIX": prefix.upper(), "N": n, "version": __version__,
           "vehicle": vehicle, "precision": manifest["precision"], "count": len(vectors),
           "tol": tol, "vectors": _vector_rows(vectors),
           "strict_flags": STRICT_FLAGS, "relaxed_flags": RELAXED_FLAGS,
           "relaxed_used": bool(failing), "include_dirs": manifest["build"]["include_dirs"] + ["test"],
           "defines": manifest["build"]["defines"], "headers": headers,
           "lib_objects": lib, "program": program, "program_object": program.obj,
           "runner_objects": runner, "m7_dp_flags": M7_DP_FLAGS,
           "cppcheck_flags": CPPCHECK_FLAGS,
           "cppcheck_paths": ["src", "solver", "app", "test"]}

    def render(name):
        return env.get_template(f"handoff/{name}").render(**ctx).encode()

    files = {}
    for rel in manifest["files"]:
        if rel in ("Makefile", "CMakeLists.txt", "README.md"):
            continue
        files[rel] = (tree_dir / rel).read_bytes()
    files["generation-manifest.json"] = (tree_dir / "manifest.json").read_bytes()
    files[f"test/{prefix}_vectors.h"] = render("vectors.h.j2")
    files[f"test/{prefix}_vectors.c"] = render("vectors.c.j2")
    files[f"test/{prefix}_test_runner.c"] = render("test_runner.c.j2")
    files["Makefile"] = render("Makefile.j2")
    files["CMakeLists.txt"] = render("CMakeLists.txt.j2")
    files["README.md"] = render("README.md.j2")
    return files


def write_files(root: Path, files: dict) -> None:
    for rel, data in files.items():
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(data)


def tar_gz_bytes(root_name: str, files: dict) -> bytes:
    """A reproducible .tar.gz: sorted entries under root_name/, fixed metadata, gzip mtime 0."""
    raw = io.BytesIO()
    with tarfile.open(fileobj=raw, mode="w", format=tarfile.USTAR_FORMAT) as tar:
        dirs = set()
        for rel in files:
            parts = Path(rel).parts[:-1]
            for i in range(1, len(parts) + 1):
                dirs.add("/".join(parts[:i]))
        entries = [(d, None) for d in dirs] + [(p, files[p]) for p in files]
        for rel, data in [(root_name, None)] + sorted(
                ((f"{root_name}/{r}", d) for r, d in entries), key=lambda e: e[0]):
            info = tarfile.TarInfo(rel)
            info.mtime = TAR_MTIME
            info.uid = info.gid = 0
            info.uname = info.gname = ""
            if data is None:
                info.type = tarfile.DIRTYPE
                info.mode = 0o755
                tar.addfile(info)
            else:
                info.mode = 0o644
                info.size = len(data)
                tar.addfile(info, io.BytesIO(data))
    out = io.BytesIO()
    with gzip.GzipFile(filename="", mode="wb", fileobj=out, mtime=0, compresslevel=9) as gz:
        gz.write(raw.getvalue())
    return out.getvalue()


def _write_package(out_dir: Path, files: dict) -> Path:
    """Directory beside out_dir, renamed into place; then the tarball (atomic)."""
    from codegen.fsutil import write_atomic, swap_in_directory
    out_dir = out_dir.resolve()
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    if out_dir.exists():
        marker = out_dir / "record" / "handoff.json"
        if not marker.is_file():
            raise InputError("--out", str(out_dir),
                             "exists and holds no pdgc hand-off package (record/handoff.json): "
                             "refusing to replace it")
    tmp = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", dir=out_dir.parent))
    try:
        write_files(tmp, files)
        for p in sorted(tmp.rglob("*")):
            p.chmod(0o755 if p.is_dir() else 0o644)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    swap_in_directory(tmp, out_dir)
    tarball = out_dir.parent / f"{out_dir.name}.tar.gz"
    write_atomic(tarball, tar_gz_bytes(out_dir.name, files))
    return tarball
