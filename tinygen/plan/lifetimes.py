"""Buffers and their lifetimes for one execution order.

A buffer is one piece of memory shared by a tensor, the views of it (Reshape, Flatten, ...)
and, when in-place execution is allowed, the outputs of kernels that may overwrite their
input (tables, additions) at the input's last use. Its lifetime is the closed step range
[first, last] from the op that writes it to the last op that reads it; graph inputs are
written at step -1 and graph outputs read at step len(ops). A kernel call that needs
scratch (Kernel.scratch_bytes) gets a buffer of its own, "scratch:<op index>", live at that
op's step only and holding no tensor.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from tinygen.ir import Graph
from tinygen.kernels import KERNELS

# Kernels whose output may overwrite an input the op reads last (see the kernel headers).
INPLACE_OK = {"lut": (0,), "add": (0, 1), "mul": (0, 1)}


@dataclass
class Buffer:
    name: str
    size: int  # bytes
    first: int
    last: int
    tensors: list[str] = field(default_factory=list)
    external: str | None = None  # "input:i" / "output:i" with --io external
    region: str | None = None
    offset: int | None = None
    scratch_of: int | None = None  # op index whose kernel call uses this buffer as scratch

    def overlaps(self, other: Buffer) -> bool:
        return not (self.last < other.first or other.last < self.first)


def build_buffers(graph: Graph, order: list[int], inplace: bool, io: str
                  ) -> tuple[dict[str, Buffer], dict[str, str]]:
    """Group tensors into buffers; returns (buffers by name, tensor -> buffer name)."""
    tensors = graph.tensors
    step_of = {k: s for s, k in enumerate(order)}
    owner: dict[str, str] = {}
    buffers: dict[str, Buffer] = {}
    end = len(order)
    io_names = {io_.name for io_ in graph.inputs} | {io_.name for io_ in graph.outputs}

    # per buffer, the last step any of its tensors is read, and whether one is graph I/O
    # (kept as tensors join, so in-place chains stay linear)
    read_until: dict[str, int] = {}
    holds_io: set[str] = set()

    def new_buffer(t: str, first: int) -> None:
        buffers[t] = Buffer(t, tensors[t].nbytes, first, first, [t])
        owner[t] = t
        read_until[t] = last_use.get(t, -1)
        if t in io_names:
            holds_io.add(t)

    def join(t: str, name: str) -> None:
        owner[t] = name
        buffers[name].tensors.append(t)
        read_until[name] = max(read_until[name], last_use.get(t, -1))
        if t in io_names:
            holds_io.add(name)

    last_use: dict[str, int] = {}
    for k in order:
        for t in graph.ops[k].inputs:
            last_use[t] = step_of[k]
    for i, io_ in enumerate(graph.inputs):
        new_buffer(io_.name, -1)
        if io == "external":
            buffers[io_.name].external = f"input:{i}"
    for k in order:
        op, s = graph.ops[k], step_of[k]
        for t in op.inputs:
            if t in owner:
                buffers[owner[t]].last = max(buffers[owner[t]].last, s)
        scratch = scratch_bytes(op)
        if scratch:
            name = scratch_name(k)
            buffers[name] = Buffer(name, scratch, s, s, [], scratch_of=k)
        for extra in op.outputs[1:]:  # a streamed run's rings and scratch (passes/stream.py)
            new_buffer(extra, s)
        out = op.outputs[0]
        if op.kind == "view":
            join(out, owner[op.inputs[0]])
            continue
        target = None
        if inplace and op.kind in INPLACE_OK:
            for idx in INPLACE_OK[op.kind]:
                if idx >= len(op.inputs):
                    continue
                t = op.inputs[idx]
                if t not in owner or tensors[t].is_const:
                    continue
                buf = buffers[owner[t]]
                same = (tensors[t].nbytes == tensors[out].nbytes
                        and tensors[t].shape == tensors[out].shape
                        and tensors[t].layout == tensors[out].layout)
                alive_later = read_until[buf.name] > s
                if same and not alive_later and buf.name not in holds_io \
                        and out not in io_names:
                    target = buf.name
                    break
        if target is not None:
            join(out, target)
            buffers[target].last = max(buffers[target].last, s)
        else:
            new_buffer(out, s)
    for i, io_ in enumerate(graph.outputs):
        buf = buffers[owner[io_.name]]
        buf.last = end
        if io == "external":
            buf.external = f"output:{i}"
    for buf in buffers.values():
        for t in buf.tensors:
            buf.last = max(buf.last, last_use.get(t, buf.first))
    return buffers, owner


def scratch_name(op_index: int) -> str:
    return f"scratch:{op_index}"


def scratch_bytes(op) -> int:
    """Arena bytes of scratch the op's kernel call needs (0 for none)."""
    call = op.attrs.get("call")
    if call is None:
        return 0
    return int(KERNELS[call.func].scratch_bytes(call.params))


def live_bytes_per_step(buffers: dict[str, Buffer], steps: int) -> list[int]:
    """Bytes of arena buffers live at each step -1 .. steps (index s + 1), by a sweep over
    the lifetimes' ends: O(buffers + steps)."""
    delta = [0] * (steps + 3)
    for b in buffers.values():
        if b.external is None and b.first <= steps and b.last >= -1:
            delta[max(b.first, -1) + 1] += b.size
            delta[min(b.last, steps) + 2] -= b.size
    live, total = [], 0
    for d in delta[:-1]:
        total += d
        live.append(total)
    return live


def lower_bound(buffers: dict[str, Buffer], steps: int) -> int:
    """Largest total size of buffers live at one step (arena buffers only)."""
    return max(live_bytes_per_step(buffers, steps), default=0)
