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
#include "spectrum_impl.h"

void clef_spectrum_opts_default(clef_spectrum_opts *o)
{
    memset(o, 0, sizeof *o);
    o->iterations = CLEF_SPECTRUM_ITERATIONS;
    o->use_cache = 1;
    o->find_peak = 1;
    clef_peak_opts_default(&o->peak);
    o->peak.half_width = 0; /* automatic: see peak_half_width() */
}

void clef_spectrum_result_free(clef_spectrum_result *res)
{
    if (!res)
        return;
    clef_bandpowers_free(res->bp);
    res->bp = NULL;
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
static int make_weights(const clef_map *map, const clef_map *mask, double **w_out)
{
    double *w = malloc((size_t)map->npix * sizeof *w);
    if (!w)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for %lld mask weights", (long long)map->npix);
    for (int64_t p = 0; p < map->npix; p++)
        w[p] = (map->valid[p] && mask->valid[p]) ? mask->pix[p] : 0.0;
    *w_out = w;
    return CLEF_OK;
}

/* Beam x pixel window x transfer per multipole: the signal filter T_l =
 * F_l B_l^2 p_l^2 (METHODS.md section 4), and b2p2 = B_l^2 p_l^2 alone. */
static int signal_filter(const clef_spectrum_opts *o, int64_t nside, int lmax, double *tl)
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
        CLEF_CHECK(clef_beam_pixwin(nside, lmax, tmp));
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

/* Default lmax: 3 nside - 1, lowered to the last multipole where the beam
 * times the pixel window stays above CLEF_SPECTRUM_BEAM_FLOOR. */
static int default_lmax(const clef_spectrum_opts *o, int64_t nside, int *lmax)
{
    int l3 = (int)(3 * nside - 1);
    double *tl = malloc((size_t)(l3 + 1) * sizeof *tl);
    if (!tl)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the beam");
    clef_spectrum_opts tmp = *o;
    tmp.transfer = NULL; /* a filter's zeros are the user's business, not a reason to cut */
    if (tmp.beam && tmp.beam_lmax < l3) {
        /* A tabulated beam limits lmax by its own length. */
        l3 = tmp.beam_lmax;
    }
    int status = signal_filter(&tmp, nside, l3, tl);
    if (status == CLEF_OK) {
        const double floor2 = CLEF_SPECTRUM_BEAM_FLOOR * CLEF_SPECTRUM_BEAM_FLOOR;
        int l = l3;
        while (l > 2 && !(tl[l] >= floor2))
            l--;
        *lmax = l;
        if (l < l3)
            clef_log(CLEF_LOG_INFO, "lmax lowered to %d where the beam falls below %g", l,
                     CLEF_SPECTRUM_BEAM_FLOOR);
    }
    free(tl);
    return status;
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

/* The automatic half-width of the peak fit: the library's default (60),
 * widened to three bin widths so wide bins still give about seven points. */
static double peak_half_width(const clef_bins *bins, const clef_peak_opts *po)
{
    clef_peak_opts d;
    clef_peak_opts_default(&d);
    double hw = d.half_width;
    for (int b = 0; b < clef_bins_count(bins); b++) {
        double c = 0.5 * (clef_bins_l_lo(bins, b) + clef_bins_l_hi(bins, b));
        double w = clef_bins_l_hi(bins, b) - clef_bins_l_lo(bins, b) + 1;
        if (c >= po->l_min && c <= po->l_max && 3 * w > hw)
            hw = 3 * w;
    }
    return hw;
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
    CLEF_TRY(clef_bandpowers_meta_number(bp, "LMAXMASK", r->lmax_mask,
                                         "highest multipole of the mask spectrum"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "NBINS", r->nbins, "number of band powers"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "BINWIDTH", r->bin_width,
                                         "automatic bin width (0: bins given)"));
    CLEF_TRY(clef_bandpowers_meta_number(bp, "BEAMFWHM", o->beam ? 0.0 : o->beam_fwhm,
                                         "Gaussian beam FWHM [arcmin] (0: none)"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "BEAMTAB", o->beam ? "yes" : "no",
                                       "tabulated beam used"));
    CLEF_TRY(clef_bandpowers_meta_text(bp, "PIXWIN", o->pixel_window ? "yes" : "no",
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
static void fill_table(clef_bandpowers *bp, const clef_bins *bins, const double *band,
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

int clef_spectrum_compute(const clef_map *map1, const clef_map *map2, const clef_map *mask1,
                          const clef_map *mask2, const clef_spectrum_opts *opts,
                          clef_spectrum_result *res)
{
    clef_spectrum_opts o;
    if (opts)
        o = *opts;
    else
        clef_spectrum_opts_default(&o);
    memset(res, 0, sizeof *res);
    CLEF_TRY(check_inputs(map1, map2, mask1, mask2, &o));

    const int64_t nside = map1->nside, npix = map1->npix;
    const int cross = map2 != NULL;
    const int two_masks = cross && mask2 && mask2 != mask1;
    int status = CLEF_OK;
    double t0 = clef_wtime(), t_start = t0;
    double *w[2] = {NULL, NULL}, *wprod = NULL, *tmap[2] = {NULL, NULL}, *tl = NULL;
    double complex *alm[5] = {NULL, NULL, NULL, NULL, NULL};
    double *pcl[3] = {NULL, NULL, NULL}, *pcl_dec = NULL, *wl = NULL, *wl2 = NULL, *band = NULL;
    clef_sht *sht = NULL;
    clef_bins *own_bins = NULL;
    clef_coupling_binned *kb = NULL;
    clef_coupling *m_noise = NULL;
    clef_bandpowers *bp = NULL;

    res->cross = cross;
    res->nside = nside;

    /* lmax */
    int lmax = o.lmax;
    const int lmax_pix = (int)(3 * nside - 1);
    if (lmax == 0) {
        CLEF_CHECK(default_lmax(&o, nside, &lmax));
    } else if (lmax < 2 || lmax > lmax_pix) {
        status = clef_fail(CLEF_EINVAL,
                           "lmax = %d is outside 2..3*nside-1 = %d for nside %lld: the "
                           "pixelised map carries no independent information above 3*nside-1",
                           lmax, lmax_pix, (long long)nside);
        goto fail;
    }
    res->lmax = lmax;
    /* The coupling needs W_l to 2 lmax; the pixelised mask is only resolved to
     * 3 nside - 1, above which W_l is taken as zero (docs/method.md). */
    const int lmax_t = 2 * lmax < lmax_pix ? 2 * lmax : lmax_pix;
    res->lmax_mask = lmax_t;

    /* Weights, moments, monopole/dipole. */
    CLEF_CHECK(make_weights(map1, mask1, &w[0]));
    if (cross)
        CLEF_CHECK(make_weights(map2, two_masks ? mask2 : mask1, &w[1]));
    {
        double s1 = 0, s2 = 0, s4 = 0;
        int64_t nobs = 0;
        for (int64_t p = 0; p < npix; p++) {
            double x = w[0][p], x2 = x * x;
            s1 += x;
            s2 += x2;
            s4 += x2 * x2;
            nobs += x > 0;
        }
        if (nobs == 0 || s2 <= 0) {
            status = clef_fail(CLEF_EINVAL,
                               "mask '%s' leaves no observed sky on map '%s' (every weight is 0)",
                               name_or(&o, 2, "mask"), name_or(&o, 0, "map"));
            goto fail;
        }
        res->fsky = (double)nobs / (double)npix;
        res->w1 = s1 / (double)npix;
        res->w2 = s2 / (double)npix;
        res->w4 = s4 / (double)npix;
        res->fsky_eff = res->w2 * res->w2 / res->w4;
        if (cross) {
            int64_t n2 = 0;
            for (int64_t p = 0; p < npix; p++)
                n2 += w[1][p] > 0;
            if (n2 == 0) {
                status = clef_fail(CLEF_EINVAL, "mask '%s' leaves no observed sky on map '%s'",
                                   name_or(&o, two_masks ? 3 : 2, "mask"), name_or(&o, 1, "map 2"));
                goto fail;
            }
        }
    }
    for (int i = 0; i <= cross; i++) {
        const clef_map *m = i ? map2 : map1;
        tmap[i] = malloc((size_t)npix * sizeof(double));
        if (!tmap[i]) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for a weighted map");
            goto fail;
        }
        memcpy(tmap[i], m->pix, (size_t)npix * sizeof(double));
        if (!o.keep_multipoles) {
            status = clef_spectrum_remove_multipoles(tmap[i], w[i], nside, 1, res->multipoles[i]);
            if (status == CLEF_ENUMERIC) {
                /* A small or thin patch may not constrain a dipole: remove the
                 * monopole alone rather than fail. */
                clef_log(CLEF_LOG_WARN, "map '%s': %s; only the monopole is removed",
                         name_or(&o, i, "map"), clef_last_error());
                status = clef_spectrum_remove_multipoles(tmap[i], w[i], nside, 0,
                                                         res->multipoles[i]);
            }
            if (status != CLEF_OK)
                goto fail;
        }
        for (int64_t p = 0; p < npix; p++)
            tmap[i][p] *= w[i][p];
    }
    /* The product mask w_a w_b, whose spectrum drives the covariance. */
    wprod = malloc((size_t)npix * sizeof *wprod);
    if (!wprod) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the product mask");
        goto fail;
    }
    for (int64_t p = 0; p < npix; p++)
        wprod[p] = w[0][p] * w[cross][p];
    stage_done(res, "prepare", &t0);

    /* Analyses: the weighted maps to lmax (their spectra are only needed
     * there, and analysing them further, up to 3 nside - 1, would only add
     * quadrature error), the masks and the product mask to lmax_t.  When
     * both limits agree, one call shares the Legendre recurrence. */
    const int nm = 1 + cross;                      /* weighted maps: alm[0..nm-1] */
    const int im = nm;                             /* mask 1 */
    const int im2 = two_masks ? im + 1 : im;       /* mask 2 */
    const int iw = im2 + 1;                        /* product mask */
    {
        const double *in[5];
        int n = 0;
        in[n++] = tmap[0];
        if (cross)
            in[n++] = tmap[1];
        in[n++] = w[0];
        if (two_masks)
            in[n++] = w[1];
        in[n++] = wprod;
        for (int i = 0; i < n; i++) {
            int la = i < nm ? lmax : lmax_t;
            alm[i] = malloc(clef_alm_size(la, la) * sizeof(double complex));
            if (!alm[i]) {
                status = clef_fail(CLEF_ENOMEM, "out of memory for a_lm (lmax %d)", la);
                goto fail;
            }
        }
        clef_progress("analysis", 0.0);
        clef_sht_opts so = {0};
        if (lmax_t == lmax) {
            so.nmaps = n;
            CLEF_CHECK(clef_sht_create(&sht, nside, lmax, &so));
            CLEF_CHECK(clef_sht_analysis(sht, n, in, (double complex *const *)alm, o.iterations));
        } else {
            so.nmaps = nm;
            CLEF_CHECK(clef_sht_create(&sht, nside, lmax, &so));
            CLEF_CHECK(clef_sht_analysis(sht, nm, in, (double complex *const *)alm, o.iterations));
            clef_progress("analysis", 0.3);
            clef_sht_destroy(sht);
            sht = NULL;
            so.nmaps = n - nm;
            CLEF_CHECK(clef_sht_create(&sht, nside, lmax_t, &so));
            CLEF_CHECK(clef_sht_analysis(sht, n - nm, in + nm,
                                         (double complex *const *)alm + nm, o.iterations));
        }
        clef_progress("analysis", 1.0);
    }
    stage_done(res, "transform", &t0);

    /* Pseudo-spectra: 0 = map1 x map(2), 1 = map1 auto, 2 = map2 auto. */
    {
        for (int k = 0; k < 3; k++) {
            pcl[k] = calloc((size_t)lmax + 1, sizeof(double));
            if (!pcl[k]) {
                status = clef_fail(CLEF_ENOMEM, "out of memory for spectra");
                goto fail;
            }
        }
        wl = calloc((size_t)lmax_t + 1, sizeof *wl);
        wl2 = calloc((size_t)lmax_t + 1, sizeof *wl2);
        tl = malloc((size_t)(lmax + 1) * sizeof *tl);
        pcl_dec = malloc((size_t)(lmax + 1) * sizeof *pcl_dec);
        if (!wl || !wl2 || !tl || !pcl_dec) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for spectra");
            goto fail;
        }
        CLEF_CHECK(clef_alm_cl(lmax, lmax, alm[0], alm[cross ? 1 : 0], pcl[0]));
        if (cross) {
            CLEF_CHECK(clef_alm_cl(lmax, lmax, alm[0], NULL, pcl[1]));
            CLEF_CHECK(clef_alm_cl(lmax, lmax, alm[1], NULL, pcl[2]));
        }
        /* W_l of the mask pair (a cross-spectrum for two masks). */
        CLEF_CHECK(clef_alm_cl(lmax_t, lmax_t, alm[im], alm[im2], wl));
        CLEF_CHECK(clef_alm_cl(lmax_t, lmax_t, alm[iw], NULL, wl2));
        for (int l = 0; l <= lmax_t; l++) /* a cross W_l can dip below 0 by round-off */
            if (wl[l] < 0)
                wl[l] = 0;
    }

    /* Bins. */
    const clef_bins *bins = o.bins;
    if (!bins) {
        int width = o.bin_width;
        if (width <= 0) {
            int cw = clef_coupling_width(wl, lmax_t, CLEF_COUPLING_WIDTH_LEVEL);
            width = cw > CLEF_SPECTRUM_BIN_WIDTH ? cw : CLEF_SPECTRUM_BIN_WIDTH;
        }
        if (width > lmax - 1) {
            status = clef_fail(CLEF_EINVAL,
                               "bin width %d does not fit between l = 2 and lmax = %d", width,
                               lmax);
            goto fail;
        }
        CLEF_CHECK(clef_bins_create_linear(&own_bins, 2, width, lmax, CLEF_BINS_DL));
        bins = own_bins;
        res->bin_width = width;
    } else if (clef_bins_lmax(bins) > lmax) {
        status = clef_fail(CLEF_EINVAL, "the bins reach l = %d, above lmax = %d",
                           clef_bins_lmax(bins), lmax);
        goto fail;
    }
    res->nbins = clef_bins_count(bins);

    /* Coupling operator. */
    CLEF_CHECK(signal_filter(&o, nside, lmax, tl));
    {
        clef_coupling_opts co;
        co.rcond_min = o.rcond_min > 0 ? o.rcond_min : CLEF_COUPLING_RCOND_MIN;
        co.width_level = CLEF_COUPLING_WIDTH_LEVEL;
        clef_progress("coupling", 0.0);
        if (o.use_cache) {
            status = clef_coupling_binned_create_cached(&kb, lmax, wl, lmax_t, bins, tl, &co,
                                                        o.cache_dir, &res->cache_hit);
        } else {
            clef_coupling *m = NULL;
            status = clef_coupling_create(&m, lmax, wl, lmax_t);
            if (status == CLEF_OK)
                status = clef_coupling_binned_create(&kb, m, bins, tl, &co);
            clef_coupling_destroy(m);
        }
        clef_progress("coupling", 1.0);
        if (status != CLEF_OK)
            goto fail;
        res->rcond = clef_coupling_binned_rcond(kb);
    }
    stage_done(res, "coupling", &t0);

    /* Noise bias of an auto-spectrum: <N~_l> = sum_l' M_ll' N_l'. */
    if (o.noise_cl && !cross) {
        if (o.noise_lmax < lmax) {
            status = clef_fail(CLEF_EINVAL, "the noise spectrum stops at l = %d, below lmax = %d",
                               o.noise_lmax, lmax);
            goto fail;
        }
        CLEF_CHECK(clef_spectrum_coupling(&m_noise, lmax, wl, lmax_t, &o));
        clef_coupling_apply(m_noise, o.noise_cl, pcl_dec);
        for (int l = 0; l <= lmax; l++)
            pcl_dec[l] = pcl[0][l] - pcl_dec[l];
    } else if (o.noise_cl && cross) {
        clef_log(CLEF_LOG_WARN, "noise spectrum ignored: a cross-spectrum of maps with "
                                "independent noise carries no noise bias");
    }

    if (!(o.noise_cl && !cross))
        memcpy(pcl_dec, pcl[0], (size_t)(lmax + 1) * sizeof *pcl_dec);
    const int nb = res->nbins;
    band = malloc((size_t)nb * sizeof *band);
    if (!band) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for band powers");
        goto fail;
    }
    clef_coupling_binned_decouple(kb, pcl_dec, band);
    stage_done(res, "decouple", &t0);

    /* Covariance. */
    CLEF_CHECK(clef_bandpowers_alloc(&bp, nb, 1));
    {
        double *cov = malloc((size_t)nb * nb * sizeof *cov);
        if (!cov) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for the covariance");
            goto fail;
        }
        clef_spectrum_cov_in ci = {
            .lmax = lmax, .lmax_t = lmax_t, .cross = cross, .bins = bins, .kb = kb,
            .pcl = pcl, .w2 = {res->w2, 0, 0}, .tl = tl, .wl2 = wl2, .opts = &o};
        {
            /* Moments of each mask pair for pseudo-spectrum normalisation. */
            double s11 = 0, s22 = 0, s12 = 0;
            for (int64_t p = 0; p < npix; p++) {
                s11 += w[0][p] * w[0][p];
                s22 += w[cross][p] * w[cross][p];
                s12 += w[0][p] * w[cross][p];
            }
            ci.w2[0] = s12 / (double)npix;
            ci.w2[1] = s11 / (double)npix;
            ci.w2[2] = s22 / (double)npix;
        }
        status = clef_spectrum_covariance(&ci, cov);
        if (status == CLEF_OK)
            fill_table(bp, bins, band, cov);
        free(cov);
        if (status != CLEF_OK)
            goto fail;
    }
    stage_done(res, "covariance", &t0);

    CLEF_CHECK(record_meta(bp, &o, res));
    if (o.find_peak) {
        clef_peak_opts po = o.peak;
        if (!(po.half_width > 0))
            po.half_width = peak_half_width(bins, &po);
        CLEF_CHECK(clef_peak_find(bp, &po, &res->peak));
        res->peak_done = 1;
        CLEF_CHECK(clef_peak_to_meta(&res->peak, bp));
        stage_done(res, "peak", &t0);
    }
    (void)t_start;
    res->bp = bp;
    bp = NULL;

fail:
    clef_bandpowers_free(bp);
    free(band);
    clef_coupling_destroy(m_noise);
    clef_coupling_binned_destroy(kb);
    clef_bins_destroy(own_bins);
    clef_sht_destroy(sht);
    for (int i = 0; i < 5; i++)
        free(alm[i]);
    for (int k = 0; k < 3; k++)
        free(pcl[k]);
    free(pcl_dec);
    free(wl);
    free(wl2);
    free(tl);
    free(wprod);
    free(tmap[0]);
    free(tmap[1]);
    free(w[0]);
    free(w[1]);
    return status;
}
