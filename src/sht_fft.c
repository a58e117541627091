/* Ring DFTs for the transform.  HEALPix rings have 4 nside - 1 lengths
 * n = 4 i (i = 1..nside); planning an FFTW plan for each costs seconds at
 * nside 2048 (FFTW_ESTIMATE, measured ~5 ms per r2c + c2r pair) and holds
 * twiddles for every length.  We therefore plan FFTW real transforms only
 * for the belt length 4 nside and short cap rings (n <= SMALL_N), and do
 * the other cap rings with Bluestein's chirp-z algorithm (Bluestein 1970,
 * IEEE Trans. Audio Electroacoust. 18, 451; Rabiner, Schafer & Rader 1969)
 * on power-of-two complex FFTW plans:
 *   X_k = w_k sum_j (x_j w_j) conj(w_{k-j}),  w_j = e^{-i pi j^2 / n},
 * a circular convolution of length N >= 2n - 1.  j^2 is reduced modulo
 * 2n in integers, so every chirp factor is one correctly rounded sincos. */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "sht_impl.h"

#define SMALL_N 32

static int use_fftw(const clef_sht *p, int n) { return n <= SMALL_N || n == 4 * p->nside; }

int clef_sht_fft_plan(clef_sht *p, unsigned flags)
{
    const int64_t ns = p->nside;
    int lg = 0;
    while (((size_t)1 << lg) < 2 * (size_t)(4 * ns) - 1)
        lg++;
    p->blu_log2 = lg;
    p->blu_nmax = (size_t)1 << lg;
    p->pow2_fwd = calloc((size_t)lg + 1, sizeof(fftw_plan));
    p->pow2_bwd = calloc((size_t)lg + 1, sizeof(fftw_plan));
    double *in = fftw_malloc(sizeof(double) * 4 * (size_t)ns);
    fftw_complex *out = fftw_malloc(sizeof(fftw_complex) * p->blu_nmax);
    fftw_complex *out2 = fftw_malloc(sizeof(fftw_complex) * p->blu_nmax);
    int status = CLEF_OK;
    if (!p->pow2_fwd || !p->pow2_bwd || !in || !out || !out2) {
        status = clef_fail(CLEF_ENOMEM, "sht: no memory for FFT planning at nside %lld", (long long)ns);
        goto done;
    }
    for (int64_t i = 1; i <= ns; i++) {
        const int n = (int)(4 * i);
        if (!use_fftw(p, n))
            continue;
        p->plan_r2c[i - 1] = fftw_plan_dft_r2c_1d(n, in, out, flags);
        p->plan_c2r[i - 1] = fftw_plan_dft_c2r_1d(n, out, in, flags);
        if (!p->plan_r2c[i - 1] || !p->plan_c2r[i - 1]) {
            status = clef_fail(CLEF_ENOMEM, "sht: FFTW could not plan a ring FFT of length %d", n);
            goto done;
        }
    }
    for (int k = 0; k <= lg; k++) {
        const int n = 1 << k;
        p->pow2_fwd[k] = fftw_plan_dft_1d(n, out, out2, FFTW_FORWARD, flags);
        p->pow2_bwd[k] = fftw_plan_dft_1d(n, out, out2, FFTW_BACKWARD, flags);
        if (!p->pow2_fwd[k] || !p->pow2_bwd[k]) {
            status = clef_fail(CLEF_ENOMEM, "sht: FFTW could not plan a complex FFT of length %d", n);
            goto done;
        }
    }
done:
    fftw_free(in);
    fftw_free(out);
    fftw_free(out2);
    return status;
}

void clef_sht_fft_destroy(clef_sht *p)
{
    if (p->plan_r2c)
        for (int64_t i = 0; i < p->nside; i++) {
            if (p->plan_r2c[i])
                fftw_destroy_plan(p->plan_r2c[i]);
            if (p->plan_c2r[i])
                fftw_destroy_plan(p->plan_c2r[i]);
        }
    if (p->pow2_fwd)
        for (int k = 0; k <= p->blu_log2; k++) {
            if (p->pow2_fwd[k])
                fftw_destroy_plan(p->pow2_fwd[k]);
            if (p->pow2_bwd[k])
                fftw_destroy_plan(p->pow2_bwd[k]);
        }
    free(p->pow2_fwd);
    free(p->pow2_bwd);
}

int clef_sht_fft_thread_alloc(const clef_sht *p, clef_sht_thread *th)
{
    th->blu_n = 0;
    th->chirp = fftw_malloc(sizeof(double complex) * 4 * (size_t)p->nside);
    th->bspec = fftw_malloc(sizeof(fftw_complex) * p->blu_nmax);
    th->bw1 = fftw_malloc(sizeof(fftw_complex) * p->blu_nmax);
    th->bw2 = fftw_malloc(sizeof(fftw_complex) * p->blu_nmax);
    th->four2 = fftw_malloc(sizeof(fftw_complex) * 4 * (size_t)p->nside);
    return th->chirp && th->bspec && th->bw1 && th->bw2 && th->four2 ? CLEF_OK : CLEF_ENOMEM;
}

void clef_sht_fft_thread_free(clef_sht_thread *th)
{
    fftw_free(th->chirp);
    fftw_free(th->bspec);
    fftw_free(th->bw1);
    fftw_free(th->bw2);
    fftw_free(th->four2);
}

static int conv_log2(int n)
{
    int lg = 0;
    while ((1 << lg) < 2 * n - 1)
        lg++;
    return lg;
}

/* Chirp w_j = e^{-i pi j^2 / n} and the spectrum of the filter
 * b_j = conj(w_|j|) (circular, length N), cached per ring length. */
static void bluestein_setup(const clef_sht *p, clef_sht_thread *th, int n)
{
    if (th->blu_n == n)
        return;
    const int lg = conv_log2(n);
    const size_t N = (size_t)1 << lg;
    for (int j = 0; j < n; j++) {
        const long long k = ((long long)j * j) % (2LL * n);
        th->chirp[j] = cexp(-I * (CLEF_PI * (double)k / n));
    }
    double complex *b = (double complex *)th->bw1;
    memset(b, 0, N * sizeof *b);
    b[0] = conj(th->chirp[0]);
    for (int j = 1; j < n; j++)
        b[j] = b[N - j] = conj(th->chirp[j]);
    fftw_execute_dft(p->pow2_fwd[lg], th->bw1, th->bspec);
    th->blu_n = n;
}

/* Full complex DFT (forward sign) of x[0..n-1] into X[0..n-1] by Bluestein. */
static void bluestein(const clef_sht *p, clef_sht_thread *th, int n, const double complex *x,
                      double complex *X)
{
    bluestein_setup(p, th, n);
    const int lg = conv_log2(n);
    const size_t N = (size_t)1 << lg;
    double complex *a = (double complex *)th->bw1, *A = (double complex *)th->bw2;
    const double complex *B = (const double complex *)th->bspec;
    for (int j = 0; j < n; j++)
        a[j] = x[j] * th->chirp[j];
    memset(a + n, 0, (N - (size_t)n) * sizeof *a);
    fftw_execute_dft(p->pow2_fwd[lg], th->bw1, th->bw2);
    const double inv = 1.0 / (double)N;
    for (size_t k = 0; k < N; k++)
        A[k] *= B[k] * inv;
    fftw_execute_dft(p->pow2_bwd[lg], th->bw2, th->bw1);
    for (int k = 0; k < n; k++)
        X[k] = th->chirp[k] * a[k];
}

void clef_sht_ring_r2c(const clef_sht *p, clef_sht_thread *th, int n, const double *in,
                       double complex *out)
{
    if (use_fftw(p, n)) {
        if (in != th->ring)
            memcpy(th->ring, in, (size_t)n * sizeof(double));
        fftw_execute_dft_r2c(p->plan_r2c[n / 4 - 1], th->ring, (fftw_complex *)out);
        return;
    }
    double complex *x = (double complex *)th->four2;
    for (int j = 0; j < n; j++)
        x[j] = in[j];
    bluestein(p, th, n, x, x);
    memcpy(out, x, ((size_t)n / 2 + 1) * sizeof *out);
}

void clef_sht_ring_c2r(const clef_sht *p, clef_sht_thread *th, int n, double complex *in)
{
    in[0] = creal(in[0]);
    in[n / 2] = creal(in[n / 2]);
    if (use_fftw(p, n)) {
        fftw_execute_dft_c2r(p->plan_c2r[n / 4 - 1], (fftw_complex *)in, th->ring);
        return;
    }
    /* f_j = sum_k C_k e^{+2 pi i jk/n} = Re DFT(conj C)_j for Hermitian C. */
    double complex *y = (double complex *)th->four2;
    for (int k = 0; k <= n / 2; k++)
        y[k] = conj(in[k]);
    for (int k = n / 2 + 1; k < n; k++)
        y[k] = in[n - k];
    bluestein(p, th, n, y, y);
    for (int j = 0; j < n; j++)
        th->ring[j] = creal(y[j]);
}
