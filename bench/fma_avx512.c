/* FMA reference loop for the avx512 kernels (8 lanes; bench/fma_body.h). */
#include "common.h"

#if defined(__AVX512F__) && defined(__FMA__)
#define KVL 8
#define KNAME(f) bench_##f##_avx512
#include "fma_body.h"
const bench_fma_fn bench_fma_avx512 = bench_fma_loop_avx512;
#else
const bench_fma_fn bench_fma_avx512 = NULL;
#endif
