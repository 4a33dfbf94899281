/* tg_fw_dummy_model.c - stand-in for the model in the baseline build.
 *
 * Contract: defines the model's entry points (names from tg_fw_glue.h, prototypes from
 * the model's header) doing nothing, so that the same firmware links without the model.
 * Flash and RAM of the model = measurement build minus this build (plus these stubs).
 */
#include "tg_fw_glue.h"

/* The parameter list is copied from the model's header, so the types agree exactly. */
int TG_FW_RUN(TG_FW_RUN_PARAMS)
{
    TG_FW_RUN_UNUSED
    return 0;
}

#if TG_FW_HAS_IO_FUNCTIONS
void *TG_FW_INPUT(void *arena, int index)
{
    (void)arena;
    (void)index;
    return 0;
}

void *TG_FW_OUTPUT(void *arena, int index)
{
    (void)arena;
    (void)index;
    return 0;
}
#endif
