/* tg_fw_startup.c - reset and fault handling for the measurement firmware.
 *
 * Contract: the reset handler enables the FPU on hard-float builds, copies .data,
 * zeroes .bss, calls main() and exits the emulator with main's return value. Any
 * fault prints one "TGFW FAULT" line and exits with status TG_FW_FAULT_STATUS.
 * The initial stack pointer is the first word of .vectors (set in the linker script).
 * Arm only (Armv6-M, Armv7-M, Armv8-M); RISC-V boards use tg_fw_rv_startup.c.
 */
#include <stdint.h>

#include "tg_fw_semihost.h"

#define TG_FW_FAULT_STATUS 250u

#define TG_FW_SCB_CPACR (*(volatile uint32_t *)0xE000ED88u)
#define TG_FW_SCB_CFSR (*(volatile uint32_t *)0xE000ED28u)
#define TG_FW_SCB_HFSR (*(volatile uint32_t *)0xE000ED2Cu)

/* Symbols from tg_fw_sections.ld. */
extern uint32_t tg_fw_data_load[];
extern uint32_t tg_fw_data_start[];
extern uint32_t tg_fw_data_end[];
extern uint32_t tg_fw_bss_start[];
extern uint32_t tg_fw_bss_end[];
extern uint32_t tg_fw_stack_bottom[];

int main(void);
void tg_fw_reset(void) __attribute__((noreturn));
void tg_fw_fault(void) __attribute__((naked));
void tg_fw_fault_report(const uint32_t *frame) __attribute__((noreturn, used));

typedef void (*tg_fw_handler_t)(void);

/* Exception vectors 1..15; vector 0 (initial SP) is emitted by the linker script. */
__attribute__((section(".tg_fw_vectors"), used))
static const tg_fw_handler_t tg_fw_vectors[15] = {
    tg_fw_reset, tg_fw_fault, tg_fw_fault, tg_fw_fault, tg_fw_fault,
    tg_fw_fault, tg_fw_fault, tg_fw_fault, tg_fw_fault, tg_fw_fault,
    tg_fw_fault, tg_fw_fault, tg_fw_fault, tg_fw_fault, tg_fw_fault,
};

static void tg_fw_enable_fpu(void)
{
#if defined(__ARM_FP)
    /* CP10 and CP11 full access; required before the first floating-point instruction. */
    TG_FW_SCB_CPACR |= 0xFu << 20;
    __asm__ volatile("dsb\n\tisb" ::: "memory");
#endif
}

static void tg_fw_limit_stack(void)
{
#if defined(__ARM_ARCH_8M_MAIN__) || defined(__ARM_ARCH_8_1M_MAIN__)
    /* Armv8-M: overflowing the stack region faults instead of corrupting memory. */
    __asm__ volatile("msr msplim, %0" : : "r"(tg_fw_stack_bottom));
#endif
}

void tg_fw_reset(void)
{
    volatile uint32_t *dst;
    const volatile uint32_t *src = tg_fw_data_load;

    tg_fw_enable_fpu();
    tg_fw_limit_stack();
    /* volatile pointers keep gcc from turning the loops into memcpy/memset calls */
    for (dst = tg_fw_data_start; dst < tg_fw_data_end; ++dst) {
        *dst = *src++;
    }
    for (dst = tg_fw_bss_start; dst < tg_fw_bss_end; ++dst) {
        *dst = 0u;
    }
    tg_fw_exit((uint32_t)main() & 0xFFu);
}

/* Hand the exception frame to the reporter, which runs on a fresh stack: the fault may
 * have been a stack overflow. */
void tg_fw_fault(void)
{
#if defined(__ARM_ARCH_6M__)
    /* Thumb-1: no movw/movt, and B reaches only 2 KiB; literals and BX instead. */
    __asm__ volatile("mrs r0, msp\n\t"
                     "ldr r1, =tg_fw_stack_top\n\t"
                     "mov sp, r1\n\t"
                     "ldr r1, =tg_fw_fault_report\n\t"
                     "bx r1\n\t"
                     ".ltorg");
#else
    __asm__ volatile("mrs r0, msp\n\t"
                     "movw r1, #:lower16:tg_fw_stack_top\n\t"
                     "movt r1, #:upper16:tg_fw_stack_top\n\t"
                     "mov sp, r1\n\t"
                     "b tg_fw_fault_report");
#endif
}

void tg_fw_fault_report(const uint32_t *frame)
{
    tg_fw_line_t line;
    uint32_t ipsr;
    __asm__ volatile("mrs %0, ipsr" : "=r"(ipsr));
    tg_fw_line_start(&line, "TGFW FAULT");
    tg_fw_line_hex32(&line, ipsr & 0x1FFu);
    tg_fw_line_hex32(&line, frame[6]);          /* stacked PC */
#if defined(__ARM_ARCH_6M__)
    /* Armv6-M has no fault status registers (reading them would fault again). */
    tg_fw_line_hex32(&line, 0u);
    tg_fw_line_hex32(&line, 0u);
#else
    tg_fw_line_hex32(&line, TG_FW_SCB_CFSR);
    tg_fw_line_hex32(&line, TG_FW_SCB_HFSR);
#endif
    tg_fw_line_end(&line);
    tg_fw_exit(TG_FW_FAULT_STATUS);
}
