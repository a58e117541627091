/* Simulated skies: Gaussian a_lm drawn from a power spectrum, smoothed by
 * a beam and the pixel window, synthesised to a map, plus pixel noise
 * (white or from a hit-count map) in one or two independent splits.
 *
 * Random numbers (docs/simulation.md): GSL's gsl_rng_mt19937 generator and
 * gsl_ran_gaussian_ziggurat deviates.  Every stream has its own 32-bit
 * GSL seed derived from the user's 64-bit seed, a stream family (sky,
 * noise of split 1, noise of split 2) and a stream number:
 *   base   = splitmix64(seed XOR family constant), low 32 bits
 *   stream = fmix32(base + number)   (mod 2^32)
 * fmix32 (the MurmurHash3 finaliser) is a bijection, so the streams of one
 * family never share a seed.  The sky uses one stream per m; the noise one
 * stream per chunk of CLEF_SIM_NOISE_CHUNK RING pixels.  Results therefore
 * do not depend on the number of threads.
 *
 * Units: C_l in uK^2, maps in uK, noise depth in uK-arcmin.
 *
 * Thread safety: functions may run concurrently on distinct outputs; the
 * functions that take a clef_sht plan must not share one plan with another
 * concurrent transform (see sht.h).
 */
#ifndef CLEF_SIM_H
#define CLEF_SIM_H

#include <complex.h>
#include <stdint.h>

#include "clef/clef.h"
#include "clef/sht.h"

#ifdef __cplusplus
extern "C" {
#endif

/* Pixels per noise stream. */
#define CLEF_SIM_NOISE_CHUNK 65536

/* Stream families (the `family` of the seed derivation above). */
enum clef_sim_stream {
    CLEF_SIM_STREAM_SKY = 0,
    CLEF_SIM_STREAM_NOISE1 = 1, /* noise of split 1 (or of the only map) */
    CLEF_SIM_STREAM_NOISE2 = 2, /* noise of split 2 */
    CLEF_SIM_STREAM_SKY_E = 3,  /* polarization: the part of E independent of T */
    CLEF_SIM_STREAM_SKY_B = 4,  /* polarization: B */
    CLEF_SIM_STREAM_NOISE_Q = 5, /* noise of Q */
    CLEF_SIM_STREAM_NOISE_U = 6, /* noise of U */
    CLEF_SIM_STREAM_NFAMILIES = 7
};

/* The 32-bit GSL seed of stream `number` of `family` for the user's seed
 * (exposed so the derivation can be checked and reproduced). */
unsigned long clef_sim_stream_seed(uint64_t seed, int family, uint64_t number);

/* Draw Gaussian a_lm with <|a_lm|^2> = C_l, m-major (sht.h), mmax = lmax:
 * a_l0 real with variance C_l; for m > 0 real and imaginary parts each
 * with variance C_l / 2.  cl[0..lmax] in uK^2, >= 0 and finite.  The m row
 * comes from stream m and its deviates are drawn in order of increasing l
 * (real part, then imaginary part for m > 0), so a larger lmax leaves the
 * lower multipoles unchanged.  CLEF_EINVAL (lmax < 0, bad C_l). */
int clef_sim_alm(int lmax, const double *cl, uint64_t seed, double complex *alm);

/* Polarized a_lm (src/sim.c): T and E correlated through TE, B
 * independent (tt, ee, bb, te [0..lmax], uK^2): a_T = sqrt(TT) g1,
 * a_E = TE/sqrt(TT) g1 + sqrt(EE - TE^2/TT) g2, a_B = sqrt(BB) g3, the unit
 * deviates g1, g2, g3 from the stream families SKY, SKY_E, SKY_B; E and B
 * are zero for l < 2.  CLEF_EINVAL (lmax < 2, negative or non-finite
 * spectra, TE^2 > TT EE naming l). */
int clef_sim_alm_pol(int lmax, const double *tt, const double *ee, const double *bb,
                     const double *te, uint64_t seed, double complex *at, double complex *ae,
                     double complex *ab);

/* Multiply a_lm (mmax = lmax) by f_l = bl[l] * pl[l]; either may be NULL
 * (factor 1). */
void clef_sim_alm_scale(int lmax, const double *bl, const double *pl, double complex *alm);

/* Noise standard deviation per pixel for a depth in uK-arcmin:
 * sigma_pix = depth / sqrt(Omega_pix in arcmin^2), Omega_pix = 4 pi / npix. */
double clef_sim_sigma_pix(int64_t nside, double depth_uk_arcmin);

/* Add pixel noise to a RING map of 12 nside^2 pixels, stream family
 * CLEF_SIM_STREAM_NOISE1, NOISE2 (splits), NOISE_Q or NOISE_U.  White noise: sigma_pix of the depth in
 * every pixel.  With hits (npix values, NULL for white noise):
 * sigma_p = sigma_pix / sqrt(hits_p / mean hits), the mean taken over the
 * pixels with hits > 0, so the depth is that of a pixel with the mean hit
 * count; pixels with no hits get no noise and valid[p] = 0 (valid may be
 * NULL when hits is NULL; otherwise it is written for every pixel).
 * CLEF_EINVAL (negative or non-finite depth or hits, no observed pixel). */
int clef_sim_noise(int64_t nside, double depth_uk_arcmin, const double *hits, uint64_t seed,
                   int family, double *map, unsigned char *valid);

/* Everything of a simulated observation.  Zero fields are the defaults. */
typedef struct clef_sim_opts {
    uint64_t seed;
    double beam_fwhm;      /* Gaussian beam FWHM in arcmin; 0 = none */
    const double *beam;    /* B_l, l = 0..lmax, instead of beam_fwhm; NULL = none */
    int pixel_window;      /* 1: multiply by the pixel window p_l (clef_beam_pixel_window) */
    double noise_depth;    /* uK-arcmin per split; 0 = no noise */
    const double *hits;    /* hit counts per RING pixel for inhomogeneous noise, or NULL */
    int nsplits;           /* 1 or 2 maps with the same sky and independent noise; 0 = 1 */
} clef_sim_opts;

/* Simulate: a_lm from C_l (clef_sim_alm with opts->seed), optionally
 * copied to alm_out (the unsmoothed "true" a_lm, clef_alm_size(lmax,
 * lmax) entries), scaled by B_l p_l, synthesised with the plan (which must
 * have mmax = lmax), and noise added to each split (split s uses family
 * CLEF_SIM_STREAM_NOISE1 + s).  maps[s] are npix RING arrays; valid (npix,
 * may be NULL without hits) marks pixels without hits as 0.  Allocates a
 * working a_lm copy.  Errors of the parts, CLEF_EINVAL for bad options. */
int clef_sim_map(const clef_sht *sht, const double *cl, const clef_sim_opts *opts,
                 double complex *alm_out, double *const *maps, unsigned char *valid);

#ifdef __cplusplus
}
#endif
#endif
