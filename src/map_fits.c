/* Reading HEALPix maps from FITS binary tables, in every layout of the
 * HEALPix FITS convention: implicit or explicit index, one value per row or
 * vector rows, RING or NESTED, any numeric column type, plain or gzip.
 * Conventions: Gorski et al. 2005, ApJ 622, 759, and the HEALPix FITS format
 * specification (Hivon et al. 2020, v0.6.0).
 *
 * Values stream through a buffer of CLEF_MAP_CHUNK values: one CFITSIO call
 * moves up to a million values, never one pixel. */
#define _POSIX_C_SOURCE 200809L
#include "map_impl.h"
#include "fits_impl.h"

#include <chealpix.h>
#include <errno.h>
#include <fitsio.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <sys/stat.h>

#define CHUNK CLEF_MAP_CHUNK

/* Bad-pixel tolerance: the sentinel stored as float32 reads back as
 * -1.63749999631e30 (METHODS.md section 1), so compare relatively. */
#define BAD_RTOL 1e-5

/* ------------------------------------------------------------------------
 * CFITSIO status handling
 * ------------------------------------------------------------------------ */

void clef_map_fits_status(int fstatus, char *buf, size_t n)
{
    char text[FLEN_STATUS] = "", msg[FLEN_ERRMSG] = "";
    fits_get_errstatus(fstatus, text);
    fits_read_errmsg(msg);
    fits_clear_errmsg();
    size_t len = strlen(msg);
    while (len && (msg[len - 1] == '\n' || msg[len - 1] == ' '))
        msg[--len] = '\0';
    if (*msg)
        snprintf(buf, n, "CFITSIO status %d: %s (%s)", fstatus, text, msg);
    else
        snprintf(buf, n, "CFITSIO status %d: %s", fstatus, text);
}

/* The clef status for a CFITSIO failure while reading a file that the C
 * library opened and read (precheck_file): the content is at fault, as a
 * short read there means a truncated file. */
static int read_status_code(int fstatus)
{
    return fstatus == MEMORY_ALLOCATION ? CLEF_ENOMEM : CLEF_EFORMAT;
}

/* ------------------------------------------------------------------------
 * Reading
 * ------------------------------------------------------------------------ */

typedef struct reader {
    const char *path;
    fitsfile *f;
    int ext;             /* extension number (1 = first after the primary) */
    char where[4400];    /* "'path' extension N (EXTNAME)" for messages */
    int64_t nside, npix;
    int nested, explicit_index;
    double bad_file;     /* BAD_DATA keyword, or the standard sentinel */
    int valcol, pixcol;  /* 1-based; pixcol 0 for implicit tables */
    int64_t nrows, repeat;
    long long real_size; /* bytes really held (memory files); 0: CFITSIO's file size */
} reader;

static int reader_fits_fail(reader *r, int fstatus, const char *what)
{
    char text[256];
    clef_map_fits_status(fstatus, text, sizeof text);
    const int code = read_status_code(fstatus);
    if (fstatus == END_OF_FILE || fstatus == READ_ERROR)
        CLEF_FAIL(code, "%s: %s: the file ends early (truncated?): %s", r->where, what, text);
    CLEF_FAIL(code, "%s: %s: %s", r->where, what, text);
}

/* Refuse what CFITSIO would report obscurely: a missing file, a folder, an
 * empty file, a file that is neither FITS nor compressed, a FITS file
 * shorter than one 2880-byte block. */
static int precheck_file(const char *path)
{
    struct stat st;
    if (stat(path, &st) != 0)
        CLEF_FAIL(CLEF_EIO, "cannot open '%s': %s", path, strerror(errno));
    if (S_ISDIR(st.st_mode))
        CLEF_FAIL(CLEF_EIO, "'%s' is a folder, not a FITS file", path);
    if (st.st_size == 0)
        CLEF_FAIL(CLEF_EFORMAT, "'%s' is empty (0 bytes), not a FITS file", path);
    FILE *fp = fopen(path, "rb");
    if (!fp)
        CLEF_FAIL(CLEF_EIO, "cannot open '%s': %s", path, strerror(errno));
    unsigned char head[9] = {0};
    const size_t got = fread(head, 1, sizeof head, fp);
    fclose(fp);
    /* gzip (1f 8b), Unix compress (1f 9d), bzip2 ("BZh"), zip ("PK"):
     * CFITSIO decompresses these itself and checks what is inside. */
    if (got >= 2 && head[0] == 0x1f && (head[1] == 0x8b || head[1] == 0x9d))
        return CLEF_OK;
    if (got >= 3 && !memcmp(head, "BZh", 3))
        return CLEF_OK;
    if (got >= 2 && !memcmp(head, "PK", 2))
        return CLEF_OK;
    if (got < sizeof head || memcmp(head, "SIMPLE  =", 9) != 0)
        CLEF_FAIL(CLEF_EFORMAT,
                  "'%s' is not a FITS file: it does not begin with the SIMPLE keyword", path);
    if (st.st_size < 2880)
        CLEF_FAIL(CLEF_EFORMAT,
                  "'%s' is truncated: %lld bytes, shorter than one 2880-byte FITS block", path,
                  (long long)st.st_size);
    return CLEF_OK;
}

/* A string keyword, trimmed; *found = 0 if absent. */
static int key_string(reader *r, const char *key, char *val, int *found)
{
    int st = 0;
    char comment[FLEN_COMMENT];
    val[0] = '\0';
    *found = 0;
    fits_read_key(r->f, TSTRING, key, val, comment, &st);
    if (st == KEY_NO_EXIST) {
        fits_clear_errmsg();
        return CLEF_OK;
    }
    if (st)
        return reader_fits_fail(r, st, key);
    size_t n = strlen(val);
    while (n && val[n - 1] == ' ')
        val[--n] = '\0';
    *found = 1;
    return CLEF_OK;
}

static int parse_decimal(const char *s, long *out)
{
    char *end;
    errno = 0;
    const long v = strtol(s, &end, 10);
    if (errno || end == s || *end)
        return 0;
    *out = v;
    return 1;
}

static void set_where(reader *r)
{
    char extname[FLEN_VALUE] = "";
    int st = 0;
    fits_read_key(r->f, TSTRING, "EXTNAME", extname, NULL, &st);
    fits_clear_errmsg();
    if (st == 0 && extname[0])
        snprintf(r->where, sizeof r->where, "'%s' extension %d (%s)", r->path, r->ext, extname);
    else
        snprintf(r->where, sizeof r->where, "'%s' extension %d", r->path, r->ext);
}

/* Move to extension `ext`; *exists = 0 when the file has fewer extensions. */
static int move_ext(reader *r, int ext, int *hdutype, int *exists)
{
    int st = 0;
    *exists = 1;
    fits_movabs_hdu(r->f, ext + 1, hdutype, &st);
    if (st == END_OF_FILE) {
        fits_clear_errmsg();
        *exists = 0;
        return CLEF_OK;
    }
    if (st) {
        snprintf(r->where, sizeof r->where, "'%s' extension %d", r->path, ext);
        return reader_fits_fail(r, st, "cannot read the header");
    }
    r->ext = ext;
    set_where(r);
    return CLEF_OK;
}

static int select_hdu(reader *r, const char *sel)
{
    int type, exists;
    long num;
    if (!sel || !*sel) {
        for (int ext = 1;; ext++) {
            CLEF_TRY(move_ext(r, ext, &type, &exists));
            if (!exists)
                CLEF_FAIL(CLEF_EFORMAT,
                          "'%s' has no binary-table extension (a HEALPix map is stored in one)",
                          r->path);
            if (type == BINARY_TBL)
                return CLEF_OK;
        }
    }
    if (parse_decimal(sel, &num)) {
        if (num < 1 || num > 100000)
            CLEF_FAIL(CLEF_EINVAL, "HDU '%s' for '%s': extension numbers start at 1", sel,
                      r->path);
        CLEF_TRY(move_ext(r, (int)num, &type, &exists));
        if (!exists)
            CLEF_FAIL(CLEF_EINVAL, "'%s' has no extension %ld", r->path, num);
        if (type != BINARY_TBL)
            CLEF_FAIL(CLEF_EFORMAT, "%s is not a binary table", r->where);
        return CLEF_OK;
    }
    char names[1024] = "";
    for (int ext = 1;; ext++) {
        CLEF_TRY(move_ext(r, ext, &type, &exists));
        if (!exists)
            break;
        char name[FLEN_VALUE];
        int found;
        CLEF_TRY(key_string(r, "EXTNAME", name, &found));
        if (found && !strcasecmp(name, sel)) {
            if (type != BINARY_TBL)
                CLEF_FAIL(CLEF_EFORMAT, "%s is not a binary table", r->where);
            return CLEF_OK;
        }
        if (found && strlen(names) + strlen(name) + 4 < sizeof names) {
            strcat(names, names[0] ? ", " : "");
            strcat(names, name);
        }
    }
    CLEF_FAIL(CLEF_EINVAL, "'%s' has no extension named '%s' (EXTNAMEs present: %s)", r->path,
              sel, names[0] ? names : "none");
}

static int column_name(reader *r, int col, char *name)
{
    char key[FLEN_KEYWORD];
    int st = 0, found;
    fits_make_keyn("TTYPE", col, key, &st);
    return key_string(r, key, name, &found);
}

static int select_columns(reader *r, const char *sel, int ncols)
{
    char name[FLEN_VALUE];
    r->pixcol = 0;
    if (r->explicit_index) {
        for (int c = 1; c <= ncols && !r->pixcol; c++) {
            CLEF_TRY(column_name(r, c, name));
            if (!strcasecmp(name, "PIXEL"))
                r->pixcol = c;
        }
        if (!r->pixcol)
            CLEF_FAIL(CLEF_EFORMAT,
                      "%s: explicit-index table (INDXSCHM='EXPLICIT' or OBJECT='PARTIAL') "
                      "has no PIXEL column",
                      r->where);
    }
    long num;
    if (!sel || !*sel) {
        r->valcol = r->pixcol == 1 ? 2 : 1;
        if (r->valcol > ncols)
            CLEF_FAIL(CLEF_EFORMAT, "%s has no value column", r->where);
    } else if (parse_decimal(sel, &num)) {
        if (num < 1 || num > ncols)
            CLEF_FAIL(CLEF_EINVAL, "%s has no column %ld (it has %d)", r->where, num, ncols);
        r->valcol = (int)num;
    } else {
        char names[1024] = "";
        r->valcol = 0;
        for (int c = 1; c <= ncols && !r->valcol; c++) {
            CLEF_TRY(column_name(r, c, name));
            if (!strcasecmp(name, sel))
                r->valcol = c;
            else if (strlen(names) + strlen(name) + 4 < sizeof names) {
                strcat(names, names[0] ? ", " : "");
                strcat(names, name);
            }
        }
        if (!r->valcol)
            CLEF_FAIL(CLEF_EINVAL, "%s has no column named '%s' (columns: %s)", r->where, sel,
                      names);
    }
    if (r->valcol == r->pixcol)
        CLEF_FAIL(CLEF_EINVAL, "%s: column %d is the PIXEL index, not a value column",
                  r->where, r->valcol);
    return CLEF_OK;
}

/* Column type and layout; fills r->repeat.  Only numeric scalar or vector
 * columns hold maps. */
static int check_column(reader *r, int col, const char *role)
{
    int st = 0, type;
    long long repeat, width;
    fits_get_coltypell(r->f, col, &type, &repeat, &width, &st);
    if (st)
        return reader_fits_fail(r, st, role);
    char name[FLEN_VALUE];
    CLEF_TRY(column_name(r, col, name));
    switch (type) {
    case TBYTE: case TSBYTE: case TSHORT: case TUSHORT: case TINT: case TUINT:
    case TLONG: case TULONG: case TLONGLONG: case TULONGLONG: case TFLOAT: case TDOUBLE:
        break;
    default:
        if (type < 0)
            CLEF_FAIL(CLEF_EUNSUP, "%s: column %d (%s) is a variable-length array", r->where,
                      col, name);
        CLEF_FAIL(CLEF_EFORMAT, "%s: column %d (%s) is not numeric (CFITSIO type code %d)",
                  r->where, col, name, type);
    }
    if (repeat < 1)
        CLEF_FAIL(CLEF_EFORMAT, "%s: column %d (%s) has repeat count %lld", r->where, col,
                  name, repeat);
    r->repeat = repeat;
    return CLEF_OK;
}

static int read_header(reader *r, const clef_map_read_opts *opts, clef_map *m)
{
    char val[FLEN_VALUE];
    int found, st = 0;

    CLEF_TRY(key_string(r, "PIXTYPE", val, &found));
    if (found && strcasecmp(val, "HEALPIX"))
        CLEF_FAIL(CLEF_EFORMAT, "%s: keyword PIXTYPE = '%s', not a HEALPix map", r->where, val);
    /* Parsed from the card text: CFITSIO would silently truncate 2.5 to 2. */
    CLEF_TRY(key_string(r, "NSIDE", val, &found));
    if (!found)
        CLEF_FAIL(CLEF_EFORMAT, "%s: keyword NSIDE is missing", r->where);
    char *end;
    errno = 0;
    const long long nside = strtoll(val, &end, 10);
    if (errno || end == val || *end)
        CLEF_FAIL(CLEF_EFORMAT, "%s: keyword NSIDE = '%s' is not an integer", r->where, val);
    if (!clef_nside_valid(nside)) {
        if (nside >= 1 && nside <= CLEF_NSIDE_MAX)
            CLEF_FAIL(CLEF_EFORMAT, "%s: keyword NSIDE = %lld is not a power of two", r->where,
                      nside);
        CLEF_FAIL(CLEF_EFORMAT, "%s: keyword NSIDE = %lld is outside [1, %d]", r->where, nside,
                  CLEF_NSIDE_MAX);
    }
    r->nside = nside;
    r->npix = clef_nside_npix(nside);

    /* NPIX is informative only: some published headers get it wrong, so
     * the pixel count always comes from NSIDE (METHODS.md section 1). */
    long long npix_key;
    fits_read_key(r->f, TLONGLONG, "NPIX", &npix_key, NULL, &st);
    if (st == 0 && npix_key != r->npix)
        clef_log(CLEF_LOG_WARN, "%s: keyword NPIX = %lld disagrees with NSIDE = %lld (%lld "
                 "pixels); NPIX ignored", r->where, npix_key, nside, (long long)r->npix);
    st = 0;
    fits_clear_errmsg();

    char indx[FLEN_VALUE], object[FLEN_VALUE];
    int has_indx, has_object;
    CLEF_TRY(key_string(r, "INDXSCHM", indx, &has_indx));
    CLEF_TRY(key_string(r, "OBJECT", object, &has_object));
    if (has_indx && strcasecmp(indx, "EXPLICIT") && strcasecmp(indx, "IMPLICIT"))
        CLEF_FAIL(CLEF_EFORMAT, "%s: keyword INDXSCHM = '%s' (expected IMPLICIT or EXPLICIT)",
                  r->where, indx);
    r->explicit_index = has_indx ? !strcasecmp(indx, "EXPLICIT")
                                 : (has_object && !strcasecmp(object, "PARTIAL"));

    const char *want = opts ? opts->ordering : NULL;
    if (want && strcasecmp(want, "RING") && strcasecmp(want, "NESTED"))
        CLEF_FAIL(CLEF_EINVAL, "ordering '%s' requested for '%s': expected RING or NESTED", want,
                  r->path);
    CLEF_TRY(key_string(r, "ORDERING", val, &found));
    if (!found) {
        if (!want)
            CLEF_FAIL(CLEF_EFORMAT,
                      "%s: keyword ORDERING is missing (say RING or NESTED explicitly)", r->where);
        snprintf(val, sizeof val, "%s", want);
    }
    if (!strcasecmp(val, "RING"))
        r->nested = 0;
    else if (!strncasecmp(val, "NEST", 4))
        r->nested = 1;
    else
        CLEF_FAIL(CLEF_EFORMAT, "%s: keyword ORDERING = '%s' (expected RING or NESTED)",
                  r->where, val);
    if (found && want && (r->nested != !strcasecmp(want, "NESTED")))
        CLEF_FAIL(CLEF_EINVAL, "%s: keyword ORDERING = '%s' but ordering %s was requested",
                  r->where, val, want);
    m->file_ordering = r->nested ? CLEF_NESTED : CLEF_RING;

    CLEF_TRY(key_string(r, "COORDSYS", val, &found));
    m->coordsys[0] = '\0';
    if (found) {
        if (!strcasecmp(val, "G") || !strcasecmp(val, "GALACTIC"))
            strcpy(m->coordsys, "G");
        else if (!strcasecmp(val, "E") || !strcasecmp(val, "ECLIPTIC"))
            strcpy(m->coordsys, "E");
        else if (!strcasecmp(val, "C") || !strcasecmp(val, "Q") ||
                 !strcasecmp(val, "CELESTIAL") || !strcasecmp(val, "EQUATORIAL"))
            strcpy(m->coordsys, "C");
        else if (val[0])
            clef_log(CLEF_LOG_WARN, "%s: keyword COORDSYS = '%s' not understood; treated as "
                     "unknown", r->where, val);
    }

    /* Polarization convention (clef_map_read_pol interprets it). */
    CLEF_TRY(key_string(r, "POLCCONV", val, &found));
    snprintf(m->polcconv, sizeof m->polcconv, "%s", found ? val : "");

    double bad;
    fits_read_key(r->f, TDOUBLE, "BAD_DATA", &bad, NULL, &st);
    r->bad_file = st == 0 ? bad : CLEF_BAD_VALUE;
    fits_clear_errmsg();
    return CLEF_OK;
}

static int near_rel(double v, double ref)
{
    return ref == 0.0 ? v == 0.0 : fabs(v - ref) <= BAD_RTOL * fabs(ref);
}

/* Missing in the file: NaN, infinities, the standard sentinel, or the
 * file's own BAD_DATA value. */
static int is_bad(double v, double bad_file)
{
    return !isfinite(v) || near_rel(v, CLEF_BAD_VALUE) || near_rel(v, bad_file);
}

/* Read `n` values of column `col` starting at element `e0` (0-based, rows
 * times repeat); CFITSIO applies TSCAL/TZERO and turns TNULL into NaN. */
static int read_values(reader *r, int col, int64_t e0, int64_t n, double *buf)
{
    int st = 0, anynul = 0;
    double nul = NAN;
    fits_read_col(r->f, TDOUBLE, col, e0 / r->repeat + 1, e0 % r->repeat + 1, n, &nul, buf,
                  &anynul, &st);
    if (st)
        return reader_fits_fail(r, st, "cannot read the map values");
    return CLEF_OK;
}

static int read_implicit(reader *r, clef_map *m, double *buf)
{
    const int64_t total = r->nrows * r->repeat; /* == npix: check_sizes */
    int64_t nbad = 0;
    for (int64_t e0 = 0; e0 < total; e0 += CHUNK) {
        const int64_t n = total - e0 < CHUNK ? total - e0 : CHUNK;
        CLEF_TRY(read_values(r, r->valcol, e0, n, buf));
        const int nested = r->nested;
        const int64_t nside = r->nside;
        const double bad_file = r->bad_file;
#pragma omp parallel for reduction(+ : nbad) if (n > 65536)
        for (int64_t i = 0; i < n; i++) {
            int64_t p = e0 + i;
            if (nested)
                nest2ring64(nside, e0 + i, &p);
            const int bad = is_bad(buf[i], bad_file);
            m->pix[p] = bad ? 0.0 : buf[i];
            m->valid[p] = (unsigned char)!bad;
            nbad += bad;
        }
        clef_progress("reading map", (double)(e0 + n) / (double)total);
    }
    m->nbad = nbad;
    m->nmissing = nbad;
    return CLEF_OK;
}

static int read_explicit(reader *r, clef_map *m, double *buf)
{
    int st = 0;
    const int64_t total = r->nrows * r->repeat;
    long long prep, pw;
    int ptype;
    fits_get_coltypell(r->f, r->pixcol, &ptype, &prep, &pw, &st);
    if (st)
        return reader_fits_fail(r, st, "PIXEL column");
    if (prep != r->repeat)
        CLEF_FAIL(CLEF_EFORMAT,
                  "%s: the PIXEL column has %lld values per row but column %d has %lld",
                  r->where, prep, r->valcol, (long long)r->repeat);
    long long *idx = malloc((size_t)(total < CHUNK ? total : CHUNK) * sizeof *idx + 1);
    unsigned char *seen = calloc((size_t)(r->npix / 8 + 1), 1);
    int status = CLEF_OK;
    if (!idx || !seen) {
        status = clef_fail(CLEF_ENOMEM, "%s: cannot allocate the index buffers", r->where);
        goto fail;
    }
    memset(m->valid, 0, (size_t)m->npix);
    int64_t nbad = 0, nset = 0;
    for (int64_t e0 = 0; e0 < total; e0 += CHUNK) {
        const int64_t n = total - e0 < CHUNK ? total - e0 : CHUNK;
        CLEF_CHECK(read_values(r, r->valcol, e0, n, buf));
        int anynul = 0;
        fits_read_col(r->f, TLONGLONG, r->pixcol, e0 / r->repeat + 1, e0 % r->repeat + 1, n,
                      NULL, idx, &anynul, &st);
        if (st) {
            status = reader_fits_fail(r, st, "cannot read the PIXEL column");
            goto fail;
        }
        for (int64_t i = 0; i < n; i++) {
            const long long q = idx[i];
            const long long row = (e0 + i) / r->repeat + 1;
            if (q < 0 || q >= r->npix) {
                status = clef_fail(CLEF_EFORMAT,
                                   "%s: PIXEL index %lld in row %lld is out of range [0, %lld] "
                                   "for NSIDE = %lld",
                                   r->where, q, row, (long long)r->npix - 1, (long long)r->nside);
                goto fail;
            }
            int64_t p = q;
            if (r->nested)
                nest2ring64(r->nside, q, &p);
            if (seen[p >> 3] & (1u << (p & 7))) {
                status = clef_fail(CLEF_EFORMAT, "%s: PIXEL index %lld in row %lld is repeated",
                                   r->where, q, row);
                goto fail;
            }
            seen[p >> 3] |= (unsigned char)(1u << (p & 7));
            nset++;
            if (is_bad(buf[i], r->bad_file)) {
                nbad++;
                continue;
            }
            m->pix[p] = buf[i];
            m->valid[p] = 1;
        }
        clef_progress("reading map", (double)(e0 + n) / (double)total);
    }
    m->nbad = nbad;
    m->nmissing = r->npix - nset + nbad;
fail:
    free(idx);
    free(seen);
    return status;
}

/* The table must be able to hold what its header promises, checked before
 * any allocation of the map's size: an implicit table exactly 12 NSIDE^2
 * values, an explicit one at most that many; and the file must be long
 * enough for NAXIS1 x NAXIS2 bytes of rows plus the heap (PCOUNT), so that
 * a 3 kB file claiming a billion rows is refused at once (CFITSIO itself
 * only notices when it reaches the missing bytes). */
static int check_sizes(reader *r)
{
    long long naxis1 = 0, pcount = 0, headstart, datastart, dataend;
    int st = 0;
    fits_read_key(r->f, TLONGLONG, "NAXIS1", &naxis1, NULL, &st);
    if (st == 0)
        fits_read_key(r->f, TLONGLONG, "PCOUNT", &pcount, NULL, &st);
    if (st == 0)
        fits_get_hduaddrll(r->f, &headstart, &datastart, &dataend, &st);
    if (st)
        return reader_fits_fail(r, st, "cannot read the table layout (NAXIS1, PCOUNT)");
    const long long size = r->real_size > 0 ? r->real_size : r->f->Fptr->logfilesize;
    const long long have = size - datastart;
    if (naxis1 < 0 || pcount < 0 || r->nrows < 0 ||
        (naxis1 > 0 && r->nrows > (INT64_MAX - pcount) / naxis1))
        CLEF_FAIL(CLEF_EFORMAT, "%s: table size NAXIS1 = %lld x NAXIS2 = %lld (+ PCOUNT %lld) "
                  "is out of range", r->where, naxis1, (long long)r->nrows, pcount);
    const long long need = naxis1 * r->nrows + pcount;
    if (need > have)
        CLEF_FAIL(CLEF_EFORMAT,
                  "%s: the file is truncated: the header promises %lld bytes of table data "
                  "(NAXIS1 = %lld x NAXIS2 = %lld + PCOUNT %lld) but only %lld follow the header",
                  r->where, need, naxis1, (long long)r->nrows, pcount, have > 0 ? have : 0);
    /* Every value takes at least one byte of a row (bit columns aside: at
     * most 8 per byte), so rows x repeat cannot overflow after the check. */
    if (r->repeat > 8 * (naxis1 > 0 ? naxis1 : 1))
        CLEF_FAIL(CLEF_EFORMAT, "%s: column %d repeats %lld values in a row of %lld bytes",
                  r->where, r->valcol, (long long)r->repeat, naxis1);
    const int64_t total = r->nrows * r->repeat;
    if (!r->explicit_index && total != r->npix)
        CLEF_FAIL(CLEF_EFORMAT,
                  "%s: keyword NSIDE = %lld implies %lld pixels, but column %d holds %lld "
                  "values (%lld rows x %lld per row)",
                  r->where, (long long)r->nside, (long long)r->npix, r->valcol, (long long)total,
                  (long long)r->nrows, (long long)r->repeat);
    if (r->explicit_index && total > r->npix)
        CLEF_FAIL(CLEF_EFORMAT,
                  "%s: keyword NSIDE = %lld implies %lld pixels, but the explicit-index table "
                  "lists %lld",
                  r->where, (long long)r->nside, (long long)r->npix, (long long)total);
    return CLEF_OK;
}

static void column_meta(reader *r, clef_map *m)
{
    char key[FLEN_KEYWORD], val[FLEN_VALUE];
    int st = 0, found = 0;
    m->column[0] = m->unit[0] = '\0';
    if (column_name(r, r->valcol, val) == CLEF_OK)
        snprintf(m->column, sizeof m->column, "%s", val);
    fits_make_keyn("TUNIT", r->valcol, key, &st);
    if (key_string(r, key, val, &found) == CLEF_OK && found)
        snprintf(m->unit, sizeof m->unit, "%.*s", (int)sizeof m->unit - 1, val);
}

/* Everything after opening: HDU and column selection, header checks, the
 * size checks that come before any large allocation, and the values.  The
 * caller opens and closes r->f. */
static int read_opened(reader *r, const clef_map_read_opts *opts, int header_only,
                       clef_map **out)
{
    clef_map *m = NULL;
    double *buf = NULL;
    int status = CLEF_OK, st = 0;
    CLEF_CHECK(clef_fits_check_headers(r->f, r->path));
    CLEF_CHECK(select_hdu(r, opts ? opts->hdu : NULL));

    m = calloc(1, sizeof *m);
    if (!m) {
        status = clef_fail(CLEF_ENOMEM, "cannot allocate a map header");
        goto fail;
    }
    m->hdu = r->ext;
    CLEF_CHECK(read_header(r, opts, m));
    int ncols = 0;
    long long nrows = 0;
    fits_get_num_cols(r->f, &ncols, &st);
    fits_get_num_rowsll(r->f, &nrows, &st);
    if (st) {
        status = reader_fits_fail(r, st, "cannot read the table size");
        goto fail;
    }
    r->nrows = nrows;
    CLEF_CHECK(select_columns(r, opts ? opts->column : NULL, ncols));
    CLEF_CHECK(check_column(r, r->valcol, "value column"));
    if (r->pixcol) {
        const int64_t vrep = r->repeat;
        CLEF_CHECK(check_column(r, r->pixcol, "PIXEL column"));
        r->repeat = vrep;
    }
    /* Sizes first, allocation after: a header that promises more than the
     * file holds, or an NSIDE its table cannot fill, is refused before the
     * full-sky arrays (9 bytes per pixel, 7.2 GB at NSIDE 8192) exist. */
    CLEF_CHECK(check_sizes(r));
    if (header_only) {
        m->nside = r->nside;
        m->npix = r->npix;
        column_meta(r, m);
        *out = m;
        return CLEF_OK;
    }

    /* The pixel arrays come from clef_map_alloc so clef_map_free owns them. */
    clef_map *px = NULL;
    status = clef_map_alloc(&px, r->nside);
    if (status != CLEF_OK) {
        char why[512];
        snprintf(why, sizeof why, "%s", clef_last_error());
        status = clef_fail(status, "%s: %s", r->where, why);
        goto fail;
    }
    m->nside = px->nside;
    m->npix = px->npix;
    m->pix = px->pix;
    m->valid = px->valid;
    free(px);
    column_meta(r, m);

    const int64_t nbuf = r->nrows * r->repeat < CHUNK ? r->nrows * r->repeat : CHUNK;
    buf = malloc((size_t)(nbuf > 0 ? nbuf : 1) * sizeof *buf);
    if (!buf) {
        status = clef_fail(CLEF_ENOMEM, "%s: cannot allocate a read buffer of %zu bytes",
                           r->where, (size_t)(nbuf > 0 ? nbuf : 1) * sizeof *buf);
        goto fail;
    }
    if (r->explicit_index)
        CLEF_CHECK(read_explicit(r, m, buf));
    else
        CLEF_CHECK(read_implicit(r, m, buf));
    free(buf);
    *out = m;
    return CLEF_OK;
fail:
    free(buf);
    clef_map_free(m);
    return status;
}

static int read_file(clef_map **out, const char *path, const clef_map_read_opts *opts,
                     int header_only)
{
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "clef_map_read: out is NULL");
    *out = NULL;
    if (!path || !*path)
        CLEF_FAIL(CLEF_EINVAL, "clef_map_read: no file name given");
    CLEF_TRY(precheck_file(path));

    reader r;
    memset(&r, 0, sizeof r);
    r.path = path;
    snprintf(r.where, sizeof r.where, "'%s'", path);
    clef_map *m = NULL;
    int status = CLEF_OK, st = 0;

    CLEF_TRY(clef_fits_check_gzip_file(path));
    /* The disk-file opener takes the name literally (no extended-syntax
     * parsing of brackets) and still decompresses gzip. */
    fits_open_diskfile(&r.f, path, READONLY, &st);
    if (st) {
        char text[256];
        clef_map_fits_status(st, text, sizeof text);
        r.f = NULL;
        status = clef_fail(read_status_code(st), "cannot read '%s' as FITS: %s", path, text);
        goto fail;
    }
    CLEF_CHECK(read_opened(&r, opts, header_only, &m));
    fits_close_file(r.f, &st);
    r.f = NULL;
    if (st) {
        status = reader_fits_fail(&r, st, "cannot close the file");
        goto fail;
    }
    if (header_only) {
        *out = m;
        return CLEF_OK;
    }
    clef_log(CLEF_LOG_INFO, "read %s: nside %lld, %s, %lld of %lld pixels missing", r.where,
             (long long)m->nside, m->file_ordering == CLEF_NESTED ? "NESTED" : "RING",
             (long long)m->nmissing, (long long)m->npix);
    *out = m;
    return CLEF_OK;

fail:
    if (r.f) {
        int st2 = 0;
        fits_close_file(r.f, &st2);
        fits_clear_errmsg();
    }
    clef_map_free(m);
    return status;
}

int clef_map_read(clef_map **out, const char *path, const clef_map_read_opts *opts)
{
    return read_file(out, path, opts, 0);
}

int clef_map_read_header(clef_map **out, const char *path, const clef_map_read_opts *opts)
{
    return read_file(out, path, opts, 1);
}

int clef_map_read_memory(clef_map **out, const void *data, size_t size, const char *name,
                         const clef_map_read_opts *opts)
{
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "clef_map_read_memory: out is NULL");
    *out = NULL;
    if (!data || !size)
        CLEF_FAIL(CLEF_EFORMAT, "'%s' is empty (0 bytes), not a FITS file", name);
    CLEF_TRY(clef_fits_check_gzip(data, size,
                                  size >= 4 ? (const unsigned char *)data + size - 4 : NULL,
                                  (long long)size, name));
    reader r;
    memset(&r, 0, sizeof r);
    r.path = name;
    snprintf(r.where, sizeof r.where, "'%s'", name);
    int st = 0;
    /* CFITSIO's memory driver reads whole 2880-byte records and does not
     * stop at the end of the buffer it was given (found by fuzz_map: a file
     * cut inside its last record was read past its end), so it gets a copy
     * padded with zeros to whole records.  The size checks use the true
     * length (r.real_size): a cut inside the data is still "truncated". */
    const size_t padded = (size + 2879) / 2880 * 2880;
    void *mem = calloc(1, padded);
    if (!mem)
        CLEF_FAIL(CLEF_ENOMEM, "'%s': no memory for a %zu-byte copy", name, padded);
    memcpy(mem, data, size);
    r.real_size = (long long)size;
    size_t msize = padded;
    fits_open_memfile(&r.f, name, READONLY, &mem, &msize, 0, NULL, &st);
    if (st) {
        char text[256];
        clef_map_fits_status(st, text, sizeof text);
        free(mem);
        CLEF_FAIL(read_status_code(st), "cannot read '%s' as FITS: %s", name, text);
    }
    /* CFITSIO may take the file to be longer than the buffer (a primary
     * header describing more data than follows; fuzz_map finding), and its
     * memory driver would then read past the buffer: refuse that here. */
    if (r.f->Fptr->logfilesize > (long long)padded) {
        const long long claimed = r.f->Fptr->logfilesize;
        st = 0;
        fits_close_file(r.f, &st);
        fits_clear_errmsg();
        free(mem);
        CLEF_FAIL(CLEF_EFORMAT, "'%s' is truncated: its headers describe %lld bytes, but it "
                  "holds %zu", name, claimed, size);
    }
    const int status = read_opened(&r, opts, 0, out);
    st = 0;
    fits_close_file(r.f, &st);
    fits_clear_errmsg();
    free(mem);
    return status;
}
