/* Portable instance of the Legendre kernels (sht_kernel_body.h): 2 lanes
 * (one SSE2 register on x86-64, one NEON or similar register elsewhere;
 * GCC splits or emulates the vector type where there is none), 4 chains
 * per sub-block.  Always built; on x86 the Makefile's KFLAGS_base keep it
 * to the x86-64 baseline whatever ARCH says, so forcing it tests the code
 * a CPU without AVX runs. */
#include "sht_impl.h"

#define KVL 2
#define KNV 4
#define KNAME(f) clef_sht_base_##f
#define KSTR "base"
#include "sht_kernel_body.h"
