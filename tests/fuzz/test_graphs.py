"""Random valid quantized graphs: the emitted C is bit-exact against the numpy reference.

Every case also goes through tinygen.plan.verify_plan (compile_model runs it; it is run
again here on the final plan), under random build flags (requant mode, planner, order,
alignment, in-place, I/O placement). A refusal (TinygenError) is only accepted for the
reasons listed in ALLOWED_REFUSALS; anything else is a finding.
"""
from __future__ import annotations

import logging
import shutil
import tempfile
from pathlib import Path

import numpy as np
import onnx
import pytest
from hypothesis import HealthCheck, given, note, reject
from hypothesis import strategies as st

from tests.fuzz.budget import fuzz_settings
from tests.fuzz.graphs import FloatCase, float_nets, qop_graphs
from tests.fuzz.harness import ObjectCache, cached_check
from tests.modelgen import quantize
from tinygen.check import random_inputs
from tinygen.compiler import BuildOptions, compile_model
from tinygen.errors import TinygenError
from tinygen.plan import verify_plan
from tinygen.sanitize import run_sanitized

# Refusals that are the contract, not a bug: a requantization multiplier outside what the
# fixed-point form can hold, an int32 accumulator the weights could overflow, and a graph
# onnxruntime's quantizer left partly in float (it has no QOperator form of Tanh,
# HardSigmoid, ...; such a model is refused with "not fully quantized", as it should be).
ALLOWED_REFUSALS = ("requantization multiplier", "accumulator could overflow",
                    "not fully quantized")
CACHE = ObjectCache()
needs_asan = pytest.mark.skipif(shutil.which("gcc") is None, reason="needs gcc")


@st.composite
def build_options(draw) -> BuildOptions:
    return BuildOptions(requant=draw(st.sampled_from(["fixed", "float"])),
                        planner=draw(st.sampled_from(["greedy-size", "first-fit", "naive"])),
                        order=draw(st.sampled_from(["given", "min-peak"])),
                        align=draw(st.sampled_from([4, 8, 16])),
                        inplace=draw(st.booleans()),
                        io=draw(st.sampled_from(["arena", "arena", "external"])),
                        regions=draw(st.sampled_from([[], [], [("tcm", 512), ("sram", 2**20)],
                                                      [("tcm", 96), ("sram", 2**20)]])))


def extreme_inputs(graph) -> list[list[np.ndarray]]:
    """Every input at the low end, then at the high end, of its quantized range."""
    out = []
    for end in (-128, 127):
        one = []
        for io in graph.inputs:
            t = graph.tensors[io.name]
            s, z = np.float32(t.quant.scalar_scale()), t.quant.scalar_zp()
            one.append(np.full(t.shape, (end - z) * s, np.float32))
        out.append(one)
    return out


def compile_or_allowed_refusal(path: Path, opts: BuildOptions):
    try:
        c = compile_model(str(path), opts)
    except TinygenError as exc:
        if any(r in exc.reason for r in ALLOWED_REFUSALS):
            reject()
        raise
    assert verify_plan(c.plan) == []
    return c


def check_bit_exact(path: Path, opts: BuildOptions, seed: int) -> None:
    c = compile_or_allowed_refusal(path, opts)
    samples = random_inputs(c.graph, 3, seed=seed) + extreme_inputs(c.graph)
    res = cached_check(CACHE, c, str(path), samples)
    assert res.bit_exact, f"{res.mismatched_elements} of {res.total_elements} elements differ"


def _quantized(case, work: Path) -> Path:
    path = work / "model.onnx"
    root = logging.getLogger()
    level = root.level
    root.setLevel(logging.ERROR)  # the quantizer's advice on pre-processing, every call
    try:
        quantize(case.model, path, fmt=case.fmt, activations=case.activations,
                 weights=case.weights, per_channel=case.per_channel, samples=4,
                 seed=case.seed)
    except Exception as exc:  # the quantizer's own limits are not ours to test
        note(f"quantize_static refused: {type(exc).__name__}: {exc}")
        reject()
    finally:
        root.setLevel(level)
    return path


def model_file(case, work: Path) -> Path:
    """The drawn graph as a file: quantized by onnxruntime (FloatCase) or as drawn."""
    note(repr(case))
    if isinstance(case, FloatCase):
        return _quantized(case, work)
    path = work / "model.onnx"
    onnx.save(case.model, path)
    return path


@fuzz_settings(1.0, suppress_health_check=list(HealthCheck))
@given(float_nets(), build_options(), st.integers(0, 2**16))
def test_quantized_float_nets_are_bit_exact(case, opts, seed):
    with tempfile.TemporaryDirectory(prefix="tinygen-fuzz-") as tmp:
        check_bit_exact(model_file(case, Path(tmp)), opts, seed)


@fuzz_settings(1.0, suppress_health_check=list(HealthCheck))
@given(qop_graphs(), build_options(), st.integers(0, 2**16))
def test_extreme_qoperator_graphs_are_bit_exact(case, opts, seed):
    with tempfile.TemporaryDirectory(prefix="tinygen-fuzz-") as tmp:
        check_bit_exact(model_file(case, Path(tmp)), opts, seed)


@fuzz_settings(0.3, suppress_health_check=list(HealthCheck))
@given(qop_graphs(max_channels=40, max_spatial=18), build_options(), st.integers(0, 2**16))
def test_large_qoperator_graphs_are_bit_exact(case, opts, seed):
    """Up to 40 channels and 18 pixels a side: the kernels' blocked and unrolled paths."""
    with tempfile.TemporaryDirectory(prefix="tinygen-fuzz-") as tmp:
        check_bit_exact(model_file(case, Path(tmp)), opts, seed)


@needs_asan
@fuzz_settings(0.08, suppress_health_check=list(HealthCheck))
@given(st.one_of(float_nets(), qop_graphs()), build_options(), st.integers(0, 2**16))
def test_random_graphs_are_clean_under_sanitizers(case, opts, seed):
    """tinygen check --sanitize on random graphs: no ASan/UBSan report, guards intact."""
    with tempfile.TemporaryDirectory(prefix="tinygen-fuzz-") as tmp:
        path = model_file(case, Path(tmp))
        c = compile_or_allowed_refusal(path, opts)
        samples = random_inputs(c.graph, 2, seed=seed) + extreme_inputs(c.graph)
        res = run_sanitized(c, str(path), samples, "fuzz", False)
        assert res.problem is None, res.problem
        assert res.bit_exact, f"{res.mismatched_elements} of {res.total_elements} differ"
