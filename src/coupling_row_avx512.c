/* Coupling row kernel (coupling_row_body.h) for avx512: 8 lanes x 4
 * accumulators: a 32-wide block of l2 in 4 of the 32 registers. */
#include "coupling_impl.h"

#if defined(__AVX512F__) && defined(__FMA__)
#define KVL 8
#define KNACC 4
#define KNAME(f) clef_##f##_avx512_impl
#include "coupling_row_body.h"
clef_coupling_row_fn *const clef_coupling_row_avx512 = clef_coupling_row_avx512_impl;
#else
clef_coupling_row_fn *const clef_coupling_row_avx512 = NULL;
#endif
