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
 *
 * Forms (chosen per layer at compile time, tinygen/reference/requant.py choose_form):
 *   TG_RQ_FAST  chan[c] = {mult, add, r} with add = 2^(r-1) + zp * 2^r, r in [1, 31]:
 *               y = clamp(sat8((hi32((acc << pre) * mult) + add) >> r), act_min, act_max).
 *               Equal to the contract: with shift + pre = 32 + r, the floor divisions
 *               compose and 2^(shift+pre-1) adds exactly 2^(r-1) to the high word. The
 *               compiler picks it only when acc << pre and the high-word sum provably fit
 *               in int32 (from the layer's accumulator bound). One SMMLA, one shift, one
 *               SSAT per output on Arm cores with the DSP extension.
 *   TG_RQ_EXACT chan[c] = {mult, 0, shift}: the contract on 64 bits, for any layer.
 *   TG_RQ_FLOAT scale[c]; chan is NULL.
 * Block primitives: tg_rq_load / tg_rq_apply keep one channel's constants in registers
 * across many outputs; tg_requant_pixel does the consecutive channels of one pixel.
 * Needs arithmetic right shift of negative signed values (gcc, clang, arm-none-eabi-gcc).
 * The 64-bit products go through tg_wide.h: exact without a long multiply on Armv6-M.
 */
#ifndef TG_REQUANT_H
#define TG_REQUANT_H

#include <stdint.h>
#include <stddef.h>

#include "tg_config.h"
#include "tg_arm_dsp.h"
#include "tg_wide.h"

#if defined(__FAST_MATH__) && TG_WITH_FLOAT_REQUANT
#error "float requantization must not be compiled with -ffast-math (it would reassociate the rounding)"
#endif

#if ((-1) >> 1) != -1
#error "tinygen kernels need an arithmetic right shift of negative integers"
#endif

#define TG_RQ_EXACT 0
#define TG_RQ_FAST 1
#define TG_RQ_FLOAT 2

/* Per-output-channel requantization parameters (per-tensor quantization is expanded to one
 * entry per channel at compile time). */
typedef struct {
    const int32_t *chan;   /* fixed forms: [channel][3], see above; NULL in float mode */
    const float *scale;    /* TG_RQ_FLOAT: float32 scale per channel; NULL otherwise */
    int32_t form;          /* TG_RQ_* */
    int32_t pre;           /* TG_RQ_FAST: left shift of the accumulator, 0..31 */
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
    return (tg_mul64x32(x, mult) + ((int64_t)1 << (shift - 1))) >> shift;
}

static inline int32_t tg_clamp32(int64_t v, int32_t lo, int32_t hi)
{
    return v < lo ? lo : (v > hi ? hi : (int32_t)v);
}

/* v saturated to [-128, 127]. */
TG_INLINE int32_t tg_sat8(int32_t v)
{
#if TG_DSP
    return __ssat(v, 8);
#else
    return v < -128 ? -128 : (v > 127 ? 127 : v);
#endif
}

/* One channel's TG_RQ_FAST constants, held in registers across a block of outputs. */
typedef struct {
    int32_t mult, add, shift;
} tg_rq_chan_t;

TG_INLINE tg_rq_chan_t tg_rq_load(const tg_requant_t *rq, int32_t c)
{
    tg_rq_chan_t k;
    const int32_t *e = rq->chan + 3 * c;
    k.mult = e[0];
    k.add = e[1];
    k.shift = e[2];
    return k;
}

/* TG_RQ_FAST of one accumulator (already shifted left by rq->pre), saturated to int8; the
 * caller clamps to [act_min, act_max] when that range is narrower. */
TG_INLINE int32_t tg_rq_apply(tg_rq_chan_t k, int32_t acc)
{
#if TG_DSP
    return __ssat(tg_smmla(acc, k.mult, k.add) >> k.shift, 8);
#else
    const int32_t hi = tg_mul_hi32(acc, k.mult);
    return tg_sat8((int32_t)((uint32_t)hi + (uint32_t)k.add) >> k.shift);
#endif
}

/* The contract on 64 bits (TG_RQ_EXACT), clamp included. */
static inline int32_t tg_rq_exact(const tg_requant_t *rq, int32_t acc, int32_t c)
{
    const int32_t *e = rq->chan + 3 * c;
    return tg_clamp32(rq->out_zp + tg_mul_shift(acc, e[0], e[2]), rq->act_min, rq->act_max);
}

#if TG_WITH_FLOAT_REQUANT
/* TG_RQ_FLOAT of one accumulator, clamp included. Clamping after rounding equals clamping
 * before it (the bounds are integers and rounding is monotonic); before is needed for the
 * plain-C rounding, which is exact only below 2^22. */
static inline int32_t tg_rq_float(const tg_requant_t *rq, int32_t acc, int32_t c)
{
    const float v = (float)acc * rq->scale[c];
#if TG_DSP_FLOAT
    const int32_t r = __qadd(tg_round_even_sat(v), rq->out_zp);
    return tg_clamp32(r, rq->act_min, rq->act_max);
#else
    const float lo = (float)(rq->act_min - rq->out_zp);
    const float hi = (float)(rq->act_max - rq->out_zp);
    return tg_round_half_even(v < lo ? lo : (v > hi ? hi : v)) + rq->out_zp;
#endif
}
#endif

/* Requantize one int32 accumulator of output channel c to int8, any form. */
static inline int8_t tg_requant(int32_t acc, const tg_requant_t *rq, int32_t c)
{
#if TG_WITH_FLOAT_REQUANT
    if (rq->form == TG_RQ_FLOAT) {
        return (int8_t)tg_rq_float(rq, acc, c);
    }
#endif
    if (rq->form == TG_RQ_FAST) {
        const int32_t v = tg_rq_apply(tg_rq_load(rq, c), (int32_t)((uint32_t)acc << rq->pre));
        return (int8_t)(v < rq->act_min ? rq->act_min : (v > rq->act_max ? rq->act_max : v));
    }
    return (int8_t)tg_rq_exact(rq, acc, c);
}

/* y[i] = requant(acc[i], channel c0 + i) for i < n: the consecutive channels of one pixel.
 * Locals, not rq->: y is int8, so every store could otherwise change *rq. */
static inline void tg_requant_pixel(const tg_requant_t *rq, const int32_t *acc, int32_t c0,
                                    int32_t n, int8_t *y)
{
    int32_t i;
    if (rq->form == TG_RQ_FAST) {
        const int32_t *e = rq->chan + 3 * c0;
        const int32_t pre = rq->pre, lo = rq->act_min, hi = rq->act_max;
        if (lo == -128 && hi == 127) {  /* the saturation is the whole clamp */
            for (i = 0; i < n; ++i, e += 3) {
                tg_rq_chan_t k;
                k.mult = e[0];
                k.add = e[1];
                k.shift = e[2];
                y[i] = (int8_t)tg_rq_apply(k, (int32_t)((uint32_t)acc[i] << pre));
            }
            return;
        }
        for (i = 0; i < n; ++i, e += 3) {
            tg_rq_chan_t k;
            int32_t v;
            k.mult = e[0];
            k.add = e[1];
            k.shift = e[2];
            v = tg_rq_apply(k, (int32_t)((uint32_t)acc[i] << pre));
            y[i] = (int8_t)(v < lo ? lo : (v > hi ? hi : v));
        }
        return;
    }
    for (i = 0; i < n; ++i) {
        y[i] = tg_requant(acc[i], rq, c0 + i);
    }
}

#endif /* TG_REQUANT_H */
