/* tg_conv.h - direct (im2col-free) convolution, channels-last.
 *
 * x: [n][in_h][in_w][in_c] int8, w: [out_c][k_h][k_w][in_c/groups] int8,
 * bias: [out_c] int32 (at scale s_x*s_w[c]), y: [n][out_h][out_w][out_c].
 * acc = bias[c] + sum (x - in_zp) * (w - w_zp[c]); padding contributes nothing (it reads as
 * in_zp). 1-D convolution is the in_h = k_h = out_h = 1 case. y may not alias x.
 * With rq != NULL y is int8 (requantized); with rq == NULL y is the raw int32 accumulator.
 * tg_conv call (DEVELOPERS.md, "Kernel calls"): output rows [row0, row1) of the output image
 * (0, out_h: every image; a partial range needs n == 1); x_ring / y_ring: 0 = the whole
 * tensor is there, R > 0 = row r at (r mod R) * row_bytes (n == 1). scratch: 4-byte
 * aligned, 4*k_h + 6*((k_len + 3) & ~3) bytes with k_len = k_h*k_w*in_c/groups
 * (tinygen.reference.conv.conv_scratch_bytes). tg_conv takes its weights, bias and fast
 * requantization constants from pack, the blocked matrix core's layout (tg_mat.h) with
 * k_len per row and ceil(out_c/groups / 2) records per group. Depthwise convolution is
 * tg_dwconv (tg_dwconv.h).
 */
#ifndef TG_CONV_H
#define TG_CONV_H

#include "tg_requant.h"

typedef struct {
    int32_t n, in_h, in_w, in_c;
    int32_t out_h, out_w, out_c;
    int32_t k_h, k_w;
    int32_t stride_h, stride_w;
    int32_t dil_h, dil_w;
    int32_t pad_top, pad_left;     /* bottom/right padding follows from the output size */
    int32_t groups;
    int32_t in_zp;                 /* int8 domain */
    const int32_t *w_zp;           /* per out channel, int8 domain; NULL when all zero */
    const tg_requant_t *rq;        /* NULL: write int32 accumulators */
    int32_t x_ring, y_ring;        /* tg_conv: rows held, 0 = all */
    const int32_t *pack;           /* tg_conv: weights, bias, requant constants (tg_mat.h) */
} tg_conv_params_t;

/* General grouped convolution (groups == 1 included). */
void tg_conv(const tg_conv_params_t *p, const int8_t *x, void *y, void *scratch,
             int32_t row0, int32_t row1);

#endif /* TG_CONV_H */
