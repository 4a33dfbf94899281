/* tg_pwconv.c - pointwise (1x1) convolution, contract in tg_pwconv.h.
 *
 * A 1x1 convolution is a matrix product of the pixels ([pixels][in_c]) with the weights
 * ([out_c][in_c]). Two pixels at a time are widened once into the scratch pair buffer
 * (x - in_zp as int16, zero past in_c): group g of four inputs at xw + 8g, pixel 0's four
 * lanes then pixel 1's, each as the int16 pairs (k, k+2), (k+1, k+3) that SXTB16 makes of
 * a word. The compile-time pack holds the weights in the same lane order (w - w_zp as
 * int16), so a pass over the pair buffer runs one channel pair against both pixels: every
 * pair-buffer word meets two channels and every weight word two pixels, one dual MAC each.
 * A pixel's input is read only while its pair is widened, so the output may overwrite
 * input the walk has passed (the overlap in tg_pwconv.h).
 *
 * Cores with the DSP extension run the channel pairs of a pixel pair in one assembly
 * routine (tg_pw_dsp_short/long below) when the requantization is TG_RQ_FAST without a
 * pre-shift and the clamp is the int8 range (what the compiler gives most layers): all
 * fourteen free registers hold the block (four sums, two pixels' and two channels' group of
 * four), a group costs two LDMs and eight SMLADs, the record's bias starts the sums and its
 * constants follow the weights, so one pointer walks the pack. Everything else runs
 * tg_pw_pairs_c, the plain statement of the same loop. Partial sums are the bias plus terms
 * (x - in_zp) * (w - w_zp) of magnitude <= 255 * 255, inside the accumulator bound the
 * compiler proved (passes/overflow.py).
 */
#include "tg_pwconv.h"
#include "tg_arm_dsp.h"

#include <string.h>

#if TG_DSP && !defined(__ARM_BIG_ENDIAN)
#define TG_PW_ASM 1  /* the pack's words are read as little-endian int16 pairs */
#else
#define TG_PW_ASM 0
#endif

#define TG_PW_CHUNK 8  /* groups of four inputs in the unrolled assembly body */

/* int32 words of one channel pair's record in the pack. */
static int32_t tg_pw_record_words(int32_t in_c)
{
    return 4 + 4 * ((in_c + 3) >> 2) + 6;
}

/* The low int16 half of a pack word, sign-extended. */
static int32_t tg_pw_lo16(int32_t word)
{
    return (int32_t)(int16_t)(uint16_t)((uint32_t)word & 0xFFFFu);
}

#if TG_DSP
/* Both pixels into the pair buffer, a group of four per step: SXTAB16 of an input word gives
 * (x[k] - in_zp, x[k+2] - in_zp), of the word turned by 8 bits (x[k+1], x[k+3]). */
TG_INLINE void tg_pw_put4(int16_t *xw, uint32_t v0, uint32_t v1, uint32_t off)
{
    const uint32_t w0 = tg_widen_even(v0, off), w1 = tg_widen_odd(v0, off);
    const uint32_t w2 = tg_widen_even(v1, off), w3 = tg_widen_odd(v1, off);
    memcpy(xw, &w0, sizeof w0);  /* memcpy: the buffer is read as int16 too */
    memcpy(xw + 2, &w1, sizeof w1);
    memcpy(xw + 4, &w2, sizeof w2);
    memcpy(xw + 6, &w3, sizeof w3);
}

static void tg_pw_widen_pair(const int8_t *p0, const int8_t *p1, int32_t in_c, int32_t in_zp,
                             int16_t *xw)
{
    const uint32_t off = (uint32_t)(uint16_t)(-in_zp) * 0x00010001u;
    int32_t k = 0;
    uint32_t v0, v1;
    for (; k + 4 <= in_c; k += 4, xw += 8) {
        memcpy(&v0, p0 + k, sizeof v0);
        memcpy(&v1, p1 + k, sizeof v1);
        tg_pw_put4(xw, v0, v1, off);
    }
    if (k < in_c) {  /* the last partial group: in_zp past in_c widens to 0 */
        int8_t last[8];
        memset(last, (int8_t)in_zp, sizeof last);
        memcpy(last, p0 + k, (size_t)(in_c - k));
        memcpy(last + 4, p1 + k, (size_t)(in_c - k));
        memcpy(&v0, last, sizeof v0);
        memcpy(&v1, last + 4, sizeof v1);
        tg_pw_put4(xw, v0, v1, off);
    }
}
#else
/* One pixel into its half of the pair buffer (xw already offset by 4 * pixel). */
static void tg_pw_widen(const int8_t *px, int32_t in_c, int32_t in_zp, int16_t *xw)
{
    int32_t k;
    for (k = 0; k < in_c; k += 4, xw += 8) {
        xw[0] = (int16_t)(px[k] - in_zp);
        xw[1] = (int16_t)(k + 2 < in_c ? px[k + 2] - in_zp : 0);
        xw[2] = (int16_t)(k + 1 < in_c ? px[k + 1] - in_zp : 0);
        xw[3] = (int16_t)(k + 3 < in_c ? px[k + 3] - in_zp : 0);
    }
}
#endif

/* One output of channel c at y[c]: requantized, or the raw int32 sum. */
static void tg_pw_put(const tg_requant_t *rq, void *y, int32_t c, int32_t acc)
{
    if (rq != NULL) {
        ((int8_t *)y)[c] = tg_requant(acc, rq, c);
    } else {
        ((int32_t *)y)[c] = acc;
    }
}

/* Channel pairs [j0, j1) for the pixel pair in xw; y0/y1 point at channel 0 of pixels 0
 * and 1 (y1 == y0 for a lone pixel, whose pair half repeats it). */
static void tg_pw_pairs_c(const tg_pwconv_params_t *p, const int16_t *xw, int32_t j0,
                          int32_t j1, void *y0, void *y1)
{
    const int32_t groups = (p->in_c + 3) >> 2, words = tg_pw_record_words(p->in_c);
    const int32_t *rec = p->pack + j0 * words;
    int32_t j, g, l;
    for (j = j0; j < j1; ++j, rec += words) {
        const int32_t *wp = rec + 4;
        const int16_t *xg = xw;
        int32_t a00 = rec[0], a01 = rec[1], a10 = rec[2], a11 = rec[3];
        for (g = 0; g < groups; ++g, xg += 8, wp += 4) {
            for (l = 0; l < 2; ++l) {  /* lane pair l of the group: c0's word l, c1's 2 + l */
                const int32_t u0 = tg_pw_lo16(wp[l]), u1 = wp[l] >> 16;
                const int32_t v0 = tg_pw_lo16(wp[2 + l]), v1 = wp[2 + l] >> 16;
                a00 += xg[2 * l] * u0 + xg[2 * l + 1] * u1;
                a10 += xg[4 + 2 * l] * u0 + xg[4 + 2 * l + 1] * u1;
                a01 += xg[2 * l] * v0 + xg[2 * l + 1] * v1;
                a11 += xg[4 + 2 * l] * v0 + xg[4 + 2 * l + 1] * v1;
            }
        }
        tg_pw_put(p->rq, y0, 2 * j, a00);
        tg_pw_put(p->rq, y1, 2 * j, a10);
        if (2 * j + 1 < p->out_c) {
            tg_pw_put(p->rq, y0, 2 * j + 1, a01);
            tg_pw_put(p->rq, y1, 2 * j + 1, a11);
        }
    }
}

#if TG_PW_ASM
/* What the assembly routines read (offsets 0..20 on 32-bit Arm). */
typedef struct {
    const int16_t *xw;     /* the pair buffer */
    const int32_t *pack;   /* first record */
    int8_t *y0, *y1;       /* channel 0 of pixels 0 and 1 */
    int32_t pairs;         /* whole channel pairs, >= 1 */
    int32_t groups;        /* groups of four inputs; the short routine takes <= TG_PW_CHUNK */
} tg_pw_dsp_job_t;

void tg_pw_dsp_short(const tg_pw_dsp_job_t *job);
void tg_pw_dsp_long(const tg_pw_dsp_job_t *job);

/* Registers in the loop: r0-r3 the sums (pixel 0 c0, c1; pixel 1 c0, c1), r4-r7 a group of
 * the pair buffer (pixel 0's two words, pixel 1's), r8-r11 the group's weights (c0's two
 * words, c1's), r12 the pair buffer, lr the pack. The body is TG_PW_CHUNK groups unrolled;
 * a record's pass jumps into it so that the last group ends at label 3 (every group is ten
 * 32-bit instructions, 40 bytes). The long routine runs further whole chunks, counted on
 * the stack. Frame: [sp] y0, [sp, #4] y1, [sp, #8] y0 end, [sp, #12] pair buffer,
 * [sp, #16] entry address, [sp, #20] chunks after the first, [sp, #24] chunks left. */
__asm__(
    ".syntax unified\n"
    ".macro tg_pw_dsp name, long\n"
    ".pushsection .text.\\name,\"ax\",%progbits\n"
    ".balign 4\n"
    ".global \\name\n"
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
    "tg_pw_dsp tg_pw_dsp_short, 0\n"
    "tg_pw_dsp tg_pw_dsp_long, 1\n"
    ".purgem tg_pw_dsp\n");
#endif

/* Widen the pair (p0, p1; p1 NULL for a lone pixel) and write all channels of both. */
static void tg_pw_pixels(const tg_pwconv_params_t *p, const int8_t *p0, const int8_t *p1,
                         int16_t *xw, void *y0, void *y1, int fast)
{
#if TG_DSP
    tg_pw_widen_pair(p0, p1 != NULL ? p1 : p0, p->in_c, p->in_zp, xw);
#else
    tg_pw_widen(p0, p->in_c, p->in_zp, xw);
    tg_pw_widen(p1 != NULL ? p1 : p0, p->in_c, p->in_zp, xw + 4);
#endif
    if (y1 == NULL) {
        y1 = y0;  /* the repeated pixel writes the same values again */
    }
#if TG_PW_ASM
    if (fast && p->out_c >= 2) {
        tg_pw_dsp_job_t job;
        job.xw = xw;
        job.pack = p->pack;
        job.y0 = (int8_t *)y0;
        job.y1 = (int8_t *)y1;
        job.pairs = p->out_c >> 1;
        job.groups = (p->in_c + 3) >> 2;
        if (job.groups <= TG_PW_CHUNK) {
            tg_pw_dsp_short(&job);
        } else {
            tg_pw_dsp_long(&job);
        }
        if (p->out_c & 1) {
            tg_pw_pairs_c(p, xw, p->out_c >> 1, (p->out_c >> 1) + 1, y0, y1);
        }
        return;
    }
#else
    (void)fast;
#endif
    tg_pw_pairs_c(p, xw, 0, (p->out_c + 1) >> 1, y0, y1);
}

void tg_pwconv(const tg_pwconv_params_t *p, const int8_t *x, void *y, void *scratch,
               int32_t row0, int32_t row1)
{
    const int32_t e = p->rq != NULL ? 1 : 4;  /* output element bytes */
    const int32_t x_row = p->in_w * p->in_c, y_row = p->out_w * p->out_c * e;
    const int32_t x_px = p->stride_w * p->in_c, y_px = p->out_c * e;
    const tg_requant_t *rq = p->rq;
    /* The assembly's case: TG_RQ_FAST, no pre-shift, the saturation is the whole clamp. */
    const int fast = rq != NULL && rq->form == TG_RQ_FAST && rq->pre == 0
                     && rq->act_min == -128 && rq->act_max == 127;
    int16_t *xw = (int16_t *)scratch;
    int8_t *yb = (int8_t *)y;
    int32_t b, r, ox;
    if (p->stride_h == 1 && p->stride_w == 1 && p->x_ring == 0 && p->y_ring == 0
        && p->in_w == p->out_w) {
        /* Dense rows that follow each other: one run of pixels over the whole range. */
        const int32_t whole = row0 == 0 && row1 == p->out_h;
        const int32_t first = row0 * p->out_w;
        const int32_t end = whole ? p->n * p->out_h * p->out_w : row1 * p->out_w;
        int32_t q;
        for (q = first; q < end; q += 2) {
            const int32_t two = q + 1 < end;
            tg_pw_pixels(p, x + q * p->in_c, two ? x + (q + 1) * p->in_c : NULL, xw,
                         yb + q * y_px, two ? yb + (q + 1) * y_px : NULL, fast);
        }
        return;
    }
    for (b = 0; b < (row0 == 0 && row1 == p->out_h ? p->n : 1); ++b) {
        const int8_t *xb = x + b * p->in_h * x_row;
        int8_t *ybb = yb + b * p->out_h * y_row;
        for (r = row0; r < row1; ++r) {
            const int32_t iy = r * p->stride_h;
            const int8_t *xr = xb + (p->x_ring ? iy % p->x_ring : iy) * x_row;
            int8_t *yr = ybb + (p->y_ring ? r % p->y_ring : r) * y_row;
            for (ox = 0; ox < p->out_w; ox += 2) {
                const int32_t two = ox + 1 < p->out_w;
                tg_pw_pixels(p, xr + ox * x_px, two ? xr + (ox + 1) * x_px : NULL, xw,
                             yr + ox * y_px, two ? yr + (ox + 1) * y_px : NULL, fast);
            }
        }
    }
}
