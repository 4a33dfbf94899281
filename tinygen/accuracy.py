"""Top-1 accuracy on labelled inputs (`check --inputs FILE.npz` with a `labels` array).

Three classifiers are scored on the same inputs: the emitted C (its outputs from the host
build), onnxruntime running the quantized model, and the float model (`--float-model`, or the
float graph recovered from a QDQ file, named as such). A prediction is the index of the
largest value of the model's first output (per sample, all its elements; ties go to the
lowest index, as numpy's argmax). Agreement is the fraction of samples where two of them
predict the same class, whatever the label.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tinygen.errors import TinygenError
from tinygen.ir import Graph


def predictions(outputs: list[list[np.ndarray]]) -> np.ndarray:
    """Class index per sample: argmax over every element of the first output."""
    return np.array([int(np.argmax(np.asarray(o[0], np.float64).reshape(-1)))
                     for o in outputs], dtype=np.int64)


def check_labels(g: Graph, labels: np.ndarray, path: str) -> int:
    """The number of classes (elements of the first output); labels must index them."""
    classes = g.tensors[g.outputs[0].name].size
    if labels.size and int(labels.max()) >= classes:
        raise TinygenError(f"label {int(labels.max())} is not a class of the model's first "
                           f"output '{g.outputs[0].onnx_name}' ({classes} values)", file=path)
    return classes


def onnxruntime_outputs(g: Graph, model_path: str, samples) -> list[list[np.ndarray]]:
    """onnxruntime (default optimisations) on the quantized model, per sample."""
    from tinygen.check import onnxruntime_session
    sess = onnxruntime_session(model_path, model_path, what="accuracy")
    names = {i.name for i in sess.get_inputs()}
    out = []
    for floats in samples:
        feeds = {}
        for io, x in zip(g.inputs, floats, strict=True):
            dt = np.float32 if io.onnx_dtype == "float32" else np.dtype(io.onnx_dtype)
            if io.onnx_name in names:
                feeds[io.onnx_name] = np.asarray(x).astype(dt).reshape(g.tensors[io.name].shape)
        out.append(sess.run([io.onnx_name for io in g.outputs], feeds))
    return out


@dataclass
class Accuracy:
    samples: int
    classes: int
    top1: dict[str, float | None]          # "c", "onnxruntime", "float"
    agreement: dict[str, float]            # "c/onnxruntime", "c/float", "onnxruntime/float"
    float_source: str | None = None
    notes: list[str] = field(default_factory=list)

    def as_json(self) -> dict:
        return {"samples": self.samples, "classes": self.classes,
                "top1": {k: None if v is None else round(v, 6) for k, v in self.top1.items()},
                "agreement": {k: round(v, 6) for k, v in self.agreement.items()},
                "float_reference": self.float_source, "notes": self.notes}

    def lines(self) -> list[str]:
        names = {"c": "emitted C", "onnxruntime": "onnxruntime (quantized model)",
                 "float": "float model" if self.float_source is None or
                 self.float_source.startswith("float model") else "float graph (recovered)"}
        parts = [f"{names[k]} {100 * v:.2f}%" for k, v in self.top1.items() if v is not None]
        out = [f"top-1 accuracy on {self.samples} labelled samples ({self.classes} classes): "
               + ", ".join(parts)]
        if self.agreement:
            out.append("  top-1 agreement: " + ", ".join(
                f"{k.replace('c/', 'C/')} {100 * v:.2f}%" for k, v in self.agreement.items()))
        out += ["  note: " + n for n in self.notes]
        return out


def score(labels: np.ndarray, classes: int, c_outputs, ort_outputs=None, float_outputs=None,
          float_source: str | None = None, notes: list[str] | None = None) -> Accuracy:
    """Top-1 of each classifier given, and the pairwise agreement of their predictions."""
    preds = {"c": predictions(c_outputs)}
    if ort_outputs is not None:
        preds["onnxruntime"] = predictions(ort_outputs)
    if float_outputs is not None:
        preds["float"] = predictions(float_outputs)
    top1 = {k: float(np.mean(p == labels)) if labels.size else None for k, p in preds.items()}
    keys = list(preds)
    agreement = {f"{a}/{b}": float(np.mean(preds[a] == preds[b]))
                 for i, a in enumerate(keys) for b in keys[i + 1:]}
    return Accuracy(int(labels.size), classes, top1, agreement, float_source, notes or [])


def labelled_accuracy(c, model_path: str, inputs_path: str | None, samples, c_outputs,
                      ort_outputs=None, quant_error=None) -> Accuracy | None:
    """Top-1 accuracy when the --inputs file has labels (None otherwise). onnxruntime runs
    the quantized model unless its outputs are given; the float outputs come from the
    quantization-error pass (a QuantError), when there was one."""
    from tinygen.check import load_labels
    if not inputs_path:
        return None
    labels = load_labels(inputs_path, len(samples))
    if labels is None:
        return None
    classes = check_labels(c.graph, labels, inputs_path)
    notes = []
    if ort_outputs is None:
        try:
            ort_outputs = onnxruntime_outputs(c.graph, model_path, samples)
        except TinygenError as exc:
            notes.append(f"onnxruntime not scored: {exc.reason}")
    q = quant_error
    return score(labels, classes, c_outputs, ort_outputs,
                 q.float_outputs if q is not None else None,
                 q.source if q is not None else None, notes)
