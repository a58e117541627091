/* Shared helpers for the benchmark programs (bench/bench_*.c): timers,
 * machine references measured in the same process (FMA peak, OpenBLAS
 * DGEMM), peak memory, statistics, and JSON output through cJSON.
 * PERFORMANCE.md section 4 describes the method. */
#ifndef CLEF_BENCH_COMMON_H
#define CLEF_BENCH_COMMON_H

#include <cjson/cJSON.h>

#include "clef/kernel.h"

/* Wall-clock and process CPU seconds. */
double bench_wtime(void);
double bench_cputime(void);

/* Double-precision FMA throughput of `nthreads` OpenMP threads, GFLOP/s:
 * each thread runs a loop of BENCH_FMA_ACC independent vector FMA chains
 * (enough to cover latency x pipes on current x86) for about `seconds`;
 * best of `reps`.  The loop has the vector width of kernel `k` and is
 * compiled with its flags (bench/fma_body.h); flops count its lanes.
 * NaN if that width was not built or the CPU lacks it. */
#define BENCH_FMA_ACC 12
double bench_fma_peak_kernel(clef_kernel k, int nthreads, double seconds, int reps);
/* The same loop rated per CPU second of the working threads (their own
 * CPU clocks, summed): the per-core rate, insensitive to time slicing when
 * other programs share the cores. */
double bench_fma_peak_kernel_cpu(clef_kernel k, int nthreads, double seconds, int reps);
/* The two above for the kernel plans use by default (CLEF_KERNEL or the CPU's best). */
double bench_fma_peak(int nthreads, double seconds, int reps);
double bench_fma_peak_cpu(int nthreads, double seconds, int reps);

/* Per-width loops (bench/fma_*.c): iterations, seed -> checksum; NULL if not built. */
typedef double (*bench_fma_fn)(long iters, double seed);
extern const bench_fma_fn bench_fma_avx512, bench_fma_avx2, bench_fma_base;
/* Kernel plans use by default (CLEF_KERNEL or the CPU's best). */
clef_kernel bench_default_kernel(void);
/* Lanes of kernel k's vectors (8, 4, 2). */
int bench_kernel_lanes(clef_kernel k);

/* OpenBLAS cblas_dgemm on n x n matrices with `nthreads` BLAS threads:
 * one warm-up, best of `reps`, GFLOP/s (2 n^3 flops per call). */
double bench_dgemm(int n, int nthreads, int reps);
/* The OpenBLAS kernel set in use (e.g. "Zen", "SkylakeX", "Haswell"). */
const char *bench_blas_core(void);

/* Peak resident set size of this process so far, MiB (getrusage). */
double bench_peak_rss_mib(void);
/* Linux: the resident set now (VmRSS) and its high-water mark since the
 * last bench_rss_reset (VmHWM; reset by writing 5 to /proc/self/clear_refs),
 * MiB; -1 where /proc does not tell. */
double bench_rss_mib(void);
double bench_hwm_mib(void);
void bench_rss_reset(void);

/* Best (minimum) and median of n values (n >= 1); the array is sorted. */
void bench_stats(double *v, int n, double *best, double *median);

/* Least-squares slope of log y against log x (n >= 2 points). */
double bench_fit_exponent(const double *x, const double *y, int n);

/* {"cpu": model name, "cores": online CPUs, "omp_max_threads",
 *  "blas_core", "load_average_1min", "cpu_flags": the vector flags of
 *  /proc/cpuinfo that the kernels depend on, "kernels_available",
 *  "kernel_default"} */
cJSON *bench_machine_json(void);

/* Write `root` to <dir>/results-<name>.json, dir = $CLEF_BENCH_DIR or
 * "bench"; atomic (temporary file + rename).  Returns 0 on success. */
int bench_json_write(const char *name, const cJSON *root);

#endif
