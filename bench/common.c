/* Benchmark helpers (bench/common.h). */
#define _GNU_SOURCE
#include "common.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <sys/resource.h>

#include <cblas.h>
#include <omp.h>

#include "clef/clef.h"

double bench_wtime(void) { return clef_wtime(); }

double bench_cputime(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

clef_kernel bench_default_kernel(void)
{
    clef_kernel k = CLEF_KERNEL_BASE;
    if (clef_kernel_resolve(CLEF_KERNEL_AUTO, &k) != CLEF_OK)
        fprintf(stderr, "bench: %s; using the baseline kernel\n", clef_last_error());
    return k;
}

int bench_kernel_lanes(clef_kernel k)
{
    return k == CLEF_KERNEL_AVX512 ? 8 : k == CLEF_KERNEL_AVX2 ? 4 : 2;
}

static bench_fma_fn fma_fn(clef_kernel k)
{
    if (!clef_kernel_available(k))
        return NULL;
    return k == CLEF_KERNEL_AVX512 ? bench_fma_avx512
         : k == CLEF_KERNEL_AVX2   ? bench_fma_avx2
                                   : bench_fma_base;
}

static double thread_cputime(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

/* One timed parallel run of fma_loop; GFLOP/s per wall second, or per CPU
 * second of the working threads (their own CPU clocks, summed). */
static double fma_run(bench_fma_fn loop, int lanes, int nthreads, long iters, int per_cpu)
{
    double sum = 0.0, cpu = 0.0;
    const double t0 = bench_wtime();
#pragma omp parallel num_threads(nthreads) reduction(+ : sum, cpu)
    {
        const double c0 = thread_cputime();
        sum += loop(iters, 1.0 + omp_get_thread_num());
        cpu += thread_cputime() - c0;
    }
    const double t = per_cpu ? cpu : bench_wtime() - t0;
    volatile double sink = sum;
    (void)sink;
    return nthreads * 2.0 * lanes * BENCH_FMA_ACC * (double)iters / t * 1e-9;
}

static double fma_peak(clef_kernel k, int nthreads, double seconds, int reps, int per_cpu)
{
    const bench_fma_fn loop = fma_fn(k);
    const int lanes = bench_kernel_lanes(k);
    if (!loop)
        return NAN;
    /* Calibrate: iterations for about `seconds` at the single-run rate. */
    volatile long probe = 1 << 18;
    const double g = fma_run(loop, lanes, nthreads, probe, 0);
    long iters = (long)(g * 1e9 * seconds / (nthreads * 2.0 * lanes * BENCH_FMA_ACC));
    if (iters < 1000)
        iters = 1000;
    double best = 0.0;
    for (int r = 0; r < reps; r++) {
        const double v = fma_run(loop, lanes, nthreads, iters, per_cpu);
        best = v > best ? v : best;
    }
    return best;
}

double bench_fma_peak_kernel(clef_kernel k, int nthreads, double seconds, int reps)
{
    return fma_peak(k, nthreads, seconds, reps, 0);
}

double bench_fma_peak_kernel_cpu(clef_kernel k, int nthreads, double seconds, int reps)
{
    return fma_peak(k, nthreads, seconds, reps, 1);
}

double bench_fma_peak(int nthreads, double seconds, int reps)
{
    return fma_peak(bench_default_kernel(), nthreads, seconds, reps, 0);
}

double bench_fma_peak_cpu(int nthreads, double seconds, int reps)
{
    return fma_peak(bench_default_kernel(), nthreads, seconds, reps, 1);
}

double bench_dgemm(int n, int nthreads, int reps)
{
    const size_t nn = (size_t)n * (size_t)n;
    double *a = malloc(nn * sizeof *a), *b = malloc(nn * sizeof *b), *c = malloc(nn * sizeof *c);
    if (!a || !b || !c) {
        free(a);
        free(b);
        free(c);
        return NAN;
    }
    for (size_t i = 0; i < nn; i++) {
        a[i] = (double)((i * 2654435761u) % 1000) / 1000.0 - 0.5;
        b[i] = (double)((i * 40503u) % 997) / 997.0 - 0.5;
    }
    openblas_set_num_threads(nthreads);
    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, n, n, n, 1.0, a, n, b, n, 0.0, c, n);
    double best = 0.0;
    for (int r = 0; r < reps; r++) {
        const double t0 = bench_wtime();
        cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, n, n, n, 1.0, a, n, b, n, 0.0, c, n);
        const double t = bench_wtime() - t0;
        const double g = 2.0 * n * (double)n * n / t * 1e-9;
        best = g > best ? g : best;
    }
    free(a);
    free(b);
    free(c);
    return best;
}

const char *bench_blas_core(void)
{
    const char *s = openblas_get_corename();
    return s ? s : "unknown";
}

double bench_peak_rss_mib(void)
{
    struct rusage ru;
    getrusage(RUSAGE_SELF, &ru);
    return (double)ru.ru_maxrss / 1024.0; /* Linux: KiB */
}

static double status_mib(const char *key)
{
    FILE *f = fopen("/proc/self/status", "r");
    if (!f)
        return -1;
    char line[256];
    double v = -1;
    const size_t n = strlen(key);
    while (fgets(line, sizeof line, f))
        if (!strncmp(line, key, n)) {
            v = atof(line + n) / 1024.0; /* kB */
            break;
        }
    fclose(f);
    return v;
}

double bench_rss_mib(void)
{
    return status_mib("VmRSS:");
}

double bench_hwm_mib(void)
{
    return status_mib("VmHWM:");
}

void bench_rss_reset(void)
{
    FILE *f = fopen("/proc/self/clear_refs", "w");
    if (f) {
        fputs("5", f);
        fclose(f);
    }
}

static int cmp_double(const void *a, const void *b)
{
    const double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

void bench_stats(double *v, int n, double *best, double *median)
{
    qsort(v, (size_t)n, sizeof *v, cmp_double);
    *best = v[0];
    *median = n % 2 ? v[n / 2] : 0.5 * (v[n / 2 - 1] + v[n / 2]);
}

double bench_fit_exponent(const double *x, const double *y, int n)
{
    double sx = 0, sy = 0, sxx = 0, sxy = 0;
    for (int i = 0; i < n; i++) {
        const double lx = log(x[i]), ly = log(y[i]);
        sx += lx;
        sy += ly;
        sxx += lx * lx;
        sxy += lx * ly;
    }
    return (n * sxy - sx * sy) / (n * sxx - sx * sx);
}

cJSON *bench_machine_json(void)
{
    cJSON *m = cJSON_CreateObject();
    char model[256] = "unknown";
    FILE *f = fopen("/proc/cpuinfo", "r");
    if (f) {
        char line[512];
        while (fgets(line, sizeof line, f))
            if (!strncmp(line, "model name", 10)) {
                const char *c = strchr(line, ':');
                if (c) {
                    snprintf(model, sizeof model, "%s", c + 2);
                    model[strcspn(model, "\n")] = 0;
                }
                break;
            }
        fclose(f);
    }
    cJSON *flags = cJSON_CreateArray();
    f = fopen("/proc/cpuinfo", "r");
    if (f) {
        static const char *const want[] = {"sse2", "avx", "fma", "avx2", "avx512f", "avx512dq",
                                           "avx512vl", "asimd", "sve"};
        char line[8192];
        while (fgets(line, sizeof line, f)) {
            if (strncmp(line, "flags", 5) && strncmp(line, "Features", 8))
                continue;
            for (size_t i = 0; i < sizeof want / sizeof *want; i++) {
                char pat[32];
                snprintf(pat, sizeof pat, " %s", want[i]);
                const char *h = strstr(line, pat);
                const size_t n = strlen(pat);
                if (h && (h[n] == ' ' || h[n] == '\n' || h[n] == 0))
                    cJSON_AddItemToArray(flags, cJSON_CreateString(want[i]));
            }
            break;
        }
        fclose(f);
    }
    cJSON *avail = cJSON_CreateArray();
    for (int k = CLEF_KERNEL_COUNT - 1; k > CLEF_KERNEL_AUTO; k--)
        if (clef_kernel_available((clef_kernel)k))
            cJSON_AddItemToArray(avail, cJSON_CreateString(clef_kernel_name((clef_kernel)k)));
    double load[1] = {NAN};
    getloadavg(load, 1);
    cJSON_AddStringToObject(m, "cpu", model);
    cJSON_AddNumberToObject(m, "cores", (double)sysconf(_SC_NPROCESSORS_ONLN));
    cJSON_AddNumberToObject(m, "omp_max_threads", omp_get_max_threads());
    cJSON_AddStringToObject(m, "blas_core", bench_blas_core());
    cJSON_AddNumberToObject(m, "load_average_1min", load[0]);
    cJSON_AddItemToObject(m, "cpu_flags", flags);
    cJSON_AddItemToObject(m, "kernels_available", avail);
    cJSON_AddStringToObject(m, "kernel_default", clef_kernel_name(bench_default_kernel()));
    return m;
}

int bench_json_write(const char *name, const cJSON *root)
{
    const char *dir = getenv("CLEF_BENCH_DIR");
    char path[1024];
    snprintf(path, sizeof path, "%s/results-%s.json", dir && *dir ? dir : "bench", name);
    char *text = cJSON_Print(root);
    if (!text)
        return -1;
    clef_outfile o;
    int rc = -1;
    if (clef_outfile_begin(&o, path) == CLEF_OK) {
        FILE *f = fopen(o.tmp_path, "w");
        if (f) {
            const int ok = fputs(text, f) >= 0 && fputc('\n', f) != EOF;
            if (fclose(f) == 0 && ok && clef_outfile_commit(&o) == CLEF_OK)
                rc = 0;
        }
        if (rc)
            clef_outfile_abort(&o);
    }
    cJSON_free(text);
    if (rc)
        fprintf(stderr, "bench: cannot write %s\n", path);
    return rc;
}
