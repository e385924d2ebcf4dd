"""Compile a rendered native solver into a shared library and load it (cffi ABI).

A development and test aid for the solver core alone; the guidance layer's
own binding of whole generated trees lives elsewhere.
"""

from __future__ import annotations

import subprocess
from pathlib import Path

import cffi
import numpy as np

from codegen.fsutil import write_atomic

STRICT_FLAGS = ["-std=c99", "-Wall", "-Wextra", "-Wpedantic", "-Wshadow", "-Werror"]


def write_sources(files: dict, outdir) -> Path:
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    for name, text in files.items():
        write_atomic(outdir / name, text)
    return outdir


def compile_shared(files: dict, outdir, c_name: str = "pdg", opt: str = "-O2",
                   extra_flags=()) -> Path:
    """gcc the solver into ``outdir/lib{c_name}_socp.so``; returns its path."""
    prefix = c_name
    outdir = write_sources(files, outdir)
    lib = outdir / f"lib{prefix}_socp.so"
    cmd = ["gcc", opt, *STRICT_FLAGS, "-fPIC", "-shared", *extra_flags,
           "-o", str(lib), str(outdir / f"{prefix}_socp.c"), "-lm"]
    subprocess.run(cmd, check=True, capture_output=True, text=True)
    return lib


class NativeSolver:
    """Loads a compiled solver; ``solve(params)`` returns a dict of results."""

    def __init__(self, lib_path, header_path, c_name: str = "pdg"):
        prefix = c_name
        pre = subprocess.run(["gcc", "-E", "-P", str(header_path)], check=True,
                             capture_output=True, text=True).stdout
        self.ffi = cffi.FFI()
        self.ffi.cdef(pre)
        self.lib = self.ffi.dlopen(str(lib_path))
        self.prefix = prefix
        self.real = "float" if "typedef float" in pre else "double"
        self.dtype = np.float32 if self.real == "float" else np.float64
        self._solve = getattr(self.lib, f"{prefix}_socp_solve")
        self._default = getattr(self.lib, f"{prefix}_socp_config_init")

    def new_work(self):
        return self.ffi.new(f"{self.prefix}_socp_work *")

    def settings(self, **overrides):
        st = self.ffi.new(f"{self.prefix}_socp_config *")
        self._default(st)
        for key, val in overrides.items():
            setattr(st, key, val)
        return st

    def vec(self, work, name, size):
        buf = self.ffi.buffer(getattr(work, name), size * np.dtype(self.dtype).itemsize)
        return np.frombuffer(buf, dtype=self.dtype, count=size).astype(float)

    def solve(self, params, work=None, settings=None, sizes=None):
        params = np.ascontiguousarray(params, dtype=self.dtype)
        w = work if work is not None else self.new_work()
        pp = self.ffi.cast(f"{self.real} *", self.ffi.from_buffer(params))
        status = self._solve(w, pp, settings if settings is not None else self.ffi.NULL)
        out = {"status": int(status), "objective": float(w.objective),
               "iterations": int(w.iterations), "primal_residual": float(w.primal_residual),
               "dual_residual": float(w.dual_residual), "duality_gap": float(w.duality_gap),
               "pivots_replaced": int(w.pivots_replaced),
               "breakdown_cause": int(w.breakdown_cause),
               "correction_passes": int(w.correction_passes), "work": w}
        if sizes is not None:
            n, p, m = sizes
            out["x"] = self.vec(w, "x", n)
            out["y"] = self.vec(w, "y", p) if p else np.zeros(0)
            out["z"] = self.vec(w, "z", m)
            out["s"] = self.vec(w, "s", m)
        return out
