/* Internal to the pixel window (src/beam_window.c). */
#ifndef CLEF_BEAM_IMPL_H
#define CLEF_BEAM_IMPL_H

#include <stddef.h>

/* Pair-sum kernels of the pixel window (src/beam_window_body.h), one per
 * vector width; NULL where the width was not built.  acc is scratch of
 * CLEF_PIXEL_WINDOW_LANES x (lmax + 1) doubles, 64-byte aligned. */
#define CLEF_PIXEL_WINDOW_LANES 8
typedef void clef_pixel_window_pairs_fn(const double *restrict x, size_t np, int lmax,
                                  const double *restrict ca, const double *restrict cb,
                                  double *restrict acc, double *restrict sum);
extern clef_pixel_window_pairs_fn *const clef_pixel_window_pairs_avx512,
    *const clef_pixel_window_pairs_avx2, *const clef_pixel_window_pairs_base;

#endif
