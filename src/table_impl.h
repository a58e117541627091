/* Private declarations shared by the band-power table files (table.c: memory,
 * metadata, CSV and text tables; table_fits.c: FITS).  Not installed. */
#ifndef CLEF_TABLE_IMPL_H
#define CLEF_TABLE_IMPL_H

#include <stddef.h>

#include "clef/table.h"

/* Column names of clef's own CSV header row and FITS table, in file order
 * (docs/formats.md, "band-power tables"). */
#define CLEF_TABLE_NCOLS 6
extern const char *const clef_table_csv_names[CLEF_TABLE_NCOLS];
extern const char *const clef_table_fits_names[CLEF_TABLE_NCOLS];

/* 1 when `key` is written by the FITS/CSV layer itself (structural FITS
 * keywords, EXTNAME, CLEFVERS, DATE, ...) and so cannot be a metadata item. */
int clef_table_key_reserved(const char *key);

/* 1 when `key` is a FITS keyword name: 1-8 characters from A-Z, 0-9, '-',
 * '_' (FITS Standard 4.0, section 4.1.2.1). */
int clef_table_key_valid(const char *key);

/* Shortest "%.Ng" text (N = 15..17) that reads back as exactly `v`. */
void clef_table_format_double(char *buf, size_t size, double v);

/* Append or replace a metadata item without the reserved-key check (used by
 * the readers, which have already skipped reserved keys). */
int clef_table_meta_set(clef_bandpowers *bp, const char *key, const char *value, int is_number,
                        const char *comment);

/* Refuse a table the writers would turn into a file the readers reject
 * (missing arrays, l_hi < l_lo, non-finite values, negative errors). */
int clef_table_check(const clef_bandpowers *bp, const char *path);

/* A covariance read from a file must have a positive diagonal and be
 * symmetric to CLEF_TABLE_COV_SYM_TOL (include/clef/table.h); the message
 * names the file and the element. */
int clef_table_check_cov(const double *cov, size_t n, const char *path);

/* Readers behind clef_bandpowers_read(). */
int clef_table_read_fits(clef_bandpowers **out, const char *path);
int clef_table_read_text(clef_bandpowers **out, const char *path);

#endif
