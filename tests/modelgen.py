"""Small quantized ONNX models for tests, made by onnxruntime's own static quantizer.

Float graphs are written with onnx.helper (random weights from a seeded generator), then
quantized with onnxruntime.quantization.quantize_static in QDQ or QOperator form, so the
tests see exactly what a user's toolchain produces.
"""
from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper


class Net:
    """A tiny float graph builder: each method appends a node and returns its output name."""

    def __init__(self, input_shape, seed: int = 0, name: str = "net"):
        self.rng = np.random.default_rng(seed)
        self.nodes, self.inits = [], []
        self.input_shape = tuple(input_shape)
        self.name = name
        self._n = 0

    def _name(self, base: str) -> str:
        self._n += 1
        return f"{base}{self._n}"

    def const(self, arr, base="c") -> str:
        n = self._name(base)
        self.inits.append(numpy_helper.from_array(np.asarray(arr), n))
        return n

    def op(self, op_type, inputs, **attrs) -> str:
        out = self._name(op_type.lower())
        self.nodes.append(helper.make_node(op_type, inputs, [out], name=out + "_node", **attrs))
        return out

    def conv(self, x, cin, cout, k, group=1, bias=True, **attrs) -> str:
        ks = (k,) if isinstance(k, int) and len(self.input_shape) == 3 else \
            ((k, k) if isinstance(k, int) else tuple(k))
        w = self.rng.normal(0, 1.0 / np.sqrt(cin // group * np.prod(ks)),
                            (cout, cin // group, *ks)).astype(np.float32)
        ins = [x, self.const(w, "w")]
        if bias:
            ins.append(self.const(self.rng.normal(0, 0.1, cout).astype(np.float32), "b"))
        return self.op("Conv", ins, group=group, **attrs)

    def gemm(self, x, k, n, trans_b=1) -> str:
        w = self.rng.normal(0, 1 / np.sqrt(k), (n, k) if trans_b else (k, n)).astype(np.float32)
        b = self.rng.normal(0, 0.1, n).astype(np.float32)
        return self.op("Gemm", [x, self.const(w, "w"), self.const(b, "b")], transB=trans_b)

    # -- layers as torch's dynamo exporter writes them (torch.onnx.export(..., dynamo=True),
    # torch 2.13: opset 20 by default, 18 when an older one is asked for) ------------------
    def linear(self, x, k, n, bias=True) -> str:
        """nn.Linear on a [B, K] input: Gemm with the [N, K] weight and transB=1."""
        w = self.rng.normal(0, 1 / np.sqrt(k), (n, k)).astype(np.float32)
        ins = [x, self.const(w, "w")]
        if bias:
            ins.append(self.const(self.rng.normal(0, 0.1, n).astype(np.float32), "b"))
        return self.op("Gemm", ins, alpha=1.0, beta=1.0, transA=0, transB=1)

    def linear_matmul(self, x, k, n) -> str:
        """nn.Linear on a [B, T, K] input: MatMul with the [K, N] weight, then Add bias."""
        w = self.rng.normal(0, 1 / np.sqrt(k), (k, n)).astype(np.float32)
        y = self.op("MatMul", [x, self.const(w, "w")])
        return self.op("Add", [y, self.const(self.rng.normal(0, 0.1, n).astype(np.float32),
                                                "b")])

    def reduce_mean(self, x, axes, keepdims) -> str:
        """x.mean(dims) / AdaptiveAvgPool2d(1): ReduceMean with the axes as an int64 input."""
        return self.op("ReduceMean", [x, self.const(np.array(axes, np.int64), "axes")],
                       keepdims=int(keepdims), noop_with_empty_axes=0)

    def reshape(self, x, shape) -> str:
        """flatten / view / reshape: Reshape with a constant shape and allowzero=1."""
        return self.op("Reshape", [x, self.const(np.array(shape, np.int64), "shape")],
                       allowzero=1)

    def scalar(self, value) -> str:
        return self.const(np.array(value, np.float32), "k")

    def gelu(self, x, opset: int, approximate: str = "none") -> str:
        """nn.GELU: one Gelu node from opset 20; before it the formula, erf or tanh form, with
        the exporter's constants and operand order."""
        if opset >= 20:
            return self.op("Gelu", [x], approximate=approximate)
        if approximate == "tanh":  # 0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3)))
            cube = self.op("Mul", [self.scalar(0.044715), self.op("Pow", [x, self.scalar(3.0)])])
            inner = self.op("Mul", [self.scalar(0.7978845608), self.op("Add", [x, cube])])
            half = self.op("Mul", [self.scalar(0.5), self.op("Add", [self.op("Tanh", [inner]),
                                                                     self.scalar(1.0)])])
            return self.op("Mul", [x, half])
        erf = self.op("Erf", [self.op("Div", [x, self.scalar(1.4142135381698608)])])
        half = self.op("Mul", [self.scalar(0.5), self.op("Add", [erf, self.scalar(1.0)])])
        return self.op("Mul", [x, half])

    def silu(self, x) -> str:
        """nn.SiLU: Sigmoid, then Mul with its own input."""
        return self.op("Mul", [x, self.op("Sigmoid", [x])])

    def softplus(self, x, beta: float = 1.0, threshold: float = 20.0) -> str:
        """nn.Softplus: Softplus of beta*x over beta, and x itself above the threshold."""
        bx = x if beta == 1.0 else self.op("Mul", [x, self.scalar(beta)])
        sp = self.op("Softplus", [bx])
        if beta != 1.0:
            sp = self.op("Div", [sp, self.scalar(beta)])
        above = self.op("Greater", [bx, self.scalar(threshold)])
        return self.op("Where", [above, x, sp])

    def model(self, out: str, opset: int = 17) -> onnx.ModelProto:
        inp = helper.make_tensor_value_info("input", TensorProto.FLOAT, self.input_shape)
        outp = helper.make_tensor_value_info(out, TensorProto.FLOAT, None)
        g = helper.make_graph(self.nodes, self.name, [inp], [outp], self.inits)
        m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
        m.ir_version = 8 if opset <= 17 else 10  # what torch's exporter writes from 18 on
        return onnx.shape_inference.infer_shapes(m)


def quantize(model: onnx.ModelProto, out_path: Path, fmt: str = "qdq",
             activations: str = "uint8", weights: str = "int8", per_channel: bool = True,
             samples: int = 16, seed: int = 0, extra: dict | None = None,
             op_types: list[str] | None = None) -> Path:
    """quantize_static the float model into out_path; calibration data is random normal.

    op_types: quantize only these op types (onnxruntime's op_types_to_quantize); the others
    stay float between DequantizeLinear and QuantizeLinear."""
    from onnxruntime.quantization import (
        CalibrationDataReader,
        QuantFormat,
        QuantType,
        quantize_static,
    )

    shape = [d.dim_value for d in model.graph.input[0].type.tensor_type.shape.dim]
    rng = np.random.default_rng(seed)

    class Reader(CalibrationDataReader):
        def __init__(self):
            self.data = iter([{"input": rng.normal(0, 1, shape).astype(np.float32)}
                              for _ in range(samples)])

        def get_next(self):
            return next(self.data, None)

    qt = {"uint8": QuantType.QUInt8, "int8": QuantType.QInt8}
    with tempfile.TemporaryDirectory() as tmp:
        fp = Path(tmp) / "float.onnx"
        onnx.save(model, fp)
        quantize_static(str(fp), str(out_path), Reader(),
                        quant_format=QuantFormat.QDQ if fmt == "qdq" else QuantFormat.QOperator,
                        activation_type=qt[activations], weight_type=qt[weights],
                        per_channel=per_channel, extra_options=extra or {},
                        op_types_to_quantize=op_types)
    return out_path
