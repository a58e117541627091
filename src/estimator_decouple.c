/* Stages "masks", "coupling", "decouple" and "windows" of the estimator.
 * What depends on two sets of weights alone (mask spectra, deprojection
 * correction, coupling matrix M) lives in one est_masks per distinct pair
 * of weights (in either order), computed once for all pairs of fields
 * sharing it, and goes through the cache folder; what depends on the pair
 * filter as well (hidden bins, the binned operator K, the windows) in one
 * est_op per distinct (weights pair, filter); the band powers in the
 * pair. */
#define _DEFAULT_SOURCE
#include <complex.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/hash.h"
#include "clef/sht.h"
#include "core_impl.h"
#include "estimator_impl.h"
#include "spectrum_impl.h"

/* Mask spectra of one pair of weights from the weight transforms: W_l of
 * the pair (a cross-spectrum for two masks) and the covariance kernels
 * W[w_a^2, w_b^2] and W[w_a w_b] (spectrum_cov.c). */
static int mask_spectra(clef_estimator *e, est_masks *mk)
{
    CLEF_TRY(clef_est_weight_alms(e));
    const int lt = e->lmax_t;
    double complex *const *a = e->walm;
    CLEF_TRY(clef_alm_cl(lt, lt, a[mk->wa], mk->wa == mk->wb ? NULL : a[mk->wb], mk->wl));
    const int iab = clef_est_product_index(e, mk->wa, mk->wb);
    CLEF_TRY(clef_alm_cl(lt, lt, a[iab], NULL, mk->wl + lt + 1));
    if (mk->nrows == 3)
        CLEF_TRY(clef_alm_cl(lt, lt, a[clef_est_product_index(e, mk->wa, mk->wa)],
                             a[clef_est_product_index(e, mk->wb, mk->wb)], mk->wl + 2 * (lt + 1)));
    /* A cross W_l can dip below 0 (round-off, or two masks whose products
     * differ in shape); the coupling takes W_l >= 0, and the negative part
     * is small at every l where W_l matters. */
    for (int r = 0; r < mk->nrows; r++)
        for (int l = 0; l <= lt; l++)
            if (mk->wl[(size_t)r * (lt + 1) + l] < 0)
                mk->wl[(size_t)r * (lt + 1) + l] = 0;
    return CLEF_OK;
}

int clef_est_mask_pairs(clef_estimator *e)
{
    const int lt = e->lmax_t;
    for (int k = 0; k < e->npairs; k++) {
        est_pair *p = &e->pairs[k];
        const int wa = e->fields[p->a].wid, wb = e->fields[p->b].wid;
        /* M, W_l, the kernels and the deprojection correction are symmetric
         * in the two weights (a cross-spectrum of real maps: C^ab = C^ba):
         * (w_b, w_a) is the pair of masks (w_a, w_b). */
        int found = -1;
        for (int j = 0; j < e->nmasks; j++)
            if ((e->masks[j].wa == wa && e->masks[j].wb == wb) ||
                (e->masks[j].wa == wb && e->masks[j].wb == wa))
                found = j;
        if (found >= 0) {
            p->mp = found;
            continue;
        }
        est_masks *nm = realloc(e->masks, (size_t)(e->nmasks + 1) * sizeof *nm);
        if (!nm)
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for mask pairs");
        e->masks = nm;
        est_masks *mk = &nm[e->nmasks];
        memset(mk, 0, sizeof *mk);
        p->mp = e->nmasks++;
        mk->wa = wa;
        mk->wb = wb;
        mk->nrows = wa == wb ? 2 : 3;
        int taken = 0;
        CLEF_TRY(clef_est_reuse_masks(e, mk, &taken));
        if (taken)
            continue;
        const double *w0 = e->weights[wa].w, *w1 = e->weights[wb].w;
        double sab = 0;
        for (int64_t q = 0; q < e->npix; q++)
            sab += w0[q] * w1[q];
        mk->wab = sab / (double)e->npix;
        if (!(mk->wl = calloc((size_t)mk->nrows * ((size_t)lt + 1), sizeof *mk->wl)))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for mask spectra");
        /* The mask spectra depend on the weights alone: a nightly rerun
         * with the same masks takes them from the cache and analyses the
         * maps only. */
        int hit = 0;
        if (e->o.use_cache) { /* hashing the weights once serves the load and the store */
            clef_spectrum_mask_key(e->nside, lt, e->o.iterations, wa == wb ? NULL : w1, w0,
                                   mk->key);
            hit = clef_spectrum_mask_cache(&e->o, mk->key, lt, mk->nrows, mk->wl, 0);
        }
        if (!hit) {
            CLEF_TRY(mask_spectra(e, mk));
            if (e->o.use_cache)
                clef_spectrum_mask_cache(&e->o, mk->key, lt, mk->nrows, mk->wl, 1);
        }
        mk->cw = clef_coupling_width(mk->wl, lt, CLEF_COUPLING_WIDTH_LEVEL);
    }
    clef_est_stage_done(e, "masks");
    return CLEF_OK;
}

/* The coupling correction for the removed monopole and dipole (Elsner,
 * Leistedt & Peiris 2017; spectrum_deproj.c), from the cache when the
 * same weights and templates were seen before.  Without it the removal
 * takes real low-l power out of the band powers: on a 15-degree patch the
 * bin 2-24 came out 61% low (docs/method.md section 2). */
static int deproject(clef_estimator *r, est_masks *mk)
{
    if (r->o.keep_multipoles || mk->m) /* or taken, corrected, from an earlier estimator */
        return CLEF_OK;
    /* One side when both maps have the same weights (and so templates). */
    const int same = mk->wa == mk->wb;
    const double *w0 = r->weights[mk->wa].w, *w1 = r->weights[mk->wb].w;
    const int nf0 = r->weights[mk->wa].nf, nf1 = r->weights[mk->wb].nf;
    clef_spectrum_deproj_in in = {
        .nside = r->nside, .lmax = r->lmax_ext, .iterations = r->o.iterations,
        .w = {w0, same ? w0 : w1}, .nf = {nf0, same ? nf0 : nf1}, .w2 = mk->wab};
    const int lp = r->lmax_ext < CLEF_DEPROJ_LMAX_MAX ? r->lmax_ext : CLEF_DEPROJ_LMAX_MAX;
    const size_t np = 3 + (size_t)(lp + 1) * (lp + 1);
    char key[65] = "";
    double *pay = NULL;
    if (r->o.use_cache && mk->key[0]) {
        clef_spectrum_deproj_key(mk->key, in.nf, lp, r->o.iterations, key);
        if (!(pay = calloc(np, sizeof *pay)))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the deprojection");
        if (clef_spectrum_deproj_cache(&r->o, key, np, pay, 0)) {
            /* Payload: ldep, truncated, level, then D packed. */
            const int n = (int)pay[0];
            const size_t nn = (size_t)(n + 1) * (n + 1);
            mk->dep.ldep = n;
            mk->dep.truncated = (int)pay[1];
            mk->dep.level_at_cut = pay[2];
            if (!(mk->dep.dmean = malloc(nn * sizeof(double)))) {
                free(pay);
                CLEF_FAIL(CLEF_ENOMEM, "out of memory for the deprojection");
            }
            memcpy(mk->dep.dmean, pay + 3, nn * sizeof(double));
        }
    }
    int status = CLEF_OK;
    if (!mk->dep.dmean) {
        status = clef_spectrum_deproj(&in, &mk->dep);
        if (status == CLEF_OK && pay) {
            const size_t nn = (size_t)(mk->dep.ldep + 1) * (mk->dep.ldep + 1);
            pay[0] = mk->dep.ldep;
            pay[1] = mk->dep.truncated;
            pay[2] = mk->dep.level_at_cut;
            memcpy(pay + 3, mk->dep.dmean, nn * sizeof(double));
            clef_spectrum_deproj_cache(&r->o, key, np, pay, 1);
        }
    }
    free(pay);
    CLEF_TRY(status);
    if (mk->dep.truncated)
        clef_log(CLEF_LOG_WARN,
                 "the monopole/dipole removal is corrected in the coupling up to l = %d only; "
                 "it still removes %.2g of the power per mode there (a mask with sharp edges "
                 "on a small patch): band powers above may be biased low by about that much",
                 mk->dep.ldep, mk->dep.level_at_cut);
    return CLEF_OK;
}

/* A coupling matrix to lmax_ext from mask spectra to lmax_t: through the
 * cache folder when the run uses it, made by the options' coupling_create
 * when set (clef sims shares the rows among its ranks). */
int clef_est_make_coupling(clef_estimator *e, clef_coupling **m, const double *wl, int *hit)
{
    const clef_spectrum_opts *o = &e->o;
    *hit = 0;
    if (o->use_cache)
        return clef_coupling_create_cached_with(m, e->lmax_ext, wl, e->lmax_t, o->cache_dir, hit,
                                                o->coupling_create, o->coupling_arg);
    if (o->coupling_create)
        return o->coupling_create(o->coupling_arg, m, e->lmax_ext, wl, e->lmax_t);
    return clef_coupling_create(m, e->lmax_ext, wl, e->lmax_t);
}

/* The coupling matrix M to lmax_ext of each pair of weights (cached),
 * corrected for the monopole/dipole removal.  M itself is kept: the noise
 * bias and the window functions need it, and K is cheap to build from it. */
int clef_est_couplings(clef_estimator *e)
{
    for (int k = 0; k < e->nmasks; k++)
        CLEF_TRY(deproject(e, &e->masks[k]));
    if (!e->o.keep_multipoles)
        clef_est_stage_done(e, "deproject");
    clef_progress("coupling", 0.0);
    for (int k = 0; k < e->nmasks; k++) {
        est_masks *mk = &e->masks[k];
        if (mk->m) /* taken from an earlier estimator, corrected */
            continue;
        CLEF_TRY(clef_est_make_coupling(e, &mk->m, mk->wl, &mk->cache_hit));
        if (mk->cache_hit)
            e->n_coupling_read++;
        else
            e->n_coupling_made++;
        if (mk->dep.dmean) {
            /* The monopole/dipole removal (spectrum_deproj.c): M - D where
             * the templates carry power, and no coupling at all from l = 0
             * (and 1 with the dipole), which the fit removes exactly from
             * the observed sky, beyond it. */
            const int dip = e->weights[mk->wa].nf == 4 && e->weights[mk->wb].nf == 4;
            CLEF_TRY(clef_coupling_add_block(mk->m, mk->dep.ldep + 1, mk->dep.dmean, -1.0));
            CLEF_TRY(clef_coupling_zero_columns(mk->m, dip ? 1 : 0));
        }
        clef_progress("coupling", (k + 1.0) / e->nmasks);
    }
    clef_est_stage_done(e, "coupling");
    return CLEF_OK;
}

/* The binned operator K of one pair, its noise bias, its band powers over
 * all bins (reported and hidden). */
int clef_est_decouple(clef_estimator *e, est_pair *p)
{
    const int lmax = e->lmax_ext;
    const clef_spectrum_opts *o = &e->o;
    const est_masks *mk = &e->masks[p->mp];
    const est_field *fa = &e->fields[p->a];
    est_op *op = &e->ops[p->op];
    if (!op->kb) /* the first pair of its operator takes K from an earlier estimator, */
        clef_est_reuse_op(e, op);
    if (!op->kb) { /* or builds it */
        clef_coupling_opts co;
        co.rcond_min = o->rcond_min > 0 ? o->rcond_min : CLEF_COUPLING_RCOND_MIN;
        co.width_level = CLEF_COUPLING_WIDTH_LEVEL;
        CLEF_TRY(clef_coupling_binned_create(&op->kb, mk->m, op->all_bins, op->tl, &co));
    }
    p->kb = op->kb;
    p->res.rcond = clef_coupling_binned_rcond(p->kb);

    /* The pseudo-spectrum: a single map's auto-spectrum, or the mean of the
     * split crosses (no noise bias). */
    if (!(p->pcl = malloc((size_t)(lmax + 1) * sizeof *p->pcl)))
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for spectra");
    const int single = p->a == p->b && fa->f.nsplits == 1;
    CLEF_TRY(clef_est_pseudo(e, p->a, p->b, single, p->pcl));
    double *dec = malloc((size_t)(lmax + 1) * sizeof *dec);
    if (!dec)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for spectra");
    memcpy(dec, p->pcl, (size_t)(lmax + 1) * sizeof *dec);
    /* Noise bias of an auto-spectrum: <N~_l> = sum_l' M_ll' N_l' (lmax_ext
     * never passes the noise table's end). */
    if (single && fa->f.noise_cl) {
        if (fa->f.noise_lmax < e->lmax) {
            free(dec);
            CLEF_FAIL(CLEF_EINVAL, "the noise spectrum%s%s%s stops at l = %d, below lmax = %d",
                      e->nfields > 1 ? " of field '" : "", e->nfields > 1 ? fa->name : "",
                      e->nfields > 1 ? "'" : "", fa->f.noise_lmax, e->lmax);
        }
        double *bias = malloc((size_t)(lmax + 1) * sizeof *bias);
        if (!bias) {
            free(dec);
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the noise bias");
        }
        clef_coupling_apply(mk->m, fa->f.noise_cl, bias);
        for (int l = 0; l <= lmax; l++)
            dec[l] -= bias[l];
        free(bias);
        p->noise_sub = 1;
    } else if (p->a == p->b && fa->f.noise_cl) {
        clef_log(CLEF_LOG_INFO, "field '%s': noise spectrum not subtracted: the mean of its "
                 "split crosses carries no noise bias", fa->name);
    }
    if (!(p->band = malloc((size_t)p->nb_all * sizeof *p->band))) {
        free(dec);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for band powers");
    }
    clef_coupling_binned_decouple(p->kb, dec, p->band);
    free(dec);
    return CLEF_OK;
}

/* Band-power window functions acting on D_l (docs/formats-spectrum.md):
 * <D_b> = sum_l W_bl D_l with W = K^-1 P M T (acting on C_l) times
 * 2 pi / (l (l+1)) per column, for l = 0..lmax_ext; flat-weighted bands
 * are C_b, reported as D_b = C_b l_eff (l_eff + 1) / 2 pi, so their rows
 * carry that factor too.  Column l = 0 is 0: D_0 = 0 for every spectrum,
 * so a monopole's leakage cannot be written as a weight on D_0 (the
 * monopole is removed by default). */
int clef_est_windows(clef_estimator *r, est_pair *p)
{
    const int nb = r->nb;
    const size_t n = (size_t)r->lmax_ext + 1;
    est_op *op = &r->ops[p->op];
    if (!op->win) { /* once per operator: W depends on K, M and the filter alone */
        const int na = op->nb_all;
        double *all = malloc((size_t)na * n * sizeof *all);
        op->win = malloc((size_t)nb * n * sizeof *op->win);
        if (!all || !op->win) {
            free(all);
            free(op->win);
            op->win = NULL;
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for %d x %zu window functions", na, n);
        }
        const int status = clef_coupling_binned_windows(op->kb, r->masks[op->mp].m,
                                                        op->all_bins, op->tl, all);
        if (status == CLEF_OK)
            clef_spectrum_windows_to_dl(r->bins, op->rep, nb, all, n, n, op->win);
        free(all);
        if (status != CLEF_OK) {
            free(op->win);
            op->win = NULL;
            return status;
        }
    }
    CLEF_TRY(clef_bandpowers_alloc_windows(p->res.bp, r->lmax_ext));
    memcpy(p->res.bp->win, op->win, (size_t)nb * n * sizeof *op->win);
    return CLEF_OK;
}

void clef_spectrum_windows_to_dl(const clef_bins *bins, const int *rep, int nb, const double *all,
                                 size_t stride, size_t n, double *win)
{
    const int flat = clef_bins_weighting(bins) == CLEF_BINS_FLAT;
    for (int b = 0; b < nb; b++) {
        const double le = clef_bins_l_eff(bins, b);
        const double scale = flat ? le * (le + 1) / (2 * M_PI) : 1.0;
        const double *src = all + (size_t)rep[b] * stride;
        double *row = win + (size_t)b * n;
        row[0] = 0.0;
        for (size_t l = 1; l < n; l++)
            row[l] = src[l] * scale * 2 * M_PI / ((double)l * (double)(l + 1));
    }
}


/* Normalised kernel indices: each product sorted, then the two products. */
void clef_est_kernel_key(int x, int y, int z, int u, int k[4])
{
    int p0 = x < y ? x : y, p1 = x < y ? y : x, q0 = z < u ? z : u, q1 = z < u ? u : z;
    if (q0 < p0 || (q0 == p0 && q1 < p1)) {
        int t0 = p0, t1 = p1;
        p0 = q0;
        p1 = q1;
        q0 = t0;
        q1 = t1;
    }
    k[0] = p0;
    k[1] = p1;
    k[2] = q0;
    k[3] = q1;
}

/* The cache key of kernel k (normalised weight ids): 0 when a weight is
 * known by neither its values nor its digest. */
static int kernel_cache_key(clef_estimator *e, const int k[4], char key[65])
{
    const unsigned char *sha[4];
    for (int i = 0; i < 4; i++) {
        est_weights *w = &e->weights[k[i]];
        if (!w->has_sha) {
            if (!w->w)
                return 0;
            clef_sha256 h;
            clef_sha256_init(&h);
            clef_sha256_update(&h, w->w, (size_t)e->npix * sizeof *w->w);
            clef_sha256_final(&h, w->sha);
            w->has_sha = 1;
        }
        sha[i] = w->sha;
    }
    clef_spectrum_kernel_key(e->nside, e->lmax_t, e->o.iterations, sha, key);
    return 1;
}

/* The covariance kernel M[w_x w_y, w_z w_u] to lmax_ext (spectrum_cov.c):
 * from the mask spectra of a mask pair when it is one of its own two
 * kernels (cached with them), else from the cache folder or the weight
 * transforms; its coupling matrix through the coupling cache. */
int clef_est_kernel(clef_estimator *e, int x, int y, int z, int u, const clef_coupling **m)
{
    int k[4];
    clef_est_kernel_key(x, y, z, u, k);
    for (int j = 0; j < e->nkernels; j++)
        if (!memcmp(e->kernels[j].p, k, sizeof k)) {
            *m = e->kernels[j].m;
            return CLEF_OK;
        }
    const int lt = e->lmax_t;
    const double *wl = NULL;
    double *own = NULL;
    clef_coupling *taken = clef_est_reuse_kernel(e, k); /* from an earlier estimator */
    for (int j = 0; j < e->nmasks && !wl && !taken; j++) {
        const est_masks *mk = &e->masks[j];
        int k1[4], k2[4];
        clef_est_kernel_key(mk->wa, mk->wb, mk->wa, mk->wb, k2); /* W[w_a w_b] */
        clef_est_kernel_key(mk->wa, mk->wa, mk->wb, mk->wb, k1); /* W[w_a^2, w_b^2] */
        if (!memcmp(k, k2, sizeof k))
            wl = mk->wl + lt + 1;
        else if (!memcmp(k, k1, sizeof k))
            wl = mk->wl + (size_t)(mk->nrows - 1) * (lt + 1);
    }
    /* A kernel that is none of the mask pairs' (the cross-pair blocks of
     * the joint covariance) needs the transforms of the product masks,
     * nweights (nweights + 3) / 2 of them: a rerun with the same weights
     * takes its spectrum from the cache folder instead, as the mask pairs'
     * spectra (clef_est_mask_pairs). */
    char key[65] = "";
    if (!wl && !taken) {
        if (!(own = malloc(((size_t)lt + 1) * sizeof *own)))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for a covariance kernel");
        if (e->o.use_cache && kernel_cache_key(e, k, key) &&
            clef_spectrum_mask_cache(&e->o, key, lt, 1, own, 0))
            wl = own;
    }
    if (!wl && !taken) {
        int status = clef_est_weight_alms(e);
        const int i1 = clef_est_product_index(e, k[0], k[1]);
        const int i2 = clef_est_product_index(e, k[2], k[3]);
        if (status == CLEF_OK)
            status = clef_alm_cl(lt, lt, e->walm[i1], i1 == i2 ? NULL : e->walm[i2], own);
        if (status != CLEF_OK) {
            free(own);
            return status;
        }
        for (int l = 0; l <= lt; l++) /* as in mask_spectra */
            if (own[l] < 0)
                own[l] = 0;
        wl = own;
        if (key[0])
            clef_spectrum_mask_cache(&e->o, key, lt, 1, own, 1);
    }
    est_kernel *nk = realloc(e->kernels, (size_t)(e->nkernels + 1) * sizeof *nk);
    if (!nk) {
        free(own);
        clef_coupling_destroy(taken);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for covariance kernels");
    }
    e->kernels = nk;
    est_kernel *d = &nk[e->nkernels];
    memcpy(d->p, k, sizeof k);
    d->m = taken;
    int status = CLEF_OK, hit = 0;
    if (!taken)
        status = clef_est_make_coupling(e, &d->m, wl, &hit);
    free(own);
    CLEF_TRY(status);
    if (!taken) {
        if (hit)
            e->n_coupling_read++;
        else
            e->n_coupling_made++;
    }
    e->nkernels++;
    *m = d->m;
    return CLEF_OK;
}
