"""`pdgc handoff`: a package for flight-software engineers, with target checks.

From a generated NATIVE tree (the backend meant to fly: heap-free, reentrant,
C99) this writes a directory and a ``.tar.gz`` of it holding the generated
sources, build files (make, CMake), the plan-once program, test vectors with a C runner
(:mod:`codegen.verify.vectors`), and a verification record (Markdown and HTML). The
target checks run here, on a scratch copy of the package, with the package's
own Makefile where one exists:

- strict host build of every C file (-std=c99 -Wall -Wextra -Wpedantic
  -Wshadow -Wconversion -Werror), and cppcheck;
- the test runner on the host, and on arm-linux-gnueabihf under qemu-arm;
- Cortex-M7 builds with arm-none-eabi-gcc: double-precision FPU with this
  tree, single-precision FPU with a companion single-precision tree generated
  here; text/data/bss from arm-none-eabi-size, sizes of the workspace and plan
  on the target, worst stack depth from -fstack-usage -fcallgraph-info;
- statement coverage of the sources by the vectors (gcov).

cvxpygen trees are refused: their solvers use the heap and global state.

The package's bytes are reproducible: no timestamps, no absolute paths, no
host names; the tarball has sorted entries, fixed mtime, uid, gid and modes,
and a gzip header with mtime 0. A missing tool makes the record say "not
run" with the reason; :data:`REQUIRED_TOOLS` lists them for the tests (which
fail in CI when one is missing).
"""

from __future__ import annotations

import gzip
import hashlib
import io
import json
import math
import re
import shutil
import subprocess
import tarfile
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

from codegen import __version__
from codegen.model import tofsearch
from codegen.emit import c_literal, environment, read_manifest, verify_tree
from codegen.errors import InputError

STRICT_FLAGS = "-std=c99 -Wall -Wextra -Wpedantic -Wshadow -Wconversion -Werror"
RELAXED_FLAGS = "-std=c99 -Wall -Wextra -Werror"
M7_DP_FLAGS = "-mcpu=cortex-m7 -mthumb -mfpu=fpv5-d16 -mfloat-abi=hard"
M7_SP_FLAGS = "-mcpu=cortex-m7 -mthumb -mfpu=fpv5-sp-d16 -mfloat-abi=hard"
CPPCHECK_FLAGS = ("--std=c99 --enable=warning,style,performance,portability "
                  "--error-exitcode=1 --inline-suppr --quiet")
REQUIRED_TOOLS = ("cc", "gcov", "cppcheck", "arm-none-eabi-gcc", "arm-none-eabi-size",
                  "arm-none-eabi-nm", "arm-linux-gnueabihf-gcc", "qemu-arm")
ARMHF_SYSROOT = "/usr/arm-linux-gnueabihf"
#: Fixed modification time of every tar entry (2000-01-01T00:00:00Z).
TAR_MTIME = 946684800
RECORD_FORMAT = "pdgc-handoff/1"
CAUTION = ("This code is NOT flight-qualified. It was generated and checked by a "
           "design tool; before any use on a vehicle it needs independent verification and "
           "validation under the program's software assurance process, against the "
           "applicable standards (for example NASA-STD-8739.8 and NPR 7150.2, ECSS-E-ST-40C "
           "and ECSS-Q-ST-80C, or DO-178C, as the program requires), and review by a licensed "
           "engineer responsible for the vehicle. The vehicle data of the demo is invented.")
STEP_TIMEOUT_S = 900


def missing_tools() -> list:
    return [t for t in REQUIRED_TOOLS if shutil.which(t) is None]


# -- small helpers ----------------------------------------------------------------

def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _run(cmd, cwd, env=None, timeout=STEP_TIMEOUT_S):
    """Run a command; returns (returncode, combined output). Never raises on failure."""
    try:
        p = subprocess.run(cmd, cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                           text=True, timeout=timeout, env=env)
        return p.returncode, p.stdout
    except FileNotFoundError as exc:
        return 127, f"{cmd[0]}: not found ({exc})"
    except subprocess.TimeoutExpired:
        return 124, f"{' '.join(cmd)}: timed out after {timeout} s"


def _scrub(text: str, *roots) -> str:
    """Remove scratch paths from tool output kept in the record."""
    for r in roots:
        if r:
            text = text.replace(str(r) + "/", "").replace(str(r), ".")
    return text


def _tool_version(tool: str) -> str:
    code, out = _run([tool, "--version"], cwd=".")
    if code != 0 or not out.strip():
        return "not available"
    return out.strip().splitlines()[0]


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


# -- inputs -------------------------------------------------------------------------

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
    from codegen.verify.envelope import summarise
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


# -- the package files -------------------------------------------------------------

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
            "expect_tof_s": _c(v.expect_tof_s if v.status == "optimal" else 0.0),
            "fuel_kg": _c(v.fuel_kg if v.status == "optimal" else 0.0),
            "objective": _c(v.objective if v.status == "optimal" else 0.0),
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
           "tol": tol, "vectors": _vector_rows(vectors), "caution": CAUTION,
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


# -- target checks -----------------------------------------------------------------

def _parse_runner(out: str) -> dict:
    res = {"vectors": None, "passed_count": None, "failed_count": None, "worst": {},
           "arrays_compared": None, "arrays_skipped": None,
           "failures": [ln.strip() for ln in out.splitlines() if ln.startswith("FAIL")]}
    m = re.search(r"^SUMMARY vectors (\d+) passed (\d+) failed (\d+)", out, re.M)
    if m:
        res["vectors"], res["passed_count"], res["failed_count"] = map(int, m.groups())
    m = re.search(r"^WORST (.*)$", out, re.M)
    if m:
        parts = m.group(1).split()
        res["worst"] = {parts[i]: float(parts[i + 1]) for i in range(0, len(parts) - 1, 2)}
    m = re.search(r"^ARRAYS compared (\d+) skipped (\d+)", out, re.M)
    if m:
        res["arrays_compared"], res["arrays_skipped"] = map(int, m.groups())
    return res


def _runner_result(code: int, out: str, expected: int) -> dict:
    res = _parse_runner(out)
    res["exit_code"] = code
    res["passed"] = (code == 0 and res["vectors"] == expected and res["failed_count"] == 0)
    if not res["passed"] and res["vectors"] is None:
        res["failures"] = res["failures"] or [ln for ln in out.strip().splitlines()[-8:]]
    return res


def _parse_size(out: str) -> dict:
    """arm-none-eabi-size (Berkeley format) of an archive: per object and total."""
    rows, total = [], None
    for ln in out.splitlines():
        parts = ln.split()
        if len(parts) >= 6 and parts[0].isdigit():
            text, data, bss = int(parts[0]), int(parts[1]), int(parts[2])
            name = parts[5]
            if name == "(TOTALS)":
                total = {"text": text, "data": data, "bss": bss}
            else:
                rows.append({"object": re.sub(r" \(ex .*\)$", "", name).split("/")[-1],
                             "text": text, "data": data, "bss": bss})
    if total is None and rows:
        total = {k: sum(r[k] for r in rows) for k in ("text", "data", "bss")}
    return {"objects": rows, "total": total}


_CI_NODE = re.compile(r'node:\s*\{\s*title:\s*"([^"]+)"\s*label:\s*"([^"]*)"')
_CI_EDGE = re.compile(r'edge:\s*\{\s*sourcename:\s*"([^"]+)"\s*targetname:\s*"([^"]+)"')


def worst_stack(ci_texts, entry: str) -> dict:
    """Worst stack depth from ``entry`` over the call graph of -fcallgraph-info=su.

    Each node's frame comes from its label ("N bytes (static)"); functions
    with no frame in the graph (library calls: sqrt, log, ...) count 0 and are
    listed. The graph has no cycles (the generated code has no recursion); a
    cycle is reported as an error rather than followed.
    """
    frames, kinds, edges = {}, {}, {}
    for text in ci_texts:
        for title, label in _CI_NODE.findall(text):
            m = re.search(r"(\d+) bytes \(([^)]*)\)", label.replace("\\n", "\n"))
            if m:
                frames[title] = int(m.group(1))
                kinds[title] = m.group(2)
            else:
                frames.setdefault(title, None)
        for a, b in _CI_EDGE.findall(text):
            edges.setdefault(a, set()).add(b)
    if entry not in frames:
        return {"entry": entry, "error": f"{entry} not found in the call graph"}
    memo, on_path, external = {}, set(), set()
    cycle = []

    def depth(f):
        if f in memo:
            return memo[f]
        if f in on_path:
            cycle.append(f)
            return 0, [f]
        on_path.add(f)
        own = frames.get(f)
        if own is None:
            external.add(f)
            own = 0
        best, path = 0, []
        for g in sorted(edges.get(f, ())):
            d, p = depth(g)
            if d > best:
                best, path = d, p
        on_path.discard(f)
        memo[f] = (own + best, [f] + path)
        return memo[f]

    total, path = depth(entry)
    dynamic = sorted(f for f in memo if kinds.get(f, "static") not in ("static",))
    return {"entry": entry, "bytes": total, "path": [(f, frames.get(f) or 0) for f in path],
            "external": sorted(external), "cycle": sorted(set(cycle)),
            "not_static": dynamic}


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


def _parse_gcov(out: str) -> list:
    rows, current = [], None
    for ln in out.splitlines():
        m = re.match(r"^File '(.+)'$", ln.strip())
        if m:
            current = m.group(1)
            continue
        m = re.match(r"^Lines executed:([\d.]+)% of (\d+)", ln.strip())
        if m and current is not None:
            if not current.startswith("/"):
                pct, total = float(m.group(1)), int(m.group(2))
                rows.append({"file": current, "percent": pct, "lines": total,
                             "executed": round(pct * total / 100.0)})
            current = None
    return rows


# -- `pdgc check` on the tree ----------------------------------------------------------

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


def _solver_check_blocks(c: dict) -> list:
    tol = c["tolerances"]
    rows = [("cases (seed)", f"{c['cases']} ({c['seed']}); every 5th searches the time of flight"),
            ("status agreement", f"{c['status_agreement']} of {c['cases']}"),
            ("status pairs (generated/reference)",
             ", ".join(f"{k}: {v}" for k, v in c["status_pairs"].items())),
            ("worst relative objective error (same tof)",
             f"{_g(c['worst_objective_rel'])} (tolerance {_g(tol['objective_rel'])})"),
            ("worst relative fuel error", f"{_g(c['worst_fuel_rel'])} (searched: tolerance "
                                           f"{_g(tol['fuel_rel_search'])})"),
            ("worst position difference [m]",
             f"{_g(c['worst_position_m'])} (tolerance {_g(tol['position_rel'] * c['length_m'])})"),
            ("worst thrust difference [N]",
             f"{_g(c['worst_thrust_n'])} (tolerance {_g(tol['thrust_rel'] * c['thrust_upper_n'])})"),
            ("iterations per solve (median / worst)",
             f"{_g(c['iterations_median'])} / {c['iterations_worst']}"),
            ("failing cases", c["failures"])]
    blocks = [_text("`pdgc check` on the tree: the generated solver (compiled on the host "
                    "through cffi) against the reference on dispersed states drawn from the "
                    "envelope (70 % inside, 20 % on its faces, 10 % beyond), fixed times of "
                    "flight over the lower part of the bracket, the reference without its "
                    "two-stage fallback."),
              _table(("item", "value"), rows)]
    if c["failed_cases"]:
        blocks.append(_code("\n".join(f"case {f['index']} ({f['kind']}): {'; '.join(f['why'])}"
                                      for f in c["failed_cases"])))
    return blocks


# -- the verification record -------------------------------------------------------

def _text(t):
    return {"kind": "text", "text": t}


def _code(t):
    return {"kind": "code", "text": t}


def _table(headers, rows):
    return {"kind": "table", "headers": list(headers), "rows": [[str(c) for c in r] for r in rows]}


def _g(x, digits=4):
    if x is None:
        return "-"
    if isinstance(x, float):
        return "-" if not math.isfinite(x) else f"{x:.{digits}g}"
    return str(x)


def _yes(ok):
    return "pass" if ok else "FAIL"


def record_sections(manifest, vehicle, vectors, tol, checks: Checks | None, campaign,
                    files: dict, solver_check: dict | None = None) -> list:
    prefix, n = manifest["c_name"], manifest["horizon"]
    sec = []

    sec.append({"title": "Caution", "blocks": [_text(f"**{CAUTION}**")]})

    ident = [("vehicle", vehicle.name), ("vehicle file sha256", manifest["vehicle"]["sha256"]),
             ("horizon N (intervals)", n), ("precision", manifest["precision"]),
             ("backend", "native (pdgc interior-point SOCP solver)"), ("C name", prefix),
             ("reentrant", manifest.get("reentrant")), ("heap-free", manifest.get("heap_free")),
             ("generator", f"pdgc {manifest.get('version')}"),
             ("problem size", ", ".join(f"{k} {v}" for k, v in sorted(manifest["problem"].items()))),
             ("generation manifest sha256",
              _sha256(files["generation-manifest.json"]))]
    sec.append({"title": "Identification", "blocks": [_table(("item", "value"), ident)]})

    from codegen.model.vehicle import VEHICLE_KEYS
    vrows = [(k, getattr(vehicle, k), VEHICLE_KEYS[k][1]) for k in VEHICLE_KEYS]
    env = vehicle.envelope
    for k in ("position_min_m", "position_max_m", "velocity_min_mps", "velocity_max_mps",
              "mass_min_kg", "mass_max_kg"):
        vrows.append((f"envelope.{k}", getattr(env, k), "box of initial states checked"))
    sec.append({"title": "Vehicle constants", "blocks": [
        _text("From `vehicle.toml` (SI units in the key names); compiled into the C sources."),
        _table(("key", "value", "meaning"), vrows)]})

    opts = manifest.get("options", {})
    srows = [("iterations_per_solve_max (default / cap)",
              f"{opts.get('iterations_per_solve_max_default')} / {opts.get('iterations_per_solve_max_limit')}",
              f"`{prefix}_guidance_config.iterations_per_solve_max`, per solve"),
             ("tof_tolerance_s (default)", opts.get("tof_tolerance_s"),
              "time-of-flight search stops when its bracket is shorter"),
             ("time-of-flight search",
              f"grid of {tofsearch.GRID_POINTS}, up to {tofsearch.GRID_REFINEMENTS} refinements, "
              f"then golden section (at most {tofsearch.GOLDEN_MAX_STEPS} steps); a failed solve "
              f"is retried once nearby (at most {tofsearch.RETRY_BUDGET} retries)",
              "bracket of Acikmese & Ploen (2007) from the current state")]
    sec.append({"title": "Horizon and settings", "blocks": [
        _text(f"N = {n} intervals ({n + 1} nodes), zero-order hold on thrust. "
              "Settings of the generated code:"),
        _table(("setting", "value", "meaning"), srows)]})

    # test vectors
    kinds = {}
    for v in vectors:
        kinds[v.kind] = kinds.get(v.kind, 0) + 1
    trows = [
        ("status", "all", "equal to the expected status", "-"),
        ("time of flight", "fixed", "equal to the input (bit for bit)", "0"),
        ("fuel", "fixed", "relative error", _g(tol["fuel_rel_fixed"])),
        ("objective (scaled)", "fixed", "relative error", _g(tol["objective_rel_fixed"])),
        ("position, all nodes", "fixed, and searched at the same tof", "largest absolute error [m]",
         f"{_g(tol['position_abs_m'])} ({tol['position_rel_of_length']:g} x length unit {_g(tol['length_m'])} m)"),
        ("thrust, all intervals", "fixed, and searched at the same tof", "largest absolute error [N]",
         f"{_g(tol['thrust_abs_n'])} ({tol['thrust_rel_of_upper']:g} x upper thrust bound)"),
        ("time of flight", "searched", "absolute error [s] (the search tolerance)",
         _g(tol["tof_abs_searched_s"])),
        ("fuel", "searched", "relative error", _g(tol["fuel_rel_searched"])),
        ("same-tof test", "searched", "arrays compared when |dtof| <= this x tof",
         _g(tol["same_tof_rel"])),
        ("refused input", "bad_input", "plan left untouched (sentinels unchanged)", "-"),
    ]
    vrows = [(i, v.name, v.kind, v.source,
              "searched" if v.searched else _g(v.time_of_flight_s, 8), v.status,
              _g(v.expect_tof_s, 8) if v.status == "optimal" else "-",
              _g(v.fuel_kg, 10) if v.status == "optimal" else "-")
             for i, v in enumerate(vectors)]
    sec.append({"title": "Test vectors", "blocks": [
        _text(f"{len(vectors)} vectors in `test/{prefix}_vectors.c` "
              f"({', '.join(f'{k} {c}' for k, c in kinds.items())}). Expected outputs come "
              "from the reference solve (Clarabel through CVXPY at tight tolerances, 1e-9, no "
              "two-stage fallback since the generated code has none), except `contract` "
              "vectors, whose expected status is the behaviour the header promises. "
              "Tolerances are those of `pdgc check` for this precision. Fixed-time-of-flight "
              "vectors carry the tight checks; a searched time of flight may land on a "
              "neighbouring point of the search on another FPU or compiler, so searched "
              "vectors are checked on time of flight within the search tolerance and fuel "
              "within a looser relative tolerance, and their arrays only when both answers "
              "settled on the same time of flight."),
        _table(("output", "vectors", "check", "tolerance"), trows),
        _table(("#", "name", "kind", "source", "tof input [s]", "expected status",
                "expected tof [s]", "expected fuel [kg]"), vrows)]})

    if checks is None:
        sec.append({"title": "Target checks", "blocks": [_text("Not run (--no-checks).")]})
    else:
        sec += _check_sections(checks, prefix)

    if solver_check is not None:
        sec.append({"title": "Generated solver against the reference",
                    "blocks": _solver_check_blocks(solver_check)})
    if campaign is None:
        sec.append({"title": "Envelope campaign", "blocks": [
            _text("No campaign given (`--campaign RUN_DIR`): none summarised here.")]})
    else:
        sec.append({"title": "Envelope campaign", "blocks": _campaign_blocks(campaign)})

    mrows = [(p, _sha256(files[p])) for p in sorted(files)]
    gen = json.loads(files["generation-manifest.json"])
    changed = [p for p, h in sorted(gen["files"].items())
               if p not in files or _sha256(files[p]) != h]
    sec.append({"title": "Manifest", "blocks": [
        _text("sha256 of every file of the package except this record and MANIFEST.sha256 "
              "(which lists all files, this record included: `sha256sum -c MANIFEST.sha256`). "
              "Files of the generated tree that the package replaces: "
              + (", ".join(f"`{p}`" for p in changed) if changed else "none") + "."),
        _table(("file", "sha256"), mrows)]})
    return sec


def _runner_rows(label, r):
    if r is None:
        return [(label, "not run", "-", "-")]
    w = r.get("worst", {})
    return [(label, _yes(r["passed"]),
             f"{r.get('passed_count')}/{r.get('vectors')} vectors",
             "; ".join(f"{k} {v:.3g}" for k, v in w.items()) +
             f"; arrays compared {r.get('arrays_compared')}, skipped {r.get('arrays_skipped')}")]


def _check_sections(ck: Checks, prefix: str) -> list:
    sec = []
    summary = []
    summary.append(("strict host build (all C files)",
                    _yes(all(p for _, p, _ in ck.strict)) if ck.strict else "not run",
                    f"{sum(p for _, p, _ in ck.strict)}/{len(ck.strict)} files pass `{STRICT_FLAGS}`"))
    if ck.cppcheck is not None:
        summary.append(("cppcheck", _yes(not ck.cppcheck["findings"]),
                        f"{len(ck.cppcheck['findings'])} findings"))
    for label, r in (("test vectors, host", ck.host), ("test vectors, arm-linux-gnueabihf under qemu-arm", ck.qemu)):
        if r is not None:
            summary.append((label, _yes(r["passed"]), f"{r.get('passed_count')}/{r.get('vectors')} pass"))
    if ck.cmake is not None:
        summary.append(("CMake build and ctest",
                        "not run" if ck.cmake["passed"] is None else _yes(ck.cmake["passed"]),
                        ck.cmake.get("skipped", "cmake -S . -B build-cmake; cmake --build; ctest")))
    for key, label in (("double", "Cortex-M7, double-precision FPU"),
                       ("single", "Cortex-M7, single-precision FPU")):
        m = ck.m7.get(key)
        if m is not None:
            t = (m.get("size") or {}).get("total") or {}
            strict_ok = all(x["strict"] for x in m.get("log", []))
            summary.append((label, _yes(m.get("built")),
                            f"text {t.get('text')} B, data {t.get('data')} B, bss {t.get('bss')} B; "
                            f"strict flags {'pass' if strict_ok else 'FAIL on some files'}"))
    if ck.coverage is not None:
        summary.append(("coverage (gcov)", _yes(ck.coverage["passed"]),
                        ", ".join(f"{c['file']} {c['percent']:.1f} %" for c in ck.coverage["files"])))
    for what, why in ck.not_run:
        summary.append((what, "NOT RUN", why))
    sec.append({"title": "Check results", "blocks": [
        _text("All checks ran on the package as shipped (a scratch copy), with its own "
              "Makefile targets where there is one (`make test`, `make test-qemu`, "
              "`make coverage`)."),
        _table(("check", "result", "detail"), summary)]})

    trows = [(t, v) for t, v in sorted(ck.tools.items())]
    flags = [("strict (all files unless listed below)", STRICT_FLAGS),
             ("host optimisation", "-O2"),
             ("Cortex-M7 double-precision FPU", f"{M7_DP_FLAGS} -O2 + strict flags"),
             ("Cortex-M7 single-precision FPU", f"{M7_SP_FLAGS} -O2 + strict flags"),
             ("arm-linux-gnueabihf", "-O2 + strict flags (the compiler's default armhf target)"),
             ("stack", "-fstack-usage -fcallgraph-info=su"),
             ("coverage", "-O0 -g --coverage"),
             ("cppcheck", CPPCHECK_FLAGS)]
    sec.append({"title": "Compilers and flags", "blocks": [
        _table(("tool", "version"), trows), _table(("build", "flags"), flags)]})

    srows = [(f, "pass" if p else "FAIL") for f, p, _ in ck.strict]
    blocks = [_text(f"Each C file compiled alone on the host with `{STRICT_FLAGS}`. "
                    "A file that fails is built with `" + RELAXED_FLAGS + "` in the package's "
                    "Makefile and CMake build, and is listed here with its diagnostics."),
              _table(("file", "strict flags"), srows)]
    for f, p, diag in ck.strict:
        if not p:
            blocks.append(_code(f"{f}:\n{diag}"))
    sec.append({"title": "Strict build", "blocks": blocks})

    if ck.cppcheck is not None:
        b = [_text(f"`cppcheck {CPPCHECK_FLAGS}` over src, solver, app and test: "
                   f"{len(ck.cppcheck['findings'])} findings.")]
        if ck.cppcheck["findings"]:
            b.append(_code("\n".join(ck.cppcheck["findings"])))
        sec.append({"title": "Static analysis", "blocks": b})

    if ck.cmake is not None and ck.cmake.get("tail"):
        sec[0]["blocks"].append(_code("CMake build failed:\n" + "\n".join(ck.cmake["tail"])))
    rrows = _runner_rows("host", ck.host) + _runner_rows("arm-linux-gnueabihf, qemu-arm", ck.qemu)
    blocks = [_text("The runner replays every vector through "
                    f"`{prefix}_plan_descent()` and checks every output; worst errors seen:"),
              _table(("platform", "result", "vectors", "worst errors"), rrows)]
    for label, r in (("host", ck.host), ("qemu-arm", ck.qemu)):
        if r is not None and r["failures"]:
            blocks.append(_code(f"{label} failures:\n" + "\n".join(r["failures"])))
    sec.append({"title": "Test-vector results", "blocks": blocks})

    for key, label in (("double", "double-precision FPU"), ("single", "single-precision FPU")):
        m = ck.m7.get(key)
        if m is None:
            continue
        blocks = [_text(f"Library objects of the guidance layer and solver, built with "
                        f"`arm-none-eabi-gcc {m['flags']} -O2`"
                        + (f" from a companion tree (`{m['tree']}`)" if m.get("tree") else "")
                        + ". A build and size check: nothing runs on this target here"
                        + ("; the test vectors replay the double-precision build only."
                           if m.get("tree", "").startswith("pdgc") else ".") )]
        if not m.get("built"):
            blocks.append(_text("**Build failed.**"))
            blocks += [_code(f"{x['file']}:\n{x['diagnostics']}") for x in m.get("log", [])]
            sec.append({"title": f"Cortex-M7, {label}", "blocks": blocks})
            continue
        size = m["size"]
        rows = [(o["object"], o["text"], o["data"], o["bss"]) for o in size["objects"]]
        t = size["total"] or {}
        rows.append(("total", t.get("text"), t.get("data"), t.get("bss")))
        blocks.append(_table(("object", "text [B]", "data [B]", "bss [B]"), rows))
        sz = m.get("sizeof", {})
        static_lib = (t.get("data") or 0) + (t.get("bss") or 0)
        blocks.append(_text(
            f"Static RAM: the library itself holds {static_lib} B (data + bss). All working "
            f"memory is caller-owned: `sizeof({prefix}_workspace)` = {sz.get('workspace')} B and "
            f"`sizeof({prefix}_plan)` = {sz.get('plan')} B on this target (from the symbol sizes "
            f"of a probe object), so a caller that places one of each in static memory needs "
            f"{static_lib + (sz.get('workspace') or 0) + (sz.get('plan') or 0)} B in all."))
        st = m["stack"]
        if "error" in st:
            blocks.append(_text(f"Stack: {st['error']}"))
        else:
            path = " -> ".join(f"{f} ({b} B)" for f, b in st["path"])
            blocks.append(_text(
                f"Worst stack depth from `{st['entry']}`: **{st['bytes']} B**, the largest sum of "
                f"frames along any call path of the call graph from -fcallgraph-info=su (no "
                f"recursion: the graph is acyclic{'' if not st['cycle'] else '; CYCLE FOUND: ' + ', '.join(st['cycle'])}). "
                f"Deepest path: {path}. Calls into the C and compiler run-time libraries ("
                f"{', '.join(st['external']) or 'none'}) are counted as 0 B: add the target "
                f"libraries' own figures. Frames that are not static: "
                f"{', '.join(st['not_static']) or 'none'}."))
        blocks.append(_table(("function", "frame [B]", "kind"), m["frames"]))
        nonstrict = [x["file"] for x in m["log"] if not x["strict"]]
        if nonstrict:
            blocks.append(_text("Files that failed the strict flags on this target (built relaxed "
                                "to measure them): " + ", ".join(nonstrict)))
            blocks += [_code(f"{x['file']}:\n{x['diagnostics']}") for x in m["log"] if not x["strict"]]
        if m.get("soft_double"):
            blocks.append(_text(
                "Double-precision operations in software (undefined `__aeabi_d*` helpers "
                "in the library): " + ", ".join(f"`{s}`" for s in m["soft_double"]) +
                ". On a single-precision FPU the guidance layer's double arithmetic "
                "(parameters, search, SI conversion) is emulated; the solver runs in float."
                if key == "single" else
                "Software double-precision helpers referenced: " +
                ", ".join(f"`{s}`" for s in m["soft_double"]) + "."))
        sec.append({"title": f"Cortex-M7, {label}", "blocks": blocks})

    if ck.coverage is not None:
        rows = [(c["file"], c["lines"], c["executed"], f"{c['percent']:.2f} %")
                for c in ck.coverage["files"]]
        lines = sum(c["lines"] for c in ck.coverage["files"])
        done = sum(c["executed"] for c in ck.coverage["files"])
        if lines:
            rows.append(("all library sources", lines, done, f"{100.0 * done / lines:.2f} %"))
        b = [_text("Statement (line) coverage of the library sources by the test vectors: "
                   "`make coverage` (gcc -O0 --coverage, `gcov -n`)."),
             _table(("file", "lines", "executed", "coverage"), rows)]
        if not ck.coverage["passed"]:
            b.append(_code("\n".join(ck.coverage.get("tail", []))))
        sec.append({"title": "Coverage", "blocks": b})
    return sec


def _campaign_blocks(s: dict) -> list:
    g = s.get("generated", {})
    a = s.get("accuracy", {})

    def st(d, scale=1.0):
        if not d:
            return "-"
        return (f"median {_g(d.get('p50') * scale)}, p99 {_g(d.get('p99') * scale)}, "
                f"worst {_g(d.get('worst') * scale)}")

    rows = [("cases", f"{s.get('cases_done')} of {s.get('cases_planned')}"
             + ("" if s.get("complete") else " (INCOMPLETE)")),
            ("seed", s.get("seed")), ("horizon", s.get("horizon")),
            ("generated: statuses", ", ".join(f"{k} {v}" for k, v in g.get("status_counts", {}).items())),
            ("generated: most iterations in one solve", st(g.get("iterations_max"))),
            ("generated: solves per plan", st(g.get("solves"))),
            ("generated: plan time [ms] (campaign machine)", st(g.get("solve_time_s"), 1e3)),
            ("reference solves", s.get("reference", {}).get("cases")),
            ("reference: statuses", ", ".join(f"{k} {v}" for k, v in
                                              s.get("reference", {}).get("status_counts", {}).items())),
            ("status agreement with the reference",
             f"{a.get('status_matches')} of {a.get('compared')}"),
            ("|relative fuel difference|", st(a.get("fuel_rel_diff_abs")))]
    for key in ("worst_fuel_rel_diff", "worst_time_of_flight_diff_s", "worst_objective_rel_diff"):
        w = a.get(key)
        if w:
            rows.append((key.replace("_", " "), f"{_g(w['value'])} (case {w['case']})"))
    return [_text("Summary of the envelope campaign (`pdgc envelope`) run on this tree "
                  "(its summary.json; the run's manifest names this tree's manifest hash). "
                  "In a campaign the reference uses its two-stage fallback: where the target "
                  "is out of reach it answers `least_miss`, which the generated code does not "
                  "have (it answers `infeasible`), and the status agreement counts those cases "
                  "as disagreements."),
            _table(("item", "value"), rows)]


def render_record(sections: list, title: str, intro: list) -> tuple:
    """(Markdown, HTML) of the record."""
    from codegen import report as R
    env = environment()
    md = env.get_template("handoff/record.md.j2").render(
        title=title, intro=intro, sections=[{"title": s["title"], "blocks": [
            dict(b, headers=[h.replace("|", "\\|") for h in b["headers"]],
                 rows=[[c.replace("|", "\\|").replace("\n", " ") for c in r] for r in b["rows"]])
            if b["kind"] == "table" else b for b in s["blocks"]]} for s in sections])

    def inline(t):
        h = R.esc(t)
        h = re.sub(r"\*\*(.+?)\*\*", r"<strong>\1</strong>", h)
        return re.sub(r"`([^`]+)`", r"<code>\1</code>", h)

    html_secs = []
    for i, s in enumerate(sections):
        parts = []
        for b in s["blocks"]:
            if b["kind"] == "text":
                cls = ' class="caution"' if s["title"] == "Caution" else ""
                parts.append(f"<p{cls}>{inline(b['text'])}</p>")
            elif b["kind"] == "code":
                parts.append(f"<pre><code>{R.esc(b['text'])}</code></pre>")
            else:
                parts.append(R.table(b["headers"], [[R.Raw(inline(c)) for c in r] for r in b["rows"]],
                                     text_columns=tuple(range(len(b["headers"])))))
        html_secs.append((re.sub(r"[^a-z0-9]+", "-", s["title"].lower()).strip("-"), s["title"],
                          "\n".join(parts)))
    html = R.page(title, html_secs, intro="\n".join(f"<p>{inline(p)}</p>" for p in intro))
    return md, html


# -- writing the package -------------------------------------------------------------

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
