/* FMA reference loop for the base kernels (2 lanes; bench/fma_body.h). */
#include "common.h"

#define KVL 2
#define KNAME(f) bench_##f##_base
#include "fma_body.h"
const bench_fma_fn bench_fma_base = bench_fma_loop_base;
