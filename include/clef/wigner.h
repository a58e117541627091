/* Wigner 3j symbols with all m = 0, (l1 l2 l3; 0 0 0), as needed by the
 * temperature mode-coupling matrix (Hivon et al. 2002).
 *
 * Selection rules (DLMF 34.3): the symbol vanishes unless
 * |l1 - l2| <= l3 <= l1 + l2 and J = l1 + l2 + l3 is even.
 *
 * Two forms:
 *  - clef_wigner_3j000_row: the signed symbols for every l3 of a fixed
 *    (l1, l2) at once, by the exact ratio recursion of the closed form
 *    (Edmonds 1957; DLMF 34.3.5), accurate to l ~ 20000 without overflow;
 *  - clef_wigner_3j000_sq: the squared symbol from a table of
 *    A(n) = (2n-1)!!/(2n)!!, square-root free and branch free, for the
 *    coupling kernel (PERFORMANCE.md section 3);
 *  - clef_wigner_3j_row: general m, for all values of the first column
 *    (Schulten & Gordon 1975), e.g. for spin-2 coupling kernels.
 *
 * Thread safety: no shared state; tables are read only after they are
 * filled.
 */
#ifndef CLEF_WIGNER_H
#define CLEF_WIGNER_H

#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

/* Signed (l1 l2 l3; 0 0 0) for l3 = l3min .. l3max with l3min = |l1 - l2|,
 * l3max = l1 + l2, into out[l3 - l3min] (odd J entries are exactly 0).
 * `out` must hold l1 + l2 - |l1 - l2| + 1 doubles.  l3min/l3max may be NULL.
 * Errors: CLEF_EINVAL for negative l1 or l2 or a NULL out. */
int clef_wigner_3j000_row(int l1, int l2, double *out, int *l3min, int *l3max);

/* One symbol (l1 l2 l3; 0 0 0) from the closed form; 0 outside the
 * selection rules (including negative arguments). */
double clef_wigner_3j000(int l1, int l2, int l3);

/* Fill a[n] = A(n) = prod_{k=1..n} (2k-1)/(2k) for n = 0..nmax
 * (A(0) = 1; A(n) ~ 1/sqrt(pi n), so no underflow at any n). */
void clef_wigner_a_table(int nmax, double *a);

/* (l1 l2 l3; 0 0 0)^2 for an allowed triple (J even, triangle holds), from
 * the closed form (Edmonds 1957) rewritten with g = J/2 as
 *   f^2 = A(g - l1) A(g - l2) A(g - l3) / ((2g + 1) A(g))
 * (PERFORMANCE.md section 3).  `a` is a table from clef_wigner_a_table with
 * nmax >= g.  The caller checks the selection rules. */
static inline double clef_wigner_3j000_sq(const double *a, int l1, int l2, int l3)
{
    const int g = (l1 + l2 + l3) / 2;
    return a[g - l1] * a[g - l2] * a[g - l3] / ((2.0 * g + 1.0) * a[g]);
}

/* General (j l2 l3; m1 m2 m3) with m1 = -m2 - m3, for every j at once:
 * out[j - jmin] for jmin = max(|l2 - l3|, |m1|) <= j <= jmax = l2 + l3,
 * by the three-term recurrence in j of Schulten & Gordon 1975 (J. Math.
 * Phys. 16, 1961), run upward from jmin and downward from jmax and matched
 * inside the classically allowed region, normalised by
 * sum_j (2j+1) f^2 = 1 with the sign (-1)^(l2 - l3 - m1) at j = jmax.
 * `out` must hold l2 + l3 + 1 doubles.  *jmin > *jmax (no allowed j) when
 * |m2| > l2 or |m3| > l3 or |m1| > l2 + l3; then nothing is written.
 * Errors: CLEF_EINVAL for negative l2, l3 or NULL pointers. */
int clef_wigner_3j_row(int l2, int l3, int m2, int m3, double *out, int *jmin, int *jmax);

/* (l1 l2 l3; 2 -2 0) for l3 = |l1 - l2| .. l1 + l2 into out[l3 - |l1 - l2|]
 * (l1 + l2 - |l1 - l2| + 1 doubles), the symbols of the spin-2 coupling
 * matrices (Kogut et al. 2003; Brown, Castro & Taylor 2005): the row of
 * clef_wigner_3j_row for (l3 l1 l2; 0 2 -2), equal by the even (cyclic)
 * column permutation (DLMF 34.3.8).  All zero when l1 < 2 or l2 < 2.
 * l3min/l3max may be NULL.  Errors: CLEF_EINVAL (negative l, NULL out). */
int clef_wigner_3j22_row(int l1, int l2, double *out, int *l3min, int *l3max);

#ifdef __cplusplus
}
#endif
#endif
