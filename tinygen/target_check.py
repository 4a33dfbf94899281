"""`emulate`: the emitted tree on an emulated Cortex-M, outputs compared bit for bit with
the numpy reference, plus the model's figures on that CPU (tinygen/emulate.py measures)."""
from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np

from tinygen.check import (
    c_inputs,
    c_outputs_to_storage,
    load_inputs,
    out_specs,
    random_inputs,
)
from tinygen.codegen.emit import render_tree, write_tree
from tinygen.compiler import BuildOptions, Compiled, compile_model, storage_inputs
from tinygen.errors import TinygenError
from tinygen.runner import run_reference


def call_rows(c: Compiled) -> list[dict]:
    """Each emitted kernel call in run order (its TG_OP_BEGIN index): the C function, the
    ONNX node name and op it came from, and its MACs."""
    rows = []
    for k in c.plan.order:
        op = c.graph.ops[k]
        if op.kind == "view":  # zero-copy: no call
            continue
        kernel = op.attrs["call"].func if "call" in op.attrs else "memcpy"
        rows.append({"op": len(rows), "kernel": kernel, "node": op.name,
                     "onnx_op": op.onnx_op, "macs": c.per_op_macs[k]})
    return rows


def call_macs(c: Compiled) -> list[int]:
    """MACs of each emitted kernel call, in the order of TG_OP_BEGIN indices."""
    return [row["macs"] for row in call_rows(c)]


def emulate_compiled(c: Compiled, samples: list[list[np.ndarray]], cpu: str,
                     flags: str = "emulate") -> dict:
    from tinygen.emulate import emulate
    g = c.graph
    with tempfile.TemporaryDirectory(prefix="tinygen-emulate-") as tmp:
        tree = Path(tmp) / "tree"
        write_tree(render_tree(c, flags), str(tree), force=True)
        storage = [storage_inputs(g, s) for s in samples]
        raw = [[np.ascontiguousarray(x).tobytes() for x in c_inputs(g, st)] for st in storage]
        fig = emulate(tree, c.options.prefix, cpu, raw, requant_float=c.options.requant ==
                      "float", io=c.options.io)
    exact = True
    specs = out_specs(g)
    for st, outs in zip(storage, fig["outputs"], strict=True):
        ref = run_reference(g, st, c.plan.order)
        got = c_outputs_to_storage(g, [np.frombuffer(b, dtype=dt)[:n]
                                       for b, (n, dt) in zip(outs, specs, strict=True)])
        for r, y in zip(ref, got, strict=True):
            exact &= bool(np.array_equal(r.reshape(-1), y.reshape(-1).astype(r.dtype)))
    calls = call_rows(c)
    per_op = []
    for row in fig.get("per_op", []):
        i = int(row["op"])
        call = calls[i] if i < len(calls) else {"kernel": "", "node": "", "onnx_op": "",
                                                "macs": 0}
        per_op.append({"op": i, "kernel": call["kernel"], "node": call["node"],
                       "onnx_op": call["onnx_op"], "instructions": int(row["instructions"]),
                       "instructions_per_sample": [int(v) for v in
                                                   row.get("instructions_per_sample", [])],
                       "macs": call["macs"]})
    counts = [int(v) for v in fig["instructions_per_sample"]]
    return {"cpu": cpu, "board": fig["board"], "board_reason": fig["board_reason"],
            "bit_exact": exact, "flash_bytes": fig["flash_bytes"],
            "ram_bytes": fig["ram_bytes"], "stack_bytes": fig["stack_bytes"],
            "instructions": fig["instructions"], "instructions_per_sample": counts,
            "instructions_min": min(counts), "instructions_max": max(counts),
            "macs": c.macs, "per_op": per_op,
            "samples": len(samples), "forbidden_symbols": fig.get("forbidden_symbols", []),
            "float_instructions": fig.get("float_instructions", [])}


CPUS_WITHOUT_FPU = ("cortex-m0", "cortex-m0plus", "cortex-m3", "rv32imc", "rv32imac")


def emulate_model(path: str, cpu: str, opts: BuildOptions, samples: int = 4,
                  inputs: str | None = None) -> dict:
    if opts.requant == "float" and cpu in CPUS_WITHOUT_FPU:
        # float mode's exact-rounding guarantees rest on IEEE single precision hardware
        # (and an exact fused multiply-add); software float would not keep them
        raise TinygenError(f"{cpu} has no FPU: float requantization is for cores with one "
                           "(cortex-m4/m7/m33/m55); use --requant fixed", file=path)
    c = compile_model(path, opts)
    data = load_inputs(c.graph, inputs) if inputs else random_inputs(c.graph, samples)
    if not data:
        raise TinygenError("no inputs to run", file=path)
    return emulate_compiled(c, data, cpu)


def run_emulate(args, opts: BuildOptions, flags: str) -> dict:
    if args.samples < 1:
        raise TinygenError("--samples must be >= 1")
    return emulate_model(args.model, args.cpu, opts, args.samples, args.inputs)
