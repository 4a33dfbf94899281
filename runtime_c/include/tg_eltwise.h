/* tg_eltwise.h - elementwise Add and Mul of two int8 tensors with broadcasting.
 *
 * Shapes are in storage order, padded to rank 4; a_stride/b_stride are element strides of
 * each input per output axis (0 where that input is broadcast). y is dense [shape].
 * y may alias a or b when that input is dense and has the output's shape.
 * add fixed: a' = mul_shift((a - a_zp) << left_shift, a_mult, a_shift), b' likewise,
 *            y = clamp(out_zp + mul_shift(a' + b', out_mult, out_shift)).
 *            With a_table/b_table (int32[256], compile time, indexed by the input byte as
 *            unsigned) the same y is clamp((a_table[a] + b_table[b]) >> TG_ADD_TABLE_SHIFT)
 *            (tinygen.reference.eltwise.add_tables); NULL: computed as above.
 * mul fixed: y = clamp(out_zp + mul_shift((a - a_zp) * (b - b_zp), out_mult, out_shift)).
 * float (use_float; onnxruntime's QLinearAdd/QLinearMul on x86-64), with A = a + raw_offset,
 * B = b + raw_offset (the model's own int8 or uint8 values):
 *   add: v = fmaf(A, a_ratio, fmaf(B, b_ratio, bias)), or
 *        v = fmaf(B, b_ratio, fmaf(A, a_ratio, bias)) when a_bcast_inner;
 *   mul: v = (float)((a - a_zp) * (b - b_zp)) * ab_ratio + bias;
 *   y = clamp(round_half_even(v) - raw_offset, act_min, act_max).
 * The compiler computes bias (tinygen.reference.eltwise). Float mode needs
 * TG_WITH_FLOAT_REQUANT and -ffp-contract=off; fmaf must be exact (hardware FMA or libm).
 */
#ifndef TG_ELTWISE_H
#define TG_ELTWISE_H

#include "tg_requant.h"

typedef struct {
    int32_t shape[4];
    int32_t a_stride[4], b_stride[4];
    int32_t a_zp, b_zp, out_zp;                /* int8 domain */
    int32_t act_min, act_max;
    int32_t left_shift;                        /* add, fixed */
    int32_t a_mult, a_shift, b_mult, b_shift;  /* add, fixed */
    int32_t out_mult, out_shift;               /* fixed */
    int32_t use_float;                         /* 1: float mode */
    float a_ratio, b_ratio;                    /* add, float: s_a / s_y, s_b / s_y */
    float ab_ratio;                            /* mul, float: (s_a * s_b) / s_y */
    float bias;                                /* float: constant term */
    int32_t raw_offset;                        /* float: 128 for uint8 models, else 0 */
    int32_t a_bcast_inner;                     /* add, float: a is the scalar of each row */
    const int32_t *a_table, *b_table;          /* add, fixed: see above, or NULL */
} tg_eltwise_params_t;

#define TG_ADD_TABLE_SHIFT 10

void tg_add(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y);
void tg_mul(const tg_eltwise_params_t *p, const int8_t *a, const int8_t *b, int8_t *y);

#endif /* TG_ELTWISE_H */
