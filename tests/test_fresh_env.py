"""The same inputs give the same tree in a second, fresh environment.

A new virtual environment is built from requirements.lock exactly as
`make install` builds .venv (the interpreter's own pip, hash-checking mode,
then pdgc editable with --no-deps --no-build-isolation), from a copy of the
checkout in a scratch directory; its `pdgc generate` must give
generated/demo byte for byte, manifest.json (with the recorded versions)
included, and its environment must be exactly the lock (tests/test_lock.py,
run inside it).

Building the venv takes about a minute (DEVELOPERS.md, "Pinned
dependencies", has the measurement). Locally, PDGC_SKIP_FRESH_VENV=1 skips
this test; under CI=true it always runs.
"""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import DEMO_VEHICLE, ROOT

DEMO_TREE = ROOT / "generated" / "demo"
SKIP_VARIABLE = "PDGC_SKIP_FRESH_VENV"


def _skipped() -> bool:
    return bool(os.environ.get(SKIP_VARIABLE)) and os.environ.get("CI") != "true"


def copy_checkout(dest: Path) -> None:
    """The checkout's files as git sees them (tracked and new, not ignored),
    from the working tree; generated/ is left out, so nothing of the committed
    tree can leak into the regeneration."""
    out = subprocess.run(["git", "ls-files", "-z", "--cached", "--others", "--exclude-standard"],
                         cwd=ROOT, check=True, capture_output=True).stdout
    for rel in filter(None, out.decode().split("\0")):
        src = ROOT / rel
        if rel.startswith("generated/") or not src.is_file():
            continue
        (dest / rel).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(src, dest / rel)


def tree_files(root: Path) -> dict:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*"))
            if p.is_file() and not {"build", "build-cmake"} & set(p.relative_to(root).parts)}


def run(cmd, **kw):
    proc = subprocess.run(cmd, capture_output=True, text=True, **kw)
    assert proc.returncode == 0, f"{' '.join(map(str, cmd))}\n{proc.stdout[-3000:]}\n{proc.stderr[-3000:]}"
    return proc


@pytest.mark.skipif(_skipped(), reason=f"{SKIP_VARIABLE} is set (never skipped under CI=true)")
def test_demo_tree_regenerates_byte_for_byte_in_a_fresh_venv(tmp_path):
    src = tmp_path / "checkout"
    copy_checkout(src)
    assert (src / "requirements.lock").is_file() and not (src / "generated").exists()

    # The interpreter this suite runs on, as `make install` uses it (not the venv's).
    python = Path(sys.base_prefix) / "bin" / f"python{sys.version_info[0]}.{sys.version_info[1]}"
    env = {k: v for k, v in os.environ.items()
           if k not in ("VIRTUAL_ENV", "PYTHONPATH", "PYTHONHOME", "PYTHONSTARTUP")}
    venv = tmp_path / "venv"
    vpy = venv / "bin" / "python"
    run([python, "-m", "venv", venv], env=env)
    run([vpy, "-m", "pip", "install", "--quiet", "--require-hashes", "-r",
         src / "requirements.lock"], env=env, timeout=1800)
    run([vpy, "-m", "pip", "install", "--quiet", "--no-deps", "--no-build-isolation", "-e", src],
        env=env, cwd=src, timeout=600)

    # The fresh venv holds exactly the lock.
    run([vpy, "-m", "pytest", "-q", "-p", "no:cacheprovider", "tests/test_lock.py"],
        env=env, cwd=src, timeout=600)

    out = tmp_path / "demo"
    man = run([vpy, "-c", "import json, sys; m = json.load(open(sys.argv[1])); "
               "print(m['horizon'], m['backend'], m['c_name'], m['precision'])",
               DEMO_TREE / "manifest.json"], env=env).stdout.split()
    run([venv / "bin" / "pdgc", "generate", src / DEMO_VEHICLE.relative_to(ROOT),
         "--horizon", man[0], "--backend", man[1], "--c-name", man[2], "--precision", man[3],
         "--out", out], env=env, cwd=tmp_path, timeout=600)

    fresh, committed = tree_files(out), tree_files(DEMO_TREE)
    assert sorted(fresh) == sorted(committed)
    differ = [rel for rel in committed if fresh[rel] != committed[rel]]
    assert differ == [], f"differ from generated/demo in the fresh venv: {differ}"
