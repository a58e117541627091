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
 * moment mean(w_a w_b), averaged over each bin to damp its scatter, or from
 * a theory C_l times the signal filter plus the noise spectrum. */
#include <cblas.h>
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

/* Bin-averaged full-sky estimate of one measured pseudo-spectrum. */
static void smooth_estimate(const clef_bins *bins, const double *pcl, double w2, int lmax,
                            double *c)
{
    for (int l = 0; l <= lmax; l++)
        c[l] = pcl[l] / w2;
    for (int b = 0; b < clef_bins_count(bins); b++) {
        int lo = clef_bins_l_lo(bins, b), hi = clef_bins_l_hi(bins, b);
        double s = 0;
        for (int l = lo; l <= hi; l++)
            s += c[l];
        s /= (hi - lo + 1);
        for (int l = lo; l <= hi; l++)
            c[l] = s;
    }
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
    smooth_estimate(in->bins, in->pcl[0], in->w2[0], lmax, c[0]);
    if (in->cross) {
        smooth_estimate(in->bins, in->pcl[1], in->w2[1], lmax, c[1]);
        smooth_estimate(in->bins, in->pcl[2], in->w2[2], lmax, c[2]);
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

    CLEF_CHECK(clef_spectrum_coupling(&m2, lmax, in->wl2, in->lmax_t, o));
    const double *m = clef_coupling_matrix(m2);
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
