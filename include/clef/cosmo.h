/* Background cosmology for interpreting the first acoustic peak: the
 * expansion rate H(z), the recombination redshift z_*, the comoving sound
 * horizon r_s(z_*), the comoving angular-diameter distance D_M(z_*), the
 * acoustic scale theta_* = r_s / D_M, l_A = pi / theta_* and the first-peak
 * multipole l_1 = l_A (1 - phi_1).
 *
 * Content of the model (docs/theory.md, docs/geometry.md):
 *   H(z) = H_0 sqrt(Omega_r (1+z)^4 + Omega_m (1+z)^3 + Omega_k (1+z)^2 + Omega_L)
 *   radiation = photons at T_cmb + N_eff massless neutrino species,
 *     omega_r = omega_gamma (1 + 0.22711 N_eff), 0.22711 = (7/8)(4/11)^(4/3);
 *   matter = baryons + cold dark matter + massive neutrinos counted as
 *     matter, omega_nu = sum m_nu / 93.14 eV (Lesgourgues & Pastor 2006,
 *     Phys. Rep. 429, 307);
 *   dark energy = a cosmological constant, Omega_L = 1 - Omega_m - Omega_r - Omega_k.
 * Distances are comoving, in Mpc.  Integrals are done by GSL's adaptive
 * Gauss-Kronrod integrator (gsl_integration_qag) to relative accuracy
 * CLEF_COSMO_EPSREL.
 *
 * Errors: every function validates the parameters (clef_cosmo_check) and
 * returns CLEF_EINVAL for unphysical ones; CLEF_ENUMERIC if an integral
 * does not converge; CLEF_ENOMEM.
 * Thread safety: all functions are reentrant.  The first integral switches
 * GSL's abort-on-error handler off process-wide (gsl_set_error_handler_off,
 * once, under pthread_once) because the library must never abort; a caller
 * relying on GSL's default handler elsewhere should know this.
 */
#ifndef CLEF_COSMO_H
#define CLEF_COSMO_H

#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

/* Relative accuracy asked of every distance integral. */
#define CLEF_COSMO_EPSREL 1e-9

/* Cosmological parameters.  All densities are physical (omega = Omega h^2)
 * except omega_k, which is the curvature density parameter Omega_k
 * (Omega_k > 0 open, < 0 closed). */
typedef struct clef_cosmo_params {
    double omega_b;   /* Omega_b h^2, baryons */
    double omega_c;   /* Omega_c h^2, cold dark matter */
    double h;         /* H_0 / (100 km/s/Mpc) */
    double omega_k;   /* Omega_k, curvature (dimensionless, NOT times h^2) */
    double n_s;       /* scalar spectral index */
    double ln10_as;   /* ln(10^10 A_s), primordial curvature amplitude at k = 0.05/Mpc */
    double tau;       /* optical depth to reionisation */
    double t_cmb;     /* CMB temperature today, K */
    double n_eff;     /* effective number of massless neutrino species */
    double m_nu;      /* sum of neutrino masses, eV, counted as matter */
    double y_he;      /* helium mass fraction (electron density for photon diffusion) */
} clef_cosmo_params;

/* Planck 2018 best fit (Planck Collaboration 2020, "Planck 2018 results VI.
 * Cosmological parameters", A&A 641, A6; TT,TE,EE+lowE+lensing, Table 2):
 * omega_b = 0.02237, omega_c = 0.1200, h = 0.6736, n_s = 0.9649,
 * ln(10^10 A_s) = 3.044, tau = 0.0544, flat (Omega_k = 0), N_eff = 3.046,
 * sum m_nu = 0.06 eV, Y_P = 0.2454; T_cmb = 2.7255 K (Fixsen 2009, ApJ 707,
 * 916).  Never fails. */
void clef_cosmo_params_planck2018(clef_cosmo_params *p);

/* Derived densities of a parameter set. */
typedef struct clef_cosmo_densities {
    double omega_gamma; /* photons, Omega_gamma h^2 */
    double omega_r;     /* radiation (photons + massless neutrinos), Omega_r h^2 */
    double omega_m;     /* matter (baryons + CDM + massive neutrinos), Omega_m h^2 */
    double Omega_r, Omega_m, Omega_k, Omega_lambda; /* density parameters today */
    double z_eq;        /* matter-radiation equality, 1 + z_eq = omega_m / omega_r */
} clef_cosmo_densities;

/* Check a parameter set: finite values, omega_b > 0, omega_c >= 0,
 * 0 < h <= 2, t_cmb > 0, n_eff >= 0, m_nu >= 0, 0 <= tau < 1,
 * 0 <= y_he < 1, Omega_L >= 0 (no negative dark-energy density), and
 * H^2 > 0 at every z >= 0 (no bounce).  Returns CLEF_OK or CLEF_EINVAL with
 * a message naming the parameter.  d may be NULL. */
int clef_cosmo_check(const clef_cosmo_params *p, clef_cosmo_densities *d);

/* H(z) in km/s/Mpc. */
int clef_cosmo_hubble(const clef_cosmo_params *p, double z, double *hz);

/* Recombination (last-scattering) redshift from the fit of Hu & Sugiyama
 * 1996, ApJ 471, 542, eq. (E1): z_* = 1048 [1 + 0.00124 omega_b^-0.738]
 * [1 + g1 omega_m^g2]. */
int clef_cosmo_zstar(const clef_cosmo_params *p, double *zstar);

/* Baryon loading R(z) = 3 rho_b / (4 rho_gamma) = 3 omega_b / (4 omega_gamma (1+z)). */
int clef_cosmo_baryon_loading(const clef_cosmo_params *p, double z, double *r);

/* Sound speed of the photon-baryon fluid in units of c:
 * c_s / c = 1 / sqrt(3 (1 + R(z))). */
int clef_cosmo_sound_speed(const clef_cosmo_params *p, double z, double *cs);

/* Comoving sound horizon r_s(z) = int_z^inf c_s dz' / H(z'), with
 * c_s = c / sqrt(3 (1 + R)), in Mpc. */
int clef_cosmo_sound_horizon(const clef_cosmo_params *p, double z, double *rs);

/* Line-of-sight comoving distance chi(z) = int_0^z c dz' / H(z'), Mpc. */
int clef_cosmo_comoving_distance(const clef_cosmo_params *p, double z, double *chi);

/* Transverse comoving distance D_M(z), Mpc: chi (flat),
 * (c/H_0) Omega_k^-1/2 sinh(sqrt(Omega_k) H_0 chi / c) (open),
 * (c/H_0) |Omega_k|^-1/2 sin(sqrt(|Omega_k|) H_0 chi / c) (closed).
 * CLEF_EINVAL in a closed universe when light from z has passed the
 * antipode (the sine argument exceeds pi), where D_M no longer gives an
 * angular scale. */
int clef_cosmo_transverse_distance(const clef_cosmo_params *p, double z, double *dm);

/* Conformal time elapsed from the big bang to redshift z, times c:
 * eta(z) = int_z^inf c dz' / H(z'), Mpc. */
int clef_cosmo_conformal_time(const clef_cosmo_params *p, double z, double *eta);

/* Photon-diffusion (Silk) damping wavenumber at redshift z, Mpc^-1:
 * k_D^-2 = int_0^eta(z) d eta / (6 (1 + R) n_e sigma_T a) [R^2 / (1 + R) + 16/15]
 * (Kaiser 1983, MNRAS 202, 1169, with the polarisation factor 16/15 of
 * Zaldarriaga & Harari 1995, PRD 52, 3276), for a fully ionised plasma of
 * hydrogen and helium, n_e = (1 - Y_He / 2) rho_b / m_p.  Full ionisation
 * up to z ignores the fall of the free-electron fraction during
 * recombination, so near z_* this underestimates the damping length. */
int clef_cosmo_damping_scale(const clef_cosmo_params *p, double z, double *k_d);

/* Everything the first peak depends on, at the Hu-Sugiyama z_*. */
typedef struct clef_cosmo_acoustic {
    double z_star;      /* last-scattering redshift (Hu & Sugiyama 1996 fit) */
    double r_s;         /* comoving sound horizon at z_*, Mpc */
    double d_m;         /* transverse comoving distance to z_*, Mpc */
    double eta_star;    /* conformal time at z_* (times c), Mpc */
    double hubble_star; /* H(z_*), km/s/Mpc */
    double theta_star;  /* r_s / D_M, radians */
    double l_a;         /* acoustic multipole pi / theta_* */
    double r_star;      /* rho_r / rho_m at z_* */
    double baryon_r;    /* baryon loading R(z_*) */
    double phi_1;       /* first-peak phase shift (Doran & Lilley 2002) */
    double l_1;         /* first-peak multipole l_A (1 - phi_1) */
} clef_cosmo_acoustic;

/* Fill *a for the parameter set. */
int clef_cosmo_acoustic_scale(const clef_cosmo_params *p, clef_cosmo_acoustic *a);

#ifdef __cplusplus
}
#endif
#endif
