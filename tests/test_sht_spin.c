/* Tests of the spin-2 transform (include/clef/sht.h, src/sht_spin.c)
 * against outside references: spin-weighted harmonics from GSL's
 * normalised associated Legendre functions and their theta derivatives
 * through the eth operator (Newman & Penrose 1966; Goldberg et al. 1967),
 * Goldberg's explicit sum at l = 2, 3, pixel centres of the HEALPix C
 * library, and round trips with the exact a_lm. */
#include "check.h"

#include <complex.h>
#include <omp.h>

#include <chealpix.h>
#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>
#include <gsl/gsl_sf_gamma.h>
#include <gsl/gsl_sf_legendre.h>

#include "clef/sht.h"

#define PI 3.14159265358979323846

/* Random a_lm, C_l = 1 for l >= 2 (l = 0, 1 zero: spin-2 fields have none). */
static double complex *random_alm2(int lmax, unsigned long seed)
{
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, seed);
    double complex *a = calloc(clef_alm_size(lmax, lmax), sizeof *a);
    assert_non_null(a);
    for (int m = 0; m <= lmax; m++)
        for (int l = m; l <= lmax; l++) {
            const double s = m ? sqrt(0.5) : 1.0;
            const double re = gsl_ran_gaussian(r, s), im = m ? gsl_ran_gaussian(r, s) : 0.0;
            if (l >= 2)
                a[clef_alm_index(lmax, l, m)] = re + I * im;
        }
    gsl_rng_free(r);
    return a;
}

/* _{+2}lambda_lm, _{-2}lambda_lm at theta from GSL through eth twice:
 * with Y = lambda(theta) e^{i m phi}, eth f = -(d_theta - s cot + i/sin d_phi) f
 * applied to spin 0 then spin 1 gives (derived in the comment of
 * src/sht_spin.c, here evaluated without the Legendre equation)
 *   eth^2 Y    = lambda'' - (z + 2m)/s lambda' + m (2z + m)/s^2 lambda,
 *   ethbar^2 Y = lambda'' + (2m - z)/s lambda' + m (m - 2z)/s^2 lambda,
 * times sqrt((l-2)!/(l+2)!).  GSL: gsl_sf_legendre_deriv2_alt_array_e,
 * spherical-harmonic normalisation, Condon-Shortley phase, derivatives in
 * theta. */
static void gsl_spin2(int lmax, double theta, double *p2, double *m2)
{
    const size_t n = gsl_sf_legendre_array_n((size_t)lmax);
    double *v = malloc(n * sizeof *v), *d1 = malloc(n * sizeof *d1), *d2 = malloc(n * sizeof *d2);
    const double z = cos(theta), s = sin(theta);
    assert_int_equal(gsl_sf_legendre_deriv2_alt_array_e(GSL_SF_LEGENDRE_SPHARM, (size_t)lmax, z,
                                                        -1.0, v, d1, d2),
                     0);
    for (int m = 0; m <= lmax; m++)
        for (int l = m; l <= lmax; l++) {
            const size_t i = gsl_sf_legendre_array_index((size_t)l, (size_t)m);
            const size_t o = clef_alm_index(lmax, l, m);
            if (l < 2) {
                p2[o] = m2[o] = 0.0;
                continue;
            }
            const double nl = sqrt(gsl_sf_fact((unsigned)l - 2) / gsl_sf_fact((unsigned)l + 2));
            p2[o] = nl * (d2[i] - (z + 2.0 * m) / s * d1[i] + m * (2.0 * z + m) / (s * s) * v[i]);
            m2[o] = nl * (d2[i] + (2.0 * m - z) / s * d1[i] + m * (m - 2.0 * z) / (s * s) * v[i]);
        }
    free(v);
    free(d1);
    free(d2);
}

/* Q, U by direct sum at the chealpix pixel centres:
 * Q = -sum_{m>=0} (2 - delta_m0) Re[(a_E W + i a_B X) e^{i m phi}],
 * U = -sum (2 - delta_m0) Re[(a_B W - i a_E X) e^{i m phi}],
 * W = (p2 + m2)/2, X = (p2 - m2)/2 (ZS97 with a_{+-2} = -(a_E +- i a_B)). */
static void direct_spin2(int64_t ns, int lmax, const double complex *ae, const double complex *ab,
                         double *q, double *u)
{
    const int64_t npix = 12 * ns * ns;
    const size_t nalm = clef_alm_size(lmax, lmax);
    double *p2 = malloc(nalm * sizeof *p2), *m2 = malloc(nalm * sizeof *m2);
    double last = -1.0;
    for (int64_t i = 0; i < npix; i++) {
        double th, ph;
        pix2ang_ring64(ns, i, &th, &ph);
        if (th != last) {
            gsl_spin2(lmax, th, p2, m2);
            last = th;
        }
        double sq = 0.0, su = 0.0;
        for (int m = 0; m <= lmax; m++) {
            const double complex e = cexp(I * m * ph);
            const double f = m ? 2.0 : 1.0;
            for (int l = m; l <= lmax; l++) {
                const size_t o = clef_alm_index(lmax, l, m);
                const double w = 0.5 * (p2[o] + m2[o]), x = 0.5 * (p2[o] - m2[o]);
                sq -= f * creal((ae[o] * w + I * ab[o] * x) * e);
                su -= f * creal((ab[o] * w - I * ae[o] * x) * e);
            }
        }
        q[i] = sq;
        u[i] = su;
    }
    free(p2);
    free(m2);
}

static double maxdiff_rel(const double *a, const double *b, int64_t n)
{
    double d = 0.0, s = 0.0;
    for (int64_t i = 0; i < n; i++) {
        d = fmax(d, fabs(a[i] - b[i]));
        s += b[i] * b[i];
    }
    return d / sqrt(s / (double)n);
}

/* Synthesis against the direct sum of GSL-through-eth harmonics. */
static void test_synthesis_direct(void **state)
{
    (void)state;
    const int64_t nsides[] = {4, 16};
    for (int k = 0; k < 2; k++) {
        const int64_t ns = nsides[k];
        const int lmax = 3 * (int)ns - 1;
        const int64_t npix = 12 * ns * ns;
        double complex *ae = random_alm2(lmax, 5 + k), *ab = random_alm2(lmax, 50 + k);
        double *q = malloc(npix * sizeof *q), *u = malloc(npix * sizeof *u);
        double *rq = malloc(npix * sizeof *rq), *ru = malloc(npix * sizeof *ru);
        clef_sht_spin *p;
        assert_int_equal(clef_sht_spin_create(&p, ns, lmax, NULL), CLEF_OK);
        assert_int_equal(clef_sht_spin_synthesis(p, 1, (const double complex *const *)&ae,
                                                 (const double complex *const *)&ab, &q, &u),
                         CLEF_OK);
        direct_spin2(ns, lmax, ae, ab, rq, ru);
        const double eq = maxdiff_rel(q, rq, npix), eu = maxdiff_rel(u, ru, npix);
        printf("spin-2 synthesis nside %lld lmax %d: max |diff|/rms Q %.3g U %.3g\n",
               (long long)ns, lmax, eq, eu);
        check_abs(eq, 0.0, 1e-12, "direct sum of GSL lambda_lm through eth^2 (Q)");
        check_abs(eu, 0.0, 1e-12, "direct sum of GSL lambda_lm through eth^2 (U)");
        clef_sht_spin_destroy(p);
        free(ae);
        free(ab);
        free(q);
        free(u);
        free(rq);
        free(ru);
    }
}

/* Spin 1 (clef_sht_spin_create_s, used by the B-mode purification):
 * synthesis against a direct sum over every m, -l..l, of
 *   _1Y_lm = eth Y_lm / sqrt(l(l+1)),  eth Y = -(d_theta + i/sin d_phi) Y
 * (Newman & Penrose 1966) from GSL's lambda_lm and d lambda/d theta, with
 * a_1 = -(a_E + i a_B) and a_E,l-m = (-1)^m conj(a_E,lm) (likewise a_B):
 * Q + iU must equal that sum.  The same sum of _{-1}Y = -ethbar Y / sqrt(l(l+1))
 * with a_{-1} = +(a_E - i a_B) must give Q - iU, which checks the odd-spin
 * convention of sht.h independently of the transform's algebra. */
static void gsl_spin1(int lmax, double theta, double *p1, double *m1)
{
    const size_t n = gsl_sf_legendre_array_n((size_t)lmax);
    double *v = malloc(n * sizeof *v), *d1 = malloc(n * sizeof *d1);
    const double z = cos(theta), s = sin(theta);
    assert_int_equal(gsl_sf_legendre_deriv_alt_array_e(GSL_SF_LEGENDRE_SPHARM, (size_t)lmax, z,
                                                       -1.0, v, d1),
                     0);
    /* p1, m1 [l][m + lmax]: _{+1}lambda, _{-1}lambda for every m. */
    for (int l = 0; l <= lmax; l++)
        for (int m = -l; m <= l; m++) {
            const size_t i = gsl_sf_legendre_array_index((size_t)l, (size_t)abs(m));
            const double sg = (m < 0 && (m & 1)) ? -1.0 : 1.0; /* lambda_{l,-m} = (-1)^m lambda_lm */
            const double lam = sg * v[i], dl = sg * d1[i];
            const size_t o = (size_t)l * (2 * lmax + 1) + (size_t)(m + lmax);
            if (l < 1) {
                p1[o] = m1[o] = 0.0;
                continue;
            }
            const double nl = 1.0 / sqrt(l * (l + 1.0));
            p1[o] = -nl * (dl - m * lam / s);  /* eth: -(d_theta - m/s) */
            m1[o] = nl * (dl + m * lam / s);   /* -ethbar: (d_theta + m/s) */
        }
    free(v);
    free(d1);
}

static void test_spin1_direct(void **state)
{
    (void)state;
    const int64_t ns = 8;
    const int lmax = 3 * (int)ns - 1;
    const int64_t npix = 12 * ns * ns;
    double complex *ae = random_alm2(lmax, 71), *ab = random_alm2(lmax, 72);
    for (int m = 0; m <= 1; m++) { /* spin 1 has l = 1 modes */
        ae[clef_alm_index(lmax, 1, m)] = 0.3 - 0.2 * I * m;
        ab[clef_alm_index(lmax, 1, m)] = -0.4 + 0.5 * I * m;
    }
    double *q = malloc(npix * sizeof *q), *u = malloc(npix * sizeof *u);
    clef_sht_spin *p;
    assert_int_equal(clef_sht_spin_create_s(&p, ns, lmax, 1, NULL), CLEF_OK);
    assert_int_equal(clef_sht_spin_synthesis(p, 1, (const double complex *const *)&ae,
                                             (const double complex *const *)&ab, &q, &u),
                     CLEF_OK);
    const size_t nl = (size_t)(lmax + 1) * (2 * lmax + 1);
    double *p1 = malloc(nl * sizeof *p1), *m1 = malloc(nl * sizeof *m1);
    double last = -1.0, dp = 0.0, dm = 0.0, rms = 0.0;
    for (int64_t i = 0; i < npix; i++) {
        double th, ph;
        pix2ang_ring64(ns, i, &th, &ph);
        if (th != last) {
            gsl_spin1(lmax, th, p1, m1);
            last = th;
        }
        double complex fp = 0.0, fm = 0.0;
        for (int l = 1; l <= lmax; l++)
            for (int m = -l; m <= l; m++) {
                const size_t o = clef_alm_index(lmax, l, abs(m));
                double complex e = ae[o], b = ab[o];
                if (m < 0) {
                    const double sg = (m & 1) ? -1.0 : 1.0;
                    e = sg * conj(e);
                    b = sg * conj(b);
                }
                const double complex ph_m = cexp(I * m * ph);
                const size_t k = (size_t)l * (2 * lmax + 1) + (size_t)(m + lmax);
                fp += -(e + I * b) * p1[k] * ph_m;
                fm += (e - I * b) * m1[k] * ph_m;
            }
        const double complex f = q[i] + I * u[i];
        dp = fmax(dp, cabs(f - fp));
        dm = fmax(dm, cabs(conj(f) - fm));
        rms += q[i] * q[i] + u[i] * u[i];
    }
    rms = sqrt(rms / (double)npix);
    printf("spin-1 synthesis nside %lld lmax %d: max |Q+iU - sum a_1 _1Y| / rms %.3g, "
           "|Q-iU - sum a_-1 _-1Y| / rms %.3g\n", (long long)ns, lmax, dp / rms, dm / rms);
    check_abs(dp / rms, 0.0, 1e-12, "direct sum of GSL lambda_lm through eth (spin +1)");
    check_abs(dm / rms, 0.0, 1e-12, "direct sum through ethbar (spin -1, a_-1 = +(a_E - i a_B))");
    /* Analysis inverts the synthesis of a band-limited field (iterated). */
    double complex *re = calloc(clef_alm_size(lmax, lmax), sizeof *re);
    double complex *rb = calloc(clef_alm_size(lmax, lmax), sizeof *rb);
    clef_sht_spin_destroy(p);
    const int lb = lmax / 2;
    assert_int_equal(clef_sht_spin_create_s(&p, ns, lb, 1, NULL), CLEF_OK);
    double complex *be = random_alm2(lb, 73), *bb = random_alm2(lb, 74);
    be[clef_alm_index(lb, 1, 1)] = 0.7 + 0.1 * I;
    assert_int_equal(clef_sht_spin_synthesis(p, 1, (const double complex *const *)&be,
                                             (const double complex *const *)&bb, &q, &u),
                     CLEF_OK);
    assert_int_equal(clef_sht_spin_analysis(p, 1, (const double *const *)&q,
                                            (const double *const *)&u, &re, &rb, 8),
                     CLEF_OK);
    double worst = 0.0;
    for (size_t i = 0; i < clef_alm_size(lb, lb); i++)
        worst = fmax(worst, fmax(cabs(re[i] - be[i]), cabs(rb[i] - bb[i])));
    printf("spin-1 round trip nside %lld lmax %d, 8 iterations: max |a - a0| %.3g\n",
           (long long)ns, lb, worst);
    check_abs(worst, 0.0, 1e-10, "spin-1 analysis of its own synthesis (exact a_lm)");
    clef_sht_spin_destroy(p);
    free(ae); free(ab); free(be); free(bb); free(re); free(rb);
    free(q); free(u); free(p1); free(m1);
}

/* Goldberg et al. 1967 explicit form (as quoted e.g. in the Wikipedia
 * article on spin-weighted harmonics, from memory), at phi = 0:
 * _sY_lm = (-1)^m sqrt((l+m)!(l-m)!(2l+1) / (4 pi (l+s)!(l-s)!)) sin^{2l}(theta/2)
 *          sum_r C(l-s, r) C(l+s, r+s-m) (-1)^{l-r-s} cot^{2r+s-m}(theta/2). */
static double goldberg(int s, int l, int m, double theta)
{
    double sum = 0.0;
    for (int r = 0; r <= l - s; r++) {
        const int k = r + s - m;
        if (k < 0 || k > l + s)
            continue;
        sum += gsl_sf_choose((unsigned)(l - s), (unsigned)r) *
               gsl_sf_choose((unsigned)(l + s), (unsigned)k) * (((l - r - s) & 1) ? -1.0 : 1.0) *
               pow(1.0 / tan(0.5 * theta), 2 * r + s - m);
    }
    const double pre = sqrt(gsl_sf_fact((unsigned)(l + m)) * gsl_sf_fact((unsigned)(l - m)) *
                            (2 * l + 1) /
                            (4 * PI * gsl_sf_fact((unsigned)(l + s)) * gsl_sf_fact((unsigned)(l - s))));
    return ((m & 1) ? -1.0 : 1.0) * pre * pow(sin(0.5 * theta), 2 * l) * sum;
}

/* Single modes at l = 2, 3 against the closed form: a_E,lm = 1 (m > 0)
 * gives Q = -2 W cos(m phi), U = -2 X sin(m phi); a_B,lm = 1 gives
 * Q = 2 X sin(m phi), U = -2 W cos(m phi); m = 0 without the factor 2. */
static void test_closed_forms(void **state)
{
    (void)state;
    const int64_t ns = 8;
    const int lmax = 6;
    const int64_t npix = 12 * ns * ns;
    const size_t nalm = clef_alm_size(lmax, lmax);
    clef_sht_spin *p;
    assert_int_equal(clef_sht_spin_create(&p, ns, lmax, NULL), CLEF_OK);
    double complex *ae = calloc(nalm, sizeof *ae), *ab = calloc(nalm, sizeof *ab);
    double *q = malloc(npix * sizeof *q), *u = malloc(npix * sizeof *u);
    double worst = 0.0;
    for (int l = 2; l <= 3; l++)
        for (int m = 0; m <= l; m++)
            for (int eb = 0; eb < 2; eb++) {
                memset(ae, 0, nalm * sizeof *ae);
                memset(ab, 0, nalm * sizeof *ab);
                (eb ? ab : ae)[clef_alm_index(lmax, l, m)] = 1.0;
                assert_int_equal(clef_sht_spin_synthesis(p, 1, (const double complex *const *)&ae,
                                                         (const double complex *const *)&ab, &q,
                                                         &u),
                                 CLEF_OK);
                const double f = m ? 2.0 : 1.0;
                for (int64_t i = 0; i < npix; i += 7) {
                    double th, ph;
                    pix2ang_ring64(ns, i, &th, &ph);
                    const double w = 0.5 * (goldberg(2, l, m, th) + goldberg(-2, l, m, th));
                    const double x = 0.5 * (goldberg(2, l, m, th) - goldberg(-2, l, m, th));
                    const double eq = eb ? f * x * sin(m * ph) : -f * w * cos(m * ph);
                    const double eu = eb ? -f * w * cos(m * ph) : -f * x * sin(m * ph);
                    worst = fmax(worst, fmax(fabs(q[i] - eq), fabs(u[i] - eu)));
                }
            }
    printf("spin-2 single modes l = 2, 3 vs Goldberg et al. 1967: max |diff| %.3g\n", worst);
    check_abs(worst, 0.0, 1e-13, "Goldberg et al. 1967 explicit _{+-2}Y_lm, l = 2, 3");
    /* l = m = 2 by hand: _2Y_22 = sqrt(5/4pi) sin^4(theta/2) (Goldberg sum, one term). */
    check_rel(goldberg(2, 2, 2, 1.0), sqrt(5 / (4 * PI)) * pow(sin(0.5), 4), 1e-14,
              "_2Y_22 = sqrt(5/4pi) sin^4(theta/2), by hand");
    clef_sht_spin_destroy(p);
    free(ae);
    free(ab);
    free(q);
    free(u);
}

/* C_l of a_lm, l = 0..lmax, as clef_alm_cl. */
static void cl_of(int lmax, const double complex *a, const double complex *b, double *cl)
{
    assert_int_equal(clef_alm_cl(lmax, lmax, a, b, cl), CLEF_OK);
}

/* Full sky, band limited, iterated analysis: a_lm and the E/B spectra
 * (EE, BB, EB) against the exact ones; a pure-E sky leaks no B. */
static void test_roundtrip(void **state)
{
    (void)state;
    const int64_t ns = 32;
    const int lmax = 32;
    const int64_t npix = 12 * ns * ns;
    const size_t nalm = clef_alm_size(lmax, lmax);
    clef_sht_spin *p;
    assert_int_equal(clef_sht_spin_create(&p, ns, lmax, NULL), CLEF_OK);
    double complex *ae = random_alm2(lmax, 7), *ab = random_alm2(lmax, 8);
    double complex *oe = malloc(nalm * sizeof *oe), *ob = malloc(nalm * sizeof *ob);
    double *q = malloc(npix * sizeof *q), *u = malloc(npix * sizeof *u);
    assert_int_equal(clef_sht_spin_synthesis(p, 1, (const double complex *const *)&ae,
                                             (const double complex *const *)&ab, &q, &u),
                     CLEF_OK);
    double err[4];
    for (int it = 0; it <= 3; it++) {
        assert_int_equal(
            clef_sht_spin_analysis(p, 1, (const double *const *)&q, (const double *const *)&u,
                                   &oe, &ob, it),
            CLEF_OK);
        double num = 0, den = 0;
        for (size_t i = 0; i < nalm; i++) {
            num += pow(cabs(oe[i] - ae[i]), 2) + pow(cabs(ob[i] - ab[i]), 2);
            den += pow(cabs(ae[i]), 2) + pow(cabs(ab[i]), 2);
        }
        err[it] = sqrt(num / den);
    }
    printf("spin-2 analysis nside %lld lmax %d: rel rms a_lm error by iterations %.3g %.3g %.3g "
           "%.3g\n",
           (long long)ns, lmax, err[0], err[1], err[2], err[3]);
    check_abs(err[3], 0.0, 1e-7, "spin-0 target at lmax = nside, 3 iterations (issue 3)");
    assert_true(err[1] < err[0] && err[3] < err[1]);
    double ee[33], bb[33], eb[33], ree[33], rbb[33], reb[33];
    cl_of(lmax, oe, NULL, ee);
    cl_of(lmax, ob, NULL, bb);
    cl_of(lmax, oe, ob, eb);
    cl_of(lmax, ae, NULL, ree);
    cl_of(lmax, ab, NULL, rbb);
    cl_of(lmax, ae, ab, reb);
    for (int l = 2; l <= lmax; l++) {
        check_rel(ee[l], ree[l], 1e-6, "EE of the exact a_lm (issue 16)");
        check_rel(bb[l], rbb[l], 1e-6, "BB of the exact a_lm (issue 16)");
        check_abs(eb[l], reb[l], 1e-6 * sqrt(ree[l] * rbb[l]), "EB of the exact a_lm (issue 16)");
    }
    /* Pure E: BB and EB below 1e-10 of EE (issue 16). */
    memset(ab, 0, nalm * sizeof *ab);
    assert_int_equal(clef_sht_spin_synthesis(p, 1, (const double complex *const *)&ae,
                                             (const double complex *const *)&ab, &q, &u),
                     CLEF_OK);
    assert_int_equal(clef_sht_spin_analysis(p, 1, (const double *const *)&q,
                                            (const double *const *)&u, &oe, &ob, 3),
                     CLEF_OK);
    cl_of(lmax, oe, NULL, ee);
    cl_of(lmax, ob, NULL, bb);
    cl_of(lmax, oe, ob, eb);
    double wb = 0, we = 0;
    for (int l = 2; l <= lmax; l++) {
        wb = fmax(wb, bb[l] / ee[l]);
        we = fmax(we, fabs(eb[l]) / ee[l]);
    }
    printf("pure-E sky: max BB/EE %.3g, max |EB|/EE %.3g\n", wb, we);
    check_abs(wb, 0.0, 1e-10, "pure E: BB < 1e-10 EE (issue 16)");
    check_abs(we, 0.0, 1e-10, "pure E: |EB| < 1e-10 EE (issue 16)");
    clef_sht_spin_destroy(p);
    free(ae);
    free(ab);
    free(oe);
    free(ob);
    free(q);
    free(u);
}

/* 1 vs 2 threads bit for bit; two pairs per call equal one pair each. */
static void test_threads_pairs(void **state)
{
    (void)state;
    const int64_t ns = 32;
    const int lmax = 80;
    const int64_t npix = 12 * ns * ns;
    const size_t nalm = clef_alm_size(lmax, lmax);
    const int saved = omp_get_max_threads();
    omp_set_num_threads(2);
    clef_sht_spin *p;
    clef_sht_opts o = {.nmaps = 2};
    assert_int_equal(clef_sht_spin_create(&p, ns, lmax, &o), CLEF_OK);
    double complex *ae[2] = {random_alm2(lmax, 1), random_alm2(lmax, 2)};
    double complex *ab[2] = {random_alm2(lmax, 3), random_alm2(lmax, 4)};
    double *q[2], *u[2];
    double complex *oe[3], *ob[3];
    for (int j = 0; j < 2; j++) {
        q[j] = malloc(npix * sizeof(double));
        u[j] = malloc(npix * sizeof(double));
    }
    for (int j = 0; j < 3; j++) {
        oe[j] = malloc(nalm * sizeof(double complex));
        ob[j] = malloc(nalm * sizeof(double complex));
    }
    assert_int_equal(clef_sht_spin_synthesis(p, 2, (const double complex *const *)ae,
                                             (const double complex *const *)ab, q, u),
                     CLEF_OK);
    assert_int_equal(clef_sht_spin_analysis(p, 2, (const double *const *)q,
                                            (const double *const *)u, oe, ob, 2),
                     CLEF_OK);
    omp_set_num_threads(1);
    assert_int_equal(clef_sht_spin_analysis(p, 1, (const double *const *)&q[1],
                                            (const double *const *)&u[1], &oe[2], &ob[2], 2),
                     CLEF_OK);
    double d = 0, s = 0;
    for (size_t i = 0; i < nalm; i++) {
        d = fmax(d, cabs(oe[1][i] - oe[2][i]) + cabs(ob[1][i] - ob[2][i]));
        s = fmax(s, cabs(oe[1][i]));
    }
    check_abs(d / s, 0.0, 1e-14, "1 vs 2 threads and 2 pairs vs 1 (as spin 0, docs/transforms.md)");
    omp_set_num_threads(saved);
    /* Errors name the argument. */
    assert_int_equal(clef_sht_spin_analysis(p, 3, (const double *const *)q,
                                            (const double *const *)u, oe, ob, 2),
                     CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "pairs"));
    assert_int_equal(clef_sht_spin_analysis(p, 1, (const double *const *)q,
                                            (const double *const *)u, oe, ob, -1),
                     CLEF_EINVAL);
    clef_sht_spin *bad = NULL;
    assert_int_equal(clef_sht_spin_create(&bad, 16, 1, NULL), CLEF_EINVAL);
    assert_null(bad);
    assert_int_equal(clef_sht_spin_create(&bad, 12, 20, NULL), CLEF_EINVAL);
    clef_sht_spin_destroy(p);
    for (int j = 0; j < 2; j++) {
        free(ae[j]);
        free(ab[j]);
        free(q[j]);
        free(u[j]);
    }
    for (int j = 0; j < 3; j++) {
        free(oe[j]);
        free(ob[j]);
    }
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_closed_forms),
        cmocka_unit_test(test_synthesis_direct),
        cmocka_unit_test(test_spin1_direct),
        cmocka_unit_test(test_roundtrip),
        cmocka_unit_test(test_threads_pairs),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
