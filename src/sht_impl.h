/* Private parts of the spherical harmonic transform (include/clef/sht.h):
 * the plan structure, per-thread scratch, and the functions the stages of
 * the transform share.  Not installed.
 *
 * Layout of the work (Gorski et al. 2005; Reinecke 2011):
 *  - rings come in north/south pairs p = 0 .. 2 nside - 1 (north ring
 *    p + 1, south ring 4 nside - 1 - p; the equator pairs with itself);
 *  - pairs are grouped in blocks of CLEF_SHT_BLOCK, processed by the
 *    Legendre kernel chosen for the plan (one per vector width,
 *    sht_kernel_body.h) as sub-blocks of its own vector count and width;
 *  - blocks are grouped in chunks, so the Fourier-coefficient array
 *    ("phase" array, [m][block][parity][re/im][lane]) stays bounded;
 *  - a transform runs chunk by chunk: FFT stage (parallel over pairs) and
 *    Legendre stage (parallel over m).
 */
#ifndef CLEF_SHT_IMPL_H
#define CLEF_SHT_IMPL_H

#include <complex.h>
#include <stddef.h>
#include <stdint.h>

#include <fftw3.h>

#include "clef/sht.h"

#define CLEF_PI 3.14159265358979323846

/* Widest kernel vector in doubles (AVX-512); sizes the analysis lane sums. */
#define CLEF_SHT_VLMAX 8
/* Ring pairs per block of the phase array: a multiple of every kernel's
 * sub-block (vectors x lanes), independent of the kernel so that the FFT
 * stage and the data layout are the same for all of them. */
#define CLEF_SHT_BLOCK 32
/* Doubles per (m, block, map) in the phase array: 2 parities x re/im x lanes. */
#define CLEF_SHT_BLOCKDBL (4 * CLEF_SHT_BLOCK)

/* Extended-exponent radix for the start of the recurrence: a lane whose
 * value is mant * 2^(-CLEF_SHT_RADIX * k) with k >= 1 is below 2^-200 in
 * scaled units and contributes nothing (see sht_legendre.c). */
#define CLEF_SHT_RADIX 200
/* The per-m scale factor sigma_l is renormalised by 2^-CLEF_SHT_SIGSTEP
 * whenever it exceeds 2^CLEF_SHT_SIGSTEP. */
#define CLEF_SHT_SIGSTEP 64

/* Per-m recurrence tables (sht_legendre.c), filled in thread scratch. */
typedef struct clef_sht_mtab {
    int m, lmax;
    double *c;      /* c[l], l = m+2..lmax: ((l-1)^2 - m^2) / (4 (l-1)^2 - 1) */
    double *sigma;  /* sigma[l], l = m..lmax: lambda_l = sigma_l mu_l */
    int *rescale;   /* increasing l at which mu_{l-1}, mu_{l-2} are scaled by 2^SIGSTEP */
    int nrescale;
    double pref;    /* |lambda_mm| / sin^m theta = sqrt((2m+1)/(4 pi) prod (2k-1)/(2k)) */
} clef_sht_mtab;

typedef struct clef_sht_thread {
    double *ring;           /* fftw_malloc: 4 nside doubles (FFT input/output) */
    fftw_complex *four;     /* fftw_malloc: 2 nside + 1 */
    double complex *ph1, *ph2; /* phase factors e^{-i m phi0}: m mod 64, 64 (m / 64) */
    /* Bluestein ring DFT (sht_fft.c): chirp and filter spectrum for ring
     * length blu_n (cached: north and south rings share it), work arrays. */
    int blu_n;
    double complex *chirp;  /* fftw_malloc, 4 nside */
    fftw_complex *bspec, *bw1, *bw2; /* fftw_malloc, blu_nmax each */
    fftw_complex *four2;    /* fftw_malloc, 4 nside: full-length ring spectrum */
    double complex *fn;     /* (mmax+1) x nmaps: north-ring coefficients */
    double complex *fs;     /* (mmax+1) x nmaps: south-ring coefficients */
    clef_sht_mtab tab;
    double *abuf;           /* analysis partial sums [l][map][re/im][kernel lanes] */
    double complex *bl;     /* synthesis sigma_l a_lm, [l][map] */
} clef_sht_thread;

/* The sigma_l and rescale points of every m (clef_sht_mtab_fill), kept
 * by a plan whose transforms run in more than one chunk: the long-double
 * recurrence is then computed once per m instead of once per m and chunk
 * and pass (12-16% of the transform CPU time at nside 2048, lmax 6143,
 * with 9 to 19 chunks).  sigma at clef_alm_index(lmax, l, m); filled[m]
 * is set by the thread that filled m, read by all after the parallel
 * region of that chunk ends. */
typedef struct clef_sht_mcache {
    double *sigma;
    int **rescale;
    int *nrescale;
    double *pref;
    unsigned char *filled;
} clef_sht_mcache;

/* Mutable state reached through the const plan: timings of the last call,
 * the recurrence tables. */
typedef struct clef_sht_state {
    double t_fft, t_leg; /* wall seconds */
    double c_fft, c_leg; /* process CPU seconds (all threads) */
    clef_sht_mcache *mc; /* NULL until the first multi-chunk pass */
    int mc_failed;       /* out of memory once: run without it */
} clef_sht_state;

void clef_sht_mcache_free(clef_sht_mcache *mc, int mmax);

struct clef_sht {
    int64_t nside, npix;
    int lmax, mmax, nmaps;
    int nrings, npairs;       /* 4 nside - 1 rings, 2 nside pairs */
    int nblocks;              /* ceil(npairs / BLOCK) */
    int chunk_blocks;         /* blocks per chunk */
    /* Per ring r = 0 .. nrings-1 (ring index i = r + 1). */
    double *ring_z, *ring_sth, *ring_phi0, *ring_w;
    /* NULL, or a factor per ring applied to every synthesised ring value
     * (the inner plan of a spin-2 transform: 1 / sin^2 theta, sht_spin.c). */
    double *ring_syn_scale;
    int64_t *ring_first;
    int *ring_npix;
    int *ring_shift;          /* phi0 = ring_shift * pi / npix_r (0 or 1) */
    /* Per pair, padded to nblocks * BLOCK (pads: x = 0, sin theta = 1). */
    double *pair_x, *pair_sth;
    /* FFTW plans per ring length n = 4 i, i = 1..nside (index i - 1), for
     * the belt length and short cap rings; NULL where the ring DFT goes
     * through Bluestein's algorithm on power-of-two plans (sht_fft.c). */
    fftw_plan *plan_r2c, *plan_c2r;
    fftw_plan *pow2_fwd, *pow2_bwd; /* complex FFTs of length 2^k, k = 0..blu_log2 */
    int blu_log2;
    size_t blu_nmax;
    double domega;            /* pixel solid angle 4 pi / npix */
    double *phase;            /* nmaps x (mmax+1) x chunk_blocks x BLOCKDBL */
    size_t phase_stride;      /* doubles per map in phase */
    double complex *delta;    /* nmaps x alm: Jacobi increments */
    const struct clef_sht_kernel *kern; /* Legendre kernel chosen at plan creation */
    int nthreads;
    clef_sht_thread *thr;
    clef_sht_state *state;
};

/* sht_fft.c: ring DFTs.  r2c: n real values -> n/2 + 1 coefficients
 * (FFTW convention e^{-2 pi i j k / n}, unnormalised); c2r: the inverse
 * direction (e^{+2 pi i j k / n}), imaginary parts of k = 0 and n/2 ignored. */
int clef_sht_fft_plan(clef_sht *p, unsigned flags);
void clef_sht_fft_destroy(clef_sht *p);
int clef_sht_fft_thread_alloc(const clef_sht *p, clef_sht_thread *th);
void clef_sht_fft_thread_free(clef_sht_thread *th);
void clef_sht_ring_r2c(const clef_sht *p, clef_sht_thread *th, int n, const double *in,
                       double complex *out);
/* Result in th->ring; `in` (n/2 + 1 values) is overwritten. */
void clef_sht_ring_c2r(const clef_sht *p, clef_sht_thread *th, int n, double complex *in);

/* sht_plan.c: clef_sht_create with the lmax > 3 nside - 1 warning
 * optional (inner plans that run past the band limit on purpose). */
int clef_sht_create_impl(clef_sht **out, int64_t nside, int lmax, const clef_sht_opts *opts,
                         int warn_lmax);

/* sht_exec.c: one analysis pass into acc (zeroed first); with non-NULL
 * prev, of the residual map - S prev (S including ring_syn_scale). */
void clef_sht_analysis_pass(const clef_sht *p, int nmaps, const double *const *map,
                            const double complex *const *prev, double complex *const *acc);

/* sht_weights.c: quadrature weights per ring (nrings values), from the
 * process's memory cache, else the cache folder (use_cache), else solved
 * and stored in both. */
int clef_sht_ring_weights(const clef_sht *p, int use_cache, const char *cache_dir, double *w);

/* sht_legendre.c */
int clef_sht_mtab_alloc(clef_sht_mtab *t, int lmax);
void clef_sht_mtab_free(clef_sht_mtab *t);
void clef_sht_mtab_fill(clef_sht_mtab *t, int m, int lmax);
void clef_sht_mtab_fill_c(clef_sht_mtab *t, int m, int lmax);
/* lambda_mm(theta) = mant * 2^exp2 with |mant| in [0.5, 1) (exact exponent). */
void clef_sht_lambda_mm(const clef_sht_mtab *t, double sth, double *mant, int *exp2);

/* Legendre kernels (sht_kernel_body.h), one per vector width: the stage
 * over one chunk for one m.  `ph` points at the chunk's phase data for m
 * (map j at ph + j * map_stride), block b at b * BLOCKDBL; x, sth are the
 * chunk's pair tables; analysis adds lane partial sums into
 * abuf[l][map][re/im][vl]. */
typedef struct clef_sht_kernel {
    const char *name;
    int vl; /* lanes of the analysis partial sums */
    void (*analysis)(const clef_sht_mtab *t, int nblocks, const double *x, const double *sth,
                     const double *ph, size_t map_stride, int nmaps, double *abuf);
    void (*synthesis)(const clef_sht_mtab *t, int nblocks, const double *x, const double *sth,
                      double *ph, size_t map_stride, int nmaps, const double complex *bl);
} clef_sht_kernel;

/* Present only where the compiler targets the width (Makefile KFLAGS). */
extern const clef_sht_kernel clef_sht_avx512_kernel, clef_sht_avx2_kernel, clef_sht_base_kernel;

#endif
