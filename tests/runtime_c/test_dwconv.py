"""tg_dwconv (C, through cffi and on Cortex-M under QEMU) against tinygen.reference.dwconv,
bit for bit. The reference is the grouped convolution of reference/conv.py with groups ==
in_c, which tests/runtime_c/test_conv.py checks against onnx.reference (ConvInteger) and
onnxruntime (QLinearConv); here it is checked once more against onnx.reference directly."""
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
    c_requant,
    cortex_m_tools_available,
    disassembly,
    kernel_lib,
    pick_zero_point,
    run_qemu,
    to_int8_domain,
)
from tinygen.reference.conv import conv_output_size
from tinygen.reference.dwconv import DwConvParams, dwconv, scratch_bytes, with_pack
from tinygen.reference.requant import FORM_EXACT, FORM_FAST, choose_form, make_requant
from tinygen.reference.rows import run_rows

# tg_dwconv.h, field for field.
DWCONV_CDEF = """
typedef struct {
    int32_t n, in_h, in_w, in_c;
    int32_t out_h, out_w, out_c;
    int32_t k_h, k_w;
    int32_t stride_h, stride_w;
    int32_t dil_h, dil_w;
    int32_t pad_top, pad_left;
    int32_t in_zp;
    int32_t block;
    int32_t plane_w;
    const int32_t *pack;
    const tg_requant_t *rq;
    int32_t x_ring, y_ring;
} tg_dwconv_params_t;
void tg_dwconv(const tg_dwconv_params_t *p, const int8_t *x, void *y, void *scratch,
               int32_t row0, int32_t row1);
"""

SCALARS = ("n", "in_h", "in_w", "in_c", "out_h", "out_w", "out_c", "k_h", "k_w", "stride_h",
           "stride_w", "dil_h", "dil_w", "pad_top", "pad_left", "in_zp", "block", "plane_w")
MODES = ("fast", "exact", "float", "int32")


def axis(rng, k: int | None = None, stride: int | None = None, dil: int | None = None):
    k = int(rng.integers(1, 6)) if k is None else k
    stride = int(rng.integers(1, 4)) if stride is None else stride
    dil = int(rng.integers(1, 3)) if dil is None else dil
    begin, end = (int(v) for v in rng.integers(0, k, size=2))
    span = dil * (k - 1) + 1
    size = max(int(rng.integers(1, 14)), span - begin - end)
    return dict(size=size, k=k, stride=stride, dil=dil, begin=begin,
                out=conv_output_size(size, k, stride, dil, begin, end))


def make_case(seed: int, shape: str = "random", plain_fast: bool = False):
    """One case. shape "3x3s1"/"3x3s2": the DSP path's geometry (pads 0 or 1, any size),
    else random kernel, stride, dilation and pads; the seed cycles the requant modes.
    plain_fast: fast requant clamped to the int8 range only (the assembly's case)."""
    rng = np.random.default_rng(seed)
    mode = "fast" if plain_fast else MODES[seed % len(MODES)]
    if shape == "random":
        h = axis(rng) if seed % 5 else dict(size=1, k=1, stride=1, dil=1, begin=0, out=1)
        w_ax = axis(rng)
    else:
        s = 1 if shape == "3x3s1" else 2
        h, w_ax = axis(rng, 3, s, 1), axis(rng, 3, s, 1)
    in_c = int(rng.integers(1, 14))
    multiplier = 1 if shape != "random" or seed % 3 else 2
    out_c = in_c * multiplier
    taps = h["k"] * w_ax["k"]
    bias = rng.integers(-5000, 5001, size=out_c, dtype=np.int32)
    rq = None
    if mode != "int32":
        out_zp = pick_zero_point(rng)
        lo, hi = (out_zp, 127) if rng.random() < 0.3 else (-128, 127)
        if rng.random() < 0.15:
            lo, hi = -100, 90  # a clip narrower than int8 on both sides
        if plain_fast:
            lo, hi = -128, 127
        scales = 10.0 ** rng.uniform(-5, -1, size=out_c)
        rq = make_requant(scales, out_zp, lo, hi, "float" if mode == "float" else "fixed")
        if mode != "float":
            # the layer's own accumulator bound, as the compiler gives it (passes/overflow.py)
            # (a bound past int32 proves no fast form: the exact one)
            bound = int(np.abs(bias).max()) + taps * 255 * 255
            choose_form(rq, bound if mode == "fast" else 2**62)
    w_zp = None if seed % 2 else rng.integers(-128, 128, size=out_c).astype(np.int32)
    p = DwConvParams(n=1 + seed % 2, in_h=h["size"], in_w=w_ax["size"], in_c=in_c,
                     out_h=h["out"], out_w=w_ax["out"], out_c=out_c, k_h=h["k"], k_w=w_ax["k"],
                     stride_h=h["stride"], stride_w=w_ax["stride"], dil_h=h["dil"],
                     dil_w=w_ax["dil"], pad_top=h["begin"], pad_left=w_ax["begin"],
                     in_zp=pick_zero_point(rng), w_zp=w_zp, rq=rq)
    x = rng.integers(-128, 128, size=(p.n, p.in_h, p.in_w, in_c), dtype=np.int8)
    w = rng.integers(-128, 128, size=(out_c, p.k_h, p.k_w, 1), dtype=np.int8)
    return with_pack(p, w, bias), x, w, bias


def out_dtype(p):
    return np.int8 if p.rq is not None else np.int32


def c_call(p: DwConvParams, x_buf: np.ndarray, y_buf: np.ndarray, row0: int, row1: int):
    ffi, lib = kernel_lib(["tg_dwconv.c"], REQUANT_CDEF + DWCONV_CDEF)
    m = Marshal(ffi)
    params = m.struct("tg_dwconv_params_t", **{f: int(getattr(p, f)) for f in SCALARS},
                      pack=m.array(p.pack, np.int32, "int32_t"), rq=m.requant(p.rq),
                      x_ring=p.x_ring, y_ring=p.y_ring)
    lib.tg_dwconv(params, ffi.cast("int8_t *", ffi.from_buffer(x_buf)),
                  ffi.cast("void *", ffi.from_buffer(y_buf)), m.scratch(scratch_bytes(p)),
                  row0, row1)


def run_c(p, x):
    y = np.zeros((p.n, p.out_h, p.out_w, p.out_c), dtype=out_dtype(p))
    c_call(p, np.ascontiguousarray(x), y, 0, p.out_h)
    return y


@pytest.mark.parametrize("seed", range(48))
def test_c_dwconv_matches_reference(seed):
    p, x, w, bias = make_case(seed)
    np.testing.assert_array_equal(run_c(p, x), dwconv(x, w, bias, p))


@pytest.mark.parametrize("shape", ["3x3s1", "3x3s2"])
@pytest.mark.parametrize("seed", range(16))
def test_depthwise_3x3_strides_match_reference(shape, seed):
    p, x, w, bias = make_case(seed, shape)
    np.testing.assert_array_equal(run_c(p, x), dwconv(x, w, bias, p))


def test_cases_cover_the_requant_forms_and_blocks():
    """The cases reach every form, several channel blocks and odd left pads."""
    forms, blocks, odd_pad = set(), 0, 0
    for seed in range(48):
        p, *_ = make_case(seed)
        forms.add(None if p.rq is None else p.rq.form)
        odd_pad += p.pad_left % 2
    for seed in range(16):
        p, *_ = make_case(seed, "3x3s1")
        blocks += p.block < p.in_c
        forms.add(None if p.rq is None else p.rq.form)
    assert {None, FORM_FAST, FORM_EXACT, 2} <= forms
    assert odd_pad > 0
    big = DwConvParams(n=1, in_h=40, in_w=40, in_c=24, out_h=40, out_w=40, out_c=24, k_h=3,
                       k_w=3, pad_top=1, pad_left=1)
    assert big.block < big.in_c and big.block % 4 == 0


def test_channel_blocks_match_reference():
    """Wide rows: the channels run in several blocks (the planes budget), tails included."""
    rng = np.random.default_rng(3)
    for in_c, stride in ((22, 1), (13, 2)):
        p = DwConvParams(n=1, in_h=7, in_w=70, in_c=in_c, out_h=7 // stride + 7 % stride,
                         out_w=70 // stride, out_c=in_c, k_h=3, k_w=3, stride_h=stride,
                         stride_w=stride, pad_top=1, pad_left=1, in_zp=-3,
                         rq=make_requant(np.full(in_c, 3e-3), 5, -128, 127, "fixed"))
        p.out_h = conv_output_size(7, 3, stride, 1, 1, 1)
        p.out_w = conv_output_size(70, 3, stride, 1, 1, 1)
        p.block, p.plane_w = 0, 0
        p.__post_init__()
        assert p.block < in_c
        w = rng.integers(-128, 128, size=(in_c, 3, 3, 1), dtype=np.int8)
        bias = rng.integers(-900, 900, size=in_c, dtype=np.int32)
        x = rng.integers(-128, 128, size=(1, 7, 70, in_c), dtype=np.int8)
        with_pack(p, w, bias)
        np.testing.assert_array_equal(run_c(p, x), dwconv(x, w, bias, p))


@pytest.mark.parametrize("seed", range(24))
def test_row_ranges_and_rings_match_reference(seed):
    """Row bands through rings of several depths, C and reference call by call."""
    p, x, w, bias = make_case(seed, "random" if seed % 2 else "3x3s1")
    p.n, x = 1, x[:1]
    rng = np.random.default_rng(700 + seed)
    full = dwconv(x, w, bias, p)
    span = (p.k_h - 1) * p.dil_h + 1
    p.x_ring = int(rng.integers(span + p.stride_h, span + p.stride_h + 3)) if seed % 3 else 0
    p.y_ring = int(rng.integers(1, p.out_h + 1)) if seed % 4 else 0
    x_buf = np.zeros((p.x_ring or p.in_h) * p.in_w * p.in_c, dtype=np.int8)
    y_c = np.zeros((p.y_ring or p.out_h) * p.out_w * p.out_c, dtype=out_dtype(p))
    y_ref = y_c.copy()
    row_bytes = p.in_w * p.in_c
    r = 0
    while r < p.out_h:
        r1 = min(p.out_h, r + int(rng.integers(1, 3)), r + (p.y_ring or 2))
        top = r * p.stride_h - p.pad_top
        bottom = (r1 - 1) * p.stride_h - p.pad_top + span
        if p.x_ring and bottom - max(top, 0) > p.x_ring:
            r1 = r + 1
            bottom = r * p.stride_h - p.pad_top + span
        for i in range(max(top, 0), min(bottom, p.in_h)) if p.x_ring else range(p.in_h):
            at = (i % p.x_ring if p.x_ring else i) * row_bytes
            x_buf[at:at + row_bytes] = x[0, i].reshape(-1)
        c_call(p, x_buf, y_c, r, r1)
        run_rows(lambda q, xx, ww, bb: dwconv(xx, ww, bb, q), p, x_buf, [w, bias], y_ref, r,
                 r1, p.in_c, p.out_c)
        np.testing.assert_array_equal(y_c, y_ref)
        for i in range(r, r1):
            at = (i % p.y_ring if p.y_ring else i) * p.out_w * p.out_c
            np.testing.assert_array_equal(y_c[at:at + p.out_w * p.out_c],
                                          full[0, i].reshape(-1))
        r = r1


@pytest.mark.parametrize("seed", range(8))
def test_reference_matches_onnx_reference_convinteger(seed):
    from onnx import TensorProto, helper, numpy_helper
    from onnx.reference import ReferenceEvaluator

    rng = np.random.default_rng(4000 + seed)
    c, k, stride, dil = int(rng.integers(1, 7)), int(rng.integers(1, 5)), 1 + seed % 3, \
        1 + seed % 2
    size = int(rng.integers(dil * (k - 1) + 1, 12))
    pad = int(rng.integers(0, k))
    x = rng.integers(0, 256, size=(1, c, size, size)).astype(np.uint8)
    w = rng.integers(-128, 128, size=(c, 1, k, k)).astype(np.int8)
    x_zp = np.uint8(rng.integers(0, 256))
    w_zp = rng.integers(-128, 128, size=c).astype(np.int8)
    node = helper.make_node("ConvInteger", ["x", "w", "x_zp", "w_zp"], ["y"], group=c,
                            kernel_shape=[k, k], strides=[stride, stride],
                            dilations=[dil, dil], pads=[pad] * 4)
    graph = helper.make_graph(
        [node], "fan_blade_dwconv",
        [helper.make_tensor_value_info("x", TensorProto.UINT8, x.shape)],
        [helper.make_tensor_value_info("y", TensorProto.INT32, None)],
        initializer=[numpy_helper.from_array(w, "w"),
                     numpy_helper.from_array(np.array(x_zp), "x_zp"),
                     numpy_helper.from_array(w_zp, "w_zp")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    # Source: onnx.reference (the ONNX reference evaluator), ConvInteger with group = C.
    (onnx_y,) = ReferenceEvaluator(model).run(None, {"x": x})
    x8, in_zp = to_int8_domain(x, x_zp)
    out = conv_output_size(size, k, stride, dil, pad, pad)
    p = DwConvParams(n=1, in_h=size, in_w=size, in_c=c, out_h=out, out_w=out, out_c=c,
                     k_h=k, k_w=k, stride_h=stride, stride_w=stride, dil_h=dil, dil_w=dil,
                     pad_top=pad, pad_left=pad, in_zp=int(in_zp), w_zp=w_zp.astype(np.int32))
    x_cl = np.moveaxis(x8, 1, -1)
    w_cl = np.moveaxis(w, 1, -1)
    bias = np.zeros(c, dtype=np.int32)
    with_pack(p, w_cl, bias)
    want = np.moveaxis(onnx_y, 1, -1)
    np.testing.assert_array_equal(dwconv(x_cl, w_cl, bias, p), want)
    np.testing.assert_array_equal(run_c(p, x_cl), want)


def target_cases():
    cases = [make_case(seed) for seed in range(0, 24)]
    cases += [make_case(seed, "3x3s1") for seed in range(12)]
    cases += [make_case(seed, "3x3s2") for seed in range(12)]
    cases += [make_case(seed, shape, plain_fast=True) for seed in range(30, 42)
              for shape in ("3x3s1", "3x3s2")]
    assert sum(p.rq is not None and p.rq.form == FORM_FAST and p.rq.pre == 0
               for p, *_ in cases[-24:]) >= 20
    return cases


@pytest.mark.target
@pytest.mark.skipif(not cortex_m_tools_available(), reason="needs arm-none-eabi-gcc and QEMU")
@pytest.mark.parametrize("core", [CORTEX_M4, CORTEX_M3], ids=["cortex-m4-dsp", "cortex-m3"])
def test_dwconv_on_cortex_m_matches_reference(core, tmp_path):
    defs, calls, expected = [], [], {}
    for i, (p, x, w, bias) in enumerate(target_cases()):
        if p.rq is not None and p.rq.is_float and core is CORTEX_M3:
            continue
        tag = f"d{i}"
        rq_def, rq_expr = c_requant(f"{tag}_rq", p.rq)
        fields = ", ".join(str(int(getattr(p, f))) for f in SCALARS)
        defs.append(c_array(f"{tag}_x", "int8_t", x) + c_array(f"{tag}_pack", "int32_t", p.pack)
                    + rq_def + f"static const tg_dwconv_params_t {tag}_p = {{{fields}, "
                    f"{tag}_pack, {rq_expr}, 0, 0}};\n")
        want = dwconv(x, w, bias, p)
        assert scratch_bytes(p) <= 8 * 1024 - 8 and want.nbytes <= 4 * 8192
        calls.append(f"tg_dwconv(&{tag}_p, {tag}_x, y, (int32_t *)scratch + 1, 0, "
                     f"{p.out_h}); tg_test_dump(\"{tag}\", y, {want.nbytes});")
        expected[tag] = want.tobytes()
    main_c = ('#include <stddef.h>\n#include "tg_dwconv.h"\n'
              "void tg_test_dump(const char *tag, const void *data, int32_t bytes);\n"
              + "".join(defs) + "int main(void)\n{\n    static int32_t y[8192];\n"
              "    static int64_t scratch[1024];\n    " + "\n    ".join(calls)
              + "\n    return 0;\n}\n")
    elf = build_cortex_m(["tg_dwconv.c"], main_c, core, tmp_path)
    # The M4 build must really take the two-taps-per-SMLAD path, the M3 build must not.
    dis = disassembly(elf)
    assert ("smlad" in dis and "smlatb" in dis) == (core is CORTEX_M4)
    dumps = run_qemu(elf, core)
    assert dumps.keys() == expected.keys()
    for tag, want in expected.items():
        assert dumps[tag] == want, tag
