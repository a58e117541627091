/* Legendre stage of the transform: for one m and a chunk of ring pairs,
 * run the recurrence of sht_legendre.c vectorised across pairs and
 *  - analysis: accumulate sum_pairs mu_lm(pair) F_m(pair) into per-lane
 *    partial sums abuf[l][map][re/im][lane] (reduced once per m by the
 *    caller, which also applies sigma_l);
 *  - synthesis: G_m(pair) = sum_l mu_lm(pair) sigma_l a_lm, split into the
 *    even (l - m even) and odd sums, so the north ring gets E + O and the
 *    south ring E - O (lambda_lm(-z) = (-1)^(l+m) lambda_lm(z); Schaeffer
 *    2013, G-cubed 14, 751).
 * A block holds CLEF_SHT_NV vectors of CLEF_SHT_VL pairs: two independent
 * recurrence chains cover the FMA latency (PERFORMANCE.md section 2).
 *
 * Each block starts in the scaled phase: lanes whose value is still below
 * 2^-RADIX (in mu units, i.e. |lambda| < 2^(SIGSTEP + 8 - RADIX) = 2^-128)
 * carry an integer deficit and contribute nothing.  Once every lane is in
 * range the block switches to the plain loop: one multiply and one FMA per
 * recurrence step, two FMAs per map and step for the accumulation.
 */
#include <math.h>
#include <string.h>

#include "sht_impl.h"

#define VL CLEF_SHT_VL
#define BL CLEF_SHT_BLOCK
#define NMGROUP 4 /* maps sharing one pass of the recurrence */

typedef long long clef_vl __attribute__((vector_size(VL * sizeof(long long))));

#define ALWAYS_INLINE static inline __attribute__((always_inline))

/* State of one block: mu_{l-1}, mu_{l-2} for both vectors. */
typedef struct blockstate {
    clef_vd x[2], mu1[2], mu2[2];
    clef_vd live[2];  /* 1.0 where the lane's deficit is 0 */
    int k[BL];        /* deficit per lane */
    int kmax;
} blockstate;

static void block_start(blockstate *s, const clef_sht_mtab *t, const double *x, const double *sth)
{
    s->kmax = 0;
    for (int i = 0; i < BL; i++) {
        double mant;
        int e, k = 0;
        clef_sht_lambda_mm(t, sth[i], &mant, &e);
        if (e < 0)
            k = -e / CLEF_SHT_RADIX;
        mant = ldexp(mant, e + CLEF_SHT_RADIX * k);
        s->k[i] = k;
        if (k > s->kmax)
            s->kmax = k;
        s->x[i / VL][i % VL] = x[i];
        s->mu1[i / VL][i % VL] = mant;
        s->mu2[i / VL][i % VL] = 0.0;
        s->live[i / VL][i % VL] = k == 0 ? 1.0 : 0.0;
    }
}

/* After computing mu_l (in mu[]): renormalise lanes in deficit whose value
 * reached 1.  Returns 1 if any lane changed. */
static int block_renorm(blockstate *s, clef_vd mu[2])
{
    static const double down = 0x1p-200;
    _Static_assert(CLEF_SHT_RADIX == 200, "down must be 2^-RADIX");
    int changed = 0;
    for (int v = 0; v < 2; v++) {
        clef_vl big = (mu[v] >= 1.0) | (mu[v] <= -1.0);
        long long anybig = 0;
        for (int i = 0; i < VL; i++)
            anybig |= big[i] & (long long)(s->k[v * VL + i] > 0);
        if (!anybig)
            continue;
        for (int i = 0; i < VL; i++) {
            const int li = v * VL + i;
            if (s->k[li] > 0 && fabs(mu[v][i]) >= 1.0) {
                mu[v][i] *= down;
                s->mu1[v][i] *= down;
                if (--s->k[li] == 0)
                    s->live[v][i] = 1.0;
                changed = 1;
            }
        }
    }
    if (changed) {
        int kmax = 0;
        for (int i = 0; i < BL; i++)
            kmax = s->k[i] > kmax ? s->k[i] : kmax;
        s->kmax = kmax;
    }
    return changed;
}

ALWAYS_INLINE int any_live(const blockstate *s)
{
    for (int i = 0; i < BL; i++)
        if (s->k[i] == 0)
            return 1;
    return 0;
}

/* Scale mu_{l-1}, mu_{l-2} by 2^SIGSTEP where sigma was renormalised. */
ALWAYS_INLINE void block_rescale(blockstate *s)
{
    static const double up = 0x1p64;
    _Static_assert(CLEF_SHT_SIGSTEP == 64, "up must be 2^SIGSTEP");
    for (int v = 0; v < 2; v++) {
        s->mu1[v] *= up;
        s->mu2[v] *= up;
    }
}

/* ---------------------------------------------------------------- analysis */

/* Accumulate mu (times live in the scaled phase) into abuf at l. */
ALWAYS_INLINE void ana_acc(int nm, const double *const *pb, int par, const clef_vd mu[2],
                           double *abuf, int l, int nmaps, int j0)
{
    for (int j = 0; j < nm; j++) {
        double *ab = abuf + ((size_t)l * nmaps + j0 + j) * 2 * VL;
        clef_vd re, im;
        memcpy(&re, ab, sizeof re);
        memcpy(&im, ab + VL, sizeof im);
        for (int v = 0; v < 2; v++) {
            clef_vd fre, fim;
            memcpy(&fre, pb[j] + (par * 2 + 0) * BL + v * VL, sizeof fre);
            memcpy(&fim, pb[j] + (par * 2 + 1) * BL + v * VL, sizeof fim);
            re += mu[v] * fre;
            im += mu[v] * fim;
        }
        memcpy(ab, &re, sizeof re);
        memcpy(ab + VL, &im, sizeof im);
    }
}

/* Plain loop over [l0, l1) with no sigma rescale inside; F held in registers. */
ALWAYS_INLINE void ana_fast(int nm, blockstate *s, const clef_sht_mtab *t, int l0, int l1,
                            const double *const *pb, double *abuf, int nmaps, int j0)
{
    clef_vd F[NMGROUP][2][2][2]; /* [map][first/second parity][re/im][vector] */
    const int par0 = (l0 - t->m) & 1;
    for (int j = 0; j < nm; j++)
        for (int q = 0; q < 2; q++)
            for (int r = 0; r < 2; r++)
                for (int v = 0; v < 2; v++)
                    memcpy(&F[j][q][r][v], pb[j] + (((par0 ^ q) * 2 + r) * BL + v * VL),
                           sizeof(clef_vd));
    clef_vd x0 = s->x[0], x1 = s->x[1];
    clef_vd a0 = s->mu1[0], a1 = s->mu1[1], b0 = s->mu2[0], b1 = s->mu2[1];
    const double *c = t->c;
    int l = l0;
    for (; l + 1 < l1; l += 2) {
        const clef_vd m0 = x0 * a0 - c[l] * b0, m1 = x1 * a1 - c[l] * b1;
        const clef_vd n0 = x0 * m0 - c[l + 1] * a0, n1 = x1 * m1 - c[l + 1] * a1;
        for (int j = 0; j < nm; j++) {
            double *ab = abuf + ((size_t)l * nmaps + j0 + j) * 2 * VL;
            double *ab2 = ab + (size_t)nmaps * 2 * VL;
            clef_vd re, im, re2, im2;
            memcpy(&re, ab, sizeof re);
            memcpy(&im, ab + VL, sizeof im);
            memcpy(&re2, ab2, sizeof re2);
            memcpy(&im2, ab2 + VL, sizeof im2);
            re += m0 * F[j][0][0][0] + m1 * F[j][0][0][1];
            im += m0 * F[j][0][1][0] + m1 * F[j][0][1][1];
            re2 += n0 * F[j][1][0][0] + n1 * F[j][1][0][1];
            im2 += n0 * F[j][1][1][0] + n1 * F[j][1][1][1];
            memcpy(ab, &re, sizeof re);
            memcpy(ab + VL, &im, sizeof im);
            memcpy(ab2, &re2, sizeof re2);
            memcpy(ab2 + VL, &im2, sizeof im2);
        }
        b0 = m0;
        b1 = m1;
        a0 = n0;
        a1 = n1;
    }
    if (l < l1) {
        const clef_vd m0 = x0 * a0 - c[l] * b0, m1 = x1 * a1 - c[l] * b1;
        for (int j = 0; j < nm; j++) {
            double *ab = abuf + ((size_t)l * nmaps + j0 + j) * 2 * VL;
            clef_vd re, im;
            memcpy(&re, ab, sizeof re);
            memcpy(&im, ab + VL, sizeof im);
            re += m0 * F[j][0][0][0] + m1 * F[j][0][0][1];
            im += m0 * F[j][0][1][0] + m1 * F[j][0][1][1];
            memcpy(ab, &re, sizeof re);
            memcpy(ab + VL, &im, sizeof im);
        }
        b0 = a0;
        b1 = a1;
        a0 = m0;
        a1 = m1;
    }
    s->mu1[0] = a0;
    s->mu1[1] = a1;
    s->mu2[0] = b0;
    s->mu2[1] = b1;
}

ALWAYS_INLINE void ana_block(int nm, const clef_sht_mtab *t, const double *x, const double *sth,
                             const double *const *pb, double *abuf, int nmaps, int j0)
{
    blockstate s;
    const int m = t->m, lmax = t->lmax;
    block_start(&s, t, x, sth);
    if (any_live(&s)) {
        const clef_vd mu[2] = {s.mu1[0] * s.live[0], s.mu1[1] * s.live[1]};
        ana_acc(nm, pb, 0, mu, abuf, m, nmaps, j0);
    }
    int l = m + 1, ir = 0;
    /* Scaled phase: until every lane is in range. */
    for (; l <= lmax && s.kmax > 0; l++) {
        if (ir < t->nrescale && t->rescale[ir] == l) {
            block_rescale(&s);
            ir++;
        }
        clef_vd mu[2];
        for (int v = 0; v < 2; v++)
            mu[v] = s.x[v] * s.mu1[v] - t->c[l] * s.mu2[v];
        block_renorm(&s, mu);
        if (any_live(&s)) {
            const clef_vd mul[2] = {mu[0] * s.live[0], mu[1] * s.live[1]};
            ana_acc(nm, pb, (l - m) & 1, mul, abuf, l, nmaps, j0);
        }
        for (int v = 0; v < 2; v++) {
            s.mu2[v] = s.mu1[v];
            s.mu1[v] = mu[v];
        }
    }
    /* Plain phase, segment by segment between sigma rescale points. */
    while (l <= lmax) {
        while (ir < t->nrescale && t->rescale[ir] < l)
            ir++;
        if (ir < t->nrescale && t->rescale[ir] == l) {
            block_rescale(&s);
            ir++;
        }
        const int l1 = ir < t->nrescale ? t->rescale[ir] : lmax + 1;
        ana_fast(nm, &s, t, l, l1, pb, abuf, nmaps, j0);
        l = l1;
    }
}

void clef_sht_kernel_analysis(const clef_sht_mtab *t, int nblocks, const double *x,
                              const double *sth, const double *ph, size_t map_stride,
                              int nmaps, double *abuf)
{
    for (int b = 0; b < nblocks; b++) {
        for (int j0 = 0; j0 < nmaps; j0 += NMGROUP) {
            const int nm = nmaps - j0 < NMGROUP ? nmaps - j0 : NMGROUP;
            const double *pb[NMGROUP];
            for (int j = 0; j < nm; j++)
                pb[j] = ph + (size_t)(j0 + j) * map_stride + (size_t)b * CLEF_SHT_BLOCKDBL;
            const double *xb = x + (size_t)b * BL, *sb = sth + (size_t)b * BL;
            switch (nm) {
            case 1: ana_block(1, t, xb, sb, pb, abuf, nmaps, j0); break;
            case 2: ana_block(2, t, xb, sb, pb, abuf, nmaps, j0); break;
            case 3: ana_block(3, t, xb, sb, pb, abuf, nmaps, j0); break;
            default: ana_block(4, t, xb, sb, pb, abuf, nmaps, j0); break;
            }
        }
    }
}

/* --------------------------------------------------------------- synthesis */

typedef struct synacc {
    clef_vd a[NMGROUP][2][2][2]; /* [map][parity][re/im][vector] */
} synacc;

ALWAYS_INLINE void syn_acc(int nm, synacc *A, int par, const clef_vd mu[2],
                           const double complex *bl, int l, int nmaps, int j0)
{
    for (int j = 0; j < nm; j++) {
        const double complex b = bl[(size_t)l * nmaps + j0 + j];
        const double br = creal(b), bi = cimag(b);
        for (int v = 0; v < 2; v++) {
            A->a[j][par][0][v] += mu[v] * br;
            A->a[j][par][1][v] += mu[v] * bi;
        }
    }
}

ALWAYS_INLINE void syn_fast(int nm, blockstate *s, const clef_sht_mtab *t, int l0, int l1,
                            synacc *A, const double complex *bl, int nmaps, int j0)
{
    const int par0 = (l0 - t->m) & 1;
    clef_vd acc[NMGROUP][2][2][2]; /* [map][first/second][re/im][vector] */
    for (int j = 0; j < nm; j++)
        for (int q = 0; q < 2; q++)
            for (int r = 0; r < 2; r++)
                for (int v = 0; v < 2; v++)
                    acc[j][q][r][v] = A->a[j][par0 ^ q][r][v];
    clef_vd x0 = s->x[0], x1 = s->x[1];
    clef_vd a0 = s->mu1[0], a1 = s->mu1[1], b0 = s->mu2[0], b1 = s->mu2[1];
    const double *c = t->c;
    int l = l0;
    for (; l + 1 < l1; l += 2) {
        const clef_vd m0 = x0 * a0 - c[l] * b0, m1 = x1 * a1 - c[l] * b1;
        const clef_vd n0 = x0 * m0 - c[l + 1] * a0, n1 = x1 * m1 - c[l + 1] * a1;
        for (int j = 0; j < nm; j++) {
            const double *bp = (const double *)(bl + (size_t)l * nmaps + j0 + j);
            const double *bq = (const double *)(bl + (size_t)(l + 1) * nmaps + j0 + j);
            acc[j][0][0][0] += m0 * bp[0];
            acc[j][0][0][1] += m1 * bp[0];
            acc[j][0][1][0] += m0 * bp[1];
            acc[j][0][1][1] += m1 * bp[1];
            acc[j][1][0][0] += n0 * bq[0];
            acc[j][1][0][1] += n1 * bq[0];
            acc[j][1][1][0] += n0 * bq[1];
            acc[j][1][1][1] += n1 * bq[1];
        }
        b0 = m0;
        b1 = m1;
        a0 = n0;
        a1 = n1;
    }
    if (l < l1) {
        const clef_vd m0 = x0 * a0 - c[l] * b0, m1 = x1 * a1 - c[l] * b1;
        for (int j = 0; j < nm; j++) {
            const double *bp = (const double *)(bl + (size_t)l * nmaps + j0 + j);
            acc[j][0][0][0] += m0 * bp[0];
            acc[j][0][0][1] += m1 * bp[0];
            acc[j][0][1][0] += m0 * bp[1];
            acc[j][0][1][1] += m1 * bp[1];
        }
        b0 = a0;
        b1 = a1;
        a0 = m0;
        a1 = m1;
    }
    for (int j = 0; j < nm; j++)
        for (int q = 0; q < 2; q++)
            for (int r = 0; r < 2; r++)
                for (int v = 0; v < 2; v++)
                    A->a[j][par0 ^ q][r][v] = acc[j][q][r][v];
    s->mu1[0] = a0;
    s->mu1[1] = a1;
    s->mu2[0] = b0;
    s->mu2[1] = b1;
}

ALWAYS_INLINE void syn_block(int nm, const clef_sht_mtab *t, const double *x, const double *sth,
                             double *const *pb, const double complex *bl, int nmaps, int j0)
{
    blockstate s;
    synacc A;
    memset(&A, 0, sizeof A);
    const int m = t->m, lmax = t->lmax;
    block_start(&s, t, x, sth);
    if (any_live(&s)) {
        const clef_vd mu[2] = {s.mu1[0] * s.live[0], s.mu1[1] * s.live[1]};
        syn_acc(nm, &A, 0, mu, bl, m, nmaps, j0);
    }
    int l = m + 1, ir = 0;
    for (; l <= lmax && s.kmax > 0; l++) {
        if (ir < t->nrescale && t->rescale[ir] == l) {
            block_rescale(&s);
            ir++;
        }
        clef_vd mu[2];
        for (int v = 0; v < 2; v++)
            mu[v] = s.x[v] * s.mu1[v] - t->c[l] * s.mu2[v];
        block_renorm(&s, mu);
        if (any_live(&s)) {
            const clef_vd mul[2] = {mu[0] * s.live[0], mu[1] * s.live[1]};
            syn_acc(nm, &A, (l - m) & 1, mul, bl, l, nmaps, j0);
        }
        for (int v = 0; v < 2; v++) {
            s.mu2[v] = s.mu1[v];
            s.mu1[v] = mu[v];
        }
    }
    while (l <= lmax) {
        while (ir < t->nrescale && t->rescale[ir] < l)
            ir++;
        if (ir < t->nrescale && t->rescale[ir] == l) {
            block_rescale(&s);
            ir++;
        }
        const int l1 = ir < t->nrescale ? t->rescale[ir] : lmax + 1;
        syn_fast(nm, &s, t, l, l1, &A, bl, nmaps, j0);
        l = l1;
    }
    for (int j = 0; j < nm; j++)
        for (int q = 0; q < 2; q++)
            for (int r = 0; r < 2; r++)
                for (int v = 0; v < 2; v++)
                    memcpy(pb[j] + (q * 2 + r) * BL + v * VL, &A.a[j][q][r][v],
                           sizeof(clef_vd));
}

void clef_sht_kernel_synthesis(const clef_sht_mtab *t, int nblocks, const double *x,
                               const double *sth, double *ph, size_t map_stride, int nmaps,
                               const double complex *bl)
{
    for (int b = 0; b < nblocks; b++) {
        for (int j0 = 0; j0 < nmaps; j0 += NMGROUP) {
            const int nm = nmaps - j0 < NMGROUP ? nmaps - j0 : NMGROUP;
            double *pb[NMGROUP];
            for (int j = 0; j < nm; j++)
                pb[j] = ph + (size_t)(j0 + j) * map_stride + (size_t)b * CLEF_SHT_BLOCKDBL;
            const double *xb = x + (size_t)b * BL, *sb = sth + (size_t)b * BL;
            switch (nm) {
            case 1: syn_block(1, t, xb, sb, pb, bl, nmaps, j0); break;
            case 2: syn_block(2, t, xb, sb, pb, bl, nmaps, j0); break;
            case 3: syn_block(3, t, xb, sb, pb, bl, nmaps, j0); break;
            default: syn_block(4, t, xb, sb, pb, bl, nmaps, j0); break;
            }
        }
    }
}
