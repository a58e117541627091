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
#include <lapacke.h>
#include <omp.h>

#include "clef/beam.h"
#include "clef/bins.h"
#include "clef/coupling.h"
#include "clef/mask.h"
#include "clef/cosmo.h"
#include "clef/sht.h"
#include "clef/sim.h"
#include "clef/spectrum.h"
#include "clef/theory.h"
#include "spectrum_deproj.h" /* private: the deprojection correction, checked directly */

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

/* Full sky, no noise, power up to lsim >= lmax: the band powers up to lmax
 * are the exact binned C_l of the map's own a_lm (the coupling matrix is
 * the identity), to the transform's accuracy. */
static void full_sky_case(int64_t nside, int lmax, int lsim, double tol)
{
    double *cl = calloc(lsim + 1, sizeof *cl), *cl_alm = calloc(lsim + 1, sizeof *cl_alm);
    for (int l = 2; l <= lsim; l++)
        cl[l] = 1000.0 / (l * (l + 1.0)); /* flat D_l: every bin matters equally */
    double complex *alm = calloc(clef_alm_size(lsim, lsim), sizeof *alm);
    random_alm(lsim, cl, 11, alm);
    assert_int_equal(clef_alm_cl(lsim, lsim, alm, NULL, cl_alm), CLEF_OK);

    clef_sht *sht = NULL;
    assert_int_equal(clef_sht_create(&sht, nside, lsim, NULL), CLEF_OK);
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
    double *want = calloc(nb, sizeof *want), worst = 0;
    bin_input(bins, cl_alm, lmax, want);
    for (int b = 0; b < nb; b++) {
        worst = fmax(worst, fabs(r.bp->dl[b] / want[b] - 1));
        check_rel(r.bp->dl[b], want[b], tol, "exact binned C_l of the a_lm (Hivon et al. 2002 P)");
    }
    print_message("full sky nside %lld, lmax %d, power to %d: worst relative error %.2g\n",
                  (long long)nside, lmax, lsim, worst);
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
    /* Band-limited at lmax: 1e-6 (lmax <= nside) and 1e-3 (lmax = 2 nside)
     * when the map was analysed to lmax (issue 6).  The estimator now
     * analyses to 3 nside - 1 for its hidden bins (issue 11), which costs a
     * map band-limited at lmax some accuracy but is the more accurate
     * choice for maps with power up to 3 nside - 1, as real maps have
     * (docs/method.md section 5).  Tolerances: 1.5-2.5x the worst 4-wide
     * bin measured (1.2e-5, 3.9e-3, 3.1e-3, 1.5e-3); every one is far below
     * the cosmic variance of such a bin (~6% at l = 64). */
    full_sky_case(32, 32, 32, 3e-5);
    full_sky_case(32, 64, 64, 6e-3);
    full_sky_case(32, 64, 95, 5e-3);
    full_sky_case(64, 128, 191, 3e-3);
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

/* ---- ensembles for the top of the range, low-l errors and calibration ----
 *
 * One helper runs nsim simulated skies through clef_spectrum_compute and
 * collects per bin: the mean band power, its scatter, the mean quoted error,
 * the correlation across skies of D_b with its own quoted sigma_b, and the
 * difference D_b - sum_l W_bl D_l(own) of each sky's band power and its
 * own spectrum (the realised D_l of its a_lm, through the windows).  That
 * difference has no cosmic variance, so its mean tests the bias of the
 * estimator far more tightly than a comparison with the input spectrum. */

enum { SPEC_MODEL, SPEC_CLOSED, SPEC_OPEN, SPEC_POWER, SPEC_RED };

/* Input C_l: the analytic model (Planck 2018 flat, or Omega_k = -0.04 /
 * +0.04), D_l = 300 (l/10)^0.6 (a rising power law), or C_l = 2e4 (l+8)^-2.6
 * (a red spectrum): spectra the covariance was not tuned on. */
static void input_cl(int spec, int lsim, double *cl)
{
    if (spec <= SPEC_OPEN) {
        clef_cosmo_params cp;
        clef_cosmo_params_planck2018(&cp);
        cp.omega_k = spec == SPEC_CLOSED ? -0.04 : spec == SPEC_OPEN ? 0.04 : 0.0;
        assert_int_equal(clef_theory_cl(&cp, lsim, cl), CLEF_OK);
        return;
    }
    cl[0] = cl[1] = 0;
    for (int l = 2; l <= lsim; l++)
        cl[l] = spec == SPEC_POWER ? 2 * M_PI * 300 * pow(l / 10.0, 0.6) / (l * (l + 1.0))
                                   : 2e4 * pow(l + 8.0, -2.6);
}

typedef struct ens_cfg {
    int64_t nside;
    int lmax, lsim, lcut;    /* lmax 0: default; power up to lsim, zero above lcut (0: none) */
    int width;               /* 0: automatic */
    int mask;                /* 0 full, 1 galactic cut, 2 patch */
    double patch_deg;        /* patch radius */
    double noise;            /* uK-arcmin; subtracted with noise_cl (auto) */
    int cross;               /* cross-spectrum of two noise splits */
    int spec, nsim;
    unsigned long seed;
} ens_cfg;

typedef struct ens_out {
    int nb, lmax, lmax_ext;
    int lo[64], hi[64];
    double mean[64], sd[64], err[64], corr[64], dmean[64], dse[64], want[64], cv[64];
    double amp, amp_se;      /* amplitude fit with each sky's own covariance */
    double damp, damp_se;    /* its mean difference with a fit of the sky's own spectrum with
                                fixed weights (those of the first sky): no cosmic variance */
} ens_out;

static clef_map *ens_mask(const ens_cfg *c)
{
    if (c->mask == 1)
        return cut_mask(c->nside, 17.0, 10.0);
    clef_map *m = full_mask(c->nside);
    if (c->mask == 2)
        assert_int_equal(clef_mask_keep_disc(m, 0.3, 0.5, c->patch_deg * M_PI / 180), CLEF_OK);
    return m;
}

static void run_ensemble(const ens_cfg *c, ens_out *e)
{
    memset(e, 0, sizeof *e);
    const int lsim = c->lsim;
    double *cl = calloc(lsim + 1, sizeof *cl), *own = calloc(lsim + 1, sizeof *own);
    input_cl(c->spec, lsim, cl);
    if (c->lcut)
        for (int l = c->lcut + 1; l <= lsim; l++)
            cl[l] = 0;
    clef_map *mask = ens_mask(c), *m1 = NULL, *m2 = NULL;
    assert_int_equal(clef_map_alloc(&m1, c->nside), CLEF_OK);
    assert_int_equal(clef_map_alloc(&m2, c->nside), CLEF_OK);
    clef_sht *sht = NULL;
    assert_int_equal(clef_sht_create(&sht, c->nside, lsim, NULL), CLEF_OK);
    double complex *alm = malloc(clef_alm_size(lsim, lsim) * sizeof *alm);
    const int l3 = (int)(3 * c->nside - 1);
    double *nl = calloc(l3 + 1, sizeof *nl);
    const double sig = clef_sim_sigma_pix(c->nside, c->noise);
    for (int l = 0; l <= l3; l++) /* white noise: Omega_pix sigma_pix^2 (METHODS.md 4) */
        nl[l] = 4 * M_PI / (12.0 * c->nside * c->nside) * sig * sig;
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.lmax = c->lmax;
    o.bin_width = c->width;
    o.find_peak = 0;
    if (c->noise > 0 && !c->cross) {
        o.noise_cl = nl;
        o.noise_lmax = l3;
    }
    double s1[64] = {0}, s2[64] = {0}, se[64] = {0}, see[64] = {0}, sde[64] = {0};
    double d1[64] = {0}, d2[64] = {0}, sa = 0, sa2 = 0, sd1 = 0, sd2 = 0;
    double u0[64] = {0}, den0 = 0;
    for (int s = 0; s < c->nsim; s++) {
        clef_sim_opts so = {0};
        so.seed = c->seed + s;
        so.noise_depth = c->noise;
        so.nsplits = c->cross ? 2 : 1;
        double *maps[2] = {m1->pix, m2->pix};
        assert_int_equal(clef_sim_map(sht, cl, &so, alm, maps, NULL), CLEF_OK);
        assert_int_equal(clef_alm_cl(lsim, lsim, alm, NULL, own), CLEF_OK);
        clef_spectrum_result r;
        assert_int_equal(clef_spectrum_compute(m1, c->cross ? m2 : NULL, mask, NULL, &o, &r),
                         CLEF_OK);
        const clef_bandpowers *bp = r.bp;
        const int nb = bp->nbins;
        assert_true(nb <= 64);
        const size_t nw = (size_t)bp->win_lmax + 1;
        if (s == 0) {
            e->nb = nb;
            e->lmax = r.lmax;
            e->lmax_ext = r.lmax_ext;
            for (int b = 0; b < nb; b++) {
                e->lo[b] = bp->l_lo[b];
                e->hi[b] = bp->l_hi[b];
                for (size_t l = 2; l < nw && (int)l <= lsim; l++)
                    e->want[b] += bp->win[b * nw + l] * l * (l + 1.0) / (2 * M_PI) * cl[l];
                /* Full sky: the cosmic variance of the bin, 2 D_l^2 / (2l+1)
                 * averaged over it (Knox 1995, PRD 52, 4307). */
                for (int l = e->lo[b]; l <= e->hi[b]; l++) {
                    const double dl = l * (l + 1.0) / (2 * M_PI) * cl[l];
                    e->cv[b] += 2 * dl * dl / (2 * l + 1.0);
                }
                e->cv[b] = sqrt(e->cv[b]) / (e->hi[b] - e->lo[b] + 1);
            }
        }
        double wown[64];
        for (int b = 0; b < nb; b++) {
            double wo = 0;
            for (size_t l = 2; l < nw && (int)l <= lsim; l++)
                wo += bp->win[b * nw + l] * l * (l + 1.0) / (2 * M_PI) * own[l];
            wown[b] = wo;
            const double d = bp->dl[b], er = bp->dl_err[b];
            s1[b] += d;
            s2[b] += d * d;
            se[b] += er;
            see[b] += er * er;
            sde[b] += d * er;
            d1[b] += d - wo;
            d2[b] += (d - wo) * (d - wo);
        }
        /* Amplitude of the input (through the windows) fitted with this
         * sky's own full covariance, over the bins after the first (whose
         * error follows its own band power, docs/method.md section 7). */
        const int nf = nb - 1;
        double cov[64 * 64], u[64];
        for (int i = 0; i < nf; i++) {
            u[i] = e->want[i + 1];
            for (int j = 0; j < nf; j++)
                cov[i * nf + j] = bp->cov[(size_t)(i + 1) * nb + j + 1];
        }
        assert_int_equal(LAPACKE_dposv(LAPACK_ROW_MAJOR, 'U', nf, 1, cov, nf, u, 1), 0);
        double num = 0, den = 0;
        for (int i = 0; i < nf; i++) {
            num += u[i] * bp->dl[i + 1];
            den += u[i] * e->want[i + 1];
        }
        sa += num / den;
        sa2 += (num / den) * (num / den);
        if (s == 0) {
            memcpy(u0, u, sizeof u0);
            den0 = den;
        }
        double own_a = 0;
        for (int i = 0; i < nf; i++)
            own_a += u0[i] * wown[i + 1];
        const double da = num / den - own_a / den0;
        sd1 += da;
        sd2 += da * da;
        clef_spectrum_result_free(&r);
    }
    const double n = c->nsim;
    for (int b = 0; b < e->nb; b++) {
        e->mean[b] = s1[b] / n;
        e->sd[b] = sqrt(fmax(s2[b] / n - e->mean[b] * e->mean[b], 0) * n / (n - 1));
        e->err[b] = se[b] / n;
        const double ve = see[b] / n - e->err[b] * e->err[b];
        const double vd = s2[b] / n - e->mean[b] * e->mean[b];
        e->corr[b] = ve > 0 && vd > 0 ? (sde[b] / n - e->mean[b] * e->err[b]) / sqrt(ve * vd) : 0;
        e->dmean[b] = d1[b] / n;
        e->dse[b] = sqrt(fmax(d2[b] / n - e->dmean[b] * e->dmean[b], 0) / (n - 1));
    }
    e->amp = sa / n;
    e->amp_se = sqrt(fmax(sa2 / n - e->amp * e->amp, 0) / (n - 1));
    e->damp = sd1 / n;
    e->damp_se = sqrt(fmax(sd2 / n - e->damp * e->damp, 0) / (n - 1));
    clef_map_free(mask);
    clef_map_free(m1);
    clef_map_free(m2);
    clef_sht_destroy(sht);
    free(alm);
    free(cl);
    free(own);
    free(nl);
}

/* Every bin within 3 standard errors (of the mean band power over the
 * skies) of the mean of the skies' own spectra through the windows (issue
 * 11's criterion), and, tighter, within 3 standard errors of the mean
 * difference D_b - W D_own (which has no cosmic variance) or 0.3% of D_b,
 * whichever is larger (the transform's own accuracy near 2 nside is a few
 * 1e-4: docs/transforms.md).  Returns the worst deviation in the first
 * sense. */
static double check_unbiased(const char *what, const ens_out *e, int nsim)
{
    double worst = 0, worst_d = 0;
    for (int b = 0; b < e->nb; b++) {
        const double se = e->sd[b] / sqrt((double)nsim);
        const double z = e->dmean[b] / se;
        worst = fmax(worst, fabs(z));
        worst_d = fmax(worst_d, fabs(e->dmean[b]) / e->dse[b]);
        if (test_sanitize()) /* a handful of skies: printed, not judged */
            continue;
        if (fabs(z) > 3)
            fail_msg("%s: bin %d-%d: mean D - W D_own = %.3f, %.1f standard errors (%.3f)", what,
                     e->lo[b], e->hi[b], e->dmean[b], z, se);
        if (fabs(e->dmean[b]) > fmax(3 * e->dse[b], 3e-3 * fabs(e->mean[b])))
            fail_msg("%s: bin %d-%d: mean D - W D_own = %.3f (%.2f%% of D), %.1f standard errors "
                     "of the difference", what, e->lo[b], e->hi[b], e->dmean[b],
                     100 * e->dmean[b] / e->mean[b], e->dmean[b] / e->dse[b]);
    }
    print_message("%s: lmax %d (coupled to %d), %d bins: worst bias %.2f s.e. (%.1f s.e. of the "
                  "difference with the own spectra); last bin %d-%d: %+.3f%% of D\n", what,
                  e->lmax, e->lmax_ext, e->nb, worst, worst_d, e->lo[e->nb - 1], e->hi[e->nb - 1],
                  100 * e->dmean[e->nb - 1] / e->mean[e->nb - 1]);
    return worst;
}

/* Top of the multipole range (issue 11): full-sky and masked skies with and
 * without power above lmax; every bin up to the default lmax (at most
 * 2 nside, whole bins) unbiased.  Before hidden bins, a masked sky with
 * power above lmax biased the last bins by percents, and bins above
 * 2 nside (the old default lmax was 3 nside - 1) by -1% to -13%. */
static void test_top_of_range(void **state)
{
    (void)state;
    const int nsim = test_long() ? 60 : test_sanitize() ? 4 : 16;
    const int64_t nside = 64;
    const int l3 = (int)(3 * nside - 1);
    static const struct { const char *name; int mask, lcut; } k[] = {
        {"full sky, power to 3 nside - 1", 0, 0},
        {"galactic cut, power to 3 nside - 1", 1, 0},
        {"galactic cut, no power above lmax", 1, 121},
        {"15-degree patch, power to 3 nside - 1", 2, 0}};
    for (size_t i = 0; i < sizeof k / sizeof k[0]; i++) {
        ens_cfg c = {.nside = nside, .lsim = l3, .lcut = k[i].lcut, .width = 20, .mask = k[i].mask,
                     .patch_deg = 15, .spec = SPEC_MODEL, .nsim = nsim, .seed = 9100 + 100 * i};
        if (k[i].mask == 2)
            c.width = 0;
        ens_out e;
        run_ensemble(&c, &e);
        assert_true(e.lmax <= 2 * nside);
        for (int b = 0; b < e.nb; b++) /* whole bins: no ragged last bin */
            assert_int_equal(e.hi[b] - e.lo[b], e.hi[0] - e.lo[0]);
        check_unbiased(k[i].name, &e, c.nsim);
    }
}

/* A user lmax below 3 nside - 1 (the case: --lmax 500 at nside
 * 256, whose last bin 482-500 was +3.3%): the power above lmax goes to the
 * hidden bins, and the last bin is unbiased. */
static void test_user_lmax(void **state)
{
    (void)state;
    const int64_t nside = test_sanitize() ? 64 : 256;
    const int lmax = test_sanitize() ? 125 : 500;
    ens_cfg c = {.nside = nside, .lmax = lmax, .lsim = (int)(3 * nside - 1), .width = 20,
                 .mask = 1, .spec = SPEC_MODEL, .nsim = test_long() ? 40 : test_sanitize() ? 3 : 8,
                 .seed = 9700};
    ens_out e;
    run_ensemble(&c, &e);
    assert_int_equal(e.lmax, lmax);
    assert_int_equal(e.hi[e.nb - 1], lmax);
    assert_true(e.lmax_ext == 3 * nside - 1);
    check_unbiased("user lmax", &e, c.nsim);
}

/* Low-l errors (issue 11): the first bin's quoted error within 15% of the
 * scatter on the full sky and on a galactic cut (it was ~3x too large: the
 * covariance averaged C_l flat over the D_l-weighted bin); on a 15-degree
 * patch every bin unbiased with the monopole and dipole removed (the bin
 * 2-24 was -61%, 30 standard errors) and the first error within 25%. */
static void test_low_l(void **state)
{
    (void)state;
    const int nsim = test_long() ? 1000 : test_sanitize() ? 20 : 300;
    for (int mask = 0; mask <= 2; mask++) {
        ens_cfg c = {.nside = mask == 2 ? 64 : 32, .lsim = mask == 2 ? 191 : 95, .width = 20,
                     .mask = mask, .patch_deg = 15, .spec = SPEC_MODEL, .nsim = mask == 2 ? nsim / 3 : nsim,
                     .seed = 12000 + 1000 * mask};
        if (mask == 2)
            c.width = 0;
        ens_out e;
        run_ensemble(&c, &e);
        const double q = e.err[0] / e.sd[0];
        /* The scatter of N skies is itself uncertain by 1/sqrt(2N): 4% for 300. */
        print_message("low l, %s: first bin %d-%d quoted %.2f, scatter %.2f (ratio %.3f, %d skies), "
                      "mean %.1f vs input %.1f\n",
                      mask == 0 ? "full sky" : mask == 1 ? "galactic cut" : "15-degree patch",
                      e.lo[0], e.hi[0], e.err[0], e.sd[0], q, c.nsim, e.mean[0], e.want[0]);
        if (!test_sanitize() && fabs(q - 1) > (mask == 2 ? 0.25 : 0.15))
            fail_msg("first bin: quoted error / scatter = %.3f", q);
        check_unbiased(mask == 0 ? "low l, full sky" : mask == 1 ? "low l, galactic cut"
                                                                 : "low l, 15-degree patch", &e, c.nsim);
    }
}

/* Quoted errors across settings, on input spectra the covariance was not
 * tuned on (issue 11).  Against the scatter over the skies: the mean ratio
 * quoted / scatter over the bins within 5% plus 3 sampling errors of the
 * scatter (1/sqrt(2 (N-1) nbins)), every bin within 10% plus 3 sampling
 * errors; on the full sky also against the exact cosmic variance (Knox
 * 1995), within 6% per bin.  corr(D_b, sigma_b) across skies small (it was
 * 0.97-1.00 when the covariance used each bin's own band power; the first
 * bin still does, docs/method.md section 7): its mean over the bins within
 * 0.1 plus 3/sqrt(N nbins).  An amplitude fit with each sky's own
 * covariance (bins after the first) unbiased: its difference with a
 * fixed-weight fit of the sky's own spectrum within 3 standard errors (no
 * cosmic variance). */
static void test_error_calibration(void **state)
{
    (void)state;
    const int nsim = test_long() ? 300 : test_sanitize() ? 6 : 60;
    static const struct { int width, mask, spec, cross; double patch, noise; const char *name; } k[] = {
        {10, 1, SPEC_POWER, 0, 0, 20, "width 10, galactic cut, power law, noise subtracted"},
        {30, 0, SPEC_CLOSED, 0, 0, 0, "width 30, full sky, closed model"},
        {40, 2, SPEC_RED, 1, 25, 30, "width 40, 25-degree patch, red spectrum, cross of noisy splits"},
        {20, 2, SPEC_OPEN, 0, 15, 0, "width 20, 15-degree patch, open model"},
        {50, 1, SPEC_MODEL, 1, 0, 40, "width 50, galactic cut, flat model, cross of noisy splits"}};
    const int nk = test_long() ? 5 : 3;
    for (int i = 0; i < nk; i++) {
        ens_cfg c = {.nside = 64, .lsim = 191, .width = k[i].width, .mask = k[i].mask,
                     .patch_deg = k[i].patch, .noise = k[i].noise, .cross = k[i].cross,
                     .spec = k[i].spec, .nsim = nsim, .seed = 20000 + 1000 * i};
        ens_out e;
        run_ensemble(&c, &e);
        double rsum = 0, csum = 0, rmin = 9, rmax = 0, cvw = 0;
        int nr = 0;
        for (int b = 1; b < e.nb; b++) { /* the first bin uses its own mean (docs/method.md 7) */
            const double q = e.err[b] / e.sd[b];
            rsum += q;
            csum += e.corr[b];
            rmin = fmin(rmin, q);
            rmax = fmax(rmax, q);
            cvw = fmax(cvw, fabs(e.err[b] / e.cv[b] - 1));
            nr++;
        }
        const double samp = 1 / sqrt(2.0 * (nsim - 1));
        print_message("%s: lmax %d, %d bins: quoted/scatter mean %.3f [%.2f, %.2f], mean corr(D, "
                      "sigma) %.3f, amplitude %.4f +- %.4f (minus the skies' own: %+.4f +- %.4f)%s"
                      "%.3f (%d skies)\n", k[i].name, e.lmax, e.nb, rsum / nr, rmin, rmax, csum / nr,
                      e.amp, e.amp_se, e.damp, e.damp_se,
                      k[i].mask == 0 ? ", worst |quoted / cosmic variance - 1| " : ", ",
                      k[i].mask == 0 ? cvw : 0.0, nsim);
        if (test_sanitize())
            continue;
        if (fabs(rsum / nr - 1) > 0.05 + 3 * samp / sqrt(nr) || rmin < 0.9 - 3 * samp ||
            rmax > 1.1 + 3 * samp)
            fail_msg("%s: quoted/scatter mean %.3f, range [%.2f, %.2f]", k[i].name, rsum / nr, rmin,
                     rmax);
        if (k[i].mask == 0 && cvw > 0.06)
            fail_msg("%s: quoted error off the cosmic variance by %.3f", k[i].name, cvw);
        if (fabs(csum / nr) > 0.1 + 3 / sqrt((double)nsim * nr))
            fail_msg("%s: mean corr(D_b, sigma_b) = %.3f", k[i].name, csum / nr);
        if (fabs(e.damp) > 3 * e.damp_se)
            fail_msg("%s: amplitude minus own %.4f +- %.4f", k[i].name, e.damp, e.damp_se);
        check_unbiased(k[i].name, &e, c.nsim);
    }
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

/* The deprojection correction D of the monopole/dipole removal (Elsner,
 * Leistedt & Peiris 2017; src/spectrum_deproj.c) against an exact identity:
 * the removal takes a pure monopole or dipole sky out of the observed
 * region entirely, so the corrected coupling M - D has zero columns l' = 0
 * and 1: D_l0 = M_l0 and D_l1 = M_l1 for every l.  Also (2l+1) D_lL is
 * symmetric (as (2l+1) M_lL).  For the full sky, for sharp and apodized
 * patches, a sharp cut, and two different masks (cross-spectrum; M from
 * the masks' cross W_l). */
static void deproj_case(int64_t nside, const clef_map *ma, const clef_map *mb, int expect_ldep1)
{
    const int L = (int)(3 * nside - 1);
    clef_sht *sht = NULL;
    assert_int_equal(clef_sht_create(&sht, nside, L, NULL), CLEF_OK);
    double complex *aa = malloc(clef_alm_size(L, L) * sizeof *aa);
    double complex *ab = malloc(clef_alm_size(L, L) * sizeof *ab);
    const double *in[1] = {ma->pix};
    double complex *out[1] = {aa};
    assert_int_equal(clef_sht_analysis(sht, 1, in, out, 1), CLEF_OK);
    in[0] = mb->pix;
    out[0] = ab;
    assert_int_equal(clef_sht_analysis(sht, 1, in, out, 1), CLEF_OK);
    double *wl = calloc(L + 1, sizeof *wl);
    assert_int_equal(clef_alm_cl(L, L, aa, ab, wl), CLEF_OK);
    for (int l = 0; l <= L; l++)
        wl[l] = fmax(wl[l], 0);
    clef_coupling *c = NULL;
    assert_int_equal(clef_coupling_create(&c, L, wl, L), CLEF_OK);
    const double *m = clef_coupling_matrix(c);
    double w2 = 0;
    for (int64_t p = 0; p < ma->npix; p++)
        w2 += ma->pix[p] * mb->pix[p];
    clef_spectrum_deproj_in di = {.nside = nside, .lmax = L, .iterations = 1,
                                  .w = {ma->pix, ma == mb ? ma->pix : mb->pix}, .nf = {4, 4},
                                  .w2 = w2 / ma->npix};
    clef_spectrum_deproj_out d;
    assert_int_equal(clef_spectrum_deproj(&di, &d), CLEF_OK);
    const int n = d.ldep;
    if (expect_ldep1)
        assert_int_equal(n, 1); /* full sky: the templates are l = 0, 1 exactly */
    double worst = 0, scale = 0, asym = 0, dscale = 0;
    for (int l = 0; l <= n; l++)
        for (int k = 0; k <= 1; k++) {
            worst = fmax(worst, fabs(d.dmean[l * (n + 1) + k] - m[(size_t)l * (L + 1) + k]));
            scale = fmax(scale, fabs(m[(size_t)l * (L + 1) + k]));
        }
    for (int l = 0; l <= n; l++)
        for (int k = 0; k <= n; k++) {
            asym = fmax(asym, fabs((2 * l + 1) * d.dmean[l * (n + 1) + k] -
                                   (2 * k + 1) * d.dmean[k * (n + 1) + l]));
            dscale = fmax(dscale, fabs((2 * l + 1) * d.dmean[l * (n + 1) + k]));
        }
    print_message("deprojection: l <= %d, max |D - M| over columns 0, 1: %.2g of %.3g; "
                  "asymmetry %.2g of %.3g\n", n, worst, scale, asym, dscale);
    /* Measured 3e-8 to 1.2e-5 of the column scale at nside 32 (the
     * quadrature), 3.5e-4 at nside 16 (the sanitizer's size). */
    assert_true(worst <= (nside >= 32 ? 1e-4 : 1e-3) * scale);
    assert_true(asym <= 1e-8 * dscale);
    clef_spectrum_deproj_free(&d);
    clef_coupling_destroy(c);
    clef_sht_destroy(sht);
    free(aa);
    free(ab);
    free(wl);
}

static void test_deprojection_identity(void **state)
{
    (void)state;
    const int64_t nside = test_sanitize() ? 16 : 32;
    clef_map *full = full_mask(nside), *patch = full_mask(nside), *cut = cut_mask(nside, 20, 10);
    clef_map *sharp = full_mask(nside), *holed = NULL, *apod = NULL;
    assert_int_equal(clef_mask_keep_disc(patch, 0.3, 0.5, 20 * M_PI / 180), CLEF_OK);
    assert_int_equal(clef_mask_cut_latitude(sharp, 17 * M_PI / 180), CLEF_OK);
    clef_mask_apod_opts ao = {CLEF_MASK_APOD_C2, 8 * M_PI / 180, 0};
    assert_int_equal(clef_mask_apodize(&apod, patch, &ao), CLEF_OK);
    assert_int_equal(clef_map_alloc(&holed, nside), CLEF_OK);
    memcpy(holed->pix, cut->pix, (size_t)cut->npix * sizeof(double));
    assert_int_equal(clef_mask_cut_disc(holed, 1.0, 0.8, 12 * M_PI / 180), CLEF_OK);
    deproj_case(nside, full, full, 1);
    deproj_case(nside, patch, patch, 0);
    deproj_case(nside, apod, apod, 0);
    deproj_case(nside, sharp, sharp, 0);
    deproj_case(nside, cut, holed, 0);
    clef_map *maps[] = {full, patch, cut, sharp, holed, apod};
    for (int i = 0; i < 6; i++)
        clef_map_free(maps[i]);
}

/* The multipole-range rules (docs/method.md section 5): the default lmax is
 * 2 nside trimmed to whole bins, a given lmax above 2 nside is warned
 * about, a short remainder at the top joins the last bin, hidden bins run
 * to 3 nside - 1 (or the beam floor), and the windows' rows sum to 1. */
/* A map of independent Gaussian pixels (GSL, fixed seed). */
static clef_map *white_map(int64_t nside, double sigma)
{
    clef_map *m = NULL;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    for (int64_t p = 0; p < m->npix; p++)
        m->pix[p] = gsl_ran_gaussian(rng, sigma);
    gsl_rng_free(rng);
    return m;
}

static char warn_text[4096];
static void capture_warn(void *user, int level, const char *msg)
{
    (void)user;
    if (level == CLEF_LOG_WARN)
        snprintf(warn_text + strlen(warn_text), sizeof warn_text - strlen(warn_text), "%s\n", msg);
}

static void test_lmax_rules(void **state)
{
    (void)state;
    const int64_t nside = 32;
    clef_map *mask = cut_mask(nside, 20, 10), *map = white_map(nside, 100.0);
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.find_peak = 0;
    o.bin_width = 20;
    int l = 0;
    assert_int_equal(clef_spectrum_default_lmax(&o, nside, &l), CLEF_OK);
    assert_int_equal(l, 64);
    clef_spectrum_result r;
    clef_set_log(capture_warn, NULL);
    warn_text[0] = 0;
    assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &o, &r), CLEF_OK);
    assert_int_equal(r.lmax, 61); /* 2 + 3 x 20 - 1: whole bins below 64 */
    assert_int_equal(r.lmax_ext, 95);
    assert_true(r.nbins_hidden >= 1);
    assert_null(strstr(warn_text, "above 2*nside"));
    for (int b = 0; b < r.nbins; b++) {
        double s = 0;
        for (int k = 0; k <= r.bp->win_lmax; k++)
            s += r.bp->win[(size_t)b * (r.bp->win_lmax + 1) + k];
        check_abs(s, 1.0, 1e-9, "rows sum to 1 (docs/formats-spectrum.md)");
        check_abs(r.bp->win[(size_t)b * (r.bp->win_lmax + 1) + 1], 0.0, 0.0, "dipole removed");
    }
    clef_spectrum_result_free(&r);
    o.lmax = 63; /* remainder 2 < half a width: joins the last bin */
    assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &o, &r), CLEF_OK);
    assert_int_equal(r.nbins, 3);
    assert_int_equal(r.bp->l_lo[2], 42);
    assert_int_equal(r.bp->l_hi[2], 63);
    clef_spectrum_result_free(&r);
    o.lmax = 55; /* remainder 14 >= half a width: a bin of its own */
    assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &o, &r), CLEF_OK);
    assert_int_equal(r.nbins, 3);
    assert_int_equal(r.bp->l_hi[1], 41);
    assert_int_equal(r.bp->l_hi[2], 55);
    clef_spectrum_result_free(&r);
    o.lmax = 80; /* above 2 nside: accepted with a warning */
    assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &o, &r), CLEF_OK);
    assert_non_null(strstr(warn_text, "lmax = 80 is above 2*nside = 64"));
    clef_spectrum_result_free(&r);
    /* A wide beam lowers the default lmax and the coupled range to where
     * B_l p_l >= 0.01 (B_l = exp(-l(l+1) sigma^2/2): l(l+1) <= 2 ln(100) /
     * sigma^2; FWHM 600 arcmin gives l <= 41 before the pixel window). */
    o.lmax = 0;
    o.beam_fwhm = 600;
    warn_text[0] = 0;
    assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &o, &r), CLEF_OK);
    const double sig = 600 / 60.0 * M_PI / 180 / sqrt(8 * log(2.0));
    assert_true(r.lmax_ext < 96 && r.lmax_ext * (r.lmax_ext + 1.0) <= 2 * log(100.0) / (sig * sig));
    assert_true(r.lmax <= r.lmax_ext);
    assert_non_null(strstr(warn_text, "falls below"));
    clef_spectrum_result_free(&r);
    clef_set_log(NULL, NULL);
    clef_map_free(map);
    clef_map_free(mask);
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
    clef_map *mask = cut_mask(nside, 20, 10), *map = white_map(nside, 1.0);
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

/* inputs_done (spectrum.h): called once, after which no pixel of the maps
 * or masks is read: releasing them there (as clef spectrum does) leaves a
 * cross-spectrum with two masks, its errors and windows, the same bits. */
typedef struct {
    clef_map **m;
    int calls;
} release_ctx;

static void release_inputs(void *arg)
{
    release_ctx *c = arg;
    c->calls++;
    for (int i = 0; i < 4; i++)
        clef_map_release_pixels(c->m[i]);
}

static void test_inputs_done(void **state)
{
    (void)state;
    const int64_t nside = 32;
    clef_map *in[4] = {white_map(nside, 1.0), white_map(nside, 2.0), cut_mask(nside, 20, 10),
                       cut_mask(nside, 25, 10)};
    clef_map *cp[4];
    for (int i = 0; i < 4; i++)
        assert_int_equal(clef_map_copy(&cp[i], in[i]), CLEF_OK);
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.use_cache = 0;
    o.find_peak = 0;
    clef_spectrum_result r1, r2;
    assert_int_equal(clef_spectrum_compute(in[0], in[1], in[2], in[3], &o, &r1), CLEF_OK);
    release_ctx c = {cp, 0};
    o.inputs_done = release_inputs;
    o.inputs_done_arg = &c;
    assert_int_equal(clef_spectrum_compute(cp[0], cp[1], cp[2], cp[3], &o, &r2), CLEF_OK);
    assert_int_equal(c.calls, 1);
    for (int i = 0; i < 4; i++) {
        assert_null(cp[i]->pix);
        assert_int_equal(cp[i]->nside, nside); /* the header stays */
    }
    assert_int_equal(r1.nbins, r2.nbins);
    const size_t nb = (size_t)r1.nbins, nw = nb * (size_t)(r1.bp->win_lmax + 1);
    assert_memory_equal(r1.bp->dl, r2.bp->dl, nb * sizeof(double));
    assert_memory_equal(r1.bp->cov, r2.bp->cov, nb * nb * sizeof(double));
    assert_memory_equal(r1.bp->win, r2.bp->win, nw * sizeof(double));
    clef_spectrum_result_free(&r1);
    clef_spectrum_result_free(&r2);
    for (int i = 0; i < 4; i++) {
        clef_map_free(in[i]);
        clef_map_free(cp[i]);
    }
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
        cmocka_unit_test(test_deprojection_identity),
        cmocka_unit_test(test_lmax_rules),
        cmocka_unit_test(test_full_sky_exact),
        cmocka_unit_test(test_errors),
        cmocka_unit_test(test_threads),
        cmocka_unit_test(test_inputs_done),
        cmocka_unit_test(test_units),
        cmocka_unit_test(test_noise_subtraction),
        cmocka_unit_test(test_windows_ensemble),
        cmocka_unit_test(test_top_of_range),
        cmocka_unit_test(test_user_lmax),
        cmocka_unit_test(test_low_l),
        cmocka_unit_test(test_error_calibration),
        cmocka_unit_test(test_masked_ensemble),
        cmocka_unit_test(test_peak_recovery),
    };
    if (getenv("CLEF_TEST_FILTER")) /* run one test by name while developing */
        cmocka_set_test_filter(getenv("CLEF_TEST_FILTER"));
    return cmocka_run_group_tests(tests, NULL, NULL);
}
