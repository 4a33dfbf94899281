"""The operator spec's rules for quantization parameters, biases and the graph itself,
checked on the loaded model before the lowering reads a single value.

Every quantized operand of every op we take (its data, scale and zero point), every bias
and every opset import is checked here against the spec of the op at the model's opset;
what the spec allows and tinygen does not compile is refused here too, with the tensor,
its type or length, and what is required. docs/guarantees.md ("Model checks") lists the
rules. Sources, named beside each rule:

  [onnx]  the ONNX operator schemas shipped in the onnx package (onnx.defs: inputs, their
          descriptions and type constraints), at the model's opset
  [ort]   onnxruntime's contrib operator documentation (docs/ContribOperators.md of the
          onnxruntime repository, domain com.microsoft, version 1)
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import onnx
from onnx import defs

from tinygen.errors import TinygenError

# QuantizeLinear, DequantizeLinear, QLinearConv, QLinearMatMul, ConvInteger and
# MatMulInteger all exist since opset 10 [onnx]; the newest opset is the installed onnx's.
OPSET_MIN = 10
OPSET_MAX = defs.onnx_opset_version()
DEFAULT_DOMAINS = ("", "ai.onnx")
CONTRIB = "com.microsoft"
CONTRIB_VERSION = 1  # every com.microsoft op we take exists in version 1 only [ort]

EIGHT_BIT = (np.dtype(np.int8), np.dtype(np.uint8))


@dataclass(frozen=True)
class Operand:
    """One quantized operand of an op: the input indices of its data, scale and zero point.

    data None: the op's output (its type is the zero point's). scale None: the op has no
    scale for it (ConvInteger, MatMulInteger). `channels` says how many values a per-axis
    scale or zero point may have: "tensor" (one only), "out_channels" (dim 0 of the
    data: conv weights [M, C/group, ...]), "columns" (the last dim: MatMul's b [K, N]),
    "rows" (dim 0: QGemm's b with transB [N, K]), "axis" (the Q/DQ `axis` attribute).
    """

    role: str
    data: int | None
    scale: int | None
    zp: int | None
    channels: str = "tensor"


@dataclass(frozen=True)
class OpRule:
    operands: tuple[Operand, ...]
    bias: int | None = None          # index of the int32 bias input
    weight: int | None = None        # index of a weight input that must be constant


_IN, _OUT = "input", "output"

# QLinearConv: x_scale, x_zero_point, y_scale, y_zero_point "a scalar, which means a
# per-tensor/layer quantization"; w_scale, w_zero_point "a scalar or a 1-D tensor ... its
# number of elements should be equal to the number of output channels (M)"; B "1D bias
# ... has size of M. Bias must be quantized using scale = x_scale * w_scale and
# zero_point = 0", type tensor(int32) [onnx QLinearConv-10].
# QLinearMatMul: scale and zero point scalars, or per column for b [onnx QLinearMatMul-10].
# ConvInteger / MatMulInteger: zero points as QLinearConv's, or per column of B
# [onnx ConvInteger-10, MatMulInteger-10]. QuantizeLinear / DequantizeLinear: a scalar, or
# (opset 13 on) a 1-D tensor along `axis`; "Shape must match y_scale" [onnx].
RULES: dict[tuple[str, str], OpRule] = {
    ("", "QuantizeLinear"): OpRule((Operand(_OUT, None, 1, 2, "axis"),)),
    ("", "DequantizeLinear"): OpRule((Operand(_IN, 0, 1, 2, "axis"),)),
    ("", "QLinearConv"): OpRule((Operand(_IN, 0, 1, 2), Operand("weight", 3, 4, 5,
                                                                 "out_channels"),
                                 Operand(_OUT, None, 6, 7)), bias=8, weight=3),
    ("", "QLinearMatMul"): OpRule((Operand(_IN, 0, 1, 2), Operand("right operand", 3, 4, 5,
                                                                   "columns"),
                                   Operand(_OUT, None, 6, 7))),
    ("", "ConvInteger"): OpRule((Operand(_IN, 0, None, 2),
                                 Operand("weight", 1, None, 3, "out_channels")), weight=1),
    ("", "MatMulInteger"): OpRule((Operand(_IN, 0, None, 2),
                                   Operand("right operand", 1, None, 3, "columns"))),
    # com.microsoft [ort]: every scale and zero point "is a scalar, which means a
    # per-tensor/layer quantization" (QLinearAdd, QLinearMul, QLinearSigmoid,
    # QLinearLeakyRelu, QLinearSoftmax, QLinearAveragePool, QLinearGlobalAveragePool,
    # QLinearConcat); QGemm's b_scale/b_zero_point "a scalar or a 1-D tensor ... per-column"
    # and C "Its type is int32_t and must be quantized with zero_point = 0".
    (CONTRIB, "QLinearAdd"): OpRule((Operand(_IN, 0, 1, 2), Operand(_IN, 3, 4, 5),
                                     Operand(_OUT, None, 6, 7))),
    (CONTRIB, "QLinearMul"): OpRule((Operand(_IN, 0, 1, 2), Operand(_IN, 3, 4, 5),
                                     Operand(_OUT, None, 6, 7))),
    (CONTRIB, "QGemm"): OpRule((Operand(_IN, 0, 1, 2), Operand("weight", 3, 4, 5, "columns"),
                                Operand(_OUT, None, 7, 8)), bias=6),
}
for _op in ("QLinearSigmoid", "QLinearLeakyRelu", "QLinearSoftmax", "QLinearAveragePool",
            "QLinearGlobalAveragePool"):
    RULES[(CONTRIB, _op)] = OpRule((Operand(_IN, 0, 1, 2), Operand(_OUT, None, 3, 4)))


def _rule(node: onnx.NodeProto) -> OpRule | None:
    domain = "" if node.domain in DEFAULT_DOMAINS else node.domain
    if (domain, node.op_type) == (CONTRIB, "QLinearConcat"):  # Y_scale, Y_zp, then triples
        ops = [Operand(_OUT, None, 0, 1)]
        ops += [Operand(_IN, i, i + 1, i + 2) for i in range(2, len(node.input) - 2, 3)]
        return OpRule(tuple(ops))
    rule = RULES.get((domain, node.op_type))
    if rule is not None and (domain, node.op_type) == (CONTRIB, "QGemm"):
        attrs = {a.name: onnx.helper.get_attribute_value(a) for a in node.attribute}
        if attrs.get("transB", 0):  # b is [N, K]: one value per row
            ops = list(rule.operands)
            ops[1] = Operand("weight", 3, 4, 5, "rows")
            rule = OpRule(tuple(ops), rule.bias, rule.weight)
    return rule


# -- the graph: opsets, inputs, outputs -------------------------------------------------

def check_graph(model: onnx.ModelProto, path: str) -> None:
    """Opset imports and the graph's declared inputs and outputs (before onnx.checker)."""
    opsets = {o.domain or "": o.version for o in model.opset_import}
    used = {n.domain or "" for n in model.graph.node}
    default = max((v for d, v in opsets.items() if d in DEFAULT_DOMAINS), default=None)
    if default is not None and not OPSET_MIN <= default <= OPSET_MAX:
        raise TinygenError(f"default-domain opset {default} is outside the supported range "
                           f"{OPSET_MIN}..{OPSET_MAX}", file=path)
    if CONTRIB in used and opsets.get(CONTRIB) != CONTRIB_VERSION:
        raise TinygenError(f"opset {opsets.get(CONTRIB)} of domain '{CONTRIB}' is not "
                           f"supported (version {CONTRIB_VERSION} only)", file=path)
    g = model.graph
    if len(g.output) == 0:
        raise TinygenError("the graph has no outputs: nothing to compute", file=path)
    init_names = {i.name for i in g.initializer}
    if not [i for i in g.input if i.name not in init_names]:
        raise TinygenError("the graph has no inputs (other than initializers): nothing to "
                           "compute from", file=path)
    for out in g.output:
        for axis, d in enumerate(out.type.tensor_type.shape.dim):
            if d.HasField("dim_value") and d.dim_value <= 0:
                raise TinygenError(f"graph output '{out.name}' declares dimension "
                                   f"{d.dim_value} at axis {axis} (size 0 or negative)",
                                   file=path)


def declared_output_shapes(model: onnx.ModelProto) -> dict[str, tuple[int | None, ...]]:
    """Each graph output's declared shape (None for a symbolic or unknown dimension);
    outputs that declare no shape are left out."""
    out = {}
    for o in model.graph.output:
        tt = o.type.tensor_type
        if tt.HasField("shape"):
            out[o.name] = tuple(int(d.dim_value) if d.HasField("dim_value") else None
                                for d in tt.shape.dim)
    return out


def check_output_shape(name: str, declared: tuple[int | None, ...] | None,
                       computed: tuple[int, ...], path: str) -> None:
    """A declared output shape is a promise to the caller (the buffer it passes): the graph
    must compute exactly that shape, dimension by dimension where a size is given."""
    if declared is None:
        return
    if len(declared) != len(computed) or any(d is not None and d != c
                                             for d, c in zip(declared, computed, strict=False)):
        shown = [d if d is not None else "?" for d in declared]
        raise TinygenError(f"graph output '{name}' is declared with shape {shown}; the graph "
                           f"computes {list(computed)}", file=path)


def overridable_initializers(model: onnx.ModelProto) -> set[str]:
    """Initializers that are also graph inputs: from IR version 4 on, a caller may feed a
    value for them at run time, the initializer being only a default [onnx IR.md, "Graphs":
    "an initializer ... may also be listed in the graph inputs ... the value in the
    initializer is a default"] (from memory). Before IR 4 every initializer had to be
    listed as an input, so there the listing says nothing and they stay constants."""
    if model.ir_version < 4:
        return set()
    inputs = {i.name for i in model.graph.input}
    return {i.name for i in model.graph.initializer if i.name in inputs}


# -- one node -------------------------------------------------------------------------

class NodeChecker:
    """Checks the nodes of one ModelView (tinygen.frontend.onnx_loader)."""

    def __init__(self, view):
        self.view = view
        self.opset = view.opset.get("", 17)
        self.producer = {o: n for n in view.nodes for o in n.output if o}
        self.node: onnx.NodeProto | None = None
        # DequantizeLinear nodes that make a Conv/Gemm bias -> that Conv/Gemm: checked as
        # a bias before they are checked as a DequantizeLinear
        self.bias_of: dict[int, onnx.NodeProto] = {}
        for n in view.nodes:
            if n.domain in DEFAULT_DOMAINS and n.op_type in ("Conv", "Gemm") \
                    and len(n.input) > 2 and n.input[2]:
                p = self.producer.get(n.input[2])
                if p is not None and p.op_type == "DequantizeLinear":
                    self.bias_of[id(p)] = n

    def error(self, reason: str) -> TinygenError:
        n = self.node
        label = (n.name or (n.output[0] if n.output else "")) if n is not None else ""
        return TinygenError(reason, file=self.view.path, node=label,
                            op=n.op_type if n is not None else "")

    def check(self, node: onnx.NodeProto) -> None:
        if id(node) in self.bias_of:
            self.node = self.bias_of[id(node)]
            self._qdq_bias(self.node)
        self.node = node
        if node.op_type in ("QuantizeLinear", "DequantizeLinear") and any(
                a.name == "block_size" and onnx.helper.get_attribute_value(a)
                for a in node.attribute):
            raise self.error("blocked quantization (block_size) is not supported")
        rule = _rule(node)
        if rule is not None:
            for operand in rule.operands:
                self._operand(node, operand)
            self._one_scale_type(node, rule)
            if rule.weight is not None:
                self._constant(node, rule.weight, "weight")
            if rule.bias is not None:
                self._int32_bias(node, rule)
        if node.domain in DEFAULT_DOMAINS and node.op_type in ("Conv", "Gemm") \
                and len(node.input) > 2 and node.input[2]:
            self._qdq_bias(node)
        if node.op_type == "DequantizeLinear":
            self._int32_dequantize(node)
        if node.op_type == "QuantizeLinear" and node.input[0] in self.view.consts:
            x = np.asarray(self.view.consts[node.input[0]])
            # T1 is float or int32 [onnx]; a compile-time quantization in float32 is exact
            # for float32 data only (int32 / scale is not a float32 division)
            if x.dtype != np.float32:
                raise self.error(f"constant '{node.input[0]}' quantized here has type "
                                 f"{x.dtype.name}; float32 required")

    # -- pieces -------------------------------------------------------------------------
    def _const(self, name: str, what: str) -> np.ndarray:
        self._must_be_constant(name, what)
        return np.asarray(self.view.consts[name])

    def _must_be_constant(self, name: str, what: str) -> None:
        v = self.view
        if name in v.overridable:
            raise self.error(f"{what} '{name}' must be a constant: it is also a graph input, "
                             "so a caller may replace its initializer at run time (remove "
                             "it from the graph inputs)")
        if name in v.consts:
            return
        where = "a graph input" if name in v.inputs else "computed by the graph"
        raise self.error(f"{what} '{name}' must be a constant (an initializer or a Constant "
                         f"node), not {where}")

    def _constant(self, node, i: int, what: str) -> None:
        if len(node.input) > i and node.input[i]:
            self._must_be_constant(node.input[i], what)

    def _input(self, node, i: int | None) -> str:
        return node.input[i] if i is not None and len(node.input) > i else ""

    def _data_type(self, name: str):
        if name in self.view.consts:
            return np.asarray(self.view.consts[name]).dtype
        dt = self.view.dtypes.get(name)
        return np.dtype(dt) if dt is not None else None

    def _channels(self, node, operand: Operand, data: str) -> tuple[int | None, str]:
        """How many values a per-axis scale/zero point must have, and what they count
        (asked only when one has more than one value)."""
        if node.op_type == "QuantizeLinear":
            data = node.input[0]  # y has x's shape
        shape = self.view.shapes.get(data) if data else None
        kind = operand.channels
        if kind == "tensor":
            return 1, f"per-tensor {operand.role}"
        if shape is None or len(shape) == 0:
            return None, ""
        if kind == "axis":
            axis = next((onnx.helper.get_attribute_value(a) for a in node.attribute
                         if a.name == "axis"), 1)
            rank = len(shape)
            if not -rank <= axis < rank:  # "Accepted range is [-r, r-1]" [onnx]
                raise self.error(f"axis {axis} is out of range for '{data}' of rank {rank}")
            axis %= rank
            return shape[axis], f"one per index of axis {axis} of '{data}', or 1"
        if kind in ("out_channels", "rows"):
            return shape[0], f"one per output channel of '{data}' (dim 0), or 1"
        return shape[-1], f"one per column of '{data}' (last dim), or 1"

    def _operand(self, node, operand: Operand) -> None:
        data = node.output[0] if operand.data is None else self._input(node, operand.data)
        scale_name, zp_name = self._input(node, operand.scale), self._input(node, operand.zp)
        if operand.data is not None:  # T, T1, T2 of the data: int8 or uint8 [onnx], [ort]
            dt = self._data_type(data)
            dq = node.op_type == "DequantizeLinear"
            if dt is not None and dt not in EIGHT_BIT and not (dq and dt == np.int32):
                need = "int8, uint8 or int32" if dq else "int8 or uint8"
                raise self.error(f"{operand.role} '{data}' has type {dt.name}; {need} required")
        scale = None
        if operand.scale is not None:
            if not scale_name:
                raise self.error(f"the {operand.role} scale is missing")
            scale = self._const(scale_name, "scale")
            self._scale_type(node, scale_name, scale, operand.scale)
        zp = None
        if zp_name:
            zp = self._const(zp_name, "zero point")
            self._zero_point_type(node, zp_name, zp, data, operand)
            # QuantizeLinear / DequantizeLinear: "Shape must match y_scale" [onnx]
            if operand.channels == "axis" and scale is not None and zp.size != scale.size:
                kind = "is per-tensor" if scale.size == 1 else f"has {scale.size} values"
                raise self.error(f"zero point '{zp_name}' has length {zp.size}; expected "
                                 f"{scale.size} (its scale '{scale_name}' {kind}: the spec "
                                 "requires the same shape)")
        if scale is not None:
            self._length(node, scale_name, "scale", scale, operand, data)
        if zp is not None:
            self._length(node, zp_name, "zero point", zp, operand, data)

    def _scale_type(self, node, name: str, scale: np.ndarray, index: int) -> None:
        if scale.dtype == np.float32:
            return
        if scale.dtype == np.float16 and self._schema_allows(node, index, "tensor(float16)") \
                and node.op_type not in ("QuantizeLinear", "DequantizeLinear"):
            return  # QLinearMatMul-21's TS [onnx]; float16 -> float32 is exact
        why = "float32 or float16 where the op's opset allows float16"
        if scale.dtype == np.float16 and node.op_type in ("QuantizeLinear",
                                                         "DequantizeLinear"):
            why = "a float16 scale here means float16 activations, which are not compiled"
        raise self.error(f"scale '{name}' has type {scale.dtype.name}; float32 required "
                         f"({why})")

    def _one_scale_type(self, node, rule: OpRule) -> None:
        """Scales that share one type variable (QLinearMatMul-21's TS for a_scale, b_scale
        and y_scale [onnx]) must have one type."""
        schema = self._schema(node)
        if schema is None:
            return
        seen: dict[str, tuple[str, np.dtype]] = {}
        for operand in rule.operands:
            i = operand.scale
            if i is None or i >= len(schema.inputs) or i >= len(node.input):
                continue
            var = schema.inputs[i].type_str
            dt = np.asarray(self.view.consts[node.input[i]]).dtype
            if var.startswith("tensor("):
                continue
            first = seen.setdefault(var, (node.input[i], dt))
            if first[1] != dt:
                raise self.error(f"scales '{first[0]}' ({first[1].name}) and '{node.input[i]}' "
                                 f"({dt.name}) must have one type (the spec's {var})")

    def _schema(self, node):
        if node.domain not in DEFAULT_DOMAINS:
            return None
        try:
            return defs.get_schema(node.op_type, self.opset, "")
        except Exception:  # not a schema of this opset: the checker already spoke
            return None

    def _schema_allows(self, node, index: int, type_str: str) -> bool:
        schema = self._schema(node)
        if schema is None or index >= len(schema.inputs):
            return False
        t = schema.inputs[index].type_str
        if t.startswith("tensor("):
            return t == type_str
        return any(c.type_param_str == t and type_str in c.allowed_type_strs
                   for c in schema.type_constraints)

    def _zero_point_type(self, node, name: str, zp: np.ndarray, data: str,
                         operand: Operand) -> None:
        dq_int32 = node.op_type == "DequantizeLinear" and zp.dtype == np.int32
        if zp.dtype not in EIGHT_BIT and not dq_int32:
            extra = " (int32 activations are not supported)" if zp.dtype == np.int32 else ""
            raise self.error(f"zero point '{name}' has type {zp.dtype.name}; int8 or uint8 "
                             f"required{extra}")
        if operand.data is None:
            return  # the output's type is the zero point's [onnx QuantizeLinear]
        dt = self._data_type(data)
        # "x_zero_point and x must have same type" [onnx DequantizeLinear]; one type
        # variable T1 (T2) for x and x_zero_point (w and w_zero_point) [onnx QLinearConv]
        if dt is not None and dt != zp.dtype:
            raise self.error(f"zero point '{name}' has type {zp.dtype.name}, its data "
                             f"'{data}' {dt.name}; the spec requires the same type")

    def _length(self, node, name: str, what: str, arr: np.ndarray, operand: Operand,
                data: str) -> None:
        shape = list(arr.shape)
        columns_2d = operand.channels == "columns" and arr.ndim == 2 and arr.shape[0] == 1
        if arr.ndim > 1 and not columns_2d:  # [1, N]: per column of a 2-D b [onnx]
            raise self.error(f"{what} '{name}' has shape {shape}; a scalar or a 1-D tensor "
                             "is required")
        if arr.size == 0:
            raise self.error(f"{what} '{name}' is empty")
        if arr.size == 1:
            return
        if operand.channels == "axis" and self.opset < 13:
            raise self.error(f"{what} '{name}' has {arr.size} values: per-axis quantization "
                             f"needs opset 13 or later (this model: {self.opset})")
        expected, counting = self._channels(node, operand, data)
        if expected is not None and arr.size != expected:
            raise self.error(f"{what} '{name}' has length {arr.size}; expected {expected} "
                             f"({counting})")

    def _int32_bias(self, node, rule: OpRule) -> None:
        name = self._input(node, rule.bias)
        if not name:
            return
        b = self._const(name, "bias")
        if b.dtype != np.int32:
            raise self.error(f"bias '{name}' has type {b.dtype.name}; {node.op_type} requires "
                             "int32 (quantized at scale x_scale * w_scale, zero point 0)")
        w = self._input(node, rule.operands[1].data)
        wshape = self.view.shapes.get(w)
        ok_shape = b.ndim == 1 or (node.op_type == "QGemm" and b.ndim == 2 and b.shape[0] == 1)
        if not ok_shape:
            raise self.error(f"bias '{name}' has shape {list(b.shape)}; a 1-D tensor is "
                             "required")
        if wshape:
            kind = rule.operands[1].channels
            m = wshape[0] if kind in ("out_channels", "rows") else wshape[-1]
            if b.size != m:
                raise self.error(f"bias '{name}' has length {b.size}; expected {m} (one per "
                                 f"output channel of '{w}')")

    def _qdq_bias(self, node) -> None:
        """QDQ Conv/Gemm: the bias is DequantizeLinear of an int32 constant (the form the
        QLinearConv spec gives a bias: int32 at x_scale * w_scale, zero point 0 [onnx])."""
        name = node.input[2]
        v = self.view
        if name in v.consts:
            b = np.asarray(v.consts[name])
            raise self.error(f"bias '{name}' is a {b.dtype.name} constant; int32 required "
                             "(DequantizeLinear of an int32 tensor at scale x_scale * "
                             "w_scale)")
        prod = self.producer.get(name)
        if prod is None or prod.op_type != "DequantizeLinear":
            return  # not a constant at all: the lowering says so
        x = prod.input[0]
        dt = self._data_type(x)
        if dt is not None and dt != np.int32:
            raise self.error(f"bias '{x}' (DequantizeLinear '{prod.name or name}') has type "
                             f"{dt.name}; {node.op_type} needs an int32 bias (DequantizeLinear "
                             "of int32 at scale x_scale * w_scale, zero point 0)")

    def _int32_dequantize(self, node) -> None:
        """"In the case of dequantizing int32, there's no zero point (zero point is supposed
        to be 0)" [onnx DequantizeLinear]."""
        x = node.input[0]
        if self._data_type(x) != np.int32 or len(node.input) < 3 or not node.input[2]:
            return
        zp = np.asarray(self.view.consts.get(node.input[2], 0))
        if np.any(zp != 0):
            raise self.error(f"zero point '{node.input[2]}' of int32 '{x}' is "
                             f"{zp.reshape(-1)[:4].tolist()}; the spec requires 0")


def check_nodes(view) -> None:
    """Every node's quantization parameters and biases, before the lowering reads them;
    then any initializer a caller could replace, wherever it is read."""
    checker = NodeChecker(view)
    for node in view.nodes:
        checker.check(node)
    for node in view.nodes:
        checker.node = node
        for name in node.input:
            if name in view.overridable:
                checker._must_be_constant(name, "input")


def checked_cast(arr, dtype, what: str, error) -> np.ndarray:
    """`arr` as `dtype` when every value is exactly representable there; else `error`
    (a callable taking the reason) is raised: a narrowing never wraps or rounds silently."""
    a = np.asarray(arr)
    dt = np.dtype(dtype)
    if a.dtype == dt:
        return a
    if dt.kind in "iu":
        info = np.iinfo(dt)
        if a.dtype.kind == "f" and a.size and not np.all(np.isfinite(a) & (a == np.rint(a))):
            raise error(f"{what} holds values that are not integers; {dt.name} required")
        if a.dtype.kind not in "iuf" and a.dtype != np.bool_:
            raise error(f"{what} has type {a.dtype.name}; {dt.name} required")
        if a.size and (a.min() < info.min or a.max() > info.max):
            raise error(f"{what} holds {a.min() if a.min() < info.min else a.max()}, outside "
                        f"{dt.name} range [{info.min}, {info.max}]")
        return a.astype(dt)
    out = a.astype(dt)
    if a.size and not np.array_equal(out.astype(a.dtype), a, equal_nan=True):
        raise error(f"{what} of type {a.dtype.name} is not exactly representable as "
                    f"{dt.name}")
    return out
