/* B-mode purification: the counter-terms of the pure-B multipoles
 * (include/clef/purify.h; Smith 2006; Grain, Tristram & Stompor 2009).
 *
 * a_{+-2}^pure_lm = N_l^-1 integral P_+- (eth^2 (W Y_lm))*  (eth-bar^2 for -2),
 * eth^2 (W Y) = W eth^2 Y + 2 eth W eth Y + (eth^2 W) Y, eth Y = n_l _1Y,
 * eth^2 Y = N_l _2Y (Goldberg et al. 1967), so with conj(eth W) = eth-bar W
 * for a real W:
 *   a_2^pure  = a_2[W P_+] + (2 n_l/N_l) b_1 + c_+/N_l,
 *   a_-2^pure = a_-2[W P_-] - (2 n_l/N_l) b_-1 + c_-/N_l,
 * b_{+-1} the spin-+-1 analysis of f = P_+ conj(eth W) (and its conjugate),
 * c_+- the spin-0 analyses of g = P_+ conj(eth^2 W) and conj(g).  With the
 * conventions of sht.h (a_1 = -(E_1 + i B_1), a_-1 = +(E_1 - i B_1), so
 * b_1 + b_-1 = -2 i B_1; c_+ - c_- = 2 i a[Im g]) and B = (i/2)(a_2 - a_-2):
 *   B^pure = B[W P] + (2 n_l / N_l) B_1[f] - a[Im g] / N_l.
 * eth W = sum n_L w_LM _1Y_LM is the spin-1 synthesis of a_E = -n_L w_LM,
 * a_B = 0 (a_1 = n_L w), eth^2 W the spin-2 synthesis of a_E = -N_L w_LM. */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "clef/map.h"
#include "clef/purify.h"
#include "clef/sht.h"
#include "core_impl.h"

struct clef_purify {
    int64_t nside, npix;
    int lmax, lmax_w, iterations;
    double tail;
    double *d1[2];      /* Re, Im of eth W */
    double *d2[2];      /* Re, Im of eth^2 W */
    double *f[2];       /* scratch: a spin-1 pair, then Im g */
    double complex *e1, *b1, *g0;
    clef_sht_spin *s1;  /* spin 1 to lmax */
    clef_sht *s0;       /* spin 0 to lmax */
};

void clef_purify_destroy(clef_purify *p)
{
    if (!p)
        return;
    for (int i = 0; i < 2; i++) {
        free(p->d1[i]);
        free(p->d2[i]);
        free(p->f[i]);
    }
    free(p->e1);
    free(p->b1);
    free(p->g0);
    clef_sht_spin_destroy(p->s1);
    clef_sht_destroy(p->s0);
    free(p);
}

double clef_purify_tail(const clef_purify *p) { return p ? p->tail : NAN; }

/* eth W, eth^2 W from w_lm (to lmax_w) and the tail share of eth^2 W. */
static int derivatives(clef_purify *p, const double complex *wlm)
{
    const int L = p->lmax_w;
    const size_t na = clef_alm_size(L, L);
    double complex *e = calloc(na, sizeof *e), *z = calloc(na, sizeof *z);
    clef_sht_spin *sp = NULL;
    int status = CLEF_OK;
    if (!e || !z) {
        status = clef_fail(CLEF_ENOMEM, "purification: out of memory for the window's a_lm");
        goto done;
    }
    double tot = 0.0, top = 0.0;
    const int lq = L - L / 4;
    for (int l = 2; l <= L; l++) {
        double wl = 0.0;
        for (int m = 0; m <= l; m++) {
            const double a = cabs(wlm[clef_alm_index(L, l, m)]);
            wl += (m ? 2.0 : 1.0) * a * a;
        }
        const double dl = l, n2 = (dl - 1.0) * dl * (dl + 1.0) * (dl + 2.0);
        tot += wl * n2;
        if (l > lq)
            top += wl * n2;
    }
    p->tail = tot > 0 ? top / tot : 0.0;
    for (int spin = 1; spin <= 2; spin++) {
        for (int m = 0; m <= L; m++)
            for (int l = m; l <= L; l++) {
                const double dl = l;
                const double nl = spin == 1 ? sqrt(dl * (dl + 1.0))
                                            : sqrt((dl - 1.0) * dl * (dl + 1.0) * (dl + 2.0));
                const size_t i = clef_alm_index(L, l, m);
                e[i] = l >= spin ? -nl * wlm[i] : 0.0;
            }
        CLEF_CHECK(clef_sht_spin_create_s(&sp, p->nside, L, spin, NULL));
        double **d = spin == 1 ? p->d1 : p->d2;
        CLEF_CHECK(clef_sht_spin_synthesis(sp, 1, (const double complex *const *)&e,
                                           (const double complex *const *)&z, &d[0], &d[1]));
        clef_sht_spin_destroy(sp);
        sp = NULL;
    }
done:
fail:
    clef_sht_spin_destroy(sp);
    free(e);
    free(z);
    return status;
}

int clef_purify_create(clef_purify **out, const double *w, int64_t nside, int lmax, int lmax_w,
                       int iterations, const char *name)
{
    int status = CLEF_OK;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "purification: output pointer is NULL");
    *out = NULL;
    if (!name)
        name = "window";
    if (!w)
        CLEF_FAIL(CLEF_EINVAL, "purification: %s is NULL", name);
    if (!clef_nside_valid(nside))
        CLEF_FAIL(CLEF_EINVAL, "purification: nside %lld", (long long)nside);
    if (lmax < 2 || lmax_w < lmax || lmax_w > 3 * nside - 1)
        CLEF_FAIL(CLEF_EINVAL, "purification: lmax %d, window lmax %d (need 2 <= lmax <= "
                  "window lmax <= 3 nside - 1 = %lld)", lmax, lmax_w, (long long)(3 * nside - 1));
    clef_purify *p = calloc(1, sizeof *p);
    if (!p)
        CLEF_FAIL(CLEF_ENOMEM, "purification: out of memory");
    p->nside = nside;
    p->npix = 12 * nside * nside;
    p->lmax = lmax;
    p->lmax_w = lmax_w;
    p->iterations = iterations;
    const size_t np = (size_t)p->npix;
    for (int i = 0; i < 2; i++) {
        p->d1[i] = clef_alloc_large(np * sizeof(double));
        p->d2[i] = clef_alloc_large(np * sizeof(double));
        p->f[i] = clef_alloc_large(np * sizeof(double));
        if (!p->d1[i] || !p->d2[i] || !p->f[i]) {
            status = clef_fail(CLEF_ENOMEM, "purification: out of memory for nside %lld maps",
                               (long long)nside);
            goto fail;
        }
    }
    const size_t na = clef_alm_size(lmax, lmax);
    p->e1 = malloc(na * sizeof *p->e1);
    p->b1 = malloc(na * sizeof *p->b1);
    p->g0 = malloc(na * sizeof *p->g0);
    double complex *wlm = malloc(clef_alm_size(lmax_w, lmax_w) * sizeof *wlm);
    if (!p->e1 || !p->b1 || !p->g0 || !wlm) {
        free(wlm);
        status = clef_fail(CLEF_ENOMEM, "purification: out of memory for a_lm");
        goto fail;
    }
    for (size_t i = 0; i < np; i++)
        if (!(w[i] >= 0) || !isfinite(w[i])) {
            free(wlm);
            status = clef_fail(CLEF_EINVAL, "purification: %s has value %g at pixel %zu (a "
                               "window must be finite and >= 0)", name, w[i], i);
            goto fail;
        }
    clef_sht *sw = NULL;
    status = clef_sht_create(&sw, nside, lmax_w, NULL);
    if (status == CLEF_OK)
        status = clef_sht_analysis(sw, 1, &w, &wlm, iterations);
    clef_sht_destroy(sw);
    if (status == CLEF_OK)
        status = derivatives(p, wlm);
    free(wlm);
    if (status != CLEF_OK)
        goto fail;
    if (!(p->tail <= CLEF_PURIFY_TAIL_MAX)) {
        status = clef_fail(CLEF_EINVAL, "purification: %s is not smooth enough: %.3g of the "
                           "power of its second derivative lies in the top quarter of l <= %d "
                           "(at most %g allowed): taper its edges (clef mask --taper c2 "
                           "--taper-width DEG, several pixels wide or more) or do not purify", name, p->tail, lmax_w,
                           CLEF_PURIFY_TAIL_MAX);
        goto fail;
    }
    if (p->tail > CLEF_PURIFY_TAIL_WARN)
        clef_log(CLEF_LOG_WARN, "purification: %s is only marginally smooth: %.3g of the power "
                 "of its second derivative lies in the top quarter of l <= %d; E-to-B leakage "
                 "may remain (a wider apodization helps)", name, p->tail, lmax_w);
    CLEF_CHECK(clef_sht_spin_create_s(&p->s1, nside, lmax, 1, NULL));
    CLEF_CHECK(clef_sht_create(&p->s0, nside, lmax, NULL));
    *out = p;
    return CLEF_OK;
fail:
    clef_purify_destroy(p);
    return status;
}

int clef_purify_b(const clef_purify *p, const double *q, const double *u,
                  const double complex *alm_b_w, double complex *alm_pure)
{
    if (!p || !q || !u || !alm_b_w || !alm_pure)
        CLEF_FAIL(CLEF_EINVAL, "purification: NULL argument");
    const int64_t np = p->npix;
    const int L = p->lmax;
    double *fr = p->f[0], *fi = p->f[1];
    /* f = P_+ conj(eth W) = (q + iu)(d1r - i d1i). */
#pragma omp parallel for schedule(static)
    for (int64_t i = 0; i < np; i++) {
        fr[i] = q[i] * p->d1[0][i] + u[i] * p->d1[1][i];
        fi[i] = u[i] * p->d1[0][i] - q[i] * p->d1[1][i];
    }
    double complex *e1 = p->e1, *b1 = p->b1, *g0 = p->g0;
    CLEF_TRY(clef_sht_spin_analysis(p->s1, 1, (const double *const *)&fr,
                                    (const double *const *)&fi, &e1, &b1, p->iterations));
    /* Im g, g = P_+ conj(eth^2 W). */
#pragma omp parallel for schedule(static)
    for (int64_t i = 0; i < np; i++)
        fi[i] = u[i] * p->d2[0][i] - q[i] * p->d2[1][i];
    const double *gi = fi;
    CLEF_TRY(clef_sht_analysis(p->s0, 1, &gi, &g0, p->iterations));
    for (int m = 0; m <= L; m++)
        for (int l = m; l <= L; l++) {
            const size_t i = clef_alm_index(L, l, m);
            if (l < 2) {
                alm_pure[i] = 0.0;
                continue;
            }
            const double dl = l, nl = sqrt(dl * (dl + 1.0)),
                         Nl = sqrt((dl - 1.0) * dl * (dl + 1.0) * (dl + 2.0));
            alm_pure[i] = alm_b_w[i] + 2.0 * nl / Nl * b1[i] - g0[i] / Nl;
        }
    return CLEF_OK;
}
