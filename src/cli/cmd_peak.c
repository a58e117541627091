/* clef peak TABLE: fit the first acoustic peak of a band-power table
 * (docs/peak.md) and print it; optionally write a JSON result. */
#define _POSIX_C_SOURCE 200809L
#include <cjson/cJSON.h>
#include <errno.h>
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/peak.h"
#include "clef/table.h"
#include "cli.h"

static int ends_with(const char *s, const char *suffix)
{
    const size_t n = strlen(s), m = strlen(suffix);
    return n >= m && !strcmp(s + n - m, suffix);
}

static void help(void)
{
    clef_peak_opts o;
    clef_peak_opts_default(&o);
    printf("Usage: clef peak [OPTIONS] TABLE\n\n"
           "Locate the first acoustic peak of a band-power table (clef's FITS or CSV, or a\n"
           "text table of columns 'l_eff D err' or 'l_lo l_hi l_eff C D err'; see\n"
           "docs/formats.md): a local model of ln D (free up to the cubic term, higher\n"
           "terms under a smoothness prior) is fitted through the band powers' window\n"
           "functions with their covariance, around the highest band power of a window of\n"
           "multipoles; the peak is the maximum of the fitted D(l) (docs/peak.md).\n\n"
           "Options:\n"
           "  --l-min L           lower end of the search window, multipole (default %g)\n"
           "  --l-max L           upper end of the search window, multipole (default %g)\n"
           "  --half-width DL     fit the bins within DL multipoles of the fit centre\n"
           "                      (default: max(%g, %g bin widths))\n"
           "  --curv-sigma N      report no peak unless the curvature of ln D at the peak\n"
           "                      is at least N standard errors below zero (default %g)\n"
           "  --error-draws N     refit N Gaussian draws of the band powers around the fit\n"
           "                      for the statistical error (default %d: first-order\n"
           "                      propagation; docs/peak.md suggests %d)\n"
           "  --cov FILE          covariance of D (uK^4) for the table's bins, a text\n"
           "                      matrix (default: the table's own, else its errors alone)\n"
           "  --output FILE       write the table with the result as PK_* keywords to FILE\n"
           "                      (FITS when FILE ends in .fits, else CSV; not an input)\n"
           "  --json FILE         also write the result as JSON to FILE ('-': standard\n"
           "                      output; the text result then goes to standard error)\n"
           "  --require           exit with code 9 when no peak is found (default: exit 0\n"
           "                      and print the reason)\n"
           "  --quiet             print errors only (--json is still written)\n"
           "  --verbose           print fit details and timings on stderr\n"
           "  --help              show this help\n\n"
           "Exit codes: 0 done (peak or no peak), 2 usage, 3 invalid input (e.g. errors\n"
           "missing or zero, no bin in the window, --output naming the input), 4 cannot\n"
           "read or write a file, 5 bad file format, 8 out of memory, 9 no peak found with\n"
           "--require.\n",
           o.l_min, o.l_max, CLEF_PEAK_HALF_WIDTH_MIN, CLEF_PEAK_HALF_WIDTH_BINS, o.curv_nsigma,
           o.draws, CLEF_PEAK_DRAWS_SUGGESTED);
}

/* The result as a JSON object (numbers only where defined). */
static cJSON *result_json(const char *table, const clef_peak_opts *o, const clef_peak_result *r,
                          const char *cov_source)
{
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "program", "clef");
    cJSON_AddStringToObject(j, "version", CLEF_VERSION);
    cJSON_AddStringToObject(j, "table", table);
    cJSON_AddStringToObject(j, "covariance", cov_source);
    cli_peak_json(j, r, o);
    cJSON *w = cJSON_AddArrayToObject(j, "warnings");
    for (int i = 0; i < cli_nwarnings(); i++)
        cJSON_AddItemToArray(w, cJSON_CreateString(cli_warning(i)));
    return j;
}

static const char *const window_text[] = {"the table's window functions",
                                          "top-hat windows over each bin (none in the table)",
                                          "points at l_eff (no windows, one-multipole bins)"};

static void print_result(const char *table, const clef_bandpowers *bp, const clef_peak_result *r,
                         const char *cov_source)
{
    if (!r->found) {
        printf("no peak found: %s\n", r->reason);
        return;
    }
    printf("first acoustic peak of %s\n", table);
    printf("  fit            %d bins (l_eff %g to %g), half width %g, %s covariance,\n"
           "                 %s\n",
           r->nbins_used, bp->l_eff[r->bin_first], bp->l_eff[r->bin_last], r->half_width,
           cov_source, r->windows >= 0 && r->windows <= 2 ? window_text[r->windows] : "");
    printf("  curvature      %.1f sigma below zero\n", -r->curv_signif);
    printf("  l_peak         %.2f +- %.2f (statistical %.2f, shape %.2f)\n", r->l_peak,
           r->l_peak_err, r->l_peak_err_stat, r->l_peak_err_shape);
    if (r->draws > 0)
        printf("                 statistical error from %d of %d refitted draws (first order "
               "%.2f)\n", r->draws_found, r->draws, r->l_peak_err_lin);
    printf("  D_peak         %.1f +- %.1f uK^2\n", r->d_peak, r->d_peak_err);
    printf("  correlation    %.3f (l_peak with D_peak)\n", r->corr);
    printf("  angular scale  %.4f +- %.4f deg (180 deg / l_peak)\n", r->theta_deg,
           r->theta_deg_err);
    printf("  peak width     %.1f (Gaussian-equivalent)\n", r->width);
    if (r->dof > 0)
        printf("  goodness       chi^2 = %.2f for %d degree%s of freedom, p = %.3g\n", r->chi2,
               r->dof, r->dof == 1 ? "" : "s", r->p_value);
    else
        printf("  goodness       chi^2 = %.2g with no degrees of freedom (p undefined)\n", r->chi2);
}

int cmd_peak(int argc, char **argv)
{
    static const struct option longopts[] = {
        {"l-min", required_argument, NULL, 'a'},      {"l-max", required_argument, NULL, 'b'},
        {"half-width", required_argument, NULL, 'w'}, {"curv-sigma", required_argument, NULL, 's'},
        {"error-draws", required_argument, NULL, 'e'},
        {"error-draws", required_argument, NULL, 'e'},
        {"cov", required_argument, NULL, 'c'},        {"output", required_argument, NULL, 'o'},
        {"json", required_argument, NULL, 'j'},       {"require", no_argument, NULL, 'r'},
        {"quiet", no_argument, NULL, 'q'},            {"verbose", no_argument, NULL, 'v'},
        {"help", no_argument, NULL, 'h'},             {NULL, 0, NULL, 0}};
    clef_peak_opts o;
    clef_peak_opts_default(&o);
    const char *json_path = NULL, *cov_path = NULL, *out_path = NULL;
    int require = 0, c, have_hw = 0;
    optind = 1;
    opterr = 0;
    while ((c = getopt_long(argc, argv, ":", longopts, NULL)) != -1) {
        switch (c) {
        case 'a':
            if (cli_parse_double("peak", "--l-min", optarg, &o.l_min))
                return CLI_EXIT_USAGE;
            break;
        case 'b':
            if (cli_parse_double("peak", "--l-max", optarg, &o.l_max))
                return CLI_EXIT_USAGE;
            break;
        case 'w':
            if (cli_parse_double("peak", "--half-width", optarg, &o.half_width))
                return CLI_EXIT_USAGE;
            have_hw = 1;
            break;
        case 's':
            if (cli_parse_double("peak", "--curv-sigma", optarg, &o.curv_nsigma))
                return CLI_EXIT_USAGE;
            break;
        case 'e':
        {
            long v;
            if (cli_parse_long("peak", "--error-draws", optarg, &v))
                return CLI_EXIT_USAGE;
            if (v < 0 || v > 100000)
                return cli_usage_error("peak", "--error-draws must be 0 to 100000, got %ld", v);
            o.draws = (int)v;
            break;
        }
        case 'c': cov_path = optarg; break;
        case 'o': out_path = optarg; break;
        case 'j': json_path = optarg; break;
        case 'r': require = 1; break;
        case 'q': cli_verbosity = 0; break;
        case 'v': cli_verbosity = 2; break;
        case 'h': help(); return CLI_EXIT_OK;
        case ':': return cli_usage_error("peak", "option %s needs a value", argv[optind - 1]);
        default: return cli_usage_error("peak", "unknown option '%s'", argv[optind - 1]);
        }
    }
    if (optind != argc - 1)
        return cli_usage_error("peak", optind == argc ? "a band-power table is required"
                                                      : "exactly one band-power table expected");
    if (!(o.l_min < o.l_max))
        return cli_usage_error("peak", "--l-min %g must be below --l-max %g", o.l_min, o.l_max);
    if (have_hw && !(o.half_width > 0))
        return cli_usage_error("peak", "--half-width must be positive, got %g", o.half_width);
    if (!(o.curv_nsigma >= 0))
        return cli_usage_error("peak", "--curv-sigma must be >= 0, got %g", o.curv_nsigma);
    cli_setup_logging();
    const char *table = argv[optind];
    if (out_path && cli_is_stdout(out_path))
        return cli_usage_error("peak", "--output needs a file (a table cannot go to standard "
                               "output; use --json - for the result)");
    const char *inputs[2] = {table, cov_path}, *outputs[2] = {json_path, out_path};
    const int rc_out = cli_check_outputs(inputs, 2, outputs, 2);
    if (rc_out != CLI_EXIT_OK)
        return rc_out;

    const double t0 = clef_wtime();
    clef_bandpowers *bp = NULL;
    int status = clef_bandpowers_read(&bp, table);
    if (status != CLEF_OK)
        return cli_fail(status);
    if (cov_path && (status = clef_bandpowers_read_cov(bp, cov_path)) != CLEF_OK) {
        clef_bandpowers_free(bp);
        return cli_fail(status);
    }
    const char *cov_source = bp->cov ? "full" : "diagonal";
    cli_verbose("read %d bins from %s (%s covariance) in %.3f s", bp->nbins, table, cov_source,
                clef_wtime() - t0);
    clef_peak_result r;
    const double t1 = clef_wtime();
    status = clef_peak_find(bp, &o, &r);
    if (status == CLEF_OK && out_path) {
        status = clef_peak_to_meta(&r, &o, bp);
        if (status == CLEF_OK)
            status = ends_with(out_path, ".fits") || ends_with(out_path, ".fit")
                         ? clef_bandpowers_write_fits(bp, out_path)
                         : clef_bandpowers_write_csv(bp, out_path);
    }
    if (status != CLEF_OK) {
        clef_bandpowers_free(bp);
        return cli_fail(status);
    }
    cli_verbose("peak fit in %.3f s", clef_wtime() - t1);
    if (cli_verbosity >= 1) {
        cli_text_begin();
        print_result(table, bp, &r, cov_source);
        cli_text_end();
    }
    clef_bandpowers_free(bp);
    if (json_path) {
        cJSON *j = result_json(table, &o, &r, cov_source);
        const int rc = j ? cli_write_json(json_path, j) : CLI_EXIT_NOMEM;
        cJSON_Delete(j);
        if (rc != CLI_EXIT_OK)
            return rc;
    }
    return (!r.found && require) ? CLI_EXIT_NOPEAK : CLI_EXIT_OK;
}
