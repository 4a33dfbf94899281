"""Models for the report tests: an example model, a branching one and one with hostile names."""
from __future__ import annotations

from pathlib import Path

import onnx
import pytest

from tests.modelgen import Net, quantize
from tinygen.compiler import BuildOptions, compile_model

ROOT = Path(__file__).resolve().parents[2]
PUMP = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"
HOSTILE_NODE = "<script>alert('x')</script>&\x07"
HOSTILE_TENSOR = 'act"<b>&amp;\u00e9'


def branchy_float() -> onnx.ModelProto:
    """conv -> sigmoid (may run in place) -> two convs side by side -> concat -> head."""
    n = Net((1, 4, 8, 8), seed=1, name="branchy")
    x = n.conv("input", 4, 8, 3, pads=[1, 1, 1, 1])
    x = n.op("Sigmoid", [x])
    a = n.conv(x, 8, 8, 3, pads=[1, 1, 1, 1])
    b = n.conv(x, 8, 4, 1)
    y = n.op("Concat", [a, b], axis=1)
    y = n.op("GlobalAveragePool", [y])
    y = n.op("Flatten", [y])
    return n.model(n.gemm(y, 12, 3))


def twin_float() -> onnx.ModelProto:
    """Two branches, each a wide conv narrowed by a 1x1 conv, written interleaved: running
    one branch to its end before starting the other needs less memory."""
    n = Net((1, 4, 32), seed=2, name="twin")
    a1 = n.conv("input", 4, 32, 3, pads=[1, 1])
    b1 = n.conv("input", 4, 32, 3, pads=[1, 1])
    a2 = n.conv(a1, 32, 2, 1)
    b2 = n.conv(b1, 32, 2, 1)
    y = n.op("Concat", [a2, b2], axis=1)
    y = n.op("GlobalAveragePool", [y])
    y = n.op("Flatten", [y])
    return n.model(n.gemm(y, 4, 2))


def _rename_tensor(graph: onnx.GraphProto, old: str, new: str) -> None:
    for node in graph.node:
        node.input[:] = [new if t == old else t for t in node.input]
        node.output[:] = [new if t == old else t for t in node.output]
    for vi in graph.value_info:
        if vi.name == old:
            vi.name = new


@pytest.fixture(scope="session")
def branchy_path(tmp_path_factory) -> Path:
    return quantize(branchy_float(), tmp_path_factory.mktemp("branchy") / "branchy.onnx",
                    fmt="qdq", activations="int8")


@pytest.fixture(scope="session")
def twin_path(tmp_path_factory) -> Path:
    return quantize(twin_float(), tmp_path_factory.mktemp("twin") / "twin.onnx", fmt="qdq",
                    activations="int8")


@pytest.fixture(scope="session")
def hostile_path(tmp_path_factory, branchy_path) -> Path:
    """The branching model with markup and control characters in node and tensor names."""
    m = onnx.load(str(branchy_path))
    m.graph.name = "<i>net</i>"
    for node in m.graph.node:
        node.name = HOSTILE_NODE + node.name
    conv = next(n for n in m.graph.node if n.op_type == "Conv")
    q = next(n for n in m.graph.node if n.op_type == "QuantizeLinear"
             and n.input[0] == conv.output[0])
    _rename_tensor(m.graph, q.output[0], HOSTILE_TENSOR)  # the conv's int8 activation
    path = tmp_path_factory.mktemp("hostile") / "hostile.onnx"
    onnx.save(m, str(path))
    return path


@pytest.fixture(scope="session")
def pump():
    return compile_model(str(PUMP), BuildOptions())


@pytest.fixture(scope="session")
def branchy(branchy_path):
    return compile_model(str(branchy_path), BuildOptions())
