/* The FMA reference loop, written once for any vector width and included
 * by bench/fma_avx512.c, fma_avx2.c and fma_base.c, each compiled with the
 * same per-width flags as the library's kernels (Makefile KFLAGS), so each
 * kernel is judged against the peak of its own width.  The including file
 * defines KVL (lanes) and KNAME(f).  BENCH_FMA_ACC independent chains
 * a_k <- a_k * m + c (m slightly below 1 keeps every value normal); the
 * result depends on all chains.  Each step is 2 flops per lane (one fused
 * multiply-add, or a multiply and an add on the baseline without FMA). */
#include "common.h"

/* -std=c11 disables contraction; the loop must be fused multiply-adds. */
#pragma GCC optimize("fp-contract=fast")

typedef double fvd __attribute__((vector_size(KVL * sizeof(double))));

__attribute__((noinline)) double KNAME(fma_loop)(long iters, double seed)
{
    fvd a[BENCH_FMA_ACC];
    const fvd m = (fvd){0} + (1.0 - 1e-9), c = (fvd){0} + 1e-3 * seed;
    for (int k = 0; k < BENCH_FMA_ACC; k++)
        a[k] = (fvd){0} + (double)(k + 1);
    for (long i = 0; i < iters; i++)
        for (int k = 0; k < BENCH_FMA_ACC; k++)
            a[k] = a[k] * m + c;
    double s = 0.0;
    for (int k = 0; k < BENCH_FMA_ACC; k++)
        for (int j = 0; j < KVL; j++)
            s += a[k][j];
    return s;
}
