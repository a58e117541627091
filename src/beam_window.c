/* The HEALPix pixel window, computed from its definition, and its caches.
 *
 * Definition (Gorski et al. 2005, ApJ 622, 759; HEALPix documentation): a
 * pixel value is the mean of the sky over the pixel, so the pixel p
 * multiplies a_lm by w_lm(p) = Omega_pix^-1 int_p Y*_lm dOmega and
 *   w_l(p)^2 = 4 pi/(2l+1) sum_m |w_lm(p)|^2,   p_l^2 = mean_p w_l(p)^2.
 *
 * Method (docs/simulation.md):
 * - The pixel integral is the mean over the pixel's k^2 NESTED children at
 *   k nside (equal-area cells, a midpoint rule with error O(k^-2)); two
 *   passes, k and 2k, are Richardson-extrapolated: (4 W(2k) - W(k)) / 3.
 * - By the addition theorem, sum_m Y_lm(a) Y*_lm(b) = (2l+1)/(4 pi)
 *   P_l(a.b), so w_l(p)^2 = n^-2 sum_{a,b} P_l(a.b) over the n sub-samples:
 *   one Legendre recurrence in l per pair of sub-samples (cost n^2 L / 2,
 *   cheaper than an m-sum for k^3 < L).  The pair sums run in a kernel
 *   per vector width (beam_window_body.h, chosen like the transforms'
 *   kernels, include/clef/kernel.h) with blocks of pairs held in
 *   registers: 4.7x faster than the former SSE2 array loop at nside 256
 *   (one thread; the same to 1.6e-15 relative).
 * - Symmetry: the north and south halves mirror, every ring has four-fold
 *   symmetry in phi, and the tiling is symmetric about phi = pi/4, so only
 *   the first half-quadrant of each northern ring is needed.  Belt rings
 *   (nside < i <= 2 nside) hold congruent pixels: one pixel each.  Rings
 *   i <= nside do not: their pixels change shape along the ring.
 * - Subset for large nside: the cap rings [1, nside] and the belt rings
 *   [nside+1, 2 nside] are two segments; a segment with more than `rings`
 *   rings is evaluated on `rings` evenly spaced node rings and the ring
 *   means are interpolated linearly in between (the pixel shapes vary
 *   smoothly with latitude within a segment).  A cap ring with more than
 *   `per_ring` distinct pixels is evaluated on `per_ring` evenly spaced
 *   pixels, interpolated linearly along the ring.
 */
#define _GNU_SOURCE
#include <errno.h>
#include <math.h>
#include <omp.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

#include <chealpix.h>

#include "clef/beam.h"
#include "beam_impl.h"
#include "clef/kernel.h"
#include "core_impl.h"

#define PIXEL_WINDOW_NSIDE_MAX 8192

/* One pixel to evaluate: its NESTED index, the ring node it belongs to,
 * and its weight within that ring's mean. */
typedef struct pixel_window_task {
    int64_t nest;
    int node;
    double weight;
} pixel_window_task;

/* Per-thread scratch for pair sums. */
typedef struct pair_scratch {
    double *vec; /* 3 n sub-sample unit vectors */
    double *x;   /* n (n-1)/2 pair cosines */
    double *sum; /* lmax + 1 */
    double *acc; /* CLEF_PIXEL_WINDOW_LANES (lmax + 1), the kernel's lane sums */
    clef_pixel_window_pairs_fn *pairs;
} pair_scratch;

/* Legendre recurrence coefficients (Bonnet): P_l = a_l x P_{l-1} - b_l P_{l-2}. */
static void legendre_coeffs(int lmax, double *a, double *b)
{
    for (int l = 2; l <= lmax; l++) {
        a[l] = (2.0 * l - 1.0) / l;
        b[l] = (l - 1.0) / l;
    }
}

/* w_l(p)^2, l = 0..lmax, from the k^2 sub-samples of NESTED pixel `nest`. */
static void pixel_window_sq(int64_t nside, int64_t nest, int k, int lmax, const double *ca,
                            const double *cb, pair_scratch *s, double *w2)
{
    const int n = k * k;
    for (int c = 0; c < n; c++)
        pix2vec_nest64(nside * k, nest * n + c, s->vec + 3 * c);
    size_t np = 0;
    for (int a = 0; a < n; a++) {
        const double *va = s->vec + 3 * a;
        for (int b = a + 1; b < n; b++) {
            const double *vb = s->vec + 3 * b;
            s->x[np++] = va[0] * vb[0] + va[1] * vb[1] + va[2] * vb[2];
        }
    }
    memset(s->sum, 0, sizeof(double) * ((size_t)lmax + 1));
    double acc = 0;
    for (size_t j = 0; j < np; j++)
        acc += s->x[j];
    s->sum[0] = (double)np;
    if (lmax >= 1)
        s->sum[1] = acc;
    if (lmax >= 2)
        s->pairs(s->x, np, lmax, ca, cb, s->acc, s->sum);
    /* The n diagonal pairs contribute P_l(1) = 1 each; off-diagonal twice. */
    const double inv = 1.0 / ((double)n * n);
    for (int l = 0; l <= lmax; l++)
        w2[l] = (n + 2.0 * s->sum[l]) * inv;
}

/* Node rings of the segment [a, b]: all when it has at most r rings, else r
 * evenly spaced ones including both ends.  Returns the count. */
static int segment_nodes(int64_t a, int64_t b, int r, int64_t *out)
{
    const int64_t n = b - a + 1;
    if (n <= r) {
        for (int64_t i = 0; i < n; i++)
            out[i] = a + i;
        return (int)n;
    }
    for (int t = 0; t < r; t++)
        out[t] = a + (int64_t)llround((double)t * (double)(n - 1) / (r - 1));
    return r;
}

/* First RING index of northern ring i (Gorski et al. 2005; METHODS.md 1). */
static int64_t ring_start(int64_t nside, int64_t i)
{
    return i < nside ? 2 * i * (i - 1) : 2 * nside * (nside - 1) + 4 * nside * (i - nside);
}

/* Append the pixels representing ring i to tasks; the weights of one ring
 * sum to 1.  Returns the count, -1 when out of memory. */
static int ring_tasks(int64_t nside, int64_t i, int node, int per_ring, pixel_window_task *t)
{
    const int64_t start = ring_start(nside, i);
    if (i > nside) {
        int64_t nest;
        ring2nest64(nside, start, &nest);
        t[0] = (pixel_window_task){nest, node, 1.0};
        return 1;
    }
    /* Cap ring (and ring nside): i pixels per quadrant; j and i-1-j mirror,
     * so pixels j = 0..d-1 carry weight 2 (1 for the middle one of an odd
     * quadrant).  With more than per_ring of them, evaluate per_ring node
     * pixels and share each pixel's weight between its two neighbouring
     * nodes linearly (linear interpolation along the ring). */
    const int64_t q = i, d = (q + 1) / 2;
    int64_t *jn = malloc(sizeof(int64_t) * (size_t)per_ring);
    if (!jn)
        return -1;
    const int nn = segment_nodes(0, d - 1, per_ring, jn);
    for (int a = 0; a < nn; a++)
        t[a] = (pixel_window_task){0, node, 0.0};
    int a = 0;
    for (int64_t j = 0; j < d; j++) {
        const double w = ((q % 2 == 1 && j == d - 1) ? 1.0 : 2.0) / (double)q;
        while (a + 1 < nn && jn[a + 1] <= j)
            a++;
        if (a + 1 < nn) {
            const double f = (double)(j - jn[a]) / (double)(jn[a + 1] - jn[a]);
            t[a].weight += (1.0 - f) * w;
            t[a + 1].weight += f * w;
        } else {
            t[a].weight += w;
        }
    }
    for (int b = 0; b < nn; b++)
        ring2nest64(nside, start + jn[b], &t[b].nest);
    free(jn);
    return nn;
}

static void scratch_free(pair_scratch *s)
{
    free(s->vec);
    free(s->x);
    free(s->sum);
    free(s->acc);
}

static int scratch_alloc(pair_scratch *s, int k, int lmax, clef_pixel_window_pairs_fn *pairs)
{
    s->pairs = pairs;
    const size_t n = (size_t)k * k;
    s->vec = malloc(sizeof(double) * 3 * n);
    s->x = malloc(sizeof(double) * (n * (n - 1) / 2 + 1));
    s->sum = malloc(sizeof(double) * ((size_t)lmax + 1));
    /* aligned_alloc wants a multiple of the alignment: 8 lanes x 8 bytes. */
    s->acc = aligned_alloc(64, sizeof(double) * CLEF_PIXEL_WINDOW_LANES * ((size_t)lmax + 1));
    if (!s->vec || !s->x || !s->sum || !s->acc) {
        scratch_free(s);
        return CLEF_ENOMEM;
    }
    return CLEF_OK;
}

/* Evaluate all tasks: res[t][l] = Richardson-extrapolated w_l^2. */
static int run_tasks(int64_t nside, int lmax, int k, const pixel_window_task *tasks, int ntasks,
                     double *res)
{
    double *ca = calloc((size_t)lmax + 2, sizeof(double));
    double *cb = calloc((size_t)lmax + 2, sizeof(double));
    if (!ca || !cb) {
        free(ca);
        free(cb);
        CLEF_FAIL(CLEF_ENOMEM, "no memory for pixel window coefficients (lmax %d)", lmax);
    }
    legendre_coeffs(lmax, ca, cb);
    /* The pair sums run on the widest kernel the CPU has (or CLEF_KERNEL). */
    clef_kernel kid;
    const int ks = clef_kernel_resolve(CLEF_KERNEL_AUTO, &kid);
    if (ks != CLEF_OK) { /* the message is set */
        free(ca);
        free(cb);
        return ks;
    }
    clef_pixel_window_pairs_fn *pairs = kid == CLEF_KERNEL_AVX512 ? clef_pixel_window_pairs_avx512
                                  : kid == CLEF_KERNEL_AVX2 ? clef_pixel_window_pairs_avx2
                                                            : clef_pixel_window_pairs_base;
    int failed = 0, done = 0;
#pragma omp parallel
    {
        pair_scratch s = {0};
        double *coarse = malloc(sizeof(double) * ((size_t)lmax + 1));
        int ok = coarse && scratch_alloc(&s, 2 * k, lmax, pairs) == CLEF_OK;
        if (!ok) {
#pragma omp atomic write
            failed = 1;
        }
#pragma omp for schedule(dynamic, 1)
        for (int t = 0; t < ntasks; t++) {
            if (!ok)
                continue;
            double *fine = res + (size_t)t * ((size_t)lmax + 1);
            pixel_window_sq(nside, tasks[t].nest, k, lmax, ca, cb, &s, coarse);
            pixel_window_sq(nside, tasks[t].nest, 2 * k, lmax, ca, cb, &s, fine);
            /* Richardson: the sub-sample mean has error c k^-2 + O(k^-4). */
            for (int l = 0; l <= lmax; l++)
                fine[l] = (4.0 * fine[l] - coarse[l]) / 3.0;
            int d;
#pragma omp atomic capture
            d = ++done;
            if (omp_get_thread_num() == 0)
                clef_progress("pixel window", (double)d / ntasks);
        }
        free(coarse);
        scratch_free(&s);
    }
    free(ca);
    free(cb);
    if (failed)
        CLEF_FAIL(CLEF_ENOMEM, "no memory for pixel window scratch (sub-sampling %d)", 2 * k);
    clef_progress("pixel window", 1.0);
    return CLEF_OK;
}

static int nside_ok(int64_t nside)
{
    return nside >= 1 && nside <= PIXEL_WINDOW_NSIDE_MAX && (nside & (nside - 1)) == 0;
}

int clef_beam_pixel_window_compute(int64_t nside, int lmax, const clef_beam_pixel_window_opts *opts,
                             double *pl)
{
    if (!nside_ok(nside))
        CLEF_FAIL(CLEF_EINVAL, "pixel window: nside %lld is not a power of two in [1, %d]",
                  (long long)nside, PIXEL_WINDOW_NSIDE_MAX);
    if (lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "pixel window: lmax must be >= 0, got %d", lmax);
    int k = opts && opts->subsample ? opts->subsample : 8;
    int rings = opts && opts->rings ? opts->rings : 64;
    int per_ring = opts && opts->per_ring ? opts->per_ring : 16;
    if (k < 1 || k > 64 || (k & (k - 1)))
        CLEF_FAIL(CLEF_EINVAL, "pixel window: sub-sampling %d is not a power of two in [1, 64]", k);
    if (nside * 2 * k > ((int64_t)1 << 29))
        CLEF_FAIL(CLEF_EINVAL, "pixel window: nside %lld x sub-sampling %d is too fine",
                  (long long)nside, 2 * k);
    if (rings < 2 || per_ring < 1)
        CLEF_FAIL(CLEF_EINVAL, "pixel window: rings (%d) must be >= 2 and pixels per ring (%d) >= 1",
                  rings, per_ring);

    int status = CLEF_OK;
    int64_t *nodes = malloc(sizeof(int64_t) * 2 * (size_t)rings);
    pixel_window_task *tasks = NULL;
    double *res = NULL, *ring_mean = NULL;
    if (!nodes)
        CLEF_FAIL(CLEF_ENOMEM, "no memory for pixel window rings");
    const int ncap = segment_nodes(1, nside, rings, nodes);
    const int nnodes = ncap + segment_nodes(nside + 1, 2 * nside, rings, nodes + ncap);
    tasks = malloc(sizeof(pixel_window_task) * (size_t)nnodes * (size_t)per_ring);
    ring_mean = calloc((size_t)nnodes * ((size_t)lmax + 1), sizeof(double));
    if (!tasks || !ring_mean) {
        status = clef_fail(CLEF_ENOMEM, "no memory for pixel window tasks");
        goto fail;
    }
    int ntasks = 0;
    for (int t = 0; t < nnodes; t++) {
        const int nt = ring_tasks(nside, nodes[t], t, per_ring, tasks + ntasks);
        if (nt < 0) {
            status = clef_fail(CLEF_ENOMEM, "no memory for pixel window tasks");
            goto fail;
        }
        ntasks += nt;
    }
    res = malloc(sizeof(double) * (size_t)ntasks * ((size_t)lmax + 1));
    if (!res) {
        status = clef_fail(CLEF_ENOMEM, "no memory for pixel window results (%d pixels x lmax %d)",
                           ntasks, lmax);
        goto fail;
    }
    const double t0 = clef_wtime();
    CLEF_CHECK(run_tasks(nside, lmax, k, tasks, ntasks, res));
    /* Ring means, summed in task order so the result does not depend on
     * the thread count. */
    for (int t = 0; t < ntasks; t++) {
        double *m = ring_mean + (size_t)tasks[t].node * ((size_t)lmax + 1);
        const double *r = res + (size_t)t * ((size_t)lmax + 1);
        for (int l = 0; l <= lmax; l++)
            m[l] += tasks[t].weight * r[l];
    }
    /* p_l^2 = sum over rings of (pixels in ring) x (ring mean) / npix, with
     * ring means linearly interpolated between node rings of a segment;
     * northern rings count twice (mirror), the equator once. */
    const double npix = 12.0 * (double)nside * (double)nside;
    for (int l = 0; l <= lmax; l++)
        pl[l] = 0;
    for (int seg = 0; seg < 2; seg++) {
        const int first = seg == 0 ? 0 : ncap, count = seg == 0 ? ncap : nnodes - ncap;
        for (int t = 0; t < count; t++) {
            const int64_t ia = nodes[first + t];
            const int64_t ib = t + 1 < count ? nodes[first + t + 1] : ia + 1;
            const double *ma = ring_mean + (size_t)(first + t) * ((size_t)lmax + 1);
            const double *mb = t + 1 < count ? ma + lmax + 1 : ma;
            /* Rings ia <= i < ib (the last node alone). */
            for (int64_t i = ia; i < ib; i++) {
                const double f = (double)(i - ia) / (double)(ib - ia);
                const double npr = (double)(i < nside ? 4 * i : 4 * nside);
                const double w = npr * (i == 2 * nside ? 1.0 : 2.0) / npix;
                for (int l = 0; l <= lmax; l++)
                    pl[l] += w * ((1.0 - f) * ma[l] + f * mb[l]);
            }
        }
    }
    for (int l = 0; l <= lmax; l++)
        pl[l] = sqrt(pl[l] > 0 ? pl[l] : 0);
    clef_log(CLEF_LOG_DEBUG, "pixel window nside %lld lmax %d: %d pixels, k = %d/%d, %.2f s",
             (long long)nside, lmax, ntasks, k, 2 * k, clef_wtime() - t0);
fail:
    free(res);
    free(ring_mean);
    free(tasks);
    free(nodes);
    return status;
}

/* ---- caches ---- */

typedef struct pixel_window_entry {
    int64_t nside;
    int lmax;
    double *pl;
} pixel_window_entry;

static pthread_mutex_t cache_lock = PTHREAD_MUTEX_INITIALIZER;
static pixel_window_entry *cache;
static int ncache;

void clef_beam_pixel_window_cache_clear(void)
{
    pthread_mutex_lock(&cache_lock);
    for (int i = 0; i < ncache; i++)
        free(cache[i].pl);
    free(cache);
    cache = NULL;
    ncache = 0;
    pthread_mutex_unlock(&cache_lock);
}

/* The disk cache folder, or 0 when there is none. */
static int cache_dir(char *buf, size_t n)
{
    const char *env = getenv("CLEF_CACHE_DIR");
    if (env)
        return *env && snprintf(buf, n, "%s", env) < (int)n;
    const char *xdg = getenv("XDG_CACHE_HOME");
    if (xdg && *xdg)
        return snprintf(buf, n, "%s/clef", xdg) < (int)n;
    const char *home = getenv("HOME");
    if (home && *home)
        return snprintf(buf, n, "%s/.cache/clef", home) < (int)n;
    return 0;
}

/* mkdir -p */
static int make_dirs(char *path)
{
    for (char *p = path + 1; *p; p++) {
        if (*p != '/')
            continue;
        *p = '\0';
        const int r = mkdir(path, 0777);
        *p = '/';
        if (r != 0 && errno != EEXIST)
            return -1;
    }
    return mkdir(path, 0777) != 0 && errno != EEXIST ? -1 : 0;
}

#define PIXEL_WINDOW_CACHE_TAG "# clef pixel window v1"

static int cache_path(int64_t nside, int lmax, char *buf, size_t n)
{
    char dir[4096];
    if (!cache_dir(dir, sizeof dir))
        return 0;
    return snprintf(buf, n, "%s/pixel_window/nside%05lld-lmax%05d.txt", dir, (long long)nside, lmax) <
           (int)n;
}

/* Read a cache file written by disk_store; 0 on success. */
static int disk_load(const char *path, int64_t nside, int lmax, double *pl)
{
    FILE *f = fopen(path, "r");
    if (!f)
        return -1;
    char head[256];
    long long fn = -1;
    int fl = -1, ok = 0;
    if (fgets(head, sizeof head, f) &&
        sscanf(head, PIXEL_WINDOW_CACHE_TAG " nside %lld lmax %d", &fn, &fl) == 2 && fn == nside &&
        fl == lmax) {
        ok = 1;
        for (int l = 0; l <= lmax && ok; l++) {
            int rl;
            double v;
            ok = fscanf(f, "%d %lf", &rl, &v) == 2 && rl == l && isfinite(v) && v >= 0 && v <= 1.0001;
            if (ok)
                pl[l] = v;
        }
    }
    fclose(f);
    if (!ok)
        clef_log(CLEF_LOG_DEBUG, "pixel window cache '%s' unusable; recomputing", path);
    return ok ? 0 : -1;
}

static void disk_store(const char *path, int64_t nside, int lmax, const double *pl)
{
    char dir[4200];
    snprintf(dir, sizeof dir, "%s", path);
    char *slash = strrchr(dir, '/');
    if (slash)
        *slash = '\0';
    if (make_dirs(dir) != 0) {
        clef_log(CLEF_LOG_INFO, "cannot create cache folder '%s': %s", dir, strerror(errno));
        return;
    }
    clef_outfile o;
    if (clef_outfile_begin(&o, path) != CLEF_OK)
        return;
    FILE *f = fopen(o.tmp_path, "w");
    int ok = f != NULL;
    if (ok) {
        fprintf(f, PIXEL_WINDOW_CACHE_TAG " nside %lld lmax %d\n", (long long)nside, lmax);
        for (int l = 0; l <= lmax; l++)
            fprintf(f, "%d %.17g\n", l, pl[l]);
        ok = !ferror(f);
        ok = (fclose(f) == 0) && ok;
    }
    if (!ok || clef_outfile_commit(&o) != CLEF_OK) {
        clef_outfile_abort(&o);
        clef_log(CLEF_LOG_INFO, "cannot write pixel window cache '%s'", path);
    }
}

int clef_beam_pixel_window(int64_t nside, int lmax, double *pl)
{
    if (!nside_ok(nside))
        CLEF_FAIL(CLEF_EINVAL, "pixel window: nside %lld is not a power of two in [1, %d]",
                  (long long)nside, PIXEL_WINDOW_NSIDE_MAX);
    if (lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "pixel window: lmax must be >= 0, got %d", lmax);
    const int full = lmax > 3 * (int)nside - 1 ? lmax : 3 * (int)nside - 1;
    int status = CLEF_OK;
    /* The lock is held through the computation so that concurrent callers
     * do not compute the same window twice. */
    pthread_mutex_lock(&cache_lock);
    for (int i = 0; i < ncache; i++) {
        if (cache[i].nside == nside && cache[i].lmax >= lmax) {
            memcpy(pl, cache[i].pl, sizeof(double) * ((size_t)lmax + 1));
            pthread_mutex_unlock(&cache_lock);
            return CLEF_OK;
        }
    }
    double *w = malloc(sizeof(double) * ((size_t)full + 1));
    pixel_window_entry *grown = w ? realloc(cache, sizeof *cache * ((size_t)ncache + 1)) : NULL;
    if (!grown) {
        free(w);
        pthread_mutex_unlock(&cache_lock);
        CLEF_FAIL(CLEF_ENOMEM, "no memory for the pixel window cache");
    }
    cache = grown;
    char path[4200];
    const int have_path = cache_path(nside, full, path, sizeof path);
    if (!have_path || disk_load(path, nside, full, w) != 0) {
        status = clef_beam_pixel_window_compute(nside, full, NULL, w);
        if (status == CLEF_OK && have_path)
            disk_store(path, nside, full, w);
    }
    if (status == CLEF_OK) {
        cache[ncache++] = (pixel_window_entry){nside, full, w};
        memcpy(pl, w, sizeof(double) * ((size_t)lmax + 1));
    } else {
        free(w);
    }
    pthread_mutex_unlock(&cache_lock);
    return status;
}
