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
    for (ky = 0; ky < p->k_h; ++ky, raw += row_len) {
        const int8_t *row;
        if (rows[ky] < 0 || kx0 == kx1) {
            memset(raw, (int8_t)p->in_zp, (size_t)row_len);
            continue;
        }
        row = x + rows[ky] + g * in_pg;
        memset(raw, (int8_t)p->in_zp, (size_t)(kx0 * in_pg));
        if (p->dil_w == 1 && in_pg == p->in_c) {  /* the valid taps are one run of x */
            memcpy(raw + kx0 * in_pg, row + (base_x + kx0) * p->in_c,
                   (size_t)((kx1 - kx0) * in_pg));
        } else {
            for (kx = kx0; kx < kx1; ++kx) {
                memcpy(raw + kx * in_pg, row + (base_x + kx * p->dil_w) * p->in_c,
                       (size_t)in_pg);
            }
        }
        memset(raw + kx1 * in_pg, (int8_t)p->in_zp, (size_t)((p->k_w - kx1) * in_pg));
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
    const int fast = tg_mat_fast(p->rq);
    int32_t *rows = (int32_t *)scratch;
    int8_t *raw0 = (int8_t *)scratch + tg_conv_raw_offset(p), *raw1 = raw0 + raw_len;
    int16_t *xw = (int16_t *)(void *)(raw1 + raw_len);
    tg_mat_group_t grp;
    int32_t b, r, ky, ox, g;
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
                    tg_conv_gather(p, x, rows, ox, g, raw0);
                    if (two) {
                        tg_conv_gather(p, x, rows, ox + 1, g, raw1);
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
