"""Float per-element subgraphs on one quantized tensor, folded into one 256-entry table.

Exporters and quantizers leave activations as float graphs between DequantizeLinear and
QuantizeLinear: GELU as Div, Erf, Add, Mul, Mul (or one Gelu node), SiLU as Sigmoid then
Mul with its own input, Mish, Softplus with Greater and Where, Elu... Each output element
of such a graph is a function of the input element at the same position alone, and an
8-bit input has 256 values: the graph is evaluated at compile time on all of them (by
onnx.reference, the ONNX operator definitions in float32), so that the run-time op is one
table lookup whose entries are exactly DequantizeLinear -> subgraph -> QuantizeLinear.

A region qualifies when
  - its input is one DequantizeLinear of an activation (several DequantizeLinear nodes of
    the same tensor with the same scale and zero point count as one),
  - every node is per-element (POINTWISE, default domain) and every input that does not
    come from the region is a constant with one element (broadcast as a scalar): an
    initializer, a folded constant, or DequantizeLinear of one,
  - no value inside it is read outside it or is a graph output, except its one result.
A single node that the op-by-op lowering already maps to an integer kernel (Relu, Clip,
Sigmoid, ..., Add/Mul of quantized operands) is left to it; everything else that does not
qualify is left alone too, and the op-by-op lowering takes it or refuses it.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import onnx
from onnx import helper, numpy_helper

from tinygen.reference.lut import INDEX_Q

# Ops whose every output element depends only on the input elements at the same position
# (with numpy broadcasting of scalar constants). Nothing with an axis, a window or a shape.
POINTWISE = frozenset({
    "Abs", "Acos", "Acosh", "Add", "And", "Asin", "Asinh", "Atan", "Atanh", "Cast",
    "CastLike", "Ceil", "Celu", "Clip", "Cos", "Cosh", "Div", "Elu", "Equal", "Erf", "Exp",
    "Floor", "Gelu", "Greater", "GreaterOrEqual", "HardSigmoid", "HardSwish", "Identity",
    "IsInf", "IsNaN", "LeakyRelu", "Less", "LessOrEqual", "Log", "Max", "Mean", "Min",
    "Mish", "Mod", "Mul", "Neg", "Not", "Or", "Pow", "PRelu", "Reciprocal", "Relu", "Round",
    "Selu", "Shrink", "Sigmoid", "Sign", "Sin", "Sinh", "Softplus", "Softsign", "Sqrt", "Sub",
    "Sum", "Swish", "Tan", "Tanh", "ThresholdedRelu", "Where", "Xor",
})

# One-node regions the op-by-op lowering (qdq.py) maps to its own kernels: left to it.
OP_BY_OP = frozenset({"Relu", "Clip", "LeakyRelu", "Sigmoid", "Tanh", "HardSigmoid",
                      "HardSwish", "Identity"})
# Add/Mul are left to it too when every side input is quantized (integer add/mul kernels).
BINARY_KERNELS = frozenset({"Add", "Mul"})


@dataclass
class Region:
    """A qualifying subgraph: `nodes` in topological order, the last one makes `result`."""

    source: str  # the quantized tensor all DequantizeLinear roots read
    roots: list  # the DequantizeLinear nodes of `source` that the region reads
    const_nodes: list  # DequantizeLinear nodes of scalar constants the region reads
    nodes: list
    result: str

    def describe(self) -> str:
        return ", ".join(n.op_type for n in self.nodes)


def _is_default_domain(node) -> bool:
    return node.domain in ("", "ai.onnx")


def find_regions(view) -> dict[str, Region]:
    """Qualifying regions of a loaded model, by the name of the value each one computes.

    One walk in topological order marks each value that is a per-element function of a
    single dequantized tensor (`origin`); each such value read by something outside its
    family (or a graph output) closes a region, which qualifies if nothing inside escapes.
    """
    consts = view.consts
    producer: dict[str, object] = {}
    consumers: dict[str, list] = {}
    for n in view.nodes:
        for o in n.output:
            if o:
                producer[o] = n
        for i in n.input:
            if i:
                consumers.setdefault(i, []).append(n)
    outputs = set(view.outputs)
    position = {id(n): i for i, n in enumerate(view.nodes)}

    const_dq: dict[str, object] = {}  # DequantizeLinear of a one-element constant
    origin: dict[str, tuple] = {}  # value -> the DequantizeLinear inputs it derives from
    roots: dict[tuple, list] = {}
    for n in view.nodes:
        if n.op_type == "DequantizeLinear" and _is_default_domain(n) and n.input:
            ins = tuple(i for i in n.input if i)
            if all(i in consts for i in ins):
                if np.asarray(consts[n.input[0]]).size == 1:
                    const_dq[n.output[0]] = n
            else:
                origin[n.output[0]] = ins
                roots.setdefault(ins, []).append(n)
            continue
        if n.op_type not in POINTWISE or not _is_default_domain(n) or len(n.output) != 1:
            continue
        keys, ok = set(), True
        for i in (i for i in n.input if i):
            if i in origin:
                keys.add(origin[i])
            elif not _is_scalar_const(i, consts, const_dq):
                ok = False
        if ok and len(keys) == 1:
            origin[n.output[0]] = keys.pop()

    # values read outside their family (or graph outputs): each one ends a region, and no
    # region may pass through one
    escaping = set()
    for value, key in origin.items():
        made_by = producer.get(value)
        if made_by is None or made_by.op_type == "DequantizeLinear":
            continue
        readers = consumers.get(value, [])
        if value in outputs or any(not r.output or origin.get(r.output[0]) != key
                                   or r.op_type == "DequantizeLinear" for r in readers):
            escaping.add(value)
    regions: dict[str, Region] = {}
    for value in (v for v in origin if v in escaping):  # the file's order
        if value in outputs:
            continue  # a float graph output: nothing quantizes it
        region = _close(value, origin[value], producer, consumers, origin, outputs, const_dq,
                        roots, position, escaping)
        if region is not None and not _op_by_op(region, consts):
            regions[value] = region
    return regions


def _is_scalar_const(name: str, consts: dict, const_dq: dict) -> bool:
    if name in consts:
        return np.asarray(consts[name]).size == 1
    return name in const_dq


def _close(result, key, producer, consumers, origin, outputs, const_dq, roots, position,
           escaping):
    """The nodes between the DequantizeLinear roots and `result`, if nothing escapes."""
    members, stack, seen = [], [result], set()
    while stack:
        v = stack.pop()
        if v in seen:
            continue
        seen.add(v)
        if v != result and v in escaping:
            return None  # read outside on the way: stop at once (keeps long chains linear)
        n = producer[v]
        if n.op_type == "DequantizeLinear":
            continue
        members.append(n)
        stack.extend(i for i in n.input if i and i in origin)
    member_ids = {id(n) for n in members}
    for n in members:
        out = n.output[0]
        if out == result:
            continue
        if out in outputs or any(id(c) not in member_ids for c in consumers.get(out, [])):
            return None  # an intermediate is read outside: not one function of one input
    members.sort(key=lambda n: position[id(n)])  # the file's topological order
    read = {i for n in members for i in n.input if i}
    used_roots = [r for r in roots[key] if r.output[0] in read]
    used_consts = [const_dq[i] for i in sorted(read) if i in const_dq]
    return Region(key[0], used_roots, used_consts, members, result)


def _op_by_op(region: Region, consts: dict) -> bool:
    """A one-node region the op-by-op lowering turns into its own integer kernel."""
    if len(region.nodes) != 1:
        return False
    n = region.nodes[0]
    if n.op_type in OP_BY_OP:
        return True
    if n.op_type in BINARY_KERNELS:
        return not any(i in consts for i in n.input if i)  # a float constant: a table
    return False


def dequantize(data: np.ndarray, scale: np.ndarray, zero_point) -> np.ndarray:
    """ONNX DequantizeLinear, per-tensor: (x - zero_point) * scale in the scale's type.

    x - zero_point is an exact small integer, so this is the correctly rounded product, as
    every evaluation of the definition gives it (done here, so any opset's file works).
    """
    scale = np.asarray(scale)
    zp = np.asarray(0 if zero_point is None else zero_point).astype(np.int32)
    return ((np.asarray(data).astype(np.int32) - zp).astype(scale.dtype) * scale).astype(
        scale.dtype)


def evaluate(view, region: Region, source_dtype: np.dtype) -> np.ndarray:
    """The region's float32 output for each table index (entry i: the int8 whose byte is i).

    The region's nodes, as the file has them, run in onnx.reference on the dequantized 256
    raw values of the source tensor (the DequantizeLinear roots and constants are applied
    here by their ONNX definition).
    """
    raw = INDEX_Q + (128 if np.dtype(source_dtype) == np.uint8 else 0)
    consts = view.consts

    def dq(node, data):
        zp = consts[node.input[2]] if len(node.input) > 2 and node.input[2] else None
        return dequantize(data, consts[node.input[1]], zp)

    feeds = {r.output[0]: dq(r, raw) for r in region.roots}
    fixed = {n.output[0]: dq(n, consts[n.input[0]]) for n in region.const_nodes}
    inside = {n.output[0] for n in region.nodes}
    names = sorted({i for n in region.nodes for i in n.input
                    if i and i not in inside and i not in feeds})
    inits = [numpy_helper.from_array(np.asarray(fixed[i] if i in fixed else consts[i]), i)
             for i in names]
    x_infos = [helper.make_tensor_value_info(
        name, helper.np_dtype_to_tensor_dtype(v.dtype), [256]) for name, v in feeds.items()]
    y_info = helper.make_tensor_value_info(region.result, onnx.TensorProto.UNDEFINED, None)
    graph = helper.make_graph(region.nodes, "pointwise", x_infos, [y_info], inits)
    opsets = [helper.make_opsetid(d, v) for d, v in view.opset.items() if d in ("", "ai.onnx")]
    model = helper.make_model(graph, opset_imports=opsets or [helper.make_opsetid("", 17)])
    from onnx.reference import ReferenceEvaluator
    with np.errstate(all="ignore"):
        (y,) = ReferenceEvaluator(model).run(None, feeds)
    y = np.asarray(y)
    if y.size != 256:
        raise ValueError(f"it gives {y.size} values for 256 inputs")
    if y.dtype not in (np.float32, np.float16):  # float16 -> float32 is exact, float64 not
        raise ValueError(f"its result is {y.dtype.name}, not float32")
    return y.reshape(-1).astype(np.float32)


def result_shape(view, region: Region, in_shape) -> tuple[int, ...]:
    """in_shape broadcast against every scalar constant the region reads (a constant of
    shape [1, 1] on a [8] input makes a [1, 8] result)."""
    shapes = [tuple(in_shape)]
    for n in region.nodes:
        for i in n.input:
            if i in view.consts:
                shapes.append(np.asarray(view.consts[i]).shape)
    for n in region.const_nodes:
        shapes.append(np.asarray(view.consts[n.input[0]]).shape)
    return tuple(int(d) for d in np.broadcast_shapes(*shapes))


def lower_region(L, region: Region) -> None:
    """Bind the region's result to a table op waiting for its QuantizeLinear."""
    from tinygen.frontend import ops
    from tinygen.frontend.lower import Pending
    from tinygen.reference.lut import TABULATED

    x = L.deq_tensor(region.roots[0].output[0])
    source_dtype = np.dtype(x.quant.src_dtype)
    what = f"the per-element subgraph ({region.describe()})"
    try:
        values = evaluate(L.view, region, source_dtype)
    except Exception as exc:  # onnx.reference raises many types; report the first line
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0][:200]
        raise L.error(f"cannot evaluate {what} at compile time: {first}") from None
    nan = np.flatnonzero(np.isnan(values))
    if nan.size:
        q = int(INDEX_Q[nan[0]]) + (128 if source_dtype == np.uint8 else 0)
        raise L.error(f"{what} gives NaN for {nan.size} of the 256 input values (first: "
                      f"{q}); a table cannot quantize NaN")
    shape = result_shape(L.view, region, x.shape)
    b, here = L.b, (L.b.node_name, L.b.node_op)

    def finish(out, q, *act):
        name = out if shape == x.shape else out + "_table"
        y = ops.emit_lut(b, name, x, q, TABULATED, values=values, ops=region.describe())
        return y if shape == x.shape else ops.emit_view(b, out, y, shape)

    L.env[region.result] = Pending(finish, None, (None, None, None), here[0], here[1], {})
