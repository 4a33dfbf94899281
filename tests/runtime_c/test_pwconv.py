"""tg_pwconv (C, through cffi and on Cortex-M) against tinygen.reference.pwconv, bit for bit,
on whole tensors, row ranges, rings and overlapping placements; its overlap margin against
its access model; the reference against onnx.reference (ConvInteger)."""
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
)
from tinygen.reference.mat import PRESCALED
from tinygen.reference.pwconv import (
    PwConvParams,
    access_steps,
    overlap_margin,
    pwconv,
    scratch_bytes,
    with_pack,
)
from tinygen.reference.requant import make_requant
from tinygen.reference.rows import run_rows

PWCONV_CDEF = """
typedef struct {
    int32_t n, in_h, in_w, in_c;
    int32_t out_h, out_w, out_c;
    int32_t stride_h, stride_w;
    int32_t in_zp;
    const int32_t *pack;
    const tg_requant_t *rq;
    int32_t x_ring, y_ring;
} tg_pwconv_params_t;
void tg_pwconv(const tg_pwconv_params_t *p, const int8_t *x, void *y, void *scratch,
               int32_t row0, int32_t row1);
"""
SCALARS = ("n", "in_h", "in_w", "in_c", "out_h", "out_w", "out_c", "stride_h", "stride_w",
           "in_zp")


def random_case(seed: int, narrow: bool = False):
    """A random layer; narrow: per-channel scales within 2^-12..2^-6, where the pack is
    prescaled (one final shift for all channels, tinygen.reference.mat)."""
    rng = np.random.default_rng(seed + (1000 if narrow else 0))
    mode = ("fixed", "float", "int32")[seed % 3]
    in_c = int(rng.choice([1, 3, 4, 5, 16, 17, 24, 33, 40, 70]))
    out_c = int(rng.integers(1, 21))
    sh, sw = (1, 1) if seed % 4 else (int(rng.integers(1, 3)), int(rng.integers(1, 4)))
    in_h, in_w = int(rng.integers(1, 7)), int(rng.integers(1, 9))
    out_h, out_w = (in_h - 1) // sh + 1, (in_w - 1) // sw + 1
    rq = None
    if mode != "int32":
        out_zp = pick_zero_point(rng)
        lo = out_zp if rng.random() < 0.3 else -128
        scales = (2.0 ** rng.uniform(-12, -6, size=out_c) if narrow
                  else 10.0 ** rng.uniform(-6, -0.5, size=out_c))
        rq = make_requant(scales, out_zp, lo, 127, mode)
    w_zp = None if seed % 2 else rng.integers(-128, 128, size=out_c).astype(np.int32)
    p = PwConvParams(n=1 + seed % 2, in_h=in_h, in_w=in_w, in_c=in_c, out_h=out_h,
                     out_w=out_w, out_c=out_c, stride_h=sh, stride_w=sw,
                     in_zp=pick_zero_point(rng), w_zp=w_zp, rq=rq)
    x = rng.integers(-128, 128, size=(p.n, in_h, in_w, in_c), dtype=np.int8)
    w = rng.integers(-128, 128, size=(out_c, in_c), dtype=np.int8)
    bias = rng.integers(-5000, 5001, size=out_c, dtype=np.int32)
    return with_pack(p, w, bias), x, w, bias


def c_call(p: PwConvParams, x_buf: np.ndarray, w, bias, y_buf: np.ndarray, row0: int,
           row1: int, y_offset: int | None = None):
    """tg_pwconv on x_buf -> y_buf (or, with y_offset, y written into x_buf's own bytes);
    the weights and bias the C reads are p's pack, built from w and bias."""
    ffi, lib = kernel_lib(["tg_pwconv.c"], REQUANT_CDEF + PWCONV_CDEF)
    m = Marshal(ffi)
    with_pack(p, w, bias)
    params = m.struct("tg_pwconv_params_t", **{f: int(getattr(p, f)) for f in SCALARS},
                      pack=m.array(p.pack, np.int32, "int32_t"), rq=m.requant(p.rq),
                      x_ring=p.x_ring, y_ring=p.y_ring)
    scratch_ptr = m.scratch(scratch_bytes(p))
    x_ptr = ffi.cast("int8_t *", ffi.from_buffer(x_buf))
    y_ptr = (ffi.cast("void *", ffi.from_buffer(y_buf)) if y_offset is None
             else ffi.cast("void *", x_ptr + y_offset))
    lib.tg_pwconv(params, x_ptr, y_ptr, scratch_ptr, row0, row1)


def out_dtype(p):
    return np.int8 if p.rq is not None else np.int32


@pytest.mark.parametrize("seed", range(36))
def test_c_pwconv_matches_reference(seed):
    p, x, w, bias = random_case(seed)
    y = np.zeros((p.n, p.out_h, p.out_w, p.out_c), dtype=out_dtype(p))
    c_call(p, np.ascontiguousarray(x), w, bias, y, 0, p.out_h)
    np.testing.assert_array_equal(y, pwconv(x, w, bias, p))


@pytest.mark.parametrize("seed", range(24))
def test_row_ranges_and_rings_match_reference(seed):
    """Row bands through rings of several depths, C and reference call by call."""
    p, x, w, bias = random_case(seed)
    p.n, x = 1, x[:1]
    rng = np.random.default_rng(900 + seed)
    full = pwconv(x, w, bias, p)
    p.x_ring = int(rng.integers(p.stride_h, p.in_h + 1)) if seed % 3 else 0
    p.y_ring = int(rng.integers(1, p.out_h + 1)) if seed % 2 else 0
    x_rows = p.x_ring or p.in_h
    x_buf = np.zeros(x_rows * p.in_w * p.in_c, dtype=np.int8)
    y_rows = p.y_ring or p.out_h
    y_c = np.zeros(y_rows * p.out_w * p.out_c, dtype=out_dtype(p))
    y_ref = y_c.copy()
    r = 0
    while r < p.out_h:
        fits = 1 + (p.x_ring - 1) // p.stride_h if p.x_ring else 2  # band rows the ring holds
        band = min(2, fits, p.y_ring or 2)  # and the rows the output ring holds
        r1 = min(p.out_h, r + int(rng.integers(1, band + 1)))
        for i in [q * p.stride_h for q in range(r, r1)] if p.x_ring else range(p.in_h):
            at = (i % p.x_ring if p.x_ring else i) * p.in_w * p.in_c
            x_buf[at:at + p.in_w * p.in_c] = x[0, i].reshape(-1)
        c_call(p, x_buf, w, bias, y_c, r, r1)
        run_rows(lambda q, xx, ww, bb: pwconv(xx, ww, bb, q), p, x_buf, [w, bias], y_ref, r,
                 r1, p.in_c, p.out_c)
        np.testing.assert_array_equal(y_c, y_ref)
        for i in range(r, r1):  # what the ring holds now is the full result's rows
            at = (i % p.y_ring if p.y_ring else i) * p.out_w * p.out_c
            np.testing.assert_array_equal(y_c[at:at + p.out_w * p.out_c],
                                          full[0, i].reshape(-1))
        r = r1


def brute_margin(last_read: np.ndarray, written: np.ndarray) -> int:
    """Largest d with every placement y_start = x_start + d' (d' <= d) free of a write that
    lands on an input byte still to be read (capped at len(x): past it, disjoint)."""
    nx, ny = last_read.size, written.size
    for d in range(-ny, nx + 1):
        j = np.arange(ny)
        i = j + d
        hit = (i >= 0) & (i < nx)
        if np.any(last_read[i[hit]] > written[j[hit]]):
            return d - 1
    return nx


@pytest.mark.parametrize("seed", range(20))
def test_overlap_margin_agrees_with_access_steps(seed):
    p, _, _, _ = random_case(seed)
    last_read, written = access_steps(p)
    assert overlap_margin(p) == brute_margin(last_read, written)


@pytest.mark.parametrize("shape", [(1, 8, 16, 16), (1, 7, 16, 24), (2, 5, 33, 8),
                                   (1, 9, 4, 40), (1, 1, 24, 24), (1, 3, 1, 1)])
@pytest.mark.parametrize("mode", ["fixed", "int32"])
def test_output_over_its_input_at_the_margin(shape, mode):
    """y placed at x_start + margin inside x's own buffer: still bit-exact (extreme shapes:
    expansion, projection, odd pixel counts, one pixel)."""
    n, pixels, in_c, out_c = shape
    rng = np.random.default_rng(sum(shape))
    rq = None if mode == "int32" else make_requant(
        10.0 ** rng.uniform(-4, -1, size=out_c), -5, -128, 127, "fixed")
    p = PwConvParams(n=n, in_h=1, in_w=pixels, in_c=in_c, out_h=1, out_w=pixels,
                     out_c=out_c, in_zp=3, rq=rq)
    x = rng.integers(-128, 128, size=(n, 1, pixels, in_c), dtype=np.int8)
    w = rng.integers(-128, 128, size=(out_c, in_c), dtype=np.int8)
    bias = rng.integers(-900, 900, size=out_c, dtype=np.int32)
    want = pwconv(x, w, bias, p)
    d = overlap_margin(p)
    y_bytes = want.nbytes
    lead = max(0, -d)
    buf = np.zeros(lead + max(x.nbytes, d + y_bytes) + 8, dtype=np.int8)
    buf[lead:lead + x.nbytes] = x.reshape(-1)
    view = buf[lead:]
    c_call(p, view, w, bias, None, 0, 1, y_offset=d)
    got = buf[lead + d:lead + d + y_bytes].view(out_dtype(p)).reshape(want.shape)
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("seed", range(8))
def test_reference_matches_onnx_reference_convinteger(seed):
    from onnx import TensorProto, helper, numpy_helper
    from onnx.reference import ReferenceEvaluator

    rng = np.random.default_rng(70 + seed)
    n, h, wd, in_c, out_c = 1 + seed % 2, int(rng.integers(1, 5)), int(rng.integers(1, 6)), \
        int(rng.integers(1, 20)), int(rng.integers(1, 10))
    stride = 1 + seed % 2
    x = rng.integers(0, 256, size=(n, in_c, h, wd)).astype(np.uint8)
    w = rng.integers(-128, 128, size=(out_c, in_c, 1, 1)).astype(np.int8)
    x_zp, w_zp = np.uint8(rng.integers(0, 256)), rng.integers(-128, 128, size=out_c).astype(
        np.int8)
    node = helper.make_node("ConvInteger", ["x", "w", "x_zp", "w_zp"], ["y"],
                            kernel_shape=[1, 1], strides=[stride, stride])
    graph = helper.make_graph(
        [node], "pump_mixer_1x1",
        [helper.make_tensor_value_info("x", TensorProto.UINT8, x.shape)],
        [helper.make_tensor_value_info("y", TensorProto.INT32, None)],
        initializer=[numpy_helper.from_array(w, "w"),
                     numpy_helper.from_array(np.array(x_zp), "x_zp"),
                     numpy_helper.from_array(w_zp, "w_zp")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    # Source: onnx.reference (the ONNX reference evaluator), ConvInteger, NCHW int32 out.
    (onnx_y,) = ReferenceEvaluator(model).run(None, {"x": x})
    out_h, out_w = (h - 1) // stride + 1, (wd - 1) // stride + 1
    p = PwConvParams(n=n, in_h=h, in_w=wd, in_c=in_c, out_h=out_h, out_w=out_w, out_c=out_c,
                     stride_h=stride, stride_w=stride, in_zp=int(x_zp) - 128,
                     w_zp=w_zp.astype(np.int32))
    xs = (np.moveaxis(x, 1, -1).astype(np.int16) - 128).astype(np.int8)
    ours = pwconv(xs, w.reshape(out_c, in_c), np.zeros(out_c, np.int32), p)
    np.testing.assert_array_equal(ours, np.moveaxis(onnx_y, 1, -1))


def is_prescaled(p: PwConvParams) -> bool:
    return bool(np.asarray(p.pack)[4 + 4 * ((p.in_c + 3) // 4) + 2] & PRESCALED)


@pytest.mark.parametrize("seed", range(24))
def test_prescaled_pack_matches_reference(seed):
    p, x, w, bias = random_case(seed, narrow=True)
    y = np.zeros((p.n, p.out_h, p.out_w, p.out_c), dtype=out_dtype(p))
    c_call(p, np.ascontiguousarray(x), w, bias, y, 0, p.out_h)
    np.testing.assert_array_equal(y, pwconv(x, w, bias, p))
    if p.rq is not None and not p.rq.is_float:
        assert is_prescaled(p)  # the bound fits: |bias| + 255*sum|w'| << 7 < 2^31 here


def test_wide_scale_spread_is_not_prescaled():
    # shifts 8 apart cannot share one final shift with prescales in [0, 7]
    rq = make_requant(np.array([2.0 ** -7, 2.0 ** -15]), 0, -128, 127, "fixed")
    p = PwConvParams(n=1, in_h=1, in_w=2, in_c=4, out_h=1, out_w=2, out_c=2, stride_h=1,
                     stride_w=1, in_zp=0, rq=rq)
    with_pack(p, np.ones((2, 4), np.int8), np.zeros(2, np.int32))
    assert not is_prescaled(p)


@pytest.mark.target
@pytest.mark.skipif(not cortex_m_tools_available(), reason="needs arm-none-eabi-gcc and QEMU")
@pytest.mark.parametrize("core", [CORTEX_M4, CORTEX_M3], ids=["cortex-m4-dsp", "cortex-m3"])
def test_pwconv_on_cortex_m_matches_reference(core, tmp_path):
    defs, calls, expected = [], [], {}
    cases = [random_case(i) for i in range(24)] + [random_case(i, True) for i in range(12)]
    for i, (p, x, w, bias) in enumerate(cases):
        if p.rq is not None and p.rq.is_float and core is CORTEX_M3:
            continue
        tag = f"p{i}"
        rq_def, rq_expr = c_requant(f"{tag}_rq", p.rq)
        fields = ", ".join(str(int(getattr(p, f))) for f in SCALARS)
        defs.append(c_array(f"{tag}_x", "int8_t", x) + c_array(f"{tag}_pack", "int32_t", p.pack)
                    + rq_def
                    + f"static const tg_pwconv_params_t {tag}_p = {{{fields}, {tag}_pack, "
                      f"{rq_expr}, 0, 0}};\n")
        want = pwconv(x, w, bias, p)
        calls.append(f"tg_pwconv(&{tag}_p, {tag}_x, y, (int32_t *)scratch + 1, 0, "
                     f"{p.out_h}); tg_test_dump(\"{tag}\", y, {want.nbytes});")
        expected[tag] = want.tobytes()
    main_c = ('#include <stddef.h>\n#include "tg_pwconv.h"\n'
              "void tg_test_dump(const char *tag, const void *data, int32_t bytes);\n"
              + "".join(defs) + "int main(void)\n{\n    static int32_t y[4096];\n"
              "    static int64_t scratch[64];\n    " + "\n    ".join(calls)
              + "\n    return 0;\n}\n")
    elf = build_cortex_m(["tg_pwconv.c"], main_c, core, tmp_path)
    # The M4 build must really run the assembly routines (in_c 33+ takes the long one).
    dis = disassembly(elf)
    assert ("smlad" in dis) == (core is CORTEX_M4)
    assert ("<tg_mat_dsp_long>:" in dis) == (core is CORTEX_M4)
    assert ("<tg_mat_dsp_long_r>:" in dis) == (core is CORTEX_M4)
    dumps = run_qemu(elf, core)
    assert dumps.keys() == expected.keys()
    for tag, want in expected.items():
        assert dumps[tag] == want, tag
