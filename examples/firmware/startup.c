/* startup.c - reset, vector table and console for the demo (MPS2 boards under QEMU).
 *
 * Reset: enable the FPU (hard-float builds), copy .data from flash, zero .bss, run main,
 * then stop. Console and stop use Arm semihosting (bkpt 0xab), which QEMU and debug
 * probes understand; on a board without a debugger, point app_print at a UART instead.
 */
#include <stdint.h>

extern uint32_t app_data_load[], app_data_start[], app_data_end[];   /* from mps2.ld */
extern uint32_t app_bss_start[], app_bss_end[], app_stack_top[];

int main(void);
void app_print(const char *text);
void app_reset(void);
void app_fault(void);

static uint32_t app_semihost(uint32_t op, const void *arg)
{
    register uint32_t r0 __asm__("r0") = op;
    register const void *r1 __asm__("r1") = arg;
    __asm__ volatile("bkpt 0xab" : "+r"(r0) : "r"(r1) : "memory");
    return r0;
}

void app_print(const char *text)
{
    (void)app_semihost(0x04u, text);                        /* SYS_WRITE0 */
}

static void app_stop(uint32_t status)
{
    const uint32_t block[2] = {0x20026u, status};           /* ApplicationExit, status */
    for (;;) {
        (void)app_semihost(0x20u, block);                   /* SYS_EXIT_EXTENDED */
    }
}

typedef void (*app_handler_t)(void);

/* Initial stack pointer, then the handlers: reset, NMI, HardFault, ... */
__attribute__((section(".vectors"), used))
static const app_handler_t app_vectors[16] = {
    (app_handler_t)(uintptr_t)app_stack_top, app_reset, app_fault, app_fault,
    app_fault, app_fault, app_fault,
};

void app_reset(void)
{
    volatile uint32_t *dst;
    const volatile uint32_t *src = app_data_load;
#if defined(__ARM_FP)
    *(volatile uint32_t *)0xE000ED88u |= 0xFu << 20;        /* CPACR: CP10/CP11 on */
    __asm__ volatile("dsb\n\tisb" ::: "memory");
#endif
    for (dst = app_data_start; dst < app_data_end; ++dst) {
        *dst = *src++;
    }
    for (dst = app_bss_start; dst < app_bss_end; ++dst) {
        *dst = 0u;
    }
    app_stop((uint32_t)main());
}

void app_fault(void)
{
    app_print("fault\n");
    app_stop(255u);
}
