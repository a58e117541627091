/* Private interface of the cosmology module: work-space versions of the
 * distance integrals, for callers that evaluate many parameter sets (the
 * theory spectrum, the curvature inference).  Not installed. */
#ifndef CLEF_COSMO_IMPL_H
#define CLEF_COSMO_IMPL_H

#include <gsl/gsl_integration.h>

#include "clef/cosmo.h"

/* One integration work space; one per thread. */
typedef struct clef_cosmo_work {
    gsl_integration_workspace *ws;
} clef_cosmo_work;

int clef_cosmo_work_alloc(clef_cosmo_work *w);
void clef_cosmo_work_free(clef_cosmo_work *w); /* safe on a zeroed or freed work space */

/* The following assume p passed clef_cosmo_check (d is its output) and
 * z >= 0. */
int clef_cosmo_sound_horizon_w(const clef_cosmo_params *p, const clef_cosmo_densities *d,
                               double z, clef_cosmo_work *w, double *rs);
int clef_cosmo_chi_w(const clef_cosmo_params *p, const clef_cosmo_densities *d, double z,
                     clef_cosmo_work *w, double *chi);
int clef_cosmo_eta_w(const clef_cosmo_params *p, const clef_cosmo_densities *d, double z,
                     clef_cosmo_work *w, double *eta);
int clef_cosmo_damping_w(const clef_cosmo_params *p, const clef_cosmo_densities *d, double z,
                         clef_cosmo_work *w, double *k_d);
int clef_cosmo_dm_from_chi(const clef_cosmo_params *p, double z, double chi, double *dm);
/* First-peak multipole l_1 = l_A (1 - phi_1) for many parameter sets:
 * no messages, no logging (safe in OpenMP loops).  p must have valid
 * ranges (omega_b > 0, omega_c >= 0, h > 0, ...).  Returns 0 and sets
 * *l1 (and *phi1 if not NULL); 1 if the model is unphysical (Omega_L < 0,
 * a bounce, z_* past the antipode); -1 if an integral failed. */
int clef_cosmo_peak_quiet(const clef_cosmo_params *p, clef_cosmo_work *w, double *l1,
                          double *phi1);
/* clef_cosmo_acoustic_scale on a caller's work space (checks p itself). */
int clef_cosmo_acoustic_w(const clef_cosmo_params *p, clef_cosmo_work *w, clef_cosmo_acoustic *a);

#endif
