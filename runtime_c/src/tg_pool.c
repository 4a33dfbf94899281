/* tg_pool.c - max and average pooling, channels-last, contract in tg_pool.h.
 *
 * The valid tap range of each output position is worked out once, so the tap loops never
 * test for padding. Max pooling folds each tap into the output row itself; average pooling
 * accumulates blocks of TG_POOL_BLOCK channels in a small local array so the innermost loop
 * runs over contiguous channels. The float modes keep the per-channel order of operations of
 * the runtimes they mirror (taps row-major, one rounding per operation).
 */
#include "tg_pool.h"
#include "tg_window.h"

#include <string.h>

#define TG_POOL_BLOCK 32

/* The valid taps of one output position and the input row/column they start from. */
typedef struct {
    int32_t ky0, ky1, kx0, kx1;
    int32_t base_y, base_x;
} tg_pool_window_t;

static tg_pool_window_t tg_pool_window(const tg_pool_params_t *p, int32_t oy, int32_t ox)
{
    tg_pool_window_t w;
    w.base_y = oy * p->stride_h - p->pad_top;
    w.base_x = ox * p->stride_w - p->pad_left;
    tg_tap_range(w.base_y, p->dil_h, p->k_h, p->in_h, &w.ky0, &w.ky1);
    tg_tap_range(w.base_x, p->dil_w, p->k_w, p->in_w, &w.kx0, &w.kx1);
    return w;
}

static int32_t tg_pool_count(const tg_pool_params_t *p, const tg_pool_window_t *w)
{
    if (p->count_include_pad) {
        return p->k_h * p->k_w;
    }
    return (w->ky1 - w->ky0) * (w->kx1 - w->kx0);
}

void tg_maxpool(const tg_pool_params_t *p, const int8_t *x, int8_t *y)
{
    const int32_t c = p->c;
    const int32_t act_min = p->act_min, act_max = p->act_max;
    /* With the full int8 range the clamp cannot change a value: skip its pass. */
    const int clamps = act_min > -128 || act_max < 127;
    int32_t b, oy, ox, ky, kx, i;
    for (b = 0; b < p->n; ++b) {
        const int8_t *xb = x + b * p->in_h * p->in_w * c;
        for (oy = 0; oy < p->out_h; ++oy) {
            for (ox = 0; ox < p->out_w; ++ox) {
                const tg_pool_window_t w = tg_pool_window(p, oy, ox);
                int first = 1;
                for (ky = w.ky0; ky < w.ky1; ++ky) {
                    const int8_t *row = xb + (w.base_y + ky * p->dil_h) * p->in_w * c;
                    for (kx = w.kx0; kx < w.kx1; ++kx) {
                        const int8_t *src = row + (w.base_x + kx * p->dil_w) * c;
                        if (first) {
                            memcpy(y, src, (size_t)c);
                            first = 0;
                            continue;
                        }
                        for (i = 0; i < c; ++i) {
                            y[i] = src[i] > y[i] ? src[i] : y[i];
                        }
                    }
                }
                if (first) {
                    memset(y, (int8_t)act_min, (size_t)c);
                } else if (clamps) {
                    for (i = 0; i < c; ++i) {
                        y[i] = (int8_t)tg_clamp32(y[i], act_min, act_max);
                    }
                }
                y += c;
            }
        }
    }
}

/* Integer window sums of channels [c0, c0 + len) into acc, each less taps * in_zp. Four
 * channels walk the window together, their sums in registers rather than in acc. */
static void tg_pool_sum(const tg_pool_params_t *p, const int8_t *xb, const tg_pool_window_t *w,
                        int32_t c0, int32_t len, int32_t *acc)
{
    const int32_t c = p->c;
    const int32_t start = -(w->ky1 - w->ky0) * (w->kx1 - w->kx0) * p->in_zp;
    const int32_t x_step = p->dil_w * c;
    const int8_t *first = xb + (w->base_y * p->in_w + w->base_x) * c + c0;
    int32_t ky, kx, i, lanes;
    for (i = 0; i < len; i += lanes) {
        int32_t a0 = start, a1 = start, a2 = start, a3 = start;
        lanes = len - i >= 4 ? 4 : 1;  /* the last len % 4 channels one at a time */
        for (ky = w->ky0; ky < w->ky1; ++ky) {
            const int8_t *src = first + (ky * p->dil_h * p->in_w + w->kx0 * p->dil_w) * c + i;
            for (kx = w->kx0; kx < w->kx1; ++kx) {
                a0 += src[0];
                if (lanes == 4) {
                    a1 += src[1];
                    a2 += src[2];
                    a3 += src[3];
                }
                src += x_step;
            }
        }
        acc[i] = a0;
        if (lanes == 4) {
            acc[i + 1] = a1;
            acc[i + 2] = a2;
            acc[i + 3] = a3;
        }
    }
}

/* floor((acc*mult + count*2^(shift-1)) / (count*2^shift)) without forming count*2^shift:
 * with acc*mult = q*2^shift + r, it is floor((q + count/2 [+1 if count odd and r >= half])
 * / count). */
static int32_t tg_pool_fixed_avg(int32_t acc, int32_t count, int32_t mult, int32_t shift)
{
    const int64_t prod = tg_mul32_wide(acc, mult);
    const int64_t q = prod >> shift;
    const uint64_t mask = ((uint64_t)1 << shift) - 1u;
    const uint64_t r = (uint64_t)prod & mask;
    int64_t t = q + (count >> 1);
    if ((count & 1) && r >= ((uint64_t)1 << (shift - 1))) {
        ++t;
    }
    /* The same floor division in 32 bits whenever t allows it (a library call saved). */
    if (t < INT32_MAX && t > (int64_t)count - INT32_MAX) {
        const int32_t t32 = (int32_t)t;
        return t32 >= 0 ? t32 / count : -((-t32 + count - 1) / count);
    }
    return (int32_t)(t >= 0 ? t / count : -((-t + count - 1) / count));
}

#if TG_WITH_FLOAT_REQUANT
/* v (already offset so that round_zp is the zero point) clamped, rounded, moved to out_zp. */
static int8_t tg_pool_round(float v, const tg_pool_params_t *p, int32_t round_zp)
{
    const float lo = (float)(p->act_min - p->out_zp + round_zp);
    const float hi = (float)(p->act_max - p->out_zp + round_zp);
    v = v < lo ? lo : (v > hi ? hi : v);
    return (int8_t)(tg_round_half_even(v) + p->out_zp - round_zp);
}

/* Dequantize-then-average of channels [c0, c0 + len): float sums in tap order. */
static void tg_pool_avg_dq(const tg_pool_params_t *p, const int8_t *xb,
                           const tg_pool_window_t *w, int32_t count, int32_t c0, int32_t len,
                           int8_t *y)
{
    float acc[TG_POOL_BLOCK];
    const int32_t c = p->c;
    const float n = (float)(count > 0 ? count : 1);
    int32_t ky, kx, i;
    for (i = 0; i < len; ++i) {
        acc[i] = 0.0f;
    }
    for (ky = w->ky0; ky < w->ky1; ++ky) {
        const int8_t *row = xb + (w->base_y + ky * p->dil_h) * p->in_w * c + c0;
        for (kx = w->kx0; kx < w->kx1; ++kx) {
            const int8_t *src = row + (w->base_x + kx * p->dil_w) * c;
            for (i = 0; i < len; ++i) {
                acc[i] = acc[i] + p->in_scale * (float)(src[i] - p->in_zp);
            }
        }
    }
    for (i = 0; i < len; ++i) {
        const float v = (acc[i] / n) / p->out_scale + (float)p->round_zp;
        y[i] = tg_pool_round(v, p, p->round_zp);
    }
}
#endif

void tg_avgpool(const tg_pool_params_t *p, const int8_t *x, int8_t *y)
{
    int32_t acc[TG_POOL_BLOCK];
    const int32_t c = p->c;
    int32_t b, oy, ox, c0, i;
    for (b = 0; b < p->n; ++b) {
        const int8_t *xb = x + b * p->in_h * p->in_w * c;
        for (oy = 0; oy < p->out_h; ++oy) {
            for (ox = 0; ox < p->out_w; ++ox) {
                const tg_pool_window_t w = tg_pool_window(p, oy, ox);
                const int32_t count = tg_pool_count(p, &w);
#if TG_WITH_FLOAT_REQUANT
                const float sum_scale = p->avg_mode == TG_AVG_FLOAT_SUM
                    ? p->in_scale / (p->out_scale * (float)(count > 0 ? count : 1)) : 0.0f;
#endif
                for (c0 = 0; c0 < c; c0 += TG_POOL_BLOCK) {
                    const int32_t len = c - c0 < TG_POOL_BLOCK ? c - c0 : TG_POOL_BLOCK;
#if TG_WITH_FLOAT_REQUANT
                    if (p->avg_mode == TG_AVG_FLOAT_DQ) {
                        tg_pool_avg_dq(p, xb, &w, count, c0, len, y + c0);
                        continue;
                    }
#endif
                    tg_pool_sum(p, xb, &w, c0, len, acc);
#if TG_WITH_FLOAT_REQUANT
                    if (p->avg_mode == TG_AVG_FLOAT_SUM) {
                        for (i = 0; i < len; ++i) {
                            y[c0 + i] = tg_pool_round((float)acc[i] * sum_scale, p, 0);
                        }
                        continue;
                    }
#endif
                    for (i = 0; i < len; ++i) {
                        const int32_t avg = count > 0
                            ? tg_pool_fixed_avg(acc[i], count, p->mult, p->shift) : 0;
                        y[c0 + i] = (int8_t)tg_clamp32((int64_t)p->out_zp + avg, p->act_min,
                                                       p->act_max);
                    }
                }
                y += c;
            }
        }
    }
}
