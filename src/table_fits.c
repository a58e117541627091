/* Band-power tables as FITS (docs/formats.md, "band-power tables"): an empty
 * primary HDU, HDU 1 a binary table EXTNAME 'BANDPOWER' with one row per bin
 * and the metadata items as header keywords, HDU 2 an image EXTNAME
 * 'BANDCOV' holding the nbins x nbins covariance of D when there is one. */
#define _POSIX_C_SOURCE 200809L
#include "table_impl.h"

#include <fitsio.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <errno.h>
#include <string.h>
#include <unistd.h>

#include "core_impl.h"
#include "fits_impl.h"

static const char *const fits_units[CLEF_TABLE_NCOLS] = {"", "", "", "uK^2", "uK^2", "uK^2"};
static const char *const fits_forms[CLEF_TABLE_NCOLS] = {"1J", "1J", "1D", "1D", "1D", "1D"};
static const char *const fits_comments[CLEF_TABLE_NCOLS] = {
    "first multipole of the bin (inclusive)", "last multipole of the bin (inclusive)",
    "effective multipole of the bin", "band power C_b", "band power D_b = l(l+1)C_b/2pi",
    "1-sigma error of D_b"};

/* CFITSIO's status and text in our message; the error stack is cleared so a
 * later call does not report stale messages. */
static int fits_fail(int code, int st, const char *path, const char *what)
{
    char text[FLEN_STATUS];
    fits_get_errstatus(st, text);
    fits_clear_errmsg();
    CLEF_FAIL(code, "'%s': %s (CFITSIO status %d: %s)", path, what, st, text);
}

/* A write failure: the reason in words when the file system gives one
 * (clef_write_fail), measured before the temporary is removed. */
static int write_fits_fail(clef_outfile *of, int st, const char *path, const char *what)
{
    char text[FLEN_STATUS], lib[FLEN_STATUS + 32];
    fits_get_errstatus(st, text);
    fits_clear_errmsg();
    snprintf(lib, sizeof lib, "CFITSIO status %d: %s", st, text);
    const int code = clef_write_fail(CLEF_EIO, path, what, lib);
    clef_outfile_abort(of);
    return code;
}

/* One metadata item as a header card: integers as integers, other numbers
 * with 17 significant digits, text as a (possibly long, CONTINUE'd) string. */
static void write_meta_card(fitsfile *f, const clef_meta *m, int *st)
{
    if (m->is_number) {
        char *end;
        const long long iv = strtoll(m->value, &end, 10);
        if (!*end && end != m->value)
            fits_write_key_lng(f, m->key, iv, m->comment, st);
        else
            fits_write_key_dbl(f, m->key, strtod(m->value, NULL), -17, m->comment, st);
    } else {
        fits_write_key_longstr(f, m->key, m->value, m->comment, st);
    }
}

static void write_primary(fitsfile *f, int *st)
{
    fits_create_img(f, BYTE_IMG, 0, NULL, st);
    fits_write_key_str(f, "CLEFVERS", CLEF_VERSION, "clef version that wrote this file", st);
    fits_write_date(f, st);
}

/* extver > 0: the HDUs of set extver of a file of several sets
 * (clef_bandpowers_write_fits_set) carry EXTVER = extver (FITS standard
 * 4.0, section 4.4.2.6). */
static void write_extver(fitsfile *f, int extver, int *st)
{
    if (extver > 0)
        fits_write_key_lng(f, "EXTVER", extver, "band-power set number in this file", st);
}

/* The table, covariance and window HDUs of one band-power set; ext NULL:
 * the names BANDPOWER, BANDCOV, BANDWIN, else those followed by " ext". */
static void write_set(fitsfile *f, const clef_bandpowers *bp, const char *ext, int extver,
                      int *st)
{
    const LONGLONG n = bp->nbins;
    char en[3][FLEN_VALUE];
    static const char *const base[3] = {"BANDPOWER", "BANDCOV", "BANDWIN"};
    for (int i = 0; i < 3; i++)
        snprintf(en[i], sizeof en[i], "%s%s%.56s", base[i], ext ? " " : "", ext ? ext : "");

    char *ttype[CLEF_TABLE_NCOLS], *tform[CLEF_TABLE_NCOLS], *tunit[CLEF_TABLE_NCOLS];
    for (int k = 0; k < CLEF_TABLE_NCOLS; k++) {
        ttype[k] = (char *)clef_table_fits_names[k];
        tform[k] = (char *)fits_forms[k];
        tunit[k] = (char *)fits_units[k];
    }
    fits_create_tbl(f, BINARY_TBL, n, CLEF_TABLE_NCOLS, ttype, tform, tunit, en[0], st);
    for (int k = 0; k < CLEF_TABLE_NCOLS; k++) {
        char key[FLEN_KEYWORD];
        snprintf(key, sizeof key, "TTYPE%d", k + 1);
        fits_modify_comment(f, key, fits_comments[k], st);
    }
    write_extver(f, extver, st);
    fits_write_col(f, TINT, 1, 1, 1, n, bp->l_lo, st);
    fits_write_col(f, TINT, 2, 1, 1, n, bp->l_hi, st);
    fits_write_col(f, TDOUBLE, 3, 1, 1, n, bp->l_eff, st);
    fits_write_col(f, TDOUBLE, 4, 1, 1, n, bp->cl, st);
    fits_write_col(f, TDOUBLE, 5, 1, 1, n, bp->dl, st);
    fits_write_col(f, TDOUBLE, 6, 1, 1, n, bp->dl_err, st);
    fits_write_key_str(f, "CLEFVERS", CLEF_VERSION, "clef version that wrote this file", st);
    /* The long-string convention is announced by LONGSTRN (HEASARC
     * convention; fitsverify warns without it). */
    int longstr = 0;
    for (int i = 0; i < bp->nmeta; i++)
        longstr |= !bp->meta[i].is_number && strlen(bp->meta[i].value) > 68;
    if (longstr)
        fits_write_key_longwarn(f, st);
    for (int i = 0; i < bp->nmeta && !*st; i++)
        write_meta_card(f, &bp->meta[i], st);

    if (bp->cov) {
        long naxes[2] = {bp->nbins, bp->nbins};
        fits_create_img(f, DOUBLE_IMG, 2, naxes, st);
        fits_write_key_str(f, "EXTNAME", en[1], "covariance of D_BAND between bins", st);
        write_extver(f, extver, st);
        fits_write_key_str(f, "BUNIT", "uK^4", "unit of the covariance", st);
        fits_write_key_str(f, "CLEFVERS", CLEF_VERSION, "clef version that wrote this file", st);
        fits_write_img(f, TDOUBLE, 1, n * n, bp->cov, st);
    }
    if (bp->win) {
        /* NAXIS1 runs over l = 0..win_lmax, NAXIS2 over the bins: in numpy
         * data[b, l] = W_bl (docs/formats-spectrum.md). */
        long naxes[2] = {bp->win_lmax + 1, bp->nbins};
        fits_create_img(f, DOUBLE_IMG, 2, naxes, st);
        fits_write_key_str(f, "EXTNAME", en[2], "band-power window functions W_bl", st);
        write_extver(f, extver, st);
        fits_write_key_str(f, "CLEFVERS", CLEF_VERSION, "clef version that wrote this file", st);
        fits_write_key_lng(f, "WINLMIN", 0, "multipole of the first column", st);
        fits_write_key_lng(f, "WINLMAX", bp->win_lmax, "multipole of the last column", st);
        fits_write_comment(f, "<D_BAND of row b> = sum_l W_bl D_l, D_l = l(l+1)C_l/2pi of the sky", st);
        fits_write_img(f, TDOUBLE, 1, n * ((LONGLONG)bp->win_lmax + 1), bp->win, st);
    }
}

static void write_hdus(fitsfile *f, const clef_bandpowers *bp, int *st)
{
    write_primary(f, st);
    write_set(f, bp, NULL, 0, st);
}

typedef struct fits_job {
    const clef_bandpowers *bp;
    const clef_bandpowers *const *set;
    const char *const *names;
    int n;
    const double *cov;
    int ncov;
} fits_job;

static void write_job(fitsfile *f, const fits_job *j, int *st)
{
    if (j->bp) {
        write_hdus(f, j->bp, st);
        return;
    }
    write_primary(f, st);
    fits_write_key_lng(f, "NPAIRS", j->n, "band-power sets (pairs, spectra) in this file", st);
    for (int k = 0; k < j->n && !*st; k++)
        write_set(f, j->set[k], j->names ? j->names[k] : NULL, k + 1, st);
    if (j->cov && !*st) {
        long naxes[2] = {j->ncov, j->ncov};
        fits_create_img(f, DOUBLE_IMG, 2, naxes, st);
        fits_write_key_str(f, "EXTNAME", "JOINTCOV", "covariance of all pairs' D_BAND", st);
        fits_write_key_str(f, "BUNIT", "uK^4", "unit of the covariance", st);
        fits_write_key_str(f, "CLEFVERS", CLEF_VERSION, "clef version that wrote this file", st);
        fits_write_key_lng(f, "NPAIRS", j->n, "pairs, in the order of the BANDPOWER HDUs", st);
        fits_write_key_lng(f, "NBINS", j->set[0]->nbins, "bins per pair", st);
        fits_write_img(f, TDOUBLE, 1, (LONGLONG)j->ncov * j->ncov, (double *)j->cov, st);
    }
}

static int write_fits_job(const fits_job *j, const char *path)
{
    clef_outfile of;
    CLEF_TRY(clef_outfile_begin(&of, path));
    /* The disk-file entry point takes the name literally (no extended
     * filename syntax), but cannot overwrite: remove the empty placeholder. */
    unlink(of.tmp_path);
    fitsfile *f = NULL;
    int st = 0;
    fits_create_diskfile(&f, of.tmp_path, &st);
    if (st)
        return write_fits_fail(&of, st, path, "cannot create the FITS file");
    write_job(f, j, &st);
    int st_close = 0;
    fits_close_file(f, &st_close);
    if (st || st_close)
        return write_fits_fail(&of, st ? st : st_close, path,
                               "cannot write the band-power FITS file");
    return clef_outfile_commit(&of);
}

int clef_bandpowers_write_fits(const clef_bandpowers *bp, const char *path)
{
    CLEF_TRY(clef_table_check(bp, path));
    fits_job j = {0};
    j.bp = bp;
    return write_fits_job(&j, path);
}

int clef_bandpowers_write_fits_set(const clef_bandpowers *const *bp, const char *const *names,
                                   int n, const double *cov, int ncov, const char *path)
{
    if (n < 1)
        CLEF_FAIL(CLEF_EINVAL, "%s: no band powers to write", path);
    for (int k = 0; k < n; k++) {
        CLEF_TRY(clef_table_check(bp[k], path));
        if (bp[k]->nbins != bp[0]->nbins)
            CLEF_FAIL(CLEF_EINVAL, "%s: band-power set %d ('%s') has %d bins, set 1 ('%s') %d",
                      path, k + 1, names ? names[k] : "", bp[k]->nbins, names ? names[0] : "",
                      bp[0]->nbins);
    }
    if (cov && ncov != n * bp[0]->nbins)
        CLEF_FAIL(CLEF_EINVAL, "%s: joint covariance of %d rows for %d pairs of %d bins", path,
                  ncov, n, bp[0]->nbins);
    fits_job j = {0};
    j.set = bp;
    j.names = names;
    j.n = n;
    j.cov = cov;
    j.ncov = ncov;
    return write_fits_job(&j, path);
}

/* ---- reading ----------------------------------------------------------- */

/* Header keywords of the BANDPOWER HDU back into metadata items. */
static int read_meta(fitsfile *f, clef_bandpowers *bp, const char *path)
{
    int nkeys = 0, st = 0;
    fits_get_hdrspace(f, &nkeys, NULL, &st);
    for (int i = 1; i <= nkeys && !st; i++) {
        char name[FLEN_KEYWORD], value[FLEN_VALUE], comment[FLEN_COMMENT];
        fits_read_keyn(f, i, name, value, comment, &st);
        if (st)
            break;
        /* Names FITS does not allow (lower case, HIERARCH) are not ours to keep. */
        if (!clef_table_key_valid(name) || clef_table_key_reserved(name) || !*value)
            continue;
        char dtype = 0;
        fits_get_keytype(value, &dtype, &st);
        if (st) {
            st = 0;
            fits_clear_errmsg();
            continue;
        }
        char text[256];
        int is_number = 0;
        if (dtype == 'C') {
            char *longstr = NULL;
            fits_read_key_longstr(f, name, &longstr, comment, &st);
            if (st)
                break;
            snprintf(text, sizeof text, "%s", longstr);
            fits_free_memory(longstr, &st);
        } else if (dtype == 'I' || dtype == 'F') {
            /* FITS allows a 'D' exponent (FITS 4.0 4.2.4). */
            for (char *c = value; *c; c++)
                if (*c == 'D' || *c == 'd')
                    *c = 'E';
            clef_table_format_double(text, sizeof text, strtod(value, NULL));
            is_number = 1;
        } else {
            snprintf(text, sizeof text, "%s", value);
        }
        CLEF_TRY(clef_table_meta_set(bp, name, text, is_number, comment + strspn(comment, " ")));
    }
    if (st)
        return fits_fail(CLEF_EFORMAT, st, path, "cannot read the BANDPOWER header keywords");
    return CLEF_OK;
}

static int read_columns(fitsfile *f, clef_bandpowers *bp, const char *path, const char *hdu)
{
    const LONGLONG n = bp->nbins;
    int col[CLEF_TABLE_NCOLS];
    int st = 0, anynul = 0;
    for (int k = 0; k < CLEF_TABLE_NCOLS; k++) {
        fits_get_colnum(f, CASEINSEN, (char *)clef_table_fits_names[k], &col[k], &st);
        if (st) {
            char what[128];
            snprintf(what, sizeof what, "HDU %s has no column %s", hdu, clef_table_fits_names[k]);
            return fits_fail(CLEF_EFORMAT, st, path, what);
        }
    }
    fits_read_col(f, TINT, col[0], 1, 1, n, NULL, bp->l_lo, &anynul, &st);
    fits_read_col(f, TINT, col[1], 1, 1, n, NULL, bp->l_hi, &anynul, &st);
    double *const dcols[4] = {bp->l_eff, bp->cl, bp->dl, bp->dl_err};
    for (int k = 0; k < 4; k++)
        fits_read_col(f, TDOUBLE, col[k + 2], 1, 1, n, NULL, dcols[k], &anynul, &st);
    if (st)
        return fits_fail(CLEF_EFORMAT, st, path, "cannot read the BANDPOWER columns");
    for (LONGLONG b = 0; b < n; b++) {
        for (int k = 0; k < 4; k++)
            if (!isfinite(dcols[k][b]))
                CLEF_FAIL(CLEF_EFORMAT, "'%s' HDU %s row %lld column %s: not a finite number",
                          path, hdu, b + 1, clef_table_fits_names[k + 2]);
        if (bp->l_lo[b] < 0 || bp->l_hi[b] < bp->l_lo[b])
            CLEF_FAIL(CLEF_EFORMAT, "'%s' HDU %s row %lld: l range [%d, %d] is invalid", path,
                      hdu, b + 1, bp->l_lo[b], bp->l_hi[b]);
        if (bp->dl_err[b] < 0)
            CLEF_FAIL(CLEF_EFORMAT, "'%s' HDU %s row %lld column D_SIGMA: %g is negative",
                      path, hdu, b + 1, bp->dl_err[b]);
    }
    return CLEF_OK;
}

/* Move to the image HDU `name`; *present = 0 when the file has none.  A
 * 2-dimensional image fills naxes. */
static int find_image(fitsfile *f, const char *name, int extver, const char *path, int *present,
                      int *naxis, long naxes[2])
{
    int st = 0;
    *present = 0;
    fits_movnam_hdu(f, IMAGE_HDU, (char *)name, extver, &st);
    if (st == BAD_HDU_NUM) {
        fits_clear_errmsg();
        return CLEF_OK;
    }
    fits_get_img_dim(f, naxis, &st);
    if (!st && *naxis == 2)
        fits_get_img_size(f, 2, naxes, &st);
    if (st) {
        char what[FLEN_VALUE + 40];
        snprintf(what, sizeof what, "cannot read HDU %s", name);
        return fits_fail(CLEF_EFORMAT, st, path, what);
    }
    *present = 1;
    return CLEF_OK;
}

/* HDU 'BANDCOV<suffix>' of EXTVER extver (0: any), when present: an nbins x
 * nbins double image. */
static int read_cov(fitsfile *f, clef_bandpowers *bp, const char *path, const char *suffix,
                    int extver)
{
    int st = 0, naxis = 0, present = 0;
    long naxes[2] = {0, 0};
    char name[FLEN_VALUE + 16];
    snprintf(name, sizeof name, "BANDCOV%s", suffix);
    CLEF_TRY(find_image(f, name, extver, path, &present, &naxis, naxes));
    if (!present)
        return CLEF_OK;
    if (naxis != 2 || naxes[0] != bp->nbins || naxes[1] != bp->nbins)
        CLEF_FAIL(CLEF_EFORMAT, "'%s' HDU %s: image is %d-dimensional %ld x %ld, the table has "
                  "%d bins", path, name, naxis, naxes[0], naxes[1], bp->nbins);
    const size_t nn = (size_t)bp->nbins * (size_t)bp->nbins;
    double *cov = malloc(nn * sizeof *cov);
    if (!cov)
        CLEF_FAIL(CLEF_ENOMEM, "'%s' HDU %s: out of memory", path, name);
    int anynul = 0;
    fits_read_img(f, TDOUBLE, 1, (LONGLONG)nn, NULL, cov, &anynul, &st);
    if (st) {
        free(cov);
        char what[FLEN_VALUE + 40];
        snprintf(what, sizeof what, "cannot read the %s image", name);
        return fits_fail(CLEF_EFORMAT, st, path, what);
    }
    const int status = clef_table_check_cov(cov, (size_t)bp->nbins, path);
    if (status != CLEF_OK) {
        free(cov);
        return status;
    }
    bp->cov = cov;
    return CLEF_OK;
}

/* HDU 'BANDWIN<suffix>' of EXTVER extver (0: any), when present: an
 * (win_lmax + 1) x nbins double image whose columns start at l = 0
 * (WINLMIN, if given, must be 0). */
static int read_win(fitsfile *f, clef_bandpowers *bp, const char *path, const char *suffix,
                    int extver)
{
    int st = 0, naxis = 0, present = 0;
    long naxes[2] = {0, 0};
    char name[FLEN_VALUE + 16];
    snprintf(name, sizeof name, "BANDWIN%s", suffix);
    CLEF_TRY(find_image(f, name, extver, path, &present, &naxis, naxes));
    if (!present)
        return CLEF_OK;
    if (naxis != 2 || naxes[1] != bp->nbins || naxes[0] < 1 || naxes[0] > (1L << 20) + 1)
        CLEF_FAIL(CLEF_EFORMAT, "'%s' HDU %s: image is %d-dimensional %ld x %ld, expected "
                  "(lmax + 1) x %d bins", path, name, naxis, naxes[0], naxes[1], bp->nbins);
    long lmin = 0;
    fits_read_key_lng(f, "WINLMIN", &lmin, NULL, &st);
    if (st == KEY_NO_EXIST) {
        st = 0;
        fits_clear_errmsg();
        lmin = 0;
    }
    if (st)
        return fits_fail(CLEF_EFORMAT, st, path, "HDU BANDWIN: cannot read keyword WINLMIN");
    if (lmin != 0)
        CLEF_FAIL(CLEF_EFORMAT, "'%s' HDU %s keyword WINLMIN = %ld: only 0 is supported",
                  path, name, lmin);
    CLEF_TRY(clef_bandpowers_alloc_windows(bp, (int)naxes[0] - 1));
    const size_t nn = (size_t)bp->nbins * (size_t)naxes[0];
    int anynul = 0;
    fits_read_img(f, TDOUBLE, 1, (LONGLONG)nn, NULL, bp->win, &anynul, &st);
    if (st) {
        char what[FLEN_VALUE + 40];
        snprintf(what, sizeof what, "cannot read the %s image", name);
        return fits_fail(CLEF_EFORMAT, st, path, what);
    }
    for (size_t i = 0; i < nn; i++)
        if (!isfinite(bp->win[i]))
            CLEF_FAIL(CLEF_EFORMAT, "'%s' HDU %s: element (bin %zu, l %zu) is not finite",
                      path, name, i / (size_t)naxes[0], i % (size_t)naxes[0]);
    return CLEF_OK;
}

/* The band-power table at the current HDU (named `hdu`), then its
 * covariance and windows, the HDUs named like it with "BANDPOWER" replaced
 * (suffix: the rest of the name) and of the same EXTVER (0: any). */
static int read_table_hdu(fitsfile *f, clef_bandpowers **out, const char *path, const char *hdu,
                          const char *suffix, int extver)
{
    int st = 0, status = CLEF_OK;
    clef_bandpowers *bp = NULL;
    LONGLONG nrows = 0;
    fits_get_num_rowsll(f, &nrows, &st);
    if (st)
        return fits_fail(CLEF_EFORMAT, st, path, "cannot read the BANDPOWER row count");
    if (nrows < 1 || nrows > ((LONGLONG)1 << 30))
        CLEF_FAIL(CLEF_EFORMAT, "'%s' HDU %s: %lld rows", path, hdu, nrows);
    CLEF_CHECK(clef_bandpowers_alloc(&bp, (int)nrows, 0));
    CLEF_CHECK(read_columns(f, bp, path, hdu));
    CLEF_CHECK(read_meta(f, bp, path));
    CLEF_CHECK(read_cov(f, bp, path, suffix, extver));
    CLEF_CHECK(read_win(f, bp, path, suffix, extver));
    *out = bp;
    return CLEF_OK;
fail:
    clef_bandpowers_free(bp);
    return status;
}

static int open_fits(fitsfile **f, const char *path)
{
    int st = 0;
    CLEF_TRY(clef_fits_check_gzip_file(path));
    fits_open_diskfile(f, path, READONLY, &st);
    if (st)
        return fits_fail(st == FILE_NOT_OPENED ? CLEF_EIO : CLEF_EFORMAT, st, path,
                         "cannot open the FITS file");
    return CLEF_OK;
}

static void close_fits(fitsfile *f)
{
    int st = 0;
    if (f)
        fits_close_file(f, &st);
    fits_clear_errmsg();
}

int clef_table_read_fits(clef_bandpowers **out, const char *path)
{
    *out = NULL;
    fitsfile *f = NULL;
    int st = 0, status = CLEF_OK;
    CLEF_TRY(open_fits(&f, path));
    CLEF_CHECK(clef_fits_check_headers(f, path));
    fits_movnam_hdu(f, BINARY_TBL, "BANDPOWER", 0, &st);
    if (st) {
        status = fits_fail(CLEF_EFORMAT, st, path, "no binary table HDU with EXTNAME 'BANDPOWER'");
        goto fail;
    }
    status = read_table_hdu(f, out, path, "BANDPOWER", "", 0);
fail:
    close_fits(f);
    return status;
}

/* ---- files of several band-power sets ---------------------------------- */

void clef_bandpowers_set_free(clef_bandpowers_set *s)
{
    if (!s)
        return;
    for (int k = 0; k < s->n; k++)
        clef_bandpowers_free(s->tables[k]);
    free(s->tables);
    free(s->names);
    free(s);
}

/* EXTNAME and EXTVER of the current HDU; *is_bp = 1 for a binary table named
 * "BANDPOWER" or "BANDPOWER <name>". */
static int hdu_identity(fitsfile *f, const char *path, int hdu, char extname[FLEN_VALUE],
                        int *extver, int *is_bp)
{
    int st = 0, type = 0;
    *is_bp = 0;
    *extver = 0;
    extname[0] = '\0';
    fits_get_hdu_type(f, &type, &st);
    if (!st && type == BINARY_TBL)
        fits_read_key_str(f, "EXTNAME", extname, NULL, &st);
    if (st == KEY_NO_EXIST) {
        fits_clear_errmsg();
        return CLEF_OK;
    }
    if (st) {
        char what[64];
        snprintf(what, sizeof what, "cannot read the header of HDU %d", hdu);
        return fits_fail(CLEF_EFORMAT, st, path, what);
    }
    if (type != BINARY_TBL || strncmp(extname, "BANDPOWER", 9) || (extname[9] && extname[9] != ' '))
        return CLEF_OK;
    *is_bp = 1;
    long v = 0;
    fits_read_key_lng(f, "EXTVER", &v, NULL, &st);
    if (st == KEY_NO_EXIST) {
        fits_clear_errmsg();
        v = 0;
    } else if (st) {
        return fits_fail(CLEF_EFORMAT, st, path, "cannot read keyword EXTVER");
    }
    *extver = v > 0 && v < 1000000 ? (int)v : 0;
    return CLEF_OK;
}

/* Name of set k: the EXTNAME after "BANDPOWER ", else its SPECTRUM keyword
 * (the polarized files), else "set K". */
static void set_name(const clef_bandpowers *bp, const char *extname, int k, char *out, size_t n)
{
    const char *spec = clef_bandpowers_meta_get(bp, "SPECTRUM");
    if (extname[9] == ' ' && extname[10])
        snprintf(out, n, "%s", extname + 10);
    else if (spec && *spec)
        snprintf(out, n, "%s", spec);
    else
        snprintf(out, n, "set %d", k + 1);
}

static int set_append(clef_bandpowers_set *s, clef_bandpowers *bp, const char *extname)
{
    clef_bandpowers **t = realloc(s->tables, ((size_t)s->n + 1) * sizeof *t);
    if (t)
        s->tables = t;
    char(*nm)[72] = t ? realloc(s->names, ((size_t)s->n + 1) * sizeof *nm) : NULL;
    if (!nm) {
        clef_bandpowers_free(bp);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory reading band-power set %d", s->n + 1);
    }
    s->names = nm;
    set_name(bp, extname, s->n, s->names[s->n], sizeof s->names[s->n]);
    s->tables[s->n++] = bp;
    return CLEF_OK;
}

int clef_bandpowers_read_set(clef_bandpowers_set **out, const char *path)
{
    *out = NULL;
    if (!path || !*path)
        CLEF_FAIL(CLEF_EINVAL, "band-power file path is empty");
    FILE *fp = fopen(path, "rb");
    if (!fp)
        CLEF_FAIL(CLEF_EIO, "cannot open band-power file '%s': %s", path, strerror(errno));
    char head[9];
    const size_t got = fread(head, 1, sizeof head, fp);
    fclose(fp);
    /* Every FITS file starts with the card "SIMPLE  =" (FITS 4.0 4.4.1.1). */
    if (got != sizeof head || memcmp(head, "SIMPLE  =", sizeof head))
        CLEF_FAIL(CLEF_EFORMAT, "'%s' is not a FITS file: the band powers of several pairs "
                  "or spectra come in one FITS file (docs/formats-spectrum.md)", path);
    fitsfile *f = NULL;
    int st = 0, status = CLEF_OK, nhdu = 0, unnumbered = 0;
    clef_bandpowers_set *s = calloc(1, sizeof *s);
    if (!s)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory reading '%s'", path);
    CLEF_CHECK(open_fits(&f, path));
    CLEF_CHECK(clef_fits_check_headers(f, path));
    fits_get_num_hdus(f, &nhdu, &st);
    if (st) {
        status = fits_fail(CLEF_EFORMAT, st, path, "cannot count the HDUs");
        goto fail;
    }
    for (int h = 2; h <= nhdu; h++) {
        char extname[FLEN_VALUE];
        int extver = 0, is_bp = 0;
        fits_movabs_hdu(f, h, NULL, &st);
        if (st) {
            status = fits_fail(CLEF_EFORMAT, st, path, "cannot move to the next HDU");
            goto fail;
        }
        CLEF_CHECK(hdu_identity(f, path, h, extname, &extver, &is_bp));
        if (!is_bp)
            continue;
        unnumbered += extver == 0;
        clef_bandpowers *bp = NULL;
        CLEF_CHECK(read_table_hdu(f, &bp, path, extname, extname + 9, extver));
        CLEF_CHECK(set_append(s, bp, extname));
    }
    if (s->n == 0)
        status = clef_fail(CLEF_EFORMAT, "'%s' has no band-power HDU (a binary table with "
                           "EXTNAME 'BANDPOWER ...')", path);
    else if (unnumbered)
        status = clef_fail(CLEF_EFORMAT, "'%s' holds a single band-power table (HDU BANDPOWER "
                           "without EXTVER), not a file of several pairs or spectra", path);
    if (status == CLEF_OK) {
        *out = s;
        s = NULL;
    }
fail:
    clef_bandpowers_set_free(s);
    close_fits(f);
    return status;
}
