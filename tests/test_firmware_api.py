"""The firmware API as a user meets it: only the emitted header.

1. The README's driver core (classify(): quantize with the per-input helper, run, argmax in
   the output's own type) builds warning-free for every example model, int8 and uint8, on
   the host and on an emulated Cortex-M, and picks the class the numpy reference picks.
2. The header's "How to call it" lines compile as they stand, for --io arena and --io
   external, and the program they make gives the reference's outputs.
3. The type, range and dims macros and the info table say what the model is.
"""
from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from tests.firmware_progs import (
    PRINT_C,
    c_bytes,
    c_floats,
    reference_argmax,
    reference_io,
    run_host,
    run_target,
    samples_for,
    storage_order,
)
from tinygen.codegen.emit import render_tree, write_tree
from tinygen.compiler import BuildOptions, compile_model

ROOT = Path(__file__).resolve().parent.parent
MODELS = sorted(p for p in (ROOT / "examples").glob("*/*.onnx") if not p.stem.endswith("_float"))
CPUS = ("cortex-m3", "cortex-m4", "cortex-m7", "cortex-m33")


def readme_driver() -> str:
    text = (ROOT / "README.md").read_text()
    m = re.search(r"<!-- firmware-driver:start -->\n```c\n(.*?)```\n<!-- firmware-driver:end -->",
                  text, re.S)
    assert m, "README.md lost its firmware-driver block"
    return m.group(1)


def emit(model: Path, out: Path, **opts):
    c = compile_model(str(model), BuildOptions(**opts))
    write_tree(render_tree(c, "test"), str(out), force=True)
    return c


def classify_program(c, tree: Path, work: Path, n: int = 12) -> tuple[list[Path], list[int]]:
    """driver.c (the README block) + main.c (n windows through classify()); the reference's
    argmax for the same windows."""
    work.mkdir(parents=True, exist_ok=True)
    samples = samples_for(c, n, seed=3)
    windows = [storage_order(c, s[0]) for s in samples]
    (work / "driver.c").write_text(readme_driver())
    (work / "main.c").write_text(
        PRINT_C + '#include "model.h"\nint classify(const float *window);\n' +
        c_floats("windows", windows) +
        "int main(void)\n{\n    uint32_t s;\n"
        f"    for (s = 0u; s < {n}u; ++s) {{\n"
        "        print_int(classify(windows[s]));\n        print_text(\"\\n\");\n    }\n"
        "    return 0;\n}\n")
    sources = [work / "driver.c", work / "main.c", *sorted(tree.glob("*.c"))]
    return sources, reference_argmax(c, samples)


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
def test_readme_driver_gets_the_reference_class_on_the_host(model, tmp_path):
    c = emit(model, tmp_path / "tree")
    assert len(c.graph.inputs) == 1, "the README driver is for one-input classifiers"
    sources, expected = classify_program(c, tmp_path / "tree", tmp_path / "prog")
    out = run_host(sources, [tmp_path / "tree"], tmp_path / "host")
    assert [int(v) for v in out.split()] == expected


def test_the_examples_cover_int8_and_uint8():
    kinds = set()
    for model in MODELS:
        c = compile_model(str(model), BuildOptions())
        kinds.add(c.graph.outputs[0].buffer_dtype)
    assert {"int8", "uint8"} <= kinds


@pytest.mark.target
@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
def test_readme_driver_gets_the_reference_class_on_cortex_m(model, tmp_path):
    from tinygen.errors import TinygenError
    from tinygen.harness.toolchain import find_toolchain
    try:
        find_toolchain()
    except TinygenError as exc:
        pytest.skip(exc.one_line())
    cpu = CPUS[MODELS.index(model) % len(CPUS)]
    c = emit(model, tmp_path / "tree")
    sources, expected = classify_program(c, tmp_path / "tree", tmp_path / "prog", n=6)
    out = run_target(sources, [tmp_path / "tree"], tmp_path / "target", cpu)
    assert [int(v) for v in out.split()] == expected


def header_instructions(header: str) -> str:
    """The C lines of the header's "How to call it" block (the first indented paragraph
    after it), as they stand."""
    lines, started = [], False
    for line in header.split("How to call it", 1)[1].splitlines():
        if line.startswith(" *     "):
            started = True
            lines.append(line[len(" *     "):])
        elif started:
            break
    assert lines, "no code lines under 'How to call it'"
    return "\n".join(lines)


@pytest.mark.parametrize("io", ["arena", "external"])
@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
def test_header_instructions_compile_and_run_as_written(model, io, tmp_path):
    tree = tmp_path / "tree"
    c = emit(model, tree, io=io)
    header = (tree / "model.h").read_text()
    code = header_instructions(header)
    assert ("model_input(NULL" in code) == (io == "arena")
    ins, outs = reference_io(c, samples_for(c, 1, seed=11))
    parts = [PRINT_C, '#include "model.h"\n#include <string.h>\n']
    for i, data in enumerate(ins[0]):
        parts.append(c_bytes(f"sample_in{i}", data))
        parts.append(f"static void app_fill_input_{i}(model_input_{i}_t *dst)\n"
                     f"{{\n    memcpy(dst, sample_in{i}, sizeof sample_in{i});\n}}\n")
    for o in range(len(outs[0])):
        parts.append(f"static void app_use_output_{o}(const model_output_{o}_t *src)\n"
                     f"{{\n    print_hex(src, MODEL_OUTPUT_{o}_BYTES);\n"
                     "    print_text(\"\\n\");\n}\n")
    parts.append("int main(void)\n{\n" + code + "\n    return status;\n}\n")
    (tmp_path / "main.c").write_text("".join(parts))
    out = run_host([tmp_path / "main.c", *sorted(tree.glob("*.c"))], [tree], tmp_path / "b")
    assert out.split() == [d.hex() for d in outs[0]]


def _macros(header: str) -> dict[str, str]:
    return dict(re.findall(r"^#define (\w+) (.+)$", header, re.M))


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
def test_type_range_and_dims_macros_say_what_the_model_is(model, tmp_path):
    c = emit(model, tmp_path / "tree")
    header = (tmp_path / "tree" / "model.h").read_text()
    macros = _macros(header)
    for kind, ios in (("INPUT", c.graph.inputs), ("OUTPUT", c.graph.outputs)):
        for i, io in enumerate(ios):
            t = c.graph.tensors[io.name]
            m = f"MODEL_{kind}_{i}"
            info = np.iinfo(io.buffer_dtype)
            assert f"typedef {io.buffer_dtype}_t model_{kind.lower()}_{i}_t;" in header
            assert eval(macros[f"{m}_MIN"]) == info.min and int(macros[f"{m}_MAX"]) == info.max
            dims = t.storage_shape()
            assert int(macros[f"{m}_RANK"]) == len(dims)
            assert [int(macros[f"{m}_DIM_{k}"].rstrip("u")) for k in range(len(dims))] == \
                list(dims)
            assert macros[f"{m}_DIMS"] == "{" + ", ".join(f"{d}u" for d in dims) + "}"
            # storage axis k holds ONNX axis ONNX_AXES[k]: the ONNX shape permuted
            axes = [int(a) for a in macros[f"{m}_ONNX_AXES"].strip("{}").split(",")]
            assert [t.shape[a] for a in axes] == list(dims)
            assert int(macros[f"{m}_SIZE"].rstrip("u")) == int(np.prod(dims))


def test_info_table_matches_the_macros(tmp_path):
    """A program that loops over the table prints what the macros say."""
    model = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"
    tree = tmp_path / "tree"
    c = emit(model, tree)
    (tmp_path / "main.c").write_text(
        PRINT_C + '#include "model.h"\nint main(void)\n{\n    uint32_t k;\n'
        "    const model_io_info_t *in = &model_input_info[0];\n"
        "    print_int((int32_t)in->elem); print_text(\" \");\n"
        "    print_int(in->min); print_text(\" \"); print_int(in->max);\n"
        "    for (k = 0u; k < in->rank; ++k) {\n"
        "        print_text(\" \"); print_int((int32_t)in->dims[k]);\n"
        "        print_text(\":\"); print_int((int32_t)in->onnx_axes[k]);\n    }\n"
        "    print_text(\" \"); print_int(in->zero_point);\n"
        "    print_text(\" \"); print_int((int32_t)(in->scale == MODEL_INPUT_0_SCALE));\n"
        "    print_text(\"\\n\");\n    return 0;\n}\n")
    out = run_host([tmp_path / "main.c", *sorted(tree.glob("*.c"))], [tree], tmp_path / "b")
    io = c.graph.inputs[0]
    t = c.graph.tensors[io.name]
    assert io.buffer_dtype == "uint8"  # pump_vibration: uint8 activations (its README)
    dims = " ".join(f"{d}:{a}" for d, a in zip(t.storage_shape(), (0, 2, 1), strict=True))
    zp = io.quant.scalar_zp() + 128
    assert out.strip() == f"2 0 255 {dims} {zp} 1"
