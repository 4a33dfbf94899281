/* tg_pool.h - max and average pooling, channels-last.
 *
 * x: [n][in_h][in_w][c] int8, y: [n][out_h][out_w][c] int8. y may not alias x.
 * max: y = clamp(max over the window of valid taps, act_min, act_max) (input and output share
 *      scale and zero point; padding never wins).
 * avg: acc = sum over valid taps of (x - in_zp); count = valid taps, or k_h*k_w when
 *      count_include_pad (padded taps then add 0); y = requant of acc / count:
 *      fixed: y = clamp(out_zp + floor((acc*mult + count*2^(shift-1)) / (count*2^shift)))
 *      float: v = (float)acc * (scale / (float)count), then as tg_requant.
 *      with mult/shift/scale encoding s_x / s_y.
 */
#ifndef TG_POOL_H
#define TG_POOL_H

#include "tg_requant.h"

typedef struct {
    int32_t n, in_h, in_w, c;
    int32_t out_h, out_w;
    int32_t k_h, k_w;
    int32_t stride_h, stride_w;
    int32_t dil_h, dil_w;
    int32_t pad_top, pad_left;
    int32_t count_include_pad;
    int32_t in_zp;                /* avg only */
    int32_t mult, shift;          /* avg, fixed mode: s_x / s_y */
    float scale;                  /* avg, float mode: s_x / s_y; 0 in fixed mode */
    int32_t out_zp, act_min, act_max;
} tg_pool_params_t;

void tg_maxpool(const tg_pool_params_t *p, const int8_t *x, int8_t *y);
void tg_avgpool(const tg_pool_params_t *p, const int8_t *x, int8_t *y);

#endif /* TG_POOL_H */
