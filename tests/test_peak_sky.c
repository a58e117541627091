/* Calibration of the first-peak estimator and of the curvature step on
 * ensembles of simulated skies (issue 11): nside 256, a galactic cut of
 * |b| < 20 deg apodized over 8 deg (C2, Grain et al. 2009; w2 ~ 0.58 of
 * the sky), a 10-arcmin Gaussian beam, the pixel window and 30 uK-arcmin
 * white noise; bins 10, 20, 30, 40 and 50 wide; the automatic fit window
 * and one 1.5 times wider; four input spectra: the analytic model (Planck
 * 2018 parameters) at Omega_k = 0, -0.04 and +0.04, and a smooth invented
 * spectrum with an asymmetric peak that the estimator was not designed on.
 * The truth is the maximum of the input's continuous D(l).
 *
 * Every sky goes through clef_spectrum_compute itself, once per binning
 * (with the input spectrum for the covariance, as --covariance-model), so the test
 * follows whatever the library's estimator does (hidden bins, deprojection
 * correction, lmax rules) instead of a copy of its stages.  With the mask
 * spectra, the deprojection correction and the coupling from the cache a
 * call costs about 0.15 s at nside 256.
 *
 * make check: 30 skies of the main setting, bins 20 and 50 wide, the
 * Omega_k = 0 and the invented input.  make check-long: CLEF_PEAK_SKIES
 * skies (default 100) of every setting, and a second mask (|b| < 30 deg,
 * C1 over 5 deg) and a second noise level (60 uK-arcmin) with the Omega_k
 * = 0 and the invented input.  On the first sky of each setting every
 * binning is also fitted on its mean band powers (noise_free). */
#include "check.h"

#include <complex.h>
#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>

#include "clef/beam.h"
#include "clef/bins.h"
#include "clef/coupling.h"
#include "clef/cosmo.h"
#include "clef/geometry.h"
#include "clef/mask.h"
#include "clef/peak.h"
#include "clef/sht.h"
#include "clef/sim.h"
#include "clef/spectrum.h"
#include "clef/theory.h"

#define NSIDE 256
#define LMAX 512        /* 2 nside */
#define LSIM 767        /* sky power up to 3 nside - 1 */
#define FWHM 10.0       /* arcmin */
#define DEPTH 30.0      /* uK-arcmin */
#define NWIDTH 5
#define NWIN 2
#define NINPUT 4

static const char *const input_names[NINPUT] = {"model Ok=0", "model Ok=-0.04", "model Ok=+0.04",
                                                "invented"};

/* The invented spectrum: a gamma-distribution-shaped bump (x^k e^(k (1 -
 * x)), maximum 1 at x = 1 before the constant is added) on 900 uK^2, and a
 * second bump near l = 560.  Its first peak rises more steeply than it
 * falls, the opposite of the acoustic peak's asymmetry. */
static double invented_dl(double l)
{
    const double x = l / 240.0, k = 7;
    return 900 + 4500 * pow(x, k) * exp(k * (1 - x)) + 1500 * exp(-0.5 * pow((l - 560) / 80.0, 2));
}

/* Maximum of invented_dl: golden-section search (its derivative has one
 * zero near 240 in [150, 350]). */
static double invented_peak(void)
{
    const double g = 0.5 * (sqrt(5.0) - 1.0);
    double a = 150, b = 350, c = b - g * (b - a), e = a + g * (b - a);
    double fc = invented_dl(c), fe = invented_dl(e);
    while (b - a > 1e-10) {
        if (fc > fe) {
            b = e;
            e = c;
            fe = fc;
            c = b - g * (b - a);
            fc = invented_dl(c);
        } else {
            a = c;
            c = e;
            fc = fe;
            e = a + g * (b - a);
            fe = invented_dl(e);
        }
    }
    return 0.5 * (a + b);
}

#define NIN_MAX 4
#define NW_MAX 5

typedef struct acc {
    int n, found, cover, flat;
    double pull, pull2, sum_err, sum_l, sum_l2;
} acc;

/* One ensemble: a mask, a noise level, the binnings and inputs it runs. */
typedef struct config {
    const char *name;
    double cut_deg, apod_deg;
    int apod_kind;
    double depth; /* uK-arcmin */
    int nsky, sky0; /* skies sky0 .. sky0 + nsky - 1 (seeds) */
    int nwidth;
    int width[NW_MAX];
    int ninput;
    int input[NIN_MAX]; /* indices into input_names; 0 (flat) must come first if present */
} config;

/* The estimator on the mean band powers, sum_l W_bl D_l over every l of the
 * windows (multipoles outside the fitted bins included), with this
 * binning's covariance (from the input spectrum, the same on every sky):
 * its offset from the truth is the estimator's own bias, free of sampling
 * noise.  Bar: within 0.2 quoted sigma (the mean-pull bar). */
static int noise_free(const clef_bandpowers *bp, const double *cl, double ltrue,
                      const config *cf, const char *input, int width)
{
    const int wl = bp->win_lmax + 1;
    double *mean = malloc((size_t)bp->nbins * sizeof *mean);
    assert_non_null(mean);
    for (int b = 0; b < bp->nbins; b++) {
        mean[b] = 0;
        for (int l = 2; l < wl && l <= LSIM; l++)
            mean[b] += bp->win[(size_t)b * wl + (size_t)l] * cl[l] * l * (l + 1.0) / (2 * M_PI);
    }
    clef_bandpowers nf = *bp; /* shallow: only the band powers differ */
    nf.dl = mean;
    int bad = 0;
    for (int w = 0; w < NWIN; w++) {
        clef_peak_opts po;
        clef_peak_opts_default(&po);
        po.half_width = w ? 1.5 * clef_peak_half_width(&nf, &po) : 0;
        clef_peak_result r;
        assert_int_equal(clef_peak_find(&nf, &po, &r), CLEF_OK);
        const double pull = r.found ? (r.l_peak - ltrue) / r.l_peak_err : NAN;
        print_message("noise-free [%s] %s, bins %d, half width %.0f: l_peak - truth %+.3f, "
                      "sigma %.2f, offset / sigma %+.3f\n", cf->name, input, width,
                      clef_peak_half_width(&nf, &po), r.l_peak - ltrue, r.l_peak_err, pull);
        bad += !(fabs(pull) <= 0.2);
    }
    free(mean);
    return bad;
}

/* Run one configuration; returns the number of settings outside the bars. */
static int run_config(const config *cf, double *const cl[NINPUT], const double ltrue[NINPUT],
                      clef_sht *sht_sim)
{
    clef_map *full = NULL, *mask = NULL;
    assert_int_equal(clef_mask_full(&full, NSIDE), CLEF_OK);
    assert_int_equal(clef_mask_cut_latitude(full, cf->cut_deg * M_PI / 180), CLEF_OK);
    clef_mask_apod_opts ao = {cf->apod_kind, cf->apod_deg * M_PI / 180, 0};
    assert_int_equal(clef_mask_apodize(&mask, full, &ao), CLEF_OK);
    clef_map_free(full);
    clef_mask_moments mom;
    assert_int_equal(clef_mask_moments_compute(mask, &mom), CLEF_OK);

    double nl[LSIM + 1];
    const double sig = clef_sim_sigma_pix(NSIDE, cf->depth);
    for (int l = 0; l <= LSIM; l++)
        nl[l] = sig * sig * 4 * M_PI / (12.0 * NSIDE * NSIDE); /* white pixel noise */
    clef_bins *bins[NW_MAX];
    for (int k = 0; k < cf->nwidth; k++)
        assert_int_equal(clef_bins_create_linear(&bins[k], 2, cf->width[k], LMAX, CLEF_BINS_DL),
                         CLEF_OK);
    clef_map *map = NULL;
    assert_int_equal(clef_map_alloc(&map, NSIDE), CLEF_OK);

    int bad_nf = 0; /* noise-free offsets beyond 0.2 sigma */
    acc a[NIN_MAX][NW_MAX][NWIN];
    memset(a, 0, sizeof a);
    clef_geometry_plan *plan[NW_MAX][NWIN];
    memset(plan, 0, sizeof plan);
    double hw[NW_MAX][NWIN];
    clef_spectrum_opts so;
    clef_spectrum_opts_default(&so);
    so.lmax = LMAX;
    so.beam_fwhm = FWHM;
    so.pixel_window = 1;
    so.noise_cl = nl;
    so.noise_lmax = LSIM;
    so.find_peak = 0;
    so.theory_lmax = LSIM;
    for (int s = cf->sky0; s < cf->sky0 + cf->nsky; s++) {
        for (int ii = 0; ii < cf->ninput; ii++) {
            const int i = cf->input[ii];
            clef_sim_opts sim = {0};
            sim.seed = 90000 + 1000 * (uint64_t)i + (uint64_t)s;
            sim.beam_fwhm = FWHM;
            sim.pixel_window = 1;
            sim.noise_depth = cf->depth;
            double *maps[1] = {map->pix};
            assert_int_equal(clef_sim_map(sht_sim, cl[i], &sim, NULL, maps, NULL), CLEF_OK);
            for (int k = 0; k < cf->nwidth; k++) {
                clef_spectrum_result res;
                so.bins = bins[k];
                so.theory_cl = cl[i];
                so.find_peak = s == cf->sky0 && ii == 0;
                assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &so, &res), CLEF_OK);
                const clef_bandpowers *bp = res.bp;
                if (so.find_peak) {
                    /* The spectrum's peak stage is clef_peak_find with the
                     * library defaults on its own table. */
                    clef_peak_opts pd;
                    clef_peak_opts_default(&pd);
                    clef_peak_result rr;
                    assert_int_equal(clef_peak_find(bp, &pd, &rr), CLEF_OK);
                    assert_true(res.peak_done);
                    assert_int_equal(rr.found, res.peak.found);
                    if (rr.found)
                        check_abs(res.peak.l_peak, rr.l_peak, 0, "same fit, same table");
                }
                if (s == cf->sky0)
                    bad_nf += noise_free(bp, cl[i], ltrue[i], cf, input_names[i], cf->width[k]);
                for (int w = 0; w < NWIN; w++) {
                    clef_peak_opts po;
                    clef_peak_opts_default(&po);
                    po.half_width = w ? 1.5 * clef_peak_half_width(bp, &po) : 0;
                    hw[k][w] = clef_peak_half_width(bp, &po);
                    if (s == cf->sky0 && ii == 0) {
                        /* The curvature step for this binning and window:
                         * the forward model needs the windows, covariance
                         * and settings only (the same on every sky: the
                         * covariance comes from the input spectrum). */
                        clef_geometry_opts go;
                        clef_geometry_opts_default(&go);
                        go.forward_table = bp;
                        if (test_sanitize())
                            go.nsamples = 200; /* the sanitizer build is ~10x slower */
                        go.forward_peak = po;
                        assert_int_equal(clef_geometry_plan_create(&plan[k][w], &go), CLEF_OK);
                    }
                    clef_peak_result r;
                    assert_int_equal(clef_peak_find(bp, &po, &r), CLEF_OK);
                    acc *t = &a[ii][k][w];
                    t->n++;
                    if (!r.found)
                        continue;
                    t->found++;
                    const double pull = (r.l_peak - ltrue[i]) / r.l_peak_err;
                    t->pull += pull;
                    t->pull2 += pull * pull;
                    t->cover += fabs(pull) <= 1;
                    t->sum_err += r.l_peak_err;
                    t->sum_l += r.l_peak;
                    t->sum_l2 += r.l_peak * r.l_peak;
                    if (i == 0 && plan[k][w]) { /* plans exist only for input 0 */
                        clef_geometry_result *g = NULL;
                        assert_int_equal(
                            clef_geometry_plan_execute(plan[k][w], r.l_peak, r.l_peak_err, &g),
                            CLEF_OK);
                        t->flat += g->classification == CLEF_GEOMETRY_FLAT;
                        clef_geometry_result_free(g);
                    }
                }
                clef_spectrum_result_free(&res);
            }
        }
    }
    /* Tolerances.  The bars (mean pull within +-0.2, coverage 68 +-
     * 7%, "flat" >= 93%) are tested where the sample resolves them: on each
     * setting (bin width x window) pooled over the inputs, whose skies are
     * independent (4 x 100 skies in make check-long: sampling errors 0.05
     * and 2.3%), and on the flat rate pooled over the Omega_k = 0 rows.  A
     * single row of 100 skies has sampling errors 0.10 and 4.7%, so even a
     * calibrated estimator would miss the 7% bar in about 14% of rows
     * (docs/peak.md, "Calibration"): rows are held to the bars widened to 3
     * sampling errors where that is larger, as the 30-sky make check is. */
    const int nsky = cf->nsky, strict = nsky >= 100;
    const double pull_tol = fmax(0.2, 3 / sqrt(nsky));
    const double cov_tol = fmax(0.07, 3 * sqrt(0.6827 * 0.3173 / nsky));
    const double flat_min = fmin(0.93, 1 - 3 * sqrt(0.05 * 0.95 / nsky) - 0.05);
    int bad = bad_nf;
    double pf_found = 0, pf_flat = 0;
    print_message("[%s] %d skies, w2 = %.3f, noise %g uK-arcmin; mean pull, 1-sigma coverage, "
                  "mean quoted sigma / scatter, flat rate (Omega_k = 0 input)\n", cf->name, nsky,
                  mom.w2, cf->depth);
    for (int ii = 0; ii < cf->ninput; ii++)
        for (int k = 0; k < cf->nwidth; k++)
            for (int w = 0; w < NWIN; w++) {
                const int i = cf->input[ii];
                const acc *t = &a[ii][k][w];
                const double nf = t->found > 0 ? t->found : 1;
                const double mp = t->pull / nf, cover = t->cover / nf;
                const double ml = t->sum_l / nf;
                const double sd = sqrt(fmax(t->sum_l2 / nf - ml * ml, 0) * nf / fmax(nf - 1, 1));
                const double flat = t->flat / nf;
                if (i == 0) {
                    pf_found += t->found;
                    pf_flat += t->flat;
                }
                const int ok = t->found >= 0.95 * t->n && fabs(mp) <= pull_tol &&
                               fabs(cover - 0.6827) <= cov_tol &&
                               (i || flat >= flat_min);
                print_message("| %s | %s | %d | %.0f | %d/%d | %+.2f | %+.3f | %.1f%% | %.2f / %.2f | ",
                              cf->name, input_names[i], cf->width[k], hw[k][w], t->found, t->n,
                              ml - ltrue[i], mp, 100 * cover, t->sum_err / nf, sd);
                if (i == 0)
                    print_message("%.1f%% |\n", 100 * flat);
                else
                    print_message("- |\n");
                if (!ok) {
                    bad++;
                    print_message("  ^ outside the row bars (pull %.2f, coverage %.3f +- %.3f, "
                                  "flat >= %.3f)\n", pull_tol, 0.6827, cov_tol, flat_min);
                }
            }
    /* Pooled over the inputs, per setting: the bars as they are
     * once the pooled sample is at least 100 x 4 skies. */
    const int pooled_strict = strict && cf->ninput >= 4;
    for (int k = 0; k < cf->nwidth; k++)
        for (int w = 0; w < NWIN; w++) {
            double f = 0, pu = 0, co = 0;
            for (int ii = 0; ii < cf->ninput; ii++) {
                f += a[ii][k][w].found;
                pu += a[ii][k][w].pull;
                co += a[ii][k][w].cover;
            }
            const double nf = f > 0 ? f : 1, n = nsky * cf->ninput;
            const double ptol = pooled_strict ? 0.2 : fmax(0.2, 3 / sqrt(n));
            const double ctol = pooled_strict ? 0.07 : fmax(0.07, 3 * sqrt(0.6827 * 0.3173 / n));
            const int ok = fabs(pu / nf) <= ptol && fabs(co / nf - 0.6827) <= ctol;
            print_message("  pooled over %d inputs, bins %d, half width %.0f: mean pull %+.3f, "
                          "coverage %.1f%% (bars +-%.2f, 68.3 +- %.1f%%)%s\n", cf->ninput,
                          cf->width[k], hw[k][w], pu / nf, 100 * co / nf, ptol, 100 * ctol,
                          ok ? "" : "  <- outside");
            bad += !ok;
        }
    if (pf_found > 0) {
        const double fl = pf_flat / pf_found;
        const int ok = fl >= (strict ? 0.93 : flat_min);
        print_message("  \"flat\" pooled over the Omega_k = 0 rows: %.1f%% (bar %.1f%%)%s\n",
                      100 * fl, 100 * (strict ? 0.93 : flat_min), ok ? "" : "  <- outside");
        bad += !ok;
    }
    for (int k = 0; k < cf->nwidth; k++) {
        for (int w = 0; w < NWIN; w++)
            clef_geometry_plan_destroy(plan[k][w]);
        clef_bins_destroy(bins[k]);
    }
    clef_map_free(map);
    clef_map_free(mask);
    return bad;
}

static void run_ensemble(void **state)
{
    (void)state;
    int nsky = test_sanitize() ? 1 : test_long() ? 100 : 30;
    const char *env = getenv("CLEF_PEAK_SKIES");
    if (env && test_long() && atoi(env) > 0)
        nsky = atoi(env); /* development runs of check-long at fewer (or more) skies */

    /* Input spectra and their true maxima. */
    double *cl[NINPUT], ltrue[NINPUT];
    clef_cosmo_params cp;
    clef_cosmo_params_planck2018(&cp);
    const double oks[3] = {0, -0.04, 0.04};
    for (int i = 0; i < NINPUT; i++) {
        cl[i] = calloc(LSIM + 1, sizeof(double));
        if (i < 3) {
            clef_cosmo_params c = cp;
            c.omega_k = oks[i];
            assert_int_equal(clef_theory_cl(&c, LSIM, cl[i]), CLEF_OK);
            assert_int_equal(clef_theory_first_peak(&c, &ltrue[i], NULL), CLEF_OK);
        } else {
            for (int l = 2; l <= LSIM; l++)
                cl[i][l] = 2 * M_PI * invented_dl(l) / (l * (l + 1.0));
            ltrue[i] = invented_peak();
        }
    }
    print_message("truth: %.3f %.3f %.3f %.3f\n", ltrue[0], ltrue[1], ltrue[2], ltrue[3]);
    print_message("| setting | input | bins | half width | found | mean l_peak - truth | mean pull "
                  "| 1-sigma coverage | quoted sigma / scatter | \"flat\" |\n");
    clef_sht *sht_sim = NULL;
    assert_int_equal(clef_sht_create(&sht_sim, NSIDE, LSIM, NULL), CLEF_OK);

    /* Development runs of check-long: CLEF_PEAK_SKY0 = first sky (seed
     * offset, to add skies to an earlier run), CLEF_PEAK_SETTINGS = a
     * subset of "main,cut30,noise60", CLEF_PEAK_INPUTS = a subset of the
     * input indices 0-3 as digits ("0" for the Omega_k = 0 model only). */
    const char *e0 = getenv("CLEF_PEAK_SKY0"), *eset = getenv("CLEF_PEAK_SETTINGS");
    const char *ein = getenv("CLEF_PEAK_INPUTS");
    const int sky0 = e0 && test_long() ? atoi(e0) : 0;
    if (!test_long())
        eset = ein = NULL;
    const config main_cut = {"cut 20, noise 30", 20, 8, CLEF_MASK_APOD_C2, DEPTH, nsky, sky0,
                             NWIDTH, {10, 20, 30, 40, 50}, NINPUT, {0, 1, 2, 3}};
    int bad = 0;
    if (!test_long() || test_sanitize()) {
        config c = main_cut;
        c.nwidth = 2;
        c.width[0] = 20;
        c.width[1] = 50;
        c.ninput = 2;
        c.input[1] = 3;
        if (test_sanitize())
            c.nwidth = 1;
        bad += run_config(&c, cl, ltrue, sht_sim);
    } else {
        config set[3] = {main_cut, main_cut, main_cut};
        const char *const set_names[3] = {"main", "cut30", "noise60"};
        set[1].ninput = set[2].ninput = 2;
        set[1].input[1] = set[2].input[1] = 3;
        set[1].name = "cut 30, noise 30";
        set[1].cut_deg = 30;
        set[1].apod_deg = 5;
        set[1].apod_kind = CLEF_MASK_APOD_C1;
        set[2].name = "cut 20, noise 60";
        set[2].depth = 2 * DEPTH;
        for (int c = 0; c < 3; c++) {
            if (eset && !strstr(eset, set_names[c]))
                continue;
            if (ein) { /* keep the listed inputs, in their order */
                int n = 0;
                for (int ii = 0; ii < set[c].ninput; ii++)
                    if (strchr(ein, '0' + set[c].input[ii]))
                        set[c].input[n++] = set[c].input[ii];
                set[c].ninput = n;
            }
            if (set[c].ninput > 0)
                bad += run_config(&set[c], cl, ltrue, sht_sim);
        }
    }
    for (int i = 0; i < NINPUT; i++)
        free(cl[i]);
    clef_sht_destroy(sht_sim);
    if (!test_sanitize())
        assert_int_equal(bad, 0);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(run_ensemble),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
