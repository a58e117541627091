/* Binary masks: from maps by threshold, latitude cuts, discs and source
 * holes; moments and the mask power spectrum. */
#define _XOPEN_SOURCE 700
#include "clef/mask.h"
#include "clef/sht.h"

#include <complex.h>
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "mask_impl.h"

#define DEG (M_PI / 180.0)

int clef_mask_full(clef_map **out, int64_t nside)
{
    *out = NULL;
    if (!clef_nside_valid(nside))
        CLEF_FAIL(CLEF_EINVAL, "mask nside %lld is not a power of two in [1, %d]",
                  (long long)nside, CLEF_NSIDE_MAX);
    clef_map *m;
    CLEF_TRY(clef_map_alloc(&m, nside));
    for (int64_t p = 0; p < m->npix; p++)
        m->pix[p] = 1.0;
    *out = m;
    return CLEF_OK;
}

int clef_mask_binarize(clef_map **out, const clef_map *in, double threshold, int inclusive)
{
    *out = NULL;
    if (!isfinite(threshold))
        CLEF_FAIL(CLEF_EINVAL, "mask threshold %g is not a finite number", threshold);
    clef_map *m;
    CLEF_TRY(clef_map_alloc(&m, in->nside));
    memcpy(m->coordsys, in->coordsys, sizeof m->coordsys);
    for (int64_t p = 0; p < m->npix; p++) {
        const double v = in->pix[p];
        /* NaN compares false both ways, so it lands on 0. */
        const int on = in->valid[p] && (inclusive ? v >= threshold : v > threshold);
        m->pix[p] = on ? 1.0 : 0.0;
    }
    *out = m;
    return CLEF_OK;
}

/* Invalid pixels of a mask count as masked; make that explicit so every
 * mask produced here is fully valid. */
static void mask_normalise(clef_map *mask)
{
    if (mask->nmissing == 0)
        return;
    for (int64_t p = 0; p < mask->npix; p++) {
        if (!mask->valid[p]) {
            mask->pix[p] = 0.0;
            mask->valid[p] = 1;
        }
    }
    mask->nmissing = 0;
    mask->nbad = 0;
}

int clef_mask_cut_latitude(clef_map *mask, double b_cut)
{
    if (!(b_cut >= 0.0 && b_cut <= M_PI / 2))
        CLEF_FAIL(CLEF_EINVAL, "latitude cut %g deg is not in [0, 90]", b_cut / DEG);
    mask_normalise(mask);
    /* |lat| < b_cut  <=>  |z| < sin(b_cut), z = cos(theta) = sin(lat). */
    const double zc = sin(b_cut);
    for (int64_t i = 1; i < 4 * mask->nside; i++) {
        mask_ring r;
        mask_ring_info(mask->nside, i, &r);
        if (fabs(r.z) < zc)
            for (int64_t j = 0; j < r.n; j++)
                mask->pix[r.first + j] = 0.0;
    }
    return CLEF_OK;
}

static int check_disc(double lon, double lat, double radius)
{
    if (!isfinite(lon))
        CLEF_FAIL(CLEF_EINVAL, "disc longitude %g is not a finite number", lon);
    if (!(lat >= -M_PI / 2 && lat <= M_PI / 2))
        CLEF_FAIL(CLEF_EINVAL, "disc latitude %g deg is not in [-90, 90]", lat / DEG);
    if (!(radius > 0.0 && radius <= M_PI))
        CLEF_FAIL(CLEF_EINVAL, "disc radius %g deg is not in (0, 180]", radius / DEG);
    return CLEF_OK;
}

/* Ranges of the disc; *ranges is malloc'ed with room for every ring. */
static int disc_ranges(int64_t nside, double lon, double lat, double radius,
                       mask_range **ranges, size_t *n)
{
    *ranges = NULL;
    CLEF_TRY(check_disc(lon, lat, radius));
    mask_range *r = malloc(sizeof *r * (size_t)(2 * (4 * nside - 1)));
    if (!r)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for a disc query at nside %lld", (long long)nside);
    /* Any finite longitude: reduce it to [0, 2 pi) so index arithmetic
     * on the ring stays small. */
    double phi = fmod(lon, 2 * M_PI);
    if (phi < 0)
        phi += 2 * M_PI;
    *n = mask_disc_ranges(nside, M_PI / 2 - lat, phi, radius, r);
    *ranges = r;
    return CLEF_OK;
}

int clef_mask_cut_disc(clef_map *mask, double lon, double lat, double radius)
{
    mask_range *r;
    size_t n;
    CLEF_TRY(disc_ranges(mask->nside, lon, lat, radius, &r, &n));
    mask_normalise(mask);
    for (size_t k = 0; k < n; k++)
        for (int64_t p = r[k].lo; p <= r[k].hi; p++)
            mask->pix[p] = 0.0;
    free(r);
    return CLEF_OK;
}

int clef_mask_keep_disc(clef_map *mask, double lon, double lat, double radius)
{
    mask_range *r;
    size_t n;
    CLEF_TRY(disc_ranges(mask->nside, lon, lat, radius, &r, &n));
    mask_normalise(mask);
    /* Ranges come in increasing index order: zero the gaps between them. */
    int64_t next = 0;
    for (size_t k = 0; k < n; k++) {
        for (int64_t p = next; p < r[k].lo; p++)
            mask->pix[p] = 0.0;
        next = r[k].hi + 1;
    }
    for (int64_t p = next; p < mask->npix; p++)
        mask->pix[p] = 0.0;
    free(r);
    return CLEF_OK;
}

int clef_mask_query_disc(int64_t nside, double lon, double lat, double radius, int64_t **pix,
                         size_t *npix)
{
    *pix = NULL;
    *npix = 0;
    if (!clef_nside_valid(nside))
        CLEF_FAIL(CLEF_EINVAL, "disc query nside %lld is not a power of two in [1, %d]",
                  (long long)nside, CLEF_NSIDE_MAX);
    mask_range *r;
    size_t n;
    CLEF_TRY(disc_ranges(nside, lon, lat, radius, &r, &n));
    size_t total = 0;
    for (size_t k = 0; k < n; k++)
        total += (size_t)(r[k].hi - r[k].lo + 1);
    if (total) {
        int64_t *out = malloc(sizeof *out * total);
        if (!out) {
            free(r);
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for %zu disc pixels", total);
        }
        size_t m = 0;
        for (size_t k = 0; k < n; k++)
            for (int64_t p = r[k].lo; p <= r[k].hi; p++)
                out[m++] = p;
        *pix = out;
        *npix = total;
    }
    free(r);
    return CLEF_OK;
}

/* Split one holes-file line (comment already stripped) into numbers: the
 * first three go to v.  Returns the number of fields (3 on success), or -1
 * with *bad pointing at the first field that is not a number. */
static int parse_hole_line(char *line, double v[3], char **bad)
{
    int nf = 0;
    char *save = NULL;
    for (char *tok = strtok_r(line, " \t\r\n", &save); tok;
         tok = strtok_r(NULL, " \t\r\n", &save)) {
        if (nf < 3) {
            char *end;
            errno = 0;
            const double x = strtod(tok, &end);
            if (errno || end == tok || *end || !isfinite(x)) {
                *bad = tok;
                return -1;
            }
            v[nf] = x;
        }
        nf++;
    }
    return nf;
}

int clef_mask_holes_read(const char *path, clef_mask_hole **holes, size_t *nholes)
{
    *holes = NULL;
    *nholes = 0;
    int status = CLEF_OK;
    clef_mask_hole *h = NULL;
    size_t n = 0, cap = 0;
    char *line = NULL;
    size_t linecap = 0;
    long lineno = 0;
    FILE *f = fopen(path, "r");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "cannot open holes file %s: %s", path, strerror(errno));
    for (;;) {
        errno = 0;
        if (getline(&line, &linecap, f) < 0)
            break;
        lineno++;
        char *hash = strchr(line, '#');
        if (hash)
            *hash = '\0';
        double v[3];
        char *bad = NULL;
        const int nf = parse_hole_line(line, v, &bad);
        if (nf == 0)
            continue;
        if (nf < 0) {
            status =
                clef_fail(CLEF_EFORMAT, "%s line %ld: '%s' is not a number", path, lineno, bad);
            goto fail;
        }
        if (nf != 3) {
            status = clef_fail(
                CLEF_EFORMAT,
                "%s line %ld: expected 3 columns (lon [deg] lat [deg] radius [arcmin]), found %d",
                path, lineno, nf);
            goto fail;
        }
        if (!(v[1] >= -90.0 && v[1] <= 90.0)) {
            status = clef_fail(CLEF_EFORMAT, "%s line %ld: latitude %g deg is not in [-90, 90]",
                               path, lineno, v[1]);
            goto fail;
        }
        if (!(v[2] > 0.0 && v[2] <= 10800.0)) {
            status = clef_fail(CLEF_EFORMAT, "%s line %ld: radius %g arcmin is not in (0, 10800]",
                               path, lineno, v[2]);
            goto fail;
        }
        if (n == cap) {
            cap = cap ? 2 * cap : 64;
            clef_mask_hole *t = realloc(h, sizeof *h * cap);
            if (!t) {
                status = clef_fail(CLEF_ENOMEM, "out of memory reading holes file %s", path);
                goto fail;
            }
            h = t;
        }
        h[n].lon = v[0] * DEG;
        h[n].lat = v[1] * DEG;
        h[n].radius = v[2] / 60.0 * DEG;
        n++;
    }
    if (ferror(f)) {
        status = clef_fail(CLEF_EIO, "error reading holes file %s after line %ld: %s", path,
                           lineno, strerror(errno ? errno : EIO));
        goto fail;
    }
    free(line);
    fclose(f);
    if (n == 0)
        clef_log(CLEF_LOG_WARN, "holes file %s lists no holes", path);
    *holes = h;
    *nholes = n;
    return CLEF_OK;
fail:
    free(line);
    free(h);
    fclose(f);
    return status;
}

int clef_mask_cut_holes(clef_map *mask, const clef_mask_hole *holes, size_t nholes)
{
    for (size_t k = 0; k < nholes; k++)
        CLEF_TRY(clef_mask_cut_disc(mask, holes[k].lon, holes[k].lat, holes[k].radius));
    return CLEF_OK;
}

int clef_mask_moments_compute(const clef_map *mask, clef_mask_moments *out)
{
    memset(out, 0, sizeof *out);
    double s1 = 0, s2 = 0, s4 = 0;
    int64_t nobs = 0;
    for (int64_t p = 0; p < mask->npix; p++) {
        if (!mask->valid[p])
            continue;
        const double w = mask->pix[p];
        if (!isfinite(w))
            CLEF_FAIL(CLEF_EINVAL, "mask pixel %lld holds %g", (long long)p, w);
        const double w2 = w * w;
        s1 += w;
        s2 += w2;
        s4 += w2 * w2;
        nobs += w > 0.0;
    }
    const double np = (double)mask->npix;
    out->nside = mask->nside;
    out->nobserved = nobs;
    out->fsky = (double)nobs / np;
    /* w_i = (1/4 pi) int w^i dOmega = mean over the equal-area pixels
     * (Hivon et al. 2002, ApJ 567, 2; METHODS.md section 4). */
    out->w1 = s1 / np;
    out->w2 = s2 / np;
    out->w4 = s4 / np;
    out->fsky_eff = out->w4 > 0.0 ? out->w2 * out->w2 / out->w4 : 0.0;
    return CLEF_OK;
}

int clef_mask_spectrum(const clef_sht *plan, const clef_map *mask, int iterations, double *wl)
{
    const int lmax = clef_sht_lmax(plan);
    if (clef_sht_nside(plan) != mask->nside)
        CLEF_FAIL(CLEF_EINVAL,
                  "mask spectrum: mask nside %lld differs from the transform plan's %lld",
                  (long long)mask->nside, (long long)clef_sht_nside(plan));
    if (clef_sht_mmax(plan) != lmax)
        CLEF_FAIL(CLEF_EINVAL, "mask spectrum: plan mmax %d differs from its lmax %d",
                  clef_sht_mmax(plan), lmax);
    if (iterations < 0)
        CLEF_FAIL(CLEF_EINVAL, "mask spectrum: iterations %d < 0", iterations);
    double complex *alm = malloc(sizeof *alm * clef_alm_size(lmax, lmax));
    if (!alm)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the mask a_lm at lmax %d", lmax);
    /* Invalid pixels already hold 0 (map.h), so the map is the weight. */
    const double *maps[1] = {mask->pix};
    double complex *alms[1] = {alm};
    int status = clef_sht_analysis(plan, 1, maps, alms, iterations);
    /* W_l = sum_m |w_lm|^2 / (2l + 1) (Hivon et al. 2002). */
    if (status == CLEF_OK)
        status = clef_alm_cl(lmax, lmax, alm, NULL, wl);
    free(alm);
    return status;
}

int clef_mask_spectrum_lmax(const clef_map *mask, int lmax, int iterations, double *wl)
{
    if (lmax < 1)
        CLEF_FAIL(CLEF_EINVAL, "mask spectrum: lmax %d < 1", lmax);
    clef_sht *plan;
    CLEF_TRY(clef_sht_create(&plan, mask->nside, lmax, NULL));
    const int status = clef_mask_spectrum(plan, mask, iterations, wl);
    clef_sht_destroy(plan);
    return status;
}
