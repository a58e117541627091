/* Analytic CMB temperature spectrum: Mukhanov's closed-form approximation
 * joined to a Sachs-Wolfe plateau (include/clef/theory.h, docs/theory.md). */
#include "clef/theory.h"

#include <math.h>
#include <stdlib.h>

#include "core_impl.h"
#include "cosmo_impl.h"

/* Pivot scale of A_s and n_s (Planck 2018 VI convention), Mpc^-1. */
#define K_PIVOT 0.05
/* Normalisation of the acoustic part: D_l = NORM_K A_s T^2 (O + N) ...
 * NORM_K was fixed once so that the Planck 2018 best-fit parameters
 * (clef_cosmo_params_planck2018) give a first-peak height of 5580 uK^2,
 * the WMAP measurement 74.7 uK (Page et al. 2003, ApJS 148, 233); the
 * normalisation then follows A_s linearly.  (Mukhanov's B in terms of A_s
 * was not available to us; see docs/theory.md.) */
#define NORM_K 0.56012
/* The Sachs-Wolfe plateau and the acoustic formula are joined by the weight
 * w = 1 / (1 + (l / l_b)^4), l_b = JOIN_FRAC l_1: the closed form is an
 * asymptotic expansion valid well above the plateau (it diverges as
 * l -> 0), the plateau formula only at l << l_1. */
#define JOIN_FRAC 0.25
/* Convergence of the oscillation-scale calibration (relative, in l). */
#define PEAK_RTOL 1e-7

typedef struct model {
    double xi;        /* baryon loading at z_* */
    double varrho;    /* oscillation scale used (varrho_eff) */
    double lf, ls;    /* damping multipoles */
    double p_scale;   /* P = ln(p_scale l) */
    double lpiv;      /* pivot multipole k_pivot D_M */
    double amp;       /* A_s T^2, uK^2 */
    double ns, tau;
    double l_join;
} model;

/* l(l+1) C_l / 2pi of Mukhanov's closed form (Mukhanov 2005, eqs.
 * 9.95-9.99; coefficients as in METHODS.md section 9), in units of
 * NORM_K A_s T^2, without tilt and reionisation. */
static double mukhanov_on(const model *m, double l)
{
    const double xi = m->xi;
    const double P = log(m->p_scale * l);
    const double lf = l / m->lf, ls = l / m->ls;
    const double a1 = 0.1 * xi * ((P - 0.78) * (P - 0.78) - 4.3) / pow(1.0 + xi, 0.25);
    const double a2 = 0.14 * (0.5 + 0.36 * P) * (0.5 + 0.36 * P) / sqrt(1.0 + xi);
    /* A1 carries exp(+(l_S^-2 - l_f^-2) l^2 / 2) and O the overall
     * exp(-(l/l_S)^2): combined here so neither overflows at large l. */
    const double e1 = exp(-0.5 * (ls * ls + lf * lf));
    const double e2 = exp(-ls * ls);
    const double x = m->varrho * l;
    const double o = sqrt(M_PI / x) * (a1 * e1 * cos(x + M_PI_4) + a2 * e2 * cos(2.0 * x + M_PI_4));
    const double n1 = P - 0.22 * pow(lf, 0.3) - 2.6;
    const double n2 = P - 0.22 * pow(ls, 0.3) + 1.7;
    const double n3 = P - 0.5 * pow(ls, 0.55) + 2.2;
    const double n = 0.063 * xi * xi * n1 * n1 * exp(-lf * lf) / (1.0 + 0.65 * pow(lf, 1.4)) +
                     0.037 / sqrt(1.0 + xi) * n2 * n2 * e2 / (1.0 + 0.65 * pow(ls, 1.4)) +
                     0.033 / pow(1.0 + xi, 1.5) * n3 * n3 * e2 / (1.0 + 2.0 * ls * ls);
    return o + n;
}

/* The full model D_l (uK^2) at real l >= 2. */
static double model_dl(const model *m, double l)
{
    const double tilt = pow(l / m->lpiv, m->ns - 1.0);
    /* Sachs-Wolfe plateau for a scale-invariant spectrum: D_l = A_s T^2 / 25
     * (Sachs & Wolfe 1967; delta T / T = Phi / 3 = zeta / 5 in matter
     * domination). */
    const double sw = m->amp / 25.0 * tilt;
    /* Rescattering after reionisation damps the acoustic part by
     * exp(-2 tau) (common practice); the plateau is left undamped. */
    const double ac = NORM_K * m->amp * mukhanov_on(m, l) * tilt * exp(-2.0 * m->tau);
    const double q = l / m->l_join;
    const double w = 1.0 / (1.0 + q * q * q * q);
    const double d = w * sw + (1.0 - w) * ac;
    /* The closed form is a truncated expansion and nothing forbids O < -N
     * in principle; a power spectrum cannot be negative.  (Not reached for
     * the tested parameter range up to l = 8000.) */
    return d > 0 ? d : 0.0;
}

/* Maximum of the model's D_l over [lo, hi]: scan whole multipoles, then
 * golden-section refinement around the best one. */
static void find_max(const model *m, double lo, double hi, double *lpk, double *dpk)
{
    double best_l = lo, best_d = -1;
    for (double l = ceil(lo); l <= hi; l += 1.0) {
        const double d = model_dl(m, l);
        if (d > best_d) {
            best_d = d;
            best_l = l;
        }
    }
    const double g = 0.5 * (sqrt(5.0) - 1.0);
    double a = best_l - 1.0, b = best_l + 1.0;
    double c = b - g * (b - a), e = a + g * (b - a);
    double fc = model_dl(m, c), fe = model_dl(m, e);
    while (b - a > 1e-9 * best_l) {
        if (fc > fe) {
            b = e;
            e = c;
            fe = fc;
            c = b - g * (b - a);
            fc = model_dl(m, c);
        } else {
            a = c;
            c = e;
            fc = fe;
            e = a + g * (b - a);
            fe = model_dl(m, e);
        }
    }
    *lpk = 0.5 * (a + b);
    *dpk = model_dl(m, *lpk);
}

static void peak_window(const clef_theory_info *in, double *lo, double *hi)
{
    *lo = 0.5 * in->acoustic.l_1;
    *hi = 1.5 * in->acoustic.l_1;
}

/* Derive the scales, then calibrate the oscillation scale. */
static int build_model(const clef_cosmo_params *p, clef_theory_info *in, model *m)
{
    clef_cosmo_densities d;
    clef_cosmo_work w = {0};
    int status;
    CLEF_TRY(clef_cosmo_check(p, &d));
    CLEF_TRY(clef_cosmo_work_alloc(&w));
    clef_cosmo_acoustic *ac = &in->acoustic;
    CLEF_CHECK(clef_cosmo_acoustic_w(p, &w, ac));
    CLEF_CHECK(clef_cosmo_damping_w(p, &d, ac->z_star, &w, &in->k_damp));
    /* The transfer-function log P of Mukhanov is written for flat models:
     * P = ln(Omega_m^-0.09 l / (200 sqrt(Omega_m h_75^2))).  Curvature maps a
     * physical wavenumber k to l = k D_M, so we evaluate it at the flat
     * model's multipole l D_M(flat) / D_M. */
    clef_cosmo_params flat = *p;
    flat.omega_k = 0.0;
    /* With Omega_m + Omega_r > 1 no flat model with Lambda >= 0 has this h;
     * then take the flat one with the same physical densities and no Lambda
     * (h^2 = omega_m + omega_r), which joins continuously at the boundary. */
    if (d.Omega_m + d.Omega_r > 1.0)
        flat.h = sqrt(d.omega_m + d.omega_r);
    double chi_flat;
    clef_cosmo_densities dflat;
    CLEF_CHECK(clef_cosmo_check(&flat, &dflat));
    CLEF_CHECK(clef_cosmo_chi_w(&flat, &dflat, ac->z_star, &w, &chi_flat));
    clef_cosmo_work_free(&w);

    const double h75 = p->h / 0.75;
    m->p_scale = pow(d.Omega_m, -0.09) / (200.0 * sqrt(d.Omega_m * h75 * h75)) * chi_flat / ac->d_m;
    in->xi = ac->baryon_r;
    in->varrho = ac->theta_star;
    /* Width of last scattering in units of eta_*, Mukhanov 2005 section 9.7
     * (from memory): sigma = 1.49e-2 [1 + (1 + z_eq / z_*)^-1/2]; it
     * reproduces his concordance l_f ~ 1580.  Damping multipoles: l_f^-2 =
     * 2 sigma^2 (eta_* / D_M)^2, l_S^-2 = 2 (sigma^2 + (k_D eta_*)^-2)
     * (eta_* / D_M)^2, with D_M in place of his flat-space eta_0. */
    in->sigma_ls = 1.49e-2 * (1.0 + 1.0 / sqrt(1.0 + d.z_eq / ac->z_star));
    const double s_eta = in->sigma_ls * ac->eta_star;
    in->l_f = ac->d_m / (sqrt(2.0) * s_eta);
    in->l_s = ac->d_m / sqrt(2.0 * (s_eta * s_eta + 1.0 / (in->k_damp * in->k_damp)));
    in->l_pivot = K_PIVOT * ac->d_m;
    const double t_uk = p->t_cmb * 1e6;
    in->amplitude = exp(p->ln10_as) * 1e-10 * t_uk * t_uk;

    m->xi = in->xi;
    m->lf = in->l_f;
    m->ls = in->l_s;
    m->lpiv = in->l_pivot;
    m->amp = in->amplitude;
    m->ns = p->n_s;
    m->tau = p->tau;
    m->l_join = JOIN_FRAC * ac->l_1;
    /* Mukhanov's phases put the first maximum near varrho l = 3 pi / 4 plus
     * the pull of the slowly rising terms, about 8% above the peak of
     * Boltzmann-code spectra for Planck 2018 parameters.  The first-peak fit
     * of Doran & Lilley 2002, l_1 = l_A (1 - phi_1), is calibrated on such
     * codes, so we rescale the oscillation scale until the model's first
     * maximum sits at l_1 (fixed-point iteration; l_peak ~ 1 / varrho). */
    m->varrho = in->varrho;
    double lo, hi, lpk = 0, dpk;
    peak_window(in, &lo, &hi);
    for (int it = 0; it < 50; it++) {
        find_max(m, lo, hi, &lpk, &dpk);
        if (fabs(lpk / ac->l_1 - 1.0) < PEAK_RTOL)
            break;
        m->varrho *= lpk / ac->l_1;
    }
    if (!(fabs(lpk / ac->l_1 - 1.0) < 1e3 * PEAK_RTOL))
        CLEF_FAIL(CLEF_ENUMERIC,
                  "theory model: cannot place the first peak at l_1 = %.2f (model maximum at "
                  "%.2f); parameters too far from the model's range",
                  ac->l_1, lpk);
    in->varrho_eff = m->varrho;
    return CLEF_OK;
fail:
    clef_cosmo_work_free(&w);
    return status;
}

int clef_theory_info_get(const clef_cosmo_params *p, clef_theory_info *info)
{
    model m;
    return build_model(p, info, &m);
}

int clef_theory_cl(const clef_cosmo_params *p, int lmax, double *cl)
{
    if (lmax < 2 || lmax > CLEF_THEORY_LMAX_MAX)
        CLEF_FAIL(CLEF_EINVAL, "theory spectrum: lmax = %d must be in [2, %d]", lmax,
                  CLEF_THEORY_LMAX_MAX);
    if (!cl)
        CLEF_FAIL(CLEF_EINVAL, "theory spectrum: NULL output array");
    clef_theory_info in;
    model m;
    CLEF_TRY(build_model(p, &in, &m));
    cl[0] = cl[1] = 0.0;
    for (int l = 2; l <= lmax; l++)
        cl[l] = 2.0 * M_PI * model_dl(&m, l) / ((double)l * (l + 1.0));
    return CLEF_OK;
}

int clef_theory_first_peak(const clef_cosmo_params *p, double *l_peak, double *d_peak)
{
    clef_theory_info in;
    model m;
    CLEF_TRY(build_model(p, &in, &m));
    double lo, hi, lpk, dpk;
    peak_window(&in, &lo, &hi);
    find_max(&m, lo, hi, &lpk, &dpk);
    if (l_peak)
        *l_peak = lpk;
    if (d_peak)
        *d_peak = dpk;
    return CLEF_OK;
}
