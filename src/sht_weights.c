/* Ring quadrature weights for analysis.
 *
 * The pixel sum Omega_pix sum_p f(p) integrates exactly only functions
 * whose zonal (m = 0) part is handled exactly by the ring latitudes, which
 * HEALPix rings do not do (METHODS.md section 2).  We give every ring a
 * weight w_r = 1 + u_r, equal for the north and south ring of a pair, and
 * choose the smallest correction u (minimum Euclidean norm) such that the
 * weighted ring sums integrate the even Legendre polynomials exactly:
 *
 *   Omega_pix sum_r w_r n_r P_l(z_r) = 4 pi delta_{l0},  l = 0, 2, ..., L_w,
 *
 * (odd l integrate to zero by the north/south symmetry).  With 2 nside
 * pairs we take L_w = 4 nside - 2, i.e. as many equations as unknowns; the
 * minimum-norm least-squares solution comes from LAPACK dgels (LQ
 * factorisation), so a rank-deficient or inconsistent system still gives
 * the least-squares weights.  Cost O(nside^3) (3 s at nside 2048), so the
 * weights of a geometry are solved once: kept in memory for the process
 * and, when the caller asks, in the cache folder (cache_impl.h), keyed by
 * a SHA-256 of everything they depend on (nside, the number of
 * equations, the rings' z and pixel counts, the clef version).
 * Reference for the idea of latitude weights that make ring sums exact for
 * zonal harmonics: common practice in HEALPix-based codes [C]; the
 * minimum-norm formulation here is ours.
 */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include <lapacke.h>

#include "cache_impl.h"
#include "clef/hash.h"
#include "core_impl.h"
#include "sht_impl.h"

static int n_equations(const clef_sht *p)
{
    const int np = p->npairs;
    const int lw = 7 * (int)p->nside / 2;
    return lw / 2 + 1 < np - 1 ? lw / 2 + 1 : (np > 1 ? np - 1 : 1);
}

/* Weight corrections u per pair (npairs values) by least squares. */
static int solve_weights(const clef_sht *p, double *u)
{
    const int np = p->npairs;
    const int neq = n_equations(p);
    const size_t ldb = (size_t)(neq > np ? neq : np);
    double *a = malloc((size_t)neq * (size_t)np * sizeof *a);
    double *b = calloc(ldb, sizeof *b);
    if (!a || !b) {
        free(a);
        free(b);
        CLEF_FAIL(CLEF_ENOMEM, "sht: no memory for the ring-weight system (%d x %d)", neq, np);
    }
    for (int q = 0; q < np; q++) {
        const int r = q;
        const double npair = (q == np - 1 ? 1.0 : 2.0) * p->ring_npix[r];
        const double z = p->ring_z[r];
        /* Bonnet: l P_l = (2l - 1) z P_{l-1} - (l - 1) P_{l-2}. */
        double p0 = 1.0, p1 = z;
        a[q] = npair;
        for (int l = 2, k = 1; k < neq; l++) {
            const double p2 = ((2.0 * l - 1.0) * z * p1 - (l - 1.0) * p0) / l;
            p0 = p1;
            p1 = p2;
            if (!(l & 1))
                a[(size_t)k++ * np + q] = npair * p2;
        }
    }
    /* Right-hand side for u: -(A 1) for l > 0; l = 0 is already exact. */
    for (int k = 1; k < neq; k++) {
        double s = 0.0;
        for (int q = 0; q < np; q++)
            s += a[(size_t)k * np + q];
        b[k] = -s;
    }
    const lapack_int info = LAPACKE_dgels(LAPACK_ROW_MAJOR, 'N', neq, np, 1, a, np, b, 1);
    free(a);
    if (info != 0) {
        free(b);
        CLEF_FAIL(CLEF_ENUMERIC, "sht: ring-weight least squares failed (LAPACK dgels info = %d)",
                  (int)info);
    }
    memcpy(u, b, (size_t)np * sizeof *u);
    free(b);
    return CLEF_OK;
}

static void weights_key(const clef_sht *p, char hex[65])
{
    clef_sha256 h;
    unsigned char d[CLEF_SHA256_BYTES];
    const int64_t v[3] = {p->nside, p->npairs, n_equations(p)};
    clef_sha256_init(&h);
    clef_sha256_update(&h, "clef ring weights", sizeof "clef ring weights");
    clef_sha256_update(&h, CLEF_VERSION, sizeof CLEF_VERSION);
    clef_sha256_update(&h, v, sizeof v);
    clef_sha256_update(&h, p->ring_z, (size_t)p->npairs * sizeof *p->ring_z);
    clef_sha256_update(&h, p->ring_npix, (size_t)p->npairs * sizeof *p->ring_npix);
    clef_sha256_final(&h, d);
    clef_sha256_hex(d, hex);
}

/* The process's memory cache: a few geometries (a run uses one or two). */
#define MEM_SLOTS 8
static struct {
    char key[65];
    int np;
    double *u;
} mem[MEM_SLOTS];
static int mem_next;

static int mem_get(const char *key, int np, double *u)
{
    int hit = 0;
#pragma omp critical(clef_ring_weights)
    for (int i = 0; i < MEM_SLOTS && !hit; i++)
        if (mem[i].u && mem[i].np == np && !strcmp(mem[i].key, key)) {
            memcpy(u, mem[i].u, (size_t)np * sizeof *u);
            hit = 1;
        }
    return hit;
}

static void mem_put(const char *key, int np, const double *u)
{
    double *c = malloc((size_t)np * sizeof *c);
    if (!c)
        return; /* only a cache */
    memcpy(c, u, (size_t)np * sizeof *c);
#pragma omp critical(clef_ring_weights)
    {
        const int i = mem_next;
        mem_next = (mem_next + 1) % MEM_SLOTS;
        free(mem[i].u);
        memcpy(mem[i].key, key, sizeof mem[i].key);
        mem[i].np = np;
        mem[i].u = c;
    }
}

/* Below this nside the solve takes well under a millisecond: no cache file. */
#define FILE_NSIDE_MIN 64

int clef_sht_ring_weights(const clef_sht *p, int use_cache, const char *cache_dir, double *w)
{
    const int np = p->npairs;
    double *u = malloc((size_t)np * sizeof *u);
    if (!u)
        CLEF_FAIL(CLEF_ENOMEM, "sht: no memory for the ring weights (%d pairs)", np);
    char key[65], dir[4096], path[4096 + 160];
    weights_key(p, key);
    int have_path = 0, status = CLEF_OK;
    if (use_cache && p->nside >= FILE_NSIDE_MIN) {
        const char *why = clef_cache_resolve_dir(cache_dir, dir, sizeof dir);
        if (!why && !clef_cache_path(path, sizeof path, dir, CLEF_CACHE_RING_WEIGHTS, key))
            why = "path too long";
        if (why)
            clef_log(CLEF_LOG_WARN, "ring-weight cache: disabled: %s", why);
        have_path = why == NULL;
    }
    if (mem_get(key, np, u)) {
        clef_log(CLEF_LOG_DEBUG, "sht: ring weights of nside %lld from memory", (long long)p->nside);
    } else if (have_path && clef_cache_load(path, CLEF_CACHE_RING_WEIGHTS, key, 1, (size_t)np, u)) {
        mem_put(key, np, u);
    } else {
        status = solve_weights(p, u);
        if (status == CLEF_OK) {
            mem_put(key, np, u);
            if (have_path)
                clef_cache_store(dir, path, CLEF_CACHE_RING_WEIGHTS, key, 1, (size_t)np, u);
        }
    }
    if (status == CLEF_OK)
        for (int q = 0; q < np; q++) {
            w[q] = 1.0 + u[q];
            w[p->nrings - 1 - q] = 1.0 + u[q];
        }
    free(u);
    return status;
}
