/* AVX-512 instance of the Legendre kernels (sht_kernel_body.h): 8 lanes,
 * 4 chains per sub-block (12 of the 32 vector registers for the
 * recurrence, the rest for accumulators and F).  Compiled with the
 * Makefile's KFLAGS_avx512; without AVX-512 code generation (another
 * architecture, or flags not applied) the descriptor has no functions and
 * is never chosen. */
#include "sht_impl.h"

#if defined(__AVX512F__) && defined(__FMA__)
#define KVL 8
#define KNV 4
#define KNAME(f) clef_sht_avx512_##f
#define KSTR "avx512"
#include "sht_kernel_body.h"
#else
const clef_sht_kernel clef_sht_avx512_kernel = {"avx512", 8, NULL, NULL};
#endif
