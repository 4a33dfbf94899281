"""`check --trace`: a 1-LSB fault injected into one kernel call is found and named.

The fault is a one-bit change (XOR 1, so exactly 1 LSB whatever the value) of one output
element, written into the emitted model.c right after the kernel call and before its
TG_OP_END hook, as a kernel bug would leave it. The trace must name that call first, its ONNX
node, the element in ONNX layout and the 1-LSB distance, against the numpy reference and
against onnxruntime (whose intermediates agree with float mode on door_camera: the QOperator
graph runs as onnxruntime's own integer kernels).
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import tinygen.trace
from tinygen.check import random_inputs
from tinygen.compiler import BuildOptions, compile_model
from tinygen.trace import call_sites, trace_host

ROOT = Path(__file__).resolve().parents[2]
DOOR = ROOT / "examples" / "door_camera" / "door_camera.onnx"
PUMP = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"


def inject_fault(monkeypatch, module, call: int, element: int, where: str):
    """Make `module`'s render_tree flip bit 0 of output element `element` of kernel call
    `call` (the C expression `where` is that call's output buffer)."""
    real = module.render_tree

    def render(c, flags):
        files = real(c, flags)
        name = f"{c.options.prefix}.c"
        text = files[name]
        hook = f"TG_OP_END({call});"
        assert text.count(hook) == 1
        fault = f"((int8_t *)({where}))[{element}] ^= 1; /* injected fault */\n    "
        files[name] = text.replace(hook, fault + hook)
        return files
    monkeypatch.setattr(module, "render_tree", render)


def storage_to_onnx_index(shape, layout: str, flat: int) -> list[int]:
    """Element `flat` of a channels-last buffer [N, *spatial, C] as its ONNX index
    [n, c, *spatial] (common practice: NCHW <-> NHWC)."""
    if layout != "channels_last" or len(shape) < 3:
        return [int(i) for i in np.unravel_index(flat, shape)]
    stored = (shape[0], *shape[2:], shape[1])
    idx = [int(i) for i in np.unravel_index(flat, stored)]
    return [idx[0], idx[-1], *idx[1:-1]]


def test_clean_build_traces_equal():
    c = compile_model(str(PUMP), BuildOptions())
    (t,) = trace_host(c, random_inputs(c.graph, 3, seed=1))
    assert t.equal and t.first is None and not t.unseen
    assert [o.call for o in t.ops] == list(range(len(t.ops)))
    assert all(o.compared == 3 * int(np.prod(o.shape)) for o in t.ops)


@pytest.mark.parametrize("call", [1, 3])
def test_injected_fault_is_named_against_reference_and_onnxruntime(monkeypatch, call):
    c = compile_model(str(DOOR), BuildOptions(requant="float"))
    site = call_sites(c)[call]
    element = 37
    inject_fault(monkeypatch, tinygen.trace, call, element, site.where)
    samples = random_inputs(c.graph, 3, seed=5)
    ref, ort = trace_host(c, samples, model_path=str(DOOR), against_ort=True)
    op = c.graph.ops[site.op_index]
    t = c.graph.tensors[site.tensor]
    expected_index = storage_to_onnx_index(t.shape, t.layout, element)
    for trace in (ref, ort):
        first = trace.first
        assert first is not None and first.call == call, trace.lines()
        assert first.node == op.name and first.onnx_op == op.onnx_op
        assert first.max_abs == 1
        assert first.differing == len(samples)  # the one element, in every sample
        assert list(first.examples[0][0]) == expected_index
        assert first.first_sample == 0
        assert all(o.differing == 0 for o in trace.ops[:call])
    text = "\n".join(ref.lines())
    assert f"first difference at kernel call {call}" in text and op.name in text
    assert f"[{', '.join(map(str, expected_index))}]" in text


def test_cli_trace_exit_code_and_json(monkeypatch, tmp_path):
    r = subprocess.run([sys.executable, "-m", "tinygen", "check", str(PUMP), "--samples", "2",
                        "--trace", "--json"], capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout)
    assert info["trace"]["reference"]["equal"] is True
    assert info["trace"]["reference"]["first_difference"] is None
    assert len(info["trace"]["reference"]["ops"]) == 6


def test_cli_trace_names_the_faulty_op_and_exits_1(monkeypatch, capsys):
    from tinygen.cli import main
    c = compile_model(str(PUMP), BuildOptions())
    site = call_sites(c)[2]
    inject_fault(monkeypatch, tinygen.trace, 2, 0, site.where)
    assert main(["check", str(PUMP), "--samples", "2", "--trace"]) == 1
    err = capsys.readouterr().out  # results go to stdout
    assert "first difference at kernel call 2" in err
    assert c.graph.ops[site.op_index].name in err
