"""`emulate --trace`: the per-op trace on an emulated Cortex-M names an injected 1-LSB fault.

The same fault as tests/e2e/test_trace.py (bit 0 of one output element flipped right after one
kernel call, in the emitted model.c), built for the core and run under QEMU: the outputs are
copied out over semihosting and compared with the numpy reference op by op.
"""
from __future__ import annotations

from pathlib import Path

import pytest

import tinygen.trace
from tests.e2e.test_trace import inject_fault, storage_to_onnx_index
from tinygen.check import random_inputs
from tinygen.cli import main
from tinygen.compiler import BuildOptions, compile_model
from tinygen.trace import call_sites, trace_target

ROOT = Path(__file__).resolve().parents[2]
GESTURE = ROOT / "examples" / "gesture_band" / "gesture_band.onnx"
pytestmark = pytest.mark.target


def test_target_trace_of_a_clean_build_is_equal():
    c = compile_model(str(GESTURE), BuildOptions(requant="float"))
    t = trace_target(c, random_inputs(c.graph, 2, seed=3), "cortex-m4")
    assert t.equal and len(t.ops) == 10 and all(o.compared for o in t.ops)


def test_target_trace_names_the_injected_fault(monkeypatch):
    c = compile_model(str(GESTURE), BuildOptions())
    call, element = 6, 21
    site = call_sites(c)[call]
    inject_fault(monkeypatch, tinygen.trace, call, element, site.where)
    samples = random_inputs(c.graph, 2, seed=3)
    t = trace_target(c, samples, "cortex-m3")
    first = t.first
    assert first is not None and first.call == call, t.lines()
    assert first.node == c.graph.ops[site.op_index].name and first.max_abs == 1
    assert first.differing == len(samples)
    tensor = c.graph.tensors[site.tensor]
    assert list(first.examples[0][0]) == storage_to_onnx_index(tensor.shape, tensor.layout,
                                                               element)


def test_emulate_trace_cli(capsys):
    assert main(["emulate", str(GESTURE), "--cpu", "cortex-m33", "--samples", "1",
                 "--trace"]) == 0
    err = capsys.readouterr().out  # results go to stdout
    assert "trace, C vs reference: 10 kernel calls" in err and "every compared output equal" \
        in err
