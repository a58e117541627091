/* Private: the monopole/dipole deprojection correction of the coupling
 * (src/spectrum_deproj.c; Elsner, Leistedt & Peiris 2017, MNRAS 465, 1847). */
#ifndef CLEF_SPECTRUM_DEPROJ_H
#define CLEF_SPECTRUM_DEPROJ_H

#include <stdint.h>

/* Highest multipole of the correction (rows and columns), and the removed
 * fraction per mode below which a multipole is left uncorrected. */
#define CLEF_DEPROJ_LMAX_MAX 256
#define CLEF_DEPROJ_LEVEL 1e-3

typedef struct clef_spectrum_deproj_in {
    int64_t nside;
    int lmax;              /* the coupling's lmax (lmax_ext) */
    int iterations;        /* analysis iterations, as for the mask spectra */
    const double *w[2];    /* weights of maps a and b (w[1] == w[0]: one mask, one side) */
    int nf[2];             /* templates removed from each map: 1 (monopole) or 4 (+ dipole) */
    double w2;             /* mean of w_a w_b */
} clef_spectrum_deproj_in;

typedef struct clef_spectrum_deproj_out {
    int ldep;              /* D covers 0 <= l, L <= ldep */
    double *dmean;         /* (ldep+1)^2 row-major: M_lL - D_lL is the coupling */
    int truncated;         /* 1: the templates still carry power above CLEF_DEPROJ_LMAX_MAX */
    double level_at_cut;   /* removed fraction per mode just above ldep */
} clef_spectrum_deproj_out;

int clef_spectrum_deproj(const clef_spectrum_deproj_in *in, clef_spectrum_deproj_out *out);
void clef_spectrum_deproj_free(clef_spectrum_deproj_out *out);

#endif
