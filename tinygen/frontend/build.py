"""Builders shared by the QDQ and QOperator lowerings: make IR tensors and ops.

Everything a builder creates is in the int8 domain: uint8 data and zero points are shifted
by -128 here (exact: scale * (q - z) is unchanged). Shapes are ONNX logical shapes.
"""
from __future__ import annotations

import numpy as np

from tinygen.errors import TinygenError
from tinygen.frontend.spec import checked_cast
from tinygen.ir import Graph, IOInfo, Op, QuantParams, Tensor

INT8_MIN, INT8_MAX = -128, 127


def to_int8_domain(data: np.ndarray | None, zero_point: np.ndarray, src_dtype) -> tuple:
    """Map uint8 data/zero point to the equivalent int8 ones; int8 passes unchanged."""
    zp = np.asarray(zero_point).astype(np.int64)  # range-checked by Builder.quant
    if np.dtype(src_dtype) == np.uint8:
        zp = zp - 128
        if data is not None:
            if np.asarray(data).dtype != np.uint8:  # callers pass data of src_dtype
                raise ValueError(f"uint8 data expected, not {np.asarray(data).dtype}")
            data = (np.asarray(data, dtype=np.int16) - 128).astype(np.int8)
    elif data is not None:
        if np.asarray(data).dtype != np.int8:  # callers pass data of src_dtype (const_int8)
            raise ValueError(f"int8 data expected, not {np.asarray(data).dtype}")
        data = np.asarray(data)
    return data, zp.astype(np.int32)


class Builder:
    """Accumulates IR tensors and ops with unique names, plus user-facing error context."""

    def __init__(self, path: str, name: str):
        self.path = path
        self.graph = Graph(name=name, tensors={}, ops=[], inputs=[], outputs=[])
        self._counter = 0
        self.node_name = ""
        self.node_op = ""

    # -- errors -----------------------------------------------------------------------
    def error(self, reason: str) -> TinygenError:
        return TinygenError(reason, file=self.path, node=self.node_name, op=self.node_op)

    def at(self, node_name: str, op: str) -> None:
        self.node_name, self.node_op = node_name, op

    # -- tensors ----------------------------------------------------------------------
    def fresh(self, base: str) -> str:
        """A tensor name not used yet. Never contains '@': the passes name the tensors they
        derive `name@suffix`, so an ONNX name can never collide with one of those."""
        base = base.replace("@", "%40")
        name = base
        while name in self.graph.tensors:
            self._counter += 1
            name = f"{base}#{self._counter}"
        return name

    def add_tensor(self, base: str, shape, dtype: str, quant: QuantParams | None,
                   data: np.ndarray | None = None) -> Tensor:
        t = Tensor(self.fresh(base), tuple(int(d) for d in shape), dtype, quant, data)
        self.graph.tensors[t.name] = t
        return t

    def quant(self, scale, zero_point, src_dtype, axis: int | None = None) -> QuantParams:
        if np.asarray(scale).dtype not in (np.float32, np.float16):
            raise self.error(f"scale of type {np.asarray(scale).dtype} is not supported "
                             "(float32 or float16)")
        scale = np.asarray(scale).astype(np.float32)  # float16 -> float32 is exact
        zp = np.asarray(zero_point if zero_point is not None else 0)
        if zp.dtype.kind not in "iu":
            raise self.error(f"zero point has dtype {zp.dtype}, expected an integer type")
        if np.dtype(src_dtype) not in (np.int8, np.uint8):
            raise self.error(f"zero point of type {np.dtype(src_dtype).name} is not supported "
                             "(int8 or uint8 quantization only)")
        lo, hi = (0, 255) if np.dtype(src_dtype) == np.uint8 else (-128, 127)
        if np.any(zp < lo) or np.any(zp > hi):
            raise self.error(f"zero point {zp.reshape(-1)[:4].tolist()} is outside "
                             f"{np.dtype(src_dtype).name} range [{lo}, {hi}]")
        if not np.all(np.isfinite(scale)) or np.any(scale <= 0):
            raise self.error(f"scale {scale.reshape(-1)[:4].tolist()} is not a finite "
                             "positive number")
        if scale.size > 1 and zp.size == 1:
            zp = np.full(scale.shape, int(zp.reshape(-1)[0]))
        if zp.size > 1 and scale.size == 1:
            scale = np.full(zp.shape, float(scale.reshape(-1)[0]), dtype=np.float32)
        _, zp8 = to_int8_domain(None, zp, src_dtype)
        src = np.dtype(src_dtype).name
        if scale.size == 1:
            return QuantParams(scale.reshape(()), zp8.reshape(()).astype(np.int32), None, src)
        return QuantParams(scale.reshape(-1), zp8.reshape(-1).astype(np.int32), axis, src)

    def const_int8(self, base: str, data: np.ndarray, quant_src_dtype, quant: QuantParams):
        data = checked_cast(data, quant_src_dtype, f"constant '{base}'", self.error)
        d8, _ = to_int8_domain(data, np.zeros(1), quant_src_dtype)
        return self.add_tensor(base, d8.shape, "int8", quant, d8)

    # -- ops --------------------------------------------------------------------------
    def add_op(self, kind: str, inputs: list[str], outputs: list[str], **attrs) -> Op:
        op = Op(kind, list(inputs), list(outputs), dict(attrs), self.node_name, self.node_op)
        self.graph.ops.append(op)
        return op

    def add_input(self, tensor: Tensor, onnx_name: str, onnx_dtype: str, buffer_dtype: str):
        self.graph.inputs.append(IOInfo(tensor.name, onnx_name, onnx_dtype, buffer_dtype,
                                        tensor.quant))

    def add_output(self, tensor: Tensor, onnx_name: str, onnx_dtype: str, buffer_dtype: str):
        self.graph.outputs.append(IOInfo(tensor.name, onnx_name, onnx_dtype, buffer_dtype,
                                         tensor.quant))


def quantize_real(value: float, q: QuantParams) -> int:
    """ONNX QuantizeLinear of one real value into the int8 domain (saturating)."""
    v = np.rint(np.float32(value) / np.float32(q.scalar_scale())) + q.scalar_zp()
    return int(np.clip(v, INT8_MIN, INT8_MAX))


def activation_range(kind: str | None, lo_real: float | None, hi_real: float | None,
                     q: QuantParams) -> tuple[int, int]:
    """Clamp bounds in the int8 domain for a fused Relu/Clip on an output with params q."""
    lo, hi = INT8_MIN, INT8_MAX
    if kind is None:
        return lo, hi
    if lo_real is not None and np.isfinite(lo_real):
        lo = max(lo, quantize_real(lo_real, q))
    if hi_real is not None and np.isfinite(hi_real):
        hi = min(hi, quantize_real(hi_real, q))
    return lo, hi


def conv_geometry(b: Builder, x_shape, w_shape, attrs: dict) -> dict:
    """Normalise ONNX Conv/pool attributes to 2-D (1-D is h = 1) and compute output dims."""
    rank = len(x_shape)
    if rank not in (3, 4):
        raise b.error(f"input rank {rank} is not supported (1-D or 2-D spatial only)")
    sp = rank - 2
    kernel = list(attrs.get("kernel_shape") or w_shape[2:])
    strides = list(attrs.get("strides") or [1] * sp)
    dil = list(attrs.get("dilations") or [1] * sp)
    pads = list(attrs.get("pads") or [0] * (2 * sp))
    auto_pad = attrs.get("auto_pad", b"NOTSET")
    auto_pad = auto_pad.decode() if isinstance(auto_pad, bytes) else str(auto_pad)
    if len(kernel) != sp or len(strides) != sp or len(dil) != sp or len(pads) != 2 * sp:
        raise b.error("kernel_shape/strides/dilations/pads do not match the input rank")
    if min(strides) < 1 or min(dil) < 1 or min(kernel) < 1:
        raise b.error(f"strides {strides}, dilations {dil} and kernel {kernel} must be >= 1")
    if min(pads) < 0:
        raise b.error(f"pads {pads} must be >= 0")
    spatial = list(x_shape[2:])
    ceil_mode = bool(attrs.get("ceil_mode", 0))
    out = []
    for i in range(sp):
        eff = (kernel[i] - 1) * dil[i] + 1
        if auto_pad in ("SAME_UPPER", "SAME_LOWER"):
            o = -(-spatial[i] // strides[i])
            total = max(0, (o - 1) * strides[i] + eff - spatial[i])
            small, big = total // 2, total - total // 2
            pads[i], pads[i + sp] = (small, big) if auto_pad == "SAME_UPPER" else (big, small)
        elif auto_pad == "VALID":
            pads[i] = pads[i + sp] = 0
        elif auto_pad not in ("NOTSET", ""):
            raise b.error(f"auto_pad '{auto_pad}' is not one of NOTSET, SAME_UPPER, "
                          "SAME_LOWER, VALID")
        span = spatial[i] + pads[i] + pads[i + sp] - eff
        if span < 0:
            raise b.error(f"kernel {kernel} (dilated) is larger than the padded input "
                          f"{spatial}")
        o = (-(-span // strides[i]) if ceil_mode else span // strides[i]) + 1
        if ceil_mode and (o - 1) * strides[i] >= spatial[i] + pads[i]:
            o -= 1  # the last window must start inside the input or left pad (ONNX)
        if max(pads[i], pads[i + sp]) > 4096 or o > 65535:
            raise b.error(f"pads {pads} or output size {o} out of range")
        out.append(o)
    if sp == 1:  # 1-D as 2-D with h = 1
        kernel, strides, dil = [1] + kernel, [1] + strides, [1] + dil
        pads = [0, pads[0], 0, pads[1]]
        out = [1] + out
    return {"kernel": tuple(kernel), "strides": tuple(strides), "dilations": tuple(dil),
            "pads": tuple(pads), "out_spatial": tuple(out[-sp:]), "out_hw": tuple(out),
            "spatial_rank": sp}


def broadcast_shape(b: Builder, a, c) -> tuple[int, ...]:
    try:
        return tuple(np.broadcast_shapes(tuple(a), tuple(c)))
    except ValueError:
        raise b.error(f"shapes {list(a)} and {list(c)} do not broadcast") from None
