/* tg_conv.c - direct convolution, channels-last, contract in tg_conv.h.
 *
 * tg_conv works on two output pixels at a time. It gathers each pixel's receptive field
 * ("patch") in weight order (ky, kx, channel of the group) into a small stack buffer as
 * int16 x - in_zp, padding as 0, so the zero point and the padding are dealt with once per
 * pixel instead of once per output channel. Each output channel is then a plain dot product
 * of the patch with the channel's weight row, taken for two channels and both pixels at
 * once: every weight word loaded serves two pixels, every patch word two channels. A weight
 * zero point comes off at the end: sum x'(w - wz) = sum x'w - wz * sum x' (x' = x - in_zp).
 * A patch longer than TG_CONV_PATCH is taken in pieces. The sums of up to TG_CONV_BLOCK
 * channels wait in a stack array and are requantized one pixel at a time.
 * tg_dwconv with multiplier 1 runs four channels at a time: one input word holds four
 * neighbouring channels, and a per-call table of int16 weights in [tap][channel] order
 * holds their weights side by side. The valid tap range is worked out once per pixel, so
 * the tap loops never test for padding.
 *
 * Other multipliers, and kernels too large for the table, take a plain per-channel loop.
 *
 * Accumulators are int32 and are not checked: the compiler only emits a convolution whose
 * |bias| + k_h*k_w*(in_c/groups)*255*255 fits in int32. Every partial sum below is the bias
 * plus, tap by tap, terms of at most 255*255 in magnitude ((x - in_zp)*w with w a weight or
 * w - w_zp; with a folded zero point, x*w' - in_zp*w' = (x - in_zp)*w'), so it stays within
 * that bound; - w_zp*sum(x - in_zp) is such a sum too. Element offsets are int32 (tensors on
 * the target are far below 2^31 elements).
 * Cores with the DSP extension (Cortex-M4/M7/M33...) run the inner loops as short GNU inline
 * assembly (gcc -Os would spill their twelve registers) with SXTB16/SMLAD and SMLAxy.
 * Other cores, other compilers and unoptimized builds (where gcc cannot give the assembly
 * twelve registers) run plain C loops on the same buffers.
 */
#include "tg_conv.h"
#include "tg_window.h"

#include <string.h>

#if defined(__ARM_FEATURE_DSP) && defined(__ARM_FEATURE_SIMD32) && defined(__GNUC__) \
    && defined(__OPTIMIZE__)
#define TG_CONV_DSP 1
#else
#define TG_CONV_DSP 0
#endif

#define TG_CONV_PATCH 128  /* patch elements of one pixel held at once (a multiple of 4) */
#define TG_CONV_BLOCK 32   /* output channels whose partial sums are kept between pieces */
#define TG_DW_TABLE 512    /* int16 weights of one depthwise channel block (1 KiB) */
#define TG_DW_BLOCK 32     /* most channels in one depthwise block */

/* The valid taps of one output position: k in [lo, hi) reads input base + k*dil. */
typedef struct {
    int32_t ky0, ky1, kx0, kx1;
    int32_t base_y, base_x;
} tg_conv_window_t;

static tg_conv_window_t tg_conv_window(const tg_conv_params_t *p, int32_t oy, int32_t ox)
{
    tg_conv_window_t win;
    win.base_y = oy * p->stride_h - p->pad_top;
    win.base_x = ox * p->stride_w - p->pad_left;
    tg_tap_range(win.base_y, p->dil_h, p->k_h, p->in_h, &win.ky0, &win.ky1);
    tg_tap_range(win.base_x, p->dil_w, p->k_w, p->in_w, &win.kx0, &win.kx1);
    return win;
}

/* y[idx + q] = output channel c + q from acc[q], q < count (requantized, or raw int32). */
static void tg_conv_put(const tg_requant_t *rq, void *y, int32_t idx, const int32_t *acc,
                        int32_t c, int32_t count)
{
    int32_t q;
    if (rq == NULL) {
        memcpy((int32_t *)y + idx, acc, (size_t)count * sizeof *acc);
        return;
    }
    for (q = 0; q < count; ++q) {
        ((int8_t *)y)[idx + q] = tg_requant(acc[q], rq, c + q);
    }
}

#if TG_CONV_DSP
static inline uint32_t tg_conv_load32(const void *src)
{
    uint32_t v;
    memcpy(&v, src, sizeof v);
    return v;
}

/* off + bytes 0 and 2 of v, and off + bytes 1 and 3, sign-extended into int16 lanes. */
static inline void tg_conv_widen4(uint32_t v, uint32_t off, uint32_t *even, uint32_t *odd)
{
    __asm__("sxtab16 %0, %2, %3\n\t"
            "sxtab16 %1, %2, %3, ror #8"
            : "=&r"(*even), "=r"(*odd) : "r"(off), "r"(v));
}

/* Both int16 lanes set to -zp. */
static inline uint32_t tg_conv_neg_pair(int32_t zp)
{
    return (uint32_t)(uint16_t)(-zp) * 0x00010001u;
}
#endif

/* ---- tg_conv ------------------------------------------------------------------------- */

/* Patch elements [k0, k0 + len) of the output pixel at window win, batch b, group g, as
 * int8. Element k is tap k / in_pg, channel g*in_pg + k % in_pg; padding reads as in_zp. */
static void tg_conv_gather(const tg_conv_params_t *p, const int8_t *x, tg_conv_window_t win,
                           int32_t b, int32_t g, int32_t k0, int32_t len, int8_t *dst)
{
    const int32_t in_pg = p->in_c / p->groups;
    /* Neighbouring taps of one kernel row are neighbours in x too: copy them as one run. */
    const int taps_adjacent = p->dil_w == 1 && in_pg == p->in_c;
    const int32_t end = k0 + len;
    int32_t k = k0;
    while (k < end) {
        const int32_t tap = k / in_pg;
        const int32_t ci = k - tap * in_pg;
        const int32_t ky = tap / p->k_w;
        const int32_t kx = tap - ky * p->k_w;
        const int row_valid = ky >= win.ky0 && ky < win.ky1;
        int32_t run;
        if (!row_valid || kx >= win.kx1) {
            run = (p->k_w - kx) * in_pg - ci;  /* the rest of this kernel row is padding */
        } else if (kx < win.kx0) {
            run = (win.kx0 - kx) * in_pg - ci;
        } else {
            run = (taps_adjacent ? win.kx1 - kx : 1) * in_pg - ci;
        }
        run = run < end - k ? run : end - k;
        if (!row_valid || kx < win.kx0 || kx >= win.kx1) {
            memset(dst, (int8_t)p->in_zp, (size_t)run);
        } else {
            const int32_t iy = win.base_y + ky * p->dil_h;
            const int32_t ix = win.base_x + kx * p->dil_w;
            memcpy(dst, x + ((b * p->in_h + iy) * p->in_w + ix) * p->in_c + g * in_pg + ci,
                   (size_t)run);
        }
        dst += run;
        k += run;
    }
}

/* Patch elements [k0, k0 + len) of output pixel pix (flat over n, out_h, out_w), group g:
 * a pointer into x itself when they are one contiguous run there (a window without padding
 * whose kernel rows follow each other in memory, as in 1x1 and 1-D convolutions), else
 * gathered into raw. */
static const int8_t *tg_conv_patch(const tg_conv_params_t *p, const int8_t *x, int32_t pix,
                                   int32_t g, int32_t k0, int32_t len, int8_t *raw)
{
    const int32_t ox = pix % p->out_w;
    const int32_t oy = (pix / p->out_w) % p->out_h;
    const int32_t b = pix / (p->out_w * p->out_h);
    const tg_conv_window_t win = tg_conv_window(p, oy, ox);
    const int full = win.ky0 == 0 && win.ky1 == p->k_h && win.kx0 == 0 && win.kx1 == p->k_w;
    const int rows_follow = p->k_h == 1 || (p->dil_h == 1 && p->k_w == p->in_w);
    if (full && rows_follow && p->groups == 1 && p->dil_w == 1) {
        return x + ((b * p->in_h + win.base_y) * p->in_w + win.base_x) * p->in_c + k0;
    }
    tg_conv_gather(p, x, win, b, g, k0, len, raw);
    return raw;
}

/* raw (len int8, padding already in_zp) -> xw, int16 x - in_zp. The DSP path stores each
 * group of four elements as lanes 0,2 then 1,3 (what SXTB16 makes of a weight word); a last
 * partial group ends at element len - 1 and has the elements before len & ~3 set to 0, so it
 * pairs with the weight word at len - 4. */
static void tg_conv_widen_patch(const int8_t *raw, int32_t len, int32_t in_zp, int16_t *xw)
{
    int32_t i = 0;
#if TG_CONV_DSP
    const uint32_t off = tg_conv_neg_pair(in_zp);
    uint32_t pair[2];
    for (; i + 4 <= len; i += 4) {
        tg_conv_widen4(tg_conv_load32(raw + i), off, &pair[0], &pair[1]);
        memcpy(xw + i, pair, sizeof pair);
    }
    if (i < len && len >= 4) {
        int8_t last[4];
        memcpy(last, raw + len - 4, sizeof last);
        memset(last, (int8_t)in_zp, (size_t)(i + 4 - len));  /* already in the groups before */
        tg_conv_widen4(tg_conv_load32(last), off, &pair[0], &pair[1]);
        memcpy(xw + i, pair, sizeof pair);
        return;
    }
#endif
    for (; i < len; ++i) {  /* plain path, or a patch shorter than one group */
        xw[i] = (int16_t)(raw[i] - in_zp);
    }
}

/* The two pixels' widened patches: pixel 1's starts TG_CONV_PATCH elements after pixel 0's.
 * The union gives the word alignment the DSP loads need. */
typedef union {
    int16_t h[2][TG_CONV_PATCH];
    uint32_t words[TG_CONV_PATCH];
} tg_conv_patches_t;

#if TG_CONV_DSP
/* The 2x2 dot products over groups of four: acc0 += {x0.w0, x0.w1}, acc1 += {x1.w0, x1.w1};
 * x0 is a widened patch (lanes 0,2 / 1,3), x1 the one after it. groups >= 1. */
static inline void tg_conv_dot_2x2_groups(const int16_t *x0, const int8_t *w0,
                                          const int8_t *w1, int32_t groups, int32_t *acc0,
                                          int32_t *acc1)
{
    int32_t a00 = acc0[0], a01 = acc0[1], a10 = acc1[0], a11 = acc1[1];
    uint32_t xe, xo, wv, we;
    /* Each weight word is widened once and meets both pixels; pixel 1's patch is reloaded
     * (LDRD, one instruction) rather than kept, so the loop fits in twelve registers. */
    __asm__ volatile(
        "1:\n\t"
        "ldrd    %[xe], %[xo], [%[x], %[p1]]\n\t"
        "ldr     %[wv], [%[w0]], #4\n\t"
        "sxtb16  %[we], %[wv]\n\t"
        "sxtb16  %[wv], %[wv], ror #8\n\t"
        "smlad   %[a10], %[xe], %[we], %[a10]\n\t"
        "smlad   %[a10], %[xo], %[wv], %[a10]\n\t"
        "ldrd    %[xe], %[xo], [%[x]], #8\n\t"
        "smlad   %[a00], %[xe], %[we], %[a00]\n\t"
        "smlad   %[a00], %[xo], %[wv], %[a00]\n\t"
        "ldr     %[wv], [%[w1]], #4\n\t"
        "sxtb16  %[we], %[wv]\n\t"
        "sxtb16  %[wv], %[wv], ror #8\n\t"
        "smlad   %[a01], %[xe], %[we], %[a01]\n\t"
        "smlad   %[a01], %[xo], %[wv], %[a01]\n\t"
        "ldrd    %[xe], %[xo], [%[x], %[p1b]]\n\t"
        "smlad   %[a11], %[xe], %[we], %[a11]\n\t"
        "smlad   %[a11], %[xo], %[wv], %[a11]\n\t"
        "subs    %[n], %[n], #1\n\t"
        "bne     1b"
        : [a00] "+r"(a00), [a01] "+r"(a01), [a10] "+r"(a10), [a11] "+r"(a11),
          [x] "+r"(x0), [w0] "+r"(w0), [w1] "+r"(w1), [n] "+r"(groups),
          [xe] "=&r"(xe), [xo] "=&r"(xo), [wv] "=&r"(wv), [we] "=&r"(we)
        : [p1] "i"(TG_CONV_PATCH * 2), [p1b] "i"(TG_CONV_PATCH * 2 - 8)
        : "cc", "memory");
    acc0[0] = a00;
    acc0[1] = a01;
    acc1[0] = a10;
    acc1[1] = a11;
}
#endif

/* GNU C's noinline, for loops that gcc -Os would spill when inlined into their callers. */
#if defined(__GNUC__)
#define TG_CONV_NOINLINE __attribute__((noinline))
#else
#define TG_CONV_NOINLINE
#endif

/* The plain-C 2x2 loop stays out of line (inlined into the row loop, gcc -Os spills it);
 * the assembly loop is inlined, its registers being its own anyway. */
#if TG_CONV_DSP
#define TG_CONV_DOT_LINKAGE static inline
#else
#define TG_CONV_DOT_LINKAGE static TG_CONV_NOINLINE
#endif

/* acc0 += {x0.w0, x0.w1}, acc1 += {x1.w0, x1.w1} over len patch elements (x0, x1: the
 * two pixels' patches). */
TG_CONV_DOT_LINKAGE void tg_conv_dot_2x2(const tg_conv_patches_t *xw, const int8_t *w0,
                                         const int8_t *w1, int32_t len, int32_t *acc0,
                                         int32_t *acc1)
{
    const int16_t *x0 = xw->h[0];
    int32_t a00, a01, a10, a11;
    int32_t n;
#if TG_CONV_DSP
    if (len >= 4) {
        tg_conv_dot_2x2_groups(x0, w0, w1, len >> 2, acc0, acc1);
        if ((len & 3) != 0) {  /* the last partial group pairs with the weight word at len - 4 */
            tg_conv_dot_2x2_groups(x0 + (len & ~3), w0 + len - 4, w1 + len - 4, 1, acc0, acc1);
        }
        return;
    }
#endif
    a00 = acc0[0];
    a01 = acc0[1];
    a10 = acc1[0];
    a11 = acc1[1];
    for (n = len; n != 0; --n) {
        const int32_t u0 = x0[0], u1 = x0[TG_CONV_PATCH], v0 = *w0++, v1 = *w1++;
        ++x0;
        a00 += u0 * v0;
        a01 += u0 * v1;
        a10 += u1 * v0;
        a11 += u1 * v1;
    }
    acc0[0] = a00;
    acc0[1] = a01;
    acc1[0] = a10;
    acc1[1] = a11;
}

/* The dot products of nc weight rows (k_len apart, from w) with both patches, two rows at a
 * time (a lone last row pairs with itself; its twin lands in the spare slot acc[nc]). */
static TG_CONV_NOINLINE void tg_conv_dot_rows(const tg_conv_patches_t *xw, const int8_t *w,
                                              int32_t nc, int32_t k_len, int32_t len,
                                              int32_t *acc0, int32_t *acc1)
{
    int32_t j;
    for (j = 0; j < nc; j += 2) {
        const int8_t *w0 = w + j * k_len;
        tg_conv_dot_2x2(xw, w0, j + 1 < nc ? w0 + k_len : w0, len, acc0 + j, acc1 + j);
    }
}

/* Sum of len int8 values. */
static int32_t tg_conv_sum(const int8_t *v, int32_t len)
{
    int32_t s = 0;
    int32_t i;
    for (i = 0; i < len; ++i) {
        s += v[i];
    }
    return s;
}

/* What one call shares: sizes, and the channel block being worked on. */
typedef struct {
    const tg_conv_params_t *p;
    const int8_t *x;
    const int8_t *w;
    const int32_t *bias;
    void *y;
    int32_t k_len, npix;
    int32_t g, c0, nc;  /* group, first channel and channel count of the block */
} tg_conv_job_t;

/* Scratch of one call, on the stack. */
typedef struct {
    int8_t raw[TG_CONV_PATCH];
    tg_conv_patches_t xw;
    int32_t acc[2][TG_CONV_BLOCK + 1];  /* both pixels' sums; + 1: a lone last channel's twin */
} tg_conv_scratch_t;

/* The channels of the block for output pixels pix and pix1 (pix1 == pix for a lone pixel):
 * the sums build up in s->acc over the patch pieces, then go out one pixel at a time. */
static void tg_conv_pixel_pair(const tg_conv_job_t *job, int32_t pix, int32_t pix1,
                               tg_conv_scratch_t *s)
{
    const tg_conv_params_t *p = job->p;
    const int32_t nc = job->nc, c0 = job->c0, k_len = job->k_len;
    const int8_t *wb = job->w + c0 * k_len;  /* the block's first weight row */
    int32_t xsum0 = 0, xsum1 = 0;  /* sums of x - in_zp, for a weight zero point */
    int32_t k0, j;
    memcpy(s->acc[0], job->bias + c0, (size_t)nc * sizeof(int32_t));
    memcpy(s->acc[1], job->bias + c0, (size_t)nc * sizeof(int32_t));
    s->acc[0][nc] = 0;
    s->acc[1][nc] = 0;
    for (k0 = 0; k0 < k_len; k0 += TG_CONV_PATCH) {
        const int32_t len = k_len - k0 < TG_CONV_PATCH ? k_len - k0 : TG_CONV_PATCH;
        const int8_t *src = tg_conv_patch(p, job->x, pix, job->g, k0, len, s->raw);
        tg_conv_widen_patch(src, len, p->in_zp, s->xw.h[0]);
        if (p->w_zp != NULL) {
            xsum0 += tg_conv_sum(src, len) - len * p->in_zp;
        }
        src = tg_conv_patch(p, job->x, pix1, job->g, k0, len, s->raw);
        tg_conv_widen_patch(src, len, p->in_zp, s->xw.h[1]);
        if (p->w_zp != NULL) {
            xsum1 += tg_conv_sum(src, len) - len * p->in_zp;
        }
        tg_conv_dot_rows(&s->xw, wb + k0, nc, k_len, len, s->acc[0], s->acc[1]);
    }
    if (p->w_zp != NULL) {
        for (j = 0; j < nc; ++j) {
            s->acc[0][j] -= p->w_zp[c0 + j] * xsum0;
            s->acc[1][j] -= p->w_zp[c0 + j] * xsum1;
        }
    }
    tg_conv_put(p->rq, job->y, pix * p->out_c + c0, s->acc[0], c0, nc);
    tg_conv_put(p->rq, job->y, pix1 * p->out_c + c0, s->acc[1], c0, nc);
}

void tg_conv(const tg_conv_params_t *p, const int8_t *x, const int8_t *w,
             const int32_t *bias, void *y)
{
    const int32_t out_pg = p->out_c / p->groups;
    tg_conv_scratch_t scratch;
    tg_conv_job_t job;
    int32_t pix;
    job.p = p;
    job.x = x;
    job.w = w;
    job.bias = bias;
    job.y = y;
    job.k_len = p->k_h * p->k_w * (p->in_c / p->groups);
    job.npix = p->n * p->out_h * p->out_w;
    for (job.g = 0; job.g < p->groups; ++job.g) {
        for (job.c0 = job.g * out_pg; job.c0 < (job.g + 1) * out_pg; job.c0 += TG_CONV_BLOCK) {
            const int32_t left = (job.g + 1) * out_pg - job.c0;
            job.nc = left < TG_CONV_BLOCK ? left : TG_CONV_BLOCK;
            for (pix = 0; pix < job.npix; pix += 2) {
                tg_conv_pixel_pair(&job, pix, pix + 1 < job.npix ? pix + 1 : pix, &scratch);
            }
        }
    }
}

/* ---- tg_dwconv ----------------------------------------------------------------------- */

/* One depthwise output channel over the valid window, any multiplier; xc points at
 * x[b][0][0][ic]. The general path: tg_dwconv takes it for multiplier > 1 and huge kernels. */
static int32_t tg_dwconv_window(const tg_conv_params_t *p, const tg_conv_window_t *win,
                                const int8_t *xc, const int8_t *wc, int32_t wz)
{
    int32_t acc = 0;
    int32_t ky;
    int32_t kx;
    for (ky = win->ky0; ky < win->ky1; ++ky) {
        const int32_t row = (win->base_y + ky * p->dil_h) * p->in_w + win->base_x;
        const int8_t *wr = wc + ky * p->k_w;
        for (kx = win->kx0; kx < win->kx1; ++kx) {
            acc += ((int32_t)xc[(row + kx * p->dil_w) * p->in_c] - p->in_zp)
                   * ((int32_t)wr[kx] - wz);
        }
    }
    return acc;
}

static void tg_dwconv_general(const tg_conv_params_t *p, const int8_t *x, const int8_t *w,
                              const int32_t *bias, void *y)
{
    const int32_t multiplier = p->out_c / p->in_c;
    const int32_t taps = p->k_h * p->k_w;
    int32_t b, oy, ox, c;
    for (b = 0; b < p->n; ++b) {
        const int8_t *xb = x + b * p->in_h * p->in_w * p->in_c;
        for (oy = 0; oy < p->out_h; ++oy) {
            for (ox = 0; ox < p->out_w; ++ox) {
                const tg_conv_window_t win = tg_conv_window(p, oy, ox);
                const int32_t yi = ((b * p->out_h + oy) * p->out_w + ox) * p->out_c;
                for (c = 0; c < p->out_c; ++c) {
                    const int32_t wz = p->w_zp != NULL ? p->w_zp[c] : 0;
                    const int32_t acc = bias[c] + tg_dwconv_window(p, &win, xb + c / multiplier,
                                                                   w + c * taps, wz);
                    tg_conv_put(p->rq, y, yi + c, &acc, c, 1);
                }
            }
        }
    }
}

/* Multiplier 1: the weights w - w_zp of channels [c0, c0 + nc) as int16, one group of four
 * channels after the other, each [tap][4] (the last group padded with zero weights): the
 * four channels of one input word meet four neighbouring weights, and each next tap's
 * weights follow at a fixed distance. */
typedef union {
    int16_t h[TG_DW_TABLE];
    uint32_t words[TG_DW_TABLE / 2];  /* word alignment for the DSP loads */
} tg_dw_table_t;

/* Fills the table; wsum[j] = sum over all taps of channel j's table weights. */
static void tg_dwconv_table(const tg_conv_params_t *p, const int8_t *w, int32_t c0, int32_t nc,
                            tg_dw_table_t *wt, int32_t *wsum)
{
    const int32_t taps = p->k_h * p->k_w;
    int32_t j, t;
    for (j = 0; j < ((nc + 3) & ~3); ++j) {
        const int32_t wz = (j < nc && p->w_zp != NULL) ? p->w_zp[c0 + j] : 0;
        int16_t *col = wt->h + (j >> 2) * taps * 4 + (j & 3);
        int32_t sum = 0;
        for (t = 0; t < taps; ++t) {
            col[t * 4] = (int16_t)(j < nc ? w[(c0 + j) * taps + t] - wz : 0);
            sum += col[t * 4];
        }
        if (j < nc) {
            wsum[j] = sum;
        }
    }
}

/* How one output pixel walks its valid window (shared by all its channel groups): rows of
 * cols taps, x_step bytes apart in x; after a row, x moves on by x_row and the weights
 * ([tap][4] int16) by w_row elements. */
typedef struct {
    int32_t rows, cols, x_step, x_row, w_row;
    int32_t x0, w0;  /* offsets of the first valid tap: bytes into x, elements into a group */
} tg_dw_walk_t;

static tg_dw_walk_t tg_dwconv_walk(const tg_conv_params_t *p, const tg_conv_window_t *win)
{
    tg_dw_walk_t wk;
    wk.rows = win->ky1 - win->ky0;
    wk.cols = win->kx1 - win->kx0;
    wk.x_step = p->dil_w * p->in_c;
    wk.x_row = p->dil_h * p->in_w * p->in_c - wk.cols * wk.x_step;
    wk.w_row = (p->k_w - wk.cols) * 4;
    wk.x0 = ((win->base_y + win->ky0 * p->dil_h) * p->in_w + win->base_x
             + win->kx0 * p->dil_w) * p->in_c;
    wk.w0 = (win->ky0 * p->k_w + win->kx0) * 4;
    return wk;
}

/* a[0..3] += the window sums of four neighbouring channels: xr points at the first valid
 * tap of the first channel, wr at its weights; the window is not empty. */
static TG_CONV_NOINLINE void tg_dwconv_quad(const int8_t *xr, const int16_t *wr,
                                            const tg_dw_walk_t *wk, int32_t in_zp,
                                            int32_t a[4])
{
#if TG_CONV_DSP
    const uint32_t off = tg_conv_neg_pair(in_zp);
    const int32_t x_step = wk->x_step, x_row = wk->x_row, w_row = wk->w_row, cols = wk->cols;
    int32_t a0 = a[0], a1 = a[1], a2 = a[2], a3 = a[3];
    int32_t r;
    for (r = wk->rows; r != 0; --r) {
        int32_t n = cols;
        uint32_t v, e, wv;
        /* x - in_zp of channels c, c+2 (e) and c+1, c+3 (v) as int16 lanes; the weight
         * words hold channels c, c+1 and c+2, c+3, so SMLAxy picks the matching lanes. */
        __asm__ volatile(
            "1:\n\t"
            "ldr     %[v], [%[x]]\n\t"
            "add     %[x], %[x], %[xs]\n\t"
            "ldr     %[wv], [%[w]], #4\n\t"
            "sxtab16 %[e], %[off], %[v]\n\t"
            "sxtab16 %[v], %[off], %[v], ror #8\n\t"
            "smlabb  %[a0], %[e], %[wv], %[a0]\n\t"
            "smlabt  %[a1], %[v], %[wv], %[a1]\n\t"
            "ldr     %[wv], [%[w]], #4\n\t"
            "smlatb  %[a2], %[e], %[wv], %[a2]\n\t"
            "smlatt  %[a3], %[v], %[wv], %[a3]\n\t"
            "subs    %[n], %[n], #1\n\t"
            "bne     1b"
            : [a0] "+r"(a0), [a1] "+r"(a1), [a2] "+r"(a2), [a3] "+r"(a3),
              [x] "+r"(xr), [w] "+r"(wr), [n] "+r"(n),
              [v] "=&r"(v), [e] "=&r"(e), [wv] "=&r"(wv)
            : [xs] "r"(x_step), [off] "r"(off)
            : "cc", "memory");
        xr += x_row;
        wr += w_row;
    }
    a[0] = a0;
    a[1] = a1;
    a[2] = a2;
    a[3] = a3;
#else
    const int32_t x_step = wk->x_step, x_row = wk->x_row, w_row = wk->w_row, cols = wk->cols;
    int32_t a0 = a[0], a1 = a[1], a2 = a[2], a3 = a[3];
    int32_t r, n;
    for (r = wk->rows; r != 0; --r) {
        if (in_zp == 0) {  /* the caller folded the zero point into a: one op less per MAC */
            for (n = cols; n != 0; --n) {
                a0 += xr[0] * wr[0];
                a1 += xr[1] * wr[1];
                a2 += xr[2] * wr[2];
                a3 += xr[3] * wr[3];
                xr += x_step;
                wr += 4;
            }
        } else {
            for (n = cols; n != 0; --n) {
                a0 += ((int32_t)xr[0] - in_zp) * wr[0];
                a1 += ((int32_t)xr[1] - in_zp) * wr[1];
                a2 += ((int32_t)xr[2] - in_zp) * wr[2];
                a3 += ((int32_t)xr[3] - in_zp) * wr[3];
                xr += x_step;
                wr += 4;
            }
        }
        xr += x_row;
        wr += w_row;
    }
    a[0] = a0;
    a[1] = a1;
    a[2] = a2;
    a[3] = a3;
#endif
}

/* The window sum of one channel (one left over after the groups of four): xr, wr as for
 * tg_dwconv_quad, the channel's weights every fourth element from wr. */
static int32_t tg_dwconv_single(const int8_t *xr, const int16_t *wr, const tg_dw_walk_t *wk,
                                int32_t in_zp)
{
    int32_t acc = 0;
    int32_t r, n;
    for (r = wk->rows; r != 0; --r) {
        for (n = wk->cols; n != 0; --n) {
            acc += ((int32_t)*xr - in_zp) * *wr;
            xr += wk->x_step;
            wr += 4;
        }
        xr += wk->x_row;
        wr += wk->w_row;
    }
    return acc;
}

void tg_dwconv(const tg_conv_params_t *p, const int8_t *x, const int8_t *w,
               const int32_t *bias, void *y)
{
    const int32_t taps = p->k_h * p->k_w;
    const int32_t fits = (TG_DW_TABLE / taps) & ~3;  /* channels whose weights fit the table */
    const int32_t block = fits < TG_DW_BLOCK ? fits : TG_DW_BLOCK;
    tg_dw_table_t wt;
    int32_t wsum[TG_DW_BLOCK];
    int32_t acc[TG_DW_BLOCK];
    int32_t c0, b, oy, ox, j;
    if (p->out_c != p->in_c || block < 4) {
        tg_dwconv_general(p, x, w, bias, y);
        return;
    }
    for (c0 = 0; c0 < p->out_c; c0 += block) {
        const int32_t nc = p->out_c - c0 < block ? p->out_c - c0 : block;
        int32_t yi = c0;
        tg_dwconv_table(p, w, c0, nc, &wt, wsum);
        for (b = 0; b < p->n; ++b) {
            const int8_t *xc = x + b * p->in_h * p->in_w * p->in_c + c0;
            for (oy = 0; oy < p->out_h; ++oy) {
                for (ox = 0; ox < p->out_w; ++ox) {
                    const tg_conv_window_t win = tg_conv_window(p, oy, ox);
                    const tg_dw_walk_t wk = tg_dwconv_walk(p, &win);
                    /* Plain C, whole window: sum (x - zp)w = sum xw - zp * sum w. */
                    const int fold = !TG_CONV_DSP && wk.rows == p->k_h && wk.cols == p->k_w;
                    const int32_t zp = fold ? 0 : p->in_zp;
                    for (j = 0; j < nc; ++j) {
                        acc[j] = bias[c0 + j] - (fold ? p->in_zp * wsum[j] : 0);
                    }
                    if (wk.rows != 0 && wk.cols != 0) {
                        for (j = 0; j + 4 <= nc; j += 4) {
                            tg_dwconv_quad(xc + wk.x0 + j, wt.h + j * taps + wk.w0, &wk, zp,
                                           acc + j);
                        }
                        for (; j < nc; ++j) {
                            acc[j] += tg_dwconv_single(xc + wk.x0 + j, wt.h + (j & ~3) * taps
                                                       + wk.w0 + (j & 3), &wk, zp);
                        }
                    }
                    tg_conv_put(p->rq, y, yi, acc, c0, nc);
                    yi += p->out_c;
                }
            }
        }
    }
}
