/* Wigner 3j (l1 l2 l3; 0 0 0): exact values, GSL, Edmonds' closed form,
 * orthogonality, and the square-root-free squared form. */
#include "check.h"

#include <gsl/gsl_errno.h>
#include <gsl/gsl_rng.h>
#include <gsl/gsl_sf_coupling.h>

#include "clef/wigner.h"

/* Row value for (l1 l2 l3) through the public row routine. */
static double row_value(int l1, int l2, int l3)
{
    static double buf[2 * 20000 + 2];
    int lo, hi;
    assert_int_equal(clef_wigner_3j000_row(l1, l2, buf, &lo, &hi), CLEF_OK);
    if (l3 < lo || l3 > hi)
        return 0.0;
    return buf[l3 - lo];
}

/* Edmonds 1957 eq. 3.7.17 (DLMF 34.3.5) through long-double log-gamma. */
static double edmonds_lgamma(int l1, int l2, int l3)
{
    const int J = l1 + l2 + l3;
    if (J % 2 || l3 < abs(l1 - l2) || l3 > l1 + l2)
        return 0.0;
    const int g = J / 2;
    const long double lf2 = lgammal(J - 2 * l1 + 1.0L) + lgammal(J - 2 * l2 + 1.0L) +
                            lgammal(J - 2 * l3 + 1.0L) - lgammal(J + 2.0L) +
                            2 * (lgammal(g + 1.0L) - lgammal(g - l1 + 1.0L) -
                                 lgammal(g - l2 + 1.0L) - lgammal(g - l3 + 1.0L));
    const double f = (double)expl(0.5L * lf2);
    return g % 2 ? -f : f;
}

static void test_exact_values(void **state)
{
    (void)state;
    const double tol = 8 * DBL_EPSILON;
    /* Values from METHODS.md section 3, computed from DLMF 34.3.5 (Edmonds 1957) */
    struct {
        int l1, l2, l3;
        double v;
    } t[] = {
        {0, 0, 0, 1.0},
        {1, 1, 0, -sqrt(1.0 / 3)},
        {2, 2, 0, sqrt(1.0 / 5)},
        {3, 3, 0, -sqrt(1.0 / 7)},
        {2, 1, 1, sqrt(2.0 / 15)},
        {1, 1, 2, sqrt(2.0 / 15)},
        {3, 2, 1, -sqrt(3.0 / 35)},
        {2, 2, 2, -sqrt(2.0 / 35)},
        {4, 2, 2, sqrt(2.0 / 35)},
        {3, 3, 2, sqrt(4.0 / 105)},
        {3, 2, 3, sqrt(4.0 / 105)},
        {4, 3, 1, sqrt(4.0 / 63)},
        {4, 4, 4, sqrt(18.0 / 1001)},
        {5, 3, 2, -sqrt(10.0 / 231)},
        {6, 4, 2, sqrt(5.0 / 143)},
        {10, 10, 0, sqrt(1.0 / 21)},
        {10, 10, 10, -sqrt(111132.0 / 33393355)},
    };
    for (size_t i = 0; i < sizeof t / sizeof t[0]; i++) {
        check_rel(clef_wigner_3j000(t[i].l1, t[i].l2, t[i].l3), t[i].v, tol, "DLMF 34.3.5");
        check_rel(row_value(t[i].l1, t[i].l2, t[i].l3), t[i].v, tol, "DLMF 34.3.5 (row)");
    }
    /* Odd J vanishes (DLMF 34.3.5 selection rule): (2 1 0) = (2 2 1) = 0 */
    assert_true(clef_wigner_3j000(2, 1, 0) == 0.0);
    assert_true(clef_wigner_3j000(2, 2, 1) == 0.0);
    assert_true(row_value(2, 2, 1) == 0.0);
    /* Outside the triangle, negative arguments */
    assert_true(clef_wigner_3j000(5, 1, 2) == 0.0);
    assert_true(clef_wigner_3j000(-1, 1, 0) == 0.0);
}

/* GSL evaluates the Racah sum, whose alternating terms cancel: measured on
 * this machine it holds 1e-12 only up to l ~ 15 (1e-11 at l = 20, O(1)
 * errors at l = 80), while its returned error estimate stays honest.  So:
 * 1e-12 relative up to l = 15, and within GSL's own error bound up to
 * l = 200; the 1e-12 accuracy at large l is checked against Edmonds'
 * closed form below. */
static void test_vs_gsl(void **state)
{
    (void)state;
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 20021);
    gsl_set_error_handler_off();
    int nonzero = 0;
    for (int i = 0; i < 6000; i++) {
        const int lmax = i < 3000 ? 15 : 200;
        const int l1 = (int)gsl_rng_uniform_int(r, (unsigned long)lmax + 1);
        const int l2 = (int)gsl_rng_uniform_int(r, (unsigned long)lmax + 1);
        const int lo = abs(l1 - l2);
        const int l3 = lo + (int)gsl_rng_uniform_int(r, (unsigned long)(l1 + l2 - lo + 1));
        /* GSL gsl_sf_coupling_3j (arguments are 2j) */
        gsl_sf_result ref;
        assert_int_equal(gsl_sf_coupling_3j_e(2 * l1, 2 * l2, 2 * l3, 0, 0, 0, &ref), GSL_SUCCESS);
        const double got = row_value(l1, l2, l3);
        if (ref.val == 0.0) {
            assert_true(got == 0.0);
            continue;
        }
        nonzero++;
        const double tol = fmax(1e-12, ref.err / fabs(ref.val));
        check_rel(got, ref.val, tol, "GSL gsl_sf_coupling_3j");
        check_rel(clef_wigner_3j000(l1, l2, l3), ref.val, tol, "GSL gsl_sf_coupling_3j");
    }
    assert_true(nonzero > 2000);
    gsl_rng_free(r);
}

static void test_vs_edmonds(void **state)
{
    (void)state;
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 1957);
    for (int i = 0; i < 300; i++) {
        const int l1 = (int)gsl_rng_uniform_int(r, 5001);
        const int l2 = (int)gsl_rng_uniform_int(r, 5001);
        const int lo = abs(l1 - l2);
        int l3 = lo + (int)gsl_rng_uniform_int(r, (unsigned long)(l1 + l2 - lo + 1));
        if ((l1 + l2 + l3) % 2)
            l3 = l3 > lo ? l3 - 1 : l3 + 1;
        /* Edmonds 1957 closed form via long-double lgamma */
        check_rel(row_value(l1, l2, l3), edmonds_lgamma(l1, l2, l3), 1e-11,
                  "Edmonds 1957 (lgamma)");
    }
    /* The far end of the range: l = 20000 without overflow */
    const int big[][3] = {{20000, 20000, 0}, {20000, 20000, 40000}, {20000, 19999, 17001},
                          {20000, 1, 19999}, {15000, 20000, 30000}};
    for (size_t i = 0; i < sizeof big / sizeof big[0]; i++)
        check_rel(row_value(big[i][0], big[i][1], big[i][2]),
                  edmonds_lgamma(big[i][0], big[i][1], big[i][2]), 1e-10,
                  "Edmonds 1957 (lgamma), l = 20000");
    gsl_rng_free(r);
}

static void test_orthogonality(void **state)
{
    (void)state;
    /* sum_l3 (2 l3 + 1) (l1 l2 l3; 0 0 0)^2 = 1 (DLMF 34.3.16) */
    const int pairs[][2] = {{0, 0},   {1, 0},     {3, 7},      {50, 50},    {200, 13},
                            {1000, 999}, {4096, 77}, {5000, 5000}, {20000, 20000}, {20000, 3}};
    static double buf[40002];
    for (size_t i = 0; i < sizeof pairs / sizeof pairs[0]; i++) {
        int lo, hi;
        assert_int_equal(clef_wigner_3j000_row(pairs[i][0], pairs[i][1], buf, &lo, &hi), CLEF_OK);
        long double s = 0;
        for (int l3 = lo; l3 <= hi; l3++)
            s += (2.0L * l3 + 1) * buf[l3 - lo] * buf[l3 - lo];
        check_rel((double)s, 1.0, 1e-12, "DLMF 34.3.16 orthogonality");
    }
}

static void test_squared_form(void **state)
{
    (void)state;
    /* PERFORMANCE.md section 3: f^2 = A(g-l1)A(g-l2)A(g-l3)/((2g+1)A(g))
     * must equal the square of the closed form (Edmonds 1957). */
    enum { NMAX = 8001 };
    static double a[NMAX + 1];
    clef_wigner_a_table(NMAX, a);
    check_rel(a[1], 0.5, DBL_EPSILON, "A(1) = 1/2");
    check_rel(a[3], 5.0 / 16, DBL_EPSILON, "A(3) = 15/48");
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 3);
    for (int i = 0; i < 500; i++) {
        const int l1 = (int)gsl_rng_uniform_int(r, 4001);
        const int l2 = (int)gsl_rng_uniform_int(r, 4001);
        const int lo = abs(l1 - l2);
        int l3 = lo + (int)gsl_rng_uniform_int(r, (unsigned long)(l1 + l2 - lo + 1));
        if ((l1 + l2 + l3) % 2)
            l3 = l3 > lo ? l3 - 1 : l3 + 1;
        const double f = edmonds_lgamma(l1, l2, l3);
        check_rel(clef_wigner_3j000_sq(a, l1, l2, l3), f * f, 1e-11, "Edmonds 1957 squared");
    }
    gsl_rng_free(r);
}

/* General m (Schulten & Gordon 1975 recurrence). */
static double row_m(int j, int l2, int l3, int m2, int m3)
{
    static double buf[2 * 4000 + 2];
    int lo, hi;
    assert_int_equal(clef_wigner_3j_row(l2, l3, m2, m3, buf, &lo, &hi), CLEF_OK);
    return j < lo || j > hi ? 0.0 : buf[j - lo];
}

static void test_general_m_exact(void **state)
{
    (void)state;
    const double tol = 16 * DBL_EPSILON;
    /* METHODS.md section 3 [D, checked against the Racah formula] */
    check_rel(row_m(1, 1, 0, -1, 0), sqrt(1.0 / 3), tol, "(1 1 0; 1 -1 0)");
    check_rel(row_m(1, 1, 2, -1, 0), sqrt(1.0 / 30), tol, "(1 1 2; 1 -1 0)");
    check_rel(row_m(2, 2, 2, -1, 0), sqrt(1.0 / 70), tol, "(2 2 2; 1 -1 0)");
    check_rel(row_m(3, 2, 1, -1, 0), sqrt(8.0 / 105), tol, "(3 2 1; 1 -1 0)");
    /* m = 0 reduces to the DLMF 34.3.5 values */
    check_rel(row_m(10, 10, 10, 0, 0), -sqrt(111132.0 / 33393355), tol, "DLMF 34.3.5");
    check_rel(row_m(0, 1, 1, 0, 0), -sqrt(1.0 / 3), tol, "DLMF 34.3.5");
    assert_true(row_m(2, 2, 1, 0, 0) == 0.0);
    /* no allowed j: |m2| > l2 */
    double buf[8];
    int lo, hi;
    assert_int_equal(clef_wigner_3j_row(1, 3, 2, 0, buf, &lo, &hi), CLEF_OK);
    assert_true(lo > hi);
    assert_int_equal(clef_wigner_3j_row(-1, 3, 0, 0, buf, &lo, &hi), CLEF_EINVAL);
    assert_int_equal(clef_wigner_3j_row(1, 3, 0, 0, NULL, &lo, &hi), CLEF_EINVAL);
}

static void test_general_m_vs_gsl(void **state)
{
    (void)state;
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 1975);
    gsl_set_error_handler_off();
    static double buf[2 * 200 + 2];
    int checked = 0;
    for (int i = 0; i < 1500; i++) {
        const int lmax = i < 1000 ? 15 : 60;
        const int l2 = (int)gsl_rng_uniform_int(r, (unsigned long)lmax + 1);
        const int l3 = (int)gsl_rng_uniform_int(r, (unsigned long)lmax + 1);
        const int m2 = (int)gsl_rng_uniform_int(r, 2 * (unsigned long)l2 + 1) - l2;
        const int m3 = (int)gsl_rng_uniform_int(r, 2 * (unsigned long)l3 + 1) - l3;
        int lo, hi;
        assert_int_equal(clef_wigner_3j_row(l2, l3, m2, m3, buf, &lo, &hi), CLEF_OK);
        for (int j = lo; j <= hi; j++) {
            /* GSL gsl_sf_coupling_3j (arguments are 2j) */
            gsl_sf_result ref;
            assert_int_equal(gsl_sf_coupling_3j_e(2 * j, 2 * l2, 2 * l3, 2 * (-m2 - m3), 2 * m2,
                                                  2 * m3, &ref),
                             GSL_SUCCESS);
            const double tol = fmax(1e-12 * fabs(ref.val), ref.err) + 1e-15;
            check_abs(buf[j - lo], ref.val, tol, "GSL gsl_sf_coupling_3j");
            checked++;
        }
    }
    assert_true(checked > 10000);
    gsl_rng_free(r);
}

static void test_general_m_large(void **state)
{
    (void)state;
    static double a[2 * 4000 + 2], b[2 * 4000 + 2], z[2 * 4000 + 2];
    /* m = 0 against the closed-form row (Edmonds 1957) at large l */
    const int pairs[][2] = {{3000, 1000}, {2500, 2500}, {1, 4000}, {1234, 567}};
    for (size_t i = 0; i < sizeof pairs / sizeof pairs[0]; i++) {
        int lo, hi, zlo, zhi;
        assert_int_equal(clef_wigner_3j_row(pairs[i][0], pairs[i][1], 0, 0, a, &lo, &hi), CLEF_OK);
        assert_int_equal(clef_wigner_3j000_row(pairs[i][0], pairs[i][1], z, &zlo, &zhi), CLEF_OK);
        assert_int_equal(lo, zlo);
        assert_int_equal(hi, zhi);
        for (int j = lo; j <= hi; j++)
            check_abs(a[j - lo], z[j - lo], 1e-12 * fmax(fabs(z[j - lo]), 1e-3),
                      "m = 0 vs Edmonds 1957 closed form");
    }
    /* DLMF 34.3.18 (orthogonality in the first column): for fixed l2, l3
     * and m1, sum_j (2j+1) (j l2 l3; m1 m2 m3)(j l2 l3; m1 m2' m3') = 0
     * when (m2, m3) != (m2', m3'), with large m (forbidden regions, rescaling) */
    const int cases[][6] = {{700, 900, 650, -50, 640, -40},
                            {2000, 1500, -1200, 300, -1190, 290},
                            {60, 70, 2, -2, 0, 0},
                            {1000, 1000, 1000, -1000, 999, -999}};
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        int lo1, hi1, lo2, hi2;
        assert_int_equal(clef_wigner_3j_row(cases[i][0], cases[i][1], cases[i][2], cases[i][3],
                                            a, &lo1, &hi1),
                         CLEF_OK);
        assert_int_equal(clef_wigner_3j_row(cases[i][0], cases[i][1], cases[i][4], cases[i][5],
                                            b, &lo2, &hi2),
                         CLEF_OK);
        long double s = 0, n1 = 0;
        for (int j = lo1 > lo2 ? lo1 : lo2; j <= hi1; j++)
            s += (2.0L * j + 1) * a[j - lo1] * b[j - lo2];
        for (int j = lo1; j <= hi1; j++)
            n1 += (2.0L * j + 1) * a[j - lo1] * a[j - lo1];
        check_abs((double)s, 0.0, 1e-12, "DLMF 34.3.18 orthogonality");
        check_rel((double)n1, 1.0, 1e-13, "normalisation");
        /* sign convention at jmax: (-1)^(l2 - l3 - m1) (METHODS.md section 3) */
        const int m1 = -cases[i][2] - cases[i][3];
        const int neg = (cases[i][0] - cases[i][1] - m1) % 2 != 0;
        assert_true((a[hi1 - lo1] < 0) == neg);
        assert_true(isfinite(a[0]) && isfinite(a[hi1 - lo1]));
    }
}

/* (l1 l2 l3; 2 -2 0) rows against GSL gsl_sf_coupling_3j, including
 * l < 2 (all zero) and the odd-J entries (nonzero, unlike m = 0). */
static void test_3j22_vs_gsl(void **state)
{
    (void)state;
    const int pairs[][2] = {{0, 5}, {1, 1}, {2, 2}, {2, 7}, {3, 3}, {10, 4}, {37, 41}, {120, 95}};
    double buf[512];
    for (size_t k = 0; k < sizeof pairs / sizeof *pairs; k++) {
        const int l1 = pairs[k][0], l2 = pairs[k][1];
        int lo, hi;
        assert_int_equal(clef_wigner_3j22_row(l1, l2, buf, &lo, &hi), CLEF_OK);
        assert_int_equal(lo, abs(l1 - l2));
        assert_int_equal(hi, l1 + l2);
        for (int l3 = lo; l3 <= hi; l3++) {
            gsl_sf_result ref;
            assert_int_equal(gsl_sf_coupling_3j_e(2 * l1, 2 * l2, 2 * l3, 4, -4, 0, &ref),
                             GSL_SUCCESS);
            /* Same tolerance rule as test_general_m_vs_gsl: GSL's own error estimate. */
            const double tol = fmax(1e-12 * fabs(ref.val), ref.err) + 1e-15;
            check_abs(buf[l3 - lo], ref.val, tol, "GSL gsl_sf_coupling_3j (l1 l2 l3; 2 -2 0)");
        }
    }
    assert_int_equal(clef_wigner_3j22_row(-1, 2, buf, NULL, NULL), CLEF_EINVAL);
}

static void test_errors(void **state)
{
    (void)state;
    double buf[8];
    assert_int_equal(clef_wigner_3j000_row(-1, 2, buf, NULL, NULL), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "l1 = -1"));
    assert_int_equal(clef_wigner_3j000_row(1, 2, NULL, NULL, NULL), CLEF_EINVAL);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_exact_values), cmocka_unit_test(test_vs_gsl),
        cmocka_unit_test(test_vs_edmonds),   cmocka_unit_test(test_orthogonality),
        cmocka_unit_test(test_squared_form), cmocka_unit_test(test_errors),
        cmocka_unit_test(test_general_m_exact), cmocka_unit_test(test_general_m_vs_gsl),
        cmocka_unit_test(test_general_m_large), cmocka_unit_test(test_3j22_vs_gsl),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
