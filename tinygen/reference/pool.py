"""Max and average pooling, the numpy twin of runtime_c/src/tg_pool.c (contract in tg_pool.h).

x is [n][in_h][in_w][c] int8 (channels-last), y is [n][out_h][out_w][c] int8. Zero points are
int8-domain values. Average pooling has three modes:

  AVG_FIXED       integer only, one rounding (half towards +infinity) of acc * (s_x/s_y) / count.
  AVG_FLOAT_SUM   integer window sum, v = (float)acc * (s_x / (s_y * (float)count)), clamp,
                  round half even, + zero point: onnxruntime's QLinearGlobalAveragePool (MLAS),
                  which QLinearAveragePool also uses when the window is the whole image without
                  padding.
  AVG_FLOAT_DQ    each tap dequantized to float32 (s_x * (x - z_x)), summed row-major, divided by
                  count, then v / s_y + round_zp rounded half even: onnxruntime's
                  QLinearAveragePool (round_zp = the model's output zero point, uint8 models
                  included) and ONNX DequantizeLinear -> AveragePool -> QuantizeLinear
                  (round_zp = 0: the zero point is added after rounding).
make_avgpool_params picks the mode that reproduces a given runtime.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tinygen.reference.requant import quantize_multiplier

AVG_FIXED, AVG_FLOAT_SUM, AVG_FLOAT_DQ = 0, 1, 2
INT8_MIN, INT8_MAX = -128, 127
f32 = np.float32


@dataclass
class PoolParams:
    """Mirror of tg_pool_params_t (same field names)."""

    n: int
    in_h: int
    in_w: int
    c: int
    out_h: int
    out_w: int
    k_h: int
    k_w: int
    stride_h: int = 1
    stride_w: int = 1
    dil_h: int = 1
    dil_w: int = 1
    pad_top: int = 0
    pad_left: int = 0
    count_include_pad: int = 0
    in_zp: int = 0
    avg_mode: int = AVG_FIXED
    mult: int = 0
    shift: int = 1
    in_scale: float = 0.0
    out_scale: float = 0.0
    round_zp: int = 0
    out_zp: int = 0
    act_min: int = INT8_MIN
    act_max: int = INT8_MAX


def pool_output_size(in_size: int, k: int, stride: int, dil: int, pad_begin: int,
                     pad_end: int, ceil_mode: bool = False) -> int:
    """Output length of one spatial axis (ONNX pooling). With ceil_mode a last window that
    would start in the end padding is dropped, as onnxruntime does."""
    span = dil * (k - 1) + 1
    room = in_size + pad_begin + pad_end - span
    if room < 0:
        raise ValueError(f"pooling window {span} does not fit input {in_size} + padding")
    out = (-(-room // stride) if ceil_mode else room // stride) + 1
    if ceil_mode and (out - 1) * stride >= in_size + pad_begin:
        out -= 1
    return out


def pool_geometry(x_shape: tuple[int, int, int, int], kernel: tuple[int, int],
                  strides: tuple[int, int] = (1, 1), pads: tuple[int, int, int, int] = (0, 0, 0, 0),
                  dilations: tuple[int, int] = (1, 1), ceil_mode: bool = False) -> PoolParams:
    """PoolParams geometry for NHWC x_shape; pads are (top, left, bottom, right)."""
    n, h, w, c = x_shape
    out_h = pool_output_size(h, kernel[0], strides[0], dilations[0], pads[0], pads[2], ceil_mode)
    out_w = pool_output_size(w, kernel[1], strides[1], dilations[1], pads[1], pads[3], ceil_mode)
    return PoolParams(n, h, w, c, out_h, out_w, kernel[0], kernel[1], strides[0], strides[1],
                      dilations[0], dilations[1], pads[0], pads[1])


def is_global_window(p: PoolParams) -> bool:
    """The window is the whole image with no padding (onnxruntime's global-pool fallback)."""
    return (p.k_h, p.k_w) == (p.in_h, p.in_w) and p.out_h == p.out_w == 1 and \
        p.pad_top == p.pad_left == 0


def make_avgpool_params(geometry: PoolParams, s_x: float, z_x: int, s_y: float, z_y: int,
                        count_include_pad: bool = False, mode: str = "fixed",
                        order: str = "qlinear", source_dtype: str = "int8",
                        act_min: int = INT8_MIN, act_max: int = INT8_MAX) -> PoolParams:
    """Average-pool params. mode "fixed" is integer only; mode "float" follows `order`:
    "qlinear" reproduces onnxruntime's QLinearAveragePool / QLinearGlobalAveragePool, "onnx"
    the float graph DequantizeLinear -> AveragePool -> QuantizeLinear. source_dtype is the
    model's tensor type ("uint8" tensors were shifted by -128; the zero point onnxruntime adds
    before rounding is the unshifted one)."""
    p = PoolParams(**{**geometry.__dict__, "count_include_pad": int(bool(count_include_pad)),
                      "in_zp": int(z_x), "out_zp": int(z_y), "act_min": act_min,
                      "act_max": act_max})
    if mode == "fixed":
        p.avg_mode = AVG_FIXED
        p.mult, p.shift = quantize_multiplier(float(f32(s_x)) / float(f32(s_y)))
        return p
    if mode != "float" or order not in ("qlinear", "onnx"):
        raise ValueError(f"unknown average-pool mode {mode!r} / order {order!r}")
    p.in_scale, p.out_scale = float(f32(s_x)), float(f32(s_y))
    if order == "qlinear" and is_global_window(p):
        p.avg_mode = AVG_FLOAT_SUM
    else:
        p.avg_mode = AVG_FLOAT_DQ
        p.round_zp = int(z_y) + (128 if source_dtype == "uint8" else 0) if order == "qlinear" \
            else 0
    return p


def _tap_range(base: int, dil: int, k: int, size: int) -> range:
    """Taps t in the range keep base + t*dil inside [0, size), as tg_pool_tap_range."""
    first = (-base + dil - 1) // dil if base < 0 else 0
    end = k if base + (k - 1) * dil < size else max(0, (size - 1 - base) // dil + 1)
    return range(first, max(first, end))


def _windows(p: PoolParams):
    """(oy, ox, valid ky range, valid kx range, input rows base, input cols base) per output."""
    for oy in range(p.out_h):
        by = oy * p.stride_h - p.pad_top
        kys = _tap_range(by, p.dil_h, p.k_h, p.in_h)
        for ox in range(p.out_w):
            bx = ox * p.stride_w - p.pad_left
            yield oy, ox, kys, _tap_range(bx, p.dil_w, p.k_w, p.in_w), by, bx


def _taps(p: PoolParams, x: np.ndarray, kys: range, kxs: range, by: int, bx: int):
    """The valid taps of one window, row-major, each [n][c]."""
    for ky in kys:
        for kx in kxs:
            yield x[:, by + ky * p.dil_h, bx + kx * p.dil_w, :]


def maxpool(p: PoolParams, x: np.ndarray) -> np.ndarray:
    """tg_maxpool: clamp(max over valid taps); a window without valid taps gives act_min."""
    x = np.asarray(x, dtype=np.int8).reshape(p.n, p.in_h, p.in_w, p.c)
    y = np.full((p.n, p.out_h, p.out_w, p.c), p.act_min, dtype=np.int64)
    for oy, ox, kys, kxs, by, bx in _windows(p):
        taps = list(_taps(p, x, kys, kxs, by, bx))
        if taps:
            y[:, oy, ox, :] = np.clip(np.max(taps, axis=0), p.act_min, p.act_max)
    return y.astype(np.int8)


def fixed_average(acc: np.ndarray, count: int, mult: int, shift: int) -> np.ndarray:
    """floor((acc*mult + count*2^(shift-1)) / (count*2^shift)) in int64 without overflow."""
    prod = np.asarray(acc, dtype=np.int64) * np.int64(mult)
    q = prod >> np.int64(shift)
    r = prod & np.int64((1 << shift) - 1)
    t = q + count // 2 + ((count & 1) & (r >= (1 << (shift - 1)))).astype(np.int64)
    return t // count


def _round_out(v: np.ndarray, p: PoolParams, round_zp: int) -> np.ndarray:
    lo, hi = f32(p.act_min - p.out_zp + round_zp), f32(p.act_max - p.out_zp + round_zp)
    v = np.minimum(np.maximum(v.astype(f32), lo), hi)
    return np.rint(v).astype(np.int64) + p.out_zp - round_zp


def _average(p: PoolParams, taps: list[np.ndarray], count: int) -> np.ndarray:
    """One window's int8-domain output [n][c] (before the int8 cast)."""
    if p.avg_mode == AVG_FLOAT_DQ:
        acc = np.zeros((p.n, p.c), dtype=f32)
        for t in taps:  # one float32 rounding per product and per sum, tap order
            acc = (acc + f32(p.in_scale) * (t.astype(np.int64) - p.in_zp).astype(f32)).astype(f32)
        v = (acc / f32(max(count, 1))).astype(f32) / f32(p.out_scale) + f32(p.round_zp)
        return _round_out(v.astype(f32), p, p.round_zp)
    acc = np.zeros((p.n, p.c), dtype=np.int64)
    for t in taps:
        acc += t.astype(np.int64) - p.in_zp
    if p.avg_mode == AVG_FLOAT_SUM:
        scale = f32(p.in_scale) / (f32(p.out_scale) * f32(max(count, 1)))
        return _round_out(acc.astype(f32) * f32(scale), p, 0)
    avg = fixed_average(acc, count, p.mult, p.shift) if count > 0 else np.zeros_like(acc)
    return np.clip(p.out_zp + avg, p.act_min, p.act_max)


def avgpool(p: PoolParams, x: np.ndarray) -> np.ndarray:
    """tg_avgpool in p.avg_mode; a window without valid taps gives out_zp."""
    if p.avg_mode not in (AVG_FIXED, AVG_FLOAT_SUM, AVG_FLOAT_DQ):
        raise ValueError(f"unknown avg_mode {p.avg_mode}")
    x = np.asarray(x, dtype=np.int8).reshape(p.n, p.in_h, p.in_w, p.c)
    y = np.zeros((p.n, p.out_h, p.out_w, p.c), dtype=np.int64)
    for oy, ox, kys, kxs, by, bx in _windows(p):
        count = p.k_h * p.k_w if p.count_include_pad else len(kys) * len(kxs)
        y[:, oy, ox, :] = _average(p, list(_taps(p, x, kys, kxs, by, bx)), count)
    return y.astype(np.int8)
