/* Benchmark of the estimator of many fields (issue 12 targets): 6 maps at
 * nside 1024 with 2 masks, all 21 spectra with the coupling cached, against
 * one analysis of one map measured in the same run (target: <= 8 analyses'
 * time); peak resident memory after runs of 6 and of 12 maps (the a_lm of
 * N maps plus one map buffer, not N maps, besides the caller's maps).
 * BENCH_FIELDS_NSIDE overrides the nside (a quick check).  Writes
 * bench/results-fields.json. */
#define _GNU_SOURCE
#include <time.h>
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

/* CPU seconds of the process (all threads): on a shared machine the wall
 * time carries the other jobs' load, the CPU time of a 1-thread run does
 * not. */
static double cpu_s(void)
{
    struct timespec t;
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &t);
    return (double)t.tv_sec + 1e-9 * (double)t.tv_nsec;
}

static double last_cpu; /* CPU seconds of the last run() */

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

/* The maps of the run: one analytic sky, and map i = the sky plus its own
 * 20 uK-arcmin noise (seed 100 + i), made when asked for. */
typedef struct sky {
    int64_t nside;
    clef_map *sky;
} sky;

static void make_sky(int64_t nside, sky *k)
{
    const int lsim = 3 * (int)nside - 1;
    clef_cosmo_params cp;
    clef_cosmo_params_planck2018(&cp);
    double *cl = calloc((size_t)lsim + 1, sizeof *cl);
    clef_sht *sht = NULL;
    if (clef_theory_cl(&cp, lsim, cl) != CLEF_OK || clef_sht_create(&sht, nside, lsim, NULL))
        die("theory/plan");
    k->nside = nside;
    if (clef_map_alloc(&k->sky, nside) != CLEF_OK)
        die("map");
    clef_sim_opts so = {0};
    so.seed = 42;
    so.pixel_window = 1;
    double *m0[1] = {k->sky->pix};
    if (clef_sim_map(sht, cl, &so, NULL, m0, NULL) != CLEF_OK)
        die("simulate");
    clef_sht_destroy(sht);
    free(cl);
}

static int make_map(const sky *k, int i, clef_map **out)
{
    int status = clef_map_copy(out, k->sky);
    if (status == CLEF_OK)
        status = clef_sim_noise(k->nside, 20.0, NULL, 100 + (uint64_t)i, CLEF_SIM_STREAM_NOISE1,
                                (*out)->pix, NULL);
    return status;
}

/* The loader of field i (clef_field.load_map): the map made afresh, as a
 * reader would read it from its file. */
typedef struct loader {
    const sky *k;
    int i;
} loader;

static int load_map(void *arg, int split, clef_map **out)
{
    (void)split;
    const loader *l = arg;
    return make_map(l->k, l->i, out);
}

/* One estimator of n fields (field i: mask i mod 2), its maps in memory
 * (maps) or read on demand (maps NULL); wall time of create to compute.
 * joint: with the cross-pair blocks of the covariance (as `clef spectrum
 * --run` by default).  dl, when given, receives every pair's band powers. */
static double run(int n, clef_map **maps, const sky *k, clef_map *const masks[2], int joint,
                  int *npairs, int *nsht, cJSON *stages, double *dl)
{
    static const char *const names[] = {"m0", "m1", "m2", "m3", "m4", "m5", "m6", "m7",
                                        "m8", "m9", "m10", "m11"};
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.find_peak = 0;
    loader ld[12];
    clef_estimator *e = NULL;
    const double t0 = bench_wtime(), c0 = cpu_s();
    if (clef_estimator_create(&e, &o, joint) != CLEF_OK)
        die("create");
    for (int i = 0; i < n; i++) {
        clef_field f;
        clef_field_init(&f);
        f.name = names[i];
        if (maps) {
            f.maps[0] = maps[i];
        } else {
            ld[i].k = k;
            ld[i].i = i;
            f.load_map = load_map;
            f.load_arg = &ld[i];
        }
        f.mask = masks[i % 2];
        if (clef_estimator_add_field(e, &f) != CLEF_OK)
            die("field");
    }
    if (clef_estimator_compute(e) != CLEF_OK)
        die("compute");
    const double t = bench_wtime() - t0;
    last_cpu = cpu_s() - c0;
    *npairs = clef_estimator_npairs(e);
    clef_estimator_transforms(e, nsht, NULL);
    const clef_spectrum_result *r = clef_estimator_result(e, 0);
    if (stages)
        for (int i = 0; i < r->nstages; i++)
            cJSON_AddNumberToObject(stages, r->stage[i].name, r->stage[i].seconds);
    for (int p = 0; dl && p < *npairs; p++)
        memcpy(dl + (size_t)p * r->nbins, clef_estimator_result(e, p)->bp->dl,
               (size_t)r->nbins * sizeof *dl);
    clef_estimator_destroy(e);
    return t;
}

int main(void)
{
    const char *env = getenv("BENCH_FIELDS_NSIDE");
    const int64_t nside = env ? atoll(env) : 1024;
    const int lmax = 3 * (int)nside - 1;
    clef_map *maps[6] = {0};
    clef_map *masks[2] = {cut_mask(nside, 20), cut_mask(nside, 30)};
    sky k;
    make_sky(nside, &k);
    for (int i = 0; i < 6; i++)
        if (make_map(&k, i, &maps[i]) != CLEF_OK)
            die("map");

    /* One analysis of one weighted map to the estimator's lmax (3 nside - 1
     * with the pixel window only), best of 3. */
    clef_sht *sht = NULL;
    if (clef_sht_create(&sht, nside, lmax, NULL) != CLEF_OK)
        die("plan");
    double complex *alm = malloc(clef_alm_size(lmax, lmax) * sizeof *alm);
    double best = 1e30, best_cpu = 1e30;
    for (int r = 0; r < 3; r++) {
        const double *in[1] = {maps[0]->pix};
        double complex *out[1] = {alm};
        const double t0 = bench_wtime(), c0 = cpu_s();
        if (clef_sht_analysis(sht, 1, in, out, CLEF_SPECTRUM_ITERATIONS) != CLEF_OK)
            die("analysis");
        best = fmin(best, bench_wtime() - t0);
        best_cpu = fmin(best_cpu, cpu_s() - c0);
    }
    clef_sht_destroy(sht);
    free(alm);

    int np = 0, ns = 0, np12 = 0, ns12 = 0;
    /* First run with the joint covariance: every coupling and kernel cached. */
    const double t_first = run(6, maps, &k, masks, 1, &np, &ns, NULL, NULL);
    cJSON *j = cJSON_CreateObject();
    cJSON *st = cJSON_CreateObject(), *st_od = cJSON_CreateObject();
    double *dl_mem = calloc(4096 * 21, sizeof *dl_mem), *dl_od = calloc(4096 * 21, sizeof *dl_od);
    /* Peak resident memory of each run: the high-water mark reset before
     * it (VmHWM), with what the process held before it (base). */
    double base[3], peak[3];
    base[0] = bench_rss_mib();
    bench_rss_reset();
    const double t_cached = run(6, maps, &k, masks, 0, &np, &ns, st, dl_mem);
    const double c_cached = last_cpu;
    peak[0] = bench_hwm_mib();
    /* With the joint covariance (231 blocks instead of 21). */
    cJSON *st_j = cJSON_CreateObject();
    const double t_joint = run(6, maps, &k, masks, 1, &np, &ns, st_j, NULL);
    const double c_joint = last_cpu;
    /* BENCH_FIELDS_SPEED_ONLY=1: the speed rows alone (no on-demand and
     * 12-map runs). */
    const char *so = getenv("BENCH_FIELDS_SPEED_ONLY");
    const int speed_only = so && *so == '1';
    /* The same run with each map made when the estimator asks for it, the
     * caller's 6 maps freed first. */
    for (int i = 0; i < 6; i++) {
        clef_map_free(maps[i]);
        maps[i] = NULL;
    }
    base[1] = bench_rss_mib();
    bench_rss_reset();
    const double t_od =
        speed_only ? 0 : run(6, NULL, &k, masks, 0, &np, &ns, st_od, dl_od);
    peak[1] = bench_hwm_mib();
    const int same = speed_only || !memcmp(dl_mem, dl_od, 4096 * 21 * sizeof *dl_mem);
    free(dl_mem);
    free(dl_od);
    base[2] = bench_rss_mib();
    bench_rss_reset();
    const double t12 = speed_only ? 0 : run(12, NULL, &k, masks, 0, &np12, &ns12, NULL, NULL);
    peak[2] = bench_hwm_mib();

    const double map_mib = 12.0 * nside * nside * 9 / 1048576.0;
    const double alm_mib = clef_alm_size(lmax, lmax) * 16.0 / 1048576.0;
    cJSON_AddItemToObject(j, "machine", bench_machine_json());
    cJSON_AddNumberToObject(j, "nside", (double)nside);
    cJSON_AddNumberToObject(j, "lmax_analysed", lmax);
    cJSON_AddNumberToObject(j, "analysis_best_s", best);
    cJSON_AddNumberToObject(j, "six_maps_first_run_s", t_first);
    cJSON_AddNumberToObject(j, "six_maps_cached_s", t_cached);
    cJSON_AddItemToObject(j, "six_maps_cached_stages_s", st);
    cJSON_AddNumberToObject(j, "analysis_best_cpu_s", best_cpu);
    cJSON_AddNumberToObject(j, "six_maps_cached_cpu_s", c_cached);
    cJSON_AddNumberToObject(j, "six_maps_joint_cpu_s", c_joint);
    cJSON_AddNumberToObject(j, "ratio_cached_to_analysis_cpu", c_cached / best_cpu);
    cJSON_AddNumberToObject(j, "ratio_joint_to_analysis_cpu", c_joint / best_cpu);
    cJSON_AddNumberToObject(j, "six_maps_joint_s", t_joint);
    cJSON_AddItemToObject(j, "six_maps_joint_stages_s", st_j);
    cJSON_AddNumberToObject(j, "ratio_joint_to_analysis", t_joint / best);
    cJSON_AddNumberToObject(j, "six_maps_on_demand_s", t_od);
    cJSON_AddItemToObject(j, "six_maps_on_demand_stages_s", st_od);
    cJSON_AddBoolToObject(j, "on_demand_same_bits", same);
    cJSON_AddNumberToObject(j, "six_maps_pairs", np);
    cJSON_AddNumberToObject(j, "six_maps_map_transforms", ns);
    cJSON_AddNumberToObject(j, "ratio_cached_to_analysis", t_cached / best);
    cJSON_AddNumberToObject(j, "ratio_on_demand_to_analysis", t_od / best);
    cJSON_AddNumberToObject(j, "target_ratio", 8);
    cJSON_AddNumberToObject(j, "twelve_maps_on_demand_s", t12);
    cJSON_AddNumberToObject(j, "twelve_maps_pairs", np12);
    cJSON_AddNumberToObject(j, "map_mib", map_mib);
    cJSON_AddNumberToObject(j, "alm_mib", alm_mib);
    static const char *const key[3] = {"peak_rss_6_in_memory", "peak_rss_6_on_demand",
                                       "peak_rss_12_on_demand"};
    for (int i = 0; i < 3; i++) {
        char kb[64];
        snprintf(kb, sizeof kb, "%s_mib", key[i]);
        cJSON_AddNumberToObject(j, kb, peak[i]);
        snprintf(kb, sizeof kb, "%s_base_mib", key[i]);
        cJSON_AddNumberToObject(j, kb, base[i]);
    }
    printf("nside %lld: one analysis %.3f s; 6 maps, %d spectra, cached coupling %.3f s = %.2f "
           "analyses (target <= 8; first run %.3f s); maps made on demand %.3f s = %.2f "
           "analyses (%s bits); with the joint covariance %.3f s = %.2f analyses; 12 maps on "
           "demand %.3f s\n",
           (long long)nside, best, np, t_cached, t_cached / best, t_first, t_od, t_od / best,
           same ? "same" : "DIFFERENT", t_joint, t_joint / best, t12);
    printf("CPU seconds: one analysis %.3f; 6 maps cached %.3f = %.2f analyses; with the joint "
           "covariance %.3f = %.2f analyses\n",
           best_cpu, c_cached, c_cached / best_cpu, c_joint, c_joint / best_cpu);
    printf("peak RSS of a run (process before it): 6 maps held by the caller %.0f MiB (%.0f), "
           "6 on demand %.0f (%.0f), 12 on demand %.0f (%.0f); one map %.0f MiB (pixels + "
           "flags), one a_lm %.0f MiB\n",
           peak[0], base[0], peak[1], base[1], peak[2], base[2], map_mib, alm_mib);
    const int rc = bench_json_write("fields", j);
    cJSON_Delete(j);
    clef_map_free(k.sky);
    clef_map_free(masks[0]);
    clef_map_free(masks[1]);
    return same ? rc : 1;
}
