/* Mode-coupling matrix and binned operator (Hivon et al. 2002, ApJ 567, 2;
 * METHODS.md section 4), the coupling cache, and the pseudo-spectrum of
 * masked Gaussian skies. */
#include "check.h"

#include <complex.h>
#include <dirent.h>
#include <fcntl.h>
#include <time.h>

#include <chealpix.h>
#include <omp.h>
#include <gsl/gsl_errno.h>
#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>
#include <gsl/gsl_sf_coupling.h>
#include <gsl/gsl_sf_legendre.h>

#include "clef/coupling.h"
#include "clef/kernel.h"
#include "clef/sht.h"
#include "clef/wigner.h"

/* Analytic W_l of the cap z >= z0 (w = 1 inside): w_l0 = 2 pi
 * sqrt((2l+1)/4pi) I_l, I_l = int_z0^1 P_l dz = (P_{l-1}(z0) - P_{l+1}(z0))
 * / (2l+1) (from (2l+1) P_l = P'_{l+1} - P'_{l-1}, DLMF 14.10.5), so
 * W_l = |w_l0|^2/(2l+1) = pi I_l^2 (METHODS.md section 4, hemisphere). */
static void cap_wl(double z0, int lmax, double *wl)
{
    double *p = malloc((size_t)(lmax + 2) * sizeof *p);
    assert_non_null(p);
    /* GSL gsl_sf_legendre_Pl_array */
    assert_int_equal(gsl_sf_legendre_Pl_array(lmax + 1, z0, p), GSL_SUCCESS);
    wl[0] = M_PI * (1 - z0) * (1 - z0);
    for (int l = 1; l <= lmax; l++) {
        const double il = (p[l - 1] - p[l + 1]) / (2.0 * l + 1.0);
        wl[l] = M_PI * il * il;
    }
    free(p);
}

static double *make_coupling(clef_coupling **c, int lmax, const double *wl, int wl_lmax)
{
    assert_int_equal(clef_coupling_create(c, lmax, wl, wl_lmax), CLEF_OK);
    assert_int_equal(clef_coupling_lmax(*c), lmax);
    return (double *)clef_coupling_matrix(*c);
}

/* M made in parts (clef_coupling_row_split / _create_rows / _fill_lower,
 * as clef sims' ranks share it) is the same bits as clef_coupling_create's:
 * the rows are independent.  The parts cover every row once, and a maker
 * passed to clef_coupling_create_cached_with is called on a miss only. */
static int make_calls;
static int counting_make(void *arg, clef_coupling **out, int lmax, const double *wl, int wl_lmax)
{
    (void)arg;
    make_calls++;
    return clef_coupling_create(out, lmax, wl, wl_lmax);
}

static void test_rows_in_parts(void **state)
{
    (void)state;
    enum { L = 200 };
    static double wl[2 * L + 1];
    cap_wl(0.3, 2 * L, wl);
    clef_coupling *full = NULL;
    const double *m = make_coupling(&full, L, wl, 2 * L);
    const size_t n = L + 1;
    for (int parts = 1; parts <= 5; parts += 2) {
        int first[6];
        clef_coupling_row_split(L, parts, first);
        assert_int_equal(first[0], 0);
        assert_int_equal(first[parts], L + 1);
        clef_coupling *sum = NULL;
        assert_int_equal(clef_coupling_create_rows(&sum, L, wl, 2 * L, 0, 0), CLEF_OK);
        for (int k = 0; k < parts; k++) {
            assert_true(first[k] < first[k + 1]); /* each part has rows */
            clef_coupling *c = NULL;
            assert_int_equal(clef_coupling_create_rows(&c, L, wl, 2 * L, first[k], first[k + 1]),
                             CLEF_OK);
            const size_t off = (size_t)first[k] * n, cnt = (size_t)(first[k + 1] - first[k]) * n;
            memcpy(clef_coupling_rows_data(sum) + off, clef_coupling_rows_data(c) + off,
                   cnt * sizeof(double));
            clef_coupling_destroy(c);
        }
        clef_coupling_fill_lower(sum);
        assert_memory_equal(clef_coupling_matrix(sum), m, n * n * sizeof(double));
        clef_coupling_destroy(sum);
    }
    clef_coupling *bad = NULL;
    assert_int_equal(clef_coupling_create_rows(&bad, L, wl, 2 * L, 5, L + 2), CLEF_EINVAL);
    assert_null(bad);
    /* the maker on a miss, not on a hit */
    char dir[] = "/tmp/clef-test-rows-XXXXXX";
    assert_non_null(mkdtemp(dir));
    clef_coupling *c1 = NULL, *c2 = NULL;
    int hit = -1;
    make_calls = 0;
    assert_int_equal(clef_coupling_create_cached_with(&c1, L, wl, 2 * L, dir, &hit,
                                                      counting_make, NULL), CLEF_OK);
    assert_int_equal(hit, 0);
    assert_int_equal(make_calls, 1);
    assert_int_equal(clef_coupling_create_cached_with(&c2, L, wl, 2 * L, dir, &hit,
                                                      counting_make, NULL), CLEF_OK);
    assert_int_equal(hit, 1);
    assert_int_equal(make_calls, 1);
    assert_memory_equal(clef_coupling_matrix(c2), m, n * n * sizeof(double));
    clef_coupling_destroy(c1);
    clef_coupling_destroy(c2);
    char cmd[128];
    snprintf(cmd, sizeof cmd, "rm -rf %s", dir);
    assert_int_equal(system(cmd), 0);
    clef_coupling_destroy(full);
}

static void test_full_sky_identity(void **state)
{
    (void)state;
    enum { L = 300 };
    static double wl[2 * L + 1];
    /* w = 1: W_0 = 4 pi, others 0 -> M = I (METHODS.md section 4 exact check) */
    wl[0] = 4 * M_PI;
    clef_coupling *c;
    const double *m = make_coupling(&c, L, wl, 2 * L);
    for (int l = 0; l <= L; l++)
        for (int lp = 0; lp <= L; lp++)
            check_abs(m[l * (L + 1) + lp], l == lp ? 1.0 : 0.0, 1e-12,
                      "full sky M = I (METHODS.md 4)");
    clef_coupling_destroy(c);
    /* the smallest sizes (rows shorter than one kernel block) */
    for (int lmax = 0; lmax <= 2; lmax++) {
        m = make_coupling(&c, lmax, wl, 2 * lmax);
        for (int l = 0; l <= lmax; l++)
            for (int lp = 0; lp <= lmax; lp++)
                check_abs(m[l * (lmax + 1) + lp], l == lp ? 1.0 : 0.0, 1e-15, "full sky, tiny lmax");
        clef_coupling_destroy(c);
    }
    /* w = f: W_0 = 4 pi f^2 -> M = f^2 I */
    const double f = 0.37;
    wl[0] = 4 * M_PI * f * f;
    m = make_coupling(&c, L, wl, 2 * L);
    for (int l = 0; l <= L; l += 7)
        for (int lp = 0; lp <= L; lp++)
            check_abs(m[l * (L + 1) + lp], l == lp ? f * f : 0.0, 1e-12,
                      "constant mask M = f^2 I (METHODS.md 4)");
    clef_coupling_destroy(c);
}

static void test_hemisphere(void **state)
{
    (void)state;
    enum { L = 50 };
    static double wl[2 * L + 1];
    cap_wl(0.0, 2 * L, wl);
    /* I_1 = 1/2, I_3 = -1/8: W_1 = pi/4, W_3 = pi/64 (METHODS.md section 4) */
    check_rel(wl[1], M_PI / 4, 1e-15, "hemisphere W_1 = pi I_1^2");
    check_rel(wl[3], M_PI / 64, 1e-15, "hemisphere W_3 = pi I_3^2");
    check_abs(wl[2], 0.0, 1e-17, "hemisphere W_2 = 0");
    clef_coupling *c;
    const double *m = make_coupling(&c, L, wl, 2 * L);
#define M_(l, lp) m[(l) * (L + 1) + (lp)]
    /* Exact fractions from METHODS.md section 4 [D] */
    const struct {
        int l, lp;
        double v;
    } ex[] = {{0, 0, 1.0 / 4},      {0, 1, 3.0 / 16},   {0, 2, 0.0},        {0, 3, 7.0 / 256},
              {1, 0, 1.0 / 16},     {1, 1, 1.0 / 4},    {1, 2, 35.0 / 256}, {1, 4, 21.0 / 1024},
              {2, 1, 21.0 / 256},   {2, 2, 1.0 / 4},    {2, 3, 63.0 / 512}, {3, 2, 45.0 / 512},
              {3, 4, 7659.0 / 65536}};
    for (size_t i = 0; i < sizeof ex / sizeof ex[0]; i++)
        check_abs(M_(ex[i].l, ex[i].lp), ex[i].v, 1e-14, "hemisphere, METHODS.md section 4");
    for (int l = 0; l <= L; l++)
        check_rel(M_(l, l), 0.25, 1e-12, "hemisphere M_ll = 1/4 (METHODS.md 4)");
#undef M_
    clef_coupling_destroy(c);

    /* Row 0 summed to l' = 200 reaches only 0.4992 of w2 = 1/2 (sharp edge;
     * METHODS.md section 4) */
    enum { L2 = 200 };
    static double wl2[2 * L2 + 1];
    cap_wl(0.0, 2 * L2, wl2);
    m = make_coupling(&c, L2, wl2, 2 * L2);
    double s = 0;
    for (int lp = 0; lp <= L2; lp++)
        s += m[lp];
    check_abs(s, 0.4992, 5e-5, "hemisphere row sum to 200 (METHODS.md 4)");
    clef_coupling_destroy(c);
}

/* Random smooth positive W_l, band-limited to lw. */
static void random_wl(gsl_rng *r, int lw, int n, double *wl)
{
    for (int l = 0; l < n; l++)
        wl[l] = l <= lw ? (0.2 + gsl_rng_uniform(r)) * exp(-l / 8.0) : 0.0;
}

static void test_row_sums_and_symmetry(void **state)
{
    (void)state;
    enum { L = 200, LW = 20 };
    static double wl[2 * L + 1];
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 42);
    random_wl(r, LW, 2 * L + 1, wl);
    double w2 = 0;
    for (int l = 0; l <= LW; l++)
        w2 += (2 * l + 1) * wl[l] / (4 * M_PI);
    clef_coupling *c;
    const double *m = make_coupling(&c, L, wl, 2 * L);
    /* sum_l' M_ll' = w2 when no coupled l' is truncated (l + LW <= L):
     * 3j orthogonality plus sum_l (2l+1) W_l = 4 pi w2 (METHODS.md 4) */
    for (int l = 0; l + LW <= L; l++) {
        double s = 0;
        for (int lp = 0; lp <= L; lp++)
            s += m[l * (L + 1) + lp];
        check_rel(s, w2, 1e-12, "row sums = w2 (METHODS.md 4)");
    }
    /* M_ll'/(2l'+1) symmetric (METHODS.md 4) */
    for (int l = 0; l <= L; l += 3)
        for (int lp = 0; lp <= L; lp += 5)
            check_abs(m[l * (L + 1) + lp] / (2 * lp + 1), m[lp * (L + 1) + l] / (2 * l + 1),
                      1e-15, "symmetry of M/(2l'+1)");
    clef_coupling_destroy(c);
    gsl_rng_free(r);
}

/* Independent evaluations of the defining sum: GSL's 3j at small l (where
 * GSL holds 1e-12, see test_wigner.c) and the signed 3j rows elsewhere. */
static void test_vs_direct_sum(void **state)
{
    (void)state;
    enum { L = 60 };
    static double wl[2 * L + 1], row[2 * L + 2];
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 7);
    for (int l = 0; l <= 2 * L; l++)
        wl[l] = gsl_rng_uniform(r) / (1.0 + l);
    clef_coupling *c;
    const double *m = make_coupling(&c, L, wl, 2 * L);
    for (int l = 0; l <= L; l++)
        for (int lp = 0; lp <= L; lp++) {
            int lo, hi;
            assert_int_equal(clef_wigner_3j000_row(l, lp, row, &lo, &hi), CLEF_OK);
            double s = 0;
            for (int l3 = lo; l3 <= hi; l3++)
                s += (2 * l3 + 1) * wl[l3] * row[l3 - lo] * row[l3 - lo];
            const double want = (2 * lp + 1) / (4 * M_PI) * s;
            check_rel(m[l * (L + 1) + lp], want, 1e-12, "Hivon 2002 sum with 3j rows");
            if (l <= 7 && lp <= 7) {
                double g = 0;
                for (int l3 = lo; l3 <= hi; l3++) {
                    /* GSL gsl_sf_coupling_3j */
                    const double f = gsl_sf_coupling_3j(2 * l, 2 * lp, 2 * l3, 0, 0, 0);
                    g += (2 * l3 + 1) * wl[l3] * f * f;
                }
                check_rel(m[l * (L + 1) + lp], (2 * lp + 1) / (4 * M_PI) * g, 1e-12,
                          "Hivon 2002 sum with GSL gsl_sf_coupling_3j");
            }
        }
    /* W_l truncated: terms above wl_lmax count as zero */
    clef_coupling *ct;
    const double *mt = make_coupling(&ct, L, wl, 30);
    for (int l = 0; l <= L; l += 4)
        for (int lp = 0; lp <= L; lp += 3) {
            int lo, hi;
            clef_wigner_3j000_row(l, lp, row, &lo, &hi);
            double s = 0;
            for (int l3 = lo; l3 <= hi && l3 <= 30; l3++)
                s += (2 * l3 + 1) * wl[l3] * row[l3 - lo] * row[l3 - lo];
            check_abs(mt[l * (L + 1) + lp], (2 * lp + 1) / (4 * M_PI) * s, 1e-14,
                      "truncated W_l");
        }
    clef_coupling_destroy(ct);
    /* apply() is M times a vector */
    double cl[L + 1], out[L + 1];
    for (int l = 0; l <= L; l++)
        cl[l] = 1.0 / (1 + l);
    clef_coupling_apply(c, cl, out);
    for (int l = 0; l <= L; l += 10) {
        double s = 0;
        for (int lp = 0; lp <= L; lp++)
            s += m[l * (L + 1) + lp] * cl[lp];
        check_rel(out[l], s, 1e-14, "M C");
    }
    clef_coupling_destroy(c);
    gsl_rng_free(r);
}

/* The row kernel per vector width (include/clef/kernel.h, forced through
 * CLEF_KERNEL): every available kernel gives M to 1e-14 relative of the
 * baseline's (they differ only by fused multiply-adds), and each one is
 * checked against the 3j sums above when make check reruns this program
 * with the kernel forced (tests/kernels.sh). */
static void test_kernels(void **state)
{
    (void)state;
    enum { L = 300 };
    static double wl[2 * L + 1];
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 5);
    random_wl(r, 2 * L, 2 * L + 1, wl);
    gsl_rng_free(r);
    char saved[64] = "";
    const char *env = getenv("CLEF_KERNEL");
    if (env)
        snprintf(saved, sizeof saved, "%s", env);
    const clef_kernel ks[] = {CLEF_KERNEL_BASE, CLEF_KERNEL_AVX2, CLEF_KERNEL_AVX512};
    clef_coupling *base = NULL;
    for (int q = 0; q < 3; q++) {
        if (!clef_kernel_available(ks[q]))
            continue;
        setenv("CLEF_KERNEL", clef_kernel_name(ks[q]), 1);
        clef_coupling *c;
        const double *m = make_coupling(&c, L, wl, 2 * L);
        if (!base) {
            base = c;
            continue;
        }
        const double *mb = clef_coupling_matrix(base);
        double emax = 0.0;
        for (int i = 0; i < (L + 1) * (L + 1); i++)
            if (mb[i] != 0.0)
                emax = fmax(emax, fabs(m[i] - mb[i]) / fabs(mb[i]));
            else
                assert_true(m[i] == 0.0);
        printf("coupling kernel %s vs base, lmax %d: max rel diff %.3g\n",
               clef_kernel_name(ks[q]), L, emax);
        check_abs(emax, 0.0, 1e-14, "kernels agree to rounding (issue 17)");
        clef_coupling_destroy(c);
    }
    assert_non_null(base);
    clef_coupling_destroy(base);
    if (saved[0])
        setenv("CLEF_KERNEL", saved, 1);
    else
        unsetenv("CLEF_KERNEL");
}

static void test_binned_recovers_band_powers(void **state)
{
    (void)state;
    enum { L = 256 };
    static double wl[2 * L + 1], tr[L + 1], cl[L + 1], tcl[L + 1], pcl[L + 1];
    cap_wl(0.3, 2 * L, wl); /* cap with f_sky = 0.35 */
    clef_coupling *c;
    make_coupling(&c, L, wl, 2 * L);
    clef_bins *bins;
    assert_int_equal(clef_bins_create_linear(&bins, 2, 16, L, CLEF_BINS_DL), CLEF_OK);
    const int nb = clef_bins_count(bins);
    /* transfer F B^2 p^2: a Gaussian beam squared (sigma_l = 150) */
    for (int l = 0; l <= L; l++)
        tr[l] = exp(-l * (l + 1.0) / (150.0 * 150.0));
    clef_coupling_binned *kb;
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, tr, NULL), CLEF_OK);
    assert_int_equal(clef_coupling_binned_nbins(kb), nb);
    assert_int_equal(clef_coupling_binned_lmax(kb), L);
    assert_true(clef_coupling_binned_rcond(kb) > 1e-3 && clef_coupling_binned_rcond(kb) <= 1);
    /* A piecewise-constant D_b fed through C = Q D, pseudo-C = M T C, is
     * recovered exactly by K^-1 P (Hivon et al. 2002, METHODS.md 4). */
    double *d = malloc((size_t)nb * sizeof *d), *got = malloc((size_t)nb * sizeof *got);
    for (int b = 0; b < nb; b++)
        d[b] = 1000.0 + 500.0 * sin(0.3 * b);
    assert_int_equal(clef_bins_expand(bins, d, L, cl), CLEF_OK);
    for (int l = 0; l <= L; l++)
        tcl[l] = tr[l] * cl[l];
    clef_coupling_apply(c, tcl, pcl);
    clef_coupling_binned_decouple(kb, pcl, got);
    for (int b = 0; b < nb; b++)
        check_rel(got[b], d[b], 1e-10, "K^-1 P M T Q D = D (Hivon 2002)");
    /* K (K^-1 P) = P */
    const double *k = clef_coupling_binned_matrix(kb), *kp = clef_coupling_binned_kinv_p(kb);
    for (int b = 0; b < nb; b += 3)
        for (int l = 0; l <= L; l += 5) {
            double s = 0;
            for (int j = 0; j < nb; j++)
                s += k[b * nb + j] * kp[(size_t)j * (L + 1) + l];
            check_abs(s, clef_bins_p(bins, b, l), 1e-9 * (1 + clef_bins_p(bins, b, l)),
                      "K (K^-1 P) = P");
        }
    /* Window functions: W = K^-1 P M T, checked against the explicit
     * product (K^-1 P) M T; summed with Q over bin b' they give delta_bb'
     * (K^-1 K = I, Hivon et al. 2002 eqs. 20-21), and the mean band power
     * of the unbinned spectrum C (not piecewise constant) is W C. */
    double *win = malloc((size_t)nb * (L + 1) * sizeof *win);
    assert_int_equal(clef_coupling_binned_windows(kb, c, bins, tr, win), CLEF_OK);
    const double *mm = clef_coupling_matrix(c);
    for (int b = 0; b < nb; b += 4)
        for (int l = 0; l <= L; l += 7) {
            double s = 0;
            for (int j = 0; j <= L; j++)
                s += kp[(size_t)b * (L + 1) + j] * mm[(size_t)j * (L + 1) + l];
            check_abs(win[(size_t)b * (L + 1) + l], s * tr[l], 1e-12 * (1 + fabs(s)),
                      "explicit (K^-1 P) M T");
        }
    for (int b = 0; b < nb; b++)
        for (int bp = 0; bp < nb; bp++) {
            double s = 0;
            for (int l = clef_bins_l_lo(bins, bp); l <= clef_bins_l_hi(bins, bp); l++)
                s += win[(size_t)b * (L + 1) + l] * clef_bins_q(bins, bp, l);
            check_abs(s, b == bp, 1e-10, "sum_l W_bl Q_lb' = delta (K^-1 K = I)");
        }
    for (int l = 0; l <= L; l++) /* a smooth spectrum with a peak: not constant in a bin */
        cl[l] = l < 2 ? 0 : 2 * M_PI / (l * (l + 1.0)) * (1000 + 4000 * exp(-pow((l - 120) / 40.0, 2)));
    for (int l = 0; l <= L; l++)
        tcl[l] = tr[l] * cl[l];
    clef_coupling_apply(c, tcl, pcl);
    clef_coupling_binned_decouple(kb, pcl, got);
    for (int b = 0; b < nb; b++) {
        double s = 0;
        for (int l = 0; l <= L; l++)
            s += win[(size_t)b * (L + 1) + l] * cl[l];
        check_rel(s, got[b], 1e-10, "<D_b> = sum_l W_bl C_l (linearity)");
    }
    clef_bins *b8 = NULL;
    assert_int_equal(clef_bins_create_linear(&b8, 2, 8, L, CLEF_BINS_DL), CLEF_OK);
    assert_int_equal(clef_coupling_binned_windows(kb, c, b8, tr, win), CLEF_EINVAL);
    clef_bins_destroy(b8);
    free(win);
    clef_coupling_binned_destroy(kb);
    /* Corrections of M: a block added, columns zeroed, bad arguments refused. */
    {
        clef_coupling *cc = NULL;
        make_coupling(&cc, 8, wl, 2 * L);
        const double *mc = clef_coupling_matrix(cc);
        const double before = mc[3 * 9 + 2], before1 = mc[5 * 9 + 1];
        double blk[16];
        for (int i = 0; i < 16; i++)
            blk[i] = 0.001 * i;
        assert_int_equal(clef_coupling_add_block(cc, 4, blk, -2.0), CLEF_OK);
        check_abs(mc[3 * 9 + 2], before - 2.0 * 0.001 * 14, 1e-15, "M - 2 d");
        check_abs(mc[5 * 9 + 1], before1, 0, "outside the block");
        assert_int_equal(clef_coupling_zero_columns(cc, 1), CLEF_OK);
        for (int l = 0; l <= 8; l++) {
            check_abs(mc[l * 9 + 0], 0, 0, "column 0 zeroed");
            check_abs(mc[l * 9 + 1], 0, 0, "column 1 zeroed");
        }
        assert_true(mc[4 * 9 + 2] != 0);
        assert_int_equal(clef_coupling_add_block(cc, 10, blk, 1.0), CLEF_EINVAL);
        blk[3] = NAN;
        assert_int_equal(clef_coupling_add_block(cc, 4, blk, 1.0), CLEF_EINVAL);
        assert_int_equal(clef_coupling_zero_columns(cc, 9), CLEF_EINVAL);
        assert_int_equal(clef_coupling_zero_columns(cc, -1), CLEF_EINVAL);
        clef_coupling_destroy(cc);
    }
    /* Full sky, no transfer: K = I (P Q = I) */
    static double w1[2 * L + 1];
    w1[0] = 4 * M_PI;
    clef_coupling *c1;
    make_coupling(&c1, L, w1, 2 * L);
    assert_int_equal(clef_coupling_binned_create(&kb, c1, bins, NULL, NULL), CLEF_OK);
    k = clef_coupling_binned_matrix(kb);
    for (int b = 0; b < nb; b++)
        for (int j = 0; j < nb; j++)
            check_abs(k[b * nb + j], b == j, 1e-12, "full sky K = I");
    check_rel(clef_coupling_binned_rcond(kb), 1.0, 1e-12, "rcond of I (LAPACK dgecon)");
    clef_coupling_binned_destroy(kb);
    clef_coupling_destroy(c1);
    free(d);
    free(got);
    clef_bins_destroy(bins);
    clef_coupling_destroy(c);
}

/* Read "use bins of at least N multipoles" from an error message. */
static int suggested_width(const char *msg)
{
    const char *p = strstr(msg, "use bins of at least ");
    return p ? atoi(p + strlen("use bins of at least ")) : -1;
}

static void test_ill_conditioned(void **state)
{
    (void)state;
    enum { L = 256 };
    static double wl[2 * L + 1];
    /* A cap of f_sky = 0.002 (radius ~5 deg) with single-multipole bins */
    cap_wl(1 - 2 * 0.002, 2 * L, wl);
    clef_coupling *c;
    make_coupling(&c, L, wl, 2 * L);
    clef_bins *bins;
    assert_int_equal(clef_bins_create_linear(&bins, 2, 1, L, CLEF_BINS_DL), CLEF_OK);
    clef_coupling_binned *kb = (void *)1;
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, NULL, NULL), CLEF_ENUMERIC);
    assert_null(kb);
    /* a zero-initialised options struct means the defaults, same error */
    const clef_coupling_opts zero = {0};
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, NULL, &zero), CLEF_ENUMERIC);
    assert_null(kb);
    const char *msg = clef_last_error();
    assert_true(strstr(msg, "ill-conditioned") || strstr(msg, "singular"));
    assert_non_null(strstr(msg, "coupling width"));
    const int w = suggested_width(msg);
    assert_true(w > 1);
    clef_bins_destroy(bins);
    /* The suggested width works. */
    assert_int_equal(clef_bins_create_linear(&bins, 2, w, L, CLEF_BINS_DL), CLEF_OK);
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, NULL, NULL), CLEF_OK);
    assert_true(clef_coupling_binned_rcond(kb) >= CLEF_COUPLING_RCOND_MIN);
    clef_coupling_binned_destroy(kb);
    /* A stricter threshold rejects the same bins, naming both numbers. */
    clef_coupling_opts o;
    clef_coupling_opts_default(&o);
    o.rcond_min = 0.999;
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, NULL, &o), CLEF_ENUMERIC);
    assert_non_null(strstr(clef_last_error(), "< 0.999"));
    clef_bins_destroy(bins);
    clef_coupling_destroy(c);
}

static void test_singular_and_errors(void **state)
{
    (void)state;
    enum { L = 64 };
    static double wl[2 * L + 1], tr[L + 1];
    clef_bins *bins;
    assert_int_equal(clef_bins_create_linear(&bins, 2, 8, L, CLEF_BINS_DL), CLEF_OK);
    clef_coupling *c;
    clef_coupling_binned *kb;
    /* Empty mask: W = 0 */
    make_coupling(&c, L, wl, 2 * L);
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, NULL, NULL), CLEF_ENUMERIC);
    assert_non_null(strstr(clef_last_error(), "mask is empty"));
    clef_coupling_destroy(c);
    /* Transfer zero over bin 3 */
    cap_wl(0.0, 2 * L, wl);
    make_coupling(&c, L, wl, 2 * L);
    for (int l = 0; l <= L; l++)
        tr[l] = (l >= 26 && l <= 33) ? 0.0 : 1.0;
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, tr, NULL), CLEF_ENUMERIC);
    assert_non_null(strstr(clef_last_error(), "bin 3 (l = 26..33) has a zero column"));
    tr[30] = -1;
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, tr, NULL), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "l = 30"));
    tr[30] = NAN;
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, tr, NULL), CLEF_EINVAL);
    clef_bins_destroy(bins);
    /* Bins beyond lmax */
    assert_int_equal(clef_bins_create_linear(&bins, 2, 8, L + 10, CLEF_BINS_DL), CLEF_OK);
    assert_int_equal(clef_coupling_binned_create(&kb, c, bins, NULL, NULL), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "above the coupling matrix lmax"));
    assert_int_equal(clef_coupling_binned_create(&kb, NULL, bins, NULL, NULL), CLEF_EINVAL);
    assert_int_equal(clef_coupling_binned_create(&kb, c, NULL, NULL, NULL), CLEF_EINVAL);
    clef_bins_destroy(bins);
    clef_coupling_destroy(c);
    /* Bad W_l and lmax */
    wl[5] = -1;
    assert_int_equal(clef_coupling_create(&c, L, wl, 2 * L), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "l = 5"));
    assert_null(c);
    wl[5] = INFINITY;
    assert_int_equal(clef_coupling_create(&c, L, wl, 2 * L), CLEF_EINVAL);
    assert_int_equal(clef_coupling_create(&c, -1, wl, 2 * L), CLEF_EINVAL);
    assert_int_equal(clef_coupling_create(&c, L, NULL, 2 * L), CLEF_EINVAL);
    assert_int_equal(clef_coupling_create(&c, L, wl, -1), CLEF_EINVAL);
    clef_coupling_destroy(NULL);
    clef_coupling_binned_destroy(NULL);
    /* Coupling width: the hemisphere's W_l falls below 1e-2 W_0 after l = 3 */
    cap_wl(0.0, 2 * L, wl);
    assert_int_equal(clef_coupling_width(wl, 2 * L, 1e-2), 4);
    assert_int_equal(clef_coupling_width(NULL, 2 * L, 1e-2), 0);
}


static int progress_calls, progress_bad;
static double progress_last;
static void record_progress(void *user, const char *stage, double fraction)
{
    (void)user;
    if (strcmp(stage, "coupling") != 0 || fraction < progress_last || fraction > 1 ||
        omp_get_thread_num() != 0)
        progress_bad++;
    progress_last = fraction;
    progress_calls++;
}

/* Progress: stage "coupling", from the calling thread, increasing, ending
 * at 1, at most a few hundred calls (include/clef/clef.h). */
static void test_progress(void **state)
{
    (void)state;
    enum { L = 1000 };
    static double wl[2 * L + 1];
    wl[0] = 4 * M_PI;
    clef_set_progress(record_progress, NULL);
    clef_coupling *c;
    assert_int_equal(clef_coupling_create(&c, L, wl, 2 * L), CLEF_OK);
    clef_set_progress(NULL, NULL);
    clef_coupling_destroy(c);
    assert_int_equal(progress_bad, 0);
    assert_true(progress_calls >= 2 && progress_calls <= 300);
    check_abs(progress_last, 1.0, 0.0, "progress ends at 1");
}

/* ---- coupling cache ---- */

static char warnings[8192];
static void capture_log(void *user, int level, const char *msg)
{
    (void)user;
    if (level == CLEF_LOG_WARN && strlen(warnings) + strlen(msg) + 2 < sizeof warnings) {
        strcat(warnings, msg);
        strcat(warnings, "\n");
    }
}

/* Path of the single cache file of a kind ("M" or "K") in dir. */
static void find_cache_file(const char *dir, const char *kind, char *out, size_t n)
{
    char cmd[2048];
    snprintf(cmd, sizeof cmd, "ls %s/coupling-%s-*.bin", dir, kind);
    FILE *p = popen(cmd, "r");
    assert_non_null(p);
    out[0] = '\0';
    assert_non_null(fgets(out, (int)n, p));
    out[strcspn(out, "\n")] = '\0';
    pclose(p);
}

static size_t count_files(const char *dir)
{
    char cmd[2048], line[64];
    snprintf(cmd, sizeof cmd, "ls -A %s | wc -l", dir);
    FILE *p = popen(cmd, "r");
    assert_non_null(p);
    assert_non_null(fgets(line, sizeof line, p));
    pclose(p);
    return (size_t)atol(line);
}

static void assert_same_matrix(const clef_coupling *a, const clef_coupling *b)
{
    const size_t n = (size_t)clef_coupling_lmax(a) + 1;
    assert_int_equal(clef_coupling_lmax(a), clef_coupling_lmax(b));
    assert_memory_equal(clef_coupling_matrix(a), clef_coupling_matrix(b), n * n * sizeof(double));
}

static void test_cache_hit_and_keys(void **state)
{
    (void)state;
    enum { L = 120 };
    static double wl[2 * L + 1], wl2[2 * L + 1], tr[L + 1];
    cap_wl(0.2, 2 * L, wl);
    cap_wl(0.25, 2 * L, wl2);
    const char *dir = test_path("cache-hit");
    clef_coupling *c0, *c1, *c2;
    int hit = -1;
    assert_int_equal(clef_coupling_create(&c0, L, wl, 2 * L), CLEF_OK);
    assert_int_equal(clef_coupling_create_cached(&c1, L, wl, 2 * L, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    assert_int_equal(clef_coupling_create_cached(&c2, L, wl, 2 * L, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 1);
    assert_same_matrix(c0, c1);
    assert_same_matrix(c0, c2);
    clef_coupling_destroy(c1);
    clef_coupling_destroy(c2);
    /* another lmax or W_l is another key */
    assert_int_equal(clef_coupling_create_cached(&c1, L - 1, wl, 2 * L, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    clef_coupling_destroy(c1);
    assert_int_equal(clef_coupling_create_cached(&c1, L, wl2, 2 * L, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    clef_coupling_destroy(c1);

    /* binned: miss, then hit (which skips M), same operator */
    clef_bins *bins, *bins2;
    assert_int_equal(clef_bins_create_linear(&bins, 2, 10, L, CLEF_BINS_DL), CLEF_OK);
    assert_int_equal(clef_bins_create_linear(&bins2, 2, 12, L, CLEF_BINS_DL), CLEF_OK);
    for (int l = 0; l <= L; l++)
        tr[l] = exp(-l / 300.0);
    clef_coupling_binned *k0, *k1, *k2;
    assert_int_equal(clef_coupling_binned_create(&k0, c0, bins, tr, NULL), CLEF_OK);
    assert_int_equal(
        clef_coupling_binned_create_cached(&k1, L, wl, 2 * L, bins, tr, NULL, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    assert_int_equal(
        clef_coupling_binned_create_cached(&k2, L, wl, 2 * L, bins, tr, NULL, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 1);
    const int nb = clef_bins_count(bins);
    assert_memory_equal(clef_coupling_binned_matrix(k0), clef_coupling_binned_matrix(k2),
                        (size_t)nb * nb * sizeof(double));
    assert_memory_equal(clef_coupling_binned_kinv_p(k0), clef_coupling_binned_kinv_p(k2),
                        (size_t)nb * (L + 1) * sizeof(double));
    clef_coupling_binned_destroy(k1);
    clef_coupling_binned_destroy(k2);
    /* other bins, other transfer, no transfer: misses */
    assert_int_equal(
        clef_coupling_binned_create_cached(&k1, L, wl, 2 * L, bins2, tr, NULL, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    clef_coupling_binned_destroy(k1);
    tr[7] *= 1.0000001;
    assert_int_equal(
        clef_coupling_binned_create_cached(&k1, L, wl, 2 * L, bins, tr, NULL, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    clef_coupling_binned_destroy(k1);
    assert_int_equal(
        clef_coupling_binned_create_cached(&k1, L, wl, 2 * L, bins, NULL, NULL, dir, &hit),
        CLEF_OK);
    assert_int_equal(hit, 0);
    clef_coupling_binned_destroy(k1);
    /* ill-conditioned through the cached path: the error, nothing cached */
    clef_coupling_opts o;
    clef_coupling_opts_default(&o);
    o.rcond_min = 0.9999;
    assert_int_equal(
        clef_coupling_binned_create_cached(&k1, L, wl, 2 * L, bins2, NULL, &o, dir, &hit),
        CLEF_ENUMERIC);
    assert_null(k1);
    assert_int_equal(
        clef_coupling_binned_create_cached(&k1, L, wl, 2 * L, bins2, tr, NULL, dir, NULL),
        CLEF_OK);
    clef_coupling_binned_destroy(k1);
    /* argument errors of the cached path */
    assert_int_equal(
        clef_coupling_binned_create_cached(&k1, L - 20, wl, 2 * L, bins2, NULL, NULL, dir, NULL),
        CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "above the coupling matrix lmax"));
    assert_int_equal(
        clef_coupling_binned_create_cached(&k1, L, NULL, 2 * L, bins2, NULL, NULL, dir, NULL),
        CLEF_EINVAL);
    assert_int_equal(
        clef_coupling_binned_create_cached(&k1, L, wl, 2 * L, NULL, NULL, NULL, dir, NULL),
        CLEF_EINVAL);
    assert_int_equal(clef_coupling_create_cached(&c1, -3, wl, 2 * L, dir, NULL), CLEF_EINVAL);
    clef_coupling_binned_destroy(k0);
    clef_bins_destroy(bins);
    clef_bins_destroy(bins2);
    clef_coupling_destroy(c0);
}

static void test_cache_corrupt_and_mismatch(void **state)
{
    (void)state;
    enum { L = 100 };
    static double wla[2 * L + 1], wlb[2 * L + 1];
    cap_wl(0.1, 2 * L, wla);
    cap_wl(-0.3, 2 * L, wlb);
    const char *dir = test_path("cache-bad");
    char fa[2048], fb[2048];
    clef_coupling *ca, *cb, *c;
    int hit;
    clef_set_log(capture_log, NULL);
    assert_int_equal(clef_coupling_create(&ca, L, wla, 2 * L), CLEF_OK);
    assert_int_equal(clef_coupling_create(&cb, L, wlb, 2 * L), CLEF_OK);

    /* Corrupted payload: one flipped byte -> warning, recomputed, rewritten. */
    assert_int_equal(clef_coupling_create_cached(&c, L, wla, 2 * L, dir, &hit), CLEF_OK);
    clef_coupling_destroy(c);
    find_cache_file(dir, "M", fa, sizeof fa);
    FILE *f = fopen(fa, "r+b");
    assert_non_null(f);
    fseek(f, 184 + 8 * 5000 + 3, SEEK_SET);
    const int byte = fgetc(f);
    fseek(f, 184 + 8 * 5000 + 3, SEEK_SET);
    fputc(byte ^ 0x10, f);
    fclose(f);
    warnings[0] = '\0';
    assert_int_equal(clef_coupling_create_cached(&c, L, wla, 2 * L, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    assert_non_null(strstr(warnings, "corrupted (payload checksum mismatch)"));
    assert_same_matrix(c, ca);
    clef_coupling_destroy(c);
    assert_int_equal(clef_coupling_create_cached(&c, L, wla, 2 * L, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 1);
    clef_coupling_destroy(c);

    /* Truncated file */
    assert_int_equal(truncate(fa, 184 + 800), 0);
    warnings[0] = '\0';
    assert_int_equal(clef_coupling_create_cached(&c, L, wla, 2 * L, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    assert_non_null(strstr(warnings, "wrong length"));
    assert_same_matrix(c, ca);
    clef_coupling_destroy(c);
    /* Header damage: bad magic, other format version */
    const struct {
        long off;
        const char *want;
    } dmg[] = {{0, "bad magic"}, {8, "format version"}, {16, "kind"}};
    for (size_t i = 0; i < sizeof dmg / sizeof dmg[0]; i++) {
        f = fopen(fa, "r+b");
        assert_non_null(f);
        fseek(f, dmg[i].off, SEEK_SET);
        fputc('#', f);
        fclose(f);
        warnings[0] = '\0';
        assert_int_equal(clef_coupling_create_cached(&c, L, wla, 2 * L, dir, &hit), CLEF_OK);
        assert_int_equal(hit, 0);
        assert_non_null(strstr(warnings, dmg[i].want));
        assert_same_matrix(c, ca);
        clef_coupling_destroy(c);
    }

    /* Mismatched key: the file for W_a placed under W_b's name is not used. */
    assert_int_equal(clef_coupling_create_cached(&c, L, wlb, 2 * L, dir, &hit), CLEF_OK);
    clef_coupling_destroy(c);
    char cmd[4200];
    snprintf(cmd, sizeof cmd, "ls %s/coupling-M-*.bin | grep -v %s", dir, strrchr(fa, '/') + 1);
    FILE *p = popen(cmd, "r");
    assert_non_null(fgets(fb, sizeof fb, p));
    pclose(p);
    fb[strcspn(fb, "\n")] = '\0';
    assert_int_equal(run_cmd("cp %s %s", fa, fb), 0);
    warnings[0] = '\0';
    assert_int_equal(clef_coupling_create_cached(&c, L, wlb, 2 * L, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    assert_non_null(strstr(warnings, "key mismatch"));
    assert_same_matrix(c, cb);
    clef_coupling_destroy(c);

    /* An unusable folder: a warning, the matrix is still computed. */
    warnings[0] = '\0';
    const char *blocker = test_path("cache-blocker");
    f = fopen(blocker, "w");
    fclose(f);
    char bad_dir[1100];
    snprintf(bad_dir, sizeof bad_dir, "%s/sub", blocker);
    assert_int_equal(clef_coupling_create_cached(&c, L, wla, 2 * L, bad_dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    assert_non_null(strstr(warnings, "cannot create folder"));
    assert_same_matrix(c, ca);
    clef_coupling_destroy(c);
    clef_set_log(NULL, NULL);
    clef_coupling_destroy(ca);
    clef_coupling_destroy(cb);
}

/* Two processes computing the same cache entry at once leave one valid
 * file and no temporary files. */
static void test_cache_concurrent_writers(void **state)
{
    (void)state;
    enum { L = 400, NCHILD = 3, ROUNDS = 4 };
    static double wl[2 * L + 1];
    cap_wl(0.05, 2 * L, wl);
    const char *dir = test_path("cache-race");
    int go[2];
    assert_int_equal(pipe(go), 0);
    pid_t pid[NCHILD];
    for (int i = 0; i < NCHILD; i++) {
        pid[i] = fork();
        assert_true(pid[i] >= 0);
        if (pid[i] == 0) {
            close(go[1]);
            char x;
            if (read(go[0], &x, 1) != 0)
                _exit(3);
            /* Each round removes the entry and recomputes it, so the
             * writers overlap again and again. */
            int bad = 0;
            for (int r = 0; r < ROUNDS; r++) {
                clef_coupling *c;
                char cmd[1200];
                snprintf(cmd, sizeof cmd, "rm -f %s/coupling-M-*.bin", dir);
                if (r % 2 == i % 2 && system(cmd) != 0)
                    bad = 1;
                if (clef_coupling_create_cached(&c, L, wl, 2 * L, dir, NULL) != CLEF_OK)
                    bad = 1;
                clef_coupling_destroy(c);
            }
            _exit(bad);
        }
    }
    close(go[0]);
    close(go[1]); /* releases all children at once */
    for (int i = 0; i < NCHILD; i++) {
        int st;
        assert_int_equal(waitpid(pid[i], &st, 0), pid[i]);
        assert_true(WIFEXITED(st) && WEXITSTATUS(st) == 0);
    }
    /* Either the last writer's file or nothing (a child removed it last);
     * never a temporary file, and a present file is valid. */
    const size_t nfiles = count_files(dir);
    assert_true(nfiles <= 1);
    int hit;
    clef_coupling *c, *ref;
    warnings[0] = '\0';
    clef_set_log(capture_log, NULL);
    assert_int_equal(clef_coupling_create_cached(&c, L, wl, 2 * L, dir, &hit), CLEF_OK);
    clef_set_log(NULL, NULL);
    assert_string_equal(warnings, "");
    assert_int_equal(hit, nfiles == 1);
    assert_int_equal(clef_coupling_create(&ref, L, wl, 2 * L), CLEF_OK);
    assert_same_matrix(c, ref);
    assert_int_equal(count_files(dir), 1);
    clef_coupling_destroy(c);
    clef_coupling_destroy(ref);
}

static void test_cache_dir(void **state)
{
    (void)state;
    char buf[4096];
    char *saved[3];
    const char *names[3] = {"CLEF_CACHE_DIR", "XDG_CACHE_HOME", "HOME"};
    for (int i = 0; i < 3; i++) {
        const char *v = getenv(names[i]);
        saved[i] = v ? strdup(v) : NULL;
    }
    setenv("CLEF_CACHE_DIR", "/tmp/c1", 1);
    setenv("XDG_CACHE_HOME", "/tmp/x", 1);
    setenv("HOME", "/tmp/h", 1);
    assert_int_equal(clef_coupling_cache_dir("/tmp/arg", buf, sizeof buf), CLEF_OK);
    assert_string_equal(buf, "/tmp/arg");
    assert_int_equal(clef_coupling_cache_dir(NULL, buf, sizeof buf), CLEF_OK);
    assert_string_equal(buf, "/tmp/c1");
    unsetenv("CLEF_CACHE_DIR");
    assert_int_equal(clef_coupling_cache_dir("", buf, sizeof buf), CLEF_OK);
    assert_string_equal(buf, "/tmp/x/clef");
    unsetenv("XDG_CACHE_HOME");
    assert_int_equal(clef_coupling_cache_dir(NULL, buf, sizeof buf), CLEF_OK);
    assert_string_equal(buf, "/tmp/h/.cache/clef");
    unsetenv("HOME");
    assert_int_equal(clef_coupling_cache_dir(NULL, buf, sizeof buf), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "CLEF_CACHE_DIR"));
    assert_int_equal(clef_coupling_cache_dir("/tmp/arg", buf, 4), CLEF_EINVAL);
    for (int i = 0; i < 3; i++) {
        if (saved[i])
            setenv(names[i], saved[i], 1);
        free(saved[i]);
    }
}

/* ---- masked Gaussian skies ---- */

/* Cosine-tapered polar cap: 1 for theta < t1, 0 for theta > t2,
 * (1 + cos(pi (theta - t1)/(t2 - t1)))/2 between (common practice). */
static double taper(double theta, double t1, double t2)
{
    if (theta <= t1)
        return 1.0;
    if (theta >= t2)
        return 0.0;
    return 0.5 * (1.0 + cos(M_PI * (theta - t1) / (t2 - t1)));
}

/* The mean pseudo-spectrum of masked Gaussian realisations equals M C_l
 * (Hivon et al. 2002 eq. for <C~_l>, METHODS.md section 4).  C_l is 1 on
 * even l and 0 on odd l up to lin, so the coupling visibly moves power
 * into odd l: the naive w2 C_l prediction must fail the same test. */
/* Cache size limit: sizes parsed as documented (powers of 1024, common
 * practice for memory and file sizes); after a store the folder is brought
 * under the limit least recently used first, a hit refreshes an entry, the
 * entry just stored and files that are not entries are never removed, and
 * an entry larger than the limit is not stored. */
static void set_age(const char *path, time_t age)
{
    struct timespec ts[2];
    clock_gettime(CLOCK_REALTIME, &ts[0]);
    ts[0].tv_sec -= age;
    ts[1] = ts[0];
    assert_int_equal(utimensat(AT_FDCWD, path, ts, 0), 0);
}

static void test_cache_limit(void **state)
{
    (void)state;
    long long b;
    assert_int_equal(clef_cache_parse_size("500M", &b), CLEF_OK);
    assert_true(b == 500LL << 20);
    assert_int_equal(clef_cache_parse_size("1.5G", &b), CLEF_OK);
    assert_true(b == 3LL << 29);
    assert_int_equal(clef_cache_parse_size("4GiB", &b), CLEF_OK);
    assert_true(b == 4LL << 30);
    assert_int_equal(clef_cache_parse_size("123", &b), CLEF_OK);
    assert_true(b == 123);
    assert_int_equal(clef_cache_parse_size("0", &b), CLEF_OK);
    assert_true(b == 0);
    assert_int_equal(clef_cache_parse_size("12X", &b), CLEF_EINVAL);
    assert_int_equal(clef_cache_parse_size("-1G", &b), CLEF_EINVAL);
    assert_int_equal(clef_cache_parse_size("", &b), CLEF_EINVAL);
    unsetenv("CLEF_CACHE_LIMIT");
    clef_cache_set_limit(-1);
    assert_true(clef_cache_limit() == 4LL << 30);
    setenv("CLEF_CACHE_LIMIT", "2M", 1);
    assert_true(clef_cache_limit() == 2LL << 20);
    clef_cache_set_limit(1000);
    assert_true(clef_cache_limit() == 1000);

    /* Three real entries (M at lmax 40, 60, 80: 13.6, 29.5, 52.2 kB). */
    const char *dir = test_path("cache-limit");
    clef_cache_set_limit(0);
    const int ls[3] = {40, 60, 80};
    static double wl[161];
    cap_wl(0.3, 160, wl);
    for (int i = 0; i < 3; i++) {
        clef_coupling *c;
        int hit;
        assert_int_equal(clef_coupling_create_cached(&c, ls[i], wl, 2 * ls[i], dir, &hit), CLEF_OK);
        clef_coupling_destroy(c);
    }
    char names[3][4200];
    DIR *d = opendir(dir);
    assert_non_null(d);
    struct dirent *e;
    int n = 0;
    long long sizes[3];
    while ((e = readdir(d)))
        if (e->d_name[0] != '.') {
            assert_true(n < 3);
            snprintf(names[n], sizeof names[n], "%s/%s", dir, e->d_name);
            n++;
        }
    closedir(d);
    assert_int_equal(n, 3);
    /* order them by size = by lmax */
    for (int i = 0; i < 3; i++) {
        struct stat st;
        assert_int_equal(stat(names[i], &st), 0);
        sizes[i] = st.st_size;
    }
    for (int i = 0; i < 3; i++)
        for (int j = i + 1; j < 3; j++)
            if (sizes[j] < sizes[i]) {
                char tmp[4200];
                long long s = sizes[i];
                sizes[i] = sizes[j];
                sizes[j] = s;
                memcpy(tmp, names[i], sizeof tmp);
                memcpy(names[i], names[j], sizeof tmp);
                memcpy(names[j], tmp, sizeof tmp);
            }
    /* ages: lmax 40 oldest, then 80, then 60; a file that is not an entry */
    set_age(names[0], 300);
    set_age(names[2], 200);
    set_age(names[1], 100);
    char other[4300];
    snprintf(other, sizeof other, "%s/notes.bin", dir);
    FILE *f = fopen(other, "w");
    fputs("not an entry", f);
    fclose(f);
    set_age(other, 1000);
    /* a hit on the oldest (lmax 40) makes it the youngest */
    clef_coupling *c;
    int hit = 0;
    assert_int_equal(clef_coupling_create_cached(&c, 40, wl, 80, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 1);
    clef_coupling_destroy(c);
    /* limit just below the total: the least recently used (lmax 80) goes */
    const long long total = sizes[0] + sizes[1] + sizes[2];
    assert_int_equal(clef_cache_prune(dir, total - 1, NULL), 1);
    assert_false(file_exists(names[2]));
    assert_true(file_exists(names[0]) && file_exists(names[1]) && file_exists(other));
    /* a limit below everything keeps `keep` */
    assert_int_equal(clef_cache_prune(dir, 1, names[1]), 1);
    assert_true(file_exists(names[1]) && !file_exists(names[0]) && file_exists(other));
    /* a store prunes: limit = the lmax-40 entry alone; storing it removes
     * the lmax-60 entry and keeps the new one */
    clef_cache_set_limit(sizes[0]);
    assert_int_equal(clef_coupling_create_cached(&c, 40, wl, 80, dir, &hit), CLEF_OK);
    assert_int_equal(hit, 0);
    clef_coupling_destroy(c);
    assert_true(file_exists(names[0]) && !file_exists(names[1]));
    /* an entry larger than the limit is not stored */
    clef_cache_set_limit(1000);
    assert_int_equal(clef_coupling_create_cached(&c, 60, wl, 120, dir, &hit), CLEF_OK);
    clef_coupling_destroy(c);
    assert_false(file_exists(names[1]));
    clef_cache_set_limit(-1);
    unsetenv("CLEF_CACHE_LIMIT");
}

static void test_masked_gaussian_skies(void **state)
{
    (void)state;
    const int nside = 32, lin = 40, lmax = 2 * lin, iters = 1;
    const int nreal = test_sanitize() ? 60 : 400;
    /* one plan for the mask (W_l to 2 lin), a cheaper one for the skies */
    clef_sht *pw, *p;
    assert_int_equal(clef_sht_create(&pw, nside, lmax, NULL), CLEF_OK);
    assert_int_equal(clef_sht_create(&p, nside, lin, NULL), CLEF_OK);
    const int64_t npix = 12 * (int64_t)nside * nside;
    const size_t nalm = clef_alm_size(lmax, lmax), nin = clef_alm_size(lin, lin);
    double *mask = malloc((size_t)npix * sizeof *mask), *map = malloc((size_t)npix * sizeof *map);
    double complex *alm = malloc(nin * sizeof *alm), *out = malloc(nalm * sizeof *out);
    double *cl_in = calloc((size_t)lmax + 1, sizeof *cl_in), *pcl = malloc((lmax + 1) * sizeof *pcl);
    double *sum = calloc((size_t)lmax + 1, sizeof *sum), *sum2 = calloc((size_t)lmax + 1, sizeof *sum2);
    double *wl = malloc(((size_t)lmax + 1) * sizeof *wl), *pred = malloc((lmax + 1) * sizeof *pred);
    assert_true(mask && map && alm && out && cl_in && pcl && sum && sum2 && wl && pred);
    double w2 = 0;
    for (int64_t i = 0; i < npix; i++) {
        double theta, phi;
        pix2ang_ring(nside, i, &theta, &phi);
        mask[i] = taper(theta, 50 * M_PI / 180, 90 * M_PI / 180);
        w2 += mask[i] * mask[i] / (double)npix;
    }
    /* W_l from the transform of the mask, to 2 lin (METHODS.md section 4) */
    assert_int_equal(clef_sht_analysis(pw, 1, (const double *const *)&mask, &out, 3), CLEF_OK);
    assert_int_equal(clef_alm_cl(lmax, lmax, out, NULL, wl), CLEF_OK);
    clef_sht_destroy(pw);
    for (int l = 2; l <= lin; l += 2)
        cl_in[l] = 1.0;
    clef_coupling *c;
    assert_int_equal(clef_coupling_create(&c, lin, wl, lmax), CLEF_OK);
    clef_coupling_apply(c, cl_in, pred);

    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 2002);
    /* Transforms this small gain nothing from threads, and on a shared,
     * busy machine every parallel region waits for a descheduled thread. */
    const int nthreads = omp_get_max_threads();
    omp_set_num_threads(1);
    for (int k = 0; k < nreal; k++) {
        /* a_l0 ~ N(0, C_l); Re, Im a_lm ~ N(0, C_l/2) for m > 0 */
        for (int m = 0; m <= lin; m++)
            for (int l = m; l <= lin; l++) {
                const double s = sqrt(cl_in[l]);
                const size_t i = clef_alm_index(lin, l, m);
                if (m == 0)
                    alm[i] = s * gsl_ran_gaussian(r, 1.0);
                else
                    alm[i] = s * M_SQRT1_2 *
                             (gsl_ran_gaussian(r, 1.0) + I * gsl_ran_gaussian(r, 1.0));
            }
        assert_int_equal(clef_sht_synthesis(p, 1, (const double complex *const *)&alm, &map),
                         CLEF_OK);
        for (int64_t i = 0; i < npix; i++)
            map[i] *= mask[i];
        assert_int_equal(clef_sht_analysis(p, 1, (const double *const *)&map, &out, iters),
                         CLEF_OK);
        assert_int_equal(clef_alm_cl(lin, lin, out, NULL, pcl), CLEF_OK);
        for (int l = 0; l <= lin; l++) {
            sum[l] += pcl[l];
            sum2[l] += pcl[l] * pcl[l];
        }
    }
    omp_set_num_threads(nthreads);
    /* Per l: |mean - (M C)_l| within 4 standard errors of the ensemble;
     * the naive w2 C_l must be rejected at many odd l. */
    int naive_bad = 0;
    double chi2 = 0;
    for (int l = 2; l <= lin; l++) {
        const double mean = sum[l] / nreal;
        const double var = (sum2[l] - nreal * mean * mean) / (nreal - 1);
        const double se = sqrt(var / nreal);
        const double z = (mean - pred[l]) / se;
        chi2 += z * z;
        if (fabs(z) > 4)
            fail_msg("l = %d: mean pseudo-C_l %.6g, M C %.6g, %.1f standard errors apart "
                     "(Hivon et al. 2002)", l, mean, pred[l], z);
        if (fabs(mean - w2 * cl_in[l]) > 4 * se)
            naive_bad++;
    }
    /* chi^2 over lin - 1 multipoles (correlated, so only a loose bound) */
    if (getenv("CLEF_TEST_VERBOSE"))
        printf("masked skies: chi2 %.1f over %d l, naive rejected at %d l\n", chi2, lin - 1,
               naive_bad);
    assert_true(chi2 < 3 * (lin - 1));
    assert_true(naive_bad > (lin - 1) / 3);
    gsl_rng_free(r);
    clef_coupling_destroy(c);
    clef_sht_destroy(p);
    free(mask);
    free(map);
    free(alm);
    free(out);
    free(cl_in);
    free(pcl);
    free(sum);
    free(sum2);
    free(wl);
    free(pred);
}
int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_cache_concurrent_writers),
        cmocka_unit_test(test_full_sky_identity),
        cmocka_unit_test(test_rows_in_parts),
        cmocka_unit_test(test_hemisphere),
        cmocka_unit_test(test_row_sums_and_symmetry),
        cmocka_unit_test(test_vs_direct_sum),
        cmocka_unit_test(test_kernels),
        cmocka_unit_test(test_binned_recovers_band_powers),
        cmocka_unit_test(test_ill_conditioned),
        cmocka_unit_test(test_singular_and_errors),
        cmocka_unit_test(test_progress),
        cmocka_unit_test(test_cache_hit_and_keys),
        cmocka_unit_test(test_cache_corrupt_and_mismatch),
        cmocka_unit_test(test_cache_dir),
        cmocka_unit_test(test_cache_limit),
        cmocka_unit_test(test_masked_gaussian_skies),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
