/* tg_eltwise.c - elementwise Add and Mul with broadcasting, contract in tg_eltwise.h.
 *
 * The three outer axes are walked with the input strides; the innermost axis is handed to a
 * row function (one per op and mode), so the per-element work has no mode tests. Each output
 * element is written after both of its inputs are read, which makes y == a or y == b safe
 * when that input is dense. Fixed-mode sums stay far inside int64: (a - a_zp) << left_shift
 * is below 2^29 for left_shift <= 20.
 * Fixed-mode Add reads two compile-time tables (tg_eltwise.h): per element two loads, one
 * addition and one saturating shift, the same outputs as the 64-bit formula, which remains
 * for parameters the tables cannot hold.
 */
#include "tg_eltwise.h"

#if TG_WITH_FLOAT_REQUANT
#include <math.h>
#endif

/* What a row function gets. */
typedef struct {
    const tg_eltwise_params_t *p;
} tg_eltwise_job_t;

typedef void (*tg_eltwise_row_fn)(const tg_eltwise_job_t *job, const int8_t *a, int32_t sa,
                                  const int8_t *b, int32_t sb, int8_t *y, int32_t n);

/* The fixed-mode rescaling of one Add input, (v - zp) << left_shift times mult >> shift. */
static int64_t tg_add_rescale(int32_t v, int32_t zp, int32_t left_shift, int32_t mult,
                              int32_t shift)
{
    return tg_mul_shift(tg_mul64x32(v - zp, (int32_t)1 << left_shift), mult, shift);
}

/* Fixed Add through the tables over n elements, a and b sa and sb apart (0: the broadcast
 * operand, looked up once); `clamps` is a constant at each call, so the int8 range case
 * compiles to the saturating shift alone. */
TG_INLINE void tg_add_tables_loop(const tg_eltwise_params_t *p, const int8_t *a, int32_t sa,
                                  const int8_t *b, int32_t sb, int8_t *y, int32_t n,
                                  int clamps)
{
    const int32_t *ta = p->a_table, *tb = p->b_table;
    const int32_t lo = p->act_min, hi = p->act_max;
    int8_t *const end = y + n;
    int32_t v;
#define TG_ADD_OUT(sum) \
    (v = tg_sat8((sum) >> TG_ADD_TABLE_SHIFT), \
     (int8_t)(!clamps ? v : (v < lo ? lo : (v > hi ? hi : v))))
    if (sb == 0) {
        const int32_t kb = tb[(uint8_t)b[0]];
        for (; y != end; a += sa) {
            *y++ = TG_ADD_OUT(ta[(uint8_t)*a] + kb);
        }
    } else if (sa == 0) {
        const int32_t ka = ta[(uint8_t)a[0]];
        for (; y != end; b += sb) {
            *y++ = TG_ADD_OUT(ka + tb[(uint8_t)*b]);
        }
    } else if (sa == 1 && sb == 1) {  /* dense: four at a time, then the rest */
        int32_t k;
        for (k = n >> 2; k != 0; --k) {
            *y++ = TG_ADD_OUT(ta[(uint8_t)*a++] + tb[(uint8_t)*b++]);
            *y++ = TG_ADD_OUT(ta[(uint8_t)*a++] + tb[(uint8_t)*b++]);
            *y++ = TG_ADD_OUT(ta[(uint8_t)*a++] + tb[(uint8_t)*b++]);
            *y++ = TG_ADD_OUT(ta[(uint8_t)*a++] + tb[(uint8_t)*b++]);
        }
        while (y != end) {
            *y++ = TG_ADD_OUT(ta[(uint8_t)*a++] + tb[(uint8_t)*b++]);
        }
    } else {
        for (; y != end; a += sa, b += sb) {
            *y++ = TG_ADD_OUT(ta[(uint8_t)*a] + tb[(uint8_t)*b]);
        }
    }
#undef TG_ADD_OUT
}

static void tg_add_row_tables(const tg_eltwise_job_t *job, const int8_t *a, int32_t sa,
                              const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    const tg_eltwise_params_t *p = job->p;
    if (p->act_min == -128 && p->act_max == 127) {
        tg_add_tables_loop(p, a, sa, b, sb, y, n, 0);
    } else {
        tg_add_tables_loop(p, a, sa, b, sb, y, n, 1);
    }
}

static void tg_add_row_fixed(const tg_eltwise_job_t *job, const int8_t *a, int32_t sa,
                             const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    /* Locals, not p->: y is int8, so every store could otherwise change *p. */
    const tg_eltwise_params_t *p = job->p;
    const int32_t out_mult = p->out_mult, out_shift = p->out_shift, out_zp = p->out_zp;
    const int32_t act_min = p->act_min, act_max = p->act_max;
    int32_t i;
    for (i = 0; i < n; ++i) {
        const int64_t sum = tg_add_rescale(a[i * sa], p->a_zp, p->left_shift, p->a_mult,
                                           p->a_shift)
                          + tg_add_rescale(b[i * sb], p->b_zp, p->left_shift, p->b_mult,
                                           p->b_shift);
        y[i] = (int8_t)tg_clamp32(out_zp + tg_mul_shift(sum, out_mult, out_shift),
                                  act_min, act_max);
    }
}

static void tg_mul_row_fixed(const tg_eltwise_job_t *job, const int8_t *a, int32_t sa,
                             const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    const tg_eltwise_params_t *p = job->p;
    const int32_t a_zp = p->a_zp, b_zp = p->b_zp;
    const int32_t out_mult = p->out_mult, out_shift = p->out_shift, out_zp = p->out_zp;
    const int32_t act_min = p->act_min, act_max = p->act_max;
    int32_t i;
    for (i = 0; i < n; ++i) {
        const int32_t prod = (a[i * sa] - a_zp) * (b[i * sb] - b_zp);
        y[i] = (int8_t)tg_clamp32(out_zp + tg_mul_shift(prod, out_mult, out_shift),
                                  act_min, act_max);
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

static void tg_add_row_float(const tg_eltwise_job_t *job, const int8_t *a, int32_t sa,
                             const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    const tg_eltwise_params_t *p = job->p;
    int32_t i;
    for (i = 0; i < n; ++i) {
        const float av = (float)(a[i * sa] + p->raw_offset);
        const float bv = (float)(b[i * sb] + p->raw_offset);
        const float v = p->a_bcast_inner ? fmaf(bv, p->b_ratio, fmaf(av, p->a_ratio, p->bias))
                                         : fmaf(av, p->a_ratio, fmaf(bv, p->b_ratio, p->bias));
        y[i] = tg_eltwise_round(p, v);
    }
}

static void tg_mul_row_float(const tg_eltwise_job_t *job, const int8_t *a, int32_t sa,
                             const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    const tg_eltwise_params_t *p = job->p;
    int32_t i;
    for (i = 0; i < n; ++i) {
        const int32_t prod = (a[i * sa] - p->a_zp) * (b[i * sb] - p->b_zp);
        y[i] = tg_eltwise_round(p, (float)prod * p->ab_ratio + p->bias);
    }
}
#endif

static void tg_eltwise_run(const tg_eltwise_job_t *job, const int8_t *a, const int8_t *b,
                           int8_t *y, tg_eltwise_row_fn row)
{
    const tg_eltwise_params_t *p = job->p;
    const int32_t *s = p->shape;
    int32_t i0, i1, i2;
    for (i0 = 0; i0 < s[0]; ++i0) {
        for (i1 = 0; i1 < s[1]; ++i1) {
            const int8_t *a1 = a + i0 * p->a_stride[0] + i1 * p->a_stride[1];
            const int8_t *b1 = b + i0 * p->b_stride[0] + i1 * p->b_stride[1];
            for (i2 = 0; i2 < s[2]; ++i2) {
                row(job, a1 + i2 * p->a_stride[2], p->a_stride[3], b1 + i2 * p->b_stride[2],
                    p->b_stride[3], y, s[3]);
                y += s[3];
            }
        }
    }
}

void tg_add(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y)
{
    tg_eltwise_job_t job;
    job.p = p;
#if TG_WITH_FLOAT_REQUANT
    if (p->use_float) {
        tg_eltwise_run(&job, a, b, y, tg_add_row_float);
        return;
    }
#endif
    tg_eltwise_run(&job, a, b, y, p->a_table != NULL ? tg_add_row_tables : tg_add_row_fixed);
}

void tg_mul(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y)
{
    tg_eltwise_job_t job;
    job.p = p;
#if TG_WITH_FLOAT_REQUANT
    if (p->use_float) {
        tg_eltwise_run(&job, a, b, y, tg_mul_row_float);
        return;
    }
#endif
    tg_eltwise_run(&job, a, b, y, tg_mul_row_fixed);
}
