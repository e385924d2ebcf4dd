"""Solver backends: each turns the parametric problem into solver C sources.

A backend returns a :class:`BackendOutput`: the solver's files (placed under
``solver/`` in the tree), the adapter source that implements
``{prefix}_backend.h`` for it, and what the build files need (sources,
include directories, defines). The guidance layer above is the same for all.

Backends:
  ``cvxpygen-ecos``  cvxpygen's ECOS path (ECOS sources, heap in its set-up)
  ``cvxpygen-qoco``  cvxpygen's QOCOGEN custom-solver path
  ``native``         our own static-memory interior-point solver (codegen.backends.native)
"""

from __future__ import annotations

import shutil
from pathlib import Path

from codegen.backends.base import BackendOutput
from codegen.backends.cvxpygen import CvxpygenBackend

__all__ = ["BACKENDS", "DEFAULT_BACKEND", "BackendOutput", "get_backend"]


def native_backend():
    from codegen.backends.native import backend as nb
    return nb.NativeBackend()


BACKENDS = {
    "cvxpygen-ecos": lambda: CvxpygenBackend("cvxpygen-ecos", "ECOS", "ECOS"),
    "cvxpygen-qoco": lambda: CvxpygenBackend("cvxpygen-qoco", "QOCOGEN", "QOCOGEN"),
}

DEFAULT_BACKEND = "native"


def get_backend(name: str):
    from codegen.errors import InputError
    if name == "native":
        try:
            return native_backend()
        except ModuleNotFoundError as exc:
            raise InputError("--backend", name, f"is not available in this build ({exc})") from None
    if name not in BACKENDS:
        raise InputError("--backend", name,
                         f"must be one of {', '.join(sorted(list(BACKENDS) + ['native']))}")
    return BACKENDS[name]()


def copy_tree(src: Path, dst: Path) -> None:
    shutil.copytree(src, dst, dirs_exist_ok=True)
