"""The models today's exporters make: graphs in exactly the form torch's dynamo exporter
writes them (torch.onnx.export(..., dynamo=True), torch 2.13: opset 20 by default, the
GELU formula at opset 17), quantized by onnxruntime's own quantize_static in QDQ and
QOperator form (tests/modelgen.py; no torch at test time).

Outside references, named at each check: onnxruntime (CPU execution provider, default graph
optimisations) on the quantized model, and onnx.reference (the ONNX operator definitions)
on DequantizeLinear -> float subgraph -> QuantizeLinear.
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper, version_converter
from onnx.reference import ReferenceEvaluator

from tests.modelgen import Net, quantize
from tinygen.check import random_inputs, run_check
from tinygen.compiler import BuildOptions, compile_model
from tinygen.errors import TinygenError
from tinygen.frontend.onnx_loader import load_model
from tinygen.frontend.pointwise import find_regions
from tinygen.harness.session import Session

ort = pytest.importorskip("onnxruntime")


# -- float models in the exporter's shapes -------------------------------------------------
def cnn2d(opset: int = 20, seed: int = 0) -> onnx.ModelProto:
    """Conv-ReLU-MaxPool-Conv-ReLU6, AdaptiveAvgPool2d(1) (ReduceMean over [-1, -2], keepdims),
    flatten (Reshape to [1, 8], allowzero=1), Linear (Gemm)."""
    n = Net((1, 1, 12, 12), seed, "door_sensor_cnn")
    x = n.op("Relu", [n.conv("input", 1, 8, 3, pads=[1, 1, 1, 1])])
    x = n.op("MaxPool", [x], kernel_shape=[2, 2], strides=[2, 2])
    x = n.op("Clip", [n.conv(x, 8, 8, 3, pads=[1, 1, 1, 1]), n.scalar(0.0), n.scalar(6.0)])
    x = n.reshape(n.reduce_mean(x, [-1, -2], True), [1, 8])
    return n.model(n.linear(x, 8, 4), opset)


def cnn1d(opset: int = 20, seed: int = 0) -> onnx.ModelProto:
    """Conv1d-ReLU, x.mean(-1) (ReduceMean over [-1], keepdims=0), Linear."""
    n = Net((1, 4, 32), seed, "pump_vibration_cnn1d")
    x = n.op("Relu", [n.conv("input", 4, 8, 3, pads=[1, 1])])
    return n.model(n.linear(n.reduce_mean(x, [-1], False), 8, 3), opset)


def sequence_mean(opset: int = 20, seed: int = 0) -> onnx.ModelProto:
    """Linear on [1, T, K] (MatMul + Add), ReLU, x.mean(1) (ReduceMean over [1]), Linear."""
    n = Net((1, 6, 16), seed, "gesture_frames")
    x = n.op("Relu", [n.linear_matmul("input", 16, 8)])
    return n.model(n.linear(n.reduce_mean(x, [1], False), 8, 4), opset)


def mlp(act: str, opset: int = 20, seed: int = 0) -> onnx.ModelProto:
    """Linear, activation, Linear."""
    n = Net((1, 16), seed, f"mlp_{act}")
    x = n.linear("input", 16, 12)
    x = {"gelu": lambda: n.gelu(x, opset), "gelu_tanh": lambda: n.gelu(x, opset, "tanh"),
         "silu": lambda: n.silu(x), "mish": lambda: n.op("Mish", [x]),
         "softplus": lambda: n.softplus(x)}[act]()
    return n.model(n.linear(x, 12, 4), opset)


# onnxruntime's quantizer quantizes Add, Mul, Sigmoid, ... itself; quantizing only these
# leaves every activation as one float subgraph between DequantizeLinear and QuantizeLinear.
WEIGHTED_ONLY = ["Conv", "Gemm", "MatMul", "MaxPool"]

# (id, float model, activation type, op types to quantize or None for all)
MODELS = [
    ("cnn2d", lambda: cnn2d(), "uint8", None),
    ("cnn2d_opset18", lambda: cnn2d(18, seed=1), "int8", None),
    ("cnn1d", lambda: cnn1d(seed=2), "uint8", None),
    ("sequence_mean", lambda: sequence_mean(seed=3), "int8", None),
    ("mlp_gelu", lambda: mlp("gelu", seed=4), "uint8", None),
    ("mlp_gelu_formula", lambda: mlp("gelu", 17, seed=5), "int8", None),
    ("mlp_gelu_formula_float", lambda: mlp("gelu", 17, seed=6), "uint8", WEIGHTED_ONLY),
    ("mlp_gelu_tanh_formula_float", lambda: mlp("gelu_tanh", 17, 7), "int8", WEIGHTED_ONLY),
    ("mlp_silu", lambda: mlp("silu", seed=8), "uint8", None),
    ("mlp_silu_float", lambda: mlp("silu", seed=9), "int8", WEIGHTED_ONLY),
    ("mlp_mish", lambda: mlp("mish", seed=10), "uint8", None),
    ("mlp_softplus", lambda: mlp("softplus", seed=11), "int8", None),
]


@pytest.fixture(scope="module")
def quantized(tmp_path_factory):
    cache = {}
    root = tmp_path_factory.mktemp("exporter_models")

    def get(name: str, fmt: str):
        if (name, fmt) not in cache:
            _, make, act, op_types = next(m for m in MODELS if m[0] == name)
            cache[name, fmt] = quantize(make(), root / f"{name}_{fmt}.onnx", fmt,
                                        activations=act, op_types=op_types)
        return cache[name, fmt]
    return get


@pytest.mark.parametrize("fmt", ["qdq", "qop"])
@pytest.mark.parametrize("name", [m[0] for m in MODELS])
@pytest.mark.onnxruntime_exact
def test_exported_model_is_bit_exact_and_matches_onnxruntime(quantized, name, fmt):
    path = str(quantized(name, fmt))
    for mode in ("fixed", "float"):
        c = compile_model(path, BuildOptions(requant=mode))
        res = run_check(c, path, random_inputs(c.graph, 60, seed=1), "test", against_ort=True)
        assert res.bit_exact, (mode, res.mismatched_elements)
        # Source: onnxruntime on the quantized model. Measured with these seeds: float mode
        # equal on every output element, fixed mode within 1 LSB (its Q31 multipliers round
        # once where onnxruntime rounds a float32 product). onnxruntime runs the float
        # subgraphs (Erf, Gelu, Mish, ReduceMean, ...) itself; its tables equal ours
        # (test_tables_against_onnxruntime), and its ReduceMean gave no different output here.
        limit = 0 if mode == "float" else 1
        assert res.onnxruntime["max_abs_diff"] <= limit, (mode, res.onnxruntime)


def kernel_calls(path: str) -> list[str]:
    c = compile_model(path, BuildOptions())
    return [op.attrs["call"].func for op in c.graph.ops if "call" in op.attrs]


def test_reduce_mean_pools_without_a_copy(quantized):
    # Spatial ReduceMean of a channels-last tensor is a window over the image; a mean over
    # the rows of a [1, T, C] tensor is a window over its rows: neither moves bytes first.
    for name in ("cnn2d", "cnn1d", "sequence_mean"):
        for fmt in ("qdq", "qop"):
            calls = kernel_calls(str(quantized(name, fmt)))
            assert calls.count("tg_avgpool") == 1 and "tg_lut" not in calls, (name, fmt, calls)
            before = calls[calls.index("tg_avgpool") - 1]
            assert before in ("tg_conv", "tg_add"), (name, fmt, calls)


def test_float_activations_become_one_table(quantized):
    for name, tables in (("mlp_gelu", 1), ("mlp_gelu_formula_float", 1),
                         ("mlp_gelu_tanh_formula_float", 1), ("mlp_silu_float", 1),
                         ("mlp_mish", 1), ("mlp_softplus", 1)):
        for fmt in ("qdq", "qop"):
            calls = kernel_calls(str(quantized(name, fmt)))
            assert calls == ["tg_fc", "tg_lut", "tg_fc"], (name, fmt, calls)
            assert calls.count("tg_lut") == tables


# -- the tables against the ONNX definition, on every one of the 256 inputs ----------------
def _consts(**values) -> list:
    return [numpy_helper.from_array(np.asarray(v), k) for k, v in values.items()]


def _region(kind: str, x: str, nodes: list, inits: list) -> tuple[str, int]:
    """Append the float subgraph `kind` reading x; returns (its result, opset)."""
    def node(op, ins, **attrs):
        out = f"{op.lower()}{len(nodes)}"
        nodes.append(helper.make_node(op, ins, [out], name=out, **attrs))
        return out

    def k(value):
        name = f"k{len(inits)}"
        inits.extend(_consts(**{name: np.float32(value)}))
        return name
    if kind == "gelu_formula":  # torch, opset 17: x * (0.5 * (erf(x / sqrt 2) + 1))
        e = node("Erf", [node("Div", [x, k(1.4142135381698608)])])
        return node("Mul", [x, node("Mul", [k(0.5), node("Add", [e, k(1.0)])])]), 17
    if kind == "gelu_tanh_formula":
        cube = node("Mul", [k(0.044715), node("Pow", [x, k(3.0)])])
        inner = node("Mul", [k(0.7978845608), node("Add", [x, cube])])
        half = node("Mul", [k(0.5), node("Add", [node("Tanh", [inner]), k(1.0)])])
        return node("Mul", [x, half]), 17
    if kind == "gelu":
        return node("Gelu", [x]), 20
    if kind == "gelu_tanh":
        return node("Gelu", [x], approximate="tanh"), 20
    if kind == "silu":
        return node("Mul", [x, node("Sigmoid", [x])]), 17
    if kind == "mish":
        return node("Mish", [x]), 18
    if kind == "softplus":  # torch's Softplus(beta=1, threshold=20)
        return node("Where", [node("Greater", [x, k(20.0)]), x, node("Softplus", [x])]), 17
    if kind == "leaky_where":  # LeakyReLU written as a select
        return node("Where", [node("Greater", [x, k(0.0)]), x, node("Mul", [x, k(0.1)])]), 17
    if kind == "hardswish_formula":  # x * clip(x + 3, 0, 6) / 6
        c = node("Clip", [node("Add", [x, k(3.0)]), k(0.0), k(6.0)])
        return node("Div", [node("Mul", [x, c]), k(6.0)]), 17
    if kind == "elu":
        return node("Elu", [x], alpha=0.7), 17
    if kind == "selu":
        return node("Selu", [x]), 17
    if kind == "tanh_of_shift":  # the constant itself a DequantizeLinear of an int8 scalar
        inits.extend(_consts(cq=np.int8(40), cs=np.float32(0.02), cz=np.int8(0)))
        nodes.append(helper.make_node("DequantizeLinear", ["cq", "cs", "cz"], ["c"],
                                      name="dq_c"))
        return node("Tanh", [node("Sub", [x, "c"])]), 17
    raise AssertionError(kind)


REGIONS = ["gelu_formula", "gelu_tanh_formula", "gelu", "gelu_tanh", "silu", "mish",
           "softplus", "leaky_where", "hardswish_formula", "elu", "selu", "tanh_of_shift"]


def region_model(kind: str, dtype, seed: int) -> onnx.ModelProto:
    """x (all 256 raw values) -> DequantizeLinear -> subgraph -> QuantizeLinear -> y."""
    rng = np.random.default_rng(seed)
    lo, hi = (0, 255) if dtype == np.uint8 else (-128, 127)
    s_in = np.float32(rng.uniform(0.01, 0.06))
    s_out = np.float32(s_in * rng.uniform(0.5, 1.2))
    z_in, z_out = (dtype(rng.integers(lo + 60, hi - 60)) for _ in range(2))
    nodes = [helper.make_node("DequantizeLinear", ["x", "s_in", "z_in"], ["xf"], name="dq")]
    inits = _consts(s_in=s_in, z_in=z_in, s_out=s_out, z_out=z_out)
    result, opset = _region(kind, "xf", nodes, inits)
    nodes.append(helper.make_node("QuantizeLinear", [result, "s_out", "z_out"], ["y"],
                                  name="q"))
    elem = helper.np_dtype_to_tensor_dtype(np.dtype(dtype))
    g = helper.make_graph(nodes, kind, [helper.make_tensor_value_info("x", elem, [1, 256])],
                          [helper.make_tensor_value_info("y", elem, [1, 256])], inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
    m.ir_version = 8
    onnx.checker.check_model(m)
    return m


def opset_of(m: onnx.ModelProto) -> int:
    return next(o.version for o in m.opset_import if o.domain in ("", "ai.onnx"))


def _all_inputs(dtype) -> np.ndarray:
    return np.arange(256).astype(dtype).reshape(1, 256)


@pytest.mark.parametrize("dtype", [np.uint8, np.int8], ids=["uint8", "int8"])
@pytest.mark.parametrize("kind", REGIONS)
def test_table_equals_onnx_reference_on_all_inputs(tmp_path, kind, dtype):
    # Source: onnx.reference.ReferenceEvaluator on the whole model (DequantizeLinear ->
    # float subgraph -> QuantizeLinear, the ONNX definitions): every table entry equal.
    for seed in range(3):
        m = region_model(kind, dtype, seed)
        path = tmp_path / f"{kind}_{seed}.onnx"
        onnx.save(m, path)
        x = _all_inputs(dtype)
        # onnx.reference's DequantizeLinear/QuantizeLinear need opset 19 or later
        want = ReferenceEvaluator(version_converter.convert_version(m, max(opset_of(m), 21))
                                  ).run(None, {"x": x})[0]
        sess = Session(str(path), BuildOptions(requant="fixed"), work_dir=str(tmp_path / "s"))
        assert [op.kind for op in sess.graph.ops] == ["lut"], sess.graph.ops
        np.testing.assert_array_equal(sess.run({"x": x})[0], want)


# onnxruntime evaluates these float ops with its own approximations (erf, tanh, exp...), so
# an entry whose value sits within float32 noise of a rounding boundary may come out 1 LSB
# apart. Measured (onnxruntime 1.32, x86-64): none did, on these seeds nor on 40 more per
# subgraph and type (245,760 entries all equal), so the limit is what was seen.
ORT_TABLE_LSB, ORT_TABLE_ENTRIES = 0, 0


@pytest.mark.parametrize("dtype", [np.uint8, np.int8], ids=["uint8", "int8"])
@pytest.mark.parametrize("kind", REGIONS)
def test_tables_against_onnxruntime(tmp_path, kind, dtype):
    # Source: onnxruntime (CPU, default optimisations) running the same model in float
    # between its DequantizeLinear and QuantizeLinear.
    for seed in range(3):
        m = region_model(kind, dtype, seed)
        path = tmp_path / f"{kind}_{seed}.onnx"
        onnx.save(m, path)
        x = _all_inputs(dtype)
        theirs = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"]).run(
            None, {"x": x})[0].astype(np.int64)
        c = compile_model(str(path), BuildOptions())
        table = c.graph.ops[0].attrs["call"].params.table
        shift = 128 if dtype == np.uint8 else 0  # the table is indexed in the int8 domain
        q8 = (x.astype(np.int16) - shift).astype(np.int8)
        ours = table[q8.view(np.uint8)].astype(np.int64) + shift
        diff = np.abs(ours - theirs)
        assert diff.max() <= ORT_TABLE_LSB and np.count_nonzero(diff) <= ORT_TABLE_ENTRIES, \
            (kind, seed, np.flatnonzero(diff))


# -- what does not qualify -----------------------------------------------------------------
def _qdq_activation(tmp_path, body, name="m.onnx", opset=17) -> str:
    """uint8 x -> DequantizeLinear -> body(xf) -> QuantizeLinear -> y (body returns the
    values to quantize as outputs, by name)."""
    nodes = [helper.make_node("DequantizeLinear", ["x", "s", "z"], ["xf"], name="dq")]
    inits = _consts(s=np.float32(0.05), z=np.uint8(128))
    results = body(nodes, inits)
    outs = []
    for i, r in enumerate(results):
        nodes.append(helper.make_node("QuantizeLinear", [r, "s", "z"], [f"y{i}"], name=f"q{i}"))
        outs.append(helper.make_tensor_value_info(f"y{i}", TensorProto.UINT8, [1, 8]))
    g = helper.make_graph(nodes, "m", [helper.make_tensor_value_info("x", TensorProto.UINT8,
                                                                     [1, 8])], outs, inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
    m.ir_version = 8
    path = tmp_path / name
    onnx.save(m, path)
    return str(path)


def test_an_intermediate_read_elsewhere_is_not_one_table(tmp_path):
    # the Sigmoid of SiLU is also quantized on its own: the Mul's region would hide it
    def body(nodes, inits):
        nodes.append(helper.make_node("Sigmoid", ["xf"], ["sg"], name="sig"))
        nodes.append(helper.make_node("Mul", ["xf", "sg"], ["sl"], name="mul"))
        return ["sl", "sg"]
    path = _qdq_activation(tmp_path, body)
    assert "sl" not in find_regions(load_model(path))
    with pytest.raises(TinygenError) as err:
        compile_model(path, BuildOptions())
    assert "not followed by QuantizeLinear" in err.value.one_line()


def test_a_constant_vector_is_not_a_scalar(tmp_path):
    def body(nodes, inits):
        inits.extend(_consts(v=np.linspace(-1, 1, 8).astype(np.float32)))
        nodes.append(helper.make_node("Mul", ["xf", "v"], ["m"], name="mul"))
        nodes.append(helper.make_node("Erf", ["m"], ["e"], name="erf"))
        return ["e"]
    path = _qdq_activation(tmp_path, body)
    assert find_regions(load_model(path)) == {}
    with pytest.raises(TinygenError):
        compile_model(path, BuildOptions())


def test_two_quantized_inputs_are_not_one_table(tmp_path):
    def body(nodes, inits):
        inits.extend(_consts(s2=np.float32(0.03), z2=np.uint8(100)))
        nodes.append(helper.make_node("DequantizeLinear", ["x", "s2", "z2"], ["xg"], name="dq2"))
        nodes.append(helper.make_node("Mul", ["xf", "xg"], ["m"], name="mul"))
        nodes.append(helper.make_node("Erf", ["m"], ["e"], name="erf"))
        return ["e"]
    path = _qdq_activation(tmp_path, body)
    assert find_regions(load_model(path)) == {}


def test_duplicated_dequantize_nodes_of_one_tensor_are_one_input(tmp_path):
    # quantizers may give every consumer its own DequantizeLinear of the same tensor
    def body(nodes, inits):
        nodes.append(helper.make_node("DequantizeLinear", ["x", "s", "z"], ["xg"], name="dq2"))
        nodes.append(helper.make_node("Sigmoid", ["xf"], ["sg"], name="sig"))
        nodes.append(helper.make_node("Mul", ["xg", "sg"], ["sl"], name="mul"))
        return ["sl"]
    path = _qdq_activation(tmp_path, body)
    regions = find_regions(load_model(path))
    assert list(regions) == ["sl"] and len(regions["sl"].roots) == 2
    x = np.arange(0, 256, 32).astype(np.uint8).reshape(1, 8)
    m = version_converter.convert_version(onnx.load(path), 21)
    # Source: onnx.reference on the model itself.
    want = ReferenceEvaluator(m).run(None, {"x": x})[0]
    got = Session(path, BuildOptions(), work_dir=str(tmp_path / "s")).run({"x": x})[0]
    np.testing.assert_array_equal(got, want)


def test_nan_entries_are_refused(tmp_path):
    def body(nodes, inits):
        nodes.append(helper.make_node("Sqrt", ["xf"], ["r"], name="sqrt"))
        nodes.append(helper.make_node("Erf", ["r"], ["e"], name="erf"))
        return ["e"]
    path = _qdq_activation(tmp_path, body)
    with pytest.raises(TinygenError) as err:
        compile_model(path, BuildOptions())
    line = err.value.one_line()
    assert "NaN for 128 of the 256" in line and "node 'erf'" in line, line


# -- ReduceMean shapes ---------------------------------------------------------------------
def test_reduce_mean_over_axes_that_are_not_consecutive_is_refused(tmp_path):
    n = Net((1, 4, 6, 8), 0, "bad_mean")
    x = n.reduce_mean(n.conv("input", 4, 4, 1), [1, 3], True)
    path = quantize(n.model(n.linear(n.reshape(x, [1, 6]), 6, 2), 18), tmp_path / "m.onnx")
    with pytest.raises(TinygenError) as err:
        compile_model(str(path), BuildOptions())
    assert "must be consecutive" in err.value.one_line()


@pytest.mark.parametrize("axes,keep,shape", [
    ([2, 3], False, (1, 5, 4, 6)), ([-1], True, (1, 5, 4, 6)), ([2], True, (1, 5, 4, 6)),
    ([1], False, (1, 5, 7)), ([-1], False, (1, 5, 7)), ([0, 1], True, (1, 5, 7)),
    ([1, 2], False, (1, 3, 4, 6)),
])
@pytest.mark.onnxruntime_exact
def test_reduce_mean_shapes_match_onnxruntime(tmp_path, axes, keep, shape):
    # Source: onnxruntime on the quantized model (ReduceMean runs in float there, between its
    # DequantizeLinear and QuantizeLinear). Rank-4 inputs come from a conv (stored
    # channels-last), rank-3 ones from MatMul (stored in ONNX order).
    n = Net(shape, 1, "means")
    if len(shape) == 4:
        x = n.conv("input", shape[1], shape[1], 1)
    else:
        x = n.linear_matmul("input", shape[-1], shape[-1])
    x = n.reduce_mean(n.op("Relu", [x]), axes, keep)
    path = quantize(n.model(n.op("Sigmoid", [x]), 18), tmp_path / "m.onnx",
                    activations="int8")
    for mode in ("fixed", "float"):
        c = compile_model(str(path), BuildOptions(requant=mode))
        res = run_check(c, str(path), random_inputs(c.graph, 40, seed=2), "t", against_ort=True)
        assert res.bit_exact
        # measured: float mode equal everywhere, fixed mode within 1 LSB (see above)
        assert res.onnxruntime["max_abs_diff"] <= (0 if mode == "float" else 1), res.onnxruntime


@pytest.mark.onnxruntime_exact
def test_linear_as_matmul_then_add_in_one_float_step(tmp_path):
    # A quantizer that leaves MatMul's output float: DequantizeLinear -> MatMul -> Add(bias)
    # -> Relu -> QuantizeLinear; the bias joins the fully connected op, Relu its clamp.
    path = quantize(sequence_mean(seed=4), tmp_path / "m.onnx", "qdq",
                    op_types=["MatMul", "Gemm", "ReduceMean"],
                    extra={"OpTypesToExcludeOutputQuantization": ["MatMul"]})
    kinds = [n.op_type for n in onnx.load(path).graph.node]
    i = kinds.index("MatMul")
    assert kinds[i:i + 4] == ["MatMul", "Add", "Relu", "QuantizeLinear"], kinds
    calls = kernel_calls(str(path))  # (a rank-3 input is stored channels-last: a transpose)
    assert [c for c in calls if c != "tg_transpose"] == ["tg_fc", "tg_avgpool", "tg_fc"], calls
    for mode in ("fixed", "float"):
        c = compile_model(str(path), BuildOptions(requant=mode))
        res = run_check(c, str(path), random_inputs(c.graph, 40, seed=3), "t", against_ort=True)
        assert res.bit_exact
        # Source: onnxruntime, which runs MatMul + Add in float here: the bias, rounded to
        # int32 at s_x * s_w, is within 1 LSB (measured: equal in float mode)
        assert res.onnxruntime["max_abs_diff"] <= 1, res.onnxruntime


# -- BatchNormalization that the exporter could not fold ------------------------------------
def _batch_norm(n: Net, x: str, channels: int) -> str:
    r = n.rng
    params = [r.uniform(0.5, 2, channels), r.normal(0, 0.5, channels),
              r.normal(0, 1, channels), r.uniform(0.3, 3, channels)]
    return n.op("BatchNormalization", [x, *(n.const(p.astype(np.float32)) for p in params)],
                epsilon=1e-5)


def bn_input_2d(seed: int) -> onnx.ModelProto:
    """BatchNorm2d on the input, ReLU, 1x1 conv (torch keeps a BN that follows no conv)."""
    n = Net((1, 4, 6, 6), seed, "bn_input")
    return n.model(n.conv(n.op("Relu", [_batch_norm(n, "input", 4)]), 4, 4, 1), 20)


def bn_features(seed: int) -> onnx.ModelProto:
    """BatchNorm1d on [1, 8] features, then Linear."""
    n = Net((1, 8), seed, "bn_features")
    return n.model(n.linear(_batch_norm(n, "input", 8), 8, 3), 20)


def bn_after_pool(seed: int) -> onnx.ModelProto:
    n = Net((1, 2, 8, 8), seed, "bn_after_pool")
    x = n.op("MaxPool", [n.op("Relu", [n.conv("input", 2, 4, 3)])], kernel_shape=[2, 2],
             strides=[2, 2])
    return n.model(n.conv(_batch_norm(n, x, 4), 4, 3, 1), 20)


@pytest.mark.parametrize("make,fmt", [(bn_input_2d, "qdq"), (bn_features, "qdq"),
                                      (bn_after_pool, "qdq"), (bn_after_pool, "qop")],
                         ids=["input_2d", "features", "after_pool_qdq", "after_pool_qop"])
@pytest.mark.onnxruntime_exact
def test_batch_norm_is_a_depthwise_conv(tmp_path, make, fmt):
    for seed in range(2):
        path = str(quantize(make(seed), tmp_path / f"bn{seed}.onnx", fmt, seed=seed))
        assert "tg_dwconv" in kernel_calls(path)
        for mode in ("fixed", "float"):
            c = compile_model(path, BuildOptions(requant=mode))
            res = run_check(c, path, random_inputs(c.graph, 100, seed=seed), "t",
                            against_ort=True)
            assert res.bit_exact
            # Source: onnxruntime, which runs BatchNormalization in float between its
            # DequantizeLinear and QuantizeLinear. Ours is exact but for the offset, rounded
            # to int32 at s_x |a| / 127: within 1 LSB of the float value at the BN, which a
            # following conv can turn into 2. Measured: at most 2 LSB, >= 99% equal.
            o = res.onnxruntime
            assert o["max_abs_diff"] <= 2 and o["equal_fraction"] >= 0.99, (mode, o)
