/* Tests of clef_estimator_reuse (estimator.h): a series of estimators on
 * maps with the same masks takes the mask pieces (analysis plan, mask
 * spectra, deprojection correction, coupling, covariance kernels, binned
 * operator, windows) from the one before, and every output is the same bits
 * as a fresh estimator's.  The reference is the same estimator without
 * reuse: the property claimed is identity, checked with memcmp.  That the
 * pieces are taken is checked on what they would cost: with the cache off,
 * a fresh estimator transforms the masks (clef_estimator_transforms), one
 * that reuses does not. */
#include "check.h"

#include <chealpix.h>

#include "clef/estimator.h"
#include "clef/spectrum.h"

/* |z| > zcut, apodized over 0.1 in z by a cosine: smooth enough for a
 * well-conditioned coupling at nside 32. */
static clef_map *band_mask(int64_t nside, double zcut)
{
    clef_map *m = NULL;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++) {
        double th, ph;
        pix2ang_ring64(nside, p, &th, &ph);
        const double x = (fabs(cos(th)) - zcut) / 0.1;
        m->pix[p] = x <= 0 ? 0.0 : (x >= 1 ? 1.0 : 0.5 * (1 - cos(M_PI * x)));
    }
    return m;
}

/* A map of white values from a 64-bit LCG (Knuth's MMIX constants): any
 * sky will do, the claim is identity. */
static clef_map *white_map(int64_t nside, uint64_t seed)
{
    clef_map *m = NULL;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    uint64_t s = seed * 2 + 1;
    for (int64_t p = 0; p < m->npix; p++) {
        s = s * 6364136223846793005ULL + 1442695040888963407ULL;
        m->pix[p] = 100.0 * ((double)(s >> 11) / 9007199254740992.0 - 0.5);
    }
    return m;
}

typedef struct run_out {
    int npairs, ncov, nreused, mask_sht;
    clef_bandpowers *bp[3];
    double *cov;
} run_out;

/* Two fields (the second with its own mask) and their three pairs, joint
 * covariance; prev: an earlier estimator to reuse (NULL: fresh).  *keep
 * (may be NULL) receives the estimator for the next run. */
static void run(clef_map *const maps[2], clef_map *const masks[2], const clef_spectrum_opts *o,
                clef_estimator *prev, int reuse, clef_estimator **keep, run_out *out)
{
    clef_estimator *e = NULL;
    assert_int_equal(clef_estimator_create(&e, o, 1), CLEF_OK);
    for (int i = 0; i < 2; i++) {
        clef_field f;
        clef_field_init(&f);
        f.name = i ? "b" : "a";
        f.maps[0] = maps[i];
        f.mask = masks[i];
        f.beam_fwhm = 60.0;
        assert_int_equal(clef_estimator_add_field(e, &f), CLEF_OK);
    }
    if (reuse)
        assert_int_equal(clef_estimator_reuse(e, prev), CLEF_OK);
    assert_int_equal(clef_estimator_compute(e), CLEF_OK);
    memset(out, 0, sizeof *out);
    out->npairs = clef_estimator_npairs(e);
    assert_int_equal(out->npairs, 3);
    for (int k = 0; k < 3; k++) {
        clef_spectrum_result r;
        clef_estimator_take_result(e, k, &r);
        out->bp[k] = r.bp;
        r.bp = NULL;
        clef_spectrum_result_free(&r);
    }
    const double *c = clef_estimator_covariance(e, &out->ncov);
    out->cov = malloc(sizeof *out->cov * (size_t)out->ncov * out->ncov);
    memcpy(out->cov, c, sizeof *out->cov * (size_t)out->ncov * out->ncov);
    out->nreused = clef_estimator_reused(e);
    clef_estimator_transforms(e, NULL, &out->mask_sht);
    if (keep)
        *keep = e;
    else
        clef_estimator_destroy(e);
}

static void run_free(run_out *r)
{
    for (int k = 0; k < 3; k++)
        clef_bandpowers_free(r->bp[k]);
    free(r->cov);
}

/* Every number of the two runs, bit for bit. */
static void assert_same(const run_out *a, const run_out *b)
{
    assert_int_equal(a->ncov, b->ncov);
    assert_memory_equal(a->cov, b->cov, sizeof *a->cov * (size_t)a->ncov * a->ncov);
    for (int k = 0; k < 3; k++) {
        const clef_bandpowers *x = a->bp[k], *y = b->bp[k];
        const int nb = x->nbins;
        assert_int_equal(nb, y->nbins);
        assert_memory_equal(x->dl, y->dl, sizeof *x->dl * nb);
        assert_memory_equal(x->cov, y->cov, sizeof *x->cov * nb * nb);
        assert_int_equal(x->win_lmax, y->win_lmax);
        assert_memory_equal(x->win, y->win, sizeof *x->win * nb * (x->win_lmax + 1));
    }
}

static void test_series(void **state)
{
    (void)state;
    const int64_t ns = 32;
    clef_map *masks[2] = {band_mask(ns, 0.2), band_mask(ns, 0.35)};
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.use_cache = 0; /* every piece made, not read: the reuse is visible */
    o.find_peak = 0;
    clef_estimator *prev = NULL;
    for (uint64_t i = 0; i < 4; i++) {
        clef_map *maps[2] = {white_map(ns, 2 * i), white_map(ns, 2 * i + 1)};
        if (i == 3) { /* a missing pixel: field a's weights change, b's do not */
            maps[0]->valid[1000] = 0;
            maps[0]->nmissing = 1;
        }
        run_out fresh, reused;
        run(maps, masks, &o, NULL, 0, NULL, &fresh);
        clef_estimator *next = NULL;
        run(maps, masks, &o, prev, 1, &next, &reused);
        prev = next;
        assert_same(&fresh, &reused);
        assert_true(fresh.mask_sht > 0);
        assert_int_equal(fresh.nreused, 0);
        if (i == 0) {
            assert_int_equal(reused.nreused, 0);
            assert_int_equal(reused.mask_sht, fresh.mask_sht);
        } else if (i < 3) {
            /* the plan, 3 mask pairs, their kernels, 3 binned operators */
            assert_true(reused.nreused >= 7);
            assert_int_equal(reused.mask_sht, 0);
        } else {
            /* b x b still matches; a x a and a x b do not */
            assert_true(reused.nreused >= 2);
            assert_true(reused.nreused < 7);
            assert_true(reused.mask_sht > 0);
        }
        run_free(&fresh);
        run_free(&reused);
        clef_map_free(maps[0]);
        clef_map_free(maps[1]);
    }
    /* Other bins: M is reused, K is not; still the same bits. */
    clef_map *maps[2] = {white_map(ns, 77), white_map(ns, 78)};
    maps[0]->valid[1000] = 0;
    maps[0]->nmissing = 1;
    o.bin_width = 12;
    run_out fresh, reused;
    run(maps, masks, &o, NULL, 0, NULL, &fresh);
    run(maps, masks, &o, prev, 1, NULL, &reused);
    assert_same(&fresh, &reused);
    assert_true(reused.nreused >= 4);
    assert_int_equal(reused.mask_sht, 0);
    run_free(&fresh);
    run_free(&reused);
    clef_map_free(maps[0]);
    clef_map_free(maps[1]);
    clef_map_free(masks[0]);
    clef_map_free(masks[1]);
}

/* Pieces that travel as bytes (clef_estimator_export / _import, as clef
 * sims sends them from rank 0 to the other ranks): an estimator that takes
 * them from the imported one gives the same bits as a fresh estimator, and
 * neither transforms the masks nor computes a coupling matrix. */
static void test_export_import(void **state)
{
    (void)state;
    const int64_t ns = 32;
    clef_map *masks[2] = {band_mask(ns, 0.2), band_mask(ns, 0.35)};
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.use_cache = 0;
    o.find_peak = 0;
    clef_map *m0[2] = {white_map(ns, 40), white_map(ns, 41)};
    clef_estimator *first = NULL;
    run_out r0;
    run(m0, masks, &o, NULL, 1, &first, &r0);
    void *buf = NULL;
    size_t n = 0;
    assert_int_equal(clef_estimator_export(first, &buf, &n), CLEF_OK);
    assert_non_null(buf);
    /* at least the three couplings M of the mask pairs, (lmax_ext + 1)^2
     * doubles each, travel */
    const int le = r0.bp[0]->win_lmax;
    assert_true(n > 3 * sizeof(double) * (size_t)(le + 1) * (le + 1));
    for (int pass = 0; pass < 2; pass++) {
        clef_map *maps[2] = {white_map(ns, 50 + pass), white_map(ns, 60 + pass)};
        if (pass == 1) { /* field a's weights change: its pieces must not be taken */
            maps[0]->valid[700] = 0;
            maps[0]->nmissing = 1;
        }
        clef_estimator *shell = NULL;
        assert_int_equal(clef_estimator_import(&shell, buf, n), CLEF_OK);
        run_out fresh, got;
        run(maps, masks, &o, NULL, 0, NULL, &fresh);
        clef_estimator *e = NULL;
        run(maps, masks, &o, shell, 1, &e, &got);
        assert_same(&fresh, &got);
        int made = -1, read = -1;
        clef_estimator_couplings(e, &made, &read);
        assert_int_equal(read, 0);
        if (pass == 0) {
            /* 3 mask pairs, their kernels, 3 binned operators; no plan */
            assert_true(got.nreused >= 6);
            assert_int_equal(got.mask_sht, 0);
            assert_int_equal(made, 0);
        } else {
            assert_true(got.nreused >= 2); /* b x b */
            assert_true(got.nreused < 6);
            assert_true(got.mask_sht > 0);
            assert_true(made > 0);
        }
        clef_estimator_destroy(e);
        run_free(&fresh);
        run_free(&got);
        clef_map_free(maps[0]);
        clef_map_free(maps[1]);
    }
    /* Bytes that are not an export: truncated, altered, foreign. */
    clef_estimator *bad = NULL;
    assert_int_equal(clef_estimator_import(&bad, buf, n - 1), CLEF_EFORMAT);
    assert_null(bad);
    unsigned char *alt = malloc(n + 8);
    memcpy(alt, buf, n);
    memset(alt + n, 0, 8);
    assert_int_equal(clef_estimator_import(&bad, alt, n + 8), CLEF_EFORMAT); /* trailing bytes */
    alt[3] ^= 0x20; /* the magic */
    assert_int_equal(clef_estimator_import(&bad, alt, n), CLEF_EFORMAT);
    alt[3] ^= 0x20;
    /* the number of reported bins (after the magic, the order word, 2 int64,
     * 5 int32, a double and the cache folder's length, -1 for none): no
     * longer that of the bins that follow */
    const size_t at_nb = 8 + 4 + 16 + 20 + 8 + 4;
    const int32_t huge = 1 << 30;
    memcpy(alt + at_nb, &huge, 4);
    assert_int_equal(clef_estimator_import(&bad, alt, n), CLEF_EFORMAT);
    assert_null(bad);
    free(alt);
    /* Export needs a computed estimator that still has its pieces. */
    clef_estimator *fresh_e = NULL;
    void *b2 = NULL;
    size_t n2 = 0;
    assert_int_equal(clef_estimator_create(&fresh_e, &o, 0), CLEF_OK);
    assert_int_equal(clef_estimator_export(fresh_e, &b2, &n2), CLEF_EINVAL);
    assert_null(b2);
    clef_estimator_destroy(fresh_e);
    assert_int_equal(clef_estimator_import(&bad, buf, n), CLEF_OK);
    assert_int_equal(clef_estimator_export(bad, &b2, &n2), CLEF_EINVAL); /* imported */
    clef_estimator_destroy(bad);
    free(buf);
    clef_estimator_destroy(first);
    run_free(&r0);
    clef_map_free(m0[0]);
    clef_map_free(m0[1]);
    clef_map_free(masks[0]);
    clef_map_free(masks[1]);
}

static void test_errors(void **state)
{
    (void)state;
    clef_estimator *e = NULL, *p = NULL;
    assert_int_equal(clef_estimator_create(&e, NULL, 0), CLEF_OK);
    assert_int_equal(clef_estimator_create(&p, NULL, 0), CLEF_OK);
    /* prev not computed: refused, and taken over (no leak under ASan) */
    assert_int_equal(clef_estimator_reuse(e, p), CLEF_EINVAL);
    assert_int_equal(clef_estimator_reuse(e, e), CLEF_EINVAL);
    assert_int_equal(clef_estimator_reuse(NULL, NULL), CLEF_EINVAL);
    assert_int_equal(clef_estimator_reuse(e, NULL), CLEF_OK);
    clef_estimator_destroy(e);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_series),
        cmocka_unit_test(test_export_import),
        cmocka_unit_test(test_errors),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
