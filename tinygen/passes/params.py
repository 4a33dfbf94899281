"""Turn each op's quantization into the exact parameters its kernel takes.

Sets op.attrs["call"] = KernelCall(func, family, params, args): `params` is the reference
dataclass that mirrors the C params struct field for field, so the numpy reference and the
emitted C read the very same numbers. Requantization multipliers are computed here, once,
for the chosen mode ("fixed": Q31 multiplier + shift; "float": float32 scale).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tinygen.errors import TinygenError
from tinygen.ir import Graph, Op, Tensor, storage_perm
from tinygen.passes.layout import storage_data
from tinygen.reference import dwconv as ref_dwconv
from tinygen.reference.conv import ConvParams, conv_pack, with_conv_pack
from tinygen.reference.fc import FcParams, fc_pack, with_fc_pack
from tinygen.reference.pwconv import PwConvParams, pack_weights, with_pack
from tinygen.reference.requant import Requant, choose_form, make_requant, quantize_multiplier


@dataclass
class KernelCall:
    func: str  # C function, e.g. "tg_conv"
    family: str  # runtime file family: tg_<family>.c / tg_<family>.h
    params: object  # reference params dataclass mirroring the C struct (None: no params)
    args: list[str]  # tensor names after the params pointer, output last
    batch: int = 1  # > 1: the call repeats with each arg advanced by batch_step elements
    batch_step: tuple[int, ...] = ()


def _f32(x) -> np.float32:
    return np.float32(x)


def channel_requant(x: Tensor, w: Tensor, y: Tensor, channels: int, act, mode: str) -> Requant:
    """Requant of a conv/fc output: M[c] = s_x * s_w[c] / s_y.

    Float mode uses float32((float32(s_x) * float32(s_w[c])) / float32(s_y)), the order
    onnxruntime's integer Conv/MatMul kernels use, so outputs can agree bit for bit.
    """
    sx = _f32(x.quant.scalar_scale())
    sw = np.broadcast_to(np.asarray(w.quant.scale, np.float32), (channels,))
    sy = _f32(y.quant.scalar_scale())
    real = sx.astype(np.float64) * sw.astype(np.float64) / np.float64(sy)
    float_scales = (sx * sw).astype(np.float32) / sy
    return make_requant(real, y.quant.scalar_zp(), act[0], act[1], mode, float_scales)


def _w_zp(w: Tensor, channels: int):
    zp = np.broadcast_to(np.asarray(w.quant.zero_point, np.int32), (channels,))
    return None if not np.any(zp) else np.array(zp, dtype=np.int32)


def _conv(graph: Graph, op: Op, mode: str) -> KernelCall:
    t = graph.tensors
    x, w, b, y = t[op.inputs[0]], t[op.inputs[1]], t[op.inputs[2]], t[op.outputs[0]]
    xs, ys = x.storage_shape(), y.storage_shape()
    if len(xs) == 3:  # 1-D: [n, w, c] is the h = 1 case
        xs, ys = (xs[0], 1, xs[1], xs[2]), (ys[0], 1, ys[1], ys[2])
    kh, kw = op.attrs["kernel"]
    (sh, sw), (dh, dw) = op.attrs["strides"], op.attrs["dilations"]
    pt, pl = op.attrs["pads"][0], op.attrs["pads"][1]
    cout = y.shape[1]
    rq = None if y.dtype == "int32" else channel_requant(x, w, y, cout, op.attrs["act"], mode)
    p = ConvParams(n=xs[0], in_h=xs[1], in_w=xs[2], in_c=xs[3], out_h=ys[1], out_w=ys[2],
                   out_c=cout, k_h=kh, k_w=kw, stride_h=sh, stride_w=sw, dil_h=dh, dil_w=dw,
                   pad_top=pt, pad_left=pl, groups=op.attrs["group"],
                   in_zp=x.quant.scalar_zp(), w_zp=_w_zp(w, cout), rq=rq)
    depthwise = p.groups == p.in_c and p.groups > 1
    if (kh, kw) == (1, 1) and p.groups == 1 and not any(op.attrs["pads"]):
        pw = PwConvParams(n=p.n, in_h=p.in_h, in_w=p.in_w, in_c=p.in_c, out_h=p.out_h,
                          out_w=p.out_w, out_c=p.out_c, stride_h=sh, stride_w=sw,
                          in_zp=p.in_zp, w_zp=p.w_zp, rq=rq)
        # weights and bias travel in the params' pack (flash), so the call takes x only
        with_pack(pw, storage_data(w), b.data)
        return KernelCall("tg_pwconv", "pwconv", pw, [x.name, y.name])
    if depthwise:
        dp = ref_dwconv.DwConvParams(
            n=p.n, in_h=p.in_h, in_w=p.in_w, in_c=p.in_c, out_h=p.out_h, out_w=p.out_w,
            out_c=p.out_c, k_h=kh, k_w=kw, stride_h=sh, stride_w=sw, dil_h=dh, dil_w=dw,
            pad_top=pt, pad_left=pl, in_zp=p.in_zp, w_zp=p.w_zp, rq=rq)
        ref_dwconv.with_pack(dp, storage_data(w), b.data)  # the call takes x only
        return KernelCall("tg_dwconv", "dwconv", dp, [x.name, y.name])
    with_conv_pack(p, storage_data(w), b.data)  # tg_conv reads its weights from the pack
    return KernelCall("tg_conv", "conv", p, [x.name, y.name])


def _fc(graph: Graph, op: Op, mode: str) -> KernelCall:
    t = graph.tensors
    x, w, y = t[op.inputs[0]], t[op.inputs[1]], t[op.outputs[0]]
    b = t[op.inputs[2]] if len(op.inputs) > 2 else None
    depth, out = x.shape[-1], y.shape[-1]
    batch = op.attrs.get("batch", 1)
    rows = x.size // depth // batch
    if w.is_const:
        so, sk = depth, 1  # [out][depth]
    else:
        so, sk = 1, out  # run-time [depth][out]
    rq = None if y.dtype == "int32" else channel_requant(x, w, y, out, op.attrs["act"], mode)
    p = FcParams(rows=rows, depth=depth, out=out, w_stride_o=so, w_stride_k=sk,
                 x_zp=x.quant.scalar_zp(), w_zp=_w_zp(w, out), rq=rq)
    if w.is_const and batch == 1:  # tg_fc reads a constant weight from its pack alone
        with_fc_pack(p, storage_data(w), b.data if b is not None else None)
        return KernelCall("tg_fc", "fc", p, [x.name, "", "", y.name])
    step = (rows * depth, out * depth, 0, rows * out) if batch > 1 else ()
    return KernelCall("tg_fc", "fc", p, [x.name, w.name, b.name if b else "", y.name],
                      batch, step)


def logical_strides(t: Tensor, out_rank: int) -> list[int]:
    """Element strides of t for each logical axis of a broadcast output of `out_rank`."""
    shape = t.shape
    st = t.storage_shape()
    perm = storage_perm(len(shape), t.layout)
    storage_stride = [1] * len(st)
    for i in range(len(st) - 2, -1, -1):
        storage_stride[i] = storage_stride[i + 1] * st[i + 1]
    per_logical = [0] * len(shape)
    for s_axis, l_axis in enumerate(perm):
        per_logical[l_axis] = storage_stride[s_axis] if shape[l_axis] != 1 else 0
    return [0] * (out_rank - len(shape)) + per_logical


@dataclass
class LutParams:
    """tg_lut takes no struct: (table, x, y, count)."""

    table: np.ndarray
    count: int


def _lut(graph: Graph, op: Op, mode: str, tables: str = "onnx") -> KernelCall:
    from tinygen.reference.lut import build_table
    t = graph.tensors
    x, y = t[op.inputs[0]], t[op.outputs[0]]
    table = build_table(op.attrs["fn"], x.quant.scalar_scale(), x.quant.scalar_zp(),
                        y.quant.scalar_scale(), y.quant.scalar_zp(),
                        precision="onnxruntime" if tables == "onnxruntime" else None,
                        **op.attrs.get("fn_args", {}))
    return KernelCall("tg_lut", "lut", LutParams(table, x.size), [x.name, y.name])


def _concat(graph: Graph, op: Op, mode: str) -> KernelCall:
    from tinygen.reference.shape import concat_params, concat_tables
    t = graph.tensors
    parts = [t[n] for n in op.inputs]
    y = t[op.outputs[0]]
    tables = concat_tables([(p.quant.scalar_scale(), p.quant.scalar_zp()) for p in parts],
                           (y.quant.scalar_scale(), y.quant.scalar_zp()))
    p = concat_params([p.storage_shape() for p in parts], op.attrs["storage_axis"], tables)
    p.part_inner = np.asarray(p.part_inner, dtype=np.int32)
    return KernelCall("tg_concat", "shape", p, [*op.inputs, y.name])


def _transpose(graph: Graph, op: Op, mode: str) -> KernelCall:
    from tinygen.reference.shape import TransposeParams
    t = graph.tensors
    x, y = t[op.inputs[0]], t[op.outputs[0]]
    xs = list(x.storage_shape())
    perm = list(op.attrs["storage_perm"])
    p = TransposeParams(len(xs), xs + [1] * (6 - len(xs)), perm + list(range(len(perm), 6)))
    return KernelCall("tg_transpose", "shape", p, [x.name, y.name])


def _pad(graph: Graph, op: Op, mode: str) -> KernelCall:
    from tinygen.reference.shape import PadParams
    t = graph.tensors
    x, y = t[op.inputs[0]], t[op.outputs[0]]
    rank = len(x.shape)
    perm = storage_perm(rank, x.layout)
    pads = op.attrs["pads"]
    before = [pads[a] for a in perm]
    after = [pads[a + rank] for a in perm]
    fill = [0] * (6 - rank)
    p = PadParams(rank, list(x.storage_shape()) + [1] * (6 - rank), before + fill,
                  after + fill, int(op.attrs["value"]))
    return KernelCall("tg_pad", "shape", p, [x.name, y.name])


def _runtime_dtype(op: Op, y: Tensor, tables: str) -> str:
    """The 8-bit type onnxruntime's integer kernel computes this op in: the model's own,
    except that onnxruntime on x86-64 rewrites an int8 QDQ graph's activations to uint8
    (zero points + 128) before it fuses them, and its QLinearAveragePool adds the zero point
    before rounding, so the rewrite moves near-tie roundings (measured on gesture_band: 20 of
    1,580 outputs). Followed with --tables onnxruntime only (average pooling)."""
    src = y.quant.src_dtype
    if tables == "onnxruntime" and src == "int8" and not op.onnx_op.startswith("QLinear"):
        return "uint8"
    return src


def _pool(graph: Graph, op: Op, mode: str, tables: str = "onnx") -> KernelCall:
    from tinygen.reference.pool import PoolParams, make_avgpool_params
    t = graph.tensors
    x, y = t[op.inputs[0]], t[op.outputs[0]]
    xs, ys = x.storage_shape(), y.storage_shape()
    if len(xs) == 3:
        xs, ys = (xs[0], 1, xs[1], xs[2]), (ys[0], 1, ys[1], ys[2])
    kh, kw = op.attrs["kernel"]
    (sh, sw), (dh, dw) = op.attrs["strides"], op.attrs["dilations"]
    geo = PoolParams(n=xs[0], in_h=xs[1], in_w=xs[2], c=xs[3], out_h=ys[1], out_w=ys[2],
                     k_h=kh, k_w=kw, stride_h=sh, stride_w=sw, dil_h=dh, dil_w=dw,
                     pad_top=op.attrs["pads"][0], pad_left=op.attrs["pads"][1])
    lo, hi = op.attrs.get("act", (-128, 127))
    if op.kind == "maxpool":
        geo.out_zp, geo.act_min, geo.act_max = y.quant.scalar_zp(), lo, hi
        return KernelCall("tg_maxpool", "pool", geo, [x.name, y.name])
    p = make_avgpool_params(geo, x.quant.scalar_scale(), x.quant.scalar_zp(),
                            y.quant.scalar_scale(), y.quant.scalar_zp(),
                            bool(op.attrs.get("count_include_pad", 0)), mode,
                            op.attrs.get("float_order", "qlinear"),
                            _runtime_dtype(op, y, tables), lo, hi)
    return KernelCall("tg_avgpool", "pool", p, [x.name, y.name])


def broadcast_storage_shape(t: Tensor, out: Tensor) -> tuple[int, ...]:
    """t's shape expanded to out's rank and listed in out's storage order (layout.py has
    made sure t's bytes walk its non-unit axes in that order)."""
    rank = len(out.shape)
    full = (1,) * (rank - len(t.shape)) + tuple(t.shape)
    return tuple(full[a] for a in storage_perm(rank, out.layout))


def _eltwise(graph: Graph, op: Op, mode: str) -> KernelCall:
    from tinygen.reference.eltwise import make_add_params, make_mul_params
    t = graph.tensors
    a, b, y = t[op.inputs[0]], t[op.inputs[1]], t[op.outputs[0]]
    make = make_add_params if op.kind == "add" else make_mul_params
    lo, hi = op.attrs.get("act", (-128, 127))
    p = make(broadcast_storage_shape(a, y), broadcast_storage_shape(b, y),
             a.quant.scalar_scale(), a.quant.scalar_zp(), b.quant.scalar_scale(),
             b.quant.scalar_zp(), y.quant.scalar_scale(), y.quant.scalar_zp(), mode,
             y.quant.src_dtype, lo, hi)
    return KernelCall("tg_add" if op.kind == "add" else "tg_mul", "eltwise", p,
                      [a.name, b.name, y.name])


def _softmax(graph: Graph, op: Op, mode: str, tables: str = "onnx") -> KernelCall:
    from tinygen.reference.softmax import make_softmax_float_params, make_softmax_params
    t = graph.tensors
    x, y = t[op.inputs[0]], t[op.outputs[0]]
    length = x.storage_shape()[-1]
    if tables == "onnxruntime":  # onnxruntime's QLinearSoftmax, in float32
        if mode != "float":
            raise ValueError("--tables onnxruntime computes Softmax in float32 as onnxruntime "
                             "does; it needs --requant float")
        p = make_softmax_float_params(x.size // length, length, x.quant.scalar_scale(),
                                      y.quant.scalar_scale(), y.quant.scalar_zp())
        return KernelCall("tg_softmax_float", "softmax", p, [x.name, y.name])
    p = make_softmax_params(x.size // length, length, x.quant.scalar_scale(),
                            y.quant.scalar_scale(), y.quant.scalar_zp())
    return KernelCall("tg_softmax", "softmax", p, [x.name, y.name])


LOWERINGS = {"conv": _conv, "fc": _fc, "add": _eltwise, "mul": _eltwise, "maxpool": _pool,
             "avgpool": _pool, "lut": _lut, "softmax": _softmax, "concat": _concat,
             "transpose": _transpose, "pad": _pad}


# Ops that follow --tables (onnx: the ONNX definition; onnxruntime: its own approximations,
# reference/lut.py and reference/softmax.py, and the type its kernels compute in).
TABLE_OPS = ("lut", "softmax", "avgpool")


def lower_params(graph: Graph, mode: str, tables: str = "onnx") -> Graph:
    """Attach a KernelCall to every op that runs a kernel ('view' ops run nothing).

    Needs: assign_layout. Leaves: op.attrs["call"] on every non-view op.
    """
    if mode not in ("fixed", "float"):
        raise TinygenError(f"--requant must be fixed or float, not '{mode}'")
    if tables not in ("onnx", "onnxruntime"):
        raise TinygenError(f"--tables must be onnx or onnxruntime, not '{tables}'")
    for op in graph.ops:
        if op.kind in ("view", "copy"):
            continue
        extra = {"tables": tables} if op.kind in TABLE_OPS else {}
        try:
            op.attrs["call"] = LOWERINGS[op.kind](graph, op, mode, **extra)
        except ValueError as exc:  # e.g. a multiplier out of range
            raise TinygenError(str(exc), file=graph.source_path, node=op.name,
                               op=op.onnx_op) from None
    return graph


def choose_requant_forms(graph: Graph) -> Graph:
    """Pick each conv/fc requantization's C form for the layer's proven accumulator bound
    (a tighter bound than the int32 worst case may allow the pre-shifted fast form).

    Needs: check_accumulators (op.attrs["acc_bound"]). Leaves: rq.form/chan/pre final, and
    the packs of tg_pwconv, tg_conv and tg_dwconv rebuilt with them.
    """
    for op in graph.ops:
        call = op.attrs.get("call")
        rq = getattr(call.params, "rq", None) if call else None
        if isinstance(rq, Requant) and "acc_bound" in op.attrs:
            choose_form(rq, op.attrs["acc_bound"])
            if isinstance(call.params, PwConvParams):
                call.params.pack = pack_weights(call.params)
            elif call.func == "tg_conv":
                call.params.pack = conv_pack(call.params)
            elif call.func == "tg_fc" and call.params.pack is not None:
                call.params.pack = fc_pack(call.params)
            elif call.func == "tg_dwconv":
                call.params.pack = ref_dwconv.pack_weights(call.params)
    return graph


__all__ = ["lower_params", "choose_requant_forms", "KernelCall", "quantize_multiplier",
           "logical_strides"]
