/* Simulation ensembles: seeds, the analyser of clef spectrum, and the plan
 * that makes and analyses one realisation (include/clef/ensemble.h). */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/ensemble.h"
#include "clef/sht.h"
#include "core_impl.h"
#include "estimator_impl.h"
#include "spectrum_impl.h"

/* splitmix64 output function (Steele, Lea & Flood 2014, "Fast splittable
 * pseudorandom number generators", OOPSLA; constants of Vigna's reference
 * implementation).  The same mixer as src/sim.c's stream seeds. */
static uint64_t mix64(uint64_t x)
{
    x += 0x9e3779b97f4a7c15ULL;
    x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9ULL;
    x = (x ^ (x >> 27)) * 0x94d049bb133111ebULL;
    return x ^ (x >> 31);
}

uint64_t clef_ensemble_seed(uint64_t base, uint64_t i, int kind)
{
    /* One constant per kind (arbitrary odd words), so the noise-only
     * realisation i never reuses the seed of signal realisation i. */
    static const uint64_t kind_key[2] = {0x656e73656d626c31ULL, 0x6e6f6973656f6e6dULL};
    const uint64_t k = kind_key[kind == CLEF_ENSEMBLE_NOISE_ONLY];
    return mix64(mix64(base ^ k) + i);
}

void clef_ensemble_result_free(clef_ensemble_result *r)
{
    if (!r)
        return;
    clef_bandpowers_free(r->bp);
    r->bp = NULL;
    free(r->pcl);
    free(r->filter);
    free(r->coupling);
    r->pcl = r->filter = r->coupling = NULL;
}

/* The estimator's after_maps: the caller's callback, then the pieces it
 * adopted (if any) for the analysis in progress. */
typedef struct after_call {
    clef_ensemble_spectrum_ctx *c;
    void (*fn)(void *arg);
    void *arg;
    int adopted;
} after_call;

static clef_estimator *after_maps_call(void *arg)
{
    after_call *a = arg;
    a->fn(a->arg);
    clef_estimator *p = a->c->pending;
    a->c->pending = NULL;
    a->adopted = p != NULL;
    return p;
}

static int spectrum_analyse(void *ctx, const clef_map *const *maps, int nmaps,
                            clef_ensemble_result *out)
{
    clef_ensemble_spectrum_ctx *c = ctx;
    clef_spectrum_result res;
    memset(&res, 0, sizeof res);
    memset(out, 0, sizeof *out);
    /* The last realisation's estimator lends this one what depends on the
     * masks alone (clef_estimator_reuse), or pieces adopted from another
     * process; this one is kept for the next. */
    after_call ac = {.c = c, .fn = c->after_maps, .arg = c->after_maps_arg};
    clef_spectrum_keep k = {.prev = c->state, .after_maps = c->after_maps ? after_maps_call : NULL,
                            .arg = &ac};
    if (c->pending) {
        clef_estimator_destroy(c->state);
        k.prev = c->pending;
        c->pending = NULL;
        ac.adopted = 1;
    }
    c->state = NULL;
    c->after_maps = NULL;
    const int status = clef_spectrum_compute_keep(maps[0], nmaps > 1 ? maps[1] : NULL, c->mask1,
                                                  c->mask2, c->opts, &res, &k);
    if (status != CLEF_OK) {
        clef_spectrum_result_free(&res);
        return status;
    }
    clef_estimator *e = k.e;
    c->state = e;
    int made = 0, read = 0, msht = 0;
    clef_estimator_couplings(e, &made, &read);
    clef_estimator_transforms(e, NULL, &msht);
    c->couplings_computed += made;
    c->couplings_read += read;
    c->mask_transforms += msht;
    if (ac.adopted)
        c->pieces_adopted += clef_estimator_reused(e);
    else
        c->pieces_reused += clef_estimator_reused(e);
    /* The pair's pseudo-spectrum, filter and coupling (Hivon et al.'s
     * transfer function needs them; the band powers do not carry them). */
    const est_pair *pr = &e->pairs[0];
    const est_masks *mk = &e->masks[pr->mp];
    const int L = e->lmax_ext;
    const size_t n1 = (size_t)L + 1;
    out->pcl = malloc(sizeof *out->pcl * n1);
    out->filter = malloc(sizeof *out->filter * n1);
    if (c->keep_coupling)
        out->coupling = malloc(sizeof *out->coupling * n1 * n1);
    if (!out->pcl || !out->filter || (c->keep_coupling && !out->coupling)) {
        clef_spectrum_result_free(&res);
        clef_ensemble_result_free(out);
        CLEF_FAIL(CLEF_ENOMEM, "no memory for a realisation's pseudo-spectrum (lmax %d)", L);
    }
    memcpy(out->pcl, pr->pcl, sizeof *out->pcl * n1);
    memcpy(out->filter, pr->tl, sizeof *out->filter * n1);
    if (out->coupling)
        memcpy(out->coupling, clef_coupling_matrix(mk->m), sizeof *out->coupling * n1 * n1);
    out->pcl_lmax = L;
    out->wab = mk->wab;
    out->bp = res.bp; /* ownership moves to the ensemble result */
    res.bp = NULL;
    out->peak = res.peak;
    out->peak_done = res.peak_done;
    clef_spectrum_result_free(&res);
    return CLEF_OK;
}

static void spectrum_release(void *ctx)
{
    clef_ensemble_spectrum_ctx *c = ctx;
    clef_estimator_destroy(c->state);
    clef_estimator_destroy(c->pending);
    c->state = c->pending = NULL;
}

int clef_ensemble_spectrum_export(const clef_ensemble_spectrum_ctx *ctx, void **buf, size_t *n)
{
    if (!ctx || !ctx->state) {
        if (buf)
            *buf = NULL;
        if (n)
            *n = 0;
        CLEF_FAIL(CLEF_EINVAL, "ensemble: no analysis yet, so no mask pieces to export");
    }
    return clef_estimator_export(ctx->state, buf, n);
}

int clef_ensemble_spectrum_adopt(clef_ensemble_spectrum_ctx *ctx, const void *buf, size_t n)
{
    if (!ctx)
        CLEF_FAIL(CLEF_EINVAL, "ensemble: no analyser to adopt pieces");
    clef_estimator *e = NULL;
    CLEF_TRY(clef_estimator_import(&e, buf, n));
    clef_estimator_destroy(ctx->pending);
    ctx->pending = e;
    return CLEF_OK;
}

void clef_ensemble_spectrum_analyser(clef_ensemble_spectrum_ctx *ctx, const clef_map *mask1,
                                     const clef_map *mask2, const clef_spectrum_opts *opts,
                                     clef_ensemble_analyser *out)
{
    memset(ctx, 0, sizeof *ctx);
    ctx->mask1 = mask1;
    ctx->mask2 = mask2;
    ctx->opts = opts;
    out->ctx = ctx;
    out->analyse = spectrum_analyse;
    out->release = spectrum_release;
}

struct clef_ensemble_plan {
    clef_ensemble_analyser an;
    int simulate;
    int64_t nside;
    int lmax, nsplits;
    double *cl, *zero_cl, *beam, *hits;
    clef_sim_opts sim;
    clef_sht *sht;
};

void clef_ensemble_plan_destroy(clef_ensemble_plan *p)
{
    if (!p)
        return;
    if (p->an.release)
        p->an.release(p->an.ctx);
    clef_sht_destroy(p->sht);
    free(p->cl);
    free(p->zero_cl);
    free(p->beam);
    free(p->hits);
    free(p);
}

static double *dup_array(const double *v, size_t n)
{
    double *d = malloc(n * sizeof *d);
    if (d)
        memcpy(d, v, n * sizeof *d);
    return d;
}

int clef_ensemble_plan_create(clef_ensemble_plan **out, const clef_ensemble_sim *sim,
                              const clef_ensemble_analyser *an)
{
    *out = NULL;
    if (!an || !an->analyse)
        CLEF_FAIL(CLEF_EINVAL, "ensemble plan: no analyser");
    clef_ensemble_plan *p = calloc(1, sizeof *p);
    if (!p)
        CLEF_FAIL(CLEF_ENOMEM, "no memory for an ensemble plan");
    p->an = *an;
    int status = CLEF_OK;
    if (sim) {
        if (!clef_nside_valid(sim->nside)) {
            status = clef_fail(CLEF_EINVAL, "ensemble: nside %lld is not a power of two in range",
                               (long long)sim->nside);
            goto fail;
        }
        if (!sim->cl) {
            status = clef_fail(CLEF_EINVAL, "ensemble: no input spectrum to simulate from");
            goto fail;
        }
        p->simulate = 1;
        p->nside = sim->nside;
        p->lmax = sim->lmax > 0 ? sim->lmax : (int)(3 * sim->nside - 1);
        p->nsplits = sim->sim.nsplits == 2 ? 2 : 1;
        p->sim = sim->sim;
        const size_t nl = (size_t)p->lmax + 1, npix = (size_t)clef_nside_npix(p->nside);
        p->cl = dup_array(sim->cl, nl);
        p->zero_cl = calloc(nl, sizeof *p->zero_cl);
        if (!p->cl || !p->zero_cl)
            goto nomem;
        if (sim->sim.beam && !(p->beam = dup_array(sim->sim.beam, nl)))
            goto nomem;
        if (sim->sim.hits && !(p->hits = dup_array(sim->sim.hits, npix)))
            goto nomem;
        p->sim.beam = p->beam;
        p->sim.hits = p->hits;
        p->sim.nsplits = p->nsplits;
        if ((status = clef_sht_create(&p->sht, p->nside, p->lmax, NULL)) != CLEF_OK)
            goto fail;
    }
    *out = p;
    return CLEF_OK;
nomem:
    status = clef_fail(CLEF_ENOMEM, "no memory for the ensemble's simulation settings");
fail:
    clef_ensemble_plan_destroy(p);
    return status;
}

int clef_ensemble_plan_simulate(clef_ensemble_plan *p, uint64_t base_seed, uint64_t i, int kind,
                                clef_map **maps, int *nmaps)
{
    *nmaps = 0;
    if (!p->simulate)
        CLEF_FAIL(CLEF_EINVAL, "ensemble: this plan analyses given maps, it does not simulate");
    if (kind == CLEF_ENSEMBLE_NOISE_ONLY && !(p->sim.noise_depth > 0))
        CLEF_FAIL(CLEF_EINVAL, "ensemble: noise-only realisations need a noise depth");
    int status = CLEF_OK;
    unsigned char *valid = NULL;
    maps[0] = maps[1] = NULL;
    for (int s = 0; s < p->nsplits; s++)
        if ((status = clef_map_alloc(&maps[s], p->nside)) != CLEF_OK)
            goto fail;
    const int64_t npix = maps[0]->npix;
    if (!(valid = malloc((size_t)npix))) {
        status = clef_fail(CLEF_ENOMEM, "no memory for a simulated map's validity");
        goto fail;
    }
    clef_sim_opts o = p->sim;
    o.seed = clef_ensemble_seed(base_seed, i, kind);
    double *pix[2] = {maps[0]->pix, p->nsplits > 1 ? maps[1]->pix : NULL};
    /* A noise-only realisation draws its sky from C_l = 0: the same code
     * path, so its noise is made exactly as in a signal realisation. */
    const double *cl = kind == CLEF_ENSEMBLE_NOISE_ONLY ? p->zero_cl : p->cl;
    if ((status = clef_sim_map(p->sht, cl, &o, NULL, pix, valid)) != CLEF_OK)
        goto fail;
    for (int s = 0; s < p->nsplits; s++) {
        clef_map *m = maps[s];
        m->nmissing = 0;
        for (int64_t q = 0; q < npix; q++) {
            m->valid[q] = valid[q];
            if (!valid[q]) {
                m->pix[q] = 0.0;
                m->nmissing++;
            }
        }
        snprintf(m->unit, sizeof m->unit, "uK");
    }
    free(valid);
    *nmaps = p->nsplits;
    return CLEF_OK;
fail:
    free(valid);
    for (int s = 0; s < 2; s++) {
        clef_map_free(maps[s]);
        maps[s] = NULL;
    }
    return status;
}

int clef_ensemble_plan_analyse(clef_ensemble_plan *p, const clef_map *const *maps, int nmaps,
                               clef_ensemble_result *out)
{
    if (nmaps < 1 || nmaps > 2)
        CLEF_FAIL(CLEF_EINVAL, "ensemble: a realisation has 1 or 2 maps, got %d", nmaps);
    return p->an.analyse(p->an.ctx, maps, nmaps, out);
}
