/* Pixel-window pair-sum kernel (beam_window_body.h) for avx2: 4 lanes x 4
 * vectors, a block of 16 pairs (12 of the 16 registers plus a_l, b_l). */
#include "beam_impl.h"

#if defined(__AVX2__) && defined(__FMA__)
#define KVL 4
#define KNV 4
#define KNAME(f) clef_##f##_avx2_impl
#include "beam_window_body.h"
clef_pixel_window_pairs_fn *const clef_pixel_window_pairs_avx2 = clef_pixel_window_pairs_avx2_impl;
#else
clef_pixel_window_pairs_fn *const clef_pixel_window_pairs_avx2 = NULL;
#endif
