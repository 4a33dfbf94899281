"""`python -m tinygen.bench --scale`: plan and emit time of long generated op chains.

A chain of `n` integer ops (QOperator form, small tensors so the time is the compiler's
per-op work, not the bytes): 1x1 QLinearConv, QLinearLeakyRelu and QLinearAdd of the
value two ops back (a short skip, so lifetimes overlap by more than one step), repeated.
Such graphs come from unrolled sequence models. The table gives, per length, the time of
scheduling + planning (`compiler.plan_arena`) and of the whole `emit` (load, passes, plan,
C written to a temporary folder), one run each on this machine, in one process.
"""
from __future__ import annotations

import contextlib
import io
import platform
import tempfile
import time
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

SCALE_LENGTHS = (1000, 10000, 100000)


def chain_model(n_ops: int, channels: int = 4, side: int = 2, seed: int = 0,
                pattern: str = "cla") -> onnx.ModelProto:
    """A QOperator chain of `n_ops` ops on a [1, channels, side, side] uint8 tensor."""
    rng = np.random.default_rng(seed)
    inits = [numpy_helper.from_array(np.array(0.05, np.float32), "s"),
             numpy_helper.from_array(np.array(128, np.uint8), "z"),
             numpy_helper.from_array(np.array(0.02, np.float32), "sw"),
             numpy_helper.from_array(np.array(128, np.uint8), "zw")]
    weights = [rng.integers(100, 156, (channels, channels, 1, 1)).astype(np.uint8)
               for _ in range(4)]
    for i, w in enumerate(weights):  # a few weight sets shared by many convs
        inits.append(numpy_helper.from_array(w, f"w{i}"))
    nodes = []
    prev2, prev = "x", "x"
    for i in range(n_ops):
        out = f"t{i}"
        kind = pattern[i % len(pattern)]
        if kind == "c":
            nodes.append(helper.make_node(
                "QLinearConv", [prev, "s", "z", f"w{(i // 3) % 4}", "sw", "zw", "s", "z"],
                [out], name=f"conv{i}"))
        elif kind == "l":
            nodes.append(helper.make_node(
                "QLinearLeakyRelu", [prev, "s", "z", "s", "z"], [out], name=f"act{i}",
                domain="com.microsoft", alpha=0.1))
        else:
            nodes.append(helper.make_node(
                "QLinearAdd", [prev, "s", "z", prev2, "s", "z", "s", "z"], [out],
                name=f"add{i}", domain="com.microsoft"))
        prev2, prev = prev, out
    shape = [1, channels, side, side]
    graph = helper.make_graph(
        nodes, "chain", [helper.make_tensor_value_info("x", TensorProto.UINT8, shape)],
        [helper.make_tensor_value_info(prev, TensorProto.UINT8, shape)], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17),
                                                   helper.make_opsetid("com.microsoft", 1)])


def time_chain(n_ops: int, workdir: Path) -> dict:
    """Seconds to plan (schedule, buffers, placement, verifier) and to emit a chain: wall
    time and this process's CPU time (the machine is shared; CPU time is the steadier)."""
    from tinygen.cli import main
    from tinygen.compiler import BuildOptions, compile_model, plan_arena

    path = workdir / f"chain{n_ops}.onnx"
    onnx.save(chain_model(n_ops), str(path))
    t0, c0 = time.perf_counter(), time.process_time()
    with contextlib.redirect_stdout(io.StringIO()):  # emit's own summary line
        rc = main(["emit", str(path), "-o", str(workdir / f"out{n_ops}")])
    emit_s, emit_cpu = time.perf_counter() - t0, time.process_time() - c0
    if rc != 0:
        raise RuntimeError(f"emit of the {n_ops}-op chain failed (exit {rc})")
    c = compile_model(str(path), BuildOptions())
    t0, c0 = time.perf_counter(), time.process_time()
    plan = plan_arena(c.graph, c.options)
    plan_s, plan_cpu = time.perf_counter() - t0, time.process_time() - c0
    return {"ops": n_ops, "plan_s": plan_s, "plan_cpu": plan_cpu, "emit_s": emit_s,
            "emit_cpu": emit_cpu, "arena": plan.arena_bytes,
            "lower_bound": plan.lower_bound, "planner": plan.planner}


def scale_table(lengths=SCALE_LENGTHS) -> str:
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for n in lengths:
            rows.append(time_chain(n, Path(tmp)))
    lines = ["| chain ops | plan s (CPU s) | emit s (CPU s), load to C written | arena B | "
             "lower bound B | planner |", "|---:|---:|---:|---:|---:|---|"]
    for r in rows:
        lines.append(f"| {r['ops']} | {r['plan_s']:.2f} ({r['plan_cpu']:.2f}) | "
                     f"{r['emit_s']:.2f} ({r['emit_cpu']:.2f}) | {r['arena']} | "
                     f"{r['lower_bound']} | {r['planner']} |")
    return "\n".join(lines)


def write_scale_table(out: Path, lengths=SCALE_LENGTHS) -> str:
    """Measure and write the scale table as markdown to `out`; returns the text."""
    text = ("# Scale: plan and emit time of long op chains\n\n"
            "`python -m tinygen.bench --scale` (tinygen/bench_scale.py): QOperator chains of "
            "1x1 QLinearConv, QLinearLeakyRelu and QLinearAdd with a skip of two, "
            "[1, 4, 2, 2] uint8 tensors; one run each, one process, "
            f"{platform.machine()} {platform.python_implementation()} "
            f"{platform.python_version()}, default flags. Wall time on a shared machine; "
            "CPU time of this process in brackets.\n\n" + scale_table(lengths) + "\n")
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text)
    return text
