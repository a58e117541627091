/* Power spectra from a_lm (include/clef/sht.h).  For real maps, with
 * a_{l,-m} = (-1)^m conj(a_lm):
 *   C_l = (Re(a_l0 conj b_l0) + 2 sum_{m>0} Re(a_lm conj b_lm)) / (2l + 1)
 * (METHODS.md section 2; Hivon et al. 2002, ApJ 567, 2). */
#include "core_impl.h"
#include "clef/sht.h"

int clef_alm_cl(int lmax, int mmax, const double complex *a, const double complex *b,
                double *cl)
{
    if (lmax < 0 || mmax < 0 || mmax > lmax)
        CLEF_FAIL(CLEF_EINVAL, "clef_alm_cl: need 0 <= mmax <= lmax, got lmax = %d, mmax = %d",
                  lmax, mmax);
    if (!a || !cl)
        CLEF_FAIL(CLEF_EINVAL, "clef_alm_cl: a_lm or output array is NULL");
    if (!b)
        b = a;
    for (int l = 0; l <= lmax; l++)
        cl[l] = 0.0;
    /* m-major storage: walk each m row contiguously. */
    for (int m = 0; m <= mmax; m++) {
        const double f = m ? 2.0 : 1.0;
        const size_t i0 = clef_alm_index(lmax, m, m);
        for (int l = m; l <= lmax; l++) {
            const double complex x = a[i0 + (size_t)(l - m)], y = b[i0 + (size_t)(l - m)];
            cl[l] += f * (creal(x) * creal(y) + cimag(x) * cimag(y));
        }
    }
    for (int l = 0; l <= lmax; l++)
        cl[l] /= 2.0 * l + 1.0;
    return CLEF_OK;
}
