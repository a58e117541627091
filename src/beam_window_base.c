/* Pixel-window pair-sum kernel (beam_window_body.h) for base: 2 lanes x 4
 * vectors, a block of 8 pairs (SSE2 on x86-64, always built). */
#include "beam_impl.h"

#define KVL 2
#define KNV 4
#define KNAME(f) clef_##f##_base_impl
#include "beam_window_body.h"
clef_pixel_window_pairs_fn *const clef_pixel_window_pairs_base = clef_pixel_window_pairs_base_impl;
