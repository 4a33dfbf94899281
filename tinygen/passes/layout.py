"""Choose each activation's storage order; insert the transposes that order needs.

Spatial tensors (rank 3 and 4) are stored channels-last so that conv and pooling kernels
read each pixel's channels contiguously. Kernels that need ONNX order (fully connected,
reshapes that really move bytes, Transpose) get an explicit conversion in front of them.
"""
from __future__ import annotations

import numpy as np

from tinygen.errors import TinygenError
from tinygen.ir import CHANNELS_LAST, PLAIN, Graph, Op, Tensor, storage_perm, storage_shape

SPATIAL = {"conv", "maxpool", "avgpool"}


def natural_layout(t: Tensor) -> str:
    return CHANNELS_LAST if len(t.shape) >= 3 else PLAIN


def same_bytes(shape, layout_a: str, layout_b: str) -> bool:
    """True when two layouts of one logical shape put the bytes in the same order."""
    if layout_a == layout_b or len(shape) < 3:
        return True
    non_unit = [i for i in range(len(shape)) if shape[i] != 1]
    pa = [a for a in storage_perm(len(shape), layout_a) if a in non_unit]
    pb = [a for a in storage_perm(len(shape), layout_b) if a in non_unit]
    return pa == pb


def conversion_perm(shape, src: str, dst: str) -> tuple[int, ...]:
    """Storage-axis permutation taking a tensor stored in `src` order to `dst` order."""
    ps, pd = storage_perm(len(shape), src), storage_perm(len(shape), dst)
    return tuple(ps.index(a) for a in pd)


def assign_layout(graph: Graph) -> Graph:
    """Set Tensor.layout everywhere; add 'transpose' ops where an op needs another order.

    Needs: the lowered IR (logical ONNX shapes). Leaves: every op's inputs in the layout its
    kernel expects; `transpose` ops carry a storage-axis perm (attr `storage_perm`).
    """
    tensors = graph.tensors
    for io in graph.inputs:
        tensors[io.name].layout = natural_layout(tensors[io.name])
    converted: dict[tuple[str, str], str] = {}
    new_ops: list[Op] = []

    def want(name: str, layout: str, op: Op) -> str:
        t = tensors[name]
        if t.is_const:
            if len(t.shape) >= 3:
                t.layout = layout  # constants are re-laid at compile time, for free
            return name
        if same_bytes(t.shape, t.layout, layout):
            if t.layout == layout:
                return name
        key = (name, layout)
        if key not in converted:
            out = Tensor(f"{name}@{layout}", t.shape, t.dtype, t.quant, None, layout)
            tensors[out.name] = out
            if same_bytes(t.shape, t.layout, layout):
                new_ops.append(Op("view", [name], [out.name], {}, op.name, op.onnx_op))
            else:
                perm = conversion_perm(t.shape, t.layout, layout)
                new_ops.append(Op("transpose", [name], [out.name],
                                  {"storage_perm": perm, "inserted": True}, op.name,
                                  op.onnx_op))
            converted[key] = out.name
        return converted[key]

    for op in graph.ops:
        outs = [tensors[o] for o in op.outputs]
        k = op.kind
        if k in SPATIAL:
            op.inputs[0] = want(op.inputs[0], CHANNELS_LAST, op)
            if k == "conv":
                tensors[op.inputs[1]].layout = CHANNELS_LAST  # OIHW stored OHWI
            outs[0].layout = CHANNELS_LAST
        elif k in ("lut", "copy"):
            outs[0].layout = tensors[op.inputs[0]].layout
        elif k in ("add", "mul"):
            # The kernel broadcasts through strides over the output's storage order: a
            # constant operand is re-laid into that order at compile time; an activation
            # must already walk its non-unit axes in that order (else it is converted).
            rank = len(outs[0].shape)
            acts = [tensors[n] for n in op.inputs
                    if not tensors[n].is_const and len(tensors[n].shape) == rank]
            lay = acts[0].layout if acts else natural_layout(outs[0])
            if rank < 3:
                lay = PLAIN
            for i, n in enumerate(op.inputs):
                t = tensors[n]
                if t.is_const:
                    if len(t.shape) < rank:
                        t = expand_const(tensors, t, rank)
                        op.inputs[i] = t.name
                    t.layout = lay if rank >= 3 else PLAIN
                elif len(t.shape) == rank and not same_bytes(t.shape, t.layout, lay):
                    op.inputs[i] = want(n, lay, op)
                elif len(t.shape) < rank:
                    full = (1,) * (rank - len(t.shape)) + tuple(t.shape)
                    if not same_bytes(full, PLAIN, lay):
                        raise TinygenError(f"broadcasting a rank-{len(t.shape)} activation "
                                           f"over a {lay} rank-{rank} tensor is not supported",
                                           file=graph.source_path, node=op.name,
                                           op=op.onnx_op)
            outs[0].layout = lay
        elif k == "concat":
            lay = tensors[op.inputs[0]].layout
            op.inputs = [want(n, lay, op) for n in op.inputs]
            outs[0].layout = lay
            op.attrs["storage_axis"] = storage_perm(len(outs[0].shape), lay).index(
                op.attrs["axis"])
        elif k == "softmax":
            t = tensors[op.inputs[0]]
            sp = storage_perm(len(t.shape), t.layout)
            if sp.index(op.attrs["axis"]) != len(t.shape) - 1:
                op.inputs[0] = want(op.inputs[0], PLAIN, op)
                t = tensors[op.inputs[0]]
            outs[0].layout = t.layout
        elif k == "pad":
            outs[0].layout = tensors[op.inputs[0]].layout
        elif k == "view":
            t = tensors[op.inputs[0]]
            if tuple(outs[0].shape) == tuple(t.shape):
                outs[0].layout = t.layout
            elif fold_flatten_into_fc(graph, op, t, outs[0]):
                outs[0].layout = PLAIN
            else:
                op.inputs[0] = want(op.inputs[0], PLAIN, op)
                outs[0].layout = PLAIN
        elif k == "transpose":
            t = tensors[op.inputs[0]]
            inv = storage_perm(len(t.shape), t.layout)
            op.attrs["storage_perm"] = tuple(inv.index(p) for p in op.attrs["perm"])
            outs[0].layout = PLAIN
        elif k == "fc":
            op.inputs[0] = want(op.inputs[0], PLAIN, op)
            if not tensors[op.inputs[1]].is_const:
                op.inputs[1] = want(op.inputs[1], PLAIN, op)
            outs[0].layout = PLAIN
        else:
            raise AssertionError(f"layout: unknown op kind {k}")
        new_ops.append(op)
    graph.ops = new_ops
    return graph


def expand_const(tensors: dict, t: Tensor, rank: int) -> Tensor:
    """A copy of constant t with leading unit axes up to `rank` (numpy broadcasting)."""
    shape = (1,) * (rank - len(t.shape)) + tuple(t.shape)
    name = f"{t.name}@r{rank}"
    if name not in tensors:
        tensors[name] = Tensor(name, shape, t.dtype, t.quant, t.data.reshape(shape), PLAIN)
    return tensors[name]


def fold_flatten_into_fc(graph: Graph, view: Op, src: Tensor, out: Tensor) -> bool:
    """Flatten of a channels-last tensor feeding only a constant-weight fc: permute the
    weight columns at compile time instead of transposing the activation at run time."""
    if src.layout == PLAIN or len(src.shape) < 3 or len(out.shape) != 2:
        return False
    if out.shape != (src.shape[0], src.size // src.shape[0]):
        return False
    users = graph.consumers(out.name)
    if len(users) != 1 or users[0].kind != "fc" or users[0].inputs[0] != out.name \
            or graph.is_graph_output(out.name):
        return False
    fc = users[0]
    w = graph.tensors[fc.inputs[1]]
    if not w.is_const or fc.attrs.get("batch", 1) != 1 or w.shape[-1] != out.shape[1]:
        return False
    # storage position s holds logical (flattened ONNX) index plain[s]
    per_image = np.arange(out.shape[1]).reshape(src.shape[1:])
    plain = np.transpose(per_image, [p - 1 for p in storage_perm(len(src.shape),
                                                                  src.layout)[1:]]).reshape(-1)
    name = graph.tensors[fc.inputs[1]].name + "@cl"
    graph.tensors[name] = Tensor(name, w.shape, w.dtype, w.quant, w.data[:, plain], PLAIN)
    fc.inputs[1] = name
    return True


def storage_data(t: Tensor) -> np.ndarray:
    """A constant's data in its storage order (what goes to flash)."""
    assert t.data is not None
    perm = storage_perm(len(t.shape), t.layout)
    return np.ascontiguousarray(np.transpose(t.data.reshape(t.shape), perm))


__all__ = ["assign_layout", "storage_data", "storage_shape", "same_bytes"]
