"""End to end on every bundled example model: emitted C against the numpy reference (bit
for bit, >= 100 inputs, both requantization modes) and against onnxruntime.

Source for the onnxruntime comparison: onnxruntime's CPU execution provider with its default
graph optimisations (it fuses QDQ pairs into integer kernels such as QLinearConv), run on
the same float inputs; distance is measured in output LSBs.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from tests.ort_exact import skip_if_onnxruntime_inexact
from tinygen.check import load_inputs, random_inputs, run_check
from tinygen.compiler import BuildOptions, compile_model

ROOT = Path(__file__).resolve().parents[2]
MODELS = sorted(p for p in (ROOT / "examples").glob("*/*.onnx") if not p.stem.endswith("_float"))

# Float mode reproduces onnxruntime's integer kernels exactly for graphs of Conv/Gemm/Add/
# pooling; a model listed here differs by up to that many output LSBs (measured with these
# seeds, onnxruntime 1.32): onnxruntime's QLinearSoftmax scales by floor(1/s_y) (126 where the
# ONNX definition gives 127) and its uint8 rewrite of the int8 graph rounds the AveragePool
# differently near ties, while our default tables follow the ONNX definition -- which the
# onnx.reference test below checks. With --tables onnxruntime the distance is 0
# (tests/e2e/test_fidelity.py; the trace names the ops: check --trace --against-onnxruntime).
ORT_FLOAT_TOLERANCE = {"gesture_band": 6}
ORT_FIXED_TOLERANCE = {"gesture_band": 10}
QDQ_MODELS = [m for m in MODELS if m.stem in ("pump_vibration", "gesture_band", "recycling_belt")]


def test_examples_exist():
    assert {p.stem for p in MODELS} >= {"pump_vibration", "door_camera", "gesture_band",
                                       "recycling_belt"}


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
@pytest.mark.parametrize("requant", ["fixed", "float"])
def test_example_is_bit_exact_against_reference(model, requant):
    c = compile_model(str(model), BuildOptions(requant=requant))
    samples = random_inputs(c.graph, 100, seed=7)
    samples += load_inputs(c.graph, str(model.parent / "sample_inputs.npz"))
    res = run_check(c, str(model), samples, "test", against_ort=False)
    assert res.samples >= 100
    assert res.bit_exact, f"{res.mismatched_elements} of {res.total_elements} differ"


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
@pytest.mark.onnxruntime_exact
def test_float_mode_agrees_with_onnxruntime(model):
    c = compile_model(str(model), BuildOptions(requant="float"))
    samples = random_inputs(c.graph, 100, seed=11)
    res = run_check(c, str(model), samples, "test", against_ort=True)
    assert res.bit_exact, f"{res.mismatched_elements} of {res.total_elements} differ"
    # onnxruntime's quantization documentation: its uint8 x int8 kernels saturate on x86
    # without VNNI; tinygen.check's probe says whether this CPU does (tests/ort_exact.py)
    skip_if_onnxruntime_inexact(model)
    tol = ORT_FLOAT_TOLERANCE.get(model.stem, 0)
    assert res.onnxruntime["max_abs_diff"] <= tol, res.onnxruntime
    if tol == 0:
        assert res.onnxruntime["equal_fraction"] == 1.0


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
@pytest.mark.onnxruntime_exact
def test_fixed_mode_stays_within_one_lsb_of_onnxruntime(model):
    c = compile_model(str(model), BuildOptions(requant="fixed"))
    res = run_check(c, str(model), random_inputs(c.graph, 50, seed=3), "test", against_ort=True)
    assert res.bit_exact, f"{res.mismatched_elements} of {res.total_elements} differ"
    # onnxruntime's quantization documentation: its uint8 x int8 kernels saturate on x86
    # without VNNI; tinygen.check's probe says whether this CPU does (tests/ort_exact.py)
    skip_if_onnxruntime_inexact(model)
    # fixed mode rounds once in Q31 where onnxruntime rounds a float32 product: measured
    # distance, not a contract (the README table has the figures)
    assert res.onnxruntime["max_abs_diff"] <= ORT_FIXED_TOLERANCE.get(model.stem, 1), \
        res.onnxruntime


@pytest.mark.parametrize("model", QDQ_MODELS, ids=lambda p: p.stem)
def test_float_mode_matches_the_onnx_reference_evaluator(model):
    """Source: onnx.reference.ReferenceEvaluator, the ONNX project's own evaluator of the
    operator definitions (DequantizeLinear -> float op -> QuantizeLinear, in float). The QDQ
    examples' float-mode output equals it on every element."""
    import onnx
    from onnx import version_converter
    from onnx.reference import ReferenceEvaluator

    from tinygen.compiler import logical_outputs, storage_inputs
    from tinygen.runner import run_reference
    m = version_converter.convert_version(onnx.load(model), 21)  # its Q/DQ need opset >= 19
    ev = ReferenceEvaluator(m)
    c = compile_model(str(model), BuildOptions(requant="float"))
    g = c.graph
    io = g.outputs[0]
    zp = io.quant.scalar_zp() + (128 if io.buffer_dtype == "uint8" else 0)
    for s in random_inputs(g, 20, seed=5):
        ours = logical_outputs(g, run_reference(g, storage_inputs(g, s), c.plan.order))[0]
        y = ev.run(None, {g.inputs[0].onnx_name: s[0]})[0]
        q = np.rint(y / np.float32(io.quant.scalar_scale())) + zp
        np.testing.assert_array_equal(q.reshape(-1), ours.astype(np.int64).reshape(-1))


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
@pytest.mark.onnxruntime_exact
def test_sample_inputs_classify_like_onnxruntime(model):
    """The bundled sample inputs give onnxruntime's class on every sample (float mode)."""
    import onnxruntime as ort

    from tinygen.harness.session import Session
    sess = Session(str(model), BuildOptions(requant="float"))
    with np.load(model.parent / "sample_inputs.npz") as z:
        xs = z["inputs"]
    # onnxruntime's quantization documentation: its uint8 x int8 kernels saturate on x86
    # without VNNI; tinygen.check's probe says whether this CPU does (tests/ort_exact.py)
    skip_if_onnxruntime_inexact(model)
    ref = ort.InferenceSession(str(model), providers=["CPUExecutionProvider"])
    name = ref.get_inputs()[0].name
    for x in xs:
        ours = sess.run({name: x})[0]
        theirs = ref.run(None, {name: x})[0]
        assert int(np.argmax(ours)) == int(np.argmax(theirs))
