/* Normalised associated Legendre functions lambda_lm(z) = Y_lm(theta, 0)
 * for fixed m: per-m recurrence tables and the scalar evaluator
 * clef_legendre_lambda().  The vectorised transform kernels
 * (sht_kernel.c) use the same tables and the same start.
 *
 * Recurrence (METHODS.md section 2; e.g. Holmes & Featherstone 2002,
 * J. Geod. 76, 279):
 *   lambda_mm     = (-1)^m sqrt((2m+1)/(4 pi) prod_{k=1..m} (2k-1)/(2k)) sin^m theta
 *   lambda_{l,m}  = a_l (z lambda_{l-1,m} - b_l lambda_{l-2,m}),
 *   a_l = sqrt((4 l^2 - 1)/(l^2 - m^2)),  b_l = 1 / a_{l-1}.
 * Writing lambda_l = s_l mu_l with s_l = a_l s_{l-1}, s_m = 1, gives the
 * two-operation form (PERFORMANCE.md section 2 item 4)
 *   mu_l = z mu_{l-1} - c_l mu_{l-2},  c_l = b_l^2 = ((l-1)^2 - m^2)/(4 (l-1)^2 - 1),
 * with a rational c_l (one correctly rounded division).  s_l grows like 2^l,
 * so it is kept as sigma_l = s_l 2^-E_l: whenever sigma would exceed
 * 2^SIGSTEP it is divided by 2^SIGSTEP and the two mu values in flight are
 * multiplied by the same power of two (exact).  s_l^2 is a product of
 * rationals accumulated in long double; sigma_l is its double square root.
 *
 * Underflow: lambda_mm ~ sin^m theta is far below the double range near the
 * poles for large m (e.g. sin theta = 1e-3, m = 24575 gives 10^-73000).  The
 * start is computed with an exact integer exponent (binary powering with
 * frexp renormalisation) and the recurrence runs on mant * 2^(-RADIX k) with
 * an integer deficit k >= 0, renormalised as the value grows (the
 * extended-exponent technique of Smith, Olver & Lozier 1981, ACM TOMS 7, 93,
 * and Fukushima 2012, J. Geod. 86, 271).
 */
#include <float.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "sht_impl.h"

int clef_sht_mtab_alloc(clef_sht_mtab *t, int lmax)
{
    t->c = malloc(((size_t)lmax + 2) * sizeof *t->c);
    t->sigma = malloc(((size_t)lmax + 2) * sizeof *t->sigma);
    t->rescale = malloc(((size_t)lmax + 2) * sizeof *t->rescale);
    if (!t->c || !t->sigma || !t->rescale) {
        clef_sht_mtab_free(t);
        return CLEF_ENOMEM;
    }
    return CLEF_OK;
}

void clef_sht_mtab_free(clef_sht_mtab *t)
{
    free(t->c);
    free(t->sigma);
    free(t->rescale);
    t->c = t->sigma = NULL;
    t->rescale = NULL;
}

void clef_sht_mtab_fill(clef_sht_mtab *t, int m, int lmax)
{
    t->m = m;
    t->lmax = lmax;
    long double pr = (2.0L * m + 1.0L) / (4.0L * 3.141592653589793238462643383279502884L);
    for (int k = 1; k <= m; k++)
        pr *= (2.0L * k - 1.0L) / (2.0L * k);
    t->pref = (double)sqrtl(pr);

    /* s_l^2 = prod_{k=m+1..l} (4k^2 - 1)/((k - m)(k + m)) is a product of
     * rationals: accumulate it in long double (exact integer factors, one
     * rounding per division) and take one double sqrt per l, so sigma_l
     * carries ~1e-16 relative error that does not grow with l (and costs
     * no long-double sqrt; this table is rebuilt per m and chunk). */
    const long double big2 = ldexpl(1.0L, 2 * CLEF_SHT_SIGSTEP);
    long double s2 = 1.0L;
    t->sigma[m] = 1.0;
    t->nrescale = 0;
    for (int l = m + 1; l <= lmax; l++) {
        const long double ll = l;
        s2 *= (4.0L * ll * ll - 1.0L) / ((ll - m) * (ll + m));
        if (s2 > big2) {
            s2 = ldexpl(s2, -2 * CLEF_SHT_SIGSTEP);
            t->rescale[t->nrescale++] = l;
        }
        t->sigma[l] = sqrt((double)s2);
    }
    clef_sht_mtab_fill_c(t, m, lmax);
}

/* c[l] alone, a loop without dependences (vectorised); the same values as
 * before sigma and c were split. */
void clef_sht_mtab_fill_c(clef_sht_mtab *t, int m, int lmax)
{
    if (m + 1 <= lmax)
        t->c[m + 1] = 0.0;
    double *restrict c = t->c;
    const double m2 = (double)m * m;
    for (int l = m + 2; l <= lmax; l++) {
        /* Exact integers below 2^53 for l <= 3 * 8192: one rounding. */
        const double lm1 = l - 1;
        c[l] = (lm1 * lm1 - m2) / (4.0 * lm1 * lm1 - 1.0);
    }
}

/* frexp for positive normal doubles, by exponent bits (frexp from libm
 * was a tenth of the transform time): v = result * 2^(added to *e). */
static inline double split(double v, int *e)
{
    uint64_t u;
    memcpy(&u, &v, sizeof u);
    *e += (int)((u >> 52) & 0x7ff) - 1022;
    u = (u & ~(UINT64_C(0x7ff) << 52)) | (UINT64_C(1022) << 52);
    memcpy(&v, &u, sizeof v);
    return v;
}

void clef_sht_lambda_mm(const clef_sht_mtab *t, double sth, double *mant, int *exp2)
{
    const int m = t->m;
    if (m == 0) {
        *mant = frexp(t->pref, exp2);
        return;
    }
    if (sth <= 0.0) {
        *mant = 0.0;
        *exp2 = 0;
        return;
    }
    /* sin^m theta by binary powering, renormalised with frexp after each
     * product so the exponent is tracked exactly in an int. */
    int be;
    const double bm = frexp(sth, &be);
    /* Invariant: value = r 2^er * (pw 2^ep)^n, r and pw in [0.5, 1). */
    double r = 1.0, pw = bm;
    int er = 0, ep = 0, n = m;
    while (n) {
        if (n & 1) {
            r = split(r * pw, &er);
            er += ep;
        }
        n >>= 1;
        if (n) {
            ep *= 2;
            pw = split(pw * pw, &ep);
        }
    }
    int e;
    double v = frexp(r * t->pref, &e);
    *mant = (m & 1) ? -v : v; /* Condon-Shortley phase (-1)^m */
    *exp2 = e + er + be * m;
}

int clef_legendre_lambda(int lmax, int m, double z, double *out)
{
    if (m < 0 || lmax < m)
        CLEF_FAIL(CLEF_EINVAL, "clef_legendre_lambda: need 0 <= m <= lmax, got m = %d, lmax = %d",
                  m, lmax);
    if (lmax > 3 * 65536)
        CLEF_FAIL(CLEF_EINVAL, "clef_legendre_lambda: lmax = %d above the supported 196608", lmax);
    if (!(fabs(z) <= 1.0))
        CLEF_FAIL(CLEF_EINVAL, "clef_legendre_lambda: z = %g outside [-1, 1]", z);
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "clef_legendre_lambda: output array is NULL");

    clef_sht_mtab t;
    if (clef_sht_mtab_alloc(&t, lmax) != CLEF_OK)
        CLEF_FAIL(CLEF_ENOMEM, "clef_legendre_lambda: no memory for lmax = %d", lmax);
    clef_sht_mtab_fill(&t, m, lmax);

    const double sth = sqrt((1.0 - z) * (1.0 + z));
    double mant;
    int e;
    clef_sht_lambda_mm(&t, sth, &mant, &e);
    /* mu = mant * 2^(-RADIX k): k >= 0 deficit, mant exponent in (-RADIX, 0]. */
    int k = 0;
    if (e < 0) {
        k = -e / CLEF_SHT_RADIX;
        mant = ldexp(mant, e + CLEF_SHT_RADIX * k);
    } else {
        mant = ldexp(mant, e);
    }
    const double up = ldexp(1.0, CLEF_SHT_SIGSTEP), down = ldexp(1.0, -CLEF_SHT_RADIX);
    double mu1 = mant, mu2 = 0.0;
    out[0] = ldexp(mant, -CLEF_SHT_RADIX * k); /* sigma_m = 1 */
    int ir = 0;
    for (int l = m + 1; l <= lmax; l++) {
        if (ir < t.nrescale && t.rescale[ir] == l) {
            mu1 *= up;
            mu2 *= up;
            ir++;
        }
        double mu = z * mu1 - t.c[l] * mu2;
        if (k > 0 && fabs(mu) >= 1.0) {
            mu *= down;
            mu1 *= down;
            k--;
        }
        out[l - m] = k ? ldexp(t.sigma[l] * mu, -CLEF_SHT_RADIX * k) : t.sigma[l] * mu;
        mu2 = mu1;
        mu1 = mu;
    }
    clef_sht_mtab_free(&t);
    return CLEF_OK;
}
