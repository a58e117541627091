/* Mask spectra in the cache folder.  With a cached coupling operator the
 * masks' transforms would be the only mask work left in a nightly rerun;
 * keyed by the weights themselves (mask times the map's validity), they are
 * skipped too, and the rerun costs about one analysis of the map. */
#include <stdint.h>
#include <string.h>

#include "cache_impl.h"
#include "clef/hash.h"
#include "core_impl.h"
#include "spectrum_deproj.h"
#include "spectrum_impl.h"

void clef_spectrum_mask_key(int64_t nside, int lmax_t, int iterations, const double *w2,
                            const double *w1, char hex[65])
{
    clef_sha256 h;
    unsigned char d[CLEF_SHA256_BYTES];
    const int64_t v[4] = {nside, lmax_t, iterations, w2 != NULL};
    const size_t npix = (size_t)(12 * nside * nside);
    clef_sha256_init(&h);
    clef_sha256_update(&h, "clef mask spectra", 18);
    clef_sha256_update(&h, CLEF_VERSION, sizeof CLEF_VERSION);
    clef_sha256_update(&h, v, sizeof v);
    clef_sha256_update(&h, w1, npix * sizeof *w1);
    if (w2)
        clef_sha256_update(&h, w2, npix * sizeof *w2);
    clef_sha256_final(&h, d);
    clef_sha256_hex(d, hex);
}

/* Load (store = 0; 1 on a hit) or save (store = 1) a rows x cols payload of
 * one kind in the cache folder; problems are warnings, never errors. */
static int cache_io(const clef_spectrum_opts *o, int kind, const char *what, const char *key,
                    size_t rows, size_t cols, double *data, int store)
{
    char dir[4096], path[4096 + 160];
    const char *why = clef_cache_resolve_dir(o->cache_dir, dir, sizeof dir);
    if (why) {
        if (store)
            clef_log(CLEF_LOG_WARN, "%s not cached: %s", what, why);
        return 0;
    }
    if (!clef_cache_path(path, sizeof path, dir, kind, key))
        return 0;
    if (store) {
        clef_cache_store(dir, path, kind, key, rows, cols, data);
        return 0;
    }
    return clef_cache_load(path, kind, key, rows, cols, data);
}

int clef_spectrum_mask_cache(const clef_spectrum_opts *o, const char *key, int lmax_t,
                             int rows, double *wl, int store)
{
    return cache_io(o, CLEF_CACHE_MASK_SPECTRA, "mask spectra", key, (size_t)rows,
                    (size_t)lmax_t + 1, wl, store);
}

void clef_spectrum_kernel_key(int64_t nside, int lmax_t, int iterations,
                              const unsigned char *const sha[4], char hex[65])
{
    /* W[u, v] = W[v, u] and u = w_x w_y = w_y w_x: the weights' digests
     * ordered within each product, then the products, so that the key does
     * not depend on the order in which a run numbered its weights. */
    const unsigned char *d4[4] = {sha[0], sha[1], sha[2], sha[3]};
    for (int p = 0; p < 4; p += 2)
        if (memcmp(d4[p], d4[p + 1], 32) > 0) {
            const unsigned char *t = d4[p];
            d4[p] = d4[p + 1];
            d4[p + 1] = t;
        }
    const int c = memcmp(d4[0], d4[2], 32);
    if (c > 0 || (c == 0 && memcmp(d4[1], d4[3], 32) > 0)) {
        const unsigned char *t0 = d4[0], *t1 = d4[1];
        d4[0] = d4[2];
        d4[1] = d4[3];
        d4[2] = t0;
        d4[3] = t1;
    }
    clef_sha256 h;
    unsigned char d[CLEF_SHA256_BYTES];
    const int64_t v[3] = {nside, lmax_t, iterations};
    clef_sha256_init(&h);
    clef_sha256_update(&h, "clef kernel spectrum", 21);
    clef_sha256_update(&h, CLEF_VERSION, sizeof CLEF_VERSION);
    clef_sha256_update(&h, v, sizeof v);
    for (int k = 0; k < 4; k++)
        clef_sha256_update(&h, d4[k], 32);
    clef_sha256_final(&h, d);
    clef_sha256_hex(d, hex);
}

void clef_spectrum_deproj_key(const char *mask_key, const int nf[2], int lp, int iterations,
                              char hex[65])
{
    clef_sha256 h;
    unsigned char d[CLEF_SHA256_BYTES];
    const int64_t v[4] = {nf[0], nf[1], lp, iterations};
    const double lv[2] = {CLEF_DEPROJ_LEVEL, CLEF_DEPROJ_LMAX_MAX};
    clef_sha256_init(&h);
    clef_sha256_update(&h, "clef deprojection", 18);
    clef_sha256_update(&h, CLEF_VERSION, sizeof CLEF_VERSION);
    clef_sha256_update(&h, mask_key, 64);
    clef_sha256_update(&h, v, sizeof v);
    clef_sha256_update(&h, lv, sizeof lv);
    clef_sha256_final(&h, d);
    clef_sha256_hex(d, hex);
}

int clef_spectrum_deproj_cache(const clef_spectrum_opts *o, const char *key, size_t n,
                               double *payload, int store)
{
    return cache_io(o, CLEF_CACHE_DEPROJ, "deprojection correction", key, 1, n, payload, store);
}
