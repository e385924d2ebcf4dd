"""The tools of the target checks: their flags, and running them."""

from __future__ import annotations

import hashlib
import shutil
import subprocess


STRICT_FLAGS = "-std=c99 -Wall -Wextra -Wpedantic -Wshadow -Wconversion -Werror"
RELAXED_FLAGS = "-std=c99 -Wall -Wextra -Werror"
M7_DP_FLAGS = "-mcpu=cortex-m7 -mthumb -mfpu=fpv5-d16 -mfloat-abi=hard"
M7_SP_FLAGS = "-mcpu=cortex-m7 -mthumb -mfpu=fpv5-sp-d16 -mfloat-abi=hard"
CPPCHECK_FLAGS = ("--std=c99 --enable=warning,style,performance,portability "
                  "--error-exitcode=1 --inline-suppr --quiet")
REQUIRED_TOOLS = ("cc", "gcov", "cppcheck", "arm-none-eabi-gcc", "arm-none-eabi-size",
                  "arm-none-eabi-nm", "arm-linux-gnueabihf-gcc", "qemu-arm")
ARMHF_SYSROOT = "/usr/arm-linux-gnueabihf"
STEP_TIMEOUT_S = 900


def missing_tools() -> list:
    return [t for t in REQUIRED_TOOLS if shutil.which(t) is None]


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
