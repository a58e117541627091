/* Status codes, last-error messages, log and progress hooks, atomic output
 * files, and the wall clock. */
#define _DEFAULT_SOURCE /* madvise */
#include "core_impl.h"

#include <errno.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <sys/mman.h>
#include <sys/stat.h>
#include <sys/sysinfo.h>
#include <unistd.h>

static clef_log_fn log_fn;
static void *log_user;
static clef_progress_fn progress_fn;
static void *progress_user;
static _Thread_local char last_error[2048];

const char *clef_strerror(int status)
{
    switch (status) {
    case CLEF_OK: return "success";
    case CLEF_EINVAL: return "invalid argument";
    case CLEF_ENOMEM: return "out of memory";
    case CLEF_EIO: return "input/output error";
    case CLEF_EFORMAT: return "bad file format";
    case CLEF_ENUMERIC: return "numerical failure";
    case CLEF_EUNSUP: return "unsupported request";
    default: return "unknown status";
    }
}

const char *clef_last_error(void) { return last_error; }

void clef_set_log(clef_log_fn fn, void *user)
{
    log_fn = fn;
    log_user = user;
}

void clef_set_progress(clef_progress_fn fn, void *user)
{
    progress_fn = fn;
    progress_user = user;
}

int clef_fail(int status, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(last_error, sizeof last_error, fmt, ap);
    va_end(ap);
    if (log_fn)
        log_fn(log_user, CLEF_LOG_ERROR, last_error);
    return status;
}

void clef_log(int level, const char *fmt, ...)
{
    if (!log_fn)
        return;
    char msg[2048];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(msg, sizeof msg, fmt, ap);
    va_end(ap);
    log_fn(log_user, level, msg);
}

void clef_progress(const char *stage, double fraction)
{
    if (progress_fn)
        progress_fn(progress_user, stage, fraction);
}

int clef_outfile_begin(clef_outfile *o, const char *path)
{
    memset(o, 0, sizeof *o);
    if (!path || !*path)
        CLEF_FAIL(CLEF_EINVAL, "output path is empty");
    if (strlen(path) + 32 >= sizeof o->tmp_path)
        CLEF_FAIL(CLEF_EINVAL, "output path too long: '%s'", path);
    strcpy(o->path, path);
    /* Temporary name in the same folder: "<dir>/.<base>.tmp-XXXXXX". */
    const char *slash = strrchr(path, '/');
    size_t dirlen = slash ? (size_t)(slash - path) + 1 : 0;
    snprintf(o->tmp_path, sizeof o->tmp_path, "%.*s.%s.tmp-XXXXXX", (int)dirlen, path,
             path + dirlen);
    int fd = mkstemp(o->tmp_path);
    if (fd < 0)
        CLEF_FAIL(CLEF_EIO, "cannot create a temporary file next to '%s': %s", path,
                  strerror(errno));
    /* mkstemp creates mode 0600; give the output the usual umask-based mode. */
    mode_t mask = umask(0);
    umask(mask);
    fchmod(fd, 0666 & ~mask);
    close(fd);
    o->active = 1;
    return CLEF_OK;
}

int clef_outfile_commit(clef_outfile *o)
{
    if (!o->active)
        CLEF_FAIL(CLEF_EINVAL, "output file '%s' was not begun", o->path);
    if (rename(o->tmp_path, o->path) != 0) {
        int e = errno;
        unlink(o->tmp_path);
        o->active = 0;
        CLEF_FAIL(CLEF_EIO, "cannot rename '%s' to '%s': %s", o->tmp_path, o->path,
                  strerror(e));
    }
    o->active = 0;
    return CLEF_OK;
}

void clef_outfile_abort(clef_outfile *o)
{
    if (o && o->active) {
        unlink(o->tmp_path);
        o->active = 0;
    }
}

double clef_wtime(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

/* Large arrays are written right after allocation: with 4 KiB pages the
 * first-touch page faults cost about 0.3 s per 100 MB on a virtual
 * machine (a fifth of the coupling time at lmax 2048, a third of the
 * preparation of an nside 1024 spectrum).  Ask for transparent huge pages
 * where the system offers them (Linux madvise; a hint, ignored elsewhere). */
void *clef_alloc_large(size_t bytes)
{
    /* More than the machine's memory and swap can never be backed: refuse
     * it here rather than let an overcommitted allocation be killed on
     * first touch (the caller reports CLEF_ENOMEM with the size). */
    struct sysinfo si;
    if (sysinfo(&si) == 0) {
        const double limit = ((double)si.totalram + (double)si.totalswap) * si.mem_unit;
        if ((double)bytes > limit)
            return NULL;
    }
#ifdef MADV_HUGEPAGE
    const size_t huge = (size_t)2 << 20;
    if (bytes >= 2 * huge) {
        void *p = NULL;
        if (posix_memalign(&p, huge, bytes) != 0)
            return NULL;
        madvise(p, bytes, MADV_HUGEPAGE);
        return p;
    }
#endif
    return malloc(bytes);
}
