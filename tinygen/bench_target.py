"""`python -m tinygen.bench_target`: executed instructions of the example models on Cortex-M.

Every example model (float exports left out) is compiled once with the default flags and
run under QEMU on each core (tinygen.emulate, -Os, one sample: the model's own
sample_inputs.npz when it has one, else seeded random data). The outputs must match the
numpy reference bit for bit. The markdown written to bench/target.md (and printed) has
  - a summary: instructions and instructions per MAC, model x core;
  - per model: instructions of each kernel call on each core, and per MAC for the calls
    that have MACs.
Instruction counts are exact and repeatable (docs/target.md); they are not cycles.
"""
from __future__ import annotations

import argparse
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from tinygen.bench import example_models
from tinygen.check import load_inputs, random_inputs
from tinygen.codegen.emit import render_tree
from tinygen.compiler import BuildOptions, Compiled, compile_model
from tinygen.errors import TinygenError
from tinygen.target_check import emulate_compiled

ROOT = Path(__file__).resolve().parent.parent
CPUS = ("cortex-m3", "cortex-m4", "cortex-m7", "cortex-m33")
# the emitted model.c names each call: "/* op 3: tg_add <- QLinearAdd '/Add_quant' */"
_CALL_COMMENT = re.compile(r"/\* op (\d+): (tg_\w+) <- (\w+)")


@dataclass
class OpFigures:
    index: int
    kernel: str  # C function the emitted model calls, e.g. tg_conv
    onnx_op: str
    macs: int
    instructions: dict[str, int] = field(default_factory=dict)  # per core


@dataclass
class ModelFigures:
    name: str
    macs: int = 0
    error: str = ""
    total: dict[str, int] = field(default_factory=dict)  # per core: the <prefix>_run call
    ops: list[OpFigures] = field(default_factory=list)


def call_kernels(c: Compiled) -> dict[int, tuple[str, str]]:
    """Op index -> (kernel function, ONNX op), read from the emitted model.c."""
    text = render_tree(c, "bench")[f"{c.options.prefix}.c"]
    return {int(i): (fn, op) for i, fn, op in _CALL_COMMENT.findall(text)}


def bench_inputs(c: Compiled, path: Path) -> list[list[np.ndarray]]:
    """One sample: the model's own first sample input when it has one, else seeded random."""
    npz = path.parent / "sample_inputs.npz"
    if len(c.graph.inputs) == 1 and npz.exists():
        return load_inputs(c.graph, str(npz))[:1]
    return random_inputs(c.graph, 1)


def measure_model(path: Path, cpus: tuple[str, ...] = CPUS) -> ModelFigures:
    """Emulate one model on each core; a model that fails gets an error line instead."""
    mf = ModelFigures(path.stem)
    try:
        c = compile_model(str(path), BuildOptions())
        kernels = call_kernels(c)
        data = bench_inputs(c, path)
        for cpu in cpus:
            fig = emulate_compiled(c, data, cpu, flags="bench")
            if not fig["bit_exact"]:
                raise TinygenError(f"outputs on {cpu} differ from the reference", file=str(path))
            record_run(mf, cpu, fig, kernels)
    except TinygenError as exc:
        mf.error = exc.one_line()
    return mf


def record_run(mf: ModelFigures, cpu: str, fig: dict, kernels: dict[int, tuple[str, str]]):
    """Fold one core's emulate() figures into the model's table rows."""
    mf.macs = int(fig["macs"])
    mf.total[cpu] = int(fig["instructions"])
    rows = {op.index: op for op in mf.ops}
    for entry in fig["per_op"]:
        i = int(entry["op"])
        if i not in rows:
            kernel, onnx_op = kernels.get(i, ("?", "?"))
            rows[i] = OpFigures(i, kernel, onnx_op, int(entry["macs"]))
        rows[i].instructions[cpu] = int(entry["instructions"])
    mf.ops = [rows[i] for i in sorted(rows)]


def per_mac(instructions: int, macs: int) -> str:
    return f"{instructions / macs:.2f}" if macs else ""


def summary_table(models: list[ModelFigures], cpus: tuple[str, ...]) -> list[str]:
    head = "| model | MACs | " + " | ".join(f"{c} instr | {c} / MAC" for c in cpus) + " |"
    lines = [head, "| --- | --: |" + " --: | --: |" * len(cpus)]
    for m in models:
        if m.error:
            continue
        cells = []
        for cpu in cpus:
            n = m.total.get(cpu)
            cells += ["", ""] if n is None else [str(n), per_mac(n, m.macs)]
        lines.append(f"| {m.name} | {m.macs} | " + " | ".join(cells) + " |")
    notes = [f"- {m.name}: not measured: {m.error}" for m in models if m.error]
    return lines + ([""] + notes if notes else [])


def model_table(m: ModelFigures, cpus: tuple[str, ...]) -> list[str]:
    head = "| op | kernel | ONNX op | MACs | " + " | ".join(f"{c} | / MAC" for c in cpus) + " |"
    lines = [f"### {m.name}", "", head, "| --: | --- | --- | --: |" + " --: | --: |" * len(cpus)]
    for op in m.ops:
        cells = []
        for cpu in cpus:
            n = op.instructions.get(cpu)
            cells += ["", ""] if n is None else [str(n), per_mac(n, op.macs)]
        lines.append(f"| {op.index} | {op.kernel} | {op.onnx_op} | {op.macs} | "
                     + " | ".join(cells) + " |")
    return lines + [""]


def render_markdown(models: list[ModelFigures], cpus: tuple[str, ...]) -> str:
    """The whole bench/target.md text."""
    lines = ["# tinygen on Cortex-M: executed instructions", "",
             "QEMU instruction counts (exact, not cycles; docs/target.md), arm-none-eabi-gcc -Os, "
             "fixed-point requantization, default build flags, one sample per model, outputs "
             "bit-exact against the numpy reference. Totals are the whole `<prefix>_run()` call; "
             "per-op figures come from a separate build with hooks around each kernel call.",
             "", "## Whole model", ""]
    lines += summary_table(models, cpus)
    lines += ["", "## Per kernel call", ""]
    for m in models:
        if not m.error:
            lines += model_table(m, cpus)
    return "\n".join(lines).rstrip() + "\n"


def bench_target(models: list[Path] | None = None, cpus: tuple[str, ...] = CPUS,
                 out: Path | None = None) -> str:
    """Emulate each model on each core, write the markdown to out (bench/target.md), return it."""
    paths = models if models else example_models(ROOT)
    text = render_markdown([measure_model(p, cpus) for p in paths], cpus)
    out = out if out is not None else ROOT / "bench" / "target.md"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text)
    return text


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tinygen.bench_target",
                                 description=__doc__.split("\n")[0])
    ap.add_argument("models", nargs="*", help="ONNX files (default: the example models)")
    ap.add_argument("--cpu", action="append", choices=CPUS,
                    help="core to run on (repeatable; default: all)")
    ap.add_argument("--out", default=str(ROOT / "bench" / "target.md"),
                    help="markdown output (default bench/target.md)")
    args = ap.parse_args(argv)
    cpus = tuple(args.cpu) if args.cpu else CPUS
    print(bench_target([Path(m) for m in args.models], cpus, Path(args.out)), end="")
    return 0


if __name__ == "__main__":
    sys.exit(main())
