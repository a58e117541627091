/* Writing HEALPix maps as FITS binary tables: RING, implicit index, full
 * sky, one value per row or vector rows, float32 or float64, plain or gzip,
 * atomically (clef_outfile_*).  Keywords follow the HEALPix FITS format
 * specification (Hivon et al. 2020, v0.6.0).  Values stream through a buffer
 * of CLEF_MAP_CHUNK values. */
#define _GNU_SOURCE /* mkstemps */
#include "map_impl.h"

#include <errno.h>
#include <fitsio.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#define CHUNK CLEF_MAP_CHUNK

/* The message names the target, never the temporary; a full disk, a
 * read-only file system or a vanished folder is said in words instead of
 * CFITSIO's status number. */
static int write_fail(int fstatus, const char *path, const char *what)
{
    const int e = errno;
    char text[256], why[256];
    clef_map_fits_status(fstatus, text, sizeof text);
    if (fstatus == MEMORY_ALLOCATION)
        CLEF_FAIL(CLEF_ENOMEM, "cannot write '%s': %s: %s", path, what, text);
    clef_write_reason(path, e == ENOSPC || e == EDQUOT || e == EROFS ? e : 0, why, sizeof why);
    if (*why)
        CLEF_FAIL(CLEF_EIO, "cannot write '%s': %s", path, why);
    CLEF_FAIL(CLEF_EIO, "cannot write '%s': %s: %s", path, what, text);
}

static void write_header(fitsfile *f, const clef_map *m, const clef_map_write_opts *opts,
                         int *st)
{
    long long firstpix = 0, lastpix = m->npix - 1, nside = m->nside;
    double bad = CLEF_BAD_VALUE;
    fits_write_key(f, TSTRING, "PIXTYPE", "HEALPIX", "HEALPix pixelisation", st);
    fits_write_key(f, TSTRING, "ORDERING", "RING", "pixel ordering scheme", st);
    fits_write_key(f, TLONGLONG, "NSIDE", &nside, "resolution parameter", st);
    fits_write_key(f, TLONGLONG, "FIRSTPIX", &firstpix, "first pixel index (0-based)", st);
    fits_write_key(f, TLONGLONG, "LASTPIX", &lastpix, "last pixel index (0-based)", st);
    fits_write_key(f, TSTRING, "INDXSCHM", "IMPLICIT", "row order is pixel order", st);
    fits_write_key(f, TSTRING, "OBJECT", "FULLSKY", "every pixel is stored", st);
    if (m->coordsys[0])
        fits_write_key(f, TSTRING, "COORDSYS", (char *)m->coordsys,
                       "G galactic, E ecliptic, C celestial", st);
    fits_write_key(f, TDOUBLE, "BAD_DATA", &bad, "value of missing pixels", st);
    fits_write_key(f, TSTRING, "CLEFVERS", CLEF_VERSION, "written by clef, this version", st);
    if (opts && opts->history && *opts->history)
        fits_write_history(f, opts->history, st);
}

/* CFITSIO gzips its output when the first ".gz" in the name ends it (it
 * searches for the first occurrence).  The temporary name from
 * clef_outfile_begin holds the whole output name, so it cannot serve: make a
 * second temporary "<folder>/.clef-tmp.<pid>.<host>.XXXXXX.gz" (no label),
 * moved onto the first once complete. */
static int gz_temp(const char *tmp_path, char *out, size_t n)
{
    const char *slash = strrchr(tmp_path, '/');
    const int dirlen = slash ? (int)(slash - tmp_path) + 1 : 0;
    if (dirlen && memmem(tmp_path, (size_t)dirlen, ".gz", 3))
        CLEF_FAIL(CLEF_EUNSUP, "cannot write gzip output into folder '%.*s': its name contains "
                  "'.gz'", dirlen, tmp_path);
    return clef_temp_make(out, n, tmp_path, NULL, ".gz");
}

/* One table of ncol maps of the same nside (columns names[k]); polcconv
 * non-NULL: the POLCCONV keyword of a T/Q/U table. */
static int write_columns(const clef_map *const *mm, int ncol, const char *const *names,
                         const char *polcconv, const char *path, const clef_map_write_opts *opts);

int clef_map_write(const clef_map *m, const char *path, const clef_map_write_opts *opts)
{
    const char *colname = opts && opts->column && *opts->column ? opts->column : "TEMPERATURE";
    return write_columns(&m, 1, &colname, NULL, path, opts);
}

int clef_map_write_pol(const clef_map *t, const clef_map *q, const clef_map *u, const char *path,
                       const clef_map_write_opts *opts)
{
    const clef_map *mm[3] = {t, q, u};
    static const char *const names[3] = {"TEMPERATURE", "Q_POLARISATION", "U_POLARISATION"};
    for (int k = 0; k < 3; k++)
        if (!mm[k] || mm[k]->nside != t->nside)
            CLEF_FAIL(CLEF_EINVAL, "cannot write '%s': T, Q and U maps missing or of different "
                      "nside", path ? path : "");
    return write_columns(mm, 3, names, "COSMO", path, opts);
}

static int write_columns(const clef_map *const *mm, int ncol, const char *const *names,
                         const char *polcconv, const char *path, const clef_map_write_opts *opts)
{
    const clef_map *m = mm[0];
    if (!m || !m->pix || !m->valid)
        CLEF_FAIL(CLEF_EINVAL, "clef_map_write: map is NULL or empty");
    if (!path || !*path)
        CLEF_FAIL(CLEF_EINVAL, "clef_map_write: no file name given");
    if (!clef_nside_valid(m->nside) || m->npix != clef_nside_npix(m->nside))
        CLEF_FAIL(CLEF_EINVAL, "cannot write '%s': map nside %lld / npix %lld is inconsistent",
                  path, (long long)m->nside, (long long)m->npix);
    const int64_t rowlen = opts && opts->row_length > 1 ? opts->row_length : 1;
    if (opts && opts->row_length < 0)
        CLEF_FAIL(CLEF_EINVAL, "cannot write '%s': row length %d is negative", path,
                  opts->row_length);
    if (m->npix % rowlen != 0)
        CLEF_FAIL(CLEF_EINVAL,
                  "cannot write '%s': row length %lld does not divide the %lld pixels of nside "
                  "%lld",
                  path, (long long)rowlen, (long long)m->npix, (long long)m->nside);
    const int single = opts && opts->single_precision;
    const char *unit = opts && opts->unit ? opts->unit : m->unit;
    const char *extname = opts && opts->extname && *opts->extname ? opts->extname : "SKYMAP";

    clef_outfile of;
    CLEF_TRY(clef_outfile_begin(&of, path));
    int status = CLEF_OK, st = 0;
    fitsfile *f = NULL;
    double *buf = NULL;
    const size_t plen = strlen(path);
    const int gz = plen > 3 && !strcmp(path + plen - 3, ".gz");
    char gz_path[4200] = "", name[4208];
    if (gz)
        CLEF_CHECK(gz_temp(of.tmp_path, gz_path, sizeof gz_path));
    snprintf(name, sizeof name, "!%s", gz ? gz_path : of.tmp_path);
    fits_create_file(&f, name, &st);
    if (st) {
        f = NULL;
        status = write_fail(st, path, "cannot create the file");
        goto fail;
    }
    fits_create_img(f, BYTE_IMG, 0, NULL, &st);

    char tform[32];
    snprintf(tform, sizeof tform, "%lld%c", (long long)rowlen, single ? 'E' : 'D');
    char *ttype[3], *tforms[3], *tunit[3];
    for (int k = 0; k < ncol; k++) {
        ttype[k] = (char *)names[k];
        tforms[k] = tform;
        tunit[k] = (char *)(unit ? unit : "");
    }
    fits_create_tbl(f, BINARY_TBL, 0, ncol, ttype, tforms, tunit, extname, &st);
    write_header(f, m, opts, &st);
    if (polcconv)
        fits_write_key(f, TSTRING, "POLCCONV", (char *)polcconv,
                       "Q/U convention (HEALPix COSMO: clef's internal one)", &st);
    if (st) {
        status = write_fail(st, path, "cannot write the header");
        goto fail;
    }

    const int64_t nbuf = m->npix < CHUNK ? m->npix : CHUNK;
    buf = malloc((size_t)nbuf * sizeof *buf);
    if (!buf) {
        status = clef_fail(CLEF_ENOMEM, "cannot allocate a write buffer for '%s'", path);
        goto fail;
    }
    for (int k = 0; k < ncol; k++)
        for (int64_t e0 = 0; e0 < m->npix; e0 += CHUNK) {
            const clef_map *mk = mm[k];
            const int64_t n = m->npix - e0 < CHUNK ? m->npix - e0 : CHUNK;
            for (int64_t i = 0; i < n; i++)
                buf[i] = mk->valid[e0 + i] ? mk->pix[e0 + i] : CLEF_BAD_VALUE;
            fits_write_col(f, TDOUBLE, k + 1, e0 / rowlen + 1, e0 % rowlen + 1, n, buf, &st);
            if (st) {
                status = write_fail(st, path, "cannot write the map values");
                goto fail;
            }
            clef_progress("writing map", (double)(k * m->npix + e0 + n) / (double)(ncol * m->npix));
        }
    fits_write_chksum(f, &st);
    fits_close_file(f, &st);
    f = NULL;
    if (st) {
        status = write_fail(st, path, "cannot finish the file");
        goto fail;
    }
    free(buf);
    buf = NULL;
    if (gz) {
        if (rename(gz_path, of.tmp_path) != 0) {
            char why[256];
            status = clef_fail(CLEF_EIO, "cannot write '%s': %s", path,
                               clef_write_reason(path, errno, why, sizeof why));
            goto fail;
        }
        clef_temp_forget(gz_path);
        gz_path[0] = '\0';
    }
    return clef_outfile_commit(&of);

fail:
    if (f) {
        int st2 = 0;
        fits_close_file(f, &st2);
        fits_clear_errmsg();
    }
    free(buf);
    if (gz_path[0]) {
        unlink(gz_path);
        clef_temp_forget(gz_path);
    }
    clef_outfile_abort(&of);
    return status;
}
