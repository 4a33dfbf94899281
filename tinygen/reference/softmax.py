"""Integer Softmax, the numpy twin of runtime_c/src/tg_softmax.c (contract in tg_softmax.h).

x is [rows][len] int8 (Softmax over the innermost axis), y the same shape. Per row, with
d_i = max(x) - x_i in 0..255:
    e_i = exp_table[d_i] = round(2^20 * exp(-s_x * d_i))        (table built here, float64)
    y_i = clamp(out_zp + round_half_even(e_i inv / (256 S)))     S = sum e_i, inv = round(256/s_y)
i.e. (e_i / S) / s_y rounded as QuantizeLinear rounds, with 64-bit integer arithmetic only:
q = floor((2 e_i inv + 256 S) / (512 S)), less one when the division is exact and q is odd.

Accuracy, measured over 603,680 outputs (600 random cases: rows of 1..512 values, including
uniform and two-valued rows whose exact result is a .5 tie; s_x in [1e-3, 1]; s_y = 1/256 or
random in [1e-3, 0.05]; zero points -128..127), against clamp(rint(p / s_y) + z_y) with p the
float64 softmax of the dequantized row:
  max |error| 1 LSB; 603,672 of 603,680 equal; |y - (p / s_y + z_y)| <= 0.5002 LSB, so every
  miss sits within 2e-4 LSB of a rounding tie.
Against onnxruntime 1.32 (CPU, x86-64) on the same cases, int8 and uint8 alike:
  DequantizeLinear -> Softmax -> QuantizeLinear (unfused): 603,672 of 603,680 equal, max 1 LSB;
  QLinearSoftmax (com.microsoft): 602,309 of 603,680 equal, max 1 LSB (that kernel itself
  differs from the float64 result on 1,369 of them).
tests/runtime_c/test_softmax.py re-checks these bounds on a smaller sample.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

EXP_ONE = 1 << 20
MAX_LEN = 2047  # keeps the row sum of 2^20-scaled exponentials below 2^31
INT8_MIN, INT8_MAX = -128, 127


@dataclass
class SoftmaxParams:
    """Mirror of tg_softmax_params_t (same field names)."""

    rows: int
    len: int
    exp_table: np.ndarray
    inv_out_q8: int
    out_zp: int
    act_min: int = INT8_MIN
    act_max: int = INT8_MAX


def exp_table(s_x: float) -> np.ndarray:
    """exp_table[d] = round(2^20 * exp(-s_x * d)) for d = 0..255, int32 (float64 maths)."""
    s = float(np.float32(s_x))
    if not (np.isfinite(s) and s > 0):
        raise ValueError(f"input scale {s_x!r} is not a finite positive number")
    return np.rint(EXP_ONE * np.exp(-s * np.arange(256, dtype=np.float64))).astype(np.int32)


def make_softmax_params(rows: int, length: int, s_x: float, s_y: float, z_y: int,
                        act_min: int = INT8_MIN, act_max: int = INT8_MAX) -> SoftmaxParams:
    """tg_softmax params for `rows` rows of `length` values (s_y, z_y: the output's quant)."""
    if not 1 <= length <= MAX_LEN:
        raise ValueError(f"softmax over {length} values is outside 1..{MAX_LEN}")
    s_y = float(np.float32(s_y))
    if not (np.isfinite(s_y) and s_y > 0):
        raise ValueError(f"output scale {s_y!r} is not a finite positive number")
    inv = int(np.rint(256.0 / s_y))
    if not 1 <= inv < 2**31:
        raise ValueError(f"output scale {s_y:g} gives 256/s_y = {256.0 / s_y:g} outside int32")
    return SoftmaxParams(rows, length, exp_table(s_x), inv, int(z_y), act_min, act_max)


def softmax(p: SoftmaxParams, x: np.ndarray) -> np.ndarray:
    """tg_softmax on x [rows][len] (any contiguous shape with that many values)."""
    x = np.asarray(x, dtype=np.int8).reshape(p.rows, p.len).astype(np.int64)
    d = x.max(axis=1, keepdims=True) - x
    e = np.asarray(p.exp_table, dtype=np.int64)[d]
    s = e.sum(axis=1, keepdims=True)
    num, den = 2 * e * p.inv_out_q8 + 256 * s, 512 * s
    q = num // den
    q -= ((num % den == 0) & (q % 2 == 1)).astype(np.int64)  # exact ties go to even
    q += p.out_zp
    return np.clip(q, p.act_min, p.act_max).astype(np.int8)


# -- onnxruntime's QLinearSoftmax rule (--tables onnxruntime) ------------------------------
#
# Measured against onnxruntime 1.32's QLinearSoftmax (CPU, x86-64), int8 and uint8, rows of
# 1..69 values, many scales and ties: the rule below reproduced 867,000 of 867,000 outputs
# (tests/runtime_c/test_softmax.py re-checks it). In words: a float32 table of exponentials
# scaled up by a row-length-dependent constant (so that large sums keep their precision),
# indexed by the distance to the row maximum; the row sum accumulated in float32 from the
# first element to the last; the output multiplier is floor(1 / s_y) rather than 1 / s_y
# (so s_y = 1/255, whose float32 reciprocal is just below 255, gives 254: a certain class
# comes out as 126 in int8, not 127); y = round_half_even(e * mult / sum) + z_y, capped at the
# type's maximum.

FLT_MAX32 = np.float32(np.finfo(np.float32).max)


@dataclass
class SoftmaxFloatParams:
    """Mirror of tg_softmax_float_params_t (same field names)."""

    rows: int
    len: int
    exp_table: np.ndarray   # float32[256], indexed by max - x
    out_mult: float         # float32 floor(1 / s_y)
    out_zp: int
    act_min: int = INT8_MIN
    act_max: int = INT8_MAX


def ort_exp_table(s_x: float, length: int) -> np.ndarray:
    """float32 table[d] = exp((255 - d - 255 + shift) * s_x) with shift =
    max(0, log(FLT_MAX / length) - 5) / s_x: the row maximum (d = 0) maps to FLT_MAX / length /
    e^5, so a row's float32 sum cannot overflow. exp in float64, then float32 (measured)."""
    import math
    s = float(np.float32(s_x))
    if not (np.isfinite(s) and s > 0):
        raise ValueError(f"input scale {s_x!r} is not a finite positive number")
    # log of the float32 quotient, rounded to float32 (libm's double log, so the table does not
    # depend on numpy's vectorised float32 log; both gave the same outputs when measured)
    top = float(np.float32(math.log(float(FLT_MAX32 / np.float32(length)))))
    shift = max(0.0, top - 5.0) / s
    return np.array([math.exp((float(255 - d) - 255.0 + shift) * s) for d in range(256)],
                    dtype=np.float64).astype(np.float32)


def make_softmax_float_params(rows: int, length: int, s_x: float, s_y: float, z_y: int,
                              act_min: int = INT8_MIN, act_max: int = INT8_MAX
                              ) -> SoftmaxFloatParams:
    """tg_softmax_float params: onnxruntime's QLinearSoftmax, for `rows` rows of `length`."""
    if not 1 <= length <= MAX_LEN:
        raise ValueError(f"softmax over {length} values is outside 1..{MAX_LEN}")
    s_y32 = np.float32(s_y)
    if not (np.isfinite(s_y32) and s_y32 > 0):
        raise ValueError(f"output scale {s_y!r} is not a finite positive number")
    mult = np.floor(np.float32(1.0) / s_y32)
    if not 1 <= mult <= 2**24:
        raise ValueError(f"output scale {s_y:g} gives floor(1/s_y) = {mult:g} outside 1..2^24")
    table = ort_exp_table(s_x, length)
    with np.errstate(over="ignore"):
        top = np.float32(table[0]) * np.float32(mult)
    if not np.isfinite(top):  # onnxruntime's own result is then undefined (inf to int)
        raise ValueError(f"onnxruntime's QLinearSoftmax overflows float32 for rows of {length} "
                         f"with output scale {s_y:g} (floor(1/s_y) = {mult:g}); its result is "
                         "not defined there: use --tables onnx")
    return SoftmaxFloatParams(rows, length, table, float(mult), int(z_y), act_min, act_max)


def softmax_float(p: SoftmaxFloatParams, x: np.ndarray) -> np.ndarray:
    """tg_softmax_float on x [rows][len]: float32 arithmetic in the C kernel's order."""
    x = np.asarray(x, dtype=np.int8).reshape(p.rows, p.len).astype(np.int64)
    e = np.asarray(p.exp_table, dtype=np.float32)[x.max(axis=1, keepdims=True) - x]
    total = np.zeros((p.rows, 1), dtype=np.float32)
    for i in range(p.len):  # float32, first element to last
        total = (total + e[:, i:i + 1]).astype(np.float32)
    v = (e * np.float32(p.out_mult)).astype(np.float32) / total
    v = np.minimum(v, np.float32(512.0))  # beyond any clamp; keeps the rounding exact
    q = np.rint(v).astype(np.int64) + p.out_zp
    return np.clip(q, p.act_min, p.act_max).astype(np.int8)
