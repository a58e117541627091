/* Band-power tables in memory, their metadata items, the CSV writers and the
 * format dispatch of the reader.  Layouts: docs/formats.md, "band-power
 * tables".  FITS lives in table_fits.c, text reading in table_text.c. */
#define _POSIX_C_SOURCE 200809L
#include "table_impl.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"

const char *const clef_table_csv_names[CLEF_TABLE_NCOLS] = {
    "l_min", "l_max", "l_eff", "c_band_uK2", "d_band_uK2", "d_sigma_uK2"};
const char *const clef_table_fits_names[CLEF_TABLE_NCOLS] = {
    "LMIN", "LMAX", "LEFF", "C_BAND", "D_BAND", "D_SIGMA"};

int clef_bandpowers_alloc(clef_bandpowers **out, int nbins, int with_cov)
{
    *out = NULL;
    if (nbins < 1)
        CLEF_FAIL(CLEF_EINVAL, "band-power table: nbins = %d, must be at least 1", nbins);
    if ((size_t)nbins > ((size_t)1 << 30) || (with_cov && (size_t)nbins > ((size_t)1 << 15)))
        CLEF_FAIL(CLEF_EINVAL, "band-power table: nbins = %d is too large", nbins);
    clef_bandpowers *bp = calloc(1, sizeof *bp);
    if (!bp)
        CLEF_FAIL(CLEF_ENOMEM, "band-power table: out of memory for %d bins", nbins);
    const size_t n = (size_t)nbins;
    bp->nbins = nbins;
    bp->l_lo = calloc(n, sizeof *bp->l_lo);
    bp->l_hi = calloc(n, sizeof *bp->l_hi);
    bp->l_eff = calloc(n, sizeof *bp->l_eff);
    bp->cl = calloc(n, sizeof *bp->cl);
    bp->dl = calloc(n, sizeof *bp->dl);
    bp->dl_err = calloc(n, sizeof *bp->dl_err);
    if (with_cov)
        bp->cov = calloc(n * n, sizeof *bp->cov);
    if (!bp->l_lo || !bp->l_hi || !bp->l_eff || !bp->cl || !bp->dl || !bp->dl_err ||
        (with_cov && !bp->cov)) {
        clef_bandpowers_free(bp);
        CLEF_FAIL(CLEF_ENOMEM, "band-power table: out of memory for %d bins", nbins);
    }
    *out = bp;
    return CLEF_OK;
}

void clef_bandpowers_free(clef_bandpowers *bp)
{
    if (!bp)
        return;
    free(bp->l_lo);
    free(bp->l_hi);
    free(bp->l_eff);
    free(bp->cl);
    free(bp->dl);
    free(bp->dl_err);
    free(bp->cov);
    free(bp->win);
    free(bp->meta);
    free(bp);
}

int clef_bandpowers_alloc_windows(clef_bandpowers *bp, int win_lmax)
{
    if (!bp || win_lmax < 0 || win_lmax > (1 << 20))
        CLEF_FAIL(CLEF_EINVAL, "band-power windows: lmax %d outside 0..%d", win_lmax, 1 << 20);
    const size_t n = (size_t)bp->nbins * ((size_t)win_lmax + 1);
    double *w = calloc(n, sizeof *w);
    if (!w)
        CLEF_FAIL(CLEF_ENOMEM, "band-power windows: out of memory for %d bins x %d multipoles",
                  bp->nbins, win_lmax + 1);
    free(bp->win);
    bp->win = w;
    bp->win_lmax = win_lmax;
    return CLEF_OK;
}

/* ---- metadata items ---------------------------------------------------- */

/* Keywords the file layer writes itself, or that FITS reserves for the
 * structure of an HDU (FITS Standard 4.0, section 4.4.1). */
int clef_table_key_reserved(const char *key)
{
    static const char *const fixed[] = {
        "SIMPLE", "BITPIX", "EXTEND", "XTENSION", "PCOUNT", "GCOUNT", "TFIELDS",
        "EXTNAME", "EXTVER", "END", "COMMENT", "HISTORY", "CONTINUE", "LONGSTRN",
        "CLEFVERS", "DATE", "BUNIT", "THEAP", "BSCALE", "BZERO"};
    for (size_t i = 0; i < sizeof fixed / sizeof fixed[0]; i++)
        if (!strcmp(key, fixed[i]))
            return 1;
    /* Indexed structural keywords: NAXISn, TTYPEn, TFORMn, TUNITn, ... */
    static const char *const indexed[] = {"NAXIS", "TTYPE", "TFORM", "TUNIT", "TDISP",
                                          "TNULL", "TSCAL", "TZERO", "TDIM", "TBCOL"};
    for (size_t i = 0; i < sizeof indexed / sizeof indexed[0]; i++) {
        const size_t n = strlen(indexed[i]);
        if (!strncmp(key, indexed[i], n) && strspn(key + n, "0123456789") == strlen(key + n))
            return 1;
    }
    return 0;
}

int clef_table_key_valid(const char *key)
{
    const size_t n = key ? strlen(key) : 0;
    return n >= 1 && n <= 8 && strspn(key, "ABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_") == n;
}

void clef_table_format_double(char *buf, size_t size, double v)
{
    for (int digits = 15; digits <= 17; digits++) {
        snprintf(buf, size, "%.*g", digits, v);
        if (strtod(buf, NULL) == v)
            return;
    }
}

int clef_table_meta_set(clef_bandpowers *bp, const char *key, const char *value, int is_number,
                        const char *comment)
{
    if (!bp || !clef_table_key_valid(key))
        CLEF_FAIL(CLEF_EINVAL, "metadata key '%s' is not a FITS keyword name (1-8 of A-Z 0-9 - _)",
                  key ? key : "(null)");
    if (!value)
        CLEF_FAIL(CLEF_EINVAL, "metadata item %s: value is NULL", key);
    if (strlen(value) >= sizeof bp->meta[0].value)
        CLEF_FAIL(CLEF_EINVAL, "metadata item %s: value longer than %zu characters", key,
                  sizeof bp->meta[0].value - 1);
    clef_meta *m = NULL;
    for (int i = 0; i < bp->nmeta; i++)
        if (!strcmp(bp->meta[i].key, key))
            m = &bp->meta[i];
    if (!m) {
        clef_meta *grown = realloc(bp->meta, ((size_t)bp->nmeta + 1) * sizeof *grown);
        if (!grown)
            CLEF_FAIL(CLEF_ENOMEM, "metadata item %s: out of memory", key);
        bp->meta = grown;
        m = &bp->meta[bp->nmeta++];
    }
    memset(m, 0, sizeof *m);
    strcpy(m->key, key);
    /* FITS headers hold printable ASCII only (FITS 4.0 4.1.2.3); the same
     * rule keeps the CSV comment lines one line each. */
    int replaced = 0;
    size_t i = 0;
    for (; value[i]; i++) {
        const unsigned char c = (unsigned char)value[i];
        replaced += c < 32 || c > 126;
        m->value[i] = (c < 32 || c > 126) ? '?' : (char)c;
    }
    m->value[i] = '\0';
    if (replaced)
        clef_log(CLEF_LOG_WARN, "metadata item %s: %d non-ASCII or control characters replaced by '?'",
                 key, replaced);
    m->is_number = is_number;
    if (comment) {
        size_t j = 0;
        for (; comment[j] && j + 1 < sizeof m->comment; j++) {
            const unsigned char c = (unsigned char)comment[j];
            m->comment[j] = (c < 32 || c > 126) ? '?' : (char)c;
        }
        m->comment[j] = '\0';
    }
    return CLEF_OK;
}

int clef_bandpowers_meta_text(clef_bandpowers *bp, const char *key, const char *value,
                              const char *comment)
{
    if (key && clef_table_key_valid(key) && clef_table_key_reserved(key))
        CLEF_FAIL(CLEF_EINVAL, "metadata key '%s' is reserved for the file structure", key);
    return clef_table_meta_set(bp, key, value, 0, comment);
}

int clef_bandpowers_meta_number(clef_bandpowers *bp, const char *key, double value,
                                const char *comment)
{
    if (key && clef_table_key_valid(key) && clef_table_key_reserved(key))
        CLEF_FAIL(CLEF_EINVAL, "metadata key '%s' is reserved for the file structure", key);
    if (!isfinite(value))
        CLEF_FAIL(CLEF_EINVAL, "metadata item %s: value %g is not finite (FITS headers hold finite numbers only)",
                  key ? key : "(null)", value);
    char text[64];
    clef_table_format_double(text, sizeof text, value);
    return clef_table_meta_set(bp, key, text, 1, comment);
}

const char *clef_bandpowers_meta_get(const clef_bandpowers *bp, const char *key)
{
    if (!bp || !key)
        return NULL;
    for (int i = 0; i < bp->nmeta; i++)
        if (!strcmp(bp->meta[i].key, key))
            return bp->meta[i].value;
    return NULL;
}

/* ---- CSV writers ------------------------------------------------------- */

int clef_table_check(const clef_bandpowers *bp, const char *path)
{
    if (!bp || bp->nbins < 1 || !bp->l_lo || !bp->l_hi || !bp->l_eff || !bp->cl || !bp->dl ||
        !bp->dl_err)
        CLEF_FAIL(CLEF_EINVAL, "'%s': band-power table is empty or incomplete", path);
    for (int b = 0; b < bp->nbins; b++) {
        if (bp->l_lo[b] < 0 || bp->l_hi[b] < bp->l_lo[b])
            CLEF_FAIL(CLEF_EINVAL, "'%s': bin %d has l range [%d, %d]", path, b, bp->l_lo[b],
                      bp->l_hi[b]);
        const double v[4] = {bp->l_eff[b], bp->cl[b], bp->dl[b], bp->dl_err[b]};
        for (int k = 0; k < 4; k++)
            if (!isfinite(v[k]))
                CLEF_FAIL(CLEF_EINVAL, "'%s': bin %d column %s is not finite", path, b,
                          clef_table_csv_names[k + 2]);
        if (bp->dl_err[b] < 0)
            CLEF_FAIL(CLEF_EINVAL, "'%s': bin %d has a negative error %g", path, b, bp->dl_err[b]);
    }
    if (bp->cov)
        for (size_t i = 0; i < (size_t)bp->nbins * (size_t)bp->nbins; i++)
            if (!isfinite(bp->cov[i]))
                CLEF_FAIL(CLEF_EINVAL, "'%s': covariance element (%zu, %zu) is not finite", path,
                          i / (size_t)bp->nbins, i % (size_t)bp->nbins);
    return CLEF_OK;
}

/* "# KEY = value / comment": FITS card syntax, strings in single quotes with
 * embedded quotes doubled (FITS 4.0 4.2.1), so one parser reads both. */
static void write_meta_line(FILE *f, const char *key, const char *value, int is_number,
                            const char *comment)
{
    fprintf(f, "# %s = ", key);
    if (is_number) {
        fputs(value, f);
    } else {
        fputc('\'', f);
        for (const char *c = value; *c; c++) {
            if (*c == '\'')
                fputc('\'', f);
            fputc(*c, f);
        }
        fputc('\'', f);
    }
    if (comment && *comment)
        fprintf(f, " / %s", comment);
    fputc('\n', f);
}

/* Write through a temporary file; `body` fills the stream. */
static int write_text_atomic(const clef_bandpowers *bp, const char *path,
                             void (*body)(FILE *f, const clef_bandpowers *bp))
{
    clef_outfile of;
    CLEF_TRY(clef_outfile_begin(&of, path));
    FILE *f = fopen(of.tmp_path, "w");
    if (!f) {
        const int code = clef_write_fail(CLEF_EIO, path, "cannot create it", NULL);
        clef_outfile_abort(&of);
        return code;
    }
    body(f, bp);
    const int bad = ferror(f);
    if (fclose(f) != 0 || bad) {
        const int code = clef_write_fail(CLEF_EIO, path, "write error", NULL);
        clef_outfile_abort(&of);
        return code;
    }
    return clef_outfile_commit(&of);
}

static void csv_body(FILE *f, const clef_bandpowers *bp)
{
    write_meta_line(f, "CLEFVERS", CLEF_VERSION, 0, "clef version that wrote this file");
    for (int i = 0; i < bp->nmeta; i++)
        write_meta_line(f, bp->meta[i].key, bp->meta[i].value, bp->meta[i].is_number,
                        bp->meta[i].comment);
    for (int k = 0; k < CLEF_TABLE_NCOLS; k++)
        fprintf(f, "%s%c", clef_table_csv_names[k], k + 1 < CLEF_TABLE_NCOLS ? ',' : '\n');
    char v[4][40];
    for (int b = 0; b < bp->nbins; b++) {
        clef_table_format_double(v[0], sizeof v[0], bp->l_eff[b]);
        clef_table_format_double(v[1], sizeof v[1], bp->cl[b]);
        clef_table_format_double(v[2], sizeof v[2], bp->dl[b]);
        clef_table_format_double(v[3], sizeof v[3], bp->dl_err[b]);
        fprintf(f, "%d,%d,%s,%s,%s,%s\n", bp->l_lo[b], bp->l_hi[b], v[0], v[1], v[2], v[3]);
    }
}

int clef_bandpowers_write_csv(const clef_bandpowers *bp, const char *path)
{
    CLEF_TRY(clef_table_check(bp, path));
    return write_text_atomic(bp, path, csv_body);
}

static void cov_body(FILE *f, const clef_bandpowers *bp)
{
    write_meta_line(f, "CLEFVERS", CLEF_VERSION, 0, "clef version that wrote this file");
    fprintf(f, "# covariance of d_band_uK2 in uK^4: row i, column j = Cov(D_i, D_j), bins in table order\n");
    char v[40];
    const size_t n = (size_t)bp->nbins;
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < n; j++) {
            clef_table_format_double(v, sizeof v, bp->cov[i * n + j]);
            fprintf(f, "%s%c", v, j + 1 < n ? ',' : '\n');
        }
}

int clef_bandpowers_write_cov_csv(const clef_bandpowers *bp, const char *path)
{
    CLEF_TRY(clef_table_check(bp, path));
    if (!bp->cov)
        CLEF_FAIL(CLEF_EINVAL, "'%s': the band-power table has no covariance to write", path);
    return write_text_atomic(bp, path, cov_body);
}

static void win_body(FILE *f, const clef_bandpowers *bp)
{
    write_meta_line(f, "CLEFVERS", CLEF_VERSION, 0, "clef version that wrote this file");
    fprintf(f, "# band-power window functions: row b (bins in table order), column l "
               "(l = 0..%d) = W_bl; <d_band_uK2 of row b> = sum_l W_bl D_l\n", bp->win_lmax);
    char v[40];
    const size_t n = (size_t)bp->win_lmax + 1;
    for (size_t b = 0; b < (size_t)bp->nbins; b++)
        for (size_t l = 0; l < n; l++) {
            const double x = bp->win[b * n + l];
            if (x == 0)
                fputc('0', f); /* most of a row is exactly 0: keep the file small */
            else {
                clef_table_format_double(v, sizeof v, x);
                fputs(v, f);
            }
            fputc(l + 1 < n ? ',' : '\n', f);
        }
}

int clef_bandpowers_write_windows_csv(const clef_bandpowers *bp, const char *path)
{
    CLEF_TRY(clef_table_check(bp, path));
    if (!bp->win)
        CLEF_FAIL(CLEF_EINVAL, "'%s': the band-power table has no window functions to write", path);
    for (size_t i = 0; i < (size_t)bp->nbins * ((size_t)bp->win_lmax + 1); i++)
        if (!isfinite(bp->win[i]))
            CLEF_FAIL(CLEF_EINVAL, "'%s': window element (bin %zu, l %zu) is not finite", path,
                      i / ((size_t)bp->win_lmax + 1), i % ((size_t)bp->win_lmax + 1));
    return write_text_atomic(bp, path, win_body);
}

/* ---- reading ----------------------------------------------------------- */

int clef_table_check_cov(const double *cov, size_t n, const char *path)
{
    for (size_t i = 0; i < n; i++) {
        if (!(cov[i * n + i] > 0) || !isfinite(cov[i * n + i]))
            CLEF_FAIL(CLEF_EFORMAT, "'%s': covariance diagonal element %zu is %g, not positive",
                      path, i + 1, cov[i * n + i]);
        for (size_t j = 0; j < i; j++)
            if (!(fabs(cov[i * n + j] - cov[j * n + i]) <=
                  CLEF_TABLE_COV_SYM_TOL * sqrt(cov[i * n + i] * cov[j * n + j])))
                CLEF_FAIL(CLEF_EFORMAT, "'%s': covariance not symmetric at row %zu column %zu "
                          "(%g vs %g)", path, i + 1, j + 1, cov[i * n + j], cov[j * n + i]);
    }
    return CLEF_OK;
}

int clef_bandpowers_read(clef_bandpowers **out, const char *path)
{
    *out = NULL;
    if (!path || !*path)
        CLEF_FAIL(CLEF_EINVAL, "band-power table path is empty");
    FILE *f = fopen(path, "rb");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "cannot open band-power table '%s': %s", path, strerror(errno));
    /* Every FITS file starts with the card "SIMPLE  =" (FITS 4.0 4.4.1.1). */
    char head[9];
    const size_t got = fread(head, 1, sizeof head, f);
    fclose(f);
    if (got == sizeof head && !memcmp(head, "SIMPLE  =", sizeof head))
        return clef_table_read_fits(out, path);
    return clef_table_read_text(out, path);
}
