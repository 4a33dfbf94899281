"""ONNX conformance: the node test cases shipped inside the onnx package, run through the
emitted C.

Source: onnx.backend.test.case.node (the ONNX operator spec's own test cases with published
expected outputs) for QuantizeLinear, DequantizeLinear, QLinearConv, QLinearMatMul,
ConvInteger and MatMulInteger. tinygen compiles scales, zero points and weights into flash,
so every graph input but the first becomes an initializer holding the case's data.
Cases with types tinygen does not compile (int16, int4, float8, float16 scales, blocked or
per-axis activation quantization) must be refused with exit-2 style errors, not mis-run.
"""
from __future__ import annotations

import warnings

import numpy as np
import onnx
import pytest
from onnx import numpy_helper

from tinygen.errors import TinygenError
from tinygen.harness.session import Session

FAMILIES = ("test_quantizelinear", "test_dequantizelinear", "test_qlinearconv",
            "test_qlinearmatmul", "test_convinteger", "test_matmulinteger")

# The cases tinygen runs; every other case of the families above must be refused cleanly.
SUPPORTED = {
    "test_quantizelinear", "test_dequantizelinear", "test_qlinearconv",
    "test_qlinearmatmul_2D_uint8_float32", "test_qlinearmatmul_3D_uint8_float32",
    "test_qlinearmatmul_2D_int8_float32", "test_qlinearmatmul_3D_int8_float32",
    "test_qlinearmatmul_2D_uint8_float16", "test_qlinearmatmul_3D_uint8_float16",
    "test_qlinearmatmul_2D_int8_float16", "test_qlinearmatmul_3D_int8_float16",
    "test_convinteger_with_padding", "test_convinteger_without_padding",
    "test_matmulinteger",
}


def _cases():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from onnx.backend.test.case.node import collect_testcases
        cases = collect_testcases(None)
    return sorted((c for c in cases if c.name.startswith(FAMILIES)
                   and "dynamic" not in c.name), key=lambda c: c.name)


CASES = _cases()


def _freeze(case, tmp_path):
    """The case's model with inputs 1.. turned into initializers; returns (path, feeds)."""
    model = onnx.ModelProto()
    model.CopyFrom(case.model)
    inputs, _outputs = case.data_sets[0]
    g = model.graph
    names = [i.name for i in g.input]
    for name, value in zip(names[1:], inputs[1:], strict=False):
        if isinstance(value, onnx.TensorProto):  # exotic types come as protos already
            t = onnx.TensorProto()
            t.CopyFrom(value)
            t.name = name
            g.initializer.append(t)
        else:
            g.initializer.append(numpy_helper.from_array(np.asarray(value), name))
    keep = g.input[0]
    del g.input[:]
    g.input.append(keep)
    path = tmp_path / f"{case.name}.onnx"
    onnx.save(model, path)
    return path, {names[0]: inputs[0]}


def test_the_families_are_all_found():
    names = {c.name for c in CASES}
    assert SUPPORTED <= names, SUPPORTED - names


@pytest.mark.parametrize("case", [c for c in CASES if c.name in SUPPORTED],
                         ids=lambda c: c.name)
@pytest.mark.parametrize("requant", ["fixed", "float"])
def test_supported_case_matches_published_output(case, requant, tmp_path):
    from tinygen.compiler import BuildOptions
    path, feeds = _freeze(case, tmp_path)
    sess = Session(str(path), BuildOptions(requant=requant), work_dir=str(tmp_path / "w"))
    got = sess.run(feeds)
    expected = case.data_sets[0][1]
    assert len(got) == len(expected)
    for g, e in zip(got, expected, strict=True):
        e = np.asarray(e)
        assert g.shape == e.shape
        assert g.dtype == e.dtype, (g.dtype, e.dtype)
        np.testing.assert_array_equal(g, e)


@pytest.mark.parametrize("case", [c for c in CASES if c.name not in SUPPORTED],
                         ids=lambda c: c.name)
def test_unsupported_case_is_refused_cleanly(case, tmp_path):
    from tinygen.compiler import BuildOptions, compile_model
    path, _ = _freeze(case, tmp_path)
    with pytest.raises(TinygenError) as info:
        compile_model(str(path), BuildOptions())
    line = info.value.one_line()
    assert "\n" not in line and str(path) in line
