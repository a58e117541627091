/* Beam and pixel window transfer functions: B_l of a Gaussian beam or of a
 * tabulated beam file, and the HEALPix pixel window p_l computed by clef.
 *
 * The data model (Hivon et al. 2002, ApJ 567, 2): a map holds the sky
 * smoothed by the beam and averaged over each pixel, so its spectrum is
 * B_l^2 p_l^2 C_l (plus noise, which neither factor touches).
 *
 * Thread safety: every function may be called from several threads; the
 * pixel-window cache is protected by a lock.
 */
#ifndef CLEF_BEAM_H
#define CLEF_BEAM_H

#include <stdint.h>

#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

/* Gaussian width sigma in radians of a beam of full width at half maximum
 * `fwhm_arcmin` (arcminutes): sigma = FWHM / sqrt(8 ln 2). */
double clef_beam_sigma(double fwhm_arcmin);

/* Gaussian beam B_l = exp(-l(l+1) sigma^2 / 2) for l = 0..lmax into
 * bl[lmax + 1].  fwhm_arcmin >= 0 (0 gives B_l = 1).  CLEF_EINVAL for a
 * negative or non-finite FWHM or lmax < 0. */
int clef_beam_gaussian(double fwhm_arcmin, int lmax, double *bl);

/* Read a beam from a text file (docs/formats-spectrum.md, "beam files"):
 * one row per multipole with at least two numbers, l and B_l (further
 * columns are ignored), blank lines and '#' comments skipped.  Every l from
 * 0 to lmax must be present exactly once; rows above lmax are ignored.
 * B_l is used as given (a warning is logged when B_0 is not 1 to 1e-3).
 * Errors name the file and line: CLEF_EIO (cannot open or read),
 * CLEF_EFORMAT (unparsable row, non-integer or repeated l, non-finite or
 * negative B_l), CLEF_EINVAL (the file stops before lmax). */
int clef_beam_read(const char *path, int lmax, double *bl);

/* How the pixel window is computed (docs/simulation.md, "pixel window").
 * All fields may be 0 for the defaults. */
typedef struct clef_beam_pixel_window_opts {
    int subsample;     /* k: sub-samples per pixel side of the coarse pass (the fine pass
                          uses 2k); a power of two, default 8 */
    int rings;         /* rings evaluated per segment (polar cap / belt); segments with
                          fewer rings are evaluated in full; default 64 */
    int per_ring;      /* distinct pixels evaluated per cap ring; default 16 */
} clef_beam_pixel_window_opts;

/* Pixel window p_l, l = 0..lmax, of HEALPix pixels at `nside`, into
 * pl[lmax + 1], computed from the definition (Gorski et al. 2005): the
 * pixel value is the mean over the pixel, w_l(p)^2 = 4 pi/(2l+1)
 * sum_m |w_lm(p)|^2 with w_lm(p) the pixel mean of Y*_lm, and
 * p_l^2 = mean over pixels of w_l(p)^2.  Each pixel integral is the mean
 * over its NESTED sub-pixels at k nside and 2k nside, Richardson
 * extrapolated; w_l(p)^2 follows from the addition theorem as a mean of
 * P_l over sub-sample pairs.  Large nside use a documented subset of rings
 * and pixels.  No caching.  Uses OpenMP threads; the result does not
 * depend on the thread count.  CLEF_EINVAL (nside not a power of two in
 * [1, 8192], lmax < 0, bad options), CLEF_ENOMEM. */
int clef_beam_pixel_window_compute(int64_t nside, int lmax, const clef_beam_pixel_window_opts *opts,
                             double *pl);

/* The same with the default options, cached: in memory for the life of
 * the process, and on disk under the clef cache folder ($CLEF_CACHE_DIR,
 * else $XDG_CACHE_HOME/clef, else ~/.cache/clef; an empty CLEF_CACHE_DIR
 * turns the disk cache off).  The cache holds lmax >= 3 nside - 1.  Disk
 * cache problems are logged, never fatal. */
int clef_beam_pixel_window(int64_t nside, int lmax, double *pl);

/* Free the in-memory pixel-window cache (for leak checkers). */
void clef_beam_pixel_window_cache_clear(void);

#ifdef __cplusplus
}
#endif
#endif
