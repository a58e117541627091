/* clef mask: build a binary mask (from a map by threshold, or all-sky at a
 * given nside), cut a latitude band, punch source holes, keep a patch,
 * apodize it, report its sky fraction and moments, and write it. */
#define _GNU_SOURCE
#include <cJSON.h>
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "clef/coupling.h"
#include "clef/mask.h"
#include "cli.h"

#define DEG (M_PI / 180.0)

static void help(FILE *f)
{
    fprintf(f,
            "Usage: clef mask [OPTIONS]\n\n"
            "Build a mask, optionally taper its edges (apodization), and write it and/or\n"
            "report its moments.  Steps, in this order: start from --from MAP (thresholded)\n"
            "or an all-sky mask at --nside; keep only --patch; apply --latitude-cut; punch\n"
            "--holes; taper.\n"
            "Longitudes and latitudes are those of the mask's own frame (no rotation).\n\n"
            "Input (exactly one):\n"
            "  --nside N           start from an all-observed mask of this nside (power\n"
            "                      of two, 1..%d)\n"
            "  --from MAP          start from a HEALPix map: a pixel is observed when it is\n"
            "                      valid and its value passes the threshold\n"
            "  --column COL        column of MAP to read: number or name (default: first)\n"
            "  --hdu HDU           extension of MAP: number or EXTNAME (default: first table)\n"
            "  --threshold T       observed when value >= T (default: when value > 0)\n"
            "  --ordering RING|NESTED  pixel order of a MAP without ORDERING keyword\n"
            "                      (default: such files are refused)\n\n"
            "Cuts:\n"
            "  --latitude-cut DEG  mask pixels with |latitude| < DEG, in degrees [0, 90]\n"
            "                      (default: no cut)\n"
            "  --holes FILE        punch a circular hole per line of FILE: 'lon lat radius',\n"
            "                      lon and lat in degrees, radius in arcmin; '#' starts a\n"
            "                      comment (default: none)\n"
            "  --patch LON,LAT,R   keep only the disc of centre (LON, LAT) and radius R, all\n"
            "                      in degrees (a deep-field patch; default: whole sky)\n"
            "  --coordsys G|E|C    coordinate frame written to COORDSYS (G galactic,\n"
            "                      E ecliptic, C celestial); with --from it must agree with\n"
            "                      the map's frame when that is known (default: the map's,\n"
            "                      else none)\n\n"
            "Edge taper (apodization; Grain, Tristram & Stompor 2009):\n"
            "  --taper KIND        c1 | c2: kernels of the distance to the masked region;\n"
            "                      gauss: Gaussian smoothing of the binary mask, then times\n"
            "                      the binary mask (default: none, the mask stays binary)\n"
            "  --taper-width DEG   taper length (c1, c2) or FWHM (gauss), degrees,\n"
            "                      required with --taper\n"
            "  --erode DEG         gauss only: first mask observed pixels closer than DEG\n"
            "                      degrees to the masked region (default: 0)\n\n"
            "Output:\n"
            "  --output FILE       write the mask as a RING FITS table (column MASK, float64),\n"
            "                      atomically ('-': standard output; default: none)\n"
            "  --float32           write float32 values instead\n"
            "  --report            print nside, f_sky, w1, w2, w4 and f_sky_eff = w2^2/w4\n"
            "  --json FILE         write the report as one JSON object to FILE ('-':\n"
            "                      standard output), with the warnings\n"
            "  --threads N         OpenMP threads for the distance search and transforms\n"
            "                      (default: OMP_NUM_THREADS or all cores)\n"
            "  --quiet             print errors only (files are still written)\n"
            "  --verbose           also print each step\n"
            "  --help              show this help\n\n"
            "f_sky is the fraction of pixels with a weight > 0; w_i = mean of weight^i\n"
            "over the sphere (docs/masks.md).  At least one of --output, --report, --json\n"
            "is needed.  A mask with no observed pixel, or too small for any band-power bin\n"
            "of clef spectrum, is written with a warning saying so.\n"
            "Exit codes: 0 ok, 2 usage, 3 invalid value (e.g. --latitude-cut 95, COORDSYS\n"
            "mismatch), 4 cannot read or write a file, 5 malformed map or holes file,\n"
            "8 out of memory.\n"
            "Example: clef mask --nside 256 --latitude-cut 20 --holes sources.txt \\\n"
            "           --taper c2 --taper-width 2 --output mask.fits --report\n",
            CLEF_NSIDE_MAX);
}

typedef struct mask_args {
    long nside;
    const char *from, *column, *hdu, *holes, *output, *coordsys, *json, *ordering;
    double threshold, bcut, apod_scale, erode;
    int has_threshold, has_bcut, has_patch, has_scale, apod_kind, report, float32;
    double patch[3];
} mask_args;

static int parse_patch(const char *s, double v[3])
{
    char *end;
    const char *p = s;
    for (int k = 0; k < 3; k++) {
        v[k] = strtod(p, &end);
        if (end == p || !isfinite(v[k]))
            return 1;
        if (k < 2) {
            if (*end != ',')
                return 1;
            p = end + 1;
        }
    }
    return *end != '\0';
}

static const char *apod_name(int kind)
{
    switch (kind) {
    case CLEF_MASK_APOD_C1: return "c1";
    case CLEF_MASK_APOD_C2: return "c2";
    case CLEF_MASK_APOD_GAUSS: return "gauss";
    default: return "none";
    }
}

static int parse_args(int argc, char **argv, mask_args *a)
{
    static const struct option longopts[] = {
        {"nside", required_argument, NULL, 'n'},    {"from", required_argument, NULL, 'f'},
        {"column", required_argument, NULL, 'c'},   {"hdu", required_argument, NULL, 'H'},
        {"threshold", required_argument, NULL, 't'}, {"latitude-cut", required_argument, NULL, 'b'},
        {"holes", required_argument, NULL, 'o'},    {"patch", required_argument, NULL, 'p'},
        {"coordsys", required_argument, NULL, 'C'}, {"taper", required_argument, NULL, 'a'},
        {"taper-width", required_argument, NULL, 's'}, {"erode", required_argument, NULL, 'e'},
        {"output", required_argument, NULL, 'O'},   {"float32", no_argument, NULL, '4'},
        {"report", no_argument, NULL, 'r'},         {"json", required_argument, NULL, 'j'},
        {"threads", required_argument, NULL, 'T'},  {"quiet", no_argument, NULL, 'q'},
        {"verbose", no_argument, NULL, 'v'},        {"help", no_argument, NULL, 'h'},
        {"ordering", required_argument, NULL, 'R'}, {NULL, 0, NULL, 0},
    };
    int c;
    opterr = 0;
    optind = 1;
    while ((c = getopt_long(argc, argv, "", longopts, NULL)) != -1) {
        switch (c) {
        case 'n':
            if (cli_parse_long("mask", "--nside", optarg, &a->nside))
                return CLI_EXIT_USAGE;
            break;
        case 'f': a->from = optarg; break;
        case 'c': a->column = optarg; break;
        case 'H': a->hdu = optarg; break;
        case 't':
            if (cli_parse_double("mask", "--threshold", optarg, &a->threshold))
                return CLI_EXIT_USAGE;
            a->has_threshold = 1;
            break;
        case 'b':
            if (cli_parse_double("mask", "--latitude-cut", optarg, &a->bcut))
                return CLI_EXIT_USAGE;
            a->has_bcut = 1;
            break;
        case 'o': a->holes = optarg; break;
        case 'p':
            if (parse_patch(optarg, a->patch))
                return cli_usage_error(
                    "mask", "--patch expects LON,LAT,RADIUS in degrees, got '%s'", optarg);
            a->has_patch = 1;
            break;
        case 'C':
            if (strcmp(optarg, "G") && strcmp(optarg, "E") && strcmp(optarg, "C"))
                return cli_usage_error("mask", "--coordsys expects G, E or C, got '%s'", optarg);
            a->coordsys = optarg;
            break;
        case 'a':
            if (!strcasecmp(optarg, "c1"))
                a->apod_kind = CLEF_MASK_APOD_C1;
            else if (!strcasecmp(optarg, "c2"))
                a->apod_kind = CLEF_MASK_APOD_C2;
            else if (!strcasecmp(optarg, "gauss"))
                a->apod_kind = CLEF_MASK_APOD_GAUSS;
            else
                return cli_usage_error("mask", "--taper expects c1, c2 or gauss, got '%s'",
                                       optarg);
            break;
        case 's':
            if (cli_parse_double("mask", "--taper-width", optarg, &a->apod_scale))
                return CLI_EXIT_USAGE;
            a->has_scale = 1;
            break;
        case 'e':
            if (cli_parse_double("mask", "--erode", optarg, &a->erode))
                return CLI_EXIT_USAGE;
            break;
        case 'O': a->output = optarg; break;
        case '4': a->float32 = 1; break;
        case 'r': a->report = 1; break;
        case 'j': a->json = optarg; break;
        case 'R': a->ordering = optarg; break;
        case 'T':
            if (cli_set_threads("mask", optarg))
                return CLI_EXIT_USAGE;
            break;
        case 'q': cli_verbosity = 0; break;
        case 'v': cli_verbosity = 2; break;
        case 'h': help(stdout); return -1;
        default:
            return cli_usage_error("mask", "unknown option or missing value: '%s'",
                                   argv[optind - 1]);
        }
    }
    if (optind != argc)
        return cli_usage_error("mask", "unexpected argument '%s'", argv[optind]);
    if (!a->from == !a->nside)
        return cli_usage_error("mask", "give exactly one of --nside and --from");
    if (!a->from && (a->has_threshold || a->column || a->hdu || a->ordering))
        return cli_usage_error("mask", "--threshold, --column, --hdu and --ordering need --from");
    if (cli_check_ordering("mask", a->ordering))
        return CLI_EXIT_USAGE;
    if (!a->apod_kind != !a->has_scale)
        return cli_usage_error("mask", "--taper and --taper-width go together");
    if (a->erode != 0.0 && a->apod_kind != CLEF_MASK_APOD_GAUSS)
        return cli_usage_error("mask", "--erode applies to --taper gauss only");
    if (!a->output && !a->report && !a->json)
        return cli_usage_error("mask", "nothing to do: give --output, --report and/or --json");
    if (a->output && a->json && cli_is_stdout(a->output) && cli_is_stdout(a->json))
        return cli_usage_error("mask", "--output and --json cannot both go to standard output");
    return 0;
}

/* Value checks that the library would also make, reported as invalid
 * values (exit 3) before any work is done. */
static int invalid(const char *opt, const char *what)
{
    fprintf(stderr, "clef: error: %s %s\n", opt, what);
    return CLI_EXIT_INVALID;
}

static int check_values(const mask_args *a)
{
    if (a->nside && !clef_nside_valid(a->nside))
        return invalid("--nside", "must be a power of two from 1 to 8192");
    if (a->has_bcut && !(a->bcut >= 0 && a->bcut <= 90))
        return invalid("--latitude-cut", "must be in [0, 90] degrees");
    if (a->has_patch && !(a->patch[1] >= -90 && a->patch[1] <= 90))
        return invalid("--patch", "latitude must be in [-90, 90] degrees");
    if (a->has_patch && !(a->patch[2] > 0 && a->patch[2] <= 180))
        return invalid("--patch", "radius must be in (0, 180] degrees");
    if (a->has_scale && !(a->apod_scale > 0 && a->apod_scale <= 180))
        return invalid("--taper-width", "must be in (0, 180] degrees");
    if (!(a->erode >= 0 && a->erode <= 180))
        return invalid("--erode", "must be in [0, 180] degrees");
    return 0;
}

static int build(const mask_args *a, clef_map **out)
{
    clef_map *m = NULL, *in = NULL, *w = NULL;
    int status;
    *out = NULL;
    if (a->from) {
        clef_map_read_opts ro = {.hdu = a->hdu, .column = a->column, .ordering = a->ordering};
        cli_verbose("reading %s", a->from);
        if ((status = clef_map_read(&in, a->from, &ro)) != CLEF_OK)
            return status;
        /* Default: observed where the value is > 0; --threshold T: >= T. */
        status =
            clef_mask_binarize(&m, in, a->has_threshold ? a->threshold : 0.0, a->has_threshold);
        clef_map_free(in);
    } else {
        status = clef_mask_full(&m, a->nside);
    }
    if (status != CLEF_OK)
        return status;
    if (a->coordsys) {
        if (m->coordsys[0] && strcmp(m->coordsys, a->coordsys)) {
            fprintf(stderr,
                    "clef: error: --coordsys %s but %s has COORDSYS '%s' (clef does not rotate "
                    "masks)\n",
                    a->coordsys, a->from, m->coordsys);
            clef_map_free(m);
            return -1;
        }
        snprintf(m->coordsys, sizeof m->coordsys, "%s", a->coordsys);
    }
    if (a->has_patch) {
        cli_verbose("keeping the disc (%g, %g) deg of radius %g deg", a->patch[0], a->patch[1],
                    a->patch[2]);
        if ((status =
                 clef_mask_keep_disc(m, a->patch[0] * DEG, a->patch[1] * DEG, a->patch[2] * DEG)))
            goto fail;
    }
    if (a->has_bcut) {
        cli_verbose("masking |latitude| < %g deg", a->bcut);
        if ((status = clef_mask_cut_latitude(m, a->bcut * DEG)))
            goto fail;
    }
    if (a->holes) {
        clef_mask_hole *h;
        size_t n;
        if ((status = clef_mask_holes_read(a->holes, &h, &n)))
            goto fail;
        cli_verbose("punching %zu holes from %s", n, a->holes);
        status = clef_mask_cut_holes(m, h, n);
        free(h);
        if (status)
            goto fail;
    }
    if (a->apod_kind) {
        clef_mask_apod_opts o = {.kind = a->apod_kind, .scale = a->apod_scale * DEG,
                                 .erode = a->erode * DEG};
        cli_verbose("tapering (%s, %g deg)", apod_name(a->apod_kind), a->apod_scale);
        if ((status = clef_mask_apodize(&w, m, &o)))
            goto fail;
        clef_map_free(m);
        m = w;
    }
    *out = m;
    return CLEF_OK;
fail:
    clef_map_free(m);
    return status;
}

static void print_report(FILE *out, const mask_args *a, const clef_mask_moments *mo)
{
    fprintf(out, "nside        %lld\n", (long long)mo->nside);
    fprintf(out, "npix         %lld\n", (long long)(12 * mo->nside * mo->nside));
    fprintf(out, "observed     %lld\n", (long long)mo->nobserved);
    fprintf(out, "f_sky        %.9f\n", mo->fsky);
    fprintf(out, "w1           %.9f\n", mo->w1);
    fprintf(out, "w2           %.9f\n", mo->w2);
    fprintf(out, "w4           %.9f\n", mo->w4);
    fprintf(out, "f_sky_eff    %.9f\n", mo->fsky_eff);
    fprintf(out, "taper        %s", apod_name(a->apod_kind));
    if (a->apod_kind)
        fprintf(out, ", %g deg", a->apod_scale);
    fprintf(out, "\n");
}

static int write_report_json(const mask_args *a, const clef_mask_moments *mo, int coupling_width)
{
    cJSON *o = cJSON_CreateObject();
    if (!o)
        return CLI_EXIT_NOMEM;
    cJSON_AddStringToObject(o, "program", "clef");
    cJSON_AddStringToObject(o, "version", CLEF_VERSION);
    cJSON_AddNumberToObject(o, "nside", (double)mo->nside);
    cJSON_AddNumberToObject(o, "npix", (double)(12 * mo->nside * mo->nside));
    cJSON_AddNumberToObject(o, "observed_pixels", (double)mo->nobserved);
    cJSON_AddNumberToObject(o, "f_sky", mo->fsky);
    cJSON_AddNumberToObject(o, "w1", mo->w1);
    cJSON_AddNumberToObject(o, "w2", mo->w2);
    cJSON_AddNumberToObject(o, "w4", mo->w4);
    cJSON_AddNumberToObject(o, "f_sky_eff", mo->fsky_eff);
    cJSON_AddStringToObject(o, "taper", apod_name(a->apod_kind));
    if (a->apod_kind)
        cJSON_AddNumberToObject(o, "taper_width_deg", a->apod_scale);
    else
        cJSON_AddNullToObject(o, "taper_width_deg");
    if (coupling_width > 0)
        cJSON_AddNumberToObject(o, "coupling_width", coupling_width);
    if (a->output)
        cJSON_AddStringToObject(o, "output", a->output);
    else
        cJSON_AddNullToObject(o, "output");
    cJSON *w = cJSON_AddArrayToObject(o, "warnings");
    for (int i = 0; i < cli_nwarnings(); i++)
        cJSON_AddItemToArray(w, cJSON_CreateString(cli_warning(i)));
    const int rc = cli_write_json(a->json, o);
    cJSON_Delete(o);
    return rc;
}

/* Warnings a mask deserves before anyone runs a spectrum on it: no observed
 * pixel at all, or an observed region so small that its coupling width (the
 * multipole range over which it mixes the sky's modes: the highest l with
 * W_l >= 1e-2 W_0, docs/coupling.md) exceeds the whole range l = 2 .. 3
 * nside - 1, so that no bin of clef spectrum can hold it.  The width is
 * only computed for masks below 5% of the sky: a larger region of any
 * shape couples over fewer than 3 nside - 3 multipoles at nside >= 16.
 * Returns the coupling width when computed, else 0. */
static int warn_unusable(const mask_args *a, const clef_map *m, const clef_mask_moments *mo)
{
    const char *what = a->output ? a->output : "the mask";
    if (mo->nobserved == 0) {
        cli_warn("%s has no observed pixel (every weight is 0): clef spectrum will refuse it",
                 what);
        return 0;
    }
    if (mo->fsky >= 0.05)
        return 0;
    const int lmax = (int)(3 * m->nside - 1);
    double *wl = calloc((size_t)lmax + 1, sizeof *wl);
    if (!wl || clef_mask_spectrum_lmax(m, lmax, 0, wl) != CLEF_OK) {
        free(wl);
        return 0; /* a report, not a reason to fail */
    }
    const int cw = clef_coupling_width(wl, lmax, CLEF_COUPLING_WIDTH_LEVEL);
    free(wl);
    /* Automatic bins are max(20, coupling width) wide from l = 2. */
    const int width = cw > 20 ? cw : 20;
    if (width > lmax - 1)
        cli_warn("%s is too small for any band-power bin: its observed region (f_sky %.2g) "
                 "couples multipoles over a width of %d, more than the whole range l = 2..%d "
                 "of nside %lld, so the coupling cannot be inverted; use a larger region or a "
                 "higher nside",
                 what, mo->fsky, cw, lmax, (long long)m->nside);
    return cw;
}

/* The command line, for the HISTORY card. */
static void join_args(int argc, char **argv, char *buf, size_t n)
{
    size_t k = (size_t)snprintf(buf, n, "clef");
    for (int i = 0; i < argc && k < n; i++)
        k += (size_t)snprintf(buf + k, n - k, " %s", argv[i]);
}

int cmd_mask(int argc, char **argv)
{
    mask_args a = {0};
    int rc = parse_args(argc, argv, &a);
    if (rc)
        return rc < 0 ? CLI_EXIT_OK : rc;
    if ((rc = check_values(&a)))
        return rc;
    const char *inputs[2] = {a.from, a.holes};
    const char *outputs[2] = {a.output, a.json};
    if ((rc = cli_check_outputs(inputs, 2, outputs, 2)) != CLI_EXIT_OK)
        return rc;
    cli_setup_logging();
    clef_map *m;
    int status = build(&a, &m);
    if (status < 0)
        return CLI_EXIT_INVALID;
    if (status != CLEF_OK)
        return cli_fail(status);
    clef_mask_moments mo;
    if ((status = clef_mask_moments_compute(m, &mo)) != CLEF_OK) {
        clef_map_free(m);
        return cli_fail(status);
    }
    const int cw = warn_unusable(&a, m, &mo);
    if (a.output) {
        char hist[1024];
        join_args(argc, argv, hist, sizeof hist);
        clef_map_write_opts wo = {.single_precision = a.float32, .column = "MASK",
                                  .extname = "MASK", .history = hist, .row_length = 1024};
        if (m->npix % 1024)
            wo.row_length = 1;
        cli_verbose("writing %s", a.output);
        if ((status = clef_map_write(m, a.output, &wo)) != CLEF_OK) {
            clef_map_free(m);
            return cli_fail(status);
        }
    }
    clef_map_free(m);
    if (a.report && cli_verbosity >= 1)
        print_report(cli_text_stream(), &a, &mo);
    return a.json ? write_report_json(&a, &mo, cw) : CLI_EXIT_OK;
}
