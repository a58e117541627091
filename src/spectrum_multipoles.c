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
#include "mask_impl.h"

/* Unit vector of pixel j of a ring (ring geometry of the mask module,
 * src/mask_geom.c: Gorski et al. 2005 section 4). */
static inline void ring_vec(const mask_ring *g, int64_t j, double v[3])
{
    double s, c;
    sincos(2.0 * M_PI / (double)g->n * ((double)j + g->shift), &s, &c);
    v[0] = g->sth * c;
    v[1] = g->sth * s;
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
        mask_ring g;
        mask_ring_info(nside, r + 1, &g);
        double *s = part[r];
        for (int64_t j = 0; j < g.n; j++) {
            const int64_t p = g.first + j;
            if (!(w[p] > 0))
                continue;
            double v[3], f[4];
            ring_vec(&g, j, v);
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
        mask_ring g;
        mask_ring_info(nside, r + 1, &g);
        for (int64_t j = 0; j < g.n; j++) {
            double v[3];
            ring_vec(&g, j, v);
            map[g.first + j] -= cf[0] + cf[1] * v[0] + cf[2] * v[1] + cf[3] * v[2];
        }
    }
    if (coeffs)
        memcpy(coeffs, cf, sizeof cf);
    return CLEF_OK;
}
