"""Locate the cross toolchains and QEMU used to build and run emitted trees on targets:
arm-none-eabi-gcc + newlib + qemu-system-arm for Cortex-M, riscv64-unknown-elf-gcc +
picolibc + qemu-system-riscv32 for 32-bit RISC-V."""
from __future__ import annotations

import functools
import os
import shutil
import subprocess
from dataclasses import dataclass

from tinygen.errors import TinygenError

INSTALL_HINT = "apt-get install gcc-arm-none-eabi libnewlib-arm-none-eabi qemu-system-arm"
RISCV_INSTALL_HINT = ("apt-get install gcc-riscv64-unknown-elf picolibc-riscv64-unknown-elf "
                      "qemu-system-misc")
# arch -> (program prefix, C library name, the library's specs file, QEMU, install hint)
_ARCHES = {
    "arm": ("arm-none-eabi-", "newlib", "nano.specs", "qemu-system-arm", INSTALL_HINT),
    "riscv": ("riscv64-unknown-elf-", "picolibc", "picolibc.specs", "qemu-system-riscv32",
              RISCV_INSTALL_HINT),
}


@dataclass(frozen=True)
class Toolchain:
    """Absolute paths of the programs the target harness runs."""

    gcc: str
    nm: str
    size: str
    objdump: str
    qemu: str


def _has_specs(gcc: str, specs: str) -> bool:
    """The C library ships its specs file; gcc prints a bare name for a file it cannot find."""
    proc = subprocess.run([gcc, f"-print-file-name={specs}"], capture_output=True, text=True)
    return proc.returncode == 0 and os.path.isabs(proc.stdout.strip())


def find_toolchain(arch: str = "arm") -> Toolchain:
    """Find the cross gcc, nm, size, objdump (with the C library) and QEMU for `arch`
    ("arm" or "riscv") on PATH.

    Raises TinygenError naming what is missing and how to install it.
    """
    if arch not in _ARCHES:
        raise TinygenError(f"unknown target architecture '{arch}'")
    return _find_on(os.environ.get("PATH", ""), arch)


@functools.lru_cache(maxsize=8)
def _find_on(search_path: str, arch: str) -> Toolchain:
    triple, libc, specs, qemu, hint = _ARCHES[arch]
    wanted = {
        "gcc": triple + "gcc",
        "nm": triple + "nm",
        "size": triple + "size",
        "objdump": triple + "objdump",
        "qemu": qemu,
    }
    found = {key: shutil.which(program, path=search_path) for key, program in wanted.items()}
    missing = [wanted[key] for key, path in found.items() if path is None]
    if not missing and not _has_specs(found["gcc"] or "", specs):
        missing.append(f"{libc} for {triple[:-1]}")
    if missing:
        raise TinygenError(f"{', '.join(missing)} not found on PATH; install with: {hint}")
    return Toolchain(**found)  # type: ignore[arg-type]
