/* tg_pwconv.c - pointwise (1x1) convolution, contract in tg_pwconv.h.
 *
 * A 1x1 convolution is a matrix product of the pixels ([pixels][in_c]) with the weights
 * ([out_c][in_c]): two pixels at a time are widened once into the scratch pair buffer and
 * run against every channel pair of the pack (tg_mat.h: the blocked core, SMLAD assembly on
 * DSP cores). A pixel's input is read only while its pair is widened, so the output may
 * overwrite input the walk has passed (the overlap in tg_pwconv.h).
 */
#include "tg_pwconv.h"
#include "tg_mat.h"

/* Widen the pair (p0, p1; p1 NULL for a lone pixel) and write all channels of both. */
static void tg_pw_pixels(const tg_mat_group_t *grp, int32_t in_zp, const int8_t *p0,
                         const int8_t *p1, int16_t *xw, void *y0, void *y1, int fast)
{
    tg_mat_widen2(p0, p1 != NULL ? p1 : p0, grp->k_len, in_zp, xw);
    tg_mat_channels(grp, xw, y0, y1 != NULL ? y1 : y0, fast);  /* a lone pixel: y1 = y0 */
}

void tg_pwconv(const tg_pwconv_params_t *p, const int8_t *x, void *y, void *scratch,
               int32_t row0, int32_t row1)
{
    const int32_t e = p->rq != NULL ? 1 : 4;  /* output element bytes */
    const int32_t x_row = p->in_w * p->in_c, y_row = p->out_w * p->out_c * e;
    const int32_t x_px = p->stride_w * p->in_c, y_px = p->out_c * e;
    const int fast = p->rq != NULL ? tg_mat_mode(p->rq, p->pack, p->in_c) : 0;
    tg_mat_group_t grp;
    int16_t *xw = (int16_t *)scratch;
    int8_t *yb = (int8_t *)y;
    int32_t b, r, ox;
    grp.rec = p->pack;
    grp.rq = p->rq;
    grp.k_len = p->in_c;
    grp.nc = p->out_c;
    grp.c_base = 0;
    if (p->stride_h == 1 && p->stride_w == 1 && p->x_ring == 0 && p->y_ring == 0
        && p->in_w == p->out_w) {
        /* Dense rows that follow each other: one run of pixels over the whole range. */
        const int32_t whole = row0 == 0 && row1 == p->out_h;
        const int32_t first = row0 * p->out_w;
        const int32_t end = whole ? p->n * p->out_h * p->out_w : row1 * p->out_w;
        int32_t q = first;
        if (tg_mat_run(&grp, x + q * p->in_c, p->in_c, p->in_zp, xw, yb + q * y_px, y_px,
                       (end - first) >> 1, fast)) {
            q += (end - first) & ~1;  /* the pairs ran in the assembly; a lone last pixel */
        }
        for (; q < end; q += 2) {
            const int32_t two = q + 1 < end;
            tg_pw_pixels(&grp, p->in_zp, x + q * p->in_c, two ? x + (q + 1) * p->in_c : NULL,
                         xw, yb + q * y_px, two ? yb + (q + 1) * y_px : NULL, fast);
        }
        return;
    }
    for (b = 0; b < (row0 == 0 && row1 == p->out_h ? p->n : 1); ++b) {
        const int8_t *xb = x + b * p->in_h * x_row;
        int8_t *ybb = yb + b * p->out_h * y_row;
        for (r = row0; r < row1; ++r) {
            const int32_t iy = r * p->stride_h;
            const int8_t *xr = xb + (p->x_ring ? iy % p->x_ring : iy) * x_row;
            int8_t *yr = ybb + (p->y_ring ? r % p->y_ring : r) * y_row;
            ox = 0;
            if (tg_mat_run(&grp, xr, x_px, p->in_zp, xw, yr, y_px, p->out_w >> 1, fast)) {
                ox = p->out_w & ~1;
            }
            for (; ox < p->out_w; ox += 2) {
                const int32_t two = ox + 1 < p->out_w;
                tg_pw_pixels(&grp, p->in_zp, xr + ox * x_px,
                             two ? xr + (ox + 1) * x_px : NULL, xw, yr + ox * y_px,
                             two ? yr + (ox + 1) * y_px : NULL, fast);
            }
        }
    }
}
