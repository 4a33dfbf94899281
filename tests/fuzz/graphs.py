"""Hypothesis strategies for valid quantized graphs.

Two sources:
  float_nets   float graphs (tests/modelgen.Net) of conv / depthwise conv / pooling / Pad /
               Transpose / Concat / Add / Mul / activations / Flatten + Gemm / Softmax, with
               random shapes, strides, pads, groups and dilations; quantized afterwards by
               onnxruntime's quantize_static (QDQ or QOperator, uint8 or int8 activations),
               so the graphs are what a user's toolchain writes.
  qop_graphs   QOperator graphs written directly with onnx.helper, for what calibration never
               produces: scales across orders of magnitude, zero points at the ends of their
               range, weights at -128/127, large biases.
Shapes are tracked while drawing so that every drawn graph is valid ONNX.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import onnx
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper

from tests.modelgen import Net

ACTIVATIONS = ["Relu", "Clip", "LeakyRelu", "Sigmoid", "Tanh", "HardSwish", "HardSigmoid"]


def window_out(n: int, k: int, s: int, p0: int, p1: int, d: int, ceil: bool = False) -> int:
    """ONNX Conv/pool output length (0 when the window does not fit)."""
    span = n + p0 + p1 - ((k - 1) * d + 1)
    if span < 0:
        return 0
    out = (-(-span // s) if ceil else span // s) + 1
    if ceil and (out - 1) * s >= n + p0:  # the last window must start inside (ONNX)
        out -= 1
    return out


@dataclass
class FloatCase:
    """A drawn float graph and how to quantize it (repr lists the layers, for reports)."""

    model: onnx.ModelProto = field(repr=False)
    layers: list[str]
    input_shape: tuple
    fmt: str
    activations: str
    weights: str
    per_channel: bool
    seed: int


class Shaped:
    """A Net plus the current tensor and its shape while layers are drawn."""

    def __init__(self, draw, shape, seed):
        self.draw = draw
        self.net = Net(shape, seed=seed)
        self.x = "input"
        self.shape = list(shape)
        self.layers: list[str] = []

    @property
    def spatial(self) -> list[int]:
        return self.shape[2:]

    def add(self, text: str, out: str, shape) -> None:
        self.layers.append(text)
        self.x, self.shape = out, list(shape)


def _window(draw, n: int, pool: bool):
    """(k, stride, pad0, pad1, dilation) that fit a length-n axis."""
    k = draw(st.integers(1, min(5, n + 2)))
    d = draw(st.integers(1, 2)) if k > 1 else 1
    hi = k - 1 if pool else 2  # ONNX/onnxruntime pooling wants pads < kernel
    p0, p1 = draw(st.integers(0, hi)), draw(st.integers(0, hi))
    s = draw(st.integers(1, 3))
    if window_out(n, k, s, p0, p1, d) < 1:
        k, d, p0, p1 = 1, 1, 0, 0
    return k, s, p0, p1, d


def draw_conv(g: Shaped, same_shape: bool = False) -> str:
    draw, cin = g.draw, g.shape[1]
    sp = g.spatial
    if same_shape:  # stride 1, odd kernel, "same" pads: the output shape is the input's
        k = draw(st.sampled_from([1, 3]))
        ks, strides, dil = [k] * len(sp), [1] * len(sp), [1] * len(sp)
        pads = [k // 2] * (2 * len(sp))
    else:
        wins = [_window(draw, n, pool=False) for n in sp]
        ks = [w[0] for w in wins]
        strides = [w[1] for w in wins]
        pads = [w[2] for w in wins] + [w[3] for w in wins]
        dil = [w[4] for w in wins]
    groups = [1] + [gr for gr in range(2, cin + 1) if cin % gr == 0]
    group = draw(st.sampled_from(groups)) if not same_shape else \
        draw(st.sampled_from([gr for gr in groups if cin % gr == 0]))
    if same_shape:
        cout = cin
    elif group == cin and cin > 1:
        cout = cin * draw(st.integers(1, 2))  # depthwise (channel multiplier 1 or 2)
    else:
        cout = group * draw(st.integers(1, max(1, 8 // group)))
    bias = draw(st.booleans())
    out = g.net.conv(g.x, cin, cout, tuple(ks), group=group, bias=bias, pads=pads,
                     strides=strides, dilations=dil)
    shape = [1, cout] + [window_out(n, ks[i], strides[i], pads[i], pads[i + len(sp)], dil[i])
                         for i, n in enumerate(sp)]
    g.add(f"Conv(k={ks}, s={strides}, p={pads}, d={dil}, g={group}, cout={cout})", out, shape)
    return out


def draw_activation(g: Shaped) -> None:
    act = g.draw(st.sampled_from(ACTIVATIONS))
    n = g.net
    if act == "Clip":
        out = n.op("Clip", [g.x, n.const(np.float32(0.0)), n.const(np.float32(6.0))])
    elif act == "LeakyRelu":
        out = n.op("LeakyRelu", [g.x], alpha=g.draw(st.sampled_from([0.01, 0.1, 0.3])))
    else:
        out = n.op(act, [g.x])
    g.add(act, out, g.shape)


def draw_pool(g: Shaped, kind: str) -> None:
    draw, sp = g.draw, g.spatial
    if kind == "GlobalAveragePool":
        g.add(kind, g.net.op(kind, [g.x]), g.shape[:2] + [1] * len(sp))
        return
    ceil = draw(st.booleans()) if kind == "MaxPool" else False
    wins = [_window(draw, n, pool=True) for n in sp]
    ks, strides = [w[0] for w in wins], [w[1] for w in wins]
    pads = [w[2] for w in wins] + [w[3] for w in wins]
    attrs = {"kernel_shape": ks, "strides": strides, "pads": pads, "ceil_mode": int(ceil)}
    dil = [1] * len(sp)
    if kind == "MaxPool" and draw(st.booleans()):
        dil = [w[4] for w in wins]
        attrs["dilations"] = dil
    if kind == "AveragePool":
        attrs["count_include_pad"] = int(draw(st.booleans()))
    shape = g.shape[:2] + [window_out(n, ks[i], strides[i], pads[i], pads[i + len(sp)], dil[i],
                                      ceil) for i, n in enumerate(sp)]
    if min(shape[2:]) < 1:
        return
    g.add(f"{kind}({attrs})", g.net.op(kind, [g.x], **attrs), shape)


def draw_pad(g: Shaped) -> None:
    rank = len(g.shape)
    spatial = [g.draw(st.integers(0, 2)) for _ in range(2 * (rank - 2))]
    before, after = spatial[:rank - 2], spatial[rank - 2:]
    pads = [0, 0, *before, 0, 0, *after]
    out = g.net.op("Pad", [g.x, g.net.const(np.array(pads, np.int64))])
    shape = [g.shape[i] + pads[i] + pads[i + rank] for i in range(rank)]
    g.add(f"Pad({pads})", out, shape)


def draw_branches(g: Shaped, kind: str) -> None:
    """Concat of two convs of x, or x Add/Mul conv(x) (a residual connection)."""
    x, shape = g.x, list(g.shape)
    if kind == "Concat":
        a = draw_conv(g, same_shape=True)
        g.x, g.shape = x, shape
        b = draw_conv(g, same_shape=True)
        out = g.net.op("Concat", [a, b], axis=1)
        g.add("Concat(axis=1)", out, [1, 2 * shape[1], *shape[2:]])
    else:
        y = draw_conv(g, same_shape=True)
        out = g.net.op(kind, [x, y])
        g.add(kind, out, shape)


def draw_layer(g: Shaped) -> None:
    kind = g.draw(st.sampled_from(["conv", "conv_act", "conv_act", "MaxPool", "AveragePool",
                                   "GlobalAveragePool", "Pad", "Transpose", "Concat", "Add",
                                   "Mul"]))
    if kind == "conv":
        draw_conv(g)
    elif kind == "conv_act":
        draw_conv(g)
        draw_activation(g)
        if g.layers[-1] in ("Tanh", "HardSwish", "HardSigmoid"):
            draw_conv(g)  # onnxruntime quantizes these only when a quantized op reads them
    elif kind in ("MaxPool", "AveragePool", "GlobalAveragePool"):
        draw_pool(g, kind)
    elif kind == "Pad":
        draw_pad(g)
    elif kind == "Transpose" and len(g.shape) == 4:
        perm = [0, 1, 3, 2]
        g.add("Transpose(0,1,3,2)", g.net.op("Transpose", [g.x], perm=perm),
              [g.shape[p] for p in perm])
    elif kind in ("Concat", "Add", "Mul"):
        draw_branches(g, kind)


@st.composite
def float_nets(draw) -> FloatCase:
    """A random float conv net (see module docstring) and its quantization options."""
    rank = draw(st.sampled_from([3, 4, 4]))
    channels = draw(st.integers(1, 6))
    spatial = [draw(st.integers(2, 10)) for _ in range(rank - 2)]
    seed = draw(st.integers(0, 2**16))
    g = Shaped(draw, [1, channels, *spatial], seed)
    # a conv first: onnxruntime's quantizer leaves a leading pooling/Transpose in float
    draw_conv(g)
    for _ in range(draw(st.integers(0, 3))):
        draw_layer(g)
    if draw(st.booleans()):  # classifier head
        size = int(np.prod(g.shape))
        flat = g.net.op("Flatten", [g.x])
        g.add("Flatten", flat, [1, size])
        n = draw(st.integers(1, 10))
        g.add(f"Gemm(n={n})", g.net.gemm(flat, size, n), [1, n])
        if draw(st.booleans()):
            g.add("Softmax", g.net.op("Softmax", [g.x], axis=-1), g.shape)
    model = g.net.model(g.x)
    fmt = draw(st.sampled_from(["qdq", "qop"]))
    return FloatCase(model, g.layers, (1, channels, *spatial), fmt,
                     draw(st.sampled_from(["uint8", "int8"])),
                     draw(st.sampled_from(["int8", "int8", "uint8"])),
                     draw(st.booleans()), seed)


# -- QOperator graphs with extreme parameters ---------------------------------------------------

def _log_scale(draw, lo: float = -5, hi: float = 2) -> np.float32:
    """A scale spread over orders of magnitude (log-uniform in [10^lo, 10^hi]; now and then
    far outside it, where requantization multipliers leave the representable range)."""
    if draw(st.integers(0, 9)) == 0:
        lo, hi = lo - 4, hi + 3
    return np.float32(10.0 ** draw(st.floats(lo, hi, allow_nan=False)))


def _zero_point(draw, dtype) -> np.ndarray:
    ends = [0, 1, 127, 128, 254, 255] if dtype == np.uint8 else [-128, -127, -1, 0, 1, 126, 127]
    lo, hi = (0, 255) if dtype == np.uint8 else (-128, 127)
    return np.array(draw(st.one_of(st.sampled_from(ends), st.integers(lo, hi))), dtype)


def _weights(draw, shape, dtype) -> np.ndarray:
    lo, hi = (0, 255) if dtype == np.uint8 else (-128, 127)
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    mode = draw(st.sampled_from(["uniform", "uniform", "ends", "constant"]))
    if mode == "ends":
        return rng.choice(np.array([lo, hi]), size=shape).astype(dtype)
    if mode == "constant":
        return np.full(shape, draw(st.sampled_from([lo, hi])), dtype)
    return rng.integers(lo, hi + 1, size=shape).astype(dtype)


@dataclass
class QopCase:
    model: onnx.ModelProto = field(repr=False)
    layers: list[str]


class QopBuilder:
    """Nodes and initializers of a QOperator chain; every activation carries (scale, zp)."""

    def __init__(self, draw, act_dtype, w_dtype):
        self.draw, self.act, self.wdt = draw, act_dtype, w_dtype
        self.nodes, self.inits, self.layers = [], [], []
        self._n = 0
        self.max_channels = 6

    def name(self, base: str) -> str:
        self._n += 1
        return f"{base}{self._n}"

    def const(self, arr, base: str = "c") -> str:
        n = self.name(base)
        self.inits.append(numpy_helper.from_array(np.asarray(arr), n))
        return n

    def quant(self) -> tuple[str, str]:
        """Initializers for a fresh activation (scale, zero point)."""
        return self.const(_log_scale(self.draw), "s"), self.const(
            _zero_point(self.draw, self.act), "z")

    def finish(self, in_shape, out_shape, out_type) -> QopCase:
        g = helper.make_graph(self.nodes, "qop_fuzz", [helper.make_tensor_value_info(
            "x", TensorProto.FLOAT, in_shape)], [helper.make_tensor_value_info(
                "y", out_type, out_shape)], self.inits)
        m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17),
                                                helper.make_opsetid("com.microsoft", 1)])
        m.ir_version = 8
        return QopCase(m, [f"input {list(in_shape)} {np.dtype(self.act).name}"] + self.layers)

    def node(self, op: str, ins, outs, domain: str | None = None, **attrs) -> None:
        self.nodes.append(helper.make_node(op, ins, outs, name=self.name(op.lower()),
                                           domain=domain, **attrs))


def _qconv(b: QopBuilder, x, xq, shape):
    draw, cin = b.draw, shape[1]
    sp = shape[2:]
    wins = [_window(draw, n, pool=False) for n in sp]
    ks = [w[0] for w in wins]
    strides, dil = [w[1] for w in wins], [w[4] for w in wins]
    pads = [w[2] for w in wins] + [w[3] for w in wins]
    depthwise = cin > 1 and draw(st.booleans())
    group = cin if depthwise else 1
    cout = cin if depthwise else draw(st.integers(1, b.max_channels))
    w = _weights(draw, (cout, cin // group, *ks), b.wdt)
    per_channel = draw(st.booleans())
    w_scale = np.array([_log_scale(draw, -4, 1) for _ in range(cout)], np.float32) \
        if per_channel else _log_scale(draw, -4, 1)
    w_zp = np.zeros(cout if per_channel else (), b.wdt) if b.wdt == np.int8 or per_channel \
        else _zero_point(draw, b.wdt)
    taps = int(np.prod(ks)) * (cin // group)
    bias_hi = draw(st.sampled_from([0, 100, 2**16, 2**24]))
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    bias = rng.integers(-bias_hi, bias_hi + 1, cout).astype(np.int32)
    yq = b.quant()
    y = b.name("conv")
    b.node("QLinearConv", [x, *xq, b.const(w, "w"), b.const(w_scale, "ws"),
                           b.const(w_zp, "wz"), *yq, b.const(bias, "b")], [y],
           group=group, kernel_shape=ks, strides=strides, pads=pads, dilations=dil)
    out = [1, cout] + [window_out(n, ks[i], strides[i], pads[i], pads[i + len(sp)], dil[i])
                       for i, n in enumerate(sp)]
    b.layers.append(f"QLinearConv(k={ks}, s={strides}, p={pads}, d={dil}, g={group}, "
                    f"cout={cout}, taps={taps}, per_channel={per_channel}, bias<={bias_hi})")
    return y, yq, out


def _qpool(b: QopBuilder, x, xq, shape):
    draw = b.draw
    kind = draw(st.sampled_from(["MaxPool", "QLinearAveragePool", "QLinearGlobalAveragePool"]))
    if kind == "QLinearGlobalAveragePool":
        yq, y = b.quant(), b.name("gap")
        b.node(kind, [x, *xq, *yq], [y], domain="com.microsoft")
        b.layers.append(kind)
        return y, yq, shape[:2] + [1] * (len(shape) - 2)
    wins = [_window(draw, n, pool=True) for n in shape[2:]]
    ks, strides = [w[0] for w in wins], [w[1] for w in wins]
    pads = [w[2] for w in wins] + [w[3] for w in wins]
    out = shape[:2] + [window_out(n, ks[i], strides[i], pads[i], pads[i + len(wins)], 1)
                       for i, n in enumerate(shape[2:])]
    y = b.name("pool")
    if kind == "MaxPool":
        b.node(kind, [x], [y], kernel_shape=ks, strides=strides, pads=pads)
        b.layers.append(f"MaxPool(k={ks}, s={strides}, p={pads})")
        return y, xq, out
    yq = b.quant()
    inc = int(draw(st.booleans()))
    b.node(kind, [x, *xq, *yq], [y], domain="com.microsoft", kernel_shape=ks,
           strides=strides, pads=pads, count_include_pad=inc)
    b.layers.append(f"QLinearAveragePool(k={ks}, s={strides}, p={pads}, include_pad={inc})")
    return y, yq, out


def _qunary(b: QopBuilder, x, xq, shape):
    kind = b.draw(st.sampled_from(["QLinearSigmoid", "QLinearLeakyRelu"]))
    yq, y = b.quant(), b.name("act")
    attrs = {"alpha": 0.1} if kind == "QLinearLeakyRelu" else {}
    b.node(kind, [x, *xq, *yq], [y], domain="com.microsoft", **attrs)
    b.layers.append(kind)
    return y, yq, shape


def _qbinary(b: QopBuilder, x, xq, shape):
    """QLinearAdd / QLinearMul of x with a conv of x, or with a broadcast constant, or
    QLinearConcat of x with a conv of x (channel axis)."""
    draw = b.draw
    kind = draw(st.sampled_from(["QLinearAdd", "QLinearMul", "QLinearConcat"]))
    if kind != "QLinearConcat" and draw(st.booleans()):
        cshape = [1, shape[1]] + [1] * (len(shape) - 2)
        other = b.const(_weights(draw, cshape, b.act), "k")
        oq, oshape = b.quant(), shape
        label = f"{kind}(x, constant {cshape})"
    else:
        other, oq, oshape = _qconv_same(b, x, xq, shape)
        label = f"{kind}(x, conv(x))"
    yq, y = b.quant(), b.name(kind.lower())
    if kind == "QLinearConcat":
        b.node(kind, [*yq, x, *xq, other, *oq], [y], domain="com.microsoft", axis=1)
        out = [1, shape[1] + oshape[1], *shape[2:]]
    else:
        b.node(kind, [x, *xq, other, *oq, *yq], [y], domain="com.microsoft")
        out = shape
    b.layers.append(label)
    return y, yq, out


def _qconv_same(b: QopBuilder, x, xq, shape):
    """A 3x3 (or 1x1) stride-1 conv with 'same' pads and as many channels: shape kept."""
    draw, c = b.draw, shape[1]
    k = draw(st.sampled_from([1, 3]))
    sp = len(shape) - 2
    w = _weights(draw, (c, c, *[k] * sp), b.wdt)
    wz = np.zeros((), b.wdt) if b.wdt == np.int8 else _zero_point(draw, b.wdt)
    yq, y = b.quant(), b.name("conv")
    b.node("QLinearConv", [x, *xq, b.const(w, "w"), b.const(_log_scale(draw, -4, 1), "ws"),
                           b.const(wz, "wz"), *yq], [y], pads=[k // 2] * (2 * sp))
    return y, yq, shape


def _qshape(b: QopBuilder, x, xq, shape):
    """Transpose (swap the last two axes), Pad (constant zero point) or Reshape to 2-D."""
    draw = b.draw
    kind = draw(st.sampled_from(["Transpose", "Pad", "Reshape"]))
    y = b.name(kind.lower())
    rank = len(shape)
    if kind == "Transpose":
        perm = list(range(rank - 2)) + [rank - 1, rank - 2]
        b.node(kind, [x], [y], perm=perm)
        out = [shape[p] for p in perm]
    elif kind == "Pad":
        pads = [0, 0] + [draw(st.integers(0, 2)) for _ in range(rank - 2)]
        pads += [0, 0] + [draw(st.integers(0, 2)) for _ in range(rank - 2)]
        b.node(kind, [x, b.const(np.array(pads, np.int64)), xq[1]], [y])
        out = [shape[i] + pads[i] + pads[i + rank] for i in range(rank)]
    else:
        out = [shape[0], shape[1], int(np.prod(shape[2:]))]
        b.node(kind, [x, b.const(np.array(out, np.int64))], [y])
    b.layers.append(f"{kind} -> {out}")
    return y, xq, out


def _integer_tail(b: QopBuilder, x, xq, shape, in_shape) -> QopCase:
    draw = b.draw
    wz = _zero_point(draw, b.wdt)
    if len(shape) >= 3 and draw(st.booleans()):
        k = [draw(st.integers(1, min(3, n))) for n in shape[2:]]
        cout = draw(st.integers(1, 4))
        w = _weights(draw, (cout, shape[1], *k), b.wdt)
        b.node("ConvInteger", [x, b.const(w, "w"), xq[1], b.const(wz, "wz")], ["y"])
        out = [1, cout] + [n - kk + 1 for n, kk in zip(shape[2:], k, strict=True)]
        b.layers.append(f"ConvInteger(k={k}, cout={cout})")
    else:
        size, f = int(np.prod(shape)), b.name("flat")
        b.node("Flatten", [x], [f])
        n = draw(st.integers(1, 6))
        b.node("MatMulInteger", [f, b.const(_weights(draw, (size, n), b.wdt), "m"), xq[1],
                                 b.const(wz, "mz")], ["y"])
        out = [1, n]
        b.layers.append(f"MatMulInteger(k={size}, n={n})")
    return b.finish(in_shape, out, TensorProto.INT32)


def _qsoftmax(b: QopBuilder, x, xq, shape):
    # outputs lie in [0, 1]: a scale near 1/256 (within a factor 10), as quantizers choose;
    # tg_softmax refuses scales far outside (256 / s_y must fit int32)
    s_y = np.float32(10.0 ** b.draw(st.floats(-1, 1)) / 256)
    yq, y = (b.const(s_y, "s"), b.const(_zero_point(b.draw, b.act), "z")), b.name("softmax")
    b.node("QLinearSoftmax", [x, *xq, *yq], [y], domain="com.microsoft", axis=-1, opset=13)
    b.layers.append("QLinearSoftmax(axis=-1)")
    return y, yq, shape


@st.composite
def qop_graphs(draw, max_channels: int = 6, max_spatial: int = 9) -> QopCase:
    """x -Q-> (QLinearConv | pooling | QLinear unary | binary | shape)* [-> QLinearMatMul
    | ConvInteger | MatMulInteger] [-DQ->] y. Larger sizes reach the kernels' blocked paths."""
    act = draw(st.sampled_from([np.uint8, np.int8]))
    b = QopBuilder(draw, act, draw(st.sampled_from([np.int8, np.uint8])))
    b.max_channels = max_channels
    rank = draw(st.sampled_from([3, 4]))
    shape = [1, draw(st.integers(1, max_channels))] + [draw(st.integers(1, max_spatial))
                                                      for _ in range(rank - 2)]
    xq = b.quant()
    x = "xq"
    b.node("QuantizeLinear", ["x", *xq], [x])
    in_shape = list(shape)
    for _ in range(draw(st.integers(1, 3))):
        step = draw(st.sampled_from([_qconv, _qconv, _qpool, _qunary, _qbinary, _qshape]))
        x, xq, shape = step(b, x, xq, shape)
        if len(shape) < 3 or min(shape[2:]) < 1:
            break
    tail = draw(st.sampled_from(["none", "matmul", "matmul", "integer"]))
    if tail == "matmul":
        if len(shape) == 3 and draw(st.booleans()):  # over the last axis, rows kept
            f, size, rows = x, shape[-1], shape[:-1]
        else:
            size, rows, f = int(np.prod(shape)), [1], b.name("flat")
            b.node("Flatten", [x], [f])
        n = draw(st.integers(1, 8))
        m = _weights(draw, (size, n), b.wdt)
        mz = _zero_point(draw, b.wdt)
        yq, y = b.quant(), b.name("matmul")
        b.node("QLinearMatMul", [f, *xq, b.const(m, "m"), b.const(_log_scale(draw, -4, 1)),
                                 b.const(mz), *yq], [y])
        b.layers.append(f"QLinearMatMul(rows={rows}, k={size}, n={n})")
        x, xq, shape = y, yq, [*rows, n]
        if draw(st.booleans()):
            x, xq, shape = _qsoftmax(b, x, xq, shape)
    if tail == "integer":  # ConvInteger / MatMulInteger: the raw int32 sums are the output
        return _integer_tail(b, x, xq, shape, in_shape)
    if draw(st.booleans()):  # a quantized graph output (the caller reads the integers)
        b.node("Identity", [x], ["y"])
        out_type = TensorProto.UINT8 if act == np.uint8 else TensorProto.INT8
        b.layers.append("quantized output")
    else:
        b.node("DequantizeLinear", [x, *xq], ["y"])
        out_type = TensorProto.FLOAT
    return b.finish(in_shape, shape, out_type)
