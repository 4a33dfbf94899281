"""Elementwise Add and Mul, the numpy twin of runtime_c/src/tg_eltwise.c (contract in
tg_eltwise.h), and the compile-time builders of their parameters.

Inputs are flat int8 arrays in storage order; EltwiseParams.shape/a_stride/b_stride describe
the rank-4 broadcast walk. Zero points are int8-domain values.

Fixed mode is integer only. Add brings both inputs to a common high-precision domain
((x - zp) << left_shift, scaled by s_x / (2 max(s_a, s_b)); common practice) and requantizes
the sum once; Mul requantizes the product of the centred inputs once. The C runs fixed Add
from two compile-time tables (add_tables) that give the very same outputs with one 32-bit
addition and one shift per element.

Float mode reproduces onnxruntime's CPU kernels on x86-64 (MLAS), checked bit for bit in
tests/runtime_c/test_eltwise.py. With X the operand whose term is applied last, Y the other
(MLAS takes the input that is broadcast along each inner row as its scalar "B" operand, so X is
a unless a is that scalar) and raw values (uint8 models: the unshifted uint8 values):
  QLinearAdd: rx = s_x / s_y, ry = s_y' / s_y (float32 divisions)
              bias = (float)z_out - fma(rx, (float)z_x, ry * (float)z_y)
              v = fma(X, rx, fma(Y, ry, bias));  y = saturate(round_half_even(v))
  QLinearMul: r = (s_a * s_b) / s_y;  v = (float)((a - z_a) * (b - z_b)) * r + (float)z_out
              (two roundings, no fma);  y = saturate(round_half_even(v))
"""
from __future__ import annotations

import functools
from dataclasses import dataclass, field
from types import SimpleNamespace

import numpy as np

from tinygen.reference.requant import mul_shift, quantize_multiplier

INT8_MIN, INT8_MAX = -128, 127
ADD_LEFT_SHIFT = 20
ADD_TABLE_SHIFT = 10  # TG_ADD_TABLE_SHIFT: y = clamp((a_table[a] + b_table[b]) >> 10)
f32 = np.float32


@dataclass
class EltwiseParams:
    """Mirror of tg_eltwise_params_t (same field names)."""

    shape: list[int]
    a_stride: list[int]
    b_stride: list[int]
    a_zp: int = 0
    b_zp: int = 0
    out_zp: int = 0
    act_min: int = INT8_MIN
    act_max: int = INT8_MAX
    left_shift: int = 0
    a_mult: int = 0
    a_shift: int = 1
    b_mult: int = 0
    b_shift: int = 1
    out_mult: int = 0
    out_shift: int = 1
    use_float: int = 0
    a_ratio: float = 0.0
    b_ratio: float = 0.0
    ab_ratio: float = 0.0
    bias: float = 0.0
    raw_offset: int = 0
    a_bcast_inner: int = 0
    a_table: np.ndarray | None = None  # fixed Add: add_tables(), indexed by the input byte
    b_table: np.ndarray | None = None
    out_shape: tuple[int, ...] = field(default=(), compare=False)  # logical, not in C


def fma_f32(x, y, z) -> np.ndarray:
    """Correctly rounded float32 fused multiply-add, as C's fmaf.

    The float64 product of two float32 values is exact; the float64 sum is corrected with its
    exact error (TwoSum) when it falls exactly halfway between two float32 values, the only
    case where rounding twice differs from rounding once.
    """
    x, y, z = (np.asarray(v, dtype=f32).astype(np.float64) for v in (x, y, z))
    p = x * y
    s = p + z
    bp = s - p
    err = (p - (s - bp)) + (z - bp)
    r = s.astype(f32)
    mant, _ = np.frexp(s)
    m25 = np.ldexp(mant, 25)
    halfway = (m25 == np.round(m25)) & (r.astype(np.float64) != s)
    up = np.nextafter(s, np.inf).astype(f32)
    down = np.nextafter(s, -np.inf).astype(f32)
    return np.where(halfway & (err > 0), up, np.where(halfway & (err < 0), down, r)).astype(f32)


def broadcast_layout(a_shape, b_shape):
    """(out_shape, shape4, a_stride4, b_stride4) for NumPy/ONNX broadcasting of a and b.

    Output axes of size 1 are dropped and neighbouring axes that both inputs walk alike are
    merged, so the innermost axis is the innermost one that has more than one element (the
    row onnxruntime hands to its kernel). Raises ValueError past rank 4 after merging.
    """
    out = tuple(int(d) for d in np.broadcast_shapes(tuple(a_shape), tuple(b_shape)))

    def strides(shape):
        shape = (1,) * (len(out) - len(shape)) + tuple(shape)
        st, acc = [0] * len(out), 1
        for i in range(len(out) - 1, -1, -1):
            st[i] = acc if shape[i] != 1 else 0
            acc *= shape[i]
        return st

    sa, sb = strides(a_shape), strides(b_shape)
    dims: list[list[int]] = []  # [size, a_stride, b_stride]
    for d, x, y in zip(out, sa, sb, strict=True):
        if d == 1:
            continue
        if dims and dims[-1][1] == x * d and dims[-1][2] == y * d:
            dims[-1] = [dims[-1][0] * d, x, y]
        else:
            dims.append([d, x, y])
    if len(dims) > 4:
        raise ValueError(f"broadcasting {list(a_shape)} with {list(b_shape)} needs rank "
                         f"{len(dims)} after merging axes (tg_eltwise walks rank 4)")
    dims = [[1, 0, 0]] * (4 - len(dims)) + dims
    return out, [d[0] for d in dims], [d[1] for d in dims], [d[2] for d in dims]


def _raw_offset(source_dtype: str) -> int:
    if source_dtype not in ("int8", "uint8"):
        raise ValueError(f"source_dtype must be 'int8' or 'uint8', not {source_dtype!r}")
    return 128 if source_dtype == "uint8" else 0


def _base_params(a_shape, b_shape, z_a, z_b, z_y, act_min, act_max) -> EltwiseParams:
    out, shape, sa, sb = broadcast_layout(a_shape, b_shape)
    return EltwiseParams(shape, sa, sb, int(z_a), int(z_b), int(z_y), act_min, act_max,
                         out_shape=out)


def make_add_params(a_shape, b_shape, s_a: float, z_a: int, s_b: float, z_b: int, s_y: float,
                    z_y: int, mode: str = "fixed", source_dtype: str = "int8",
                    act_min: int = INT8_MIN, act_max: int = INT8_MAX) -> EltwiseParams:
    """tg_add params for y = a + b (shapes broadcast as in ONNX)."""
    p = _base_params(a_shape, b_shape, z_a, z_b, z_y, act_min, act_max)
    s_a, s_b, s_y = float(f32(s_a)), float(f32(s_b)), float(f32(s_y))
    if mode == "fixed":
        twice_max = 2 * max(s_a, s_b)
        p.left_shift = ADD_LEFT_SHIFT
        p.a_mult, p.a_shift = quantize_multiplier(s_a / twice_max)
        p.b_mult, p.b_shift = quantize_multiplier(s_b / twice_max)
        p.out_mult, p.out_shift = quantize_multiplier(twice_max / ((1 << ADD_LEFT_SHIFT) * s_y))
        tables = add_tables(p)
        if tables is not None:
            p.a_table, p.b_table = tables
        return p
    if mode != "float":
        raise ValueError(f"mode must be 'fixed' or 'float', not {mode!r}")
    off = _raw_offset(source_dtype)
    p.use_float, p.raw_offset = 1, off
    p.a_ratio, p.b_ratio = float(f32(s_a) / f32(s_y)), float(f32(s_b) / f32(s_y))
    # onnxruntime treats a as the per-row scalar when a is broadcast along the rows, and
    # (its broadcaster's choice) whenever the output is a single element.
    p.a_bcast_inner = int(p.a_stride[3] == 0 or int(np.prod(p.shape)) == 1)
    (rx, zx), (ry, zy) = ((p.a_ratio, z_a), (p.b_ratio, z_b))
    if p.a_bcast_inner:
        (rx, zx), (ry, zy) = (ry, zy), (rx, zx)
    term = fma_f32(rx, f32(zx + off), f32(f32(ry) * f32(zy + off)))
    p.bias = float(f32(f32(z_y + off) - term))
    return p


def _byte_values() -> np.ndarray:
    """The int8 value of each byte 0..255, the tables' index order (the C indexes by the
    input byte read as unsigned)."""
    u = np.arange(256, dtype=np.int64)
    return np.where(u < 128, u, u - 256)


def add_tables(p: EltwiseParams) -> tuple[np.ndarray, np.ndarray] | None:
    """Two int32 tables with clamp((A[a] + B[b]) >> 10) equal to fixed Add for all a, b.

    With S = a' + b' (the rescaled inputs) the contract is clamp(floor((A64 + B64) / 2^s))
    for A64 = a'*M + 2^(s-1) + out_zp*2^s and B64 = b'*M (M = out_mult, s = out_shift).
    Split A64 = qa*2^s + ra and B64 = qb*2^s + rb with 0 <= ra, rb < 2^s: the floor is
    qa + qb + carry, carry = [ra >= 2^s - rb]. That comparison keeps its answer when ra and
    2^s - rb are replaced by their ranks u, t (from 0) among the at most 512 distinct values
    of both; with A = qa*2^10 + u and B = qb*2^10 + 2^10 - t, u + 2^10 - t lies in
    [1, 2^11) and reaches 2^10 exactly when u >= t, so the shift by 10 adds the carry.
    qa (then qb) is clipped to the range past which the clamp decides alone. None when
    the clipped quotients would not keep A + B inside int32.
    """
    if p.use_float:
        return None
    key = (int(p.a_zp), int(p.b_zp), int(p.left_shift), int(p.a_mult), int(p.a_shift),
           int(p.b_mult), int(p.b_shift), int(p.out_mult), int(p.out_shift), int(p.out_zp),
           int(p.act_min), int(p.act_max))
    tables = _add_tables_of(key)
    return None if tables is None else (tables[0].copy(), tables[1].copy())


@functools.lru_cache(maxsize=4096)
def _add_tables_of(key: tuple) -> tuple[np.ndarray, np.ndarray] | None:
    """add_tables for one set of constants (many Adds of a model share them)."""
    p = SimpleNamespace(**dict(zip(("a_zp", "b_zp", "left_shift", "a_mult", "a_shift",
                                    "b_mult", "b_shift", "out_mult", "out_shift", "out_zp",
                                    "act_min", "act_max"), key, strict=True)))
    s = int(p.out_shift)
    one = 1 << s
    v = _byte_values()
    ra_ = [int(x) for x in mul_shift((v - p.a_zp) << p.left_shift, p.a_mult, p.a_shift)]
    rb_ = [int(x) for x in mul_shift((v - p.b_zp) << p.left_shift, p.b_mult, p.b_shift)]
    a64 = [x * int(p.out_mult) + (one >> 1) + (int(p.out_zp) << s) for x in ra_]
    b64 = [x * int(p.out_mult) for x in rb_]
    qa, ra = zip(*(divmod(x, one) for x in a64), strict=True)
    qb, rb = zip(*(divmod(x, one) for x in b64), strict=True)
    rank = {val: i for i, val in enumerate(sorted(set(ra) | {one - r for r in rb}))}
    lo, hi = int(p.act_min), int(p.act_max)
    qb_min, qb_max = min(qb), max(qb)  # bounds taken once, not per entry
    qa = [min(max(q, lo - qb_max - 2), hi - qb_min + 1) for q in qa]
    qa_min, qa_max = min(qa), max(qa)
    qb = [min(max(q, lo - qa_max - 2), hi - qa_min + 1) for q in qb]
    if max(abs(q) for q in qa + qb) >= 1 << 19:
        return None
    k = 1 << ADD_TABLE_SHIFT
    ta = np.array([q * k + rank[r] for q, r in zip(qa, ra, strict=True)], dtype=np.int64)
    tb = np.array([q * k + k - rank[one - r] for q, r in zip(qb, rb, strict=True)],
                  dtype=np.int64)
    return ta.astype(np.int32), tb.astype(np.int32)


def make_mul_params(a_shape, b_shape, s_a: float, z_a: int, s_b: float, z_b: int, s_y: float,
                    z_y: int, mode: str = "fixed", source_dtype: str = "int8",
                    act_min: int = INT8_MIN, act_max: int = INT8_MAX) -> EltwiseParams:
    """tg_mul params for y = a * b (shapes broadcast as in ONNX)."""
    p = _base_params(a_shape, b_shape, z_a, z_b, z_y, act_min, act_max)
    s_a, s_b, s_y = float(f32(s_a)), float(f32(s_b)), float(f32(s_y))
    if mode == "fixed":
        p.out_mult, p.out_shift = quantize_multiplier(s_a * s_b / s_y)
        return p
    if mode != "float":
        raise ValueError(f"mode must be 'fixed' or 'float', not {mode!r}")
    off = _raw_offset(source_dtype)
    p.use_float, p.raw_offset = 1, off
    p.ab_ratio = float(f32(f32(s_a) * f32(s_b)) / f32(s_y))
    p.bias = float(f32(z_y + off))
    return p


def overlap_margin(p: EltwiseParams) -> int | None:
    """tg_add/tg_mul read element i of a before writing y[i] (tg_eltwise.h): y may start at
    a's start or below it when a is dense with the output's shape; otherwise disjoint."""
    dense = [int(v) for v in p.a_stride] == _dense_strides(p.shape)
    return 0 if dense else None


def _dense_strides(shape) -> list[int]:
    out, acc = [0] * 4, 1
    for i in range(3, -1, -1):
        out[i] = acc if shape[i] != 1 else 0
        acc *= int(shape[i])
    return out


def _gather(p: EltwiseParams, a: np.ndarray, b: np.ndarray):
    """Both inputs expanded to the rank-4 output walk, as int64."""
    idx = np.indices(p.shape, dtype=np.int64)
    ia = sum(idx[i] * p.a_stride[i] for i in range(4))
    ib = sum(idx[i] * p.b_stride[i] for i in range(4))
    a = np.asarray(a, dtype=np.int8).reshape(-1)
    b = np.asarray(b, dtype=np.int8).reshape(-1)
    return a[ia].astype(np.int64), b[ib].astype(np.int64)


def _round_float(p: EltwiseParams, v: np.ndarray) -> np.ndarray:
    lo, hi = f32(p.act_min + p.raw_offset), f32(p.act_max + p.raw_offset)
    v = np.minimum(np.maximum(v.astype(f32), lo), hi)
    return (np.rint(v).astype(np.int64) - p.raw_offset).astype(np.int8).reshape(-1)


def add(p: EltwiseParams, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Flat int8 output of tg_add."""
    av, bv = _gather(p, a, b)
    if p.use_float:
        fa, fb = (av + p.raw_offset).astype(f32), (bv + p.raw_offset).astype(f32)
        if p.a_bcast_inner:
            v = fma_f32(fb, p.b_ratio, fma_f32(fa, p.a_ratio, p.bias))
        else:
            v = fma_f32(fa, p.a_ratio, fma_f32(fb, p.b_ratio, p.bias))
        return _round_float(p, v)
    sa = mul_shift((av - p.a_zp) << p.left_shift, p.a_mult, p.a_shift)
    sb = mul_shift((bv - p.b_zp) << p.left_shift, p.b_mult, p.b_shift)
    y = p.out_zp + mul_shift(sa + sb, p.out_mult, p.out_shift)
    return np.clip(y, p.act_min, p.act_max).astype(np.int8).reshape(-1)


def mul(p: EltwiseParams, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Flat int8 output of tg_mul."""
    av, bv = _gather(p, a, b)
    prod = (av - p.a_zp) * (bv - p.b_zp)
    if p.use_float:
        v = (prod.astype(f32) * f32(p.ab_ratio)).astype(f32) + f32(p.bias)
        return _round_float(p, v)
    y = p.out_zp + mul_shift(prod, p.out_mult, p.out_shift)
    return np.clip(y, p.act_min, p.act_max).astype(np.int8).reshape(-1)
