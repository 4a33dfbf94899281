"""Failures the fuzzers found, pinned as plain tests (each names what it once broke)."""
from __future__ import annotations

import subprocess

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

from tests.fuzz.harness import ObjectCache, cached_check
from tinygen.check import random_inputs
from tinygen.codegen.emit import render_tree, write_tree
from tinygen.compiler import BuildOptions, compile_model, logical_outputs, storage_inputs
from tinygen.harness.cbuild import STRICT_FLAGS, host_compiler
from tinygen.runner import run_reference


def _model(nodes, inits, x_shape, y_shape, y_type=TensorProto.FLOAT) -> onnx.ModelProto:
    g = helper.make_graph(nodes, "regression", [helper.make_tensor_value_info(
        "x", TensorProto.FLOAT, x_shape)], [helper.make_tensor_value_info(
            "y", y_type, y_shape)], [numpy_helper.from_array(np.asarray(a), n)
                                     for n, a in inits.items()])
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    return m


def _conv_model() -> onnx.ModelProto:
    rng = np.random.default_rng(3)
    inits = {"s": np.float32(0.05), "z": np.uint8(128),
             "w": rng.integers(-90, 90, (3, 2, 3, 3)).astype(np.int8),
             "ws": np.float32(0.02), "wz": np.int8(0), "sy": np.float32(0.1),
             "zy": np.uint8(120)}
    nodes = [helper.make_node("QuantizeLinear", ["x", "s", "z"], ["xq"]),
             helper.make_node("QLinearConv", ["xq", "s", "z", "w", "ws", "wz", "sy", "zy"],
                              ["c"]),
             helper.make_node("DequantizeLinear", ["c", "sy", "zy"], ["y"])]
    return _model(nodes, inits, [1, 2, 5, 5], [1, 3, 3, 3])


def test_region_left_empty_compiles_warning_free(tmp_path):
    """--region sram=... that the plan never uses was a static array nobody read
    (-Werror=unused-variable); it was found with --io external and a second region."""
    path = tmp_path / "m.onnx"
    onnx.save(_conv_model(), path)
    c = compile_model(str(path), BuildOptions(io="external",
                                              regions=[("tcm", 4096), ("sram", 2**20)]))
    assert [r.used for r in c.plan.regions][1] == 0
    tree = tmp_path / "tree"
    write_tree(render_tree(c, ""), str(tree), force=False)
    r = subprocess.run([host_compiler(), *STRICT_FLAGS, "-c", str(tree / "model.c"), "-o",
                        str(tmp_path / "model.o"), f"-I{tree}"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    res = cached_check(ObjectCache(), c, str(path), random_inputs(c.graph, 3))
    assert res.bit_exact


def test_integer_ops_read_activations_of_any_scale(tmp_path):
    """ConvInteger / MatMulInteger read only integers: a quantized activation with scale
    0.05 was refused ('read with scale/zero point other than it was written with')."""
    rng = np.random.default_rng(4)
    inits = {"s": np.float32(0.05), "z": np.int8(-3),
             "w": rng.integers(-128, 128, (2, 1, 2, 2)).astype(np.int8), "wz": np.int8(5),
             "m": rng.integers(-128, 128, (16, 3)).astype(np.int8), "mz": np.int8(0)}
    conv = [helper.make_node("QuantizeLinear", ["x", "s", "z"], ["xq"]),
            helper.make_node("ConvInteger", ["xq", "w", "z", "wz"], ["y"])]
    matmul = [helper.make_node("QuantizeLinear", ["x", "s", "z"], ["xq"]),
              helper.make_node("Flatten", ["xq"], ["f"]),
              helper.make_node("MatMulInteger", ["f", "m", "z", "mz"], ["y"])]
    cache = ObjectCache()
    for nodes, y_shape in ((conv, [1, 2, 3, 3]), (matmul, [1, 3])):
        path = tmp_path / f"{nodes[-1].op_type}.onnx"
        onnx.save(_model(nodes, inits, [1, 1, 4, 4], y_shape, TensorProto.INT32), path)
        c = compile_model(str(path), BuildOptions())
        res = cached_check(cache, c, str(path), random_inputs(c.graph, 4))
        assert res.bit_exact, nodes[-1].op_type
        # source: onnxruntime's ConvInteger / MatMulInteger on the same float input
        sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
        x = random_inputs(c.graph, 1, seed=9)[0][0]
        theirs = sess.run(None, {"x": x})[0]
        assert np.array_equal(reference_output(c, x), theirs), nodes[-1].op_type


def reference_output(c, x: np.ndarray) -> np.ndarray:
    """tinygen's reference output (here int32) for float input x, in ONNX layout."""
    out = run_reference(c.graph, storage_inputs(c.graph, [x]), c.plan.order)
    return logical_outputs(c.graph, out)[0]


def test_fuzz_harness_reports_a_one_lsb_difference(tmp_path, monkeypatch):
    """The cached build really runs the C: a reference off by one LSB must show."""
    from dataclasses import replace

    import tinygen.kernels
    path = tmp_path / "m.onnx"
    onnx.save(_conv_model(), path)
    c = compile_model(str(path), BuildOptions())
    samples = random_inputs(c.graph, 2)
    cache = ObjectCache()
    assert cached_check(cache, c, str(path), samples).bit_exact
    real = tinygen.kernels.KERNELS["tg_conv"]

    def off_by_one(p, *args):
        y = np.asarray(real.reference(p, *args)).astype(np.int16)
        return np.clip(y + 1, -128, 127).astype(np.int8)
    monkeypatch.setitem(tinygen.kernels.KERNELS, "tg_conv", replace(real, reference=off_by_one))
    res = cached_check(cache, c, str(path), samples)
    assert not res.bit_exact and res.mismatched_elements > 0
