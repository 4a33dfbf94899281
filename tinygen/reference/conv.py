"""Convolution, the numpy twin of runtime_c/src/tg_conv.c (contract in tg_conv.h); the
grouped convolution here is also the contract of depthwise (reference/dwconv.py).

Tensors are channels-last: x [n][in_h][in_w][in_c] int8, w [out_c][k_h][k_w][in_c/groups]
int8, bias [out_c] int32, y [n][out_h][out_w][out_c]. 1-D convolution is in_h = k_h = 1.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tinygen.reference.requant import Requant, requantize

AUTO_PAD_MODES = ("NOTSET", "SAME_UPPER", "SAME_LOWER", "VALID")


@dataclass
class ConvParams:
    """Mirror of tg_conv_params_t: same field names, int8-domain zero points.

    w_zp is None (all zero) or an int array with one entry per output channel; rq None means
    the kernel writes the raw int32 accumulators.
    """

    n: int
    in_h: int
    in_w: int
    in_c: int
    out_h: int
    out_w: int
    out_c: int
    k_h: int
    k_w: int
    stride_h: int = 1
    stride_w: int = 1
    dil_h: int = 1
    dil_w: int = 1
    pad_top: int = 0
    pad_left: int = 0
    groups: int = 1
    in_zp: int = 0
    w_zp: np.ndarray | None = None
    rq: Requant | None = None
    x_ring: int = 0  # rows held in a ring, 0: all (DEVELOPERS.md, "Kernel calls")
    y_ring: int = 0
    pack: np.ndarray | None = None  # tg_conv: conv_pack(self), what the C reads; else None
    # Python-side only (compare=False keeps them out of the C struct): tg_conv's layer
    w: np.ndarray | None = field(default=None, compare=False, repr=False)
    bias: np.ndarray | None = field(default=None, compare=False, repr=False)


def conv_scratch_bytes(p: ConvParams) -> int:
    """Arena scratch of one tg_conv call (tg_conv.h): row offsets, two raw patches, pair
    buffer."""
    k_len = p.k_h * p.k_w * (p.in_c // p.groups)
    return 4 * p.k_h + 6 * ((k_len + 3) // 4 * 4)


def conv_pack(p: ConvParams) -> np.ndarray:
    """The pack tg_conv reads (tg_mat.h): p.w's rows [out_c][k_h*k_w*in_c/groups], p.bias,
    p.w_zp and p.rq's fast constants, ceil(out_c/groups / 2) records per group."""
    from tinygen.reference.mat import pack_matrix
    w = np.asarray(p.w).reshape(p.out_c, -1)
    return pack_matrix(w, p.bias, p.w_zp, p.rq, p.groups)


def with_conv_pack(p: ConvParams, w: np.ndarray, bias: np.ndarray) -> ConvParams:
    """p with tg_conv's weights and bias attached and its pack built; returns p."""
    p.w = np.asarray(w, dtype=np.int8).reshape(p.out_c, p.k_h, p.k_w, p.in_c // p.groups)
    p.bias = np.asarray(bias, dtype=np.int32).reshape(p.out_c)
    p.pack = conv_pack(p)
    return p


def conv_output_size(in_size: int, k: int, stride: int, dil: int, pad_begin: int,
                     pad_end: int) -> int:
    """Output length of one spatial axis with explicit pads (ONNX Conv, floor rounding)."""
    span = dil * (k - 1) + 1
    return (in_size + pad_begin + pad_end - span) // stride + 1


def auto_pads(in_size: int, k: int, stride: int, dil: int, mode: str) -> tuple[int, int]:
    """(pad_begin, pad_end) of one spatial axis for an ONNX auto_pad mode.

    SAME_*: output = ceil(in / stride), the total padding split evenly, the odd pixel at the
    end (SAME_UPPER) or at the beginning (SAME_LOWER); VALID: no padding. NOTSET means the
    model gives explicit pads, so there is nothing to compute here (ValueError).
    """
    if mode == "VALID":
        return 0, 0
    if mode not in ("SAME_UPPER", "SAME_LOWER"):
        raise ValueError(f"auto_pad {mode!r} has no implied padding")
    out = -(-in_size // stride)
    span = dil * (k - 1) + 1
    total = max(0, (out - 1) * stride + span - in_size)
    small, large = total // 2, total - total // 2
    return (small, large) if mode == "SAME_UPPER" else (large, small)


def _padded_input(x: np.ndarray, p: ConvParams) -> np.ndarray:
    """x - in_zp as int64, zero-padded (or cropped) to exactly the extent the taps read."""
    need_h = (p.out_h - 1) * p.stride_h + p.dil_h * (p.k_h - 1) + 1
    need_w = (p.out_w - 1) * p.stride_w + p.dil_w * (p.k_w - 1) + 1
    xc = x.astype(np.int64) - p.in_zp
    # Padding reads as in_zp, so after the subtraction it is a plain zero.
    pad_bottom = max(0, need_h - p.in_h - p.pad_top)
    pad_right = max(0, need_w - p.in_w - p.pad_left)
    xp = np.pad(xc, ((0, 0), (p.pad_top, pad_bottom), (p.pad_left, pad_right), (0, 0)))
    return xp[:, :need_h, :need_w, :]


def conv_accumulators(x: np.ndarray, w: np.ndarray, bias: np.ndarray,
                      p: ConvParams) -> np.ndarray:
    """bias[c] + sum (x - in_zp) * (w - w_zp[c]) as int64, shape [n][out_h][out_w][out_c]."""
    _check_shapes(x, w, p)
    xp = _padded_input(x, p)
    wc = w.astype(np.int64)
    if p.w_zp is not None:
        wc = wc - np.asarray(p.w_zp, dtype=np.int64).reshape(-1, 1, 1, 1)
    in_per_group = p.in_c // p.groups
    out_per_group = p.out_c // p.groups
    acc = np.zeros((p.n, p.out_h, p.out_w, p.out_c), dtype=np.int64)
    for ky in range(p.k_h):
        for kx in range(p.k_w):
            y0, x0 = ky * p.dil_h, kx * p.dil_w
            taps = xp[:, y0:y0 + (p.out_h - 1) * p.stride_h + 1:p.stride_h,
                      x0:x0 + (p.out_w - 1) * p.stride_w + 1:p.stride_w, :]
            for g in range(p.groups):
                xs = taps[..., g * in_per_group:(g + 1) * in_per_group]
                oc = slice(g * out_per_group, (g + 1) * out_per_group)
                acc[..., oc] += np.einsum("nhwi,oi->nhwo", xs, wc[oc, ky, kx, :])
    return acc + np.asarray(bias, dtype=np.int64)


def conv(x: np.ndarray, w: np.ndarray, bias: np.ndarray, p: ConvParams) -> np.ndarray:
    """Grouped convolution exactly as tg_conv: int8 output with p.rq, raw int32 without."""
    acc = conv_accumulators(x, w, bias, p)
    if p.rq is None:
        return _to_int32(acc)
    return requantize(_to_int32(acc), p.rq, channel_axis=-1)


def _to_int32(acc: np.ndarray) -> np.ndarray:
    # The compiler proves accumulator bounds; a reference that silently wrapped would hide it.
    info = np.iinfo(np.int32)
    if acc.size and (acc.min() < info.min or acc.max() > info.max):
        raise OverflowError("convolution accumulator exceeds int32")
    return acc.astype(np.int32)


def _check_shapes(x: np.ndarray, w: np.ndarray, p: ConvParams) -> None:
    if p.in_c % p.groups or p.out_c % p.groups:
        raise ValueError(f"groups={p.groups} does not divide in_c={p.in_c} and out_c={p.out_c}")
    if x.shape != (p.n, p.in_h, p.in_w, p.in_c):
        raise ValueError(f"x shape {x.shape} does not match the params")
    if w.shape != (p.out_c, p.k_h, p.k_w, p.in_c // p.groups):
        raise ValueError(f"w shape {w.shape} does not match the params")
