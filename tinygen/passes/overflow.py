"""Prove at compile time that no int32 accumulator can overflow.

For conv and fully connected layers with constant weights the bound is exact in the
weights: |acc[c]| <= |bias[c]| + max|x - x_zp| * sum over taps |w - w_zp[c]|. A layer
whose bound passes 2^31 - 1 is refused (the kernels never wrap silently).
"""
from __future__ import annotations

import numpy as np

from tinygen.errors import TinygenError
from tinygen.ir import Graph

INT32_MAX = 2**31 - 1


def accumulator_bound(op, graph: Graph) -> int:
    t = graph.tensors
    x, w = t[op.inputs[0]], t[op.inputs[1]]
    zx = x.quant.scalar_zp()
    dx = max(127 - zx, zx + 128)
    bias_name = op.inputs[2] if len(op.inputs) > 2 else ""
    bias = np.abs(t[bias_name].data.astype(np.int64)) if bias_name else 0
    if not w.is_const:
        zw = w.quant.scalar_zp()
        return int(np.max(bias + x.shape[-1] * dx * max(127 - zw, zw + 128)))
    wd = w.data.astype(np.int64)
    # const weights are [out, ...] for conv and [..., out, depth] for fc: one row per output
    wd = wd.reshape(wd.shape[0], -1) if op.kind == "conv" else wd.reshape(-1, w.shape[-1])
    outs = w.shape[0] if op.kind == "conv" else w.shape[-2]
    zw = np.resize(np.broadcast_to(np.asarray(w.quant.zero_point, np.int64), (outs,)),
                   wd.shape[0])
    per_channel = np.abs(wd - zw[:, None]).sum(axis=1) * dx
    return int(np.max(bias + per_channel))


def check_accumulators(graph: Graph) -> Graph:
    """Refuse any conv/fc whose int32 accumulator could overflow. Needs: lower_params."""
    for op in graph.ops:
        if op.kind not in ("conv", "fc"):
            continue
        bound = accumulator_bound(op, graph)
        op.attrs["acc_bound"] = bound
        if bound > INT32_MAX:
            raise TinygenError(f"int32 accumulator could overflow (bound {bound} > 2^31-1); "
                               "split the layer or reduce its depth", file=graph.source_path,
                               node=op.name, op=op.onnx_op)
    return graph
