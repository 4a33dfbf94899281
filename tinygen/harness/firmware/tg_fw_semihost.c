/* tg_fw_semihost.c - semihosting console output and exit (see tg_fw_semihost.h). */
#include "tg_fw_semihost.h"

#define TG_FW_SYS_WRITE0 0x04u
#define TG_FW_SYS_EXIT_EXTENDED 0x20u
#define TG_FW_ADP_STOPPED_APPLICATION_EXIT 0x20026u

/* One semihosting request: operation in r0 (a0), argument pointer in r1 (a1), result in
 * r0 (a0). Arm: BKPT 0xAB in Thumb state. RISC-V: EBREAK between the two marker
 * instructions of the RISC-V semihosting spec, uncompressed and in one aligned block. */
static uint32_t tg_fw_semihost_call(uint32_t op, const void *arg)
{
#if defined(__riscv)
    register uint32_t a0 __asm__("a0") = op;
    register const void *a1 __asm__("a1") = arg;
    __asm__ volatile(".option push\n\t"
                     ".option norvc\n\t"
                     ".balign 16\n\t"
                     "slli x0, x0, 0x1f\n\t"
                     "ebreak\n\t"
                     "srai x0, x0, 7\n\t"
                     ".option pop"
                     : "+r"(a0) : "r"(a1) : "memory");
    return a0;
#else
    register uint32_t r0 __asm__("r0") = op;
    register const void *r1 __asm__("r1") = arg;
    __asm__ volatile("bkpt 0xab" : "+r"(r0) : "r"(r1) : "memory");
    return r0;
#endif
}

void tg_fw_write0(const char *text)
{
    (void)tg_fw_semihost_call(TG_FW_SYS_WRITE0, text);
}

void tg_fw_exit(uint32_t status)
{
    /* SYS_EXIT_EXTENDED takes a block {reason, subcode}; the subcode becomes the
     * emulator's exit status (plain SYS_EXIT on 32-bit targets cannot carry one). */
    const uint32_t block[2] = {TG_FW_ADP_STOPPED_APPLICATION_EXIT, status};
    for (;;) {
        (void)tg_fw_semihost_call(TG_FW_SYS_EXIT_EXTENDED, block);
    }
}

static void tg_fw_line_char(tg_fw_line_t *line, char c)
{
    if (line->len + 1u < sizeof line->text) {
        line->text[line->len++] = c;
    }
}

void tg_fw_line_start(tg_fw_line_t *line, const char *tag)
{
    line->len = 0;
    tg_fw_line_str(line, tag);
}

void tg_fw_line_str(tg_fw_line_t *line, const char *text)
{
    while (*text != '\0') {
        tg_fw_line_char(line, *text++);
    }
}

static void tg_fw_line_nibbles(tg_fw_line_t *line, uint32_t value, int nibbles)
{
    static const char digits[] = "0123456789abcdef";
    int i;
    for (i = nibbles - 1; i >= 0; --i) {
        tg_fw_line_char(line, digits[(value >> (4 * i)) & 0xFu]);
    }
}

void tg_fw_line_hex32(tg_fw_line_t *line, uint32_t value)
{
    tg_fw_line_str(line, " 0x");
    tg_fw_line_nibbles(line, value, 8);
}

void tg_fw_line_bytes(tg_fw_line_t *line, const uint8_t *bytes, uint32_t count)
{
    uint32_t i;
    tg_fw_line_char(line, ' ');
    for (i = 0; i < count; ++i) {
        tg_fw_line_nibbles(line, bytes[i], 2);
    }
}

void tg_fw_line_end(tg_fw_line_t *line)
{
    line->text[line->len++] = '\n';
    line->text[line->len] = '\0';
    tg_fw_write0(line->text);
    line->len = 0;
}
