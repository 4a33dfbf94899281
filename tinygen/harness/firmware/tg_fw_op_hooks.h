/* tg_fw_op_hooks.h - per-op instruction counting; force-included (-include) into every
 * file of the emitted tree in the per-op measurement build, ahead of tg_config.h.
 *
 * Contract: TG_OP_BEGIN(i) stamps the counters; TG_OP_END(i) adds the instructions since
 * that stamp to slot i of the mailbox (a RAM area the linker script reserves, size set
 * by --defsym tg_fw_mailbox_bytes). Build with -DTG_FW_OP_SLOTS=<ops + 1>; the last slot
 * is the firmware's own calibration of an empty BEGIN/END pair.
 */
#ifndef TG_FW_OP_HOOKS_H
#define TG_FW_OP_HOOKS_H

#include <stdint.h>

#include "tg_fw_counter.h"

#ifndef TG_FW_OP_SLOTS
#error "build with -DTG_FW_OP_SLOTS=<number of ops + 1>"
#endif

typedef struct {
    uint64_t instructions;  /* summed over calls, hook overhead included */
    uint32_t calls;
    uint32_t reserved;
} tg_fw_op_slot_t;

typedef struct {
    tg_fw_stamp_t open;     /* taken by the latest TG_OP_BEGIN */
    uint32_t out_of_range;  /* TG_OP_END calls whose index had no slot */
    uint32_t disagree;      /* intervals where the two timers disagreed */
    tg_fw_op_slot_t slot[];
} tg_fw_mailbox_t;

#define TG_FW_MAILBOX_BYTES (sizeof(tg_fw_mailbox_t) + TG_FW_OP_SLOTS * sizeof(tg_fw_op_slot_t))

/* Bounds of the mailbox: linker-script symbols, the one shared object of the harness. */
extern uint8_t tg_fw_mailbox_start[];
extern uint8_t tg_fw_mailbox_end[];

static inline __attribute__((always_inline)) tg_fw_mailbox_t *tg_fw_mailbox(void)
{
    return (tg_fw_mailbox_t *)(void *)tg_fw_mailbox_start;
}

static inline __attribute__((always_inline)) void tg_fw_op_begin(void)
{
    tg_fw_open(&tg_fw_mailbox()->open);
}

static inline __attribute__((always_inline)) void tg_fw_op_end(uint32_t op)
{
    tg_fw_stamp_t now;
    tg_fw_mailbox_t *box;
    tg_fw_close(&now);
    box = tg_fw_mailbox();
    if (op < (uint32_t)TG_FW_OP_SLOTS) {
        box->slot[op].instructions += tg_fw_elapsed(&box->open, &now, &box->disagree);
        box->slot[op].calls += 1u;
    } else {
        box->out_of_range += 1u;
    }
}

/* Braces rather than do/while: valid whether or not the caller adds a semicolon. */
#define TG_OP_BEGIN(i) { tg_fw_op_begin(); }
#define TG_OP_END(i) { tg_fw_op_end((uint32_t)(i)); }

#endif /* TG_FW_OP_HOOKS_H */
