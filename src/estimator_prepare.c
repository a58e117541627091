/* Stage "prepare" of the estimator: effective weights of each field (mask
 * x validity of every split map), their moments, the monopole and dipole
 * of each map fitted on the observed sky and removed, and one analysis
 * per split map to lmax_ext.  Field by field: its weights, then each of
 * its maps weighted into one buffer and analysed.  Maps read on demand
 * (clef_field.load_map) are held one at a time and handed back before the
 * transform, so the run holds the a_lm of all maps, the weights, one
 * weighted-map buffer and at most one map read.  Weights equal to an
 * earlier field's are shared (a mask pair is then computed once). */
#define _DEFAULT_SOURCE
#include <complex.h>
#include <stdlib.h>
#include <string.h>

#include "clef/sht.h"
#include "core_impl.h"
#include "estimator_impl.h"

static const char *mask_name(const est_field *f)
{
    return f->f.mask_name ? f->f.mask_name : "mask";
}

/* Split s of field f: its own map (*held NULL), or one read through its
 * loader and checked against its mask (*held = the map, to hand back with
 * put_map). */
static int get_map(const clef_estimator *e, const est_field *f, int s, const clef_map **out,
                   clef_map **held)
{
    *held = NULL;
    *out = f->f.maps[s];
    if (!f->f.load_map)
        return CLEF_OK;
    clef_map *m = NULL;
    const int status = f->f.load_map(f->f.load_arg, s, &m);
    if (status != CLEF_OK) /* the loader's message stands */
        return status;
    if (!m)
        CLEF_FAIL(CLEF_EINVAL, "field '%s': the loader gave no map for '%s'", f->name,
                  clef_est_map_name(f, s));
    *held = m;
    *out = m;
    if (m->nside != e->nside)
        CLEF_FAIL(CLEF_EINVAL, "field '%s': map '%s' has nside %lld, the run's maps nside %lld",
                  f->name, clef_est_map_name(f, s), (long long)m->nside, (long long)e->nside);
    return clef_map_check_mask(m, clef_est_map_name(f, s), f->f.mask,
                               f->f.mask_name ? f->f.mask_name : "mask",
                               e->o.allow_coord_mismatch);
}

static void put_map(const est_field *f, int s, clef_map *held)
{
    if (!held)
        return;
    if (f->f.release_map)
        f->f.release_map(f->f.load_arg, s, held);
    else
        clef_map_free(held);
}

/* Effective weights of field f into w: the mask where every split map is
 * valid, 0 elsewhere.  Splits are visited last to first, so that split 0
 * of a field read on demand is the one left in *held0 for its transform
 * (a one-map field is then read once). */
static int field_weights(const clef_estimator *e, const est_field *f, double *w,
                         clef_map **held0)
{
    const clef_map *mask = f->f.mask;
    const int64_t npix = e->npix;
    *held0 = NULL;
    for (int64_t p = 0; p < npix; p++)
        w[p] = mask->valid[p] ? mask->pix[p] : 0.0;
    for (int s = f->f.nsplits - 1; s >= 0; s--) {
        const clef_map *m;
        clef_map *held;
        const int status = get_map(e, f, s, &m, &held);
        if (status != CLEF_OK) {
            put_map(f, s, held);
            return status;
        }
        for (int64_t p = 0; p < npix; p++)
            if (!m->valid[p])
                w[p] = 0.0;
        if (s == 0)
            *held0 = held;
        else
            put_map(f, s, held);
    }
    return CLEF_OK;
}

static int add_weights(clef_estimator *e, int fi, double *w)
{
    est_field *f = &e->fields[fi];
    const int64_t npix = e->npix;
    for (int k = 0; k < e->nweights; k++)
        if (!memcmp(e->weights[k].w, w, (size_t)npix * sizeof *w)) {
            f->wid = k;
            free(w);
            return CLEF_OK;
        }
    est_weights *nw = realloc(e->weights, (size_t)(e->nweights + 1) * sizeof *nw);
    if (!nw) {
        free(w);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for weights");
    }
    e->weights = nw;
    est_weights *d = &nw[e->nweights];
    memset(d, 0, sizeof *d);
    d->w = w;
    d->field = fi;
    double s1 = 0, s2 = 0, s4 = 0;
    int64_t nobs = 0;
    for (int64_t p = 0; p < npix; p++) {
        const double x = w[p], x2 = x * x;
        s1 += x;
        s2 += x2;
        s4 += x2 * x2;
        nobs += x > 0;
    }
    f->wid = e->nweights++;
    if (nobs == 0)
        CLEF_FAIL(CLEF_EINVAL, "mask '%s' leaves no observed sky on map '%s' (every weight is 0)",
                  mask_name(f), clef_est_map_name(f, 0));
    d->fsky = (double)nobs / (double)npix;
    d->w1 = s1 / (double)npix;
    d->w2 = s2 / (double)npix;
    d->w4 = s4 / (double)npix;
    d->nf = e->o.keep_multipoles ? 0 : 4;
    return CLEF_OK;
}

/* Map split s of field f in uK, multipoles removed, times the weights. */
static int weighted_map(clef_estimator *e, est_field *f, int s, const clef_map *map, double *tmap)
{
    est_weights *wt = &e->weights[f->wid];
    const int64_t npix = e->npix;
    /* Band powers are in uK^2: maps in K or mK (their TUNIT) are scaled. */
    double scale = clef_unit_to_uk(map->unit);
    if (scale == 0) {
        if (map->unit[0])
            clef_log(CLEF_LOG_WARN, "map '%s': unit '%s' not recognised; values taken as uK",
                     clef_est_map_name(f, s), map->unit);
        scale = 1;
    } else if (scale != 1) {
        clef_log(CLEF_LOG_INFO, "map '%s': unit '%s', values scaled by %g to uK",
                 clef_est_map_name(f, s), map->unit, scale);
    }
    for (int64_t p = 0; p < npix; p++)
        tmap[p] = scale * map->pix[p];
    if (!e->o.keep_multipoles) {
        /* The weights decide whether a dipole can be fitted; the first
         * map with these weights settles it for all of them. */
        int status = CLEF_ENUMERIC;
        if (wt->nf == 4)
            status = clef_spectrum_remove_multipoles(tmap, wt->w, e->nside, 1,
                                                     f->multipoles[s]);
        if (status == CLEF_ENUMERIC) {
            if (wt->nf == 4)
                /* A small or thin patch may not constrain a dipole: remove
                 * the monopole alone rather than fail. */
                clef_log(CLEF_LOG_WARN, "map '%s': %s; only the monopole is removed",
                         clef_est_map_name(f, s), clef_last_error());
            wt->nf = 1;
            status = clef_spectrum_remove_multipoles(tmap, wt->w, e->nside, 0, f->multipoles[s]);
        }
        CLEF_TRY(status);
    }
    for (int64_t p = 0; p < npix; p++)
        tmap[p] *= wt->w[p];
    return CLEF_OK;
}

int clef_est_prepare(clef_estimator *e)
{
    const int64_t npix = e->npix;
    double t = clef_wtime(), t_prep = t - e->t0, t_sht = 0;
    double *tmap = clef_alloc_large((size_t)npix * sizeof *tmap);
    if (!tmap)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for a weighted map");
    int status = CLEF_OK, nmaps = 0, done = 0, hs = 0;
    const est_field *hf = NULL;
    clef_map *held = NULL; /* a map read on demand, between its reading and its weighting */
    for (int i = 0; i < e->nfields; i++)
        nmaps += e->fields[i].f.nsplits;
    clef_sht *sht = NULL;
    /* Ring weights through the cache folder (sht.h) when the run uses it. */
    clef_sht_opts so = {.use_cache = e->o.use_cache, .cache_dir = e->o.cache_dir};
    so.nmaps = 1;
    const size_t na = clef_alm_size(e->lmax_ext, e->lmax_ext);
    clef_progress("analysis", 0.0);
    if (!(sht = clef_est_reuse_sht(e)))
        CLEF_CHECK(clef_sht_create(&sht, e->nside, e->lmax_ext, &so));
    for (int i = 0; i < e->nfields; i++) {
        est_field *f = &e->fields[i];
        const double t1 = clef_wtime();
        t_sht += t1 - t;
        double *w = clef_alloc_large((size_t)npix * sizeof *w);
        if (!w) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for %lld mask weights",
                               (long long)npix);
            goto fail;
        }
        hf = f;
        hs = 0;
        if ((status = field_weights(e, f, w, &held)) != CLEF_OK) {
            free(w);
            goto fail;
        }
        CLEF_CHECK(add_weights(e, i, w)); /* owns w from here */
        t = clef_wtime();
        t_prep += t - t1;
        for (int s = 0; s < f->f.nsplits; s++) {
            const clef_map *m = held;
            if (!held) {
                const double t2 = clef_wtime();
                hs = s;
                CLEF_CHECK(get_map(e, f, s, &m, &held));
                t = clef_wtime();
                t_prep += t - t2;
            }
            status = weighted_map(e, f, s, m, tmap);
            put_map(f, s, held); /* before the transform: one map read at a time */
            held = NULL;
            if (status != CLEF_OK)
                goto fail;
            if (!(f->alm[s] = malloc(na * sizeof(double complex)))) {
                status = clef_fail(CLEF_ENOMEM, "out of memory for a_lm (lmax %d)", e->lmax_ext);
                goto fail;
            }
            const double *in[1] = {tmap};
            double complex *out[1] = {f->alm[s]};
            CLEF_CHECK(clef_sht_analysis(sht, 1, in, out, e->o.iterations));
            e->n_map_sht++;
            clef_progress("analysis", (double)++done / nmaps);
        }
    }
    t_sht += clef_wtime() - t;
    /* The weights and reads, then the weighting and transforms, as two
     * stages (they alternate field by field). */
    clef_est_stage_add(e, "prepare", t_prep);
    clef_est_stage_add(e, "transform", t_sht);
    /* An earlier estimator's weights are compared now, once every field's
     * weights and their multipole fits (nf) are settled, and freed. */
    status = clef_est_reuse_weights(e);
fail:
    if (hf)
        put_map(hf, hs, held);
    if (e->keep && status == CLEF_OK)
        e->sht = sht; /* for the next estimator of a series (clef_estimator_reuse) */
    else
        clef_sht_destroy(sht);
    free(tmap);
    return status;
}

/* Pseudo-spectrum of fields x and y, l = 0..lmax_ext.  total = 1 (x = y):
 * the mean of the split auto-spectra (signal plus noise); else the mean of
 * the split crosses: i < j for x = y, every (i, j) for two fields. */
int clef_est_pseudo(const clef_estimator *e, int x, int y, int total, double *cl)
{
    const int lmax = e->lmax_ext;
    const est_field *fx = &e->fields[x], *fy = &e->fields[y];
    double *tmp = malloc((size_t)(lmax + 1) * sizeof *tmp);
    if (!tmp)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for spectra");
    memset(cl, 0, (size_t)(lmax + 1) * sizeof *cl);
    int n = 0, status = CLEF_OK;
    for (int i = 0; i < fx->f.nsplits; i++)
        for (int j = 0; j < fy->f.nsplits; j++) {
            if (x == y && (total ? i != j : j <= i))
                continue;
            CLEF_CHECK(clef_alm_cl(lmax, lmax, fx->alm[i], (x == y && i == j) ? NULL : fy->alm[j],
                                   n ? tmp : cl));
            if (n)
                for (int l = 0; l <= lmax; l++)
                    cl[l] += tmp[l];
            n++;
        }
    if (n == 0) {
        status = clef_fail(CLEF_EINVAL, "field '%s' has one map: no split cross-spectrum",
                           fx->name);
        goto fail;
    }
    if (n > 1)
        for (int l = 0; l <= lmax; l++)
            cl[l] /= n;
fail:
    free(tmp);
    return status;
}

int clef_est_product_index(const clef_estimator *e, int x, int y)
{
    if (x > y) {
        const int t = x;
        x = y;
        y = t;
    }
    /* weights 0..nw-1, then products (x, y), x <= y, in row order. */
    const int nw = e->nweights;
    return nw + x * nw - x * (x - 1) / 2 + (y - x);
}

/* Analyses of every weight map and every product w_x w_y to lmax_t, in one
 * call (the Legendre recurrence is shared).  Only needed when some mask
 * spectrum is not in the cache, or for the joint covariance kernels. */
int clef_est_weight_alms(clef_estimator *e)
{
    if (e->walm)
        return CLEF_OK;
    const int nw = e->nweights, np = nw * (nw + 1) / 2, n = nw + np;
    const int64_t npix = e->npix;
    const int lt = e->lmax_t;
    int status = CLEF_OK;
    double **prod = calloc((size_t)np, sizeof *prod);
    const double **in = calloc((size_t)n, sizeof *in);
    e->walm = calloc((size_t)n, sizeof *e->walm);
    clef_sht *sht = NULL;
    if (!prod || !in || !e->walm) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the mask transforms");
        goto fail;
    }
    for (int x = 0; x < nw; x++) {
        in[x] = e->weights[x].w;
        for (int y = x; y < nw; y++) {
            const int k = clef_est_product_index(e, x, y);
            double *m = prod[k - nw] = clef_alloc_large((size_t)npix * sizeof *m);
            if (!m) {
                status = clef_fail(CLEF_ENOMEM, "out of memory for a product mask");
                goto fail;
            }
            const double *wx = e->weights[x].w, *wy = e->weights[y].w;
            for (int64_t p = 0; p < npix; p++)
                m[p] = wx[p] * wy[p];
            in[k] = m;
        }
    }
    for (int k = 0; k < n; k++)
        if (!(e->walm[k] = malloc(clef_alm_size(lt, lt) * sizeof(double complex)))) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for a_lm (lmax %d)", lt);
            goto fail;
        }
    clef_sht_opts so = {.use_cache = e->o.use_cache, .cache_dir = e->o.cache_dir};
    so.nmaps = n;
    CLEF_CHECK(clef_sht_create(&sht, e->nside, lt, &so));
    CLEF_CHECK(clef_sht_analysis(sht, n, in, (double complex *const *)e->walm, e->o.iterations));
    e->n_mask_sht += n;
fail:
    clef_sht_destroy(sht);
    if (prod)
        for (int k = 0; k < np; k++)
            free(prod[k]);
    free(prod);
    free(in);
    return status;
}
