/* The cache folder's file format, shared by the coupling module (M and K),
 * the spectrum module (mask spectra) and the transform (ring weights).  One file per key: a versioned
 * header, the key, a payload checksum and a matrix of doubles, written to a
 * temporary name and renamed (src/coupling_cache.c; docs/coupling.md).
 * Not installed. */
#ifndef CLEF_CACHE_IMPL_H
#define CLEF_CACHE_IMPL_H

#include <stddef.h>

enum {
    CLEF_CACHE_M = 1,
    CLEF_CACHE_K = 2,
    CLEF_CACHE_MASK_SPECTRA = 3,
    CLEF_CACHE_DEPROJ = 4,
    CLEF_CACHE_POL = 5,         /* the polarized matrices M^TE, M+, M- (coupling_pol.c) */
    CLEF_CACHE_RING_WEIGHTS = 6 /* transform ring weights (src/sht_weights.c) */
};

/* The folder by the documented precedence; NULL on success, else why not. */
const char *clef_cache_resolve_dir(const char *cache_dir, char *buf, size_t n);
/* "<dir>/<kind name>-<key>.bin"; 0 when it does not fit. */
int clef_cache_path(char *buf, size_t n, const char *dir, int kind, const char *key);
/* 1 on a valid hit (out filled), 0 otherwise; problems are warnings. */
int clef_cache_load(const char *path, int kind, const char *key, size_t rows, size_t cols,
                    double *out);
/* The same, the payload's rows split evenly over nparts buffers. */
int clef_cache_load_parts(const char *path, int kind, const char *key, size_t rows, size_t cols,
                          int nparts, double *const *parts);
/* Store atomically; failures are warnings. */
void clef_cache_store(const char *dir, const char *path, int kind, const char *key, size_t rows,
                      size_t cols, const double *data);

#endif
