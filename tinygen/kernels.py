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
from tinygen.reference import eltwise as ref_eltwise
from tinygen.reference import fc as ref_fc
from tinygen.reference import lut as ref_lut
from tinygen.reference import pool as ref_pool
from tinygen.reference import shape as ref_shape
from tinygen.reference import softmax as ref_softmax


@dataclass(frozen=True)
class Kernel:
    family: str  # runtime_c/src/tg_<family>.c and include/tg_<family>.h
    struct: str | None  # C params struct type
    reference: Callable  # reference(params, *arrays) -> output array
    input_shapes: Callable | None = None  # params -> shapes the reference wants per input


def _conv_ref(fn):
    def run(p, x, w, bias):
        x = x.reshape(p.n, p.in_h, p.in_w, p.in_c)
        w = w.reshape(p.out_c, p.k_h, p.k_w, p.in_c // p.groups)
        return fn(x, w, bias, p)
    return run


def _fc_ref(p, x, w, bias):
    return ref_fc.fc(x.reshape(p.rows, p.depth), w, bias, p)


KERNELS: dict[str, Kernel] = {
    "tg_conv": Kernel("conv", "tg_conv_params_t", _conv_ref(ref_conv.conv)),
    "tg_dwconv": Kernel("conv", "tg_conv_params_t", _conv_ref(ref_conv.dwconv)),
    "tg_fc": Kernel("fc", "tg_fc_params_t", _fc_ref),
    "tg_maxpool": Kernel("pool", "tg_pool_params_t", lambda p, x: ref_pool.maxpool(
        p, x.reshape(p.n, p.in_h, p.in_w, p.c))),
    "tg_avgpool": Kernel("pool", "tg_pool_params_t", lambda p, x: ref_pool.avgpool(
        p, x.reshape(p.n, p.in_h, p.in_w, p.c))),
    "tg_add": Kernel("eltwise", "tg_eltwise_params_t", ref_eltwise.add),
    "tg_mul": Kernel("eltwise", "tg_eltwise_params_t", ref_eltwise.mul),
    "tg_softmax": Kernel("softmax", "tg_softmax_params_t", ref_softmax.softmax),
    "tg_softmax_float": Kernel("softmax", "tg_softmax_float_params_t",
                               ref_softmax.softmax_float),
    "tg_lut": Kernel("lut", None, lambda p, x: ref_lut.lut(p.table, x)),
    "tg_concat": Kernel("shape", "tg_concat_params_t",
                        lambda p, *parts: ref_shape.concat(p, list(parts))),
    "tg_transpose": Kernel("shape", "tg_transpose_params_t", ref_shape.transpose),
    "tg_pad": Kernel("shape", "tg_pad_params_t", ref_shape.pad),
}


def register(func: str, kernel: Kernel) -> None:
    KERNELS[func] = kernel


def as_int8(a) -> np.ndarray:
    return np.asarray(a).astype(np.int8)
