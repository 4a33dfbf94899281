/* tg_eltwise.h - elementwise Add and Mul of two int8 tensors with broadcasting.
 *
 * Shapes are in storage order, padded to rank 4; a_stride/b_stride are element strides of
 * each input per output axis (0 where that input is broadcast). y is dense [shape].
 * y may alias a or b when that input is dense and has the output's shape.
 * add fixed: a' = ((a - a_zp) << left_shift) scaled by (a_mult, a_shift), b' likewise,
 *            y = clamp(out_zp + mul_shift(a' + b', out_mult, out_shift)).
 * add float: v = (a_scale*(a - a_zp) + b_scale*(b - b_zp)) / out_scale, then clamp to
 *            [act_min - out_zp, act_max - out_zp], round half even, + out_zp.
 * mul fixed: y = clamp(out_zp + mul_shift((a - a_zp) * (b - b_zp), out_mult, out_shift)).
 * mul float: v = (a_scale*(a - a_zp)) * (b_scale*(b - b_zp)) / out_scale, then as add.
 */
#ifndef TG_ELTWISE_H
#define TG_ELTWISE_H

#include "tg_requant.h"

typedef struct {
    int32_t shape[4];
    int32_t a_stride[4], b_stride[4];
    int32_t a_zp, b_zp, out_zp;
    int32_t act_min, act_max;
    int32_t left_shift;                   /* add, fixed */
    int32_t a_mult, a_shift, b_mult, b_shift;  /* add, fixed */
    int32_t out_mult, out_shift;          /* fixed */
    float a_scale, b_scale, out_scale;    /* float mode (out_scale != 0 selects it) */
} tg_eltwise_params_t;

void tg_add(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y);
void tg_mul(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y);

#endif /* TG_ELTWISE_H */
