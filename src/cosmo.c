/* Background cosmology: expansion rate, recombination redshift, sound
 * horizon, distances and the acoustic scale (see include/clef/cosmo.h and
 * docs/theory.md for the equations and their sources). */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE
#include "cosmo_impl.h"

#include <math.h>
#include <pthread.h>
#include <stdlib.h>

#include <gsl/gsl_const_mksa.h>
#include <gsl/gsl_errno.h>
#include <gsl/gsl_integration.h>

#include "core_impl.h"

/* Speed of light in km/s. */
#define C_KMS (GSL_CONST_MKSA_SPEED_OF_LIGHT / 1000.0)
/* Newton's constant, CODATA 2018 (m^3 kg^-1 s^-2); GSL ships an older value. */
#define G_NEWTON 6.67430e-11
/* One megaparsec in metres. */
#define MPC_M (1e6 * GSL_CONST_MKSA_PARSEC)
/* Rounding allowance of the closure relation for Omega_L. */
#define OMEGA_ROUNDING 1e-12
/* Sub-intervals of the adaptive integrator's workspace. */
#define WS_INTERVALS 512

void clef_cosmo_params_planck2018(clef_cosmo_params *p)
{
    /* Planck 2018 VI, A&A 641, A6, Table 2 (TT,TE,EE+lowE+lensing). */
    p->omega_b = 0.02237;
    p->omega_c = 0.1200;
    p->h = 0.6736;
    p->omega_k = 0.0;
    p->n_s = 0.9649;
    p->ln10_as = 3.044;
    p->tau = 0.0544;
    p->n_eff = 3.046;
    p->m_nu = 0.06;
    p->y_he = 0.2454;
    /* Fixsen 2009, ApJ 707, 916. */
    p->t_cmb = 2.7255;
}

/* omega_gamma = rho_gamma / (rho_crit / h^2), with rho_gamma = 4 sigma_SB
 * T^4 / c^3 and rho_crit / h^2 = 3 (100 km/s/Mpc)^2 / (8 pi G).  Gives
 * 2.4728e-5 at T = 2.7255 K (METHODS.md section 8: 2.473e-5). */
static double rho_crit_100(void)
{
    const double h100 = 1e5 / MPC_M; /* 100 km/s/Mpc in 1/s */
    return 3.0 * h100 * h100 / (8.0 * M_PI * G_NEWTON);
}

static double omega_gamma_of(double t_cmb)
{
    const double c = GSL_CONST_MKSA_SPEED_OF_LIGHT;
    const double rho_crit = rho_crit_100();
    const double rho_gamma = 4.0 * GSL_CONST_MKSA_STEFAN_BOLTZMANN_CONSTANT * pow(t_cmb, 4) / (c * c * c);
    return rho_gamma / rho_crit;
}

static void densities_of(const clef_cosmo_params *p, clef_cosmo_densities *d)
{
    const double h2 = p->h * p->h;
    d->omega_gamma = omega_gamma_of(p->t_cmb);
    /* (7/8)(4/11)^(4/3) = 0.22711 per massless neutrino species. */
    d->omega_r = d->omega_gamma * (1.0 + 0.22711 * p->n_eff);
    /* Lesgourgues & Pastor 2006: omega_nu = sum m_nu / 93.14 eV. */
    d->omega_m = p->omega_b + p->omega_c + p->m_nu / 93.14;
    d->Omega_r = d->omega_r / h2;
    d->Omega_m = d->omega_m / h2;
    d->Omega_k = p->omega_k;
    d->Omega_lambda = 1.0 - d->Omega_m - d->Omega_r - d->Omega_k;
    /* A closure that is zero up to rounding (Omega_L = 0 asked for by
     * setting Omega_k = 1 - Omega_m - Omega_r) counts as exactly zero. */
    if (d->Omega_lambda < 0 && d->Omega_lambda > -OMEGA_ROUNDING)
        d->Omega_lambda = 0.0;
    d->z_eq = d->omega_m / d->omega_r - 1.0;
}

static int finite_all(const clef_cosmo_params *p)
{
    return isfinite(p->omega_b) && isfinite(p->omega_c) && isfinite(p->h) &&
           isfinite(p->omega_k) && isfinite(p->n_s) && isfinite(p->ln10_as) &&
           isfinite(p->tau) && isfinite(p->t_cmb) && isfinite(p->n_eff) &&
           isfinite(p->m_nu) && isfinite(p->y_he);
}

/* E^2(x) = Omega_r x^4 + Omega_m x^3 + Omega_k x^2 + Omega_L, x = 1 + z,
 * equals 1 at x = 1 and grows without bound; it can dip below zero only at
 * its minimum, the positive root of 4 Omega_r x^2 + 3 Omega_m x + 2 Omega_k
 * = 0 (written in the cancellation-free form).  Returns 1 if H^2 <= 0 at
 * some z >= 0 and sets *z_at. */
static int bounces(const clef_cosmo_densities *d, double *z_at)
{
    if (d->Omega_k >= 0)
        return 0;
    const double x = -4.0 * d->Omega_k /
                     (3.0 * d->Omega_m + sqrt(9.0 * d->Omega_m * d->Omega_m - 32.0 * d->Omega_r * d->Omega_k));
    const double e2 = ((d->Omega_r * x + d->Omega_m) * x + d->Omega_k) * x * x + d->Omega_lambda;
    *z_at = x - 1;
    return x > 1 && !(e2 > 0);
}

int clef_cosmo_check(const clef_cosmo_params *p, clef_cosmo_densities *dout)
{
    if (!p)
        CLEF_FAIL(CLEF_EINVAL, "cosmological parameters: NULL pointer");
    if (!finite_all(p))
        CLEF_FAIL(CLEF_EINVAL, "cosmological parameters: a value is not finite");
    if (!(p->omega_b > 0))
        CLEF_FAIL(CLEF_EINVAL, "omega_b = %g: the baryon density must be > 0", p->omega_b);
    if (!(p->omega_c >= 0))
        CLEF_FAIL(CLEF_EINVAL, "omega_c = %g: the dark-matter density must be >= 0", p->omega_c);
    if (!(p->h > 0 && p->h <= 2))
        CLEF_FAIL(CLEF_EINVAL, "h = %g: must be in (0, 2]", p->h);
    if (!(p->t_cmb > 0))
        CLEF_FAIL(CLEF_EINVAL, "T_cmb = %g K: must be > 0", p->t_cmb);
    if (!(p->n_eff >= 0))
        CLEF_FAIL(CLEF_EINVAL, "N_eff = %g: must be >= 0", p->n_eff);
    if (!(p->m_nu >= 0))
        CLEF_FAIL(CLEF_EINVAL, "sum m_nu = %g eV: must be >= 0", p->m_nu);
    if (!(p->tau >= 0 && p->tau < 1))
        CLEF_FAIL(CLEF_EINVAL, "tau = %g: must be in [0, 1)", p->tau);
    if (!(p->y_he >= 0 && p->y_he < 1))
        CLEF_FAIL(CLEF_EINVAL, "Y_He = %g: must be in [0, 1)", p->y_he);
    clef_cosmo_densities d;
    densities_of(p, &d);
    if (d.Omega_lambda < 0)
        CLEF_FAIL(CLEF_EINVAL,
                  "Omega_k = %g with Omega_m = %g gives Omega_Lambda = %g < 0 "
                  "(negative dark-energy density)",
                  p->omega_k, d.Omega_m, d.Omega_lambda);
    double z_bounce;
    if (bounces(&d, &z_bounce))
        CLEF_FAIL(CLEF_EINVAL,
                  "Omega_k = %g, Omega_Lambda = %g: H^2 <= 0 at z = %g (a bouncing "
                  "universe, no big bang)",
                  d.Omega_k, d.Omega_lambda, z_bounce);
    if (dout)
        *dout = d;
    return CLEF_OK;
}

/* a^2 E(a) = sqrt(Omega_r + Omega_m a + Omega_k a^2 + Omega_L a^4): the
 * integrands in the scale factor are smooth down to a = 0. */
static double a2e(const clef_cosmo_densities *d, double a)
{
    return sqrt(d->Omega_r + a * (d->Omega_m + a * (d->Omega_k + a * a * d->Omega_lambda)));
}

enum integrand_kind { LIGHT, SOUND, DIFFUSION };

typedef struct integrand_data {
    const clef_cosmo_densities *d;
    double r0; /* R(a) = r0 a, zero for the light-travel integrals */
} integrand_data;

/* dchi / (c/H_0) = da / (a^2 E), times c_s / c = 1 / sqrt(3 (1 + R)) for the
 * sound horizon. */
static double f_light(double a, void *data)
{
    const integrand_data *q = data;
    return 1.0 / a2e(q->d, a);
}

static double f_sound(double a, void *data)
{
    const integrand_data *q = data;
    return 1.0 / (a2e(q->d, a) * sqrt(3.0 * (1.0 + q->r0 * a)));
}

static void handler_off(void) { gsl_set_error_handler_off(); }

/* k_D^-2 integrand in a, without the constant (c/H_0) / (n_e0 sigma_T):
 * d eta / (n_e sigma_T a) = (c/H_0) a^2 da / (n_e0 sigma_T a^2 E) with
 * n_e = n_e0 a^-3, so the integrand is a^2 g(R) / (a^2 E(a)). */
static double f_diffusion(double a, void *data)
{
    const integrand_data *q = data;
    const double r = q->r0 * a;
    const double g = (r * r / (1.0 + r) + 16.0 / 15.0) / (6.0 * (1.0 + r));
    return a * a * g / a2e(q->d, a);
}

/* The integral itself: returns GSL's status, records nothing. */
static int integrate_raw(const clef_cosmo_densities *d, double r0, int kind, double a_lo,
                         double a_hi, clef_cosmo_work *w, double *out)
{
    /* GSL's default handler aborts; the library must return errors. */
    static pthread_once_t once = PTHREAD_ONCE_INIT;
    pthread_once(&once, handler_off);
    integrand_data q = {d, r0};
    gsl_function f = {kind == SOUND ? f_sound : kind == DIFFUSION ? f_diffusion : f_light, &q};
    double err;
    return gsl_integration_qag(&f, a_lo, a_hi, 0.0, CLEF_COSMO_EPSREL, WS_INTERVALS,
                               GSL_INTEG_GAUSS21, w->ws, out, &err);
}

static int cosmo_integrate(const clef_cosmo_densities *d, double r0, int kind, double a_lo,
                           double a_hi, clef_cosmo_work *w, double *out)
{
    const int gs = integrate_raw(d, r0, kind, a_lo, a_hi, w, out);
    if (gs != GSL_SUCCESS)
        CLEF_FAIL(CLEF_ENUMERIC, "distance integral over a in [%g, %g] did not converge: %s",
                  a_lo, a_hi, gsl_strerror(gs));
    return CLEF_OK;
}

int clef_cosmo_work_alloc(clef_cosmo_work *w)
{
    w->ws = gsl_integration_workspace_alloc(WS_INTERVALS);
    if (!w->ws)
        CLEF_FAIL(CLEF_ENOMEM, "cannot allocate the integration workspace");
    return CLEF_OK;
}

void clef_cosmo_work_free(clef_cosmo_work *w)
{
    if (w && w->ws) {
        gsl_integration_workspace_free(w->ws);
        w->ws = NULL;
    }
}

static int check_z(double z)
{
    if (!(z >= 0 && isfinite(z)))
        CLEF_FAIL(CLEF_EINVAL, "redshift z = %g: must be finite and >= 0", z);
    return CLEF_OK;
}

static double hubble_distance(const clef_cosmo_params *p) { return C_KMS / (100.0 * p->h); }

int clef_cosmo_hubble(const clef_cosmo_params *p, double z, double *hz)
{
    clef_cosmo_densities d;
    CLEF_TRY(clef_cosmo_check(p, &d));
    CLEF_TRY(check_z(z));
    const double x = 1.0 + z;
    *hz = 100.0 * p->h * x * x * a2e(&d, 1.0 / x);
    return CLEF_OK;
}

static double zstar_hs96(double omega_b, double omega_m)
{
    /* Hu & Sugiyama 1996, ApJ 471, 542, eq. (E1)-(E2). */
    const double g1 = 0.0783 * pow(omega_b, -0.238) / (1.0 + 39.5 * pow(omega_b, 0.763));
    const double g2 = 0.560 / (1.0 + 21.1 * pow(omega_b, 1.81));
    return 1048.0 * (1.0 + 0.00124 * pow(omega_b, -0.738)) * (1.0 + g1 * pow(omega_m, g2));
}

int clef_cosmo_zstar(const clef_cosmo_params *p, double *zstar)
{
    clef_cosmo_densities d;
    CLEF_TRY(clef_cosmo_check(p, &d));
    *zstar = zstar_hs96(p->omega_b, d.omega_m);
    return CLEF_OK;
}

int clef_cosmo_baryon_loading(const clef_cosmo_params *p, double z, double *r)
{
    clef_cosmo_densities d;
    CLEF_TRY(clef_cosmo_check(p, &d));
    CLEF_TRY(check_z(z));
    *r = 3.0 * p->omega_b / (4.0 * d.omega_gamma * (1.0 + z));
    return CLEF_OK;
}

int clef_cosmo_sound_speed(const clef_cosmo_params *p, double z, double *cs)
{
    double r;
    CLEF_TRY(clef_cosmo_baryon_loading(p, z, &r));
    *cs = 1.0 / sqrt(3.0 * (1.0 + r));
    return CLEF_OK;
}

/* The work-space versions behind the public calls: p already checked. */
int clef_cosmo_sound_horizon_w(const clef_cosmo_params *p, const clef_cosmo_densities *d,
                               double z, clef_cosmo_work *w, double *rs)
{
    const double r0 = 3.0 * p->omega_b / (4.0 * d->omega_gamma);
    double v;
    CLEF_TRY(cosmo_integrate(d, r0, SOUND, 0.0, 1.0 / (1.0 + z), w, &v));
    *rs = hubble_distance(p) * v;
    return CLEF_OK;
}

int clef_cosmo_chi_w(const clef_cosmo_params *p, const clef_cosmo_densities *d, double z,
                     clef_cosmo_work *w, double *chi)
{
    double v = 0;
    if (z > 0)
        CLEF_TRY(cosmo_integrate(d, 0.0, LIGHT, 1.0 / (1.0 + z), 1.0, w, &v));
    *chi = hubble_distance(p) * v;
    return CLEF_OK;
}

int clef_cosmo_eta_w(const clef_cosmo_params *p, const clef_cosmo_densities *d, double z,
                     clef_cosmo_work *w, double *eta)
{
    double v;
    CLEF_TRY(cosmo_integrate(d, 0.0, LIGHT, 0.0, 1.0 / (1.0 + z), w, &v));
    *eta = hubble_distance(p) * v;
    return CLEF_OK;
}

int clef_cosmo_damping_w(const clef_cosmo_params *p, const clef_cosmo_densities *d, double z,
                         clef_cosmo_work *w, double *k_d)
{
    const double r0 = 3.0 * p->omega_b / (4.0 * d->omega_gamma);
    /* Comoving electron density today, m^-3. */
    const double n_e0 = (1.0 - 0.5 * p->y_he) * p->omega_b * rho_crit_100() / GSL_CONST_MKSA_MASS_PROTON;
    const double mfp0 = 1.0 / (n_e0 * GSL_CONST_MKSA_THOMSON_CROSS_SECTION) / MPC_M; /* Mpc */
    double v;
    CLEF_TRY(cosmo_integrate(d, r0, DIFFUSION, 0.0, 1.0 / (1.0 + z), w, &v));
    *k_d = 1.0 / sqrt(hubble_distance(p) * mfp0 * v);
    return CLEF_OK;
}

int clef_cosmo_dm_from_chi(const clef_cosmo_params *p, double z, double chi, double *dm)
{
    const double dh = hubble_distance(p);
    const double ok = p->omega_k;
    if (ok == 0) {
        *dm = chi;
    } else if (ok > 0) {
        const double s = sqrt(ok);
        *dm = dh / s * sinh(s * chi / dh);
    } else {
        const double s = sqrt(-ok);
        const double arg = s * chi / dh;
        if (arg >= M_PI)
            CLEF_FAIL(CLEF_EINVAL,
                      "Omega_k = %g: light from z = %g has travelled %.3f pi radians round the "
                      "closed universe (past the antipode)",
                      ok, z, arg / M_PI);
        *dm = dh / s * sin(arg);
    }
    return CLEF_OK;
}

/* Run one work-space call on a fresh work space. */
#define WITH_WORK(call)                          \
    do {                                         \
        clef_cosmo_work w_;                      \
        CLEF_TRY(clef_cosmo_work_alloc(&w_));    \
        clef_cosmo_work *w = &w_;                \
        const int st_ = (call);                  \
        clef_cosmo_work_free(&w_);               \
        if (st_ != CLEF_OK)                      \
            return st_;                          \
    } while (0)

int clef_cosmo_sound_horizon(const clef_cosmo_params *p, double z, double *rs)
{
    clef_cosmo_densities d;
    CLEF_TRY(clef_cosmo_check(p, &d));
    CLEF_TRY(check_z(z));
    WITH_WORK(clef_cosmo_sound_horizon_w(p, &d, z, w, rs));
    return CLEF_OK;
}

int clef_cosmo_comoving_distance(const clef_cosmo_params *p, double z, double *chi)
{
    clef_cosmo_densities d;
    CLEF_TRY(clef_cosmo_check(p, &d));
    CLEF_TRY(check_z(z));
    WITH_WORK(clef_cosmo_chi_w(p, &d, z, w, chi));
    return CLEF_OK;
}

int clef_cosmo_damping_scale(const clef_cosmo_params *p, double z, double *k_d)
{
    clef_cosmo_densities d;
    CLEF_TRY(clef_cosmo_check(p, &d));
    CLEF_TRY(check_z(z));
    WITH_WORK(clef_cosmo_damping_w(p, &d, z, w, k_d));
    return CLEF_OK;
}

int clef_cosmo_transverse_distance(const clef_cosmo_params *p, double z, double *dm)
{
    double chi;
    CLEF_TRY(clef_cosmo_comoving_distance(p, z, &chi));
    return clef_cosmo_dm_from_chi(p, z, chi, dm);
}

int clef_cosmo_conformal_time(const clef_cosmo_params *p, double z, double *eta)
{
    clef_cosmo_densities d;
    CLEF_TRY(clef_cosmo_check(p, &d));
    CLEF_TRY(check_z(z));
    WITH_WORK(clef_cosmo_eta_w(p, &d, z, w, eta));
    return CLEF_OK;
}

/* First-peak phase shift of Doran & Lilley 2002, MNRAS 330, 965, in the
 * one-parameter power-law form phi_1 = 0.267 (r_* / 0.3)^0.1 with
 * r_* = rho_r / rho_m at z_* (METHODS.md section 8; from memory there). */
static double phase_shift(double r_star) { return 0.267 * pow(r_star / 0.3, 0.1); }

int clef_cosmo_peak_quiet(const clef_cosmo_params *p, clef_cosmo_work *w, double *l1,
                          double *phi1)
{
    clef_cosmo_densities d;
    densities_of(p, &d);
    double zb;
    if (d.Omega_lambda < 0 || bounces(&d, &zb))
        return 1;
    const double zs = zstar_hs96(p->omega_b, d.omega_m);
    const double as = 1.0 / (1.0 + zs);
    const double r0 = 3.0 * p->omega_b / (4.0 * d.omega_gamma);
    double rs, chi;
    if (integrate_raw(&d, r0, SOUND, 0.0, as, w, &rs) != GSL_SUCCESS ||
        integrate_raw(&d, 0.0, LIGHT, as, 1.0, w, &chi) != GSL_SUCCESS)
        return -1;
    double dm = chi; /* in units of c/H_0, as rs */
    if (d.Omega_k > 0) {
        dm = sinh(sqrt(d.Omega_k) * chi) / sqrt(d.Omega_k);
    } else if (d.Omega_k < 0) {
        const double arg = sqrt(-d.Omega_k) * chi;
        if (arg >= M_PI)
            return 1;
        dm = sin(arg) / sqrt(-d.Omega_k);
    }
    const double phi = phase_shift(d.omega_r * (1.0 + zs) / d.omega_m);
    *l1 = M_PI * dm / rs * (1.0 - phi);
    if (phi1)
        *phi1 = phi;
    return 0;
}

int clef_cosmo_acoustic_w(const clef_cosmo_params *p, clef_cosmo_work *w, clef_cosmo_acoustic *a)
{
    clef_cosmo_densities d;
    CLEF_TRY(clef_cosmo_check(p, &d));
    const double zs = zstar_hs96(p->omega_b, d.omega_m);
    double chi;
    a->z_star = zs;
    CLEF_TRY(clef_cosmo_sound_horizon_w(p, &d, zs, w, &a->r_s));
    CLEF_TRY(clef_cosmo_chi_w(p, &d, zs, w, &chi));
    CLEF_TRY(clef_cosmo_dm_from_chi(p, zs, chi, &a->d_m));
    CLEF_TRY(clef_cosmo_eta_w(p, &d, zs, w, &a->eta_star));
    const double x = 1.0 + zs;
    a->hubble_star = 100.0 * p->h * x * x * a2e(&d, 1.0 / x);
    a->theta_star = a->r_s / a->d_m;
    a->l_a = M_PI / a->theta_star;
    a->r_star = d.omega_r * x / d.omega_m;
    a->baryon_r = 3.0 * p->omega_b / (4.0 * d.omega_gamma * x);
    a->phi_1 = phase_shift(a->r_star);
    a->l_1 = a->l_a * (1.0 - a->phi_1);
    return CLEF_OK;
}

int clef_cosmo_acoustic_scale(const clef_cosmo_params *p, clef_cosmo_acoustic *a)
{
    CLEF_TRY(clef_cosmo_check(p, NULL));
    WITH_WORK(clef_cosmo_acoustic_w(p, w, a));
    return CLEF_OK;
}
