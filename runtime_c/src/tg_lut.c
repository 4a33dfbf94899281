/* tg_lut.c - unary int8 ops through a 256-entry table, contract in tg_lut.h.
 *
 * Each output byte depends only on the input byte at the same index, read before the write,
 * so y == x is safe.
 */
#include "tg_lut.h"

void tg_lut(const int8_t *table, const int8_t *x, int8_t *y, int32_t count)
{
    int32_t i = 0;
    /* Four at a time: keeps the loads ahead of the stores without relying on the compiler. */
    for (; i + 4 <= count; i += 4) {
        int8_t v0 = table[(uint8_t)x[i]];
        int8_t v1 = table[(uint8_t)x[i + 1]];
        int8_t v2 = table[(uint8_t)x[i + 2]];
        int8_t v3 = table[(uint8_t)x[i + 3]];
        y[i] = v0;
        y[i + 1] = v1;
        y[i + 2] = v2;
        y[i + 3] = v3;
    }
    for (; i < count; ++i) {
        y[i] = table[(uint8_t)x[i]];
    }
}
