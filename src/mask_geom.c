/* Ring geometry of the RING scheme and phi-interval queries on rings
 * (Gorski et al. 2005, ApJ 622, 759; ring tables as in METHODS.md
 * section 1).  The HEALPix C library offers no disc query, so the disc is
 * cut ring by ring: on a ring of colatitude theta the points within angle
 * r of a centre (theta0, phi0) satisfy
 *   cos r <= cos theta cos theta0 + sin theta sin theta0 cos(phi - phi0),
 * an interval |phi - phi0| <= acos((cos r - z z0) / (s s0)) (spherical law
 * of cosines). */
#define _XOPEN_SOURCE 700
#include "mask_impl.h"

#include <math.h>

void mask_ring_info(int64_t nside, int64_t i, mask_ring *r)
{
    const double three_ns2 = 3.0 * (double)nside * (double)nside;
    if (i < nside || i > 3 * nside) {
        /* Polar caps: z = +-(1 - k^2 / (3 nside^2)), 4k pixels, phi_j =
         * (pi / 2k)(j + 1/2).  sin theta from t = 1 - |z| keeps full
         * precision next to the poles. */
        const int64_t k = i < nside ? i : 4 * nside - i;
        const double t = (double)k * (double)k / three_ns2;
        r->n = 4 * k;
        r->z = i < nside ? 1.0 - t : t - 1.0;
        r->sth = sqrt(t * (2.0 - t));
        r->shift = 0.5;
        r->first = i < nside ? 2 * k * (k - 1) : 12 * nside * nside - 2 * k * (k + 1);
    } else {
        /* Equatorial belt: z = 4/3 - 2i / (3 nside), 4 nside pixels, shifted
         * by half a pixel on every other ring. */
        r->n = 4 * nside;
        r->z = 4.0 / 3.0 - 2.0 * (double)i / (3.0 * (double)nside);
        r->sth = sqrt((1.0 - r->z) * (1.0 + r->z));
        r->shift = ((i - nside + 1) % 2) ? 0.5 : 0.0;
        r->first = 2 * nside * (nside - 1) + 4 * nside * (i - nside);
    }
}

/* Largest k >= 0 with 2k(k-1) <= q, i.e. the north-cap ring holding index q
 * (rings start at 2k(k-1)). */
static int64_t cap_ring(int64_t q)
{
    int64_t k = (int64_t)((1.0 + sqrt(1.0 + 2.0 * (double)q)) / 2.0);
    while (k > 1 && 2 * k * (k - 1) > q)
        k--;
    while (2 * (k + 1) * k <= q)
        k++;
    return k;
}

int64_t mask_pixel_ring(int64_t nside, int64_t p)
{
    const int64_t ncap = 2 * nside * (nside - 1);
    const int64_t npix = 12 * nside * nside;
    if (p < ncap)
        return cap_ring(p);
    if (p < npix - ncap)
        return nside + (p - ncap) / (4 * nside);
    /* South cap: mirror index npix - 1 - p lies in the mirrored ring. */
    return 4 * nside - cap_ring(npix - 1 - p);
}

int mask_ring_phi_ranges(const mask_ring *r, double phi_c, double h, mask_range *out)
{
    if (h >= M_PI) {
        out[0].lo = r->first;
        out[0].hi = r->first + r->n - 1;
        return 1;
    }
    const double dphi = 2.0 * M_PI / (double)r->n;
    /* Centres phi_j = dphi (j + shift) inside [phi_c - h, phi_c + h]. */
    const double jlo = ceil((phi_c - h) / dphi - r->shift);
    const double jhi = floor((phi_c + h) / dphi - r->shift);
    if (jhi < jlo)
        return 0;
    if (jhi - jlo + 1.0 >= (double)r->n) {
        out[0].lo = r->first;
        out[0].hi = r->first + r->n - 1;
        return 1;
    }
    const int64_t len = (int64_t)(jhi - jlo); /* pixels - 1 */
    int64_t j0 = (int64_t)fmod(jlo, (double)r->n);
    if (j0 < 0)
        j0 += r->n;
    if (j0 + len < r->n) {
        out[0].lo = r->first + j0;
        out[0].hi = r->first + j0 + len;
        return 1;
    }
    /* Wraps through phi = 0: [0, rest] and [j0, n - 1], in index order. */
    out[0].lo = r->first;
    out[0].hi = r->first + (j0 + len - r->n);
    out[1].lo = r->first + j0;
    out[1].hi = r->first + r->n - 1;
    return 2;
}

/* The ring whose z is the first below or at z, counting from the north
 * (0 above ring 1, 4 nside - 1 for the south-most): inverse of the ring
 * z formulas. */
static int64_t ring_above(int64_t nside, double z)
{
    const double az = fabs(z);
    if (az <= 2.0 / 3.0)
        return (int64_t)((double)nside * (2.0 - 1.5 * z));
    const int64_t k = (int64_t)((double)nside * sqrt(3.0 * (1.0 - az)));
    return z > 0 ? k : 4 * nside - k - 1;
}

size_t mask_disc_ranges(int64_t nside, double theta, double phi, double radius, mask_range *out)
{
    const double z0 = cos(theta), s0 = sin(theta), cosr = cos(radius);
    const double tmin = theta - radius, tmax = theta + radius;
    int64_t ilo = tmin <= 0.0 ? 1 : ring_above(nside, cos(tmin)) - 1;
    int64_t ihi = tmax >= M_PI ? 4 * nside - 1 : ring_above(nside, cos(tmax)) + 2;
    if (ilo < 1)
        ilo = 1;
    if (ihi > 4 * nside - 1)
        ihi = 4 * nside - 1;
    size_t n = 0;
    for (int64_t i = ilo; i <= ihi; i++) {
        mask_ring r;
        mask_ring_info(nside, i, &r);
        const double ss = r.sth * s0;
        double h;
        if (ss <= 0.0) {
            /* Centre on a pole: the ring is wholly in or out. */
            h = r.z * z0 >= cosr ? M_PI : -1.0;
        } else {
            const double x = (cosr - r.z * z0) / ss;
            h = x <= -1.0 ? M_PI : (x > 1.0 ? -1.0 : acos(x));
        }
        if (h >= 0.0)
            n += (size_t)mask_ring_phi_ranges(&r, phi, h, out + n);
    }
    return n;
}

double mask_max_pixrad(int64_t nside)
{
    /* The largest pixels reach about 1.07 / nside from their centre (near
     * the cap/belt transition, z = 2/3; measured by dense sampling against
     * the HEALPix C library's ang2pix_ring for nside 1..256, checked in
     * tests/test_mask.c); 1.1 / nside bounds it. */
    return 1.1 / (double)nside;
}
