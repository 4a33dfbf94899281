"""Row-range calls and ring buffers of the spatial kernels (DEVELOPERS.md, "Kernel calls").

A spatial kernel computes output rows [row0, row1) of its output image; its input and its
output may each be held as a ring of R rows (row r at (r mod R) * row_bytes) instead of the
whole tensor. `run_rows` runs a whole-tensor numpy reference on exactly the input rows such
a call reads, taken from the ring, and writes the rows it makes into the output ring, so the
reference and the C agree call by call.
"""
from __future__ import annotations

from dataclasses import fields, replace

import numpy as np


def ring_index(row: int, ring: int) -> int:
    """Where row `row` lives in a buffer of `ring` rows (0: the whole tensor)."""
    return row % ring if ring else row


def input_rows(p, row0: int, row1: int) -> tuple[int, int, int]:
    """(first, end, top) for output rows [row0, row1): the input rows [first, end) the taps
    read (clipped to the image) and the input row `top` of the first tap row of row0."""
    k_h, dil_h = getattr(p, "k_h", 1), getattr(p, "dil_h", 1)
    top = row0 * p.stride_h - getattr(p, "pad_top", 0)
    bottom = (row1 - 1) * p.stride_h - getattr(p, "pad_top", 0) + (k_h - 1) * dil_h + 1
    return max(top, 0), min(bottom, p.in_h), top


def run_rows(dense, p, x_buf: np.ndarray, others: list, y_buf: np.ndarray, row0: int,
             row1: int, in_c: int, out_c: int) -> np.ndarray:
    """Run dense(params, x, *others) -> [n][out_h][out_w][out_c] for output rows [row0, row1)
    with x read from x_buf (p.x_ring rows, or all) and the rows written into y_buf (p.y_ring
    rows, or all); returns y_buf. x_buf/y_buf are flat arrays of the buffers' elements."""
    if not 0 <= row0 < row1 <= p.out_h:
        raise ValueError(f"rows [{row0}, {row1}) outside the output's {p.out_h}")
    whole = (row0, row1) == (0, p.out_h) and not p.x_ring and not p.y_ring
    if whole:
        x = np.asarray(x_buf).reshape(p.n, p.in_h, p.in_w, in_c)
        y = dense(p, x, *others)
        y_buf[...] = np.asarray(y).reshape(y_buf.shape)
        return y_buf
    if p.n != 1:
        raise ValueError("a row range or a ring needs n == 1")
    first, end, top = input_rows(p, row0, row1)
    x_rows = np.asarray(x_buf).reshape(-1, p.in_w * in_c)
    taken = [x_rows[ring_index(r, p.x_ring)] for r in range(first, end)]
    x = np.stack(taken).reshape(1, end - first, p.in_w, in_c) if taken else \
        np.zeros((1, 0, p.in_w, in_c), dtype=x_buf.dtype)
    sub = replace(p, in_h=end - first, out_h=row1 - row0, x_ring=0, y_ring=0)
    if "pad_top" in {f.name for f in fields(p)}:
        sub = replace(sub, pad_top=first - top)
    y = np.asarray(dense(sub, x, *others)).reshape(row1 - row0, -1)
    y_rows = y_buf.reshape(-1, p.out_w * out_c)
    for i, r in enumerate(range(row0, row1)):
        y_rows[ring_index(r, p.y_ring)] = y[i]
    return y_buf


def run_bands(layers: list, x_buf: np.ndarray, ring_bufs: list[np.ndarray],
              y_buf: np.ndarray, rows: list[list[tuple[int, int]]]) -> np.ndarray:
    """A streamed run as the emitted band loop makes it: per band, layer i computes its rows
    rows[band][i] (skipped when empty) from its input (x_buf for the first layer, else ring
    i-1) into its output (ring i, y_buf for the last). layers[i] = (dense, params, others,
    in_c, out_c) as run_rows takes them, params carrying the ring sizes. Returns y_buf."""
    bufs = [x_buf, *ring_bufs, y_buf]
    for band in rows:
        for i, ((dense, p, others, in_c, out_c), (row0, row1)) in enumerate(
                zip(layers, band, strict=True)):
            if row1 > row0:
                run_rows(dense, p, bufs[i], others, bufs[i + 1], row0, row1, in_c, out_c)
    return y_buf
