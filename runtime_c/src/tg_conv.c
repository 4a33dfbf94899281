/* tg_conv.c - direct (im2col-free) convolution, contract in tg_conv.h.
 *
 * Accumulators are int32 and are not checked: x - in_zp and w - w_zp both lie in [-255, 255],
 * and the compiler only emits a convolution whose |bias| + k_h*k_w*(in_c/groups)*255*255 fits
 * in int32, so no partial sum can overflow. Element offsets are int32 (tensors on the target
 * are far below 2^31 elements).
 * The padding bounds are worked out once per output position (the valid ky/kx range), so the
 * tap loops never test for padding; the innermost loop runs over contiguous input channels.
 * Cores with the DSP extension (Cortex-M4/M7/M33...) take the channel dot product four
 * int8 pairs at a time with the ACLE __sxtab16/__smlad intrinsics.
 */
#include "tg_conv.h"

#include <string.h>

#if defined(__ARM_FEATURE_DSP) && defined(__ARM_FEATURE_SIMD32)
#include <arm_acle.h>
#define TG_CONV_DSP 1
#else
#define TG_CONV_DSP 0
#endif

/* The valid taps of one output position: k in [lo, hi) reads input base + k*dil. */
typedef struct {
    int32_t ky0, ky1, kx0, kx1;
    int32_t base_y, base_x;
} tg_conv_window_t;

/* Taps k in [*lo, *hi) keep base + k*dil inside [0, in); an empty range has *lo == *hi. */
static void tg_conv_tap_range(int32_t base, int32_t dil, int32_t k, int32_t in,
                              int32_t *lo, int32_t *hi)
{
    int32_t first = 0;
    int32_t end = k;
    if (base < 0) {
        first = (-base + dil - 1) / dil;
    }
    if (base + (k - 1) * dil >= in) {
        end = (in - 1 - base < 0) ? 0 : (in - 1 - base) / dil + 1;
    }
    *lo = first;
    *hi = end > first ? end : first;
}

static tg_conv_window_t tg_conv_window(const tg_conv_params_t *p, int32_t oy, int32_t ox)
{
    tg_conv_window_t win;
    win.base_y = oy * p->stride_h - p->pad_top;
    win.base_x = ox * p->stride_w - p->pad_left;
    tg_conv_tap_range(win.base_y, p->dil_h, p->k_h, p->in_h, &win.ky0, &win.ky1);
    tg_conv_tap_range(win.base_x, p->dil_w, p->k_w, p->in_w, &win.kx0, &win.kx1);
    return win;
}

#if TG_CONV_DSP
static inline uint32_t tg_conv_ror8(uint32_t v)
{
    return (v >> 8) | (v << 24);
}

/* Both int16 lanes set to -zp; x - zp then fits a lane (|x - zp| <= 255). */
static inline int16x2_t tg_conv_neg_pair(int32_t zp)
{
    return (int16x2_t)((uint32_t)(uint16_t)(-zp) * 0x00010001u);
}
#endif

/* sum over i < len of (x[i] - xz) * (w[i] - wz). */
static inline int32_t tg_conv_dot(const int8_t *x, const int8_t *w, int32_t len, int32_t xz,
                                  int32_t wz)
{
    int32_t acc = 0;
    int32_t i = 0;
#if TG_CONV_DSP
    /* Four taps per step: bytes 0,2 and bytes 1,3 widen to int16 pairs for two SMLADs. */
    const int16x2_t x_off = tg_conv_neg_pair(xz);
    const int16x2_t w_off = tg_conv_neg_pair(wz);
    for (; i + 4 <= len; i += 4) {
        uint32_t xv;
        uint32_t wv;
        memcpy(&xv, x + i, sizeof xv);
        memcpy(&wv, w + i, sizeof wv);
        acc = __smlad(__sxtab16(x_off, (int8x4_t)xv), __sxtab16(w_off, (int8x4_t)wv), acc);
        acc = __smlad(__sxtab16(x_off, (int8x4_t)tg_conv_ror8(xv)),
                      __sxtab16(w_off, (int8x4_t)tg_conv_ror8(wv)), acc);
    }
#endif
    for (; i < len; ++i) {
        acc += ((int32_t)x[i] - xz) * ((int32_t)w[i] - wz);
    }
    return acc;
}

/* Inlined twice, so the w_zp == NULL copy drops the weight offset entirely. */
static inline int32_t tg_conv_dot_wzp(const int8_t *x, const int8_t *w, int32_t len,
                                      int32_t xz, const int32_t *w_zp, int32_t c)
{
    return w_zp == NULL ? tg_conv_dot(x, w, len, xz, 0) : tg_conv_dot(x, w, len, xz, w_zp[c]);
}

static inline void tg_conv_store(const tg_requant_t *rq, void *y, int32_t idx, int32_t acc,
                                 int32_t c)
{
    if (rq != NULL) {
        ((int8_t *)y)[idx] = tg_requant(acc, rq, c);
    } else {
        ((int32_t *)y)[idx] = acc;
    }
}

/* Accumulator of output channel c (group g) over the valid window; xb indexes pixel x[b][0][0]. */
static int32_t tg_conv_channel(const tg_conv_params_t *p, const tg_conv_window_t *win,
                               const int8_t *x, const int8_t *wc, int32_t xb, int32_t g,
                               int32_t c)
{
    const int32_t in_per_group = p->in_c / p->groups;
    /* With unit dilation and one group, one kernel row is a single contiguous run of x and w. */
    const int row_is_contiguous = p->dil_w == 1 && p->groups == 1;
    int32_t acc = 0;
    int32_t ky;
    int32_t kx;
    if (win->kx0 >= win->kx1) {
        return 0;
    }
    for (ky = win->ky0; ky < win->ky1; ++ky) {
        const int32_t row = xb + (win->base_y + ky * p->dil_h) * p->in_w + win->base_x;
        const int8_t *wr = wc + ky * p->k_w * in_per_group;
        if (row_is_contiguous) {
            acc += tg_conv_dot_wzp(x + (row + win->kx0) * p->in_c, wr + win->kx0 * p->in_c,
                                   (win->kx1 - win->kx0) * p->in_c, p->in_zp, p->w_zp, c);
            continue;
        }
        for (kx = win->kx0; kx < win->kx1; ++kx) {
            acc += tg_conv_dot_wzp(x + (row + kx * p->dil_w) * p->in_c + g * in_per_group,
                                   wr + kx * in_per_group, in_per_group, p->in_zp, p->w_zp, c);
        }
    }
    return acc;
}

void tg_conv(const tg_conv_params_t *p, const int8_t *x, const int8_t *w,
             const int32_t *bias, void *y)
{
    const int32_t out_per_group = p->out_c / p->groups;
    const int32_t w_per_channel = p->k_h * p->k_w * (p->in_c / p->groups);
    int32_t b, oy, ox, g, c;
    for (b = 0; b < p->n; ++b) {
        const int32_t xb = b * p->in_h * p->in_w;
        for (oy = 0; oy < p->out_h; ++oy) {
            for (ox = 0; ox < p->out_w; ++ox) {
                const tg_conv_window_t win = tg_conv_window(p, oy, ox);
                const int32_t yi = ((b * p->out_h + oy) * p->out_w + ox) * p->out_c;
                for (g = 0; g < p->groups; ++g) {
                    for (c = g * out_per_group; c < (g + 1) * out_per_group; ++c) {
                        const int32_t acc = bias[c] + tg_conv_channel(p, &win, x,
                                                                      w + c * w_per_channel,
                                                                      xb, g, c);
                        tg_conv_store(p->rq, y, yi + c, acc, c);
                    }
                }
            }
        }
    }
}

/* One depthwise channel over the valid window; xc points at x[b][0][0][ic]. */
static inline int32_t tg_dwconv_window(const tg_conv_params_t *p, const tg_conv_window_t *win,
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

void tg_dwconv(const tg_conv_params_t *p, const int8_t *x, const int8_t *w,
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
                    const int8_t *xc = xb + c / multiplier;
                    const int8_t *wc = w + c * taps;
                    int32_t acc = bias[c];
                    if (p->w_zp == NULL) {
                        acc += tg_dwconv_window(p, &win, xc, wc, 0);
                    } else {
                        acc += tg_dwconv_window(p, &win, xc, wc, p->w_zp[c]);
                    }
                    tg_conv_store(p->rq, y, yi + c, acc, c);
                }
            }
        }
    }
}
