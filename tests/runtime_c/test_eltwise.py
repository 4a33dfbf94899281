"""tg_add / tg_mul (C, through cffi) against tinygen.reference.eltwise bit for bit, the float
mode against onnxruntime's QLinearAdd / QLinearMul (com.microsoft), and the fixed mode against
the real-valued definition (dequantize, add or multiply, quantize) in float64."""
from __future__ import annotations

import dataclasses
import zlib

import numpy as np
import pytest
from onnx import TensorProto, helper

from tests.runtime_c.kernel_lib import Marshal, kernel_lib
from tinygen.reference.eltwise import (
    ADD_TABLE_SHIFT,
    EltwiseParams,
    add,
    broadcast_layout,
    fma_f32,
    make_add_params,
    make_mul_params,
    mul,
)

ort = pytest.importorskip("onnxruntime")

ELTWISE_CDEF = """
typedef struct {
    int32_t shape[4];
    int32_t a_stride[4], b_stride[4];
    int32_t a_zp, b_zp, out_zp;
    int32_t act_min, act_max;
    int32_t left_shift;
    int32_t a_mult, a_shift, b_mult, b_shift;
    int32_t out_mult, out_shift;
    int32_t use_float;
    float a_ratio, b_ratio;
    float ab_ratio;
    float bias;
    int32_t raw_offset;
    int32_t a_bcast_inner;
    const int32_t *a_table, *b_table;
} tg_eltwise_params_t;
void tg_add(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y);
void tg_mul(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y);
"""

OPS = {"add": (make_add_params, add, "QLinearAdd"), "mul": (make_mul_params, mul, "QLinearMul")}

# (a shape, b shape): channels-last broadcasting patterns, both operand orders.
PATTERNS = [
    ((2, 5, 6, 16), (2, 5, 6, 16)),
    ((2, 5, 6, 16), (1, 1, 1, 16)),
    ((1, 1, 1, 16), (2, 5, 6, 16)),
    ((2, 5, 6, 16), (2, 1, 1, 16)),
    ((2, 5, 6, 16), ()),
    ((), (2, 5, 6, 16)),
    ((2, 5, 6, 16), (2, 5, 6, 1)),
    ((2, 5, 6, 1), (2, 5, 6, 16)),
    ((1, 5, 1, 7), (3, 1, 4, 1)),
    ((3, 33), (33,)),
    ((), ()),
    ((1,), (1, 1)),
]


def c_struct_fields(p: EltwiseParams, m: Marshal) -> dict:
    fields = dataclasses.asdict(p)
    fields.pop("out_shape")
    for name in ("a_table", "b_table"):
        fields[name] = m.optional_array(fields[name], np.int32, "int32_t")
    return fields


def run_c(op: str, p: EltwiseParams, a, b, alias: str | None = None) -> np.ndarray:
    """tg_add/tg_mul on flat int8 arrays; alias "a"/"b" writes the result over that input."""
    ffi, lib = kernel_lib(["tg_eltwise.c"], ELTWISE_CDEF)
    m = Marshal(ffi)
    params = m.struct("tg_eltwise_params_t", **c_struct_fields(p, m))
    a = np.ascontiguousarray(a, dtype=np.int8).reshape(-1).copy()
    b = np.ascontiguousarray(b, dtype=np.int8).reshape(-1).copy()
    a_ptr = ffi.cast("int8_t *", ffi.from_buffer(a))
    b_ptr = ffi.cast("int8_t *", ffi.from_buffer(b))
    if alias is None:
        y, y_ptr = m.output(int(np.prod(p.shape)), np.int8)
        y_ptr = ffi.cast("int8_t *", y_ptr)
    else:
        y, y_ptr = (a, a_ptr) if alias == "a" else (b, b_ptr)
    getattr(lib, f"tg_{op}")(params, a_ptr, b_ptr, y_ptr)
    return y


def random_quant(rng, op, ties=False):
    """Scales over orders of magnitude and zero points including -128/127.

    ties: power-of-two scales and an odd output zero point, so results land exactly on .5.
    """
    s_a, s_b = (float(np.float32(10 ** rng.uniform(-3.5, 0))) for _ in range(2))
    spread = rng.uniform(-1, 1.5) if op == "add" else rng.uniform(-0.5, 2.5)
    s_y = float(np.float32((max(s_a, s_b) if op == "add" else s_a * s_b) * 10 ** spread))
    z = [int(v) for v in rng.integers(-128, 128, 3)]
    z = [int(rng.choice([-128, 127])) if rng.random() < 0.25 else v for v in z]
    if ties:
        s_a, s_b = 2.0 ** -int(rng.integers(2, 8)), 2.0 ** -int(rng.integers(2, 8))
        s_y = (max(s_a, s_b) if op == "add" else s_a * s_b) * 2.0 ** int(rng.integers(0, 4))
        z[2] = int(rng.integers(-60, 60)) * 2 + 1
    return s_a, z[0], s_b, z[1], s_y, z[2]


def random_inputs(rng, a_shape, b_shape):
    return (np.asarray(rng.integers(-128, 128, a_shape), dtype=np.int8),
            np.asarray(rng.integers(-128, 128, b_shape), dtype=np.int8))


@pytest.mark.parametrize("mode", ["fixed", "float"])
@pytest.mark.parametrize("op", ["add", "mul"])
@pytest.mark.parametrize("pattern", range(len(PATTERNS)))
def test_c_matches_reference(op, mode, pattern):
    rng = np.random.default_rng(pattern * 10 + (op == "mul") * 2 + (mode == "float"))
    make, ref, _ = OPS[op]
    a_shape, b_shape = PATTERNS[pattern]
    for trial in range(4):
        s_a, z_a, s_b, z_b, s_y, z_y = random_quant(rng, op, ties=trial == 3)
        act = (-128, 127) if trial % 2 == 0 else (int(rng.integers(-128, 0)), 100)
        p = make(a_shape, b_shape, s_a, z_a, s_b, z_b, s_y, z_y, mode=mode,
                 source_dtype="uint8" if trial == 1 else "int8", act_min=act[0], act_max=act[1])
        a, b = random_inputs(rng, a_shape, b_shape)
        np.testing.assert_array_equal(run_c(op, p, a, b), ref(p, a, b))
        if p.a_table is not None:  # the 64-bit path the C keeps for parameters without tables
            q = dataclasses.replace(p, a_table=None, b_table=None)
            np.testing.assert_array_equal(run_c(op, q, a, b), ref(p, a, b))


@pytest.mark.parametrize("seed", range(40))
def test_add_tables_equal_the_formula_on_every_input_pair(seed):
    """All 65536 (a, b) byte pairs: the table form is the fixed-mode formula itself, for
    scales over orders of magnitude, extreme zero points and narrowed clamps."""
    rng = np.random.default_rng(4000 + seed)
    s_a, z_a, s_b, z_b, s_y, z_y = random_quant(rng, "add", ties=seed % 4 == 3)
    lo = int(rng.integers(-128, 20)) if seed % 3 == 0 else -128
    hi = int(rng.integers(lo, 128)) if seed % 5 == 0 else 127
    p = make_add_params((65536,), (65536,), s_a, z_a, s_b, z_b, s_y, z_y, act_min=lo,
                        act_max=hi)
    assert p.a_table is not None
    a = np.repeat(np.arange(-128, 128), 256).astype(np.int8)
    b = np.tile(np.arange(-128, 128), 256).astype(np.int8)
    total = p.a_table[a.view(np.uint8)].astype(np.int64) + p.b_table[b.view(np.uint8)]
    assert np.abs(total).max() < 2**31
    np.testing.assert_array_equal(np.clip(total >> ADD_TABLE_SHIFT, lo, hi), add(p, a, b))


@pytest.mark.parametrize("mode", ["fixed", "float"])
@pytest.mark.parametrize("op", ["add", "mul"])
def test_in_place(op, mode):
    rng = np.random.default_rng(77)
    make, ref, _ = OPS[op]
    for a_shape, b_shape, alias in [((3, 4, 5, 8), (1, 1, 1, 8), "a"), ((3, 4, 5, 8), (), "a"),
                                    ((4, 1, 8), (3, 4, 5, 8), "b"), ((6, 7), (6, 7), "b")]:
        p = make(a_shape, b_shape, *random_quant(rng, op), mode=mode)
        a, b = random_inputs(rng, a_shape, b_shape)
        np.testing.assert_array_equal(run_c(op, p, a, b, alias=alias), ref(p, a, b))


def test_saturation():
    # Large ratios push almost every output to the clamp bounds in both modes.
    rng = np.random.default_rng(3)
    a, b = random_inputs(rng, (64,), (64,))
    for mode in ("fixed", "float"):
        p = make_add_params((64,), (64,), 1.0, -128, 1.0, 127, 0.01, 0, mode=mode)
        y = run_c("add", p, a, b)
        np.testing.assert_array_equal(y, add(p, a, b))
        assert np.isin(y, (-128, 127)).mean() > 0.9
        p = make_mul_params((64,), (64,), 1.0, -128, 1.0, 127, 0.5, -128, mode=mode)
        np.testing.assert_array_equal(run_c("mul", p, a, b), mul(p, a, b))


def test_broadcast_layout_merges_axes():
    assert broadcast_layout((2, 5, 6, 16), (1, 1, 1, 16))[1:] == \
        ([1, 1, 60, 16], [0, 0, 16, 1], [0, 0, 0, 1])
    assert broadcast_layout((2, 5, 6, 16), ())[1:] == ([1, 1, 1, 960], [0, 0, 0, 1], [0] * 4)
    assert broadcast_layout((2, 5, 6, 1), (2, 5, 6, 16))[1:] == \
        ([1, 1, 60, 16], [0, 0, 1, 0], [0, 0, 16, 1])
    with pytest.raises(ValueError):
        broadcast_layout((2, 1, 2, 1, 2), (1, 2, 1, 2, 1))


def test_fma_f32_is_correctly_rounded():
    # Source: exact rational arithmetic (Python fractions) rounded to float32 by hand.
    from fractions import Fraction
    rng = np.random.default_rng(1)
    x = rng.integers(-255, 256, 4000).astype(np.float32)
    y = (10 ** rng.uniform(-5, 1, 4000)).astype(np.float32)
    z = (rng.uniform(-300, 300, 4000)).astype(np.float32)
    got = fma_f32(x, y, z)
    for xi, yi, zi, gi in zip(x, y, z, got, strict=True):
        exact = Fraction(float(xi)) * Fraction(float(yi)) + Fraction(float(zi))
        lo = np.float32(float(exact))
        cands = [np.nextafter(lo, np.float32(-np.inf)), lo, np.nextafter(lo, np.float32(np.inf))]
        best = min(cands, key=lambda c: (abs(Fraction(float(c)) - exact),
                                         int(np.float32(c).view(np.int32)) & 1))
        assert gi == best


@pytest.mark.parametrize("op", ["add", "mul"])
def test_fixed_mode_within_one_lsb_of_real_result(op):
    # Source: ONNX QLinearAdd/QLinearMul semantics (dequantize, operate, quantize) in float64.
    rng = np.random.default_rng(11)
    make, ref, _ = OPS[op]
    for pattern in (0, 1, 4, 6):
        a_shape, b_shape = PATTERNS[pattern]
        s_a, z_a, s_b, z_b, s_y, z_y = random_quant(rng, op)
        p = make(a_shape, b_shape, s_a, z_a, s_b, z_b, s_y, z_y)
        a, b = random_inputs(rng, a_shape, b_shape)
        fa = (a.astype(np.float64) - z_a) * np.float32(s_a)
        fb = (b.astype(np.float64) - z_b) * np.float32(s_b)
        real = (fa + fb if op == "add" else fa * fb) / np.float32(s_y)
        exact = np.clip(np.rint(real) + z_y, -128, 127).reshape(-1)
        assert np.abs(ref(p, a, b).astype(np.int64) - exact).max() <= 1


def qlinear_model(op_type, tp, a_shape, b_shape, quant):
    s_a, z_a, s_b, z_b, s_y, z_y = quant
    inits = [helper.make_tensor("sa", TensorProto.FLOAT, [], [s_a]),
             helper.make_tensor("za", tp, [], [z_a]),
             helper.make_tensor("sb", TensorProto.FLOAT, [], [s_b]),
             helper.make_tensor("zb", tp, [], [z_b]),
             helper.make_tensor("sy", TensorProto.FLOAT, [], [s_y]),
             helper.make_tensor("zy", tp, [], [z_y])]
    node = helper.make_node(op_type, ["a", "sa", "za", "b", "sb", "zb", "sy", "zy"], ["y"],
                            domain="com.microsoft")
    graph = helper.make_graph([node], "q", [helper.make_tensor_value_info("a", tp, a_shape),
                                            helper.make_tensor_value_info("b", tp, b_shape)],
                              [helper.make_tensor_value_info("y", tp, None)], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17),
                                                   helper.make_opsetid("com.microsoft", 1)])


def ort_eltwise(op, dtype, a, b, quant):
    """onnxruntime QLinearAdd/QLinearMul on int8-domain a, b and quant; int8-domain result."""
    off = 0 if dtype == np.int8 else 128
    tp = TensorProto.INT8 if dtype == np.int8 else TensorProto.UINT8
    s_a, z_a, s_b, z_b, s_y, z_y = quant
    model = qlinear_model(OPS[op][2], tp, list(a.shape), list(b.shape),
                          (s_a, z_a + off, s_b, z_b + off, s_y, z_y + off))
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    feeds = {"a": np.asarray(a.astype(np.int64) + off, dtype=dtype),
             "b": np.asarray(b.astype(np.int64) + off, dtype=dtype)}
    return sess.run(None, feeds)[0].astype(np.int64).reshape(-1) - off


@pytest.mark.parametrize("dtype", [np.int8, np.uint8])
@pytest.mark.parametrize("op", ["add", "mul"])
def test_float_mode_matches_onnxruntime(op, dtype):
    # Source: onnxruntime QLinearAdd / QLinearMul (com.microsoft), CPU provider, x86-64.
    rng = np.random.default_rng(500 + (op == "mul") * 2 + (dtype == np.uint8))
    make, ref, _ = OPS[op]
    equal = total = 0
    for trial in range(3 * len(PATTERNS)):
        a_shape, b_shape = PATTERNS[trial % len(PATTERNS)]
        quant = random_quant(rng, op, ties=trial % 3 == 2)
        p = make(a_shape, b_shape, *quant, mode="float", source_dtype=np.dtype(dtype).name)
        a, b = random_inputs(rng, a_shape, b_shape)
        got = run_c(op, p, a, b)
        np.testing.assert_array_equal(got, ref(p, a, b))
        expect = ort_eltwise(op, dtype, a, b, quant)
        equal += int((got == expect).sum())
        total += got.size
    assert equal == total


def naive_float(op, a, b, quant):
    """clip(rint(real result / s_y) + z_y) in float32: dequantize, operate, quantize."""
    s_a, z_a, s_b, z_b, s_y, z_y = quant
    fa = np.float32(s_a) * (a.astype(np.int64) - z_a).astype(np.float32)
    fb = np.float32(s_b) * (b.astype(np.int64) - z_b).astype(np.float32)
    v = ((fa + fb) if op == "add" else (fa * fb)) / np.float32(s_y)
    return np.clip(np.rint(v) + z_y, -128, 127).astype(np.int64).reshape(-1)


def add_unfused(p, a, b, quant):
    """QLinearAdd's float order with separate multiply and add roundings (no fma)."""
    fa = (a.astype(np.int64) + p.raw_offset).astype(np.float32)
    fb = (b.astype(np.int64) + p.raw_offset).astype(np.float32)
    v = fa * np.float32(p.a_ratio) + (fb * np.float32(p.b_ratio) + np.float32(p.bias))
    return np.clip(np.rint(v), -128, 127).astype(np.int64).reshape(-1)


def add_unswapped(p, a, b, quant):
    """QLinearAdd's float order without swapping roles when a is the per-row scalar (int8)."""
    q = dataclasses.replace(p, a_bcast_inner=0)
    term = fma_f32(q.a_ratio, np.float32(q.a_zp), np.float32(q.b_ratio) * np.float32(q.b_zp))
    q.bias = float(np.float32(np.float32(q.out_zp) - term))
    return add(q, a, b).astype(np.int64)


def mul_fused(p, a, b, quant):
    """QLinearMul's float order with the multiply-add fused."""
    prod = ((a.astype(np.int64) - p.a_zp) * (b.astype(np.int64) - p.b_zp)).astype(np.float32)
    v = fma_f32(prod, p.ab_ratio, p.bias)
    return np.clip(np.rint(v), -128, 127).astype(np.int64).reshape(-1)


GRID = np.arange(-128, 128)
ALTERNATIVES = {
    # name: (op, alternative, a grid, b grid, try power-of-two scales on every other trial)
    "add-naive": ("add", naive_float, np.repeat(GRID, 256), np.tile(GRID, 256), True),
    "add-unfused": ("add", add_unfused, np.repeat(GRID, 256), np.tile(GRID, 256), False),
    "add-unswapped": ("add", add_unswapped, GRID.reshape(256, 1), np.tile(GRID, (256, 1)), False),
    "mul-naive": ("mul", naive_float, np.repeat(GRID, 256), np.tile(GRID, 256), True),
    "mul-fused": ("mul", mul_fused, np.repeat(GRID, 256), np.tile(GRID, 256), False),
}


@pytest.mark.parametrize("name", sorted(ALTERNATIVES))
def test_float_mode_on_elements_where_formulas_disagree(name):
    # Source: onnxruntime QLinearAdd / QLinearMul (int8, x86-64). For random parameters, every
    # (a, b) pair on which a plausible alternative float order gives another result than
    # tinygen's; onnxruntime must side with tinygen on each of them.
    op, alternative, a, b, ties = ALTERNATIVES[name]
    a, b = a.astype(np.int8), b.astype(np.int8)
    rng = np.random.default_rng(zlib.crc32(name.encode()))
    make, ref, _ = OPS[op]
    disagree = agree = 0
    for trial in range(300):
        quant = random_quant(rng, op, ties=ties and trial % 2 == 0)
        p = make(a.shape, b.shape, *quant, mode="float")
        ours = ref(p, a, b).astype(np.int64)
        differs = ours != alternative(p, a, b, quant)
        if not differs.any():
            continue
        expect = ort_eltwise(op, np.int8, a, b, quant)
        disagree += int(differs.sum())
        agree += int((ours == expect)[differs].sum())
        if disagree >= 8:
            break
    assert disagree >= 3 and agree == disagree
