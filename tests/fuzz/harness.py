"""A faster host build for fuzzing: kernel objects compiled once per session, then reused.

`run_check` builds every tree from scratch (the kernels are most of the compile time). Here
each tree's .c files become objects keyed by their text plus every header in the tree, so a
kernel file is compiled once per distinct content; only <prefix>.c is new for each model.
`cached_check` is tinygen.check.run_check itself, with its build step swapped for this one.
"""
from __future__ import annotations

import hashlib
import subprocess
import tempfile
from pathlib import Path
from unittest import mock

import tinygen.check
from tinygen.codegen.emit import render_tree, write_tree
from tinygen.harness.cbuild import STRICT_FLAGS, host_compiler, load
from tinygen.harness.host import HostModel, _macro


class ObjectCache:
    """Compiled objects by content hash, in one temporary folder for the session."""

    def __init__(self, flags: list[str] | None = None):
        self.dir = Path(tempfile.mkdtemp(prefix="tinygen-fuzz-objs-"))
        self.cc = host_compiler()
        self.flags = ["-O1", "-fPIC", *STRICT_FLAGS, *(flags or [])]
        self.compiled = 0

    def obj(self, src: Path, tree: Path) -> Path:
        key = hashlib.sha256(" ".join([self.cc, *self.flags]).encode())
        key.update(src.read_bytes())
        # kernels include only tg_*.h; the model file includes its own header too
        headers = tree.glob("tg_*.h" if src.name.startswith("tg_") else "*.h")
        for h in sorted(headers):
            key.update(h.name.encode() + h.read_bytes())
        out = self.dir / f"{src.stem}-{key.hexdigest()[:20]}.o"
        if not out.exists():
            self._run([self.cc, *self.flags, f"-I{tree}", "-c", str(src), "-o", str(out)])
            self.compiled += 1
        return out

    def link(self, objs: list[Path], out: Path) -> Path:
        self._run([self.cc, "-shared", "-o", str(out), *map(str, objs), "-lm"])
        return out

    @staticmethod
    def _run(cmd: list[str]) -> None:
        r = subprocess.run(cmd, capture_output=True, text=True)
        if r.returncode != 0:
            raise AssertionError(f"C build failed: {' '.join(cmd)}\n{r.stderr}")


class CachedHostModel(HostModel):
    """HostModel (same run(): guard bytes, fill patterns) built from cached objects."""

    def __init__(self, tree: Path, prefix: str, build_dir: Path, cache: ObjectCache):
        build_dir.mkdir(parents=True, exist_ok=True)
        objs = [cache.obj(src, tree) for src in sorted(tree.glob("*.c"))]
        lib = cache.link(objs, build_dir / "model.so")
        cdef = (f"int {prefix}_run(void *arena, void *const *inputs, void *const *outputs);\n"
                f"void *{prefix}_input(void *arena, int index);\n"
                f"void *{prefix}_output(void *arena, int index);\n")
        self.ffi, self.lib = load(cdef, lib)
        self.prefix = prefix
        header = (tree / f"{prefix}.h").read_text()
        self.arena_bytes = _macro(header, f"{prefix.upper()}_ARENA_BYTES")
        self.align = _macro(header, f"{prefix.upper()}_ARENA_ALIGN")


def cached_check(cache: ObjectCache, c, model_path: str, samples, flags: str = "fuzz"):
    """tinygen.check.run_check with the host build going through `cache`."""
    def build_host(c, flags, work, sanitize=False):
        tree = work / "tree"
        write_tree(render_tree(c, flags), str(tree), force=True)
        return CachedHostModel(tree, c.options.prefix, work / "build", cache)

    with mock.patch.object(tinygen.check, "build_host", build_host):
        return tinygen.check.run_check(c, model_path, samples, flags, against_ort=False)
