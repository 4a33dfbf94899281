"""Concat, Transpose and Pad, the numpy twin of runtime_c/src/tg_shape.c (contract in
tg_shape.h). Tensors are int8 in storage order.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tinygen.reference.lut import requant_table

MAX_RANK = 6


@dataclass
class ConcatParams:
    """Mirror of tg_concat_params_t: the output is [outer][sum(part_inner)] bytes.

    tables holds one 256-entry int8 table per part (None: plain copy); the list itself may be
    None when no part is requantized.
    """

    outer: int
    parts: int
    part_inner: list[int]
    tables: list[np.ndarray | None] | None = None


@dataclass
class TransposeParams:
    """Mirror of tg_transpose_params_t: perm[i] is the input axis of output axis i."""

    rank: int
    in_shape: list[int]
    perm: list[int]


@dataclass
class PadParams:
    """Mirror of tg_pad_params_t: constant padding with pads >= 0 on each axis."""

    rank: int
    in_shape: list[int]
    pads_before: list[int]
    pads_after: list[int]
    value: int = 0
    out_shape: list[int] = field(init=False)

    def __post_init__(self):
        self.out_shape = [d + b + a for d, b, a in
                          zip(self.in_shape, self.pads_before, self.pads_after, strict=True)]


def _check_rank(rank: int) -> None:
    if not 0 <= rank <= MAX_RANK:
        raise ValueError(f"rank {rank} is outside 0..{MAX_RANK}")


def concat_params(part_shapes: list[tuple[int, ...]], axis: int,
                  tables: list[np.ndarray | None] | None = None) -> ConcatParams:
    """ConcatParams for joining tensors of `part_shapes` (storage order) along `axis`."""
    rank = len(part_shapes[0])
    axis = axis + rank if axis < 0 else axis
    for s in part_shapes:
        if len(s) != rank or any(s[i] != part_shapes[0][i] for i in range(rank) if i != axis):
            raise ValueError(f"concat parts {part_shapes} differ off axis {axis}")
    outer = int(np.prod(part_shapes[0][:axis], dtype=np.int64))
    inner = [int(np.prod(s[axis:], dtype=np.int64)) for s in part_shapes]
    if tables is not None and all(t is None for t in tables):
        tables = None
    return ConcatParams(outer, len(part_shapes), inner, tables)


def concat_tables(part_quant: list[tuple[float, int]], out_quant: tuple[float, int]
                  ) -> list[np.ndarray | None]:
    """Per-part requantization tables (None where a part already has the output's scale
    and zero point), float32 DequantizeLinear -> QuantizeLinear order."""
    s_out, z_out = out_quant
    return [None if (np.float32(s) == np.float32(s_out) and z == z_out)
            else requant_table(s, z, s_out, z_out) for s, z in part_quant]


def concat(p: ConcatParams, parts: list[np.ndarray]) -> np.ndarray:
    """Flat int8 output of tg_concat for flat (or any-shaped, contiguous) parts."""
    rows = []
    for i, part in enumerate(parts):
        block = np.asarray(part, dtype=np.int8).reshape(p.outer, p.part_inner[i])
        table = p.tables[i] if p.tables is not None else None
        if table is not None:
            block = np.asarray(table, dtype=np.int8)[block.view(np.uint8)]
        rows.append(block)
    return np.concatenate(rows, axis=1).reshape(-1)


def transpose(p: TransposeParams, x: np.ndarray) -> np.ndarray:
    """Output of tg_transpose with shape in_shape[perm]."""
    _check_rank(p.rank)
    if sorted(p.perm[:p.rank]) != list(range(p.rank)):
        raise ValueError(f"perm {p.perm} is not a permutation of rank {p.rank}")
    x = np.asarray(x, dtype=np.int8).reshape(p.in_shape[:p.rank])
    return np.ascontiguousarray(np.transpose(x, p.perm[:p.rank]))


def pad(p: PadParams, x: np.ndarray) -> np.ndarray:
    """Output of tg_pad with shape out_shape."""
    _check_rank(p.rank)
    if min([*p.pads_before, *p.pads_after], default=0) < 0:
        raise ValueError("negative pads (cropping) are not a pad")
    x = np.asarray(x, dtype=np.int8).reshape(p.in_shape[:p.rank])
    widths = list(zip(p.pads_before[:p.rank], p.pads_after[:p.rank], strict=True))
    return np.pad(x, widths, mode="constant", constant_values=np.int8(p.value))
