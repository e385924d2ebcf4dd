"""The target checks, on a scratch copy of the package, and `pdgc check` on the tree."""

from __future__ import annotations

import re
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

from codegen import __version__
from codegen.emit import read_manifest
from codegen.verify.handoff.package import write_files
from codegen.verify.handoff.toolout import (_parse_gcov, _parse_size, _runner_result,
                                            worst_stack)
from codegen.verify.handoff.tools import (CPPCHECK_FLAGS, M7_DP_FLAGS, M7_SP_FLAGS, RELAXED_FLAGS,
                                          REQUIRED_TOOLS, STRICT_FLAGS, _run, _scrub,
                                          _tool_version)


@dataclass
class Checks:
    """Results of the target checks (what the record reports)."""
    tools: dict = field(default_factory=dict)
    strict: list = field(default_factory=list)      # (file, passes, first diagnostics)
    cppcheck: dict | None = None
    host: dict | None = None
    qemu: dict | None = None
    cmake: dict | None = None
    m7: dict = field(default_factory=dict)           # "double", "single" -> dict
    coverage: dict | None = None
    not_run: list = field(default_factory=list)      # (check, reason)

    @property
    def all_passed(self) -> bool:
        ok = all(p for _, p, _ in self.strict)
        ok = ok and (self.cppcheck is None or not self.cppcheck["findings"])
        for r in (self.host, self.qemu, self.cmake):
            ok = ok and (r is None or r["passed"] is not False)
        ok = ok and all(m.get("built") for m in self.m7.values())
        return ok and not self.not_run


def _probe_sizes(work: Path, prefix: str, cc: str, flags: str, include_dirs, nm: str) -> dict:
    """sizeof(workspace) and sizeof(plan) on the target, read from symbol sizes."""
    probe = work / "sizeof_probe.c"
    probe.write_text(f'#include "{prefix}_guidance.h"\n'
                     f"{prefix}_workspace probe_workspace;\n{prefix}_plan probe_plan;\n")
    incs = [f"-I{d}" for d in include_dirs]
    code, out = _run([cc, *flags.split(), "-std=c99", "-fno-common", *incs, "-c", probe.name,
                      "-o", "sizeof_probe.o"], cwd=work)
    if code != 0:
        return {"error": out}
    code, out = _run([nm, "-S", "sizeof_probe.o"], cwd=work)
    sizes = {}
    for ln in out.splitlines():
        parts = ln.split()
        if len(parts) == 4 and parts[3] in ("probe_workspace", "probe_plan"):
            sizes[parts[3].replace("probe_", "")] = int(parts[1], 16)
    return sizes


def _m7_build(work: Path, manifest: dict, flags: str, label: str) -> dict:
    """Library for the Cortex-M7 (strict flags as errors), sizes and stack."""
    prefix = manifest["c_name"]
    b = manifest["build"]
    incs = [f"-I{d}" for d in b["include_dirs"]]
    out_dir = work / f"m7-{label}"
    out_dir.mkdir()
    objs, log = [], []
    for src in b["guidance_sources"] + b["solver_sources"]:
        obj = out_dir / (Path(src).stem + ".o")
        cmd = ["arm-none-eabi-gcc", *STRICT_FLAGS.split(), "-O2", *flags.split(),
               "-fstack-usage", "-fcallgraph-info=su", *incs, "-c", src, "-o", str(obj)]
        code, out = _run(cmd, cwd=work)
        if code != 0:
            # The strict flags failed on the target: retry relaxed so the size is known, and say so.
            cmd = ["arm-none-eabi-gcc", *RELAXED_FLAGS.split(), "-O2", *flags.split(),
                   "-fstack-usage", "-fcallgraph-info=su", *incs, "-c", src, "-o", str(obj)]
            code2, out2 = _run(cmd, cwd=work)
            log.append({"file": src, "strict": False, "diagnostics": _scrub(out, work)[:2000],
                        "built": code2 == 0})
            if code2 != 0:
                return {"built": False, "flags": flags, "log": log}
        else:
            log.append({"file": src, "strict": True, "diagnostics": "", "built": True})
        objs.append(obj)
    lib = out_dir / f"lib{prefix}_guidance.a"
    _run(["arm-none-eabi-ar", "rcs", str(lib)] + [str(o) for o in objs], cwd=work)
    code, out = _run(["arm-none-eabi-size", "-t", str(lib)], cwd=work)
    size = _parse_size(out) if code == 0 else {"objects": [], "total": None}
    ci = [p.read_text(errors="replace") for p in sorted(out_dir.glob("*.ci"))]
    stack = worst_stack(ci, f"{prefix}_plan_descent")
    su = []
    for p in sorted(out_dir.glob("*.su")):
        for ln in p.read_text().splitlines():
            parts = ln.split("\t")
            if len(parts) == 3:
                su.append((parts[0].split(":")[-1], int(parts[1]), parts[2]))
    su.sort(key=lambda r: (-r[1], r[0]))
    sizes = _probe_sizes(work, prefix, "arm-none-eabi-gcc", flags, b["include_dirs"],
                         "arm-none-eabi-nm")
    soft_double = []
    code, out = _run(["arm-none-eabi-nm", "-u", str(lib)], cwd=work)
    for ln in out.splitlines():
        sym = ln.split()[-1] if ln.split() else ""
        if sym.startswith("__aeabi_d") or sym in ("__aeabi_f2d", "__aeabi_d2f"):
            soft_double.append(sym)
    return {"built": True, "flags": flags, "log": log, "size": size, "stack": stack,
            "frames": su[:8], "sizeof": sizes, "soft_double": sorted(set(soft_double))}


def run_checks(pkg_files: dict, manifest: dict, tree_dir, vector_count: int, say) -> Checks:
    """All target checks, in a scratch copy of the package (removed afterwards)."""
    ck = Checks()
    prefix = manifest["c_name"]
    tools = {t: _tool_version(t) for t in ("cc", "arm-none-eabi-gcc", "arm-linux-gnueabihf-gcc",
                                           "qemu-arm", "cppcheck", "gcov", "cmake")}
    ck.tools = tools
    have = {t: shutil.which(t) is not None for t in REQUIRED_TOOLS + ("cmake", "make")}
    scratch = Path(tempfile.mkdtemp(prefix="pdgc-handoff-checks-"))
    try:
        work = scratch / "pkg"
        write_files(work, pkg_files)
        incs = [f"-I{d}" for d in manifest["build"]["include_dirs"] + ["test"]]
        c_files = sorted(p for p in pkg_files if p.endswith(".c"))

        # 1. strict host build, file by file
        say("strict host build")
        if have["cc"]:
            for src in c_files:
                code, out = _run(["cc", *STRICT_FLAGS.split(), "-O2", *incs, "-c", src, "-o",
                                  "/dev/null"], cwd=work)
                ck.strict.append((src, code == 0, _scrub(out.strip(), work)[:4000]))
        else:
            ck.not_run.append(("strict host build", "cc not found"))

        # 2. cppcheck
        say("cppcheck")
        if have["cppcheck"]:
            code, out = _run(["cppcheck", *CPPCHECK_FLAGS.split(),
                              "--template={file}:{line}:{column}: {severity}: {message} [{id}]",
                              *incs, "src", "solver", "app", "test"], cwd=work)
            findings = [ln.strip() for ln in out.splitlines() if re.match(r"^\S+:\d+:\d+: ", ln)]
            ck.cppcheck = {"findings": [_scrub(f, work) for f in findings], "exit_code": code}
        else:
            ck.not_run.append(("cppcheck", "cppcheck not found"))

        # 3. the package's own `make test` on the host
        say("host: make test")
        if have["make"] and have["cc"]:
            code, out = _run(["make", "-s", "test"], cwd=work)
            ck.host = _runner_result(code, out, vector_count)
            ck.host["compiler"] = tools["cc"]
            ck.host["flags"] = "-O2 (CFLAGS) with the per-file warning flags"
        else:
            ck.not_run.append(("host test vectors", "make or cc not found"))

        # 4. arm-linux-gnueabihf under qemu-arm
        say("arm-linux-gnueabihf under qemu-arm: make test-qemu")
        if have["arm-linux-gnueabihf-gcc"] and have["qemu-arm"]:
            code, out = _run(["make", "-s", "test-qemu"], cwd=work)
            ck.qemu = _runner_result(code, out, vector_count)
            ck.qemu["compiler"] = tools["arm-linux-gnueabihf-gcc"]
            ck.qemu["emulator"] = tools["qemu-arm"]
        else:
            ck.not_run.append(("qemu-arm test vectors",
                               "arm-linux-gnueabihf-gcc or qemu-arm not found"))

        # 5. CMake build and ctest (the Makefile is the reference build; CMake is
        #    checked when cmake is installed, and the record says when it was not)
        if not have["cmake"]:
            ck.cmake = {"passed": None, "skipped": "cmake not found"}
        else:
            say("cmake build and ctest")
            code, out = _run(["cmake", "-S", ".", "-B", "build-cmake", "-DCMAKE_BUILD_TYPE=Release"],
                             cwd=work)
            if code == 0:
                code, out = _run(["cmake", "--build", "build-cmake"], cwd=work)
            if code == 0:
                code, out = _run(["ctest", "--test-dir", "build-cmake", "--output-on-failure"],
                                 cwd=work)
            ck.cmake = {"passed": code == 0}
            if code != 0:
                ck.cmake["tail"] = _scrub(out.strip(), work).splitlines()[-8:]

        # 6. Cortex-M7, double-precision FPU (this tree) and single-precision FPU
        #    (a companion single-precision tree generated from the same vehicle file)
        if have["arm-none-eabi-gcc"] and have["arm-none-eabi-size"] and have["arm-none-eabi-nm"]:
            say("Cortex-M7 builds")
            if manifest["precision"] == "double":
                ck.m7["double"] = _m7_build(work, manifest, M7_DP_FLAGS, "dp")
                from codegen.emit import generate
                single_dir = scratch / "single"
                generate(Path(tree_dir) / "vehicle.toml", manifest["horizon"], single_dir,
                         backend="native", c_name=prefix, precision="single")
                sman = read_manifest(single_dir)
                ck.m7["single"] = _m7_build(single_dir, sman, M7_SP_FLAGS, "sp")
                ck.m7["single"]["tree"] = (f"pdgc {__version__} generate vehicle.toml --horizon "
                                           f"{manifest['horizon']} --backend native --c-name "
                                           f"{prefix} --precision single")
            else:
                ck.m7["single"] = _m7_build(work, manifest, M7_SP_FLAGS, "sp")
                ck.m7["single"]["tree"] = "this package's sources"
        else:
            ck.not_run.append(("Cortex-M7 builds", "arm-none-eabi-gcc/size/nm not found"))

        # 7. statement coverage by the vectors (gcov), the package's `make coverage`
        if have["gcov"] and have["cc"]:
            say("coverage: make coverage")
            code, out = _run(["make", "-s", "coverage"], cwd=work)
            ck.coverage = {"passed": code == 0, "files": _parse_gcov(out)}
            if code != 0:
                ck.coverage["tail"] = _scrub(out.strip(), work).splitlines()[-5:]
        else:
            ck.not_run.append(("coverage", "gcov or cc not found"))
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return ck


def run_solver_check(tree_dir, cases: int, seed: int, say) -> dict:
    """`pdgc check`'s comparison (generated solver through cffi against the reference)
    on ``cases`` dispersed cases; timings are left out (they belong to the machine)."""
    from codegen.bind import load_solver
    from codegen.verify.check import TOLERANCES, compare, draw_cases, summarise
    from codegen.model.problem import Scaling
    from codegen.reference import ReferenceSolver
    say(f"pdgc check: {cases} cases, seed {seed}")
    gen = load_solver(tree_dir)
    vehicle = gen.vehicle
    ref = ReferenceSolver(vehicle, gen.horizon)
    tol = dict(TOLERANCES[gen.manifest.get("precision", "double")])
    length = Scaling.for_vehicle(vehicle).length_m
    results = [compare(gen, ref, c, tol, vehicle, length)
               for c in draw_cases(vehicle, cases, seed, 5)]
    s = summarise(results, tol)
    keep = ("cases", "status_agreement", "status_pairs", "worst_objective_rel", "worst_fuel_rel",
            "worst_position_m", "worst_thrust_n", "iterations_median", "iterations_worst",
            "failures", "tolerances")
    out = {k: s[k] for k in keep}
    out["seed"] = seed
    out["length_m"] = length
    out["thrust_upper_n"] = vehicle.thrust_upper_n
    out["failed_cases"] = [{"index": r.case.index, "kind": r.case.kind, "why": r.failures}
                           for r in results if r.failures][:20]
    return out
