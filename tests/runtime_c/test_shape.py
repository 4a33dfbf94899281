"""tg_concat / tg_transpose / tg_pad (C, through cffi) against tinygen.reference.shape bit for
bit, the reference against onnx.reference (Concat, Transpose, Pad) and the requantizing concat
against onnxruntime's QLinearConcat (com.microsoft)."""
from __future__ import annotations

import numpy as np
import pytest
from onnx import TensorProto, helper
from onnx.reference import ReferenceEvaluator

from tests.runtime_c.kernel_lib import Marshal, kernel_lib
from tinygen.reference.shape import (
    PadParams,
    TransposeParams,
    concat,
    concat_params,
    concat_tables,
    pad,
    transpose,
)

SHAPE_CDEF = """
typedef struct {
    int32_t outer;
    int32_t parts;
    const int32_t *part_inner;
    const int8_t *const *tables;
} tg_concat_params_t;
void tg_concat(const tg_concat_params_t *p, const int8_t *const *parts, int8_t *y);
typedef struct {
    int32_t rank;
    int32_t in_shape[6];
    int32_t perm[6];
} tg_transpose_params_t;
void tg_transpose(const tg_transpose_params_t *p, const int8_t *x, int8_t *y);
typedef struct {
    int32_t rank;
    int32_t in_shape[6];
    int32_t pads_before[6];
    int32_t pads_after[6];
    int8_t value;
} tg_pad_params_t;
void tg_pad(const tg_pad_params_t *p, const int8_t *x, int8_t *y);
"""


def lib():
    return kernel_lib(["tg_shape.c"], SHAPE_CDEF)


def padded6(values) -> list[int]:
    return [int(v) for v in values] + [0] * (6 - len(values))


def run_c_concat(p, parts) -> np.ndarray:
    ffi, clib = lib()
    m = Marshal(ffi)
    part_ptrs = ffi.new("const int8_t *[]", [m.array(x, np.int8, "int8_t") for x in parts])
    tables = ffi.NULL
    if p.tables is not None:
        tables = ffi.new("const int8_t *[]", [ffi.NULL if t is None else
                                              m.array(t, np.int8, "int8_t") for t in p.tables])
    params = m.struct("tg_concat_params_t", outer=p.outer, parts=p.parts,
                      part_inner=m.array(p.part_inner, np.int32, "int32_t"), tables=tables)
    y, y_ptr = m.output(p.outer * sum(p.part_inner), np.int8)
    clib.tg_concat(params, part_ptrs, ffi.cast("int8_t *", y_ptr))
    return y


def run_c_transpose(p: TransposeParams, x) -> np.ndarray:
    ffi, clib = lib()
    m = Marshal(ffi)
    params = m.struct("tg_transpose_params_t", rank=p.rank, in_shape=padded6(p.in_shape),
                      perm=padded6(p.perm))
    y, y_ptr = m.output(x.size, np.int8)
    clib.tg_transpose(params, m.array(x, np.int8, "int8_t"), ffi.cast("int8_t *", y_ptr))
    return y


def run_c_pad(p: PadParams, x) -> np.ndarray:
    ffi, clib = lib()
    m = Marshal(ffi)
    params = m.struct("tg_pad_params_t", rank=p.rank, in_shape=padded6(p.in_shape),
                      pads_before=padded6(p.pads_before), pads_after=padded6(p.pads_after),
                      value=p.value)
    y, y_ptr = m.output(int(np.prod(p.out_shape, dtype=np.int64)), np.int8)
    clib.tg_pad(params, m.array(x, np.int8, "int8_t"), ffi.cast("int8_t *", y_ptr))
    return y


def random_parts(rng, rank, axis, count):
    base = rng.integers(1, 5, rank)
    shapes = []
    for _ in range(count):
        s = base.copy()
        s[axis] = rng.integers(1, 6)
        shapes.append(tuple(int(v) for v in s))
    return shapes


@pytest.mark.parametrize("seed", range(12))
def test_concat_c_matches_reference(seed):
    rng = np.random.default_rng(seed)
    rank = int(rng.integers(1, 5))
    axis = int(rng.integers(0, rank))
    shapes = random_parts(rng, rank, axis, int(rng.integers(1, 5)))
    parts = [rng.integers(-128, 128, s).astype(np.int8) for s in shapes]
    tables = [rng.integers(-128, 128, 256).astype(np.int8) if rng.random() < 0.5 else None
              for _ in shapes]
    for tabs in (None, tables):
        p = concat_params(shapes, axis, tabs)
        np.testing.assert_array_equal(run_c_concat(p, parts), concat(p, parts))


@pytest.mark.parametrize("seed", range(4))
def test_concat_reference_matches_onnx_reference(seed):
    # Source: onnx.reference Concat.
    rng = np.random.default_rng(100 + seed)
    rank = int(rng.integers(1, 5))
    axis = int(rng.integers(0, rank))
    shapes = random_parts(rng, rank, axis, 3)
    parts = [rng.integers(-128, 128, s).astype(np.int8) for s in shapes]
    names = [f"x{i}" for i in range(len(parts))]
    infos = [helper.make_tensor_value_info(n, TensorProto.INT8, s)
             for n, s in zip(names, shapes, strict=True)]
    graph = helper.make_graph(
        [helper.make_node("Concat", names, ["y"], axis=axis)], "concat", infos,
        [helper.make_tensor_value_info("y", TensorProto.INT8, None)])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    expect = ReferenceEvaluator(model).run(None, dict(zip(names, parts, strict=True)))[0]
    np.testing.assert_array_equal(concat(concat_params(shapes, axis), parts), expect.ravel())


def qlinear_concat_model(shapes, axis, part_quant, out_quant, tp):
    inputs, inits, infos = ["ys", "yz"], [], []
    inits += [helper.make_tensor("ys", TensorProto.FLOAT, [], [out_quant[0]]),
              helper.make_tensor("yz", tp, [], [out_quant[1]])]
    for i, (shape, (s, z)) in enumerate(zip(shapes, part_quant, strict=True)):
        inputs += [f"x{i}", f"s{i}", f"z{i}"]
        inits += [helper.make_tensor(f"s{i}", TensorProto.FLOAT, [], [s]),
                  helper.make_tensor(f"z{i}", tp, [], [z])]
        infos.append(helper.make_tensor_value_info(f"x{i}", tp, shape))
    node = helper.make_node("QLinearConcat", inputs, ["y"], axis=axis, domain="com.microsoft")
    graph = helper.make_graph([node], "qconcat", infos,
                              [helper.make_tensor_value_info("y", tp, None)], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13),
                                                   helper.make_opsetid("com.microsoft", 1)])


@pytest.mark.parametrize("dtype", [np.int8, np.uint8])
def test_requantizing_concat_matches_onnxruntime(dtype):
    # Source: onnxruntime QLinearConcat (com.microsoft), CPU provider.
    ort = pytest.importorskip("onnxruntime")
    rng = np.random.default_rng(7 if dtype == np.int8 else 8)
    off = 0 if dtype == np.int8 else 128
    tp = TensorProto.INT8 if dtype == np.int8 else TensorProto.UINT8
    equal = total = 0
    for trial in range(10):
        shapes = random_parts(rng, 4, 3, 3)
        parts = [rng.integers(-128, 128, s).astype(np.int8) for s in shapes]
        part_quant = [(float(np.float32(10 ** rng.uniform(-3, 0))), int(rng.integers(-128, 128)))
                      for _ in shapes]
        if trial % 3 == 0:
            part_quant[0] = (0.02, 5)  # one part already in the output's quantization
        out_quant = (0.02, 5) if trial % 3 == 0 else (float(np.float32(10 ** rng.uniform(-3, 0))),
                                                      int(rng.integers(-128, 128)))
        model = qlinear_concat_model(shapes, 3, [(s, z + off) for s, z in part_quant],
                                     (out_quant[0], out_quant[1] + off), tp)
        sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
        feeds = {f"x{i}": (x.astype(np.int64) + off).astype(dtype) for i, x in enumerate(parts)}
        expect = sess.run(None, feeds)[0].astype(np.int64) - off
        p = concat_params(shapes, 3, concat_tables(part_quant, out_quant))
        got = run_c_concat(p, parts)
        np.testing.assert_array_equal(got, concat(p, parts))
        equal += int((got == expect.ravel()).sum())
        total += got.size
    assert equal == total


def random_transpose(rng):
    rank = int(rng.integers(1, 7))
    shape = [int(v) for v in rng.integers(1, 5, rank)]
    if rng.random() < 0.3:
        shape[int(rng.integers(0, rank))] = 1
    return TransposeParams(rank, shape, [int(v) for v in rng.permutation(rank)])


@pytest.mark.parametrize("seed", range(30))
def test_transpose_c_matches_reference(seed):
    rng = np.random.default_rng(seed)
    p = random_transpose(rng)
    x = rng.integers(-128, 128, int(np.prod(p.in_shape))).astype(np.int8)
    np.testing.assert_array_equal(run_c_transpose(p, x), transpose(p, x).ravel())


@pytest.mark.parametrize("shape,perm", [((2, 3, 4, 5), (0, 3, 1, 2)), ((2, 3, 4, 5), (0, 2, 3, 1)),
                                        ((7,), (0,)), ((1, 1, 1), (2, 0, 1)),
                                        ((3, 1, 4, 1, 2, 2), (5, 4, 3, 2, 1, 0))])
def test_transpose_fixed_cases_match_onnx_reference(shape, perm):
    # Source: onnx.reference Transpose; includes the NCHW <-> NHWC flips.
    rng = np.random.default_rng(1)
    x = rng.integers(-128, 128, shape).astype(np.int8)
    graph = helper.make_graph(
        [helper.make_node("Transpose", ["x"], ["y"], perm=list(perm))], "t",
        [helper.make_tensor_value_info("x", TensorProto.INT8, shape)],
        [helper.make_tensor_value_info("y", TensorProto.INT8, None)])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    expect = ReferenceEvaluator(model).run(None, {"x": x})[0]
    p = TransposeParams(len(shape), list(shape), list(perm))
    np.testing.assert_array_equal(transpose(p, x), expect)
    np.testing.assert_array_equal(run_c_transpose(p, x), expect.ravel())


def random_pad(rng):
    rank = int(rng.integers(1, 7))
    shape = [int(v) for v in rng.integers(1, 5, rank)]
    before = [int(v) if rng.random() < 0.5 else 0 for v in rng.integers(0, 3, rank)]
    after = [int(v) if rng.random() < 0.5 else 0 for v in rng.integers(0, 3, rank)]
    return PadParams(rank, shape, before, after, int(rng.integers(-128, 128)))


@pytest.mark.parametrize("seed", range(30))
def test_pad_c_matches_reference(seed):
    rng = np.random.default_rng(seed)
    p = random_pad(rng)
    x = rng.integers(-128, 128, int(np.prod(p.in_shape))).astype(np.int8)
    np.testing.assert_array_equal(run_c_pad(p, x), pad(p, x).ravel())


@pytest.mark.parametrize("seed", range(5))
def test_pad_reference_matches_onnx_reference(seed):
    # Source: onnx.reference Pad, mode "constant" (pads [begin..., end...], constant_value).
    rng = np.random.default_rng(50 + seed)
    p = random_pad(rng)
    x = rng.integers(-128, 128, p.in_shape).astype(np.int8)
    inits = [helper.make_tensor("pads", TensorProto.INT64, [2 * p.rank],
                                p.pads_before + p.pads_after),
             helper.make_tensor("value", TensorProto.INT8, [], [p.value])]
    graph = helper.make_graph(
        [helper.make_node("Pad", ["x", "pads", "value"], ["y"], mode="constant")], "pad",
        [helper.make_tensor_value_info("x", TensorProto.INT8, p.in_shape)],
        [helper.make_tensor_value_info("y", TensorProto.INT8, None)], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    expect = ReferenceEvaluator(model).run(None, {"x": x})[0]
    np.testing.assert_array_equal(pad(p, x), expect)
    np.testing.assert_array_equal(run_c_pad(p, x), expect.ravel())


def test_pad_and_transpose_edge_cases():
    x = np.array([5], dtype=np.int8)
    np.testing.assert_array_equal(run_c_pad(PadParams(0, [], [], [], 3), x), [5])
    np.testing.assert_array_equal(run_c_pad(PadParams(1, [1], [2], [1], -7), x), [-7, -7, 5, -7])
    np.testing.assert_array_equal(run_c_transpose(TransposeParams(0, [], []), x), [5])
    with pytest.raises(ValueError):
        pad(PadParams(1, [2], [-1], [0]), np.zeros(2, np.int8))
