/* Tests of the band-power estimator against outside references: the exact
 * binned C_l of a known a_lm on the full sky, ensembles of simulated skies
 * whose input spectrum is known (the ensemble mean is unbiased, the quoted
 * errors match the scatter), cross-spectra of noise splits (no noise
 * bias), the first peak of the analytic model, and every error path. */
#include "check.h"

#include <complex.h>
#include <chealpix.h>
#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>
#include <omp.h>

#include "clef/beam.h"
#include "clef/bins.h"
#include "clef/cosmo.h"
#include "clef/sht.h"
#include "clef/sim.h"
#include "clef/spectrum.h"
#include "clef/theory.h"

/* Binned input: D_b = sum_l P_bl C_l (Hivon et al. 2002 binning operator). */
static void bin_input(const clef_bins *b, const double *cl, int lmax, double *out)
{
    assert_int_equal(clef_bins_apply(b, cl, lmax, out), CLEF_OK);
}

static clef_map *full_mask(int64_t nside)
{
    clef_map *m = NULL;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++)
        m->pix[p] = 1.0;
    return m;
}

/* A galactic cut |b| < bcut apodized over `apo` degrees with the C2 kernel
 * of Grain et al. 2009 (the distance to the cut is a latitude difference). */
static clef_map *cut_mask(int64_t nside, double bcut_deg, double apo_deg)
{
    clef_map *m = NULL;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++) {
        double th, ph;
        pix2ang_ring64(nside, p, &th, &ph);
        double b = fabs(90.0 - th * 180.0 / M_PI);
        double d = b - bcut_deg;
        double x = d / apo_deg;
        m->pix[p] = d <= 0 ? 0.0 : (x >= 1 ? 1.0 : 0.5 * (1 - cos(M_PI * x)));
    }
    return m;
}

static void random_alm(int lmax, const double *cl, unsigned long seed, double complex *alm)
{
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, seed);
    for (int m = 0; m <= lmax; m++)
        for (int l = m; l <= lmax; l++) {
            double s = sqrt(cl[l] / (m ? 2.0 : 1.0));
            double re = gsl_ran_gaussian(r, s), im = m ? gsl_ran_gaussian(r, s) : 0.0;
            alm[clef_alm_index(lmax, l, m)] = re + I * im;
        }
    gsl_rng_free(r);
}

/* Full sky, no noise, band-limited: the band powers are the exact binned
 * C_l of the map's own a_lm (the coupling matrix is the identity). */
static void full_sky_case(int64_t nside, int lmax, double tol)
{
    double *cl = calloc(lmax + 1, sizeof *cl), *cl_alm = calloc(lmax + 1, sizeof *cl_alm);
    for (int l = 2; l <= lmax; l++)
        cl[l] = 1000.0 / (l * (l + 1.0)); /* flat D_l: every bin matters equally */
    double complex *alm = calloc(clef_alm_size(lmax, lmax), sizeof *alm);
    random_alm(lmax, cl, 11, alm);
    assert_int_equal(clef_alm_cl(lmax, lmax, alm, NULL, cl_alm), CLEF_OK);

    clef_sht *sht = NULL;
    assert_int_equal(clef_sht_create(&sht, nside, lmax, NULL), CLEF_OK);
    clef_map *map = NULL;
    assert_int_equal(clef_map_alloc(&map, nside), CLEF_OK);
    const double complex *ain[1] = {alm};
    double *mout[1] = {map->pix};
    assert_int_equal(clef_sht_synthesis(sht, 1, ain, mout), CLEF_OK);
    clef_map *mask = full_mask(nside);

    clef_bins *bins = NULL;
    assert_int_equal(clef_bins_create_linear(&bins, 2, 4, lmax, CLEF_BINS_DL), CLEF_OK);
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.lmax = lmax;
    o.bins = bins;
    o.iterations = 3;
    o.use_cache = 0;
    o.find_peak = 0;
    clef_spectrum_result r;
    assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &o, &r), CLEF_OK);
    int nb = clef_bins_count(bins);
    double *want = calloc(nb, sizeof *want);
    bin_input(bins, cl_alm, lmax, want);
    for (int b = 0; b < nb; b++)
        check_rel(r.bp->dl[b], want[b], tol, "exact binned C_l of the a_lm (Hivon et al. 2002 P)");
    /* Full sky: the Gaussian covariance is diagonal-dominant and its
     * diagonal is the cosmic variance 2 C^2/(2l+1) averaged over the bin
     * (METHODS.md section 5, full-sky limit of the pseudo-C_l covariance). */
    check_rel(r.fsky, 1.0, 1e-15, "full mask");
    clef_spectrum_result_free(&r);
    clef_bins_destroy(bins);
    clef_map_free(map);
    clef_map_free(mask);
    clef_sht_destroy(sht);
    free(alm);
    free(cl);
    free(cl_alm);
    free(want);
}

static void test_full_sky_exact(void **state)
{
    (void)state;
    full_sky_case(32, 32, 1e-6);  /* lmax <= nside: 1e-6 (issue 6) */
    full_sky_case(32, 64, 1e-3);  /* lmax = 2 nside: the transform's accuracy (docs/transforms.md) */
}

/* Ensemble of masked skies at nside 128 with a ~60% apodized galactic cut:
 * the mean decoupled band powers match the binned input, the quoted errors
 * match the scatter, and the cross-spectrum of two noise splits has no
 * noise bias. */
static void test_masked_ensemble(void **state)
{
    (void)state;
    const int64_t nside = 128;
    const int lmax = (int)(3 * nside - 1), lsim = lmax;
    const int nsim = test_sanitize() ? 12 : 50;
    clef_cosmo_params cp;
    clef_cosmo_params_planck2018(&cp);
    double *cl = calloc(lsim + 1, sizeof *cl);
    assert_int_equal(clef_theory_cl(&cp, lsim, cl), CLEF_OK);
    clef_map *mask = cut_mask(nside, 17.0, 10.0);
    clef_bins *bins = NULL;
    assert_int_equal(clef_bins_create_linear(&bins, 2, 16, lmax, CLEF_BINS_DL), CLEF_OK);
    const int nb = clef_bins_count(bins);
    double *want = calloc(nb, sizeof *want);
    bin_input(bins, cl, lmax, want);

    clef_sht *sht = NULL;
    assert_int_equal(clef_sht_create(&sht, nside, lsim, NULL), CLEF_OK);
    clef_map *m1 = NULL, *m2 = NULL;
    assert_int_equal(clef_map_alloc(&m1, nside), CLEF_OK);
    assert_int_equal(clef_map_alloc(&m2, nside), CLEF_OK);
    double *sum[2], *sum2[2], *err[2];
    for (int k = 0; k < 2; k++) {
        sum[k] = calloc(nb, sizeof(double));
        sum2[k] = calloc(nb, sizeof(double));
        err[k] = calloc(nb, sizeof(double));
    }
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.lmax = lmax;
    o.bins = bins;
    o.find_peak = 0;
    double fsky = 0;
    for (int s = 0; s < nsim; s++) {
        clef_sim_opts so = {0};
        so.seed = 1000 + s;
        so.noise_depth = 20.0; /* uK-arcmin per split: noise comparable to signal at l ~ 300 */
        so.nsplits = 2;
        double *maps[2] = {m1->pix, m2->pix};
        assert_int_equal(clef_sim_map(sht, cl, &so, NULL, maps, NULL), CLEF_OK);
        for (int k = 0; k < 2; k++) {
            clef_spectrum_result r;
            /* k = 0: cross-spectrum of the splits; k = 1: noise-free-sky check via the
             * average of the two splits would still carry noise, so the auto case
             * below uses a noise-free sky with the same seed. */
            if (k == 0) {
                assert_int_equal(clef_spectrum_compute(m1, m2, mask, NULL, &o, &r), CLEF_OK);
            } else {
                clef_sim_opts sn = so;
                sn.noise_depth = 0;
                sn.nsplits = 1;
                double *one[1] = {m1->pix};
                assert_int_equal(clef_sim_map(sht, cl, &sn, NULL, one, NULL), CLEF_OK);
                assert_int_equal(clef_spectrum_compute(m1, NULL, mask, NULL, &o, &r), CLEF_OK);
            }
            fsky = r.fsky_eff;
            for (int b = 0; b < nb; b++) {
                sum[k][b] += r.bp->dl[b];
                sum2[k][b] += r.bp->dl[b] * r.bp->dl[b];
                err[k][b] += r.bp->dl_err[b];
            }
            clef_spectrum_result_free(&r);
        }
    }
    assert_true(fsky > 0.5 && fsky < 0.7);
    for (int k = 0; k < 2; k++) {
        double ratio_sum = 0;
        int nratio = 0;
        for (int b = 0; b < nb; b++) {
            double le = clef_bins_l_eff(bins, b);
            if (le < 30 || le > 2 * nside)
                continue;
            double mean = sum[k][b] / nsim;
            double var = (sum2[k][b] / nsim - mean * mean) * nsim / (nsim - 1.0);
            double sd = sqrt(var), se = sd / sqrt((double)nsim);
            /* Unbiased: within 3 standard errors of the binned input (issue 6). */
            if (fabs(mean - want[b]) > 3 * se)
                fail_msg("%s bin %d (l_eff %.1f): mean %.3f, input %.3f, 3 s.e. %.3f",
                         k ? "auto" : "cross", b, le, mean, want[b], 3 * se);
            double q = err[k][b] / nsim;
            ratio_sum += q / sd;
            nratio++;
            /* Each bin's quoted error against its scatter, loosely (the scatter of
             * nsim skies is itself uncertain by ~1/sqrt(2 nsim)). */
            if (!test_sanitize() && (q / sd < 0.6 || q / sd > 1.6))
                fail_msg("%s bin %d: quoted error %.3f vs scatter %.3f", k ? "auto" : "cross", b,
                         q, sd);
        }
        double mr = ratio_sum / nratio;
        print_message("%s: mean quoted error / scatter = %.3f over %d bins, %d skies\n",
                      k ? "auto" : "cross", mr, nratio, nsim);
        /* The mean quoted error matches the scatter within 20% (issue 6). */
        if (!test_sanitize() && (mr < 0.8 || mr > 1.2))
            fail_msg("%s: mean quoted error / scatter = %.3f", k ? "auto" : "cross", mr);
    }
    for (int k = 0; k < 2; k++) {
        free(sum[k]);
        free(sum2[k]);
        free(err[k]);
    }
    clef_map_free(m1);
    clef_map_free(m2);
    clef_map_free(mask);
    clef_sht_destroy(sht);
    clef_bins_destroy(bins);
    free(cl);
    free(want);
}

/* Band-power windows (docs/formats-spectrum.md): over masked skies with a
 * beam and the pixel window, the mean band power equals sum_l W_bl D_l of
 * the input within 3 standard errors in every bin, for an input that
 * oscillates inside the bins (so W D differs from the plain bin average
 * P C); each row summed over the multipoles of its own bin is 1 and over
 * another bin 0 (K^-1 K = I, Hivon et al. 2002 eqs. 20-21). */
static void test_windows_ensemble(void **state)
{
    (void)state;
    const int64_t nside = 64;
    const int lmax = (int)(2 * nside);
    const int nsim = test_sanitize() ? 8 : 60;
    double *cl = calloc(lmax + 1, sizeof *cl), *dl = calloc(lmax + 1, sizeof *dl);
    for (int l = 2; l <= lmax; l++) {
        dl[l] = 1000.0 * (1 + 0.8 * cos(2 * M_PI * l / 11.0));
        cl[l] = 2 * M_PI * dl[l] / (l * (l + 1.0));
    }
    clef_map *mask = cut_mask(nside, 20.0, 10.0);
    clef_bins *bins = NULL;
    assert_int_equal(clef_bins_create_linear(&bins, 2, 16, lmax, CLEF_BINS_DL), CLEF_OK);
    const int nb = clef_bins_count(bins);
    double *naive = calloc(nb, sizeof *naive), *sum = calloc(nb, sizeof *sum),
           *sum2 = calloc(nb, sizeof *sum2), *wd = calloc(nb, sizeof *wd);
    bin_input(bins, cl, lmax, naive);
    clef_sht *sht = NULL;
    assert_int_equal(clef_sht_create(&sht, nside, lmax, NULL), CLEF_OK);
    clef_map *m = NULL;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.lmax = lmax;
    o.bins = bins;
    o.beam_fwhm = 60.0;
    o.pixel_window = 1;
    o.iterations = 3;
    o.find_peak = 0;
    int win_lmax = -1;
    for (int s = 0; s < nsim; s++) {
        clef_sim_opts so = {0};
        so.seed = 4400 + s;
        so.beam_fwhm = 60.0;
        so.pixel_window = 1;
        double *maps[1] = {m->pix};
        assert_int_equal(clef_sim_map(sht, cl, &so, NULL, maps, NULL), CLEF_OK);
        clef_spectrum_result r;
        assert_int_equal(clef_spectrum_compute(m, NULL, mask, NULL, &o, &r), CLEF_OK);
        assert_non_null(r.bp->win);
        if (s == 0) {
            win_lmax = r.bp->win_lmax;
            assert_true(win_lmax >= lmax);
            const size_t n = (size_t)win_lmax + 1;
            for (int b = 0; b < nb; b++) {
                for (int l = 0; l <= win_lmax && l <= lmax; l++)
                    wd[b] += r.bp->win[b * n + l] * dl[l];
                for (int c = 0; c < nb; c++) {
                    double rs = 0;
                    for (int l = clef_bins_l_lo(bins, c); l <= clef_bins_l_hi(bins, c); l++)
                        rs += r.bp->win[b * n + l];
                    check_abs(rs, b == c, 1e-9, "window row over a bin: delta (K^-1 K = I)");
                }
            }
        }
        for (int b = 0; b < nb; b++) {
            sum[b] += r.bp->dl[b];
            sum2[b] += r.bp->dl[b] * r.bp->dl[b];
        }
        clef_spectrum_result_free(&r);
    }
    double worst_w = 0, worst_naive = 0;
    for (int b = 0; b < nb; b++) {
        const double mean = sum[b] / nsim;
        const double se = sqrt((sum2[b] / nsim - mean * mean) / (nsim - 1.0));
        worst_w = fmax(worst_w, fabs(mean - wd[b]) / se);
        worst_naive = fmax(worst_naive, fabs(mean - naive[b]) / se);
        if (fabs(mean - wd[b]) > 3 * se)
            fail_msg("bin %d (l %d-%d): mean %.2f, W D %.2f, 3 s.e. %.2f", b,
                     clef_bins_l_lo(bins, b), clef_bins_l_hi(bins, b), mean, wd[b], 3 * se);
    }
    print_message("windows: worst |mean - W D| = %.2f s.e., worst |mean - P C| = %.2f s.e. "
                  "over %d bins, %d skies\n", worst_w, worst_naive, nb, nsim);
    clef_map_free(m);
    clef_map_free(mask);
    clef_sht_destroy(sht);
    clef_bins_destroy(bins);
    free(cl);
    free(dl);
    free(naive);
    free(sum);
    free(sum2);
    free(wd);
}

/* Peak: skies from the analytic model with Planck 2018 flat parameters,
 * nside 512, a 10-arcmin beam and ~70% of the sky: the recovered l_peak is
 * within its quoted 2 sigma of the model's own first peak in >= 90% of the
 * skies; the model's peak is near l = 220 (Page et al. 2003, WMAP first peak
 * 220.1 +- 0.8). */
static void test_peak_recovery(void **state)
{
    (void)state;
    const int64_t nside = test_sanitize() ? 256 : 512;
    const int nsim = test_sanitize() ? 10 : 50;
    const int lsim = 900, lmax = 600;
    clef_cosmo_params cp;
    clef_cosmo_params_planck2018(&cp);
    double *cl = calloc(lsim + 1, sizeof *cl);
    assert_int_equal(clef_theory_cl(&cp, lsim, cl), CLEF_OK);
    double l_true, d_true;
    assert_int_equal(clef_theory_first_peak(&cp, &l_true, &d_true), CLEF_OK);
    assert_true(fabs(l_true - 220.1) < 0.05 * 220.1); /* within the model's stated ~few % */

    clef_map *mask = cut_mask(nside, 17.0, 8.0);
    clef_sht *sht = NULL;
    clef_sht_opts so_sht = {0};
    assert_int_equal(clef_sht_create(&sht, nside, lsim, &so_sht), CLEF_OK);
    clef_map *m = NULL;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.lmax = lmax;
    o.bin_width = 20;
    o.beam_fwhm = 10.0;
    o.iterations = 0;
    int inside = 0;
    double sum_l = 0, sum_l2 = 0, sum_err = 0, fsky = 0;
    for (int s = 0; s < nsim; s++) {
        clef_sim_opts so = {0};
        so.seed = 5000 + s;
        so.beam_fwhm = 10.0;
        double *maps[1] = {m->pix};
        assert_int_equal(clef_sim_map(sht, cl, &so, NULL, maps, NULL), CLEF_OK);
        clef_spectrum_result r;
        assert_int_equal(clef_spectrum_compute(m, NULL, mask, NULL, &o, &r), CLEF_OK);
        fsky = r.fsky;
        assert_true(r.peak_done);
        assert_true(r.peak.found);
        if (fabs(r.peak.l_peak - l_true) <= 2 * r.peak.l_peak_err)
            inside++;
        sum_l += r.peak.l_peak;
        sum_l2 += r.peak.l_peak * r.peak.l_peak;
        sum_err += r.peak.l_peak_err;
        clef_spectrum_result_free(&r);
    }
    double mean = sum_l / nsim, sd = sqrt((sum_l2 / nsim - mean * mean) * nsim / (nsim - 1.0));
    print_message("peak: model %.2f, mean recovered %.2f, scatter %.2f, mean quoted %.2f, "
                  "%d/%d within 2 sigma, f_sky %.2f\n",
                  l_true, mean, sd, sum_err / nsim, inside, nsim, fsky);
    assert_true(fsky > 0.65 && fsky < 0.75); /* ~70% of the sky (issue 6) */
    assert_true(inside >= (int)ceil(0.9 * nsim));
    /* Honest errors: the mean quoted sigma of l_peak matches the scatter of
     * l_peak over the skies within 20% (issue 6). */
    if (!test_sanitize() && fabs(sum_err / nsim / sd - 1) > 0.2)
        fail_msg("quoted sigma %.2f vs scatter %.2f of l_peak", sum_err / nsim, sd);
    clef_map_free(m);
    clef_map_free(mask);
    clef_sht_destroy(sht);
    free(cl);
}

/* Noise subtraction for an auto-spectrum: white noise with a known N_l =
 * Omega_pix sigma_pix^2 (METHODS.md section 4, exact for uncorrelated pixel
 * noise) removed through the coupling leaves an unbiased spectrum. */
static void test_noise_subtraction(void **state)
{
    (void)state;
    const int64_t nside = 64;
    const int lmax = 191;
    const int nsim = test_sanitize() ? 8 : 30;
    double *cl = calloc(lmax + 1, sizeof *cl), *nl = calloc(lmax + 1, sizeof *nl);
    for (int l = 2; l <= lmax; l++)
        cl[l] = 2000.0 * 2 * M_PI / (l * (l + 1.0));
    const double depth = 200.0, sig = clef_sim_sigma_pix(nside, depth);
    const double npl = 4 * M_PI / (12.0 * nside * nside) * sig * sig;
    for (int l = 0; l <= lmax; l++)
        nl[l] = npl;
    clef_map *mask = cut_mask(nside, 20.0, 15.0);
    clef_bins *bins = NULL;
    assert_int_equal(clef_bins_create_linear(&bins, 2, 20, lmax, CLEF_BINS_DL), CLEF_OK);
    int nb = clef_bins_count(bins);
    double *want = calloc(nb, sizeof *want), *sum = calloc(nb, sizeof *sum),
           *sum2 = calloc(nb, sizeof *sum2);
    bin_input(bins, cl, lmax, want);
    clef_sht *sht = NULL;
    assert_int_equal(clef_sht_create(&sht, nside, lmax, NULL), CLEF_OK);
    clef_map *m = NULL;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.lmax = lmax;
    o.bins = bins;
    o.noise_cl = nl;
    o.noise_lmax = lmax;
    o.find_peak = 0;
    for (int s = 0; s < nsim; s++) {
        clef_sim_opts so = {0};
        so.seed = 77 + s;
        so.noise_depth = depth;
        double *maps[1] = {m->pix};
        assert_int_equal(clef_sim_map(sht, cl, &so, NULL, maps, NULL), CLEF_OK);
        clef_spectrum_result r;
        assert_int_equal(clef_spectrum_compute(m, NULL, mask, NULL, &o, &r), CLEF_OK);
        for (int b = 0; b < nb; b++) {
            sum[b] += r.bp->dl[b];
            sum2[b] += r.bp->dl[b] * r.bp->dl[b];
        }
        clef_spectrum_result_free(&r);
    }
    for (int b = 1; b < nb; b++) {
        if (clef_bins_l_hi(bins, b) > 2 * nside) /* the transform is accurate to 2 nside */
            continue;
        double mean = sum[b] / nsim;
        double se = sqrt((sum2[b] / nsim - mean * mean) / (nsim - 1.0));
        if (fabs(mean - want[b]) > 3.5 * se)
            fail_msg("bin %d: mean %.2f vs input %.2f (3.5 s.e. %.2f)", b, mean, want[b],
                     3.5 * se);
    }
    clef_map_free(m);
    clef_map_free(mask);
    clef_sht_destroy(sht);
    clef_bins_destroy(bins);
    free(cl);
    free(nl);
    free(want);
    free(sum);
    free(sum2);
}

/* Monopole and dipole fit: on the full sky a map a + d.n is removed
 * exactly (the fit is a linear least-squares problem with an exact
 * solution; common practice). */
static void test_multipoles(void **state)
{
    (void)state;
    const int64_t nside = 16, npix = 12 * nside * nside;
    double *map = malloc(npix * sizeof *map), *w = malloc(npix * sizeof *w);
    for (int64_t p = 0; p < npix; p++) {
        double v[3];
        pix2vec_ring64(nside, p, v);
        map[p] = 3.0 + 1.5 * v[0] - 2.0 * v[1] + 0.25 * v[2];
        w[p] = v[2] > -0.3 ? 1.0 : 0.0; /* a partial sky still fixes 4 numbers */
    }
    double c[4];
    assert_int_equal(clef_spectrum_remove_multipoles(map, w, nside, 1, c), CLEF_OK);
    check_abs(c[0], 3.0, 1e-12, "exact model");
    check_abs(c[1], 1.5, 1e-12, "exact model");
    check_abs(c[2], -2.0, 1e-12, "exact model");
    check_abs(c[3], 0.25, 1e-12, "exact model");
    for (int64_t p = 0; p < npix; p++)
        assert_true(fabs(map[p]) < 1e-11);
    for (int64_t p = 0; p < npix; p++)
        w[p] = 0;
    assert_int_equal(clef_spectrum_remove_multipoles(map, w, nside, 1, c), CLEF_EINVAL);
    free(map);
    free(w);
}

/* Error paths: nside mismatch, empty mask, lmax too high, bins that leave
 * the coupling singular, a second mask without a second map. */
static void test_errors(void **state)
{
    (void)state;
    clef_map *m16 = NULL, *m32 = full_mask(32), *mask32 = full_mask(32);
    assert_int_equal(clef_map_alloc(&m16, 16), CLEF_OK);
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.use_cache = 0;
    o.find_peak = 0;
    clef_spectrum_result r;
    assert_int_equal(clef_spectrum_compute(m16, NULL, mask32, NULL, &o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "nside"));

    clef_map *zero = NULL;
    assert_int_equal(clef_map_alloc(&zero, 32), CLEF_OK);
    assert_int_equal(clef_spectrum_compute(m32, NULL, zero, NULL, &o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "no observed sky"));

    o.lmax = 96; /* 3 nside */
    assert_int_equal(clef_spectrum_compute(m32, NULL, mask32, NULL, &o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "3*nside-1"));

    /* A tiny patch with single-multipole bins: K is singular or badly
     * conditioned, and the message suggests a bin width. */
    clef_map *patch = NULL, *sky = NULL;
    assert_int_equal(clef_map_alloc(&patch, 32), CLEF_OK);
    assert_int_equal(clef_map_alloc(&sky, 32), CLEF_OK);
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    for (int64_t p = 0; p < sky->npix; p++)
        sky->pix[p] = gsl_ran_gaussian(rng, 1.0);
    gsl_rng_free(rng);
    for (int64_t p = 0; p < 4; p++)
        patch->pix[p] = 1.0; /* the four pixels around the north pole */
    o.lmax = 90;
    o.bin_width = 1;
    o.keep_multipoles = 1;
    int st = clef_spectrum_compute(sky, NULL, patch, NULL, &o, &r);

    assert_int_equal(st, CLEF_ENUMERIC);
    assert_non_null(strstr(clef_last_error(), "bin"));

    o.lmax = 0;
    o.bin_width = 0;
    o.keep_multipoles = 0;
    assert_int_equal(clef_spectrum_compute(m32, NULL, mask32, mask32, &o, &r), CLEF_EINVAL);
    clef_map_free(m16);
    clef_map_free(m32);
    clef_map_free(mask32);
    clef_map_free(zero);
    clef_map_free(patch);
    clef_map_free(sky);
}

/* Same inputs, 1 and 2 threads: identical band powers (the transform and
 * the coupling are thread-count independent by construction). */
static void test_threads(void **state)
{
    (void)state;
    const int64_t nside = 32;
    clef_map *mask = cut_mask(nside, 20, 10), *map = NULL;
    assert_int_equal(clef_map_alloc(&map, nside), CLEF_OK);
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    for (int64_t p = 0; p < map->npix; p++)
        map->pix[p] = gsl_ran_gaussian(rng, 1.0);
    gsl_rng_free(rng);
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.use_cache = 0;
    o.find_peak = 0;
    clef_spectrum_result r1, r2;
    omp_set_num_threads(1);
    assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &o, &r1), CLEF_OK);
    omp_set_num_threads(2);
    assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &o, &r2), CLEF_OK);
    assert_int_equal(r1.nbins, r2.nbins);
    for (int b = 0; b < r1.nbins; b++) {
        check_rel(r2.bp->dl[b], r1.bp->dl[b], 1e-12, "1 vs 2 threads");
        check_rel(r2.bp->dl_err[b], r1.bp->dl_err[b], 1e-10, "1 vs 2 threads");
    }
    clef_spectrum_result_free(&r1);
    clef_spectrum_result_free(&r2);
    clef_map_free(map);
    clef_map_free(mask);
}

/* Units: a map in K (TUNIT 'K_CMB') gives the same band powers in uK^2 as
 * the same sky in uK (1 K = 1e6 uK, SI prefixes). */
static void test_units(void **state)
{
    (void)state;
    check_abs(clef_unit_to_uk("K_CMB"), 1e6, 0, "SI prefix");
    check_abs(clef_unit_to_uk(" mK "), 1e3, 0, "SI prefix");
    check_abs(clef_unit_to_uk("uK"), 1, 0, "SI prefix");
    check_abs(clef_unit_to_uk("muK_CMB"), 1, 0, "SI prefix");
    check_abs(clef_unit_to_uk("Jy/sr"), 0, 0, "not a temperature");
    const int64_t nside = 32;
    clef_map *mask = cut_mask(nside, 20, 10), *uk = NULL, *k = NULL;
    assert_int_equal(clef_map_alloc(&uk, nside), CLEF_OK);
    assert_int_equal(clef_map_alloc(&k, nside), CLEF_OK);
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    for (int64_t p = 0; p < uk->npix; p++) {
        uk->pix[p] = gsl_ran_gaussian(rng, 100.0);
        k->pix[p] = uk->pix[p] * 1e-6;
    }
    gsl_rng_free(rng);
    strcpy(uk->unit, "uK");
    strcpy(k->unit, "K_CMB");
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.use_cache = 0;
    o.find_peak = 0;
    clef_spectrum_result r1, r2;
    assert_int_equal(clef_spectrum_compute(uk, NULL, mask, NULL, &o, &r1), CLEF_OK);
    assert_int_equal(clef_spectrum_compute(k, NULL, mask, NULL, &o, &r2), CLEF_OK);
    for (int b = 0; b < r1.nbins; b++)
        check_rel(r2.bp->dl[b], r1.bp->dl[b], 1e-9, "K map scaled to uK");
    clef_spectrum_result_free(&r1);
    clef_spectrum_result_free(&r2);
    clef_map_free(uk);
    clef_map_free(k);
    clef_map_free(mask);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_multipoles),
        cmocka_unit_test(test_full_sky_exact),
        cmocka_unit_test(test_errors),
        cmocka_unit_test(test_threads),
        cmocka_unit_test(test_units),
        cmocka_unit_test(test_noise_subtraction),
        cmocka_unit_test(test_windows_ensemble),
        cmocka_unit_test(test_masked_ensemble),
        cmocka_unit_test(test_peak_recovery),
    };
    if (getenv("CLEF_TEST_FILTER")) /* run one test by name while developing */
        cmocka_set_test_filter(getenv("CLEF_TEST_FILTER"));
    return cmocka_run_group_tests(tests, NULL, NULL);
}
