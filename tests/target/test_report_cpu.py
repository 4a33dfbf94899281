"""`report --cpu`: emulated instructions per layer, instructions per MAC and the stack."""
from __future__ import annotations

from pathlib import Path

import pytest

from tests.report.test_insight_report import cells
from tinygen import cli

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.target
def test_report_with_cpu_has_instructions_per_layer(tmp_path):
    model = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"
    out = tmp_path / "r.html"
    assert cli.main(["report", str(model), "-o", str(out), "--cpu", "cortex-m4",
                     "--samples", "2"]) == 0
    doc = out.read_text()
    instr = cells(doc, "instructions")
    assert len(instr) == 8 and sum(v != "-" for v in instr) == 6  # 6 kernel calls, 2 views
    assert all(int(v) > 0 for v in instr if v != "-")
    assert "<h2>Target cost</h2>" in doc and "stack B" in doc
    assert doc.count('class="top"') >= 4
