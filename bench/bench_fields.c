/* Benchmark of the estimator of many fields (issue 12 targets): 6 maps at
 * nside 1024 with 2 masks, all 21 spectra with the coupling cached, against
 * one analysis of one map measured in the same run (target: <= 8 analyses'
 * time); peak resident memory after runs of 6 and of 12 maps (the a_lm of
 * N maps plus one map buffer, not N maps, besides the caller's maps).
 * BENCH_FIELDS_NSIDE overrides the nside (a quick check).  Writes
 * bench/results-fields.json. */
#define _GNU_SOURCE
#include <complex.h>
#include <math.h>
#include <omp.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/cosmo.h"
#include "clef/estimator.h"
#include "clef/mask.h"
#include "clef/sht.h"
#include "clef/sim.h"
#include "clef/theory.h"
#include "common.h"

static void die(const char *what)
{
    fprintf(stderr, "bench_fields: %s: %s\n", what, clef_last_error());
    exit(1);
}

static clef_map *cut_mask(int64_t nside, double deg)
{
    clef_map *bin = NULL, *m = NULL;
    if (clef_mask_full(&bin, nside) != CLEF_OK || clef_mask_cut_latitude(bin, deg * M_PI / 180))
        die("mask");
    clef_mask_apod_opts ao = {0};
    ao.kind = CLEF_MASK_APOD_C2;
    ao.scale = 2 * M_PI / 180;
    if (clef_mask_apodize(&m, bin, &ao) != CLEF_OK)
        die("apodize");
    clef_map_free(bin);
    return m;
}

/* n maps of one analytic sky with their own 20 uK-arcmin noise. */
static void make_maps(int64_t nside, int n, clef_map **maps)
{
    const int lsim = 3 * (int)nside - 1;
    clef_cosmo_params cp;
    clef_cosmo_params_planck2018(&cp);
    double *cl = calloc((size_t)lsim + 1, sizeof *cl);
    clef_sht *sht = NULL;
    if (clef_theory_cl(&cp, lsim, cl) != CLEF_OK || clef_sht_create(&sht, nside, lsim, NULL))
        die("theory/plan");
    if (clef_map_alloc(&maps[0], nside) != CLEF_OK)
        die("map");
    clef_sim_opts so = {0};
    so.seed = 42;
    so.pixel_window = 1;
    double *m0[1] = {maps[0]->pix};
    if (clef_sim_map(sht, cl, &so, NULL, m0, NULL) != CLEF_OK)
        die("simulate");
    for (int i = 1; i < n; i++) {
        if (clef_map_alloc(&maps[i], nside) != CLEF_OK)
            die("map");
        memcpy(maps[i]->pix, maps[0]->pix, (size_t)maps[0]->npix * sizeof(double));
    }
    for (int i = 0; i < n; i++)
        if (clef_sim_noise(nside, 20.0, NULL, 100 + i, CLEF_SIM_STREAM_NOISE1, maps[i]->pix,
                           NULL) != CLEF_OK)
            die("noise");
    clef_sht_destroy(sht);
    free(cl);
}

static double run(int n, clef_map **maps, clef_map *const masks[2], int *npairs, int *nsht,
                  cJSON *stages)
{
    static const char *const names[] = {"m0", "m1", "m2", "m3", "m4", "m5", "m6", "m7",
                                        "m8", "m9", "m10", "m11"};
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.find_peak = 0;
    clef_estimator *e = NULL;
    const double t0 = bench_wtime();
    if (clef_estimator_create(&e, &o, 0) != CLEF_OK)
        die("create");
    for (int i = 0; i < n; i++) {
        clef_field f;
        clef_field_init(&f);
        f.name = names[i];
        f.maps[0] = maps[i];
        f.mask = masks[i % 2];
        if (clef_estimator_add_field(e, &f) != CLEF_OK)
            die("field");
    }
    if (clef_estimator_compute(e) != CLEF_OK)
        die("compute");
    const double t = bench_wtime() - t0;
    *npairs = clef_estimator_npairs(e);
    clef_estimator_transforms(e, nsht, NULL);
    if (stages) {
        const clef_spectrum_result *r = clef_estimator_result(e, 0);
        for (int i = 0; i < r->nstages; i++)
            cJSON_AddNumberToObject(stages, r->stage[i].name, r->stage[i].seconds);
    }
    clef_estimator_destroy(e);
    return t;
}

int main(void)
{
    const char *env = getenv("BENCH_FIELDS_NSIDE");
    const int64_t nside = env ? atoll(env) : 1024;
    const int lmax = 3 * (int)nside - 1;
    clef_map *maps[12] = {0};
    clef_map *masks[2] = {cut_mask(nside, 20), cut_mask(nside, 30)};
    make_maps(nside, 12, maps);
    const double rss_inputs = bench_peak_rss_mib();

    /* One analysis of one weighted map to the estimator's lmax (3 nside - 1
     * with the pixel window only), best of 3. */
    clef_sht *sht = NULL;
    if (clef_sht_create(&sht, nside, lmax, NULL) != CLEF_OK)
        die("plan");
    double complex *alm = malloc(clef_alm_size(lmax, lmax) * sizeof *alm);
    double best = 1e30;
    for (int r = 0; r < 3; r++) {
        const double *in[1] = {maps[0]->pix};
        double complex *out[1] = {alm};
        const double t0 = bench_wtime();
        if (clef_sht_analysis(sht, 1, in, out, CLEF_SPECTRUM_ITERATIONS) != CLEF_OK)
            die("analysis");
        best = fmin(best, bench_wtime() - t0);
    }
    clef_sht_destroy(sht);
    free(alm);

    int np = 0, ns = 0;
    const double t_first = run(6, maps, masks, &np, &ns, NULL);
    cJSON *j = cJSON_CreateObject();
    cJSON *st = cJSON_CreateObject();
    const double t_cached = run(6, maps, masks, &np, &ns, st);
    const double rss6 = bench_peak_rss_mib();
    int np12 = 0, ns12 = 0;
    const double t12 = run(12, maps, masks, &np12, &ns12, NULL);
    const double rss12 = bench_peak_rss_mib();

    const double map_mib = 12.0 * nside * nside * 8 / 1048576.0;
    const double alm_mib = clef_alm_size(lmax, lmax) * 16.0 / 1048576.0;
    cJSON_AddItemToObject(j, "machine", bench_machine_json());
    cJSON_AddNumberToObject(j, "nside", (double)nside);
    cJSON_AddNumberToObject(j, "lmax_analysed", lmax);
    cJSON_AddNumberToObject(j, "analysis_best_s", best);
    cJSON_AddNumberToObject(j, "six_maps_first_run_s", t_first);
    cJSON_AddNumberToObject(j, "six_maps_cached_s", t_cached);
    cJSON_AddItemToObject(j, "six_maps_cached_stages_s", st);
    cJSON_AddNumberToObject(j, "six_maps_pairs", np);
    cJSON_AddNumberToObject(j, "six_maps_map_transforms", ns);
    cJSON_AddNumberToObject(j, "ratio_cached_to_analysis", t_cached / best);
    cJSON_AddNumberToObject(j, "target_ratio", 8);
    cJSON_AddNumberToObject(j, "twelve_maps_s", t12);
    cJSON_AddNumberToObject(j, "twelve_maps_pairs", np12);
    cJSON_AddNumberToObject(j, "map_mib", map_mib);
    cJSON_AddNumberToObject(j, "alm_mib", alm_mib);
    cJSON_AddNumberToObject(j, "peak_rss_inputs_mib", rss_inputs);
    cJSON_AddNumberToObject(j, "peak_rss_after_6_mib", rss6);
    cJSON_AddNumberToObject(j, "peak_rss_after_12_mib", rss12);
    printf("nside %lld: one analysis %.3f s; 6 maps, %d spectra, cached coupling %.3f s = %.2f "
           "analyses (target <= 8; first run %.3f s); 12 maps %.3f s\n",
           (long long)nside, best, np, t_cached, t_cached / best, t_first, t12);
    printf("peak RSS: inputs (12 maps + 2 masks) %.0f MiB, after 6 maps %.0f MiB, after 12 "
           "maps %.0f MiB (one map %.0f MiB, one a_lm %.0f MiB)\n",
           rss_inputs, rss6, rss12, map_mib, alm_mib);
    const int rc = bench_json_write("fields", j);
    cJSON_Delete(j);
    for (int i = 0; i < 12; i++)
        clef_map_free(maps[i]);
    clef_map_free(masks[0]);
    clef_map_free(masks[1]);
    return rc;
}
