/* clef geometry: the curvature of space from the first acoustic peak
 * (docs/geometry.md).  The peak comes from the command line or from the
 * peak keywords of a band-power table. */
#define _POSIX_C_SOURCE 200809L
#include <cjson/cJSON.h>
#include <errno.h>
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/geometry.h"
#include "clef/peak.h"
#include "clef/table.h"
#include "cli.h"

static const char *const cautions[] = {
    "Geometric degeneracy: the peak position fixes mainly the angle theta_* = r_s / D_M; "
    "curvature and the expansion rate (h) trade off along a line of constant theta_*, so one "
    "peak cannot fix both: the Omega_k interval is only as good as the prior on h.",
    "Assumptions: standard radiation content (photons at T_cmb plus N_eff massless neutrinos), "
    "dark energy as a cosmological constant, adiabatic initial conditions; other dark-energy "
    "models or extra radiation shift the inferred curvature.",
    "Approximate fitting formulas (Hu & Sugiyama 1996 z_*, Doran & Lilley 2002 phase shift), "
    "not a Boltzmann solver: the model l_1 is good to about half a percent, included as a "
    "model error.",
    "The peak height is not used; the priors on omega_b and omega_c stand in for the "
    "information the other peaks would give.",
};
#define NCAUTIONS (sizeof cautions / sizeof cautions[0])

static void help(void)
{
    clef_geometry_opts o;
    clef_geometry_opts_default(&o);
    printf("Usage: clef geometry [OPTIONS] [TABLE]\n\n"
           "Infer the curvature Omega_k from the first acoustic peak: either --peak-l L\n"
           "--peak-l-err S, or TABLE, a band-power table whose first-peak keywords (written\n"
           "by clef peak / clef spectrum) give l_peak +- sigma; a table without them is\n"
           "fitted with clef peak's defaults. The posterior of Omega_k is computed on a grid,\n"
           "marginalised over Gaussian priors on omega_b, omega_c and h by seeded Monte Carlo\n"
           "sampling, with the first-peak model l_1 = l_A (1 - phi_1) of docs/geometry.md.\n\n"
           "Measurement:\n"
           "  --peak-l L        first-peak multipole\n"
           "  --peak-l-err S    its 1-sigma error (required with --peak-l)\n\n"
           "Priors (Gaussian; default Planck 2018 VI, A&A 641, A6, errors doubled):\n"
           "  --omega-b X       mean of Omega_b h^2 (default %g)\n"
           "  --omega-b-err X   its sigma, 0 fixes it (default %g)\n"
           "  --omega-c X       mean of Omega_c h^2 (default %g)\n"
           "  --omega-c-err X   its sigma (default %g)\n"
           "  --h X             mean of H_0 / (100 km/s/Mpc) (default %g)\n"
           "  --h-err X         its sigma (default %g); e.g. --h 0.7304 --h-err 0.0104 for\n"
           "                    the distance ladder (Riess et al. 2022, ApJL 934, L7)\n"
           "  --model-err F     fractional error of the l_1 model, added in quadrature\n"
           "                    (default %g)\n"
           "  --n-eff X         massless neutrino species (default %g)\n"
           "  --m-nu X          sum of neutrino masses, eV (default %g)\n"
           "  --t-cmb X         CMB temperature, K (default %g)\n\n"
           "Computation:\n"
           "  --omega-k-min X   grid start (default %g)\n"
           "  --omega-k-max X   grid end (default %g)\n"
           "  --grid N          grid points (default %d)\n"
           "  --samples N       Monte Carlo samples of the priors (default %d)\n"
           "  --seed N          random seed, GSL mt19937 (default %lu)\n"
           "  --threads N       OpenMP threads (default: all; the result does not depend on it)\n\n"
           "Output:\n"
           "  --json FILE       write the result as JSON (written atomically; '-': standard\n"
           "                    output, the text summary then goes to standard error)\n"
           "  --quiet           print errors only (--json is still written)\n"
           "  --verbose         timings on stderr\n"
           "  --help            show this help\n\n"
           "Exit codes: 0 done, 2 usage, 3 invalid input (no peak in the table, bad priors),\n"
           "4 cannot read or write a file, 5 bad table format, 6 the peak is out of reach\n"
           "of every model on the grid, 8 out of memory.\n",
           o.omega_b.mean, o.omega_b.sigma, o.omega_c.mean, o.omega_c.sigma, o.h.mean, o.h.sigma,
           o.model_err, o.base.n_eff, o.base.m_nu, o.base.t_cmb, o.omega_k_min, o.omega_k_max,
           o.ngrid, o.nsamples, o.seed);
}

/* l_peak +- sigma from a band-power table: its recorded peak keywords, or a
 * fit with clef peak's defaults when it has none. */
static int peak_from_table(const char *path, double *l, double *err, int *fitted)
{
    clef_bandpowers *bp = NULL;
    int status = clef_bandpowers_read(&bp, path);
    if (status != CLEF_OK)
        return cli_fail(status);
    clef_peak_result r;
    *fitted = 0;
    if (clef_bandpowers_meta_get(bp, "PK_FOUND")) {
        status = clef_peak_from_meta(bp, &r);
    } else {
        clef_peak_opts po;
        clef_peak_opts_default(&po);
        status = clef_peak_find(bp, &po, &r);
        *fitted = 1;
    }
    clef_bandpowers_free(bp);
    if (status != CLEF_OK)
        return cli_fail(status);
    if (!r.found) {
        fprintf(stderr, "clef: error: %s: no first peak%s: %s\n", path,
                *fitted ? " found by the fit" : " recorded", r.reason);
        return CLI_EXIT_INVALID;
    }
    *l = r.l_peak;
    *err = r.l_peak_err;
    return CLI_EXIT_OK;
}

static cJSON *interval_json(cJSON *parent, const char *name, double best, double lo68,
                            double hi68, double lo95, double hi95)
{
    cJSON *j = cJSON_AddObjectToObject(parent, name);
    cJSON_AddNumberToObject(j, "best", best);
    cJSON_AddNumberToObject(j, "lo68", lo68);
    cJSON_AddNumberToObject(j, "hi68", hi68);
    cJSON_AddNumberToObject(j, "lo95", lo95);
    cJSON_AddNumberToObject(j, "hi95", hi95);
    return j;
}

static void prior_json(cJSON *parent, const char *name, const clef_geometry_prior *pr)
{
    cJSON *j = cJSON_AddObjectToObject(parent, name);
    cJSON_AddNumberToObject(j, "mean", pr->mean);
    cJSON_AddNumberToObject(j, "sigma", pr->sigma);
}

static cJSON *result_json(const clef_geometry_opts *o, const clef_geometry_result *r,
                          const char *table)
{
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "clef_version", CLEF_VERSION);
    if (table)
        cJSON_AddStringToObject(j, "table", table);
    else
        cJSON_AddNullToObject(j, "table");
    cJSON_AddNumberToObject(j, "l_peak", o->l_peak);
    cJSON_AddNumberToObject(j, "l_peak_err", o->l_peak_err);
    cJSON *ok = interval_json(j, "omega_k", r->best, r->lo68, r->hi68, r->lo95, r->hi95);
    cJSON_AddNumberToObject(ok, "mean", r->mean);
    cJSON_AddNumberToObject(ok, "sd", r->sd);
    interval_json(j, "omega_total", 1.0 - r->best, 1.0 - r->hi68, 1.0 - r->lo68, 1.0 - r->hi95,
                  1.0 - r->lo95);
    cJSON_AddStringToObject(j, "classification", clef_geometry_class_name(r->classification));
    cJSON_AddStringToObject(j, "classification_rule",
                            "closed if the 95% interval lies below 0, open if above, else flat");
    cJSON_AddNumberToObject(j, "acoustic_scale_deg", r->acoustic_scale_deg);
    cJSON_AddNumberToObject(j, "acoustic_scale_err_deg", r->acoustic_scale_err_deg);
    cJSON_AddNumberToObject(j, "theta_star_deg", r->theta_star_deg);
    cJSON_AddNumberToObject(j, "l1_flat_model", r->l1_flat);
    cJSON *pr = cJSON_AddObjectToObject(j, "priors");
    prior_json(pr, "omega_b", &o->omega_b);
    prior_json(pr, "omega_c", &o->omega_c);
    prior_json(pr, "h", &o->h);
    cJSON_AddNumberToObject(pr, "model_err_frac", o->model_err);
    cJSON_AddNumberToObject(pr, "n_eff", o->base.n_eff);
    cJSON_AddNumberToObject(pr, "m_nu_eV", o->base.m_nu);
    cJSON_AddNumberToObject(pr, "t_cmb_K", o->base.t_cmb);
    cJSON *g = cJSON_AddObjectToObject(j, "sampling");
    cJSON_AddNumberToObject(g, "omega_k_min", o->omega_k_min);
    cJSON_AddNumberToObject(g, "omega_k_max", o->omega_k_max);
    cJSON_AddNumberToObject(g, "grid_points", o->ngrid);
    cJSON_AddNumberToObject(g, "samples", o->nsamples);
    cJSON_AddNumberToObject(g, "samples_valid", r->nsamples_valid);
    cJSON_AddNumberToObject(g, "seed", (double)o->seed);
    cJSON_AddBoolToObject(j, "truncated", r->truncated);
    cJSON *curve = cJSON_AddObjectToObject(j, "curve");
    cJSON_AddItemToObject(curve, "omega_k", cJSON_CreateDoubleArray(r->omega_k, r->n));
    cJSON_AddItemToObject(curve, "posterior", cJSON_CreateDoubleArray(r->posterior, r->n));
    cJSON *c = cJSON_AddArrayToObject(j, "cautions");
    for (size_t i = 0; i < NCAUTIONS; i++)
        cJSON_AddItemToArray(c, cJSON_CreateString(cautions[i]));
    cJSON *w = cJSON_AddArrayToObject(j, "warnings");
    for (int i = 0; i < cli_nwarnings(); i++)
        cJSON_AddItemToArray(w, cJSON_CreateString(cli_warning(i)));
    return j;
}


static void print_result(const clef_geometry_opts *o, const clef_geometry_result *r,
                         const char *table, int fitted)
{
    printf("curvature from the first acoustic peak\n");
    if (table)
        printf("  l_peak          %.2f +- %.2f (%s %s)\n", o->l_peak, o->l_peak_err,
               fitted ? "fitted in" : "recorded in", table);
    else
        printf("  l_peak          %.2f +- %.2f\n", o->l_peak, o->l_peak_err);
    printf("  acoustic scale  %.4f +- %.4f deg (180 deg / l_peak); theta_* = %.4f deg\n",
           r->acoustic_scale_deg, r->acoustic_scale_err_deg, r->theta_star_deg);
    printf("  flat model      l_1 = %.2f at the prior means\n", r->l1_flat);
    printf("  Omega_k         %.4f   68%%: [%.4f, %.4f]   95%%: [%.4f, %.4f]\n", r->best, r->lo68,
           r->hi68, r->lo95, r->hi95);
    printf("  Omega_total     %.4f   68%%: [%.4f, %.4f]   95%%: [%.4f, %.4f]\n", 1 - r->best,
           1 - r->hi68, 1 - r->lo68, 1 - r->hi95, 1 - r->lo95);
    printf("  geometry        %s\n",
           r->classification == CLEF_GEOMETRY_CLOSED ? "closed (the 95% interval lies below Omega_k = 0)"
           : r->classification == CLEF_GEOMETRY_OPEN ? "open (the 95% interval lies above Omega_k = 0)"
                                                     : "flat within errors (the 95% interval contains Omega_k = 0)");
    printf("  priors          omega_b = %g +- %g, omega_c = %g +- %g, h = %g +- %g,\n"
           "                  model error %.2g%% of l_1; %d prior samples, seed %lu\n",
           o->omega_b.mean, o->omega_b.sigma, o->omega_c.mean, o->omega_c.sigma, o->h.mean,
           o->h.sigma, 100 * o->model_err, o->nsamples, o->seed);
    if (r->truncated)
        printf("  WARNING         the posterior is cut off by the grid [%g, %g]\n", o->omega_k_min,
               o->omega_k_max);
    printf("cautions:\n");
    for (size_t i = 0; i < NCAUTIONS; i++)
        printf("  - %s\n", cautions[i]);
}

int cmd_geometry(int argc, char **argv)
{
    enum { O_PEAK = 256, O_PEAKERR, O_OB, O_OBE, O_OC, O_OCE, O_H, O_HE, O_MERR, O_NEFF, O_MNU,
           O_TCMB, O_KMIN, O_KMAX, O_GRID, O_SAMPLES, O_SEED, O_THREADS, O_JSON };
    static const struct option longopts[] = {
        {"peak-l", required_argument, NULL, O_PEAK},
        {"peak-l-err", required_argument, NULL, O_PEAKERR},
        {"omega-b", required_argument, NULL, O_OB},
        {"omega-b-err", required_argument, NULL, O_OBE},
        {"omega-c", required_argument, NULL, O_OC},
        {"omega-c-err", required_argument, NULL, O_OCE},
        {"h", required_argument, NULL, O_H},
        {"h-err", required_argument, NULL, O_HE},
        {"model-err", required_argument, NULL, O_MERR},
        {"n-eff", required_argument, NULL, O_NEFF},
        {"m-nu", required_argument, NULL, O_MNU},
        {"t-cmb", required_argument, NULL, O_TCMB},
        {"omega-k-min", required_argument, NULL, O_KMIN},
        {"omega-k-max", required_argument, NULL, O_KMAX},
        {"grid", required_argument, NULL, O_GRID},
        {"samples", required_argument, NULL, O_SAMPLES},
        {"seed", required_argument, NULL, O_SEED},
        {"threads", required_argument, NULL, O_THREADS},
        {"json", required_argument, NULL, O_JSON},
        {"quiet", no_argument, NULL, 'q'},
        {"verbose", no_argument, NULL, 'v'},
        {"help", no_argument, NULL, 'H'},
        {NULL, 0, NULL, 0}};
    clef_geometry_opts o;
    clef_geometry_opts_default(&o);
    const char *json = NULL;
    int have_l = 0, have_err = 0, c, li = 0;
    long lv;
    char optname[64];
    optind = 1;
    opterr = 0;
    while ((c = getopt_long(argc, argv, "", longopts, &li)) != -1) {
        double *target = NULL;
        snprintf(optname, sizeof optname, "--%s", c >= O_PEAK ? longopts[li].name : "?");
        switch (c) {
        case O_PEAK: target = &o.l_peak; have_l = 1; break;
        case O_PEAKERR: target = &o.l_peak_err; have_err = 1; break;
        case O_OB: target = &o.omega_b.mean; break;
        case O_OBE: target = &o.omega_b.sigma; break;
        case O_OC: target = &o.omega_c.mean; break;
        case O_OCE: target = &o.omega_c.sigma; break;
        case O_H: target = &o.h.mean; break;
        case O_HE: target = &o.h.sigma; break;
        case O_MERR: target = &o.model_err; break;
        case O_NEFF: target = &o.base.n_eff; break;
        case O_MNU: target = &o.base.m_nu; break;
        case O_TCMB: target = &o.base.t_cmb; break;
        case O_KMIN: target = &o.omega_k_min; break;
        case O_KMAX: target = &o.omega_k_max; break;
        case O_GRID:
        case O_SAMPLES:
        case O_SEED:
            if (cli_parse_long("geometry", optname, optarg, &lv))
                return CLI_EXIT_USAGE;
            if (lv < 0 || lv > 2147483647L)
                return cli_usage_error("geometry", "%s out of range: %ld", optname, lv);
            if (c == O_GRID)
                o.ngrid = (int)lv;
            else if (c == O_SAMPLES)
                o.nsamples = (int)lv;
            else
                o.seed = (unsigned long)lv;
            break;
        case O_THREADS:
            if (cli_set_threads("geometry", optarg))
                return CLI_EXIT_USAGE;
            break;
        case O_JSON: json = optarg; break;
        case 'q': cli_verbosity = 0; break;
        case 'v': cli_verbosity = 2; break;
        case 'H': help(); return CLI_EXIT_OK;
        default:
            return cli_usage_error("geometry", "unknown option or missing value: '%s'",
                                   argv[optind - 1]);
        }
        if (target && cli_parse_double("geometry", optname, optarg, target))
            return CLI_EXIT_USAGE;
    }
    const char *table = optind < argc ? argv[optind] : NULL;
    if (optind + 1 < argc)
        return cli_usage_error("geometry", "unexpected argument '%s'", argv[optind + 1]);
    if (table && (have_l || have_err))
        return cli_usage_error("geometry", "give either TABLE or --peak-l/--peak-l-err, not both");
    if (!table && !(have_l && have_err))
        return cli_usage_error("geometry", "need --peak-l and --peak-l-err, or a band-power TABLE");
    cli_setup_logging();
    const char *inputs[1] = {table}, *outputs[1] = {json};
    const int rc_out = cli_check_outputs(inputs, 1, outputs, 1);
    if (rc_out != CLI_EXIT_OK)
        return rc_out;

    int fitted = 0;
    if (table) {
        const int rc = peak_from_table(table, &o.l_peak, &o.l_peak_err, &fitted);
        if (rc != CLI_EXIT_OK)
            return rc;
        cli_verbose("%s: l_peak = %g +- %g (%s)", table, o.l_peak, o.l_peak_err,
                    fitted ? "fitted" : "from its peak keywords");
    }
    const double t0 = clef_wtime();
    clef_geometry_result *r;
    const int status = clef_geometry_infer(&o, &r);
    if (status != CLEF_OK)
        return cli_fail(status);
    cli_verbose("curvature posterior: %.2f s", clef_wtime() - t0);
    int rc = CLI_EXIT_OK;
    if (json) {
        cJSON *j = result_json(&o, r, table);
        rc = j ? cli_write_json(json, j) : CLI_EXIT_NOMEM;
        cJSON_Delete(j);
    }
    if (rc == CLI_EXIT_OK && cli_verbosity >= 1) {
        cli_text_begin();
        print_result(&o, r, table, fitted);
        cli_text_end();
    }
    clef_geometry_result_free(r);
    return rc;
}
