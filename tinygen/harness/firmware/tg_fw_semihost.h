/* tg_fw_semihost.h - semihosting calls for the measurement firmware (Arm: bkpt 0xab;
 * RISC-V: the ebreak sequence of the RISC-V semihosting spec).
 *
 * Contract: text goes to the host console with SYS_WRITE0; tg_fw_exit() ends the
 * emulator with the given status via SYS_EXIT_EXTENDED and never returns.
 */
#ifndef TG_FW_SEMIHOST_H
#define TG_FW_SEMIHOST_H

#include <stdint.h>

/* Write a NUL-terminated string to the host console. */
void tg_fw_write0(const char *text);

/* Stop the emulator; the host process exits with `status` (0..255). */
void tg_fw_exit(uint32_t status) __attribute__((noreturn));

/* A line of text built up on the caller's stack, flushed with tg_fw_line_end(). */
typedef struct {
    char text[160];
    uint32_t len;
} tg_fw_line_t;

void tg_fw_line_start(tg_fw_line_t *line, const char *tag);
void tg_fw_line_str(tg_fw_line_t *line, const char *text);
void tg_fw_line_hex32(tg_fw_line_t *line, uint32_t value);   /* " 0x%08x" */
void tg_fw_line_bytes(tg_fw_line_t *line, const uint8_t *bytes, uint32_t count);  /* " %02x.." */
void tg_fw_line_end(tg_fw_line_t *line);

#endif /* TG_FW_SEMIHOST_H */
