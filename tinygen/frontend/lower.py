"""Walk a loaded ONNX graph and lower it, QDQ or QOperator form, to the integer IR.

Every ONNX value is bound in `Lowering.env` to one of:
  Int(t)      an int8/int32 IR tensor (activation or constant)
  Deq(t)      the float value DequantizeLinear(t) — a float op may consume it
  Pending(p)  a float op over Deq inputs, waiting for the QuantizeLinear that fixes its
              output scale (Relu/Clip in between narrow its clamp)
  FloatIn(n)  a float graph input, waiting for its boundary QuantizeLinear
  Const(a)    a constant numpy array not yet given quantization (shapes, float params)
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from tinygen.errors import TinygenError
from tinygen.frontend import pointwise, qdq, qop, spec
from tinygen.frontend.build import Builder
from tinygen.frontend.onnx_loader import ModelView, load_model
from tinygen.frontend.ops import emit_view, same_quant
from tinygen.ir import Graph, Tensor


@dataclass
class Int:
    t: Tensor


@dataclass
class Deq:
    t: Tensor


@dataclass
class FloatIn:
    name: str


@dataclass
class Const:
    a: np.ndarray


@dataclass
class Pending:
    """A float op awaiting its output quantization.

    finish(out_name, y_quant, act_kind, lo, hi) emits the integer op. `transparent` ops
    (views, max pooling, ...) may be finished with their input's quantization when no
    QuantizeLinear follows.
    """

    finish: Callable
    transparent_q: object = None  # QuantParams to use when no Q follows, or None
    act: tuple = (None, None, None)  # (kind, lo_real, hi_real) of fused Relu/Clip
    node: str = ""
    op: str = ""
    extra: dict = field(default_factory=dict)


SUPPORTED = sorted(set(qdq.FLOAT_OPS) | set(qop.INT_OPS) | {"QuantizeLinear",
                                                             "DequantizeLinear"})


class Lowering:
    def __init__(self, view: ModelView):
        self.view = view
        self.b = Builder(view.path, view.name)
        self.env: dict[str, object] = {}
        self.opset = view.opset.get("", 17)
        self.int_inputs: set[str] = set()  # graph inputs that are int8/uint8 already
        self.input_tensors: dict[str, Tensor] = {}  # graph input -> its IR tensor
        # float per-element subgraphs that become one table each (pointwise.py)
        self.regions = pointwise.find_regions(view)
        self.region_of = {id(n): r for r in self.regions.values() for n in r.nodes}

    # -- helpers used by the handler modules ------------------------------------------
    def error(self, reason: str) -> TinygenError:
        return self.b.error(reason)

    def value(self, name: str):
        if name not in self.env:
            raise self.error(f"input '{name}' has no value")
        return self.env[name]

    def const(self, name: str, what: str) -> np.ndarray:
        v = self.value(name) if name else None
        if isinstance(v, Const):
            return v.a
        raise self.error(f"{what} ('{name}') must be a constant initializer")

    def opt_const(self, node, i: int, what: str):
        if len(node.input) > i and node.input[i]:
            return self.const(node.input[i], what)
        return None

    def int_tensor(self, name: str, what: str = "input") -> Tensor:
        """The int IR tensor behind `name` (finishing a transparent pending op first)."""
        v = self.value(name)
        if isinstance(v, Int):
            return v.t
        raise self.error(f"{what} '{name}' is not a quantized tensor")

    def deq_tensor(self, name: str, what: str = "input") -> Tensor:
        """The quantized tensor whose dequantized value `name` is (QDQ float ops)."""
        v = self.value(name)
        if isinstance(v, Pending):
            v = self.settle(name, v)
        if isinstance(v, Deq) and v.t.dtype == "int32":
            # DequantizeLinear allows int32 [onnx]; the kernels take it only as a bias
            raise self.error(f"{what} '{name}' is DequantizeLinear of int32: int32 tensors are "
                             "taken only as the bias of Conv, Gemm, or MatMul followed by Add")
        if isinstance(v, Deq):
            return v.t
        if isinstance(v, FloatIn):
            raise self.error(f"float graph input '{name}' reaches a float op without a "
                             "QuantizeLinear (the model is not fully quantized)")
        if isinstance(v, Const):
            raise self.error(f"{what} '{name}' is a float constant, not DequantizeLinear "
                             "of a quantized one (the model is not fully quantized)")
        raise self.error(f"{what} '{name}' is not a dequantized tensor")

    def settle(self, name: str, p: Pending) -> Deq:
        """Finish a transparent pending op in its input's quantization (no Q follows)."""
        if p.transparent_q is None:
            raise TinygenError(f"float output '{name}' is not followed by QuantizeLinear "
                               "(the model is not fully quantized)", file=self.view.path,
                               node=p.node, op=p.op)
        saved = (self.b.node_name, self.b.node_op)
        self.b.at(p.node, p.op)
        t = p.finish(name, p.transparent_q, *p.act)
        self.b.at(*saved)
        self.env[name] = Deq(t)
        return self.env[name]

    # -- the walk -----------------------------------------------------------------------
    def run(self) -> Graph:
        v = self.view
        spec.check_nodes(v)  # every parameter against the operator spec, before any use
        for name, arr in v.consts.items():
            self.env[name] = Const(arr)
        for name in v.inputs:
            dt = v.dtypes.get(name)
            shape = v.shapes.get(name)
            if shape is None:
                raise TinygenError(f"graph input '{name}' has no static shape", file=v.path)
            if dt is not None and np.dtype(dt) in (np.int8, np.uint8):
                self.env[name] = FloatIn(name)  # int input: gets params from its consumer
                self.int_inputs.add(name)
            elif dt is not None and np.dtype(dt) != np.float32:
                raise TinygenError(f"graph input '{name}' has type {np.dtype(dt).name}; "
                                   "float32, int8 or uint8 expected", file=v.path)
            else:
                self.env[name] = FloatIn(name)
        for node in v.nodes:
            self.b.at(node.name or (node.output[0] if node.output else ""), node.op_type)
            self.lower_node(node)
        self.bind_outputs()
        g = self.b.graph
        g.source_path, g.source_sha256 = v.path, v.sha256
        return g

    def lower_node(self, node) -> None:
        op = node.op_type
        if node.domain not in ("", "ai.onnx", "com.microsoft"):
            raise self.error(f"op domain '{node.domain}' is not supported")
        region = self.region_of.get(id(node))
        if region is not None:  # inner nodes make nothing; the last one makes the table
            if node.output[0] == region.result:
                pointwise.lower_region(self, region)
        elif op == "QuantizeLinear":
            qdq.lower_quantize(self, node)
        elif op == "DequantizeLinear":
            qdq.lower_dequantize(self, node)
        elif op in qop.INT_OPS and self._int_operands(node, op):
            qop.INT_OPS[op](self, node)
        elif op in qdq.FLOAT_OPS:
            qdq.lower_float_op(self, node)
        else:
            raise self.error(f"op {op} is not supported; supported ops: " + ", ".join(SUPPORTED))

    def _int_operands(self, node, op: str) -> bool:
        """Whether a shape/pool op acts on an int tensor directly (QOperator form)."""
        if op not in qdq.FLOAT_OPS:
            return True
        first = self.env.get(node.input[0]) if node.input else None
        return isinstance(first, Int)

    def quantize_input(self, name: str, q, src_dtype) -> Tensor:
        """Create the IR tensor of a float graph input at its boundary QuantizeLinear."""
        v = self.view
        cached = self.input_tensors
        if name in cached:
            t = cached[name]
            if not same_quant(t.quant, q):
                raise self.error(f"graph input '{name}' is quantized twice with different "
                                 "parameters")
            return t
        t = self.b.add_tensor(name, v.shapes[name], "int8", q)
        onnx_dt = np.dtype(src_dtype).name if name in self.int_inputs else "float32"
        self.b.add_input(t, name, onnx_dt, np.dtype(src_dtype).name)
        cached[name] = t
        return t

    def bind_outputs(self) -> None:
        v = self.view
        for name in v.outputs:
            self.b.at(name, "graph output")

            def fail(reason: str) -> TinygenError:  # about the graph, not about one node
                return TinygenError(reason, file=v.path)
            if name not in self.env:
                raise fail(f"graph output '{name}' has no value")
            val = self.value(name)
            if isinstance(val, Pending):
                val = self.settle(name, val)
            if isinstance(val, Deq):
                t, onnx_dt = val.t, "float32"
            elif isinstance(val, Int):
                t, onnx_dt = val.t, None
            else:
                raise fail(f"graph output '{name}' is not computed from quantized tensors")
            if t.is_const:
                raise fail(f"graph output '{name}' is a constant")
            spec.check_output_shape(name, v.declared_outputs.get(name), t.shape, v.path)
            src = "int32" if t.dtype == "int32" else (t.quant.src_dtype if t.quant else "int8")
            if onnx_dt is None:
                onnx_dt = src
            if self.b.graph.is_graph_input(t.name) or any(o.name == t.name
                                                          for o in self.b.graph.outputs):
                # the caller's output buffer must be its own: copy
                t2 = self.b.add_tensor(name, t.shape, t.dtype, t.quant)
                self.b.add_op("copy", [t.name], [t2.name])
                t = t2
            self.b.add_output(t, name, onnx_dt, src)


def load_graph(path: str, input_shapes: list[str] | None = None) -> Graph:
    """Load an ONNX file and lower it to the integer IR (QDQ and QOperator forms)."""
    view = load_model(path, input_shapes)
    return Lowering(view).run()


__all__ = ["load_graph", "Lowering", "Int", "Deq", "FloatIn", "Const", "Pending",
           "emit_view"]
