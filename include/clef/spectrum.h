/* The main job: one or two HEALPix maps and their mask(s) -> decoupled,
 * binned band powers with a Gaussian covariance, corrected for the mask's
 * mode coupling (pseudo-C_l method, Hivon et al. 2002, ApJ 567, 2), the
 * beam, the pixel window, a transfer function and (auto-spectra) a noise
 * spectrum; optionally the first acoustic peak of the result.
 *
 * Steps (docs/method.md): effective weights w = mask x validity of the map;
 * monopole and dipole fitted on the observed sky with weights w and
 * removed; one shared analysis of the weighted map(s), the mask(s) and the
 * product mask w_a w_b; pseudo-spectra; the binned coupling operator
 * K = P M F B^2 p^2 Q (from the coupling cache when possible); D_b =
 * K^-1 P (C~ - M N); the covariance (K^-1 P) Cov(C~) (K^-1 P)^T with the
 * Gaussian pseudo-C_l approximation Cov(C~_l, C~_l') = [C^ac_l C^bd_l' +
 * C^ad_l C^bc_l'] M[w_a w_b]_ll' / (2l'+1) (Efstathiou 2004, MNRAS 349,
 * 603; Garcia-Garcia et al. 2019, JCAP 11, 043), with C estimated from the
 * measured pseudo-spectra divided by the mask moment (or from a theory
 * spectrum times the beam plus noise).
 *
 * Thread safety: clef_spectrum_compute may run concurrently on distinct
 * inputs; it parallelises internally with OpenMP.
 */
#ifndef CLEF_SPECTRUM_H
#define CLEF_SPECTRUM_H

#include "clef/bins.h"
#include "clef/clef.h"
#include "clef/map.h"
#include "clef/peak.h"
#include "clef/table.h"

#ifdef __cplusplus
extern "C" {
#endif

/* Default Jacobi iterations of the analysis (clef_sht_analysis). */
#define CLEF_SPECTRUM_ITERATIONS 1
/* Default bin width floor (multipoles) when no bins are given; the width
 * actually used is max(this, the mask's coupling width). */
#define CLEF_SPECTRUM_BIN_WIDTH 20
/* Default lmax is 3 nside - 1, lowered to the last l where the beam times
 * the pixel window is at least this (decoupling beyond would amplify the
 * noise by more than 1e4 in power). */
#define CLEF_SPECTRUM_BEAM_FLOOR 1e-2

typedef struct clef_spectrum_opts {
    int lmax;                  /* 0: default (above); else 2 <= lmax <= 3 nside - 1 */
    const clef_bins *bins;     /* NULL: linear bins from l = 2 (width below) */
    int bin_width;             /* 0: automatic (CLEF_SPECTRUM_BIN_WIDTH floor) */
    double beam_fwhm;          /* Gaussian beam FWHM, arcmin; 0 = none */
    const double *beam;        /* tabulated B_l for l = 0..beam_lmax instead; NULL = none */
    int beam_lmax;
    int pixel_window;          /* 1: correct for the HEALPix pixel window */
    const double *transfer;    /* F_l, l = 0..transfer_lmax; NULL = 1 */
    int transfer_lmax;
    const double *noise_cl;    /* auto-spectra: N_l (uK^2, unbeamed) to subtract; NULL = none */
    int noise_lmax;
    const double *theory_cl;   /* C_l (uK^2) for the covariance instead of the measured one */
    int theory_lmax;
    int iterations;            /* analysis iterations (CLEF_SPECTRUM_ITERATIONS) */
    int keep_multipoles;       /* 1: do not remove the monopole and dipole */
    int use_cache;             /* 1: read/write the coupling cache (default) */
    const char *cache_dir;     /* NULL: $CLEF_CACHE_DIR, $XDG_CACHE_HOME/clef, ~/.cache/clef */
    double rcond_min;          /* 0: CLEF_COUPLING_RCOND_MIN */
    int find_peak;             /* 1: fit the first acoustic peak (default) */
    clef_peak_opts peak;       /* its options (clef_peak_opts_default; half_width 0 = automatic:
                                  max(60, three bin widths)) */
    const char *names[4];      /* map1, map2, mask1, mask2 names for messages (may be NULL) */
    int allow_coord_mismatch;  /* 1: accept map and mask with different COORDSYS */
} clef_spectrum_opts;

void clef_spectrum_opts_default(clef_spectrum_opts *o);

#define CLEF_SPECTRUM_MAX_STAGES 12

typedef struct clef_spectrum_result {
    clef_bandpowers *bp;       /* band powers, covariance and metadata (owned) */
    clef_peak_result peak;     /* valid when peak_done */
    int peak_done;
    int cross;                 /* 1 for a cross-spectrum of two maps */
    int64_t nside;
    int lmax;                  /* multipoles decoupled */
    int lmax_mask;             /* multipoles of the mask spectra used by the coupling */
    int nbins;
    int bin_width;             /* width used for automatic bins, 0 when bins were given */
    double fsky, w1, w2, w4, fsky_eff; /* moments of the (first) effective mask */
    double rcond;              /* reciprocal condition number of K */
    int cache_hit;             /* 1 when K came from the cache */
    double multipoles[2][4];   /* removed monopole and dipole (x, y, z) per map, uK */
    int nstages;
    struct { char name[24]; double seconds; } stage[CLEF_SPECTRUM_MAX_STAGES];
} clef_spectrum_result;

/* Compute band powers.  map2 NULL: auto-spectrum of map1; else the cross-
 * spectrum of map1 and map2 (no noise bias for independent noise).  mask2
 * NULL: mask1 serves both maps.  Missing pixels of each map are excluded
 * through its weights.  Errors: CLEF_EINVAL (nside mismatch, coordinate
 * mismatch, mask values outside [0,1], mask leaving no sky, lmax above
 * 3 nside - 1, bins beyond lmax), CLEF_ENUMERIC (singular or ill-
 * conditioned coupling: the message suggests a bin width), CLEF_ENOMEM. */
int clef_spectrum_compute(const clef_map *map1, const clef_map *map2, const clef_map *mask1,
                          const clef_map *mask2, const clef_spectrum_opts *opts,
                          clef_spectrum_result *res);
void clef_spectrum_result_free(clef_spectrum_result *res); /* frees res->bp; res itself is the caller's */

/* Fit and remove the monopole and dipole of a map by weighted least squares
 * on the pixels with w > 0: min sum_p w_p (T_p - a - d . n_p)^2.  coeffs
 * (may be NULL) receives a, d_x, d_y, d_z.  with_dipole = 0 removes the
 * monopole only.  Errors: CLEF_EINVAL (no weighted pixel), CLEF_ENUMERIC
 * (the observed region does not constrain a dipole). */
int clef_spectrum_remove_multipoles(double *map, const double *w, int64_t nside, int with_dipole,
                                    double coeffs[4]);

#ifdef __cplusplus
}
#endif
#endif
