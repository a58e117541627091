/* Processes of a distributed run: MPI when clef was built with it
 * (CLEF_HAVE_MPI, set by the Makefile when pkg-config finds ompi-c), else
 * one process.  The only file of clef that includes mpi.h. */
#define _POSIX_C_SOURCE 200809L
#include <limits.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"
#include "cli_par.h"

#ifdef CLEF_HAVE_MPI
#include <mpi.h>
#endif

static int g_rank = 0, g_size = 1, g_mpi = 0;

/* Launchers announce themselves: Open MPI's mpirun (OMPI_COMM_WORLD_SIZE),
 * PMIx (srun --mpi=pmix, prterun) and PMI-1/2 (srun, MPICH's hydra). */
static int launched(int *size)
{
    const char *v[] = {"OMPI_COMM_WORLD_SIZE", "PMIX_RANK", "PMI_SIZE", "PMI_RANK"};
    for (int i = 0; i < 4; i++) {
        const char *s = getenv(v[i]);
        if (s && *s) {
            const char *n = getenv("OMPI_COMM_WORLD_SIZE");
            if (!n)
                n = getenv("PMI_SIZE");
            *size = n ? atoi(n) : 0;
            return 1;
        }
    }
    return 0;
}

int par_have_mpi(void)
{
#ifdef CLEF_HAVE_MPI
    return 1;
#else
    return 0;
#endif
}

int par_init(int *argc, char ***argv, int want_mpi)
{
    int size = 0;
    const int under_launcher = launched(&size);
#ifdef CLEF_HAVE_MPI
    if (!want_mpi && !under_launcher)
        return CLI_EXIT_OK;
    int provided = 0;
    /* Only the main thread calls MPI (OpenMP threads never do). */
    if (MPI_Init_thread(argc, argv, MPI_THREAD_FUNNELED, &provided) != MPI_SUCCESS) {
        fprintf(stderr, "clef: error: MPI_Init failed\n");
        return CLI_EXIT_UNSUP;
    }
    g_mpi = 1;
    MPI_Comm_rank(MPI_COMM_WORLD, &g_rank);
    MPI_Comm_size(MPI_COMM_WORLD, &g_size);
    return CLI_EXIT_OK;
#else
    (void)argc;
    (void)argv;
    if (want_mpi || (under_launcher && size != 1)) {
        fprintf(stderr,
                "clef: error: this clef was built without MPI (pkg-config found no ompi-c when "
                "it was built), so it cannot share the work between %s; install the Debian "
                "packages libopenmpi-dev and openmpi-bin (scripts/install-deps.sh) and rebuild, "
                "or run it as one process without mpirun/srun\n",
                size > 1 ? "the launched processes" : "processes");
        return CLI_EXIT_UNSUP;
    }
    return CLI_EXIT_OK;
#endif
}

int par_rank(void) { return g_rank; }
int par_size(void) { return g_size; }

const char *par_library(void)
{
#ifdef CLEF_HAVE_MPI
    static char buf[MPI_MAX_LIBRARY_VERSION_STRING];
    int len = 0;
    if (!buf[0]) {
        MPI_Get_library_version(buf, &len);
        char *nl = strchr(buf, '\n');
        if (nl)
            *nl = 0;
        char *comma = strchr(buf, ',');
        if (comma)
            *comma = 0;
    }
    return buf;
#else
    return "none";
#endif
}

void par_barrier(void)
{
#ifdef CLEF_HAVE_MPI
    if (g_mpi)
        MPI_Barrier(MPI_COMM_WORLD);
#endif
}

void par_abort(int code)
{
#ifdef CLEF_HAVE_MPI
    if (g_mpi && g_size > 1)
        MPI_Abort(MPI_COMM_WORLD, code);
#endif
    (void)code;
}

void par_finalize(void)
{
#ifdef CLEF_HAVE_MPI
    if (g_mpi)
        MPI_Finalize();
    g_mpi = 0;
#endif
}

int par_gather(const double *mine, int n, double **all, int **counts)
{
    *all = NULL;
    *counts = NULL;
    if (!g_mpi || g_size == 1) {
        *all = malloc(sizeof **all * (size_t)(n > 0 ? n : 1));
        *counts = malloc(sizeof **counts);
        if (!*all || !*counts)
            return -1;
        if (n > 0)
            memcpy(*all, mine, sizeof **all * (size_t)n);
        (*counts)[0] = n;
        return 0;
    }
#ifdef CLEF_HAVE_MPI
    int *cnt = NULL, *disp = NULL;
    double *buf = NULL;
    if (g_rank == 0 && !(cnt = malloc(sizeof *cnt * (size_t)g_size)))
        par_abort(CLI_EXIT_NOMEM);
    MPI_Gather(&n, 1, MPI_INT, cnt, 1, MPI_INT, 0, MPI_COMM_WORLD);
    if (g_rank == 0) {
        disp = malloc(sizeof *disp * (size_t)g_size);
        long total = 0;
        for (int r = 0; r < g_size && disp; r++) {
            disp[r] = (int)total;
            total += cnt[r];
        }
        buf = malloc(sizeof *buf * (size_t)(total > 0 ? total : 1));
        if (!disp || !buf)
            par_abort(CLI_EXIT_NOMEM);
    }
    MPI_Gatherv(mine, n, MPI_DOUBLE, buf, cnt, disp, MPI_DOUBLE, 0, MPI_COMM_WORLD);
    free(disp);
    *all = buf;
    *counts = cnt;
    return 0;
#else
    return -1;
#endif
}

int par_max_int(int v)
{
#ifdef CLEF_HAVE_MPI
    if (g_mpi) {
        int out = v;
        MPI_Allreduce(&v, &out, 1, MPI_INT, MPI_MAX, MPI_COMM_WORLD);
        return out;
    }
#endif
    return v;
}

int par_bcast_int(int v)
{
#ifdef CLEF_HAVE_MPI
    if (g_mpi)
        MPI_Bcast(&v, 1, MPI_INT, 0, MPI_COMM_WORLD);
#endif
    return v;
}

#ifdef CLEF_HAVE_MPI
/* Bytes per MPI_Bcast: its count is an int, so a block above 2 GiB goes in
 * pieces; 1 GiB each.  CLEF_PAR_CHUNK (bytes, for the tests) makes them
 * smaller, so that a small run crosses piece boundaries too. */
static size_t chunk_bytes(void)
{
    const char *s = getenv("CLEF_PAR_CHUNK");
    const long long v = s && *s ? atoll(s) : 0;
    return v > 0 && v < (1LL << 30) ? (size_t)v : (size_t)1 << 30;
}
#endif

int par_bcast_bytes(void **buf, size_t *n)
{
#ifdef CLEF_HAVE_MPI
    if (!g_mpi || g_size == 1)
        return 0;
    uint64_t len = g_rank == 0 && *buf ? (uint64_t)*n : 0;
    MPI_Bcast(&len, 1, MPI_UINT64_T, 0, MPI_COMM_WORLD);
    if (g_rank != 0) {
        *buf = NULL;
        *n = 0;
        if (!len)
            return 0;
        if (!(*buf = malloc((size_t)len))) {
            fprintf(stderr, "clef: error: rank %d: out of memory for %llu bytes from rank 0\n",
                    g_rank, (unsigned long long)len);
            par_abort(CLI_EXIT_NOMEM);
            return -1;
        }
        *n = (size_t)len;
    }
    const size_t step = chunk_bytes();
    for (size_t off = 0; off < (size_t)len; off += step) {
        const size_t k = (size_t)len - off < step ? (size_t)len - off : step;
        MPI_Bcast((char *)*buf + off, (int)k, MPI_BYTE, 0, MPI_COMM_WORLD);
    }
    return 0;
#else
    (void)buf;
    (void)n;
    return 0;
#endif
}

void par_bcast_ints(int *v, int n)
{
#ifdef CLEF_HAVE_MPI
    if (g_mpi && g_size > 1)
        MPI_Bcast(v, n, MPI_INT, 0, MPI_COMM_WORLD);
#else
    (void)v;
    (void)n;
#endif
}

int par_gather_rows(double *m, size_t row_len, const int *first)
{
#ifdef CLEF_HAVE_MPI
    if (!g_mpi || g_size == 1)
        return 0;
    int *cnt = malloc(sizeof *cnt * (size_t)g_size), *disp = malloc(sizeof *disp * (size_t)g_size);
    if (!cnt || !disp) {
        free(cnt);
        free(disp);
        par_abort(CLI_EXIT_NOMEM);
        return -1;
    }
    for (int r = 0; r < g_size; r++) {
        const size_t c = (size_t)(first[r + 1] - first[r]) * row_len;
        const size_t d = (size_t)first[r] * row_len;
        if (d + c > (size_t)INT_MAX) { /* Gatherv counts and offsets are ints */
            free(cnt);
            free(disp);
            return -1;
        }
        cnt[r] = (int)c;
        disp[r] = (int)d;
    }
    double *mine = m + (size_t)first[g_rank] * row_len;
    if (g_rank == 0)
        MPI_Gatherv(MPI_IN_PLACE, cnt[0], MPI_DOUBLE, m, cnt, disp, MPI_DOUBLE, 0,
                    MPI_COMM_WORLD);
    else
        MPI_Gatherv(mine, cnt[g_rank], MPI_DOUBLE, NULL, NULL, NULL, MPI_DOUBLE, 0,
                    MPI_COMM_WORLD);
    free(cnt);
    free(disp);
    return 0;
#else
    (void)m;
    (void)row_len;
    (void)first;
    return 0;
#endif
}
