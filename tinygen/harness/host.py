"""Compile an emitted tree on the host and run it through cffi.

The arena is a cffi-owned buffer with guard bytes on both sides; each run fills the arena
with a pattern first, and the guards are checked after every run.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from tinygen.errors import TinygenError
from tinygen.harness.cbuild import build_shared, load

GUARD = 64
GUARD_BYTE = 0xA5


class HostModel:
    """A compiled emitted tree loaded in this process."""

    def __init__(self, tree: Path, prefix: str, build_dir: Path, cc: str | None = None,
                 opt: str = "-O2", extra_flags: list[str] | None = None, extra_cdef: str = ""):
        """extra_cdef: declarations of further functions the tree's C files define (a
        harness file compiled with the tree, e.g. the trace capture of tinygen.trace)."""
        tree = Path(tree)
        sources = sorted(tree.glob("*.c"))
        lib = build_shared(sources, [tree], build_dir, cc=cc, opt=opt,
                           extra_flags=extra_flags)
        cdef = (f"int {prefix}_run(void *arena, void *const *inputs, void *const *outputs);\n"
                f"void *{prefix}_input(void *arena, int index);\n"
                f"void *{prefix}_output(void *arena, int index);\n" + extra_cdef)
        self.ffi, self.lib = load(cdef, lib)
        self.prefix = prefix
        header = (tree / f"{prefix}.h").read_text()
        self.arena_bytes = _macro(header, f"{prefix.upper()}_ARENA_BYTES")
        self.align = _macro(header, f"{prefix.upper()}_ARENA_ALIGN")

    def run(self, inputs: list[np.ndarray], out_specs: list[tuple[int, np.dtype]],
            io: str = "arena", fill: int = 0x00) -> list[np.ndarray]:
        """Run once. inputs: raw C buffers (bytes as the C expects); out_specs: (count, dtype)."""
        ffi = self.ffi
        total = self.arena_bytes + 2 * GUARD + self.align
        raw = ffi.new("uint8_t[]", total)
        base = int(ffi.cast("uintptr_t", raw))
        start = (-(base + GUARD)) % self.align + GUARD
        buf = ffi.buffer(raw, total)
        view = np.frombuffer(buf, dtype=np.uint8)
        view[:] = GUARD_BYTE
        view[start:start + self.arena_bytes] = fill
        arena = raw + start
        run = getattr(self.lib, f"{self.prefix}_run")
        in_get = getattr(self.lib, f"{self.prefix}_input")
        out_get = getattr(self.lib, f"{self.prefix}_output")
        keep = []
        if io == "external":
            in_bufs = [ffi.from_buffer(np.ascontiguousarray(x).copy()) for x in inputs]
            out_arrays = [np.zeros(n, dtype=dt) for n, dt in out_specs]
            out_bufs = [ffi.from_buffer(a) for a in out_arrays]
            keep += in_bufs + out_bufs
            ins = ffi.new("void *[]", [ffi.cast("void *", b) for b in in_bufs] or [ffi.NULL])
            outs = ffi.new("void *[]", [ffi.cast("void *", b) for b in out_bufs] or [ffi.NULL])
            rc = run(arena, ins, outs)
            results = [a.copy() for a in out_arrays]
        else:
            for i, x in enumerate(inputs):
                p = in_get(arena, i)
                data = np.ascontiguousarray(x).tobytes()
                ffi.memmove(p, data, len(data))
            rc = run(arena, ffi.NULL, ffi.NULL)
            results = []
            for i, (n, dt) in enumerate(out_specs):
                p = out_get(arena, i)
                nbytes = n * np.dtype(dt).itemsize
                results.append(np.frombuffer(ffi.buffer(p, nbytes), dtype=dt).copy())
        if rc != 0:
            raise TinygenError(f"{self.prefix}_run returned {rc}")
        if np.any(view[:start] != GUARD_BYTE) or \
                np.any(view[start + self.arena_bytes:] != GUARD_BYTE):
            raise TinygenError("the model wrote outside its arena (guard bytes changed)")
        return results


def _macro(header: str, name: str) -> int:
    for line in header.splitlines():
        parts = line.split()
        if len(parts) >= 3 and parts[0] == "#define" and parts[1] == name:
            return int(parts[2].rstrip("uU"))
    raise TinygenError(f"{name} not found in the generated header")
