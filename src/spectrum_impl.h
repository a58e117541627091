/* Private pieces of the spectrum estimator. */
#ifndef CLEF_SPECTRUM_IMPL_H
#define CLEF_SPECTRUM_IMPL_H

#include <stddef.h>

#include "clef/bins.h"
#include "clef/coupling.h"
#include "clef/spectrum.h"

/* Effective weights: the mask where the map is valid, 0 elsewhere (new
 * array; spectrum.c). */
/* clef_spectrum_compute for a series of maps with the same masks (the
 * ensemble, ensemble.c).  k NULL: as clef_spectrum_compute.  Else the call
 * takes k->prev (an estimator of an earlier call, or NULL) for
 * clef_estimator_reuse and always consumes it (k->prev is NULL on return);
 * calls k->after_maps(k->arg), when set, once the maps are transformed and
 * before anything that depends on the masks is read or made (what it
 * returns, when not NULL, replaces k->prev as the estimator to reuse); on success
 * k->e is this call's estimator, for what the result does not carry (the
 * pseudo-spectrum, the coupling M and the filter of the pair) and as the
 * next call's k->prev (the caller destroys the last one). */
struct clef_estimator;
typedef struct clef_spectrum_keep {
    struct clef_estimator *prev, *e;
    struct clef_estimator *(*after_maps)(void *arg); /* returns an estimator to take the
                                                        mask pieces from, or NULL */
    void *arg;
} clef_spectrum_keep;
int clef_spectrum_compute_keep(const clef_map *map1, const clef_map *map2, const clef_map *mask1,
                               const clef_map *mask2, const clef_spectrum_opts *opts,
                               clef_spectrum_result *res, clef_spectrum_keep *k);
int clef_spectrum_make_weights(const clef_map *map, const clef_map *mask, double **w_out);

/* Fill a table's D_b, C_b, l ranges and errors from band powers of `bins`
 * and their covariance (nbins x nbins; estimator_result.c). */
void clef_spectrum_fill_table(clef_bandpowers *bp, const clef_bins *bins, const double *band,
                              const double *cov);

/* Band-power windows acting on D_l (docs/formats-spectrum.md) from windows
 * acting on C_l: row rep[b] of `all` (row length `stride`, first n columns
 * used) into row b of win (nb x n); flat-weighted bands scaled to D_b
 * (estimator_decouple.c). */
void clef_spectrum_windows_to_dl(const clef_bins *bins, const int *rep, int nb, const double *all,
                                 size_t stride, size_t n, double *win);

/* One pair's band-power covariance from measured pseudo-spectra and a
 * given kernel (spectrum_cov.c; the polarized spectra, spectrum_pol.c). */
typedef struct clef_spectrum_cov_in {
    int lmax;                   /* multipoles decoupled */
    int cross;                  /* 1: cross-spectrum of two maps */
    const clef_bins *bins;
    const clef_coupling_binned *kb;
    double *const *pcl;         /* pseudo-spectra before noise subtraction:
                                   [0] map1 x map2 (or auto), [1] map1 auto, [2] map2 auto */
    double w2[3];               /* mean of w_a w_b for the pairs of pcl[0..2] */
    const clef_coupling *m2;    /* the kernel M[w_a w_b] to lmax */
    double *work;               /* (lmax+1)^2 workspace reused between calls, or NULL */
} clef_spectrum_cov_in;

/* Covariance of the decoupled band powers (nbins x nbins, row-major):
 * [C^aa C^bb + C^ab C^ab] M[w_a w_b] / (2l'+1), propagated through K. */
int clef_spectrum_covariance(const clef_spectrum_cov_in *in, double *cov);

/* Tests only: 1 makes the covariance (clef_spectrum_covariance and the
 * estimator's joint covariance) take the reference path, the n x n matrix
 * G and the products (K^-1 P) G (K^-1 P)^T, instead of the binned sums of
 * G (src/spectrum_cov.c, propagate).  Not thread-safe; 0 by default. */
extern int clef_spectrum_cov_dense;
/* Tests only: > 0 caps the memory of one batch of the joint covariance's
 * blocks (src/spectrum_cov.c, shared_blocks; 1: a block per batch). */
extern size_t clef_spectrum_cov_batch_bytes;

/* Unbinned coupling matrix of a mask spectrum, through the cache when the
 * options allow it (spectrum_cov.c). */
int clef_spectrum_coupling(clef_coupling **out, int lmax, const double *wl, int wl_lmax,
                           const clef_spectrum_opts *o);

/* Cache key of the mask spectra: the weights, nside, lmax_t, iterations. */
void clef_spectrum_mask_key(int64_t nside, int lmax_t, int iterations, const double *w2,
                            const double *w1, char hex[65]);

/* Cache key of a covariance kernel's spectrum W[w_x w_y, w_z w_u] (the
 * cross-spectrum of two product masks, src/estimator_decouple.c): nside,
 * lmax_t, iterations and the SHA-256 digests of the four weights (32 bytes
 * each).  Stored as mask spectra (one row of lmax_t + 1). */
void clef_spectrum_kernel_key(int64_t nside, int lmax_t, int iterations,
                              const unsigned char *const sha[4], char hex[65]);

/* Cache key of the deprojection correction: the mask key, the templates
 * removed from each map, the correction's range and the iterations. */
void clef_spectrum_deproj_key(const char *mask_key, const int nf[2], int lp, int iterations,
                              char hex[65]);
/* The correction as one payload of n doubles (store = 0: load, 1 on a hit;
 * store = 1: save).  Cache problems are warnings, never errors. */
int clef_spectrum_deproj_cache(const clef_spectrum_opts *o, const char *key, size_t n,
                               double *payload, int store);

/* The mask spectra W_l and the covariance kernels (rows x (lmax_t + 1)
 * doubles in wl: W_l, W_l[w_a w_b] and, for two masks, W_l[w_a^2, w_b^2])
 * in the cache folder under `key`.  store = 0: load, returning 1 on a hit;
 * store = 1: save (returns 0).  Cache problems are warnings, never errors. */
int clef_spectrum_mask_cache(const clef_spectrum_opts *o, const char *key, int lmax_t,
                             int rows, double *wl, int store);

#endif
