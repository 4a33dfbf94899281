"""The report's insight: per-layer SQNR, accuracy on labelled inputs for every example model
(the emulated cost per layer is in tests/target/test_report_cpu.py).

Sources: each example's float model (the model before quantization) run by onnxruntime for
the SQNR and the float accuracy, and its labelled bundled samples.
"""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from tinygen import cli

ROOT = Path(__file__).resolve().parents[2]
MODELS = sorted(p for p in (ROOT / "examples").glob("*/*.onnx") if not p.stem.endswith("_float"))


def cells(doc: str, header: str) -> list[str]:
    """The text of one column of the per-layer table."""
    table = doc[doc.index("Ops in execution order"):]
    table = table[:table.index("</table>")]
    heads = re.findall(r"<th>(.*?)</th>", table)
    col = heads.index(header)
    rows = re.findall(r"<tr>(.*?)</tr>", table, re.S)[1:]
    return [re.findall(r"<td[^>]*>(.*?)</td>", r, re.S)[col] for r in rows]


@pytest.mark.parametrize("model", MODELS, ids=lambda p: p.stem)
def test_report_has_sqnr_and_accuracy(model, tmp_path):
    out = tmp_path / "r.html"
    assert cli.main(["report", str(model), "-o", str(out), "--inputs",
                     str(model.parent / "sample_inputs.npz"), "--float-model",
                     str(model.with_name(model.stem + "_float.onnx"))]) == 0
    doc = out.read_text()
    assert "<h2>Quantization error</h2>" in doc and "Most lost at kernel call" in doc
    assert re.search(r"<h2>Accuracy \(16 labelled samples, \d+ classes\)</h2>", doc)
    sqnr = [v for v in cells(doc, "SQNR dB") if v != "-"]
    assert sqnr and all(10 < float(v) < 90 for v in sqnr)
    assert cells(doc, "drop dB").count("-") < len(sqnr)
    assert doc.count('class="top"') >= 3  # live bytes, flash and the SQNR drop highlighted
