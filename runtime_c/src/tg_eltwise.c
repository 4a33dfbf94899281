/* tg_eltwise.c - elementwise Add and Mul with broadcasting, contract in tg_eltwise.h.
 *
 * The three outer axes are walked with the input strides; the innermost axis is handed to a
 * row function (one per op and mode), so the per-element work has no mode tests. Each output
 * element is written after both of its inputs are read, which makes y == a or y == b safe
 * when that input is dense. Fixed-mode sums stay far inside int64: (a - a_zp) << left_shift
 * is below 2^29 for left_shift <= 20.
 * Fixed-mode Add of TG_ADD_TABLE_MIN elements or more first works out the rescaled input
 * mul_shift((v - zp) << left_shift, mult, shift) of all 256 byte values of each input (two
 * int32 tables on the stack), so each element costs two look-ups instead of two 64-bit
 * multiply-shifts; the values are the same ones, computed by the same expression.
 */
#include "tg_eltwise.h"

#if TG_WITH_FLOAT_REQUANT
#include <math.h>
#endif

#define TG_ADD_TABLE_MIN 512  /* elements from which building the two tables pays off */

/* The rescaled inputs of fixed-mode Add for every byte value v, at index v + 128. */
typedef struct {
    int32_t a[256];
    int32_t b[256];
} tg_add_tables_t;

/* What a row function gets: the params, and the Add tables when they were built (or NULL). */
typedef struct {
    const tg_eltwise_params_t *p;
    const tg_add_tables_t *tables;
} tg_eltwise_job_t;

typedef void (*tg_eltwise_row_fn)(const tg_eltwise_job_t *job, const int8_t *a, int32_t sa,
                                  const int8_t *b, int32_t sb, int8_t *y, int32_t n);

/* The fixed-mode rescaling of one Add input, (v - zp) << left_shift times mult >> shift. */
static int64_t tg_add_rescale(int32_t v, int32_t zp, int32_t left_shift, int32_t mult,
                              int32_t shift)
{
    return tg_mul_shift((int64_t)(v - zp) * ((int64_t)1 << left_shift), mult, shift);
}

/* t[v + 128] = tg_add_rescale(v, ...) for all int8 v; returns the largest |t| (a value
 * outside int32, or INT32_MAX, means no table). */
static int64_t tg_add_table(int32_t zp, int32_t left_shift, int32_t mult, int32_t shift,
                            int32_t *t)
{
    int64_t largest = 0;
    int32_t v;
    for (v = -128; v < 128; ++v) {
        const int64_t r = tg_add_rescale(v, zp, left_shift, mult, shift);
        const int64_t mag = r < 0 ? -r : r;
        if (mag >= INT32_MAX) {
            return INT32_MAX;
        }
        largest = mag > largest ? mag : largest;
        t[v + 128] = (int32_t)r;
    }
    return largest;
}

static void tg_add_row_fixed(const tg_eltwise_job_t *job, const int8_t *a, int32_t sa,
                             const int8_t *b, int32_t sb, int8_t *y, int32_t n)
{
    /* Locals, not p->: y is int8, so every store could otherwise change *p. */
    const tg_eltwise_params_t *p = job->p;
    const int32_t out_mult = p->out_mult, out_shift = p->out_shift, out_zp = p->out_zp;
    const int32_t act_min = p->act_min, act_max = p->act_max;
    int32_t i;
    if (job->tables != NULL) {
        const int32_t *ta = job->tables->a;
        const int32_t *tb = job->tables->b;
        for (i = 0; i < n; ++i) {
            const int32_t sum = ta[a[i * sa] + 128] + tb[b[i * sb] + 128];  /* fits: tg_add */
            y[i] = (int8_t)tg_clamp32(out_zp + tg_mul_shift(sum, out_mult, out_shift),
                                      act_min, act_max);
        }
        return;
    }
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
    tg_add_tables_t tables;
    job.p = p;
    job.tables = NULL;
#if TG_WITH_FLOAT_REQUANT
    if (p->use_float) {
        tg_eltwise_run(&job, a, b, y, tg_add_row_float);
        return;
    }
#endif
    /* Tables only when the sum of two entries stays inside int32 (one 32-bit multiply). */
    if (p->shape[0] * p->shape[1] * p->shape[2] * p->shape[3] >= TG_ADD_TABLE_MIN
        && tg_add_table(p->a_zp, p->left_shift, p->a_mult, p->a_shift, tables.a)
           + tg_add_table(p->b_zp, p->left_shift, p->b_mult, p->b_shift, tables.b)
           < INT32_MAX) {
        job.tables = &tables;
    }
    tg_eltwise_run(&job, a, b, y, tg_add_row_fixed);
}

void tg_mul(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y)
{
    tg_eltwise_job_t job;
    job.p = p;
    job.tables = NULL;
#if TG_WITH_FLOAT_REQUANT
    if (p->use_float) {
        tg_eltwise_run(&job, a, b, y, tg_mul_row_float);
        return;
    }
#endif
    tg_eltwise_run(&job, a, b, y, tg_mul_row_fixed);
}
