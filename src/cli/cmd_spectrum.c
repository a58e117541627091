/* clef spectrum: the main job.  One or two maps and a mask -> decoupled band
 * powers with errors, the first acoustic peak, and pipeline outputs (FITS
 * table, CSV, JSON run summary). */
#define _POSIX_C_SOURCE 200809L
#include <cjson/cJSON.h>
#include <getopt.h>
#include <math.h>
#include <omp.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "clef/beam.h"
#include "clef/bins.h"
#include "clef/coupling.h"
#include "clef/hash.h"
#include "clef/map.h"
#include "clef/peak.h"
#include "clef/spectrum.h"
#include "clef/table.h"
#include "clef/theory.h"
#include "cli.h"

static const char *CMD = "spectrum";

static void help(void)
{
    printf(
        "Usage: clef spectrum MAP [MAP2] --mask MASK [options]\n\n"
        "Decoupled band powers of a HEALPix map (auto-spectrum) or of two maps\n"
        "(cross-spectrum, e.g. two noise splits: no noise bias), corrected for the\n"
        "mask's mode coupling, the beam, the pixel window and a transfer function,\n"
        "with a Gaussian covariance and the first acoustic peak.\n\n"
        "Inputs:\n"
        "  --mask FILE            mask (weights in [0,1]) for MAP, and for MAP2 unless --mask2\n"
        "  --mask2 FILE           separate mask for MAP2\n"
        "  --hdu H, --column C    table and column of the maps (default: first table,\n"
        "                         first value column)\n"
        "  --allow-coord-mismatch accept map and mask with different COORDSYS\n"
        "  --ordering RING|NESTED pixel order of map and mask files that have no ORDERING\n"
        "                         keyword (default: such files are refused)\n"
        "  --unit U               unit of the map values (K, mK or uK, with or without _CMB),\n"
        "                         overriding the files' TUNIT (default: TUNIT; a unit clef\n"
        "                         does not know is refused, no TUNIT is taken as uK)\n"
        "  --calibration F        multiply the map values by F to get uK (instead of --unit)\n"
        "  --polarization         T, Q, U maps: the six spectra TT TE TB EE EB BB\n"
        "                         (clef spectrum --polarization --help)\n\n"
        "Multipoles and bins:\n"
        "  --lmax L               highest multipole reported (default 2*nside, lowered where\n"
        "                         the beam x pixel window drops below 0.01 or a table ends,\n"
        "                         then to the end of the last whole bin; at most 3*nside-1,\n"
        "                         with a warning above 2*nside)\n"
        "  --bin-width N          linear bins of N multipoles from l=2 (default: automatic,\n"
        "                         max(20, the mask's coupling width))\n"
        "  --log-bins N           N logarithmic bins from l=2 to lmax instead\n"
        "  --bins FILE            bin edges from a text file (docs/coupling.md)\n\n"
        "Instrument:\n"
        "  --beam-fwhm ARCMIN     Gaussian beam full width at half maximum (default: none)\n"
        "  --beam-table FILE      tabulated beam, columns 'l B_l'\n"
        "  --no-pixel-window      do not correct for the pixel window (default: corrected)\n"
        "  --transfer FILE        transfer function, columns 'l F_l'\n"
        "  --noise-cl FILE        noise spectrum N_l [uK^2] to subtract (auto-spectra)\n"
        "  --theory FILE          C_l [uK^2] used in the covariance instead of the measured one\n\n"
        "Method:\n"
        "  --iterations N         analysis iterations (default %d)\n"
        "  --keep-multipoles      keep the monopole and dipole (default: fitted on the\n"
        "                         observed sky and removed)\n"
        "  --cache-dir DIR        coupling cache folder (default $CLEF_CACHE_DIR,\n"
        "                         $XDG_CACHE_HOME/clef or ~/.cache/clef)\n"
        "  --no-cache             neither read nor write the coupling cache\n"
        "  --cache-limit SIZE     keep the cache folder under SIZE (e.g. 500M, 4G; 0: no\n"
        "                         limit), removing least recently used entries\n"
        "                         (default $CLEF_CACHE_LIMIT, else 4G)\n\n"
        "First peak:\n"
        "  --peak-l-min L, --peak-l-max L   search window (default 100..400)\n"
        "  --peak-half-width L    multipoles each side of the fit centre used in the fit\n"
        "                         (default: max(120, three bin widths); docs/peak.md)\n"
        "  --no-peak              skip the peak fit\n\n"
        "Output:\n"
        "  -o, --output PREFIX    write PREFIX.fits, PREFIX.csv, PREFIX-cov.csv,\n"
        "                         PREFIX-windows.csv (band-power window functions), PREFIX.json\n"
        "                         (default: the first map's name without folder and\n"
        "                         extension, followed by -bandpowers)\n"
        "  --format LIST          comma-separated subset of fits,csv,json (default all three)\n"
        "  --json FILE            write the JSON run summary to FILE instead of PREFIX.json\n"
        "                         ('-': standard output; the text summary then goes to\n"
        "                         standard error)\n"
        "  --threads N            OpenMP threads (default: OMP_NUM_THREADS or all cores)\n"
        "  --quiet                print errors only (files are still written)\n"
        "  --verbose, --help\n\n"
        "No output may be an input file (same file under any name: exit 3); the output\n"
        "folders are checked before the computation (exit 4).\n"
        "Exit codes: 0 ok, 2 usage, 3 invalid input, 4 I/O, 5 bad file format,\n"
        "6 numerical failure (e.g. singular coupling: widen the bins), 8 out of memory.\n",
        CLEF_SPECTRUM_ITERATIONS);
}

enum {
    OPT_MASK = 256, OPT_MASK2, OPT_HDU, OPT_COLUMN, OPT_COORD, OPT_LMAX, OPT_BINW, OPT_LOGB,
    OPT_BINS, OPT_FWHM, OPT_BEAMF, OPT_NOPIX, OPT_TRANSFER, OPT_NOISE, OPT_THEORY, OPT_ITER,
    OPT_KEEP, OPT_CACHE, OPT_NOCACHE, OPT_CACHELIMIT, OPT_PLMIN, OPT_PLMAX, OPT_PHW,
    OPT_NOPEAK, OPT_FORMAT, OPT_THREADS, OPT_QUIET, OPT_VERBOSE, OPT_HELP, OPT_JSON, OPT_ORDERING,
    OPT_UNIT, OPT_CALIB
};

typedef struct args {
    const char *map[2], *mask[2], *hdu, *column, *bins_file, *beam_file, *transfer_file;
    const char *noise_file, *theory_file, *cache_dir, *output, *format, *threads;
    const char *json, *ordering, *unit;
    long lmax, bin_width, log_bins, iterations;
    double beam_fwhm, peak_lmin, peak_lmax, peak_hw, calibration;
    int no_peak, no_pixel_window, keep, no_cache, coord;
    int want_fits, want_csv, want_json;
} args;

static int parse_format(args *a, const char *s)
{
    a->want_fits = a->want_csv = a->want_json = 0;
    char buf[256];
    snprintf(buf, sizeof buf, "%s", s);
    for (char *tok = strtok(buf, ","); tok; tok = strtok(NULL, ",")) {
        if (!strcmp(tok, "fits"))
            a->want_fits = 1;
        else if (!strcmp(tok, "csv"))
            a->want_csv = 1;
        else if (!strcmp(tok, "json"))
            a->want_json = 1;
        else
            return cli_usage_error(CMD, "--format: unknown format '%s' (fits, csv, json)", tok);
    }
    if (!a->want_fits && !a->want_csv && !a->want_json)
        return cli_usage_error(CMD, "--format: no format given");
    return 0;
}

static int parse_args(int argc, char **argv, args *a)
{
    static const struct option opts[] = {
        {"mask", required_argument, 0, OPT_MASK},
        {"mask2", required_argument, 0, OPT_MASK2},
        {"hdu", required_argument, 0, OPT_HDU},
        {"column", required_argument, 0, OPT_COLUMN},
        {"allow-coord-mismatch", no_argument, 0, OPT_COORD},
        {"lmax", required_argument, 0, OPT_LMAX},
        {"bin-width", required_argument, 0, OPT_BINW},
        {"log-bins", required_argument, 0, OPT_LOGB},
        {"bins", required_argument, 0, OPT_BINS},
        {"beam-fwhm", required_argument, 0, OPT_FWHM},
        {"beam-table", required_argument, 0, OPT_BEAMF},
        {"no-pixel-window", no_argument, 0, OPT_NOPIX},
        {"transfer", required_argument, 0, OPT_TRANSFER},
        {"noise-cl", required_argument, 0, OPT_NOISE},
        {"theory", required_argument, 0, OPT_THEORY},
        {"iterations", required_argument, 0, OPT_ITER},
        {"keep-multipoles", no_argument, 0, OPT_KEEP},
        {"cache-dir", required_argument, 0, OPT_CACHE},
        {"no-cache", no_argument, 0, OPT_NOCACHE},
        {"cache-limit", required_argument, 0, OPT_CACHELIMIT},
        {"peak-l-min", required_argument, 0, OPT_PLMIN},
        {"peak-l-max", required_argument, 0, OPT_PLMAX},
        {"peak-half-width", required_argument, 0, OPT_PHW},
        {"no-peak", no_argument, 0, OPT_NOPEAK},
        {"output", required_argument, 0, 'o'},
        {"format", required_argument, 0, OPT_FORMAT},
        {"json", required_argument, 0, OPT_JSON},
        {"ordering", required_argument, 0, OPT_ORDERING},
        {"unit", required_argument, 0, OPT_UNIT},
        {"calibration", required_argument, 0, OPT_CALIB},
        {"threads", required_argument, 0, OPT_THREADS},
        {"quiet", no_argument, 0, OPT_QUIET},
        {"verbose", no_argument, 0, OPT_VERBOSE},
        {"help", no_argument, 0, OPT_HELP},
        {0, 0, 0, 0}};
    memset(a, 0, sizeof *a);
    a->iterations = CLEF_SPECTRUM_ITERATIONS;
    a->peak_lmin = -1;
    a->peak_lmax = -1;
    a->want_fits = a->want_csv = a->want_json = 1;
    int c;
    opterr = 0;
    while ((c = getopt_long(argc, argv, "o:", opts, NULL)) != -1) {
        switch (c) {
        case OPT_MASK: a->mask[0] = optarg; break;
        case OPT_MASK2: a->mask[1] = optarg; break;
        case OPT_HDU: a->hdu = optarg; break;
        case OPT_COLUMN: a->column = optarg; break;
        case OPT_COORD: a->coord = 1; break;
        case OPT_LMAX:
            if (cli_parse_long(CMD, "--lmax", optarg, &a->lmax))
                return CLI_EXIT_USAGE;
            if (a->lmax < 2)
                return cli_usage_error(CMD, "--lmax must be at least 2, got %ld", a->lmax);
            break;
        case OPT_BINW:
            if (cli_parse_long(CMD, "--bin-width", optarg, &a->bin_width))
                return CLI_EXIT_USAGE;
            if (a->bin_width < 1)
                return cli_usage_error(CMD, "--bin-width must be positive, got %ld",
                                       a->bin_width);
            break;
        case OPT_LOGB:
            if (cli_parse_long(CMD, "--log-bins", optarg, &a->log_bins))
                return CLI_EXIT_USAGE;
            if (a->log_bins < 1)
                return cli_usage_error(CMD, "--log-bins must be positive, got %ld", a->log_bins);
            break;
        case OPT_BINS: a->bins_file = optarg; break;
        case OPT_FWHM:
            if (cli_parse_double(CMD, "--beam-fwhm", optarg, &a->beam_fwhm))
                return CLI_EXIT_USAGE;
            if (a->beam_fwhm < 0)
                return cli_usage_error(CMD, "--beam-fwhm must not be negative, got %g",
                                       a->beam_fwhm);
            break;
        case OPT_BEAMF: a->beam_file = optarg; break;
        case OPT_NOPIX: a->no_pixel_window = 1; break;
        case OPT_TRANSFER: a->transfer_file = optarg; break;
        case OPT_NOISE: a->noise_file = optarg; break;
        case OPT_THEORY: a->theory_file = optarg; break;
        case OPT_ITER:
            if (cli_parse_long(CMD, "--iterations", optarg, &a->iterations))
                return CLI_EXIT_USAGE;
            if (a->iterations < 0 || a->iterations > 20)
                return cli_usage_error(CMD, "--iterations must be in 0..20, got %ld",
                                       a->iterations);
            break;
        case OPT_KEEP: a->keep = 1; break;
        case OPT_CACHE: a->cache_dir = optarg; break;
        case OPT_NOCACHE: a->no_cache = 1; break;
        case OPT_CACHELIMIT: {
            long long bytes;
            if (clef_cache_parse_size(optarg, &bytes) != CLEF_OK)
                return cli_usage_error(CMD, "--cache-limit: %s", clef_last_error());
            clef_cache_set_limit(bytes);
            break;
        }
        case OPT_PLMIN:
            if (cli_parse_double(CMD, "--peak-l-min", optarg, &a->peak_lmin))
                return CLI_EXIT_USAGE;
            break;
        case OPT_PLMAX:
            if (cli_parse_double(CMD, "--peak-l-max", optarg, &a->peak_lmax))
                return CLI_EXIT_USAGE;
            break;
        case OPT_PHW:
            if (cli_parse_double(CMD, "--peak-half-width", optarg, &a->peak_hw))
                return CLI_EXIT_USAGE;
            if (!(a->peak_hw > 0))
                return cli_usage_error(CMD, "--peak-half-width must be positive, got %g",
                                       a->peak_hw);
            break;
        case OPT_NOPEAK: a->no_peak = 1; break;
        case 'o':
            a->output = optarg;
            if (strlen(optarg) > 3000)
                return cli_usage_error(CMD, "--output: prefix longer than 3000 characters");
            break;
        case OPT_FORMAT:
            if (parse_format(a, optarg))
                return CLI_EXIT_USAGE;
            break;
        case OPT_JSON: a->json = optarg; break;
        case OPT_ORDERING: a->ordering = optarg; break;
        case OPT_UNIT:
            if (clef_unit_to_uk(optarg) == 0)
                return cli_usage_error(CMD, "--unit: '%s' is not a unit clef knows (K, mK, uK, "
                                       "with or without _CMB)", optarg);
            a->unit = optarg;
            break;
        case OPT_CALIB:
            if (cli_parse_double(CMD, "--calibration", optarg, &a->calibration))
                return CLI_EXIT_USAGE;
            if (!(a->calibration > 0))
                return cli_usage_error(CMD, "--calibration must be positive, got %s", optarg);
            break;
        case OPT_THREADS: a->threads = optarg; break;
        case OPT_QUIET: cli_verbosity = 0; break;
        case OPT_VERBOSE: cli_verbosity = 2; break;
        case OPT_HELP: help(); return -1;
        case '?':
        default:
            return cli_usage_error(CMD, "unknown or incomplete option '%s'", argv[optind - 1]);
        }
    }
    int npos = argc - optind;
    if (npos < 1 || npos > 2)
        return cli_usage_error(CMD, "expected one or two map files, got %d", npos);
    a->map[0] = argv[optind];
    a->map[1] = npos == 2 ? argv[optind + 1] : NULL;
    if (!a->mask[0])
        return cli_usage_error(CMD, "--mask is required");
    if (a->mask[1] && !a->map[1])
        return cli_usage_error(CMD, "--mask2 needs a second map");
    if ((a->bins_file != NULL) + (a->log_bins > 0) + (a->bin_width > 0) > 1)
        return cli_usage_error(CMD, "choose one of --bins, --log-bins and --bin-width");
    if (a->beam_file && a->beam_fwhm > 0)
        return cli_usage_error(CMD, "choose one of --beam-fwhm and --beam-table");
    if (a->unit && a->calibration > 0)
        return cli_usage_error(CMD, "choose one of --unit and --calibration");
    if (a->output && !strcmp(a->output, "-"))
        return cli_usage_error(CMD, "--output takes a prefix for several files, not '-'; "
                               "use --json - for the summary on standard output");
    if (cli_check_ordering(CMD, a->ordering))
        return CLI_EXIT_USAGE;
    if (a->json)
        a->want_json = 1;
    if (a->threads && cli_set_threads(CMD, a->threads))
        return CLI_EXIT_USAGE;
    return 0;
}

/* The default output prefix: the first map's file name without folder and
 * FITS extensions, in the current folder. */
static void default_prefix(const char *map, char *buf, size_t n)
{
    const char *base = strrchr(map, '/');
    base = base ? base + 1 : map;
    snprintf(buf, n, "%s", base);
    static const char *ext[] = {".gz", ".fits", ".fit", ".fts"};
    for (int i = 0; i < 4; i++) {
        size_t lb = strlen(buf), le = strlen(ext[i]);
        if (lb > le && !strcmp(buf + lb - le, ext[i]))
            buf[lb - le] = 0;
    }
    strncat(buf, "-bandpowers", n - strlen(buf) - 1);
}

/* The largest multipole of a spectrum file (text or FITS), else of the
 * first column of a text table ('#' comments), or -1 if none can be read;
 * the table's own reader reports any error in detail. */
static int text_last_l(const char *path)
{
    /* Spectrum files (text or FITS) say it through their own reader. */
    int flmax = -1;
    if (clef_theory_read_cl(path, 0, NULL, &flmax) == CLEF_OK)
        return flmax;
    FILE *f = fopen(path, "r");
    if (!f)
        return -1;
    char line[4096];
    long best = -1;
    while (fgets(line, sizeof line, f)) {
        char *p = line;
        while (*p == ' ' || *p == '\t')
            p++;
        if (*p == '#' || *p == '\n' || *p == '\0')
            continue;
        char *end;
        long l = strtol(p, &end, 10);
        if (end != p && l > best && l < 1000000)
            best = l;
    }
    fclose(f);
    return (int)best;
}

/* Tables indexed by l are read up to `lread`, or to their own end when that
 * comes first (the default lmax and the coupling range then stop there). */
static int table_lmax(const char *path, int lread)
{
    int last = text_last_l(path);
    return last >= 2 && last < lread ? last : lread;
}

static double *read_spectrum_file(const char *path, int lmax, int *status)
{
    double *cl = calloc((size_t)lmax + 1, sizeof *cl);
    if (!cl) {
        *status = CLEF_ENOMEM;
        return NULL;
    }
    *status = clef_theory_read_cl(path, lmax, cl, NULL);
    if (*status != CLEF_OK) {
        free(cl);
        return NULL;
    }
    return cl;
}

static double *read_profile_file(const char *path, int lmax, int *status)
{
    double *v = calloc((size_t)lmax + 1, sizeof *v);
    if (!v) {
        *status = CLEF_ENOMEM;
        return NULL;
    }
    *status = clef_beam_read(path, lmax, v);
    if (*status != CLEF_OK) {
        free(v);
        return NULL;
    }
    return v;
}

static cJSON *input_json(const char *role, const char *path, const clef_map *m)
{
    cJSON *o = cJSON_CreateObject();
    char hex[65];
    cJSON_AddStringToObject(o, "role", role);
    cJSON_AddStringToObject(o, "path", path);
    if (clef_sha256_file(path, hex) == CLEF_OK)
        cJSON_AddStringToObject(o, "sha256", hex);
    if (m) {
        cJSON_AddNumberToObject(o, "nside", (double)m->nside);
        cJSON_AddStringToObject(o, "ordering", m->file_ordering == CLEF_NESTED ? "NESTED" : "RING");
        cJSON_AddStringToObject(o, "coordsys", m->coordsys);
        cJSON_AddStringToObject(o, "column", m->column);
        cJSON_AddStringToObject(o, "unit", m->unit);
        cJSON_AddNumberToObject(o, "missing_pixels", (double)m->nmissing);
    }
    return o;
}

static cJSON *peak_json(const clef_spectrum_result *r, const clef_spectrum_opts *so)
{
    cJSON *o = cJSON_CreateObject();
    cli_peak_json(o, &r->peak, &so->peak);
    return o;
}

static cJSON *array_json(const double *v, int n)
{
    cJSON *a = cJSON_CreateArray();
    for (int i = 0; i < n; i++)
        cJSON_AddItemToArray(a, cJSON_CreateNumber(isfinite(v[i]) ? v[i] : 0.0));
    return a;
}

static cJSON *int_array_json(const int *v, int n)
{
    cJSON *a = cJSON_CreateArray();
    for (int i = 0; i < n; i++)
        cJSON_AddItemToArray(a, cJSON_CreateNumber(v[i]));
    return a;
}

/* Moments of the effective weights of one map: mask x validity of the map
 * (the estimator's w, docs/method.md), for the run summary of each mask. */
typedef struct mask_moments {
    double fsky, w1, w2, w4, fsky_eff;
} mask_moments;

static void moments_json(cJSON *o, const mask_moments *m)
{
    cJSON_AddNumberToObject(o, "f_sky", m->fsky);
    cJSON_AddNumberToObject(o, "w1", m->w1);
    cJSON_AddNumberToObject(o, "w2", m->w2);
    cJSON_AddNumberToObject(o, "w4", m->w4);
    cJSON_AddNumberToObject(o, "f_sky_eff", m->fsky_eff);
}

static cJSON *summary_json(int argc, char **argv, const args *a, clef_map *const maps[4],
                          const clef_spectrum_opts *so, const clef_spectrum_result *r,
                          const mask_moments *mm2, double t_read, double t_total, const char *const *outputs, int nout)
{
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "program", "clef");
    cJSON_AddStringToObject(root, "version", CLEF_VERSION);
    char cmd[4096] = "";
    for (int i = 0; i < argc; i++) {
        strncat(cmd, i ? " " : "clef ", sizeof cmd - strlen(cmd) - 1);
        strncat(cmd, argv[i], sizeof cmd - strlen(cmd) - 1);
    }
    cJSON_AddStringToObject(root, "command", cmd);
    char when[32];
    time_t now = time(NULL);
    strftime(when, sizeof when, "%Y-%m-%dT%H:%M:%SZ", gmtime(&now));
    cJSON_AddStringToObject(root, "finished_utc", when);
    cJSON_AddStringToObject(root, "spectrum", r->cross ? "cross" : "auto");

    cJSON *in = cJSON_AddArrayToObject(root, "inputs");
    cJSON_AddItemToArray(in, input_json("map1", a->map[0], maps[0]));
    if (a->map[1])
        cJSON_AddItemToArray(in, input_json("map2", a->map[1], maps[1]));
    cJSON_AddItemToArray(in, input_json("mask1", a->mask[0], maps[2]));
    if (a->mask[1])
        cJSON_AddItemToArray(in, input_json("mask2", a->mask[1], maps[3]));
    const char *files[][2] = {{"bins", a->bins_file}, {"beam", a->beam_file},
                              {"transfer", a->transfer_file}, {"noise", a->noise_file},
                              {"theory", a->theory_file}};
    for (int i = 0; i < 5; i++)
        if (files[i][1])
            cJSON_AddItemToArray(in, input_json(files[i][0], files[i][1], NULL));

    cJSON *op = cJSON_AddObjectToObject(root, "options");
    cJSON_AddNumberToObject(op, "lmax", r->lmax);
    cJSON_AddNumberToObject(op, "lmax_coupled", r->lmax_ext);
    cJSON_AddNumberToObject(op, "lmax_mask", r->lmax_mask);
    cJSON_AddNumberToObject(op, "hidden_bins", r->nbins_hidden);
    cJSON_AddNumberToObject(op, "nbins", r->nbins);
    if (r->bin_width)
        cJSON_AddNumberToObject(op, "bin_width", r->bin_width);
    cJSON_AddNumberToObject(op, "beam_fwhm_arcmin", so->beam_fwhm);
    cJSON_AddBoolToObject(op, "pixel_window", so->pixel_window);
    cJSON_AddNumberToObject(op, "iterations", so->iterations);
    cJSON_AddBoolToObject(op, "multipoles_removed", !so->keep_multipoles);
    cJSON_AddNumberToObject(op, "removal_corrected_to_l", r->ldep);
    cJSON_AddBoolToObject(op, "cache", so->use_cache);
    cJSON_AddStringToObject(op, "covariance_spectrum", so->theory_cl ? "theory" : "measured");
    cJSON_AddNumberToObject(op, "peak_l_min", so->peak.l_min);
    cJSON_AddNumberToObject(op, "peak_l_max", so->peak.l_max);
    cJSON_AddNumberToObject(op, "threads", omp_get_max_threads());
    if (a->unit)
        cJSON_AddStringToObject(op, "unit", a->unit);
    if (a->calibration > 0)
        cJSON_AddNumberToObject(op, "calibration", a->calibration);
    if (a->ordering)
        cJSON_AddStringToObject(op, "ordering_assumed", a->ordering);

    cJSON *sky = cJSON_AddObjectToObject(root, "sky");
    cJSON_AddNumberToObject(sky, "nside", (double)r->nside);
    const mask_moments mm1 = {r->fsky, r->w1, r->w2, r->w4, r->fsky_eff};
    moments_json(sky, &mm1);
    if (mm2) /* --mask2: the second map's effective mask too */
        moments_json(cJSON_AddObjectToObject(sky, "mask2"), mm2);
    cJSON *mp = cJSON_AddArrayToObject(sky, "removed_multipoles_uK");
    for (int i = 0; i <= r->cross; i++)
        cJSON_AddItemToArray(mp, array_json(r->multipoles[i], 4));

    cJSON *cp = cJSON_AddObjectToObject(root, "coupling");
    cJSON_AddNumberToObject(cp, "rcond", r->rcond);
    cJSON_AddBoolToObject(cp, "cache_hit", r->cache_hit);

    cJSON *tm = cJSON_AddObjectToObject(root, "timings_s");
    cJSON_AddNumberToObject(tm, "read", t_read);
    for (int i = 0; i < r->nstages; i++)
        cJSON_AddNumberToObject(tm, r->stage[i].name, r->stage[i].seconds);
    cJSON_AddNumberToObject(tm, "total", t_total);

    const clef_bandpowers *bp = r->bp;
    cJSON *b = cJSON_AddObjectToObject(root, "bandpowers");
    cJSON_AddItemToObject(b, "l_min", int_array_json(bp->l_lo, bp->nbins));
    cJSON_AddItemToObject(b, "l_max", int_array_json(bp->l_hi, bp->nbins));
    cJSON_AddItemToObject(b, "l_eff", array_json(bp->l_eff, bp->nbins));
    cJSON_AddItemToObject(b, "d_uK2", array_json(bp->dl, bp->nbins));
    cJSON_AddItemToObject(b, "d_err_uK2", array_json(bp->dl_err, bp->nbins));
    cJSON_AddItemToObject(b, "c_uK2", array_json(bp->cl, bp->nbins));
    if (bp->win) {
        /* The windows themselves are in the FITS HDU BANDWIN and the
         * windows CSV; the summary records their range and row sums
         * (docs/formats-spectrum.md). */
        cJSON *wj = cJSON_AddObjectToObject(b, "windows");
        cJSON_AddNumberToObject(wj, "l_min", 0);
        cJSON_AddNumberToObject(wj, "l_max", bp->win_lmax);
        cJSON_AddStringToObject(wj, "fits_hdu", "BANDWIN");
        double *sums = calloc((size_t)bp->nbins, sizeof *sums);
        if (sums) {
            const size_t n = (size_t)bp->win_lmax + 1;
            for (int i = 0; i < bp->nbins; i++)
                for (size_t l = 0; l < n; l++)
                    sums[i] += bp->win[(size_t)i * n + l];
            cJSON_AddItemToObject(wj, "row_sums", array_json(sums, bp->nbins));
            free(sums);
        }
    }
    if (r->peak_done)
        cJSON_AddItemToObject(root, "peak", peak_json(r, so));
    cJSON *w = cJSON_AddArrayToObject(root, "warnings");
    for (int i = 0; i < cli_nwarnings(); i++)
        cJSON_AddItemToArray(w, cJSON_CreateString(cli_warning(i)));
    cJSON *o = cJSON_AddArrayToObject(root, "outputs");
    for (int i = 0; i < nout; i++)
        cJSON_AddItemToArray(o, cJSON_CreateString(outputs[i]));
    return root;
}


/* A beam, transfer or noise table shorter than the map's multipole range
 * stops the coupled range (and below 2 nside the default lmax) at its last
 * l: say so, naming the file, in the warnings (stderr and the JSON
 * summary).  The library's own warning names the table kind only. */
static void warn_table_caps(const args *a, const clef_spectrum_opts *so,
                            const clef_spectrum_result *r, int lread)
{
    const struct { const char *what, *path; int last; } t[] = {
        {"beam table", a->beam_file, so->beam_lmax},
        {"transfer function", a->transfer_file, so->transfer_lmax},
        {"noise spectrum", a->noise_file, so->noise_lmax},
    };
    for (int i = 0; i < 3; i++)
        if (t[i].path && t[i].last < lread && r->lmax_ext == t[i].last)
            cli_warn("lmax capped at %d: the %s '%s' ends at l = %d, below the map's l = %d; "
                     "band powers stop at %d and the coupling (hidden bins) at %d; give a "
                     "longer table to go further", t[i].last, t[i].what, t[i].path, t[i].last,
                     lread, r->lmax, r->lmax_ext);
}

static void print_result(FILE *out, const args *a, const clef_spectrum_result *r)
{
    const clef_bandpowers *bp = r->bp;
    fprintf(out, "%s-spectrum of %s%s%s with mask %s\n", r->cross ? "cross" : "auto", a->map[0],
           r->cross ? " x " : "", r->cross ? a->map[1] : "", a->mask[0]);
    fprintf(out, "nside %lld, lmax %d, %d bins, sky fraction %.4f (effective %.4f), "
           "coupling 1/cond %.3g%s\n",
           (long long)r->nside, r->lmax, r->nbins, r->fsky, r->fsky_eff, r->rcond,
           r->cache_hit ? " (cached)" : "");
    fprintf(out, "%5s %11s %9s %14s %13s\n", "bin", "l range", "l_eff", "D_b [uK^2]", "sigma [uK^2]");
    for (int b = 0; b < bp->nbins; b++) {
        char range[32];
        snprintf(range, sizeof range, "%d-%d", bp->l_lo[b], bp->l_hi[b]);
        fprintf(out, "%5d %11s %9.1f %14.3f %13.3f\n", b, range, bp->l_eff[b], bp->dl[b], bp->dl_err[b]);
    }
    if (r->peak_done) {
        const clef_peak_result *p = &r->peak;
        if (p->found)
            fprintf(out, "first peak: l = %.2f +/- %.2f, D = %.1f +/- %.1f uK^2, angular scale "
                   "%.4f +/- %.4f deg, chi2 %.2f for %d dof\n",
                   p->l_peak, p->l_peak_err, p->d_peak, p->d_peak_err, p->theta_deg,
                   p->theta_deg_err, p->chi2, p->dof);
        else
            fprintf(out, "first peak: none found (%s)\n", p->reason);
    }
}

/* Moments of the effective weights of one map: mask x validity of the map
 * (the estimator's w, docs/method.md), for the run summary of each mask. */
static void effective_moments(const clef_map *map, const clef_map *mask, mask_moments *m)
{
    double s1 = 0, s2 = 0, s4 = 0;
    int64_t nobs = 0;
    for (int64_t p = 0; p < mask->npix; p++) {
        const double w = (map->valid[p] && mask->valid[p]) ? mask->pix[p] : 0.0;
        s1 += w;
        s2 += w * w;
        s4 += w * w * w * w;
        nobs += w > 0;
    }
    const double n = (double)mask->npix;
    m->fsky = (double)nobs / n;
    m->w1 = s1 / n;
    m->w2 = s2 / n;
    m->w4 = s4 / n;
    m->fsky_eff = s4 > 0 ? m->w2 * m->w2 / m->w4 : 0.0;
}

/* Units: --calibration scales the values to uK, --unit replaces TUNIT; else
 * a TUNIT clef does not know is refused rather than guessed. */
static int apply_units(const args *a, clef_map *map, const char *path)
{
    if (a->calibration > 0) {
        for (int64_t p = 0; p < map->npix; p++)
            map->pix[p] *= a->calibration;
        snprintf(map->unit, sizeof map->unit, "uK");
        return CLI_EXIT_OK;
    }
    if (a->unit) {
        snprintf(map->unit, sizeof map->unit, "%s", a->unit);
        return CLI_EXIT_OK;
    }
    if (!map->unit[0]) {
        cli_warn("map '%s' records no unit (no TUNIT for column '%s'): values taken as uK; "
                 "give --unit or --calibration to state it", path, map->column);
        return CLI_EXIT_OK;
    }
    if (clef_unit_to_uk(map->unit) == 0) {
        fprintf(stderr,
                "clef: error: map '%s' column '%s' has unit '%s' (TUNIT), not a temperature unit "
                "clef knows (K, mK, uK, with or without _CMB); give --unit U to state the unit "
                "or --calibration F to convert the values to uK\n",
                path, map->column, map->unit);
        return CLI_EXIT_INVALID;
    }
    return CLI_EXIT_OK;
}

int cmd_spectrum(int argc, char **argv)
{
    /* T/Q/U maps: the six polarized spectra (cmd_spectrum_pol.c). */
    for (int i = 1; i < argc && strcmp(argv[i], "--"); i++)
        if (!strcmp(argv[i], "--polarization"))
            return cmd_spectrum_pol(argc, argv);
    args a;
    int rc = parse_args(argc, argv, &a);
    if (rc)
        return rc < 0 ? CLI_EXIT_OK : rc;
    cli_setup_logging();

    double t_begin = clef_wtime();
    int status = CLEF_OK;
    clef_map *maps[4] = {NULL, NULL, NULL, NULL};
    clef_bins *bins = NULL;
    double *beam = NULL, *transfer = NULL, *noise = NULL, *theory = NULL;
    clef_spectrum_result res;
    memset(&res, 0, sizeof res);
    cJSON *json = NULL;
    char paths[5][4096];
    const char *written[5];
    int nwritten = 0;
    static clef_outfile ofs[5]; /* staged outputs, by slot of paths[] */
    int begun[5] = {0, 0, 0, 0, 0};

    /* Every output is known before anything is read: none may be an input,
     * and every folder must take a new file, or the run stops now. */
    char prefix[4000];
    if (a.output)
        snprintf(prefix, sizeof prefix, "%s", a.output);
    else
        default_prefix(a.map[0], prefix, sizeof prefix);
    const char *outs[5] = {NULL, NULL, NULL, NULL, NULL};
    if (a.want_fits) {
        snprintf(paths[0], sizeof paths[0], "%s.fits", prefix);
        outs[0] = paths[0];
    }
    if (a.want_csv) {
        snprintf(paths[1], sizeof paths[1], "%s.csv", prefix);
        snprintf(paths[2], sizeof paths[2], "%s-cov.csv", prefix);
        snprintf(paths[3], sizeof paths[3], "%s-windows.csv", prefix);
        outs[1] = paths[1];
        outs[2] = paths[2];
        outs[3] = paths[3];
    }
    if (a.want_json) {
        snprintf(paths[4], sizeof paths[4], "%s", a.json ? a.json : "");
        if (!a.json)
            snprintf(paths[4], sizeof paths[4], "%s.json", prefix);
        outs[4] = paths[4];
    }
    const char *inputs[] = {a.map[0], a.map[1], a.mask[0], a.mask[1], a.bins_file,
                            a.beam_file, a.transfer_file, a.noise_file, a.theory_file};
    if ((rc = cli_check_outputs(inputs, 9, outs, 5)) != CLI_EXIT_OK)
        return rc;
    if (a.map[1] && cli_same_file(a.map[0], a.map[1]))
        cli_warn("the two maps '%s' and '%s' are the same file: their cross-spectrum is the "
                 "auto-spectrum, with its noise bias (give two independent maps, or one map "
                 "and --noise-cl)", a.map[0], a.map[1]);

    clef_map_read_opts ro = {0};
    ro.hdu = a.hdu;
    ro.column = a.column;
    ro.ordering = a.ordering;
    clef_map_read_opts mro = {0};
    mro.ordering = a.ordering;
    const char *files[4] = {a.map[0], a.map[1], a.mask[0], a.mask[1]};
    const char *others[5] = {a.beam_file, a.transfer_file, a.noise_file, a.theory_file,
                             a.bins_file};
    for (int i = 0; i < 4; i++)
        cli_watch_input(files[i]);
    for (int i = 0; i < 5; i++)
        cli_watch_input(others[i]);
    for (int i = 0; i < 4; i++) {
        if (!files[i])
            continue;
        status = clef_map_read(&maps[i], files[i], i < 2 ? &ro : &mro);
        if (status != CLEF_OK)
            goto fail;
        cli_verbose("read %s: nside %lld, %lld missing pixels", files[i],
                    (long long)maps[i]->nside, (long long)maps[i]->nmissing);
        if (i < 2 && (rc = apply_units(&a, maps[i], files[i])) != CLI_EXIT_OK)
            goto fail;
    }
    if (a.map[1] && !cli_same_file(a.map[0], a.map[1]) && maps[0]->npix == maps[1]->npix &&
        !memcmp(maps[0]->pix, maps[1]->pix, (size_t)maps[0]->npix * sizeof(double)))
        cli_warn("the maps '%s' and '%s' hold the same values: their cross-spectrum is the "
                 "auto-spectrum, with its noise bias", a.map[0], a.map[1]);
    double t_read = clef_wtime() - t_begin;

    const int64_t nside = maps[0]->nside;
    const int lmax_pix = (int)(3 * nside - 1);
    /* Files indexed by l are read up to 3 nside - 1 or their own end: the
     * coupling runs past lmax (hidden bins, docs/method.md section 5); the
     * estimator refuses a table that stops below lmax. */
    const int lread = lmax_pix;

    clef_spectrum_opts so;
    clef_spectrum_opts_default(&so);
    so.lmax = (int)a.lmax;
    so.iterations = (int)a.iterations;
    so.keep_multipoles = a.keep;
    so.use_cache = !a.no_cache;
    so.cache_dir = a.cache_dir;
    so.pixel_window = !a.no_pixel_window;
    so.beam_fwhm = a.beam_fwhm;
    so.allow_coord_mismatch = a.coord;
    so.find_peak = !a.no_peak;
    if (a.peak_lmin >= 0)
        so.peak.l_min = a.peak_lmin;
    if (a.peak_lmax >= 0)
        so.peak.l_max = a.peak_lmax;
    if (a.peak_hw > 0)
        so.peak.half_width = a.peak_hw;
    so.names[0] = a.map[0];
    so.names[1] = a.map[1];
    so.names[2] = a.mask[0];
    so.names[3] = a.mask[1];
    so.bin_width = (int)a.bin_width;
    if (a.beam_file) {
        so.beam_lmax = table_lmax(a.beam_file, lread);
        if (!(beam = read_profile_file(a.beam_file, so.beam_lmax, &status)))
            goto fail;
        so.beam = beam;
    }
    if (a.transfer_file) {
        so.transfer_lmax = table_lmax(a.transfer_file, lread);
        if (!(transfer = read_profile_file(a.transfer_file, so.transfer_lmax, &status)))
            goto fail;
        so.transfer = transfer;
    }
    if (a.noise_file) {
        so.noise_lmax = table_lmax(a.noise_file, lread);
        if (!(noise = read_spectrum_file(a.noise_file, so.noise_lmax, &status)))
            goto fail;
        so.noise_cl = noise;
    }
    if (a.theory_file) {
        if (!(theory = read_spectrum_file(a.theory_file, lread, &status)))
            goto fail;
        so.theory_cl = theory;
        /* A theory table that stops below lmax is refused by the estimator
         * rather than padded with zeros (zero errors above its end). */
        const int last = text_last_l(a.theory_file);
        so.theory_lmax = last >= 0 && last < lread ? last : lread;
    }
    if (a.bins_file || a.log_bins > 0) {
        /* Explicit bins need the lmax they end at: a bin file may reach
         * the given lmax or 3 nside - 1; logarithmic bins end at the given
         * lmax or the default one. */
        const int lbins = a.lmax ? (int)a.lmax : lmax_pix;
        if (a.bins_file) {
            status = clef_bins_read(&bins, a.bins_file, lbins, CLEF_BINS_DL);
        } else {
            int ldef = lbins;
            if (!a.lmax && (status = clef_spectrum_default_lmax(&so, nside, &ldef)) != CLEF_OK)
                goto fail;
            status = clef_bins_create_log(&bins, 2, ldef, (int)a.log_bins, CLEF_BINS_DL);
        }
        if (status != CLEF_OK)
            goto fail;
        if (!a.lmax)
            so.lmax = clef_bins_lmax(bins);
        so.bins = bins;
    }

    status = clef_spectrum_compute(maps[0], maps[1], maps[2], maps[3], &so, &res);
    if (status != CLEF_OK)
        goto fail;

    warn_table_caps(&a, &so, &res, lread);
    mask_moments mm2 = {0};
    if (a.mask[1]) {
        /* The second mask, reported beside the first (JSON and keywords). */
        effective_moments(maps[1], maps[3], &mm2);
        if ((status = clef_bandpowers_meta_number(res.bp, "FSKY2", mm2.fsky,
                                                  "observed sky fraction, mask 2")) ||
            (status = clef_bandpowers_meta_number(res.bp, "MASK2W2", mm2.w2,
                                                  "mean of mask2^2")) ||
            (status = clef_bandpowers_meta_number(res.bp, "MASK2W4", mm2.w4,
                                                  "mean of mask2^4")) ||
            (status = clef_bandpowers_meta_number(res.bp, "FSKYEFF2", mm2.fsky_eff,
                                                  "w2^2 / w4, mask 2")))
            goto fail;
    }

    /* Outputs: each file is first written completely to its own temporary
     * (registered, so a signal removes it), then all are renamed in one
     * quick pass, once the inputs are known not to have changed under the
     * run: a failure or a signal leaves no partial file and, short of a
     * SIGKILL between two renames, no mix of this run's and older files. */
    const int want[5] = {a.want_fits, a.want_csv, a.want_csv, a.want_csv && res.bp->win != NULL,
                         a.want_json};
    const char *final[5];
    int nfinal = 0;
    for (int i = 0; i < 5; i++) {
        if (!want[i])
            continue;
        if ((status = clef_outfile_begin(&ofs[i], paths[i])) != CLEF_OK)
            goto fail;
        begun[i] = 1;
        final[nfinal++] = paths[i];
    }
    if (want[0] && (status = clef_bandpowers_write_fits(res.bp, ofs[0].tmp_path)) != CLEF_OK)
        goto fail;
    if (want[1] && (status = clef_bandpowers_write_csv(res.bp, ofs[1].tmp_path)) != CLEF_OK)
        goto fail;
    if (want[2] && (status = clef_bandpowers_write_cov_csv(res.bp, ofs[2].tmp_path)) != CLEF_OK)
        goto fail;
    if (want[3] &&
        (status = clef_bandpowers_write_windows_csv(res.bp, ofs[3].tmp_path)) != CLEF_OK)
        goto fail;
    if (want[4]) {
        json = summary_json(argc, argv, &a, maps, &so, &res, a.mask[1] ? &mm2 : NULL, t_read,
                            clef_wtime() - t_begin, final, nfinal);
        const int rc_json = json ? cli_write_json(ofs[4].tmp_path, json) : CLI_EXIT_NOMEM;
        if (rc_json != CLI_EXIT_OK) {
            rc = rc_json; /* already reported */
            goto fail;
        }
    }
    if ((rc = cli_check_inputs()) != CLI_EXIT_OK)
        goto fail;
    for (int i = 0; i < 5; i++) {
        if (!begun[i])
            continue;
        if ((status = clef_outfile_commit(&ofs[i])) != CLEF_OK)
            goto fail;
        begun[i] = 0;
        written[nwritten++] = paths[i];
    }
    if (cli_verbosity >= 1)
        print_result(cli_text_stream(), &a, &res);
    for (int i = 0; i < nwritten; i++)
        cli_verbose("wrote %s", written[i]);
    for (int i = 0; i < res.nstages; i++)
        cli_verbose("time %-10s %8.3f s", res.stage[i].name, res.stage[i].seconds);
    cli_verbose("time %-10s %8.3f s", "total", clef_wtime() - t_begin);

fail:
    for (int i = 0; i < 5; i++)
        if (begun[i])
            clef_outfile_abort(&ofs[i]);
    if (status != CLEF_OK || rc != CLI_EXIT_OK)
        for (int i = 0; i < nwritten; i++)
            if (!cli_is_stdout(written[i]))
                remove(written[i]);
    cJSON_Delete(json);
    clef_spectrum_result_free(&res);
    clef_bins_destroy(bins);
    free(beam);
    free(transfer);
    free(noise);
    free(theory);
    for (int i = 0; i < 4; i++)
        clef_map_free(maps[i]);
    if (status == CLEF_OK)
        return rc;
    /* Library writers wrote to the staged temporaries: name the outputs. */
    const char *tmps[5], *targets[5];
    int nt = 0;
    for (int i = 0; i < 5; i++)
        if (ofs[i].tmp_path[0]) {
            tmps[nt] = ofs[i].tmp_path;
            targets[nt++] = paths[i];
        }
    return cli_fail_as(status, nt, tmps, targets);
}
