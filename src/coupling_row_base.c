/* Coupling row kernel (coupling_row_body.h) for base: 2 lanes x 4
 * accumulators: an 8-wide block (SSE2 on x86-64, always built). */
#include "coupling_impl.h"

#define KVL 2
#define KNACC 4
#define KNAME(f) clef_##f##_base_impl
#include "coupling_row_body.h"
clef_coupling_row_fn *const clef_coupling_row_base = clef_coupling_row_base_impl;
