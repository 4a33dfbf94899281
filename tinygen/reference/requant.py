"""Requantization, the numpy twin of runtime_c/include/tg_requant.h."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class Requant:
    """Per-output-channel requantization (arrays have one entry per channel).

    Fixed mode: mult (int32 Q31) and shift (1..62); float mode: scale (float32), mult/shift
    unused. out_zp, act_min, act_max are int8-domain integers.
    """

    mult: np.ndarray | None
    shift: np.ndarray | None
    scale: np.ndarray | None
    out_zp: int
    act_min: int = -128
    act_max: int = 127

    @property
    def is_float(self) -> bool:
        return self.scale is not None


def quantize_multiplier(real: float) -> tuple[int, int]:
    """Encode a positive real multiplier as (mult, shift) with real ~= mult * 2^-shift.

    mult is in [2^30, 2^31) and shift in [1, 62]; a multiplier too small to change any int32
    accumulator by half a step becomes (0, 1). Refuses multipliers >= 2^30 (ValueError).
    """
    real = float(real)
    if not np.isfinite(real) or real < 0:
        raise ValueError(f"requantization multiplier {real!r} is not a finite positive number")
    if real == 0.0:
        return 0, 1
    mant, exp = np.frexp(real)  # real = mant * 2^exp, mant in [0.5, 1)
    mult = int(round(mant * (1 << 31)))
    if mult == 1 << 31:
        mult //= 2
        exp += 1
    shift = 31 - int(exp)
    if shift > 62:
        return 0, 1
    if shift < 1:
        raise ValueError(f"requantization multiplier {real:g} is too large (>= 2^30)")
    return mult, shift


def mul_shift(x: np.ndarray, mult, shift) -> np.ndarray:
    """floor((x * mult + 2^(shift-1)) / 2^shift) on int64, exactly as tg_mul_shift."""
    x = np.asarray(x, dtype=np.int64)
    mult = np.asarray(mult, dtype=np.int64)
    shift = np.asarray(shift, dtype=np.int64)
    return (x * mult + (np.int64(1) << (shift - 1))) >> shift


def round_half_even_f32(v: np.ndarray) -> np.ndarray:
    return np.rint(np.asarray(v, dtype=np.float32)).astype(np.int64)


def requantize(acc: np.ndarray, rq: Requant, channel_axis: int = -1) -> np.ndarray:
    """Requantize int32 accumulators to int8; per-channel params broadcast on channel_axis."""
    acc = np.asarray(acc, dtype=np.int64)
    shape = [1] * acc.ndim
    shape[channel_axis] = -1
    if rq.is_float:
        scale = np.asarray(rq.scale, dtype=np.float32).reshape(shape)
        v = acc.astype(np.float32) * scale
        lo = np.float32(rq.act_min - rq.out_zp)
        hi = np.float32(rq.act_max - rq.out_zp)
        v = np.minimum(np.maximum(v, lo), hi)
        y = round_half_even_f32(v) + rq.out_zp
    else:
        y = rq.out_zp + mul_shift(acc, np.asarray(rq.mult).reshape(shape),
                                  np.asarray(rq.shift).reshape(shape))
        y = np.clip(y, rq.act_min, rq.act_max)
    return y.astype(np.int8)


def make_requant(real_scales, out_zp: int, act_min: int, act_max: int, mode: str,
                 float_scales=None) -> Requant:
    """Build per-channel requant params from real multipliers (s_in * s_w[c] / s_out).

    In float mode `float_scales` (float32, computed in the order the reference runtime uses)
    is taken when given, else real_scales rounded to float32.
    """
    real_scales = np.atleast_1d(np.asarray(real_scales, dtype=np.float64))
    if mode == "float":
        fs = real_scales if float_scales is None else float_scales
        return Requant(None, None, np.atleast_1d(np.asarray(fs, dtype=np.float32)),
                       out_zp, act_min, act_max)
    pairs = [quantize_multiplier(r) for r in real_scales]
    mult = np.array([m for m, _ in pairs], dtype=np.int32)
    shift = np.array([s for _, s in pairs], dtype=np.int8)
    return Requant(mult, shift, None, out_zp, act_min, act_max)
