"""Small structural passes: drop what nothing reads; keep caller-visible buffers apart."""
from __future__ import annotations

from tinygen.ir import Graph, Op, Tensor


def drop_dead_ops(graph: Graph) -> Graph:
    """Remove ops whose outputs reach no graph output, and tensors nothing uses.

    Needs: the lowered IR. Leaves: every op contributes to some graph output.
    """
    live = {io.name for io in graph.outputs}
    kept = []
    for op in reversed(graph.ops):
        if any(o in live for o in op.outputs):
            kept.append(op)
            live.update(op.inputs)
    graph.ops = list(reversed(kept))
    used = live | {io.name for io in graph.inputs}
    graph.tensors = {n: t for n, t in graph.tensors.items() if n in used}
    return graph


def isolate_io(graph: Graph) -> Graph:
    """Give every graph output a buffer of its own.

    A graph output that is a view of a graph input or of another output would make two
    caller-visible buffers one; a copy op separates them. Needs: assign_layout.
    """
    root: dict[str, str] = {io.name: io.name for io in graph.inputs}
    for op in graph.ops:
        for o in op.outputs:
            root[o] = root.get(op.inputs[0], op.inputs[0]) if op.kind == "view" else o
    claimed = {io.name for io in graph.inputs}
    for io in graph.outputs:
        r = root.get(io.name, io.name)
        if r in claimed:
            t = graph.tensors[io.name]
            src = Tensor(io.name + "@src", t.shape, t.dtype, t.quant, None, t.layout)
            graph.tensors[src.name] = src
            for op in graph.ops:
                op.outputs = [src.name if o == io.name else o for o in op.outputs]
                op.inputs = [src.name if i == io.name else i for i in op.inputs]
            graph.ops.append(Op("copy", [src.name], [io.name], {}, io.onnx_name, "output"))
        claimed.add(r if r not in claimed else io.name)
    return graph


def collapse_views(graph: Graph) -> Graph:
    """Join chains of views (Reshape after Flatten after a Q/DQ alias ...) into one view.

    Needs: the lowered IR. Leaves: no view whose input is a view output read by nothing else.
    """
    changed = True
    while changed:
        changed = False
        for op in graph.ops:
            if op.kind != "view":
                continue
            prod = graph.producer(op.inputs[0])
            mid = op.inputs[0]
            if prod is None or prod.kind != "view" or len(graph.consumers(mid)) != 1 \
                    or graph.is_graph_output(mid):
                continue
            op.inputs[0] = prod.inputs[0]
            graph.ops.remove(prod)
            del graph.tensors[mid]
            changed = True
            break
    return graph
