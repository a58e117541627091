/* Tests of the estimator of many fields (estimator.h): one run with N
 * fields equals the one-pair runs of clef_spectrum_compute pair by pair
 * (the same estimator, so to round-off), each map is transformed once,
 * split crosses equal the cross-spectrum of the splits, bad fields and
 * pairs are refused, and on an ensemble of simulated skies (clef's
 * simulator, independent noise per split) every pair's split-mean band
 * powers are unbiased through their windows and the quoted joint
 * covariance (Garcia-Garcia et al. 2019, JCAP 10, 043, generalised to four
 * fields) matches the ensemble's scatter and correlations. */
#include "check.h"

#include <chealpix.h>
#include <complex.h>

#include "clef/bins.h"
#include "clef/estimator.h"
#include "clef/sht.h"
#include "clef/sim.h"
#include "clef/spectrum.h"

/* A galactic cut |b| < bcut apodized over `apo` degrees (C2 kernel of
 * Grain et al. 2009, on the latitude difference), tilted by `tilt` in
 * longitude so that two masks differ in shape, not only in size. */
static clef_map *cut_mask(int64_t nside, double bcut_deg, double apo_deg, double tilt)
{
    clef_map *m = NULL;
    assert_int_equal(clef_map_alloc(&m, nside), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++) {
        double th, ph;
        pix2ang_ring64(nside, p, &th, &ph);
        const double b = fabs(90.0 - th * 180.0 / M_PI + tilt * sin(ph));
        const double x = (b - bcut_deg) / apo_deg;
        m->pix[p] = x <= 0 ? 0.0 : (x >= 1 ? 1.0 : 0.5 * (1 - cos(M_PI * x)));
    }
    return m;
}

/* Input spectra, flat-ish D_l with features (not the estimator's own
 * model): the common sky s and the extra sky t of field 2. */
static void input_cl(int lmax, double *cs, double *ct)
{
    for (int l = 0; l <= lmax; l++) {
        const double d = l < 2 ? 0 : 2 * M_PI / (l * (l + 1.0));
        cs[l] = d * 800.0 * (1.0 + 0.3 * sin(l / 60.0));
        ct[l] = d * 300.0;
    }
}

#define NF 3
#define NS 2

typedef struct sky {
    int64_t nside;
    int lsim;
    clef_sht *sht;
    double *cs, *ct;
    clef_map *maps[NF][NS];
    clef_map *mask[2];
} sky;

/* Field f split s = s_sky (+ t_sky for f = 2) + white noise of its own
 * stream (the seed depends on sky, field and split). */
static void sky_init(sky *k, int64_t nside)
{
    memset(k, 0, sizeof *k);
    k->nside = nside;
    k->lsim = 3 * (int)nside - 1;
    k->cs = calloc(k->lsim + 1, sizeof(double));
    k->ct = calloc(k->lsim + 1, sizeof(double));
    input_cl(k->lsim, k->cs, k->ct);
    assert_int_equal(clef_sht_create(&k->sht, nside, k->lsim, NULL), CLEF_OK);
    for (int f = 0; f < NF; f++)
        for (int s = 0; s < NS; s++)
            assert_int_equal(clef_map_alloc(&k->maps[f][s], nside), CLEF_OK);
    k->mask[0] = cut_mask(nside, 15, 12, 0);
    k->mask[1] = cut_mask(nside, 22, 12, 8);
}

static void sky_draw(sky *k, uint64_t seed, double depth)
{
    const int64_t npix = 12 * k->nside * k->nside;
    double *s = malloc(npix * sizeof *s), *t = malloc(npix * sizeof *t);
    clef_sim_opts so = {0};
    so.seed = seed;
    double *ms[1] = {s};
    assert_int_equal(clef_sim_map(k->sht, k->cs, &so, NULL, ms, NULL), CLEF_OK);
    so.seed = seed + 7777777;
    ms[0] = t;
    assert_int_equal(clef_sim_map(k->sht, k->ct, &so, NULL, ms, NULL), CLEF_OK);
    for (int f = 0; f < NF; f++)
        for (int sp = 0; sp < NS; sp++) {
            double *m = k->maps[f][sp]->pix;
            for (int64_t p = 0; p < npix; p++)
                m[p] = s[p] + (f == 2 ? t[p] : 0.0);
            if (depth > 0)
                assert_int_equal(clef_sim_noise(k->nside, depth, NULL, seed * 16 + f * 2 + sp,
                                                CLEF_SIM_STREAM_NOISE1, m, NULL),
                                 CLEF_OK);
        }
    free(s);
    free(t);
}

static void sky_free(sky *k)
{
    for (int f = 0; f < NF; f++)
        for (int s = 0; s < NS; s++)
            clef_map_free(k->maps[f][s]);
    clef_map_free(k->mask[0]);
    clef_map_free(k->mask[1]);
    clef_sht_destroy(k->sht);
    free(k->cs);
    free(k->ct);
}

static void base_opts(clef_spectrum_opts *o)
{
    clef_spectrum_opts_default(o);
    o->use_cache = 0;
    o->find_peak = 0;
    o->pixel_window = 0; /* the simulated maps carry none */
    o->bin_width = 16;
}

static void compute_ok(clef_estimator *e)
{
    const int st = clef_estimator_compute(e);
    if (st != CLEF_OK)
        print_message("estimator: %s\n", clef_last_error());
    assert_int_equal(st, CLEF_OK);
}

static const char *const NAMES[NF] = {"low", "mid", "high"};

/* Fields of one map each (split 0), masks 0, 0, 1. */
static void one_map_fields(const sky *k, clef_field *f, int nsplits)
{
    for (int i = 0; i < NF; i++) {
        clef_field_init(&f[i]);
        f[i].name = NAMES[i];
        f[i].nsplits = nsplits;
        for (int s = 0; s < nsplits; s++)
            f[i].maps[s] = k->maps[i][s];
        f[i].mask = k->mask[i == 2];
    }
}

/* Largest |x - y| over n values relative to the largest |y|. */
static double rel_diff(const double *x, const double *y, size_t n)
{
    double d = 0, s = 0;
    for (size_t i = 0; i < n; i++) {
        d = fmax(d, fabs(x[i] - y[i]));
        s = fmax(s, fabs(y[i]));
    }
    return s > 0 ? d / s : d;
}

/* Pair result r against the one-pair run of clef_spectrum_compute on map a
 * (and b, NULL for an auto-spectrum) with masks ka (and kb): band powers,
 * covariance and windows within `tol` relative; returns the largest
 * relative difference. */
static double vs_one_pair(const clef_spectrum_result *r, const clef_map *a, const clef_map *b,
                          const clef_map *ka, const clef_map *kb, const clef_spectrum_opts *o,
                          double tol)
{
    clef_spectrum_result one;
    assert_int_equal(clef_spectrum_compute(a, b, ka, b ? kb : NULL, o, &one), CLEF_OK);
    assert_int_equal(one.nbins, r->nbins);
    assert_int_equal(one.lmax_ext, r->lmax_ext);
    const int nb = r->nbins;
    const double d1 = rel_diff(r->bp->dl, one.bp->dl, nb);
    const double d2 = rel_diff(r->bp->cov, one.bp->cov, (size_t)nb * nb);
    const double d3 = rel_diff(r->bp->win, one.bp->win, (size_t)nb * (r->lmax_ext + 1));
    clef_spectrum_result_free(&one);
    if (!(d1 < tol && d2 < tol && d3 < tol))
        fail_msg("relative differences to the one-pair run: D %.3g, cov %.3g, windows %.3g "
                 "(tolerance %g)", d1, d2, d3, tol);
    return fmax(d1, fmax(d2, d3));
}

/* One run of 3 fields (6 pairs, two masks) against the 6 one-pair runs of
 * clef_spectrum_compute: band powers, covariance and windows to 1e-10
 * (the same code on the same numbers: only the order of the transforms
 * differs); each map is analysed once; the joint covariance's diagonal
 * blocks are the tables' covariances. */
static void test_equals_one_pair_runs(void **state)
{
    (void)state;
    sky k;
    sky_init(&k, 32);
    sky_draw(&k, 5, 20.0);
    clef_spectrum_opts o;
    base_opts(&o);
    clef_field f[NF];
    one_map_fields(&k, f, 1);
    clef_estimator *e = NULL;
    assert_int_equal(clef_estimator_create(&e, &o, 1), CLEF_OK);
    for (int i = 0; i < NF; i++)
        assert_int_equal(clef_estimator_add_field(e, &f[i]), CLEF_OK);
    compute_ok(e);
    assert_int_equal(clef_estimator_npairs(e), NF * (NF + 1) / 2);
    int nmap = 0, nmask = 0;
    clef_estimator_transforms(e, &nmap, &nmask);
    assert_int_equal(nmap, NF);  /* each map once */
    assert_int_equal(nmask, 5);  /* w_0, w_1, w_0^2, w_0 w_1, w_1^2 */
    int n = 0;
    const double *jc = clef_estimator_covariance(e, &n);
    const int nb = clef_estimator_result(e, 0)->nbins;
    assert_int_equal(n, nb * NF * (NF + 1) / 2);
    double worst = 0;
    for (int kp = 0; kp < clef_estimator_npairs(e); kp++) {
        int a, b;
        clef_estimator_pair_fields(e, kp, &a, &b);
        const clef_spectrum_result *r = clef_estimator_result(e, kp);
        /* issue 12: 1e-10 */
        worst = fmax(worst, vs_one_pair(r, k.maps[a][0], a == b ? NULL : k.maps[b][0],
                                        k.mask[a == 2], k.mask[b == 2], &o, 1e-10));
        for (int i = 0; i < nb; i++)
            for (int j = 0; j < nb; j++)
                check_rel(jc[(size_t)(kp * nb + i) * n + kp * nb + j],
                          r->bp->cov[(size_t)i * nb + j], 1e-12, "joint block = table");
    }
    print_message("N-field run vs one-pair runs: worst relative difference %.2g\n", worst);
    clef_estimator_destroy(e);
    sky_free(&k);
}

/* Field with 2 splits: its auto pair is the cross-spectrum of the splits
 * (the mean of k(k-1)/2 = 1 cross), and the split maps are transformed
 * once each. */
/* Six one-map fields with the two masks in turn (0, 1, 0, 1, 0, 1) and one
 * filter: 21 pairs, but the mask pairs (0, 0), (0, 1) = (1, 0), (1, 1) and
 * so 3 couplings, 3 binned operators and 3 sets of windows.  Each pair's
 * band powers, covariance and windows equal its own one-pair run (which
 * computes all of them afresh, with the masks in the pair's order) to
 * 1e-12: the sharing changes no number beyond round-off. */
static void test_shared_mask_pairs(void **state)
{
    (void)state;
    sky k;
    sky_init(&k, 32);
    sky_draw(&k, 9, 20.0);
    clef_spectrum_opts o;
    base_opts(&o);
    static const char *const names[6] = {"f0", "f1", "f2", "f3", "f4", "f5"};
    const clef_map *map[6], *mask[6];
    clef_estimator *e = NULL;
    assert_int_equal(clef_estimator_create(&e, &o, 0), CLEF_OK);
    for (int i = 0; i < 6; i++) {
        clef_field f;
        clef_field_init(&f);
        f.name = names[i];
        map[i] = f.maps[0] = k.maps[i / 2][i % 2];
        mask[i] = f.mask = k.mask[i % 2];
        assert_int_equal(clef_estimator_add_field(e, &f), CLEF_OK);
    }
    compute_ok(e);
    assert_int_equal(clef_estimator_npairs(e), 21);
    int nmp = 0, nop = 0;
    clef_estimator_shared(e, &nmp, &nop);
    assert_int_equal(nmp, 3);
    assert_int_equal(nop, 3);
    const int nb = clef_estimator_result(e, 0)->nbins;
    double worst = 0;
    for (int kp = 0; kp < 21; kp++) {
        int a, b;
        clef_estimator_pair_fields(e, kp, &a, &b);
        const clef_spectrum_result *r = clef_estimator_result(e, kp);
        assert_int_equal(r->nbins, nb);
        worst = fmax(worst, vs_one_pair(r, map[a], a == b ? NULL : map[b], mask[a], mask[b], &o,
                                        1e-12));
    }
    print_message("shared operators vs one-pair runs: worst relative difference %.2g\n", worst);
    clef_estimator_destroy(e);
    sky_free(&k);
}

/* Maps read on demand (clef_field.load_map): the loader hands out copies
 * of the test's maps and counts how many it has out at once. */
typedef struct loader_state {
    const clef_map *const *src; /* src[field * NS + split] */
    int live, max_live, loads, fail_at;
} loader_state;

typedef struct loader_arg {
    loader_state *st;
    int field;
} loader_arg;

static int test_load(void *arg, int split, clef_map **out)
{
    loader_arg *a = arg;
    loader_state *st = a->st;
    if (st->loads++ == st->fail_at) {
        /* A failing reader: its own status and message (clef_map_read's). */
        return clef_map_read(out, "/nonexistent/split.fits", NULL);
    }
    const int status = clef_map_copy(out, st->src[a->field * NS + split]);
    if (status == CLEF_OK && ++st->live > st->max_live)
        st->max_live = st->live;
    return status;
}

static void test_release(void *arg, int split, clef_map *m)
{
    (void)split;
    loader_arg *a = arg;
    a->st->live--;
    clef_map_free(m);
}

/* The same run with maps[] in memory and with every map read on demand
 * gives the same bits (the same arithmetic in the same order); the
 * estimator holds one map read at a time and reads a one-map field once,
 * a field of k splits 2k - 1 times; each map is still transformed once. */
static void test_maps_on_demand(void **state)
{
    (void)state;
    sky k;
    sky_init(&k, 32);
    sky_draw(&k, 11, 20.0);
    clef_spectrum_opts o;
    base_opts(&o);
    const clef_map *src[NF * NS];
    for (int f = 0; f < NF; f++)
        for (int sp = 0; sp < NS; sp++)
            src[f * NS + sp] = k.maps[f][sp];
    for (int nsplits = 1; nsplits <= NS; nsplits++) {
        clef_field f[NF], g[NF];
        one_map_fields(&k, f, nsplits);
        loader_state st = {.src = src, .fail_at = -1};
        loader_arg la[NF];
        clef_estimator *e1 = NULL, *e2 = NULL;
        assert_int_equal(clef_estimator_create(&e1, &o, 1), CLEF_OK);
        assert_int_equal(clef_estimator_create(&e2, &o, 1), CLEF_OK);
        for (int i = 0; i < NF; i++) {
            g[i] = f[i];
            for (int sp = 0; sp < NS; sp++)
                g[i].maps[sp] = NULL;
            la[i].st = &st;
            la[i].field = i;
            g[i].load_map = test_load;
            g[i].release_map = test_release;
            g[i].load_arg = &la[i];
            assert_int_equal(clef_estimator_add_field(e1, &f[i]), CLEF_OK);
            assert_int_equal(clef_estimator_add_field(e2, &g[i]), CLEF_OK);
        }
        compute_ok(e1);
        compute_ok(e2);
        assert_int_equal(st.max_live, 1);
        assert_int_equal(st.live, 0);
        assert_int_equal(st.loads, NF * (2 * nsplits - 1));
        int nmap = 0;
        clef_estimator_transforms(e2, &nmap, NULL);
        assert_int_equal(nmap, NF * nsplits);
        for (int kp = 0; kp < clef_estimator_npairs(e1); kp++) {
            const clef_spectrum_result *r1 = clef_estimator_result(e1, kp);
            const clef_spectrum_result *r2 = clef_estimator_result(e2, kp);
            const int nb = r1->nbins;
            assert_int_equal(r2->nbins, nb);
            assert_memory_equal(r1->bp->dl, r2->bp->dl, nb * sizeof(double));
            assert_memory_equal(r1->bp->cov, r2->bp->cov, (size_t)nb * nb * sizeof(double));
            assert_memory_equal(r1->bp->win, r2->bp->win,
                                (size_t)nb * (r1->lmax_ext + 1) * sizeof(double));
        }
        int n1 = 0, n2 = 0;
        const double *c1 = clef_estimator_covariance(e1, &n1);
        const double *c2 = clef_estimator_covariance(e2, &n2);
        assert_int_equal(n1, n2);
        assert_memory_equal(c1, c2, (size_t)n1 * n1 * sizeof(double));
        clef_estimator_destroy(e1);
        clef_estimator_destroy(e2);

        /* A reader failing on the second field's map: its status and
         * message, nothing left out. */
        st.live = st.max_live = st.loads = 0;
        st.fail_at = 2 * nsplits - 1;
        assert_int_equal(clef_estimator_create(&e2, &o, 0), CLEF_OK);
        for (int i = 0; i < NF; i++)
            assert_int_equal(clef_estimator_add_field(e2, &g[i]), CLEF_OK);
        assert_int_equal(clef_estimator_compute(e2), CLEF_EIO);
        assert_non_null(strstr(clef_last_error(), "/nonexistent/split.fits"));
        assert_int_equal(st.live, 0);
        clef_estimator_destroy(e2);
    }
    /* maps[] and a loader at once are refused; a map read on demand on
     * another grid than its mask is refused when it is read. */
    clef_field h;
    clef_field_init(&h);
    h.name = "both";
    h.maps[0] = k.maps[0][0];
    h.mask = k.mask[0];
    h.load_map = test_load;
    clef_estimator *e = NULL;
    assert_int_equal(clef_estimator_create(&e, &o, 0), CLEF_OK);
    assert_int_equal(clef_estimator_add_field(e, &h), CLEF_EINVAL);
    clef_map *small = NULL;
    assert_int_equal(clef_map_alloc(&small, 16), CLEF_OK);
    const clef_map *ssrc[NF * NS] = {small, small};
    loader_state st = {.src = ssrc, .fail_at = -1};
    loader_arg la = {&st, 0};
    h.maps[0] = NULL;
    h.name = "small";
    h.load_arg = &la;
    h.release_map = test_release;
    assert_int_equal(clef_estimator_add_field(e, &h), CLEF_OK);
    assert_int_equal(clef_estimator_compute(e), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "nside 16"));
    assert_int_equal(st.live, 0);
    clef_estimator_destroy(e);
    clef_map_free(small);
    sky_free(&k);
}

static void test_split_cross(void **state)
{
    (void)state;
    sky k;
    sky_init(&k, 32);
    sky_draw(&k, 9, 30.0);
    clef_spectrum_opts o;
    base_opts(&o);
    clef_field f[NF];
    one_map_fields(&k, f, 2);
    clef_estimator *e = NULL;
    assert_int_equal(clef_estimator_create(&e, &o, 1), CLEF_OK);
    for (int i = 0; i < NF; i++)
        assert_int_equal(clef_estimator_add_field(e, &f[i]), CLEF_OK);
    assert_int_equal(clef_estimator_add_pair(e, "low", "low"), CLEF_OK);
    assert_int_equal(clef_estimator_add_pair(e, "low", "high"), CLEF_OK);
    compute_ok(e);
    int nmap = 0;
    clef_estimator_transforms(e, &nmap, NULL);
    assert_int_equal(nmap, NF * 2);
    const clef_spectrum_result *r = clef_estimator_result(e, 0);
    clef_spectrum_result one;
    assert_int_equal(clef_spectrum_compute(k.maps[0][0], k.maps[0][1], k.mask[0], NULL, &o, &one),
                     CLEF_OK);
    const int nb = r->nbins;
    assert_true(rel_diff(r->bp->dl, one.bp->dl, nb) < 1e-10);
    clef_spectrum_result_free(&one);
    /* low x high: the mean of the 4 split crosses, by linearity of the
     * decoupling the mean of the 4 one-pair cross-spectra. */
    double *mean = calloc(nb, sizeof *mean);
    for (int i = 0; i < 2; i++)
        for (int j = 0; j < 2; j++) {
            assert_int_equal(clef_spectrum_compute(k.maps[0][i], k.maps[2][j], k.mask[0],
                                                   k.mask[1], &o, &one),
                             CLEF_OK);
            for (int b = 0; b < nb; b++)
                mean[b] += one.bp->dl[b] / 4;
            clef_spectrum_result_free(&one);
        }
    assert_true(rel_diff(clef_estimator_result(e, 1)->bp->dl, mean, nb) < 1e-10);
    free(mean);
    clef_estimator_destroy(e);
    sky_free(&k);
}

/* The cross-pair kernels of the joint covariance (W[w_0^2, w_0 w_1] and
 * W[w_0 w_1, w_1^2] here, none of the mask pairs' own spectra) in the cache
 * folder: a rerun with the same weights makes no mask transform at all and
 * gives the same joint covariance bit for bit; the first run made them
 * (5 transforms: w_0, w_1 and the three products). */
static void test_kernel_cache(void **state)
{
    (void)state;
    sky k;
    sky_init(&k, 32);
    sky_draw(&k, 21, 20.0);
    char dir[] = "/tmp/clef-test-kernels-XXXXXX";
    assert_non_null(mkdtemp(dir));
    clef_spectrum_opts o;
    base_opts(&o);
    o.use_cache = 1;
    o.cache_dir = dir;
    clef_field f[NF];
    one_map_fields(&k, f, 1);
    double *cov[2] = {NULL, NULL};
    int n[2] = {0, 0}, nmask[2] = {-1, -1};
    for (int run = 0; run < 2; run++) {
        clef_estimator *e = NULL;
        assert_int_equal(clef_estimator_create(&e, &o, 1), CLEF_OK);
        for (int i = 0; i < NF; i++)
            assert_int_equal(clef_estimator_add_field(e, &f[i]), CLEF_OK);
        compute_ok(e);
        clef_estimator_transforms(e, NULL, &nmask[run]);
        const double *c = clef_estimator_covariance(e, &n[run]);
        cov[run] = malloc((size_t)n[run] * n[run] * sizeof *cov[run]);
        memcpy(cov[run], c, (size_t)n[run] * n[run] * sizeof *cov[run]);
        clef_estimator_destroy(e);
    }
    assert_int_equal(nmask[0], 5);
    assert_int_equal(nmask[1], 0);
    assert_int_equal(n[0], n[1]);
    assert_memory_equal(cov[0], cov[1], (size_t)n[0] * n[0] * sizeof *cov[0]);
    free(cov[0]);
    free(cov[1]);
    char cmd[128];
    snprintf(cmd, sizeof cmd, "rm -rf %s", dir);
    assert_int_equal(system(cmd), 0);
    sky_free(&k);
}

static void test_bad_fields(void **state)
{
    (void)state;
    sky k;
    sky_init(&k, 16);
    clef_spectrum_opts o;
    base_opts(&o);
    clef_field f[NF];
    one_map_fields(&k, f, 1);
    clef_estimator *e = NULL;
    assert_int_equal(clef_estimator_create(&e, &o, 0), CLEF_OK);
    assert_int_equal(clef_estimator_add_field(e, &f[0]), CLEF_OK);
    assert_int_equal(clef_estimator_add_field(e, &f[0]), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "'low' is used twice"));
    clef_field g = f[1];
    g.mask = NULL;
    assert_int_equal(clef_estimator_add_field(e, &g), CLEF_EINVAL);
    g = f[1];
    g.nsplits = 2;
    g.maps[1] = NULL;
    assert_int_equal(clef_estimator_add_field(e, &g), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "map 2 is missing"));
    g = f[1];
    g.spin = 2;
    assert_int_equal(clef_estimator_add_field(e, &g), CLEF_EUNSUP);
    assert_int_equal(clef_estimator_add_pair(e, "low", "nowhere"), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "'nowhere'"));
    /* nside mismatch between fields */
    clef_map *big = NULL;
    assert_int_equal(clef_map_alloc(&big, 32), CLEF_OK);
    clef_map *bigmask = cut_mask(32, 15, 12, 0);
    g = f[1];
    g.maps[0] = big;
    g.mask = bigmask;
    assert_int_equal(clef_estimator_add_field(e, &g), CLEF_OK);
    assert_int_equal(clef_estimator_compute(e), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "nside"));
    clef_estimator_destroy(e);
    clef_map_free(big);
    clef_map_free(bigmask);
    sky_free(&k);
}

/* Ensemble: 3 fields x 2 splits, masks 0, 0, 1, white noise per split.
 * Every pair's band powers are unbiased (mean within 3 standard errors of
 * the input through the band-power windows) and the quoted joint
 * covariance matches the ensemble: per pair block the mean ratio of the
 * diagonal within 15% (issue 12) plus its sampling error, and the
 * correlation between the same bin of two pairs, averaged over bins,
 * within 0.1 plus its sampling error. */
static void test_ensemble(void **state)
{
    (void)state;
    /* nside 32 with 12-wide bins quotes variances 35% above the scatter at
     * l < 40 (the narrow-kernel approximation on bins narrower than the
     * mask's coupling); nside 64 came within 22%, nside 128 within 20%. */
    const int64_t nside = test_long() ? 128 : 64;
    /* CLEF_FIELDS_SKIES=N, CLEF_FIELDS_SEED=S: a larger ensemble or other
     * seeds (skies S, S+1, ...; default 1000) for a closer look. */
    const int nsim = getenv("CLEF_FIELDS_SKIES") ? atoi(getenv("CLEF_FIELDS_SKIES"))
                     : test_long()               ? 50
                     : (test_sanitize() ? 6 : 30);
    const int seed0 = getenv("CLEF_FIELDS_SEED") ? atoi(getenv("CLEF_FIELDS_SEED")) : 1000;
    assert_true(nsim >= 4);
    sky k;
    sky_init(&k, nside);
    clef_spectrum_opts o;
    base_opts(&o);
    o.bin_width = test_long() ? 24 : 16;
    o.use_cache = 1; /* fixed masks: the deprojection and couplings once (tests/run.sh: a private folder) */
    clef_field f[NF];
    one_map_fields(&k, f, 2);
    const int np = NF * (NF + 1) / 2;
    int nb = 0, n = 0, lext = 0;
    double *sum = NULL, *sum2 = NULL, *qcov = NULL, *expect = NULL;
    for (int it = 0; it < nsim; it++) {
        sky_draw(&k, seed0 + it, 25.0);
        clef_estimator *e = NULL;
        assert_int_equal(clef_estimator_create(&e, &o, 1), CLEF_OK);
        for (int i = 0; i < NF; i++)
            assert_int_equal(clef_estimator_add_field(e, &f[i]), CLEF_OK);
        compute_ok(e);
        if (it == 0)
            for (int st = 0; st < clef_estimator_result(e, 0)->nstages; st++)
                print_message("stage %s %.3f s\n", clef_estimator_result(e, 0)->stage[st].name,
                              clef_estimator_result(e, 0)->stage[st].seconds);
        const double *c = clef_estimator_covariance(e, &n);
        if (!sum) {
            nb = clef_estimator_result(e, 0)->nbins;
            lext = clef_estimator_result(e, 0)->lmax_ext;
            sum = calloc(n, sizeof *sum);
            sum2 = calloc((size_t)n * n, sizeof *sum2);
            qcov = calloc((size_t)n * n, sizeof *qcov);
            expect = calloc(n, sizeof *expect);
            /* Expected D_b = sum_l W_bl D_l of the pair's signal (noise-free). */
            for (int kp = 0; kp < np; kp++) {
                int a, b;
                clef_estimator_pair_fields(e, kp, &a, &b);
                const clef_spectrum_result *r = clef_estimator_result(e, kp);
                for (int bb = 0; bb < nb; bb++) {
                    double s = 0;
                    for (int l = 2; l <= lext; l++) {
                        const double cl = k.cs[l] + (a == 2 && b == 2 ? k.ct[l] : 0);
                        s += r->bp->win[(size_t)bb * (lext + 1) + l] * cl * l * (l + 1) /
                             (2 * M_PI);
                    }
                    expect[kp * nb + bb] = s;
                }
            }
        }
        double *d = malloc(n * sizeof *d);
        for (int kp = 0; kp < np; kp++)
            memcpy(d + kp * nb, clef_estimator_result(e, kp)->bp->dl, nb * sizeof *d);
        for (int i = 0; i < n; i++) {
            sum[i] += d[i];
            for (int j = 0; j < n; j++) {
                sum2[(size_t)i * n + j] += d[i] * d[j];
                qcov[(size_t)i * n + j] += c[(size_t)i * n + j] / nsim;
            }
        }
        free(d);
        clef_estimator_destroy(e);
    }
    double *cov = malloc((size_t)n * n * sizeof *cov);
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            cov[(size_t)i * n + j] = (sum2[(size_t)i * n + j] - sum[i] * sum[j] / nsim) / (nsim - 1);
    int bad_bias = 0;
    for (int i = 0; i < n; i++) {
        const double se = sqrt(cov[(size_t)i * n + i] / nsim);
        const double z = (sum[i] / nsim - expect[i]) / se;
        if (fabs(z) > 3)
            bad_bias++;
        print_message("pair %d bin %d: mean %.2f expected %.2f (%.1f s.e.), sigma ens %.2f "
                      "quoted %.2f\n", i / nb, i % nb, sum[i] / nsim, expect[i], z,
                      sqrt(cov[(size_t)i * n + i]), sqrt(qcov[(size_t)i * n + i]));
    }
    /* 3 s.e. for each of n values: at most one outlier in n ~ 20-60 by chance. */
    if (!test_sanitize())
        assert_true(bad_bias <= 1);
    const double tol_var = 0.15 + 2 * sqrt(2.0 / (nsim * nb)); /* sampling error of the mean ratio */
    /* 1 / s^2 of a sample variance with nu = nsim - 1 degrees of freedom has
     * the mean nu / ((nu - 2) sigma^2) (inverse chi-square; common
     * practice): the mean of quoted / sample variance is that much above
     * quoted / true variance (4.3% for 50 skies), so it is taken out. */
    const double inv_bias = (nsim - 3.0) / (nsim - 1.0);
    const double tol_rho = 0.10 + 2 / sqrt((double)nsim * nb);
    for (int p = 0; p < np; p++) {
        double ratio = 0;
        for (int b = 0; b < nb; b++) {
            const size_t ii = (size_t)(p * nb + b) * n + p * nb + b;
            ratio += inv_bias * qcov[ii] / cov[ii] / nb;
        }
        print_message("pair %d: quoted / ensemble variance %.3f (tolerance %.3f)\n", p, ratio,
                      tol_var);
        if (!test_sanitize())
            assert_true(fabs(ratio - 1) < tol_var);
        for (int q = p + 1; q < np; q++) {
            double re = 0, rq = 0;
            for (int b = 0; b < nb; b++) {
                const int i = p * nb + b, j = q * nb + b;
                re += cov[(size_t)i * n + j] / sqrt(cov[(size_t)i * n + i] * cov[(size_t)j * n + j]) / nb;
                rq += qcov[(size_t)i * n + j] /
                      sqrt(qcov[(size_t)i * n + i] * qcov[(size_t)j * n + j]) / nb;
            }
            print_message("pairs %d, %d: correlation ensemble %.3f quoted %.3f\n", p, q, re, rq);
            if (!test_sanitize())
                assert_true(fabs(re - rq) < tol_rho);
        }
    }
    free(sum);
    free(sum2);
    free(qcov);
    free(cov);
    free(expect);
    sky_free(&k);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_bad_fields),
        cmocka_unit_test(test_equals_one_pair_runs),
        cmocka_unit_test(test_shared_mask_pairs),
        cmocka_unit_test(test_maps_on_demand),
        cmocka_unit_test(test_split_cross),
        cmocka_unit_test(test_kernel_cache),
        cmocka_unit_test(test_ensemble),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
