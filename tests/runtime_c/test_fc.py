"""tg_fc (C, through cffi) against tinygen.reference.fc, bit for bit, and the reference itself
against onnx.reference (MatMulInteger) and onnxruntime (QLinearMatMul)."""
from __future__ import annotations

import numpy as np
import pytest

from tests.runtime_c.kernel_lib import (
    CORTEX_M3,
    CORTEX_M4,
    REQUANT_CDEF,
    Marshal,
    build_cortex_m,
    c_array,
    c_optional_array,
    c_requant,
    cortex_m_tools_available,
    disassembly,
    kernel_lib,
    pick_zero_point,
    run_qemu,
    to_int8_domain,
)
from tinygen.reference.fc import FcParams, fc, fc_accumulators, gather_weights, with_fc_pack
from tinygen.reference.requant import make_requant, mul_shift

# tg_fc.h, field for field.
FC_CDEF = """
typedef struct {
    int32_t rows, depth, out;
    int32_t w_stride_o, w_stride_k;
    int32_t x_zp;
    const int32_t *w_zp;
    const tg_requant_t *rq;
    const int32_t *pack;
} tg_fc_params_t;
void tg_fc(const tg_fc_params_t *p, const int8_t *x, const int8_t *w,
           const int32_t *bias, void *y);
"""

SCALAR_FIELDS = ("rows", "depth", "out", "w_stride_o", "w_stride_k", "x_zp")
# How the weights sit in memory: constant [out][depth], run-time [depth][out], and both of
# those inside a wider buffer (row pitch larger than the row).
LAYOUTS = ("out_depth", "depth_out", "out_depth_pitched", "depth_out_pitched")
RQ_MODES = ("fixed", "float", "int32")


def run_c_fc(x, w, bias, p: FcParams) -> np.ndarray:
    """Run tg_fc on numpy arrays (w is the flat buffer); int8 output with p.rq, else int32."""
    ffi, lib = kernel_lib(["tg_fc.c"], REQUANT_CDEF + FC_CDEF)
    m = Marshal(ffi)
    params = m.struct("tg_fc_params_t", **{f: int(getattr(p, f)) for f in SCALAR_FIELDS},
                      w_zp=m.optional_array(p.w_zp, np.int32, "int32_t"), rq=m.requant(p.rq),
                      pack=m.optional_array(p.pack, np.int32, "int32_t"))
    y, y_ptr = m.output((p.rows, p.out), np.int32 if p.rq is None else np.int8)
    if p.pack is not None:  # tg_fc.h: with a pack, w and bias are NULL
        w, bias = None, None
    lib.tg_fc(params, m.array(x, np.int8, "int8_t"), m.optional_array(w, np.int8, "int8_t"),
              m.optional_array(bias, np.int32, "int32_t"), y_ptr)
    return y


def weight_buffer(rng, layout: str, depth: int, out: int) -> tuple[np.ndarray, int, int]:
    """(flat int8 buffer, w_stride_o, w_stride_k) for one of LAYOUTS."""
    pitch_extra = 3 if layout.endswith("pitched") else 0
    if layout.startswith("out_depth"):
        buf = rng.integers(-128, 128, size=(out, depth + pitch_extra), dtype=np.int8)
        return buf.reshape(-1), depth + pitch_extra, 1
    buf = rng.integers(-128, 128, size=(depth, out + pitch_extra), dtype=np.int8)
    return buf.reshape(-1), 1, out + pitch_extra


def random_requant(rng, out: int, mode: str, narrow: bool = False):
    """Per-column requant with scales log-uniform in [1e-6, 1] (narrow: [2^-12, 2^-6],
    where a pack is prescaled); None for raw int32."""
    if mode == "int32":
        return None
    out_zp = pick_zero_point(rng)
    act_min = out_zp if rng.random() < 0.25 else -128  # sometimes a fused ReLU
    scales = 2.0 ** rng.uniform(-12, -6, size=out) if narrow else 10.0 ** rng.uniform(-6, 0,
                                                                                       size=out)
    return make_requant(scales, out_zp, act_min, 127, mode)


def random_case(seed: int):
    """One fc case; the seed cycles layout and requant mode so each pairing is covered.
    Constant-layout ([out][depth]) cases with (seed // 4) even carry the pack tg_fc reads
    instead of w and bias, half of them with prescaling scales."""
    rng = np.random.default_rng(seed)
    layout = LAYOUTS[seed % len(LAYOUTS)]
    mode = RQ_MODES[(seed // len(LAYOUTS)) % len(RQ_MODES)]
    rows, depth, out = int(rng.integers(1, 4)), int(rng.integers(1, 41)), int(rng.integers(1, 41))
    w_zp = None
    if seed % 3 != 0:
        w_zp = np.array([pick_zero_point(rng) for _ in range(out)], dtype=np.int32)
    packed = layout.startswith("out_depth") and (seed // 4) % 2 == 0
    if packed and seed % 3:
        depth = 4 * ((depth + 3) // 4)  # the assembly's case on M4: whole groups of four
    w, stride_o, stride_k = weight_buffer(rng, layout, depth, out)
    narrow = packed and (seed // 8) % 2 == 1
    p = FcParams(rows=rows, depth=depth, out=out, w_stride_o=stride_o, w_stride_k=stride_k,
                 x_zp=pick_zero_point(rng), w_zp=w_zp, rq=random_requant(rng, out, mode, narrow))
    x = rng.integers(-128, 128, size=(rows, depth), dtype=np.int8)
    bias = None if seed % 5 == 0 else rng.integers(-5000, 5001, size=out, dtype=np.int32)
    if packed:
        with_fc_pack(p, w, bias)
    return p, x, w, bias


CASE_SEEDS = range(48)


@pytest.mark.parametrize("seed", CASE_SEEDS)
def test_c_fc_matches_reference(seed):
    p, x, w, bias = random_case(seed)
    np.testing.assert_array_equal(run_c_fc(x, w, bias, p), fc(x, w, bias, p))


def test_cases_cover_saturation_and_features():
    """The random cases reach both clamp ends and mix NULL bias / NULL w_zp / output blocks."""
    below = above = 0
    seen = set()
    for seed in CASE_SEEDS:
        p, x, w, bias = random_case(seed)
        seen.add((p.w_stride_k == 1, bias is None, p.w_zp is None, p.out > 16))
        if p.rq is None or p.rq.is_float:
            continue
        unclamped = p.rq.out_zp + mul_shift(fc_accumulators(x, w, bias, p), p.rq.mult,
                                            p.rq.shift)
        below += int((unclamped < p.rq.act_min).sum())
        above += int((unclamped > p.rq.act_max).sum())
    assert below > 0 and above > 0
    assert len(seen) >= 10


def test_both_weight_layouts_compute_the_same_product():
    """[out][depth] weights and the same matrix stored [depth][out] give equal results."""
    rng = np.random.default_rng(3)
    depth, out = 23, 19
    matrix = rng.integers(-128, 128, size=(out, depth), dtype=np.int8)
    x = rng.integers(-128, 128, size=(2, depth), dtype=np.int8)
    w_zp = rng.integers(-128, 128, size=out).astype(np.int32)
    rq = make_requant(10.0 ** rng.uniform(-4, -2, size=out), 5, -128, 127, "fixed")
    const = FcParams(2, depth, out, depth, 1, x_zp=-3, w_zp=w_zp, rq=rq)
    runtime = FcParams(2, depth, out, 1, out, x_zp=-3, w_zp=w_zp, rq=rq)
    y_const = run_c_fc(x, matrix.reshape(-1), None, const)
    np.testing.assert_array_equal(run_c_fc(x, matrix.T.reshape(-1), None, runtime), y_const)
    np.testing.assert_array_equal(gather_weights(matrix.T.reshape(-1), runtime), matrix)
    assert len(np.unique(y_const)) > 10


# --- the reference against onnx.reference MatMulInteger -----------------------------------


def integer_matmul_case(seed: int):
    """A [m][k] and B [k][n] of uint8/int8 with a per-tensor a_zp and per-column b_zp."""
    rng = np.random.default_rng(7000 + seed)
    a_type = np.uint8 if seed % 2 else np.int8
    b_type = np.int8 if seed % 3 else np.uint8
    m, k, n = int(rng.integers(1, 4)), int(rng.integers(1, 30)), int(rng.integers(1, 30))
    lo_a, lo_b = np.iinfo(a_type).min, np.iinfo(b_type).min
    return dict(a=rng.integers(lo_a, lo_a + 256, size=(m, k)).astype(a_type),
                b=rng.integers(lo_b, lo_b + 256, size=(k, n)).astype(b_type),
                a_zp=np.array(rng.integers(lo_a, lo_a + 256), dtype=a_type),
                b_zp=rng.integers(lo_b, lo_b + 256, size=n).astype(b_type))


def one_node_model(op: str, inputs: list[str], consts: dict, a_type, y_type):
    from onnx import TensorProto, helper, numpy_helper

    elem = {np.dtype(np.uint8): TensorProto.UINT8, np.dtype(np.int8): TensorProto.INT8,
            np.dtype(np.int32): TensorProto.INT32}
    graph = helper.make_graph(
        [helper.make_node(op, inputs, ["y"])], "door_sensor_fc",
        [helper.make_tensor_value_info("a", elem[np.dtype(a_type)], None)],
        [helper.make_tensor_value_info("y", elem[np.dtype(y_type)], None)],
        initializer=[numpy_helper.from_array(np.asarray(v), k) for k, v in consts.items()])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])


@pytest.mark.parametrize("seed", range(12))
def test_reference_accumulators_match_onnx_reference_matmulinteger(seed):
    from onnx.reference import ReferenceEvaluator

    case = integer_matmul_case(seed)
    model = one_node_model("MatMulInteger", ["a", "b", "a_zp", "b_zp"],
                           {k: case[k] for k in ("b", "a_zp", "b_zp")}, case["a"].dtype,
                           np.int32)
    # Source: onnx.reference (the ONNX reference evaluator), MatMulInteger, int32 out.
    (onnx_y,) = ReferenceEvaluator(model).run(None, {"a": case["a"]})

    a8, a_zp = to_int8_domain(case["a"], case["a_zp"])
    b8, b_zp = to_int8_domain(case["b"], case["b_zp"])
    (m, k), n = a8.shape, b8.shape[1]
    # B is the run-time [depth][out] right operand: stride_o = 1, stride_k = out.
    p = FcParams(m, k, n, w_stride_o=1, w_stride_k=n, x_zp=int(a_zp), w_zp=b_zp)
    ours = fc(a8, b8.reshape(-1), None, p)
    np.testing.assert_array_equal(ours, onnx_y)
    np.testing.assert_array_equal(run_c_fc(a8, b8.reshape(-1), None, p), ours)


# --- float requant against onnxruntime QLinearMatMul --------------------------------------


def qlinear_matmul_case(seed: int):
    """QLinearMatMul inputs: uint8/int8 a and y, per-tensor int8 b, y_scale at the spread."""
    case = integer_matmul_case(seed)
    rng = np.random.default_rng(8000 + seed)
    case["b"] = rng.integers(-128, 128, size=case["b"].shape).astype(np.int8)
    case["b_zp"] = np.array(rng.integers(-128, 128), dtype=np.int8)
    case["a_scale"] = np.float32(10.0 ** rng.uniform(-3, 0))
    case["b_scale"] = np.float32(10.0 ** rng.uniform(-3, -1))
    a_centered = case["a"].astype(np.float64) - float(case["a_zp"])
    b_centered = case["b"].astype(np.float64) - float(case["b_zp"])
    typical = np.sqrt(case["a"].shape[1] * np.mean(a_centered ** 2) * np.mean(b_centered ** 2))
    real_typical = float(case["a_scale"] * case["b_scale"]) * typical
    case["y_scale"] = np.float32(real_typical / float(rng.uniform(30, 90)))
    y_lo = np.iinfo(case["a"].dtype).min
    case["y_zp"] = np.array(rng.integers(y_lo, y_lo + 256), dtype=case["a"].dtype)
    return case


def qlinear_matmul_outputs(seed: int):
    """(reference, onnxruntime, C) int8-domain outputs of one QLinearMatMul case."""
    import onnxruntime as ort

    case = qlinear_matmul_case(seed)
    names = ["a", "a_scale", "a_zp", "b", "b_scale", "b_zp", "y_scale", "y_zp"]
    model = one_node_model("QLinearMatMul", names, {k: case[k] for k in names[1:]},
                           case["a"].dtype, case["a"].dtype)
    session = ort.InferenceSession(model.SerializeToString(),
                                   providers=["CPUExecutionProvider"])
    # Source: onnxruntime InferenceSession, one-node QLinearMatMul model.
    theirs, _ = to_int8_domain(session.run(None, {"a": case["a"]})[0], 0)

    a8, a_zp = to_int8_domain(case["a"], case["a_zp"])
    _, y_zp = to_int8_domain(np.zeros(1, dtype=case["a"].dtype), case["y_zp"])
    (m, k), n = a8.shape, case["b"].shape[1]
    scale = np.float32(case["a_scale"] * case["b_scale"]) / case["y_scale"]
    rq = make_requant([scale], int(y_zp), -128, 127, "float",
                      float_scales=np.full(n, scale, dtype=np.float32))
    p = FcParams(m, k, n, w_stride_o=1, w_stride_k=n, x_zp=int(a_zp),
                 w_zp=np.full(n, int(case["b_zp"]), dtype=np.int32), rq=rq)
    b_flat = case["b"].reshape(-1)
    return fc(a8, b_flat, None, p), theirs, run_c_fc(a8, b_flat, None, p)


@pytest.mark.onnxruntime_exact
def test_float_requant_matches_onnxruntime_qlinearmatmul():
    matched = total = 0
    for seed in range(24):
        ours, theirs, c_out = qlinear_matmul_outputs(seed)
        np.testing.assert_array_equal(c_out, ours)
        matched += int((ours == theirs).sum())
        total += ours.size
    assert matched == total, f"{matched}/{total} outputs match onnxruntime QLinearMatMul"


# --- the same kernel on Cortex-M under QEMU (M4: DSP path, M3: portable path) ---------------


def fc_case_c(tag: str, p: FcParams, x, w, bias) -> tuple[str, str]:
    """C definitions of one case and the kernel call that dumps its output."""
    w_zp_def, w_zp_expr = c_optional_array(f"{tag}_w_zp", "int32_t", p.w_zp)
    bias_def, bias_expr = c_optional_array(f"{tag}_bias", "int32_t", bias)
    rq_def, rq_expr = c_requant(f"{tag}_rq", p.rq)
    pack_def, pack_expr = c_optional_array(f"{tag}_pack", "int32_t", p.pack)
    fields = ", ".join(str(int(getattr(p, f))) for f in SCALAR_FIELDS)
    if p.pack is not None:  # tg_fc.h: the pack replaces w and bias (both NULL)
        w_def, bias_def, bias_expr = "", "", "NULL"
    else:
        w_def = c_array(f"{tag}_w", "int8_t", w)
    defs = (c_array(f"{tag}_x", "int8_t", x) + w_def + bias_def + w_zp_def + rq_def + pack_def
            + f"static const tg_fc_params_t {tag}_p = {{{fields}, {w_zp_expr}, {rq_expr}, "
              f"{pack_expr}}};\n")
    out_bytes = p.rows * p.out * (1 if p.rq is not None else 4)
    w_expr = "NULL" if p.pack is not None else f"{tag}_w"
    call = (f"tg_fc(&{tag}_p, {tag}_x, {w_expr}, {bias_expr}, y); "
            f"tg_test_dump(\"{tag}\", y, {out_bytes});")
    return defs, call


@pytest.mark.target
@pytest.mark.skipif(not cortex_m_tools_available(), reason="needs arm-none-eabi-gcc and QEMU")
@pytest.mark.parametrize("core", [CORTEX_M4, CORTEX_M3], ids=["cortex-m4-dsp", "cortex-m3"])
def test_fc_on_cortex_m_matches_reference(core, tmp_path):
    defs, calls, expected = [], [], {}
    for seed in range(0, 48, 2):
        p, x, w, bias = random_case(seed)
        case_defs, call = fc_case_c(f"f{seed}", p, x, w, bias)
        defs.append(case_defs)
        calls.append(call)
        expected[f"f{seed}"] = fc(x, w, bias, p).tobytes()
    main_c = ('#include <stddef.h>\n#include "tg_fc.h"\n'
              "void tg_test_dump(const char *tag, const void *data, int32_t bytes);\n"
              + "".join(defs) + "int main(void)\n{\n    static int32_t y[4096];\n    "
              + "\n    ".join(calls) + "\n    return 0;\n}\n")
    elf = build_cortex_m(["tg_fc.c"], main_c, core, tmp_path)
    # The M4 build must really take the SMLAD path, the M3 build must not.
    dis = disassembly(elf)
    assert ("smlad" in dis) == (core is CORTEX_M4)
    assert ("<tg_mat_row_dsp>:" in dis) == (core is CORTEX_M4)  # packs on the matrix core
    dumps = run_qemu(elf, core)
    assert dumps.keys() == expected.keys()
    for tag, want in expected.items():
        assert dumps[tag] == want, tag
