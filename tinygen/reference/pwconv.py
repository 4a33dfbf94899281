"""Pointwise (1x1) convolution, the numpy twin of runtime_c/src/tg_pwconv.c (tg_pwconv.h).

x [n][in_h][in_w][in_c] int8, w [out_c][in_c] (or [out_c][1][1][in_c]) int8, bias [out_c]
int32, y [n][out_h][out_w][out_c]; output pixel (oy, ox) reads input pixel
(oy*stride_h, ox*stride_w). The C reads the weights, bias and requantization constants from
one compile-time `pack` (pack_weights); the reference computes the contract from w and bias
themselves, so a wrong pack shows as a difference. Also the kernel's scratch size and its
overlap model.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tinygen.reference.conv import ConvParams, conv
from tinygen.reference.mat import pack_matrix
from tinygen.reference.requant import Requant

PAIR = 2  # pixels the C takes per step (tg_pwconv.c)


@dataclass
class PwConvParams:
    """Mirror of tg_pwconv_params_t: same field names, int8-domain zero points."""

    n: int
    in_h: int
    in_w: int
    in_c: int
    out_h: int
    out_w: int
    out_c: int
    stride_h: int = 1
    stride_w: int = 1
    in_zp: int = 0
    pack: np.ndarray | None = None  # pack_weights(self): what the C reads
    rq: Requant | None = None
    x_ring: int = 0
    y_ring: int = 0
    # Python-side only (compare=False keeps them out of the C struct): the layer itself
    w_zp: np.ndarray | None = field(default=None, compare=False)
    w: np.ndarray | None = field(default=None, compare=False, repr=False)
    bias: np.ndarray | None = field(default=None, compare=False, repr=False)

    # the 1x1 geometry, for code that reads any conv's params (MAC counts, row ranges)
    k_h = k_w = dil_h = dil_w = groups = 1
    pad_top = pad_left = 0


def as_conv(p: PwConvParams) -> ConvParams:
    return ConvParams(n=p.n, in_h=p.in_h, in_w=p.in_w, in_c=p.in_c, out_h=p.out_h,
                      out_w=p.out_w, out_c=p.out_c, k_h=1, k_w=1, stride_h=p.stride_h,
                      stride_w=p.stride_w, in_zp=p.in_zp, w_zp=p.w_zp, rq=p.rq)


def pwconv(x: np.ndarray, w: np.ndarray, bias: np.ndarray, p: PwConvParams) -> np.ndarray:
    """Pointwise convolution exactly as tg_pwconv: int8 output with p.rq, int32 without."""
    return conv(x, np.asarray(w).reshape(p.out_c, 1, 1, p.in_c), bias, as_conv(p))


def pack_weights(p: PwConvParams) -> np.ndarray:
    """The pack tg_pwconv reads (tg_mat.h), from p.w, p.bias, p.w_zp and p.rq."""
    return pack_matrix(np.asarray(p.w).reshape(p.out_c, p.in_c), p.bias, p.w_zp, p.rq)


def with_pack(p: PwConvParams, w: np.ndarray, bias: np.ndarray) -> PwConvParams:
    """p with the layer's weights and bias attached and its pack built; returns p."""
    p.w = np.asarray(w, dtype=np.int8).reshape(p.out_c, p.in_c)
    p.bias = np.asarray(bias, dtype=np.int32).reshape(p.out_c)
    p.pack = pack_weights(p)
    return p


def scratch_bytes(p: PwConvParams) -> int:
    """The pair buffer: two pixels of in_c int16, in groups of four."""
    return 4 * ((p.in_c + 3) // 4 * 4)


def _out_elem(p: PwConvParams) -> int:
    return 1 if p.rq is not None else 4


def _pairs(p: PwConvParams):
    """The C's walk of a whole-tensor call: per step, the input pixel offsets it reads and
    the output pixel offsets it writes (in pixels of x and y)."""
    flat = p.stride_h == 1 and p.stride_w == 1 and p.in_w == p.out_w
    if flat:
        total = p.n * p.out_h * p.out_w
        for q in range(0, total, PAIR):
            px = list(range(q, min(q + PAIR, total)))
            yield px, px
        return
    for b in range(p.n):
        for r in range(p.out_h):
            for ox in range(0, p.out_w, PAIR):
                cols = list(range(ox, min(ox + PAIR, p.out_w)))
                xs = [(b * p.in_h + r * p.stride_h) * p.in_w + c * p.stride_w for c in cols]
                ys = [(b * p.out_h + r) * p.out_w + c for c in cols]
                yield xs, ys


def access_steps(p: PwConvParams) -> tuple[np.ndarray, np.ndarray]:
    """(last_read per byte of x, written_at per byte of y) for a whole-tensor call; a byte
    never read has -1. Within a step all reads come before the writes."""
    e = _out_elem(p)
    last_read = np.full(p.n * p.in_h * p.in_w * p.in_c, -1, dtype=np.int64)
    written = np.full(p.n * p.out_h * p.out_w * p.out_c * e, -1, dtype=np.int64)
    for step, (xs, ys) in enumerate(_pairs(p)):
        for px in xs:
            last_read[px * p.in_c:(px + 1) * p.in_c] = step
        for px in ys:
            written[px * p.out_c * e:(px + 1) * p.out_c * e] = step
    return last_read, written


def overlap_margin(p: PwConvParams) -> int:
    """Largest d such that every placement y_start <= x_start + d is safe (tg_pwconv.h): the
    end of each step's output must stay at or below the first input byte a later step reads."""
    e = _out_elem(p)
    steps = list(_pairs(p))
    x_bytes = p.n * p.in_h * p.in_w * p.in_c
    later_first = None  # first x byte read by any later step
    d = x_bytes  # past that y starts after x: always safe
    for xs, ys in reversed(steps):
        if later_first is not None:
            d = min(d, later_first - (max(ys) + 1) * p.out_c * e)
        first = min(xs) * p.in_c
        later_first = first if later_first is None else min(later_first, first)
    return d
