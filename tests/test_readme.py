"""The README, followed as written (issue 18): every command block, in order,
in a scratch copy of the checkout, at small sizes.

Each command line of a ```sh block must match exactly one rule of RULES:
run as written, run smaller (the substitutions are listed, and only sizes
change), or skip with the reason. A line no rule knows fails the test, so a
new README command is either run here or skipped on purpose. Every command
run must exit 0 (the README predicts no other code for these), and afterwards
`git status` of the copy shows nothing the README created that .gitignore
does not cover. The ```python block runs too.

Measured on the 2-core machine with other jobs running: about a minute and
a half, most of it the hand-off's target checks and the compiles.
"""

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import ROOT

#: (pattern matched at the start of a command, action, substitutions or reason).
#: Sizes only: cases, runs and horizons; nothing else of a command changes.
SMALL = ((r"--cases 1000\b", "--cases 4"), (r"--cases 200\b", "--cases 3"),
         (r"--runs 500\b", "--runs 2"), (r"--horizon (50|20)\b", "--horizon 10"))
RULES = (
    ("make demo", "skip", "minutes; its steps are the commands below, which run here"),
    ("make test", "skip", "the suite this test is part of"),
    ("make bench", "skip", "the benchmarks; tests/test_bench_smoke.py runs a smoke version"),
    ("tail -f ", "skip", "follows a log forever"),
    ("PDGC_BENCH_", "skip", "the benchmarks at chosen sizes"),
    (".venv/bin/pdgc handoff ", "small", SMALL + ((r"$", " --check-cases 2"),)),
    (".venv/bin/pdgc ", "small", SMALL),
    ("make -C mytree ", "run", ()),
    ("cd gen50-handoff ", "run", ()),
)


def commands(readme: str):
    """[(block number, command)] of the ```sh blocks, continuation lines
    joined, comments dropped; and the ```python blocks' sources."""
    shell, python = [], []
    for n, m in enumerate(re.finditer(r"```(sh|python)\n(.*?)```", readme, re.S)):
        if m.group(1) == "python":
            python.append(m.group(2))
            continue
        text = m.group(2).replace("\\\n", " ")
        for line in text.splitlines():
            line = re.sub(r"\s+#.*$", "", line).strip()
            if line and not line.startswith("#"):
                shell.append((n, re.sub(r"\s+", " ", line)))
    return shell, python


def rule_for(command):
    hits = [r for r in RULES if command.startswith(r[0])]
    assert hits, f"no rule in tests/test_readme.py for the README command: {command}"
    return hits[0]


def apply(command, subs):
    for pattern, repl in subs:
        command = re.sub(pattern, repl, command)
    return command


def scratch_checkout(dest: Path) -> Path:
    """git's tracked and new files (not ignored) copied into a new repository."""
    files = subprocess.run(["git", "ls-files", "-z", "--cached", "--others", "--exclude-standard"],
                           cwd=ROOT, capture_output=True, check=True).stdout.split(b"\0")
    for f in files:
        if not f:
            continue
        src = ROOT / f.decode()
        if src.is_file():
            (dest / f.decode()).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(src, dest / f.decode())
    git = ["git", "-c", "user.name=readme-test", "-c", "user.email=readme-test@invalid"]
    subprocess.run(git + ["init", "-q"], cwd=dest, check=True)
    subprocess.run(git + ["add", "-A"], cwd=dest, check=True)
    subprocess.run(git + ["commit", "-q", "-m", "scratch"], cwd=dest, check=True)
    # The venv of this run, where the README expects one.
    (dest / ".venv").symlink_to(Path(sys.prefix))
    return dest


def test_every_readme_command_has_a_rule():
    shell, python = commands((ROOT / "README.md").read_text())
    assert len(shell) >= 15 and python
    for _, cmd in shell:
        rule_for(cmd)


def test_readme_walkthrough(tmp_path):
    if not shutil.which("make") or not shutil.which("gcc"):
        pytest.skip("needs make and gcc")
    repo = scratch_checkout(tmp_path / "clone")
    env = dict(os.environ, PDGC_CACHE=str(tmp_path / "cffi-cache"))
    shell, python = commands((repo / "README.md").read_text())
    log = []
    for block, cmd in shell:
        _, action, arg = rule_for(cmd)
        if action == "skip":
            log.append(f"skip  {cmd}  ({arg})")
            continue
        run = apply(cmd, arg) if action == "small" else cmd
        done = subprocess.run(["bash", "-c", run], cwd=repo, env=env, capture_output=True,
                              text=True, timeout=600)
        log.append(f"exit {done.returncode}  {run}")
        assert done.returncode == 0, "\n".join(log) + "\n" + done.stdout[-3000:] + done.stderr[-3000:]
    for source in python:
        done = subprocess.run([sys.executable, "-c", source], cwd=repo, env=env, capture_output=True,
                              text=True, timeout=600)
        log.append(f"exit {done.returncode}  python (README example)")
        assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
        assert done.stdout.splitlines()[0].startswith("target_met ")
    print("\n".join(log))
    # Issue 18, item 3: nothing the README created is left untracked.
    status = subprocess.run(["git", "status", "--porcelain", "--untracked-files=all"], cwd=repo,
                            capture_output=True, text=True, check=True).stdout
    assert status == "", status
