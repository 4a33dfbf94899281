"""Cortex-M55 (Helium) fully connected kernel: bit-exact against the numpy reference over depths
that exercise the tail-predicated loop (1, 15, 16, 17, 300), output counts that leave a
partial pass of 1-3 outputs, zero points at the extremes and a weight zero point; and the
image really runs the vector loop. The expected outputs are the reference's, whose Gemm/
MatMul contract follows the ONNX QLinearMatMul definition (onnx operator spec)."""
from __future__ import annotations

import subprocess
import tempfile
from pathlib import Path

import numpy as np
import pytest

from tinygen.compiler import BuildOptions

pytestmark = pytest.mark.target


def fc_model(path: Path, depth: int, out: int, xz: int, wz: int, seed: int) -> None:
    """x[1, depth] -> QLinearMatMul with a constant int8 weight [depth, out] -> y[1, out]."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper
    rng = np.random.default_rng(seed)
    w = rng.integers(-127, 128, size=(depth, out)).astype(np.int8)
    init = [numpy_helper.from_array(w, "w")]
    for name, value, dt in (("xs", 0.02, np.float32), ("ws", 0.01, np.float32),
                            ("ys", 0.05 * max(1.0, depth / 64), np.float32),
                            ("xz", xz, np.int8), ("wz", wz, np.int8), ("yz", 5, np.int8)):
        init.append(numpy_helper.from_array(np.array(value, dtype=dt), name))
    nodes = [helper.make_node("QuantizeLinear", ["x", "xs", "xz"], ["xq"]),
             helper.make_node("QLinearMatMul", ["xq", "xs", "xz", "w", "ws", "wz", "ys", "yz"],
                              ["yq"]),
             helper.make_node("DequantizeLinear", ["yq", "ys", "yz"], ["y"])]
    graph = helper.make_graph(
        nodes, "fc_probe", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, depth])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, out])], initializer=init)
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)]), path)


@pytest.mark.parametrize("depth,out,xz,wz", [(1, 4, -3, 0), (15, 5, -128, 0), (16, 6, 127, 0),
                                             (17, 7, -3, 9), (300, 9, 0, -20), (64, 33, -128, 0)])
def test_helium_fc_is_bit_exact(depth, out, xz, wz, tmp_path):
    from tinygen.target_check import emulate_model
    model = tmp_path / "fc.onnx"
    fc_model(model, depth, out, xz, wz, seed=depth * 100 + out)
    info = emulate_model(str(model), "cortex-m55", BuildOptions(requant="fixed"), samples=3)
    assert info["bit_exact"] is True
    assert [r["kernel"] for r in info["per_op"]] == ["tg_fc"]
    assert info["forbidden_symbols"] == [] and info["float_instructions"] == []


def test_helium_fc_image_runs_the_vector_loop(tmp_path):
    # DLSTP.8 starts the tail-predicated loop of tg_arm_mve.h (Armv8.1-M ARM, low-overhead
    # loops); the Cortex-M4 build of the same tree must not have it.
    from tinygen.codegen.emit import render_tree, write_tree
    from tinygen.compiler import compile_model
    from tinygen.emulate import emulate
    from tinygen.harness.toolchain import find_toolchain
    model = tmp_path / "fc.onnx"
    fc_model(model, 40, 6, -3, 0, seed=1)
    c = compile_model(str(model), BuildOptions(requant="fixed"))
    tree = tmp_path / "tree"
    write_tree(render_tree(c, "test"), str(tree), force=True)
    objdump = find_toolchain().objdump
    for cpu, vector in (("cortex-m55", True), ("cortex-m4", False)):
        with tempfile.TemporaryDirectory() as work:
            emulate(tree, "model", cpu, [[bytes(40)]], requant_float=False, per_op=False,
                    work_dir=work)
            text = subprocess.run([objdump, "-d", str(Path(work) / "figures.elf")],
                                  capture_output=True, text=True, check=True).stdout
        assert ("dlstp.8" in text) == vector, cpu
