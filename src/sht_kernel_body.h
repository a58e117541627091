/* Legendre stage of the transform, written once for any vector width and
 * included by one source file per width (sht_kernel_avx512.c,
 * sht_kernel_avx2.c, sht_kernel_base.c), each compiled for its own
 * instruction set; the including file defines
 *   KVL      doubles per vector (lanes),
 *   KNV      vectors per sub-block (independent recurrence chains),
 *   KNAME(f) the per-width name of f, KSTR the kernel's name,
 * and gets the descriptor KNAME(kernel) (sht_impl.h).  The plan picks one
 * at run time (src/kernel.c).
 *
 * For one m and a chunk of ring pairs,
 * run the recurrence of sht_legendre.c vectorised across pairs and
 *  - analysis: accumulate sum_pairs mu_lm(pair) F_m(pair) into per-lane
 *    partial sums abuf[l][map][re/im][lane] (reduced once per m by the
 *    caller, which also applies sigma_l);
 *  - synthesis: G_m(pair) = sum_l mu_lm(pair) sigma_l a_lm, split into the
 *    even (l - m even) and odd sums, so the north ring gets E + O and the
 *    south ring E - O (lambda_lm(-z) = (-1)^(l+m) lambda_lm(z); Schaeffer
 *    2013, G-cubed 14, 751).
 * A block of the phase array (CLEF_SHT_BLOCK pairs) is run as sub-blocks
 * of NV = KNV vectors of VL = KVL pairs: NV independent recurrence chains
 * cover the FMA latency (4 cycles, 2 pipes: one recurrence step per chain
 * costs a multiply and an FMA, so 4 chains keep both pipes busy;
 * PERFORMANCE.md section 2 items 3-5); NV is chosen per width so that the
 * chains' state (x, mu_{l-1}, mu_{l-2}: 3 NV registers) plus the
 * accumulators fit the register file (32 vector registers with AVX-512,
 * 16 with AVX2 and SSE2).  The lane partial sums in abuf have VL lanes.
 *
 * Each block starts in the scaled phase: lanes whose value is still below
 * 2^-RADIX (in mu units) carry an integer deficit and contribute nothing.
 * While no lane is in range the recurrence runs SKIP steps between checks
 * (|mu| grows at most by |x| + 1/3 <= 4/3 per step, since c_l <= 1/3), so
 * a lane may enter late by < SKIP steps: terms with |lambda_lm| < 2^-124
 * (mu < 2^-200 (4/3)^8, sigma < 2^72) can be dropped, never larger ones.
 * Once every lane is in range the block switches to the plain loop: one
 * multiply and one FMA per recurrence step, two FMAs per map and step for
 * the accumulation (PERFORMANCE.md section 2 item 4).
 */
#include <math.h>
#include <stdint.h>
#include <string.h>

#include "sht_impl.h"

#if defined(__AVX512F__)
#include <immintrin.h>
#endif

/* ISO C mode (-std=c11) turns off floating-point contraction; the kernels
 * are written for fused multiply-adds (one rounding instead of two, and
 * half the instructions), so allow contraction in this file. */
#pragma GCC optimize("fp-contract=fast")

#define VL KVL
#define NV KNV
#define BL CLEF_SHT_BLOCK /* layout stride of the phase array (sht_impl.h) */
#define SB (VL * NV)      /* pairs per sub-block: one pass of the recurrence */
_Static_assert(BL % SB == 0, "a block is a whole number of sub-blocks");

typedef double clef_vd __attribute__((vector_size(VL * sizeof(double))));
#define NMGROUP 2 /* maps sharing one pass of the recurrence */
#define SKIP 8    /* steps between checks while no lane is in range */

typedef long long clef_vl __attribute__((vector_size(VL * sizeof(long long))));

#define ALWAYS_INLINE static inline __attribute__((always_inline))
#define UNROLL _Pragma("GCC unroll 8")

/* State of one block: mu_{l-1}, mu_{l-2} per vector. */
typedef struct blockstate {
    clef_vd x[NV], mu1[NV], mu2[NV];
    clef_vd live[NV]; /* 1.0 where the lane's deficit is 0, else 0.0 */
    clef_vd thr[NV];  /* 1.0 where the lane is in deficit, else +inf */
    int k[SB];        /* deficit per lane */
    int kmax, nlive;
} blockstate;

/* frexp on vectors of positive normal doubles: v = result * 2^(added to *e). */
ALWAYS_INLINE clef_vd vsplit(clef_vd v, clef_vl *e)
{
    clef_vl u;
    memcpy(&u, &v, sizeof u);
    *e += ((u >> 52) & 0x7ff) - 1022;
    u = (u & ~(0x7ffLL << 52)) | (1022LL << 52);
    memcpy(&v, &u, sizeof v);
    return v;
}

/* 2^s for -1022 <= s <= 1023, exactly. */
static inline double pow2i(int s)
{
    const uint64_t u = (uint64_t)(s + 1023) << 52;
    double v;
    memcpy(&v, &u, sizeof v);
    return v;
}

/* lambda_mm for every lane as mant * 2^e (same binary powering as
 * clef_sht_lambda_mm, all lanes at once: they share m), then the deficit
 * representation mant * 2^(-RADIX k) with the mantissa exponent in
 * (-RADIX, 0]. */
static void block_start(blockstate *s, const clef_sht_mtab *t, const double *x, const double *sth)
{
    const int m = t->m;
    clef_vd r[NV], pw[NV];
    clef_vl er[NV], ep[NV], be[NV];
    for (int v = 0; v < NV; v++) {
        clef_vd sv;
        memcpy(&sv, sth + v * VL, sizeof sv);
        be[v] = er[v] = ep[v] = (clef_vl){0};
        pw[v] = vsplit(sv, &be[v]);
        r[v] = pw[v] * 0.0 + 1.0;
    }
    for (int n = m; n;) {
        for (int v = 0; v < NV; v++) {
            if (n & 1) {
                r[v] = vsplit(r[v] * pw[v], &er[v]);
                er[v] += ep[v];
            }
            if (n >> 1) {
                ep[v] += ep[v];
                pw[v] = vsplit(pw[v] * pw[v], &ep[v]);
            }
        }
        n >>= 1;
    }
    const double pref = (m & 1) ? -t->pref : t->pref; /* Condon-Shortley (-1)^m */
    s->kmax = 0;
    s->nlive = 0;
    for (int v = 0; v < NV; v++) {
        clef_vl e = er[v] + be[v] * (long long)m;
        const clef_vd mant = vsplit(r[v] * fabs(pref), &e);
        for (int i = 0; i < VL; i++) {
            const int li = v * VL + i;
            const long long ex = e[i];
            int k = 0;
            if (ex < 0)
                k = (int)(-ex / CLEF_SHT_RADIX);
            const double val =
                (pref < 0 ? -mant[i] : mant[i]) * pow2i((int)(ex + CLEF_SHT_RADIX * (long long)k));
            s->k[li] = k;
            s->kmax = k > s->kmax ? k : s->kmax;
            s->nlive += k == 0;
            s->x[v][i] = x[li];
            s->mu1[v][i] = val;
            s->mu2[v][i] = 0.0;
            s->live[v][i] = k == 0 ? 1.0 : 0.0;
            s->thr[v][i] = k == 0 ? INFINITY : 1.0;
        }
    }
}

/* 1 if |mu| >= thr in any lane of any vector. */
ALWAYS_INLINE int any_reached(const clef_vd *mu, const clef_vd *thr)
{
#if defined(__AVX512F__) && KVL == 8
    /* One compare into a mask register per vector, no lane extraction. */
    __mmask8 a = 0;
    for (int v = 0; v < NV; v++)
        a |= _mm512_cmp_pd_mask(_mm512_abs_pd((__m512d)mu[v]), (__m512d)thr[v], _CMP_GE_OQ);
    return a != 0;
#else
    clef_vl m = (clef_vl){0};
    for (int v = 0; v < NV; v++)
        m |= (mu[v] >= thr[v]) | (mu[v] <= -thr[v]);
    long long acc = 0;
    for (int i = 0; i < VL; i++)
        acc |= m[i];
    return acc != 0;
#endif
}

/* After computing mu_l (in mu[]): renormalise lanes in deficit whose value
 * reached 1 in magnitude. */
static void block_renorm(blockstate *s, clef_vd *mu)
{
    if (__builtin_expect(!any_reached(mu, s->thr), 1))
        return;
    static const double down = 0x1p-200;
    _Static_assert(CLEF_SHT_RADIX == 200, "down must be 2^-RADIX");
    int kmax = 0;
    for (int li = 0; li < SB; li++) {
        const int v = li / VL, i = li % VL;
        if (s->k[li] > 0 && fabs(mu[v][i]) >= 1.0) {
            mu[v][i] *= down;
            s->mu1[v][i] *= down;
            if (--s->k[li] == 0) {
                s->live[v][i] = 1.0;
                s->thr[v][i] = INFINITY;
                s->nlive++;
            }
        }
        kmax = s->k[li] > kmax ? s->k[li] : kmax;
    }
    s->kmax = kmax;
}

/* Scale mu_{l-1}, mu_{l-2} by 2^SIGSTEP where sigma was renormalised. */
ALWAYS_INLINE void block_rescale(blockstate *s)
{
    static const double up = 0x1p64;
    _Static_assert(CLEF_SHT_SIGSTEP == 64, "up must be 2^SIGSTEP");
    for (int v = 0; v < NV; v++) {
        s->mu1[v] *= up;
        s->mu2[v] *= up;
    }
}

/* Recurrence only, SKIP steps from l (no rescale point inside), while no
 * lane is in range; then one renormalisation check. */
static void block_skip(blockstate *s, const double *c, int l)
{
    clef_vd a[NV], b[NV];
    for (int v = 0; v < NV; v++) {
        a[v] = s->mu1[v];
        b[v] = s->mu2[v];
    }
    UNROLL
    for (int q = 0; q < SKIP; q++) {
        const double cl = c[l + q];
        for (int v = 0; v < NV; v++) {
            const clef_vd n = s->x[v] * a[v] - cl * b[v];
            b[v] = a[v];
            a[v] = n;
        }
    }
    /* a = mu_{l+SKIP-1}, b = mu_{l+SKIP-2}: block_renorm scales the current
     * value and s->mu1 (its predecessor) together. */
    for (int v = 0; v < NV; v++)
        s->mu1[v] = b[v];
    block_renorm(s, a);
    for (int v = 0; v < NV; v++) {
        s->mu2[v] = s->mu1[v];
        s->mu1[v] = a[v];
    }
}

/* The scaled phase up to the first l at which every lane is in range (or
 * lmax + 1); `acc` is called for each l with mu times the live mask when
 * some lane is live.  Returns the next l; *ir is the next rescale index. */
#define SCALED_PHASE(ACC)                                                                    \
    do {                                                                                     \
        for (; l <= lmax && s.kmax > 0;) {                                                   \
            const int next_rs = ir < t->nrescale ? t->rescale[ir] : lmax + 1;                \
            if (s.nlive == 0 && l + SKIP <= next_rs && l + SKIP <= lmax + 1) {               \
                block_skip(&s, t->c, l);                                                     \
                l += SKIP;                                                                   \
                continue;                                                                    \
            }                                                                                \
            if (l == next_rs) {                                                              \
                block_rescale(&s);                                                           \
                ir++;                                                                        \
            }                                                                                \
            clef_vd mu[NV];                                                                  \
            for (int v = 0; v < NV; v++)                                                     \
                mu[v] = s.x[v] * s.mu1[v] - t->c[l] * s.mu2[v];                              \
            block_renorm(&s, mu);                                                            \
            if (s.nlive) {                                                                   \
                clef_vd mul[NV];                                                             \
                for (int v = 0; v < NV; v++)                                                 \
                    mul[v] = mu[v] * s.live[v];                                              \
                ACC;                                                                         \
            }                                                                                \
            for (int v = 0; v < NV; v++) {                                                   \
                s.mu2[v] = s.mu1[v];                                                         \
                s.mu1[v] = mu[v];                                                            \
            }                                                                                \
            l++;                                                                             \
        }                                                                                    \
    } while (0)

/* ---------------------------------------------------------------- analysis */

/* Accumulate mu (times live in the scaled phase) into abuf at l. */
ALWAYS_INLINE void ana_acc(int nm, const double *const *pb, int par, const clef_vd *mu,
                           double *abuf, int l, int nmaps, int j0)
{
    for (int j = 0; j < nm; j++) {
        double *ab = abuf + ((size_t)l * nmaps + j0 + j) * 2 * VL;
        clef_vd re, im;
        memcpy(&re, ab, sizeof re);
        memcpy(&im, ab + VL, sizeof im);
        for (int v = 0; v < NV; v++) {
            clef_vd fre, fim;
            memcpy(&fre, pb[j] + (par * 2 + 0) * BL + v * VL, sizeof fre);
            memcpy(&fim, pb[j] + (par * 2 + 1) * BL + v * VL, sizeof fim);
            re = re + mu[v] * fre;
            im = im + mu[v] * fim;
        }
        memcpy(ab, &re, sizeof re);
        memcpy(ab + VL, &im, sizeof im);
    }
}

/* One plain step at l with parity slot q of F; updates a (mu_{l-1}) and
 * b (mu_{l-2}) in place. */
#define ANA_STEP(q, L)                                                                       \
    do {                                                                                     \
        const double cl_ = c[L];                                                             \
        clef_vd mu_[NV];                                                                     \
        for (int v = 0; v < NV; v++) {                                                       \
            mu_[v] = x[v] * a[v] - cl_ * b[v];                                               \
            b[v] = a[v];                                                                     \
            a[v] = mu_[v];                                                                   \
        }                                                                                    \
        for (int j = 0; j < nm; j++) {                                                       \
            double *ab_ = abuf + ((size_t)(L) * nmaps + j0 + j) * 2 * VL;                    \
            clef_vd re_, im_;                                                                \
            memcpy(&re_, ab_, sizeof re_);                                                   \
            memcpy(&im_, ab_ + VL, sizeof im_);                                              \
            for (int v = 0; v < NV; v++) {                                                   \
                re_ = re_ + mu_[v] * F[j][q][0][v];                                          \
                im_ = im_ + mu_[v] * F[j][q][1][v];                                          \
            }                                                                                \
            memcpy(ab_, &re_, sizeof re_);                                                   \
            memcpy(ab_ + VL, &im_, sizeof im_);                                              \
        }                                                                                    \
    } while (0)

/* Plain loop over [l0, l1) with no sigma rescale inside; F held in registers. */
ALWAYS_INLINE void ana_fast(int nm, blockstate *s, const clef_sht_mtab *t, int l0, int l1,
                            const double *const *pb, double *abuf, int nmaps, int j0)
{
    clef_vd F[NMGROUP][2][2][NV]; /* [map][first/second parity][re/im][vector] */
    const int par0 = (l0 - t->m) & 1;
    for (int j = 0; j < nm; j++)
        for (int q = 0; q < 2; q++)
            for (int r = 0; r < 2; r++)
                for (int v = 0; v < NV; v++)
                    memcpy(&F[j][q][r][v], pb[j] + (((par0 ^ q) * 2 + r) * BL + v * VL),
                           sizeof(clef_vd));
    clef_vd x[NV], a[NV], b[NV];
    for (int v = 0; v < NV; v++) {
        x[v] = s->x[v];
        a[v] = s->mu1[v];
        b[v] = s->mu2[v];
    }
    const double *c = t->c;
    int l = l0;
    for (; l + 1 < l1; l += 2) {
        ANA_STEP(0, l);
        ANA_STEP(1, l + 1);
    }
    if (l < l1)
        ANA_STEP(0, l);
    for (int v = 0; v < NV; v++) {
        s->mu1[v] = a[v];
        s->mu2[v] = b[v];
    }
}

ALWAYS_INLINE void ana_block(int nm, const clef_sht_mtab *t, const double *x, const double *sth,
                             const double *const *pb, double *abuf, int nmaps, int j0)
{
    blockstate s;
    const int m = t->m, lmax = t->lmax;
    block_start(&s, t, x, sth);
    if (s.nlive) {
        clef_vd mu[NV];
        for (int v = 0; v < NV; v++)
            mu[v] = s.mu1[v] * s.live[v];
        ana_acc(nm, pb, 0, mu, abuf, m, nmaps, j0);
    }
    int l = m + 1, ir = 0;
    SCALED_PHASE(ana_acc(nm, pb, (l - m) & 1, mul, abuf, l, nmaps, j0));
    /* Plain phase, segment by segment between sigma rescale points. */
    while (l <= lmax) {
        if (ir < t->nrescale && t->rescale[ir] == l) {
            block_rescale(&s);
            ir++;
        }
        const int l1 = ir < t->nrescale ? t->rescale[ir] : lmax + 1;
        ana_fast(nm, &s, t, l, l1, pb, abuf, nmaps, j0);
        l = l1;
    }
}

static void KNAME(analysis)(const clef_sht_mtab *t, int nblocks, const double *x,
                           const double *sth, const double *ph, size_t map_stride, int nmaps,
                           double *abuf)
{
    for (int b = 0; b < nblocks; b++)
        for (int u = 0; u < BL; u += SB) {
            const size_t off = (size_t)b * CLEF_SHT_BLOCKDBL + (size_t)u;
            for (int j0 = 0; j0 < nmaps; j0 += NMGROUP) {
                const int nm = nmaps - j0 < NMGROUP ? nmaps - j0 : NMGROUP;
                const double *pb[NMGROUP];
                for (int j = 0; j < nm; j++)
                    pb[j] = ph + (size_t)(j0 + j) * map_stride + off;
                const double *xb = x + (size_t)b * BL + u, *sb = sth + (size_t)b * BL + u;
                if (nm == 1)
                    ana_block(1, t, xb, sb, pb, abuf, nmaps, j0);
                else
                    ana_block(2, t, xb, sb, pb, abuf, nmaps, j0);
            }
        }
}

/* --------------------------------------------------------------- synthesis */

typedef struct synacc {
    clef_vd a[NMGROUP][2][2][NV]; /* [map][parity][re/im][vector] */
} synacc;

ALWAYS_INLINE void syn_acc(int nm, synacc *A, int par, const clef_vd *mu,
                           const double complex *bl, int l, int nmaps, int j0)
{
    for (int j = 0; j < nm; j++) {
        const double complex bv = bl[(size_t)l * nmaps + j0 + j];
        const double br = creal(bv), bi = cimag(bv);
        for (int v = 0; v < NV; v++) {
            A->a[j][par][0][v] += mu[v] * br;
            A->a[j][par][1][v] += mu[v] * bi;
        }
    }
}

#define SYN_STEP(q, L)                                                                       \
    do {                                                                                     \
        const double cl_ = c[L];                                                             \
        clef_vd mu_[NV];                                                                     \
        for (int v = 0; v < NV; v++) {                                                       \
            mu_[v] = x[v] * a[v] - cl_ * b[v];                                               \
            b[v] = a[v];                                                                     \
            a[v] = mu_[v];                                                                   \
        }                                                                                    \
        for (int j = 0; j < nm; j++) {                                                       \
            const double *bp_ = (const double *)(bl + (size_t)(L) * nmaps + j0 + j);         \
            const double br_ = bp_[0], bi_ = bp_[1];                                         \
            for (int v = 0; v < NV; v++) {                                                   \
                acc[j][q][0][v] += mu_[v] * br_;                                             \
                acc[j][q][1][v] += mu_[v] * bi_;                                             \
            }                                                                                \
        }                                                                                    \
    } while (0)

ALWAYS_INLINE void syn_fast(int nm, blockstate *s, const clef_sht_mtab *t, int l0, int l1,
                            synacc *A, const double complex *bl, int nmaps, int j0)
{
    const int par0 = (l0 - t->m) & 1;
    clef_vd acc[NMGROUP][2][2][NV]; /* [map][first/second][re/im][vector] */
    for (int j = 0; j < nm; j++)
        for (int q = 0; q < 2; q++)
            for (int r = 0; r < 2; r++)
                for (int v = 0; v < NV; v++)
                    acc[j][q][r][v] = A->a[j][par0 ^ q][r][v];
    clef_vd x[NV], a[NV], b[NV];
    for (int v = 0; v < NV; v++) {
        x[v] = s->x[v];
        a[v] = s->mu1[v];
        b[v] = s->mu2[v];
    }
    const double *c = t->c;
    int l = l0;
    for (; l + 1 < l1; l += 2) {
        SYN_STEP(0, l);
        SYN_STEP(1, l + 1);
    }
    if (l < l1)
        SYN_STEP(0, l);
    for (int j = 0; j < nm; j++)
        for (int q = 0; q < 2; q++)
            for (int r = 0; r < 2; r++)
                for (int v = 0; v < NV; v++)
                    A->a[j][par0 ^ q][r][v] = acc[j][q][r][v];
    for (int v = 0; v < NV; v++) {
        s->mu1[v] = a[v];
        s->mu2[v] = b[v];
    }
}

ALWAYS_INLINE void syn_block(int nm, const clef_sht_mtab *t, const double *x, const double *sth,
                             double *const *pb, const double complex *bl, int nmaps, int j0)
{
    blockstate s;
    synacc A;
    memset(&A, 0, sizeof A);
    const int m = t->m, lmax = t->lmax;
    block_start(&s, t, x, sth);
    if (s.nlive) {
        clef_vd mu[NV];
        for (int v = 0; v < NV; v++)
            mu[v] = s.mu1[v] * s.live[v];
        syn_acc(nm, &A, 0, mu, bl, m, nmaps, j0);
    }
    int l = m + 1, ir = 0;
    SCALED_PHASE(syn_acc(nm, &A, (l - m) & 1, mul, bl, l, nmaps, j0));
    while (l <= lmax) {
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
                for (int v = 0; v < NV; v++)
                    memcpy(pb[j] + (q * 2 + r) * BL + v * VL, &A.a[j][q][r][v], sizeof(clef_vd));
}

static void KNAME(synthesis)(const clef_sht_mtab *t, int nblocks, const double *x,
                            const double *sth, double *ph, size_t map_stride, int nmaps,
                            const double complex *bl)
{
    for (int b = 0; b < nblocks; b++)
        for (int u = 0; u < BL; u += SB) {
            const size_t off = (size_t)b * CLEF_SHT_BLOCKDBL + (size_t)u;
            for (int j0 = 0; j0 < nmaps; j0 += NMGROUP) {
                const int nm = nmaps - j0 < NMGROUP ? nmaps - j0 : NMGROUP;
                double *pb[NMGROUP];
                for (int j = 0; j < nm; j++)
                    pb[j] = ph + (size_t)(j0 + j) * map_stride + off;
                const double *xb = x + (size_t)b * BL + u, *sb = sth + (size_t)b * BL + u;
                if (nm == 1)
                    syn_block(1, t, xb, sb, pb, bl, nmaps, j0);
                else
                    syn_block(2, t, xb, sb, pb, bl, nmaps, j0);
            }
        }
}

const clef_sht_kernel KNAME(kernel) = {KSTR, VL, KNAME(analysis), KNAME(synthesis)};

#undef VL
#undef NV
#undef BL
#undef SB
