/* Coupling matrices of spin 0 x 2 and 2 x 2 fields and the joint
 * decoupling of the EE/BB and EB/BE blocks (Kogut et al. 2003, ApJS 148,
 * 161, appendix; Brown, Castro & Taylor 2005, MNRAS 360, 1262, eqs. 20-25;
 * Grain et al. 2009, PRD 79, 123515).  With W^{XY}_l the cross power
 * spectrum of the masks of fields X and Y (T mask w_T, Q/U mask w_P) and
 * J = l1 + l2 + l3:
 *
 *   M^{TE}_{l1l2} = (2l2+1)/(4 pi) sum_l3 (2l3+1) W^{TP}_l3 (l1 l2 l3; 0 0 0)(l1 l2 l3; 2 -2 0),
 *   M^{+}_{l1l2}  = (2l2+1)/(8 pi) sum_l3 (2l3+1) W^{PP}_l3 (l1 l2 l3; 2 -2 0)^2 (1 + (-1)^J),
 *   M^{-}_{l1l2}  = (2l2+1)/(8 pi) sum_l3 (2l3+1) W^{PP}_l3 (l1 l2 l3; 2 -2 0)^2 (1 - (-1)^J),
 *
 * and the pseudo-spectra of a Gaussian sky obey
 *   <C~^TE> = M^TE C^TE,   <C~^TB> = M^TE C^TB,
 *   <C~^EE> = M^+ C^EE + M^- C^BB,   <C~^BB> = M^- C^EE + M^+ C^BB,
 *   <C~^EB> = M^+ C^EB - M^- C^BE,   <C~^BE> = -M^- C^EB + M^+ C^BE
 * (C~^TT with the spin-0 matrix of coupling.c).  The 2 x 2 blocks are
 * binned and inverted jointly, so the E-to-B leakage of the mask is
 * undone, not ignored.  The convention of the transforms is that of
 * docs/transforms.md (a_{+-2} = -(a_E +- i a_B)); tests/test_coupling_pol.c
 * checks every matrix against pseudo-spectra computed by the transforms.
 */
#define _DEFAULT_SOURCE /* M_PI */
#include <lapacke.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include <omp.h>

#include "cache_impl.h"
#include "clef/hash.h"
#include "clef/wigner.h"
#include "core_impl.h"
#include "coupling_impl.h"

void clef_coupling_pol_free(clef_coupling_pol *p)
{
    if (!p)
        return;
    clef_coupling_destroy(p->te);
    clef_coupling_destroy(p->pp);
    clef_coupling_destroy(p->mm);
    p->te = p->pp = p->mm = NULL;
}

static int check_cross(int lmax, const double *w, int wl_lmax, const char *what)
{
    if (!w)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol): %s mask spectrum is NULL", what);
    if (lmax < 0 || wl_lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol): lmax %d, mask spectrum lmax %d", lmax, wl_lmax);
    for (int l = 0; l <= wl_lmax; l++)
        if (!isfinite(w[l]))
            CLEF_FAIL(CLEF_EINVAL, "coupling (pol): %s mask spectrum at l = %d is not finite", what,
                      l);
    return CLEF_OK;
}

int clef_coupling_pol_create(clef_coupling_pol *out, int lmax, const double *w_tp,
                             const double *w_pp, int wl_lmax)
{
    int status = CLEF_OK;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol): output is NULL");
    memset(out, 0, sizeof *out);
    if (w_tp)
        CLEF_TRY(check_cross(lmax, w_tp, wl_lmax, "T x P"));
    CLEF_TRY(clef_coupling_check_wl(lmax, w_pp, wl_lmax));
    /* The T x P spectrum may be negative; the matrices keep W^PP as their
     * W_l (used only for the sky fraction and bin-width advice). */
    if (w_tp)
        CLEF_CHECK(clef_coupling_alloc_empty(&out->te, lmax, w_pp, wl_lmax));
    CLEF_CHECK(clef_coupling_alloc_empty(&out->pp, lmax, w_pp, wl_lmax));
    CLEF_CHECK(clef_coupling_alloc_empty(&out->mm, lmax, w_pp, wl_lmax));
    const int L = lmax, n = L + 1;
    const int wtop = wl_lmax < 2 * L ? wl_lmax : 2 * L;
    double *mte = out->te ? out->te->m : NULL, *mp = out->pp->m, *mmi = out->mm->m;
    int failed = 0;
    const double inv4pi = 1.0 / (4.0 * M_PI);
#pragma omp parallel
    {
        double *r0 = malloc((2 * (size_t)L + 2) * sizeof *r0);
        double *r2 = malloc((2 * (size_t)L + 2) * sizeof *r2);
        if (!r0 || !r2) {
#pragma omp atomic write
            failed = 1;
        }
#pragma omp for schedule(dynamic, 1)
        for (int l1 = L; l1 >= 0; l1--) {
            if (!r0 || !r2)
                continue;
            for (int l2 = l1; l2 <= L; l2++) {
                int lo, hi;
                clef_wigner_3j000_row(l1, l2, r0, &lo, &hi);
                clef_wigner_3j22_row(l1, l2, r2, NULL, NULL);
                const int top = hi < wtop ? hi : wtop;
                double ste = 0.0, sp = 0.0, sm = 0.0;
                for (int l3 = lo; l3 <= top; l3++) {
                    const double f2 = r2[l3 - lo], g = (2.0 * l3 + 1.0);
                    if ((l1 + l2 + l3) % 2 == 0) {
                        sp += g * w_pp[l3] * f2 * f2;
                        if (w_tp)
                            ste += g * w_tp[l3] * r0[l3 - lo] * f2;
                    } else {
                        sm += g * w_pp[l3] * f2 * f2;
                    }
                }
                /* (1 +- (-1)^J)/(8 pi) = 1/(4 pi) on the terms kept. */
                const size_t i = (size_t)l1 * n + l2;
                mp[i] = (2.0 * l2 + 1.0) * inv4pi * sp;
                mmi[i] = (2.0 * l2 + 1.0) * inv4pi * sm;
                if (mte)
                    mte[i] = (2.0 * l2 + 1.0) * inv4pi * ste;
            }
        }
        free(r0);
        free(r2);
    }
    if (failed) {
        status = clef_fail(CLEF_ENOMEM, "coupling (pol): out of memory for 3j rows");
        goto fail;
    }
    /* Lower triangle: M_l2l1 = M_l1l2 (2l1+1)/(2l2+1), the symmetry of the
     * 3j sums. */
    for (int l2 = 0; l2 <= L; l2++)
        for (int l1 = 0; l1 < l2; l1++) {
            const double f = (2.0 * l1 + 1.0) / (2.0 * l2 + 1.0);
            const size_t up = (size_t)l1 * n + l2, dn = (size_t)l2 * n + l1;
            mp[dn] = mp[up] * f;
            mmi[dn] = mmi[up] * f;
            if (mte)
                mte[dn] = mte[up] * f;
        }
    return CLEF_OK;
fail:
    clef_coupling_pol_free(out);
    return status;
}

/* Cache (docs/coupling.md, kind 5): the matrices as one entry keyed by
 * everything they depend on: lmax, the used part of both mask spectra and
 * the clef version.  Cache problems are warnings; the matrices are then
 * computed. */
static void pol_key(int lmax, const double *w_tp, const double *w_pp, int wl_lmax, char hex[65])
{
    const int wtop = wl_lmax < 2 * lmax ? wl_lmax : 2 * lmax;
    const int64_t v[3] = {lmax, wtop, w_tp != NULL};
    clef_sha256 h;
    unsigned char d[CLEF_SHA256_BYTES];
    clef_sha256_init(&h);
    static const char tag[] = "clef polarized coupling M^TE M+ M-";
    clef_sha256_update(&h, tag, sizeof tag);
    clef_sha256_update(&h, CLEF_VERSION, strlen(CLEF_VERSION) + 1);
    clef_sha256_update(&h, v, sizeof v);
    if (w_tp)
        clef_sha256_update(&h, w_tp, ((size_t)wtop + 1) * sizeof *w_tp);
    clef_sha256_update(&h, w_pp, ((size_t)wtop + 1) * sizeof *w_pp);
    clef_sha256_final(&h, d);
    clef_sha256_hex(d, hex);
}

int clef_coupling_pol_create_cached(clef_coupling_pol *out, int lmax, const double *w_tp,
                                    const double *w_pp, int wl_lmax, const char *cache_dir,
                                    int *hit)
{
    int status = CLEF_OK;
    char dir[4096], path[4096 + 160], key[65];
    double *buf = NULL;
    if (hit)
        *hit = 0;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol): output is NULL");
    memset(out, 0, sizeof *out);
    const char *why = clef_cache_resolve_dir(cache_dir, dir, sizeof dir);
    if (!why) {
        if (w_tp)
            CLEF_TRY(check_cross(lmax, w_tp, wl_lmax, "T x P"));
        CLEF_TRY(clef_coupling_check_wl(lmax, w_pp, wl_lmax));
        pol_key(lmax, w_tp, w_pp, wl_lmax, key);
        if (!clef_cache_path(path, sizeof path, dir, CLEF_CACHE_POL, key))
            why = "path too long";
    }
    if (why) {
        clef_log(CLEF_LOG_WARN, "coupling cache: disabled: %s", why);
        return clef_coupling_pol_create(out, lmax, w_tp, w_pp, wl_lmax);
    }
    const size_t n = (size_t)lmax + 1, nm = w_tp ? 3 : 2;
    {
        /* A hit is read in place, M+ then M- then M^TE (no staging copy:
         * the matrices' pages are touched once). */
        if (w_tp)
            CLEF_CHECK(clef_coupling_alloc_empty(&out->te, lmax, w_pp, wl_lmax));
        CLEF_CHECK(clef_coupling_alloc_empty(&out->pp, lmax, w_pp, wl_lmax));
        CLEF_CHECK(clef_coupling_alloc_empty(&out->mm, lmax, w_pp, wl_lmax));
        double *const parts[3] = {out->pp->m, out->mm->m, w_tp ? out->te->m : NULL};
        if (clef_cache_load_parts(path, CLEF_CACHE_POL, key, nm * n, n, (int)nm, parts)) {
            if (hit)
                *hit = 1;
            return CLEF_OK;
        }
        clef_coupling_pol_free(out);
    }
    if (!(buf = clef_alloc_large(nm * n * n * sizeof *buf)))
        CLEF_FAIL(CLEF_ENOMEM, "coupling (pol): out of memory for the cache entry");
    CLEF_CHECK(clef_coupling_pol_create(out, lmax, w_tp, w_pp, wl_lmax));
    memcpy(buf, out->pp->m, n * n * sizeof *buf);
    memcpy(buf + n * n, out->mm->m, n * n * sizeof *buf);
    if (w_tp)
        memcpy(buf + 2 * n * n, out->te->m, n * n * sizeof *buf);
    clef_cache_store(dir, path, CLEF_CACHE_POL, key, nm * n, n, buf);
    free(buf);
    return CLEF_OK;
fail:
    free(buf);
    clef_coupling_pol_free(out);
    return status;
}

/* ------------------------------------------------------------------ binned */

struct clef_coupling_pol_binned {
    int nbins, lmax;
    const clef_coupling *m[4]; /* blocks aa, ab, ba, bb (borrowed; NULL = zero), for the windows */
    double sg[4];              /* their signs */
    double rcond;
    double *lu;       /* (2 nb)^2 LU factors of [[K_aa, K_ab], [K_ba, K_bb]] */
    lapack_int *ipiv;
    double *kinv_p;   /* 2 nb x 2 (lmax + 1): K^-1 blockdiag(P, P) */
};

void clef_coupling_pol_binned_destroy(clef_coupling_pol_binned *k)
{
    if (!k)
        return;
    free(k->lu);
    free(k->ipiv);
    free(k->kinv_p);
    free(k);
}

int clef_coupling_pol_binned_nbins(const clef_coupling_pol_binned *k) { return k->nbins; }
double clef_coupling_pol_binned_rcond(const clef_coupling_pol_binned *k) { return k->rcond; }
const double *clef_coupling_pol_binned_kinv_p(const clef_coupling_pol_binned *k)
{
    return k->kinv_p;
}

/* The joint operator of two spectra (a, b) whose pseudo-spectra obey
 * <C~^a> = M_aa C^a + M_ab C^b, <C~^b> = M_ba C^a + M_bb C^b (blocks as
 * m[0..3] = aa, ab, ba, bb, each scaled by sg[]; a NULL block is zero). */
static int binned_rows(clef_coupling_pol_binned **out, const clef_coupling *const m[4],
                       const double sg[4], const clef_bins *bins, const double *transfer,
                       const char *what, const clef_coupling_opts *opts)
{
    int status = CLEF_OK;
    clef_coupling_pol_binned *k = NULL;
    double *kb[4] = {NULL, NULL, NULL, NULL};
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol): output pointer is NULL");
    *out = NULL;
    if (!m[0] || !m[3] || !bins)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol): NULL matrix or bins");
    for (int i = 1; i < 4; i++)
        if (m[i] && m[i]->lmax != m[0]->lmax)
            CLEF_FAIL(CLEF_EINVAL, "coupling (pol): %s blocks of lmax %d and %d", what,
                      m[0]->lmax, m[i]->lmax);
    const double rmin = opts && opts->rcond_min > 0 ? opts->rcond_min : CLEF_COUPLING_RCOND_MIN;
    const int nb = clef_bins_count(bins), nb2 = 2 * nb;
    const size_t n = (size_t)m[0]->lmax + 1, n2 = 2 * n;
    k = calloc(1, sizeof *k);
    if (!k) {
        status = clef_fail(CLEF_ENOMEM, "coupling (pol): out of memory for %d bins", nb);
        goto fail;
    }
    for (int i = 0; i < 4; i++) {
        if (!(kb[i] = calloc((size_t)nb * nb, sizeof *kb[i]))) {
            status = clef_fail(CLEF_ENOMEM, "coupling (pol): out of memory for %d bins", nb);
            goto fail;
        }
        /* M+ and M- each fill two blocks: bin each distinct matrix once. */
        int same = 0;
        while (same < i && m[same] != m[i])
            same++;
        if (m[i] && same < i)
            memcpy(kb[i], kb[same], (size_t)nb * nb * sizeof *kb[i]);
        else if (m[i])
            CLEF_CHECK(clef_coupling_build_k(m[i], bins, transfer, kb[i]));
        k->m[i] = m[i];
        k->sg[i] = sg[i];
    }
    k->nbins = nb;
    k->lmax = m[0]->lmax;
    k->lu = malloc((size_t)nb2 * nb2 * sizeof *k->lu);
    k->ipiv = malloc((size_t)nb2 * sizeof *k->ipiv);
    k->kinv_p = calloc((size_t)nb2 * n2, sizeof *k->kinv_p);
    if (!k->lu || !k->ipiv || !k->kinv_p) {
        status = clef_fail(CLEF_ENOMEM, "coupling (pol): out of memory for %d bins", nb);
        goto fail;
    }
    for (int i = 0; i < nb; i++)
        for (int j = 0; j < nb; j++) {
            const size_t e = (size_t)i * nb + j;
            k->lu[(size_t)i * nb2 + j] = sg[0] * kb[0][e];
            k->lu[(size_t)i * nb2 + nb + j] = sg[1] * kb[1][e];
            k->lu[(size_t)(nb + i) * nb2 + j] = sg[2] * kb[2][e];
            k->lu[(size_t)(nb + i) * nb2 + nb + j] = sg[3] * kb[3][e];
        }
    const double anorm = LAPACKE_dlange(LAPACK_ROW_MAJOR, '1', nb2, nb2, k->lu, nb2);
    lapack_int info = LAPACKE_dgetrf(LAPACK_ROW_MAJOR, nb2, nb2, k->lu, nb2, k->ipiv);
    if (info != 0) {
        status = clef_fail(CLEF_ENUMERIC, "coupling (pol): the binned %s coupling matrix is "
                           "singular (LAPACK dgetrf info %d): use wider bins",
                           what, (int)info);
        goto fail;
    }
    info = LAPACKE_dgecon(LAPACK_ROW_MAJOR, '1', nb2, k->lu, nb2, anorm, &k->rcond);
    if (info != 0 || !(k->rcond >= rmin)) {
        status = clef_fail(CLEF_ENUMERIC, "coupling (pol): the binned %s coupling matrix is "
                           "ill-conditioned (rcond %.3g < %.3g, %d bins): use wider bins",
                           what, k->rcond, rmin, nb);
        goto fail;
    }
    for (int h = 0; h < 2; h++)
        for (int b = 0; b < nb; b++)
            for (int l = clef_bins_l_lo(bins, b); l <= clef_bins_l_hi(bins, b); l++)
                k->kinv_p[(size_t)(h * nb + b) * n2 + h * n + (size_t)l] = clef_bins_p(bins, b, l);
    info = LAPACKE_dgetrs(LAPACK_ROW_MAJOR, 'N', nb2, (lapack_int)n2, k->lu, nb2, k->ipiv,
                          k->kinv_p, (lapack_int)n2);
    if (info != 0) {
        status = clef_fail(CLEF_ENUMERIC, "coupling (pol): LAPACK dgetrs failed (info %d)",
                           (int)info);
        goto fail;
    }
    for (int i = 0; i < 4; i++)
        free(kb[i]);
    *out = k;
    return CLEF_OK;
fail:
    for (int i = 0; i < 4; i++)
        free(kb[i]);
    clef_coupling_pol_binned_destroy(k);
    return status;
}

int clef_coupling_pol_binned_create(clef_coupling_pol_binned **out, const clef_coupling *mplus,
                                    const clef_coupling *mminus, const clef_bins *bins,
                                    const double *transfer, int sign,
                                    const clef_coupling_opts *opts)
{
    if (out)
        *out = NULL;
    if (!mplus || !mminus)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol): NULL matrix or bins");
    if (sign != 1 && sign != -1)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol): block sign %d (expected +1 for EE/BB, -1 for "
                  "EB/BE)", sign);
    const clef_coupling *const m[4] = {mplus, mminus, mminus, mplus};
    const double sg[4] = {1.0, sign, sign, 1.0};
    return binned_rows(out, m, sg, bins, transfer, sign > 0 ? "EE/BB" : "EB/BE", opts);
}

int clef_coupling_pol_binned_create_rows(clef_coupling_pol_binned **out,
                                         const clef_coupling *m_aa, const clef_coupling *m_ab,
                                         const clef_coupling *m_ba, const clef_coupling *m_bb,
                                         const clef_bins *bins, const double *transfer,
                                         const clef_coupling_opts *opts)
{
    const clef_coupling *const m[4] = {m_aa, m_ab, m_ba, m_bb};
    const double sg[4] = {1.0, 1.0, 1.0, 1.0};
    return binned_rows(out, m, sg, bins, transfer, "EE/BB (pure B)", opts);
}

void clef_coupling_pol_binned_decouple(const clef_coupling_pol_binned *k, const double *pcl_a,
                                       const double *pcl_b, double *band_a, double *band_b)
{
    const int nb = k->nbins;
    const size_t n = (size_t)k->lmax + 1;
    for (int r = 0; r < 2 * nb; r++) {
        const double *row = k->kinv_p + (size_t)r * 2 * n;
        double s = 0.0;
        for (size_t l = 0; l < n; l++)
            s += row[l] * pcl_a[l] + row[n + l] * pcl_b[l];
        (r < nb ? band_a : band_b)[r % nb] = s;
    }
}

int clef_coupling_pol_binned_windows(const clef_coupling_pol_binned *k,
                                     const clef_coupling *mplus, const clef_coupling *mminus,
                                     const clef_bins *bins, const double *transfer, double *out)
{
    if (!k || !mplus || !mminus || !bins || !out)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol) windows: NULL argument");
    if (mplus != k->m[0] || mminus != k->m[1])
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol) windows: matrices do not match the binned "
                  "operator");
    return clef_coupling_pol_binned_windows_rows(k, bins, transfer, out);
}

int clef_coupling_pol_binned_windows_rows(const clef_coupling_pol_binned *k,
                                          const clef_bins *bins, const double *transfer,
                                          double *out)
{
    if (!k || !bins || !out)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol) windows: NULL argument");
    if (clef_bins_count(bins) != k->nbins)
        CLEF_FAIL(CLEF_EINVAL, "coupling (pol) windows: bins do not match the binned operator");
    CLEF_TRY(clef_coupling_check_transfer(transfer, k->lmax));
    const int nb = k->nbins;
    const size_t n = (size_t)k->lmax + 1, n2 = 2 * n;
    /* Rows (h, b): sum_{l'' in b} P_bl'' [M^{h h'}]_{l'' l}, columns (h', l). */
    for (int h = 0; h < 2; h++)
        for (int b = 0; b < nb; b++) {
            double *row = out + (size_t)(h * nb + b) * n2;
            memset(row, 0, n2 * sizeof *row);
            for (int hp = 0; hp < 2; hp++) {
                const clef_coupling *mb = k->m[2 * h + hp];
                if (!mb)
                    continue;
                const double sg = k->sg[2 * h + hp];
                for (int l2 = clef_bins_l_lo(bins, b); l2 <= clef_bins_l_hi(bins, b); l2++) {
                    const double p = sg * clef_bins_p(bins, b, l2);
                    const double *a = mb->m + (size_t)l2 * n;
                    for (size_t l = 0; l < n; l++)
                        row[hp * n + l] += p * a[l];
                }
            }
        }
    lapack_int info = LAPACKE_dgetrs(LAPACK_ROW_MAJOR, 'N', 2 * nb, (lapack_int)n2, k->lu,
                                     2 * nb, k->ipiv, out, (lapack_int)n2);
    if (info != 0)
        CLEF_FAIL(CLEF_ENUMERIC, "coupling (pol) windows: LAPACK dgetrs failed (info %d)",
                  (int)info);
    if (transfer)
        for (int r = 0; r < 2 * nb; r++)
            for (size_t l = 0; l < n2; l++)
                out[(size_t)r * n2 + l] *= transfer[l % n];
    return CLEF_OK;
}
