/* tg_dwconv.c - depthwise convolution, contract in tg_dwconv.h.
 *
 * The input is widened once: for a block of input channels, each input row the output rows
 * need is turned into one int16 row per channel ("plane", x - in_zp, the left and right
 * padding as zeros) in a ring of span = (k_h - 1)*dil_h + 1 rows in the arena scratch;
 * rows above or below the input read a shared zero row. Every input row is widened once per
 * channel block, and no tap ever tests for padding: borders and interior run the same loop.
 * Then each output channel makes a whole output row from its k_h plane rows, with its
 * weights, bias and requantization constants (from the compile-time pack) in locals for the
 * whole row.
 *   Plain C (any core, the host): the row's int32 accumulators in scratch, tap by tap over
 *   the row (loops a compiler vectorises), then requantized in one pass.
 *   Cores with the DSP extension, 3x3 taps with dil_w 1, stride_w 1 or 2, fast
 *   requantization: two taps per SMLAD. A word of a plane row holds two neighbouring
 *   columns, and the pack holds per kernel row the pairs (w0, w1), (w1, w2), so with stride
 *   1 two neighbouring outputs take four MACs per word pair (SMLAD, SMLABT and SMLATB,
 *   SMLAD), with stride 2 one output takes an SMLAD and an SMLABT; the accumulators go
 *   straight to SMMLA/SSAT.
 * The widening on DSP cores takes four channels and two pixels per step: PKHBT/PKHTB put
 * the bytes of two channels of both pixels in one word, SXTAB16 widens the pixel pair of
 * each channel and subtracts the zero point.
 * Accumulators are int32 and not checked: the compiler emits a convolution only when
 * |bias| + k_h*k_w*255*255 fits in int32.
 */
#include "tg_dwconv.h"

#include <string.h>

/* The DSP paths read a plane word's low half as the lower column: little-endian only. */
#if TG_DSP && !defined(__ARM_BIG_ENDIAN)
#define TG_DW_DSP 1
#else
#define TG_DW_DSP 0
#endif

#if TG_DW_DSP
/* A word of two int16 plane columns; may_alias, as the same bytes are written as int16. */
typedef uint32_t __attribute__((may_alias)) tg_dw_word_t;
#endif

/* GNU C's noinline: loops gcc -Os would spill when inlined into the row walk. */
#if defined(__GNUC__)
#define TG_DW_NOINLINE __attribute__((noinline))
#else
#define TG_DW_NOINLINE
#endif

static int32_t tg_dw_span(const tg_dwconv_params_t *p)
{
    return (p->k_h - 1) * p->dil_h + 1;
}

/* The sign-extended low half of a pack word. */
static inline int32_t tg_dw_low(int32_t word)
{
    return ((word & 0xFFFF) ^ 0x8000) - 0x8000;
}

/* Input row xr, channels [c0, c0 + nb), into nb planes (plane_w int16 apart): plane
 * column pad_left + i = x[i] - in_zp for the input columns a plane holds. The padding
 * columns are never written (zero from the start of the call). */
static TG_DW_NOINLINE void tg_dw_widen(const tg_dwconv_params_t *p, const int8_t *xr, int32_t c0, int32_t nb,
                        int16_t *planes)
{
    const int32_t pw = p->plane_w, in_c = p->in_c, zp = p->in_zp;
    const int32_t first = p->pad_left < pw ? p->pad_left : pw;
    const int32_t cols = pw - first < p->in_w ? pw - first : p->in_w;
    int32_t j = 0, i;
#if TG_DW_DSP
    int32_t q;
    const uint32_t off = (uint32_t)(uint16_t)(-zp) * 0x00010001u;
    for (; j + 4 <= nb; j += 4) {
        const int8_t *s = xr + c0 + j;
        int16_t *d = planes + j * pw + first;
        i = 0;
        if (first & 1) {  /* one pixel first, so the pairs below land on whole words */
            for (q = 0; q < 4; ++q) {
                d[q * pw] = (int16_t)(s[q] - zp);
            }
            i = 1;
        }
        if (i + 2 <= cols) {
            /* pixel pairs: bytes a0 a1 b0 b1 and a2 a3 b2 b3 (PKHBT, PKHTB), each widened
             * into the (pixel i, pixel i + 1) words of two channels (SXTAB16) */
            const int8_t *src = s + i * in_c;
            tg_dw_word_t *d0 = (tg_dw_word_t *)(void *)(d + i);
            tg_dw_word_t *d1 = (tg_dw_word_t *)(void *)(d + pw + i);
            tg_dw_word_t *d2 = (tg_dw_word_t *)(void *)(d + 2 * pw + i);
            tg_dw_word_t *d3 = (tg_dw_word_t *)(void *)(d + 3 * pw + i);
            int32_t n = (cols - i) >> 1;
            uint32_t va, vb, lo;
            i += 2 * n;
            __asm__ volatile(
                "1:\n\t"
                "ldr     %[a], [%[s]]\n\t"
                "ldr     %[b], [%[s], %[c]]\n\t"
                "add     %[s], %[s], %[c], lsl #1\n\t"
                "pkhbt   %[lo], %[a], %[b], lsl #16\n\t"
                "pkhtb   %[b], %[b], %[a], asr #16\n\t"
                "sxtab16 %[a], %[off], %[lo]\n\t"
                "str     %[a], [%[d0]], #4\n\t"
                "sxtab16 %[a], %[off], %[lo], ror #8\n\t"
                "str     %[a], [%[d1]], #4\n\t"
                "sxtab16 %[a], %[off], %[b]\n\t"
                "str     %[a], [%[d2]], #4\n\t"
                "sxtab16 %[a], %[off], %[b], ror #8\n\t"
                "str     %[a], [%[d3]], #4\n\t"
                "subs    %[n], %[n], #1\n\t"
                "bne     1b"
                : [a] "=&r"(va), [b] "=&r"(vb), [lo] "=&r"(lo), [s] "+r"(src), [n] "+r"(n),
                  [d0] "+r"(d0), [d1] "+r"(d1), [d2] "+r"(d2), [d3] "+r"(d3)
                : [c] "r"(in_c), [off] "r"(off)
                : "cc", "memory");
        }
        for (; i < cols; ++i) {
            for (q = 0; q < 4; ++q) {
                d[q * pw + i] = (int16_t)(s[i * in_c + q] - zp);
            }
        }
    }
#endif
    for (; j < nb; ++j) {
        const int8_t *s = xr + c0 + j;
        int16_t *d = planes + j * pw + first;
        for (i = 0; i < cols; ++i) {
            d[i] = (int16_t)(s[i * in_c] - zp);
        }
    }
}

/* The plane row of channel j (of the block) that kernel row ky of output row r reads. */
static const int16_t *tg_dw_tap_row(const tg_dwconv_params_t *p, const int16_t *planes,
                                    int32_t r, int32_t ky, int32_t j)
{
    const int32_t sp = tg_dw_span(p);
    const int32_t iy = r * p->stride_h - p->pad_top + ky * p->dil_h;
    if (iy < 0 || iy >= p->in_h) {
        return planes + sp * p->block * p->plane_w;  /* the zero row */
    }
    return planes + ((iy % sp) * p->block + j) * p->plane_w;
}

/* acc[ox] = the accumulator of output (r, ox) of the channel whose record is rec and whose
 * input is channel j of the block: any kernel size, stride and dilation. */
static TG_DW_NOINLINE void tg_dw_accumulate(const tg_dwconv_params_t *p, const int16_t *planes, int32_t r,
                             int32_t j, const int32_t *rec, int32_t *acc)
{
    const int32_t ow = p->out_w, sw = p->stride_w;
    const int16_t *zero = planes + tg_dw_span(p) * p->block * p->plane_w;
    int32_t ox, ky, kx;
    for (ox = 0; ox < ow; ++ox) {
        acc[ox] = rec[0];
    }
    for (ky = 0; ky < p->k_h; ++ky) {
        const int16_t *row = tg_dw_tap_row(p, planes, r, ky, j);
        if (row == zero) {
            continue;
        }
        for (kx = 0; kx < p->k_w; ++kx) {
            const int32_t w = tg_dw_low(rec[1 + ky * p->k_w + kx]);
            const int16_t *s = row + kx * p->dil_w;
            if (sw == 1) {
                for (ox = 0; ox < ow; ++ox) {
                    acc[ox] += w * s[ox];
                }
            } else {
                for (ox = 0; ox < ow; ++ox) {
                    acc[ox] += w * s[ox * sw];
                }
            }
        }
    }
}

/* Channel oc of output row yr (its elements out_c apart) from acc[0 .. out_w). */
static void tg_dw_put_row(const tg_dwconv_params_t *p, const int32_t *acc, int32_t oc,
                          const int32_t *rec, int8_t *yr)
{
    const tg_requant_t *rq = p->rq;
    const int32_t ow = p->out_w, step = p->out_c;
    int32_t ox;
    if (rq == NULL) {
        int32_t *y32 = (int32_t *)(void *)yr + oc;
        for (ox = 0; ox < ow; ++ox) {
            y32[ox * step] = acc[ox];
        }
        return;
    }
    if (rq->form == TG_RQ_FAST) {
        const int32_t rw = 1 + p->k_h * p->k_w;
        const int32_t pre = rq->pre, lo = rq->act_min, hi = rq->act_max;
        tg_rq_chan_t k;
        int8_t *y8 = yr + oc;
        k.mult = rec[rw];
        k.add = rec[rw + 1];
        k.shift = rec[rw + 2];
        for (ox = 0; ox < ow; ++ox) {
            const int32_t v = tg_rq_apply(k, (int32_t)((uint32_t)acc[ox] << pre));
            y8[ox * step] = (int8_t)(v < lo ? lo : (v > hi ? hi : v));
        }
        return;
    }
    for (ox = 0; ox < ow; ++ox) {
        yr[oc + ox * step] = tg_requant(acc[ox], rq, oc);
    }
}

#if TG_DW_DSP
/* Requantize one fast-form accumulator; full: the int8 range is the whole clamp, pre 0. */
TG_INLINE int32_t tg_dw_out(tg_rq_chan_t k, int32_t acc, int32_t pre, int32_t lo, int32_t hi,
                            int full)
{
    int32_t v;
    if (full) {
        return tg_rq_apply(k, acc);
    }
    v = tg_rq_apply(k, (int32_t)((uint32_t)acc << pre));
    return v < lo ? lo : (v > hi ? hi : v);
}

/* One output row of one channel, 3x3 taps, dil_w 1, stride_w s (1 or 2), fast requant:
 * r0..r2 are the plane rows (word pointers at column 0), y steps by ys bytes. */
TG_INLINE void tg_dw3_row(const tg_dw_word_t *r0, const tg_dw_word_t *r1,
                          const tg_dw_word_t *r2, const int32_t *rec, const tg_requant_t *rq,
                          int8_t *y, int32_t ys, int32_t ow, int32_t s, int full)
{
    const int16x2_t a0 = (int16x2_t)rec[1], b0 = (int16x2_t)rec[2];
    const int16x2_t a1 = (int16x2_t)rec[4], b1 = (int16x2_t)rec[5];
    const int16x2_t a2 = (int16x2_t)rec[7], b2 = (int16x2_t)rec[8];
    const int32_t bias = rec[0], pre = rq->pre, lo = rq->act_min, hi = rq->act_max;
    tg_rq_chan_t k;
    int32_t ox;
    k.mult = rec[10];
    k.add = rec[11];
    k.shift = rec[12];
    if (s == 1) {
        /* outputs ox, ox+1 read columns ox .. ox+3: words u = (ox, ox+1), v = (ox+2, ox+3) */
        for (ox = 0; ox + 2 <= ow; ox += 2, ++r0, ++r1, ++r2, y += 2 * ys) {
            uint32_t u = r0[0], v = r0[1];
            int32_t e = __smlad((int16x2_t)u, a0, bias);
            int32_t o = __smlatb((int32_t)u, (int32_t)a0, bias);
            e = __smlabt((int32_t)v, (int32_t)b0, e);
            o = __smlad((int16x2_t)v, b0, o);
            u = r1[0];
            v = r1[1];
            e = __smlad((int16x2_t)u, a1, e);
            o = __smlatb((int32_t)u, (int32_t)a1, o);
            e = __smlabt((int32_t)v, (int32_t)b1, e);
            o = __smlad((int16x2_t)v, b1, o);
            u = r2[0];
            v = r2[1];
            e = __smlad((int16x2_t)u, a2, e);
            o = __smlatb((int32_t)u, (int32_t)a2, o);
            e = __smlabt((int32_t)v, (int32_t)b2, e);
            o = __smlad((int16x2_t)v, b2, o);
            y[0] = (int8_t)tg_dw_out(k, e, pre, lo, hi, full);
            y[ys] = (int8_t)tg_dw_out(k, o, pre, lo, hi, full);
        }
    } else {
        /* outputs ox, ox+1 read columns 2ox .. 2ox+4: words u, v, t from column 2ox */
        for (ox = 0; ox + 2 <= ow; ox += 2, r0 += 2, r1 += 2, r2 += 2, y += 2 * ys) {
            uint32_t u = r0[0], v = r0[1], t = r0[2];
            int32_t e = __smlad((int16x2_t)u, a0, bias);
            int32_t o = __smlad((int16x2_t)v, a0, bias);
            e = __smlabt((int32_t)v, (int32_t)b0, e);
            o = __smlabt((int32_t)t, (int32_t)b0, o);
            u = r1[0];
            v = r1[1];
            t = r1[2];
            e = __smlad((int16x2_t)u, a1, e);
            o = __smlad((int16x2_t)v, a1, o);
            e = __smlabt((int32_t)v, (int32_t)b1, e);
            o = __smlabt((int32_t)t, (int32_t)b1, o);
            u = r2[0];
            v = r2[1];
            t = r2[2];
            e = __smlad((int16x2_t)u, a2, e);
            o = __smlad((int16x2_t)v, a2, o);
            e = __smlabt((int32_t)v, (int32_t)b2, e);
            o = __smlabt((int32_t)t, (int32_t)b2, o);
            y[0] = (int8_t)tg_dw_out(k, e, pre, lo, hi, full);
            y[ys] = (int8_t)tg_dw_out(k, o, pre, lo, hi, full);
        }
    }
    if (ox < ow) {  /* a lone last output: columns s*ox .. s*ox+2 */
        int32_t e = __smlad((int16x2_t)r0[0], a0, bias);
        e = __smlabt((int32_t)r0[1], (int32_t)b0, e);
        e = __smlad((int16x2_t)r1[0], a1, e);
        e = __smlabt((int32_t)r1[1], (int32_t)b1, e);
        e = __smlad((int16x2_t)r2[0], a2, e);
        e = __smlabt((int32_t)r2[1], (int32_t)b2, e);
        y[0] = (int8_t)tg_dw_out(k, e, pre, lo, hi, full);
    }
}

/* What the assembly routines read and advance (offsets 0..40 on 32-bit Arm). */
typedef struct {
    const tg_dw_word_t *row[3];  /* the three plane rows of the channel, at column 0 */
    int32_t step[3];             /* bytes to the next channel's rows (0: the zero row) */
    const int32_t *rec;          /* the channel's record in the pack */
    int8_t *y;                   /* its output 0 of the row */
    int32_t ys;                  /* bytes from one output to the next (out_c) */
    int32_t pairs;               /* output pairs per channel, >= 1 */
    int32_t channels;            /* channels left, >= 1 */
} tg_dw3_job_t;

void tg_dw3_dsp_s1(const tg_dw3_job_t *job);
void tg_dw3_dsp_s2(const tg_dw3_job_t *job);

/* Output pairs of one row, fast requant without pre-shift or clamp beyond int8. Registers:
 * r0, r1 the two sums, r2, r3 plane words, r4, r5 one kernel row's weight pairs
 * ((w0, w1), (w1, w2)), r6-r8 the plane rows, r9 the record (bias at 0, pairs at 4, 16,
 * 28, mult/add/r at 40), r10 y, r11 its step, r12 pairs left, lr the bias; [sp] the job,
 * whose rows, record and y move on to the next channel after each row.
 * Stride 1, outputs ox, ox+1, u = columns (ox, ox+1), v = (ox+2, ox+3):
 *   e += u.(w0,w1) + v.lo*w2   (SMLAD, SMLABT)   o += u.hi*w0 + v.(w1,w2)   (SMLATB, SMLAD)
 * Stride 2, outputs ox, ox+1, u, v, t = columns from 2ox:
 *   e += u.(w0,w1) + v.lo*w2   o += v.(w0,w1) + t.lo*w2 */
__asm__(
    ".syntax unified\n"
    ".macro tg_dw3_rows2 ptr, off\n"       /* one kernel row, stride 1 */
    "    ldrd    r4, r5, [r9, #\\off]\n"
    "    ldr     r2, [\\ptr], #4\n"
    "    ldr     r3, [\\ptr]\n"
    "    smlad   r0, r2, r4, r0\n"
    "    smlatb  r1, r2, r4, r1\n"
    "    smlabt  r0, r3, r5, r0\n"
    "    smlad   r1, r3, r5, r1\n"
    ".endm\n"
    ".macro tg_dw3_rows2s ptr, off\n"      /* one kernel row, stride 2 */
    "    ldrd    r4, r5, [r9, #\\off]\n"
    "    ldr     r2, [\\ptr], #8\n"
    "    ldr     r3, [\\ptr, #-4]\n"
    "    smlad   r0, r2, r4, r0\n"
    "    smlad   r1, r3, r4, r1\n"
    "    smlabt  r0, r3, r5, r0\n"
    "    ldr     r2, [\\ptr]\n"
    "    smlabt  r1, r2, r5, r1\n"
    ".endm\n"
    ".macro tg_dw3_dsp name, row\n"
    ".pushsection .text.\\name,\"ax\",%progbits\n"
    ".balign 4\n"
    ".type \\name, %function\n"
    ".thumb\n"
    ".thumb_func\n"
    "\\name:\n"
    "    push    {r0, r4-r11, lr}\n"
    "0:  ldr     r0, [sp]\n"
    "    ldmia   r0, {r6-r8}\n"
    "    ldr     r9, [r0, #24]\n"
    "    ldr     r10, [r0, #28]\n"
    "    ldr     r11, [r0, #32]\n"
    "    ldr     r12, [r0, #36]\n"
    "    ldr     lr, [r9]\n"
    "1:  mov     r0, lr\n"
    "    mov     r1, lr\n"
    "    \\row   r6, 4\n"
    "    \\row   r7, 16\n"
    "    \\row   r8, 28\n"
    "    ldrd    r2, r3, [r9, #40]\n"
    "    ldr     r4, [r9, #48]\n"
    "    smmla   r0, r0, r2, r3\n"
    "    asr     r0, r0, r4\n"
    "    ssat    r0, #8, r0\n"
    "    smmla   r1, r1, r2, r3\n"
    "    asr     r1, r1, r4\n"
    "    ssat    r1, #8, r1\n"
    "    strb    r0, [r10]\n"
    "    strb    r1, [r10, r11]\n"
    "    add     r10, r10, r11, lsl #1\n"
    "    subs    r12, r12, #1\n"
    "    bne     1b\n"
    "    ldr     r0, [sp]\n"
    "    ldmia   r0, {r1-r8}\n"
    "    add     r1, r1, r4\n"
    "    add     r2, r2, r5\n"
    "    add     r3, r3, r6\n"
    "    add     r7, r7, #52\n"
    "    add     r8, r8, #1\n"
    "    stmia   r0, {r1-r3}\n"
    "    strd    r7, r8, [r0, #24]\n"
    "    ldr     r1, [r0, #40]\n"
    "    subs    r1, r1, #1\n"
    "    str     r1, [r0, #40]\n"
    "    bne     0b\n"
    "    pop     {r0, r4-r11, pc}\n"
    ".size \\name, .-\\name\n"
    ".popsection\n"
    ".endm\n"
    "tg_dw3_dsp tg_dw3_dsp_s1, tg_dw3_rows2\n"
    "tg_dw3_dsp tg_dw3_dsp_s2, tg_dw3_rows2s\n"
    ".purgem tg_dw3_dsp\n"
    ".purgem tg_dw3_rows2\n"
    ".purgem tg_dw3_rows2s\n");

/* Output row r of the block's channels [c0, c0 + nb) (multiplier 1) into row yr: the
 * output pairs in assembly when the requantization is the plain fast form, the rest (a
 * lone last output, or every output under a pre-shift or a narrower clamp) in C. Channel
 * j's plane rows are j*plane_w on from channel 0's; the zero row serves every channel. */
static TG_DW_NOINLINE void tg_dw3_block(const tg_dwconv_params_t *p, const int16_t *planes,
                                        int32_t r, int32_t c0, int32_t nb, int8_t *yr)
{
    const tg_requant_t *rq = p->rq;
    const int16_t *zero = planes + tg_dw_span(p) * p->block * p->plane_w;
    const int32_t rw = 1 + 9 + 3, ow = p->out_w, s = p->stride_w, ys = p->out_c;
    const int plain = rq->pre == 0 && rq->act_min == -128 && rq->act_max == 127;
    const int32_t done = plain ? ow & ~1 : 0, skip = done / 2 * s;
    const tg_dw_word_t *rows[3];
    int32_t j, k;
    tg_dw3_job_t job;
    for (k = 0; k < 3; ++k) {
        const int16_t *row = tg_dw_tap_row(p, planes, r, k, 0);
        rows[k] = (const tg_dw_word_t *)(const void *)row;
        job.row[k] = rows[k];
        job.step[k] = row == zero ? 0 : 2 * p->plane_w;  /* bytes */
    }
    if (done != 0) {  /* every channel's output pairs */
        job.rec = p->pack + c0 * rw;
        job.y = yr + c0;
        job.ys = ys;
        job.pairs = ow >> 1;
        job.channels = nb;
        if (s == 1) {
            tg_dw3_dsp_s1(&job);
        } else {
            tg_dw3_dsp_s2(&job);
        }
    }
    if (done == ow) {
        return;
    }
    for (j = 0; j < nb; ++j) {
        const int32_t *rec = p->pack + (c0 + j) * rw;
        const tg_dw_word_t *q[3];
        for (k = 0; k < 3; ++k) {
            q[k] = rows[k] + skip + (job.step[k] ? j * p->plane_w / 2 : 0);
        }
        tg_dw3_row(q[0], q[1], q[2], rec, rq, yr + c0 + j + done * ys, ys, ow - done, s, 0);
    }
}
#endif

void tg_dwconv(const tg_dwconv_params_t *p, const int8_t *x, void *y, void *scratch,
               int32_t row0, int32_t row1)
{
    const int32_t sp = tg_dw_span(p), pw = p->plane_w, block = p->block;
    const int32_t multiplier = p->out_c / p->in_c, rw = 1 + p->k_h * p->k_w + 3;
    const int32_t e = p->rq != NULL ? 1 : 4;  /* output element bytes */
    const int32_t x_row = p->in_w * p->in_c, y_row = p->out_w * p->out_c * e;
    const int32_t images = row0 == 0 && row1 == p->out_h ? p->n : 1;
    int16_t *planes = (int16_t *)scratch;
    int32_t *acc = (int32_t *)(void *)(planes + (sp * block + 1) * pw);
#if TG_DW_DSP
    const int fused = p->rq != NULL && p->rq->form == TG_RQ_FAST && p->k_h == 3
                      && p->k_w == 3 && p->dil_w == 1 && (p->stride_w == 1 || p->stride_w == 2)
                      && multiplier == 1;
#endif
    int32_t c0, b, r, j, m;
    memset(planes, 0, (size_t)(2 * pw * (sp * block + 1)));  /* padding columns, zero row */
    for (c0 = 0; c0 < p->in_c; c0 += block) {
        const int32_t nb = p->in_c - c0 < block ? p->in_c - c0 : block;
        for (b = 0; b < images; ++b) {
            const int8_t *xb = x + b * p->in_h * x_row;
            int8_t *yb = (int8_t *)y + b * p->out_h * y_row;
            int32_t next = 0;  /* input rows below next are widened (or not needed again) */
            for (r = row0; r < row1; ++r) {
                const int32_t top = r * p->stride_h - p->pad_top;
                const int32_t end = top + sp < p->in_h ? top + sp : p->in_h;
                int8_t *yr = yb + (p->y_ring ? r % p->y_ring : r) * y_row;
                int32_t iy = top > next ? top : next;
                for (iy = iy > 0 ? iy : 0; iy < end; ++iy) {
                    tg_dw_widen(p, xb + (p->x_ring ? iy % p->x_ring : iy) * x_row, c0, nb,
                                planes + (iy % sp) * block * pw);
                }
                next = iy > next ? iy : next;
#if TG_DW_DSP
                if (fused) {
                    tg_dw3_block(p, planes, r, c0, nb, yr);
                    continue;
                }
#endif
                for (j = 0; j < nb; ++j) {
                    for (m = 0; m < multiplier; ++m) {
                        const int32_t oc = (c0 + j) * multiplier + m;
                        const int32_t *rec = p->pack + oc * rw;
                        tg_dw_accumulate(p, planes, r, j, rec, acc);
                        tg_dw_put_row(p, acc, oc, rec, yr);
                    }
                }
            }
        }
    }
}
