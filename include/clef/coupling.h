/* The mode-coupling matrix of a mask and the binned decoupling operator
 * (Hivon et al. 2002, ApJ 567, 2, "MASTER"; METHODS.md section 4).
 *
 * For a weighted map w T, the pseudo-spectrum obeys
 *   <C~_l> = sum_l' M_ll' F_l' B_l'^2 p_l'^2 <C_l'> + <N~_l>,
 *   M_ll' = (2l'+1)/(4 pi) sum_l'' (2l''+1) W_l'' (l l' l''; 0 0 0)^2,
 * with W_l the power spectrum of the mask w (caller-supplied, normally to
 * l = 2 lmax), F_l the transfer function, B_l the beam, p_l the pixel
 * window.  The binned operator is
 *   K_bb' = sum_ll' P_bl M_ll' T_l' Q_l'b',  T_l = F_l B_l^2 p_l^2,
 * and the decoupled band powers are K^-1 P (C~ - N~).
 *
 * Monopole and dipole: M covers every 0 <= l, l' <= lmax (so its exact
 * properties can be checked), but bins start at l >= 2 (clef_bins) and
 * K only sums over multipoles inside bins: the spectrum code removes the
 * monopole and dipole from the map before the pseudo-spectrum, and any
 * remaining power there is neither binned nor decoupled.
 *
 * The same builder serves any W_l: the mask spectrum for the estimator,
 * and the spectrum of w^2 for the Gaussian pseudo-C_l covariance
 * (METHODS.md section 5).
 *
 * Objects: clef_coupling holds M ((lmax+1)^2 doubles, row-major
 * M[l (lmax+1) + l']) and a copy of W_l; clef_coupling_binned holds K, its
 * LU factors and K^-1 P.  Both are immutable after creation, so concurrent
 * reads are safe.  Creation runs OpenMP-parallel (threads as set by
 * omp_set_num_threads) and reports progress as stage "coupling".
 *
 * Cache (src/coupling_cache.c, docs/coupling.md): M and K can be stored
 * in a cache folder, one file per key, the key being the SHA-256 of every
 * input that changes them (W_l, lmax, bins, transfer array, clef version).
 */
#ifndef CLEF_COUPLING_H
#define CLEF_COUPLING_H

#include "clef/bins.h"
#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

typedef struct clef_coupling clef_coupling;
typedef struct clef_coupling_binned clef_coupling_binned;

/* Default smallest acceptable reciprocal condition number (1-norm, LAPACK
 * dgecon) of K: below it the decoupling amplifies errors by more than 1e6. */
#define CLEF_COUPLING_RCOND_MIN 1e-6
/* Default level defining the mask's coupling width: the highest l with
 * W_l >= level * W_0. */
#define CLEF_COUPLING_WIDTH_LEVEL 1e-2

/* Options; a field <= 0 (so also a zero-initialised struct) means its
 * default. */
typedef struct clef_coupling_opts {
    double rcond_min;   /* CLEF_ENUMERIC below this rcond (default CLEF_COUPLING_RCOND_MIN) */
    double width_level; /* for suggested bin widths (default CLEF_COUPLING_WIDTH_LEVEL) */
} clef_coupling_opts;

void clef_coupling_opts_default(clef_coupling_opts *o);

/* Compute M for 0 <= l, l' <= lmax from wl[0..wl_lmax] (W_l is taken as 0
 * above wl_lmax: pass wl_lmax >= 2 lmax for the exact matrix).  The W_l
 * array is copied.  Cost ~ (lmax+1)^3/6 kernel terms.  Errors: CLEF_EINVAL
 * (lmax < 0, wl_lmax < 0, negative or non-finite W_l, naming l),
 * CLEF_ENOMEM. */
int clef_coupling_create(clef_coupling **out, int lmax, const double *wl, int wl_lmax);
void clef_coupling_destroy(clef_coupling *c); /* NULL is a no-op */

/* M in parts, for processes that share its computation (clef sims under
 * MPI: rank 0 would otherwise build it alone while the others wait).  Rows
 * are independent, so rows made apart and put together are the same bits
 * as clef_coupling_create's:
 *   clef_coupling_row_split(lmax, n, first)   first[0..n]: part k is rows
 *                                             first[k] <= l < first[k+1],
 *                                             about equal in work;
 *   clef_coupling_create_rows(...)            those rows of the upper
 *                                             triangle (l' >= l), 0 elsewhere;
 *   clef_coupling_rows_data(c)                the (lmax + 1)^2 row-major
 *                                             matrix, to copy rows into;
 *   clef_coupling_fill_lower(c)               the lower triangle from the
 *                                             upper one, once all rows are in.
 * Errors: those of clef_coupling_create, CLEF_EINVAL for rows outside
 * 0..lmax. */
void clef_coupling_row_split(int lmax, int nparts, int *first);
int clef_coupling_create_rows(clef_coupling **out, int lmax, const double *wl, int wl_lmax,
                              int l_first, int l_end);
double *clef_coupling_rows_data(clef_coupling *c);
void clef_coupling_fill_lower(clef_coupling *c);
/* A maker of M in place of clef_coupling_create (clef_spectrum_opts
 * coupling_create): same contract and same bits. */
typedef int clef_coupling_create_fn(void *arg, clef_coupling **out, int lmax, const double *wl,
                                    int wl_lmax);

int clef_coupling_lmax(const clef_coupling *c);
/* M, row-major, (lmax+1) x (lmax+1); valid until destroy. */
const double *clef_coupling_matrix(const clef_coupling *c);
/* out[l] = sum_l' M_ll' cl[l'], l = 0..lmax. */
void clef_coupling_apply(const clef_coupling *c, const double *cl, double *out);

/* Add scale * d to the top-left n x n block of M (d row-major n x n,
 * n <= lmax + 1): a correction of the coupling, e.g. for the bias of
 * removing templates from the map (Elsner, Leistedt & Peiris 2017).
 * Errors: CLEF_EINVAL (n out of range, non-finite d). */
int clef_coupling_add_block(clef_coupling *c, int n, const double *d, double scale);

/* Set the columns l' <= lcut of M to zero: multipoles the map was cleaned
 * of exactly (the monopole and dipole fitted and removed on the observed
 * sky) no longer couple into any l.  Errors: CLEF_EINVAL (lcut out of
 * range). */
int clef_coupling_zero_columns(clef_coupling *c, int lcut);

/* Coupling width of a mask spectrum: the highest l <= wl_lmax with
 * W_l >= level W_0, plus one (0 if W_0 <= 0).  A bin should be at least
 * this wide for K to be well conditioned. */
int clef_coupling_width(const double *wl, int wl_lmax, double level);

/* Build K = P M T Q for the bins (all bins must end at or below lmax of M),
 * T = transfer[0..lmax] (NULL: T_l = 1), factor it by LU (LAPACK dgetrf),
 * estimate its reciprocal condition number (dgecon) and form K^-1 P
 * (dgetrs).  opts may be NULL (defaults).
 * Errors: CLEF_EINVAL (bins beyond lmax, negative/non-finite transfer),
 * CLEF_ENUMERIC when a bin row or column of K is zero (empty mask, tiny sky
 * fraction, transfer zero over a bin) or rcond < opts->rcond_min; the
 * message names the cause, the rcond and a suggested bin width. */
int clef_coupling_binned_create(clef_coupling_binned **out, const clef_coupling *m,
                                const clef_bins *bins, const double *transfer,
                                const clef_coupling_opts *opts);
void clef_coupling_binned_destroy(clef_coupling_binned *k); /* NULL is a no-op */

int clef_coupling_binned_nbins(const clef_coupling_binned *k);
int clef_coupling_binned_lmax(const clef_coupling_binned *k);
/* Reciprocal condition number of K in the 1-norm (LAPACK dgecon). */
double clef_coupling_binned_rcond(const clef_coupling_binned *k);
/* K, row-major nbins x nbins. */
const double *clef_coupling_binned_matrix(const clef_coupling_binned *k);
/* K^-1 P, row-major nbins x (lmax+1), for covariance propagation:
 * Cov(band) = (K^-1 P) Cov(C~) (K^-1 P)^T. */
const double *clef_coupling_binned_kinv_p(const clef_coupling_binned *k);
/* Decoupled band powers band[b] = sum_l (K^-1 P)_bl pcl[l], pcl[0..lmax]
 * (noise bias already subtracted by the caller).  D_b for CLEF_BINS_DL
 * bins, C_b for CLEF_BINS_FLAT. */
void clef_coupling_binned_decouple(const clef_coupling_binned *k, const double *pcl,
                                   double *band);

/* Band-power window functions of the decoupled band powers, acting on C_l:
 * out[b (lmax+1) + l] = sum_l'' (K^-1 P)_bl'' M_l''l T_l for l = 0..lmax,
 * so that a sky of spectrum C_l (no power above lmax) gives
 * <band_b> = sum_l out[b (lmax+1) + l] C_l.  m and transfer must be the
 * matrix and the T_l (NULL: 1) k was built from; bins are its bins.  With
 * K = P M T Q and P Q = I, the window of bin b summed with the weights
 * Q_lb' over the multipoles of bin b' is exactly delta_bb'.  Computed as
 * K^-1 (P M) (LAPACK dgetrs on the LU factors of K), cost ~ nbins (lmax+1)
 * (bin width + nbins).  out holds nbins x (lmax+1) doubles.  Errors:
 * CLEF_EINVAL (mismatched lmax or bins), CLEF_ENOMEM, CLEF_ENUMERIC. */
int clef_coupling_binned_windows(const clef_coupling_binned *k, const clef_coupling *m,
                                 const clef_bins *bins, const double *transfer, double *out);

/* ---- polarization (src/coupling_pol.c; docs/coupling.md) ----
 * Coupling matrices of spin 0 x 2 and 2 x 2 fields (Kogut et al. 2003;
 * Brown, Castro & Taylor 2005), J = l1 + l2 + l3:
 *   M^TE_ll' = (2l'+1)/(4 pi) sum (2l''+1) W^TP_l'' (l l' l''; 0 0 0)(l l' l''; 2 -2 0),
 *   M^+-_ll' = (2l'+1)/(8 pi) sum (2l''+1) W^PP_l'' (l l' l''; 2 -2 0)^2 (1 +- (-1)^J),
 * <C~^TE> = M^TE C^TE (TB likewise), <C~^EE> = M+ C^EE + M- C^BB,
 * <C~^BB> = M- C^EE + M+ C^BB, <C~^EB> = M+ C^EB - M- C^BE (BE likewise).
 * W^TP is the cross spectrum of the T and P masks (may be negative; NULL:
 * no TE matrix), W^PP the P mask's spectrum, both to wl_lmax (>= 2 lmax
 * for the exact matrices).  Each matrix is a clef_coupling (so the
 * spin-0 binning, windows and decoupling apply to M^TE); clef_coupling_pol
 * owns them.  Cost ~ lmax^3 3j terms (Schulten-Gordon rows). */
typedef struct clef_coupling_pol {
    clef_coupling *te;  /* M^TE (NULL if w_tp was NULL) */
    clef_coupling *pp;  /* M^+ */
    clef_coupling *mm;  /* M^- */
} clef_coupling_pol;
int clef_coupling_pol_create(clef_coupling_pol *out, int lmax, const double *w_tp,
                             const double *w_pp, int wl_lmax);
void clef_coupling_pol_free(clef_coupling_pol *p); /* destroys the matrices */
/* The same through the cache folder (clef_coupling_cache_dir; one entry of
 * kind "coupling-pol" keyed by lmax, both mask spectra and the clef
 * version); *hit (may be NULL) is 1 on a hit.  Cache problems are warnings. */
int clef_coupling_pol_create_cached(clef_coupling_pol *out, int lmax, const double *w_tp,
                                    const double *w_pp, int wl_lmax, const char *cache_dir,
                                    int *hit);

/* The 2 x 2 block binned and inverted jointly: K = [[K+, s K-], [s K-, K+]]
 * with K+- = P M+- T Q, s = +1 for (EE, BB) and -1 for (EB, BE); LU by
 * LAPACK dgetrf, rcond by dgecon (CLEF_ENUMERIC below opts->rcond_min). */
typedef struct clef_coupling_pol_binned clef_coupling_pol_binned;
int clef_coupling_pol_binned_create(clef_coupling_pol_binned **out, const clef_coupling *mplus,
                                    const clef_coupling *mminus, const clef_bins *bins,
                                    const double *transfer, int sign,
                                    const clef_coupling_opts *opts);
/* The same for two spectra with blocks of their own, <C~^a> = M_aa C^a +
 * M_ab C^b, <C~^b> = M_ba C^a + M_bb C^b (NULL m_ab or m_ba: zero), e.g.
 * the standard EE with the pure-B BB (m_ba NULL, m_bb the matrix of
 * clef_coupling_pure_create).  The matrices are borrowed: keep them alive
 * while the operator's windows are computed. */
int clef_coupling_pol_binned_create_rows(clef_coupling_pol_binned **out,
                                         const clef_coupling *m_aa, const clef_coupling *m_ab,
                                         const clef_coupling *m_ba, const clef_coupling *m_bb,
                                         const clef_bins *bins, const double *transfer,
                                         const clef_coupling_opts *opts);
void clef_coupling_pol_binned_destroy(clef_coupling_pol_binned *k);
int clef_coupling_pol_binned_nbins(const clef_coupling_pol_binned *k);
double clef_coupling_pol_binned_rcond(const clef_coupling_pol_binned *k);
/* K^-1 blockdiag(P, P): 2 nbins rows x 2 (lmax+1) columns (a then b). */
const double *clef_coupling_pol_binned_kinv_p(const clef_coupling_pol_binned *k);
/* (pcl_a, pcl_b)[0..lmax] (EE, BB or EB, BE pseudo-spectra, noise removed)
 * -> band_a, band_b [nbins]. */
void clef_coupling_pol_binned_decouple(const clef_coupling_pol_binned *k, const double *pcl_a,
                                       const double *pcl_b, double *band_a, double *band_b);
/* Band-power windows incl. the leakage ones: out[(h nbins + b) 2 (lmax+1) +
 * h' (lmax+1) + l] is the response of band b of spectrum h (0 = a, 1 = b)
 * to C_l of spectrum h' (e.g. EE -> BB leakage at h = 1, h' = 0). */
int clef_coupling_pol_binned_windows(const clef_coupling_pol_binned *k,
                                     const clef_coupling *mplus, const clef_coupling *mminus,
                                     const clef_bins *bins, const double *transfer, double *out);
/* The same from the blocks the operator was made of (either constructor). */
int clef_coupling_pol_binned_windows_rows(const clef_coupling_pol_binned *k,
                                          const clef_bins *bins, const double *transfer,
                                          double *out);

/* ---- pure-B coupling (src/coupling_pure.c; docs/coupling.md) ----
 * <C~^BB_pure> = M C^BB for the pure-B multipoles of purify.h (Smith 2006;
 * Grain, Tristram & Stompor 2009):
 *   M_ll' = (2l'+1)/(8 pi) sum_L (2L+1) W_L G_ll'L^2 (1 + (-1)^(l+l'+L)),
 *   G_ll'L = (l l' L; 2 -2 0) + 2 sqrt(L(L+1)/((l-1)(l+2))) (l l' L; 1 -2 1)
 *          + sqrt((L+2)!(l-2)!/((L-2)!(l+2)!)) (l l' L; 0 -2 2),
 * W_L the P mask's spectrum (W^{P1P2} for two fields) to wl_lmax.  The E ->
 * B block is identically zero (G vanishes for odd l+l'+L).  Rows and
 * columns l < 2 are zero.  Cost ~ 3 lmax^3 3j terms (not symmetric). */
int clef_coupling_pure_create(clef_coupling **out, int lmax, const double *w_pp, int wl_lmax);

/* ---- cache (src/coupling_cache.c) ---- */

/* The cache folder: cache_dir if non-NULL and non-empty, else
 * $CLEF_CACHE_DIR, else $XDG_CACHE_HOME/clef, else $HOME/.cache/clef.
 * Errors: CLEF_EINVAL when none is set or the name does not fit in n. */
int clef_coupling_cache_dir(const char *cache_dir, char *buf, size_t n);

/* Cache size limit (docs/coupling.md, "size limit").  After each store,
 * entries of the folder ("<kind>-<key>.bin" files) beyond the limit are
 * removed, least recently used first (a hit refreshes an entry's time); an
 * entry larger than the limit is not stored.  The limit is, in order:
 * clef_cache_set_limit(bytes) (process-wide; call before threads run, like
 * clef_set_log; a negative value unsets it), $CLEF_CACHE_LIMIT, or 4 GiB.
 * 0 means no limit.  clef_cache_parse_size reads "500M", "4G", "1.5T",
 * "123456" (bytes; K/M/G/T are powers of 1024; "MiB", "GB" accepted):
 * CLEF_EINVAL otherwise.  clef_cache_prune applies a limit to a folder now,
 * never removing `keep` (may be NULL), and returns the number removed. */
void clef_cache_set_limit(long long bytes);
long long clef_cache_limit(void);
int clef_cache_parse_size(const char *s, long long *bytes);
int clef_cache_prune(const char *dir, long long limit, const char *keep);

/* Like clef_coupling_create, but first look for M in the cache folder
 * (key: SHA-256 of lmax, wl_lmax, the W_l bytes and the clef version); on a
 * miss compute it and store it.  *hit (may be NULL) is 1 on a hit.  Cache
 * problems (unreadable, corrupt or mismatched file, unwritable folder) are
 * logged as warnings and never fail the call: M is then recomputed. */
int clef_coupling_create_cached(clef_coupling **out, int lmax, const double *wl, int wl_lmax,
                                const char *cache_dir, int *hit);
/* The same, making M on a miss with make(arg, ...) (NULL: clef_coupling_create). */
int clef_coupling_create_cached_with(clef_coupling **out, int lmax, const double *wl,
                                     int wl_lmax, const char *cache_dir, int *hit,
                                     clef_coupling_create_fn *make, void *arg);

/* Like clef_coupling_binned_create from W_l, with K cached under a key
 * that adds the bins (edges and weighting) and the transfer array; a hit
 * skips M entirely (only the small LU is redone).  A miss gets M through
 * clef_coupling_create_cached.  Errors as clef_coupling_binned_create. */
int clef_coupling_binned_create_cached(clef_coupling_binned **out, int lmax, const double *wl,
                                       int wl_lmax, const clef_bins *bins,
                                       const double *transfer, const clef_coupling_opts *opts,
                                       const char *cache_dir, int *hit);

#ifdef __cplusplus
}
#endif
#endif
