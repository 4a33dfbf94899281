"""`--tables onnxruntime --requant float`: bit-identity with the runtime a user validated with.

Source: onnxruntime (CPU execution provider, default graph optimisations, x86-64) on the same
float inputs, outputs compared in LSBs. With its own approximations chosen (Sigmoid/Tanh
rational functions, the QLinearSoftmax rule, the uint8 rounding of its QLinearAveragePool
after it rewrites int8 QDQ graphs) every example model must match on every element; with the
default ONNX tables gesture_band does not (its Softmax is 1 LSB apart at the top class).
"""
from __future__ import annotations

from pathlib import Path

import pytest

from tests.ort_exact import skip_if_onnxruntime_inexact
from tinygen.check import load_inputs, random_inputs, run_check
from tinygen.compiler import BuildOptions, compile_model
from tinygen.errors import TinygenError

ROOT = Path(__file__).resolve().parents[2]
MODELS = sorted(p for p in (ROOT / "examples").glob("*/*.onnx") if not p.stem.endswith("_float"))
GESTURE = ROOT / "examples" / "gesture_band" / "gesture_band.onnx"


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
@pytest.mark.onnxruntime_exact
def test_onnxruntime_tables_match_onnxruntime_exactly(model):
    c = compile_model(str(model), BuildOptions(requant="float", tables="onnxruntime"))
    samples = random_inputs(c.graph, 100, seed=23)
    npz = model.parent / "sample_inputs.npz"
    if npz.exists():
        samples += load_inputs(c.graph, str(npz))
    res = run_check(c, str(model), samples, "test", against_ort=True)
    assert res.bit_exact
    # onnxruntime's quantization documentation: its uint8 x int8 kernels saturate on x86
    # without VNNI; tinygen.check's probe says whether this CPU does (tests/ort_exact.py)
    skip_if_onnxruntime_inexact(model)
    assert res.onnxruntime == {"max_abs_diff": 0, "equal_fraction": 1.0}, res.onnxruntime


def test_default_tables_differ_where_onnxruntime_approximates():
    c = compile_model(str(GESTURE), BuildOptions(requant="float"))
    res = run_check(c, str(GESTURE), random_inputs(c.graph, 30, seed=23), "test", True)
    assert res.onnxruntime["max_abs_diff"] >= 1


def test_onnxruntime_softmax_needs_float_requant():
    with pytest.raises(TinygenError, match="--requant float"):
        compile_model(str(GESTURE), BuildOptions(requant="fixed", tables="onnxruntime"))
