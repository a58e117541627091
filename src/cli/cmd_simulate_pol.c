/* clef simulate --polarization: a T, Q, U sky from TT, EE, BB, TE spectra
 * (clef_sim_alm_pol), smoothed by the beam and the pixel window, with
 * white noise in T and in Q and U (sqrt(2) times the temperature depth by
 * default: the same detectors split between two polarization states), in
 * one FITS table TEMPERATURE / Q_POLARISATION / U_POLARISATION with
 * POLCCONV = 'COSMO' (docs/simulation.md, "Polarization"). */
#define _POSIX_C_SOURCE 200809L
#include <complex.h>
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clef/beam.h"
#include "clef/map.h"
#include "clef/sht.h"
#include "clef/sim.h"
#include "clef/theory.h"
#include "cli.h"

static const char *CMD = "simulate";

static void help(void)
{
    printf("Usage: clef simulate --polarization --nside N --cl FILE --output MAP [options]\n\n"
           "A Gaussian T, Q, U sky drawn from the spectra TT, EE, BB, TE of FILE (text,\n"
           "'#' comments, rows 'l TT EE BB TE' in uK^2 as C_l; docs/formats-spectrum.md),\n"
           "T and E correlated through TE, written as one HEALPix table (columns\n"
           "TEMPERATURE, Q_POLARISATION, U_POLARISATION, POLCCONV = COSMO).\n\n"
           "  --nside N              resolution (power of two)\n"
           "  --lmax L               highest multipole drawn (default 3*nside-1)\n"
           "  --cl FILE              the four spectra (required)\n"
           "  --seed S               random seed (default 1; T uses the temperature stream)\n"
           "  --beam-fwhm ARCMIN     Gaussian beam (default none)\n"
           "  --no-pixel-window      do not smooth by the pixel window (default: smoothed)\n"
           "  --noise-depth D        white noise in T, uK-arcmin (default 0)\n"
           "  --pol-noise-depth D    white noise in Q and U each, uK-arcmin (default\n"
           "                         sqrt(2) times --noise-depth)\n"
           "  -o, --output MAP       output file (.fits, .fits.gz)\n"
           "  --float32              single-precision columns\n"
           "  --coordsys G|E|C       COORDSYS keyword\n"
           "  --threads N, --quiet, --verbose, --help\n\n"
           "Exit codes: 0 ok, 2 usage, 3 invalid input (e.g. TE^2 > TT EE), 4 I/O,\n"
           "5 bad spectrum file, 8 out of memory.\n");
}

enum {
    P_POL = 256, P_NSIDE, P_LMAX, P_CL, P_SEED, P_FWHM, P_NOPIX, P_DEPTH, P_PDEPTH, P_F32, P_COORD,
    P_THREADS, P_QUIET, P_VERBOSE, P_HELP
};

typedef struct spargs {
    long nside, lmax;
    unsigned long long seed;
    const char *cl, *output, *coordsys, *threads;
    double fwhm, depth, pdepth;
    int no_pix, f32, pdepth_given;
} spargs;

static int parse(int argc, char **argv, spargs *a)
{
    static const struct option opts[] = {
        {"polarization", no_argument, 0, P_POL}, {"nside", required_argument, 0, P_NSIDE},
        {"lmax", required_argument, 0, P_LMAX}, {"cl", required_argument, 0, P_CL},
        {"seed", required_argument, 0, P_SEED}, {"beam-fwhm", required_argument, 0, P_FWHM},
        {"no-pixel-window", no_argument, 0, P_NOPIX},
        {"noise-depth", required_argument, 0, P_DEPTH},
        {"pol-noise-depth", required_argument, 0, P_PDEPTH},
        {"output", required_argument, 0, 'o'}, {"float32", no_argument, 0, P_F32},
        {"coordsys", required_argument, 0, P_COORD}, {"threads", required_argument, 0, P_THREADS},
        {"quiet", no_argument, 0, P_QUIET}, {"verbose", no_argument, 0, P_VERBOSE},
        {"help", no_argument, 0, P_HELP}, {0, 0, 0, 0}};
    memset(a, 0, sizeof *a);
    a->seed = 1;
    int c;
    long v;
    optind = 1;
    opterr = 0;
    while ((c = getopt_long(argc, argv, "o:", opts, NULL)) != -1) {
        switch (c) {
        case P_POL: break;
        case P_NSIDE:
            if (cli_parse_long(CMD, "--nside", optarg, &a->nside))
                return CLI_EXIT_USAGE;
            break;
        case P_LMAX:
            if (cli_parse_long(CMD, "--lmax", optarg, &a->lmax))
                return CLI_EXIT_USAGE;
            break;
        case P_CL: a->cl = optarg; break;
        case P_SEED:
            if (cli_parse_long(CMD, "--seed", optarg, &v) || v < 0)
                return cli_usage_error(CMD, "--seed: '%s' (a non-negative integer)", optarg);
            a->seed = (unsigned long long)v;
            break;
        case P_FWHM:
            if (cli_parse_double(CMD, "--beam-fwhm", optarg, &a->fwhm) || a->fwhm < 0)
                return cli_usage_error(CMD, "--beam-fwhm: '%s' (arcmin, >= 0)", optarg);
            break;
        case P_NOPIX: a->no_pix = 1; break;
        case P_DEPTH:
            if (cli_parse_double(CMD, "--noise-depth", optarg, &a->depth) || a->depth < 0)
                return cli_usage_error(CMD, "--noise-depth: '%s' (uK-arcmin, >= 0)", optarg);
            break;
        case P_PDEPTH:
            if (cli_parse_double(CMD, "--pol-noise-depth", optarg, &a->pdepth) || a->pdepth < 0)
                return cli_usage_error(CMD, "--pol-noise-depth: '%s' (uK-arcmin, >= 0)", optarg);
            a->pdepth_given = 1;
            break;
        case 'o': a->output = optarg; break;
        case P_F32: a->f32 = 1; break;
        case P_COORD:
            if (strcmp(optarg, "G") && strcmp(optarg, "E") && strcmp(optarg, "C"))
                return cli_usage_error(CMD, "--coordsys: '%s' (G, E or C)", optarg);
            a->coordsys = optarg;
            break;
        case P_THREADS: a->threads = optarg; break;
        case P_QUIET: cli_verbosity = 0; break;
        case P_VERBOSE: cli_verbosity = 2; break;
        case P_HELP: help(); return -1;
        default:
            return cli_usage_error(CMD, "unknown option or missing value: '%s' (with "
                                   "--polarization: see clef simulate --polarization --help)",
                                   argv[optind - 1]);
        }
    }
    if (optind < argc)
        return cli_usage_error(CMD, "unexpected argument '%s'", argv[optind]);
    if (!clef_nside_valid(a->nside))
        return cli_usage_error(CMD, "--nside: %ld is not a power of two in 1..%d", a->nside,
                               CLEF_NSIDE_MAX);
    if (!a->lmax)
        a->lmax = 3 * a->nside - 1;
    if (a->lmax < 2 || a->lmax > 3 * a->nside - 1)
        return cli_usage_error(CMD, "--lmax: %ld outside 2..3*nside-1", a->lmax);
    if (!a->cl)
        return cli_usage_error(CMD, "--cl FILE (columns l TT EE BB TE) is required");
    if (!a->output)
        return cli_usage_error(CMD, "--output is required");
    if (!a->pdepth_given)
        a->pdepth = sqrt(2.0) * a->depth;
    if (a->threads && cli_set_threads(CMD, a->threads))
        return CLI_EXIT_USAGE;
    return 0;
}

int cmd_simulate_pol(int argc, char **argv)
{
    spargs a;
    int rc = parse(argc, argv, &a);
    if (rc)
        return rc < 0 ? CLI_EXIT_OK : rc;
    cli_setup_logging();
    const char *inputs[1] = {a.cl}, *outputs[1] = {a.output};
    if ((rc = cli_check_outputs(inputs, 1, outputs, 1)) != CLI_EXIT_OK)
        return rc;
    cli_watch_input(a.cl);
    const int lmax = (int)a.lmax;
    const int64_t ns = a.nside;
    const size_t n = (size_t)lmax + 1, na = clef_alm_size(lmax, lmax);
    double *cl = malloc(4 * n * sizeof *cl), *bl = malloc(n * sizeof *bl),
           *pl = malloc(n * sizeof *pl);
    double complex *at = malloc(na * sizeof *at), *ae = malloc(na * sizeof *ae),
                   *ab = malloc(na * sizeof *ab);
    clef_map *m[3] = {NULL, NULL, NULL};
    clef_sht *p0 = NULL;
    clef_sht_spin *p2 = NULL;
    int status = CLEF_OK;
    if (!cl || !bl || !pl || !at || !ae || !ab) {
        status = CLEF_ENOMEM;
        fprintf(stderr, "clef: error: out of memory for lmax %d\n", lmax);
        rc = CLI_EXIT_NOMEM;
        goto done;
    }
    double *tt = cl, *ee = cl + n, *bb = cl + 2 * n, *te = cl + 3 * n;
#define STEP(call)                                                                           \
    do {                                                                                     \
        if ((status = (call)) != CLEF_OK) {                                                  \
            rc = cli_fail(status);                                                           \
            goto done;                                                                       \
        }                                                                                    \
    } while (0)
    STEP(clef_theory_read_cl_pol(a.cl, lmax, tt, ee, bb, te));
    STEP(clef_sim_alm_pol(lmax, tt, ee, bb, te, a.seed, at, ae, ab));
    STEP(clef_beam_gaussian(a.fwhm, lmax, bl));
    if (!a.no_pix)
        STEP(clef_beam_pixel_window(ns, lmax, pl));
    /* The temperature pixel window for Q and U too (docs/simulation.md). */
    clef_sim_alm_scale(lmax, bl, a.no_pix ? NULL : pl, at);
    clef_sim_alm_scale(lmax, bl, a.no_pix ? NULL : pl, ae);
    clef_sim_alm_scale(lmax, bl, a.no_pix ? NULL : pl, ab);
    for (int k = 0; k < 3; k++) {
        STEP(clef_map_alloc(&m[k], ns));
        snprintf(m[k]->unit, sizeof m[k]->unit, "uK");
        if (a.coordsys)
            snprintf(m[k]->coordsys, sizeof m[k]->coordsys, "%s", a.coordsys);
    }
    STEP(clef_sht_create(&p0, ns, lmax, NULL));
    STEP(clef_sht_synthesis(p0, 1, (const double complex *const *)&at, &m[0]->pix));
    STEP(clef_sht_spin_create(&p2, ns, lmax, NULL));
    STEP(clef_sht_spin_synthesis(p2, 1, (const double complex *const *)&ae,
                                 (const double complex *const *)&ab, &m[1]->pix, &m[2]->pix));
    if (a.depth > 0)
        STEP(clef_sim_noise(ns, a.depth, NULL, a.seed, CLEF_SIM_STREAM_NOISE1, m[0]->pix, NULL));
    if (a.pdepth > 0) {
        STEP(clef_sim_noise(ns, a.pdepth, NULL, a.seed, CLEF_SIM_STREAM_NOISE_Q, m[1]->pix, NULL));
        STEP(clef_sim_noise(ns, a.pdepth, NULL, a.seed, CLEF_SIM_STREAM_NOISE_U, m[2]->pix, NULL));
    }
    if ((rc = cli_check_inputs()) != CLI_EXIT_OK)
        goto done;
    char history[256];
    snprintf(history, sizeof history, "clef simulate --polarization --nside %lld --lmax %d "
             "--seed %llu", (long long)ns, lmax, a.seed);
    clef_map_write_opts wo = {.single_precision = a.f32, .history = history};
    STEP(clef_map_write_pol(m[0], m[1], m[2], a.output, &wo));
    cli_info("wrote %s (T, Q, U; nside %lld, lmax %d, seed %llu)", a.output, (long long)ns, lmax,
             a.seed);
    rc = CLI_EXIT_OK;
done:
    free(cl);
    free(bl);
    free(pl);
    free(at);
    free(ae);
    free(ab);
    for (int k = 0; k < 3; k++)
        clef_map_free(m[k]);
    clef_sht_destroy(p0);
    clef_sht_spin_destroy(p2);
    return rc;
}
