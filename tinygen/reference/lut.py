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

A third precision, "onnxruntime" (`--tables onnxruntime`), exists for sigmoid and tanh only: the
dequantized input in float32, then the rational approximation onnxruntime's CPU provider
evaluates on x86-64 (odd polynomial over even polynomial in x^2, each step a float32 fused
multiply-add, the input clamped to +-18 for sigmoid and +-9 for tanh, sigmoid as 0.5 + p/q
clamped to [0, 1]), then QuantizeLinear in float32. The coefficients are onnxruntime's (from
memory), confirmed by measurement: tests/runtime_c/test_lut.py feeds all 256 inputs of
random scales through onnxruntime 1.32 (QLinearSigmoid, and DequantizeLinear -> Sigmoid/Tanh ->
QuantizeLinear) and requires every entry equal. The approximation is within ~1e-7 of the
function, so these tables differ from the float64 ones only where a value sits that close to a
rounding boundary (1 entry in ~400,000 measured).
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

ORT_APPROXIMATED = ("sigmoid", "tanh")  # what precision "onnxruntime" changes


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


# The rational approximations (see the module docstring): clamp range, then the numerator's
# coefficients from the highest power of x^2 down, then the denominator's.
ORT_SIGMOID = ((-18.0, 18.0), (4.37031012579801e-11, 1.15627324459942e-07,
                               6.08574864600143e-05, 8.51377133304701e-03,
                               2.48287947061529e-01),
               (6.10247389755681e-13, 5.76102136993427e-09, 6.29106785017040e-06,
                1.70198817374094e-03, 1.16817656904453e-01, 9.93151921023180e-01))
ORT_TANH = ((-9.0, 9.0), (-2.76076847742355e-16, 2.00018790482477e-13, -8.60467152213735e-11,
                          5.12229709037114e-08, 1.48572235717979e-05, 6.37261928875436e-04,
                          4.89352455891786e-03),
            (1.19825839466702e-06, 1.18534705686654e-04, 2.26843463243900e-03,
             4.89352518554385e-03))


def _fma32(a: np.ndarray, b: np.ndarray, c: np.ndarray) -> np.ndarray:
    """float32 a*b + c with one rounding (a hardware fused multiply-add), elementwise.

    a*b of two float32 is exact in float64; the float64 sum s and its exact error (TwoSum)
    give a + b*c exactly as s + err. float32(s) is the correct rounding unless s sits exactly
    halfway between two float32 values, where the sign of err decides.
    """
    p = a.astype(np.float64) * b.astype(np.float64)
    c64 = c.astype(np.float64)
    s = p + c64
    bp = s - c64
    err = (p - bp) + (c64 - (s - bp))
    r = s.astype(np.float32)
    up = r.astype(np.float64) > s
    lo = np.where(up, np.nextafter(r, np.float32(-np.inf)), r)
    hi = np.where(up, r, np.nextafter(r, np.float32(np.inf)))
    mid = (lo.astype(np.float64) + hi.astype(np.float64)) / 2
    tie = (s == mid) & (err != 0)
    return np.where(tie, np.where(err > 0, hi, lo), r).astype(np.float32)


def _rational32(x: np.ndarray, consts) -> np.ndarray:
    """p(x)/q(x) in float32 as the approximation evaluates it (fused multiply-adds)."""
    (lo, hi), num, den = consts
    x = np.clip(np.asarray(x, np.float32), np.float32(lo), np.float32(hi))
    x2 = x * x
    p = np.full_like(x, np.float32(num[0]))
    for coef in num[1:]:
        p = _fma32(p, x2, np.full_like(x, np.float32(coef)))
    p = p * x
    q = np.full_like(x, np.float32(den[0]))
    for coef in den[1:]:
        q = _fma32(q, x2, np.full_like(x, np.float32(coef)))
    return (p / q).astype(np.float32)


def _ort_function(name: str) -> Callable[[np.ndarray], np.ndarray]:
    if name == "sigmoid":
        return lambda x: np.clip(_rational32(x, ORT_SIGMOID) + np.float32(0.5),
                                 np.float32(0), np.float32(1))
    if name == "tanh":
        return lambda x: _rational32(x, ORT_TANH)
    raise ValueError(f"no onnxruntime approximation for {name!r} (only sigmoid and tanh)")


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
    if precision == "onnxruntime" and name not in ORT_APPROXIMATED:
        precision = "float32"  # its piecewise-linear ops are the float32 formulas themselves
    if precision not in ("float32", "float64", "onnxruntime"):
        raise ValueError(f"precision must be 'float32', 'float64' or 'onnxruntime', not "
                         f"{precision!r}")
    fn = _ort_function(name) if precision == "onnxruntime" else _function(name, args)
    ft = np.float64 if precision == "float64" else np.float32
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
