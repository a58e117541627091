/* Masks: binary masks from maps and geometric cuts, distances to the masked
 * region, apodization, moments and the mask power spectrum.
 *
 * A mask is a clef_map (RING order) whose values lie in [0, 1].  A pixel is
 * "observed" when it is valid and its value is > 0, and "masked" otherwise
 * (invalid pixels count as masked, value 0).  Every function here writes
 * masks with all pixels valid.
 *
 * Angles are in radians.  Longitude and latitude are those of the mask's own
 * coordinate frame (COORDSYS): lon = phi, lat = pi/2 - theta; no rotation
 * between frames is done here.
 *
 * Thread safety: functions on distinct maps may run concurrently.  The
 * distance search and apodization use OpenMP inside the call.
 */
#ifndef CLEF_MASK_H
#define CLEF_MASK_H

#include <stddef.h>
#include <stdint.h>

#include "clef/clef.h"
#include "clef/map.h"

#ifdef __cplusplus
extern "C" {
#endif

/* The transform plan of include/clef/sht.h (declared here so that this
 * header does not need complex.h). */
typedef struct clef_sht clef_sht;

/* A new mask of the given nside with every pixel observed (value 1).
 * Returns CLEF_EINVAL (nside not a power of two in [1, CLEF_NSIDE_MAX]) or
 * CLEF_ENOMEM; *out is NULL on failure. */
int clef_mask_full(clef_map **out, int64_t nside);

/* A binary mask from a map: 1 where the pixel is valid and its value is
 * >= threshold (inclusive != 0) or > threshold (inclusive == 0), else 0.
 * NaN values and invalid pixels give 0.  The coordinate system is copied.
 * Returns CLEF_EINVAL (threshold not finite) or CLEF_ENOMEM. */
int clef_mask_binarize(clef_map **out, const clef_map *in, double threshold, int inclusive);

/* Galactic-latitude style cut in the mask's frame: pixels whose centre has
 * |lat| < b_cut are set to 0 (b_cut in [0, pi/2]; CLEF_EINVAL otherwise). */
int clef_mask_cut_latitude(clef_map *mask, double b_cut);

/* Pixels whose centre lies within `radius` (great-circle distance, <= as
 * the comparison) of (lon, lat) are set to 0 (cut) or are the only ones
 * kept (keep: every other pixel set to 0, i.e. a patch).  radius in
 * (0, pi]; lat in [-pi/2, pi/2]; CLEF_EINVAL otherwise, CLEF_ENOMEM. */
int clef_mask_cut_disc(clef_map *mask, double lon, double lat, double radius);
int clef_mask_keep_disc(clef_map *mask, double lon, double lat, double radius);

/* The RING pixels of an nside map whose centres lie within `radius` of
 * (lon, lat), in increasing index order, found ring by ring (for each ring
 * crossing the disc the interval of phi inside it is solved for exactly;
 * no pixel outside the latitude range is visited).  *pix is malloc'ed
 * (caller frees; NULL when *npix is 0).  Errors as clef_mask_cut_disc. */
int clef_mask_query_disc(int64_t nside, double lon, double lat, double radius, int64_t **pix,
                         size_t *npix);

/* A circular hole: centre (lon, lat) and radius, radians. */
typedef struct clef_mask_hole {
    double lon, lat, radius;
} clef_mask_hole;

/* Read a source list (docs/masks.md): one hole per line, three
 * whitespace-separated numbers: longitude [deg], latitude [deg], radius
 * [arcmin].  '#' starts a comment; blank lines are skipped.  *holes is
 * malloc'ed (caller frees; NULL when *nholes is 0).  Returns CLEF_EIO
 * (cannot open or read) or CLEF_EFORMAT (message names the file and line:
 * wrong number of columns, a value that is not a number, latitude outside
 * [-90, 90], radius not in (0, 10800]), CLEF_ENOMEM. */
int clef_mask_holes_read(const char *path, clef_mask_hole **holes, size_t *nholes);

/* Punch every hole (clef_mask_cut_disc for each). */
int clef_mask_cut_holes(clef_map *mask, const clef_mask_hole *holes, size_t nholes);

/* Edge pixels: masked pixels with at least one observed pixel among their
 * neighbours (a superset of the 8 HEALPix neighbours: the pixels of the
 * rings i-2..i+2 within one pixel width in phi).  *edges is malloc'ed, in
 * increasing RING order (caller frees; NULL when *nedges is 0). */
int clef_mask_edges(const clef_map *mask, int64_t **edges, size_t *nedges);

/* Angular distance [rad] from each pixel centre to the nearest edge pixel
 * centre, capped at max_dist: dist[p] = 0 for masked pixels, min(d,
 * max_dist) for observed ones (max_dist when nothing is masked).  d is the
 * great-circle distance 2 asin(|u - v| / 2) between the unit vectors of the
 * two centres (chord form: accurate at small angles).  The nearest masked
 * pixel is always an edge pixel, so d is the distance to the masked region.
 * Edge pixels are bucketed by their parent pixel on a coarse grid whose
 * pixels are about max_dist / 4 wide (at most nside / 16); each coarse cell
 * searches only the buckets whose centres lie within max_dist + 2 coarse
 * pixel radii, nearest first, skipping buckets that cannot hold a closer
 * edge (docs/masks.md).  Threads: OpenMP over coarse cells.
 * dist holds mask->npix doubles (caller-owned).  max_dist in (0, pi];
 * CLEF_EINVAL otherwise, CLEF_ENOMEM. */
int clef_mask_distance(const clef_map *mask, double max_dist, double *dist);

/* Apodization kernels of Grain, Tristram & Stompor (2009), PRD 79, 123515,
 * as functions of x = sqrt((1 - cos delta) / (1 - cos delta_c)):
 * C1: x - sin(2 pi x) / (2 pi), C2: (1 - cos(pi x)) / 2, for x < 1; 1 for
 * x >= 1 (and 0 for x <= 0). */
double clef_mask_apod_x(double delta, double delta_c);
double clef_mask_apod_c1(double x);
double clef_mask_apod_c2(double x);

enum clef_mask_apod_kind {
    CLEF_MASK_APOD_C1 = 1,   /* Grain et al. 2009 C1 kernel of the distance */
    CLEF_MASK_APOD_C2 = 2,   /* Grain et al. 2009 C2 kernel of the distance */
    CLEF_MASK_APOD_GAUSS = 3 /* Gaussian smoothing of the binary mask */
};

typedef struct clef_mask_apod_opts {
    int kind;     /* clef_mask_apod_kind */
    double scale; /* C1/C2: apodization length delta_c; GAUSS: FWHM; radians, > 0 */
    /* GAUSS only: observed pixels closer than `erode` [rad] to the masked
     * region are masked before smoothing (0 = no erosion).  The smoothed
     * mask is multiplied by the (eroded) binary mask afterwards, so masked
     * pixels stay exactly 0. */
    double erode;
} clef_mask_apod_opts;

/* Apodize a mask (its observed pixels, value > 0, are the observed region).
 * C1/C2: w = kernel(x(delta)) with delta = clef_mask_distance(mask, scale).
 * GAUSS: a_lm of the binary mask (3 Jacobi iterations) times the Gaussian
 * beam B_l = exp(-l(l+1) sigma^2 / 2), sigma = FWHM / sqrt(8 ln 2), l up to
 * min(3 nside - 1, ceil(7 / sigma)) (B_l < 1e-10 beyond), synthesised,
 * clamped to [0, 1] and multiplied by the binary mask.  Returns
 * CLEF_EINVAL (unknown kind, scale not in (0, pi], erode < 0), CLEF_ENOMEM,
 * or the transform's errors. */
int clef_mask_apodize(clef_map **out, const clef_map *mask, const clef_mask_apod_opts *opts);

/* Moments of a mask over the whole sphere (Hivon et al. 2002):
 * w_i = mean over all pixels of w^i (invalid pixels count as 0), for a
 * binary mask all equal to f_sky; effective sky fraction w2^2 / w4. */
typedef struct clef_mask_moments {
    int64_t nside;
    int64_t nobserved; /* pixels with value > 0 */
    double fsky;       /* nobserved / npix */
    double w1, w2, w4;
    double fsky_eff;   /* w2^2 / w4, 0 for an empty mask */
} clef_mask_moments;
int clef_mask_moments_compute(const clef_map *mask, clef_mask_moments *out);

/* Mask power spectrum W_l = sum_m |w_lm|^2 / (2l + 1), l = 0..lmax of the
 * plan (which must have mmax = lmax and the mask's nside; for the coupling
 * matrix of a spectrum to lmax use a plan to 2 lmax), with `iterations`
 * Jacobi steps in the analysis.  wl holds lmax + 1 doubles (caller-owned).
 * Invalid pixels count as 0.  Allocates one a_lm array for the call.
 * Returns CLEF_EINVAL (nside or mmax mismatch, iterations < 0),
 * CLEF_ENOMEM or the transform's errors. */
int clef_mask_spectrum(const clef_sht *plan, const clef_map *mask, int iterations, double *wl);

/* The same with a plan made for the call (nside of the mask, lmax and
 * mmax = lmax, default options) and destroyed before returning: simpler
 * for a single mask, slower when several masks share a geometry.
 * Returns CLEF_EINVAL (lmax < 1), or the errors above. */
int clef_mask_spectrum_lmax(const clef_map *mask, int lmax, int iterations, double *wl);

#ifdef __cplusplus
}
#endif
#endif
