/* FMA reference loop for the avx2 kernels (4 lanes; bench/fma_body.h). */
#include "common.h"

#if defined(__AVX2__) && defined(__FMA__)
#define KVL 4
#define KNAME(f) bench_##f##_avx2
#include "fma_body.h"
const bench_fma_fn bench_fma_avx2 = bench_fma_loop_avx2;
#else
const bench_fma_fn bench_fma_avx2 = NULL;
#endif
