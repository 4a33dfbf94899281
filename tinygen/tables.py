"""Regenerate the README's figure tables from measurements (`make tables`).

Host table: per example model, memory figures and agreement in both requant modes.
Target table: per example model and CPU, figures measured under QEMU (needs the Arm
toolchain; skipped with a note otherwise). The README text between the marker comments is
replaced; nothing else in it changes.
"""
from __future__ import annotations

import re
import sys
from pathlib import Path

from tinygen.check import load_inputs, random_inputs, run_check
from tinygen.codegen.emit import render_tree
from tinygen.compiler import BuildOptions, compile_model, summary

ROOT = Path(__file__).resolve().parent.parent
CPUS = ("cortex-m0", "cortex-m3", "cortex-m4", "cortex-m7", "cortex-m33", "cortex-m55",
        "rv32imc")


def example_models() -> list[Path]:
    return sorted(p for p in (ROOT / "examples").glob("*/*.onnx")
                  if not p.stem.endswith("_float"))


def host_rows() -> list[str]:
    rows = ["| model | form | arena B (lower bound) | weights B | flash constants B | MACs "
            "| C vs reference (fixed / float) | vs onnxruntime, float: max LSB, equal "
            "| vs onnxruntime, fixed: max LSB, equal |",
            "|---|---|---|---|---|---|---|---|---|"]
    for m in example_models():
        cells = {}
        for mode in ("fixed", "float"):
            c = compile_model(str(m), BuildOptions(requant=mode))
            render_tree(c, "tables")
            samples = random_inputs(c.graph, 100, seed=1) + load_inputs(
                c.graph, str(m.parent / "sample_inputs.npz"))
            res = run_check(c, str(m), samples, "tables", against_ort=True)
            cells[mode] = (c, res)
        c, _ = cells["fixed"]
        s = summary(c)
        form = "QOperator" if any("QLinear" in (op.onnx_op or "") for op in c.graph.ops) \
            else "QDQ"
        exact = " / ".join(f"{'bit-exact' if r.bit_exact else 'DIFFERS'} ({r.samples})"
                           for _, r in cells.values())
        ort = [cells[k][1].onnxruntime for k in ("float", "fixed")]
        rows.append(f"| {m.stem} | {form} | {s['arena_bytes']} ({s['lower_bound_bytes']}) "
                    f"| {s['weights_bytes']} | {c.const_bytes} | {s['macs']} | {exact} | "
                    f"{ort[0]['max_abs_diff']}, {100 * ort[0]['equal_fraction']:.2f}% | "
                    f"{ort[1]['max_abs_diff']}, {100 * ort[1]['equal_fraction']:.2f}% |")
    return rows


def target_rows() -> list[str]:
    from tinygen.errors import TinygenError
    from tinygen.harness.toolchain import find_toolchain
    try:
        find_toolchain()
    except TinygenError as exc:
        return [f"(not measured: {exc.one_line()})"]
    from tinygen.target_check import CPUS_WITHOUT_FPU, emulate_model
    rows = ["| model | CPU | requant | bit-exact | flash B | RAM B | stack B | instructions "
            "| instructions/MAC |", "|---|---|---|---|---|---|---|---|---|"]
    for m in example_models():
        for cpu in CPUS:
            for mode in ("fixed", "float"):
                if mode == "float" and cpu in CPUS_WITHOUT_FPU:
                    continue
                info = emulate_model(str(m), cpu, BuildOptions(requant=mode), samples=2)
                ipm = info["instructions"] / max(info["macs"], 1)
                rows.append(f"| {m.stem} | {cpu} | {mode} | {info['bit_exact']} | "
                            f"{info['flash_bytes']} | {info['ram_bytes']} | "
                            f"{info['stack_bytes']} | {info['instructions']} | {ipm:.2f} |")
    return rows


def replace_between(text: str, name: str, lines: list[str]) -> str:
    start, end = f"<!-- {name}:start -->", f"<!-- {name}:end -->"
    pattern = re.compile(re.escape(start) + ".*?" + re.escape(end), re.S)
    if not pattern.search(text):
        raise SystemExit(f"README has no {start} ... {end} markers")
    return pattern.sub(lambda _: start + "\n" + "\n".join(lines) + "\n" + end, text)


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    readme = ROOT / "README.md"
    text = readme.read_text()
    text = replace_between(text, "host-figures", host_rows())
    if "--host-only" not in argv:
        text = replace_between(text, "target-figures", target_rows())
    readme.write_text(text)
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
