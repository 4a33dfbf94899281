/* tg_fw_rv_startup.c - reset and trap handling for the measurement firmware on 32-bit
 * RISC-V (QEMU virt, machine mode, one hart).
 *
 * Contract: tg_fw_entry is the first word of the image (tg_fw_rv_virt.ld puts it at the
 * start of RAM, where QEMU's reset code jumps with -bios none). It sets the stack pointer
 * and the trap vector, then tg_fw_reset copies .data, zeroes .bss, calls main() and
 * exits the emulator with main's return value. Any trap prints one "TGFW FAULT" line
 * (mcause, mepc, mtval, 0) and exits with status TG_FW_FAULT_STATUS.
 */
#include <stdint.h>

#include "tg_fw_semihost.h"

#define TG_FW_FAULT_STATUS 250u

/* Symbols from tg_fw_rv_virt.ld. */
extern uint32_t tg_fw_data_load[];
extern uint32_t tg_fw_data_start[];
extern uint32_t tg_fw_data_end[];
extern uint32_t tg_fw_bss_start[];
extern uint32_t tg_fw_bss_end[];

int main(void);
void tg_fw_entry(void) __attribute__((naked, section(".tg_fw_entry")));
void tg_fw_reset(void) __attribute__((noreturn, used));
void tg_fw_trap(void) __attribute__((naked, aligned(4)));
void tg_fw_trap_report(void) __attribute__((noreturn, used));

void tg_fw_entry(void)
{
    /* No gp set-up: the linker script defines no __global_pointer$, so nothing is
     * relaxed to gp-relative addressing. mtvec direct mode needs 4-byte alignment. */
    __asm__ volatile(".option push\n\t"
                     ".option arch, +zicsr\n\t"
                     "la sp, tg_fw_stack_top\n\t"
                     "la t0, tg_fw_trap\n\t"
                     "csrw mtvec, t0\n\t"
                     "j tg_fw_reset\n\t"
                     ".option pop");
}

void tg_fw_reset(void)
{
    volatile uint32_t *dst;
    const volatile uint32_t *src = tg_fw_data_load;

    /* volatile pointers keep gcc from turning the loops into memcpy/memset calls */
    for (dst = tg_fw_data_start; dst < tg_fw_data_end; ++dst) {
        *dst = *src++;
    }
    for (dst = tg_fw_bss_start; dst < tg_fw_bss_end; ++dst) {
        *dst = 0u;
    }
    tg_fw_exit((uint32_t)main() & 0xFFu);
}

/* The reporter runs on a fresh stack: the trap may have been a stack overflow. */
void tg_fw_trap(void)
{
    __asm__ volatile("la sp, tg_fw_stack_top\n\t"
                     "j tg_fw_trap_report");
}

void tg_fw_trap_report(void)
{
    tg_fw_line_t line;
    uint32_t cause;
    uint32_t epc;
    uint32_t tval;
    __asm__ volatile(".option push\n\t"
                     ".option arch, +zicsr\n\t"
                     "csrr %0, mcause\n\t"
                     "csrr %1, mepc\n\t"
                     "csrr %2, mtval\n\t"
                     ".option pop"
                     : "=r"(cause), "=r"(epc), "=r"(tval));
    tg_fw_line_start(&line, "TGFW FAULT");
    tg_fw_line_hex32(&line, cause);
    tg_fw_line_hex32(&line, epc);
    tg_fw_line_hex32(&line, tval);
    tg_fw_line_hex32(&line, 0u);
    tg_fw_line_end(&line);
    tg_fw_exit(TG_FW_FAULT_STATUS);
}
