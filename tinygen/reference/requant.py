"""Requantization, the numpy twin of runtime_c/include/tg_requant.h."""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

# Forms of fixed-mode requantization (tg_requant.h): which sequence the C runs.
FORM_EXACT, FORM_FAST, FORM_FLOAT = 0, 1, 2
INT32_MAX = 2**31 - 1


@dataclass
class Requant:
    """Per-output-channel requantization (arrays have one entry per channel).

    The contract: fixed mode mult (int32 Q31) and shift (1..62), float mode scale (float32).
    out_zp, act_min, act_max are int8-domain integers. What the C reads (mirror of
    tg_requant_t): `chan` ([channels][3] int32, fixed modes), `scale`, `form`, `pre` and the
    three integers; mult/shift stay Python-side (compare=False keeps them out of the C).
    """

    mult: np.ndarray | None = field(compare=False)
    shift: np.ndarray | None = field(compare=False)
    scale: np.ndarray | None
    out_zp: int
    act_min: int = -128
    act_max: int = 127
    chan: np.ndarray | None = None
    form: int = FORM_FLOAT
    pre: int = 0

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


def fast_form(mult, shift, out_zp: int, acc_bound: int = INT32_MAX):
    """(chan, pre) of TG_RQ_FAST for these channels, or None when it cannot be proven exact.

    With pre = max(0, 33 - min shift) every channel's shift + pre = 32 + r, r in [1, 31], and
    floor((acc*mult + 2^(shift-1)) / 2^shift) + zp
      = floor((hi32((acc << pre) * mult) + 2^(r-1) + zp*2^r) / 2^r)
    (numerator and denominator times 2^pre; floor divisions compose; 2^(31+r) adds 2^(r-1)
    to the high word). It holds in int32 arithmetic when |acc| << pre and every high-word
    sum stay inside int32 for all |acc| <= acc_bound, which is checked here exactly.
    """
    mult = np.asarray(mult, dtype=np.int64).reshape(-1)
    shift = np.asarray(shift, dtype=np.int64).reshape(-1)
    live = mult != 0
    pre = max(0, 33 - int(shift[live].min())) if live.any() else 0
    bound = int(acc_bound) << pre
    if bound > INT32_MAX:
        return None
    chan = np.zeros((mult.size, 3), dtype=np.int64)
    for c, (m, s) in enumerate(zip(mult.tolist(), shift.tolist(), strict=True)):
        r = s + pre - 32 if m else 1
        if not 1 <= r <= 31:
            return None
        add = (1 << (r - 1)) + (int(out_zp) << r)
        hi_top = (bound * m) >> 32           # hi32 of the largest product
        hi_bottom = (-bound * m) >> 32       # and of the smallest
        if hi_top + add > INT32_MAX or hi_bottom + add < -INT32_MAX - 1 \
                or not -INT32_MAX - 1 <= add <= INT32_MAX:
            return None
        chan[c] = (m, add, r)
    return chan.astype(np.int32), pre


def exact_chan(mult, shift) -> np.ndarray:
    """chan of TG_RQ_EXACT: {mult, 0, shift} per channel."""
    mult = np.asarray(mult, dtype=np.int64).reshape(-1)
    shift = np.asarray(shift, dtype=np.int64).reshape(-1)
    return np.stack([mult, np.zeros_like(mult), shift], axis=1).astype(np.int32)


def choose_form(rq: Requant, acc_bound: int = INT32_MAX) -> Requant:
    """Set rq's C form for accumulators |acc| <= acc_bound: TG_RQ_FAST when fast_form proves
    it exact, else TG_RQ_EXACT (float mode is left as it is). Returns rq."""
    if rq.is_float:
        rq.chan, rq.form, rq.pre = None, FORM_FLOAT, 0
        return rq
    fast = fast_form(rq.mult, rq.shift, rq.out_zp, acc_bound)
    if fast is None:
        rq.chan, rq.form, rq.pre = exact_chan(rq.mult, rq.shift), FORM_EXACT, 0
    else:
        rq.chan, rq.form, rq.pre = fast[0], FORM_FAST, fast[1]
    return rq


def requantize_fast(acc: np.ndarray, chan: np.ndarray, pre: int) -> np.ndarray:
    """TG_RQ_FAST before the activation clamp: sat8((hi32((acc << pre) * mult) + add) >> r),
    with int32 wrap-around checked (the form is only chosen where none happens)."""
    acc = np.asarray(acc, dtype=np.int64) << pre
    mult, add, r = (chan[:, i].astype(np.int64) for i in range(3))
    if acc.size and (acc.min() < -INT32_MAX - 1 or acc.max() > INT32_MAX):
        raise OverflowError("pre-shifted accumulator leaves int32")
    t = ((acc * mult) >> 32) + add
    if t.size and (t.min() < -INT32_MAX - 1 or t.max() > INT32_MAX):
        raise OverflowError("high-word sum leaves int32")
    return np.clip(t >> r, -128, 127)


def requantize(acc: np.ndarray, rq: Requant, channel_axis: int = -1) -> np.ndarray:
    """Requantize int32 accumulators to int8; per-channel params broadcast on channel_axis.

    Runs the form the C runs (rq.form); a Requant without a chosen form (chan None) takes
    the contract formula, which every form equals."""
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
    elif rq.chan is not None and rq.form == FORM_FAST:
        moved = np.moveaxis(acc, channel_axis, -1)
        y = np.moveaxis(requantize_fast(moved, np.asarray(rq.chan), rq.pre), -1, channel_axis)
        y = np.clip(y, rq.act_min, rq.act_max)
    else:
        y = rq.out_zp + mul_shift(acc, np.asarray(rq.mult).reshape(shape),
                                  np.asarray(rq.shift).reshape(shape))
        y = np.clip(y, rq.act_min, rq.act_max)
    return y.astype(np.int8)


def make_requant(real_scales, out_zp: int, act_min: int, act_max: int, mode: str,
                 float_scales=None, acc_bound: int = INT32_MAX) -> Requant:
    """Build per-channel requant params from real multipliers (s_in * s_w[c] / s_out).

    In float mode `float_scales` (float32, computed in the order the reference runtime uses)
    is taken when given, else real_scales rounded to float32. In fixed mode the C form is
    chosen for accumulators up to acc_bound (choose_form; the compiler passes the layer's
    proven bound, which may allow the pre-shift the worst case does not).
    """
    real_scales = np.atleast_1d(np.asarray(real_scales, dtype=np.float64))
    if mode == "float":
        fs = real_scales if float_scales is None else float_scales
        return Requant(None, None, np.atleast_1d(np.asarray(fs, dtype=np.float32)),
                       out_zp, act_min, act_max)
    pairs = [quantize_multiplier(r) for r in real_scales]
    mult = np.array([m for m, _ in pairs], dtype=np.int32)
    shift = np.array([s for _, s in pairs], dtype=np.int8)
    return choose_form(Requant(mult, shift, None, out_zp, act_min, act_max), acc_bound)
