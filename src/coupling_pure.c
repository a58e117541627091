/* Coupling matrix of the pure-B pseudo-spectrum (B-mode purification:
 * Smith 2006, PRD 74, 083002; Smith & Zaldarriaga 2007, PRD 76, 043001;
 * Grain, Tristram & Stompor 2009, PRD 79, 123515).
 *
 * The pure B multipoles of src/purify.c replace W _{+-2}Y*_lm in the
 * standard spin-2 analysis by (eth^2 (W Y_lm))* / N_l (eth-bar^2 for -2),
 * N_l = sqrt((l+2)!/(l-2)!).  With eth^k W = sum w_LM n_Lk _kY_LM (n_L0 = 1,
 * n_L1 = sqrt(L(L+1)), n_L2 = N_L), the product rule
 *   eth^2 (W Y) = W eth^2 Y + 2 eth W eth Y + (eth^2 W) Y
 * and the integral of three spin-weighted harmonics (Goldberg et al. 1967)
 * give the standard spin-2 kernel with (l l' L; 2 -2 0) replaced by
 *   G_ll'L = (l l' L; 2 -2 0) + 2 sqrt(L(L+1) / ((l-1)(l+2))) (l l' L; 1 -2 1)
 *          + sqrt((L+2)!/(L-2)! (l-2)!/(l+2)!) (l l' L; 0 -2 2)
 * (derived here; the form of Grain et al. 2009, section III), so
 *   <C~^BB_pure> = M^pure C^BB,
 *   M^pure_ll' = (2l'+1)/(8 pi) sum_L (2L+1) W_L G_ll'L^2 (1 + (-1)^(l+l'+L)).
 * The E -> B term carries (1 - (-1)^J) and vanishes identically, because
 * G_ll'L = 0 for odd l + l' + L (the purity of the estimator for a smooth
 * window: the counter-terms cancel the E leakage exactly in the harmonic
 * algebra; tests/test_purify.c checks the identity numerically).  What E
 * leakage remains comes from the window's truncated harmonic expansion
 * and the pixel quadrature, which purify.c's smoothness check bounds.
 * G is not symmetric in l, l' (the counter-terms depend on the pure-B
 * multipole l), so the whole matrix is computed: ~3 lmax^3 3j terms.
 */
#define _DEFAULT_SOURCE /* M_PI */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "clef/wigner.h"
#include "core_impl.h"
#include "coupling_impl.h"

int clef_coupling_pure_create(clef_coupling **out, int lmax, const double *w_pp, int wl_lmax)
{
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pure B): output is NULL");
    *out = NULL;
    CLEF_TRY(clef_coupling_check_wl(lmax, w_pp, wl_lmax));
    clef_coupling *c = NULL;
    CLEF_TRY(clef_coupling_alloc_empty(&c, lmax, w_pp, wl_lmax));
    const int L = lmax, n = L + 1;
    double *m = c->m;
    memset(m, 0, (size_t)n * n * sizeof *m);
    int failed = 0;
    const double inv4pi = 1.0 / (4.0 * M_PI);
#pragma omp parallel
    {
        double *g[3];
        for (int k = 0; k < 3; k++)
            g[k] = malloc((2 * (size_t)L + 2) * sizeof(double));
        if (!g[0] || !g[1] || !g[2]) {
#pragma omp atomic write
            failed = 1;
        }
#pragma omp for schedule(dynamic, 1)
        for (int l1 = L; l1 >= 2; l1--) {
            if (!g[0] || !g[1] || !g[2])
                continue;
            const double d1 = l1, q1 = (d1 - 1.0) * (d1 + 2.0), n2 = q1 * d1 * (d1 + 1.0);
            for (int l2 = 2; l2 <= L; l2++) {
                /* (L l1 l2; k, 2-k, -2) = (l1 l2 L; 2-k, -2, k) (cyclic), every L. */
                int lo[3], hi[3];
                for (int k = 0; k < 3; k++)
                    clef_wigner_3j_row(l1, l2, 2 - k, -2, g[k], &lo[k], &hi[k]);
                const int top = hi[0] < wl_lmax ? hi[0] : wl_lmax;
                double s = 0.0;
                for (int l3 = lo[0] + ((l1 + l2 + lo[0]) & 1); l3 <= top; l3 += 2) {
                    const double d3 = l3;
                    double gk = g[0][l3 - lo[0]];
                    if (l3 >= 1 && l3 >= lo[1] && l3 <= hi[1])
                        gk += 2.0 * sqrt(d3 * (d3 + 1.0) / q1) * g[1][l3 - lo[1]];
                    if (l3 >= 2 && l3 >= lo[2] && l3 <= hi[2])
                        gk += sqrt((d3 - 1.0) * d3 * (d3 + 1.0) * (d3 + 2.0) / n2) *
                              g[2][l3 - lo[2]];
                    s += (2.0 * d3 + 1.0) * w_pp[l3] * gk * gk;
                }
                /* (1 + (-1)^J)/(8 pi) = 1/(4 pi) on the even-J terms kept. */
                m[(size_t)l1 * n + l2] = (2.0 * l2 + 1.0) * inv4pi * s;
            }
        }
        for (int k = 0; k < 3; k++)
            free(g[k]);
    }
    if (failed) {
        clef_coupling_destroy(c);
        CLEF_FAIL(CLEF_ENOMEM, "coupling (pure B): out of memory for 3j rows");
    }
    *out = c;
    return CLEF_OK;
}
