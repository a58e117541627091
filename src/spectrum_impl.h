/* Private pieces of the spectrum estimator. */
#ifndef CLEF_SPECTRUM_IMPL_H
#define CLEF_SPECTRUM_IMPL_H

#include "clef/bins.h"
#include "clef/coupling.h"
#include "clef/spectrum.h"

/* The signal filter T_l = F_l B_l^2 p_l^2 of the options for l = 0..lmax
 * (spectrum.c; also used by the polarized spectra, spectrum_pol.c). */
int clef_spectrum_signal_filter(const clef_spectrum_opts *o, int64_t nside, int lmax, double *tl);

/* Effective weights: the mask where the map is valid, 0 elsewhere (new array). */
int clef_spectrum_make_weights(const clef_map *map, const clef_map *mask, double **w_out);

/* Fill a table's D_b, C_b, l ranges and errors from band powers of `bins`
 * and their covariance (nbins x nbins). */
void clef_spectrum_fill_table(clef_bandpowers *bp, const clef_bins *bins, const double *band,
                              const double *cov);

/* Band-power windows acting on D_l (docs/formats-spectrum.md) from windows
 * acting on C_l: row rep[b] of `all` (row length `stride`, first n columns
 * used) into row b of win (nb x n); flat-weighted bands scaled to D_b. */
void clef_spectrum_windows_to_dl(const clef_bins *bins, const int *rep, int nb, const double *all,
                                 size_t stride, size_t n, double *win);

/* Inputs of the band-power covariance (spectrum_cov.c). */
typedef struct clef_spectrum_cov_in {
    int lmax;                   /* multipoles decoupled */
    int lmax_t;                 /* multipoles of the mask spectra */
    int cross;                  /* 1: cross-spectrum of two maps */
    const clef_bins *bins;
    const clef_coupling_binned *kb;
    double *const *pcl;         /* pseudo-spectra before noise subtraction:
                                   [0] map1 x map2 (or auto), [1] map1 auto, [2] map2 auto */
    double w2[3];               /* mean of w_a w_b for the pairs of pcl[0..2] */
    const double *tl;           /* signal filter F B^2 p^2, l = 0..lmax */
    const double *wl2;          /* spectrum of the product mask w_a w_b, l = 0..lmax_t */
    const clef_spectrum_opts *opts;
    const clef_coupling *m2;    /* NULL, or M[w_a w_b] already built from wl2 to lmax (the
                                   polarized spectra share it between spectra) */
} clef_spectrum_cov_in;

/* Covariance of the decoupled band powers (nbins x nbins, row-major). */
int clef_spectrum_covariance(const clef_spectrum_cov_in *in, double *cov);

/* Unbinned coupling matrix of a mask spectrum, through the cache when the
 * options allow it. */
int clef_spectrum_coupling(clef_coupling **out, int lmax, const double *wl, int wl_lmax,
                           const clef_spectrum_opts *o);

/* Cache key of the mask spectra: the weights, nside, lmax_t, iterations. */
void clef_spectrum_mask_key(int64_t nside, int lmax_t, int iterations, const double *w2,
                            const double *w1, char hex[65]);

/* Cache key of the deprojection correction: the mask key, the templates
 * removed from each map, the correction's range and the iterations. */
void clef_spectrum_deproj_key(const char *mask_key, const int nf[2], int lp, int iterations,
                              char hex[65]);
/* The correction as one payload of n doubles (store = 0: load, 1 on a hit;
 * store = 1: save).  Cache problems are warnings, never errors. */
int clef_spectrum_deproj_cache(const clef_spectrum_opts *o, const char *key, size_t n,
                               double *payload, int store);

/* The mask spectra W_l and W_l[w_a w_b] (2 x (lmax_t + 1) doubles in wl)
 * in the cache folder under `key`.  store = 0: load, returning 1 on a hit;
 * store = 1: save (returns 0).  Cache problems are warnings, never errors. */
int clef_spectrum_mask_cache(const clef_spectrum_opts *o, const char *key, int lmax_t,
                             double *wl, int store);

#endif
