/* Monopole and dipole removal, fitted on the observed sky.
 *
 * A monopole or dipole left in a masked map leaks through the mask's
 * coupling into every multipole of the pseudo-spectrum, so both are fitted
 * by weighted least squares on the observed pixels, T_p ~ a + d . n_p with
 * weights w_p, and subtracted from every pixel (common practice). */
#define _GNU_SOURCE /* sincos */
#include <lapacke.h>
#include <math.h>
#include <omp.h>
#include <stdlib.h>
#include <string.h>

#include "clef/spectrum.h"
#include "core_impl.h"
#include "mask_impl.h"

/* cos and sin of the longitudes phi_j = 2 pi (j + shift) / n of a ring's
 * pixels (ring geometry of the mask module, src/mask_geom.c: Gorski et al.
 * 2005 section 4) into cs[2j], cs[2j+1].  Every HEALPix ring has n = 4k
 * pixels, so phi_{j+k} = phi_j + pi/2: one sincos per quarter ring, the
 * other quarters by exact sign and swap (4x fewer sincos calls; they were
 * most of this stage's time). */
static void ring_phases(const mask_ring *g, double *cs)
{
    const int64_t q = g->n / 4;
    for (int64_t j = 0; j < q; j++) {
        double s, c;
        sincos(2.0 * M_PI / (double)g->n * ((double)j + g->shift), &s, &c);
        cs[2 * j] = c;
        cs[2 * j + 1] = s;
        cs[2 * (j + q)] = -s;
        cs[2 * (j + q) + 1] = c;
        cs[2 * (j + 2 * q)] = -c;
        cs[2 * (j + 2 * q) + 1] = -s;
        cs[2 * (j + 3 * q)] = s;
        cs[2 * (j + 3 * q) + 1] = -c;
    }
}

/* Pixels are summed ring by ring, then the rings in order, so the fit does
 * not depend on the thread count. */

int clef_spectrum_remove_multipoles(double *map, const double *w, int64_t nside, int with_dipole,
                                    double coeffs[4])
{
    const int64_t nrings = 4 * nside - 1;
    const int nf = with_dipole ? 4 : 1;
    double(*part)[14] = calloc((size_t)nrings, sizeof *part);
    /* Per-thread phase tables of the longest ring (4 nside pixels). */
    const int nthr = omp_get_max_threads();
    double *cs_all = malloc((size_t)nthr * 8 * (size_t)nside * sizeof *cs_all);
    if (!part || !cs_all) {
        free(part);
        free(cs_all);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the monopole and dipole fit");
    }

    /* Normal equations: A_ij = sum w f_i f_j, b_i = sum w f_i T, f = (1, x, y, z). */
#pragma omp parallel for schedule(dynamic, 16) num_threads(nthr)
    for (int64_t r = 0; r < nrings; r++) {
        mask_ring g;
        mask_ring_info(nside, r + 1, &g);
        double *s = part[r];
        double *cs = cs_all + (size_t)omp_get_thread_num() * 8 * (size_t)nside;
        ring_phases(&g, cs);
        for (int64_t j = 0; j < g.n; j++) {
            const int64_t p = g.first + j;
            if (!(w[p] > 0))
                continue;
            double f[4];
            f[0] = 1;
            f[1] = g.sth * cs[2 * j];
            f[2] = g.sth * cs[2 * j + 1];
            f[3] = g.z;
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
    if (!(acc[0] > 0)) {
        free(cs_all);
        CLEF_FAIL(CLEF_EINVAL, "no observed pixel to fit the monopole and dipole on");
    }

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
    if (info != 0) {
        free(cs_all);
        return clef_fail(CLEF_ENUMERIC,
                  "the observed region does not constrain a dipole (LAPACK dposv info %d); "
                  "keep the multipoles or use a larger mask",
                  (int)info);
    }
    double cf[4] = {bn[0], 0, 0, 0};
    for (int i = 1; i < nf; i++)
        cf[i] = bn[i];

#pragma omp parallel for schedule(dynamic, 16) num_threads(nthr)
    for (int64_t r = 0; r < nrings; r++) {
        mask_ring g;
        mask_ring_info(nside, r + 1, &g);
        double *cs = cs_all + (size_t)omp_get_thread_num() * 8 * (size_t)nside;
        ring_phases(&g, cs);
        const double c0 = cf[0] + cf[3] * g.z;
        for (int64_t j = 0; j < g.n; j++)
            map[g.first + j] -= c0 + cf[1] * (g.sth * cs[2 * j]) + cf[2] * (g.sth * cs[2 * j + 1]);
    }
    free(cs_all);
    if (coeffs)
        memcpy(coeffs, cf, sizeof cf);
    return CLEF_OK;
}
