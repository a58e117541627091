/* clef spectrum --polarization: the six spectra TT, TE, TB, EE, EB, BB of a
 * T/Q/U map (or of two, as a pair) through clef_spectrum_pol_compute
 * (docs/method.md, "Polarization").  Outputs: PREFIX.fits (one set of
 * BANDPOWER/BANDCOV/BANDWIN HDUs per spectrum, EXTVER 1..6), PREFIX-XY.csv
 * per spectrum, PREFIX.json (docs/json.md). */
#define _POSIX_C_SOURCE 200809L
#include <cjson/cJSON.h>
#include <getopt.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/bins.h"
#include "clef/map.h"
#include "clef/spectrum.h"
#include "clef/table.h"
#include "cli.h"
#include "cli_analysis.h"

static const char *CMD = "spectrum";

static void help(void)
{
    printf(
        "Usage: clef spectrum --polarization MAP [MAP2] --mask MASK [options]\n\n"
        "Band powers TT, TE, TB, EE, EB, BB of a map with T, Q and U columns\n"
        "(TEMPERATURE, Q_POLARISATION, U_POLARISATION), or the six cross-spectra of\n"
        "two such maps (T1 x E2, ...), decoupled with the spin-2 coupling matrices\n"
        "(E and B jointly), with Gaussian errors and window functions. TT is exactly\n"
        "what clef spectrum gives without --polarization.\n\n"
        "Inputs:\n"
        "  --mask FILE            mask of the temperature maps (weights in [0,1])\n"
        "  --pol-mask FILE        mask of Q and U (default: --mask)\n"
        "  --u-map FILE           U from this file (column U_POLARISATION or the first\n"
        "                         value column) instead of MAP (one field only)\n"
        "  --hdu H                table of the maps (default: the first)\n"
        "  --polcconv COSMO|IAU   convention of Q/U, overriding the files' POLCCONV\n"
        "                         (default: POLCCONV; missing = COSMO with a warning)\n"
        "  --ordering RING|NESTED pixel order of files without ORDERING\n"
        "  --unit U, --calibration F, --allow-coord-mismatch   as clef spectrum, for T, Q, U\n\n"
        "Multipoles and bins, as clef spectrum:\n"
        "  --lmax L, --bin-width N, --log-bins N, --bins FILE\n\n"
        "Instrument (one beam and transfer function per map, for T and P alike):\n"
        "  --beam-fwhm ARCMIN, --beam-table FILE, --transfer FILE, --no-pixel-window\n"
        "  --second-beam-fwhm ARCMIN, --second-beam-table FILE, --second-transfer FILE\n"
        "                         MAP2's own beam and transfer function (what is not\n"
        "                         given is MAP's)\n"
        "  --noise-spectrum FILE  temperature noise N_l [uK^2] subtracted from TT (one map)\n"
        "  --pol-noise-spectrum FILE\n"
        "                         polarization noise N_l = N^EE = N^BB [uK^2] subtracted\n"
        "                         from EE and BB through the coupling (one map)\n\n"
        "Method:\n"
        "  --iterations N (default %d), --keep-multipoles, --cache-dir DIR, --no-cache,\n"
        "  --cache-limit SIZE     as clef spectrum\n"
        "  --pure-b               BB from pure-B multipoles (B-mode purification,\n"
        "                         Smith 2006): removes the E-to-B leakage of the mask's\n"
        "                         edges, for small patches; the Q/U weight must be\n"
        "                         tapered (clef mask --taper c1|c2), a hard-edged one\n"
        "                         is refused (exit 3); TB and EB stay standard\n\n"
        "Output:\n"
        "  -o, --output PREFIX    PREFIX.fits (six spectra, EXTVER 1..6 in the order\n"
        "                         TT TE TB EE EB BB), PREFIX-TT.csv ... PREFIX-BB.csv,\n"
        "                         PREFIX.json (default: the map's name + -bandpowers)\n"
        "  --format LIST          comma-separated subset of fits,csv,json (default all)\n"
        "  --json FILE            the JSON summary to FILE ('-': standard output)\n"
        "  --threads N, --quiet, --verbose, --help\n\n"
        "Not with --polarization: --second-mask (both maps share --mask and --pol-mask),\n"
        "--column (the conventional column names are read), --covariance-model and the\n"
        "first-peak options (the peak belongs to clef spectrum without --polarization).\n\n"
        "Exit codes: 0 ok, 2 usage, 3 invalid input (e.g. a missing Q or U column),\n"
        "4 I/O, 5 bad file format (e.g. POLCCONV neither COSMO nor IAU), 6 numerical\n"
        "failure (widen the bins), 8 out of memory.\n",
        CLEF_SPECTRUM_ITERATIONS);
}

enum {
    OPT_POL = CLI_ANALYSIS_OPT_END, OPT_PMASK, OPT_UMAP, OPT_CONV, OPT_FORMAT, OPT_JSON,
    OPT_THREADS, OPT_QUIET, OPT_VERBOSE, OPT_HELP, OPT_PURE, OPT_PNOISE
};

typedef struct pargs {
    cli_analysis an; /* the options shared with clef spectrum (cli_analysis.h) */
    const char *map[2], *pmask, *umap, *conv, *pnoise, *output, *json, *threads;
    int want_fits, want_csv, want_json, pure_b, peak_opt;
} pargs;

static int parse(int argc, char **argv, pargs *a)
{
    static const struct option own[] = {
        {"polarization", no_argument, 0, OPT_POL},
        {"pol-mask", required_argument, 0, OPT_PMASK}, {"u-map", required_argument, 0, OPT_UMAP},
        {"polcconv", required_argument, 0, OPT_CONV}, {"pure-b", no_argument, 0, OPT_PURE},
        {"pol-noise-spectrum", required_argument, 0, OPT_PNOISE},
        {"output", required_argument, 0, 'o'}, {"format", required_argument, 0, OPT_FORMAT},
        {"json", required_argument, 0, OPT_JSON}, {"threads", required_argument, 0, OPT_THREADS},
        {"quiet", no_argument, 0, OPT_QUIET}, {"verbose", no_argument, 0, OPT_VERBOSE},
        {"help", no_argument, 0, OPT_HELP}, {0, 0, 0, 0}};
    struct option opts[CLI_ANALYSIS_NOPTS + sizeof own / sizeof own[0]];
    memcpy(opts, cli_analysis_options, sizeof cli_analysis_options);
    memcpy(opts + CLI_ANALYSIS_NOPTS, own, sizeof own);
    memset(a, 0, sizeof *a);
    cli_analysis_init(&a->an);
    a->want_fits = a->want_csv = a->want_json = 1;
    int c;
    optind = 1;
    opterr = 0;
    int li = -1;
    while ((c = getopt_long(argc, argv, "o:", opts, &li)) != -1) {
        switch (c) {
        case CLI_AOPT_MASK2:
            return cli_usage_error(CMD, "--second-mask: with --polarization both maps share "
                                   "--mask (T) and --pol-mask (Q, U)");
        case CLI_AOPT_COLUMN:
            return cli_usage_error(CMD, "--column: with --polarization the columns are "
                                   "TEMPERATURE, Q_POLARISATION and U_POLARISATION (or the "
                                   "first three value columns)");
        case CLI_AOPT_THEORY:
            return cli_usage_error(CMD, "--covariance-model is not available with "
                                   "--polarization (the covariance uses the measured spectra)");
        case CLI_AOPT_PLMIN: case CLI_AOPT_PLMAX: case CLI_AOPT_PHW: case CLI_AOPT_PDRAWS:
            a->peak_opt = 1;
            break;
        default:
            break;
        }
        if (a->peak_opt)
            return cli_usage_error(CMD, "--%s: the first peak is fitted by clef spectrum "
                                   "without --polarization", li >= 0 ? opts[li].name : "peak");
        const int h = cli_analysis_option(CMD, c, optarg, &a->an);
        if (h == 1)
            continue;
        if (h)
            return h;
        switch (c) {
        case OPT_POL: break;
        case OPT_PMASK: a->pmask = optarg; break;
        case OPT_UMAP: a->umap = optarg; break;
        case OPT_CONV:
            if (strcmp(optarg, "COSMO") && strcmp(optarg, "IAU"))
                return cli_usage_error(CMD, "--polcconv: '%s' (expected COSMO or IAU)", optarg);
            a->conv = optarg;
            break;
        case OPT_PURE: a->pure_b = 1; break;
        case OPT_PNOISE: a->pnoise = optarg; break;
        case 'o': a->output = optarg; break;
        case OPT_FORMAT: {
            int rc = cli_parse_formats(CMD, optarg, &a->want_fits, &a->want_csv, &a->want_json);
            if (rc)
                return rc;
            break;
        }
        case OPT_JSON: a->json = optarg; a->want_json = 1; break;
        case OPT_THREADS: a->threads = optarg; break;
        case OPT_QUIET: cli_verbosity = 0; break;
        case OPT_VERBOSE: cli_verbosity = 2; break;
        case OPT_HELP: help(); return -1;
        default:
            return cli_usage_error(CMD, "unknown option or missing value: '%s'", argv[optind - 1]);
        }
    }
    int n = 0;
    for (; optind < argc; optind++) {
        if (n == 2)
            return cli_usage_error(CMD, "too many maps (one or two with --polarization)");
        a->map[n++] = argv[optind];
    }
    if (!n)
        return cli_usage_error(CMD, "no map given");
    if (cli_analysis_check(CMD, &a->an, a->map[1] != NULL))
        return CLI_EXIT_USAGE;
    if (a->umap && a->map[1])
        return cli_usage_error(CMD, "--u-map applies to a single map");
    if (a->threads && cli_set_threads(CMD, a->threads))
        return CLI_EXIT_USAGE;
    return 0;
}

static cJSON *spectrum_json(const clef_bandpowers *bp)
{
    cJSON *o = cJSON_CreateObject();
    cJSON *lo = cJSON_AddArrayToObject(o, "l_lo"), *hi = cJSON_AddArrayToObject(o, "l_hi");
    cJSON *le = cJSON_AddArrayToObject(o, "l_eff"), *d = cJSON_AddArrayToObject(o, "d_l");
    cJSON *e = cJSON_AddArrayToObject(o, "d_l_err");
    for (int b = 0; b < bp->nbins; b++) {
        cJSON_AddItemToArray(lo, cJSON_CreateNumber(bp->l_lo[b]));
        cJSON_AddItemToArray(hi, cJSON_CreateNumber(bp->l_hi[b]));
        cJSON_AddItemToArray(le, cJSON_CreateNumber(bp->l_eff[b]));
        cJSON_AddItemToArray(d, cJSON_CreateNumber(bp->dl[b]));
        cJSON_AddItemToArray(e, cJSON_CreateNumber(bp->dl_err[b]));
    }
    return o;
}

int cmd_spectrum_pol(int argc, char **argv)
{
    pargs a;
    int rc = parse(argc, argv, &a);
    if (rc)
        return rc < 0 ? CLI_EXIT_OK : rc;
    cli_setup_logging();
    char prefix[3900], paths[8][4096];
    if (a.output) {
        snprintf(prefix, sizeof prefix, "%s", a.output);
    } else {
        const char *base = strrchr(a.map[0], '/');
        base = base ? base + 1 : a.map[0];
        snprintf(prefix, sizeof prefix, "%s", base);
        char *dot = strstr(prefix, ".fits");
        if (dot)
            *dot = '\0';
        strncat(prefix, "-bandpowers", sizeof prefix - strlen(prefix) - 1);
    }
    const char *outs[8] = {0};
    if (a.want_fits) {
        snprintf(paths[0], sizeof paths[0], "%s.fits", prefix);
        outs[0] = paths[0];
    }
    if (a.want_csv)
        for (int k = 0; k < CLEF_POL_NSPEC; k++) {
            snprintf(paths[1 + k], sizeof paths[1 + k], "%s-%s.csv", prefix,
                     clef_spectrum_pol_name(k));
            outs[1 + k] = paths[1 + k];
        }
    if (a.want_json) {
        snprintf(paths[7], sizeof paths[7], "%s", a.json ? a.json : "");
        if (!a.json)
            snprintf(paths[7], sizeof paths[7], "%s.json", prefix);
        outs[7] = paths[7];
    }
    enum { NIN = 6 + CLI_ANALYSIS_NFILES };
    const char *inputs[NIN] = {a.map[0], a.map[1], a.an.mask[0], a.pmask, a.umap, a.pnoise};
    cli_analysis_files(&a.an, NULL, inputs + 6);
    if ((rc = cli_check_outputs(inputs, NIN, outs, 8)) != CLI_EXIT_OK)
        return rc;
    for (int i = 0; i < NIN; i++)
        if (inputs[i])
            cli_watch_input(inputs[i]);

    clef_map_pol f[2];
    memset(f, 0, sizeof f);
    clef_map *mask = NULL, *pmask = NULL;
    cli_analysis_tables tables;
    memset(&tables, 0, sizeof tables);
    double *pnoise = NULL;
    int pnoise_lmax = 0;
    clef_spectrum_pol_result res;
    memset(&res, 0, sizeof res);
    cJSON *json = NULL;
    int status = CLEF_OK, missing_conv[2] = {0, 0}, iau[2] = {0, 0};
    clef_map_pol_opts po = {.hdu = a.an.hdu, .ordering = a.an.ordering, .u_path = a.umap,
                            .polcconv = a.conv, .want_t = 1};
    for (int i = 0; i < 2 && a.map[i] && status == CLEF_OK; i++) {
        status = clef_map_read_pol(&f[i], a.map[i], &po);
        missing_conv[i] = f[i].polcconv_missing;
        iau[i] = f[i].iau;
        /* --unit / --calibration, or the TUNIT check, for T, Q and U alike. */
        clef_map *const tqu[3] = {f[i].t, f[i].q, f[i].u};
        for (int j = 0; j < 3 && status == CLEF_OK; j++)
            if ((rc = cli_analysis_units(&a.an, tqu[j], j == 2 && a.umap ? a.umap : a.map[i])) !=
                CLI_EXIT_OK)
                goto done;
    }
    clef_map_read_opts mo = {.ordering = a.an.ordering};
    if (status == CLEF_OK)
        status = clef_map_read(&mask, a.an.mask[0], &mo);
    if (status == CLEF_OK && a.pmask)
        status = clef_map_read(&pmask, a.pmask, &mo);
    clef_spectrum_opts so;
    clef_spectrum_opts_default(&so);
    if (status == CLEF_OK)
        status = cli_analysis_setup(&a.an, f[0].t->nside, &so, &tables);
    if (status == CLEF_OK && a.pnoise) {
        pnoise_lmax = cli_table_lmax(a.pnoise, tables.lread);
        pnoise = cli_read_spectrum_file(a.pnoise, pnoise_lmax, &status);
    }
    so.pure_b = a.pure_b;
    so.find_peak = 0;
    so.names[0] = a.map[0];
    so.names[1] = a.map[1];
    if (status == CLEF_OK)
        status = clef_spectrum_pol_compute(&f[0], a.map[1] ? &f[1] : NULL, mask, pmask, &so,
                                           pnoise, pnoise_lmax, &res);
    if (status != CLEF_OK) {
        rc = cli_fail(status);
        goto done;
    }
    if ((rc = cli_check_inputs()) != CLI_EXIT_OK)
        goto done;
    if (a.want_fits) {
        const clef_bandpowers *set[CLEF_POL_NSPEC];
        for (int k = 0; k < CLEF_POL_NSPEC; k++)
            set[k] = res.bp[k];
        if ((status = clef_bandpowers_write_fits_set(set, NULL, CLEF_POL_NSPEC, NULL, 0,
                                                     paths[0])) != CLEF_OK) {
            rc = cli_fail(status);
            goto done;
        }
    }
    if (a.want_csv)
        for (int k = 0; k < CLEF_POL_NSPEC; k++)
            if ((status = clef_bandpowers_write_csv(res.bp[k], paths[1 + k])) != CLEF_OK) {
                rc = cli_fail(status);
                goto done;
            }
    if (a.want_json) {
        json = cJSON_CreateObject();
        cJSON_AddStringToObject(json, "program", "clef spectrum --polarization");
        cJSON_AddStringToObject(json, "version", CLEF_VERSION);
        cJSON_AddStringToObject(json, "kind", res.cross ? "cross" : "auto");
        cJSON *conv = cJSON_AddArrayToObject(json, "polcconv");
        for (int i = 0; i < (a.map[1] ? 2 : 1); i++)
            cJSON_AddItemToArray(conv, cJSON_CreateString(a.conv ? a.conv
                                                          : missing_conv[i] ? "missing (COSMO)"
                                                          : iau[i] ? "IAU (converted)"
                                                                   : "COSMO"));
        cJSON_AddNumberToObject(json, "nside", (double)res.tt.nside);
        cJSON_AddNumberToObject(json, "lmax", res.lmax);
        cJSON_AddNumberToObject(json, "lmax_ext", res.lmax_ext);
        cJSON_AddNumberToObject(json, "rcond_ee_bb", res.rcond_eebb);
        cJSON_AddNumberToObject(json, "rcond_eb_be", res.rcond_ebbe);
        cJSON *in = cJSON_AddObjectToObject(json, "inputs");
        const char *kinds[CLI_ANALYSIS_NFILES], *files[CLI_ANALYSIS_NFILES];
        cli_analysis_files(&a.an, kinds, files);
        const char *const fixed[6][2] = {{"map1", a.map[0]}, {"map2", a.map[1]},
                                         {"mask", a.an.mask[0]}, {"pol_mask", a.pmask},
                                         {"u_map", a.umap}, {"pol_noise", a.pnoise}};
        for (int i = 0; i < 6; i++)
            if (fixed[i][1])
                cJSON_AddStringToObject(in, fixed[i][0], fixed[i][1]);
        for (int i = 0; i < CLI_ANALYSIS_NFILES; i++)
            if (files[i])
                cJSON_AddStringToObject(in, kinds[i], files[i]);
        cJSON_AddNumberToObject(json, "beam_fwhm_arcmin", so.beam ? 0 : so.beam_fwhm);
        if (so.second_instrument)
            cJSON_AddNumberToObject(json, "second_beam_fwhm_arcmin",
                                    so.beam2 ? 0 : so.beam2_fwhm);
        cJSON_AddBoolToObject(json, "pixel_window", so.pixel_window);
        cJSON_AddBoolToObject(json, "pure_b", res.pure_b);
        if (res.pure_b)
            cJSON_AddItemToObject(json, "pure_b_window_tail",
                                  cli_json_numbers(res.pure_tail, a.map[1] ? 2 : 1));
        cJSON *sp = cJSON_AddObjectToObject(json, "spectra");
        for (int k = 0; k < CLEF_POL_NSPEC; k++)
            cJSON_AddItemToObject(sp, clef_spectrum_pol_name(k), spectrum_json(res.bp[k]));
        cJSON *w = cJSON_AddArrayToObject(json, "warnings");
        for (int i = 0; i < cli_nwarnings(); i++)
            cJSON_AddItemToArray(w, cJSON_CreateString(cli_warning(i)));
        if ((rc = cli_write_json(paths[7], json)) != CLI_EXIT_OK)
            goto done;
    }
    if (cli_verbosity > 0) {
        FILE *out = cli_text_stream();
        fprintf(out, "%-4s", "bin");
        for (int k = 0; k < CLEF_POL_NSPEC; k++)
            fprintf(out, " %12s", clef_spectrum_pol_name(k));
        fprintf(out, "   (D_b, uK^2)\n");
        for (int b = 0; b < res.nbins; b++) {
            fprintf(out, "%4d", res.bp[0]->l_lo[b]);
            for (int k = 0; k < CLEF_POL_NSPEC; k++)
                fprintf(out, " %12.5g", res.bp[k]->dl[b]);
            fprintf(out, "\n");
        }
    }
    rc = CLI_EXIT_OK;
done:
    cJSON_Delete(json);
    clef_spectrum_pol_result_free(&res);
    clef_map_pol_free(&f[0]);
    clef_map_pol_free(&f[1]);
    clef_map_free(mask);
    clef_map_free(pmask);
    cli_analysis_tables_free(&tables);
    free(pnoise);
    return rc;
}
