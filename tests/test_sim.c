/* Simulation module: a_lm statistics, full-sky realisations against cosmic
 * variance, reproducibility (seed, threads), beam and pixel window
 * application, white and hit-map noise, independent splits, errors. */
#include "check.h"

#include <complex.h>
#include <omp.h>

#include <gsl/gsl_cdf.h>

#include "clef/beam.h"
#include "clef/sht.h"
#include "clef/sim.h"

/* A smooth test spectrum: D_l = l(l+1) C_l / 2 pi = 1000 uK^2 for l >= 2
 * with a slow fall-off, C_0 = C_1 = 0. */
static void test_spectrum(int lmax, double *cl)
{
    cl[0] = cl[1] = 0;
    for (int l = 2; l <= lmax; l++)
        cl[l] = 2 * M_PI * 1000.0 / (l * (l + 1.0)) / (1.0 + l / 100.0);
}

static clef_sht *make_plan(int64_t nside, int lmax)
{
    clef_sht *p = NULL;
    assert_int_equal(clef_sht_create(&p, nside, lmax, NULL), CLEF_OK);
    return p;
}

/* ---- seeds and a_lm ---- */

static void test_stream_seeds(void **state)
{
    (void)state;
    /* fmix32 is a bijection: the streams of one family never collide. */
    enum { N = 20000 };
    static unsigned long s[N];
    for (int i = 0; i < N; i++)
        s[i] = clef_sim_stream_seed(12345, CLEF_SIM_STREAM_SKY, (uint64_t)i);
    for (int i = 0; i < N; i++)
        for (int j = i + 1; j < i + 64 && j < N; j++)
            assert_true(s[i] != s[j]);
    assert_true(clef_sim_stream_seed(12345, CLEF_SIM_STREAM_NOISE1, 0) !=
                clef_sim_stream_seed(12345, CLEF_SIM_STREAM_NOISE2, 0));
    assert_true(clef_sim_stream_seed(1, CLEF_SIM_STREAM_SKY, 0) !=
                clef_sim_stream_seed(2, CLEF_SIM_STREAM_SKY, 0));
    assert_true(s[0] <= 0xffffffffUL);
}

static void test_alm_moments(void **state)
{
    (void)state;
    /* C_l = 1: a_l0 real with variance 1, Re and Im of a_lm (m > 0) with
     * variance 1/2 each and no correlation (definition of a Gaussian
     * isotropic field with real map; Gorski et al. 2005). */
    const int lmax = 400;
    double *cl = malloc(sizeof(double) * (lmax + 1));
    for (int l = 0; l <= lmax; l++)
        cl[l] = 1.0;
    double complex *a = malloc(sizeof *a * clef_alm_size(lmax, lmax));
    assert_int_equal(clef_sim_alm(lmax, cl, 99, a), CLEF_OK);
    double v0 = 0, vr = 0, vi = 0, cri = 0;
    long n0 = 0, n = 0;
    for (int l = 0; l <= lmax; l++) {
        const double complex x = a[clef_alm_index(lmax, l, 0)];
        check_abs(cimag(x), 0.0, 0, "a_l0 is real");
        v0 += creal(x) * creal(x);
        n0++;
    }
    for (int m = 1; m <= lmax; m++)
        for (int l = m; l <= lmax; l++) {
            const double complex x = a[clef_alm_index(lmax, l, m)];
            vr += creal(x) * creal(x);
            vi += cimag(x) * cimag(x);
            cri += creal(x) * cimag(x);
            n++;
        }
    v0 /= n0;
    vr /= n;
    vi /= n;
    cri /= n;
    /* Standard errors: var of a sample variance of unit Gaussians is 2/n. */
    check_abs(v0, 1.0, 4 * sqrt(2.0 / n0), "var a_l0 = C_l");
    check_abs(vr, 0.5, 4 * 0.5 * sqrt(2.0 / n), "var Re a_lm = C_l/2");
    check_abs(vi, 0.5, 4 * 0.5 * sqrt(2.0 / n), "var Im a_lm = C_l/2");
    check_abs(cri, 0.0, 4 * 0.5 / sqrt((double)n), "Re, Im uncorrelated");

    /* A larger lmax leaves the lower multipoles unchanged (streams per m,
     * deviates in order of l). */
    const int small = 100;
    double complex *b = malloc(sizeof *b * clef_alm_size(small, small));
    assert_int_equal(clef_sim_alm(small, cl, 99, b), CLEF_OK);
    for (int m = 0; m <= small; m++)
        for (int l = m; l <= small; l++)
            assert_true(b[clef_alm_index(small, l, m)] == a[clef_alm_index(lmax, l, m)]);
    /* Zero spectrum: zero a_lm. */
    for (int l = 0; l <= small; l++)
        cl[l] = 0;
    assert_int_equal(clef_sim_alm(small, cl, 99, b), CLEF_OK);
    for (size_t i = 0; i < clef_alm_size(small, small); i++)
        assert_true(b[i] == 0);
    free(a);
    free(b);
    free(cl);
}

/* ---- realisations against cosmic variance ---- */

static void test_realisations(void **state)
{
    (void)state;
    /* Over N full-sky realisations (nside 64, 200 maps; smaller under the
     * sanitizer), analysed with 3 Jacobi iterations at lmax = 3 nside / 2
     * (round trip accurate to ~1e-5, METHODS.md 2):
     * (2l+1) C~_l / C_l ~ chi^2_{2l+1} for a full-sky Gaussian field
     * (METHODS.md 4, common practice), so
     * - mean: band averages of C~_l lie within 3 standard errors of the
     *   input, and sum_i sum_l (2l+1) C~_l / C_l follows chi^2 with
     *   N sum_l (2l+1) degrees of freedom (exact);
     * - scatter: sum_i sum_l (C~_l - C_l)^2 / (2 C_l^2/(2l+1)) against
     *   chi^2 with N (lmax - 1) degrees of freedom (the Gaussian
     *   approximation of C~_l; its variance is (1 + 6/(2l+1)) times the
     *   chi^2 one, which widens the p-value range slightly at low l).
     * Seed fixed: 2026. */
    const int64_t nside = test_sanitize() ? 16 : 64;
    const int nreal = test_sanitize() ? 40 : 200;
    const int lmax = 3 * (int)nside / 2;
    const int64_t npix = 12 * nside * nside;
    clef_sht *sht = make_plan(nside, lmax);
    double *cl = malloc(sizeof(double) * (lmax + 1));
    double *chat = malloc(sizeof(double) * (lmax + 1));
    double *sum = calloc(lmax + 1, sizeof(double));
    double *map = malloc(sizeof(double) * npix);
    double complex *alm = malloc(sizeof *alm * clef_alm_size(lmax, lmax));
    test_spectrum(lmax, cl);
    double chi_mean = 0, chi_scatter = 0;
    for (int i = 0; i < nreal; i++) {
        const clef_sim_opts o = {.seed = 2026 + (uint64_t)i};
        double *maps[1] = {map};
        assert_int_equal(clef_sim_map(sht, cl, &o, NULL, maps, NULL), CLEF_OK);
        const double *in[1] = {map};
        double complex *out[1] = {alm};
        assert_int_equal(clef_sht_analysis(sht, 1, in, out, 3), CLEF_OK);
        assert_int_equal(clef_alm_cl(lmax, lmax, alm, NULL, chat), CLEF_OK);
        for (int l = 2; l <= lmax; l++) {
            sum[l] += chat[l];
            chi_mean += (2 * l + 1) * chat[l] / cl[l];
            const double d = chat[l] - cl[l];
            chi_scatter += d * d / (2 * cl[l] * cl[l] / (2 * l + 1));
        }
    }
    /* Band means within 3 standard errors. */
    const int width = 8;
    for (int l0 = 2; l0 + width - 1 <= lmax; l0 += width) {
        double mean = 0, ref = 0, var = 0;
        for (int l = l0; l < l0 + width; l++) {
            mean += sum[l] / nreal;
            ref += cl[l];
            var += 2 * cl[l] * cl[l] / (2 * l + 1) / nreal;
        }
        if (fabs(mean - ref) > 3 * sqrt(var))
            fail_msg("band l = %d..%d: mean %.6g vs input %.6g, more than 3 standard errors (%.3g)",
                     l0, l0 + width - 1, mean / width, ref / width, sqrt(var) / width);
    }
    double dof_mean = 0;
    for (int l = 2; l <= lmax; l++)
        dof_mean += (2 * l + 1);
    dof_mean *= nreal;
    const double dof_scatter = (double)nreal * (lmax - 1);
    /* Two-sided p-values from GSL gsl_cdf_chisq_Q. */
    const double qm = gsl_cdf_chisq_Q(chi_mean, dof_mean);
    const double qs = gsl_cdf_chisq_Q(chi_scatter, dof_scatter);
    printf("realisations: %d maps at nside %lld: mean chi2 %.1f / %.0f dof (Q = %.3f), "
           "scatter chi2 %.1f / %.0f dof (Q = %.3f)\n",
           nreal, (long long)nside, chi_mean, dof_mean, qm, chi_scatter, dof_scatter, qs);
    assert_true(qm > 0.001 && qm < 0.999);
    assert_true(qs > 0.001 && qs < 0.999);
    free(cl);
    free(chat);
    free(sum);
    free(map);
    free(alm);
    clef_sht_destroy(sht);
}

/* ---- reproducibility ---- */

static void simulate(int64_t nside, int lmax, const clef_sim_opts *o, double *m1, double *m2)
{
    clef_sht *sht = make_plan(nside, lmax);
    double *cl = malloc(sizeof(double) * (lmax + 1));
    test_spectrum(lmax, cl);
    double *maps[2] = {m1, m2};
    assert_int_equal(clef_sim_map(sht, cl, o, NULL, maps, NULL), CLEF_OK);
    free(cl);
    clef_sht_destroy(sht);
}

static void test_reproducible(void **state)
{
    (void)state;
    /* nside 128: 196608 pixels, three noise chunks. */
    const int64_t nside = test_sanitize() ? 32 : 128;
    const int lmax = 2 * (int)nside;
    const int64_t npix = 12 * nside * nside;
    double *a1 = malloc(sizeof(double) * npix), *a2 = malloc(sizeof(double) * npix);
    double *b1 = malloc(sizeof(double) * npix), *b2 = malloc(sizeof(double) * npix);
    const clef_sim_opts o = {.seed = 77, .beam_fwhm = 30, .noise_depth = 50, .nsplits = 2};
    const int saved = omp_get_max_threads();
    omp_set_num_threads(1);
    simulate(nside, lmax, &o, a1, a2);
    omp_set_num_threads(2);
    simulate(nside, lmax, &o, b1, b2);
    for (int64_t p = 0; p < npix; p++)
        if (a1[p] != b1[p] || a2[p] != b2[p])
            fail_msg("pixel %lld differs between 1 and 2 threads", (long long)p);
    /* Same seed, same map (again, 2 threads). */
    simulate(nside, lmax, &o, b1, b2);
    assert_memory_equal(a1, b1, sizeof(double) * npix);
    assert_memory_equal(a2, b2, sizeof(double) * npix);
    /* Another seed, another map. */
    const clef_sim_opts o2 = {.seed = 78, .beam_fwhm = 30, .noise_depth = 50, .nsplits = 2};
    simulate(nside, lmax, &o2, b1, b2);
    long same = 0;
    for (int64_t p = 0; p < npix; p++)
        same += a1[p] == b1[p];
    assert_true(same < npix / 1000);
    omp_set_num_threads(saved);
    free(a1);
    free(a2);
    free(b1);
    free(b2);
}

/* ---- beam and pixel window ---- */

static void test_beam_pixel_window_applied(void **state)
{
    (void)state;
    /* clef_sim_map with a beam and the pixel window equals the synthesis of
     * B_l p_l times the same a_lm (definition; Hivon et al. 2002). */
    const int64_t nside = 16;
    const int lmax = 47;
    const int64_t npix = 12 * nside * nside;
    clef_sht *sht = make_plan(nside, lmax);
    double cl[48], bl[48], pl[48];
    test_spectrum(lmax, cl);
    double complex *alm = malloc(sizeof *alm * clef_alm_size(lmax, lmax));
    double complex *truth = malloc(sizeof *alm * clef_alm_size(lmax, lmax));
    double *m1 = malloc(sizeof(double) * npix), *m2 = malloc(sizeof(double) * npix);
    const clef_sim_opts o = {.seed = 5, .beam_fwhm = 120, .pixel_window = 1};
    double *maps[1] = {m1};
    assert_int_equal(clef_sim_map(sht, cl, &o, truth, maps, NULL), CLEF_OK);
    assert_int_equal(clef_sim_alm(lmax, cl, 5, alm), CLEF_OK);
    assert_memory_equal(alm, truth, sizeof *alm * clef_alm_size(lmax, lmax));
    assert_int_equal(clef_beam_gaussian(120, lmax, bl), CLEF_OK);
    assert_int_equal(clef_beam_pixel_window(nside, lmax, pl), CLEF_OK);
    clef_sim_alm_scale(lmax, bl, pl, alm);
    const double complex *in[1] = {alm};
    double *out[1] = {m2};
    assert_int_equal(clef_sht_synthesis(sht, 1, in, out), CLEF_OK);
    for (int64_t p = 0; p < npix; p++)
        check_abs(m1[p], m2[p], 1e-9 * (1 + fabs(m2[p])), "beam x pixel window applied");
    /* A beam array gives the same map as the FWHM. */
    const clef_sim_opts ob = {.seed = 5, .beam = bl, .pixel_window = 1};
    maps[0] = m2;
    assert_int_equal(clef_sim_map(sht, cl, &ob, NULL, maps, NULL), CLEF_OK);
    assert_memory_equal(m1, m2, sizeof(double) * npix);
    free(alm);
    free(truth);
    free(m1);
    free(m2);
    clef_sht_destroy(sht);
}

/* ---- noise ---- */

static void test_white_noise(void **state)
{
    (void)state;
    /* sigma_pix = depth / sqrt(Omega_pix in arcmin^2) (METHODS.md 5, Knox
     * 1995): nside 256 has sqrt(Omega_pix) = 13.74' (METHODS.md 1). */
    check_rel(clef_sim_sigma_pix(256, 13.74), 1.0, 1e-3, "METHODS.md 1: sqrt(Omega_pix) 13.74'");
    check_rel(clef_sim_sigma_pix(2048, 1.718), 1.0, 1e-3, "METHODS.md 1: sqrt(Omega_pix) 1.718'");
    const int64_t nside = test_sanitize() ? 32 : 64;
    const int lmax = 2 * (int)nside;
    const int64_t npix = 12 * nside * nside;
    const double depth = 40.0, sigma = clef_sim_sigma_pix(nside, depth);
    double *m = calloc(npix, sizeof(double));
    assert_int_equal(clef_sim_noise(nside, depth, NULL, 11, CLEF_SIM_STREAM_NOISE1, m, NULL),
                     CLEF_OK);
    double s2 = 0, s1 = 0;
    for (int64_t p = 0; p < npix; p++) {
        s1 += m[p];
        s2 += m[p] * m[p];
    }
    /* rms: relative standard error of a sample rms is 1/sqrt(2 npix). */
    check_rel(sqrt(s2 / npix), sigma, 4 / sqrt(2.0 * npix), "noise rms = sigma_pix");
    check_abs(s1 / npix, 0, 4 * sigma / sqrt((double)npix), "noise mean 0");
    /* Power spectrum N_l = Omega_pix sigma^2, flat (METHODS.md 4 [D]),
     * single-pass analysis; each N~_l scatters by sqrt(2/(2l+1)). */
    clef_sht *sht = make_plan(nside, lmax);
    double complex *alm = malloc(sizeof *alm * clef_alm_size(lmax, lmax));
    double *nl = malloc(sizeof(double) * (lmax + 1));
    const double *in[1] = {m};
    double complex *out[1] = {alm};
    assert_int_equal(clef_sht_analysis(sht, 1, in, out, 0), CLEF_OK);
    assert_int_equal(clef_alm_cl(lmax, lmax, alm, NULL, nl), CLEF_OK);
    const double nref = 4 * M_PI / npix * sigma * sigma;
    double chi = 0, lo = 0, hi = 0, vlo = 0, vhi = 0;
    for (int l = 2; l <= lmax; l++) {
        const double d = nl[l] / nref - 1;
        chi += d * d * (2 * l + 1) / 2.0;
        if (l <= lmax / 2) {
            lo += nl[l] / nref;
            vlo += 1;
        } else {
            hi += nl[l] / nref;
            vhi += 1;
        }
    }
    const double q = gsl_cdf_chisq_Q(chi, lmax - 1);
    printf("white noise: rms %.4f (sigma_pix %.4f), N_l/N_ref low l %.4f, high l %.4f, "
           "chi2 %.1f/%d (Q = %.3f)\n",
           sqrt(s2 / npix), sigma, lo / vlo, hi / vhi, chi, lmax - 1, q);
    assert_true(q > 0.001 && q < 0.999);
    check_abs(lo / vlo, 1.0, 0.05, "flat N_l, low half");
    check_abs(hi / vhi, 1.0, 0.05, "flat N_l, high half");
    free(alm);
    free(nl);
    free(m);
    clef_sht_destroy(sht);
}

static void test_splits_independent(void **state)
{
    (void)state;
    /* Noise-only splits: the cross-spectrum has mean 0 and standard
     * deviation N_l / sqrt(2l+1) per multipole (independent Gaussian
     * fields; Hinshaw et al. 2003 use cross-spectra for this reason). */
    const int64_t nside = test_sanitize() ? 16 : 64;
    const int lmax = 2 * (int)nside;
    const int64_t npix = 12 * nside * nside;
    clef_sht *sht = make_plan(nside, lmax);
    double *cl = calloc(lmax + 1, sizeof(double));
    double *m1 = malloc(sizeof(double) * npix), *m2 = malloc(sizeof(double) * npix);
    double *maps[2] = {m1, m2};
    const clef_sim_opts o = {.seed = 3, .noise_depth = 20, .nsplits = 2};
    assert_int_equal(clef_sim_map(sht, cl, &o, NULL, maps, NULL), CLEF_OK);
    double complex *a1 = malloc(sizeof *a1 * clef_alm_size(lmax, lmax));
    double complex *a2 = malloc(sizeof *a2 * clef_alm_size(lmax, lmax));
    const double *in[2] = {m1, m2};
    double complex *out[2] = {a1, a2};
    clef_sht *sht2 = NULL;
    const clef_sht_opts so = {.nmaps = 2};
    assert_int_equal(clef_sht_create(&sht2, nside, lmax, &so), CLEF_OK);
    assert_int_equal(clef_sht_analysis(sht2, 2, in, out, 0), CLEF_OK);
    double *x = malloc(sizeof(double) * (lmax + 1));
    assert_int_equal(clef_alm_cl(lmax, lmax, a1, a2, x), CLEF_OK);
    const double nref = 4 * M_PI / npix * pow(clef_sim_sigma_pix(nside, 20), 2);
    double z = 0, var = 0;
    for (int l = 2; l <= lmax; l++) {
        z += x[l] / nref;
        var += 1.0 / (2 * l + 1);
    }
    z /= sqrt(var);
    double r = 0, s1 = 0, s2 = 0;
    for (int64_t p = 0; p < npix; p++) {
        r += m1[p] * m2[p];
        s1 += m1[p] * m1[p];
        s2 += m2[p] * m2[p];
    }
    r /= sqrt(s1 * s2);
    printf("splits: cross-spectrum z = %.2f, pixel correlation %.4f\n", z, r);
    assert_true(fabs(z) < 4);
    assert_true(fabs(r) < 4 / sqrt((double)npix));
    free(cl);
    free(m1);
    free(m2);
    free(a1);
    free(a2);
    free(x);
    clef_sht_destroy(sht);
    clef_sht_destroy(sht2);
}

static void test_hits_noise(void **state)
{
    (void)state;
    /* sigma_p = sigma_pix / sqrt(hits_p / mean hits) over observed pixels:
     * a quarter of the sky unobserved, a quarter with 4 hits, half with 1:
     * mean hits 2, so sigma = sigma_pix sqrt(2/4) and sigma_pix sqrt(2). */
    const int64_t nside = 64, npix = 12 * nside * nside;
    double *hits = malloc(sizeof(double) * npix), *m = calloc(npix, sizeof(double));
    unsigned char *valid = malloc(npix);
    for (int64_t p = 0; p < npix; p++)
        hits[p] = p % 4 == 0 ? 0.0 : p % 4 == 1 ? 4.0 : 1.0;
    const double sigma = clef_sim_sigma_pix(nside, 10.0);
    assert_int_equal(clef_sim_noise(nside, 10.0, hits, 8, CLEF_SIM_STREAM_NOISE2, m, valid),
                     CLEF_OK);
    double v4 = 0, v1 = 0;
    long n4 = 0, n1 = 0;
    for (int64_t p = 0; p < npix; p++) {
        if (hits[p] == 0) {
            assert_int_equal(valid[p], 0);
            check_abs(m[p], 0.0, 0, "no noise where there are no hits");
        } else if (hits[p] == 4) {
            assert_int_equal(valid[p], 1);
            v4 += m[p] * m[p];
            n4++;
        } else {
            v1 += m[p] * m[p];
            n1++;
        }
    }
    check_rel(sqrt(v4 / n4), sigma * sqrt(0.5), 4 / sqrt(2.0 * n4), "sigma at 4 hits");
    check_rel(sqrt(v1 / n1), sigma * sqrt(2.0), 4 / sqrt(2.0 * n1), "sigma at 1 hit");
    free(hits);
    free(m);
    free(valid);
}

/* ---- errors ---- */

static void test_errors(void **state)
{
    (void)state;
    double cl[11] = {0, 0, 1, 1, 1, 1, 1, 1, 1, 1, 1};
    double complex a[66];
    assert_int_equal(clef_sim_alm(-1, cl, 1, a), CLEF_EINVAL);
    cl[5] = -1;
    assert_int_equal(clef_sim_alm(10, cl, 1, a), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "C_5"));
    cl[5] = NAN;
    assert_int_equal(clef_sim_alm(10, cl, 1, a), CLEF_EINVAL);
    cl[5] = 1;

    const int64_t nside = 4, npix = 192;
    double m[192] = {0}, hits[192];
    unsigned char valid[192];
    assert_int_equal(clef_sim_noise(nside, -1, NULL, 1, CLEF_SIM_STREAM_NOISE1, m, NULL), CLEF_EINVAL);
    assert_int_equal(clef_sim_noise(nside, NAN, NULL, 1, CLEF_SIM_STREAM_NOISE1, m, NULL), CLEF_EINVAL);
    assert_int_equal(clef_sim_noise(nside, 1, NULL, 1, CLEF_SIM_STREAM_SKY, m, NULL), CLEF_EINVAL);
    assert_int_equal(clef_sim_noise(0, 1, NULL, 1, CLEF_SIM_STREAM_NOISE1, m, NULL), CLEF_EINVAL);
    for (int64_t p = 0; p < npix; p++)
        hits[p] = 0;
    assert_int_equal(clef_sim_noise(nside, 1, hits, 1, CLEF_SIM_STREAM_NOISE1, m, valid), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "no pixel"));
    hits[7] = -2;
    assert_int_equal(clef_sim_noise(nside, 1, hits, 1, CLEF_SIM_STREAM_NOISE1, m, valid), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "pixel 7"));
    hits[7] = 1;
    assert_int_equal(clef_sim_noise(nside, 1, hits, 1, CLEF_SIM_STREAM_NOISE1, m, NULL), CLEF_EINVAL);

    clef_sht *sht = make_plan(nside, 10);
    double *maps[2] = {m, m};
    clef_sim_opts o = {.nsplits = 3};
    assert_int_equal(clef_sim_map(sht, cl, &o, NULL, maps, NULL), CLEF_EINVAL);
    o = (clef_sim_opts){.noise_depth = -1};
    assert_int_equal(clef_sim_map(sht, cl, &o, NULL, maps, NULL), CLEF_EINVAL);
    o = (clef_sim_opts){.hits = hits};
    assert_int_equal(clef_sim_map(sht, cl, &o, NULL, maps, valid), CLEF_EINVAL);
    o = (clef_sim_opts){.hits = hits, .noise_depth = 1};
    assert_int_equal(clef_sim_map(sht, cl, &o, NULL, maps, NULL), CLEF_EINVAL);
    o = (clef_sim_opts){.beam_fwhm = -3};
    assert_int_equal(clef_sim_map(sht, cl, &o, NULL, maps, NULL), CLEF_EINVAL);
    cl[3] = -1;
    assert_int_equal(clef_sim_map(sht, cl, NULL, NULL, maps, NULL), CLEF_EINVAL);
    cl[3] = 1;
    clef_sht_destroy(sht);
    const clef_sht_opts so = {.mmax = 5};
    assert_int_equal(clef_sht_create(&sht, nside, 10, &so), CLEF_OK);
    assert_int_equal(clef_sim_map(sht, cl, NULL, NULL, maps, NULL), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "mmax"));
    clef_sht_destroy(sht);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_stream_seeds),
        cmocka_unit_test(test_alm_moments),
        cmocka_unit_test(test_realisations),
        cmocka_unit_test(test_reproducible),
        cmocka_unit_test(test_beam_pixel_window_applied),
        cmocka_unit_test(test_white_noise),
        cmocka_unit_test(test_splits_independent),
        cmocka_unit_test(test_hits_noise),
        cmocka_unit_test(test_errors),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
