/* Stage "covariance": the joint Gaussian covariance of the decoupled band
 * powers of every pair of fields.
 *
 * Pseudo-spectra covariance in the narrow-kernel approximation (Efstathiou
 * 2004, MNRAS 349, 603; Garcia-Garcia, Alonso & Bellini 2019, JCAP 10,
 * 043, eq. 2.21-2.23 and section 3.2; METHODS.md section 5), for the
 * pseudo-spectra of fields a, b and c, d:
 *   Cov(C~^ab_l, C~^cd_l') = [C^ac C^bd]_ll' M[w_a w_c, w_b w_d]_ll' / (2l'+1)
 *                          + [C^ad C^bc]_ll' M[w_a w_d, w_b w_c]_ll' / (2l'+1),
 * where C are the full-sky spectra as seen by the instrument (beam, pixel
 * window and noise included) and M[u, v] is the coupling matrix built from
 * the cross-spectrum of the two product masks u and v (their eq. 2.22:
 * each term has its own kernel, not M[w_a w_b] for both).  For one pair
 * with one mask both kernels are M[w^2].
 *
 * Splits: the estimate of pair (a, b) is the mean over its split pairs
 * (i, j) (i < j for a = b) of C~(a_i, b_j), so its covariance is the mean
 * over the split pairs of both estimates of the expression above with
 *   C(a_i, c_k) = S^ac + delta_ac delta_ik N^a,
 * S the signal spectra and N the noise of one split.  S^ac is estimated by
 * the mean of the split crosses of a and c, S^aa + N^a by the mean of a's
 * split auto-spectra (the only estimate for a single map).
 *
 * The l, l' products are symmetrised as s_l s_l' with s_l = sqrt|X_l Y_l|
 * (signed as X_l Y_l unless both are auto-spectra), and X_l X_l' for the
 * product of one spectrum with itself: exact on the diagonal and 2 C_l^2 /
 * (2l+1) on the full sky.  Propagation: Cov(D^p, D^q) = (K_p^-1 P) Cov(C~)
 * (K_q^-1 P)^T, computed as K_p^-1 (P_p Cov(C~) P_q^T) K_q^-T (propagate).
 *
 * C is estimated from the measured pseudo-spectrum divided by the mask
 * moment mean(w_x w_y), smoothed in D_l by a leave-one-out fit over the
 * neighbouring bins (smooth_estimate), or from a theory C_l times the pair
 * filter (signal spectra) plus the noise spectrum (a single map's own
 * auto-spectrum block). */
#define _DEFAULT_SOURCE /* M_PI */
#include <cblas.h>
#include <lapacke.h>
#include <math.h>
#ifdef _OPENMP
#include <omp.h>
#endif
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "coupling_impl.h"
#include "estimator_impl.h"
#include "spectrum_impl.h"

int clef_spectrum_cov_dense = 0;

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

/* A spectrum of the covariance: fields x <= y, total = 1 for the split
 * auto-spectra of x (signal plus noise), else the mean of the crosses. */
typedef struct spec_id {
    int x, y, total;
} spec_id;

static spec_id spec(int x, int i, int y, int k)
{
    spec_id s = {x < y ? x : y, x < y ? y : x, x == y && i == k};
    return s;
}

static int same_id(spec_id a, spec_id b)
{
    return a.x == b.x && a.y == b.y && a.total == b.total;
}

/* One rank-1 term w s_l s_l' of [C C]_ll': kind 1 or 2 (its kernel). */
typedef struct term {
    spec_id u, v;
    int kind;
    double w;
} term;

#define MAX_TERMS 64

static int add_term(term *t, int *n, spec_id u, spec_id v, int kind, double w)
{
    for (int k = 0; k < *n; k++)
        if (t[k].kind == kind && ((same_id(t[k].u, u) && same_id(t[k].v, v)) ||
                                  (same_id(t[k].u, v) && same_id(t[k].v, u)))) {
            t[k].w += w;
            return CLEF_OK;
        }
    if (*n >= MAX_TERMS)
        CLEF_FAIL(CLEF_EINVAL, "covariance: too many split terms");
    t[*n].u = u;
    t[*n].v = v;
    t[*n].kind = kind;
    t[*n].w = w;
    (*n)++;
    return CLEF_OK;
}

/* The split pairs (i, j) of the estimate of fields (a, b). */
static int split_pairs(const clef_estimator *e, int a, int b, int ij[][2])
{
    const int ka = e->fields[a].f.nsplits, kb = e->fields[b].f.nsplits;
    int n = 0;
    for (int i = 0; i < ka; i++)
        for (int j = 0; j < kb; j++)
            if (a != b || ka == 1 || i < j) {
                ij[n][0] = i;
                ij[n][1] = j;
                n++;
            }
    return n;
}

static int collect_terms(const clef_estimator *e, const est_pair *p, const est_pair *q, term *t,
                         int *nt)
{
    int ij[CLEF_FIELD_MAX_SPLITS * CLEF_FIELD_MAX_SPLITS][2];
    int kl[CLEF_FIELD_MAX_SPLITS * CLEF_FIELD_MAX_SPLITS][2];
    const int n1 = split_pairs(e, p->a, p->b, ij), n2 = split_pairs(e, q->a, q->b, kl);
    const double w = 1.0 / ((double)n1 * (double)n2);
    const int a = p->a, b = p->b, c = q->a, d = q->b;
    *nt = 0;
    for (int r = 0; r < n1; r++)
        for (int s = 0; s < n2; s++) {
            const int i = ij[r][0], j = ij[r][1], k = kl[s][0], l = kl[s][1];
            CLEF_TRY(add_term(t, nt, spec(a, i, c, k), spec(b, j, d, l), 1, w));
            CLEF_TRY(add_term(t, nt, spec(a, i, d, l), spec(b, j, c, k), 2, w));
        }
    return CLEF_OK;
}

/* Full-sky estimate of spectrum id over the bins of pair p.  theory_total:
 * the block of a single map's auto-spectrum with itself, where a theory
 * spectrum gives the total (signal plus the noise table). */
static int estimate(clef_estimator *e, const est_pair *p, spec_id id, int theory_total,
                    double *const *raw, const double *w2tab, double *c)
{
    const int lmax = e->lmax_ext, n = lmax + 1;
    const clef_spectrum_opts *o = &e->o;
    const est_field *fx = &e->fields[id.x], *fy = &e->fields[id.y];
    if (o->theory_cl && (!id.total || theory_total)) {
        const int same = !memcmp(fx->filter, fy->filter, (size_t)n * sizeof(double));
        for (int l = 0; l <= lmax; l++) {
            const double tl = same ? fx->filter[l] : sqrt(fx->filter[l] * fy->filter[l]);
            const double s = o->theory_cl[l] * tl;
            const double nl = (id.total && fx->f.noise_cl && l <= fx->f.noise_lmax)
                                  ? fx->f.noise_cl[l] : 0;
            c[l] = id.total ? s + nl : s;
        }
        return CLEF_OK;
    }
    const int slot = (id.x * e->nfields + id.y) * 2 + id.total;
    if (!raw[slot]) {
        /* raw[] is the caller's table of pseudo-spectra, filled on demand. */
        double **r = (double **)raw;
        if (!(r[slot] = malloc((size_t)n * sizeof(double))))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the covariance");
        CLEF_TRY(clef_est_pseudo(e, id.x, id.y, id.total, r[slot]));
    }
    smooth_estimate(p->all_bins, raw[slot], w2tab[fx->wid * e->nweights + fy->wid], lmax,
                    id.x == id.y, c);
    return CLEF_OK;
}

/* s_l of one term (above). */
static void term_vector(const term *t, const double *u, const double *v, int n, double *s)
{
    const int same = same_id(t->u, t->v);
    const int autos = t->u.total && t->v.total;
    const double sw = sqrt(t->w); /* the term is w s_l s_l' */
    for (int l = 0; l < n; l++) {
        if (same && t->kind == 2) {
            s[l] = sw * u[l];
            continue;
        }
        const double x = u[l] * v[l];
        const double r = sqrt(fabs(x));
        s[l] = sw * (autos || x >= 0 ? r : -r);
    }
}

/* out = (out + out^T) / 2 (n x n): a block of one pair with itself. */
static void symmetrise(double *out, int n)
{
    for (int i = 0; i < n; i++)
        for (int j = i + 1; j < n; j++) {
            double z = 0.5 * (out[(size_t)i * n + j] + out[(size_t)j * n + i]);
            out[(size_t)i * n + j] = out[(size_t)j * n + i] = z;
        }
}

/* The reference path (clef_spectrum_cov_dense): G_ll' = sum_k s_kl s_kl' M^k_ll' / (2l'+1), M^k = k1 for terms of kind 1
 * (or when k2 is k1), else k2, for nt vectors s (nt x n); then the band
 * powers' block out = A_p G A_q^T (np x nq; A_p, A_q the rows of K^-1 P
 * wanted, np x n and nq x n), symmetrised when sym (A_p is A_q).  g: an
 * n x n workspace (reused between blocks: fresh pages cost as much as the
 * sums), or NULL. */
static int propagate_dense(int n, int nt, const double *s, const int *kind,
                           const clef_coupling *k1, const clef_coupling *k2, const double *ap,
                           int np, const double *aq, int nq, int sym, double *g, double *out)
{
    const int one = k1 == k2;
    int status = CLEF_OK;
    double *own = NULL;
    double *inv = malloc((size_t)n * sizeof *inv);
    double *x = malloc((size_t)np * n * sizeof *x);
    if (!g)
        g = own = clef_alloc_large((size_t)n * n * sizeof *g);
    if (!inv || !g || !x) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance (lmax %d)", n - 1);
        goto fail;
    }
    for (int l = 0; l < n; l++)
        inv[l] = 1.0 / (2.0 * l + 1.0);
    const double *m1 = clef_coupling_matrix(k1), *m2 = clef_coupling_matrix(k2);
    int fail_mem = 0;
#pragma omp parallel reduction(| : fail_mem)
    {
        /* Row l: the sums over the terms as vectors over l' (the same
         * additions in the same order as term by term per element). */
        double *a1 = malloc((size_t)2 * n * sizeof *a1), *a2 = a1 ? a1 + n : NULL;
        if (!a1)
            fail_mem = 1;
#pragma omp for schedule(static)
        for (int l = 0; l < n; l++) {
            if (!a1)
                continue;
            const double *m1l = m1 + (size_t)l * n, *m2l = m2 + (size_t)l * n;
            double *gl = g + (size_t)l * n;
            for (int lp = 0; lp < n; lp++)
                a1[lp] = a2[lp] = 0;
            for (int k = 0; k < nt; k++) {
                const double *sk = s + (size_t)k * n;
                const double skl = sk[l];
                double *a = (kind[k] == 1 || one) ? a1 : a2;
                for (int lp = 0; lp < n; lp++)
                    a[lp] += skl * sk[lp];
            }
            if (one)
                for (int lp = 0; lp < n; lp++)
                    gl[lp] = a1[lp] * m1l[lp] * inv[lp];
            else
                for (int lp = 0; lp < n; lp++)
                    gl[lp] = (a1[lp] * m1l[lp] + a2[lp] * m2l[lp]) * inv[lp];
        }
        free(a1);
    }
    if (fail_mem) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance (lmax %d)", n - 1);
        goto fail;
    }
    /* x = A_p G, out = x A_q^T. */
    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, np, n, n, 1.0, ap, n, g, n, 0.0, x, n);
    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasTrans, np, nq, n, 1.0, x, n, aq, n, 0.0, out,
                nq);
    if (sym)
        symmetrise(out, np);
fail:
    free(inv);
    free(own);
    free(x);
    return status;
}

/* The pseudo-spectra covariance propagated to band powers without forming
 * G_ll' = sum_k s_kl s_kl' M^k_ll' / (2l'+1) (M^k = k1 for terms of kind 1
 * or when k2 is k1, else k2; nt vectors s, nt x n).  The rows of the
 * decoupling operator are A = K^-1 P (src/coupling.c), P the binning
 * operator of the pair's reported and hidden bins (P_bl nonzero only for
 * l in bin b; beams, pixel window and transfer function are inside K, so
 * A is K^-1 times P and nothing is applied per l after the binning).  Hence
 *   A_p G A_q^T = (K_p^-1)_rep (P_p G P_q^T) (K_q^-1)_rep^T,
 * where B = P_p G P_q^T (nbp x nbq) is a weighted sum of G over the bin
 * pairs, summed row by row of G without storing it (nt n^2 multiply-adds
 * against the 2 nb n^2 of the product A_p G), and the rest is a product of
 * nb x nbp, nbp x nbq and nbq x nb matrices.  Multipoles in no bin (l < the
 * first bin) have zero columns in P and are skipped.  kp, kq: the rows of
 * K_p^-1 and K_q^-1 for the reported bins (nb x nbp, nb x nbq); out: nb x
 * nb, symmetrised when sym (p's operator is q's).  One block at a time (the
 * polarized spectra); the estimator's blocks take the same sums with their
 * kernels shared (shared_blocks). */
static int propagate(int n, int nt, const double *s, const int *kind, const clef_coupling *k1,
                     const clef_coupling *k2, const clef_bins *bp, const double *kp,
                     const clef_bins *bq, const double *kq, int nb, int sym, double *out)
{
    const int one = k1 == k2;
    const int nbp = clef_bins_count(bp), nbq = clef_bins_count(bq);
    int status = CLEF_OK;
    double *t = malloc((size_t)nt * n * sizeof *t), *pl = malloc((size_t)n * sizeof *pl);
    double *bsum = calloc((size_t)nbp * nbq, sizeof *bsum);
    double *x = malloc((size_t)nb * nbq * sizeof *x);
    int *qlh = malloc((size_t)2 * nbq * sizeof *qlh); /* bins of q: l_lo, l_hi */
    if (!t || !pl || !bsum || !x || !qlh) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance (lmax %d)", n - 1);
        goto fail;
    }
    /* The columns of P_q and 1 / (2l'+1) folded into the vectors of l':
     * t_kl' = s_kl' P_q(b', l') / (2l'+1); pl_l = P_p(b, l). */
    int q0 = n, q1 = -1; /* the range of l' that q's bins cover */
    for (int l = 0; l < n; l++)
        pl[l] = 0;
    for (int j = 0; j < nbq; j++) {
        const int lo = clef_bins_l_lo(bq, j), hi = clef_bins_l_hi(bq, j);
        qlh[2 * j] = lo;
        qlh[2 * j + 1] = hi;
        q0 = lo < q0 ? lo : q0;
        q1 = hi > q1 ? hi : q1;
        for (int l = lo; l <= hi; l++)
            pl[l] = clef_bins_p(bq, j, l) / (2.0 * l + 1.0);
    }
    for (int k = 0; k < nt; k++)
        for (int l = 0; l < n; l++)
            t[(size_t)k * n + l] = s[(size_t)k * n + l] * pl[l];
    for (int i = 0; i < nbp; i++)
        for (int l = clef_bins_l_lo(bp, i); l <= clef_bins_l_hi(bp, i); l++)
            pl[l] = clef_bins_p(bp, i, l);
    const double *m1 = clef_coupling_matrix(k1), *m2 = clef_coupling_matrix(k2);
    /* B_bb' = sum_{l' in b'} h_bl', h_bl' = sum_{l in b} P_p(b, l) sum_k s_kl
     * M^k_ll' t_kl': for each bin b of p, the rows l of G in b are summed
     * into one vector h over l' (element-wise products, which vectorise:
     * a dot product per row and bin would be a chain of dependent
     * additions), then h is summed over each bin b' of q.  Each kernel row
     * is read once per block; G is never stored. */
    int fail_mem = 0;
#pragma omp parallel reduction(| : fail_mem)
    {
        double *h = malloc((size_t)n * sizeof *h);
        if (!h)
            fail_mem = 1;
#pragma omp for schedule(dynamic, 1)
        for (int i = 0; i < nbp; i++) {
            if (!h)
                continue;
            for (int lp = 0; lp < n; lp++)
                h[lp] = 0;
            for (int l = clef_bins_l_lo(bp, i); l <= clef_bins_l_hi(bp, i); l++) {
                const double *m1l = m1 + (size_t)l * n, *m2l = m2 + (size_t)l * n;
                for (int k = 0; k < nt; k++) {
                    const double *restrict tk = t + (size_t)k * n;
                    const double *restrict ml = (kind[k] == 1 || one) ? m1l : m2l;
                    const double f = pl[l] * s[(size_t)k * n + l];
                    for (int lp = q0; lp <= q1; lp++)
                        h[lp] += f * (tk[lp] * ml[lp]);
                }
            }
            double *bi = bsum + (size_t)i * nbq;
            for (int j = 0; j < nbq; j++) {
                double z = 0;
                for (int lp = qlh[2 * j]; lp <= qlh[2 * j + 1]; lp++)
                    z += h[lp];
                bi[j] = z;
            }
        }
        free(h);
    }
    if (fail_mem) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance (lmax %d)", n - 1);
        goto fail;
    }
    /* x = (K_p^-1)_rep B, out = x (K_q^-1)_rep^T. */
    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, nb, nbq, nbp, 1.0, kp, nbp, bsum, nbq,
                0.0, x, nbq);
    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasTrans, nb, nb, nbq, 1.0, x, nbq, kq, nbq, 0.0,
                out, nb);
    if (sym)
        symmetrise(out, nb);
fail:
    free(t);
    free(pl);
    free(bsum);
    free(x);
    free(qlh);
    return status;
}

/* The rows of K^-1 P of pair p for its reported bins (nb x n): the only
 * ones the tables and the joint covariance read. */
static double *reported_rows(const clef_estimator *e, const est_pair *p)
{
    const int n = e->lmax_ext + 1;
    const double *a = clef_coupling_binned_kinv_p(p->kb);
    double *r = malloc((size_t)e->nb * n * sizeof *r);
    if (r)
        for (int i = 0; i < e->nb; i++)
            memcpy(r + (size_t)i * n, a + (size_t)p->rep[i] * n, (size_t)n * sizeof *r);
    return r;
}

/* The rows of K^-1 of pair p's operator for its reported bins (nb x
 * nb_all), made once per operator and kept in kinv[p->op]. */
static int reported_kinv(const clef_estimator *e, const est_pair *p, double **kinv)
{
    if (kinv[p->op])
        return CLEF_OK;
    const int na = p->nb_all;
    double *full = malloc((size_t)na * na * sizeof *full);
    double *r = malloc((size_t)e->nb * na * sizeof *r);
    int status = full && r ? clef_coupling_binned_kinv(p->kb, full)
                           : clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
    if (status == CLEF_OK)
        for (int i = 0; i < e->nb; i++)
            memcpy(r + (size_t)i * na, full + (size_t)p->rep[i] * na, (size_t)na * sizeof *r);
    free(full);
    if (status != CLEF_OK)
        free(r);
    else
        kinv[p->op] = r;
    return status;
}

/* Covariance block of pairs p and q over their reported bins (nb x nb) by
 * the reference path (clef_spectrum_cov_dense; shared_blocks below is the
 * estimator's own); g: an n x n workspace. */
static int block(clef_estimator *e, const est_pair *p, const est_pair *q, double *const *raw,
                 const double *w2, double *g, double *out)
{
    const int lmax = e->lmax_ext, n = lmax + 1;
    term t[MAX_TERMS];
    int nt = 0, status = CLEF_OK;
    CLEF_TRY(collect_terms(e, p, q, t, &nt));
    const int wa = e->fields[p->a].wid, wb = e->fields[p->b].wid;
    const int wc = e->fields[q->a].wid, wd = e->fields[q->b].wid;
    const clef_coupling *k1 = NULL, *k2 = NULL;
    CLEF_TRY(clef_est_kernel(e, wa, wc, wb, wd, &k1));
    CLEF_TRY(clef_est_kernel(e, wa, wd, wb, wc, &k2));
    const int theory_total = p == q && p->a == p->b && e->fields[p->a].f.nsplits == 1;
    int kind[MAX_TERMS];
    double *s = malloc((size_t)nt * n * sizeof *s), *u = malloc((size_t)n * sizeof *u);
    double *v = malloc((size_t)n * sizeof *v);
    double *ap = NULL, *aq = NULL;
    if (!s || !u || !v) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance (lmax %d)", lmax);
        goto fail;
    }
    for (int k = 0; k < nt; k++) {
        CLEF_CHECK(estimate(e, p, t[k].u, theory_total, raw, w2, u));
        CLEF_CHECK(estimate(e, p, t[k].v, theory_total, raw, w2, v));
        term_vector(&t[k], u, v, n, s + (size_t)k * n);
        kind[k] = t[k].kind;
    }
    ap = reported_rows(e, p);
    aq = q == p ? ap : reported_rows(e, q);
    if (!ap || !aq) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance (lmax %d)", lmax);
        goto fail;
    }
    status = propagate_dense(n, nt, s, kind, k1, k2, ap, e->nb, aq, e->nb, p->kb == q->kb, g,
                             out);
fail:
    free(s);
    free(u);
    free(v);
    if (aq != ap)
        free(aq);
    free(ap);
    return status;
}

/* The joint covariance's blocks, with the kernels shared between them.
 * Each block's sum B = P_p G P_q^T (propagate) reads every row of its two
 * kernels; with 231 blocks and 6 kernels at n = 3072 that is 33 GB read
 * from memory for 0.4 GB of distinct rows, and the blocks were bound by it.
 * Here the blocks of a batch are set up first (their term vectors), then
 * each distinct kernel is read once, in chunks of rows that stay in the
 * cache while every block of the batch that uses the kernel takes its
 * terms from them.  Per block and term the additions are those of
 * propagate, rows in increasing l; the two kernels of a block are summed
 * into B one after the other. */
typedef struct cov_job {
    int a, b;                               /* pairs */
    int nt, nbp, nbq, q0, q1, p0, p1;       /* terms; bins; l' and l ranges */
    const clef_coupling *m[MAX_TERMS];      /* the kernel of each term */
    double *u, *t, *h, *bsum;               /* nt x n, nt x n, n, nbp x nbq */
    int *binof, *plo, *phi, *qlh;           /* bin of p for each l (-1: none); bins */
    size_t bytes;
} cov_job;

static void job_free(cov_job *j)
{
    free(j->u);
    free(j->t);
    free(j->h);
    free(j->bsum);
    free(j->binof);
    free(j->plo);
    free(j->phi);
    free(j->qlh);
    memset(j, 0, sizeof *j);
}

/* The terms of block (pairs a, b) as the vectors u_kl = P_p(b, l) s_kl and
 * t_kl' = s_kl' P_q(b', l') / (2l'+1) (propagate). */
static int job_make(clef_estimator *e, int a, int b, double *const *raw, const double *w2,
                    cov_job *j)
{
    const est_pair *p = &e->pairs[a], *q = &e->pairs[b];
    const int n = e->lmax_ext + 1;
    term t[MAX_TERMS];
    int nt = 0, status = CLEF_OK;
    memset(j, 0, sizeof *j);
    CLEF_TRY(collect_terms(e, p, q, t, &nt));
    const int wa = e->fields[p->a].wid, wb = e->fields[p->b].wid;
    const int wc = e->fields[q->a].wid, wd = e->fields[q->b].wid;
    const clef_coupling *k1 = NULL, *k2 = NULL;
    CLEF_TRY(clef_est_kernel(e, wa, wc, wb, wd, &k1));
    CLEF_TRY(clef_est_kernel(e, wa, wd, wb, wc, &k2));
    const int theory_total = p == q && p->a == p->b && e->fields[p->a].f.nsplits == 1;
    const clef_bins *bp = p->all_bins, *bq = q->all_bins;
    j->a = a;
    j->b = b;
    j->nt = nt;
    j->nbp = clef_bins_count(bp);
    j->nbq = clef_bins_count(bq);
    j->u = malloc((size_t)nt * n * sizeof *j->u);
    j->t = malloc((size_t)nt * n * sizeof *j->t);
    j->h = calloc((size_t)n, sizeof *j->h);
    j->bsum = calloc((size_t)j->nbp * j->nbq, sizeof *j->bsum);
    j->binof = malloc((size_t)n * sizeof *j->binof);
    j->plo = malloc((size_t)j->nbp * sizeof *j->plo);
    j->phi = malloc((size_t)j->nbp * sizeof *j->phi);
    j->qlh = malloc((size_t)2 * j->nbq * sizeof *j->qlh);
    double *u = malloc((size_t)n * sizeof *u), *v = malloc((size_t)n * sizeof *v);
    double *sk = malloc((size_t)n * sizeof *sk);
    if (!j->u || !j->t || !j->h || !j->bsum || !j->binof || !j->plo || !j->phi || !j->qlh ||
        !u || !v || !sk) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance (lmax %d)", n - 1);
        goto fail;
    }
    j->bytes = ((size_t)(2 * nt + 1) * n + (size_t)j->nbp * j->nbq) * sizeof(double);
    for (int l = 0; l < n; l++)
        j->binof[l] = -1;
    j->p0 = n;
    j->p1 = -1;
    for (int i = 0; i < j->nbp; i++) {
        j->plo[i] = clef_bins_l_lo(bp, i);
        j->phi[i] = clef_bins_l_hi(bp, i);
        j->p0 = j->plo[i] < j->p0 ? j->plo[i] : j->p0;
        j->p1 = j->phi[i] > j->p1 ? j->phi[i] : j->p1;
        for (int l = j->plo[i]; l <= j->phi[i]; l++)
            j->binof[l] = i;
    }
    j->q0 = n;
    j->q1 = -1;
    for (int i = 0; i < j->nbq; i++) {
        j->qlh[2 * i] = clef_bins_l_lo(bq, i);
        j->qlh[2 * i + 1] = clef_bins_l_hi(bq, i);
        j->q0 = j->qlh[2 * i] < j->q0 ? j->qlh[2 * i] : j->q0;
        j->q1 = j->qlh[2 * i + 1] > j->q1 ? j->qlh[2 * i + 1] : j->q1;
    }
    for (int k = 0; k < nt; k++) {
        CLEF_CHECK(estimate(e, p, t[k].u, theory_total, raw, w2, u));
        CLEF_CHECK(estimate(e, p, t[k].v, theory_total, raw, w2, v));
        term_vector(&t[k], u, v, n, sk);
        j->m[k] = (t[k].kind == 1 || k1 == k2) ? k1 : k2;
        double *uk = j->u + (size_t)k * n, *tk = j->t + (size_t)k * n;
        for (int l = 0; l < n; l++)
            uk[l] = tk[l] = 0;
        for (int i = 0; i < j->nbp; i++)
            for (int l = j->plo[i]; l <= j->phi[i]; l++)
                uk[l] = clef_bins_p(bp, i, l) * sk[l];
        for (int i = 0; i < j->nbq; i++)
            for (int l = j->qlh[2 * i]; l <= j->qlh[2 * i + 1]; l++)
                tk[l] = sk[l] * (clef_bins_p(bq, i, l) / (2.0 * l + 1.0));
    }
fail:
    free(u);
    free(v);
    free(sk);
    if (status != CLEF_OK)
        job_free(j);
    return status;
}

/* Rows of a kernel read in chunks of this many (16 rows of n = 3072: 384 KiB,
 * within a core's L2 cache). */
#define COV_ROW_CHUNK 16

/* One pass of kernel m over the blocks of a batch: B of every block
 * receives the terms of m.  The blocks are shared between the threads
 * (each block's B is written by one thread); every thread reads the chunks
 * in the same order. */
static void kernel_pass(const clef_coupling *m, cov_job *jobs, int nj, int n)
{
    const double *mm = clef_coupling_matrix(m);
#pragma omp parallel
    {
        int tid = 0, nth = 1;
#ifdef _OPENMP
        tid = omp_get_thread_num();
        nth = omp_get_num_threads();
#endif
        for (int c0 = 0; c0 < n; c0 += COV_ROW_CHUNK) {
            const int c1 = c0 + COV_ROW_CHUNK - 1 < n ? c0 + COV_ROW_CHUNK - 1 : n - 1;
            for (int jj = tid; jj < nj; jj += nth) {
                cov_job *j = &jobs[jj];
                int uses = 0;
                for (int k = 0; k < j->nt; k++)
                    uses |= j->m[k] == m;
                if (!uses)
                    continue;
                const int lo = c0 > j->p0 ? c0 : j->p0, hi = c1 < j->p1 ? c1 : j->p1;
                double *restrict h = j->h;
                for (int l = lo; l <= hi; l++) {
                    const int i = j->binof[l];
                    if (i < 0)
                        continue;
                    const double *restrict row = mm + (size_t)l * n;
                    for (int k = 0; k < j->nt; k++) {
                        if (j->m[k] != m)
                            continue;
                        const double f = j->u[(size_t)k * n + l];
                        const double *restrict tk = j->t + (size_t)k * n;
                        for (int lp = j->q0; lp <= j->q1; lp++)
                            h[lp] += f * (tk[lp] * row[lp]);
                    }
                    if (l == j->phi[i]) { /* bin i of p complete: bin h over q */
                        double *bi = j->bsum + (size_t)i * j->nbq;
                        for (int b = 0; b < j->nbq; b++) {
                            double z = 0;
                            for (int lp = j->qlh[2 * b]; lp <= j->qlh[2 * b + 1]; lp++)
                                z += h[lp];
                            bi[b] += z;
                        }
                        for (int lp = j->q0; lp <= j->q1; lp++)
                            h[lp] = 0;
                    }
                }
            }
        }
    }
}

/* Block of a finished job: out = (K_p^-1)_rep B (K_q^-1)_rep^T, into the
 * joint covariance (and the pair's own block). */
static int job_finish(clef_estimator *e, cov_job *j, double **kinv, double *tmp)
{
    const est_pair *p = &e->pairs[j->a], *q = &e->pairs[j->b];
    const int nb = e->nb;
    CLEF_TRY(reported_kinv(e, p, kinv));
    CLEF_TRY(reported_kinv(e, q, kinv));
    double *x = malloc((size_t)nb * j->nbq * sizeof *x);
    double *out = tmp;
    if (j->a == j->b)
        out = e->pairs[j->a].cov_all = malloc((size_t)nb * nb * sizeof *out);
    if (!x || !out) {
        free(x);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the covariance");
    }
    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, nb, j->nbq, j->nbp, 1.0,
                kinv[p->op], j->nbp, j->bsum, j->nbq, 0.0, x, j->nbq);
    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasTrans, nb, nb, j->nbq, 1.0, x, j->nbq,
                kinv[q->op], j->nbq, 0.0, out, nb);
    free(x);
    if (p->kb == q->kb)
        for (int i = 0; i < nb; i++)
            for (int k = i + 1; k < nb; k++) {
                double z = 0.5 * (out[(size_t)i * nb + k] + out[(size_t)k * nb + i]);
                out[(size_t)i * nb + k] = out[(size_t)k * nb + i] = z;
            }
    for (int i = 0; i < nb; i++)
        for (int k = 0; k < nb; k++) {
            const double z = out[(size_t)i * nb + k];
            e->cov[(size_t)(j->a * nb + i) * e->ncov + j->b * nb + k] = z;
            e->cov[(size_t)(j->b * nb + k) * e->ncov + j->a * nb + i] = z;
        }
    return CLEF_OK;
}

/* Memory of the term vectors of one batch of blocks (bytes);
 * clef_spectrum_cov_batch_bytes > 0 (tests) overrides it. */
#define COV_BATCH_BYTES ((size_t)256 << 20)
size_t clef_spectrum_cov_batch_bytes = 0;

/* Every block, in batches (the kernels read once per batch). */
static int shared_blocks(clef_estimator *e, double *const *raw, const double *w2, double **kinv)
{
    const int np = e->npairs, nb = e->nb, n = e->lmax_ext + 1;
    const int nblocks = e->joint ? np * (np + 1) / 2 : np;
    int status = CLEF_OK, nj = 0, next = 0;
    cov_job *jobs = calloc((size_t)nblocks, sizeof *jobs);
    const clef_coupling **ks = calloc((size_t)2 * nblocks, sizeof *ks);
    double *tmp = malloc((size_t)nb * nb * sizeof *tmp);
    if (!jobs || !ks || !tmp) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
        goto fail;
    }
    int a = 0, b = 0;
    while (next < nblocks) {
        size_t bytes = 0;
        nj = 0;
        const size_t cap =
            clef_spectrum_cov_batch_bytes ? clef_spectrum_cov_batch_bytes : COV_BATCH_BYTES;
        while (next < nblocks && (nj == 0 || bytes < cap)) {
            CLEF_CHECK(job_make(e, a, b, raw, w2, &jobs[nj]));
            bytes += jobs[nj++].bytes;
            next++;
            if (++b >= np || !e->joint)
                b = ++a;
        }
        int nk = 0;
        for (int jj = 0; jj < nj; jj++)
            for (int k = 0; k < jobs[jj].nt; k++) {
                int seen = 0;
                for (int r = 0; r < nk && !seen; r++)
                    seen = ks[r] == jobs[jj].m[k];
                if (!seen)
                    ks[nk++] = jobs[jj].m[k];
            }
        for (int r = 0; r < nk; r++)
            kernel_pass(ks[r], jobs, nj, n);
        for (int jj = 0; jj < nj; jj++) {
            CLEF_CHECK(job_finish(e, &jobs[jj], kinv, tmp));
            job_free(&jobs[jj]);
        }
        nj = 0;
    }
fail:
    if (jobs)
        for (int jj = 0; jj < nj; jj++)
            job_free(&jobs[jj]);
    free(jobs);
    free(ks);
    free(tmp);
    return status;
}

/* One pair with one given kernel (the polarized spectra): the terms C^aa
 * C^bb (as s_l = sqrt|C^aa_l C^bb_l|) and C^ab C^ab of the expression
 * above with both kernels M[w_a w_b], from measured pseudo-spectra. */
int clef_spectrum_covariance(const clef_spectrum_cov_in *in, double *cov)
{
    const int lmax = in->lmax, n = lmax + 1;
    const int nb = clef_bins_count(in->bins);
    int status = CLEF_OK;
    double *c[3] = {NULL, NULL, NULL}, *kinv = NULL;
    double *s = malloc((size_t)2 * n * sizeof *s);
    for (int k = 0; k < 3; k++)
        c[k] = malloc((size_t)n * sizeof(double));
    if (!s || !c[0] || !c[1] || !c[2]) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
        goto fail;
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
    for (int l = 0; l < n; l++) {
        s[l] = sqrt(fabs(c[1][l] * c[2][l]));
        s[n + l] = c[0][l];
    }
    static const int kind[2] = {1, 1};
    if (clef_spectrum_cov_dense) {
        const double *a = clef_coupling_binned_kinv_p(in->kb);
        status = propagate_dense(n, 2, s, kind, in->m2, in->m2, a, nb, a, nb, 1, in->work, cov);
    } else if (!(kinv = malloc((size_t)nb * nb * sizeof *kinv))) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
    } else if ((status = clef_coupling_binned_kinv(in->kb, kinv)) == CLEF_OK) {
        status = propagate(n, 2, s, kind, in->m2, in->m2, in->bins, kinv, in->bins, kinv, nb, 1,
                           cov);
    }
fail:
    free(s);
    free(kinv);
    for (int k = 0; k < 3; k++)
        free(c[k]);
    return status;
}

int clef_spectrum_coupling(clef_coupling **out, int lmax, const double *wl, int wl_lmax,
                           const clef_spectrum_opts *o)
{
    if (o->use_cache)
        return clef_coupling_create_cached(out, lmax, wl, wl_lmax, o->cache_dir, NULL);
    return clef_coupling_create(out, lmax, wl, wl_lmax);
}

/* mean(w_x w_y) of every pair of weights, nw x nw: the moment of each
 * cross-spectrum's estimate (w2 of the weights themselves on the
 * diagonal), once per run rather than once per term of every block. */
static double *weight_moments(const clef_estimator *e)
{
    const int nw = e->nweights;
    double *m = malloc((size_t)nw * nw * sizeof *m);
    if (!m)
        return NULL;
    for (int x = 0; x < nw; x++) {
        m[x * nw + x] = e->weights[x].w2;
        for (int y = x + 1; y < nw; y++) {
            const double *wx = e->weights[x].w, *wy = e->weights[y].w;
            double w2 = 0;
            for (int64_t q = 0; q < e->npix; q++)
                w2 += wx[q] * wy[q];
            m[x * nw + y] = m[y * nw + x] = w2 / (double)e->npix;
        }
    }
    return m;
}

int clef_est_covariance(clef_estimator *e)
{
    const clef_spectrum_opts *o = &e->o;
    if (o->theory_cl && o->theory_lmax < e->lmax_ext)
        CLEF_FAIL(CLEF_EINVAL,
                  "the theory spectrum for the covariance stops at l = %d, below lmax = %d",
                  o->theory_lmax, e->lmax_ext);
    const int nb = e->nb, np = e->npairs, nraw = e->nfields * e->nfields * 2;
    const size_t n = (size_t)e->lmax_ext + 1;
    int status = CLEF_OK;
    double **raw = calloc((size_t)nraw, sizeof *raw);
    double **kinv = calloc((size_t)e->nops, sizeof *kinv);
    double *tmp = NULL, *w2 = weight_moments(e);
    /* G itself only for the reference path. */
    double *g = clef_spectrum_cov_dense ? clef_alloc_large(n * n * sizeof *g) : NULL;
    e->ncov = np * nb;
    e->cov = calloc((size_t)e->ncov * e->ncov, sizeof *e->cov);
    if (!raw || !kinv || !e->cov || !w2 || (clef_spectrum_cov_dense && !g)) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
        goto fail;
    }
    if (!clef_spectrum_cov_dense) {
        status = shared_blocks(e, raw, w2, kinv);
        goto fail;
    }
    for (int a = 0; a < np; a++) {
        est_pair *p = &e->pairs[a];
        for (int b = a; b < np && (b == a || e->joint); b++) {
            est_pair *q = &e->pairs[b];
            double *out = NULL;
            if (b == a) {
                if (!(out = p->cov_all = malloc((size_t)nb * nb * sizeof *out))) {
                    status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
                    goto fail;
                }
            } else {
                if (!tmp && !(tmp = malloc((size_t)nb * nb * sizeof *tmp))) {
                    status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
                    goto fail;
                }
                out = tmp;
            }
            CLEF_CHECK(block(e, p, q, raw, w2, g, out));
            for (int i = 0; i < nb; i++)
                for (int j = 0; j < nb; j++) {
                    const double z = out[(size_t)i * nb + j];
                    e->cov[(size_t)(a * nb + i) * e->ncov + b * nb + j] = z;
                    e->cov[(size_t)(b * nb + j) * e->ncov + a * nb + i] = z;
                }
        }
    }
fail:
    if (raw)
        for (int k = 0; k < nraw; k++)
            free(raw[k]);
    free(raw);
    if (kinv)
        for (int k = 0; k < e->nops; k++)
            free(kinv[k]);
    free(kinv);
    free(tmp);
    free(w2);
    free(g);
    /* The kernels are done with: the memory of a few n x n matrices
     * (kept for the next estimator of a series, clef_estimator_reuse). */
    if (!e->keep) {
        for (int k = 0; k < e->nkernels; k++)
            clef_coupling_destroy(e->kernels[k].m);
        e->nkernels = 0;
    }
    return status;
}
