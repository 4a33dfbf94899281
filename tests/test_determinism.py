"""The same model and flags always give the same bytes.

1. Emitting twice, in two processes with different hash seeds (so set/dict order cannot
   leak into the output), gives identical trees, for every planner and order.
2. A pin: the sha256 of the generated files of a small model (kernels excluded: they must be
   byte copies of runtime_c/, checked separately) is fixed below.

When codegen changes on purpose, the pin must change with it. Update it with
    python tests/test_determinism.py
which prints the current values; paste them over PINNED_* below and say in the commit
why the emitted code changed (a reviewer then reads the diff of the emitted tree, not only
the hash: `python -m tinygen emit <model> -o new/` before and after, then `diff -r`).
"""
from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import tinygen  # noqa: E402
from tinygen.codegen.emit import RUNTIME, render_tree  # noqa: E402
from tinygen.compiler import BuildOptions, compile_model  # noqa: E402

PINNED_MODEL_SHA256 = "5525b0fdcab91f47c613094d05f784763442e0cd3d6485e36b64ab4deec12985"
PINNED_TREE_SHA256 = "62b55cc5fda9e17ceb91c44ee0f4408ed97ff9774c028a68a70a49cb9fa899d7"
GENERATED = ("model.c", "model.h", "tg_config.h", "model_sources.cmake", "model_sources.mk")


def tiny_model() -> onnx.ModelProto:
    """QOperator: uint8 x -> QLinearConv 3x3 -> MaxPool -> Flatten -> QLinearMatMul -> y.

    Weights are fixed integers (no random generator), so the bytes depend on nothing but
    this function and onnx's serializer.
    """
    w = (np.arange(3 * 2 * 3 * 3) % 11 - 5).astype(np.int8).reshape(3, 2, 3, 3)
    m = (np.arange(12 * 4) % 7 * 30).astype(np.uint8).reshape(12, 4)

    def init(name, a):
        return numpy_helper.from_array(np.asarray(a), name)

    inits = [init("sx", np.float32(0.05)), init("zx", np.uint8(128)), init("w", w),
             init("sw", np.float32([0.01, 0.02, 0.03])), init("zw", np.zeros(3, np.int8)),
             init("sc", np.float32(0.08)), init("zc", np.uint8(120)),
             init("b", np.array([-40, 7, 300], np.int32)), init("m", m),
             init("sm", np.float32(0.004)), init("zm", np.uint8(128)),
             init("sy", np.float32(0.2)), init("zy", np.uint8(100))]
    nodes = [
        helper.make_node("QLinearConv", ["x", "sx", "zx", "w", "sw", "zw", "sc", "zc", "b"],
                         ["c"], name="conv", pads=[1, 1, 1, 1]),
        helper.make_node("MaxPool", ["c"], ["p"], name="pool", kernel_shape=[2, 2],
                         strides=[2, 2]),
        helper.make_node("Flatten", ["p"], ["f"], name="flat"),
        helper.make_node("QLinearMatMul", ["f", "sc", "zc", "m", "sm", "zm", "sy", "zy"],
                         ["y"], name="fc"),
    ]
    g = helper.make_graph(nodes, "tiny", [helper.make_tensor_value_info(
        "x", TensorProto.UINT8, [1, 2, 4, 4])], [helper.make_tensor_value_info(
            "y", TensorProto.UINT8, [1, 4])], inits)
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model


def tree_digest(files: dict[str, str]) -> str:
    """sha256 over the generated files (name and text), the tinygen version masked."""
    h = hashlib.sha256()
    for name in GENERATED:
        h.update(name.encode() + b"\0")
        h.update(files[name].replace(tinygen.__version__, "<version>").encode() + b"\0")
    return h.hexdigest()


@pytest.fixture(scope="module")
def tiny(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("determinism") / "tiny.onnx"
    path.write_bytes(tiny_model().SerializeToString())
    return path


def _emit(model: Path, out: Path, seed: str, *flags: str) -> dict[str, bytes]:
    env = dict(os.environ, PYTHONHASHSEED=seed, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-m", "tinygen", "emit", str(model), "-o", str(out),
                        *flags], capture_output=True, text=True, env=env, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    return {p.name: p.read_bytes() for p in sorted(out.iterdir())}


@pytest.mark.parametrize("flags", [(), ("--planner", "first-fit", "--order", "min-peak",
                                        "--requant", "float", "--io", "external")])
def test_two_processes_emit_identical_bytes(tiny, tmp_path, flags):
    one = _emit(tiny, tmp_path / "one", "1", *flags)
    two = _emit(tiny, tmp_path / "two", "2", *flags)
    assert one == two


def test_repeated_emits_in_one_process_are_identical():
    model = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"
    trees = [render_tree(compile_model(str(model), BuildOptions()), "f") for _ in range(2)]
    assert trees[0] == trees[1]


def test_kernels_in_the_tree_are_copies_of_runtime_c(tiny):
    files = render_tree(compile_model(str(tiny), BuildOptions()), "")
    kernels = [n for n in files if n.startswith("tg_") and n != "tg_config.h"]
    assert kernels
    for name in kernels:
        sub = "src" if name.endswith(".c") else "include"
        assert files[name] == (RUNTIME / sub / name).read_text(), name


def test_emitted_tree_matches_the_pinned_hash(tiny):
    assert hashlib.sha256(tiny.read_bytes()).hexdigest() == PINNED_MODEL_SHA256, \
        "the test model's bytes changed (onnx serializer?): see the module docstring"
    files = render_tree(compile_model(str(tiny), BuildOptions()), "--requant fixed")
    assert tree_digest(files) == PINNED_TREE_SHA256, \
        "the emitted code changed: if on purpose, update the pin (see the module docstring)"


if __name__ == "__main__":
    import tempfile
    with tempfile.TemporaryDirectory() as tmp:
        p = Path(tmp) / "tiny.onnx"
        p.write_bytes(tiny_model().SerializeToString())
        files = render_tree(compile_model(str(p), BuildOptions()), "--requant fixed")
        print(f'PINNED_MODEL_SHA256 = "{hashlib.sha256(p.read_bytes()).hexdigest()}"')
        print(f'PINNED_TREE_SHA256 = "{tree_digest(files)}"')
