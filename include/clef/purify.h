/* B-mode purification (Smith 2006, PRD 74, 083002; Smith & Zaldarriaga
 * 2007, PRD 76, 043001; Grain, Tristram & Stompor 2009, PRD 79, 123515).
 *
 * On a cut sky the standard B multipoles of W (Q, U) receive E power
 * through the mask's edges (the ambiguous modes), whose variance swamps a
 * small B signal on small patches.  The pure multipoles
 *   B^pure_lm = (1/N_l) integral W(n) B(n) Y*_lm,  B(n) = sum N_l B_lm Y_lm
 * (N_l = sqrt((l+2)!/(l-2)!)), integrated by parts twice so that the
 * derivatives fall on the window, contain no E mode at all when W and its
 * first derivative vanish on the boundary of the observed region.  With
 * P_+ = Q + iU, the spin-weighted derivatives eth W (spin 1), eth^2 W
 * (spin 2) and n_l = sqrt(l(l+1)):
 *   B^pure_lm = B[W P] + 2 n_l / N_l B_1[P_+ conj(eth W)] - (1/N_l) a[Im(P_+ conj(eth^2 W))]
 * where B[.] is the B part of a spin-2 analysis, B_1[.] the B part of a
 * spin-1 analysis (sht.h conventions) and a[.] a spin-0 analysis; derived
 * from a_{+-2}^pure = N_l^-1 integral P_+- (eth^2 (W Y_lm))* (eth-bar^2 for
 * -2) and the product rule (docs/method.md, "B-mode purification").
 *
 * Plan, then execute: the plan holds eth W and eth^2 W as maps, computed
 * once from the window's a_lm (to lmax_w), and the spin-1 and spin-0
 * plans; each execution costs one spin-1 and one spin-0 analysis.
 *
 * Smoothness.  The counter-terms amplify the window's small scales (eth^2
 * W carries W_L times L^4), and they are exact only as far as eth W and
 * eth^2 W are represented by the truncated expansion.  The plan measures
 * the share of the power of eth^2 W in the top quarter of 0..lmax_w.  A
 * window with a hard edge has W_L ~ L^-3, so (2L+1) W_L N_L^2 ~ L^2 and a
 * share of 1 - (3/4)^3 = 0.58 (measured 0.61-0.62 on a 20-degree disc at
 * nside 64, 0.53-0.62 for a Gaussian-smoothed disc cut back to its hard
 * edge); a window tapered with the C1 or C2 kernel has a share that falls
 * with the taper's smoothness and then stops at the pixel-scale floor of
 * the sampled distance (0.15-0.31 for 4-16 degree tapers, same disc).
 * Above CLEF_PURIFY_TAIL_MAX the plan is refused (CLEF_EINVAL, naming the
 * share and what to do); above CLEF_PURIFY_TAIL_WARN it warns.  The bars
 * sit between the two families (docs/method.md, "B-mode purification"). */
#ifndef CLEF_PURIFY_H
#define CLEF_PURIFY_H

#include <complex.h>
#include <stdint.h>

#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

#define CLEF_PURIFY_TAIL_MAX 0.45
#define CLEF_PURIFY_TAIL_WARN 0.35

typedef struct clef_purify clef_purify;

/* A plan for windows w (npix = 12 nside^2 values, RING, >= 0) and pure-B
 * multipoles to lmax, the window expanded to lmax_w (>= lmax; at most
 * 3 nside - 1) with `iterations` analysis iterations.  `name` names the
 * window in messages (may be NULL).  Errors: CLEF_EINVAL (bad sizes, a
 * window that is not smooth enough: see above), CLEF_ENOMEM. */
int clef_purify_create(clef_purify **out, const double *w, int64_t nside, int lmax, int lmax_w,
                       int iterations, const char *name);
void clef_purify_destroy(clef_purify *p); /* NULL is a no-op */
/* The measured share of eth^2 W power in the top quarter of 0..lmax_w. */
double clef_purify_tail(const clef_purify *p);

/* Pure-B multipoles of the Stokes maps q, u (unweighted, zero where the
 * window is zero, in the unit wanted), given alm_b_w, the B multipoles of
 * the spin-2 analysis of (w q, w u) to lmax with the plan's iterations:
 * alm_pure (may equal alm_b_w) receives B^pure for l <= lmax (l < 2 zero).
 * Thread-safe per plan only serially (the plans' scratch). */
int clef_purify_b(const clef_purify *p, const double *q, const double *u,
                  const double complex *alm_b_w, double complex *alm_pure);

#ifdef __cplusplus
}
#endif
#endif
