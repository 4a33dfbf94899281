/* tg_mat.h - the blocked int16 matrix core of tg_pwconv and tg_conv (private header).
 *
 * Both kernels reduce an output pixel to dot products of a vector of k_len int8 values
 * (a pixel for the 1x1 conv, a receptive field for the general one), taken as x - in_zp,
 * with each output channel's weight row. Two pixels at a time are widened once into the
 * pair buffer (k_len rounded up to a group of four, zero past k_len): group g at xw + 8g,
 * pixel 0's four lanes then pixel 1's, each as the int16 pairs (k, k+2), (k+1, k+3) that
 * SXTB16 makes of a word. The compile-time pack (tinygen.reference.mat.pack_matrix; int32
 * words) holds, per channel pair c0 = 2j, c1 = 2j + 1 of a group, one record of
 * tg_mat_record_words(k_len) words:
 *   bias[c0], bias[c1], bias[c0], bias[c1];
 *   per group of four, for c0 then c1: the int16 pairs (w'[k], w'[k+2]), (w'[k+1], w'[k+3])
 *   with w' = w - w_zp (low half first; zero past k_len);
 *   mult, add, r of c0 and of c1 (rq TG_RQ_FAST; zeros otherwise).
 * A missing last c1 (odd channel count) has an all-zero record half and is never written.
 * So a pass over the pair buffer runs one channel pair against both pixels: every
 * pair-buffer word meets two channels and every weight word two pixels, one dual MAC each.
 * Partial sums are the bias plus terms (x - in_zp) * (w - w_zp) of magnitude <= 255 * 255,
 * inside the accumulator bound the compiler proved (passes/overflow.py).
 *
 * Cores with the DSP extension run the channel pairs in one assembly routine when the
 * requantization is TG_RQ_FAST without a pre-shift and the clamp is the int8 range (what
 * the compiler gives most layers; tg_mat_fast): all fourteen free registers hold the
 * block, a group costs two LDMs and eight SMLADs, a record's bias starts the sums and its
 * constants follow the weights, so one pointer walks the pack. Everything else runs
 * tg_mat_pairs_c, the plain statement of the same loop, which compilers vectorise. The
 * routines are local to each file that includes this header.
 */
#ifndef TG_MAT_H
#define TG_MAT_H

#include <stdint.h>
#include <string.h>

#include "tg_arm_dsp.h"
#include "tg_requant.h"

#if TG_DSP && !defined(__ARM_BIG_ENDIAN)
#define TG_MAT_ASM 1  /* the pack's words are read as little-endian int16 pairs */
#else
#define TG_MAT_ASM 0
#endif


#define TG_MAT_CHUNK 8  /* groups of four in the unrolled assembly body */

/* int16 elements of the pair buffer for vectors of k_len values (two pixels). */
#define TG_MAT_PAIR_ELEMS(k_len) (2 * (((k_len) + 3) & ~3))

/* int32 words of one channel pair's record in the pack. */
static int32_t tg_mat_record_words(int32_t k_len)
{
    return 4 + 4 * ((k_len + 3) >> 2) + 6;
}

/* The low int16 half of a pack word, sign-extended. */
static int32_t tg_mat_lo16(int32_t word)
{
    return (int32_t)(int16_t)(uint16_t)((uint32_t)word & 0xFFFFu);
}

#if TG_DSP
/* Both pixels into the pair buffer, a group of four per step: SXTAB16 of an input word gives
 * (x[k] - in_zp, x[k+2] - in_zp), of the word turned by 8 bits (x[k+1], x[k+3]). */
TG_INLINE void tg_mat_put4(int16_t *xw, uint32_t v0, uint32_t v1, uint32_t off)
{
    const uint32_t w0 = tg_widen_even(v0, off), w1 = tg_widen_odd(v0, off);
    const uint32_t w2 = tg_widen_even(v1, off), w3 = tg_widen_odd(v1, off);
    memcpy(xw, &w0, sizeof w0);  /* memcpy: the buffer is read as int16 too */
    memcpy(xw + 2, &w1, sizeof w1);
    memcpy(xw + 4, &w2, sizeof w2);
    memcpy(xw + 6, &w3, sizeof w3);
}

static void tg_mat_widen_pair(const int8_t *p0, const int8_t *p1, int32_t k_len, int32_t in_zp,
                             int16_t *xw)
{
    const uint32_t off = (uint32_t)(uint16_t)(-in_zp) * 0x00010001u;
    int32_t k = 0;
    uint32_t v0, v1;
    for (; k + 4 <= k_len; k += 4, xw += 8) {
        memcpy(&v0, p0 + k, sizeof v0);
        memcpy(&v1, p1 + k, sizeof v1);
        tg_mat_put4(xw, v0, v1, off);
    }
    if (k < k_len) {  /* the last partial group: in_zp past k_len widens to 0 */
        int8_t last[8];
        memset(last, (int8_t)in_zp, sizeof last);
        memcpy(last, p0 + k, (size_t)(k_len - k));
        memcpy(last + 4, p1 + k, (size_t)(k_len - k));
        memcpy(&v0, last, sizeof v0);
        memcpy(&v1, last + 4, sizeof v1);
        tg_mat_put4(xw, v0, v1, off);
    }
}
#else
/* One pixel into its half of the pair buffer (xw already offset by 4 * pixel). */
static void tg_mat_widen(const int8_t *px, int32_t k_len, int32_t in_zp, int16_t *xw)
{
    int32_t k;
    for (k = 0; k < k_len; k += 4, xw += 8) {
        xw[0] = (int16_t)(px[k] - in_zp);
        xw[1] = (int16_t)(k + 2 < k_len ? px[k + 2] - in_zp : 0);
        xw[2] = (int16_t)(k + 1 < k_len ? px[k + 1] - in_zp : 0);
        xw[3] = (int16_t)(k + 3 < k_len ? px[k + 3] - in_zp : 0);
    }
}
#endif

/* Both pixels of a pair into the pair buffer (p1 == p0 for a lone pixel). */
static void tg_mat_widen2(const int8_t *p0, const int8_t *p1, int32_t k_len, int32_t in_zp,
                          int16_t *xw)
{
#if TG_DSP
    tg_mat_widen_pair(p0, p1, k_len, in_zp, xw);
#else
    tg_mat_widen(p0, k_len, in_zp, xw);
    tg_mat_widen(p1, k_len, in_zp, xw + 4);
#endif
}

/* One output of channel c (requant channel rc) at y[c]: requantized, or the raw sum. */
static void tg_mat_put(const tg_requant_t *rq, void *y, int32_t c, int32_t rc, int32_t acc)
{
    if (rq != NULL) {
        ((int8_t *)y)[c] = tg_requant(acc, rq, rc);
    } else {
        ((int32_t *)y)[c] = acc;
    }
}

/* y[c] = TG_RQ_FAST of acc (shifted left by pre) clamped to [lo, hi]: one clamp, since
 * [lo, hi] lies inside the int8 range the form saturates to. */
TG_INLINE void tg_mat_put_fast(void *y, int32_t c, const int32_t *k, int32_t acc, int32_t pre,
                               int32_t lo, int32_t hi)
{
    const int32_t top = tg_mul_hi32((int32_t)((uint32_t)acc << pre), k[0]);
    const int32_t v = (int32_t)((uint32_t)top + (uint32_t)k[1]) >> k[2];
    ((int8_t *)y)[c] = (int8_t)(v < lo ? lo : (v > hi ? hi : v));
}

/* The channels of one group for the pixel pair in xw. */
typedef struct {
    const int32_t *rec;      /* the group's first record */
    const tg_requant_t *rq;  /* NULL: int32 outputs */
    int32_t k_len;
    int32_t nc;              /* channels of the group */
    int32_t c_base;          /* the group's first channel, for rq */
} tg_mat_group_t;

/* Channel pairs [j0, j1) of the group; y0/y1 point at the group's channel 0 of pixels 0
 * and 1 (y1 == y0 for a lone pixel, whose pair half repeats it). */
static void tg_mat_pairs_c(const tg_mat_group_t *grp, const int16_t *xw, int32_t j0,
                           int32_t j1, void *y0, void *y1)
{
    const int32_t groups = (grp->k_len + 3) >> 2, words = tg_mat_record_words(grp->k_len);
    const int32_t *rec = grp->rec + j0 * words;
    const int fast_form = grp->rq != NULL && grp->rq->form == TG_RQ_FAST;
    int32_t j, g, l;
    for (j = j0; j < j1; ++j, rec += words) {
        const int32_t *wp = rec + 4;
        const int16_t *xg = xw;
        const int32_t c = 2 * j;
        int32_t a00 = rec[0], a01 = rec[1], a10 = rec[2], a11 = rec[3];
        for (g = 0; g < groups; ++g, xg += 8, wp += 4) {
            for (l = 0; l < 2; ++l) {  /* lane pair l of the group: c0's word l, c1's 2 + l */
                const int32_t u = wp[l], v = wp[2 + l];
                int32_t x0 = xg[2 * l], x1 = xg[4 + 2 * l], wu = tg_mat_lo16(u),
                        wv = tg_mat_lo16(v);
                /* lane by lane: few values live at once, so -Os keeps the sums in registers */
                a00 += x0 * wu;
                a10 += x1 * wu;
                a01 += x0 * wv;
                a11 += x1 * wv;
                x0 = xg[2 * l + 1];
                x1 = xg[4 + 2 * l + 1];
                wu = u >> 16;
                wv = v >> 16;
                a00 += x0 * wu;
                a10 += x1 * wu;
                a01 += x0 * wv;
                a11 += x1 * wv;
            }
        }
        if (fast_form) {  /* the record's constants, inline: no per-output dispatch */
            const int32_t pre = grp->rq->pre, lo = grp->rq->act_min, hi = grp->rq->act_max;
            const int32_t *e = rec + 4 + 4 * groups;  /* mult, add, r of c0, then of c1 */
            tg_mat_put_fast(y0, c, e, a00, pre, lo, hi);
            tg_mat_put_fast(y1, c, e, a10, pre, lo, hi);
            if (c + 1 < grp->nc) {
                tg_mat_put_fast(y0, c + 1, e + 3, a01, pre, lo, hi);
                tg_mat_put_fast(y1, c + 1, e + 3, a11, pre, lo, hi);
            }
            continue;
        }
        tg_mat_put(grp->rq, y0, c, grp->c_base + c, a00);
        tg_mat_put(grp->rq, y1, c, grp->c_base + c, a10);
        if (c + 1 < grp->nc) {
            tg_mat_put(grp->rq, y0, c + 1, grp->c_base + c + 1, a01);
            tg_mat_put(grp->rq, y1, c + 1, grp->c_base + c + 1, a11);
        }
    }
}

/* The assembly's case: TG_RQ_FAST, no pre-shift, the saturation is the whole clamp. */
static int tg_mat_fast(const tg_requant_t *rq)
{
    return rq != NULL && rq->form == TG_RQ_FAST && rq->pre == 0 && rq->act_min == -128
           && rq->act_max == 127;
}

#if TG_MAT_ASM
/* What the assembly routines read (offsets 0..20 on 32-bit Arm). */
typedef struct {
    const int16_t *xw;     /* the pair buffer */
    const int32_t *pack;   /* first record */
    int8_t *y0, *y1;       /* channel 0 of pixels 0 and 1 */
    int32_t pairs;         /* whole channel pairs, >= 1 */
    int32_t groups;        /* groups of four; the short routine takes <= TG_MAT_CHUNK */
} tg_mat_job_t;

void tg_mat_dsp_short(const tg_mat_job_t *job);
void tg_mat_dsp_long(const tg_mat_job_t *job);

/* Registers in the loop: r0-r3 the sums (pixel 0 c0, c1; pixel 1 c0, c1), r4-r7 a group of
 * the pair buffer (pixel 0's two words, pixel 1's), r8-r11 the group's weights (c0's two
 * words, c1's), r12 the pair buffer, lr the pack. The body is TG_MAT_CHUNK groups unrolled;
 * a record's pass jumps into it so that the last group ends at label 3 (every group is ten
 * 32-bit instructions, 40 bytes). The long routine runs further whole chunks, counted on
 * the stack. Frame: [sp] y0, [sp, #4] y1, [sp, #8] y0 end, [sp, #12] pair buffer,
 * [sp, #16] entry address, [sp, #20] chunks after the first, [sp, #24] chunks left. */
__asm__(
    ".syntax unified\n"
    ".macro tg_mat_dsp name, long\n"
    ".pushsection .text.\\name,\"ax\",%progbits\n"
    ".balign 4\n"
    ".type \\name, %function\n"
    ".thumb\n"
    ".thumb_func\n"
    "\\name:\n"
    "    push    {r4-r11, lr}\n"
    "    sub     sp, sp, #32\n"
    "    ldr     r1, [r0, #8]\n"
    "    ldr     r2, [r0, #12]\n"
    "    ldr     r3, [r0, #16]\n"
    "    add     r3, r1, r3, lsl #1\n"
    "    ldr     r12, [r0, #0]\n"
    "    stmia   sp, {r1, r2, r3, r12}\n"
    "    ldr     r1, [r0, #20]\n"
    ".if \\long\n"
    "    sub     r4, r1, #1\n"
    "    lsr     r4, r4, #3\n"
    "    str     r4, [sp, #20]\n"
    "    sub     r1, r1, r4, lsl #3\n"
    ".endif\n"
    "    adr.w   r2, 3f\n"
    "    mov     r3, #40\n"
    "    mls     r2, r1, r3, r2\n"
    "    orr     r2, r2, #1\n"
    "    str     r2, [sp, #16]\n"
    "    ldr     lr, [r0, #4]\n"
    "1:  ldmia   lr!, {r0-r3}\n"
    ".if \\long\n"
    "    ldr     r4, [sp, #20]\n"
    "    str     r4, [sp, #24]\n"
    ".endif\n"
    "    ldr     pc, [sp, #16]\n"
    "2:\n"
    ".rept 8\n"
    "    ldmia.w r12!, {r4-r7}\n"
    "    ldmia.w lr!, {r8-r11}\n"
    "    smlad   r0, r4, r8, r0\n"
    "    smlad   r0, r5, r9, r0\n"
    "    smlad   r2, r6, r8, r2\n"
    "    smlad   r2, r7, r9, r2\n"
    "    smlad   r1, r4, r10, r1\n"
    "    smlad   r1, r5, r11, r1\n"
    "    smlad   r3, r6, r10, r3\n"
    "    smlad   r3, r7, r11, r3\n"
    ".endr\n"
    "3:\n"
    ".if \\long\n"
    "    ldr     r4, [sp, #24]\n"
    "    subs    r4, r4, #1\n"
    "    bmi     4f\n"
    "    str     r4, [sp, #24]\n"
    "    b       2b\n"
    "4:\n"
    ".endif\n"
    "    ldmia   lr!, {r4-r9}\n"
    "    smmla   r0, r0, r4, r5\n"
    "    asr     r0, r0, r6\n"
    "    ssat    r0, #8, r0\n"
    "    smmla   r2, r2, r4, r5\n"
    "    asr     r2, r2, r6\n"
    "    ssat    r2, #8, r2\n"
    "    smmla   r1, r1, r7, r8\n"
    "    asr     r1, r1, r9\n"
    "    ssat    r1, #8, r1\n"
    "    smmla   r3, r3, r7, r8\n"
    "    asr     r3, r3, r9\n"
    "    ssat    r3, #8, r3\n"
    "    ldmia   sp, {r4-r6, r12}\n"
    "    strb    r0, [r4], #1\n"
    "    strb    r1, [r4], #1\n"
    "    strb    r2, [r5], #1\n"
    "    strb    r3, [r5], #1\n"
    "    stmia   sp, {r4, r5}\n"
    "    cmp     r4, r6\n"
    "    bne     1b\n"
    "    add     sp, sp, #32\n"
    "    pop     {r4-r11, pc}\n"
    ".size \\name, .-\\name\n"
    ".popsection\n"
    ".endm\n"
    "tg_mat_dsp tg_mat_dsp_short, 0\n"
    "tg_mat_dsp tg_mat_dsp_long, 1\n"
    ".purgem tg_mat_dsp\n");
#endif

/* All channels of the group for the pixel pair in xw (fast: tg_mat_fast(grp->rq)). */
static void tg_mat_channels(const tg_mat_group_t *grp, const int16_t *xw, void *y0, void *y1,
                            int fast)
{
#if TG_MAT_ASM
    if (fast && grp->nc >= 2) {
        tg_mat_job_t job;
        job.xw = xw;
        job.pack = grp->rec;
        job.y0 = (int8_t *)y0;
        job.y1 = (int8_t *)y1;
        job.pairs = grp->nc >> 1;
        job.groups = (grp->k_len + 3) >> 2;
        if (job.groups <= TG_MAT_CHUNK) {
            tg_mat_dsp_short(&job);
        } else {
            tg_mat_dsp_long(&job);
        }
        if (grp->nc & 1) {
            tg_mat_pairs_c(grp, xw, grp->nc >> 1, (grp->nc >> 1) + 1, y0, y1);
        }
        return;
    }
#else
    (void)fast;
#endif
    tg_mat_pairs_c(grp, xw, 0, (grp->nc + 1) >> 1, y0, y1);
}

#endif /* TG_MAT_H */
