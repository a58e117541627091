/* Analytic CMB temperature power spectrum for given cosmological
 * parameters, and reading / writing a spectrum file.
 *
 * The model (docs/theory.md): the closed-form approximation of Mukhanov
 * (2004, astro-ph/0303072; Physical Foundations of Cosmology, 2005, section
 * 9.7), l(l+1) C_l ~ (B / pi) (O + N), with O the oscillating and N the
 * non-oscillating part, driven by quantities computed from the parameters
 * (include/clef/cosmo.h): the baryon loading xi = R(z_*), the acoustic
 * scale from the sound horizon and D_M(z_*), the damping multipoles l_f
 * (finite thickness of last scattering) and l_S (plus photon diffusion),
 * and the transfer-function log P; at low l it joins a Sachs-Wolfe plateau
 * D_l = A_s T_cmb^2 / 25.  Curvature enters through D_M(z_*), which scales
 * every multipole.  The oscillation scale is tied to the first-peak fit of
 * Doran & Lilley 2002 (see clef_theory_info).  No ISW, lensing or
 * reionisation bump: a teaching and simulation model, not a Boltzmann code;
 * accuracy in docs/theory.md.
 *
 * Units: C_l and D_l = l(l+1) C_l / (2 pi) in uK^2 (thermodynamic CMB
 * temperature).  Thread safety: all functions are reentrant.
 */
#ifndef CLEF_THEORY_H
#define CLEF_THEORY_H

#include "clef/clef.h"
#include "clef/cosmo.h"

#ifdef __cplusplus
extern "C" {
#endif

/* The scales the model derives from the parameters. */
typedef struct clef_theory_info {
    clef_cosmo_acoustic acoustic; /* z_*, r_s, D_M, theta_*, l_A, phi_1, l_1 */
    double xi;          /* baryon loading R(z_*) */
    double varrho;      /* r_s / D_M(z_*), Mukhanov's acoustic parameter */
    double varrho_eff;  /* the value used in the oscillating part (first maximum at l_1) */
    double sigma_ls;    /* width of last scattering in units of eta_* (Mukhanov) */
    double k_damp;      /* Silk damping wavenumber at z_*, Mpc^-1 (fully ionised) */
    double l_f;         /* damping multipole of the finite thickness of last scattering */
    double l_s;         /* damping multipole of thickness + photon diffusion */
    double l_pivot;     /* k_pivot D_M with k_pivot = 0.05 Mpc^-1 */
    double amplitude;   /* A_s T_cmb^2 in uK^2 */
} clef_theory_info;

/* Derived scales for a parameter set.  CLEF_EINVAL for unphysical
 * parameters (clef_cosmo_check), CLEF_ENUMERIC if an integral fails. */
int clef_theory_info_get(const clef_cosmo_params *p, clef_theory_info *info);

/* The model's C_l in uK^2 for l = 0..lmax (cl has lmax + 1 entries;
 * C_0 = C_1 = 0).  lmax >= 2 and <= CLEF_THEORY_LMAX_MAX, else CLEF_EINVAL. */
#define CLEF_THEORY_LMAX_MAX 100000
int clef_theory_cl(const clef_cosmo_params *p, int lmax, double *cl);

/* The model's first acoustic peak: the multipole (real-valued) of the first
 * maximum of the model's D_l above the Sachs-Wolfe plateau, found by
 * maximising the continuous-l model, and D_l there (uK^2).  Either output
 * may be NULL. */
int clef_theory_first_peak(const clef_cosmo_params *p, double *l_peak, double *d_peak);

/* Read a spectrum text file (docs/formats-spectrum.md): '#' comment lines,
 * one of which must name the columns, "# columns: l C_l" or
 * "# columns: l D_l" (more columns may follow and are ignored; if both C_l
 * and D_l columns are named, C_l is read); data lines hold whitespace- or
 * comma-separated numbers, values in uK^2.  Fills cl[0..lmax] with C_l;
 * rows with l > lmax are skipped.  Every l from 2 up to min(lmax, the
 * file's last l) must be present (C_0, C_1 default to 0; C_0 is set to 0
 * from a D_l file); multipoles above the file's last l are set to 0 with a
 * warning.  *lmax_file (may be NULL) receives the file's largest l.
 * Errors name the file and line: CLEF_EIO (cannot open), CLEF_EFORMAT (no
 * columns line, bad number, negative, duplicate or missing multipole,
 * negative spectrum value), CLEF_EINVAL (lmax < 2).
 * A FITS file (plain or gzip) is read as clef_theory_write_cl writes it:
 * HDU SPECTRUM (else the first binary table), columns L and CL (else DL),
 * with the same checks (errors name the row).  cl == NULL with lmax_file
 * set only reports the file's largest l (no warning, lmax ignored). */
int clef_theory_read_cl(const char *path, int lmax, double *cl, int *lmax_file);

/* Read the polarized input spectra of clef simulate --polarization: a
 * text file (docs/formats-spectrum.md, "Polarized input spectra") of
 * '#' comments and data lines "l TT EE BB TE", C_l in uK^2 (TT, EE, BB
 * >= 0).  Fills tt, ee, bb, te [0..lmax]; l from 2 to min(lmax, the last
 * l) must all be present; multipoles above the last l are 0 (warning).
 * Errors name the file and line: CLEF_EIO, CLEF_EFORMAT, CLEF_EINVAL. */
int clef_theory_read_cl_pol(const char *path, int lmax, double *tt, double *ee, double *bb,
                            double *te);

/* Write C_l (l = 0..lmax, uK^2) atomically: a FITS binary table when the
 * path ends in .fits, .fit or .fits.gz (HDU "SPECTRUM", columns L, CL, DL
 * with TUNIT uK^2), a text file otherwise (columns l C_l D_l under a
 * "# columns: l C_l D_l" line, readable by clef_theory_read_cl).  p (may be
 * NULL) is recorded in the header.  CLEF_EIO on failure, nothing written. */
int clef_theory_write_cl(const char *path, int lmax, const double *cl, const clef_cosmo_params *p);

#ifdef __cplusplus
}
#endif
#endif
