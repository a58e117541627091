/* Tests of the spherical harmonic transform (include/clef/sht.h) against
 * outside references: GSL's associated Legendre functions, DLMF closed
 * forms, the HEALPix C library's pixel centres, Gorski et al. 2005 ring
 * formulas, and astropy for the a_lm file. */
#include "check.h"

#include <complex.h>
#include <omp.h>

#include <chealpix.h>
#include <fitsio.h>
#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>
#include <gsl/gsl_sf_gamma.h>
#include <gsl/gsl_sf_legendre.h>

#include "clef/sht.h"

#define PI 3.14159265358979323846

/* Random a_lm with a flat spectrum (C_l = 1): a_l0 real N(0,1), a_lm
 * complex with N(0, 1/2) parts; GSL mt19937 with a fixed seed. */
static double complex *random_alm(int lmax, int mmax, unsigned long seed)
{
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, seed);
    double complex *a = malloc(clef_alm_size(lmax, mmax) * sizeof *a);
    assert_non_null(a);
    for (int m = 0; m <= mmax; m++)
        for (int l = m; l <= lmax; l++) {
            const double s = m ? sqrt(0.5) : 1.0;
            const double re = gsl_ran_gaussian(r, s), im = m ? gsl_ran_gaussian(r, s) : 0.0;
            a[clef_alm_index(lmax, l, m)] = re + I * im;
        }
    gsl_rng_free(r);
    return a;
}

static double rel_rms(const double complex *a, const double complex *ref, size_t n)
{
    double num = 0.0, den = 0.0;
    for (size_t i = 0; i < n; i++) {
        num += creal((a[i] - ref[i]) * conj(a[i] - ref[i]));
        den += creal(ref[i] * conj(ref[i]));
    }
    return sqrt(num / den);
}

/* ------------------------------------------------------------ Legendre */

/* lambda_lm against GSL gsl_sf_legendre_sphPlm (which includes the
 * Condon-Shortley phase) for l <= 200 at several z. */
static void test_lambda_gsl(void **state)
{
    (void)state;
    const double zs[] = {-0.97, -0.5, 0.0, 0.13, 0.7071, 0.999};
    const int lmax = 200;
    double out[201];
    for (size_t iz = 0; iz < sizeof zs / sizeof *zs; iz++)
        for (int m = 0; m <= lmax; m += 7) {
            assert_int_equal(clef_legendre_lambda(lmax, m, zs[iz], out), CLEF_OK);
            for (int l = m; l <= lmax; l++) {
                const double ref = gsl_sf_legendre_sphPlm(l, m, zs[iz]);
                /* Absolute floor: values far below the O(1) peak lose
                 * relative accuracy in both codes. */
                check_abs(out[l - m], ref, 1e-12 * fmax(1.0, fabs(ref)), "GSL sphPlm");
            }
        }
}

/* Closed forms: DLMF 14.5.11-14.5.12 type low-order Ferrers functions and
 * the normalisation of DLMF 14.30.1 (Y_l^m with Condon-Shortley phase). */
static void test_lambda_closed_forms(void **state)
{
    (void)state;
    const double z = 0.37, s = sqrt(1.0 - z * z);
    double o0[4], o1[3], o2[2];
    assert_int_equal(clef_legendre_lambda(3, 0, z, o0), CLEF_OK);
    assert_int_equal(clef_legendre_lambda(3, 1, z, o1), CLEF_OK);
    assert_int_equal(clef_legendre_lambda(3, 2, z, o2), CLEF_OK);
    /* Y_00 = 1/sqrt(4 pi); Y_10 = sqrt(3/4pi) z; Y_20 = sqrt(5/4pi)(3z^2-1)/2;
     * Y_30 = sqrt(7/4pi)(5z^3-3z)/2; Y_11 = -sqrt(3/8pi) s;
     * Y_21 = -sqrt(15/8pi) s z; Y_22 = sqrt(15/32pi) s^2  (DLMF 14.30.1 with
     * 14.5 / 14.7 Ferrers functions) */
    check_rel(o0[0], 1.0 / sqrt(4 * PI), 4 * DBL_EPSILON, "DLMF 14.30.1 Y00");
    check_rel(o0[1], sqrt(3 / (4 * PI)) * z, 4 * DBL_EPSILON, "DLMF Y10");
    check_rel(o0[2], sqrt(5 / (4 * PI)) * (3 * z * z - 1) / 2, 8 * DBL_EPSILON, "DLMF Y20");
    check_rel(o0[3], sqrt(7 / (4 * PI)) * (5 * z * z * z - 3 * z) / 2, 16 * DBL_EPSILON, "DLMF Y30");
    check_rel(o1[0], -sqrt(3 / (8 * PI)) * s, 4 * DBL_EPSILON, "DLMF Y11");
    check_rel(o1[1], -sqrt(15 / (8 * PI)) * s * z, 8 * DBL_EPSILON, "DLMF Y21");
    check_rel(o2[0], sqrt(15 / (32 * PI)) * s * s, 8 * DBL_EPSILON, "DLMF Y22");
}

/* Sectoral lambda_mm for large m against the log-space closed form
 * lambda_mm = (-1)^m sqrt((2m+1)/(4pi) (2m)!/(2^m m!)^2) sin^m theta
 * (DLMF 14.5.? P_m^m = (-1)^m (2m-1)!! (1-x^2)^{m/2}, with 14.30.1 norm),
 * evaluated with lgamma; then lambda_{5000,4000} against GSL's array
 * routine (gsl_sf_legendre_array_e, SPHARM normalisation), where a plain
 * unscaled recurrence would underflow at sin^4000 theta ~ 1e-250. */
static void test_lambda_high(void **state)
{
    (void)state;
    const int m = 4000, lmax = 5000;
    double *out = malloc((lmax - m + 1) * sizeof *out);
    assert_non_null(out);
    const double zs[] = {0.5, 0.2};
    for (int iz = 0; iz < 2; iz++) {
        const double z = zs[iz];
        assert_int_equal(clef_legendre_lambda(lmax, m, z, out), CLEF_OK);
        const double lg = 0.5 * (log(2.0 * m + 1) - log(4 * PI) + gsl_sf_lngamma(2.0 * m + 1) -
                                 2 * gsl_sf_lngamma(m + 1.0) - 2.0 * m * log(2.0)) +
                          0.5 * m * log1p(-z * z);
        check_rel(log(fabs(out[0])), lg, 1e-13, "log closed form lambda_mm");
        assert_true(out[0] > 0); /* (-1)^4000 */
        const size_t n = gsl_sf_legendre_array_n(lmax);
        double *arr = malloc(n * sizeof *arr);
        assert_non_null(arr);
        assert_int_equal(gsl_sf_legendre_array_e(GSL_SF_LEGENDRE_SPHARM, lmax, z, -1, arr), 0);
        const double ref = arr[gsl_sf_legendre_array_index(lmax, m)];
        check_rel(out[lmax - m], ref, 1e-11, "GSL legendre_array SPHARM l=5000 m=4000");
        const double ref2 = arr[gsl_sf_legendre_array_index(4500, m)];
        check_rel(out[4500 - m], ref2, 1e-11, "GSL legendre_array SPHARM l=4500 m=4000");
        free(arr);
    }
    /* Near the pole lambda_mm is ~1e-2700: far below doubles; the values
     * must come out as 0 or tiny, never NaN, and reach O(1) later. */
    assert_int_equal(clef_legendre_lambda(lmax, m, 0.9999, out), CLEF_OK);
    for (int l = m; l <= lmax; l++)
        assert_true(isfinite(out[l - m]) && fabs(out[l - m]) < 1e-100);
    free(out);
}

static void test_lambda_errors(void **state)
{
    (void)state;
    double out[4];
    assert_int_equal(clef_legendre_lambda(2, 3, 0.1, out), CLEF_EINVAL);
    assert_int_equal(clef_legendre_lambda(2, -1, 0.1, out), CLEF_EINVAL);
    assert_int_equal(clef_legendre_lambda(2, 0, 1.5, out), CLEF_EINVAL);
    assert_int_equal(clef_legendre_lambda(2, 0, NAN, out), CLEF_EINVAL);
    assert_int_equal(clef_legendre_lambda(2, 0, 0.1, NULL), CLEF_EINVAL);
}

/* ------------------------------------------------------------ geometry */

/* Ring geometry against Gorski et al. 2005 (METHODS.md section 1). */
static void test_geometry(void **state)
{
    (void)state;
    const int64_t nsides[] = {1, 2, 16, 64};
    for (int k = 0; k < 4; k++) {
        const int64_t ns = nsides[k];
        clef_sht *p;
        clef_sht_opts o = {.no_ring_weights = 1};
        assert_int_equal(clef_sht_create(&p, ns, 2, &o), CLEF_OK);
        assert_int_equal(clef_sht_nrings(p), 4 * ns - 1);
        for (int64_t i = 1; i <= 4 * ns - 1; i++) {
            double z, phi0, w;
            int64_t n, first;
            assert_int_equal(clef_sht_ring_info(p, (int)i, &z, &phi0, &n, &first, &w), CLEF_OK);
            double zr, phr;
            int64_t nr, fr;
            const double dn = (double)ns;
            if (i < ns) {
                zr = 1.0 - (double)(i * i) / (3.0 * dn * dn);
                nr = 4 * i;
                phr = PI / (2.0 * i) * 0.5;
                fr = 2 * i * (i - 1);
            } else if (i <= 3 * ns) {
                zr = 4.0 / 3.0 - 2.0 * i / (3.0 * dn);
                nr = 4 * ns;
                phr = PI / (2.0 * dn) * 0.5 * ((i - ns + 1) % 2);
                fr = 2 * ns * (ns - 1) + 4 * ns * (i - ns);
            } else {
                const int64_t q = 4 * ns - i;
                zr = -(1.0 - (double)(q * q) / (3.0 * dn * dn));
                nr = 4 * q;
                phr = PI / (2.0 * q) * 0.5;
                fr = 12 * ns * ns - 2 * q * (q + 1);
            }
            check_abs(z, zr, 4 * DBL_EPSILON, "Gorski 2005 ring z");
            check_abs(phi0, phr, 8 * DBL_EPSILON, "Gorski 2005 ring phi0");
            assert_int_equal(n, nr);
            assert_int_equal(first, fr);
            assert_true(w == 1.0);
        }
        clef_sht_destroy(p);
    }
    /* METHODS.md section 1 check values for nside 2: first indices. */
    clef_sht *p;
    assert_int_equal(clef_sht_create(&p, 2, 2, NULL), CLEF_OK);
    const int64_t firsts[] = {0, 4, 12, 20, 28, 36, 44};
    for (int i = 1; i <= 7; i++) {
        int64_t f;
        assert_int_equal(clef_sht_ring_info(p, i, NULL, NULL, NULL, &f, NULL), CLEF_OK);
        assert_int_equal(f, firsts[i - 1]);
    }
    assert_int_equal(clef_sht_ring_info(p, 0, NULL, NULL, NULL, NULL, NULL), CLEF_EINVAL);
    assert_int_equal(clef_sht_ring_info(p, 8, NULL, NULL, NULL, NULL, NULL), CLEF_EINVAL);
    clef_sht_destroy(p);
}

/* ------------------------------------------------------------ synthesis */

/* Direct sum of GSL-evaluated Y_lm at the HEALPix C library's pixel
 * centres: f(p) = sum_l [a_l0 Y_l0 + 2 Re sum_{m>0} a_lm Y_lm]. */
static void direct_synthesis(int64_t nside, int lmax, const double complex *alm, double *map)
{
    const int64_t npix = 12 * nside * nside;
    double *arr = malloc(gsl_sf_legendre_array_n(lmax) * sizeof *arr);
    assert_non_null(arr);
    double zlast = 2.0;
    for (int64_t ip = 0; ip < npix; ip++) {
        double theta, phi;
        pix2ang_ring64(nside, ip, &theta, &phi);
        const double z = cos(theta);
        if (z != zlast) {
            assert_int_equal(gsl_sf_legendre_array_e(GSL_SF_LEGENDRE_SPHARM, lmax, z, -1, arr), 0);
            zlast = z;
        }
        double f = 0.0;
        for (int m = 0; m <= lmax; m++) {
            const double complex e = cexp(I * m * phi);
            for (int l = m; l <= lmax; l++) {
                const double y = arr[gsl_sf_legendre_array_index(l, m)];
                const double complex t = alm[clef_alm_index(lmax, l, m)] * y * e;
                f += m ? 2.0 * creal(t) : creal(t);
            }
        }
        map[ip] = f;
    }
    free(arr);
}

static void test_synthesis_direct(void **state)
{
    (void)state;
    const int64_t nsides[] = {16, 32};
    for (int k = 0; k < 2; k++) {
        const int64_t ns = nsides[k];
        const int lmax = 3 * (int)ns - 1;
        const int64_t npix = 12 * ns * ns;
        double complex *alm = random_alm(lmax, lmax, 11 + k);
        double *map = malloc(npix * sizeof *map), *ref = malloc(npix * sizeof *ref);
        clef_sht *p;
        assert_int_equal(clef_sht_create(&p, ns, lmax, NULL), CLEF_OK);
        assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&alm, &map),
                         CLEF_OK);
        direct_synthesis(ns, lmax, alm, ref);
        double num = 0, den = 0, emax = 0;
        for (int64_t i = 0; i < npix; i++) {
            num += (map[i] - ref[i]) * (map[i] - ref[i]);
            den += ref[i] * ref[i];
            emax = fmax(emax, fabs(map[i] - ref[i]));
        }
        const double rms = sqrt(den / npix);
        printf("synthesis nside %lld lmax %d: rel rms diff %.3g, max |diff|/rms %.3g\n",
               (long long)ns, lmax, sqrt(num / den), emax / rms);
        check_abs(sqrt(num / den), 0.0, 1e-12, "direct sum of GSL Y_lm at chealpix centres");
        check_abs(emax / rms, 0.0, 1e-12, "direct sum of GSL Y_lm (max)");
        clef_sht_destroy(p);
        free(alm);
        free(map);
        free(ref);
    }
}

/* ------------------------------------------------------------- analysis */

static double roundtrip_error(int64_t ns, int lmax, int iterations, int weights)
{
    const int64_t npix = 12 * ns * ns;
    double complex *alm = random_alm(lmax, lmax, 1000 + lmax);
    double complex *out = malloc(clef_alm_size(lmax, lmax) * sizeof *out);
    double *map = malloc(npix * sizeof *map);
    clef_sht *p;
    clef_sht_opts o = {.no_ring_weights = !weights};
    assert_int_equal(clef_sht_create(&p, ns, lmax, &o), CLEF_OK);
    assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&alm, &map), CLEF_OK);
    assert_int_equal(clef_sht_analysis(p, 1, (const double *const *)&map, &out, iterations),
                     CLEF_OK);
    const double e = rel_rms(out, alm, clef_alm_size(lmax, lmax));
    clef_sht_destroy(p);
    free(alm);
    free(out);
    free(map);
    return e;
}

static void test_analysis_accuracy(void **state)
{
    (void)state;
    const int64_t ns = test_sanitize() ? 16 : 32;
    const int lm[3] = {(int)ns, 2 * (int)ns, 3 * (int)ns - 1};
    double e[3][6], eu[3];
    for (int k = 0; k < 3; k++) {
        for (int it = 0; it <= 5; it++)
            e[k][it] = roundtrip_error(ns, lm[k], it, 1);
        eu[k] = roundtrip_error(ns, lm[k], 3, 0);
    }
    printf("analysis of band-limited flat-spectrum maps, nside %lld: rel rms a_lm error\n",
           (long long)ns);
    printf("%-8s %-10s", "lmax", "weights");
    for (int it = 0; it <= 5; it++)
        printf(" iter=%d    ", it);
    printf("\n");
    for (int k = 0; k < 3; k++) {
        printf("%-8d %-10s", lm[k], "ring");
        for (int it = 0; it <= 5; it++)
            printf(" %-10.3g", e[k][it]);
        printf("\n%-8d %-10s %-10s %-10s %-10s %-10.3g\n", lm[k], "none", "", "", "", eu[k]);
    }
    /* Targets of issue 3 (METHODS.md section 2 gives the unweighted ones). */
    check_abs(e[0][3], 0.0, 1e-7, "issue 3: lmax = nside, 3 iterations");
    check_abs(e[1][3], 0.0, 1e-5, "issue 3: lmax = 2 nside, 3 iterations");
    /* The ring weights must beat plain pixel sums. */
    assert_true(e[0][3] < eu[0]);
    assert_true(e[1][3] < eu[1]);
    /* Iterating helps while lmax <= 2 nside. */
    assert_true(e[0][1] < e[0][0] && e[1][1] < e[1][0]);
}


/* Parseval: Omega_pix sum_p f_p^2 = sum_l (2l+1) C_l for a band-limited
 * map, to the accuracy of the pixel quadrature (ring weights help). */
static void test_parseval(void **state)
{
    (void)state;
    const int64_t ns = 32;
    const int lmax = 32;
    const int64_t npix = 12 * ns * ns;
    double complex *alm = random_alm(lmax, lmax, 77);
    double *map = malloc(npix * sizeof *map), cl[33];
    clef_sht *p;
    assert_int_equal(clef_sht_create(&p, ns, lmax, NULL), CLEF_OK);
    assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&alm, &map), CLEF_OK);
    assert_int_equal(clef_alm_cl(lmax, lmax, alm, NULL, cl), CLEF_OK);
    double power = 0.0, sum = 0.0, sumw = 0.0;
    for (int l = 0; l <= lmax; l++)
        power += (2 * l + 1) * cl[l];
    for (int r = 1; r <= clef_sht_nrings(p); r++) {
        int64_t n, first;
        double w;
        assert_int_equal(clef_sht_ring_info(p, r, NULL, NULL, &n, &first, &w), CLEF_OK);
        double s = 0.0;
        for (int64_t i = first; i < first + n; i++)
            s += map[i] * map[i];
        sum += s;
        sumw += w * s;
    }
    const double domega = 4 * PI / npix;
    printf("Parseval nside 32 lmax 32: plain %.3g, ring-weighted %.3g relative\n",
           sum * domega / power - 1, sumw * domega / power - 1);
    /* f^2 has band limit 64 = 2 nside: the ring weights integrate its zonal
     * part exactly; the remaining error is azimuthal aliasing near the poles. */
    check_rel(sumw * domega, power, 1e-5, "Parseval (common practice)");
    assert_true(fabs(sumw * domega - power) <= fabs(sum * domega - power));
    clef_sht_destroy(p);
    free(alm);
    free(map);
}

/* clef_alm_cl against the full sum over -l <= m <= l with
 * a_{l,-m} = (-1)^m conj(a_lm) (METHODS.md section 2). */
static void test_alm_cl(void **state)
{
    (void)state;
    const int lmax = 40, mmax = 40;
    double complex *a = random_alm(lmax, mmax, 5), *b = random_alm(lmax, mmax, 6);
    double caa[41], cab[41], cba[41], cnull[41];
    assert_int_equal(clef_alm_cl(lmax, mmax, a, a, caa), CLEF_OK);
    assert_int_equal(clef_alm_cl(lmax, mmax, a, NULL, cnull), CLEF_OK);
    assert_int_equal(clef_alm_cl(lmax, mmax, a, b, cab), CLEF_OK);
    assert_int_equal(clef_alm_cl(lmax, mmax, b, a, cba), CLEF_OK);
    for (int l = 0; l <= lmax; l++) {
        double complex sa = 0, sab = 0;
        for (int m = -l; m <= l; m++) {
            const int am = abs(m);
            const double sg = (m < 0 && (am & 1)) ? -1.0 : 1.0;
            double complex x = a[clef_alm_index(lmax, l, am)], y = b[clef_alm_index(lmax, l, am)];
            if (m < 0) {
                x = sg * conj(x);
                y = sg * conj(y);
            }
            sa += x * conj(x);
            sab += x * conj(y);
        }
        check_rel(caa[l], creal(sa) / (2 * l + 1), 1e-14, "sum over m of |a_lm|^2");
        check_rel(cab[l], creal(sab) / (2 * l + 1), 1e-12, "sum over m of a_lm b_lm*");
        check_abs(cimag(sab), 0.0, 1e-12, "cross spectrum of real maps is real");
        assert_true(caa[l] == cnull[l]);
        assert_true(cab[l] == cba[l]);
    }
    /* mmax < lmax: the spectrum of the truncated a_lm. */
    double ct[41];
    const int mt = 10;
    double complex *t = random_alm(lmax, mt, 9);
    assert_int_equal(clef_alm_cl(lmax, mt, t, NULL, ct), CLEF_OK);
    for (int l = 0; l <= lmax; l++) {
        double s = 0;
        for (int m = 0; m <= (l < mt ? l : mt); m++)
            s += (m ? 2 : 1) * creal(t[clef_alm_index(lmax, l, m)] * conj(t[clef_alm_index(lmax, l, m)]));
        check_rel(ct[l], s / (2 * l + 1), 1e-14, "truncated sum over m");
    }
    assert_int_equal(clef_alm_cl(lmax, lmax + 1, a, NULL, ct), CLEF_EINVAL);
    assert_int_equal(clef_alm_cl(-1, 0, a, NULL, ct), CLEF_EINVAL);
    assert_int_equal(clef_alm_cl(lmax, mmax, NULL, NULL, ct), CLEF_EINVAL);
    free(a);
    free(b);
    free(t);
}

/* Same results for 1 and 2 threads (no thread-dependent reductions). */
static void test_threads(void **state)
{
    (void)state;
    const int64_t ns = 64;
    const int lmax = 127;
    const int64_t npix = 12 * ns * ns;
    const size_t nalm = clef_alm_size(lmax, lmax);
    const int saved = omp_get_max_threads();
    omp_set_num_threads(2);
    clef_sht *p;
    assert_int_equal(clef_sht_create(&p, ns, lmax, NULL), CLEF_OK);
    double complex *alm = random_alm(lmax, lmax, 21);
    double complex *o1 = malloc(nalm * sizeof *o1), *o2 = malloc(nalm * sizeof *o2);
    double *m1 = malloc(npix * sizeof *m1), *m2 = malloc(npix * sizeof *m2);
    omp_set_num_threads(1);
    assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&alm, &m1), CLEF_OK);
    assert_int_equal(clef_sht_analysis(p, 1, (const double *const *)&m1, &o1, 2), CLEF_OK);
    omp_set_num_threads(2);
    assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&alm, &m2), CLEF_OK);
    assert_int_equal(clef_sht_analysis(p, 1, (const double *const *)&m2, &o2, 2), CLEF_OK);
    double dm = 0, da = 0, sm = 0, sa = 0;
    for (int64_t i = 0; i < npix; i++) {
        dm = fmax(dm, fabs(m1[i] - m2[i]));
        sm = fmax(sm, fabs(m1[i]));
    }
    for (size_t i = 0; i < nalm; i++) {
        da = fmax(da, cabs(o1[i] - o2[i]));
        sa = fmax(sa, cabs(o1[i]));
    }
    check_abs(dm / sm, 0.0, 1e-14, "1 vs 2 threads, synthesis");
    check_abs(da / sa, 0.0, 1e-14, "1 vs 2 threads, analysis");
    omp_set_num_threads(saved);
    clef_sht_destroy(p);
    free(alm);
    free(o1);
    free(o2);
    free(m1);
    free(m2);
}

/* ------------------------------------------------------------- kernels */

/* One run of every available Legendre kernel (include/clef/kernel.h) on the
 * same input: 3 maps (the kernels group maps in pairs, so one pair and one
 * single), synthesis then analysis with 2 Jacobi iterations, at 1 and 2
 * threads.  Per kernel the two thread counts must give the same bits;
 * across kernels the results must agree to 1e-14 relative rms (the kernels
 * differ only in rounding: the baseline has no fused multiply-add); and
 * every kernel's synthesis must match the direct GSL sum. */
typedef struct kernel_run {
    double *map[3];
    double complex *alm[3];
} kernel_run;

static void kernel_transform(clef_kernel k, int64_t ns, int lmax, int nthreads,
                             double complex *const *in, kernel_run *out)
{
    const int64_t npix = 12 * ns * ns;
    const size_t nalm = clef_alm_size(lmax, lmax);
    for (int j = 0; j < 3; j++) {
        out->map[j] = malloc(npix * sizeof(double));
        out->alm[j] = malloc(nalm * sizeof(double complex));
        assert_true(out->map[j] && out->alm[j]);
    }
    const int saved = omp_get_max_threads();
    omp_set_num_threads(nthreads);
    clef_sht *p;
    clef_sht_opts o = {.nmaps = 3, .kernel = k};
    assert_int_equal(clef_sht_create(&p, ns, lmax, &o), CLEF_OK);
    assert_int_equal(clef_sht_kernel_used(p), k);
    assert_int_equal(clef_sht_synthesis(p, 3, (const double complex *const *)in, out->map),
                     CLEF_OK);
    assert_int_equal(clef_sht_analysis(p, 3, (const double *const *)out->map, out->alm, 2),
                     CLEF_OK);
    clef_sht_destroy(p);
    omp_set_num_threads(saved);
}

static void kernel_run_free(kernel_run *r)
{
    for (int j = 0; j < 3; j++) {
        free(r->map[j]);
        free(r->alm[j]);
    }
}

static double rel_rms_real(const double *a, const double *ref, size_t n)
{
    double num = 0.0, den = 0.0;
    for (size_t i = 0; i < n; i++) {
        num += (a[i] - ref[i]) * (a[i] - ref[i]);
        den += ref[i] * ref[i];
    }
    return sqrt(num / den);
}

static void test_kernels(void **state)
{
    (void)state;
    const clef_kernel ks[] = {CLEF_KERNEL_BASE, CLEF_KERNEL_AVX2, CLEF_KERNEL_AVX512};
    const int64_t ns = test_sanitize() ? 32 : 64;
    const int lmax = 3 * (int)ns - 1;
    const int64_t npix = 12 * ns * ns;
    const size_t nalm = clef_alm_size(lmax, lmax);
    double complex *in[3];
    for (int j = 0; j < 3; j++)
        in[j] = random_alm(lmax, lmax, 31 + j);
    kernel_run base = {0};
    int nrun = 0;
    for (int q = 0; q < 3; q++) {
        if (!clef_kernel_available(ks[q])) {
            printf("kernel %s: not available on this build or CPU\n", clef_kernel_name(ks[q]));
            continue;
        }
        kernel_run r1, r2;
        kernel_transform(ks[q], ns, lmax, 1, in, &r1);
        kernel_transform(ks[q], ns, lmax, 2, in, &r2);
        double dmax = 0.0;
        for (int j = 0; j < 3; j++) {
            /* Bit-identical for one kernel at any thread count (sht.h). */
            assert_memory_equal(r1.map[j], r2.map[j], npix * sizeof(double));
            assert_memory_equal(r1.alm[j], r2.alm[j], nalm * sizeof(double complex));
            if (q > 0) {
                const double dm = rel_rms_real(r1.map[j], base.map[j], (size_t)npix);
                const double da = rel_rms(r1.alm[j], base.alm[j], nalm);
                dmax = fmax(dmax, fmax(dm, da));
                check_abs(dm, 0.0, 1e-14, "kernel vs base kernel, synthesis (issue 17)");
                check_abs(da, 0.0, 1e-14, "kernel vs base kernel, analysis (issue 17)");
            }
        }
        printf("kernel %-6s nside %lld lmax %d: threads 1 = 2 bit for bit; rel rms vs base %.3g\n",
               clef_kernel_name(ks[q]), (long long)ns, lmax, dmax);
        kernel_run_free(&r2);
        if (q == 0)
            base = r1;
        else
            kernel_run_free(&r1);
        nrun++;
    }
    assert_true(nrun >= 1 && base.map[0]); /* the baseline is always built */
    kernel_run_free(&base);
    for (int j = 0; j < 3; j++)
        free(in[j]);

    /* Each kernel against the direct sum of GSL Y_lm (outside reference). */
    const int64_t ns2 = 16;
    const int lmax2 = 3 * (int)ns2 - 1;
    const int64_t npix2 = 12 * ns2 * ns2;
    double complex *alm = random_alm(lmax2, lmax2, 41);
    double *ref = malloc(npix2 * sizeof *ref), *map = malloc(npix2 * sizeof *map);
    direct_synthesis(ns2, lmax2, alm, ref);
    for (int q = 0; q < 3; q++) {
        if (!clef_kernel_available(ks[q]))
            continue;
        clef_sht *p;
        clef_sht_opts o = {.kernel = ks[q]};
        assert_int_equal(clef_sht_create(&p, ns2, lmax2, &o), CLEF_OK);
        assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&alm, &map),
                         CLEF_OK);
        check_abs(rel_rms_real(map, ref, (size_t)npix2), 0.0, 1e-12,
                  "direct sum of GSL Y_lm at chealpix centres");
        clef_sht_destroy(p);
    }
    free(alm);
    free(ref);
    free(map);
}

/* Kernel choice: names, the CLEF_KERNEL variable, and the automatic
 * choice against the CPU flags Linux lists in /proc/cpuinfo (outside
 * reference: the kernel's own cpuid report). */
static int cpuinfo_has(const char *flag)
{
    FILE *f = fopen("/proc/cpuinfo", "r");
    if (!f)
        return -1;
    char line[8192];
    int found = 0;
    while (!found && fgets(line, sizeof line, f)) {
        if (strncmp(line, "flags", 5))
            continue;
        for (char *t = strtok(strchr(line, ':') + 1, " \n"); t; t = strtok(NULL, " \n"))
            found |= !strcmp(t, flag);
        break;
    }
    fclose(f);
    return found;
}

static void test_kernel_choice(void **state)
{
    (void)state;
    for (int k = 0; k < CLEF_KERNEL_COUNT; k++) {
        clef_kernel back;
        assert_int_equal(clef_kernel_parse(clef_kernel_name((clef_kernel)k), &back), CLEF_OK);
        assert_int_equal(back, k);
    }
    clef_kernel back;
    assert_int_equal(clef_kernel_parse("AVX2", &back), CLEF_EINVAL);
    assert_int_equal(clef_kernel_parse("sse9", &back), CLEF_EINVAL);
    assert_true(clef_kernel_available(CLEF_KERNEL_BASE));

    char saved[64] = "";
    const char *env = getenv("CLEF_KERNEL");
    if (env)
        snprintf(saved, sizeof saved, "%s", env);
    clef_sht *p = NULL;
    setenv("CLEF_KERNEL", "avx3", 1);
    assert_int_equal(clef_sht_create(&p, 4, 8, NULL), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "CLEF_KERNEL"));
    assert_non_null(strstr(clef_last_error(), "avx3"));
    setenv("CLEF_KERNEL", "base", 1);
    assert_int_equal(clef_sht_create(&p, 4, 8, NULL), CLEF_OK);
    assert_int_equal(clef_sht_kernel_used(p), CLEF_KERNEL_BASE);
    clef_sht_destroy(p);
    /* The plan option wins over the variable. */
    if (clef_kernel_available(CLEF_KERNEL_AVX2)) {
        clef_sht_opts o = {.kernel = CLEF_KERNEL_AVX2};
        assert_int_equal(clef_sht_create(&p, 4, 8, &o), CLEF_OK);
        assert_int_equal(clef_sht_kernel_used(p), CLEF_KERNEL_AVX2);
        clef_sht_destroy(p);
    }
    unsetenv("CLEF_KERNEL");
    clef_kernel k;
    assert_int_equal(clef_kernel_resolve(CLEF_KERNEL_AUTO, &k), CLEF_OK);
    const int has512 = cpuinfo_has("avx512f"), has2 = cpuinfo_has("avx2"), fma = cpuinfo_has("fma");
    printf("auto kernel %s; /proc/cpuinfo: avx512f %d avx2 %d fma %d\n", clef_kernel_name(k),
           has512, has2, fma);
#if defined(__x86_64__)
    if (has512 >= 0) {
        clef_kernel want = (has512 && cpuinfo_has("avx512dq") && fma) ? CLEF_KERNEL_AVX512
                           : (has2 && fma)                        ? CLEF_KERNEL_AVX2
                                                                  : CLEF_KERNEL_BASE;
        /* A build without a width (flags not applied) steps down from what
         * the CPU offers; never above it. */
        while (want > CLEF_KERNEL_BASE && !clef_kernel_available(want))
            want = (clef_kernel)(want - 1);
        assert_int_equal(k, want);
    }
#else
    assert_int_equal(k, CLEF_KERNEL_BASE);
#endif
    /* A kernel this CPU lacks is refused, never silently replaced. */
    for (int q = CLEF_KERNEL_AVX2; q <= CLEF_KERNEL_AVX512; q++)
        if (!clef_kernel_available((clef_kernel)q)) {
            clef_sht_opts o = {.kernel = (clef_kernel)q};
            assert_int_equal(clef_sht_create(&p, 4, 8, &o), CLEF_EUNSUP);
        }
    if (saved[0])
        setenv("CLEF_KERNEL", saved, 1);
}

/* Several maps per call share the recurrence and give the single-map
 * results (5 maps exercise the grouping of maps in the kernels); a plan
 * with mmax < lmax equals the full plan on a_lm truncated at mmax. */
static void test_nmaps_mmax(void **state)
{
    (void)state;
    const int64_t ns = 16;
    const int lmax = 40, nm = 5, mmax = 12;
    const int64_t npix = 12 * ns * ns;
    const size_t nalm = clef_alm_size(lmax, lmax);
    clef_sht *p1, *p5, *pm;
    clef_sht_opts o5 = {.nmaps = nm}, om = {.mmax = mmax};
    assert_int_equal(clef_sht_create(&p1, ns, lmax, NULL), CLEF_OK);
    assert_int_equal(clef_sht_create(&p5, ns, lmax, &o5), CLEF_OK);
    assert_int_equal(clef_sht_create(&pm, ns, lmax, &om), CLEF_OK);
    assert_int_equal(clef_sht_mmax(pm), mmax);
    double complex *alm[5], *out[5], *ref = malloc(nalm * sizeof *ref);
    double *map[5], *one = malloc(npix * sizeof *one);
    for (int j = 0; j < nm; j++) {
        alm[j] = random_alm(lmax, lmax, 100 + j);
        out[j] = malloc(nalm * sizeof **out);
        map[j] = malloc(npix * sizeof **map);
    }
    assert_int_equal(clef_sht_synthesis(p5, nm, (const double complex *const *)alm, map), CLEF_OK);
    assert_int_equal(clef_sht_analysis(p5, nm, (const double *const *)map, out, 1), CLEF_OK);
    for (int j = 0; j < nm; j++) {
        assert_int_equal(clef_sht_synthesis(p1, 1, (const double complex *const *)&alm[j], &one),
                         CLEF_OK);
        for (int64_t i = 0; i < npix; i++)
            check_abs(map[j][i], one[i], 1e-14 * (1 + fabs(one[i])), "nmaps = 5 vs single map");
        assert_int_equal(clef_sht_analysis(p1, 1, (const double *const *)&one, &ref, 1), CLEF_OK);
        for (size_t i = 0; i < nalm; i++)
            check_abs(cabs(out[j][i] - ref[i]), 0.0, 1e-14, "nmaps = 5 vs single map, analysis");
    }
    /* mmax variant */
    double complex *tr = malloc(clef_alm_size(lmax, mmax) * sizeof *tr);
    for (int m = 0; m <= mmax; m++)
        for (int l = m; l <= lmax; l++)
            tr[clef_alm_index(lmax, l, m)] = alm[0][clef_alm_index(lmax, l, m)];
    for (int m = mmax + 1; m <= lmax; m++)
        for (int l = m; l <= lmax; l++)
            alm[0][clef_alm_index(lmax, l, m)] = 0;
    assert_int_equal(clef_sht_synthesis(p1, 1, (const double complex *const *)&alm[0], &one), CLEF_OK);
    assert_int_equal(clef_sht_synthesis(pm, 1, (const double complex *const *)&tr, &map[0]), CLEF_OK);
    for (int64_t i = 0; i < npix; i++)
        check_abs(map[0][i], one[i], 1e-13 * (1 + fabs(one[i])), "mmax plan vs truncated a_lm");
    /* Error paths of execute. */
    assert_int_equal(clef_sht_synthesis(p1, 2, (const double complex *const *)alm, map), CLEF_EINVAL);
    assert_int_equal(clef_sht_synthesis(p1, 0, (const double complex *const *)alm, map), CLEF_EINVAL);
    assert_int_equal(clef_sht_analysis(p1, 1, (const double *const *)map, out, -1), CLEF_EINVAL);
    assert_int_equal(clef_sht_analysis(p1, 1, NULL, out, 0), CLEF_EINVAL);
    clef_sht_destroy(p1);
    clef_sht_destroy(p5);
    clef_sht_destroy(pm);
    for (int j = 0; j < nm; j++) {
        free(alm[j]);
        free(out[j]);
        free(map[j]);
    }
    free(ref);
    free(one);
    free(tr);
}

static void test_create_errors(void **state)
{
    (void)state;
    clef_sht *p = (clef_sht *)&p;
    assert_int_equal(clef_sht_create(&p, 3, 4, NULL), CLEF_EINVAL);
    assert_null(p);
    assert_non_null(strstr(clef_last_error(), "nside = 3"));
    assert_int_equal(clef_sht_create(&p, 0, 4, NULL), CLEF_EINVAL);
    assert_int_equal(clef_sht_create(&p, 16384, 4, NULL), CLEF_EINVAL);
    assert_int_equal(clef_sht_create(&p, 4, 0, NULL), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "lmax = 0"));
    clef_sht_opts o = {.mmax = 9};
    assert_int_equal(clef_sht_create(&p, 4, 8, &o), CLEF_EINVAL);
    assert_int_equal(clef_sht_create(NULL, 4, 8, NULL), CLEF_EINVAL);
    clef_sht_destroy(NULL);
}

/* The optional FFTW wisdom file is written (atomically) and read back. */
static void test_wisdom(void **state)
{
    (void)state;
    const char *w = test_path("fftw.wisdom");
    clef_sht_opts o = {.wisdom_file = w};
    clef_sht *p;
    assert_int_equal(clef_sht_create(&p, 64, 40, &o), CLEF_OK);
    clef_sht_destroy(p);
    assert_true(file_exists(w));
    assert_int_equal(run_cmd("grep -q fftw '%s'", w), 0);
    assert_int_equal(clef_sht_create(&p, 64, 40, &o), CLEF_OK);
    clef_sht_destroy(p);
}

/* ------------------------------------------------------------- a_lm file */

static void test_alm_file(void **state)
{
    (void)state;
    const int lmax = 50, mmax = 30;
    double complex *a = random_alm(lmax, mmax, 3);
    const char *path = test_path("alm.fits");
    assert_int_equal(clef_alm_write(path, lmax, mmax, a), CLEF_OK);
    int l2, m2;
    double complex *b;
    assert_int_equal(clef_alm_read(path, &l2, &m2, &b), CLEF_OK);
    assert_int_equal(l2, lmax);
    assert_int_equal(m2, mmax);
    for (size_t i = 0; i < clef_alm_size(lmax, mmax); i++)
        assert_true(a[i] == b[i]);
    free(b);
    /* astropy reads it: header, columns and one value (a_{7,3}). */
    const size_t i73 = clef_alm_index(lmax, 7, 3);
    const int rc = run_cmd(
        "%s -c \"import sys; from astropy.io import fits; h = fits.open('%s'); t = h['CLEF_ALM']; "
        "d = t.data; hd = t.header; "
        "ok = hd['LMAX'] == %d and hd['MMAX'] == %d and 'CLEFVERS' in hd and len(d) == %zu; "
        "r = d[(d['L'] == 7) & (d['M'] == 3)]; "
        "ok = ok and len(r) == 1 and r['RE'][0] == %.17g and r['IM'][0] == %.17g; "
        "sys.exit(0 if ok else 1)\"",
        ref_python(), path, lmax, mmax, clef_alm_size(lmax, mmax), creal(a[i73]), cimag(a[i73]));
    assert_int_equal(rc, 0);
    if (run_cmd("command -v fitsverify >/dev/null 2>&1") == 0)
        assert_int_equal(run_cmd("fitsverify -q -e '%s' >/dev/null 2>&1", path), 0);

    /* Error paths: missing file, text file, missing column, bad keyword,
     * unwritable folder (no partial output). */
    assert_int_equal(clef_alm_read(test_path("nonexistent.fits"), &l2, &m2, &b), CLEF_EIO);
    assert_null(b);
    const char *txt = test_path("text.fits");
    FILE *f = fopen(txt, "w");
    fputs("not a FITS file\n", f);
    fclose(f);
    assert_int_equal(clef_alm_read(txt, &l2, &m2, &b), CLEF_EIO);
    assert_non_null(strstr(clef_last_error(), "text.fits"));

    const char *nocol = test_path("nocol.fits");
    assert_int_equal(run_cmd("%s -c \"from astropy.io import fits; import numpy as np; "
                             "c = [fits.Column(name=n, format=f, array=np.zeros(3)) for n, f in "
                             "[('L', 'J'), ('M', 'J'), ('RE', 'D')]]; "
                             "t = fits.BinTableHDU.from_columns(c); t.header['LMAX'] = 1; "
                             "t.header['MMAX'] = 1; t.writeto('%s')\"",
                             ref_python(), nocol),
                     0);
    assert_int_equal(clef_alm_read(nocol, &l2, &m2, &b), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "column IM"));
    const char *nokey = test_path("nokey.fits");
    assert_int_equal(run_cmd("%s -c \"from astropy.io import fits; import numpy as np; "
                             "c = [fits.Column(name=n, format=f, array=np.zeros(3)) for n, f in "
                             "[('L', 'J'), ('M', 'J'), ('RE', 'D'), ('IM', 'D')]]; "
                             "t = fits.BinTableHDU.from_columns(c); t.header['MMAX'] = 1; "
                             "t.writeto('%s')\"",
                             ref_python(), nokey),
                     0);
    assert_int_equal(clef_alm_read(nokey, &l2, &m2, &b), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "LMAX"));
    const char *dup = test_path("dup.fits");
    assert_int_equal(run_cmd("%s -c \"from astropy.io import fits; import numpy as np; "
                             "c = [fits.Column(name='L', format='J', array=np.array([0, 1, 1])), "
                             "fits.Column(name='M', format='J', array=np.array([0, 0, 0])), "
                             "fits.Column(name='RE', format='D', array=np.zeros(3)), "
                             "fits.Column(name='IM', format='D', array=np.zeros(3))]; "
                             "t = fits.BinTableHDU.from_columns(c); t.header['LMAX'] = 1; "
                             "t.header['MMAX'] = 1; t.writeto('%s')\"",
                             ref_python(), dup),
                     0);
    assert_int_equal(clef_alm_read(dup, &l2, &m2, &b), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "repeats"));
    assert_int_not_equal(clef_alm_write(test_path("no/such/dir/alm.fits"), lmax, mmax, a), CLEF_OK);
    assert_false(file_exists(test_path("no/such/dir/alm.fits")));
    assert_int_equal(clef_alm_write(path, 3, 4, a), CLEF_EINVAL);
    free(a);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_lambda_gsl),
        cmocka_unit_test(test_lambda_closed_forms),
        cmocka_unit_test(test_lambda_high),
        cmocka_unit_test(test_lambda_errors),
        cmocka_unit_test(test_geometry),
        cmocka_unit_test(test_synthesis_direct),
        cmocka_unit_test(test_analysis_accuracy),
        cmocka_unit_test(test_parseval),
        cmocka_unit_test(test_alm_cl),
        cmocka_unit_test(test_threads),
        cmocka_unit_test(test_kernels),
        cmocka_unit_test(test_kernel_choice),
        cmocka_unit_test(test_nmaps_mmax),
        cmocka_unit_test(test_create_errors),
        cmocka_unit_test(test_wisdom),
        cmocka_unit_test(test_alm_file),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
