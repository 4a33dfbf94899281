/* tg_wide.h - 64-bit products for the requantization, with or without a long multiply
 * (private header).
 *
 * Contract: tg_mul32_wide(a, b) = a * b exactly (int64); tg_mul_hi32(a, b) = floor(a * b /
 * 2^32); tg_mul64x32(x, m) = x * m whenever that product fits in int64 (the callers' range
 * proofs guarantee it). Cores with a 32x32->64 multiply (SMULL, MULH) use the plain C
 * product. Armv6-M (Cortex-M0/M0+) has only MULS, the low 32 bits of a product, and gcc
 * would call the library's __aeabi_lmul for a 64-bit one; there (or anywhere with
 * -DTG_WIDE_SPLIT=1, for the host tests) the product is built from 16x16->32 partial
 * products, which MULS gives exactly:
 *   a*b = ah*bh*2^32 + (ah*bl + al*bh)*2^16 + al*bl  (a = ah*2^16 + al, unsigned halves),
 * four MULS for unsigned operands, and the two's complement correction for signed ones
 * (a*b mod 2^64 = ua*ub - [a<0]*ub*2^32 - [b<0]*ua*2^32), which is exact whenever the
 * product fits in int64, as any 32x32 product does. Only constant shifts and 64-bit adds
 * remain, which gcc inlines on Armv6-M.
 */
#ifndef TG_WIDE_H
#define TG_WIDE_H

#include <stdint.h>

#if !defined(TG_WIDE_SPLIT)
#if defined(__ARM_ARCH_6M__)
#define TG_WIDE_SPLIT 1
#else
#define TG_WIDE_SPLIT 0
#endif
#endif

#if TG_WIDE_SPLIT
/* a * b for unsigned 32-bit a, b: four 16x16->32 products. */
static inline uint64_t tg_umul32_wide(uint32_t a, uint32_t b)
{
    const uint32_t al = a & 0xFFFFu, ah = a >> 16;
    const uint32_t bl = b & 0xFFFFu, bh = b >> 16;
    const uint64_t mid = (uint64_t)(ah * bl) + (uint64_t)(al * bh);  /* < 2^33 */
    return ((uint64_t)(ah * bh) << 32) + (mid << 16) + (uint64_t)(al * bl);
}

static inline int64_t tg_mul32_wide(int32_t a, int32_t b)
{
    const uint32_t ua = (uint32_t)a, ub = (uint32_t)b;
    uint64_t p = tg_umul32_wide(ua, ub);
    /* a = ua - 2^32 when a < 0: subtract ub * 2^32 (mod 2^64), likewise for b. */
    p -= (uint64_t)(a < 0 ? ub : 0u) << 32;
    p -= (uint64_t)(b < 0 ? ua : 0u) << 32;
    return (int64_t)p;
}

/* x * m mod 2^64, x = xh * 2^32 + xl (xl unsigned): xl * m in full, plus the low word of
 * xh * m moved up; equal to x * m whenever that fits in int64. */
static inline int64_t tg_mul64x32(int64_t x, int32_t m)
{
    const uint32_t xl = (uint32_t)(uint64_t)x;
    const uint32_t xh = (uint32_t)((uint64_t)x >> 32);
    const uint32_t um = (uint32_t)m;
    uint64_t p = tg_umul32_wide(xl, um);
    p -= (uint64_t)(m < 0 ? xl : 0u) << 32;
    p += (uint64_t)(xh * um) << 32;
    return (int64_t)p;
}
#else
static inline int64_t tg_mul32_wide(int32_t a, int32_t b)
{
    return (int64_t)a * b;
}

static inline int64_t tg_mul64x32(int64_t x, int32_t m)
{
    return x * (int64_t)m;
}
#endif

/* floor(a * b / 2^32): the high word of the product. */
static inline int32_t tg_mul_hi32(int32_t a, int32_t b)
{
    return (int32_t)(tg_mul32_wide(a, b) >> 32);
}

#endif /* TG_WIDE_H */
