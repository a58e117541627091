/* Shared command-line helpers: logging and progress on stderr, exit codes,
 * strict option parsing. */
#define _POSIX_C_SOURCE 200809L
#define _XOPEN_SOURCE 700
#include "cli.h"

#include <cjson/cJSON.h>
#include <errno.h>
#include <math.h>
#include <omp.h>
#include <stdarg.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <strings.h>
#include <sys/stat.h>
#include <unistd.h>

#include "clef/clef.h"
#include "clef/peak.h"

#define PATH_MAX_CLI 4096

int cli_verbosity = 1;
static int stdout_taken;

#define MAX_WARNINGS 64
static char *warnings[MAX_WARNINGS];
static int nwarnings;
static int progress_shown;

static void log_hook(void *user, int level, const char *msg)
{
    (void)user;
    if (level == CLEF_LOG_WARN && nwarnings < MAX_WARNINGS)
        warnings[nwarnings++] = strdup(msg);
    /* Errors are printed once by cli_fail(), not here. */
    if (level == CLEF_LOG_ERROR)
        return;
    if ((level == CLEF_LOG_WARN && cli_verbosity >= 1) ||
        (level == CLEF_LOG_INFO && cli_verbosity >= 2) ||
        (level == CLEF_LOG_DEBUG && cli_verbosity >= 3)) {
        if (progress_shown) {
            fputs("\r\033[K", stderr);
            progress_shown = 0;
        }
        fprintf(stderr, "clef: %s%s\n", level == CLEF_LOG_WARN ? "warning: " : "", msg);
    }
}

/* A progress line only when stderr is a terminal: batch logs stay clean. */
static void progress_hook(void *user, const char *stage, double fraction)
{
    (void)user;
    if (fraction >= 1.0) {
        if (progress_shown)
            fputs("\r\033[K", stderr);
        progress_shown = 0;
        return;
    }
    fprintf(stderr, "\r\033[Kclef: %s %3.0f%%", stage, 100.0 * fraction);
    fflush(stderr);
    progress_shown = 1;
}

void cli_setup_logging(void)
{
    clef_set_log(log_hook, NULL);
    if (cli_verbosity >= 1 && isatty(STDERR_FILENO))
        clef_set_progress(progress_hook, NULL);
    else
        clef_set_progress(NULL, NULL);
}

void cli_warn(const char *fmt, ...)
{
    char msg[2048];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(msg, sizeof msg, fmt, ap);
    va_end(ap);
    log_hook(NULL, CLEF_LOG_WARN, msg);
}

int cli_nwarnings(void) { return nwarnings; }
const char *cli_warning(int i) { return (i >= 0 && i < nwarnings) ? warnings[i] : ""; }

int cli_fail(int status) { return cli_fail_as(status, 0, NULL, NULL); }

int cli_fail_as(int status, int n, const char *const *tmps, const char *const *targets)
{
    if (progress_shown) {
        fputs("\r\033[K", stderr);
        progress_shown = 0;
    }
    /* The library wrote to temporaries the command made; name the outputs. */
    char msg[4096];
    snprintf(msg, sizeof msg, "%s", clef_last_error());
    for (int i = 0; i < n; i++) {
        const size_t lt = strlen(tmps[i]), lg = strlen(targets[i]);
        char *p;
        while (lt && (p = strstr(msg, tmps[i])) && strlen(msg) - lt + lg < sizeof msg) {
            memmove(p + lg, p + lt, strlen(p + lt) + 1);
            memcpy(p, targets[i], lg);
        }
    }
    fprintf(stderr, "clef: error: %s\n", *msg ? msg : clef_strerror(status));
    switch (status) {
    case CLEF_OK: return CLI_EXIT_OK;
    case CLEF_EINVAL: return CLI_EXIT_INVALID;
    case CLEF_EIO: return CLI_EXIT_IO;
    case CLEF_EFORMAT: return CLI_EXIT_FORMAT;
    case CLEF_ENUMERIC: return CLI_EXIT_NUMERIC;
    case CLEF_EUNSUP: return CLI_EXIT_UNSUP;
    case CLEF_ENOMEM: return CLI_EXIT_NOMEM;
    default: return CLI_EXIT_INVALID;
    }
}

int cli_usage_error(const char *cmd, const char *fmt, ...)
{
    va_list ap;
    fprintf(stderr, "clef %s: ", cmd);
    va_start(ap, fmt);
    vfprintf(stderr, fmt, ap);
    va_end(ap);
    fprintf(stderr, "\nTry 'clef %s --help'.\n", cmd);
    return CLI_EXIT_USAGE;
}

int cli_parse_long(const char *cmd, const char *opt, const char *s, long *out)
{
    char *end;
    errno = 0;
    long v = strtol(s, &end, 10);
    if (errno || end == s || *end) {
        cli_usage_error(cmd, "option %s expects an integer, got '%s'", opt, s);
        return 1;
    }
    *out = v;
    return 0;
}

int cli_parse_double(const char *cmd, const char *opt, const char *s, double *out)
{
    char *end;
    errno = 0;
    double v = strtod(s, &end);
    if (errno || end == s || *end || !isfinite(v)) {
        cli_usage_error(cmd, "option %s expects a number, got '%s'", opt, s);
        return 1;
    }
    *out = v;
    return 0;
}

int cli_check_ordering(const char *cmd, const char *ordering)
{
    if (ordering && strcasecmp(ordering, "RING") && strcasecmp(ordering, "NESTED")) {
        cli_usage_error(cmd, "--ordering expects RING or NESTED, got '%s'", ordering);
        return 1;
    }
    return 0;
}

int cli_set_threads(const char *cmd, const char *s)
{
    long n;
    if (cli_parse_long(cmd, "--threads", s, &n))
        return 1;
    if (n < 0 || n > 1024) {
        cli_usage_error(cmd, "--threads must be between 0 and 1024, got %ld", n);
        return 1;
    }
    if (n > 0)
        omp_set_num_threads((int)n);
    return 0;
}

void cli_info(const char *fmt, ...)
{
    if (cli_verbosity < 1)
        return;
    va_list ap;
    va_start(ap, fmt);
    fputs("clef: ", stderr);
    vfprintf(stderr, fmt, ap);
    fputc('\n', stderr);
    va_end(ap);
}

void cli_verbose(const char *fmt, ...)
{
    if (cli_verbosity < 2)
        return;
    va_list ap;
    va_start(ap, fmt);
    fputs("clef: ", stderr);
    vfprintf(stderr, fmt, ap);
    fputc('\n', stderr);
    va_end(ap);
}

/* Write the JSON text atomically (temporary file, then rename). */
int cli_write_json(const char *path, const cJSON *j)
{
    char *text = cJSON_Print(j);
    if (!text) {
        fprintf(stderr, "clef: error: out of memory formatting JSON\n");
        return CLI_EXIT_NOMEM;
    }
    clef_outfile of;
    int status = clef_outfile_begin(&of, path);
    if (status != CLEF_OK) {
        free(text);
        return cli_fail(status);
    }
    FILE *f = fopen(of.tmp_path, "w");
    int bad = !f;
    if (f) {
        bad = fputs(text, f) < 0 || fputc('\n', f) == EOF;
        bad |= fclose(f) != 0;
    }
    free(text);
    if (bad) {
        const int e = errno;
        char why[256];
        clef_write_reason(path, e, why, sizeof why);
        clef_outfile_abort(&of);
        fprintf(stderr, "clef: error: cannot write '%s': %s\n", path, *why ? why : strerror(e));
        return CLI_EXIT_IO;
    }
    status = clef_outfile_commit(&of);
    return status == CLEF_OK ? CLI_EXIT_OK : cli_fail(status);
}

static void number_or_null(cJSON *o, const char *key, double v)
{
    if (isfinite(v))
        cJSON_AddNumberToObject(o, key, v);
    else
        cJSON_AddNullToObject(o, key);
}

cJSON *cli_json_numbers(const double *v, int n)
{
    cJSON *a = cJSON_CreateArray();
    for (int i = 0; i < n; i++)
        cJSON_AddItemToArray(a, cJSON_CreateNumber(isfinite(v[i]) ? v[i] : 0.0));
    return a;
}

void cli_peak_json(cJSON *o, const clef_peak_result *r, const clef_peak_opts *po)
{
    static const char *const windows[] = {"table", "top-hat", "point"};
    cJSON_AddStringToObject(o, "model", CLEF_PEAK_MODEL_NAME);
    if (po) {
        cJSON *s = cJSON_AddObjectToObject(o, "settings");
        cJSON_AddNumberToObject(s, "l_min", po->l_min);
        cJSON_AddNumberToObject(s, "l_max", po->l_max);
        number_or_null(s, "half_width", r->half_width);
        cJSON_AddNumberToObject(s, "curvature_sigma_min", po->curv_nsigma);
        number_or_null(s, "shape_prior", r->shape_prior);
        cJSON_AddNumberToObject(s, "error_draws", po->draws);
        if (r->windows >= 0 && r->windows <= 2)
            cJSON_AddStringToObject(s, "windows", windows[r->windows]);
    }
    cJSON_AddBoolToObject(o, "found", r->found);
    if (!r->found)
        cJSON_AddStringToObject(o, "reason", r->reason);
    if (isfinite(r->curv_signif))
        cJSON_AddNumberToObject(o, "curvature_signif", r->curv_signif);
    if (r->nbins_used > 0) {
        cJSON_AddNumberToObject(o, "bins_used", r->nbins_used);
        cJSON_AddNumberToObject(o, "bin_first", r->bin_first);
        cJSON_AddNumberToObject(o, "bin_last", r->bin_last);
    }
    if (!r->found)
        return;
    cJSON_AddNumberToObject(o, "l_peak", r->l_peak);
    cJSON_AddNumberToObject(o, "l_peak_err", r->l_peak_err);
    number_or_null(o, "l_peak_err_stat", r->l_peak_err_stat);
    number_or_null(o, "l_peak_err_shape", r->l_peak_err_shape);
    number_or_null(o, "l_peak_err_first_order", r->l_peak_err_lin);
    if (r->draws > 0)
        cJSON_AddNumberToObject(o, "error_draws_found", r->draws_found);
    cJSON_AddNumberToObject(o, "d_peak_uK2", r->d_peak);
    cJSON_AddNumberToObject(o, "d_peak_err_uK2", r->d_peak_err);
    number_or_null(o, "corr_l_d", r->corr);
    cJSON_AddNumberToObject(o, "angular_scale_deg", r->theta_deg);
    cJSON_AddNumberToObject(o, "angular_scale_err_deg", r->theta_deg_err);
    number_or_null(o, "width", r->width);
    cJSON_AddNumberToObject(o, "chi2", r->chi2);
    cJSON_AddNumberToObject(o, "dof", r->dof);
    number_or_null(o, "p_value", r->p_value);
}

/* 1 when `path` names standard output ("-", /dev/stdout, fd 1). */
int cli_is_stdout(const char *path)
{
    return !strcmp(path, "-") || !strcmp(path, "/dev/stdout") || !strcmp(path, "/dev/fd/1") ||
           !strcmp(path, "/proc/self/fd/1");
}

/* The folder part of `path` made absolute and free of links, followed by
 * its last component: a name two spellings of one new file share. */
static int canonical_new(const char *path, char *out, size_t n)
{
    const char *slash = strrchr(path, '/');
    char dir[4096];
    if (!slash)
        snprintf(dir, sizeof dir, ".");
    else if (slash == path)
        snprintf(dir, sizeof dir, "/");
    else
        snprintf(dir, sizeof dir, "%.*s", (int)(slash - path), path);
    char real[PATH_MAX_CLI];
    if (!realpath(dir, real))
        return 0;
    return snprintf(out, n, "%s/%s", real, slash ? slash + 1 : path) < (int)n;
}

/* 1 when a and b are the same file: the same device and inode once links
 * are followed (symbolic and hard links alike), or, for files that do not
 * exist yet, the same canonical name. */
int cli_same_file(const char *a, const char *b)
{
    struct stat sa, sb;
    const int ea = stat(a, &sa) == 0, eb = stat(b, &sb) == 0;
    if (ea && eb)
        return sa.st_dev == sb.st_dev && sa.st_ino == sb.st_ino;
    if (ea || eb)
        return 0;
    char ca[8192], cb[8192];
    return canonical_new(a, ca, sizeof ca) && canonical_new(b, cb, sizeof cb) && !strcmp(ca, cb);
}

int cli_check_outputs(const char *const *inputs, int nin, const char *const *outputs, int nout)
{
    for (int k = 0; k < nout; k++) {
        const char *o = outputs[k];
        if (!o)
            continue;
        if (cli_is_stdout(o)) {
            stdout_taken = 1;
            continue;
        }
        for (int i = 0; i < nin; i++)
            if (inputs[i] && cli_same_file(o, inputs[i])) {
                fprintf(stderr,
                        "clef: error: output '%s' is the input file '%s'%s: refusing to "
                        "overwrite an input (choose another output name)\n",
                        o, inputs[i], strcmp(o, inputs[i]) ? " (the same file under another name)" : "");
                return CLI_EXIT_INVALID;
            }
        for (int j = 0; j < k; j++)
            if (outputs[j] && !cli_is_stdout(outputs[j]) && cli_same_file(o, outputs[j])) {
                fprintf(stderr, "clef: error: outputs '%s' and '%s' are the same file\n",
                        outputs[j], o);
                return CLI_EXIT_INVALID;
            }
        /* A folder that is missing or takes no new file fails now, before
         * the computation, not after it. */
        const int status = clef_outfile_check(o);
        if (status != CLEF_OK)
            return cli_fail(status);
    }
    return CLI_EXIT_OK;
}

FILE *cli_text_stream(void) { return stdout_taken ? stderr : stdout; }

/* Descriptor 1 pointed at stderr while a text summary is printed with
 * printf, when standard output carries a file. */
static int saved_stdout = -1;

void cli_text_begin(void)
{
    if (!stdout_taken || saved_stdout >= 0)
        return;
    fflush(stdout);
    saved_stdout = dup(STDOUT_FILENO);
    if (saved_stdout >= 0)
        dup2(STDERR_FILENO, STDOUT_FILENO);
}

void cli_text_end(void)
{
    if (saved_stdout < 0)
        return;
    fflush(stdout);
    dup2(saved_stdout, STDOUT_FILENO);
    close(saved_stdout);
    saved_stdout = -1;
}

cJSON *cli_summary_begin(int argc, char **argv)
{
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "program", "clef");
    cJSON_AddStringToObject(root, "version", CLEF_VERSION);
    char cmd[4096] = "";
    for (int i = 0; i < argc; i++) {
        strncat(cmd, i ? " " : "clef ", sizeof cmd - strlen(cmd) - 1);
        strncat(cmd, argv[i], sizeof cmd - strlen(cmd) - 1);
    }
    cJSON_AddStringToObject(root, "command", cmd);
    char when[32];
    time_t now = time(NULL);
    strftime(when, sizeof when, "%Y-%m-%dT%H:%M:%SZ", gmtime(&now));
    cJSON_AddStringToObject(root, "finished_utc", when);
    return root;
}

int cli_parse_formats(const char *cmd, const char *s, int *fits, int *csv, int *json)
{
    *fits = *csv = *json = 0;
    char buf[256];
    snprintf(buf, sizeof buf, "%s", s);
    for (char *tok = strtok(buf, ","); tok; tok = strtok(NULL, ",")) {
        if (!strcmp(tok, "fits"))
            *fits = 1;
        else if (!strcmp(tok, "csv"))
            *csv = 1;
        else if (!strcmp(tok, "json"))
            *json = 1;
        else
            return cli_usage_error(cmd, "--format: unknown format '%s' (fits, csv, json)", tok);
    }
    return 0;
}
