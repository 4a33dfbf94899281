"""The one plain IR every pass reads and writes.

A `Graph` holds tensors by name and an ordered list of `Op`s. After the frontend every
activation tensor is int8 (uint8 tensors are shifted by -128 with their zero point, which is
exact), int32 (biases, raw accumulators) or, at the boundary only, described by the
`IOInfo` of the graph input/output it came from. Shapes are the ONNX logical shapes;
`Tensor.layout` says how a tensor is stored (see `storage_shape`).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

# Storage layouts. "plain": row-major in ONNX axis order. "channels_last": an ONNX
# [N, C, *spatial] tensor stored as [N, *spatial, C].
PLAIN = "plain"
CHANNELS_LAST = "channels_last"


@dataclass
class QuantParams:
    """Real value r = scale * (q - zero_point); per-tensor (axis None) or per-axis."""

    scale: np.ndarray  # float32, shape () or (C,)
    zero_point: np.ndarray  # int32, same shape as scale, int8 domain after the frontend
    axis: int | None = None
    src_dtype: str = "int8"  # the ONNX element type it came from: "int8" or "uint8"

    @property
    def per_axis(self) -> bool:
        return self.axis is not None and self.scale.ndim == 1

    def scalar_scale(self) -> float:
        return float(np.asarray(self.scale).reshape(-1)[0])

    def scalar_zp(self) -> int:
        return int(np.asarray(self.zero_point).reshape(-1)[0])


@dataclass
class Tensor:
    name: str
    shape: tuple[int, ...]
    dtype: str  # "int8", "int32", "float32" (float only before lowering)
    quant: QuantParams | None = None
    data: np.ndarray | None = None  # constant data (flash), else None (activation)
    layout: str = PLAIN

    @property
    def is_const(self) -> bool:
        return self.data is not None

    @property
    def size(self) -> int:
        return int(np.prod(self.shape, dtype=np.int64)) if self.shape else 1

    @property
    def itemsize(self) -> int:
        return {"int8": 1, "uint8": 1, "int32": 4, "float32": 4}[self.dtype]

    @property
    def nbytes(self) -> int:
        return self.size * self.itemsize

    def storage_shape(self) -> tuple[int, ...]:
        return storage_shape(self.shape, self.layout)


def storage_shape(shape: tuple[int, ...], layout: str) -> tuple[int, ...]:
    if layout == CHANNELS_LAST and len(shape) >= 3:
        return (shape[0], *shape[2:], shape[1])
    return tuple(shape)


def storage_perm(rank: int, layout: str) -> tuple[int, ...]:
    """Logical axis stored at each storage position."""
    if layout == CHANNELS_LAST and rank >= 3:
        return (0, *range(2, rank), 1)
    return tuple(range(rank))


@dataclass
class Op:
    kind: str  # lowered kernel kind: conv, dwconv, fc, add, mul, maxpool, avgpool, lut, ...
    inputs: list[str]
    outputs: list[str]
    attrs: dict[str, Any] = field(default_factory=dict)
    name: str = ""  # ONNX node name it came from (for messages and comments)
    onnx_op: str = ""  # ONNX op type it came from


@dataclass
class IOInfo:
    """How a graph input/output meets the caller: its ONNX name/dtype and quantization."""

    name: str  # tensor name in the IR
    onnx_name: str
    onnx_dtype: str  # "float32" (boundary Q/DQ), "int8", "uint8", "int32"
    buffer_dtype: str  # C buffer element type: "int8", "uint8" or "int32"
    quant: QuantParams | None


@dataclass
class Graph:
    name: str
    tensors: dict[str, Tensor]
    ops: list[Op]
    inputs: list[IOInfo]
    outputs: list[IOInfo]
    source_path: str = ""
    source_sha256: str = ""

    def producer(self, tensor: str) -> Op | None:
        for op in self.ops:
            if tensor in op.outputs:
                return op
        return None

    def consumers(self, tensor: str) -> list[Op]:
        return [op for op in self.ops if tensor in op.inputs]

    def is_graph_output(self, tensor: str) -> bool:
        return any(io.name == tensor for io in self.outputs)

    def is_graph_input(self, tensor: str) -> bool:
        return any(io.name == tensor for io in self.inputs)
