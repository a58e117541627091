/* Stage "peak" of the estimator and the tables: each pair's band powers
 * and own covariance block into its table, its inputs and options as
 * keywords, the first peak; the joint covariance in D_b units. */
#define _DEFAULT_SOURCE
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "estimator_impl.h"
#include "spectrum_impl.h"

static const char *name_or(const clef_spectrum_opts *o, int i, const char *fallback)
{
    return o->names[i] ? o->names[i] : fallback;
}

/* Record every input and option as table metadata (FITS keywords). */
static int record_meta(clef_bandpowers *bp, const clef_spectrum_opts *o,
                       const clef_spectrum_result *r)
{
    CLEF_TRY(clef_bandpowers_meta_text(bp, "MAP1", name_or(o, 0, ""), "first map"));
    if (r->cross)
        CLEF_TRY(clef_bandpowers_meta_text(bp, "MAP2", name_or(o, 1, ""), "second map"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "MASK1", name_or(o, 2, ""), "mask of the first map"));
    if (o->names[3])
        CLEF_TRY(clef_bandpowers_meta_text(bp, "MASK2", o->names[3], "mask of the second map"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "SPECTYPE", r->cross ? "cross" : "auto",
                                       "auto- or cross-spectrum"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "NSIDE", (double)r->nside, "HEALPix resolution"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "LMAXUSED", r->lmax, "highest multipole decoupled"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "LMAXEXT", r->lmax_ext,
                                         "highest multipole analysed and coupled"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "NBINSHID", r->nbins_hidden,
                                         "bins decoupled, not reported"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "LMAXMASK", r->lmax_mask,
                                         "highest multipole of the mask spectrum"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "NBINS", r->nbins, "number of band powers"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "BINWIDTH", r->bin_width,
                                         "automatic bin width (0: bins given)"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "BEAMFWHM", o->beam ? 0.0 : o->beam_fwhm,
                                         "Gaussian beam FWHM [arcmin] (0: none)"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "BEAMTAB", o->beam ? "yes" : "no",
                                       "tabulated beam used"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "PIXELWIN", o->pixel_window ? "yes" : "no",
                                       "pixel window corrected"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "TRANSFER", o->transfer ? "yes" : "no",
                                       "transfer function applied"));
    if (o->second_instrument) { /* the second map's own beam and transfer function */
        CLEF_TRY(clef_bandpowers_meta_number(bp, "BEAMFWH2", o->beam2 ? 0.0 : o->beam2_fwhm,
                                             "second map's Gaussian beam FWHM [arcmin]"));
        CLEF_TRY(clef_bandpowers_meta_text(bp, "BEAMTAB2", o->beam2 ? "yes" : "no",
                                           "second map's tabulated beam used"));
        CLEF_TRY(clef_bandpowers_meta_text(bp, "TRANSFR2", o->transfer2 ? "yes" : "no",
                                           "second map's transfer function applied"));
    }
    CLEF_TRY(clef_bandpowers_meta_text(bp, "NOISESUB", (o->noise_cl && !r->cross) ? "yes" : "no",
                                       "noise spectrum subtracted"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "COVSPEC", o->theory_cl ? "theory" : "measured",
                                       "spectrum used in the covariance"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "ITERS", o->iterations, "analysis iterations"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "MULTIPOL", o->keep_multipoles ? "kept" : "removed",
                                       "monopole and dipole"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "DEPRLMAX", r->ldep,
                                         "removal corrected in the coupling to this l"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "FSKY", r->fsky, "observed sky fraction"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "MASKW2", r->w2, "mean of mask^2"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "MASKW4", r->w4, "mean of mask^4"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "FSKYEFF", r->fsky_eff, "w2^2 / w4"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "RCOND", r->rcond, "1/condition number of K"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "CACHEHIT", r->cache_hit ? "yes" : "no",
                                       "coupling operator from the cache"));
    return CLEF_OK;
}

/* Fill the table: D_b, C_b, l ranges, errors from the covariance. */
void clef_spectrum_fill_table(clef_bandpowers *bp, const clef_bins *bins, const double *band,
                              const double *cov)
{
    const int nb = bp->nbins;
    const int flat = clef_bins_weighting(bins) == CLEF_BINS_FLAT;
    for (int b = 0; b < nb; b++) {
        double le = clef_bins_l_eff(bins, b);
        double to_d = le * (le + 1) / (2 * M_PI); /* D = l(l+1) C / 2pi at l_eff */
        bp->l_lo[b] = clef_bins_l_lo(bins, b);
        bp->l_hi[b] = clef_bins_l_hi(bins, b);
        bp->l_eff[b] = le;
        double scale = flat ? to_d : 1.0;
        bp->dl[b] = band[b] * scale;
        bp->cl[b] = bp->dl[b] / to_d;
        for (int c = 0; c < nb; c++) {
            double sc = flat ? clef_bins_l_eff(bins, c) * (clef_bins_l_eff(bins, c) + 1) /
                                   (2 * M_PI)
                             : 1.0;
            bp->cov[(size_t)b * nb + c] = cov[(size_t)b * nb + c] * scale * sc;
        }
    }
    for (int b = 0; b < nb; b++) {
        double v = bp->cov[(size_t)b * nb + b];
        bp->dl_err[b] = v > 0 ? sqrt(v) : 0.0;
    }
}

int clef_est_tables(clef_estimator *e)
{
    const int nb = e->nb;
    for (int k = 0; k < e->npairs; k++) {
        est_pair *p = &e->pairs[k];
        CLEF_TRY(clef_bandpowers_alloc(&p->res.bp, nb, 1));
        double *crep = malloc((size_t)nb * nb * sizeof *crep);
        double *band = malloc((size_t)nb * sizeof *band);
        if (!crep || !band) {
            free(crep);
            free(band);
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the covariance");
        }
        for (int i = 0; i < nb; i++) {
            band[i] = p->band[p->rep[i]];
            for (int j = 0; j < nb; j++)
                crep[(size_t)i * nb + j] = p->cov_all[(size_t)i * nb + j];
        }
        clef_spectrum_fill_table(p->res.bp, e->bins, band, crep);
        free(crep);
        free(band);
    }
    /* The joint covariance in the tables' units (D_b). */
    if (clef_bins_weighting(e->bins) == CLEF_BINS_FLAT) {
        const int n = e->ncov;
        for (int i = 0; i < n; i++) {
            const double li = clef_bins_l_eff(e->bins, i % nb);
            for (int j = 0; j < n; j++) {
                const double lj = clef_bins_l_eff(e->bins, j % nb);
                e->cov[(size_t)i * n + j] *=
                    li * (li + 1) / (2 * M_PI) * (lj * (lj + 1) / (2 * M_PI));
            }
        }
    }
    return CLEF_OK;
}

/* The first peak, recorded in the table's keywords. */
static int stage_peak(const clef_estimator *r, est_pair *p)
{
    clef_spectrum_result *res = &p->res;
    const clef_peak_opts po = r->o.peak; /* half width 0: the library's automatic rule */
    int status = clef_peak_find(res->bp, &po, &res->peak);
    if (status == CLEF_EINVAL) {
        /* Unusable for a peak fit (e.g. lmax below the window): the band
         * powers still stand; the run records why there is no peak. */
        clef_log(CLEF_LOG_WARN, "first peak not fitted: %s", clef_last_error());
        res->peak.found = 0;
        snprintf(res->peak.reason, sizeof res->peak.reason, "%s", clef_last_error());
        status = CLEF_OK;
    }
    CLEF_TRY(status);
    res->peak_done = 1;
    CLEF_TRY(clef_peak_to_meta(&res->peak, &po, res->bp));
    return CLEF_OK;
}


/* The result of each pair: its summary numbers, keywords, first peak. */
int clef_est_results(clef_estimator *e)
{
    for (int k = 0; k < e->npairs; k++) {
        est_pair *p = &e->pairs[k];
        clef_spectrum_result *r = &p->res;
        const est_field *fa = &e->fields[p->a], *fb = &e->fields[p->b];
        const est_masks *mk = &e->masks[p->mp];
        const est_weights *wa = &e->weights[fa->wid];
        r->cross = p->a != p->b || fa->f.nsplits > 1;
        r->nside = e->nside;
        r->lmax = e->lmax;
        r->lmax_ext = e->lmax_ext;
        r->lmax_mask = e->lmax_t;
        r->nbins = e->nb;
        r->ldep = mk->dep.ldep;
        r->bin_width = e->bin_width;
        r->fsky = wa->fsky;
        r->w1 = wa->w1;
        r->w2 = wa->w2;
        r->w4 = wa->w4;
        r->fsky_eff = wa->w2 * wa->w2 / wa->w4;
        r->cache_hit = mk->cache_hit;
        memcpy(r->multipoles[0], fa->multipoles[0], sizeof r->multipoles[0]);
        memcpy(r->multipoles[1], fb->multipoles[p->a == p->b && fa->f.nsplits > 1 ? 1 : 0],
               sizeof r->multipoles[1]);
        /* Keywords: the options of field a, the names of both. */
        clef_spectrum_opts po;
        clef_est_field_opts(e, fa, &po);
        const clef_field *gb = &fb->f, *ga = &fa->f;
        po.second_instrument = 0;
        if (r->cross && (gb->beam_fwhm != ga->beam_fwhm || gb->beam != ga->beam ||
                         gb->transfer != ga->transfer)) {
            po.second_instrument = 1;
            po.beam2_fwhm = gb->beam_fwhm;
            po.beam2 = gb->beam;
            po.beam2_lmax = gb->beam_lmax;
            po.transfer2 = gb->transfer;
            po.transfer2_lmax = gb->transfer_lmax;
        }
        if (!p->noise_sub)
            po.noise_cl = NULL;
        po.names[0] = fa->f.map_names[0];
        po.names[1] = r->cross ? fb->f.map_names[p->a == p->b ? 1 : 0] : NULL;
        po.names[2] = fa->f.mask_name;
        po.names[3] = fb->f.mask != fa->f.mask ? fb->f.mask_name : NULL;
        CLEF_TRY(record_meta(r->bp, &po, r));
    }
    if (e->o.find_peak) {
        for (int k = 0; k < e->npairs; k++)
            CLEF_TRY(stage_peak(e, &e->pairs[k]));
        clef_est_stage_done(e, "peak");
    }
    for (int k = 0; k < e->npairs; k++) {
        clef_spectrum_result *r = &e->pairs[k].res;
        r->nstages = e->nstages;
        memcpy(r->stage, e->stage, sizeof r->stage);
    }
    return CLEF_OK;
}
