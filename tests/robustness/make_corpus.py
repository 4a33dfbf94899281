"""Write a corpus of bad inputs for tinygen: each file is small and made here, by code.

    python tests/robustness/make_corpus.py OUTDIR    # writes the files, lists the cases

Every case is a model file plus extra CLI flags and what the one-line error must name: the
node and ONNX op where there is one, and a fragment of the reason. The corpus is generated
at test time into a temporary folder (tests/robustness/test_bad_inputs.py), so the repository
holds only this script.

The models start from two valid ones built by hand with onnx.helper: a QDQ chain
(QuantizeLinear / DequantizeLinear around Conv, Relu, MaxPool, Flatten, Gemm) and a
QOperator chain (QLinearConv, QLinearMatMul); each case breaks one thing in one of them.
"""
from __future__ import annotations

import io
import os
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

OPSET = 17


@dataclass
class Case:
    """One bad input: the file to write, the flags, and what the error line must say."""

    name: str
    make: Callable[[Path], None]  # writes the model file at the given path
    reason: str  # a fragment the reason must contain (case-insensitive)
    node: str | None = None  # node name the line must contain (None: not required)
    op: str | None = None  # ONNX op type the line must name (None: not required)
    args: list[str] = field(default_factory=list)  # "{NAME}" stands for the aux file NAME
    suffix: str = ".onnx"
    verbs: tuple[str, ...] = ("emit", "check", "plan")  # the first is the one checked closely
    aux: dict[str, Callable[[Path], None]] = field(default_factory=dict)  # files beside it

    def argv(self, model: Path) -> list[str]:
        """The flags, with each aux file's place filled in."""
        out = []
        for a in self.args:
            for name in self.aux:
                a = a.replace("{" + name + "}", str(aux_path(self, model, name)))
            out.append(a)
        return out


def aux_path(case: Case, model: Path, name: str) -> Path:
    return model.parent / f"{case.name}.{name}"


# -- the two valid models ----------------------------------------------------------------

def _init(name: str, arr) -> onnx.TensorProto:
    return numpy_helper.from_array(np.asarray(arr), name)


def _f32(x) -> np.ndarray:
    return np.asarray(x, dtype=np.float32)


def qdq_parts(input_dims=(1, 2, 6, 6)):
    """Nodes and initializers of the valid QDQ model (lists, so cases can edit them).

    x -Q-DQ-> Conv(3x3, pad 1) -> Relu -Q-DQ-> MaxPool 2x2 -> Flatten -> Gemm -Q-DQ-> y
    """
    rng = np.random.default_rng(5)
    s_x, s_c, s_y = 0.05, 0.04, 0.1
    w_scale = _f32([0.01, 0.02, 0.015, 0.012])
    inits = [
        _init("s_x", _f32(s_x)), _init("z_x", np.int8(0)),
        _init("w", rng.integers(-100, 100, (4, 2, 3, 3)).astype(np.int8)),
        _init("w_scale", w_scale), _init("w_zp", np.zeros(4, np.int8)),
        _init("b", rng.integers(-500, 500, 4).astype(np.int32)),
        _init("b_scale", (np.float32(s_x) * w_scale).astype(np.float32)),
        _init("b_zp", np.zeros(4, np.int32)),
        _init("s_c", _f32(s_c)), _init("z_c", np.int8(-128)),
        _init("fc_w", rng.integers(-90, 90, (4 * 3 * 3, 3)).astype(np.int8)),
        _init("fc_w_scale", _f32(0.02)), _init("fc_w_zp", np.int8(0)),
        _init("s_y", _f32(s_y)), _init("z_y", np.int8(3)),
    ]
    nodes = [
        helper.make_node("QuantizeLinear", ["x", "s_x", "z_x"], ["xq"], name="quant_in"),
        helper.make_node("DequantizeLinear", ["xq", "s_x", "z_x"], ["xd"], name="dequant_in"),
        helper.make_node("DequantizeLinear", ["w", "w_scale", "w_zp"], ["wd"], name="dq_w",
                         axis=0),
        helper.make_node("DequantizeLinear", ["b", "b_scale", "b_zp"], ["bd"], name="dq_b",
                         axis=0),
        helper.make_node("Conv", ["xd", "wd", "bd"], ["c"], name="conv1", pads=[1, 1, 1, 1],
                         kernel_shape=[3, 3], strides=[1, 1]),
        helper.make_node("Relu", ["c"], ["r"], name="relu1"),
        helper.make_node("QuantizeLinear", ["r", "s_c", "z_c"], ["rq"], name="quant_c"),
        helper.make_node("DequantizeLinear", ["rq", "s_c", "z_c"], ["rd"], name="dequant_c"),
        helper.make_node("MaxPool", ["rd"], ["p"], name="pool1", kernel_shape=[2, 2],
                         strides=[2, 2]),
        helper.make_node("Flatten", ["p"], ["f"], name="flat1", axis=1),
        helper.make_node("DequantizeLinear", ["fc_w", "fc_w_scale", "fc_w_zp"], ["fc_wd"],
                         name="dq_fc_w"),
        helper.make_node("Gemm", ["f", "fc_wd"], ["g"], name="fc1"),
        helper.make_node("QuantizeLinear", ["g", "s_y", "z_y"], ["gq"], name="quant_y"),
        helper.make_node("DequantizeLinear", ["gq", "s_y", "z_y"], ["y"], name="dequant_y"),
    ]
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, list(input_dims))
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3])
    return nodes, inits, [x], [y]


def build(nodes, inits, inputs, outputs, name: str = "corpus", opset: int = OPSET
          ) -> onnx.ModelProto:
    g = helper.make_graph(nodes, name, inputs, outputs, inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
    m.ir_version = 8
    return m


def qdq_model(**kw) -> onnx.ModelProto:
    return build(*qdq_parts(**kw))


def qop_parts():
    """The valid QOperator model: x -Q-> QLinearConv -> Flatten -> QLinearMatMul -DQ-> y."""
    rng = np.random.default_rng(6)
    inits = [
        _init("s_x", _f32(0.05)), _init("z_x", np.uint8(128)),
        _init("w", rng.integers(-100, 100, (3, 2, 3, 3)).astype(np.int8)),
        _init("s_w", _f32([0.01, 0.02, 0.03])), _init("z_w", np.zeros(3, np.int8)),
        _init("s_c", _f32(0.08)), _init("z_c", np.uint8(120)),
        _init("b", rng.integers(-300, 300, 3).astype(np.int32)),
        _init("m", rng.integers(0, 255, (3 * 16, 5)).astype(np.uint8)),
        _init("s_m", _f32(0.004)), _init("z_m", np.uint8(128)),
        _init("s_y", _f32(0.2)), _init("z_y", np.uint8(100)),
    ]
    nodes = [
        helper.make_node("QuantizeLinear", ["x", "s_x", "z_x"], ["xq"], name="quant_in"),
        helper.make_node("QLinearConv", ["xq", "s_x", "z_x", "w", "s_w", "z_w", "s_c", "z_c",
                                         "b"], ["c"], name="qconv", kernel_shape=[3, 3]),
        helper.make_node("Flatten", ["c"], ["f"], name="flat", axis=1),
        helper.make_node("QLinearMatMul", ["f", "s_c", "z_c", "m", "s_m", "z_m", "s_y", "z_y"],
                         ["yq"], name="qmatmul"),
        helper.make_node("DequantizeLinear", ["yq", "s_y", "z_y"], ["y"], name="dequant_y"),
    ]
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 2, 6, 6])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 5])
    return nodes, inits, [x], [y]


def qop_model() -> onnx.ModelProto:
    return build(*qop_parts())


# -- editing helpers ------------------------------------------------------------------------

def replace_init(parts, name: str, arr):
    nodes, inits, ins, outs = parts
    inits = [_init(name, arr) if i.name == name else i for i in inits]
    return nodes, inits, ins, outs


def set_attr(parts, node_name: str, **attrs):
    nodes, inits, ins, outs = parts
    out = []
    for n in nodes:
        if n.name == node_name:
            kept = {a.name: helper.get_attribute_value(a) for a in n.attribute}
            kept.update(attrs)
            kept = {k: v for k, v in kept.items() if v is not None}
            n = helper.make_node(n.op_type, list(n.input), list(n.output), name=n.name,
                                 domain=n.domain or None, **kept)
        out.append(n)
    return out, inits, ins, outs


def replace_node(parts, node_name: str, node: onnx.NodeProto):
    nodes, inits, ins, outs = parts
    return [node if n.name == node_name else n for n in nodes], inits, ins, outs


def save(model: onnx.ModelProto) -> Callable[[Path], None]:
    data = model.SerializeToString()
    return lambda p: p.write_bytes(data)


def save_parts(parts, **kw) -> Callable[[Path], None]:
    return save(build(*parts, **kw))


def write_bytes(data: bytes) -> Callable[[Path], None]:
    return lambda p: p.write_bytes(data)


# -- the cases ---------------------------------------------------------------------------------

def _truncated(fraction: float) -> Callable[[Path], None]:
    data = qdq_model().SerializeToString()
    return write_bytes(data[: int(len(data) * fraction)])


def _float_model() -> onnx.ModelProto:
    rng = np.random.default_rng(1)
    w = rng.normal(0, 0.3, (4, 2, 3, 3)).astype(np.float32)
    nodes = [helper.make_node("Conv", ["x", "w"], ["c"], name="float_conv", pads=[1, 1, 1, 1]),
             helper.make_node("Relu", ["c"], ["y"], name="float_relu")]
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 2, 6, 6])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4, 6, 6])
    return build(nodes, [_init("w", w)], [x], [y])


def _symbolic_model() -> onnx.ModelProto:
    nodes, inits, _, outs = qdq_parts()
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", 2, 6, 6])
    return build(nodes, inits, [x], outs)


def _unsupported_op() -> onnx.ModelProto:
    nodes, inits, ins, outs = qdq_parts()
    # Hardmax: not per-element (so no table either) and not an op tinygen lowers
    nodes = [helper.make_node("Hardmax", ["rd"], ["p"], name="hardmax1") if n.name == "pool1"
             else n for n in nodes]
    nodes = [helper.make_node("Flatten", ["p"], ["f"], name="flat1", axis=1)
             if n.name == "flat1" else n for n in nodes]
    return build(nodes, inits, ins, outs)


def _custom_domain() -> onnx.ModelProto:
    parts = qdq_parts()
    node = helper.make_node("Frobnicate", ["rd"], ["p"], name="frob1", domain="com.example")
    m = build(*replace_node(parts, "pool1", node))
    m.opset_import.append(helper.make_opsetid("com.example", 1))
    return m


def _cycle() -> onnx.ModelProto:
    parts = qdq_parts()
    # relu1 reads pool1's output while pool1 (through quant_c) reads relu1's
    node = helper.make_node("Relu", ["p"], ["r"], name="relu1")
    return build(*replace_node(parts, "relu1", node))


def _dangling() -> onnx.ModelProto:
    parts = qdq_parts()
    node = helper.make_node("Relu", ["nowhere"], ["r"], name="relu1")
    return build(*replace_node(parts, "relu1", node))


def _missing_initializer() -> onnx.ModelProto:
    nodes, inits, ins, outs = qdq_parts()
    return build(nodes, [i for i in inits if i.name != "w"], ins, outs)


def _weight_as_input() -> onnx.ModelProto:
    nodes, inits, ins, outs = qdq_parts()
    w = helper.make_tensor_value_info("w", TensorProto.INT8, [4, 2, 3, 3])
    return build(nodes, [i for i in inits if i.name != "w"], ins + [w], outs)


def _conv_channel_mismatch():
    rng = np.random.default_rng(2)
    return replace_init(qdq_parts(), "w", rng.integers(-9, 9, (4, 3, 3, 3)).astype(np.int8))


def _gemm_mismatch():
    rng = np.random.default_rng(2)
    return replace_init(qdq_parts(), "fc_w", rng.integers(-9, 9, (20, 3)).astype(np.int8))


def _reshape_bad() -> onnx.ModelProto:
    nodes, inits, ins, outs = qdq_parts()
    nodes = [helper.make_node("Reshape", ["p", "shape"], ["f"], name="reshape1")
             if n.name == "flat1" else n for n in nodes]
    return build(nodes, inits + [_init("shape", np.array([1, 35], np.int64))], ins, outs)


def _concat_axis() -> onnx.ModelProto:
    nodes, inits, ins, outs = qdq_parts()
    nodes = [helper.make_node("Concat", ["rd", "rd"], ["p"], name="cat1", axis=7)
             if n.name == "pool1" else n for n in nodes]
    nodes = [helper.make_node("Flatten", ["p"], ["f"], name="flat1", axis=1)
             if n.name == "flat1" else n for n in nodes]
    return build(nodes, inits, ins, outs)


def _transpose_perm() -> onnx.ModelProto:
    nodes, inits, ins, outs = qdq_parts()
    nodes = [helper.make_node("Transpose", ["rd"], ["p"], name="tr1", perm=[0, 1, 1, 3])
             if n.name == "pool1" else n for n in nodes]
    return build(nodes, inits, ins, outs)


def _squeeze_axis() -> onnx.ModelProto:
    nodes, inits, ins, outs = qdq_parts()
    nodes = [helper.make_node("Squeeze", ["rd", "sq_axes"], ["p"], name="sq1")
             if n.name == "pool1" else n for n in nodes]
    return build(nodes, inits + [_init("sq_axes", np.array([9], np.int64))], ins, outs)


def _qop_zero_point_type(dtype, value) -> onnx.ModelProto:
    """QOperator output zero point given in a wider integer type than the 8-bit data."""
    return build(*replace_init(qop_parts(), "z_c", np.array(value, dtype)))


def _external_data() -> onnx.ModelProto:
    m = qdq_model()
    for init in m.graph.initializer:
        if init.name == "w":
            init.ClearField("raw_data")
            init.data_location = TensorProto.EXTERNAL
            e = init.external_data.add()
            e.key, e.value = "location", "missing_weights.bin"
    return m


def _huge_activation() -> onnx.ModelProto:
    """A valid graph whose one activation needs 4 GiB (the arena must refuse it)."""
    s, z = _init("s", _f32(0.1)), _init("z", np.int8(0))
    nodes = [helper.make_node("QuantizeLinear", ["x", "s", "z"], ["xq"], name="quant_in"),
             helper.make_node("DequantizeLinear", ["xq", "s", "z"], ["xd"], name="dequant_in"),
             helper.make_node("Sigmoid", ["xd"], ["sg"], name="big_sigmoid"),
             helper.make_node("QuantizeLinear", ["sg", "s", "z"], ["sq"], name="quant_s"),
             helper.make_node("DequantizeLinear", ["sq", "s", "z"], ["y"], name="dequant_y")]
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 1, 65536, 65536])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 1, 65536, 65536])
    return build(nodes, [s, z], [x], [y])


def _overflowing_accumulator() -> onnx.ModelProto:
    """Valid QOperator MatMul whose worst-case int32 sum passes 2^31 - 1 (bias near max)."""
    parts = qop_parts()
    nodes, inits, ins, outs = parts
    b = np.full(3, 2**31 - 1000, np.int32)
    return build(nodes, [(_init("b", b) if i.name == "b" else i) for i in inits], ins, outs)


def _external_data_present(p: Path) -> None:
    """Weights in a file beside the model: onnx would read it relative to the current
    folder, not the model's, so tinygen refuses external data outright."""
    m = qdq_model()
    onnx.save_model(m, p, save_as_external_data=True, all_tensors_to_one_file=True,
                    location=p.stem + ".weights", size_threshold=0)


def _external_data_outside() -> onnx.ModelProto:
    """External data pointing outside the model's folder (must never be read)."""
    m = _external_data()
    for init in m.graph.initializer:
        for e in init.external_data:
            e.value = "../../../../etc/passwd"
    return m


def _duplicate_output() -> onnx.ModelProto:
    parts = qdq_parts()
    nodes, inits, ins, outs = parts
    extra = helper.make_node("Relu", ["c"], ["r"], name="relu_again")
    return build(nodes[:6] + [extra] + nodes[6:], inits, ins, outs)


def _output_not_produced() -> onnx.ModelProto:
    nodes, inits, ins, outs = qdq_parts()
    z = helper.make_tensor_value_info("zz", TensorProto.FLOAT, [1, 3])
    return build(nodes, inits, ins, outs + [z])


def _no_nodes() -> onnx.ModelProto:
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3])
    return build([], [], [x], [x])


def _input_type(elem_type) -> onnx.ModelProto:
    nodes, inits, _, outs = qdq_parts()
    return build(nodes, inits, [helper.make_tensor_value_info("x", elem_type, [1, 2, 6, 6])],
                 outs)


def _zero_dim() -> onnx.ModelProto:
    nodes, inits, _, outs = qdq_parts()
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 2, 0, 6])
    return build(nodes, inits, [x], outs)


def _conv3d() -> onnx.ModelProto:
    rng = np.random.default_rng(4)
    nodes, inits, _, _ = qdq_parts()
    inits = [(_init("w", rng.integers(-9, 9, (4, 2, 3, 3, 3)).astype(np.int8))
              if i.name == "w" else i) for i in inits]
    nodes = nodes[:5] + [helper.make_node("QuantizeLinear", ["c", "s_c", "z_c"], ["cq"],
                                          name="quant_c3"),
                         helper.make_node("DequantizeLinear", ["cq", "s_c", "z_c"], ["y"],
                                          name="dequant_c3")]
    nodes[4] = helper.make_node("Conv", ["xd", "wd", "bd"], ["c"], name="conv3d",
                                pads=[1] * 6)
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 2, 4, 4, 4])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4, 4, 4, 4])
    return build(nodes, inits, [x], [y])


def _huge_pad_op() -> onnx.ModelProto:
    nodes, inits, ins, outs = qdq_parts()
    nodes = [helper.make_node("Pad", ["rd", "pad_amounts"], ["p"], name="pad1")
             if n.name == "pool1" else n for n in nodes]
    pads = np.array([0, 0, 0, 0, 0, 0, 1_000_000, 0], np.int64)
    return build(nodes, inits + [_init("pad_amounts", pads)], ins, outs)


def cases() -> list[Case]:
    """Every bad input, in a fixed order."""
    qdq = qdq_parts
    big = [Case(f"truncated_{int(f * 100):02d}", _truncated(f), "", suffix=".onnx")
           for f in (0.1, 0.5, 0.9, 0.99)]
    return big + [
        Case("empty_file", write_bytes(b""), "not an ONNX model"),
        Case("text_file", write_bytes(b"just some text, not a model\n"), "not an ONNX model"),
        Case("random_bytes", write_bytes(np.random.default_rng(3).integers(
            0, 256, 700, dtype=np.uint8).tobytes()), "not an ONNX model"),
        Case("npz_file", _write_npz, "not an ONNX model", suffix=".npz"),
        Case("missing_file", lambda p: None, "cannot read the model"),
        Case("directory", lambda p: p.mkdir(), "cannot read the model"),
        Case("float_model", save(_float_model()), "not fully quantized", node="float_conv",
             op="Conv"),
        Case("symbolic_dim", save(_symbolic_model()), "symbolic dimension 'batch'"),
        Case("input_shape_unknown_name", save(_symbolic_model()), "not a graph input",
             args=["--input-shape", "nope=1x2x6x6"]),
        Case("input_shape_wrong_rank", save(_symbolic_model()), "rank 2",
             args=["--input-shape", "x=1x2"]),
        Case("input_shape_bad_syntax", save(_symbolic_model()), "--input-shape",
             args=["--input-shape", "x=1xtwox6x6"]),
        Case("unsupported_op", save(_unsupported_op()), "op Hardmax is not supported",
             node="hardmax1", op="Hardmax"),
        Case("custom_domain", save(_custom_domain()), "domain 'com.example'", node="frob1",
             op="Frobnicate"),
        Case("scale_zero", save_parts(replace_init(qdq(), "s_c", _f32(0.0))),
             "not a finite positive", node="quant_c", op="QuantizeLinear"),
        Case("scale_negative", save_parts(replace_init(qdq(), "s_c", _f32(-0.5))),
             "not a finite positive", node="quant_c", op="QuantizeLinear"),
        Case("scale_nan", save_parts(replace_init(qdq(), "s_y", _f32(np.nan))),
             "not a finite positive", node="quant_y", op="QuantizeLinear"),
        Case("scale_inf", save_parts(replace_init(qdq(), "s_x", _f32(np.inf))),
             "not a finite positive", node="quant_in", op="QuantizeLinear"),
        Case("weight_scale_zero", save_parts(replace_init(
            qdq(), "w_scale", _f32([0.01, 0.0, 0.01, 0.01]))), "not a finite positive",
            node="dq_w", op="DequantizeLinear"),
        Case("weight_scale_float64", save_parts(replace_init(
            qdq(), "fc_w_scale", np.float64(0.02))), "float32 or float16"),
        Case("qop_zero_point_int16", save(_qop_zero_point_type(np.int16, 300)), "zero point",
             node="qconv", op="QLinearConv"),
        Case("qop_zero_point_int32", save(_qop_zero_point_type(np.int32, 7)), "zero point",
             node="qconv", op="QLinearConv"),
        Case("qdq_zero_point_int32_activation", save_parts(replace_init(
            qdq(), "z_c", np.int32(5))), "int32 activations", node="quant_c",
            op="QuantizeLinear"),
        Case("missing_initializer", save(_missing_initializer()), "'w'", node="dq_w",
             op="DequantizeLinear"),
        Case("weight_is_graph_input", save(_weight_as_input()), "only constant weights",
             node="dq_w", op="DequantizeLinear"),
        Case("conv_channels_mismatch", save_parts(_conv_channel_mismatch()), "",
             node="conv1", op="Conv"),
        Case("gemm_inner_mismatch", save_parts(_gemm_mismatch()), "", node="fc1", op="Gemm"),
        Case("reshape_wrong_size", save(_reshape_bad()), "reshape", node="reshape1",
             op="Reshape"),
        Case("concat_axis_out_of_range", save(_concat_axis()), "axis", node="cat1",
             op="Concat"),
        Case("transpose_bad_perm", save(_transpose_perm()), "perm", node="tr1",
             op="Transpose"),
        Case("squeeze_axis_out_of_range", save(_squeeze_axis()), "axes", node="sq1",
             op="Squeeze"),
        Case("conv_stride_zero", save_parts(set_attr(qdq(), "conv1", strides=[0, 1])),
             "strides", node="conv1", op="Conv"),
        Case("conv_dilation_zero", save_parts(set_attr(qdq(), "conv1", dilations=[1, 0])),
             "dilations", node="conv1", op="Conv"),
        Case("conv_negative_pad", save_parts(set_attr(qdq(), "conv1", pads=[1, -3, 1, 1])),
             "pads", node="conv1", op="Conv"),
        Case("conv_huge_pads", save_parts(set_attr(qdq(), "conv1",
                                                   pads=[1, 1, 2**40, 1])),
             "out of range", node="conv1", op="Conv"),
        Case("conv_group_zero", save_parts(set_attr(qdq(), "conv1", group=0)), "group",
             node="conv1", op="Conv"),
        Case("pool_stride_zero", save_parts(set_attr(qdq(), "pool1", strides=[0, 0])),
             "strides", node="pool1", op="MaxPool"),
        Case("pool_kernel_too_big", save_parts(set_attr(qdq(), "pool1",
                                                        kernel_shape=[9, 9])),
             "larger than the padded input", node="pool1", op="MaxPool"),
        Case("external_data_missing", save(_external_data()), "external file"),
        Case("external_data_present", _external_data_present, "external file"),
        Case("flash_limit", save(qdq_model()), "--flash-limit", args=["--flash-limit", "64"]),
        Case("arena_limit", save(qdq_model()), "--arena-limit", args=["--arena-limit", "0x40"]),
        Case("huge_activation", save(_huge_activation()), "bytes"),
        Case("accumulator_overflow", save(_overflowing_accumulator()), "overflow",
             node="qconv", op="QLinearConv"),
        Case("qop_weight_zero_point_int16", save_parts(replace_init(
            qop_parts(), "z_w", np.array([300, 0, 0], np.int16))), "zero point",
            node="qconv", op="QLinearConv"),
        Case("qdq_weight_zero_point_type_mismatch", save_parts(replace_init(
            qdq(), "w_zp", np.zeros(4, np.uint8))), "type", node="dq_w",
            op="DequantizeLinear"),
        Case("multiplier_too_large", save_parts(replace_init(qdq(), "s_c", _f32(1e-38))),
             "multiplier", node="conv1", op="Conv"),
        Case("external_data_outside_folder", save(_external_data_outside()), "external file"),
        Case("duplicate_output_name", save(_duplicate_output()), "'r'"),
        Case("graph_output_not_produced", save(_output_not_produced()), "'zz'"),
        Case("no_nodes", save(_no_nodes()), "no nodes"),
        Case("input_type_int64", save(_input_type(TensorProto.INT64)), "int64"),
        Case("input_zero_dim", save(_zero_dim()), "size 0"),
        Case("conv_3d", save(_conv3d()), "rank 5", node="conv3d", op="Conv"),
        Case("pad_op_huge", save(_huge_pad_op()), "pads", node="pad1", op="Pad"),
        Case("cycle", save(_cycle()), "cycle"),
        Case("dangling_input", save(_dangling()), "'nowhere'", node="relu1", op="Relu"),
        Case("bad_prefix_keyword", save(qdq_model()), "--prefix", args=["--prefix", "static"]),
        Case("bad_prefix_digit", save(qdq_model()), "--prefix", args=["--prefix", "9lives"]),
        Case("bad_size_flag", save(qdq_model()), "size", args=["--arena-limit", "12Q"]),
        *user_input_cases(),
    ]


# -- what the command line and the files beside the model hold ------------------------------

def _npz(**arrays) -> Callable[[Path], None]:
    def make(p: Path) -> None:
        with open(p, "wb") as fh:
            np.savez(fh, **arrays)
    return make


def _npy(arr) -> Callable[[Path], None]:
    def make(p: Path) -> None:
        with open(p, "wb") as fh:
            np.save(fh, arr)
    return make


def _npz_lying_header(p: Path) -> None:
    """An .npz whose 'inputs' header promises 10^12 floats and holds 16 bytes (reading it
    as numpy does would allocate the lot first)."""
    import zipfile
    header = {"descr": "<f4", "fortran_order": False, "shape": (1_000_000, 1, 2, 6, 6)}
    body = io.BytesIO()
    np.lib.format.write_array_header_1_0(body, header)
    with zipfile.ZipFile(p, "w") as z:
        z.writestr("inputs.npy", body.getvalue() + b"\0" * 16)


def _symlink_to(target: str) -> Callable[[Path], None]:
    return lambda p: p.symlink_to(target)


def _fifo(p: Path) -> None:
    os.mkfifo(p)  # nobody writes to it: reads as empty


def _sparse(size: int) -> Callable[[Path], None]:
    def make(p: Path) -> None:
        with open(p, "wb") as fh:
            fh.truncate(size)  # no blocks on disk, stat says `size`
    return make


def _named(node_name: str, tensor_name: str | None = None) -> onnx.ModelProto:
    """The unsupported-op model with a hostile node name (and a dangling tensor name)."""
    nodes, inits, ins, outs = qdq_parts()
    src = tensor_name or "rd"
    nodes = [helper.make_node("Hardmax", [src], ["p"], name=node_name) if n.name == "pool1"
             else n for n in nodes]
    return build(nodes, inits, ins, outs)


def user_input_cases() -> list[Case]:
    """Flags and files that size work or feed data: each refused before it is used."""
    sym = save(_symbolic_model())
    good = save(qdq_model())
    x = np.zeros((2, 1, 2, 6, 6), np.float32)
    check = ("check",)
    inputs = ["--inputs", "{inputs}"]
    return [
        Case("input_shape_huge_dim", sym, "a dimension over",
             args=["--input-shape", "x=1x2x100000000000000000000x6"]),
        Case("input_shape_huge_product", sym, "elements, more than",
             args=["--input-shape", "x=1x2x100000x100000"]),
        Case("input_shape_too_many_dims", sym, "dimensions, more than",
             args=["--input-shape", "x=" + "x".join(["1"] * 9)]),
        Case("input_shape_twice", sym, "given twice",
             args=["--input-shape", "x=1x2x6x6", "--input-shape", "x=1x2x6x6"]),
        Case("input_shape_underscore_digits", sym, "--input-shape",
             args=["--input-shape", "x=1x2x6_0x6"]),
        Case("input_shape_overrides_static_dim", good, "where the model fixes 2",
             args=["--input-shape", "x=1x3x6x6"]),
        Case("samples_huge", good, "1..10000", args=["--samples", "100000000"], verbs=check),
        Case("samples_zero", good, "1..10000", args=["--samples", "0"], verbs=check),
        Case("samples_negative", good, "1..10000", args=["--samples", "-5"], verbs=check),
        Case("inputs_npy", good, ".npy file", args=inputs, verbs=check,
             aux={"inputs": _npy(x)}),
        Case("inputs_not_a_zip", good, "not an .npz", args=inputs, verbs=check,
             aux={"inputs": write_bytes(b"a,b,c\n1,2,3\n")}),
        Case("inputs_folder", good, "folder", args=inputs, verbs=check,
             aux={"inputs": lambda p: p.mkdir()}),
        Case("inputs_missing", good, "cannot read the inputs", args=inputs, verbs=check,
             aux={"inputs": lambda p: None}),
        Case("inputs_no_inputs_array", good, "no array named 'inputs'", args=inputs,
             verbs=check, aux={"inputs": _npz(data=x)}),
        Case("inputs_wrong_shape", good, "shape", args=inputs, verbs=check,
             aux={"inputs": _npz(inputs=np.zeros((2, 3, 6, 6), np.float32))}),
        Case("inputs_complex", good, "complex", args=inputs, verbs=check,
             aux={"inputs": _npz(inputs=x.astype(np.complex64))}),
        Case("inputs_strings", good, "str", args=inputs, verbs=check,
             aux={"inputs": _npz(inputs=np.array(["a", "b"]))}),
        Case("inputs_objects", good, "python objects", args=inputs, verbs=check,
             aux={"inputs": _npz(inputs=np.array([{}, []], dtype=object))}),
        Case("inputs_nan", good, "nan", args=inputs, verbs=check,
             aux={"inputs": _npz(inputs=np.where(np.arange(x.size).reshape(x.shape) == 7,
                                                 np.float32(np.nan), x))}),
        Case("inputs_inf", good, "infinite", args=inputs, verbs=check,
             aux={"inputs": _npz(inputs=np.full_like(x, np.inf))}),
        Case("inputs_beyond_float32", good, "beyond float32", args=inputs, verbs=check,
             aux={"inputs": _npz(inputs=np.full(x.shape, 1e300))}),
        Case("inputs_zero_samples", good, "0 samples", args=inputs, verbs=check,
             aux={"inputs": _npz(inputs=np.zeros((0, 1, 2, 6, 6), np.float32))}),
        Case("inputs_lying_header", good, "cut short", args=inputs, verbs=check,
             aux={"inputs": _npz_lying_header}),
        Case("float_model_dev_zero", good, "more than", verbs=check,
             args=["--float-model", "{float}"], aux={"float": _symlink_to("/dev/zero")}),
        Case("model_dev_zero", _symlink_to("/dev/zero"), "more than"),
        Case("model_fifo_without_writer", _fifo, "not an ONNX model"),
        Case("model_too_large", _sparse(600 * 1024 * 1024), "more than"),
        Case("region_names_differ_in_case", good, "its own name",
             args=["--region", "fast=1K", "--region", "FAST=1K"]),
        Case("control_bytes_in_node_name", save(_named("\x1b]0;owned\x07\x1b[2J" + "n" * 10_000)),
             "not supported", op="Hardmax"),
        Case("control_bytes_in_tensor_name", save(_named("hm", "\x9b31m\x7f" + "t" * 10_000)),
             "produced by no node", node="hm", op="Hardmax"),
    ]


def _write_npz(p: Path) -> None:
    with open(p, "wb") as fh:
        np.savez(fh, inputs=np.zeros((2, 3), np.float32))


def write_corpus(out_dir: Path) -> list[tuple[Case, Path]]:
    """Write every case's file into out_dir; returns (case, path) pairs."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for case in cases():
        path = out_dir / f"{case.name}{case.suffix}"
        case.make(path)
        for name, make in case.aux.items():
            make(aux_path(case, path, name))
        written.append((case, path))
    return written


if __name__ == "__main__":
    if len(sys.argv) != 2:
        raise SystemExit("usage: make_corpus.py OUTDIR")
    for case, path in write_corpus(Path(sys.argv[1])):
        size = path.stat().st_size if path.is_file() else 0
        print(f"{path.name:40s} {size:7d} B  {' '.join(case.args)}")
