/* Tests of the polarized simulation pieces: correlated T/E/B a_lm
 * (clef_sim_alm_pol) against their input spectra within cosmic variance
 * (Var(C^XY_hat) = (C^XX C^YY + C^XY^2)/(2l+1): Knox 1995, common practice),
 * the T stream shared with the temperature-only draw, the spectrum reader
 * (clef_theory_read_cl_pol) and the T/Q/U writer read back by
 * clef_map_read_pol and by astropy. */
#include "check.h"

#include <complex.h>

#include "clef/map.h"
#include "clef/sim.h"
#include "clef/theory.h"

#define LMAX 300

static double tt(int l) { return 3000.0 / ((l + 10.0) * (l + 10.0)); }
static double ee(int l) { return 50.0 / ((l + 20.0) * (l + 20.0)); }
static double bb(int l) { return 0.3 * ee(l); }
static double te(int l) { return 0.7 * sin(l / 40.0) * sqrt(tt(l) * ee(l)); }

static void test_alm_spectra(void **state)
{
    (void)state;
    static double c[4][LMAX + 1];
    for (int l = 0; l <= LMAX; l++) {
        c[0][l] = tt(l);
        c[1][l] = ee(l);
        c[2][l] = bb(l);
        c[3][l] = te(l);
    }
    const size_t na = clef_alm_size(LMAX, LMAX);
    double complex *at = malloc(na * sizeof *at), *ae = malloc(na * sizeof *ae),
                   *ab = malloc(na * sizeof *ab), *a0 = malloc(na * sizeof *a0);
    assert_int_equal(clef_sim_alm_pol(LMAX, c[0], c[1], c[2], c[3], 42, at, ae, ab), CLEF_OK);
    /* T is the temperature-only draw of the same seed (up to rounding). */
    assert_int_equal(clef_sim_alm(LMAX, c[0], 42, a0), CLEF_OK);
    double dmax = 0;
    for (size_t i = 0; i < na; i++)
        dmax = fmax(dmax, cabs(at[i] - a0[i]) / (cabs(a0[i]) + 1e-300));
    check_abs(dmax, 0.0, 1e-14, "same sky stream as clef_sim_alm (sim.h)");
    for (int m = 0; m <= 1; m++)
        for (int l = m; l < 2; l++) {
            check_abs(cabs(ae[clef_alm_index(LMAX, l, m)]), 0.0, 0.0, "no E below l = 2");
            check_abs(cabs(ab[clef_alm_index(LMAX, l, m)]), 0.0, 0.0, "no B below l = 2");
        }
    double h[4][LMAX + 1], cross[LMAX + 1];
    clef_alm_cl(LMAX, LMAX, at, NULL, h[0]);
    clef_alm_cl(LMAX, LMAX, ae, NULL, h[1]);
    clef_alm_cl(LMAX, LMAX, ab, NULL, h[2]);
    clef_alm_cl(LMAX, LMAX, at, ae, h[3]);
    clef_alm_cl(LMAX, LMAX, ae, ab, cross);
    /* Weighted sums over l = 2..LMAX: z = sum (2l+1)(hat - C) / sqrt(sum (2l+1)(...)). */
    static const char *const name[4] = {"TT", "EE", "BB", "TE"};
    for (int k = 0; k < 5; k++) {
        double num = 0, var = 0;
        for (int l = 2; l <= LMAX; l++) {
            const double g = 2.0 * l + 1.0;
            const double xx = k == 3 ? c[0][l] : k == 4 ? c[1][l] : c[k][l];
            const double yy = k == 3 ? c[1][l] : k == 4 ? c[2][l] : c[k][l];
            const double xy = k == 4 ? 0.0 : c[k][l];
            const double got = k == 4 ? cross[l] : h[k][l];
            /* weight 1/sd per l: a chi-like sum of unit-variance terms */
            const double sd = sqrt((xx * yy + xy * xy) / g);
            num += (got - xy) / sd;
            var += 1.0;
        }
        const double z = num / sqrt(var);
        printf("%s: z = %+.2f over l = 2..%d\n", k < 4 ? name[k] : "EB", z, LMAX);
        check_abs(z, 0.0, 4.0, "cosmic variance (Knox 1995), 4 sigma");
    }
    double bad_te[LMAX + 1];
    memcpy(bad_te, c[3], sizeof bad_te);
    bad_te[17] = 1.01 * sqrt(tt(17) * ee(17));
    assert_int_equal(clef_sim_alm_pol(LMAX, c[0], c[1], c[2], bad_te, 42, at, ae, ab),
                     CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "l = 17"));
    free(at);
    free(ae);
    free(ab);
    free(a0);
}

static void test_reader(void **state)
{
    (void)state;
    const char *p = test_path("pol_cl.txt");
    FILE *f = fopen(p, "w");
    fprintf(f, "# columns: l TT EE BB TE\n");
    for (int l = 0; l <= 20; l++)
        fprintf(f, "%d, %.17g, %.17g, %.17g, %.17g\n", l, tt(l), ee(l), bb(l), te(l));
    fclose(f);
    double a[4][31];
    assert_int_equal(clef_theory_read_cl_pol(p, 20, a[0], a[1], a[2], a[3]), CLEF_OK);
    for (int l = 0; l <= 20; l++) {
        check_rel(a[0][l], tt(l), 1e-15, "value written");
        check_rel(a[3][l], te(l), 1e-15, "value written");
    }
    /* Past the end: zeros. */
    assert_int_equal(clef_theory_read_cl_pol(p, 30, a[0], a[1], a[2], a[3]), CLEF_OK);
    check_abs(a[1][25], 0.0, 0.0, "above the file's last l: 0");
    const char *q = test_path("pol_cl_bad.txt");
    f = fopen(q, "w");
    fprintf(f, "2 1 1 1 0\n3 1 1 1\n");
    fclose(f);
    assert_int_equal(clef_theory_read_cl_pol(q, 3, a[0], a[1], a[2], a[3]), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "line 2"));
    f = fopen(q, "w");
    fprintf(f, "2 1 1 1 0\n4 1 1 1 0\n");
    fclose(f);
    assert_int_equal(clef_theory_read_cl_pol(q, 4, a[0], a[1], a[2], a[3]), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "multipole 3 is missing"));
    f = fopen(q, "w");
    fprintf(f, "2 1 -1 1 0\n");
    fclose(f);
    assert_int_equal(clef_theory_read_cl_pol(q, 2, a[0], a[1], a[2], a[3]), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "EE"));
}

/* T/Q/U writer: read back by clef and by astropy (columns, POLCCONV). */
static void test_writer(void **state)
{
    (void)state;
    clef_map *m[3];
    for (int k = 0; k < 3; k++) {
        assert_int_equal(clef_map_alloc(&m[k], 4), CLEF_OK);
        for (int64_t i = 0; i < m[k]->npix; i++)
            m[k]->pix[i] = (k + 1) * 0.5 + 1e-3 * (double)i;
    }
    m[2]->valid[7] = 0;
    const char *p = test_path("tqu_written.fits");
    assert_int_equal(clef_map_write_pol(m[0], m[1], m[2], p, NULL), CLEF_OK);
    clef_map_pol r;
    clef_map_pol_opts o = {.want_t = 1};
    assert_int_equal(clef_map_read_pol(&r, p, &o), CLEF_OK);
    assert_int_equal(r.polcconv_missing, 0);
    assert_int_equal(r.iau, 0);
    check_abs(r.q->pix[5], m[1]->pix[5], 0.0, "written value");
    check_abs(r.u->pix[9], m[2]->pix[9], 0.0, "written value");
    assert_int_equal(r.q->valid[7], 0); /* U missing there: Q too (map.h) */
    assert_int_equal(r.t->valid[7], 1);
    clef_map_pol_free(&r);
    assert_int_equal(run_cmd("%s -c \"from astropy.io import fits; h = fits.open('%s')[1]; "
                             "assert h.columns.names == ['TEMPERATURE', 'Q_POLARISATION', "
                             "'U_POLARISATION'], h.columns.names; "
                             "assert h.header['POLCCONV'] == 'COSMO'\"",
                             ref_python(), p),
                     0);
    clef_map *bad;
    assert_int_equal(clef_map_alloc(&bad, 8), CLEF_OK);
    assert_int_equal(clef_map_write_pol(m[0], bad, m[2], test_path("x.fits"), NULL), CLEF_EINVAL);
    assert_false(file_exists(test_path("x.fits")));
    clef_map_free(bad);
    for (int k = 0; k < 3; k++)
        clef_map_free(m[k]);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_alm_spectra),
        cmocka_unit_test(test_reader),
        cmocka_unit_test(test_writer),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
