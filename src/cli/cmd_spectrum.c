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
#include "cli_analysis.h"

static const char *CMD = "spectrum";

static void help(void)
{
    printf(
        "Usage: clef spectrum MAP [MAP2] --mask MASK [options]\n\n"
        "Decoupled band powers of a HEALPix map (auto-spectrum) or of two maps\n"
        "(cross-spectrum, e.g. two noise splits: no noise bias), corrected for the\n"
        "mask's mode coupling, the beam, the pixel window and a transfer function,\n"
        "with a Gaussian covariance and the first acoustic peak.\n\n"
        "Polarization:\n"
        "  --polarization         T, Q, U maps: the six spectra TT TE TB EE EB BB\n"
        "                         (clef spectrum --polarization --help)\n\n"
        );
    cli_analysis_help(stdout);
    printf(
        "Second instrument (cross-spectra):\n"
        "  --second-beam-fwhm ARCMIN, --second-beam-table FILE, --second-transfer FILE\n"
        "                         MAP2 from another instrument: its own beam and transfer\n"
        "                         function (what is not given is MAP's)\n\n"
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
        "6 numerical failure (e.g. singular coupling: widen the bins), 8 out of memory.\n"
        "Many fields in one run (maps, splits, masks, pairs from a run file):\n"
        "clef spectrum --run FILE --help; docs/run-files.md.\n");
}

enum { OPT_FORMAT = CLI_ANALYSIS_OPT_END, OPT_THREADS, OPT_QUIET, OPT_VERBOSE, OPT_HELP, OPT_JSON };

typedef struct args {
    cli_analysis an;           /* the analysis options (shared with clef sims) */
    const char *map[2], *output, *format, *threads, *json;
    int want_fits, want_csv, want_json;
} args;

static int parse_format(args *a, const char *s)
{
    int rc = cli_parse_formats(CMD, s, &a->want_fits, &a->want_csv, &a->want_json);
    if (rc)
        return rc;
    if (!a->want_fits && !a->want_csv && !a->want_json)
        return cli_usage_error(CMD, "--format: no format given");
    return 0;
}

static int parse_args(int argc, char **argv, args *a)
{
    static const struct option own[] = {
        {"output", required_argument, 0, 'o'},
        {"format", required_argument, 0, OPT_FORMAT},
        {"json", required_argument, 0, OPT_JSON},
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
    a->want_fits = a->want_csv = a->want_json = 1;
    int c;
    opterr = 0;
    while ((c = getopt_long(argc, argv, "o:", opts, NULL)) != -1) {
        const int h = cli_analysis_option(CMD, c, optarg, &a->an);
        if (h == 1)
            continue;
        if (h)
            return h;
        switch (c) {
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
    if (cli_analysis_check(CMD, &a->an, a->map[1] != NULL))
        return CLI_EXIT_USAGE;
    if (a->output && !strcmp(a->output, "-"))
        return cli_usage_error(CMD, "--output takes a prefix for several files, not '-'; "
                               "use --json - for the summary on standard output");
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
    cJSON *root = cli_summary_begin(argc, argv);
    cJSON_AddStringToObject(root, "spectrum", r->cross ? "cross" : "auto");

    cJSON *in = cJSON_AddArrayToObject(root, "inputs");
    cJSON_AddItemToArray(in, input_json("map1", a->map[0], maps[0]));
    if (a->map[1])
        cJSON_AddItemToArray(in, input_json("map2", a->map[1], maps[1]));
    cJSON_AddItemToArray(in, input_json("mask1", a->an.mask[0], maps[2]));
    if (a->an.mask[1])
        cJSON_AddItemToArray(in, input_json("mask2", a->an.mask[1], maps[3]));
    const char *kinds[CLI_ANALYSIS_NFILES], *files[CLI_ANALYSIS_NFILES];
    cli_analysis_files(&a->an, kinds, files);
    for (int i = 0; i < CLI_ANALYSIS_NFILES; i++)
        if (files[i])
            cJSON_AddItemToArray(in, input_json(kinds[i], files[i], NULL));

    cJSON *op = cJSON_AddObjectToObject(root, "options");
    cJSON_AddNumberToObject(op, "lmax", r->lmax);
    cJSON_AddNumberToObject(op, "lmax_coupled", r->lmax_ext);
    cJSON_AddNumberToObject(op, "lmax_mask", r->lmax_mask);
    cJSON_AddNumberToObject(op, "hidden_bins", r->nbins_hidden);
    cJSON_AddNumberToObject(op, "nbins", r->nbins);
    if (r->bin_width)
        cJSON_AddNumberToObject(op, "bin_width", r->bin_width);
    cJSON_AddNumberToObject(op, "beam_fwhm_arcmin", so->beam_fwhm);
    if (so->second_instrument)
        cJSON_AddNumberToObject(op, "second_beam_fwhm_arcmin", so->beam2 ? 0 : so->beam2_fwhm);
    cJSON_AddBoolToObject(op, "pixel_window", so->pixel_window);
    cJSON_AddNumberToObject(op, "iterations", so->iterations);
    cJSON_AddBoolToObject(op, "multipoles_removed", !so->keep_multipoles);
    cJSON_AddNumberToObject(op, "removal_corrected_to_l", r->ldep);
    cJSON_AddBoolToObject(op, "cache", so->use_cache);
    cJSON_AddStringToObject(op, "covariance_spectrum", so->theory_cl ? "theory" : "measured");
    cJSON_AddNumberToObject(op, "peak_l_min", so->peak.l_min);
    cJSON_AddNumberToObject(op, "peak_l_max", so->peak.l_max);
    cJSON_AddNumberToObject(op, "threads", omp_get_max_threads());
    if (a->an.unit)
        cJSON_AddStringToObject(op, "unit", a->an.unit);
    if (a->an.calibration > 0)
        cJSON_AddNumberToObject(op, "calibration", a->an.calibration);
    if (a->an.ordering)
        cJSON_AddStringToObject(op, "ordering_assumed", a->an.ordering);

    cJSON *sky = cJSON_AddObjectToObject(root, "sky");
    cJSON_AddNumberToObject(sky, "nside", (double)r->nside);
    const mask_moments mm1 = {r->fsky, r->w1, r->w2, r->w4, r->fsky_eff};
    moments_json(sky, &mm1);
    if (mm2) /* --second-mask: the second map's effective mask too */
        moments_json(cJSON_AddObjectToObject(sky, "mask2"), mm2);
    cJSON *mp = cJSON_AddArrayToObject(sky, "removed_multipoles_uK");
    for (int i = 0; i <= r->cross; i++)
        cJSON_AddItemToArray(mp, cli_json_numbers(r->multipoles[i], 4));

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
    cJSON_AddItemToObject(b, "l_eff", cli_json_numbers(bp->l_eff, bp->nbins));
    cJSON_AddItemToObject(b, "d_uK2", cli_json_numbers(bp->dl, bp->nbins));
    cJSON_AddItemToObject(b, "d_err_uK2", cli_json_numbers(bp->dl_err, bp->nbins));
    cJSON_AddItemToObject(b, "c_uK2", cli_json_numbers(bp->cl, bp->nbins));
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
            cJSON_AddItemToObject(wj, "row_sums", cli_json_numbers(sums, bp->nbins));
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


static void print_result(FILE *out, const args *a, const clef_spectrum_result *r)
{
    const clef_bandpowers *bp = r->bp;
    fprintf(out, "%s-spectrum of %s%s%s with mask %s\n", r->cross ? "cross" : "auto", a->map[0],
           r->cross ? " x " : "", r->cross ? a->map[1] : "", a->an.mask[0]);
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

/* The estimator's inputs_done: the four maps' pixels (clef_spectrum_opts). */
static void release_pixels(void *arg)
{
    clef_map **maps = arg;
    for (int i = 0; i < 4; i++)
        clef_map_release_pixels(maps[i]);
}

int cmd_spectrum(int argc, char **argv)
{
    /* A run file describes many fields: its own mode (cmd_spectrum_run.c);
     * T/Q/U maps: the six polarized spectra (cmd_spectrum_pol.c). */
    for (int i = 1; i < argc && strcmp(argv[i], "--"); i++) {
        if (!strcmp(argv[i], "--run") || !strncmp(argv[i], "--run=", 6))
            return cmd_spectrum_run(argc, argv);
        if (!strcmp(argv[i], "--polarization"))
            return cmd_spectrum_pol(argc, argv);
    }
    args a;
    int rc = parse_args(argc, argv, &a);
    if (rc)
        return rc < 0 ? CLI_EXIT_OK : rc;
    cli_setup_logging();

    double t_begin = clef_wtime();
    int status = CLEF_OK;
    clef_map *maps[4] = {NULL, NULL, NULL, NULL};
    cli_analysis_tables tables;
    memset(&tables, 0, sizeof tables);
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
    const char *inputs[4 + CLI_ANALYSIS_NFILES] = {a.map[0], a.map[1], a.an.mask[0],
                                                   a.an.mask[1]};
    cli_analysis_files(&a.an, NULL, inputs + 4);
    if ((rc = cli_check_outputs(inputs, 4 + CLI_ANALYSIS_NFILES, outs, 5)) != CLI_EXIT_OK)
        return rc;
    if (a.map[1] && cli_same_file(a.map[0], a.map[1]))
        cli_warn("the two maps '%s' and '%s' are the same file: their cross-spectrum is the "
                 "auto-spectrum, with its noise bias (give two independent maps, or one map "
                 "and --noise-spectrum)", a.map[0], a.map[1]);

    const char *files[4] = {a.map[0], a.map[1], a.an.mask[0], a.an.mask[1]};
    for (int i = 0; i < 4 + CLI_ANALYSIS_NFILES; i++)
        cli_watch_input(inputs[i]);
    for (int i = 0; i < 4; i++) {
        if (!files[i])
            continue;
        status = cli_analysis_read_map(&a.an, files[i], i >= 2, &maps[i]);
        if (status < 0) {
            rc = -status;
            status = CLEF_OK;
            goto fail;
        }
        if (status != CLEF_OK)
            goto fail;
    }
    if (a.map[1] && !cli_same_file(a.map[0], a.map[1]) && maps[0]->npix == maps[1]->npix &&
        !memcmp(maps[0]->pix, maps[1]->pix, (size_t)maps[0]->npix * sizeof(double)))
        cli_warn("the maps '%s' and '%s' hold the same values: their cross-spectrum is the "
                 "auto-spectrum, with its noise bias", a.map[0], a.map[1]);
    double t_read = clef_wtime() - t_begin;

    const int64_t nside = maps[0]->nside;
    clef_spectrum_opts so;
    if ((status = cli_analysis_setup(&a.an, nside, &so, &tables)) != CLEF_OK)
        goto fail;
    const int lread = tables.lread;
    so.names[0] = a.map[0];
    so.names[1] = a.map[1];

    mask_moments mm2 = {0};
    if (a.an.mask[1])
        /* The second mask, reported beside the first (JSON and keywords);
         * taken now, as the pixels go once the estimator has its weights. */
        effective_moments(maps[1], maps[3], &mm2);
    /* Past the transforms only the maps' headers are needed (the JSON
     * summary): their pixels, 3 GiB for a map and a mask at nside 4096, are
     * released for the mask stage, the run's peak of memory. */
    so.inputs_done = release_pixels;
    so.inputs_done_arg = maps;
    status = clef_spectrum_compute(maps[0], maps[1], maps[2], maps[3], &so, &res);
    if (status != CLEF_OK)
        goto fail;

    cli_analysis_warn_caps(&a.an, &so, &res, lread);
    if (a.an.mask[1]) {
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
        json = summary_json(argc, argv, &a, maps, &so, &res, a.an.mask[1] ? &mm2 : NULL, t_read,
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
    cli_analysis_tables_free(&tables);
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
