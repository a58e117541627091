/* First acoustic peak: locate the maximum of the underlying D_l from a
 * band-power table, through the band powers' window functions.
 *
 * Model (docs/peak.md): around the peak, ln D(l) is a polynomial in
 * d = (l - l_c) / half_width whose constant, linear, quadratic and cubic
 * terms are free and whose terms of degree 4 to CLEF_PEAK_DEGREE carry
 * independent Gaussian priors with the variances of the Taylor
 * coefficients of a squared-exponential Gaussian process (Rasmussen &
 * Williams 2006, Gaussian Processes for Machine Learning, eq. 4.3 and
 * section 9.4), its length the peak's own Gaussian width.  The model is
 * evaluated at every multipole and summed with each bin's window
 * (<D_b> = sum_l W_bl D_l), so neither the bin width nor the placement of
 * the bins biases the position.  The quoted error is the sampling error of
 * the fitted terms (the "sandwich" covariance of a penalised fit) combined
 * with the estimated bias of the shape prior, what the fit window and the
 * bin width do to the result (docs/peak.md, "Errors").  The peak is the
 * maximum of the fitted continuous D(l).
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

/* Highest power of d in ln D (degrees 4..CLEF_PEAK_DEGREE under the prior). */
#define CLEF_PEAK_DEGREE 7
/* Automatic half width of the fit: max(CLEF_PEAK_HALF_WIDTH_MIN,
 * CLEF_PEAK_HALF_WIDTH_BINS times the widest bin in the search window). */
#define CLEF_PEAK_HALF_WIDTH_MIN 120.0
#define CLEF_PEAK_HALF_WIDTH_BINS 3.0
/* Default prior rms s of the Gaussian process on ln D (natural-log units). */
#define CLEF_PEAK_SHAPE_PRIOR 1.0
/* Fewest bins in a fit: the four free terms plus one degree of freedom. */
#define CLEF_PEAK_MIN_BINS 5
/* Default number of parametric draws for the sampling error (docs/peak.md,
 * step 11: 0, the first-order error; on the sky ensembles the draws did not
 * improve the calibration), the number docs/peak.md suggests when asking for
 * them, and the fixed seed that makes the error a deterministic function of
 * the table. */
#define CLEF_PEAK_DRAWS 0
#define CLEF_PEAK_DRAWS_SUGGESTED 200
#define CLEF_PEAK_DRAW_SEED 20021u

typedef struct clef_peak_opts {
    double l_min, l_max;    /* search window: bins with l_min <= l_eff <= l_max (default 100..400) */
    double half_width;      /* bins within this many multipoles of the fit centre enter the fit;
                               0 (default): automatic, see CLEF_PEAK_HALF_WIDTH_* */
    double curv_nsigma;     /* the curvature of ln D at the peak must lie at least this many
                               standard errors below zero, else "no peak" (default 2) */
    double shape_prior;     /* prior rms s of the higher-order terms; 0 (default):
                               CLEF_PEAK_SHAPE_PRIOR */
    int draws;              /* parametric draws of the band powers around the fit, each refitted
                               by the whole procedure, for the sampling error; 0 (default,
                               CLEF_PEAK_DRAWS): first-order propagation only */
} clef_peak_opts;

void clef_peak_opts_default(clef_peak_opts *o);

/* Where the fit's window functions came from. */
enum clef_peak_windows {
    CLEF_PEAK_WIN_TABLE = 0,  /* the table's own band-power windows (bp->win) */
    CLEF_PEAK_WIN_TOPHAT = 1, /* none in the table: uniform D average over [l_lo, l_hi] */
    CLEF_PEAK_WIN_POINT = 2   /* none, and bins of one multipole: D at l_eff */
};

typedef struct clef_peak_result {
    int found;              /* 1: a peak was found; 0: none, `reason` says why */
    char reason[256];
    double l_peak, l_peak_err;       /* multipole and 1-sigma error (statistical and shape) */
    double l_peak_err_stat;          /* sampling part: the first-order part corrected by the
                                        parametric draws (l_peak_err_lin when draws = 0) */
    double l_peak_err_lin;           /* first-order sampling error (sandwich covariance of the
                                        terms) */
    int draws, draws_found;          /* draws made, and those in which a peak was found */
    double l_peak_err_shape;         /* shape part, the estimated shift by the shape prior:
                                        err^2 = stat^2 + shape^2 */
    double d_peak, d_peak_err;       /* D at the peak and 1-sigma error, uK^2 */
    double corr;                     /* correlation coefficient of (l_peak, d_peak) */
    double theta_deg, theta_deg_err; /* angular scale 180 deg / l_peak and its error */
    double width;                    /* Gaussian-equivalent width of the fitted peak,
                                        1 / sqrt(-d^2 ln D / dl^2), multipoles */
    double chi2;                     /* chi^2 of the band powers (prior terms excluded) */
    int dof;                         /* bins - 4 free terms */
    double p_value;                  /* probability of a chi2 at least this large */
    int nbins_used, bin_first, bin_last;
    double curv_signif;              /* (d^2 ln D / dl^2 at the peak) / its error; negative
                                        for a peak; NaN when no fit was made */
    double half_width;               /* half width used, multipoles */
    double shape_prior;              /* prior rms used */
    int windows;                     /* enum clef_peak_windows */
} clef_peak_result;

/* Below this |curv_signif| a found peak comes with a warning that the
 * delta-method errors may underestimate the scatter (docs/peak.md). */
#define CLEF_PEAK_RELIABLE_SIGNIF 4.0

/* Fit the first peak (docs/peak.md): the highest band power in the search
 * window starts the fit; the bins within half_width of the centre are
 * fitted by Levenberg-Marquardt with the table's covariance block (or
 * dl_err^2 on the diagonal when bp->cov is NULL) and the prior; the centre
 * moves to the fitted peak until the set of bins stops changing.  Windows:
 * bp->win when present (it must cover every fitted bin's multipoles),
 * else the fallbacks of enum clef_peak_windows.  Sampling error: first-
 * order propagation; with o->draws > 0, from that many Gaussian draws of
 * the band powers around the fitted model, each refitted by the same
 * procedure (a parametric bootstrap split along the first-order response;
 * docs/peak.md, Method step 11), seeded with CLEF_PEAK_DRAW_SEED so that
 * the result depends on the table only.
 * "No peak" is not an error: the call returns CLEF_OK with found = 0 and a
 * reason (highest bin on the window edge, too few bins, ln D not concave
 * or the curvature not significant, fit not converged, maximum outside the
 * fitted range), and the numbers of `r` NaN.  Errors (CLEF_EINVAL) are for
 * unusable input: no bin in the window, an empty window, non-positive or
 * missing errors, a covariance that is not positive definite, bins not in
 * increasing l_eff, windows too short, bad options.  Allocates only
 * scratch memory for the call; `bp` is only read. */
int clef_peak_find(const clef_bandpowers *bp, const clef_peak_opts *o, clef_peak_result *r);

/* The half width clef_peak_find uses for these options and this table
 * (o->half_width if positive, else the automatic rule). */
double clef_peak_half_width(const clef_bandpowers *bp, const clef_peak_opts *o);

/* Record the result and the settings that made it as header keywords PK_*
 * of a table (for its FITS/CSV files; docs/formats.md "Peak keywords"),
 * replacing any earlier PK_* items.  o may be NULL (settings not recorded). */
int clef_peak_to_meta(const clef_peak_result *r, const clef_peak_opts *o, clef_bandpowers *bp);
/* Read them back; o (may be NULL) receives the recorded settings (the
 * defaults where a keyword is missing).  CLEF_EINVAL when the table has no
 * result, PK_FOUND is invalid, or PK_MODEL names another model (a table
 * written by an older clef: refit it with clef peak). */
int clef_peak_from_meta(const clef_bandpowers *bp, clef_peak_result *r, clef_peak_opts *o);

/* The model name recorded in PK_MODEL. */
#define CLEF_PEAK_MODEL_NAME "logcubic-gp"

#ifdef __cplusplus
}
#endif
#endif
