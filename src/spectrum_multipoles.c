/* Monopole and dipole removal, fitted on the observed sky.
 *
 * A monopole or dipole left in a masked map leaks through the mask's
 * coupling into every multipole of the pseudo-spectrum, so both are fitted
 * by weighted least squares on the observed pixels, T_p ~ a + d . n_p with
 * weights w_p, and subtracted from every pixel (common practice). */
#define _GNU_SOURCE /* sincos */
#include <lapacke.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "clef/spectrum.h"
#include "core_impl.h"

/* Geometry of RING ring i = 1 .. 4 nside - 1 (Gorski et al. 2005, ApJ 622,
 * 759, section 4; METHODS.md section 1): z of its centres, pixel count,
 * first pixel index, and the phase of its first pixel, phi_j = phi0 + j dphi. */
typedef struct ring_geom {
    double z, phi0, dphi;
    int64_t n, first;
} ring_geom;

static ring_geom ring_at(int64_t nside, int64_t i)
{
    ring_geom g;
    const double ns = (double)nside;
    const int64_t npix = 12 * nside * nside;
    if (i < nside) {
        g.z = 1 - (double)(i * i) / (3 * ns * ns);
        g.n = 4 * i;
        g.first = 2 * i * (i - 1);
        g.dphi = M_PI / (2.0 * (double)i);
        g.phi0 = 0.5 * g.dphi;
    } else if (i <= 3 * nside) {
        g.z = 4.0 / 3.0 - 2.0 * (double)i / (3 * ns);
        g.n = 4 * nside;
        g.first = 2 * nside * (nside - 1) + 4 * nside * (i - nside);
        g.dphi = M_PI / (2 * ns);
        g.phi0 = ((i - nside + 1) % 2) * 0.5 * g.dphi;
    } else {
        const int64_t k = 4 * nside - i;
        g.z = -(1 - (double)(k * k) / (3 * ns * ns));
        g.n = 4 * k;
        g.first = npix - 2 * k * (k + 1);
        g.dphi = M_PI / (2.0 * (double)k);
        g.phi0 = 0.5 * g.dphi;
    }
    return g;
}

/* Unit vector of pixel j of a ring. */
static inline void ring_vec(const ring_geom *g, double st, int64_t j, double v[3])
{
    double s, c;
    sincos(g->phi0 + (double)j * g->dphi, &s, &c);
    v[0] = st * c;
    v[1] = st * s;
    v[2] = g->z;
}

/* Pixels are summed ring by ring, then the rings in order, so the fit does
 * not depend on the thread count. */

int clef_spectrum_remove_multipoles(double *map, const double *w, int64_t nside, int with_dipole,
                                    double coeffs[4])
{
    const int64_t nrings = 4 * nside - 1;
    const int nf = with_dipole ? 4 : 1;
    double(*part)[14] = calloc((size_t)nrings, sizeof *part);
    if (!part)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the monopole and dipole fit");

    /* Normal equations: A_ij = sum w f_i f_j, b_i = sum w f_i T, f = (1, x, y, z). */
#pragma omp parallel for schedule(dynamic, 16)
    for (int64_t r = 0; r < nrings; r++) {
        const ring_geom g = ring_at(nside, r + 1);
        const double st = sqrt((1 - g.z) * (1 + g.z));
        double *s = part[r];
        for (int64_t j = 0; j < g.n; j++) {
            const int64_t p = g.first + j;
            if (!(w[p] > 0))
                continue;
            double v[3], f[4];
            ring_vec(&g, st, j, v);
            f[0] = 1;
            f[1] = v[0];
            f[2] = v[1];
            f[3] = v[2];
            int k = 0;
            for (int a = 0; a < 4; a++)
                for (int b = a; b < 4; b++)
                    s[k++] += w[p] * f[a] * f[b];
            for (int a = 0; a < 4; a++)
                s[10 + a] += w[p] * f[a] * map[p];
        }
    }
    double acc[14] = {0};
    for (int64_t r = 0; r < nrings; r++)
        for (int k = 0; k < 14; k++)
            acc[k] += part[r][k];
    free(part);
    if (!(acc[0] > 0))
        CLEF_FAIL(CLEF_EINVAL, "no observed pixel to fit the monopole and dipole on");

    double a[16], b[4];
    int k = 0;
    for (int i = 0; i < 4; i++)
        for (int j = i; j < 4; j++) {
            a[i * 4 + j] = a[j * 4 + i] = acc[k++];
        }
    for (int i = 0; i < 4; i++)
        b[i] = acc[10 + i];
    /* Compact the system to nf unknowns. */
    double an[16], bn[4];
    for (int i = 0; i < nf; i++) {
        bn[i] = b[i];
        for (int j = 0; j < nf; j++)
            an[i * nf + j] = a[i * 4 + j];
    }
    lapack_int info = LAPACKE_dposv(LAPACK_ROW_MAJOR, 'U', nf, 1, an, nf, bn, 1);
    if (info != 0)
        CLEF_FAIL(CLEF_ENUMERIC,
                  "the observed region does not constrain a dipole (LAPACK dposv info %d); "
                  "keep the multipoles or use a larger mask",
                  (int)info);
    double cf[4] = {bn[0], 0, 0, 0};
    for (int i = 1; i < nf; i++)
        cf[i] = bn[i];

#pragma omp parallel for schedule(dynamic, 16)
    for (int64_t r = 0; r < nrings; r++) {
        const ring_geom g = ring_at(nside, r + 1);
        const double st = sqrt((1 - g.z) * (1 + g.z));
        for (int64_t j = 0; j < g.n; j++) {
            double v[3];
            ring_vec(&g, st, j, v);
            map[g.first + j] -= cf[0] + cf[1] * v[0] + cf[2] * v[1] + cf[3] * v[2];
        }
    }
    if (coeffs)
        memcpy(coeffs, cf, sizeof cf);
    return CLEF_OK;
}
