/* tg_requant.h - requantization shared by every tinygen kernel.
 *
 * Contract (docs/numerics.md):
 *   fixed:  y = clamp(zp + floor((acc * mult + 2^(shift-1)) / 2^shift), act_min, act_max)
 *           one rounding, half towards +infinity, on a 64-bit product; mult is Q31 in
 *           [2^30, 2^31) (or 0), shift in [1, 62].
 *   float:  v = (float)acc * scale; v = clamp(v, act_min - zp, act_max - zp);
 *           y = round_half_even(v) + zp.   Compile with -ffp-contract=off.
 * All activations are int8 inside the model (uint8 tensors are shifted by -128 at compile
 * time and at the I/O boundary), so act_min/act_max/zp are int8-domain values.
 * Needs arithmetic right shift of negative signed values (gcc, clang, arm-none-eabi-gcc).
 */
#ifndef TG_REQUANT_H
#define TG_REQUANT_H

#include <stdint.h>
#include <stddef.h>

#include "tg_config.h"

#if defined(__FAST_MATH__) && TG_WITH_FLOAT_REQUANT
#error "float requantization must not be compiled with -ffast-math (it would reassociate the rounding)"
#endif

#if ((-1) >> 1) != -1
#error "tinygen kernels need an arithmetic right shift of negative integers"
#endif

/* Per-output-channel requantization parameters. Arrays have one entry per output channel
 * (per-tensor quantization is expanded at compile time). In fixed mode scale is NULL. */
typedef struct {
    const int32_t *mult;   /* Q31 multiplier (fixed mode) */
    const int8_t *shift;   /* right shift, 1..62 (fixed mode) */
    const float *scale;    /* float32 scale (float mode), NULL in fixed mode */
    int32_t out_zp;        /* output zero point, int8 domain */
    int32_t act_min;       /* clamp bounds, int8 domain, fused activation included */
    int32_t act_max;
} tg_requant_t;

/* Round half to even for |v| < 2^22 without a float-to-int truncation of a non-integer. */
#if TG_WITH_FLOAT_REQUANT
static inline int32_t tg_round_half_even(float v)
{
    const float magic = 12582912.0f; /* 1.5 * 2^23: the sum keeps no fraction bits */
    float t = (v + magic) - magic;
    return (int32_t)t;
}
#endif

/* Fixed-point multiply with one rounding: floor((x * mult + 2^(shift-1)) / 2^shift). */
static inline int64_t tg_mul_shift(int64_t x, int32_t mult, int32_t shift)
{
    return (x * (int64_t)mult + ((int64_t)1 << (shift - 1))) >> shift;
}

static inline int32_t tg_clamp32(int64_t v, int32_t lo, int32_t hi)
{
    return v < lo ? lo : (v > hi ? hi : (int32_t)v);
}

/* Requantize one int32 accumulator of output channel c to int8. */
static inline int8_t tg_requant(int32_t acc, const tg_requant_t *rq, int32_t c)
{
#if TG_WITH_FLOAT_REQUANT
    if (rq->scale != NULL) {
        float v = (float)acc * rq->scale[c];
        float lo = (float)(rq->act_min - rq->out_zp);
        float hi = (float)(rq->act_max - rq->out_zp);
        v = v < lo ? lo : (v > hi ? hi : v);
        return (int8_t)(tg_round_half_even(v) + rq->out_zp);
    }
#endif
    return (int8_t)tg_clamp32(rq->out_zp + tg_mul_shift(acc, rq->mult[c], rq->shift[c]),
                              rq->act_min, rq->act_max);
}

#endif /* TG_REQUANT_H */
