/* tg_fc.h - fully connected / matrix multiply.
 *
 * y[m][o] = requant(bias[o] + sum_k (x[m][k] - x_zp) * (w[o*w_stride_o + k*w_stride_k] - w_zp[o]))
 * x: [rows][depth] int8, w: int8 addressed through strides (a constant weight is laid out
 * [out][depth], stride_o = depth, stride_k = 1; a run-time right operand [depth][out] uses
 * stride_o = 1, stride_k = out). bias may be NULL (zero). y: [rows][out], int8 with rq,
 * raw int32 with rq == NULL. y may not alias x or w.
 * pack (constant weights): w and bias as the blocked matrix core's pack with k_len = depth
 * and the zero point x_zp folded into its bias (tg_mat.h; tinygen.reference.fc.fc_pack);
 * the call then takes w and bias NULL. pack NULL: w and bias as above.
 */
#ifndef TG_FC_H
#define TG_FC_H

#include "tg_requant.h"

typedef struct {
    int32_t rows, depth, out;
    int32_t w_stride_o, w_stride_k;
    int32_t x_zp;                 /* int8 domain */
    const int32_t *w_zp;          /* per output column, int8 domain; NULL when all zero */
    const tg_requant_t *rq;       /* NULL: write int32 accumulators */
    const int32_t *pack;          /* constant weights and bias (tg_mat.h), or NULL */
} tg_fc_params_t;

void tg_fc(const tg_fc_params_t *p, const int8_t *x, const int8_t *w,
           const int32_t *bias, void *y);

#endif /* TG_FC_H */
