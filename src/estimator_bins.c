/* Stage "bins": the reported bins, common to every pair (given, or
 * linear bins as wide as the widest coupling of the run's mask pairs
 * needs), and the hidden bins around them per distinct pair of weights
 * and filter (docs/method.md section 5). */
#define _DEFAULT_SOURCE
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "estimator_impl.h"

/* Automatic linear bins of `width` from l = 2 to lmax.  A chosen lmax is
 * first lowered to the end of the last whole bin; a given one keeps its
 * remainder, as a bin of its own when it is at least half a width and
 * merged into the last bin otherwise: no ragged bin of a few multipoles. */
static int auto_bins(clef_estimator *r, int width)
{
    if (width > r->lmax - 1)
        CLEF_FAIL(CLEF_EINVAL, "bin width %d%s does not fit between l = 2 and lmax = %d",
                  width, r->o.bin_width > 0 ? "" : " (the mask's coupling width: its "
                  "observed region is too small to resolve narrower bins)", r->lmax);
    int n = (r->lmax - 1) / width;
    const int rest = r->lmax - 1 - n * width;
    if (r->lmax_auto && rest > 0) {
        r->lmax = 1 + n * width;
        clef_log(CLEF_LOG_INFO, "default lmax %d: the end of the last whole bin of %d", r->lmax,
                 width);
    } else if (rest > 0 && 2 * rest >= width) {
        n++;
    }
    int *lo = malloc((size_t)n * sizeof *lo), *hi = malloc((size_t)n * sizeof *hi);
    if (!lo || !hi) {
        free(lo);
        free(hi);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for bins");
    }
    for (int b = 0; b < n; b++) {
        lo[b] = 2 + b * width;
        hi[b] = lo[b] + width - 1;
    }
    hi[n - 1] = r->lmax;
    const int status = clef_bins_create_ranges(&r->own_bins, n, lo, hi, CLEF_BINS_DL);
    free(lo);
    free(hi);
    return status;
}

/* Hidden bins over every run of multipoles in 2..lmax_ext that no reported
 * bin covers and that is at least the mask's coupling width long (shorter
 * runs stay uncovered, as gaps): above lmax, below a first bin starting
 * above 2, and in gaps between bins.  A run is split into bins as wide as
 * the nearest reported bin, or the coupling width if that is wider.
 * Hidden bins where the signal filter vanishes are left out (no signal
 * reaches them; K would be singular).  Their band powers take part in the
 * decoupling and are not reported. */
static int make_all_bins(const clef_estimator *r, est_op *p, int cw)
{
    const clef_bins *b = r->bins;
    const int nb = clef_bins_count(b);
    const int cap = 2 * nb + 2 * (r->lmax_ext + 2) / (cw > 2 ? cw : 2) + 4;
    int *lo = malloc((size_t)cap * sizeof *lo), *hi = malloc((size_t)cap * sizeof *hi);
    int *isrep = malloc((size_t)cap * sizeof *isrep);
    int status = CLEF_OK, n = 0;
    if (!lo || !hi || !isrep) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for bins");
        goto fail;
    }
    const int min_run = cw > 2 ? cw : 2;
    for (int i = 0; i <= nb; i++) {
        /* The run before reported bin i (i = nb: the run above the last). */
        const int a = i == 0 ? 2 : clef_bins_l_hi(b, i - 1) + 1;
        const int z = i == nb ? r->lmax_ext : clef_bins_l_lo(b, i) - 1;
        const int len = z - a + 1;
        if (len >= min_run) {
            const int near = i < nb ? i : nb - 1;
            int width = clef_bins_l_hi(b, near) - clef_bins_l_lo(b, near) + 1;
            if (width < cw)
                width = cw;
            int k = len / width;
            if (k < 1)
                k = 1;
            for (int j = 0; j < k; j++) {
                const int l0 = a + (int)((long long)len * j / k);
                const int l1 = a + (int)((long long)len * (j + 1) / k) - 1;
                double tmax = 0;
                for (int l = l0; l <= l1; l++)
                    tmax = fmax(tmax, p->tl[l]);
                if (!(tmax > 0))
                    continue;
                lo[n] = l0;
                hi[n] = l1;
                isrep[n++] = 0;
            }
        }
        if (i < nb) {
            lo[n] = clef_bins_l_lo(b, i);
            hi[n] = clef_bins_l_hi(b, i);
            isrep[n++] = 1;
        }
    }
    CLEF_CHECK(clef_bins_create_ranges(&p->all_bins, n, lo, hi, clef_bins_weighting(b)));
    if (!(p->rep = malloc((size_t)nb * sizeof *p->rep))) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for bins");
        goto fail;
    }
    for (int j = 0, k = 0; j < n; j++)
        if (isrep[j])
            p->rep[k++] = j;
    p->nb_all = n;
fail:
    free(lo);
    free(hi);
    free(isrep);
    return status;
}

int clef_est_bins(clef_estimator *r)
{
    int cw = 0;
    for (int k = 0; k < r->nmasks; k++)
        if (r->masks[k].cw > cw)
            cw = r->masks[k].cw;
    for (int i = 0; i < r->nfields; i++) {
        clef_spectrum_opts fo;
        est_field *f = &r->fields[i];
        clef_est_field_opts(r, f, &fo);
        if (!(f->filter = malloc((size_t)(r->lmax_ext + 1) * sizeof *f->filter)))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the beam");
        CLEF_TRY(clef_est_signal_filter(&fo, r->nside, r->lmax_ext, f->filter));
    }
    r->bins = r->o.bins;
    if (r->bins) {
        if (clef_bins_lmax(r->bins) > r->lmax)
            CLEF_FAIL(CLEF_EINVAL, "the bins reach l = %d, above lmax = %d",
                      clef_bins_lmax(r->bins), r->lmax);
    } else {
        int width = r->o.bin_width;
        if (width <= 0)
            width = cw > CLEF_SPECTRUM_BIN_WIDTH ? cw : CLEF_SPECTRUM_BIN_WIDTH;
        CLEF_TRY(auto_bins(r, width));
        r->bins = r->own_bins;
        r->bin_width = width;
    }
    r->nb = clef_bins_count(r->bins);
    for (int k = 0; k < r->npairs; k++)
        CLEF_TRY(clef_est_pair_bins(r, &r->pairs[k]));
    return CLEF_OK;
}

/* The pair filter T_l = sqrt(F_a F_b) B_a B_b p_l^2 (one field's filter
 * when both fields have the same) and the hidden bins where it does not
 * vanish: those of an earlier pair with the same weights and filter
 * (est_op), else new ones. */
int clef_est_pair_bins(clef_estimator *r, est_pair *p)
{
    const int n = r->lmax_ext + 1;
    const double *fa = r->fields[p->a].filter, *fb = r->fields[p->b].filter;
    if (!(p->tl = malloc((size_t)n * sizeof *p->tl)))
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the beam");
    if (!memcmp(fa, fb, (size_t)n * sizeof *fa))
        memcpy(p->tl, fa, (size_t)n * sizeof *fa);
    else
        for (int l = 0; l < n; l++)
            p->tl[l] = sqrt(fa[l] * fb[l]);
    p->op = -1;
    for (int k = 0; k < r->nops && p->op < 0; k++)
        if (r->ops[k].mp == p->mp && !memcmp(r->ops[k].tl, p->tl, (size_t)n * sizeof *p->tl))
            p->op = k;
    if (p->op < 0) {
        est_op *no = realloc(r->ops, (size_t)(r->nops + 1) * sizeof *no);
        if (!no)
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the binned operators");
        r->ops = no;
        est_op *op = &no[r->nops];
        memset(op, 0, sizeof *op);
        op->mp = p->mp;
        op->tl = p->tl;
        /* Counted before the bins are made, so that destroy frees them on
         * failure too. */
        p->op = r->nops++;
        CLEF_TRY(make_all_bins(r, op, r->masks[p->mp].cw));
    }
    const est_op *op = &r->ops[p->op];
    p->all_bins = op->all_bins;
    p->rep = op->rep;
    p->nb_all = op->nb_all;
    p->res.nbins_hidden = op->nb_all - r->nb;
    return CLEF_OK;
}
