/* Private pieces of the spectrum estimator. */
#ifndef CLEF_SPECTRUM_IMPL_H
#define CLEF_SPECTRUM_IMPL_H

#include "clef/spectrum.h"

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

/* The mask spectra W_l and the covariance kernels (rows x (lmax_t + 1)
 * doubles in wl: W_l, W_l[w_a w_b] and, for two masks, W_l[w_a^2, w_b^2])
 * in the cache folder under `key`.  store = 0: load, returning 1 on a hit;
 * store = 1: save (returns 0).  Cache problems are warnings, never errors. */
int clef_spectrum_mask_cache(const clef_spectrum_opts *o, const char *key, int lmax_t,
                             int rows, double *wl, int store);

#endif
