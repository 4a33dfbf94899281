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

    def model(self, out: str, opset: int = 17) -> onnx.ModelProto:
        inp = helper.make_tensor_value_info("input", TensorProto.FLOAT, self.input_shape)
        outp = helper.make_tensor_value_info(out, TensorProto.FLOAT, None)
        g = helper.make_graph(self.nodes, self.name, [inp], [outp], self.inits)
        m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
        m.ir_version = 8
        return onnx.shape_inference.infer_shapes(m)


def quantize(model: onnx.ModelProto, out_path: Path, fmt: str = "qdq",
             activations: str = "uint8", weights: str = "int8", per_channel: bool = True,
             samples: int = 16, seed: int = 0, extra: dict | None = None) -> Path:
    """quantize_static the float model into out_path; calibration data is random normal."""
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
                        per_channel=per_channel, extra_options=extra or {})
    return out_path
