"""tg_softmax (C, through cffi) against tinygen.reference.softmax bit for bit, and the integer
softmax against float64 numpy softmax and onnxruntime (DequantizeLinear -> Softmax ->
QuantizeLinear unfused, and QLinearSoftmax from com.microsoft)."""
from __future__ import annotations

import numpy as np
import pytest
from onnx import TensorProto, helper

from tests.runtime_c.kernel_lib import Marshal, kernel_lib
from tinygen.reference.softmax import (
    EXP_ONE,
    SoftmaxParams,
    exp_table,
    make_softmax_params,
    softmax,
)

ort = pytest.importorskip("onnxruntime")

SOFTMAX_CDEF = """
typedef struct {
    int32_t rows, len;
    const int32_t *exp_table;
    int32_t inv_out_q8;
    int32_t out_zp, act_min, act_max;
} tg_softmax_params_t;
void tg_softmax(const tg_softmax_params_t *p, const int8_t *x, int8_t *y);
"""


def run_c_softmax(p: SoftmaxParams, x: np.ndarray) -> np.ndarray:
    ffi, lib = kernel_lib(["tg_softmax.c"], SOFTMAX_CDEF)
    m = Marshal(ffi)
    params = m.struct("tg_softmax_params_t", rows=p.rows, len=p.len,
                      exp_table=m.array(p.exp_table, np.int32, "int32_t"),
                      inv_out_q8=p.inv_out_q8, out_zp=p.out_zp, act_min=p.act_min,
                      act_max=p.act_max)
    y, y_ptr = m.output((p.rows, p.len), np.int8)
    lib.tg_softmax(params, m.array(x, np.int8, "int8_t"), ffi.cast("int8_t *", y_ptr))
    return y


def random_case(rng, trial):
    """(x [rows][len] int8, s_x, z_x, s_y, z_y); every fifth case has uniform or two-valued
    rows of power-of-two length, whose exact results include .5 ties."""
    length = int(rng.choice([1, 2, 3, 5, 10, 32, 100, 300]))
    s_x = float(np.float32(10 ** rng.uniform(-3, 0)))
    z_x = int(rng.integers(-128, 128))
    if trial % 2:
        s_y, z_y = 1 / 256, -128
    else:
        s_y, z_y = float(np.float32(10 ** rng.uniform(-3, np.log10(0.05)))), \
            int(rng.integers(-128, 128))
    x = rng.integers(-128, 128, (8, length)).astype(np.int8)
    if trial % 5 == 0:
        length = int(rng.choice([2, 4, 8, 64, 512]))
        x = np.repeat(rng.integers(-127, 128, (8, 1)), length, axis=1)
        x[:, :length // 2] -= rng.integers(0, 2, (8, 1))
        x = x.astype(np.int8)
        s_y, z_y = 1 / 256, int(rng.integers(-128, 128))
    return x, s_x, z_x, s_y, z_y


@pytest.mark.parametrize("seed", range(12))
def test_c_matches_reference(seed):
    rng = np.random.default_rng(seed)
    x, s_x, _, s_y, z_y = random_case(rng, seed)
    act = (-128, 127) if seed % 3 else (-100, 50)
    p = make_softmax_params(x.shape[0], x.shape[1], s_x, s_y, z_y, *act)
    np.testing.assert_array_equal(run_c_softmax(p, x), softmax(p, x))


def test_extreme_rows():
    rng = np.random.default_rng(9)
    rows = [np.full(2047, -128), np.full(2047, 127), np.r_[127, np.full(2046, -128)]]
    x = np.stack(rows).astype(np.int8)
    for s_x in (1e-3, 0.05, 1.0):
        p = make_softmax_params(3, 2047, s_x, 1 / 256, -128)
        y = run_c_softmax(p, x)
        np.testing.assert_array_equal(y, softmax(p, x))
    assert y[2, 0] == 127 and (y[2, 1:] == -128).all()  # s_x = 1: all mass on the maximum
    x = rng.integers(-128, 128, (4, 1)).astype(np.int8)
    p = make_softmax_params(4, 1, 0.1, 1 / 256, -128)
    np.testing.assert_array_equal(run_c_softmax(p, x), np.full((4, 1), 127))


def test_exact_ties_round_to_even():
    # Uniform rows of 512 values: p = 1/512, p / s_y = 0.5 exactly for s_y = 1/256, which
    # QuantizeLinear (ONNX spec: round half to even) sends to 0 before adding the zero point.
    x = np.zeros((2, 512), dtype=np.int8)
    for z_y in (-128, -117):
        p = make_softmax_params(2, 512, 0.1, 1 / 256, z_y)
        np.testing.assert_array_equal(run_c_softmax(p, x), np.full((2, 512), z_y))


def test_table_and_parameter_checks():
    t = exp_table(0.1)
    assert t[0] == EXP_ONE and (np.diff(t) <= 0).all() and t.dtype == np.int32
    with pytest.raises(ValueError):
        make_softmax_params(1, 2048, 0.1, 1 / 256, -128)
    with pytest.raises(ValueError):
        make_softmax_params(1, 10, 0.1, 1e-8, 0)


def float_softmax_quantized(x, s_x, z_x, s_y, z_y):
    """(clamp(rint(p / s_y) + z_y), p / s_y + z_y) with p the float64 numpy softmax."""
    xf = (x.astype(np.float64) - z_x) * s_x
    e = np.exp(xf - xf.max(axis=1, keepdims=True))
    real = e / e.sum(axis=1, keepdims=True) / np.float64(np.float32(s_y))
    return np.clip(np.rint(real) + z_y, -128, 127), real + z_y


def test_error_against_float_softmax():
    # Source: float64 numpy softmax of the dequantized row, quantized as ONNX QuantizeLinear.
    rng = np.random.default_rng(2024)
    equal = total = 0
    worst_real = 0.0
    for trial in range(150):
        x, s_x, z_x, s_y, z_y = random_case(rng, trial)
        p = make_softmax_params(x.shape[0], x.shape[1], s_x, s_y, z_y)
        y = softmax(p, x).astype(np.int64)
        ideal, real = float_softmax_quantized(x, s_x, z_x, s_y, z_y)
        assert np.abs(y - ideal).max() <= 1
        equal, total = equal + int((y == ideal).sum()), total + y.size
        inside = (real > -128) & (real < 127)
        if inside.any():
            worst_real = max(worst_real, float(np.abs(y - real)[inside].max()))
    assert worst_real < 0.501 and total - equal <= total // 10000


def softmax_model(kind, dtype, shape, s_x, z_x, s_y, z_y):
    tp = TensorProto.INT8 if dtype == np.int8 else TensorProto.UINT8
    inits = [helper.make_tensor("xs", TensorProto.FLOAT, [], [s_x]),
             helper.make_tensor("xz", tp, [], [z_x]),
             helper.make_tensor("ys", TensorProto.FLOAT, [], [s_y]),
             helper.make_tensor("yz", tp, [], [z_y])]
    if kind == "qdq":
        nodes = [helper.make_node("DequantizeLinear", ["x", "xs", "xz"], ["xf"]),
                 helper.make_node("Softmax", ["xf"], ["yf"], axis=-1),
                 helper.make_node("QuantizeLinear", ["yf", "ys", "yz"], ["y"])]
    else:
        nodes = [helper.make_node("QLinearSoftmax", ["x", "xs", "xz", "ys", "yz"], ["y"],
                                  axis=-1, opset=13, domain="com.microsoft")]
    graph = helper.make_graph(nodes, "softmax", [helper.make_tensor_value_info("x", tp, shape)],
                              [helper.make_tensor_value_info("y", tp, None)], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13),
                                                   helper.make_opsetid("com.microsoft", 1)])


@pytest.mark.parametrize("kind", ["qdq", "qlinear"])
@pytest.mark.parametrize("dtype", [np.int8, np.uint8])
def test_against_onnxruntime(kind, dtype):
    # Source: onnxruntime CPU: DequantizeLinear -> Softmax -> QuantizeLinear with graph
    # optimizations off (float Softmax), and QLinearSoftmax (com.microsoft).
    rng = np.random.default_rng(77 + (dtype == np.uint8))
    off = 0 if dtype == np.int8 else 128
    so = ort.SessionOptions()
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    equal = total = 0
    for trial in range(60):
        x, s_x, z_x, s_y, z_y = random_case(rng, trial)
        model = softmax_model(kind, dtype, list(x.shape), s_x, z_x + off, s_y, z_y + off)
        sess = ort.InferenceSession(model.SerializeToString(), so,
                                    providers=["CPUExecutionProvider"])
        expect = sess.run(None, {"x": (x.astype(np.int64) + off).astype(dtype)})[0]
        p = make_softmax_params(x.shape[0], x.shape[1], s_x, s_y, z_y)
        got = run_c_softmax(p, x).astype(np.int64)
        assert np.abs(got - (expect.astype(np.int64) - off)).max() <= 1
        equal, total = equal + int((got == expect.astype(np.int64) - off).sum()), total + got.size
    # QLinearSoftmax is onnxruntime's own approximation; the float graph should agree closely.
    assert total - equal <= (total // 10000 if kind == "qdq" else total // 100)


# -- --tables onnxruntime: onnxruntime's QLinearSoftmax rule in float32 ----------------------

SOFTMAX_FLOAT_CDEF = """
typedef struct {
    int32_t rows, len;
    const float *exp_table;
    float out_mult;
    int32_t out_zp, act_min, act_max;
} tg_softmax_float_params_t;
void tg_softmax_float(const tg_softmax_float_params_t *p, const int8_t *x, int8_t *y);
"""


def run_c_softmax_float(p, x: np.ndarray) -> np.ndarray:
    ffi, lib = kernel_lib(["tg_softmax.c"], SOFTMAX_FLOAT_CDEF)
    m = Marshal(ffi)
    params = m.struct("tg_softmax_float_params_t", rows=p.rows, len=p.len,
                      exp_table=m.array(p.exp_table, np.float32, "float"),
                      out_mult=p.out_mult, out_zp=p.out_zp, act_min=p.act_min,
                      act_max=p.act_max)
    y, y_ptr = m.output((p.rows, p.len), np.int8)
    lib.tg_softmax_float(params, m.array(x, np.int8, "int8_t"), ffi.cast("int8_t *", y_ptr))
    return y


@pytest.mark.parametrize("seed", range(8))
def test_float_rule_c_matches_reference(seed):
    from tinygen.reference.softmax import make_softmax_float_params, softmax_float
    rng = np.random.default_rng(100 + seed)
    x, s_x, _, s_y, z_y = random_case(rng, seed)
    act = (-128, 127) if seed % 3 else (-100, 50)
    if np.floor(1 / np.float32(s_y)) > 148 * x.shape[1]:  # refused: see the next test
        s_y = 1 / 64
    p = make_softmax_float_params(x.shape[0], x.shape[1], s_x, s_y, z_y, *act)
    np.testing.assert_array_equal(run_c_softmax_float(p, x), softmax_float(p, x))


@pytest.mark.parametrize("dtype", [np.int8, np.uint8])
def test_float_rule_reproduces_qlinearsoftmax(dtype):
    # Source: onnxruntime's QLinearSoftmax (com.microsoft, CPU provider), the kernel it fuses
    # DequantizeLinear -> Softmax -> QuantizeLinear into. --tables onnxruntime promises every
    # output equal, ties and the s_y = 1/255 case (floor(1/s_y) = 254) included.
    from tinygen.reference.softmax import make_softmax_float_params, softmax_float
    rng = np.random.default_rng(5 + (dtype == np.uint8))
    off = 0 if dtype == np.int8 else 128
    total = 0
    for trial in range(60):
        x, s_x, z_x, s_y, z_y = random_case(rng, trial)
        if trial % 4 == 1:
            s_y, z_y = 1 / 255, -128
        try:
            p = make_softmax_float_params(x.shape[0], x.shape[1], s_x, s_y, z_y)
        except ValueError as exc:  # the exp * floor(1/s_y) product overflows float32 there
            assert "overflows" in str(exc) and np.floor(1 / np.float32(s_y)) > 148 * x.shape[1]
            continue
        model = softmax_model("qlinear", dtype, list(x.shape), s_x, z_x + off, s_y, z_y + off)
        sess = ort.InferenceSession(model.SerializeToString(),
                                    providers=["CPUExecutionProvider"])
        expect = sess.run(None, {"x": (x.astype(np.int64) + off).astype(dtype)})[0]
        got = softmax_float(p, x).astype(np.int64)
        np.testing.assert_array_equal(got, expect.astype(np.int64) - off)
        total += got.size
    assert total > 10_000
