/* T+P end to end with a warm cache against one T+P analysis in the same
 * run (issue 16 target: <= 1.5x).  The sky is white noise in T, Q, U (the
 * cost does not depend on the spectrum), the mask a latitude cut apodized
 * with a C2 kernel; default lmax (2 nside, whole bins), 1 iteration (the
 * estimator's default).  "One T+P analysis" = the spin-0 analysis of the
 * weighted T plus the spin-2 analysis of the weighted Q, U to the same
 * lmax_ext with the same iterations, plans included.  Usage:
 * bench_spectrum_pol [nside] (default 512, or CLEF_BENCH_POL_NSIDE).
 * Both sides are timed in wall and in process CPU seconds (the CPU ratio
 * is the steadier one when other programs share the cores; with several
 * threads it includes the threads' idle spinning).  CLEF_BENCH_POL_CACHE
 * names a coupling cache directory to use and keep (repeated runs skip
 * the cold computation); by default a temporary one is made and removed.
 * CLEF_BENCH_POL_REPS (1..8) sets the repetitions (default 3, 2 from
 * nside 1024); best of them.
 * Writes bench/results-spectrum_pol.json. */
#define _DEFAULT_SOURCE /* mkdtemp */
#include <complex.h>
#include <stdio.h>
#include <stdlib.h>
#include <unistd.h>

#include <omp.h>

#include "clef/mask.h"
#include "clef/sht.h"
#include "clef/spectrum.h"
#include "common.h"

int main(int argc, char **argv)
{
    int64_t ns = 512;
    const char *env = getenv("CLEF_BENCH_POL_NSIDE");
    if (argc > 1)
        ns = atol(argv[1]);
    else if (env && *env)
        ns = atol(env);
    char cache[4096] = "/tmp/clef-bench-pol-XXXXXX";
    const char *keep = getenv("CLEF_BENCH_POL_CACHE");
    if (keep && *keep)
        snprintf(cache, sizeof cache, "%s", keep);
    else if (!mkdtemp(cache))
        return 1;
    clef_map_pol f = {0};
    clef_map *cut, *mask;
    if (clef_map_alloc(&f.t, ns) || clef_map_alloc(&f.q, ns) || clef_map_alloc(&f.u, ns) ||
        clef_mask_full(&cut, ns) || clef_mask_cut_latitude(cut, 0.35))
        return 1;
    clef_mask_apod_opts ao = {.kind = CLEF_MASK_APOD_C2, .scale = 0.1};
    if (clef_mask_apodize(&mask, cut, &ao))
        return 1;
    unsigned s = 7;
    for (int64_t i = 0; i < f.t->npix; i++) {
        double v[3];
        for (int k = 0; k < 3; k++) {
            s = s * 1103515245u + 12345u;
            v[k] = (double)(s >> 8) / (1 << 24) - 0.5;
        }
        f.t->pix[i] = 100 * v[0];
        f.q->pix[i] = 5 * v[1];
        f.u->pix[i] = 5 * v[2];
    }
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.cache_dir = cache;
    o.find_peak = 0;
    o.pixel_window = 0;
    clef_spectrum_pol_result res;
    double w = bench_wtime();
    if (clef_spectrum_pol_compute(&f, NULL, mask, NULL, &o, NULL, 0, &res)) {
        fprintf(stderr, "bench_spectrum_pol: %s\n", clef_last_error());
        return 1;
    }
    const double cold = bench_wtime() - w;
    const int L = res.lmax_ext;
    clef_spectrum_pol_result_free(&res);
    int reps = ns >= 1024 ? 2 : 3;
    const char *renv = getenv("CLEF_BENCH_POL_REPS"); /* 1..8 */
    if (renv && atoi(renv) >= 1 && atoi(renv) <= 8)
        reps = atoi(renv);
    double warm[8], ana[8], warm_cpu[8], ana_cpu[8];
    const size_t na = clef_alm_size(L, L);
    double complex *at = malloc(na * sizeof *at), *ae = malloc(na * sizeof *ae),
                   *ab = malloc(na * sizeof *ab);
    double *wt = malloc(f.t->npix * sizeof *wt), *wq = malloc(f.t->npix * sizeof *wq),
           *wu = malloc(f.t->npix * sizeof *wu);
    for (int64_t i = 0; i < f.t->npix; i++) {
        wt[i] = f.t->pix[i] * mask->pix[i];
        wq[i] = f.q->pix[i] * mask->pix[i];
        wu[i] = f.u->pix[i] * mask->pix[i];
    }
    for (int r = 0; r < reps; r++) {
        double c = bench_cputime();
        w = bench_wtime();
        if (clef_spectrum_pol_compute(&f, NULL, mask, NULL, &o, NULL, 0, &res))
            return 1;
        warm[r] = bench_wtime() - w;
        warm_cpu[r] = bench_cputime() - c;
        if (!res.pol_cache_hit || !res.tt.cache_hit)
            fprintf(stderr, "bench_spectrum_pol: warm run missed the cache\n");
        clef_spectrum_pol_result_free(&res);
        c = bench_cputime();
        w = bench_wtime();
        clef_sht *p0;
        clef_sht_spin *p2;
        clef_sht_create(&p0, ns, L, NULL);
        clef_sht_analysis(p0, 1, (const double *const *)&wt, &at, o.iterations);
        clef_sht_destroy(p0);
        clef_sht_spin_create(&p2, ns, L, NULL);
        clef_sht_spin_analysis(p2, 1, (const double *const *)&wq, (const double *const *)&wu, &ae,
                               &ab, o.iterations);
        clef_sht_spin_destroy(p2);
        ana[r] = bench_wtime() - w;
        ana_cpu[r] = bench_cputime() - c;
    }
    double bw, ba, bwc, bac, med;
    bench_stats(warm, reps, &bw, &med);
    bench_stats(ana, reps, &ba, &med);
    bench_stats(warm_cpu, reps, &bwc, &med);
    bench_stats(ana_cpu, reps, &bac, &med);
    printf("T+P spectrum, nside %lld, lmax_ext %d, %d threads: cold %.2f s, warm (cached) %.2f s, "
           "one T+P analysis %.2f s, ratio %.2f; CPU: warm %.2f s, analysis %.2f s, ratio %.2f\n",
           (long long)ns, L, omp_get_max_threads(), cold, bw, ba, bw / ba, bwc, bac, bwc / bac);
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "bench", "spectrum_pol");
    cJSON_AddItemToObject(root, "machine", bench_machine_json());
    cJSON_AddNumberToObject(root, "nside", (double)ns);
    cJSON_AddNumberToObject(root, "lmax_ext", L);
    cJSON_AddNumberToObject(root, "cold_s", cold);
    cJSON_AddNumberToObject(root, "warm_s", bw);
    cJSON_AddNumberToObject(root, "tp_analysis_s", ba);
    cJSON_AddNumberToObject(root, "ratio", bw / ba);
    cJSON_AddNumberToObject(root, "warm_cpu_s", bwc);
    cJSON_AddNumberToObject(root, "tp_analysis_cpu_s", bac);
    cJSON_AddNumberToObject(root, "ratio_cpu", bwc / bac);
    const int rc = bench_json_write("spectrum_pol", root);
    cJSON_Delete(root);
    char cmd[4200];
    snprintf(cmd, sizeof cmd, "rm -rf '%s'", cache);
    if (!(keep && *keep) && system(cmd) != 0)
        fprintf(stderr, "bench_spectrum_pol: could not remove %s\n", cache);
    free(at);
    free(ae);
    free(ab);
    free(wt);
    free(wq);
    free(wu);
    clef_map_pol_free(&f);
    clef_map_free(cut);
    clef_map_free(mask);
    return rc;
}
