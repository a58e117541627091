/* Simulation ensembles (Hivon et al. 2002, ApJ 567, 2, sections 3-4): many
 * realisations of a sky, each analysed exactly as the data, and what their
 * scatter tells: the Monte Carlo transfer function, the Monte Carlo
 * covariance against the analytic one, the bias of the mean band powers,
 * the noise bias and the calibration of the first-peak errors.
 *
 * Pieces (docs/ensemble.md):
 *  - clef_ensemble_seed: the seed of realisation i from (base seed, i, kind)
 *    only, so a realisation does not depend on which process made it;
 *  - an analyser ("one realisation -> band powers"): today
 *    clef_ensemble_spectrum_analyser around clef_spectrum_compute; another
 *    estimator fits the same interface;
 *  - a plan (clef_ensemble_plan_create) that holds the synthesis plan and
 *    the simulation settings, and makes realisation i (simulate) or takes
 *    given maps, then analyses them (clef_ensemble_plan_analyse);
 *  - statistics over the realisations in index order (deterministic):
 *    mean and covariance, transfer function, bias, covariance comparison,
 *    peak calibration.
 *
 * Thread safety: a plan runs one realisation at a time (its transforms
 * use OpenMP threads); distinct plans may run concurrently.
 */
#ifndef CLEF_ENSEMBLE_H
#define CLEF_ENSEMBLE_H

#include <stdint.h>

#include "clef/bins.h"
#include "clef/clef.h"
#include "clef/map.h"
#include "clef/peak.h"
#include "clef/sim.h"
#include "clef/spectrum.h"
#include "clef/table.h"

#ifdef __cplusplus
extern "C" {
#endif

/* Kinds of realisation: sky plus noise, or noise only (the noise bias). */
enum clef_ensemble_kind { CLEF_ENSEMBLE_SIGNAL = 0, CLEF_ENSEMBLE_NOISE_ONLY = 1 };

/* The 64-bit simulation seed (clef_sim_opts.seed) of realisation i of a
 * kind: splitmix64(splitmix64(base XOR kind constant) + i) (Steele, Lea and
 * Flood 2014, "Fast splittable pseudorandom number generators"; the
 * constants of Vigna's reference code).  Depends on (base, i, kind) only. */
uint64_t clef_ensemble_seed(uint64_t base, uint64_t i, int kind);

/* What an analyser returns for one realisation: band powers (with their
 * analytic covariance and windows when the estimator has them) and the
 * first-peak fit. */
typedef struct clef_ensemble_result {
    clef_bandpowers *bp;  /* owned */
    clef_peak_result peak;
    int peak_done;
    /* What the Monte Carlo transfer function of Hivon et al. needs (NULL /
     * 0 when the analyser has no pseudo-spectra), l = 0..pcl_lmax, owned:
     * the pseudo-spectrum C~_l before any noise subtraction; the filter the
     * analysis assumed, T_l = F_l B_l^2 p_l^2 (sqrt(F_a F_b) B_a B_b p^2 for
     * two maps); wab, the mean over the sphere of the product of the two
     * maps' weights (w2 of the paper); and, when the analyser was asked for
     * it, the coupling M (row-major, (pcl_lmax + 1)^2) the analysis used. */
    double *pcl, *filter, *coupling;
    int pcl_lmax;
    double wab;
} clef_ensemble_result;
void clef_ensemble_result_free(clef_ensemble_result *r);

/* One realisation -> band powers.  maps[0] and, for a cross-spectrum,
 * maps[1]; nmaps 1 or 2. */
typedef struct clef_ensemble_analyser {
    void *ctx;
    int (*analyse)(void *ctx, const clef_map *const *maps, int nmaps, clef_ensemble_result *out);
    void (*release)(void *ctx); /* what ctx holds between analyses (may be NULL); called by
                                   clef_ensemble_plan_destroy */
} clef_ensemble_analyser;

/* The analyser of `clef spectrum`: clef_spectrum_compute with these masks
 * and options (all kept by pointer: they must outlive the analyser).  It
 * keeps the last realisation's estimator and hands it to the next
 * (clef_estimator_reuse, estimator.h): the analysis plan, mask spectra,
 * deprojection correction, coupling, covariance kernels, binned operator
 * and windows are read from the cache (or made) once per process, not once
 * per realisation, with the same bits as without. */
typedef struct clef_ensemble_spectrum_ctx {
    const clef_map *mask1, *mask2;
    const clef_spectrum_opts *opts;
    int keep_coupling; /* 1: results carry the coupling M (0 after the init below) */
    /* Called once in the next analysis, after the maps are transformed and
     * before anything that depends on the masks is read or made, then
     * cleared (NULL: none).  clef sims' ranks other than 0 receive rank 0's
     * mask pieces there (clef_ensemble_spectrum_adopt), their own
     * transforms done meanwhile. */
    void (*after_maps)(void *arg);
    void *after_maps_arg;
    /* What the analyses of this context did, summed over them: coupling
     * matrices (M, covariance kernels) computed and read from the cache
     * folder, mask-weight transforms, pieces taken from the analysis before
     * and from adopted bytes (clef_estimator_reused). */
    long couplings_computed, couplings_read, mask_transforms, pieces_reused, pieces_adopted;
    void *state;   /* private: the estimator kept for the next analysis */
    void *pending; /* private: adopted pieces for the next analysis */
} clef_ensemble_spectrum_ctx;
void clef_ensemble_spectrum_analyser(clef_ensemble_spectrum_ctx *ctx, const clef_map *mask1,
                                     const clef_map *mask2, const clef_spectrum_opts *opts,
                                     clef_ensemble_analyser *out);
/* The mask pieces of the last analysis (clef_estimator_export) as *n
 * malloc'ed bytes, for another process running the same ensemble.
 * CLEF_EINVAL before the first analysis. */
int clef_ensemble_spectrum_export(const clef_ensemble_spectrum_ctx *ctx, void **buf,
                                  size_t *n);
/* Hand another process's exported pieces to this context's next analysis
 * (clef_estimator_import): it takes what matches its masks and settings
 * instead of reading the cache or computing it, the same bits.  Called
 * from the after_maps callback, the analysis in progress takes them.
 * Errors: those of clef_estimator_import (nothing adopted). */
int clef_ensemble_spectrum_adopt(clef_ensemble_spectrum_ctx *ctx, const void *buf, size_t n);

/* Simulation settings of a plan (simulate-and-analyse mode). */
typedef struct clef_ensemble_sim {
    int64_t nside;
    int lmax;              /* simulated multipoles; 0: 3 nside - 1 */
    const double *cl;      /* input C_l in uK^2, l = 0..lmax (copied) */
    clef_sim_opts sim;     /* beam, pixel window, noise, hits, splits (seed unused; the beam
                              table, if any, covers 0..lmax and is copied; hits copied) */
} clef_ensemble_sim;

typedef struct clef_ensemble_plan clef_ensemble_plan;

/* sim NULL: a plan for given maps (analysis only). */
int clef_ensemble_plan_create(clef_ensemble_plan **out, const clef_ensemble_sim *sim,
                              const clef_ensemble_analyser *an);
void clef_ensemble_plan_destroy(clef_ensemble_plan *p);

/* Maps of realisation i (simulate mode): nsplits maps, allocated into
 * maps[0..nsplits-1] (the caller frees them); noise-only realisations have
 * no sky.  Seconds spent in *seconds (may be NULL). */
int clef_ensemble_plan_simulate(clef_ensemble_plan *p, uint64_t base_seed, uint64_t i, int kind,
                                clef_map **maps, int *nmaps);

/* Analyse maps with the plan's analyser (clef_ensemble_plan_destroy calls
 * its release). */
int clef_ensemble_plan_analyse(clef_ensemble_plan *p, const clef_map *const *maps, int nmaps,
                               clef_ensemble_result *out);

/* Mean and covariance (divisor n - 1) of n vectors of length m, x[i m + j],
 * summed in order of i (two passes): the same bits for the same inputs.
 * cov may be NULL.  CLEF_EINVAL for n < 2. */
int clef_ensemble_moments(int n, int m, const double *x, double *mean, double *cov);

/* Expected band powers of an input spectrum through windows:
 * out_b = sum_l win[b (win_lmax + 1) + l] f_l D_l, with f NULL = 1 and
 * D_l = l(l+1) C_l / 2 pi for l <= cl_lmax (0 beyond). */
void clef_ensemble_expected(int nbins, const double *win, int win_lmax, const double *cl,
                            int cl_lmax, const double *f, double *out);

/* Monte Carlo transfer function (Hivon et al. 2002, eq. 18 and section
 * 3.2): with windows W of an analysis that assumed F = 1, the mean band
 * powers satisfy <D_b> = sum_l W_bl F_l D_l.  F_l is modelled by its values
 * F_b at the bins' effective multipoles, interpolated linearly in l
 * (constant outside); Hivon et al.'s iteration F^{k+1}_b = F^k_b +
 * (<D_b> - (W F^k D)_b) / (W D)_b from F^0_b = <D_b> / (W D)_b converges to
 * the solution of the linear system <D> = A F_b, which is solved directly.
 * sem: standard errors of the mean band powers, or cov_mean their full
 * covariance (the ensemble covariance / N); fb_err from it.  fl: l =
 * 0..fl_lmax.  *iters (may be NULL): Jacobi steps of the paper's iteration
 * to reach the solution to 1e-3 of the errors (for the record). */
typedef struct clef_ensemble_transfer {
    int nbins;
    const double *mean, *sem, *l_eff, *win; /* win: nbins x (win_lmax + 1) */
    const double *cov_mean;                 /* nbins x nbins, or NULL (sem used) */
    int win_lmax;
    const double *cl;  /* input C_l, l = 0..cl_lmax */
    int cl_lmax;
} clef_ensemble_transfer;
int clef_ensemble_transfer_compute(const clef_ensemble_transfer *t, double *fb, double *fb_err,
                                   int fl_lmax, double *fl, int *iters);
/* The Monte Carlo transfer function as Hivon et al. (2002, ApJ 567, 2,
 * eq. 18) estimate it, from the mean pseudo-spectrum against the coupled
 * input:
 *     F^(0)_l   = <C~_l> / (w2 B_l^2 C_l),
 *     F^(k+1)_l = F^(k)_l + [<C~_l> - sum_l' M_ll' F^(k)_l' B_l'^2 C_l'] / (w2 B_l^2 C_l),
 * binned: each update is the ratio of the sums over a bin's multipoles with
 * the band powers' binning weights P_bl (the paper estimates F_l in bins),
 * so F enters only through its bin values F_b and <C~> only through its
 * bin sums c_b = sum_l P_bl C~_l:
 *     F^(k+1) = F^(k) + (c - A F^(k)) / den,
 * A_bc = sum_l P_bl sum_l' M_ll' phi_c(l') T_l' C_l', den_b = w2 sum_l P_bl
 * T_l C_l (T the analysis' filter B^2 p^2, phi_c the basis of F_l).
 * Basis: smooth = 0, F_l constant in each bin (F_b from l_lo to l_hi;
 * below the first bin the first value, above the last the last): an
 * analysis with the same bins and this F_l then has <D_b> = (W D^in)_b
 * exactly (its K = P M F B^2 Q and P<C~> = P M F B^2 C at the fixed
 * point), whatever F_true does inside a bin; smooth = 1, the linear
 * interpolation through l_eff of clef_ensemble_transfer_interp (smoother,
 * but biased where F_true has a step inside a bin).
 * clef_ensemble_hivon_system builds A and den once;
 * clef_ensemble_transfer_hivon iterates on the ensemble's c_b
 * (clef_ensemble_pcl_bins); clef_ensemble_hivon_fl expands F_b to F_l. */
typedef struct clef_ensemble_hivon {
    int nbins;
    const int *l_lo, *l_hi;   /* bins (inclusive) */
    const double *l_eff;      /* increasing */
    int smooth;               /* basis: 0 constant per bin, 1 linear through l_eff */
    int weighting;            /* binning weights: CLEF_BINS_DL (l(l+1)) or CLEF_BINS_FLAT */
    const double *coupling;   /* M, (lmax + 1)^2 row-major */
    const double *filter;     /* T_l, l = 0..lmax */
    int lmax;
    double wab;               /* w2 */
    const double *cl;         /* input C_l, l = 0..cl_lmax (0 beyond) */
    int cl_lmax;
} clef_ensemble_hivon;
/* a: nbins^2 row-major, den: nbins.  CLEF_EINVAL (bins outside 0..lmax,
 * l_eff not increasing, no input power in a bin). */
int clef_ensemble_hivon_system(const clef_ensemble_hivon *h, double *a, double *den);
/* c_b = sum_{l = l_lo[b]}^{l_hi[b]} P_l pcl_l with P_l = l(l+1) for
 * CLEF_BINS_DL weighting, 1 for CLEF_BINS_FLAT (the band powers' P_bl up to
 * a constant per bin, which cancels in the iteration). */
void clef_ensemble_pcl_bins(int nbins, const int *l_lo, const int *l_hi, int weighting,
                            const double *pcl, double *cb);
/* F_l, l = 0..fl_lmax, from the bin values in the basis of h->smooth. */
void clef_ensemble_hivon_fl(const clef_ensemble_hivon *h, const double *fb, int fl_lmax,
                            double *fl);
/* Iterate from F^(0) = c / den until the largest change of F_b is below
 * tol (1e-10 when tol <= 0), at most max_iter steps (200 when <= 0):
 * CLEF_ENUMERIC if it does not converge.  The map c -> F after k steps is
 * linear, so fb_err = sqrt(diag(L S L^T)) with L that map (applied to the
 * unit vectors) and S cov_c, the covariance of the mean c (nbins^2).
 * *iters (may be NULL): the steps taken. */
int clef_ensemble_transfer_hivon(int nbins, const double *a, const double *den, const double *c,
                                 const double *cov_c, int max_iter, double tol, double *fb,
                                 double *fb_err, int *iters);
/* F_l of the bins (the interpolation above), l = 0..fl_lmax. */
void clef_ensemble_transfer_interp(int nbins, const double *l_eff, const double *fb, int fl_lmax,
                                   double *fl);

/* Monte Carlo covariance against an analytic one (both m x m): ratio of
 * the diagonals per bin, correlation difference r_mc - r_an (m x m, may be
 * NULL), largest |ratio - 1| and largest off-diagonal |difference|. */
void clef_ensemble_cov_compare(int m, const double *mc, const double *an, double *ratio,
                               double *corr_diff, double *max_ratio_dev, double *max_corr_diff);

/* Calibration of an estimate with errors against a truth: pull_i =
 * (x_i - truth) / err_i over the n entries with ok[i] (ok may be NULL);
 * mean and standard deviation of the pulls and the fraction with
 * |pull| <= 1 (1-sigma coverage; 0.683 for Gaussian errors).  *used: the
 * entries counted. */
void clef_ensemble_calibration(int n, const double *x, const double *err, const int *ok,
                               double truth, double *mean_pull, double *sd_pull,
                               double *coverage, int *used);

#ifdef __cplusplus
}
#endif
#endif
