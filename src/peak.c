/* First acoustic peak: a local model of ln D fitted through the band-power
 * window functions (include/clef/peak.h, docs/peak.md).
 *
 * Why this model.  Fitting a parabola (or a Gaussian) to the bins around
 * the highest one is common practice (Page et al. 2003, ApJS 148, 233),
 * but the acoustic peak is not symmetric: the cubic term of its shape,
 * read through a fit window that is not centred on the peak and bins that
 * are averages over 10-50 multipoles, moves the vertex by 1-6 multipoles,
 * depending on the bins and the window (docs/peak.md has the figures).  A
 * local polynomial with free terms up to the cubic removes the asymmetry
 * bias (Fan & Gijbels 1996, Local Polynomial Modelling and Its
 * Applications, section 3.2: the bias of a degree-p fit comes from the
 * degree p+1 and p+2 terms); in ln D a Gaussian peak is exactly a
 * parabola, so the cubic in ln D is the Gaussian with a skewness term.
 * The remaining terms (degree 4..7) are what a wider window or wider bins
 * make the fit depend on; they are fitted too, under independent Gaussian
 * priors with the variances of the Taylor coefficients of a squared-
 * exponential Gaussian process of rms s and length the peak's Gaussian
 * width w (Rasmussen & Williams 2006, eq. 4.3; the k-th derivative of the
 * process at a point has variance s^2 (2k)! / (2^k k! w^(2k))), so they
 * do not bias the position; the quoted error is their sampling error plus
 * the estimated shift the prior causes (fit_at, "The error").  Each bin's
 * prediction is the model evaluated at every multipole and summed with the
 * bin's window, so the bin width and the bins' placement enter exactly.
 *
 * Fit: Levenberg-Marquardt (Marquardt 1963, SIAM J. Appl. Math. 11, 431)
 * on residuals whitened by the Cholesky factor of the band-power
 * covariance, with the prior as extra residuals (a maximum a posteriori
 * fit); errors by first-order propagation of the sandwich covariance of
 * the terms, the curvature test by that of the inverse Hessian. */
#define _POSIX_C_SOURCE 200809L
#include "clef/peak.h"

#include <gsl/gsl_cdf.h>
#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "peak_impl.h"

/* Set for the duration of a quiet call (the forward model of
 * src/geometry.c runs the estimator on many model spectra). */
static _Thread_local int quiet;

#define NP (CLEF_PEAK_DEGREE + 1)
#define NFREE 4            /* c0..c3 carry no prior */
#define MAX_PASSES 8       /* re-centring passes of the fit window */
#define LM_MAX_ITER 300
#define LM_STEP_TOL 1e-11
#define LM_LAMBDA_MAX 1e16
#define NORMAL_RCOND_MIN 1e-13
#define SCAN_POINTS 400    /* grid for the maximum of the fitted ln D before Newton */
#define CLEF_PEAK_DRAWS_MAX 100000
#define CLEF_PEAK_DRAWS_MIN 20 /* fewer draws with a peak: keep the first-order error */
#define Q_LO 0.15865525393145705 /* Phi(-1): the central 68.27% range */
#define Q_HI 0.84134474606854293

void clef_peak_opts_default(clef_peak_opts *o)
{
    memset(o, 0, sizeof *o);
    o->l_min = 100;
    o->l_max = 400;
    o->half_width = 0;
    o->curv_nsigma = 2;
    o->shape_prior = 0;
    o->draws = CLEF_PEAK_DRAWS;
}

static double shape_prior_of(const clef_peak_opts *o)
{
    return o->shape_prior > 0 ? o->shape_prior : CLEF_PEAK_SHAPE_PRIOR;
}

double clef_peak_half_width(const clef_bandpowers *bp, const clef_peak_opts *o)
{
    if (o->half_width > 0)
        return o->half_width;
    double widest = 1;
    for (int b = 0; bp && b < bp->nbins; b++)
        if (bp->l_eff[b] >= o->l_min && bp->l_eff[b] <= o->l_max &&
            bp->l_hi[b] - bp->l_lo[b] + 1 > widest)
            widest = bp->l_hi[b] - bp->l_lo[b] + 1;
    const double hw = CLEF_PEAK_HALF_WIDTH_BINS * widest;
    return hw > CLEF_PEAK_HALF_WIDTH_MIN ? hw : CLEF_PEAK_HALF_WIDTH_MIN;
}

/* Value and derivatives of the polynomial c in d. */
static double poly(const double *c, double d, int der)
{
    double s = 0;
    for (int k = CLEF_PEAK_DEGREE; k >= der; k--) {
        double ck = c[k];
        for (int j = 0; j < der; j++)
            ck *= k - j;
        s = s * d + ck;
    }
    return s;
}

/* One fit: bins b0..b1 (n of them) around centre lc, model on the
 * multipoles L0..L1. */
typedef struct fit {
    int n, b0, L0, L1, nl;
    double lc, hw;
    double *wm;    /* n x nl window rows */
    double *dpow;  /* nl x NP powers of d */
    double *chol;  /* n x n Cholesky factor of the covariance block */
    double *y;     /* n band powers */
    double prec[NP]; /* prior precision of each term (0 for the free ones) */
} fit;

static void fit_free(fit *f)
{
    free(f->wm);
    free(f->dpow);
    free(f->chol);
    free(f->y);
}

/* Small dense kernels for the fit's matrices (a few tens of rows at most),
 * row-major, lower triangle: plain loops rather than LAPACK, because at
 * these sizes a threaded BLAS spends far more in waking and synchronising
 * its threads than in the arithmetic (200 error draws took 13 s instead of
 * 0.5 s through LAPACKE on a loaded 2-core node).  Cholesky factorisation
 * a = L L^T (Golub & Van Loan 2013, Matrix Computations, 4th ed.,
 * algorithm 4.2.1) in place; 0, or j + 1 when the pivot of row j is not
 * positive. */
static int chol_lower(double *a, int n)
{
    for (int j = 0; j < n; j++) {
        double d = a[(size_t)j * n + j];
        for (int k = 0; k < j; k++)
            d -= a[(size_t)j * n + k] * a[(size_t)j * n + k];
        if (!(d > 0))
            return j + 1;
        d = sqrt(d);
        a[(size_t)j * n + j] = d;
        for (int i = j + 1; i < n; i++) {
            double v = a[(size_t)i * n + j];
            for (int k = 0; k < j; k++)
                v -= a[(size_t)i * n + k] * a[(size_t)j * n + k];
            a[(size_t)i * n + j] = v / d;
        }
    }
    return 0;
}

/* Solve L X = B (trans 0) or L^T X = B (trans 1) in place, B n x ncols. */
static void tri_solve(const double *l, int n, double *b, int ncols, int trans)
{
    for (int ii = 0; ii < n; ii++) {
        const int i = trans ? n - 1 - ii : ii;
        for (int c = 0; c < ncols; c++) {
            double v = b[(size_t)i * ncols + c];
            if (!trans)
                for (int k = 0; k < i; k++)
                    v -= l[(size_t)i * n + k] * b[(size_t)k * ncols + c];
            else
                for (int k = i + 1; k < n; k++)
                    v -= l[(size_t)k * n + i] * b[(size_t)k * ncols + c];
            b[(size_t)i * ncols + c] = v / l[(size_t)i * n + i];
        }
    }
}

/* Solve a x = v for symmetric positive definite a (destroyed); 0 or the
 * failing pivot as chol_lower. */
static int spd_solve(double *a, int n, double *v)
{
    const int info = chol_lower(a, n);
    if (!info) {
        tri_solve(a, n, v, 1, 0);
        tri_solve(a, n, v, 1, 1);
    }
    return info;
}

static int whiten(const fit *f, double *v, int ncols)
{
    tri_solve(f->chol, f->n, v, ncols, 0);
    return CLEF_OK;
}

/* Whitened residuals r (n), whitened Jacobian jac (n x NP, may be NULL) and
 * the objective chi^2 + prior at c; *chi2_data is the band-power part. */
static int evaluate(const fit *f, const double *c, double *r, double *jac, double *obj,
                    double *chi2_data, double *scratch)
{
    double *m = scratch; /* nl model values */
    for (int j = 0; j < f->nl; j++) {
        const double *dp = f->dpow + (size_t)j * NP;
        double s = 0;
        for (int k = 0; k < NP; k++)
            s += c[k] * dp[k];
        m[j] = s < 700 ? exp(s) : INFINITY;
    }
    for (int i = 0; i < f->n; i++) {
        const double *w = f->wm + (size_t)i * f->nl;
        double pred = 0, jk[NP] = {0};
        for (int j = 0; j < f->nl; j++) {
            const double v = w[j] * m[j];
            pred += v;
            if (jac) {
                const double *dp = f->dpow + (size_t)j * NP;
                for (int k = 0; k < NP; k++)
                    jk[k] += v * dp[k];
            }
        }
        r[i] = f->y[i] - pred;
        if (jac)
            memcpy(jac + (size_t)i * NP, jk, sizeof jk);
    }
    CLEF_TRY(whiten(f, r, 1));
    if (jac)
        CLEF_TRY(whiten(f, jac, NP));
    double s = 0;
    for (int i = 0; i < f->n; i++)
        s += r[i] * r[i];
    *chi2_data = isfinite(s) ? s : INFINITY;
    for (int k = 0; k < NP; k++)
        s += f->prec[k] * c[k] * c[k];
    *obj = isfinite(s) ? s : INFINITY;
    return CLEF_OK;
}

/* A = J^T J + diag(prec), g = J^T r - prec c. */
static void normal_eq(const fit *f, const double *jac, const double *r, const double *c,
                      double *a, double *g)
{
    for (int p = 0; p < NP; p++) {
        double sg = 0;
        for (int i = 0; i < f->n; i++)
            sg += jac[(size_t)i * NP + p] * r[i];
        g[p] = sg - f->prec[p] * c[p];
        for (int q = 0; q <= p; q++) {
            double s = 0;
            for (int i = 0; i < f->n; i++)
                s += jac[(size_t)i * NP + p] * jac[(size_t)i * NP + q];
            a[p * NP + q] = a[q * NP + p] = s + (p == q ? f->prec[p] : 0);
        }
    }
}

/* Invert the symmetric positive definite m x m matrix a (scaled to unit
 * diagonal first; CLEF_ENUMERIC when its reciprocal condition is below
 * NORMAL_RCOND_MIN: the terms are not constrained). */
static int spd_inverse(const double *a, int m, double *inv)
{
    double scale[NP];
    for (int p = 0; p < m; p++) {
        if (!(a[p * m + p] > 0))
            CLEF_FAIL(CLEF_ENUMERIC, "peak fit: term %d does not enter the model", p);
        scale[p] = 1 / sqrt(a[p * m + p]);
    }
    for (int p = 0; p < m; p++)
        for (int q = 0; q < m; q++)
            inv[p * m + q] = a[p * m + q] * scale[p] * scale[q];
    /* The reciprocal condition in the 1-norm, 1 / (|A|_1 |A^-1|_1), exactly
     * (the quantity LAPACK's dpocon estimates). */
    double l[NP * NP], anorm = 0, inorm = 0;
    memcpy(l, inv, (size_t)m * m * sizeof *l);
    for (int q = 0; q < m; q++) {
        double col = 0;
        for (int p = 0; p < m; p++)
            col += fabs(inv[p * m + q]);
        anorm = col > anorm ? col : anorm;
    }
    const int info = chol_lower(l, m);
    if (info != 0)
        CLEF_FAIL(CLEF_ENUMERIC, "peak fit: normal matrix not positive definite (pivot %d)", info);
    for (int p = 0; p < m; p++)
        for (int q = 0; q < m; q++)
            inv[p * m + q] = p == q;
    tri_solve(l, m, inv, m, 0);
    tri_solve(l, m, inv, m, 1);
    for (int q = 0; q < m; q++) {
        double col = 0;
        for (int p = 0; p < m; p++)
            col += fabs(inv[p * m + q]);
        inorm = col > inorm ? col : inorm;
    }
    const double rcond = 1 / (anorm * inorm);
    if (!(rcond >= NORMAL_RCOND_MIN))
        CLEF_FAIL(CLEF_ENUMERIC, "peak fit: the terms are not constrained (reciprocal condition "
                  "%.3g)", rcond);
    for (int p = 0; p < m; p++)
        for (int q = 0; q <= p; q++)
            inv[p * m + q] = inv[q * m + p] = inv[p * m + q] * scale[p] * scale[q];
    return CLEF_OK;
}

/* Levenberg-Marquardt from c; on return cov = inverse Hessian, *converged
 * whether it stopped on the step tolerance (or on a minimum to machine
 * precision). */
static int lm(const fit *f, double *c, double *cov, double *chi2_data,
              int *converged)
{
    const int n = f->n;
    double *r = malloc((size_t)n * sizeof *r), *rt = malloc((size_t)n * sizeof *rt);
    double *jac = malloc((size_t)n * NP * sizeof *jac);
    double *scratch = malloc((size_t)f->nl * sizeof *scratch);
    int status = CLEF_OK;
    *converged = 0;
    if (!r || !rt || !jac || !scratch) {
        status = clef_fail(CLEF_ENOMEM, "peak fit: out of memory for %d bins", n);
        goto fail;
    }
    double obj, a[NP * NP], g[NP], lambda = 1e-3;
    CLEF_CHECK(evaluate(f, c, r, jac, &obj, chi2_data, scratch));
    if (!isfinite(obj)) {
        status = clef_fail(CLEF_ENUMERIC, "peak fit: the starting model overflows");
        goto fail;
    }
    for (int it = 0; it < LM_MAX_ITER && !*converged; it++) {
        normal_eq(f, jac, r, c, a, g);
        for (;;) {
            double m[NP * NP], dc[NP], trial[NP], obj_t, chi2_t;
            memcpy(m, a, sizeof m);
            for (int p = 0; p < NP; p++)
                m[p * NP + p] *= 1 + lambda;
            memcpy(dc, g, sizeof dc);
            const int info = spd_solve(m, NP, dc);
            obj_t = INFINITY;
            for (int p = 0; p < NP; p++)
                trial[p] = c[p] + dc[p];
            if (info == 0)
                CLEF_CHECK(evaluate(f, trial, rt, NULL, &obj_t, &chi2_t, scratch));
            if (obj_t <= obj) {
                int small = 1;
                for (int p = 0; p < NP; p++)
                    small &= fabs(dc[p]) <= LM_STEP_TOL * (1 + fabs(c[p]));
                memcpy(c, trial, sizeof trial);
                CLEF_CHECK(evaluate(f, c, r, jac, &obj, chi2_data, scratch));
                lambda = fmax(lambda / 10, 1e-12);
                *converged = small;
                break;
            }
            lambda *= 10;
            if (lambda > LM_LAMBDA_MAX) {
                *converged = 1; /* no damped step lowers the objective */
                break;
            }
        }
    }
    normal_eq(f, jac, r, c, a, g);
    CLEF_CHECK(spd_inverse(a, NP, cov));
fail:
    free(r);
    free(rt);
    free(jac);
    free(scratch);
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
    if (!quiet)
        clef_log(CLEF_LOG_INFO, "first peak: none found: %s", res->reason);
}

static void result_init(clef_peak_result *r)
{
    memset(r, 0, sizeof *r);
    r->l_peak = r->l_peak_err = r->l_peak_err_stat = r->l_peak_err_shape = NAN;
    r->l_peak_err_lin = NAN;
    r->d_peak = r->d_peak_err = r->corr = r->width = NAN;
    r->theta_deg = r->theta_deg_err = r->chi2 = r->p_value = r->curv_signif = NAN;
    r->half_width = r->shape_prior = NAN;
    r->bin_first = r->bin_last = -1;
}

/* Check the input and find the search window [*w0, *w1] (table indices). */
static int check_input(const clef_bandpowers *bp, const clef_peak_opts *o, int *w0, int *w1)
{
    if (!bp || bp->nbins < 1 || !bp->l_eff || !bp->dl || !bp->dl_err || !bp->l_lo || !bp->l_hi)
        CLEF_FAIL(CLEF_EINVAL, "peak: empty band-power table");
    if (!(o->l_min < o->l_max) || !isfinite(o->l_min) || !isfinite(o->l_max))
        CLEF_FAIL(CLEF_EINVAL, "peak: window [%g, %g] is empty", o->l_min, o->l_max);
    if (!(o->half_width >= 0) || !isfinite(o->half_width))
        CLEF_FAIL(CLEF_EINVAL, "peak: half width %g must be positive (or 0: automatic)",
                  o->half_width);
    if (!(o->curv_nsigma >= 0) || !isfinite(o->curv_nsigma))
        CLEF_FAIL(CLEF_EINVAL, "peak: curvature threshold %g sigma must be >= 0", o->curv_nsigma);
    if (!(o->shape_prior >= 0) || !isfinite(o->shape_prior))
        CLEF_FAIL(CLEF_EINVAL, "peak: shape prior %g must be positive (or 0: default)",
                  o->shape_prior);
    if (o->draws < 0 || o->draws > CLEF_PEAK_DRAWS_MAX)
        CLEF_FAIL(CLEF_EINVAL, "peak: %d error draws: give 0 (first-order errors only) to %d",
                  o->draws, CLEF_PEAK_DRAWS_MAX);
    if (bp->win && bp->win_lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "peak: the table's windows have lmax %d", bp->win_lmax);
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
        if (bp->win && bp->l_hi[b] > bp->win_lmax)
            CLEF_FAIL(CLEF_EINVAL, "peak: the table's window functions stop at l = %d, below the "
                      "end of bin %d (l = %d)", bp->win_lmax, b, bp->l_hi[b]);
    }
    if (*w0 < 0)
        CLEF_FAIL(CLEF_EINVAL, "peak: no bin has l_eff in the window [%g, %g]", o->l_min, o->l_max);
    return CLEF_OK;
}

static int windows_kind(const clef_bandpowers *bp, int b0, int b1)
{
    if (bp->win)
        return CLEF_PEAK_WIN_TABLE;
    for (int b = b0; b <= b1; b++)
        if (bp->l_hi[b] > bp->l_lo[b])
            return CLEF_PEAK_WIN_TOPHAT;
    return CLEF_PEAK_WIN_POINT;
}

/* Fill the fit for bins b0..b1 around lc: windows, powers of d, covariance. */
static int fit_make(fit *f, const clef_bandpowers *bp, int b0, int b1, double lc, double hw)
{
    memset(f, 0, sizeof *f);
    const int n = b1 - b0 + 1, kind = windows_kind(bp, b0, b1);
    f->n = n;
    f->b0 = b0;
    f->lc = lc;
    f->hw = hw;
    if (kind == CLEF_PEAK_WIN_POINT) {
        f->L0 = 0;
        f->L1 = n - 1; /* one "multipole" per bin, at its l_eff */
    } else {
        f->L0 = bp->l_lo[b0];
        f->L1 = bp->l_hi[b1];
        for (int b = b0; b <= b1; b++) {
            f->L0 = bp->l_lo[b] < f->L0 ? bp->l_lo[b] : f->L0;
            f->L1 = bp->l_hi[b] > f->L1 ? bp->l_hi[b] : f->L1;
        }
    }
    f->nl = f->L1 - f->L0 + 1;
    f->wm = calloc((size_t)n * (size_t)f->nl, sizeof *f->wm);
    f->dpow = malloc((size_t)f->nl * NP * sizeof *f->dpow);
    f->chol = calloc((size_t)n * (size_t)n, sizeof *f->chol);
    f->y = malloc((size_t)n * sizeof *f->y);
    if (!f->wm || !f->dpow || !f->chol || !f->y)
        CLEF_FAIL(CLEF_ENOMEM, "peak fit: out of memory for %d bins over %d multipoles", n, f->nl);
    for (int j = 0; j < f->nl; j++) {
        const double l = kind == CLEF_PEAK_WIN_POINT ? bp->l_eff[b0 + j] : f->L0 + j;
        const double d = (l - lc) / hw;
        double p = 1;
        for (int k = 0; k < NP; k++, p *= d)
            f->dpow[(size_t)j * NP + k] = p;
    }
    const size_t nb = (size_t)bp->nbins, wl = (size_t)bp->win_lmax + 1;
    for (int i = 0; i < n; i++) {
        const int b = b0 + i;
        double *w = f->wm + (size_t)i * f->nl;
        if (kind == CLEF_PEAK_WIN_TABLE) {
            /* Multipoles outside the fitted bins are left out: the windows of
             * decoupled band powers sum to zero over every other bin (K^-1 P M
             * T Q = 1), so a D_l that is flat across a bin contributes nothing
             * there, and the model is only meant to hold near the peak. */
            for (int l = f->L0; l <= f->L1; l++)
                w[l - f->L0] = bp->win[(size_t)b * wl + (size_t)l];
        } else if (kind == CLEF_PEAK_WIN_TOPHAT) {
            const int nm = bp->l_hi[b] - bp->l_lo[b] + 1;
            for (int l = bp->l_lo[b]; l <= bp->l_hi[b]; l++)
                w[l - f->L0] = 1.0 / nm;
        } else {
            w[i] = 1;
        }
        f->y[i] = bp->dl[b];
        for (int j = 0; j <= i; j++)
            f->chol[i * n + j] = bp->cov ? bp->cov[(size_t)b * nb + (size_t)(b0 + j)]
                                 : (i == j ? bp->dl_err[b] * bp->dl_err[b] : 0);
    }
    const int info = chol_lower(f->chol, n);
    if (info != 0)
        CLEF_FAIL(CLEF_EINVAL, "peak: the covariance of bins %d-%d is not positive definite "
                  "(pivot of bin %d)", b0, b1, b0 + info - 1);
    return CLEF_OK;
}

/* Starting terms: weighted least squares of ln D on 1, d, d^2 at l_eff with
 * weights (D / sigma)^2 (the errors of ln D), over the bins with D > 0.
 * Returns 0 when fewer than three bins are positive. */
static int start_terms(const fit *f, const clef_bandpowers *bp, double *c)
{
    double a[9] = {0}, v[3] = {0};
    int npos = 0;
    for (int i = 0; i < f->n; i++) {
        const int b = f->b0 + i;
        if (!(bp->dl[b] > 0))
            continue;
        npos++;
        const double d = (bp->l_eff[b] - f->lc) / f->hw;
        const double ph[3] = {1, d, d * d}, s = bp->dl[b] / bp->dl_err[b];
        const double wgt = s * s, ly = log(bp->dl[b]);
        for (int p = 0; p < 3; p++) {
            v[p] += wgt * ph[p] * ly;
            for (int q = 0; q < 3; q++)
                a[p * 3 + q] += wgt * ph[p] * ph[q];
        }
    }
    memset(c, 0, NP * sizeof *c);
    if (npos < 3 || spd_solve(a, 3, v) != 0)
        return 0;
    memcpy(c, v, sizeof v);
    return 1;
}

/* Maximum of the fitted ln D over [xa, xb] (units of d): grid, then Newton. */
static double poly_max(const double *c, double xa, double xb)
{
    double bx = xa, bv = -INFINITY;
    for (int k = 0; k <= SCAN_POINTS; k++) {
        const double x = xa + (xb - xa) * k / SCAN_POINTS, v = poly(c, x, 0);
        if (v > bv) {
            bv = v;
            bx = x;
        }
    }
    for (int it = 0; it < 50; it++) {
        const double d2 = poly(c, bx, 2);
        if (!(d2 < 0))
            break;
        const double step = poly(c, bx, 1) / d2;
        bx -= step;
        if (fabs(step) < 1e-14)
            break;
    }
    return bx;
}

/* The fit's first-order response, for the parametric draws: the fitted
 * bins b0..b0+n-1, the model's prediction for them and the response a of
 * l_peak to their band powers, d l_peak = sum_i a_i dD_i. */
typedef struct lin_resp {
    int b0, n;
    double *pred, *a;
} lin_resp;

static void lin_resp_free(lin_resp *lr)
{
    free(lr->pred);
    free(lr->a);
    lr->pred = lr->a = NULL;
    lr->n = 0;
}

/* Prediction and response of a found fit.  The maximum a posteriori terms
 * solve J^T C^-1 (y - m(c)) = P c; to first order in the data, dc = S J^T
 * C^-1 dy with S = (F + P)^-1, so d l_peak = hw g^T S J^T C^-1 dy: with
 * the whitened Jacobian Jw = L^-1 J, a = L^-T (hw Jw S g).  Its variance
 * under the covariance C is hw^2 g^T S F S g, the first-order error. */
static int lin_resp_fill(const fit *f, const double *c, const double *sg, lin_resp *lr)
{
    const int n = f->n;
    lin_resp_free(lr);
    lr->b0 = f->b0;
    lr->pred = malloc((size_t)n * sizeof *lr->pred);
    lr->a = malloc((size_t)n * sizeof *lr->a);
    double *r = malloc((size_t)n * sizeof *r), *jac = malloc((size_t)n * NP * sizeof *jac);
    double *scratch = malloc((size_t)f->nl * sizeof *scratch), obj, chi2;
    int status = CLEF_OK;
    if (!lr->pred || !lr->a || !r || !jac || !scratch) {
        status = clef_fail(CLEF_ENOMEM, "peak: out of memory for the error draws");
        goto fail;
    }
    lr->n = n;
    CLEF_CHECK(evaluate(f, c, r, jac, &obj, &chi2, scratch));
    for (int i = 0; i < n; i++) {
        double lrv = 0, u = 0; /* (L r)_i: the unwhitened residual */
        for (int j = 0; j <= i; j++)
            lrv += f->chol[(size_t)i * n + j] * r[j];
        lr->pred[i] = f->y[i] - lrv;
        for (int k = 0; k < NP; k++)
            u += jac[(size_t)i * NP + k] * sg[k];
        lr->a[i] = f->hw * u;
    }
    tri_solve(f->chol, n, lr->a, 1, 1);
fail:
    free(r);
    free(jac);
    free(scratch);
    if (status != CLEF_OK)
        lin_resp_free(lr);
    return status;
}

/* Fit the bins within hw of lc and fill r (found or a reason); lr (may be
 * NULL) receives the first-order response of a found fit. */
static int fit_at(const clef_bandpowers *bp, const clef_peak_opts *o, double lc, double hw,
                  int w0, int w1, clef_peak_result *r, lin_resp *lr)
{
    result_init(r);
    r->half_width = hw;
    r->shape_prior = shape_prior_of(o);
    int b0 = -1, b1 = -2;
    for (int b = w0; b <= w1; b++)
        if (fabs(bp->l_eff[b] - lc) <= hw) {
            if (b0 < 0)
                b0 = b;
            b1 = b;
        }
    r->bin_first = b0;
    r->bin_last = b1;
    r->nbins_used = b1 - b0 + 1;
    r->windows = windows_kind(bp, b0 < 0 ? w0 : b0, b0 < 0 ? w0 : b1);
    if (r->nbins_used < CLEF_PEAK_MIN_BINS) {
        not_found(r, "too few bins: %d within %g of l = %.1f; the fit needs at least %d (widen "
                  "the half width)", r->nbins_used > 0 ? r->nbins_used : 0, hw, lc,
                  CLEF_PEAK_MIN_BINS);
        return CLEF_OK;
    }
    fit f;
    int status = fit_make(&f, bp, b0, b1, lc, hw);
    double c[NP], cov[NP * NP], chi2 = 0;
    int converged = 0;
    if (status != CLEF_OK)
        goto fail;
    if (!start_terms(&f, bp, c) || !(c[2] < 0)) {
        not_found(r, "ln D over bins %d-%d is not concave: D does not turn over there", b0, b1);
        goto fail;
    }
    /* Prior of the terms of degree >= 4: the Taylor coefficients c_k =
     * f^(k) / k! of a squared-exponential process of rms s and length w
     * have variance s^2 (2k)! / (2^k (k!)^3 w^(2k)); w, in units of d, is
     * the Gaussian width of the starting parabola in ln D, 1 / sqrt(-2 c2). */
    {
        const double wd = 1 / sqrt(-2 * c[2]), s = shape_prior_of(o);
        double f2k = 40320, fk = 24; /* (2k)! and k! at k = 4 */
        for (int k = 0; k < NP; k++)
            f.prec[k] = 0;
        for (int k = NFREE; k < NP; k++) {
            if (k > NFREE) {
                f2k *= (2.0 * k - 1) * (2.0 * k);
                fk *= k;
            }
            const double var = s * s * f2k / (pow(2, k) * fk * fk * fk) / pow(wd, 2 * k);
            f.prec[k] = 1 / var;
        }
    }
    status = lm(&f, c, cov, &chi2, &converged);
    if (status == CLEF_ENUMERIC) {
        status = CLEF_OK;
        not_found(r, "the fit over bins %d-%d failed (%s)", b0, b1, clef_last_error());
        goto fail;
    }
    if (status != CLEF_OK)
        goto fail;
    if (!converged) {
        not_found(r, "the fit over bins %d-%d did not converge in %d iterations", b0, b1,
                  LM_MAX_ITER);
        goto fail;
    }
    const double xa = (bp->l_eff[b0] - lc) / hw, xb = (bp->l_eff[b1] - lc) / hw;
    const double x = poly_max(c, xa, xb), d2 = poly(c, x, 2);
    /* Curvature of ln D at the maximum and its error (the maximum's own
     * shift does not enter at first order). */
    double hk[NP], gk[NP], ek[NP], p = 1, pm1 = 0, pm2 = 0;
    for (int k = 0; k < NP; k++) {
        hk[k] = k >= 2 ? k * (k - 1.0) * pm2 : 0;
        gk[k] = k >= 1 ? -k * pm1 / d2 : 0; /* d x / d c_k from P'(x) = 0 */
        ek[k] = p;                          /* d ln D(x) / d c_k */
        pm2 = pm1;
        pm1 = p;
        p *= x;
    }
    double var_h = 0, var_x = 0, var_e = 0, cov_xe = 0;
    for (int a = 0; a < NP; a++)
        for (int b = 0; b < NP; b++) {
            var_h += hk[a] * cov[a * NP + b] * hk[b];
            var_x += gk[a] * cov[a * NP + b] * gk[b];
            var_e += ek[a] * cov[a * NP + b] * ek[b];
            cov_xe += gk[a] * cov[a * NP + b] * ek[b];
        }
    r->curv_signif = d2 / sqrt(var_h);
    if (!(d2 < 0)) {
        not_found(r, "the fitted ln D over bins %d-%d is not concave at its maximum", b0, b1);
        goto fail;
    }
    if (r->curv_signif > -o->curv_nsigma) {
        not_found(r, "curvature not significant: %.2f sigma below zero, fewer than %g",
                  -r->curv_signif, o->curv_nsigma);
        goto fail;
    }
    const double lp = lc + hw * x;
    if (!(x > xa && x < xb)) {
        not_found(r, "the fitted maximum l = %.1f is not inside the fitted range (%g, %g)", lp,
                  bp->l_eff[b0], bp->l_eff[b1]);
        goto fail;
    }
    /* The error of l_peak (docs/peak.md, "Errors").  The inverse Hessian S
     * = (F + P)^-1 (F = J^T C^-1 J, P = diag(prec)) is the posterior
     * covariance; it splits exactly as S = S F S + S P S: the sampling
     * covariance of the maximum a posteriori terms (the "sandwich", Ruppert,
     * Wand & Carroll 2003, Semiparametric Regression, section 6.4) plus the
     * square of their shrinkage bias -S P c averaged over the prior (E[c
     * c^T] = P^-1).  The prior is broad on purpose (a factor e over one
     * peak width) so that it does not pull the peak; but then its average
     * bias is far above the bias of any smooth spectrum, and quoting S in
     * full over-covered (77-90% for 68%).  The bias is instead estimated
     * with the fitted terms in place of the prior average: shape =
     * |g^T S P c| (Fan & Gijbels 1996, section 4.2: plug-in bias of a local
     * polynomial), and err^2 = g^T S F S g + shape^2. */
    double sg[NP], var_samp = var_x, bias = 0;
    for (int a = 0; a < NP; a++) {
        sg[a] = 0;
        for (int b = 0; b < NP; b++)
            sg[a] += gk[b] * cov[b * NP + a];
    }
    for (int k = 0; k < NP; k++) {
        var_samp -= f.prec[k] * sg[k] * sg[k];
        bias -= sg[k] * f.prec[k] * c[k];
    }
    if (!(var_samp > 0))
        var_samp = 0;
    const double dp = exp(poly(c, x, 0));
    if (lr)
        CLEF_CHECK(lin_resp_fill(&f, c, sg, lr));
    r->found = 1;
    r->l_peak = lp;
    r->l_peak_err_lin = hw * sqrt(var_samp);
    r->l_peak_err_stat = r->l_peak_err_lin;
    r->l_peak_err_shape = hw * fabs(bias);
    r->l_peak_err = hypot(r->l_peak_err_stat, r->l_peak_err_shape);
    r->d_peak = dp;
    r->d_peak_err = dp * sqrt(var_e);
    r->corr = cov_xe / sqrt(var_x * var_e);
    r->width = hw / sqrt(-d2);
    r->theta_deg = 180.0 / lp;
    r->theta_deg_err = 180.0 * r->l_peak_err / (lp * lp);
    r->chi2 = chi2;
    r->dof = f.n - NFREE;
    r->p_value = r->dof > 0 ? gsl_cdf_chisq_Q(chi2, r->dof) : NAN;
fail:
    fit_free(&f);
    return status;
}

/* The whole procedure on one table: start at the highest bin of the
 * window, then re-centre on the fitted peak until the set of fitted bins
 * and the centre stop changing, so a single noisy highest bin does not
 * decide which bins enter.  lr (may be NULL) receives the last fit's
 * first-order response. */
static int search(const clef_bandpowers *bp, const clef_peak_opts *o, double hw, int w0, int w1,
                  clef_peak_result *r, lin_resp *lr)
{
    int top = w0;
    for (int b = w0; b <= w1; b++)
        if (bp->dl[b] > bp->dl[top])
            top = b;
    if (top == w0 || top == w1) {
        result_init(r);
        r->half_width = hw;
        r->shape_prior = shape_prior_of(o);
        r->windows = windows_kind(bp, w0, w1);
        not_found(r, "the highest band power in the window [%g, %g] is at its %s edge (l_eff %g): "
                  "D does not turn over inside the window", o->l_min, o->l_max,
                  top == w0 ? "lower" : "upper", bp->l_eff[top]);
        return CLEF_OK;
    }
    double lc = bp->l_eff[top];
    int last0 = -1, last1 = -1;
    for (int pass = 0; pass < MAX_PASSES; pass++) {
        CLEF_TRY(fit_at(bp, o, lc, hw, w0, w1, r, lr));
        if (!r->found)
            break;
        const int same = r->bin_first == last0 && r->bin_last == last1;
        const double moved = fabs(r->l_peak - lc);
        last0 = r->bin_first;
        last1 = r->bin_last;
        lc = r->l_peak;
        if (same && moved < 1e-3 * hw)
            break;
    }
    return CLEF_OK;
}

static int cmp_double(const void *a, const void *b)
{
    const double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

/* Quantile p of the sorted v[0..n-1], linear between order statistics
 * (Hyndman & Fan 1996, Am. Stat. 50, 361, definition 7). */
static double quantile(const double *v, int n, double p)
{
    const double h = p * (n - 1);
    const int i = (int)h;
    return i + 1 < n ? v[i] + (h - i) * (v[i + 1] - v[i]) : v[n - 1];
}

/* Y = beta X + R over the draws: beta the Theil-Sen slope, the median of
 * the pairwise slopes (Sen 1968, JASA 63, 1379; robust to the few draws
 * whose refit lands far away; beyond 2000 draws over the pairs of draws
 * at most 1000 apart in the sequence, which the estimator allows: it is
 * the median over any fixed set of pairs), and *sr half the central 68%
 * range of the residuals R. */
static int split_response(const double *xs, const double *ys, int n, double *beta, double *sr)
{
    const int reach = n - 1 < 1000 ? n - 1 : 1000;
    const size_t np = (size_t)n * (size_t)reach;
    double *sl = malloc((np > (size_t)n ? np : (size_t)n) * sizeof *sl);
    if (!sl)
        CLEF_FAIL(CLEF_ENOMEM, "peak: out of memory for %d error draws", n);
    size_t m = 0;
    for (int i = 0; i < n; i++)
        for (int j = i + 1; j < n && j <= i + reach; j++)
            if (xs[j] != xs[i])
                sl[m++] = (ys[j] - ys[i]) / (xs[j] - xs[i]);
    qsort(sl, m, sizeof *sl, cmp_double);
    *beta = m ? quantile(sl, (int)m, 0.5) : 1;
    for (int i = 0; i < n; i++)
        sl[i] = ys[i] - *beta * xs[i];
    qsort(sl, (size_t)n, sizeof *sl, cmp_double);
    *sr = 0.5 * (quantile(sl, n, Q_HI) - quantile(sl, n, Q_LO));
    free(sl);
    return CLEF_OK;
}

/* Sampling error from parametric draws (docs/peak.md, "Errors").  The
 * first-order error misses what the procedure does beyond its linear
 * response: the re-centring, the bin set and the prior's length that the
 * data choose, and the ratio-like dependence of the position on the terms
 * (5-8% of sigma at the automatic window on 60%-sky ensembles).  So the
 * band powers of the search window are drawn from N(mu, C) (mu: the fitted
 * model over the fitted bins, the table's values elsewhere; C the table's
 * covariance) and every draw goes through the whole procedure: a
 * parametric bootstrap (Efron & Tibshirani 1993, An Introduction to the
 * Bootstrap, section 6.5).  With a few hundred draws the bootstrap's own
 * scatter would be 5-8% noisy; but each draw's first-order shift X = a . dD
 * is exactly Gaussian with the known sigma_lin, and the refitted shift Y is
 * nearly proportional to it, draw by draw.  So the quoted sigma is
 * sigma_lin times the ratio of the two samples' central 68% ranges: a ratio
 * estimator with X as the auxiliary variable (Cochran 1977, Sampling
 * Techniques, 3rd ed., chapter 6), whose noise is that of the non-linear
 * part only, and whose 68% ranges target the 1-sigma interval itself and
 * are not moved by the few draws in which the refit lands far away (the
 * percentile interval, Efron & Tibshirani 1993, chapter 13). */
static int draw_error(const clef_bandpowers *bp, const clef_peak_opts *o, double hw, int w0,
                      int w1, const lin_resp *lr, clef_peak_result *r)
{
    const int nw = w1 - w0 + 1, nd = o->draws, nb = bp->nbins;
    double *chol = calloc((size_t)nw * (size_t)nw, sizeof *chol);
    double *mu = malloc((size_t)nw * sizeof *mu), *z = malloc((size_t)nw * sizeof *z);
    double *dl = malloc((size_t)nb * sizeof *dl);
    double *ys = malloc((size_t)nd * sizeof *ys), *xs = malloc((size_t)nd * sizeof *xs);
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    int status = CLEF_OK;
    if (!chol || !mu || !z || !dl || !ys || !xs || !rng) {
        status = clef_fail(CLEF_ENOMEM, "peak: out of memory for %d error draws", nd);
        goto fail;
    }
    for (int i = 0; i < nw; i++) {
        const int b = w0 + i;
        mu[i] = bp->dl[b];
        if (b >= lr->b0 && b < lr->b0 + lr->n)
            mu[i] = lr->pred[b - lr->b0];
        for (int j = 0; j <= i; j++)
            chol[(size_t)i * nw + j] = bp->cov ? bp->cov[(size_t)b * nb + (size_t)(w0 + j)]
                                       : (i == j ? bp->dl_err[b] * bp->dl_err[b] : 0);
    }
    const int info = chol_lower(chol, nw);
    if (info != 0) {
        status = clef_fail(CLEF_EINVAL, "peak: the covariance of the search window's bins %d-%d "
                           "is not positive definite (pivot of bin %d)", w0, w1, w0 + info - 1);
        goto fail;
    }
    gsl_rng_set(rng, CLEF_PEAK_DRAW_SEED);
    memcpy(dl, bp->dl, (size_t)nb * sizeof *dl);
    clef_bandpowers t = *bp;
    t.dl = dl;
    const int was_quiet = quiet;
    quiet = 1;
    int found = 0;
    for (int k = 0; k < nd && status == CLEF_OK; k++) {
        for (int i = 0; i < nw; i++)
            z[i] = gsl_ran_gaussian_ziggurat(rng, 1.0);
        double x = 0; /* the first-order shift of this draw */
        for (int i = 0; i < nw; i++) {
            double v = 0; /* dD = L z */
            for (int j = 0; j <= i; j++)
                v += chol[(size_t)i * nw + j] * z[j];
            const int b = w0 + i;
            dl[b] = mu[i] + v;
            if (b >= lr->b0 && b < lr->b0 + lr->n)
                x += lr->a[b - lr->b0] * v;
        }
        clef_peak_result rk;
        status = search(&t, o, hw, w0, w1, &rk, NULL);
        if (status == CLEF_OK && rk.found) {
            ys[found] = rk.l_peak - r->l_peak;
            xs[found] = x;
            found++;
        }
    }
    quiet = was_quiet;
    if (status != CLEF_OK)
        goto fail;
    r->draws = nd;
    r->draws_found = found;
    if (found >= CLEF_PEAK_DRAWS_MIN) {
        double beta = 1, sr = 0;
        status = split_response(xs, ys, found, &beta, &sr);
        if (status != CLEF_OK)
            goto fail;
        const double lin = r->l_peak_err_lin;
        r->l_peak_err_stat = sqrt(beta * beta * lin * lin + sr * sr);
        r->l_peak_err = hypot(r->l_peak_err_stat, r->l_peak_err_shape);
        r->theta_deg_err = 180.0 * r->l_peak_err / (r->l_peak * r->l_peak);
    }
fail:
    free(chol);
    free(mu);
    free(z);
    free(dl);
    free(ys);
    free(xs);
    gsl_rng_free(rng);
    return status;
}

int clef_peak_find(const clef_bandpowers *bp, const clef_peak_opts *o, clef_peak_result *r)
{
    if (!o || !r)
        CLEF_FAIL(CLEF_EINVAL, "peak: NULL options or result");
    result_init(r);
    int w0 = -1, w1 = -2;
    CLEF_TRY(check_input(bp, o, &w0, &w1));
    const double hw = clef_peak_half_width(bp, o);
    lin_resp lr = {0};
    int status = search(bp, o, hw, w0, w1, r, o->draws > 0 ? &lr : NULL);
    if (status == CLEF_OK && r->found && o->draws > 0)
        status = draw_error(bp, o, hw, w0, w1, &lr, r);
    lin_resp_free(&lr);
    if (status != CLEF_OK || !r->found || quiet)
        return status;
    if (r->draws > 0 && r->draws_found < r->draws * 9 / 10)
        clef_log(CLEF_LOG_WARN, "first peak: only %d of %d error draws found a peak; the peak is "
                 "barely resolved and its error is uncertain (docs/peak.md)", r->draws_found,
                 r->draws);
    if (r->curv_signif > -CLEF_PEAK_RELIABLE_SIGNIF)
        clef_log(CLEF_LOG_WARN, "first peak: the curvature is only %.1f sigma below zero; the quoted "
                 "errors may underestimate the scatter of l_peak (docs/peak.md)", -r->curv_signif);
    clef_log(CLEF_LOG_INFO, "first peak: l = %.2f +- %.2f (statistical %.2f, first order %.2f, "
             "shape %.2f), D = %.1f +- %.1f uK^2 (%d bins, half width %g)", r->l_peak,
             r->l_peak_err, r->l_peak_err_stat, r->l_peak_err_lin, r->l_peak_err_shape, r->d_peak,
             r->d_peak_err, r->nbins_used, hw);
    return CLEF_OK;
}

int clef_peak_find_quiet(const clef_bandpowers *bp, const clef_peak_opts *o, clef_peak_result *r)
{
    quiet = 1;
    const int status = clef_peak_find(bp, o, r);
    quiet = 0;
    return status;
}

/* ---- the result as metadata items (docs/formats.md, "Peak keywords") --- */

static const char *const window_names[] = {"table", "top-hat", "point"};

int clef_peak_to_meta(const clef_peak_result *r, const clef_peak_opts *o, clef_bandpowers *bp)
{
    if (!r || !bp)
        CLEF_FAIL(CLEF_EINVAL, "peak: NULL result or table");
    /* Drop the items of an earlier result so none is left stale. */
    int kept = 0;
    for (int i = 0; i < bp->nmeta; i++)
        if (strncmp(bp->meta[i].key, "PK_", 3))
            bp->meta[kept++] = bp->meta[i];
    bp->nmeta = kept;
    CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_FOUND", r->found ? 1 : 0, "1: first peak found, 0: none"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "PK_MODEL", CLEF_PEAK_MODEL_NAME, "peak model (docs/peak.md)"));
    if (!r->found)
        CLEF_TRY(clef_bandpowers_meta_text(bp, "PK_WHY", r->reason, "why no peak was found"));
    const struct {
        const char *key;
        double v;
        const char *comment;
    } items[] = {
        {"PK_L", r->l_peak, "first peak multipole"},
        {"PK_LERR", r->l_peak_err, "1-sigma error of PK_L (statistical + shape)"},
        {"PK_LSTAT", r->l_peak_err_stat, "statistical part of PK_LERR"},
        {"PK_LSHAP", r->l_peak_err_shape, "shape part of PK_LERR"},
        {"PK_LLIN", r->l_peak_err_lin, "first-order value of PK_LSTAT"},
        {"PK_D", r->d_peak, "[uK^2] D_l at the peak"},
        {"PK_DERR", r->d_peak_err, "[uK^2] 1-sigma error of PK_D"},
        {"PK_CORR", r->corr, "correlation of PK_L and PK_D"},
        {"PK_THETA", r->theta_deg, "[deg] angular scale 180 deg / PK_L"},
        {"PK_THERR", r->theta_deg_err, "[deg] 1-sigma error of PK_THETA"},
        {"PK_WIDTH", r->width, "Gaussian-equivalent width of the peak"},
        {"PK_CHI2", r->chi2, "chi^2 of the peak fit"},
        {"PK_DOF", r->dof, "degrees of freedom of the peak fit"},
        {"PK_PVAL", r->p_value, "probability of a chi^2 at least PK_CHI2"},
    };
    if (isfinite(r->curv_signif))
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_CSIG", r->curv_signif,
                                             "curvature of ln D at the peak / its error"));
    if (r->found)
        for (size_t i = 0; i < sizeof items / sizeof items[0]; i++)
            if (isfinite(items[i].v))
                CLEF_TRY(clef_bandpowers_meta_number(bp, items[i].key, items[i].v, items[i].comment));
    if (r->found && r->draws > 0)
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_DRAWF", r->draws_found,
                                             "error draws that found a peak"));
    if (r->nbins_used > 0) {
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_NBIN", r->nbins_used, "bins in the peak fit"));
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_BIN1", r->bin_first, "first fitted bin (from 0)"));
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_BIN2", r->bin_last, "last fitted bin (from 0)"));
    }
    if (r->windows >= 0 && r->windows <= 2)
        CLEF_TRY(clef_bandpowers_meta_text(bp, "PK_WIN", window_names[r->windows],
                                           "window functions of the peak fit"));
    if (o) {
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_LMIN", o->l_min, "peak search window start"));
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_LMAX", o->l_max, "peak search window end"));
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_HW", clef_peak_half_width(bp, o),
                                             "half width of the peak fit"));
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_CSMIN", o->curv_nsigma,
                                             "curvature significance required"));
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_SHAPE", shape_prior_of(o),
                                             "prior rms of the peak shape terms"));
        CLEF_TRY(clef_bandpowers_meta_number(bp, "PK_DRAWS", o->draws,
                                             "error draws requested (0: first order)"));
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

int clef_peak_from_meta(const clef_bandpowers *bp, clef_peak_result *r, clef_peak_opts *o)
{
    if (!bp || !r)
        CLEF_FAIL(CLEF_EINVAL, "peak: NULL table or result");
    const double found = meta_double(bp, "PK_FOUND");
    if (found != 0 && found != 1)
        CLEF_FAIL(CLEF_EINVAL, "peak: the table has no valid PK_FOUND keyword (no peak result recorded)");
    const char *model = clef_bandpowers_meta_get(bp, "PK_MODEL");
    if (!model || strcmp(model, CLEF_PEAK_MODEL_NAME))
        CLEF_FAIL(CLEF_EINVAL, "peak: keyword PK_MODEL is '%s', not '%s': the peak was recorded by "
                  "another estimator (an older clef?); refit the table with clef peak",
                  model ? model : "(missing)", CLEF_PEAK_MODEL_NAME);
    result_init(r);
    r->found = (int)found;
    const char *why = clef_bandpowers_meta_get(bp, "PK_WHY");
    if (why)
        snprintf(r->reason, sizeof r->reason, "%s", why);
    r->l_peak = meta_double(bp, "PK_L");
    r->l_peak_err = meta_double(bp, "PK_LERR");
    r->l_peak_err_stat = meta_double(bp, "PK_LSTAT");
    r->l_peak_err_shape = meta_double(bp, "PK_LSHAP");
    r->l_peak_err_lin = meta_double(bp, "PK_LLIN");
    r->d_peak = meta_double(bp, "PK_D");
    r->d_peak_err = meta_double(bp, "PK_DERR");
    r->corr = meta_double(bp, "PK_CORR");
    r->theta_deg = meta_double(bp, "PK_THETA");
    r->theta_deg_err = meta_double(bp, "PK_THERR");
    r->width = meta_double(bp, "PK_WIDTH");
    r->chi2 = meta_double(bp, "PK_CHI2");
    r->p_value = meta_double(bp, "PK_PVAL");
    r->curv_signif = meta_double(bp, "PK_CSIG");
    const double dof = meta_double(bp, "PK_DOF"), nb = meta_double(bp, "PK_NBIN");
    const double b1 = meta_double(bp, "PK_BIN1"), b2 = meta_double(bp, "PK_BIN2");
    r->dof = isfinite(dof) ? (int)dof : 0;
    r->nbins_used = isfinite(nb) ? (int)nb : 0;
    r->bin_first = isfinite(b1) ? (int)b1 : -1;
    r->bin_last = isfinite(b2) ? (int)b2 : -1;
    const char *win = clef_bandpowers_meta_get(bp, "PK_WIN");
    r->windows = -1;
    for (int i = 0; win && i < 3; i++)
        if (!strcmp(win, window_names[i]))
            r->windows = i;
    if (r->found && !(isfinite(r->l_peak) && isfinite(r->l_peak_err) && r->l_peak_err > 0))
        CLEF_FAIL(CLEF_EINVAL, "peak: PK_FOUND = 1 but PK_L or PK_LERR is missing or invalid");
    clef_peak_opts d;
    clef_peak_opts_default(&d);
    const double lmin = meta_double(bp, "PK_LMIN"), lmax = meta_double(bp, "PK_LMAX");
    const double hw = meta_double(bp, "PK_HW"), cs = meta_double(bp, "PK_CSMIN");
    const double sh = meta_double(bp, "PK_SHAPE"), ndr = meta_double(bp, "PK_DRAWS");
    const double ndf = meta_double(bp, "PK_DRAWF");
    if (isfinite(lmin))
        d.l_min = lmin;
    if (isfinite(lmax))
        d.l_max = lmax;
    if (isfinite(hw) && hw > 0)
        d.half_width = hw;
    if (isfinite(cs) && cs >= 0)
        d.curv_nsigma = cs;
    if (isfinite(sh) && sh > 0)
        d.shape_prior = sh;
    if (isfinite(ndr) && ndr >= 0 && ndr <= CLEF_PEAK_DRAWS_MAX)
        d.draws = (int)ndr;
    if (r->found && isfinite(ndf) && ndf >= 0) {
        r->draws = d.draws;
        r->draws_found = (int)ndf;
    }
    r->half_width = clef_peak_half_width(bp, &d);
    r->shape_prior = shape_prior_of(&d);
    if (o)
        *o = d;
    return CLEF_OK;
}
