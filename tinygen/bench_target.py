"""`python -m tinygen.bench_target`: executed instructions of the example models on Cortex-M.

Every example model (float exports left out) is compiled with the default flags and run
under QEMU on each core (tinygen.emulate, -Os, one sample: the model's own
sample_inputs.npz when it has one, else seeded random data), and with --kernels portable on
Cortex-M4 and M7. The outputs must match the numpy reference bit for bit. The markdown
written to bench/target.md (and printed) has
  - a summary: instructions per MAC, model x core (DSP and portable kernels), with stack,
    flash and code size;
  - per op kind over all models: instructions per MAC (per output element for MAC-less
    kinds), DSP vs portable on M4 and M7;
  - single layers: instructions per MAC of one-layer models with the shapes the speed
    goals name (1x1 conv, stem conv, fully connected; add per element);
  - requantization: instructions per output beyond the MAC loop, from single-layer 1x1
    convolutions that differ only in their channel counts (exact differences);
  - per model: instructions of each kernel call on each core.
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
CPUS = ("cortex-m0", "cortex-m3", "cortex-m4", "cortex-m7", "cortex-m33", "cortex-m55",
        "rv32imc")
PORTABLE_CPUS = ("cortex-m4", "cortex-m7")  # also measured with --kernels portable
PORTABLE = " portable"  # suffix of a run key measured with --kernels portable
# the emitted model.c names each call: "/* op 3: tg_add <- QLinearAdd '/Add_quant' */"
_CALL_COMMENT = re.compile(r"/\* op (\d+): (tg_\w+) <- (\w+)")


@dataclass
class OpFigures:
    index: int
    kernel: str  # C function the emitted model calls, e.g. tg_conv
    onnx_op: str
    macs: int
    kind: str = ""  # op_kind()
    elements: int = 0  # output elements
    instructions: dict[str, int] = field(default_factory=dict)  # per run key (core[ portable])


@dataclass
class ModelFigures:
    name: str
    macs: int = 0
    error: str = ""
    total: dict[str, int] = field(default_factory=dict)  # per run key: the <prefix>_run call
    stack: dict[str, int] = field(default_factory=dict)
    flash: dict[str, int] = field(default_factory=dict)
    constants: int = 0  # flash bytes of constants (weights, packs, tables, params)
    ops: list[OpFigures] = field(default_factory=list)


def op_kind(func: str, params) -> str:
    """The op kinds the tables group by."""
    if func == "tg_conv":
        small = params.in_c // params.groups <= 8
        return "stem conv (<= 8 input channels)" if small else "conv"
    return {"tg_pwconv": "1x1 conv", "tg_dwconv": "depthwise conv", "tg_fc": "fully connected",
            "tg_add": "add / mul", "tg_mul": "add / mul", "tg_maxpool": "pooling",
            "tg_avgpool": "pooling"}.get(func, "other")


def call_facts(c: Compiled) -> list[tuple[str, int]]:
    """(op kind, output elements) of each emitted kernel call, in TG_OP_BEGIN order."""
    out = []
    for k in c.plan.order:
        op = c.graph.ops[k]
        if op.kind == "view":
            continue
        call = op.attrs.get("call")
        kind = op_kind(call.func, call.params) if call is not None else "other"
        out.append((kind, int(c.graph.tensors[op.outputs[0]].size)))
    return out


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
        runs = [(cpu, "auto") for cpu in cpus]
        runs += [(cpu, "portable") for cpu in cpus if cpu in PORTABLE_CPUS]
        for kernels_opt in ("auto", "portable"):
            chosen = [cpu for cpu, k in runs if k == kernels_opt]
            if not chosen:
                continue
            c = compile_model(str(path), BuildOptions(kernels=kernels_opt))
            kernels, facts = call_kernels(c), call_facts(c)
            mf.constants = c.const_bytes
            data = bench_inputs(c, path)
            for cpu in chosen:
                fig = emulate_compiled(c, data, cpu, flags="bench")
                if not fig["bit_exact"]:
                    raise TinygenError(f"outputs on {cpu} ({kernels_opt} kernels) differ from "
                                       "the reference", file=str(path))
                key = cpu + (PORTABLE if kernels_opt == "portable" else "")
                record_run(mf, key, fig, kernels, facts)
    except TinygenError as exc:
        mf.error = exc.one_line()
    return mf


def record_run(mf: ModelFigures, key: str, fig: dict, kernels: dict[int, tuple[str, str]],
               facts: list[tuple[str, int]] | None = None):
    """Fold one run's emulate() figures into the model's table rows."""
    mf.macs = int(fig["macs"])
    mf.total[key] = int(fig["instructions"])
    mf.stack[key] = int(fig["stack_bytes"])
    mf.flash[key] = int(fig["flash_bytes"])
    rows = {op.index: op for op in mf.ops}
    for entry in fig["per_op"]:
        i = int(entry["op"])
        if i not in rows:
            kernel, onnx_op = kernels.get(i, ("?", "?"))
            kind, elements = facts[i] if facts and i < len(facts) else ("other", 0)
            rows[i] = OpFigures(i, kernel, onnx_op, int(entry["macs"]), kind, elements)
        rows[i].instructions[key] = int(entry["instructions"])
    mf.ops = [rows[i] for i in sorted(rows)]


def per_mac(instructions: int, macs: int) -> str:
    return f"{instructions / macs:.2f}" if macs else ""


def run_keys(cpus: tuple[str, ...]) -> list[str]:
    """Each core, followed by its portable run where there is one."""
    keys = []
    for cpu in cpus:
        keys.append(cpu)
        if cpu in PORTABLE_CPUS:
            keys.append(cpu + PORTABLE)
    return keys


def summary_table(models: list[ModelFigures], cpus: tuple[str, ...]) -> list[str]:
    keys = run_keys(cpus)
    head = "| model | MACs | " + " | ".join(f"{k} / MAC" for k in keys) + " |"
    lines = [head, "| --- | --: |" + " --: |" * len(keys)]
    for m in models:
        if m.error:
            continue
        cells = [per_mac(m.total[k], m.macs) if k in m.total else "" for k in keys]
        lines.append(f"| {m.name} | {m.macs} | " + " | ".join(cells) + " |")
    notes = [f"- {m.name}: not measured: {m.error}" for m in models if m.error]
    return lines + ([""] + notes if notes else [])


def sizes_table(models: list[ModelFigures], cpus: tuple[str, ...]) -> list[str]:
    """Stack high-water and flash per core (DSP kernels; portable in parentheses), and the
    code share of flash (flash minus the constants the code generator wrote)."""
    keys = run_keys(cpus)
    head = ("| model | constants B | " + " | ".join(f"{c} stack B | {c} flash B | {c} code B"
                                                   for c in cpus) + " |")
    lines = [head, "| --- | --: |" + " --: | --: | --: |" * len(cpus)]
    for m in models:
        if m.error:
            continue
        cells = []
        for cpu in cpus:
            if cpu not in m.total:
                cells += ["", "", ""]
                continue
            port = cpu + PORTABLE
            if port in keys and port in m.total:
                cells += [f"{m.stack[cpu]} ({m.stack[port]})", f"{m.flash[cpu]} ({m.flash[port]})",
                          f"{m.flash[cpu] - m.constants} ({m.flash[port] - m.constants})"]
            else:
                cells += [str(m.stack[cpu]), str(m.flash[cpu]), str(m.flash[cpu] - m.constants)]
        lines.append(f"| {m.name} | {m.constants} | " + " | ".join(cells) + " |")
    return lines


KIND_ORDER = ("1x1 conv", "depthwise conv", "conv", "stem conv (<= 8 input channels)",
              "fully connected", "add / mul", "pooling", "other")


def kind_table(models: list[ModelFigures], cpus: tuple[str, ...]) -> list[str]:
    """Per op kind over all models: instructions per MAC, or per output element for kinds
    without MACs."""
    keys = [k for k in run_keys(cpus) if k.split()[0] in PORTABLE_CPUS]
    sums: dict[str, dict] = {}
    for m in models:
        if m.error:
            continue
        for op in m.ops:
            acc = sums.setdefault(op.kind, {"calls": 0, "macs": 0, "elements": 0, "keys": {}})
            acc["calls"] += 1
            acc["macs"] += op.macs
            acc["elements"] += op.elements
            for k in keys:
                acc["keys"][k] = acc["keys"].get(k, 0) + op.instructions.get(k, 0)
    head = "| op kind | calls | MACs | per | " + " | ".join(keys) + " |"
    lines = [head, "| --- | --: | --: | --- |" + " --: |" * len(keys)]
    for kind in [k for k in KIND_ORDER if k in sums]:
        acc = sums[kind]
        unit, n = ("MAC", acc["macs"]) if acc["macs"] else ("element", acc["elements"])
        cells = [f"{acc['keys'][k] / n:.2f}" if n else "" for k in keys]
        lines.append(f"| {kind} | {acc['calls']} | {acc['macs']} | {unit} | "
                     + " | ".join(cells) + " |")
    return lines


def probe_model(path: Path, in_c: int, out_c: int, side: int = 8) -> None:
    """A one-layer QLinearConv 1x1 model (int8, per-tensor, seeded weights) for the probe."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper
    rng = np.random.default_rng(in_c * 1000 + out_c)
    w = rng.integers(-127, 128, size=(out_c, in_c, 1, 1)).astype(np.int8)
    b = rng.integers(-2000, 2000, size=out_c).astype(np.int32)
    init = [numpy_helper.from_array(w, "w"), numpy_helper.from_array(b, "b")]
    for name, value, dt in (("xs", 0.02, np.float32), ("ws", 0.01, np.float32),
                            ("ys", 0.05, np.float32), ("xz", -3, np.int8), ("wz", 0, np.int8),
                            ("yz", 5, np.int8)):
        init.append(numpy_helper.from_array(np.array(value, dtype=dt), name))
    nodes = [helper.make_node("QuantizeLinear", ["x", "xs", "xz"], ["xq"]),
             helper.make_node("QLinearConv", ["xq", "xs", "xz", "w", "ws", "wz", "ys", "yz", "b"],
                              ["yq"], kernel_shape=[1, 1]),
             helper.make_node("DequantizeLinear", ["yq", "ys", "yz"], ["y"])]
    graph = helper.make_graph(nodes, "requant_probe",
                              [helper.make_tensor_value_info("x", TensorProto.FLOAT,
                                                             [1, in_c, side, side])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT,
                                                             [1, out_c, side, side])],
                              initializer=init)
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)]), path)


def layer_probe_model(path: Path, kind: str, in_c: int, out_c: int, side: int = 8, k: int = 1,
                      stride: int = 1, pad: int = 0) -> None:
    """A one-layer int8 model for the kernel probes (per-tensor, seeded weights): kind "conv"
    (QLinearConv k x k on side x side pixels), "fc" (QLinearMatMul of one row) or "add"
    (QLinearAdd of two side x side x in_c inputs)."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper
    rng = np.random.default_rng(in_c * 1000 + out_c + k)
    init = []
    for name, value, dt in (("xs", 0.02, np.float32), ("ws", 0.01, np.float32),
                            ("ys", 0.05, np.float32), ("xz", -3, np.int8), ("wz", 0, np.int8),
                            ("yz", 5, np.int8), ("x2s", 0.03, np.float32), ("x2z", 4, np.int8)):
        init.append(numpy_helper.from_array(np.array(value, dtype=dt), name))
    quant = [helper.make_node("QuantizeLinear", ["x", "xs", "xz"], ["xq"])]
    deq = [helper.make_node("DequantizeLinear", ["yq", "ys", "yz"], ["y"])]
    inputs = [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, in_c, side, side])]
    if kind == "fc":
        init.append(numpy_helper.from_array(
            rng.integers(-127, 128, size=(in_c, out_c)).astype(np.int8), "w"))
        node = helper.make_node("QLinearMatMul", ["xq", "xs", "xz", "w", "ws", "wz", "ys", "yz"],
                                ["yq"])
        inputs = [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, in_c])]
        out_shape = [1, out_c]
    elif kind == "add":
        quant.append(helper.make_node("QuantizeLinear", ["x2", "x2s", "x2z"], ["x2q"]))
        node = helper.make_node("QLinearAdd", ["xq", "xs", "xz", "x2q", "x2s", "x2z", "ys", "yz"],
                                ["yq"], domain="com.microsoft")
        inputs.append(helper.make_tensor_value_info("x2", TensorProto.FLOAT,
                                                    [1, in_c, side, side]))
        out_shape = [1, in_c, side, side]
    else:
        init += [numpy_helper.from_array(
            rng.integers(-127, 128, size=(out_c, in_c, k, k)).astype(np.int8), "w"),
            numpy_helper.from_array(rng.integers(-2000, 2000, size=out_c).astype(np.int32), "b")]
        node = helper.make_node("QLinearConv", ["xq", "xs", "xz", "w", "ws", "wz", "ys", "yz",
                                                "b"], ["yq"], kernel_shape=[k, k],
                                strides=[stride, stride], pads=[pad] * 4)
        o = (side + 2 * pad - k) // stride + 1
        out_shape = [1, out_c, o, o]
    graph = helper.make_graph(quant + [node] + deq, "kernel_probe", inputs,
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, out_shape)],
                              initializer=init)
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13),
                                                      helper.make_opsetid("com.microsoft", 1)]),
              path)


# (label, kind, in_c, out_c, side, k, stride, pad): the shapes the speed goals name
KERNEL_PROBES = (
    ("1x1 conv 16->16, 16x16", "conv", 16, 16, 16, 1, 1, 0),
    ("1x1 conv 16->96, 16x16", "conv", 16, 96, 16, 1, 1, 0),
    ("1x1 conv 32->32, 16x16", "conv", 32, 32, 16, 1, 1, 0),
    ("1x1 conv 96->24, 16x16", "conv", 96, 24, 16, 1, 1, 0),
    ("stem 3x3 3->16 stride 2, 32x32", "conv", 3, 16, 32, 3, 2, 1),
    ("stem 3x3 3->16 stride 1, 16x16", "conv", 3, 16, 16, 3, 1, 1),
    ("stem 3x3 8->16 stride 1, 16x16", "conv", 8, 16, 16, 3, 1, 1),
    ("fully connected 16->16", "fc", 16, 16, 0, 1, 1, 0),
    ("fully connected 64->32", "fc", 64, 32, 0, 1, 1, 0),
    ("fully connected 256->10", "fc", 256, 10, 0, 1, 1, 0),
    ("add, 16x16x16", "add", 16, 16, 16, 1, 1, 0),
)


def kernel_probes(cpus: tuple[str, ...]) -> list[str]:
    """Instructions per MAC (per output element for add) of one-layer models, the whole
    kernel call (per-op hooks), on the DSP cores and portable."""
    import tempfile
    keys = [k_ for k_ in run_keys(cpus) if k_.split()[0] in PORTABLE_CPUS]
    rows = []
    with tempfile.TemporaryDirectory(prefix="tinygen-probe-") as tmp:
        for label, kind, in_c, out_c, side, k, stride, pad in KERNEL_PROBES:
            path = Path(tmp) / "probe.onnx"
            layer_probe_model(path, kind, in_c, out_c, side, k, stride, pad)
            cells = []
            for key in keys:
                opt = "portable" if key.endswith(PORTABLE) else "auto"
                c = compile_model(str(path), BuildOptions(kernels=opt))
                fig = emulate_compiled(c, random_inputs(c.graph, 1), key.split()[0],
                                       flags="bench")
                if not fig["bit_exact"]:
                    raise TinygenError(f"kernel probe {label!r} on {key} differs from the "
                                       "reference")
                main = max(fig["per_op"], key=lambda e: (e["macs"], e["instructions"]))
                n = int(main["macs"]) or int(c.graph.tensors[c.graph.outputs[0].name].size)
                cells.append(f"{int(main['instructions']) / n:.2f}")
            unit = "element" if kind == "add" else "MAC"
            rows.append(f"| {label} | {unit} | " + " | ".join(cells) + " |")
    return (["One-layer models (int8, per-tensor, seeded weights, fast requantization, int8 "
             "range clamp); the kernel call alone:", "",
             "| layer | per | " + " | ".join(keys) + " |",
             "| --- | --- |" + " --: |" * len(keys)] + rows)


def requant_probe(cpus: tuple[str, ...], k: int = 16, ch: int = 32, side: int = 8) -> list[str]:
    """Instructions per output beyond the MAC loop of a 1x1 conv, measured exactly:
    with I(K, C) the instructions of a K -> C layer on P pixels, the cost of one more output
    is p(K) = (I(K, 2C) - I(K, C)) / (P*C) (widening and per-pixel work cancel), the MAC
    loop's share of it is K*m with m = (p(2K) - p(K)) / K, and the rest, p(K) - K*m, is the
    bias, requantization, store and channel-loop cost of one output."""
    import tempfile
    keys = [k_ for k_ in run_keys(cpus) if k_.split()[0] in PORTABLE_CPUS]
    rows = []
    with tempfile.TemporaryDirectory(prefix="tinygen-probe-") as tmp:
        counts: dict[tuple[str, int, int], int] = {}
        for kk in (k, 2 * k):
            for cc in (ch, 2 * ch):
                path = Path(tmp) / f"probe_{kk}_{cc}.onnx"
                probe_model(path, kk, cc, side)
                for key in keys:
                    opt = "portable" if key.endswith(PORTABLE) else "auto"
                    c = compile_model(str(path), BuildOptions(kernels=opt))
                    fig = emulate_compiled(c, random_inputs(c.graph, 1), key.split()[0],
                                           flags="bench")
                    if not fig["bit_exact"]:
                        raise TinygenError(f"requant probe on {key} differs from the reference")
                    counts[(key, kk, cc)] = int(fig["instructions"])
    pixels = side * side
    for key in keys:
        p_k = (counts[(key, k, 2 * ch)] - counts[(key, k, ch)]) / (pixels * ch)
        p_2k = (counts[(key, 2 * k, 2 * ch)] - counts[(key, 2 * k, ch)]) / (pixels * ch)
        m = (p_2k - p_k) / k
        rows.append(f"| {key} | {p_k:.2f} | {m:.3f} | {p_k - k * m:.2f} |")
    return ([f"1x1 conv, {k} and {2 * k} inputs, {ch} and {2 * ch} outputs, {side}x{side} "
             "pixels, fast requantization (int8 range clamp):", "",
             "| run | instructions per output | MAC loop per MAC "
             "| beyond the MAC loop, per output |",
             "| --- | --: | --: | --: |"] + rows)


def model_table(m: ModelFigures, cpus: tuple[str, ...]) -> list[str]:
    keys = run_keys(cpus)
    head = "| op | kernel | ONNX op | MACs | " + " | ".join(f"{k} | / MAC" for k in keys) + " |"
    lines = [f"### {m.name}", "", head, "| --: | --- | --- | --: |" + " --: | --: |" * len(keys)]
    for op in m.ops:
        cells = []
        for key in keys:
            n = op.instructions.get(key)
            cells += ["", ""] if n is None else [str(n), per_mac(n, op.macs)]
        lines.append(f"| {op.index} | {op.kernel} | {op.onnx_op} | {op.macs} | "
                     + " | ".join(cells) + " |")
    return lines + [""]


def render_markdown(models: list[ModelFigures], cpus: tuple[str, ...],
                    probe: list[str] | None = None, layers: list[str] | None = None) -> str:
    """The whole bench/target.md text."""
    lines = ["# tinygen on Cortex-M: executed instructions", "",
             "QEMU instruction counts (exact, not cycles; docs/target.md), arm-none-eabi-gcc -Os, "
             "fixed-point requantization, default build flags (\"portable\": --kernels "
             "portable), one sample per model, outputs bit-exact against the numpy reference. "
             "Totals are the whole `<prefix>_run()` call; per-op figures come from a separate "
             "build with hooks around each kernel call.",
             "", "## Whole model: instructions per MAC", ""]
    lines += summary_table(models, cpus)
    lines += ["", "## Stack, flash and code", "",
              "Bytes; --kernels portable in parentheses. Code = flash minus the constants the "
              "code generator wrote (weights, packs, tables, params).", ""]
    lines += sizes_table(models, cpus)
    lines += ["", "## Per op kind, all models", ""]
    lines += kind_table(models, cpus)
    if layers:
        lines += ["", "## Single layers", ""] + layers
    if probe:
        lines += ["", "## Requantization", ""] + probe
    lines += ["", "## Per kernel call", ""]
    for m in models:
        if not m.error:
            lines += model_table(m, cpus)
    return "\n".join(lines).rstrip() + "\n"


def bench_target(models: list[Path] | None = None, cpus: tuple[str, ...] = CPUS,
                 out: Path | None = None) -> str:
    """Emulate each model on each core, write the markdown to out (bench/target.md), return it."""
    paths = models if models else example_models(ROOT)
    dsp = any(c in PORTABLE_CPUS for c in cpus)
    probe = requant_probe(cpus) if dsp else None
    layers = kernel_probes(cpus) if dsp else None
    text = render_markdown([measure_model(p, cpus) for p in paths], cpus, probe, layers)
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
