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
#include "clef/coupling.h"
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
/* Default lmax: this times nside (the HEALPix quadrature is accurate to
 * about 2 nside; band powers above are biased, docs/method.md section 5),
 * lowered to the last l where the beam times the pixel window is at least
 * CLEF_SPECTRUM_BEAM_FLOOR (decoupling beyond would amplify the noise by
 * more than 1e4 in power) and to the end of the beam, transfer and noise
 * tables, then, for automatic bins, to the end of the last whole bin. */
#define CLEF_SPECTRUM_LMAX_NSIDE 2
#define CLEF_SPECTRUM_BEAM_FLOOR 1e-2

typedef struct clef_spectrum_opts {
    int lmax;                  /* 0: default (above); else 2 <= lmax <= 3 nside - 1 (a warning
                                  above 2 nside) */
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
    clef_peak_opts peak;       /* its options (clef_peak_opts_default: half_width 0 = the
                                  automatic rule of peak.h, as clef peak uses) */
    const char *names[4];      /* map1, map2, mask1, mask2 names for messages (may be NULL) */
    int allow_coord_mismatch;  /* 1: accept map and mask with different COORDSYS */
    int keep_alm;              /* 1: res->alm receives the a_lm of the weighted map(s), multipoles
                                  removed, in uK, l, m <= lmax_ext (the polarized spectra reuse
                                  them) */
    int pure_b;                /* polarized spectra only (clef_spectrum_pol_compute): 1 = BB
                                  from pure-B multipoles (B-mode purification, purify.h) */
    clef_coupling_create_fn *coupling_create; /* makes the coupling matrices (M, covariance
                                  kernels) of the temperature estimator in place of
                                  clef_coupling_create, e.g. shared among processes (clef
                                  sims); NULL: clef_coupling_create */
    void *coupling_arg;        /* its first argument */
    void (*inputs_done)(void *arg); /* called once, when every map has been weighted and
                                  transformed and every mask turned into weights: no pixel of
                                  the maps or masks is read after it, so a caller holding
                                  large maps can release their pixels there
                                  (clef_map_release_pixels); NULL: none */
    void *inputs_done_arg;     /* its argument */
    /* Cross-spectra of maps from two instruments: with second_instrument = 1
     * the second map's beam (Gaussian FWHM or table) and transfer function are
     * these, and the pair's filter is sqrt(F_1 F_2) B_1 B_2 p_l^2; with 0 the
     * beam and transfer entries above apply to both maps. */
    int second_instrument;
    double beam2_fwhm;         /* arcmin; 0 = none */
    const double *beam2;       /* B_l, l = 0..beam2_lmax; NULL = beam2_fwhm */
    int beam2_lmax;
    const double *transfer2;   /* F_l, l = 0..transfer2_lmax; NULL = 1 */
    int transfer2_lmax;
} clef_spectrum_opts;

void clef_spectrum_opts_default(clef_spectrum_opts *o);

#define CLEF_SPECTRUM_MAX_STAGES 12

typedef struct clef_spectrum_result {
    clef_bandpowers *bp;       /* band powers, covariance and metadata (owned) */
    clef_peak_result peak;     /* valid when peak_done */
    int peak_done;
    int cross;                 /* 1 for a cross-spectrum of two maps */
    int64_t nside;
    int lmax;                  /* multipoles reported (the last bin ends here) */
    int lmax_ext;              /* multipoles analysed, coupled and decoupled (>= lmax): hidden
                                  bins above lmax take the power there (docs/method.md 5) */
    int lmax_mask;             /* multipoles of the mask spectra used by the coupling */
    int nbins;                 /* band powers reported */
    int nbins_hidden;          /* bins decoupled but not reported */
    int ldep;                  /* the monopole/dipole removal is corrected in the coupling for
                                  l <= ldep (0 when the multipoles are kept) */
    int bin_width;             /* width used for automatic bins, 0 when bins were given */
    double fsky, w1, w2, w4, fsky_eff; /* moments of the (first) effective mask */
    double rcond;              /* reciprocal condition number of K */
    int cache_hit;             /* 1 when K came from the cache */
    double multipoles[2][4];   /* removed monopole and dipole (x, y, z) per map, uK */
    int nstages;
    struct { char name[24]; double seconds; } stage[CLEF_SPECTRUM_MAX_STAGES];
    double _Complex *alm[2];   /* with opts->keep_alm: a_lm of map1 (and map2), else NULL; freed by
                                  clef_spectrum_result_free */
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

/* The lmax clef_spectrum_compute chooses for opts->lmax = 0 on maps of this
 * nside, before automatic bins trim it to a whole bin: min(2 nside, the
 * beam floor, the tables' ends).  opts may be NULL (defaults).  Errors:
 * CLEF_EINVAL (bad nside, tables ending below l = 2), CLEF_ENOMEM. */
int clef_spectrum_default_lmax(const clef_spectrum_opts *opts, int64_t nside, int *lmax);

/* ---- polarization (src/spectrum_pol.c; docs/method.md "Polarization") ----
 * Six spectra of one T/Q/U field (f2 NULL) or a pair of fields: TT by
 * clef_spectrum_compute unchanged (its bins, lmax, warnings, covariance,
 * windows); TE (T1 x E2), TB, EE, EB (E1 x B2 jointly with B1 x E2; their
 * mean for one field), BB decoupled with the spin-2 coupling matrices of
 * coupling.h on the same bins.  mask_t weights T, mask_p (NULL: mask_t)
 * weights Q and U; both fields share the masks.  Q/U in the COSMO
 * convention (clef_map_read_pol).  noise_p: N_l of Q/U noise
 * (N^EE = N^BB, uK^2, unbeamed) subtracted from the auto EE and BB
 * through M+ + M- (ignored with a warning for a pair).  The beam, pixel
 * window and transfer function of opts apply to every spectrum (the
 * temperature pixel window stands in for the polarization one). */
enum { CLEF_POL_TT, CLEF_POL_TE, CLEF_POL_TB, CLEF_POL_EE, CLEF_POL_EB, CLEF_POL_BB,
       CLEF_POL_NSPEC };
const char *clef_spectrum_pol_name(int k); /* "TT", "TE", ... */

typedef struct clef_spectrum_pol_result {
    clef_spectrum_result tt;   /* the temperature run; owns bp[CLEF_POL_TT] */
    clef_bandpowers *bp[CLEF_POL_NSPEC]; /* band powers, covariance (per spectrum), windows on D_l;
                                            keyword SPECTRUM names the spectrum */
    double *leak_win;          /* 2 nbins x (win_lmax + 1): BB bands on D^EE_l, then EE bands
                                  on D^BB_l (the E/B leakage windows) */
    int win_lmax, nbins, lmax, lmax_ext, cross;
    double rcond_eebb, rcond_ebbe; /* of the joint binned operators */
    int pol_cache_hit;         /* 1 when M^TE, M+, M- came from the cache */
    int pure_b;                /* 1: BB is the pure-B estimate (opts->pure_b) */
    double pure_tail[2];       /* per field: clef_purify_tail of its P weight (pure_b only) */
} clef_spectrum_pol_result;

int clef_spectrum_pol_compute(const clef_map_pol *f1, const clef_map_pol *f2,
                              const clef_map *mask_t, const clef_map *mask_p,
                              const clef_spectrum_opts *opts, const double *noise_p,
                              int noise_p_lmax, clef_spectrum_pol_result *res);
void clef_spectrum_pol_result_free(clef_spectrum_pol_result *res);

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
