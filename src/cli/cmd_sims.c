/* clef sims: a simulation ensemble analysed exactly as `clef spectrum`
 * analyses the data (the same option code, cli_analysis.c), spread over MPI
 * ranks (cli_par.c), resumable from its run folder, and its products:
 * Monte Carlo transfer function, covariance against the analytic one, bias
 * of the mean, noise bias, first-peak calibration (docs/ensemble.md). */
#define _GNU_SOURCE
#include <cblas.h>
#include <cjson/cJSON.h>
#include <dirent.h>
#include <errno.h>
#include <getopt.h>
#include <glob.h>
#include <limits.h>
#include <malloc.h>
#include <math.h>
#include <omp.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#include "clef/beam.h"
#include "clef/cosmo.h"
#include "clef/ensemble.h"
#include "clef/hash.h"
#include "clef/theory.h"
#include "cli.h"
#include "cli_analysis.h"
#include "cli_par.h"
#include "cli_sims.h"

#define CMD "sims"

static void help(void)
{
    printf(
        "Usage: clef sims --run DIR --mask MASK (--simulate N --nside NS | --maps LIST)\n"
        "                 (--cl FILE | --model) [options]\n\n"
        "A simulation ensemble, each realisation analysed exactly as clef spectrum\n"
        "analyses a map (the analysis options below are those of clef spectrum), and\n"
        "what its scatter tells: the Monte Carlo transfer function F_l (Hivon et al.\n"
        "2002), the Monte Carlo covariance against the analytic one, the mean band\n"
        "powers against the input through the windows, the noise bias and the\n"
        "calibration of the first-peak errors (docs/ensemble.md).  Runs as one process\n"
        "or under mpirun/srun, ranks sharing the realisations; results do not depend\n"
        "on the number of ranks or threads.\n\n"
        "Ensemble:\n"
        "  --run DIR              run folder: one file per finished realisation; a rerun\n"
        "                         of the same command skips them, a folder made by a\n"
        "                         different description is refused (exit 10)\n"
        "  --simulate N           simulate N realisations (simulate-and-analyse mode)\n"
        "  --maps LIST            analyse given maps instead: a text file with one map per\n"
        "                         line (two for a cross-spectrum), or a quoted glob\n"
        "                         pattern (sorted by name)\n"
        "  --cl FILE              the input spectrum, C_l or D_l in uK^2\n"
        "                         (docs/formats-spectrum.md)\n"
        "  --model                the analytic model with Planck 2018 parameters instead\n"
        "  --mpi                  require MPI (error, exit 7, if clef was built without)\n\n"
        "Simulation (simulate mode; the beam and pixel window are the analysis'):\n"
        "  --nside N              HEALPix resolution of the simulated maps\n"
        "  --seed S               base seed (default 1): realisation i uses a seed\n"
        "                         derived from (S, i) only\n"
        "  --noise-depth UK_ARCMIN  white noise per map (default 0: none)\n"
        "  --hits FILE            hit-count map: noise scales as 1/sqrt(hits / mean hits)\n"
        "  --splits 2             two maps with the same sky and independent noise,\n"
        "                         analysed as a cross-spectrum (default 1: auto-spectrum)\n"
        "  --noise-only M         also M noise-only realisations: the noise bias\n\n");
    cli_analysis_help(stdout);
    printf(
        "Output:\n"
        "  -o, --output PREFIX    PREFIX.fits (mean band powers, Monte Carlo covariance,\n"
        "                         windows), PREFIX-products.fits, PREFIX-transfer.txt\n"
        "                         ('l F_l', for --transfer), PREFIX-cov.png (covariance\n"
        "                         figure), PREFIX.json (default DIR/ensemble)\n"
        "  --threads N            OpenMP threads per process (default: OMP_NUM_THREADS)\n"
        "  --quiet                errors only\n"
        "  --verbose              a progress line per rank and realisation\n"
        "  --help\n\n"
        "Exit codes: 0 ok, 2 usage, 3 invalid input, 4 I/O, 5 bad file format,\n"
        "6 numerical failure, 7 MPI asked for but not built in, 8 out of memory,\n"
        "10 the run folder belongs to another run description.\n");
    printf("\nThis clef: MPI %s\n", par_have_mpi() ? "yes (Open MPI)" : "no (built without ompi-c)");
}

enum {
    OPT_RUN = CLI_ANALYSIS_OPT_END, OPT_SIMULATE, OPT_MAPS, OPT_CL, OPT_MODEL, OPT_MPI,
    OPT_NSIDE, OPT_SEED, OPT_DEPTH, OPT_HITS, OPT_SPLITS, OPT_NOISEONLY, OPT_THREADS,
    OPT_QUIET, OPT_VERBOSE, OPT_HELP
};

static int parse_args(int argc, char **argv, sims_args *a)
{
    static const struct option own[] = {
        {"run", required_argument, 0, OPT_RUN},
        {"simulate", required_argument, 0, OPT_SIMULATE},
        {"maps", required_argument, 0, OPT_MAPS},
        {"cl", required_argument, 0, OPT_CL},
        {"model", no_argument, 0, OPT_MODEL},
        {"mpi", no_argument, 0, OPT_MPI},
        {"nside", required_argument, 0, OPT_NSIDE},
        {"seed", required_argument, 0, OPT_SEED},
        {"noise-depth", required_argument, 0, OPT_DEPTH},
        {"hits", required_argument, 0, OPT_HITS},
        {"splits", required_argument, 0, OPT_SPLITS},
        {"noise-only", required_argument, 0, OPT_NOISEONLY},
        {"output", required_argument, 0, 'o'},
        {"threads", required_argument, 0, OPT_THREADS},
        {"quiet", no_argument, 0, OPT_QUIET},
        {"verbose", no_argument, 0, OPT_VERBOSE},
        {"help", no_argument, 0, OPT_HELP},
        {0, 0, 0, 0}};
    struct option opts[CLI_ANALYSIS_NOPTS + sizeof own / sizeof own[0]];
    memcpy(opts, cli_analysis_options, sizeof cli_analysis_options);
    memcpy(opts + CLI_ANALYSIS_NOPTS, own, sizeof own);
    memset(a, 0, sizeof *a);
    cli_analysis_init(&a->an);
    a->seed = 1;
    a->splits = 1;
    int c;
    long v;
    opterr = 0;
    while ((c = getopt_long(argc, argv, "o:", opts, NULL)) != -1) {
        const int h = cli_analysis_option(CMD, c, optarg, &a->an);
        if (h == 1)
            continue;
        if (h)
            return h;
        switch (c) {
        case OPT_RUN: a->run = optarg; break;
        case OPT_SIMULATE:
            if (cli_parse_long(CMD, "--simulate", optarg, &v))
                return CLI_EXIT_USAGE;
            if (v < 2 || v > 10000000)
                return cli_usage_error(CMD, "--simulate needs 2 to 10^7 realisations, got %ld", v);
            a->nreal = v;
            break;
        case OPT_MAPS: a->maps = optarg; break;
        case OPT_CL: a->cl_file = optarg; break;
        case OPT_MODEL: a->model = 1; break;
        case OPT_MPI: a->want_mpi = 1; break;
        case OPT_NSIDE:
            if (cli_parse_long(CMD, "--nside", optarg, &v))
                return CLI_EXIT_USAGE;
            if (!clef_nside_valid(v))
                return cli_usage_error(CMD, "--nside must be a power of two, got %ld", v);
            a->nside = v;
            break;
        case OPT_SEED: {
            char *end;
            errno = 0;
            const unsigned long long s = strtoull(optarg, &end, 10);
            if (errno || end == optarg || *end || optarg[0] == '-')
                return cli_usage_error(CMD, "--seed: '%s' is not an integer in [0, 2^64)",
                                       optarg);
            a->seed = s;
            break;
        }
        case OPT_DEPTH:
            if (cli_parse_double(CMD, "--noise-depth", optarg, &a->depth))
                return CLI_EXIT_USAGE;
            if (!(a->depth >= 0))
                return cli_usage_error(CMD, "--noise-depth must not be negative, got %s", optarg);
            break;
        case OPT_HITS: a->hits = optarg; break;
        case OPT_SPLITS:
            if (cli_parse_long(CMD, "--splits", optarg, &v))
                return CLI_EXIT_USAGE;
            if (v != 1 && v != 2)
                return cli_usage_error(CMD, "--splits must be 1 or 2, got %ld", v);
            a->splits = (int)v;
            break;
        case OPT_NOISEONLY:
            if (cli_parse_long(CMD, "--noise-only", optarg, &v))
                return CLI_EXIT_USAGE;
            if (v < 2 || v > 10000000)
                return cli_usage_error(CMD, "--noise-only needs 2 to 10^7 realisations, got %ld",
                                       v);
            a->nnoise = v;
            break;
        case 'o': a->output = optarg; break;
        case OPT_THREADS: a->threads = optarg; break;
        case OPT_QUIET: cli_verbosity = 0; break;
        case OPT_VERBOSE: cli_verbosity = 2; break;
        case OPT_HELP: help(); return -1;
        default:
            return cli_usage_error(CMD, "unknown or incomplete option '%s'", argv[optind - 1]);
        }
    }
    if (optind < argc)
        return cli_usage_error(CMD, "unexpected argument '%s' (maps go in --maps LIST)",
                               argv[optind]);
    if (!a->run)
        return cli_usage_error(CMD, "--run DIR is required");
    if ((a->nreal > 0) + (a->maps != NULL) != 1)
        return cli_usage_error(CMD, "give exactly one of --simulate N and --maps LIST");
    if (!!a->cl_file + a->model != 1)
        return cli_usage_error(CMD, "give exactly one of --cl FILE and --model");
    if (a->nreal > 0 && !a->nside)
        return cli_usage_error(CMD, "--simulate needs --nside");
    if (a->maps && (a->nside || a->depth > 0 || a->hits || a->splits != 1 || a->nnoise))
        return cli_usage_error(CMD, "--nside, --noise-depth, --hits, --splits and --noise-only "
                               "belong to --simulate; --maps analyses the maps as they are");
    if (a->hits && !(a->depth > 0))
        return cli_usage_error(CMD, "--hits needs --noise-depth");
    if (a->nnoise && !(a->depth > 0))
        return cli_usage_error(CMD, "--noise-only needs --noise-depth");
    if (a->an.beam2_set || a->an.beam2_file || a->an.transfer2_file)
        return cli_usage_error(CMD, "--second-beam-fwhm, --second-beam-table and "
                               "--second-transfer are for clef spectrum (the ensemble's maps "
                               "share one instrument)");
    if (cli_analysis_check(CMD, &a->an, a->splits == 2 || a->maps))
        return CLI_EXIT_USAGE;
    if (a->threads && cli_set_threads(CMD, a->threads))
        return CLI_EXIT_USAGE;
    return 0;
}

/* ---- the list of given maps ---- */

static int load_map_list(sims_args *a)
{
    if (strpbrk(a->maps, "*?[")) {
        glob_t g;
        const int r = glob(a->maps, 0, NULL, &g);
        if (r != 0 || g.gl_pathc < 2) {
            fprintf(stderr, "clef: error: --maps '%s' matches %zu files; an ensemble needs at "
                    "least 2\n", a->maps, r == 0 ? g.gl_pathc : (size_t)0);
            if (r == 0)
                globfree(&g);
            return CLI_EXIT_INVALID;
        }
        a->list = calloc(g.gl_pathc, sizeof *a->list);
        if (!a->list)
            return CLI_EXIT_NOMEM;
        for (size_t i = 0; i < g.gl_pathc; i++)
            a->list[i][0] = strdup(g.gl_pathv[i]);
        a->nreal = (long)g.gl_pathc;
        globfree(&g);
        return CLI_EXIT_OK;
    }
    FILE *f = fopen(a->maps, "r");
    if (!f) {
        fprintf(stderr, "clef: error: cannot open the map list '%s': %s\n", a->maps,
                strerror(errno));
        return CLI_EXIT_IO;
    }
    char line[8192];
    long n = 0, cap = 0, lineno = 0;
    int per = 0, rc = CLI_EXIT_OK;
    while (fgets(line, sizeof line, f)) {
        lineno++;
        char *save = NULL, *t1 = strtok_r(line, " \t\r\n", &save);
        if (!t1 || t1[0] == '#')
            continue;
        char *t2 = strtok_r(NULL, " \t\r\n", &save);
        const int k = t2 ? 2 : 1;
        if (strtok_r(NULL, " \t\r\n", &save) || (per && k != per)) {
            fprintf(stderr, "clef: error: map list '%s' line %ld: expected %s map path%s per "
                    "line\n", a->maps, lineno, per ? (per == 2 ? "two" : "one") : "one or two",
                    per == 1 ? "" : "s");
            rc = CLI_EXIT_FORMAT;
            break;
        }
        per = k;
        if (n == cap) {
            cap = cap ? 2 * cap : 64;
            void *nl = realloc(a->list, sizeof *a->list * (size_t)cap);
            if (!nl) {
                rc = CLI_EXIT_NOMEM;
                break;
            }
            a->list = nl;
        }
        a->list[n][0] = strdup(t1);
        a->list[n][1] = t2 ? strdup(t2) : NULL;
        n++;
    }
    fclose(f);
    if (rc == CLI_EXIT_OK && n < 2) {
        fprintf(stderr, "clef: error: map list '%s' names %ld realisation%s; an ensemble needs "
                "at least 2\n", a->maps, n, n == 1 ? "" : "s");
        rc = CLI_EXIT_INVALID;
    }
    a->nreal = n;
    a->splits = per == 2 ? 2 : 1;
    return rc;
}

/* ---- the run description and its hash ---- */

static void desc_add(char **buf, size_t *len, const char *key, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));
static void desc_add(char **buf, size_t *len, const char *key, const char *fmt, ...)
{
    char val[8192];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(val, sizeof val, fmt, ap);
    va_end(ap);
    const size_t add = strlen(key) + strlen(val) + 3;
    char *nb = realloc(*buf, *len + add);
    if (!nb)
        return;
    *buf = nb;
    snprintf(*buf + *len, add, "%s=%s\n", key, val);
    *len += add - 1;
}

static void desc_file(char **buf, size_t *len, const char *key, const char *path)
{
    char hex[65] = "none";
    if (path && clef_sha256_file(path, hex) != CLEF_OK)
        snprintf(hex, sizeof hex, "unreadable");
    desc_add(buf, len, key, "%s", hex);
}

/* Everything a realisation's band powers depend on, one "key=value" line
 * each, files by their SHA-256 (given maps by path: hashing hundreds of
 * large maps would cost as much as reading them).  The number of
 * realisations is not part of it: realisation i does not depend on it, so
 * a rerun with a larger N extends the run. */
static char *run_description(const sims_args *a)
{
    char *b = NULL;
    size_t n = 0;
    const cli_analysis *an = &a->an;
    desc_add(&b, &n, "clef", "%s", CLEF_VERSION);
    desc_add(&b, &n, "mode", "%s", a->maps ? "maps" : "simulate");
    if (a->model)
        desc_add(&b, &n, "input_cl", "model planck2018");
    else
        desc_file(&b, &n, "input_cl", a->cl_file);
    if (!a->maps) {
        desc_add(&b, &n, "nside", "%ld", a->nside);
        desc_add(&b, &n, "seed", "%llu", a->seed);
        desc_add(&b, &n, "noise_depth", "%.17g", a->depth);
        desc_file(&b, &n, "hits", a->hits);
        desc_add(&b, &n, "splits", "%d", a->splits);
    } else {
        for (long i = 0; i < a->nreal; i++) {
            char key[64];
            snprintf(key, sizeof key, "map%ld", i);
            desc_add(&b, &n, key, "%s%s%s", a->list[i][0], a->list[i][1] ? " " : "",
                     a->list[i][1] ? a->list[i][1] : "");
        }
        desc_add(&b, &n, "hdu", "%s", an->hdu ? an->hdu : "");
        desc_add(&b, &n, "column", "%s", an->column ? an->column : "");
        desc_add(&b, &n, "unit", "%s", an->unit ? an->unit : "");
        desc_add(&b, &n, "calibration", "%.17g", an->calibration);
    }
    desc_file(&b, &n, "mask", an->mask[0]);
    desc_file(&b, &n, "mask2", an->mask[1]);
    desc_add(&b, &n, "ordering", "%s", an->ordering ? an->ordering : "");
    desc_add(&b, &n, "coord_mismatch", "%d", an->coord);
    desc_add(&b, &n, "lmax", "%ld", an->lmax);
    desc_add(&b, &n, "bin_width", "%ld", an->bin_width);
    desc_add(&b, &n, "log_bins", "%ld", an->log_bins);
    desc_file(&b, &n, "bins", an->bins_file);
    desc_add(&b, &n, "beam_fwhm", "%.17g", an->beam_fwhm);
    desc_file(&b, &n, "beam_table", an->beam_file);
    desc_add(&b, &n, "pixel_window", "%d", !an->no_pixel_window);
    desc_file(&b, &n, "transfer", an->transfer_file);
    desc_file(&b, &n, "noise_cl", an->noise_file);
    desc_file(&b, &n, "theory", an->theory_file);
    desc_add(&b, &n, "iterations", "%ld", an->iterations);
    desc_add(&b, &n, "keep_multipoles", "%d", an->keep);
    desc_add(&b, &n, "peak", "%d %.17g %.17g %.17g", !an->no_peak, an->peak_lmin, an->peak_lmax,
             an->peak_hw);
    return b;
}

/* ---- run folder ---- */

static int make_dir(const char *path)
{
    if (mkdir(path, 0777) == 0 || errno == EEXIST) {
        struct stat st;
        if (stat(path, &st) == 0 && S_ISDIR(st.st_mode))
            return CLI_EXIT_OK;
        fprintf(stderr, "clef: error: run folder '%s' exists and is not a folder\n", path);
        return CLI_EXIT_IO;
    }
    fprintf(stderr, "clef: error: cannot create the run folder '%s': %s\n", path,
            strerror(errno));
    return CLI_EXIT_IO;
}

static char *slurp(const char *path)
{
    FILE *f = fopen(path, "r");
    if (!f)
        return NULL;
    char *buf = NULL;
    size_t n = 0, cap = 0;
    char chunk[65536];
    size_t got;
    while ((got = fread(chunk, 1, sizeof chunk, f)) > 0) {
        if (n + got + 1 > cap) {
            cap = 2 * (n + got + 1);
            char *nb = realloc(buf, cap);
            if (!nb) {
                free(buf);
                fclose(f);
                return NULL;
            }
            buf = nb;
        }
        memcpy(buf + n, chunk, got);
        n += got;
    }
    fclose(f);
    if (buf)
        buf[n] = 0;
    return buf;
}

/* The first line of `a` that `b` lacks, for the refusal message. */
static void first_difference(const char *a, const char *b, char *out, size_t n)
{
    snprintf(out, n, "(none found)");
    const char *p = a;
    while (p && *p) {
        const char *e = strchr(p, '\n');
        const size_t len = e ? (size_t)(e - p) : strlen(p);
        int found = 0;
        for (const char *q = b; q && *q;) {
            const char *f = strchr(q, '\n');
            const size_t ql = f ? (size_t)(f - q) : strlen(q);
            if (ql == len && !memcmp(p, q, len)) {
                found = 1;
                break;
            }
            q = f ? f + 1 : NULL;
        }
        if (!found) {
            snprintf(out, n, "%.*s", (int)(len < 300 ? len : 300), p);
            return;
        }
        p = e ? e + 1 : NULL;
    }
}

/* Rank 0: create the run folder or check that it is this run's.  Exit
 * code CLI_EXIT_RUNDIR for a folder of another description. */
static int open_run_folder(const sims_args *a, const char *desc, const char *hash)
{
    int rc = make_dir(a->run);
    if (rc)
        return rc;
    char path[4200];
    snprintf(path, sizeof path, "%s/realisations", a->run);
    if ((rc = make_dir(path)))
        return rc;
    snprintf(path, sizeof path, "%s/run.json", a->run);
    char *old = slurp(path);
    if (old) {
        cJSON *j = cJSON_Parse(old);
        free(old);
        const cJSON *h = cJSON_GetObjectItemCaseSensitive(j, "description_sha256");
        const cJSON *d = cJSON_GetObjectItemCaseSensitive(j, "description");
        if (!cJSON_IsString(h) || !cJSON_IsString(d)) {
            fprintf(stderr, "clef: error: run folder '%s': '%s' is not a clef sims run record "
                    "(no description_sha256); give another --run folder\n", a->run, path);
            cJSON_Delete(j);
            return CLI_EXIT_RUNDIR;
        }
        if (strcmp(h->valuestring, hash)) {
            char mine[400], theirs[400];
            first_difference(desc, d->valuestring, mine, sizeof mine);
            first_difference(d->valuestring, desc, theirs, sizeof theirs);
            fprintf(stderr, "clef: error: run folder '%s' was made by a different run "
                    "description (sha256 %.12s..., this run %.12s...): it has '%s' where this "
                    "run has '%s'; its realisations are not mixed with this run's: give "
                    "another --run folder or the same options as before\n",
                    a->run, h->valuestring, hash, theirs, mine);
            cJSON_Delete(j);
            return CLI_EXIT_RUNDIR;
        }
        cJSON_Delete(j);
        return CLI_EXIT_OK;
    }
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "program", "clef");
    cJSON_AddStringToObject(j, "version", CLEF_VERSION);
    cJSON_AddStringToObject(j, "kind", "clef sims run folder");
    cJSON_AddStringToObject(j, "description_sha256", hash);
    cJSON_AddStringToObject(j, "description", desc);
    rc = cli_write_json(path, j);
    cJSON_Delete(j);
    return rc;
}

/* ---- the run ---- */

static int load_input_cl(const sims_args *a, int lmax, double *cl)
{
    if (a->model) {
        clef_cosmo_params p;
        clef_cosmo_params_planck2018(&p);
        return clef_theory_cl(&p, lmax, cl);
    }
    return clef_theory_read_cl(a->cl_file, lmax, cl, NULL);
}

/* ---- one reading and one computation of what depends on the masks ---- */

/* A map every rank needs (mask, hit map): rank 0 reads the file; with
 * several ranks it sends the map to the others (clef_map_export,
 * par_bcast_bytes), which do not open the file.  Returns an exit code (0:
 * ok); *agreed 1 when every rank returns the same code (rank 0 could not
 * read the file: it printed why), 0 when this rank alone failed. */
static int shared_map(sims_run *r, const char *path, int is_mask, clef_map **out, int *agreed)
{
    *out = NULL;
    *agreed = 1;
    const int rank = par_rank();
    const double t0 = clef_wtime();
    int code = 0;
    if (rank == 0) {
        const int st = cli_analysis_read_map(&r->a->an, path, is_mask, out);
        code = st < 0 ? -st : st ? cli_fail(st) : 0;
    }
    if (par_size() == 1 || (code = par_bcast_int(code)) != 0)
        return code;
    void *buf = NULL;
    size_t n = 0;
    int st = CLEF_OK;
    if (rank == 0 && (st = clef_map_export(*out, &buf, &n)) != CLEF_OK) {
        *agreed = 0;
        return cli_fail(st);
    }
    par_bcast_bytes(&buf, &n);
    if (rank != 0)
        st = clef_map_import(out, buf, n);
    free(buf);
    if (st != CLEF_OK) {
        *agreed = 0;
        return cli_fail(st);
    }
    r->map_bytes += (double)n;
    r->map_seconds += clef_wtime() - t0;
    return 0;
}

/* The mask pieces (mask spectra, deprojection correction, M, covariance
 * kernels, K, windows) are made or read from the cache once, by rank 0's
 * first realisation, and sent to the other ranks as bytes
 * (clef_ensemble_spectrum_export / _adopt).  Each rank meets this once. */
typedef struct sims_share {
    clef_ensemble_spectrum_ctx *ctx;
    int done, adopted;
    double bytes, seconds;
    int jobs;  /* coupling matrices of rank 0's first realisation this rank made rows of */
    long rows; /* ... and how many rows */
} sims_share;

/* What rank 0 announces while the others wait (a header of 3 ints): rows
 * of a coupling matrix to make (W_l follows), or its mask pieces. */
enum { SHARE_PIECES = 0, SHARE_COUPLING = 1 };

/* This rank's rows of M (clef_coupling_row_split), gathered into rank 0's
 * matrix; rank 0 then fills the lower triangle.  The rows are the same
 * bits wherever they are made (coupling.h), so M is too. */
static void coupling_part(sims_share *s, clef_coupling **c, int lmax, const double *wl,
                          int wl_lmax)
{
    const int rank = par_rank(), size = par_size();
    int *first = malloc(sizeof *first * (size_t)(size + 1));
    if (!first) {
        fprintf(stderr, "clef: error: rank %d: out of memory\n", rank);
        par_abort(CLI_EXIT_NOMEM);
        return;
    }
    clef_coupling_row_split(lmax, size, first);
    const int st = clef_coupling_create_rows(c, lmax, wl, wl_lmax, first[rank], first[rank + 1]);
    if (st != CLEF_OK)
        par_abort(cli_fail(st)); /* the others wait in the gather */
    par_gather_rows(clef_coupling_rows_data(*c), (size_t)lmax + 1, first);
    s->jobs++;
    s->rows += first[rank + 1] - first[rank];
    free(first);
}

/* Rank 0's coupling maker in its first realisation (clef_spectrum_opts
 * coupling_create): the other ranks, waiting for its mask pieces, make
 * their share of the rows of M and the covariance kernel (a cold cache or
 * --no-cache; lmax_ext^3 work, a few CPU-seconds each at nside 2048: the
 * mask spectra and the deprojection correction, the larger part of a cold
 * first realisation, stay rank 0's; docs/performance.md). */
static int shared_coupling(void *arg, clef_coupling **out, int lmax, const double *wl,
                           int wl_lmax)
{
    const size_t n = (size_t)lmax + 1;
    if (n * n > (size_t)INT_MAX) /* beyond the int counts of the gather: alone */
        return clef_coupling_create(out, lmax, wl, wl_lmax);
    int h[3] = {SHARE_COUPLING, lmax, wl_lmax};
    par_bcast_ints(h, 3);
    void *b = (void *)wl;
    size_t nb = ((size_t)wl_lmax + 1) * sizeof *wl;
    par_bcast_bytes(&b, &nb);
    coupling_part(arg, out, lmax, wl, wl_lmax);
    clef_coupling_fill_lower(*out);
    return CLEF_OK;
}

/* Rank 0, after its first realisation (or at the end, with nothing to send
 * when it made none). */
static void share_send(sims_share *s)
{
    const double t0 = clef_wtime();
    void *buf = NULL;
    size_t n = 0;
    int h[3] = {SHARE_PIECES, 0, 0};
    par_bcast_ints(h, 3);
    if (s->ctx->state && clef_ensemble_spectrum_export(s->ctx, &buf, &n) != CLEF_OK) {
        cli_warn("the mask pieces could not be packed for the other ranks (%s): each rank "
                 "makes or reads them itself", clef_last_error());
        buf = NULL;
        n = 0;
    }
    par_bcast_bytes(&buf, &n);
    free(buf);
    s->bytes = (double)n;
    s->seconds = clef_wtime() - t0;
    s->done = 1;
}

/* Ranks other than 0: the analyser's after_maps in their first realisation
 * (their own maps are transformed meanwhile), or at the end for a rank
 * that had none.  The wait includes rank 0's first realisation. */
static void share_receive(void *arg)
{
    sims_share *s = arg;
    const double t0 = clef_wtime();
    void *buf = NULL;
    size_t n = 0;
    for (;;) { /* rows of rank 0's couplings until its pieces come */
        int h[3] = {SHARE_PIECES, 0, 0};
        par_bcast_ints(h, 3);
        if (h[0] != SHARE_COUPLING)
            break;
        par_bcast_bytes(&buf, &n);
        clef_coupling *c = NULL;
        if (h[1] < 0 || h[2] < 0 || n != ((size_t)h[2] + 1) * sizeof(double)) {
            fprintf(stderr, "clef: error: rank %d: a coupling job from rank 0 that does not "
                    "add up (lmax %d, W_l to %d, %zu bytes)\n", par_rank(), h[1], h[2], n);
            par_abort(CLI_EXIT_NUMERIC);
        }
        coupling_part(s, &c, h[1], buf, h[2]);
        clef_coupling_destroy(c);
        free(buf);
        buf = NULL;
    }
    par_bcast_bytes(&buf, &n);
    if (n) {
        if (clef_ensemble_spectrum_adopt(s->ctx, buf, n) == CLEF_OK)
            s->adopted = 1;
        else
            cli_warn("rank %d: rank 0's mask pieces were not taken (%s): this rank makes or "
                     "reads them itself", par_rank(), clef_last_error());
    }
    free(buf);
    s->bytes = (double)n;
    s->seconds = clef_wtime() - t0;
    s->done = 1;
    if (cli_verbosity >= 2)
        fprintf(stderr, "clef sims: rank %d: %.1f MB of mask pieces from rank 0 after %.2f s\n",
                par_rank(), 1e-6 * (double)n, s->seconds);
}

static void progress(const sims_run *r, long done_here, double t0, int last)
{
    static double t_last = -1e30;
    if (cli_verbosity < 1 || par_rank() != 0)
        return;
    /* at most one line every 2 s (and the last one) */
    if (!last && clef_wtime() - t_last < 2.0)
        return;
    t_last = clef_wtime();
    /* Realisations finished by all ranks: the records in the run folder. */
    long total_done = 0;
    DIR *d = opendir(r->real_dir);
    if (d) {
        struct dirent *e;
        while ((e = readdir(d)))
            if (e->d_name[0] != '.' && strstr(e->d_name, ".rec"))
                total_done++;
        closedir(d);
    }
    const long total = r->a->nreal + r->a->nnoise;
    const double el = clef_wtime() - t0;
    const double rate = el > 0 ? done_here * par_size() / el : 0; /* all ranks alike */
    const long left = total - total_done;
    fprintf(stderr, "clef sims: %ld/%ld realisations done, %.2f per minute, about %.0f s left\n",
            total_done, total, 60.0 * rate, rate > 0 ? left / rate : 0.0);
}

int cmd_sims(int argc, char **argv)
{
    sims_args a;
    int rc = parse_args(argc, argv, &a);
    if (rc)
        return rc < 0 ? CLI_EXIT_OK : rc;
    if ((rc = par_init(&argc, &argv, a.want_mpi)) != CLI_EXIT_OK)
        return rc;
    cli_setup_logging();
    /* OpenBLAS splits dgemm and dgetrf differently for different thread
     * counts, which changes the last bits of the band powers; one BLAS
     * thread (clef's own OpenMP loops keep theirs) makes every realisation
     * bit-identical whatever OMP_NUM_THREADS is (docs/ensemble.md). */
    openblas_set_num_threads(1);
    /* A fixed mmap threshold: glibc raises it (up to 32 MiB) each time a
     * large block is freed, after which map-sized blocks (25 MB at nside
     * 512) come from the heap and stay with the process when freed.  Over
     * an ensemble's realisations that kept 25 MB at nside 512 above the
     * heap's own peak (heaptrack against /usr/bin/time; docs/
     * performance.md).  Above 32 MiB (nside >= 1024) glibc maps the blocks
     * anyway. */
    mallopt(M_MMAP_THRESHOLD, 4 << 20);
    const int rank = par_rank(), size = par_size();
    if (rank != 0 && cli_verbosity == 1)
        cli_verbosity = 0; /* warnings and progress once, from rank 0 */
    const double t_begin = clef_wtime();

    sims_run r;
    memset(&r, 0, sizeof r);
    r.a = &a;
    int status = CLEF_OK;
    clef_map *masks[2] = {NULL, NULL}, *hits = NULL;
    cli_analysis_tables tables;
    memset(&tables, 0, sizeof tables);
    clef_ensemble_plan *plan = NULL;
    char *desc = NULL;
    double *acct = NULL;
    long nacct = 0;
    int agreed = 0;
    double *beam_sim = NULL;

    if (a.maps && (rc = load_map_list(&a)) != CLI_EXIT_OK)
        goto out;
    desc = run_description(&a);
    if (!desc) {
        rc = CLI_EXIT_NOMEM;
        goto out;
    }
    clef_sha256_buffer(desc, strlen(desc), r.hash);
    snprintf(r.real_dir, sizeof r.real_dir, "%s/realisations", a.run);
    if (a.output)
        snprintf(r.prefix, sizeof r.prefix, "%s", a.output);
    else
        snprintf(r.prefix, sizeof r.prefix, "%s/ensemble", a.run);
    if (rank == 0)
        rc = open_run_folder(&a, desc, r.hash);
    if ((rc = par_bcast_int(rc)) != CLI_EXIT_OK) {
        agreed = 1; /* every rank has the same code: end without MPI_Abort */
        goto out;
    }

    /* Masks: read by rank 0, sent to the others; tables once per rank. */
    for (int k = 0; k < 2; k++)
        if (a.an.mask[k] && (rc = shared_map(&r, a.an.mask[k], 1, &masks[k], &agreed)))
            goto out;
    r.nside = a.maps ? 0 : a.nside;
    if (a.maps) { /* the nside of the given maps: rank 0 reads the first */
        int code = 0, ns = 0;
        if (rank == 0) {
            clef_map *m0 = NULL;
            const int st = cli_analysis_read_map(&a.an, a.list[0][0], 0, &m0);
            code = st < 0 ? -st : st ? cli_fail(st) : 0;
            ns = m0 ? (int)m0->nside : 0;
            clef_map_free(m0);
        }
        if ((rc = par_bcast_int(code)) != CLI_EXIT_OK) {
            agreed = 1;
            goto out;
        }
        r.nside = par_bcast_int(ns);
    }
    if ((status = cli_analysis_setup(&a.an, r.nside, &r.so, &tables)) != CLEF_OK)
        goto out;
    r.so.names[2] = a.an.mask[0];
    r.so.names[3] = a.an.mask[1];
    r.lsim = (int)(3 * r.nside - 1);
    if (!(r.cl = calloc((size_t)r.lsim + 1, sizeof *r.cl))) {
        status = CLEF_ENOMEM;
        goto out;
    }
    if ((status = load_input_cl(&a, r.lsim, r.cl)) != CLEF_OK)
        goto out;
    clef_ensemble_spectrum_ctx sctx;
    clef_ensemble_analyser an;
    clef_ensemble_spectrum_analyser(&sctx, masks[0], masks[1], &r.so, &an);
    r.sctx = &sctx;
    clef_ensemble_sim sim = {.nside = r.nside, .cl = r.cl};
    if (!a.maps) {
        sim.sim.beam_fwhm = a.an.beam_fwhm;
        if (r.so.beam) {
            /* a beam table shorter than the simulation: B = 0 beyond */
            if (!(beam_sim = calloc((size_t)r.lsim + 1, sizeof *beam_sim))) {
                status = CLEF_ENOMEM;
                goto out;
            }
            for (int l = 0; l <= r.so.beam_lmax && l <= r.lsim; l++)
                beam_sim[l] = r.so.beam[l];
            sim.sim.beam = beam_sim;
        }
        sim.sim.pixel_window = !a.an.no_pixel_window;
        sim.sim.noise_depth = a.depth;
        sim.sim.nsplits = a.splits;
        if (a.hits) {
            if ((rc = shared_map(&r, a.hits, 1, &hits, &agreed)) != CLI_EXIT_OK)
                goto out;
            if (hits->nside != r.nside) {
                status = CLEF_EINVAL;
                fprintf(stderr, "clef: error: hit map '%s' has nside %lld, the simulation %ld\n",
                        a.hits, (long long)hits->nside, a.nside);
                rc = CLI_EXIT_INVALID;
                status = CLEF_OK;
                goto out;
            }
            sim.sim.hits = hits->pix;
        }
    }
    status = clef_ensemble_plan_create(&plan, a.maps ? NULL : &sim, &an);
    if (status != CLEF_OK)
        goto out;

    /* Which realisations are left: every rank looks (the folder is shared),
     * after rank 0 made it and before anyone writes. */
    const long total = a.nreal + a.nnoise;
    long *todo = malloc(sizeof *todo * (size_t)total);
    if (!todo) {
        status = CLEF_ENOMEM;
        goto out;
    }
    long ntodo = 0;
    for (long k = 0; k < total; k++) {
        const int kind = k >= a.nreal;
        if (!sims_record_exists(&r, kind, kind ? k - a.nreal : k))
            todo[ntodo++] = k;
    }
    par_barrier();
    r.nskipped = total - ntodo;
    if (rank == 0 && cli_verbosity >= 1 && r.nskipped)
        fprintf(stderr, "clef sims: %ld of %ld realisations already in '%s', %ld to do\n",
                r.nskipped, total, a.run, ntodo);

    /* Ranks take realisations in turn (position k of the to-do list goes
     * to rank k mod size).  Rank 0's first realisation makes the mask
     * pieces (or reads them from the cache) and writes the windows; it
     * sends the pieces to the other ranks, which make and transform their
     * first realisation meanwhile and receive them (in the analyser's
     * after_maps) just before what depends on the masks: neither the
     * coupling nor the cache is touched there.  From then on each rank
     * keeps the pieces in memory (clef_estimator_reuse). */
    acct = malloc(sizeof *acct * (size_t)(SIMS_ACCT * (ntodo / size + 2)));
    if (!acct) {
        free(todo);
        status = CLEF_ENOMEM;
        goto out;
    }
    const double t_loop = clef_wtime();
    long done_here = 0;
    sims_share share = {.ctx = &sctx, .done = size == 1};
    for (long k = rank; k < ntodo; k += size) {
        const long g = todo[k];
        const int kind = g >= a.nreal;
        const long i = kind ? g - a.nreal : g;
        double ts = 0, ta = 0;
        if (!share.done && rank != 0) {
            sctx.after_maps = share_receive;
            sctx.after_maps_arg = &share;
        }
        if (!share.done && rank == 0) { /* the others make rows of its couplings meanwhile */
            r.so.coupling_create = shared_coupling;
            r.so.coupling_arg = &share;
        }
        rc = sims_do_one(&r, plan, kind, i, &ts, &ta);
        r.so.coupling_create = NULL;
        r.so.coupling_arg = NULL;
        if (rc != CLI_EXIT_OK) {
            free(todo);
            par_abort(rc);
            goto out;
        }
        if (!share.done) /* rank 0 after its first realisation (the others received) */
            share_send(&share);
        double *ac = acct + SIMS_ACCT * nacct++;
        ac[0] = (double)g;
        ac[1] = ts;
        ac[2] = ta;
        ac[3] = (double)rank;
        done_here++;
        if (cli_verbosity >= 2)
            fprintf(stderr, "clef sims: rank %d: %s realisation %ld in %.2f s (simulate %.2f, "
                    "analyse %.2f)\n", rank, kind ? "noise-only" : "signal", i, ts + ta, ts,
                    ta);
        progress(&r, done_here, t_loop, k + size >= ntodo);
    }
    if (!share.done) { /* a rank without realisations */
        if (rank == 0)
            share_send(&share);
        else
            share_receive(&share);
    }
    free(todo);
    r.t_loop = clef_wtime() - t_loop;
    double *all = NULL;
    int *counts = NULL;
    /* What each rank made, read and received of the mask pieces. */
    const double rstat[SIMS_RSTAT] = {
        (double)sctx.couplings_computed, (double)sctx.couplings_read,
        (double)sctx.mask_transforms, (double)sctx.pieces_reused, (double)sctx.pieces_adopted,
        share.bytes, share.seconds, r.map_bytes, r.map_seconds, (double)share.jobs,
        (double)share.rows};
    if (par_gather(rstat, SIMS_RSTAT, &r.rstat_all, &counts)) {
        status = CLEF_ENOMEM;
        goto out;
    }
    free(counts);
    counts = NULL;
    if (par_gather(acct, (int)(SIMS_ACCT * nacct), &all, &counts)) {
        status = CLEF_ENOMEM;
        goto out;
    }
    par_barrier();
    if (rank == 0) {
        r.acct_all = all;
        r.acct_counts = counts;
        r.nranks = size;
        r.nthreads = omp_get_max_threads();
        r.t_begin = t_begin;
        r.argc = argc;
        r.argv = argv;
        r.desc = desc;
        rc = sims_products(&r);
        all = NULL;
        counts = NULL;
    }
    free(all);
    free(counts);
    rc = par_bcast_int(rc);
    agreed = 1;

out:
    if (status != CLEF_OK && status > 0)
        rc = cli_fail(status);
    else if (status < 0)
        rc = -status;
    if (rc != CLI_EXIT_OK && !agreed)
        par_abort(rc); /* one rank failed: take the job down */
    clef_ensemble_plan_destroy(plan);
    free(beam_sim);
    cli_analysis_tables_free(&tables);
    clef_map_free(masks[0]);
    clef_map_free(masks[1]);
    clef_map_free(hits);
    free(r.cl);
    free(desc);
    free(acct);
    free(r.acct_all);
    free(r.acct_counts);
    free(r.rstat_all);
    if (a.list) {
        for (long i = 0; i < a.nreal; i++) {
            free(a.list[i][0]);
            free(a.list[i][1]);
        }
        free(a.list);
    }
    par_finalize();
    return rc;
}
