/* HEALPix maps in memory and in FITS files.
 *
 * A clef_map always holds its pixels in RING order (converted on reading
 * if the file is NESTED; the file's ordering is remembered), as doubles,
 * with a per-pixel validity flag: pixels that are missing from the file
 * (partial-sky tables), flagged with the bad-pixel value -1.6375e30, or NaN
 * are invalid, hold 0.0 in `pix`, and are excluded through the mask by
 * every estimator.
 *
 * File conventions read and written (Gorski et al. 2005, ApJ 622, 759; the
 * HEALPix FITS format specification): an empty primary HDU followed by a
 * BINTABLE with PIXTYPE='HEALPIX', ORDERING, NSIDE, INDXSCHM (IMPLICIT or
 * EXPLICIT), FIRSTPIX/LASTPIX, COORDSYS, BAD_DATA; implicit tables with one
 * pixel per row or vector rows (TFORM '1024E'); explicit-index tables with a
 * PIXEL column.  Reading and writing are streamed in row chunks.
 *
 * Thread safety: functions on distinct maps may run concurrently.
 */
#ifndef CLEF_MAP_H
#define CLEF_MAP_H

#include <stdint.h>

#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

#define CLEF_NSIDE_MAX 8192
/* The HEALPix bad-pixel sentinel; values within 1e-5 relative are bad too
 * (float32 storage does not hold it exactly). */
#define CLEF_BAD_VALUE (-1.6375e30)

enum clef_ordering { CLEF_RING = 0, CLEF_NESTED = 1 };

typedef struct clef_map {
    int64_t nside;
    int64_t npix;           /* 12 nside^2 */
    double *pix;            /* npix values in RING order; 0.0 where invalid */
    unsigned char *valid;   /* npix flags: 1 valid, 0 missing */
    int64_t nmissing;       /* number of invalid pixels */
    int64_t nbad;           /* of which flagged by BAD_DATA or NaN in the file */
    int file_ordering;      /* clef_ordering of the file it was read from (RING if made in memory) */
    char coordsys[16];      /* "G", "E", "C" or "" when unknown */
    char unit[64];          /* TUNIT of the column read, or "" */
    char column[72];        /* name of the column read, or "" */
    int hdu;                /* extension read (1 = first after the primary), 0 if made in memory */
    char polcconv[72];      /* POLCCONV keyword of that HDU as written (trimmed), "" if absent */
} clef_map;

/* Which table and column to read.  All fields may be 0/NULL for defaults. */
typedef struct clef_map_read_opts {
    /* HDU: NULL = the first binary-table extension; a decimal number N =
     * the Nth extension (1 = first extension after the primary); any other
     * text = the extension with that EXTNAME (case-insensitive). */
    const char *hdu;
    /* Column: NULL = the first value column (for explicit-index tables, the
     * first column that is not PIXEL); a decimal number N = the Nth column
     * (1-based, as in FITS); any other text = the column with that TTYPE
     * (case-insensitive). */
    const char *column;
    /* Ordering to assume when the table has no ORDERING keyword: NULL = none
     * (a missing ORDERING is then CLEF_EFORMAT), "RING" or "NESTED"
     * (case-insensitive).  A file whose ORDERING keyword differs from it is
     * refused with CLEF_EINVAL. */
    const char *ordering;
} clef_map_read_opts;

/* Read one map.  On failure *out is NULL and the message names the file,
 * HDU, keyword, column or value at fault.  Returns CLEF_EIO (cannot open or
 * read), CLEF_EFORMAT (not a HEALPix table, NSIDE missing or not a power of
 * two, NSIDE inconsistent with the data length, index out of range or
 * repeated, ...), CLEF_EINVAL (unknown HDU or column), CLEF_ENOMEM.
 * gzip-compressed files are read transparently. */
int clef_map_read(clef_map **out, const char *path, const clef_map_read_opts *opts);

/* The header of the map clef_map_read would read, without its values:
 * nside, npix, file_ordering, coordsys, unit, column, hdu and polcconv set,
 * pix and valid NULL, nmissing and nbad 0 (free it with clef_map_free).
 * The same checks as clef_map_read short of the values (HDU and column,
 * NSIDE, ORDERING, table size against NSIDE and against the file's
 * length) and the same errors; for checking many inputs before any is
 * read in full.  A gzip-compressed file is still decompressed. */
int clef_map_read_header(clef_map **out, const char *path, const clef_map_read_opts *opts);

/* A new map of the given nside, all pixels valid and zero, RING, no
 * coordinate system. */
int clef_map_alloc(clef_map **out, int64_t nside);
int clef_map_copy(clef_map **out, const clef_map *m);
void clef_map_free(clef_map *m); /* NULL is a no-op */
/* Frees the pixel values and validity flags (pix and valid NULL afterwards)
 * and keeps the header fields (nside, npix, units, frame, column, counts):
 * for a caller that needs a large map's description after its values. */
void clef_map_release_pixels(clef_map *m);
/* A map as one malloc'ed block of *n bytes (values, validity and header
 * fields; native byte order), and back: another process of the same
 * machine family gets the same map without reading its file (clef sims
 * sends the masks over MPI).  Errors: CLEF_EINVAL (no map), CLEF_ENOMEM;
 * import: CLEF_EFORMAT (bytes not written by clef_map_export on this
 * machine family, or truncated). */
int clef_map_export(const clef_map *m, void **buf, size_t *n);
int clef_map_import(clef_map **out, const void *buf, size_t n);

/* How to write.  All fields may be 0/NULL for defaults. */
typedef struct clef_map_write_opts {
    int row_length;          /* values per row: 0 or 1 = one pixel per row; e.g. 1024 (must divide npix) */
    int single_precision;    /* 1: TFORM E (float32), 0: D (float64) */
    const char *column;      /* TTYPE of the value column, default "TEMPERATURE" */
    const char *unit;        /* TUNIT, default the map's unit, else none */
    const char *extname;     /* EXTNAME, default "SKYMAP" */
    const char *history;     /* optional HISTORY line (e.g. the command that made the map) */
} clef_map_write_opts;

/* Write a full-sky RING map (implicit index); invalid pixels are written as
 * the bad-pixel value.  A clef provenance keyword (CLEFVERS) is added.  The
 * file is written to a temporary name and renamed on success, so a failure
 * leaves nothing.  An existing file is replaced.  A path ending in ".gz"
 * gives a gzip-compressed file (built in memory by CFITSIO, then compressed;
 * CLEF_EUNSUP if the folder's own name contains ".gz").  Returns CLEF_EINVAL (NULL
 * map, inconsistent nside, row length that does not divide npix), CLEF_EIO
 * (cannot create, write or rename; the message has CFITSIO's status) or
 * CLEF_ENOMEM.  Written in chunks of 2^20 values; no other allocation. */
int clef_map_write(const clef_map *m, const char *path, const clef_map_write_opts *opts);
/* The same for a polarized map: one table with columns TEMPERATURE,
 * Q_POLARISATION, U_POLARISATION (opts->column ignored) and POLCCONV =
 * 'COSMO' (clef's convention).  CLEF_EINVAL for a missing map or maps of
 * different nside; otherwise as clef_map_write. */
int clef_map_write_pol(const clef_map *t, const clef_map *q, const clef_map *u, const char *path,
                       const clef_map_write_opts *opts);

/* Summary of the valid pixels of a map: rms = sqrt(mean(x^2)), stddev
 * divides by nvalid (population convention, as numpy's default); min, max,
 * mean, rms and stddev are NaN when no pixel is valid.  Returns CLEF_EINVAL
 * for NULL arguments. */
typedef struct clef_map_stats {
    int64_t nvalid, nmissing;
    double fsky;             /* nvalid / npix */
    double min, max, mean, rms, stddev;
} clef_map_stats;
int clef_map_stats_compute(const clef_map *m, clef_map_stats *st);

/* Check that a mask suits a map: same nside (CLEF_EINVAL, message names both
 * files and both nsides), compatible COORDSYS (refused unless
 * allow_coord_mismatch, which logs a warning instead, or one of them is
 * unknown), values in [0, 1] (values outside are refused, not clipped:
 * CLEF_EINVAL naming the value and its RING pixel; invalid mask pixels count
 * as unobserved and are not checked).  Names are used only in messages and
 * may be NULL. */
int clef_map_check_mask(const clef_map *map, const char *map_name, const clef_map *mask,
                        const char *mask_name, int allow_coord_mismatch);

/* Factor that converts values in `unit` (a TUNIT string) to micro-kelvin:
 * "K", "K_CMB", "Kcmb", "KCMB" -> 1e6; "mK" (and _CMB forms) -> 1e3; "uK",
 * "muK", "microK" (and _CMB forms) -> 1; case-insensitive, surrounding
 * blanks ignored.  Returns 0 for an empty or unrecognised unit (the caller
 * decides; clef's estimator then assumes uK and warns). */
double clef_unit_to_uk(const char *unit);

/* Polarized maps (src/map_pol.c).  Q and U come from the columns named
 * Q_POLARISATION and U_POLARISATION (HEALPix; also Q_POLARIZATION,
 * Q_STOKES and the U forms), T from TEMPERATURE (or I_STOKES), of the same
 * HDU in any layout clef_map_read reads; or Q and U from separate files
 * (u_path).  Columns may be given by name or number instead.
 * Internal convention COSMO (docs/transforms.md): POLCCONV = 'COSMO' is
 * read as is, 'IAU' has U negated, a missing POLCCONV is read as COSMO
 * with a warning through the log hook (polcconv_missing = 1), any other
 * value is CLEF_EFORMAT naming file, HDU, keyword and value.  Q and U
 * share one validity (a pixel missing in either is missing in both); T
 * keeps its own.  Errors: a missing column is CLEF_EINVAL naming the file,
 * HDU and the columns present; Q and U of different nside, COORDSYS or
 * POLCCONV are CLEF_EINVAL.  On failure every map is freed. */
typedef struct clef_map_pol_opts {
    const char *hdu, *ordering;   /* as clef_map_read_opts, for every file */
    const char *t_column, *q_column, *u_column; /* NULL = the conventional names */
    const char *u_path;           /* NULL = U from the same file as Q */
    const char *polcconv;         /* NULL = from the file; "COSMO"/"IAU" overrides it */
    int want_t;                   /* 1: read T too (CLEF_EINVAL if absent) */
} clef_map_pol_opts;

typedef struct clef_map_pol {
    clef_map *t, *q, *u;          /* t NULL unless want_t */
    int iau;                      /* 1: the file said IAU and U was negated */
    int polcconv_missing;         /* 1: no POLCCONV, COSMO assumed (warning logged) */
} clef_map_pol;

int clef_map_read_pol(clef_map_pol *out, const char *path, const clef_map_pol_opts *opts);
void clef_map_pol_free(clef_map_pol *p); /* frees the maps, NULL is a no-op */
/* 1 if a column name is one of the Q/U names above (the estimator warns
 * when a polarized table is read as temperature only). */
int clef_map_column_is_pol(const char *name);

/* Pixel geometry helpers (RING scheme, 64-bit indices). */
int64_t clef_nside_npix(int64_t nside);
int clef_nside_valid(int64_t nside); /* 1 if a power of two in [1, CLEF_NSIDE_MAX] */

#ifdef __cplusplus
}
#endif
#endif
