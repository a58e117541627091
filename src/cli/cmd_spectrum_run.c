/* clef spectrum --run FILE: every requested auto- and cross-spectrum of the
 * fields a run file describes (docs/run-files.md), with their joint
 * covariance.  Outputs (docs/formats-spectrum.md): PREFIX.fits (one
 * band-power, covariance and window HDU per pair, then JOINTCOV),
 * PREFIX-A-B.csv per pair, PREFIX.json. */
#define _POSIX_C_SOURCE 200809L
#include <cjson/cJSON.h>
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "clef/coupling.h"
#include "clef/estimator.h"
#include "clef/hash.h"
#include "clef/map.h"
#include "clef/run.h"
#include "clef/spectrum.h"
#include "clef/table.h"
#include "cli.h"
#include "cli_analysis.h"

static const char *CMD = "spectrum";

static void help(void)
{
    printf(
        "Usage: clef spectrum --run FILE [options]\n\n"
        "Every auto- and cross-spectrum of the fields described in a run file (maps or\n"
        "noise splits, mask, beam, transfer function and noise of each field; the pairs\n"
        "to compute, default all; docs/run-files.md), each map transformed once, with\n"
        "the joint covariance of all band powers.  A field with splits gets the mean of\n"
        "its split crosses (no noise bias).\n\n"
        "  --run FILE             the run file (YAML)\n"
        "  -o, --output PREFIX    write PREFIX.fits, PREFIX-A-B.csv per pair, PREFIX.json\n"
        "                         (default: the run file's 'output', else the run file's\n"
        "                         name without extension followed by -spectra)\n"
        "  --format LIST          comma-separated subset of fits,csv,json (default all)\n"
        "  --json FILE            the JSON summary to FILE ('-': standard output)\n"
        "  --cache-dir DIR, --no-cache   coupling cache as for one pair\n"
        "  --no-peak              skip the first-peak fits\n"
        "  --threads N, --quiet, --verbose, --help\n\n"
        "Exit codes: 0 ok, 2 usage, 3 invalid run file or input (the message names the\n"
        "run file's line and key), 4 I/O, 5 bad file format, 6 numerical failure,\n"
        "8 out of memory.  Nothing is written unless every pair succeeds.\n");
}

typedef struct rargs {
    const char *run, *output, *json, *cache_dir, *threads;
    int no_cache, no_peak, want_fits, want_csv, want_json;
} rargs;

static int parse(int argc, char **argv, rargs *a)
{
    enum { O_RUN = 256, O_FORMAT, O_JSON, O_CACHE, O_NOCACHE, O_NOPEAK, O_THREADS, O_QUIET,
           O_VERBOSE, O_HELP };
    static const struct option opts[] = {
        {"run", required_argument, 0, O_RUN},       {"output", required_argument, 0, 'o'},
        {"format", required_argument, 0, O_FORMAT}, {"json", required_argument, 0, O_JSON},
        {"cache-dir", required_argument, 0, O_CACHE}, {"no-cache", no_argument, 0, O_NOCACHE},
        {"no-peak", no_argument, 0, O_NOPEAK},      {"threads", required_argument, 0, O_THREADS},
        {"quiet", no_argument, 0, O_QUIET},         {"verbose", no_argument, 0, O_VERBOSE},
        {"help", no_argument, 0, O_HELP},           {0, 0, 0, 0}};
    memset(a, 0, sizeof *a);
    a->want_fits = a->want_csv = a->want_json = 1;
    int c;
    opterr = 0;
    optind = 1;
    while ((c = getopt_long(argc, argv, "o:", opts, NULL)) != -1) {
        switch (c) {
        case O_RUN: a->run = optarg; break;
        case 'o': a->output = optarg; break;
        case O_FORMAT: {
            int rc = cli_parse_formats(CMD, optarg, &a->want_fits, &a->want_csv, &a->want_json);
            if (rc)
                return rc;
            break;
        }
        case O_JSON: a->json = optarg; a->want_json = 1; break;
        case O_CACHE: a->cache_dir = optarg; break;
        case O_NOCACHE: a->no_cache = 1; break;
        case O_NOPEAK: a->no_peak = 1; break;
        case O_THREADS: a->threads = optarg; break;
        case O_QUIET: cli_verbosity = 0; break;
        case O_VERBOSE: cli_verbosity = 2; break;
        case O_HELP: help(); return -1;
        default:
            return cli_usage_error(CMD, "with --run: unknown or incomplete option '%s' (the run "
                                   "file holds the maps, masks and settings)", argv[optind - 1]);
        }
    }
    if (optind < argc)
        return cli_usage_error(CMD, "with --run the maps come from the run file, not '%s'",
                               argv[optind]);
    if (!a->run)
        return cli_usage_error(CMD, "--run needs a file");
    if (!a->want_fits && !a->want_csv && !a->want_json)
        return cli_usage_error(CMD, "--format: no format given");
    if (a->output && (!strcmp(a->output, "-") || strlen(a->output) > 3000))
        return cli_usage_error(CMD, "--output takes a file prefix");
    if (a->threads && cli_set_threads(CMD, a->threads))
        return CLI_EXIT_USAGE;
    return 0;
}

#define MAXF CLEF_ESTIMATOR_MAX_FIELDS
#define MAXP (MAXF * (MAXF + 1) / 2)

struct job;
/* What the estimator's loader of field `field` needs (maps are read when
 * the estimator transforms them, one at a time: field.h). */
typedef struct map_loader {
    struct job *j;
    int field;
} map_loader;

/* Everything the run holds; freed in one place. */
typedef struct job {
    clef_run *run;
    map_loader loader[MAXF];
    int load_failed;           /* 1 + the field whose map could not be read, or 0 */
    int64_t nside;
    clef_map *masks[MAXF];     /* masks[i] owned when mask_own[i]; else an earlier field's */
    int mask_own[MAXF];
    double *beam[MAXF], *transfer[MAXF], *noise[MAXF];
    double *model;
    clef_estimator *e;
    char prefix[3200];
    char **paths;    /* outputs: 0 fits, 1 json, 2.. csv per pair */
    int npaths;
    clef_outfile *of;
    int *begun;
} job;

static void job_free(job *j)
{
    if (j->run)
        for (int i = 0; i < j->run->nfields; i++) {
            if (j->mask_own[i])
                clef_map_free(j->masks[i]);
            free(j->beam[i]);
            free(j->transfer[i]);
            free(j->noise[i]);
        }
    free(j->model);
    clef_estimator_destroy(j->e);
    for (int k = 0; k < j->npaths; k++) {
        if (j->begun && j->begun[k])
            clef_outfile_abort(&j->of[k]);
        free(j->paths[k]);
    }
    free(j->paths);
    free(j->of);
    free(j->begun);
    clef_run_free(j->run);
}

/* A run-file error after parsing: the line and key of the field, then
 * the library's message (msg NULL) or msg. */
static int field_error(const job *j, const clef_run_field *f, int line, const char *key,
                       int status, const char *msg)
{
    fprintf(stderr, "clef: error: %s line %d: field '%s' key '%s': %s\n", j->run->path, line,
            f->name, key, msg ? msg : clef_last_error());
    return status == CLEF_ENOMEM ? CLI_EXIT_NOMEM : CLI_EXIT_INVALID;
}

static int out_of_memory(job *j)
{
    job_free(j);
    fprintf(stderr, "clef: error: out of memory\n");
    return CLI_EXIT_NOMEM;
}

static void pair_name(const job *j, int k, char *buf, size_t n)
{
    int a, b;
    clef_estimator_pair_fields(j->e, k, &a, &b);
    snprintf(buf, n, "%s x %s", j->run->fields[a].name, j->run->fields[b].name);
}

static cJSON *summary(int argc, char **argv, const job *j, double seconds)
{
    cJSON *root = cli_summary_begin(argc, argv);
    cJSON *rf = cJSON_AddObjectToObject(root, "run_file");
    cJSON_AddStringToObject(rf, "path", j->run->path);
    char hex[65];
    if (clef_sha256_file(j->run->path, hex) == CLEF_OK)
        cJSON_AddStringToObject(rf, "sha256", hex);
    cJSON *fa = cJSON_AddArrayToObject(root, "fields");
    for (int i = 0; i < j->run->nfields; i++) {
        const clef_run_field *f = &j->run->fields[i];
        cJSON *o = cJSON_CreateObject();
        cJSON_AddStringToObject(o, "name", f->name);
        cJSON *ms = cJSON_AddArrayToObject(o, "maps");
        for (int s = 0; s < f->nsplits; s++) {
            cJSON *m = cJSON_CreateObject();
            cJSON_AddStringToObject(m, "path", f->maps[s]);
            if (clef_sha256_file(f->maps[s], hex) == CLEF_OK)
                cJSON_AddStringToObject(m, "sha256", hex);
            cJSON_AddItemToArray(ms, m);
        }
        cJSON_AddStringToObject(o, "mask", f->mask);
        cJSON_AddNumberToObject(o, "beam_fwhm_arcmin", f->beam_fwhm);
        if (f->beam_table)
            cJSON_AddStringToObject(o, "beam_table", f->beam_table);
        if (f->transfer)
            cJSON_AddStringToObject(o, "transfer", f->transfer);
        if (f->noise)
            cJSON_AddStringToObject(o, "noise_spectrum", f->noise);
        cJSON_AddItemToArray(fa, o);
    }
    const clef_spectrum_result *r0 = clef_estimator_result(j->e, 0);
    cJSON_AddNumberToObject(root, "nside", (double)r0->nside);
    cJSON_AddNumberToObject(root, "lmax", r0->lmax);
    cJSON_AddNumberToObject(root, "lmax_coupled", r0->lmax_ext);
    cJSON_AddNumberToObject(root, "nbins", r0->nbins);
    int nm = 0, nk = 0;
    clef_estimator_transforms(j->e, &nm, &nk);
    cJSON_AddNumberToObject(root, "map_transforms", nm);
    cJSON_AddNumberToObject(root, "mask_transforms", nk);
    cJSON *pa = cJSON_AddArrayToObject(root, "pairs");
    for (int k = 0; k < clef_estimator_npairs(j->e); k++) {
        const clef_spectrum_result *r = clef_estimator_result(j->e, k);
        int a, b;
        clef_estimator_pair_fields(j->e, k, &a, &b);
        char name[160];
        pair_name(j, k, name, sizeof name);
        cJSON *o = cJSON_CreateObject();
        cJSON_AddStringToObject(o, "name", name);
        cJSON_AddStringToObject(o, "field1", j->run->fields[a].name);
        cJSON_AddStringToObject(o, "field2", j->run->fields[b].name);
        cJSON_AddStringToObject(o, "spectrum", r->cross ? "cross" : "auto");
        cJSON_AddNumberToObject(o, "coupling_rcond", r->rcond);
        cJSON_AddBoolToObject(o, "coupling_cached", r->cache_hit);
        if (r->peak_done) {
            cJSON *pk = cJSON_AddObjectToObject(o, "first_peak");
            cli_peak_json(pk, &r->peak, NULL);
        }
        cJSON_AddItemToArray(pa, o);
    }
    cJSON *outs = cJSON_AddArrayToObject(root, "outputs");
    for (int k = 0; k < j->npaths; k++)
        if (j->paths[k][0])
            cJSON_AddItemToArray(outs, cJSON_CreateString(j->paths[k]));
    cJSON *w = cJSON_AddArrayToObject(root, "warnings");
    for (int i = 0; i < cli_nwarnings(); i++)
        cJSON_AddItemToArray(w, cJSON_CreateString(cli_warning(i)));
    cJSON_AddNumberToObject(root, "seconds", seconds);
    return root;
}

/* The default prefix: the run file's name without folder and extension. */
static void default_prefix(const char *run, char *buf, size_t n)
{
    const char *base = strrchr(run, '/');
    snprintf(buf, n, "%s", base ? base + 1 : run);
    char *dot = strrchr(buf, '.');
    if (dot && dot != buf)
        *dot = '\0';
    strncat(buf, "-spectra", n - strlen(buf) - 1);
}

/* Split `split` of a field, read when the estimator needs it. */
static int load_map(void *arg, int split, clef_map **out)
{
    map_loader *l = arg;
    const int status = clef_map_read(out, l->j->run->fields[l->field].maps[split], NULL);
    if (status != CLEF_OK)
        l->j->load_failed = l->field + 1;
    return status;
}

/* Check the maps' headers and read the masks and tables of every field;
 * errors name the run file's line and key.  The maps themselves are read
 * by the estimator one at a time (load_map), so N fields never hold N maps;
 * a mask named by several fields is read once. */
static int read_inputs(job *j, clef_field *fields)
{
    const clef_run *run = j->run;
    int64_t nside = 0;
    int status;
    for (int i = 0; i < run->nfields; i++) {
        const clef_run_field *f = &run->fields[i];
        clef_field *d = &fields[i];
        char coordsys[CLEF_FIELD_MAX_SPLITS][16];
        clef_field_init(d);
        d->name = f->name;
        d->nsplits = f->nsplits;
        for (int s = 0; s < f->nsplits; s++) {
            cli_watch_input(f->maps[s]);
            clef_map *hdr = NULL;
            if ((status = clef_map_read_header(&hdr, f->maps[s], NULL)) != CLEF_OK)
                return field_error(j, f, f->maps_line, "maps", status, NULL);
            const int64_t ns = hdr->nside;
            snprintf(coordsys[s], sizeof coordsys[s], "%s", hdr->coordsys);
            clef_map_free(hdr);
            if (nside == 0) {
                nside = ns;
            } else if (ns != nside) {
                char msg[4400];
                snprintf(msg, sizeof msg, "map '%s' has nside %lld, the first field's maps "
                         "nside %lld: every field must be on one grid", f->maps[s],
                         (long long)ns, (long long)nside);
                return field_error(j, f, f->maps_line, "maps", CLEF_EINVAL, msg);
            }
            d->map_names[s] = f->maps[s];
        }
        j->loader[i].j = j;
        j->loader[i].field = i;
        d->load_map = load_map;
        d->load_arg = &j->loader[i];
        cli_watch_input(f->mask);
        for (int k = 0; k < i && !j->masks[i]; k++)
            if (!strcmp(run->fields[k].mask, f->mask) || cli_same_file(run->fields[k].mask, f->mask))
                j->masks[i] = j->masks[k];
        if (!j->masks[i]) {
            if ((status = clef_map_read(&j->masks[i], f->mask, NULL)) != CLEF_OK)
                return field_error(j, f, f->line, "mask", status, NULL);
            j->mask_own[i] = 1;
        }
        if (j->masks[i]->nside != nside) {
            char msg[4400];
            snprintf(msg, sizeof msg, "mask '%s' has nside %lld, the maps nside %lld", f->mask,
                     (long long)j->masks[i]->nside, (long long)nside);
            return field_error(j, f, f->line, "mask", CLEF_EINVAL, msg);
        }
        /* Each map's frame against its mask's, from the headers (the estimator
         * checks the maps again when it reads them). */
        for (int s = 0; s < f->nsplits; s++) {
            clef_map hdr;
            memset(&hdr, 0, sizeof hdr);
            hdr.nside = nside;
            hdr.npix = j->masks[i]->npix;
            snprintf(hdr.coordsys, sizeof hdr.coordsys, "%s", coordsys[s]);
            if ((status = clef_map_check_mask(&hdr, f->maps[s], j->masks[i], f->mask, 0)) !=
                CLEF_OK)
                return field_error(j, f, f->line, "mask", status, NULL);
        }
        d->mask = j->masks[i];
        d->mask_name = f->mask;
        d->beam_fwhm = f->beam_fwhm;
        const int lread = (int)(3 * nside - 1);
        if (f->beam_table) {
            d->beam_lmax = cli_table_lmax(f->beam_table, lread);
            if (!(j->beam[i] = cli_read_profile_file(f->beam_table, d->beam_lmax, &status)))
                return field_error(j, f, f->line, "beam-table", status, NULL);
            d->beam = j->beam[i];
        }
        if (f->transfer) {
            d->transfer_lmax = cli_table_lmax(f->transfer, lread);
            if (!(j->transfer[i] = cli_read_profile_file(f->transfer, d->transfer_lmax, &status)))
                return field_error(j, f, f->line, "transfer", status, NULL);
            d->transfer = j->transfer[i];
        }
        if (f->noise) {
            d->noise_lmax = cli_table_lmax(f->noise, lread);
            if (!(j->noise[i] = cli_read_spectrum_file(f->noise, d->noise_lmax, &status)))
                return field_error(j, f, f->line, "noise-spectrum", status, NULL);
            d->noise_cl = j->noise[i];
        }
    }
    j->nside = nside;
    return CLI_EXIT_OK;
}

int cmd_spectrum_run(int argc, char **argv)
{
    rargs a;
    int rc = parse(argc, argv, &a);
    if (rc)
        return rc < 0 ? CLI_EXIT_OK : rc;
    cli_setup_logging();
    const double t0 = clef_wtime();
    job j;
    memset(&j, 0, sizeof j);
    int status = clef_run_read(&j.run, a.run);
    if (status != CLEF_OK)
        return cli_fail(status);
    const clef_run *run = j.run;
    cli_watch_input(a.run);

    /* Outputs, known before anything else is read. */
    if (a.output)
        snprintf(j.prefix, sizeof j.prefix, "%s", a.output);
    else if (run->output)
        snprintf(j.prefix, sizeof j.prefix, "%.3000s", run->output);
    else
        default_prefix(a.run, j.prefix, sizeof j.prefix);
    const int nf = run->nfields;
    const int np = run->npairs ? run->npairs : nf * (nf + 1) / 2;
    j.npaths = 2 + np;
    j.paths = calloc((size_t)j.npaths, sizeof *j.paths);
    j.of = calloc((size_t)j.npaths, sizeof *j.of);
    j.begun = calloc((size_t)j.npaths, sizeof *j.begun);
    if (!j.paths || !j.of || !j.begun) {
        return out_of_memory(&j);
    }
    for (int k = 0; k < j.npaths; k++)
        if (!(j.paths[k] = calloc(4096, 1))) {
            return out_of_memory(&j);
        }
    if (a.want_fits)
        snprintf(j.paths[0], 4096, "%s.fits", j.prefix);
    if (a.want_json)
        snprintf(j.paths[1], 4096, "%s", a.json ? a.json : "");
    if (a.want_json && !a.json)
        snprintf(j.paths[1], 4096, "%s.json", j.prefix);
    for (int k = 0; k < np && a.want_csv; k++) {
        int pa = 0, pb = 0, n = 0;
        for (int x = 0; x < nf && !run->npairs; x++)
            for (int y = x; y < nf; y++, n++)
                if (n == k) {
                    pa = x;
                    pb = y;
                }
        if (run->npairs) {
            pa = run->pairs[k].a;
            pb = run->pairs[k].b;
        }
        snprintf(j.paths[2 + k], 4096, "%s-%s-%s.csv", j.prefix, run->fields[pa].name,
                 run->fields[pb].name);
    }
    {
        int nin = 1;
        for (int i = 0; i < nf; i++)
            nin += run->fields[i].nsplits + 4;
        const char **in = calloc((size_t)nin + 1, sizeof *in);
        const char **out = calloc((size_t)j.npaths, sizeof *out);
        if (!in || !out) {
            free(in);
            free(out);
            return out_of_memory(&j);
        }
        int n = 0;
        in[n++] = a.run;
        for (int i = 0; i < nf; i++) {
            const clef_run_field *f = &run->fields[i];
            for (int s = 0; s < f->nsplits; s++)
                in[n++] = f->maps[s];
            in[n++] = f->mask;
            in[n++] = f->beam_table;
            in[n++] = f->transfer;
            in[n++] = f->noise;
        }
        in[n++] = run->model;
        for (int k = 0; k < j.npaths; k++)
            out[k] = j.paths[k][0] ? j.paths[k] : NULL;
        rc = cli_check_outputs(in, n, out, j.npaths);
        free(in);
        free(out);
        if (rc != CLI_EXIT_OK) {
            job_free(&j);
            return rc;
        }
    }

    clef_field *fields = calloc((size_t)nf, sizeof *fields);
    if (!fields) {
        return out_of_memory(&j);
    }
    if ((rc = read_inputs(&j, fields)) != CLI_EXIT_OK) {
        free(fields);
        job_free(&j);
        return rc;
    }
    clef_spectrum_opts so;
    clef_spectrum_opts_default(&so);
    so.lmax = (int)run->lmax;
    so.bin_width = (int)run->bin_width;
    if (run->iterations >= 0)
        so.iterations = (int)run->iterations;
    if (run->pixel_window >= 0)
        so.pixel_window = run->pixel_window;
    else
        so.pixel_window = 1;
    so.keep_multipoles = run->keep_multipoles;
    so.use_cache = !a.no_cache;
    so.cache_dir = a.cache_dir;
    so.find_peak = !a.no_peak;
    if (run->model) {
        const int lread = (int)(3 * j.nside - 1);
        if (!(j.model = cli_read_spectrum_file(run->model, lread, &status))) {
            free(fields);
            job_free(&j);
            return cli_fail(status);
        }
        so.theory_cl = j.model;
        const int last = cli_table_last_l(run->model);
        so.theory_lmax = last >= 0 && last < lread ? last : lread;
    }
    status = clef_estimator_create(&j.e, &so, run->joint != 0);
    for (int i = 0; status == CLEF_OK && i < nf; i++)
        status = clef_estimator_add_field(j.e, &fields[i]);
    for (int k = 0; status == CLEF_OK && k < run->npairs; k++)
        status = clef_estimator_add_pair(j.e, run->fields[run->pairs[k].a].name,
                                         run->fields[run->pairs[k].b].name);
    if (status == CLEF_OK)
        status = clef_estimator_compute(j.e);
    free(fields);
    if (status != CLEF_OK && j.load_failed) {
        /* A map that passed the header checks but could not be read in full. */
        const clef_run_field *f = &run->fields[j.load_failed - 1];
        rc = field_error(&j, f, f->maps_line, "maps", status, NULL);
        job_free(&j);
        return rc;
    }
    if (status != CLEF_OK) {
        job_free(&j);
        return cli_fail(status);
    }

    /* Keywords naming the pair, then every output to its temporary and all
     * renamed at the end (nothing is left of a failed run). */
    const clef_bandpowers **set = calloc((size_t)np, sizeof *set);
    char (*names)[160] = calloc((size_t)np, sizeof *names);
    const char **nameptr = calloc((size_t)np, sizeof *nameptr);
    cJSON *json = NULL;
    if (!set || !names || !nameptr) {
        fprintf(stderr, "clef: error: out of memory\n");
        rc = CLI_EXIT_NOMEM;
        goto fail;
    }
    for (int k = 0; k < np; k++) {
        const clef_spectrum_result *r = clef_estimator_result(j.e, k);
        int fa, fb;
        clef_estimator_pair_fields(j.e, k, &fa, &fb);
        pair_name(&j, k, names[k], sizeof names[k]);
        nameptr[k] = names[k];
        set[k] = r->bp;
        if ((status = clef_bandpowers_meta_text(r->bp, "PAIR", names[k], "fields of this "
                                                "spectrum")) != CLEF_OK ||
            (status = clef_bandpowers_meta_text(r->bp, "FIELD1", run->fields[fa].name,
                                                "first field")) != CLEF_OK ||
            (status = clef_bandpowers_meta_text(r->bp, "FIELD2", run->fields[fb].name,
                                                "second field")) != CLEF_OK ||
            (status = clef_bandpowers_meta_number(r->bp, "NSPLIT1",
                                                  run->fields[fa].nsplits,
                                                  "maps (splits) of field 1")) != CLEF_OK ||
            (status = clef_bandpowers_meta_number(r->bp, "NSPLIT2",
                                                  run->fields[fb].nsplits,
                                                  "maps (splits) of field 2")) != CLEF_OK)
            goto fail;
    }
    for (int k = 0; k < j.npaths; k++) {
        if (!j.paths[k][0])
            continue;
        if ((status = clef_outfile_begin(&j.of[k], j.paths[k])) != CLEF_OK)
            goto fail;
        j.begun[k] = 1;
    }
    if (j.paths[0][0]) {
        int ncov = 0;
        const double *cov = clef_estimator_covariance(j.e, &ncov);
        if ((status = clef_bandpowers_write_fits_set(set, nameptr, np, cov, ncov,
                                                     j.of[0].tmp_path)) != CLEF_OK)
            goto fail;
    }
    for (int k = 0; k < np; k++)
        if (j.paths[2 + k][0] &&
            (status = clef_bandpowers_write_csv(set[k], j.of[2 + k].tmp_path)) != CLEF_OK)
            goto fail;
    if (j.paths[1][0]) {
        json = summary(argc, argv, &j, clef_wtime() - t0);
        if ((rc = json ? cli_write_json(j.of[1].tmp_path, json) : CLI_EXIT_NOMEM) != CLI_EXIT_OK)
            goto fail;
    }
    if ((rc = cli_check_inputs()) != CLI_EXIT_OK)
        goto fail;
    for (int k = 0; k < j.npaths; k++)
        if (j.begun[k]) {
            if ((status = clef_outfile_commit(&j.of[k])) != CLEF_OK)
                goto fail;
            j.begun[k] = 0;
        }
    if (cli_verbosity >= 1) {
        FILE *out = cli_text_stream();
        const clef_spectrum_result *r0 = clef_estimator_result(j.e, 0);
        int nm = 0;
        clef_estimator_transforms(j.e, &nm, NULL);
        fprintf(out, "%d fields, %d pairs, nside %lld, lmax %d, %d bins, %d map transforms\n",
                nf, np, (long long)r0->nside, r0->lmax, r0->nbins, nm);
        for (int k = 0; k < np; k++) {
            const clef_spectrum_result *r = clef_estimator_result(j.e, k);
            fprintf(out, "%-40s D_b[0] = %10.3f +/- %.3f uK^2%s\n", names[k], r->bp->dl[0],
                    r->bp->dl_err[0], r->cache_hit ? " (cached coupling)" : "");
        }
    }
fail:
    cJSON_Delete(json);
    free(set);
    free(names);
    free(nameptr);
    job_free(&j);
    if (status != CLEF_OK)
        return cli_fail(status);
    return rc;
}
