"""QDQ form: QuantizeLinear / DequantizeLinear around float ops.

A float op whose inputs are DequantizeLinear outputs becomes a `Pending` op; the
QuantizeLinear that consumes it supplies the output scale and the integer op is emitted
then. Relu/Clip between the op and its QuantizeLinear narrow the clamp instead of costing
an op. Data-movement ops (Reshape, Transpose, MaxPool, ...) keep their input's scale.
"""
from __future__ import annotations

import numpy as np

from tinygen.frontend import ops
from tinygen.frontend.build import activation_range, quantize_real
from tinygen.frontend.spec import checked_cast
from tinygen.ir import QuantParams

# Producers a following Relu/Clip can be folded into (their output clamp).
FUSABLE = {"Conv", "Gemm", "MatMul", "Add", "Mul", "BatchNormalization"}


def _q_params(L, node, out_dtype_hint=None):
    """(QuantParams, source dtype) of a QuantizeLinear/DequantizeLinear node."""
    scale = L.const(node.input[1], "scale")
    zp = L.opt_const(node, 2, "zero point")
    if L.view.attr(node, "block_size", 0):
        raise L.error("blocked quantization (block_size) is not supported")
    out_dt = L.view.attr(node, "output_dtype", 0)
    if zp is not None:
        src = zp.dtype
    elif out_dt:
        from onnx import helper
        src = helper.tensor_dtype_to_np_dtype(out_dt)
    else:
        src = out_dtype_hint or np.dtype(np.uint8)
    if np.dtype(src) not in (np.int8, np.uint8) and np.dtype(src) != np.int32:
        raise L.error(f"{np.dtype(src).name} quantization is not supported (int8 and uint8 only)")
    axis = L.view.attr(node, "axis", 1)
    return scale, zp, np.dtype(src), axis


def _activation_quant(L, node, scale, zp, src, axis, rank):
    if np.asarray(scale).size != 1:
        raise L.error("activations must be quantized per-tensor (a per-axis scale on "
                      f"'{node.input[0]}')")
    if src == np.int32:
        raise L.error("int32 activations are not supported")
    return L.b.quant(scale, zp if zp is not None else np.zeros((), src), src)


def lower_quantize(L, node) -> None:
    from tinygen.frontend.lower import Const, Deq, FloatIn, Int, Pending

    scale, zp, src, axis = _q_params(L, node)
    x_name, out = node.input[0], node.output[0]
    v = L.value(x_name)
    if isinstance(v, Const):  # quantize a float constant at compile time
        a = np.asarray(v.a, dtype=np.float32)
        q = L.b.quant(scale, zp if zp is not None else np.zeros((), src), src,
                      axis=(axis + a.ndim) % max(a.ndim, 1) if np.asarray(scale).size > 1
                      else None)
        s = np.asarray(q.scale, np.float32)
        z = np.asarray(q.zero_point)
        if q.per_axis:
            shape = [1] * a.ndim
            shape[q.axis] = -1
            s, z = s.reshape(shape), z.reshape(shape)
        data = np.clip(np.rint(a / s) + z, -128, 127).astype(np.int8)
        L.env[out] = Int(L.b.add_tensor(out, data.shape, "int8", q, data))
        return
    rank = len(L.view.shapes.get(x_name, ()))
    q = _activation_quant(L, node, scale, zp, src, axis, rank)
    if isinstance(v, FloatIn):
        L.env[out] = Int(L.quantize_input(x_name, q, src))
    elif isinstance(v, Deq):
        L.env[out] = Int(ops.emit_lut(L.b, out, v.t, q, "identity"))
    elif isinstance(v, Pending):
        saved = (L.b.node_name, L.b.node_op)
        L.b.at(v.node, v.op)
        L.env[out] = Int(v.finish(out, q, *v.act))
        L.b.at(*saved)
    elif isinstance(v, Int):
        raise L.error(f"QuantizeLinear of '{x_name}', which is already quantized")


def lower_dequantize(L, node) -> None:
    from tinygen.frontend.lower import Const, Deq, FloatIn, Int

    x_name, out = node.input[0], node.output[0]
    v = L.value(x_name)
    hint = np.asarray(v.a).dtype if isinstance(v, Const) else None
    if isinstance(v, FloatIn):
        hint = L.view.dtypes.get(x_name)
    scale, zp, src, axis = _q_params(L, node, hint)
    if isinstance(v, Const):
        a = np.asarray(v.a)
        if a.dtype != src and zp is not None:
            raise L.error(f"zero point type {src} differs from data type {a.dtype}")
        src = a.dtype
        if np.dtype(src) == np.int32:  # a bias: keep int32 with its scale
            bq = QuantParams(np.asarray(scale, np.float32), np.zeros(np.shape(scale), np.int32))
            t = L.b.add_tensor(x_name, a.shape, "int32", bq, a.astype(np.int32))
            L.env[out] = Deq(t)
            return
        if np.dtype(src) not in (np.int8, np.uint8):
            raise L.error(f"{np.dtype(src).name} weights are not supported (int8/uint8 only)")
        per_axis = np.asarray(scale).size > 1
        ax = (axis + a.ndim) % a.ndim if per_axis else None
        if per_axis and a.shape[ax] != np.asarray(scale).size:
            raise L.error(f"{np.asarray(scale).size} scales for axis {ax} of size {a.shape[ax]}")
        q = L.b.quant(scale, zp if zp is not None else np.zeros((), src), src, axis=ax)
        L.env[out] = Deq(L.b.const_int8(x_name, a, src, q))
        return
    if isinstance(v, FloatIn):  # an int8/uint8 graph input
        if np.asarray(scale).size != 1:
            raise L.error(f"graph input '{x_name}' is dequantized per-axis: only constant "
                          "weights may be (is it meant to be an initializer?)")
        q = _activation_quant(L, node, scale, zp, src, axis, 0)
        L.env[out] = Deq(L.quantize_input(x_name, q, src))
        return
    if not isinstance(v, Int):
        raise L.error(f"DequantizeLinear of '{x_name}', which is not a quantized tensor")
    q = _activation_quant(L, node, scale, zp, src, axis, 0)
    if not ops.same_quant(v.t.quant, q):
        raise L.error(f"DequantizeLinear of '{x_name}' uses parameters other than the ones "
                      "it was quantized with")
    L.env[out] = Deq(v.t)


def _bias(L, name):
    """(data, scale) of a bias input: DequantizeLinear of an int32 constant (spec.py has
    refused every other type before this)."""
    from tinygen.frontend.lower import Deq

    if not name:
        return None, None
    v = L.value(name)
    if isinstance(v, Deq) and v.t.is_const and v.t.dtype == "int32":
        return v.t.data, (v.t.quant.scale if v.t.quant is not None else None)
    raise L.error(f"bias '{name}' must be a constant: DequantizeLinear of an int32 "
                  "initializer")


def _attrs(L, node) -> dict:
    from onnx import helper
    return {a.name: helper.get_attribute_value(a) for a in node.attribute}


def lower_float_op(L, node) -> None:
    from tinygen.frontend.lower import Deq, Pending

    op, out, b = node.op_type, node.output[0], L.b
    attrs = _attrs(L, node)
    here = (b.node_name, b.node_op)

    def pending(finish, transparent_q=None, fusable=False):
        p = Pending(finish, transparent_q, (None, None, None), here[0], here[1],
                    {"fusable": fusable})
        L.env[out] = p

    if op in ("Relu", "Clip"):
        lo, hi = 0.0, None
        if op == "Clip":
            lo_c = L.opt_const(node, 1, "Clip min")
            hi_c = L.opt_const(node, 2, "Clip max")
            lo = float(lo_c) if lo_c is not None else attrs.get("min", -np.inf)
            hi = float(hi_c) if hi_c is not None else attrs.get("max", np.inf)
        src = L.value(node.input[0])
        if isinstance(src, Pending) and src.extra.get("fusable") and src.act[0] is None:
            L.env[out] = Pending(src.finish, None, ("clamp", lo, hi), src.node, src.op,
                                 src.extra)
            return
        x = L.deq_tensor(node.input[0])
        fn = "relu" if op == "Relu" else "clip"
        args = {} if op == "Relu" else {"min": lo, "max": hi}
        pending(lambda o, q, *a: ops.emit_lut(b, o, x, q, fn, **args), x.quant)
        return
    if op in ("LeakyRelu", "Sigmoid", "Tanh", "HardSigmoid", "HardSwish"):
        x = L.deq_tensor(node.input[0])
        fn = {"LeakyRelu": "leaky_relu", "Sigmoid": "sigmoid", "Tanh": "tanh",
              "HardSigmoid": "hard_sigmoid", "HardSwish": "hard_swish"}[op]
        args = {}
        if op == "LeakyRelu":
            args = {"alpha": float(attrs.get("alpha", 0.01))}
        if op == "HardSigmoid":
            args = {"alpha": float(attrs.get("alpha", 0.2)), "beta": float(attrs.get("beta", 0.5))}
        pending(lambda o, q, *a: ops.emit_lut(b, o, x, q, fn, **args))
        return
    if op == "Conv":
        x, w = L.deq_tensor(node.input[0]), L.deq_tensor(node.input[1], "weight")
        bias, bscale = _bias(L, node.input[2] if len(node.input) > 2 else "")

        def fin(o, q, kind, lo, hi):
            bi = ops.bias_to_int32(b, bias, bscale, x.quant, w.quant, w.shape[0])
            return ops.emit_conv(b, o, x, w, bi, q, activation_range(kind, lo, hi, q), attrs)
        pending(fin, fusable=True)
        return
    if op in ("Gemm", "MatMul"):
        x, w = L.deq_tensor(node.input[0]), L.deq_tensor(node.input[1], "weight")
        layout = "kn"
        bias = bscale = None
        if op == "Gemm":
            if attrs.get("transA", 0):
                raise L.error("Gemm with transA=1 is not supported")
            if attrs.get("alpha", 1.0) != 1.0 or (len(node.input) > 2 and
                                                   attrs.get("beta", 1.0) != 1.0):
                raise L.error("Gemm with alpha or beta other than 1 is not supported")
            layout = "nk" if attrs.get("transB", 0) else "kn"
            bias, bscale = _bias(L, node.input[2] if len(node.input) > 2 else "")
        n = w.shape[0] if layout == "nk" else w.shape[-1]

        def with_bias(bias, bscale):
            def fin(o, q, kind, lo, hi):
                bi = None if bias is None else ops.bias_to_int32(b, bias, bscale, x.quant,
                                                                w.quant, n)
                return ops.emit_fc(b, o, x, w, bi, q, activation_range(kind, lo, hi, q),
                                   layout)
            return fin
        pending(with_bias(bias, bscale), fusable=True)
        if bias is None and w.is_const and len(w.shape) == 2:  # an Add may bring the bias
            L.env[out].extra.update(with_bias=with_bias, bias_size=n, rank=len(x.shape))
        return
    if op == "Add" and _fold_bias(L, node, out):
        return
    if op in ("Add", "Mul"):
        a, c = L.deq_tensor(node.input[0]), L.deq_tensor(node.input[1])
        kind = op.lower()
        pending(lambda o, q, k, lo, hi: ops.emit_binary(b, kind, o, a, c, q,
                                                        activation_range(k, lo, hi, q)),
                fusable=True)
        return
    if op in ("AveragePool", "GlobalAveragePool"):
        x = L.deq_tensor(node.input[0])
        pa = dict(attrs, **({"global": True} if op == "GlobalAveragePool" else {}))
        pending(lambda o, q, *a: ops.emit_pool(b, "avgpool", o, x, q, pa), x.quant)
        return
    if op == "BatchNormalization":
        x = L.deq_tensor(node.input[0])
        if attrs.get("training_mode", 0) or any(o for o in node.output[1:]):
            raise L.error("BatchNormalization in training mode is not supported")
        what = ("scale", "B", "mean", "var")
        params = [_real_const(L, node.input[i + 1], f"BatchNormalization {w}")
                  for i, w in enumerate(what)]
        eps = float(attrs.get("epsilon", 1e-5))

        def fin(o, q, kind, lo, hi):
            return ops.emit_batch_norm(b, o, x, params, eps, q, activation_range(kind, lo, hi, q))
        pending(fin, fusable=True)
        return
    if op == "ReduceMean":
        x = L.deq_tensor(node.input[0])
        axes = attrs.get("axes")  # an attribute before opset 18, then an input
        if axes is None and len(node.input) > 1 and node.input[1]:
            axes = L.const(node.input[1], "ReduceMean axes").reshape(-1).tolist()
        axes = ops.reduce_axes(b, len(x.shape), axes, int(attrs.get("noop_with_empty_axes", 0)))
        if axes is None:  # noop_with_empty_axes and no axes: the input itself
            L.env[out] = Deq(ops.emit_view(b, out, x, x.shape))
            return
        keep = bool(attrs.get("keepdims", 1))
        pending(lambda o, q, *a: ops.emit_reduce_mean(b, o, x, q, axes, keep), x.quant)
        return
    if op in VIEWS and isinstance(L.value(node.input[0]), Pending):
        # a reshape between a float op and its QuantizeLinear: quantize, then reshape
        # (the same bytes), so the op still gets the QuantizeLinear's scale
        src = L.value(node.input[0])

        def view_after(o, q, *act):
            t = src.finish(o + "_pre", q, *act)
            b.at(*here)
            return lower_data_movement(L, node, t, attrs, o)
        L.env[out] = Pending(view_after, src.transparent_q, src.act, src.node, src.op, {})
        return
    if op == "Softmax":
        x = L.deq_tensor(node.input[0])
        axis = int(attrs.get("axis", -1 if L.opset >= 13 else 1))
        pending(lambda o, q, *a: ops.emit_softmax(b, o, x, q, axis, L.opset))
        return
    if op == "Concat":
        xs = [L.deq_tensor(n) for n in node.input]
        same = all(ops.same_quant(t.quant, xs[0].quant) for t in xs)
        pending(lambda o, q, *a: ops.emit_concat(b, o, xs, q, int(attrs["axis"])),
                xs[0].quant if same else None)
        return
    # Data movement keeps the input's scale: emit now, as a dequantized value.
    x = L.deq_tensor(node.input[0])
    L.env[out] = Deq(lower_data_movement(L, node, x, attrs, out))


def _real_const(L, name: str, what: str) -> np.ndarray:
    """The real value of a constant input: a float initializer, or DequantizeLinear of a
    constant (per-tensor or along its only axis), as the ONNX definition gives it."""
    from tinygen.frontend.lower import Deq

    v = L.value(name)
    if isinstance(v, Deq) and v.t.is_const and v.t.quant is not None:
        t, q = v.t, v.t.quant
        data = t.data.astype(np.int64)
        if q.per_axis and data.ndim != 1:
            raise L.error(f"{what} ('{name}') is quantized along an axis of a rank-{data.ndim} "
                          "tensor; one value per channel expected")
        return ((data - np.asarray(q.zero_point, np.int64)).astype(np.float32)
                * np.asarray(q.scale, np.float32)).astype(np.float32)
    # float64 (or float16) parameters: float32 only where the value is exactly the same
    return checked_cast(L.const(name, what), np.float32, f"{what} ('{name}')", L.error)


def _fold_bias(L, node, out) -> bool:
    """MatMul then Add of a constant vector, both in float before one QuantizeLinear (a
    Linear layer as exporters write it): the vector becomes the fully connected op's bias."""
    from tinygen.frontend.lower import Const, Deq, Pending

    for mm, other in ((0, 1), (1, 0)):
        p = L.value(node.input[mm])
        if not (isinstance(p, Pending) and p.extra.get("with_bias") and p.act[0] is None):
            continue
        v = L.value(node.input[other])
        n = p.extra["bias_size"]
        if isinstance(v, Const):
            bias, bscale = np.asarray(v.a, dtype=np.float64), None
        elif isinstance(v, Deq) and v.t.is_const and v.t.quant is not None \
                and v.t.quant.scale.size == 1:
            t = v.t
            if t.dtype == "int32":
                bias, bscale = t.data, t.quant.scale
            else:  # an int8 constant: its real value, re-quantized at s_x * s_w
                bias = (t.data.astype(np.float64) - t.quant.scalar_zp()) * t.quant.scalar_scale()
                bscale = None
        else:
            continue
        if bias.size != n or bias.ndim > p.extra["rank"] or (bias.ndim and bias.shape[-1] != n):
            continue  # not one value per output column: an ordinary Add
        L.env[out] = Pending(p.extra["with_bias"](bias.reshape(-1), bscale), None,
                             (None, None, None), p.node, p.op, {"fusable": True})
        return True
    return False


def lower_data_movement(L, node, x, attrs, out):
    """Ops that move bytes without changing their scale (shared with the QOperator form)."""
    op, b = node.op_type, L.b
    if op == "MaxPool":
        if len(node.output) > 1 and node.output[1]:
            raise L.error("MaxPool Indices output is not supported")
        return ops.emit_pool(b, "maxpool", out, x, x.quant, attrs)
    if op == "Identity":
        return ops.emit_view(b, out, x, x.shape)
    if op == "Flatten":
        axis, rank = int(attrs.get("axis", 1)), len(x.shape)
        if not -rank <= axis <= rank:  # ONNX Flatten: axis in [-r, r]
            raise L.error(f"Flatten axis {axis} is out of range for rank {rank}")
        axis = axis + rank if axis < 0 else axis
        lead = int(np.prod(x.shape[:axis], dtype=np.int64))
        return ops.emit_view(b, out, x, (lead, x.size // max(lead, 1)))
    if op == "Reshape":
        shape = ops.resolve_reshape(b, x.shape, L.const(node.input[1], "Reshape shape"),
                                    int(attrs.get("allowzero", 0)))
        return ops.emit_view(b, out, x, shape)
    if op in ("Squeeze", "Unsqueeze"):
        axes = attrs.get("axes")
        if axes is None and len(node.input) > 1 and node.input[1]:
            axes = L.const(node.input[1], f"{op} axes").reshape(-1).tolist()
        shape = list(x.shape)
        if op == "Squeeze":
            rank = len(shape)
            axes = [_axis(L, a, rank, "Squeeze axes") for a in
                    (axes if axes is not None else [i for i, d in enumerate(shape) if d == 1])]
            if any(shape[a] != 1 for a in axes):
                raise L.error(f"cannot squeeze axes {axes} of shape {shape}")
            shape = [d for i, d in enumerate(shape) if i not in axes]
        else:
            rank = len(shape) + len(axes or [])
            axes = sorted(_axis(L, a, rank, "Unsqueeze axes") for a in (axes or []))
            if len(set(axes)) != len(axes):
                raise L.error(f"Unsqueeze axes {axes} repeat an axis")
            for a in axes:
                shape.insert(a, 1)
        return ops.emit_view(b, out, x, shape)
    if op == "Transpose":
        return ops.emit_transpose(b, out, x, attrs.get("perm"))
    if op == "Pad":
        mode = attrs.get("mode", b"constant")
        mode = mode.decode() if isinstance(mode, bytes) else mode
        if mode != "constant":
            raise L.error(f"Pad mode '{mode}' is not supported (constant only)")
        pads = attrs.get("pads")
        if pads is None:
            pads = L.const(node.input[1], "Pad pads").reshape(-1).tolist()
        if len(node.input) > 3 and node.input[3]:
            raise L.error("Pad with an axes input is not supported")
        return ops.emit_pad(b, out, x, pads, _pad_value(L, node, x))
    raise L.error(f"op {op} is not supported here")


def _axis(L, axis: int, rank: int, what: str) -> int:
    """An ONNX axis in [-rank, rank) as a non-negative index, or a clear error."""
    if not -rank <= int(axis) < rank:
        raise L.error(f"{what} {axis} is out of range for rank {rank}")
    return int(axis) % rank


def _pad_value(L, node, x) -> int:
    """The pad value in x's int8 domain: a raw int constant (QOperator) or a real one."""
    from tinygen.frontend.lower import Const, Deq

    if len(node.input) < 3 or not node.input[2]:
        return quantize_real(0.0, x.quant)
    v = L.value(node.input[2])
    if isinstance(v, Deq) and v.t.is_const:
        return int(v.t.data.reshape(-1)[0])  # same quantization as x (checked upstream)
    if isinstance(v, Const) and np.asarray(v.a).dtype.kind in "iu":
        src = np.uint8 if x.quant.src_dtype == "uint8" else np.int8
        raw = int(checked_cast(np.asarray(v.a).reshape(-1)[:1], src, "Pad constant_value",
                               L.error)[0])
        return raw - 128 if x.quant.src_dtype == "uint8" else raw
    if isinstance(v, Const):
        return quantize_real(float(np.asarray(v.a).reshape(-1)[0]), x.quant)
    raise L.error("Pad constant_value must be a constant")


FLOAT_OPS = ("Conv", "Gemm", "MatMul", "Add", "Mul", "Concat", "MaxPool", "AveragePool",
             "GlobalAveragePool", "ReduceMean", "BatchNormalization", "Relu", "Clip",
             "LeakyRelu", "Sigmoid", "Tanh", "HardSigmoid", "HardSwish", "Softmax", "Reshape",
             "Flatten", "Squeeze", "Unsqueeze", "Transpose", "Pad", "Identity")
# Ops that only give the same bytes another shape.
VIEWS = ("Reshape", "Flatten", "Squeeze", "Unsqueeze", "Identity")
