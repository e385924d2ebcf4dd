"""Files written so that a reader never sees half of one, and read back the same way.

write_atomic and swap_in_directory write; complete_lines reads an
append-only log whose last line a kill may have torn; read_toml reads an
input file once, for both its contents and its hash. PACKAGE_DIR,
REPO_DIR and TEMPLATES_DIR say where the package, the checkout and its
templates are."""

from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
import tomllib
from pathlib import Path

from codegen.errors import InputError

#: The package's own directory (codegen/), the checkout that holds it, and
#: the templates beside it (the package is installed in editable mode).
PACKAGE_DIR = Path(__file__).resolve().parent
REPO_DIR = PACKAGE_DIR.parent
TEMPLATES_DIR = REPO_DIR / "templates"


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


def complete_lines(path) -> list:
    """[(line number, bytes)] of the non-blank whole lines of an append-only log.

    A line that ends with a newline was written whole (one write per record);
    only the text after the last newline can be torn by a kill. It is cut off
    the file, so that the next append starts on a fresh line, and ignored.
    A missing file has no lines.
    """
    path = Path(path)
    if not path.exists():
        return []
    data = path.read_bytes()
    end = data.rfind(b"\n") + 1
    if end < len(data):
        with open(path, "r+b") as fh:
            fh.truncate(end)
            fh.flush()
            os.fsync(fh.fileno())
    return [(n, line) for n, line in enumerate(data[:end].splitlines(), 1) if line.strip()]


def read_toml(path, what: str):
    """(parsed document, sha256 of the bytes) of a TOML input file.

    ``what`` names the file in errors ("vehicle file", ...): an unreadable
    file or bad TOML is an InputError, never a traceback.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(what, str(path), f"cannot be read: {exc.strerror}") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(what, str(path), f"is not valid TOML: {exc}") from None
    return data, hashlib.sha256(raw).hexdigest()
