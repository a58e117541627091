/* From the first acoustic peak to the curvature of space.
 *
 * Given a measured first-peak multipole l_peak +- sigma and Gaussian priors
 * on omega_b, omega_c and h, compute the posterior of Omega_k on a grid,
 * marginalised over the three nuisance parameters by seeded Monte Carlo
 * sampling of the priors.  The model for the peak is the Doran & Lilley
 * (2002) fit l_1 = l_A (1 - phi_1), l_A = pi D_M(z_*) / r_s(z_*)
 * (include/clef/cosmo.h).  The peak height is not used.  Method, defaults
 * and cautions: docs/geometry.md.
 *
 * One peak measures essentially one number, the angle theta_* = r_s / D_M;
 * curvature and the expansion rate trade off along a line of constant
 * theta_* (the geometric degeneracy), so the answer is only as good as the
 * prior on h.  Assumes standard radiation content and a cosmological
 * constant; approximate fitting formulas, not a Boltzmann solver.
 *
 * Thread safety: clef_geometry_infer may run in several threads at once;
 * it uses OpenMP inside (results do not depend on the thread count).
 */
#ifndef CLEF_GEOMETRY_H
#define CLEF_GEOMETRY_H

#include "clef/clef.h"
#include "clef/cosmo.h"
#include "clef/peak.h"
#include "clef/table.h"

#ifdef __cplusplus
extern "C" {
#endif

/* A Gaussian prior; sigma = 0 fixes the parameter at the mean. */
typedef struct clef_geometry_prior {
    double mean, sigma;
} clef_geometry_prior;

typedef struct clef_geometry_opts {
    double l_peak, l_peak_err;  /* the measurement (required; err > 0) */
    clef_geometry_prior omega_b; /* default 0.0224 +- 0.0002 */
    clef_geometry_prior omega_c; /* default 0.120 +- 0.002 */
    clef_geometry_prior h;       /* default 0.674 +- 0.010 */
    /* Fractional uncertainty of the l_1 model, added in quadrature to
     * l_peak_err (default CLEF_GEOMETRY_MODEL_ERR; docs/geometry.md). */
    double model_err;
    double omega_k_min, omega_k_max; /* grid range (default -0.3 .. 0.3) */
    int ngrid;                      /* grid points (default 1201, >= 11) */
    int nsamples;                   /* Monte Carlo samples of the priors (default 2000) */
    int nnodes;                     /* Omega_k nodes per sample, spline-interpolated (default 21) */
    unsigned long seed;             /* GSL mt19937 seed (default 1) */
    /* The remaining parameters (n_s, T_cmb, N_eff, m_nu, ...); default
     * Planck 2018.  omega_b, omega_c, h, omega_k are ignored. */
    clef_cosmo_params base;
    /* Forward model (docs/geometry.md): the band-power table the peak was
     * measured on (its bins, covariance and window functions; only read)
     * and the peak settings used.  The model's l_1 at each Omega_k node is
     * then what clef_peak_find reports on the model spectrum through those
     * windows, so the estimator's own offset from the true maximum cancels.
     * NULL: the model's maximum l_1 is compared with l_peak directly. */
    const clef_bandpowers *forward_table;
    clef_peak_opts forward_peak;
} clef_geometry_opts;

/* Default model error: 0.4% of l_1 (docs/geometry.md): the HS96 theta_*
 * differs from Planck's by 0.20%, and the first-peak phase shift is
 * checked only through WMAP's first peak to 0.36%; in quadrature. */
#define CLEF_GEOMETRY_MODEL_ERR 0.004

/* Defaults above; l_peak and l_peak_err are set to 0 (must be filled). */
void clef_geometry_opts_default(clef_geometry_opts *o);

enum clef_geometry_class {
    CLEF_GEOMETRY_CLOSED = -1, /* the whole 95% interval has Omega_k < 0 */
    CLEF_GEOMETRY_FLAT = 0,    /* the 95% interval contains Omega_k = 0 */
    CLEF_GEOMETRY_OPEN = 1     /* the whole 95% interval has Omega_k > 0 */
};

/* "closed", "flat" or "open". */
const char *clef_geometry_class_name(int c);

typedef struct clef_geometry_result {
    int n;               /* grid points */
    double *omega_k;     /* grid (n values) */
    double *posterior;   /* posterior density on the grid, normalised to peak 1 */
    double best;         /* posterior mode of Omega_k */
    double mean, sd;     /* posterior mean and standard deviation */
    double lo68, hi68;   /* central 68.27% interval (16th-84th percentiles) */
    double lo95, hi95;   /* central 95.45% interval */
    int classification;  /* enum clef_geometry_class */
    int truncated;       /* 1: the posterior is not negligible (> 1e-3 of its peak) at a grid edge */
    double acoustic_scale_deg, acoustic_scale_err_deg; /* 180 deg / l_peak and its error */
    double theta_star_deg; /* theta_* = pi (1 - phi_1) / l_peak at the prior means, degrees */
    double l1_flat;      /* model l_1 for the prior means and Omega_k = 0 */
    double l1_min, l1_max; /* range of model l_1 over the grid at the prior means */
    int nsamples_valid;  /* prior samples that gave a valid model somewhere on the grid */
    int forward;         /* 1: the forward model was used */
    double forward_offset; /* estimator on the model minus the model's maximum, prior means,
                              Omega_k = 0 (multipoles; NaN without the forward model) */
    double forward_offset_min, forward_offset_max; /* range over the Omega_k nodes */
    double l1_flat_forward; /* l1_flat + forward_offset */
    int forward_nodes_failed; /* nodes where the estimator found no peak on the model
                                 (excluded from the grid) */
} clef_geometry_result;

/* Run the inference.  *out is allocated (free with
 * clef_geometry_result_free).  Errors: CLEF_EINVAL (bad options: l_peak or
 * its error not positive, a negative prior sigma, unphysical prior means,
 * bad grid, a forward table the estimator rejects), CLEF_ENUMERIC (the
 * measured peak is out of reach of every model on the grid), CLEF_ENOMEM. */
int clef_geometry_infer(const clef_geometry_opts *o, clef_geometry_result **out);

/* The same in two steps, for many measurements made with one set of bins,
 * windows, covariance and settings (e.g. an ensemble of skies): the plan
 * holds the prior samples and the (forward-modelled) model l_1 at the
 * nodes (o->l_peak and o->l_peak_err are not used; o->forward_table is
 * only read during the call); execute adds a measurement.  Errors as
 * clef_geometry_infer.  A plan may be executed from several threads. */
typedef struct clef_geometry_plan clef_geometry_plan;
int clef_geometry_plan_create(clef_geometry_plan **out, const clef_geometry_opts *o);
int clef_geometry_plan_execute(const clef_geometry_plan *p, double l_peak, double l_peak_err,
                               clef_geometry_result **out);
void clef_geometry_plan_destroy(clef_geometry_plan *p); /* NULL is a no-op */
void clef_geometry_result_free(clef_geometry_result *r); /* NULL is a no-op */

#ifdef __cplusplus
}
#endif
#endif
