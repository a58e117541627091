/* HEALPix maps in memory: allocation, copies, statistics of the valid
 * pixels, and the map/mask compatibility check.  FITS reading and writing
 * are in map_fits.c and map_write.c. */
#include "map_impl.h"

#include <ctype.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

int64_t clef_nside_npix(int64_t nside) { return 12 * nside * nside; }

int clef_nside_valid(int64_t nside)
{
    return nside >= 1 && nside <= CLEF_NSIDE_MAX && (nside & (nside - 1)) == 0;
}

int clef_map_alloc(clef_map **out, int64_t nside)
{
    *out = NULL;
    if (!clef_nside_valid(nside))
        CLEF_FAIL(CLEF_EINVAL, "nside %lld is not a power of two in [1, %d]", (long long)nside,
                  CLEF_NSIDE_MAX);
    clef_map *m = calloc(1, sizeof *m);
    if (!m)
        CLEF_FAIL(CLEF_ENOMEM, "cannot allocate a map header");
    m->nside = nside;
    m->npix = clef_nside_npix(nside);
    m->pix = clef_alloc_large((size_t)m->npix * sizeof *m->pix);
    m->valid = clef_alloc_large((size_t)m->npix);
    if (!m->pix || !m->valid) {
        clef_map_free(m);
        CLEF_FAIL(CLEF_ENOMEM, "cannot allocate a map of nside %lld (%lld pixels, %.3g GB)",
                  (long long)nside, (long long)clef_nside_npix(nside),
                  1e-9 * (double)clef_nside_npix(nside) * (sizeof(double) + 1));
    }
    memset(m->pix, 0, (size_t)m->npix * sizeof *m->pix);
    memset(m->valid, 1, (size_t)m->npix);
    m->file_ordering = CLEF_RING;
    *out = m;
    return CLEF_OK;
}

int clef_map_copy(clef_map **out, const clef_map *m)
{
    *out = NULL;
    if (!m)
        CLEF_FAIL(CLEF_EINVAL, "clef_map_copy: map is NULL");
    clef_map *c;
    CLEF_TRY(clef_map_alloc(&c, m->nside));
    double *pix = c->pix;
    unsigned char *valid = c->valid;
    *c = *m;
    c->pix = pix;
    c->valid = valid;
    memcpy(c->pix, m->pix, (size_t)m->npix * sizeof *m->pix);
    memcpy(c->valid, m->valid, (size_t)m->npix);
    *out = c;
    return CLEF_OK;
}

void clef_map_release_pixels(clef_map *m)
{
    if (!m)
        return;
    free(m->pix);
    free(m->valid);
    m->pix = NULL;
    m->valid = NULL;
}

void clef_map_free(clef_map *m)
{
    if (!m)
        return;
    free(m->pix);
    free(m->valid);
    free(m);
}

/* Two passes (mean, then squared deviations) so the standard deviation of
 * a map with a large offset keeps its digits; stddev divides by nvalid
 * (population convention, as numpy's default). */
int clef_map_stats_compute(const clef_map *m, clef_map_stats *st)
{
    if (!m || !st)
        CLEF_FAIL(CLEF_EINVAL, "clef_map_stats_compute: NULL argument");
    memset(st, 0, sizeof *st);
    int64_t n = 0;
    double sum = 0.0, sum2 = 0.0, lo = INFINITY, hi = -INFINITY;
#pragma omp parallel for reduction(+ : n, sum, sum2) reduction(min : lo) reduction(max : hi)
    for (int64_t p = 0; p < m->npix; p++) {
        if (!m->valid[p])
            continue;
        const double v = m->pix[p];
        n++;
        sum += v;
        sum2 += v * v;
        lo = v < lo ? v : lo;
        hi = v > hi ? v : hi;
    }
    st->nvalid = n;
    st->nmissing = m->npix - n;
    st->fsky = (double)n / (double)m->npix;
    if (n == 0) {
        st->min = st->max = st->mean = st->rms = st->stddev = NAN;
        return CLEF_OK;
    }
    const double mean = sum / (double)n;
    double dev2 = 0.0;
#pragma omp parallel for reduction(+ : dev2)
    for (int64_t p = 0; p < m->npix; p++) {
        if (m->valid[p]) {
            const double d = m->pix[p] - mean;
            dev2 += d * d;
        }
    }
    st->min = lo;
    st->max = hi;
    st->mean = mean;
    st->rms = sqrt(sum2 / (double)n);
    st->stddev = sqrt(dev2 / (double)n);
    return CLEF_OK;
}

int clef_map_check_mask(const clef_map *map, const char *map_name, const clef_map *mask,
                        const char *mask_name, int allow_coord_mismatch)
{
    const char *mn = map_name ? map_name : "the map";
    const char *kn = mask_name ? mask_name : "the mask";
    if (!map || !mask)
        CLEF_FAIL(CLEF_EINVAL, "clef_map_check_mask: NULL map or mask");
    if (map->nside != mask->nside)
        CLEF_FAIL(CLEF_EINVAL,
                  "nside mismatch: map '%s' has nside %lld but mask '%s' has nside %lld",
                  mn, (long long)map->nside, kn, (long long)mask->nside);
    if (map->coordsys[0] && mask->coordsys[0] && strcmp(map->coordsys, mask->coordsys) != 0) {
        if (!allow_coord_mismatch)
            CLEF_FAIL(CLEF_EINVAL,
                      "coordinate systems differ: map '%s' has COORDSYS '%s' but mask '%s' "
                      "has COORDSYS '%s'",
                      mn, map->coordsys, kn, mask->coordsys);
        clef_log(CLEF_LOG_WARN,
                 "map '%s' (COORDSYS '%s') and mask '%s' (COORDSYS '%s') differ; "
                 "used together as asked",
                 mn, map->coordsys, kn, mask->coordsys);
    }
    /* A weight outside [0, 1] is almost always a wrong file (a map given as
     * the mask, or a hit-count map); refusing is safer than clipping. */
    for (int64_t p = 0; p < mask->npix; p++) {
        if (!mask->valid[p])
            continue;
        const double w = mask->pix[p];
        if (!(w >= 0.0 && w <= 1.0))
            CLEF_FAIL(CLEF_EINVAL,
                      "mask '%s' has value %.9g at RING pixel %lld; mask values must lie "
                      "in [0, 1]",
                      kn, w, (long long)p);
    }
    return CLEF_OK;
}

double clef_unit_to_uk(const char *unit)
{
    if (!unit)
        return 0;
    char u[64];
    size_t n = 0;
    for (const char *c = unit; *c && n + 1 < sizeof u; c++)
        if (*c != ' ' && *c != '\t')
            u[n++] = (char)tolower((unsigned char)*c);
    u[n] = '\0';
    /* Drop a CMB qualifier: "K_CMB", "Kcmb", "uK_CMB" name thermodynamic
     * temperature units, which is what band powers in uK^2 are in. */
    const char *suffix[] = {"_cmb", "cmb", "-cmb"};
    for (int i = 0; i < 3; i++) {
        size_t ls = strlen(suffix[i]);
        if (n > ls && !strcmp(u + n - ls, suffix[i])) {
            u[n - ls] = '\0';
            break;
        }
    }
    if (!strcmp(u, "k"))
        return 1e6;
    if (!strcmp(u, "mk"))
        return 1e3;
    if (!strcmp(u, "uk") || !strcmp(u, "muk") || !strcmp(u, "microk") || !strcmp(u, "\xc2\xb5k"))
        return 1;
    return 0;
}
