/* clef: HEALPix sky maps to angular power spectra.
 *
 * Core definitions shared by every module: status codes, the error message
 * of the last failed call, the log hook, the progress hook, the version, and
 * the atomic output-file helper.  Including this header alone gives the core;
 * include/clef/all.h pulls in every module.
 *
 * Thread safety: clef_set_log() and clef_set_progress() must be called once,
 * before any threads run library code.  The last-error message is kept per
 * thread.
 */
#ifndef CLEF_CLEF_H
#define CLEF_CLEF_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

#define CLEF_VERSION "0.1.0"

/* Status codes returned by every fallible library call.  The command-line
 * tool maps each to a documented exit code (docs/exit-codes.md). */
enum clef_status {
    CLEF_OK = 0,       /* success */
    CLEF_EINVAL = 1,   /* an argument or option value is invalid */
    CLEF_ENOMEM = 2,   /* memory allocation failed */
    CLEF_EIO = 3,      /* a file could not be opened, read, written or renamed */
    CLEF_EFORMAT = 4,  /* a file was read but its content breaks the expected format */
    CLEF_ENUMERIC = 5, /* a numerical failure: singular or ill-conditioned system, no convergence */
    CLEF_EUNSUP = 6    /* a valid request that clef does not support */
};

/* Short text for a status code ("invalid argument", ...). Never NULL. */
const char *clef_strerror(int status);

/* The full message of the last failure on this thread (names the file, HDU,
 * keyword or value at fault), or "" if none.  Valid until the next failing
 * call on the same thread. */
const char *clef_last_error(void);

/* Log levels passed to the log hook. */
enum clef_log_level {
    CLEF_LOG_ERROR = 0,
    CLEF_LOG_WARN = 1,
    CLEF_LOG_INFO = 2,
    CLEF_LOG_DEBUG = 3
};

/* The library never prints: every message goes to this hook.  With no hook
 * installed (the default) messages are dropped.  Errors are also kept for
 * clef_last_error().  The hook may be called from several threads at once
 * only for CLEF_LOG_DEBUG; errors, warnings and info come from the calling
 * thread. */
typedef void (*clef_log_fn)(void *user, int level, const char *msg);
void clef_set_log(clef_log_fn fn, void *user);

/* Progress of a long stage (coupling matrix, iterations, simulations):
 * stage is a short name, fraction in [0, 1].  Called from the calling
 * thread only, at most a few hundred times per stage.  Default: none. */
typedef void (*clef_progress_fn)(void *user, const char *stage, double fraction);
void clef_set_progress(clef_progress_fn fn, void *user);

/* Atomic output files.  begin() makes a unique temporary file next to
 * `path` (same folder, so the final rename cannot cross file systems);
 * the caller writes `tmp_path` by any means (stdio, CFITSIO with a leading
 * '!' to overwrite); commit() renames it onto `path`; abort() deletes it.
 * A failure therefore never leaves a partial output.
 *
 * A `path` that is a symbolic link is written through: the file the link
 * points to is replaced and the link kept (`path` then holds the target).
 * "-" means standard output, and paths naming a descriptor (/dev/stdout,
 * /dev/fd/N, /proc/self/fd/N) or an existing non-regular file (a device,
 * a pipe) are streamed into: the temporary file lies in $TMPDIR (else
 * /tmp) and commit() copies it in, so nothing is written on failure there
 * either.  A folder is refused (CLEF_EIO). */
typedef struct clef_outfile {
    char path[4096];
    char tmp_path[4096];
    int active;
    int stream;      /* 1: commit() copies into `path` (or stdout for "-") */
} clef_outfile;

int clef_outfile_begin(clef_outfile *o, const char *path);
int clef_outfile_commit(clef_outfile *o);
void clef_outfile_abort(clef_outfile *o); /* no-op when not active */
/* Check before a long computation that `path` can be written: begin() and
 * abort(), so the folder exists and takes a new file.  CLEF_EIO naming the
 * path otherwise. */
int clef_outfile_check(const char *path);

/* Temporary files (docs/reliability.md).  Every temporary clef creates is
 * named "<folder>/.<label>.clef-tmp.<pid>.<host>.XXXXXX<suffix>" and kept
 * in a process-wide registry until it is renamed or removed.
 *
 * clef_temp_make: create an empty, registered temporary in the folder of
 * `next_to` (label NULL: no label; suffix e.g. ".gz" or NULL).  Before the
 * first temporary in a folder, stale temporaries of this host whose
 * process has ended are removed (clef_temp_sweep).  CLEF_EIO when the
 * folder is missing or not writable.
 * clef_temp_forget: take a renamed or removed temporary off the registry.
 * clef_temp_remove_all: unlink every registered temporary; only unlink()
 * is called, so it is safe in a signal handler (the command-line tool
 * calls it on SIGINT, SIGTERM and SIGHUP).
 * clef_temp_sweep: remove stale temporaries of this host in `dir` now;
 * returns how many.  clef_temp_parse: 1 if `name` (a file name) is a clef
 * temporary, with its pid and host. */
int clef_temp_make(char *out, size_t n, const char *next_to, const char *label, const char *suffix);
void clef_temp_forget(const char *path);
void clef_temp_remove_all(void);
int clef_temp_sweep(const char *dir);
int clef_temp_parse(const char *name, long *pid, char *host, size_t hostn);

/* Why writing `target` failed, in words, for messages: "no space left on
 * device", "disk quota exceeded", "read-only file system", "its folder
 * '...' no longer exists", or strerror(err) (err may be 0; then "" when
 * nothing is known).  Looks at the target folder's file system, so call it
 * before removing the failed temporary.  Returns buf. */
const char *clef_write_reason(const char *target, int err, char *buf, size_t n);

/* Wall-clock seconds from an arbitrary origin (monotonic), for stage timings. */
double clef_wtime(void);

#ifdef __cplusplus
}
#endif
#endif
