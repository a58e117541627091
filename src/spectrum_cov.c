/* Gaussian covariance of the decoupled band powers.
 *
 * Pseudo-spectra covariance in the narrow-kernel approximation (Efstathiou
 * 2004, MNRAS 349, 603; Garcia-Garcia, Alonso & Bellini 2019, JCAP 11, 043;
 * METHODS.md section 5):
 *   Cov(C~^ab_l, C~^ab_l') = [C^aa C^bb + C^ab C^ab]_{ll'} M[w_a w_b]_ll' / (2l'+1),
 * where C are the full-sky spectra as seen by the instrument (beam, pixel
 * window and noise included) and M[w_a w_b] is the coupling matrix built
 * from the power spectrum of the product mask.  The l, l' products are
 * symmetrised as sqrt(C^aa_l C^bb_l C^aa_l' C^bb_l') + C^ab_l C^ab_l', which
 * is exact on the diagonal and reduces to 2 C_l^2 / (2l+1) on the full sky.
 * Propagation: Cov(D) = (K^-1 P) Cov(C~) (K^-1 P)^T.
 *
 * C is estimated from the measured pseudo-spectrum divided by the mask
 * moment mean(w_a w_b), smoothed in D_l by a leave-one-out fit over the
 * neighbouring bins (smooth_estimate), or from a theory C_l times the
 * signal filter plus the noise spectrum. */
#define _DEFAULT_SOURCE /* M_PI */
#include <cblas.h>
#include <lapacke.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "spectrum_impl.h"

int clef_spectrum_coupling(clef_coupling **out, int lmax, const double *wl, int wl_lmax,
                           const clef_spectrum_opts *o)
{
    if (o->use_cache)
        return clef_coupling_create_cached(out, lmax, wl, wl_lmax, o->cache_dir, NULL);
    return clef_coupling_create(out, lmax, wl, wl_lmax);
}

/* Full-sky estimate of one measured pseudo-spectrum for the covariance
 * (docs/method.md section 7).  C_l = pcl_l / w2 (the "improved" narrow-
 * kernel approximation of Garcia-Garcia et al. 2019, section 3.2) is
 * smoothed as D_l = l(l+1) C_l / 2 pi: an average of C_l over a bin would
 * give its lowest multipoles, where C_l is largest, most of the weight
 * (for a flat D_l the first bin's variance came out ~3x too large).
 *
 * Leave-one-out: over the multipoles of bin b the estimate is a cubic in l
 * fitted (least squares, weights 2l+1, the inverse cosmic variance of a
 * flat D_l) to the D_l of the multipoles of up to two bins on each side,
 * without bin b itself.  A covariance built from the bin's own fluctuation
 * follows the data: a sky that fluctuates high gets a larger error, so
 * errors and band powers correlate (0.97-1.00 across skies) and fits
 * weighted by them are biased low (Hamimeche & Lewis 2008, PRD 77, 103013,
 * section II, on data-dependent covariances).  Without b the estimate is
 * independent of D_b (up to the mask's coupling of neighbouring bins).  On
 * the analytic spectrum the cubic is within 0.6% of the true bin variance
 * for 10-wide bins and 4% for 30-wide ones (a quadratic through the bin
 * means: 16% for 30-wide bins next to the first).  Bins without a
 * neighbour on each side (the first and last of the decoupled range) use
 * their own mean; so does a bin whose fit is singular or, where positivity
 * is required (auto-spectra), not positive. */
static void smooth_estimate(const clef_bins *bins, const double *pcl, double w2, int lmax,
                            int positive, double *c)
{
    const int nb = clef_bins_count(bins);
    double *d = malloc((size_t)(lmax + 1) * sizeof *d);
    double *dmean = malloc((size_t)nb * sizeof *dmean);
    for (int l = 0; l <= lmax; l++)
        c[l] = pcl[l] / w2;
    if (!d || !dmean) { /* no smoothing without memory: still a usable estimate */
        free(d);
        free(dmean);
        return;
    }
    for (int l = 0; l <= lmax; l++)
        d[l] = l * (l + 1.0) / (2 * M_PI) * c[l];
    for (int b = 0; b < nb; b++) {
        const int lo = clef_bins_l_lo(bins, b), hi = clef_bins_l_hi(bins, b);
        double s = 0;
        for (int l = lo; l <= hi; l++)
            s += d[l];
        dmean[b] = s / (hi - lo + 1);
    }
    for (int b = 0; b < nb; b++) {
        const int lo = clef_bins_l_lo(bins, b), hi = clef_bins_l_hi(bins, b);
        const double x0 = clef_bins_l_eff(bins, b);
        const int j0 = b - 2 < 0 ? 0 : b - 2, j1 = b + 2 >= nb ? nb - 1 : b + 2;
        /* D(l) = sum_k q_k u^k, u = (l - x0) / h (scaled for conditioning). */
        const double h = 0.5 * (clef_bins_l_hi(bins, j1) - clef_bins_l_lo(bins, j0) + 1);
        double q[4] = {dmean[b], 0, 0, 0};
        if (b > 0 && b + 1 < nb) {
            double a[16] = {0}, y[4] = {0};
            for (int j = j0; j <= j1; j++) {
                if (j == b)
                    continue;
                for (int l = clef_bins_l_lo(bins, j); l <= clef_bins_l_hi(bins, j); l++) {
                    const double u = (l - x0) / h, wt = 2.0 * l + 1.0;
                    const double f[4] = {1, u, u * u, u * u * u};
                    for (int r = 0; r < 4; r++) {
                        y[r] += wt * f[r] * d[l];
                        for (int k = 0; k < 4; k++)
                            a[r * 4 + k] += wt * f[r] * f[k];
                    }
                }
            }
            if (LAPACKE_dposv(LAPACK_ROW_MAJOR, 'U', 4, 1, a, 4, y, 1) == 0 &&
                isfinite(y[0] + y[1] + y[2] + y[3])) {
                int ok = 1;
                for (int l = lo; l <= hi && positive; l++) {
                    const double u = (l - x0) / h;
                    ok &= y[0] + u * (y[1] + u * (y[2] + u * y[3])) > 0;
                }
                if (ok)
                    memcpy(q, y, sizeof q);
            }
        }
        for (int l = lo; l <= hi; l++) {
            const double u = (l - x0) / h;
            c[l] = (q[0] + u * (q[1] + u * (q[2] + u * q[3]))) * 2 * M_PI / (l * (l + 1.0));
        }
    }
    free(d);
    free(dmean);
}

int clef_spectrum_covariance(const clef_spectrum_cov_in *in, double *cov)
{
    const int lmax = in->lmax, n = lmax + 1;
    const int nb = clef_bins_count(in->bins);
    const clef_spectrum_opts *o = in->opts;
    int status = CLEF_OK;
    double *c[3] = {NULL, NULL, NULL}, *g = NULL, *x = NULL;
    clef_coupling *m2 = NULL;

    for (int k = 0; k < 3; k++) {
        c[k] = malloc((size_t)n * sizeof(double));
        if (!c[k]) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
            goto fail;
        }
    }
    /* c[0] = C^ab, c[1] = C^aa, c[2] = C^bb. */
    smooth_estimate(in->bins, in->pcl[0], in->w2[0], lmax, !in->cross, c[0]);
    if (in->cross) {
        smooth_estimate(in->bins, in->pcl[1], in->w2[1], lmax, 1, c[1]);
        smooth_estimate(in->bins, in->pcl[2], in->w2[2], lmax, 1, c[2]);
    } else {
        memcpy(c[1], c[0], (size_t)n * sizeof(double));
        memcpy(c[2], c[0], (size_t)n * sizeof(double));
    }
    if (o->theory_cl) {
        if (o->theory_lmax < lmax) {
            status = clef_fail(CLEF_EINVAL,
                               "the theory spectrum for the covariance stops at l = %d, below "
                               "lmax = %d",
                               o->theory_lmax, lmax);
            goto fail;
        }
        for (int l = 0; l <= lmax; l++) {
            double s = o->theory_cl[l] * in->tl[l];
            double nl = (o->noise_cl && !in->cross && l <= o->noise_lmax) ? o->noise_cl[l] : 0;
            c[0][l] = in->cross ? s : s + nl;
            if (!in->cross)
                c[1][l] = c[2][l] = c[0][l];
        }
    }

    if (!in->m2)
        CLEF_CHECK(clef_spectrum_coupling(&m2, lmax, in->wl2, in->lmax_t, o));
    const double *m = clef_coupling_matrix(in->m2 ? in->m2 : m2);
    g = clef_alloc_large((size_t)n * n * sizeof *g);
    x = malloc((size_t)nb * n * sizeof *x);
    if (!g || !x) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance (lmax %d)", lmax);
        goto fail;
    }
    /* sqrt(C^aa_l C^bb_l C^aa_l' C^bb_l') = s_l s_l', s_l = sqrt|C^aa_l C^bb_l|;
     * c[1] is overwritten with s_l and c[2] with 1/(2l+1). */
    for (int l = 0; l < n; l++) {
        c[1][l] = sqrt(fabs(c[1][l] * c[2][l]));
        c[2][l] = 1.0 / (2.0 * l + 1.0);
    }
#pragma omp parallel for schedule(static)
    for (int l = 0; l < n; l++) {
        const double sl = c[1][l], cl = c[0][l];
        const double *ml = m + (size_t)l * n;
        double *gl = g + (size_t)l * n;
        for (int lp = 0; lp < n; lp++)
            gl[lp] = (sl * c[1][lp] + cl * c[0][lp]) * ml[lp] * c[2][lp];
    }
    const double *a = clef_coupling_binned_kinv_p(in->kb);
    /* x = A G, cov = x A^T. */
    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, nb, n, n, 1.0, a, n, g, n, 0.0, x, n);
    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasTrans, nb, nb, n, 1.0, x, n, a, n, 0.0, cov,
                nb);
    for (int i = 0; i < nb; i++)
        for (int j = i + 1; j < nb; j++) {
            double s = 0.5 * (cov[(size_t)i * nb + j] + cov[(size_t)j * nb + i]);
            cov[(size_t)i * nb + j] = cov[(size_t)j * nb + i] = s;
        }

fail:
    clef_coupling_destroy(m2);
    free(g);
    free(x);
    for (int k = 0; k < 3; k++)
        free(c[k]);
    return status;
}
