/* The analysis options of `clef spectrum`, shared by every command that
 * analyses maps exactly as it does (`clef spectrum` itself and the
 * simulation ensemble, `clef sims`): one option table, one parser, one help
 * text and one translation into clef_spectrum_opts, so the two cannot
 * drift apart. */
#ifndef CLEF_CLI_ANALYSIS_H
#define CLEF_CLI_ANALYSIS_H

#include <getopt.h>
#include <stdio.h>

#include "clef/bins.h"
#include "clef/map.h"
#include "clef/spectrum.h"

/* getopt_long codes of the shared options; commands number their own from
 * CLI_ANALYSIS_OPT_END. */
enum {
    CLI_AOPT_MASK = 256, CLI_AOPT_MASK2, CLI_AOPT_HDU, CLI_AOPT_COLUMN, CLI_AOPT_COORD,
    CLI_AOPT_LMAX, CLI_AOPT_BINW, CLI_AOPT_LOGB, CLI_AOPT_BINS, CLI_AOPT_FWHM, CLI_AOPT_BEAMF,
    CLI_AOPT_NOPIX, CLI_AOPT_TRANSFER, CLI_AOPT_NOISE, CLI_AOPT_THEORY, CLI_AOPT_ITER,
    CLI_AOPT_KEEP, CLI_AOPT_CACHE, CLI_AOPT_NOCACHE, CLI_AOPT_CACHELIMIT, CLI_AOPT_PLMIN,
    CLI_AOPT_PLMAX, CLI_AOPT_PHW, CLI_AOPT_NOPEAK, CLI_AOPT_ORDERING, CLI_AOPT_UNIT,
    CLI_AOPT_CALIB, CLI_AOPT_PDRAWS, CLI_AOPT_FWHM2, CLI_AOPT_BEAMF2, CLI_AOPT_TRANSFER2,
    CLI_ANALYSIS_OPT_END
};

/* Number of entries of cli_analysis_options (without a terminator). */
#define CLI_ANALYSIS_NOPTS 31
extern const struct option cli_analysis_options[CLI_ANALYSIS_NOPTS];

typedef struct cli_analysis {
    const char *mask[2], *hdu, *column, *bins_file, *beam_file, *transfer_file;
    const char *noise_file, *theory_file, *cache_dir, *ordering, *unit;
    const char *beam2_file, *transfer2_file; /* the second map's instrument */
    long lmax, bin_width, log_bins, iterations, peak_draws;
    double beam_fwhm, beam2_fwhm, peak_lmin, peak_lmax, peak_hw, calibration;
    int no_peak, no_pixel_window, keep, no_cache, coord, beam2_set;
} cli_analysis;

void cli_analysis_init(cli_analysis *a);

/* Handle one getopt_long result c with its optarg: 1 handled, 0 not an
 * analysis option, CLI_EXIT_USAGE after printing a usage error. */
int cli_analysis_option(const char *cmd, int c, const char *arg, cli_analysis *a);

/* Checks between the options once all are parsed (--mask required, one
 * kind of bins, ...); have_map2: the analysis is a cross-spectrum.  Returns
 * 0 or CLI_EXIT_USAGE after printing the error. */
int cli_analysis_check(const char *cmd, const cli_analysis *a, int have_map2);

/* The help sections of the shared options (Inputs, Multipoles and bins,
 * Instrument, Method, First peak). */
void cli_analysis_help(FILE *f);

/* The tables and bins the options name, read for maps of `nside`, owned by
 * the caller until cli_analysis_tables_free. */
typedef struct cli_analysis_tables {
    clef_bins *bins;
    double *beam, *transfer, *noise, *theory, *beam2, *transfer2;
    int lread; /* multipoles the tables were read to (3 nside - 1 or their end) */
} cli_analysis_tables;

/* Fill so (from clef_spectrum_opts_default) from the options and read the
 * tables they name.  Returns a library status (message set). */
int cli_analysis_setup(const cli_analysis *a, int64_t nside, clef_spectrum_opts *so,
                       cli_analysis_tables *t);
void cli_analysis_tables_free(cli_analysis_tables *t);

/* Read a map (i = 0, 1) or a mask (i = 2, 3) as the options say (HDU,
 * column, ordering; units for maps).  Returns a library status, or -exit
 * code (printed) for a unit problem. */
int cli_analysis_read_map(const cli_analysis *a, const char *path, int is_mask, clef_map **out);

/* Apply --calibration / --unit to a map read from `path`; else refuse a
 * TUNIT clef does not know.  Returns an exit code (error printed). */
int cli_analysis_units(const cli_analysis *a, clef_map *map, const char *path);

/* A beam, transfer or noise table shorter than the map's multipole range
 * stopped the coupled range at its last l: warn, naming the file. */
void cli_analysis_warn_caps(const cli_analysis *a, const clef_spectrum_opts *so,
                            const clef_spectrum_result *r, int lread);

/* The table files the options name (bins, beam, transfer, noise, covariance
 * model, the second map's beam and transfer), NULL where not given: kinds
 * (JSON names) and paths, CLI_ANALYSIS_NFILES of each. */
#define CLI_ANALYSIS_NFILES 7
void cli_analysis_files(const cli_analysis *a, const char **kinds, const char **paths);

/* The largest multipole of a spectrum or 'l value' table, or -1. */
int cli_table_last_l(const char *path);

#endif
