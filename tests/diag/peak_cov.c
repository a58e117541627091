/* Diagnostic of the first-peak error on the main setting of
 * tests/test_peak_sky.c (issue 11): not a test (it asserts nothing) but the
 * program behind the "Where the under-coverage comes from" figures of
 * docs/peak.md.  Build: make diag-peak.  Run:
 *   build/tests/diag/peak_cov NSKY SKY0 WIDTH NMC
 * (Omega_k = 0 model, the test's seeds 90000 + sky, bins WIDTH wide).
 * 1. Band powers: ensemble mean and covariance of the NSKY skies' D_b
 *    against the analytic covariance the fit uses (src/spectrum_cov.c, the
 *    narrow-kernel approximation, Garcia-Garcia et al. 2019, section 3.2):
 *    variance ratio and neighbour correlations, bins 60 < l_eff < 420.
 * 2. The peak on the skies: scatter, mean quoted error and 1-sigma
 *    coverage, the automatic half width (w0) and 1.5 times it (w1).
 * 3. Parametric Monte Carlo (Efron & Tibshirani 1993, An Introduction to
 *    the Bootstrap, section 6.5): NMC Gaussian draws of the band powers
 *    around their mean sum_l W_bl D_l, with the analytic covariance and
 *    with the skies' sample covariance, through the same clef_peak_find:
 *    the scatter the quoted (first-order) error should match. */
#define _DEFAULT_SOURCE /* M_PI */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <lapacke.h>
#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>
#include "clef/bins.h"
#include "clef/cosmo.h"
#include "clef/mask.h"
#include "clef/peak.h"
#include "clef/sht.h"
#include "clef/sim.h"
#include "clef/spectrum.h"
#include "clef/theory.h"
#define NSIDE 256
#define LMAX 512
#define LSIM 767
#define MAXB 300
#define MAXS 400
static double D[MAXS][MAXB], LP[MAXS][2], ER[MAXS][2], ES[MAXS][2];

static void fitmc(const clef_bandpowers *bp, const double *mean, const double *cov, int nb, int nmc,
                  gsl_rng *r, double lt, const char *tag)
{
    double *L = malloc(sizeof(double) * nb * nb);
    memcpy(L, cov, sizeof(double) * nb * nb);
    if (LAPACKE_dpotrf(LAPACK_ROW_MAJOR, 'L', nb, L, nb)) { printf("chol fail %s\n", tag); return; }
    double *dl = malloc(sizeof(double) * nb), z[MAXB];
    clef_bandpowers x = *bp; x.dl = dl;
    for (int w = 0; w < 2; w++) {
        double s = 0, s2 = 0, se = 0, sst = 0, ssh = 0; int n = 0, cov1 = 0;
        for (int m = 0; m < nmc; m++) {
            for (int i = 0; i < nb; i++) z[i] = gsl_ran_ugaussian(r);
            for (int i = 0; i < nb; i++) { double a = mean[i]; for (int j = 0; j <= i; j++) a += L[i*nb+j]*z[j]; dl[i] = a; }
            clef_peak_opts po; clef_peak_opts_default(&po);
            po.half_width = w ? 1.5 * clef_peak_half_width(&x, &po) : 0;
            clef_peak_result pr; clef_peak_find(&x, &po, &pr);
            if (!pr.found) continue;
            n++; s += pr.l_peak; s2 += pr.l_peak*pr.l_peak; se += pr.l_peak_err; sst += pr.l_peak_err_stat; ssh += pr.l_peak_err_shape;
            cov1 += fabs(pr.l_peak - lt) <= pr.l_peak_err;
        }
        double mu = s/n, sd = sqrt(s2/n - mu*mu);
        printf("MC[%s] w%d: n %d mean-truth %+.2f scatter %.3f mean err %.3f (stat %.3f shape %.3f) ratio %.3f cover %.1f%%\n",
               tag, w, n, mu - lt, sd, se/n, sst/n, ssh/n, se/n/sd, 100.0*cov1/n);
    }
    free(L); free(dl);
}

int main(int argc, char **argv)
{
    int nsky = argc > 1 ? atoi(argv[1]) : 100, sky0 = argc > 2 ? atoi(argv[2]) : 100;
    int width = argc > 3 ? atoi(argv[3]) : 20;
    if (nsky < 2 || nsky > MAXS || width < 1) {
        fprintf(stderr, "usage: peak_cov NSKY(2..%d) SKY0 WIDTH NMC\n", MAXS);
        return 2;
    }
    double *cl = calloc(LSIM + 1, sizeof(double)), lt;
    clef_cosmo_params cp; clef_cosmo_params_planck2018(&cp);
    clef_theory_cl(&cp, LSIM, cl); clef_theory_first_peak(&cp, &lt, NULL);
    clef_map *full = NULL, *mask = NULL;
    clef_mask_full(&full, NSIDE); clef_mask_cut_latitude(full, 20 * M_PI / 180);
    clef_mask_apod_opts ao = {CLEF_MASK_APOD_C2, 8 * M_PI / 180, 0};
    clef_mask_apodize(&mask, full, &ao);
    double nl[LSIM + 1]; const double sig = clef_sim_sigma_pix(NSIDE, 30.0);
    for (int l = 0; l <= LSIM; l++) nl[l] = sig * sig * 4 * M_PI / (12.0 * NSIDE * NSIDE);
    clef_bins *bins; clef_bins_create_linear(&bins, 2, width, LMAX, CLEF_BINS_DL);
    clef_map *map = NULL; clef_map_alloc(&map, NSIDE);
    clef_sht *sht = NULL; clef_sht_create(&sht, NSIDE, LSIM, NULL);
    clef_spectrum_opts so; clef_spectrum_opts_default(&so);
    so.lmax = LMAX; so.beam_fwhm = 10; so.pixel_window = 1; so.noise_cl = nl; so.noise_lmax = LSIM;
    so.find_peak = 0; so.theory_lmax = LSIM; so.bins = bins; so.theory_cl = cl;
    clef_spectrum_result res0; int nb = 0; clef_bandpowers *bp0 = NULL;
    for (int s = sky0; s < sky0 + nsky; s++) {
        clef_sim_opts sim = {0}; sim.seed = 90000 + s; sim.beam_fwhm = 10; sim.pixel_window = 1; sim.noise_depth = 30;
        double *maps[1] = {map->pix};
        clef_sim_map(sht, cl, &sim, NULL, maps, NULL);
        clef_spectrum_result res;
        if (clef_spectrum_compute(map, NULL, mask, NULL, &so, &res)) { printf("fail\n"); return 1; }
        nb = res.bp->nbins;
        if (nb > MAXB) {
            fprintf(stderr, "more than %d bins\n", MAXB);
            return 2;
        }
        for (int b = 0; b < nb; b++) D[s - sky0][b] = res.bp->dl[b];
        for (int w = 0; w < 2; w++) {
            clef_peak_opts po; clef_peak_opts_default(&po);
            po.half_width = w ? 1.5 * clef_peak_half_width(res.bp, &po) : 0;
            clef_peak_result pr; clef_peak_find(res.bp, &po, &pr);
            LP[s-sky0][w] = pr.found ? pr.l_peak : NAN; ER[s-sky0][w] = pr.l_peak_err; ES[s-sky0][w] = pr.l_peak_err_stat;
        }
        if (s == sky0) { res0 = res; bp0 = res.bp; } else clef_spectrum_result_free(&res);
    }
    const clef_bandpowers *bp = bp0;
    /* mean band powers from windows */
    int wl = bp->win_lmax + 1; double mean[MAXB], emean[MAXB], ecov[MAXB*MAXB];
    for (int b = 0; b < nb; b++) { mean[b] = 0; for (int l = 2; l < wl && l <= LSIM; l++) mean[b] += bp->win[(size_t)b*wl+l]*cl[l]*l*(l+1.0)/(2*M_PI); }
    for (int b = 0; b < nb; b++) { emean[b] = 0; for (int s = 0; s < nsky; s++) emean[b] += D[s][b]; emean[b] /= nsky; }
    for (int a = 0; a < nb; a++) for (int b = 0; b < nb; b++) { double z = 0; for (int s = 0; s < nsky; s++) z += (D[s][a]-emean[a])*(D[s][b]-emean[b]); ecov[a*nb+b] = z/(nsky-1); }
    printf("width %d, %d skies %d..: bin l_eff  (emean-mean)/sd  var_emp/var_ana  corr1_emp corr1_ana corr2_emp corr2_ana\n", width, nsky, sky0);
    double rsum = 0; int rn = 0;
    for (int b = 0; b < nb; b++) {
        if (bp->l_eff[b] < 60 || bp->l_eff[b] > 420) continue;
        double va = bp->cov[b*nb+b], ve = ecov[b*nb+b];
        double c1e = b+1<nb ? ecov[b*nb+b+1]/sqrt(ve*ecov[(b+1)*nb+b+1]) : 0, c1a = b+1<nb ? bp->cov[b*nb+b+1]/sqrt(va*bp->cov[(b+1)*nb+b+1]) : 0;
        double c2e = b+2<nb ? ecov[b*nb+b+2]/sqrt(ve*ecov[(b+2)*nb+b+2]) : 0, c2a = b+2<nb ? bp->cov[b*nb+b+2]/sqrt(va*bp->cov[(b+2)*nb+b+2]) : 0;
        printf("  %3d %6.1f %+6.2f %6.3f  %+6.3f %+6.3f  %+6.3f %+6.3f\n", b, bp->l_eff[b], (emean[b]-mean[b])/sqrt(va/nsky), ve/va, c1e, c1a, c2e, c2a);
        if (bp->l_eff[b] > 100 && bp->l_eff[b] < 350) { rsum += ve/va; rn++; }
    }
    printf("mean var ratio (100<l<350): %.3f (s.e. of one ratio %.3f)\n", rsum/rn, sqrt(2.0/(nsky-1)));
    for (int w = 0; w < 2; w++) {
        double s = 0, s2 = 0, se = 0; int n = 0, c = 0;
        for (int k = 0; k < nsky; k++) if (isfinite(LP[k][w])) { n++; s += LP[k][w]; s2 += LP[k][w]*LP[k][w]; se += ER[k][w]; c += fabs(LP[k][w]-lt) <= ER[k][w]; }
        double mu = s/n; printf("skies w%d: mean-truth %+.2f scatter %.3f mean err %.3f ratio %.3f cover %.1f%%\n", w, mu-lt, sqrt(s2/n-mu*mu), se/n, se/n/sqrt(s2/n-mu*mu), 100.0*c/n);
    }
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937); gsl_rng_set(r, 7);
    int nmc = argc > 4 ? atoi(argv[4]) : 500;
    if (nmc > 0) {
        fitmc(bp, mean, bp->cov, nb, nmc, r, lt, "analytic cov");
        fitmc(bp, mean, ecov, nb, nmc, r, lt, "empirical cov");
    }
    gsl_rng_free(r);
    clef_spectrum_result_free(&res0);
    return 0;
}
