/* The mask pieces of a computed estimator as bytes, and an estimator made
 * from such bytes that holds them and nothing else (clef_estimator_export
 * and clef_estimator_import, estimator.h).  A distributed ensemble (clef
 * sims under MPI) makes or reads the pieces on one process and sends the
 * bytes to the others, which hand the imported estimator to
 * clef_estimator_reuse instead of reading the cache folder (or computing
 * the coupling) themselves.  No MPI here: moving the bytes is the caller's.
 *
 * What is written is what clef_estimator_reuse takes (estimator_reuse.c)
 * and what it compares before taking it: the settings, the reported bins,
 * per set of weights the templates removed, the moments and the SHA-256 of
 * the npix doubles (not the doubles: 400 MB at nside 2048; equal digests
 * stand for equal weights, as for the cache keys), per mask pair W_l, the
 * deprojection correction and the corrected M, the covariance kernels, per
 * operator the filter, the bins, K (with its LU factors and K^-1 P) and the
 * windows.  The doubles are copied as they are, so a piece taken from an
 * imported estimator is the same bits as on the process that made it.
 *
 * Layout (native byte order and type sizes: the processes of one job run
 * on one machine family): "CLEFEST1", a byte-order word, then the fields in
 * the order of put_all below; counts and flags as int32, sizes as int64. */
#define _DEFAULT_SOURCE
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "clef/hash.h"
#include "core_impl.h"
#include "coupling_impl.h"
#include "estimator_impl.h"

static const char MAGIC[8] = {'C', 'L', 'E', 'F', 'E', 'S', 'T', '1'};
static const uint32_t ORDER = 0x01020304u;

/* ---- writing: one pass counts (p NULL), the second writes ---- */

typedef struct wr {
    unsigned char *p;
    size_t n;
} wr;

static void put(wr *w, const void *v, size_t bytes)
{
    if (w->p && bytes)
        memcpy(w->p + w->n, v, bytes);
    w->n += bytes;
}

static void put_i32(wr *w, int v)
{
    const int32_t x = v;
    put(w, &x, sizeof x);
}

static void put_i64(wr *w, int64_t v) { put(w, &v, sizeof v); }
static void put_f64(wr *w, double v) { put(w, &v, sizeof v); }

static void put_doubles(wr *w, const double *v, size_t n)
{
    put_i32(w, v != NULL);
    if (v) {
        put_i64(w, (int64_t)n);
        put(w, v, n * sizeof *v);
    }
}

static void put_bins(wr *w, const clef_bins *b)
{
    const int n = b ? clef_bins_count(b) : 0;
    put_i32(w, n);
    if (!n)
        return;
    put_i32(w, clef_bins_weighting(b));
    for (int i = 0; i < n; i++) {
        put_i32(w, clef_bins_l_lo(b, i));
        put_i32(w, clef_bins_l_hi(b, i));
    }
}

static void put_coupling(wr *w, const clef_coupling *c)
{
    put_i32(w, c != NULL);
    if (!c)
        return;
    put_i32(w, c->lmax);
    put_i32(w, c->wl_lmax);
    put(w, c->wl, ((size_t)c->wl_lmax + 1) * sizeof *c->wl);
    put(w, c->m, ((size_t)c->lmax + 1) * ((size_t)c->lmax + 1) * sizeof *c->m);
}

static void put_binned(wr *w, const clef_coupling_binned *k)
{
    put_i32(w, k != NULL);
    if (!k)
        return;
    const size_t nb = (size_t)k->nbins;
    put_i32(w, k->nbins);
    put_i32(w, k->lmax);
    put_f64(w, k->rcond);
    put(w, k->k, nb * nb * sizeof *k->k);
    put(w, k->lu, nb * nb * sizeof *k->lu);
    for (size_t i = 0; i < nb; i++)
        put_i64(w, (int64_t)k->ipiv[i]);
    put(w, k->kinv_p, nb * ((size_t)k->lmax + 1) * sizeof *k->kinv_p);
}

static void put_all(wr *w, const clef_estimator *e, const unsigned char (*sha)[32])
{
    put(w, MAGIC, sizeof MAGIC);
    put(w, &ORDER, sizeof ORDER);
    put_i64(w, e->nside);
    put_i64(w, e->npix);
    put_i32(w, e->lmax_ext);
    put_i32(w, e->lmax_t);
    put_i32(w, e->o.iterations);
    put_i32(w, e->o.keep_multipoles);
    put_i32(w, e->o.use_cache);
    put_f64(w, e->o.rcond_min);
    const size_t ld = e->o.cache_dir ? strlen(e->o.cache_dir) : 0;
    put_i32(w, e->o.cache_dir ? (int)ld : -1);
    put(w, e->o.cache_dir, ld);
    put_i32(w, e->nb);
    put_bins(w, e->bins);
    put_i32(w, e->nweights);
    for (int k = 0; k < e->nweights; k++) {
        const est_weights *q = &e->weights[k];
        put_i32(w, q->nf);
        put_f64(w, q->fsky);
        put_f64(w, q->w1);
        put_f64(w, q->w2);
        put_f64(w, q->w4);
        put(w, sha[k], 32);
    }
    const size_t nt = (size_t)e->lmax_t + 1, ne = (size_t)e->lmax_ext + 1;
    put_i32(w, e->nmasks);
    for (int j = 0; j < e->nmasks; j++) {
        const est_masks *mk = &e->masks[j];
        put_i32(w, mk->wa);
        put_i32(w, mk->wb);
        put_i32(w, mk->nrows);
        put_i32(w, mk->cache_hit);
        put_i32(w, mk->cw);
        put_f64(w, mk->wab);
        put(w, mk->key, sizeof mk->key);
        put_doubles(w, mk->wl, (size_t)mk->nrows * nt);
        put_i32(w, mk->dep.ldep);
        put_i32(w, mk->dep.truncated);
        put_f64(w, mk->dep.level_at_cut);
        put_doubles(w, mk->dep.dmean, ((size_t)mk->dep.ldep + 1) * ((size_t)mk->dep.ldep + 1));
        put_coupling(w, mk->m);
    }
    put_i32(w, e->nkernels);
    for (int j = 0; j < e->nkernels; j++) {
        for (int i = 0; i < 4; i++)
            put_i32(w, e->kernels[j].p[i]);
        put_coupling(w, e->kernels[j].m);
    }
    put_i32(w, e->nops);
    for (int j = 0; j < e->nops; j++) {
        const est_op *op = &e->ops[j];
        put_i32(w, op->mp);
        put_i32(w, op->nb_all);
        put_doubles(w, op->tl, ne);
        put_bins(w, op->all_bins);
        put_i32(w, op->rep != NULL);
        for (int b = 0; op->rep && b < e->nb; b++)
            put_i32(w, op->rep[b]);
        put_binned(w, op->kb);
        put_doubles(w, op->win, (size_t)e->nb * ne);
    }
}

int clef_estimator_export(const clef_estimator *e, void **buf, size_t *n)
{
    if (!buf || !n)
        CLEF_FAIL(CLEF_EINVAL, "estimator export: no output");
    *buf = NULL;
    *n = 0;
    if (!e || !e->computed || e->imported)
        CLEF_FAIL(CLEF_EINVAL, "estimator export: %s", !e ? "no estimator"
                  : e->imported ? "an imported estimator is not exported again"
                                : "the estimator has not been computed");
    unsigned char (*sha)[32] = malloc((size_t)(e->nweights ? e->nweights : 1) * sizeof *sha);
    if (!sha)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the estimator export");
    const size_t bytes = (size_t)e->npix * sizeof(double);
    for (int k = 0; k < e->nweights; k++) {
        const est_weights *q = &e->weights[k];
        if (q->has_sha) {
            memcpy(sha[k], q->sha, 32);
        } else if (q->w) {
            clef_sha256 h;
            clef_sha256_init(&h);
            clef_sha256_update(&h, q->w, bytes);
            clef_sha256_final(&h, sha[k]);
        } else {
            free(sha);
            CLEF_FAIL(CLEF_EINVAL, "estimator export: its pieces were handed to a later "
                      "estimator (clef_estimator_reuse)");
        }
    }
    wr w = {NULL, 0};
    put_all(&w, e, (const unsigned char (*)[32])sha);
    if (!(w.p = malloc(w.n))) {
        free(sha);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the estimator export (%zu bytes)", w.n);
    }
    const size_t total = w.n;
    w.n = 0;
    put_all(&w, e, (const unsigned char (*)[32])sha);
    free(sha);
    if (w.n != total) { /* the two passes wrote the same fields */
        free(w.p);
        CLEF_FAIL(CLEF_EINVAL, "estimator export: internal size mismatch");
    }
    *buf = w.p;
    *n = total;
    return CLEF_OK;
}

/* ---- reading: every length checked against what is left ---- */

typedef struct rd {
    const unsigned char *p;
    size_t n, off;
    int ok;
} rd;

/* Malformed (ok 0), unless already out of memory (ok -1). */
static void bad(rd *r)
{
    if (r->ok > 0)
        r->ok = 0;
}

static int get(rd *r, void *v, size_t bytes)
{
    if (r->ok <= 0 || bytes > r->n - r->off) {
        bad(r);
        return 0;
    }
    memcpy(v, r->p + r->off, bytes);
    r->off += bytes;
    return 1;
}

static int get_i32(rd *r)
{
    int32_t x = 0;
    get(r, &x, sizeof x);
    return x;
}

static int64_t get_i64(rd *r)
{
    int64_t x = 0;
    get(r, &x, sizeof x);
    return x;
}

static double get_f64(rd *r)
{
    double x = 0;
    get(r, &x, sizeof x);
    return x;
}

/* A malloc'ed copy of n doubles, after checking they are there. */
static double *get_array(rd *r, size_t n)
{
    if (r->ok <= 0 || n > (r->n - r->off) / sizeof(double)) {
        bad(r);
        return NULL;
    }
    double *v = malloc((n ? n : 1) * sizeof *v);
    if (!v) {
        r->ok = -1; /* out of memory */
        return NULL;
    }
    get(r, v, n * sizeof *v);
    return v;
}

/* An optional array written by put_doubles; its length must be `want`. */
static double *get_doubles(rd *r, size_t want)
{
    if (!get_i32(r))
        return NULL;
    if ((size_t)get_i64(r) != want) {
        bad(r);
        return NULL;
    }
    return get_array(r, want);
}

static clef_bins *get_bins(rd *r)
{
    const int n = get_i32(r);
    if (r->ok <= 0 || n <= 0) {
        if (n < 0)
            bad(r);
        return NULL;
    }
    const int wt = get_i32(r);
    if (r->ok <= 0 || (size_t)n > (r->n - r->off) / 8) {
        bad(r);
        return NULL;
    }
    int *lo = malloc(sizeof *lo * (size_t)n), *hi = malloc(sizeof *hi * (size_t)n);
    clef_bins *b = NULL;
    if (lo && hi) {
        for (int i = 0; i < n; i++) {
            lo[i] = get_i32(r);
            hi[i] = get_i32(r);
        }
        if (r->ok > 0 && clef_bins_create_ranges(&b, n, lo, hi, wt) != CLEF_OK)
            bad(r);
    } else {
        r->ok = -1;
    }
    free(lo);
    free(hi);
    return b;
}

static clef_coupling *get_coupling(rd *r)
{
    if (!get_i32(r))
        return NULL;
    const int lmax = get_i32(r), wl_lmax = get_i32(r);
    if (r->ok <= 0 || lmax < 0 || wl_lmax < 0 || lmax > 1000000 || wl_lmax > 2000000) {
        bad(r);
        return NULL;
    }
    double *wl = get_array(r, (size_t)wl_lmax + 1);
    clef_coupling *c = NULL;
    if (wl && clef_coupling_alloc_empty(&c, lmax, wl, wl_lmax) != CLEF_OK)
        bad(r);
    free(wl);
    if (c && !get(r, c->m, ((size_t)lmax + 1) * ((size_t)lmax + 1) * sizeof *c->m)) {
        clef_coupling_destroy(c);
        c = NULL;
    }
    return c;
}

static clef_coupling_binned *get_binned(rd *r)
{
    if (!get_i32(r))
        return NULL;
    const int nb = get_i32(r), lmax = get_i32(r);
    const double rcond = get_f64(r);
    if (r->ok <= 0 || nb <= 0 || lmax < 0 || nb > 1000000 || lmax > 1000000) {
        bad(r);
        return NULL;
    }
    clef_coupling_binned *k = calloc(1, sizeof *k);
    if (!k) {
        r->ok = -1;
        return NULL;
    }
    k->nbins = nb;
    k->lmax = lmax;
    k->rcond = rcond;
    const size_t n = (size_t)nb;
    k->k = get_array(r, n * n);
    k->lu = get_array(r, n * n);
    if (r->ok > 0 && !(k->ipiv = malloc(n * sizeof *k->ipiv)))
        r->ok = -1;
    for (size_t i = 0; r->ok > 0 && i < n; i++)
        k->ipiv[i] = (lapack_int)get_i64(r);
    k->kinv_p = get_array(r, n * ((size_t)lmax + 1));
    if (r->ok <= 0) {
        clef_coupling_binned_destroy(k);
        return NULL;
    }
    return k;
}

static int valid_id(int v, int n) { return v >= 0 && v < n; }

static int get_all(rd *r, clef_estimator *e)
{
    char magic[8];
    uint32_t order = 0;
    if (!get(r, magic, sizeof magic) || memcmp(magic, MAGIC, sizeof magic) ||
        !get(r, &order, sizeof order) || order != ORDER)
        return 0;
    e->nside = get_i64(r);
    e->npix = get_i64(r);
    e->lmax_ext = get_i32(r);
    e->lmax_t = get_i32(r);
    e->o.iterations = get_i32(r);
    e->o.keep_multipoles = get_i32(r);
    e->o.use_cache = get_i32(r);
    e->o.rcond_min = get_f64(r);
    const int ld = get_i32(r);
    if (r->ok <= 0 || e->lmax_ext < 0 || e->lmax_t < 0 || e->lmax_ext > 1000000 ||
        e->lmax_t > 2000000 || ld < -1 || (size_t)(ld > 0 ? ld : 0) > r->n - r->off)
        return 0;
    e->o.cache_dir = NULL;
    if (ld >= 0) {
        if (!(e->own_cache_dir = calloc((size_t)ld + 1, 1)))
            return -1;
        get(r, e->own_cache_dir, (size_t)ld);
        e->o.cache_dir = e->own_cache_dir;
    }
    e->nb = get_i32(r);
    e->own_bins = get_bins(r);
    e->bins = e->own_bins;
    if (r->ok <= 0 || (e->bins && clef_bins_count(e->bins) != e->nb))
        return r->ok < 0 ? -1 : 0;
    const int nw = get_i32(r);
    if (r->ok <= 0 || nw < 0 || nw > 2 * CLEF_ESTIMATOR_MAX_FIELDS)
        return 0;
    if (!(e->weights = calloc((size_t)(nw ? nw : 1), sizeof *e->weights)))
        return -1;
    e->nweights = nw;
    for (int k = 0; k < nw; k++) {
        est_weights *q = &e->weights[k];
        q->nf = get_i32(r);
        q->fsky = get_f64(r);
        q->w1 = get_f64(r);
        q->w2 = get_f64(r);
        q->w4 = get_f64(r);
        get(r, q->sha, sizeof q->sha);
        q->has_sha = 1;
    }
    const size_t nt = (size_t)e->lmax_t + 1, ne = (size_t)e->lmax_ext + 1;
    const int nm = get_i32(r);
    if (r->ok <= 0 || nm < 0 || nm > nw * nw)
        return 0;
    if (!(e->masks = calloc((size_t)(nm ? nm : 1), sizeof *e->masks)))
        return -1;
    for (int j = 0; j < nm; j++) {
        est_masks *mk = &e->masks[j];
        e->nmasks = j + 1; /* destroy frees what was read so far */
        mk->wa = get_i32(r);
        mk->wb = get_i32(r);
        mk->nrows = get_i32(r);
        mk->cache_hit = get_i32(r);
        mk->cw = get_i32(r);
        mk->wab = get_f64(r);
        get(r, mk->key, sizeof mk->key);
        mk->key[sizeof mk->key - 1] = 0;
        mk->from = -1;
        if (r->ok <= 0 || !valid_id(mk->wa, nw) || !valid_id(mk->wb, nw) || mk->nrows < 2 ||
            mk->nrows > 3)
            return 0;
        mk->wl = get_doubles(r, (size_t)mk->nrows * nt);
        mk->dep.ldep = get_i32(r);
        mk->dep.truncated = get_i32(r);
        mk->dep.level_at_cut = get_f64(r);
        if (r->ok <= 0 || mk->dep.ldep < 0 || mk->dep.ldep > CLEF_DEPROJ_LMAX_MAX)
            return r->ok < 0 ? -1 : 0;
        const size_t nd = (size_t)mk->dep.ldep + 1;
        mk->dep.dmean = get_doubles(r, nd * nd);
        mk->m = get_coupling(r);
        if (r->ok <= 0)
            return r->ok < 0 ? -1 : 0;
        if (mk->m && mk->m->lmax != e->lmax_ext)
            return 0;
    }
    const int nk = get_i32(r);
    if (r->ok <= 0 || nk < 0 || nk > nw * nw * nw * nw)
        return 0;
    if (!(e->kernels = calloc((size_t)(nk ? nk : 1), sizeof *e->kernels)))
        return -1;
    for (int j = 0; j < nk; j++) {
        est_kernel *kn = &e->kernels[j];
        e->nkernels = j + 1;
        for (int i = 0; i < 4; i++)
            if (!valid_id(kn->p[i] = get_i32(r), nw))
                return 0;
        kn->m = get_coupling(r);
        if (r->ok <= 0)
            return r->ok < 0 ? -1 : 0;
        if (kn->m && kn->m->lmax != e->lmax_ext)
            return 0;
    }
    const int no = get_i32(r);
    if (r->ok <= 0 || no < 0 || no > 100000)
        return 0;
    if (!(e->ops = calloc((size_t)(no ? no : 1), sizeof *e->ops)))
        return -1;
    for (int j = 0; j < no; j++) {
        est_op *op = &e->ops[j];
        e->nops = j + 1;
        op->mp = get_i32(r);
        op->nb_all = get_i32(r);
        if (r->ok <= 0 || !valid_id(op->mp, nm) || op->nb_all < 0)
            return 0;
        op->tl_own = get_doubles(r, ne);
        op->tl = op->tl_own;
        op->all_bins = get_bins(r);
        if (r->ok <= 0)
            return r->ok < 0 ? -1 : 0;
        if (get_i32(r)) {
            if (e->nb <= 0 || (size_t)e->nb > (r->n - r->off) / 4)
                return 0;
            if (!(op->rep = malloc(sizeof *op->rep * (size_t)e->nb)))
                return -1;
            for (int b = 0; b < e->nb; b++)
                if (!valid_id(op->rep[b] = get_i32(r), op->nb_all))
                    return 0;
        }
        op->kb = get_binned(r);
        op->win = get_doubles(r, (size_t)(e->nb > 0 ? e->nb : 0) * ne);
        if (r->ok <= 0)
            return r->ok < 0 ? -1 : 0;
        if (op->kb && (op->kb->nbins != op->nb_all || op->kb->lmax != e->lmax_ext))
            return 0;
    }
    return r->ok > 0 && r->off == r->n;
}

int clef_estimator_import(clef_estimator **out, const void *buf, size_t n)
{
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "estimator import: no output handle");
    *out = NULL;
    if (!buf)
        CLEF_FAIL(CLEF_EINVAL, "estimator import: no bytes");
    clef_estimator *e = NULL;
    CLEF_TRY(clef_estimator_create(&e, NULL, 0));
    rd r = {buf, n, 0, 1};
    const int got = get_all(&r, e);
    if (got <= 0) {
        clef_estimator_destroy(e);
        if (got < 0 || r.ok < 0)
            CLEF_FAIL(CLEF_ENOMEM, "out of memory importing an estimator's pieces (%zu bytes)",
                      n);
        CLEF_FAIL(CLEF_EFORMAT, "estimator import: %zu bytes are not the pieces written by "
                  "clef_estimator_export of this clef (stopped at byte %zu)", n, r.off);
    }
    /* Computed (clef_estimator_reuse takes pieces from computed estimators
     * only), with no fields of its own. */
    e->computed = 1;
    e->imported = 1;
    *out = e;
    return CLEF_OK;
}
