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

static const char *const model_names[] = {"parabola", "gaussian"};

static void help(void)
{
    clef_peak_opts o;
    clef_peak_opts_default(&o);
    printf("Usage: clef peak [OPTIONS] TABLE\n\n"
           "Locate the first acoustic peak of a band-power table (clef's FITS or CSV, or a\n"
           "text table of columns 'l_eff D err' or 'l_lo l_hi l_eff C D err'; see\n"
           "docs/formats.md) by a least-squares fit with the band-power covariance around\n"
           "the highest band power in a window of multipoles (docs/peak.md).\n\n"
           "Options:\n"
           "  --l-min L           lower end of the search window, multipole (default %g)\n"
           "  --l-max L           upper end of the search window, multipole (default %g)\n"
           "  --model M           'parabola' (D = a + b l + c l^2) or 'gaussian'\n"
           "                      (D = D0 + A exp(-(l - lp)^2 / 2w^2)) (default gaussian)\n"
           "  --half-width DL     fit the bins within DL multipoles of the highest one\n"
           "                      (default %g)\n"
           "  --curv-sigma N      report no peak unless the fitted curvature is at least\n"
           "                      N standard errors below zero (default %g)\n"
           "  --cov FILE          covariance of D (uK^4) for the table's bins, a text\n"
           "                      matrix (default: the table's own, else its errors alone)\n"
           "  --json FILE         also write the result as JSON to FILE ('-': standard\n"
           "                      output; the text result then goes to standard error)\n"
           "  --require           exit with code 9 when no peak is found (default: exit 0\n"
           "                      and print the reason)\n"
           "  --quiet             print errors only (--json is still written)\n"
           "  --verbose           print fit details and timings on stderr\n"
           "  --help              show this help\n\n"
           "Exit codes: 0 done (peak or no peak), 2 usage, 3 invalid input (e.g. errors\n"
           "missing or zero, no bin in the window), 4 cannot read or write a file, 5 bad\n"
           "file format, 8 out of memory, 9 no peak found with --require.\n",
           o.l_min, o.l_max, o.half_width, o.curv_nsigma);
}

/* The result as a JSON object (numbers only where defined). */
static cJSON *result_json(const char *table, const clef_peak_opts *o, const clef_peak_result *r,
                          const char *cov_source)
{
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "clef_version", CLEF_VERSION);
    cJSON_AddStringToObject(j, "table", table);
    cJSON_AddStringToObject(j, "model", model_names[o->model]);
    cJSON *w = cJSON_AddObjectToObject(j, "window");
    cJSON_AddNumberToObject(w, "l_min", o->l_min);
    cJSON_AddNumberToObject(w, "l_max", o->l_max);
    cJSON_AddNumberToObject(j, "half_width", o->half_width);
    cJSON_AddNumberToObject(j, "curvature_sigma_min", o->curv_nsigma);
    cJSON_AddStringToObject(j, "covariance", cov_source);
    cJSON_AddBoolToObject(j, "found", r->found);
    if (!r->found)
        cJSON_AddStringToObject(j, "reason", r->reason);
    if (isfinite(r->curv_signif))
        cJSON_AddNumberToObject(j, "curvature_signif", r->curv_signif);
    if (r->nbins_used > 0) {
        cJSON_AddNumberToObject(j, "bins_used", r->nbins_used);
        cJSON_AddNumberToObject(j, "bin_first", r->bin_first);
        cJSON_AddNumberToObject(j, "bin_last", r->bin_last);
    }
    if (r->found) {
        cJSON_AddNumberToObject(j, "l_peak", r->l_peak);
        cJSON_AddNumberToObject(j, "l_peak_err", r->l_peak_err);
        cJSON_AddNumberToObject(j, "d_peak_uK2", r->d_peak);
        cJSON_AddNumberToObject(j, "d_peak_err_uK2", r->d_peak_err);
        cJSON_AddNumberToObject(j, "corr_l_d", r->corr);
        cJSON_AddNumberToObject(j, "theta_deg", r->theta_deg);
        cJSON_AddNumberToObject(j, "theta_deg_err", r->theta_deg_err);
        cJSON_AddNumberToObject(j, "chi2", r->chi2);
        cJSON_AddNumberToObject(j, "dof", r->dof);
        if (isfinite(r->p_value))
            cJSON_AddNumberToObject(j, "p_value", r->p_value);
        else
            cJSON_AddNullToObject(j, "p_value");
    }
    return j;
}


static void print_result(const char *table, const clef_bandpowers *bp, const clef_peak_opts *o,
                         const clef_peak_result *r, const char *cov_source)
{
    if (!r->found) {
        printf("no peak found: %s\n", r->reason);
        return;
    }
    printf("first acoustic peak of %s\n", table);
    printf("  fit            %s over %d bins (l_eff %g to %g), %s covariance\n",
           model_names[o->model], r->nbins_used, bp->l_eff[r->bin_first], bp->l_eff[r->bin_last],
           cov_source);
    printf("  curvature      %.1f sigma below zero\n", -r->curv_signif);
    printf("  l_peak         %.2f +- %.2f\n", r->l_peak, r->l_peak_err);
    printf("  D_peak         %.1f +- %.1f uK^2\n", r->d_peak, r->d_peak_err);
    printf("  correlation    %.3f (l_peak with D_peak)\n", r->corr);
    printf("  angular scale  %.4f +- %.4f deg (180 deg / l_peak)\n", r->theta_deg,
           r->theta_deg_err);
    if (r->dof > 0)
        printf("  goodness       chi^2 = %.2f for %d degree%s of freedom, p = %.3g\n", r->chi2,
               r->dof, r->dof == 1 ? "" : "s", r->p_value);
    else
        printf("  goodness       chi^2 = %.2g with no degrees of freedom (p undefined)\n", r->chi2);
}

int cmd_peak(int argc, char **argv)
{
    static const struct option longopts[] = {
        {"l-min", required_argument, NULL, 'a'},     {"l-max", required_argument, NULL, 'b'},
        {"model", required_argument, NULL, 'm'},     {"half-width", required_argument, NULL, 'w'},
        {"curv-sigma", required_argument, NULL, 's'}, {"cov", required_argument, NULL, 'c'},
        {"json", required_argument, NULL, 'j'},      {"require", no_argument, NULL, 'r'},
        {"quiet", no_argument, NULL, 'q'},           {"verbose", no_argument, NULL, 'v'},
        {"help", no_argument, NULL, 'h'},            {NULL, 0, NULL, 0}};
    clef_peak_opts o;
    clef_peak_opts_default(&o);
    const char *json_path = NULL, *cov_path = NULL;
    int require = 0, c;
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
            break;
        case 's':
            if (cli_parse_double("peak", "--curv-sigma", optarg, &o.curv_nsigma))
                return CLI_EXIT_USAGE;
            break;
        case 'm':
            if (!strcmp(optarg, "parabola"))
                o.model = CLEF_PEAK_PARABOLA;
            else if (!strcmp(optarg, "gaussian"))
                o.model = CLEF_PEAK_GAUSSIAN;
            else
                return cli_usage_error("peak", "--model must be 'parabola' or 'gaussian', got '%s'",
                                       optarg);
            break;
        case 'c': cov_path = optarg; break;
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
    if (!(o.half_width > 0))
        return cli_usage_error("peak", "--half-width must be positive, got %g", o.half_width);
    if (!(o.curv_nsigma >= 0))
        return cli_usage_error("peak", "--curv-sigma must be >= 0, got %g", o.curv_nsigma);
    cli_setup_logging();
    const char *table = argv[optind];
    const char *inputs[2] = {table, cov_path}, *outputs[1] = {json_path};
    const int rc_out = cli_check_outputs(inputs, 2, outputs, 1);
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
    if (status != CLEF_OK) {
        clef_bandpowers_free(bp);
        return cli_fail(status);
    }
    cli_verbose("peak fit in %.3f s", clef_wtime() - t1);
    if (cli_verbosity >= 1) {
        cli_text_begin();
        print_result(table, bp, &o, &r, cov_source);
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
