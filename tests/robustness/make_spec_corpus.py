"""Write the corpus of models that break one rule of the operator spec each.

    python tests/robustness/make_spec_corpus.py OUTDIR    # writes the files, lists the cases

Each model starts from one of the valid models of make_corpus.py (the QDQ chain and the
QOperator chain, plus a QOperator chain through com.microsoft QLinearAdd made here) and
breaks one quantization parameter, bias, opset or graph declaration. The rule each case
breaks is named beside it with its source:
  [onnx]  the ONNX operator schemas in the onnx package (onnx.defs), at the model's opset
  [ort]   onnxruntime's contrib operator documentation (docs/ContribOperators.md)
  [ir]    the ONNX IR spec (docs/IR.md of the onnx repository)
tests/robustness/test_spec.py runs every case and the valid models of `valid_models()`.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper

sys.path.insert(0, str(Path(__file__).resolve().parent))
from make_corpus import (  # noqa: E402
    OPSET,
    Case,
    _f32,
    _init,
    build,
    qdq_parts,
    qop_parts,
    replace_init,
    replace_node,
    save,
    save_parts,
)

# -- more valid models ------------------------------------------------------------------

def contrib_parts():
    """x -Q-> QLinearConv -> com.microsoft QLinearAdd (c + c) -> Flatten -> QLinearMatMul."""
    nodes, inits, ins, outs = qop_parts()
    inits = inits + [_init("s_a", _f32(0.1)), _init("z_a", np.uint8(110))]
    add = helper.make_node("QLinearAdd", ["c", "s_c", "z_c", "c", "s_c", "z_c", "s_a", "z_a"],
                           ["a"], name="qadd", domain="com.microsoft")
    flat = helper.make_node("Flatten", ["a"], ["f"], name="flat", axis=1)
    mm = helper.make_node("QLinearMatMul", ["f", "s_a", "z_a", "m", "s_m", "z_m", "s_y",
                                            "z_y"], ["yq"], name="qmatmul")
    nodes = nodes[:2] + [add, flat, mm] + nodes[4:]
    return nodes, inits, ins, outs


def contrib_model(version: int = 1, parts=None) -> onnx.ModelProto:
    m = build(*(parts or contrib_parts()))
    m.opset_import.append(helper.make_opsetid("com.microsoft", version))
    return m


def qgemm_parts():
    """The QOperator chain with com.microsoft QGemm (int32 bias C) in place of the MatMul."""
    nodes, inits, ins, outs = qop_parts()
    rng = np.random.default_rng(8)
    inits = inits + [_init("c_bias", rng.integers(-400, 400, 5).astype(np.int32))]
    gemm = helper.make_node("QGemm", ["f", "s_c", "z_c", "m", "s_m", "z_m", "c_bias", "s_y",
                                      "z_y"], ["yq"], name="qgemm", domain="com.microsoft")
    return replace_node((nodes, inits, ins, outs), "qmatmul", gemm)


def conv_integer_parts():
    """uint8 x -> ConvInteger (per-channel weight zero points) -> int32 y."""
    rng = np.random.default_rng(9)
    inits = [_init("w", rng.integers(-60, 60, (3, 2, 3, 3)).astype(np.int8)),
             _init("z_x", np.uint8(120)), _init("z_w", np.array([1, -2, 0], np.int8))]
    nodes = [helper.make_node("ConvInteger", ["x", "w", "z_x", "z_w"], ["y"], name="cint")]
    x = helper.make_tensor_value_info("x", TensorProto.UINT8, [1, 2, 6, 6])
    y = helper.make_tensor_value_info("y", TensorProto.INT32, [1, 3, 4, 4])
    return nodes, inits, [x], [y]


def with_opset(parts, opset: int) -> onnx.ModelProto:
    return build(*parts, opset=opset)


def _inputs_listing_initializers(names, ir_version: int) -> onnx.ModelProto:
    """The QDQ model with some initializers also listed as graph inputs."""
    nodes, inits, ins, outs = qdq_parts()
    listed = [helper.make_tensor_value_info(
        i.name, i.data_type, list(i.dims)) for i in inits if i.name in names]
    m = build(nodes, inits, ins + listed, outs)
    m.ir_version = ir_version
    return m


def _scale_from_constant_node() -> onnx.ModelProto:
    """s_c made by a Constant node instead of an initializer (a constant all the same)."""
    nodes, inits, ins, outs = qdq_parts()
    const = helper.make_node("Constant", [], ["s_c"], name="s_c_const",
                             value=helper.make_tensor("v", TensorProto.FLOAT, [], [0.04]))
    return build([const] + nodes, [i for i in inits if i.name != "s_c"], ins, outs)


def _per_column_2d_scale() -> onnx.ModelProto:
    """QLinearMatMul with b's scale and zero point per column as [1, N] tensors: "N-D ...
    per column for 'b'" [onnx QLinearMatMul-10 doc]."""
    parts = replace_init(qop_parts(), "s_m", _f32([[0.004, 0.005, 0.003, 0.006, 0.004]]))
    return build(*replace_init(parts, "z_m", np.full((1, 5), 128, np.uint8)))


def _matmul_scales_of(dtype):
    """QLinearMatMul with its three scales of `dtype` (values exact in float16)."""
    # s_c (QLinearConv's y_scale, tensor(float) only) at a value float16 holds exactly
    nodes, inits, ins, outs = replace_init(qop_parts(), "s_c", _f32(0.078125))
    inits = inits + [_init("h_c", dtype(0.078125)), _init("h_m", dtype(0.00390625)),
                     _init("h_y", dtype(0.1875))]
    mm = helper.make_node("QLinearMatMul", ["f", "h_c", "z_c", "m", "h_m", "z_m", "h_y", "z_y"],
                          ["yq"], name="qmatmul")
    nodes = [mm if n.name == "qmatmul" else n for n in nodes]
    # the output is dequantized at h_y's value
    nodes = [helper.make_node("DequantizeLinear", ["yq", "s_y16", "z_y"], ["y"],
                              name="dequant_y") if n.name == "dequant_y" else n for n in nodes]
    inits = inits + [_init("s_y16", _f32(0.1875))]
    return nodes, inits, ins, outs


def valid_models() -> dict[str, onnx.ModelProto]:
    """Models every rule must accept: the corpus bases and forms the spec allows."""
    nodes, inits, ins, outs = qdq_parts()
    one_elem = replace_init(replace_init(qdq_parts(), "s_c", _f32([0.04])), "z_c",
                            np.array([-128], np.int8))
    no_zp = [helper.make_node("QuantizeLinear", ["x", "s_x"], ["xq"], name="quant_in"),
             helper.make_node("DequantizeLinear", ["xq", "s_x"], ["xd"], name="dequant_in")]
    default_zp = replace_node(replace_node(qdq_parts(), "quant_in", no_zp[0]), "dequant_in",
                              no_zp[1])
    return {
        "qdq": build(nodes, inits, ins, outs),
        "qop": build(*qop_parts()),
        "contrib_qlinearadd": contrib_model(),
        "qdq_opset13": with_opset(qdq_parts(), 13),
        "qdq_opset_max": with_opset(qdq_parts(), onnx.defs.onnx_opset_version()),
        "qop_opset10": with_opset(qop_parts(), 10),
        # a 1-D scale and zero point of one element: per-tensor [onnx QuantizeLinear-13]
        "qdq_one_element_1d_scale": build(*one_elem),
        # no zero point: "Default is uint8 with zero point of 0" [onnx QuantizeLinear-13]
        "qdq_default_zero_point": build(*default_zp),
        "qdq_scale_from_constant_node": _scale_from_constant_node(),
        # IR 3: every initializer had to be listed as an input, so the listing is no
        # run-time override [ir] (from memory)
        "qdq_ir3_initializers_listed": _inputs_listing_initializers(
            {i.name for i in inits}, 3),
        "qop_per_column_2d_scale": _per_column_2d_scale(),
        # float16 scales where the opset's schema allows them [onnx QLinearMatMul-21]
        "qop_opset21_float16_scales": with_opset(_matmul_scales_of(np.float16), 21),
        "qop_opset21_float32_scales": with_opset(_matmul_scales_of(np.float32), 21),
        "contrib_qgemm": contrib_model(parts=qgemm_parts()),
        # a symbolic output dimension promises nothing about its size
        "output_symbolic_dim": _output_dims(["n", 3]),
        "conv_integer": build(*conv_integer_parts()),
    }


# -- the broken models --------------------------------------------------------------------

def _bias_as_initializer_of_conv(arr) -> onnx.ModelProto:
    """QDQ Conv whose bias input is a plain constant, not DequantizeLinear of int32."""
    nodes, inits, ins, outs = qdq_parts()
    nodes = [n for n in nodes if n.name != "dq_b"]
    nodes = [helper.make_node("Conv", ["xd", "wd", "bf"], ["c"], name="conv1",
                              pads=[1, 1, 1, 1], kernel_shape=[3, 3])
             if n.name == "conv1" else n for n in nodes]
    return build(nodes, inits + [_init("bf", arr)], ins, outs)


def _qdq_bias_of_type(arr, zp) -> onnx.ModelProto:
    return build(*replace_init(replace_init(qdq_parts(), "b", arr), "b_zp", zp))


def _graph_input(parts, name: str, elem_type, dims) -> onnx.ModelProto:
    """`name` turned from an initializer into a graph input (a value fed at run time)."""
    nodes, inits, ins, outs = parts
    vi = helper.make_tensor_value_info(name, elem_type, dims)
    return build(nodes, [i for i in inits if i.name != name], ins + [vi], outs)


def _output_dims(dims) -> onnx.ModelProto:
    nodes, inits, ins, _ = qdq_parts()
    return build(nodes, inits, ins, [helper.make_tensor_value_info("y", TensorProto.FLOAT,
                                                                   dims)])


def _no_outputs() -> onnx.ModelProto:
    nodes, inits, ins, _ = qdq_parts()
    return build(nodes, inits, ins, [])


def _no_inputs() -> onnx.ModelProto:
    nodes, inits, _, outs = qdq_parts()
    return build(nodes, inits + [_init("x", np.zeros((1, 2, 6, 6), np.float32))], [], outs)


def _input_dims(dims) -> onnx.ModelProto:
    nodes, inits, _, outs = qdq_parts()
    return build(nodes, inits, [helper.make_tensor_value_info("x", TensorProto.FLOAT, dims)],
                 outs)


def _quantized_constant(arr) -> onnx.ModelProto:
    """The conv weights as QuantizeLinear of a constant (quantized at compile time)."""
    nodes, inits, ins, outs = qdq_parts()
    q = helper.make_node("QuantizeLinear", ["wf", "w_scale", "w_zp"], ["wq"], name="quant_w",
                         axis=0)
    dq = helper.make_node("DequantizeLinear", ["wq", "w_scale", "w_zp"], ["wd"], name="dq_w",
                          axis=0)
    nodes = [q] + [dq if n.name == "dq_w" else n for n in nodes]
    return build(nodes, inits + [_init("wf", arr)], ins, outs)


def _reshape_shape_overridable() -> onnx.ModelProto:
    """A Reshape whose shape initializer is also a graph input (IR 8)."""
    nodes, inits, ins, outs = qdq_parts()
    nodes = [helper.make_node("Reshape", ["p", "shape"], ["f"], name="reshape1")
             if n.name == "flat1" else n for n in nodes]
    shape = np.array([1, 36], np.int64)
    vi = helper.make_tensor_value_info("shape", TensorProto.INT64, [2])
    return build(nodes, inits + [_init("shape", shape)], ins + [vi], outs)


def _int32_into_add() -> onnx.ModelProto:
    """DequantizeLinear of an int32 constant (allowed by the spec) added to an activation:
    the kernels take int32 only as a bias."""
    nodes, inits, ins, outs = qdq_parts()
    inits = inits + [_init("k", np.full((1, 4, 1, 1), 300, np.int32)), _init("k_s",
                                                                          _f32(0.01))]
    out = []
    for n in nodes:
        if n.name == "pool1":
            out += [helper.make_node("DequantizeLinear", ["k", "k_s"], ["kd"], name="dq_k"),
                    helper.make_node("Add", ["rd", "kd"], ["a"], name="add_k"),
                    helper.make_node("QuantizeLinear", ["a", "s_c", "z_c"], ["aq"],
                                     name="quant_a"),
                    helper.make_node("DequantizeLinear", ["aq", "s_c", "z_c"], ["ad"],
                                     name="dequant_a"),
                    helper.make_node("MaxPool", ["ad"], ["p"], name="pool1",
                                     kernel_shape=[2, 2], strides=[2, 2])]
        else:
            out.append(n)
    return build(out, inits, ins, outs)


def _contrib(name: str, arr) -> onnx.ModelProto:
    return contrib_model(parts=replace_init(contrib_parts(), name, arr))


def cases() -> list[Case]:
    """Every broken model, in a fixed order."""
    qdq, qop = qdq_parts, qop_parts
    w_scale4 = _f32([0.01, 0.02, 0.015, 0.012])
    return [
        # -- bias: QLinearConv B is tensor(int32) [onnx QLinearConv-10]; a QDQ bias is
        # DequantizeLinear of int32 (T includes int32; "In the case of dequantizing int32,
        # there's no zero point (zero point is supposed to be 0)" [onnx DequantizeLinear])
        Case("qop_bias_int64_past_int32", save_parts(replace_init(
            qop(), "b", np.array([2**32 + 5, 7, -3], np.int64))), "'b' has type int64",
            node="qconv", op="QLinearConv"),
        Case("qop_bias_float_with_fraction", save_parts(replace_init(
            qop(), "b", _f32([1.5, -2.25, 3.75]))), "'b' has type float32",
            node="qconv", op="QLinearConv"),
        Case("qop_bias_int8", save_parts(replace_init(
            qop(), "b", np.array([5, -7, 9], np.int8))), "'b' has type int8",
            node="qconv", op="QLinearConv"),
        Case("qop_bias_wrong_length", save_parts(replace_init(
            qop(), "b", np.array([5, -7], np.int32))), "length 2; expected 3",
            node="qconv", op="QLinearConv"),
        Case("qop_bias_2d", save_parts(replace_init(
            qop(), "b", np.array([[5, -7, 1]], np.int32))), "shape [1, 3]",
            node="qconv", op="QLinearConv"),
        Case("qdq_bias_int64", save(_qdq_bias_of_type(
            np.array([2**32 + 5, 1, 2, 3], np.int64), np.zeros(4, np.int64))),
            "'b' (DequantizeLinear 'dq_b') has type int64", node="conv1", op="Conv"),
        Case("qdq_bias_int8", save(_qdq_bias_of_type(
            np.array([5, 1, 2, 3], np.int8), np.zeros(4, np.int8))),
            "'b' (DequantizeLinear 'dq_b') has type int8", node="conv1", op="Conv"),
        Case("qdq_bias_float_constant", save(_bias_as_initializer_of_conv(
            _f32([0.5, -1.25, 2.0, 0.1]))), "'bf' is a float32 constant; int32 required",
            node="conv1", op="Conv"),
        Case("qdq_bias_int32_nonzero_zero_point", save(_qdq_bias_of_type(
            np.array([5, 1, 2, 3], np.int32), np.array([0, 3, 0, 0], np.int32))),
            "requires 0", node="dq_b", op="DequantizeLinear"),
        # -- scales: tensor(float) [onnx QuantizeLinear-13, QLinearConv-10]; float16 only
        # where the opset's schema allows it; a scalar or 1-D tensor
        Case("qdq_scale_float16", save_parts(replace_init(
            qdq(), "s_c", np.float16(0.04))), "'s_c' has type float16", node="quant_c",
            op="QuantizeLinear"),
        Case("qdq_scale_float64", save_parts(replace_init(
            qdq(), "s_y", np.float64(0.1))), "'s_y' has type float64", node="quant_y",
            op="QuantizeLinear"),
        Case("qop_scale_float16", save_parts(replace_init(
            qop(), "s_m", np.float16(0.004))), "'s_m' has type float16", node="qmatmul",
            op="QLinearMatMul"),
        # QLinearMatMul-21: a_scale, b_scale and y_scale are all of type TS [onnx]
        Case("qop_opset21_scales_of_two_types", save(with_opset(replace_init(
            qop(), "s_m", np.float16(0.004)), 21)),
            "scales 's_c' (float32) and 's_m' (float16) must have one type", node="qmatmul",
            op="QLinearMatMul"),
        Case("qdq_scale_2d", save_parts(replace_init(
            qdq(), "s_c", _f32([[0.04]]))), "'s_c' has shape [1, 1]", node="quant_c",
            op="QuantizeLinear"),
        Case("qdq_weight_scale_2d", save_parts(replace_init(
            qdq(), "w_scale", w_scale4.reshape(2, 2))), "'w_scale' has shape [2, 2]",
            node="dq_w", op="DequantizeLinear"),
        Case("qdq_weight_scale_wrong_length", save_parts(replace_init(replace_init(
            qdq(), "w_scale", w_scale4[:3]), "w_zp", np.zeros(3, np.int8))),
            "'w_scale' has length 3; expected 4", node="dq_w", op="DequantizeLinear"),
        Case("qop_weight_scale_wrong_length", save_parts(replace_init(
            qop(), "s_w", _f32([0.01, 0.02]))), "'s_w' has length 2; expected 3",
            node="qconv", op="QLinearConv"),
        Case("qop_input_scale_per_axis", save_parts(replace_init(
            qop(), "s_c", _f32([0.08, 0.08]))), "'s_c' has length 2; expected 1",
            node="qconv", op="QLinearConv"),
        Case("qop_matmul_scale_wrong_length", save_parts(replace_init(
            qop(), "s_m", _f32([0.004] * 4))), "'s_m' has length 4; expected 5",
            node="qmatmul", op="QLinearMatMul"),
        Case("qdq_per_axis_before_opset13", save(with_opset(_without_axis(qdq()), 12)),
             "opset 13", node="dq_w", op="DequantizeLinear"),
        Case("qdq_axis_out_of_range", save_parts(_set_axis(qdq(), "dq_w", 4)),
             "axis 4 is out of range", node="dq_w", op="DequantizeLinear"),
        # -- zero points: int8/uint8, the data's type, per tensor or per channel
        Case("qdq_output_zero_point_two_values", save_parts(replace_init(
            qdq(), "z_y", np.array([3, 20], np.int8))), "'z_y' has length 2; expected 1",
            node="quant_y", op="QuantizeLinear"),
        Case("qop_output_zero_point_two_values", save_parts(replace_init(
            qop(), "z_y", np.array([128, 20], np.uint8))), "'z_y' has length 2; expected 1",
            node="qmatmul", op="QLinearMatMul"),
        Case("qop_zero_point_128_128", save_parts(replace_init(
            qop(), "z_x", np.array([128, 128], np.uint8))), "'z_x' has length 2; expected 1",
            node="quant_in", op="QuantizeLinear"),
        Case("qdq_weight_zero_point_wrong_length", save_parts(replace_init(
            qdq(), "w_zp", np.zeros(3, np.int8))), "'w_zp' has length 3; expected 4",
            node="dq_w", op="DequantizeLinear"),
        Case("qop_weight_zero_point_wrong_length", save_parts(replace_init(
            qop(), "z_w", np.zeros(2, np.int8))), "'z_w' has length 2; expected 3",
            node="qconv", op="QLinearConv"),
        Case("qop_weight_zero_point_type_differs", save_parts(replace_init(
            qop(), "z_w", np.zeros(3, np.uint8))), "'z_w' has type uint8, its data 'w' int8",
            node="qconv", op="QLinearConv"),
        Case("qdq_zero_point_2d", save_parts(replace_init(
            qdq(), "z_c", np.full((1, 1), -128, np.int8))),
            "'z_c' has shape [1, 1]", node="quant_c", op="QuantizeLinear"),
        # -- constants: scales, zero points, weights and biases are compiled into flash
        Case("qdq_scale_graph_input", save(_graph_input(qdq(), "s_c", TensorProto.FLOAT, [])),
             "'s_c' must be a constant", node="quant_c", op="QuantizeLinear"),
        Case("qdq_zero_point_graph_input", save(_graph_input(
            qdq(), "z_y", TensorProto.INT8, [])), "'z_y' must be a constant",
            node="quant_y", op="QuantizeLinear"),
        Case("qop_bias_graph_input", save(_graph_input(qop(), "b", TensorProto.INT32, [3])),
             "'b' must be a constant", node="qconv", op="QLinearConv"),
        Case("qop_weight_graph_input", save(_graph_input(
            qop(), "w", TensorProto.INT8, [3, 2, 3, 3])), "'w' must be a constant",
            node="qconv", op="QLinearConv"),
        # an initializer that is also a graph input is a default a caller may replace [ir]
        Case("qdq_scale_also_graph_input", save(_inputs_listing_initializers({"s_c"}, 8)),
             "'s_c' must be a constant: it is also a graph input", node="quant_c",
             op="QuantizeLinear"),
        Case("qop_weight_scale_also_graph_input", save(_qop_listing({"s_w"})),
             "'s_w' must be a constant: it is also a graph input", node="qconv",
             op="QLinearConv"),
        Case("reshape_shape_also_graph_input", save(_reshape_shape_overridable()),
             "'shape' must be a constant: it is also a graph input", node="reshape1",
             op="Reshape"),
        # -- opsets: the default domain 10..the installed onnx's newest; com.microsoft 1
        Case("opset_99", save(with_opset(qdq(), 99)), "opset 99 is outside"),
        Case("opset_9", save(with_opset(qdq(), 9)), "opset 9 is outside"),
        Case("contrib_version_2", save(contrib_model(version=2)),
             "opset 2 of domain 'com.microsoft'"),
        Case("contrib_scale_two_values", save(_contrib("s_a", _f32([0.1, 0.1]))),
             "'s_a' has length 2; expected 1", node="qadd", op="QLinearAdd"),
        Case("contrib_zero_point_int16", save(_contrib("z_a", np.int16(110))),
             "'z_a' has type int16", node="qadd", op="QLinearAdd"),
        # QGemm's C: "Its type is int32_t and must be quantized with zero_point = 0" [ort]
        Case("contrib_qgemm_bias_int64", save(contrib_model(parts=replace_init(
            qgemm_parts(), "c_bias", np.array([2**31, 1, 2, 3, 4], np.int64)))),
            "'c_bias' has type int64; QGemm requires int32", node="qgemm", op="QGemm"),
        Case("contrib_qgemm_bias_float", save(contrib_model(parts=replace_init(
            qgemm_parts(), "c_bias", _f32([0.5, 1, 2, 3, 4])))),
            "'c_bias' has type float32", node="qgemm", op="QGemm"),
        # ConvInteger's w_zero_point: a scalar or one per output channel [onnx ConvInteger-10]
        Case("conv_integer_zero_point_wrong_length", save_parts(replace_init(
            conv_integer_parts(), "z_w", np.zeros(2, np.int8))),
            "'z_w' has length 2; expected 3", node="cint", op="ConvInteger"),
        Case("conv_integer_input_zero_point_per_axis", save_parts(replace_init(
            conv_integer_parts(), "z_x", np.full(2, 120, np.uint8))),
            "'z_x' has length 2; expected 1", node="cint", op="ConvInteger"),
        # -- the graph's declarations
        Case("no_outputs", save(_no_outputs()), "no outputs"),
        Case("no_inputs", save(_no_inputs()), "no inputs"),
        Case("output_negative_dim", save(_output_dims([1, -3])),
             "'y' declares dimension -3 at axis 1"),
        Case("output_zero_dim", save(_output_dims([0, 3])), "'y' declares dimension 0"),
        Case("output_shape_differs", save(_output_dims([1, 4])),
             "'y' is declared with shape [1, 4]; the graph computes [1, 3]"),
        Case("output_rank_differs", save(_output_dims([1, 3, 1])),
             "'y' is declared with shape [1, 3, 1]; the graph computes [1, 3]"),
        Case("input_negative_dim", save(_input_dims([1, -2, 6, 6])), "dimension -2 at axis 1"),
        Case("input_string_dim", save(_input_dims([1, 2, "height", 6])),
             "symbolic dimension 'height'"),
        # -- element types the C does not have are never converted silently
        Case("quantize_float64_constant", save(_quantized_constant(
            np.full((4, 2, 3, 3), 0.01, np.float64))), "'wf' quantized here has type float64",
            node="quant_w", op="QuantizeLinear"),
        Case("quantize_int32_constant", save(_quantized_constant(
            np.ones((4, 2, 3, 3), np.int32))), "'wf' quantized here has type int32",
            node="quant_w", op="QuantizeLinear"),
        Case("dequantized_int32_into_add", save(_int32_into_add()),
             "'kd' is DequantizeLinear of int32", node="add_k", op="Add"),
        Case("dequantize_int16_weights", save_parts(replace_init(replace_init(
            qdq(), "w", np.ones((4, 2, 3, 3), np.int16)), "w_zp", np.zeros(4, np.int16))),
            "'w' has type int16; int8, uint8 or int32 required", node="dq_w",
            op="DequantizeLinear"),
    ]


def _set_axis(parts, node_name: str, axis: int):
    nodes, inits, ins, outs = parts
    out = []
    for n in nodes:
        if n.name == node_name:
            n = helper.make_node(n.op_type, list(n.input), list(n.output), name=n.name,
                                 axis=axis)
        out.append(n)
    return out, inits, ins, outs


def _without_axis(parts):
    """Q/DQ nodes without an axis attribute (opset 10..12 have none)."""
    nodes, inits, ins, outs = parts
    nodes = [helper.make_node(n.op_type, list(n.input), list(n.output), name=n.name)
             if n.op_type in ("QuantizeLinear", "DequantizeLinear") else n for n in nodes]
    return nodes, inits, ins, outs


def _qop_listing(names) -> onnx.ModelProto:
    nodes, inits, ins, outs = qop_parts()
    listed = [helper.make_tensor_value_info(i.name, i.data_type, list(i.dims))
              for i in inits if i.name in names]
    return build(nodes, inits, ins + listed, outs)


def write_corpus(out_dir: Path) -> list[tuple[Case, Path]]:
    """Write every case's file into out_dir; returns (case, path) pairs."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for case in cases():
        path = out_dir / f"{case.name}{case.suffix}"
        case.make(path)
        written.append((case, path))
    return written


__all__ = ["OPSET", "cases", "valid_models", "write_corpus"]

if __name__ == "__main__":
    if len(sys.argv) != 2:
        raise SystemExit("usage: make_spec_corpus.py OUTDIR")
    for case, path in write_corpus(Path(sys.argv[1])):
        print(f"{path.name:45s} {path.stat().st_size:7d} B  {case.reason}")
