/* The row kernel of the coupling matrix (src/coupling.c), written once
 * for any vector width and included by one file per width
 * (coupling_row_avx512.c, coupling_row_avx2.c, coupling_row_base.c), each
 * compiled for its instruction set (Makefile KFLAGS) and chosen at run
 * time like the Legendre kernels (include/clef/kernel.h).  The including
 * file defines KVL (lanes), KNACC (accumulator vectors) and KNAME(f). */
#include <string.h>

#include "coupling_impl.h"

/* -std=c11 turns contraction off; the row sum is written for FMAs. */
#pragma GCC optimize("fp-contract=fast")

#define VL KVL
#define NACC KNACC
#define RB (VL * NACC)
_Static_assert(RB <= CLEF_COUPLING_PAD, "tables are padded for the widest block");

typedef double vd __attribute__((vector_size(VL * sizeof(double))));

/* One row l1 of the upper triangle: s[l2 - l1] = sum_l3 (2l3+1) W_l3
 * (l1 l2 l3; 0 0 0)^2 for l1 <= l2 <= lmax.  With l3 = l2 - l1 + 2k,
 * k = 0..l1 (the even-J terms; PERFORMANCE.md section 3) and g = l2 + k,
 *   f^2 = A(k) A(l1 - k) A(l2 - l1 + k) / ((2(l2 + k) + 1) A(l2 + k)).
 * The factors depending on l2 + k only through n = l2 + k are folded per
 * row into t[n] = A(n - l1) / ((2n + 1) A(n)), and wt[n] = (2n+1) W_n, so
 * each term is
 *   c_k * t[l2 + k] * wt[l2 - l1 + 2k],  c_k = A(k) A(l1 - k):
 * two contiguous loads in l2, one multiply and one multiply-add; no
 * square root, no division.  A block of RB = NACC x VL sums in l2 stays
 * in vector registers while k runs.  Tables are padded by
 * CLEF_COUPLING_PAD >= RB so whole blocks can run past lmax; t is
 * per-thread scratch of ntab. */
void KNAME(coupling_row)(int l1, int lmax, int wl_lmax, const double *restrict a,
                        const double *restrict b, const double *restrict wt, size_t ntab,
                        double *restrict t, double *restrict s)
{
    for (size_t n = (size_t)l1; n < ntab; n++)
        t[n] = a[n - (size_t)l1] * b[n];
    for (int j0 = l1; j0 <= lmax; j0 += RB) {
        double acc[RB];
        /* W_l3 = 0 beyond wl_lmax: stop k once l3 at the block start passes it. */
        int kmax = l1;
        if (wl_lmax - (j0 - l1) < 2 * kmax)
            kmax = (wl_lmax - (j0 - l1)) / 2;
        /* GNU C vector extension: NACC accumulators of VL lanes the
         * compiler keeps in registers (an array accumulator is spilled to
         * the stack on every k; 1.7x slower measured). */
        vd sum[NACC];
        for (int q = 0; q < NACC; q++)
            sum[q] = (vd){0};
        for (int k = 0; k <= kmax; k++) {
            const double c = a[k] * a[l1 - k];
            const double *pt = t + (j0 + k);
            const double *pw = wt + (j0 - l1 + 2 * k);
            for (int q = 0; q < NACC; q++) {
                vd tv, wv;
                memcpy(&tv, pt + q * VL, sizeof tv);
                memcpy(&wv, pw + q * VL, sizeof wv);
                sum[q] += c * tv * wv;
            }
        }
        memcpy(acc, sum, sizeof sum);
        const int nj = lmax - j0 + 1 < RB ? lmax - j0 + 1 : RB;
        for (int j = 0; j < nj; j++)
            s[j0 - l1 + j] = acc[j];
    }
}

