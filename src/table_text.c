/* Text band-power tables: clef's own CSV (metadata in "# KEY = value /
 * comment" lines, a header row, six columns) and simple user tables with
 * two, three or six whitespace- or comma-separated columns
 * (docs/formats.md, "band-power tables"); also a covariance matrix as text. */
#define _XOPEN_SOURCE 700
#include "table_impl.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"

#define MAX_FIELDS 64

typedef struct row {
    int l_lo, l_hi;
    double l_eff, cl, dl, err;
} row;

/* Read one line into *buf (growing it); strip the line end.  Returns the
 * length, -1 at end of file, -2 when the line holds a NUL byte (binary). */
static long next_line(FILE *f, char **buf, size_t *cap)
{
    const ssize_t n = getline(buf, cap, f);
    if (n < 0)
        return -1;
    if (strlen(*buf) != (size_t)n)
        return -2;
    size_t len = (size_t)n;
    while (len && ((*buf)[len - 1] == '\n' || (*buf)[len - 1] == '\r'))
        (*buf)[--len] = '\0';
    return (long)len;
}

/* Split a data line on commas and/or whitespace: a separator is a run of
 * blanks holding at most one comma.  Returns the field count, or -(k+1)
 * when field k (0-based) is empty (two commas in a row, or a leading or
 * trailing comma). */
static int split_fields(char *s, char **fields, int max)
{
    int n = 0;
    char *p = s;
    while (*p == ' ' || *p == '\t')
        p++;
    if (*p == ',')
        return -1;
    while (*p) {
        if (n == max)
            return max + 1;
        fields[n++] = p;
        while (*p && *p != ',' && *p != ' ' && *p != '\t')
            p++;
        int commas = 0;
        while (*p == ',' || *p == ' ' || *p == '\t') {
            commas += *p == ',';
            *p++ = '\0';
        }
        if (commas > 1 || (commas == 1 && !*p))
            return -(n + 1);
    }
    return n;
}

static int parse_number(const char *s, double *v)
{
    char *end;
    errno = 0;
    *v = strtod(s, &end);
    return end != s && !*end && errno != ERANGE && isfinite(*v);
}

/* "# KEY = value / comment" (the CSV writer's metadata lines).  Lines of
 * any other shape are free comments and ignored. */
static int parse_meta_line(clef_bandpowers *bp, const char *s)
{
    while (*s == ' ')
        s++;
    char key[9];
    size_t k = 0;
    while (k < 8 && ((*s >= 'A' && *s <= 'Z') || (*s >= '0' && *s <= '9') || *s == '_' || *s == '-'))
        key[k++] = *s++;
    key[k] = '\0';
    while (*s == ' ')
        s++;
    if (!k || *s != '=')
        return CLEF_OK;
    s++;
    while (*s == ' ')
        s++;
    char value[256];
    size_t n = 0;
    int is_number = 0;
    if (*s == '\'') {
        for (s++;; s++) {
            if (!*s)
                return CLEF_OK; /* unterminated string: not one of ours */
            if (*s == '\'') {
                if (s[1] != '\'')
                    break;
                s++;
            }
            if (n + 1 >= sizeof value)
                return CLEF_OK;
            value[n++] = *s;
        }
        s++;
        value[n] = '\0';
    } else {
        while (*s && *s != '/' && n + 1 < sizeof value)
            value[n++] = *s++;
        while (n && value[n - 1] == ' ')
            n--;
        value[n] = '\0';
        double v;
        if (!parse_number(value, &v))
            return CLEF_OK;
        clef_table_format_double(value, sizeof value, v);
        is_number = 1;
    }
    while (*s == ' ')
        s++;
    const char *comment = "";
    if (*s == '/') {
        s++;
        while (*s == ' ')
            s++;
        comment = s;
    }
    if (clef_table_key_reserved(key))
        return CLEF_OK;
    return clef_table_meta_set(bp, key, value, is_number, comment);
}

/* One data row of `ncols` fields into r; error messages name the line and column. */
static int parse_row(char **fld, int ncols, row *r, const char *path, long line)
{
    static const char *const names2[] = {"l_eff", "D", "err"};
    double v[CLEF_TABLE_NCOLS];
    for (int c = 0; c < ncols; c++)
        if (!parse_number(fld[c], &v[c]))
            CLEF_FAIL(CLEF_EFORMAT, "'%s' line %ld column %d (%s): '%s' is not a finite number",
                      path, line, c + 1, ncols == 6 ? clef_table_csv_names[c] : names2[c], fld[c]);
    if (ncols == 6) {
        for (int c = 0; c < 2; c++)
            if (v[c] != floor(v[c]) || v[c] < 0 || v[c] > 1e9)
                CLEF_FAIL(CLEF_EFORMAT,
                          "'%s' line %ld column %d (%s): '%s' is not a non-negative integer "
                          "multipole", path, line, c + 1, clef_table_csv_names[c], fld[c]);
        r->l_lo = (int)v[0];
        r->l_hi = (int)v[1];
        if (r->l_hi < r->l_lo)
            CLEF_FAIL(CLEF_EFORMAT, "'%s' line %ld column 2 (l_max): %d is below l_min %d", path,
                      line, r->l_hi, r->l_lo);
        r->l_eff = v[2];
        r->cl = v[3];
        r->dl = v[4];
        r->err = v[5];
    } else {
        /* "l_eff D [err]": the bin is taken as the single multipole nearest
         * l_eff and C = 2 pi D / (l (l + 1)) at l = l_eff. */
        if (v[0] <= 0 || v[0] > 1e9)
            CLEF_FAIL(CLEF_EFORMAT, "'%s' line %ld column 1 (l_eff): %s is not a positive multipole",
                      path, line, fld[0]);
        r->l_eff = v[0];
        r->l_lo = r->l_hi = (int)lround(v[0]);
        r->dl = v[1];
        r->cl = 2.0 * M_PI * v[1] / (v[0] * (v[0] + 1.0));
        r->err = ncols == 3 ? v[2] : 0.0;
    }
    const int err_col = ncols == 6 ? 6 : 3;
    if (r->err < 0)
        CLEF_FAIL(CLEF_EFORMAT, "'%s' line %ld column %d (error): %s is negative", path, line,
                  err_col, fld[err_col - 1]);
    return CLEF_OK;
}

int clef_table_read_text(clef_bandpowers **out, const char *path)
{
    *out = NULL;
    FILE *f = fopen(path, "r");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "cannot open band-power table '%s': %s", path, strerror(errno));
    int status = CLEF_OK;
    char *buf = NULL;
    size_t cap = 0;
    row *rows = NULL;
    size_t nrows = 0, rcap = 0;
    int ncols = 0, header_seen = 0;
    long line = 0, first_line = 0;
    /* Metadata lines are collected in a scratch table until the size is known. */
    clef_bandpowers meta = {0};
    clef_bandpowers *bp = NULL;

    for (;;) {
        const long len = next_line(f, &buf, &cap);
        if (len == -1)
            break;
        line++;
        if (len == -2) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld: binary content (NUL byte); not a "
                               "text table or a FITS file", path, line);
            goto fail;
        }
        char *s = buf + strspn(buf, " \t");
        if (!*s)
            continue;
        if (*s == '#') {
            CLEF_CHECK(parse_meta_line(&meta, s + 1));
            continue;
        }
        *(s + strcspn(s, "#")) = '\0'; /* a trailing comment after the data */
        char *fld[MAX_FIELDS];
        const int n = split_fields(s, fld, MAX_FIELDS);
        if (n < 0) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld column %d: empty field", path, line,
                               -n);
            goto fail;
        }
        if (n > MAX_FIELDS) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld: more than %d columns", path, line,
                               MAX_FIELDS);
            goto fail;
        }
        /* One header row of column names may precede the data: a row with
         * no number in it (a row with a mistyped number stays an error). */
        int numbers = 0;
        for (int k = 0; k < n; k++) {
            double dummy;
            numbers += parse_number(fld[k], &dummy);
        }
        if (!nrows && !header_seen && !numbers) {
            header_seen = 1;
            continue;
        }
        if (!ncols) {
            if (n != 2 && n != 3 && n != 6) {
                status = clef_fail(CLEF_EFORMAT, "'%s' line %ld: %d columns; a band-power table "
                                   "has 2 (l_eff D), 3 (l_eff D err) or 6 (l_min l_max l_eff C D "
                                   "err)", path, line, n);
                goto fail;
            }
            ncols = n;
            first_line = line;
        } else if (n != ncols) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld: %d columns, but line %ld has %d",
                               path, line, n, first_line, ncols);
            goto fail;
        }
        if (nrows == rcap) {
            rcap = rcap ? 2 * rcap : 64;
            row *grown = realloc(rows, rcap * sizeof *rows);
            if (!grown) {
                status = clef_fail(CLEF_ENOMEM, "'%s': out of memory at line %ld", path, line);
                goto fail;
            }
            rows = grown;
        }
        CLEF_CHECK(parse_row(fld, ncols, &rows[nrows], path, line));
        if (nrows && !(rows[nrows].l_eff > rows[nrows - 1].l_eff)) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld: l_eff %g does not increase (previous "
                               "row %g)", path, line, rows[nrows].l_eff, rows[nrows - 1].l_eff);
            goto fail;
        }
        nrows++;
    }
    if (ferror(f)) {
        status = clef_fail(CLEF_EIO, "error reading '%s' after line %ld", path, line);
        goto fail;
    }
    if (!nrows) {
        status = clef_fail(CLEF_EFORMAT, "'%s': no data rows in %ld lines", path, line);
        goto fail;
    }
    if (nrows > ((size_t)1 << 30)) {
        status = clef_fail(CLEF_EFORMAT, "'%s': too many rows (%zu)", path, nrows);
        goto fail;
    }
    CLEF_CHECK(clef_bandpowers_alloc(&bp, (int)nrows, 0));
    for (size_t i = 0; i < nrows; i++) {
        bp->l_lo[i] = rows[i].l_lo;
        bp->l_hi[i] = rows[i].l_hi;
        bp->l_eff[i] = rows[i].l_eff;
        bp->cl[i] = rows[i].cl;
        bp->dl[i] = rows[i].dl;
        bp->dl_err[i] = rows[i].err;
    }
    bp->meta = meta.meta;
    bp->nmeta = meta.nmeta;
    meta.meta = NULL;
    *out = bp;
    bp = NULL;
fail:
    clef_bandpowers_free(bp);
    free(meta.meta);
    free(rows);
    free(buf);
    fclose(f);
    return status;
}

/* The next line of a matrix file with its comment and leading blanks cut
 * off, skipping empty lines: its length (*s points into *buf), -1 at end
 * of file, -2 (reported) for binary content. */
static long next_data_line(FILE *f, char **buf, size_t *cap, long *line, const char *path,
                           char **s)
{
    for (;;) {
        const long len = next_line(f, buf, cap);
        if (len == -1)
            return -1;
        ++*line;
        if (len == -2) {
            clef_fail(CLEF_EFORMAT, "'%s' line %ld: binary content (NUL byte)", path, *line);
            return -2;
        }
        *s = *buf + strspn(*buf, " \t");
        *(*s + strcspn(*s, "#")) = '\0';
        if (**s)
            return (long)strlen(*s);
    }
}

int clef_bandpowers_read_cov(clef_bandpowers *bp, const char *path)
{
    if (!bp || bp->nbins < 1 || !path)
        CLEF_FAIL(CLEF_EINVAL, "read covariance: no table or no path");
    FILE *f = fopen(path, "r");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "cannot open covariance file '%s': %s", path, strerror(errno));
    const size_t n = (size_t)bp->nbins;
    int status = CLEF_OK;
    char *buf = NULL;
    size_t cap = 0, filled = 0;
    long line = 0;
    char **fld = NULL;
    double *cov = malloc(n * n * sizeof *cov);
    fld = malloc((n + 1) * sizeof *fld);
    if (!cov || !fld) {
        status = clef_fail(CLEF_ENOMEM, "'%s': out of memory for a %zu x %zu covariance", path, n, n);
        goto fail;
    }
    for (;;) {
        char *s;
        long len = next_data_line(f, &buf, &cap, &line, path, &s);
        if (len == -1)
            break;
        if (len < 0) {
            status = CLEF_EFORMAT;
            goto fail;
        }
        const int nf = split_fields(s, fld, (int)n + 1);
        if (nf < 0) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld column %d: empty field", path, line, -nf);
            goto fail;
        }
        if ((size_t)nf != n || filled == n * n) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld: the table has %zu bins, so the "
                               "covariance needs %zu rows of %zu values (this row has %d)",
                               path, line, n, n, n, nf);
            goto fail;
        }
        for (size_t j = 0; j < n; j++)
            if (!parse_number(fld[j], &cov[filled + j])) {
                status = clef_fail(CLEF_EFORMAT, "'%s' line %ld column %zu: '%s' is not a finite "
                                   "number", path, line, j + 1, fld[j]);
                goto fail;
            }
        filled += n;
    }
    if (filled != n * n) {
        status = clef_fail(CLEF_EFORMAT, "'%s': %zu covariance rows, the table has %zu bins", path,
                           filled / n, n);
        goto fail;
    }
    CLEF_CHECK(clef_table_check_cov(cov, n, path));
    free(bp->cov);
    bp->cov = cov;
    cov = NULL;
fail:
    free(cov);
    free(fld);
    free(buf);
    fclose(f);
    return status;
}

int clef_bandpowers_read_windows(clef_bandpowers *bp, const char *path)
{
    if (!bp || bp->nbins < 1 || !path)
        CLEF_FAIL(CLEF_EINVAL, "read windows: no table or no path");
    FILE *f = fopen(path, "r");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "cannot open window-function file '%s': %s", path, strerror(errno));
    const size_t nb = (size_t)bp->nbins;
    int status = CLEF_OK;
    char *buf = NULL;
    size_t cap = 0, ncol = 0, rows = 0, vcap = 0;
    long line = 0;
    double *win = NULL;
    for (;;) {
        char *s;
        const long len = next_data_line(f, &buf, &cap, &line, path, &s);
        if (len == -1)
            break;
        if (len < 0) {
            status = CLEF_EFORMAT;
            goto fail;
        }
        if (rows == nb) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld: more than %zu rows (the table has "
                               "%zu bins)", path, line, nb, nb);
            goto fail;
        }
        /* The row's fields, one per multipole from l = 0. */
        const size_t nf_max = (size_t)len / 2 + 1;
        char **fld = malloc((nf_max + 1) * sizeof *fld);
        if (!fld) {
            status = clef_fail(CLEF_ENOMEM, "'%s': out of memory", path);
            goto fail;
        }
        const int nf = split_fields(s, fld, (int)nf_max);
        if (nf < 0 || nf > (1 << 20) + 1) {
            free(fld);
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld column %d: empty field", path, line,
                               nf < 0 ? -nf : nf);
            goto fail;
        }
        if (rows == 0) {
            ncol = (size_t)nf;
            vcap = nb * ncol;
            if (!(win = malloc(vcap * sizeof *win))) {
                free(fld);
                status = clef_fail(CLEF_ENOMEM, "'%s': out of memory for %zu x %zu windows", path,
                                   nb, ncol);
                goto fail;
            }
        } else if ((size_t)nf != ncol) {
            free(fld);
            status = clef_fail(CLEF_EFORMAT, "'%s' line %ld: %d values, the first row has %zu "
                               "(one per multipole from l = 0)", path, line, nf, ncol);
            goto fail;
        }
        for (size_t j = 0; j < ncol; j++)
            if (!parse_number(fld[j], &win[rows * ncol + j])) {
                status = clef_fail(CLEF_EFORMAT, "'%s' line %ld column %zu: '%s' is not a finite "
                                   "number", path, line, j + 1, fld[j]);
                free(fld);
                goto fail;
            }
        free(fld);
        rows++;
    }
    if (rows != nb) {
        status = clef_fail(CLEF_EFORMAT, "'%s': %zu window rows, the table has %zu bins", path,
                           rows, nb);
        goto fail;
    }
    CLEF_CHECK(clef_bandpowers_alloc_windows(bp, (int)ncol - 1));
    memcpy(bp->win, win, nb * ncol * sizeof *win);
fail:
    free(win);
    free(buf);
    fclose(f);
    return status;
}
