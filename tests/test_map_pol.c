/* Tests of polarized map reading (clef_map_read_pol, src/map_pol.c) on
 * files written by astropy (an outside writer of the HEALPix FITS layout:
 * Gorski et al. 2005; HEALPix FITS format specification): T, Q, U columns,
 * vector rows, POLCCONV COSMO / IAU / missing / unknown, Q and U in
 * separate files, missing and mismatched columns. */
#include "check.h"

#include "clef/map.h"

/* Values written by the script: T = sin(i), Q = cos(0.5 i), U = 1e-3 i - 1
 * (float64), RING pixel i; in the IAU files U is stored negated. */
static double tv(int64_t i) { return sin((double)i); }
static double qv(int64_t i) { return cos(0.5 * (double)i); }
static double uv(int64_t i) { return 1e-3 * (double)i - 1.0; }

static const char *script =
    "import sys, numpy as np\n"
    "from astropy.io import fits\n"
    "d = sys.argv[1]; ns = 8; n = 12 * ns * ns; i = np.arange(n)\n"
    "T = np.sin(i); Q = np.cos(0.5 * i); U = 1e-3 * i - 1.0\n"
    "def hdr(h, conv):\n"
    "    h['PIXTYPE'] = 'HEALPIX'; h['ORDERING'] = 'RING'; h['NSIDE'] = ns\n"
    "    h['INDXSCHM'] = 'IMPLICIT'; h['COORDSYS'] = 'G'\n"
    "    if conv: h['POLCCONV'] = conv\n"
    "def write(name, cols, conv, rowlen=1):\n"
    "    cs = [fits.Column(name=k, format=('%dD' % rowlen) if rowlen > 1 else 'D',\n"
    "                      array=v.reshape(-1, rowlen) if rowlen > 1 else v) for k, v in cols]\n"
    "    t = fits.BinTableHDU.from_columns(cs); hdr(t.header, conv)\n"
    "    fits.HDUList([fits.PrimaryHDU(), t]).writeto(d + '/' + name, overwrite=True)\n"
    "tqu = [('TEMPERATURE', T), ('Q_POLARISATION', Q), ('U_POLARISATION', U)]\n"
    "iau = [('TEMPERATURE', T), ('Q_POLARISATION', Q), ('U_POLARISATION', -U)]\n"
    "write('cosmo.fits', tqu, 'COSMO')\n"
    "write('iau.fits', iau, 'IAU', 256)\n"
    "write('noconv.fits', tqu, None)\n"
    "write('weird.fits', tqu, 'GALACTIC')\n"
    "write('nou.fits', tqu[:2], 'COSMO')\n"
    "write('q.fits', [('Q_STOKES', Q)], 'COSMO')\n"
    "write('u.fits', [('U_STOKES', U)], 'COSMO')\n"
    "write('u_iau.fits', [('U_STOKES', -U)], 'IAU')\n"
    "Qb = Q.copy(); Qb[5] = np.nan\n"
    "write('hole.fits', [('TEMPERATURE', T), ('Q_POLARISATION', Qb), ('U_POLARISATION', U)], 'COSMO')\n"
    "ns = 4; n = 12 * ns * ns\n"
    "write('u4.fits', [('U_POLARISATION', np.zeros(n))], 'COSMO')\n";

static const char *dir;

static int setup(void **state)
{
    (void)state;
    dir = test_path("pol");
    mkdir(dir, 0755);
    char py[4096];
    snprintf(py, sizeof py, "%s/make.py", dir);
    FILE *f = fopen(py, "w");
    assert_non_null(f);
    fputs(script, f);
    fclose(f);
    return run_cmd("%s '%s' '%s'", ref_python(), py, dir);
}

static const char *file(const char *name)
{
    static char buf[8][4096];
    static int k;
    k = (k + 1) % 8;
    snprintf(buf[k], sizeof buf[k], "%s/%s", dir, name);
    return buf[k];
}

static void check_values(const clef_map_pol *p, int with_t)
{
    assert_int_equal(p->q->nside, 8);
    double dq = 0, du = 0, dt = 0;
    for (int64_t i = 0; i < p->q->npix; i++) {
        dq = fmax(dq, fabs(p->q->pix[i] - qv(i)));
        du = fmax(du, fabs(p->u->pix[i] - uv(i)));
        if (with_t)
            dt = fmax(dt, fabs(p->t->pix[i] - tv(i)));
    }
    /* float64 columns: exact up to numpy's and libm's sin/cos (1 ulp). */
    check_abs(dq, 0.0, 1e-15, "Q as written by astropy");
    check_abs(du, 0.0, 1e-15, "U as written by astropy (COSMO, after conversion)");
    check_abs(dt, 0.0, 1e-15, "T as written by astropy");
}

static int nwarn;
static void count_warn(void *ud, int level, const char *msg)
{
    (void)ud;
    if (level == CLEF_LOG_WARN && strstr(msg, "POLCCONV"))
        nwarn++;
}

static void test_conventions(void **state)
{
    (void)state;
    clef_map_pol p;
    clef_map_pol_opts o = {.want_t = 1};
    assert_int_equal(clef_map_read_pol(&p, file("cosmo.fits"), &o), CLEF_OK);
    check_values(&p, 1);
    assert_int_equal(p.iau, 0);
    assert_int_equal(p.polcconv_missing, 0);
    clef_map_pol_free(&p);
    /* IAU with vector rows: U negated back to the COSMO values. */
    assert_int_equal(clef_map_read_pol(&p, file("iau.fits"), &o), CLEF_OK);
    check_values(&p, 1);
    assert_int_equal(p.iau, 1);
    clef_map_pol_free(&p);
    /* Reading the IAU file as COSMO (override) gives -U: the conversion is
     * what makes the two files agree. */
    o.polcconv = "COSMO";
    assert_int_equal(clef_map_read_pol(&p, file("iau.fits"), &o), CLEF_OK);
    check_abs(p.u->pix[10], -uv(10), 0.0, "IAU file read as COSMO keeps the stored -U");
    clef_map_pol_free(&p);
    o.polcconv = "NORTH";
    assert_int_equal(clef_map_read_pol(&p, file("iau.fits"), &o), CLEF_EINVAL);
    o.polcconv = NULL;
    /* Missing POLCCONV: COSMO with a warning. */
    clef_set_log(count_warn, NULL);
    nwarn = 0;
    assert_int_equal(clef_map_read_pol(&p, file("noconv.fits"), &o), CLEF_OK);
    clef_set_log(NULL, NULL);
    check_values(&p, 1);
    assert_int_equal(p.polcconv_missing, 1);
    assert_int_equal(nwarn, 1);
    clef_map_pol_free(&p);
    /* Unknown value refused, naming file, HDU, keyword and value. */
    assert_int_equal(clef_map_read_pol(&p, file("weird.fits"), &o), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "weird.fits"));
    assert_non_null(strstr(clef_last_error(), "HDU 1"));
    assert_non_null(strstr(clef_last_error(), "POLCCONV = 'GALACTIC'"));
    assert_null(p.q);
    assert_null(p.u);
}

static void test_separate_and_errors(void **state)
{
    (void)state;
    clef_map_pol p;
    clef_map_pol_opts o = {.u_path = file("u.fits")};
    assert_int_equal(clef_map_read_pol(&p, file("q.fits"), &o), CLEF_OK);
    check_values(&p, 0);
    assert_null(p.t);
    clef_map_pol_free(&p);
    /* Q COSMO, U IAU: mismatched conventions refused. */
    o.u_path = file("u_iau.fits");
    assert_int_equal(clef_map_read_pol(&p, file("q.fits"), &o), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "POLCCONV"));
    /* Different nside. */
    o.u_path = file("u4.fits");
    assert_int_equal(clef_map_read_pol(&p, file("q.fits"), &o), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "nside"));
    /* Missing U column: names the file, the HDU and the columns present. */
    clef_map_pol_opts o2 = {0};
    assert_int_equal(clef_map_read_pol(&p, file("nou.fits"), &o2), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "U column missing"));
    assert_non_null(strstr(clef_last_error(), "nou.fits"));
    assert_non_null(strstr(clef_last_error(), "Q_POLARISATION"));
    /* T wanted but absent. */
    o2.want_t = 1;
    o2.u_path = file("u.fits");
    assert_int_equal(clef_map_read_pol(&p, file("q.fits"), &o2), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "T column missing"));
    /* Columns by number. */
    clef_map_pol_opts o3 = {.q_column = "2", .u_column = "3", .t_column = "1", .want_t = 1};
    assert_int_equal(clef_map_read_pol(&p, file("cosmo.fits"), &o3), CLEF_OK);
    check_values(&p, 1);
    clef_map_pol_free(&p);
    /* A pixel missing in Q is missing in U too, T keeps it. */
    clef_map_pol_opts o4 = {.want_t = 1};
    assert_int_equal(clef_map_read_pol(&p, file("hole.fits"), &o4), CLEF_OK);
    assert_int_equal(p.q->valid[5], 0);
    assert_int_equal(p.u->valid[5], 0);
    assert_int_equal(p.t->valid[5], 1);
    check_abs(p.u->pix[5], 0.0, 0.0, "invalid pixels hold 0 (map.h)");
    assert_int_equal(p.q->nmissing, 1);
    clef_map_pol_free(&p);
    assert_true(clef_map_column_is_pol("Q_POLARISATION"));
    assert_true(clef_map_column_is_pol("u_polarization"));
    assert_false(clef_map_column_is_pol("TEMPERATURE"));
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_conventions),
        cmocka_unit_test(test_separate_and_errors),
    };
    return cmocka_run_group_tests(tests, setup, NULL);
}
