/* Reuse of what depends on the masks alone between estimators of the same
 * masks (clef_estimator_reuse, estimator.h): an ensemble of simulated
 * skies (ensemble.c) analyses hundreds of maps with one mask, and the
 * pieces below would otherwise be read from the cache folder (or made)
 * again for every map: the analysis plan, the mask spectra (and the hash
 * of the weights that keys them), the deprojection correction, the
 * coupling M, the covariance kernels, the binned operator K and its
 * windows.
 *
 * A piece is taken only when everything it is a function of is equal in
 * value: the weights (compared pixel by pixel, with the templates removed
 * from the maps), nside, the multipole ranges, the analysis iterations,
 * the options that enter it; for K and the windows also the pair's bins and
 * filter.  Every piece is a deterministic function of those, so a run that
 * reuses gives the same bits as one that does not (tests/
 * test_estimator_reuse.c checks it).  Pieces are moved: the earlier
 * estimator loses them and is destroyed by the later one. */
#define _DEFAULT_SOURCE
#include <stdlib.h>
#include <string.h>

#include "clef/hash.h"
#include "clef/sht.h"
#include "core_impl.h"
#include "estimator_impl.h"

int clef_estimator_reuse(clef_estimator *e, clef_estimator *prev)
{
    if (!e || e == prev)
        CLEF_FAIL(CLEF_EINVAL, "estimator reuse: no estimator, or the estimator itself");
    if (e->computed || (prev && !prev->computed)) {
        clef_estimator_destroy(prev); /* owned from the call on, error or not */
        CLEF_FAIL(CLEF_EINVAL, "estimator reuse: %s", e->computed ? "must be set before compute"
                  : "the earlier estimator must have been computed");
    }
    e->keep = 1;
    clef_estimator_destroy(e->prev);
    e->prev = prev;
    if (prev) {
        /* Its map transforms are not needed any more: free them now, so
         * that the two estimators do not hold two sets of a_lm at once. */
        for (int i = 0; i < prev->nfields; i++)
            for (int s = 0; s < CLEF_FIELD_MAX_SPLITS; s++) {
                free(prev->fields[i].alm[s]);
                prev->fields[i].alm[s] = NULL;
            }
    }
    return CLEF_OK;
}

int clef_estimator_reused(const clef_estimator *e)
{
    return e ? e->nreused : 0;
}

static int same_str(const char *a, const char *b)
{
    return (!a && !b) || (a && b && !strcmp(a, b));
}

/* Options every mask piece depends on, and the multipole ranges. */
static int same_setting(const clef_estimator *e, const clef_estimator *p)
{
    return p->nside == e->nside && p->lmax_ext == e->lmax_ext && p->lmax_t == e->lmax_t &&
           p->o.iterations == e->o.iterations && p->o.keep_multipoles == e->o.keep_multipoles &&
           p->o.use_cache == e->o.use_cache && same_str(p->o.cache_dir, e->o.cache_dir);
}

clef_sht *clef_est_reuse_sht(clef_estimator *e)
{
    clef_estimator *p = e->prev;
    if (!p || !p->sht || p->nside != e->nside || clef_sht_lmax(p->sht) != e->lmax_ext ||
        p->o.use_cache != e->o.use_cache || !same_str(p->o.cache_dir, e->o.cache_dir))
        return NULL;
    clef_sht *s = p->sht;
    p->sht = NULL;
    e->nreused++;
    return s;
}

/* prev_wid[k]: the weights of prev equal to e's weights k, or -1. */
int clef_est_reuse_weights(clef_estimator *e)
{
    clef_estimator *p = e->prev;
    if (e->prev_wid || !p)
        return CLEF_OK;
    if (!(e->prev_wid = malloc((size_t)(e->nweights ? e->nweights : 1) * sizeof *e->prev_wid)))
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the estimator reuse");
    const size_t bytes = (size_t)e->npix * sizeof(double);
    for (int k = 0; k < e->nweights; k++) {
        e->prev_wid[k] = -1;
        if (!same_setting(e, p))
            continue;
        est_weights *w = &e->weights[k];
        for (int j = 0; j < p->nweights && e->prev_wid[k] < 0; j++) {
            const est_weights *q = &p->weights[j];
            if (q->nf != w->nf)
                continue;
            if (q->w) {
                if (!memcmp(q->w, w->w, bytes))
                    e->prev_wid[k] = j;
            } else if (q->has_sha) {
                /* An imported estimator (estimator_share.c) carries the
                 * SHA-256 of its weights, not the npix doubles: equal
                 * digests stand for equal weights (as for the cache keys). */
                if (!w->has_sha) {
                    clef_sha256 h;
                    clef_sha256_init(&h);
                    clef_sha256_update(&h, w->w, bytes);
                    clef_sha256_final(&h, w->sha);
                    w->has_sha = 1;
                }
                if (!memcmp(q->sha, w->sha, sizeof w->sha))
                    e->prev_wid[k] = j;
            }
        }
    }
    /* The map is all that was needed of prev's weights (npix doubles each). */
    for (int j = 0; j < p->nweights; j++) {
        free(p->weights[j].w);
        p->weights[j].w = NULL;
    }
    return CLEF_OK;
}

int clef_est_reuse_masks(clef_estimator *e, est_masks *mk, int *taken)
{
    *taken = 0;
    mk->from = -1;
    clef_estimator *p = e->prev;
    if (!p)
        return CLEF_OK;
    CLEF_TRY(clef_est_reuse_weights(e));
    const int pa = e->prev_wid[mk->wa], pb = e->prev_wid[mk->wb];
    if (pa < 0 || pb < 0)
        return CLEF_OK;
    for (int j = 0; j < p->nmasks; j++) {
        est_masks *q = &p->masks[j];
        if (q->wa != pa || q->wb != pb || !q->wl || !q->m)
            continue;
        /* The pieces: W_l (and the kernel spectra), their cache key, the
         * deprojection correction, the corrected M. */
        mk->wl = q->wl;
        mk->nrows = q->nrows;
        memcpy(mk->key, q->key, sizeof mk->key);
        mk->dep = q->dep;
        mk->m = q->m;
        mk->cache_hit = q->cache_hit;
        mk->cw = q->cw;
        mk->wab = q->wab;
        mk->from = j;
        q->wl = NULL;
        q->m = NULL;
        memset(&q->dep, 0, sizeof q->dep);
        e->nreused++;
        *taken = 1;
        return CLEF_OK;
    }
    return CLEF_OK;
}

clef_coupling *clef_est_reuse_kernel(clef_estimator *e, const int key[4])
{
    clef_estimator *p = e->prev;
    if (!p || clef_est_reuse_weights(e) != CLEF_OK)
        return NULL;
    int want[4];
    for (int i = 0; i < 4; i++)
        if ((want[i] = e->prev_wid[key[i]]) < 0)
            return NULL;
    int pk[4];
    clef_est_kernel_key(want[0], want[1], want[2], want[3], pk);
    for (int j = 0; j < p->nkernels; j++)
        if (p->kernels[j].m && !memcmp(p->kernels[j].p, pk, sizeof pk)) {
            clef_coupling *m = p->kernels[j].m;
            p->kernels[j].m = NULL;
            e->nreused++;
            return m;
        }
    return NULL;
}

static int same_bins(const clef_bins *a, const clef_bins *b)
{
    const int n = clef_bins_count(a);
    if (n != clef_bins_count(b) || clef_bins_weighting(a) != clef_bins_weighting(b))
        return 0;
    for (int i = 0; i < n; i++)
        if (clef_bins_l_lo(a, i) != clef_bins_l_lo(b, i) ||
            clef_bins_l_hi(a, i) != clef_bins_l_hi(b, i))
            return 0;
    return 1;
}

/* K and its windows from an operator of prev over the same mask pair,
 * filter and bins (the windows on D_l also depend on the reported bins and
 * their place among all_bins). */
void clef_est_reuse_op(clef_estimator *e, est_op *op)
{
    clef_estimator *p = e->prev;
    const est_masks *mk = &e->masks[op->mp];
    if (!p || mk->from < 0 || p->o.rcond_min != e->o.rcond_min || !same_bins(p->bins, e->bins))
        return;
    const size_t n = (size_t)e->lmax_ext + 1;
    for (int k = 0; k < p->nops; k++) {
        est_op *q = &p->ops[k];
        if (q->mp != mk->from || !q->kb || !q->tl || !q->all_bins || q->nb_all != op->nb_all ||
            memcmp(q->tl, op->tl, n * sizeof *op->tl) || !same_bins(q->all_bins, op->all_bins) ||
            memcmp(q->rep, op->rep, (size_t)e->nb * sizeof *op->rep))
            continue;
        op->kb = q->kb;
        q->kb = NULL;
        op->win = q->win;
        q->win = NULL;
        e->nreused++;
        return;
    }
}
