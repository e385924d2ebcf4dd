"""The environment is the lock: exact versions, every one hashed, nothing else.

requirements.lock (pip-compile --generate-hashes, `make lock`) pins every
distribution, transitive ones and the build backend included; `make install`
builds .venv from it alone. These tests check the running environment against
it, so a CI run (a fresh clone) shows that it installed exactly the locked set,
and that pyproject.toml and the lock agree (a dependency added to
pyproject.toml without `make lock` fails here).
"""

import re
import sys
import sysconfig
import tomllib
from importlib import metadata

from packaging.requirements import Requirement
from packaging.utils import canonicalize_name

from conftest import ROOT

LOCK = ROOT / "requirements.lock"

#: Installed but not locked, on purpose: pdgc itself (editable, from the
#: checkout) and pip, the installer that came with the venv (it is the one
#: Python ships, fixed by the interpreter; DEVELOPERS.md says why).
NOT_LOCKED = {"pdgc", "pip"}


def locked() -> dict:
    """{canonical name: (version, [sha256, ...])} of requirements.lock."""
    out, name = {}, None
    for line in LOCK.read_text().splitlines():
        m = re.match(r"^([A-Za-z0-9][A-Za-z0-9._-]*)==([^ \\;]+)", line)
        if m:
            name = canonicalize_name(m.group(1))
            assert name not in out, f"{name} is locked twice"
            out[name] = (m.group(2), [])
            continue
        h = re.match(r"^\s+--hash=sha256:([0-9a-f]{64})", line)
        if h:
            assert name is not None, line
            out[name][1].append(h.group(1))
        elif line.strip() and not line.lstrip().startswith("#"):
            raise AssertionError(f"unexpected line in requirements.lock: {line!r}")
    return out


def test_every_locked_distribution_has_a_hash():
    lock = locked()
    assert len(lock) > 40
    assert [n for n, (_, hashes) in lock.items() if not hashes] == []


def test_pyproject_requirements_are_all_locked_within_their_ranges():
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())
    reqs = (project["project"]["dependencies"]
            + [r for extra in project["project"]["optional-dependencies"].values() for r in extra]
            + project["build-system"]["requires"])
    lock = locked()
    missing, outside = [], []
    for text in reqs:
        req = Requirement(text)
        name = canonicalize_name(req.name)
        if name not in lock:
            missing.append(text)
        elif not req.specifier.contains(lock[name][0], prereleases=True):
            outside.append(f"{text} (locked {lock[name][0]})")
    assert missing == [], "in pyproject.toml but not in requirements.lock: run `make lock`"
    assert outside == [], "locked outside the range of pyproject.toml: run `make lock`"


def test_the_running_environment_is_exactly_the_lock():
    # The venv's site-packages only: sys.path may also hold directories of
    # distributions vendored inside others (setuptools/_vendor, once
    # setuptools is imported, as cffi's build does), which are not installed.
    site = sorted({sysconfig.get_paths()[k] for k in ("purelib", "platlib")})
    assert all(p.startswith(sys.prefix) for p in site)
    installed = {}
    for dist in metadata.distributions(path=site):
        installed[canonicalize_name(dist.metadata["Name"])] = dist.version
    lock = {n: v for n, (v, _) in locked().items()}
    for name in NOT_LOCKED:
        installed.pop(name, None)
    wrong = {n: (lock[n], installed[n]) for n in lock if n in installed and installed[n] != lock[n]}
    assert wrong == {}, "locked version, installed version: rebuild .venv (make install)"
    assert sorted(set(lock) - set(installed)) == [], "locked but not installed"
    assert sorted(set(installed) - set(lock)) == [], \
        "installed but not locked: add it to pyproject.toml and run `make lock`, or remove it"
