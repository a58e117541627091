/* a_lm files: a FITS binary table of clef's own design (docs/formats-alm.md).
 * One row per stored (l, m), m-major; columns L, M (int32), RE, IM
 * (float64); header LMAX, MMAX, CLEFVERS.  Written atomically and in row
 * chunks; read back in any row order. */
#include <stdlib.h>
#include <string.h>

#include <fitsio.h>

#include "clef/sht.h"
#include "core_impl.h"
#include "fits_impl.h"

#define ROWS_PER_CHUNK 65536
#define EXTNAME "CLEF_ALM"

static int fits_error(int code, const char *path, const char *what, int fst)
{
    char text[FLEN_STATUS];
    fits_get_errstatus(fst, text);
    return clef_fail(code, "%s: %s (CFITSIO status %d: %s)", path, what, fst, text);
}

static int write_error(const char *path, const char *what, int fst)
{
    char text[FLEN_STATUS], lib[FLEN_STATUS + 32];
    fits_get_errstatus(fst, text);
    snprintf(lib, sizeof lib, "CFITSIO status %d: %s", fst, text);
    return clef_write_fail(CLEF_EIO, path, what, lib);
}

int clef_alm_write(const char *path, int lmax, int mmax, const double complex *alm)
{
    if (!path || !alm)
        CLEF_FAIL(CLEF_EINVAL, "clef_alm_write: path or a_lm is NULL");
    if (lmax < 0 || mmax < 0 || mmax > lmax)
        CLEF_FAIL(CLEF_EINVAL, "%s: need 0 <= mmax <= lmax, got lmax = %d, mmax = %d", path, lmax,
                  mmax);
    clef_outfile o;
    CLEF_TRY(clef_outfile_begin(&o, path));
    int status = CLEF_OK, fst = 0;
    fitsfile *f = NULL;
    int *col_l = malloc(ROWS_PER_CHUNK * sizeof *col_l), *col_m = malloc(ROWS_PER_CHUNK * sizeof *col_m);
    double *re = malloc(ROWS_PER_CHUNK * sizeof *re), *im = malloc(ROWS_PER_CHUNK * sizeof *im);
    if (!col_l || !col_m || !re || !im) {
        status = clef_fail(CLEF_ENOMEM, "%s: no memory for the write buffers", path);
        goto fail;
    }
    char name[4200];
    snprintf(name, sizeof name, "!%s", o.tmp_path);
    char *ttype[] = {"L", "M", "RE", "IM"};
    char *tform[] = {"1J", "1J", "1D", "1D"};
    char *tunit[] = {"", "", "", ""};
    const size_t n = clef_alm_size(lmax, mmax);
    if (fits_create_file(&f, name, &fst) ||
        fits_create_tbl(f, BINARY_TBL, 0, 4, ttype, tform, tunit, EXTNAME, &fst)) {
        status = write_error(path, "cannot create the a_lm table", fst);
        goto fail;
    }
    long long lv = lmax, mv = mmax;
    fits_write_key(f, TLONGLONG, "LMAX", &lv, "maximum multipole l", &fst);
    fits_write_key(f, TLONGLONG, "MMAX", &mv, "maximum order m", &fst);
    fits_write_key(f, TSTRING, "CLEFVERS", CLEF_VERSION, "clef version that wrote the file", &fst);
    fits_write_comment(f, "clef a_lm: one row per (l,m), 0<=m<=MMAX, m<=l<=LMAX, m-major; "
                          "a_l,-m = (-1)^m conj(a_lm)", &fst);
    if (fst) {
        status = write_error(path, "cannot write the header keywords", fst);
        goto fail;
    }
    size_t row = 0, filled = 0;
    for (int m = 0; m <= mmax; m++)
        for (int l = m; l <= lmax; l++) {
            const double complex a = alm[clef_alm_index(lmax, l, m)];
            col_l[filled] = l;
            col_m[filled] = m;
            re[filled] = creal(a);
            im[filled] = cimag(a);
            if (++filled == ROWS_PER_CHUNK || row + filled == n) {
                const LONGLONG r1 = (LONGLONG)row + 1;
                fits_write_col(f, TINT, 1, r1, 1, (LONGLONG)filled, col_l, &fst);
                fits_write_col(f, TINT, 2, r1, 1, (LONGLONG)filled, col_m, &fst);
                fits_write_col(f, TDOUBLE, 3, r1, 1, (LONGLONG)filled, re, &fst);
                fits_write_col(f, TDOUBLE, 4, r1, 1, (LONGLONG)filled, im, &fst);
                if (fst) {
                    status = write_error(path, "cannot write a_lm rows", fst);
                    goto fail;
                }
                row += filled;
                filled = 0;
            }
        }
    fits_write_chksum(f, &fst);
    fits_close_file(f, &fst);
    f = NULL;
    if (fst) {
        status = write_error(path, "cannot finish the a_lm file", fst);
        goto fail;
    }
    free(col_l);
    free(col_m);
    free(re);
    free(im);
    return clef_outfile_commit(&o);
fail:
    if (f) {
        int ignore = 0;
        fits_close_file(f, &ignore);
    }
    clef_outfile_abort(&o);
    free(col_l);
    free(col_m);
    free(re);
    free(im);
    return status;
}

static int read_key(fitsfile *f, const char *path, const char *key, int lo, int *out)
{
    long long v;
    int fst = 0;
    if (fits_read_key(f, TLONGLONG, key, &v, NULL, &fst))
        return fits_error(CLEF_EFORMAT, path, key[0] == 'L' ? "keyword LMAX missing or not an integer"
                                                            : "keyword MMAX missing or not an integer",
                          fst);
    if (v < lo || v > 1 << 20)
        return clef_fail(CLEF_EFORMAT, "%s: keyword %s = %lld out of range", path, key, v);
    *out = (int)v;
    return CLEF_OK;
}

static int find_col(fitsfile *f, const char *path, const char *name, int *col)
{
    int fst = 0;
    if (fits_get_colnum(f, CASEINSEN, (char *)name, col, &fst))
        return clef_fail(CLEF_EFORMAT, "%s: column %s not found in the a_lm table", path, name);
    return CLEF_OK;
}

int clef_alm_read(const char *path, int *lmax_out, int *mmax_out, double complex **alm_out)
{
    if (!path || !lmax_out || !mmax_out || !alm_out)
        CLEF_FAIL(CLEF_EINVAL, "clef_alm_read: NULL argument");
    *alm_out = NULL;
    int status = CLEF_OK, fst = 0, hdutype = 0, lmax = 0, mmax = 0;
    fitsfile *f = NULL;
    double complex *alm = NULL;
    unsigned char *seen = NULL;
    int *cl = NULL, *cm = NULL;
    double *re = NULL, *im = NULL;
    CLEF_TRY(clef_fits_check_gzip_file(path));
    if (fits_open_file(&f, path, READONLY, &fst)) {
        f = NULL;
        return fits_error(CLEF_EIO, path, "cannot open", fst);
    }
    CLEF_CHECK(clef_fits_check_headers(f, path));
    if (fits_movnam_hdu(f, BINARY_TBL, EXTNAME, 0, &fst)) {
        /* Not ours by name: take the first binary table. */
        fst = 0;
        if (fits_movabs_hdu(f, 2, &hdutype, &fst) || hdutype != BINARY_TBL) {
            status = clef_fail(CLEF_EFORMAT, "%s: no binary table (HDU 2) with a_lm", path);
            goto fail;
        }
    }
    int c[4];
    CLEF_CHECK(read_key(f, path, "LMAX", 0, &lmax));
    CLEF_CHECK(read_key(f, path, "MMAX", 0, &mmax));
    if (mmax > lmax) {
        status = clef_fail(CLEF_EFORMAT, "%s: keyword MMAX = %d above LMAX = %d", path, mmax, lmax);
        goto fail;
    }
    CLEF_CHECK(find_col(f, path, "L", &c[0]));
    CLEF_CHECK(find_col(f, path, "M", &c[1]));
    CLEF_CHECK(find_col(f, path, "RE", &c[2]));
    CLEF_CHECK(find_col(f, path, "IM", &c[3]));
    LONGLONG nrows = 0;
    fits_get_num_rowsll(f, &nrows, &fst);
    const size_t n = clef_alm_size(lmax, mmax);
    if (fst || nrows != (LONGLONG)n) {
        status = clef_fail(CLEF_EFORMAT, "%s: table has %lld rows, LMAX = %d and MMAX = %d need %zu",
                           path, (long long)nrows, lmax, mmax, n);
        goto fail;
    }
    alm = malloc(n * sizeof *alm);
    seen = calloc(n, 1);
    cl = malloc(ROWS_PER_CHUNK * sizeof *cl);
    cm = malloc(ROWS_PER_CHUNK * sizeof *cm);
    re = malloc(ROWS_PER_CHUNK * sizeof *re);
    im = malloc(ROWS_PER_CHUNK * sizeof *im);
    if (!alm || !seen || !cl || !cm || !re || !im) {
        status = clef_fail(CLEF_ENOMEM, "%s: no memory for %zu a_lm", path, n);
        goto fail;
    }
    for (size_t row = 0; row < n; row += ROWS_PER_CHUNK) {
        const size_t k = n - row < ROWS_PER_CHUNK ? n - row : ROWS_PER_CHUNK;
        const LONGLONG r1 = (LONGLONG)row + 1;
        int anynul = 0;
        fits_read_col(f, TINT, c[0], r1, 1, (LONGLONG)k, NULL, cl, &anynul, &fst);
        fits_read_col(f, TINT, c[1], r1, 1, (LONGLONG)k, NULL, cm, &anynul, &fst);
        fits_read_col(f, TDOUBLE, c[2], r1, 1, (LONGLONG)k, NULL, re, &anynul, &fst);
        fits_read_col(f, TDOUBLE, c[3], r1, 1, (LONGLONG)k, NULL, im, &anynul, &fst);
        if (fst) {
            status = fits_error(CLEF_EIO, path, "cannot read columns L, M, RE, IM", fst);
            goto fail;
        }
        for (size_t i = 0; i < k; i++) {
            const int l = cl[i], m = cm[i];
            if (m < 0 || m > mmax || l < m || l > lmax) {
                status = clef_fail(CLEF_EFORMAT, "%s: row %zu has (L, M) = (%d, %d) outside "
                                   "0 <= M <= MMAX = %d, M <= L <= LMAX = %d",
                                   path, row + i + 1, l, m, mmax, lmax);
                goto fail;
            }
            const size_t idx = clef_alm_index(lmax, l, m);
            if (seen[idx]) {
                status = clef_fail(CLEF_EFORMAT, "%s: row %zu repeats (L, M) = (%d, %d)", path,
                                   row + i + 1, l, m);
                goto fail;
            }
            seen[idx] = 1;
            alm[idx] = re[i] + I * im[i];
        }
    }
    fits_close_file(f, &fst);
    free(seen);
    free(cl);
    free(cm);
    free(re);
    free(im);
    *lmax_out = lmax;
    *mmax_out = mmax;
    *alm_out = alm;
    return CLEF_OK;
fail:
    if (f) {
        int ignore = 0;
        fits_close_file(f, &ignore);
    }
    free(alm);
    free(seen);
    free(cl);
    free(cm);
    free(re);
    free(im);
    return status;
}
