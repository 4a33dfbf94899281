/* tg_pwconv.h - pointwise (1x1) convolution, channels-last, as a blocked matrix product.
 *
 * x: [n][in_h][in_w][in_c] int8, y: [n][out_h][out_w][out_c]; output pixel (oy, ox) reads
 * input pixel (oy*stride_h, ox*stride_w); no padding, one group.
 * acc = bias[c] + sum (x - in_zp) * (w - w_zp[c]); with rq y is int8, without it the raw
 * int32 accumulator.
 * pack: weights, bias and requantization constants as the blocked matrix core reads them
 * (tg_mat.h, with k_len = in_c; built by tinygen.reference.mat.pack_matrix).
 * Call (DEVELOPERS.md, "Kernel calls"): output rows [row0, row1) of the output image; 0,
 * out_h covers every image, a partial range needs n == 1. x_ring / y_ring: 0 = the whole
 * tensor is there, R > 0 = row r lives at (r mod R) * row_bytes (n == 1).
 * scratch: tg_pwconv_scratch_bytes(in_c) = 4 * ((in_c + 3) & ~3) bytes, 4-byte aligned.
 * Overlap: pixels are taken in pairs in increasing order (whole tensor, stride 1, no rings:
 * pairs over all n*out_h*out_w pixels; otherwise within each row), both inputs of a pair
 * read before any of its outputs is written. So y may start at x + d, with
 * d = min over pairs q but the last of (first x byte of pair q+1) - (end of y of pair q);
 * for stride 1 that is 2*(in_c - out_c*e) when in_c >= out_c*e, else (pairs - 1) times it
 * (e = 1 with rq, 4 without); one pair only: any d.
 */
#ifndef TG_PWCONV_H
#define TG_PWCONV_H

#include "tg_requant.h"

typedef struct {
    int32_t n, in_h, in_w, in_c;
    int32_t out_h, out_w, out_c;
    int32_t stride_h, stride_w;
    int32_t in_zp;                 /* int8 domain */
    const int32_t *pack;           /* weights, bias, requant constants (tg_mat.h) */
    const tg_requant_t *rq;        /* NULL: write int32 accumulators */
    int32_t x_ring, y_ring;        /* rows held: 0 = all */
} tg_pwconv_params_t;

void tg_pwconv(const tg_pwconv_params_t *p, const int8_t *x, void *y, void *scratch,
               int32_t row0, int32_t row1);

#endif /* TG_PWCONV_H */
