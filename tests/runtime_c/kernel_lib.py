"""Build runtime_c kernels into a host shared library once per session and marshal arguments.

    ffi, lib = kernel_lib(["tg_conv.c"], REQUANT_CDEF + CONV_CDEF)

Sources are names under runtime_c/src; the library is compiled with the strict warning set
and TG_WITH_FLOAT_REQUANT=1, so both requant modes are reachable (rq->scale selects float).
"""
from __future__ import annotations

import atexit
import functools
import shutil
from pathlib import Path

import numpy as np

from tinygen.harness import cbuild
from tinygen.reference.requant import Requant

ROOT = Path(__file__).resolve().parents[2]
RUNTIME_SRC = ROOT / "runtime_c" / "src"
RUNTIME_INCLUDE = ROOT / "runtime_c" / "include"
HOST_DEFINES = {"TG_WITH_FLOAT_REQUANT": "1"}

# tg_requant.h, field for field.
REQUANT_CDEF = """
typedef struct {
    const int32_t *mult;
    const int8_t *shift;
    const float *scale;
    int32_t out_zp;
    int32_t act_min;
    int32_t act_max;
} tg_requant_t;
"""


@functools.lru_cache(maxsize=1)
def _build_dir() -> Path:
    path = cbuild.scratch_dir("tinygen-kernels-")
    atexit.register(shutil.rmtree, path, True)
    return path


@functools.cache
def _load(sources: tuple[str, ...], cdef: str):
    lib_path = cbuild.build_shared([RUNTIME_SRC / s for s in sources], [RUNTIME_INCLUDE],
                                   _build_dir(), defines=HOST_DEFINES)
    return cbuild.load(cdef, lib_path)


def kernel_lib(sources: list[str], cdef: str):
    """(ffi, lib) for runtime_c/src `sources` declared by `cdef`; built once per session."""
    return _load(tuple(sources), cdef)


def pick_zero_point(rng) -> int:
    """An int8-domain zero point: the extremes -128 / 127 half of the time, else any."""
    return int(rng.choice([-128, 127, int(rng.integers(-128, 128))]))


def to_int8_domain(q: np.ndarray, zp) -> tuple[np.ndarray, np.ndarray]:
    """uint8 data with zero point z equals int8 data q - 128 with zero point z - 128."""
    if q.dtype == np.uint8:
        return ((q.astype(np.int16) - 128).astype(np.int8),
                np.asarray(zp, dtype=np.int32) - 128)
    return q, np.asarray(zp, dtype=np.int32)


class Marshal:
    """Turns numpy arrays and Requant into cffi pointers, keeping every buffer alive."""

    def __init__(self, ffi):
        self.ffi = ffi
        self._keep: list[object] = []

    def array(self, values, dtype, ctype: str):
        """Pointer to a C-contiguous copy of `values` as `dtype`, typed `ctype *`."""
        arr = np.ascontiguousarray(values, dtype=dtype)
        self._keep.append(arr)
        return self.ffi.cast(f"{ctype} *", self.ffi.from_buffer(arr))

    def optional_array(self, values, dtype, ctype: str):
        return self.ffi.NULL if values is None else self.array(values, dtype, ctype)

    def output(self, shape, dtype) -> tuple[np.ndarray, object]:
        """A zero-filled result array and a void pointer to it."""
        out = np.zeros(shape, dtype=dtype)
        self._keep.append(out)
        return out, self.ffi.cast("void *", self.ffi.from_buffer(out))

    def requant(self, rq: Requant | None):
        """tg_requant_t * for rq (NULL for None); float mode leaves mult/shift NULL."""
        if rq is None:
            return self.ffi.NULL
        c = self.ffi.new("tg_requant_t *")
        self._keep.append(c)
        c.mult = self.optional_array(rq.mult, np.int32, "int32_t")
        c.shift = self.optional_array(rq.shift, np.int8, "int8_t")
        c.scale = self.optional_array(rq.scale, np.float32, "float")
        c.out_zp, c.act_min, c.act_max = rq.out_zp, rq.act_min, rq.act_max
        return c

    def struct(self, ctype: str, **fields):
        """A new `ctype` struct with the given fields set."""
        c = self.ffi.new(f"{ctype} *")
        self._keep.append(c)
        for name, value in fields.items():
            setattr(c, name, value)
        return c
