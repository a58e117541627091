/* Ring quadrature weights for analysis.
 *
 * The pixel sum Omega_pix sum_p f(p) integrates exactly only functions
 * whose zonal (m = 0) part is handled exactly by the ring latitudes, which
 * HEALPix rings do not do (METHODS.md section 2).  We give every ring a
 * weight w_r = 1 + u_r, equal for the north and south ring of a pair, and
 * choose the smallest correction u (minimum Euclidean norm) such that the
 * weighted ring sums integrate the even Legendre polynomials exactly:
 *
 *   Omega_pix sum_r w_r n_r P_l(z_r) = 4 pi delta_{l0},  l = 0, 2, ..., L_w,
 *
 * (odd l integrate to zero by the north/south symmetry).  With 2 nside
 * pairs we take L_w = 4 nside - 2, i.e. as many equations as unknowns; the
 * minimum-norm least-squares solution comes from LAPACK dgels (LQ
 * factorisation), so a rank-deficient or inconsistent system still gives
 * the least-squares weights.  Cost O(nside^3) once per plan.
 * Reference for the idea of latitude weights that make ring sums exact for
 * zonal harmonics: common practice in HEALPix-based codes [C]; the
 * minimum-norm formulation here is ours.
 */
#include <math.h>
#include <stdlib.h>

#include <lapacke.h>

#include "core_impl.h"
#include "sht_impl.h"

int clef_sht_ring_weights_compute(const clef_sht *p, double *w)
{
    const int np = p->npairs;
    const int lw = 7 * (int)p->nside / 2;
    const int neq = lw / 2 + 1 < np - 1 ? lw / 2 + 1 : (np > 1 ? np - 1 : 1);
    const size_t ldb = (size_t)(neq > np ? neq : np);
    double *a = malloc((size_t)neq * (size_t)np * sizeof *a);
    double *b = calloc(ldb, sizeof *b);
    if (!a || !b) {
        free(a);
        free(b);
        CLEF_FAIL(CLEF_ENOMEM, "sht: no memory for the ring-weight system (%d x %d)", neq, np);
    }
    for (int q = 0; q < np; q++) {
        const int r = q;
        const double npair = (q == np - 1 ? 1.0 : 2.0) * p->ring_npix[r];
        const double z = p->ring_z[r];
        /* Bonnet: l P_l = (2l - 1) z P_{l-1} - (l - 1) P_{l-2}. */
        double p0 = 1.0, p1 = z;
        a[q] = npair;
        for (int l = 2, k = 1; k < neq; l++) {
            const double p2 = ((2.0 * l - 1.0) * z * p1 - (l - 1.0) * p0) / l;
            p0 = p1;
            p1 = p2;
            if (!(l & 1))
                a[(size_t)k++ * np + q] = npair * p2;
        }
    }
    /* Right-hand side for u: -(A 1) for l > 0; l = 0 is already exact. */
    for (int k = 1; k < neq; k++) {
        double s = 0.0;
        for (int q = 0; q < np; q++)
            s += a[(size_t)k * np + q];
        b[k] = -s;
    }
    const lapack_int info = LAPACKE_dgels(LAPACK_ROW_MAJOR, 'N', neq, np, 1, a, np, b, 1);
    free(a);
    if (info != 0) {
        free(b);
        CLEF_FAIL(CLEF_ENUMERIC, "sht: ring-weight least squares failed (LAPACK dgels info = %d)",
                  (int)info);
    }
    for (int q = 0; q < np; q++) {
        w[q] = 1.0 + b[q];
        w[p->nrings - 1 - q] = 1.0 + b[q];
    }
    free(b);
    return CLEF_OK;
}
