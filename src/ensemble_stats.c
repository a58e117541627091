/* Statistics of a simulation ensemble: moments, expected band powers, the
 * Monte Carlo transfer function (Hivon et al. 2002), covariance comparison
 * and calibration of errors (include/clef/ensemble.h). */
#define _XOPEN_SOURCE 700
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include <lapacke.h>

#include "clef/ensemble.h"
#include "core_impl.h"

int clef_ensemble_moments(int n, int m, const double *x, double *mean, double *cov)
{
    if (n < 2 || m < 1)
        CLEF_FAIL(CLEF_EINVAL, "ensemble moments need at least 2 realisations of 1 value, got "
                  "%d of %d", n, m);
    for (int j = 0; j < m; j++)
        mean[j] = 0.0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            mean[j] += x[(size_t)i * m + j];
    for (int j = 0; j < m; j++)
        mean[j] /= n;
    if (!cov)
        return CLEF_OK;
    /* Second pass about the mean (numerically safe; Chan, Golub and LeVeque
     * 1983), in order of i so the sum does not depend on the machine. */
    memset(cov, 0, sizeof *cov * (size_t)m * m);
    for (int i = 0; i < n; i++) {
        const double *xi = x + (size_t)i * m;
        for (int a = 0; a < m; a++) {
            const double da = xi[a] - mean[a];
            for (int b = a; b < m; b++)
                cov[(size_t)a * m + b] += da * (xi[b] - mean[b]);
        }
    }
    for (int a = 0; a < m; a++)
        for (int b = a; b < m; b++) {
            cov[(size_t)a * m + b] /= n - 1;
            cov[(size_t)b * m + a] = cov[(size_t)a * m + b];
        }
    return CLEF_OK;
}

void clef_ensemble_expected(int nbins, const double *win, int win_lmax, const double *cl,
                            int cl_lmax, const double *f, double *out)
{
    const size_t nw = (size_t)win_lmax + 1;
    for (int b = 0; b < nbins; b++) {
        double s = 0.0;
        for (int l = 0; l <= win_lmax && l <= cl_lmax; l++) {
            const double dl = l * (l + 1.0) * cl[l] / (2.0 * M_PI);
            s += win[(size_t)b * nw + l] * (f ? f[l] : 1.0) * dl;
        }
        out[b] = s;
    }
}

void clef_ensemble_transfer_interp(int nbins, const double *l_eff, const double *fb, int fl_lmax,
                                   double *fl)
{
    int b = 0;
    for (int l = 0; l <= fl_lmax; l++) {
        if (l <= l_eff[0] || nbins == 1) {
            fl[l] = fb[0];
            continue;
        }
        if (l >= l_eff[nbins - 1]) {
            fl[l] = fb[nbins - 1];
            continue;
        }
        while (b + 1 < nbins - 1 && l > l_eff[b + 1])
            b++;
        const double t = (l - l_eff[b]) / (l_eff[b + 1] - l_eff[b]);
        fl[l] = (1.0 - t) * fb[b] + t * fb[b + 1];
    }
}

int clef_ensemble_transfer_compute(const clef_ensemble_transfer *t, double *fb, double *fb_err,
                                   int fl_lmax, double *fl, int *iters)
{
    const int nb = t->nbins, wl = t->win_lmax;
    if (nb < 1 || !t->win || wl < 2)
        CLEF_FAIL(CLEF_EINVAL, "transfer function: no band-power windows");
    for (int b = 1; b < nb; b++)
        if (!(t->l_eff[b] > t->l_eff[b - 1]))
            CLEF_FAIL(CLEF_EINVAL, "transfer function: effective multipoles not increasing at "
                      "bin %d", b);
    const size_t n2 = (size_t)nb * nb;
    double *a = malloc(sizeof *a * n2), *lu = malloc(sizeof *lu * n2);
    double *e = calloc((size_t)nb, sizeof *e), *col = malloc(sizeof *col * ((size_t)wl + 1));
    double *rhs = malloc(sizeof *rhs * (size_t)nb), *wd = malloc(sizeof *wd * (size_t)nb);
    lapack_int *ipiv = malloc(sizeof *ipiv * (size_t)nb);
    int status = CLEF_OK;
    if (!a || !lu || !e || !col || !rhs || !wd || !ipiv) {
        status = clef_fail(CLEF_ENOMEM, "no memory for the transfer function (%d bins)", nb);
        goto done;
    }
    clef_ensemble_expected(nb, t->win, wl, t->cl, t->cl_lmax, NULL, wd);
    for (int b = 0; b < nb; b++)
        if (!(fabs(wd[b]) > 0)) {
            status = clef_fail(CLEF_EINVAL, "transfer function: the input spectrum has no power "
                               "in bin %d (l_eff %.1f)", b, t->l_eff[b]);
            goto done;
        }
    /* <D_b> = sum_l W_bl F_l D_l is linear in the node values F_b' of the
     * interpolated F_l: <D> = A F with A_bb' = sum_l W_bl phi_b'(l) D_l,
     * phi_b' the interpolation's hat functions.  The iteration of Hivon et
     * al. (F^0 = <D> / (W D), F^{k+1} = F^k + (<D> - A F^k) / (W D)) is
     * Jacobi's method on this system; its fixed point is found here by an
     * LU solve (LAPACK dgetrf/dgetrs), which needs no iteration count. */
    for (int c = 0; c < nb; c++) {
        e[c] = 1.0;
        clef_ensemble_transfer_interp(nb, t->l_eff, e, wl, col);
        e[c] = 0.0;
        double *out = rhs;
        clef_ensemble_expected(nb, t->win, wl, t->cl, t->cl_lmax, col, out);
        for (int b = 0; b < nb; b++)
            a[(size_t)b * nb + c] = out[b];
    }
    memcpy(lu, a, sizeof *a * n2);
    lapack_int info = LAPACKE_dgetrf(LAPACK_ROW_MAJOR, nb, nb, lu, nb, ipiv);
    if (info != 0) {
        status = clef_fail(CLEF_ENUMERIC, "transfer function: the window system is singular "
                           "(LAPACK dgetrf info %d)", (int)info);
        goto done;
    }
    memcpy(fb, t->mean, sizeof *fb * (size_t)nb);
    info = LAPACKE_dgetrs(LAPACK_ROW_MAJOR, 'N', nb, 1, lu, nb, ipiv, fb, 1);
    /* Errors: diag(A^-1 S A^-T) with S the covariance of the mean (its
     * diagonal sem^2 when no full matrix is given). */
    for (int b = 0; b < nb && info == 0; b++) {
        double v = 0.0;
        /* row b of A^-1: solve A^T x = e_b */
        memset(rhs, 0, sizeof *rhs * (size_t)nb);
        rhs[b] = 1.0;
        info = LAPACKE_dgetrs(LAPACK_ROW_MAJOR, 'T', nb, 1, lu, nb, ipiv, rhs, 1);
        if (t->cov_mean) {
            for (int i = 0; i < nb; i++)
                for (int j = 0; j < nb; j++)
                    v += rhs[i] * t->cov_mean[(size_t)i * nb + j] * rhs[j];
        } else {
            for (int i = 0; i < nb; i++)
                v += rhs[i] * rhs[i] * t->sem[i] * t->sem[i];
        }
        fb_err[b] = sqrt(fmax(v, 0.0));
    }
    if (info != 0) {
        status = clef_fail(CLEF_ENUMERIC, "transfer function: LAPACK dgetrs info %d", (int)info);
        goto done;
    }
    if (iters) {
        /* How many Jacobi steps of Hivon et al. would reach this point to
         * 1e-3 of the errors (reported, not needed). */
        double *f = e;
        for (int b = 0; b < nb; b++)
            f[b] = t->mean[b] / wd[b];
        int k = 0;
        for (; k < 1000; k++) {
            double worst = 0.0;
            for (int b = 0; b < nb; b++) {
                double s = 0.0;
                for (int c = 0; c < nb; c++)
                    s += a[(size_t)b * nb + c] * f[c];
                rhs[b] = (t->mean[b] - s) / wd[b];
            }
            for (int b = 0; b < nb; b++) {
                f[b] += rhs[b];
                const double d = fb_err[b] > 0 ? fabs(f[b] - fb[b]) / fb_err[b] : 0.0;
                worst = d > worst ? d : worst;
            }
            if (worst < 1e-3)
                break;
        }
        *iters = k + 1;
    }
    clef_ensemble_transfer_interp(nb, t->l_eff, fb, fl_lmax, fl);
done:
    free(a);
    free(lu);
    free(e);
    free(col);
    free(rhs);
    free(wd);
    free(ipiv);
    return status;
}

void clef_ensemble_cov_compare(int m, const double *mc, const double *an, double *ratio,
                               double *corr_diff, double *max_ratio_dev, double *max_corr_diff)
{
    double worst_r = 0.0, worst_c = 0.0;
    for (int a = 0; a < m; a++) {
        const double da = an[(size_t)a * m + a];
        ratio[a] = da > 0 ? mc[(size_t)a * m + a] / da : NAN;
        if (isfinite(ratio[a]) && fabs(ratio[a] - 1.0) > worst_r)
            worst_r = fabs(ratio[a] - 1.0);
    }
    for (int a = 0; a < m; a++)
        for (int b = 0; b < m; b++) {
            const double smc = sqrt(mc[(size_t)a * m + a] * mc[(size_t)b * m + b]);
            const double san = sqrt(an[(size_t)a * m + a] * an[(size_t)b * m + b]);
            const double d = (smc > 0 && san > 0)
                                 ? mc[(size_t)a * m + b] / smc - an[(size_t)a * m + b] / san
                                 : NAN;
            if (corr_diff)
                corr_diff[(size_t)a * m + b] = d;
            if (a != b && isfinite(d) && fabs(d) > worst_c)
                worst_c = fabs(d);
        }
    if (max_ratio_dev)
        *max_ratio_dev = worst_r;
    if (max_corr_diff)
        *max_corr_diff = worst_c;
}

void clef_ensemble_calibration(int n, const double *x, const double *err, const int *ok,
                               double truth, double *mean_pull, double *sd_pull,
                               double *coverage, int *used)
{
    double s = 0.0, s2 = 0.0;
    int k = 0, in = 0;
    for (int i = 0; i < n; i++) {
        if ((ok && !ok[i]) || !(err[i] > 0) || !isfinite(x[i]))
            continue;
        const double p = (x[i] - truth) / err[i];
        s += p;
        s2 += p * p;
        in += fabs(p) <= 1.0;
        k++;
    }
    *used = k;
    *mean_pull = k ? s / k : NAN;
    *sd_pull = k > 1 ? sqrt(fmax(0.0, (s2 - s * s / k) / (k - 1))) : NAN;
    *coverage = k ? (double)in / k : NAN;
}

static double bin_weight(int weighting, int l)
{
    return weighting == CLEF_BINS_FLAT ? 1.0 : l * (l + 1.0);
}

void clef_ensemble_pcl_bins(int nbins, const int *l_lo, const int *l_hi, int weighting,
                            const double *pcl, double *cb)
{
    for (int b = 0; b < nbins; b++) {
        double s = 0.0;
        for (int l = l_lo[b]; l <= l_hi[b]; l++)
            s += bin_weight(weighting, l) * pcl[l];
        cb[b] = s;
    }
}

void clef_ensemble_hivon_fl(const clef_ensemble_hivon *h, const double *fb, int fl_lmax,
                            double *fl)
{
    const int nb = h->nbins;
    if (h->smooth) {
        clef_ensemble_transfer_interp(nb, h->l_eff, fb, fl_lmax, fl);
        return;
    }
    int b = 0;
    for (int l = 0; l <= fl_lmax; l++) {
        while (b + 1 < nb && l > h->l_hi[b])
            b++;
        fl[l] = fb[b];
    }
}

int clef_ensemble_hivon_system(const clef_ensemble_hivon *h, double *a, double *den)
{
    const int nb = h->nbins, L = h->lmax;
    if (nb < 1 || L < 2 || !h->coupling || !h->filter || !h->cl)
        CLEF_FAIL(CLEF_EINVAL, "transfer function (Hivon et al.): no bins or no coupling");
    for (int b = 0; b < nb; b++) {
        if (h->l_lo[b] < 0 || h->l_hi[b] > L || h->l_hi[b] < h->l_lo[b])
            CLEF_FAIL(CLEF_EINVAL, "transfer function: bin %d (l %d-%d) outside 0..%d", b,
                      h->l_lo[b], h->l_hi[b], L);
        if (b && !(h->l_eff[b] > h->l_eff[b - 1]))
            CLEF_FAIL(CLEF_EINVAL, "transfer function: effective multipoles not increasing at "
                      "bin %d", b);
    }
    const size_t n1 = (size_t)L + 1;
    /* g_b(l') = sum_{l in b} M_ll' T_l' C_l': the bin sums of M's rows times
     * the filtered input, one pass over M (cost (lmax+1)^2). */
    double *g = calloc((size_t)nb * n1, sizeof *g), *e = calloc((size_t)nb, sizeof *e);
    double *phi = malloc(sizeof *phi * n1);
    int status = CLEF_OK;
    if (!g || !e || !phi) {
        status = clef_fail(CLEF_ENOMEM, "no memory for the transfer function (%d bins)", nb);
        goto done;
    }
    for (int b = 0; b < nb; b++) {
        double *gb = g + (size_t)b * n1;
        for (int l = h->l_lo[b]; l <= h->l_hi[b]; l++) {
            const double *row = h->coupling + (size_t)l * n1;
            const double pw = bin_weight(h->weighting, l);
            for (int k = 0; k <= L && k <= h->cl_lmax; k++)
                gb[k] += pw * row[k];
        }
        for (int k = 0; k <= L; k++)
            gb[k] *= k <= h->cl_lmax ? h->filter[k] * h->cl[k] : 0.0;
        double s = 0.0;
        for (int l = h->l_lo[b]; l <= h->l_hi[b] && l <= h->cl_lmax; l++)
            s += bin_weight(h->weighting, l) * h->filter[l] * h->cl[l];
        den[b] = h->wab * s;
        if (!(den[b] > 0)) {
            status = clef_fail(CLEF_EINVAL, "transfer function: the filtered input spectrum has "
                               "no power in bin %d (l %d-%d)", b, h->l_lo[b], h->l_hi[b]);
            goto done;
        }
    }
    for (int c = 0; c < nb; c++) {
        e[c] = 1.0;
        clef_ensemble_hivon_fl(h, e, L, phi);
        e[c] = 0.0;
        for (int b = 0; b < nb; b++) {
            const double *gb = g + (size_t)b * n1;
            double s = 0.0;
            for (int k = 0; k <= L; k++)
                s += gb[k] * phi[k];
            a[(size_t)b * nb + c] = s;
        }
    }
done:
    free(g);
    free(e);
    free(phi);
    return status;
}

/* One step of the iteration of Hivon et al. 2002, eq. 18:
 * F += (C - A F) / den. Returns the largest change in this step. */
static double hivon_step(int nb, const double *a, const double *den, const double *c, double *f,
                         double *tmp)
{
    double worst = 0.0;
    for (int b = 0; b < nb; b++) {
        double s = 0.0;
        for (int q = 0; q < nb; q++)
            s += a[(size_t)b * nb + q] * f[q];
        tmp[b] = (c[b] - s) / den[b];
    }
    for (int b = 0; b < nb; b++) {
        f[b] += tmp[b];
        worst = fabs(tmp[b]) > worst ? fabs(tmp[b]) : worst;
    }
    return worst;
}

/* k steps of Hivon et al.'s iteration on bin sums c (the map is linear). */
static void hivon_steps(int nb, const double *a, const double *den, const double *c, int k,
                        double *f, double *tmp, double *change)
{
    for (int b = 0; b < nb; b++)
        f[b] = c[b] / den[b];
    double worst = 0.0;
    for (int it = 0; it < k; it++) {
        worst = hivon_step(nb, a, den, c, f, tmp);
    }
    if (change)
        *change = worst;
}

int clef_ensemble_transfer_hivon(int nbins, const double *a, const double *den, const double *c,
                                 const double *cov_c, int max_iter, double tol, double *fb,
                                 double *fb_err, int *iters)
{
    const int nb = nbins;
    if (nb < 1)
        CLEF_FAIL(CLEF_EINVAL, "transfer function: no bins");
    if (tol <= 0)
        tol = 1e-10;
    if (max_iter <= 0)
        max_iter = 200;
    double *tmp = malloc(sizeof *tmp * (size_t)nb), *lmap = malloc(sizeof *lmap * nb * nb);
    double *unit = calloc((size_t)nb, sizeof *unit);
    if (!tmp || !lmap || !unit) {
        free(tmp);
        free(lmap);
        free(unit);
        CLEF_FAIL(CLEF_ENOMEM, "no memory for the transfer function (%d bins)", nb);
    }
    /* Steps one at a time until the change is below tol. */
    int k = 0;
    double change = INFINITY;
    for (int b = 0; b < nb; b++)
        fb[b] = c[b] / den[b];
    while (k < max_iter && !(change < tol)) {
        change = hivon_step(nb, a, den, c, fb, tmp);
        k++;
    }
    int status = CLEF_OK;
    if (!(change < tol)) {
        status = clef_fail(CLEF_ENUMERIC, "transfer function (Hivon et al. iteration): no "
                           "convergence in %d steps (last change %.3g)", k, change);
        goto done;
    }
    /* Columns of the linear map c -> F^(k): L e_q. */
    for (int q = 0; q < nb; q++) {
        unit[q] = 1.0;
        hivon_steps(nb, a, den, unit, k, tmp, lmap + (size_t)q * nb, NULL);
        unit[q] = 0.0;
        for (int b = 0; b < nb; b++) /* lmap row q holds column q of L: store L^T */
            lmap[(size_t)q * nb + b] = tmp[b];
    }
    for (int b = 0; b < nb; b++) {
        double v = 0.0;
        for (int i = 0; i < nb; i++)
            for (int j = 0; j < nb; j++)
                v += lmap[(size_t)i * nb + b] * cov_c[(size_t)i * nb + j] *
                     lmap[(size_t)j * nb + b];
        fb_err[b] = sqrt(fmax(v, 0.0));
    }
    if (iters)
        *iters = k;
done:
    free(tmp);
    free(lmap);
    free(unit);
    return status;
}
