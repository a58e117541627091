/* Background cosmology: z_*, sound horizon, distances and the acoustic scale
 * against published values and closed-form solutions. */
#include "check.h"

#include "clef/cosmo.h"

/* c in km/s (SI definition of the metre). */
#define C_KMS 299792.458

static clef_cosmo_params planck(void)
{
    clef_cosmo_params p;
    clef_cosmo_params_planck2018(&p);
    return p;
}

/* A matter + curvature universe (no radiation to speak of, no Lambda):
 * T_cmb tiny so Omega_r ~ 1e-20, omega_b small, the rest CDM. */
static clef_cosmo_params matter_curvature(double omega_m_total, double h)
{
    clef_cosmo_params p = planck();
    p.t_cmb = 1e-5;
    p.n_eff = 0;
    p.m_nu = 0;
    p.h = h;
    p.omega_b = 1e-4 * omega_m_total * h * h;
    p.omega_c = omega_m_total * h * h - p.omega_b;
    clef_cosmo_densities d;
    p.omega_k = 1.0 - omega_m_total - 1e-3; /* provisional, to read Omega_r */
    assert_int_equal(clef_cosmo_check(&p, &d), CLEF_OK);
    p.omega_k = 1.0 - d.Omega_m - d.Omega_r; /* Omega_Lambda = 0 */
    return p;
}

/* Planck radiation and baryon fraction, total matter Omega_m, no Lambda
 * (curvature closes the budget). */
static clef_cosmo_params no_lambda(double omega_m_total, double h)
{
    clef_cosmo_params p = planck();
    const double fb = p.omega_b / (p.omega_b + p.omega_c);
    p.m_nu = 0;
    p.h = h;
    p.omega_b = fb * omega_m_total * h * h;
    p.omega_c = (1.0 - fb) * omega_m_total * h * h;
    clef_cosmo_densities d;
    p.omega_k = 1.0 - omega_m_total - 1e-3;
    assert_int_equal(clef_cosmo_check(&p, &d), CLEF_OK);
    p.omega_k = 1.0 - d.Omega_m - d.Omega_r;
    return p;
}

static void test_planck_densities(void **state)
{
    (void)state;
    clef_cosmo_params p = planck();
    clef_cosmo_densities d;
    assert_int_equal(clef_cosmo_check(&p, &d), CLEF_OK);
    /* omega_gamma = 2.473e-5 at T_0 = 2.7255 K: METHODS.md section 8 [M];
     * Fixsen 2009 temperature. */
    check_rel(d.omega_gamma, 2.473e-5, 1e-3, "METHODS.md s.8 omega_gamma");
    /* Omega_m = 0.3153 +- 0.0073: Planck 2018 VI Table 2 (TT,TE,EE+lowE+lensing). */
    check_abs(d.Omega_m, 0.3153, 0.0073, "Planck 2018 VI Table 2 Omega_m");
    check_abs(d.Omega_m + d.Omega_r + d.Omega_k + d.Omega_lambda, 1.0, 1e-14, "closure");
}

static void test_zstar(void **state)
{
    (void)state;
    clef_cosmo_params p = planck();
    double z;
    assert_int_equal(clef_cosmo_zstar(&p, &z), CLEF_OK);
    /* Planck 2018 VI Table 2: z_* = 1089.92 +- 0.25.  The Hu & Sugiyama 1996
     * fit is percent-level in its range (HS96 section 5, from memory); for
     * these parameters it gives 1091.9 (METHODS.md s.8 [D]), 0.2% high. */
    check_rel(z, 1089.92, 3e-3, "Planck 2018 VI z_* vs HS96 fit");
    check_rel(z, 1091.9, 1e-4, "METHODS.md s.8 [D] HS96 evaluation");
}

static void test_sound_horizon_distance(void **state)
{
    (void)state;
    clef_cosmo_params p = planck();
    const double zs = 1089.92; /* Planck 2018 VI Table 2 */
    double rs, dm, chi;
    assert_int_equal(clef_cosmo_sound_horizon(&p, zs, &rs), CLEF_OK);
    assert_int_equal(clef_cosmo_transverse_distance(&p, zs, &dm), CLEF_OK);
    assert_int_equal(clef_cosmo_comoving_distance(&p, zs, &chi), CLEF_OK);
    /* r_* = 144.43 +- 0.26 Mpc: Planck 2018 VI Table 2; tolerance 0.3%, the
     * accuracy of this simplified physics (METHODS.md s.8). */
    check_rel(rs, 144.43, 3e-3, "Planck 2018 VI r_*");
    /* D_M(z_*) = r_* / theta_* = 144.43 / 0.0104110 = 13873 Mpc (Planck 2018 VI). */
    check_rel(dm, 13873.0, 3e-3, "Planck 2018 VI r_*/theta_*");
    check_rel(dm, chi, 1e-15, "flat: D_M = chi");
}

static void test_acoustic_planck(void **state)
{
    (void)state;
    clef_cosmo_params p = planck();
    clef_cosmo_acoustic a;
    assert_int_equal(clef_cosmo_acoustic_scale(&p, &a), CLEF_OK);
    /* 100 theta_* = 1.04110 +- 0.00031: Planck 2018 VI Table 2; 0.3%. */
    check_rel(100 * a.theta_star, 1.04110, 3e-3, "Planck 2018 VI 100 theta_*");
    /* l_A = pi / theta_* = 301.76 (METHODS.md s.8 [D] from Planck's theta_*). */
    check_rel(a.l_a, 301.76, 3e-3, "l_A from Planck theta_*");
    /* Baryon loading R ~ 0.62 at z_* (METHODS.md s.10 [D]). */
    check_abs(a.baryon_r, 0.62, 0.01, "METHODS.md s.10 R(z_*)");
    /* c_s = c / sqrt(3 (1 + R)) ~ 0.45 c at z_* (R ~ 0.62), METHODS.md s.10 [D]. */
    double cs;
    assert_int_equal(clef_cosmo_sound_speed(&p, a.z_star, &cs), CLEF_OK);
    check_abs(cs, 0.45, 0.005, "METHODS.md s.10 sound speed at z_*");
    check_rel(cs, 1.0 / sqrt(3.0 * (1.0 + a.baryon_r)), 1e-15, "c_s from R");
    /* Without baryons c_s -> c / sqrt(3) = 0.577 c (METHODS.md s.10 [D]). */
    assert_int_equal(clef_cosmo_sound_speed(&p, 1e12, &cs), CLEF_OK);
    check_rel(cs, 1.0 / sqrt(3.0), 1e-9, "radiation-fluid sound speed");
    /* r_* = rho_r / rho_m ~ 0.32 and phi_1 ~ 0.269 (METHODS.md s.8 [D]). */
    check_abs(a.r_star, 0.32, 0.01, "METHODS.md s.8 r_*");
    check_abs(a.phi_1, 0.269, 0.002, "METHODS.md s.8 phi_1");
    /* First peak l = 220.1 +- 0.8 measured by WMAP (Page et al. 2003, ApJS
     * 148, 233): "a few percent" = 3%. */
    check_rel(a.l_1, 220.1, 0.03, "Page et al. 2003 first peak");
    /* Acoustic spot 180 deg / l_1 ~ 0.8 deg, "about one degree" (common practice). */
    const double deg = 180.0 / a.l_1;
    assert_true(deg > 0.7 && deg < 1.0);
}

static void test_curvature_shifts(void **state)
{
    (void)state;
    /* At fixed omega_b, omega_c, h: METHODS.md s.8 [D]: Omega_k = -0.05 gives
     * l_A = 281.3, +0.05 gives 323.0 (flat 302.4). */
    const double ok[] = {-0.05, 0.05};
    const double la_ref[] = {281.3, 323.0};
    clef_cosmo_acoustic flat, a;
    clef_cosmo_params p = planck();
    assert_int_equal(clef_cosmo_acoustic_scale(&p, &flat), CLEF_OK);
    for (int i = 0; i < 2; i++) {
        p.omega_k = ok[i];
        assert_int_equal(clef_cosmo_acoustic_scale(&p, &a), CLEF_OK);
        check_rel(a.l_a, la_ref[i], 2e-3, "METHODS.md s.8 [D] l_A(Omega_k)");
        /* Closed (Omega_k < 0) moves the peak down, open up (common practice). */
        if (ok[i] < 0)
            assert_true(a.l_1 < flat.l_1);
        else
            assert_true(a.l_1 > flat.l_1);
    }
    /* The rule l_1 ~ 220 Omega_tot^-1/2 (Kamionkowski, Spergel & Sugiyama
     * 1994, ApJ 426, L57: CDM models without Lambda; common practice): ratio
     * to the Omega_tot = 1 model within 5%. */
    clef_cosmo_params q = no_lambda(1.0, 0.6736);
    clef_cosmo_acoustic one;
    assert_int_equal(clef_cosmo_acoustic_scale(&q, &one), CLEF_OK);
    const double om[] = {0.3, 0.5, 0.8, 1.2, 1.3};
    for (int i = 0; i < 5; i++) {
        q = no_lambda(om[i], 0.6736);
        assert_int_equal(clef_cosmo_acoustic_scale(&q, &a), CLEF_OK);
        check_rel(a.l_1 / one.l_1, 1.0 / sqrt(om[i]), 0.05, "KSS94 l_1 ~ Omega^-1/2");
    }
}

/* Einstein-de Sitter: chi(z) = 2 c / H_0 (1 - 1/sqrt(1+z)) (any cosmology
 * textbook, e.g. Peebles 1993 eq. 13.29; the Omega_m = 1 Mattig relation). */
static void test_eds(void **state)
{
    (void)state;
    clef_cosmo_params p = matter_curvature(1.0, 0.7);
    const double zs[] = {0.5, 3.0, 1089.0};
    for (int i = 0; i < 3; i++) {
        double dm;
        assert_int_equal(clef_cosmo_transverse_distance(&p, zs[i], &dm), CLEF_OK);
        const double ref = 2.0 * C_KMS / 70.0 * (1.0 - 1.0 / sqrt(1.0 + zs[i]));
        check_rel(dm, ref, 1e-7, "EdS closed form");
    }
}

/* Matter + curvature: Mattig's relation (Mattig 1958, Astron. Nachr. 284,
 * 109), luminosity distance D_L = 2c / (H_0 Omega_m^2) [Omega_m z +
 * (Omega_m - 2) (sqrt(1 + Omega_m z) - 1)], D_M = D_L / (1+z), valid for
 * open and closed models without Lambda. */
static void test_mattig(void **state)
{
    (void)state;
    const double om[] = {0.3, 0.6, 1.5, 2.0};
    const double zs[] = {1.0, 10.0, 1089.0};
    for (int i = 0; i < 4; i++)
        for (int j = 0; j < 3; j++) {
            clef_cosmo_params p = matter_curvature(om[i], 0.7);
            double dm;
            const double z = zs[j];
            assert_int_equal(clef_cosmo_transverse_distance(&p, z, &dm), CLEF_OK);
            const double ref = 2.0 * C_KMS / 70.0 / (om[i] * om[i] * (1.0 + z)) *
                               (om[i] * z + (om[i] - 2.0) * (sqrt(1.0 + om[i] * z) - 1.0));
            check_rel(dm, ref, 1e-6, "Mattig relation");
        }
}

static void test_hubble(void **state)
{
    (void)state;
    clef_cosmo_params p = planck();
    double hz;
    assert_int_equal(clef_cosmo_hubble(&p, 0.0, &hz), CLEF_OK);
    check_rel(hz, 67.36, 1e-14, "H(0) = H_0");
    /* Deep in radiation domination H = H_0 sqrt(Omega_r) (1+z)^2. */
    clef_cosmo_densities d;
    assert_int_equal(clef_cosmo_check(&p, &d), CLEF_OK);
    assert_int_equal(clef_cosmo_hubble(&p, 1e8, &hz), CLEF_OK);
    check_rel(hz, 67.36 * sqrt(d.Omega_r) * 1e16, 1e-3, "radiation era");
    /* Sound speed limit: r_s at very high z approaches c/sqrt(3) times the
     * conformal time (R -> 0). */
    double rs, eta;
    assert_int_equal(clef_cosmo_sound_horizon(&p, 1e7, &rs), CLEF_OK);
    assert_int_equal(clef_cosmo_conformal_time(&p, 1e7, &eta), CLEF_OK);
    check_rel(rs, eta / sqrt(3.0), 1e-3, "c_s -> c/sqrt(3)");
    double kd;
    assert_int_equal(clef_cosmo_damping_scale(&p, 1089.92, &kd), CLEF_OK);
    /* Silk scale at last scattering of order 0.1-0.3 / Mpc (common practice). */
    assert_true(kd > 0.1 && kd < 0.3);
}

static void test_errors(void **state)
{
    (void)state;
    clef_cosmo_params p = planck();
    double v;
    clef_cosmo_acoustic a;
    p.omega_b = -0.01;
    assert_int_equal(clef_cosmo_zstar(&p, &v), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "omega_b"));
    p = planck();
    p.omega_c = -1;
    assert_int_equal(clef_cosmo_acoustic_scale(&p, &a), CLEF_EINVAL);
    p = planck();
    p.h = 0;
    assert_int_equal(clef_cosmo_hubble(&p, 0, &v), CLEF_EINVAL);
    p = planck();
    p.t_cmb = 0;
    assert_int_equal(clef_cosmo_check(&p, NULL), CLEF_EINVAL);
    p = planck();
    p.n_eff = -1;
    assert_int_equal(clef_cosmo_check(&p, NULL), CLEF_EINVAL);
    p = planck();
    p.m_nu = -1;
    assert_int_equal(clef_cosmo_check(&p, NULL), CLEF_EINVAL);
    p = planck();
    p.tau = 1.5;
    assert_int_equal(clef_cosmo_check(&p, NULL), CLEF_EINVAL);
    p = planck();
    p.y_he = -0.1;
    assert_int_equal(clef_cosmo_check(&p, NULL), CLEF_EINVAL);
    p = planck();
    p.h = NAN;
    assert_int_equal(clef_cosmo_check(&p, NULL), CLEF_EINVAL);
    assert_int_equal(clef_cosmo_check(NULL, NULL), CLEF_EINVAL);
    /* Negative dark energy: Omega_k = 0.8 with Omega_m = 0.315. */
    p = planck();
    p.omega_k = 0.8;
    assert_int_equal(clef_cosmo_check(&p, NULL), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "Omega_Lambda"));
    /* A bounce: low matter, strongly closed, large Lambda: E^2(x) ~
     * 0.1 x^3 - 2 x^2 + 2.9 < 0 near x = 13. */
    p = planck();
    p.omega_c = 0.1 * p.h * p.h - p.omega_b - p.m_nu / 93.14;
    p.omega_k = -2.0;
    assert_int_equal(clef_cosmo_check(&p, NULL), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "H^2 <= 0"));
    /* Past the antipode: Omega_m = 0.3, Omega_k = -1, Omega_L ~ 1.7 nearly
     * loiters at z ~ 1.2, so light from z_* wraps past the antipode. */
    p = planck();
    p.omega_c = 0.3 * p.h * p.h - p.omega_b - p.m_nu / 93.14;
    p.omega_k = -1.0;
    assert_int_equal(clef_cosmo_check(&p, NULL), CLEF_OK);
    assert_int_equal(clef_cosmo_transverse_distance(&p, 1089.0, &v), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "antipode"));
    /* Bad redshift. */
    p = planck();
    assert_int_equal(clef_cosmo_sound_horizon(&p, -1.0, &v), CLEF_EINVAL);
    assert_int_equal(clef_cosmo_comoving_distance(&p, INFINITY, &v), CLEF_EINVAL);
    assert_int_equal(clef_cosmo_baryon_loading(&p, -2.0, &v), CLEF_EINVAL);
    assert_int_equal(clef_cosmo_sound_speed(&p, -2.0, &v), CLEF_EINVAL);
    assert_int_equal(clef_cosmo_damping_scale(&p, NAN, &v), CLEF_EINVAL);
    assert_int_equal(clef_cosmo_conformal_time(&p, -3.0, &v), CLEF_EINVAL);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_planck_densities),
        cmocka_unit_test(test_zstar),
        cmocka_unit_test(test_sound_horizon_distance),
        cmocka_unit_test(test_acoustic_planck),
        cmocka_unit_test(test_curvature_shifts),
        cmocka_unit_test(test_eds),
        cmocka_unit_test(test_mattig),
        cmocka_unit_test(test_hubble),
        cmocka_unit_test(test_errors),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
