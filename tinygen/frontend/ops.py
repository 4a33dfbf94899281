"""Integer op emitters shared by the QDQ and QOperator lowerings.

Each `emit_*` takes already-quantized IR tensors (int8 domain) plus the output's
quantization and appends one logical IR op (ONNX axis order; the layout pass picks storage
order later). Checks that need only shapes and params happen here, so errors name the node.
"""
from __future__ import annotations

import numpy as np

from tinygen.frontend.build import (
    INT8_MAX,
    INT8_MIN,
    Builder,
    broadcast_shape,
    conv_geometry,
)
from tinygen.frontend.spec import checked_cast
from tinygen.ir import QuantParams, Tensor

# Unary functions lowered to a 256-entry table (name -> ONNX op it comes from).
LUT_FUNCTIONS = ("relu", "clip", "leaky_relu", "sigmoid", "tanh", "hard_sigmoid",
                 "hard_swish", "identity")


def same_quant(a: QuantParams | None, c: QuantParams | None) -> bool:
    if a is None or c is None:
        return a is c
    return (a.scale.shape == c.scale.shape and np.array_equal(a.scale, c.scale)
            and np.array_equal(a.zero_point, c.zero_point))


def _need_per_tensor(b: Builder, t: Tensor, what: str) -> None:
    if t.quant is None:
        raise b.error(f"{what} '{t.name}' has no quantization parameters")
    if t.quant.scale.size != 1:
        raise b.error(f"{what} '{t.name}' is quantized per-axis; only weights may be")


def _out(b: Builder, name: str, shape, q: QuantParams | None, dtype: str = "int8") -> Tensor:
    return b.add_tensor(name, shape, dtype, q)


def bias_to_int32(b: Builder, bias: np.ndarray | None, bias_scale, x_q: QuantParams,
                  w_q: QuantParams, out_channels: int) -> np.ndarray:
    """Bias as int32 at scale s_x * s_w[c]; a bias at another scale is re-quantized."""
    if bias is None:
        return np.zeros(out_channels, dtype=np.int32)
    bias = np.asarray(bias).reshape(-1)
    if bias.size != out_channels:
        raise b.error(f"bias has {bias.size} values for {out_channels} output channels")
    want = (np.float32(x_q.scalar_scale()) *
            np.broadcast_to(np.asarray(w_q.scale, np.float32), (out_channels,)))
    if bias.dtype.kind in "iu" and bias_scale is None:
        # QOperator: int32 at s_x * s_w by the ONNX convention (frontend/spec.py checked it)
        return checked_cast(bias, np.int32, "bias", b.error)
    if bias.dtype.kind in "iu":
        bs = np.broadcast_to(np.asarray(bias_scale, np.float64), (out_channels,))
        if np.allclose(bs, want, rtol=1e-5, atol=0):
            return checked_cast(bias, np.int32, "bias", b.error)
        real = bias.astype(np.float64) * bs
    else:
        real = bias.astype(np.float64)
    q = np.rint(real / want.astype(np.float64))
    if np.any(np.abs(q) > 2**31 - 1):
        raise b.error("bias does not fit int32 at scale s_x * s_w")
    return q.astype(np.int32)


def emit_conv(b: Builder, out_name: str, x: Tensor, w: Tensor, bias: np.ndarray,
              y_q: QuantParams | None, act: tuple[int, int], attrs: dict) -> Tensor:
    """Conv (QLinearConv, ConvInteger, or DQ->Conv->Q); y_q None means int32 output."""
    _need_per_tensor(b, x, "input")
    if not w.is_const:
        raise b.error("conv weights must be constant initializers")
    if len(w.shape) != len(x.shape):
        raise b.error(f"weight rank {len(w.shape)} does not match input rank {len(x.shape)}")
    group = int(attrs.get("group", 1))
    cin, cout = x.shape[1], w.shape[0]
    if group < 1 or cin % group or cout % group or w.shape[1] * group != cin:
        raise b.error(f"group {group} does not divide input channels {cin} / weight "
                      f"shape {list(w.shape)}")
    if w.quant is None or w.quant.scale.size not in (1, cout):
        raise b.error("weight scale must be per-tensor or one per output channel")
    geo = conv_geometry(b, x.shape, w.shape, attrs)
    shape = (x.shape[0], cout, *geo["out_spatial"])
    y = _out(b, out_name, shape, y_q, "int8" if y_q is not None else "int32")
    bt = b.add_tensor(out_name + "_bias", bias.shape, "int32", None,
                      checked_cast(bias, np.int32, "bias", b.error))
    b.add_op("conv", [x.name, w.name, bt.name], [y.name], group=group, act=act, **geo)
    return y


def emit_fc(b: Builder, out_name: str, x: Tensor, w: Tensor, bias: np.ndarray | None,
            y_q: QuantParams | None, act: tuple[int, int], w_layout: str) -> Tensor:
    """MatMul/Gemm: y[..., n] = x[..., k] . w; w_layout 'nk' ([N,K]) or 'kn' ([K,N]).

    A constant rank-3 right operand [B, K, N] with x [B, M, K] is a batch of B products.
    """
    _need_per_tensor(b, x, "input")
    batch = 1
    if len(w.shape) == 3 and w.is_const and w_layout == "kn" and len(x.shape) == 3 \
            and x.shape[0] == w.shape[0]:
        batch = w.shape[0]
        if w.quant.scale.size != 1:
            raise b.error("batched MatMul with per-column weight scales is not supported")
    elif len(w.shape) != 2:
        raise b.error(f"right operand of rank {len(w.shape)} is not supported (rank 2, or a "
                      "constant rank 3 matching the batch)")
    kdim, ndim = (w.shape[-1], w.shape[-2]) if w_layout == "nk" else (w.shape[-2], w.shape[-1])
    n, k = ndim, kdim
    if x.shape[-1] != k:
        raise b.error(f"inner dimensions differ: {list(x.shape)} x {list(w.shape)}")
    if not w.is_const:
        _need_per_tensor(b, w, "right operand")
    elif w.quant is None or w.quant.scale.size not in (1, n):
        raise b.error("weight scale must be per-tensor or one per output column")
    if w.is_const and w_layout == "kn":  # store constant weights [.., N, K]: rows contiguous
        q = w.quant
        if q.per_axis:
            q = QuantParams(q.scale, q.zero_point, 0 if batch == 1 else None, q.src_dtype)
        wt = b.add_tensor(w.name + "_nk", (*w.shape[:-2], n, k), "int8", q,
                          np.ascontiguousarray(np.swapaxes(w.data, -1, -2)))
        w, w_layout = wt, "nk"
    shape = (*x.shape[:-1], n)
    y = _out(b, out_name, shape, y_q, "int8" if y_q is not None else "int32")
    inputs = [x.name, w.name]
    if bias is not None:
        bt = b.add_tensor(out_name + "_bias", (n,), "int32", None,
                          checked_cast(bias, np.int32, "bias", b.error))
        inputs.append(bt.name)
    b.add_op("fc", inputs, [y.name], act=act, w_layout=w_layout, batch=batch)
    return y


def emit_binary(b: Builder, kind: str, out_name: str, a: Tensor, c: Tensor,
                y_q: QuantParams, act: tuple[int, int]) -> Tensor:
    """Add or Mul of two int8 tensors (either may be a constant) with broadcasting."""
    _need_per_tensor(b, a, "input")
    _need_per_tensor(b, c, "input")
    shape = broadcast_shape(b, a.shape, c.shape)
    if len(shape) > 4:
        raise b.error(f"rank {len(shape)} elementwise ops are not supported (rank <= 4)")
    y = _out(b, out_name, shape, y_q)
    b.add_op(kind, [a.name, c.name], [y.name], act=act)
    return y


def emit_pool(b: Builder, kind: str, out_name: str, x: Tensor, y_q: QuantParams,
              attrs: dict, float_order: str = "qlinear") -> Tensor:
    """MaxPool / AveragePool / GlobalAveragePool (attrs global=True). float_order: whose
    float average avgpool reproduces in float mode, "qlinear" (onnxruntime's QLinear
    pooling) or "onnx" (the float graph DequantizeLinear -> pooling -> QuantizeLinear)."""
    _need_per_tensor(b, x, "input")
    if len(x.shape) not in (3, 4):
        raise b.error(f"pooling over rank {len(x.shape)} is not supported (1-D or 2-D)")
    attrs = dict(attrs)
    if attrs.pop("global", False):
        attrs = {"kernel_shape": list(x.shape[2:])}
    if not attrs.get("kernel_shape"):
        raise b.error("pooling needs kernel_shape")
    if int(attrs.get("storage_order", 0)) != 0:
        raise b.error("MaxPool storage_order=1 is not supported")
    geo = conv_geometry(b, x.shape, (0, 0, *attrs["kernel_shape"]), attrs)
    include_pad = int(attrs.get("count_include_pad", 0))
    if kind == "avgpool" and include_pad and attrs.get("ceil_mode"):
        raise b.error("AveragePool with ceil_mode and count_include_pad is not supported")
    shape = (x.shape[0], x.shape[1], *geo["out_spatial"])
    if kind == "maxpool" and not same_quant(x.quant, y_q):
        mid = _out(b, out_name + "_max", shape, x.quant)
        b.add_op("maxpool", [x.name], [mid.name], act=(INT8_MIN, INT8_MAX), **geo)
        return emit_lut(b, out_name, mid, y_q, "identity")
    y = _out(b, out_name, shape, y_q)
    b.add_op(kind, [x.name], [y.name], act=(INT8_MIN, INT8_MAX),
             count_include_pad=include_pad, **geo)
    if kind == "avgpool":
        b.graph.ops[-1].attrs["float_order"] = float_order
    return y


def emit_lut(b: Builder, out_name: str, x: Tensor, y_q: QuantParams, fn: str,
             **fn_args) -> Tensor:
    """Unary op through a compile-time table (also a bare requantization: 'identity')."""
    _need_per_tensor(b, x, "input")
    if fn == "identity" and same_quant(x.quant, y_q):
        return emit_view(b, out_name, x, x.shape)
    y = _out(b, out_name, x.shape, y_q)
    b.add_op("lut", [x.name], [y.name], fn=fn, fn_args=fn_args)
    return y


def emit_softmax(b: Builder, out_name: str, x: Tensor, y_q: QuantParams, axis: int,
                 opset: int) -> Tensor:
    _need_per_tensor(b, x, "input")
    rank = len(x.shape)
    axis = axis + rank if axis < 0 else axis
    if not 0 <= axis < rank:
        raise b.error(f"softmax axis {axis} is out of range for rank {rank}")
    if opset < 13 and axis != rank - 1 and any(d != 1 for d in x.shape[axis + 1:]):
        raise b.error("opset < 13 Softmax over several axes is not supported")
    if opset < 13:
        axis = rank - 1 if all(d == 1 for d in x.shape[axis + 1:]) else axis
    if x.shape[axis] > 2047:
        raise b.error(f"softmax over {x.shape[axis]} values (more than 2047) is not supported")
    y = _out(b, out_name, x.shape, y_q)
    b.add_op("softmax", [x.name], [y.name], axis=axis)
    return y


def emit_concat(b: Builder, out_name: str, xs: list[Tensor], y_q: QuantParams,
                axis: int) -> Tensor:
    rank = len(xs[0].shape)
    if not -rank <= axis < rank:
        raise b.error(f"concat axis {axis} is out of range for rank {rank}")
    axis = axis + rank if axis < 0 else axis
    for t in xs:
        _need_per_tensor(b, t, "input")
        if len(t.shape) != rank or any(t.shape[i] != xs[0].shape[i]
                                       for i in range(rank) if i != axis):
            raise b.error(f"concat inputs {[list(t.shape) for t in xs]} differ off axis {axis}")
    shape = list(xs[0].shape)
    shape[axis] = sum(t.shape[axis] for t in xs)
    y = _out(b, out_name, shape, y_q)
    b.add_op("concat", [t.name for t in xs], [y.name], axis=axis)
    return y


def emit_view(b: Builder, out_name: str, x: Tensor, shape) -> Tensor:
    """Reshape/Flatten/Squeeze/Unsqueeze/Identity: same bytes, new logical shape."""
    shape = tuple(int(d) for d in shape)
    if int(np.prod(shape, dtype=np.int64)) != x.size:
        raise b.error(f"cannot view {list(x.shape)} as {list(shape)}")
    y = _out(b, out_name, shape, x.quant, x.dtype)
    b.add_op("view", [x.name], [y.name])
    return y


def emit_transpose(b: Builder, out_name: str, x: Tensor, perm) -> Tensor:
    rank = len(x.shape)
    perm = list(perm) if perm is not None else list(reversed(range(rank)))
    if sorted(perm) != list(range(rank)) or rank > 6:
        raise b.error(f"perm {perm} is not a permutation of rank {rank} (<= 6)")
    y = _out(b, out_name, tuple(x.shape[p] for p in perm), x.quant)
    b.add_op("transpose", [x.name], [y.name], perm=tuple(perm))
    return y


def emit_pad(b: Builder, out_name: str, x: Tensor, pads, value_q: int) -> Tensor:
    rank = len(x.shape)
    pads = [int(p) for p in pads]
    if len(pads) != 2 * rank or min(pads) < 0 or max(pads) > 4096:
        raise b.error(f"pads {pads} must be 2 * rank non-negative values (<= 4096)")
    shape = tuple(x.shape[i] + pads[i] + pads[i + rank] for i in range(rank))
    y = _out(b, out_name, shape, x.quant)
    b.add_op("pad", [x.name], [y.name], pads=tuple(pads), value=int(value_q))
    return y


def resolve_reshape(b: Builder, in_shape, target, allowzero: int = 0) -> tuple[int, ...]:
    """ONNX Reshape shape rules: 0 copies the input dim (unless allowzero), -1 is inferred."""
    target = [int(d) for d in np.asarray(target).reshape(-1)]
    out = []
    for i, d in enumerate(target):
        out.append(in_shape[i] if d == 0 and not allowzero else d)
    total = int(np.prod(in_shape, dtype=np.int64))
    if out.count(-1) > 1:
        raise b.error(f"reshape target {target} has more than one -1")
    if -1 in out:
        known = int(np.prod([d for d in out if d != -1], dtype=np.int64))
        if known == 0 or total % known:
            raise b.error(f"cannot reshape {list(in_shape)} to {target}")
        out[out.index(-1)] = total // known
    if int(np.prod(out, dtype=np.int64)) != total:
        raise b.error(f"cannot reshape {list(in_shape)} to {target}")
    return tuple(out)


def reduce_axes(b: Builder, rank: int, axes, noop_with_empty_axes: int) -> list[int] | None:
    """ONNX ReduceMean axes as sorted non-negative indices; None: the op is an identity."""
    axes = [int(a) for a in (axes if axes is not None else [])]
    if not axes:
        return None if noop_with_empty_axes else list(range(rank))
    if any(not -rank <= a < rank for a in axes):
        raise b.error(f"ReduceMean axes {axes} are out of range for rank {rank}")
    norm = sorted({a % rank for a in axes})
    if len(norm) != len(axes):
        raise b.error(f"ReduceMean axes {axes} repeat an axis")
    return norm


def emit_reduce_mean(b: Builder, out_name: str, x: Tensor, y_q: QuantParams, axes,
                     keepdims: bool) -> Tensor:
    """ReduceMean as average pooling: an exact integer sum and one rounded division (float
    mode: the ONNX definition's order, DequantizeLinear -> ReduceMean -> QuantizeLinear).

    Axes of size 1 change only the shape; the others must be consecutive (ONNX order, size-1
    axes between them do not count). Spatial axes of a [N, C, *spatial] tensor kept
    channels-last are the pooling window; otherwise x is viewed as [outer, 1, averaged,
    inner] (the same bytes in ONNX order) and pooled over the 'rows'.
    """
    _need_per_tensor(b, x, "input")
    rank = len(x.shape)
    out_shape = [1 if i in axes else d for i, d in enumerate(x.shape)]
    if not keepdims:
        out_shape = [d for i, d in enumerate(x.shape) if i not in axes]
    moving = [a for a in axes if x.shape[a] != 1]
    if not moving:  # nothing to average: a requantization at most
        return emit_view(b, out_name, emit_lut(b, out_name + "_mean", x, y_q, "identity"),
                         out_shape)
    if any(moving[0] < i < moving[-1] and x.shape[i] != 1 and i not in moving
           for i in range(rank)):
        raise b.error(f"ReduceMean over axes {axes} of shape {list(x.shape)} is not "
                      "supported: the averaged axes must be consecutive")
    if rank in (3, 4) and moving[0] >= 2 and _stored_channels_last(b, x):
        kernel = [x.shape[i] if i in moving else 1 for i in range(2, rank)]
        pooled = emit_pool(b, "avgpool", out_name + "_mean", x, y_q,
                           {"kernel_shape": kernel}, float_order="onnx")
        return emit_view(b, out_name, pooled, out_shape)
    outer = int(np.prod(x.shape[:moving[0]], dtype=np.int64))
    count = int(np.prod([x.shape[a] for a in moving], dtype=np.int64))
    inner = int(np.prod(x.shape[moving[-1] + 1:], dtype=np.int64))
    rows = emit_view(b, out_name + "_rows", x, (outer, 1, count, inner))
    pooled = emit_pool(b, "avgpool", out_name + "_mean", rows, y_q,
                       {"kernel_shape": [count, 1]}, float_order="onnx")
    return emit_view(b, out_name, pooled, out_shape)


def _stored_channels_last(b: Builder, x: Tensor, depth: int = 32) -> bool:
    """Whether the layout pass will most likely keep x channels-last (it decides; this only
    picks the lowering that needs no copy): spatial ops write channels-last, ops that keep
    their input's order pass it on, everything else writes ONNX order."""
    follow = {"lut", "copy", "add", "mul", "pad", "concat"}
    name = x.name
    for _ in range(depth):
        prod = b.graph.producer(name)
        if prod is None:
            return len(b.graph.tensors[name].shape) >= 3
        if prod.kind in ("conv", "maxpool", "avgpool"):
            return True
        if prod.kind not in follow:
            return False
        acts = [i for i in prod.inputs if not b.graph.tensors[i].is_const]
        if not acts:
            return False
        name = acts[0]
    return False


def emit_batch_norm(b: Builder, out_name: str, x: Tensor, params: list[np.ndarray],
                    epsilon: float, y_q: QuantParams, act: tuple[int, int]) -> Tensor:
    """BatchNormalization (inference) as a depthwise 1x1 conv: y = a[c] x + d[c] with
    a = scale / sqrt(var + epsilon) and d = B - mean a (the ONNX formula, in float64).

    Each a[c] is one int8 weight, +-127 (or 0), at scale |a[c]| / 127: the product is exact
    up to the float32 rounding of that scale. d becomes the int32 bias at s_x * s_w[c],
    rounded once. A [N, C] input is viewed as [N, C, 1] (the same bytes).
    """
    _need_per_tensor(b, x, "input")
    rank, channels = len(x.shape), (x.shape[1] if len(x.shape) > 1 else 0)
    if rank not in (2, 3, 4):
        raise b.error(f"BatchNormalization of a rank-{rank} tensor is not supported "
                      "(rank 2, 3 or 4)")
    scale, bias, mean, var = (np.asarray(p, np.float64).reshape(-1) for p in params)
    if any(p.size != channels for p in (scale, bias, mean, var)):
        raise b.error(f"BatchNormalization parameters must have {channels} values each "
                      "(one per channel)")
    if np.any(var + epsilon <= 0) or not all(np.all(np.isfinite(p))
                                             for p in (scale, bias, mean, var)):
        raise b.error("BatchNormalization parameters must be finite with var + epsilon > 0")
    a = scale / np.sqrt(var + np.float64(epsilon))
    offset = bias - mean * a
    w = np.where(a > 0, 127, np.where(a < 0, -127, 0)).astype(np.int8)
    w_scale = np.where(a != 0, np.abs(a) / 127, 1.0).astype(np.float32)
    if np.any(w_scale[a != 0] == 0) or not np.all(np.isfinite(w_scale)):
        raise b.error("BatchNormalization scale / sqrt(var + epsilon) is out of float32 range")
    src = x if rank > 2 else emit_view(b, out_name + "_c1", x, (*x.shape, 1))
    w_q = QuantParams(w_scale, np.zeros(channels, np.int32), 0, "int8")
    kernel = [1] * (len(src.shape) - 2)
    wt = b.add_tensor(out_name + "_w", (channels, 1, *kernel), "int8", w_q,
                      w.reshape(channels, 1, *kernel))
    bias_q = bias_to_int32(b, offset, None, src.quant, w_q, channels)
    y = emit_conv(b, out_name if rank > 2 else out_name + "_bn", src, wt, bias_q, y_q, act,
                  {"group": channels, "kernel_shape": kernel})
    return y if rank > 2 else emit_view(b, out_name, y, x.shape)
