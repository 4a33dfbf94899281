"""`check`: emitted C against the numpy reference (bit for bit), optionally onnxruntime.

Inputs are float arrays as the ONNX model takes them; they are quantized exactly as the
model's boundary QuantizeLinear does, then fed to both the C and the reference.
"""
from __future__ import annotations

import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from tinygen.codegen.emit import render_tree, write_tree
from tinygen.compiler import (
    Compiled,
    dequantize_outputs,
    logical_outputs,
    storage_inputs,
)
from tinygen.errors import TinygenError
from tinygen.harness.host import HostModel
from tinygen.ir import Graph
from tinygen.runner import run_reference
from tinygen.user_input import read_npz


@dataclass
class CheckResult:
    samples: int
    bit_exact: bool
    mismatched_elements: int
    total_elements: int
    onnxruntime: dict | None
    # per sample, the C's outputs in ONNX layout and type (and onnxruntime's, when it ran)
    outputs: list[list[np.ndarray]] = field(default_factory=list, repr=False)
    ort_outputs: list[list[np.ndarray]] | None = field(default=None, repr=False)

    def as_json(self) -> dict:
        return {"samples": self.samples, "bit_exact": self.bit_exact,
                "mismatched_elements": self.mismatched_elements,
                "onnxruntime": self.onnxruntime}


def random_inputs(graph: Graph, n: int, seed: int = 0) -> list[list[np.ndarray]]:
    """n float samples per input, spread over each input's whole quantized range."""
    rng = np.random.default_rng(seed)
    samples = []
    for _ in range(n):
        one = []
        for io in graph.inputs:
            t = graph.tensors[io.name]
            if io.onnx_dtype == "float32":
                s, z = np.float32(t.quant.scalar_scale()), t.quant.scalar_zp()
                lo, hi = (-128 - z) * s, (127 - z) * s
                one.append(rng.uniform(lo, hi, size=t.shape).astype(np.float32))
            else:
                lo, hi = (0, 255) if io.buffer_dtype == "uint8" else (-128, 127)
                one.append(rng.integers(lo, hi + 1, size=t.shape).astype(np.float32))
        samples.append(one)
    return samples


def load_labels(path: str, count: int) -> np.ndarray | None:
    """The optional 'labels' array of an --inputs file: (N,) class indices, or None."""
    arrays, _ = read_npz(path, ("labels",))
    if "labels" not in arrays:
        return None
    labels = arrays["labels"]
    if labels.dtype.kind not in "iu" or labels.ndim != 1 or labels.shape[0] != count or \
            (labels.size and labels.min() < 0):
        raise TinygenError(f"'labels' must be {count} non-negative integers (one class per "
                           f"input), not {labels.dtype.name} {list(labels.shape)}", file=path)
    return labels.astype(np.int64)


def load_inputs(graph: Graph, path: str) -> list[list[np.ndarray]]:
    """FILE.npz with array 'inputs' (N, *input shape) of real numbers; one-input models only.

    Refused, one line each: no such array, numbers that are not real (complex, strings,
    objects), NaN or infinity, zero samples, the wrong shape, and for an integer model input
    values that are not integers of its type (they would wrap)."""
    arrays, names = read_npz(path, ("inputs",))
    if "inputs" not in arrays:
        raise TinygenError("the .npz has no array named 'inputs' (it holds: "
                           f"{', '.join(repr(n) for n in names[:5]) or 'none'})", file=path)
    raw = arrays["inputs"]
    if raw.dtype.kind not in "fiub":
        raise TinygenError(f"'inputs' holds {raw.dtype.name} values; give real numbers "
                           "(float32)", file=path)
    if len(graph.inputs) != 1:
        raise TinygenError("--inputs supports models with one input", file=path)
    io = graph.inputs[0]
    shape = graph.tensors[io.name].shape
    arr = raw[None] if raw.ndim == len(shape) else raw
    if tuple(arr.shape[1:]) != tuple(shape):
        raise TinygenError(f"inputs have shape {list(arr.shape[1:])}, the model takes "
                           f"{list(shape)}", file=path)
    if arr.shape[0] == 0:
        raise TinygenError("'inputs' holds 0 samples", file=path)
    with np.errstate(over="ignore", invalid="ignore"):
        arr = arr.astype(np.float32)
    bad = ~np.isfinite(arr)
    if bad.any():
        first = np.argwhere(bad)[0]
        raise TinygenError(f"'inputs' holds {int(bad.sum())} NaN or infinite values (or "
                           f"values beyond float32), the first at sample {first[0]} index "
                           f"{list(map(int, first[1:]))}", file=path)
    if io.onnx_dtype != "float32":
        lo, hi = {"uint8": (0, 255), "int32": (-2**31, 2**31 - 1)}.get(io.buffer_dtype,
                                                                       (-128, 127))
        wrong = (arr != np.rint(arr)) | (arr < lo) | (arr > hi)
        if wrong.any():
            first = np.argwhere(wrong)[0]
            raise TinygenError(f"the model's input is {io.onnx_dtype}: 'inputs' must hold "
                               f"integers in {lo}..{hi}, not {arr[tuple(first)]} (sample "
                               f"{first[0]})", file=path)
    return [[a] for a in arr]


def out_specs(graph: Graph) -> list[tuple[int, np.dtype]]:
    return [(graph.tensors[io.name].size, np.dtype(io.buffer_dtype)) for io in graph.outputs]


def c_inputs(graph: Graph, storage: list[np.ndarray]) -> list[np.ndarray]:
    """int8-domain storage arrays as the C buffers take them (uint8 I/O shifted back)."""
    res = []
    for io, x in zip(graph.inputs, storage, strict=True):
        if io.buffer_dtype == "uint8":
            res.append((x.astype(np.int16) + 128).astype(np.uint8))
        else:
            res.append(x)
    return res


def c_outputs_to_storage(graph: Graph, outs: list[np.ndarray]) -> list[np.ndarray]:
    res = []
    for io, y in zip(graph.outputs, outs, strict=True):
        if io.buffer_dtype == "uint8":
            res.append((y.astype(np.int16) - 128).astype(np.int8))
        else:
            res.append(y)
    return res


def build_host(c: Compiled, flags: str, work: Path, sanitize: bool = False) -> HostModel:
    files = render_tree(c, flags)
    tree = work / "tree"
    write_tree(files, str(tree), force=True)
    extra = None
    if sanitize:
        from tinygen.harness.cbuild import SANITIZE_FLAGS
        extra = SANITIZE_FLAGS
    return HostModel(tree, c.options.prefix, work / "build", extra_flags=extra)


def run_check(c: Compiled, model_path: str, samples: list[list[np.ndarray]], flags: str,
              against_ort: bool, progress=None) -> CheckResult:
    """Every sample through the host build (twice, two arena fills) and the reference.
    progress: a tinygen.progress.Progress told each sample done (or None)."""
    g = c.graph
    mismatched = total = 0
    with tempfile.TemporaryDirectory(prefix="tinygen-check-") as tmp:
        host = build_host(c, flags, Path(tmp))
        ours_all = []
        for n, floats in enumerate(samples):
            if progress is not None:
                progress.step(n)
            st = storage_inputs(g, floats)
            ref = run_reference(g, st, c.plan.order)
            outs = host.run(c_inputs(g, st), out_specs(g), io=c.options.io, fill=0x5A)
            outs2 = host.run(c_inputs(g, st), out_specs(g), io=c.options.io, fill=0xC3)
            got = c_outputs_to_storage(g, outs)
            got2 = c_outputs_to_storage(g, outs2)
            for r, y, y2 in zip(ref, got, got2, strict=True):
                r = r.reshape(-1)
                diff = (r != y.reshape(-1).astype(r.dtype)) | (y.reshape(-1) != y2.reshape(-1))
                mismatched += int(diff.sum())
                total += r.size
            ours_all.append(logical_outputs(g, got))  # the C's own outputs
    ort, theirs = compare_onnxruntime(g, model_path, samples, ours_all, keep=True) \
        if against_ort else (None, None)
    return CheckResult(len(samples), mismatched == 0, mismatched, total, ort, ours_all,
                       theirs)


def onnxruntime_session(path: str, shown_as: str, optimized_to: str | None = None,
                        what: str = "--against-onnxruntime"):
    """An onnxruntime CPU session with its default graph optimisations (which fuse QDQ
    patterns into integer kernels). optimized_to: also write the optimised graph there.
    shown_as: the file named in an error."""
    try:
        import onnxruntime as ort
    except ImportError:
        raise TinygenError(f"{what} needs the onnxruntime package "
                           "(pip install onnxruntime)") from None
    so = ort.SessionOptions()
    so.log_severity_level = 3
    if optimized_to:
        so.optimized_model_filepath = optimized_to
    try:
        return ort.InferenceSession(path, so, providers=["CPUExecutionProvider"])
    except Exception as exc:  # onnxruntime raises its own exception types
        first = (str(exc).strip().splitlines() or ["(no message)"])[0][:200]
        raise TinygenError(f"onnxruntime cannot load the model for {what}: "
                           f"{first}", file=shown_as) from None


def compare_onnxruntime(g: Graph, model_path: str, samples, ours_all, keep: bool = False):
    """Run onnxruntime (default graph optimisations) on the same float inputs; distance in
    output LSBs: the onnxruntime output is mapped back to integers with the output's scale.
    Returns the distance dict, and with keep=True (dict, onnxruntime's outputs per sample)."""
    sess = onnxruntime_session(model_path, model_path)
    names = [i.name for i in sess.get_inputs()]
    max_diff, equal, count = 0, 0, 0
    kept = []
    for floats, ours in zip(samples, ours_all, strict=True):
        feeds = {}
        for io, x in zip(g.inputs, floats, strict=True):
            dt = np.float32 if io.onnx_dtype == "float32" else np.dtype(io.onnx_dtype)
            feeds[io.onnx_name] = np.asarray(x).astype(dt)
        feeds = {k: v for k, v in feeds.items() if k in names}
        theirs = sess.run([io.onnx_name for io in g.outputs], feeds)
        kept.append(theirs)
        for io, y_ours, y_ort in zip(g.outputs, ours, theirs, strict=True):
            if io.onnx_dtype == "float32":
                zp = io.quant.scalar_zp() + (128 if io.buffer_dtype == "uint8" else 0)
                q_ort = np.rint(np.asarray(y_ort, np.float64) / float(io.quant.scalar_scale())
                                ) + zp
            else:
                q_ort = np.asarray(y_ort, np.float64)
            d = np.abs(q_ort.reshape(-1) - y_ours.astype(np.float64).reshape(-1))
            max_diff = max(max_diff, int(d.max()) if d.size else 0)
            equal += int((d == 0).sum())
            count += d.size
    dist = {"max_abs_diff": max_diff, "equal_fraction": equal / count if count else 1.0}
    return (dist, kept) if keep else dist


__all__ = ["run_check", "random_inputs", "load_inputs", "dequantize_outputs", "CheckResult"]
