"""Row-streamed runs (passes/stream.py): the band schedule, the rings, the emitted band loop.

The outside check is the whole-tensor computation: streaming may change where rows live and
when they are computed, never a value, so every streamed result is compared with the same
model compiled with --stream off (whose kernels are checked against onnxruntime and the ONNX
operator definitions in tests/runtime_c and tests/e2e).
"""
from __future__ import annotations

import json
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from tests.modelgen import Net, quantize
from tinygen.check import random_inputs, run_check
from tinygen.compiler import BuildOptions, compile_model, storage_inputs
from tinygen.passes.stream import band_schedule, stream_runs
from tinygen.reference.conv import ConvParams, conv
from tinygen.reference.rows import run_bands
from tinygen.runner import run_reference


def _conv_chain_params(rng, h: int, w: int, layers: int) -> list[ConvParams]:
    out, c = [], int(rng.integers(1, 5))
    for _ in range(layers):
        k = int(rng.integers(1, 4))
        s = int(rng.integers(1, 3))
        d = int(rng.integers(1, 3)) if k > 1 else 1
        pt, pb = int(rng.integers(0, k)), int(rng.integers(0, k))
        span = (k - 1) * d + 1
        oh = (h + pt + pb - span) // s + 1
        if oh < 2:
            break
        oc = int(rng.integers(1, 5))
        out.append(ConvParams(n=1, in_h=h, in_w=w, in_c=c, out_h=oh, out_w=w, out_c=oc,
                              k_h=k, k_w=1, stride_h=s, dil_h=d, pad_top=pt))
        h, c = oh, oc
    return out


@pytest.mark.parametrize("seed", range(40))
@pytest.mark.parametrize("band", [1, 2, 3, 5])
def test_band_schedule_computes_every_row_once_and_rings_keep_what_is_read(seed, band):
    rng = np.random.default_rng(seed)
    params = _conv_chain_params(rng, int(rng.integers(4, 30)), int(rng.integers(1, 4)), 4)
    if len(params) < 2:
        pytest.skip("the drawn chain shrank below two layers")
    rows, ring = band_schedule(params, band)
    # every output row of the last layer exactly once, in order, no range computed twice
    for j, p in enumerate(params):
        made = [r for b in rows for r in range(*b[j])]
        assert made == sorted(set(made)), "a row computed twice or out of order"
        if j == len(params) - 1:
            assert made == list(range(p.out_h))
    # the rings hold every row a reader needs: run the chain through the rings (filled with
    # junk first) with random weights and compare with the whole-tensor computation
    x0 = rng.integers(-128, 128, (1, params[0].in_h, params[0].in_w, params[0].in_c))
    whole = x0.astype(np.int8)
    layers = []
    for j, p in enumerate(params):
        w = rng.integers(-3, 4, (p.out_c, p.k_h, p.k_w, p.in_c)).astype(np.int8)
        b = rng.integers(-50, 50, p.out_c).astype(np.int32)
        whole = conv(whole, w, b, p).astype(np.int8)  # raw int32 cut to int8 between layers
        pr = replace(p, x_ring=ring[j - 1] if j else 0,
                     y_ring=ring[j] if j < len(params) - 1 else 0)
        layers.append((lambda q, x, ww, bb: conv(x, ww, bb, q).astype(np.int8), pr, [w, b],
                       p.in_c, p.out_c))
    rings = [np.full(r * p.out_w * p.out_c, 77, np.int8)
             for r, p in zip(ring, params, strict=False)]
    y = np.zeros(whole.size, np.int8)
    got = run_bands(layers, x0.astype(np.int8).reshape(-1), rings, y, rows)
    assert np.array_equal(got, whole.reshape(-1))
    # a ring holds no more rows than the tensor it stands for
    assert all(r <= p.out_h for r, p in zip(ring, params, strict=False))


def _chain_model(tmp: Path, depthwise: bool = False, seed: int = 3) -> Path:
    """An int8 QDQ chain at 24x20: conv 3x3 -> (depthwise 3x3 | conv 3x3) stride 2 -> 1x1 ->
    dilated 3x3 with uneven pads."""
    n = Net((1, 4, 24, 20), seed=seed)
    x = n.op("Relu", [n.conv("input", 4, 16, 3, pads=[1, 1, 1, 1])])
    x = n.op("Relu", [n.conv(x, 16, 16, 3, group=16 if depthwise else 1, pads=[1, 1, 1, 1],
                             strides=[2, 2])])
    x = n.conv(x, 16, 8, 1)
    x = n.conv(x, 8, 8, 3, pads=[0, 1, 2, 1], dilations=[2, 1])
    return quantize(n.model(x), tmp / "chain.onnx", fmt="qdq", activations="int8")


@pytest.fixture(scope="module")
def chain(tmp_path_factory) -> Path:
    return _chain_model(tmp_path_factory.mktemp("chain"))


def test_conv_chain_is_streamed_with_smaller_arena_and_the_same_macs(chain):
    on = compile_model(str(chain), BuildOptions())
    off = compile_model(str(chain), BuildOptions(stream="off"))
    assert stream_runs(on.graph) and not stream_runs(off.graph)
    assert on.plan.arena_bytes < off.plan.arena_bytes
    assert on.whole_bound == off.plan.lower_bound
    assert on.macs == off.macs  # the rings hold rows, nothing is computed twice


@pytest.mark.parametrize("requant", ["fixed", "float"])
def test_streamed_c_and_reference_agree_and_equal_whole_tensor(chain, requant):
    on = compile_model(str(chain), BuildOptions(requant=requant))
    off = compile_model(str(chain), BuildOptions(requant=requant, stream="off"))
    samples = random_inputs(on.graph, 8, seed=5)
    res = run_check(on, str(chain), samples, "test", against_ort=False)
    assert res.bit_exact, f"{res.mismatched_elements} of {res.total_elements} differ"
    for s in samples:
        a = run_reference(on.graph, storage_inputs(on.graph, s))
        b = run_reference(off.graph, storage_inputs(off.graph, s))
        assert all(np.array_equal(x, y) for x, y in zip(a, b, strict=True))


def test_stream_off_gives_whole_tensor_code(chain):
    off = compile_model(str(chain), BuildOptions(stream="off"))
    from tinygen.codegen.emit import render_tree
    text = render_tree(off, "")["model.c"]
    assert "_bands" not in text and "for (band" not in text
    assert off.whole_arena == off.plan.arena_bytes


def test_plan_json_shows_runs_rings_and_both_figures(chain):
    r = subprocess.run([sys.executable, "-m", "tinygen", "plan", str(chain), "--json"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout)
    assert info["stream"] == "auto"
    assert info["whole_tensor_bound_bytes"] > info["arena_bytes"]
    run = info["streamed_runs"][0]
    assert len(run["layers"]) >= 2 and run["rings"]
    assert all(0 < ring["rows"] and ring["bytes"] > 0 for ring in run["rings"])
    r = subprocess.run([sys.executable, "-m", "tinygen", "plan", str(chain), "--json",
                        "--stream", "off"], capture_output=True, text=True)
    off = json.loads(r.stdout)
    assert off["streamed_runs"] == []
    assert off["lower_bound_bytes"] == off["whole_tensor_bound_bytes"]
