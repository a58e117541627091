/* Coupling row kernel (coupling_row_body.h) for avx2: 4 lanes x 4
 * accumulators: a 16-wide block (4 accumulators + 8 loads fit 16
 * registers). */
#include "coupling_impl.h"

#if defined(__AVX2__) && defined(__FMA__)
#define KVL 4
#define KNACC 4
#define KNAME(f) clef_##f##_avx2_impl
#include "coupling_row_body.h"
clef_coupling_row_fn *const clef_coupling_row_avx2 = clef_coupling_row_avx2_impl;
#else
clef_coupling_row_fn *const clef_coupling_row_avx2 = NULL;
#endif
