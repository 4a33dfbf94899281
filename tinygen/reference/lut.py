"""Table lookups, the numpy twin of runtime_c/src/tg_lut.c (contract in tg_lut.h), and the
compile-time builders of the 256-entry tables.

Every table maps an int8 q to
    clamp(round_half_even(f(s_in * (q - z_in)) / s_out) + z_out, act_min, act_max)
and is indexed by the byte of q: table[(uint8)q]. Zero points are int8-domain values (a uint8
tensor and its zero point are both shifted by -128, which leaves q - z_in unchanged).

Two precisions:
  "float64": dequantize, f and the division in float64 - the closest to the real function.
  "float32": the ONNX operator definitions evaluated as onnx.reference does (DequantizeLinear
             (q - z) * s in float32, the op's numpy formula in float32, QuantizeLinear
             rint(v / s) + z); onnxruntime evaluates the piecewise-linear ops the same way.
The default is float32 for the piecewise-linear functions (their float32 value is exactly what
an ONNX runtime computes) and float64 for sigmoid and tanh (numpy's float32 exp/tanh is not the
correctly rounded value, and no runtime agrees with another there anyway).

"tabulated" takes f as 256 float32 values, one per table index, computed elsewhere (the
frontend evaluates a whole float subgraph that way); only the QuantizeLinear step is done here.
"""
from __future__ import annotations

from collections.abc import Callable

import numpy as np

INT8_MIN, INT8_MAX = -128, 127

# q for each table index: index i holds the entry of the int8 whose byte is i.
INDEX_Q = np.arange(256, dtype=np.int64).astype(np.uint8).view(np.int8).astype(np.int64)

LUT_FUNCTIONS = ("identity", "relu", "clip", "sigmoid", "tanh", "hard_sigmoid", "hard_swish",
                 "leaky_relu")
DEFAULT_PRECISION = {"sigmoid": "float64", "tanh": "float64"}  # all others: float32
TABULATED = "tabulated"  # f given as its 256 values (args: values)


def lut(table: np.ndarray, x: np.ndarray) -> np.ndarray:
    """y = table[(uint8)x] elementwise, exactly as tg_lut."""
    table = np.asarray(table, dtype=np.int8)
    if table.shape != (256,):
        raise ValueError(f"a lookup table has 256 entries, not {table.shape}")
    return table[np.asarray(x, dtype=np.int8).view(np.uint8)]


def _sigmoid(x: np.ndarray) -> np.ndarray:
    # The branch form keeps exp() from overflowing for either sign (as onnx.reference does).
    e = np.exp(np.minimum(x, 0))
    return np.where(x > 0, 1 / (1 + np.exp(-np.maximum(x, 0))), e / (1 + e))


def _hard_sigmoid(x: np.ndarray, alpha: float, beta: float) -> np.ndarray:
    a, b = x.dtype.type(alpha), x.dtype.type(beta)
    return np.maximum(0, np.minimum(1, x * a + b))


def _leaky_relu(x: np.ndarray, alpha: float) -> np.ndarray:
    return np.where(x > 0, x, x * x.dtype.type(alpha))


def _function(name: str, args: dict) -> Callable[[np.ndarray], np.ndarray]:
    """The float function `name` with its attributes bound (ONNX defaults when absent)."""
    if name == "identity":
        return lambda x: x
    if name == "relu":
        return lambda x: np.maximum(x, 0)
    if name == "clip":
        lo, hi = args.get("min", -np.inf), args.get("max", np.inf)
        return lambda x: np.minimum(np.maximum(x, x.dtype.type(lo)), x.dtype.type(hi))
    if name == "sigmoid":
        return _sigmoid
    if name == "tanh":
        return np.tanh
    if name == "hard_sigmoid":
        alpha, beta = args.get("alpha", 0.2), args.get("beta", 0.5)
        return lambda x: _hard_sigmoid(x, alpha, beta)
    if name == "hard_swish":
        # ONNX defines HardSwish as x * HardSigmoid(x, alpha=1/6, beta=0.5).
        return lambda x: x * _hard_sigmoid(x, 1 / 6, 0.5)
    if name == "leaky_relu":
        alpha = args.get("alpha", 0.01)
        return lambda x: _leaky_relu(x, alpha)
    if name == TABULATED:
        values = np.asarray(args["values"], dtype=np.float32).reshape(-1)
        if values.shape != (256,):
            raise ValueError(f"a tabulated function has 256 values, not {values.size}")
        return lambda x: values.astype(x.dtype)
    raise ValueError(f"no table builder for {name!r} (known: {', '.join(LUT_FUNCTIONS)})")


def _check_quant(s_in: float, s_out: float) -> None:
    for what, s in (("input", s_in), ("output", s_out)):
        if not (np.isfinite(s) and s > 0):
            raise ValueError(f"{what} scale {s!r} is not a finite positive number")


def build_table(name: str, s_in: float, z_in: int, s_out: float, z_out: int,
                act_min: int = INT8_MIN, act_max: int = INT8_MAX, precision: str | None = None,
                **args) -> np.ndarray:
    """The 256-entry int8 table of function `name` (one of LUT_FUNCTIONS, or TABULATED) for
    tg_lut.

    args are the op's attributes: alpha/beta (hard_sigmoid), alpha (leaky_relu), min/max
    (clip, in real units), values (TABULATED: f at each table index, float32).
    act_min/act_max clamp a fused activation's range (int8 domain).
    """
    _check_quant(s_in, s_out)
    precision = precision or DEFAULT_PRECISION.get(name, "float32")
    if precision not in ("float32", "float64"):
        raise ValueError(f"precision must be 'float32' or 'float64', not {precision!r}")
    fn = _function(name, args)
    ft = np.float32 if precision == "float32" else np.float64
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        x = (INDEX_Q.astype(ft) - ft(z_in)) * ft(s_in)
        v = np.asarray(fn(x), dtype=ft) / ft(s_out)
    # Clamping before the cast keeps huge or infinite values out of the integer conversion.
    v = np.clip(np.nan_to_num(v, nan=0.0), INT8_MIN - z_out - 1, INT8_MAX - z_out + 1)
    q = np.rint(v).astype(np.int64) + z_out
    return np.clip(q, act_min, act_max).astype(np.int8)


def requant_table(s_in: float, z_in: int, s_out: float, z_out: int,
                  act_min: int = INT8_MIN, act_max: int = INT8_MAX,
                  precision: str = "float32") -> np.ndarray:
    """Table of a bare scale/zero-point change (DequantizeLinear then QuantizeLinear)."""
    return build_table("identity", s_in, z_in, s_out, z_out, act_min, act_max, precision)
