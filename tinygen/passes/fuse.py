"""Fold standalone Relu/Clip tables into the clamp of the op that produces their input."""
from __future__ import annotations

from tinygen.frontend.build import activation_range
from tinygen.frontend.ops import same_quant
from tinygen.ir import Graph

PRODUCERS = {"conv", "fc", "add", "mul"}


def fuse_activation(graph: Graph) -> Graph:
    """Relu/Clip ('lut' with fn relu/clip) after a conv/fc/add/mul becomes its clamp.

    Needs: the lowered IR. Leaves: no relu/clip table whose producer is one of those ops with
    a single consumer and the same output quantization. The producer then writes the
    table's output tensor directly.
    """
    ops = graph.ops
    removed = set()
    for i, op in enumerate(ops):
        if op.kind != "lut" or op.attrs.get("fn") not in ("relu", "clip"):
            continue
        x, y = graph.tensors[op.inputs[0]], graph.tensors[op.outputs[0]]
        prod = graph.producer(x.name)
        if prod is None or prod.kind not in PRODUCERS or x.dtype != "int8":
            continue
        if len(graph.consumers(x.name)) != 1 or graph.is_graph_output(x.name):
            continue
        if not same_quant(x.quant, y.quant):
            continue
        args = op.attrs.get("fn_args", {})
        lo_r = 0.0 if op.attrs["fn"] == "relu" else args.get("min")
        hi_r = None if op.attrs["fn"] == "relu" else args.get("max")
        lo, hi = activation_range("clamp", lo_r, hi_r, y.quant)
        plo, phi = prod.attrs.get("act", (-128, 127))
        prod.attrs["act"] = (max(lo, plo), min(hi, phi))
        prod.outputs[0] = y.name
        del graph.tensors[x.name]
        removed.add(i)
    graph.ops = [op for i, op in enumerate(ops) if i not in removed]
    return graph
