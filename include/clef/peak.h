/* First acoustic peak: locate the first maximum of D_l in a band-power
 * table by fitting a smooth peaked model with the band-power covariance.
 *
 * Works on any clef_bandpowers table (clef's own output or a user's file).
 * Thread safety: no shared state.
 */
#ifndef CLEF_PEAK_H
#define CLEF_PEAK_H

#include "clef/clef.h"
#include "clef/table.h"

#ifdef __cplusplus
extern "C" {
#endif

enum clef_peak_model {
    CLEF_PEAK_PARABOLA = 0, /* D(l) = a + b l + c l^2 around the top bins */
    CLEF_PEAK_GAUSSIAN = 1  /* D(l) = D0 + A exp(-(l - lp)^2 / 2 w^2) */
};

typedef struct clef_peak_opts {
    double l_min, l_max;    /* search window (default 100 <= l <= 400) */
    int model;              /* enum clef_peak_model (default Gaussian) */
    double half_width;      /* bins within this many multipoles (at least 3 bin widths) of the
                               highest bin enter the fit (default 60) */
    double curv_nsigma;     /* the fitted curvature must lie at least this many standard
                               errors below zero, else "no peak" (default 2; docs/peak.md) */
} clef_peak_opts;

void clef_peak_opts_default(clef_peak_opts *o);

typedef struct clef_peak_result {
    int found;              /* 1: a peak was found; 0: none, `reason` says why */
    char reason[256];
    int model;
    double l_peak, l_peak_err;       /* multipole and 1-sigma error */
    double d_peak, d_peak_err;       /* D at the peak and 1-sigma error, uK^2 */
    double corr;                     /* correlation coefficient of (l_peak, d_peak) */
    double theta_deg, theta_deg_err; /* angular scale 180 deg / l_peak and its error */
    double chi2;                     /* goodness of fit */
    int dof;
    double p_value;                  /* probability of a chi2 at least this large */
    int nbins_used, bin_first, bin_last;
    double curv_signif;              /* c / sigma_c of the parabola fit (negative for a peak;
                                        NaN when no fit was made); the quoted errors match
                                        the scatter of l_peak when it is below about
                                        -CLEF_PEAK_RELIABLE_SIGNIF (docs/peak.md) */
} clef_peak_result;

/* Below this |c / sigma_c| a found peak comes with a warning that the
 * delta-method errors may underestimate the scatter (docs/peak.md). */
#define CLEF_PEAK_RELIABLE_SIGNIF 4.0

/* Fit the first peak (docs/peak.md): the bins of the window within
 * half_width of the highest one, by generalised least squares with the
 * table's covariance block (or dl_err^2 on the diagonal when bp->cov is
 * NULL); errors by first-order propagation of the parameter covariance.
 * The Gaussian is fitted in a form that contains the parabola as its
 * w -> infinity limit, by Levenberg-Marquardt started from the parabola.
 * "No peak" is not an error: the call returns CLEF_OK with found = 0 and a
 * reason (highest bin on the window edge, too few bins, curvature not
 * negative or not significant, fit not converged, vertex outside the fitted
 * range), and the numbers of `r` NaN.  Errors (CLEF_EINVAL) are for
 * unusable input: no bin in the window, an empty window, non-positive or
 * missing errors, a covariance that is not positive definite, bins not in
 * increasing l_eff, bad options.  Allocates only scratch memory for the call;
 * `bp` is only read. */
int clef_peak_find(const clef_bandpowers *bp, const clef_peak_opts *o, clef_peak_result *r);

/* Record the result as header keywords PK_* of a table (for its FITS/CSV
 * files; docs/formats.md "Peak keywords"), replacing any earlier PK_* items,
 * and read it back; from_meta returns CLEF_EINVAL when the table has none
 * or PK_FOUND / PK_MODEL are invalid. */
int clef_peak_to_meta(const clef_peak_result *r, clef_bandpowers *bp);
int clef_peak_from_meta(const clef_bandpowers *bp, clef_peak_result *r);

#ifdef __cplusplus
}
#endif
#endif
