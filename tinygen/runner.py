"""Run the planned IR with the numpy reference kernels (the oracle for the emitted C).

Inputs and outputs are in the C buffers' form: storage order, int8 domain for activations
(uint8 I/O values shifted by -128), int32 where the tensor is int32.
"""
from __future__ import annotations

import numpy as np

from tinygen.ir import Graph
from tinygen.kernels import KERNELS
from tinygen.passes.layout import storage_data
from tinygen.reference.rows import run_bands


def run_reference(graph: Graph, inputs: list[np.ndarray], order: list[int] | None = None
                  ) -> list[np.ndarray]:
    """Evaluate the graph; `inputs` are storage-order arrays, one per graph input."""
    env = run_reference_all(graph, inputs, order)
    return [env[io.name] for io in graph.outputs]


def run_reference_all(graph: Graph, inputs: list[np.ndarray], order: list[int] | None = None
                      ) -> dict[str, np.ndarray]:
    """Evaluate the graph and keep every tensor: {name: storage-order array} (constants
    included once read). What `tinygen check --trace` compares the C's intermediates with."""
    env: dict[str, np.ndarray] = {}
    for io, arr in zip(graph.inputs, inputs, strict=True):
        t = graph.tensors[io.name]
        env[io.name] = np.asarray(arr).reshape(t.storage_shape()).astype(t.dtype)

    def get(name: str) -> np.ndarray | None:
        if not name:
            return None
        if name not in env:
            t = graph.tensors[name]
            env[name] = storage_data(t)
        return env[name]

    for k in order if order is not None else range(len(graph.ops)):
        op = graph.ops[k]
        out = graph.tensors[op.outputs[0]]
        if op.kind == "view":
            y = get(op.inputs[0])
        elif op.kind == "copy":
            y = get(op.inputs[0]).copy()
        elif op.kind == "stream":
            y = run_stream(graph, op.attrs["run"], get)
        else:
            call = op.attrs["call"]
            kern = KERNELS[call.func]
            args = [get(n) for n in call.args[:-1]]
            if call.batch > 1:
                parts = []
                for i in range(call.batch):
                    sliced = [a if a is None or st == 0 else
                              a.reshape(-1)[i * st:(i + 1) * st]
                              for a, st in zip(args, call.batch_step, strict=False)]
                    parts.append(np.asarray(kern.reference(call.params, *sliced)).reshape(-1))
                y = np.concatenate(parts)
            else:
                y = kern.reference(call.params, *args)
        env[out.name] = np.asarray(y).reshape(out.storage_shape()).astype(out.dtype)
    return env


def run_stream(graph: Graph, run, get) -> np.ndarray:
    """A streamed run (passes/stream.py) through run_rows, band by band and ring by ring, the
    same calls the emitted band loop makes; returns the run's output."""
    layers = []
    for m in run.members:
        call = m.call
        p = call.params
        layers.append((KERNELS[call.func].reference, p, [get(n) for n in call.args[1:-1]],
                       p.in_c, p.out_c))
    rings = []
    for name in run.rings:
        t = graph.tensors[name]
        # rows never written must not be read: start the rings as garbage, not zeros
        rings.append(np.full(t.size, 0x5A, dtype=t.dtype))
    out = graph.tensors[run.members[-1].y]
    y = np.zeros(out.size, dtype=out.dtype)
    x = get(run.members[0].x).reshape(-1)
    return run_bands(layers, x, rings, y, run.rows)
