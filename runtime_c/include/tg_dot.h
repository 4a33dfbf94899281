/* tg_dot.h - the blocked dot-product core of tg_conv and tg_pwconv (private header).
 *
 * Both kernels reduce an output pixel to a dot product of its receptive field ("patch",
 * len int8 values x - in_zp) with each output channel's weight row (len int8, rows k_len
 * apart). The core takes two pixels at once: their patches are widened once into a scratch
 * pair buffer of int16, group of four by group of four, pixel 0's group then pixel 1's
 * (tg_dot_widen), and each pass over the pair runs two weight rows against both pixels, so
 * every weight word loaded serves two pixels and every patch word two channels
 * (tg_dot_rows). On the DSP path a group's lanes are stored as elements 0,2 then 1,3, the
 * order SXTB16 gives a weight word, and the loop is four SMLADs per group and channel pair.
 * A last partial group (len % 4 != 0) ends at element len - 1 and pairs with the weight word
 * at len - 4; its elements before len & ~3 are zero, so nothing is counted twice and no
 * weight row is read past its end.
 * Every partial sum is the bias plus terms (x - in_zp) * w of magnitude <= 255 * 128, within
 * the accumulator bound the compiler proved (passes/overflow.py).
 */
#ifndef TG_DOT_H
#define TG_DOT_H

#include <stdint.h>
#include <string.h>

#include "tg_arm_dsp.h"
#include "tg_requant.h"

/* int16 elements of one pair buffer for patches of len elements (two pixels). */
#define TG_DOT_PAIR_ELEMS(len) (2 * (((len) + 3) & ~3))

/* Widen raw (len int8, padding already in_zp) to x - in_zp into pixel p (0 or 1) of the
 * pair buffer xw (TG_DOT_PAIR_ELEMS(len) int16, 4-byte aligned); returns sum(x - in_zp). */
static inline int32_t tg_dot_widen(const int8_t *raw, int32_t len, int32_t in_zp, int16_t *xw,
                                   int32_t p)
{
    int16_t *dst = xw + 4 * p;
    int32_t sum = 0;
    int32_t i = 0;
#if TG_DSP
    const uint32_t off = (uint32_t)(uint16_t)(-in_zp) * 0x00010001u;
    uint32_t v, lanes[2];
    for (; i + 4 <= len; i += 4, dst += 8) {
        memcpy(&v, raw + i, sizeof v);
        lanes[0] = tg_widen_even(v, off);
        lanes[1] = tg_widen_odd(v, off);
        memcpy(dst, lanes, sizeof lanes);
        sum = __smlad(lanes[0], 0x00010001u, sum);
        sum = __smlad(lanes[1], 0x00010001u, sum);
    }
    if (i < len && len >= 4) {  /* the last partial group, aligned to end at len - 1 */
        int8_t last[4];
        memcpy(last, raw + len - 4, sizeof last);
        memset(last, (int8_t)in_zp, (size_t)(i + 4 - len));  /* counted in the group before */
        memcpy(&v, last, sizeof v);
        lanes[0] = tg_widen_even(v, off);
        lanes[1] = tg_widen_odd(v, off);
        memcpy(dst, lanes, sizeof lanes);
        sum = __smlad(lanes[0], 0x00010001u, sum);
        sum = __smlad(lanes[1], 0x00010001u, sum);
        return sum;
    }
#else
    if (len >= 4) {
        const int32_t tail = len & 3;
        for (; i + 4 <= len; i += 4, dst += 8) {
            const int16_t a = (int16_t)(raw[i] - in_zp), b = (int16_t)(raw[i + 1] - in_zp);
            const int16_t c = (int16_t)(raw[i + 2] - in_zp), d = (int16_t)(raw[i + 3] - in_zp);
            dst[0] = a;
            dst[1] = b;
            dst[2] = c;
            dst[3] = d;
            sum += a + b + c + d;
        }
        if (tail != 0) {  /* elements len - 4 .. len - 1, the ones already taken as 0 */
            int32_t j;
            for (j = 0; j < 4; ++j) {
                const int32_t k = len - 4 + j;
                dst[j] = (int16_t)(k < i ? 0 : raw[k] - in_zp);
                sum += dst[j];
            }
        }
        return sum;
    }
#endif
    for (; i < len; ++i) {  /* a patch shorter than one group: element by element */
        dst[i] = (int16_t)(raw[i] - in_zp);
        sum += dst[i];
    }
    return sum;
}

#if TG_DSP
/* acc += the 2x2 dot products over `groups` whole groups (groups >= 1); x, w0, w1 advance. */
TG_INLINE void tg_dot_2x2_groups(const int16_t **x, const int8_t **w0, const int8_t **w1,
                                     int32_t groups, int32_t acc[4])
{
    int32_t a00 = acc[0], a01 = acc[1], a10 = acc[2], a11 = acc[3];
    const int16_t *xp = *x;
    const int8_t *p0 = *w0, *p1 = *w1;
    uint32_t xe, xo, wv, we;
    /* Each weight word is widened once and meets both pixels (pixel 1's group 8 bytes on). */
    __asm__ volatile(
        "1:\n\t"
        "ldr     %[wv], [%[w0]], #4\n\t"
        "ldrd    %[xe], %[xo], [%[x], #8]\n\t"
        "sxtb16  %[we], %[wv]\n\t"
        "sxtb16  %[wv], %[wv], ror #8\n\t"
        "smlad   %[a10], %[xe], %[we], %[a10]\n\t"
        "smlad   %[a10], %[xo], %[wv], %[a10]\n\t"
        "ldrd    %[xe], %[xo], [%[x]], #16\n\t"
        "smlad   %[a00], %[xe], %[we], %[a00]\n\t"
        "smlad   %[a00], %[xo], %[wv], %[a00]\n\t"
        "ldr     %[wv], [%[w1]], #4\n\t"
        "sxtb16  %[we], %[wv]\n\t"
        "sxtb16  %[wv], %[wv], ror #8\n\t"
        "smlad   %[a01], %[xe], %[we], %[a01]\n\t"
        "smlad   %[a01], %[xo], %[wv], %[a01]\n\t"
        "ldrd    %[xe], %[xo], [%[x], #-8]\n\t"
        "smlad   %[a11], %[xe], %[we], %[a11]\n\t"
        "smlad   %[a11], %[xo], %[wv], %[a11]\n\t"
        "subs    %[n], %[n], #1\n\t"
        "bne     1b"
        : [a00] "+r"(a00), [a01] "+r"(a01), [a10] "+r"(a10), [a11] "+r"(a11),
          [x] "+r"(xp), [w0] "+r"(p0), [w1] "+r"(p1), [n] "+r"(groups),
          [xe] "=&r"(xe), [xo] "=&r"(xo), [wv] "=&r"(wv), [we] "=&r"(we)
        :
        : "cc", "memory");
    acc[0] = a00;
    acc[1] = a01;
    acc[2] = a10;
    acc[3] = a11;
    *x = xp;
    *w0 = p0;
    *w1 = p1;
}
#endif

/* acc[0..1] (pixel 0, channels j, j+1) and acc[2..3] (pixel 1) += the dot products of the
 * pair buffer xw with weight rows w0, w1 over len elements. */
TG_INLINE void tg_dot_2x2(const int16_t *xw, const int8_t *w0, const int8_t *w1,
                              int32_t len, int32_t acc[4])
{
    int32_t a00, a01, a10, a11;
#if TG_DSP
    if (len >= 4) {
        tg_dot_2x2_groups(&xw, &w0, &w1, len >> 2, acc);
        if ((len & 3) != 0) {  /* the last partial group: the weight words ending at len */
            w0 -= 4 - (len & 3);
            w1 -= 4 - (len & 3);
            tg_dot_2x2_groups(&xw, &w0, &w1, 1, acc);
        }
        return;
    }
#endif
    a00 = acc[0];
    a01 = acc[1];
    a10 = acc[2];
    a11 = acc[3];
    if (len >= 4) {
        const int32_t groups = (len + 3) >> 2;
        int32_t g, j;
        for (g = 0; g < groups; ++g, xw += 8) {
            const int32_t k = g + 1 == groups ? len - 4 : 4 * g;  /* last group ends at len */
            for (j = 0; j < 4; ++j) {
                const int32_t u0 = xw[j], u1 = xw[4 + j], v0 = w0[k + j], v1 = w1[k + j];
                a00 += u0 * v0;
                a01 += u0 * v1;
                a10 += u1 * v0;
                a11 += u1 * v1;
            }
        }
    } else {
        int32_t i;
        for (i = 0; i < len; ++i) {
            const int32_t u0 = xw[i], u1 = xw[4 + i], v0 = w0[i], v1 = w1[i];
            a00 += u0 * v0;
            a01 += u0 * v1;
            a10 += u1 * v0;
            a11 += u1 * v1;
        }
    }
    acc[0] = a00;
    acc[1] = a01;
    acc[2] = a10;
    acc[3] = a11;
}

/* One block of output channels [c0, c0 + nc) for two pixels whose pair buffer is ready. */
typedef struct {
    const int8_t *w;         /* weight row of channel c0; rows k_len apart */
    const int32_t *bias;     /* indexed by channel; NULL reads as 0 */
    const int32_t *w_zp;     /* indexed by channel; NULL when all zero */
    const tg_requant_t *rq;  /* NULL: int32 outputs */
    int32_t k_len, len;      /* weight row stride, patch elements */
    int32_t c0, nc;
} tg_dot_job_t;

/* y0/y1: the outputs of pixel 0/1 at channel c0 (int8, or int32 without rq); y1 NULL for a
 * lone pixel (its pair half is computed and dropped). xs0/xs1: sums of the patches. */
static void tg_dot_channels(const tg_dot_job_t *j, const int16_t *xw, int32_t xs0, int32_t xs1,
                            void *y0, void *y1)
{
    const tg_requant_t *rq = j->rq;
    const int32_t nc = j->nc, c0 = j->c0, k_len = j->k_len, len = j->len;
    const int fast = rq != NULL && rq->form == TG_RQ_FAST;
    const int32_t pre = fast ? rq->pre : 0;
    const int32_t lo = rq != NULL ? rq->act_min : 0, hi = rq != NULL ? rq->act_max : 0;
    const int clamps = lo > -128 || hi < 127;
    int32_t c;
    if (fast && j->bias != NULL && j->w_zp == NULL && !clamps && nc % 2 == 0) {
        /* The common case as one tight loop: pointers walk, nothing is re-derived. */
        const int8_t *w0 = j->w;
        const int32_t *bias = j->bias + c0;
        const int32_t *e = rq->chan + 3 * c0;
        int8_t *o0 = (int8_t *)y0;
        int8_t *o1 = y1 != NULL ? (int8_t *)y1 : o0;  /* a lone pixel writes pixel 0 twice */
        for (c = 0; c < nc; c += 2, w0 += 2 * k_len, bias += 2, e += 6, o0 += 2, o1 += 2) {
            tg_rq_chan_t k0, k1;
            int32_t acc[4];
            acc[0] = acc[2] = bias[0];
            acc[1] = acc[3] = bias[1];
            tg_dot_2x2(xw, w0, w0 + k_len, len, acc);
            if (y1 == NULL) {
                acc[2] = acc[0];
                acc[3] = acc[1];
            }
            k0.mult = e[0];
            k0.add = e[1];
            k0.shift = e[2];
            k1.mult = e[3];
            k1.add = e[4];
            k1.shift = e[5];
            o0[0] = (int8_t)tg_rq_apply(k0, (int32_t)((uint32_t)acc[0] << pre));
            o0[1] = (int8_t)tg_rq_apply(k1, (int32_t)((uint32_t)acc[1] << pre));
            o1[0] = (int8_t)tg_rq_apply(k0, (int32_t)((uint32_t)acc[2] << pre));
            o1[1] = (int8_t)tg_rq_apply(k1, (int32_t)((uint32_t)acc[3] << pre));
        }
        return;
    }
    for (c = 0; c < nc; c += 2) {
        const int32_t c1 = c + 1 < nc ? c + 1 : c;  /* a lone last channel pairs with itself */
        const int8_t *w0 = j->w + c * k_len;
        int32_t acc[4];
        acc[0] = acc[2] = j->bias != NULL ? j->bias[c0 + c] : 0;
        acc[1] = acc[3] = j->bias != NULL ? j->bias[c0 + c1] : 0;
        tg_dot_2x2(xw, w0, w0 + (c1 - c) * k_len, len, acc);
        if (j->w_zp != NULL) {  /* sum x'(w - wz) = sum x'w - wz * sum x' */
            acc[0] -= j->w_zp[c0 + c] * xs0;
            acc[1] -= j->w_zp[c0 + c1] * xs0;
            acc[2] -= j->w_zp[c0 + c] * xs1;
            acc[3] -= j->w_zp[c0 + c1] * xs1;
        }
        if (fast) {  /* both channels' constants in registers for both pixels */
            const tg_rq_chan_t k0 = tg_rq_load(rq, c0 + c), k1 = tg_rq_load(rq, c0 + c1);
            int32_t v[4];
            v[0] = tg_rq_apply(k0, (int32_t)((uint32_t)acc[0] << pre));
            v[1] = tg_rq_apply(k1, (int32_t)((uint32_t)acc[1] << pre));
            v[2] = tg_rq_apply(k0, (int32_t)((uint32_t)acc[2] << pre));
            v[3] = tg_rq_apply(k1, (int32_t)((uint32_t)acc[3] << pre));
            if (clamps) {
                int32_t q;
                for (q = 0; q < 4; ++q) {
                    v[q] = v[q] < lo ? lo : (v[q] > hi ? hi : v[q]);
                }
            }
            ((int8_t *)y0)[c] = (int8_t)v[0];
            ((int8_t *)y0)[c1] = (int8_t)v[1];
            if (y1 != NULL) {
                ((int8_t *)y1)[c] = (int8_t)v[2];
                ((int8_t *)y1)[c1] = (int8_t)v[3];
            }
        } else if (rq != NULL) {
            ((int8_t *)y0)[c] = tg_requant(acc[0], rq, c0 + c);
            ((int8_t *)y0)[c1] = tg_requant(acc[1], rq, c0 + c1);
            if (y1 != NULL) {
                ((int8_t *)y1)[c] = tg_requant(acc[2], rq, c0 + c);
                ((int8_t *)y1)[c1] = tg_requant(acc[3], rq, c0 + c1);
            }
        } else {
            ((int32_t *)y0)[c] = acc[0];
            ((int32_t *)y0)[c1] = acc[1];
            if (y1 != NULL) {
                ((int32_t *)y1)[c] = acc[2];
                ((int32_t *)y1)[c1] = acc[3];
            }
        }
    }
}

#endif /* TG_DOT_H */
