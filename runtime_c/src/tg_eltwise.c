/* tg_eltwise.c - elementwise Add and Mul with broadcasting, contract in tg_eltwise.h.
 *
 * The three outer axes are walked with the input strides; the innermost axis is handed to a
 * row function (one per op and mode), so the per-element work has no mode tests. Each output
 * element is written after both of its inputs are read, which makes y == a or y == b safe
 * when that input is dense. Fixed-mode sums stay far inside int64: (a - a_zp) << left_shift
 * is below 2^29 for left_shift <= 20.
 */
#include "tg_eltwise.h"

#if TG_WITH_FLOAT_REQUANT
#include <math.h>
#endif

typedef void (*tg_eltwise_row_fn)(const tg_eltwise_params_t *p, const int8_t *a, int32_t sa,
                                  const int8_t *b, int32_t sb, int8_t *y, int32_t n);

static void tg_add_row_fixed(const tg_eltwise_params_t *p, const int8_t *a, int32_t sa,
                             const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    int32_t i;
    for (i = 0; i < n; ++i) {
        const int64_t av = (int64_t)(a[i * sa] - p->a_zp) * ((int64_t)1 << p->left_shift);
        const int64_t bv = (int64_t)(b[i * sb] - p->b_zp) * ((int64_t)1 << p->left_shift);
        const int64_t sum = tg_mul_shift(av, p->a_mult, p->a_shift)
                          + tg_mul_shift(bv, p->b_mult, p->b_shift);
        y[i] = (int8_t)tg_clamp32(p->out_zp + tg_mul_shift(sum, p->out_mult, p->out_shift),
                                  p->act_min, p->act_max);
    }
}

static void tg_mul_row_fixed(const tg_eltwise_params_t *p, const int8_t *a, int32_t sa,
                             const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    int32_t i;
    for (i = 0; i < n; ++i) {
        const int32_t prod = (a[i * sa] - p->a_zp) * (b[i * sb] - p->b_zp);
        y[i] = (int8_t)tg_clamp32(p->out_zp + tg_mul_shift(prod, p->out_mult, p->out_shift),
                                  p->act_min, p->act_max);
    }
}

#if TG_WITH_FLOAT_REQUANT
/* v in the model's own integer domain -> clamped, rounded, int8 domain. */
static int8_t tg_eltwise_round(const tg_eltwise_params_t *p, float v)
{
    const float lo = (float)(p->act_min + p->raw_offset);
    const float hi = (float)(p->act_max + p->raw_offset);
    v = v < lo ? lo : (v > hi ? hi : v);
    return (int8_t)(tg_round_half_even(v) - p->raw_offset);
}

static void tg_add_row_float(const tg_eltwise_params_t *p, const int8_t *a, int32_t sa,
                             const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    int32_t i;
    for (i = 0; i < n; ++i) {
        const float av = (float)(a[i * sa] + p->raw_offset);
        const float bv = (float)(b[i * sb] + p->raw_offset);
        const float v = p->a_bcast_inner ? fmaf(bv, p->b_ratio, fmaf(av, p->a_ratio, p->bias))
                                         : fmaf(av, p->a_ratio, fmaf(bv, p->b_ratio, p->bias));
        y[i] = tg_eltwise_round(p, v);
    }
}

static void tg_mul_row_float(const tg_eltwise_params_t *p, const int8_t *a, int32_t sa,
                             const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    int32_t i;
    for (i = 0; i < n; ++i) {
        const int32_t prod = (a[i * sa] - p->a_zp) * (b[i * sb] - p->b_zp);
        y[i] = tg_eltwise_round(p, (float)prod * p->ab_ratio + p->bias);
    }
}
#endif

static void tg_eltwise_run(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b,
                           int8_t *y, tg_eltwise_row_fn row)
{
    const int32_t *s = p->shape;
    int32_t i0, i1, i2;
    for (i0 = 0; i0 < s[0]; ++i0) {
        for (i1 = 0; i1 < s[1]; ++i1) {
            const int8_t *a1 = a + i0 * p->a_stride[0] + i1 * p->a_stride[1];
            const int8_t *b1 = b + i0 * p->b_stride[0] + i1 * p->b_stride[1];
            for (i2 = 0; i2 < s[2]; ++i2) {
                row(p, a1 + i2 * p->a_stride[2], p->a_stride[3], b1 + i2 * p->b_stride[2],
                    p->b_stride[3], y, s[3]);
                y += s[3];
            }
        }
    }
}

void tg_add(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y)
{
#if TG_WITH_FLOAT_REQUANT
    if (p->use_float) {
        tg_eltwise_run(p, a, b, y, tg_add_row_float);
        return;
    }
#endif
    tg_eltwise_run(p, a, b, y, tg_add_row_fixed);
}

void tg_mul(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y)
{
#if TG_WITH_FLOAT_REQUANT
    if (p->use_float) {
        tg_eltwise_run(p, a, b, y, tg_mul_row_float);
        return;
    }
#endif
    tg_eltwise_run(p, a, b, y, tg_mul_row_fixed);
}
