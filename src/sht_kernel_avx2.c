/* AVX2 + FMA instance of the Legendre kernels (sht_kernel_body.h): 4
 * lanes, KNV chains per sub-block sized for 16 vector registers.
 * Compiled with the Makefile's KFLAGS_avx2 (which also turns AVX-512 off,
 * so the registers and instructions are those of an AVX2 machine even in
 * an -march=native build on an AVX-512 one). */
#include "sht_impl.h"

#if defined(__AVX2__) && defined(__FMA__)
#define KVL 4
#define KNV 4
#define KNAME(f) clef_sht_avx2_##f
#define KSTR "avx2"
#include "sht_kernel_body.h"
#else
const clef_sht_kernel clef_sht_avx2_kernel = {"avx2", 4, NULL, NULL};
#endif
