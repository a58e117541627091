/* Pixel-window pair-sum kernel (beam_window_body.h) for avx512: 8 lanes x
 * 8 vectors, a block of 64 pairs (3 x 8 of the 32 registers). */
#include "beam_impl.h"

#if defined(__AVX512F__) && defined(__FMA__)
#define KVL 8
#define KNV 8
#define KNAME(f) clef_##f##_avx512_impl
#include "beam_window_body.h"
clef_pixel_window_pairs_fn *const clef_pixel_window_pairs_avx512 =
    clef_pixel_window_pairs_avx512_impl;
#else
clef_pixel_window_pairs_fn *const clef_pixel_window_pairs_avx512 = NULL;
#endif
