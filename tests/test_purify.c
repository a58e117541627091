/* Tests of B-mode purification (include/clef/purify.h, src/purify.c,
 * src/coupling_pure.c, clef_spectrum_pol_compute with opts.pure_b).
 *
 * - The pure kernel's odd-J part vanishes (the estimator's purity for a
 *   smooth window, Smith 2006, PRD 74, 083002, section III), with 3j rows
 *   of clef_wigner_3j_row (themselves tested against GSL).
 * - The pure coupling matrix against brute force: for every input mode
 *   (l', m') of a band-limited sky and a band-limited window, the pure-B
 *   pseudo-spectrum computed by the transforms; its mean over the modes of
 *   one l' is M_ll' exactly (to the quadrature's precision), and E modes
 *   give no pure B.
 * - The smoothness check: a hard-edged patch is refused, a tapered one
 *   accepted.
 * - The issue 16 check: pure-E skies on a small tapered patch (3% of the
 *   sky): the pure BB scatter at least 10x below the standard one above 3
 *   times the patch's inverse size, and an E + B sky unbiased through the
 *   windows.  Skies from GSL mt19937 with fixed seeds; spectra chosen here. */
#include "check.h"

#include <unistd.h>

#include <complex.h>

#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>

#include "clef/bins.h"
#include "clef/coupling.h"
#include "clef/mask.h"
#include "clef/purify.h"
#include "clef/sht.h"
#include "clef/spectrum.h"
#include "clef/wigner.h"

static double row_at(const double *r, int lo, int hi, int j) { return j < lo || j > hi ? 0 : r[j - lo]; }

/* G_ll'L of src/coupling_pure.c, from three 3j rows. */
static void test_kernel_identity(void **state)
{
    (void)state;
    double worst = 0.0, even = 0.0;
    double *g[3];
    for (int k = 0; k < 3; k++)
        g[k] = malloc(200 * sizeof(double));
    for (int l = 2; l <= 40; l += 3)
        for (int lp = 2; lp <= 45; lp += 4) {
            int lo[3], hi[3];
            for (int k = 0; k < 3; k++)
                clef_wigner_3j_row(l, lp, 2 - k, -2, g[k], &lo[k], &hi[k]);
            for (int L = 0; L <= l + lp; L++) {
                const double dL = L, q = (l - 1.0) * (l + 2.0), n2 = q * l * (l + 1.0);
                const double a = row_at(g[0], lo[0], hi[0], L);
                const double b = 2.0 * sqrt(dL * (dL + 1.0) / q) * row_at(g[1], lo[1], hi[1], L);
                const double c = L >= 2 ? sqrt((dL - 1) * dL * (dL + 1) * (dL + 2) / n2) *
                                              row_at(g[2], lo[2], hi[2], L)
                                        : 0.0;
                const double G = a + b + c, scale = fabs(a) + fabs(b) + fabs(c);
                if ((l + lp + L) & 1)
                    worst = fmax(worst, scale > 0 ? fabs(G) / scale : 0.0);
                else
                    even = fmax(even, fabs(G));
            }
        }
    for (int k = 0; k < 3; k++)
        free(g[k]);
    printf("pure kernel: max |G| / (|terms|) over odd J %.3g (even J max |G| %.3g)\n", worst,
           even);
    check_abs(worst, 0.0, 1e-12, "purity: G_ll'L = 0 for odd l + l' + L (Smith 2006)");
    assert_true(even > 0.1); /* the even-J kernel is not trivially zero */
}

/* A smooth, band-limited positive window: 0.55 + sum of a few low-l terms. */
static double *smooth_window(int64_t ns, int lw, double *wl)
{
    const int64_t np = 12 * ns * ns;
    double complex *a = calloc(clef_alm_size(lw, lw), sizeof *a);
    a[clef_alm_index(lw, 0, 0)] = 0.55 * sqrt(4 * M_PI);
    a[clef_alm_index(lw, 1, 0)] = 0.25;
    a[clef_alm_index(lw, 2, 1)] = 0.12 - 0.08 * I;
    a[clef_alm_index(lw, 3, 3)] = 0.07 + 0.05 * I;
    a[clef_alm_index(lw, lw, 2)] = 0.05;
    double *w = malloc(np * sizeof *w);
    clef_sht *p;
    assert_int_equal(clef_sht_create(&p, ns, lw, NULL), CLEF_OK);
    assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&a, &w), CLEF_OK);
    for (int64_t i = 0; i < np; i++)
        assert_true(w[i] > 0);
    clef_sht_destroy(p);
    assert_int_equal(clef_alm_cl(lw, lw, a, NULL, wl), CLEF_OK);
    free(a);
    return w;
}

static void test_coupling_bruteforce(void **state)
{
    (void)state;
    const int64_t ns = 16, np = 12 * ns * ns;
    const int lw = 4, lb = 12, L = 2 * (int)ns;
    double *wl = calloc(2 * L + 1, sizeof *wl); /* W_L from the window's exact a_lm */
    double *w = smooth_window(ns, lw, wl);
    clef_purify *pl;
    const int st = clef_purify_create(&pl, w, ns, L, L, 6, "test window");
    if (st)
        printf("%s\n", clef_last_error());
    assert_int_equal(st, CLEF_OK);
    printf("smooth window: tail share %.3g\n", clef_purify_tail(pl));
    clef_sht_spin *s2;
    assert_int_equal(clef_sht_spin_create(&s2, ns, L, NULL), CLEF_OK);
    clef_coupling *mp;
    assert_int_equal(clef_coupling_pure_create(&mp, L, wl, 2 * L), CLEF_OK);
    const double *m = clef_coupling_matrix(mp);
    const size_t na = clef_alm_size(L, L);
    double complex *ae = calloc(na, sizeof *ae), *ab = calloc(na, sizeof *ab);
    double complex *oe = malloc(na * sizeof *oe), *ob = malloc(na * sizeof *ob);
    double *q = malloc(np * sizeof *q), *u = malloc(np * sizeof *u);
    double *wq = malloc(np * sizeof *wq), *wu = malloc(np * sizeof *wu);
    double *cl = malloc((L + 1) * sizeof *cl), *acc = malloc((L + 1) * sizeof *acc);
    double worst_b = 0.0, worst_e = 0.0;
    for (int eb = 0; eb < 2; eb++)
        for (int lp = 2; lp <= lb; lp++) {
            memset(acc, 0, (L + 1) * sizeof *acc);
            for (int mp_ = 0; mp_ <= lp; mp_++)
                for (int ri = 0; ri < (mp_ ? 2 : 1); ri++) {
                    memset(ae, 0, na * sizeof *ae);
                    memset(ab, 0, na * sizeof *ab);
                    (eb ? ab : ae)[clef_alm_index(L, lp, mp_)] = ri ? I : 1.0;
                    assert_int_equal(clef_sht_spin_synthesis(s2, 1, (const double complex *const *)&ae,
                                                             (const double complex *const *)&ab,
                                                             &q, &u),
                                     CLEF_OK);
                    for (int64_t i = 0; i < np; i++) {
                        wq[i] = w[i] * q[i];
                        wu[i] = w[i] * u[i];
                    }
                    assert_int_equal(clef_sht_spin_analysis(s2, 1, (const double *const *)&wq,
                                                            (const double *const *)&wu, &oe, &ob,
                                                            6),
                                     CLEF_OK);
                    assert_int_equal(clef_purify_b(pl, q, u, ob, ob), CLEF_OK);
                    assert_int_equal(clef_alm_cl(L, L, ob, NULL, cl), CLEF_OK);
                    /* <|a|^2> = 1: Re and Im parts of m' > 0 each carry 1/2. */
                    for (int l = 0; l <= L; l++)
                        acc[l] += (mp_ ? 0.5 : 1.0) * cl[l];
                }
            for (int l = 2; l <= lb + lw - 2 && l <= L; l++) {
                const double want = eb ? m[(size_t)l * (L + 1) + lp] : 0.0;
                const double scale = m[(size_t)lp * (L + 1) + lp];
                const double d = fabs(acc[l] - want) / scale;
                if (eb)
                    worst_b = fmax(worst_b, d);
                else
                    worst_e = fmax(worst_e, d);
            }
        }
    printf("pure coupling vs brute force (nside %lld, l' <= %d): max |mean C~ - M_ll'| / M_l'l' "
           "B %.3g, E -> B %.3g\n", (long long)ns, lb, worst_b, worst_e);
    check_abs(worst_b, 0.0, 1e-9, "brute-force pure-B pseudo-spectrum of every B mode");
    check_abs(worst_e, 0.0, 1e-12, "no pure B from any E mode (band-limited window)");
    clef_coupling_destroy(mp);
    clef_purify_destroy(pl);
    clef_sht_spin_destroy(s2);
    free(w); free(wl); free(ae); free(ab); free(oe); free(ob);
    free(q); free(u); free(wq); free(wu); free(cl); free(acc);
}

/* ---- small patch: the check ---- */
#define NS 64
static double c_tt(int l) { return 2000.0 / ((l + 5.0) * (l + 5.0)); }
static double c_ee(int l) { return 40.0 / ((l + 8.0) * (l + 8.0)); }

static clef_map *map_of(const double *v)
{
    clef_map *m;
    assert_int_equal(clef_map_alloc(&m, NS), CLEF_OK);
    memcpy(m->pix, v, (size_t)m->npix * sizeof(double));
    snprintf(m->unit, sizeof m->unit, "uK");
    return m;
}

/* T, Q, U of a sky with TT, EE and BB = bb_frac EE (no TE), to lband. */
static void draw(clef_map_pol *f, int lband, unsigned long seed, double bb_frac)
{
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, seed);
    const size_t na = clef_alm_size(lband, lband);
    double complex *t = calloc(na, sizeof *t), *e = calloc(na, sizeof *e), *b = calloc(na, sizeof *b);
    for (int m = 0; m <= lband; m++)
        for (int l = m > 2 ? m : 2; l <= lband; l++) {
            const double sd = m ? sqrt(0.5) : 1.0;
            double complex g[3];
            for (int k = 0; k < 3; k++)
                g[k] = gsl_ran_gaussian(r, sd) + (m ? I * gsl_ran_gaussian(r, sd) : 0.0);
            const size_t i = clef_alm_index(lband, l, m);
            t[i] = sqrt(c_tt(l)) * g[0];
            e[i] = sqrt(c_ee(l)) * g[1];
            b[i] = sqrt(bb_frac * c_ee(l)) * g[2];
        }
    gsl_rng_free(r);
    const int64_t np = 12 * NS * NS;
    double *mt = malloc(np * sizeof *mt), *mq = malloc(np * sizeof *mq), *mu = malloc(np * sizeof *mu);
    clef_sht *p0;
    clef_sht_spin *p2;
    assert_int_equal(clef_sht_create(&p0, NS, lband, NULL), CLEF_OK);
    assert_int_equal(clef_sht_spin_create(&p2, NS, lband, NULL), CLEF_OK);
    assert_int_equal(clef_sht_synthesis(p0, 1, (const double complex *const *)&t, &mt), CLEF_OK);
    assert_int_equal(clef_sht_spin_synthesis(p2, 1, (const double complex *const *)&e,
                                             (const double complex *const *)&b, &mq, &mu),
                     CLEF_OK);
    clef_sht_destroy(p0);
    clef_sht_spin_destroy(p2);
    memset(f, 0, sizeof *f);
    f->t = map_of(mt);
    f->q = map_of(mq);
    f->u = map_of(mu);
    free(t); free(e); free(b); free(mt); free(mq); free(mu);
}

/* A disc patch of radius R (deg) at (lon, lat) = (40, -50) deg, C2 taper. */
static clef_map *patch(double radius_deg, double taper_deg)
{
    clef_map *bin, *m;
    assert_int_equal(clef_mask_full(&bin, NS), CLEF_OK);
    assert_int_equal(clef_mask_keep_disc(bin, 40.0 * M_PI / 180, -50.0 * M_PI / 180,
                                         radius_deg * M_PI / 180),
                     CLEF_OK);
    if (taper_deg <= 0)
        return bin;
    clef_mask_apod_opts ao = {.kind = CLEF_MASK_APOD_C2, .scale = taper_deg * M_PI / 180};
    assert_int_equal(clef_mask_apodize(&m, bin, &ao), CLEF_OK);
    clef_map_free(bin);
    return m;
}

static void test_smoothness_check(void **state)
{
    (void)state;
    clef_map *hard = patch(20.0, 0.0), *soft = patch(20.0, 8.0);
    clef_purify *pl = NULL;
    assert_int_equal(clef_purify_create(&pl, hard->pix, NS, 2 * NS, 2 * NS, 3, "hard patch"),
                     CLEF_EINVAL);
    printf("hard-edged patch: %s\n", clef_last_error());
    assert_non_null(strstr(clef_last_error(), "hard patch"));
    assert_null(pl);
    assert_int_equal(clef_purify_create(&pl, soft->pix, NS, 2 * NS, 2 * NS, 3, "soft patch"),
                     CLEF_OK);
    printf("C2 8-degree taper: tail share %.3g\n", clef_purify_tail(pl));
    assert_true(clef_purify_tail(pl) < CLEF_PURIFY_TAIL_WARN);
    clef_purify_destroy(pl);
    /* A Gaussian-smoothed patch cut back to its hard edge is refused too. */
    clef_map *bin, *g;
    assert_int_equal(clef_mask_full(&bin, NS), CLEF_OK);
    assert_int_equal(clef_mask_keep_disc(bin, 0.7, -0.87, 20.0 * M_PI / 180), CLEF_OK);
    clef_mask_apod_opts ao = {.kind = CLEF_MASK_APOD_GAUSS, .scale = 8.0 * M_PI / 180};
    assert_int_equal(clef_mask_apodize(&g, bin, &ao), CLEF_OK);
    pl = NULL;
    assert_int_equal(clef_purify_create(&pl, g->pix, NS, 2 * NS, 2 * NS, 3, "gauss"), CLEF_EINVAL);
    clef_map_free(bin);
    clef_map_free(g);
    clef_purify_destroy(pl);
    clef_map_free(hard);
    clef_map_free(soft);
}

static void test_patch_ensemble(void **state)
{
    (void)state;
    const int nsky = getenv("CLEF_PURE_SKIES") ? atoi(getenv("CLEF_PURE_SKIES"))
                     : test_long() ? 100 : (test_sanitize() ? 3 : 10);
    const int lmax = 2 * NS, lband = 3 * NS - 1, width = 16;
    const double radius = 20.0, taper = 8.0;
    clef_map *mask = patch(radius, taper);
    double fsky = 0;
    for (int64_t i = 0; i < mask->npix; i++)
        fsky += mask->pix[i] > 0;
    fsky /= (double)mask->npix;
    clef_bins *bins;
    assert_int_equal(clef_bins_create_linear(&bins, 2, width, lmax, CLEF_BINS_DL), CLEF_OK);
    const int nb = clef_bins_count(bins);
    /* 3 x the inverse size: 3 x 2 pi / (patch diameter). */
    const double lcut = 3.0 * 2.0 * M_PI / (2.0 * radius * M_PI / 180);
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.lmax = lmax;
    o.bins = bins;
    /* The standard and pure runs share the mask: its couplings are cached
     * in a private folder (the pure matrix is computed each time). */
    char dir[512];
    snprintf(dir, sizeof dir, "%s/purify-cache-%d", getenv("CLEF_TEST_TMP") ? getenv("CLEF_TEST_TMP") : "/tmp", (int)getpid());
    o.use_cache = 1;
    o.cache_dir = dir;
    o.find_peak = 0;
    double s[3][16] = {{0}}, s2[3][16] = {{0}}, qe[16] = {0};
    static double expect[16];
    for (int k = 0; k < nsky; k++)
        for (int run = 0; run < 3; run++) {
            /* run 0: pure E, standard; 1: pure E, purified; 2: E + B (BB = EE / 50), purified */
            clef_map_pol f;
            draw(&f, lband, 7000 + k + (run == 2 ? 500 : 0), run == 2 ? 0.02 : 0.0);
            o.pure_b = run > 0;
            clef_spectrum_pol_result res;
            const int st = clef_spectrum_pol_compute(&f, NULL, mask, NULL, &o, NULL, 0, &res);
            if (st)
                printf("%s\n", clef_last_error());
            assert_int_equal(st, CLEF_OK);
            assert_int_equal(res.pure_b, run > 0);
            const clef_bandpowers *bb = res.bp[CLEF_POL_BB];
            if (k == 0 && run == 2)
                for (int b = 0; b < nb; b++) {
                    const double *w = bb->win + (size_t)b * (bb->win_lmax + 1);
                    double e = 0;
                    for (int l = 2; l <= bb->win_lmax && l <= lband; l++)
                        e += w[l] * l * (l + 1.0) / (2 * M_PI) * 0.02 * c_ee(l);
                    expect[b] = e;
                }
            for (int b = 0; b < nb; b++) {
                s[run][b] += bb->dl[b];
                s2[run][b] += bb->dl[b] * bb->dl[b];
                if (run == 2)
                    qe[b] += bb->dl_err[b];
            }
            clef_spectrum_pol_result_free(&res);
            clef_map_pol_free(&f);
        }
    printf("patch radius %.0f deg, C2 %.0f deg taper (f_sky %.3f), %d skies, bins of %d; "
           "l > %.1f: scatter ratio standard / pure (pure E); E + B: z of the pure BB, quoted "
           "err / scatter\n", radius, taper, fsky, nsky, width, lcut);
    for (int b = 0; b < nb; b++) {
        double sd[3], mean[3];
        for (int r = 0; r < 3; r++) {
            mean[r] = s[r][b] / nsky;
            sd[r] = sqrt(fmax(s2[r][b] / nsky - mean[r] * mean[r], 0) * nsky / (nsky - 1));
        }
        const double lc = 0.5 * (clef_bins_l_lo(bins, b) + clef_bins_l_hi(bins, b));
        const double ratio = sd[0] / sd[1], z = (mean[2] - expect[b]) / (sd[2] / sqrt(nsky));
        printf("  l %3d-%3d: standard sd %.3g, pure sd %.3g (ratio %.1f), pure-E mean %.3g (%.2f "
               "s.e.); E+B mean %.4g expected %.4g z %+.2f, err/scatter %.2f\n",
               clef_bins_l_lo(bins, b), clef_bins_l_hi(bins, b), sd[0], sd[1], ratio, mean[1],
               mean[1] / (sd[1] / sqrt(nsky)), mean[2], expect[b], z, qe[b] / nsky / sd[2]);
        if (test_sanitize() || lc < lcut)
            continue;
        assert_true(ratio >= 10.0);       /* issue 16 */
        assert_true(fabs(z) < 3.0);       /* unbiased: 3 standard errors (issue 16) */
        /* The pure-E residual (a positive quadratic form of the E sky:
         * leakage the purification leaves) stays far below the standard
         * estimator's scatter and the BB signal of the E + B sky. */
        assert_true(fabs(mean[1]) < 0.05 * sd[0] && fabs(mean[1]) < 0.05 * expect[b]);
    }
    char cmd[600];
    snprintf(cmd, sizeof cmd, "rm -rf '%s'", dir);
    assert_int_equal(system(cmd), 0);
    clef_map_free(mask);
    clef_bins_destroy(bins);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_kernel_identity),
        cmocka_unit_test(test_coupling_bruteforce),
        cmocka_unit_test(test_smoothness_check),
        cmocka_unit_test(test_patch_ensemble),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
