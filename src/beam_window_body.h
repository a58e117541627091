/* The pair-sum kernel of the pixel window (src/beam_window.c), written
 * once for any vector width and included by one file per width
 * (beam_window_avx512.c, beam_window_avx2.c, beam_window_base.c), each
 * compiled for its instruction set (Makefile KFLAGS) and chosen at run
 * time like the Legendre kernels (include/clef/kernel.h).  The including
 * file defines KVL (lanes), KNV (vectors of pairs per block) and KNAME(f).
 *
 * sum[l] += sum_j P_l(x_j) for l = 2..lmax over np pair cosines x, by the
 * Bonnet recurrence P_l = a_l x P_{l-1} - b_l P_{l-2} (Abramowitz & Stegun
 * 8.5.3).  A block of KVL x KNV pairs keeps x, P_{l-1} and P_{l-2} in
 * vector registers while l runs (the former loop over a 256-pair array
 * loaded and stored both every l: memory-bound, and built for SSE2 only),
 * and adds its KVL-lane partial sum to acc[l] (lmax + 1 vectors of
 * scratch); the lanes are summed at the end.  Padding lanes of the last
 * block start from P_0 = P_1 = 0, which the recurrence keeps at 0. */
#include <stddef.h>
#include <string.h>

#include "beam_impl.h"

/* -std=c11 turns contraction off; the recurrence is written for FMAs. */
#pragma GCC optimize("fp-contract=fast")

#define VL KVL
#define NV KNV
#define RB (VL * NV)

typedef double vd __attribute__((vector_size(VL * sizeof(double))));

void KNAME(pixel_window_pairs)(const double *restrict x, size_t np, int lmax,
                         const double *restrict ca, const double *restrict cb,
                         double *restrict acc, double *restrict sum)
{
    memset(acc, 0, sizeof(vd) * ((size_t)lmax + 1));
    for (size_t b0 = 0; b0 < np; b0 += RB) {
        double xs[RB], q1[RB];
        for (int j = 0; j < RB; j++) {
            const int in = b0 + (size_t)j < np;
            xs[j] = in ? x[b0 + (size_t)j] : 0.0;
            q1[j] = in ? 1.0 : 0.0;
        }
        vd xv[NV], p0[NV], p1[NV];
        for (int v = 0; v < NV; v++) {
            memcpy(&xv[v], xs + v * VL, sizeof(vd));
            memcpy(&p0[v], q1 + v * VL, sizeof(vd)); /* P_0 = 1 */
            p1[v] = xv[v];                             /* P_1 = x */
        }
        vd *a = (vd *)acc;
        for (int l = 2; l <= lmax; l++) {
            const double al = ca[l], bl = cb[l];
            vd q[NV];
            for (int v = 0; v < NV; v++) {
                q[v] = al * xv[v] * p1[v] - bl * p0[v];
                p0[v] = p1[v];
                p1[v] = q[v];
            }
            /* A tree sum: a chain of NV dependent adds per l would be the
             * critical path (NV x the add latency). */
            for (int w = NV / 2; w >= 1; w /= 2)
                for (int v = 0; v < w; v++)
                    q[v] += q[v + w];
            a[l] += q[0];
        }
    }
    for (int l = 2; l <= lmax; l++) {
        double t = 0;
        for (int i = 0; i < VL; i++)
            t += acc[(size_t)l * VL + (size_t)i];
        sum[l] += t;
    }
}
