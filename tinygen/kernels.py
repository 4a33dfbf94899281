"""The kernel table: each C kernel beside its numpy twin, and how to call both.

A `KernelCall` (passes/params.py) names a C function; this table says which runtime file
family it lives in, its params struct type and the reference function that computes the
same thing. Adding an op means adding one row here (see DEVELOPERS.md).
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from tinygen.reference import conv as ref_conv
from tinygen.reference import dwconv as ref_dwconv
from tinygen.reference import eltwise as ref_eltwise
from tinygen.reference import fc as ref_fc
from tinygen.reference import lut as ref_lut
from tinygen.reference import pool as ref_pool
from tinygen.reference import pwconv as ref_pwconv
from tinygen.reference import shape as ref_shape
from tinygen.reference import softmax as ref_softmax


def no_scratch(params) -> int:
    return 0


def no_overlap(params) -> int | None:
    return None


@dataclass(frozen=True)
class Kernel:
    """One C kernel and its numpy twin, and the facts the planner and codegen need.

    rows: a spatial kernel called as f(p, inputs..., y, scratch, row0, row1) on output rows
    [row0, row1), with p.x_ring / p.y_ring (DEVELOPERS.md, "Kernel calls"); otherwise the
    call is f(p, inputs..., y). scratch_bytes(params): arena bytes the call needs as
    `scratch` (4-byte aligned; 0: it gets NULL). overlap_margin(params): None when y and
    input 0 must be disjoint, else d: every placement with y_start <= x_start + d is safe.
    access_steps(params): (last_read per byte of input 0, written_at per output byte), the
    step model behind overlap_margin (None: the kernel declares no overlap).
    """

    family: str  # runtime_c/src/tg_<family>.c and include/tg_<family>.h
    struct: str | None  # C params struct type
    reference: Callable  # reference(params, *arrays) -> output array
    input_shapes: Callable | None = None  # params -> shapes the reference wants per input
    rows: bool = False
    scratch_bytes: Callable[[object], int] = no_scratch
    overlap_margin: Callable[[object], int | None] = no_overlap
    access_steps: Callable | None = None


def _conv_ref(fn):
    def run(p, x, w, bias):
        x = x.reshape(p.n, p.in_h, p.in_w, p.in_c)
        w = w.reshape(p.out_c, p.k_h, p.k_w, p.in_c // p.groups)
        return fn(x, w, bias, p)
    return run


def _fc_ref(p, x, w, bias):
    """With a pack, tg_fc's w and bias arguments are NULL; the reference takes p.w, p.bias."""
    if p.pack is not None:
        w, bias = p.w, p.bias
    return ref_fc.fc(x.reshape(p.rows, p.depth), w, bias, p)


def _pwconv_ref(p, x):
    """tg_pwconv reads its weights from p.pack; the reference takes p.w and p.bias."""
    return ref_pwconv.pwconv(x.reshape(p.n, p.in_h, p.in_w, p.in_c), p.w, p.bias, p)


def _dwconv_ref(p, x):
    """tg_dwconv reads its weights from p.pack; the reference takes p.w and p.bias."""
    return ref_dwconv.dwconv(x.reshape(p.n, p.in_h, p.in_w, p.in_c), p.w, p.bias, p)


def _elementwise_steps(p, *_):
    """Element i read and written at step i (tg_lut, tg_add/tg_mul with dense inputs)."""
    n = int(np.prod(p.shape)) if hasattr(p, "shape") else int(p.count)
    steps = np.arange(n, dtype=np.int64)
    return steps, steps.copy()


KERNELS: dict[str, Kernel] = {
    "tg_conv": Kernel("conv", "tg_conv_params_t", lambda p, x: _conv_ref(ref_conv.conv)(
        p, x, p.w, p.bias), rows=True, scratch_bytes=ref_conv.conv_scratch_bytes),
    "tg_pwconv": Kernel("pwconv", "tg_pwconv_params_t", _pwconv_ref, rows=True,
                        scratch_bytes=ref_pwconv.scratch_bytes,
                        overlap_margin=ref_pwconv.overlap_margin,
                        access_steps=ref_pwconv.access_steps),
    "tg_dwconv": Kernel("dwconv", "tg_dwconv_params_t", _dwconv_ref, rows=True,
                        scratch_bytes=ref_dwconv.scratch_bytes),
    "tg_fc": Kernel("fc", "tg_fc_params_t", _fc_ref),
    "tg_maxpool": Kernel("pool", "tg_pool_params_t", lambda p, x: ref_pool.maxpool(
        p, x.reshape(p.n, p.in_h, p.in_w, p.c))),
    "tg_avgpool": Kernel("pool", "tg_pool_params_t", lambda p, x: ref_pool.avgpool(
        p, x.reshape(p.n, p.in_h, p.in_w, p.c))),
    "tg_add": Kernel("eltwise", "tg_eltwise_params_t", ref_eltwise.add,
                     overlap_margin=ref_eltwise.overlap_margin, access_steps=_elementwise_steps),
    "tg_mul": Kernel("eltwise", "tg_eltwise_params_t", ref_eltwise.mul,
                     overlap_margin=ref_eltwise.overlap_margin, access_steps=_elementwise_steps),
    "tg_softmax": Kernel("softmax", "tg_softmax_params_t", ref_softmax.softmax),
    "tg_softmax_float": Kernel("softmax", "tg_softmax_float_params_t",
                               ref_softmax.softmax_float),
    "tg_lut": Kernel("lut", None, lambda p, x: ref_lut.lut(p.table, x),
                     overlap_margin=lambda p: 0, access_steps=_elementwise_steps),
    "tg_concat": Kernel("shape", "tg_concat_params_t",
                        lambda p, *parts: ref_shape.concat(p, list(parts))),
    "tg_transpose": Kernel("shape", "tg_transpose_params_t", ref_shape.transpose),
    "tg_pad": Kernel("shape", "tg_pad_params_t", ref_shape.pad),
}


def register(func: str, kernel: Kernel) -> None:
    KERNELS[func] = kernel


def as_int8(a) -> np.ndarray:
    return np.asarray(a).astype(np.int8)
