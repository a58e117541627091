/* Distance of observed pixels to the masked region, and apodization
 * (Grain, Tristram & Stompor 2009, PRD 79, 123515, arXiv:0903.2350).
 *
 * Distance search: only masked pixels with an observed neighbour ("edge"
 * pixels) can be nearest to an observed pixel.  Edge pixels are bucketed by
 * their parent pixel on a coarse grid of nside_c, chosen so that a coarse
 * pixel is about as wide as the search radius R.  For a coarse cell C,
 * an edge e within R of a fine pixel p of C satisfies
 *   angle(centre C, centre B(e)) <= r_c + R + r_c
 * (r_c bounds the distance from a coarse centre to any point of its pixel),
 * so one disc query per coarse cell lists the buckets to search, a few
 * dozen whatever nside is.  Each fine pixel then visits those buckets and
 * skips a bucket when angle(p, centre B) - r_c exceeds the best distance so
 * far.  Cells farther than R + 2 r_c from every edge cost one disc query. */
#define _XOPEN_SOURCE 700
#include <complex.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include <chealpix.h>
#include <omp.h>

#include "clef/mask.h"
#include "clef/sht.h"
#include "core_impl.h"
#include "mask_impl.h"

static inline int observed(const clef_map *m, int64_t p)
{
    return m->valid[p] && m->pix[p] > 0.0;
}

/* Great-circle angle between unit vectors from the squared chord:
 * 2 asin(|u - v| / 2), accurate at small angles where acos(u.v) is not. */
static inline double chord2(const double *u, const double *v)
{
    const double dx = u[0] - v[0], dy = u[1] - v[1], dz = u[2] - v[2];
    return dx * dx + dy * dy + dz * dz;
}
static inline double chord2_angle(double c2)
{
    const double h = sqrt(c2) / 2.0;
    return 2.0 * asin(h < 1.0 ? h : 1.0);
}

/* Mark edge pixels: masked pixels with an observed pixel in rings i-2..i+2
 * within one pixel width (own ring's plus the other ring's) in phi.  The
 * 8 HEALPix neighbours lie in those rings (the vertex neighbours N and S
 * two rings away) within that phi window; next to the poles every pixel of
 * the nearby rings is taken.  obs[p] is 1 for observed pixels. */
static void mark_edges(int64_t nside, const unsigned char *obs, unsigned char *edge)
{
    const int64_t nring = 4 * nside - 1;
#pragma omp parallel for schedule(dynamic, 4)
    for (int64_t i = 1; i <= nring; i++) {
        mask_ring ri, rk[5];
        double ratio[5], hk[5];
        mask_ring_info(nside, i, &ri);
        const int polar = i <= 2 || i >= nring - 1;
        for (int d = 0; d < 5; d++) {
            const int64_t k = i + d - 2;
            hk[d] = -1.0; /* ring absent */
            if (k < 1 || k > nring)
                continue;
            mask_ring_info(nside, k, &rk[d]);
            /* In units of ring k's pixel width: pixel j of ring i sits at
             * u = (j + s_i) n_k / n_i - s_k, and the window half-width
             * (one pixel of each ring) is n_k / n_i + 1. */
            ratio[d] = (double)rk[d].n / (double)ri.n;
            hk[d] = polar ? (double)rk[d].n : ratio[d] + 1.0;
        }
        for (int64_t j = 0; j < ri.n; j++) {
            const int64_t p = ri.first + j;
            edge[p] = 0;
            if (obs[p])
                continue;
            int found = 0;
            for (int d = 0; d < 5 && !found; d++) {
                if (hk[d] < 0.0)
                    continue;
                const int64_t n = rk[d].n;
                const double u = ((double)j + ri.shift) * ratio[d] - rk[d].shift;
                int64_t lo = (int64_t)ceil(u - hk[d]), hi = (int64_t)floor(u + hk[d]);
                if (hi - lo + 1 >= n) {
                    lo = 0;
                    hi = n - 1;
                }
                /* The window is shorter than the ring: one wrap at most. */
                for (int64_t q = lo; q <= hi && !found; q++)
                    found = obs[rk[d].first + (q < 0 ? q + n : (q >= n ? q - n : q))];
            }
            edge[p] = (unsigned char)found;
        }
    }
}

/* 1 for observed pixels (valid and > 0), else 0; NULL when out of memory. */
static unsigned char *observed_flags(const clef_map *mask)
{
    unsigned char *obs = malloc((size_t)mask->npix);
    if (obs)
        for (int64_t p = 0; p < mask->npix; p++)
            obs[p] = (unsigned char)observed(mask, p);
    return obs;
}

/* The edge pixels of a mask given its observed flags, in RING order. */
static int collect_edges(int64_t nside, const unsigned char *obs, int64_t **edges, size_t *nedges)
{
    const int64_t npix = 12 * nside * nside;
    *edges = NULL;
    *nedges = 0;
    unsigned char *flag = malloc((size_t)npix);
    if (!flag)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for edge flags at nside %lld", (long long)nside);
    mark_edges(nside, obs, flag);
    size_t n = 0;
    for (int64_t p = 0; p < npix; p++)
        n += flag[p];
    if (n) {
        int64_t *e = malloc(sizeof *e * n);
        if (!e) {
            free(flag);
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for %zu edge pixels", n);
        }
        size_t k = 0;
        for (int64_t p = 0; p < npix; p++)
            if (flag[p])
                e[k++] = p;
        *edges = e;
        *nedges = n;
    }
    free(flag);
    return CLEF_OK;
}

int clef_mask_edges(const clef_map *mask, int64_t **edges, size_t *nedges)
{
    *edges = NULL;
    *nedges = 0;
    unsigned char *obs = observed_flags(mask);
    if (!obs)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for pixel flags at nside %lld",
                  (long long)mask->nside);
    const int status = collect_edges(mask->nside, obs, edges, nedges);
    free(obs);
    return status;
}

/* Edge pixels bucketed by coarse RING pixel (compressed rows); unit vectors
 * stored as separate x, y, z arrays so the scan of a bucket vectorises. */
typedef struct edge_index {
    int64_t nside_c, ncoarse;
    size_t *start;  /* ncoarse + 1 offsets into x, y, z */
    double *x, *y, *z;
    double *centre; /* 3 per coarse pixel */
} edge_index;

static void edge_index_free(edge_index *ix)
{
    free(ix->start);
    free(ix->x);
    free(ix->y);
    free(ix->z);
    free(ix->centre);
}

static int edge_index_build(edge_index *ix, const clef_map *mask, const int64_t *edges,
                            size_t nedges, int64_t nside_c)
{
    memset(ix, 0, sizeof *ix);
    const int64_t nside = mask->nside;
    int shift = 0; /* 2 log2(nside / nside_c): NESTED parent = index >> shift */
    while ((nside_c << (shift / 2 + 1)) <= nside)
        shift += 2;
    ix->nside_c = nside_c;
    ix->ncoarse = 12 * nside_c * nside_c;
    int64_t *bucket = malloc(sizeof *bucket * nedges);
    size_t *fill = malloc(sizeof *fill * (size_t)ix->ncoarse);
    ix->start = calloc((size_t)ix->ncoarse + 1, sizeof *ix->start);
    ix->x = malloc(sizeof *ix->x * nedges);
    ix->y = malloc(sizeof *ix->y * nedges);
    ix->z = malloc(sizeof *ix->z * nedges);
    ix->centre = malloc(sizeof *ix->centre * 3 * (size_t)ix->ncoarse);
    if (!bucket || !fill || !ix->start || !ix->x || !ix->y || !ix->z || !ix->centre) {
        free(bucket);
        free(fill);
        edge_index_free(ix);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the edge index (%zu edges, coarse nside %lld)",
                  nedges, (long long)nside_c);
    }
    for (size_t k = 0; k < nedges; k++) {
        int64_t nest, cring;
        ring2nest64(nside, edges[k], &nest);
        nest2ring64(nside_c, nest >> shift, &cring);
        bucket[k] = cring;
        ix->start[cring + 1]++;
    }
    for (int64_t c = 0; c < ix->ncoarse; c++)
        ix->start[c + 1] += ix->start[c];
    memcpy(fill, ix->start, sizeof *fill * (size_t)ix->ncoarse);
    for (size_t k = 0; k < nedges; k++) {
        double v[3];
        pix2vec_ring64(nside, edges[k], v);
        const size_t at = fill[bucket[k]]++;
        ix->x[at] = v[0];
        ix->y[at] = v[1];
        ix->z[at] = v[2];
    }
    for (int64_t c = 0; c < ix->ncoarse; c++)
        pix2vec_ring64(nside_c, c, ix->centre + 3 * c);
    free(fill);
    free(bucket);
    return CLEF_OK;
}

/* A bucket to search from one coarse cell, with its squared chord to the
 * cell's centre (for ordering). */
typedef struct candidate {
    int64_t bucket;
    double c2;
} candidate;

static int candidate_cmp(const void *a, const void *b)
{
    const double x = ((const candidate *)a)->c2, y = ((const candidate *)b)->c2;
    return (x > y) - (x < y);
}

/* Per-thread scratch of the search. */
typedef struct search_scratch {
    mask_range *ranges;
    candidate *cand;
    size_t cap;
} search_scratch;

/* Squared chord of the angle t (t >= pi: the largest chord, 4). */
static inline double angle_chord2(double t)
{
    if (t >= M_PI)
        return INFINITY;
    const double s = 2.0 * sin(t / 2.0);
    return s * s;
}

/* Smallest squared chord from v to the edges [lo, hi) of the index. */
static inline double bucket_min(const edge_index *ix, size_t lo, size_t hi, const double *v)
{
    double m = INFINITY;
    for (size_t e = lo; e < hi; e++) {
        const double dx = v[0] - ix->x[e], dy = v[1] - ix->y[e], dz = v[2] - ix->z[e];
        const double c2 = dx * dx + dy * dy + dz * dz;
        m = c2 < m ? c2 : m;
    }
    return m;
}

/* Distances for the fine pixels of coarse RING cell c.  Returns 0, or -1
 * when the candidate list could not grow. */
static int search_cell(const clef_map *mask, const unsigned char *obs, const edge_index *ix,
                       int64_t c, double max_dist, double search_r, double rc,
                       search_scratch *s, double *dist)
{
    const int64_t nside = mask->nside;
    double th, ph;
    pix2ang_ring64(ix->nside_c, c, &th, &ph);
    const double *cc = ix->centre + 3 * c;
    const size_t nr = mask_disc_ranges(ix->nside_c, th, ph, search_r, s->ranges);
    size_t nc = 0;
    for (size_t a = 0; a < nr; a++)
        for (int64_t b = s->ranges[a].lo; b <= s->ranges[a].hi; b++) {
            if (ix->start[b + 1] == ix->start[b])
                continue;
            if (nc == s->cap) {
                const size_t cap = s->cap ? 2 * s->cap : 256;
                candidate *t = realloc(s->cand, sizeof *t * cap);
                if (!t)
                    return -1;
                s->cand = t;
                s->cap = cap;
            }
            s->cand[nc].bucket = b;
            s->cand[nc++].c2 = chord2(cc, ix->centre + 3 * b);
        }
    if (nc == 0)
        return 0;
    /* Nearest buckets first: a close edge found early prunes the rest. */
    qsort(s->cand, nc, sizeof *s->cand, candidate_cmp);
    const int64_t k = nside / ix->nside_c;
    int64_t cnest;
    ring2nest64(ix->nside_c, c, &cnest);
    for (int64_t f = cnest * k * k; f < (cnest + 1) * k * k; f++) {
        int64_t p;
        nest2ring64(nside, f, &p);
        if (!obs[p])
            continue;
        double v[3];
        pix2vec_ring64(nside, p, v);
        /* Every edge of bucket b is at least angle(p, centre b) - rc away:
         * skip b when angle(p, centre b) > best + rc, compared as squared
         * chords (monotone in the angle). */
        double best_c2 = INFINITY, best = max_dist;
        double skip_c2 = angle_chord2(best + rc);
        for (size_t a = 0; a < nc; a++) {
            const int64_t b = s->cand[a].bucket;
            if (chord2(v, ix->centre + 3 * b) > skip_c2)
                continue;
            const double m = bucket_min(ix, ix->start[b], ix->start[b + 1], v);
            if (m < best_c2) {
                best_c2 = m;
                const double d = chord2_angle(m);
                if (d < best) {
                    best = d;
                    skip_c2 = angle_chord2(best + rc);
                }
            }
        }
        dist[p] = best;
    }
    return 0;
}

int clef_mask_distance(const clef_map *mask, double max_dist, double *dist)
{
    if (!(max_dist > 0.0 && max_dist <= M_PI))
        CLEF_FAIL(CLEF_EINVAL, "distance search radius %g deg is not in (0, 180]",
                  max_dist * 180.0 / M_PI);
    const int64_t nside = mask->nside;
    unsigned char *obs = observed_flags(mask);
    if (!obs)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for pixel flags at nside %lld", (long long)nside);
    for (int64_t p = 0; p < mask->npix; p++)
        dist[p] = obs[p] ? max_dist : 0.0;
    int64_t *edges;
    size_t nedges;
    int status = collect_edges(nside, obs, &edges, &nedges);
    if (status != CLEF_OK || nedges == 0) {
        free(obs);
        return status;
    }

    /* Coarse pixels a quarter of the radius wide (sqrt(Omega) = 1.02 /
     * nside_c): small enough that the bucket bound r_c prunes well, and at
     * least 16 x 16 fine pixels per cell so that the one disc query per
     * cell stays cheap (measured at nside 2048, docs/masks.md). */
    int64_t nside_c = 1;
    while (2 * nside_c <= nside / 16 && 1.02 / (double)(2 * nside_c) >= max_dist / 4.0)
        nside_c *= 2;
    edge_index ix;
    status = edge_index_build(&ix, mask, edges, nedges, nside_c);
    free(edges);
    if (status != CLEF_OK) {
        free(obs);
        return status;
    }
    /* The margins absorb rounding in the angles (~1e-15 rad). */
    const double rc = mask_max_pixrad(nside_c) * (1.0 + 1e-9) + 1e-12;
    const double search_r = fmin(M_PI, max_dist + 2.0 * rc);

    const int nthreads = omp_get_max_threads();
    search_scratch *scr = calloc((size_t)nthreads, sizeof *scr);
    if (!scr) {
        free(obs);
        edge_index_free(&ix);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for distance search scratch");
    }
    int oom = 0;
    for (int t = 0; t < nthreads; t++) {
        scr[t].ranges = malloc(sizeof *scr[t].ranges * (size_t)(2 * (4 * nside_c - 1)));
        oom |= !scr[t].ranges;
    }
    const int64_t ncells = ix.ncoarse;
    if (!oom) {
#pragma omp parallel for schedule(dynamic, 8) num_threads(nthreads)
        for (int64_t c = 0; c < ncells; c++) {
            const int t = omp_get_thread_num();
            if (search_cell(mask, obs, &ix, c, max_dist, search_r, rc, &scr[t], dist)) {
#pragma omp atomic write
                oom = 1;
            }
            if (t == 0 && (c & 255) == 0)
                clef_progress("distance", (double)c / (double)ncells);
        }
        clef_progress("distance", 1.0);
    }
    for (int t = 0; t < nthreads; t++) {
        free(scr[t].ranges);
        free(scr[t].cand);
    }
    free(scr);
    free(obs);
    edge_index_free(&ix);
    if (oom)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory in the distance search at nside %lld",
                  (long long)nside);
    return CLEF_OK;
}

double clef_mask_apod_x(double delta, double delta_c)
{
    /* sqrt((1 - cos d) / (1 - cos d_c)) = sin(d/2) / sin(d_c/2), without
     * the cancellation of 1 - cos at small angles. */
    return sin(delta / 2.0) / sin(delta_c / 2.0);
}

/* Grain, Tristram & Stompor 2009 (PRD 79, 123515), C1 kernel. */
double clef_mask_apod_c1(double x)
{
    if (x <= 0.0)
        return 0.0;
    if (x >= 1.0)
        return 1.0;
    return x - sin(2.0 * M_PI * x) / (2.0 * M_PI);
}

/* Grain, Tristram & Stompor 2009 (PRD 79, 123515), C2 kernel. */
double clef_mask_apod_c2(double x)
{
    if (x <= 0.0)
        return 0.0;
    if (x >= 1.0)
        return 1.0;
    return 0.5 * (1.0 - cos(M_PI * x));
}

/* Gaussian smoothing of the binary mask b (Grain et al. 2009): w =
 * b * clamp(S[B_l A b]), written into out->pix. */
static int apodize_gauss(clef_map *out, double *b, double fwhm)
{
    const int64_t nside = out->nside;
    const double sigma = fwhm / sqrt(8.0 * log(2.0));
    /* B_l = exp(-l(l+1) sigma^2 / 2) < 1e-10 once l sigma > ~6.8. */
    double lcut = ceil(7.0 / sigma);
    int lmax = (int)fmin((double)(3 * nside - 1), lcut);
    if (lmax < 1)
        lmax = 1;
    clef_sht *plan = NULL;
    double complex *alm = NULL;
    int status;
    CLEF_CHECK(clef_sht_create(&plan, nside, lmax, NULL));
    alm = malloc(sizeof *alm * clef_alm_size(lmax, lmax));
    if (!alm) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for a_lm at lmax %d", lmax);
        goto fail;
    }
    const double *maps[1] = {b};
    double complex *alms[1] = {alm};
    CLEF_CHECK(clef_sht_analysis(plan, 1, maps, alms, 3));
    for (int m = 0; m <= lmax; m++)
        for (int l = m; l <= lmax; l++)
            alm[clef_alm_index(lmax, l, m)] *=
                exp(-0.5 * (double)l * (double)(l + 1) * sigma * sigma);
    const double complex *calms[1] = {alm};
    double *outs[1] = {out->pix};
    CLEF_CHECK(clef_sht_synthesis(plan, 1, calms, outs));
    /* The band limit leaves small ringing; a weight stays in [0, 1]. */
    for (int64_t p = 0; p < out->npix; p++)
        out->pix[p] = b[p] * fmin(1.0, fmax(0.0, out->pix[p]));
    status = CLEF_OK;
fail:
    free(alm);
    clef_sht_destroy(plan);
    return status;
}

int clef_mask_apodize(clef_map **out, const clef_map *mask, const clef_mask_apod_opts *opts)
{
    *out = NULL;
    const int kind = opts->kind;
    const double scale = opts->scale;
    if (kind != CLEF_MASK_APOD_C1 && kind != CLEF_MASK_APOD_C2 && kind != CLEF_MASK_APOD_GAUSS)
        CLEF_FAIL(CLEF_EINVAL, "unknown apodization kind %d", kind);
    if (!(scale > 0.0 && scale <= M_PI))
        CLEF_FAIL(CLEF_EINVAL, "apodization scale %g deg is not in (0, 180]", scale * 180.0 / M_PI);
    if (kind == CLEF_MASK_APOD_GAUSS && !(opts->erode >= 0.0 && opts->erode <= M_PI))
        CLEF_FAIL(CLEF_EINVAL, "erosion radius %g deg is not in [0, 180]",
                  opts->erode * 180.0 / M_PI);
    int status;
    clef_map *w = NULL;
    double *bin = NULL;
    CLEF_CHECK(clef_map_alloc(&w, mask->nside));
    memcpy(w->coordsys, mask->coordsys, sizeof w->coordsys);
    if (kind == CLEF_MASK_APOD_GAUSS) {
        /* The binary (eroded) mask handed to the transform; the distances
         * of the erosion go through the same array. */
        bin = malloc(sizeof *bin * (size_t)mask->npix);
        if (!bin) {
            status = clef_fail(CLEF_ENOMEM, "out of memory for the binary mask at nside %lld",
                               (long long)mask->nside);
            goto fail;
        }
        if (opts->erode > 0.0) {
            CLEF_CHECK(clef_mask_distance(mask, opts->erode, bin));
            for (int64_t p = 0; p < mask->npix; p++)
                bin[p] = observed(mask, p) && bin[p] >= opts->erode ? 1.0 : 0.0;
        } else {
            for (int64_t p = 0; p < mask->npix; p++)
                bin[p] = observed(mask, p) ? 1.0 : 0.0;
        }
        CLEF_CHECK(apodize_gauss(w, bin, scale));
    } else {
        /* Distances go straight into the output and become weights in
         * place (masked pixels have distance 0 and stay 0). */
        CLEF_CHECK(clef_mask_distance(mask, scale, w->pix));
        for (int64_t p = 0; p < mask->npix; p++) {
            if (!observed(mask, p))
                continue;
            const double x = clef_mask_apod_x(w->pix[p], scale);
            w->pix[p] = kind == CLEF_MASK_APOD_C1 ? clef_mask_apod_c1(x) : clef_mask_apod_c2(x);
        }
    }
    free(bin);
    *out = w;
    return CLEF_OK;
fail:
    free(bin);
    clef_map_free(w);
    return status;
}
