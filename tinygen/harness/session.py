"""Run a compiled model like an inference session: ONNX-shaped arrays in, ONNX-shaped out.

Float inputs are quantized and float outputs dequantized by the emitted C helpers
(<prefix>_quantize_input / <prefix>_dequantize_output), so a session exercises exactly the
code a firmware would call.
"""
from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np

from tinygen.codegen.emit import render_tree, write_tree
from tinygen.compiler import BuildOptions, Compiled, compile_model
from tinygen.harness.cbuild import build_shared, load
from tinygen.ir import storage_perm
from tinygen.passes.layout import storage_shape

CDEF = """
int {p}_run(void *arena, void *const *inputs, void *const *outputs);
void *{p}_input(void *arena, int index);
void *{p}_output(void *arena, int index);
void {p}_quantize_input(int index, const float *x, void *dst, uint32_t count);
void {p}_dequantize_output(int index, const void *src, float *dst, uint32_t count);
"""


class Session:
    """Compile `model_path`, build the C on the host and keep it loaded."""

    def __init__(self, model_path: str, options: BuildOptions | None = None,
                 work_dir: str | None = None, extra_flags: list[str] | None = None,
                 compiled: Compiled | None = None, flags: str = "session"):
        """compiled: an already compiled model (then model_path and options are its own);
        flags: the text the tree's header shows as its flags."""
        self.options = compiled.options if compiled else (options or BuildOptions())
        self.compiled: Compiled = compiled or compile_model(str(model_path), self.options)
        self._tmp = None
        if work_dir is None:
            self._tmp = tempfile.TemporaryDirectory(prefix="tinygen-session-")
            work_dir = self._tmp.name
        work = Path(work_dir)
        self.files = render_tree(self.compiled, flags)
        self.tree = work / "tree"
        write_tree(self.files, str(self.tree), force=True)
        lib = build_shared(sorted(self.tree.glob("*.c")), [self.tree], work / "build",
                           extra_flags=extra_flags)
        p = self.options.prefix
        self.ffi, self.lib = load(CDEF.format(p=p), lib)
        self._run = getattr(self.lib, f"{p}_run")
        self._in = getattr(self.lib, f"{p}_input")
        self._out = getattr(self.lib, f"{p}_output")
        self._q = getattr(self.lib, f"{p}_quantize_input")
        self._dq = getattr(self.lib, f"{p}_dequantize_output")
        align = max(64, self.compiled.plan.align)
        self.arena = self.ffi.new("uint8_t[]", self.compiled.plan.arena_bytes + align)
        base = int(self.ffi.cast("uintptr_t", self.arena))
        self._arena_ptr = self.arena + ((-base) % align)

    @property
    def graph(self):
        return self.compiled.graph

    def input_names(self) -> list[str]:
        return [io.onnx_name for io in self.graph.inputs]

    def run(self, feeds: dict[str, np.ndarray]) -> list[np.ndarray]:
        """Feed arrays in ONNX layout and type; returns outputs in ONNX layout and type.

        Float inputs are quantized by the emitted <prefix>_quantize_input, float outputs
        dequantized by <prefix>_dequantize_output; integer ones are copied as they are."""
        g, ffi = self.graph, self.ffi
        external = self.options.io == "external"
        keep = []
        in_ptrs = []
        for i, io in enumerate(g.inputs):
            t = g.tensors[io.name]
            x = np.asarray(feeds[io.onnx_name]).reshape(t.shape)
            x = np.ascontiguousarray(np.transpose(x, storage_perm(len(t.shape), t.layout)))
            if external:
                buf = ffi.new("uint8_t[]", max(t.size * np.dtype(io.buffer_dtype).itemsize, 1))
                keep.append(buf)
                dst = ffi.cast("void *", buf)
            else:
                dst = self._in(self._arena_ptr, i)
            in_ptrs.append(dst)
            if io.onnx_dtype == "float32":
                xf = np.ascontiguousarray(x, dtype=np.float32)
                self._q(i, ffi.cast("const float *", ffi.from_buffer(xf)), dst, xf.size)
            else:
                raw = x.astype(io.buffer_dtype).tobytes()
                ffi.memmove(dst, raw, len(raw))
        out_ptrs = []
        for i, io in enumerate(g.outputs):
            if external:
                t = g.tensors[io.name]
                buf = ffi.new("uint8_t[]", max(t.size * np.dtype(io.buffer_dtype).itemsize, 1))
                keep.append(buf)
                out_ptrs.append(ffi.cast("void *", buf))
            else:
                out_ptrs.append(self._out(self._arena_ptr, i))
        if external:
            ins = ffi.new("void *[]", in_ptrs or [ffi.NULL])
            outs = ffi.new("void *[]", out_ptrs or [ffi.NULL])
            rc = self._run(self._arena_ptr, ins, outs)
        else:
            rc = self._run(self._arena_ptr, ffi.NULL, ffi.NULL)
        if rc != 0:
            raise RuntimeError(f"run returned {rc}")
        results = []
        for i, (io, src) in enumerate(zip(g.outputs, out_ptrs, strict=True)):
            t = g.tensors[io.name]
            if io.onnx_dtype == "float32":
                y = np.zeros(t.size, np.float32)
                self._dq(i, src, ffi.cast("float *", ffi.from_buffer(y)), t.size)
            else:
                dt = np.dtype(io.buffer_dtype)
                y = np.frombuffer(ffi.buffer(src, t.size * dt.itemsize), dtype=dt).copy()
            st = storage_shape(t.shape, t.layout)
            perm = storage_perm(len(t.shape), t.layout)
            results.append(np.ascontiguousarray(np.transpose(y.reshape(st), np.argsort(perm))))
        return results

    def close(self) -> None:
        """Remove the work folder made for this session (if it made one)."""
        if self._tmp is not None:
            self._tmp.cleanup()
            self._tmp = None
