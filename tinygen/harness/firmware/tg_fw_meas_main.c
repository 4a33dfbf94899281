/* tg_fw_meas_main.c - measurement firmware: feeds baked-in samples to the model, runs it,
 * writes the outputs back over semihosting, and reports instruction counts and stack use.
 *
 * Contract: built with the generated tg_fw_glue.h (model names, I/O sizes, I/O mode)
 * and tg_fw_samples.h (input bytes of every sample, back to back, in input order).
 * I/O mode: TG_FW_IO_MODE 1 = arena, 2 = external (caller buffers), 0 = ask the model:
 * arena if <prefix>_input(NULL, 0) is not NULL.
 * Output is one "TGFW ..." line per record; tinygen/harness/target.py parses it.
 * With -DTG_FW_PER_OP=1 the per-op hooks are compiled in and reported too.
 */
#include <stdint.h>

#include "tg_fw_glue.h"
#include "tg_fw_samples.h"
#include "tg_fw_counter.h"
#include "tg_fw_semihost.h"

#ifndef TG_FW_PER_OP
#define TG_FW_PER_OP 0
#endif
#if TG_FW_PER_OP
#include "tg_fw_op_hooks.h"
#endif

#define TG_FW_PAINT 0xA5C35A3Cu
#define TG_FW_OUT_CHUNK 32u

extern uint32_t tg_fw_stack_bottom[];

/* The current stack pointer; a macro so that it reads main's own frame. */
#if defined(__riscv)
#define TG_FW_READ_SP(var) __asm__ volatile("mv %0, sp" : "=r"(var))
#else
#define TG_FW_READ_SP(var) __asm__ volatile("mov %0, sp" : "=r"(var))
#endif

static void tg_fw_report_u64(tg_fw_line_t *line, uint64_t value)
{
    tg_fw_line_hex32(line, (uint32_t)(value >> 32));
    tg_fw_line_hex32(line, (uint32_t)value);
}

static void tg_fw_copy(uint8_t *dst, const uint8_t *src, uint32_t count)
{
    uint32_t i;
    for (i = 0; i < count; ++i) {
        dst[i] = src[i];
    }
}

static void tg_fw_report_output(uint32_t sample, uint32_t index, const uint8_t *bytes,
                                uint32_t count)
{
    tg_fw_line_t line;
    uint32_t offset;
    for (offset = 0; offset < count; offset += TG_FW_OUT_CHUNK) {
        uint32_t n = count - offset < TG_FW_OUT_CHUNK ? count - offset : TG_FW_OUT_CHUNK;
        tg_fw_line_start(&line, "TGFW OUT");
        tg_fw_line_hex32(&line, sample);
        tg_fw_line_hex32(&line, index);
        tg_fw_line_hex32(&line, offset);
        tg_fw_line_bytes(&line, bytes + offset, n);
        tg_fw_line_end(&line);
    }
}

#if TG_FW_PER_OP
static void tg_fw_ops_clear(void)
{
    tg_fw_mailbox_t *box = tg_fw_mailbox();
    uint32_t op;
    for (op = 0; op < (uint32_t)TG_FW_OP_SLOTS; ++op) {
        box->slot[op].instructions = 0u;
        box->slot[op].calls = 0u;
    }
    box->out_of_range = 0u;
    box->disagree = 0u;
}

/* An empty BEGIN/END pair: the hooks' own cost, subtracted from every op by the host. */
static uint64_t tg_fw_ops_calibrate(void)
{
    const uint32_t cal = (uint32_t)TG_FW_OP_SLOTS - 1u;
    uint64_t instructions;
    tg_fw_ops_clear();
    TG_OP_BEGIN(cal);
    TG_OP_END(cal);
    instructions = tg_fw_mailbox()->slot[cal].instructions;
    tg_fw_ops_clear();
    return instructions;
}

static void tg_fw_ops_report(uint32_t sample, uint32_t *disagree, uint32_t *out_of_range)
{
    tg_fw_mailbox_t *box = tg_fw_mailbox();
    tg_fw_line_t line;
    uint32_t op;
    for (op = 0; op + 1u < (uint32_t)TG_FW_OP_SLOTS; ++op) {
        if (box->slot[op].calls == 0u) {
            continue;
        }
        tg_fw_line_start(&line, "TGFW OP");
        tg_fw_line_hex32(&line, sample);
        tg_fw_line_hex32(&line, op);
        tg_fw_line_hex32(&line, box->slot[op].calls);
        tg_fw_report_u64(&line, box->slot[op].instructions);
        tg_fw_line_end(&line);
    }
    *disagree += box->disagree;
    *out_of_range += box->out_of_range;
    tg_fw_ops_clear();
}
#endif

int main(void)
{
    static const uint32_t in_bytes[TG_FW_NUM_INPUTS] = {TG_FW_INPUT_BYTES_LIST};
    static const uint32_t out_bytes[TG_FW_NUM_OUTPUTS] = {TG_FW_OUTPUT_BYTES_LIST};
    static const uint32_t in_offset[TG_FW_NUM_INPUTS] = {TG_FW_INPUT_OFFSET_LIST};
    static const uint32_t out_offset[TG_FW_NUM_OUTPUTS] = {TG_FW_OUTPUT_OFFSET_LIST};
    /* Caller-owned I/O buffers for --io external, 8-byte aligned. */
    uint64_t io_storage[(TG_FW_IO_STORAGE_BYTES + 7u) / 8u];
    void *inputs[TG_FW_NUM_INPUTS];
    void *outputs[TG_FW_NUM_OUTPUTS];
    uint32_t io_arena = 0u;     /* 1: the I/O lives in the arena */
    uint32_t io_missing = 0u;   /* arena buffers the model did not provide */
    const uint8_t *sample_bytes = tg_fw_samples;
    tg_fw_stamp_t before;
    tg_fw_stamp_t after;
    tg_fw_line_t line;
    uint32_t disagree = 0u;
    uint32_t out_of_range = 0u;
    uint32_t sample;
    uint32_t i;
    uint64_t calibration;
    uint64_t op_calibration = 0u;

    tg_fw_counter_start();
    tg_fw_open(&before);
    tg_fw_close(&after);
    calibration = tg_fw_elapsed(&before, &after, &disagree);
#if TG_FW_PER_OP
    if ((uint32_t)(tg_fw_mailbox_end - tg_fw_mailbox_start) < TG_FW_MAILBOX_BYTES) {
        tg_fw_write0("TGFW FAULT mailbox-too-small\n");
        return 3;
    }
    op_calibration = tg_fw_ops_calibrate();
#endif
#if TG_FW_IO_MODE != 2
    io_arena = TG_FW_INPUT(0, 0) != 0 ? 1u : 0u;
#endif
#if TG_FW_IO_MODE == 1
    io_missing = io_arena ? 0u : 1u;
#endif
    for (i = 0; i < TG_FW_NUM_INPUTS; ++i) {
        inputs[i] = (uint8_t *)io_storage + in_offset[i];
#if TG_FW_IO_MODE != 2
        if (io_arena) {
            inputs[i] = TG_FW_INPUT(0, (int)i);
            io_missing += inputs[i] == 0 ? 1u : 0u;
        }
#endif
    }
    for (i = 0; i < TG_FW_NUM_OUTPUTS; ++i) {
        outputs[i] = (uint8_t *)io_storage + out_offset[i];
#if TG_FW_IO_MODE != 2
        if (io_arena) {
            outputs[i] = TG_FW_OUTPUT(0, (int)i);
            io_missing += outputs[i] == 0 ? 1u : 0u;
        }
#endif
    }
    tg_fw_line_start(&line, "TGFW BEGIN");
    tg_fw_line_hex32(&line, TG_FW_NUM_SAMPLES);
    tg_fw_report_u64(&line, calibration);
    tg_fw_report_u64(&line, op_calibration);
    tg_fw_line_hex32(&line, io_arena);
    tg_fw_line_hex32(&line, io_missing);
    tg_fw_line_end(&line);
    if (io_missing != 0u) {
        return 3;   /* arena I/O asked for, but the model has no buffer to give */
    }

    for (sample = 0; sample < TG_FW_NUM_SAMPLES; ++sample) {
        uint32_t sp;
        uint32_t *word;
        uint32_t overflow;
        uint32_t stack;
        int rc;
        for (i = 0; i < TG_FW_NUM_INPUTS; ++i) {
            tg_fw_copy((uint8_t *)inputs[i], sample_bytes, in_bytes[i]);
            sample_bytes += in_bytes[i];
        }
        /* Paint everything below main's frame; the model's frames land there. */
        TG_FW_READ_SP(sp);
        for (word = tg_fw_stack_bottom; (uint32_t)word < sp; ++word) {
            *(volatile uint32_t *)word = TG_FW_PAINT;
        }
        tg_fw_open(&before);
        /* One call for both modes, so no branch joins the count: with the I/O in the
         * arena the model ignores the pointer arrays. Passed via void * to convert to
         * whichever pointer-to-pointer type the header declares. */
        rc = TG_FW_RUN(0, (void *)inputs, (void *)outputs);
        tg_fw_close(&after);
        /* Scan inline too: a called function's frame would land on the painted words. */
        word = tg_fw_stack_bottom;
        while ((uint32_t)word < sp && *(volatile uint32_t *)word == TG_FW_PAINT) {
            ++word;
        }
        overflow = (word == tg_fw_stack_bottom) ? 1u : 0u;
        stack = sp - (uint32_t)word;

        tg_fw_line_start(&line, "TGFW SAMPLE");
        tg_fw_line_hex32(&line, sample);
        tg_fw_line_hex32(&line, (uint32_t)rc);
        tg_fw_report_u64(&line, tg_fw_elapsed(&before, &after, &disagree));
        tg_fw_line_hex32(&line, stack);
        tg_fw_line_hex32(&line, overflow);
        tg_fw_line_end(&line);
        for (i = 0; i < TG_FW_NUM_OUTPUTS; ++i) {
            tg_fw_report_output(sample, i, (const uint8_t *)outputs[i], out_bytes[i]);
        }
#if TG_FW_PER_OP
        tg_fw_ops_report(sample, &disagree, &out_of_range);
#endif
    }

    tg_fw_line_start(&line, "TGFW END");
    tg_fw_line_hex32(&line, disagree);
    tg_fw_line_hex32(&line, out_of_range);
    tg_fw_line_end(&line);
    return 0;
}
