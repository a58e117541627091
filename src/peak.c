/* First acoustic peak: a generalised least-squares fit of a peaked model to
 * the band powers around the highest one in a window (docs/peak.md).
 *
 * The practice of fitting a parabola (or a Gaussian) in l to the bins within
 * about 60-80 multipoles of the highest bin is common practice, used e.g. by
 * Page et al. 2003 (ApJS 148, 233) for WMAP's first peak.  Errors come from
 * the parameter covariance (X^T C^-1 X)^-1 of the fit, propagated to the
 * peak position and height to first order (delta method). */
#define _POSIX_C_SOURCE 200809L
#include "clef/peak.h"

#include <gsl/gsl_cdf.h>
#include <lapacke.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"

/* Levenberg-Marquardt limits for the Gaussian model (Marquardt 1963, SIAM
 * J. Appl. Math. 11, 431): iteration cap, step tolerance relative to the
 * parameters, and the damping at which no step can lower chi^2 any more. */
/* At most this many re-centring passes of the fit window. */
#define CLEF_PEAK_RECENTER 3
#define LM_MAX_ITER 500
#define LM_STEP_TOL 1e-12
#define LM_LAMBDA_MAX 1e16

void clef_peak_opts_default(clef_peak_opts *o)
{
    o->l_min = 100;
    o->l_max = 400;
    o->model = CLEF_PEAK_GAUSSIAN;
    o->half_width = 60;
    o->curv_nsigma = 2;
}

/* The bins of one fit, in scaled multipole x = (l - l0) / s so the normal
 * matrix stays well conditioned, and the Cholesky factor L of their
 * covariance (C = L L^T, row-major, lower). */
typedef struct fit_data {
    int n;
    double l0, s;
    double *x, *y, *chol;
} fit_data;

/* Solve L Z = V in place for `ncols` columns: whitening by the covariance. */
static int whiten(const fit_data *fd, double *v, int ncols)
{
    const lapack_int info = LAPACKE_dtrtrs(LAPACK_ROW_MAJOR, 'L', 'N', 'N', fd->n, ncols,
                                           fd->chol, fd->n, v, ncols);
    if (info != 0)
        CLEF_FAIL(CLEF_ENUMERIC, "peak fit: triangular solve failed (LAPACK dtrtrs info %d)",
                  (int)info);
    return CLEF_OK;
}

/* Given whitened design W (n x np) and data z: the normal matrix A = W^T W,
 * the solution p = A^-1 W^T z and the parameter covariance A^-1 in `pcov`.
 * A is first scaled to unit diagonal (a correlation-like matrix, so the
 * test does not depend on the parameters' units); when its reciprocal
 * condition number (LAPACK dpocon) is below NORMAL_RCOND_MIN the parameters
 * are not constrained by the data and CLEF_ENUMERIC is returned. */
#define NORMAL_RCOND_MIN 1e-12

static int normal_solve(const double *w, const double *z, int n, int np, double *p, double *pcov)
{
    double scale[4];
    for (int a = 0; a < np; a++) {
        p[a] = 0;
        for (int i = 0; i < n; i++)
            p[a] += w[i * np + a] * z[i];
        for (int b = 0; b < np; b++) {
            double sum = 0;
            for (int i = 0; i < n; i++)
                sum += w[i * np + a] * w[i * np + b];
            pcov[a * np + b] = sum;
        }
    }
    for (int a = 0; a < np; a++) {
        if (!(pcov[a * np + a] > 0))
            CLEF_FAIL(CLEF_ENUMERIC, "peak fit: parameter %d does not enter the model", a);
        scale[a] = 1 / sqrt(pcov[a * np + a]);
    }
    for (int a = 0; a < np; a++) {
        p[a] *= scale[a];
        for (int b = 0; b < np; b++)
            pcov[a * np + b] *= scale[a] * scale[b];
    }
    const double anorm = LAPACKE_dlansy(LAPACK_ROW_MAJOR, '1', 'L', np, pcov, np);
    double rcond = 0;
    lapack_int info = LAPACKE_dpotrf(LAPACK_ROW_MAJOR, 'L', np, pcov, np);
    if (info == 0)
        info = LAPACKE_dpocon(LAPACK_ROW_MAJOR, 'L', np, pcov, np, anorm, &rcond);
    if (info == 0 && !(rcond >= NORMAL_RCOND_MIN))
        CLEF_FAIL(CLEF_ENUMERIC, "peak fit: the parameters are not constrained (normal matrix "
                  "reciprocal condition %.3g)", rcond);
    if (info == 0)
        info = LAPACKE_dpotrs(LAPACK_ROW_MAJOR, 'L', np, 1, pcov, np, p, 1);
    if (info == 0)
        info = LAPACKE_dpotri(LAPACK_ROW_MAJOR, 'L', np, pcov, np);
    if (info != 0)
        CLEF_FAIL(CLEF_ENUMERIC, "peak fit: normal matrix not positive definite (LAPACK info %d)",
                  (int)info);
    for (int a = 0; a < np; a++) {
        p[a] *= scale[a];
        for (int b = 0; b <= a; b++)
            pcov[a * np + b] = pcov[b * np + a] = pcov[a * np + b] * scale[a] * scale[b];
    }
    return CLEF_OK;
}

/* sqrt(g^T S g) and g^T S h for a symmetric np x np matrix S. */
static double quad(const double *g, const double *sm, const double *h, int np)
{
    double sum = 0;
    for (int a = 0; a < np; a++)
        for (int b = 0; b < np; b++)
            sum += g[a] * sm[a * np + b] * h[b];
    return sum;
}

/* Parabola D = a + b x + c x^2 by GLS (Aitken 1935; e.g. Press et al.,
 * Numerical Recipes 3rd ed., section 15.4, with C^-1 weights).  p = (a, b,
 * c), pcov their covariance, chi2 the whitened residual norm. */
static int fit_parabola(const fit_data *fd, double *p, double *pcov, double *chi2)
{
    const int n = fd->n;
    double *w = malloc((size_t)n * 3 * sizeof *w);
    double *z = malloc((size_t)n * sizeof *z);
    int status = CLEF_OK;
    if (!w || !z) {
        status = clef_fail(CLEF_ENOMEM, "peak fit: out of memory for %d bins", n);
        goto fail;
    }
    for (int i = 0; i < n; i++) {
        w[i * 3 + 0] = 1;
        w[i * 3 + 1] = fd->x[i];
        w[i * 3 + 2] = fd->x[i] * fd->x[i];
        z[i] = fd->y[i];
    }
    CLEF_CHECK(whiten(fd, w, 3));
    CLEF_CHECK(whiten(fd, z, 1));
    CLEF_CHECK(normal_solve(w, z, n, 3, p, pcov));
    *chi2 = 0;
    for (int i = 0; i < n; i++) {
        const double r = z[i] - (w[i * 3] * p[0] + w[i * 3 + 1] * p[1] + w[i * 3 + 2] * p[2]);
        *chi2 += r * r;
    }
fail:
    free(w);
    free(z);
    return status;
}

/* The Gaussian D = D0 + A exp(-d^2 / 2 w^2), d = x - xp, rewritten with
 * the peak height H = D0 + A, the curvature at the peak kappa = A / w^2 and
 * q = 1 / w^2:
 *     D = H - kappa f(d, q),   f = (1 - exp(-q d^2 / 2)) / q = (d^2 / 2) g(t),
 *     t = q d^2 / 2,           g(t) = (1 - e^-t) / t.
 * f is analytic in q through 0, where it is the parabola H - kappa d^2 / 2:
 * the family contains the parabola as its limit w -> infinity, so the fit
 * has a minimum even when the data are no more peaked than a parabola (with
 * (D0, A, w) it would run off to w -> infinity there), and l_peak = xp and
 * D_peak = H are fitted parameters with their errors read off directly. */
static double gauss_g(double t) { return t == 0 ? 1 : -expm1(-t) / t; }

/* k(t) = (e^-t - g(t)) / t = sum_{n>=1} (-1)^n n t^(n-1) / (n+1)!, so that
 * df/dq = (d^2 / 2)^2 k(t); the series avoids the cancellation at small t. */
static double gauss_k(double t)
{
    if (fabs(t) < 1e-3)
        return -0.5 + t * (1.0 / 3 + t * (-1.0 / 8 + t / 30));
    return (exp(-t) - gauss_g(t)) / t;
}

/* Whitened residuals r = L^-1 (y - D) and Jacobian of D (whitened) at
 * p = (H, kappa, xp, q). */
static int gauss_eval(const fit_data *fd, const double *p, double *r, double *jac, double *chi2)
{
    for (int i = 0; i < fd->n; i++) {
        const double d = fd->x[i] - p[2], h = 0.5 * d * d, t = p[3] * h;
        r[i] = fd->y[i] - (p[0] - p[1] * h * gauss_g(t));
        if (jac) {
            jac[i * 4 + 0] = 1;
            jac[i * 4 + 1] = -h * gauss_g(t);
            jac[i * 4 + 2] = p[1] * d * exp(-t);
            jac[i * 4 + 3] = -p[1] * h * h * gauss_k(t);
        }
    }
    CLEF_TRY(whiten(fd, r, 1));
    if (jac)
        CLEF_TRY(whiten(fd, jac, 4));
    *chi2 = 0;
    for (int i = 0; i < fd->n; i++)
        *chi2 += r[i] * r[i];
    if (!isfinite(*chi2))
        *chi2 = INFINITY;
    return CLEF_OK;
}

/* Levenberg-Marquardt from the start p: each step solves
 * (J^T J + lambda diag(J^T J)) dp = J^T r in whitened quantities (Marquardt
 * 1963).  On return pcov = (J^T J)^-1 at the minimum and *converged says
 * whether the step tolerance was met. */
static int fit_gaussian(const fit_data *fd, double *p, double *pcov, double *chi2, int *converged)
{
    const int n = fd->n;
    double *r = malloc((size_t)n * sizeof *r), *jac = malloc((size_t)n * 4 * sizeof *jac);
    double *rt = malloc((size_t)n * sizeof *rt);
    int status = CLEF_OK;
    *converged = 0;
    if (!r || !jac || !rt) {
        status = clef_fail(CLEF_ENOMEM, "peak fit: out of memory for %d bins", n);
        goto fail;
    }
    CLEF_CHECK(gauss_eval(fd, p, r, jac, chi2));
    double lambda = 1e-3;
    for (int it = 0; it < LM_MAX_ITER && !*converged; it++) {
        double jtj[16], g[4], dp[4];
        for (int a = 0; a < 4; a++) {
            g[a] = 0;
            for (int i = 0; i < n; i++)
                g[a] += jac[i * 4 + a] * r[i];
            for (int b = 0; b < 4; b++) {
                double sum = 0;
                for (int i = 0; i < n; i++)
                    sum += jac[i * 4 + a] * jac[i * 4 + b];
                jtj[a * 4 + b] = sum;
            }
        }
        for (;;) {
            double m[16];
            memcpy(m, jtj, sizeof m);
            for (int a = 0; a < 4; a++)
                m[a * 4 + a] *= 1 + lambda;
            memcpy(dp, g, sizeof dp);
            lapack_int info = LAPACKE_dpotrf(LAPACK_ROW_MAJOR, 'L', 4, m, 4);
            if (info == 0)
                info = LAPACKE_dpotrs(LAPACK_ROW_MAJOR, 'L', 4, 1, m, 4, dp, 1);
            double trial[4], chi2_trial = INFINITY;
            for (int a = 0; a < 4; a++)
                trial[a] = p[a] + dp[a];
            if (info == 0)
                CLEF_CHECK(gauss_eval(fd, trial, rt, NULL, &chi2_trial));
            if (chi2_trial <= *chi2) {
                int small = 1;
                for (int a = 0; a < 4; a++)
                    small &= fabs(dp[a]) <= LM_STEP_TOL * (1 + fabs(p[a]));
                memcpy(p, trial, sizeof trial);
                CLEF_CHECK(gauss_eval(fd, p, r, jac, chi2));
                lambda = fmax(lambda / 10, 1e-12);
                *converged = small;
                break;
            }
            lambda *= 10;
            if (lambda > LM_LAMBDA_MAX) {
                /* No damped step lowers chi^2: a minimum to machine precision. */
                *converged = 1;
                break;
            }
        }
    }
    double z[4];
    CLEF_CHECK(gauss_eval(fd, p, r, jac, chi2));
    CLEF_CHECK(normal_solve(jac, r, n, 4, z, pcov));
fail:
    free(r);
    free(jac);
    free(rt);
    return status;
}

static void not_found(clef_peak_result *res, const char *fmt, ...) CLEF_PRINTF(2, 3);
static void not_found(clef_peak_result *res, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(res->reason, sizeof res->reason, fmt, ap);
    va_end(ap);
    res->found = 0;
    clef_log(CLEF_LOG_INFO, "first peak: none found: %s", res->reason);
}

static void result_init(clef_peak_result *r, int model)
{
    memset(r, 0, sizeof *r);
    r->model = model;
    r->l_peak = r->l_peak_err = r->d_peak = r->d_peak_err = r->corr = NAN;
    r->theta_deg = r->theta_deg_err = r->chi2 = r->p_value = r->curv_signif = NAN;
    r->bin_first = r->bin_last = -1;
}

/* Check the input and find the window [*w0, *w1] (table indices). */
static int check_input(const clef_bandpowers *bp, const clef_peak_opts *o, int *w0, int *w1)
{
    if (!bp || bp->nbins < 1 || !bp->l_eff || !bp->dl || !bp->dl_err)
        CLEF_FAIL(CLEF_EINVAL, "peak: empty band-power table");
    if (!(o->l_min < o->l_max) || !isfinite(o->l_min) || !isfinite(o->l_max))
        CLEF_FAIL(CLEF_EINVAL, "peak: window [%g, %g] is empty", o->l_min, o->l_max);
    if (!(o->half_width > 0) || !isfinite(o->half_width))
        CLEF_FAIL(CLEF_EINVAL, "peak: half width %g must be positive", o->half_width);
    if (!(o->curv_nsigma >= 0) || !isfinite(o->curv_nsigma))
        CLEF_FAIL(CLEF_EINVAL, "peak: curvature threshold %g sigma must be >= 0", o->curv_nsigma);
    if (o->model != CLEF_PEAK_PARABOLA && o->model != CLEF_PEAK_GAUSSIAN)
        CLEF_FAIL(CLEF_EINVAL, "peak: unknown model %d", o->model);
    *w0 = -1;
    *w1 = -2;
    for (int b = 0; b < bp->nbins; b++) {
        if (bp->l_eff[b] < o->l_min || bp->l_eff[b] > o->l_max)
            continue;
        if (*w0 < 0)
            *w0 = b;
        else if (b != *w1 + 1 || !(bp->l_eff[b] > bp->l_eff[*w1]))
            CLEF_FAIL(CLEF_EINVAL, "peak: bins are not in increasing l_eff (bin %d, l_eff %g)", b,
                      bp->l_eff[b]);
        *w1 = b;
        if (!isfinite(bp->dl[b]))
            CLEF_FAIL(CLEF_EINVAL, "peak: bin %d (l_eff %g) has a non-finite D", b, bp->l_eff[b]);
        const double var = bp->cov ? bp->cov[(size_t)b * (size_t)bp->nbins + (size_t)b]
                                   : bp->dl_err[b] * bp->dl_err[b];
        if (!(var > 0) || !isfinite(var))
            CLEF_FAIL(CLEF_EINVAL, "peak: bin %d (l_eff %g) has a non-positive or unknown error "
                      "(%s %g); the fit needs errors", b, bp->l_eff[b],
                      bp->cov ? "covariance diagonal" : "D error", bp->cov ? var : bp->dl_err[b]);
    }
    if (*w0 < 0)
        CLEF_FAIL(CLEF_EINVAL, "peak: no bin has l_eff in the window [%g, %g]", o->l_min, o->l_max);
    return CLEF_OK;
}

/* Fill fd with bins [b0, b1], centred on l0, scaled by s, and factor
 * their covariance (full block if the table has one, else diagonal). */
static int fit_data_make(fit_data *fd, const clef_bandpowers *bp, int b0, int b1, double l0,
                         double s)
{
    const int n = b1 - b0 + 1;
    fd->n = n;
    fd->l0 = l0;
    fd->s = s;
    fd->x = malloc((size_t)n * sizeof *fd->x);
    fd->y = malloc((size_t)n * sizeof *fd->y);
    fd->chol = calloc((size_t)n * (size_t)n, sizeof *fd->chol);
    if (!fd->x || !fd->y || !fd->chol)
        CLEF_FAIL(CLEF_ENOMEM, "peak fit: out of memory for %d bins", n);
    const size_t nb = (size_t)bp->nbins;
    for (int i = 0; i < n; i++) {
        fd->x[i] = (bp->l_eff[b0 + i] - l0) / s;
        fd->y[i] = bp->dl[b0 + i];
        for (int j = 0; j <= i; j++)
            fd->chol[i * n + j] = bp->cov ? bp->cov[(size_t)(b0 + i) * nb + (size_t)(b0 + j)]
                                 : (i == j ? bp->dl_err[b0 + i] * bp->dl_err[b0 + i] : 0);
    }
    const lapack_int info = LAPACKE_dpotrf(LAPACK_ROW_MAJOR, 'L', n, fd->chol, n);
    if (info != 0)
        CLEF_FAIL(CLEF_EINVAL, "peak: the covariance of bins %d-%d is not positive definite "
                  "(LAPACK dpotrf info %d)", b0, b1, (int)info);
    return CLEF_OK;
}

/* Peak of the parabola p = (a, b, c) in x: x_p = -b / 2c, D_p = a - b^2 / 4c,
 * with gradients for the delta method. */
static void parabola_peak(const double *p, double *xp, double *dp, double *gx, double *gd)
{
    *xp = -p[1] / (2 * p[2]);
    *dp = p[0] - p[1] * p[1] / (4 * p[2]);
    gx[0] = 0;
    gx[1] = -1 / (2 * p[2]);
    gx[2] = p[1] / (2 * p[2] * p[2]);
    gd[0] = 1;
    gd[1] = -p[1] / (2 * p[2]);
    gd[2] = p[1] * p[1] / (4 * p[2] * p[2]);
}

/* Fit the model to the bins within half_width of bin `top` (inside the
 * window w0..w1) and fill r. */
static int fit_at(const clef_bandpowers *bp, const clef_peak_opts *o, int top, int w0, int w1,
                  clef_peak_result *r)
{
    result_init(r, o->model);
    const double ltop = bp->l_eff[top];
    const double hw = o->half_width;
    int b0 = top, b1 = top;
    while (b0 > w0 && ltop - bp->l_eff[b0 - 1] <= hw)
        b0--;
    while (b1 < w1 && bp->l_eff[b1 + 1] - ltop <= hw)
        b1++;
    r->bin_first = b0;
    r->bin_last = b1;
    r->nbins_used = b1 - b0 + 1;
    const int need = o->model == CLEF_PEAK_GAUSSIAN ? 4 : 3;
    if (r->nbins_used < need) {
        not_found(r, "too few bins: %d within %g of the highest bin (l_eff %g); the %s fit "
                  "needs at least %d", r->nbins_used, hw, ltop,
                  o->model == CLEF_PEAK_GAUSSIAN ? "Gaussian" : "parabola", need);
        return CLEF_OK;
    }

    fit_data fd = {0};
    double pp[3], ppcov[9], chi2 = 0;
    int status = CLEF_OK;
    CLEF_CHECK(fit_data_make(&fd, bp, b0, b1, ltop, hw));
    status = fit_parabola(&fd, pp, ppcov, &chi2);
    if (status == CLEF_ENUMERIC) {
        status = CLEF_OK;
        not_found(r, "the parabola's parameters are not constrained by bins %d-%d (%s)", b0, b1,
                  clef_last_error());
        goto fail;
    }
    CLEF_CHECK(status);
    /* The peak is only defined when the curvature is negative, and its
     * delta-method error is only meaningful when c is well away from zero
     * compared with its error (the vertex -b/2c has no finite variance
     * otherwise); c / sigma_c does not depend on the scaling of x. */
    const double c_sig = pp[2] / sqrt(ppcov[8]);
    r->curv_signif = c_sig;
    if (pp[2] >= 0) {
        not_found(r, "the parabola through bins %d-%d is not concave (curvature %+.3g uK^2 per "
                  "l^2)", b0, b1, pp[2] / (fd.s * fd.s));
        goto fail;
    }
    if (c_sig > -o->curv_nsigma) {
        not_found(r, "curvature not significant: c / sigma_c = %.2f, above -%g", c_sig,
                  o->curv_nsigma);
        goto fail;
    }
    double xp, dpk, gx[4] = {0}, gd[4] = {0}, pcov[16];
    int np = 3;
    if (o->model == CLEF_PEAK_PARABOLA) {
        parabola_peak(pp, &xp, &dpk, gx, gd);
        memcpy(pcov, ppcov, sizeof ppcov);
    } else {
        /* Start from the parabola itself (q = 0). */
        double pg[4], g1[3], g2[3];
        parabola_peak(pp, &pg[2], &pg[0], g1, g2);
        pg[1] = -2 * pp[2];
        pg[3] = 0;
        int converged = 0;
        status = fit_gaussian(&fd, pg, pcov, &chi2, &converged);
        if (status == CLEF_ENUMERIC) {
            status = CLEF_OK;
            not_found(r, "the Gaussian's parameters are not constrained by bins %d-%d (%s); try "
                      "the parabola model", b0, b1, clef_last_error());
            goto fail;
        }
        CLEF_CHECK(status);
        if (!converged) {
            not_found(r, "the Gaussian fit did not converge in %d iterations", LM_MAX_ITER);
            goto fail;
        }
        /* Whether the data turn over was judged on the parabola above: the
         * Gaussian's extra shape parameter q is strongly correlated with
         * kappa over a +-half-width range, which widens sigma_kappa without
         * saying anything about the turnover. */
        if (!(pg[1] > 0)) {
            not_found(r, "the fitted Gaussian is not peaked (curvature at the top %+.3g uK^2 per "
                      "l^2)", -pg[1] / (fd.s * fd.s));
            goto fail;
        }
        if (pg[3] > 0)
            clef_log(CLEF_LOG_DEBUG, "first peak: Gaussian width w = %.4g", fd.s / sqrt(pg[3]));
        else
            clef_log(CLEF_LOG_INFO, "first peak: the Gaussian fit prefers 1/w^2 = %.3g <= 0 (sides "
                     "falling at least as fast as a parabola's); l_peak and D_peak are still its "
                     "vertex", pg[3] / (fd.s * fd.s));
        np = 4;
        xp = pg[2];
        dpk = pg[0];
        gx[2] = 1;
        gd[0] = 1;
    }
    const double lp = fd.l0 + fd.s * xp;
    if (lp < bp->l_eff[b0] || lp > bp->l_eff[b1]) {
        not_found(r, "the fitted peak l = %.1f lies outside the fitted range [%g, %g]", lp,
                  bp->l_eff[b0], bp->l_eff[b1]);
        goto fail;
    }
    const double var_x = quad(gx, pcov, gx, np), var_d = quad(gd, pcov, gd, np);
    r->found = 1;
    r->l_peak = lp;
    r->l_peak_err = fd.s * sqrt(var_x);
    r->d_peak = dpk;
    r->d_peak_err = sqrt(var_d);
    r->corr = quad(gx, pcov, gd, np) / sqrt(var_x * var_d);
    /* theta = 180 deg / l, sigma_theta = 180 deg sigma_l / l^2 */
    r->theta_deg = 180.0 / lp;
    r->theta_deg_err = 180.0 * r->l_peak_err / (lp * lp);
    r->chi2 = chi2;
    r->dof = fd.n - np;
    r->p_value = r->dof > 0 ? gsl_cdf_chisq_Q(chi2, r->dof) : NAN;
fail:
    free(fd.x);
    free(fd.y);
    free(fd.chol);
    return status;
}

int clef_peak_find(const clef_bandpowers *bp, const clef_peak_opts *o, clef_peak_result *r)
{
    if (!o || !r)
        CLEF_FAIL(CLEF_EINVAL, "peak: NULL options or result");
    result_init(r, o->model);
    int w0 = -1, w1 = -2;
    CLEF_TRY(check_input(bp, o, &w0, &w1));

    int top = w0;
    for (int b = w0; b <= w1; b++)
        if (bp->dl[b] > bp->dl[top])
            top = b;
    const double ltop = bp->l_eff[top];
    if (top == w0 || top == w1) {
        not_found(r, "the highest band power in the window [%g, %g] is at its %s edge (l_eff %g): "
                  "D does not turn over inside the window", o->l_min, o->l_max,
                  top == w0 ? "lower" : "upper", ltop);
        return CLEF_OK;
    }
    /* The fit window is centred on the highest bin, then re-centred on the
     * bin nearest the fitted peak until it stops moving (at most a few
     * passes): a single noisy highest bin then no longer decides which
     * bins enter the fit, which would add scatter the fit's own error does
     * not know about. */
    int center = top, visited[CLEF_PEAK_RECENTER + 1], nvisited = 0;
    clef_peak_result best;
    int have = 0;
    for (int pass = 0; pass <= CLEF_PEAK_RECENTER; pass++) {
        visited[nvisited++] = center;
        CLEF_TRY(fit_at(bp, o, center, w0, w1, r));
        if (!r->found)
            break;
        best = *r;
        have = 1;
        int near = w0;
        for (int b = w0; b <= w1; b++)
            if (fabs(bp->l_eff[b] - r->l_peak) < fabs(bp->l_eff[near] - r->l_peak))
                near = b;
        int seen = 0;
        for (int i = 0; i < nvisited; i++)
            seen |= visited[i] == near;
        if (seen || near == w0 || near == w1)
            break;
        center = near;
    }
    if (have)
        *r = best;
    else
        return CLEF_OK;
    if (r->curv_signif > -CLEF_PEAK_RELIABLE_SIGNIF)
        clef_log(CLEF_LOG_WARN, "first peak: the curvature is only %.1f sigma below zero; the quoted "
                 "errors may underestimate the scatter of l_peak (docs/peak.md)", -r->curv_signif);
    clef_log(CLEF_LOG_INFO, "first peak: l = %.2f +- %.2f, D = %.1f +- %.1f uK^2 (%s, %d bins)",
             r->l_peak, r->l_peak_err, r->d_peak, r->d_peak_err,
             r->model == CLEF_PEAK_GAUSSIAN ? "Gaussian" : "parabola", r->nbins_used);
    return CLEF_OK;
}

/* ---- the result as metadata items (docs/formats.md, "Peak keywords") --- */

static const char *const model_names[] = {"parabola", "gaussian"};

int clef_peak_to_meta(const clef_peak_result *r, clef_bandpowers *bp)
{
    if (!r || !bp)
        CLEF_FAIL(CLEF_EINVAL, "peak: NULL result or table");
    if (r->model != CLEF_PEAK_PARABOLA && r->model != CLEF_PEAK_GAUSSIAN)
        CLEF_FAIL(CLEF_EINVAL, "peak: unknown model %d", r->model);
    /* Drop the items of an earlier result so none is left stale. */
    int kept = 0;
    for (int i = 0; i < bp->nmeta; i++)
        if (strncmp(bp->meta[i].key, "PK_", 3))
            bp->meta[kept++] = bp->meta[i];
    bp->nmeta = kept;
    CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_FOUND", r->found ? 1 : 0, "1: first peak found, 0: none"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "PK_MODEL", model_names[r->model], "peak model fitted"));
    if (!r->found)
        CLEF_TRY(clef_bandpowers_meta_text(bp, "PK_WHY", r->reason, "why no peak was found"));
    const struct {
        const char *key;
        double v;
        const char *comment;
    } items[] = {
        {"PK_L", r->l_peak, "first peak multipole"},
        {"PK_LERR", r->l_peak_err, "1-sigma error of PK_L"},
        {"PK_D", r->d_peak, "[uK^2] D_l at the peak"},
        {"PK_DERR", r->d_peak_err, "[uK^2] 1-sigma error of PK_D"},
        {"PK_CORR", r->corr, "correlation of PK_L and PK_D"},
        {"PK_THETA", r->theta_deg, "[deg] angular scale 180 deg / PK_L"},
        {"PK_THERR", r->theta_deg_err, "[deg] 1-sigma error of PK_THETA"},
        {"PK_CHI2", r->chi2, "chi^2 of the peak fit"},
        {"PK_DOF", r->dof, "degrees of freedom of the peak fit"},
        {"PK_PVAL", r->p_value, "probability of a chi^2 at least PK_CHI2"},
    };
    if (isfinite(r->curv_signif))
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_CSIG", r->curv_signif,
                                             "parabola curvature / its error"));
    if (r->found)
        for (size_t i = 0; i < sizeof items / sizeof items[0]; i++)
            if (isfinite(items[i].v))
                CLEF_TRY(clef_bandpowers_meta_number(bp, items[i].key, items[i].v, items[i].comment));
    if (r->nbins_used > 0) {
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_NBIN", r->nbins_used, "bins in the peak fit"));
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_BIN1", r->bin_first, "first fitted bin (from 0)"));
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_BIN2", r->bin_last, "last fitted bin (from 0)"));
    }
    return CLEF_OK;
}

static double meta_double(const clef_bandpowers *bp, const char *key)
{
    const char *v = clef_bandpowers_meta_get(bp, key);
    char *end;
    const double d = v ? strtod(v, &end) : NAN;
    return v && end != v && !*end ? d : NAN;
}

int clef_peak_from_meta(const clef_bandpowers *bp, clef_peak_result *r)
{
    if (!bp || !r)
        CLEF_FAIL(CLEF_EINVAL, "peak: NULL table or result");
    const double found = meta_double(bp, "PK_FOUND");
    if (found != 0 && found != 1)
        CLEF_FAIL(CLEF_EINVAL, "peak: the table has no valid PK_FOUND keyword (no peak result recorded)");
    const char *model = clef_bandpowers_meta_get(bp, "PK_MODEL");
    int m = -1;
    for (int i = 0; i < 2; i++)
        if (model && !strcmp(model, model_names[i]))
            m = i;
    if (m < 0)
        CLEF_FAIL(CLEF_EINVAL, "peak: keyword PK_MODEL is '%s', expected 'parabola' or 'gaussian'",
                  model ? model : "(missing)");
    result_init(r, m);
    r->found = (int)found;
    const char *why = clef_bandpowers_meta_get(bp, "PK_WHY");
    if (why)
        snprintf(r->reason, sizeof r->reason, "%s", why);
    r->l_peak = meta_double(bp, "PK_L");
    r->l_peak_err = meta_double(bp, "PK_LERR");
    r->d_peak = meta_double(bp, "PK_D");
    r->d_peak_err = meta_double(bp, "PK_DERR");
    r->corr = meta_double(bp, "PK_CORR");
    r->theta_deg = meta_double(bp, "PK_THETA");
    r->theta_deg_err = meta_double(bp, "PK_THERR");
    r->chi2 = meta_double(bp, "PK_CHI2");
    r->p_value = meta_double(bp, "PK_PVAL");
    r->curv_signif = meta_double(bp, "PK_CSIG");
    const double dof = meta_double(bp, "PK_DOF"), nb = meta_double(bp, "PK_NBIN");
    const double b1 = meta_double(bp, "PK_BIN1"), b2 = meta_double(bp, "PK_BIN2");
    r->dof = isfinite(dof) ? (int)dof : 0;
    r->nbins_used = isfinite(nb) ? (int)nb : 0;
    r->bin_first = isfinite(b1) ? (int)b1 : -1;
    r->bin_last = isfinite(b2) ? (int)b2 : -1;
    if (r->found && !(isfinite(r->l_peak) && isfinite(r->l_peak_err)))
        CLEF_FAIL(CLEF_EINVAL, "peak: PK_FOUND = 1 but PK_L or PK_LERR is missing");
    return CLEF_OK;
}
