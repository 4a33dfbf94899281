/* tg_softmax.h - integer Softmax over the innermost axis.
 *
 * x: [rows][len] int8, y: [rows][len] int8. exp_table[d] = round(2^20 * exp(-s_x * d)) for
 * d = max - x in 0..255 (compile time). For each row: e_i = exp_table[max - x_i],
 * sum = sum e_i (fits 32 bits for len <= 2047), and with 64-bit integer arithmetic
 * y_i = clamp(out_zp + round_half_even(e_i*inv_out_q8 / (256*sum)), act_min, act_max)
 * (q = floor((2*e_i*inv_out_q8 + 256*sum) / (512*sum)), minus 1 when that division is exact
 * and q is odd) where inv_out_q8 = round(256 / s_y). y may not alias x.
 */
#ifndef TG_SOFTMAX_H
#define TG_SOFTMAX_H

#include <stdint.h>

typedef struct {
    int32_t rows, len;
    const int32_t *exp_table;   /* 256 entries */
    int32_t inv_out_q8;         /* round(256 / s_y) */
    int32_t out_zp, act_min, act_max;
} tg_softmax_params_t;

void tg_softmax(const tg_softmax_params_t *p, const int8_t *x, int8_t *y);

/* tg_softmax_float - the same shapes in float32, as onnxruntime's QLinearSoftmax computes it
 * (`--tables onnxruntime`, float builds only). exp_table[d] (float, d = max - x) is built at
 * compile time; per row sum = float sum of exp_table[max - x_i] from the first to the last;
 * y_i = clamp(out_zp + round_half_even(exp_table[max - x_i] * out_mult / sum), act_min,
 * act_max), out_mult = floor(1 / s_y). y may not alias x.
 */
typedef struct {
    int32_t rows, len;
    const float *exp_table;     /* 256 entries */
    float out_mult;             /* floor(1 / s_y) */
    int32_t out_zp, act_min, act_max;
} tg_softmax_float_params_t;

void tg_softmax_float(const tg_softmax_float_params_t *p, const int8_t *x, int8_t *y);

#endif /* TG_SOFTMAX_H */
