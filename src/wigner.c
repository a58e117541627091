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

/* Coefficients of the Schulten & Gordon 1975 recurrence (METHODS.md
 * section 3) for fixed l2, l3, m2, m3 and m1 = -m2 - m3:
 *   j A(j+1) f(j+1) + B(j) f(j) + (j+1) A(j) f(j-1) = 0,
 *   A(j) = sqrt[(j^2 - (l2-l3)^2) ((l2+l3+1)^2 - j^2) (j^2 - m1^2)],
 *   B(j) = -(2j+1) [(l2(l2+1) - l3(l3+1)) m1 - j(j+1)(m3 - m2)]. */
typedef struct sg_coef {
    double d2, s2, m1sq, dl, dm;
    int m1;
} sg_coef;

static double sg_a(const sg_coef *c, double j)
{
    const double j2 = j * j;
    const double v = (j2 - c->d2) * (c->s2 - j2) * (j2 - c->m1sq);
    return v > 0 ? sqrt(v) : 0.0;
}

static double sg_b(const sg_coef *c, double j)
{
    return -(2 * j + 1) * (c->dl * c->m1 - j * (j + 1) * c->dm);
}

/* Values grow by large factors through a classically forbidden region;
 * rescale everything computed so far before they overflow. */
#define SG_BIG 1e200

int clef_wigner_3j_row(int l2, int l3, int m2, int m3, double *out, int *jmin_out,
                       int *jmax_out)
{
    if (l2 < 0 || l3 < 0)
        CLEF_FAIL(CLEF_EINVAL, "3j row: negative multipole (l2 = %d, l3 = %d)", l2, l3);
    if (!out || !jmin_out || !jmax_out)
        CLEF_FAIL(CLEF_EINVAL, "3j row: NULL output pointer");
    const int m1 = -m2 - m3;
    const int jmin = abs(l2 - l3) > abs(m1) ? abs(l2 - l3) : abs(m1);
    const int jmax = l2 + l3;
    *jmin_out = jmin;
    *jmax_out = jmax;
    if (abs(m2) > l2 || abs(m3) > l3 || jmin > jmax) {
        *jmin_out = jmax + 1;
        return CLEF_OK;
    }
    const int n = jmax - jmin + 1;
    if (n == 1) {
        /* a single allowed j: normalisation and sign fix it */
        const double f = 1.0 / sqrt(2.0 * jmin + 1.0);
        out[0] = ((l2 - l3 - m1) % 2 != 0) ? -f : f;
        return CLEF_OK;
    }
    sg_coef c = {(double)(l2 - l3) * (l2 - l3), (double)(l2 + l3 + 1) * (l2 + l3 + 1),
                 (double)m1 * m1, (double)l2 * (l2 + 1) - (double)l3 * (l3 + 1),
                 (double)(m3 - m2), m1};
    double *f = out;

    /* Match point: the middle of the classically allowed j, where the
     * recurrence's characteristic roots are complex,
     * B(j)^2 < 4 j (j+1) A(j) A(j+1); both directions are stable there.
     * Upward recursion is stable through the forbidden region at low j
     * (the solution grows), downward through the one at high j. */
    int cl_lo = -1, cl_hi = -1;
    for (int j = jmin + 1; j < jmax; j++) {
        const double b = sg_b(&c, j);
        if (b * b < 4.0 * j * (j + 1.0) * sg_a(&c, j) * sg_a(&c, j + 1.0)) {
            if (cl_lo < 0)
                cl_lo = j;
            cl_hi = j;
        }
    }
    int jm = cl_lo < 0 ? (jmin + jmax) / 2 : (cl_lo + cl_hi) / 2;
    /* The upward start needs jmin > 0: with jmin = 0 (l2 = l3, m1 = 0) the
     * j = 0 equation is empty, so go downward all the way (checked against
     * GSL and orthogonality in tests/test_wigner.c, also with |m2| = l2). */
    if (jmin == 0)
        jm = jmin;

    /* Upward over jmin..ju, downward over jmax..jd, overlapping on
     * jd..ju (up to three points around jm), where the downward solution is
     * scaled onto the upward one by least squares (a single point could sit
     * on a node).  With jmin = 0 the upward part is empty and the downward
     * solution is used as it is. */
    const int up = jmin > 0;
    const int ju = up ? (jm + 1 < jmax ? jm + 1 : jmax) : jmin;
    const int jd = up ? (jm - 1 > jmin ? jm - 1 : jmin) : jmin;

    /* Upward: f(jmin) = 1, f(jmin+1) from the j = jmin equation (A(jmin) = 0). */
    f[0] = 1.0;
    for (int j = jmin; up && j < ju; j++) {
        const double prev = j > jmin ? f[j - 1 - jmin] : 0.0;
        const double num = -(sg_b(&c, j) * f[j - jmin] + (j + 1.0) * sg_a(&c, j) * prev);
        f[j + 1 - jmin] = num / (j * sg_a(&c, j + 1.0));
        if (fabs(f[j + 1 - jmin]) > SG_BIG)
            for (int i = 0; i <= j + 1 - jmin; i++)
                f[i] /= SG_BIG;
    }

    /* Downward from f(jmax) = 1 (A(jmax + 1) = 0).  Values above ju go to
     * f, values on the overlap to ov[j - jd]. */
    double ov[3];
    double g1 = 0.0, g0 = 1.0; /* f(j+1), f(j) of the downward solution */
    if (jmax > ju)
        f[jmax - jmin] = 1.0;
    else
        ov[jmax - jd] = 1.0;
    for (int j = jmax; j > jd; j--) {
        const double num = -(sg_b(&c, j) * g0 + j * sg_a(&c, j + 1.0) * g1);
        const double gm = num / ((j + 1.0) * sg_a(&c, j));
        g1 = g0;
        g0 = gm;
        if (j - 1 > ju)
            f[j - 1 - jmin] = gm;
        else
            ov[j - 1 - jd] = gm;
        if (fabs(gm) > SG_BIG) {
            g0 /= SG_BIG;
            g1 /= SG_BIG;
            for (int i = (j - 1 > ju ? j - 1 : ju + 1) - jmin; i <= jmax - jmin; i++)
                f[i] /= SG_BIG;
            for (int i = j - 1 > ju ? 3 : j - 1 - jd; i <= ju - jd; i++)
                ov[i] /= SG_BIG;
        }
    }
    if (up) {
        double sud = 0.0, sdd = 0.0;
        for (int j = jd; j <= ju; j++) {
            sud += f[j - jmin] * ov[j - jd];
            sdd += ov[j - jd] * ov[j - jd];
        }
        if (!(sdd > 0))
            CLEF_FAIL(CLEF_ENUMERIC, "3j row: matching failed (l2 %d l3 %d m2 %d m3 %d)", l2,
                      l3, m2, m3);
        const double scale = sud / sdd;
        for (int j = ju + 1; j <= jmax; j++)
            f[j - jmin] *= scale;
    } else {
        for (int j = jd; j <= ju; j++)
            f[j - jmin] = ov[j - jd];
    }

    /* Normalise: sum_j (2j+1) f^2 = 1 (DLMF 34.3.16), sign at jmax. */
    double big = 0.0;
    for (int i = 0; i < n; i++)
        big = fmax(big, fabs(f[i]));
    double norm = 0.0;
    for (int i = 0; i < n; i++) {
        const double x = f[i] / big;
        norm += (2.0 * (jmin + i) + 1.0) * x * x;
    }
    double s = 1.0 / (big * sqrt(norm));
    const int neg = (l2 - l3 - m1) % 2 != 0;
    if ((f[n - 1] < 0) != neg)
        s = -s;
    for (int i = 0; i < n; i++)
        f[i] *= s;
    return CLEF_OK;
}

int clef_wigner_3j22_row(int l1, int l2, double *out, int *l3min, int *l3max)
{
    if (l1 < 0 || l2 < 0)
        CLEF_FAIL(CLEF_EINVAL, "3j (2 -2 0) row: negative multipole (l1 = %d, l2 = %d)", l1, l2);
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "3j (2 -2 0) row: output array is NULL");
    const int lo = abs(l1 - l2), hi = l1 + l2;
    if (l3min)
        *l3min = lo;
    if (l3max)
        *l3max = hi;
    for (int j = lo; j <= hi; j++)
        out[j - lo] = 0.0;
    if (l1 < 2 || l2 < 2)
        return CLEF_OK;
    /* m1 = 0 here, so the row starts at jmin = |l1 - l2| = lo. */
    int jmin, jmax;
    CLEF_TRY(clef_wigner_3j_row(l1, l2, 2, -2, out, &jmin, &jmax));
    return CLEF_OK;
}
