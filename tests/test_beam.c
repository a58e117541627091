/* Beam module: Gaussian beam against the published formula and METHODS.md
 * check values, beam files and their errors, the pixel window against the
 * HEALPix reference tables, its properties, caches and errors. */
#include "check.h"

#include <complex.h>
#include <omp.h>

#include <chealpix.h>

#include <gsl/gsl_sf_legendre.h>

#include "clef/beam.h"
#include "clef/sht.h"

/* ---- log capture (warnings) ---- */

static char last_warning[1024];
static void capture_log(void *user, int level, const char *msg)
{
    (void)user;
    if (level == CLEF_LOG_WARN)
        snprintf(last_warning, sizeof last_warning, "%s", msg);
}

static void write_text(const char *path, const char *text)
{
    FILE *f = fopen(path, "w");
    assert_non_null(f);
    fputs(text, f);
    fclose(f);
}

/* ---- Gaussian beam ---- */

static void test_gaussian_formula(void **state)
{
    (void)state;
    /* sigma = FWHM / sqrt(8 ln 2) = 0.424661 FWHM (common practice; Knox
     * 1995, PRD 52, 4307: sigma_b = 0.00742 (FWHM / 1 deg)). */
    /* Knox quotes three digits, so agreement is only to ~1e-3. */
    check_rel(clef_beam_sigma(60.0), 0.00742, 2e-3, "Knox 1995 sigma_b for 1 deg");
    check_rel(clef_beam_sigma(5.0), 6.176442e-4, 1e-6, "METHODS.md 6 [D]: sigma for 5'");
    double b[2001];
    /* B_l = exp(-l(l+1) sigma^2/2) check values, METHODS.md section 6 [D]. */
    assert_int_equal(clef_beam_gaussian(5.0, 2000, b), CLEF_OK);
    check_abs(b[0], 1.0, 1e-15, "B_0 = 1");
    check_abs(b[220], 0.990769, 1e-6, "METHODS.md 6: FWHM 5' B_220");
    check_abs(b[1000], 0.826188, 1e-6, "METHODS.md 6: FWHM 5' B_1000");
    check_abs(b[2000], 0.466102, 1e-6, "METHODS.md 6: FWHM 5' B_2000");
    assert_int_equal(clef_beam_gaussian(10.0, 1000, b), CLEF_OK);
    check_abs(b[500], 0.826030, 1e-6, "METHODS.md 6: FWHM 10' B_500");
    check_abs(b[1000], 0.465924, 1e-6, "METHODS.md 6: FWHM 10' B_1000");
    assert_int_equal(clef_beam_gaussian(60.0, 220, b), CLEF_OK);
    check_abs(b[100], 0.757740, 1e-6, "METHODS.md 6: FWHM 60' B_100");
    check_abs(b[220], 0.263043, 1e-6, "METHODS.md 6: FWHM 60' B_220");
    /* Half maximum: the profile exp(-theta^2/2 sigma^2) is 1/2 at
     * theta = FWHM/2 (definition of FWHM). */
    const double s = clef_beam_sigma(30.0), half = 15.0 * M_PI / (180 * 60);
    check_rel(exp(-half * half / (2 * s * s)), 0.5, 1e-12, "definition of FWHM");
    /* No beam. */
    assert_int_equal(clef_beam_gaussian(0.0, 10, b), CLEF_OK);
    check_abs(b[10], 1.0, 0, "FWHM 0 gives B_l = 1");
}

static void test_gaussian_errors(void **state)
{
    (void)state;
    double b[4];
    assert_int_equal(clef_beam_gaussian(-1.0, 3, b), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "-1"));
    assert_int_equal(clef_beam_gaussian(NAN, 3, b), CLEF_EINVAL);
    assert_int_equal(clef_beam_gaussian(INFINITY, 3, b), CLEF_EINVAL);
    assert_int_equal(clef_beam_gaussian(5.0, -1, b), CLEF_EINVAL);
}

/* B_l of a synthesised beam map: a Gaussian profile exp(-theta^2/2 sigma^2)
 * around the north pole, sampled at the pixel centres and analysed, gives
 * B_l = a_l0 / (a_00 sqrt(2l+1)) (azimuthal symmetry: only m = 0).
 * Checked (1) against the same Legendre transform integrated directly with
 * GSL's gsl_sf_legendre_Pl_array (Simpson's rule in theta), and (2)
 * against the Gaussian formula, which is the small-angle (flat-sky) limit:
 * for sigma = 1.7 deg they differ by 5e-5 where B_l > 0.01 (3.4 deg: 2e-4);
 * tolerances 1e-6 and 5e-4. */
static void test_gaussian_beam_map(void **state)
{
    (void)state;
    const int64_t nside = test_sanitize() ? 64 : 128;
    const int lmax = 2 * (int)nside;
    const int64_t npix = 12 * nside * nside;
    const double fwhm = 240.0 * (128.0 / nside), s = clef_beam_sigma(fwhm);
    clef_sht *sht = NULL;
    assert_int_equal(clef_sht_create(&sht, nside, lmax, NULL), CLEF_OK);
    double *map = malloc(sizeof(double) * npix);
    for (int64_t p = 0; p < npix; p++) {
        double th, ph;
        pix2ang_ring64(nside, p, &th, &ph);
        map[p] = exp(-th * th / (2 * s * s));
    }
    double complex *alm = malloc(sizeof *alm * clef_alm_size(lmax, lmax));
    const double *in[1] = {map};
    double complex *out[1] = {alm};
    assert_int_equal(clef_sht_analysis(sht, 1, in, out, 3), CLEF_OK);
    /* Direct integral: b_l = int_0^pi f(theta) P_l(cos theta) sin theta. */
    const int nth = 20000;
    const double tmax = 14 * s, h = tmax / nth;
    double *pl = malloc(sizeof(double) * (lmax + 1)), *bint = calloc(lmax + 1, sizeof(double));
    for (int i = 0; i <= nth; i++) {
        const double th = i * h, w = (i == 0 || i == nth) ? 1 : (i % 2 ? 4 : 2);
        gsl_sf_legendre_Pl_array(lmax, cos(th), pl);
        const double f = exp(-th * th / (2 * s * s)) * sin(th) * w * h / 3;
        for (int l = 0; l <= lmax; l++)
            bint[l] += f * pl[l];
    }
    double bg[1024];
    assert_int_equal(clef_beam_gaussian(fwhm, lmax, bg), CLEF_OK);
    const double a00 = creal(alm[clef_alm_index(lmax, 0, 0)]);
    double worst_int = 0, worst_formula = 0;
    for (int l = 0; l <= lmax; l++) {
        const double bmap = creal(alm[clef_alm_index(lmax, l, 0)]) / (a00 * sqrt(2 * l + 1.0));
        const double bref = bint[l] / bint[0];
        worst_int = fmax(worst_int, fabs(bmap - bref));
        if (bref > 0.01)
            worst_formula = fmax(worst_formula, fabs(bref - bg[l]));
    }
    printf("beam map, FWHM %.0f' at nside %lld: |B_map - B_integral| <= %.2e, "
           "|B_integral - Gaussian formula| <= %.2e (B > 0.01)\n",
           fwhm, (long long)nside, worst_int, worst_formula);
    assert_true(worst_int < 1e-6);
    assert_true(worst_formula < 5e-4);
    free(map);
    free(alm);
    free(pl);
    free(bint);
    clef_sht_destroy(sht);
}

/* ---- beam files ---- */

static void test_beam_file(void **state)
{
    (void)state;
    const char *p = test_path("beam_ok.txt");
    /* Comments, blank lines, extra columns, rows beyond lmax, any order. */
    write_text(p, "# l  B_l  extra\n\n0 1.0 9\n2 0.5   # trailing comment\n1 0.75\n"
                  "3 2.5e-1\n4 0.125\n");
    double b[4] = {0};
    assert_int_equal(clef_beam_read(p, 3, b), CLEF_OK);
    check_abs(b[0], 1.0, 0, "file value");
    check_abs(b[1], 0.75, 0, "file value");
    check_abs(b[2], 0.5, 0, "file value");
    check_abs(b[3], 0.25, 0, "file value");

    /* Comma-separated rows (CSV). */
    write_text(p, "0,1.0\n1, 0.5,extra\n");
    assert_int_equal(clef_beam_read(p, 1, b), CLEF_OK);
    check_abs(b[1], 0.5, 0, "CSV value");

    /* A beam file that is the Gaussian of 10' reads back as the Gaussian. */
    const char *g = test_path("beam_gauss.txt");
    double ref[301], got[301];
    assert_int_equal(clef_beam_gaussian(10.0, 300, ref), CLEF_OK);
    FILE *f = fopen(g, "w");
    assert_non_null(f);
    for (int l = 0; l <= 300; l++)
        fprintf(f, "%d %.17g\n", l, ref[l]);
    fclose(f);
    assert_int_equal(clef_beam_read(g, 300, got), CLEF_OK);
    for (int l = 0; l <= 300; l++)
        check_abs(got[l], ref[l], 0, "round trip of %.17g");

    /* B_0 != 1: accepted with a warning. */
    clef_set_log(capture_log, NULL);
    last_warning[0] = '\0';
    write_text(p, "0 0.9\n1 0.8\n");
    assert_int_equal(clef_beam_read(p, 1, b), CLEF_OK);
    assert_non_null(strstr(last_warning, "B_0"));
    clef_set_log(NULL, NULL);
}

static void expect_beam_error(const char *text, int lmax, int code, const char *needle)
{
    const char *p = test_path("beam_bad.txt");
    write_text(p, text);
    double b[8];
    assert_int_equal(clef_beam_read(p, lmax, b), code);
    if (!strstr(clef_last_error(), needle))
        fail_msg("message '%s' lacks '%s'", clef_last_error(), needle);
    if (!strstr(clef_last_error(), "beam_bad.txt"))
        fail_msg("message '%s' does not name the file", clef_last_error());
}

static void test_beam_file_errors(void **state)
{
    (void)state;
    double b[4];
    assert_int_equal(clef_beam_read(test_path("no_such_beam.txt"), 3, b), CLEF_EIO);
    assert_non_null(strstr(clef_last_error(), "no_such_beam.txt"));
    expect_beam_error("0 1\n1 abc\n", 1, CLEF_EFORMAT, "line 2");
    expect_beam_error("0 1\n1\n", 1, CLEF_EFORMAT, "line 2");
    expect_beam_error("0 1\n1.5 0.9\n", 1, CLEF_EFORMAT, "line 2");
    expect_beam_error("0 1\n-1 0.9\n", 1, CLEF_EFORMAT, "line 2");
    expect_beam_error("# x\n0 1\n1 0.9\n1 0.8\n", 1, CLEF_EFORMAT, "line 4");
    expect_beam_error("0 1\n1 -0.5\n", 1, CLEF_EFORMAT, "line 2");
    expect_beam_error("0 1\n1 nan\n", 1, CLEF_EFORMAT, "line 2");
    expect_beam_error("0 1\n1 0.9x\n", 1, CLEF_EFORMAT, "line 2");
    expect_beam_error("0 1\n1 0.9\n", 3, CLEF_EINVAL, "l = 2");
    expect_beam_error("0 1\n2 0.9\n", 2, CLEF_EINVAL, "l = 1");
    assert_int_equal(clef_beam_read(test_path("beam_bad.txt"), -1, b), CLEF_EINVAL);
}

/* ---- pixel window ---- */

/* HEALPix reference pixel windows, TEMPERATURE column of
 * pixel_window_n0004.fits and pixel_window_n0008.fits of the HEALPix
 * project's data files (exact low-resolution computations), transcribed.  METHODS.md section 6 lists other nside = 4 values
 * (0.99416, 0.98258, 0.96541, ...): they come from one pixel per ring,
 * which is not exact in the polar caps, where the pixels of a ring differ
 * in shape; they differ from these tables by up to 2.2e-3 and are not
 * used here (docs/simulation.md). */
static const double healpix_n4[12] = {1.00000000, 0.99423408, 0.98278260, 0.96580463,
                                      0.94353464, 0.91627765, 0.88440309, 0.84833734,
                                      0.80855546, 0.76557208, 0.71993199, 0.67220051};
static const double healpix_n8[24] = {
    1.00000000, 0.99854914, 0.99565260, 0.99132073, 0.98556897, 0.97841778,
    0.96989252, 0.96002334, 0.94884494, 0.93639650, 0.92272134, 0.90786681,
    0.89188395, 0.87482728, 0.85675449, 0.83772617, 0.81780550, 0.79705793,
    0.77555089, 0.75335344, 0.73053599, 0.70717000, 0.68332762, 0.65908145};

static void test_pixel_window_reference(void **state)
{
    (void)state;
    double p[24];
    assert_int_equal(clef_beam_pixel_window_compute(4, 11, NULL, p), CLEF_OK);
    for (int l = 0; l <= 11; l++)
        check_abs(p[l], healpix_n4[l], 2e-5, "HEALPix pixel_window_n0004.fits");
    assert_int_equal(clef_beam_pixel_window_compute(8, 23, NULL, p), CLEF_OK);
    for (int l = 0; l <= 23; l++)
        check_abs(p[l], healpix_n8[l], 2e-5, "HEALPix pixel_window_n0008.fits");
    /* nside 1: every pixel is a whole base pixel, still computable. */
    double p1[3];
    assert_int_equal(clef_beam_pixel_window_compute(1, 2, NULL, p1), CLEF_OK);
    check_abs(p1[0], 1.0, 1e-12, "p_0 = 1 (mean of a constant)");
    assert_true(p1[1] < 1 && p1[2] < p1[1] && p1[2] > 0);
}

static void test_pixel_window_properties(void **state)
{
    (void)state;
    const int64_t nsides[3] = {4, 16, 64};
    for (int i = 0; i < 3; i++) {
        const int64_t n = nsides[i];
        if (test_sanitize() && n > 16)
            continue;
        const int lmax = 3 * (int)n - 1;
        double *p = malloc(sizeof(double) * (size_t)(lmax + 1));
        assert_int_equal(clef_beam_pixel_window_compute(n, lmax, NULL, p), CLEF_OK);
        /* p_0 = 1: the pixel mean of a constant is the constant; p_l -> 1
         * as l -> 0 like 1 - c l(l+1) (definition, common practice). */
        check_abs(p[0], 1.0, 1e-12, "p_0 = 1");
        assert_true(p[1] < 1.0 && p[1] > 0.99);
        const double c1 = (1.0 - p[1]) / 2.0;
        check_rel((1.0 - p[2]) / 6.0, c1, 0.02, "1 - p_l ~ c l(l+1) at low l");
        /* Monotonic decrease over 0..2 nside (issue 5). */
        for (int l = 1; l <= 2 * n && l <= lmax; l++)
            if (!(p[l] < p[l - 1]))
                fail_msg("nside %lld: p_%d = %.9f >= p_%d = %.9f", (long long)n, l, p[l], l - 1,
                         p[l - 1]);
        free(p);
    }
}

/* Two independent computations with different sub-sampling densities
 * (k = 8/16 and k = 16/32) agree to 1e-4 (issue 5). */
static void test_pixel_window_two_densities(void **state)
{
    (void)state;
    const int64_t n = test_sanitize() ? 4 : 16;
    const int lmax = 3 * (int)n - 1;
    double a[48], b[48];
    const clef_beam_pixel_window_opts o8 = {8, 0, 0}, o16 = {16, 0, 0};
    assert_int_equal(clef_beam_pixel_window_compute(n, lmax, &o8, a), CLEF_OK);
    assert_int_equal(clef_beam_pixel_window_compute(n, lmax, &o16, b), CLEF_OK);
    for (int l = 0; l <= lmax; l++)
        check_abs(a[l], b[l], 1e-4, "k = 8 vs k = 16 sub-sampling");
}

/* The ring/pixel subset used for large nside against the evaluation of
 * every distinct pixel, with deliberately coarse subsets (the defaults are
 * 4-8 times finer). */
static void test_pixel_window_subset(void **state)
{
    (void)state;
    if (test_sanitize())
        return;
    const int64_t n = 64;
    const int lmax = 3 * (int)n - 1;
    double full[192], sub[192];
    const clef_beam_pixel_window_opts all = {4, 64, 32}, coarse = {4, 16, 4};
    assert_int_equal(clef_beam_pixel_window_compute(n, lmax, &all, full), CLEF_OK);
    assert_int_equal(clef_beam_pixel_window_compute(n, lmax, &coarse, sub), CLEF_OK);
    double worst = 0;
    for (int l = 0; l <= lmax; l++)
        worst = fmax(worst, fabs(full[l] - sub[l]));
    printf("pixel window nside 64: 16-ring/4-pixel subset vs all pixels: max |diff| %.2e\n",
           worst);
    assert_true(worst < 2e-4);
}

static void test_pixel_window_threads(void **state)
{
    (void)state;
    double a[48], b[48];
    const int saved = omp_get_max_threads();
    omp_set_num_threads(1);
    assert_int_equal(clef_beam_pixel_window_compute(16, 47, NULL, a), CLEF_OK);
    omp_set_num_threads(2);
    assert_int_equal(clef_beam_pixel_window_compute(16, 47, NULL, b), CLEF_OK);
    omp_set_num_threads(saved);
    for (int l = 0; l <= 47; l++)
        check_abs(a[l], b[l], 0, "1 vs 2 threads");
}

static void test_pixel_window_cache(void **state)
{
    (void)state;
    char dir[1024];
    snprintf(dir, sizeof dir, "%s", test_path("cache/sub"));
    setenv("CLEF_CACHE_DIR", dir, 1);
    clef_beam_pixel_window_cache_clear();
    double ref[24], a[24], b[40];
    assert_int_equal(clef_beam_pixel_window_compute(8, 23, NULL, ref), CLEF_OK);
    assert_int_equal(clef_beam_pixel_window(8, 10, a), CLEF_OK);
    for (int l = 0; l <= 10; l++)
        check_abs(a[l], ref[l], 0, "cached = computed");
    char file[1200];
    snprintf(file, sizeof file, "%s/pixel_window/nside00008-lmax00023.txt", dir);
    assert_true(file_exists(file));
    /* From the disk cache in a fresh process state. */
    clef_beam_pixel_window_cache_clear();
    assert_int_equal(clef_beam_pixel_window(8, 23, a), CLEF_OK);
    for (int l = 0; l <= 23; l++)
        check_abs(a[l], ref[l], 0, "disk cache round trip (%.17g)");
    /* A damaged cache file is ignored and replaced. */
    write_text(file, "# clef pixel window v1 nside 8 lmax 23\n0 1\n1 7\n");
    clef_beam_pixel_window_cache_clear();
    assert_int_equal(clef_beam_pixel_window(8, 23, a), CLEF_OK);
    for (int l = 0; l <= 23; l++)
        check_abs(a[l], ref[l], 0, "recomputed after a damaged cache");
    /* lmax above 3 nside - 1. */
    assert_int_equal(clef_beam_pixel_window(8, 39, b), CLEF_OK);
    check_abs(b[23], ref[23], 0, "larger lmax, same low l");
    assert_true(b[39] < b[23]);
    /* Disk cache off. */
    setenv("CLEF_CACHE_DIR", "", 1);
    clef_beam_pixel_window_cache_clear();
    assert_int_equal(clef_beam_pixel_window(4, 11, a), CLEF_OK);
    snprintf(file, sizeof file, "%s/pixel_window/nside00004-lmax00011.txt", dir);
    assert_false(file_exists(file));
    /* An unwritable cache folder is not an error. */
    setenv("CLEF_CACHE_DIR", "/proc/clef-no-such-folder", 1);
    clef_beam_pixel_window_cache_clear();
    assert_int_equal(clef_beam_pixel_window(4, 11, a), CLEF_OK);
    check_abs(a[11], healpix_n4[11], 2e-5, "HEALPix pixel_window_n0004.fits");
    clef_beam_pixel_window_cache_clear();
}

static void test_pixel_window_errors(void **state)
{
    (void)state;
    double p[16];
    assert_int_equal(clef_beam_pixel_window_compute(3, 8, NULL, p), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "nside 3"));
    assert_int_equal(clef_beam_pixel_window_compute(0, 8, NULL, p), CLEF_EINVAL);
    assert_int_equal(clef_beam_pixel_window_compute(16384, 8, NULL, p), CLEF_EINVAL);
    assert_int_equal(clef_beam_pixel_window_compute(4, -1, NULL, p), CLEF_EINVAL);
    const clef_beam_pixel_window_opts bad_k = {3, 0, 0}, bad_r = {8, 1, 0}, bad_u = {8, 4, -2};
    assert_int_equal(clef_beam_pixel_window_compute(4, 8, &bad_k, p), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "sub-sampling 3"));
    assert_int_equal(clef_beam_pixel_window_compute(4, 8, &bad_r, p), CLEF_EINVAL);
    assert_int_equal(clef_beam_pixel_window_compute(4, 8, &bad_u, p), CLEF_EINVAL);
    assert_int_equal(clef_beam_pixel_window(5, 8, p), CLEF_EINVAL);
    assert_int_equal(clef_beam_pixel_window(4, -3, p), CLEF_EINVAL);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_gaussian_formula),
        cmocka_unit_test(test_gaussian_errors),
        cmocka_unit_test(test_gaussian_beam_map),
        cmocka_unit_test(test_beam_file),
        cmocka_unit_test(test_beam_file_errors),
        cmocka_unit_test(test_pixel_window_reference),
        cmocka_unit_test(test_pixel_window_properties),
        cmocka_unit_test(test_pixel_window_two_densities),
        cmocka_unit_test(test_pixel_window_subset),
        cmocka_unit_test(test_pixel_window_threads),
        cmocka_unit_test(test_pixel_window_cache),
        cmocka_unit_test(test_pixel_window_errors),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
