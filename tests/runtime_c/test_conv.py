"""tg_conv (C, through cffi) against tinygen.reference.conv, bit for bit, and the
reference itself against onnx.reference (ConvInteger) and onnxruntime (QLinearConv)."""
from __future__ import annotations

from dataclasses import replace

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
from tinygen.reference.conv import (
    ConvParams,
    auto_pads,
    conv,
    conv_accumulators,
    conv_output_size,
    conv_scratch_bytes,
    with_conv_pack,
)
from tinygen.reference.requant import make_requant, mul_shift

# tg_conv.h, field for field.
CONV_CDEF = """
typedef struct {
    int32_t n, in_h, in_w, in_c;
    int32_t out_h, out_w, out_c;
    int32_t k_h, k_w;
    int32_t stride_h, stride_w;
    int32_t dil_h, dil_w;
    int32_t pad_top, pad_left;
    int32_t groups;
    int32_t in_zp;
    const int32_t *w_zp;
    const tg_requant_t *rq;
    int32_t x_ring, y_ring;
    const int32_t *pack;
} tg_conv_params_t;
void tg_conv(const tg_conv_params_t *p, const int8_t *x, void *y, void *scratch,
             int32_t row0, int32_t row1);
"""

SCALAR_FIELDS = ("n", "in_h", "in_w", "in_c", "out_h", "out_w", "out_c", "k_h", "k_w",
                 "stride_h", "stride_w", "dil_h", "dil_w", "pad_top", "pad_left", "groups",
                 "in_zp")
GROUP_KINDS = ("dense", "two_groups", "depthwise", "depthwise_x2")
RQ_MODES = ("fixed", "float", "int32")


def run_c_conv(kernel: str, x, w, bias, p: ConvParams) -> np.ndarray:
    """Run tg_conv on numpy arrays; int8 output with p.rq, else int32."""
    ffi, lib = kernel_lib(["tg_conv.c"], REQUANT_CDEF + CONV_CDEF)
    m = Marshal(ffi)
    with_conv_pack(p, w, bias)  # what tg_conv reads
    params = m.struct("tg_conv_params_t", **{f: int(getattr(p, f)) for f in SCALAR_FIELDS},
                      w_zp=m.optional_array(p.w_zp, np.int32, "int32_t"), rq=m.requant(p.rq),
                      pack=m.array(p.pack, np.int32, "int32_t"))
    y, y_ptr = m.output((p.n, p.out_h, p.out_w, p.out_c),
                        np.int32 if p.rq is None else np.int8)
    # the row-range call (DEVELOPERS.md, "Kernel calls")
    getattr(lib, kernel)(params, m.array(x, np.int8, "int8_t"), y_ptr,
                         m.scratch(conv_scratch_bytes(p)), 0, p.out_h)
    return y


def channel_counts(rng, group_kind: str) -> tuple[int, int, int]:
    """(in_c, out_c, groups) for one of GROUP_KINDS."""
    if group_kind == "dense":
        return int(rng.integers(1, 7)), int(rng.integers(1, 7)), 1
    if group_kind == "two_groups":
        return 2 * int(rng.integers(1, 4)), 2 * int(rng.integers(1, 4)), 2
    in_c = int(rng.integers(1, 6))
    return in_c, in_c * (2 if group_kind == "depthwise_x2" else 1), in_c


def spatial_axis(rng, active: bool) -> dict[str, int]:
    """Random in/k/stride/dil/asymmetric pads of one axis; a 1-D conv's h axis is all ones."""
    if not active:
        return dict(size=1, k=1, stride=1, dil=1, begin=0, end=0, out=1)
    k, stride, dil = (int(v) for v in rng.integers(1, 4, size=3))
    begin, end = (int(v) for v in rng.integers(0, 3, size=2))
    span = dil * (k - 1) + 1
    size = max(int(rng.integers(1, 10)), span - begin - end)
    out = conv_output_size(size, k, stride, dil, begin, end)
    return dict(size=size, k=k, stride=stride, dil=dil, begin=begin, end=end, out=out)


def random_requant(rng, out_c: int, mode: str):
    """Per-channel requant with scales log-uniform in [1e-6, 1]; None for raw int32."""
    if mode == "int32":
        return None
    scales = 10.0 ** rng.uniform(-6, 0, size=out_c)
    out_zp = pick_zero_point(rng)
    act_min, act_max = -128, 127
    if rng.random() < 0.25:  # a fused ReLU clamps at the zero point
        act_min = out_zp
    return make_requant(scales, out_zp, act_min, act_max, mode)


def random_case(seed: int):
    """One conv case; the seed also cycles the features so every combination is covered."""
    rng = np.random.default_rng(seed)
    group_kind = GROUP_KINDS[seed % len(GROUP_KINDS)]
    mode = RQ_MODES[(seed // len(GROUP_KINDS)) % len(RQ_MODES)]
    two_d = seed % 5 != 0
    in_c, out_c, groups = channel_counts(rng, group_kind)
    h, w_ax = spatial_axis(rng, two_d), spatial_axis(rng, True)
    w_zp = None
    if seed % 3 != 0:
        w_zp = np.array([pick_zero_point(rng) for _ in range(out_c)], dtype=np.int32)
    p = ConvParams(n=1 + seed % 2, in_h=h["size"], in_w=w_ax["size"], in_c=in_c,
                   out_h=h["out"], out_w=w_ax["out"], out_c=out_c, k_h=h["k"], k_w=w_ax["k"],
                   stride_h=h["stride"], stride_w=w_ax["stride"], dil_h=h["dil"],
                   dil_w=w_ax["dil"], pad_top=h["begin"], pad_left=w_ax["begin"],
                   groups=groups, in_zp=pick_zero_point(rng), w_zp=w_zp,
                   rq=random_requant(rng, out_c, mode))
    x = rng.integers(-128, 128, size=(p.n, p.in_h, p.in_w, p.in_c), dtype=np.int8)
    w = rng.integers(-128, 128, size=(out_c, p.k_h, p.k_w, in_c // groups), dtype=np.int8)
    bias = rng.integers(-3000, 3001, size=out_c, dtype=np.int32)
    return p, x, w, bias


CASE_SEEDS = range(48)


@pytest.mark.parametrize("seed", CASE_SEEDS)
def test_c_conv_matches_reference(seed):
    p, x, w, bias = random_case(seed)
    expected = conv(x, w, bias, p)
    np.testing.assert_array_equal(run_c_conv("tg_conv", x, w, bias, p), expected)


def test_cases_cover_saturation_and_features():
    """The random cases really reach both clamp ends, every group kind and every mode."""
    below = above = 0
    seen = set()
    for seed in CASE_SEEDS:
        p, x, w, bias = random_case(seed)
        seen.add((p.groups == 1, p.groups == p.in_c, p.rq is None, p.w_zp is None, p.n))
        if p.rq is None or p.rq.is_float:
            continue
        acc = conv_accumulators(x, w, bias, p)
        unclamped = p.rq.out_zp + mul_shift(acc, p.rq.mult, p.rq.shift)
        below += int((unclamped < p.rq.act_min).sum())
        above += int((unclamped > p.rq.act_max).sum())
    assert below > 0 and above > 0
    assert len(seen) >= 12


def test_positions_reading_only_padding_give_the_bias():
    """Output positions whose window lies wholly in the padding read in_zp only."""
    rng = np.random.default_rng(7)
    p = ConvParams(n=1, in_h=2, in_w=2, in_c=3, out_h=6, out_w=6, out_c=2, k_h=1, k_w=1,
                   pad_top=2, pad_left=2, in_zp=-128)
    x = rng.integers(-128, 128, size=(1, 2, 2, 3), dtype=np.int8)
    w = rng.integers(-128, 128, size=(2, 1, 1, 3), dtype=np.int8)
    bias = np.array([11, -7], dtype=np.int32)
    y = run_c_conv("tg_conv", x, w, bias, p)
    np.testing.assert_array_equal(y, conv(x, w, bias, p))
    assert (y[0, 0, :, :] == bias).all() and (y[0, :, 5, :] == bias).all()
    assert not (y[0, 2:4, 2:4, :] == bias).all()


def test_large_channel_runs_with_dsp_tails():
    """Contiguous rows longer than four taps, lengths not a multiple of four."""
    for seed, in_c in enumerate((5, 13, 31)):
        rng = np.random.default_rng(100 + seed)
        p = ConvParams(n=1, in_h=4, in_w=5, in_c=in_c, out_h=4, out_w=5, out_c=3, k_h=3,
                       k_w=3, pad_top=1, pad_left=1, in_zp=int(rng.integers(-128, 128)),
                       w_zp=rng.integers(-128, 128, size=3).astype(np.int32))
        x = rng.integers(-128, 128, size=(1, 4, 5, in_c), dtype=np.int8)
        w = rng.integers(-128, 128, size=(3, 3, 3, in_c), dtype=np.int8)
        bias = rng.integers(-1000, 1000, size=3, dtype=np.int32)
        for params in (p, replace(p, w_zp=None)):
            np.testing.assert_array_equal(run_c_conv("tg_conv", x, w, bias, params),
                                          conv(x, w, bias, params))


# --- auto_pad and output size: the ONNX Conv spec --------------------------------------


def test_auto_pads_follow_the_onnx_conv_spec():
    # ONNX Conv spec (auto_pad): SAME_* gives output ceil(in / stride); an odd total padding
    # puts the extra pixel at the end for SAME_UPPER and at the beginning for SAME_LOWER.
    assert auto_pads(5, 2, 1, 1, "SAME_UPPER") == (0, 1)
    assert auto_pads(5, 2, 1, 1, "SAME_LOWER") == (1, 0)
    assert auto_pads(7, 3, 2, 2, "VALID") == (0, 0)
    for size in range(1, 9):
        for k, stride, dil in [(1, 1, 1), (3, 1, 1), (3, 2, 1), (2, 3, 2), (3, 2, 3)]:
            for mode in ("SAME_UPPER", "SAME_LOWER"):
                begin, end = auto_pads(size, k, stride, dil, mode)
                assert conv_output_size(size, k, stride, dil, begin, end) == -(-size // stride)
    with pytest.raises(ValueError):
        auto_pads(5, 3, 1, 1, "NOTSET")


# --- the reference against onnx.reference ConvInteger -------------------------------------


def nchw_to_channels_last(a: np.ndarray, spatial: int) -> np.ndarray:
    """NCHW / NCL -> [n][h][w][c] with h = 1 for 1-D."""
    a = np.moveaxis(a, 1, -1)
    return a[:, None] if spatial == 1 else a


def onnx_case(seed: int):
    """Random NCHW ConvInteger inputs and attributes (uint8 or int8, per-channel w_zp)."""
    rng = np.random.default_rng(5000 + seed)
    spatial = 1 + seed % 2
    in_c, out_c, groups = channel_counts(rng, GROUP_KINDS[seed % len(GROUP_KINDS)])
    axes = [spatial_axis(rng, True) for _ in range(spatial)]
    modes = ("NOTSET", "SAME_UPPER", "SAME_LOWER", "VALID")
    auto_pad = modes[(seed // 2) % len(modes)]
    if auto_pad == "VALID":  # no padding: the input must hold one whole dilated kernel
        for a in axes:
            a["size"] = max(a["size"], a["dil"] * (a["k"] - 1) + 1)
    x_type = np.uint8 if seed % 3 else np.int8
    w_type = np.int8 if seed % 4 else np.uint8
    lo_x, lo_w = np.iinfo(x_type).min, np.iinfo(w_type).min
    x = rng.integers(lo_x, lo_x + 256, size=(1 + seed % 2, in_c, *[a["size"] for a in axes]))
    w = rng.integers(lo_w, lo_w + 256, size=(out_c, in_c // groups, *[a["k"] for a in axes]))
    x_zp = rng.integers(lo_x, lo_x + 256, dtype=x_type)
    # onnx.reference's ConvInteger only broadcasts a per-channel w_zp over 4-D weights, so
    # the 1-D cases use a per-tensor one.
    w_zp = rng.integers(lo_w, lo_w + 256, size=out_c if spatial == 2 else ()).astype(w_type)
    return dict(x=x.astype(x_type), w=w.astype(w_type), x_zp=x_zp, w_zp=w_zp, axes=axes,
                groups=groups, auto_pad=auto_pad, spatial=spatial)


def conv_node_attributes(case) -> dict:
    axes = case["axes"]
    attrs = dict(group=case["groups"], strides=[a["stride"] for a in axes],
                 dilations=[a["dil"] for a in axes], kernel_shape=[a["k"] for a in axes])
    if case["auto_pad"] == "NOTSET":
        attrs["pads"] = [a["begin"] for a in axes] + [a["end"] for a in axes]
    else:
        attrs["auto_pad"] = case["auto_pad"]
    return attrs


def axis_pads(case, a: dict) -> tuple[int, int]:
    if case["auto_pad"] == "NOTSET":
        return a["begin"], a["end"]
    return auto_pads(a["size"], a["k"], a["stride"], a["dil"], case["auto_pad"])


def params_for_onnx_case(case, in_zp: int, w_zp) -> ConvParams:
    """ConvParams for an NCHW case, pads from auto_pads() when the node uses auto_pad."""
    flat = dict(size=1, k=1, stride=1, dil=1)
    axes = [(flat, (0, 0))] * (2 - case["spatial"])
    axes += [(a, axis_pads(case, a)) for a in case["axes"]]
    (h, (top, bottom)), (w, (left, right)) = axes
    x_shape = case["x"].shape
    return ConvParams(n=x_shape[0], in_h=h["size"], in_w=w["size"], in_c=x_shape[1],
                      out_h=conv_output_size(h["size"], h["k"], h["stride"], h["dil"], top,
                                             bottom),
                      out_w=conv_output_size(w["size"], w["k"], w["stride"], w["dil"], left,
                                             right),
                      out_c=case["w"].shape[0], k_h=h["k"], k_w=w["k"], stride_h=h["stride"],
                      stride_w=w["stride"], dil_h=h["dil"], dil_w=w["dil"], pad_top=top,
                      pad_left=left, groups=case["groups"], in_zp=int(in_zp), w_zp=w_zp)


@pytest.mark.parametrize("seed", range(24))
def test_reference_accumulators_match_onnx_reference_convinteger(seed):
    from onnx import TensorProto, helper, numpy_helper
    from onnx.reference import ReferenceEvaluator

    case = onnx_case(seed)
    node = helper.make_node("ConvInteger", ["x", "w", "x_zp", "w_zp"], ["y"],
                            **conv_node_attributes(case))
    elem = {np.dtype(np.uint8): TensorProto.UINT8, np.dtype(np.int8): TensorProto.INT8}
    graph = helper.make_graph(
        [node], "door_sensor_conv",
        [helper.make_tensor_value_info("x", elem[case["x"].dtype], case["x"].shape)],
        [helper.make_tensor_value_info("y", TensorProto.INT32, None)],
        initializer=[numpy_helper.from_array(case["w"], "w"),
                     numpy_helper.from_array(np.array(case["x_zp"]), "x_zp"),
                     numpy_helper.from_array(case["w_zp"], "w_zp")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    # Source: onnx.reference (the ONNX reference evaluator), ConvInteger, NCHW int32 out.
    (onnx_y,) = ReferenceEvaluator(model).run(None, {"x": case["x"]})

    x8, in_zp = to_int8_domain(case["x"], case["x_zp"])
    w8, w_zp = to_int8_domain(case["w"], case["w_zp"])
    p = params_for_onnx_case(case, in_zp, np.broadcast_to(w_zp, case["w"].shape[:1]))
    x_cl = nchw_to_channels_last(x8, case["spatial"])
    w_cl = nchw_to_channels_last(w8, case["spatial"])
    ours = conv(x_cl, w_cl, np.zeros(p.out_c, dtype=np.int32), p)
    assert ours.size and ours.shape == nchw_to_channels_last(onnx_y, case["spatial"]).shape
    np.testing.assert_array_equal(ours, nchw_to_channels_last(onnx_y, case["spatial"]))
    np.testing.assert_array_equal(run_c_conv("tg_conv", x_cl, w_cl,
                                             np.zeros(p.out_c, dtype=np.int32), p), ours)


# --- float requant against onnxruntime QLinearConv ----------------------------------------


def qlinear_case(seed: int):
    """QLinearConv inputs: uint8 or int8 x/y, int8 per-channel symmetric weights."""
    case = onnx_case(seed)
    rng = np.random.default_rng(9000 + seed)
    if case["auto_pad"].startswith("SAME") and any(a["dil"] > 1 for a in case["axes"]):
        # onnxruntime refuses SAME_* with dilation: spell those pads out.
        for a in case["axes"]:
            a["begin"], a["end"] = axis_pads(case, a)
        case["auto_pad"] = "NOTSET"
    out_c = case["w"].shape[0]
    case["w"] = rng.integers(-128, 128, size=case["w"].shape).astype(np.int8)
    case["w_zp"] = np.zeros(out_c, dtype=np.int8)
    case["x_scale"] = np.float32(10.0 ** rng.uniform(-3, 0))
    case["w_scale"] = (10.0 ** rng.uniform(-3, -1, size=out_c)).astype(np.float32)
    case["bias"] = rng.integers(-2000, 2001, size=out_c).astype(np.int32)
    ties = seed % 4 == 3
    if ties:  # small values and power-of-two scales make many exact halves
        info = np.iinfo(case["x"].dtype)
        near_zp = int(case["x_zp"]) + rng.integers(-4, 5, size=case["x"].shape)
        case["x"] = near_zp.clip(info.min, info.max).astype(case["x"].dtype)
        case["w"] = rng.integers(-4, 5, size=case["w"].shape).astype(np.int8)
        case["bias"] = rng.integers(-20, 21, size=out_c).astype(np.int32)
    # Aim y_scale at the typical accumulator size, so outputs spread over the range and
    # some saturate: |acc| ~ sqrt(depth * E[(x - x_zp)^2] * E[w^2]).
    x_centered = case["x"].astype(np.float64) - float(case["x_zp"])
    typical = np.sqrt(case["w"][0].size * np.mean(x_centered ** 2)
                      * np.mean(case["w"].astype(np.float64) ** 2))
    if ties:  # scale 2^-k: one accumulator in 2^k lands on a half
        case["x_scale"] = np.float32(2.0 ** -4)
        case["w_scale"] = np.full(out_c, 2.0 ** -5, dtype=np.float32)
        case["y_scale"] = np.float32(2.0 ** (-9 + max(1, round(np.log2(typical / 20)))))
    else:
        real_typical = float(case["x_scale"] * case["w_scale"].max()) * typical
        case["y_scale"] = np.float32(real_typical / float(rng.uniform(30, 90)))
    case["y_zp"] = rng.integers(-128, 128, dtype=np.int8) if case["x"].dtype == np.int8 \
        else rng.integers(0, 256, dtype=np.uint8)
    return case


def onnxruntime_qlinearconv(case) -> np.ndarray:
    import onnxruntime as ort
    from onnx import TensorProto, helper, numpy_helper

    names = ["x", "x_scale", "x_zp", "w", "w_scale", "w_zp", "y_scale", "y_zp", "bias"]
    node = helper.make_node("QLinearConv", names, ["y"], **conv_node_attributes(case))
    elem = {np.dtype(np.uint8): TensorProto.UINT8, np.dtype(np.int8): TensorProto.INT8}
    consts = [numpy_helper.from_array(np.asarray(case[n]), n) for n in names[1:]]
    graph = helper.make_graph(
        [node], "pump_vibration_qconv",
        [helper.make_tensor_value_info("x", elem[case["x"].dtype], case["x"].shape)],
        [helper.make_tensor_value_info("y", elem[case["x"].dtype], None)], initializer=consts)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    session = ort.InferenceSession(model.SerializeToString(),
                                   providers=["CPUExecutionProvider"])
    return session.run(None, {"x": case["x"]})[0]


QLINEAR_SEEDS = range(24)


def float_requant_for(case, out_zp: int):
    # Float requant scale in the order of the numerics contract (and onnxruntime's CPU
    # QLinearConv): float32(float32(s_x * s_w[c]) / s_y).
    scales = (case["x_scale"] * case["w_scale"]).astype(np.float32) / case["y_scale"]
    return make_requant(scales, out_zp, -128, 127, "float",
                        float_scales=scales.astype(np.float32))


def qlinear_outputs(seed: int):
    """(ours via the reference, onnxruntime's, C) int8-domain channels-last outputs."""
    case = qlinear_case(seed)
    x8, in_zp = to_int8_domain(case["x"], case["x_zp"])
    _, y_zp = to_int8_domain(np.zeros(1, dtype=case["x"].dtype), case["y_zp"])
    p = params_for_onnx_case(case, in_zp, None)
    p.rq = float_requant_for(case, int(y_zp))
    x_cl = nchw_to_channels_last(x8, case["spatial"])
    w_cl = nchw_to_channels_last(case["w"], case["spatial"])
    ours = conv(x_cl, w_cl, case["bias"], p)
    # Source: onnxruntime InferenceSession, one-node QLinearConv model.
    theirs, _ = to_int8_domain(onnxruntime_qlinearconv(case), 0)
    c_out = run_c_conv("tg_conv", x_cl, w_cl, case["bias"], p)
    return ours, nchw_to_channels_last(theirs, case["spatial"]), c_out


@pytest.mark.onnxruntime_exact
def test_float_requant_matches_onnxruntime_qlinearconv():
    matched = total = 0
    for seed in QLINEAR_SEEDS:
        ours, theirs, c_out = qlinear_outputs(seed)
        np.testing.assert_array_equal(c_out, ours)
        assert ours.shape == theirs.shape
        matched += int((ours == theirs).sum())
        total += ours.size
    assert matched == total, f"{matched}/{total} outputs match onnxruntime QLinearConv"


# --- the same kernels on Cortex-M under QEMU (M4: DSP path, M3: portable path) --------------


def dsp_tail_case(seed: int, in_c: int):
    """3x3 conv with long contiguous channel runs, lengths not a multiple of four."""
    rng = np.random.default_rng(100 + seed)
    p = ConvParams(n=1, in_h=4, in_w=5, in_c=in_c, out_h=4, out_w=5, out_c=3, k_h=3, k_w=3,
                   pad_top=1, pad_left=1, in_zp=int(rng.integers(-128, 128)),
                   w_zp=rng.integers(-128, 128, size=3).astype(np.int32))
    x = rng.integers(-128, 128, size=(1, 4, 5, in_c), dtype=np.int8)
    w = rng.integers(-128, 128, size=(3, 3, 3, in_c), dtype=np.int8)
    bias = rng.integers(-1000, 1000, size=3, dtype=np.int32)
    return p, x, w, bias


def conv_case_c(tag: str, p: ConvParams, x, w, bias) -> tuple[str, list[str]]:
    """C definitions of one case and the kernel calls that dump its outputs."""
    w_zp_def, w_zp_expr = c_optional_array(f"{tag}_w_zp", "int32_t", p.w_zp)
    rq_def, rq_expr = c_requant(f"{tag}_rq", p.rq)
    with_conv_pack(p, w, bias)
    fields = ", ".join(str(int(getattr(p, f))) for f in SCALAR_FIELDS)
    defs = (c_array(f"{tag}_x", "int8_t", x) + c_array(f"{tag}_pack", "int32_t", p.pack)
            + w_zp_def + rq_def
            + f"static const tg_conv_params_t {tag}_p = {{{fields}, {w_zp_expr}, {rq_expr}, "
              f"0, 0, {tag}_pack}};\n")
    out_bytes = p.n * p.out_h * p.out_w * p.out_c * (1 if p.rq is not None else 4)
    assert conv_scratch_bytes(p) <= 8 * 1024 - 8
    # scratch 4 bytes into an int64 array: 4-byte aligned, not 8 (the least the plan gives)
    calls = [f"tg_conv(&{tag}_p, {tag}_x, y, (int32_t *)scratch + 1, 0, {p.out_h}); "
             f"tg_test_dump(\"{tag}_tg_conv\", y, {out_bytes});"]
    return defs, calls


def target_cases():
    cases = [random_case(seed) for seed in range(0, 48, 2)]
    cases += [dsp_tail_case(i, in_c) for i, in_c in enumerate((5, 13, 31))]
    for p, x, w, bias in cases[-3:]:
        cases.append((replace(p, w_zp=None), x, w, bias))
    return cases


@pytest.mark.target
@pytest.mark.skipif(not cortex_m_tools_available(), reason="needs arm-none-eabi-gcc and QEMU")
@pytest.mark.parametrize("core", [CORTEX_M4, CORTEX_M3], ids=["cortex-m4-dsp", "cortex-m3"])
def test_conv_on_cortex_m_matches_reference(core, tmp_path):
    defs, calls, expected = [], [], {}
    for i, (p, x, w, bias) in enumerate(target_cases()):
        case_defs, case_calls = conv_case_c(f"c{i}", p, x, w, bias)
        defs.append(case_defs)
        calls += case_calls
        y = conv(x, w, bias, p)
        expected[f"c{i}_tg_conv"] = y.tobytes()
    main_c = ('#include <stddef.h>\n#include "tg_conv.h"\n'
              "void tg_test_dump(const char *tag, const void *data, int32_t bytes);\n"
              + "".join(defs) + "int main(void)\n{\n    static int32_t y[4096];\n"
              "    static int64_t scratch[1024];\n    "
              + "\n    ".join(calls) + "\n    return 0;\n}\n")
    elf = build_cortex_m(["tg_conv.c"], main_c, core, tmp_path)
    # The M4 build must really take the SMLAD path, the M3 build must not.
    assert ("smlad" in disassembly(elf)) == (core is CORTEX_M4)
    dumps = run_qemu(elf, core)
    assert dumps.keys() == expected.keys()
    for tag, want in expected.items():
        assert dumps[tag] == want, tag
