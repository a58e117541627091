/* Band-power tables: the binned spectrum clef produces, in memory and in
 * files of clef's own design (docs/formats.md): a FITS binary table (HDU 1
 * "BANDPOWER", one row per bin, units in TUNIT, inputs and options as header
 * keywords; HDU 2 "BANDCOV", the binned covariance of D as an nbins x nbins
 * image; HDU "BANDWIN", the band-power window functions, when known), a CSV
 * with '#' comment lines carrying the same keywords, and the covariance and
 * the windows as further CSVs if asked.  Also read back (FITS or CSV, chosen
 * by content) by `clef peak` and `clef plot`, and accepts a few simple
 * foreign layouts (see clef_bandpowers_read).
 *
 * Thread safety: functions on distinct tables may run concurrently.
 */
#ifndef CLEF_TABLE_H
#define CLEF_TABLE_H

#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

/* One header keyword / metadata item (recorded in FITS headers and CSV
 * comments).  key: at most 8 upper-case FITS characters; text values are
 * strings, numeric ones are formatted with full precision. */
typedef struct clef_meta {
    char key[9];
    char value[256];   /* text form of the value */
    int is_number;     /* 1: written as a number (FITS) */
    char comment[72];
} clef_meta;

typedef struct clef_bandpowers {
    int nbins;
    int *l_lo;         /* first multipole of each bin (inclusive) */
    int *l_hi;         /* last multipole of each bin (inclusive) */
    double *l_eff;     /* effective multipole */
    double *cl;        /* C_b in uK^2 (= 2 pi D_b / (l_eff (l_eff + 1))) */
    double *dl;        /* D_b = l(l+1) C / 2pi in uK^2 */
    double *dl_err;    /* 1-sigma error of D_b in uK^2 (sqrt of the covariance diagonal) */
    double *cov;       /* nbins x nbins covariance of D_b in uK^4, row-major, or NULL */
    int win_lmax;      /* the windows cover l = 0..win_lmax (meaningful when win != NULL) */
    double *win;       /* band-power window functions, nbins x (win_lmax + 1), row-major:
                          <D_b> = sum_l win[b (win_lmax + 1) + l] D_l (docs/formats-spectrum.md),
                          or NULL when the table carries none */
    int nmeta;
    clef_meta *meta;   /* malloc'ed array of nmeta items, or NULL */
} clef_bandpowers;

/* Allocate a table of nbins rows (arrays zeroed; cov allocated iff with_cov). */
int clef_bandpowers_alloc(clef_bandpowers **out, int nbins, int with_cov);
void clef_bandpowers_free(clef_bandpowers *bp); /* NULL is a no-op */

/* Allocate (zeroed) the window functions of a table for l = 0..win_lmax,
 * replacing any earlier ones.  Errors: CLEF_EINVAL (win_lmax < 0 or too
 * large), CLEF_ENOMEM. */
int clef_bandpowers_alloc_windows(clef_bandpowers *bp, int win_lmax);

/* Append a metadata item (copied); an item with the same key is replaced.
 * Keys the file layer writes itself (FITS structural keywords, EXTNAME,
 * CLEFVERS, DATE, BUNIT, ...) are refused with CLEF_EINVAL, as are invalid
 * keys and non-finite numbers.  Characters outside printable ASCII in text
 * values are replaced by '?' (FITS headers hold ASCII only) with a warning;
 * values of 256 characters or more are refused. */
int clef_bandpowers_meta_text(clef_bandpowers *bp, const char *key, const char *value,
                              const char *comment);
int clef_bandpowers_meta_number(clef_bandpowers *bp, const char *key, double value,
                                const char *comment);
/* Value of a metadata item, or NULL. */
const char *clef_bandpowers_meta_get(const clef_bandpowers *bp, const char *key);

/* Write atomically (temporary file + rename).  FITS output passes fitsverify. */
int clef_bandpowers_write_fits(const clef_bandpowers *bp, const char *path);
/* Several band-power sets of the same bins in one FITS file (the pairs of
 * fields of clef spectrum --run, the six polarized spectra): for set k the
 * HDUs "BANDPOWER names[k]", "BANDCOV names[k]", "BANDWIN names[k]" (names
 * cut to 56 characters; names NULL: plain BANDPOWER, BANDCOV, BANDWIN),
 * each with EXTVER = k + 1, then, when cov is not NULL, the ncov x ncov
 * joint covariance "JOINTCOV" (ncov = n x nbins, sets in order). */
int clef_bandpowers_write_fits_set(const clef_bandpowers *const *bp, const char *const *names,
                                   int n, const double *cov, int ncov, const char *path);
int clef_bandpowers_write_csv(const clef_bandpowers *bp, const char *path);
/* Covariance as CSV: one row per bin, nbins comma-separated values. */
int clef_bandpowers_write_cov_csv(const clef_bandpowers *bp, const char *path);

/* Window functions as CSV: one row per bin, win_lmax + 1 comma-separated
 * values W_bl for l = 0..win_lmax (docs/formats-spectrum.md).  Errors:
 * CLEF_EINVAL (no windows, non-finite values), CLEF_EIO. */
int clef_bandpowers_write_windows_csv(const clef_bandpowers *bp, const char *path);

/* Read a band-power table written by clef (FITS or CSV, detected from the
 * content), or a plain text table with whitespace/comma-separated columns
 * "l_eff D [err]" or "l_lo l_hi l_eff C D err" (see docs/formats.md).
 * Errors name the file, line or column at fault. */
int clef_bandpowers_read(clef_bandpowers **out, const char *path);

/* The band-power sets of one FITS file written by
 * clef_bandpowers_write_fits_set (the pairs of `clef spectrum --run`, the six
 * spectra of a polarized run), in HDU order. */
typedef struct clef_bandpowers_set {
    int n;                      /* number of sets, >= 1 */
    clef_bandpowers **tables;   /* n tables, each with its BANDCOV / BANDWIN when present */
    char (*names)[72];          /* set k's name: the EXTNAME after "BANDPOWER " ("a x b"),
                                   else the SPECTRUM keyword ("TE"), else "set K" */
} clef_bandpowers_set;

/* Read every binary-table HDU named "BANDPOWER" or "BANDPOWER <name>" with
 * its covariance and windows (the image HDUs "BANDCOV<same suffix>",
 * "BANDWIN<same suffix>" of the same EXTVER).  Errors: CLEF_EIO (cannot
 * open), CLEF_EFORMAT (not a FITS file; no band-power HDU; a single table
 * without EXTVER, as clef_bandpowers_write_fits writes: read that with
 * clef_bandpowers_read; a bad HDU, named in the message), CLEF_ENOMEM.
 * Free with clef_bandpowers_set_free. */
int clef_bandpowers_read_set(clef_bandpowers_set **out, const char *path);
void clef_bandpowers_set_free(clef_bandpowers_set *s); /* NULL is a no-op */

/* Read a covariance of D (uK^4) for the table's bins from a text file:
 * nbins rows of nbins comma- or whitespace-separated numbers, '#' comment
 * lines (the layout clef_bandpowers_write_cov_csv writes).  The matrix must
 * have a positive diagonal and be symmetric to CLEF_TABLE_COV_SYM_TOL
 * relative to sqrt(C_ii C_jj).  Replaces bp->cov (dl_err is left as read).
 * Errors: CLEF_EIO (cannot open), CLEF_EFORMAT (shape, number, symmetry;
 * the message names the line and column). */
#define CLEF_TABLE_COV_SYM_TOL 1e-8
int clef_bandpowers_read_cov(clef_bandpowers *bp, const char *path);

/* Read window functions for the table's bins from a text file: nbins rows
 * of the same number of comma- or whitespace-separated numbers, one per
 * multipole from l = 0, '#' comment lines (the layout of
 * clef_bandpowers_write_windows_csv).  Replaces bp->win and win_lmax.
 * FITS tables carry their windows in HDU BANDWIN, which
 * clef_bandpowers_read loads itself.  Errors: CLEF_EIO, CLEF_EFORMAT (row
 * count, ragged rows, a bad number; the message names the line and
 * column), CLEF_ENOMEM. */
int clef_bandpowers_read_windows(clef_bandpowers *bp, const char *path);

#ifdef __cplusplus
}
#endif
#endif
