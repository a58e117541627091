/* The one- and two-map estimator (spectrum.h) as the thin case of the
 * estimator of many fields (estimator.h: one field for an auto-spectrum,
 * two for a cross-spectrum, one pair), and the rules the options of a
 * field put on the multipole range and the signal filter, shared by both
 * (pseudo-C_l method, Hivon et al. 2002, ApJ 567, 2). */
#define _DEFAULT_SOURCE
#include "clef/spectrum.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/beam.h"
#include "clef/estimator.h"
#include "core_impl.h"
#include "estimator_impl.h"
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

static const char *name_or(const clef_spectrum_opts *o, int i, const char *fallback)
{
    return o->names[i] ? o->names[i] : fallback;
}

/* Effective weights: the mask where the map is valid, 0 elsewhere (the
 * polarized spectra's Q/U weights, spectrum_pol.c). */
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
int clef_est_signal_filter(const clef_spectrum_opts *o, int64_t nside, int lmax, double *tl)
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

void clef_est_second_opts(const clef_spectrum_opts *o, clef_spectrum_opts *o2)
{
    *o2 = *o;
    if (!o->second_instrument)
        return;
    o2->beam_fwhm = o->beam2_fwhm;
    o2->beam = o->beam2;
    o2->beam_lmax = o->beam2_lmax;
    o2->transfer = o->transfer2;
    o2->transfer_lmax = o->transfer2_lmax;
}

/* Limits the options put on the multipole range: l_tab, the end of the
 * tabulated beam, transfer function and noise spectrum (at most 3 nside - 1,
 * where the pixelised map stops carrying independent information), and
 * l_beam <= l_tab, the last multipole where the beam times the pixel window
 * is at least CLEF_SPECTRUM_BEAM_FLOOR (beyond it decoupling would amplify
 * the noise by more than 1e4 in power).  `why` receives the reason of the
 * tightest limit when it is below 3 nside - 1. */
int clef_est_limits(const clef_spectrum_opts *o, int64_t nside, int *l_tab, int *l_beam,
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
    int status = clef_est_signal_filter(&tmp, nside, l3, tl);
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
    CLEF_TRY(clef_est_limits(opts, nside, &l_tab, &l_beam, NULL, 0));
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
    } else if (o->second_instrument) {
        CLEF_FAIL(CLEF_EINVAL, "a second beam or transfer function was given for a single map");
    }
    return CLEF_OK;
}

int clef_spectrum_compute(const clef_map *map1, const clef_map *map2, const clef_map *mask1,
                          const clef_map *mask2, const clef_spectrum_opts *opts,
                          clef_spectrum_result *res)
{
    return clef_spectrum_compute_keep(map1, map2, mask1, mask2, opts, res, NULL);
}

int clef_spectrum_compute_keep(const clef_map *map1, const clef_map *map2, const clef_map *mask1,
                               const clef_map *mask2, const clef_spectrum_opts *opts,
                               clef_spectrum_result *res, clef_spectrum_keep *keep)
{
    clef_estimator *prev = keep ? keep->prev : NULL;
    if (keep)
        keep->prev = keep->e = NULL;
    clef_spectrum_opts o;
    if (opts)
        o = *opts;
    else
        clef_spectrum_opts_default(&o);
    memset(res, 0, sizeof *res);
    int status = check_inputs(map1, map2, mask1, mask2, &o);
    if (status != CLEF_OK) {
        clef_estimator_destroy(prev);
        return status;
    }
    const int cross = map2 != NULL;
    if (o.noise_cl && cross)
        clef_log(CLEF_LOG_WARN, "noise spectrum ignored: a cross-spectrum of maps with "
                                "independent noise carries no noise bias");
    /* One field per map; both carry the run's beam, transfer and noise
     * tables (the noise table still bounds lmax of a cross-spectrum, and
     * the estimator subtracts it from auto-spectra only), the second map
     * the second instrument's beam and transfer function if there is one. */
    clef_field f[2];
    static const char *const fname[2] = {"1", "2"};
    for (int i = 0; i <= cross; i++) {
        clef_field_init(&f[i]);
        f[i].name = fname[i];
        f[i].nsplits = 1;
        f[i].maps[0] = i ? map2 : map1;
        f[i].map_names[0] = o.names[i];
        const int two = i && mask2 && mask2 != mask1;
        f[i].mask = two ? mask2 : mask1;
        f[i].mask_name = two ? o.names[3] : o.names[2];
        clef_spectrum_opts fo;
        clef_est_second_opts(&o, &fo);
        if (!i)
            fo = o;
        f[i].beam_fwhm = fo.beam_fwhm;
        f[i].beam = fo.beam;
        f[i].beam_lmax = fo.beam_lmax;
        f[i].transfer = fo.transfer;
        f[i].transfer_lmax = fo.transfer_lmax;
        f[i].noise_cl = o.noise_cl;
        f[i].noise_lmax = o.noise_lmax;
    }
    clef_estimator *e = NULL;
    status = clef_estimator_create(&e, &o, 0);
    if (status == CLEF_OK && keep) {
        status = clef_estimator_reuse(e, prev); /* e owns prev from here */
        prev = NULL;
        e->after_maps = keep->after_maps;
        e->after_maps_arg = keep->arg;
    }
    clef_estimator_destroy(prev);
    for (int i = 0; status == CLEF_OK && i <= cross; i++)
        status = clef_estimator_add_field(e, &f[i]);
    if (status == CLEF_OK)
        status = clef_estimator_add_pair(e, fname[0], fname[cross]);
    if (status == CLEF_OK)
        status = clef_estimator_compute(e);
    if (status == CLEF_OK) {
        clef_estimator_take_result(e, 0, res);
        /* The polarized spectra (spectrum_pol.c) reuse the T a_lm. */
        for (int i = 0; o.keep_alm && i <= cross; i++) {
            res->alm[i] = e->fields[i].alm[0];
            e->fields[i].alm[0] = NULL;
        }
    }
    if (keep && status == CLEF_OK)
        keep->e = e;
    else
        clef_estimator_destroy(e);
    return status;
}
