/* Transform plan: ring geometry from the HEALPix C library, ring FFT
 * plans, quadrature weights and per-thread scratch (include/clef/sht.h). */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include <chealpix.h>
#include <omp.h>

#include "clef/map.h"
#include "core_impl.h"
#include "sht_impl.h"

/* Budget for the Fourier-coefficient array of one chunk of ring pairs:
 * large enough that each m sees many blocks (parallel and cache
 * efficiency), small enough to keep the plan's memory a fraction of the
 * maps' (PERFORMANCE.md section 2 item 8): 96 MiB, or a quarter of the
 * a_lm of all maps when that is more.  Every (m, chunk) pays a fixed cost
 * of order lmax - m (the recurrence table clef_sht_mtab_fill in long
 * double, zeroing and summing the accumulators), against the kernel's
 * blocks x (lmax - m); with the fixed 96 MiB a chunk held 7 blocks of 32
 * ring pairs at nside 4096, lmax 12287 (3 blocks for two maps: 86 chunks)
 * and that cost was about a third of the transform. */
#define PHASE_BYTES_MIN ((size_t)96 << 20)

static int nside_ok(int64_t nside)
{
    return nside >= 1 && nside <= CLEF_NSIDE_MAX && (nside & (nside - 1)) == 0;
}

/* Ring geometry.  z and sin theta from pix2vec_ring64 (the library's own
 * z, no acos/cos round trip), phi0 from pix2ang_ring64 on the first pixel
 * of each ring.  Ring sizes and first indices follow from the library's
 * RING numbering (the first pixel of ring r + 1 is first_r + npix_r). */
static int make_geometry(clef_sht *p)
{
    const int64_t ns = p->nside;
    int64_t first = 0;
    for (int r = 0; r < p->nrings; r++) {
        const int64_t i = r + 1;
        const int64_t n = i < ns ? 4 * i : (i <= 3 * ns ? 4 * ns : 4 * (4 * ns - i));
        double v[3], theta, phi;
        pix2vec_ring64(ns, first, v);
        pix2ang_ring64(ns, first, &theta, &phi);
        p->ring_first[r] = first;
        p->ring_npix[r] = (int)n;
        p->ring_z[r] = v[2];
        p->ring_sth[r] = sqrt(v[0] * v[0] + v[1] * v[1]);
        p->ring_phi0[r] = phi;
        /* HEALPix rings start at phi0 = 0 or half a pixel spacing, pi / n:
         * recognise which, so phase factors use exact angle reduction. */
        const double t = phi * (double)n / CLEF_PI;
        const int shift = (int)lround(t);
        if ((shift != 0 && shift != 1) || fabs(t - shift) > 1e-9)
            CLEF_FAIL(CLEF_EUNSUP, "sht: ring %d of nside %lld starts at phi = %.17g, not 0 or pi/%lld",
                      r + 1, (long long)ns, phi, (long long)n);
        p->ring_shift[r] = shift;
        first += n;
    }
    if (first != p->npix)
        CLEF_FAIL(CLEF_ENUMERIC, "sht: ring sizes of nside %lld sum to %lld, not %lld pixels",
                  (long long)ns, (long long)first, (long long)p->npix);
    const int npad = p->nblocks * CLEF_SHT_BLOCK;
    for (int q = 0; q < npad; q++) {
        p->pair_x[q] = q < p->npairs ? p->ring_z[q] : 0.0;
        p->pair_sth[q] = q < p->npairs ? p->ring_sth[q] : 1.0;
    }
    return CLEF_OK;
}

static int alloc_threads(clef_sht *p)
{
    const size_t ns = (size_t)p->nside, nm = (size_t)p->nmaps;
    const size_t lm = (size_t)p->lmax + 2, mm = (size_t)p->mmax + 1;
    p->thr = calloc((size_t)p->nthreads, sizeof *p->thr);
    if (!p->thr)
        return CLEF_ENOMEM;
    for (int t = 0; t < p->nthreads; t++) {
        clef_sht_thread *th = &p->thr[t];
        th->ring = fftw_malloc(sizeof(double) * 4 * ns);
        th->four = fftw_malloc(sizeof(fftw_complex) * (2 * ns + 1));
        th->fn = malloc(sizeof *th->fn * mm * nm);
        th->fs = malloc(sizeof *th->fs * mm * nm);
        th->ph1 = malloc(sizeof *th->ph1 * 64);
        th->ph2 = malloc(sizeof *th->ph2 * (mm / 64 + 1));
        th->abuf = malloc(sizeof *th->abuf * lm * nm * 2 * CLEF_SHT_VLMAX);
        th->bl = malloc(sizeof *th->bl * lm * nm);
        if (!th->ring || !th->four || !th->fn || !th->fs || !th->ph1 || !th->ph2 || !th->abuf ||
            !th->bl)
            return CLEF_ENOMEM;
        if (clef_sht_mtab_alloc(&th->tab, p->lmax) != CLEF_OK ||
            clef_sht_fft_thread_alloc(p, th) != CLEF_OK)
            return CLEF_ENOMEM;
    }
    return CLEF_OK;
}

static void wisdom_import(const char *file)
{
    if (file && fftw_import_wisdom_from_filename(file))
        clef_log(CLEF_LOG_DEBUG, "sht: FFTW wisdom read from %s", file);
}

static void wisdom_export(const char *file)
{
    if (!file)
        return;
    clef_outfile o;
    if (clef_outfile_begin(&o, file) != CLEF_OK) {
        clef_log(CLEF_LOG_WARN, "sht: cannot write FFTW wisdom file %s", file);
        return;
    }
    if (!fftw_export_wisdom_to_filename(o.tmp_path) || clef_outfile_commit(&o) != CLEF_OK) {
        clef_outfile_abort(&o);
        clef_log(CLEF_LOG_WARN, "sht: cannot write FFTW wisdom file %s", file);
    }
}

int clef_sht_create(clef_sht **out, int64_t nside, int lmax, const clef_sht_opts *opts)
{
    return clef_sht_create_impl(out, nside, lmax, opts, 1);
}

int clef_sht_create_impl(clef_sht **out, int64_t nside, int lmax, const clef_sht_opts *opts,
                         int warn_lmax)
{
    int status = CLEF_OK;
    clef_sht *p = NULL;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "clef_sht_create: output pointer is NULL");
    *out = NULL;
    if (!nside_ok(nside))
        CLEF_FAIL(CLEF_EINVAL, "sht: nside = %lld is not a power of two in [1, %d]",
                  (long long)nside, CLEF_NSIDE_MAX);
    if (lmax < 1 || lmax > 65535)
        CLEF_FAIL(CLEF_EINVAL, "sht: lmax = %d outside [1, 65535]", lmax);
    const int mmax = opts && opts->mmax > 0 ? opts->mmax : lmax;
    if (mmax > lmax)
        CLEF_FAIL(CLEF_EINVAL, "sht: mmax = %d above lmax = %d", mmax, lmax);
    const int nmaps = opts && opts->nmaps > 0 ? opts->nmaps : 1;
    if (nmaps > 64)
        CLEF_FAIL(CLEF_EINVAL, "sht: nmaps = %d above the supported 64", nmaps);
    if (warn_lmax && lmax > 3 * nside - 1)
        clef_log(CLEF_LOG_WARN, "sht: lmax = %d above 3 nside - 1 = %lld: analysis is not invertible",
                 lmax, (long long)(3 * nside - 1));

    clef_kernel kid;
    CLEF_TRY(clef_kernel_resolve(opts ? opts->kernel : CLEF_KERNEL_AUTO, &kid));
    p = calloc(1, sizeof *p);
    if (!p)
        CLEF_FAIL(CLEF_ENOMEM, "sht: no memory for the plan");
    p->kern = kid == CLEF_KERNEL_AVX512 ? &clef_sht_avx512_kernel
            : kid == CLEF_KERNEL_AVX2   ? &clef_sht_avx2_kernel
                                        : &clef_sht_base_kernel;
    clef_log(CLEF_LOG_DEBUG, "sht: Legendre kernel %s (%d lanes)", p->kern->name, p->kern->vl);
    p->nside = nside;
    p->npix = 12 * nside * nside;
    p->lmax = lmax;
    p->mmax = mmax;
    p->nmaps = nmaps;
    p->nrings = (int)(4 * nside - 1);
    p->npairs = (int)(2 * nside);
    p->nblocks = (p->npairs + CLEF_SHT_BLOCK - 1) / CLEF_SHT_BLOCK;
    p->domega = 4.0 * CLEF_PI / (double)p->npix;
    p->nthreads = omp_get_max_threads();
    const size_t nr = (size_t)p->nrings, npad = (size_t)p->nblocks * CLEF_SHT_BLOCK;
    p->ring_z = malloc(nr * sizeof(double));
    p->ring_sth = malloc(nr * sizeof(double));
    p->ring_phi0 = malloc(nr * sizeof(double));
    p->ring_w = malloc(nr * sizeof(double));
    p->ring_first = malloc(nr * sizeof(int64_t));
    p->ring_npix = malloc(nr * sizeof(int));
    p->ring_shift = malloc(nr * sizeof(int));
    p->pair_x = malloc(npad * sizeof(double));
    p->pair_sth = malloc(npad * sizeof(double));
    p->plan_r2c = calloc((size_t)nside, sizeof(fftw_plan));
    p->plan_c2r = calloc((size_t)nside, sizeof(fftw_plan));
    p->state = calloc(1, sizeof *p->state);
    if (!p->ring_z || !p->ring_sth || !p->ring_phi0 || !p->ring_w || !p->ring_first ||
        !p->ring_npix || !p->ring_shift || !p->pair_x || !p->pair_sth || !p->plan_r2c ||
        !p->plan_c2r || !p->state) {
        status = clef_fail(CLEF_ENOMEM, "sht: no memory for the ring tables of nside %lld",
                           (long long)nside);
        goto fail;
    }
    CLEF_CHECK(make_geometry(p));

    if (opts && opts->no_ring_weights) {
        for (size_t r = 0; r < nr; r++)
            p->ring_w[r] = 1.0;
    } else {
        CLEF_CHECK(clef_sht_ring_weights(p, opts && opts->use_cache, opts ? opts->cache_dir : NULL,
                                         p->ring_w));
    }

    const unsigned flags = opts && opts->fftw_flags ? opts->fftw_flags : FFTW_ESTIMATE;
    wisdom_import(opts ? opts->wisdom_file : NULL);
    CLEF_CHECK(clef_sht_fft_plan(p, flags));
    wisdom_export(opts ? opts->wisdom_file : NULL);

    /* Chunk of ring-pair blocks whose phase array fits the budget. */
    const size_t per_block = (size_t)(mmax + 1) * CLEF_SHT_BLOCKDBL * sizeof(double) * (size_t)nmaps;
    size_t budget = clef_alm_size(lmax, mmax) * sizeof(double complex) * (size_t)nmaps / 4;
    if (budget < PHASE_BYTES_MIN)
        budget = PHASE_BYTES_MIN;
    size_t cb = budget / per_block;
    if (cb < 1)
        cb = 1;
    if (cb > (size_t)p->nblocks)
        cb = (size_t)p->nblocks;
    p->chunk_blocks = (int)cb;
    p->phase_stride = (size_t)(mmax + 1) * cb * CLEF_SHT_BLOCKDBL;
    p->phase = malloc(p->phase_stride * (size_t)nmaps * sizeof(double));
    /* Touched only when analysis iterates (untouched pages cost no memory). */
    p->delta = malloc(clef_alm_size(lmax, mmax) * (size_t)nmaps * sizeof(double complex));
    if (!p->phase || !p->delta) {
        status = clef_fail(CLEF_ENOMEM, "sht: no memory for transform scratch (nside %lld, lmax %d)",
                           (long long)nside, lmax);
        goto fail;
    }
    if (alloc_threads(p) != CLEF_OK) {
        status = clef_fail(CLEF_ENOMEM, "sht: no memory for per-thread scratch (%d threads)",
                           p->nthreads);
        goto fail;
    }
    *out = p;
    return CLEF_OK;
fail:
    clef_sht_destroy(p);
    return status;
}

void clef_sht_destroy(clef_sht *p)
{
    if (!p)
        return;
    clef_sht_fft_destroy(p);
    if (p->thr)
        for (int t = 0; t < p->nthreads; t++) {
            clef_sht_thread *th = &p->thr[t];
            fftw_free(th->ring);
            fftw_free(th->four);
            free(th->fn);
            free(th->fs);
            free(th->ph1);
            free(th->ph2);
            free(th->abuf);
            free(th->bl);
            clef_sht_mtab_free(&th->tab);
            clef_sht_fft_thread_free(th);
        }
    free(p->thr);
    free(p->plan_r2c);
    free(p->plan_c2r);
    free(p->ring_z);
    free(p->ring_sth);
    free(p->ring_phi0);
    free(p->ring_w);
    free(p->ring_syn_scale);
    free(p->ring_first);
    free(p->ring_npix);
    free(p->ring_shift);
    free(p->pair_x);
    free(p->pair_sth);
    free(p->phase);
    free(p->delta);
    if (p->state)
        clef_sht_mcache_free(p->state->mc, p->mmax);
    free(p->state);
    free(p);
}

int64_t clef_sht_nside(const clef_sht *p) { return p->nside; }
int clef_sht_lmax(const clef_sht *p) { return p->lmax; }
int clef_sht_mmax(const clef_sht *p) { return p->mmax; }
int clef_sht_nrings(const clef_sht *p) { return p->nrings; }

clef_kernel clef_sht_kernel_used(const clef_sht *p)
{
    return p->kern == &clef_sht_avx512_kernel ? CLEF_KERNEL_AVX512
         : p->kern == &clef_sht_avx2_kernel   ? CLEF_KERNEL_AVX2
                                              : CLEF_KERNEL_BASE;
}

int clef_sht_ring_info(const clef_sht *p, int ring, double *z, double *phi0, int64_t *npix,
                       int64_t *first, double *weight)
{
    if (ring < 1 || ring > p->nrings)
        CLEF_FAIL(CLEF_EINVAL, "sht: ring %d outside 1..%d", ring, p->nrings);
    const int r = ring - 1;
    if (z)
        *z = p->ring_z[r];
    if (phi0)
        *phi0 = p->ring_phi0[r];
    if (npix)
        *npix = p->ring_npix[r];
    if (first)
        *first = p->ring_first[r];
    if (weight)
        *weight = p->ring_w[r];
    return CLEF_OK;
}

void clef_sht_timings(const clef_sht *p, double *fft_wall, double *legendre_wall,
                      double *fft_cpu, double *legendre_cpu)
{
    if (fft_wall)
        *fft_wall = p->state->t_fft;
    if (legendre_wall)
        *legendre_wall = p->state->t_leg;
    if (fft_cpu)
        *fft_cpu = p->state->c_fft;
    if (legendre_cpu)
        *legendre_cpu = p->state->c_leg;
}
