"""Atomic file writes: a reader never sees half a file."""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path


def write_atomic(path, data, mode: int = 0o644) -> None:
    """Write bytes or text to ``path`` through a temporary file and rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(data, str):
        data = data.encode("utf-8")
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, mode)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


def swap_in_directory(tmp: Path, out_dir: Path) -> None:
    """Replace ``out_dir`` by the finished directory ``tmp`` (same parent).

    The old directory is renamed aside before the new one takes its name and
    is removed only after, so an interruption leaves the old tree or the new
    one, never half of one. ``tmp`` is removed if anything fails.
    """
    try:
        tmp.chmod(0o755)
        old = None
        if out_dir.exists():
            old = out_dir.parent / f".{out_dir.name}.old-{tmp.name[-8:]}"
            out_dir.rename(old)
        tmp.rename(out_dir)
        if old is not None:
            shutil.rmtree(old)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
