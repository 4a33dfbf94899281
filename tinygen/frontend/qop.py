"""QOperator form: QLinear* ops (ONNX and com.microsoft contrib) and ConvInteger /
MatMulInteger, each mapped straight to one integer op. Scales and zero points must be
constant initializers (they are compiled into flash)."""
from __future__ import annotations

import numpy as np
from onnx import helper

from tinygen.frontend import ops
from tinygen.frontend.build import INT8_MAX, INT8_MIN
from tinygen.frontend.spec import checked_cast

FULL = (INT8_MIN, INT8_MAX)


def _attrs(node) -> dict:
    return {a.name: helper.get_attribute_value(a) for a in node.attribute}


def _elem_type(L, name: str):
    """The 8-bit type of `name` (its ONNX type, or the one it was quantized to): the type
    of the default zero point 0 when an integer op leaves it out."""
    from tinygen.frontend.lower import Const, Int

    v = L.value(name)
    if isinstance(v, Int) and v.t.quant is not None:
        return np.dtype(v.t.quant.src_dtype)
    if isinstance(v, Const):
        return np.asarray(v.a).dtype
    return L.view.dtypes.get(name)


def _zp(L, node, i, like):
    zp = L.opt_const(node, i, "zero point")
    if zp is None:
        return np.zeros((), like if like is not None else np.uint8)
    return zp


def operand(L, name: str, scale, zp, axis_for_const: int | None = None):
    """The IR tensor for a quantized operand: activation, int graph input or constant.

    scale None: the op reads integers only (ConvInteger, MatMulInteger), so an activation
    keeps whatever scale it was written with; only its zero point must agree.
    """
    from tinygen.frontend.lower import Const, FloatIn, Int

    v = L.value(name)
    if scale is None:
        written = v.t.quant if isinstance(v, Int) else None
        scale = written.scale if written is not None else np.ones(np.shape(zp), np.float32)
    src = np.asarray(zp).dtype
    if src not in (np.int8, np.uint8):
        raise L.error(f"zero point of '{name}' has type {src}; int8 or uint8 expected")
    if isinstance(v, Const):
        a = np.asarray(v.a)
        if a.dtype not in (np.int8, np.uint8):
            raise L.error(f"constant '{name}' has type {a.dtype}; int8 or uint8 expected")
        if a.dtype != src and np.any(np.asarray(zp) != 0):  # a cast would change the value
            raise L.error(f"zero point of '{name}' has type {src}, the data {a.dtype}")
        if a.dtype != src and np.asarray(zp).size:
            src = a.dtype
        per_axis = np.asarray(scale).size > 1 or np.asarray(zp).size > 1
        ax = axis_for_const if per_axis else None
        q = L.b.quant(scale, checked_cast(zp, a.dtype, f"zero point of '{name}'", L.error),
                      a.dtype, axis=ax)
        return L.b.const_int8(name, a, a.dtype, q)
    if np.asarray(scale).size != 1 or np.asarray(zp).size != 1:
        raise L.error(f"activation '{name}' must be quantized per-tensor")
    q = L.b.quant(scale, zp, src)
    if isinstance(v, FloatIn):
        dt = L.view.dtypes.get(name)
        if dt is None or np.dtype(dt) not in (np.int8, np.uint8):
            raise L.error(f"float graph input '{name}' feeds a QLinear op directly "
                          "(a QuantizeLinear is missing)")
        zp_dt = checked_cast(zp, dt, f"zero point of '{name}'", L.error)
        return L.quantize_input(name, L.b.quant(scale, zp_dt, dt), dt)
    if isinstance(v, Int):
        if not ops.same_quant(v.t.quant, q):
            raise L.error(f"'{name}' is read with scale/zero point other than it was "
                          "written with")
        return v.t
    raise L.error(f"'{name}' is not a quantized tensor")


def _out_q(L, node, si, zi, like):
    scale = L.const(node.input[si], "output scale")
    zp = _zp(L, node, zi, like)
    if np.asarray(scale).size != 1:
        raise L.error("output must be quantized per-tensor")
    return L.b.quant(scale, zp, np.asarray(zp).dtype)


def _bind(L, name, t):
    from tinygen.frontend.lower import Int
    L.env[name] = Int(t)


def qlinear_conv(L, node):
    a = _attrs(node)
    xs, wsc = L.const(node.input[1], "scale"), L.const(node.input[4], "scale")
    x = operand(L, node.input[0], xs, _zp(L, node, 2, None))
    w = operand(L, node.input[3], wsc, _zp(L, node, 5, None), axis_for_const=0)
    yq = _out_q(L, node, 6, 7, None)
    bias = L.opt_const(node, 8, "bias")
    bi = ops.bias_to_int32(L.b, bias, None, x.quant, w.quant, w.shape[0])
    _bind(L, node.output[0], ops.emit_conv(L.b, node.output[0], x, w, bi, yq, FULL, a))


def conv_integer(L, node):
    a = _attrs(node)
    xzp = _zp(L, node, 2, _elem_type(L, node.input[0]))
    x = operand(L, node.input[0], None, xzp)
    wzp = _zp(L, node, 3, np.asarray(L.const(node.input[1], "weight")).dtype)
    w = operand(L, node.input[1], np.ones(np.shape(wzp), np.float32), wzp, axis_for_const=0)
    bias = np.zeros(w.shape[0], np.int32)
    _bind(L, node.output[0], ops.emit_conv(L.b, node.output[0], x, w, bias, None, FULL, a))


def _matmul_right(L, name, scale, zp):
    """Right operand: constant [K, N] (per-column scales allowed) or a rank-2 activation."""
    return operand(L, name, scale, zp, axis_for_const=1)


def qlinear_matmul(L, node):
    a_s, b_s = L.const(node.input[1], "scale"), L.const(node.input[4], "scale")
    x = operand(L, node.input[0], a_s, _zp(L, node, 2, None))
    w = _matmul_right(L, node.input[3], b_s, _zp(L, node, 5, None))
    yq = _out_q(L, node, 6, 7, None)
    _bind(L, node.output[0], ops.emit_fc(L.b, node.output[0], x, w, None, yq, FULL, "kn"))


def matmul_integer(L, node):
    xzp = _zp(L, node, 2, _elem_type(L, node.input[0]))
    x = operand(L, node.input[0], None, xzp)
    wzp = _zp(L, node, 3, _elem_type(L, node.input[1]))
    w = _matmul_right(L, node.input[1], None, wzp)
    _bind(L, node.output[0], ops.emit_fc(L.b, node.output[0], x, w, None, None, FULL, "kn"))


def qgemm(L, node):
    a = _attrs(node)
    if a.get("transA", 0):
        raise L.error("QGemm with transA=1 is not supported")
    if a.get("alpha", 1.0) != 1.0:
        raise L.error("QGemm with alpha other than 1 is not supported")
    if len(node.input) < 8 or not node.input[7]:
        raise L.error("QGemm without y_scale (float output) is not supported")
    a_s, b_s = L.const(node.input[1], "scale"), L.const(node.input[4], "scale")
    x = operand(L, node.input[0], a_s, _zp(L, node, 2, None))
    layout = "nk" if a.get("transB", 0) else "kn"
    w = operand(L, node.input[3], b_s, _zp(L, node, 5, None),
                axis_for_const=0 if layout == "nk" else 1)
    yq = _out_q(L, node, 7, 8, None)
    n = w.shape[0] if layout == "nk" else w.shape[1]
    bias = L.opt_const(node, 6, "bias")
    bi = None if bias is None else ops.bias_to_int32(L.b, bias, None, x.quant, w.quant, n)
    _bind(L, node.output[0], ops.emit_fc(L.b, node.output[0], x, w, bi, yq, FULL, layout))


def qlinear_binary(L, node):
    kind = "add" if node.op_type == "QLinearAdd" else "mul"
    a = operand(L, node.input[0], L.const(node.input[1], "scale"), _zp(L, node, 2, None))
    c = operand(L, node.input[3], L.const(node.input[4], "scale"), _zp(L, node, 5, None))
    yq = _out_q(L, node, 6, 7, None)
    _bind(L, node.output[0], ops.emit_binary(L.b, kind, node.output[0], a, c, yq, FULL))


def qlinear_concat(L, node):
    a = _attrs(node)
    yq = _out_q(L, node, 0, 1, None)
    xs = []
    for i in range(2, len(node.input), 3):
        xs.append(operand(L, node.input[i], L.const(node.input[i + 1], "scale"),
                          _zp(L, node, i + 2, None)))
    _bind(L, node.output[0], ops.emit_concat(L.b, node.output[0], xs, yq, int(a["axis"])))


def qlinear_pool(L, node):
    a = _attrs(node)
    if a.pop("channels_last", 0):
        raise L.error("channels_last=1 pooling input is not supported")
    x = operand(L, node.input[0], L.const(node.input[1], "scale"), _zp(L, node, 2, None))
    yq = _out_q(L, node, 3, 4, None)
    if node.op_type == "QLinearGlobalAveragePool":
        a["global"] = True
    _bind(L, node.output[0], ops.emit_pool(L.b, "avgpool", node.output[0], x, yq, a))


def qlinear_unary(L, node):
    a = _attrs(node)
    x = operand(L, node.input[0], L.const(node.input[1], "scale"), _zp(L, node, 2, None))
    yq = _out_q(L, node, 3, 4, None)
    out = node.output[0]
    if node.op_type == "QLinearSigmoid":
        t = ops.emit_lut(L.b, out, x, yq, "sigmoid")
    elif node.op_type == "QLinearLeakyRelu":
        t = ops.emit_lut(L.b, out, x, yq, "leaky_relu", alpha=float(a.get("alpha", 0.01)))
    else:  # QLinearSoftmax
        axis = int(a.get("axis", -1))
        t = ops.emit_softmax(L.b, out, x, yq, axis, int(a.get("opset", 13)))
    _bind(L, out, t)


def int_data_movement(L, node):
    """MaxPool / Reshape / Transpose / ... applied to an int tensor directly."""
    from tinygen.frontend.qdq import lower_data_movement
    x = L.int_tensor(node.input[0])
    _bind(L, node.output[0], lower_data_movement(L, node, x, _attrs(node), node.output[0]))


INT_OPS = {
    "QLinearConv": qlinear_conv, "ConvInteger": conv_integer,
    "QLinearMatMul": qlinear_matmul, "MatMulInteger": matmul_integer, "QGemm": qgemm,
    "QLinearAdd": qlinear_binary, "QLinearMul": qlinear_binary,
    "QLinearConcat": qlinear_concat, "QLinearAveragePool": qlinear_pool,
    "QLinearGlobalAveragePool": qlinear_pool, "QLinearSigmoid": qlinear_unary,
    "QLinearLeakyRelu": qlinear_unary, "QLinearSoftmax": qlinear_unary,
    "MaxPool": int_data_movement, "Reshape": int_data_movement, "Flatten": int_data_movement,
    "Squeeze": int_data_movement, "Unsqueeze": int_data_movement,
    "Transpose": int_data_movement, "Pad": int_data_movement, "Identity": int_data_movement,
}
