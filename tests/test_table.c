/* Band-power tables: FITS and CSV round trips, astropy and fitsverify as
 * outside readers, user text tables, and every error path of the readers
 * and writers. */
#include "check.h"

#include <dirent.h>
#include <gsl/gsl_rng.h>

#include "clef/table.h"

/* A table with values from a fixed-seed GSL generator (no round numbers, so
 * exact round trips are a real test of the printed precision). */
static clef_bandpowers *make_table(int nbins, int with_cov)
{
    clef_bandpowers *bp = NULL;
    assert_int_equal(clef_bandpowers_alloc(&bp, nbins, with_cov), CLEF_OK);
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 20261201);
    for (int b = 0; b < nbins; b++) {
        bp->l_lo[b] = 2 + 20 * b;
        bp->l_hi[b] = 21 + 20 * b;
        bp->l_eff[b] = 0.5 * (bp->l_lo[b] + bp->l_hi[b]) + 0.1 * gsl_rng_uniform(r);
        bp->dl[b] = 1000.0 + 5000.0 * gsl_rng_uniform(r);
        bp->cl[b] = 2 * M_PI * bp->dl[b] / (bp->l_eff[b] * (bp->l_eff[b] + 1));
        bp->dl_err[b] = 10.0 + 100.0 * gsl_rng_uniform(r);
    }
    if (with_cov)
        for (int i = 0; i < nbins; i++)
            for (int j = 0; j <= i; j++) {
                const double c = i == j ? bp->dl_err[i] * bp->dl_err[i]
                                        : 0.1 * bp->dl_err[i] * bp->dl_err[j] * gsl_rng_uniform(r);
                bp->cov[i * nbins + j] = bp->cov[j * nbins + i] = c;
            }
    gsl_rng_free(r);
    assert_int_equal(clef_bandpowers_meta_text(bp, "MAPFILE", "maps/it's a map.fits", "input map"),
                     CLEF_OK);
    assert_int_equal(clef_bandpowers_meta_number(bp, "NSIDE", 512, "HEALPix resolution"), CLEF_OK);
    assert_int_equal(clef_bandpowers_meta_number(bp, "FSKY", 0.69314718055994529, "sky fraction"),
                     CLEF_OK);
    assert_int_equal(clef_bandpowers_meta_number(bp, "TINY", -1.2345678901234567e-300, NULL),
                     CLEF_OK);
    /* Longer than one FITS card: written with the CONTINUE convention. */
    assert_int_equal(clef_bandpowers_meta_text(bp, "LONGTXT",
                                               "a rather long value that does not fit into a single "
                                               "eighty-character FITS header card / with a slash",
                                               "long text"),
                     CLEF_OK);
    return bp;
}

static void assert_same_table(const clef_bandpowers *a, const clef_bandpowers *b, int with_cov)
{
    assert_int_equal(a->nbins, b->nbins);
    for (int i = 0; i < a->nbins; i++) {
        assert_int_equal(a->l_lo[i], b->l_lo[i]);
        assert_int_equal(a->l_hi[i], b->l_hi[i]);
        /* Exact: both writers print the shortest text that reads back. */
        check_abs(b->l_eff[i], a->l_eff[i], 0, "round trip");
        check_abs(b->cl[i], a->cl[i], 0, "round trip");
        check_abs(b->dl[i], a->dl[i], 0, "round trip");
        check_abs(b->dl_err[i], a->dl_err[i], 0, "round trip");
    }
    if (with_cov) {
        assert_non_null(b->cov);
        for (int i = 0; i < a->nbins * a->nbins; i++)
            check_abs(b->cov[i], a->cov[i], 0, "round trip");
    } else {
        assert_null(b->cov);
    }
    assert_int_equal(a->nmeta, b->nmeta);
    for (int i = 0; i < a->nmeta; i++) {
        const clef_meta *m = &a->meta[i];
        const char *v = clef_bandpowers_meta_get(b, m->key);
        assert_non_null(v);
        assert_string_equal(v, m->value);
        for (int j = 0; j < b->nmeta; j++)
            if (!strcmp(b->meta[j].key, m->key)) {
                assert_int_equal(b->meta[j].is_number, m->is_number);
                assert_string_equal(b->meta[j].comment, m->comment);
            }
    }
}

/* No temporary files left next to the outputs after a failure. */
static int count_tmp_files(const char *dir)
{
    DIR *d = opendir(dir);
    int n = 0;
    if (!d)
        return 0;
    for (struct dirent *e; (e = readdir(d));)
        n += strstr(e->d_name, ".clef-tmp.") != NULL;
    closedir(d);
    return n;
}

static void fits_round_trip(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_table(9, 1), *back = NULL;
    const char *path = test_path("rt.fits");
    assert_int_equal(clef_bandpowers_write_fits(bp, path), CLEF_OK);
    assert_int_equal(clef_bandpowers_read(&back, path), CLEF_OK);
    assert_same_table(bp, back, 1);
    assert_string_equal(clef_bandpowers_meta_get(back, "NSIDE"), "512");
    clef_bandpowers_free(back);

    /* Without covariance: no BANDCOV HDU, cov NULL on reading. */
    free(bp->cov);
    bp->cov = NULL;
    assert_int_equal(clef_bandpowers_write_fits(bp, path), CLEF_OK);
    assert_int_equal(clef_bandpowers_read(&back, path), CLEF_OK);
    assert_same_table(bp, back, 0);
    clef_bandpowers_free(back);
    clef_bandpowers_free(bp);
}

static void csv_round_trip(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_table(12, 1), *back = NULL;
    const char *path = test_path("rt.csv");
    const char *cpath = test_path("rt_cov.csv");
    assert_int_equal(clef_bandpowers_write_csv(bp, path), CLEF_OK);
    assert_int_equal(clef_bandpowers_write_cov_csv(bp, cpath), CLEF_OK);
    assert_int_equal(clef_bandpowers_read(&back, path), CLEF_OK);
    assert_null(back->cov);
    assert_int_equal(clef_bandpowers_read_cov(back, cpath), CLEF_OK);
    assert_same_table(bp, back, 1);
    clef_bandpowers_free(back);

    /* numpy reads both files as plain CSV (numpy.loadtxt / genfromtxt). */
    assert_int_equal(run_cmd("%s -c \"import numpy as np, io\n"
                             "lines = [s for s in open('%s') if not s.startswith('#')]\n"
                             "t = np.genfromtxt(io.StringIO(''.join(lines)), delimiter=',', names=True)\n"
                             "c = np.loadtxt('%s', delimiter=',')\n"
                             "assert t.dtype.names == ('l_min','l_max','l_eff','c_band_uK2','d_band_uK2','d_sigma_uK2'), t.dtype.names\n"
                             "assert len(t) == 12 and c.shape == (12, 12)\n"
                             "assert t['l_eff'][3] == %.17g and t['d_band_uK2'][11] == %.17g\n"
                             "assert c[2, 5] == %.17g and (c == c.T).all()\n\"",
                             ref_python(), path, cpath, bp->l_eff[3], bp->dl[11], bp->cov[2 * 12 + 5]),
                     0);
    clef_bandpowers_free(bp);
}

static void astropy_reads_fits(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_table(6, 1);
    const char *path = test_path("astropy.fits");
    const char *dump = test_path("astropy.txt");
    assert_int_equal(clef_bandpowers_write_fits(bp, path), CLEF_OK);
    /* astropy.io.fits: names, units, header keywords, values, covariance. */
    assert_int_equal(
        run_cmd("%s -c \"from astropy.io import fits\n"
                "h = fits.open('%s')\n"
                "assert len(h) == 3 and h[0].header['NAXIS'] == 0\n"
                "t = h['BANDPOWER']\n"
                "assert t.columns.names == ['LMIN','LMAX','LEFF','C_BAND','D_BAND','D_SIGMA'], t.columns.names\n"
                "assert [c.unit for c in t.columns] == [None, None, None, 'uK^2', 'uK^2', 'uK^2'], [c.unit for c in t.columns]\n"
                "assert t.header['NSIDE'] == 512 and isinstance(t.header['NSIDE'], int)\n"
                "assert t.header['FSKY'] == 0.69314718055994529\n"
                "assert t.header['MAPFILE'] == \\\"maps/it's a map.fits\\\"\n"
                "assert t.header['LONGTXT'].endswith('with a slash')\n"
                "assert t.header['CLEFVERS'] == '%s'\n"
                "c = h['BANDCOV']\n"
                "assert c.header['BUNIT'] == 'uK^4' and c.data.shape == (6, 6)\n"
                "with open('%s', 'w') as f:\n"
                "    for r in t.data: f.write('%%d %%d %%r %%r %%r %%r\\\\n' %% tuple(r))\n"
                "    for v in c.data.ravel(): f.write('%%r\\\\n' %% v)\n\"",
                ref_python(), path, CLEF_VERSION, dump),
        0);
    FILE *f = fopen(dump, "r");
    assert_non_null(f);
    for (int b = 0; b < 6; b++) {
        int lo, hi;
        double v[4];
        assert_int_equal(fscanf(f, "%d %d %lf %lf %lf %lf", &lo, &hi, &v[0], &v[1], &v[2], &v[3]), 6);
        assert_int_equal(lo, bp->l_lo[b]);
        assert_int_equal(hi, bp->l_hi[b]);
        check_abs(v[0], bp->l_eff[b], 0, "astropy");
        check_abs(v[1], bp->cl[b], 0, "astropy");
        check_abs(v[2], bp->dl[b], 0, "astropy");
        check_abs(v[3], bp->dl_err[b], 0, "astropy");
    }
    /* numpy's [i, j] is FITS pixel (j+1, i+1): row-major cov[i * n + j]. */
    for (int i = 0; i < 36; i++) {
        double v;
        assert_int_equal(fscanf(f, "%lf", &v), 1);
        check_abs(v, bp->cov[i], 0, "astropy BANDCOV");
    }
    fclose(f);
    clef_bandpowers_free(bp);
}

static const char *write_file(const char *name, const char *text);

/* Window functions: FITS HDU BANDWIN and the windows CSV read back exactly,
 * astropy and numpy see data[b, l] = W_bl, fitsverify accepts the file,
 * and malformed windows files are refused naming the line. */
static void windows_round_trip(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_table(6, 1), *back = NULL;
    const int wl = 40;
    assert_int_equal(clef_bandpowers_alloc_windows(bp, wl), CLEF_OK);
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 7);
    for (int i = 0; i < 6 * (wl + 1); i++)
        bp->win[i] = (i % 5 == 0) ? 0.0 : gsl_rng_uniform(r) - 0.2;
    gsl_rng_free(r);
    const char *path = test_path("win.fits"), *cpath = test_path("win.csv");
    assert_int_equal(clef_bandpowers_write_fits(bp, path), CLEF_OK);
    assert_int_equal(clef_bandpowers_read(&back, path), CLEF_OK);
    assert_same_table(bp, back, 1);
    assert_non_null(back->win);
    assert_int_equal(back->win_lmax, wl);
    for (int i = 0; i < 6 * (wl + 1); i++)
        check_abs(back->win[i], bp->win[i], 0, "FITS round trip");
    clef_bandpowers_free(back);
    assert_int_equal(run_cmd("fitsverify -q '%s' | grep -q 'verification OK'", path), 0);
    assert_int_equal(run_cmd("%s -c \"from astropy.io import fits\n"
                             "h = fits.open('%s')\n"
                             "w = h['BANDWIN'].data\n"
                             "assert w.shape == (6, %d), w.shape\n"
                             "assert w[4, 17] == %.17g\n"
                             "assert h['BANDWIN'].header['WINLMAX'] == %d\n\"",
                             ref_python(), path, wl + 1, bp->win[4 * (wl + 1) + 17], wl),
                     0);

    assert_int_equal(clef_bandpowers_write_windows_csv(bp, cpath), CLEF_OK);
    clef_bandpowers *t = make_table(6, 0);
    assert_int_equal(clef_bandpowers_read_windows(t, cpath), CLEF_OK);
    assert_int_equal(t->win_lmax, wl);
    for (int i = 0; i < 6 * (wl + 1); i++)
        check_abs(t->win[i], bp->win[i], 0, "CSV round trip");
    assert_int_equal(run_cmd("%s -c \"import numpy as np\n"
                             "w = np.loadtxt('%s', delimiter=',')\n"
                             "assert w.shape == (6, %d) and w[4, 17] == %.17g\n\"",
                             ref_python(), cpath, wl + 1, bp->win[4 * (wl + 1) + 17]),
                     0);
    /* Errors: too few rows, a ragged row, a bad number, no windows to write. */
    const char *p = write_file("win_short.csv", "# c\n1,2,3\n4,5,6\n");
    assert_int_equal(clef_bandpowers_read_windows(t, p), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "2 window rows"));
    p = write_file("win_ragged.csv", "1,2,3\n4,5\n");
    assert_int_equal(clef_bandpowers_read_windows(t, p), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "line 2"));
    p = write_file("win_bad.csv", "1,2,3\n4,5,x\n1,2,3\n1,2,3\n1,2,3\n1,2,3\n");
    assert_int_equal(clef_bandpowers_read_windows(t, p), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "line 2 column 3"));
    p = write_file("win_ok.csv", "1,2,3\n4,5,6\n1,2,3\n1,2,3\n1,2,3\n1 2 3\n");
    assert_int_equal(clef_bandpowers_read_windows(t, p), CLEF_OK);
    assert_int_equal(t->win_lmax, 2);
    check_abs(t->win[5], 6, 0, "row 1, l = 2");
    assert_int_equal(clef_bandpowers_read_windows(t, test_path("absent.csv")), CLEF_EIO);
    clef_bandpowers *nw = make_table(3, 0);
    assert_int_equal(clef_bandpowers_write_windows_csv(nw, test_path("nw.csv")), CLEF_EINVAL);
    assert_false(file_exists(test_path("nw.csv")));
    clef_bandpowers_free(nw);
    clef_bandpowers_free(t);
    clef_bandpowers_free(bp);
}

static void fitsverify_passes(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_table(5, 1);
    const char *path = test_path("verify.fits");
    const char *out = test_path("verify.txt");
    assert_int_equal(clef_bandpowers_write_fits(bp, path), CLEF_OK);
    /* fitsverify -q prints one line "verification OK: ..." or "... N
     * warnings and M errors"; it exits with the number of errors. */
    assert_int_equal(run_cmd("fitsverify -q '%s' > '%s' 2>&1", path, out), 0);
    assert_int_equal(run_cmd("grep -q 'verification OK' '%s'", out), 0);
    assert_int_equal(run_cmd("grep -qi 'warning\\|error' '%s'", out), 1);
    clef_bandpowers_free(bp);
}

/* Write `text` to a scratch file and return its path. */
static const char *write_file(const char *name, const char *text)
{
    const char *path = test_path(name);
    FILE *f = fopen(path, "w");
    assert_non_null(f);
    fputs(text, f);
    fclose(f);
    return path;
}

static void user_tables(void **state)
{
    (void)state;
    clef_bandpowers *bp = NULL;
    /* "l_eff D": whitespace, comments, blank lines; errors unknown (0). */
    const char *p2 = write_file("u2.txt", "# my spectrum\n\n  100   3000\n150\t4500.5\n 200 5000 # last\n");
    assert_int_equal(clef_bandpowers_read(&bp, p2), CLEF_OK);
    assert_int_equal(bp->nbins, 3);
    assert_int_equal(bp->l_lo[1], 150);
    assert_int_equal(bp->l_hi[1], 150);
    check_abs(bp->dl[1], 4500.5, 0, "input");
    check_abs(bp->dl_err[1], 0, 0, "no error column");
    /* C = 2 pi D / (l (l + 1)): the definition of D_l (common practice). */
    check_rel(bp->cl[2], 2 * M_PI * 5000 / (200.0 * 201.0), 1e-15, "D_l definition");
    clef_bandpowers_free(bp);

    /* "l_eff, D, err" with a header row and CRLF line ends. */
    const char *p3 = write_file("u3.csv", "ell, D, sigma\r\n10.5, 1000, 50\r\n20.5, 1100, 55\r\n");
    assert_int_equal(clef_bandpowers_read(&bp, p3), CLEF_OK);
    assert_int_equal(bp->nbins, 2);
    check_abs(bp->l_eff[0], 10.5, 0, "input");
    assert_int_equal(bp->l_lo[0], 11); /* nearest multipole, half away from zero */
    check_abs(bp->dl_err[1], 55, 0, "input");
    clef_bandpowers_free(bp);

    /* Six columns, whitespace-separated, metadata line read back. */
    const char *p6 = write_file("u6.txt", "# NSIDE = 256 / resolution\n# free comment = not a number\n"
                                          "2 11 6.5 1.0 2.0 0.5\n12 21 16.5 1.5 2.5 0.25\n");
    assert_int_equal(clef_bandpowers_read(&bp, p6), CLEF_OK);
    assert_int_equal(bp->nbins, 2);
    assert_int_equal(bp->nmeta, 1);
    assert_string_equal(clef_bandpowers_meta_get(bp, "NSIDE"), "256");
    assert_int_equal(bp->l_hi[1], 21);
    check_abs(bp->cl[1], 1.5, 0, "input");
    clef_bandpowers_free(bp);
}

/* A BANDPOWER table written by astropy, with header cards clef does not
 * write itself: HIERARCH, logical, COMMENT/HISTORY, an integer column type
 * of another width, lower-case column names. */
static void foreign_fits(void **state)
{
    (void)state;
    const char *path = test_path("foreign.fits");
    assert_int_equal(
        run_cmd("%s -c \"from astropy.io import fits; import numpy as np\n"
                "cols = [fits.Column(name=n, format=f, array=a) for n, f, a in ("
                "('lmin', 'K', [2, 12]), ('lmax', 'I', [11, 21]), ('leff', 'E', [6.5, 16.5]), "
                "('c_band', 'D', [1.0, 2.0]), ('d_band', 'D', [10.0, 20.0]), ('d_sigma', 'D', [1.0, 0.5]))]\n"
                "t = fits.BinTableHDU.from_columns(cols, name='BANDPOWER')\n"
                "t.header['HIERARCH a long key name'] = 5\n"
                "t.header['FLAG'] = True\n"
                "t.header['BIGNUM'] = 1.5e300\n"
                "t.header['COMMENT'] = 'a comment'\n"
                "t.header['HISTORY'] = 'made by a test'\n"
                "fits.HDUList([fits.PrimaryHDU(), t]).writeto('%s', overwrite=True)\"",
                ref_python(), path),
        0);
    clef_bandpowers *bp = NULL;
    assert_int_equal(clef_bandpowers_read(&bp, path), CLEF_OK);
    assert_int_equal(bp->nbins, 2);
    assert_int_equal(bp->l_lo[1], 12);
    assert_int_equal(bp->l_hi[1], 21);
    check_abs(bp->l_eff[1], 16.5, 0, "astropy input");
    check_abs(bp->dl[1], 20.0, 0, "astropy input");
    check_abs(bp->dl_err[1], 0.5, 0, "astropy input");
    assert_null(bp->cov);
    assert_int_equal(bp->nmeta, 2);
    assert_string_equal(clef_bandpowers_meta_get(bp, "FLAG"), "T");
    assert_string_equal(clef_bandpowers_meta_get(bp, "BIGNUM"), "1.5e+300");
    clef_bandpowers_free(bp);
}

/* The message of the last error contains every string given. */
static void assert_msg(const char *a, const char *b)
{
    const char *m = clef_last_error();
    if (!strstr(m, a) || (b && !strstr(m, b)))
        fail_msg("message '%s' lacks '%s' / '%s'", m, a, b ? b : "");
}

static void read_errors(void **state)
{
    (void)state;
    clef_bandpowers *bp = NULL;
    const char *missing = test_path("does-not-exist.fits");
    assert_int_equal(clef_bandpowers_read(&bp, missing), CLEF_EIO);
    assert_null(bp);
    assert_msg("does-not-exist.fits", NULL);

    static const struct {
        const char *name, *text, *msg1, *msg2;
    } bad[] = {
        {"bad_num.txt", "# x\n100 3000 20\n150 4x00 30\n", "line 3", "column 2"},
        {"bad_ncol.txt", "100 3000 20 1\n", "line 1", "4 columns"},
        {"bad_mixed.txt", "100 3000 20\n150 3000\n", "line 2", "line 1 has 3"},
        {"bad_order.txt", "100 3000 20\n90 3000 20\n", "line 2", "does not increase"},
        {"bad_empty_field.csv", "100,,20\n", "line 1", "empty field"},
        {"bad_trailing.csv", "100,3000,\n", "line 1", "column 3"},
        {"bad_err.txt", "100 3000 -1\n", "line 1", "negative"},
        {"bad_nan.txt", "100 nan 1\n", "line 1", "column 2"},
        {"bad_l0.txt", "0 3000 1\n", "line 1", "positive multipole"},
        {"bad_lint.txt", "2.5 11 6.5 1 2 0.5\n", "line 1", "l_min"},
        {"bad_lrange.txt", "12 11 6.5 1 2 0.5\n", "line 1", "l_max"},
        {"bad_header2.txt", "a b c\nd e f\n", "line 2", "column 1"},
        {"bad_first.txt", "# x\n1O0 3000 50\n120 3000 50\n", "line 2", "column 1"},
        {"bad_nodata.txt", "# only comments\n\n", "no data rows", NULL},
        /* 65 fields: read one past the 64-entry field array before the fix
         * (fuzz_table finding, UBSan; tests/fuzz/corpus/fuzz_table/regress-65-columns.txt) */
        {"bad_65.txt",
         "1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16 17 18 19 20 21 22 23 24 25 26 27 28 29 30 31 32 "
         "33 34 35 36 37 38 39 40 41 42 43 44 45 46 47 48 49 50 51 52 53 54 55 56 57 58 59 60 61 "
         "62 63 64 65\n", "line 1", "more than 64 columns"},
    };
    for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++) {
        const char *p = write_file(bad[i].name, bad[i].text);
        const int st = clef_bandpowers_read(&bp, p);
        if (st != CLEF_EFORMAT)
            fail_msg("%s: status %d, expected CLEF_EFORMAT", bad[i].name, st);
        assert_null(bp);
        assert_msg(bad[i].name, bad[i].msg1);
        assert_msg(bad[i].msg1, bad[i].msg2);
    }

    /* Binary content that is not FITS. */
    const char *bin = test_path("binary.dat");
    FILE *f = fopen(bin, "wb");
    fwrite("100 3\0\1\2", 1, 9, f);
    fclose(f);
    assert_int_equal(clef_bandpowers_read(&bp, bin), CLEF_EFORMAT);
    assert_msg("binary.dat", "NUL");

    /* Truncated FITS: the first 4000 bytes of a valid file. */
    clef_bandpowers *good = make_table(40, 1);
    const char *full = test_path("full.fits");
    assert_int_equal(clef_bandpowers_write_fits(good, full), CLEF_OK);
    const char *cut = test_path("truncated.fits");
    assert_int_equal(run_cmd("head -c 4000 '%s' > '%s'", full, cut), 0);
    assert_int_equal(clef_bandpowers_read(&bp, cut), CLEF_EFORMAT);
    assert_null(bp);
    assert_msg("truncated.fits", "CFITSIO");
    /* Cut inside the covariance image (table complete). */
    assert_int_equal(run_cmd("head -c 14400 '%s' > '%s'", full, cut), 0);
    assert_int_equal(clef_bandpowers_read(&bp, cut), CLEF_EFORMAT);
    assert_msg("truncated.fits", "BANDCOV");

    /* A FITS file without the BANDPOWER extension (astropy writes it). */
    const char *other = test_path("other.fits");
    assert_int_equal(run_cmd("%s -c \"from astropy.io import fits; import numpy as np; "
                             "fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns("
                             "[fits.Column(name='X', format='D', array=np.arange(3.0))], name='OTHER')"
                             "]).writeto('%s')\"", ref_python(), other), 0);
    assert_int_equal(clef_bandpowers_read(&bp, other), CLEF_EFORMAT);
    assert_msg("other.fits", "BANDPOWER");
    /* A BANDPOWER table that lacks a column. */
    assert_int_equal(run_cmd("%s -c \"from astropy.io import fits; import numpy as np; "
                             "fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns("
                             "[fits.Column(name=n, format='D', array=np.arange(1.0, 4.0)) for n in "
                             "('LMIN', 'LMAX', 'LEFF', 'C_BAND', 'D_BAND')], name='BANDPOWER')"
                             "]).writeto('%s', overwrite=True)\"", ref_python(), other), 0);
    assert_int_equal(clef_bandpowers_read(&bp, other), CLEF_EFORMAT);
    assert_msg("other.fits", "D_SIGMA");

    /* Covariance files: wrong shape, bad number, not symmetric. */
    static const struct {
        const char *name, *text, *msg;
    } badcov[] = {
        {"cov_rows.csv", "1,0,0\n0,1,0\n", "2 covariance rows"},
        {"cov_cols.csv", "1,0,0\n0,1\n0,0,1\n", "line 2"},
        {"cov_num.csv", "# c\n1,0,0\n0,1,z\n0,0,1\n", "line 3 column 3"},
        {"cov_sym.csv", "1,0.5,0\n0,1,0\n0,0,1\n", "not symmetric"},
        {"cov_diag.csv", "1,0,0\n0,-1,0\n0,0,1\n", "diagonal element 2"},
    };
    clef_bandpowers *three = NULL;
    assert_int_equal(clef_bandpowers_alloc(&three, 3, 0), CLEF_OK);
    for (size_t i = 0; i < sizeof badcov / sizeof badcov[0]; i++) {
        const char *p = write_file(badcov[i].name, badcov[i].text);
        if (clef_bandpowers_read_cov(three, p) != CLEF_EFORMAT)
            fail_msg("%s accepted", badcov[i].name);
        assert_msg(badcov[i].name, badcov[i].msg);
        assert_null(three->cov);
    }
    assert_int_equal(clef_bandpowers_read_cov(three, test_path("no-cov.csv")), CLEF_EIO);
    clef_bandpowers_free(three);
    clef_bandpowers_free(good);
}

static void write_errors(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_table(4, 0);
    /* No folder: nothing written. */
    const char *nodir = test_path("no/such/dir/t.fits");
    assert_int_equal(clef_bandpowers_write_fits(bp, nodir), CLEF_EIO);
    assert_int_equal(clef_bandpowers_write_csv(bp, test_path("no/such/dir/t.csv")), CLEF_EIO);
    /* No covariance to write. */
    const char *cov = test_path("nocov.csv");
    assert_int_equal(clef_bandpowers_write_cov_csv(bp, cov), CLEF_EINVAL);
    assert_false(file_exists(cov));
    /* A non-finite value or a bad bin range is refused before any file exists. */
    bp->dl[2] = NAN;
    const char *nan = test_path("nan.fits");
    assert_int_equal(clef_bandpowers_write_fits(bp, nan), CLEF_EINVAL);
    assert_msg("bin 2", "d_band_uK2");
    assert_false(file_exists(nan));
    bp->dl[2] = 1;
    bp->l_hi[1] = bp->l_lo[1] - 1;
    assert_int_equal(clef_bandpowers_write_csv(bp, test_path("range.csv")), CLEF_EINVAL);
    assert_msg("bin 1", NULL);
    bp->l_hi[1] = bp->l_lo[1];
    bp->dl_err[0] = -1;
    assert_int_equal(clef_bandpowers_write_csv(bp, test_path("err.csv")), CLEF_EINVAL);
    assert_msg("negative error", NULL);
    bp->dl_err[0] = 1;

    /* A read-only folder: begin() fails, nothing left behind. */
    const char *ro = test_path("ro");
    assert_int_equal(mkdir(ro, 0555), 0);
    char ropath[1100];
    snprintf(ropath, sizeof ropath, "%s/t.fits", ro);
    if (geteuid() != 0) { /* root ignores permissions */
        assert_int_equal(clef_bandpowers_write_fits(bp, ropath), CLEF_EIO);
        assert_false(file_exists(ropath));
    }
    /* An existing output is replaced whole, and no temporary file is left. */
    const char *ok = test_path("replace.csv");
    assert_int_equal(clef_bandpowers_write_csv(bp, ok), CLEF_OK);
    assert_int_equal(clef_bandpowers_write_csv(bp, ok), CLEF_OK);
    char dir[1024];
    snprintf(dir, sizeof dir, "%s", ok);
    *strrchr(dir, '/') = '\0';
    assert_int_equal(count_tmp_files(dir), 0);
    clef_bandpowers_free(bp);
}

static void meta_rules(void **state)
{
    (void)state;
    clef_bandpowers *bp = NULL;
    assert_int_equal(clef_bandpowers_alloc(&bp, 0, 0), CLEF_EINVAL);
    assert_null(bp);
    assert_int_equal(clef_bandpowers_alloc(&bp, 2, 0), CLEF_OK);
    assert_int_equal(clef_bandpowers_meta_text(bp, "lower", "x", NULL), CLEF_EINVAL);
    assert_int_equal(clef_bandpowers_meta_text(bp, "TOOLONGKEY", "x", NULL), CLEF_EINVAL);
    assert_int_equal(clef_bandpowers_meta_text(bp, "", "x", NULL), CLEF_EINVAL);
    assert_int_equal(clef_bandpowers_meta_text(bp, "TTYPE3", "x", NULL), CLEF_EINVAL);
    assert_int_equal(clef_bandpowers_meta_text(bp, "EXTNAME", "x", NULL), CLEF_EINVAL);
    assert_int_equal(clef_bandpowers_meta_number(bp, "NAXIS", 1, NULL), CLEF_EINVAL);
    assert_int_equal(clef_bandpowers_meta_number(bp, "X", INFINITY, NULL), CLEF_EINVAL);
    assert_int_equal(clef_bandpowers_meta_number(bp, "X", NAN, NULL), CLEF_EINVAL);
    char big[300];
    memset(big, 'a', sizeof big - 1);
    big[sizeof big - 1] = '\0';
    assert_int_equal(clef_bandpowers_meta_text(bp, "BIG", big, NULL), CLEF_EINVAL);
    assert_int_equal(bp->nmeta, 0);
    /* Same key replaces; non-ASCII becomes '?'. */
    assert_int_equal(clef_bandpowers_meta_number(bp, "LMAXX", 1, "first"), CLEF_OK);
    assert_int_equal(clef_bandpowers_meta_number(bp, "LMAXX", 2.5, "second"), CLEF_OK);
    assert_int_equal(bp->nmeta, 1);
    assert_string_equal(clef_bandpowers_meta_get(bp, "LMAXX"), "2.5");
    assert_int_equal(clef_bandpowers_meta_text(bp, "PATH", "caf\xc3\xa9\n", NULL), CLEF_OK);
    assert_string_equal(clef_bandpowers_meta_get(bp, "PATH"), "caf???");
    assert_null(clef_bandpowers_meta_get(bp, "NONE"));
    clef_bandpowers_free(bp);
    clef_bandpowers_free(NULL);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(fits_round_trip),   cmocka_unit_test(csv_round_trip),
        cmocka_unit_test(astropy_reads_fits), cmocka_unit_test(fitsverify_passes),
        cmocka_unit_test(user_tables),       cmocka_unit_test(read_errors),
        cmocka_unit_test(write_errors),      cmocka_unit_test(meta_rules),
        cmocka_unit_test(foreign_fits),      cmocka_unit_test(windows_round_trip),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
