/* The band-power estimator: maps + mask -> decoupled band powers with a
 * covariance (pseudo-C_l method, Hivon et al. 2002, ApJ 567, 2).  The
 * covariance and the monopole/dipole fit live in their own files
 * (spectrum_cov.c, spectrum_multipoles.c). */
#define _DEFAULT_SOURCE
#include "clef/spectrum.h"

#include <complex.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/beam.h"
#include "clef/coupling.h"
#include "clef/sht.h"
#include "core_impl.h"
#include "spectrum_deproj.h"
#include "spectrum_impl.h"

void clef_spectrum_opts_default(clef_spectrum_opts *o)
{
    memset(o, 0, sizeof *o);
    o->iterations = CLEF_SPECTRUM_ITERATIONS;
    o->use_cache = 1;
    o->find_peak = 1;
    clef_peak_opts_default(&o->peak);
}

void clef_spectrum_result_free(clef_spectrum_result *res)
{
    if (!res)
        return;
    clef_bandpowers_free(res->bp);
    res->bp = NULL;
    for (int i = 0; i < 2; i++) {
        free(res->alm[i]);
        res->alm[i] = NULL;
    }
}

static void stage_done(clef_spectrum_result *res, const char *name, double *t0)
{
    double t = clef_wtime();
    if (res->nstages < CLEF_SPECTRUM_MAX_STAGES) {
        snprintf(res->stage[res->nstages].name, sizeof res->stage[0].name, "%s", name);
        res->stage[res->nstages].seconds = t - *t0;
        res->nstages++;
    }
    clef_log(CLEF_LOG_INFO, "stage %-10s %8.3f s", name, t - *t0);
    *t0 = t;
}

static const char *name_or(const clef_spectrum_opts *o, int i, const char *fallback)
{
    return o->names[i] ? o->names[i] : fallback;
}

/* Effective weights: the mask where the map is valid, 0 elsewhere. */
int clef_spectrum_make_weights(const clef_map *map, const clef_map *mask, double **w_out)
{
    double *w = clef_alloc_large((size_t)map->npix * sizeof *w);
    if (!w)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for %lld mask weights", (long long)map->npix);
    for (int64_t p = 0; p < map->npix; p++)
        w[p] = (map->valid[p] && mask->valid[p]) ? mask->pix[p] : 0.0;
    *w_out = w;
    return CLEF_OK;
}

/* Beam x pixel window x transfer per multipole: the signal filter T_l =
 * F_l B_l^2 p_l^2 (METHODS.md section 4), and b2p2 = B_l^2 p_l^2 alone. */
int clef_spectrum_signal_filter(const clef_spectrum_opts *o, int64_t nside, int lmax, double *tl)
{
    double *tmp = malloc((size_t)(lmax + 1) * sizeof *tmp);
    if (!tmp)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the beam");
    int status = CLEF_OK;
    for (int l = 0; l <= lmax; l++)
        tl[l] = 1.0;
    if (o->beam) {
        if (o->beam_lmax < lmax) {
            status = clef_fail(CLEF_EINVAL, "the beam table stops at l = %d, below lmax = %d",
                               o->beam_lmax, lmax);
            goto fail;
        }
        for (int l = 0; l <= lmax; l++)
            tl[l] *= o->beam[l] * o->beam[l];
    } else if (o->beam_fwhm > 0) {
        CLEF_CHECK(clef_beam_gaussian(o->beam_fwhm, lmax, tmp));
        for (int l = 0; l <= lmax; l++)
            tl[l] *= tmp[l] * tmp[l];
    }
    if (o->pixel_window) {
        CLEF_CHECK(clef_beam_pixel_window(nside, lmax, tmp));
        for (int l = 0; l <= lmax; l++)
            tl[l] *= tmp[l] * tmp[l];
    }
    if (o->transfer) {
        if (o->transfer_lmax < lmax) {
            status = clef_fail(CLEF_EINVAL,
                               "the transfer function stops at l = %d, below lmax = %d",
                               o->transfer_lmax, lmax);
            goto fail;
        }
        for (int l = 0; l <= lmax; l++) {
            if (!(o->transfer[l] >= 0) || !isfinite(o->transfer[l])) {
                status = clef_fail(CLEF_EINVAL, "transfer function value %g at l = %d is invalid",
                                   o->transfer[l], l);
                goto fail;
            }
            tl[l] *= o->transfer[l];
        }
    }
fail:
    free(tmp);
    return status;
}

/* Limits the options put on the multipole range: l_tab, the end of the
 * tabulated beam, transfer function and noise spectrum (at most 3 nside - 1,
 * where the pixelised map stops carrying independent information), and
 * l_beam <= l_tab, the last multipole where the beam times the pixel window
 * is at least CLEF_SPECTRUM_BEAM_FLOOR (beyond it decoupling would amplify
 * the noise by more than 1e4 in power).  `why` receives the reason of the
 * tightest limit when it is below 3 nside - 1. */
static int option_limits(const clef_spectrum_opts *o, int64_t nside, int *l_tab, int *l_beam,
                         char *why, size_t nwhy)
{
    int l3 = (int)(3 * nside - 1);
    if (why && nwhy)
        why[0] = '\0';
    const struct { const void *p; int lmax; const char *name; } tab[3] = {
        {o->beam, o->beam_lmax, "beam table"},
        {o->transfer, o->transfer_lmax, "transfer function"},
        {o->noise_cl, o->noise_lmax, "noise spectrum"}};
    for (int i = 0; i < 3; i++)
        if (tab[i].p && tab[i].lmax < l3) {
            l3 = tab[i].lmax;
            if (why)
                snprintf(why, nwhy, "the %s stops at l = %d", tab[i].name, l3);
        }
    if (l3 < 2)
        CLEF_FAIL(CLEF_EINVAL, "the beam, transfer or noise table stops at l = %d, below 2", l3);
    *l_tab = *l_beam = l3;
    double *tl = malloc((size_t)(l3 + 1) * sizeof *tl);
    if (!tl)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the beam");
    clef_spectrum_opts tmp = *o;
    tmp.transfer = NULL; /* a filter's zeros are the user's business, not a reason to cut */
    int status = clef_spectrum_signal_filter(&tmp, nside, l3, tl);
    if (status == CLEF_OK) {
        const double floor2 = CLEF_SPECTRUM_BEAM_FLOOR * CLEF_SPECTRUM_BEAM_FLOOR;
        int l = l3;
        while (l > 2 && !(tl[l] >= floor2))
            l--;
        *l_beam = l;
        if (l < l3 && why)
            snprintf(why, nwhy, "the beam times the pixel window falls below %g above l = %d",
                     CLEF_SPECTRUM_BEAM_FLOOR, l);
    }
    free(tl);
    return status;
}

int clef_spectrum_default_lmax(const clef_spectrum_opts *opts, int64_t nside, int *lmax)
{
    clef_spectrum_opts d;
    if (!opts) {
        clef_spectrum_opts_default(&d);
        opts = &d;
    }
    if (!lmax || nside < 1)
        CLEF_FAIL(CLEF_EINVAL, "default lmax: bad arguments (nside %lld)", (long long)nside);
    int l_tab = 0, l_beam = 0;
    CLEF_TRY(option_limits(opts, nside, &l_tab, &l_beam, NULL, 0));
    *lmax = l_beam < CLEF_SPECTRUM_LMAX_NSIDE * nside ? l_beam
                                                     : (int)(CLEF_SPECTRUM_LMAX_NSIDE * nside);
    return CLEF_OK;
}

static int check_inputs(const clef_map *map1, const clef_map *map2, const clef_map *mask1,
                        const clef_map *mask2, const clef_spectrum_opts *o)
{
    if (!map1 || !mask1)
        CLEF_FAIL(CLEF_EINVAL, "a map and a mask are required");
    int ac = o->allow_coord_mismatch;
    CLEF_TRY(clef_map_check_mask(map1, name_or(o, 0, "map"), mask1, name_or(o, 2, "mask"), ac));
    if (map2) {
        if (map2->nside != map1->nside)
            CLEF_FAIL(CLEF_EINVAL, "maps '%s' (nside %lld) and '%s' (nside %lld) differ in nside",
                      name_or(o, 0, "map 1"), (long long)map1->nside, name_or(o, 1, "map 2"),
                      (long long)map2->nside);
        CLEF_TRY(clef_map_check_mask(map2, name_or(o, 1, "map 2"), mask2 ? mask2 : mask1,
                                     name_or(o, mask2 ? 3 : 2, "mask"), ac));
    } else if (mask2) {
        CLEF_FAIL(CLEF_EINVAL, "a second mask was given for a single map");
    }
    return CLEF_OK;
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

/* Everything one estimate carries from stage to stage.
 *
 * Two multipole ranges: the band powers reported go to lmax; the maps are
 * analysed, and the coupling and the decoupling run, to lmax_ext >= lmax
 * (the end of the tables and of the beam, normally 3 nside - 1), with
 * hidden bins over the multipoles no reported bin covers.  Power above
 * lmax then has bins of its own to go to instead of leaking, uncorrected,
 * into the last reported bins through the mask's coupling. */
typedef struct run {
    clef_spectrum_opts o;
    clef_spectrum_result *res;
    int64_t nside, npix;
    int cross, two_masks;
    int lmax, lmax_ext, lmax_t;    /* reported, analysed/coupled, mask multipole ranges */
    int lmax_auto;                 /* 1: lmax chosen here (trimmed to whole bins) */
    double *w[2], *wprod;          /* weights of each map, their product */
    double pair_w2[3];             /* mean(w_a w_b), mean(w_a^2), mean(w_b^2) */
    double *tmap[2];               /* weighted maps in uK, multipoles removed */
    double complex *alm[5];
    double *pcl[3], *pcl_dec;      /* pseudo-spectra to lmax_ext; the one to decouple */
    double *wl, *wl2;              /* mask spectrum and product-mask spectrum */
    double *tl;                    /* signal filter F B^2 p^2, l = 0..lmax_ext */
    int nf[2];                     /* templates removed from each map (0, 1 or 4) */
    char mask_key[65];             /* cache key of the weights ("" without the cache) */
    clef_spectrum_deproj_out dep;  /* coupling correction for the removal */
    const clef_bins *bins;         /* the reported bins */
    clef_bins *own_bins;
    clef_bins *all_bins;           /* reported and hidden bins, ascending */
    int *rep;                      /* index in all_bins of each reported bin */
    int nb, nb_all;
    clef_coupling *m;              /* unbinned coupling matrix M of the mask pair, to lmax_ext */
    clef_coupling_binned *kb;      /* K over all_bins */
    double *band;                  /* decoupled band powers of all_bins */
    clef_bandpowers *bp;
    double t0;
} run;

static void run_free(run *r)
{
    clef_bandpowers_free(r->bp);
    free(r->band);
    clef_coupling_binned_destroy(r->kb);
    clef_coupling_destroy(r->m);
    clef_bins_destroy(r->own_bins);
    clef_bins_destroy(r->all_bins);
    free(r->rep);
    clef_spectrum_deproj_free(&r->dep);
    for (int i = 0; i < 5; i++)
        free(r->alm[i]);
    for (int k = 0; k < 3; k++)
        free(r->pcl[k]);
    free(r->pcl_dec);
    free(r->wl);
    free(r->tl);
    free(r->wprod);
    for (int i = 0; i < 2; i++) {
        free(r->tmap[i]);
        free(r->w[i]);
    }
}

/* lmax (default or checked), the analysis range lmax_ext and the mask
 * range lmax_t (docs/method.md section 5). */
static int stage_lmax(run *r)
{
    const int lmax_pix = (int)(3 * r->nside - 1);
    const int l_acc = (int)(CLEF_SPECTRUM_LMAX_NSIDE * r->nside);
    int l_tab = 0, l_beam = 0;
    char why[160];
    CLEF_TRY(option_limits(&r->o, r->nside, &l_tab, &l_beam, why, sizeof why));
    int lmax = r->o.lmax;
    if (lmax == 0) {
        /* The HEALPix quadrature is accurate to about 2 nside (docs/
         * transforms.md); above it the band powers are biased (section 5). */
        lmax = l_beam < l_acc ? l_beam : l_acc;
        r->lmax_auto = 1;
        if (l_beam < l_acc)
            clef_log(CLEF_LOG_WARN, "default lmax lowered to %d below 2*nside = %d: %s", lmax,
                     l_acc, why);
    } else if (lmax < 2 || lmax > lmax_pix) {
        CLEF_FAIL(CLEF_EINVAL,
                  "lmax = %d is outside 2..3*nside-1 = %d for nside %lld: the pixelised map "
                  "carries no independent information above 3*nside-1",
                  lmax, lmax_pix, (long long)r->nside);
    } else if (lmax > l_acc) {
        clef_log(CLEF_LOG_WARN,
                 "lmax = %d is above 2*nside = %d: band powers above 2*nside are biased by the "
                 "pixelisation (transform quadrature, aliasing, a noise bias that no longer "
                 "matches the analysis iterations; docs/method.md section 5)",
                 lmax, l_acc);
    }
    r->lmax = r->res->lmax = lmax;
    /* Hidden bins run to the end of the tables and of the beam (and of a
     * theory spectrum for the covariance), never below lmax; a table too
     * short for lmax itself is refused later with its own message. */
    int l_ext = l_beam;
    if (r->o.theory_cl && r->o.theory_lmax < l_ext)
        l_ext = r->o.theory_lmax;
    r->lmax_ext = r->res->lmax_ext = l_ext > lmax ? l_ext : lmax;
    /* The coupling needs W_l to 2 lmax_ext; the pixelised mask is only
     * resolved to 3 nside - 1, above which W_l is taken as zero. */
    r->lmax_t = r->res->lmax_mask = 2 * r->lmax_ext < lmax_pix ? 2 * r->lmax_ext : lmax_pix;
    return CLEF_OK;
}

/* Weights, moments, monopole and dipole, weighted maps. */
static int stage_prepare(run *r, const clef_map *const map[2], const clef_map *const mask[2])
{
    const int64_t npix = r->npix;
    clef_spectrum_result *res = r->res;
    for (int i = 0; i <= r->cross; i++)
        CLEF_TRY(clef_spectrum_make_weights(map[i], mask[i], &r->w[i]));
    double s1 = 0, s2 = 0, s4 = 0, sab = 0, sbb = 0;
    int64_t nobs[2] = {0, 0};
    const double *wa = r->w[0], *wb = r->w[r->cross];
    for (int64_t p = 0; p < npix; p++) {
        const double x = wa[p], x2 = x * x;
        s1 += x;
        s2 += x2;
        s4 += x2 * x2;
        sab += x * wb[p];
        sbb += wb[p] * wb[p];
        nobs[0] += x > 0;
        nobs[1] += wb[p] > 0;
    }
    for (int i = 0; i <= r->cross; i++)
        if (nobs[i] == 0)
            CLEF_FAIL(CLEF_EINVAL, "mask '%s' leaves no observed sky on map '%s' (every weight is 0)",
                      name_or(&r->o, i && r->two_masks ? 3 : 2, "mask"),
                      name_or(&r->o, i, "map"));
    res->fsky = (double)nobs[0] / (double)npix;
    res->w1 = s1 / (double)npix;
    res->w2 = s2 / (double)npix;
    res->w4 = s4 / (double)npix;
    res->fsky_eff = res->w2 * res->w2 / res->w4;
    r->pair_w2[0] = sab / (double)npix;
    r->pair_w2[1] = res->w2;
    r->pair_w2[2] = sbb / (double)npix;

    for (int i = 0; i <= r->cross; i++) {
        r->tmap[i] = clef_alloc_large((size_t)npix * sizeof(double));
        if (!r->tmap[i])
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for a weighted map");
        /* Band powers are in uK^2: maps in K or mK (their TUNIT) are scaled. */
        double scale = clef_unit_to_uk(map[i]->unit);
        if (scale == 0) {
            if (map[i]->unit[0])
                clef_log(CLEF_LOG_WARN, "map '%s': unit '%s' not recognised; values taken as uK",
                         name_or(&r->o, i, "map"), map[i]->unit);
            scale = 1;
        } else if (scale != 1) {
            clef_log(CLEF_LOG_INFO, "map '%s': unit '%s', values scaled by %g to uK",
                     name_or(&r->o, i, "map"), map[i]->unit, scale);
        }
        for (int64_t p = 0; p < npix; p++)
            r->tmap[i][p] = scale * map[i]->pix[p];
        if (!r->o.keep_multipoles) {
            int status = clef_spectrum_remove_multipoles(r->tmap[i], r->w[i], r->nside, 1,
                                                         res->multipoles[i]);
            r->nf[i] = 4;
            if (status == CLEF_ENUMERIC) {
                r->nf[i] = 1;
                /* A small or thin patch may not constrain a dipole: remove the
                 * monopole alone rather than fail. */
                clef_log(CLEF_LOG_WARN, "map '%s': %s; only the monopole is removed",
                         name_or(&r->o, i, "map"), clef_last_error());
                status = clef_spectrum_remove_multipoles(r->tmap[i], r->w[i], r->nside, 0,
                                                         res->multipoles[i]);
            }
            CLEF_TRY(status);
        }
        for (int64_t p = 0; p < npix; p++)
            r->tmap[i][p] *= r->w[i][p];
    }
    stage_done(res, "prepare", &r->t0);
    return CLEF_OK;
}

/* Analyses and pseudo-spectra.  The weighted maps are analysed to lmax_ext
 * (the reported bins and the hidden bins above them), the masks and the
 * product mask to lmax_t; when both limits agree one call shares the Legendre
 * recurrence.  The mask spectra depend on the weights alone, so a nightly
 * rerun with the same mask takes them from the cache and analyses the maps
 * only. */
static int stage_transform(run *r)
{
    const int lmax = r->lmax_ext, lmax_t = r->lmax_t, cross = r->cross;
    const int nm = 1 + cross;                  /* weighted maps: alm[0..nm-1] */
    const int im = nm;                         /* mask 1 */
    const int im2 = r->two_masks ? im + 1 : im; /* mask 2 */
    const int iw = im2 + 1;                    /* product mask */
    for (int k = 0; k < 3; k++)
        if (!(r->pcl[k] = calloc((size_t)lmax + 1, sizeof(double))))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for spectra");
    r->wl = calloc(2 * ((size_t)lmax_t + 1), sizeof *r->wl);
    r->tl = malloc((size_t)(lmax + 1) * sizeof *r->tl);
    r->pcl_dec = malloc((size_t)(lmax + 1) * sizeof *r->pcl_dec);
    if (!r->wl || !r->tl || !r->pcl_dec)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for spectra");
    r->wl2 = r->wl + lmax_t + 1; /* the two mask spectra are one cache entry */
    char *key = r->mask_key;
    if (r->o.use_cache) /* hashing the weights once serves the load and the store */
        clef_spectrum_mask_key(r->nside, lmax_t, r->o.iterations, cross ? r->w[1] : NULL,
                               r->w[0], key);
    const int mask_hit = r->o.use_cache && clef_spectrum_mask_cache(&r->o, key, lmax_t, r->wl, 0);

    const double *in[5];
    int n = 0;
    in[n++] = r->tmap[0];
    if (cross)
        in[n++] = r->tmap[1];
    if (!mask_hit) {
        /* The product mask w_a w_b, whose spectrum drives the covariance. */
        r->wprod = clef_alloc_large((size_t)r->npix * sizeof *r->wprod);
        if (!r->wprod)
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the product mask");
        const double *wa = r->w[0], *wb = r->w[cross];
        for (int64_t p = 0; p < r->npix; p++)
            r->wprod[p] = wa[p] * wb[p];
        in[n++] = r->w[0];
        if (r->two_masks)
            in[n++] = r->w[1];
        in[n++] = r->wprod;
    }
    for (int i = 0; i < n; i++) {
        const int la = i < nm ? lmax : lmax_t;
        if (!(r->alm[i] = malloc(clef_alm_size(la, la) * sizeof(double complex))))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for a_lm (lmax %d)", la);
    }
    double complex *const *out = (double complex *const *)r->alm;
    clef_progress("analysis", 0.0);
    clef_sht *sht = NULL;
    clef_sht_opts so = {0};
    const int shared = lmax_t == lmax ? n : nm;
    so.nmaps = shared;
    int status = clef_sht_create(&sht, r->nside, lmax, &so);
    if (status == CLEF_OK)
        status = clef_sht_analysis(sht, shared, in, out, r->o.iterations);
    clef_sht_destroy(sht);
    sht = NULL;
    if (status == CLEF_OK && shared < n) {
        clef_progress("analysis", 0.3);
        so.nmaps = n - nm;
        status = clef_sht_create(&sht, r->nside, lmax_t, &so);
        if (status == CLEF_OK)
            status = clef_sht_analysis(sht, n - nm, in + nm, out + nm, r->o.iterations);
        clef_sht_destroy(sht);
    }
    CLEF_TRY(status);
    clef_progress("analysis", 1.0);
    stage_done(r->res, "transform", &r->t0);

    /* Pseudo-spectra: 0 = map1 x map(2), 1 = map1 auto, 2 = map2 auto. */
    CLEF_TRY(clef_alm_cl(lmax, lmax, r->alm[0], r->alm[cross ? 1 : 0], r->pcl[0]));
    if (cross) {
        CLEF_TRY(clef_alm_cl(lmax, lmax, r->alm[0], NULL, r->pcl[1]));
        CLEF_TRY(clef_alm_cl(lmax, lmax, r->alm[1], NULL, r->pcl[2]));
    }
    if (!mask_hit) {
        /* W_l of the mask pair (a cross-spectrum for two masks). */
        CLEF_TRY(clef_alm_cl(lmax_t, lmax_t, r->alm[im], r->alm[im2], r->wl));
        CLEF_TRY(clef_alm_cl(lmax_t, lmax_t, r->alm[iw], NULL, r->wl2));
        for (int l = 0; l <= lmax_t; l++) /* a cross W_l can dip below 0 by round-off */
            if (r->wl[l] < 0)
                r->wl[l] = 0;
        if (r->o.use_cache)
            clef_spectrum_mask_cache(&r->o, key, lmax_t, r->wl, 1);
    }
    return CLEF_OK;
}

/* Automatic linear bins of `width` from l = 2 to lmax.  A chosen lmax is
 * first lowered to the end of the last whole bin; a given one keeps its
 * remainder, as a bin of its own when it is at least half a width and
 * merged into the last bin otherwise: no ragged bin of a few multipoles. */
static int auto_bins(run *r, int width)
{
    if (width > r->lmax - 1)
        CLEF_FAIL(CLEF_EINVAL, "bin width %d%s does not fit between l = 2 and lmax = %d",
                  width, r->o.bin_width > 0 ? "" : " (the mask's coupling width: its "
                  "observed region is too small to resolve narrower bins)", r->lmax);
    int n = (r->lmax - 1) / width;
    const int rest = r->lmax - 1 - n * width;
    if (r->lmax_auto && rest > 0) {
        r->lmax = r->res->lmax = 1 + n * width;
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
static int make_all_bins(run *r, int cw)
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
                    tmax = fmax(tmax, r->tl[l]);
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
    CLEF_CHECK(clef_bins_create_ranges(&r->all_bins, n, lo, hi, clef_bins_weighting(b)));
    if (!(r->rep = malloc((size_t)nb * sizeof *r->rep))) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for bins");
        goto fail;
    }
    for (int j = 0, k = 0; j < n; j++)
        if (isrep[j])
            r->rep[k++] = j;
    r->nb_all = n;
    r->res->nbins_hidden = n - nb;
fail:
    free(lo);
    free(hi);
    free(isrep);
    return status;
}

/* The coupling correction for the removed monopole and dipole (Elsner,
 * Leistedt & Peiris 2017; spectrum_deproj.c), from the cache when the
 * same weights and templates were seen before.  Without it the removal
 * takes real low-l power out of the band powers: on a 15-degree patch the
 * bin 2-24 came out 61% low (docs/method.md section 2). */
static int stage_deproject(run *r)
{
    if (r->o.keep_multipoles)
        return CLEF_OK;
    const int64_t npix = r->npix;
    /* One side when both maps have the same weights and templates. */
    const int same = !r->cross || (r->nf[0] == r->nf[1] &&
                                   !memcmp(r->w[0], r->w[1], (size_t)npix * sizeof(double)));
    clef_spectrum_deproj_in in = {
        .nside = r->nside, .lmax = r->lmax_ext, .iterations = r->o.iterations,
        .w = {r->w[0], same ? r->w[0] : r->w[1]}, .nf = {r->nf[0], same ? r->nf[0] : r->nf[1]},
        .w2 = r->pair_w2[0]};
    const int lp = r->lmax_ext < CLEF_DEPROJ_LMAX_MAX ? r->lmax_ext : CLEF_DEPROJ_LMAX_MAX;
    const size_t np = 3 + (size_t)(lp + 1) * (lp + 1);
    char key[65] = "";
    double *pay = NULL;
    if (r->o.use_cache && r->mask_key[0]) {
        clef_spectrum_deproj_key(r->mask_key, in.nf, lp, r->o.iterations, key);
        if (!(pay = calloc(np, sizeof *pay)))
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the deprojection");
        if (clef_spectrum_deproj_cache(&r->o, key, np, pay, 0)) {
            /* Payload: ldep, truncated, level, then D packed. */
            const int n = (int)pay[0];
            const size_t nn = (size_t)(n + 1) * (n + 1);
            r->dep.ldep = n;
            r->dep.truncated = (int)pay[1];
            r->dep.level_at_cut = pay[2];
            if (!(r->dep.dmean = malloc(nn * sizeof(double)))) {
                free(pay);
                CLEF_FAIL(CLEF_ENOMEM, "out of memory for the deprojection");
            }
            memcpy(r->dep.dmean, pay + 3, nn * sizeof(double));
        }
    }
    int status = CLEF_OK;
    if (!r->dep.dmean) {
        status = clef_spectrum_deproj(&in, &r->dep);
        if (status == CLEF_OK && pay) {
            const size_t nn = (size_t)(r->dep.ldep + 1) * (r->dep.ldep + 1);
            pay[0] = r->dep.ldep;
            pay[1] = r->dep.truncated;
            pay[2] = r->dep.level_at_cut;
            memcpy(pay + 3, r->dep.dmean, nn * sizeof(double));
            clef_spectrum_deproj_cache(&r->o, key, np, pay, 1);
        }
    }
    free(pay);
    CLEF_TRY(status);
    r->res->ldep = r->dep.ldep;
    if (r->dep.truncated)
        clef_log(CLEF_LOG_WARN,
                 "the monopole/dipole removal is corrected in the coupling up to l = %d only; "
                 "it still removes %.2g of the power per mode there (a mask with sharp edges "
                 "on a small patch): band powers above may be biased low by about that much",
                 r->dep.ldep, r->dep.level_at_cut);
    stage_done(r->res, "deproject", &r->t0);
    return CLEF_OK;
}

/* The given bins, or linear bins as wide as the mask's coupling needs, and
 * the hidden bins around them. */
static int stage_bins(run *r)
{
    const int cw = clef_coupling_width(r->wl, r->lmax_t, CLEF_COUPLING_WIDTH_LEVEL);
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
        r->res->bin_width = width;
    }
    r->nb = r->res->nbins = clef_bins_count(r->bins);
    CLEF_TRY(clef_spectrum_signal_filter(&r->o, r->nside, r->lmax_ext, r->tl));
    return make_all_bins(r, cw);
}

/* The coupling matrix M to lmax_ext (cached), the binned operator K over
 * all bins, the noise bias, the decoupled band powers.  M itself is kept:
 * the noise bias and the window functions need it, and K is cheap to
 * build from it. */
static int stage_decouple(run *r)
{
    const int lmax = r->lmax_ext;
    const clef_spectrum_opts *o = &r->o;
    clef_coupling_opts co;
    co.rcond_min = o->rcond_min > 0 ? o->rcond_min : CLEF_COUPLING_RCOND_MIN;
    co.width_level = CLEF_COUPLING_WIDTH_LEVEL;
    clef_progress("coupling", 0.0);
    if (o->use_cache)
        CLEF_TRY(clef_coupling_create_cached(&r->m, lmax, r->wl, r->lmax_t, o->cache_dir,
                                             &r->res->cache_hit));
    else
        CLEF_TRY(clef_coupling_create(&r->m, lmax, r->wl, r->lmax_t));
    if (r->dep.dmean) {
        /* The monopole/dipole removal (spectrum_deproj.c): M - D where the
         * templates carry power, and no coupling at all from l = 0 (and 1
         * with the dipole), which the fit removes exactly from the
         * observed sky, beyond it. */
        CLEF_TRY(clef_coupling_add_block(r->m, r->dep.ldep + 1, r->dep.dmean, -1.0));
        CLEF_TRY(clef_coupling_zero_columns(r->m, r->nf[0] == 4 && r->nf[r->cross] == 4 ? 1 : 0));
    }
    CLEF_TRY(clef_coupling_binned_create(&r->kb, r->m, r->all_bins, r->tl, &co));
    clef_progress("coupling", 1.0);
    r->res->rcond = clef_coupling_binned_rcond(r->kb);
    stage_done(r->res, "coupling", &r->t0);

    /* Noise bias of an auto-spectrum: <N~_l> = sum_l' M_ll' N_l' (lmax_ext
     * never passes the noise table's end). */
    memcpy(r->pcl_dec, r->pcl[0], (size_t)(lmax + 1) * sizeof *r->pcl_dec);
    if (o->noise_cl && r->cross) {
        clef_log(CLEF_LOG_WARN, "noise spectrum ignored: a cross-spectrum of maps with "
                                "independent noise carries no noise bias");
    } else if (o->noise_cl) {
        if (o->noise_lmax < r->lmax)
            CLEF_FAIL(CLEF_EINVAL, "the noise spectrum stops at l = %d, below lmax = %d",
                      o->noise_lmax, r->lmax);
        double *bias = malloc((size_t)(lmax + 1) * sizeof *bias);
        if (!bias)
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the noise bias");
        clef_coupling_apply(r->m, o->noise_cl, bias);
        for (int l = 0; l <= lmax; l++)
            r->pcl_dec[l] -= bias[l];
        free(bias);
    }
    if (!(r->band = malloc((size_t)r->nb_all * sizeof *r->band)))
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for band powers");
    clef_coupling_binned_decouple(r->kb, r->pcl_dec, r->band);
    stage_done(r->res, "decouple", &r->t0);
    return CLEF_OK;
}

/* The covariance of all bins, the table of the reported ones. */
static int stage_covariance(run *r)
{
    const int nb = r->nb, na = r->nb_all;
    CLEF_TRY(clef_bandpowers_alloc(&r->bp, nb, 1));
    double *cov = malloc((size_t)na * na * sizeof *cov);
    double *crep = malloc((size_t)nb * nb * sizeof *crep), *band = malloc((size_t)nb * sizeof *band);
    int status = CLEF_OK;
    if (!cov || !crep || !band) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
        goto fail;
    }
    clef_spectrum_cov_in ci = {
        .lmax = r->lmax_ext, .lmax_t = r->lmax_t, .cross = r->cross, .bins = r->all_bins,
        .kb = r->kb, .pcl = r->pcl, .w2 = {r->pair_w2[0], r->pair_w2[1], r->pair_w2[2]},
        .tl = r->tl, .wl2 = r->wl2, .opts = &r->o};
    CLEF_CHECK(clef_spectrum_covariance(&ci, cov));
    for (int i = 0; i < nb; i++) {
        band[i] = r->band[r->rep[i]];
        for (int j = 0; j < nb; j++)
            crep[(size_t)i * nb + j] = cov[(size_t)r->rep[i] * na + r->rep[j]];
    }
    clef_spectrum_fill_table(r->bp, r->bins, band, crep);
    stage_done(r->res, "covariance", &r->t0);
fail:
    free(cov);
    free(crep);
    free(band);
    return status;
}

/* Band-power window functions acting on D_l (docs/formats-spectrum.md):
 * <D_b> = sum_l W_bl D_l with W = K^-1 P M T (acting on C_l) times
 * 2 pi / (l (l+1)) per column, for l = 0..lmax_ext; flat-weighted bands
 * are C_b, reported as D_b = C_b l_eff (l_eff + 1) / 2 pi, so their rows
 * carry that factor too.  Column l = 0 is 0: D_0 = 0 for every spectrum,
 * so a monopole's leakage cannot be written as a weight on D_0 (the
 * monopole is removed by default). */
static int stage_windows(run *r)
{
    const int nb = r->nb, na = r->nb_all;
    const size_t n = (size_t)r->lmax_ext + 1;
    double *all = malloc((size_t)na * n * sizeof *all);
    if (!all)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for %d x %zu window functions", na, n);
    int status = clef_coupling_binned_windows(r->kb, r->m, r->all_bins, r->tl, all);
    if (status == CLEF_OK)
        status = clef_bandpowers_alloc_windows(r->bp, r->lmax_ext);
    if (status == CLEF_OK) {
        clef_spectrum_windows_to_dl(r->bins, r->rep, nb, all, n, n, r->bp->win);
        stage_done(r->res, "windows", &r->t0);
    }
    free(all);
    return status;
}

void clef_spectrum_windows_to_dl(const clef_bins *bins, const int *rep, int nb, const double *all,
                                 size_t stride, size_t n, double *win)
{
    const int flat = clef_bins_weighting(bins) == CLEF_BINS_FLAT;
    for (int b = 0; b < nb; b++) {
        const double le = clef_bins_l_eff(bins, b);
        const double scale = flat ? le * (le + 1) / (2 * M_PI) : 1.0;
        const double *src = all + (size_t)rep[b] * stride;
        double *row = win + (size_t)b * n;
        row[0] = 0.0;
        for (size_t l = 1; l < n; l++)
            row[l] = src[l] * scale * 2 * M_PI / ((double)l * (double)(l + 1));
    }
}

/* The first peak, recorded in the table's keywords. */
static int stage_peak(run *r)
{
    clef_spectrum_result *res = r->res;
    const clef_peak_opts po = r->o.peak; /* half width 0: the library's automatic rule */
    int status = clef_peak_find(r->bp, &po, &res->peak);
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
    CLEF_TRY(clef_peak_to_meta(&res->peak, &po, r->bp));
    stage_done(res, "peak", &r->t0);
    return CLEF_OK;
}

int clef_spectrum_compute(const clef_map *map1, const clef_map *map2, const clef_map *mask1,
                          const clef_map *mask2, const clef_spectrum_opts *opts,
                          clef_spectrum_result *res)
{
    run r;
    memset(&r, 0, sizeof r);
    if (opts)
        r.o = *opts;
    else
        clef_spectrum_opts_default(&r.o);
    memset(res, 0, sizeof *res);
    CLEF_TRY(check_inputs(map1, map2, mask1, mask2, &r.o));
    r.res = res;
    r.nside = res->nside = map1->nside;
    r.npix = map1->npix;
    r.cross = res->cross = map2 != NULL;
    r.two_masks = r.cross && mask2 && mask2 != mask1;
    r.t0 = clef_wtime();
    const clef_map *const map[2] = {map1, map2};
    const clef_map *const mask[2] = {mask1, r.two_masks ? mask2 : mask1};

    int status = stage_lmax(&r);
    if (status == CLEF_OK)
        status = stage_prepare(&r, map, mask);
    if (status == CLEF_OK)
        status = stage_transform(&r);
    if (status == CLEF_OK)
        status = stage_deproject(&r);
    if (status == CLEF_OK)
        status = stage_bins(&r);
    if (status == CLEF_OK)
        status = stage_decouple(&r);
    if (status == CLEF_OK)
        status = stage_covariance(&r);
    if (status == CLEF_OK)
        status = stage_windows(&r);
    if (status == CLEF_OK)
        status = record_meta(r.bp, &r.o, res);
    if (status == CLEF_OK && r.o.find_peak)
        status = stage_peak(&r);
    if (status == CLEF_OK) {
        res->bp = r.bp;
        r.bp = NULL;
        for (int i = 0; r.o.keep_alm && i <= r.cross; i++) {
            res->alm[i] = r.alm[i];
            r.alm[i] = NULL;
        }
    }
    run_free(&r);
    return status;
}
