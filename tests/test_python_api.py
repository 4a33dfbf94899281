"""The Python API (docs/python.md): its example runs as written; run() is the emitted C and
equals the numpy reference bit for bit; onnxruntime agrees where the numerics contract says
it must; the figures are the CLI's; bad calls raise TinygenError with a clear line."""
from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import tinygen
from tinygen.errors import TinygenError

ROOT = Path(__file__).resolve().parent.parent
MODELS = sorted(p for p in (ROOT / "examples").glob("*/*.onnx") if not p.stem.endswith("_float"))
PUMP = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"
DOOR = ROOT / "examples" / "door_camera" / "door_camera.onnx"


def random_feeds(model: tinygen.Model, rng) -> list[np.ndarray]:
    """Inputs over each input's whole quantized range (and a little past it)."""
    feeds = []
    for t in model.inputs:
        if t.dtype == "float32":
            info = np.iinfo(t.c_type)
            lo, hi = (info.min - t.zero_point) * t.scale, (info.max - t.zero_point) * t.scale
            pad = 0.05 * (hi - lo)
            feeds.append(rng.uniform(lo - pad, hi + pad, t.shape).astype(np.float32))
        else:
            info = np.iinfo(t.dtype)
            feeds.append(rng.integers(info.min, info.max + 1, t.shape).astype(t.dtype))
    return feeds


@pytest.mark.onnxruntime_exact
def test_the_docs_example_runs_as_written(monkeypatch, tmp_path):
    text = (ROOT / "docs" / "python.md").read_text()
    blocks = re.findall(r"```python\n(.*?)```", text, re.S)
    assert len(blocks) == 2
    monkeypatch.chdir(ROOT)  # the docs name the example by its path in the checkout
    namespace: dict = {}
    exec(compile(blocks[0], "docs/python.md", "exec"), namespace)
    assert namespace["scores"].shape == (1, 4)
    namespace = {}
    exec(compile(blocks[1], "docs/python.md", "exec"), namespace)
    fixture = namespace["pump"].__wrapped__()  # the generator under @pytest.fixture
    pump = next(fixture)
    try:
        tests = [v for k, v in namespace.items() if k.startswith("test_")]
        assert len(tests) == 3
        for test in tests:
            test(pump)
    finally:
        fixture.close()


@pytest.mark.parametrize("requant", ["fixed", "float"])
@pytest.mark.parametrize("io", ["arena", "external"])
@pytest.mark.parametrize("path", MODELS, ids=lambda p: p.stem)
def test_run_is_the_reference_bit_for_bit(path, io, requant):
    rng = np.random.default_rng(5)
    with tinygen.compile(path, requant=requant, io=io) as model:
        for _ in range(8):
            feeds = random_feeds(model, rng)
            ours, ref = model.run(*feeds), model.reference(*feeds)
            assert len(ours) == len(model.outputs)
            for y, r, t in zip(ours, ref, model.outputs, strict=True):
                assert y.shape == t.shape and y.dtype == np.dtype(t.dtype)
                np.testing.assert_array_equal(y, r)


@pytest.mark.parametrize("path", [PUMP, DOOR], ids=lambda p: p.stem)
@pytest.mark.onnxruntime_exact
def test_float_mode_equals_onnxruntime(path):
    """source: onnxruntime's CPU provider, default optimisations. DESIGN's numerics
    contract: float requantization reproduces its integer Conv/MatMul/Gemm/Add/pooling
    kernels exactly; these two models are made of those ops (their READMEs)."""
    import onnxruntime as ort
    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    rng = np.random.default_rng(9)
    with tinygen.compile(path, requant="float") as model:
        for _ in range(10):
            feeds = random_feeds(model, rng)
            theirs = session.run(None, {t.name: x for t, x in zip(model.inputs, feeds,
                                                                    strict=True)})
            for y, z in zip(model.run(*feeds), theirs, strict=True):
                np.testing.assert_array_equal(y, z)


def test_figures_are_the_clis():
    r = subprocess.run([sys.executable, "-m", "tinygen", "plan", str(PUMP), "--json"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    cli = json.loads(r.stdout)
    model = tinygen.compile(PUMP)
    assert {k: model.figures[k] for k in cli} == cli
    assert model.arena_bytes == cli["arena_bytes"] and model.macs == cli["macs"]
    assert model.weights_bytes == cli["weights_bytes"]
    assert model.lower_bound_bytes == cli["lower_bound_bytes"]
    assert sum(row["macs"] for row in model.per_op) == model.macs
    assert len(model.per_op) == cli["ops"]
    assert {row["onnx_op"] for row in model.per_op} >= {"Conv", "Gemm"}


def test_inputs_and_outputs_describe_the_model():
    model = tinygen.compile(PUMP)
    (x,), (y,) = model.inputs, model.outputs
    # examples/pump_vibration/README.md: float [1, 3, 128] in, 4 logits out, uint8 inside
    assert (x.name, x.shape, x.dtype, x.c_type) == ("input", (1, 3, 128), "float32", "uint8")
    assert x.storage_shape == (1, 128, 3)  # channels-last
    assert (y.shape, y.dtype, y.c_type) == ((1, 4), "float32", "uint8")
    assert 0 <= x.zero_point <= 255 and x.scale > 0


def test_the_call_forms_agree():
    model = tinygen.compile(PUMP)
    x = np.linspace(-1, 1, 384, dtype=np.float32).reshape(1, 3, 128)
    first = model.run(x)[0]
    for other in (model.run({"input": x}), model.run(input=x), model.run(x.reshape(-1))):
        np.testing.assert_array_equal(other[0], first)


@pytest.mark.parametrize("call,message", [
    (lambda m, x: m.run(), "missing ['input']"),
    (lambda m, x: m.run(x, x), "takes 1 input(s), 2 given"),
    (lambda m, x: m.run({"inptu": x}), "unknown ['inptu']"),
    (lambda m, x: m.run(x[..., :10]), "has shape [1, 3, 10]"),
])
def test_bad_calls_say_what_is_wrong(call, message):
    model = tinygen.compile(PUMP)
    x = np.zeros((1, 3, 128), np.float32)
    with pytest.raises(TinygenError) as info:
        call(model, x)
    assert message in str(info.value) and "\n" not in str(info.value)


@pytest.mark.parametrize("kwargs,message", [
    ({"requant": "double"}, "requant must be one of fixed, float"),
    ({"arena_limit": "1K"}, "over --arena-limit 1024"),
    ({"prefix": "int"}, "--prefix"),
    ({"arena_limit": "lots"}, "not a size"),
])
def test_bad_flags_raise_tinygen_error(kwargs, message):
    with pytest.raises(TinygenError, match=re.escape(message)):
        tinygen.compile(PUMP, **kwargs)


@pytest.mark.onnxruntime_exact
def test_emit_and_check_as_the_cli_does(tmp_path):
    cam = tinygen.compile(DOOR, prefix="cam")
    pump = tinygen.compile(PUMP, prefix="pump", requant="float")
    cam.emit(tmp_path / "fw")
    names = pump.emit(tmp_path / "fw", add=True)
    assert {"cam.c", "pump.c", "tg_config.h"} <= set(names)
    assert "TG_WITH_FLOAT_REQUANT 1" in (tmp_path / "fw" / "tg_config.h").read_text()
    res = pump.check(5, against_onnxruntime=True)
    assert res["bit_exact"] is True and res["samples"] == 5
    assert res["onnxruntime"]["max_abs_diff"] == 0  # source: onnxruntime, as above


def test_emitted_flags_line_is_the_clis():
    """Trees written through the API state their flags as the CLI's do."""
    from tinygen.cli import build_options, flags_text, make_parser
    from tinygen.compiler import options_text
    args = make_parser().parse_args(["emit", str(PUMP), "-o", "x", "--requant", "float",
                                     "--no-inplace", "--region", "fast=2K", "--align", "16",
                                     "--io", "external", "--order", "min-peak"])
    assert options_text(build_options(args)) == flags_text(args)
