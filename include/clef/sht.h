/* Spherical harmonic transforms on HEALPix rings: analysis (map -> a_lm)
 * and synthesis (a_lm -> map), plus power spectra from a_lm.
 *
 * Conventions (Gorski et al. 2005): Y_lm are Edmonds' with the
 * Condon-Shortley phase, Y_lm = lambda_lm(cos theta) e^{i m phi}; maps are
 * real, so only m >= 0 is stored and a_{l,-m} = (-1)^m conj(a_lm).
 *
 * a_lm storage: m-major, complex double, index(l, m) = m (2 lmax + 1 - m)/2 + l
 * for 0 <= m <= mmax, m <= l <= lmax; clef_alm_size() entries.
 *
 * Plan then execute: clef_sht_create() is slow (ring geometry, FFTW plans,
 * quadrature weights, per-thread scratch) and must be called from one
 * thread; analysis and synthesis allocate nothing, take a const plan, and
 * may NOT be called concurrently on the same plan (they share its
 * scratch); use one plan per concurrent caller.  Work is parallelised
 * inside each call with OpenMP (threads as set by omp_set_num_threads);
 * results do not depend on the thread count.
 */
#ifndef CLEF_SHT_H
#define CLEF_SHT_H

#include <complex.h>
#include <stddef.h>
#include <stdint.h>

#include "clef/clef.h"
#include "clef/kernel.h"

#ifdef __cplusplus
extern "C" {
#endif

typedef struct clef_sht clef_sht;

typedef struct clef_sht_opts {
    int mmax;                /* 0 or negative: mmax = lmax */
    int nmaps;               /* maximum maps per call (scratch is sized for it); 0 = 1 */
    int no_ring_weights;     /* 1: plain pixel sums in analysis (weights all 1) */
    unsigned fftw_flags;     /* 0 = FFTW_ESTIMATE (reproducible, fast to plan) */
    const char *wisdom_file; /* optional FFTW wisdom file, read if present and updated */
    clef_kernel kernel;      /* Legendre kernel (clef/kernel.h); AUTO = CLEF_KERNEL or the CPU's best */
    /* Ring weights (the slow part of create at large nside) are kept in
     * memory for the process and, with use_cache = 1, in the cache folder
     * cache_dir (NULL: $CLEF_CACHE_DIR, $XDG_CACHE_HOME/clef, ~/.cache/clef),
     * in the coupling cache's file format (docs/coupling.md). */
    int use_cache;
    const char *cache_dir;
} clef_sht_opts;

/* Make a plan for maps of `nside` (power of two, <= CLEF_NSIDE_MAX) and
 * multipoles up to lmax (1 <= lmax; values above 3 nside - 1 are allowed
 * but the transform is then not invertible).  opts may be NULL. */
int clef_sht_create(clef_sht **out, int64_t nside, int lmax, const clef_sht_opts *opts);
void clef_sht_destroy(clef_sht *p); /* NULL is a no-op */

int64_t clef_sht_nside(const clef_sht *p);
int clef_sht_lmax(const clef_sht *p);
int clef_sht_mmax(const clef_sht *p);
int clef_sht_nrings(const clef_sht *p); /* 4 nside - 1 */
clef_kernel clef_sht_kernel_used(const clef_sht *p); /* never CLEF_KERNEL_AUTO */

/* Geometry and quadrature weight of ring `ring` (1 .. 4 nside - 1, north
 * to south, as numbered by the HEALPix RING scheme): z = cos theta of its
 * pixel centres, phi0 of its first pixel (radians), pixel count, RING
 * index of its first pixel, and the analysis weight w_r (1 when the plan
 * was made with no_ring_weights; docs/transforms.md gives the method).
 * Any output pointer may be NULL.  Returns CLEF_EINVAL for a bad ring. */
int clef_sht_ring_info(const clef_sht *p, int ring, double *z, double *phi0, int64_t *npix,
                       int64_t *first, double *weight);

/* Seconds spent in the FFT stage and in the Legendre stage by the last
 * analysis or synthesis call on this plan, as wall-clock time and as CPU
 * time of the working threads (summed over threads, waits excluded; not
 * inflated when other programs share the cores).  For benchmarks; any
 * pointer may be NULL. */
void clef_sht_timings(const clef_sht *p, double *fft_wall, double *legendre_wall,
                      double *fft_cpu, double *legendre_cpu);

static inline size_t clef_alm_size(int lmax, int mmax)
{
    return (size_t)(mmax + 1) * (size_t)(lmax + 1) - (size_t)mmax * (size_t)(mmax + 1) / 2;
}
static inline size_t clef_alm_index(int lmax, int l, int m)
{
    return (size_t)m * (size_t)(2 * lmax + 1 - m) / 2 + (size_t)l;
}

/* Synthesis: nmaps a_lm sets -> nmaps RING maps of npix doubles.  The
 * Legendre recurrence is shared between the maps. */
int clef_sht_synthesis(const clef_sht *p, int nmaps, const double complex *const *alm,
                       double *const *map);

/* Analysis: nmaps RING maps -> a_lm, with ring quadrature weights and
 * `iterations` Jacobi refinement steps (a <- a + A(m - S a)); 3 is the
 * usual compromise, 0 is a single pass.  Maps are read only; pixels to
 * exclude must already be zero (multiply by the mask first). */
int clef_sht_analysis(const clef_sht *p, int nmaps, const double *const *map,
                      double complex *const *alm, int iterations);

/* Spin-2 transforms of Stokes Q, U (docs/transforms.md): conventions of
 * Zaldarriaga & Seljak 1997 (PRD 55, 1830) as used by HEALPix,
 *   Q +- iU = sum_lm a_{+-2,lm} _{+-2}Y_lm,  a_{+-2,lm} = -(a_E,lm +- i a_B,lm),
 * _{+-2}Y_lm = sqrt((l-2)!/(l+2)!) eth^2 Y_lm (eth-bar^2 for -2), eth as
 * Newman & Penrose 1966 with eth f = -sin^s(d_theta + i/sin d_phi) sin^-s f.
 * Q, U in the COSMO convention (clef's internal one; map.h converts IAU).
 * a_E, a_B are stored like spin-0 a_lm (m >= 0, a_{l,-m} = (-1)^m conj(a_lm),
 * l = 0, 1 entries zero).  A plan wraps a spin-0 plan to lmax + 2 (same
 * FFTs, kernels, ring weights; results independent of the thread count);
 * opts->nmaps is the number of Q/U pairs per call.  Same rules as the
 * spin-0 plan: create serially, one call at a time per plan. */
typedef struct clef_sht_spin clef_sht_spin;
int clef_sht_spin_create(clef_sht_spin **out, int64_t nside, int lmax, const clef_sht_opts *opts);
void clef_sht_spin_destroy(clef_sht_spin *p); /* NULL is a no-op */
int clef_sht_spin_lmax(const clef_sht_spin *p);
int clef_sht_spin_mmax(const clef_sht_spin *p);
/* The same engine for spin 1 or 2 (clef_sht_spin_create is spin 2):
 * Q +- iU = sum a_{+-s,lm} _{+-s}Y_lm with a_s = -(a_E + i a_B),
 * a_{-s} = -(-1)^s (a_E - i a_B) (real Q, U for either parity of s),
 * _{+-1}Y_lm = (eth, -eth-bar) Y_lm / sqrt(l(l+1)).  Spin 1 serves the
 * eth derivatives of a weight map in B-mode purification (src/purify.c);
 * l < s entries are zero. */
int clef_sht_spin_create_s(clef_sht_spin **out, int64_t nside, int lmax, int spin,
                           const clef_sht_opts *opts);
/* The inner spin-0 plan (ring info, clef_sht_timings of the last call). */
const clef_sht *clef_sht_spin_plan(const clef_sht_spin *p);
/* npairs (a_E, a_B) sets -> npairs (Q, U) RING maps. */
int clef_sht_spin_synthesis(const clef_sht_spin *p, int npairs, const double complex *const *alm_e,
                            const double complex *const *alm_b, double *const *q,
                            double *const *u);
/* npairs (Q, U) RING maps -> (a_E, a_B), with ring weights and
 * `iterations` Jacobi steps as clef_sht_analysis.  Masked pixels must be
 * zero in both Q and U. */
int clef_sht_spin_analysis(const clef_sht_spin *p, int npairs, const double *const *q,
                           const double *const *u, double complex *const *alm_e,
                           double complex *const *alm_b, int iterations);

/* Normalised associated Legendre functions lambda_lm(z) = Y_lm(theta, 0),
 * z = cos theta, for fixed m and l = m..lmax into out[l - m] (lmax - m + 1
 * doubles), using the same scaled recurrence as the transform (no
 * underflow for lmax up to 3 * 8192 and beyond).  Values below the double
 * range (~1e-308) come out as 0 or subnormal.  (The transform itself drops
 * terms with |lambda_lm| < 2^-128, see docs/transforms.md.)  Allocates a
 * small table; thread-safe.  CLEF_EINVAL for m < 0, lmax < m, |z| > 1. */
int clef_legendre_lambda(int lmax, int m, double z, double *out);

/* Angular power spectrum from a_lm: cl[l] = (Re(a_l0 b_l0*) + 2 sum_{m>0}
 * Re(a_lm b_lm*)) / (2l+1), l = 0..lmax; b = a (or NULL) gives the auto
 * spectrum.  With mmax < lmax the sum stops at m = min(l, mmax) (the
 * spectrum is then that of the truncated a_lm). */
int clef_alm_cl(int lmax, int mmax, const double complex *a, const double complex *b,
                double *cl);

/* a_lm in a FITS binary table of clef's own design (docs/formats-alm.md):
 * columns L (int32), M (int32), RE, IM (float64), one row per stored (l,m),
 * m-major; header LMAX, MMAX, CLEFVERS.  Written atomically. */
int clef_alm_write(const char *path, int lmax, int mmax, const double complex *alm);
/* Reads into a newly malloc'ed array (caller frees). */
int clef_alm_read(const char *path, int *lmax, int *mmax, double complex **alm);

#ifdef __cplusplus
}
#endif
#endif
