"""`pdgc handoff`: write the package, run the checks, write the record."""

from __future__ import annotations

import json
import math
from pathlib import Path

from codegen import __version__, versions
from codegen.errors import InputError
from codegen.verify.handoff.checks import Checks, run_checks, run_solver_check
from codegen.verify.handoff.package import _write_package, open_tree, package_files, read_campaign
from codegen.verify.handoff.record import record_sections, render_record
from codegen.verify.handoff.tools import _sha256


RECORD_FORMAT = "pdgc-handoff/1"


def handoff(tree_dir, out_dir, campaign=None, checks: bool = True, progress=None,
            check_cases: int = 50, check_seed: int = 1) -> dict:
    """Write the package; returns a summary dict (paths, vector count, check results)."""
    from codegen.verify.vectors import build_vectors, tolerances
    from codegen.model.vehicle import load_vehicle
    say = progress or (lambda msg: None)
    tree_dir = Path(tree_dir)
    manifest = open_tree(tree_dir)
    out_dir = Path(out_dir)
    if out_dir.name.endswith(".tar.gz"):
        raise InputError("--out", str(out_dir), "names the package directory; the .tar.gz is "
                         "written beside it (PKG and PKG.tar.gz)")
    if out_dir.resolve() == tree_dir.resolve():
        raise InputError("--out", str(out_dir), "must differ from the tree DIR")
    vehicle = load_vehicle(tree_dir / "vehicle.toml")
    summary = read_campaign(campaign, tree_dir) if campaign is not None else None
    say(f"test vectors from the reference (N = {manifest['horizon']})")
    vectors = build_vectors(vehicle, manifest["horizon"], progress=say)
    tol = tolerances(manifest["precision"], vehicle,
                     manifest.get("options", {}).get("tof_tolerance_s", 0.05))
    if isinstance(check_cases, bool) or not isinstance(check_cases, int) or check_cases < 0:
        raise InputError("--check-cases", check_cases, "must be an integer >= 0 (0: no check)")
    files = package_files(tree_dir, manifest, vehicle, vectors, tol)
    solver_check = None
    if checks and check_cases > 0:
        solver_check = run_solver_check(tree_dir, check_cases, check_seed, say)
    ck = None
    if checks:
        ck = run_checks(files, manifest, tree_dir, len(vectors), say)
        failing = {f for f, ok, _ in ck.strict if not ok}
        if failing:
            files = package_files(tree_dir, manifest, vehicle, vectors, tol, failing)
    title = f"Verification record: {manifest['c_name']} guidance for {vehicle.name}, N = {manifest['horizon']}"
    intro = [f"Hand-off package written by pdgc {__version__} from a generated native tree. "
             "Every figure below was produced by the checks named with it; nothing here "
             "needs Python to read or to reproduce (see README.md for the make targets). "
             "Read the Caution first."]
    sections = record_sections(manifest, vehicle, vectors, tol, ck, summary, files,
                               solver_check)
    md, html = render_record(sections, title, intro)
    result = {
        "format": RECORD_FORMAT, "pdgc_version": __version__, "vehicle": vehicle.name,
        "horizon": manifest["horizon"], "precision": manifest["precision"],
        "prefix": manifest["c_name"], "vectors": len(vectors), "tolerances": tol,
        "environment": versions.installed(),
        "tree_environment": manifest.get("environment"),
        "checks_run": checks,
        "all_checks_passed": (ck.all_passed and (solver_check is None or
                                                 solver_check["failures"] == 0))
        if ck is not None else None,
        "solver_check": _clean(solver_check),
        "checks": _checks_json(ck) if ck is not None else None,
        "campaign": None if summary is None else {
            "cases_done": summary.get("cases_done"), "seed": summary.get("seed"),
            "complete": summary.get("complete")},
    }
    files["record/verification.md"] = md.encode()
    files["record/verification.html"] = html.encode()
    files["record/handoff.json"] = (json.dumps(result, indent=2, sort_keys=True,
                                               default=_json_default) + "\n").encode()
    files["MANIFEST.sha256"] = "".join(f"{_sha256(files[p])}  {p}\n"
                                       for p in sorted(files)).encode()
    tarball = _write_package(out_dir, files)
    result["package_dir"] = str(out_dir)
    result["tarball"] = str(tarball)
    return result


def _json_default(x):
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, (set, tuple)):
        return list(x)
    raise TypeError(f"{type(x)} is not JSON serialisable")


def _clean(d):
    """JSON-safe copy: non-finite floats become null."""
    if isinstance(d, dict):
        return {k: _clean(v) for k, v in d.items()}
    if isinstance(d, (list, tuple)):
        return [_clean(v) for v in d]
    if isinstance(d, float) and not math.isfinite(d):
        return None
    return d


def _checks_json(ck: Checks) -> dict:
    return _clean({
        "tools": ck.tools,
        "strict": [{"file": f, "passes": p} for f, p, _ in ck.strict],
        "cppcheck_findings": ck.cppcheck["findings"] if ck.cppcheck else None,
        "host": ck.host, "qemu": ck.qemu, "cmake": ck.cmake,
        "cortex_m7": {k: {kk: vv for kk, vv in v.items() if kk != "log"}
                      | {"strict_failures": [x["file"] for x in v.get("log", []) if not x["strict"]]}
                      for k, v in ck.m7.items()},
        "coverage": ck.coverage, "not_run": ck.not_run,
    })
