/* clef sims internals shared by its files: cmd_sims.c (options, run
 * folder, the loop over realisations), cli_sims_run.c (one realisation and
 * its record), cli_sims_out.c (the products). */
#ifndef CLEF_CLI_SIMS_H
#define CLEF_CLI_SIMS_H

#include <stdint.h>

#include "clef/ensemble.h"
#include "cli_analysis.h"

typedef struct sims_args {
    cli_analysis an;
    const char *run, *maps, *cl_file, *hits, *output, *threads;
    int model, want_mpi, splits;
    long nside, nreal, nnoise;
    unsigned long long seed;
    double depth;
    char *(*list)[2]; /* --maps: nreal entries of one or two paths */
} sims_args;

/* Accounting values per realisation done: global index, simulate seconds,
 * analyse seconds, rank. */
#define SIMS_ACCT 4
/* Per rank: coupling matrices computed, read from the cache; mask-weight
 * transforms; mask pieces taken from the rank's previous realisation, from
 * rank 0's bytes; bytes of those (sent by rank 0, received by the others)
 * and seconds spent on them (on the others: waiting for rank 0's first
 * realisation too); bytes and seconds of the maps (masks, hit map) rank 0
 * read and sent (0 with one rank). */
#define SIMS_RSTAT 11 /* ... and the coupling matrices and rows this rank made for rank 0 */

typedef struct sims_run {
    sims_args *a;
    char hash[65];
    char real_dir[4200];
    char prefix[4200];
    clef_spectrum_opts so;
    int64_t nside;
    int lsim;
    double *cl;       /* input C_l, 0..lsim */
    long nskipped;
    double t_loop, t_begin;
    double *acct_all; /* rank 0: every rank's accounting, rank order */
    int *acct_counts;
    double *rstat_all; /* rank 0: SIMS_RSTAT values per rank, rank order */
    double map_bytes, map_seconds; /* this rank: maps sent by / received from rank 0 */
    int nranks, nthreads;
    int argc;
    char **argv;
    const char *desc;
    clef_ensemble_spectrum_ctx *sctx; /* the analyser's (asked for M once, for the windows) */
} sims_run;

/* 1 when a valid record of realisation (kind, i) of this run exists. */
int sims_record_exists(const sims_run *r, int kind, long i);
/* Make (simulate or read), analyse and record one realisation; also the
 * windows file when it is missing.  Returns an exit code (error printed). */
int sims_do_one(sims_run *r, clef_ensemble_plan *plan, int kind, long i, double *t_sim,
                double *t_an);

/* A realisation as recorded. */
typedef struct sims_record {
    int64_t index;
    int32_t kind, nbins;
    uint64_t seed;
    double t_sim, t_an;
    int32_t peak_done, peak_found;
    double l_peak, l_peak_err, d_peak, d_peak_err;
    double *dl, *cov; /* nbins, nbins^2 */
    double *cb;       /* nbins: pseudo-spectrum bin sums c_b (clef_ensemble_pcl_bins) */
} sims_record;
int sims_record_read(const sims_run *r, int kind, long i, sims_record *rec);
void sims_record_free(sims_record *rec);

/* The windows every realisation shares. */
typedef struct sims_windows {
    int32_t nbins, win_lmax;
    int32_t *l_lo, *l_hi;
    double *l_eff, *win;
    /* Hivon et al.'s transfer system (clef_ensemble_hivon_system): A
     * (nbins^2), den, and the bin sums of the coupled noise spectrum M N
     * taken off an auto-spectrum by --noise-spectrum (zeros otherwise);
     * weighting of the bin sums. */
    int32_t weighting;
    double *h_a, *h_den, *h_noise;
} sims_windows;
int sims_windows_read(const sims_run *r, sims_windows *w);
void sims_windows_free(sims_windows *w);

/* Rank 0 after every rank finished: read the records and write the
 * products.  Returns an exit code. */
int sims_products(sims_run *r);

/* The covariance figure (PNG): the diagonal ratio MC / analytic per bin
 * with the 15% band and the ratio's sampling error, and the correlation
 * differences as a matrix.  Returns an exit code. */
int sims_cov_figure(int nb, const double *l_eff, const double *ratio, const double *corr_diff,
                    int nreal, const char *path);

#endif
