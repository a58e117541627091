/* Bin schemes, bin-edge files, and the binning operators P, Q of
 * Hivon et al. 2002 (ApJ 567, 2), METHODS.md section 4. */
#include "check.h"

#include "clef/bins.h"

static void write_text(const char *path, const char *text)
{
    FILE *f = fopen(path, "w");
    assert_non_null(f);
    fputs(text, f);
    fclose(f);
}

static void test_linear(void **state)
{
    (void)state;
    clef_bins *b;
    assert_int_equal(clef_bins_create_linear(&b, 2, 10, 100, CLEF_BINS_DL), CLEF_OK);
    /* 2..11, 12..21, ..., 92..100 (last one cut at lmax) */
    assert_int_equal(clef_bins_count(b), 10);
    assert_int_equal(clef_bins_l_lo(b, 0), 2);
    assert_int_equal(clef_bins_l_hi(b, 0), 11);
    assert_int_equal(clef_bins_l_lo(b, 9), 92);
    assert_int_equal(clef_bins_l_hi(b, 9), 100);
    assert_int_equal(clef_bins_lmax(b), 100);
    check_rel(clef_bins_l_eff(b, 0), 6.5, DBL_EPSILON, "mean of 2..11");
    assert_int_equal(clef_bins_weighting(b), CLEF_BINS_DL);
    clef_bins_destroy(b);
    clef_bins_destroy(NULL);
}

static void test_p_q(void **state)
{
    (void)state;
    clef_bins *b;
    assert_int_equal(clef_bins_create_linear(&b, 10, 5, 30, CLEF_BINS_DL), CLEF_OK);
    /* Hivon et al. 2002: P_bl = l(l+1)/(2 pi (l_{b+1}-l_b)), Q_lb = 2 pi/(l(l+1)) */
    check_rel(clef_bins_p(b, 0, 12), 12.0 * 13 / (2 * M_PI * 5), 4 * DBL_EPSILON, "Hivon 2002 P");
    check_rel(clef_bins_q(b, 0, 12), 2 * M_PI / (12.0 * 13), 4 * DBL_EPSILON, "Hivon 2002 Q");
    assert_true(clef_bins_p(b, 0, 15) == 0.0);
    assert_true(clef_bins_q(b, 1, 14) == 0.0);
    assert_true(clef_bins_p(b, 7, 14) == 0.0);
    /* P Q = identity on bins (each P row sums against its own Q to 1) */
    for (int i = 0; i < clef_bins_count(b); i++)
        for (int j = 0; j < clef_bins_count(b); j++) {
            double s = 0;
            for (int l = 0; l <= 30; l++)
                s += clef_bins_p(b, i, l) * clef_bins_q(b, j, l);
            check_abs(s, i == j ? 1.0 : 0.0, 8 * DBL_EPSILON, "P Q = I (Hivon 2002)");
        }
    /* A flat D_l = 1 (C_l = 2 pi / (l(l+1))) bins to exactly 1, and expands back. */
    double cl[31], band[5], back[31];
    for (int l = 0; l <= 30; l++)
        cl[l] = l ? 2 * M_PI / (l * (l + 1.0)) : 0;
    assert_int_equal(clef_bins_apply(b, cl, 30, band), CLEF_OK);
    for (int i = 0; i < 5; i++)
        check_rel(band[i], 1.0, 8 * DBL_EPSILON, "binned constant D_l");
    assert_int_equal(clef_bins_expand(b, band, 30, back), CLEF_OK);
    for (int l = 10; l <= 30; l++)
        check_rel(back[l], cl[l], 8 * DBL_EPSILON, "Q expands a band back to C_l");
    assert_true(back[9] == 0.0);
    assert_int_equal(clef_bins_apply(b, cl, 20, band), CLEF_EINVAL);
    clef_bins_destroy(b);

    /* Flat weighting: P = 1/n_b, Q = 1 (common practice) */
    assert_int_equal(clef_bins_create_linear(&b, 10, 5, 30, CLEF_BINS_FLAT), CLEF_OK);
    check_rel(clef_bins_p(b, 1, 16), 0.2, DBL_EPSILON, "flat P");
    check_rel(clef_bins_q(b, 1, 16), 1.0, DBL_EPSILON, "flat Q");
    clef_bins_destroy(b);
}

static void test_log(void **state)
{
    (void)state;
    clef_bins *b;
    assert_int_equal(clef_bins_create_log(&b, 2, 1023, 9, CLEF_BINS_FLAT), CLEF_OK);
    /* edges 2 * 512^(i/9) = 2, 4, 8, ..., 1024: powers of two */
    assert_int_equal(clef_bins_count(b), 9);
    for (int i = 0; i < 9; i++) {
        assert_int_equal(clef_bins_l_lo(b, i), 2 << i);
        assert_int_equal(clef_bins_l_hi(b, i), (4 << i) - 1);
    }
    clef_bins_destroy(b);
    /* Many bins at low l: rounding would repeat edges; every bin stays non-empty. */
    assert_int_equal(clef_bins_create_log(&b, 2, 40, 30, CLEF_BINS_DL), CLEF_OK);
    assert_int_equal(clef_bins_count(b), 30);
    assert_int_equal(clef_bins_lmax(b), 40);
    for (int i = 1; i < 30; i++)
        assert_int_equal(clef_bins_l_lo(b, i), clef_bins_l_hi(b, i - 1) + 1);
    clef_bins_destroy(b);
    assert_int_equal(clef_bins_create_log(&b, 2, 10, 10, CLEF_BINS_DL), CLEF_EINVAL);
    assert_null(b);

    /* By ratio 2 from 2: 2-3, 4-7, 8-15, 16-31, 32-50 (cut at lmax 50) */
    assert_int_equal(clef_bins_create_log_ratio(&b, 2, 50, 2.0, CLEF_BINS_DL), CLEF_OK);
    assert_int_equal(clef_bins_count(b), 5);
    assert_int_equal(clef_bins_l_lo(b, 4), 32);
    assert_int_equal(clef_bins_l_hi(b, 4), 50);
    clef_bins_destroy(b);
    assert_int_equal(clef_bins_create_log_ratio(&b, 2, 50, 1.0, CLEF_BINS_DL), CLEF_EINVAL);
}

static void test_file(void **state)
{
    (void)state;
    clef_bins *b;
    const char *p = test_path("pairs.txt");
    write_text(p, "# l_lo l_hi\n2 9\n\n10 29   # second\n40 60\n");
    assert_int_equal(clef_bins_read(&b, p, 100, CLEF_BINS_DL), CLEF_OK);
    assert_int_equal(clef_bins_count(b), 3);
    assert_int_equal(clef_bins_l_lo(b, 2), 40);
    assert_int_equal(clef_bins_l_hi(b, 2), 60);
    clef_bins_destroy(b);

    p = test_path("edges.txt");
    write_text(p, "2\n10\n30\n# end\n101\n");
    assert_int_equal(clef_bins_read(&b, p, 100, CLEF_BINS_FLAT), CLEF_OK);
    assert_int_equal(clef_bins_count(b), 3);
    assert_int_equal(clef_bins_l_hi(b, 0), 9);
    assert_int_equal(clef_bins_l_lo(b, 2), 30);
    assert_int_equal(clef_bins_l_hi(b, 2), 100);
    clef_bins_destroy(b);
}

/* Every error path of the file reader names the file and the line. */
static void test_file_errors(void **state)
{
    (void)state;
    clef_bins *b;
    struct {
        const char *text, *want;
    } bad[] = {
        {"2 9\n10 x\n", "line 2"},
        {"2 9\n10 20 30\n", "line 2"},
        {"2 9\n10\n", "line 2"},
        {"2 9\n9 20\n", "line 2: bin overlaps"},
        {"1 9\n", "line 1: bins must start at l >= 2"},
        {"# c\n2 9\n20 10\n", "line 3: l_hi is below l_lo"},
        {"2\n5\n5\n", "line 3: edges must increase"},
        {"2 9\n10 200\n", "line 2: bin extends beyond lmax"},
        {"# nothing\n", "defines no bin"},
        {"7\n", "needs at least two"},
    };
    for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++) {
        const char *p = test_path("bad.txt");
        write_text(p, bad[i].text);
        assert_int_equal(clef_bins_read(&b, p, 100, CLEF_BINS_DL), CLEF_EFORMAT);
        assert_null(b);
        if (!strstr(clef_last_error(), bad[i].want) || !strstr(clef_last_error(), p))
            fail_msg("case %zu: message '%s' lacks '%s' or the file name", i, clef_last_error(),
                     bad[i].want);
    }
    assert_int_equal(clef_bins_read(&b, test_path("missing.txt"), 100, 0), CLEF_EIO);
    assert_non_null(strstr(clef_last_error(), "missing.txt"));
    assert_int_equal(clef_bins_read(&b, test_path("pairs.txt"), 100, 7), CLEF_EINVAL);
}

static void test_create_errors(void **state)
{
    (void)state;
    clef_bins *b;
    assert_int_equal(clef_bins_create_linear(&b, 2, 0, 100, 0), CLEF_EINVAL);
    assert_int_equal(clef_bins_create_linear(&b, 1, 10, 100, 0), CLEF_EINVAL);
    assert_int_equal(clef_bins_create_linear(&b, 50, 10, 40, 0), CLEF_EINVAL);
    assert_int_equal(clef_bins_create_linear(&b, 2, 10, 40, 3), CLEF_EINVAL);
    assert_null(b);
    const int lo[] = {2, 10}, hi[] = {12, 20};
    assert_int_equal(clef_bins_create_ranges(&b, 2, lo, hi, 0), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "bin 1"));
    assert_int_equal(clef_bins_create_ranges(&b, 0, lo, hi, 0), CLEF_EINVAL);
    assert_int_equal(clef_bins_create_ranges(&b, 1, NULL, hi, 0), CLEF_EINVAL);
    const int lo2[] = {2, 30}, hi2[] = {12, 20};
    assert_int_equal(clef_bins_create_ranges(&b, 2, lo2, hi2, 0), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "empty"));
    double x[3];
    assert_int_equal(clef_bins_expand(NULL, x, 2, x), CLEF_EINVAL);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_linear),      cmocka_unit_test(test_p_q),
        cmocka_unit_test(test_log),         cmocka_unit_test(test_file),
        cmocka_unit_test(test_file_errors), cmocka_unit_test(test_create_errors),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
