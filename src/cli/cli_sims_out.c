/* clef sims: the products of an ensemble, made by rank 0 from the records
 * of the run folder in index order (so they do not depend on which rank
 * made which realisation): mean band powers with the Monte Carlo
 * covariance (a band-power table any clef command reads), the per-bin
 * products (bias, noise bias, covariance ratio, transfer function), the
 * transfer function as 'l F_l' for --transfer, the covariance figure and
 * the JSON summary with the accounting (docs/ensemble.md). */
#define _GNU_SOURCE
#include <cjson/cJSON.h>
#include <fitsio.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "clef/ensemble.h"
#include "clef/plot.h"
#include "cli.h"
#include "cli_par.h"
#include "cli_sims.h"

/* Everything computed from the records. */
typedef struct products {
    int nb, n, nn, wl;
    sims_windows w;
    double *d, *dn;                 /* n x nb signal, nn x nb noise-only band powers */
    double *mean, *sem, *mc_cov, *an_cov, *expect, *bias, *nmean, *nsem, *ratio, *corr_diff;
    double *fb, *fb_err, *fl;      /* Hivon et al.'s iteration on the pseudo-spectra */
    double *c, *cn;                 /* n x nb, nn x nb pseudo-spectrum bin sums */
    double *fb_bp, *fb_bp_err;      /* cross-check: the solve on the decoupled band powers */
    int hivon_iters;
    double max_ratio_dev, max_corr_diff;
    int noise_subtracted;           /* the noise-only mean was taken off before bias and F */
    double *pl, *ple, *pd, *pde;    /* first peak per realisation */
    int *pok;
    int peak_truth_found;
    double l_true, d_true, l_pull, l_pull_sd, l_cov, d_pull, d_pull_sd, d_cov;
    int peak_used;
    char peak_reason[300];          /* why there is no calibration, or "" */
    uint64_t *seeds, *nseeds;
    double t_stats;
} products;

static void products_free(products *p)
{
    sims_windows_free(&p->w);
    double *arr[] = {p->d, p->dn, p->mean, p->sem, p->mc_cov, p->an_cov, p->expect, p->bias,
                     p->nmean, p->nsem, p->ratio, p->corr_diff, p->fb, p->fb_err, p->fl, p->pl,
                     p->ple, p->pd, p->pde, p->c, p->cn, p->fb_bp, p->fb_bp_err};
    for (size_t i = 0; i < sizeof arr / sizeof arr[0]; i++)
        free(arr[i]);
    free(p->pok);
    free(p->seeds);
    free(p->nseeds);
}

/* The Monte Carlo transfer function of Hivon et al. (2002, eq. 18) from
 * the mean pseudo-spectrum bin sums: the noise-only mean taken off when the
 * bias is (p->noise_subtracted), the coupled --noise-spectrum when the
 * analysis takes it off an auto-spectrum; F_l constant per bin (the basis
 * for which a later analysis with the same bins is exactly unbiased,
 * include/clef/ensemble.h). */
static int hivon_transfer(products *p, const sims_run *r)
{
    const int nb = p->nb, n = p->n, nn = p->nn;
    const size_t b1 = (size_t)nb, b2 = b1 * b1;
    double *cm = malloc(sizeof(double) * b1), *cc = malloc(sizeof(double) * b2);
    double *nm = malloc(sizeof(double) * b1), *ncv = malloc(sizeof(double) * b2);
    int status = cm && cc && nm && ncv ? CLEF_OK : CLEF_ENOMEM;
    if (status == CLEF_OK)
        status = clef_ensemble_moments(n, nb, p->c, cm, cc);
    if (status == CLEF_OK && p->noise_subtracted)
        status = clef_ensemble_moments(nn, nb, p->cn, nm, ncv);
    if (status == CLEF_OK) {
        for (size_t k = 0; k < b2; k++)
            cc[k] = cc[k] / n + (p->noise_subtracted ? ncv[k] / nn : 0.0);
        for (int b = 0; b < nb; b++)
            cm[b] -= (p->noise_subtracted ? nm[b] : 0.0) + p->w.h_noise[b];
        status = clef_ensemble_transfer_hivon(nb, p->w.h_a, p->w.h_den, cm, cc, 0, 0, p->fb,
                                              p->fb_err, &p->hivon_iters);
    }
    if (status == CLEF_OK) {
        clef_ensemble_hivon h = {.nbins = nb, .l_lo = p->w.l_lo, .l_hi = p->w.l_hi,
                                 .l_eff = p->w.l_eff, .smooth = 0};
        clef_ensemble_hivon_fl(&h, p->fb, r->lsim, p->fl);
    }
    free(cm);
    free(cc);
    free(nm);
    free(ncv);
    return status;
}

static int compute(sims_run *r, products *p)
{
    const sims_args *a = r->a;
    int rc = sims_windows_read(r, &p->w);
    if (rc)
        return rc;
    const int nb = p->nb = p->w.nbins, n = p->n = (int)a->nreal, nn = p->nn = (int)a->nnoise;
    p->wl = p->w.win_lmax;
    const size_t b1 = (size_t)nb, b2 = b1 * b1;
    p->d = malloc(sizeof(double) * b1 * (size_t)n);
    p->dn = nn ? malloc(sizeof(double) * b1 * (size_t)nn) : NULL;
    p->c = malloc(sizeof(double) * b1 * (size_t)n);
    p->cn = nn ? malloc(sizeof(double) * b1 * (size_t)nn) : NULL;
    double **vec[] = {&p->mean, &p->sem, &p->expect, &p->bias, &p->nmean, &p->nsem, &p->ratio,
                      &p->fb, &p->fb_err, &p->fb_bp, &p->fb_bp_err};
    for (size_t i = 0; i < sizeof vec / sizeof vec[0]; i++)
        *vec[i] = calloc(b1, sizeof(double));
    p->mc_cov = calloc(b2, sizeof(double));
    p->an_cov = calloc(b2, sizeof(double));
    p->corr_diff = calloc(b2, sizeof(double));
    p->fl = calloc((size_t)r->lsim + 1, sizeof(double));
    p->pl = calloc((size_t)n, sizeof(double));
    p->ple = calloc((size_t)n, sizeof(double));
    p->pd = calloc((size_t)n, sizeof(double));
    p->pde = calloc((size_t)n, sizeof(double));
    p->pok = calloc((size_t)n, sizeof(int));
    p->seeds = calloc((size_t)n, sizeof(uint64_t));
    p->nseeds = calloc((size_t)(nn ? nn : 1), sizeof(uint64_t));
    if (!p->d || (nn && !p->dn) || !p->c || (nn && !p->cn) || !p->fb_bp || !p->fb_bp_err ||
        !p->mean || !p->sem || !p->expect || !p->bias || !p->nmean ||
        !p->nsem || !p->ratio || !p->fb || !p->fb_err || !p->mc_cov || !p->an_cov ||
        !p->corr_diff || !p->fl || !p->pl || !p->ple || !p->pd || !p->pde || !p->pok ||
        !p->seeds || !p->nseeds)
        return CLI_EXIT_NOMEM;
    int any_peak = 0;
    for (int i = 0; i < n; i++) {
        sims_record rec;
        if ((rc = sims_record_read(r, 0, i, &rec)))
            return rc;
        if (rec.nbins != nb) {
            sims_record_free(&rec);
            fprintf(stderr, "clef: error: realisation %d has %d bins, the windows %d\n", i,
                    rec.nbins, nb);
            return CLI_EXIT_FORMAT;
        }
        memcpy(p->d + (size_t)i * b1, rec.dl, sizeof(double) * b1);
        memcpy(p->c + (size_t)i * b1, rec.cb, sizeof(double) * b1);
        /* mean of the analytic covariances, summed in index order */
        for (size_t k = 0; k < b2; k++)
            p->an_cov[k] += rec.cov[k] / n;
        p->pok[i] = rec.peak_found;
        any_peak |= rec.peak_done;
        p->pl[i] = rec.l_peak;
        p->ple[i] = rec.l_peak_err;
        p->pd[i] = rec.d_peak;
        p->pde[i] = rec.d_peak_err;
        p->seeds[i] = rec.seed;
        sims_record_free(&rec);
    }
    for (int i = 0; i < nn; i++) {
        sims_record rec;
        if ((rc = sims_record_read(r, 1, i, &rec)))
            return rc;
        if (rec.nbins != nb) {
            sims_record_free(&rec);
            return CLI_EXIT_FORMAT;
        }
        memcpy(p->dn + (size_t)i * b1, rec.dl, sizeof(double) * b1);
        memcpy(p->cn + (size_t)i * b1, rec.cb, sizeof(double) * b1);
        p->nseeds[i] = rec.seed;
        sims_record_free(&rec);
    }
    int status = clef_ensemble_moments(n, nb, p->d, p->mean, p->mc_cov);
    if (status)
        return cli_fail(status);
    for (int b = 0; b < nb; b++)
        p->sem[b] = sqrt(p->mc_cov[b * b1 + b] / n);
    if (nn >= 2) {
        double *ncov = malloc(sizeof(double) * b2);
        if (!ncov)
            return CLI_EXIT_NOMEM;
        status = clef_ensemble_moments(nn, nb, p->dn, p->nmean, ncov);
        for (int b = 0; b < nb; b++)
            p->nsem[b] = sqrt(ncov[b * b1 + b] / nn);
        free(ncov);
        if (status)
            return cli_fail(status);
    }
    /* The mean of an auto-spectrum carries the noise bias unless --noise-spectrum
     * took it off: the noise-only mean is the Monte Carlo estimate of it. */
    p->noise_subtracted = nn >= 2 && a->splits == 1 && !a->an.noise_file;
    double *target = malloc(sizeof(double) * b1), *cov_mean = malloc(sizeof(double) * b2);
    if (!target || !cov_mean) {
        free(target);
        free(cov_mean);
        return CLI_EXIT_NOMEM;
    }
    clef_ensemble_expected(nb, p->w.win, p->wl, r->cl, r->lsim, NULL, p->expect);
    for (int b = 0; b < nb; b++) {
        const double m = p->mean[b] - (p->noise_subtracted ? p->nmean[b] : 0.0);
        const double s = sqrt(p->sem[b] * p->sem[b] +
                              (p->noise_subtracted ? p->nsem[b] * p->nsem[b] : 0.0));
        target[b] = m;
        p->bias[b] = s > 0 ? (m - p->expect[b]) / s : NAN;
    }
    for (size_t k = 0; k < b2; k++)
        cov_mean[k] = p->mc_cov[k] / n;
    if (p->noise_subtracted)
        for (int b = 0; b < nb; b++)
            cov_mean[b * b1 + b] += p->nsem[b] * p->nsem[b];
    clef_ensemble_transfer t = {.nbins = nb, .mean = target, .sem = p->sem,
                                .l_eff = p->w.l_eff, .win = p->w.win, .win_lmax = p->wl,
                                .cl = r->cl, .cl_lmax = r->lsim, .cov_mean = cov_mean};
    /* Cross-check: the linear system on the decoupled band powers (F_l
     * linear through l_eff), reported in the JSON only. */
    double *fl_bp = malloc(sizeof(double) * ((size_t)r->lsim + 1));
    status = fl_bp ? clef_ensemble_transfer_compute(&t, p->fb_bp, p->fb_bp_err, r->lsim, fl_bp,
                                                    NULL)
                   : CLEF_ENOMEM;
    free(fl_bp);
    if (status == CLEF_OK)
        status = hivon_transfer(p, r);
    free(target);
    free(cov_mean);
    if (status)
        return cli_fail(status);
    clef_ensemble_cov_compare(nb, p->mc_cov, p->an_cov, p->ratio, p->corr_diff,
                              &p->max_ratio_dev, &p->max_corr_diff);

    /* First peak: the truth is the peak the estimator finds in the expected
     * band powers (input through the windows) with the mean analytic
     * covariance, i.e. what it would report without sky variance. */
    if (any_peak) {
        clef_bandpowers *bp = NULL;
        if ((status = clef_bandpowers_alloc(&bp, nb, 1)) ||
            (status = clef_bandpowers_alloc_windows(bp, p->wl)))
            return clef_bandpowers_free(bp), cli_fail(status);
        for (int b = 0; b < nb; b++) {
            bp->l_lo[b] = p->w.l_lo[b];
            bp->l_hi[b] = p->w.l_hi[b];
            bp->l_eff[b] = p->w.l_eff[b];
            bp->dl[b] = p->expect[b];
            bp->cl[b] = 2 * M_PI * p->expect[b] / (bp->l_eff[b] * (bp->l_eff[b] + 1));
            bp->dl_err[b] = sqrt(p->an_cov[b * b1 + b]);
        }
        memcpy(bp->cov, p->an_cov, sizeof(double) * b2);
        memcpy(bp->win, p->w.win, sizeof(double) * b1 * ((size_t)p->wl + 1));
        clef_peak_result pr;
        status = clef_peak_find(bp, &r->so.peak, &pr);
        clef_bandpowers_free(bp);
        /* no peak in the expected band powers (e.g. the window beyond
         * lmax): no calibration, and the reason in the summary */
        if (status)
            snprintf(p->peak_reason, sizeof p->peak_reason, "%s", clef_last_error());
        else if (!pr.found)
            snprintf(p->peak_reason, sizeof p->peak_reason, "%s", pr.reason);
        p->peak_truth_found = status == CLEF_OK && pr.found;
        if (pr.found) {
            p->l_true = pr.l_peak;
            p->d_true = pr.d_peak;
            int used2;
            clef_ensemble_calibration(n, p->pl, p->ple, p->pok, p->l_true, &p->l_pull,
                                      &p->l_pull_sd, &p->l_cov, &p->peak_used);
            clef_ensemble_calibration(n, p->pd, p->pde, p->pok, p->d_true, &p->d_pull,
                                      &p->d_pull_sd, &p->d_cov, &used2);
        }
    }
    return CLI_EXIT_OK;
}

/* ---- files ---- */

static int write_mean_table(const sims_run *r, const products *p, const char *path)
{
    clef_bandpowers *bp = NULL;
    const size_t b1 = (size_t)p->nb;
    int status = clef_bandpowers_alloc(&bp, p->nb, 1);
    if (!status)
        status = clef_bandpowers_alloc_windows(bp, p->wl);
    if (status)
        goto done;
    for (int b = 0; b < p->nb; b++) {
        bp->l_lo[b] = p->w.l_lo[b];
        bp->l_hi[b] = p->w.l_hi[b];
        bp->l_eff[b] = p->w.l_eff[b];
        bp->dl[b] = p->mean[b];
        bp->cl[b] = 2 * M_PI * p->mean[b] / (bp->l_eff[b] * (bp->l_eff[b] + 1));
        bp->dl_err[b] = sqrt(p->mc_cov[b * b1 + b]); /* scatter of one realisation */
    }
    memcpy(bp->cov, p->mc_cov, sizeof(double) * b1 * b1);
    memcpy(bp->win, p->w.win, sizeof(double) * b1 * ((size_t)p->wl + 1));
    if ((status = clef_bandpowers_meta_text(bp, "CONTENT", "clef sims: mean of the ensemble",
                                            "mean band powers, Monte Carlo covariance")) ||
        (status = clef_bandpowers_meta_number(bp, "NREAL", p->n, "signal realisations")) ||
        (status = clef_bandpowers_meta_number(bp, "NNOISE", p->nn, "noise-only realisations")) ||
        (status = clef_bandpowers_meta_text(bp, "RUNHASH", r->hash,
                                            "SHA-256 of the run description")))
        goto done;
    if (!r->a->maps) {
        char s[32];
        snprintf(s, sizeof s, "%llu", r->a->seed);
        if ((status = clef_bandpowers_meta_text(bp, "BASESEED", s, "base seed of the ensemble")))
            goto done;
    }
    status = clef_bandpowers_write_fits(bp, path);
done:
    clef_bandpowers_free(bp);
    return status;
}

static int write_products_fits(const sims_run *r, const products *p, const char *path)
{
    fitsfile *f = NULL;
    int st = 0;
    char name[4400];
    snprintf(name, sizeof name, "!%s", path);
    fits_create_file(&f, name, &st);
    long naxes0[1] = {0};
    fits_create_img(f, 8, 0, naxes0, &st);
    char *ttype[] = {"L_MIN", "L_MAX", "L_EFF", "D_MEAN", "D_SEM", "D_EXPECT", "BIAS_SE",
                     "NOISE_D", "NOISE_SEM", "COV_RATIO", "F_B", "F_B_ERR"};
    char *tform[] = {"J", "J", "D", "D", "D", "D", "D", "D", "D", "D", "D", "D"};
    char *tunit[] = {"", "", "", "uK^2", "uK^2", "uK^2", "", "uK^2", "uK^2", "", "", ""};
    fits_create_tbl(f, BINARY_TBL, p->nb, 12, ttype, tform, tunit, "ENSEMBLE", &st);
    fits_write_col(f, TINT, 1, 1, 1, p->nb, p->w.l_lo, &st);
    fits_write_col(f, TINT, 2, 1, 1, p->nb, p->w.l_hi, &st);
    const double *cols[] = {p->w.l_eff, p->mean, p->sem, p->expect, p->bias, p->nmean, p->nsem,
                            p->ratio, p->fb, p->fb_err};
    for (int c = 0; c < 10; c++)
        fits_write_col(f, TDOUBLE, c + 3, 1, 1, p->nb, (void *)cols[c], &st);
    int nreal = p->n, nnoise = p->nn;
    fits_write_key(f, TINT, "NREAL", &nreal, "signal realisations", &st);
    fits_write_key(f, TINT, "NNOISE", &nnoise, "noise-only realisations", &st);
    int ns = p->noise_subtracted;
    fits_write_key(f, TLOGICAL, "NOISESUB", &ns, "noise-only mean taken off bias and F_B", &st);
    double mr = p->max_ratio_dev, mc = p->max_corr_diff;
    fits_write_key(f, TDOUBLE, "MAXRDEV", &mr, "max |MC/analytic variance - 1|", &st);
    fits_write_key(f, TDOUBLE, "MAXCDIFF", &mc, "max |r_MC - r_analytic| off the diagonal", &st);
    fits_write_key(f, TSTRING, "RUNHASH", (void *)r->hash, "SHA-256 of the run description",
                   &st);
    const struct { const char *ext; const double *m; } img[] = {
        {"MC_COV", p->mc_cov}, {"AN_COV", p->an_cov}, {"CORRDIFF", p->corr_diff}};
    long naxes[2] = {p->nb, p->nb};
    for (int k = 0; k < 3; k++) {
        fits_create_img(f, DOUBLE_IMG, 2, naxes, &st);
        fits_write_key(f, TSTRING, "EXTNAME", (void *)img[k].ext, NULL, &st);
        fits_write_img(f, TDOUBLE, 1, (LONGLONG)p->nb * p->nb, (void *)img[k].m, &st);
    }
    /* The seeds: the realisation's own 64-bit seed, as two 32-bit halves
     * (FITS has no unsigned 64-bit column). */
    char *st_type[] = {"INDEX", "KIND", "SEED_HI", "SEED_LO"};
    char *st_form[] = {"J", "J", "V", "V"};
    const long ntot = p->n + p->nn;
    fits_create_tbl(f, BINARY_TBL, ntot, 4, st_type, st_form, NULL, "SEEDS", &st);
    for (long k = 0; k < ntot && !st; k++) {
        const int kind = k >= p->n;
        int idx = (int)(kind ? k - p->n : k);
        const uint64_t s = kind ? p->nseeds[k - p->n] : p->seeds[k];
        unsigned int hi = (unsigned int)(s >> 32), lo = (unsigned int)(s & 0xffffffffu);
        fits_write_col(f, TINT, 1, k + 1, 1, 1, &idx, &st);
        fits_write_col(f, TINT, 2, k + 1, 1, 1, (void *)&kind, &st);
        fits_write_col(f, TUINT, 3, k + 1, 1, 1, &hi, &st);
        fits_write_col(f, TUINT, 4, k + 1, 1, 1, &lo, &st);
    }
    int st2 = 0;
    if (f)
        fits_close_file(f, &st2);
    if (st || st2) {
        char msg[FLEN_STATUS];
        fits_get_errstatus(st ? st : st2, msg);
        fprintf(stderr, "clef: error: cannot write '%s': CFITSIO: %s\n", path, msg);
        return CLI_EXIT_IO;
    }
    return CLI_EXIT_OK;
}

static int write_transfer(const sims_run *r, const products *p, const char *path)
{
    FILE *f = fopen(path, "w");
    if (!f)
        return CLI_EXIT_IO;
    fprintf(f, "# Monte Carlo transfer function F_l (Hivon et al. 2002, eq. 18: iterated on\n"
            "# the mean pseudo-spectrum against the coupled input), clef sims %s\n"
            "# %d realisations; F_b constant over each analysis bin (the first below, the\n"
            "# last above); read by clef spectrum --transfer with the same bins.\n"
            "# run description sha256 %s\n# l F_l\n", CLEF_VERSION, p->n, r->hash);
    for (int l = 0; l <= r->lsim; l++)
        fprintf(f, "%d %.10g\n", l, p->fl[l]);
    return fclose(f) == 0 ? CLI_EXIT_OK : CLI_EXIT_IO;
}

static cJSON *summary(const sims_run *r, const products *p, const char *const *outs, int nout)
{
    const sims_args *a = r->a;
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "program", "clef");
    cJSON_AddStringToObject(root, "version", CLEF_VERSION);
    char cmd[8192] = "clef";
    for (int i = 0; i < r->argc; i++) {
        strncat(cmd, " ", sizeof cmd - strlen(cmd) - 1);
        strncat(cmd, r->argv[i], sizeof cmd - strlen(cmd) - 1);
    }
    cJSON_AddStringToObject(root, "command", cmd);
    char when[32];
    time_t now = time(NULL);
    strftime(when, sizeof when, "%Y-%m-%dT%H:%M:%SZ", gmtime(&now));
    cJSON_AddStringToObject(root, "finished_utc", when);
    cJSON_AddStringToObject(root, "mode", a->maps ? "analyse-given-maps" : "simulate-and-analyse");
    cJSON_AddStringToObject(root, "run_folder", a->run);
    cJSON_AddStringToObject(root, "description_sha256", r->hash);
    cJSON_AddNumberToObject(root, "realisations", p->n);
    cJSON_AddNumberToObject(root, "noise_only_realisations", p->nn);
    if (!a->maps) {
        char s[32];
        snprintf(s, sizeof s, "%llu", a->seed);
        cJSON_AddStringToObject(root, "base_seed", s);
        cJSON_AddStringToObject(root, "seed_rule", "splitmix64(splitmix64(base ^ kind key) + i)");
        cJSON *sd = cJSON_AddArrayToObject(root, "seeds");
        for (int i = 0; i < p->n; i++) {
            snprintf(s, sizeof s, "%llu", (unsigned long long)p->seeds[i]);
            cJSON_AddItemToArray(sd, cJSON_CreateString(s));
        }
        cJSON *nsd = cJSON_AddArrayToObject(root, "noise_only_seeds");
        for (int i = 0; i < p->nn; i++) {
            snprintf(s, sizeof s, "%llu", (unsigned long long)p->nseeds[i]);
            cJSON_AddItemToArray(nsd, cJSON_CreateString(s));
        }
    }
    cJSON *b = cJSON_AddObjectToObject(root, "bins");
    cJSON *lo = cJSON_AddArrayToObject(b, "l_min"), *hi = cJSON_AddArrayToObject(b, "l_max");
    for (int k = 0; k < p->nb; k++) {
        cJSON_AddItemToArray(lo, cJSON_CreateNumber(p->w.l_lo[k]));
        cJSON_AddItemToArray(hi, cJSON_CreateNumber(p->w.l_hi[k]));
    }
    cJSON_AddItemToObject(b, "l_eff", cli_json_numbers(p->w.l_eff, p->nb));

    cJSON *m = cJSON_AddObjectToObject(root, "mean_vs_input");
    cJSON_AddItemToObject(m, "d_mean_uK2", cli_json_numbers(p->mean, p->nb));
    cJSON_AddItemToObject(m, "d_sem_uK2", cli_json_numbers(p->sem, p->nb));
    cJSON_AddItemToObject(m, "d_expected_uK2", cli_json_numbers(p->expect, p->nb));
    cJSON_AddItemToObject(m, "bias_in_standard_errors", cli_json_numbers(p->bias, p->nb));
    cJSON_AddBoolToObject(m, "noise_only_mean_subtracted", p->noise_subtracted);
    double worst = 0, chi2 = 0;
    for (int k = 0; k < p->nb; k++) {
        if (isfinite(p->bias[k]) && fabs(p->bias[k]) > fabs(worst))
            worst = p->bias[k];
        chi2 += isfinite(p->bias[k]) ? p->bias[k] * p->bias[k] : 0.0;
    }
    cJSON_AddNumberToObject(m, "largest_bias_in_standard_errors", worst);
    cJSON_AddNumberToObject(m, "chi2_of_bias", chi2);
    if (p->nn) {
        cJSON *nb = cJSON_AddObjectToObject(root, "noise_bias");
        cJSON_AddItemToObject(nb, "d_uK2", cli_json_numbers(p->nmean, p->nb));
        cJSON_AddItemToObject(nb, "d_sem_uK2", cli_json_numbers(p->nsem, p->nb));
    }
    cJSON *c = cJSON_AddObjectToObject(root, "covariance");
    cJSON_AddItemToObject(c, "mc_over_analytic_diagonal", cli_json_numbers(p->ratio, p->nb));
    cJSON_AddNumberToObject(c, "largest_diagonal_deviation", p->max_ratio_dev);
    cJSON_AddNumberToObject(c, "largest_correlation_difference", p->max_corr_diff);
    /* the ratio's own sampling error: a variance estimated from n draws
     * has a relative standard error sqrt(2 / (n - 1)) (Gaussian) */
    cJSON_AddNumberToObject(c, "ratio_sampling_error", sqrt(2.0 / (p->n - 1)));
    cJSON_AddStringToObject(c, "matrices", "PREFIX-products.fits HDUs MC_COV, AN_COV, CORRDIFF");
    cJSON *t = cJSON_AddObjectToObject(root, "transfer_function");
    cJSON_AddStringToObject(t, "method", "Hivon et al. 2002 eq. 18: iteration on the mean "
                            "pseudo-spectrum against the coupled input, binned with the band "
                            "powers' weights, F_l constant per bin");
    cJSON_AddNumberToObject(t, "iterations", p->hivon_iters);
    cJSON_AddItemToObject(t, "f_b", cli_json_numbers(p->fb, p->nb));
    cJSON_AddItemToObject(t, "f_b_err", cli_json_numbers(p->fb_err, p->nb));
    cJSON *x = cJSON_AddObjectToObject(t, "bandpower_solve");
    cJSON_AddStringToObject(x, "method", "cross-check: <D_b> = sum_l W_bl F_l D_l solved for F "
                            "linear in l through the bins' l_eff (a different basis: differs "
                            "where F varies within a bin)");
    cJSON_AddItemToObject(x, "f_b", cli_json_numbers(p->fb_bp, p->nb));
    cJSON_AddItemToObject(x, "f_b_err", cli_json_numbers(p->fb_bp_err, p->nb));
    if (p->peak_truth_found) {
        cJSON *pk = cJSON_AddObjectToObject(root, "peak_calibration");
        cJSON_AddNumberToObject(pk, "l_truth", p->l_true);
        cJSON_AddNumberToObject(pk, "d_truth_uK2", p->d_true);
        cJSON_AddNumberToObject(pk, "realisations_with_peak", p->peak_used);
        cJSON_AddNumberToObject(pk, "l_mean_pull", p->l_pull);
        cJSON_AddNumberToObject(pk, "l_pull_sd", p->l_pull_sd);
        cJSON_AddNumberToObject(pk, "l_coverage_1sigma", p->l_cov);
        cJSON_AddNumberToObject(pk, "d_mean_pull", p->d_pull);
        cJSON_AddNumberToObject(pk, "d_pull_sd", p->d_pull_sd);
        cJSON_AddNumberToObject(pk, "d_coverage_1sigma", p->d_cov);
        cJSON_AddNumberToObject(pk, "gaussian_coverage", 0.6826894921370859);
    }
    else if (p->peak_reason[0])
        cJSON_AddStringToObject(cJSON_AddObjectToObject(root, "peak_calibration"), "not_made",
                                p->peak_reason);
    cJSON *ac = cJSON_AddObjectToObject(root, "accounting");
    cJSON_AddNumberToObject(ac, "ranks", r->nranks);
    cJSON_AddNumberToObject(ac, "threads_per_rank", r->nthreads);
    cJSON_AddStringToObject(ac, "mpi_library", par_library());
    cJSON_AddNumberToObject(ac, "skipped_already_done", (double)r->nskipped);
    cJSON *tm = cJSON_AddObjectToObject(ac, "time_s");
    double ssum = 0, asum = 0;
    long ndone = 0;
    cJSON *per_rank = cJSON_AddArrayToObject(ac, "ranks_detail");
    cJSON *per_real = cJSON_AddArrayToObject(ac, "realisations_done");
    long off = 0;
    for (int k = 0; k < r->nranks; k++) {
        cJSON *rk = cJSON_CreateObject();
        cJSON_AddNumberToObject(rk, "rank", k);
        cJSON *idx = cJSON_AddArrayToObject(rk, "realisations");
        const int cnt = r->acct_counts[k] / SIMS_ACCT;
        for (int j = 0; j < cnt; j++) {
            const double *v = r->acct_all + off + (long)j * SIMS_ACCT;
            const long g = (long)v[0];
            const int kind = g >= a->nreal;
            char label[40];
            snprintf(label, sizeof label, "%s%ld", kind ? "noise" : "signal",
                     kind ? g - a->nreal : g);
            cJSON_AddItemToArray(idx, cJSON_CreateString(label));
            cJSON *o = cJSON_CreateObject();
            cJSON_AddStringToObject(o, "realisation", label);
            cJSON_AddNumberToObject(o, "rank", k);
            cJSON_AddNumberToObject(o, "simulate_s", v[1]);
            cJSON_AddNumberToObject(o, "analyse_s", v[2]);
            cJSON_AddItemToArray(per_real, o);
            ssum += v[1];
            asum += v[2];
            ndone++;
        }
        off += r->acct_counts[k];
        if (r->rstat_all) {
            /* The mask pieces: made or read once by rank 0, received by
             * the others (docs/ensemble.md, "MPI"). */
            const double *v = r->rstat_all + (size_t)k * SIMS_RSTAT;
            cJSON_AddNumberToObject(rk, "couplings_computed", v[0]);
            cJSON_AddNumberToObject(rk, "couplings_from_cache", v[1]);
            cJSON_AddNumberToObject(rk, "mask_transforms", v[2]);
            cJSON_AddNumberToObject(rk, "pieces_from_previous_realisation", v[3]);
            cJSON_AddNumberToObject(rk, "pieces_from_rank0", v[4]);
            cJSON_AddNumberToObject(rk, "pieces_broadcast_bytes", v[5]);
            cJSON_AddNumberToObject(rk, "pieces_broadcast_s", v[6]);
            cJSON_AddNumberToObject(rk, "maps_broadcast_bytes", v[7]);
            cJSON_AddNumberToObject(rk, "maps_broadcast_s", v[8]);
            cJSON_AddNumberToObject(rk, "shared_couplings", v[9]);
            cJSON_AddNumberToObject(rk, "shared_coupling_rows", v[10]);
        }
        cJSON_AddItemToArray(per_rank, rk);
    }
    cJSON_AddNumberToObject(ac, "realisations_done_now", (double)ndone);
    cJSON_AddNumberToObject(tm, "simulate_sum", ssum);
    cJSON_AddNumberToObject(tm, "analyse_sum", asum);
    cJSON_AddNumberToObject(tm, "realisations_wall", r->t_loop);
    cJSON_AddNumberToObject(tm, "statistics", p->t_stats);
    cJSON_AddNumberToObject(tm, "total", clef_wtime() - r->t_begin);
    /* overhead of the ensemble over its realisations' own work */
    const double work = (ssum + asum) / (r->nranks > 0 ? r->nranks : 1);
    cJSON_AddNumberToObject(tm, "overhead_fraction",
                            work > 0 ? (clef_wtime() - r->t_begin) / work - 1.0 : 0.0);
    cJSON *w = cJSON_AddArrayToObject(root, "warnings");
    for (int i = 0; i < cli_nwarnings(); i++)
        cJSON_AddItemToArray(w, cJSON_CreateString(cli_warning(i)));
    cJSON *o = cJSON_AddArrayToObject(root, "outputs");
    for (int i = 0; i < nout; i++)
        cJSON_AddItemToArray(o, cJSON_CreateString(outs[i]));
    return root;
}

int sims_products(sims_run *r)
{
    products p;
    memset(&p, 0, sizeof p);
    const double t0 = clef_wtime();
    int rc = compute(r, &p);
    p.t_stats = clef_wtime() - t0;
    enum { NOUT = 5 };
    char paths[NOUT][4400];
    const char *sfx[NOUT] = {".fits", "-products.fits", "-transfer.txt", "-cov.png", ".json"};
    clef_outfile of[NOUT];
    int begun[NOUT] = {0};
    const char *outs[NOUT];
    memset(of, 0, sizeof of);
    if (rc)
        goto done;
    for (int k = 0; k < NOUT; k++) {
        snprintf(paths[k], sizeof paths[k], "%s%s", r->prefix, sfx[k]);
        outs[k] = paths[k];
        int status = clef_outfile_begin(&of[k], paths[k]);
        if (status) {
            rc = cli_fail(status);
            goto done;
        }
        begun[k] = 1;
    }
    int status;
    if ((status = write_mean_table(r, &p, of[0].tmp_path))) {
        rc = cli_fail(status);
        goto done;
    }
    if ((rc = write_products_fits(r, &p, of[1].tmp_path)) ||
        (rc = write_transfer(r, &p, of[2].tmp_path)) ||
        (rc = sims_cov_figure(p.nb, p.w.l_eff, p.ratio, p.corr_diff, p.n, of[3].tmp_path)))
        goto done;
    cJSON *j = summary(r, &p, outs, NOUT);
    rc = j ? cli_write_json(of[4].tmp_path, j) : CLI_EXIT_NOMEM;
    cJSON_Delete(j);
    if (rc)
        goto done;
    for (int k = 0; k < NOUT; k++) {
        if ((status = clef_outfile_commit(&of[k]))) {
            rc = cli_fail(status);
            goto done;
        }
        begun[k] = 0;
    }
    if (cli_verbosity >= 1) {
        FILE *out = cli_text_stream();
        fprintf(out, "clef sims: %d realisations (%d noise-only), %d bins, %d rank%s x %d "
                "thread%s\n", p.n, p.nn, p.nb, r->nranks, r->nranks == 1 ? "" : "s",
                r->nthreads, r->nthreads == 1 ? "" : "s");
        fprintf(out, "%5s %9s %12s %12s %8s %9s %8s %8s\n", "bin", "l_eff", "mean D", "expected",
                "bias/se", "MC/an var", "F_b", "F_b err");
        for (int b = 0; b < p.nb; b++)
            fprintf(out, "%5d %9.1f %12.3f %12.3f %+8.2f %9.3f %8.4f %8.4f\n", b, p.w.l_eff[b],
                    p.mean[b], p.expect[b], p.bias[b], p.ratio[b], p.fb[b], p.fb_err[b]);
        fprintf(out, "covariance: largest |MC/analytic - 1| on the diagonal %.3f (sampling "
                "error %.3f), largest correlation difference %.3f\n", p.max_ratio_dev,
                sqrt(2.0 / (p.n - 1)), p.max_corr_diff);
        if (p.peak_truth_found)
            fprintf(out, "first peak: truth l = %.2f; mean pull %+.3f (sd %.3f), 1-sigma "
                    "coverage %.3f of %d (Gaussian 0.683)\n", p.l_true, p.l_pull, p.l_pull_sd,
                    p.l_cov, p.peak_used);
        for (int k = 0; k < NOUT; k++)
            cli_verbose("wrote %s", paths[k]);
    }
done:
    for (int k = 0; k < NOUT; k++)
        if (begun[k])
            clef_outfile_abort(&of[k]);
    products_free(&p);
    return rc;
}
