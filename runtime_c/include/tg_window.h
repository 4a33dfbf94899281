/* tg_window.h - which kernel taps of a sliding window fall inside the input (private to the
 * conv and pool kernels). Padding is never read: callers loop over [lo, hi) only.
 */
#ifndef TG_WINDOW_H
#define TG_WINDOW_H

#include <stdint.h>

/* Taps k in [*lo, *hi) keep base + k*dil inside [0, in); an empty range has *lo == *hi. */
static inline void tg_tap_range(int32_t base, int32_t dil, int32_t k, int32_t in,
                                int32_t *lo, int32_t *hi)
{
    int32_t first = 0;
    int32_t end = k;
    if (base < 0) {
        first = (-base + dil - 1) / dil;
    }
    if (base + (k - 1) * dil >= in) {
        end = (in - 1 - base < 0) ? 0 : (in - 1 - base) / dil + 1;
    }
    *lo = first;
    *hi = end > first ? end : first;
}

#endif /* TG_WINDOW_H */
