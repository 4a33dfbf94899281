/* tg_fw_counter.h - instruction counting under QEMU's -icount, one way per board family.
 *
 * Contract: tg_fw_counter_start() starts the counters; tg_fw_open() and tg_fw_close()
 * read them at the start and the end of a measured stretch, each as a fixed sequence of
 * instructions in assembly (so what they add to a stretch does not depend on the
 * compiler, and the firmware's calibration removes it); tg_fw_elapsed() turns two stamps
 * into the exact count of instructions in between. Under `-icount shift=S` every
 * instruction advances virtual time by 2^S ns.
 *   MPS2 boards (Arm): the CMSDK dual timer, both halves free-running at 32 bits (fine
 *     = /1, coarse = /256; both count down).
 *   micro:bit (nRF51, Cortex-M0): TIMER0 as the fine counter (16 MHz / 2, 125 ns) and
 *     TIMER1 as the coarse one (16 MHz / 512, 256 fine ticks), both counting up at 32
 *     bits, read through their CAPTURE tasks; stored negated so they read as down-counters.
 *   RISC-V: the minstret/minstreth CSRs, which QEMU derives from virtual time in ns under
 *     -icount (so a "tick" is 1 ns); both halves are read around the low word, and
 *     tg_fw_elapsed() picks the high word that belongs to it.
 *   AN547 (Cortex-M55): the SSE-300 system counter, 64 bits at 32 MHz (31.25 ns), read
 *     the same way as minstret.
 * Build with -DTG_FW_TICK_NS=<fine tick in ns> -DTG_FW_ICOUNT_SHIFT=<S> (target.py does).
 */
#ifndef TG_FW_COUNTER_H
#define TG_FW_COUNTER_H

#include <stdint.h>

#if !defined(TG_FW_TICK_NS) || !defined(TG_FW_ICOUNT_SHIFT)
#error "build with -DTG_FW_TICK_NS=<timer period, ns> -DTG_FW_ICOUNT_SHIFT=<qemu -icount shift>"
#endif
/* The tick is TG_FW_TICK_NS / 2^TG_FW_TICK_LOG2_DEN ns (31.25 = 125 / 4 on the AN547). */
#ifndef TG_FW_TICK_LOG2_DEN
#define TG_FW_TICK_LOG2_DEN 0
#endif
#define TG_FW_TO_INSTR_SHIFT (TG_FW_ICOUNT_SHIFT + TG_FW_TICK_LOG2_DEN)
#if (TG_FW_TICK_NS * 2) >= (1 << TG_FW_TO_INSTR_SHIFT)
#error "TG_FW_ICOUNT_SHIFT too small: a timer tick must be under half an instruction's time"
#endif

/* ticks * tick / 2^TG_FW_ICOUNT_SHIFT, rounded, with 32-bit multiplies only (Armv6-M has
 * no long multiply; a 64-bit product would call a library helper). */
static inline uint64_t tg_fw_ticks_to_instructions(uint64_t ticks)
{
    const uint32_t lo = (uint32_t)ticks;
    const uint64_t hi_part = (uint64_t)((uint32_t)(ticks >> 32) * (uint32_t)TG_FW_TICK_NS) << 32;
    const uint64_t lo_part = ((uint64_t)((lo >> 16) * (uint32_t)TG_FW_TICK_NS) << 16)
                             + (uint64_t)((lo & 0xFFFFu) * (uint32_t)TG_FW_TICK_NS);
    return (hi_part + lo_part + (1u << (TG_FW_TO_INSTR_SHIFT - 1))) >> TG_FW_TO_INSTR_SHIFT;
}

#if defined(__riscv) || defined(TG_FW_BOARD_AN547)
/* One 64-bit counter, read as high, low, high word. */

typedef struct {
    uint32_t hi_before;
    uint32_t lo;
    uint32_t hi_after;
} tg_fw_stamp_t;

#if defined(TG_FW_BOARD_AN547)
/* SSE-300 system counter (secure alias): CNTCR at +0 (bit 0 enables), CNTCV at +8/+12. */
#define TG_FW_SYSCNT_BASE 0x58100000u

static inline void tg_fw_counter_start(void)
{
    *(volatile uint32_t *)TG_FW_SYSCNT_BASE = 1u;
}

/* After the low-word read in tg_fw_open come exactly four instructions (ldr, str x3);
 * before the one in tg_fw_close exactly three (movw, movt, ldr). */
#define TG_FW_SYSCNT_ASM \
    "movw %[b], #0x0008\n\t" \
    "movt %[b], #0x5810\n\t" \
    "ldr %[hi0], [%[b], #4]\n\t" \
    "ldr %[lo], [%[b]]\n\t" \
    "ldr %[hi1], [%[b], #4]\n\t"

static inline __attribute__((always_inline)) void tg_fw_open(tg_fw_stamp_t *out)
{
    uint32_t b;
    uint32_t hi0;
    uint32_t lo;
    uint32_t hi1;
    __asm__ volatile(TG_FW_SYSCNT_ASM
                     "str %[hi0], [%[out]]\n\t"
                     "str %[lo], [%[out], #4]\n\t"
                     "str %[hi1], [%[out], #8]"
                     : [b] "=&r"(b), [hi0] "=&r"(hi0), [lo] "=&r"(lo), [hi1] "=&r"(hi1)
                     : [out] "r"(out)
                     : "memory");
}

static inline __attribute__((always_inline)) void tg_fw_close(tg_fw_stamp_t *out)
{
    uint32_t b;
    uint32_t hi0;
    uint32_t lo;
    uint32_t hi1;
    __asm__ volatile(TG_FW_SYSCNT_ASM
                     : [b] "=&r"(b), [hi0] "=&r"(hi0), [lo] "=&r"(lo), [hi1] "=&r"(hi1)
                     :
                     : "memory");
    out->hi_before = hi0;
    out->lo = lo;
    out->hi_after = hi1;
}

#else /* RISC-V */

static inline void tg_fw_counter_start(void)
{
}

/* After the low-word read in tg_fw_open come exactly four instructions (csrr, sw x3 ...
 * in the order below); before the one in tg_fw_close exactly one (csrr). */
static inline __attribute__((always_inline)) void tg_fw_open(tg_fw_stamp_t *out)
{
    uint32_t hi0;
    uint32_t lo;
    uint32_t hi1;
    __asm__ volatile(".option push\n\t.option arch, +zicsr\n\t"
                     "csrr %[hi0], minstreth\n\t"
                     "csrr %[lo], minstret\n\t"
                     "csrr %[hi1], minstreth\n\t"
                     "sw %[hi0], 0(%[out])\n\t"
                     "sw %[lo], 4(%[out])\n\t"
                     "sw %[hi1], 8(%[out])\n\t"
                     ".option pop"
                     : [hi0] "=&r"(hi0), [lo] "=&r"(lo), [hi1] "=&r"(hi1)
                     : [out] "r"(out)
                     : "memory");
}

static inline __attribute__((always_inline)) void tg_fw_close(tg_fw_stamp_t *out)
{
    uint32_t hi0;
    uint32_t lo;
    uint32_t hi1;
    __asm__ volatile(".option push\n\t.option arch, +zicsr\n\t"
                     "csrr %[hi0], minstreth\n\t"
                     "csrr %[lo], minstret\n\t"
                     "csrr %[hi1], minstreth\n\t"
                     ".option pop"
                     : [hi0] "=&r"(hi0), [lo] "=&r"(lo), [hi1] "=&r"(hi1)
                     :
                     : "memory");
    out->hi_before = hi0;
    out->lo = lo;
    out->hi_after = hi1;
}

#endif /* AN547 / RISC-V */

/* The 64-bit reading of a stamp: when the high word changed between its two reads, the
 * carry came before the low read if the low word is small (it had just wrapped). */
static inline uint64_t tg_fw_stamp_value(const tg_fw_stamp_t *s)
{
    const uint32_t hi = (s->hi_before == s->hi_after || s->lo >= 0x80000000u)
                        ? s->hi_before : s->hi_after;
    return ((uint64_t)hi << 32) | s->lo;
}

static inline uint64_t tg_fw_elapsed(const tg_fw_stamp_t *from, const tg_fw_stamp_t *to,
                                     uint32_t *disagree)
{
    const uint64_t ns = tg_fw_stamp_value(to) - tg_fw_stamp_value(from);
    (void)disagree;   /* one counter: nothing to cross-check */
    return tg_fw_ticks_to_instructions(ns);
}

#else /* Arm, 32-bit timers */

typedef struct {
    uint32_t fine;
    uint32_t coarse;
} tg_fw_stamp_t;

#if defined(TG_FW_BOARD_MICROBIT)

/* nRF51 TIMER0 (fine) and TIMER1 (coarse), registers from the nRF51 reference manual. */
#define TG_FW_TIMER(n, offset) (*(volatile uint32_t *)(0x40008000u + 0x1000u * (n) + (offset)))
#define TG_FW_TASK_START 0x000u
#define TG_FW_TASK_STOP 0x004u
#define TG_FW_TASK_CLEAR 0x00Cu
#define TG_FW_MODE 0x504u          /* 0: timer */
#define TG_FW_BITMODE 0x508u       /* 3: 32 bits */
#define TG_FW_PRESCALER 0x510u     /* f = 16 MHz / 2^prescaler */

static inline void tg_fw_counter_start(void)
{
    static const uint32_t prescaler[2] = {1u, 9u};
    uint32_t n;
    for (n = 0; n < 2u; ++n) {
        TG_FW_TIMER(n, TG_FW_TASK_STOP) = 1u;
        TG_FW_TIMER(n, TG_FW_MODE) = 0u;
        TG_FW_TIMER(n, TG_FW_BITMODE) = 3u;
        TG_FW_TIMER(n, TG_FW_PRESCALER) = prescaler[n];
        TG_FW_TIMER(n, TG_FW_TASK_CLEAR) = 1u;
    }
    TG_FW_TIMER(0u, TG_FW_TASK_START) = 1u;
    TG_FW_TIMER(1u, TG_FW_TASK_START) = 1u;
}

/* Thumb-1 only. The reading is the store to TASKS_CAPTURE[0] (offset 0x40); CC[0] (0x540)
 * then holds the count. Built from movs/lsls/adds, so each sequence has a fixed length.
 * Outputs use low registers, as Thumb-1 data processing needs; gcc hands Thumb-1 inline
 * assembly over in divided syntax, hence the .syntax unified. */
#define TG_FW_CAPTURE_ASM \
    ".syntax unified\n\t" \
    "movs %[b], #0x40\n\t" "lsls %[b], %[b], #24\n\t" \
    "movs %[t], #0x80\n\t" "lsls %[t], %[t], #8\n\t" \
    "adds %[b], %[b], %[t]\n\t" \
    "movs %[f], #1\n\t" \
    "str %[f], [%[b], #0x40]\n\t" \
    "movs %[t], #0x10\n\t" "lsls %[t], %[t], #8\n\t" \
    "adds %[t], %[b], %[t]\n\t" \
    "str %[f], [%[t], #0x40]\n\t" \
    "movs %[c], #0x54\n\t" "lsls %[c], %[c], #4\n\t" \
    "ldr %[f], [%[b], %[c]]\n\t" \
    "ldr %[c], [%[t], %[c]]\n\t" \
    "negs %[f], %[f]\n\t" \
    "negs %[c], %[c]\n\t"

static inline __attribute__((always_inline)) void tg_fw_open(tg_fw_stamp_t *out)
{
    uint32_t b;
    uint32_t t;
    uint32_t f;
    uint32_t c;
    __asm__ volatile(TG_FW_CAPTURE_ASM
                     "str %[f], [%[out]]\n\t"
                     "str %[c], [%[out], #4]"
                     : [b] "=&l"(b), [t] "=&l"(t), [f] "=&l"(f), [c] "=&l"(c)
                     : [out] "l"(out)
                     : "memory");
}

static inline __attribute__((always_inline)) void tg_fw_close(tg_fw_stamp_t *out)
{
    uint32_t b;
    uint32_t t;
    uint32_t f;
    uint32_t c;
    __asm__ volatile(TG_FW_CAPTURE_ASM
                     : [b] "=&l"(b), [t] "=&l"(t), [f] "=&l"(f), [c] "=&l"(c)
                     :
                     : "memory");
    out->fine = f;
    out->coarse = c;
}

#else /* MPS2: CMSDK dual timer */

/* The dual timer sits at 0x40002000 on AN385/AN386/AN500; on the AN505 (which boots in
 * the secure state) its secure alias is at 0x50002000. */
#if defined(TG_FW_BOARD_AN505)
#define TG_FW_DUALTIMER_BASE 0x50002000u
#define TG_FW_DUALTIMER_HI16 "0x5000"
#else
#define TG_FW_DUALTIMER_BASE 0x40002000u
#define TG_FW_DUALTIMER_HI16 "0x4000"
#endif
#define TG_FW_DUALTIMER_LO16 "0x2000"

#define TG_FW_REG(offset) (*(volatile uint32_t *)(TG_FW_DUALTIMER_BASE + (offset)))
#define TG_FW_FINE_LOAD TG_FW_REG(0x00u)
#define TG_FW_FINE_VALUE TG_FW_REG(0x04u)
#define TG_FW_FINE_CONTROL TG_FW_REG(0x08u)
#define TG_FW_COARSE_LOAD TG_FW_REG(0x20u)
#define TG_FW_COARSE_VALUE TG_FW_REG(0x24u)
#define TG_FW_COARSE_CONTROL TG_FW_REG(0x28u)

/* CONTROL: bit 7 enable, bit 6 periodic (0 = free-running), bits 3:2 prescale
 * (0 = /1, 2 = /256), bit 1 32-bit counter. Interrupts stay off. */
#define TG_FW_CONTROL_FINE 0x82u
#define TG_FW_CONTROL_COARSE 0x8Au

static inline void tg_fw_counter_start(void)
{
    TG_FW_FINE_CONTROL = 0u;
    TG_FW_COARSE_CONTROL = 0u;
    TG_FW_FINE_CONTROL = 0x02u;   /* 32-bit first, so the load below is not truncated */
    TG_FW_COARSE_CONTROL = 0x0Au;
    TG_FW_FINE_LOAD = 0xFFFFFFFFu;
    TG_FW_COARSE_LOAD = 0xFFFFFFFFu;
    TG_FW_FINE_CONTROL = TG_FW_CONTROL_FINE;
    TG_FW_COARSE_CONTROL = TG_FW_CONTROL_COARSE;
}

#if defined(__ARM_ARCH_6M__)
/* Thumb-1 (Armv6-M on the AN385): the base 0x40002000 from movs/lsls/adds, then the
 * two loads; after the fine read in tg_fw_open come exactly three instructions (ldr,
 * str, str), before the one in tg_fw_close exactly five. */
#define TG_FW_DUALTIMER_ASM \
    ".syntax unified\n\t" \
    "movs %[base], #0x40\n\t" "lsls %[base], %[base], #24\n\t" \
    "movs %[fine], #0x20\n\t" "lsls %[fine], %[fine], #8\n\t" \
    "adds %[base], %[base], %[fine]\n\t" \
    "ldr %[fine], [%[base], #4]\n\t" \
    "ldr %[coarse], [%[base], #0x24]\n\t"

static inline __attribute__((always_inline)) void tg_fw_open(tg_fw_stamp_t *out)
{
    uint32_t base;
    uint32_t fine;
    uint32_t coarse;
    __asm__ volatile(TG_FW_DUALTIMER_ASM
                     "str %[fine], [%[out]]\n\t"
                     "str %[coarse], [%[out], #4]"
                     : [base] "=&l"(base), [fine] "=&l"(fine), [coarse] "=&l"(coarse)
                     : [out] "l"(out)
                     : "memory");
}

static inline __attribute__((always_inline)) void tg_fw_close(tg_fw_stamp_t *out)
{
    uint32_t base;
    uint32_t fine;
    uint32_t coarse;
    __asm__ volatile(TG_FW_DUALTIMER_ASM
                     : [base] "=&l"(base), [fine] "=&l"(fine), [coarse] "=&l"(coarse)
                     :
                     : "memory");
    out->fine = fine;
    out->coarse = coarse;
}
#else
/* The two readings are fixed instruction sequences in assembly, so what they add to a
 * measured stretch does not depend on the compiler: after the fine read in tg_fw_open
 * come exactly two instructions (ldr, strd), before the one in tg_fw_close exactly two
 * (movw, movt). The "memory" clobbers keep the measured work from moving across. */
static inline __attribute__((always_inline)) void tg_fw_open(tg_fw_stamp_t *out)
{
    uint32_t base;
    uint32_t fine;
    uint32_t coarse;
    __asm__ volatile("movw %[base], #" TG_FW_DUALTIMER_LO16 "\n\t"
                     "movt %[base], #" TG_FW_DUALTIMER_HI16 "\n\t"
                     "ldr %[fine], [%[base], #4]\n\t"
                     "ldr %[coarse], [%[base], #0x24]\n\t"
                     "strd %[fine], %[coarse], [%[out]]"
                     : [base] "=&r"(base), [fine] "=&r"(fine), [coarse] "=&r"(coarse)
                     : [out] "r"(out)
                     : "memory");
}

static inline __attribute__((always_inline)) void tg_fw_close(tg_fw_stamp_t *out)
{
    uint32_t base;
    uint32_t fine;
    uint32_t coarse;
    __asm__ volatile("movw %[base], #" TG_FW_DUALTIMER_LO16 "\n\t"
                     "movt %[base], #" TG_FW_DUALTIMER_HI16 "\n\t"
                     "ldr %[fine], [%[base], #4]\n\t"
                     "ldr %[coarse], [%[base], #0x24]"
                     : [base] "=&r"(base), [fine] "=&r"(fine), [coarse] "=&r"(coarse)
                     :
                     : "memory");
    out->fine = fine;
    out->coarse = coarse;
}

#endif /* __ARM_ARCH_6M__ */

#endif /* board */

/* Instructions executed from the fine reading of `from` to the fine reading of `to`.
 * The fine count wraps every 2^32 ticks; the coarse count (256 fine ticks each) tells
 * how many times. A reading is at most one tick off, and a tick is shorter than half
 * an instruction (2^S ns per instruction), so rounding recovers the exact count.
 * *disagree is incremented when the two timers do not tell the same story. */
static inline uint64_t tg_fw_elapsed(const tg_fw_stamp_t *from, const tg_fw_stamp_t *to,
                                     uint32_t *disagree)
{
    uint32_t fine_ticks = from->fine - to->fine;          /* down-counters */
    uint32_t coarse_ticks = from->coarse - to->coarse;
    uint64_t coarse_in_fine = (uint64_t)coarse_ticks << 8;
    uint64_t wraps = (coarse_in_fine + 0x80000000u - fine_ticks) >> 32;
    uint64_t fine = (wraps << 32) + fine_ticks;
    uint64_t gap = fine > coarse_in_fine ? fine - coarse_in_fine : coarse_in_fine - fine;
    if (gap > 512u) {
        *disagree += 1u;
    }
    return tg_fw_ticks_to_instructions(fine);
}

#endif /* Arm */

#endif /* TG_FW_COUNTER_H */
