/* First-peak fit: exact models, a toy spectrum with a known peak, a GLS
 * reference computed by numpy, Monte Carlo checks of the quoted errors,
 * the "no peak" rules, error paths and the metadata round trip. */
#include "check.h"

#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>
#include <lapacke.h>

#include "clef/peak.h"

/* Bins [2 + 20k, 21 + 20k] up to l = 601: uniform weights, so l_eff is the
 * bin's mean multipole. */
#define NB 30

static clef_bandpowers *make_bins(int with_cov)
{
    clef_bandpowers *bp = NULL;
    assert_int_equal(clef_bandpowers_alloc(&bp, NB, with_cov), CLEF_OK);
    for (int b = 0; b < NB; b++) {
        bp->l_lo[b] = 2 + 20 * b;
        bp->l_hi[b] = 21 + 20 * b;
        bp->l_eff[b] = 0.5 * (bp->l_lo[b] + bp->l_hi[b]);
    }
    return bp;
}

/* The toy spectrum of METHODS.md section 9 (common practice):
 * D_l = D0 + A exp(-(l - lp)^2 / 2 w^2), averaged over each bin. */
static const double G_D0 = 1000, G_A = 4700, G_LP = 220.3, G_W = 110;

static double toy_gauss(double l)
{
    return G_D0 + G_A * exp(-0.5 * (l - G_LP) * (l - G_LP) / (G_W * G_W));
}

/* The options these tests were designed around: the parabola over +-80
 * multipoles.  The library's defaults (Gaussian, +-60) are checked in
 * defaults_documented. */
static void test_opts(clef_peak_opts *o)
{
    clef_peak_opts_default(o);
    o->model = CLEF_PEAK_PARABOLA;
    o->half_width = 80;
}

/* The defaults documented in include/clef/peak.h and docs/peak.md. */
static void defaults_documented(void **state)
{
    (void)state;
    clef_peak_opts o;
    clef_peak_opts_default(&o);
    assert_int_equal(o.model, CLEF_PEAK_GAUSSIAN);
    check_abs(o.half_width, 60, 0, "peak.h default");
    check_abs(o.l_min, 100, 0, "issue 6 default window");
    check_abs(o.l_max, 400, 0, "issue 6 default window");
}

static void fill_gauss_binned(clef_bandpowers *bp)
{
    for (int b = 0; b < bp->nbins; b++) {
        double sum = 0;
        for (int l = bp->l_lo[b]; l <= bp->l_hi[b]; l++)
            sum += toy_gauss(l);
        bp->dl[b] = sum / (bp->l_hi[b] - bp->l_lo[b] + 1);
        bp->cl[b] = 2 * M_PI * bp->dl[b] / (bp->l_eff[b] * (bp->l_eff[b] + 1));
    }
}

/* A covariance with neighbour correlations rho^|i-j| and sigma_i = frac D_i
 * + floor: positive definite for |rho| < 1 (an AR(1) correlation matrix). */
static void set_cov(clef_bandpowers *bp, double frac, double floor_, double rho)
{
    const int n = bp->nbins;
    for (int i = 0; i < n; i++)
        bp->dl_err[i] = frac * fabs(bp->dl[i]) + floor_;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            bp->cov[i * n + j] = bp->dl_err[i] * bp->dl_err[j] * pow(rho, abs(i - j));
}

static void exact_parabola(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_bins(1);
    /* D = a + b l + c l^2 with its vertex at l = 231.7, D = 5600. */
    const double lp = 231.7, dp = 5600, c = -0.12;
    for (int b = 0; b < NB; b++)
        bp->dl[b] = dp + c * (bp->l_eff[b] - lp) * (bp->l_eff[b] - lp);
    set_cov(bp, 0.02, 30, 0.3);
    clef_peak_opts o;
    test_opts(&o);
    clef_peak_result r;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 1);
    /* Exact data, exact model: vertex -b/2c and a - b^2/4c recovered. */
    check_rel(r.l_peak, lp, 1e-9, "vertex of the parabola");
    check_rel(r.d_peak, dp, 1e-9, "vertex of the parabola");
    check_abs(r.chi2, 0, 1e-12, "exact data");
    check_rel(r.theta_deg, 180.0 / lp, 1e-9, "180 deg / l");
    check_rel(r.theta_deg_err, 180.0 * r.l_peak_err / (lp * lp), 1e-12, "delta method");
    assert_int_equal(r.model, CLEF_PEAK_PARABOLA);
    /* Bins within 80 of the highest (l_eff 231.5): 151.5 ... 311.5. */
    assert_int_equal(r.nbins_used, 9);
    check_abs(bp->l_eff[r.bin_first], 151.5, 0, "bin selection");
    check_abs(bp->l_eff[r.bin_last], 311.5, 0, "bin selection");
    assert_int_equal(r.dof, 6);
    assert_true(r.l_peak_err > 0 && r.d_peak_err > 0 && fabs(r.corr) <= 1);

    /* The Gaussian family as fitted contains the parabola as its limit
     * w -> infinity (docs/peak.md), so it too is exact here. */
    o.model = CLEF_PEAK_GAUSSIAN;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 1);
    check_rel(r.l_peak, lp, 1e-9, "vertex of the parabola");
    check_rel(r.d_peak, dp, 1e-9, "vertex of the parabola");
    assert_int_equal(r.dof, 5);
    clef_bandpowers_free(bp);
}

static void toy_gaussian_noiseless(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_bins(1);
    fill_gauss_binned(bp);
    set_cov(bp, 0.02, 30, 0.2);
    clef_peak_opts o;
    test_opts(&o);
    o.model = CLEF_PEAK_GAUSSIAN;
    clef_peak_result r;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 1);
    /* Averaging a Gaussian over bins of equal width keeps it symmetric
     * about lp (a convolution of even functions), so the fit finds lp up to
     * the small change of shape: measured l_peak - lp = -2.8e-8. */
    check_abs(r.l_peak, G_LP, 1e-3, "toy peak position (METHODS.md 9)");
    check_rel(r.d_peak, G_D0 + G_A, 2e-3, "toy peak height, less the bin smoothing");
    print_message("Gaussian fit: l_peak - lp = %.4g, sigma %.3g, chi2 %.3g\n", r.l_peak - G_LP,
                  r.l_peak_err, r.chi2);

    /* The parabola is biased on a Gaussian peak: the quartic term of
     * exp(-u^2/2) = 1 - u^2/2 + u^4/8 - ... is fitted as curvature, and
     * bins placed asymmetrically about lp turn that into a shift.  Here
     * (w = 110, 20-wide bins, +-80 around the highest) it is -0.53, about
     * 0.16 sigma; numpy_reference checks the fit itself against numpy. */
    o.model = CLEF_PEAK_PARABOLA;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 1);
    print_message("parabola fit: l_peak - lp = %.4g, D_peak - Dp = %.4g, chi2 %.3g\n",
                  r.l_peak - G_LP, r.d_peak - (G_D0 + G_A), r.chi2);
    check_abs(r.l_peak, G_LP, 1.0, "parabola bias bound on the toy peak");
    clef_bandpowers_free(bp);
}

/* Monte Carlo: noise with the table's covariance (Cholesky factor times
 * unit Gaussian deviates from GSL, fixed seed), `nreal` realisations. */
typedef struct mc_stats {
    int nfound;
    double mean_l, sd_l, rms_sigma, mean_chi2, mean_dof;
} mc_stats;

static mc_stats run_mc(const clef_bandpowers *truth, const clef_peak_opts *o, int nreal,
                       unsigned long seed)
{
    const int n = truth->nbins;
    clef_bandpowers *bp = make_bins(1);
    memcpy(bp->cov, truth->cov, (size_t)n * n * sizeof *bp->cov);
    memcpy(bp->dl_err, truth->dl_err, (size_t)n * sizeof *bp->dl_err);
    double *chol = malloc((size_t)n * n * sizeof *chol);
    memcpy(chol, truth->cov, (size_t)n * n * sizeof *chol);
    assert_int_equal(LAPACKE_dpotrf(LAPACK_ROW_MAJOR, 'L', n, chol, n), 0);
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(rng, seed);
    mc_stats st = {0};
    double sum_l = 0, sum_l2 = 0, sum_s2 = 0, sum_chi2 = 0, sum_dof = 0;
    double z[NB];
    for (int k = 0; k < nreal; k++) {
        for (int i = 0; i < n; i++)
            z[i] = gsl_ran_gaussian(rng, 1.0);
        for (int i = 0; i < n; i++) {
            double e = 0;
            for (int j = 0; j <= i; j++)
                e += chol[i * n + j] * z[j];
            bp->dl[i] = truth->dl[i] + e;
        }
        clef_peak_result r;
        assert_int_equal(clef_peak_find(bp, o, &r), CLEF_OK);
        if (!r.found)
            continue;
        st.nfound++;
        sum_l += r.l_peak;
        sum_l2 += r.l_peak * r.l_peak;
        sum_s2 += r.l_peak_err * r.l_peak_err;
        sum_chi2 += r.chi2;
        sum_dof += r.dof;
    }
    if (st.nfound > 1) {
        const double m = st.nfound;
        st.mean_l = sum_l / m;
        st.sd_l = sqrt((sum_l2 - m * st.mean_l * st.mean_l) / (m - 1));
        st.rms_sigma = sqrt(sum_s2 / m);
        st.mean_chi2 = sum_chi2 / m;
        st.mean_dof = sum_dof / m;
    }
    gsl_rng_free(rng);
    free(chol);
    clef_bandpowers_free(bp);
    return st;
}

/* Noise realisations: 500 always (each fit takes microseconds, also under
 * the sanitizer). */
#define NREAL 500

/* The quoted sigma must match the scatter of l_peak within 20% (issue 6),
 * and the estimator must be unbiased within 4 standard errors of the mean. */
static void check_mc(const mc_stats *st, double l_true, double bias_allowed, const char *what)
{
    if (st->nfound < 0.98 * NREAL)
        fail_msg("%s: peak found in %d of %d realisations", what, st->nfound, NREAL);
    check_rel(st->rms_sigma, st->sd_l, 0.2, "quoted sigma vs Monte Carlo scatter (issue 6)");
    check_abs(st->mean_l, l_true, 4 * st->sd_l / sqrt(st->nfound) + bias_allowed,
              "mean l_peak vs input peak");
}

static void mc_parabola(void **state)
{
    (void)state;
    clef_bandpowers *truth = make_bins(1);
    const double lp = 231.7, dp = 5600, c = -0.12;
    for (int b = 0; b < NB; b++)
        truth->dl[b] = dp + c * (truth->l_eff[b] - lp) * (truth->l_eff[b] - lp);
    set_cov(truth, 0.01, 120, 0.3);
    clef_peak_opts o;
    test_opts(&o);
    const mc_stats st = run_mc(truth, &o, NREAL, 42);
    print_message("parabola MC: found %d/%d, mean l %.3f, sd %.3f, rms sigma %.3f, chi2 %.3f dof %.3f\n",
                  st.nfound, NREAL, st.mean_l, st.sd_l, st.rms_sigma, st.mean_chi2, st.mean_dof);
    check_mc(&st, lp, 0, "parabola on a parabola");
    /* Exact model, Gaussian noise: <chi^2> = dof, sampling error sqrt(2 dof / N). */
    check_abs(st.mean_chi2, st.mean_dof, 4 * sqrt(2 * st.mean_dof / st.nfound), "<chi2> = dof");
    clef_bandpowers_free(truth);
}

static void mc_gaussian(void **state)
{
    (void)state;
    clef_bandpowers *truth = make_bins(1);
    fill_gauss_binned(truth);
    set_cov(truth, 0.01, 120, 0.3);
    clef_peak_opts o;
    test_opts(&o);
    o.model = CLEF_PEAK_GAUSSIAN;
    const mc_stats st = run_mc(truth, &o, NREAL, 4242);
    print_message("Gaussian MC: found %d/%d, mean l %.3f, sd %.3f, rms sigma %.3f, chi2 %.3f dof %.3f\n",
                  st.nfound, NREAL, st.mean_l, st.sd_l, st.rms_sigma, st.mean_chi2, st.mean_dof);
    check_mc(&st, G_LP, 0, "Gaussian on the toy peak");
    check_abs(st.mean_chi2, st.mean_dof, 4 * sqrt(2 * st.mean_dof / st.nfound), "<chi2> = dof");

    /* The parabola on the same data: its bias on this peak is about half a
     * multipole (toy_gaussian_noiseless), its chi^2 a little above dof. */
    o.model = CLEF_PEAK_PARABOLA;
    const mc_stats sp = run_mc(truth, &o, NREAL, 4242);
    print_message("parabola on Gaussian MC: found %d/%d, mean l %.3f, sd %.3f, rms sigma %.3f, chi2 %.3f dof %.3f\n",
                  sp.nfound, NREAL, sp.mean_l, sp.sd_l, sp.rms_sigma, sp.mean_chi2, sp.mean_dof);
    check_mc(&sp, G_LP, 1.0, "parabola on the toy peak");
    clef_bandpowers_free(truth);
}

/* Pure noise on a flat spectrum.  Centring the fit on the highest bin
 * favours a concave parabola, so false peaks are more frequent than the
 * one-sided 2.3% of a 2-sigma cut; measured rates are documented in
 * docs/peak.md and bounded here. */
static void mc_flat(void **state)
{
    (void)state;
    clef_bandpowers *truth = make_bins(1);
    for (int b = 0; b < NB; b++)
        truth->dl[b] = 3000;
    set_cov(truth, 0.0, 100, 0.3);
    clef_peak_opts o;
    test_opts(&o);
    const mc_stats s2 = run_mc(truth, &o, NREAL, 7);
    o.model = CLEF_PEAK_GAUSSIAN;
    const mc_stats g2 = run_mc(truth, &o, NREAL, 7);
    o.curv_nsigma = 3;
    o.model = CLEF_PEAK_PARABOLA;
    const mc_stats s3 = run_mc(truth, &o, NREAL, 7);
    print_message("flat noise: false peaks parabola %d/%d (2 sigma), %d/%d (3 sigma); Gaussian %d/%d\n",
                  s2.nfound, NREAL, s3.nfound, NREAL, g2.nfound, NREAL);
    assert_true(s2.nfound < 0.10 * NREAL);
    assert_true(g2.nfound < 0.10 * NREAL);
    assert_true(s3.nfound < 0.02 * NREAL);
    assert_true(s3.nfound <= s2.nfound);
    clef_bandpowers_free(truth);
}

/* The GLS parabola, its delta-method errors, chi^2 and p-value against
 * numpy/scipy on the same files (written by the CSV writers), with one noisy
 * realisation and a full covariance. */
static void numpy_reference(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_bins(1);
    fill_gauss_binned(bp);
    set_cov(bp, 0.01, 120, 0.4);
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(rng, 99);
    for (int b = 0; b < NB; b++)
        bp->dl[b] += gsl_ran_gaussian(rng, bp->dl_err[b]);
    gsl_rng_free(rng);
    clef_peak_opts o;
    test_opts(&o);
    clef_peak_result r;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 1);
    const char *tab = test_path("ref.csv"), *cov = test_path("ref_cov.csv");
    const char *out = test_path("ref.txt");
    assert_int_equal(clef_bandpowers_write_csv(bp, tab), CLEF_OK);
    assert_int_equal(clef_bandpowers_write_cov_csv(bp, cov), CLEF_OK);
    assert_int_equal(
        run_cmd("%s -c \"import numpy as np, io, scipy.stats as ss\n"
                "t = np.genfromtxt(io.StringIO(''.join(s for s in open('%s') if s[0] != '#')), delimiter=',', names=True)\n"
                "C = np.loadtxt('%s', delimiter=',')[%d:%d, %d:%d]\n"
                "l = t['l_eff'][%d:%d]; y = t['d_band_uK2'][%d:%d]\n"
                "X = np.vander(l - 200.0, 3, increasing=True); Ci = np.linalg.inv(C)\n"
                "S = np.linalg.inv(X.T @ Ci @ X); a, b, c = S @ (X.T @ Ci @ y)\n"
                "gl = np.array([0, -1/(2*c), b/(2*c*c)]); gd = np.array([1, -b/(2*c), b*b/(4*c*c)])\n"
                "sl = np.sqrt(gl @ S @ gl); sd = np.sqrt(gd @ S @ gd); res = y - X @ [a, b, c]\n"
                "chi2 = res @ Ci @ res\n"
                "print(repr(200 - b/(2*c)), repr(sl), repr(a - b*b/(4*c)), repr(sd), repr(gl @ S @ gd/(sl*sd)), "
                "repr(chi2), repr(ss.chi2.sf(chi2, len(l) - 3)), repr(c/np.sqrt(S[2, 2])), file=open('%s', 'w'))\"",
                ref_python(), tab, cov, r.bin_first, r.bin_last + 1, r.bin_first, r.bin_last + 1,
                r.bin_first, r.bin_last + 1, r.bin_first, r.bin_last + 1, out),
        0);
    FILE *f = fopen(out, "r");
    assert_non_null(f);
    double v[8];
    for (int i = 0; i < 8; i++)
        assert_int_equal(fscanf(f, "%lf", &v[i]), 1);
    fclose(f);
    print_message("numpy: l %.6f +- %.4f, D %.2f +- %.2f, corr %.4f, chi2 %.4f, p %.4f, c/sigma_c %.2f\n",
                  v[0], v[1], v[2], v[3], v[4], v[5], v[6], v[7]);
    check_rel(r.l_peak, v[0], 1e-10, "numpy GLS vertex");
    check_rel(r.l_peak_err, v[1], 1e-8, "numpy delta method");
    check_rel(r.d_peak, v[2], 1e-10, "numpy GLS vertex height");
    check_rel(r.d_peak_err, v[3], 1e-8, "numpy delta method");
    check_abs(r.corr, v[4], 1e-8, "numpy delta method");
    check_rel(r.chi2, v[5], 1e-8, "numpy GLS chi^2");
    check_rel(r.p_value, v[6], 1e-7, "scipy.stats.chi2.sf");
    check_rel(r.curv_signif, v[7], 1e-8, "numpy c / sigma_c");
    clef_bandpowers_free(bp);
}

/* D values in the window, errors sigma, no covariance. */
static clef_bandpowers *table_from(const double *d, int n, double sigma)
{
    clef_bandpowers *bp = make_bins(0);
    for (int b = 0; b < NB; b++) {
        bp->dl[b] = b < n ? d[b] : 0;
        bp->dl_err[b] = sigma;
    }
    return bp;
}

static void expect_none(const clef_bandpowers *bp, const clef_peak_opts *o, const char *why)
{
    clef_peak_result r;
    assert_int_equal(clef_peak_find(bp, o, &r), CLEF_OK);
    if (r.found || !strstr(r.reason, why))
        fail_msg("expected no peak ('%s'), got found %d, reason '%s'", why, r.found, r.reason);
    assert_true(isnan(r.l_peak) && isnan(r.l_peak_err) && isnan(r.p_value));
}

static void no_peak_cases(void **state)
{
    (void)state;
    clef_peak_opts o;
    test_opts(&o);
    double d[NB];
    /* Monotonic rising / falling spectra: the maximum sits on the window edge. */
    for (int b = 0; b < NB; b++)
        d[b] = 1000 + 10.0 * b * b;
    clef_bandpowers *bp = table_from(d, NB, 50);
    expect_none(bp, &o, "upper edge");
    o.model = CLEF_PEAK_GAUSSIAN;
    expect_none(bp, &o, "upper edge");
    for (int b = 0; b < NB; b++)
        bp->dl[b] = 9000 - 10.0 * b * b;
    expect_none(bp, &o, "lower edge");
    clef_bandpowers_free(bp);

    /* Too few bins: a half width below the bin spacing, or 3 bins for the
     * Gaussian's four parameters. */
    test_opts(&o);
    for (int b = 0; b < NB; b++)
        d[b] = 5600 - 0.12 * (20 * b + 11.5 - 231.7) * (20 * b + 11.5 - 231.7);
    bp = table_from(d, NB, 5);
    o.half_width = 15;
    expect_none(bp, &o, "too few bins: 1 within");
    o.half_width = 25;
    o.model = CLEF_PEAK_GAUSSIAN;
    expect_none(bp, &o, "too few bins: 3 within");
    expect_none(bp, &o, "needs at least 4");
    o.model = CLEF_PEAK_PARABOLA;
    clef_peak_result r;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 1);
    assert_int_equal(r.dof, 0);
    assert_true(isnan(r.p_value)); /* no degrees of freedom: undefined */
    check_abs(r.chi2, 0, 1e-20, "three points on a parabola");

    /* Shallow curvature with large errors: not significant. */
    test_opts(&o);
    for (int b = 0; b < NB; b++)
        bp->dl[b] = 3000 - 0.001 * (20 * b + 11.5 - 250) * (20 * b + 11.5 - 250);
    for (int b = 0; b < NB; b++)
        bp->dl_err[b] = 500;
    expect_none(bp, &o, "curvature not significant");
    o.curv_nsigma = 0; /* any negative curvature then counts */
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 1);

    /* A spike on a convex background: the highest bin is inside the window
     * but the parabola opens upwards. */
    test_opts(&o);
    o.l_min = 170;
    o.l_max = 330;
    for (int b = 0; b < NB; b++) {
        const double l = bp->l_eff[b];
        bp->dl[b] = 3000 + 0.5 * (l - 250) * (l - 250);
        bp->dl_err[b] = 30;
    }
    bp->dl[12] = 7000; /* l_eff 251.5 */
    expect_none(bp, &o, "not concave");

    /* Rising almost linearly to the highest bin, one bin after it: the
     * vertex of the fitted parabola lies beyond the fitted range. */
    o.l_min = 150;
    o.l_max = 255;
    static const double ramp[6] = {0, 1, 2, 3, 4, 3.999};
    for (int b = 0; b < 6; b++) {
        bp->dl[7 + b] = 3000 + 100 * ramp[b]; /* l_eff 151.5 ... 251.5 */
        bp->dl_err[7 + b] = 1;
    }
    expect_none(bp, &o, "outside the fitted range");

    /* Four bins placed symmetrically about the vertex of an exact parabola:
     * 1, d^2 and d^4 take two values each, so the Gaussian's shape
     * parameter cannot be told from the others (singular normal matrix),
     * while the parabola is exact. */
    o.l_min = 185;
    o.l_max = 255;
    for (int b = 0; b < NB; b++) {
        const double l = bp->l_eff[b];
        bp->dl[b] = 5600 - 0.12 * (l - 221.5) * (l - 221.5); /* midway between 211.5 and 231.5 */
        bp->dl_err[b] = 10;
    }
    o.model = CLEF_PEAK_GAUSSIAN;
    expect_none(bp, &o, "not constrained");
    o.model = CLEF_PEAK_PARABOLA;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 1);
    check_rel(r.l_peak, 221.5, 1e-12, "vertex of the parabola");
    clef_bandpowers_free(bp);
}

static void input_errors(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_bins(1);
    fill_gauss_binned(bp);
    set_cov(bp, 0.01, 100, 0.3);
    clef_peak_opts o;
    clef_peak_result r;
    test_opts(&o);
    o.l_min = 1000;
    o.l_max = 2000;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "no bin"));
    o.l_min = 300;
    o.l_max = 300;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    test_opts(&o);
    o.half_width = 0;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    test_opts(&o);
    o.curv_nsigma = -1;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    test_opts(&o);
    o.model = 7;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    assert_int_equal(clef_peak_find(bp, NULL, &r), CLEF_EINVAL);
    assert_int_equal(clef_peak_find(NULL, &o, &r), CLEF_EINVAL);
    o.model = CLEF_PEAK_PARABOLA;

    /* Covariance not positive definite: neighbours correlated above 1. */
    bp->cov[11 * NB + 12] = bp->cov[12 * NB + 11] = 2 * bp->dl_err[11] * bp->dl_err[12];
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "positive definite"));
    bp->cov[11 * NB + 12] = bp->cov[12 * NB + 11] = 0;
    /* A zero variance, with and without the covariance. */
    const double keep = bp->cov[10 * NB + 10];
    bp->cov[10 * NB + 10] = 0;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "bin 10"));
    bp->cov[10 * NB + 10] = keep;
    double *cov = bp->cov;
    bp->cov = NULL;
    bp->dl_err[9] = 0;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "bin 9"));
    bp->dl_err[9] = 10;
    /* Non-finite D, and bins out of order. */
    bp->dl[8] = NAN;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    bp->dl[8] = 3000;
    const double t = bp->l_eff[8];
    bp->l_eff[8] = bp->l_eff[9];
    bp->l_eff[9] = t;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "increasing"));
    bp->cov = cov;
    clef_bandpowers_free(bp);
}

/* The result as header keywords: through the FITS and CSV files and back. */
static void meta_round_trip(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_bins(1);
    fill_gauss_binned(bp);
    set_cov(bp, 0.01, 100, 0.3);
    clef_peak_opts o;
    test_opts(&o);
    o.model = CLEF_PEAK_GAUSSIAN;
    clef_peak_result r, back;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 1);
    assert_int_equal(clef_peak_from_meta(bp, &back), CLEF_EINVAL); /* none recorded yet */
    assert_int_equal(clef_peak_to_meta(&r, bp), CLEF_OK);
    const char *paths[2] = {test_path("peak.fits"), test_path("peak.csv")};
    assert_int_equal(clef_bandpowers_write_fits(bp, paths[0]), CLEF_OK);
    assert_int_equal(clef_bandpowers_write_csv(bp, paths[1]), CLEF_OK);
    for (int k = 0; k < 2; k++) {
        clef_bandpowers *rd = NULL;
        assert_int_equal(clef_bandpowers_read(&rd, paths[k]), CLEF_OK);
        assert_int_equal(clef_peak_from_meta(rd, &back), CLEF_OK);
        assert_int_equal(back.found, 1);
        assert_int_equal(back.model, CLEF_PEAK_GAUSSIAN);
        check_abs(back.l_peak, r.l_peak, 0, "round trip");
        check_abs(back.l_peak_err, r.l_peak_err, 0, "round trip");
        check_abs(back.d_peak, r.d_peak, 0, "round trip");
        check_abs(back.d_peak_err, r.d_peak_err, 0, "round trip");
        check_abs(back.corr, r.corr, 0, "round trip");
        check_abs(back.theta_deg, r.theta_deg, 0, "round trip");
        check_abs(back.theta_deg_err, r.theta_deg_err, 0, "round trip");
        check_abs(back.chi2, r.chi2, 0, "round trip");
        check_abs(back.p_value, r.p_value, 0, "round trip");
        assert_int_equal(back.dof, r.dof);
        assert_int_equal(back.nbins_used, r.nbins_used);
        assert_int_equal(back.bin_first, r.bin_first);
        assert_int_equal(back.bin_last, r.bin_last);
        check_abs(back.curv_signif, r.curv_signif, 0, "round trip");
        clef_bandpowers_free(rd);
    }
    /* A later "no peak" replaces every item of the earlier result. */
    o.l_min = 400;
    o.l_max = 600;
    assert_int_equal(clef_peak_find(bp, &o, &r), CLEF_OK);
    assert_int_equal(r.found, 0);
    assert_int_equal(clef_peak_to_meta(&r, bp), CLEF_OK);
    assert_null(clef_bandpowers_meta_get(bp, "PK_L"));
    assert_int_equal(clef_bandpowers_write_fits(bp, paths[0]), CLEF_OK);
    clef_bandpowers *rd = NULL;
    assert_int_equal(clef_bandpowers_read(&rd, paths[0]), CLEF_OK);
    assert_int_equal(clef_peak_from_meta(rd, &back), CLEF_OK);
    assert_int_equal(back.found, 0);
    assert_string_equal(back.reason, r.reason);
    assert_true(isnan(back.l_peak));
    /* A damaged record is refused. */
    assert_int_equal(clef_bandpowers_meta_text(rd, "PK_MODEL", "cubic", NULL), CLEF_OK);
    assert_int_equal(clef_peak_from_meta(rd, &back), CLEF_EINVAL);
    assert_int_equal(clef_bandpowers_meta_number(rd, "PK_FOUND", 3, NULL), CLEF_OK);
    assert_int_equal(clef_peak_from_meta(rd, &back), CLEF_EINVAL);
    clef_bandpowers_free(rd);
    clef_bandpowers_free(bp);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(defaults_documented),
        cmocka_unit_test(exact_parabola),
        cmocka_unit_test(toy_gaussian_noiseless),
        cmocka_unit_test(mc_parabola),
        cmocka_unit_test(mc_gaussian),
        cmocka_unit_test(mc_flat),
        cmocka_unit_test(numpy_reference),
        cmocka_unit_test(no_peak_cases),
        cmocka_unit_test(input_errors),
        cmocka_unit_test(meta_round_trip),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
