"""What every backend returns: the solver's files and what the tree's build needs.

A backend module imports this one and the model; this module imports
nothing of the project, so no backend circles back to the registry."""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass
class BackendOutput:
    files: dict                      # relative path in the tree -> bytes (solver sources)
    adapter_c: str                   # src/{prefix}_backend.c
    backend_header: str = ""         # header included by {prefix}_backend.h
    backend_fields: list = field(default_factory=lambda: ["int unused;"])
    solver_sources: list = field(default_factory=list)   # relative paths
    include_dirs: list = field(default_factory=list)
    defines: list = field(default_factory=list)
    solver_strict: bool = False      # solver sources build with strict warnings
    reentrant: bool = False
    heap_free: bool = False
    info: dict = field(default_factory=dict)             # for the README and manifest
    backend_bytes: int = 0           # size of {prefix}_backend_work (0: state is global)
