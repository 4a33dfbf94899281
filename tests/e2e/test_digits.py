"""Accuracy on an open data set: the digits CNN compiled to C keeps the float model's accuracy.

Source: scikit-learn's bundled handwritten digits (sklearn.datasets.load_digits, 1,797 8x8
images, ten classes; it ships inside the package). examples/digits/make_digits.py trained the
float CNN on a fixed 80/20 split, onnxruntime's quantizer made digits.onnx, and the held-out
360 images are committed beside them. The C's top-1 accuracy on that split must be within one
percentage point of the float model's as onnxruntime computes it.
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tinygen.accuracy import predictions
from tinygen.check import load_inputs, load_labels, run_check
from tinygen.compiler import BuildOptions, compile_model

ROOT = Path(__file__).resolve().parents[2]
DIGITS = ROOT / "examples" / "digits"
MODEL, FLOAT, SPLIT = DIGITS / "digits.onnx", DIGITS / "digits_float.onnx", \
    DIGITS / "digits_test.npz"


def test_held_out_split_is_from_scikit_learns_digits():
    # Source: sklearn.datasets.load_digits, the data set the split claims to come from.
    sk = pytest.importorskip("sklearn.datasets")
    d = sk.load_digits()
    known = {img.astype(np.float32).tobytes(): int(t)
             for img, t in zip(d.images / 16.0, d.target, strict=True)}
    with np.load(SPLIT) as z:
        x, labels = z["inputs"], z["labels"]
    assert x.shape == (360, 1, 1, 8, 8) and labels.shape == (360,)
    for img, label in zip(x, labels, strict=True):
        assert known[img.reshape(8, 8).astype(np.float32).tobytes()] == int(label)


@pytest.mark.parametrize("requant", ["fixed", "float"])
def test_c_accuracy_within_one_point_of_float(requant):
    ort = pytest.importorskip("onnxruntime")
    c = compile_model(str(MODEL), BuildOptions(requant=requant))
    samples = load_inputs(c.graph, str(SPLIT))
    labels = load_labels(str(SPLIT), len(samples))
    res = run_check(c, str(MODEL), samples, "test", against_ort=False)
    assert res.bit_exact
    c_acc = float(np.mean(predictions(res.outputs) == labels))
    sess = ort.InferenceSession(str(FLOAT), providers=["CPUExecutionProvider"])
    float_scores = [sess.run(None, {"input": s[0].reshape(1, 1, 8, 8)}) for s in samples]
    float_acc = float(np.mean(predictions(float_scores) == labels))
    assert float_acc > 0.9  # a real classifier, not chance (10%)
    assert abs(c_acc - float_acc) <= 0.01, (c_acc, float_acc)


def test_cli_reports_accuracy_and_sqnr():
    r = subprocess.run([sys.executable, "-m", "tinygen", "check", str(MODEL), "--inputs",
                        str(SPLIT), "--float-model", str(FLOAT), "--json"],
                       capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout)
    acc = info["accuracy"]
    assert acc["samples"] == 360 and acc["classes"] == 10
    assert abs(acc["top1"]["c"] - acc["top1"]["float"]) <= 0.01
    assert set(acc["agreement"]) == {"c/onnxruntime", "c/float", "onnxruntime/float"}
    q = info["quantization_error"]
    assert q["float_reference"].startswith("float model")
    assert [lay["node"] for lay in q["layers"]] == ["conv1", "conv2", "classifier"]
    assert all(isinstance(lay["sqnr_db"], float) and lay["sqnr_db"] > 20 for lay in q["layers"])
