"""tg_maxpool / tg_avgpool (C, through cffi) against tinygen.reference.pool bit for bit, and the
reference against onnxruntime: QLinearAveragePool and QLinearGlobalAveragePool (com.microsoft),
DequantizeLinear -> AveragePool -> QuantizeLinear unfused, and MaxPool on int8/uint8."""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from onnx import TensorProto, helper

from tests.runtime_c.kernel_lib import Marshal, kernel_lib
from tinygen.reference.pool import (
    AVG_FIXED,
    AVG_FLOAT_DQ,
    AVG_FLOAT_SUM,
    PoolParams,
    avgpool,
    fixed_average,
    make_avgpool_params,
    maxpool,
    pool_geometry,
)
from tinygen.reference.requant import quantize_multiplier

ort = pytest.importorskip("onnxruntime")

POOL_CDEF = """
typedef struct {
    int32_t n, in_h, in_w, c;
    int32_t out_h, out_w;
    int32_t k_h, k_w;
    int32_t stride_h, stride_w;
    int32_t dil_h, dil_w;
    int32_t pad_top, pad_left;
    int32_t count_include_pad;
    int32_t in_zp;
    int32_t avg_mode;
    int32_t mult, shift;
    float in_scale, out_scale;
    int32_t round_zp;
    int32_t out_zp, act_min, act_max;
} tg_pool_params_t;
void tg_maxpool(const tg_pool_params_t *p, const int8_t *x, int8_t *y);
void tg_avgpool(const tg_pool_params_t *p, const int8_t *x, int8_t *y);
"""


def run_c_pool(kind: str, p: PoolParams, x: np.ndarray) -> np.ndarray:
    ffi, lib = kernel_lib(["tg_pool.c"], POOL_CDEF)
    m = Marshal(ffi)
    params = m.struct("tg_pool_params_t", **dataclasses.asdict(p))
    y, y_ptr = m.output((p.n, p.out_h, p.out_w, p.c), np.int8)
    getattr(lib, f"tg_{kind}")(params, m.array(x, np.int8, "int8_t"),
                               ffi.cast("int8_t *", y_ptr))
    return y


def random_geometry(rng, dilation=True) -> tuple[PoolParams, tuple]:
    k = (int(rng.integers(1, 5)), int(rng.integers(1, 5)))
    s = (int(rng.integers(1, 4)), int(rng.integers(1, 4)))
    d = (int(rng.integers(1, 3)), int(rng.integers(1, 3))) if dilation else (1, 1)
    pads = tuple(int(rng.integers(0, kk)) for kk in (k[0], k[1], k[0], k[1]))
    c = int(rng.choice([1, 3, 8, 33, 70]))
    h = int(rng.integers(d[0] * (k[0] - 1) + 1, 11))
    w = int(rng.integers(d[1] * (k[1] - 1) + 1, 11))
    ceil_mode = bool(rng.random() < 0.3)
    return pool_geometry((int(rng.integers(1, 3)), h, w, c), k, s, pads, d, ceil_mode), pads


def random_quant(rng, ties=False):
    """(s_x, z_x, s_y, z_y): scales over orders of magnitude, extreme zero points included.

    ties: power-of-two scales and an odd output zero point, so that many results land exactly
    on .5 and the order of "add the zero point" and "round" shows.
    """
    s_x = float(np.float32(10 ** rng.uniform(-4, 0)))
    s_y = float(np.float32(s_x * 10 ** rng.uniform(-1.5, 1.5)))
    z = [int(v) for v in rng.integers(-128, 128, 2)]
    z = [int(rng.choice([-128, 127])) if rng.random() < 0.3 else v for v in z]
    if ties:
        s_x = 2.0 ** -int(rng.integers(3, 9))
        s_y = s_x * 2.0 ** int(rng.integers(-1, 3))
        z[1] = int(rng.integers(-64, 64)) * 2 + 1
    return s_x, z[0], s_y, z[1]


@pytest.mark.parametrize("seed", range(16))
def test_maxpool_c_matches_reference(seed):
    rng = np.random.default_rng(seed)
    p, _ = random_geometry(rng)
    p.act_min, p.act_max = (-128, 127) if seed % 2 else (-20, 90)
    x = rng.integers(-128, 128, (p.n, p.in_h, p.in_w, p.c)).astype(np.int8)
    np.testing.assert_array_equal(run_c_pool("maxpool", p, x), maxpool(p, x))


@pytest.mark.parametrize("mode,order", [("fixed", "qlinear"), ("float", "qlinear"),
                                        ("float", "onnx")])
@pytest.mark.parametrize("seed", range(10))
def test_avgpool_c_matches_reference(mode, order, seed):
    rng = np.random.default_rng(1000 + seed)
    geo, _ = random_geometry(rng)
    s_x, z_x, s_y, z_y = random_quant(rng)
    act = (-128, 127) if seed % 3 else (-60, 100)
    p = make_avgpool_params(geo, s_x, z_x, s_y, z_y, count_include_pad=seed % 2, mode=mode,
                            order=order, source_dtype="uint8" if seed % 4 == 1 else "int8",
                            act_min=act[0], act_max=act[1])
    x = rng.integers(-128, 128, (p.n, p.in_h, p.in_w, p.c)).astype(np.int8)
    np.testing.assert_array_equal(run_c_pool("avgpool", p, x), avgpool(p, x))


@pytest.mark.parametrize("mode", [AVG_FIXED, AVG_FLOAT_SUM, AVG_FLOAT_DQ])
def test_global_and_saturating_cases(mode):
    rng = np.random.default_rng(mode)
    geo = pool_geometry((2, 7, 5, 40), (7, 5))
    for s_ratio in (1e-3, 1.0, 50.0):  # output constant, plain, saturating
        p = dataclasses.replace(geo, in_zp=-128, out_zp=127, avg_mode=mode, in_scale=0.01,
                                out_scale=float(np.float32(0.01 / s_ratio)), round_zp=-1)
        p.mult, p.shift = quantize_multiplier(s_ratio)
        x = rng.integers(-128, 128, (2, 7, 5, 40)).astype(np.int8)
        np.testing.assert_array_equal(run_c_pool("avgpool", p, x), avgpool(p, x))


def test_empty_windows():
    # Padding larger than the dilated kernel reach: windows with no valid taps.
    geo = pool_geometry((1, 2, 2, 3), (2, 2), (1, 1), (3, 3, 3, 3), (2, 2))
    x = np.arange(12, dtype=np.int8).reshape(1, 2, 2, 3)
    got = run_c_pool("maxpool", geo, x)
    np.testing.assert_array_equal(got, maxpool(geo, x))
    assert got[0, 0, 0, 0] == -128
    for mode in ("fixed", "float"):
        p = make_avgpool_params(geo, 0.1, 0, 0.1, 7, mode=mode)
        got = run_c_pool("avgpool", p, x)
        np.testing.assert_array_equal(got, avgpool(p, x))
        assert got[0, 0, 0, 0] == 7


def test_fixed_average_is_the_exact_rounding():
    # Source: the tg_pool.h formula evaluated with Python integers (no overflow possible).
    rng = np.random.default_rng(3)
    for _ in range(2000):
        count = int(rng.integers(1, 200))
        acc = int(rng.integers(-255 * count, 255 * count + 1))
        mult = int(rng.integers(1 << 30, 1 << 31))
        shift = int(rng.integers(1, 63))
        exact = (acc * mult + count * (1 << (shift - 1))) // (count * (1 << shift))
        assert int(fixed_average(np.array([acc]), count, mult, shift)[0]) == exact


@pytest.mark.parametrize("seed", range(4))
def test_fixed_mode_within_one_lsb_of_real_average(seed):
    # Source: ONNX AveragePool definition (mean of the window) evaluated in float64.
    rng = np.random.default_rng(seed)
    geo, pads = random_geometry(rng, dilation=False)
    s_x, z_x, s_y, z_y = random_quant(rng)
    p = make_avgpool_params(geo, s_x, z_x, s_y, z_y, count_include_pad=seed % 2)
    x = rng.integers(-128, 128, (p.n, p.in_h, p.in_w, p.c)).astype(np.int8)
    exact = real_avgpool(x, p, pads, s_x, z_x, s_y, z_y)
    assert np.abs(avgpool(p, x).astype(np.int64) - exact).max() <= 1


def real_avgpool(x, p: PoolParams, pads, s_x, z_x, s_y, z_y):
    xp = np.pad((x.astype(np.float64) - z_x) * s_x,
                ((0, 0), (pads[0], pads[2] + p.stride_h * p.k_h),
                 (pads[1], pads[3] + p.stride_w * p.k_w), (0, 0)), constant_values=np.nan)
    y = np.zeros((p.n, p.out_h, p.out_w, p.c))
    for oy in range(p.out_h):
        for ox in range(p.out_w):
            win = xp[:, oy * p.stride_h:oy * p.stride_h + p.k_h,
                     ox * p.stride_w:ox * p.stride_w + p.k_w, :]
            win = np.where(np.isnan(win), 0.0, win) if p.count_include_pad else win
            y[:, oy, ox, :] = np.nanmean(win, axis=(1, 2))
    return np.clip(np.rint(y / s_y) + z_y, -128, 127).astype(np.int64)


def qlinear_pool_model(op, dtype, x_shape, s_x, z_x, s_y, z_y, attrs):
    tp = TensorProto.INT8 if dtype == np.int8 else TensorProto.UINT8
    inits = [helper.make_tensor("xs", TensorProto.FLOAT, [], [s_x]),
             helper.make_tensor("xz", tp, [], [z_x]),
             helper.make_tensor("ys", TensorProto.FLOAT, [], [s_y]),
             helper.make_tensor("yz", tp, [], [z_y])]
    node = helper.make_node(op, ["x", "xs", "xz", "ys", "yz"], ["y"], domain="com.microsoft",
                            **attrs)
    graph = helper.make_graph([node], "pool", [helper.make_tensor_value_info("x", tp, x_shape)],
                              [helper.make_tensor_value_info("y", tp, None)], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17),
                                                   helper.make_opsetid("com.microsoft", 1)])


def qdq_pool_model(dtype, x_shape, s_x, z_x, s_y, z_y, op, attrs):
    tp = TensorProto.INT8 if dtype == np.int8 else TensorProto.UINT8
    inits = [helper.make_tensor("xs", TensorProto.FLOAT, [], [s_x]),
             helper.make_tensor("xz", tp, [], [z_x]),
             helper.make_tensor("ys", TensorProto.FLOAT, [], [s_y]),
             helper.make_tensor("yz", tp, [], [z_y])]
    nodes = [helper.make_node("DequantizeLinear", ["x", "xs", "xz"], ["xf"]),
             helper.make_node(op, ["xf"], ["yf"], **attrs),
             helper.make_node("QuantizeLinear", ["yf", "ys", "yz"], ["y"])]
    graph = helper.make_graph(nodes, "pool", [helper.make_tensor_value_info("x", tp, x_shape)],
                              [helper.make_tensor_value_info("y", tp, None)], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 19)])


def ort_run(model, x, optimize=False):
    so = ort.SessionOptions()
    so.graph_optimization_level = (ort.GraphOptimizationLevel.ORT_ENABLE_ALL if optimize
                                   else ort.GraphOptimizationLevel.ORT_DISABLE_ALL)
    sess = ort.InferenceSession(model.SerializeToString(), so,
                                providers=["CPUExecutionProvider"])
    return sess.run(None, {"x": x})[0]


def onnx_pool_attrs(p: PoolParams, pads, ceil_mode=False):
    return dict(kernel_shape=[p.k_h, p.k_w], strides=[p.stride_h, p.stride_w],
                pads=[pads[0], pads[1], pads[2], pads[3]], ceil_mode=int(ceil_mode))


def agreement(case_fn, trials, seed):
    """Sum of (equal, total) over `trials` calls of case_fn(rng, trial) -> (got, expect)."""
    rng = np.random.default_rng(seed)
    equal = total = 0
    for trial in range(trials):
        got, expect = case_fn(rng, trial)
        equal += int((got == expect).sum())
        total += got.size
    return equal, total


def _shifted(dtype):
    return 0 if dtype == np.int8 else 128


@pytest.mark.parametrize("dtype", [np.int8, np.uint8])
def test_float_qlinear_average_pool_matches_onnxruntime(dtype):
    # Source: onnxruntime QLinearAveragePool (com.microsoft, channels_last=1), CPU provider.
    off = _shifted(dtype)

    def case(rng, trial):
        geo, pads = random_geometry(rng, dilation=False)
        geo = pool_geometry((geo.n, geo.in_h, geo.in_w, geo.c), (geo.k_h, geo.k_w),
                            (geo.stride_h, geo.stride_w), pads)
        s_x, z_x, s_y, z_y = random_quant(rng, ties=trial % 4 < 2)
        cip = trial % 2
        p = make_avgpool_params(geo, s_x, z_x, s_y, z_y, cip, mode="float",
                                source_dtype=np.dtype(dtype).name)
        x = rng.integers(-128, 128, (p.n, p.in_h, p.in_w, p.c)).astype(np.int8)
        attrs = {**onnx_pool_attrs(p, pads), "count_include_pad": cip, "channels_last": 1}
        model = qlinear_pool_model("QLinearAveragePool", dtype, list(x.shape), s_x, z_x + off,
                                   s_y, z_y + off, attrs)
        expect = ort_run(model, (x.astype(np.int64) + off).astype(dtype)).astype(np.int64) - off
        got = run_c_pool("avgpool", p, x)
        np.testing.assert_array_equal(got, avgpool(p, x))
        return got, expect

    equal, total = agreement(case, 16, 21 if dtype == np.int8 else 22)
    assert equal == total


@pytest.mark.parametrize("op", ["QLinearGlobalAveragePool", "QLinearAveragePool"])
@pytest.mark.parametrize("dtype", [np.int8, np.uint8])
def test_float_global_average_pool_matches_onnxruntime(op, dtype):
    # Source: onnxruntime QLinearGlobalAveragePool, and QLinearAveragePool with the whole image
    # as window (onnxruntime then runs its global-pool kernel), channels_last=1.
    off = _shifted(dtype)

    def case(rng, trial):
        n, h, w, c = 2, int(rng.integers(1, 9)), int(rng.integers(1, 9)), int(rng.integers(1, 70))
        if trial % 2:  # a power-of-two window: with power-of-two scales, exact ties
            h, w = int(rng.choice([1, 2, 4])), int(rng.choice([2, 4]))
        s_x, z_x, s_y, z_y = random_quant(rng, ties=trial % 2 == 1)
        p = make_avgpool_params(pool_geometry((n, h, w, c), (h, w)), s_x, z_x, s_y, z_y,
                                mode="float", source_dtype=np.dtype(dtype).name)
        assert p.avg_mode == AVG_FLOAT_SUM
        x = rng.integers(-128, 128, (n, h, w, c)).astype(np.int8)
        attrs = {"channels_last": 1}
        if op == "QLinearAveragePool":
            attrs["kernel_shape"] = [h, w]
        model = qlinear_pool_model(op, dtype, [n, h, w, c], s_x, z_x + off, s_y, z_y + off,
                                   attrs)
        expect = ort_run(model, (x.astype(np.int64) + off).astype(dtype)).astype(np.int64) - off
        got = run_c_pool("avgpool", p, x)
        np.testing.assert_array_equal(got, avgpool(p, x))
        return got, expect

    equal, total = agreement(case, 16, 31 if dtype == np.int8 else 32)
    assert equal == total


@pytest.mark.parametrize("dtype", [np.int8, np.uint8])
def test_float_qdq_average_pool_matches_onnxruntime(dtype):
    # Source: onnxruntime running DequantizeLinear -> AveragePool -> QuantizeLinear in float
    # (graph optimizations off, so nothing is fused), NCHW; also GlobalAveragePool.
    off = _shifted(dtype)

    def case(rng, trial):
        geo, pads = random_geometry(rng, dilation=False)
        geo = pool_geometry((geo.n, geo.in_h, geo.in_w, geo.c), (geo.k_h, geo.k_w),
                            (geo.stride_h, geo.stride_w), pads)
        glob = trial % 4 == 3
        if glob:
            geo, pads = pool_geometry((geo.n, geo.in_h, geo.in_w, geo.c),
                                      (geo.in_h, geo.in_w)), (0, 0, 0, 0)
        s_x, z_x, s_y, z_y = random_quant(rng, ties=trial % 4 < 2)
        cip = trial % 2
        p = make_avgpool_params(geo, s_x, z_x, s_y, z_y, cip, mode="float", order="onnx")
        x = rng.integers(-128, 128, (p.n, p.in_h, p.in_w, p.c)).astype(np.int8)
        op, attrs = ("GlobalAveragePool", {}) if glob else \
            ("AveragePool", {**onnx_pool_attrs(p, pads), "count_include_pad": cip})
        xn = np.transpose(x, (0, 3, 1, 2))
        model = qdq_pool_model(dtype, list(xn.shape), s_x, z_x + off, s_y, z_y + off, op, attrs)
        expect = ort_run(model, (xn.astype(np.int64) + off).astype(dtype)).astype(np.int64)
        got = run_c_pool("avgpool", p, x)
        np.testing.assert_array_equal(got, avgpool(p, x))
        return got, np.transpose(expect - off, (0, 2, 3, 1))

    equal, total = agreement(case, 16, 41 if dtype == np.int8 else 42)
    assert equal == total


@pytest.mark.parametrize("dtype", [np.int8, np.uint8])
def test_maxpool_matches_onnxruntime(dtype):
    # Source: onnxruntime MaxPool (opset 12+ accepts int8/uint8), NCHW, with dilations and
    # ceil_mode.
    off = _shifted(dtype)
    tp = TensorProto.INT8 if dtype == np.int8 else TensorProto.UINT8

    def case(rng, trial):
        k = (int(rng.integers(1, 4)), int(rng.integers(1, 4)))
        s = (int(rng.integers(1, 3)), int(rng.integers(1, 3)))
        d = (int(rng.integers(1, 3)), int(rng.integers(1, 3)))
        pads = tuple(int(rng.integers(0, kk)) for kk in (k[0], k[1], k[0], k[1]))
        ceil_mode = trial % 3 == 0
        shape = (1, int(rng.integers(d[0] * (k[0] - 1) + 1, 10)),
                 int(rng.integers(d[1] * (k[1] - 1) + 1, 10)), int(rng.integers(1, 12)))
        p = pool_geometry(shape, k, s, pads, d, ceil_mode)
        x = rng.integers(-128, 128, shape).astype(np.int8)
        xn = (np.transpose(x, (0, 3, 1, 2)).astype(np.int64) + off).astype(dtype)
        node = helper.make_node("MaxPool", ["x"], ["y"], kernel_shape=list(k), strides=list(s),
                                pads=list(pads), dilations=list(d), ceil_mode=int(ceil_mode))
        graph = helper.make_graph([node], "mp", [helper.make_tensor_value_info("x", tp, xn.shape)],
                                  [helper.make_tensor_value_info("y", tp, None)])
        model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 12)])
        expect = np.transpose(ort_run(model, xn).astype(np.int64) - off, (0, 2, 3, 1))
        assert expect.shape == (p.n, p.out_h, p.out_w, p.c)
        got = run_c_pool("maxpool", p, x)
        np.testing.assert_array_equal(got, maxpool(p, x))
        return got, expect

    equal, total = agreement(case, 20, 51 if dtype == np.int8 else 52)
    assert equal == total
