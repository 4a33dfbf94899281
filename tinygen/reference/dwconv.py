"""Depthwise convolution, the numpy twin of runtime_c/src/tg_dwconv.c (contract in tg_dwconv.h).

x [n][in_h][in_w][in_c] int8, w [out_c][k_h][k_w][1] int8 (out_c = in_c * multiplier,
output channel c reads input channel c // multiplier, ONNX group order), bias [out_c] int32,
y [n][out_h][out_w][out_c]. The C reads its weights, bias and fast requantization constants
from one compile-time `pack` (pack_weights); the reference computes the contract from w and
bias themselves, so a wrong pack shows as a difference. Also the kernel's channel block and
widened-row geometry, which fix its scratch size.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tinygen.reference.conv import ConvParams, conv
from tinygen.reference.requant import FORM_FAST, Requant

PLANE_BUDGET = 4096  # bytes of widened input rows the kernel keeps for one channel block


@dataclass
class DwConvParams:
    """Mirror of tg_dwconv_params_t: same field names, int8-domain zero points.

    block and plane_w are the kernel's blocking (plan_blocking): input channels per pass and
    int16 columns of one widened input row.
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
    in_zp: int = 0
    block: int = 0
    plane_w: int = 0
    pack: np.ndarray | None = None  # pack_weights(self): what the C reads
    rq: Requant | None = None
    x_ring: int = 0  # rows held in a ring, 0: all (DEVELOPERS.md, "Kernel calls")
    y_ring: int = 0
    # Python-side only (compare=False keeps them out of the C struct): the layer itself
    w_zp: np.ndarray | None = field(default=None, compare=False)
    w: np.ndarray | None = field(default=None, compare=False, repr=False)
    bias: np.ndarray | None = field(default=None, compare=False, repr=False)

    @property
    def groups(self) -> int:  # for code that reads any conv's params (MAC counts)
        return self.in_c

    def __post_init__(self):
        if not self.block:
            self.block, self.plane_w = plan_blocking(self)


def span(p) -> int:
    """Input rows one output row reads: (k_h - 1) * dil_h + 1."""
    return (p.k_h - 1) * p.dil_h + 1


def plane_width(p) -> int:
    """int16 columns of one widened row: padded input columns 0 .. the last one a tap reads,
    plus one the paired loads may touch, rounded up to even (word pairs)."""
    need = (p.out_w - 1) * p.stride_w + (p.k_w - 1) * p.dil_w + 1
    return (need + 2) // 2 * 2


def plan_blocking(p) -> tuple[int, int]:
    """(block, plane_w): as many input channels per pass as keep span * block widened rows
    within PLANE_BUDGET (at least one; a multiple of four from four on)."""
    plane_w = plane_width(p)
    fit = max(1, PLANE_BUDGET // (2 * plane_w * span(p)))
    block = min(p.in_c, fit)
    if block >= 4:
        block -= block % 4
    return block, plane_w


def scratch_bytes(p: DwConvParams) -> int:
    """Arena scratch of one call (tg_dwconv.h): span * block widened rows and one zero row
    (int16, plane_w each), then one int32 accumulator row of out_w."""
    return 2 * p.plane_w * (span(p) * p.block + 1) + 4 * p.out_w


def record_words(p) -> int:
    """int32 words of one output channel's record in the pack."""
    return 1 + p.k_h * p.k_w + 3


def pack_weights(p: DwConvParams) -> np.ndarray:
    """The pack tg_dwconv reads: per output channel c one record of bias[c]; per tap
    (ky, kx) the int16 pair (w'[ky][kx] low, w'[ky][kx + 1] high), w' = w - w_zp[c] and
    w'[ky][k_w] = 0; then mult, add, r of p.rq when its form is TG_RQ_FAST (else zeros).
    Choose rq's form first (choose_form): its constants are copied."""
    w = np.asarray(p.w, dtype=np.int64).reshape(p.out_c, p.k_h, p.k_w)
    if p.w_zp is not None:
        w = w - np.asarray(p.w_zp, dtype=np.int64).reshape(-1, 1, 1)
    nxt = np.concatenate([w[:, :, 1:], np.zeros((p.out_c, p.k_h, 1), np.int64)], axis=2)
    pairs = ((w & 0xFFFF) | (nxt << 16)).reshape(p.out_c, -1)
    chan = np.zeros((p.out_c, 3), np.int64)
    if p.rq is not None and p.rq.form == FORM_FAST and p.rq.chan is not None:
        chan = np.asarray(p.rq.chan, dtype=np.int64).reshape(p.out_c, 3)
    bias = np.asarray(p.bias, dtype=np.int64).reshape(p.out_c, 1)
    rec = np.concatenate([bias, pairs, chan], axis=1)
    assert rec.shape[1] == record_words(p)
    return ((rec.reshape(-1) + 2**31) % 2**32 - 2**31).astype(np.int32)


def with_pack(p: DwConvParams, w: np.ndarray, bias: np.ndarray) -> DwConvParams:
    """p with the layer's weights and bias attached and its pack built; returns p."""
    p.w = np.asarray(w, dtype=np.int8).reshape(p.out_c, p.k_h, p.k_w, 1)
    p.bias = np.asarray(bias, dtype=np.int32).reshape(p.out_c)
    p.pack = pack_weights(p)
    return p


def as_conv(p: DwConvParams) -> ConvParams:
    return ConvParams(n=p.n, in_h=p.in_h, in_w=p.in_w, in_c=p.in_c, out_h=p.out_h,
                      out_w=p.out_w, out_c=p.out_c, k_h=p.k_h, k_w=p.k_w,
                      stride_h=p.stride_h, stride_w=p.stride_w, dil_h=p.dil_h, dil_w=p.dil_w,
                      pad_top=p.pad_top, pad_left=p.pad_left, groups=p.in_c, in_zp=p.in_zp,
                      w_zp=p.w_zp, rq=p.rq)


def dwconv(x: np.ndarray, w: np.ndarray, bias: np.ndarray, p: DwConvParams) -> np.ndarray:
    """Depthwise convolution exactly as tg_dwconv: int8 output with p.rq, int32 without.

    w is [out_c][k_h][k_w][1], the grouped layout with groups == in_c, so this is the
    grouped convolution of reference/conv.py with that check."""
    if p.out_c % p.in_c != 0:
        raise ValueError("depthwise needs out_c a multiple of in_c")
    return conv(x, np.asarray(w).reshape(p.out_c, p.k_h, p.k_w, 1), bias, as_conv(p))
