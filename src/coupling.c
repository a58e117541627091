/* Mode-coupling matrix and binned decoupling operator (Hivon et al. 2002,
 * ApJ 567, 2; METHODS.md section 4; PERFORMANCE.md section 3). */
/* _DEFAULT_SOURCE: M_PI, and madvise() with MADV_HUGEPAGE on Linux. */
#define _DEFAULT_SOURCE
#include "coupling_impl.h"

#include <math.h>
#include <omp.h>
#include <stdlib.h>
#include <string.h>
#include <sys/mman.h>

#include "clef/kernel.h"
#include "clef/wigner.h"
#include "core_impl.h"


void clef_coupling_opts_default(clef_coupling_opts *o)
{
    o->rcond_min = CLEF_COUPLING_RCOND_MIN;
    o->width_level = CLEF_COUPLING_WIDTH_LEVEL;
}

int clef_coupling_check_wl(int lmax, const double *wl, int wl_lmax)
{
    if (lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "coupling: lmax %d must be >= 0", lmax);
    if (!wl || wl_lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "coupling: mask spectrum W_l missing (wl_lmax %d)", wl_lmax);
    for (int l = 0; l <= wl_lmax; l++)
        if (!isfinite(wl[l]) || wl[l] < 0)
            CLEF_FAIL(CLEF_EINVAL,
                      "coupling: mask spectrum W_l at l = %d is %g (must be finite and >= 0)", l,
                      wl[l]);
    return CLEF_OK;
}

int clef_coupling_alloc_empty(clef_coupling **out, int lmax, const double *wl, int wl_lmax)
{
    int status;
    clef_coupling *c = NULL;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "coupling: output pointer is NULL");
    *out = NULL;
    CLEF_TRY(clef_coupling_check_wl(lmax, wl, wl_lmax));
    c = calloc(1, sizeof *c);
    if (!c)
        CLEF_FAIL(CLEF_ENOMEM, "coupling: out of memory");
    const size_t n = (size_t)lmax + 1;
    c->lmax = lmax;
    c->wl_lmax = wl_lmax;
    c->wl = malloc(((size_t)wl_lmax + 1) * sizeof *c->wl);
    c->m = clef_alloc_large(n * n * sizeof *c->m);
    if (!c->wl || !c->m) {
        status = clef_fail(CLEF_ENOMEM, "coupling: out of memory for the %zu x %zu matrix", n,
                           n);
        goto fail;
    }
    memcpy(c->wl, wl, ((size_t)wl_lmax + 1) * sizeof *wl);
    *out = c;
    return CLEF_OK;
fail:
    clef_coupling_destroy(c);
    return status;
}

/* Rows l_first <= l1 < l_end of the upper triangle (l2 >= l1) of M into an
 * allocated c, with the row kernel of this machine. */
static int coupling_rows(clef_coupling *c, int l_first, int l_end)
{
    int status = CLEF_OK;
    double *a = NULL, *b = NULL, *wt = NULL;
    clef_kernel kid;
    CLEF_TRY(clef_kernel_resolve(CLEF_KERNEL_AUTO, &kid));
    clef_coupling_row_fn *coupling_row = kid == CLEF_KERNEL_AVX512 ? clef_coupling_row_avx512
                                         : kid == CLEF_KERNEL_AVX2 ? clef_coupling_row_avx2
                                                                   : clef_coupling_row_base;
    const int L = c->lmax, wl_lmax = c->wl_lmax;
    const double *wl = c->wl;
    const size_t n = (size_t)L + 1;
    /* Index ranges (coupling_row): a up to L + block, b and wt up to 2L + block. */
    const size_t ntab = 2 * (size_t)L + CLEF_COUPLING_PAD + 2;
    a = malloc(ntab * sizeof *a);
    b = malloc(ntab * sizeof *b);
    wt = calloc(ntab, sizeof *wt);
    if (!a || !b || !wt) {
        status = clef_fail(CLEF_ENOMEM, "coupling: out of memory for tables (lmax %d)", L);
        goto done;
    }
    clef_wigner_a_table((int)ntab - 1, a);
    for (size_t i = 0; i < ntab; i++)
        b[i] = 1.0 / ((2.0 * (double)i + 1.0) * a[i]);
    const int wtop = wl_lmax < 2 * L ? wl_lmax : 2 * L;
    for (int l = 0; l <= wtop; l++)
        wt[l] = (2.0 * l + 1.0) * wl[l];

    double *m = c->m;
    const double inv4pi = 1.0 / (4.0 * M_PI);
    double total = 0.0; /* kernel terms of these rows */
    for (int l1 = l_first; l1 < l_end; l1++)
        total += (double)(l1 + 1) * (L - l1 + 1);
    double done = 0.0;
    double reported = 0.0; /* touched by thread 0 only */
    int alloc_failed = 0;
#pragma omp parallel
    {
        double *s = malloc((n + CLEF_COUPLING_PAD) * sizeof *s);
        double *t = malloc(ntab * sizeof *t);
        if (!s || !t) {
#pragma omp atomic write
            alloc_failed = 1;
        }
#pragma omp for schedule(dynamic, 1)
        for (int l1 = l_first; l1 < l_end; l1++) {
            if (!s || !t)
                continue;
            coupling_row(l1, L, wtop, a, b, wt, ntab, t, s);
            /* M_l1l2 = (2 l2 + 1)/(4 pi) sum_l3 ... (Hivon et al. 2002; METHODS.md section 4). */
            double *row = m + (size_t)l1 * n;
            for (int l2 = l1; l2 <= L; l2++)
                row[l2] = (2.0 * l2 + 1.0) * inv4pi * s[l2 - l1];
            const double w = (double)(l1 + 1) * (L - l1 + 1);
            double now;
#pragma omp atomic capture
            {
                done += w;
                now = done;
            }
            /* From the calling thread (thread 0), at most ~200 times. */
            if (omp_get_thread_num() == 0 && now / total >= reported + 0.005) {
                reported = now / total;
                clef_progress("coupling", reported);
            }
        }
        free(s);
        free(t);
    }
    if (alloc_failed)
        status = clef_fail(CLEF_ENOMEM, "coupling: out of memory for row scratch");
done:
    free(a);
    free(b);
    free(wt);
    return status;
}

void clef_coupling_fill_lower(clef_coupling *c)
{
    /* Lower triangle from the symmetry of M_ll' / (2l' + 1), in square
     * tiles: a column-order walk over a large matrix misses the cache and
     * the TLB on every element. */
    enum { TILE = 64 };
    const int L = c->lmax;
    const size_t n = (size_t)L + 1;
    double *m = c->m;
#pragma omp parallel for schedule(dynamic, 1)
    for (int i0 = 0; i0 <= L; i0 += TILE) {
        const int i1 = i0 + TILE - 1 < L ? i0 + TILE - 1 : L;
        for (int j0 = 0; j0 <= i0; j0 += TILE) {
            for (int l2 = i0; l2 <= i1; l2++) {
                const int jend = j0 + TILE - 1 < l2 - 1 ? j0 + TILE - 1 : l2 - 1;
                for (int l1 = j0; l1 <= jend; l1++)
                    m[(size_t)l2 * n + l1] =
                        m[(size_t)l1 * n + l2] * (2.0 * l1 + 1.0) / (2.0 * l2 + 1.0);
            }
        }
    }
}

void clef_coupling_row_split(int lmax, int nparts, int *first)
{
    /* Row l1 costs (l1 + 1)(lmax - l1 + 1) kernel terms (coupling_row);
     * part k takes the rows from the k-th fraction of the total on. */
    const double total = (double)(lmax + 1) * (lmax + 2) * (lmax + 3) / 6.0;
    double acc = 0.0;
    int k = 1;
    first[0] = 0;
    for (int l1 = 0; l1 <= lmax && k < nparts; l1++) {
        acc += (double)(l1 + 1) * (lmax - l1 + 1);
        while (k < nparts && acc >= total * k / nparts)
            first[k++] = l1 + 1;
    }
    while (k <= nparts)
        first[k++] = lmax + 1;
}

int clef_coupling_create_rows(clef_coupling **out, int lmax, const double *wl, int wl_lmax,
                              int l_first, int l_end)
{
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "coupling: output pointer is NULL");
    *out = NULL;
    if (l_first < 0 || l_end < l_first || l_end > lmax + 1)
        CLEF_FAIL(CLEF_EINVAL, "coupling: rows %d..%d outside 0..%d", l_first, l_end - 1, lmax);
    clef_coupling *c = NULL;
    CLEF_TRY(clef_coupling_alloc_empty(&c, lmax, wl, wl_lmax));
    memset(c->m, 0, ((size_t)lmax + 1) * ((size_t)lmax + 1) * sizeof *c->m);
    const int status = coupling_rows(c, l_first, l_end);
    if (status != CLEF_OK) {
        clef_coupling_destroy(c);
        return status;
    }
    *out = c;
    return CLEF_OK;
}

double *clef_coupling_rows_data(clef_coupling *c) { return c->m; }

int clef_coupling_create(clef_coupling **out, int lmax, const double *wl, int wl_lmax)
{
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "coupling: output pointer is NULL");
    *out = NULL;
    clef_coupling *c = NULL;
    CLEF_TRY(clef_coupling_alloc_empty(&c, lmax, wl, wl_lmax));
    const int status = coupling_rows(c, 0, lmax + 1);
    if (status != CLEF_OK) {
        clef_coupling_destroy(c);
        return status;
    }
    clef_coupling_fill_lower(c);
    clef_progress("coupling", 1.0);
    *out = c;
    return CLEF_OK;
}

void clef_coupling_destroy(clef_coupling *c)
{
    if (!c)
        return;
    free(c->wl);
    free(c->m);
    free(c);
}

int clef_coupling_lmax(const clef_coupling *c) { return c->lmax; }
const double *clef_coupling_matrix(const clef_coupling *c) { return c->m; }

void clef_coupling_apply(const clef_coupling *c, const double *cl, double *out)
{
    const size_t n = (size_t)c->lmax + 1;
    for (size_t l = 0; l < n; l++) {
        const double *row = c->m + l * n;
        double s = 0.0;
        for (size_t j = 0; j < n; j++)
            s += row[j] * cl[j];
        out[l] = s;
    }
}

int clef_coupling_add_block(clef_coupling *c, int n, const double *d, double scale)
{
    if (!c || !d || n < 0 || n > c->lmax + 1)
        CLEF_FAIL(CLEF_EINVAL, "coupling: correction block of %d rows for lmax %d", n,
                  c ? c->lmax : -1);
    for (size_t i = 0; i < (size_t)n * (size_t)n; i++)
        if (!isfinite(d[i]))
            CLEF_FAIL(CLEF_EINVAL, "coupling: correction element (%zu, %zu) is not finite",
                      i / (size_t)n, i % (size_t)n);
    const size_t m = (size_t)c->lmax + 1;
    for (size_t l = 0; l < (size_t)n; l++)
        for (size_t lp = 0; lp < (size_t)n; lp++)
            c->m[l * m + lp] += scale * d[l * (size_t)n + lp];
    return CLEF_OK;
}

int clef_coupling_zero_columns(clef_coupling *c, int lcut)
{
    if (!c || lcut < 0 || lcut > c->lmax)
        CLEF_FAIL(CLEF_EINVAL, "coupling: columns 0..%d outside 0..%d", lcut, c ? c->lmax : -1);
    const size_t m = (size_t)c->lmax + 1;
    for (size_t l = 0; l < m; l++)
        for (int lp = 0; lp <= lcut; lp++)
            c->m[l * m + (size_t)lp] = 0.0;
    return CLEF_OK;
}

int clef_coupling_width(const double *wl, int wl_lmax, double level)
{
    if (!wl || wl_lmax < 0 || !(wl[0] > 0))
        return 0;
    int top = 0;
    for (int l = 0; l <= wl_lmax; l++)
        if (wl[l] >= level * wl[0])
            top = l;
    return top + 1;
}

int clef_coupling_check_transfer(const double *transfer, int lmax)
{
    if (!transfer)
        return CLEF_OK;
    for (int l = 0; l <= lmax; l++)
        if (!isfinite(transfer[l]) || transfer[l] < 0)
            CLEF_FAIL(CLEF_EINVAL,
                      "coupling: transfer F_l B_l^2 p_l^2 at l = %d is %g (must be finite and "
                      ">= 0)", l, transfer[l]);
    return CLEF_OK;
}

static int check_bins(const clef_bins *bins, int lmax)
{
    if (!bins)
        CLEF_FAIL(CLEF_EINVAL, "coupling: bins are NULL");
    if (clef_bins_lmax(bins) > lmax)
        CLEF_FAIL(CLEF_EINVAL,
                  "coupling: the last bin ends at l = %d, above the coupling matrix lmax %d",
                  clef_bins_lmax(bins), lmax);
    return CLEF_OK;
}

int clef_coupling_build_k(const clef_coupling *m, const clef_bins *bins,
                          const double *transfer, double *k)
{
    CLEF_TRY(check_bins(bins, m->lmax));
    CLEF_TRY(clef_coupling_check_transfer(transfer, m->lmax));
    const int nb = clef_bins_count(bins);
    const size_t n = (size_t)m->lmax + 1;
    /* K_bb' = sum_{l in b} sum_{l' in b'} P_bl M_ll' T_l' Q_l'b'
     * (Hivon et al. 2002; METHODS.md section 4); P and Q are zero outside
     * their bin, so the cost is one pass over the binned part of M. */
#pragma omp parallel for schedule(dynamic, 1)
    for (int bi = 0; bi < nb; bi++) {
        for (int bj = 0; bj < nb; bj++) {
            double s = 0.0;
            for (int l = clef_bins_l_lo(bins, bi); l <= clef_bins_l_hi(bins, bi); l++) {
                const double *row = m->m + (size_t)l * n;
                double r = 0.0;
                for (int lp = clef_bins_l_lo(bins, bj); lp <= clef_bins_l_hi(bins, bj); lp++)
                    r += row[lp] * (transfer ? transfer[lp] : 1.0) * clef_bins_q(bins, bj, lp);
                s += clef_bins_p(bins, bi, l) * r;
            }
            k[(size_t)bi * nb + bj] = s;
        }
    }
    return CLEF_OK;
}

/* Widest useful advice for an ill-conditioned K: the mask's coupling width
 * from W_l, the inverse patch size from the sky fraction, and at least
 * twice the narrowest bin tried. */
static int suggest_width(const clef_bins *bins, const double *wl, int wl_lmax, double level,
                         int *width_w, double *fsky)
{
    *width_w = clef_coupling_width(wl, wl_lmax, level);
    /* W_0 = 4 pi w1^2 for a mask of mean w1 (METHODS.md section 4). */
    const double w1 = wl && wl_lmax >= 0 && wl[0] > 0 ? sqrt(wl[0] / (4.0 * M_PI)) : 0.0;
    *fsky = w1;
    /* Cap of the same area: 2 pi (1 - cos theta) = 4 pi f; delta_l ~ 180 deg
     * over the patch diameter 2 theta (common practice). */
    int width_f = 0;
    if (w1 > 0 && w1 <= 1) {
        const double theta = acos(1.0 - 2.0 * w1);
        width_f = (int)ceil(M_PI / (2.0 * theta));
    }
    int narrow = 0;
    for (int b = 0; b < clef_bins_count(bins); b++) {
        const int w = clef_bins_l_hi(bins, b) - clef_bins_l_lo(bins, b) + 1;
        if (!narrow || w < narrow)
            narrow = w;
    }
    int s = 2 * narrow;
    if (*width_w > s)
        s = *width_w;
    if (width_f > s)
        s = width_f;
    return s;
}

int clef_coupling_binned_from_k(clef_coupling_binned **out, const double *k,
                                const clef_bins *bins, int lmax, const double *wl,
                                int wl_lmax, const clef_coupling_opts *opts)
{
    int status;
    clef_coupling_binned *kb = NULL;
    clef_coupling_opts o;
    clef_coupling_opts_default(&o);
    /* Fields <= 0 (e.g. a zero-initialised struct) keep their defaults. */
    if (opts && opts->rcond_min > 0)
        o.rcond_min = opts->rcond_min;
    if (opts && opts->width_level > 0)
        o.width_level = opts->width_level;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "coupling: output pointer is NULL");
    *out = NULL;
    CLEF_TRY(check_bins(bins, lmax));
    const int nb = clef_bins_count(bins);
    const size_t n = (size_t)lmax + 1;
    int width_w;
    double fsky;
    const int suggest = suggest_width(bins, wl, wl_lmax, o.width_level, &width_w, &fsky);

    /* A bin whose row (no pseudo-power) or column (no true power reaches
     * the data) is zero makes K exactly singular. */
    for (int bi = 0; bi < nb; bi++) {
        double rmax = 0.0, cmax = 0.0;
        for (int bj = 0; bj < nb; bj++) {
            rmax = fmax(rmax, fabs(k[(size_t)bi * nb + bj]));
            cmax = fmax(cmax, fabs(k[(size_t)bj * nb + bi]));
            if (!isfinite(k[(size_t)bi * nb + bj]))
                CLEF_FAIL(CLEF_ENUMERIC, "coupling: binned matrix K[%d][%d] is not finite", bi,
                          bj);
        }
        if (rmax == 0.0 || cmax == 0.0) {
            if (!(fsky > 0))
                CLEF_FAIL(CLEF_ENUMERIC,
                          "coupling: the binned coupling matrix is singular: the mask is empty "
                          "(W_0 = 0, sky fraction 0)");
            CLEF_FAIL(CLEF_ENUMERIC,
                      "coupling: the binned coupling matrix is singular: bin %d (l = %d..%d) has "
                      "a zero %s (sky fraction ~%.3g, or the transfer function is zero over "
                      "the bin); use bins of at least %d multipoles and check the transfer "
                      "function", bi, clef_bins_l_lo(bins, bi), clef_bins_l_hi(bins, bi),
                      rmax == 0.0 ? "row" : "column", fsky, suggest);
        }
    }

    kb = calloc(1, sizeof *kb);
    if (!kb)
        CLEF_FAIL(CLEF_ENOMEM, "coupling: out of memory");
    kb->nbins = nb;
    kb->lmax = lmax;
    kb->k = malloc((size_t)nb * nb * sizeof *kb->k);
    kb->lu = malloc((size_t)nb * nb * sizeof *kb->lu);
    kb->ipiv = malloc((size_t)nb * sizeof *kb->ipiv);
    kb->kinv_p = calloc((size_t)nb * n, sizeof *kb->kinv_p);
    if (!kb->k || !kb->lu || !kb->ipiv || !kb->kinv_p) {
        status = clef_fail(CLEF_ENOMEM, "coupling: out of memory for %d bins", nb);
        goto fail;
    }
    memcpy(kb->k, k, (size_t)nb * nb * sizeof *k);
    memcpy(kb->lu, k, (size_t)nb * nb * sizeof *k);

    const double anorm = LAPACKE_dlange(LAPACK_ROW_MAJOR, '1', nb, nb, kb->lu, nb);
    lapack_int info = LAPACKE_dgetrf(LAPACK_ROW_MAJOR, nb, nb, kb->lu, nb, kb->ipiv);
    if (info < 0) {
        status = clef_fail(CLEF_ENUMERIC, "coupling: LAPACK dgetrf argument %d invalid",
                           (int)-info);
        goto fail;
    }
    if (info > 0) {
        status = clef_fail(CLEF_ENUMERIC,
                           "coupling: the binned coupling matrix is exactly singular (LAPACK "
                           "dgetrf info %d, bin %d); bins are narrower than the mask's "
                           "coupling width (~%d multipoles, sky fraction ~%.3g): use bins of "
                           "at least %d multipoles", (int)info, (int)info - 1, width_w, fsky,
                           suggest);
        goto fail;
    }
    info = LAPACKE_dgecon(LAPACK_ROW_MAJOR, '1', nb, kb->lu, nb, anorm, &kb->rcond);
    if (info != 0) {
        status = clef_fail(CLEF_ENUMERIC, "coupling: LAPACK dgecon failed (info %d)", (int)info);
        goto fail;
    }
    if (!(kb->rcond >= o.rcond_min)) {
        status = clef_fail(CLEF_ENUMERIC,
                           "coupling: the binned coupling matrix is ill-conditioned (rcond "
                           "%.3g < %.3g, %d bins): bins are narrower than the mask's coupling "
                           "width (~%d multipoles from W_l falling to %g W_0; sky fraction "
                           "~%.3g); use bins of at least %d multipoles", kb->rcond, o.rcond_min,
                           nb, width_w, o.width_level, fsky, suggest);
        goto fail;
    }
    /* K^-1 P by LU back-substitution with the nbins x (lmax+1) P as
     * right-hand sides (LAPACK dgetrs). */
    for (int bi = 0; bi < nb; bi++)
        for (int l = clef_bins_l_lo(bins, bi); l <= clef_bins_l_hi(bins, bi); l++)
            kb->kinv_p[(size_t)bi * n + l] = clef_bins_p(bins, bi, l);
    info = LAPACKE_dgetrs(LAPACK_ROW_MAJOR, 'N', nb, (lapack_int)n, kb->lu, nb, kb->ipiv,
                          kb->kinv_p, (lapack_int)n);
    if (info != 0) {
        status = clef_fail(CLEF_ENUMERIC, "coupling: LAPACK dgetrs failed (info %d)", (int)info);
        goto fail;
    }
    clef_log(CLEF_LOG_INFO, "coupling: binned matrix %d x %d, rcond %.3g", nb, nb, kb->rcond);
    *out = kb;
    return CLEF_OK;
fail:
    clef_coupling_binned_destroy(kb);
    return status;
}

int clef_coupling_binned_create(clef_coupling_binned **out, const clef_coupling *m,
                                const clef_bins *bins, const double *transfer,
                                const clef_coupling_opts *opts)
{
    if (out)
        *out = NULL;
    if (!m)
        CLEF_FAIL(CLEF_EINVAL, "coupling: coupling matrix is NULL");
    CLEF_TRY(check_bins(bins, m->lmax));
    const int nb = clef_bins_count(bins);
    double *k = malloc((size_t)nb * nb * sizeof *k);
    if (!k)
        CLEF_FAIL(CLEF_ENOMEM, "coupling: out of memory for %d bins", nb);
    int status = clef_coupling_build_k(m, bins, transfer, k);
    if (status == CLEF_OK)
        status = clef_coupling_binned_from_k(out, k, bins, m->lmax, m->wl, m->wl_lmax, opts);
    free(k);
    return status;
}

void clef_coupling_binned_destroy(clef_coupling_binned *k)
{
    if (!k)
        return;
    free(k->k);
    free(k->lu);
    free(k->ipiv);
    free(k->kinv_p);
    free(k);
}

int clef_coupling_binned_nbins(const clef_coupling_binned *k) { return k->nbins; }
int clef_coupling_binned_lmax(const clef_coupling_binned *k) { return k->lmax; }
double clef_coupling_binned_rcond(const clef_coupling_binned *k) { return k->rcond; }
const double *clef_coupling_binned_matrix(const clef_coupling_binned *k) { return k->k; }
const double *clef_coupling_binned_kinv_p(const clef_coupling_binned *k) { return k->kinv_p; }

int clef_coupling_binned_kinv(const clef_coupling_binned *k, double *kinv)
{
    const int nb = k->nbins;
    for (int i = 0; i < nb; i++)
        for (int j = 0; j < nb; j++)
            kinv[(size_t)i * nb + j] = i == j;
    const lapack_int info = LAPACKE_dgetrs(LAPACK_ROW_MAJOR, 'N', nb, nb, k->lu, nb, k->ipiv,
                                           kinv, nb);
    if (info != 0)
        CLEF_FAIL(CLEF_ENUMERIC, "coupling: LAPACK dgetrs failed (info %d)", (int)info);
    return CLEF_OK;
}

void clef_coupling_binned_decouple(const clef_coupling_binned *k, const double *pcl,
                                   double *band)
{
    const size_t n = (size_t)k->lmax + 1;
    for (int b = 0; b < k->nbins; b++) {
        const double *row = k->kinv_p + (size_t)b * n;
        double s = 0.0;
        for (size_t l = 0; l < n; l++)
            s += row[l] * pcl[l];
        band[b] = s;
    }
}

int clef_coupling_binned_windows(const clef_coupling_binned *k, const clef_coupling *m,
                                 const clef_bins *bins, const double *transfer, double *out)
{
    if (!k || !m || !bins || !out)
        CLEF_FAIL(CLEF_EINVAL, "coupling windows: NULL argument");
    if (m->lmax != k->lmax || clef_bins_count(bins) != k->nbins)
        CLEF_FAIL(CLEF_EINVAL,
                  "coupling windows: matrix lmax %d and %d bins do not match the binned "
                  "operator (lmax %d, %d bins)",
                  m->lmax, clef_bins_count(bins), k->lmax, k->nbins);
    CLEF_TRY(check_bins(bins, m->lmax));
    CLEF_TRY(clef_coupling_check_transfer(transfer, m->lmax));
    const int nb = k->nbins;
    const size_t n = (size_t)m->lmax + 1;
    /* (P M)_bl = sum_{l'' in b} P_bl'' M_l''l: one pass over the binned rows. */
#pragma omp parallel for schedule(dynamic, 1)
    for (int b = 0; b < nb; b++) {
        double *row = out + (size_t)b * n;
        memset(row, 0, n * sizeof *row);
        for (int l2 = clef_bins_l_lo(bins, b); l2 <= clef_bins_l_hi(bins, b); l2++) {
            const double p = clef_bins_p(bins, b, l2);
            const double *ml = m->m + (size_t)l2 * n;
            for (size_t l = 0; l < n; l++)
                row[l] += p * ml[l];
        }
    }
    /* K^-1 (P M) by LU back-substitution (LAPACK dgetrs), then the filter
     * T_l on the columns: the band power sees the sky through M T. */
    lapack_int info = LAPACKE_dgetrs(LAPACK_ROW_MAJOR, 'N', nb, (lapack_int)n, k->lu, nb,
                                     k->ipiv, out, (lapack_int)n);
    if (info != 0)
        CLEF_FAIL(CLEF_ENUMERIC, "coupling windows: LAPACK dgetrs failed (info %d)", (int)info);
    if (transfer)
        for (int b = 0; b < nb; b++)
            for (size_t l = 0; l < n; l++)
                out[(size_t)b * n + l] *= transfer[l];
    return CLEF_OK;
}
