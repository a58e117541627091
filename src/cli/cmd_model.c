/* clef model: the analytic CMB temperature spectrum for given cosmological
 * parameters (docs/theory.md), written as a text or FITS table, and the
 * model's acoustic scales and first peak. */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/theory.h"
#include "cli.h"

#define DEFAULT_LMAX 2500

static void help(void)
{
    clef_cosmo_params p;
    clef_cosmo_params_planck2018(&p);
    printf("Usage: clef model [OPTIONS]\n\n"
           "Compute the analytic CMB temperature power spectrum of docs/theory.md (Mukhanov's\n"
           "closed-form approximation with a Sachs-Wolfe plateau; no ISW, lensing or\n"
           "reionisation bump) for the given parameters, print its acoustic scales and\n"
           "first peak, and optionally write C_l and D_l. Defaults: Planck 2018 best fit\n"
           "(Planck 2018 VI, A&A 641, A6, TT,TE,EE+lowE+lensing).\n\n"
           "Parameters:\n"
           "  --omega-b X     baryon density Omega_b h^2 (default %g)\n"
           "  --omega-c X     cold dark matter density Omega_c h^2 (default %g)\n"
           "  --h X           Hubble constant H_0 / (100 km/s/Mpc) (default %g)\n"
           "  --omega-k X     curvature Omega_k, > 0 open, < 0 closed (default %g)\n"
           "  --n-s X         scalar spectral index (default %g)\n"
           "  --ln10as X      ln(10^10 A_s), amplitude at k = 0.05/Mpc (default %g)\n"
           "  --tau X         reionisation optical depth (default %g)\n"
           "  --t-cmb X       CMB temperature, K (default %g)\n"
           "  --n-eff X       massless neutrino species (default %g)\n"
           "  --m-nu X        sum of neutrino masses, eV, counted as matter (default %g)\n"
           "  --y-he X        helium mass fraction (default %g)\n\n"
           "Output:\n"
           "  --lmax L        highest multipole written (default %d)\n"
           "  --output FILE   write l, C_l, D_l in uK^2: a FITS binary table if FILE ends\n"
           "                  in .fits or .fit, else text (docs/formats-spectrum.md);\n"
           "                  written atomically; '-': text on standard output, the\n"
           "                  summary then on standard error (default: no file, summary\n"
           "                  only).  Both layouts are read back by --cl, --covariance-model and plot --model-curve.\n"
           "  --quiet         print errors only (--output is still written)\n"
           "  --verbose       also print the model's internal scales\n"
           "  --help          show this help\n\n"
           "Exit codes: 0 done, 2 usage, 3 unphysical parameters, 4 cannot write the file,\n"
           "6 numerical failure, 8 out of memory.\n",
           p.omega_b, p.omega_c, p.h, p.omega_k, p.n_s, p.ln10_as, p.tau, p.t_cmb, p.n_eff,
           p.m_nu, p.y_he, DEFAULT_LMAX);
}

static void print_summary(const clef_cosmo_params *p, const clef_theory_info *in, double lpk,
                          double dpk)
{
    const clef_cosmo_acoustic *a = &in->acoustic;
    printf("analytic CMB temperature spectrum (docs/theory.md)\n");
    printf("  parameters        omega_b = %g, omega_c = %g, h = %g, Omega_k = %g,\n"
           "                    n_s = %g, ln(10^10 A_s) = %g, tau = %g\n",
           p->omega_b, p->omega_c, p->h, p->omega_k, p->n_s, p->ln10_as, p->tau);
    printf("  last scattering   z_* = %.2f (Hu & Sugiyama 1996 fit)\n", a->z_star);
    printf("  sound horizon     r_s = %.2f Mpc\n", a->r_s);
    printf("  distance          D_M(z_*) = %.1f Mpc\n", a->d_m);
    printf("  acoustic scale    100 theta_* = %.5f (%.4f deg), l_A = %.2f\n", 100 * a->theta_star,
           a->theta_star * 180.0 / M_PI, a->l_a);
    printf("  first peak        l_1 = %.2f (Doran & Lilley 2002, phi_1 = %.4f)\n", a->l_1, a->phi_1);
    printf("  model peak        l = %.2f, D_l = %.1f uK^2 (180/l = %.3f deg)\n", lpk, dpk,
           180.0 / lpk);
}

static void print_verbose(const clef_theory_info *in)
{
    fprintf(stderr,
            "clef: baryon loading R_* = %.4f, rho_r/rho_m at z_* = %.4f\n"
            "clef: damping multipoles l_f = %.1f, l_S = %.1f (Silk k_D = %.4f /Mpc)\n"
            "clef: oscillation scale %.6f (r_s/D_M %.6f, ratio %.4f)\n"
            "clef: A_s T^2 = %.1f uK^2, pivot multipole %.1f\n",
            in->xi, in->acoustic.r_star, in->l_f, in->l_s, in->k_damp, in->varrho_eff, in->varrho,
            in->varrho_eff / in->varrho, in->amplitude, in->l_pivot);
}

int cmd_model(int argc, char **argv)
{
    static const struct option longopts[] = {
        {"omega-b", required_argument, NULL, 'b'}, {"omega-c", required_argument, NULL, 'c'},
        {"h", required_argument, NULL, 'H'},       {"omega-k", required_argument, NULL, 'k'},
        {"n-s", required_argument, NULL, 'n'},     {"ln10as", required_argument, NULL, 'a'},
        {"tau", required_argument, NULL, 't'},     {"t-cmb", required_argument, NULL, 'T'},
        {"n-eff", required_argument, NULL, 'N'},   {"m-nu", required_argument, NULL, 'm'},
        {"y-he", required_argument, NULL, 'y'},    {"lmax", required_argument, NULL, 'l'},
        {"output", required_argument, NULL, 'o'},  {"quiet", no_argument, NULL, 'q'},
        {"verbose", no_argument, NULL, 'v'},       {"help", no_argument, NULL, 'h'},
        {NULL, 0, NULL, 0}};
    clef_cosmo_params p;
    clef_cosmo_params_planck2018(&p);
    long lmax = DEFAULT_LMAX;
    const char *output = NULL;
    int c;
    optind = 1;
    opterr = 0;
    while ((c = getopt_long(argc, argv, "", longopts, NULL)) != -1) {
        double *target = NULL;
        const char *name = NULL;
        switch (c) {
        case 'b': target = &p.omega_b; name = "--omega-b"; break;
        case 'c': target = &p.omega_c; name = "--omega-c"; break;
        case 'H': target = &p.h; name = "--h"; break;
        case 'k': target = &p.omega_k; name = "--omega-k"; break;
        case 'n': target = &p.n_s; name = "--n-s"; break;
        case 'a': target = &p.ln10_as; name = "--ln10as"; break;
        case 't': target = &p.tau; name = "--tau"; break;
        case 'T': target = &p.t_cmb; name = "--t-cmb"; break;
        case 'N': target = &p.n_eff; name = "--n-eff"; break;
        case 'm': target = &p.m_nu; name = "--m-nu"; break;
        case 'y': target = &p.y_he; name = "--y-he"; break;
        case 'l':
            if (cli_parse_long("model", "--lmax", optarg, &lmax))
                return CLI_EXIT_USAGE;
            break;
        case 'o': output = optarg; break;
        case 'q': cli_verbosity = 0; break;
        case 'v': cli_verbosity = 2; break;
        case 'h': help(); return CLI_EXIT_OK;
        default:
            return cli_usage_error("model", "unknown option or missing value: '%s'",
                                   argv[optind - 1]);
        }
        if (target && cli_parse_double("model", name, optarg, target))
            return CLI_EXIT_USAGE;
    }
    if (optind < argc)
        return cli_usage_error("model", "unexpected argument '%s'", argv[optind]);
    if (lmax < 2 || lmax > CLEF_THEORY_LMAX_MAX)
        return cli_usage_error("model", "--lmax must be between 2 and %d, got %ld",
                               CLEF_THEORY_LMAX_MAX, lmax);
    cli_setup_logging();
    const char *outputs[1] = {output};
    const int rc_out = cli_check_outputs(NULL, 0, outputs, 1);
    if (rc_out != CLI_EXIT_OK)
        return rc_out;

    clef_theory_info in;
    int status = clef_theory_info_get(&p, &in);
    if (status != CLEF_OK)
        return cli_fail(status);
    double lpk, dpk;
    status = clef_theory_first_peak(&p, &lpk, &dpk);
    if (status != CLEF_OK)
        return cli_fail(status);
    if (output) {
        double *cl = malloc(((size_t)lmax + 1) * sizeof *cl);
        if (!cl) {
            fprintf(stderr, "clef: error: out of memory for lmax = %ld\n", lmax);
            return CLI_EXIT_NOMEM;
        }
        status = clef_theory_cl(&p, (int)lmax, cl);
        if (status == CLEF_OK)
            status = clef_theory_write_cl(output, (int)lmax, cl, &p);
        free(cl);
        if (status != CLEF_OK)
            return cli_fail(status);
    }
    if (cli_verbosity >= 1) {
        cli_text_begin();
        print_summary(&p, &in, lpk, dpk);
        if (output)
            printf("  written           %s (l = 0..%ld; columns l, C_l, D_l in uK^2)\n",
                   cli_is_stdout(output) ? "to standard output" : output, lmax);
        cli_text_end();
    }
    if (cli_verbosity >= 2)
        print_verbose(&in);
    return CLI_EXIT_OK;
}
