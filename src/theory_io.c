/* Spectrum files: the text format of docs/formats-spectrum.md and the FITS
 * binary table clef_theory_write_cl writes, both read and written. */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE
#include "clef/theory.h"

#include <ctype.h>
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include <fitsio.h>

#include "core_impl.h"
#include "fits_impl.h"

/* Column roles named on the "# columns:" line. */
enum { COL_OTHER, COL_L, COL_CL, COL_DL };

static int column_role(const char *name)
{
    if (!strcasecmp(name, "l") || !strcasecmp(name, "ell"))
        return COL_L;
    if (!strcasecmp(name, "C_l") || !strcasecmp(name, "Cl") || !strcasecmp(name, "C_ell"))
        return COL_CL;
    if (!strcasecmp(name, "D_l") || !strcasecmp(name, "Dl") || !strcasecmp(name, "D_ell"))
        return COL_DL;
    return COL_OTHER;
}

typedef struct layout {
    int have;     /* a columns line was seen */
    int col_l;    /* index of the l column */
    int col_v;    /* index of the value column */
    int is_dl;    /* the value column holds D_l */
} layout;

/* Parse the text after "columns:"; CLEF_EFORMAT unless it names l and C_l
 * or D_l. */
static int parse_columns(const char *path, long line_no, char *spec, layout *lay)
{
    int idx = 0, col_l = -1, col_cl = -1, col_dl = -1;
    for (char *save = NULL, *tok = strtok_r(spec, " \t,\r\n", &save); tok;
         tok = strtok_r(NULL, " \t,\r\n", &save), idx++) {
        const int role = column_role(tok);
        if (role == COL_L && col_l < 0)
            col_l = idx;
        else if (role == COL_CL && col_cl < 0)
            col_cl = idx;
        else if (role == COL_DL && col_dl < 0)
            col_dl = idx;
    }
    if (col_l < 0 || (col_cl < 0 && col_dl < 0))
        CLEF_FAIL(CLEF_EFORMAT,
                  "%s line %ld: the columns line must name 'l' and 'C_l' or 'D_l' (e.g. "
                  "'# columns: l D_l')",
                  path, line_no);
    lay->have = 1;
    lay->col_l = col_l;
    lay->col_v = col_cl >= 0 ? col_cl : col_dl;
    lay->is_dl = col_cl < 0;
    return CLEF_OK;
}

/* The "columns:" tag in a comment line, in any letter case, or NULL. */
static char *find_columns_tag(char *s)
{
    static const char tag[] = "columns:";
    for (; *s; s++)
        if (!strncasecmp(s, tag, sizeof tag - 1))
            return s;
    return NULL;
}

/* Split a data line into numbers; returns the count or -1 on a bad token. */
static int split_numbers(char *s, double *v, int nmax)
{
    int n = 0;
    for (char *save = NULL, *tok = strtok_r(s, " \t,\r\n", &save); tok;
         tok = strtok_r(NULL, " \t,\r\n", &save)) {
        char *end;
        errno = 0;
        const double x = strtod(tok, &end);
        if (*end || errno == ERANGE || !isfinite(x))
            return -1;
        if (n < nmax)
            v[n] = x;
        n++;
    }
    return n;
}

static int read_body(FILE *f, const char *path, int lmax, double *cl, unsigned char *seen,
                     int *file_lmax)
{
    char *line = NULL;
    size_t cap = 0;
    long line_no = 0;
    int status = CLEF_OK;
    layout lay = {0};
    *file_lmax = -1;
    while (getline(&line, &cap, f) >= 0) {
        line_no++;
        char *s = line;
        while (isspace((unsigned char)*s))
            s++;
        if (!*s)
            continue;
        if (*s == '#') {
            char *c = find_columns_tag(s);
            if (c)
                CLEF_CHECK(parse_columns(path, line_no, c + 8, &lay));
            continue;
        }
        if (!lay.have) {
            status = clef_fail(CLEF_EFORMAT,
                               "%s line %ld: data before a '# columns: l C_l' or '# columns: l "
                               "D_l' line; the file must say which quantity it holds",
                               path, line_no);
            goto fail;
        }
        double v[64];
        const int need = (lay.col_l > lay.col_v ? lay.col_l : lay.col_v) + 1;
        const int n = split_numbers(s, v, 64);
        if (n < 0) {
            status = clef_fail(CLEF_EFORMAT, "%s line %ld: not a number", path, line_no);
            goto fail;
        }
        if (n < need || need > 64) {
            status = clef_fail(CLEF_EFORMAT, "%s line %ld: %d columns, need at least %d", path,
                               line_no, n, need);
            goto fail;
        }
        const double lv = v[lay.col_l], val = v[lay.col_v];
        if (lv < 0 || lv != floor(lv) || lv > 1e9) {
            status = clef_fail(CLEF_EFORMAT, "%s line %ld: multipole l = %g is not a whole number >= 0",
                               path, line_no, lv);
            goto fail;
        }
        if (val < 0) {
            status = clef_fail(CLEF_EFORMAT, "%s line %ld: negative %s = %g at l = %g", path,
                               line_no, lay.is_dl ? "D_l" : "C_l", val, lv);
            goto fail;
        }
        const int l = (int)lv;
        if (l > *file_lmax)
            *file_lmax = l;
        if (l > lmax)
            continue;
        if (seen[l]) {
            status = clef_fail(CLEF_EFORMAT, "%s line %ld: multipole l = %d appears twice", path,
                               line_no, l);
            goto fail;
        }
        seen[l] = 1;
        /* C_l = 2 pi D_l / (l (l + 1)); C_0 cannot be recovered from D_0. */
        cl[l] = lay.is_dl ? (l > 0 ? 2.0 * M_PI * val / ((double)l * (l + 1.0)) : 0.0) : val;
    }
    if (ferror(f)) {
        status = clef_fail(CLEF_EIO, "%s: read error after line %ld", path, line_no);
        goto fail;
    }
    if (!lay.have) {
        status = clef_fail(CLEF_EFORMAT, "%s: no '# columns:' line and no data", path);
        goto fail;
    }
fail:
    free(line);
    return status;
}

/* Record the first CFITSIO failure as a clef error naming the step. */
static int fits_status(const char *path, const char *what, int fst)
{
    char msg[FLEN_STATUS];
    fits_get_errstatus(fst, msg);
    return clef_fail(CLEF_EIO, "FITS spectrum '%s': %s: CFITSIO status %d (%s)", path, what,
                     fst, msg);
}

/* One (l, value) pair of a FITS row, with the text reader's checks. */
static int fits_row(const char *path, long row, double lv, double val, int is_dl, int lmax,
                    double *cl, unsigned char *seen, int *file_lmax)
{
    if (!(lv >= 0) || lv != floor(lv) || lv > 1e9)
        CLEF_FAIL(CLEF_EFORMAT, "%s row %ld: multipole l = %g is not a whole number >= 0", path,
                  row, lv);
    if (!(val >= 0))
        CLEF_FAIL(CLEF_EFORMAT, "%s row %ld: %s = %g at l = %g is negative or not a number",
                  path, row, is_dl ? "DL" : "CL", val, lv);
    const int l = (int)lv;
    if (l > *file_lmax)
        *file_lmax = l;
    if (l > lmax)
        return CLEF_OK;
    if (seen[l])
        CLEF_FAIL(CLEF_EFORMAT, "%s row %ld: multipole l = %d appears twice", path, row, l);
    seen[l] = 1;
    cl[l] = is_dl ? (l > 0 ? 2.0 * M_PI * val / ((double)l * (l + 1.0)) : 0.0) : val;
    return CLEF_OK;
}

/* The FITS layout clef_theory_write_cl writes: HDU SPECTRUM (else the first
 * binary table) with columns L and CL (or DL), in uK^2. */
static int read_fits_body(const char *path, int lmax, double *cl, unsigned char *seen,
                          int *file_lmax)
{
    fitsfile *ff = NULL;
    int fst = 0, status = CLEF_OK, hdutype = 0;
    double *lv = NULL, *v = NULL;
    *file_lmax = -1;
    CLEF_TRY(clef_fits_check_gzip_file(path));
    if (fits_open_file(&ff, path, READONLY, &fst))
        return fits_status(path, "open", fst);
    if ((status = clef_fits_check_headers(ff, path)) != CLEF_OK)
        goto done;
    if (fits_movnam_hdu(ff, BINARY_TBL, "SPECTRUM", 0, &fst)) {
        fst = 0;
        if (fits_movabs_hdu(ff, 2, &hdutype, &fst) || hdutype != BINARY_TBL) {
            status = clef_fail(CLEF_EFORMAT, "%s: no HDU SPECTRUM and no binary table after the "
                               "primary HDU", path);
            goto done;
        }
    }
    int col_l = 0, col_v = 0, is_dl = 0;
    if (fits_get_colnum(ff, CASEINSEN, "L", &col_l, &fst)) {
        status = clef_fail(CLEF_EFORMAT, "%s: the spectrum table has no column L", path);
        goto done;
    }
    if (fits_get_colnum(ff, CASEINSEN, "CL", &col_v, &fst)) {
        fst = 0;
        is_dl = 1;
        if (fits_get_colnum(ff, CASEINSEN, "DL", &col_v, &fst)) {
            status = clef_fail(CLEF_EFORMAT, "%s: the spectrum table has neither a CL nor a DL "
                               "column", path);
            goto done;
        }
    }
    long nrows = 0;
    fits_get_num_rows(ff, &nrows, &fst);
    if (fst || nrows < 1 || nrows > 100000000L) {
        status = fst ? fits_status(path, "rows", fst)
                     : clef_fail(CLEF_EFORMAT, "%s: the spectrum table has %ld rows", path, nrows);
        goto done;
    }
    lv = malloc((size_t)nrows * sizeof *lv);
    v = malloc((size_t)nrows * sizeof *v);
    if (!lv || !v) {
        status = clef_fail(CLEF_ENOMEM, "%s: out of memory for %ld rows", path, nrows);
        goto done;
    }
    fits_read_col(ff, TDOUBLE, col_l, 1, 1, nrows, NULL, lv, NULL, &fst);
    fits_read_col(ff, TDOUBLE, col_v, 1, 1, nrows, NULL, v, NULL, &fst);
    if (fst) {
        status = fits_status(path, "columns", fst);
        goto done;
    }
    for (long r = 0; r < nrows && status == CLEF_OK; r++)
        status = fits_row(path, r + 1, lv[r], v[r], is_dl, lmax, cl, seen, file_lmax);
done:
    if (ff) {
        int st = 0;
        fits_close_file(ff, &st);
    }
    free(lv);
    free(v);
    return status;
}

/* 1 when the file starts like FITS (plain, or gzip-compressed: CFITSIO
 * reads both). */
static int looks_fits(FILE *f)
{
    unsigned char head[9] = {0};
    const size_t n = fread(head, 1, sizeof head, f);
    rewind(f);
    return (n >= 2 && head[0] == 0x1f && head[1] == 0x8b) ||
           (n == 9 && !memcmp(head, "SIMPLE  =", 9));
}

int clef_theory_read_cl(const char *path, int lmax, double *cl, int *lmax_file)
{
    /* cl == NULL: only the file's largest multipole is wanted. */
    const int query = !cl && lmax_file;
    if (!path || (!cl && !query))
        CLEF_FAIL(CLEF_EINVAL, "spectrum reader: NULL path or output array");
    if (query)
        lmax = CLEF_THEORY_LMAX_MAX;
    if (lmax < 2 || lmax > CLEF_THEORY_LMAX_MAX)
        CLEF_FAIL(CLEF_EINVAL, "spectrum reader: lmax = %d must be in [2, %d]", lmax,
                  CLEF_THEORY_LMAX_MAX);
    FILE *f = fopen(path, "r");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "cannot open spectrum file '%s': %s", path, strerror(errno));
    unsigned char *seen = calloc((size_t)lmax + 1, 1);
    double *scratch = query ? malloc(((size_t)lmax + 1) * sizeof *scratch) : NULL;
    if (!seen || (query && !scratch)) {
        fclose(f);
        free(seen);
        free(scratch);
        CLEF_FAIL(CLEF_ENOMEM, "spectrum reader: out of memory for lmax = %d", lmax);
    }
    if (query)
        cl = scratch;
    for (int l = 0; l <= lmax; l++)
        cl[l] = 0.0;
    int flmax;
    int status;
    if (looks_fits(f)) {
        fclose(f);
        status = read_fits_body(path, lmax, cl, seen, &flmax);
    } else {
        status = read_body(f, path, lmax, cl, seen, &flmax);
        fclose(f);
    }
    if (query) {
        free(seen);
        free(scratch);
        if (status == CLEF_OK)
            *lmax_file = flmax;
        return status;
    }
    if (status == CLEF_OK && flmax < 2)
        status = clef_fail(CLEF_EFORMAT, "%s: no multipole l >= 2 in the file", path);
    if (status == CLEF_OK) {
        const int top = flmax < lmax ? flmax : lmax;
        for (int l = 2; l <= top; l++)
            if (!seen[l]) {
                status = clef_fail(CLEF_EFORMAT, "%s: multipole l = %d is missing (the file goes up to l = %d)",
                                   path, l, flmax);
                break;
            }
        if (status == CLEF_OK && flmax < lmax)
            clef_log(CLEF_LOG_WARN, "%s ends at l = %d; C_l set to 0 for %d < l <= %d", path,
                     flmax, flmax, lmax);
    }
    free(seen);
    if (status != CLEF_OK) {
        for (int l = 0; l <= lmax; l++)
            cl[l] = 0.0;
        return status;
    }
    if (lmax_file)
        *lmax_file = flmax;
    return CLEF_OK;
}

static int has_suffix(const char *s, const char *suf)
{
    const size_t n = strlen(s), m = strlen(suf);
    return n >= m && !strcasecmp(s + n - m, suf);
}

static double dl_of(const double *cl, int l) { return (double)l * (l + 1.0) * cl[l] / (2.0 * M_PI); }

static int write_text(const char *tmp, const char *path, int lmax, const double *cl,
                      const clef_cosmo_params *p)
{
    FILE *f = fopen(tmp, "w");
    if (!f)
        return clef_write_fail(CLEF_EIO, path, "cannot create it", NULL);
    fprintf(f, "# CMB temperature power spectrum written by clef %s\n", CLEF_VERSION);
    if (p)
        fprintf(f,
                "# model: analytic (docs/theory.md); omega_b=%.10g omega_c=%.10g h=%.10g "
                "Omega_k=%.10g n_s=%.10g ln10^10A_s=%.10g tau=%.10g T_cmb=%.10g N_eff=%.10g "
                "m_nu=%.10g Y_He=%.10g\n",
                p->omega_b, p->omega_c, p->h, p->omega_k, p->n_s, p->ln10_as, p->tau, p->t_cmb,
                p->n_eff, p->m_nu, p->y_he);
    fprintf(f, "# units: uK^2 (thermodynamic); D_l = l(l+1) C_l / 2pi\n");
    fprintf(f, "# columns: l C_l D_l\n");
    for (int l = 0; l <= lmax; l++)
        fprintf(f, "%d %.10e %.10e\n", l, cl[l], dl_of(cl, l));
    const int bad = ferror(f);
    if (fclose(f) != 0 || bad)
        return clef_write_fail(CLEF_EIO, path, "write error", NULL);
    return CLEF_OK;
}

/* A CFITSIO failure while writing: the reason in words when the file system
 * gives one (clef_write_fail), naming the target. */
static int fits_write_status(const char *path, const char *what, int fst)
{
    char msg[FLEN_STATUS], lib[FLEN_STATUS + 32];
    fits_get_errstatus(fst, msg);
    snprintf(lib, sizeof lib, "CFITSIO status %d: %s", fst, msg);
    return clef_write_fail(CLEF_EIO, path, what, lib);
}

static int write_fits(const char *tmp, const char *path, int lmax, const double *cl,
                      const clef_cosmo_params *p)
{
    fitsfile *ff = NULL;
    int fst = 0, status = CLEF_OK;
    const char *what = "create";
    const long n = (long)lmax + 1;
    double *dcol = malloc((size_t)n * sizeof *dcol);
    int *lcol = malloc((size_t)n * sizeof *lcol);
    if (!dcol || !lcol) {
        status = clef_fail(CLEF_ENOMEM, "writing '%s': out of memory", path);
        goto fail;
    }
    for (long i = 0; i < n; i++) {
        lcol[i] = (int)i;
        dcol[i] = dl_of(cl, (int)i);
    }
    char fname[4200];
    snprintf(fname, sizeof fname, "!%s", tmp);
    char *ttype[] = {"L", "CL", "DL"};
    char *tform[] = {"1J", "1D", "1D"};
    char *tunit[] = {"", "uK^2", "uK^2"};
    if (fits_create_file(&ff, fname, &fst))
        goto fits_fail;
    what = "table";
    fits_create_tbl(ff, BINARY_TBL, n, 3, ttype, tform, tunit, "SPECTRUM", &fst);
    fits_modify_comment(ff, "TTYPE1", "multipole l", &fst);
    fits_modify_comment(ff, "TTYPE2", "C_l, thermodynamic temperature", &fst);
    fits_modify_comment(ff, "TTYPE3", "D_l = l(l+1) C_l / 2pi", &fst);
    fits_write_key_str(ff, "CREATOR", "clef " CLEF_VERSION, "software", &fst);
    if (fst)
        goto fits_fail;
    if (p) {
        what = "header keywords";
        fits_write_key_str(ff, "MODEL", "analytic", "docs/theory.md", &fst);
        fits_write_key_dbl(ff, "OMEGA_B", p->omega_b, 15, "Omega_b h^2", &fst);
        fits_write_key_dbl(ff, "OMEGA_C", p->omega_c, 15, "Omega_c h^2", &fst);
        fits_write_key_dbl(ff, "HUBBLE_H", p->h, 15, "H_0 / (100 km/s/Mpc)", &fst);
        fits_write_key_dbl(ff, "OMEGA_K", p->omega_k, 15, "curvature Omega_k", &fst);
        fits_write_key_dbl(ff, "N_S", p->n_s, 15, "scalar spectral index", &fst);
        fits_write_key_dbl(ff, "LN10AS", p->ln10_as, 15, "ln(10^10 A_s)", &fst);
        fits_write_key_dbl(ff, "TAU", p->tau, 15, "reionisation optical depth", &fst);
        fits_write_key_dbl(ff, "T_CMB", p->t_cmb, 15, "[K] CMB temperature", &fst);
        fits_write_key_dbl(ff, "N_EFF", p->n_eff, 15, "massless neutrino species", &fst);
        fits_write_key_dbl(ff, "M_NU", p->m_nu, 15, "[eV] sum of neutrino masses", &fst);
        fits_write_key_dbl(ff, "Y_HE", p->y_he, 15, "helium mass fraction", &fst);
        if (fst)
            goto fits_fail;
    }
    what = "columns";
    fits_write_col(ff, TINT, 1, 1, 1, n, lcol, &fst);
    fits_write_col(ff, TDOUBLE, 2, 1, 1, n, (void *)cl, &fst);
    fits_write_col(ff, TDOUBLE, 3, 1, 1, n, dcol, &fst);
    fits_write_chksum(ff, &fst);
    if (fst)
        goto fits_fail;
    what = "close";
    fits_close_file(ff, &fst);
    ff = NULL;
    if (fst)
        goto fits_fail;
    free(dcol);
    free(lcol);
    return CLEF_OK;
fits_fail:
    status = fits_write_status(path, what, fst);
fail:
    if (ff) {
        int close_st = 0;
        fits_close_file(ff, &close_st);
    }
    free(dcol);
    free(lcol);
    return status;
}

int clef_theory_write_cl(const char *path, int lmax, const double *cl, const clef_cosmo_params *p)
{
    if (!path || !cl)
        CLEF_FAIL(CLEF_EINVAL, "spectrum writer: NULL path or array");
    if (lmax < 0 || lmax > CLEF_THEORY_LMAX_MAX)
        CLEF_FAIL(CLEF_EINVAL, "spectrum writer: lmax = %d must be in [0, %d]", lmax,
                  CLEF_THEORY_LMAX_MAX);
    clef_outfile o;
    CLEF_TRY(clef_outfile_begin(&o, path));
    const int fits = has_suffix(path, ".fits") || has_suffix(path, ".fit");
    const int status = fits ? write_fits(o.tmp_path, path, lmax, cl, p)
                            : write_text(o.tmp_path, path, lmax, cl, p);
    if (status != CLEF_OK) {
        clef_outfile_abort(&o);
        return status;
    }
    return clef_outfile_commit(&o);
}

/* Polarized spectra text file (docs/formats-spectrum.md, "Polarized input
 * spectra"): '#' comments, data lines "l TT EE BB TE" (C_l in uK^2,
 * whitespace- or comma-separated). */
int clef_theory_read_cl_pol(const char *path, int lmax, double *tt, double *ee, double *bb,
                            double *te)
{
    if (!path || !tt || !ee || !bb || !te)
        CLEF_FAIL(CLEF_EINVAL, "polarized spectrum reader: NULL argument");
    if (lmax < 2 || lmax > CLEF_THEORY_LMAX_MAX)
        CLEF_FAIL(CLEF_EINVAL, "polarized spectrum reader: lmax = %d must be in [2, %d]", lmax,
                  CLEF_THEORY_LMAX_MAX);
    FILE *f = fopen(path, "r");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "cannot open spectrum file '%s': %s", path, strerror(errno));
    unsigned char *seen = calloc((size_t)lmax + 1, 1);
    if (!seen) {
        fclose(f);
        CLEF_FAIL(CLEF_ENOMEM, "polarized spectrum reader: out of memory");
    }
    double *col[4] = {tt, ee, bb, te};
    for (int k = 0; k < 4; k++)
        for (int l = 0; l <= lmax; l++)
            col[k][l] = 0.0;
    char line[4096];
    int lineno = 0, last = -1, status = CLEF_OK;
    while (fgets(line, sizeof line, f)) {
        lineno++;
        for (char *c = line; *c; c++)
            if (*c == ',')
                *c = ' ';
        char *p = line;
        while (*p == ' ' || *p == '\t')
            p++;
        if (*p == '#' || *p == '\n' || *p == '\r' || !*p)
            continue;
        double v[5];
        char *end = p;
        int n = 0;
        for (; n < 5; n++) {
            v[n] = strtod(p, &end);
            if (end == p)
                break;
            p = end;
        }
        while (*p == ' ' || *p == '\t' || *p == '\r' || *p == '\n')
            p++;
        if (n < 5 || *p) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %d: expected 5 numbers 'l TT EE BB TE'",
                               path, lineno);
            goto done;
        }
        if (v[0] != floor(v[0]) || v[0] < 0 || v[0] > CLEF_THEORY_LMAX_MAX) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %d: multipole %g is not an integer in "
                               "0..%d", path, lineno, v[0], CLEF_THEORY_LMAX_MAX);
            goto done;
        }
        const int l = (int)v[0];
        for (int k = 1; k < 5; k++)
            if (!isfinite(v[k]) || (k < 4 && v[k] < 0)) {
                static const char *const nm[5] = {"", "TT", "EE", "BB", "TE"};
                status = clef_fail(CLEF_EFORMAT, "'%s' line %d: %s = %g %s", path, lineno, nm[k],
                                   v[k], k < 4 ? "(must be finite and >= 0)" : "(not finite)");
                goto done;
            }
        if (l > last)
            last = l;
        if (l > lmax)
            continue;
        if (seen[l]) {
            status = clef_fail(CLEF_EFORMAT, "'%s' line %d: multipole %d repeated", path, lineno,
                               l);
            goto done;
        }
        seen[l] = 1;
        for (int k = 0; k < 4; k++)
            col[k][l] = v[k + 1];
    }
    if (ferror(f)) {
        status = clef_fail(CLEF_EIO, "cannot read '%s'", path);
        goto done;
    }
    for (int l = 2; l <= lmax && l <= last; l++)
        if (!seen[l]) {
            status = clef_fail(CLEF_EFORMAT, "'%s': multipole %d is missing", path, l);
            goto done;
        }
    if (last < 2) {
        status = clef_fail(CLEF_EFORMAT, "'%s': no multipole l >= 2", path);
        goto done;
    }
    if (last < lmax)
        clef_log(CLEF_LOG_WARN, "'%s' ends at l = %d: spectra above are taken as 0 up to lmax = "
                 "%d", path, last, lmax);
done:
    free(seen);
    fclose(f);
    return status;
}
