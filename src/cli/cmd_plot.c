/* clef plot KIND INPUT -o FILE: figures from clef's own outputs.
 *   spectrum  band powers with errors, overlays and the first peak
 *   pairs     the band powers of every pair of a run (clef spectrum --run)
 *   map       Mollweide view of a map, a mask, or map x mask
 *   curvature the Omega_k posterior from `clef geometry --json`
 * The format follows the output's extension (.png, .svg, .pdf). */
#define _GNU_SOURCE
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/map.h"
#include "clef/peak.h"
#include "clef/plot.h"
#include "clef/table.h"
#include "clef/theory.h"
#include "cli.h"

static void help(FILE *f)
{
    fprintf(f,
            "Usage: clef plot spectrum TABLE -o FILE [OPTIONS]\n"
            "       clef plot pairs RUN.fits -o FILE [OPTIONS]\n"
            "       clef plot map MAP -o FILE [OPTIONS]\n"
            "       clef plot curvature GEOMETRY.json -o FILE [OPTIONS]\n\n"
            "Draw a figure with cairo.  The format follows FILE's extension: .png (sizes\n"
            "in pixels), .svg or .pdf (sizes in points).  The file is written under a\n"
            "temporary name and renamed when complete.\n\n"
            "spectrum: D_b = l(l+1)C_b/2pi in uK^2 with 1-sigma error bars (and bin\n"
            "  ranges) against l from a band-power table (FITS or CSV written by clef, or\n"
            "  a plain 'l_eff D [err]' table).  The first peak is marked (line at l_peak,\n"
            "  shaded 1-sigma band): the peak recorded in the table's header if any, else\n"
            "  fitted with the default first-peak options.  Title from the table's header\n"
            "  (maps, mask, nside), else the file name.\n"
            "  --log-l              logarithmic l axis (default: linear from 0)\n"
            "  --model-curve FILE   overlay a model curve: a spectrum text file as `clef\n"
            "                       model` writes it ('# columns: l C_l ...' line), or a\n"
            "                       plain two-column table 'l D_l' (uK^2)\n"
            "  --compare TABLE2     overlay a second band-power table\n"
            "  --label TEXT         legend text for TABLE (default: its file name)\n"
            "  --compare-label TEXT legend text for TABLE2 (default: its file name)\n"
            "  --no-peak            do not mark the first peak\n"
            "  --width N, --height N  figure size (default 900 x 600)\n\n"
            "pairs: the band powers of every pair in the FITS file of `clef spectrum --run`\n"
            "  (one BANDPOWER HDU per pair; also the six spectra of --polarization), in a\n"
            "  grid of panels titled with the pair's name, or overlaid in one frame with a\n"
            "  legend (each pair its own colour and marker, moved sideways a little).\n"
            "  --arrange A          auto, grid or overlay (default auto: overlay up to 6\n"
            "                       pairs, grid above)\n"
            "  --columns N          grid columns (default: ceil(sqrt(pairs)))\n"
            "  --log-l, --model-curve FILE  as for spectrum (the curve in every panel)\n"
            "  --width N, --height N  figure size (default: grid 300 x 230 per panel,\n"
            "                       overlay 1000 x 620)\n\n"
            "map: Mollweide equal-area view of the whole sky, longitude 0 at the centre\n"
            "  and increasing to the left, a vertical colour bar at its right with the unit\n"
            "  above it, title and caption (coordinate system) under the map, meridians\n"
            "  every 60 deg and parallels every 20 deg.  Values in [0, 1] get the\n"
            "  sequential scale (masks), others the diverging scale symmetric around 0\n"
            "  with range +-(99.5th percentile of |T|); both are clef's own, uniform in\n"
            "  CIELAB (docs/figures.md).  Missing pixels are hatched grey.\n"
            "  --mask MASK          show MAP x MASK; pixels where MASK is 0 are shown as\n"
            "                       missing\n"
            "  --mask-column COL    column of MASK to read (default: its first value\n"
            "                       column; --column and --hdu apply to MAP only)\n"
            "  --ordering RING|NESTED  pixel order of MAP and MASK files without ORDERING\n"
            "  --range MIN,MAX      colour range (default: automatic, see above)\n"
            "  --percentile P       diverging range from this percentile of |T| (default 99.5)\n"
            "  --scale S            auto, diverging or sequential (default auto)\n"
            "  --unit TEXT          colour-bar unit (default: the map's TUNIT, else uK;\n"
            "                       none for the sequential scale)\n"
            "  --column COL, --hdu HDU  column and table of MAP to read (default: the first\n"
            "                       value column of the first table)\n"
            "  --transparent        no background outside the sky (PNG alpha)\n"
            "  --no-grid            no graticule\n"
            "  --width N            figure width (default 1000); the height follows\n"
            "                       (about width/2)\n\n"
            "curvature: the posterior of Omega_k (peak 1) with the 68%% and 95%% intervals\n"
            "  shaded, the best value (solid) and the flat value 0 (dashed) marked, the\n"
            "  classification in the title.\n"
            "  --omega-total        x axis Omega_total = 1 - Omega_k (flat at 1)\n"
            "  --width N, --height N  figure size (default 800 x 500)\n\n"
            "Common options:\n"
            "  -o, --output FILE    figure to write (required; '-': PNG on standard output;\n"
            "                       never one of the input files)\n"
            "  --title TEXT         title (default: see each figure; map: the file names)\n"
            "  --quiet              print errors only\n"
            "  --verbose            also print what is read and drawn\n"
            "  --help               show this help\n\n"
            "Exit codes: 0 ok, 2 usage, 3 invalid input (empty table, mask of another\n"
            "nside, empty range, more than 78 pairs), 4 cannot read or write a file,\n"
            "5 malformed input file (for pairs: a file without pair HDUs),\n"
            "7 unknown output extension, 8 out of memory.\n"
            "Example: clef plot spectrum bp.fits -o bp.png --model-curve model.txt\n");
}

enum {
    OPT_WIDTH = 256, OPT_HEIGHT, OPT_TITLE, OPT_LOG_L, OPT_THEORY, OPT_COMPARE, OPT_LABEL,
    OPT_COMPARE_LABEL, OPT_NO_PEAK, OPT_MASK, OPT_RANGE, OPT_PERCENTILE, OPT_SCALE, OPT_UNIT,
    OPT_COLUMN, OPT_HDU, OPT_TRANSPARENT, OPT_NO_GRID, OPT_OMEGA_TOTAL, OPT_QUIET, OPT_VERBOSE,
    OPT_HELP, OPT_MASK_COLUMN, OPT_ORDERING, OPT_ARRANGE, OPT_COLUMNS
};

enum kind { KIND_SPECTRUM, KIND_MAP, KIND_CURVATURE, KIND_PAIRS, NKINDS };
static const char *const kind_names[NKINDS] = {"spectrum", "map", "curvature", "pairs"};

typedef struct args {
    int kind;
    const char *input, *output, *title;
    long width, height;
    int log_l, no_peak, transparent, no_grid, have_range, scale, omega_total, arrange;
    long columns;
    const char *theory, *compare, *label, *compare_label, *mask, *unit, *column, *hdu;
    const char *mask_column, *ordering;
    double vmin, vmax, percentile;
} args;

static const char *base_name(const char *path)
{
    const char *s = strrchr(path, '/');
    return s ? s + 1 : path;
}

/* "MIN,MAX" */
static int parse_range(const char *s, args *a)
{
    const char *comma = strchr(s, ',');
    if (!comma)
        return cli_usage_error("plot", "--range expects MIN,MAX, got '%s'", s);
    char lo[128];
    snprintf(lo, sizeof lo, "%.*s", (int)(comma - s), s);
    if (cli_parse_double("plot", "--range", lo, &a->vmin) ||
        cli_parse_double("plot", "--range", comma + 1, &a->vmax))
        return CLI_EXIT_USAGE;
    if (!(a->vmax > a->vmin))
        return cli_usage_error("plot", "--range: MAX must exceed MIN, got '%s'", s);
    a->have_range = 1;
    return 0;
}

/* One of three words, e.g. --scale auto|diverging|sequential. */
static int parse_choice(const char *opt, const char *s, const char *const words[3],
                        const int values[3], int *out)
{
    for (int i = 0; i < 3; i++)
        if (!strcmp(s, words[i])) {
            *out = values[i];
            return 0;
        }
    return cli_usage_error("plot", "%s must be %s, %s or %s, got '%s'", opt, words[0], words[1],
                           words[2], s);
}

/* The kinds of figure an option applies to, one bit per enum kind. */
static unsigned option_kinds(int opt)
{
    switch (opt) {
    case OPT_LOG_L: case OPT_THEORY:
        return 1u << KIND_SPECTRUM | 1u << KIND_PAIRS;
    case OPT_COMPARE: case OPT_LABEL: case OPT_COMPARE_LABEL: case OPT_NO_PEAK:
        return 1u << KIND_SPECTRUM;
    case OPT_MASK: case OPT_RANGE: case OPT_PERCENTILE: case OPT_SCALE: case OPT_UNIT:
    case OPT_COLUMN: case OPT_HDU: case OPT_TRANSPARENT: case OPT_NO_GRID:
    case OPT_MASK_COLUMN: case OPT_ORDERING:
        return 1u << KIND_MAP;
    case OPT_OMEGA_TOTAL:
        return 1u << KIND_CURVATURE;
    case OPT_ARRANGE: case OPT_COLUMNS:
        return 1u << KIND_PAIRS;
    default:
        return ~0u;
    }
}

static int parse_args(int argc, char **argv, args *a, int *done)
{
    static const struct option opts[] = {
        {"output", required_argument, NULL, 'o'},
        {"width", required_argument, NULL, OPT_WIDTH},
        {"height", required_argument, NULL, OPT_HEIGHT},
        {"title", required_argument, NULL, OPT_TITLE},
        {"log-l", no_argument, NULL, OPT_LOG_L},
        {"model-curve", required_argument, NULL, OPT_THEORY},
        {"compare", required_argument, NULL, OPT_COMPARE},
        {"label", required_argument, NULL, OPT_LABEL},
        {"compare-label", required_argument, NULL, OPT_COMPARE_LABEL},
        {"no-peak", no_argument, NULL, OPT_NO_PEAK},
        {"mask", required_argument, NULL, OPT_MASK},
        {"range", required_argument, NULL, OPT_RANGE},
        {"percentile", required_argument, NULL, OPT_PERCENTILE},
        {"scale", required_argument, NULL, OPT_SCALE},
        {"unit", required_argument, NULL, OPT_UNIT},
        {"column", required_argument, NULL, OPT_COLUMN},
        {"hdu", required_argument, NULL, OPT_HDU},
        {"mask-column", required_argument, NULL, OPT_MASK_COLUMN},
        {"ordering", required_argument, NULL, OPT_ORDERING},
        {"transparent", no_argument, NULL, OPT_TRANSPARENT},
        {"no-grid", no_argument, NULL, OPT_NO_GRID},
        {"omega-total", no_argument, NULL, OPT_OMEGA_TOTAL},
        {"arrange", required_argument, NULL, OPT_ARRANGE},
        {"columns", required_argument, NULL, OPT_COLUMNS},
        {"quiet", no_argument, NULL, OPT_QUIET},
        {"verbose", no_argument, NULL, OPT_VERBOSE},
        {"help", no_argument, NULL, OPT_HELP},
        {NULL, 0, NULL, 0},
    };
    /* For each figure kind, the first option given that it does not take. */
    const char *foreign_opt[NKINDS] = {NULL};
    int c;
    opterr = 0;
    optind = 1;
    while ((c = getopt_long(argc, argv, "o:", opts, NULL)) != -1) {
        for (int k = 0; k < NKINDS; k++)
            if (!(option_kinds(c) >> k & 1u) && !foreign_opt[k])
                foreign_opt[k] = argv[optind - 1];
        switch (c) {
        case 'o': a->output = optarg; break;
        case OPT_WIDTH:
            if (cli_parse_long("plot", "--width", optarg, &a->width))
                return CLI_EXIT_USAGE;
            if (a->width < 16 || a->width > 20000)
                return cli_usage_error("plot", "--width must be 16..20000, got %ld", a->width);
            break;
        case OPT_HEIGHT:
            if (cli_parse_long("plot", "--height", optarg, &a->height))
                return CLI_EXIT_USAGE;
            if (a->height < 16 || a->height > 20000)
                return cli_usage_error("plot", "--height must be 16..20000, got %ld", a->height);
            break;
        case OPT_TITLE: a->title = optarg; break;
        case OPT_LOG_L: a->log_l = 1; break;
        case OPT_THEORY: a->theory = optarg; break;
        case OPT_COMPARE: a->compare = optarg; break;
        case OPT_LABEL: a->label = optarg; break;
        case OPT_COMPARE_LABEL: a->compare_label = optarg; break;
        case OPT_NO_PEAK: a->no_peak = 1; break;
        case OPT_MASK: a->mask = optarg; break;
        case OPT_RANGE:
            if (parse_range(optarg, a))
                return CLI_EXIT_USAGE;
            break;
        case OPT_PERCENTILE:
            if (cli_parse_double("plot", "--percentile", optarg, &a->percentile))
                return CLI_EXIT_USAGE;
            if (!(a->percentile > 0 && a->percentile <= 100))
                return cli_usage_error("plot", "--percentile must be in (0, 100], got %s",
                                       optarg);
            break;
        case OPT_SCALE: {
            static const char *const words[3] = {"auto", "diverging", "sequential"};
            static const int values[3] = {CLEF_PLOT_SCALE_AUTO, CLEF_PLOT_SCALE_DIVERGING,
                                          CLEF_PLOT_SCALE_SEQUENTIAL};
            if (parse_choice("--scale", optarg, words, values, &a->scale))
                return CLI_EXIT_USAGE;
            break;
        }
        case OPT_UNIT: a->unit = optarg; break;
        case OPT_COLUMN: a->column = optarg; break;
        case OPT_HDU: a->hdu = optarg; break;
        case OPT_MASK_COLUMN: a->mask_column = optarg; break;
        case OPT_ORDERING: a->ordering = optarg; break;
        case OPT_TRANSPARENT: a->transparent = 1; break;
        case OPT_NO_GRID: a->no_grid = 1; break;
        case OPT_OMEGA_TOTAL: a->omega_total = 1; break;
        case OPT_ARRANGE: {
            static const char *const words[3] = {"auto", "grid", "overlay"};
            static const int values[3] = {CLEF_PLOT_ARRANGE_AUTO, CLEF_PLOT_ARRANGE_GRID,
                                          CLEF_PLOT_ARRANGE_OVERLAY};
            if (parse_choice("--arrange", optarg, words, values, &a->arrange))
                return CLI_EXIT_USAGE;
            break;
        }
        case OPT_COLUMNS:
            if (cli_parse_long("plot", "--columns", optarg, &a->columns))
                return CLI_EXIT_USAGE;
            if (a->columns < 1 || a->columns > CLEF_PLOT_PAIRS_MAX)
                return cli_usage_error("plot", "--columns must be 1..%d, got %ld",
                                       CLEF_PLOT_PAIRS_MAX, a->columns);
            break;
        case OPT_QUIET: cli_verbosity = 0; break;
        case OPT_VERBOSE: cli_verbosity = 2; break;
        case OPT_HELP:
            help(stdout);
            *done = 1;
            return CLI_EXIT_OK;
        default:
            return cli_usage_error("plot", "unknown or incomplete option '%s'", argv[optind - 1]);
        }
    }
    if (argc - optind != 2)
        return cli_usage_error("plot", "expected KIND (spectrum, pairs, map or curvature) and "
                               "one input file, got %d argument(s)", argc - optind);
    const char *kind = argv[optind];
    a->input = argv[optind + 1];
    a->kind = -1;
    for (int k = 0; k < NKINDS; k++)
        if (!strcmp(kind, kind_names[k]))
            a->kind = k;
    if (a->kind < 0)
        return cli_usage_error("plot", "unknown figure '%s' (spectrum, pairs, map or curvature)",
                               kind);
    if (!a->output)
        return cli_usage_error("plot", "--output FILE is required");
    if (foreign_opt[a->kind])
        return cli_usage_error("plot", "option '%s' does not apply to 'plot %s'",
                               foreign_opt[a->kind], kind);
    if (cli_check_ordering("plot", a->ordering))
        return CLI_EXIT_USAGE;
    if (a->kind == KIND_MAP && a->height)
        return cli_usage_error("plot", "the map view's height follows from --width; "
                               "--height does not apply");
    return 0;
}

/* The peak to mark: the one recorded in the table's header, else a fit
 * with the default options.  Returns 1 when r holds a found peak. */
static int table_peak(const clef_bandpowers *bp, const char *path, clef_peak_result *r)
{
    if (clef_peak_from_meta(bp, r, NULL) == CLEF_OK) {
        if (r->found)
            cli_verbose("first peak from the header of %s: l = %.1f +- %.1f", path, r->l_peak,
                        r->l_peak_err);
        else
            cli_info("warning: %s records no first peak: %s", path, r->reason);
        return r->found;
    }
    clef_peak_opts po;
    clef_peak_opts_default(&po);
    if (clef_peak_find(bp, &po, r) != CLEF_OK) {
        /* A table the peak fit cannot use is still worth drawing. */
        cli_info("warning: %s: no first peak marked: %s", path, clef_last_error());
        return 0;
    }
    if (!r->found)
        cli_info("warning: %s: no first peak marked: %s", path, r->reason);
    else
        cli_verbose("first peak fitted on %s: l = %.1f +- %.1f", path, r->l_peak,
                    r->l_peak_err);
    return r->found;
}

/* 1 if the file's leading comment lines name its columns ("# columns:"),
 * the spectrum layout clef's model files use; 0 for a plain table. */
static int has_columns_line(const char *path)
{
    FILE *f = fopen(path, "r");
    if (!f)
        return 0;
    char line[1024];
    int found = 0;
    while (!found && fgets(line, sizeof line, f)) {
        const char *s = line + strspn(line, " \t");
        if (*s == '\n' || *s == '\0')
            continue;
        if (*s != '#')
            break;
        found = strstr(s, "columns:") != NULL;
    }
    fclose(f);
    return found;
}

/* The theory curve as (l, D_l) points up to lmax: from a spectrum file
 * through the theory module (C_l converted to D_l = l(l+1)C_l/2pi), or from
 * a plain "l D_l" table through the band-power reader. */
typedef struct theory_curve {
    double *l, *dl;
    size_t n;
} theory_curve;

static int read_theory(const char *path, int lmax, theory_curve *t)
{
    int flmax = -1;
    if (!has_columns_line(path) && clef_theory_read_cl(path, 0, NULL, &flmax) != CLEF_OK) {
        clef_bandpowers *bp = NULL;
        int status = clef_bandpowers_read(&bp, path);
        if (status != CLEF_OK)
            return status;
        t->l = malloc((size_t)bp->nbins * sizeof *t->l);
        t->dl = malloc((size_t)bp->nbins * sizeof *t->dl);
        if (t->l && t->dl) {
            memcpy(t->l, bp->l_eff, (size_t)bp->nbins * sizeof *t->l);
            memcpy(t->dl, bp->dl, (size_t)bp->nbins * sizeof *t->dl);
            t->n = (size_t)bp->nbins;
        } else {
            status = CLEF_ENOMEM;
        }
        clef_bandpowers_free(bp);
        return status;
    }
    if (lmax < 2)
        lmax = 2;
    double *cl = malloc(((size_t)lmax + 1) * sizeof *cl);
    t->l = malloc(((size_t)lmax + 1) * sizeof *t->l);
    t->dl = malloc(((size_t)lmax + 1) * sizeof *t->dl);
    if (!cl || !t->l || !t->dl) {
        free(cl);
        return CLEF_ENOMEM;
    }
    int lmax_file = 0;
    const int status = clef_theory_read_cl(path, lmax, cl, &lmax_file);
    if (status == CLEF_OK)
        for (int l = 2; l <= lmax && l <= lmax_file; l++) {
            t->l[t->n] = l;
            t->dl[t->n++] = l * (l + 1.0) * cl[l] / (2 * M_PI);
        }
    free(cl);
    return status;
}

/* The --model-curve as the figures take it (NULL without one). */
static const clef_plot_curve *model_curve(const args *a, const theory_curve *th,
                                          clef_plot_curve *curve)
{
    if (!a->theory)
        return NULL;
    curve->l = th->l;
    curve->dl = th->dl;
    curve->n = th->n;
    curve->label = base_name(a->theory);
    return curve;
}

/* Largest multipole a table shows. */
static int table_lmax(const clef_bandpowers *bp)
{
    int lmax = 0;
    for (int b = 0; bp && b < bp->nbins; b++) {
        if (bp->l_hi[b] > lmax)
            lmax = bp->l_hi[b];
        if (bp->l_eff[b] > lmax)
            lmax = (int)ceil(bp->l_eff[b]);
    }
    return lmax;
}

static int run_spectrum(const args *a)
{
    clef_bandpowers *bp = NULL, *cmp = NULL;
    theory_curve th = {0};
    int status = clef_bandpowers_read(&bp, a->input);
    if (status == CLEF_OK && a->compare)
        status = clef_bandpowers_read(&cmp, a->compare);
    if (status == CLEF_OK && a->theory) {
        /* The curve is drawn over the data's l range (and a little beyond
         * on a logarithmic axis). */
        const int lmax = table_lmax(bp) > table_lmax(cmp) ? table_lmax(bp) : table_lmax(cmp);
        status = read_theory(a->theory, (int)(1.2 * lmax) + 2, &th);
    }
    if (status != CLEF_OK)
        goto done;
    clef_plot_spectrum_opts o = {0};
    o.width = (int)a->width;
    o.height = (int)a->height;
    o.log_l = a->log_l;
    o.title = a->title;
    o.source = a->input;
    o.label = a->label ? a->label : base_name(a->input);
    o.compare = cmp;
    o.compare_label = a->compare_label ? a->compare_label : a->compare ? base_name(a->compare) : NULL;
    clef_plot_curve curve;
    o.theory = model_curve(a, &th, &curve);
    clef_peak_result peak;
    if (!a->no_peak && table_peak(bp, a->input, &peak))
        o.peak = &peak;
    status = clef_plot_spectrum(bp, &o, a->output);
done:
    clef_bandpowers_free(bp);
    clef_bandpowers_free(cmp);
    free(th.l);
    free(th.dl);
    return status;
}

/* Every pair of a run file's FITS output (or the spectra of a polarized
 * run), in a grid or overlaid. */
static int run_pairs(const args *a)
{
    clef_bandpowers_set *set = NULL;
    theory_curve th = {0};
    /* More sets than a figure takes are refused by clef_plot_pairs (exit 3). */
    const char *names[CLEF_PLOT_PAIRS_MAX];
    int status = clef_bandpowers_read_set(&set, a->input);
    if (status == CLEF_EFORMAT)
        cli_info("hint: 'clef plot pairs' draws the FITS file of 'clef spectrum --run' (one "
                 "BANDPOWER HDU per pair); a table of one pair is drawn by 'clef plot spectrum'");
    if (status != CLEF_OK)
        goto done;
    int lmax = 0;
    for (int k = 0; k < set->n; k++) {
        if (k < CLEF_PLOT_PAIRS_MAX)
            names[k] = set->names[k];
        if (table_lmax(set->tables[k]) > lmax)
            lmax = table_lmax(set->tables[k]);
    }
    cli_verbose("%s: %d band-power sets", a->input, set->n);
    if (a->theory && (status = read_theory(a->theory, (int)(1.2 * lmax) + 2, &th)) != CLEF_OK)
        goto done;
    clef_plot_pairs_opts o = {0};
    o.width = (int)a->width;
    o.height = (int)a->height;
    o.arrange = a->arrange;
    o.columns = (int)a->columns;
    o.log_l = a->log_l;
    o.title = a->title;
    o.source = a->input;
    clef_plot_curve curve;
    o.theory = model_curve(a, &th, &curve);
    status = clef_plot_pairs((const clef_bandpowers *const *)set->tables, names, set->n, &o,
                             a->output);
done:
    clef_bandpowers_set_free(set);
    free(th.l);
    free(th.dl);
    return status;
}

static int run_map(const args *a)
{
    clef_map *map = NULL, *mask = NULL;
    clef_map_read_opts ro = {0};
    ro.hdu = a->hdu;
    ro.column = a->column;
    ro.ordering = a->ordering;
    /* The mask is its own file: MAP's --column and --hdu do not apply. */
    clef_map_read_opts mro = {0};
    mro.column = a->mask_column;
    mro.ordering = a->ordering;
    int status = clef_map_read(&map, a->input, &ro);
    if (status == CLEF_OK && a->mask)
        status = clef_map_read(&mask, a->mask, &mro);
    if (status == CLEF_OK && mask)
        status = clef_map_check_mask(map, a->input, mask, a->mask, 0);
    if (status != CLEF_OK)
        goto done;
    cli_verbose("%s: nside %lld, %lld missing pixels", a->input, (long long)map->nside,
                (long long)map->nmissing);
    char title[600];
    if (a->title)
        snprintf(title, sizeof title, "%s", a->title);
    else if (mask)
        snprintf(title, sizeof title, "%s \xc3\x97 %s", base_name(a->input), base_name(a->mask));
    else
        snprintf(title, sizeof title, "%s", base_name(a->input));
    clef_plot_map_opts o = {0};
    o.width = (int)a->width;
    o.scale = a->scale;
    o.have_range = a->have_range;
    o.vmin = a->vmin;
    o.vmax = a->vmax;
    o.percentile = a->percentile;
    o.title = title[0] ? title : NULL;
    o.unit = a->unit;
    o.transparent = a->transparent;
    o.graticule = a->no_grid ? -1 : 0;
    status = clef_plot_map(map, mask, &o, a->output);
done:
    clef_map_free(map);
    clef_map_free(mask);
    return status;
}

static int run_curvature(const args *a)
{
    clef_plot_geometry *g = NULL;
    int status = clef_plot_geometry_read(&g, a->input);
    if (status != CLEF_OK)
        return status;
    clef_plot_curvature_opts o = {0};
    o.width = (int)a->width;
    o.height = (int)a->height;
    o.title = a->title;
    o.omega_total = a->omega_total;
    status = clef_plot_curvature(g, &o, a->output);
    clef_plot_geometry_free(g);
    return status;
}

int cmd_plot(int argc, char **argv)
{
    args a = {0};
    int done = 0;
    const int rc = parse_args(argc, argv, &a, &done);
    if (rc || done)
        return rc;
    cli_setup_logging();
    const char *inputs[4] = {a.input, a.mask, a.theory, a.compare}, *outputs[1] = {a.output};
    const int rc_out = cli_check_outputs(inputs, 4, outputs, 1);
    if (rc_out != CLI_EXIT_OK)
        return rc_out;
    int status;
    switch (a.kind) {
    case KIND_SPECTRUM: status = run_spectrum(&a); break;
    case KIND_PAIRS: status = run_pairs(&a); break;
    case KIND_MAP: status = run_map(&a); break;
    default: status = run_curvature(&a); break;
    }
    if (status != CLEF_OK)
        return cli_fail(status);
    cli_info("wrote %s", cli_is_stdout(a.output) ? "the figure to standard output" : a.output);
    return CLI_EXIT_OK;
}
