/* Polarized band powers: TT, TE, TB, EE, EB, BB of one T/Q/U field or a
 * pair of fields (pseudo-C_l with spin-2 coupling: Kogut et al. 2003;
 * Brown, Castro & Taylor 2005; Grain et al. 2009).
 *
 * TT is main's temperature estimator run unchanged (clef_spectrum_compute:
 * lmax rules, bins, hidden bins, monopole/dipole removal and its coupling
 * correction, cache, covariance, windows, warnings).  Its bins and ranges
 * are then used for the five other spectra:
 *  - weights w_T = T mask x validity of T, w_P = P mask x validity of Q/U;
 *    T with the monopole and dipole removed (as for TT), Q, U as read
 *    (spin 2 has no l < 2), all weighted, in uK;
 *  - a spin-0 analysis of w_T T, a spin-2 analysis of w_P (Q, U)
 *    (docs/transforms.md), both to lmax_ext, and of the masks to lmax_t;
 *  - pseudo-spectra C~^{T1E2}, C~^{T1B2}, C~^{E1E2}, C~^{B1B2}, C~^{E1B2},
 *    C~^{B1E2};
 *  - M^TE, M+, M- (coupling_pol.c) from W^{T1P2}, W^{P1P2}; TE and TB
 *    decoupled with the binned M^TE, (EE, BB) and (EB, BE) jointly;
 *  - the signal filter of the options (beam, pixel window, transfer) for
 *    every spectrum (the temperature pixel window stands in for the
 *    polarization one: see docs/method.md);
 *  - Gaussian errors per spectrum from the measured pseudo-spectra
 *    (the theory spectrum of the options is a TT one) by the estimator's
 *    covariance code (spectrum_cov.c, clef_spectrum_covariance;
 *    narrow-kernel approximation: Cov(C~^XY) =
 *    [C^XX C^YY + C^XY C^XY] M[w_X w_Y] / (2l'+1)), propagated through
 *    the binned M^TE (TE, TB) or M+ (EE, BB, EB; the leakage terms of the
 *    joint inverse are left out of the error propagation);
 *  - band-power windows on D_l for every spectrum, and the EE -> BB and
 *    BB -> EE leakage windows.
 */
#define _DEFAULT_SOURCE /* M_PI */
#include <complex.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/coupling.h"
#include "clef/hash.h"
#include "clef/purify.h"
#include "clef/sht.h"
#include "clef/spectrum.h"
#include "core_impl.h"
#include "estimator_impl.h"
#include "spectrum_impl.h"

const char *clef_spectrum_pol_name(int k)
{
    static const char *const n[CLEF_POL_NSPEC] = {"TT", "TE", "TB", "EE", "EB", "BB"};
    return k >= 0 && k < CLEF_POL_NSPEC ? n[k] : "?";
}

void clef_spectrum_pol_result_free(clef_spectrum_pol_result *res)
{
    if (!res)
        return;
    for (int k = 1; k < CLEF_POL_NSPEC; k++)
        clef_bandpowers_free(res->bp[k]);
    clef_spectrum_result_free(&res->tt);
    free(res->leak_win);
    memset(res, 0, sizeof *res);
}

typedef struct prun {
    int64_t nside, npix;
    int cross, lmax, lmax_ext, lmax_t, nb, nb_all;
    clef_bins *bins, *all_bins;
    int *rep;
    double *wt[2], *wp[2], *qmap[2], *umap[2], *prod[2];
    double complex *at[2], *ae[2], *ab[2], *am[6];
    double *tl;
    double *wl[4];    /* W^{T1P2}, W^{P1P2}, W[w_T1 w_P2], W[w_P1 w_P2] to lmax_t */
    double *pcl[15];  /* te tb ee bb eb be tt11 tt22 ee11 ee22 bb11 bb22, pure bb bb11 bb22 */
    double complex *abp[2];           /* pure-B a_lm (opts pure_b) */
    clef_coupling *mpure;             /* M of the pure BB (coupling_pure.c) */
    clef_coupling_binned *kpure;
    clef_coupling_pol cp;
    clef_coupling_binned *kte, *kpp;
    clef_coupling *m2[2];             /* M[w_T1 w_P2], M[w_P1 w_P2] for the covariances */
    clef_coupling_pol_binned *keb[2]; /* (EE, BB), (EB, BE) */
} prun;

/* CLEF_CHECK for the part that owns the band-power buffers. */
#define CHECK_B(call)                                                                        \
    do {                                                                                     \
        status = (call);                                                                     \
        if (status != CLEF_OK)                                                               \
            goto fail_b;                                                                     \
    } while (0)

enum { P_TE, P_TB, P_EE, P_BB, P_EB, P_BE, P_TT1, P_TT2, P_EE1, P_EE2, P_BB1, P_BB2, P_BBP,
       P_BBP1, P_BBP2, P_N };

static void prun_free(prun *r)
{
    clef_bins_destroy(r->bins);
    clef_bins_destroy(r->all_bins);
    free(r->rep);
    for (int i = 0; i < 2; i++) {
        if (r->wp[i] != r->wt[i])
            free(r->wp[i]);
        free(r->wt[i]);
        free(r->qmap[i]);
        free(r->umap[i]);
        free(r->prod[i]);
        free(r->at[i]);
        free(r->ae[i]);
        free(r->ab[i]);
        free(r->abp[i]);
    }
    clef_coupling_destroy(r->mpure);
    clef_coupling_binned_destroy(r->kpure);
    for (int i = 0; i < 6; i++)
        free(r->am[i]);
    free(r->tl);
    for (int i = 0; i < 4; i++)
        free(r->wl[i]);
    for (int i = 0; i < P_N; i++)
        free(r->pcl[i]);
    clef_coupling_pol_free(&r->cp);
    if (r->m2[1] != r->m2[0])
        clef_coupling_destroy(r->m2[1]);
    clef_coupling_destroy(r->m2[0]);
    clef_coupling_binned_destroy(r->kte);
    clef_coupling_binned_destroy(r->kpp);
    clef_coupling_pol_binned_destroy(r->keb[0]);
    clef_coupling_pol_binned_destroy(r->keb[1]);
}

/* The TT run's reported bins, plus hidden bins of the last bin's width
 * over lmax+1..lmax_ext (the remainder joins the last hidden bin). */
static int make_bins(prun *r, const clef_bandpowers *bp, int weighting)
{
    const int nb = bp->nbins;
    const int w = bp->l_hi[nb - 1] - bp->l_lo[nb - 1] + 1;
    const int nh = r->lmax_ext - r->lmax >= w ? (r->lmax_ext - r->lmax) / w : 0;
    int *lo = malloc((size_t)(nb + nh) * sizeof *lo), *hi = malloc((size_t)(nb + nh) * sizeof *hi);
    r->rep = malloc((size_t)nb * sizeof *r->rep);
    int status = CLEF_OK;
    if (!lo || !hi || !r->rep) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for bins");
        goto fail;
    }
    for (int b = 0; b < nb; b++) {
        lo[b] = bp->l_lo[b];
        hi[b] = bp->l_hi[b];
        r->rep[b] = b;
    }
    for (int j = 0; j < nh; j++) {
        lo[nb + j] = r->lmax + 1 + j * w;
        hi[nb + j] = j == nh - 1 ? r->lmax_ext : lo[nb + j] + w - 1;
    }
    /* A run above lmax shorter than a bin stays uncovered (a gap), as in
     * the TT run (spectrum.c, make_all_bins). */
    CLEF_CHECK(clef_bins_create_ranges(&r->bins, nb, lo, hi, weighting));
    CLEF_CHECK(clef_bins_create_ranges(&r->all_bins, nb + nh, lo, hi, weighting));
    r->nb = nb;
    r->nb_all = nb + nh;
fail:
    free(lo);
    free(hi);
    return status;
}

static double mean_prod(const double *a, const double *b, int64_t n)
{
    double s = 0;
    for (int64_t p = 0; p < n; p++)
        s += a[p] * b[p];
    return s / (double)n;
}

static double unit_scale(const clef_map *m, const char *what)
{
    const double s = clef_unit_to_uk(m->unit);
    if (s == 0) {
        if (m->unit[0])
            clef_log(CLEF_LOG_WARN, "%s map: unit '%s' not recognised; values taken as uK", what,
                     m->unit);
        return 1.0;
    }
    return s;
}

/* Whether the P weight (the P mask where Q and U are valid) equals the T
 * weight w bit for bit: the same mask and the same missing pixels, the
 * common case; checked without making the P weight. */
static int same_weights(const clef_map_pol *f, const clef_map *mask_p, const double *w,
                        int64_t np)
{
    for (int64_t p = 0; p < np; p++) {
        int in = f->q->valid[p] && mask_p->valid[p];
        if (f->u->valid && !f->u->valid[p])
            in = 0;
        const double v = in ? mask_p->pix[p] : 0.0;
        if (memcmp(&v, &w[p], sizeof v) != 0)
            return 0;
    }
    return 1;
}

static int prepare(prun *r, const clef_map_pol *const f[2], const clef_map *mask_t,
                   const clef_map *mask_p)
{
    const int64_t np = r->npix;
    for (int i = 0; i <= r->cross; i++) {
        CLEF_TRY(clef_spectrum_make_weights(f[i]->t, mask_t, &r->wt[i]));
        if (same_weights(f[i], mask_p, r->wt[i], np))
            r->wp[i] = r->wt[i]; /* shared, not a copy (prun_free) */
        else
            CLEF_TRY(clef_spectrum_make_weights(f[i]->q, mask_p, &r->wp[i]));
        r->qmap[i] = clef_alloc_large((size_t)np * sizeof(double));
        r->umap[i] = clef_alloc_large((size_t)np * sizeof(double));
        if (!r->qmap[i] || !r->umap[i])
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for weighted maps");
        const double sp = unit_scale(f[i]->q, "Q");
        for (int64_t p = 0; p < np; p++) {
            /* Q and U are one spin-2 field: a pixel missing in either is
             * missing in both (clef_map_read_pol joins them already; a
             * caller's own maps may not). */
            if (r->wp[i] != r->wt[i] && f[i]->u->valid && !f[i]->u->valid[p])
                r->wp[i][p] = 0;
            r->qmap[i][p] = sp * f[i]->q->pix[p] * r->wp[i][p];
            r->umap[i][p] = sp * f[i]->u->pix[p] * r->wp[i][p];
        }
    }
    return CLEF_OK;
}

/* The product weights w_T1 w_P2, w_P1 w_P2 (their spectra enter the
 * covariances): made only when the mask spectra are not cached. */
static int make_products(prun *r)
{
    const int64_t np = r->npix;
    const int j = r->cross;
    for (int i = 0; i < 2; i++) {
        r->prod[i] = clef_alloc_large((size_t)np * sizeof(double));
        if (!r->prod[i])
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for product masks");
    }
    for (int64_t p = 0; p < np; p++) {
        r->prod[0][p] = r->wt[0][p] * r->wp[j][p];
        r->prod[1][p] = r->wp[0][p] * r->wp[j][p];
    }
    return CLEF_OK;
}

/* Cache keys of the two polarized mask-spectrum entries (TP: W^{T1P2} with
 * W[w_T1 w_P2]; PP: W^{P1P2} with W[w_P1 w_P2]): SHA-256 of a tag, the
 * version, nside, lmax_t, the iterations and the digests of the two
 * weights.  Each distinct weight map is hashed once (the same mask for T
 * and P, and the P weight of an auto-spectrum, are the common case). */
static void pol_mask_keys(const prun *r, int iterations, char key[2][65])
{
    const double *w[3] = {r->wt[0], r->wp[0], r->wp[r->cross]};
    const size_t bytes = (size_t)r->npix * sizeof(double);
    unsigned char dg[3][CLEF_SHA256_BYTES];
    for (int i = 0; i < 3; i++) {
        int k = 0;
        while (k < i && w[k] != w[i] && memcmp(w[k], w[i], bytes) != 0)
            k++;
        if (k < i) {
            memcpy(dg[i], dg[k], sizeof dg[i]);
            continue;
        }
        clef_sha256 h;
        clef_sha256_init(&h);
        clef_sha256_update(&h, w[i], bytes);
        clef_sha256_final(&h, dg[i]);
    }
    for (int k = 0; k < 2; k++) {
        static const char tag[] = "clef polarized mask spectra";
        const int64_t v[4] = {r->nside, r->lmax_t, iterations, k};
        clef_sha256 h;
        unsigned char d[CLEF_SHA256_BYTES];
        clef_sha256_init(&h);
        clef_sha256_update(&h, tag, sizeof tag);
        clef_sha256_update(&h, CLEF_VERSION, sizeof CLEF_VERSION);
        clef_sha256_update(&h, v, sizeof v);
        clef_sha256_update(&h, dg[k], sizeof dg[k]); /* w_T1 (TP) or w_P1 (PP) */
        clef_sha256_update(&h, dg[2], sizeof dg[2]); /* w_P2 */
        clef_sha256_final(&h, d);
        clef_sha256_hex(d, key[k]);
    }
}

static int transforms(prun *r, const clef_spectrum_opts *o)
{
    const int L = r->lmax_ext, LT = r->lmax_t, nf = 1 + r->cross;
    const size_t na = clef_alm_size(L, L), nt = clef_alm_size(LT, LT);
    for (int i = 0; i < nf; i++) {
        if (!r->at[i])
            CLEF_FAIL(CLEF_EINVAL, "polarized spectrum: the temperature run kept no a_lm");
        r->ae[i] = malloc(na * sizeof(double complex));
        r->ab[i] = malloc(na * sizeof(double complex));
        if (!r->ae[i] || !r->ab[i])
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for a_lm (lmax %d)", L);
    }
    clef_sht *s0 = NULL;
    clef_sht_spin *s2 = NULL;
    clef_sht_opts so = {.nmaps = nf};
    int status = clef_sht_spin_create(&s2, r->nside, L, &so);
    if (status == CLEF_OK)
        status = clef_sht_spin_analysis(s2, nf, (const double *const *)r->qmap,
                                        (const double *const *)r->umap, r->ae, r->ab,
                                        o->iterations);
    clef_sht_spin_destroy(s2);
    CLEF_TRY(status);
    for (int i = 0; i < 4; i++)
        if (!(r->wl[i] = calloc((size_t)LT + 1, sizeof(double))))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for mask spectra");
    /* The mask spectra (W^TP with W[w_T w_P], W^PP with W[w_P w_P]) depend
     * on the weights alone: cached like the temperature run's, under keys
     * of their own (spectrum_cache.c, kind mask-spectra). */
    char key[2][65] = {"", ""};
    int hit[2] = {0, 0};
    double *pay = NULL;
    if (o->use_cache) {
        if (!(pay = malloc(2 * ((size_t)LT + 1) * sizeof *pay)))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for mask spectra");
        pol_mask_keys(r, o->iterations, key);
        for (int k = 0; k < 2; k++) {
            hit[k] = clef_spectrum_mask_cache(o, key[k], LT, 2, pay, 0);
            if (hit[k]) {
                memcpy(r->wl[k], pay, ((size_t)LT + 1) * sizeof *pay);
                memcpy(r->wl[2 + k], pay + LT + 1, ((size_t)LT + 1) * sizeof *pay);
            }
        }
    }
    if (!hit[0] || !hit[1]) {
        status = make_products(r);
        if (status != CLEF_OK) {
            free(pay);
            return status;
        }
        /* Masks: w_T1, w_P1, w_T2, w_P2 (cross), w_T1 w_P2, w_P1 w_P2. */
        const double *min[6];
        int nm = 0;
        min[nm++] = r->wt[0];
        min[nm++] = r->wp[0];
        if (r->cross) {
            min[nm++] = r->wt[1];
            min[nm++] = r->wp[1];
        }
        min[nm++] = r->prod[0];
        min[nm++] = r->prod[1];
        for (int i = 0; i < nm; i++)
            if (!(r->am[i] = malloc(nt * sizeof(double complex)))) {
                free(pay);
                CLEF_FAIL(CLEF_ENOMEM, "out of memory for mask a_lm (lmax %d)", LT);
            }
        so.nmaps = nm;
        status = clef_sht_create(&s0, r->nside, LT, &so);
        if (status == CLEF_OK)
            status = clef_sht_analysis(s0, nm, min, r->am, o->iterations);
        clef_sht_destroy(s0);
        const int it1 = 0, ip1 = 1, ip2 = r->cross ? 3 : 1, iprod = r->cross ? 4 : 2;
        if (status == CLEF_OK)
            status = clef_alm_cl(LT, LT, r->am[it1], r->am[ip2], r->wl[0]);
        if (status == CLEF_OK)
            status = clef_alm_cl(LT, LT, r->am[ip1], r->am[ip2], r->wl[1]);
        if (status == CLEF_OK)
            status = clef_alm_cl(LT, LT, r->am[iprod], NULL, r->wl[2]);
        if (status == CLEF_OK)
            status = clef_alm_cl(LT, LT, r->am[iprod + 1], NULL, r->wl[3]);
        for (int l = 0; l <= LT && status == CLEF_OK; l++) /* round-off below 0 */
            for (int k = 1; k < 4; k++)
                if (r->wl[k][l] < 0)
                    r->wl[k][l] = 0;
        for (int k = 0; k < 2 && status == CLEF_OK && pay; k++) {
            memcpy(pay, r->wl[k], ((size_t)LT + 1) * sizeof *pay);
            memcpy(pay + LT + 1, r->wl[2 + k], ((size_t)LT + 1) * sizeof *pay);
            clef_spectrum_mask_cache(o, key[k], LT, 2, pay, 1);
        }
    }
    free(pay);
    CLEF_TRY(status);
    for (int i = 0; i < P_N; i++)
        if (!(r->pcl[i] = calloc((size_t)L + 1, sizeof(double))))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for spectra");
    const int j = r->cross;
    double complex *const *t = r->at, *const *e = r->ae, *const *b = r->ab;
    CLEF_TRY(clef_alm_cl(L, L, t[0], e[j], r->pcl[P_TE]));
    CLEF_TRY(clef_alm_cl(L, L, t[0], b[j], r->pcl[P_TB]));
    CLEF_TRY(clef_alm_cl(L, L, e[0], e[j], r->pcl[P_EE]));
    CLEF_TRY(clef_alm_cl(L, L, b[0], b[j], r->pcl[P_BB]));
    CLEF_TRY(clef_alm_cl(L, L, e[0], b[j], r->pcl[P_EB]));
    CLEF_TRY(clef_alm_cl(L, L, b[0], e[j], r->pcl[P_BE]));
    for (int i = 0; i < 2; i++) {
        const int k = i ? j : 0;
        CLEF_TRY(clef_alm_cl(L, L, t[k], NULL, r->pcl[P_TT1 + i]));
        CLEF_TRY(clef_alm_cl(L, L, e[k], NULL, r->pcl[P_EE1 + i]));
        CLEF_TRY(clef_alm_cl(L, L, b[k], NULL, r->pcl[P_BB1 + i]));
    }
    return CLEF_OK;
}

/* B-mode purification (purify.h): pure-B a_lm of each field from its own P
 * weight (one plan when the two fields' weights are equal), then the pure
 * BB pseudo-spectra.  Q, U enter unweighted (uK), zero outside the weight. */
static int purify_fields(prun *r, const clef_map_pol *const f[2], const clef_spectrum_opts *o,
                         clef_spectrum_pol_result *res)
{
    const int L = r->lmax_ext, nf = 1 + r->cross;
    const int64_t np = r->npix;
    double *q = clef_alloc_large((size_t)np * sizeof *q), *u = clef_alloc_large((size_t)np * sizeof *u);
    clef_purify *pl = NULL;
    int status = CLEF_OK;
    if (!q || !u) {
        status = clef_fail(CLEF_ENOMEM, "purification: out of memory for Stokes maps");
        goto done;
    }
    for (int i = 0; i < nf; i++) {
        if (!(r->abp[i] = malloc(clef_alm_size(L, L) * sizeof(double complex)))) {
            status = clef_fail(CLEF_ENOMEM, "purification: out of memory for a_lm");
            goto done;
        }
        const int same = i > 0 && !memcmp(r->wp[0], r->wp[i], (size_t)np * sizeof(double));
        if (!same) {
            clef_purify_destroy(pl);
            pl = NULL;
            char name[160];
            snprintf(name, sizeof name, "the polarization weight of %s (mask x valid Q/U)",
                     o->names[i] ? o->names[i] : (i ? "map 2" : "map 1"));
            /* The window's expansion: to 2 nside (the quadrature's accurate
             * range), at least lmax_ext. */
            const int lw0 = r->lmax_t < 2 * r->nside ? r->lmax_t : (int)(2 * r->nside);
            CLEF_CHECK(clef_purify_create(&pl, r->wp[i], r->nside, L, lw0 > L ? lw0 : L,
                                          o->iterations, name));
        }
        res->pure_tail[i] = clef_purify_tail(pl);
        const double sp = unit_scale(f[i]->q, "Q");
        for (int64_t p = 0; p < np; p++) {
            const int in = r->wp[i][p] > 0;
            q[p] = in ? sp * f[i]->q->pix[p] : 0.0;
            u[p] = in ? sp * f[i]->u->pix[p] : 0.0;
        }
        CLEF_CHECK(clef_purify_b(pl, q, u, r->ab[i], r->abp[i]));
    }
    if (!r->cross)
        res->pure_tail[1] = res->pure_tail[0];
    const int j = r->cross;
    CLEF_CHECK(clef_alm_cl(L, L, r->abp[0], r->abp[j], r->pcl[P_BBP]));
    CLEF_CHECK(clef_alm_cl(L, L, r->abp[0], NULL, r->pcl[P_BBP1]));
    CLEF_CHECK(clef_alm_cl(L, L, r->abp[j], NULL, r->pcl[P_BBP2]));
done:
fail:
    clef_purify_destroy(pl);
    free(q);
    free(u);
    return status;
}

/* One table: band powers of the reported bins, covariance, windows. */
static int make_table(prun *r, clef_bandpowers **out, const double *band_all,
                      const clef_spectrum_cov_in *ci, const double *win_all, size_t stride,
                      const char *name, const clef_bandpowers *tt)
{
    const int nb = r->nb, na = r->nb_all;
    const size_t n = (size_t)r->lmax_ext + 1;
    clef_bandpowers *bp = NULL;
    double *cov = malloc((size_t)na * na * sizeof *cov), *crep = malloc((size_t)nb * nb * sizeof *crep);
    int status = CLEF_OK;
    if (!cov || !crep) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
        goto fail;
    }
    CLEF_CHECK(clef_bandpowers_alloc(&bp, nb, 1));
    CLEF_CHECK(clef_spectrum_covariance(ci, cov));
    for (int i = 0; i < nb; i++)
        for (int k = 0; k < nb; k++)
            crep[(size_t)i * nb + k] = cov[(size_t)r->rep[i] * na + r->rep[k]];
    clef_spectrum_fill_table(bp, r->bins, band_all, crep);
    CLEF_CHECK(clef_bandpowers_alloc_windows(bp, r->lmax_ext));
    clef_spectrum_windows_to_dl(r->bins, r->rep, nb, win_all, stride, n, bp->win);
    for (int i = 0; i < tt->nmeta; i++)
        CLEF_CHECK(tt->meta[i].is_number
                       ? clef_bandpowers_meta_number(bp, tt->meta[i].key,
                                                     atof(tt->meta[i].value), tt->meta[i].comment)
                       : clef_bandpowers_meta_text(bp, tt->meta[i].key, tt->meta[i].value,
                                                   tt->meta[i].comment));
    CLEF_CHECK(clef_bandpowers_meta_text(bp, "SPECTRUM", name, "which spectrum of T, E, B"));
    *out = bp;
    bp = NULL;
fail:
    clef_bandpowers_free(bp);
    free(cov);
    free(crep);
    return status;
}

int clef_spectrum_pol_compute(const clef_map_pol *f1, const clef_map_pol *f2,
                              const clef_map *mask_t, const clef_map *mask_p,
                              const clef_spectrum_opts *opts, const double *noise_p,
                              int noise_p_lmax, clef_spectrum_pol_result *res)
{
    if (!res)
        CLEF_FAIL(CLEF_EINVAL, "polarized spectrum: result is NULL");
    memset(res, 0, sizeof *res);
    if (!f1 || !f1->t || !f1->q || !f1->u || (f2 && (!f2->t || !f2->q || !f2->u)))
        CLEF_FAIL(CLEF_EINVAL, "polarized spectrum: each field needs T, Q and U maps");
    if (!mask_t)
        CLEF_FAIL(CLEF_EINVAL, "polarized spectrum: a temperature mask is required");
    if (!mask_p)
        mask_p = mask_t;
    clef_spectrum_opts o;
    if (opts)
        o = *opts;
    else
        clef_spectrum_opts_default(&o);
    o.find_peak = 0; /* the peak belongs to the temperature run of clef spectrum */
    int ac = o.allow_coord_mismatch;
    for (int i = 0; i < (f2 ? 2 : 1); i++) {
        const clef_map_pol *f = i ? f2 : f1;
        CLEF_TRY(clef_map_check_mask(f->q, o.names[i], mask_p, "polarization mask", ac));
        if (f->q->nside != f1->t->nside)
            CLEF_FAIL(CLEF_EINVAL, "polarized spectrum: Q/U maps of nside %lld, T of %lld",
                      (long long)f->q->nside, (long long)f1->t->nside);
    }
    prun r;
    memset(&r, 0, sizeof r);
    r.cross = f2 != NULL;
    r.nside = f1->t->nside;
    r.npix = f1->t->npix;
    int status = CLEF_OK;
    /* TT: the temperature estimator (clef_spectrum_compute), unchanged. */
    o.keep_alm = 1;
    o.inputs_done = NULL; /* Q, U and the P mask are weighted after TT */
    CLEF_CHECK(clef_spectrum_compute(f1->t, f2 ? f2->t : NULL, mask_t, NULL, &o, &res->tt));
    /* The T a_lm of the TT run (weighted, multipoles removed, uK, to
     * lmax_ext) serve the TE and TB pseudo-spectra: no second analysis. */
    for (int i = 0; i < 2; i++) {
        r.at[i] = res->tt.alm[i];
        res->tt.alm[i] = NULL;
    }
    res->bp[CLEF_POL_TT] = res->tt.bp;
    res->cross = r.cross;
    r.lmax = res->tt.lmax;
    r.lmax_ext = res->tt.lmax_ext;
    CLEF_CHECK(make_bins(&r, res->tt.bp, o.bins ? clef_bins_weighting(o.bins) : CLEF_BINS_DL));
    r.lmax_t = 2 * r.lmax_ext < 3 * r.nside - 1 ? 2 * r.lmax_ext : (int)(3 * r.nside - 1);
    res->lmax = r.lmax;
    res->lmax_ext = r.lmax_ext;
    res->nbins = r.nb;
    const clef_map_pol *const f[2] = {f1, f2 ? f2 : f1};
    CLEF_CHECK(prepare(&r, f, mask_t, mask_p));
    CLEF_CHECK(transforms(&r, &o));
    res->pure_b = o.pure_b != 0;
    if (o.pure_b)
        CLEF_CHECK(purify_fields(&r, f, &o, res));
    clef_progress("coupling-pol", 0.0);
    if (o.use_cache)
        CLEF_CHECK(clef_coupling_pol_create_cached(&r.cp, r.lmax_ext, r.wl[0], r.wl[1], r.lmax_t,
                                                   o.cache_dir, &res->pol_cache_hit));
    else
        CLEF_CHECK(clef_coupling_pol_create(&r.cp, r.lmax_ext, r.wl[0], r.wl[1], r.lmax_t));
    clef_progress("coupling-pol", 1.0);
    if (!(r.tl = malloc(((size_t)r.lmax_ext + 1) * sizeof *r.tl))) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the filter");
        goto fail;
    }
    CLEF_CHECK(clef_est_signal_filter(&o, r.nside, r.lmax_ext, r.tl));
    if (r.cross && o.second_instrument) {
        /* Two instruments: the pair's filter sqrt(F_1 F_2) B_1 B_2 p_l^2, as
         * the temperature estimator's (estimator_bins.c). */
        clef_spectrum_opts o2;
        clef_est_second_opts(&o, &o2);
        double *t2 = malloc(((size_t)r.lmax_ext + 1) * sizeof *t2);
        if (!t2) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for the filter");
            goto fail;
        }
        status = clef_est_signal_filter(&o2, r.nside, r.lmax_ext, t2);
        for (int l = 0; status == CLEF_OK && l <= r.lmax_ext; l++)
            r.tl[l] = sqrt(r.tl[l] * t2[l]);
        free(t2);
        if (status != CLEF_OK)
            goto fail;
    }
    clef_coupling_opts co = {.rcond_min = o.rcond_min, .width_level = 0};
    CLEF_CHECK(clef_coupling_binned_create(&r.kte, r.cp.te, r.all_bins, r.tl, &co));
    CLEF_CHECK(clef_coupling_binned_create(&r.kpp, r.cp.pp, r.all_bins, r.tl, &co));
    if (o.pure_b) {
        /* Standard EE with the pure BB: <C~^EE> = M+ C^EE + M- C^BB,
         * <C~^BB_pure> = M_pure C^BB (no E term: coupling_pure.c). */
        CLEF_CHECK(clef_coupling_pure_create(&r.mpure, r.lmax_ext, r.wl[1], r.lmax_t));
        CLEF_CHECK(clef_coupling_binned_create(&r.kpure, r.mpure, r.all_bins, r.tl, &co));
        CLEF_CHECK(clef_coupling_pol_binned_create_rows(&r.keb[0], r.cp.pp, r.cp.mm, NULL,
                                                        r.mpure, r.all_bins, r.tl, &co));
    } else {
        CLEF_CHECK(clef_coupling_pol_binned_create(&r.keb[0], r.cp.pp, r.cp.mm, r.all_bins, r.tl,
                                                   1, &co));
    }
    CLEF_CHECK(clef_coupling_pol_binned_create(&r.keb[1], r.cp.pp, r.cp.mm, r.all_bins, r.tl, -1,
                                               &co));
    res->rcond_eebb = clef_coupling_pol_binned_rcond(r.keb[0]);
    res->rcond_ebbe = clef_coupling_pol_binned_rcond(r.keb[1]);

    /* Noise bias of the auto EE and BB: N^EE = N^BB = N_l (white-like
     * polarization noise), <N~^EE> = <N~^BB> = (M+ + M-) N. */
    const int L = r.lmax_ext, na = r.nb_all;
    const size_t n = (size_t)L + 1;
    double *dec[2] = {NULL, NULL}, *cov_work = NULL;
    double *band = malloc((size_t)6 * na * sizeof *band);
    double *win = malloc((size_t)2 * na * 2 * n * sizeof *win);
    if (!band || !win) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for band powers");
        goto fail_b;
    }
    for (int i = 0; i < 2; i++)
        if (!(dec[i] = malloc(n * sizeof(double)))) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for band powers");
            goto fail_b;
        }
    memcpy(dec[0], r.pcl[P_EE], n * sizeof(double));
    memcpy(dec[1], r.pcl[o.pure_b ? P_BBP : P_BB], n * sizeof(double));
    if (noise_p && !r.cross) {
        if (noise_p_lmax < L) {
            status = clef_fail(CLEF_EINVAL, "the polarization noise spectrum stops at l = %d, "
                               "below %d", noise_p_lmax, L);
            goto fail_b;
        }
        double *b1 = malloc(n * sizeof *b1), *b2 = malloc(n * sizeof *b2);
        if (!b1 || !b2) {
            free(b1);
            free(b2);
            status = clef_fail(CLEF_ENOMEM, "out of memory for the noise bias");
            goto fail_b;
        }
        clef_coupling_apply(r.cp.pp, noise_p, b1);
        clef_coupling_apply(r.cp.mm, noise_p, b2);
        for (size_t l = 0; l < n; l++)
            dec[0][l] -= b1[l] + b2[l];
        if (r.mpure) { /* <N~^BB_pure> = M_pure N^BB (the E column is zero) */
            clef_coupling_apply(r.mpure, noise_p, b1);
            for (size_t l = 0; l < n; l++)
                dec[1][l] -= b1[l];
        } else {
            for (size_t l = 0; l < n; l++)
                dec[1][l] -= b1[l] + b2[l];
        }
        free(b1);
        free(b2);
    } else if (noise_p) {
        clef_log(CLEF_LOG_WARN, "polarization noise spectrum ignored: a cross-spectrum of fields "
                 "with independent noise carries no noise bias");
    }
    double *bte = band, *btb = band + na, *bee = band + 2 * na, *bbb = band + 3 * na,
           *beb = band + 4 * na, *bbe = band + 5 * na;
    clef_coupling_binned_decouple(r.kte, r.pcl[P_TE], bte);
    clef_coupling_binned_decouple(r.kte, r.pcl[P_TB], btb);
    clef_coupling_pol_binned_decouple(r.keb[0], dec[0], dec[1], bee, bbb);
    clef_coupling_pol_binned_decouple(r.keb[1], r.pcl[P_EB], r.pcl[P_BE], beb, bbe);
    if (!r.cross) /* EB and BE estimate the same spectrum: average them */
        for (int b = 0; b < na; b++)
            beb[b] = 0.5 * (beb[b] + bbe[b]);

    const int j = r.cross;
    const double w_tp = mean_prod(r.wt[0], r.wp[j], r.npix), w_pp = mean_prod(r.wp[0], r.wp[j], r.npix);
    const double w_tt1 = mean_prod(r.wt[0], r.wt[0], r.npix), w_pp1 = mean_prod(r.wp[0], r.wp[0], r.npix);
    const double w_pp2 = mean_prod(r.wp[j], r.wp[j], r.npix);
    double *p3[3];
    /* TE, TB: cross-type covariance with T1 and X2 autos. */
    clef_spectrum_cov_in ci = {.lmax = L, .cross = 1, .bins = r.all_bins, .kb = r.kte,
                               .pcl = p3, .w2 = {w_tp, w_tt1, w_pp2}};
    /* One workspace for the five covariances (fresh pages cost as much as
     * the sums that fill them): the weighted Q map, done with since the
     * transforms ((lmax_ext + 1)^2 <= 9 nside^2 < npix). */
    if (n * n <= (size_t)r.npix && r.qmap[0])
        ci.work = r.qmap[0];
    else if (!(ci.work = cov_work = clef_alloc_large(n * n * sizeof *cov_work))) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance (lmax %d)", L);
        goto fail_b;
    }
    CHECK_B(clef_spectrum_coupling(&r.m2[0], L, r.wl[2], r.lmax_t, &o));
    /* The same T and P weights (the common case) give the same mask
     * spectrum, hence the same kernel: made (or read) once. */
    if (!memcmp(r.wl[2], r.wl[3], ((size_t)r.lmax_t + 1) * sizeof(double)))
        r.m2[1] = r.m2[0];
    else
        CHECK_B(clef_spectrum_coupling(&r.m2[1], L, r.wl[3], r.lmax_t, &o));
    ci.m2 = r.m2[0];
    CHECK_B(clef_coupling_binned_windows(r.kte, r.cp.te, r.all_bins, r.tl, win));
    p3[0] = r.pcl[P_TE];
    p3[1] = r.pcl[P_TT1];
    p3[2] = r.pcl[P_EE2];
    CHECK_B(make_table(&r, &res->bp[CLEF_POL_TE], bte, &ci, win, n, "TE", res->tt.bp));
    p3[0] = r.pcl[P_TB];
    p3[2] = r.pcl[P_BB2];
    CHECK_B(make_table(&r, &res->bp[CLEF_POL_TB], btb, &ci, win, n, "TB", res->tt.bp));
    /* EE, BB: joint windows; errors through K+. */
    CHECK_B(clef_coupling_pol_binned_windows_rows(r.keb[0], r.all_bins, r.tl, win));
    ci.kb = r.kpp;
    ci.m2 = r.m2[1];
    ci.cross = r.cross;
    ci.w2[0] = w_pp;
    ci.w2[1] = w_pp1;
    ci.w2[2] = w_pp2;
    p3[0] = r.pcl[P_EE];
    p3[1] = r.pcl[P_EE1];
    p3[2] = r.pcl[P_EE2];
    CHECK_B(make_table(&r, &res->bp[CLEF_POL_EE], bee, &ci, win, 2 * n, "EE", res->tt.bp));
    /* Pure BB: the same narrow-kernel covariance of the measured pseudo-
     * spectra, propagated through the pure operator (an approximation:
     * the counter-terms' weights are not in M[w_P w_P]; docs/method.md). */
    if (r.kpure)
        ci.kb = r.kpure;
    p3[0] = r.pcl[o.pure_b ? P_BBP : P_BB];
    p3[1] = r.pcl[o.pure_b ? P_BBP1 : P_BB1];
    p3[2] = r.pcl[o.pure_b ? P_BBP2 : P_BB2];
    /* BB rows start at row na; their BB columns at offset n. */
    CHECK_B(make_table(&r, &res->bp[CLEF_POL_BB], bbb, &ci, win + (size_t)na * 2 * n + n, 2 * n,
                          "BB", res->tt.bp));
    ci.kb = r.kpp;
    if (o.pure_b)
        CHECK_B(clef_bandpowers_meta_number(res->bp[CLEF_POL_BB], "PURE_B", 1,
                                            "BB from pure-B multipoles (purification)"));
    /* Leakage windows on D_l: BB bands on C^EE, then EE bands on C^BB. */
    res->win_lmax = L;
    if (!(res->leak_win = malloc((size_t)2 * r.nb * n * sizeof *res->leak_win))) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for leakage windows");
        goto fail_b;
    }
    clef_spectrum_windows_to_dl(r.bins, r.rep, r.nb, win + (size_t)na * 2 * n, 2 * n, n,
                                res->leak_win);
    clef_spectrum_windows_to_dl(r.bins, r.rep, r.nb, win + n, 2 * n, n,
                                res->leak_win + (size_t)r.nb * n);
    /* EB: cross-type covariance with the E1 and B2 autos. */
    CHECK_B(clef_coupling_pol_binned_windows(r.keb[1], r.cp.pp, r.cp.mm, r.all_bins, r.tl, win));
    ci.cross = 1;
    p3[0] = r.pcl[P_EB];
    p3[1] = r.pcl[P_EE1];
    p3[2] = r.pcl[P_BB2];
    CHECK_B(make_table(&r, &res->bp[CLEF_POL_EB], beb, &ci, win, 2 * n, "EB", res->tt.bp));
    CHECK_B(clef_bandpowers_meta_text(res->tt.bp, "SPECTRUM", "TT", "which spectrum of T, E, B"));
fail_b:
    free(cov_work);
    free(band);
    free(win);
    free(dec[0]);
    free(dec[1]);
fail:
    prun_free(&r);
    if (status != CLEF_OK)
        clef_spectrum_pol_result_free(res);
    return status;
}
