/* The estimator of many fields (estimator.h): the plan, its fields and
 * pairs, the multipole range, and the driver running the stages in the
 * order of the method (docs/method.md):
 *   prepare    weights, monopole/dipole, each split map transformed once
 *              (estimator_prepare.c)
 *   masks      mask spectra per distinct pair of weights (cached)
 *   bins       reported bins common to all pairs, hidden bins per pair
 *              (estimator_bins.c)
 *   coupling   deprojection-corrected coupling per pair of weights, the
 *              binned operator per pair (estimator_decouple.c)
 *   decouple   split-mean pseudo-spectra, noise bias, band powers
 *   covariance the joint Gaussian covariance (spectrum_cov.c)
 *   windows    band-power window functions
 *   peak       tables, keywords, first peak (estimator_result.c) */
#define _DEFAULT_SOURCE
#include "clef/estimator.h"

#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/sht.h"
#include "core_impl.h"
#include "estimator_impl.h"

void clef_field_init(clef_field *f)
{
    memset(f, 0, sizeof *f);
    f->nsplits = 1;
}

void clef_est_stage_add(clef_estimator *e, const char *name, double seconds)
{
    if (e->nstages < CLEF_SPECTRUM_MAX_STAGES) {
        snprintf(e->stage[e->nstages].name, sizeof e->stage[0].name, "%s", name);
        e->stage[e->nstages].seconds = seconds;
        e->nstages++;
    }
    clef_log(CLEF_LOG_INFO, "stage %-10s %8.3f s", name, seconds);
    e->t0 = clef_wtime();
}

void clef_est_stage_done(clef_estimator *e, const char *name)
{
    clef_est_stage_add(e, name, clef_wtime() - e->t0);
}

const char *clef_est_map_name(const est_field *f, int split)
{
    return f->f.map_names[split] ? f->f.map_names[split] : f->name;
}

/* The run options with the beam, transfer and noise of field f. */
int clef_est_field_opts(const clef_estimator *e, const est_field *f, clef_spectrum_opts *o)
{
    *o = e->o;
    o->beam_fwhm = f->f.beam_fwhm;
    o->beam = f->f.beam;
    o->beam_lmax = f->f.beam_lmax;
    o->transfer = f->f.transfer;
    o->transfer_lmax = f->f.transfer_lmax;
    o->noise_cl = f->f.noise_cl;
    o->noise_lmax = f->f.noise_lmax;
    o->second_instrument = 0; /* a field has one instrument */
    return CLEF_OK;
}

int clef_estimator_create(clef_estimator **out, const clef_spectrum_opts *opts, int joint)
{
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "estimator: no output handle");
    clef_estimator *e = calloc(1, sizeof *e);
    if (e)
        e->fields = calloc(CLEF_ESTIMATOR_MAX_FIELDS, sizeof *e->fields);
    if (!e || !e->fields) {
        free(e);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the estimator");
    }
    if (opts)
        e->o = *opts;
    else
        clef_spectrum_opts_default(&e->o);
    e->joint = joint != 0;
    *out = e;
    return CLEF_OK;
}

static void free_pair(est_pair *p)
{
    clef_spectrum_result_free(&p->res);
    free(p->tl);
    free(p->pcl);
    free(p->band);
    free(p->cov_all);
}

void clef_estimator_destroy(clef_estimator *e)
{
    if (!e)
        return;
    for (int i = 0; i < e->nfields; i++) {
        free(e->fields[i].filter);
        for (int s = 0; s < CLEF_FIELD_MAX_SPLITS; s++)
            free(e->fields[i].alm[s]);
    }
    for (int k = 0; k < e->npairs; k++)
        free_pair(&e->pairs[k]);
    for (int k = 0; k < e->nweights; k++)
        free(e->weights[k].w);
    for (int k = 0; k < e->nmasks; k++) {
        free(e->masks[k].wl);
        clef_spectrum_deproj_free(&e->masks[k].dep);
        clef_coupling_destroy(e->masks[k].m);
    }
    for (int k = 0; k < e->nkernels; k++)
        clef_coupling_destroy(e->kernels[k].m);
    for (int k = 0; k < e->nops; k++) {
        clef_bins_destroy(e->ops[k].all_bins);
        free(e->ops[k].rep);
        clef_coupling_binned_destroy(e->ops[k].kb);
        free(e->ops[k].win);
        free(e->ops[k].tl_own);
    }
    free(e->ops);
    if (e->walm) {
        const int nw = e->nweights, n = nw + nw * (nw + 1) / 2;
        for (int k = 0; k < n; k++)
            free(e->walm[k]);
        free(e->walm);
    }
    clef_bins_destroy(e->own_bins);
    clef_estimator_destroy(e->prev);
    free(e->prev_wid);
    clef_sht_destroy(e->sht);
    free(e->own_cache_dir);
    free(e->fields);
    free(e->pairs);
    free(e->weights);
    free(e->masks);
    free(e->kernels);
    free(e->cov);
    free(e);
}

static int find_field(const clef_estimator *e, const char *name)
{
    for (int i = 0; i < e->nfields; i++)
        if (!strcmp(e->fields[i].name, name))
            return i;
    return -1;
}

int clef_estimator_add_field(clef_estimator *e, const clef_field *f)
{
    if (!e || !f)
        CLEF_FAIL(CLEF_EINVAL, "estimator: no field");
    if (e->computed)
        CLEF_FAIL(CLEF_EINVAL, "estimator: fields must be added before compute");
    if (!f->name || !f->name[0])
        CLEF_FAIL(CLEF_EINVAL, "a field needs a name");
    if (strlen(f->name) >= CLEF_FIELD_NAME_MAX)
        CLEF_FAIL(CLEF_EINVAL, "field name '%.40s...' is longer than %d characters", f->name,
                  CLEF_FIELD_NAME_MAX - 1);
    if (find_field(e, f->name) >= 0)
        CLEF_FAIL(CLEF_EINVAL, "field name '%s' is used twice", f->name);
    if (e->nfields >= CLEF_ESTIMATOR_MAX_FIELDS)
        CLEF_FAIL(CLEF_EINVAL, "field '%s': more than %d fields", f->name,
                  CLEF_ESTIMATOR_MAX_FIELDS);
    if (f->nsplits < 1 || f->nsplits > CLEF_FIELD_MAX_SPLITS)
        CLEF_FAIL(CLEF_EINVAL, "field '%s': %d maps, expected 1 to %d", f->name, f->nsplits,
                  CLEF_FIELD_MAX_SPLITS);
    for (int s = 0; s < f->nsplits; s++) {
        if (!f->maps[s] && !f->load_map)
            CLEF_FAIL(CLEF_EINVAL, "field '%s': map %d is missing", f->name, s + 1);
        if (f->maps[s] && f->load_map)
            CLEF_FAIL(CLEF_EINVAL, "field '%s': map %d is given and read on demand (maps[] "
                      "must be NULL with load_map)", f->name, s + 1);
    }
    if (!f->mask)
        CLEF_FAIL(CLEF_EINVAL, "field '%s' has no mask", f->name);
    if (f->spin != 0)
        CLEF_FAIL(CLEF_EUNSUP, "field '%s': spin %d is not supported (temperature only, spin 0)",
                  f->name, f->spin);
    est_field *d = &e->fields[e->nfields++];
    memset(d, 0, sizeof *d);
    d->f = *f;
    snprintf(d->name, sizeof d->name, "%s", f->name);
    d->f.name = d->name;
    return CLEF_OK;
}

static int push_pair(clef_estimator *e, int a, int b)
{
    est_pair *np = realloc(e->pairs, (size_t)(e->npairs + 1) * sizeof *np);
    if (!np)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for pairs");
    e->pairs = np;
    memset(&np[e->npairs], 0, sizeof *np);
    np[e->npairs].a = a;
    np[e->npairs].b = b;
    e->npairs++;
    return CLEF_OK;
}

int clef_estimator_add_pair(clef_estimator *e, const char *a, const char *b)
{
    if (!e || !a || !b)
        CLEF_FAIL(CLEF_EINVAL, "estimator: a pair needs two field names");
    if (e->computed)
        CLEF_FAIL(CLEF_EINVAL, "estimator: pairs must be added before compute");
    const int ia = find_field(e, a), ib = find_field(e, b);
    if (ia < 0 || ib < 0)
        CLEF_FAIL(CLEF_EINVAL, "pair '%s x %s' names field '%s', which is not defined", a, b,
                  ia < 0 ? a : b);
    for (int k = 0; k < e->npairs; k++) {
        const est_pair *p = &e->pairs[k];
        if ((p->a == ia && p->b == ib) || (p->a == ib && p->b == ia))
            CLEF_FAIL(CLEF_EINVAL, "pair '%s x %s' is requested twice", a, b);
    }
    e->user_pairs = 1;
    return push_pair(e, ia, ib);
}

/* The values of a field's mask in [0, 1], before any map of it is read
 * (clef_map_check_mask on a header of the mask's grid with no frame
 * checks the values alone; the map itself is checked when it is read). */
static int check_mask_values(const est_field *f, int allow_coord_mismatch)
{
    clef_map grid;
    memset(&grid, 0, sizeof grid);
    grid.nside = f->f.mask->nside;
    grid.npix = f->f.mask->npix;
    return clef_map_check_mask(&grid, clef_est_map_name(f, 0), f->f.mask,
                               f->f.mask_name ? f->f.mask_name : "mask", allow_coord_mismatch);
}

/* The grid of the run: the first field's first map, or its mask when its
 * maps are read on demand. */
static const clef_map *grid_of(const clef_estimator *e)
{
    const est_field *f0 = &e->fields[0];
    return f0->f.load_map ? f0->f.mask : f0->f.maps[0];
}

/* All maps and masks on one grid, each map with its mask (a map read on
 * demand is checked against its mask when it is read, estimator_prepare.c). */
static int check_fields(const clef_estimator *e)
{
    const clef_map *m0 = grid_of(e);
    for (int i = 0; i < e->nfields; i++) {
        const est_field *f = &e->fields[i];
        if (f->f.load_map) {
            const clef_map *k = f->f.mask;
            if (k->nside != m0->nside)
                CLEF_FAIL(CLEF_EINVAL,
                          "field '%s': mask '%s' has nside %lld, field '%s' %s '%s' nside %lld",
                          f->name, f->f.mask_name ? f->f.mask_name : "mask", (long long)k->nside,
                          e->fields[0].name, m0 == e->fields[0].f.mask ? "mask" : "map",
                          m0 == e->fields[0].f.mask
                              ? (e->fields[0].f.mask_name ? e->fields[0].f.mask_name : "mask")
                              : clef_est_map_name(&e->fields[0], 0),
                          (long long)m0->nside);
            CLEF_TRY(check_mask_values(f, e->o.allow_coord_mismatch));
            continue;
        }
        for (int s = 0; s < f->f.nsplits; s++) {
            const clef_map *m = f->f.maps[s];
            if (m->nside != m0->nside)
                CLEF_FAIL(CLEF_EINVAL,
                          "field '%s': map '%s' has nside %lld, field '%s' map '%s' nside %lld",
                          f->name, clef_est_map_name(f, s), (long long)m->nside,
                          e->fields[0].name, clef_est_map_name(&e->fields[0], 0),
                          (long long)m0->nside);
            CLEF_TRY(clef_map_check_mask(m, clef_est_map_name(f, s), f->f.mask,
                                         f->f.mask_name ? f->f.mask_name : "mask",
                                         e->o.allow_coord_mismatch));
        }
    }
    return CLEF_OK;
}

/* lmax (default or checked), the analysis range lmax_ext and the mask
 * range lmax_t (docs/method.md section 5). */
static int stage_lmax(clef_estimator *r)
{
    const int lmax_pix = (int)(3 * r->nside - 1);
    const int l_acc = (int)(CLEF_SPECTRUM_LMAX_NSIDE * r->nside);
    /* The tightest limit of any field's tables and beam. */
    int l_beam = INT32_MAX;
    char why[256] = "";
    for (int i = 0; i < r->nfields; i++) {
        clef_spectrum_opts fo;
        int lt = 0, lb = 0;
        char w[160];
        clef_est_field_opts(r, &r->fields[i], &fo);
        CLEF_TRY(clef_est_limits(&fo, r->nside, &lt, &lb, w, sizeof w));
        if (lb < l_beam) {
            l_beam = lb;
            if (r->nfields > 1 && w[0])
                snprintf(why, sizeof why, "field '%.60s': %.160s", r->fields[i].name, w);
            else
                snprintf(why, sizeof why, "%s", w);
        }
    }
    int lmax = r->o.lmax;
    if (lmax == 0) {
        /* The HEALPix quadrature is accurate to about 2 nside (docs/
         * transforms.md); above it the band powers are biased (section 5). */
        lmax = l_beam < l_acc ? l_beam : l_acc;
        r->lmax_auto = 1;
        if (l_beam < l_acc)
            clef_log(CLEF_LOG_WARN, "default lmax lowered to %d below 2*nside = %d: %s", lmax,
                     l_acc, why);
    } else if (lmax < 2 || lmax > lmax_pix) {
        CLEF_FAIL(CLEF_EINVAL,
                  "lmax = %d is outside 2..3*nside-1 = %d for nside %lld: the pixelised map "
                  "carries no independent information above 3*nside-1",
                  lmax, lmax_pix, (long long)r->nside);
    } else if (lmax > l_acc) {
        clef_log(CLEF_LOG_WARN,
                 "lmax = %d is above 2*nside = %d: band powers above 2*nside are biased by the "
                 "pixelisation (transform quadrature, aliasing, a noise bias that no longer "
                 "matches the analysis iterations; docs/method.md section 5)",
                 lmax, l_acc);
    }
    r->lmax = lmax;
    /* Hidden bins run to the end of the tables and of the beam (and of a
     * theory spectrum for the covariance), never below lmax; a table too
     * short for lmax itself is refused later with its own message. */
    int l_ext = l_beam;
    if (r->o.theory_cl && r->o.theory_lmax < l_ext)
        l_ext = r->o.theory_lmax;
    r->lmax_ext = l_ext > lmax ? l_ext : lmax;
    /* The coupling needs W_l to 2 lmax_ext; the pixelised mask is only
     * resolved to 3 nside - 1, above which W_l is taken as zero. */
    r->lmax_t = 2 * r->lmax_ext < lmax_pix ? 2 * r->lmax_ext : lmax_pix;
    return CLEF_OK;
}


int clef_estimator_compute(clef_estimator *e)
{
    if (!e || e->nfields < 1)
        CLEF_FAIL(CLEF_EINVAL, "estimator: no field to analyse");
    if (e->computed)
        CLEF_FAIL(CLEF_EINVAL, "estimator: compute runs once");
    e->computed = 1;
    if (!e->user_pairs) /* every pair a <= b */
        for (int a = 0; a < e->nfields; a++)
            for (int b = a; b < e->nfields; b++)
                CLEF_TRY(push_pair(e, a, b));
    CLEF_TRY(check_fields(e));
    e->nside = grid_of(e)->nside;
    e->npix = grid_of(e)->npix;
    e->t0 = clef_wtime();
    CLEF_TRY(stage_lmax(e));
    CLEF_TRY(clef_est_prepare(e));
    if (e->o.inputs_done) /* the weights and a_lm are all that is kept of the inputs */
        e->o.inputs_done(e->o.inputs_done_arg);
    if (e->after_maps) { /* nothing below the map transforms has been read or made yet */
        clef_estimator *late = e->after_maps(e->after_maps_arg);
        if (late) { /* pieces handed over now (another process's, clef sims) */
            clef_estimator_destroy(e->prev);
            free(e->prev_wid);
            e->prev_wid = NULL;
            e->prev = late;
        }
    }
    CLEF_TRY(clef_est_mask_pairs(e));
    CLEF_TRY(clef_est_bins(e));
    CLEF_TRY(clef_est_couplings(e));
    for (int k = 0; k < e->npairs; k++)
        CLEF_TRY(clef_est_decouple(e, &e->pairs[k]));
    clef_est_stage_done(e, "decouple");
    CLEF_TRY(clef_est_covariance(e));
    CLEF_TRY(clef_est_tables(e));
    clef_est_stage_done(e, "covariance");
    for (int k = 0; k < e->npairs; k++)
        CLEF_TRY(clef_est_windows(e, &e->pairs[k]));
    clef_est_stage_done(e, "windows");
    /* What was not taken from an earlier estimator is not needed. */
    clef_estimator_destroy(e->prev);
    e->prev = NULL;
    return clef_est_results(e);
}

int clef_estimator_nfields(const clef_estimator *e)
{
    return e ? e->nfields : 0;
}

int clef_estimator_npairs(const clef_estimator *e)
{
    return e ? e->npairs : 0;
}

void clef_estimator_pair_fields(const clef_estimator *e, int k, int *a, int *b)
{
    *a = e->pairs[k].a;
    *b = e->pairs[k].b;
}

const char *clef_estimator_field_name(const clef_estimator *e, int i)
{
    return e->fields[i].name;
}

const clef_spectrum_result *clef_estimator_result(const clef_estimator *e, int k)
{
    return &e->pairs[k].res;
}

void clef_estimator_take_result(clef_estimator *e, int k, clef_spectrum_result *out)
{
    *out = e->pairs[k].res;
    memset(&e->pairs[k].res, 0, sizeof e->pairs[k].res);
}

const double *clef_estimator_covariance(const clef_estimator *e, int *n)
{
    if (n)
        *n = e->cov ? e->ncov : 0;
    return e->cov;
}

void clef_estimator_shared(const clef_estimator *e, int *mask_pairs, int *operators)
{
    if (mask_pairs)
        *mask_pairs = e && e->computed ? e->nmasks : 0;
    if (operators)
        *operators = e && e->computed ? e->nops : 0;
}

void clef_estimator_couplings(const clef_estimator *e, int *computed, int *read)
{
    if (computed)
        *computed = e ? e->n_coupling_made : 0;
    if (read)
        *read = e ? e->n_coupling_read : 0;
}

void clef_estimator_transforms(const clef_estimator *e, int *maps, int *masks)
{
    if (maps)
        *maps = e->n_map_sht;
    if (masks)
        *masks = e->n_mask_sht;
}
