/* tg_fw_counter.h - instruction counting on QEMU's MPS2 boards via the CMSDK dual timer.
 *
 * Contract: tg_fw_counter_start() starts both halves of the dual timer free-running at
 * 32 bits (fine = /1, coarse = /256; both count down). tg_fw_open() and tg_fw_close()
 * read them at the start and the end of a measured stretch. Under `-icount shift=S`
 * every instruction advances virtual time by 2^S ns, so the difference of fine readings
 * is the instructions in between times 2^S / timer period; tg_fw_elapsed() turns two
 * stamps into that instruction count, exactly. Build with -DTG_FW_TICK_NS=<fine tick in
 * ns> -DTG_FW_ICOUNT_SHIFT=<S> (target.py does).
 */
#ifndef TG_FW_COUNTER_H
#define TG_FW_COUNTER_H

#include <stdint.h>

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

typedef struct {
    uint32_t fine;
    uint32_t coarse;
} tg_fw_stamp_t;

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

#if !defined(TG_FW_TICK_NS) || !defined(TG_FW_ICOUNT_SHIFT)
#error "build with -DTG_FW_TICK_NS=<timer period, ns> -DTG_FW_ICOUNT_SHIFT=<qemu -icount shift>"
#endif
#if (TG_FW_TICK_NS * 2) >= (1 << TG_FW_ICOUNT_SHIFT)
#error "TG_FW_ICOUNT_SHIFT too small: a timer tick must be under half an instruction's time"
#endif

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
    return (fine * TG_FW_TICK_NS + (1u << (TG_FW_ICOUNT_SHIFT - 1))) >> TG_FW_ICOUNT_SHIFT;
}

#endif /* TG_FW_COUNTER_H */
