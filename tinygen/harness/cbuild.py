"""Compile C sources into a host shared library and load it with cffi (ABI mode)."""
from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import tempfile
from pathlib import Path

import cffi

from tinygen.errors import TinygenError

# The warning set every emitted tree must pass (DEVELOPERS.md); float requant needs
# -ffp-contract=off so x86 and Arm compute the same products.
STRICT_FLAGS = ["-std=c99", "-Wall", "-Wextra", "-Wpedantic", "-Werror", "-ffp-contract=off"]
SANITIZE_FLAGS = ["-fsanitize=address,undefined", "-fno-sanitize-recover=all",
                  "-fno-omit-frame-pointer"]


def host_compiler() -> str:
    cc = os.environ.get("CC") or shutil.which("gcc") or shutil.which("cc") or shutil.which("clang")
    if not cc:
        raise TinygenError("no host C compiler found (install gcc or set CC)")
    return cc


def build_shared(sources: list[Path], include_dirs: list[Path], out_dir: Path,
                 defines: dict[str, str] | None = None, extra_flags: list[str] | None = None,
                 cc: str | None = None, opt: str = "-O2") -> Path:
    """Compile `sources` into out_dir/lib<hash>.so with the strict warning set."""
    cc = cc or host_compiler()
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    flags = [opt, "-fPIC", "-shared", *STRICT_FLAGS, *(extra_flags or [])]
    flags += [f"-I{d}" for d in include_dirs]
    flags += [f"-D{k}={v}" for k, v in (defines or {}).items()]
    key = hashlib.sha256()
    for part in [cc, *flags, *map(str, sources)]:
        key.update(part.encode())
    for src in sources:
        key.update(Path(src).read_bytes())
    lib = out_dir / f"lib{key.hexdigest()[:16]}.so"
    if lib.exists():
        return lib
    cmd = [cc, *flags, "-o", str(lib), *map(str, sources), "-lm"]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        first = (proc.stderr.strip().splitlines() or ["(no output)"])[0]
        raise TinygenError(f"host C compile failed: {first}")
    return lib


def load(cdef: str, lib_path: Path):
    """dlopen a shared library with the given cffi cdef; returns (ffi, lib)."""
    ffi = cffi.FFI()
    ffi.cdef(cdef)
    return ffi, ffi.dlopen(str(lib_path))


def scratch_dir(prefix: str = "tinygen-") -> Path:
    return Path(tempfile.mkdtemp(prefix=prefix))
