"""tg_lut (C, through cffi) against tinygen.reference.lut bit for bit, and the table builders
against the ONNX operator definitions (onnx.reference on DequantizeLinear -> op ->
QuantizeLinear) and against onnxruntime running the same float graph."""
from __future__ import annotations

import zlib

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper
from onnx.reference import ReferenceEvaluator

from tests.runtime_c.kernel_lib import Marshal, kernel_lib
from tinygen.reference.lut import INDEX_Q, LUT_FUNCTIONS, build_table, lut, requant_table

ort = pytest.importorskip("onnxruntime")

LUT_CDEF = "void tg_lut(const int8_t *table, const int8_t *x, int8_t *y, int32_t count);"

# fn name -> (ONNX op, attributes used for both the model and the table builder)
ONNX_OPS = {
    "identity": ("Identity", {}),
    "relu": ("Relu", {}),
    "sigmoid": ("Sigmoid", {}),
    "tanh": ("Tanh", {}),
    "hard_sigmoid": ("HardSigmoid", {"alpha": 0.25, "beta": 0.4}),
    "hard_swish": ("HardSwish", {}),
    "leaky_relu": ("LeakyRelu", {"alpha": 0.1}),
}


def run_c_lut(table: np.ndarray, x: np.ndarray, in_place: bool = False) -> np.ndarray:
    ffi, lib = kernel_lib(["tg_lut.c"], LUT_CDEF)
    m = Marshal(ffi)
    xs = np.ascontiguousarray(x, dtype=np.int8).copy()
    x_ptr = ffi.cast("int8_t *", ffi.from_buffer(xs))
    if in_place:
        lib.tg_lut(m.array(table, np.int8, "int8_t"), x_ptr, x_ptr, xs.size)
        return xs
    y, y_ptr = m.output(xs.shape, np.int8)
    lib.tg_lut(m.array(table, np.int8, "int8_t"), x_ptr, ffi.cast("int8_t *", y_ptr), xs.size)
    return y


@pytest.mark.parametrize("count", [0, 1, 3, 4, 5, 17, 1000])
def test_c_matches_reference(count):
    rng = np.random.default_rng(count)
    table = rng.integers(-128, 128, 256).astype(np.int8)
    x = rng.integers(-128, 128, count).astype(np.int8)
    np.testing.assert_array_equal(run_c_lut(table, x), lut(table, x))


def test_c_in_place():
    rng = np.random.default_rng(7)
    table = rng.integers(-128, 128, 256).astype(np.int8)
    x = rng.integers(-128, 128, 333).astype(np.int8)
    np.testing.assert_array_equal(run_c_lut(table, x, in_place=True), lut(table, x))


def test_index_convention():
    # A scale- and zero-point-preserving requantization is the identity: entry (uint8)q is q.
    table = requant_table(0.05, 3, 0.05, 3)
    np.testing.assert_array_equal(table[np.arange(-128, 128).astype(np.int8).view(np.uint8)],
                                  np.arange(-128, 128))
    x = np.arange(-128, 128).astype(np.int8)
    np.testing.assert_array_equal(run_c_lut(table, x), x)


def test_saturation_and_fused_clamp():
    # s_in / s_out = 100: everything but q == z_in saturates.
    table = requant_table(1.0, -128, 0.01, 127)
    assert table[np.uint8(128)] == 127 and table[np.uint8(129)] == 127
    table = build_table("identity", 0.1, 0, 0.1, 0, act_min=-5, act_max=9)
    assert table.min() == -5 and table.max() == 9


def test_clip_and_relu_are_exact_on_grid():
    # Same quantization in and out: clip/relu only clamp, so the table is a plain integer clamp.
    q = INDEX_Q
    np.testing.assert_array_equal(build_table("relu", 0.1, -20, 0.1, -20), np.maximum(q, -20))
    table = build_table("clip", 0.5, 4, 0.5, 4, min=-3.0, max=6.0)
    np.testing.assert_array_equal(table, np.clip(q, 4 - 6, 4 + 12))


def test_unknown_function_and_bad_scale():
    with pytest.raises(ValueError):
        build_table("gelu", 0.1, 0, 0.1, 0)
    with pytest.raises(ValueError):
        build_table("relu", 0.0, 0, 0.1, 0)


def qdq_unary_model(op: str, attrs: dict, dtype, s_in, z_in, s_out, z_out) -> onnx.ModelProto:
    """DequantizeLinear -> op -> QuantizeLinear over 256 values of `dtype`."""
    tp = TensorProto.INT8 if dtype == np.int8 else TensorProto.UINT8
    inits = [helper.make_tensor("xs", TensorProto.FLOAT, [], [s_in]),
             helper.make_tensor("xz", tp, [], [z_in]),
             helper.make_tensor("ys", TensorProto.FLOAT, [], [s_out]),
             helper.make_tensor("yz", tp, [], [z_out])]
    nodes = [helper.make_node("DequantizeLinear", ["x", "xs", "xz"], ["xf"]),
             helper.make_node(op, ["xf"], ["yf"], **attrs),
             helper.make_node("QuantizeLinear", ["yf", "ys", "yz"], ["y"])]
    graph = helper.make_graph(nodes, "lut", [helper.make_tensor_value_info("x", tp, [256])],
                              [helper.make_tensor_value_info("y", tp, [256])], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 19)])


def random_quant(rng, name):
    s_in = float(np.float32(10 ** rng.uniform(-3, 0)))
    s_out = float(np.float32(10 ** rng.uniform(-3, 0)))
    if name in ("sigmoid", "hard_sigmoid"):  # outputs in [0, 1]: a realistic output scale
        s_out = float(np.float32(10 ** rng.uniform(-2.7, -1.5)))
    zs = rng.integers(-128, 128, 2)
    zs[rng.random(2) < 0.2] = -128  # the extreme zero points
    zs[rng.random(2) < 0.2] = 127
    return s_in, int(zs[0]), s_out, int(zs[1])


def outputs_of(model, dtype, runner: str) -> np.ndarray:
    """The model's outputs for all 256 codes (index order of the table), int8 domain."""
    off = 0 if dtype == np.int8 else 128
    x = (INDEX_Q + off).astype(dtype)
    if runner == "onnx.reference":
        y = ReferenceEvaluator(model).run(None, {"x": x})[0]
    else:
        so = ort.SessionOptions()
        so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
        sess = ort.InferenceSession(model.SerializeToString(), so,
                                    providers=["CPUExecutionProvider"])
        y = sess.run(None, {"x": x})[0]
    return y.astype(np.int64) - off


def compare_tables(name, runner, precision, trials=12):
    """(equal entries, total entries, max |diff|) of our tables against `runner`."""
    op, attrs = ONNX_OPS[name]
    rng = np.random.default_rng(zlib.crc32(f"{name}/{runner}".encode()))
    equal = total = worst = 0
    for trial in range(trials):
        dtype = np.int8 if trial % 2 else np.uint8
        off = 0 if dtype == np.int8 else 128
        s_in, z_in, s_out, z_out = random_quant(rng, name)
        model = qdq_unary_model(op, attrs, dtype, s_in, z_in + off, s_out, z_out + off)
        with np.errstate(over="ignore", invalid="ignore"):
            expect = outputs_of(model, dtype, runner)
        table = build_table(name, s_in, z_in, s_out, z_out, precision=precision, **attrs)
        d = np.abs(table.astype(np.int64) - expect)
        equal, total, worst = equal + int((d == 0).sum()), total + d.size, max(worst, d.max())
    return equal, total, worst


@pytest.mark.parametrize("name", sorted(ONNX_OPS))
def test_float32_tables_equal_onnx_reference(name):
    # Source: ONNX operator definitions as implemented by onnx.reference (DQ -> op -> Q).
    equal, total, _ = compare_tables(name, "onnx.reference", "float32")
    assert equal == total


@pytest.mark.parametrize("name", sorted(ONNX_OPS))
def test_default_tables_against_onnx_reference_and_onnxruntime(name):
    # Source: onnx.reference and onnxruntime (CPU, float kernels) on DQ -> op -> Q. The
    # float64 tables may differ from float32 evaluation only where the value sits on a
    # rounding boundary; allow at most one LSB and one entry in a thousand.
    for runner in ("onnx.reference", "onnxruntime"):
        equal, total, worst = compare_tables(name, runner, None)
        assert worst <= 1 and total - equal <= total // 1000, (runner, equal, total)


def test_clip_matches_onnx_reference():
    # Source: onnx.reference Clip (min/max given as inputs since opset 11).
    rng = np.random.default_rng(5)
    for _ in range(8):
        s_in, z_in, s_out, z_out = random_quant(rng, "clip")
        lo, hi = sorted(rng.uniform(-3, 3, 2).astype(np.float32).tolist())
        inits = [helper.make_tensor("xs", TensorProto.FLOAT, [], [s_in]),
                 helper.make_tensor("xz", TensorProto.INT8, [], [z_in]),
                 helper.make_tensor("ys", TensorProto.FLOAT, [], [s_out]),
                 helper.make_tensor("yz", TensorProto.INT8, [], [z_out]),
                 helper.make_tensor("lo", TensorProto.FLOAT, [], [lo]),
                 helper.make_tensor("hi", TensorProto.FLOAT, [], [hi])]
        nodes = [helper.make_node("DequantizeLinear", ["x", "xs", "xz"], ["xf"]),
                 helper.make_node("Clip", ["xf", "lo", "hi"], ["yf"]),
                 helper.make_node("QuantizeLinear", ["yf", "ys", "yz"], ["y"])]
        graph = helper.make_graph(
            nodes, "clip", [helper.make_tensor_value_info("x", TensorProto.INT8, [256])],
            [helper.make_tensor_value_info("y", TensorProto.INT8, [256])], inits)
        model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 19)])
        expect = outputs_of(model, np.int8, "onnx.reference")
        table = build_table("clip", s_in, z_in, s_out, z_out, min=lo, max=hi)
        np.testing.assert_array_equal(table, expect)


def test_every_builder_is_covered():
    assert set(ONNX_OPS) | {"clip"} == set(LUT_FUNCTIONS)


def qlinear_sigmoid_model(dtype, s_in, z_in, s_out, z_out) -> onnx.ModelProto:
    tp = TensorProto.INT8 if dtype == np.int8 else TensorProto.UINT8
    inits = [helper.make_tensor("xs", TensorProto.FLOAT, [], [s_in]),
             helper.make_tensor("xz", tp, [], [z_in]),
             helper.make_tensor("ys", TensorProto.FLOAT, [], [s_out]),
             helper.make_tensor("yz", tp, [], [z_out])]
    node = helper.make_node("QLinearSigmoid", ["x", "xs", "xz", "ys", "yz"], ["y"],
                            domain="com.microsoft")
    graph = helper.make_graph([node], "qsig", [helper.make_tensor_value_info("x", tp, [256])],
                              [helper.make_tensor_value_info("y", tp, [256])], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 19),
                                                   helper.make_opsetid("com.microsoft", 1)])


@pytest.mark.parametrize("kind", ["Sigmoid", "Tanh", "QLinearSigmoid"])
def test_onnxruntime_tables_equal_onnxruntime(kind):
    # Source: onnxruntime (CPU provider, x86-64): all 256 inputs through DequantizeLinear ->
    # Sigmoid/Tanh -> QuantizeLinear (its float kernels) and through QLinearSigmoid
    # (com.microsoft). `--tables onnxruntime` promises every entry equal.
    name = "tanh" if kind == "Tanh" else "sigmoid"
    rng = np.random.default_rng(zlib.crc32(kind.encode()))
    for trial in range(40):
        dtype = np.int8 if trial % 2 else np.uint8
        off = 0 if dtype == np.int8 else 128
        s_in, z_in, s_out, z_out = random_quant(rng, name)
        if kind == "QLinearSigmoid":
            model = qlinear_sigmoid_model(dtype, s_in, z_in + off, s_out, z_out + off)
        else:
            model = qdq_unary_model(kind, {}, dtype, s_in, z_in + off, s_out, z_out + off)
        expect = outputs_of(model, dtype, "onnxruntime")
        table = build_table(name, s_in, z_in, s_out, z_out, precision="onnxruntime")
        np.testing.assert_array_equal(table.astype(np.int64), expect, err_msg=str(trial))


def test_onnxruntime_precision_changes_only_the_approximated_functions():
    for name in ("hard_swish", "relu", "leaky_relu"):
        np.testing.assert_array_equal(build_table(name, 0.05, 3, 0.04, -7),
                                      build_table(name, 0.05, 3, 0.04, -7,
                                                  precision="onnxruntime"))
    # the approximation is within ~1e-7 of the function: the tables agree almost everywhere
    a = build_table("tanh", 0.03, 0, 1 / 128, 0)
    b = build_table("tanh", 0.03, 0, 1 / 128, 0, precision="onnxruntime")
    assert np.count_nonzero(a != b) <= 1
