"""Per-layer SQNR against float: every layer of every example finds its float tensor, and the
figures agree with SQNR computed independently.

Sources: onnxruntime running each example's float model (the model before quantization), and
the noise power of uniform rounding, step^2 / 12 (common practice), for the input's SQNR.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from tinygen.check import load_inputs, random_inputs, run_check
from tinygen.compiler import BuildOptions, compile_model, dequantize_outputs
from tinygen.layer_error import float_reference, quantization_error

ROOT = Path(__file__).resolve().parents[2]
MODELS = sorted(p for p in (ROOT / "examples").glob("*/*.onnx") if not p.stem.endswith("_float"))
PUMP = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"


def float_of(model: Path) -> Path:
    return model.with_name(model.stem + "_float.onnx")


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
def test_every_layer_matches_a_float_tensor(model):
    c = compile_model(str(model), BuildOptions())
    ref = float_reference(c, str(model), str(float_of(model)))
    q = quantization_error(c, ref, load_inputs(c.graph, str(model.parent / "sample_inputs.npz")))
    assert all(lay.sqnr_db is not None for lay in q.layers), \
        [(lay.node, lay.note) for lay in q.layers if lay.sqnr_db is None]
    assert all(v is not None and 10 < v < 80 for v in q.outputs.values()), q.outputs
    assert q.worst is not None and q.worst.drop_db == max(lay.drop_db for lay in q.layers)


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
def test_output_sqnr_equals_one_computed_from_onnxruntime(model):
    # Source: onnxruntime on the float model; SQNR = 10 log10(sum f^2 / sum (f - c)^2) with c
    # the C's dequantized outputs.
    ort = pytest.importorskip("onnxruntime")
    c = compile_model(str(model), BuildOptions())
    samples = load_inputs(c.graph, str(model.parent / "sample_inputs.npz"))
    res = run_check(c, str(model), samples, "t", against_ort=False)
    sess = ort.InferenceSession(str(float_of(model)), providers=["CPUExecutionProvider"])
    io = c.graph.outputs[0]
    sig = noise = 0.0
    for floats, outs in zip(samples, res.outputs, strict=True):
        shape = c.graph.tensors[c.graph.inputs[0].name].shape
        f = sess.run(None, {c.graph.inputs[0].onnx_name: floats[0].reshape(shape)})[0]
        y = dequantize_outputs(c.graph, outs)[0].astype(np.float64).reshape(f.shape)
        sig += float(np.sum(f.astype(np.float64) ** 2))
        noise += float(np.sum((f - y) ** 2))
    expect = 10 * math.log10(sig / noise)
    q = quantization_error(c, float_reference(c, str(model), str(float_of(model))), samples)
    assert q.outputs[io.onnx_name] == pytest.approx(expect, abs=0.01)


def test_input_sqnr_is_that_of_uniform_rounding():
    # Uniform inputs over the input's whole quantized range: the rounding error is uniform in
    # [-s/2, s/2], noise power s^2 / 12 (common practice); signal power E[x^2] of the uniform.
    c = compile_model(str(PUMP), BuildOptions())
    t = c.graph.tensors[c.graph.inputs[0].name]
    s, z = float(np.float32(t.quant.scalar_scale())), t.quant.scalar_zp()
    lo, hi = (-128 - z) * s, (127 - z) * s
    signal = (hi ** 3 - lo ** 3) / (3 * (hi - lo))
    expect = 10 * math.log10(signal / (s * s / 12))
    q = quantization_error(c, float_reference(c, str(PUMP), None),
                           random_inputs(c.graph, 60, seed=4))
    assert q.inputs["input"] == pytest.approx(expect, abs=0.15)
    assert q.source.startswith("the float graph recovered")


def test_recovered_float_graph_restores_folded_relus():
    # pump_vibration's quantizer folded each Relu into its QuantizeLinear (zero point at the
    # uint8 minimum): the recovered float graph must clamp there again, so its Conv outputs
    # are never negative.
    import onnx

    from tinygen.layer_error import FloatRunner, float_feeds, float_graph_from_qdq
    fm, q_to_float = float_graph_from_qdq(onnx.load(PUMP))
    assert sum(n.op_type == "Relu" for n in fm.graph.node) == 3
    c = compile_model(str(PUMP), BuildOptions())
    floats = random_inputs(c.graph, 1, seed=2)[0]
    names = [v for v in q_to_float.values() if v.endswith("relu_recovered")]
    run = FloatRunner(fm, str(PUMP))
    run.prepare(names)
    got = run.run(float_feeds(c.graph, floats))
    assert len(names) == 3 and all((got[n] >= 0).all() and (got[n] > 0).any() for n in names)
