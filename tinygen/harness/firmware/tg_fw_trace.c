/* tg_fw_trace.c - the trace build's capture on the target: each kernel call's output goes to
 * the host over semihosting, as "TGFW TRACE <call> <offset> <bytes>" lines of up to 32 bytes.
 *
 * Contract: tg_trace_capture() is what TG_OP_END(i) becomes through the generated
 * tg_trace_glue.h (tinygen/trace.py), called with the buffer kernel call i has just written.
 * The host assigns the lines to the sample whose "TGFW SAMPLE" line follows them.
 */
#include <stdint.h>

#include "tg_fw_semihost.h"

#define TG_FW_TRACE_CHUNK 32u

void tg_trace_capture(uint32_t op, const void *data, uint32_t bytes);

void tg_trace_capture(uint32_t op, const void *data, uint32_t bytes)
{
    const uint8_t *p = (const uint8_t *)data;
    tg_fw_line_t line;
    uint32_t offset;
    for (offset = 0; offset < bytes; offset += TG_FW_TRACE_CHUNK) {
        uint32_t n = bytes - offset < TG_FW_TRACE_CHUNK ? bytes - offset : TG_FW_TRACE_CHUNK;
        tg_fw_line_start(&line, "TGFW TRACE");
        tg_fw_line_hex32(&line, op);
        tg_fw_line_hex32(&line, offset);
        tg_fw_line_bytes(&line, p + offset, n);
        tg_fw_line_end(&line);
    }
}
