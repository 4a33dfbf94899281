/* tg_fc.c - fully connected / matrix multiply, contract in tg_fc.h.
 *
 * Accumulators are int32 and are not checked: x - x_zp and w - w_zp both lie in [-255, 255],
 * and the compiler only emits a layer whose |bias| + depth*255*255 fits in int32.
 * Contiguous weights (w_stride_k == 1, the constant [out][depth] layout) take two outputs per
 * pass over x, so each x word loaded and widened serves both weight rows; any other stride
 * (the run-time [depth][out] operand) accumulates a block of outputs at once, walking each
 * weight row along w_stride_o. A weight zero point comes off at the end on both paths:
 * sum (x - xz)(w - wz) = sum (x - xz) w - wz * sum (x - xz).
 * Cores with the DSP extension (Cortex-M4/M7/M33...) run the two-output loop as short inline
 * assembly with SXTAB16/SXTB16/SMLAD (four products per SMLAD pair); other cores, other
 * compilers and unoptimized builds (where gcc cannot give the assembly its registers) run
 * plain C. Cores with Helium (Cortex-M55) run it as a tail-predicated vector loop
 * (tg_arm_mve.h). The helpers are private to this file, as in tg_conv.c.
 * A constant weight comes as a pack instead (tg_fc.h): each row runs on the blocked matrix
 * core (tg_mat.h: four output channels per pass, SMLAD assembly on DSP cores).
 */
#include "tg_fc.h"

#include <string.h>

#define TG_MAT_ROW 1  /* the one-row routines of the matrix core */
#include "tg_mat.h"
#include "tg_arm_mve.h"

#define TG_FC_DSP TG_DSP  /* tg_arm_dsp.h: off with --kernels portable */

/* Kept out of line: inlined into the output loop, gcc -Os spills its live values. */
#if defined(__GNUC__)
#define TG_FC_NOINLINE __attribute__((noinline))
#else
#define TG_FC_NOINLINE
#endif

/* Outputs accumulated together on the strided path (a stack array, no scratch needed). */
#define TG_FC_BLOCK 16

static inline void tg_fc_store(const tg_requant_t *rq, void *y, int32_t idx, int32_t acc,
                               int32_t o)
{
    if (rq != NULL) {
        ((int8_t *)y)[idx] = tg_requant(acc, rq, o);
    } else {
        ((int32_t *)y)[idx] = acc;
    }
}

/* acc[0] += sum (x[i] - xz) * w0[i], acc[1] likewise with w1, over i < len. */
static TG_FC_NOINLINE void tg_fc_dot_1x2(const int8_t *x, const int8_t *w0, const int8_t *w1,
                                         int32_t len, int32_t xz, int32_t acc[2])
{
    int32_t a0 = acc[0], a1 = acc[1];
    int32_t n;
#if TG_MVE
    if (len > 0) {  /* Helium: the whole row, tail included (tg_arm_mve.h) */
        tg_mve_dot_1x2(x, w0, w1, len, xz, acc);
        acc[0] += a0;
        acc[1] += a1;
        return;
    }
#elif TG_FC_DSP
    if (len >= 4) {
        const uint32_t off = (uint32_t)(uint16_t)(-xz) * 0x00010001u;  /* -xz in both lanes */
        uint32_t xe, xv, wv, we;
        n = len >> 2;
        /* x - xz of bytes 0,2 (xe) and 1,3 (xv) as int16 lanes, widened once for both rows. */
        __asm__ volatile(
            "1:\n\t"
            "ldr     %[xv], [%[x]], #4\n\t"
            "sxtab16 %[xe], %[off], %[xv]\n\t"
            "sxtab16 %[xv], %[off], %[xv], ror #8\n\t"
            "ldr     %[wv], [%[w0]], #4\n\t"
            "sxtb16  %[we], %[wv]\n\t"
            "sxtb16  %[wv], %[wv], ror #8\n\t"
            "smlad   %[a0], %[xe], %[we], %[a0]\n\t"
            "smlad   %[a0], %[xv], %[wv], %[a0]\n\t"
            "ldr     %[wv], [%[w1]], #4\n\t"
            "sxtb16  %[we], %[wv]\n\t"
            "sxtb16  %[wv], %[wv], ror #8\n\t"
            "smlad   %[a1], %[xe], %[we], %[a1]\n\t"
            "smlad   %[a1], %[xv], %[wv], %[a1]\n\t"
            "subs    %[n], %[n], #1\n\t"
            "bne     1b"
            : [a0] "+r"(a0), [a1] "+r"(a1), [x] "+r"(x), [w0] "+r"(w0), [w1] "+r"(w1),
              [n] "+r"(n), [xe] "=&r"(xe), [xv] "=&r"(xv), [wv] "=&r"(wv), [we] "=&r"(we)
            : [off] "r"(off)
            : "cc", "memory");
        len &= 3;
    }
#endif
    for (n = len; n != 0; --n) {
        const int32_t xv = (int32_t)*x++ - xz;
        a0 += xv * *w0++;
        a1 += xv * *w1++;
    }
    acc[0] = a0;
    acc[1] = a1;
}

/* Sum of x[k] - xz over k < depth (for a weight zero point). */
static int32_t tg_fc_x_sum(const int8_t *x, int32_t depth, int32_t xz)
{
    int32_t s = 0;
    int32_t k;
    for (k = 0; k < depth; ++k) {
        s += (int32_t)x[k] - xz;
    }
    return s;
}

/* Weights contiguous along depth: two outputs per pass (a lone last one pairs with itself). */
static void tg_fc_rows_contiguous(const tg_fc_params_t *p, const int8_t *xr, const int8_t *w,
                                  const int32_t *bias, void *y, int32_t yi)
{
    const int32_t x_sum = p->w_zp != NULL ? tg_fc_x_sum(xr, p->depth, p->x_zp) : 0;
    int32_t o;
#if TG_MVE
    if (p->rq != NULL && p->rq->form == TG_RQ_FAST && p->depth > 0) {
        tg_mve_fc_fast(xr, w, p->w_stride_o, p->depth, p->out, p->x_zp, p->w_zp, x_sum, bias,
                       p->rq, (int8_t *)y + yi);
        return;
    }
#endif
    for (o = 0; o < p->out; o += 2) {
        const int32_t o1 = o + 1 < p->out ? o + 1 : o;
        int32_t acc[2];
        acc[0] = bias != NULL ? bias[o] : 0;
        acc[1] = bias != NULL ? bias[o1] : 0;
        tg_fc_dot_1x2(xr, w + o * p->w_stride_o, w + o1 * p->w_stride_o, p->depth, p->x_zp,
                      acc);
        if (p->w_zp != NULL) {
            acc[0] -= p->w_zp[o] * x_sum;
            acc[1] -= p->w_zp[o1] * x_sum;
        }
        tg_fc_store(p->rq, y, yi + o, acc[0], o);
        if (o1 != o) {
            tg_fc_store(p->rq, y, yi + o1, acc[1], o1);
        }
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
        const int32_t x_sum = tg_fc_x_sum(xr, p->depth, p->x_zp);
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
    if (p->pack != NULL) {
        const int32_t e = p->rq != NULL ? 1 : 4;  /* output element bytes */
        (void)w, (void)bias;
        for (m = 0; m < p->rows; ++m) {
            tg_mat_row(p->pack, p->rq, x + m * p->depth, p->depth, p->out,
                       (int8_t *)y + m * p->out * e);
        }
        return;
    }
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
