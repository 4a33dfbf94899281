/* tg_pool.h - max and average pooling, channels-last.
 *
 * x: [n][in_h][in_w][c] int8, y: [n][out_h][out_w][c] int8. y may not alias x.
 * Tap (ky, kx) of output (oy, ox) reads row oy*stride_h - pad_top + ky*dil_h (columns alike);
 * taps outside the input are padding. count = valid taps, or k_h*k_w when count_include_pad
 * (a window without valid taps gives y = out_zp for avg, act_min for max).
 * max: y = clamp(max over the valid taps, act_min, act_max) (x and y share scale and zero
 *      point; padding never wins).
 * avg, by avg_mode (acc = sum over valid taps of (x - in_zp); mult/shift encode s_x / s_y):
 *   TG_AVG_FIXED:     y = clamp(out_zp + floor((acc*mult + count*2^(shift-1)) / (count*2^shift)))
 *   TG_AVG_FLOAT_SUM: v = (float)acc * (in_scale / (out_scale * (float)count)), then as the
 *                     float mode of tg_requant (onnxruntime QLinearGlobalAveragePool).
 *   TG_AVG_FLOAT_DQ:  f = sum over valid taps, row-major, of in_scale * (float)(x - in_zp);
 *                     v = (f / (float)count) / out_scale + (float)round_zp;
 *                     y = clamp(round_half_even(v) + out_zp - round_zp, act_min, act_max)
 *                     (round_zp = the model's output zero point: onnxruntime
 *                     QLinearAveragePool; round_zp = 0: ONNX DequantizeLinear ->
 *                     AveragePool -> QuantizeLinear).
 * Float modes need TG_WITH_FLOAT_REQUANT and -ffp-contract=off.
 */
#ifndef TG_POOL_H
#define TG_POOL_H

#include "tg_requant.h"

#define TG_AVG_FIXED 0
#define TG_AVG_FLOAT_SUM 1
#define TG_AVG_FLOAT_DQ 2

typedef struct {
    int32_t n, in_h, in_w, c;
    int32_t out_h, out_w;
    int32_t k_h, k_w;
    int32_t stride_h, stride_w;
    int32_t dil_h, dil_w;
    int32_t pad_top, pad_left;
    int32_t count_include_pad;
    int32_t in_zp;                /* avg only */
    int32_t avg_mode;             /* avg: TG_AVG_* */
    int32_t mult, shift;          /* avg, TG_AVG_FIXED: s_x / s_y */
    float in_scale, out_scale;    /* avg, float modes: s_x and s_y */
    int32_t round_zp;             /* avg, TG_AVG_FLOAT_DQ: zero point added before rounding */
    int32_t out_zp, act_min, act_max;
} tg_pool_params_t;

void tg_maxpool(const tg_pool_params_t *p, const int8_t *x, int8_t *y);
void tg_avgpool(const tg_pool_params_t *p, const int8_t *x, int8_t *y);

#endif /* TG_POOL_H */
