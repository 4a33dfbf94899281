"""The compile-time pack of the blocked matrix core (runtime_c/include/tg_mat.h) that
tg_pwconv and tg_conv read instead of their int8 weights and int32 bias.

The kernels' numpy twins (pwconv.py, conv.py) compute the contract from the weights
themselves, so a wrong pack shows as a difference between C and reference.
"""
from __future__ import annotations

import numpy as np

from tinygen.reference.requant import FORM_FAST, Requant

LANES = (0, 2, 1, 3)  # element order of a group of four in two int16-pair words (SXTB16's)


def record_words(k_len: int) -> int:
    """int32 words of one channel pair's record (tg_mat_record_words)."""
    return 4 + 4 * ((k_len + 3) // 4) + 6


def pack_matrix(w: np.ndarray, bias: np.ndarray | None, w_zp: np.ndarray | None,
                rq: Requant | None, groups: int = 1) -> np.ndarray:
    """The pack of weight rows w [out_c][k_len] (rows of group g are g*out_c/groups on).

    Per group, one record per channel pair c0 = 2j, c1 = 2j + 1 (a missing last c1 is all
    zero): bias[c0], bias[c1], bias[c0], bias[c1]; per group of four inputs k..k+3 the
    int16 pairs (w'[k], w'[k+2]), (w'[k+1], w'[k+3]) of c0, then of c1, w' = w - w_zp,
    low half first, zero past k_len; then mult, add, r of c0 and c1 when rq's form is
    TG_RQ_FAST (else zeros). Choose rq's form first (choose_form): its constants are copied.
    """
    w = np.asarray(w, dtype=np.int64)
    out_c, k_len = w.shape
    per = out_c // groups
    quads, pairs = (k_len + 3) // 4, (per + 1) // 2
    wz = np.zeros(out_c, np.int64) if w_zp is None else np.asarray(w_zp, np.int64).reshape(-1)
    b = np.zeros(out_c, np.int64) if bias is None else np.asarray(bias, np.int64).reshape(-1)
    # the record words below wrap to int32 on purpose (bit patterns); a bias must not
    if b.size and (b.min() < -2**31 or b.max() > 2**31 - 1):
        raise ValueError("bias outside int32 cannot be packed")
    chan = np.zeros((out_c, 3), np.int64)
    if rq is not None and rq.form == FORM_FAST and rq.chan is not None:
        chan = np.asarray(rq.chan, dtype=np.int64).reshape(out_c, 3)
    records = []
    for g in range(groups):
        rows = slice(g * per, (g + 1) * per)
        wg = np.zeros((2 * pairs, 4 * quads), dtype=np.int64)
        wg[:per, :k_len] = w[rows] - wz[rows, None]
        lanes = wg.reshape(pairs, 2, quads, 4)[..., list(LANES)]
        halves = lanes.transpose(0, 2, 1, 3).reshape(pairs, 4 * quads, 2)  # [pair][word][lo, hi]
        words = (halves[..., 0] & 0xFFFF) | (halves[..., 1] << 16)
        bg = np.zeros(2 * pairs, np.int64)
        bg[:per] = b[rows]
        bg = bg.reshape(pairs, 2)
        cg = np.zeros((2 * pairs, 3), np.int64)
        cg[:per] = chan[rows]
        records.append(np.concatenate([bg, bg, words, cg.reshape(pairs, 6)], axis=1))
    rec = np.concatenate(records, axis=0)
    assert rec.shape[1] == record_words(k_len)
    return ((rec.reshape(-1) + 2**31) % 2**32 - 2**31).astype(np.int32)
