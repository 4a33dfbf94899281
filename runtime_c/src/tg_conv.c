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
 * Depthwise convolution has its own family (tg_dwconv.c).
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
