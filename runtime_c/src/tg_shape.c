/* tg_shape.c - Concat, Transpose, Pad on int8 tensors, contract in tg_shape.h.
 *
 * Transpose and Pad first drop size-1 axes and merge axes that stay adjacent, so the common
 * cases (a channels-last <-> channels-first flip, padding only the spatial axes) run as a few
 * long contiguous copies. Index arithmetic is int32 (tensors on the target are far below
 * 2^31 bytes).
 */
#include "tg_shape.h"

#include <string.h>

void tg_concat(const tg_concat_params_t *p, const int8_t *const *parts, int8_t *y)
{
    int32_t o, i, j;
    for (o = 0; o < p->outer; ++o) {
        for (i = 0; i < p->parts; ++i) {
            const int32_t n = p->part_inner[i];
            const int8_t *src = parts[i] + o * n;
            const int8_t *table = p->tables != NULL ? p->tables[i] : NULL;
            if (table == NULL) {
                memcpy(y, src, (size_t)n);
            } else {
                for (j = 0; j < n; ++j) {
                    y[j] = table[(uint8_t)src[j]];
                }
            }
            y += n;
        }
    }
}

/* Steps the odometer idx over dim[0..r) (last axis fastest); returns the offset change. */
static int32_t tg_odometer_step(int32_t *idx, const int32_t *dim, const int32_t *stride,
                                int32_t r)
{
    int32_t delta = 0;
    int32_t a;
    for (a = r - 1; a >= 0; --a) {
        if (++idx[a] < dim[a]) {
            return delta + stride[a];
        }
        idx[a] = 0;
        delta -= (dim[a] - 1) * stride[a];
    }
    return delta;
}

void tg_transpose(const tg_transpose_params_t *p, const int8_t *x, int8_t *y)
{
    int32_t in_stride[TG_MAX_RANK];
    int32_t dim[TG_MAX_RANK], stride[TG_MAX_RANK], idx[TG_MAX_RANK];
    int32_t r = 0, a, outer = 1, run, off = 0;
    int32_t s = 1;
    for (a = p->rank - 1; a >= 0; --a) {
        in_stride[a] = s;
        s *= p->in_shape[a];
    }
    if (s == 0) {
        return;
    }
    /* Output axes in order, each with the input stride it walks; merge where possible. */
    for (a = 0; a < p->rank; ++a) {
        const int32_t d = p->in_shape[p->perm[a]];
        const int32_t st = in_stride[p->perm[a]];
        if (d == 1) {
            continue;
        }
        if (r > 0 && stride[r - 1] == st * d) {
            dim[r - 1] *= d;
            stride[r - 1] = st;
        } else {
            dim[r] = d;
            stride[r] = st;
            ++r;
        }
    }
    if (r == 0) {
        y[0] = x[0];
        return;
    }
    run = dim[r - 1];
    for (a = 0; a < r - 1; ++a) {
        outer *= dim[a];
        idx[a] = 0;
    }
    if (stride[r - 1] == 1) {
        while (outer-- > 0) {
            memcpy(y, x + off, (size_t)run);
            y += run;
            off += tg_odometer_step(idx, dim, stride, r - 1);
        }
        return;
    }
    {
        const int32_t st = stride[r - 1];
        while (outer-- > 0) {
            const int8_t *src = x + off;
            int32_t j;
            for (j = 0; j < run; ++j) {
                y[j] = src[j * st];
            }
            y += run;
            off += tg_odometer_step(idx, dim, stride, r - 1);
        }
    }
}

void tg_pad(const tg_pad_params_t *p, const int8_t *x, int8_t *y)
{
    int32_t in_dim[TG_MAX_RANK], out_dim[TG_MAX_RANK], before[TG_MAX_RANK];
    int32_t out_stride[TG_MAX_RANK], idx[TG_MAX_RANK];
    int32_t r = 0, a, total = 1, in_total = 1, rows = 1, run, off = 0, in_off = 0;
    for (a = 0; a < p->rank; ++a) {
        const int32_t d = p->in_shape[a];
        const int32_t od = d + p->pads_before[a] + p->pads_after[a];
        total *= od;
        in_total *= d;
        /* An unpadded axis merges into the axis before it (both tensors stay contiguous). */
        if (r > 0 && p->pads_before[a] == 0 && p->pads_after[a] == 0) {
            in_dim[r - 1] *= d;
            out_dim[r - 1] *= d;
            before[r - 1] *= d;
        } else {
            in_dim[r] = d;
            out_dim[r] = od;
            before[r] = p->pads_before[a];
            ++r;
        }
    }
    if (total == 0) {
        return;
    }
    memset(y, p->value, (size_t)total);
    if (in_total == 0) {
        return;
    }
    if (r == 0) {
        y[0] = x[0];
        return;
    }
    out_stride[r - 1] = 1;
    for (a = r - 2; a >= 0; --a) {
        out_stride[a] = out_stride[a + 1] * out_dim[a + 1];
    }
    for (a = 0; a < r; ++a) {
        off += before[a] * out_stride[a];
        idx[a] = 0;
    }
    run = in_dim[r - 1];
    for (a = 0; a < r - 1; ++a) {
        rows *= in_dim[a];
    }
    while (rows-- > 0) {
        memcpy(y + off, x + in_off, (size_t)run);
        in_off += run;
        off += tg_odometer_step(idx, in_dim, out_stride, r - 1);
    }
}
