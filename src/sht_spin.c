/* Spin-2 transforms: (Q, U) <-> (a_E, a_B) on the spin-0 engine.
 *
 * Conventions (Zaldarriaga & Seljak 1997, PRD 55, 1830, as used by
 * HEALPix, Gorski et al. 2005):
 *   Q +- iU = sum_lm a_{+-2,lm} _{+-2}Y_lm,   a_{+-2,lm} = -(a_E,lm +- i a_B,lm),
 *   _{+-2}Y_lm = sqrt((l-2)!/(l+2)!) eth^2 Y_lm (resp. eth-bar^2), with
 *   eth f = -sin^s theta (d_theta + i/sin theta d_phi) sin^-s theta f
 *   (Newman & Penrose 1966; Goldberg et al. 1967).
 * With W_lm = (_2lambda_lm + _-2lambda_lm)/2, X_lm = (_2lambda_lm - _-2lambda_lm)/2
 * (real functions of theta, _{+-2}Y_lm = (W_lm +- X_lm) e^{i m phi}):
 *   Q = -sum_lm (a_E W_lm + i a_B X_lm) e^{i m phi},
 *   U = -sum_lm (a_B W_lm - i a_E X_lm) e^{i m phi},
 *   a_E = -sum_pix Omega w (Q W_lm + i U X_lm) e^{-i m phi},
 *   a_B = -sum_pix Omega w (U W_lm - i Q X_lm) e^{-i m phi}.
 * Working eth twice through the Legendre equation and
 * sin theta d lambda_l/d theta = l z lambda_l - e_l lambda_{l-1}
 * (e_l = sqrt((2l+1)(l^2-m^2)/(2l-1))) gives (N_l = sqrt((l-2)!/(l+2)!);
 * derived here, the functions HEALPix's documentation calls F_1, F_2):
 *   W_lm = 2 N_l [-((l - m^2)/s^2 + l(l-1)/2) lambda_l + z e_l lambda_{l-1} / s^2],
 *   X_lm = 2 N_l m / s^2 [-(l-1) z lambda_l + e_l lambda_{l-1}],   s = sin theta.
 *
 * Reduction to spin 0.  The three-term relation
 *   z lambda_l = alpha_l lambda_{l+1} + beta_l lambda_{l-1},
 *   alpha_l = sqrt(((l+1)^2-m^2)/((2l+1)(2l+3))), beta_l = sqrt((l^2-m^2)/((2l-1)(2l+1)))
 * (DLMF 14.10.3 normalised) and 1 = (1 - z^2)/s^2 make s^2 W_lm and s^2 X_lm
 * finite sums of lambda_{l'm}, l' in {l-2, l, l+2} and {l-1, l+1}.  So
 *   Q s^2 = sum_{l'm} D^Q_{l'm} Y_{l'm},  D^Q_{l'} = -sum_l (w_{ll'} a_E,l + i x_{ll'} a_B,l),
 * a spin-0 synthesis to lmax + 2 followed by a factor 1/s^2 per ring, and
 * the analysis is a spin-0 analysis of Q/s^2 (ring weights w_r/s_r^2)
 * followed by the transposed combination.  Both run on the spin-0 plan,
 * its FFTs, Legendre kernels and vector-width dispatch unchanged, with the
 * two Stokes maps sharing one pass of the recurrence; results inherit its
 * independence of the thread count.  The combination is exact algebra (no
 * quadrature beyond the spin-0 one), so the spin-2 transform is exactly
 * as accurate as the spin-0 one on the same rings.  The factor 1/s^2 is at
 * most ~ 1.5 nside^2 at the polar rings, whose few pixels keep their
 * absolute contribution small (tested against direct sums to 1e-12).
 */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "sht_impl.h"

struct clef_sht_spin {
    clef_sht *inner;         /* lmax + spin, nmaps = 2 npairs, weights w/s^spin, synthesis x 1/s^spin */
    int lmax, mmax, npairs, spin;
    size_t nalm, nalm_ext;
    double complex *ext;     /* 2 npairs x nalm_ext: inner a_lm (Q then U per pair) */
    double complex *ext2;    /* the inner plan's own delta array, reused (same size) */
    double *lfac;            /* l = 0..lmax: 2 N_l (spin 2) or 1/sqrt(l(l+1)) (spin 1), 0 below spin */
};

/* Coefficients of s^S W_lm = sum_k w[k] lambda_{l-S+2k} (k = 0..S) and
 * s^S X_lm = sum_k x[k] lambda_{l-S+1+2k} (k = 0..S-1), S the spin;
 * entries with an index below m are zero (lambda_{l'm} = 0 for l' < m). */
typedef struct spin_coef {
    double w[3], x[2];
} spin_coef;

static inline double alpha_lm(int l, int m)
{
    const double a = ((double)(l + 1) * (l + 1) - (double)m * m);
    return sqrt(a / ((2.0 * l + 1.0) * (2.0 * l + 3.0)));
}

static inline double beta_lm(int l, int m)
{
    if (l <= m)
        return 0.0;
    const double a = ((double)l * l - (double)m * m);
    return sqrt(a / ((2.0 * l - 1.0) * (2.0 * l + 1.0)));
}

static spin_coef coef_lm2(int l, int m)
{
    spin_coef c;
    const double dl = l, dm = m;
    const double n2 = 2.0 / sqrt((dl - 1.0) * dl * (dl + 1.0) * (dl + 2.0)); /* 2 N_l */
    const double L = 0.5 * dl * (dl - 1.0);
    const double al = alpha_lm(l, m), al1 = alpha_lm(l + 1, m);
    const double bl = beta_lm(l, m), bl1 = l - 1 > m ? beta_lm(l - 1, m) : 0.0;
    const double el = (2.0 * dl + 1.0) * bl;
    /* s^2 W/(2N) = -(l - m^2) lambda_l - L (1 - z^2) lambda_l + e_l z lambda_{l-1}, with
     * z^2 lambda_l = al al1 lambda_{l+2} + (al^2 + bl^2) lambda_l + bl bl1 lambda_{l-2},
     * z lambda_{l-1} = bl lambda_l + bl1 lambda_{l-2}. */
    c.w[2] = n2 * L * al * al1;
    c.w[1] = n2 * (-(dl - dm * dm) - L + L * (al * al + bl * bl) + el * bl);
    c.w[0] = n2 * (L * bl * bl1 + el * bl1);
    /* s^2 X/(2N m) = -(l-1) z lambda_l + e_l lambda_{l-1}
     *              = -(l-1) al lambda_{l+1} + (e_l - (l-1) bl) lambda_{l-1}. */
    c.x[1] = n2 * dm * (-(dl - 1.0) * al);
    c.x[0] = n2 * dm * (dl + 2.0) * bl;
    return c;
}

/* Spin 1 (the eth derivative of a scalar, as the B-mode purification
 * needs; src/purify.c).  With _{+-1}Y_lm = (+-eth, -eth-bar) Y_lm / n_l,
 * n_l = sqrt(l(l+1)) (Goldberg et al. 1967), and lambda' = d lambda / d theta:
 *   _1lambda = (m lambda / s - lambda') / n_l,  _-1lambda = (m lambda / s + lambda') / n_l.
 * For a real pair (Q, U) of odd spin the conjugate relation
 * conj(_sY_lm) = (-1)^(s+m) _{-s}Y_{l,-m} requires
 * a_{-s} = -(-1)^s (a_E - i a_B): a_1 = -(a_E + i a_B), a_{-1} = +(a_E - i a_B).
 * Then the roles of the even and odd parts swap: Q = -sum (a_E W + i a_B X)
 * e^{i m phi}, U = -sum (a_B W - i a_E X) e^{i m phi} hold with
 *   W = (_1lambda - _-1lambda)/2 = -lambda'/n_l,  X = (_1lambda + _-1lambda)/2 = m lambda/(s n_l).
 * With s lambda' = l z lambda_l - e_l lambda_{l-1} and z lambda_l =
 * alpha_l lambda_{l+1} + beta_l lambda_{l-1}:
 *   s W = ((l+1) beta_l lambda_{l-1} - l alpha_l lambda_{l+1}) / n_l,   s X = m lambda_l / n_l. */
static spin_coef coef_lm1(int l, int m)
{
    spin_coef c = {{0, 0, 0}, {0, 0}};
    const double dl = l, inv = 1.0 / sqrt(dl * (dl + 1.0));
    c.w[0] = (dl + 1.0) * beta_lm(l, m) * inv;
    c.w[1] = -dl * alpha_lm(l, m) * inv;
    c.x[0] = (double)m * inv;
    return c;
}

static inline spin_coef coef_lm(int spin, int l, int m)
{
    return spin == 1 ? coef_lm1(l, m) : coef_lm2(l, m);
}

/* The same coefficients for every l of one m, as to_ext and from_ext use
 * them: beta_{k m} (one square root per (l, m); alpha_{l m} = beta_{l+1, m},
 * the same double) from a row filled per m, the l-only factors 2 N_l or
 * 1/n_l from the plan's table.  Each expression is evaluated exactly as in
 * coef_lm2 / coef_lm1 above, so the results are bit-identical to them
 * (those remain the path when a thread cannot allocate its row). */
static void beta_row(int m, int kmax, double *b)
{
    b[m] = 0.0;
    for (int k = m + 1; k <= kmax; k++)
        b[k] = beta_lm(k, m);
}

static inline spin_coef coef_row(const double *lfac, const double *b, int spin, int l, int m)
{
    spin_coef c = {{0, 0, 0}, {0, 0}};
    const double dl = l, dm = m;
    if (spin == 1) {
        const double inv = lfac[l];
        c.w[0] = (dl + 1.0) * b[l] * inv;
        c.w[1] = -dl * b[l + 1] * inv;
        c.x[0] = dm * inv;
        return c;
    }
    const double n2 = lfac[l];
    const double L = 0.5 * dl * (dl - 1.0);
    const double al = b[l + 1], al1 = b[l + 2];
    const double bl = b[l], bl1 = l - 1 > m ? b[l - 1] : 0.0;
    const double el = (2.0 * dl + 1.0) * bl;
    c.w[2] = n2 * L * al * al1;
    c.w[1] = n2 * (-(dl - dm * dm) - L + L * (al * al + bl * bl) + el * bl);
    c.w[0] = n2 * (L * bl * bl1 + el * bl1);
    c.x[1] = n2 * dm * (-(dl - 1.0) * al);
    c.x[0] = n2 * dm * (dl + 2.0) * bl;
    return c;
}

int clef_sht_spin_create(clef_sht_spin **out, int64_t nside, int lmax, const clef_sht_opts *opts)
{
    return clef_sht_spin_create_s(out, nside, lmax, 2, opts);
}

int clef_sht_spin_create_s(clef_sht_spin **out, int64_t nside, int lmax, int spin,
                           const clef_sht_opts *opts)
{
    int status = CLEF_OK;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "clef_sht_spin_create: output pointer is NULL");
    *out = NULL;
    if (spin != 1 && spin != 2)
        CLEF_FAIL(CLEF_EINVAL, "sht spin: spin %d (1 or 2 supported)", spin);
    if (lmax < spin || lmax > 65533)
        CLEF_FAIL(CLEF_EINVAL, "sht spin-%d: lmax = %d outside [%d, 65533]", spin, lmax, spin);
    const int mmax = opts && opts->mmax > 0 ? opts->mmax : lmax;
    if (mmax > lmax)
        CLEF_FAIL(CLEF_EINVAL, "sht spin-2: mmax = %d above lmax = %d", mmax, lmax);
    const int npairs = opts && opts->nmaps > 0 ? opts->nmaps : 1;
    if (npairs > 32)
        CLEF_FAIL(CLEF_EINVAL, "sht spin-2: nmaps = %d Q/U pairs above the supported 32", npairs);
    if (nside >= 1 && lmax > 3 * nside - 1)
        clef_log(CLEF_LOG_WARN,
                 "sht spin-2: lmax = %d above 3 nside - 1 = %lld: analysis is not invertible", lmax,
                 (long long)(3 * nside - 1));
    clef_sht_spin *p = calloc(1, sizeof *p);
    if (!p)
        CLEF_FAIL(CLEF_ENOMEM, "sht spin-2: no memory for the plan");
    clef_sht_opts io = opts ? *opts : (clef_sht_opts){0};
    io.mmax = mmax;
    io.nmaps = 2 * npairs;
    CLEF_CHECK(clef_sht_create_impl(&p->inner, nside, lmax + spin, &io, 0));
    clef_sht *in = p->inner;
    in->ring_syn_scale = malloc((size_t)in->nrings * sizeof(double));
    if (!in->ring_syn_scale) {
        status = clef_fail(CLEF_ENOMEM, "sht spin-2: no memory for the ring tables");
        goto fail;
    }
    for (int r = 0; r < in->nrings; r++) {
        /* HEALPix ring centres are never at a pole: sin theta >= ~0.8/nside. */
        const double s2 = spin == 2 ? in->ring_sth[r] * in->ring_sth[r] : in->ring_sth[r];
        in->ring_w[r] /= s2;
        in->ring_syn_scale[r] = 1.0 / s2;
    }
    p->spin = spin;
    p->lmax = lmax;
    p->mmax = mmax;
    p->npairs = npairs;
    p->nalm = clef_alm_size(lmax, mmax);
    p->nalm_ext = clef_alm_size(lmax + spin, mmax);
    p->ext = malloc(p->nalm_ext * 2 * (size_t)npairs * sizeof(double complex));
    p->ext2 = in->delta;
    p->lfac = calloc((size_t)lmax + 1, sizeof *p->lfac);
    if (!p->ext || !p->lfac) {
        status = clef_fail(CLEF_ENOMEM, "sht spin-2: no memory for scratch (lmax %d)", lmax);
        goto fail;
    }
    for (int l = spin; l <= lmax; l++) {
        const double dl = l; /* as in coef_lm2, coef_lm1 */
        p->lfac[l] = spin == 2 ? 2.0 / sqrt((dl - 1.0) * dl * (dl + 1.0) * (dl + 2.0))
                               : 1.0 / sqrt(dl * (dl + 1.0));
    }
    *out = p;
    return CLEF_OK;
fail:
    clef_sht_spin_destroy(p);
    return status;
}

void clef_sht_spin_destroy(clef_sht_spin *p)
{
    if (!p)
        return;
    clef_sht_destroy(p->inner);
    free(p->ext);
    free(p->lfac);
    free(p);
}

const clef_sht *clef_sht_spin_plan(const clef_sht_spin *p) { return p ? p->inner : NULL; }
int clef_sht_spin_lmax(const clef_sht_spin *p) { return p->lmax; }
int clef_sht_spin_mmax(const clef_sht_spin *p) { return p->mmax; }

/* a_E, a_B -> D^Q, D^U (inner a_lm to lmax + 2) for pair j. */
static void to_ext(const clef_sht_spin *p, int npairs, const double complex *const *ae,
                   const double complex *const *ab, double complex *ext)
{
    const int lmax = p->lmax, S = p->spin, lx = lmax + S;
#pragma omp parallel
    {
    double *brow = malloc(((size_t)lmax + 3) * sizeof *brow);
#pragma omp for schedule(dynamic, 4)
    for (int m = 0; m <= p->mmax; m++) {
        if (brow)
            beta_row(m, lmax + 2, brow);
        for (int j = 0; j < npairs; j++) {
            double complex *dq = ext + (size_t)(2 * j) * p->nalm_ext + clef_alm_index(lx, 0, m);
            double complex *du = dq + p->nalm_ext;
            for (int l = m; l <= lx; l++)
                dq[l] = du[l] = 0.0;
            for (int l = m > S ? m : S; l <= lmax; l++) {
                const spin_coef c = brow ? coef_row(p->lfac, brow, S, l, m) : coef_lm(S, l, m);
                const double complex e = ae[j][clef_alm_index(lmax, l, m)];
                const double complex b = ab[j][clef_alm_index(lmax, l, m)];
                for (int k = 0; k <= S; k++) {
                    const int lp = l - S + 2 * k;
                    if (lp < m)
                        continue;
                    dq[lp] -= c.w[k] * e;
                    du[lp] -= c.w[k] * b;
                }
                for (int k = 0; k < S; k++) {
                    const int lp = l - S + 1 + 2 * k;
                    if (lp < m)
                        continue;
                    dq[lp] -= I * c.x[k] * b;
                    du[lp] += I * c.x[k] * e;
                }
            }
        }
    }
    free(brow);
    }
}

/* Inner a_lm of Q/s^2, U/s^2 -> a_E, a_B (added to the output when `add`). */
static void from_ext(const clef_sht_spin *p, int npairs, const double complex *ext,
                     double complex *const *ae, double complex *const *ab, int add)
{
    const int lmax = p->lmax, S = p->spin, lx = lmax + S;
#pragma omp parallel
    {
    double *brow = malloc(((size_t)lmax + 3) * sizeof *brow);
#pragma omp for schedule(dynamic, 4)
    for (int m = 0; m <= p->mmax; m++) {
        if (brow)
            beta_row(m, lmax + 2, brow);
        for (int j = 0; j < npairs; j++) {
            const double complex *q = ext + (size_t)(2 * j) * p->nalm_ext + clef_alm_index(lx, 0, m);
            const double complex *u = q + p->nalm_ext;
            for (int l = m; l <= lmax; l++) {
                double complex e = 0.0, b = 0.0;
                if (l >= S) {
                    const spin_coef c = brow ? coef_row(p->lfac, brow, S, l, m) : coef_lm(S, l, m);
                    for (int k = 0; k <= S; k++) {
                        const int lp = l - S + 2 * k;
                        if (lp < m)
                            continue;
                        e -= c.w[k] * q[lp];
                        b -= c.w[k] * u[lp];
                    }
                    for (int k = 0; k < S; k++) {
                        const int lp = l - S + 1 + 2 * k;
                        if (lp < m)
                            continue;
                        e -= I * c.x[k] * u[lp];
                        b += I * c.x[k] * q[lp];
                    }
                }
                const size_t i = clef_alm_index(lmax, l, m);
                if (add) {
                    ae[j][i] += e;
                    ab[j][i] += b;
                } else {
                    ae[j][i] = e;
                    ab[j][i] = b;
                }
            }
        }
    }
    free(brow);
    }
}

static void ext_ptrs(const clef_sht_spin *p, int npairs, double complex *ext,
                     double complex **ptr)
{
    for (int j = 0; j < 2 * npairs; j++)
        ptr[j] = ext + (size_t)j * p->nalm_ext;
}

static int check_spin(const clef_sht_spin *p, int npairs, const void *a, const void *b,
                      const void *c, const void *d, const char *what)
{
    if (!p)
        CLEF_FAIL(CLEF_EINVAL, "sht spin-2 %s: plan is NULL", what);
    if (npairs < 1 || npairs > p->npairs)
        CLEF_FAIL(CLEF_EINVAL, "sht spin-2 %s: %d Q/U pairs outside 1..%d (the plan's nmaps)",
                  what, npairs, p->npairs);
    if (!a || !b || !c || !d)
        CLEF_FAIL(CLEF_EINVAL, "sht spin-2 %s: an input or output array list is NULL", what);
    return CLEF_OK;
}

int clef_sht_spin_synthesis(const clef_sht_spin *p, int npairs, const double complex *const *alm_e,
                            const double complex *const *alm_b, double *const *q,
                            double *const *u)
{
    CLEF_TRY(check_spin(p, npairs, alm_e, alm_b, q, u, "synthesis"));
    for (int j = 0; j < npairs; j++)
        if (!alm_e[j] || !alm_b[j] || !q[j] || !u[j])
            CLEF_FAIL(CLEF_EINVAL, "sht spin-2 synthesis: an array of pair %d is NULL", j);
    double complex *ptr[64];
    double *maps[64];
    ext_ptrs(p, npairs, p->ext, ptr);
    for (int j = 0; j < npairs; j++) {
        maps[2 * j] = q[j];
        maps[2 * j + 1] = u[j];
    }
    to_ext(p, npairs, alm_e, alm_b, p->ext);
    return clef_sht_synthesis(p->inner, 2 * npairs, (const double complex *const *)ptr, maps);
}

int clef_sht_spin_analysis(const clef_sht_spin *p, int npairs, const double *const *q,
                           const double *const *u, double complex *const *alm_e,
                           double complex *const *alm_b, int iterations)
{
    CLEF_TRY(check_spin(p, npairs, q, u, alm_e, alm_b, "analysis"));
    if (iterations < 0 || iterations > 1000)
        CLEF_FAIL(CLEF_EINVAL, "sht spin-2 analysis: iterations = %d outside 0..1000", iterations);
    for (int j = 0; j < npairs; j++)
        if (!alm_e[j] || !alm_b[j] || !q[j] || !u[j])
            CLEF_FAIL(CLEF_EINVAL, "sht spin-2 analysis: an array of pair %d is NULL", j);
    const double *maps[64];
    double complex *acc[64], *prev[64];
    for (int j = 0; j < npairs; j++) {
        maps[2 * j] = q[j];
        maps[2 * j + 1] = u[j];
    }
    ext_ptrs(p, npairs, p->ext, acc);
    ext_ptrs(p, npairs, p->ext2, prev);
    clef_sht_state *st = p->inner->state;
    memset(st, 0, sizeof *st);
    clef_sht_analysis_pass(p->inner, 2 * npairs, maps, NULL, acc);
    from_ext(p, npairs, p->ext, alm_e, alm_b, 0);
    /* Jacobi iteration a <- a + A (m - S a) on (a_E, a_B), as for spin 0
     * (METHODS.md section 2): S a is the inner synthesis of D(a) times
     * 1/s^2, which the inner residual pass applies ring by ring. */
    for (int it = 0; it < iterations; it++) {
        clef_progress("sht-iterations", (double)it / iterations);
        to_ext(p, npairs, (const double complex *const *)alm_e,
               (const double complex *const *)alm_b, p->ext2);
        clef_sht_analysis_pass(p->inner, 2 * npairs, maps, (const double complex *const *)prev,
                               acc);
        from_ext(p, npairs, p->ext, alm_e, alm_b, 1);
    }
    if (iterations)
        clef_progress("sht-iterations", 1.0);
    return CLEF_OK;
}
