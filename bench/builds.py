"""Build a (backend, N): generate, compile with the tree's Makefile, sizes, harness, cffi."""

from __future__ import annotations

import hashlib
import importlib.util
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

from bench.config import BENCH_DIR, MAX_REPS, Config, Instance, say
from codegen.bind import GeneratedSolver, cdef_text
from codegen.emit import generate
from codegen.fsutil import write_atomic


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


def build(cfg: Config, backend: str, horizon: int, precision: str = "double",
          cflags: str | None = None) -> Build:
    """Generate and compile one tree (``cflags``: the tree's CFLAGS, default cfg.cflags;
    position-independent code added; the harness gets the same)."""
    cflags = cfg.cflags if cflags is None else cflags
    base = cfg.work_dir / f"{backend}-N{horizon}"
    tree = base / "tree"
    say(f"generating {backend} N={horizon}")
    manifest = generate(cfg.vehicle_path, horizon, tree, backend=backend, precision=precision)
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
    # the tree's FP_CONTRACT option (templates/Makefile.j2) follows CFLAGS on its
    # command lines, so a -ffp-contract in cflags is passed as that option
    contract = re.findall(r"-ffp-contract=(\w+)", cflags)
    fp = [f"FP_CONTRACT={contract[-1]}"] if contract else []
    r = subprocess.run(["make", "-j2", f"CFLAGS={cflags} -fPIC", "STRICT=-std=c99 -Wall -Wextra", *fp, lib],
                       cwd=tree, capture_output=True, text=True)
    compile_s = time.perf_counter() - t0
    if r.returncode != 0:
        raise RuntimeError(f"{backend} N={horizon}: make failed:\n{r.stderr[-3000:]}")
    archive = tree / lib
    text, data, bss = size_totals(archive)
    g_bytes, s_bytes = source_bytes(tree, manifest)
    harness = build_harness(tree, manifest, archive, base / "harness", cflags)
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


def build_harness(tree: Path, manifest: dict, archive: Path, out_dir: Path,
                  cflags: str = "-O2") -> Path:
    prefix = manifest["c_name"]
    out_dir.mkdir(parents=True, exist_ok=True)
    src = out_dir / f"{prefix}_bench_harness.c"
    write_atomic(src, render_harness(prefix))
    exe = out_dir / f"{prefix}_bench_harness"
    b = manifest["build"]
    cmd = [_cc(), "-std=c99", *cflags.split(), "-Wall", "-Wextra"]
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
