"""Load an ONNX file: checker, pinned input shapes, static shapes, constant folding.

Produces a `ModelView`: the graph's nodes in topological order with every constant
(initializers, Constant nodes, folded shape arithmetic) as a numpy array, and every known
tensor shape/dtype. Nothing here knows about quantization.
"""
from __future__ import annotations

import hashlib
import heapq
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import onnx
from onnx import helper, numpy_helper, shape_inference

from tinygen.errors import TinygenError
from tinygen.frontend import spec as model_spec
from tinygen.user_input import parse_input_shapes, read_user_file

# Ops whose output is folded when every input is a constant: shape arithmetic that
# exporters leave in graphs (Shape -> Gather -> Concat -> Reshape) and plain constants.
# Quantization ops are never folded: their integer inputs are what we compile.
FOLDABLE = {
    "Constant", "Shape", "Gather", "Concat", "Unsqueeze", "Squeeze", "Cast", "Slice",
    "Reshape", "Mul", "Add", "Sub", "Div", "ConstantOfShape", "Range", "Identity",
    "ReduceProd", "Equal", "Where", "Expand", "Transpose", "Floor", "Ceil", "Min", "Max",
}


@dataclass
class ModelView:
    path: str
    sha256: str
    name: str
    nodes: list[onnx.NodeProto]
    consts: dict[str, np.ndarray]
    shapes: dict[str, tuple[int, ...]]
    dtypes: dict[str, np.dtype]
    inputs: list[str]
    outputs: list[str]
    opset: dict[str, int] = field(default_factory=dict)
    # initializers a caller may replace at run time (also graph inputs): never constants
    overridable: set[str] = field(default_factory=set)
    # graph outputs' shapes as the file declares them (None: a symbolic dimension)
    declared_outputs: dict[str, tuple] = field(default_factory=dict)

    def attr(self, node: onnx.NodeProto, name: str, default=None):
        for a in node.attribute:
            if a.name == name:
                return helper.get_attribute_value(a)
        return default


def _read_model(path: str) -> tuple[onnx.ModelProto, bytes]:
    raw = read_user_file(path, "the model")
    try:
        model = onnx.load_from_string(raw)
    except Exception:  # protobuf raises several types for truncated or foreign bytes
        raise TinygenError("not an ONNX model (the protobuf does not parse)", file=path) from None
    if not model.HasField("graph") or len(model.graph.node) == 0:
        raise TinygenError("not an ONNX model (no graph or no nodes)", file=path)
    # onnx would look for external data relative to the current folder, and the file hash
    # in the emitted header would not cover it: refuse it, whatever the location says
    tensors = list(model.graph.initializer) + [a.t for n in model.graph.node
                                               for a in n.attribute if a.HasField("t")]
    for t in tensors:
        if t.data_location == onnx.TensorProto.EXTERNAL:
            raise TinygenError(f"tensor '{t.name}' keeps its data in an external file; save "
                               "the model with its weights inside (onnx.save_model(..., "
                               "save_as_external_data=False))", file=path)
    return model, raw


def _pin_shapes(model: onnx.ModelProto, pinned: dict[str, tuple[int, ...]], path: str) -> None:
    init_names = {i.name for i in model.graph.initializer}
    known = {i.name for i in model.graph.input if i.name not in init_names}
    for name in pinned:
        if name not in known:
            raise TinygenError(f"--input-shape names '{name}', which is not a graph input "
                               f"(inputs: {', '.join(sorted(known)) or 'none'})", file=path)
    for inp in model.graph.input:
        if inp.name in init_names:
            continue
        dims = inp.type.tensor_type.shape.dim
        if inp.name in pinned:
            shape = pinned[inp.name]
            if len(dims) and len(dims) != len(shape):
                raise TinygenError(f"--input-shape for '{inp.name}' has rank {len(shape)}, "
                                   f"the model says rank {len(dims)}", file=path)
            for i, (d, want) in enumerate(zip(dims, shape, strict=False)):
                if d.HasField("dim_value") and d.dim_value != want:
                    raise TinygenError(f"--input-shape for '{inp.name}' says {want} at axis "
                                       f"{i}, where the model fixes {d.dim_value}", file=path)
            del dims[:]
            for d in shape:
                dims.add().dim_value = d
        for i, d in enumerate(dims):
            if d.HasField("dim_value") and d.dim_value <= 0:
                raise TinygenError(f"input '{inp.name}' has dimension {d.dim_value} at axis "
                                   f"{i} (size 0 or negative: nothing to compute)", file=path)
            if not d.HasField("dim_value"):
                sym = d.dim_param or "?"
                raise TinygenError(
                    f"input '{inp.name}' has a symbolic dimension '{sym}' (axis {i}); pin it "
                    f"with --input-shape {inp.name}=" + "x".join(
                        str(x.dim_value) if x.dim_value > 0 else "N" for x in dims), file=path)


def _topological(nodes: list[onnx.NodeProto], available: set[str], path: str):
    """Order nodes so each comes after its producers; refuse cycles and dangling inputs.

    Of the nodes that can run, the earliest in the file goes first, so a file that is
    already in order keeps its order. O(n log n): a hostile file cannot make this slow.
    """
    produced_by = {}
    for n in nodes:
        for o in n.output:
            if o:
                produced_by[o] = n
    done = set(available) | {""}
    waiting: dict[str, list[int]] = {}
    missing = []
    ready: list[int] = []
    for idx, n in enumerate(nodes):
        need = {i for i in n.input if i not in done}
        missing.append(len(need))
        for i in need:
            waiting.setdefault(i, []).append(idx)
        if not need:
            ready.append(idx)
    heapq.heapify(ready)
    order = []
    while ready:
        n = nodes[heapq.heappop(ready)]
        order.append(n)
        for o in n.output:
            if o in done:
                continue
            done.add(o)
            for j in waiting.pop(o, []):
                missing[j] -= 1
                if missing[j] == 0:
                    heapq.heappush(ready, j)
    if len(order) != len(nodes):
        pending = [n for idx, n in enumerate(nodes) if missing[idx] > 0]
        raise _stuck_error(pending, done, produced_by, path)
    return order


def _stuck_error(pending, done: set[str], produced_by: dict, path: str) -> TinygenError:
    """Why no pending node can run: an input nothing produces, else a cycle."""
    for n in pending:  # a dangling input explains everything waiting on it: name it first
        for i in n.input:
            if i not in done and i not in produced_by:
                return TinygenError(f"input '{i}' is produced by no node, initializer or "
                                    "input", file=path, node=_label(n), op=n.op_type)
    n = pending[0]
    i = next(i for i in n.input if i not in done)
    return TinygenError(f"input '{i}' is part of a cycle", file=path, node=_label(n),
                        op=n.op_type)


def _label(n: onnx.NodeProto) -> str:
    return n.name or (n.output[0] if n.output else "")


def _fold(node: onnx.NodeProto, consts: dict[str, np.ndarray], opset: int):
    from onnx.reference import ReferenceEvaluator

    ins = [helper.make_tensor_value_info(i, helper.np_dtype_to_tensor_dtype(consts[i].dtype),
                                         consts[i].shape) for i in node.input if i]
    outs = [helper.make_tensor_value_info(o, onnx.TensorProto.UNDEFINED, None)
            for o in node.output]
    g = helper.make_graph([node], "fold", ins, outs)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
    feeds = {i: consts[i] for i in node.input if i}
    return ReferenceEvaluator(m).run(None, feeds)


def load_model(path: str, input_shapes: list[str] | None = None) -> ModelView:
    """Read, check and fold an ONNX model; every tensor gets a static shape where known."""
    model, raw = _read_model(path)
    model_spec.check_graph(model, path)
    pinned = parse_input_shapes(input_shapes)
    _pin_shapes(model, pinned, path)
    # dangling inputs and cycles first: our message names the node, the checker's does not
    g0 = model.graph
    _topological(list(g0.node), {i.name for i in g0.initializer} | {i.name for i in g0.input},
                 path)
    try:
        onnx.checker.check_model(model)
    except onnx.checker.ValidationError as exc:
        text = " ".join(str(exc).split()) or "invalid model"
        raise TinygenError(f"onnx checker: {text[:300]}", file=path) from None
    opset = {o.domain or "": o.version for o in model.opset_import}
    try:
        inferred = shape_inference.infer_shapes(model, strict_mode=False)
    except Exception as exc:  # inference failing is not fatal: we compute shapes ourselves
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        if "Inferred shape and existing shape differ" in first or "Incompatible" in first:
            raise TinygenError(f"shape mismatch: {first}", file=path) from None
        inferred = model
    g = inferred.graph
    consts: dict[str, np.ndarray] = {}
    for init in g.initializer:
        try:
            consts[init.name] = numpy_helper.to_array(init)
        except Exception:
            raise TinygenError(f"initializer '{init.name}' cannot be read (external data or "
                               "a broken tensor)", file=path) from None
    shapes: dict[str, tuple[int, ...]] = {}
    dtypes: dict[str, np.dtype] = {}
    for vi in list(g.input) + list(g.value_info) + list(g.output):
        tt = vi.type.tensor_type
        if tt.elem_type:
            dtypes[vi.name] = helper.tensor_dtype_to_np_dtype(tt.elem_type)
        if tt.HasField("shape") and all(d.HasField("dim_value") for d in tt.shape.dim):
            shapes[vi.name] = tuple(int(d.dim_value) for d in tt.shape.dim)
    for name, arr in consts.items():
        shapes[name] = tuple(arr.shape)
        dtypes[name] = arr.dtype
    inputs = [i.name for i in g.input if i.name not in consts]
    nodes = _topological(list(g.node), set(consts) | set(inputs), path)
    kept = []
    for n in nodes:
        foldable = n.domain in ("", "ai.onnx") and n.op_type in FOLDABLE
        if n.op_type == "Shape" and n.input[0] in shapes and n.input[0] not in consts:
            start = next((helper.get_attribute_value(a) for a in n.attribute
                          if a.name == "start"), 0)
            end = next((helper.get_attribute_value(a) for a in n.attribute if a.name == "end"),
                       None)
            consts[n.output[0]] = np.array(shapes[n.input[0]][start:end], dtype=np.int64)
            continue
        if foldable and all((i in consts) for i in n.input if i):
            try:
                vals = _fold(n, consts, opset.get("", 17))
            except Exception as exc:
                raise TinygenError(f"cannot evaluate constant expression: {exc}", file=path,
                                   node=n.name, op=n.op_type) from None
            for o, v in zip(n.output, vals, strict=False):
                consts[o] = np.asarray(v)
                shapes[o] = tuple(np.asarray(v).shape)
                dtypes[o] = np.asarray(v).dtype
            continue
        kept.append(n)
    outputs = [o.name for o in g.output]
    for o in outputs:
        if o in consts:
            raise TinygenError(f"graph output '{o}' is a constant; nothing to compute",
                               file=path)
    name = g.name or Path(path).stem
    return ModelView(path=path, sha256=hashlib.sha256(raw).hexdigest(), name=name, nodes=kept,
                     consts=consts, shapes=shapes, dtypes=dtypes, inputs=inputs,
                     outputs=outputs, opset=opset,
                     overridable=model_spec.overridable_initializers(model),
                     declared_outputs=model_spec.declared_output_shapes(model))
