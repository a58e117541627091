/* Wigner 3j symbols (l1 l2 l3; 0 0 0).
 *
 * Closed form (Edmonds 1957, eq. 3.7.17; DLMF 34.3.5), J = l1 + l2 + l3
 * even, g = J/2:
 *   (l1 l2 l3; 0 0 0) = (-1)^g sqrt[(J-2l1)!(J-2l2)!(J-2l3)!/(J+1)!]
 *                        * g! / [(g-l1)!(g-l2)!(g-l3)!].
 * With A(n) = (2n)!/(2^n n!)^2 = (2n-1)!!/(2n)!! the factorials regroup
 * into f^2 = A(g-l1) A(g-l2) A(g-l3) / ((2g+1) A(g)), a product of O(1)
 * numbers: A(n) ~ 1/sqrt(pi n), so nothing overflows or underflows. */
#include "clef/wigner.h"

#include <math.h>
#include <stdlib.h>

#include "core_impl.h"

void clef_wigner_a_table(int nmax, double *a)
{
    a[0] = 1.0;
    for (int n = 1; n <= nmax; n++)
        a[n] = a[n - 1] * (2.0 * n - 1.0) / (2.0 * n);
}

/* A(n) without a table: the running product above, O(n). */
static double a_value(int n)
{
    double a = 1.0;
    for (int k = 1; k <= n; k++)
        a *= (2.0 * k - 1.0) / (2.0 * k);
    return a;
}

double clef_wigner_3j000(int l1, int l2, int l3)
{
    if (l1 < 0 || l2 < 0 || l3 < 0)
        return 0.0;
    const int J = l1 + l2 + l3;
    if (J % 2 || l3 < abs(l1 - l2) || l3 > l1 + l2)
        return 0.0;
    const int g = J / 2;
    /* A(g-l1) A(g-l2) A(g-l3) / A(g) as one running product: the factors of
     * A(g) that cancel against the largest of the three are skipped, so
     * the rounding error grows with the smaller arguments only. */
    int lo[3] = {g - l1, g - l2, g - l3};
    int imax = 0;
    for (int i = 1; i < 3; i++)
        if (lo[i] > lo[imax])
            imax = i;
    double r = 1.0;
    for (int k = lo[imax] + 1; k <= g; k++)
        r *= (2.0 * k) / (2.0 * k - 1.0); /* 1 / (A(g) / A(lo[imax])) */
    for (int i = 0; i < 3; i++)
        if (i != imax)
            r *= a_value(lo[i]);
    const double f = sqrt(r / (2.0 * g + 1.0));
    return g % 2 ? -f : f;
}

int clef_wigner_3j000_row(int l1, int l2, double *out, int *l3min, int *l3max)
{
    if (l1 < 0 || l2 < 0)
        CLEF_FAIL(CLEF_EINVAL, "3j row: negative multipole (l1 = %d, l2 = %d)", l1, l2);
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "3j row: output array is NULL");
    const int lmin = abs(l1 - l2), lmax = l1 + l2;
    if (l3min)
        *l3min = lmin;
    if (l3max)
        *l3max = lmax;
    /* Start at l3 = |l1 - l2| (J = 2 max(l1, l2), always even) from the
     * closed form, then step l3 by 2 with the exact ratio of consecutive
     * closed-form values (METHODS.md section 3):
     *   f(l3 + 1) = -sqrt(P(l3) / P(l3 + 1)) f(l3 - 1),
     *   P(j) = (j^2 - (l1 - l2)^2) ((l1 + l2 + 1)^2 - j^2),
     * P(j) > 0 for lmin < j <= lmax, so the ratio is finite throughout and
     * the relative error grows only like sqrt(steps) * eps. */
    double f = clef_wigner_3j000(l1, l2, lmin);
    const double d2 = (double)(l1 - l2) * (l1 - l2);
    const double s2 = (double)(l1 + l2 + 1) * (l1 + l2 + 1);
    for (int l3 = lmin; l3 <= lmax; l3 += 2) {
        out[l3 - lmin] = f;
        if (l3 + 1 <= lmax)
            out[l3 + 1 - lmin] = 0.0;
        if (l3 + 2 <= lmax) {
            const double j1 = l3 + 1.0, j2 = l3 + 2.0;
            const double p1 = (j1 * j1 - d2) * (s2 - j1 * j1);
            const double p2 = (j2 * j2 - d2) * (s2 - j2 * j2);
            f = -f * sqrt(p1 / p2);
        }
    }
    return CLEF_OK;
}
