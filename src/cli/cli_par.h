/* Processes of a distributed run (src/cli/cli_par.c, the only file that
 * talks to MPI).  Without MPI at build time, or when the command was not
 * started by an MPI launcher, there is one process (rank 0 of 1). */
#ifndef CLEF_CLI_PAR_H
#define CLEF_CLI_PAR_H

#include <stddef.h>

/* Start: MPI_Init when the process was started by mpirun/srun (their
 * environment variables say so) or want_mpi is set.  Returns an exit code:
 * CLI_EXIT_UNSUP (message printed) when MPI is wanted or the launcher
 * started several processes but this clef was built without MPI. */
int par_init(int *argc, char ***argv, int want_mpi);
int par_rank(void);
int par_size(void);
int par_have_mpi(void);       /* 1 when built with MPI */
const char *par_library(void); /* MPI library version line, or "none" */
void par_barrier(void);
/* Stop every process with this exit code (a failed rank takes the job down:
 * the realisations already written stay in the run folder). */
void par_abort(int code);
void par_finalize(void);
/* Rank 0 receives every rank's n doubles (ranks may differ in n): *all
 * (malloc'ed, rank order) and counts[size] (malloc'ed); other ranks get
 * NULLs.  Returns 0, or -1 on out of memory. */
int par_gather(const double *mine, int n, double **all, int **counts);
/* The largest of the ranks' values, on every rank. */
int par_max_int(int v);
/* The value of rank 0 on every rank. */
int par_bcast_int(int v);
/* Rank 0's block of *n bytes at *buf (*buf NULL: none) on every rank: rank
 * 0 keeps its own; the others get a malloc'ed copy in *buf and its size in
 * *n (NULL and 0 when rank 0 sent none).  MPI_Bcast in pieces below 2 GiB
 * (the count is an int).  One process: nothing happens.  Returns 0 (a rank
 * out of memory takes the job down, CLI_EXIT_NOMEM). */
int par_bcast_bytes(void **buf, size_t *n);
/* n ints of rank 0 on every rank. */
void par_bcast_ints(int *v, int n);
/* Rows of a row-major matrix m (row_len doubles per row): rank r holds rows
 * first[r] <= l < first[r + 1] in place; afterwards rank 0's m has every
 * rank's rows (MPI_Gatherv).  Returns 0, or -1 when the matrix is too large
 * for int counts (2^31 doubles up to the last rank's rows). */
int par_gather_rows(double *m, size_t row_len, const int *first);

#endif
