/* Monopole and dipole removal, fitted on the observed sky.
 *
 * A monopole or dipole left in a masked map leaks through the mask's
 * coupling into every multipole of the pseudo-spectrum, so both are fitted
 * by weighted least squares on the observed pixels, T_p ~ a + d . n_p with
 * weights w_p, and subtracted from every pixel (common practice). */
#include <chealpix.h>
#include <lapacke.h>
#include <string.h>

#include "clef/spectrum.h"
#include "core_impl.h"

/* Pixels are summed in fixed chunks, then the chunks in order, so the fit
 * does not depend on the thread count. */
#define NCHUNK 256

int clef_spectrum_remove_multipoles(double *map, const double *w, int64_t nside, int with_dipole,
                                    double coeffs[4])
{
    const int64_t npix = 12 * nside * nside;
    const int nf = with_dipole ? 4 : 1;
    double part[NCHUNK][14];
    memset(part, 0, sizeof part);

    /* Normal equations: A_ij = sum w f_i f_j, b_i = sum w f_i T, f = (1, x, y, z). */
#pragma omp parallel for schedule(dynamic)
    for (int c = 0; c < NCHUNK; c++) {
        const int64_t p0 = npix * c / NCHUNK, p1 = npix * (c + 1) / NCHUNK;
        double *s = part[c];
        for (int64_t p = p0; p < p1; p++) {
            if (!(w[p] > 0))
                continue;
            double v[3], f[4];
            pix2vec_ring64(nside, p, v);
            f[0] = 1;
            f[1] = v[0];
            f[2] = v[1];
            f[3] = v[2];
            int k = 0;
            for (int i = 0; i < 4; i++)
                for (int j = i; j < 4; j++)
                    s[k++] += w[p] * f[i] * f[j];
            for (int i = 0; i < 4; i++)
                s[10 + i] += w[p] * f[i] * map[p];
        }
    }
    double acc[14] = {0};
    for (int c = 0; c < NCHUNK; c++)
        for (int k = 0; k < 14; k++)
            acc[k] += part[c][k];
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

#pragma omp parallel for schedule(static)
    for (int64_t p = 0; p < npix; p++) {
        double v[3];
        pix2vec_ring64(nside, p, v);
        map[p] -= cf[0] + cf[1] * v[0] + cf[2] * v[1] + cf[3] * v[2];
    }
    if (coeffs)
        memcpy(coeffs, cf, sizeof cf);
    return CLEF_OK;
}
