/* clef simulate: a Gaussian sky from a spectrum (a file or the analytic
 * model), with beam, pixel window and noise, written as HEALPix map(s) and
 * optionally its a_lm.  Every output is written to a temporary file first
 * and all are renamed at the end, so a failure leaves no output. */
#define _GNU_SOURCE
#include <errno.h>
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <unistd.h>

#include <fitsio.h>

#include "clef/beam.h"
#include "clef/map.h"
#include "clef/sht.h"
#include "clef/sim.h"
#include "clef/theory.h"
#include "cli.h"

#define CMD "simulate"

static void help(FILE *f)
{
    fprintf(f,
            "Usage: clef simulate --nside N (--cl FILE | --model) --output FILE [OPTIONS]\n\n"
            "Draw a Gaussian sky with the given angular power spectrum, smooth it by the\n"
            "pixel window (as a real map has it) and a beam if asked, add pixel noise if\n"
            "asked, and write it as a\n"
            "HEALPix map (RING, full sky).  The same seed gives the same map whatever the\n"
            "number of threads.  Random numbers, beam, pixel window and noise model are\n"
            "described in docs/simulation.md.\n"
            "With --polarization: T, Q, U from TT, EE, BB, TE (clef simulate --polarization\n"
            "--help).\n\n"
            "Spectrum (one of):\n"
            "  --cl FILE            C_l or D_l text file in uK^2 (docs/formats-spectrum.md)\n"
            "  --model              the analytic model (docs/theory.md); its parameters\n"
            "                       default to the Planck 2018 best fit; change them with:\n"
            "    --omega-b X        Omega_b h^2 (default 0.02237)\n"
            "    --omega-c X        Omega_c h^2 (default 0.1200)\n"
            "    --hubble X         h = H_0 / (100 km/s/Mpc) (default 0.6736)\n"
            "    --omega-k X        curvature Omega_k (default 0, flat)\n"
            "    --n-s X            scalar spectral index (default 0.9649)\n\n"
            "Sky:\n"
            "  --nside N            HEALPix resolution, a power of two (required)\n"
            "  --lmax L             largest multipole simulated (default 3 nside - 1; at most\n"
            "                       4 nside)\n"
            "  --seed S             random seed, an integer in [0, 2^64) (default 1)\n"
            "  --beam-fwhm ARCMIN   Gaussian beam full width at half maximum, arcmin\n"
            "                       (default: no beam)\n"
            "  --beam-table FILE    beam B_l from a text file of rows 'l B_l'\n"
            "                       (docs/formats-spectrum.md, \"beam tables\")\n"
            "  --no-pixel-window    leave out the pixel window of nside (default: the sky\n"
            "                       is multiplied by it, as clef spectrum assumes)\n\n"
            "Noise (white, not smoothed by beam or pixel window):\n"
            "  --noise-depth UK_ARCMIN  noise level of each map in uK-arcmin; the pixel\n"
            "                       standard deviation is\n"
            "                       depth / sqrt(pixel area in arcmin^2)\n"
            "                       (default 0: no noise)\n"
            "  --hits FILE          hit-count map of the same nside: pixel noise scales as\n"
            "                       1/sqrt(hits / mean hits), pixels without hits are written\n"
            "                       as missing (needs --noise-depth)\n"
            "  --ordering RING|NESTED  pixel order of a hit map without ORDERING keyword\n"
            "  --splits N           1 (default) or 2 maps with the same sky and independent\n"
            "                       noise, each of the given depth; written as OUTPUT with\n"
            "                       '_split1' and '_split2' inserted before the extension\n\n"
            "Output:\n"
            "  --output FILE        FITS map; a name ending in .gz is written gzip-compressed\n"
            "                       ('-': standard output, one split only) (required)\n"
            "  --float32            write 32-bit floats (default 64-bit)\n"
            "  --coordsys G|E|C     coordinate system recorded in the header (default: that\n"
            "                       of the hit map, else none)\n"
            "  --alm-output FILE    also write the sky a_lm before beam and pixel window\n"
            "                       (FITS table, docs/formats.md)\n"
            "  --threads N          OpenMP threads (default: all)\n"
            "  --quiet              print errors only (files are still written)\n"
            "  --verbose            report the steps\n"
            "  --help               show this help\n\n"
            "Exit codes: 0 ok, 2 usage, 3 invalid input value, 4 cannot read or write a file,\n"
            "5 malformed input file, 8 out of memory.  On any error nothing is written; an\n"
            "output that is an input file is refused (exit 3).\n"
            "Example: clef simulate --nside 256 --model --seed 7 --beam-fwhm 10 \\\n"
            "           --noise-depth 30 --splits 2 --output sky.fits.gz\n");
}

/* OUTPUT with "_splitN" before .fits/.fit/.fits.gz/.fit.gz (else appended). */
static void split_name(const char *out, int split, char *buf, size_t n)
{
    static const char *exts[] = {".fits.gz", ".fit.gz", ".fits", ".fit", ".gz"};
    const size_t len = strlen(out);
    for (size_t i = 0; i < sizeof exts / sizeof *exts; i++) {
        const size_t el = strlen(exts[i]);
        if (len > el && !strcasecmp(out + len - el, exts[i])) {
            snprintf(buf, n, "%.*s_split%d%s", (int)(len - el), out, split, out + len - el);
            return;
        }
    }
    snprintf(buf, n, "%s_split%d", out, split);
}

static int ends_with_gz(const char *s)
{
    const size_t n = strlen(s);
    return n > 3 && !strcasecmp(s + n - 3, ".gz");
}

/* Rewrite the FITS file `path` gzip-compressed in place (for the a_lm
 * table; maps are compressed by clef_map_write).  CFITSIO compresses a new
 * file whose name ends in .gz when it is closed, but only if ".gz" occurs
 * nowhere else in the name, so the compressed copy goes to a temporary
 * ".clef-gzip-XXXXXX.gz" in the same folder; the result is checked for the
 * gzip magic bytes. */
static int gzip_fits(const char *path)
{
    char gz[4200], name[4300];
    if (clef_temp_make(gz, sizeof gz, path, NULL, ".gz") != CLEF_OK) {
        fprintf(stderr, "clef: error: %s\n", clef_last_error());
        return CLEF_EIO;
    }
    snprintf(name, sizeof name, "!%s", gz);
    fitsfile *in = NULL, *out = NULL;
    int st = 0, st2 = 0, st3 = 0;
    fits_open_file(&in, path, READONLY, &st);
    if (!st)
        fits_create_file(&out, name, &st);
    if (!st)
        fits_copy_file(in, out, 1, 1, 1, &st);
    if (out)
        fits_close_file(out, &st2);
    if (in)
        fits_close_file(in, &st3);
    unsigned char magic[2] = {0, 0};
    FILE *f = fopen(gz, "rb");
    if (f) {
        if (fread(magic, 1, 2, f) != 2)
            magic[0] = 0;
        fclose(f);
    }
    const int compressed = magic[0] == 0x1f && magic[1] == 0x8b;
    if (st || st2 || !compressed || rename(gz, path) != 0) {
        char msg[FLEN_STATUS] = "the output is not gzip data";
        if (st || st2)
            fits_get_errstatus(st ? st : st2, msg);
        unlink(gz);
        clef_temp_forget(gz);
        fprintf(stderr, "clef: error: cannot gzip-compress '%s': %s\n", path, msg);
        return CLEF_EIO;
    }
    clef_temp_forget(gz);
    return CLEF_OK;
}

typedef struct sim_args {
    long nside, lmax, splits;
    unsigned long long seed;
    const char *cl_file, *beam_file, *hits_file, *output, *alm_output, *coordsys, *ordering;
    int model, no_pixel_window, float32;
    double beam_fwhm, noise_depth;
    double param[5];      /* omega_b, omega_c, h, omega_k, n_s as given */
    unsigned params_given; /* bit i: param[i] was given */
} sim_args;

static int parse_args(int argc, char **argv, sim_args *a)
{
    static const struct option longopts[] = {
        {"nside", required_argument, NULL, 'n'},      {"lmax", required_argument, NULL, 'l'},
        {"cl", required_argument, NULL, 'c'},         {"model", no_argument, NULL, 'm'},
        {"omega-b", required_argument, NULL, 'B'},    {"omega-c", required_argument, NULL, 'C'},
        {"hubble", required_argument, NULL, 'H'},     {"omega-k", required_argument, NULL, 'K'},
        {"n-s", required_argument, NULL, 'N'},        {"seed", required_argument, NULL, 's'},
        {"beam-fwhm", required_argument, NULL, 'f'},  {"beam-table", required_argument, NULL, 'b'},
        {"no-pixel-window", no_argument, NULL, 'p'},     {"noise-depth", required_argument, NULL, 'd'},
        {"hits", required_argument, NULL, 'h' + 256}, {"splits", required_argument, NULL, 'S'},
        {"output", required_argument, NULL, 'o'},     {"float32", no_argument, NULL, '4'},
        {"coordsys", required_argument, NULL, 'x'},   {"alm-output", required_argument, NULL, 'a'},
        {"threads", required_argument, NULL, 't'},    {"quiet", no_argument, NULL, 'q'},
        {"verbose", no_argument, NULL, 'v'},          {"help", no_argument, NULL, 'h'},
        {"ordering", required_argument, NULL, 'O'},   {NULL, 0, NULL, 0},
    };
    int c;
    double v;
    opterr = 0;
    optind = 1;
    while ((c = getopt_long(argc, argv, "", longopts, NULL)) != -1) {
        switch (c) {
        case 'n':
            if (cli_parse_long(CMD, "--nside", optarg, &a->nside))
                return CLI_EXIT_USAGE;
            break;
        case 'l':
            if (cli_parse_long(CMD, "--lmax", optarg, &a->lmax))
                return CLI_EXIT_USAGE;
            break;
        case 'c': a->cl_file = optarg; break;
        case 'm': a->model = 1; break;
        case 'B': case 'C': case 'H': case 'K': case 'N': {
            static const char keys[] = "BCHKN";
            static const char *names[] = {"--omega-b", "--omega-c", "--hubble", "--omega-k", "--n-s"};
            const int i = (int)(strchr(keys, c) - keys);
            if (cli_parse_double(CMD, names[i], optarg, &v))
                return CLI_EXIT_USAGE;
            a->param[i] = v;
            a->params_given |= 1u << i;
            break;
        }
        case 's': {
            char *end;
            if (optarg[0] == '-' || !*optarg)
                return cli_usage_error(CMD, "--seed expects an integer >= 0, got '%s'", optarg);
            errno = 0;
            a->seed = strtoull(optarg, &end, 10);
            if (errno || *end)
                return cli_usage_error(CMD, "--seed expects an integer in [0, 2^64), got '%s'",
                                       optarg);
            break;
        }
        case 'f':
            if (cli_parse_double(CMD, "--beam-fwhm", optarg, &a->beam_fwhm))
                return CLI_EXIT_USAGE;
            if (a->beam_fwhm < 0)
                return cli_usage_error(CMD, "--beam-fwhm must be >= 0 arcmin, got %g", a->beam_fwhm);
            break;
        case 'b': a->beam_file = optarg; break;
        case 'p': a->no_pixel_window = 1; break;
        case 'O': a->ordering = optarg; break;
        case 'd':
            if (cli_parse_double(CMD, "--noise-depth", optarg, &a->noise_depth))
                return CLI_EXIT_USAGE;
            if (a->noise_depth < 0)
                return cli_usage_error(CMD, "--noise-depth must be >= 0 uK-arcmin, got %g",
                                       a->noise_depth);
            break;
        case 'h' + 256: a->hits_file = optarg; break;
        case 'S':
            if (cli_parse_long(CMD, "--splits", optarg, &a->splits))
                return CLI_EXIT_USAGE;
            if (a->splits != 1 && a->splits != 2)
                return cli_usage_error(CMD, "--splits must be 1 or 2, got %ld", a->splits);
            break;
        case 'o': a->output = optarg; break;
        case '4': a->float32 = 1; break;
        case 'x':
            if (strcmp(optarg, "G") && strcmp(optarg, "E") && strcmp(optarg, "C"))
                return cli_usage_error(CMD, "--coordsys expects G, E or C, got '%s'", optarg);
            a->coordsys = optarg;
            break;
        case 'a': a->alm_output = optarg; break;
        case 't':
            if (cli_set_threads(CMD, optarg))
                return CLI_EXIT_USAGE;
            break;
        case 'q': cli_verbosity = 0; break;
        case 'v': cli_verbosity = 2; break;
        case 'h': help(stdout); return -1;
        default:
            return cli_usage_error(CMD, "unknown option or missing value: '%s'", argv[optind - 1]);
        }
    }
    if (optind != argc)
        return cli_usage_error(CMD, "unexpected argument '%s'", argv[optind]);
    if (a->nside == 0)
        return cli_usage_error(CMD, "--nside is required");
    if (a->nside < 1 || a->nside > CLEF_NSIDE_MAX || (a->nside & (a->nside - 1)))
        return cli_usage_error(CMD, "--nside must be a power of two in [1, %d], got %ld",
                               CLEF_NSIDE_MAX, a->nside);
    if (a->lmax == 0)
        a->lmax = 3 * a->nside - 1;
    if (a->lmax < 2 || a->lmax > 4 * a->nside)
        return cli_usage_error(CMD, "--lmax must be in [2, 4 nside = %ld], got %ld", 4 * a->nside,
                               a->lmax);
    if (!!a->cl_file + a->model != 1)
        return cli_usage_error(CMD, "give exactly one of --cl FILE and --model");
    if (a->params_given && !a->model)
        return cli_usage_error(CMD, "cosmological parameters need --model");
    if (a->beam_file && a->beam_fwhm > 0)
        return cli_usage_error(CMD, "give at most one of --beam-fwhm and --beam-table");
    if (a->hits_file && a->noise_depth == 0)
        return cli_usage_error(CMD, "--hits needs --noise-depth");
    if (!a->output)
        return cli_usage_error(CMD, "--output is required");
    if (a->splits > 1 && cli_is_stdout(a->output))
        return cli_usage_error(CMD, "--output -: standard output takes one map, not --splits 2");
    if (cli_check_ordering(CMD, a->ordering))
        return CLI_EXIT_USAGE;
    return CLI_EXIT_OK;
}

/* The spectrum to simulate, C_l for l = 0..lmax. */
static int load_spectrum(const sim_args *a, const clef_cosmo_params *p, double *cl)
{
    if (a->model)
        return clef_theory_cl(p, (int)a->lmax, cl);
    int lmax_file = 0;
    return clef_theory_read_cl(a->cl_file, (int)a->lmax, cl, &lmax_file);
}

int cmd_simulate(int argc, char **argv)
{
    /* T, Q, U skies: cmd_simulate_pol.c. */
    for (int i = 1; i < argc && strcmp(argv[i], "--"); i++)
        if (!strcmp(argv[i], "--polarization"))
            return cmd_simulate_pol(argc, argv);
    sim_args a = {0};
    a.seed = 1;
    a.splits = 1;
    int rc = parse_args(argc, argv, &a);
    if (rc < 0)
        return CLI_EXIT_OK;
    if (rc != CLI_EXIT_OK)
        return rc;
    /* Parameters not given on the command line keep the Planck 2018 values. */
    clef_cosmo_params p;
    clef_cosmo_params_planck2018(&p);
    double *dst[5] = {&p.omega_b, &p.omega_c, &p.h, &p.omega_k, &p.n_s};
    for (int i = 0; i < 5; i++)
        if (a.params_given & (1u << i))
            *dst[i] = a.param[i];
    cli_setup_logging();

    const int64_t nside = a.nside;
    const int lmax = (int)a.lmax, nsplits = (int)a.splits;
    int status = CLEF_OK, exit_code = CLI_EXIT_OK;
    double *cl = NULL, *bl = NULL;
    clef_map *hits = NULL, *maps[2] = {NULL, NULL};
    double complex *alm = NULL;
    clef_sht *sht = NULL;
    clef_outfile outs[3];
    char tmp[4200] = ""; /* the gzip scratch file of the map being written */
    int nouts = 0;
    memset(outs, 0, sizeof outs);

    /* Outputs are checked before any work: none may be an input, every
     * folder must take a new file. */
    char names[2][4096];
    const char *outputs[3] = {NULL, NULL, a.alm_output};
    for (int s = 0; s < nsplits; s++) {
        if (nsplits > 1)
            split_name(a.output, s + 1, names[s], sizeof names[s]);
        else
            snprintf(names[s], sizeof names[s], "%s", a.output);
        outputs[s] = names[s];
    }
    const char *inputs[3] = {a.cl_file, a.beam_file, a.hits_file};
    if ((exit_code = cli_check_outputs(inputs, 3, outputs, 3)) != CLI_EXIT_OK)
        return exit_code;

    cl = malloc(sizeof *cl * ((size_t)lmax + 1));
    bl = malloc(sizeof *bl * ((size_t)lmax + 1));
    if (!cl || !bl) {
        fprintf(stderr, "clef: error: out of memory\n");
        exit_code = CLI_EXIT_NOMEM;
        goto done;
    }
    cli_watch_input(a.cl_file);
    cli_watch_input(a.beam_file);
    cli_watch_input(a.hits_file);
    if ((status = load_spectrum(&a, &p, cl)) != CLEF_OK)
        goto fail;
    if (a.beam_file) {
        if ((status = clef_beam_read(a.beam_file, lmax, bl)) != CLEF_OK)
            goto fail;
    } else if ((status = clef_beam_gaussian(a.beam_fwhm, lmax, bl)) != CLEF_OK) {
        goto fail;
    }
    double *hits_pix = NULL;
    if (a.hits_file) {
        const clef_map_read_opts hro = {.ordering = a.ordering};
        if ((status = clef_map_read(&hits, a.hits_file, &hro)) != CLEF_OK)
            goto fail;
        if (hits->nside != nside) {
            fprintf(stderr, "clef: error: hit map '%s' has nside %lld, the simulation %lld\n",
                    a.hits_file, (long long)hits->nside, (long long)nside);
            exit_code = CLI_EXIT_INVALID;
            goto done;
        }
        hits_pix = hits->pix; /* missing pixels hold 0: no hits */
    }
    for (int s = 0; s < nsplits; s++) {
        if ((status = clef_map_alloc(&maps[s], nside)) != CLEF_OK)
            goto fail;
        const char *cs = a.coordsys ? a.coordsys : hits ? hits->coordsys : "";
        snprintf(maps[s]->coordsys, sizeof maps[s]->coordsys, "%s", cs);
        snprintf(maps[s]->unit, sizeof maps[s]->unit, "uK");
    }
    if (a.alm_output) {
        alm = malloc(sizeof *alm * clef_alm_size(lmax, lmax));
        if (!alm) {
            fprintf(stderr, "clef: error: out of memory for the a_lm\n");
            exit_code = CLI_EXIT_NOMEM;
            goto done;
        }
    }
    cli_verbose("planning transforms: nside %lld, lmax %d", (long long)nside, lmax);
    if ((status = clef_sht_create(&sht, nside, lmax, NULL)) != CLEF_OK)
        goto fail;
    const clef_sim_opts so = {
        .seed = a.seed,
        .beam = bl,
        .pixel_window = !a.no_pixel_window,
        .noise_depth = a.noise_depth,
        .hits = hits_pix,
        .nsplits = nsplits,
    };
    double *pix[2] = {maps[0]->pix, nsplits > 1 ? maps[1]->pix : NULL};
    const double t0 = clef_wtime();
    if ((status = clef_sim_map(sht, cl, &so, alm, pix, maps[0]->valid)) != CLEF_OK)
        goto fail;
    cli_verbose("simulated in %.2f s (seed %llu)", clef_wtime() - t0, a.seed);
    if (nsplits > 1)
        memcpy(maps[1]->valid, maps[0]->valid, (size_t)maps[0]->npix);
    for (int s = 0; s < nsplits; s++) {
        int64_t nmiss = 0;
        for (int64_t q = 0; q < maps[s]->npix; q++)
            if (!maps[s]->valid[q]) {
                maps[s]->pix[q] = 0.0;
                nmiss++;
            }
        maps[s]->nmissing = nmiss;
    }

    /* Write everything to temporary files, then rename them all. */
    char history[600];
    int hl = snprintf(history, sizeof history, "clef");
    for (int i = 0; i < argc && hl < (int)sizeof history - 1; i++)
        hl += snprintf(history + hl, sizeof history - (size_t)hl, " %s", argv[i]);
    const clef_map_write_opts wo = {
        .row_length = (12 * nside * nside) % 1024 == 0 ? 1024 : 1,
        .single_precision = a.float32,
        .history = history,
    };
    for (int s = 0; s < nsplits; s++) {
        const char *name = names[s];
        if ((status = clef_outfile_begin(&outs[nouts], name)) != CLEF_OK)
            goto fail;
        nouts++;
        cli_verbose("writing %s", name);
        /* clef_map_write compresses when the name ends in .gz: write a
         * registered ".gz" temporary, then move it onto the output's. */
        snprintf(tmp, sizeof tmp, "%s", outs[nouts - 1].tmp_path);
        if (ends_with_gz(name) &&
            (status = clef_temp_make(tmp, sizeof tmp, name, NULL, ".gz")) != CLEF_OK)
            goto fail;
        status = clef_map_write(maps[s], tmp, &wo);
        if (strcmp(tmp, outs[nouts - 1].tmp_path)) {
            if (status == CLEF_OK && rename(tmp, outs[nouts - 1].tmp_path) != 0) {
                char why[256];
                fprintf(stderr, "clef: error: cannot write '%s': %s\n", name,
                        clef_write_reason(name, errno, why, sizeof why));
                exit_code = CLI_EXIT_IO;
            }
            unlink(tmp);
            clef_temp_forget(tmp);
        }
        if (status != CLEF_OK)
            goto fail;
        if (exit_code != CLI_EXIT_OK)
            goto done;
    }
    if (a.alm_output) {
        if ((status = clef_outfile_begin(&outs[nouts], a.alm_output)) != CLEF_OK)
            goto fail;
        nouts++;
        cli_verbose("writing %s", a.alm_output);
        if ((status = clef_alm_write(outs[nouts - 1].tmp_path, lmax, lmax, alm)) != CLEF_OK)
            goto fail;
        if (ends_with_gz(a.alm_output) && gzip_fits(outs[nouts - 1].tmp_path) != CLEF_OK) {
            exit_code = CLI_EXIT_IO;
            goto done;
        }
    }
    if ((exit_code = cli_check_inputs()) != CLI_EXIT_OK)
        goto done;
    for (int i = 0; i < nouts; i++)
        if ((status = clef_outfile_commit(&outs[i])) != CLEF_OK)
            goto fail;
    goto done;
fail: {
    const char *tmps[4], *targets[4];
    int n = 0;
    if (tmp[0] && nouts) {
        tmps[n] = tmp;
        targets[n++] = outs[nouts - 1].path;
    }
    for (int i = 0; i < nouts; i++) {
        tmps[n] = outs[i].tmp_path;
        targets[n++] = outs[i].path;
    }
    exit_code = cli_fail_as(status, n, tmps, targets);
}
done:
    for (int i = 0; i < nouts; i++)
        clef_outfile_abort(&outs[i]);
    clef_sht_destroy(sht);
    clef_map_free(maps[0]);
    clef_map_free(maps[1]);
    clef_map_free(hits);
    free(alm);
    free(cl);
    free(bl);
    clef_beam_pixel_window_cache_clear();
    return exit_code;
}
