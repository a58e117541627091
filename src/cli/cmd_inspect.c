/* clef inspect FILE: a summary of one HEALPix map (geometry, ordering,
 * coordinates, valid and missing pixels, statistics of the valid pixels),
 * as text or as JSON. */
#define _GNU_SOURCE
#include <cJSON.h>
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "clef/map.h"
#include "cli.h"

static void help(FILE *f)
{
    fprintf(f,
            "Usage: clef inspect [OPTIONS] FILE\n\n"
            "Summarise a HEALPix map stored in a FITS binary table (plain or gzip):\n"
            "nside, pixel count, ordering in the file, coordinate system, unit, valid and\n"
            "missing pixels, sky fraction, and min/max/mean/rms/stddev of the valid pixels.\n"
            "Pixels equal to the bad-pixel value -1.6375e30 (to 1e-5 relative), NaN or\n"
            "infinite, and pixels absent from a partial-sky table, count as missing.\n\n"
            "Options:\n"
            "  --hdu HDU        table to read: extension number (1 = first after the\n"
            "                   primary) or EXTNAME; default: the first binary table\n"
            "  --column COL     column to read: number (1-based) or name; default: the\n"
            "                   first value column\n"
            "  --ordering ORD   RING or NESTED, for files (map and mask) without an\n"
            "                   ORDERING keyword (default: none; such files are refused)\n"
            "  --mask FILE      also check that the mask in FILE suits this map: same nside,\n"
            "                   same COORDSYS (when both are known), values in [0, 1]; a\n"
            "                   mismatch is an error (exit 3)\n"
            "  --allow-coord-mismatch  accept a mask whose COORDSYS differs (a warning)\n"
            "  --json FILE      write the summary as one JSON object to FILE ('-': standard\n"
            "                   output) instead of the text summary\n"
            "  --quiet          print errors only (--json is still written); the exit code\n"
            "                   tells whether the file reads\n"
            "  --verbose        also print what is being read\n"
            "  --help           show this help\n\n"
            "rms is sqrt(mean(x^2)); stddev divides by the number of valid pixels.\n"
            "Exit codes: 0 ok, 2 usage, 3 invalid option value (unknown HDU or column),\n"
            "4 cannot read the file, 5 malformed file, 8 out of memory.\n"
            "Example: clef inspect --json - --column 1 map.fits.gz\n");
}

static const char *coord_name(const char *c)
{
    if (!strcmp(c, "G"))
        return "galactic";
    if (!strcmp(c, "E"))
        return "ecliptic";
    if (!strcmp(c, "C"))
        return "celestial (equatorial)";
    return "unknown";
}

/* sqrt(4 pi / npix) in arcmin: the side of a pixel (Gorski et al. 2005). */
static double pixel_arcmin(int64_t npix)
{
    return sqrt(4.0 * M_PI / (double)npix) * 180.0 * 60.0 / M_PI;
}

static void add_number_or_null(cJSON *o, const char *key, double v)
{
    if (isfinite(v))
        cJSON_AddNumberToObject(o, key, v);
    else
        cJSON_AddNullToObject(o, key);
}

/* What is known about the checked mask (mask == NULL: none given). */
typedef struct mask_info {
    const char *path;
    const clef_map *mask;
    clef_map_stats st;
} mask_info;

static int write_json(const char *out, const char *path, const clef_map *m, const clef_map_stats *st,
                      const mask_info *mi)
{
    cJSON *o = cJSON_CreateObject();
    if (!o)
        return CLI_EXIT_NOMEM;
    cJSON_AddStringToObject(o, "program", "clef");
    cJSON_AddStringToObject(o, "version", CLEF_VERSION);
    cJSON_AddStringToObject(o, "path", path);
    cJSON_AddNumberToObject(o, "hdu", m->hdu);
    cJSON_AddStringToObject(o, "column", m->column);
    cJSON_AddStringToObject(o, "unit", m->unit);
    cJSON_AddNumberToObject(o, "nside", (double)m->nside);
    cJSON_AddNumberToObject(o, "npix", (double)m->npix);
    cJSON_AddNumberToObject(o, "pixel_size_arcmin", pixel_arcmin(m->npix));
    cJSON_AddStringToObject(o, "ordering", m->file_ordering == CLEF_NESTED ? "NESTED" : "RING");
    if (m->coordsys[0])
        cJSON_AddStringToObject(o, "coordsys", m->coordsys);
    else
        cJSON_AddNullToObject(o, "coordsys");
    cJSON_AddNumberToObject(o, "valid_pixels", (double)st->nvalid);
    cJSON_AddNumberToObject(o, "missing_pixels", (double)st->nmissing);
    cJSON_AddNumberToObject(o, "bad_pixels", (double)m->nbad);
    cJSON_AddNumberToObject(o, "absent_pixels", (double)(m->nmissing - m->nbad));
    cJSON_AddNumberToObject(o, "f_sky", st->fsky);
    add_number_or_null(o, "min", st->min);
    add_number_or_null(o, "max", st->max);
    add_number_or_null(o, "mean", st->mean);
    add_number_or_null(o, "rms", st->rms);
    add_number_or_null(o, "stddev", st->stddev);
    if (mi->mask) {
        cJSON *k = cJSON_AddObjectToObject(o, "mask");
        if (!k) {
            cJSON_Delete(o);
            return CLI_EXIT_NOMEM;
        }
        cJSON_AddStringToObject(k, "path", mi->path);
        cJSON_AddBoolToObject(k, "suits_map", 1);
        cJSON_AddNumberToObject(k, "valid_pixels", (double)mi->st.nvalid);
        add_number_or_null(k, "mean_weight", mi->st.mean * mi->st.fsky);
    }
    cJSON *w = cJSON_AddArrayToObject(o, "warnings");
    for (int i = 0; i < cli_nwarnings(); i++)
        cJSON_AddItemToArray(w, cJSON_CreateString(cli_warning(i)));
    const int rc = cli_write_json(out, o);
    cJSON_Delete(o);
    return rc;
}

static void print_text(const char *path, const clef_map *m, const clef_map_stats *st,
                       const mask_info *mi)
{

    const char *unit = m->unit[0] ? m->unit : "no unit";
    printf("map          %s\n", path);
    printf("read from    extension %d, column '%s' (%s)\n", m->hdu, m->column, unit);
    printf("nside        %lld: %lld pixels of %.4g arcmin\n", (long long)m->nside,
           (long long)m->npix, pixel_arcmin(m->npix));
    printf("ordering     %s in the file (held in RING)\n",
           m->file_ordering == CLEF_NESTED ? "NESTED" : "RING");
    printf("coordinates  %s%s%s\n", m->coordsys[0] ? m->coordsys : "",
           m->coordsys[0] ? ", " : "", coord_name(m->coordsys));
    printf("valid        %lld pixels, sky fraction %.6f\n", (long long)st->nvalid, st->fsky);
    printf("missing      %lld pixels: %lld flagged bad or NaN, %lld absent from the table\n",
           (long long)st->nmissing, (long long)m->nbad, (long long)(m->nmissing - m->nbad));
    if (st->nvalid == 0) {
        printf("values       none valid\n");
    } else {
        printf("min          %.9g\n", st->min);
        printf("max          %.9g\n", st->max);
        printf("mean         %.9g\n", st->mean);
        printf("rms          %.9g\n", st->rms);
        printf("stddev       %.9g\n", st->stddev);
    }
    if (mi->mask)
        printf("mask         %s suits this map (mean weight over the sky %.6f)\n", mi->path,
               mi->st.nvalid ? mi->st.mean * mi->st.fsky : 0.0);
}

int cmd_inspect(int argc, char **argv)
{
    static const struct option longopts[] = {
        {"hdu", required_argument, NULL, 'H'},      {"column", required_argument, NULL, 'c'},
        {"ordering", required_argument, NULL, 'o'}, {"json", required_argument, NULL, 'j'},
        {"quiet", no_argument, NULL, 'q'},          {"verbose", no_argument, NULL, 'v'},
        {"help", no_argument, NULL, 'h'},           {"mask", required_argument, NULL, 'm'},
        {"allow-coord-mismatch", no_argument, NULL, 'a'}, {NULL, 0, NULL, 0},
    };
    clef_map_read_opts ro = {0};
    mask_info mi = {0};
    const char *json = NULL;
    int allow_coord = 0, c;
    opterr = 0;
    optind = 1;
    while ((c = getopt_long(argc, argv, "", longopts, NULL)) != -1) {
        switch (c) {
        case 'H': ro.hdu = optarg; break;
        case 'c': ro.column = optarg; break;
        case 'o': ro.ordering = optarg; break;
        case 'j': json = optarg; break;
        case 'm': mi.path = optarg; break;
        case 'a': allow_coord = 1; break;
        case 'q': cli_verbosity = 0; break;
        case 'v': cli_verbosity = 2; break;
        case 'h': help(stdout); return CLI_EXIT_OK;
        default:
            return cli_usage_error("inspect", "unknown option or missing value: '%s'",
                                   argv[optind - 1]);
        }
    }
    if (optind != argc - 1)
        return cli_usage_error("inspect", "expected one FITS file, got %d arguments",
                               argc - optind);
    if (cli_check_ordering("inspect", ro.ordering))
        return CLI_EXIT_USAGE;
    cli_setup_logging();
    const char *path = argv[optind];
    const char *inputs[2] = {path, mi.path}, *outputs[1] = {json};
    const int rc_out = cli_check_outputs(inputs, 2, outputs, 1);
    if (rc_out != CLI_EXIT_OK)
        return rc_out;
    cli_verbose("reading %s", path);

    clef_map *m = NULL, *mask = NULL;
    clef_map_stats st;
    int status = clef_map_read(&m, path, &ro);
    if (status == CLEF_OK)
        status = clef_map_stats_compute(m, &st);
    if (status == CLEF_OK && mi.path) {
        cli_verbose("reading mask %s", mi.path);
        const clef_map_read_opts mro = {.ordering = ro.ordering};
        status = clef_map_read(&mask, mi.path, &mro);
        if (status == CLEF_OK)
            status = clef_map_check_mask(m, path, mask, mi.path, allow_coord);
        if (status == CLEF_OK)
            status = clef_map_stats_compute(mask, &mi.st);
        mi.mask = mask;
    }
    if (status != CLEF_OK) {
        clef_map_free(m);
        clef_map_free(mask);
        return cli_fail(status);
    }
    int rc = CLI_EXIT_OK;
    if (json)
        rc = write_json(json, path, m, &st, &mi);
    else if (cli_verbosity >= 1)
        print_text(path, m, &st, &mi);
    clef_map_free(m);
    clef_map_free(mask);
    return rc;
}
