/* Curvature inference from the first-peak multipole. */
#include "check.h"

#include <omp.h>

#include "clef/geometry.h"
#include "clef/peak.h"
#include "clef/theory.h"

/* Fewer prior samples under the sanitizer (10x slower). */
static int nsamp(int n) { return test_sanitize() ? n / 5 : n; }

static clef_geometry_opts defaults(double l, double err)
{
    clef_geometry_opts o;
    clef_geometry_opts_default(&o);
    o.l_peak = l;
    o.l_peak_err = err;
    o.nsamples = nsamp(1000);
    return o;
}

/* The parameters at the default prior means and a given Omega_k. */
static clef_cosmo_params prior_means(double omega_k)
{
    clef_geometry_opts o;
    clef_geometry_opts_default(&o);
    clef_cosmo_params p = o.base;
    p.omega_b = o.omega_b.mean;
    p.omega_c = o.omega_c.mean;
    p.h = o.h.mean;
    p.omega_k = omega_k;
    return p;
}

/* The model's l_1 at the default prior means and a given Omega_k. */
static double model_l1(double omega_k)
{
    const clef_cosmo_params p = prior_means(omega_k);
    clef_cosmo_acoustic a;
    assert_int_equal(clef_cosmo_acoustic_scale(&p, &a), CLEF_OK);
    return a.l_1;
}

static void test_round_trip(void **state)
{
    (void)state;
    /* A peak generated from a chosen Omega_k is recovered inside its 68%
     * interval, and the sign is classified. */
    const double truth[] = {-0.05, 0.05};
    for (int i = 0; i < 2; i++) {
        clef_geometry_opts o = defaults(model_l1(truth[i]), 1.0);
        clef_geometry_result *r;
        assert_int_equal(clef_geometry_infer(&o, &r), CLEF_OK);
        if (!(r->lo68 <= truth[i] && truth[i] <= r->hi68))
            fail_msg("Omega_k = %g not in 68%% interval [%g, %g]", truth[i], r->lo68, r->hi68);
        assert_true(r->lo95 <= r->lo68 && r->lo68 < r->best && r->best < r->hi68 && r->hi68 <= r->hi95);
        assert_int_equal(r->classification, truth[i] < 0 ? CLEF_GEOMETRY_CLOSED : CLEF_GEOMETRY_OPEN);
        assert_false(r->truncated);
        assert_int_equal(r->nsamples_valid, o.nsamples);
        clef_geometry_result_free(r);
    }
}

static void test_wmap_flat(void **state)
{
    (void)state;
    /* WMAP first peak l = 220.1 +- 0.8 (Page et al. 2003, ApJS 148, 233)
     * with the Planck-like default priors.  Expectation: flat within errors
     * (the flat model at the prior means gives l_1 = 221.1, 1 multipole
     * high, i.e. Omega_k ~ -0.003, well inside the ~0.01-wide 95% interval);
     * the acoustic spot 180/220.1 = 0.818 deg, "about one degree" (common
     * practice). */
    clef_geometry_opts o = defaults(220.1, 0.8);
    clef_geometry_result *r;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_OK);
    assert_int_equal(r->classification, CLEF_GEOMETRY_FLAT);
    assert_true(r->lo95 < 0 && r->hi95 > 0);
    check_abs(r->best, 0.0, 0.01, "Planck 2018 VI: Omega_K consistent with 0");
    check_rel(r->acoustic_scale_deg, 180.0 / 220.1, 1e-12, "180/l");
    assert_true(r->acoustic_scale_deg > 0.7 && r->acoustic_scale_deg < 1.0);
    /* theta_* = 1.04110e-2 rad = 0.5965 deg (Planck 2018 VI, METHODS.md s.8 [D]). */
    check_rel(r->theta_star_deg, 0.5965, 0.005, "Planck 2018 theta_* in degrees");
    check_rel(r->l1_flat, model_l1(0.0), 1e-12, "flat reference");
    /* Posterior normalised to peak 1, on an increasing grid. */
    double top = 0;
    for (int k = 0; k < r->n; k++) {
        assert_true(r->posterior[k] >= 0);
        top = fmax(top, r->posterior[k]);
        if (k)
            assert_true(r->omega_k[k] > r->omega_k[k - 1]);
    }
    check_rel(top, 1.0, 1e-15, "normalised to peak 1");
    check_abs(r->omega_k[0], -0.3, 1e-15, "grid start");
    check_abs(r->omega_k[r->n - 1], 0.3, 1e-15, "grid end");
    clef_geometry_result_free(r);
}

/* With every prior fixed and no model error, the posterior is the Gaussian
 * likelihood of one model: its mode is where l_1(Omega_k) = l_peak, found
 * here independently by bisection on clef_cosmo_acoustic_scale. */
static void test_fixed_priors(void **state)
{
    (void)state;
    const double lpk = 214.0;
    double a = -0.1, b = 0.0;
    for (int i = 0; i < 60; i++) {
        const double m = 0.5 * (a + b);
        if (model_l1(m) < lpk)
            a = m;
        else
            b = m;
    }
    const double root = 0.5 * (a + b);
    clef_geometry_opts o = defaults(lpk, 0.5);
    o.omega_b.sigma = o.omega_c.sigma = o.h.sigma = 0;
    o.model_err = 0;
    o.nsamples = 3;
    o.ngrid = 6001;
    clef_geometry_result *r;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_OK);
    check_abs(r->best, root, 2e-5, "bisection root of l_1(Omega_k) = l_peak");
    /* Near the root l_1 is linear in Omega_k, so the posterior is Gaussian
     * with sd = sigma_l / |dl_1/dOmega_k|. */
    const double slope = (model_l1(root + 1e-3) - model_l1(root - 1e-3)) / 2e-3;
    check_rel(r->sd, 0.5 / fabs(slope), 0.02, "Gaussian width");
    check_rel(r->hi68 - r->lo68, 2 * 0.5 / fabs(slope), 0.02, "68% width");
    clef_geometry_result_free(r);
}

static void test_reproducible(void **state)
{
    (void)state;
    clef_geometry_opts o = defaults(218.0, 1.5);
    o.nsamples = nsamp(500);
    clef_geometry_result *r1, *r2, *r3;
    omp_set_num_threads(1);
    assert_int_equal(clef_geometry_infer(&o, &r1), CLEF_OK);
    omp_set_num_threads(2);
    assert_int_equal(clef_geometry_infer(&o, &r2), CLEF_OK);
    for (int k = 0; k < r1->n; k++)
        assert_true(r1->posterior[k] == r2->posterior[k]);
    assert_true(r1->lo68 == r2->lo68 && r1->hi95 == r2->hi95);
    /* Another seed: a different Monte Carlo, the same answer within its noise. */
    o.seed = 7;
    assert_int_equal(clef_geometry_infer(&o, &r3), CLEF_OK);
    assert_true(r3->lo68 != r1->lo68);
    check_abs(r3->best, r1->best, 0.2 * r1->sd, "seed independence");
    /* Spline nodes: 21 (default) vs 101 give the same intervals. */
    clef_geometry_result *r4;
    o.seed = 1;
    o.nnodes = 101;
    assert_int_equal(clef_geometry_infer(&o, &r4), CLEF_OK);
    check_abs(r4->lo68, r1->lo68, 1e-4, "spline interpolation");
    check_abs(r4->hi95, r1->hi95, 1e-4, "spline interpolation");
    clef_geometry_result_free(r1);
    clef_geometry_result_free(r2);
    clef_geometry_result_free(r3);
    clef_geometry_result_free(r4);
}

static void test_edges_and_errors(void **state)
{
    (void)state;
    clef_geometry_result *r;
    /* A peak just beyond the grid's reach: posterior cut off by the edge. */
    clef_geometry_opts o = defaults(model_l1(-0.3) - 2.0, 1.0);
    o.nsamples = nsamp(200);
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_OK);
    assert_true(r->truncated);
    clef_geometry_result_free(r);
    /* Far out of reach: an error naming the model's range. */
    o = defaults(60, 1);
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_ENUMERIC);
    assert_null(r);
    assert_non_null(strstr(clef_last_error(), "out of reach"));

    o = defaults(0, 1);
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "l_peak"));
    o = defaults(220, 0);
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_EINVAL);
    o = defaults(220, 1);
    o.h.sigma = -1;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "prior on h"));
    o = defaults(220, 1);
    o.omega_b.mean = -0.02;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_EINVAL);
    o = defaults(220, 1);
    o.model_err = -0.1;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_EINVAL);
    o = defaults(220, 1);
    o.omega_k_min = 0.2;
    o.omega_k_max = 0.1;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_EINVAL);
    o = defaults(220, 1);
    o.ngrid = 5;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_EINVAL);
    o = defaults(220, 1);
    o.nsamples = 0;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_EINVAL);
    o = defaults(220, 1);
    o.nnodes = 2;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_EINVAL);
    assert_int_equal(clef_geometry_infer(NULL, &r), CLEF_EINVAL);
    assert_string_equal(clef_geometry_class_name(CLEF_GEOMETRY_CLOSED), "closed");
    assert_string_equal(clef_geometry_class_name(CLEF_GEOMETRY_FLAT), "flat");
    assert_string_equal(clef_geometry_class_name(CLEF_GEOMETRY_OPEN), "open");
    clef_geometry_result_free(NULL);
}


/* Top-hat band powers of the model at Omega_k (bins 20 wide from l = 2),
 * errors of cosmic variance on 60% of the sky. */
static clef_bandpowers *model_table(double omega_k)
{
    const clef_cosmo_params p = prior_means(omega_k);
    const int nb = 30, lmax = 601;
    double cl[602];
    assert_int_equal(clef_theory_cl(&p, lmax, cl), CLEF_OK);
    clef_bandpowers *bp = NULL;
    assert_int_equal(clef_bandpowers_alloc(&bp, nb, 0), CLEF_OK);
    for (int b = 0; b < nb; b++) {
        bp->l_lo[b] = 2 + 20 * b;
        bp->l_hi[b] = 21 + 20 * b;
        bp->l_eff[b] = 0.5 * (bp->l_lo[b] + bp->l_hi[b]);
        double s = 0;
        for (int l = bp->l_lo[b]; l <= bp->l_hi[b]; l++)
            s += l * (l + 1.0) * cl[l] / (2 * M_PI);
        bp->dl[b] = s / 20;
        bp->dl_err[b] = bp->dl[b] * sqrt(2.0 / ((2 * bp->l_eff[b] + 1) * 20 * 0.6));
    }
    return bp;
}

/* The forward model: its offset at Omega_k = 0 is exactly the estimator's
 * result on the model's own band powers minus the model's l_1; a noise-free
 * measurement made that way at Omega_k = -0.05 is recovered at -0.05 with
 * fixed priors (the offset cancels); plan + execute = infer, bit for bit. */
static void test_forward_model(void **state)
{
    (void)state;
    clef_bandpowers *flat = model_table(0), *closed = model_table(-0.05);
    clef_peak_opts po;
    clef_peak_opts_default(&po);
    clef_peak_result rf, rc;
    /* The forward model keeps the measurement's errors: the flat model's
     * band powers with the closed table's errors. */
    clef_bandpowers *mix = model_table(-0.05);
    memcpy(mix->dl, flat->dl, (size_t)mix->nbins * sizeof *mix->dl);
    assert_int_equal(clef_peak_find(mix, &po, &rf), CLEF_OK);
    clef_bandpowers_free(mix);
    assert_int_equal(clef_peak_find(closed, &po, &rc), CLEF_OK);
    assert_true(rf.found && rc.found);
    clef_geometry_opts o = defaults(rc.l_peak, 1.0);
    o.forward_table = closed;
    o.forward_peak = po;
    o.h.sigma = o.omega_b.sigma = o.omega_c.sigma = 0;
    o.model_err = 0;
    o.nsamples = 1;
    clef_geometry_result *r = NULL;
    assert_int_equal(clef_geometry_infer(&o, &r), CLEF_OK);
    print_message("forward offset at Omega_k = 0: %+.4f (estimator %.4f, model %.4f); nodes %+.3f "
                  "to %+.3f; closed input %.4f -> Omega_k %.5f\n", r->forward_offset, rf.l_peak,
                  model_l1(0), r->forward_offset_min, r->forward_offset_max, rc.l_peak, r->best);
    assert_true(r->forward);
    check_abs(r->forward_offset, rf.l_peak - model_l1(0), 1e-6,
              "estimator on the model's band powers (same bins, errors, settings)");
    check_abs(r->l1_flat_forward, rf.l_peak, 1e-6, "estimator on the flat model");
    /* Recovered Omega_k: the node spline is accurate to ~1e-4 (docs/geometry.md). */
    check_abs(r->best, -0.05, 5e-4, "forward-modelled closed input");
    clef_geometry_result_free(r);

    o = defaults(221.0, 3.0);
    o.forward_table = flat;
    o.forward_peak = po;
    clef_geometry_result *a = NULL, *b = NULL;
    assert_int_equal(clef_geometry_infer(&o, &a), CLEF_OK);
    clef_geometry_plan *pl = NULL;
    assert_int_equal(clef_geometry_plan_create(&pl, &o), CLEF_OK);
    assert_int_equal(clef_geometry_plan_execute(pl, 221.0, 3.0, &b), CLEF_OK);
    assert_int_equal(clef_geometry_plan_execute(pl, -1, 3.0, &r), CLEF_EINVAL);
    clef_geometry_plan_destroy(pl);
    for (int k = 0; k < a->n; k++)
        assert_true(a->posterior[k] == b->posterior[k]);
    assert_true(a->best == b->best && a->hi95 == b->hi95);
    clef_geometry_result_free(a);
    clef_geometry_result_free(b);
    clef_bandpowers_free(flat);
    clef_bandpowers_free(closed);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_round_trip),
        cmocka_unit_test(test_wmap_flat),
        cmocka_unit_test(test_fixed_priors),
        cmocka_unit_test(test_reproducible),
        cmocka_unit_test(test_edges_and_errors),
        cmocka_unit_test(test_forward_model),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
