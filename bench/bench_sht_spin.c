/* Spin-2 analysis (Q, U -> a_E, a_B) against the spin-0 analysis of one
 * map in the same run (issue 16 target: <= 2.2x at nside 2048, lmax 4096).
 * Both without Jacobi iterations, runs interleaved, best of `reps`; wall
 * and thread-CPU times of the Legendre stage from clef_sht_timings.
 * Usage: bench_sht_spin [max_nside] (or CLEF_BENCH_MAX_NSIDE; default 2048).
 * Writes bench/results-sht_spin.json. */
#include <complex.h>
#include <stdio.h>
#include <stdlib.h>

#include <omp.h>

#include "clef/sht.h"
#include "common.h"

int main(int argc, char **argv)
{
    int64_t max_ns = 2048;
    const char *env = getenv("CLEF_BENCH_MAX_NSIDE");
    if (argc > 1)
        max_ns = atol(argv[1]);
    else if (env && *env)
        max_ns = atol(env);
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "bench", "sht_spin");
    cJSON_AddItemToObject(root, "machine", bench_machine_json());
    cJSON *cases = cJSON_AddArrayToObject(root, "cases");
    printf("spin-2 vs spin-0 analysis, %d threads, no iterations\n", omp_get_max_threads());
    printf("%6s %6s %10s %10s %7s %10s %10s %7s\n", "nside", "lmax", "spin0 s", "spin2 s", "ratio",
           "leg0 cpu", "leg2 cpu", "ratio");
    for (int64_t ns = 256; ns <= max_ns; ns *= 2) {
        const int lmax = (int)(2 * ns);
        const int64_t npix = 12 * ns * ns;
        const size_t nalm = clef_alm_size(lmax, lmax);
        double *q = malloc(npix * sizeof *q), *u = malloc(npix * sizeof *u);
        double complex *a0 = malloc(nalm * sizeof *a0), *ae = malloc(nalm * sizeof *ae),
                       *ab = malloc(nalm * sizeof *ab);
        clef_sht *p0;
        clef_sht_spin *p2;
        if (!q || !u || !a0 || !ae || !ab || clef_sht_create(&p0, ns, lmax, NULL) ||
            clef_sht_spin_create(&p2, ns, lmax, NULL)) {
            fprintf(stderr, "bench_sht_spin: setup failed at nside %lld: %s\n", (long long)ns,
                    clef_last_error());
            return 1;
        }
        unsigned s = 12345;
        for (int64_t i = 0; i < npix; i++) {
            s = s * 1103515245u + 12345u;
            q[i] = (double)(s >> 8) / (1 << 24) - 0.5;
            s = s * 1103515245u + 12345u;
            u[i] = (double)(s >> 8) / (1 << 24) - 0.5;
        }
        const int reps = ns >= 2048 ? 2 : 4;
        double t0[8], t2[8], l0[8], l2[8];
        for (int r = 0; r < reps; r++) {
            double w = bench_wtime(), lc;
            clef_sht_analysis(p0, 1, (const double *const *)&q, &a0, 0);
            t0[r] = bench_wtime() - w;
            clef_sht_timings(p0, NULL, NULL, NULL, &lc);
            l0[r] = lc;
            w = bench_wtime();
            clef_sht_spin_analysis(p2, 1, (const double *const *)&q, (const double *const *)&u,
                                   &ae, &ab, 0);
            t2[r] = bench_wtime() - w;
            clef_sht_timings(clef_sht_spin_plan(p2), NULL, NULL, NULL, &lc);
            l2[r] = lc;
        }
        double b0, b2, bl0, bl2, med;
        bench_stats(t0, reps, &b0, &med);
        bench_stats(t2, reps, &b2, &med);
        bench_stats(l0, reps, &bl0, &med);
        bench_stats(l2, reps, &bl2, &med);
        printf("%6lld %6d %10.3f %10.3f %7.2f %10.3f %10.3f %7.2f\n", (long long)ns, lmax, b0, b2,
               b2 / b0, bl0, bl2, bl2 / bl0);
        fflush(stdout);
        cJSON *c = cJSON_CreateObject();
        cJSON_AddNumberToObject(c, "nside", (double)ns);
        cJSON_AddNumberToObject(c, "lmax", lmax);
        cJSON_AddNumberToObject(c, "spin0_analysis_s", b0);
        cJSON_AddNumberToObject(c, "spin2_analysis_s", b2);
        cJSON_AddNumberToObject(c, "ratio_wall", b2 / b0);
        cJSON_AddNumberToObject(c, "legendre_cpu_ratio", bl2 / bl0);
        cJSON_AddItemToArray(cases, c);
        clef_sht_destroy(p0);
        clef_sht_spin_destroy(p2);
        free(q);
        free(u);
        free(a0);
        free(ae);
        free(ab);
    }
    const int rc = bench_json_write("sht_spin", root);
    cJSON_Delete(root);
    return rc;
}
