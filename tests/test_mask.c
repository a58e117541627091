/* Tests of the mask module: ring geometry and disc queries against the
 * HEALPix C library (chealpix) and brute force, the latitude-cut sky
 * fraction against the analytic 1 - sin(b), the indexed distance search
 * against brute force, the C1/C2 kernels of Grain, Tristram & Stompor 2009
 * (PRD 79, 123515) at exact distances from a straight-edged polar cap,
 * Gaussian apodization against the normal CDF of a straight edge, moments,
 * the full-sky mask spectrum, the holes file and the error paths. */
#include "check.h"

#include <chealpix.h>
#include <gsl/gsl_rng.h>
#include <omp.h>

#include "clef/mask.h"
#include "clef/sht.h"
#include "mask_impl.h"

#define DEG (M_PI / 180.0)

static void ang_vec(double theta, double phi, double *v)
{
    ang2vec(theta, phi, v);
}

static double chord2(const double *u, const double *v)
{
    const double dx = u[0] - v[0], dy = u[1] - v[1], dz = u[2] - v[2];
    return dx * dx + dy * dy + dz * dz;
}

/* Ring tables against chealpix pix2ang_ring64 (Gorski et al. 2005). */
static void test_ring_geometry(void **state)
{
    (void)state;
    for (int64_t nside = 1; nside <= 32; nside *= 2) {
        int64_t p = 0;
        for (int64_t i = 1; i < 4 * nside; i++) {
            mask_ring r;
            mask_ring_info(nside, i, &r);
            assert_int_equal(r.first, p);
            for (int64_t j = 0; j < r.n; j++, p++) {
                double th, ph;
                pix2ang_ring64(nside, p, &th, &ph);
                check_abs(r.z, cos(th), 1e-14, "chealpix pix2ang_ring64");
                check_abs(r.sth, sin(th), 1e-14, "chealpix pix2ang_ring64");
                check_abs(2 * M_PI / (double)r.n * ((double)j + r.shift), ph, 1e-13,
                          "chealpix pix2ang_ring64");
                assert_int_equal(mask_pixel_ring(nside, p), i);
            }
        }
        assert_int_equal(p, 12 * nside * nside);
    }
}

/* The pixel-radius bound: random points lie within it of their pixel's
 * centre (chealpix ang2pix_ring64). */
static void test_max_pixrad(void **state)
{
    (void)state;
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(rng, 11);
    for (int64_t nside = 1; nside <= 256; nside *= 2) {
        double worst = 0;
        for (int k = 0; k < 20000; k++) {
            const double z = 2 * gsl_rng_uniform(rng) - 1, phi = 2 * M_PI * gsl_rng_uniform(rng);
            const double th = acos(z);
            int64_t p;
            ang2pix_ring64(nside, th, phi, &p);
            double u[3], v[3];
            ang_vec(th, phi, u);
            pix2vec_ring64(nside, p, v);
            const double d = 2 * asin(sqrt(chord2(u, v)) / 2);
            if (d > worst)
                worst = d;
        }
        if (!(worst <= mask_max_pixrad(nside)))
            fail_msg("nside %lld: point %.6g rad from its centre > bound %.6g", (long long)nside,
                     worst, mask_max_pixrad(nside));
    }
    gsl_rng_free(rng);
}

/* Disc query against brute force (pixel centre u with u.c >= cos r) at
 * the poles, next to them, across phi = 0 and at random centres. */
static void check_disc(int64_t nside, double lon, double lat, double radius)
{
    int64_t *pix;
    size_t n;
    assert_int_equal(clef_mask_query_disc(nside, lon, lat, radius, &pix, &n), CLEF_OK);
    double c[3];
    ang_vec(M_PI / 2 - lat, lon, c);
    const int64_t npix = 12 * nside * nside;
    size_t k = 0;
    const double cosr = cos(radius);
    for (int64_t p = 0; p < npix; p++) {
        double v[3];
        pix2vec_ring64(nside, p, v);
        const int in = v[0] * c[0] + v[1] * c[1] + v[2] * c[2] >= cosr;
        if (in) {
            if (!(k < n && pix[k] == p))
                fail_msg("nside %lld disc (%g, %g, r %g): pixel %lld missing", (long long)nside,
                         lon / DEG, lat / DEG, radius, (long long)p);
            k++;
        } else if (k < n && pix[k] == p) {
            fail_msg("nside %lld disc (%g, %g, r %g): pixel %lld outside", (long long)nside,
                     lon / DEG, lat / DEG, radius, (long long)p);
        }
    }
    assert_int_equal(k, n);
    free(pix);
}

static void test_disc_query(void **state)
{
    (void)state;
    const double radii[] = {0.0123, 0.0871, 0.3712, 1.1234, 2.0517, 3.0011, M_PI};
    const double centres[][2] = {{0, 90},     {123, -90},  {10, 89.3},    {200, -88.1},
                                 {0, 0},      {359.7, 12}, {0.2, -41.8},  {180, 45.5},
                                 {271.3, 63}, {45, -66.5}, {90.01, 30.2}, {-30, 5},
                                 {7200.5, -12}, {-1e6, 33}};
    for (int64_t nside = 1; nside <= 32; nside *= 2)
        for (size_t c = 0; c < sizeof centres / sizeof centres[0]; c++)
            for (size_t r = 0; r < sizeof radii / sizeof radii[0]; r++)
                check_disc(nside, centres[c][0] * DEG, centres[c][1] * DEG, radii[r]);
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(rng, 5);
    for (int k = 0; k < 60; k++) {
        const double lat = asin(2 * gsl_rng_uniform(rng) - 1);
        check_disc(64, 2 * M_PI * gsl_rng_uniform(rng), lat, 0.5 * gsl_rng_uniform(rng) + 1e-3);
    }
    gsl_rng_free(rng);
}

/* The area of |b| >= b_cut is 1 - sin(b_cut) of the sphere.  Pixels are
 * equal-area (Gorski et al. 2005) and the cut keeps whole rings; each ring
 * holds at most 4 nside / (12 nside^2) = 1/(3 nside) of the sky, so each of
 * the two boundaries is off by at most that much. */
static void test_latitude_fsky(void **state)
{
    (void)state;
    const double bcuts[] = {0, 5, 10, 20, 30, 41.81, 45, 60, 80, 90};
    for (int64_t nside = 16; nside <= 256; nside *= 4) {
        for (size_t k = 0; k < sizeof bcuts / sizeof bcuts[0]; k++) {
            clef_map *m;
            assert_int_equal(clef_mask_full(&m, nside), CLEF_OK);
            assert_int_equal(clef_mask_cut_latitude(m, bcuts[k] * DEG), CLEF_OK);
            clef_mask_moments mo;
            assert_int_equal(clef_mask_moments_compute(m, &mo), CLEF_OK);
            if (bcuts[k] < 90)
                check_abs(mo.fsky, 1 - sin(bcuts[k] * DEG), 2.0 / (3.0 * (double)nside),
                          "analytic zone area 1 - sin(b); Gorski 2005 equal-area rings");
            else
                check_abs(mo.fsky, 0.0, 0.0, "b_cut = 90 deg masks every pixel");
            /* Binary mask: w1 = w2 = w4 = f_sky (Hivon et al. 2002). */
            check_abs(mo.w1, mo.fsky, 1e-15, "binary mask moments");
            check_abs(mo.w2, mo.fsky, 1e-15, "binary mask moments");
            check_abs(mo.w4, mo.fsky, 1e-15, "binary mask moments");
            if (mo.fsky > 0)
                check_rel(mo.fsky_eff, mo.fsky, 1e-14, "w2^2/w4 of a binary mask");
            clef_map_free(m);
        }
    }
}

/* A mask with a latitude cut, random holes and random single masked
 * pixels. */
static clef_map *messy_mask(int64_t nside, unsigned long seed)
{
    clef_map *m;
    assert_int_equal(clef_mask_full(&m, nside), CLEF_OK);
    assert_int_equal(clef_mask_cut_latitude(m, 15 * DEG), CLEF_OK);
    gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(rng, seed);
    for (int k = 0; k < 12; k++) {
        const double lat = asin(2 * gsl_rng_uniform(rng) - 1);
        assert_int_equal(clef_mask_cut_disc(m, 2 * M_PI * gsl_rng_uniform(rng), lat,
                                            0.02 + 0.2 * gsl_rng_uniform(rng)),
                         CLEF_OK);
    }
    for (int k = 0; k < 20; k++)
        m->pix[gsl_rng_uniform_int(rng, (unsigned long)m->npix)] = 0.0;
    /* An invalid pixel counts as masked. */
    m->valid[m->npix / 3] = 0;
    m->pix[m->npix / 3] = 0.0;
    m->nmissing = 1;
    gsl_rng_free(rng);
    return m;
}

/* Indexed distance search against brute force: over the edge pixels
 * (exact equality, same formula) and over every masked pixel (the nearest
 * masked pixel is an edge pixel). */
static void test_distance_brute(void **state)
{
    (void)state;
    const double radii[] = {0.03, 0.15, 0.6, M_PI};
    /* nside 64 gives a coarse grid of nside 4 at the smallest radius; the
     * brute force over every masked pixel is kept to nside <= 32. */
    for (int64_t nside = 1; nside <= 64; nside *= 2) {
        clef_map *m = messy_mask(nside, (unsigned long)nside);
        int64_t *edges;
        size_t nedges;
        assert_int_equal(clef_mask_edges(m, &edges, &nedges), CLEF_OK);
        /* nside 1 and 2: the cuts may leave no observed pixel, hence no
         * edge; the brute-force comparison below still applies. */
        /* Unit vectors of the edge and masked pixel centres (chealpix). */
        double *ev = malloc(sizeof *ev * 3 * nedges);
        double *mv = malloc(sizeof *mv * 3 * (size_t)m->npix);
        size_t nmasked = 0;
        for (size_t e = 0; e < nedges; e++)
            pix2vec_ring64(nside, edges[e], ev + 3 * e);
        for (int64_t p = 0; p < m->npix; p++)
            if (!(m->valid[p] && m->pix[p] > 0))
                pix2vec_ring64(nside, p, mv + 3 * nmasked++);
        double *dist = malloc(sizeof *dist * (size_t)m->npix);
        for (size_t r = 0; r < sizeof radii / sizeof radii[0]; r++) {
            assert_int_equal(clef_mask_distance(m, radii[r], dist), CLEF_OK);
            for (int64_t p = 0; p < m->npix; p++) {
                if (!(m->valid[p] && m->pix[p] > 0)) {
                    check_abs(dist[p], 0.0, 0.0, "masked pixel");
                    continue;
                }
                double v[3];
                pix2vec_ring64(nside, p, v);
                double be = INFINITY, bm = INFINITY;
                for (size_t e = 0; e < nedges; e++) {
                    const double c2 = chord2(ev + 3 * e, v);
                    be = c2 < be ? c2 : be;
                }
                for (size_t e = 0; e < nmasked && nside <= 32; e++) {
                    const double c2 = chord2(mv + 3 * e, v);
                    bm = c2 < bm ? c2 : bm;
                }
                if (nside > 32)
                    bm = be;
                const double de = fmin(2 * asin(fmin(1.0, sqrt(be) / 2)), radii[r]);
                const double dm = fmin(2 * asin(fmin(1.0, sqrt(bm) / 2)), radii[r]);
                if (dist[p] != de || dist[p] != dm)
                    fail_msg("nside %lld radius %g pixel %lld: indexed %.17g, brute edges %.17g, "
                             "brute masked %.17g",
                             (long long)nside, radii[r], (long long)p, dist[p], de, dm);
            }
        }
        free(dist);
        free(ev);
        free(mv);
        free(edges);
        clef_map_free(m);
    }
}

/* C1/C2 values from METHODS.md section 7 (Grain et al. 2009 kernels,
 * evaluated independently). */
static void test_kernel_values(void **state)
{
    (void)state;
    const char *src = "Grain et al. 2009 C1/C2; METHODS.md sec. 7";
    check_abs(clef_mask_apod_c1(0.25), 0.090845, 5e-7, src);
    check_abs(clef_mask_apod_c1(0.5), 0.5, 1e-15, src);
    check_abs(clef_mask_apod_c1(0.75), 0.909155, 5e-7, src);
    check_abs(clef_mask_apod_c2(0.25), 0.146447, 5e-7, src);
    check_abs(clef_mask_apod_c2(0.5), 0.5, 1e-15, src);
    check_abs(clef_mask_apod_c2(0.75), 0.853553, 5e-7, src);
    check_abs(clef_mask_apod_c1(0.0), 0.0, 0.0, src);
    check_abs(clef_mask_apod_c1(1.0), 1.0, 0.0, src);
    check_abs(clef_mask_apod_c2(1.3), 1.0, 0.0, src);
    check_abs(clef_mask_apod_x(0.1, 0.1), 1.0, 1e-15, "x(delta_c) = 1");
    check_rel(clef_mask_apod_x(0.02, 0.3), sqrt((1 - cos(0.02)) / (1 - cos(0.3))), 1e-12,
              "x = sqrt((1 - cos d)/(1 - cos d_c)), Grain et al. 2009");
}

/* A straight-edged polar cap: every pixel centre with theta <= theta_e
 * (rings 1..ie, ie in the belt) is masked.  Belt rings two apart share
 * their longitudes, so an observed pixel on ring ie + 2k lies on the
 * meridian of a masked pixel of ring ie and its distance to the masked
 * region is exactly theta - theta_e.  The scale delta_c is set so that a
 * chosen ring has x = 1/4, 1/2 or 3/4. */
static void test_apod_cap(void **state)
{
    (void)state;
    const int64_t nside = 64, ie = nside + 9;
    const double xs[] = {0.25, 0.5, 0.75};
    const double c1[] = {0.090845, 0.5, 0.909155}, c2[] = {0.146447, 0.5, 0.853553};
    clef_map *m;
    assert_int_equal(clef_mask_full(&m, nside), CLEF_OK);
    double the, ph;
    mask_ring re;
    mask_ring_info(nside, ie, &re);
    pix2ang_ring64(nside, re.first, &the, &ph);
    for (int64_t p = 0; p < re.first + re.n; p++)
        m->pix[p] = 0.0;
    for (int kind = CLEF_MASK_APOD_C1; kind <= CLEF_MASK_APOD_C2; kind++) {
        for (int t = 0; t < 3; t++) {
            /* Target ring ie + 8: delta_t = theta_t - theta_e, and
             * sin(delta_c / 2) = sin(delta_t / 2) / x. */
            mask_ring rt;
            mask_ring_info(nside, ie + 8, &rt);
            double tht;
            pix2ang_ring64(nside, rt.first, &tht, &ph);
            const double dc = 2 * asin(sin((tht - the) / 2) / xs[t]);
            clef_mask_apod_opts o = {.kind = kind, .scale = dc};
            clef_map *w;
            assert_int_equal(clef_mask_apodize(&w, m, &o), CLEF_OK);
            for (int64_t j = 0; j < rt.n; j++)
                check_abs(w->pix[rt.first + j], kind == CLEF_MASK_APOD_C1 ? c1[t] : c2[t], 6e-7,
                          "METHODS.md sec. 7 check values (Grain et al. 2009)");
            for (int64_t i = ie + 2; i < 4 * nside; i += 2) {
                mask_ring ri;
                mask_ring_info(nside, i, &ri);
                double th;
                pix2ang_ring64(nside, ri.first, &th, &ph);
                const double x = sqrt((1 - cos(th - the)) / (1 - cos(dc)));
                double f = 1.0;
                if (x < 1)
                    f = kind == CLEF_MASK_APOD_C1 ? x - sin(2 * M_PI * x) / (2 * M_PI)
                                                  : 0.5 * (1 - cos(M_PI * x));
                for (int64_t j = 0; j < ri.n; j++)
                    check_abs(w->pix[ri.first + j], f, 1e-10, "Grain et al. 2009 C1/C2 formula");
            }
            for (int64_t p = 0; p < re.first + re.n; p++)
                check_abs(w->pix[p], 0.0, 0.0, "masked pixels stay 0");
            clef_map_free(w);
        }
    }
    clef_map_free(m);
}

/* Moments of a non-binary mask against direct sums. */
static void test_moments(void **state)
{
    (void)state;
    clef_map *m;
    assert_int_equal(clef_map_alloc(&m, 4), CLEF_OK);
    double s1 = 0, s2 = 0, s4 = 0;
    for (int64_t p = 0; p < m->npix; p++) {
        const double w = (double)(p % 5) / 4.0;
        m->pix[p] = w;
        s1 += w;
        s2 += w * w;
        s4 += w * w * w * w;
    }
    clef_mask_moments mo;
    assert_int_equal(clef_mask_moments_compute(m, &mo), CLEF_OK);
    check_rel(mo.w1, s1 / 192, 1e-14, "mean of w (Hivon et al. 2002)");
    check_rel(mo.w2, s2 / 192, 1e-14, "mean of w^2");
    check_rel(mo.w4, s4 / 192, 1e-14, "mean of w^4");
    check_rel(mo.fsky_eff, (s2 / 192) * (s2 / 192) / (s4 / 192), 1e-14, "w2^2/w4");
    check_rel(mo.fsky, 153.0 / 192.0, 1e-15, "pixels with w > 0");
    clef_map_free(m);
}

static void test_binarize_patch(void **state)
{
    (void)state;
    clef_map *in, *b;
    assert_int_equal(clef_map_alloc(&in, 2), CLEF_OK);
    for (int64_t p = 0; p < in->npix; p++)
        in->pix[p] = (double)(p % 4) - 1.0; /* -1, 0, 1, 2 */
    in->valid[3] = 0;
    in->pix[3] = 0.0;
    in->pix[7] = NAN;
    strcpy(in->coordsys, "G");
    assert_int_equal(clef_mask_binarize(&b, in, 0.0, 0), CLEF_OK);
    for (int64_t p = 0; p < in->npix; p++) {
        const double want = (p == 3 || p == 7) ? 0.0 : (p % 4 >= 2 ? 1.0 : 0.0);
        check_abs(b->pix[p], want, 0.0, "value > 0");
    }
    assert_string_equal(b->coordsys, "G");
    clef_map_free(b);
    assert_int_equal(clef_mask_binarize(&b, in, 1.0, 1), CLEF_OK);
    for (int64_t p = 0; p < in->npix; p++) {
        const double want = (p == 3 || p == 7) ? 0.0 : (p % 4 >= 2 ? 1.0 : 0.0);
        check_abs(b->pix[p], want, 0.0, "value >= 1");
    }
    clef_map_free(b);
    clef_map_free(in);

    /* A patch and a hole of the same disc are complements; the cap area is
     * (1 - cos r)/2 of the sphere (pixelisation tolerance ~ perimeter). */
    clef_map *keep, *cut;
    assert_int_equal(clef_mask_full(&keep, 128), CLEF_OK);
    assert_int_equal(clef_mask_full(&cut, 128), CLEF_OK);
    assert_int_equal(clef_mask_keep_disc(keep, 30 * DEG, -60 * DEG, 10 * DEG), CLEF_OK);
    assert_int_equal(clef_mask_cut_disc(cut, 30 * DEG, -60 * DEG, 10 * DEG), CLEF_OK);
    for (int64_t p = 0; p < keep->npix; p++)
        check_abs(keep->pix[p] + cut->pix[p], 1.0, 0.0, "patch = complement of hole");
    clef_mask_moments mo;
    assert_int_equal(clef_mask_moments_compute(keep, &mo), CLEF_OK);
    check_rel(mo.fsky, (1 - cos(10 * DEG)) / 2, 0.02, "spherical cap area 2 pi (1 - cos r)");
    clef_map_free(keep);
    clef_map_free(cut);
}

/* Gaussian apodization of a hemisphere (z < 0 masked): on a straight edge
 * a Gaussian of width sigma smooths a step into the normal CDF
 * Phi(delta / sigma) = erfc(-delta / (sigma sqrt 2)) / 2 (flat-sky limit;
 * sigma = 3 deg makes curvature negligible at the 1e-2 level). */
static void test_apod_gauss(void **state)
{
    (void)state;
    const int64_t nside = 64;
    clef_map *m, *w;
    assert_int_equal(clef_mask_full(&m, nside), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++) {
        double th, ph;
        pix2ang_ring64(nside, p, &th, &ph);
        if (th > M_PI / 2 - 1e-12)
            m->pix[p] = 0.0;
    }
    const double fwhm = 7.0 * DEG, sigma = fwhm / sqrt(8 * log(2.0));
    clef_mask_apod_opts o = {.kind = CLEF_MASK_APOD_GAUSS, .scale = fwhm};
    assert_int_equal(clef_mask_apodize(&w, m, &o), CLEF_OK);
    /* The edge sits half-way between the last observed ring and the first
     * masked ring (the equator, whose pixels are masked). */
    const double edge = M_PI / 2 - 1.0 / (3.0 * (double)nside);
    for (int64_t p = 0; p < m->npix; p++) {
        assert_true(w->pix[p] >= 0.0 && w->pix[p] <= 1.0);
        if (m->pix[p] == 0.0) {
            check_abs(w->pix[p], 0.0, 0.0, "masked pixels stay 0");
            continue;
        }
        double th, ph;
        pix2ang_ring64(nside, p, &th, &ph);
        const double d = edge - th;
        check_abs(w->pix[p], 0.5 * erfc(-d / (sigma * sqrt(2.0))), 1.5e-2,
                  "normal CDF of a smoothed step (flat-sky limit)");
    }
    clef_map_free(w);
    /* Erosion by 2 sigma pushes the profile inward. */
    o.erode = 2 * sigma;
    assert_int_equal(clef_mask_apodize(&w, m, &o), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++) {
        double th, ph;
        pix2ang_ring64(nside, p, &th, &ph);
        if (th > M_PI / 2 - 2 * sigma + 0.02)
            check_abs(w->pix[p], 0.0, 0.0, "eroded band is 0");
    }
    clef_map_free(w);
    clef_map_free(m);
}

/* W_l of the full-sky mask: a_00 = sqrt(4 pi), so W_0 = 4 pi, every other
 * W_l = 0 (METHODS.md section 4, exact check). */
static void test_spectrum_full_sky(void **state)
{
    (void)state;
    const int64_t nside = 16;
    const int lmax = 2 * nside;
    clef_map *m;
    clef_sht *plan;
    assert_int_equal(clef_mask_full(&m, nside), CLEF_OK);
    assert_int_equal(clef_sht_create(&plan, nside, lmax, NULL), CLEF_OK);
    double wl[2 * 16 + 1];
    assert_int_equal(clef_mask_spectrum(plan, m, 3, wl), CLEF_OK);
    /* Tolerances from the transform's accuracy, not from the mask code:
     * at lmax = 2 nside with 3 iterations a_lm are good to ~1e-6 relative
     * (tests/test_sht.c round trip; measured here: W_0 off by 1.8e-9,
     * W_l>0 ~ 1e-17). */
    check_rel(wl[0], 4 * M_PI, 1e-7, "W_0 = 4 pi for w = 1 (METHODS.md sec. 4)");
    for (int l = 1; l <= lmax; l++)
        check_abs(wl[l], 0.0, 1e-12 * 4 * M_PI, "W_l = 0 for l > 0, full sky");
    /* A mask of the wrong nside is refused. */
    clef_map *m2;
    assert_int_equal(clef_mask_full(&m2, 8), CLEF_OK);
    assert_int_equal(clef_mask_spectrum(plan, m2, 0, wl), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "nside"));
    assert_int_equal(clef_mask_spectrum(plan, m, -1, wl), CLEF_EINVAL);
    clef_map_free(m2);
    clef_sht_destroy(plan);
    clef_map_free(m);
}

/* Hemisphere mask (w = 1 for z > 0): W_l = pi I_l^2, I_l = int_0^1 P_l dz:
 * I_0 = 1, I_1 = 1/2, I_3 = -1/8, I_5 = 1/16, I_7 = -5/128, even I_l>=2 = 0
 * (METHODS.md section 4).  Equator pixels (z = 0) get weight 1/2, the
 * pixelised mask's best match to the step; the remaining difference is
 * pixelisation, measured 4e-5 (l = 1) growing to 1e-3 (l = 7) at nside
 * 64; even l vanish by the north-south antisymmetry of w - 1/2. */
static void test_spectrum_hemisphere(void **state)
{
    (void)state;
    const int64_t nside = 64;
    const int lmax = 8;
    clef_map *m;
    clef_sht *plan;
    assert_int_equal(clef_mask_full(&m, nside), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++) {
        double th, ph;
        pix2ang_ring64(nside, p, &th, &ph);
        const double z = cos(th);
        m->pix[p] = fabs(z) < 1e-12 ? 0.5 : (z > 0 ? 1.0 : 0.0);
    }
    assert_int_equal(clef_sht_create(&plan, nside, lmax, NULL), CLEF_OK);
    double wl[9];
    assert_int_equal(clef_mask_spectrum(plan, m, 3, wl), CLEF_OK);
    double wl2[9];
    assert_int_equal(clef_mask_spectrum_lmax(m, lmax, 3, wl2), CLEF_OK);
    assert_memory_equal(wl, wl2, sizeof wl);
    assert_int_equal(clef_mask_spectrum_lmax(m, 0, 3, wl2), CLEF_EINVAL);
    const double il[9] = {1, 0.5, 0, -0.125, 0, 1.0 / 16, 0, -5.0 / 128, 0};
    for (int l = 0; l <= lmax; l++) {
        if (il[l] != 0)
            check_rel(wl[l], M_PI * il[l] * il[l], 2e-3,
                      "hemisphere W_l = pi I_l^2 (METHODS.md sec. 4)");
        else
            check_abs(wl[l], 0.0, 1e-20, "hemisphere: even W_l>0 = 0 (METHODS.md sec. 4)");
    }
    clef_sht_destroy(plan);
    clef_map_free(m);
}

/* The distances do not depend on the number of threads. */
static void test_distance_threads(void **state)
{
    (void)state;
    clef_map *m = messy_mask(64, 9);
    double *d1 = malloc(sizeof *d1 * (size_t)m->npix), *d2 = malloc(sizeof *d2 * (size_t)m->npix);
    const int saved = omp_get_max_threads();
    omp_set_num_threads(1);
    assert_int_equal(clef_mask_distance(m, 0.2, d1), CLEF_OK);
    omp_set_num_threads(3);
    assert_int_equal(clef_mask_distance(m, 0.2, d2), CLEF_OK);
    omp_set_num_threads(saved);
    assert_memory_equal(d1, d2, sizeof *d1 * (size_t)m->npix);
    free(d1);
    free(d2);
    clef_map_free(m);
}

static void write_text(const char *path, const char *text)
{
    FILE *f = fopen(path, "w");
    assert_non_null(f);
    fputs(text, f);
    fclose(f);
}

static void expect_holes_error(const char *name, const char *text, int code, const char *needle)
{
    const char *path = test_path(name);
    write_text(path, text);
    clef_mask_hole *h = (clef_mask_hole *)1;
    size_t n = 99;
    assert_int_equal(clef_mask_holes_read(path, &h, &n), code);
    assert_null(h);
    assert_int_equal(n, 0);
    if (!strstr(clef_last_error(), path) || !strstr(clef_last_error(), needle))
        fail_msg("message '%s' should name %s and '%s'", clef_last_error(), path, needle);
}

static void test_holes_file(void **state)
{
    (void)state;
    const char *path = test_path("holes.txt");
    write_text(path, "# lon lat radius\n"
                     "10 20 30   # arcmin\n"
                     "\n"
                     "   359.5\t-89.5 60\n"
                     "-20 0 1e2\n");
    clef_mask_hole *h;
    size_t n;
    assert_int_equal(clef_mask_holes_read(path, &h, &n), CLEF_OK);
    assert_int_equal(n, 3);
    check_rel(h[0].lon, 10 * DEG, 1e-15, "degrees");
    check_rel(h[0].lat, 20 * DEG, 1e-15, "degrees");
    check_rel(h[0].radius, 0.5 * DEG, 1e-15, "30 arcmin");
    check_rel(h[1].lat, -89.5 * DEG, 1e-15, "degrees");
    check_rel(h[2].radius, 100.0 / 60.0 * DEG, 1e-15, "arcmin");
    clef_map *m;
    assert_int_equal(clef_mask_full(&m, 64), CLEF_OK);
    assert_int_equal(clef_mask_cut_holes(m, h, n), CLEF_OK);
    int64_t p;
    ang2pix_ring64(64, M_PI / 2 - 20 * DEG, 10 * DEG, &p);
    check_abs(m->pix[p], 0.0, 0.0, "hole centre masked");
    ang2pix_ring64(64, M_PI / 2, 90 * DEG, &p);
    check_abs(m->pix[p], 1.0, 0.0, "far pixel kept");
    clef_map_free(m);
    free(h);

    write_text(path, "# nothing\n\n");
    assert_int_equal(clef_mask_holes_read(path, &h, &n), CLEF_OK);
    assert_int_equal(n, 0);
    assert_null(h);

    expect_holes_error("h1.txt", "1 2 3\n1 2\n", CLEF_EFORMAT, "line 2");
    expect_holes_error("h2.txt", "1 2 3 4\n", CLEF_EFORMAT, "line 1");
    expect_holes_error("h3.txt", "# c\n1 2x 3\n", CLEF_EFORMAT, "line 2");
    expect_holes_error("h4.txt", "1 95 3\n", CLEF_EFORMAT, "latitude");
    expect_holes_error("h5.txt", "1 2 0\n", CLEF_EFORMAT, "radius");
    expect_holes_error("h6.txt", "1 2 -5\n", CLEF_EFORMAT, "radius");
    expect_holes_error("h7.txt", "1 2 nan\n", CLEF_EFORMAT, "nan");
    h = NULL;
    assert_int_equal(clef_mask_holes_read(test_path("absent.txt"), &h, &n), CLEF_EIO);
    assert_non_null(strstr(clef_last_error(), "absent.txt"));
}

static void test_error_paths(void **state)
{
    (void)state;
    clef_map *m, *o = (clef_map *)1;
    assert_int_equal(clef_mask_full(&o, 3), CLEF_EINVAL);
    assert_null(o);
    assert_int_equal(clef_mask_full(&m, 4), CLEF_OK);
    assert_int_equal(clef_mask_binarize(&o, m, NAN, 0), CLEF_EINVAL);
    assert_int_equal(clef_mask_cut_latitude(m, -0.1), CLEF_EINVAL);
    assert_int_equal(clef_mask_cut_latitude(m, 2.0), CLEF_EINVAL);
    assert_int_equal(clef_mask_cut_disc(m, 0, 0, 0), CLEF_EINVAL);
    assert_int_equal(clef_mask_cut_disc(m, 0, 2.0, 0.1), CLEF_EINVAL);
    assert_int_equal(clef_mask_keep_disc(m, INFINITY, 0, 0.1), CLEF_EINVAL);
    assert_int_equal(clef_mask_keep_disc(m, 0, 0, 4.0), CLEF_EINVAL);
    int64_t *pix;
    size_t n;
    assert_int_equal(clef_mask_query_disc(6, 0, 0, 0.1, &pix, &n), CLEF_EINVAL);
    double dist[192];
    assert_int_equal(clef_mask_distance(m, 0.0, dist), CLEF_EINVAL);
    assert_int_equal(clef_mask_distance(m, NAN, dist), CLEF_EINVAL);
    clef_mask_apod_opts a = {.kind = 7, .scale = 0.1};
    assert_int_equal(clef_mask_apodize(&o, m, &a), CLEF_EINVAL);
    a.kind = CLEF_MASK_APOD_C1;
    a.scale = 0.0;
    assert_int_equal(clef_mask_apodize(&o, m, &a), CLEF_EINVAL);
    a.kind = CLEF_MASK_APOD_GAUSS;
    a.scale = 0.1;
    a.erode = -1;
    assert_int_equal(clef_mask_apodize(&o, m, &a), CLEF_EINVAL);
    assert_null(o);
    m->pix[5] = NAN;
    clef_mask_moments mo;
    assert_int_equal(clef_mask_moments_compute(m, &mo), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "pixel 5"));
    clef_map_free(m);
}

/* Full mask (no masked pixel): distances all max_dist, C1 mask all 1;
 * empty mask: all 0. */
static void test_trivial_masks(void **state)
{
    (void)state;
    clef_map *m, *w;
    assert_int_equal(clef_mask_full(&m, 8), CLEF_OK);
    clef_mask_apod_opts a = {.kind = CLEF_MASK_APOD_C2, .scale = 0.2};
    assert_int_equal(clef_mask_apodize(&w, m, &a), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++)
        check_abs(w->pix[p], 1.0, 0.0, "nothing masked");
    clef_map_free(w);
    assert_int_equal(clef_mask_cut_latitude(m, M_PI / 2), CLEF_OK);
    assert_int_equal(clef_mask_apodize(&w, m, &a), CLEF_OK);
    for (int64_t p = 0; p < m->npix; p++)
        check_abs(w->pix[p], 0.0, 0.0, "everything masked");
    clef_map_free(w);
    clef_map_free(m);
}

/* Timing of the distance search on a large mask (make check-long). */
static void test_distance_large(void **state)
{
    (void)state;
    if (!test_long())
        skip();
    const int64_t nside = 2048;
    clef_map *m = messy_mask(nside, 3);
    double *dist = malloc(sizeof *dist * (size_t)m->npix);
    const double t0 = clef_wtime();
    assert_int_equal(clef_mask_distance(m, 1.0 * DEG, dist), CLEF_OK);
    fprintf(stderr, "distance search nside %lld radius 1 deg: %.2f s\n", (long long)nside,
            clef_wtime() - t0);
    free(dist);
    clef_map_free(m);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_ring_geometry),     cmocka_unit_test(test_max_pixrad),
        cmocka_unit_test(test_disc_query),        cmocka_unit_test(test_latitude_fsky),
        cmocka_unit_test(test_distance_brute),    cmocka_unit_test(test_kernel_values),
        cmocka_unit_test(test_apod_cap),          cmocka_unit_test(test_moments),
        cmocka_unit_test(test_binarize_patch),    cmocka_unit_test(test_apod_gauss),
        cmocka_unit_test(test_spectrum_full_sky), cmocka_unit_test(test_holes_file),
        cmocka_unit_test(test_error_paths),       cmocka_unit_test(test_trivial_masks),
        cmocka_unit_test(test_spectrum_hemisphere), cmocka_unit_test(test_distance_threads),
        cmocka_unit_test(test_distance_large),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
