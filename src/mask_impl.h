/* Private ring geometry shared by the mask module's files: ring tables of
 * the RING scheme (Gorski et al. 2005, ApJ 622, 759, section 4 and
 * METHODS.md section 1) and phi-interval queries on rings, used by the disc
 * query, the edge search and the distance search. */
#ifndef CLEF_MASK_IMPL_H
#define CLEF_MASK_IMPL_H

#include <stddef.h>
#include <stdint.h>

/* One iso-latitude ring: pixel j (0-based) has RING index first + j and
 * longitude phi_j = (2 pi / n)(j + shift). */
typedef struct mask_ring {
    int64_t first;
    int64_t n;
    double z, sth; /* cos and sin of the colatitude of the ring */
    double shift;  /* 0 or 1/2 */
} mask_ring;

/* Inclusive range of RING pixel indices. */
typedef struct mask_range {
    int64_t lo, hi;
} mask_range;

/* Ring i = 1 .. 4 nside - 1. */
void mask_ring_info(int64_t nside, int64_t i, mask_ring *r);

/* The ring (1 .. 4 nside - 1) holding RING pixel p. */
int64_t mask_pixel_ring(int64_t nside, int64_t p);

/* The pixels of ring r whose centres have phi within [phi_c - h, phi_c + h]
 * (mod 2 pi), as at most two ranges appended to out; returns their number.
 * h >= pi gives the whole ring. */
int mask_ring_phi_ranges(const mask_ring *r, double phi_c, double h, mask_range *out);

/* Ranges of the pixels whose centres lie within `radius` of the point with
 * colatitude theta and longitude phi.  out needs room for 2 (4 nside - 1)
 * ranges; returns the number written. */
size_t mask_disc_ranges(int64_t nside, double theta, double phi, double radius, mask_range *out);

/* An upper bound on the angular distance from a pixel centre to any point
 * of its pixel, for any pixel of the given nside. */
double mask_max_pixrad(int64_t nside);

#endif
