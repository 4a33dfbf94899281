/* tg_shape.h - data movement: Concat, Transpose, Pad (int8, storage order).
 *
 * concat: the output is [outer][sum of part_inner] bytes; part i contributes part_inner[i]
 *         contiguous bytes per outer step, optionally remapped through a 256-entry table
 *         (requantization to the output's scale; NULL table = plain copy). No aliasing.
 * transpose: y[out index] = x[in index], rank <= 6, perm[i] = input axis of output axis i.
 * pad: constant padding, rank <= 6, pads_before/after per axis (>= 0), value int8.
 */
#ifndef TG_SHAPE_H
#define TG_SHAPE_H

#include <stdint.h>

#define TG_MAX_RANK 6

typedef struct {
    int32_t outer;
    int32_t parts;
    const int32_t *part_inner;          /* bytes per outer step, one per part */
    const int8_t *const *tables;        /* one per part, entries may be NULL */
} tg_concat_params_t;

void tg_concat(const tg_concat_params_t *p, const int8_t *const *parts, int8_t *y);

typedef struct {
    int32_t rank;
    int32_t in_shape[TG_MAX_RANK];
    int32_t perm[TG_MAX_RANK];
} tg_transpose_params_t;

void tg_transpose(const tg_transpose_params_t *p, const int8_t *x, int8_t *y);

typedef struct {
    int32_t rank;
    int32_t in_shape[TG_MAX_RANK];
    int32_t pads_before[TG_MAX_RANK];
    int32_t pads_after[TG_MAX_RANK];
    int8_t value;
} tg_pad_params_t;

void tg_pad(const tg_pad_params_t *p, const int8_t *x, int8_t *y);

#endif /* TG_SHAPE_H */
