/* Multipole bins for band powers, and the binning operators P and Q of
 * Hivon et al. 2002 (ApJ 567, 2, "MASTER"), METHODS.md section 4.
 *
 * A bin b covers the integer multipoles l_lo(b) <= l <= l_hi(b) (both
 * inclusive).  Bins are ascending and do not overlap; gaps are allowed.
 * Every bin starts at l >= 2: the monopole and dipole are removed from the
 * maps before the pseudo-spectrum is taken and are never part of a band
 * power (docs/coupling.md).
 *
 * Weighting inside a bin (n_b = l_hi - l_lo + 1 multipoles):
 *  - CLEF_BINS_DL (default, Hivon et al. 2002): the band power is a
 *    D_l = l(l+1) C_l / 2pi average,
 *      P_bl = l(l+1) / (2 pi n_b),  Q_lb = 2 pi / (l(l+1));
 *  - CLEF_BINS_FLAT: the band power is a flat C_l average,
 *      P_bl = 1 / n_b,  Q_lb = 1.
 * P and Q vanish outside the bin.  The effective multipole of a bin is the
 * mean of its multipoles, (l_lo + l_hi) / 2 (common practice).
 *
 * Bin-edge files (clef_bins_read): plain text, '#' starts a comment, blank
 * lines are ignored.  Either every data line holds two integers
 * "l_lo l_hi" (one bin, inclusive), or every data line holds one integer,
 * an ascending list of edges e_0 < e_1 < ... where bin i covers
 * e_i <= l < e_{i+1}.
 *
 * Objects are immutable after creation; concurrent reads are safe.
 */
#ifndef CLEF_BINS_H
#define CLEF_BINS_H

#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

typedef struct clef_bins clef_bins;

enum clef_bins_weighting {
    CLEF_BINS_DL = 0,  /* l(l+1)/2pi weighting: band powers of D_l */
    CLEF_BINS_FLAT = 1 /* flat weighting: band powers of C_l */
};

/* Linear bins of `width` multipoles from l_start (>= 2) up to lmax; the
 * last bin is cut at lmax (it may be narrower).  Errors: CLEF_EINVAL. */
int clef_bins_create_linear(clef_bins **out, int l_start, int width, int lmax, int weighting);

/* Logarithmic bins: nbins bins from l_start to lmax with edges
 * e_i = round(l_start ((lmax + 1) / l_start)^(i / nbins)), widened where
 * rounding would give an empty bin.  Errors: CLEF_EINVAL (also when
 * lmax - l_start + 1 < nbins). */
int clef_bins_create_log(clef_bins **out, int l_start, int lmax, int nbins, int weighting);

/* Logarithmic bins by ratio: e_{i+1} = max(e_i + 1, round(ratio e_i)),
 * ratio > 1, from l_start until lmax (last bin cut at lmax). */
int clef_bins_create_log_ratio(clef_bins **out, int l_start, int lmax, double ratio,
                               int weighting);

/* Bins from arrays of inclusive ranges lo[i]..hi[i], i < nbins (copied).
 * Errors: CLEF_EINVAL naming the first offending bin. */
int clef_bins_create_ranges(clef_bins **out, int nbins, const int *lo, const int *hi,
                            int weighting);

/* Bins from a text file (format above).  lmax > 0: bins must end at or
 * below lmax (a bin crossing lmax is an error; bins wholly above are an
 * error too); lmax <= 0: no limit.  Errors: CLEF_EIO (cannot read),
 * CLEF_EFORMAT (bad content; the message names the file and line). */
int clef_bins_read(clef_bins **out, const char *path, int lmax, int weighting);

void clef_bins_destroy(clef_bins *b); /* NULL is a no-op */

int clef_bins_count(const clef_bins *b);
int clef_bins_l_lo(const clef_bins *b, int bin);
int clef_bins_l_hi(const clef_bins *b, int bin);
double clef_bins_l_eff(const clef_bins *b, int bin);
int clef_bins_weighting(const clef_bins *b);
/* Highest multipole of the last bin. */
int clef_bins_lmax(const clef_bins *b);

/* P_bl and Q_lb (formulas above); 0 when l is outside the bin. */
double clef_bins_p(const clef_bins *b, int bin, int l);
double clef_bins_q(const clef_bins *b, int bin, int l);

/* Binned vector out[b] = sum_l P_bl cl[l]; cl holds l = 0..lmax with
 * lmax >= clef_bins_lmax(b).  Errors: CLEF_EINVAL. */
int clef_bins_apply(const clef_bins *b, const double *cl, int lmax, double *out);

/* Unbinned vector out[l] = sum_b Q_lb band[b] for l = 0..lmax (0 outside
 * every bin), e.g. a piecewise-constant D_l turned into C_l. */
int clef_bins_expand(const clef_bins *b, const double *band, int lmax, double *out);

#ifdef __cplusplus
}
#endif
#endif
