/* Tests of the spin 0 x 2 and 2 x 2 coupling matrices and the joint E/B
 * decoupling (include/clef/coupling.h, src/coupling_pol.c).
 *
 * Reference: the exact ensemble mean of the pseudo-spectra, computed
 * independently of the 3j sums by the transforms.  For a sky with C_L = 1
 * at one L, <C~_l> = sum over the real Gaussian degrees of freedom of the
 * a_Lm (a_L0 with variance 1; Re, Im a_Lm, m > 0, variance 1/2 each) of
 * the pseudo-spectrum of the masked unit mode: so <C~_l> = M_lL column by
 * column (Hivon et al. 2002, eq. 5, applied per mode).  Masks band-limited
 * to l = 6 and maps analysed to lmax + 6 make these sums exact up to the
 * transform error (~1e-12 here); a full-sky mask gives M+ = 1, M- = 0. */
#include "check.h"

#include <complex.h>

#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>

#include "clef/bins.h"
#include "clef/coupling.h"
#include "clef/sht.h"

#define NS 32
#define LMAX 12
#define LW 6
#define LA (LMAX + LW)

static double complex *mask_alm(unsigned long seed, double mean)
{
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, seed);
    double complex *a = calloc(clef_alm_size(LA, LA), sizeof *a);
    a[clef_alm_index(LA, 0, 0)] = mean * sqrt(4 * M_PI);
    for (int m = 0; m <= LW; m++)
        for (int l = m > 1 ? m : 1; l <= LW; l++)
            a[clef_alm_index(LA, l, m)] =
                0.15 * (gsl_ran_gaussian(r, 1.0) + (m ? I * gsl_ran_gaussian(r, 1.0) : 0.0));
    gsl_rng_free(r);
    return a;
}

typedef struct expect {
    double tt[LMAX + 1][LMAX + 1], te[LMAX + 1][LMAX + 1], tb[LMAX + 1][LMAX + 1];
    double ee[LMAX + 1][LMAX + 1], bb[LMAX + 1][LMAX + 1], eb[LMAX + 1][LMAX + 1];
} expect;

/* [l][L]: <C~_l> for C_L = 1 (TT; TE with TT = EE = TE = 1; EE). */
static void transform_expectation(const double *wt, const double *wp, expect *x)
{
    const int64_t npix = 12 * NS * NS;
    const size_t na = clef_alm_size(LA, LA);
    clef_sht *p0;
    clef_sht_spin *p2;
    assert_int_equal(clef_sht_create(&p0, NS, LA, NULL), CLEF_OK);
    assert_int_equal(clef_sht_spin_create(&p2, NS, LA, NULL), CLEF_OK);
    double complex *at = calloc(na, sizeof *at), *ae = calloc(na, sizeof *ae),
                   *ab = calloc(na, sizeof *ab);
    double complex *tt = malloc(na * sizeof *tt), *te = malloc(na * sizeof *te),
                   *tb = malloc(na * sizeof *tb);
    double *t = malloc(npix * sizeof *t), *q = malloc(npix * sizeof *q),
           *u = malloc(npix * sizeof *u);
    double cl[LA + 1];
    memset(x, 0, sizeof *x);
    for (int L = 0; L <= LMAX; L++)
        for (int m = 0; m <= L; m++)
            for (int part = 0; part < (m ? 2 : 1); part++) {
                const double wgt = m ? 0.5 : 1.0;
                const size_t i = clef_alm_index(LA, L, m);
                at[i] = part ? I : 1.0;
                assert_int_equal(clef_sht_synthesis(p0, 1, (const double complex *const *)&at, &t),
                                 CLEF_OK);
                for (int64_t k = 0; k < npix; k++)
                    t[k] *= wt[k];
                assert_int_equal(clef_sht_analysis(p0, 1, (const double *const *)&t, &tt, 4),
                                 CLEF_OK);
                at[i] = 0.0;
                clef_alm_cl(LA, LA, tt, NULL, cl);
                for (int l = 0; l <= LMAX; l++)
                    x->tt[l][L] += wgt * cl[l];
                if (L < 2)
                    continue;
                ae[i] = part ? I : 1.0;
                assert_int_equal(clef_sht_spin_synthesis(p2, 1, (const double complex *const *)&ae,
                                                         (const double complex *const *)&ab, &q,
                                                         &u),
                                 CLEF_OK);
                for (int64_t k = 0; k < npix; k++) {
                    q[k] *= wp[k];
                    u[k] *= wp[k];
                }
                assert_int_equal(clef_sht_spin_analysis(p2, 1, (const double *const *)&q,
                                                        (const double *const *)&u, &te, &tb, 4),
                                 CLEF_OK);
                ae[i] = 0.0;
                clef_alm_cl(LA, LA, tt, te, cl);
                for (int l = 0; l <= LMAX; l++)
                    x->te[l][L] += wgt * cl[l];
                clef_alm_cl(LA, LA, tt, tb, cl);
                for (int l = 0; l <= LMAX; l++)
                    x->tb[l][L] += wgt * cl[l];
                clef_alm_cl(LA, LA, te, NULL, cl);
                for (int l = 0; l <= LMAX; l++)
                    x->ee[l][L] += wgt * cl[l];
                clef_alm_cl(LA, LA, tb, NULL, cl);
                for (int l = 0; l <= LMAX; l++)
                    x->bb[l][L] += wgt * cl[l];
                clef_alm_cl(LA, LA, te, tb, cl);
                for (int l = 0; l <= LMAX; l++)
                    x->eb[l][L] += wgt * cl[l];
            }
    clef_sht_destroy(p0);
    clef_sht_spin_destroy(p2);
    free(at);
    free(ae);
    free(ab);
    free(tt);
    free(te);
    free(tb);
    free(t);
    free(q);
    free(u);
}

static double mat_max(const double *m)
{
    double s = 0;
    for (int i = 0; i < (LMAX + 1) * (LMAX + 1); i++)
        s = fmax(s, fabs(m[i]));
    return s;
}

static void test_matrices_vs_transforms(void **state)
{
    (void)state;
    const int64_t npix = 12 * NS * NS;
    double complex *mt = mask_alm(3, 0.7), *mp = mask_alm(4, 0.6);
    double *wt = malloc(npix * sizeof *wt), *wp = malloc(npix * sizeof *wp);
    clef_sht *p;
    assert_int_equal(clef_sht_create(&p, NS, LA, NULL), CLEF_OK);
    assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&mt, &wt), CLEF_OK);
    assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&mp, &wp), CLEF_OK);
    clef_sht_destroy(p);
    /* Mask spectra from the mask a_lm (exact), zero above LW. */
    double wtt[2 * LMAX + 1] = {0}, wtp[2 * LMAX + 1] = {0}, wpp[2 * LMAX + 1] = {0}, c[LA + 1];
    clef_alm_cl(LA, LA, mt, NULL, c);
    memcpy(wtt, c, (LW + 1) * sizeof *c);
    clef_alm_cl(LA, LA, mt, mp, c);
    memcpy(wtp, c, (LW + 1) * sizeof *c);
    clef_alm_cl(LA, LA, mp, NULL, c);
    memcpy(wpp, c, (LW + 1) * sizeof *c);
    clef_coupling *ctt;
    clef_coupling_pol cp;
    assert_int_equal(clef_coupling_create(&ctt, LMAX, wtt, 2 * LMAX), CLEF_OK);
    assert_int_equal(clef_coupling_pol_create(&cp, LMAX, wtp, wpp, 2 * LMAX), CLEF_OK);
    static expect x;
    transform_expectation(wt, wp, &x);
    const double *Mtt = clef_coupling_matrix(ctt), *Mte = clef_coupling_matrix(cp.te),
                 *Mp = clef_coupling_matrix(cp.pp), *Mm = clef_coupling_matrix(cp.mm);
    const double stt = mat_max(Mtt), ste = mat_max(Mte), sp = mat_max(Mp), sm = mat_max(Mm);
    double dtt = 0, dte = 0, dp = 0, dm = 0, deb = 0, dtb = 0;
    for (int l = 0; l <= LMAX; l++)
        for (int L = 0; L <= LMAX; L++) {
            const size_t i = (size_t)l * (LMAX + 1) + L;
            dtt = fmax(dtt, fabs(x.tt[l][L] - Mtt[i]));
            dte = fmax(dte, fabs(x.te[l][L] - Mte[i]));
            dp = fmax(dp, fabs(x.ee[l][L] - Mp[i]));
            dm = fmax(dm, fabs(x.bb[l][L] - Mm[i]));
            deb = fmax(deb, fabs(x.eb[l][L]));
            dtb = fmax(dtb, fabs(x.tb[l][L]));
        }
    printf("coupling vs transform expectation (max |diff| / max |M|): TT %.3g TE %.3g EE->EE "
           "%.3g EE->BB %.3g; EE->EB %.3g, TE->TB %.3g (of M+); max M- / max M+ = %.3g\n",
           dtt / stt, dte / ste, dp / sp, dm / sm, deb / sp, dtb / sp, sm / sp);
    check_abs(dtt / stt, 0.0, 1e-9, "transform expectation (Hivon et al. 2002 eq. 5 per mode)");
    check_abs(dte / ste, 0.0, 1e-9, "transform expectation, M^TE (Kogut et al. 2003)");
    check_abs(dp / sp, 0.0, 1e-9, "transform expectation, M+ (Brown et al. 2005)");
    check_abs(dm / sm, 0.0, 1e-9, "transform expectation, M- (Brown et al. 2005)");
    check_abs(deb / sp, 0.0, 1e-9, "no EE -> EB coupling (Brown et al. 2005 eq. 25)");
    check_abs(dtb / sp, 0.0, 1e-9, "no TE -> TB coupling (Brown et al. 2005)");
    assert_true(sm / sp > 1e-3); /* the mask does leak E into B */
    clef_coupling_destroy(ctt);
    clef_coupling_pol_free(&cp);
    free(mt);
    free(mp);
    free(wt);
    free(wp);
}

/* Full sky (w = 1, W_0 = 4 pi): M+ = identity for l >= 2, M- = 0, M^TE =
 * identity for l >= 2 (orthogonality of 3j symbols, DLMF 34.3.18). */
static void test_full_sky(void **state)
{
    (void)state;
    const int lmax = 40;
    double *w = calloc(2 * lmax + 1, sizeof *w);
    w[0] = 4 * M_PI;
    clef_coupling_pol cp;
    assert_int_equal(clef_coupling_pol_create(&cp, lmax, w, w, 2 * lmax), CLEF_OK);
    const double *Mp = clef_coupling_matrix(cp.pp), *Mm = clef_coupling_matrix(cp.mm),
                 *Mte = clef_coupling_matrix(cp.te);
    for (int l = 0; l <= lmax; l++)
        for (int L = 0; L <= lmax; L++) {
            const double id = (l == L && l >= 2) ? 1.0 : 0.0;
            const size_t i = (size_t)l * (lmax + 1) + L;
            check_abs(Mp[i], id, 1e-13, "full sky: M+ = 1 (DLMF 34.3.18)");
            check_abs(Mm[i], 0.0, 1e-13, "full sky: M- = 0 (DLMF 34.3.18)");
            check_abs(Mte[i], id, 1e-13, "full sky: M^TE = 1 (DLMF 34.3.18)");
        }
    clef_coupling_pol_free(&cp);
    /* Errors. */
    w[3] = NAN;
    assert_int_equal(clef_coupling_pol_create(&cp, lmax, w, w, 2 * lmax), CLEF_EINVAL);
    assert_null(cp.pp);
    free(w);
}

/* Joint decoupling: band-limited piecewise (bin-shaped) EE and BB are
 * recovered exactly from M+- applied to them; windows reproduce the band
 * powers and carry the EE -> BB leakage; EB/BE with the minus sign. */
static void test_binned_joint(void **state)
{
    (void)state;
    const int lmax = 48;
    double *w = calloc(2 * lmax + 1, sizeof *w);
    /* A smooth azimuthal mask spectrum (W_l ~ e^{-l^2/50}), as of a cap. */
    for (int l = 0; l <= 2 * lmax; l++)
        w[l] = 4 * M_PI * 0.5 * exp(-l * l / 50.0) / (l ? 1.0 : 1.0);
    clef_coupling_pol cp;
    assert_int_equal(clef_coupling_pol_create(&cp, lmax, NULL, w, 2 * lmax), CLEF_OK);
    assert_null(cp.te);
    clef_bins *b;
    assert_int_equal(clef_bins_create_linear(&b, 2, 8, lmax, CLEF_BINS_DL), CLEF_OK);
    const int nb = clef_bins_count(b);
    for (int sign = 1; sign >= -1; sign -= 2) {
        clef_coupling_pol_binned *k;
        assert_int_equal(clef_coupling_pol_binned_create(&k, cp.pp, cp.mm, b, NULL, sign, NULL),
                         CLEF_OK);
        double ba[16], bb[16], ra[16], rb[16];
        for (int i = 0; i < nb; i++) {
            ba[i] = 1.0 + 0.1 * i;
            bb[i] = 0.05 * (i + 1);
        }
        double ca[49], cb[49], pa[49], pb[49];
        clef_bins_expand(b, ba, lmax, ca);
        clef_bins_expand(b, bb, lmax, cb);
        const double *Mp = clef_coupling_matrix(cp.pp), *Mm = clef_coupling_matrix(cp.mm);
        for (int l = 0; l <= lmax; l++) {
            pa[l] = pb[l] = 0;
            for (int L = 0; L <= lmax; L++) {
                const double mp = Mp[l * (lmax + 1) + L], mm = sign * Mm[l * (lmax + 1) + L];
                pa[l] += mp * ca[L] + mm * cb[L];
                pb[l] += mm * ca[L] + mp * cb[L];
            }
        }
        clef_coupling_pol_binned_decouple(k, pa, pb, ra, rb);
        for (int i = 0; i < nb; i++) {
            check_rel(ra[i], ba[i], 1e-10, "K^-1 P M Q = 1 (Hivon et al. 2002), joint E/B");
            check_rel(rb[i], bb[i], 1e-10, "K^-1 P M Q = 1 (Hivon et al. 2002), joint E/B");
        }
        double *win = malloc((size_t)2 * nb * 2 * (lmax + 1) * sizeof *win);
        assert_int_equal(clef_coupling_pol_binned_windows(k, cp.pp, cp.mm, b, NULL, win), CLEF_OK);
        double leak = 0;
        for (int r = 0; r < 2 * nb; r++) {
            const double *row = win + (size_t)r * 2 * (lmax + 1);
            double s = 0;
            for (int l = 0; l <= lmax; l++) {
                s += row[l] * ca[l] + row[lmax + 1 + l] * cb[l];
                if (r >= nb)
                    leak = fmax(leak, fabs(row[l]));
            }
            check_rel(s, r < nb ? ba[r] : bb[r - nb], 1e-10, "windows reproduce the band powers");
        }
        assert_true(leak > 1e-6); /* the E -> B leakage windows are not empty */
        free(win);
        clef_coupling_pol_binned_destroy(k);
    }
    clef_coupling_pol_binned *k = NULL;
    assert_int_equal(clef_coupling_pol_binned_create(&k, cp.pp, cp.mm, b, NULL, 0, NULL),
                     CLEF_EINVAL);
    clef_bins_destroy(b);
    clef_coupling_pol_free(&cp);
    free(w);
}

/* The cache: a miss computes and stores, a hit gives the same matrices bit
 * for bit; another mask spectrum is another entry. */
static void test_cache(void **state)
{
    (void)state;
    const int lmax = 30;
    double w[61], w2[61];
    for (int l = 0; l <= 60; l++) {
        w[l] = 4 * M_PI * 0.4 * exp(-l * l / 40.0);
        w2[l] = 0.9 * w[l];
    }
    const char *dir = test_path("polcache");
    clef_coupling_pol ref, a, b, c;
    int hit = -1;
    assert_int_equal(clef_coupling_pol_create(&ref, lmax, w2, w, 60), CLEF_OK);
    assert_int_equal(clef_coupling_pol_create_cached(&a, lmax, w2, w, 60, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    assert_int_equal(clef_coupling_pol_create_cached(&b, lmax, w2, w, 60, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 1);
    const size_t nn = (size_t)(lmax + 1) * (lmax + 1);
    assert_memory_equal(clef_coupling_matrix(b.pp), clef_coupling_matrix(ref.pp), nn * sizeof(double));
    assert_memory_equal(clef_coupling_matrix(b.mm), clef_coupling_matrix(ref.mm), nn * sizeof(double));
    assert_memory_equal(clef_coupling_matrix(b.te), clef_coupling_matrix(ref.te), nn * sizeof(double));
    assert_int_equal(clef_coupling_pol_create_cached(&c, lmax, w, w, 60, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    clef_coupling_pol_free(&ref);
    clef_coupling_pol_free(&a);
    clef_coupling_pol_free(&b);
    clef_coupling_pol_free(&c);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_full_sky),
        cmocka_unit_test(test_matrices_vs_transforms),
        cmocka_unit_test(test_binned_joint),
        cmocka_unit_test(test_cache),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
