"""examples/firmware builds against an emitted tree given by TREE= and runs under QEMU; its
classify() is the README's driver core, checked against the numpy reference for the demo's
sensor window on a uint8 and an int8 model."""
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from tinygen.codegen.emit import render_tree, write_tree
from tinygen.compiler import BuildOptions, compile_model, storage_inputs
from tinygen.ir import storage_perm
from tinygen.runner import run_reference

pytestmark = pytest.mark.target

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "examples" / "firmware"


def _make(tmp_path: Path, tree: Path, cpu: str) -> subprocess.CompletedProcess:
    if shutil.which("make") is None:
        pytest.skip("make not installed")
    return subprocess.run(["make", "-s", "-C", str(EXAMPLE), f"TREE={tree}", f"CPU={cpu}",
                           f"BUILD={tmp_path / 'build'}", "run"],
                          capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)


def _expected(c) -> tuple[int, int]:
    """Class and milli-score main.c must print: its app_sensor_reading window (float32, as
    the C computes it with -ffp-contract=off), through the numpy reference."""
    g = c.graph
    t = g.tensors[g.inputs[0].name]
    i = np.arange(t.size)
    phase = (i // 3 + 10 * (i % 3)) % 40
    tri = np.where(phase < 20, phase, 40 - phase).astype(np.float32)
    window = np.float32(0.04) * tri - np.float32(0.4)          # storage order
    perm = storage_perm(len(t.shape), t.layout)
    onnx_layout = np.transpose(window.reshape(t.storage_shape()), np.argsort(perm))
    ref = run_reference(g, storage_inputs(g, [onnx_layout]), c.plan.order)[0].reshape(-1)
    best = int(np.argmax(ref))
    io = g.outputs[0]
    zp = io.quant.scalar_zp()  # int8 domain, like ref
    real = np.float32(int(ref[best]) - zp) * np.float32(io.quant.scalar_scale())
    return best, int(real * np.float32(1000.0))


@pytest.mark.parametrize("model,cpu", [("pump_vibration", "cortex-m3"),
                                       ("pump_vibration", "cortex-m4"),
                                       ("door_camera", "cortex-m4")])
def test_demo_runs_on_an_emitted_tree(model, cpu, tmp_path):
    c = compile_model(str(ROOT / "examples" / model / f"{model}.onnx"), BuildOptions())
    tree = tmp_path / "tree"
    write_tree(render_tree(c, "test"), str(tree), force=False)
    proc = _make(tmp_path, tree, cpu)
    assert proc.returncode == 0, proc.stderr
    best, milli = _expected(c)
    assert f"arena: {c.plan.arena_bytes} bytes\n" in proc.stdout
    assert f"class: {best}\n" in proc.stdout
    assert f"score: {milli} milli" in proc.stdout
    # The model's static arena (from model.o) sits in the .arena section.
    demo_map = (tmp_path / "build" / "demo.map").read_text()
    arena_part = demo_map.split("\n.arena", 1)[1].split("\n.bss", 1)[0]
    assert re.search(rf"\.arena\s+0x[0-9a-f]+\s+0x{c.plan.arena_bytes:x} \S*model\.o",
                     arena_part)


def test_main_c_is_built_around_the_readme_driver():
    readme = (ROOT / "README.md").read_text()
    core = readme.split("<!-- firmware-driver:start -->\n```c\n")[1].split("```")[0]
    core = core.split('#include "model.h"\n\n', 1)[1]
    assert core in (EXAMPLE / "main.c").read_text()
