/* Private parts of the coupling module shared by src/coupling.c and
 * src/coupling_cache.c.  Not installed. */
#ifndef CLEF_COUPLING_IMPL_H
#define CLEF_COUPLING_IMPL_H

#include <lapacke.h>

#include "clef/coupling.h"

struct clef_coupling {
    int lmax;
    int wl_lmax;
    double *wl; /* copy of W_l, wl_lmax + 1 entries */
    double *m;  /* (lmax+1)^2, row-major */
};

struct clef_coupling_binned {
    int nbins;
    int lmax;
    double rcond;
    double *k;      /* nbins^2, row-major */
    double *lu;     /* LU factors of k (LAPACK dgetrf, row-major) */
    lapack_int *ipiv;
    double *kinv_p; /* nbins x (lmax+1), row-major */
};

/* Row kernels of M (src/coupling_row_body.h), one per vector width; NULL
 * where the width was not built.  Tables and the row scratch are padded by
 * CLEF_COUPLING_PAD doubles, the widest kernel's block. */
#define CLEF_COUPLING_PAD 32
typedef void clef_coupling_row_fn(int l1, int lmax, int wl_lmax, const double *restrict a,
                                  const double *restrict b, const double *restrict wt,
                                  size_t ntab, double *restrict t, double *restrict s);
extern clef_coupling_row_fn *const clef_coupling_row_avx512, *const clef_coupling_row_avx2,
    *const clef_coupling_row_base;

/* lmax >= 0 and W_l[0..wl_lmax] present, finite and >= 0 (CLEF_EINVAL
 * naming the first bad l). */
int clef_coupling_check_wl(int lmax, const double *wl, int wl_lmax);

/* An M object with W_l copied and M allocated but not filled. */
int clef_coupling_alloc_empty(clef_coupling **out, int lmax, const double *wl, int wl_lmax);

/* Fill k (nbins^2) with K = P M T Q. */
int clef_coupling_build_k(const clef_coupling *m, const clef_bins *bins,
                          const double *transfer, double *k);

/* Factor a given K (copied), check it, form K^-1 P.  wl is used only for
 * the suggested bin width in error messages. */
int clef_coupling_binned_from_k(clef_coupling_binned **out, const double *k,
                                const clef_bins *bins, int lmax, const double *wl,
                                int wl_lmax, const clef_coupling_opts *opts);

/* K^-1 (nbins x nbins, row-major) from the LU factors of K (LAPACK dgetrs
 * on the identity): K^-1 P = K^-1 . P lets a product A G A^T with A = K^-1 P
 * be formed as K^-1 (P G P^T) K^-T, P G P^T being a binned sum of G
 * (src/spectrum_cov.c). */
int clef_coupling_binned_kinv(const clef_coupling_binned *k, double *kinv);

/* Validate the transfer array (NULL allowed) for 0..lmax. */
int clef_coupling_check_transfer(const double *transfer, int lmax);

#endif
