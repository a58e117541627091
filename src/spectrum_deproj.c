/* The bias of removing the monopole and dipole, as a correction of the
 * coupling matrices (Elsner, Leistedt & Peiris 2017, MNRAS 465, 1847,
 * section 2: mode projection in pseudo-C_l; docs/method.md section 2).
 *
 * The map is cleaned as T' = T - f F^-1 f^T w T, with templates f_i (1, x,
 * y, z; nf = 1 or 4) and F = int w f f^T (the weighted least-squares fit
 * of spectrum_multipoles.c).  In harmonic space the pseudo-a_lm of w T' is
 *   a~ = (K - H) a,   K_lm,LM = int Y*_lm w Y_LM,   H = G F^-1 G^+,
 * with G_i,lm = int Y*_lm w f_i, the harmonic coefficients of the weighted
 * templates.  For a cross-spectrum of maps a and b,
 *   <C~_l> = sum_L (M_lL - D_lL) C_L,
 *   D_lL = 1/(2l+1) Re sum_mM [K_a H_b* + H_a K_b* - H_a H_b*]_lm,LM,
 * and, term by term (the sums over M become maps; C_X(l) below is the
 * cross-spectrum of two real fields' coefficients, as clef_alm_cl):
 *   K_a H_b*:  sum_ij (F_b^-1)_ij C_X(l)[G_b,i ; A(w_a g_b,j^(L))],
 *   H_a K_b*:  the same with a and b exchanged,
 *   H_a H_b*:  (2L+1) sum_ik C_ik(l) [F_a^-1 C(L) F_b^-1]_ik,
 * where g_b,j^(L) is the multipole-L part of the map w_b f_j, A() the
 * analysis, and C_ik(l) = C_X(l)[G_a,i ; G_b,k].  So each column L costs
 * one synthesis of the templates' multipole L, a product with the mask and
 * one analysis (per side of the pair).
 *
 * Only multipoles where the templates carry power are affected: D is
 * computed for l, L <= ldep, the last multipole where the removed fraction
 * per mode, S_l / w2 with S_l = sum_ij F^-1_ij C_X(l)[G_i ; G_j] (the trace
 * of H at l over 2l+1; sum_l (2l+1) S_l = nf for a binary mask), is at
 * least CLEF_DEPROJ_LEVEL.  The truncated part biases band powers by less
 * than that fraction.
 *
 * Products w g^(L) at l <= ldep involve the mask only to l <= 2 ldep
 * (the 3j selection rule), so when the map's grid is finer than needed
 * they are formed on a coarser grid (2 nside_d >= 3 ldep) from the mask's
 * coefficients to 2 ldep, with exact results up to the coarse quadrature.
 *
 * The covariance needs no correction of its own: its narrow-kernel
 * approximation takes the pseudo-spectrum of the field actually analysed,
 * the cleaned map (spectrum_cov.c), and the corrected K carries the
 * removal into the band-power errors. */
#define _DEFAULT_SOURCE
#include "spectrum_deproj.h"

#include <complex.h>
#include <lapacke.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "clef/sht.h"
#include "core_impl.h"
#include "mask_impl.h"

/* Template f_i at the centre of pixel j of ring g: 1, x, y, z. */
static void ring_templates(const mask_ring *g, int64_t j, double f[4])
{
    const double phi = 2.0 * M_PI / (double)g->n * ((double)j + g->shift);
    f[0] = 1.0;
    f[1] = g->sth * cos(phi);
    f[2] = g->sth * sin(phi);
    f[3] = g->z;
}

/* Fill map[p] = w[p] f_i(p) (w NULL: f_i alone). */
static void template_map(int64_t nside, const double *w, int i, double *map)
{
#pragma omp parallel for schedule(dynamic, 16) if (nside >= 128)
    for (int64_t r = 1; r < 4 * nside; r++) {
        mask_ring g;
        mask_ring_info(nside, r, &g);
        for (int64_t j = 0; j < g.n; j++) {
            double f[4];
            ring_templates(&g, j, f);
            map[g.first + j] = (w ? w[g.first + j] : 1.0) * f[i];
        }
    }
}

/* F_ij = int w f_i f_j (pixel sums times the pixel area) in one pass; the
 * rings are summed in order, so F does not depend on the thread count. */
static int template_normal(int64_t nside, const double *w, int nf, double fm[16])
{
    const int64_t nrings = 4 * nside - 1;
    double(*part)[16] = calloc((size_t)nrings, sizeof *part);
    if (!part)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the deprojection templates");
#pragma omp parallel for schedule(dynamic, 16) if (nside >= 128)
    for (int64_t r = 0; r < nrings; r++) {
        mask_ring g;
        mask_ring_info(nside, r + 1, &g);
        for (int64_t j = 0; j < g.n; j++) {
            const double wp = w[g.first + j];
            if (wp == 0)
                continue;
            double f[4];
            ring_templates(&g, j, f);
            for (int a = 0; a < nf; a++)
                for (int b = 0; b < nf; b++)
                    part[r][a * nf + b] += wp * f[a] * f[b];
        }
    }
    const double area = 4.0 * M_PI / (12.0 * (double)nside * (double)nside);
    for (int k = 0; k < nf * nf; k++) {
        double acc = 0;
        for (int64_t r = 0; r < nrings; r++)
            acc += part[r][k];
        fm[k] = acc * area;
    }
    free(part);
    return CLEF_OK;
}

/* One side of the pair: the weights, the number of templates, the
 * templates' coefficients G_i (to lp) and F^-1. */
typedef struct side {
    const double *w;
    int nf;
    double complex *g[4];
    double finv[16];
} side;

static void side_free(side *s)
{
    for (int i = 0; i < 4; i++)
        free(s->g[i]);
}

/* Analyse w f_i for every template to lp (one map buffer reused: at high
 * nside a map is hundreds of MB; earlier coefficients are replaced) and
 * invert F = int w f f^T (the normal matrix of the fit itself). */
static int side_make(int64_t nside, int lp, int iterations, side *s)
{
    const int64_t npix = 12 * nside * nside;
    double *map = clef_alloc_large((size_t)npix * sizeof *map);
    clef_sht *sht = NULL;
    int status = CLEF_OK;
    if (!map) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the deprojection templates");
        goto fail;
    }
    CLEF_CHECK(clef_sht_create(&sht, nside, lp, NULL));
    double fm[16] = {0};
    CLEF_CHECK(template_normal(nside, s->w, s->nf, fm));
    for (int i = 0; i < s->nf; i++) {
        free(s->g[i]);
        if (!(s->g[i] = malloc(clef_alm_size(lp, lp) * sizeof(double complex)))) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for the deprojection templates");
            goto fail;
        }
        template_map(nside, s->w, i, map);
        const double *in[1] = {map};
        double complex *out[1] = {s->g[i]};
        CLEF_CHECK(clef_sht_analysis(sht, 1, in, out, iterations));
    }
    /* F^-1 by Cholesky (F is the positive definite normal matrix of the
     * fit that succeeded for these templates). */
    lapack_int info = LAPACKE_dpotrf(LAPACK_ROW_MAJOR, 'U', s->nf, fm, s->nf);
    if (info == 0)
        info = LAPACKE_dpotri(LAPACK_ROW_MAJOR, 'U', s->nf, fm, s->nf);
    if (info != 0) {
        status = clef_fail(CLEF_ENUMERIC, "deprojection: the template matrix is singular "
                                          "(LAPACK info %d)", (int)info);
        goto fail;
    }
    for (int i = 0; i < s->nf; i++)
        for (int j = 0; j < s->nf; j++)
            s->finv[i * s->nf + j] = j >= i ? fm[i * s->nf + j] : fm[j * s->nf + i];
fail:
    clef_sht_destroy(sht);
    free(map);
    return status;
}

/* C_X(l)[a ; b] for l = 0..n of two coefficient sets stored to lmax la. */
static void cross_cl(int la, const double complex *a, const double complex *b, int n, double *out)
{
    for (int l = 0; l <= n; l++)
        out[l] = 0;
    for (int m = 0; m <= n; m++) {
        const double f = m ? 2.0 : 1.0;
        for (int l = m; l <= n; l++) {
            const size_t k = clef_alm_index(la, l, m);
            out[l] += f * (creal(a[k]) * creal(b[k]) + cimag(a[k]) * cimag(b[k]));
        }
    }
    for (int l = 0; l <= n; l++)
        out[l] /= 2.0 * l + 1.0;
}

/* Smallest power of two at least n. */
static int64_t pow2_at_least(int64_t n)
{
    int64_t p = 1;
    while (p < n)
        p *= 2;
    return p;
}

/* A kernel on the working grid: the map itself when the grids agree, else
 * its coefficients to lk synthesised on the coarse grid. */
static int kernel_map(int64_t nside, int64_t nd, const double *w, int lk, int iterations,
                      double **out)
{
    const int64_t npd = 12 * nd * nd;
    double *k = clef_alloc_large((size_t)npd * sizeof *k);
    if (!k)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for a deprojection kernel");
    if (nd == nside) {
        memcpy(k, w, (size_t)npd * sizeof *k);
        *out = k;
        return CLEF_OK;
    }
    clef_sht *a = NULL, *s = NULL;
    double complex *alm = malloc(clef_alm_size(lk, lk) * sizeof *alm);
    int status = alm ? CLEF_OK : clef_fail(CLEF_ENOMEM, "out of memory for a deprojection kernel");
    if (status == CLEF_OK)
        status = clef_sht_create(&a, nside, lk, NULL);
    if (status == CLEF_OK) {
        const double *in[1] = {w};
        double complex *o[1] = {alm};
        status = clef_sht_analysis(a, 1, in, o, iterations);
    }
    if (status == CLEF_OK)
        status = clef_sht_create(&s, nd, lk, NULL);
    if (status == CLEF_OK) {
        const double complex *in[1] = {alm};
        double *o[1] = {k};
        status = clef_sht_synthesis(s, 1, in, o);
    }
    clef_sht_destroy(a);
    clef_sht_destroy(s);
    free(alm);
    if (status != CLEF_OK) {
        free(k);
        return status;
    }
    *out = k;
    return CLEF_OK;
}

/* The K H* term of one side: for every L <= n, the multipole-L part of
 * the templates of side `t` is synthesised, multiplied by the kernel and
 * analysed; acc[l (n+1) + L] = sum_ij Finv_t,ij C_X(l)[G_t,i ; A(kern g_t,j^(L))]. */
static int kh_terms(int64_t nd, int n, int lp, const side *t, const double *kern, double *acc)
{
    const int64_t npd = 12 * nd * nd;
    const int nf = t->nf;
    const size_t na = clef_alm_size(n, n);
    clef_sht *sht = NULL;
    clef_sht_opts so = {0};
    so.nmaps = nf;
    double complex *gl[4] = {NULL}, *y[4] = {NULL};
    double *g[4] = {NULL}, *pm[4] = {NULL}, *cx = malloc((size_t)(n + 1) * sizeof *cx);
    int status = cx ? CLEF_OK : clef_fail(CLEF_ENOMEM, "out of memory for the deprojection");
    for (int j = 0; j < nf && status == CLEF_OK; j++) {
        gl[j] = calloc(na, sizeof *gl[j]);
        y[j] = malloc(na * sizeof *y[j]);
        g[j] = clef_alloc_large((size_t)npd * sizeof *g[j]);
        pm[j] = clef_alloc_large((size_t)npd * sizeof *pm[j]);
        if (!gl[j] || !y[j] || !g[j] || !pm[j])
            status = clef_fail(CLEF_ENOMEM, "out of memory for the deprojection");
    }
    if (status == CLEF_OK)
        status = clef_sht_create(&sht, nd, n, &so);
    for (int L = 0; L <= n && status == CLEF_OK; L++) {
        clef_progress("deprojection", (double)L / (n + 1));
        for (int j = 0; j < nf; j++) {
            memset(gl[j], 0, na * sizeof *gl[j]);
            for (int m = 0; m <= L; m++)
                gl[j][clef_alm_index(n, L, m)] = t->g[j][clef_alm_index(lp, L, m)];
        }
        status = clef_sht_synthesis(sht, nf, (const double complex *const *)gl, g);
        if (status == CLEF_OK) {
            for (int j = 0; j < nf; j++) {
                const double *kk = kern;
                double *dst = pm[j];
                const double *src = g[j];
#pragma omp parallel for schedule(static) if (npd >= (1 << 18))
                for (int64_t p = 0; p < npd; p++)
                    dst[p] = kk[p] * src[p];
            }
            /* Quadrature alone: the products are band-limited to 3 n
             * (coarse grid: 2 nside_d >= 3 n). */
            status = clef_sht_analysis(sht, nf, (const double *const *)pm, y, 0);
            if (status != CLEF_OK)
                break;
            for (int i = 0; i < nf; i++)
                for (int j = 0; j < nf; j++) {
                    const double c = t->finv[i * nf + j];
                    if (c == 0)
                        continue;
                    /* C_X(l)[G_i ; y_j]: G_i stored to lp, y_j to n. */
                    for (int l = 0; l <= n; l++)
                        cx[l] = 0;
                    for (int m = 0; m <= n; m++) {
                        const double f = m ? 2.0 : 1.0;
                        for (int l = m; l <= n; l++) {
                            const double complex a = t->g[i][clef_alm_index(lp, l, m)];
                            const double complex b = y[j][clef_alm_index(n, l, m)];
                            cx[l] += f * (creal(a) * creal(b) + cimag(a) * cimag(b));
                        }
                    }
                    for (int l = 0; l <= n; l++)
                        acc[(size_t)l * (n + 1) + L] += c * cx[l] / (2.0 * l + 1.0);
                }
        }
    }
    clef_sht_destroy(sht);
    for (int j = 0; j < 4; j++) {
        free(gl[j]);
        free(y[j]);
        free(g[j]);
        free(pm[j]);
    }
    free(cx);
    return status;
}

/* S_l / w2 of each side (the larger) for l <= lp: the removed fraction per
 * mode. */
static int removed_fraction(const side *s, int same, int lp, double w2, double *sl)
{
    double *tmp = malloc((size_t)(lp + 1) * sizeof *tmp);
    double *sk = malloc((size_t)(lp + 1) * sizeof *sk);
    if (!tmp || !sk) {
        free(tmp);
        free(sk);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the deprojection");
    }
    for (int k = 0; k <= !same; k++) {
        memset(sk, 0, (size_t)(lp + 1) * sizeof *sk);
        for (int i = 0; i < s[k].nf; i++)
            for (int j = 0; j < s[k].nf; j++) {
                cross_cl(lp, s[k].g[i], s[k].g[j], lp, tmp);
                for (int l = 0; l <= lp; l++)
                    sk[l] += s[k].finv[i * s[k].nf + j] * tmp[l];
            }
        for (int l = 0; l <= lp; l++)
            sl[l] = fmax(sl[l], sk[l] / w2);
    }
    free(tmp);
    free(sk);
    return CLEF_OK;
}

int clef_spectrum_deproj(const clef_spectrum_deproj_in *in, clef_spectrum_deproj_out *out)
{
    memset(out, 0, sizeof *out);
    const int64_t nside = in->nside;
    const int same = in->w[1] == in->w[0] && in->nf[1] == in->nf[0];
    /* A first look to l = 64, where smooth masks stop; to the full
     * CLEF_DEPROJ_LMAX_MAX only when the templates still carry power near
     * its end (sharp edges, small patches). */
    const int lcap = in->lmax < CLEF_DEPROJ_LMAX_MAX ? in->lmax : CLEF_DEPROJ_LMAX_MAX;
    int lp = lcap < 64 ? lcap : 64;
    side s[2];
    memset(s, 0, sizeof s);
    double *kern[2] = {NULL}, *acc[2] = {NULL}, *cab = NULL, *q = NULL, *sl = NULL;
    int status = CLEF_OK, n = 1;
    for (;;) {
        for (int k = 0; k <= !same; k++) {
            s[k].w = in->w[k];
            s[k].nf = in->nf[k];
            CLEF_CHECK(side_make(nside, lp, in->iterations, &s[k]));
        }
        free(sl);
        if (!(sl = calloc((size_t)lp + 1, sizeof *sl))) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for the deprojection");
            goto fail;
        }
        CLEF_CHECK(removed_fraction(s, same, lp, in->w2, sl));
        n = 1; /* l = 0, 1 always: the templates' own multipoles */
        for (int l = 0; l <= lp; l++)
            if (sl[l] >= CLEF_DEPROJ_LEVEL && l > n)
                n = l;
        if (lp == lcap || 4 * n < 3 * lp)
            break;
        lp = lcap;
    }
    side *sa = &s[0], *sb = &s[same ? 0 : 1];
    out->level_at_cut = n < lp ? sl[n + 1] : sl[lp];
    out->truncated = n == lp && lp < in->lmax && sl[lp] >= CLEF_DEPROJ_LEVEL;
    out->ldep = n;

    /* The working grid. */
    int64_t nd = pow2_at_least((3 * (int64_t)n + 2) / 2);
    if (nd < 4)
        nd = 4;
    if (nd > nside)
        nd = nside;
    const int lk = 2 * n < 3 * (int)nd - 1 ? 2 * n : 3 * (int)nd - 1;
    const size_t nn = (size_t)(n + 1) * (n + 1);
    /* Kernels: w_a for side b's templates, w_b for side a's. */
    for (int k = 0; k < 2; k++)
        if (!(acc[k] = calloc(nn, sizeof *acc[k]))) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for the deprojection");
            goto fail;
        }
    CLEF_CHECK(kernel_map(nside, nd, in->w[0], lk, in->iterations, &kern[0]));
    if (!same)
        CLEF_CHECK(kernel_map(nside, nd, in->w[1], lk, in->iterations, &kern[1]));
    {
        /* K_a H_b*: templates of b, kernel w_a. */
        CLEF_CHECK(kh_terms(nd, n, lp, sb, kern[0], acc[0]));
        if (!same) /* H_a K_b*: templates of a, kernel w_b. */
            CLEF_CHECK(kh_terms(nd, n, lp, sa, kern[1], acc[1]));
    }
    /* H_a H_b*: (2L+1) sum_ik C_ik(l) [F_a^-1 C(L) F_b^-1]_ik. */
    const int na_ = sa->nf, nb_ = sb->nf;
    cab = malloc((size_t)(n + 1) * na_ * nb_ * sizeof *cab);
    q = malloc((size_t)(n + 1) * na_ * nb_ * sizeof *q);
    double *cx = malloc((size_t)(n + 1) * sizeof *cx);
    if (!cab || !q || !cx) {
        free(cx);
        status = clef_fail(CLEF_ENOMEM, "out of memory for the deprojection");
        goto fail;
    }
    for (int i = 0; i < na_; i++)
        for (int k = 0; k < nb_; k++) {
            cross_cl(lp, sa->g[i], sb->g[k], n, cx);
            for (int l = 0; l <= n; l++)
                cab[((size_t)l * na_ + i) * nb_ + k] = cx[l];
        }
    free(cx);
    for (int l = 0; l <= n; l++)
        for (int i = 0; i < na_; i++)
            for (int k = 0; k < nb_; k++) {
                double v = 0;
                for (int j = 0; j < na_; j++)
                    for (int m = 0; m < nb_; m++)
                        v += sa->finv[i * na_ + j] * cab[((size_t)l * na_ + j) * nb_ + m] *
                             sb->finv[m * nb_ + k];
                q[((size_t)l * na_ + i) * nb_ + k] = v;
            }
    out->dmean = malloc(nn * sizeof *out->dmean);
    if (!out->dmean) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the deprojection");
        goto fail;
    }
    for (int l = 0; l <= n; l++)
        for (int L = 0; L <= n; L++) {
            double z = 0;
            for (int i = 0; i < na_; i++)
                for (int k = 0; k < nb_; k++)
                    z += cab[((size_t)l * na_ + i) * nb_ + k] * q[((size_t)L * na_ + i) * nb_ + k];
            z *= 2.0 * L + 1.0;
            const size_t e = (size_t)l * (n + 1) + L;
            out->dmean[e] = acc[0][e] + (same ? acc[0][e] : acc[1][e]) - z;
        }
    clef_progress("deprojection", 1.0);
    clef_log(CLEF_LOG_INFO, "deprojection: monopole/dipole bias corrected for l <= %d "
                            "(grid nside %lld)", n, (long long)nd);
fail:
    for (int k = 0; k < 2; k++)
        side_free(&s[k]);
    for (int k = 0; k < 2; k++) {
        free(kern[k]);
        free(acc[k]);
    }
    free(cab);
    free(q);
    free(sl);
    if (status != CLEF_OK)
        clef_spectrum_deproj_free(out);
    return status;
}

void clef_spectrum_deproj_free(clef_spectrum_deproj_out *out)
{
    free(out->dmean);
    out->dmean = NULL;
}
