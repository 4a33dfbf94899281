"""The pipeline, stage by stage: load -> passes -> schedule -> plan -> (emit).

`compile_model` reads as the pipeline itself; each stage reads only what the one before it
made. The result carries every figure the CLI reports.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np

from tinygen.errors import TinygenError
from tinygen.frontend import load_graph
from tinygen.ir import Graph
from tinygen.passes.cleanup import collapse_views, drop_dead_ops, isolate_io
from tinygen.passes.fuse import fuse_activation
from tinygen.passes.layout import assign_layout
from tinygen.passes.overflow import check_accumulators
from tinygen.passes.params import choose_requant_forms, lower_params
from tinygen.passes.stream import stream_layers, stream_runs
from tinygen.plan import MemoryPlan, build_buffers, plan_memory, verify_plan
from tinygen.plan.lifetimes import lower_bound
from tinygen.schedule import order_ops


@dataclass
class BuildOptions:
    """The build flags every code-building verb takes (docs/cli.md)."""

    requant: str = "fixed"
    prefix: str = "model"
    input_shapes: list[str] = field(default_factory=list)
    planner: str = "auto"
    order: str = "given"
    align: int = 8
    arena_limit: int | None = None
    flash_limit: int | None = None
    inplace: bool = True
    regions: list[tuple[str, int]] = field(default_factory=list)
    io: str = "arena"
    kernels: str = "auto"  # auto: the fastest path of each core; portable: plain C only
    tables: str = "onnx"  # Sigmoid/Tanh/Softmax: the ONNX definition, or onnxruntime's own
    stream: str = "auto"  # auto: row-stream the runs that lower the arena; off: whole tensors


def options_text(opts: BuildOptions) -> str:
    """The build flags as the emitted files state them (header comment, 'Flags:')."""
    parts = [f"--requant {opts.requant}", f"--planner {opts.planner}", f"--order {opts.order}",
             f"--align {opts.align}", f"--io {opts.io}", f"--kernels {opts.kernels}"]
    if opts.tables != "onnx":
        parts.append(f"--tables {opts.tables}")
    if not opts.inplace:
        parts.append("--no-inplace")
    if opts.stream != "auto":
        parts.append(f"--stream {opts.stream}")
    parts += [f"--region {n}={s}" for n, s in opts.regions]
    parts += [f"--input-shape {s}" for s in opts.input_shapes]
    return " ".join(parts)


@dataclass
class Compiled:
    graph: Graph
    plan: MemoryPlan
    options: BuildOptions
    macs: int
    weights_bytes: int
    per_op_macs: list[int]
    const_bytes: int = 0  # all flash constants of the emitted tree (set by codegen)
    # whole-tensor execution (no streamed runs): lower bound and arena of its plan (None:
    # it does not fit the regions at all)
    whole_bound: int | None = None
    whole_arena: int | None = None


def count_macs(graph: Graph) -> list[int]:
    """Multiply-accumulates per op (conv and fully connected; other ops count 0)."""
    out = []
    for op in graph.ops:
        call = op.attrs.get("call")
        p = call.params if call else None
        if op.kind == "stream":  # each member's rows, as the band loop computes them
            out.append(sum(_conv_macs(m.call.params, sum(band[j][1] - band[j][0]
                                                         for band in op.attrs["run"].rows))
                           for j, m in enumerate(op.attrs["run"].members)))
        elif op.kind == "conv":
            out.append(_conv_macs(p, p.out_h))
        elif op.kind == "fc":
            out.append(p.rows * p.out * p.depth)
        else:
            out.append(0)
    return out


def _conv_macs(p, rows: int) -> int:
    """MACs of `rows` output rows of a convolution (every image of the batch)."""
    return p.n * rows * p.out_w * p.out_c * p.k_h * p.k_w * (p.in_c // p.groups)


def constant_bytes(graph: Graph) -> int:
    """Bytes of constant tensors the ops read (weights, biases); tables and params extra."""
    used = {n for op in graph.ops for n in op.inputs}
    return sum(t.nbytes for n, t in graph.tensors.items() if t.is_const and n in used)


# Kernel dimensions, counts and arena offsets are int32 in the C: every tensor and the arena
# must stay below 2 GiB (far past any microcontroller, so this only stops nonsense shapes).
MAX_BYTES = 2**31 - 1


def check_sizes(graph: Graph) -> Graph:
    """Refuse tensors the int32 kernel arguments cannot describe. Needs: the lowered IR."""
    for op in graph.ops:
        for name in op.outputs:
            t = graph.tensors[name]
            if t.nbytes > MAX_BYTES:
                raise TinygenError(f"tensor '{name}' {list(t.shape)} needs {t.nbytes} bytes; "
                                   f"tensors must stay below 2 GiB", file=graph.source_path,
                                   node=op.name, op=op.onnx_op)
    for io in graph.inputs:
        t = graph.tensors[io.name]
        if t.nbytes > MAX_BYTES:
            raise TinygenError(f"graph input '{io.onnx_name}' {list(t.shape)} needs {t.nbytes} "
                               "bytes; tensors must stay below 2 GiB", file=graph.source_path)
    return graph


def compile_model(path: str, opts: BuildOptions) -> Compiled:
    graph = load_graph(path, opts.input_shapes)
    graph = check_sizes(graph)
    graph = drop_dead_ops(graph)
    graph = collapse_views(graph)
    graph = fuse_activation(graph)
    graph = assign_layout(graph)
    graph = isolate_io(graph)
    graph = lower_params(graph, opts.requant, opts.tables)
    graph = check_accumulators(graph)
    graph = choose_requant_forms(graph)
    whole = plan_whole(graph, opts)
    if opts.stream == "auto":
        graph = stream_layers(graph, lambda g: bound_of(g, opts),
                              lambda g: arena_of(g, opts), int(sum(count_macs(graph))))
    plan = whole if whole is not None and not stream_runs(graph) else None
    plan = check_limits(graph, plan, opts) if plan else plan_arena(graph, opts)
    macs = count_macs(graph)
    c = Compiled(graph, plan, opts, int(sum(macs)), constant_bytes(graph), macs,
                 whole_bound=whole.lower_bound if whole else None,
                 whole_arena=whole.arena_bytes if whole else None)
    from tinygen.codegen.emit import render_tree  # sets c.const_bytes: every flash constant
    render_tree(c, "")
    if opts.flash_limit is not None and c.const_bytes > opts.flash_limit:
        raise TinygenError(f"constants need {c.const_bytes} bytes of flash (weights "
                           f"{c.weights_bytes}), over --flash-limit {opts.flash_limit}",
                           file=path)
    return c


def region_name_problem(name: str) -> str:
    """Why `name` cannot name a memory region ('' when it can). Names become C identifiers
    (<prefix>_region_<name>, <PREFIX>_REGION_<NAME>_BYTES) with their spelling kept."""
    if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]{0,15}", name):
        return (f"region name '{name}' must be a C identifier: letters, digits and _, "
                "not starting with a digit, at most 16")
    return ""


def check_regions(regions: list[tuple[str, int]]) -> None:
    """Refuse region lists the plan cannot take: bad or repeated names (compared without
    case, as the macros upper-case them)."""
    seen: dict[str, str] = {}
    for name, size in regions:
        problem = region_name_problem(name)
        if problem:
            raise TinygenError(f"--region {name}={size}: {problem}")
        if name.upper() in seen:
            same = "given twice" if seen[name.upper()] == name else \
                f"and '{seen[name.upper()]}' differ only in case (names are case-insensitive)"
            raise TinygenError(f"--region '{name}' {same}: each region needs its own name")
        seen[name.upper()] = name


def plan_whole(graph: Graph, opts: BuildOptions) -> MemoryPlan | None:
    """The whole-tensor plan without the limits (None: it fits no region; with --stream
    off that is the user's error, raised by plan_arena)."""
    try:
        return plan_arena(graph, opts, limits=False)
    except TinygenError:
        if opts.stream == "off":
            raise
        return None


def bound_of(graph: Graph, opts: BuildOptions) -> int:
    """Lower bound of graph's buffers in the given order (no placement: cheap)."""
    buffers, _ = build_buffers(graph, list(range(len(graph.ops))), opts.inplace, opts.io)
    return lower_bound(buffers, len(graph.ops))


def arena_of(graph: Graph, opts: BuildOptions) -> float:
    """Arena bytes the planner gives graph (inf when it fits no region)."""
    try:
        return plan_arena(graph, opts, limits=False).arena_bytes
    except TinygenError:
        return float("inf")


def plan_arena(graph: Graph, opts: BuildOptions, limits: bool = True) -> MemoryPlan:
    """Schedule, build buffers and place them; the plan is verified before it is returned.
    limits=False: skip the size checks (--arena-limit, 2 GiB), for plans being compared."""
    check_regions(opts.regions)
    if opts.align < 4 or opts.align & (opts.align - 1):
        raise TinygenError(f"--align {opts.align} must be a power of two >= 4")
    probe, owner = build_buffers(graph, list(range(len(graph.ops))), opts.inplace, opts.io)
    order = order_ops(graph, opts.order, lambda t: owner.get(t),
                      lambda b: probe[b].size if b in probe and probe[b].external is None
                      else 0)
    buffers, owner = build_buffers(graph, order, opts.inplace, opts.io)
    try:
        plan = plan_memory(buffers, owner, order, opts.planner, opts.align, opts.regions)
    except MemoryError as exc:
        raise TinygenError(str(exc), file=graph.source_path) from None
    plan.lower_bound = lower_bound(buffers, len(order))
    plan.naive = sum((b.size + opts.align - 1) // opts.align * opts.align
                     for b in buffers.values() if b.external is None)
    problems = verify_plan(plan)
    if problems:
        raise TinygenError("internal error: memory plan failed verification: " + problems[0],
                           file=graph.source_path)
    return check_limits(graph, plan, opts) if limits else plan


def check_limits(graph: Graph, plan: MemoryPlan, opts: BuildOptions) -> MemoryPlan:
    """Refuse a plan over 2 GiB or over --arena-limit; returns plan."""
    buffers = plan.buffers
    if plan.arena_bytes > MAX_BYTES:
        raise TinygenError(f"arena needs {plan.arena_bytes} bytes; it must stay below 2 GiB",
                           file=graph.source_path)
    if opts.arena_limit is not None and plan.arena_bytes > opts.arena_limit:
        big = max((b for b in buffers.values() if b.external is None), key=lambda b: b.size)
        raise TinygenError(f"arena needs {plan.arena_bytes} bytes, over --arena-limit "
                           f"{opts.arena_limit} (largest buffer '{big.name}', {big.size} B)",
                           file=graph.source_path)
    return plan


def summary(c: Compiled) -> dict:
    """The figures `emit --json` / `plan --json` print (DESIGN.md section 4 keys)."""
    return {
        "arena_bytes": c.plan.arena_bytes,
        "lower_bound_bytes": c.plan.lower_bound,
        "naive_bytes": c.plan.naive,
        "weights_bytes": c.weights_bytes,
        "macs": c.macs,
        "ops": sum(1 for op in c.graph.ops if op.kind != "view"),
        "planner": c.plan.planner,
        "planner_won": c.plan.winner,
        "planner_optimal": c.plan.optimal,
        "planner_gap_bytes": c.plan.arena_bytes - c.plan.lower_bound,
        "order": c.options.order,
        "stream": c.options.stream,
        "whole_tensor_bound_bytes": c.whole_bound,
        "streamed_runs": streamed_runs(c),
    }


def streamed_runs(c: Compiled) -> list[dict]:
    """What `plan --json` says of each streamed run: its layers, band height, rings."""
    out = []
    for k, run in stream_runs(c.graph):
        out.append({
            "op": k,
            "layers": [{"node": m.op.name, "kernel": m.call.func} for m in run.members],
            "band_rows": run.band,
            "bands": len(run.rows),
            "extra_calls": run.extra_calls,
            "rings": [{"tensor": whole, "buffer": ring, "rows": rows,
                       "bytes": c.graph.tensors[ring].nbytes}
                      for whole, ring, rows in zip(run.replaced, run.rings, run.ring_rows(),
                                                   strict=True)],
            "scratch_bytes": run.scratch_bytes,
        })
    return out


def storage_inputs(graph: Graph, floats: list[np.ndarray]) -> list[np.ndarray]:
    """Quantize float inputs (ONNX layout) into the C buffers' int8-domain storage form."""
    from tinygen.ir import storage_perm
    out = []
    for io, x in zip(graph.inputs, floats, strict=True):
        t = graph.tensors[io.name]
        x = np.asarray(x, dtype=np.float32).reshape(t.shape)
        if io.onnx_dtype == "float32":
            q = np.rint(x / np.float32(t.quant.scalar_scale())) + t.quant.scalar_zp()
            q = np.clip(q, -128, 127).astype(np.int8)
        else:
            q = x.astype(np.int64)
            q = (q - 128 if io.buffer_dtype == "uint8" else q).astype(np.int8)
        out.append(np.ascontiguousarray(np.transpose(q, storage_perm(len(t.shape), t.layout))))
    return out


def logical_outputs(graph: Graph, outs: list[np.ndarray]) -> list[np.ndarray]:
    """Storage-order int8-domain outputs back to ONNX layout and their ONNX integer type."""
    from tinygen.ir import storage_perm
    res = []
    for io, y in zip(graph.outputs, outs, strict=True):
        t = graph.tensors[io.name]
        perm = storage_perm(len(t.shape), t.layout)
        y = np.transpose(np.asarray(y).reshape(t.storage_shape()), np.argsort(perm))
        if io.buffer_dtype == "uint8":
            y = (y.astype(np.int16) + 128).astype(np.uint8)
        res.append(np.ascontiguousarray(y))
    return res


def dequantize_outputs(graph: Graph, outs: list[np.ndarray]) -> list[np.ndarray]:
    res = []
    for io, y in zip(graph.outputs, outs, strict=True):
        if io.onnx_dtype == "float32" and io.quant is not None:
            zp = io.quant.scalar_zp() + (128 if io.buffer_dtype == "uint8" else 0)
            res.append((y.astype(np.float32) - zp) * np.float32(io.quant.scalar_scale()))
        else:
            res.append(y)
    return res
