"""The compile-time pack of the blocked matrix core (runtime_c/include/tg_mat.h) that
tg_pwconv and tg_conv read instead of their int8 weights and int32 bias.

The kernels' numpy twins (pwconv.py, conv.py) compute the contract from the weights
themselves, so a wrong pack shows as a difference between C and reference.
"""
from __future__ import annotations

import numpy as np

from tinygen.reference.requant import FORM_FAST, INT32_MAX, Requant

LANES = (0, 2, 1, 3)  # element order of a group of four in two int16-pair words (SXTB16's)
FIXED_R = 11         # TG_MAT_R: the final shift of a prescaled pack (an SSAT immediate)
PRESCALED = 256      # TG_MAT_PRESCALED: flag beside r in a prescaled record's r words
MAX_PRESCALE = 7     # (w - w_zp) * 2^7 still fits int16 for |w - w_zp| <= 255


def record_words(k_len: int) -> int:
    """int32 words of one channel pair's record (tg_mat_record_words)."""
    return 4 + 4 * ((k_len + 3) // 4) + 6


def prescaled_constants(w: np.ndarray, bias: np.ndarray, rq: Requant | None):
    """Per channel (p, mult, add) of a prescaled pack, or None when some channel cannot have it.

    Channel c's weights and bias are stored times 2^p_c, p_c = FIXED_R + 32 - shift_c in
    [0, 7], so its sum is acc * 2^p_c and every channel ends in the same shift FIXED_R:
    floor((acc*mult + 2^(shift-1)) / 2^shift) + zp
      = floor((hi32((acc << p) * mult) + 2^(R-1) + zp*2^R) / 2^R)      (shift + p = 32 + R)
    as for TG_RQ_FAST (requant.fast_form: numerator and denominator times 2^p, floor
    divisions compose). The int32 arithmetic is checked against the channel's own bound
    |bias| + 255 * sum |w - w_zp| (|x - in_zp| <= 255): acc << p and the high-word sum.
    A zero multiplier gives zp whatever the sum (p = 0).
    """
    if rq is None or rq.is_float:
        return None
    mult = np.asarray(rq.mult, dtype=np.int64).reshape(-1)
    shift = np.asarray(rq.shift, dtype=np.int64).reshape(-1)
    if mult.size == 1 and w.shape[0] > 1:
        mult, shift = np.repeat(mult, w.shape[0]), np.repeat(shift, w.shape[0])
    add = (1 << (FIXED_R - 1)) + (int(rq.out_zp) << FIXED_R)
    out = []
    for c in range(w.shape[0]):
        m, s = int(mult[c]), int(shift[c])
        pc = FIXED_R + 32 - s if m else 0
        if not 0 <= pc <= MAX_PRESCALE:
            return None
        bound = (abs(int(bias[c])) + 255 * int(np.abs(w[c]).sum())) << pc
        if bound > INT32_MAX or ((bound * m) >> 32) + add > INT32_MAX \
                or ((-bound * m) >> 32) + add < -INT32_MAX - 1:
            return None
        out.append((pc, m, add))
    return out


def pack_matrix(w: np.ndarray, bias: np.ndarray | None, w_zp: np.ndarray | None,
                rq: Requant | None, groups: int = 1,
                bound_bias: np.ndarray | None = None) -> np.ndarray:
    """The pack of weight rows w [out_c][k_len] (rows of group g are g*out_c/groups on).

    Per group, one record per channel pair c0 = 2j, c1 = 2j + 1 (a missing last c1 is all
    zero): bias[c0], bias[c1], bias[c0], bias[c1]; per group of four inputs k..k+3 the
    int16 pairs (w'[k], w'[k+2]), (w'[k+1], w'[k+3]) of c0, then of c1, w' = w - w_zp,
    low half first, zero past k_len; then mult, add, r of c0 and c1 when rq's form is
    TG_RQ_FAST (else zeros). Choose rq's form first (choose_form): its constants are copied.
    Prescaled (prescaled_constants, any fixed form): weights and bias of channel c times
    2^p_c and the constants mult, add, FIXED_R | PRESCALED, to apply with no pre-shift.
    bound_bias: the bias that bounds the sums when bias is another one (tg_fc's folded
    bias, already wrapped to int32); default bias.
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
    wz_rows = w - wz[:, None]
    bb = b if bound_bias is None else np.asarray(bound_bias, np.int64).reshape(-1)
    scaled = prescaled_constants(wz_rows, bb, rq)
    if scaled is not None:  # weights and bias times 2^p: one final shift for all channels
        p2 = np.array([1 << pc for pc, _, _ in scaled], dtype=np.int64)
        w, wz = wz_rows * p2[:, None], np.zeros(out_c, np.int64)
        b = ((b * p2 + 2**31) % 2**32) - 2**31  # the sum is exact modulo 2^32
        chan = np.array([(m, add, FIXED_R | PRESCALED) for _, m, add in scaled], np.int64)
    elif rq is not None and rq.form == FORM_FAST and rq.chan is not None:
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
