"""Fully connected / matrix multiply, the numpy twin of runtime_c/src/tg_fc.c (tg_fc.h).

x is [rows][depth] int8; w is a flat int8 buffer read at o * w_stride_o + k * w_stride_k, so
a constant [out][depth] weight (strides depth, 1) and a run-time [depth][out] right operand
(strides 1, out) go through the same kernel. y is [rows][out].
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tinygen.reference.requant import Requant, requantize


@dataclass
class FcParams:
    """Mirror of tg_fc_params_t: same field names, int8-domain zero points.

    w_zp is None (all zero) or one int per output column; rq None means raw int32 output.
    """

    rows: int
    depth: int
    out: int
    w_stride_o: int
    w_stride_k: int
    x_zp: int = 0
    w_zp: np.ndarray | None = None
    rq: Requant | None = None


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
