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
 * Cost trick: each sky is simulated and analysed once (pseudo-C_l), then
 * decoupled with every binning through the public coupling API; the
 * band-power windows are W = K^-1 P M diag(F B^2 p^2 2 pi / (l (l + 1)))
 * (acting on D_l); the covariance of each binning is the one
 * clef_spectrum_compute quotes from the input spectrum (--covariance-model), and the
 * staged band powers are checked against clef_spectrum_compute on the
 * first sky.  make check runs 30 skies, make check-long 200. */
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

static const int widths[NWIDTH] = {10, 20, 30, 40, 50};
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

typedef struct binning {
    clef_bins *bins;
    clef_coupling_binned *kb;
    clef_bandpowers *bp[NINPUT]; /* bins, windows, covariance per input; dl per sky */
} binning;

typedef struct acc {
    int n, found, cover, flat;
    double pull, pull2, sum_err, sum_l, sum_l2;
} acc;

static void run_ensemble(void **state)
{
    (void)state;
    const int nsky = test_sanitize() ? 1 : test_long() ? 200 : 30;
    const int lmax_t = LSIM;
    clef_map *full = NULL, *mask = NULL;
    assert_int_equal(clef_mask_full(&full, NSIDE), CLEF_OK);
    assert_int_equal(clef_mask_cut_latitude(full, 20.0 * M_PI / 180), CLEF_OK);
    clef_mask_apod_opts ao = {CLEF_MASK_APOD_C2, 8.0 * M_PI / 180, 0};
    assert_int_equal(clef_mask_apodize(&mask, full, &ao), CLEF_OK);
    clef_map_free(full);
    clef_mask_moments mom;
    assert_int_equal(clef_mask_moments_compute(mask, &mom), CLEF_OK);

    /* Mask spectrum, coupling, filter, noise. */
    double *wl = calloc(lmax_t + 1, sizeof *wl);
    assert_int_equal(clef_mask_spectrum_lmax(mask, lmax_t, CLEF_SPECTRUM_ITERATIONS, wl), CLEF_OK);
    clef_coupling *m = NULL;
    assert_int_equal(clef_coupling_create(&m, LMAX, wl, lmax_t), CLEF_OK);
    const double *M = clef_coupling_matrix(m);
    double tl[LMAX + 1], bl[LSIM + 1], pl[LSIM + 1], nl[LSIM + 1], nbias[LMAX + 1];
    assert_int_equal(clef_beam_gaussian(FWHM, LSIM, bl), CLEF_OK);
    assert_int_equal(clef_beam_pixel_window(NSIDE, LSIM, pl), CLEF_OK);
    const double sig = clef_sim_sigma_pix(NSIDE, DEPTH);
    for (int l = 0; l <= LSIM; l++)
        nl[l] = sig * sig * 4 * M_PI / (12.0 * NSIDE * NSIDE); /* white pixel noise */
    for (int l = 0; l <= LMAX; l++)
        tl[l] = bl[l] * bl[l] * pl[l] * pl[l];
    clef_coupling_apply(m, nl, nbias);

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

    clef_sht *sht_sim = NULL, *sht_ana = NULL;
    assert_int_equal(clef_sht_create(&sht_sim, NSIDE, LSIM, NULL), CLEF_OK);
    assert_int_equal(clef_sht_create(&sht_ana, NSIDE, LMAX, NULL), CLEF_OK);
    clef_map *map = NULL;
    assert_int_equal(clef_map_alloc(&map, NSIDE), CLEF_OK);
    const int64_t npix = map->npix;
    double *tmap = malloc(npix * sizeof *tmap);
    double complex *alm = malloc(clef_alm_size(LMAX, LMAX) * sizeof *alm);
    double pcl[LMAX + 1];

    /* Binnings: K, windows; covariance from clef_spectrum_compute. */
    binning bn[NWIDTH];
    for (int k = 0; k < NWIDTH; k++) {
        assert_int_equal(clef_bins_create_linear(&bn[k].bins, 2, widths[k], LMAX, CLEF_BINS_DL),
                         CLEF_OK);
        assert_int_equal(clef_coupling_binned_create(&bn[k].kb, m, bn[k].bins, tl, NULL), CLEF_OK);
        const int nb = clef_bins_count(bn[k].bins);
        const double *kp = clef_coupling_binned_kinv_p(bn[k].kb);
        for (int i = 0; i < NINPUT; i++) {
            assert_int_equal(clef_bandpowers_alloc(&bn[k].bp[i], nb, 1), CLEF_OK);
            clef_bandpowers *bp = bn[k].bp[i];
            assert_int_equal(clef_bandpowers_alloc_windows(bp, LMAX), CLEF_OK);
            for (int b = 0; b < nb; b++) {
                bp->l_lo[b] = clef_bins_l_lo(bn[k].bins, b);
                bp->l_hi[b] = clef_bins_l_hi(bn[k].bins, b);
                bp->l_eff[b] = clef_bins_l_eff(bn[k].bins, b);
                for (int l = 2; l <= LMAX; l++) {
                    double s = 0;
                    for (int j = 0; j <= LMAX; j++)
                        s += kp[(size_t)b * (LMAX + 1) + j] * M[(size_t)j * (LMAX + 1) + l];
                    bp->win[(size_t)b * (LMAX + 1) + l] = s * tl[l] * 2 * M_PI / (l * (l + 1.0));
                }
            }
        }
    }

    acc a[NINPUT][NWIDTH][NWIN];
    memset(a, 0, sizeof a);
    clef_geometry_plan *plan[NWIDTH][NWIN];
    double hw[NWIDTH][NWIN];
    clef_spectrum_opts so;
    clef_spectrum_opts_default(&so);
    so.lmax = LMAX;
    so.beam_fwhm = FWHM;
    so.pixel_window = 1;
    so.noise_cl = nl;
    so.noise_lmax = LSIM;
    so.find_peak = 0;
    so.theory_lmax = LSIM;
    for (int s = 0; s < nsky; s++) {
        for (int i = 0; i < NINPUT; i++) {
            clef_sim_opts sim = {0};
            sim.seed = 90000 + 1000 * (uint64_t)i + (uint64_t)s;
            sim.beam_fwhm = FWHM;
            sim.pixel_window = 1;
            sim.noise_depth = DEPTH;
            double *maps[1] = {map->pix};
            assert_int_equal(clef_sim_map(sht_sim, cl[i], &sim, NULL, maps, NULL), CLEF_OK);
            /* The estimator's stages (docs/method.md): weights, monopole
             * and dipole removed, analysis, pseudo-spectrum, noise bias. */
            memcpy(tmap, map->pix, npix * sizeof *tmap);
            assert_int_equal(clef_spectrum_remove_multipoles(tmap, mask->pix, NSIDE, 1, NULL),
                             CLEF_OK);
            for (int64_t p = 0; p < npix; p++)
                tmap[p] *= mask->pix[p];
            const double *in[1] = {tmap};
            double complex *out[1] = {alm};
            assert_int_equal(clef_sht_analysis(sht_ana, 1, in, out, CLEF_SPECTRUM_ITERATIONS),
                             CLEF_OK);
            assert_int_equal(clef_alm_cl(LMAX, LMAX, alm, NULL, pcl), CLEF_OK);
            for (int l = 0; l <= LMAX; l++)
                pcl[l] -= nbias[l];
            for (int k = 0; k < NWIDTH; k++) {
                clef_bandpowers *bp = bn[k].bp[i];
                clef_coupling_binned_decouple(bn[k].kb, pcl, bp->dl);
                if (s == 0) {
                    /* Reference path: the covariance it quotes from the
                     * input spectrum, and the same band powers. */
                    clef_spectrum_result res;
                    so.bins = bn[k].bins;
                    so.theory_cl = cl[i];
                    so.find_peak = i == 0;
                    assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &so, &res),
                                     CLEF_OK);
                    if (i == 0) {
                        /* The spectrum's peak stage is clef_peak_find with
                         * the library defaults on its own table. */
                        clef_peak_opts pd;
                        clef_peak_opts_default(&pd);
                        clef_peak_result rr;
                        assert_int_equal(clef_peak_find(res.bp, &pd, &rr), CLEF_OK);
                        assert_true(res.peak_done);
                        assert_int_equal(rr.found, res.peak.found);
                        if (rr.found)
                            check_abs(res.peak.l_peak, rr.l_peak, 0, "same fit, same table");
                    }
                    memcpy(bp->cov, res.bp->cov, (size_t)bp->nbins * bp->nbins * sizeof *bp->cov);
                    for (int b = 0; b < bp->nbins; b++) {
                        bp->dl_err[b] = res.bp->dl_err[b];
                        if (fabs(res.bp->dl[b] - bp->dl[b]) > 1e-6 * bp->dl_err[b])
                            fail_msg("width %d bin %d: staged D %.10g, clef_spectrum_compute %.10g",
                                     widths[k], b, bp->dl[b], res.bp->dl[b]);
                    }
                    clef_spectrum_result_free(&res);
                }
                for (int w = 0; w < NWIN; w++) {
                    clef_peak_opts po;
                    clef_peak_opts_default(&po);
                    po.half_width = w ? 1.5 * clef_peak_half_width(bp, &po) : 0;
                    hw[k][w] = clef_peak_half_width(bp, &po);
                    if (s == 0 && i == 0) {
                        /* The curvature step for this binning and window:
                         * the forward model needs the windows, covariance
                         * and settings only. */
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
                    acc *t = &a[i][k][w];
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
                    if (i == 0) {
                        clef_geometry_result *g = NULL;
                        assert_int_equal(
                            clef_geometry_plan_execute(plan[k][w], r.l_peak, r.l_peak_err, &g),
                            CLEF_OK);
                        t->flat += g->classification == CLEF_GEOMETRY_FLAT;
                        clef_geometry_result_free(g);
                    }
                }
            }
        }
    }
    /* Tolerances: the bars (mean pull within +-0.2, coverage 68 +-
     * 7%, "flat" >= 93%) for the long ensemble of 200 skies, where the
     * sampling errors are 0.07, 3.3% and 1.8%; with N skies the bars widen
     * to 3 sampling errors where that is larger (30 skies: 0.55, 26%). */
    const double pull_tol = fmax(0.2, 3 / sqrt(nsky));
    const double cov_tol = fmax(0.07, 3 * sqrt(0.6827 * 0.3173 / nsky));
    const double flat_min = fmin(0.93, 1 - 3 * sqrt(0.05 * 0.95 / nsky) - 0.05);
    int bad = 0;
    print_message("%d skies, w2 = %.3f; mean pull, 1-sigma coverage, mean quoted sigma / scatter, "
                  "flat rate (Omega_k = 0 input); truth: %.3f %.3f %.3f %.3f\n", nsky, mom.w2,
                  ltrue[0], ltrue[1], ltrue[2], ltrue[3]);
    for (int i = 0; i < NINPUT; i++)
        for (int k = 0; k < NWIDTH; k++)
            for (int w = 0; w < NWIN; w++) {
                const acc *t = &a[i][k][w];
                const double nf = t->found > 0 ? t->found : 1;
                const double mp = t->pull / nf, cover = t->cover / nf;
                const double ml = t->sum_l / nf;
                const double sd = sqrt(fmax(t->sum_l2 / nf - ml * ml, 0) * nf / fmax(nf - 1, 1));
                const double flat = t->flat / nf;
                /* Known open problem (docs/peak.md, "Caveats"): with 50-wide
                 * bins the few bins leave the shape terms to the prior and
                 * the errors over-cover; only the lower coverage bar is
                 * held there. */
                /* Above the bar, errors are conservative: the shape prior
                 * makes the quoted sigma up to ~16% larger than the scatter
                 * (measured, docs/peak.md); coverage up to 80% is accepted
                 * and reported. */
                const int conservative_ok =
                    cover > 0.6827 && (widths[k] == 50 || cover <= fmax(0.80, 0.6827 + cov_tol));
                const int ok = t->found >= 0.95 * t->n && fabs(mp) <= pull_tol &&
                               (fabs(cover - 0.6827) <= cov_tol || conservative_ok) &&
                               (i || flat >= flat_min);
                print_message("%-15s width %2d half width %5.1f: found %3d/%3d  pull %+.3f  "
                              "coverage %.3f  sigma %.2f / scatter %.2f%s%s\n",
                              input_names[i], widths[k], hw[k][w], t->found, t->n, mp, cover,
                              t->sum_err / nf, sd, i ? "" : "  flat ", "");
                if (i == 0)
                    print_message("%*s flat %.3f\n", 60, "", flat);
                if (ok && fabs(cover - 0.6827) > cov_tol)
                    print_message("  ^ over-covers (conservative errors; docs/peak.md)\n");
                if (!ok) {
                    bad++;
                    print_message("  ^ outside the bars (pull %.2f, coverage %.3f +- %.3f, flat "
                                  ">= %.3f)\n", pull_tol, 0.6827, cov_tol, flat_min);
                }
            }
    for (int k = 0; k < NWIDTH; k++) {
        for (int w = 0; w < NWIN; w++)
            clef_geometry_plan_destroy(plan[k][w]);
        for (int i = 0; i < NINPUT; i++)
            clef_bandpowers_free(bn[k].bp[i]);
        clef_coupling_binned_destroy(bn[k].kb);
        clef_bins_destroy(bn[k].bins);
    }
    for (int i = 0; i < NINPUT; i++)
        free(cl[i]);
    free(tmap);
    free(alm);
    free(wl);
    clef_map_free(map);
    clef_map_free(mask);
    clef_coupling_destroy(m);
    clef_sht_destroy(sht_sim);
    clef_sht_destroy(sht_ana);
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
