/* Simulated skies: Gaussian a_lm, beam and pixel-window smoothing,
 * synthesis, and pixel noise.  Seeding and streams: include/clef/sim.h and
 * docs/simulation.md. */
#define _GNU_SOURCE
#include "clef/sim.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>

#include "clef/beam.h"
#include "core_impl.h"

/* Family constants: arbitrary odd 64-bit words that separate the families
 * before mixing. */
static const uint64_t family_key[CLEF_SIM_STREAM_NFAMILIES] = {
    0x736b79a1c3e5f701ULL, /* sky (T) */
    0x6e6f697365310b0dULL, /* noise, split 1 */
    0x6e6f69736532a9b3ULL, /* noise, split 2 */
    0x736b7945e1c3a575ULL, /* sky, the E part independent of T */
    0x736b7942d3b19763ULL, /* sky, B */
    0x6e6f697365510f2bULL, /* noise of Q */
    0x6e6f697365553d49ULL, /* noise of U */
};

/* splitmix64 output function (Steele, Lea & Flood 2014, "Fast splittable
 * pseudorandom number generators", OOPSLA). */
static uint64_t splitmix64(uint64_t x)
{
    x += 0x9e3779b97f4a7c15ULL;
    x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9ULL;
    x = (x ^ (x >> 27)) * 0x94d049bb133111ebULL;
    return x ^ (x >> 31);
}

/* MurmurHash3 32-bit finaliser (Appleby): a bijection on 32-bit words. */
static uint32_t fmix32(uint32_t h)
{
    h ^= h >> 16;
    h *= 0x85ebca6bU;
    h ^= h >> 13;
    h *= 0xc2b2ae35U;
    h ^= h >> 16;
    return h;
}

unsigned long clef_sim_stream_seed(uint64_t seed, int family, uint64_t number)
{
    const uint64_t key =
        family_key[family >= 0 && family < CLEF_SIM_STREAM_NFAMILIES ? family : 0];
    const uint32_t base = (uint32_t)splitmix64(seed ^ key);
    return (unsigned long)fmix32(base + (uint32_t)number);
}

static int sim_alm_family(int lmax, const double *cl, uint64_t seed, int family,
                          double complex *alm);

int clef_sim_alm(int lmax, const double *cl, uint64_t seed, double complex *alm)
{
    return sim_alm_family(lmax, cl, seed, CLEF_SIM_STREAM_SKY, alm);
}

static int sim_alm_family(int lmax, const double *cl, uint64_t seed, int family,
                          double complex *alm)
{
    if (lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "simulation lmax must be >= 0, got %d", lmax);
    for (int l = 0; l <= lmax; l++)
        if (!isfinite(cl[l]) || cl[l] < 0)
            CLEF_FAIL(CLEF_EINVAL, "input spectrum C_%d = %g must be finite and >= 0", l, cl[l]);
    int failed = 0;
#pragma omp parallel
    {
        gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
        if (!r) {
#pragma omp atomic write
            failed = 1;
        }
#pragma omp for schedule(dynamic, 4)
        for (int m = 0; m <= lmax; m++) {
            if (!r)
                continue;
            gsl_rng_set(r, clef_sim_stream_seed(seed, family, (uint64_t)m));
            double complex *row = alm + clef_alm_index(lmax, m, m);
            if (m == 0) {
                for (int l = 0; l <= lmax; l++)
                    row[l] = sqrt(cl[l]) * gsl_ran_gaussian_ziggurat(r, 1.0);
            } else {
                for (int l = m; l <= lmax; l++) {
                    const double s = sqrt(0.5 * cl[l]);
                    const double re = gsl_ran_gaussian_ziggurat(r, 1.0);
                    const double im = gsl_ran_gaussian_ziggurat(r, 1.0);
                    row[l - m] = s * re + I * (s * im);
                }
            }
        }
        gsl_rng_free(r);
    }
    if (failed)
        CLEF_FAIL(CLEF_ENOMEM, "no memory for a random number generator");
    return CLEF_OK;
}

void clef_sim_alm_scale(int lmax, const double *bl, const double *pl, double complex *alm)
{
    if (!bl && !pl)
        return;
    for (int m = 0; m <= lmax; m++) {
        double complex *row = alm + clef_alm_index(lmax, m, m);
        for (int l = m; l <= lmax; l++)
            row[l - m] *= (bl ? bl[l] : 1.0) * (pl ? pl[l] : 1.0);
    }
}

double clef_sim_sigma_pix(int64_t nside, double depth_uk_arcmin)
{
    /* Omega_pix = 4 pi / npix sr = pi / (3 nside^2) sr (Gorski et al. 2005). */
    const double arcmin = M_PI / (180.0 * 60.0);
    const double omega_arcmin2 = M_PI / (3.0 * (double)nside * (double)nside) / (arcmin * arcmin);
    return depth_uk_arcmin / sqrt(omega_arcmin2);
}

int clef_sim_noise(int64_t nside, double depth_uk_arcmin, const double *hits, uint64_t seed,
                   int family, double *map, unsigned char *valid)
{
    if (nside < 1 || nside > 8192)
        CLEF_FAIL(CLEF_EINVAL, "noise: nside %lld out of range", (long long)nside);
    if (!isfinite(depth_uk_arcmin) || depth_uk_arcmin < 0)
        CLEF_FAIL(CLEF_EINVAL, "noise depth must be finite and >= 0 uK-arcmin, got %g",
                  depth_uk_arcmin);
    if (family != CLEF_SIM_STREAM_NOISE1 && family != CLEF_SIM_STREAM_NOISE2 &&
        family != CLEF_SIM_STREAM_NOISE_Q && family != CLEF_SIM_STREAM_NOISE_U)
        CLEF_FAIL(CLEF_EINVAL, "noise stream family %d is not a noise family", family);
    if (hits && !valid)
        CLEF_FAIL(CLEF_EINVAL, "noise from a hit map needs a validity array");
    const int64_t npix = 12 * nside * nside;
    const double sigma = clef_sim_sigma_pix(nside, depth_uk_arcmin);
    double mean_hits = 0;
    if (hits) {
        int64_t nobs = 0;
        for (int64_t p = 0; p < npix; p++) {
            if (!isfinite(hits[p]) || hits[p] < 0)
                CLEF_FAIL(CLEF_EINVAL, "hit count %g at pixel %lld must be finite and >= 0",
                          hits[p], (long long)p);
            if (hits[p] > 0) {
                mean_hits += hits[p];
                nobs++;
            }
        }
        if (nobs == 0)
            CLEF_FAIL(CLEF_EINVAL, "the hit map has no pixel with hits > 0");
        mean_hits /= (double)nobs;
    }
    const int64_t nchunks = (npix + CLEF_SIM_NOISE_CHUNK - 1) / CLEF_SIM_NOISE_CHUNK;
    int failed = 0;
#pragma omp parallel
    {
        gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
        if (!r) {
#pragma omp atomic write
            failed = 1;
        }
#pragma omp for schedule(static)
        for (int64_t c = 0; c < nchunks; c++) {
            if (!r)
                continue;
            gsl_rng_set(r, clef_sim_stream_seed(seed, family, (uint64_t)c));
            const int64_t p0 = c * CLEF_SIM_NOISE_CHUNK;
            const int64_t p1 = p0 + CLEF_SIM_NOISE_CHUNK < npix ? p0 + CLEF_SIM_NOISE_CHUNK : npix;
            for (int64_t p = p0; p < p1; p++) {
                /* One deviate per pixel, used or not, so that the hit map
                 * does not shift the stream. */
                const double g = gsl_ran_gaussian_ziggurat(r, 1.0);
                if (!hits) {
                    map[p] += sigma * g;
                    if (valid)
                        valid[p] = 1;
                } else if (hits[p] > 0) {
                    /* sigma_p = sigma_ref / sqrt(hits_p / <hits>) */
                    map[p] += sigma * sqrt(mean_hits / hits[p]) * g;
                    valid[p] = 1;
                } else {
                    valid[p] = 0;
                }
            }
        }
        gsl_rng_free(r);
    }
    if (failed)
        CLEF_FAIL(CLEF_ENOMEM, "no memory for a random number generator");
    return CLEF_OK;
}

int clef_sim_map(const clef_sht *sht, const double *cl, const clef_sim_opts *opts,
                 double complex *alm_out, double *const *maps, unsigned char *valid)
{
    const clef_sim_opts defaults = {0};
    const clef_sim_opts *o = opts ? opts : &defaults;
    const int lmax = clef_sht_lmax(sht);
    const int64_t nside = clef_sht_nside(sht);
    const int nsplits = o->nsplits ? o->nsplits : 1;
    if (clef_sht_mmax(sht) != lmax)
        CLEF_FAIL(CLEF_EINVAL, "simulation needs a transform plan with mmax = lmax (%d), got %d",
                  lmax, clef_sht_mmax(sht));
    if (nsplits < 1 || nsplits > 2)
        CLEF_FAIL(CLEF_EINVAL, "number of splits must be 1 or 2, got %d", nsplits);
    if (o->hits && !valid)
        CLEF_FAIL(CLEF_EINVAL, "noise from a hit map needs a validity array");
    if (!isfinite(o->noise_depth) || o->noise_depth < 0)
        CLEF_FAIL(CLEF_EINVAL, "noise depth must be finite and >= 0 uK-arcmin, got %g",
                  o->noise_depth);
    if (o->hits && o->noise_depth == 0)
        CLEF_FAIL(CLEF_EINVAL, "a hit map was given without a noise depth");

    int status = CLEF_OK;
    const size_t nalm = clef_alm_size(lmax, lmax);
    double complex *alm = malloc(sizeof *alm * nalm);
    double *bl = malloc(sizeof *bl * ((size_t)lmax + 1));
    double *pl = malloc(sizeof *pl * ((size_t)lmax + 1));
    if (!alm || !bl || !pl) {
        status = clef_fail(CLEF_ENOMEM, "no memory for simulated a_lm (lmax %d)", lmax);
        goto fail;
    }
    if (o->beam)
        memcpy(bl, o->beam, sizeof *bl * ((size_t)lmax + 1));
    else
        CLEF_CHECK(clef_beam_gaussian(o->beam_fwhm, lmax, bl));
    if (o->pixel_window)
        CLEF_CHECK(clef_beam_pixel_window(nside, lmax, pl));
    CLEF_CHECK(clef_sim_alm(lmax, cl, o->seed, alm));
    if (alm_out)
        memcpy(alm_out, alm, sizeof *alm * nalm);
    clef_sim_alm_scale(lmax, bl, o->pixel_window ? pl : NULL, alm);
    const double complex *in[1] = {alm};
    CLEF_CHECK(clef_sht_synthesis(sht, 1, in, maps));
    const int64_t npix = 12 * nside * nside;
    for (int s = 1; s < nsplits; s++)
        memcpy(maps[s], maps[0], sizeof(double) * (size_t)npix);
    if (valid && !o->hits)
        memset(valid, 1, (size_t)npix);
    if (o->noise_depth > 0)
        for (int s = 0; s < nsplits; s++)
            CLEF_CHECK(clef_sim_noise(nside, o->noise_depth, o->hits, o->seed,
                                      CLEF_SIM_STREAM_NOISE1 + s, maps[s], valid));
fail:
    free(alm);
    free(bl);
    free(pl);
    return status;
}

/* Correlated T, E and independent B (the Cholesky factor of the 2 x 2
 * T/E covariance per l; common practice, e.g. Zaldarriaga & Seljak 1997
 * section IV): a_T = sqrt(TT) g1, a_E = TE/sqrt(TT) g1 + sqrt(EE - TE^2/TT) g2,
 * a_B = sqrt(BB) g3, with g1 the sky stream of clef_sim_alm (so a_T is the
 * temperature-only draw of the same seed up to rounding) and g2, g3 their
 * own stream families. */
int clef_sim_alm_pol(int lmax, const double *tt, const double *ee, const double *bb,
                     const double *te, uint64_t seed, double complex *at, double complex *ae,
                     double complex *ab)
{
    if (lmax < 2)
        CLEF_FAIL(CLEF_EINVAL, "polarized simulation lmax must be >= 2, got %d", lmax);
    for (int l = 0; l <= lmax; l++) {
        const double v[4] = {tt[l], ee[l], bb[l], te[l]};
        static const char *const n[4] = {"TT", "EE", "BB", "TE"};
        for (int k = 0; k < 4; k++)
            if (!isfinite(v[k]) || (k < 3 && v[k] < 0))
                CLEF_FAIL(CLEF_EINVAL, "input spectrum %s at l = %d is %g: must be finite%s", n[k],
                          l, v[k], k < 3 ? " and >= 0" : "");
        if (te[l] * te[l] > tt[l] * ee[l] * (1 + 1e-12))
            CLEF_FAIL(CLEF_EINVAL, "input spectra at l = %d: TE^2 = %g exceeds TT EE = %g (no "
                      "Gaussian field has such a correlation)", l, te[l] * te[l], tt[l] * ee[l]);
    }
    double *one = malloc(((size_t)lmax + 1) * sizeof *one);
    if (!one)
        CLEF_FAIL(CLEF_ENOMEM, "no memory for the simulation");
    for (int l = 0; l <= lmax; l++)
        one[l] = 1.0;
    int status = sim_alm_family(lmax, one, seed, CLEF_SIM_STREAM_SKY, at);
    if (status == CLEF_OK)
        status = sim_alm_family(lmax, one, seed, CLEF_SIM_STREAM_SKY_E, ae);
    if (status == CLEF_OK)
        status = sim_alm_family(lmax, one, seed, CLEF_SIM_STREAM_SKY_B, ab);
    free(one);
    CLEF_TRY(status);
    for (int m = 0; m <= lmax; m++)
        for (int l = m; l <= lmax; l++) {
            const size_t i = clef_alm_index(lmax, l, m);
            const double complex g1 = at[i], g2 = ae[i], g3 = ab[i];
            const double st = sqrt(tt[l]);
            const double r = st > 0 ? te[l] / st : 0.0;
            const double rest = ee[l] - r * r;
            at[i] = st * g1;
            ae[i] = r * g1 + sqrt(rest > 0 ? rest : 0.0) * g2;
            ab[i] = l >= 2 ? sqrt(bb[l]) * g3 : 0.0;
            if (l < 2)
                ae[i] = 0.0;
        }
    return CLEF_OK;
}
