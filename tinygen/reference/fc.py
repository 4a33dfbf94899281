"""Fully connected / matrix multiply, the numpy twin of runtime_c/src/tg_fc.c (tg_fc.h).

x is [rows][depth] int8; w is a flat int8 buffer read at o * w_stride_o + k * w_stride_k, so
a constant [out][depth] weight (strides depth, 1) and a run-time [depth][out] right operand
(strides 1, out) go through the same kernel. y is [rows][out].
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tinygen.reference.mat import pack_matrix
from tinygen.reference.requant import Requant, requantize


@dataclass
class FcParams:
    """Mirror of tg_fc_params_t: same field names, int8-domain zero points.

    w_zp is None (all zero) or one int per output column; rq None means raw int32 output.
    pack: constant weights only, what the C reads instead of w and bias (fc_pack); w and
    bias stay Python-side (not in the C struct) to rebuild it.
    """

    rows: int
    depth: int
    out: int
    w_stride_o: int
    w_stride_k: int
    x_zp: int = 0
    w_zp: np.ndarray | None = None
    rq: Requant | None = None
    pack: np.ndarray | None = None
    w: np.ndarray | None = field(default=None, compare=False, repr=False)
    bias: np.ndarray | None = field(default=None, compare=False, repr=False)


def fc_pack(p: FcParams) -> np.ndarray:
    """The blocked matrix core's pack (tg_mat.h, k_len = depth) of a constant weight.

    The input zero point is folded into the bias, bias - x_zp * sum_k (w - w_zp), so the C
    widens x without an offset: sum (x - x_zp) w' = sum x w' - x_zp sum w'. The sum is the
    same integer; the C adds its terms modulo 2^32, where the folded bias may wrap.
    """
    wm = gather_weights(p.w, p).astype(np.int64)
    if p.w_zp is not None:
        wm = wm - np.asarray(p.w_zp, dtype=np.int64)[:, None]
    b = np.zeros(p.out, np.int64) if p.bias is None else np.asarray(p.bias, np.int64)
    folded = ((b - int(p.x_zp) * wm.sum(axis=1) + 2**31) % 2**32) - 2**31
    return pack_matrix(wm, folded, None, p.rq, bound_bias=b)


def with_fc_pack(p: FcParams, w: np.ndarray, bias: np.ndarray | None) -> FcParams:
    """p with w, bias and the pack built from them (constant [out][depth] weights)."""
    p.w, p.bias = np.asarray(w), None if bias is None else np.asarray(bias)
    p.pack = fc_pack(p)
    return p


def gather_weights(w: np.ndarray, p: FcParams) -> np.ndarray:
    """The [out][depth] weight matrix the kernel reads through the strides."""
    flat = np.asarray(w).reshape(-1)
    index = (np.arange(p.out)[:, None] * p.w_stride_o
             + np.arange(p.depth)[None, :] * p.w_stride_k)
    return flat[index]


def fc_accumulators(x: np.ndarray, w: np.ndarray, bias: np.ndarray | None,
                    p: FcParams) -> np.ndarray:
    """bias[o] + sum_k (x[m][k] - x_zp) * (w[o][k] - w_zp[o]) as int64, shape [rows][out]."""
    if x.shape != (p.rows, p.depth):
        raise ValueError(f"x shape {x.shape} does not match rows={p.rows}, depth={p.depth}")
    wm = gather_weights(w, p).astype(np.int64)
    if p.w_zp is not None:
        wm = wm - np.asarray(p.w_zp, dtype=np.int64)[:, None]
    acc = (x.astype(np.int64) - p.x_zp) @ wm.T
    if bias is not None:  # tg_fc.h: a NULL bias reads as zero
        acc += np.asarray(bias, dtype=np.int64)
    return acc


def fc(x: np.ndarray, w: np.ndarray, bias: np.ndarray | None, p: FcParams) -> np.ndarray:
    """Fully connected exactly as tg_fc: int8 output with p.rq, raw int32 without."""
    acc = fc_accumulators(x, w, bias, p)
    info = np.iinfo(np.int32)
    # The compiler proves accumulator bounds; a reference that silently wrapped would hide it.
    if acc.size and (acc.min() < info.min or acc.max() > info.max):
        raise OverflowError("fully connected accumulator exceeds int32")
    acc32 = acc.astype(np.int32)
    return acc32 if p.rq is None else requantize(acc32, p.rq, channel_axis=-1)
