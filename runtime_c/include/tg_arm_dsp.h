/* tg_arm_dsp.h - the Arm DSP-extension instructions the kernels use (private header).
 *
 * TG_DSP is 1 on cores with the DSP extension (Cortex-M4/M7/M33/M55...) in optimised GCC or
 * clang builds, unless TG_KERNELS_PORTABLE asks for the plain C everywhere; every kernel
 * keeps its plain C loop beside the DSP one as the readable statement of what it computes.
 * ACLE intrinsics (arm_acle.h) where the compiler makes good code of them; short GNU inline
 * assembly for the one it lacks (SMMLA) and for float rounding (VCVTR).
 */
#ifndef TG_ARM_DSP_H
#define TG_ARM_DSP_H

#include <stdint.h>

#include "tg_config.h"

/* Inlined even at -Os: the hot per-output helpers, whose call would cost more than them. */
#if defined(__GNUC__)
#define TG_INLINE static inline __attribute__((always_inline))
#else
#define TG_INLINE static inline
#endif

/* An empty barrier on v: gcc and clang must not turn the short copy and fill loops of the
 * kernels into memcpy/memset calls, which cost more than the few bytes they move. */
#if defined(__GNUC__)
#define TG_OPAQUE(v) __asm__("" : "+r"(v))
#else
#define TG_OPAQUE(v) ((void)0)
#endif

#if defined(__ARM_FEATURE_DSP) && defined(__GNUC__) && defined(__OPTIMIZE__) \
    && !TG_KERNELS_PORTABLE
#define TG_DSP 1
#include <arm_acle.h>
#else
#define TG_DSP 0
#endif

#if TG_DSP
/* hi32(a * b) + acc: the most significant word multiply-accumulate. */
TG_INLINE int32_t tg_smmla(int32_t a, int32_t b, int32_t acc)
{
    int32_t r;
    __asm__("smmla %0, %1, %2, %3" : "=r"(r) : "r"(a), "r"(b), "r"(acc));
    return r;
}

/* Bytes 0 and 2 of v, and bytes 1 and 3, sign-extended into int16 lanes, plus off. */
TG_INLINE uint32_t tg_widen_even(uint32_t v, uint32_t off)
{
    return (uint32_t)__sxtab16((int16x2_t)off, (int8x4_t)v);
}

TG_INLINE uint32_t tg_widen_odd(uint32_t v, uint32_t off)
{
    return (uint32_t)__sxtab16((int16x2_t)off, (int8x4_t)((v >> 8) | (v << 24)));
}
#endif

#if TG_DSP && defined(__ARM_FP) && (__ARM_FP & 4) && TG_WITH_FLOAT_REQUANT
#define TG_DSP_FLOAT 1
/* round_half_even(v) saturated to int32: VCVTR rounds in the FPSCR mode, which C code
 * may assume is the default round-to-nearest-even (C99 7.6.1, FENV_ACCESS off). */
TG_INLINE int32_t tg_round_even_sat(float v)
{
    float r;
    int32_t i;
    __asm__("vcvtr.s32.f32 %0, %1" : "=t"(r) : "t"(v));
    __asm__("vmov %0, %1" : "=r"(i) : "t"(r));
    return i;
}
#else
#define TG_DSP_FLOAT 0
#endif

#endif /* TG_ARM_DSP_H */
