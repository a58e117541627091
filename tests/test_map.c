/* Tests of the map module: FITS round trips in every layout, NESTED->RING
 * against the HEALPix C library, scaled integer columns, gzip, bad pixels,
 * every bad input of the map reader, the mask check and the statistics.
 *
 * Reference FITS files are written here directly with CFITSIO (not with
 * clef's writer), so the reader is checked against an independent writer;
 * pixel renumbering is checked against chealpix ring2nest64, and statistics
 * against GSL's gsl_stats_* functions. */
#include "check.h"

#include <chealpix.h>
#include <dirent.h>
#include <sys/resource.h>
#include <fitsio.h>
#include <gsl/gsl_rng.h>
#include <gsl/gsl_randist.h>
#include <gsl/gsl_statistics_double.h>

#include "clef/map.h"
#include "map_impl.h"

/* ------------------------------------------------------------------------
 * A test-only FITS writer (CFITSIO), able to break every rule on purpose.
 * ------------------------------------------------------------------------ */
typedef struct tfile {
    long long nside_key;     /* value of NSIDE; < 0 omits the keyword */
    const char *ordering;    /* NULL omits ORDERING */
    const char *indxschm;    /* NULL omits INDXSCHM */
    const char *object;      /* NULL omits OBJECT */
    const char *coordsys;    /* NULL omits COORDSYS */
    const char *extname;     /* default "MAPDATA" */
    const char *colname;     /* default "SIGNAL" */
    const char *unit;        /* NULL: no TUNIT */
    int rowlen;              /* values per row (default 1) */
    int type;                /* TDOUBLE (default), TFLOAT or TSHORT (raw integers) */
    double tscal, tzero;     /* TSHORT only: physical = raw * tscal + tzero */
    int tnull;               /* TSHORT only: nonzero writes TNULL1 = -32768 */
    int64_t n;               /* number of values */
    const double *values;    /* physical values (TSHORT: already raw) */
    const long long *index;  /* explicit PIXEL values, or NULL for implicit */
} tfile;

static void write_tfile(const char *path, const tfile *t)
{
    fitsfile *f;
    int st = 0;
    char name[1100];
    snprintf(name, sizeof name, "!%s", path);
    fits_create_file(&f, name, &st);
    fits_create_img(f, BYTE_IMG, 0, NULL, &st);
    const int rowlen = t->rowlen > 0 ? t->rowlen : 1;
    const int type = t->type ? t->type : TDOUBLE;
    char vform[32], pform[32];
    snprintf(vform, sizeof vform, "%d%c", rowlen,
             type == TFLOAT ? 'E' : type == TSHORT ? 'I' : 'D');
    snprintf(pform, sizeof pform, "%dK", rowlen);
    char *ttype[2], *tform[2], *tunit[2];
    int ncol = 0, vcol;
    if (t->index) {
        ttype[ncol] = "PIXEL";
        tform[ncol] = pform;
        tunit[ncol++] = "";
    }
    ttype[ncol] = (char *)(t->colname ? t->colname : "SIGNAL");
    tform[ncol] = vform;
    tunit[ncol++] = (char *)(t->unit ? t->unit : "");
    vcol = ncol;
    fits_create_tbl(f, BINARY_TBL, 0, ncol, ttype, tform, tunit,
                    t->extname ? t->extname : "MAPDATA", &st);
    fits_write_key(f, TSTRING, "PIXTYPE", "HEALPIX", NULL, &st);
    if (t->nside_key >= 0)
        fits_write_key(f, TLONGLONG, "NSIDE", (void *)&t->nside_key, NULL, &st);
    if (t->ordering)
        fits_write_key(f, TSTRING, "ORDERING", (void *)t->ordering, NULL, &st);
    if (t->indxschm)
        fits_write_key(f, TSTRING, "INDXSCHM", (void *)t->indxschm, NULL, &st);
    if (t->object)
        fits_write_key(f, TSTRING, "OBJECT", (void *)t->object, NULL, &st);
    if (t->coordsys)
        fits_write_key(f, TSTRING, "COORDSYS", (void *)t->coordsys, NULL, &st);
    if (type == TSHORT) {
        char key[16];
        snprintf(key, sizeof key, "TSCAL%d", vcol);
        fits_write_key(f, TDOUBLE, key, (void *)&t->tscal, NULL, &st);
        snprintf(key, sizeof key, "TZERO%d", vcol);
        fits_write_key(f, TDOUBLE, key, (void *)&t->tzero, NULL, &st);
        if (t->tnull) {
            int tnull = -32768;
            snprintf(key, sizeof key, "TNULL%d", vcol);
            fits_write_key(f, TINT, key, &tnull, NULL, &st);
        }
        fits_set_hdustruc(f, &st);
        /* Write the raw integers: switch CFITSIO's scaling off. */
        fits_set_tscale(f, vcol, 1.0, 0.0, &st);
        short *raw = malloc((size_t)t->n * sizeof *raw);
        for (int64_t i = 0; i < t->n; i++)
            raw[i] = (short)t->values[i];
        fits_write_col(f, TSHORT, vcol, 1, 1, t->n, raw, &st);
        free(raw);
    } else {
        fits_write_col(f, TDOUBLE, vcol, 1, 1, t->n, (void *)t->values, &st);
    }
    if (t->index)
        fits_write_col(f, TLONGLONG, 1, 1, 1, t->n, (void *)t->index, &st);
    fits_close_file(f, &st);
    if (st) {
        fits_report_error(stderr, st);
        fail_msg("test writer failed on %s", path);
    }
}

/* Random Gaussian values (GSL mt19937, fixed seed), offset so that the
 * mean and rms are distinct. */
static double *random_values(int64_t n, unsigned long seed)
{
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(rng, seed);
    double *v = malloc((size_t)n * sizeof *v);
    for (int64_t i = 0; i < n; i++)
        v[i] = 3.0 + gsl_ran_gaussian(rng, 100.0);
    gsl_rng_free(rng);
    return v;
}

/* 1 if the scratch folder holds no leftover temporary output. */
static int no_temporaries(void)
{
    char dir[1024];
    snprintf(dir, sizeof dir, "%s", test_path("x"));
    *strrchr(dir, '/') = '\0';
    DIR *d = opendir(dir);
    if (!d)
        return 1;
    struct dirent *e;
    int clean = 1;
    while ((e = readdir(d)))
        if (strstr(e->d_name, ".clef-tmp."))
            clean = 0;
    closedir(d);
    return clean;
}

/* Read `in` expecting failure `code` with `needle` in the message; the
 * reader's result would go to a fresh output, which must not appear. */
static void expect_read_fail(const char *in_arg, const clef_map_read_opts *o, int code,
                             const char *needle)
{
    char in[1024];
    snprintf(in, sizeof in, "%s", in_arg);
    char out[1024];
    snprintf(out, sizeof out, "%s", test_path("must-not-exist.fits"));
    clef_map *m = (clef_map *)1;
    const int st = clef_map_read(&m, in, o);
    if (st == CLEF_OK) {
        clef_map_write(m, out, NULL);
        clef_map_free(m);
        fail_msg("reading %s should fail with %d (%s)", in, code, needle);
    }
    assert_null(m);
    if (st != code || !strstr(clef_last_error(), needle))
        fail_msg("reading %s: expected status %d with '%s', got %d: %s", in, code, needle, st,
                 clef_last_error());
    assert_false(file_exists(out));
    assert_true(no_temporaries());
}

/* ------------------------------------------------------------------------
 * Round trips
 * ------------------------------------------------------------------------ */

/* clef's writer then clef's reader: RING, 1 and 1024 values per row, float64
 * and float32; invalid pixels come back invalid; metadata survive. */
static void test_roundtrip_ring(void **state)
{
    (void)state;
    const int64_t nside = 16;
    clef_map *m;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    double *v = random_values(m->npix, 11);
    memcpy(m->pix, v, (size_t)m->npix * sizeof *v);
    for (int64_t p = 0; p < m->npix; p += 97) {
        m->valid[p] = 0;
        m->pix[p] = 0.0;
    }
    strcpy(m->coordsys, "G");
    strcpy(m->unit, "uK");
    const int rowlens[] = {1, 1024};
    for (int ir = 0; ir < 2; ir++) {
        for (int single = 0; single <= 1; single++) {
            char path[1024];
    snprintf(path, sizeof path, "%s", test_path("rt.fits"));
            clef_map_write_opts wo = {.row_length = rowlens[ir], .single_precision = single,
                                      .column = "TEMP", .history = "test round trip"};
            assert_int_equal(clef_map_write(m, path, &wo), CLEF_OK);
            clef_map *r;
            assert_int_equal(clef_map_read(&r, path, NULL), CLEF_OK);
            assert_int_equal(r->nside, nside);
            assert_int_equal(r->file_ordering, CLEF_RING);
            assert_string_equal(r->coordsys, "G");
            assert_string_equal(r->unit, "uK");
            assert_string_equal(r->column, "TEMP");
            int64_t nmiss = 0;
            for (int64_t p = 0; p < m->npix; p++) {
                assert_int_equal(r->valid[p], m->valid[p]);
                nmiss += !m->valid[p];
                if (m->valid[p])
                    check_rel(r->pix[p], m->pix[p], single ? 6e-8 : 0.0,
                              "float32 rounding (IEEE 754 binary32)");
                else
                    assert_true(r->pix[p] == 0.0);
            }
            assert_int_equal(r->nmissing, nmiss);
            assert_int_equal(r->nbad, nmiss);
            clef_map_free(r);
            /* The header alone: what clef_map_read gives, without values. */
            assert_int_equal(clef_map_read_header(&r, path, NULL), CLEF_OK);
            assert_int_equal(r->nside, nside);
            assert_int_equal(r->npix, 12 * nside * nside);
            assert_string_equal(r->coordsys, "G");
            assert_string_equal(r->unit, "uK");
            assert_string_equal(r->column, "TEMP");
            assert_int_equal(r->hdu, 1);
            assert_null(r->pix);
            assert_null(r->valid);
            clef_map_free(r);
            assert_true(no_temporaries());
        }
    }
    free(v);
    clef_map_free(m);
}

/* A NESTED file written by the test's own CFITSIO writer: pixel p of the
 * file holds value[p]; clef must put it at RING index nest2ring(p).  Checked
 * in the other direction with chealpix ring2nest64.  nside 512 with 768
 * values per row makes the 1M-value chunks straddle rows. */
static void test_nested_to_ring(void **state)
{
    (void)state;
    const int64_t nsides[] = {1, 2, 16, 512};
    const int rowlens[] = {1, 4, 1024, 768};
    for (int k = 0; k < 4; k++) {
        const int64_t nside = nsides[k], npix = 12 * nside * nside;
        double *v = random_values(npix, 20 + (unsigned long)k);
        char path[1024];
    snprintf(path, sizeof path, "%s", test_path("nest.fits"));
        tfile t = {.nside_key = nside, .ordering = "NESTED", .indxschm = "IMPLICIT",
                   .coordsys = "C", .rowlen = rowlens[k], .n = npix, .values = v};
        write_tfile(path, &t);
        clef_map *m;
        assert_int_equal(clef_map_read(&m, path, NULL), CLEF_OK);
        assert_int_equal(m->file_ordering, CLEF_NESTED);
        assert_int_equal(m->nmissing, 0);
        assert_string_equal(m->coordsys, "C");
        for (int64_t r = 0; r < npix; r++) {
            int64_t nest;
            ring2nest64(nside, r, &nest); /* HEALPix C library */
            if (m->pix[r] != v[nest])
                fail_msg("nside %lld RING %lld: got %g, expected file NESTED %lld = %g",
                         (long long)nside, (long long)r, m->pix[r], (long long)nest, v[nest]);
        }
        clef_map_free(m);
        free(v);
    }
}

/* Explicit-index partial tables, RING and NESTED, with a bad value among
 * the listed pixels. */
static void test_explicit_partial(void **state)
{
    (void)state;
    const int64_t nside = 8, npix = 12 * nside * nside;
    const int64_t n = 100;
    long long idx[100];
    double val[100];
    for (int64_t i = 0; i < n; i++) {
        idx[i] = (i * 7 + 3) % npix; /* distinct since 7 is prime to 768 */
        val[i] = 0.25 * (double)i - 5.0;
    }
    val[10] = NAN;
    for (int nested = 0; nested <= 1; nested++) {
        char path[1024];
    snprintf(path, sizeof path, "%s", test_path("partial.fits"));
        tfile t = {.nside_key = nside, .ordering = nested ? "NESTED" : "RING",
                   .indxschm = "EXPLICIT", .object = "PARTIAL", .n = n, .values = val,
                   .index = idx, .colname = "I_STOKES"};
        write_tfile(path, &t);
        clef_map *m;
        assert_int_equal(clef_map_read(&m, path, NULL), CLEF_OK);
        assert_string_equal(m->column, "I_STOKES");
        assert_int_equal(m->nbad, 1);
        assert_int_equal(m->nmissing, npix - n + 1);
        int64_t nvalid = 0;
        for (int64_t p = 0; p < npix; p++)
            nvalid += m->valid[p];
        assert_int_equal(nvalid, n - 1);
        for (int64_t i = 0; i < n; i++) {
            int64_t r = idx[i];
            if (nested)
                nest2ring64(nside, idx[i], &r); /* HEALPix C library */
            if (i == 10) {
                assert_int_equal(m->valid[r], 0);
                continue;
            }
            assert_int_equal(m->valid[r], 1);
            assert_true(m->pix[r] == val[i]);
        }
        clef_map_free(m);
    }
    /* OBJECT='PARTIAL' without INDXSCHM also means explicit; the value
     * column can be chosen by number (column 2 here). */
    char path[1024];
    snprintf(path, sizeof path, "%s", test_path("partial2.fits"));
    tfile t = {.nside_key = nside, .ordering = "RING", .object = "PARTIAL", .n = n,
               .values = val, .index = idx};
    write_tfile(path, &t);
    clef_map *m;
    clef_map_read_opts o = {.column = "2"};
    assert_int_equal(clef_map_read(&m, path, &o), CLEF_OK);
    assert_int_equal(m->nmissing, npix - n + 1);
    clef_map_free(m);
}

/* A 16-bit integer column with TSCAL/TZERO and TNULL: CFITSIO applies the
 * scaling (FITS standard 4.0, section 7.3.2: physical = TZERO + TSCAL * raw)
 * and the TNULL value becomes a missing pixel. */
static void test_scaled_integer(void **state)
{
    (void)state;
    const int64_t nside = 4, npix = 192;
    double raw[192];
    for (int64_t i = 0; i < npix; i++)
        raw[i] = (double)(i * 200 - 19000);
    raw[5] = -32768; /* TNULL */
    char path[1024];
    snprintf(path, sizeof path, "%s", test_path("int.fits"));
    tfile t = {.nside_key = nside, .ordering = "RING", .type = TSHORT, .tscal = 0.5,
               .tzero = 100.0, .tnull = 1, .n = npix, .values = raw, .rowlen = 64};
    write_tfile(path, &t);
    clef_map *m;
    assert_int_equal(clef_map_read(&m, path, NULL), CLEF_OK);
    for (int64_t p = 0; p < npix; p++) {
        if (p == 5) {
            assert_int_equal(m->valid[p], 0);
            continue;
        }
        check_rel(m->pix[p], 100.0 + 0.5 * raw[p], 1e-15, "FITS 4.0 sec. 7.3.2 TSCAL/TZERO");
    }
    assert_int_equal(m->nbad, 1);
    clef_map_free(m);
}

/* gzip-compressed input is read transparently (CFITSIO decompresses);
 * gzip output when the name ends in .gz. */
static void test_gzip(void **state)
{
    (void)state;
    clef_map *m;
    assert_int_equal(clef_map_alloc(&m, 8), CLEF_OK);
    double *v = random_values(m->npix, 5);
    memcpy(m->pix, v, (size_t)m->npix * sizeof *v);
    char plain[1024];
    snprintf(plain, sizeof plain, "%s", test_path("gz.fits"));
    assert_int_equal(clef_map_write(m, plain, NULL), CLEF_OK);
    assert_int_equal(run_cmd("gzip -f '%s'", plain), 0);
    char gz[1024];
    snprintf(gz, sizeof gz, "%s", test_path("gz.fits.gz"));
    clef_map *r;
    assert_int_equal(clef_map_read(&r, gz, NULL), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++)
        assert_true(r->pix[p] == m->pix[p]);
    clef_map_free(r);

    /* clef writes gzip itself when the name ends in .gz (RFC 1952 magic
     * bytes 1f 8b), and reads it back. */
    char outgz[1024];
    snprintf(outgz, sizeof outgz, "%s", test_path("written.fits.gz"));
    clef_map_write_opts wo = {.row_length = 64, .single_precision = 1};
    assert_int_equal(clef_map_write(m, outgz, &wo), CLEF_OK);
    FILE *f = fopen(outgz, "rb");
    unsigned char magic[2] = {0};
    assert_int_equal(fread(magic, 1, 2, f), 2);
    fclose(f);
    assert_true(magic[0] == 0x1f && magic[1] == 0x8b);
    assert_int_equal(clef_map_read(&r, outgz, NULL), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++)
        check_rel(r->pix[p], m->pix[p], 6e-8, "float32 rounding (IEEE 754 binary32)");
    clef_map_free(r);
    assert_true(no_temporaries());
    /* A folder whose name holds ".gz" would defeat CFITSIO's suffix test. */
    char gzdir[1024], inside[1100];
    snprintf(gzdir, sizeof gzdir, "%s", test_path("odd.gz"));
    assert_int_equal(mkdir(gzdir, 0700), 0);
    snprintf(inside, sizeof inside, "%s/m.fits.gz", gzdir);
    assert_int_equal(clef_map_write(m, inside, NULL), CLEF_EUNSUP);
    assert_int_equal(run_cmd("rmdir '%s'", gzdir), 0); /* fails if anything was left */
    clef_map_free(m);
    free(v);
}

/* The sentinel -1.6375e30 stored as float32 (reads back as -1.6374999963e30,
 * METHODS.md section 1), NaN, and a file-specific BAD_DATA value are all
 * missing. */
static void test_bad_values(void **state)
{
    (void)state;
    const int64_t nside = 2, npix = 48;
    double v[48];
    for (int64_t i = 0; i < npix; i++)
        v[i] = (double)i;
    v[3] = -1.6375e30;
    v[7] = NAN;
    v[8] = -1.6375e30 * (1 + 2e-6);
    v[9] = -1.6375e30 * (1 + 1e-3); /* too far from the sentinel: a value */
    char path[1024];
    snprintf(path, sizeof path, "%s", test_path("bad.fits"));
    tfile t = {.nside_key = nside, .ordering = "RING", .type = TFLOAT, .n = npix, .values = v};
    write_tfile(path, &t);
    clef_map *m;
    assert_int_equal(clef_map_read(&m, path, NULL), CLEF_OK);
    assert_int_equal(m->nbad, 3);
    assert_int_equal(m->nmissing, 3);
    assert_int_equal(m->valid[3] + m->valid[7] + m->valid[8], 0);
    assert_int_equal(m->valid[9], 1);
    assert_true(m->pix[3] == 0.0 && m->pix[7] == 0.0);
    clef_map_stats st;
    assert_int_equal(clef_map_stats_compute(m, &st), CLEF_OK);
    assert_int_equal(st.nvalid, 45);
    clef_map_free(m);
}

/* Statistics against GSL (gsl_stats_mean, gsl_stats_sd_with_fixed_mean,
 * gsl_stats_minmax) on the valid pixels. */
static void test_stats(void **state)
{
    (void)state;
    clef_map *m;
    assert_int_equal(clef_map_alloc(&m, 16), CLEF_OK);
    double *v = random_values(m->npix, 99);
    memcpy(m->pix, v, (size_t)m->npix * sizeof *v);
    double *good = malloc((size_t)m->npix * sizeof *good);
    size_t n = 0;
    for (int64_t p = 0; p < m->npix; p++) {
        if (p % 5 == 0) {
            m->valid[p] = 0;
            m->pix[p] = 0.0;
        } else {
            good[n++] = v[p];
        }
    }
    clef_map_stats st;
    assert_int_equal(clef_map_stats_compute(m, &st), CLEF_OK);
    const double mean = gsl_stats_mean(good, 1, n);
    double lo, hi;
    gsl_stats_minmax(&lo, &hi, good, 1, n);
    assert_int_equal(st.nvalid, (int64_t)n);
    assert_int_equal(st.nmissing, m->npix - (int64_t)n);
    check_rel(st.fsky, (double)n / (double)m->npix, 1e-15, "definition");
    check_rel(st.mean, mean, 1e-12, "GSL gsl_stats_mean");
    check_rel(st.stddev, gsl_stats_sd_with_fixed_mean(good, 1, n, mean), 1e-12,
              "GSL gsl_stats_sd_with_fixed_mean");
    check_rel(st.rms, gsl_stats_sd_with_fixed_mean(good, 1, n, 0.0), 1e-12,
              "GSL gsl_stats_sd_with_fixed_mean about 0");
    assert_true(st.min == lo && st.max == hi);
    memset(m->valid, 0, (size_t)m->npix);
    assert_int_equal(clef_map_stats_compute(m, &st), CLEF_OK);
    assert_int_equal(st.nvalid, 0);
    assert_true(isnan(st.mean));
    free(good);
    free(v);
    clef_map_free(m);
}

/* HDU by number and by EXTNAME, column by name and number. */
static void test_selection(void **state)
{
    (void)state;
    char path[1024];
    snprintf(path, sizeof path, "%s", test_path("multi.fits"));
    double v[48];
    for (int i = 0; i < 48; i++)
        v[i] = i;
    tfile t = {.nside_key = 2, .ordering = "RING", .n = 48, .values = v, .extname = "FIRST",
               .colname = "A"};
    write_tfile(path, &t);
    /* Append a second table with two columns. */
    fitsfile *f;
    int st = 0;
    fits_open_file(&f, path, READWRITE, &st);
    char *tt[] = {"B", "C"}, *tf[] = {"D", "D"}, *tu[] = {"", "K"};
    fits_create_tbl(f, BINARY_TBL, 0, 2, tt, tf, tu, "Second", &st);
    long long ns = 2;
    fits_write_key(f, TLONGLONG, "NSIDE", &ns, NULL, &st);
    fits_write_key(f, TSTRING, "ORDERING", "RING", NULL, &st);
    double w[48];
    for (int i = 0; i < 48; i++)
        w[i] = 1000 + i;
    fits_write_col(f, TDOUBLE, 1, 1, 1, 48, v, &st);
    fits_write_col(f, TDOUBLE, 2, 1, 1, 48, w, &st);
    fits_close_file(f, &st);
    assert_int_equal(st, 0);

    clef_map *m;
    clef_map_read_opts o = {.hdu = "second", .column = "c"};
    assert_int_equal(clef_map_read(&m, path, &o), CLEF_OK);
    assert_true(m->pix[3] == 1003.0);
    assert_string_equal(m->unit, "K");
    clef_map_free(m);
    o = (clef_map_read_opts){.hdu = "2", .column = "2"};
    assert_int_equal(clef_map_read(&m, path, &o), CLEF_OK);
    assert_true(m->pix[3] == 1003.0);
    clef_map_free(m);
    assert_int_equal(clef_map_read(&m, path, NULL), CLEF_OK);
    assert_true(m->pix[3] == 3.0);
    assert_string_equal(m->column, "A");
    clef_map_free(m);

    o = (clef_map_read_opts){.hdu = "3"};
    expect_read_fail(path, &o, CLEF_EINVAL, "no extension 3");
    o = (clef_map_read_opts){.hdu = "THIRD"};
    expect_read_fail(path, &o, CLEF_EINVAL, "no extension named 'THIRD'");
    o = (clef_map_read_opts){.hdu = "0"};
    expect_read_fail(path, &o, CLEF_EINVAL, "start at 1");
    o = (clef_map_read_opts){.column = "TEMPERATURE"};
    expect_read_fail(path, &o, CLEF_EINVAL, "no column named 'TEMPERATURE'");
    o = (clef_map_read_opts){.column = "3"};
    expect_read_fail(path, &o, CLEF_EINVAL, "no column 3");
}

/* ORDERING missing: refused unless the caller supplies it; a supplied
 * ordering that contradicts the file is refused. */
static void test_ordering_keyword(void **state)
{
    (void)state;
    double v[48];
    for (int i = 0; i < 48; i++)
        v[i] = i;
    char path[1024];
    snprintf(path, sizeof path, "%s", test_path("noord.fits"));
    tfile t = {.nside_key = 2, .n = 48, .values = v};
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "ORDERING is missing");
    clef_map *m;
    clef_map_read_opts o = {.ordering = "nested"};
    assert_int_equal(clef_map_read(&m, path, &o), CLEF_OK);
    assert_int_equal(m->file_ordering, CLEF_NESTED);
    clef_map_free(m);
    o.ordering = "SPIRAL";
    expect_read_fail(path, &o, CLEF_EINVAL, "expected RING or NESTED");
    t.ordering = "RING";
    write_tfile(path, &t);
    o.ordering = "NESTED";
    expect_read_fail(path, &o, CLEF_EINVAL, "ORDERING = 'RING' but ordering NESTED");
    t.ordering = "ZORDER";
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "ORDERING = 'ZORDER'");
}

/* ------------------------------------------------------------------------
 * Bad inputs (issue list): each gives its status, a message naming the
 * culprit, and no output.
 * ------------------------------------------------------------------------ */

static void write_bytes(const char *path, const void *data, size_t n)
{
    FILE *f = fopen(path, "wb");
    assert_non_null(f);
    if (n)
        assert_int_equal(fwrite(data, 1, n, f), n);
    fclose(f);
}

/* clef_map_read_header refuses what the header or the file's size already
 * condemns, with clef_map_read's status and message. */
static void expect_header_fail(const char *in, int code, const char *needle)
{
    clef_map *m = (clef_map *)1;
    const int st = clef_map_read_header(&m, in, NULL);
    assert_null(m);
    if (st != code || !strstr(clef_last_error(), needle))
        fail_msg("header of %s: status %d (expected %d), message '%s' (expected '%s')", in, st,
                 code, clef_last_error(), needle);
}

static void test_bad_files(void **state)
{
    (void)state;
    expect_read_fail(test_path("does-not-exist.fits"), NULL, CLEF_EIO, "cannot open");
    expect_header_fail(test_path("does-not-exist.fits"), CLEF_EIO, "cannot open");
    expect_read_fail(test_path(""), NULL, CLEF_EIO, "folder");

    char empty[1024];
    snprintf(empty, sizeof empty, "%s", test_path("empty.fits"));
    write_bytes(empty, "", 0);
    expect_read_fail(empty, NULL, CLEF_EFORMAT, "empty");

    char text[1024];
    snprintf(text, sizeof text, "%s", test_path("text.fits"));
    const char *words = "this is a plain text file, not FITS\n";
    write_bytes(text, words, strlen(words));
    expect_read_fail(text, NULL, CLEF_EFORMAT, "not a FITS file");
    expect_header_fail(text, CLEF_EFORMAT, "not a FITS file");

    /* A valid map cut short: in the header, and in the data. */
    clef_map *m;
    assert_int_equal(clef_map_alloc(&m, 16), CLEF_OK);
    double *v = random_values(m->npix, 3);
    memcpy(m->pix, v, (size_t)m->npix * sizeof *v);
    free(v);
    char good[1024];
    snprintf(good, sizeof good, "%s", test_path("good.fits"));
    assert_int_equal(clef_map_write(m, good, NULL), CLEF_OK);
    clef_map_free(m);
    FILE *f = fopen(good, "rb");
    static char bytes[64 * 2880];
    const size_t n = fread(bytes, 1, sizeof bytes, f);
    fclose(f);
    assert_true(n > 5 * 2880);
    char trunc[1024];
    snprintf(trunc, sizeof trunc, "%s", test_path("trunc.fits"));
    write_bytes(trunc, bytes, 1000);
    expect_read_fail(trunc, NULL, CLEF_EFORMAT, "truncated");
    write_bytes(trunc, bytes, 2880 + 1000);
    expect_read_fail(trunc, NULL, CLEF_EFORMAT, trunc);
    write_bytes(trunc, bytes, n - 2 * 2880);
    expect_read_fail(trunc, NULL, CLEF_EFORMAT, "the file is truncated");
    expect_header_fail(trunc, CLEF_EFORMAT, "the file is truncated");

    /* A truncated gzip stream. */
    assert_int_equal(run_cmd("gzip -c '%s' | head -c 3000 > '%s.gz'", good, trunc), 0);
    char tgz[1100];
    snprintf(tgz, sizeof tgz, "%s.gz", trunc);
    expect_read_fail(tgz, NULL, CLEF_EFORMAT, "truncated");

    /* A FITS file with only an image, and one with an ASCII table. */
    char img[1024];
    snprintf(img, sizeof img, "%s", test_path("image.fits"));
    fitsfile *ff;
    int fst = 0;
    char name[1100];
    snprintf(name, sizeof name, "!%s", img);
    fits_create_file(&ff, name, &fst);
    long naxes[2] = {10, 10};
    fits_create_img(ff, FLOAT_IMG, 2, naxes, &fst);
    char *tt[] = {"X"}, *tf[] = {"F8.2"};
    fits_create_tbl(ff, ASCII_TBL, 1, 1, tt, tf, NULL, "ASCII", &fst);
    fits_close_file(ff, &fst);
    assert_int_equal(fst, 0);
    expect_read_fail(img, NULL, CLEF_EFORMAT, "no binary-table extension");
    const clef_map_read_opts o1 = {.hdu = "1"};
    expect_read_fail(img, &o1, CLEF_EFORMAT, "is not a binary table");
}

static void test_bad_nside(void **state)
{
    (void)state;
    double v[1728];
    for (int i = 0; i < 1728; i++)
        v[i] = i;
    char path[1024];
    snprintf(path, sizeof path, "%s", test_path("nside.fits"));
    tfile t = {.nside_key = -1, .ordering = "RING", .n = 48, .values = v};
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "NSIDE is missing");

    t.nside_key = 12; /* 12 * 12^2 = 1728 values: consistent but not a power of two */
    t.n = 1728;
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "NSIDE = 12 is not a power of two");

    t.nside_key = 16384;
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "NSIDE = 16384 is outside");

    t.nside_key = 0;
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "NSIDE = 0");

    t.nside_key = 4; /* 192 pixels, but 1728 values */
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "NSIDE = 4 implies 192 pixels");

    t.nside_key = 2; /* 48 pixels, 1728 values in an explicit table */
    long long idx[1728];
    for (int i = 0; i < 1728; i++)
        idx[i] = i;
    t.index = idx;
    t.indxschm = "EXPLICIT";
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "NSIDE = 2 implies 48 pixels");
}

static void test_bad_explicit(void **state)
{
    (void)state;
    double v[10];
    long long idx[10];
    for (int i = 0; i < 10; i++) {
        v[i] = i;
        idx[i] = 2 * i;
    }
    char path[1024];
    snprintf(path, sizeof path, "%s", test_path("expl.fits"));
    tfile t = {.nside_key = 2, .ordering = "RING", .indxschm = "EXPLICIT", .n = 10,
               .values = v, .index = idx};
    idx[6] = 48; /* nside 2 has pixels 0..47 */
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "PIXEL index 48 in row 7 is out of range");
    idx[6] = -1;
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "PIXEL index -1 in row 7");
    idx[6] = 4; /* already in row 3 */
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "PIXEL index 4 in row 7 is repeated");
    /* A NESTED table: the indices are checked the same way. */
    idx[6] = 12;
    t.ordering = "NESTED";
    write_tfile(path, &t);
    clef_map *m;
    assert_int_equal(clef_map_read(&m, path, NULL), CLEF_OK);
    clef_map_free(m);
    idx[7] = 12;
    write_tfile(path, &t);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "PIXEL index 12 in row 8 is repeated");
    /* EXPLICIT without a PIXEL column. */
    tfile u = {.nside_key = 2, .ordering = "RING", .indxschm = "EXPLICIT", .n = 10,
               .values = v};
    write_tfile(path, &u);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "has no PIXEL column");
}

/* A table made by hand with CFITSIO: columns given as TTYPE/TFORM pairs,
 * keywords as KEY=VALUE strings (value parsed by CFITSIO as a card). */
static void write_custom(const char *path, int ncol, char **ttype, char **tform,
                         const char **cards, int ncards)
{
    fitsfile *f;
    int st = 0;
    char name[1100];
    snprintf(name, sizeof name, "!%s", path);
    fits_create_file(&f, name, &st);
    fits_create_img(f, BYTE_IMG, 0, NULL, &st);
    fits_create_tbl(f, BINARY_TBL, 0, ncol, ttype, tform, NULL, "CUSTOM", &st);
    for (int i = 0; i < ncards; i++)
        fits_write_record(f, cards[i], &st);
    fits_close_file(f, &st);
    assert_int_equal(st, 0);
}

/* Rarer format errors and header variants: a text column, a variable-length
 * column, an unknown INDXSCHM, another PIXTYPE, PIXEL and value columns of different
 * widths, a non-integer NSIDE, long COORDSYS names, an unknown COORDSYS,
 * a file-specific BAD_DATA value, a wrong NPIX (ignored). */
static void test_header_variants(void **state)
{
    (void)state;
    char path[1024];
    snprintf(path, sizeof path, "%s", test_path("custom.fits"));
    char *tt1[] = {"NAME"}, *tf1[] = {"8A"};
    const char *ring[] = {"NSIDE   =                    1", "ORDERING= 'RING    '"};
    write_custom(path, 1, tt1, tf1, ring, 2);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "column 1 (NAME) is not numeric");

    char *tf2[] = {"1PE(12)"};
    write_custom(path, 1, tt1, tf2, ring, 2);
    expect_read_fail(path, NULL, CLEF_EUNSUP, "variable-length");

    const char *odd[] = {"NSIDE   =                    1", "ORDERING= 'RING    '",
                         "INDXSCHM= 'SPARSE  '"};
    char *tt3[] = {"T"}, *tf3[] = {"D"};
    write_custom(path, 1, tt3, tf3, odd, 3);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "INDXSCHM = 'SPARSE'");

    const char *expl[] = {"NSIDE   =                    1", "ORDERING= 'RING    '",
                          "INDXSCHM= 'EXPLICIT'"};
    char *tt4[] = {"PIXEL", "T"}, *tf4[] = {"2K", "4D"};
    write_custom(path, 2, tt4, tf4, expl, 3);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "the PIXEL column has 2 values per row");
    const clef_map_read_opts pixsel = {.column = "PIXEL"};
    expect_read_fail(path, &pixsel, CLEF_EINVAL, "is the PIXEL index");

    const char *grid[] = {"PIXTYPE = 'GLESP   '", "NSIDE   =                    1",
                          "ORDERING= 'RING    '"};
    write_custom(path, 1, tt3, tf3, grid, 3);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "PIXTYPE = 'GLESP', not a HEALPix map");

    const char *fl[] = {"NSIDE   =                  2.5", "ORDERING= 'RING    '"};
    write_custom(path, 1, tt3, tf3, fl, 2);
    expect_read_fail(path, NULL, CLEF_EFORMAT, "NSIDE = '2.5' is not an integer");

    /* Header variants that are accepted. */
    const double vals[] = {1, 2, -99, 4, 5, 6, 7, 8, 9, 10, 11, 12};
    const char *coords[][2] = {{"GALACTIC", "G"}, {"ECLIPTIC", "E"}, {"EQUATORIAL", "C"},
                               {"Q", "C"}, {"HORIZON", ""}};
    for (int i = 0; i < 5; i++) {
        char c1[81], c2[81];
        snprintf(c1, sizeof c1, "COORDSYS= '%s'", coords[i][0]);
        snprintf(c2, sizeof c2, "NPIX    =                   %d", 13);
        const char *cards[] = {"NSIDE   =                    1", "ORDERING= 'NESTED'", c1, c2,
                               "BAD_DATA=                  -99"};
        write_custom(path, 1, tt3, tf3, cards, 5);
        fitsfile *f;
        int st = 0;
        fits_open_file(&f, path, READWRITE, &st);
        fits_movabs_hdu(f, 2, NULL, &st);
        fits_write_col(f, TDOUBLE, 1, 1, 1, 12, (void *)vals, &st);
        fits_close_file(f, &st);
        assert_int_equal(st, 0);
        clef_map *m;
        assert_int_equal(clef_map_read(&m, path, NULL), CLEF_OK);
        assert_string_equal(m->coordsys, coords[i][1]);
        assert_int_equal(m->nbad, 1);
        assert_int_equal(m->nside, 1);
        clef_map_free(m);
    }

    clef_map_stats stt;
    assert_int_equal(clef_map_stats_compute(NULL, &stt), CLEF_EINVAL);
    clef_map *c = (clef_map *)1;
    assert_int_equal(clef_map_copy(&c, NULL), CLEF_EINVAL);
    assert_null(c);
    assert_int_equal(clef_map_read(&c, NULL, NULL), CLEF_EINVAL);
    assert_int_equal(clef_map_write(NULL, path, NULL), CLEF_EINVAL);
    assert_int_equal(clef_nside_valid(8192), 1);
    assert_int_equal(clef_nside_valid(16384), 0);
    assert_int_equal(clef_nside_valid(0), 0);
    assert_int_equal(clef_nside_valid(6), 0);
    assert_true(clef_nside_npix(8192) == 805306368LL); /* 12 * 8192^2 > 2^31 */
}

/* ------------------------------------------------------------------------
 * Writing failures and the mask check
 * ------------------------------------------------------------------------ */

static void test_write_errors(void **state)
{
    (void)state;
    clef_map *m;
    assert_int_equal(clef_map_alloc(&m, 4), CLEF_OK);
    char out[1024];
    snprintf(out, sizeof out, "%s", test_path("w.fits"));
    clef_map_write_opts o = {.row_length = 100};
    assert_int_equal(clef_map_write(m, out, &o), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "does not divide"));
    assert_false(file_exists(out));
    assert_int_equal(clef_map_write(m, test_path("no/such/dir/w.fits"), NULL), CLEF_EIO);
    assert_true(no_temporaries());
    /* An existing file is replaced atomically. */
    write_bytes(out, "old", 3);
    assert_int_equal(clef_map_write(m, out, NULL), CLEF_OK);
    clef_map *r;
    assert_int_equal(clef_map_read(&r, out, NULL), CLEF_OK);
    clef_map_free(r);
    clef_map_free(m);
    assert_int_equal(clef_map_alloc(&m, 3), CLEF_EINVAL);
    assert_null(m);
}

static void test_check_mask(void **state)
{
    (void)state;
    clef_map *map, *mask, *mask2;
    assert_int_equal(clef_map_alloc(&map, 8), CLEF_OK);
    assert_int_equal(clef_map_alloc(&mask, 8), CLEF_OK);
    assert_int_equal(clef_map_alloc(&mask2, 4), CLEF_OK);
    for (int64_t p = 0; p < mask->npix; p++)
        mask->pix[p] = (double)(p % 3) / 2.0;
    assert_int_equal(clef_map_check_mask(map, "a.fits", mask, "m.fits", 0), CLEF_OK);

    assert_int_equal(clef_map_check_mask(map, "a.fits", mask2, "m4.fits", 0), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "'a.fits' has nside 8"));
    assert_non_null(strstr(clef_last_error(), "'m4.fits' has nside 4"));

    strcpy(map->coordsys, "G");
    strcpy(mask->coordsys, "C");
    assert_int_equal(clef_map_check_mask(map, "a.fits", mask, "m.fits", 0), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "COORDSYS"));
    assert_int_equal(clef_map_check_mask(map, "a.fits", mask, "m.fits", 1), CLEF_OK);
    mask->coordsys[0] = '\0';
    assert_int_equal(clef_map_check_mask(map, "a.fits", mask, "m.fits", 0), CLEF_OK);

    mask->pix[77] = -0.25;
    assert_int_equal(clef_map_check_mask(map, NULL, mask, "m.fits", 0), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "value -0.25 at RING pixel 77"));
    mask->pix[77] = 1.5;
    assert_int_equal(clef_map_check_mask(map, NULL, mask, "m.fits", 0), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "value 1.5 at RING pixel 77"));
    /* An invalid mask pixel is not observed, whatever it holds. */
    mask->valid[77] = 0;
    assert_int_equal(clef_map_check_mask(map, NULL, mask, "m.fits", 0), CLEF_OK);

    clef_map *c;
    assert_int_equal(clef_map_copy(&c, mask), CLEF_OK);
    assert_true(c->pix != mask->pix && c->pix[5] == mask->pix[5] && c->valid[77] == 0);
    clef_map_free(c);
    clef_map_free(map);
    clef_map_free(mask);
    clef_map_free(mask2);
    clef_map_free(NULL);
}

/* Resource limits.  A header that promises a huge map from a tiny file is
 * refused as malformed before any map-sized allocation; a legitimate map
 * too large for the memory limit is CLEF_ENOMEM with the size asked for.
 * The child runs under RLIMIT_AS = 1 GiB (as `ulimit -v` does), so a
 * 7.2 GB allocation attempt would fail there: EFORMAT proves none was made. */
static void expect_child(const char *path, int code, const char *n1, const char *n2)
{
    fflush(NULL);
    const pid_t pid = fork();
    assert_true(pid >= 0);
    if (pid == 0) {
        const struct rlimit lim = {(rlim_t)1 << 30, (rlim_t)1 << 30};
        if (setrlimit(RLIMIT_AS, &lim) != 0)
            _exit(90);
        clef_map *m = NULL;
        const int st = clef_map_read(&m, path, NULL);
        if (st != code || !strstr(clef_last_error(), n1) || (n2 && !strstr(clef_last_error(), n2))) {
            fprintf(stderr, "%s: expected status %d with '%s' '%s', got %d: %s\n", path, code, n1,
                    n2 ? n2 : "", st, clef_last_error());
            _exit(91);
        }
        _exit(0);
    }
    int ws;
    assert_int_equal(waitpid(pid, &ws, 0), pid);
    assert_true(WIFEXITED(ws));
    assert_int_equal(WEXITSTATUS(ws), 0);
}

/* Headers CFITSIO 4.2 would overflow a buffer on (tests/fuzz/fuzz_map
 * finding): an unquoted 70-character TTYPE1 made `clef inspect` abort with
 * "buffer overflow detected".  Refused from the raw header instead (FITS
 * standard 4.0 section 7.3.1: TTYPEn is a character string). */
static void test_unquoted_ttype(void **state)
{
    (void)state;
    const char *good = test_path("ttype-good.fits");
    const double v[12] = {0};
    tfile t = {.nside_key = 1, .ordering = "RING", .n = 12, .values = v};
    write_tfile(good, &t);
    static char bytes[4 * 2880];
    FILE *f = fopen(good, "rb");
    const size_t n = fread(bytes, 1, sizeof bytes, f);
    fclose(f);
    int patched = 0;
    for (size_t c = 2880; c + 80 <= n; c += 80)
        if (!memcmp(bytes + c, "TTYPE1  =", 9)) {
            memset(bytes + c + 10, 'a', 70);
            patched = 1;
        }
    assert_true(patched);
    const char *bad = test_path("ttype-unquoted.fits");
    write_bytes(bad, bytes, n);
    expect_read_fail(bad, NULL, CLEF_EFORMAT, "keyword TTYPE1 is not a quoted string");
    /* a byte outside printable ASCII in a value card */
    for (size_t c = 2880; c + 80 <= n; c += 80)
        if (!memcmp(bytes + c, "TTYPE1  =", 9)) {
            memset(bytes + c + 10, ' ', 70);
            memcpy(bytes + c + 10, "'SIG\xea'", 6);
        }
    write_bytes(bad, bytes, n);
    expect_read_fail(bad, NULL, CLEF_EFORMAT, "byte 0xea at column 15 is not printable ASCII");
}

/* clef_map_read_memory (the fuzz harness's entry): CFITSIO's memory driver
 * read whole 2880-byte records past the end of a buffer cut inside its last
 * record (fuzz_map finding, ASan heap-buffer-overflow; regression input
 * tests/fuzz/corpus/fuzz_map/regress-memfile-cut-in-last-record.fits).
 * Cut in the padding the map reads whole; cut in the data it is truncated. */
static void test_read_memory(void **state)
{
    (void)state;
    const char *good = test_path("mem-good.fits");
    double v[48];
    for (int i = 0; i < 48; i++)
        v[i] = i;
    tfile t = {.nside_key = 2, .ordering = "RING", .n = 48, .values = v};
    write_tfile(good, &t);
    static char bytes[4 * 2880];
    FILE *f = fopen(good, "rb");
    const size_t n = fread(bytes, 1, sizeof bytes, f);
    fclose(f);
    assert_int_equal(n, 3 * 2880);
    char *exact = malloc(n);
    memcpy(exact, bytes, n);
    clef_map *m = NULL;
    assert_int_equal(clef_map_read_memory(&m, exact, n - 1000, "cut-in-padding", NULL), CLEF_OK);
    assert_true(m->pix[47] == 47.0);
    clef_map_free(m);
    m = NULL;
    assert_int_equal(clef_map_read_memory(&m, exact, 2 * 2880 + 100, "cut-in-data", NULL),
                     CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "the file is truncated"));
    assert_null(m);
    free(exact);
}

/* A gzip file whose trailer claims 4 GB (fuzz_spectrum_text finding:
 * CFITSIO allocates the claimed size before inflating a byte): refused,
 * since deflate expands at most 1032:1 (RFC 1952 ISIZE; zlib technical
 * notes). */
static void test_gzip_claim(void **state)
{
    (void)state;
    const char *good = test_path("claim.fits");
    const double v[12] = {0};
    tfile t = {.nside_key = 1, .ordering = "RING", .n = 12, .values = v};
    write_tfile(good, &t);
    assert_int_equal(run_cmd("gzip -c '%s' > '%s.gz'", good, good), 0);
    char gz[1100];
    snprintf(gz, sizeof gz, "%s.gz", good);
    clef_map *m = NULL;
    assert_int_equal(clef_map_read(&m, gz, NULL), CLEF_OK); /* the genuine file reads */
    clef_map_free(m);
    FILE *f = fopen(gz, "r+b");
    assert_non_null(f);
    assert_int_equal(fseek(f, -4, SEEK_END), 0);
    fputc(0xff, f);
    fputc(0xff, f);
    fputc(0xff, f);
    fputc(0xff, f);
    fclose(f);
    expect_read_fail(gz, NULL, CLEF_EFORMAT, "claim 4294967295 bytes uncompressed");
    /* shorter than a gzip header and trailer (a second finding: CFITSIO
     * read a size field out of the 10-byte header) */
    static const unsigned char ten[10] = {0x1f, 0x8b, 0x08, 0x29, 0xff, 0x68, 0x45, 0x52, 0xff, 0xff};
    write_bytes(gz, ten, sizeof ten);
    expect_read_fail(gz, NULL, CLEF_EFORMAT, "truncated gzip file (10 bytes)");
}

/* clef_map_export / clef_map_import (the masks clef sims sends from rank 0
 * to the other ranks): every value, flag and header field comes back, the
 * same bits; bytes that are not an export are refused. */
static void test_bytes(void **state)
{
    (void)state;
    clef_map *m = NULL, *b = NULL;
    assert_int_equal(clef_map_alloc(&m, 8), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++)
        m->pix[p] = sin(0.37 * (double)p) / 3.0;
    m->valid[5] = 0;
    m->pix[5] = 0.0;
    m->nmissing = 1;
    m->nbad = 1;
    m->hdu = 2;
    m->file_ordering = CLEF_NESTED;
    snprintf(m->coordsys, sizeof m->coordsys, "G");
    snprintf(m->unit, sizeof m->unit, "K_CMB");
    snprintf(m->column, sizeof m->column, "I_STOKES");
    void *buf = NULL;
    size_t n = 0;
    assert_int_equal(clef_map_export(m, &buf, &n), CLEF_OK);
    assert_int_equal(clef_map_import(&b, buf, n), CLEF_OK);
    assert_int_equal(b->nside, 8);
    assert_int_equal(b->npix, m->npix);
    assert_memory_equal(b->pix, m->pix, sizeof *m->pix * (size_t)m->npix);
    assert_memory_equal(b->valid, m->valid, (size_t)m->npix);
    assert_int_equal(b->nmissing, 1);
    assert_int_equal(b->nbad, 1);
    assert_int_equal(b->hdu, 2);
    assert_int_equal(b->file_ordering, CLEF_NESTED);
    assert_string_equal(b->coordsys, "G");
    assert_string_equal(b->unit, "K_CMB");
    assert_string_equal(b->column, "I_STOKES");
    clef_map_free(b);
    b = NULL;
    assert_int_equal(clef_map_import(&b, buf, n - 1), CLEF_EFORMAT); /* truncated */
    assert_null(b);
    ((unsigned char *)buf)[0] ^= 1; /* the magic */
    assert_int_equal(clef_map_import(&b, buf, n), CLEF_EFORMAT);
    assert_null(b);
    free(buf);
    assert_int_equal(clef_map_export(NULL, &buf, &n), CLEF_EINVAL);
    clef_map_free(m);
}

static void test_resource_limits(void **state)
{
    (void)state;
    const double v[12] = {0};
    /* NSIDE 8192 over a 12-row table: EFORMAT before allocation. */
    const char *tiny = test_path("huge-nside-tiny.fits");
    tfile t = {.nside_key = 8192, .ordering = "RING", .n = 12, .values = v};
    write_tfile(tiny, &t);
    expect_read_fail(tiny, NULL, CLEF_EFORMAT, "implies 805306368 pixels");

    /* The same with NAXIS2 raised to 12 x 8192^2 rows in the header: the
     * table now matches NSIDE but the file is 5 kB. */
    t.nside_key = 1;
    write_tfile(tiny, &t);
    static char bytes[8 * 2880];
    FILE *f = fopen(tiny, "rb");
    const size_t n = fread(bytes, 1, sizeof bytes, f);
    fclose(f);
    int patched = 0;
    for (size_t c = 2880; c + 80 <= n; c += 80) {
        if (!memcmp(bytes + c, "NAXIS2  =", 9)) {
            memcpy(bytes + c + 10, "           805306368", 20);
            patched++;
        }
        if (!memcmp(bytes + c, "NSIDE   =", 9)) {
            memcpy(bytes + c + 10, "                8192", 20);
            patched++;
        }
    }
    assert_int_equal(patched, 2);
    write_bytes(tiny, bytes, n);
    expect_read_fail(tiny, NULL, CLEF_EFORMAT, "the file is truncated");

    /* A legitimate partial-sky table of NSIDE 8192 (3 pixels) needs the
     * full 7.2 GB map: ENOMEM with nside and bytes in the message. */
    const char *part = test_path("nside8192-partial.fits");
    const long long idx[3] = {0, 1, 2};
    tfile p = {.nside_key = 8192, .ordering = "RING", .indxschm = "EXPLICIT", .n = 3,
               .values = v, .index = idx};
    write_tfile(part, &p);
    if (test_sanitize()) {
        /* AddressSanitizer reserves more address space than the limit. */
        fprintf(stderr, "skipped: RLIMIT_AS checks under the sanitizer build\n");
        return;
    }
    expect_child(tiny, CLEF_EFORMAT, "the file is truncated", NULL);
    expect_child(part, CLEF_ENOMEM, "nside 8192", "7.25 GB");
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_roundtrip_ring),
        cmocka_unit_test(test_bytes),
        cmocka_unit_test(test_nested_to_ring),
        cmocka_unit_test(test_explicit_partial),
        cmocka_unit_test(test_scaled_integer),
        cmocka_unit_test(test_gzip),
        cmocka_unit_test(test_bad_values),
        cmocka_unit_test(test_stats),
        cmocka_unit_test(test_selection),
        cmocka_unit_test(test_ordering_keyword),
        cmocka_unit_test(test_bad_files),
        cmocka_unit_test(test_bad_nside),
        cmocka_unit_test(test_bad_explicit),
        cmocka_unit_test(test_header_variants),
        cmocka_unit_test(test_write_errors),
        cmocka_unit_test(test_check_mask),
        cmocka_unit_test(test_resource_limits),
        cmocka_unit_test(test_read_memory),
        cmocka_unit_test(test_gzip_claim),
        cmocka_unit_test(test_unquoted_ttype),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
