/* The analysis options of `clef spectrum`, shared with the simulation
 * ensemble (cli_analysis.h). */
#define _POSIX_C_SOURCE 200809L
#include <stdlib.h>
#include <string.h>

#include "clef/beam.h"
#include "clef/coupling.h"
#include "clef/theory.h"
#include "cli.h"
#include "cli_analysis.h"

const struct option cli_analysis_options[CLI_ANALYSIS_NOPTS] = {
    {"mask", required_argument, 0, CLI_AOPT_MASK},
    {"second-mask", required_argument, 0, CLI_AOPT_MASK2},
    {"hdu", required_argument, 0, CLI_AOPT_HDU},
    {"column", required_argument, 0, CLI_AOPT_COLUMN},
    {"allow-coord-mismatch", no_argument, 0, CLI_AOPT_COORD},
    {"lmax", required_argument, 0, CLI_AOPT_LMAX},
    {"bin-width", required_argument, 0, CLI_AOPT_BINW},
    {"log-bins", required_argument, 0, CLI_AOPT_LOGB},
    {"bins", required_argument, 0, CLI_AOPT_BINS},
    {"beam-fwhm", required_argument, 0, CLI_AOPT_FWHM},
    {"beam-table", required_argument, 0, CLI_AOPT_BEAMF},
    {"no-pixel-window", no_argument, 0, CLI_AOPT_NOPIX},
    {"transfer", required_argument, 0, CLI_AOPT_TRANSFER},
    {"noise-spectrum", required_argument, 0, CLI_AOPT_NOISE},
    {"covariance-model", required_argument, 0, CLI_AOPT_THEORY},
    {"iterations", required_argument, 0, CLI_AOPT_ITER},
    {"keep-multipoles", no_argument, 0, CLI_AOPT_KEEP},
    {"cache-dir", required_argument, 0, CLI_AOPT_CACHE},
    {"no-cache", no_argument, 0, CLI_AOPT_NOCACHE},
    {"cache-limit", required_argument, 0, CLI_AOPT_CACHELIMIT},
    {"peak-l-min", required_argument, 0, CLI_AOPT_PLMIN},
    {"peak-l-max", required_argument, 0, CLI_AOPT_PLMAX},
    {"peak-half-width", required_argument, 0, CLI_AOPT_PHW},
    {"peak-error-draws", required_argument, 0, CLI_AOPT_PDRAWS},
    {"no-peak", no_argument, 0, CLI_AOPT_NOPEAK},
    {"ordering", required_argument, 0, CLI_AOPT_ORDERING},
    {"unit", required_argument, 0, CLI_AOPT_UNIT},
    {"calibration", required_argument, 0, CLI_AOPT_CALIB},
    {"second-beam-fwhm", required_argument, 0, CLI_AOPT_FWHM2},
    {"second-beam-table", required_argument, 0, CLI_AOPT_BEAMF2},
    {"second-transfer", required_argument, 0, CLI_AOPT_TRANSFER2},
};

void cli_analysis_init(cli_analysis *a)
{
    memset(a, 0, sizeof *a);
    a->iterations = CLEF_SPECTRUM_ITERATIONS;
    a->peak_lmin = -1;
    a->peak_lmax = -1;
    a->peak_draws = -1;
}

void cli_analysis_help(FILE *f)
{
    fprintf(f,
        "Inputs:\n"
        "  --mask FILE            mask (weights in [0,1]) for MAP, and for MAP2 unless\n"
        "                         --second-mask\n"
        "  --second-mask FILE     separate mask for MAP2\n"
        "  --hdu H, --column C    table and column of the maps (default: first table,\n"
        "                         first value column)\n"
        "  --allow-coord-mismatch accept map and mask with different COORDSYS\n"
        "  --ordering RING|NESTED pixel order of map and mask files that have no ORDERING\n"
        "                         keyword (default: such files are refused)\n"
        "  --unit U               unit of the map values (K, mK or uK, with or without _CMB),\n"
        "                         overriding the files' TUNIT (default: TUNIT; a unit clef\n"
        "                         does not know is refused, no TUNIT is taken as uK)\n"
        "  --calibration F        multiply the map values by F to get uK (instead of --unit)\n\n"
        "Multipoles and bins:\n"
        "  --lmax L               highest multipole reported (default 2*nside, lowered where\n"
        "                         the beam x pixel window drops below 0.01 or a table ends,\n"
        "                         then to the end of the last whole bin; at most 3*nside-1,\n"
        "                         with a warning above 2*nside)\n"
        "  --bin-width N          linear bins of N multipoles from l=2 (default: automatic,\n"
        "                         max(20, the mask's coupling width))\n"
        "  --log-bins N           N logarithmic bins from l=2 to lmax instead\n"
        "  --bins FILE            bin edges from a text file (docs/coupling.md)\n\n"
        "Instrument:\n"
        "  --beam-fwhm ARCMIN     Gaussian beam full width at half maximum (default: none)\n"
        "  --beam-table FILE      tabulated beam, columns 'l B_l'\n"
        "  --no-pixel-window      do not correct for the pixel window (default: corrected)\n"
        "  --transfer FILE        transfer function, columns 'l F_l'\n"
        "  --noise-spectrum FILE  noise spectrum N_l [uK^2] to subtract (auto-spectra)\n"
        "  --covariance-model FILE\n"
        "                         C_l [uK^2] of the sky used in the covariance instead of\n"
        "                         the measured spectra\n\n"
        "Method:\n"
        "  --iterations N         analysis iterations (default %d)\n"
        "  --keep-multipoles      keep the monopole and dipole (default: fitted on the\n"
        "                         observed sky and removed)\n"
        "  --cache-dir DIR        coupling cache folder (default $CLEF_CACHE_DIR,\n"
        "                         $XDG_CACHE_HOME/clef or ~/.cache/clef)\n"
        "  --no-cache             neither read nor write the coupling cache\n"
        "  --cache-limit SIZE     keep the cache folder under SIZE (e.g. 500M, 4G; 0: no\n"
        "                         limit), removing least recently used entries\n"
        "                         (default $CLEF_CACHE_LIMIT, else 4G)\n\n"
        "First peak:\n"
        "  --peak-l-min L, --peak-l-max L   search window (default 100..400)\n"
        "  --peak-half-width L    multipoles each side of the fit centre used in the fit\n"
        "                         (default: max(120, three bin widths); docs/peak.md)\n"
        "  --peak-error-draws N   refit N draws of the band powers for the peak's\n"
        "                         statistical error (default %d: first-order\n"
        "                         propagation; docs/peak.md suggests %d)\n"
        "  --no-peak              skip the peak fit\n\n",
        CLEF_SPECTRUM_ITERATIONS, CLEF_PEAK_DRAWS, CLEF_PEAK_DRAWS_SUGGESTED);
}

int cli_analysis_option(const char *cmd, int c, const char *arg, cli_analysis *a)
{
    switch (c) {
    case CLI_AOPT_MASK: a->mask[0] = arg; return 1;
    case CLI_AOPT_MASK2: a->mask[1] = arg; return 1;
    case CLI_AOPT_HDU: a->hdu = arg; return 1;
    case CLI_AOPT_COLUMN: a->column = arg; return 1;
    case CLI_AOPT_COORD: a->coord = 1; return 1;
    case CLI_AOPT_LMAX:
        if (cli_parse_long(cmd, "--lmax", arg, &a->lmax))
            return CLI_EXIT_USAGE;
        if (a->lmax < 2)
            return cli_usage_error(cmd, "--lmax must be at least 2, got %ld", a->lmax);
        return 1;
    case CLI_AOPT_BINW:
        if (cli_parse_long(cmd, "--bin-width", arg, &a->bin_width))
            return CLI_EXIT_USAGE;
        if (a->bin_width < 1)
            return cli_usage_error(cmd, "--bin-width must be positive, got %ld", a->bin_width);
        return 1;
    case CLI_AOPT_LOGB:
        if (cli_parse_long(cmd, "--log-bins", arg, &a->log_bins))
            return CLI_EXIT_USAGE;
        if (a->log_bins < 1)
            return cli_usage_error(cmd, "--log-bins must be positive, got %ld", a->log_bins);
        return 1;
    case CLI_AOPT_BINS: a->bins_file = arg; return 1;
    case CLI_AOPT_FWHM:
        if (cli_parse_double(cmd, "--beam-fwhm", arg, &a->beam_fwhm))
            return CLI_EXIT_USAGE;
        if (a->beam_fwhm < 0)
            return cli_usage_error(cmd, "--beam-fwhm must not be negative, got %g", a->beam_fwhm);
        return 1;
    case CLI_AOPT_BEAMF: a->beam_file = arg; return 1;
    case CLI_AOPT_FWHM2:
        if (cli_parse_double(cmd, "--second-beam-fwhm", arg, &a->beam2_fwhm))
            return CLI_EXIT_USAGE;
        if (!(a->beam2_fwhm >= 0))
            return cli_usage_error(cmd, "--second-beam-fwhm must not be negative, got %s", arg);
        a->beam2_set = 1;
        return 1;
    case CLI_AOPT_BEAMF2: a->beam2_file = arg; return 1;
    case CLI_AOPT_TRANSFER2: a->transfer2_file = arg; return 1;
    case CLI_AOPT_NOPIX: a->no_pixel_window = 1; return 1;
    case CLI_AOPT_TRANSFER: a->transfer_file = arg; return 1;
    case CLI_AOPT_NOISE: a->noise_file = arg; return 1;
    case CLI_AOPT_THEORY: a->theory_file = arg; return 1;
    case CLI_AOPT_ITER:
        if (cli_parse_long(cmd, "--iterations", arg, &a->iterations))
            return CLI_EXIT_USAGE;
        if (a->iterations < 0 || a->iterations > 20)
            return cli_usage_error(cmd, "--iterations must be in 0..20, got %ld", a->iterations);
        return 1;
    case CLI_AOPT_KEEP: a->keep = 1; return 1;
    case CLI_AOPT_CACHE: a->cache_dir = arg; return 1;
    case CLI_AOPT_NOCACHE: a->no_cache = 1; return 1;
    case CLI_AOPT_CACHELIMIT: {
        long long bytes;
        if (clef_cache_parse_size(arg, &bytes) != CLEF_OK)
            return cli_usage_error(cmd, "--cache-limit: %s", clef_last_error());
        clef_cache_set_limit(bytes);
        return 1;
    }
    case CLI_AOPT_PLMIN:
        return cli_parse_double(cmd, "--peak-l-min", arg, &a->peak_lmin) ? CLI_EXIT_USAGE : 1;
    case CLI_AOPT_PLMAX:
        return cli_parse_double(cmd, "--peak-l-max", arg, &a->peak_lmax) ? CLI_EXIT_USAGE : 1;
    case CLI_AOPT_PHW:
        if (cli_parse_double(cmd, "--peak-half-width", arg, &a->peak_hw))
            return CLI_EXIT_USAGE;
        if (!(a->peak_hw > 0))
            return cli_usage_error(cmd, "--peak-half-width must be positive, got %g", a->peak_hw);
        return 1;
    case CLI_AOPT_PDRAWS:
        if (cli_parse_long(cmd, "--peak-error-draws", arg, &a->peak_draws))
            return CLI_EXIT_USAGE;
        if (a->peak_draws < 0 || a->peak_draws > 100000)
            return cli_usage_error(cmd, "--peak-error-draws must be 0 to 100000, got %ld",
                                   a->peak_draws);
        return 1;
    case CLI_AOPT_NOPEAK: a->no_peak = 1; return 1;
    case CLI_AOPT_ORDERING: a->ordering = arg; return 1;
    case CLI_AOPT_UNIT:
        if (clef_unit_to_uk(arg) == 0)
            return cli_usage_error(cmd, "--unit: '%s' is not a unit clef knows (K, mK, uK, "
                                   "with or without _CMB)", arg);
        a->unit = arg;
        return 1;
    case CLI_AOPT_CALIB:
        if (cli_parse_double(cmd, "--calibration", arg, &a->calibration))
            return CLI_EXIT_USAGE;
        if (!(a->calibration > 0))
            return cli_usage_error(cmd, "--calibration must be positive, got %s", arg);
        return 1;
    default:
        return 0;
    }
}

void cli_analysis_files(const cli_analysis *a, const char **kinds, const char **paths)
{
    static const char *const k[CLI_ANALYSIS_NFILES] = {"bins", "beam", "transfer", "noise",
                                                       "theory", "beam2", "transfer2"};
    const char *const p[CLI_ANALYSIS_NFILES] = {a->bins_file, a->beam_file, a->transfer_file,
                                                a->noise_file, a->theory_file, a->beam2_file,
                                                a->transfer2_file};
    for (int i = 0; i < CLI_ANALYSIS_NFILES; i++) {
        if (kinds)
            kinds[i] = k[i];
        paths[i] = p[i];
    }
}

int cli_analysis_check(const char *cmd, const cli_analysis *a, int have_map2)
{
    if (!a->mask[0])
        return cli_usage_error(cmd, "--mask is required");
    if (a->mask[1] && !have_map2)
        return cli_usage_error(cmd, "--second-mask needs a second map");
    if ((a->bins_file != NULL) + (a->log_bins > 0) + (a->bin_width > 0) > 1)
        return cli_usage_error(cmd, "choose one of --bins, --log-bins and --bin-width");
    if (a->beam_file && a->beam_fwhm > 0)
        return cli_usage_error(cmd, "choose one of --beam-fwhm and --beam-table");
    if ((a->beam2_set || a->beam2_file || a->transfer2_file) && !have_map2)
        return cli_usage_error(cmd, "--second-beam-fwhm, --second-beam-table and "
                               "--second-transfer describe a second map: give two maps");
    if (a->beam2_file && a->beam2_set)
        return cli_usage_error(cmd, "choose one of --second-beam-fwhm and --second-beam-table");
    if (a->unit && a->calibration > 0)
        return cli_usage_error(cmd, "choose one of --unit and --calibration");
    if (cli_check_ordering(cmd, a->ordering))
        return CLI_EXIT_USAGE;
    return 0;
}

/* The largest multipole of a spectrum file (text or FITS), else of the
 * first column of a text table ('#' comments), or -1 if none can be read;
 * the table's own reader reports any error in detail. */
int cli_table_last_l(const char *path)
{
    int flmax = -1;
    if (clef_theory_read_cl(path, 0, NULL, &flmax) == CLEF_OK)
        return flmax;
    FILE *f = fopen(path, "r");
    if (!f)
        return -1;
    char line[4096];
    long best = -1;
    while (fgets(line, sizeof line, f)) {
        char *p = line;
        while (*p == ' ' || *p == '\t')
            p++;
        if (*p == '#' || *p == '\n' || *p == '\0')
            continue;
        char *end;
        long l = strtol(p, &end, 10);
        if (end != p && l > best && l < 1000000)
            best = l;
    }
    fclose(f);
    return (int)best;
}

/* Tables indexed by l are read up to `lread`, or to their own end when that
 * comes first (the default lmax and the coupling range then stop there). */
int cli_table_lmax(const char *path, int lread)
{
    int last = cli_table_last_l(path);
    return last >= 2 && last < lread ? last : lread;
}

double *cli_read_spectrum_file(const char *path, int lmax, int *status)
{
    double *cl = calloc((size_t)lmax + 1, sizeof *cl);
    if (!cl) {
        *status = CLEF_ENOMEM;
        return NULL;
    }
    *status = clef_theory_read_cl(path, lmax, cl, NULL);
    if (*status != CLEF_OK) {
        free(cl);
        return NULL;
    }
    return cl;
}

double *cli_read_profile_file(const char *path, int lmax, int *status)
{
    double *v = calloc((size_t)lmax + 1, sizeof *v);
    if (!v) {
        *status = CLEF_ENOMEM;
        return NULL;
    }
    *status = clef_beam_read(path, lmax, v);
    if (*status != CLEF_OK) {
        free(v);
        return NULL;
    }
    return v;
}

void cli_analysis_tables_free(cli_analysis_tables *t)
{
    clef_bins_destroy(t->bins);
    free(t->beam);
    free(t->transfer);
    free(t->noise);
    free(t->theory);
    free(t->beam2);
    free(t->transfer2);
    memset(t, 0, sizeof *t);
}

int cli_analysis_setup(const cli_analysis *a, int64_t nside, clef_spectrum_opts *so,
                       cli_analysis_tables *t)
{
    int status = CLEF_OK;
    memset(t, 0, sizeof *t);
    const int lmax_pix = (int)(3 * nside - 1);
    /* Files indexed by l are read up to 3 nside - 1 or their own end: the
     * coupling runs past lmax (hidden bins, docs/method.md section 5); the
     * estimator refuses a table that stops below lmax. */
    const int lread = lmax_pix;
    t->lread = lread;

    clef_spectrum_opts_default(so);
    so->lmax = (int)a->lmax;
    so->iterations = (int)a->iterations;
    so->keep_multipoles = a->keep;
    so->use_cache = !a->no_cache;
    so->cache_dir = a->cache_dir;
    so->pixel_window = !a->no_pixel_window;
    so->beam_fwhm = a->beam_fwhm;
    so->allow_coord_mismatch = a->coord;
    so->find_peak = !a->no_peak;
    if (a->peak_lmin >= 0)
        so->peak.l_min = a->peak_lmin;
    if (a->peak_lmax >= 0)
        so->peak.l_max = a->peak_lmax;
    if (a->peak_hw > 0)
        so->peak.half_width = a->peak_hw;
    if (a->peak_draws >= 0)
        so->peak.draws = (int)a->peak_draws;
    so->names[2] = a->mask[0];
    so->names[3] = a->mask[1];
    so->bin_width = (int)a->bin_width;
    if (a->beam_file) {
        so->beam_lmax = cli_table_lmax(a->beam_file, lread);
        if (!(t->beam = cli_read_profile_file(a->beam_file, so->beam_lmax, &status)))
            goto fail;
        so->beam = t->beam;
    }
    if (a->transfer_file) {
        so->transfer_lmax = cli_table_lmax(a->transfer_file, lread);
        if (!(t->transfer = cli_read_profile_file(a->transfer_file, so->transfer_lmax, &status)))
            goto fail;
        so->transfer = t->transfer;
    }
    if (a->beam2_set || a->beam2_file || a->transfer2_file) {
        /* The second map's instrument: what is not given is the first's. */
        so->second_instrument = 1;
        so->beam2_fwhm = so->beam_fwhm;
        so->beam2 = so->beam;
        so->beam2_lmax = so->beam_lmax;
        so->transfer2 = so->transfer;
        so->transfer2_lmax = so->transfer_lmax;
        if (a->beam2_set) {
            so->beam2_fwhm = a->beam2_fwhm;
            so->beam2 = NULL;
            so->beam2_lmax = 0;
        } else if (a->beam2_file) {
            so->beam2_fwhm = 0;
            so->beam2_lmax = cli_table_lmax(a->beam2_file, lread);
            if (!(t->beam2 = cli_read_profile_file(a->beam2_file, so->beam2_lmax, &status)))
                goto fail;
            so->beam2 = t->beam2;
        }
        if (a->transfer2_file) {
            so->transfer2_lmax = cli_table_lmax(a->transfer2_file, lread);
            if (!(t->transfer2 = cli_read_profile_file(a->transfer2_file, so->transfer2_lmax,
                                                       &status)))
                goto fail;
            so->transfer2 = t->transfer2;
        }
    }
    if (a->noise_file) {
        so->noise_lmax = cli_table_lmax(a->noise_file, lread);
        if (!(t->noise = cli_read_spectrum_file(a->noise_file, so->noise_lmax, &status)))
            goto fail;
        so->noise_cl = t->noise;
    }
    if (a->theory_file) {
        if (!(t->theory = cli_read_spectrum_file(a->theory_file, lread, &status)))
            goto fail;
        so->theory_cl = t->theory;
        /* A theory table that stops below lmax is refused by the estimator
         * rather than padded with zeros (zero errors above its end). */
        const int last = cli_table_last_l(a->theory_file);
        so->theory_lmax = last >= 0 && last < lread ? last : lread;
    }
    if (a->bins_file || a->log_bins > 0) {
        /* Explicit bins need the lmax they end at: a bin file may reach
         * the given lmax or 3 nside - 1; logarithmic bins end at the given
         * lmax or the default one. */
        const int lbins = a->lmax ? (int)a->lmax : lmax_pix;
        if (a->bins_file) {
            status = clef_bins_read(&t->bins, a->bins_file, lbins, CLEF_BINS_DL);
        } else {
            int ldef = lbins;
            if (!a->lmax && (status = clef_spectrum_default_lmax(so, nside, &ldef)) != CLEF_OK)
                goto fail;
            status = clef_bins_create_log(&t->bins, 2, ldef, (int)a->log_bins, CLEF_BINS_DL);
        }
        if (status != CLEF_OK)
            goto fail;
        if (!a->lmax)
            so->lmax = clef_bins_lmax(t->bins);
        so->bins = t->bins;
    }
    return CLEF_OK;
fail:
    cli_analysis_tables_free(t);
    return status;
}

int cli_analysis_units(const cli_analysis *a, clef_map *map, const char *path)
{
    if (a->calibration > 0) {
        for (int64_t p = 0; p < map->npix; p++)
            map->pix[p] *= a->calibration;
        snprintf(map->unit, sizeof map->unit, "uK");
        return CLI_EXIT_OK;
    }
    if (a->unit) {
        snprintf(map->unit, sizeof map->unit, "%s", a->unit);
        return CLI_EXIT_OK;
    }
    if (!map->unit[0]) {
        cli_warn("map '%s' records no unit (no TUNIT for column '%s'): values taken as uK; "
                 "give --unit or --calibration to state it", path, map->column);
        return CLI_EXIT_OK;
    }
    if (clef_unit_to_uk(map->unit) == 0) {
        fprintf(stderr,
                "clef: error: map '%s' column '%s' has unit '%s' (TUNIT), not a temperature unit "
                "clef knows (K, mK, uK, with or without _CMB); give --unit U to state the unit "
                "or --calibration F to convert the values to uK\n",
                path, map->column, map->unit);
        return CLI_EXIT_INVALID;
    }
    return CLI_EXIT_OK;
}

int cli_analysis_read_map(const cli_analysis *a, const char *path, int is_mask, clef_map **out)
{
    clef_map_read_opts ro = {0};
    if (!is_mask) {
        ro.hdu = a->hdu;
        ro.column = a->column;
    }
    ro.ordering = a->ordering;
    int status = clef_map_read(out, path, &ro);
    if (status != CLEF_OK)
        return status;
    cli_verbose("read %s: nside %lld, %lld missing pixels", path, (long long)(*out)->nside,
                (long long)(*out)->nmissing);
    if (!is_mask) {
        const int rc = cli_analysis_units(a, *out, path);
        if (rc != CLI_EXIT_OK) {
            clef_map_free(*out);
            *out = NULL;
            return -rc;
        }
    }
    return CLEF_OK;
}

void cli_analysis_warn_caps(const cli_analysis *a, const clef_spectrum_opts *so,
                            const clef_spectrum_result *r, int lread)
{
    const struct { const char *what, *path; int last; } t[] = {
        {"beam table", a->beam_file, so->beam_lmax},
        {"transfer function", a->transfer_file, so->transfer_lmax},
        {"noise spectrum", a->noise_file, so->noise_lmax},
        {"second beam table", a->beam2_file, so->beam2_lmax},
        {"second transfer function", a->transfer2_file, so->transfer2_lmax},
    };
    for (int i = 0; i < 5; i++)
        if (t[i].path && t[i].last < lread && r->lmax_ext == t[i].last)
            cli_warn("lmax capped at %d: the %s '%s' ends at l = %d, below the map's l = %d; "
                     "band powers stop at %d and the coupling (hidden bins) at %d; give a "
                     "longer table to go further", t[i].last, t[i].what, t[i].path, t[i].last,
                     lread, r->lmax, r->lmax_ext);
}
