"""The safety nets around a run: sanitizers, arena fill patterns, guard bytes, overflow proof.

Each net is shown to catch a deliberately broken tree (a test that could not fail would
prove nothing), and to pass the real ones: every example model runs under AddressSanitizer
and UBSan (tinygen check --sanitize) bit-exact against the reference.
"""
from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

import tinygen.check
import tinygen.sanitize
from tinygen.check import random_inputs, run_check
from tinygen.compiler import BuildOptions, compile_model
from tinygen.errors import TinygenError
from tinygen.passes.overflow import INT32_MAX
from tinygen.sanitize import run_sanitized

sys.path.insert(0, str(Path(__file__).resolve().parent))
import make_corpus  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = sorted(p for p in (ROOT / "examples").glob("*/*.onnx")
                  if not p.stem.endswith("_float"))


def _have_asan() -> bool:
    cc = shutil.which("gcc")
    if not cc:
        return False
    r = subprocess.run([cc, "-fsanitize=address,undefined", "-x", "c", "-", "-o", "/dev/null"],
                       input="int main(void){return 0;}", capture_output=True, text=True)
    return r.returncode == 0


needs_asan = pytest.mark.skipif(not _have_asan(), reason="gcc with libasan/libubsan needed")


@needs_asan
@pytest.mark.parametrize("requant", ["fixed", "float"])
@pytest.mark.parametrize("model", EXAMPLES, ids=lambda p: p.stem)
def test_example_is_clean_under_sanitizers(model, requant):
    c = compile_model(str(model), BuildOptions(requant=requant))
    res = run_sanitized(c, str(model), random_inputs(c.graph, 8, seed=5), "test", False)
    assert res.problem is None, res.problem
    assert res.bit_exact, res


@needs_asan
def test_sanitize_flag_through_the_cli():
    model = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"
    r = subprocess.run([sys.executable, "-m", "tinygen", "check", str(model), "--samples", "4",
                        "--sanitize", "--io", "external", "--json"], capture_output=True,
                       text=True, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    assert '"bit_exact": true' in r.stdout and '"sanitizer_problem": null' in r.stdout


# -- deliberately broken trees --------------------------------------------------------------

def _qop_model(tmp_path: Path, bias=None, weights=None) -> Path:
    parts = make_corpus.qop_parts()
    if bias is not None:
        parts = make_corpus.replace_init(parts, "b", np.asarray(bias, np.int32))
    if weights is not None:
        parts = make_corpus.replace_init(parts, "w", weights)
    path = tmp_path / "qop.onnx"
    onnx.save(make_corpus.build(*parts), path)
    return path


def _op_block(text: str, index: int) -> tuple[int, int]:
    """Start and end of the statements between TG_OP_BEGIN(i); and TG_OP_END(i);."""
    start = text.index(f"TG_OP_BEGIN({index});") + len(f"TG_OP_BEGIN({index});")
    return start, text.index(f"TG_OP_END({index});")


def _last_call(text: str) -> int:
    return max(int(i) for i in re.findall(r"TG_OP_BEGIN\((\d+)\);", text))


def skip_last_call(text: str) -> str:
    """Skip the kernel call that writes the graph output: the output is never written."""
    s, e = _op_block(text, _last_call(text))
    return text[:s] + "\n    if (inputs == (void *const *)&a) {" + text[s:e] + "}\n    " + \
        text[e:]


def write_past_arena(offset: int, every_second_run: bool = False, prefix: str = "model"):
    """Add a byte store at arena + ARENA_BYTES + offset inside the last kernel call."""
    def edit(text: str) -> str:
        store = f"a[{prefix.upper()}_ARENA_BYTES + {offset}u] = 1u;"
        if every_second_run:  # only in the second run of a pair (arena B in the driver)
            store = "{ static int runs; if (++runs % 2 == 0) { " + store + " } }"
        _, e = _op_block(text, _last_call(text))
        return text[:e] + store + "\n    " + text[e:]
    return edit


def broken(monkeypatch, module, edit):
    """Make `module`'s render_tree return trees whose model.c went through `edit`."""
    real = module.render_tree

    def render(c, flags):
        files = real(c, flags)
        name = f"{c.options.prefix}.c"
        files[name] = edit(files[name])
        return files
    monkeypatch.setattr(module, "render_tree", render)


def test_two_fill_patterns_catch_an_output_never_written(tmp_path, monkeypatch):
    path = _qop_model(tmp_path)
    c = compile_model(str(path), BuildOptions())
    samples = random_inputs(c.graph, 3)
    assert run_check(c, str(path), samples, "ok", False).bit_exact  # the tree is sound
    broken(monkeypatch, tinygen.check, skip_last_call)
    res = run_check(c, str(path), samples, "broken", False)
    assert not res.bit_exact and res.mismatched_elements == res.total_elements
    # the mechanism: the unwritten output is whatever the arena was filled with (naive plan:
    # the output's bytes are its own; the uint8 output gets its sign bit flipped on return)
    c = compile_model(str(path), BuildOptions(planner="naive"))
    host = tinygen.check.build_host(c, "broken", tmp_path / "host")
    x = [np.zeros(c.graph.tensors[io.name].size, np.uint8) for io in c.graph.inputs]
    specs = tinygen.check.out_specs(c.graph)
    a = host.run(x, specs, fill=0x5A)[0]
    b = host.run(x, specs, fill=0xC3)[0]
    assert set(a.tolist()) == {0x5A ^ 0x80} and set(b.tolist()) == {0xC3 ^ 0x80}


def test_host_guard_bytes_catch_a_write_past_the_arena(tmp_path, monkeypatch):
    path = _qop_model(tmp_path)
    c = compile_model(str(path), BuildOptions())
    broken(monkeypatch, tinygen.check, write_past_arena(3))
    with pytest.raises(TinygenError, match="outside its arena"):
        run_check(c, str(path), random_inputs(c.graph, 1), "broken", False)


@needs_asan
def test_asan_catches_a_write_one_past_the_arena(tmp_path, monkeypatch):
    path = _qop_model(tmp_path)
    c = compile_model(str(path), BuildOptions())
    broken(monkeypatch, tinygen.sanitize, write_past_arena(0))
    res = run_sanitized(c, str(path), random_inputs(c.graph, 2), "broken", False)
    assert not res.bit_exact
    assert "heap-buffer-overflow" in res.problem and "WRITE of size 1" in res.problem
    assert "kernel call 1 (tg_fc <- QLinearMatMul 'qmatmul')" in res.problem, res.problem


@needs_asan
def test_driver_guard_bytes_catch_a_stray_write_asan_cannot_see(tmp_path, monkeypatch):
    """Arena B sits inside a bigger block: ASan allows the store, the guard check does not."""
    path = _qop_model(tmp_path)
    c = compile_model(str(path), BuildOptions())
    broken(monkeypatch, tinygen.sanitize, write_past_arena(3, every_second_run=True))
    res = run_sanitized(c, str(path), random_inputs(c.graph, 2), "broken", False)
    assert not res.bit_exact and "guard byte after+3 changed" in res.problem, res.problem


@needs_asan
def test_driver_fill_patterns_catch_an_output_never_written(tmp_path, monkeypatch):
    """ASan does not see reads of unwritten (but allocated) bytes; the two fills do."""
    path = _qop_model(tmp_path)
    c = compile_model(str(path), BuildOptions())
    broken(monkeypatch, tinygen.sanitize, skip_last_call)
    res = run_sanitized(c, str(path), random_inputs(c.graph, 2), "broken", False)
    assert res.problem is None
    assert not res.bit_exact and res.mismatched_elements == res.total_elements


# -- int32 accumulators ----------------------------------------------------------------------

def _negative_weights():
    return -np.random.default_rng(9).integers(1, 100, (3, 2, 3, 3)).astype(np.int8)


def _edge_bias(weights) -> np.ndarray:
    """Bias that makes the proven bound exactly INT32_MAX for each output channel.

    x is uint8 with zero point 128 (int8 domain 0), so |x - zx| <= 128; with every weight
    negative, x = 0 reaches the bound: sum over taps 128 * |w| (common practice bound).
    """
    per_channel = 128 * np.abs(weights.astype(np.int64)).reshape(3, -1).sum(axis=1)
    return (INT32_MAX - per_channel).astype(np.int32)


def _extreme_inputs(c):
    """Inputs at the low end of their range (x = 0 in uint8, the bound-reaching input)."""
    one = []
    for io in c.graph.inputs:
        t = c.graph.tensors[io.name]
        s, z = np.float32(t.quant.scalar_scale()), t.quant.scalar_zp()
        one.append(np.full(t.shape, (-128 - z) * s, np.float32))
    return [one, *random_inputs(c.graph, 3, seed=2)]


def test_accumulator_past_int32_is_refused_with_a_clear_message(tmp_path):
    w = _negative_weights()
    path = _qop_model(tmp_path, bias=_edge_bias(w).astype(np.int64) + 1, weights=w)
    with pytest.raises(TinygenError) as info:
        compile_model(str(path), BuildOptions())
    e = info.value
    assert (e.node, e.op) == ("qconv", "QLinearConv")
    assert f"bound {INT32_MAX + 1} > 2^31-1" in e.reason and "overflow" in e.reason


@needs_asan
def test_accumulator_exactly_at_int32_max_runs_clean_under_ubsan(tmp_path):
    w = _negative_weights()
    path = _qop_model(tmp_path, bias=_edge_bias(w), weights=w)
    c = compile_model(str(path), BuildOptions())
    conv = next(op for op in c.graph.ops if op.kind == "conv")
    assert conv.attrs["acc_bound"] == INT32_MAX
    res = run_sanitized(c, str(path), _extreme_inputs(c), "edge", True)
    assert res.problem is None and res.bit_exact, res
    # source: onnxruntime's QLinearConv on the same inputs (it accumulates in int32 too)
    assert res.onnxruntime["max_abs_diff"] <= 1, res.onnxruntime


@needs_asan
def test_ubsan_reports_the_overflow_the_proof_prevents(tmp_path, monkeypatch):
    """With the proof switched off, the same layer one past the bound overflows in C."""
    import tinygen.compiler
    w = _negative_weights()
    path = _qop_model(tmp_path, bias=_edge_bias(w).astype(np.int64) + 1, weights=w)
    monkeypatch.setattr(tinygen.compiler, "check_accumulators", lambda g: g)
    c = compile_model(str(path), BuildOptions())
    res = run_sanitized(c, str(path), _extreme_inputs(c)[:1], "overflow", False)
    assert not res.bit_exact
    assert "signed integer overflow" in res.problem, res.problem
    assert "kernel call 0 (tg_conv <- QLinearConv 'qconv')" in res.problem, res.problem


def test_deep_layer_overflows_without_any_bias(tmp_path):
    """K = 131073 taps of |w - zw| = 128 with |x - zx| = 128: one past 2^31."""
    k = 2**31 // (128 * 128) + 1
    inits = [numpy_helper.from_array(np.full((k, 1), -128, np.int8), "w"),
             numpy_helper.from_array(np.float32(0.1), "s"),
             numpy_helper.from_array(np.int8(0), "z")]
    nodes = [helper.make_node("QuantizeLinear", ["x", "s", "z"], ["xq"], name="q"),
             helper.make_node("QLinearMatMul", ["xq", "s", "z", "w", "s", "z", "s", "z"],
                              ["yq"], name="deep"),
             helper.make_node("DequantizeLinear", ["yq", "s", "z"], ["y"], name="dq")]
    g = helper.make_graph(nodes, "deep", [helper.make_tensor_value_info(
        "x", TensorProto.FLOAT, [1, k])], [helper.make_tensor_value_info(
            "y", TensorProto.FLOAT, [1, 1])], inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    path = tmp_path / "deep.onnx"
    onnx.save(m, path)
    with pytest.raises(TinygenError, match="accumulator could overflow") as info:
        compile_model(str(path), BuildOptions())
    assert info.value.node == "deep" and info.value.op == "QLinearMatMul"
