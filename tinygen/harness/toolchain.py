"""Locate the Arm cross toolchain and QEMU used to build and run emitted trees on Cortex-M."""
from __future__ import annotations

import functools
import os
import shutil
import subprocess
from dataclasses import dataclass

from tinygen.errors import TinygenError

INSTALL_HINT = "apt-get install gcc-arm-none-eabi libnewlib-arm-none-eabi qemu-system-arm"
_TRIPLE = "arm-none-eabi-"


@dataclass(frozen=True)
class Toolchain:
    """Absolute paths of the programs the target harness runs."""

    gcc: str
    nm: str
    size: str
    objdump: str
    qemu: str


def _has_newlib(gcc: str) -> bool:
    """newlib-nano ships nano.specs; gcc prints a bare name for a file it cannot find."""
    proc = subprocess.run([gcc, "-print-file-name=nano.specs"], capture_output=True, text=True)
    return proc.returncode == 0 and os.path.isabs(proc.stdout.strip())


def find_toolchain() -> Toolchain:
    """Find arm-none-eabi-{gcc,nm,size,objdump} (with newlib) and qemu-system-arm on PATH.

    Raises TinygenError naming what is missing and how to install it.
    """
    return _find_on(os.environ.get("PATH", ""))


@functools.lru_cache(maxsize=8)
def _find_on(search_path: str) -> Toolchain:
    wanted = {
        "gcc": _TRIPLE + "gcc",
        "nm": _TRIPLE + "nm",
        "size": _TRIPLE + "size",
        "objdump": _TRIPLE + "objdump",
        "qemu": "qemu-system-arm",
    }
    found = {key: shutil.which(program, path=search_path) for key, program in wanted.items()}
    missing = [wanted[key] for key, path in found.items() if path is None]
    if not missing and not _has_newlib(found["gcc"] or ""):
        missing.append("newlib for arm-none-eabi")
    if missing:
        raise TinygenError(f"{', '.join(missing)} not found on PATH; install with: {INSTALL_HINT}")
    return Toolchain(**found)  # type: ignore[arg-type]
