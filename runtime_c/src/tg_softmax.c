/* tg_softmax.c - integer Softmax over the innermost axis, contract in tg_softmax.h.
 *
 * Two passes per row: the row maximum, then the table sum; a third pass writes the outputs.
 * The sum is at most len * 2^20 < 2^31 (len <= 2047), the numerator 2 * 2^20 * inv_out_q8 +
 * 256 * sum stays below 2^53 and the denominator below 2^40, so int64 never overflows. Both
 * are positive, so C's truncating division is the floor; an exact division means the value
 * was a tie, which goes to the even neighbour.
 */
#include "tg_softmax.h"

#include "tg_requant.h"

void tg_softmax(const tg_softmax_params_t *p, const int8_t *x, int8_t *y)
{
    const int32_t inv = p->inv_out_q8;
    int32_t r, i;
    for (r = 0; r < p->rows; ++r) {
        int32_t mx = -128;
        int32_t sum = 0;
        int64_t half, den;
        for (i = 0; i < p->len; ++i) {
            mx = x[i] > mx ? x[i] : mx;
        }
        for (i = 0; i < p->len; ++i) {
            sum += p->exp_table[mx - x[i]];
        }
        half = (int64_t)256 * sum;
        den = (int64_t)512 * sum;
        for (i = 0; i < p->len; ++i) {
            const int64_t num = tg_mul64x32(2 * (int64_t)p->exp_table[mx - x[i]], inv) + half;
            int64_t q = num / den;
            if (num % den == 0 && (q & 1)) {
                --q; /* an exact tie: to even, as QuantizeLinear rounds */
            }
            q += p->out_zp;
            y[i] = (int8_t)(q < p->act_min ? p->act_min : (q > p->act_max ? p->act_max : q));
        }
        x += p->len;
        y += p->len;
    }
}

#if TG_WITH_FLOAT_REQUANT
/* Products and quotients are single float32 operations (no contraction: the build uses
 * -ffp-contract=off); the quotient is at most out_mult, capped at 512 before rounding so
 * that tg_round_half_even's exact range (|v| < 2^22) always holds. */
void tg_softmax_float(const tg_softmax_float_params_t *p, const int8_t *x, int8_t *y)
{
    int32_t r, i;
    for (r = 0; r < p->rows; ++r) {
        int32_t mx = -128;
        float sum = 0.0f;
        for (i = 0; i < p->len; ++i) {
            mx = x[i] > mx ? x[i] : mx;
        }
        for (i = 0; i < p->len; ++i) {
            sum += p->exp_table[mx - x[i]];
        }
        for (i = 0; i < p->len; ++i) {
            float v = (p->exp_table[mx - x[i]] * p->out_mult) / sum;
            int32_t q;
            v = v < 512.0f ? v : 512.0f;
            q = tg_round_half_even(v) + p->out_zp;
            y[i] = (int8_t)(q < p->act_min ? p->act_min : (q > p->act_max ? p->act_max : q));
        }
        x += p->len;
        y += p->len;
    }
}
#endif
