/* The command-line layer: shared helpers for the subcommands.  Only this
 * layer parses arguments, prints, and decides exit codes. */
#ifndef CLEF_CLI_H
#define CLEF_CLI_H

#include <stdio.h>

/* Documented exit codes (docs/exit-codes.md). */
enum cli_exit {
    CLI_EXIT_OK = 0,
    CLI_EXIT_USAGE = 2,    /* bad command line */
    CLI_EXIT_INVALID = 3,  /* CLEF_EINVAL: an input value is invalid */
    CLI_EXIT_IO = 4,       /* CLEF_EIO: cannot read or write a file */
    CLI_EXIT_FORMAT = 5,   /* CLEF_EFORMAT: a file's content is malformed */
    CLI_EXIT_NUMERIC = 6,  /* CLEF_ENUMERIC: singular or ill-conditioned problem */
    CLI_EXIT_UNSUP = 7,    /* CLEF_EUNSUP: a request clef does not support */
    CLI_EXIT_NOMEM = 8,    /* CLEF_ENOMEM */
    CLI_EXIT_NOPEAK = 9,   /* clef peak --require: no peak found */
    CLI_EXIT_RUNDIR = 10   /* clef sims: the run folder belongs to another run description */
};

/* A subcommand: run() gets argv with argv[0] = the subcommand name. */
typedef struct cli_command {
    const char *name;
    const char *summary;
    int (*run)(int argc, char **argv);
} cli_command;

/* 0 = --quiet (errors only), 1 = normal (warnings too), 2 = --verbose. */
extern int cli_verbosity;

/* Install the log and progress hooks according to cli_verbosity.  Warnings
 * are also collected for run summaries: cli_warnings(). */
void cli_setup_logging(void);
int cli_nwarnings(void);
/* A warning of the command itself: printed like the library's (unless
 * --quiet) and collected with them for the JSON "warnings" array. */
void cli_warn(const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 1, 2)))
#endif
    ;
const char *cli_warning(int i);

/* Map a library status to an exit code, printing clef_last_error(). */
int cli_fail(int status);
/* The same, with each of the n temporary paths tmps[i] in the message
 * replaced by the output it stands for, targets[i]. */
int cli_fail_as(int status, int n, const char *const *tmps, const char *const *targets);
/* Parse a --format list "fits,csv,json" into the three flags (each set to 0
 * first); an unknown name is a usage error. */
int cli_parse_formats(const char *cmd, const char *s, int *fits, int *csv, int *json);
/* Print "clef <cmd>: <message>" and return CLI_EXIT_USAGE. */
int cli_usage_error(const char *cmd, const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 2, 3)))
#endif
    ;

/* Strict number parsing for option values; on error print a message naming
 * the option and the value and return nonzero. */
int cli_parse_long(const char *cmd, const char *opt, const char *s, long *out);
int cli_parse_double(const char *cmd, const char *opt, const char *s, double *out);

/* Write a JSON document atomically (temporary file, then rename); returns
 * an exit code, having printed the error. */
struct cJSON;
int cli_write_json(const char *path, const struct cJSON *j);
/* A run summary's first keys: program, version, command (the command line),
 * finished_utc (now). */
struct cJSON *cli_summary_begin(int argc, char **argv);

/* A JSON array of n numbers (a non-finite value is written as 0, as every
 * summary has done so far). */
struct cJSON *cli_json_numbers(const double *v, int n);

/* The first-peak result and the settings that made it as members of a JSON
 * object, with the names every command uses (docs/peak.md, "JSON"). */
struct clef_peak_result;
struct clef_peak_opts;
void cli_peak_json(struct cJSON *obj, const struct clef_peak_result *r,
                   const struct clef_peak_opts *o);

/* Output safety, before any computation: refuse an output that is the same
 * file as an input (device and inode, through symbolic and hard links;
 * exit 3), two outputs that are one file (exit 3), and an output whose
 * folder does not take a new file (exit 4).  "-" and /dev/stdout mean
 * standard output; the text summary then goes to standard error
 * (cli_text_stream).  NULL entries are skipped.  Returns an exit code,
 * having printed the error. */
int cli_check_outputs(const char *const *inputs, int nin, const char *const *outputs, int nout);
/* 1 when `path` names standard output ("-", /dev/stdout, /dev/fd/1). */
int cli_is_stdout(const char *path);
/* 1 when the two paths are the same file (see cli_check_outputs). */
int cli_same_file(const char *a, const char *b);
/* Where text summaries go: stdout, or stderr when an output is stdout. */
FILE *cli_text_stream(void);
/* Around code that prints a summary with printf: while stdout carries a
 * file, the summary goes to stderr (no-ops otherwise). */
void cli_text_begin(void);
void cli_text_end(void);

/* --ordering RING|NESTED (NULL allowed); prints a usage error and returns
 * nonzero otherwise. */
int cli_check_ordering(const char *cmd, const char *ordering);

/* Inputs changed under a running job (src/cli/cli_inputs.c): record each
 * input file before reading it; cli_check_inputs() before writing outputs
 * returns CLI_EXIT_IO (message printed) if any was removed, replaced,
 * resized or modified since, else CLI_EXIT_OK. */
void cli_watch_input(const char *path);
int cli_check_inputs(void);

/* --threads N: set the OpenMP thread count (0 = leave the default). */
int cli_set_threads(const char *cmd, const char *s);

/* Message at info level (shown unless --quiet) and verbose level. */
void cli_info(const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 1, 2)))
#endif
    ;
void cli_verbose(const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 1, 2)))
#endif
    ;

/* Subcommands, one file each under src/cli/ (one declaration per line). */
int cmd_inspect(int argc, char **argv);
int cmd_convert(int argc, char **argv);
int cmd_simulate(int argc, char **argv);
int cmd_simulate_pol(int argc, char **argv); /* clef simulate --polarization */
int cmd_peak(int argc, char **argv);
int cmd_spectrum(int argc, char **argv);
int cmd_spectrum_pol(int argc, char **argv); /* clef spectrum --polarization */
/* clef spectrum --run FILE: many fields from a run file (cmd_spectrum_run.c). */
int cmd_spectrum_run(int argc, char **argv);
/* Tables indexed by l for the spectrum commands (cli_analysis.c; the last
 * multipole of a file is cli_table_last_l of cli_analysis.h): the
 * multipole to read a table to (its end when below lread), and readers of
 * l = 0..lmax (NULL + *status on failure). */
int cli_table_lmax(const char *path, int lread);
double *cli_read_spectrum_file(const char *path, int lmax, int *status);
double *cli_read_profile_file(const char *path, int lmax, int *status);
int cmd_model(int argc, char **argv);
int cmd_geometry(int argc, char **argv);
int cmd_mask(int argc, char **argv);
int cmd_plot(int argc, char **argv);
int cmd_sims(int argc, char **argv);

#endif
