/* tg_arm_mve.h - Helium (M-profile Vector Extension) inner loops (private header).
 *
 * TG_MVE is 1 on cores with integer MVE (Cortex-M55, M85: -mcpu=cortex-m55) in optimised
 * GCC builds, unless TG_KERNELS_PORTABLE asks for the plain C everywhere. The loops are
 * short inline assembly: a tail-predicated low-overhead loop (DLSTP/LETP) handles any
 * length, the last partial vector included, with no scalar tail; VMLADAVA.S8 adds 16
 * int8 x int8 products to a 32-bit register per instruction (Armv8.1-M Architecture
 * Reference Manual, MVE). Its accumulator must be an even-numbered register, hence the
 * fixed registers. The kernels keep their plain C loops beside these as the readable
 * statement of what they compute.
 */
#ifndef TG_ARM_MVE_H
#define TG_ARM_MVE_H

#include <stddef.h>
#include <stdint.h>

#include "tg_config.h"
#include "tg_requant.h"

#if defined(__ARM_FEATURE_MVE) && (__ARM_FEATURE_MVE & 1) && defined(__GNUC__) \
    && defined(__OPTIMIZE__) && !TG_KERNELS_PORTABLE
#define TG_MVE 1
#include <arm_mve.h>
#else
#define TG_MVE 0
#endif

#if TG_MVE
/* acc[0] = sum (x[i] - xz) * w0[i], acc[1] likewise with w1, over i < len (len >= 1):
 * sum x*w - xz * sum w, both sums over 16 lanes per instruction. Exact in int32 for
 * len < 65536 (|sum x*w| <= len * 2^14, |xz * sum w| <= len * 2^14). */
TG_INLINE void tg_mve_dot_1x2(const int8_t *x, const int8_t *w0, const int8_t *w1,
                               int32_t len, int32_t xz, int32_t acc[2])
{
    register int32_t d0 __asm__("r0") = 0;
    register int32_t d1 __asm__("r2") = 0;
    register int32_t s0 __asm__("r4") = 0;
    register int32_t s1 __asm__("r6") = 0;
    __asm__ volatile(
        "dlstp.8 lr, %[n]\n"
        "1:\n\t"
        "vldrb.8 q0, [%[x]], #16\n\t"
        "vldrb.8 q1, [%[w0]], #16\n\t"
        "vldrb.8 q2, [%[w1]], #16\n\t"
        "vmladava.s8 %[d0], q0, q1\n\t"
        "vmladava.s8 %[d1], q0, q2\n\t"
        "vaddva.s8 %[s0], q1\n\t"
        "vaddva.s8 %[s1], q2\n\t"
        "letp lr, 1b"
        : [d0] "+r"(d0), [d1] "+r"(d1), [s0] "+r"(s0), [s1] "+r"(s1), [x] "+r"(x),
          [w0] "+r"(w0), [w1] "+r"(w1)
        : [n] "r"(len)
        : "q0", "q1", "q2", "lr", "memory");
    acc[0] = d0 - xz * s0;
    acc[1] = d1 - xz * s1;
}

/* Four (or, with full == 0, the last `left` < 4) outputs of tg_mve_fc_fast from row r0 on.
 * The four accumulators are requantized as one vector, the same steps as tg_rq_apply lane
 * by lane: VSHL by pre, VMULH.S32 (the high word of the 64-bit product, floor), VADD of
 * add, VSHL by -r (arithmetic, floor), then the clamp to [act_min, act_max] (inside int8,
 * so it is the saturation too); the per-channel {mult, add, r} come by gather loads from
 * the [channel][3] table. A partial pass computes what it needs and loads and stores
 * under a lane predicate; `full` is a constant at each call, so the full passes carry no
 * predication. */
TG_INLINE void tg_mve_fc_pass(const int8_t *x, const int8_t *r0, int32_t w_stride_o,
                              int32_t depth, int32_t xz, const int32_t *w_zp, int32_t x_sum,
                              const int32_t *bias, const int32_t *e, uint32x4_t chan_offsets,
                              int32_t pre, int32x4_t lo, int32x4_t hi, int8_t *y,
                              int32_t left, int full)
{
    const mve_pred16_t lanes = full ? (mve_pred16_t)0xFFFFu : vctp32q((uint32_t)left);
    int32_t acc[4];
    int32x4_t a;
    tg_mve_dot_1x2(x, r0, full || left > 1 ? r0 + w_stride_o : r0, depth, xz, acc);
    if (full || left > 2) {
        tg_mve_dot_1x2(x, r0 + 2 * w_stride_o, full || left > 3 ? r0 + 3 * w_stride_o : r0,
                       depth, xz, acc + 2);
    } else {
        acc[2] = acc[3] = 0;   /* lanes the predicated store leaves out */
    }
    a = vldrwq_s32(acc);
    if (bias != NULL) {
        a = vaddq_s32(a, full ? vldrwq_s32(bias) : vldrwq_z_s32(bias, lanes));
    }
    if (w_zp != NULL) {
        a = vsubq_s32(a, vmulq_n_s32(full ? vldrwq_s32(w_zp) : vldrwq_z_s32(w_zp, lanes),
                                     x_sum));
    }
    a = vshlq_r_s32(a, pre);
    if (full) {
        a = vmulhq_s32(a, vldrwq_gather_shifted_offset_s32(e, chan_offsets));
        a = vaddq_s32(a, vldrwq_gather_shifted_offset_s32(e + 1, chan_offsets));
        a = vshlq_s32(a, vnegq_s32(vldrwq_gather_shifted_offset_s32(e + 2, chan_offsets)));
        vstrbq_s32(y, vminq_s32(vmaxq_s32(a, lo), hi));
    } else {
        a = vmulhq_s32(a, vldrwq_gather_shifted_offset_z_s32(e, chan_offsets, lanes));
        a = vaddq_s32(a, vldrwq_gather_shifted_offset_z_s32(e + 1, chan_offsets, lanes));
        a = vshlq_s32(a, vnegq_s32(vldrwq_gather_shifted_offset_z_s32(e + 2, chan_offsets,
                                                                         lanes)));
        vstrbq_p_s32(y, vminq_s32(vmaxq_s32(a, lo), hi), lanes);
    }
}

/* Fully connected rows for TG_RQ_FAST int8 outputs, weights contiguous along depth (row o
 * at w + o * w_stride_o), depth >= 1: y[o] = requant(bias[o] + sum (x - xz) w[o] - w_zp[o]
 * * x_sum) for o < out, four outputs per pass (tg_mve_fc_pass). */
static inline void tg_mve_fc_fast(const int8_t *x, const int8_t *w, int32_t w_stride_o,
                                  int32_t depth, int32_t out, int32_t xz,
                                  const int32_t *w_zp, int32_t x_sum, const int32_t *bias,
                                  const tg_requant_t *rq, int8_t *y)
{
    const uint32x4_t chan_offsets = vmulq_n_u32(vidupq_n_u32(0u, 1), 3u);  /* 0 3 6 9 */
    const int32x4_t lo = vdupq_n_s32(rq->act_min), hi = vdupq_n_s32(rq->act_max);
    int32_t o;
    for (o = 0; o + 4 <= out; o += 4) {
        tg_mve_fc_pass(x, w + o * w_stride_o, w_stride_o, depth, xz,
                       w_zp != NULL ? w_zp + o : NULL, x_sum, bias != NULL ? bias + o : NULL,
                       rq->chan + 3 * o, chan_offsets, rq->pre, lo, hi, y + o, 4, 1);
    }
    if (o < out) {
        tg_mve_fc_pass(x, w + o * w_stride_o, w_stride_o, depth, xz,
                       w_zp != NULL ? w_zp + o : NULL, x_sum, bias != NULL ? bias + o : NULL,
                       rq->chan + 3 * o, chan_offsets, rq->pre, lo, hi, y + o, out - o, 0);
    }
}
#endif

#endif /* TG_ARM_MVE_H */
