/* Executing a transform plan: the ring FFT stage, the Legendre stage
 * driver, analysis with Jacobi iterations, synthesis.
 *
 * Analysis (METHODS.md section 2; Gorski et al. 2005):
 *   F_m(r) = sum_j f_j e^{-i m phi_j} = e^{-i m phi0_r} FFT(f)[m mod n_r],
 *   a_lm   = Omega_pix sum_r w_r lambda_lm(z_r) F_m(r).
 * Synthesis:
 *   G_m(r) = sum_l a_lm lambda_lm(z_r),
 *   f_j    = sum_{|m| <= mmax} G_m(r) e^{i m phi_j}, with G_{-m} = conj(G_m),
 * folded onto the n_r frequencies and done with one inverse real FFT.
 * Rings are processed chunk by chunk (a bounded block of ring pairs): the
 * FFT stage runs in parallel over pairs, the Legendre stage in parallel over
 * m with a dynamic schedule (work per m falls with m).  Every sum is done
 * in a fixed order by one thread, so results do not depend on the number of
 * threads.
 */
#define _POSIX_C_SOURCE 200809L
#include <math.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include <omp.h>

#include "core_impl.h"
#include "sht_impl.h"

#define BL CLEF_SHT_BLOCK

/* Stage timer: wall and process CPU seconds. */
typedef struct stamp {
    double w;
} stamp;

static stamp now(void) { return (stamp){clef_wtime()}; }

static void add_since(stamp t0, double *w)
{
    *w += now().w - t0.w;
}

/* CPU seconds of the calling thread: summed over the threads of a stage,
 * excluding waits at its end, it measures the work itself even when other
 * programs time-share the cores. */
static double thread_cpu(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

static int nthreads_for(const clef_sht *p)
{
    const int n = omp_get_max_threads();
    return n < p->nthreads ? n : p->nthreads;
}

/* Phase factors e^{-i m phi0} for m = 0..mmax as ph1[m % 64] * ph2[m / 64].
 * phi0 = shift pi / n, so m phi0 is reduced exactly: angle = pi k / n with
 * k = (m shift) mod 2n. */
static void phase_tables(const clef_sht *p, clef_sht_thread *th, int r)
{
    const int n = p->ring_npix[r];
    for (int m = 0; m < 64; m++) {
        const long k = (long)m % (2L * n);
        th->ph1[m] = cexp(-I * CLEF_PI * (double)k / n);
    }
    for (int q = 0; q <= p->mmax / 64; q++) {
        const long k = (64L * q) % (2L * n);
        th->ph2[q] = cexp(-I * CLEF_PI * (double)k / n);
    }
}

static inline double complex phase_at(const clef_sht_thread *th, int shift, int m)
{
    return shift ? th->ph1[m & 63] * th->ph2[m >> 6] : 1.0;
}

/* F_m for one ring of a map (already scaled by w_r Omega_pix) into out[m * nmaps]. */
static void ring_analysis(const clef_sht *p, clef_sht_thread *th, int r, const double *pix,
                          double complex *out, int nmaps)
{
    const int n = p->ring_npix[r], shift = p->ring_shift[r];
    double complex *c = (double complex *)th->four;
    clef_sht_ring_r2c(p, th, n, pix, c);
    const double wt = p->ring_w[r] * p->domega;
    int k = 0;
    for (int m = 0; m <= p->mmax; m++) {
        const double complex v = k <= n / 2 ? c[k] : conj(c[n - k]);
        out[(size_t)m * nmaps] = wt * v * phase_at(th, shift, m);
        if (++k == n)
            k = 0;
    }
}

/* Ring values from G_m (in g[m * nmaps]) into th->ring. */
static void ring_synthesis(const clef_sht *p, clef_sht_thread *th, int r,
                           const double complex *g, int nmaps)
{
    const int n = p->ring_npix[r], shift = p->ring_shift[r];
    double complex *c = (double complex *)th->four;
    for (int k = 0; k <= n / 2; k++)
        c[k] = 0.0;
    int k = 0;
    for (int m = 0; m <= p->mmax; m++) {
        const double complex v = g[(size_t)m * nmaps] * conj(phase_at(th, shift, m));
        if (m == 0) {
            c[0] += v;
        } else {
            /* +m lands on k = m mod n, -m on n - k (mod n). */
            const int kk = k == 0 ? 0 : n - k;
            if (k <= n / 2)
                c[k] += v;
            if (kk <= n / 2)
                c[kk] += conj(v);
        }
        if (++k == n)
            k = 0;
    }
    clef_sht_ring_c2r(p, th, n, c);
}

static inline double *phase_at_m(const clef_sht *p, int j, int m, int b)
{
    return p->phase + (size_t)j * p->phase_stride +
           ((size_t)m * p->chunk_blocks + (size_t)b) * CLEF_SHT_BLOCKDBL;
}

enum fft_mode { FFT_ANALYSIS, FFT_SYNTHESIS, FFT_RESIDUAL };

/* FFT stage over the pairs of chunk [b0, b0 + nb) blocks. */
static void fft_stage(const clef_sht *p, enum fft_mode mode, int b0, int nb, int nmaps,
                      const double *const *map, double *const *out)
{
    const int q0 = b0 * BL, q1 = (b0 + nb) * BL;
#pragma omp parallel num_threads(nthreads_for(p))
    {
    const double c0 = thread_cpu();
#pragma omp for schedule(dynamic, 4) nowait
    for (int q = q0; q < q1; q++) {
        clef_sht_thread *th = &p->thr[omp_get_thread_num()];
        const int b = q / BL - b0, lane = q % BL;
        if (q >= p->npairs) {
            if (mode != FFT_SYNTHESIS)
                for (int j = 0; j < nmaps; j++)
                    for (int m = 0; m <= p->mmax; m++) {
                        double *ph = phase_at_m(p, j, m, b);
                        for (int s = 0; s < 4; s++)
                            ph[s * BL + lane] = 0.0;
                    }
            continue;
        }
        const int rn = q, rs = p->nrings - 1 - q, eq = rn == rs;
        const int nring = eq ? 1 : 2;
        for (int h = 0; h < nring; h++) {
            const int r = h ? rs : rn;
            double complex *f = h ? th->fs : th->fn;
            phase_tables(p, th, r);
            const int64_t first = p->ring_first[r];
            const int n = p->ring_npix[r];
            for (int j = 0; j < nmaps; j++) {
                if (mode != FFT_ANALYSIS) {
                    /* G_m for this ring from the Legendre stage: E + O north, E - O south. */
                    for (int m = 0; m <= p->mmax; m++) {
                        const double *ph = phase_at_m(p, j, m, b);
                        const double sg = h ? -1.0 : 1.0;
                        f[(size_t)m * nmaps + j] =
                            (ph[0 * BL + lane] + sg * ph[2 * BL + lane]) +
                            I * (ph[1 * BL + lane] + sg * ph[3 * BL + lane]);
                    }
                    ring_synthesis(p, th, r, f + j, nmaps);
                    if (p->ring_syn_scale)
                        for (int i = 0; i < n; i++)
                            th->ring[i] *= p->ring_syn_scale[r];
                    if (mode == FFT_SYNTHESIS) {
                        memcpy(out[j] + first, th->ring, (size_t)n * sizeof(double));
                        continue;
                    }
                    for (int i = 0; i < n; i++)
                        th->ring[i] = map[j][first + i] - th->ring[i];
                    ring_analysis(p, th, r, th->ring, f + j, nmaps);
                } else {
                    ring_analysis(p, th, r, map[j] + first, f + j, nmaps);
                }
            }
        }
        if (mode == FFT_SYNTHESIS)
            continue;
        for (int j = 0; j < nmaps; j++)
            for (int m = 0; m <= p->mmax; m++) {
                const double complex fn = th->fn[(size_t)m * nmaps + j];
                const double complex fs = eq ? 0.0 : th->fs[(size_t)m * nmaps + j];
                double *ph = phase_at_m(p, j, m, b);
                ph[0 * BL + lane] = creal(fn + fs);
                ph[1 * BL + lane] = cimag(fn + fs);
                ph[2 * BL + lane] = creal(fn - fs);
                ph[3 * BL + lane] = cimag(fn - fs);
            }
    }
    const double dc = thread_cpu() - c0;
#pragma omp atomic
    p->state->c_fft += dc;
    }
}

void clef_sht_mcache_free(clef_sht_mcache *mc, int mmax)
{
    if (!mc)
        return;
    if (mc->rescale)
        for (int m = 0; m <= mmax; m++)
            free(mc->rescale[m]);
    free(mc->rescale);
    free(mc->sigma);
    free(mc->nrescale);
    free(mc->pref);
    free(mc->filled);
    free(mc);
}

/* The table cache of a plan with more than one chunk, made before the
 * first chunk's parallel region (serial code); without memory for it the
 * tables are recomputed as before. */
static void mcache_ensure(const clef_sht *p)
{
    clef_sht_state *st = p->state;
    if (st->mc || st->mc_failed || p->nblocks <= p->chunk_blocks)
        return;
    const size_t nm = (size_t)p->mmax + 1;
    clef_sht_mcache *mc = calloc(1, sizeof *mc);
    if (mc) {
        mc->sigma = malloc(clef_alm_size(p->lmax, p->mmax) * sizeof *mc->sigma);
        mc->rescale = calloc(nm, sizeof *mc->rescale);
        mc->nrescale = calloc(nm, sizeof *mc->nrescale);
        mc->pref = calloc(nm, sizeof *mc->pref);
        mc->filled = calloc(nm, sizeof *mc->filled);
    }
    if (!mc || !mc->sigma || !mc->rescale || !mc->nrescale || !mc->pref || !mc->filled) {
        clef_sht_mcache_free(mc, p->mmax);
        st->mc_failed = 1;
        return;
    }
    st->mc = mc;
}

/* The recurrence table of m in t: from the plan's cache when an earlier
 * chunk or pass filled it (the same bits: a copy), else computed (and
 * kept). */
static void mtab_get(const clef_sht *p, clef_sht_mtab *t, int m)
{
    const int lmax = p->lmax;
    clef_sht_mcache *mc = p->state->mc;
    if (!mc) {
        clef_sht_mtab_fill(t, m, lmax);
        return;
    }
    double *sig = mc->sigma + clef_alm_index(lmax, m, m);
    const size_t nl = (size_t)(lmax - m + 1);
    if (mc->filled[m]) {
        t->m = m;
        t->lmax = lmax;
        t->pref = mc->pref[m];
        t->nrescale = mc->nrescale[m];
        memcpy(t->rescale, mc->rescale[m], (size_t)t->nrescale * sizeof *t->rescale);
        memcpy(t->sigma + m, sig, nl * sizeof *sig);
        clef_sht_mtab_fill_c(t, m, lmax);
        return;
    }
    clef_sht_mtab_fill(t, m, lmax);
    int *r = malloc(((size_t)t->nrescale + 1) * sizeof *r);
    if (!r) /* this m is recomputed next time */
        return;
    memcpy(r, t->rescale, (size_t)t->nrescale * sizeof *r);
    mc->rescale[m] = r;
    mc->nrescale[m] = t->nrescale;
    mc->pref[m] = t->pref;
    memcpy(sig, t->sigma + m, nl * sizeof *sig);
    mc->filled[m] = 1;
}

/* Legendre stage, analysis: alm[j] += contributions of the chunk's pairs. */
static void legendre_analysis(const clef_sht *p, int b0, int nb, int nmaps,
                              double complex *const *alm)
{
    const int lmax = p->lmax;
    mcache_ensure(p);
#pragma omp parallel num_threads(nthreads_for(p))
    {
    const double c0 = thread_cpu();
#pragma omp for schedule(dynamic, 1) nowait
    for (int m = 0; m <= p->mmax; m++) {
        clef_sht_thread *th = &p->thr[omp_get_thread_num()];
        clef_sht_mtab *t = &th->tab;
        mtab_get(p, t, m);
        const int vl = p->kern->vl;
        const size_t row = (size_t)nmaps * 2 * vl;
        memset(th->abuf + (size_t)m * row, 0, (size_t)(lmax - m + 1) * row * sizeof(double));
        p->kern->analysis(t, nb, p->pair_x + (size_t)b0 * BL, p->pair_sth + (size_t)b0 * BL,
                                 phase_at_m(p, 0, m, 0), p->phase_stride, nmaps, th->abuf);
        for (int l = m; l <= lmax; l++)
            for (int j = 0; j < nmaps; j++) {
                const double *ab = th->abuf + ((size_t)l * nmaps + j) * row / nmaps;
                double re = 0.0, im = 0.0;
                for (int i = 0; i < vl; i++) {
                    re += ab[i];
                    im += ab[vl + i];
                }
                alm[j][clef_alm_index(lmax, l, m)] += t->sigma[l] * (re + I * im);
            }
    }
    const double dc = thread_cpu() - c0;
#pragma omp atomic
    p->state->c_leg += dc;
    }
}

/* Legendre stage, synthesis: the chunk's phase array from alm. */
static void legendre_synthesis(const clef_sht *p, int b0, int nb, int nmaps,
                               const double complex *const *alm)
{
    const int lmax = p->lmax;
    mcache_ensure(p);
#pragma omp parallel num_threads(nthreads_for(p))
    {
    const double c0 = thread_cpu();
#pragma omp for schedule(dynamic, 1) nowait
    for (int m = 0; m <= p->mmax; m++) {
        clef_sht_thread *th = &p->thr[omp_get_thread_num()];
        clef_sht_mtab *t = &th->tab;
        mtab_get(p, t, m);
        for (int l = m; l <= lmax; l++)
            for (int j = 0; j < nmaps; j++)
                th->bl[(size_t)l * nmaps + j] = t->sigma[l] * alm[j][clef_alm_index(lmax, l, m)];
        p->kern->synthesis(t, nb, p->pair_x + (size_t)b0 * BL, p->pair_sth + (size_t)b0 * BL,
                                  phase_at_m(p, 0, m, 0), p->phase_stride, nmaps, th->bl);
    }
    const double dc = thread_cpu() - c0;
#pragma omp atomic
    p->state->c_leg += dc;
    }
}

static int check_args(const clef_sht *p, int nmaps, const void *in, const void *out,
                      const char *what)
{
    if (!p)
        CLEF_FAIL(CLEF_EINVAL, "sht %s: plan is NULL", what);
    if (nmaps < 1 || nmaps > p->nmaps)
        CLEF_FAIL(CLEF_EINVAL, "sht %s: nmaps = %d outside 1..%d (the plan's nmaps)", what, nmaps,
                  p->nmaps);
    if (!in || !out)
        CLEF_FAIL(CLEF_EINVAL, "sht %s: input or output array list is NULL", what);
    return CLEF_OK;
}

/* One analysis pass over all chunks into acc (zeroed first).  With a
 * non-NULL `prev`, analyses the residual map - S prev instead (declared in
 * sht_impl.h: the spin-2 transform, sht_spin.c, iterates through it). */
void clef_sht_analysis_pass(const clef_sht *p, int nmaps, const double *const *map,
                          const double complex *const *prev, double complex *const *acc)
{
    const size_t nalm = clef_alm_size(p->lmax, p->mmax);
    for (int j = 0; j < nmaps; j++)
        memset(acc[j], 0, nalm * sizeof(double complex));
    for (int b0 = 0; b0 < p->nblocks; b0 += p->chunk_blocks) {
        const int nb = p->nblocks - b0 < p->chunk_blocks ? p->nblocks - b0 : p->chunk_blocks;
        clef_sht_state *st = p->state;
        stamp t0 = now();
        if (prev) {
            legendre_synthesis(p, b0, nb, nmaps, prev);
            add_since(t0, &st->t_leg);
            t0 = now();
        }
        fft_stage(p, prev ? FFT_RESIDUAL : FFT_ANALYSIS, b0, nb, nmaps, map, NULL);
        add_since(t0, &st->t_fft);
        t0 = now();
        legendre_analysis(p, b0, nb, nmaps, acc);
        add_since(t0, &st->t_leg);
    }
}

int clef_sht_analysis(const clef_sht *p, int nmaps, const double *const *map,
                      double complex *const *alm, int iterations)
{
    CLEF_TRY(check_args(p, nmaps, map, alm, "analysis"));
    if (iterations < 0 || iterations > 1000)
        CLEF_FAIL(CLEF_EINVAL, "sht analysis: iterations = %d outside 0..1000", iterations);
    for (int j = 0; j < nmaps; j++)
        if (!map[j] || !alm[j])
            CLEF_FAIL(CLEF_EINVAL, "sht analysis: map or a_lm array %d is NULL", j);
    memset(p->state, 0, sizeof *p->state);
    clef_sht_analysis_pass(p, nmaps, map, NULL, alm);
    const size_t nalm = clef_alm_size(p->lmax, p->mmax);
    double complex *delta[64];
    for (int j = 0; j < nmaps; j++)
        delta[j] = p->delta + (size_t)j * nalm;
    /* Jacobi iteration a <- a + A (m - S a) (METHODS.md section 2). */
    for (int it = 0; it < iterations; it++) {
        clef_progress("sht-iterations", (double)it / iterations);
        clef_sht_analysis_pass(p, nmaps, map, (const double complex *const *)alm, delta);
        for (int j = 0; j < nmaps; j++)
            for (size_t i = 0; i < nalm; i++)
                alm[j][i] += delta[j][i];
    }
    if (iterations)
        clef_progress("sht-iterations", 1.0);
    return CLEF_OK;
}

int clef_sht_synthesis(const clef_sht *p, int nmaps, const double complex *const *alm,
                       double *const *map)
{
    CLEF_TRY(check_args(p, nmaps, alm, map, "synthesis"));
    for (int j = 0; j < nmaps; j++)
        if (!map[j] || !alm[j])
            CLEF_FAIL(CLEF_EINVAL, "sht synthesis: map or a_lm array %d is NULL", j);
    memset(p->state, 0, sizeof *p->state);
    for (int b0 = 0; b0 < p->nblocks; b0 += p->chunk_blocks) {
        const int nb = p->nblocks - b0 < p->chunk_blocks ? p->nblocks - b0 : p->chunk_blocks;
        stamp t0 = now();
        legendre_synthesis(p, b0, nb, nmaps, alm);
        add_since(t0, &p->state->t_leg);
        t0 = now();
        fft_stage(p, FFT_SYNTHESIS, b0, nb, nmaps, NULL, map);
        add_since(t0, &p->state->t_fft);
    }
    return CLEF_OK;
}
