/* tg_conv.c - direct convolution, channels-last, contract in tg_conv.h.
 *
 * tg_conv works on two output pixels at a time. It gathers each pixel's receptive field
 * ("patch") in weight order (ky, kx, channel of the group) into the arena scratch, padding
 * as in_zp, and widens both patches once into the pair buffer of the blocked matrix core
 * (tg_mat.h), so the zero point and the padding are dealt with once per pixel instead of
 * once per output channel. Each output channel is then a dot product of the patch with the
 * channel's row of the compile-time pack (w - w_zp as int16), two channels and both pixels
 * at once (tg_mat_channels: SMLAD assembly on DSP cores). The input row addresses of an
 * output row are worked out once per row (rings wrap there).
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
#include "tg_mat.h"
#include "tg_window.h"

#include <string.h>

#define TG_CONV_DSP TG_DSP  /* tg_arm_dsp.h */

/* GNU C's noinline, for loops that gcc -Os would spill when inlined into their callers. */
#if defined(__GNUC__)
#define TG_CONV_NOINLINE __attribute__((noinline))
#else
#define TG_CONV_NOINLINE
#endif

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
/* Both int16 lanes set to -zp. */
static inline uint32_t tg_conv_neg_pair(int32_t zp)
{
    return (uint32_t)(uint16_t)(-zp) * 0x00010001u;
}
#endif

/* ---- tg_conv ------------------------------------------------------------------------- */

/* Scratch of one call (tg_conv.h), 4-byte aligned: the byte offsets into x of the k_h input
 * rows of the output row being made (int32 each, not pointers: 4-byte alignment is all the
 * plan promises), the raw patches of both pixels (k_len int8 each, rounded up to 4) and the
 * pair buffer. */
static int32_t tg_conv_raw_offset(const tg_conv_params_t *p)
{
    return 4 * p->k_h;
}

#define TG_CONV_LONG_RUN 32  /* runs from this length on are the library's memcpy */

/* n bytes from src to dst a word at a time (the raw patch of a few channels is a few short
 * runs: a library call per run would cost more than the copy). TG_OPAQUE keeps gcc from
 * turning the loops back into those calls. */
static void tg_conv_copy(int8_t *dst, const int8_t *src, int32_t n)
{
    uint32_t v;
    if (n >= TG_CONV_LONG_RUN) {
        memcpy(dst, src, (size_t)n);
        return;
    }
    for (; n >= 4; n -= 4, src += 4, dst += 4) {
        memcpy(&v, src, sizeof v);  /* one unaligned load and store on Armv7-M and hosts */
        TG_OPAQUE(v);
        memcpy(dst, &v, sizeof v);
    }
    for (; n > 0; --n) {
        int32_t b = *src++;
        TG_OPAQUE(b);
        *dst++ = (int8_t)b;
    }
}

/* Two pixels' patches at once (both inside the image along x, one group, dil_w == 1):
 * src + rows[ky] is tap row ky of pixel 0 (rows[ky] < 0: padding), pixel 1's is step bytes
 * further; each tap row is row_len bytes of x, a word at a time. */
static void tg_conv_gather_pair(const int8_t *src, int32_t step, const int32_t *rows,
                                int32_t k_h, int32_t row_len, int32_t zp, int8_t *raw0,
                                int8_t *raw1)
{
    const uint32_t pad = (uint32_t)(uint8_t)zp * 0x01010101u;
    int32_t ky, n;
    uint32_t v0, v1;
    for (ky = 0; ky < k_h; ++ky) {
        const int8_t *s0 = src + rows[ky];
        if (rows[ky] >= 0 && row_len >= TG_CONV_LONG_RUN) {
            memcpy(raw0, s0, (size_t)row_len);
            memcpy(raw1, s0 + step, (size_t)row_len);
            raw0 += row_len;
            raw1 += row_len;
            continue;
        }
        for (n = row_len; n >= 4; n -= 4, s0 += 4, raw0 += 4, raw1 += 4) {
            if (rows[ky] < 0) {
                v0 = v1 = pad;
            } else {
                memcpy(&v0, s0, sizeof v0);
                memcpy(&v1, s0 + step, sizeof v1);
            }
            TG_OPAQUE(v0);
            memcpy(raw0, &v0, sizeof v0);
            memcpy(raw1, &v1, sizeof v1);
        }
        for (; n > 0; --n, ++s0) {
            int32_t b0 = rows[ky] < 0 ? zp : s0[0], b1 = rows[ky] < 0 ? zp : s0[step];
            TG_OPAQUE(b0);
            *raw0++ = (int8_t)b0;
            *raw1++ = (int8_t)b1;
        }
    }
}

/* n bytes of dst set to the padding value zp. */
static void tg_conv_fill(int8_t *dst, int32_t zp, int32_t n)
{
    for (; n > 0; --n) {
        TG_OPAQUE(zp);
        *dst++ = (int8_t)zp;
    }
}

/* The patch of output column ox, group g, into raw: tap (ky, kx), channel ci of the group
 * at ky * k_w * in_pg + kx * in_pg + ci; x + rows[ky] is the input row of tap row ky (-1:
 * padding); padding reads as in_zp. */
static void tg_conv_gather(const tg_conv_params_t *p, const int8_t *x, const int32_t *rows,
                           int32_t ox, int32_t g, int8_t *raw)
{
    const int32_t in_pg = p->in_c / p->groups;
    const int32_t row_len = p->k_w * in_pg;
    const int32_t base_x = ox * p->stride_w - p->pad_left;
    int32_t kx0, kx1, ky, kx;
    tg_tap_range(base_x, p->dil_w, p->k_w, p->in_w, &kx0, &kx1);
    if (kx0 == 0 && kx1 == p->k_w && p->dil_w == 1 && in_pg == p->in_c) {
        /* Inside the image along x: each tap row is one run of x, or all padding. */
        const int8_t *col = x + base_x * p->in_c;
        for (ky = 0; ky < p->k_h; ++ky, raw += row_len) {
            if (rows[ky] < 0) {
                tg_conv_fill(raw, p->in_zp, row_len);
            } else {
                tg_conv_copy(raw, col + rows[ky], row_len);
            }
        }
        return;
    }
    for (ky = 0; ky < p->k_h; ++ky, raw += row_len) {
        const int8_t *row;
        if (rows[ky] < 0 || kx0 == kx1) {
            tg_conv_fill(raw, p->in_zp, row_len);
            continue;
        }
        row = x + rows[ky] + g * in_pg;
        tg_conv_fill(raw, p->in_zp, kx0 * in_pg);
        if (p->dil_w == 1 && in_pg == p->in_c) {  /* the valid taps are one run of x */
            tg_conv_copy(raw + kx0 * in_pg, row + (base_x + kx0) * p->in_c,
                         (kx1 - kx0) * in_pg);
        } else {
            for (kx = kx0; kx < kx1; ++kx) {
                tg_conv_copy(raw + kx * in_pg, row + (base_x + kx * p->dil_w) * p->in_c,
                             in_pg);
            }
        }
        tg_conv_fill(raw + kx1 * in_pg, p->in_zp, (p->k_w - kx1) * in_pg);
    }
}

void tg_conv(const tg_conv_params_t *p, const int8_t *x, void *y, void *scratch,
             int32_t row0, int32_t row1)
{
    const int32_t in_pg = p->in_c / p->groups, out_pg = p->out_c / p->groups;
    const int32_t k_len = p->k_h * p->k_w * in_pg, raw_len = (k_len + 3) & ~3;
    const int32_t e = p->rq != NULL ? 1 : 4;  /* output element bytes */
    const int32_t x_row = p->in_w * p->in_c, y_row = p->out_w * p->out_c * e;
    const int32_t images = row0 == 0 && row1 == p->out_h ? p->n : 1;
    const int32_t group_words = ((out_pg + 1) >> 1) * tg_mat_record_words(k_len);
    const int fast = p->rq != NULL ? tg_mat_mode(p->rq, p->pack, k_len) : 0;
    int32_t *rows = (int32_t *)scratch;
    int8_t *raw0 = (int8_t *)scratch + tg_conv_raw_offset(p), *raw1 = raw0 + raw_len;
    int16_t *xw = (int16_t *)(void *)(raw1 + raw_len);
    const int32_t row_len = p->k_w * in_pg;
    tg_mat_group_t grp;
    int32_t b, r, ky, ox, g, ox_in0 = p->out_w, ox_in1 = 0;
    if (p->groups == 1 && p->dil_w == 1) {
        /* Output columns [ox_in0, ox_in1) read only inside the image along x. */
        ox_in0 = (p->pad_left + p->stride_w - 1) / p->stride_w;
        ox_in1 = p->in_w - p->k_w + p->pad_left < 0 ? 0
                 : (p->in_w - p->k_w + p->pad_left) / p->stride_w + 1;
        ox_in1 = ox_in1 < p->out_w ? ox_in1 : p->out_w;
    }
    grp.rq = p->rq;
    grp.k_len = k_len;
    grp.nc = out_pg;
    for (b = 0; b < images; ++b) {
        const int32_t xb = b * p->in_h * x_row;
        int8_t *yb = (int8_t *)y + b * p->out_h * y_row;
        for (r = row0; r < row1; ++r) {
            int8_t *yr = yb + (p->y_ring ? r % p->y_ring : r) * y_row;
            /* The row addresses, once per output row: a ring wraps here, not per pixel. */
            for (ky = 0; ky < p->k_h; ++ky) {
                const int32_t iy = r * p->stride_h - p->pad_top + ky * p->dil_h;
                rows[ky] = iy < 0 || iy >= p->in_h ? -1
                                                   : xb + (p->x_ring ? iy % p->x_ring : iy) * x_row;
            }
            for (ox = 0; ox < p->out_w; ox += 2) {
                const int32_t two = ox + 1 < p->out_w;
                int8_t *y0 = yr + ox * p->out_c * e;
                for (g = 0; g < p->groups; ++g) {
                    int8_t *yg = y0 + g * out_pg * e;
                    if (two && ox >= ox_in0 && ox + 1 < ox_in1) {
                        tg_conv_gather_pair(x + (ox * p->stride_w - p->pad_left) * p->in_c,
                                            p->stride_w * p->in_c, rows, p->k_h, row_len,
                                            p->in_zp, raw0, raw1);
                    } else {
                        tg_conv_gather(p, x, rows, ox, g, raw0);
                        if (two) {
                            tg_conv_gather(p, x, rows, ox + 1, g, raw1);
                        }
                    }
                    tg_mat_widen2(raw0, two ? raw1 : raw0, k_len, p->in_zp, xw);
                    grp.rec = p->pack + g * group_words;
                    grp.c_base = g * out_pg;
                    /* a lone last pixel writes its outputs twice (pair half 1 repeats it) */
                    tg_mat_channels(&grp, xw, yg, two ? yg + p->out_c * e : yg, fast);
                }
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
