/* tg_mat.h - the blocked int16 matrix core of tg_pwconv, tg_conv and tg_fc (private header).
 *
 * tg_fc (TG_MAT_ROW) takes one row against four channels per pass from the same pack
 * (below, at the one-row routines). The two convolutions reduce an output pixel to dot
 * products of a vector of k_len int8 values
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
 * A prescaled pack (tinygen.reference.mat.prescaled_constants; any fixed-point form) holds
 * channel c's weights and bias times 2^p_c, p_c in [0, 7], chosen so that every channel's
 * constants are mult, add, TG_MAT_R | TG_MAT_PRESCALED and apply to the sum with no
 * pre-shift: the assembly then ends each output in one SMMLA and one SSAT with the shift as
 * an immediate.
 * A missing last c1 (odd channel count) has an all-zero record half and is never written.
 * So a pass over the pair buffer runs one channel pair against both pixels: every
 * pair-buffer word meets two channels and every weight word two pixels, one dual MAC each.
 * Partial sums are the bias plus terms (x - in_zp) * (w - w_zp) of magnitude <= 255 * 255,
 * inside the accumulator bound the compiler proved (passes/overflow.py).
 *
 * Cores with the DSP extension run the channel pairs in one assembly routine when the pack
 * is prescaled, or the requantization is TG_RQ_FAST without a pre-shift, and the clamp is
 * the int8 range (what the compiler gives most layers; tg_mat_mode): all fourteen free
 * registers hold the
 * block, a group costs two LDMs and eight SMLADs, a record's bias starts the sums and its
 * constants follow the weights, so one pointer walks the pack. Everything else runs
 * tg_mat_pairs_c, the plain statement of the same loop (gcc -O3 does not vectorise it). The
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

#ifndef TG_MAT_ROW
#define TG_MAT_ROW 0  /* tg_fc.c sets it: the one-row routines instead of the pixel-pair ones */
#endif


#define TG_MAT_CHUNK 8  /* groups of four in the unrolled assembly body */
#define TG_MAT_R 11          /* the final shift of a prescaled pack */
#define TG_MAT_PRESCALED 256 /* beside r in the r words of a prescaled pack's records */
#define TG_MAT_STR(v) TG_MAT_STR2(v)
#define TG_MAT_STR2(v) #v

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
    const int32_t v = (int32_t)((uint32_t)top + (uint32_t)k[1]) >> (k[2] & 31);
    ((int8_t *)y)[c] = (int8_t)(v < lo ? lo : (v > hi ? hi : v));
}

/* Which assembly routines a layer can take: 0 none (the C), 1 TG_RQ_FAST without a
 * pre-shift, 2 a prescaled pack; both need the saturation to be the whole clamp. */
static inline int tg_mat_mode(const tg_requant_t *rq, const int32_t *pack, int32_t k_len)
{
    if (rq == NULL || rq->act_min != -128 || rq->act_max != 127) {
        return 0;
    }
    if (pack[4 + 4 * ((k_len + 3) >> 2) + 2] & TG_MAT_PRESCALED) {
        return 2;
    }
    return rq->form == TG_RQ_FAST && rq->pre == 0 ? 1 : 0;
}

#if !TG_MAT_ROW /* ---- two pixels x two channels: tg_pwconv, tg_conv ---- */

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
    int32_t k = k_len & ~3;
    uint32_t v0, v1;
#if TG_MAT_ASM
    if (k != 0) {  /* whole groups: gcc -Os would spill the eight words of a group */
        int32_t n = k >> 2;
        uint32_t e0, e1;
        const int8_t *s0 = p0, *s1 = p1;
        __asm__ volatile(
            "1:\n\t"
            "ldr     %[v0], [%[s0]], #4\n\t"
            "ldr     %[v1], [%[s1]], #4\n\t"
            "sxtab16 %[e0], %[off], %[v0]\n\t"
            "sxtab16 %[v0], %[off], %[v0], ror #8\n\t"
            "sxtab16 %[e1], %[off], %[v1]\n\t"
            "sxtab16 %[v1], %[off], %[v1], ror #8\n\t"
            "strd    %[e1], %[v1], [%[xw], #8]\n\t"
            "strd    %[e0], %[v0], [%[xw]], #16\n\t"
            "subs    %[n], %[n], #1\n\t"
            "bne     1b"
            : [s0] "+r"(s0), [s1] "+r"(s1), [xw] "+r"(xw), [n] "+r"(n), [v0] "=&r"(v0),
              [v1] "=&r"(v1), [e0] "=&r"(e0), [e1] "=&r"(e1)
            : [off] "r"(off)
            : "cc", "memory");
    }
#else
    for (k = 0; k + 4 <= k_len; k += 4, xw += 8) {
        memcpy(&v0, p0 + k, sizeof v0);
        memcpy(&v1, p1 + k, sizeof v1);
        tg_mat_put4(xw, v0, v1, off);
    }
#endif
    if (k < k_len) {  /* the last partial group: in_zp past k_len widens to 0 */
        int8_t last[8];
        int32_t i;
        for (i = 0; i < 4; ++i) {  /* byte by byte: library calls would cost more */
            last[i] = k + i < k_len ? p0[k + i] : (int8_t)in_zp;
            last[4 + i] = k + i < k_len ? p1[k + i] : (int8_t)in_zp;
        }
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
    /* A prescaled pack's constants hold for any fixed form, with no pre-shift. */
    const int prescaled = grp->rq != NULL && (grp->rec[4 + 4 * groups + 2] & TG_MAT_PRESCALED);
    const int fast_form = prescaled || (grp->rq != NULL && grp->rq->form == TG_RQ_FAST);
    const int32_t pre = prescaled || grp->rq == NULL ? 0 : grp->rq->pre;
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
            const int32_t lo = grp->rq->act_min, hi = grp->rq->act_max;
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

#if TG_MAT_ASM
/* What the assembly routines read (offsets 0..40 on 32-bit Arm). */
typedef struct {
    const int16_t *xw;     /* the pair buffer */
    const int32_t *pack;   /* first record */
    int8_t *y0, *y1;       /* channel 0 of pixels 0 and 1 (of the first pixel pair) */
    int32_t pairs;         /* whole channel pairs, >= 1 */
    int32_t groups;        /* groups of four; the short routine takes <= TG_MAT_CHUNK */
    const int8_t *x;       /* NULL: xw is filled; else pixel 0 of the first pair, widened here */
    int32_t x_px;          /* bytes from pixel 0 to pixel 1 (a pair is 2 * x_px further) */
    uint32_t off;          /* -in_zp in both int16 lanes */
    int32_t runs;          /* pixel pairs, >= 1 (1 when x is NULL) */
    int32_t y_px;          /* bytes from y0 to y1, likewise */
} tg_mat_job_t;

void tg_mat_dsp_short(const tg_mat_job_t *job);
void tg_mat_dsp_long(const tg_mat_job_t *job);
void tg_mat_dsp_short_r(const tg_mat_job_t *job);
void tg_mat_dsp_long_r(const tg_mat_job_t *job);

/* Per pixel pair (runs of them): with x given, both pixels' k_len = 4 * groups values are
 * widened into the pair buffer first (label 7; x_px >= 4 * groups). Then per channel pair,
 * registers in the loop: r0-r3 the sums (pixel 0 c0, c1; pixel 1 c0, c1), r4-r7 a group of
 * the pair buffer (pixel 0's two words, pixel 1's), r8-r11 the group's weights (c0's two
 * words, c1's), r12 the pair buffer, lr the pack. The body is TG_MAT_CHUNK groups unrolled;
 * a record's pass jumps into it so that the last group ends at label 3 (every group is ten
 * 32-bit instructions, 40 bytes). The long routine runs further whole chunks, counted on
 * the stack. Frame: [sp] y0, [sp, #4] y1, [sp, #8] y0 end, [sp, #12] pair buffer,
 * [sp, #16] entry address, [sp, #20] chunks after the first, [sp, #24] chunks left,
 * [sp, #28] the job, [sp, #32] the next pair's x, [sp, #36] pixel pairs left. */
__asm__(
    ".syntax unified\n"
    ".macro tg_mat_dsp name, long, rimm\n"
    ".pushsection .text.\\name,\"ax\",%progbits\n"
    ".balign 4\n"
    ".type \\name, %function\n"
    ".thumb\n"
    ".thumb_func\n"
    "\\name:\n"
    "    push    {r4-r11, lr}\n"
    "    sub     sp, sp, #40\n"
    "    str     r0, [sp, #28]\n"
    "    ldr     r1, [r0, #24]\n"
    "    ldr     r2, [r0, #36]\n"
    "    strd    r1, r2, [sp, #32]\n"
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
    "7:  ldr     r0, [sp, #28]\n"
    "    ldr     r1, [sp, #32]\n"
    "    cbz     r1, 8f\n"
    "    ldr     r3, [r0, #28]\n"
    "    add     r2, r1, r3\n"
    "    add     r3, r2, r3\n"
    "    str     r3, [sp, #32]\n"
    "    ldr     r3, [r0, #20]\n"
    "    ldr     r12, [r0, #32]\n"
    "    ldr     lr, [r0, #0]\n"
    "6:  ldr     r4, [r1], #4\n"
    "    ldr     r5, [r2], #4\n"
    "    sxtab16 r6, r12, r4\n"
    "    sxtab16 r7, r12, r4, ror #8\n"
    "    sxtab16 r8, r12, r5\n"
    "    sxtab16 r9, r12, r5, ror #8\n"
    "    stmia   lr!, {r6-r9}\n"
    "    subs    r3, r3, #1\n"
    "    bne     6b\n"
    "8:  ldr     lr, [r0, #4]\n"
    "    ldr     r12, [sp, #12]\n"
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
    ".if \\rimm\n"
    "    smmla   r0, r0, r4, r5\n"
    "    ssat    r0, #8, r0, asr #" TG_MAT_STR(TG_MAT_R) "\n"
    "    smmla   r2, r2, r4, r5\n"
    "    ssat    r2, #8, r2, asr #" TG_MAT_STR(TG_MAT_R) "\n"
    "    smmla   r1, r1, r7, r8\n"
    "    ssat    r1, #8, r1, asr #" TG_MAT_STR(TG_MAT_R) "\n"
    "    smmla   r3, r3, r7, r8\n"
    "    ssat    r3, #8, r3, asr #" TG_MAT_STR(TG_MAT_R) "\n"
    ".else\n"
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
    ".endif\n"
    "    ldmia   sp, {r4-r6, r12}\n"
    "    strb    r0, [r4], #1\n"
    "    strb    r1, [r4], #1\n"
    "    strb    r2, [r5], #1\n"
    "    strb    r3, [r5], #1\n"
    "    stmia   sp, {r4, r5}\n"
    "    cmp     r4, r6\n"
    "    bne     1b\n"
    "    ldr     r0, [sp, #36]\n"
    "    subs    r0, r0, #1\n"
    "    beq     9f\n"
    "    str     r0, [sp, #36]\n"
    "    ldr     r0, [sp, #28]\n"
    "    ldr     r1, [r0, #40]\n"
    "    ldr     r2, [r0, #16]\n"
    "    sub     r4, r4, r2, lsl #1\n"
    "    add     r4, r4, r1, lsl #1\n"
    "    add     r5, r4, r1\n"
    "    add     r6, r4, r2, lsl #1\n"
    "    stmia   sp, {r4-r6}\n"
    "    b       7b\n"
    "9:  add     sp, sp, #40\n"
    "    pop     {r4-r11, pc}\n"
    ".size \\name, .-\\name\n"
    ".popsection\n"
    ".endm\n"
    "tg_mat_dsp tg_mat_dsp_short, 0, 0\n"
    "tg_mat_dsp tg_mat_dsp_long, 1, 0\n"
    "tg_mat_dsp tg_mat_dsp_short_r, 0, 1\n"
    "tg_mat_dsp tg_mat_dsp_long_r, 1, 1\n"
    ".purgem tg_mat_dsp\n");

/* The routine for the job's length and the layer's mode (tg_mat_mode, 1 or 2). */
static void tg_mat_dsp(tg_mat_job_t *job, int mode)
{
    if (job->groups <= TG_MAT_CHUNK) {
        (mode == 2 ? tg_mat_dsp_short_r : tg_mat_dsp_short)(job);
    } else {
        (mode == 2 ? tg_mat_dsp_long_r : tg_mat_dsp_long)(job);
    }
}
#endif

/* All channels of the group for the pixel pair in xw (fast: tg_mat_mode of the layer). */
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
        job.x = NULL;
        job.x_px = 0;
        job.off = 0;
        job.runs = 1;
        job.y_px = 0;
        tg_mat_dsp(&job, fast);
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

/* runs pixel pairs, widened and run against all channels in one call: pair q's pixels at
 * x + 2q*x_px and x + (2q+1)*x_px, their outputs likewise y_px apart from y. Returns 0
 * when this case is not the assembly's (the caller then goes pair by pair): it needs
 * an assembly mode (fast, tg_mat_mode), an even channel count and k_len a multiple of 4. */
static inline int tg_mat_run(const tg_mat_group_t *grp, const int8_t *x, int32_t x_px,
                             int32_t in_zp, int16_t *xw, int8_t *y, int32_t y_px,
                             int32_t runs, int fast)
{
#if TG_MAT_ASM
    if (fast && runs > 0 && grp->nc >= 2 && (grp->nc & 1) == 0 && (grp->k_len & 3) == 0) {
        tg_mat_job_t job;
        job.xw = xw;
        job.pack = grp->rec;
        job.y0 = y;
        job.y1 = y + y_px;
        job.pairs = grp->nc >> 1;
        job.groups = grp->k_len >> 2;
        job.x = x;
        job.x_px = x_px;
        job.off = (uint32_t)(uint16_t)(-in_zp) * 0x00010001u;
        job.runs = runs;
        job.y_px = y_px;
        tg_mat_dsp(&job, fast);
        return 1;
    }
#else
    (void)grp, (void)x, (void)x_px, (void)in_zp, (void)xw, (void)y, (void)y_px, (void)runs;
    (void)fast;
#endif
    return 0;
}

#else /* ---- one row x four channels: tg_fc ------------------------------------------- */

/* A row's sums are its pack's bias plus terms x * w' with no input offset: the fc pack
 * (tinygen.reference.fc.fc_pack) folds the zero point into the bias, which may wrap, so
 * the sums are taken modulo 2^32 (uint32_t); they end as the exact accumulator. */

/* Channel pairs [j0, j1) of a pack of nc channels for the row x (k_len values), any
 * requantization (rq NULL: int32 outputs); y points at channel 0. */
static void tg_mat_row_c(const int32_t *pack, const tg_requant_t *rq, const int8_t *x,
                         int32_t k_len, int32_t nc, int32_t j0, int32_t j1, void *y)
{
    const int32_t groups = (k_len + 3) >> 2, words = tg_mat_record_words(k_len);
    const int32_t *rec = pack + j0 * words;
    const int prescaled = rq != NULL && (pack[4 + 4 * groups + 2] & TG_MAT_PRESCALED);
    const int fast_form = prescaled || (rq != NULL && rq->form == TG_RQ_FAST);
    const int32_t pre = prescaled || rq == NULL ? 0 : rq->pre;
    int32_t j, g, k;
    for (j = j0; j < j1; ++j, rec += words) {
        const int32_t c = 2 * j;
        const int32_t *wg = rec + 4;
        uint32_t a0 = (uint32_t)rec[0], a1 = (uint32_t)rec[1];
        for (g = 0; g < k_len >> 2; ++g, wg += 4) {  /* lanes: words (k, k+2), (k+1, k+3) */
            const int8_t *xg = x + 4 * g;
            a0 += (uint32_t)(xg[0] * tg_mat_lo16(wg[0]) + xg[1] * tg_mat_lo16(wg[1])
                             + xg[2] * (wg[0] >> 16) + xg[3] * (wg[1] >> 16));
            a1 += (uint32_t)(xg[0] * tg_mat_lo16(wg[2]) + xg[1] * tg_mat_lo16(wg[3])
                             + xg[2] * (wg[2] >> 16) + xg[3] * (wg[3] >> 16));
        }
        for (k = k_len & ~3; k < k_len; ++k) {  /* input k: word (k & 1) of its group, half k & 2 */
            const int32_t *wg = rec + 4 + 4 * (k >> 2) + (k & 1);
            const int32_t u = wg[0], v = wg[2];
            const int32_t wu = (k & 2) ? u >> 16 : tg_mat_lo16(u);
            const int32_t wv = (k & 2) ? v >> 16 : tg_mat_lo16(v);
            a0 += (uint32_t)(x[k] * wu);
            a1 += (uint32_t)(x[k] * wv);
        }
        if (fast_form) {
            const int32_t lo = rq->act_min, hi = rq->act_max;
            const int32_t *e = rec + 4 + 4 * groups;  /* mult, add, r of c0, then of c1 */
            tg_mat_put_fast(y, c, e, (int32_t)a0, pre, lo, hi);
            if (c + 1 < nc) {
                tg_mat_put_fast(y, c + 1, e + 3, (int32_t)a1, pre, lo, hi);
            }
            continue;
        }
        tg_mat_put(rq, y, c, c, (int32_t)a0);
        if (c + 1 < nc) {
            tg_mat_put(rq, y, c + 1, c + 1, (int32_t)a1);
        }
    }
}

#if TG_MAT_ASM
/* What the row routines read (offsets 0..20 on 32-bit Arm). */
typedef struct {
    const int8_t *x;       /* the row; k_len = 4 * groups values, read a word at a time */
    const int32_t *pack;   /* first record */
    int8_t *y;             /* channel 0 */
    int32_t quads;         /* whole groups of four channels (two records), >= 1 */
    int32_t groups;        /* groups of four inputs, >= 1 */
    int32_t rec_bytes;     /* bytes of one record */
} tg_mat_row_job_t;

void tg_mat_row_dsp(const tg_mat_row_job_t *job);
void tg_mat_row_dsp_r(const tg_mat_row_job_t *job);

/* Two records (four channels) per pass against the row. Registers in the loop: r0-r3 the
 * sums (record A's c0, c1, record B's c0, c1), r4/r5 an input word widened by SXTB16 into
 * its odd and even lanes, r6-r9 a record's weights of the group, r10 the row, r11 record
 * A, r12 record B, lr the chunks left. The body is TG_MAT_CHUNK groups unrolled, entered so
 * that the last group ends at label 3 (every group is thirteen 32-bit instructions, 52
 * bytes). Frame: [sp] y, [sp, #4] the row, [sp, #8] chunks after the first, [sp, #12]
 * entry address, [sp, #16] quads left, [sp, #20] record bytes (0: record B is A). */
__asm__(
    ".syntax unified\n"
    ".macro tg_mat_row name, rimm\n"
    ".pushsection .text.\\name,\"ax\",%progbits\n"
    ".balign 4\n"
    ".type \\name, %function\n"
    ".thumb\n"
    ".thumb_func\n"
    "\\name:\n"
    "    push    {r4-r11, lr}\n"
    "    sub     sp, sp, #24\n"
    "    ldr     r1, [r0, #8]\n"
    "    ldr     r2, [r0, #0]\n"
    "    strd    r1, r2, [sp]\n"
    "    ldr     r1, [r0, #12]\n"
    "    ldr     r2, [r0, #20]\n"
    "    strd    r1, r2, [sp, #16]\n"
    "    ldr     r1, [r0, #16]\n"
    "    sub     r4, r1, #1\n"
    "    lsr     r4, r4, #3\n"
    "    str     r4, [sp, #8]\n"
    "    sub     r1, r1, r4, lsl #3\n"
    "    adr.w   r3, 3f\n"
    "    mov     r4, #52\n"
    "    mls     r3, r1, r4, r3\n"
    "    orr     r3, r3, #1\n"
    "    str     r3, [sp, #12]\n"
    "    ldr     r11, [r0, #4]\n"
    "    add     r12, r11, r2\n"
    "1:  ldrd    r0, r1, [r11], #16\n"
    "    ldrd    r2, r3, [r12], #16\n"
    "    ldrd    r10, lr, [sp, #4]\n"
    "    ldr     pc, [sp, #12]\n"
    "2:\n"
    ".rept 8\n"
    "    ldr.w   r4, [r10], #4\n"
    "    sxtb16  r5, r4\n"
    "    sxtb16  r4, r4, ror #8\n"
    "    ldmia.w r11!, {r6-r9}\n"
    "    smlad   r0, r5, r6, r0\n"
    "    smlad   r0, r4, r7, r0\n"
    "    smlad   r1, r5, r8, r1\n"
    "    smlad   r1, r4, r9, r1\n"
    "    ldmia.w r12!, {r6-r9}\n"
    "    smlad   r2, r5, r6, r2\n"
    "    smlad   r2, r4, r7, r2\n"
    "    smlad   r3, r5, r8, r3\n"
    "    smlad   r3, r4, r9, r3\n"
    ".endr\n"
    "3:  subs    lr, lr, #1\n"
    "    bpl     2b\n"
    "    ldmia   r11!, {r4-r9}\n"
    ".if \\rimm\n"
    "    smmla   r0, r0, r4, r5\n"
    "    ssat    r0, #8, r0, asr #" TG_MAT_STR(TG_MAT_R) "\n"
    "    smmla   r1, r1, r7, r8\n"
    "    ssat    r1, #8, r1, asr #" TG_MAT_STR(TG_MAT_R) "\n"
    "    ldmia   r12!, {r4-r9}\n"
    "    smmla   r2, r2, r4, r5\n"
    "    ssat    r2, #8, r2, asr #" TG_MAT_STR(TG_MAT_R) "\n"
    "    smmla   r3, r3, r7, r8\n"
    "    ssat    r3, #8, r3, asr #" TG_MAT_STR(TG_MAT_R) "\n"
    ".else\n"
    "    smmla   r0, r0, r4, r5\n"
    "    asr     r0, r0, r6\n"
    "    ssat    r0, #8, r0\n"
    "    smmla   r1, r1, r7, r8\n"
    "    asr     r1, r1, r9\n"
    "    ssat    r1, #8, r1\n"
    "    ldmia   r12!, {r4-r9}\n"
    "    smmla   r2, r2, r4, r5\n"
    "    asr     r2, r2, r6\n"
    "    ssat    r2, #8, r2\n"
    "    smmla   r3, r3, r7, r8\n"
    "    asr     r3, r3, r9\n"
    "    ssat    r3, #8, r3\n"
    ".endif\n"
    "    ldr     r4, [sp]\n"
    "    strb    r0, [r4], #1\n"
    "    strb    r1, [r4], #1\n"
    "    strb    r2, [r4], #1\n"
    "    strb    r3, [r4], #1\n"
    "    str     r4, [sp]\n"
    "    mov     r11, r12\n"
    "    ldrd    r3, r4, [sp, #16]\n"
    "    add     r12, r11, r4\n"
    "    subs    r3, r3, #1\n"
    "    str     r3, [sp, #16]\n"
    "    bne     1b\n"
    "    add     sp, sp, #24\n"
    "    pop     {r4-r11, pc}\n"
    ".size \\name, .-\\name\n"
    ".popsection\n"
    ".endm\n"
    "tg_mat_row tg_mat_row_dsp, 0\n"
    "tg_mat_row tg_mat_row_dsp_r, 1\n"
    ".purgem tg_mat_row\n");
#endif

/* The row x against all nc channels of the pack into y (int8 with rq, else int32). */
static void tg_mat_row(const int32_t *pack, const tg_requant_t *rq, const int8_t *x,
                       int32_t k_len, int32_t nc, void *y)
{
#if TG_MAT_ASM
    const int mode = tg_mat_mode(rq, pack, k_len);
    if (mode != 0 && k_len != 0 && (k_len & 3) == 0) {
        const int32_t words = tg_mat_record_words(k_len), left = nc & 3;
        void (*run)(const tg_mat_row_job_t *) = mode == 2 ? tg_mat_row_dsp_r : tg_mat_row_dsp;
        tg_mat_row_job_t job;
        job.x = x;
        job.pack = pack;
        job.y = (int8_t *)y;
        job.quads = nc >> 2;
        job.groups = k_len >> 2;
        job.rec_bytes = 4 * words;
        if (job.quads != 0) {
            run(&job);
        }
        if (left != 0) {  /* the last one or two records, into four bytes of the stack */
            int8_t last[4];
            int32_t i;
            job.pack = pack + 2 * (nc >> 2) * words;
            job.y = last;
            job.quads = 1;
            job.rec_bytes = left > 2 ? 4 * words : 0;  /* 0: record B repeats A */
            run(&job);
            for (i = 0; i < left; ++i) {
                ((int8_t *)y)[4 * (nc >> 2) + i] = last[i];
            }
        }
        return;
    }
#endif
    tg_mat_row_c(pack, rq, x, k_len, nc, 0, (nc + 1) >> 1, y);
}

#endif /* TG_MAT_ROW */

#endif /* TG_MAT_H */
