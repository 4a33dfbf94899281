/* tg_fc.c - fully connected / matrix multiply, contract in tg_fc.h.
 *
 * Accumulators are int32 and are not checked: x - x_zp and w - w_zp both lie in [-255, 255],
 * and the compiler only emits a layer whose |bias| + depth*255*255 fits in int32.
 * Contiguous weights (w_stride_k == 1, the constant [out][depth] layout) run one dot product
 * per output; any other stride (the run-time [depth][out] operand) accumulates a block of
 * outputs at once, walking each weight row along w_stride_o. The dot product has the same
 * DSP-extension path as tg_conv.c (kept private to each file: no shared internal header).
 */
#include "tg_fc.h"

#include <string.h>

#if defined(__ARM_FEATURE_DSP) && defined(__ARM_FEATURE_SIMD32)
#include <arm_acle.h>
#define TG_FC_DSP 1
#else
#define TG_FC_DSP 0
#endif

/* Outputs accumulated together on the strided path (a stack array, no scratch needed). */
#define TG_FC_BLOCK 16

#if TG_FC_DSP
static inline uint32_t tg_fc_ror8(uint32_t v)
{
    return (v >> 8) | (v << 24);
}

/* Both int16 lanes set to -zp; x - zp then fits a lane (|x - zp| <= 255). */
static inline int16x2_t tg_fc_neg_pair(int32_t zp)
{
    return (int16x2_t)((uint32_t)(uint16_t)(-zp) * 0x00010001u);
}
#endif

/* sum over i < len of (x[i] - xz) * (w[i] - wz). */
static inline int32_t tg_fc_dot(const int8_t *x, const int8_t *w, int32_t len, int32_t xz,
                                int32_t wz)
{
    int32_t acc = 0;
    int32_t i = 0;
#if TG_FC_DSP
    /* Four terms per step: bytes 0,2 and bytes 1,3 widen to int16 pairs for two SMLADs. */
    const int16x2_t x_off = tg_fc_neg_pair(xz);
    const int16x2_t w_off = tg_fc_neg_pair(wz);
    for (; i + 4 <= len; i += 4) {
        uint32_t xv;
        uint32_t wv;
        memcpy(&xv, x + i, sizeof xv);
        memcpy(&wv, w + i, sizeof wv);
        acc = __smlad(__sxtab16(x_off, (int8x4_t)xv), __sxtab16(w_off, (int8x4_t)wv), acc);
        acc = __smlad(__sxtab16(x_off, (int8x4_t)tg_fc_ror8(xv)),
                      __sxtab16(w_off, (int8x4_t)tg_fc_ror8(wv)), acc);
    }
#endif
    for (; i < len; ++i) {
        acc += ((int32_t)x[i] - xz) * ((int32_t)w[i] - wz);
    }
    return acc;
}

static inline void tg_fc_store(const tg_requant_t *rq, void *y, int32_t idx, int32_t acc,
                               int32_t o)
{
    if (rq != NULL) {
        ((int8_t *)y)[idx] = tg_requant(acc, rq, o);
    } else {
        ((int32_t *)y)[idx] = acc;
    }
}

/* Weights contiguous along depth: one dot product per output. */
static void tg_fc_rows_contiguous(const tg_fc_params_t *p, const int8_t *xr, const int8_t *w,
                                  const int32_t *bias, void *y, int32_t yi)
{
    int32_t o;
    for (o = 0; o < p->out; ++o) {
        const int8_t *wo = w + o * p->w_stride_o;
        int32_t acc = bias != NULL ? bias[o] : 0;
        /* Two call sites so the w_zp == NULL copy drops the weight offset. */
        if (p->w_zp == NULL) {
            acc += tg_fc_dot(xr, wo, p->depth, p->x_zp, 0);
        } else {
            acc += tg_fc_dot(xr, wo, p->depth, p->x_zp, p->w_zp[o]);
        }
        tg_fc_store(p->rq, y, yi + o, acc, o);
    }
}

/* Any weight strides: outputs [o0, o0 + count) accumulate together, one x value at a time. */
static void tg_fc_block_strided(const tg_fc_params_t *p, const int8_t *xr, const int8_t *w,
                                const int32_t *bias, void *y, int32_t yi, int32_t o0,
                                int32_t count)
{
    int32_t acc[TG_FC_BLOCK];
    int32_t j;
    int32_t k;
    for (j = 0; j < count; ++j) {
        acc[j] = bias != NULL ? bias[o0 + j] : 0;
    }
    for (k = 0; k < p->depth; ++k) {
        const int32_t xv = (int32_t)xr[k] - p->x_zp;
        const int8_t *wk = w + k * p->w_stride_k + o0 * p->w_stride_o;
        for (j = 0; j < count; ++j) {
            acc[j] += xv * (int32_t)wk[j * p->w_stride_o];
        }
    }
    /* sum (x - xz) * (w - wz) = sum (x - xz) * w - wz * sum (x - xz): one pass per block. */
    if (p->w_zp != NULL) {
        int32_t x_sum = 0;
        for (k = 0; k < p->depth; ++k) {
            x_sum += (int32_t)xr[k] - p->x_zp;
        }
        for (j = 0; j < count; ++j) {
            acc[j] -= p->w_zp[o0 + j] * x_sum;
        }
    }
    for (j = 0; j < count; ++j) {
        tg_fc_store(p->rq, y, yi + o0 + j, acc[j], o0 + j);
    }
}

void tg_fc(const tg_fc_params_t *p, const int8_t *x, const int8_t *w,
           const int32_t *bias, void *y)
{
    int32_t m;
    int32_t o0;
    for (m = 0; m < p->rows; ++m) {
        const int8_t *xr = x + m * p->depth;
        const int32_t yi = m * p->out;
        if (p->w_stride_k == 1) {
            tg_fc_rows_contiguous(p, xr, w, bias, y, yi);
            continue;
        }
        for (o0 = 0; o0 < p->out; o0 += TG_FC_BLOCK) {
            const int32_t count = p->out - o0 < TG_FC_BLOCK ? p->out - o0 : TG_FC_BLOCK;
            tg_fc_block_strided(p, xr, w, bias, y, yi, o0, count);
        }
    }
}
