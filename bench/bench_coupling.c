/* Benchmark of the mode-coupling matrix (PERFORMANCE.md sections 1, 3, 4):
 * time for lmax 512, 1024, 2048, 3072 on 2 threads, the fitted exponent of
 * T ~ L^alpha, 3j kernel terms per second (model count
 * S = (L+1)(L+2)(L+3)/6, F_3j = 5 S flops) and their ratio to the FMA peak
 * measured in the same process, the ratio to one analysis (no iterations)
 * at nside 1024, lmax 2047 timed in the same run (interleaved A B A B), and
 * the coupling cache: hit time against compute time.
 *
 * Wall times on a shared machine also measure the other users, so CPU
 * times are reported too, and the kernel rate once more on one thread in
 * CPU seconds.  Writes bench/results-coupling.json (bench_json_write). */
#define _XOPEN_SOURCE 700
#include <complex.h>
#include <math.h>
#include <omp.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "clef/bins.h"
#include "clef/clef.h"
#include "clef/coupling.h"
#include "clef/sht.h"
#include "common.h"

#define NTHREADS 2
#define REPS 5
#define NS 4
static const int sizes[NS] = {512, 1024, 2048, 3072};

static double terms(int L) { return (L + 1.0) * (L + 2.0) * (L + 3.0) / 6.0; }

/* A sharp-edged mask's spectrum falls like l^-3; every W_l is non-zero so
 * no term of the kernel is skipped. */
static double *mask_spectrum(int L)
{
    double *wl = malloc((2 * (size_t)L + 1) * sizeof *wl);
    if (!wl)
        return NULL;
    for (int l = 0; l <= 2 * L; l++)
        wl[l] = 4 * M_PI * 0.6 * 0.6 / pow(1.0 + l, 3.0);
    return wl;
}

static int time_coupling(int L, const double *wl, double *wall, double *cpu)
{
    clef_coupling *c;
    const double c0 = bench_cputime(), t0 = bench_wtime();
    const int status = clef_coupling_create(&c, L, wl, 2 * L);
    *wall = bench_wtime() - t0;
    *cpu = bench_cputime() - c0;
    clef_coupling_destroy(c);
    if (status != CLEF_OK)
        fprintf(stderr, "bench_coupling: %s\n", clef_last_error());
    return status;
}

/* Best and median of the wall and CPU samples into o. */
static void add_times(cJSON *o, double *wall, double *cpu, int n, double *best_wall,
                      double *best_cpu)
{
    double med;
    bench_stats(wall, n, best_wall, &med);
    cJSON_AddNumberToObject(o, "best_s", *best_wall);
    cJSON_AddNumberToObject(o, "median_s", med);
    bench_stats(cpu, n, best_cpu, &med);
    cJSON_AddNumberToObject(o, "best_cpu_s", *best_cpu);
    cJSON_AddNumberToObject(o, "median_cpu_s", med);
}

/* Matrix times on `nthreads` threads for every size except those handled
 * elsewhere (the last, when skip_last). */
static int time_sizes(int nthreads, int skip_last, cJSON *arr, double *best_wall,
                      double *best_cpu)
{
    omp_set_num_threads(nthreads);
    for (int i = 0; i < NS - skip_last; i++) {
        double *wl = mask_spectrum(sizes[i]);
        double wall[REPS], cpu[REPS];
        if (!wl)
            return 1;
        for (int r = 0; r < REPS; r++)
            if (time_coupling(sizes[i], wl, &wall[r], &cpu[r]) != CLEF_OK)
                return 1;
        free(wl);
        cJSON *o = cJSON_CreateObject();
        cJSON_AddNumberToObject(o, "lmax", sizes[i]);
        add_times(o, wall, cpu, REPS, &best_wall[i], &best_cpu[i]);
        cJSON_AddItemToArray(arr, o);
    }
    return 0;
}

/* Rates of each entry of arr from the given times. */
static void add_rates(cJSON *arr, const double *t, const char *suffix, double peak)
{
    char key[64];
    for (int i = 0; i < NS; i++) {
        cJSON *e = cJSON_GetArrayItem(arr, i);
        const double gf = 5 * terms(sizes[i]) / t[i] * 1e-9;
        cJSON_AddNumberToObject(e, "terms", terms(sizes[i]));
        snprintf(key, sizeof key, "terms_per_%s", suffix);
        cJSON_AddNumberToObject(e, key, terms(sizes[i]) / t[i]);
        snprintf(key, sizeof key, "gflops_model_per_%s", suffix);
        cJSON_AddNumberToObject(e, key, gf);
        cJSON_AddNumberToObject(e, "fraction_of_fma_peak", gf / peak);
    }
}

int main(void)
{
    double xs[NS], best[NS], best_cpu[NS], best1[NS], best1_cpu[NS];
    for (int i = 0; i < NS; i++)
        xs[i] = sizes[i];
    const double t_start = bench_wtime();
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "bench", "coupling");
    cJSON_AddStringToObject(root, "clef_version", CLEF_VERSION);
    cJSON_AddItemToObject(root, "machine", bench_machine_json());
    cJSON_AddNumberToObject(root, "threads", NTHREADS);

    const double fma_n = bench_fma_peak(NTHREADS, 0.2, 3);
    const double fma_cpu = bench_fma_peak_cpu(1, 0.2, 3);
    cJSON *refs = cJSON_AddObjectToObject(root, "references");
    cJSON_AddNumberToObject(refs, "fma_peak_gflops_2_threads", fma_n);
    cJSON_AddNumberToObject(refs, "fma_peak_gflops_per_cpu_second", fma_cpu);

    /* 2 threads: all sizes but the largest, which runs interleaved with
     * the reference analysis below. */
    cJSON *arr = cJSON_AddArrayToObject(root, "coupling");
    if (time_sizes(NTHREADS, 1, arr, best, best_cpu))
        return 1;

    const int64_t nside = 1024;
    const int alm_lmax = 2047, L = sizes[NS - 1];
    clef_sht *plan;
    if (clef_sht_create(&plan, nside, alm_lmax, NULL) != CLEF_OK) {
        fprintf(stderr, "bench_coupling: %s\n", clef_last_error());
        return 1;
    }
    const int64_t npix = 12 * nside * nside;
    double *map = malloc((size_t)npix * sizeof *map);
    double complex *alm = malloc(clef_alm_size(alm_lmax, alm_lmax) * sizeof *alm);
    double *wl = mask_spectrum(L);
    if (!map || !alm || !wl) {
        fprintf(stderr, "bench_coupling: out of memory\n");
        return 1;
    }
    for (int64_t i = 0; i < npix; i++)
        map[i] = sin(0.001 * (double)i) + cos(1e-6 * (double)i * (double)(i % 977));
    double ta[REPS], tc[REPS], cpu_a[REPS], cpu_c[REPS];
    for (int r = 0; r < REPS; r++) {
        const double c0 = bench_cputime(), t0 = bench_wtime();
        if (clef_sht_analysis(plan, 1, (const double *const *)&map, &alm, 0) != CLEF_OK) {
            fprintf(stderr, "bench_coupling: %s\n", clef_last_error());
            return 1;
        }
        ta[r] = bench_wtime() - t0;
        cpu_a[r] = bench_cputime() - c0;
        if (time_coupling(L, wl, &tc[r], &cpu_c[r]) != CLEF_OK)
            return 1;
    }
    clef_sht_destroy(plan);
    free(map);
    free(alm);
    cJSON *o = cJSON_CreateObject();
    cJSON_AddNumberToObject(o, "lmax", L);
    add_times(o, tc, cpu_c, REPS, &best[NS - 1], &best_cpu[NS - 1]);
    cJSON_AddItemToArray(arr, o);
    double best_a, best_a_cpu;
    cJSON *an = cJSON_AddObjectToObject(root, "analysis_reference");
    cJSON_AddNumberToObject(an, "nside", (double)nside);
    cJSON_AddNumberToObject(an, "lmax", alm_lmax);
    cJSON_AddNumberToObject(an, "iterations", 0);
    add_times(an, ta, cpu_a, REPS, &best_a, &best_a_cpu);
    add_rates(arr, best, "s", fma_n);

    /* One thread, CPU seconds: the kernel rate without thread scheduling
     * in the figure (on a loaded machine the 2-thread times of the small
     * sizes are mostly waiting at the closing barrier). */
    cJSON *one = cJSON_AddArrayToObject(root, "coupling_1thread");
    if (time_sizes(1, 0, one, best1, best1_cpu))
        return 1;
    add_rates(one, best1_cpu, "cpu_s", fma_cpu);
    omp_set_num_threads(NTHREADS);

    const double alpha = bench_fit_exponent(xs, best, NS);
    const double alpha_cpu = bench_fit_exponent(xs, best_cpu, NS);
    const double alpha_1 = bench_fit_exponent(xs, best1_cpu, NS);
    cJSON_AddNumberToObject(root, "fitted_exponent", alpha);
    cJSON_AddNumberToObject(root, "fitted_exponent_cpu", alpha_cpu);
    cJSON_AddNumberToObject(root, "fitted_exponent_1thread_cpu", alpha_1);
    const double ratio = best[NS - 1] / best_a, ratio_cpu = best_cpu[NS - 1] / best_a_cpu;
    cJSON_AddNumberToObject(root, "ratio_coupling3072_to_analysis", ratio);
    cJSON_AddNumberToObject(root, "ratio_coupling3072_to_analysis_cpu", ratio_cpu);
    cJSON_AddNumberToObject(root, "target_ratio", 2.0);

    /* Cache: compute-and-store, then hits of M and of the binned K. */
    char dir[] = "/tmp/clef-bench-cache-XXXXXX";
    if (!mkdtemp(dir)) {
        perror("bench_coupling: mkdtemp");
        return 1;
    }
    clef_bins *bins;
    clef_coupling *m;
    clef_coupling_binned *k;
    int hit_m1, hit_m2, hit_k1, hit_k2;
    if (clef_bins_create_linear(&bins, 2, 30, L, CLEF_BINS_DL) != CLEF_OK)
        return 1;
    double t0 = bench_wtime();
    int st = clef_coupling_create_cached(&m, L, wl, 2 * L, dir, &hit_m1);
    const double t_store = bench_wtime() - t0;
    clef_coupling_destroy(m);
    t0 = bench_wtime();
    st |= clef_coupling_create_cached(&m, L, wl, 2 * L, dir, &hit_m2);
    const double t_hit_m = bench_wtime() - t0;
    clef_coupling_destroy(m);
    t0 = bench_wtime();
    st |= clef_coupling_binned_create_cached(&k, L, wl, 2 * L, bins, NULL, NULL, dir, &hit_k1);
    const double t_k_first = bench_wtime() - t0; /* M from the cache, K stored */
    clef_coupling_binned_destroy(k);
    t0 = bench_wtime();
    st |= clef_coupling_binned_create_cached(&k, L, wl, 2 * L, bins, NULL, NULL, dir, &hit_k2);
    const double t_hit_k = bench_wtime() - t0;
    clef_coupling_binned_destroy(k);
    clef_bins_destroy(bins);
    free(wl);
    char cmd[128];
    snprintf(cmd, sizeof cmd, "rm -rf %s", dir);
    if (system(cmd) != 0)
        fprintf(stderr, "bench_coupling: could not remove %s\n", dir);
    if (st != CLEF_OK || hit_m1 || !hit_m2 || hit_k1 || !hit_k2) {
        fprintf(stderr, "bench_coupling: cache did not behave (%s)\n", clef_last_error());
        return 1;
    }
    cJSON *ca = cJSON_AddObjectToObject(root, "cache");
    cJSON_AddNumberToObject(ca, "lmax", L);
    cJSON_AddNumberToObject(ca, "compute_s", best[NS - 1]);
    cJSON_AddNumberToObject(ca, "compute_and_store_s", t_store);
    cJSON_AddNumberToObject(ca, "hit_unbinned_s", t_hit_m);
    cJSON_AddNumberToObject(ca, "binned_first_s", t_k_first);
    cJSON_AddNumberToObject(ca, "hit_binned_s", t_hit_k);
    cJSON_AddNumberToObject(root, "peak_rss_mib", bench_peak_rss_mib());
    cJSON_AddNumberToObject(root, "total_wall_s", bench_wtime() - t_start);

    printf("coupling matrix, %d threads; FMA peak %.1f GFLOP/s (%d threads), %.1f per CPU s\n",
           NTHREADS, fma_n, NTHREADS, fma_cpu);
    for (int i = 0; i < NS; i++)
        printf("  lmax %4d: %8.4f s (%.4f CPU s)  %.3g 3j terms/s  %.1f GFLOP/s (model 5 S)\n",
               sizes[i], best[i], best_cpu[i], terms(sizes[i]) / best[i],
               5 * terms(sizes[i]) / best[i] * 1e-9);
    printf("  1 thread, CPU s:");
    for (int i = 0; i < NS; i++)
        printf(" %d: %.4f (%.3g terms/s, %.0f%% of FMA peak)%s", sizes[i], best1_cpu[i],
               terms(sizes[i]) / best1_cpu[i],
               100 * 5 * terms(sizes[i]) / best1_cpu[i] * 1e-9 / fma_cpu, i + 1 < NS ? "," : "\n");
    printf("  fitted exponent: %.2f wall, %.2f CPU, %.2f 1-thread CPU (expect ~3)\n", alpha,
           alpha_cpu, alpha_1);
    printf("  analysis nside %lld lmax %d: %.3f s (%.3f CPU s); coupling lmax %d / analysis = "
           "%.2f wall, %.2f CPU (target <= 2)\n", (long long)nside, alm_lmax, best_a,
           best_a_cpu, L, ratio, ratio_cpu);
    printf("  cache at lmax %d: compute %.3f s, M hit %.3f s, binned K hit %.4f s (wall)\n", L,
           best[NS - 1], t_hit_m, t_hit_k);
    const int rc = bench_json_write("coupling", root);
    cJSON_Delete(root);
    return rc != 0;
}
