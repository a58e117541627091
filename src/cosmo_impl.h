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
/* clef_cosmo_acoustic_scale on a caller's work space (checks p itself). */
int clef_cosmo_acoustic_w(const clef_cosmo_params *p, clef_cosmo_work *w, clef_cosmo_acoustic *a);

#endif
