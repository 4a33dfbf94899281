/* tg_lut.h - unary int8 -> int8 ops through a 256-entry table built at compile time
 * (Sigmoid, Tanh, HardSigmoid, HardSwish, LeakyRelu, standalone Relu/Clip, requantize).
 * y[i] = table[(uint8_t)x[i]], i.e. the table is indexed by the int8 value + 256 mod 256.
 * y may alias x.
 */
#ifndef TG_LUT_H
#define TG_LUT_H

#include <stdint.h>

void tg_lut(const int8_t *table, const int8_t *x, int8_t *y, int32_t count);

#endif /* TG_LUT_H */
