/* tg_dwconv.h - depthwise convolution, channels-last.
 *
 * x: [n][in_h][in_w][in_c] int8, y: [n][out_h][out_w][out_c], out_c = in_c * multiplier;
 * output channel c reads input channel c / multiplier (ONNX group order).
 * acc = bias[c] + sum (x - in_zp) * (w - w_zp[c]); padding contributes nothing. 1-D is the
 * in_h = k_h = out_h = 1 case. With rq y is int8, without it the raw int32 accumulator.
 * y may not alias x.
 * pack: per output channel one record of 1 + k_h*k_w + 3 int32 words: bias; per tap
 * (ky, kx) the int16 pair (w'[ky][kx] low half, w'[ky][kx+1] high half) with
 * w' = w - w_zp[c] and w'[ky][k_w] = 0; then mult, add, r of TG_RQ_FAST (zeros otherwise)
 * (tinygen.reference.dwconv.pack_weights).
 * Call (DEVELOPERS.md, "Kernel calls"): output rows [row0, row1) of the output image; 0,
 * out_h covers every image, a partial range needs n == 1. x_ring / y_ring: 0 = the whole
 * tensor is there, R > 0 = row r lives at (r mod R) * row_bytes (n == 1).
 * scratch: 4-byte aligned, 2*plane_w*(span*block + 1) + 4*out_w bytes with
 * span = (k_h - 1)*dil_h + 1 (tinygen.reference.dwconv.scratch_bytes); block (input
 * channels per pass) and plane_w (even, >= the padded columns the taps read + 1) are fixed
 * at compile time (plan_blocking).
 */
#ifndef TG_DWCONV_H
#define TG_DWCONV_H

#include "tg_requant.h"

typedef struct {
    int32_t n, in_h, in_w, in_c;
    int32_t out_h, out_w, out_c;
    int32_t k_h, k_w;
    int32_t stride_h, stride_w;
    int32_t dil_h, dil_w;
    int32_t pad_top, pad_left;     /* bottom/right padding follows from the output size */
    int32_t in_zp;                 /* int8 domain */
    int32_t block;                 /* input channels per pass */
    int32_t plane_w;               /* int16 columns of one widened input row (even) */
    const int32_t *pack;           /* bias, weights, requant constants (above) */
    const tg_requant_t *rq;        /* NULL: write int32 accumulators */
    int32_t x_ring, y_ring;        /* rows held: 0 = all */
} tg_dwconv_params_t;

void tg_dwconv(const tg_dwconv_params_t *p, const int8_t *x, void *y, void *scratch,
               int32_t row0, int32_t row1);

#endif /* TG_DWCONV_H */
