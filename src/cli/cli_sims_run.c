/* clef sims: one realisation, its record in the run folder, and the
 * windows file (docs/ensemble.md, "Run folder").  Records are written to a
 * temporary and renamed (clef_outfile), so a killed job leaves either a
 * whole record or none. */
#define _POSIX_C_SOURCE 200809L
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "clef/clef.h"
#include "cli.h"
#include "cli_par.h"
#include "cli_sims.h"

static const char REC_MAGIC[8] = {'C', 'L', 'E', 'F', 'R', 'E', 'C', '2'};
static const char WIN_MAGIC[8] = {'C', 'L', 'E', 'F', 'W', 'I', 'N', '2'};

static void record_path(const sims_run *r, int kind, long i, char *buf, size_t n)
{
    snprintf(buf, n, "%s/%s%07ld.rec", r->real_dir, kind ? "noise" : "signal", i);
}

static void windows_path(const sims_run *r, char *buf, size_t n)
{
    snprintf(buf, n, "%s/windows.win", r->real_dir);
}

void sims_record_free(sims_record *rec)
{
    free(rec->dl);
    free(rec->cov);
    free(rec->cb);
    rec->dl = rec->cov = rec->cb = NULL;
}

#define RD(f, p, n) (fread((p), sizeof *(p), (size_t)(n), (f)) == (size_t)(n))

/* Read a record; CLI_EXIT_OK, or CLI_EXIT_FORMAT for a record that is not
 * this run's realisation (message in *why). */
static int record_load(const sims_run *r, int kind, long i, sims_record *rec, char *why,
                       size_t nwhy)
{
    char path[4400];
    record_path(r, kind, i, path, sizeof path);
    memset(rec, 0, sizeof *rec);
    FILE *f = fopen(path, "rb");
    if (!f) {
        snprintf(why, nwhy, "cannot open '%s'", path);
        return CLI_EXIT_IO;
    }
    char magic[8], hash[64];
    int ok = RD(f, magic, 8) && !memcmp(magic, REC_MAGIC, 8) && RD(f, hash, 64) &&
             !memcmp(hash, r->hash, 64) && RD(f, &rec->index, 1) && RD(f, &rec->kind, 1) &&
             RD(f, &rec->nbins, 1) && RD(f, &rec->seed, 1) && RD(f, &rec->t_sim, 1) &&
             RD(f, &rec->t_an, 1) && RD(f, &rec->peak_done, 1) && RD(f, &rec->peak_found, 1) &&
             RD(f, &rec->l_peak, 1) && RD(f, &rec->l_peak_err, 1) && RD(f, &rec->d_peak, 1) &&
             RD(f, &rec->d_peak_err, 1) && rec->index == i && rec->kind == kind &&
             rec->nbins > 0 && rec->nbins < 100000;
    if (ok) {
        const size_t nb = (size_t)rec->nbins;
        rec->dl = malloc(sizeof *rec->dl * nb);
        rec->cov = malloc(sizeof *rec->cov * nb * nb);
        rec->cb = malloc(sizeof *rec->cb * nb);
        ok = rec->dl && rec->cov && rec->cb && RD(f, rec->dl, nb) && RD(f, rec->cov, nb * nb) &&
             RD(f, rec->cb, nb) && fgetc(f) == EOF;
    }
    fclose(f);
    if (!ok) {
        snprintf(why, nwhy, "'%s' is not a record of realisation %ld of this run", path, i);
        sims_record_free(rec);
        return CLI_EXIT_FORMAT;
    }
    return CLI_EXIT_OK;
}

int sims_record_exists(const sims_run *r, int kind, long i)
{
    char path[4400];
    record_path(r, kind, i, path, sizeof path);
    if (access(path, F_OK) != 0)
        return 0;
    sims_record rec;
    char why[4600];
    const int rc = record_load(r, kind, i, &rec, why, sizeof why);
    sims_record_free(&rec);
    if (rc != CLI_EXIT_OK)
        cli_warn("%s: it will be made again", why);
    return rc == CLI_EXIT_OK;
}

int sims_record_read(const sims_run *r, int kind, long i, sims_record *rec)
{
    char why[4600];
    const int rc = record_load(r, kind, i, rec, why, sizeof why);
    if (rc != CLI_EXIT_OK)
        fprintf(stderr, "clef: error: run folder '%s': %s\n", r->a->run, why);
    return rc;
}

/* Write `n` bytes chunks to an atomic output. */
typedef struct wbuf {
    FILE *f;
    int ok;
} wbuf;
static void put(wbuf *w, const void *p, size_t size, size_t n)
{
    if (w->ok && fwrite(p, size, n, w->f) != n)
        w->ok = 0;
}

static int commit_file(clef_outfile *of, wbuf *w, const char *path)
{
    const int closed = fclose(w->f) == 0;
    if (!w->ok || !closed) {
        clef_outfile_abort(of);
        fprintf(stderr, "clef: error: cannot write '%s'\n", path);
        return CLI_EXIT_IO;
    }
    const int status = clef_outfile_commit(of);
    return status == CLEF_OK ? CLI_EXIT_OK : cli_fail(status);
}

static int bins_weighting(const sims_run *r)
{
    return r->so.bins ? clef_bins_weighting(r->so.bins) : CLEF_BINS_DL;
}

/* Hivon et al.'s transfer system of the run (A, den; include/clef/ensemble.h)
 * from the first realisation's coupling and filter, and the bin sums of the
 * coupled noise spectrum an auto-spectrum's --noise-spectrum takes off. */
static int hivon_system(const sims_run *r, const clef_ensemble_result *res, double *a,
                        double *den, double *noise)
{
    const clef_bandpowers *bp = res->bp;
    const int nb = bp->nbins, L = res->pcl_lmax;
    if (!res->coupling || !res->filter) {
        fprintf(stderr, "clef: error: the analysis gave no coupling matrix for the transfer "
                "function\n");
        return CLI_EXIT_NUMERIC;
    }
    clef_ensemble_hivon h = {.nbins = nb, .l_lo = bp->l_lo, .l_hi = bp->l_hi,
                             .l_eff = bp->l_eff, .smooth = 0, .weighting = bins_weighting(r),
                             .coupling = res->coupling, .filter = res->filter, .lmax = L,
                             .wab = res->wab, .cl = r->cl, .cl_lmax = r->lsim};
    int status = clef_ensemble_hivon_system(&h, a, den);
    if (status != CLEF_OK)
        return cli_fail(status);
    memset(noise, 0, sizeof *noise * (size_t)nb);
    if (r->so.noise_cl && r->a->splits == 1) {
        double *mn = calloc((size_t)L + 1, sizeof *mn);
        if (!mn)
            return CLI_EXIT_NOMEM;
        for (int l = 0; l <= L; l++)
            for (int k = 0; k <= L && k <= r->so.noise_lmax; k++)
                mn[l] += res->coupling[(size_t)l * (L + 1) + k] * r->so.noise_cl[k];
        clef_ensemble_pcl_bins(nb, bp->l_lo, bp->l_hi, h.weighting, mn, noise);
        free(mn);
    }
    return CLI_EXIT_OK;
}

static int write_windows(const sims_run *r, const clef_ensemble_result *res)
{
    const clef_bandpowers *bp = res->bp;
    char path[4400];
    windows_path(r, path, sizeof path);
    if (access(path, F_OK) == 0)
        return CLI_EXIT_OK;
    if (!bp->win) {
        fprintf(stderr, "clef: error: the analysis gave no band-power windows\n");
        return CLI_EXIT_NUMERIC;
    }
    const size_t nbs = (size_t)bp->nbins;
    double *ha = malloc(sizeof *ha * nbs * nbs), *hd = malloc(sizeof *hd * nbs);
    double *hn = malloc(sizeof *hn * nbs);
    int rc = ha && hd && hn ? hivon_system(r, res, ha, hd, hn) : CLI_EXIT_NOMEM;
    if (rc) {
        free(ha);
        free(hd);
        free(hn);
        return rc;
    }
    clef_outfile of;
    int status = clef_outfile_begin(&of, path);
    if (status != CLEF_OK)
        return cli_fail(status);
    wbuf w = {fopen(of.tmp_path, "wb"), 1};
    if (!w.f) {
        clef_outfile_abort(&of);
        fprintf(stderr, "clef: error: cannot write '%s'\n", path);
        return CLI_EXIT_IO;
    }
    const int32_t nb = bp->nbins, wl = bp->win_lmax;
    put(&w, WIN_MAGIC, 1, 8);
    put(&w, r->hash, 1, 64);
    put(&w, &nb, sizeof nb, 1);
    put(&w, &wl, sizeof wl, 1);
    for (int b = 0; b < nb; b++) {
        const int32_t lo = bp->l_lo[b], hi = bp->l_hi[b];
        put(&w, &lo, sizeof lo, 1);
        put(&w, &hi, sizeof hi, 1);
    }
    put(&w, bp->l_eff, sizeof *bp->l_eff, (size_t)nb);
    put(&w, bp->win, sizeof *bp->win, (size_t)nb * ((size_t)wl + 1));
    const int32_t wt = bins_weighting(r);
    put(&w, &wt, sizeof wt, 1);
    put(&w, ha, sizeof *ha, nbs * nbs);
    put(&w, hd, sizeof *hd, nbs);
    put(&w, hn, sizeof *hn, nbs);
    free(ha);
    free(hd);
    free(hn);
    return commit_file(&of, &w, path);
}

void sims_windows_free(sims_windows *w)
{
    free(w->l_lo);
    free(w->l_hi);
    free(w->l_eff);
    free(w->win);
    free(w->h_a);
    free(w->h_den);
    free(w->h_noise);
    memset(w, 0, sizeof *w);
}

int sims_windows_read(const sims_run *r, sims_windows *w)
{
    char path[4400];
    windows_path(r, path, sizeof path);
    memset(w, 0, sizeof *w);
    FILE *f = fopen(path, "rb");
    char magic[8], hash[64];
    int ok = f && RD(f, magic, 8) && !memcmp(magic, WIN_MAGIC, 8) && RD(f, hash, 64) &&
             !memcmp(hash, r->hash, 64) && RD(f, &w->nbins, 1) && RD(f, &w->win_lmax, 1) &&
             w->nbins > 0 && w->nbins < 100000 && w->win_lmax > 0 && w->win_lmax < 1000000;
    if (ok) {
        const size_t nb = (size_t)w->nbins, nw = nb * ((size_t)w->win_lmax + 1);
        w->l_lo = malloc(sizeof *w->l_lo * nb);
        w->l_hi = malloc(sizeof *w->l_hi * nb);
        w->l_eff = malloc(sizeof *w->l_eff * nb);
        w->win = malloc(sizeof *w->win * nw);
        w->h_a = malloc(sizeof *w->h_a * nb * nb);
        w->h_den = malloc(sizeof *w->h_den * nb);
        w->h_noise = malloc(sizeof *w->h_noise * nb);
        ok = w->l_lo && w->l_hi && w->l_eff && w->win && w->h_a && w->h_den && w->h_noise;
        for (size_t b = 0; ok && b < nb; b++)
            ok = RD(f, &w->l_lo[b], 1) && RD(f, &w->l_hi[b], 1);
        ok = ok && RD(f, w->l_eff, nb) && RD(f, w->win, nw) && RD(f, &w->weighting, 1) &&
             RD(f, w->h_a, nb * nb) && RD(f, w->h_den, nb) && RD(f, w->h_noise, nb) &&
             fgetc(f) == EOF;
    }
    if (f)
        fclose(f);
    if (!ok) {
        fprintf(stderr, "clef: error: run folder '%s': '%s' is missing or not this run's "
                "windows file\n", r->a->run, path);
        sims_windows_free(w);
        return CLI_EXIT_FORMAT;
    }
    return CLI_EXIT_OK;
}

int sims_do_one(sims_run *r, clef_ensemble_plan *plan, int kind, long i, double *t_sim,
                double *t_an)
{
    const sims_args *a = r->a;
    clef_map *maps[2] = {NULL, NULL};
    int nmaps = 0, rc = CLI_EXIT_OK, status = CLEF_OK;
    clef_ensemble_result res;
    memset(&res, 0, sizeof res);
    uint64_t seed = 0;
    double t0 = clef_wtime();
    if (a->maps) {
        for (int k = 0; k < 2 && a->list[i][k]; k++) {
            cli_watch_input(a->list[i][k]);
            status = cli_analysis_read_map(&a->an, a->list[i][k], 0, &maps[k]);
            if (status < 0) {
                rc = -status;
                goto done;
            }
            if (status != CLEF_OK)
                goto done;
            nmaps++;
        }
    } else {
        seed = clef_ensemble_seed(a->seed, (uint64_t)i, kind);
        if ((status = clef_ensemble_plan_simulate(plan, a->seed, (uint64_t)i, kind, maps,
                                                  &nmaps)) != CLEF_OK)
            goto done;
    }
    *t_sim = clef_wtime() - t0;
    t0 = clef_wtime();
    /* The coupling M is handed over only while the windows file (which
     * keeps the transfer system made from it) is still to be written: by
     * rank 0, whose first realisation the other ranks wait for. */
    {
        char wpath[4400];
        windows_path(r, wpath, sizeof wpath);
        r->sctx->keep_coupling = par_rank() == 0 && access(wpath, F_OK) != 0;
    }
    status = clef_ensemble_plan_analyse(plan, (const clef_map *const *)maps, nmaps, &res);
    *t_an = clef_wtime() - t0;
    if (status != CLEF_OK)
        goto done;
    if (!res.pcl) {
        fprintf(stderr, "clef: error: the analysis gave no pseudo-spectrum\n");
        rc = CLI_EXIT_NUMERIC;
        goto done;
    }
    if (par_rank() == 0 && (rc = write_windows(r, &res)) != CLI_EXIT_OK)
        goto done; /* rank 0 writes it: it always makes the first realisation to do */

    char path[4400];
    record_path(r, kind, i, path, sizeof path);
    clef_outfile of;
    if ((status = clef_outfile_begin(&of, path)) != CLEF_OK)
        goto done;
    wbuf w = {fopen(of.tmp_path, "wb"), 1};
    if (!w.f) {
        clef_outfile_abort(&of);
        fprintf(stderr, "clef: error: cannot write '%s'\n", path);
        rc = CLI_EXIT_IO;
        goto done;
    }
    const clef_bandpowers *bp = res.bp;
    const int64_t idx = i;
    const int32_t k32 = kind, nb = bp->nbins;
    const int32_t pd = res.peak_done, pf = res.peak_done && res.peak.found;
    const double pk[4] = {res.peak.l_peak, res.peak.l_peak_err, res.peak.d_peak,
                          res.peak.d_peak_err};
    put(&w, REC_MAGIC, 1, 8);
    put(&w, r->hash, 1, 64);
    put(&w, &idx, sizeof idx, 1);
    put(&w, &k32, sizeof k32, 1);
    put(&w, &nb, sizeof nb, 1);
    put(&w, &seed, sizeof seed, 1);
    put(&w, t_sim, sizeof *t_sim, 1);
    put(&w, t_an, sizeof *t_an, 1);
    put(&w, &pd, sizeof pd, 1);
    put(&w, &pf, sizeof pf, 1);
    put(&w, pk, sizeof pk[0], 4);
    put(&w, bp->dl, sizeof *bp->dl, (size_t)nb);
    if (bp->cov) {
        put(&w, bp->cov, sizeof *bp->cov, (size_t)nb * nb);
    } else {
        for (int b = 0; b < nb * nb; b++) {
            const double zero = 0.0;
            put(&w, &zero, sizeof zero, 1);
        }
    }
    double *cb = malloc(sizeof *cb * (size_t)nb);
    if (!cb) {
        fclose(w.f);
        clef_outfile_abort(&of);
        rc = CLI_EXIT_NOMEM;
        goto done;
    }
    clef_ensemble_pcl_bins(nb, bp->l_lo, bp->l_hi, bins_weighting(r), res.pcl, cb);
    put(&w, cb, sizeof *cb, (size_t)nb);
    free(cb);
    rc = commit_file(&of, &w, path);
done:
    clef_ensemble_result_free(&res);
    clef_map_free(maps[0]);
    clef_map_free(maps[1]);
    if (status != CLEF_OK)
        rc = cli_fail(status);
    return rc;
}
