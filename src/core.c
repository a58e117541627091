/* Status codes, last-error messages, log and progress hooks, atomic output
 * files, and the wall clock. */
#define _DEFAULT_SOURCE /* madvise */
#include "core_impl.h"

#include <errno.h>
#include <fcntl.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <sys/mman.h>
#include <sys/stat.h>
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

/* Paths that name an open descriptor rather than a file: writing them by
 * rename would replace the link (as root, even the device node), so they
 * are streamed into the descriptor instead.  Returns its number, else -1. */
static int named_descriptor(const char *path)
{
    if (!strcmp(path, "-") || !strcmp(path, "/dev/stdout"))
        return STDOUT_FILENO;
    if (!strcmp(path, "/dev/stderr"))
        return STDERR_FILENO;
    const char *num = !strncmp(path, "/dev/fd/", 8)         ? path + 8
                      : !strncmp(path, "/proc/self/fd/", 14) ? path + 14
                                                             : NULL;
    if (!num || !*num)
        return -1;
    char *end;
    const long fd = strtol(num, &end, 10);
    return *end || fd < 0 || fd > 1 << 20 ? -1 : (int)fd;
}

/* The file a write to `path` must end up in: the path itself, or, for a
 * symbolic link (also a dangling one), the file it points to, so that the
 * link survives and its target is written.  Fails on a loop or a name too
 * long. */
static int resolve_target(const char *path, char *out, size_t n)
{
    char cur[4096], link[4096];
    if (strlen(path) >= sizeof cur)
        CLEF_FAIL(CLEF_EINVAL, "output path too long: '%s'", path);
    strcpy(cur, path);
    for (int depth = 0; depth < 40; depth++) {
        struct stat st;
        if (lstat(cur, &st) != 0 || !S_ISLNK(st.st_mode)) {
            if (strlen(cur) >= n)
                CLEF_FAIL(CLEF_EINVAL, "output path too long: '%s'", cur);
            strcpy(out, cur);
            return CLEF_OK;
        }
        const ssize_t k = readlink(cur, link, sizeof link - 1);
        if (k < 0)
            CLEF_FAIL(CLEF_EIO, "cannot read the symbolic link '%s': %s", cur, strerror(errno));
        link[k] = '\0';
        if (link[0] == '/') {
            strcpy(cur, link);
        } else { /* relative to the link's folder */
            const char *slash = strrchr(cur, '/');
            const int dirlen = slash ? (int)(slash - cur) + 1 : 0;
            char next[4096];
            if (snprintf(next, sizeof next, "%.*s%s", dirlen, cur, link) >= (int)sizeof next)
                CLEF_FAIL(CLEF_EINVAL, "output path too long behind the link '%s'", path);
            strcpy(cur, next);
        }
    }
    CLEF_FAIL(CLEF_EIO, "output '%s': too many levels of symbolic links", path);
}

int clef_outfile_begin(clef_outfile *o, const char *path)
{
    memset(o, 0, sizeof *o);
    if (!path || !*path)
        CLEF_FAIL(CLEF_EINVAL, "output path is empty");
    if (strlen(path) + 32 >= sizeof o->tmp_path)
        CLEF_FAIL(CLEF_EINVAL, "output path too long: '%s'", path);
    struct stat st;
    const int exists = stat(path, &st) == 0;
    if (exists && S_ISDIR(st.st_mode))
        CLEF_FAIL(CLEF_EIO, "output '%s' is a folder, not a file", path);
    if (named_descriptor(path) >= 0 || (exists && !S_ISREG(st.st_mode))) {
        /* Standard output, a device or a pipe: written to a temporary file
         * first (so a failure still writes nothing) and copied in at commit. */
        strcpy(o->path, path);
        o->stream = 1;
        const char *dir = getenv("TMPDIR");
        if (snprintf(o->tmp_path, sizeof o->tmp_path, "%s/.clef-stream.tmp-XXXXXX",
                     dir && *dir ? dir : "/tmp") >= (int)sizeof o->tmp_path)
            CLEF_FAIL(CLEF_EINVAL, "TMPDIR too long: '%s'", dir);
    } else {
        CLEF_TRY(resolve_target(path, o->path, sizeof o->path - 32));
        /* Temporary name in the target's folder: "<dir>/.<base>.tmp-XXXXXX". */
        const char *slash = strrchr(o->path, '/');
        size_t dirlen = slash ? (size_t)(slash - o->path) + 1 : 0;
        if (snprintf(o->tmp_path, sizeof o->tmp_path, "%.*s.%s.tmp-XXXXXX", (int)dirlen,
                     o->path, o->path + dirlen) >= (int)sizeof o->tmp_path)
            CLEF_FAIL(CLEF_EINVAL, "output path too long: '%s'", o->path);
    }
    int fd = mkstemp(o->tmp_path);
    if (fd < 0)
        CLEF_FAIL(CLEF_EIO, "cannot create a temporary file next to '%s': %s", o->path,
                  strerror(errno));
    /* mkstemp creates mode 0600; give the output the usual umask-based mode. */
    mode_t mask = umask(0);
    umask(mask);
    fchmod(fd, 0666 & ~mask);
    close(fd);
    o->active = 1;
    return CLEF_OK;
}

int clef_outfile_check(const char *path)
{
    clef_outfile o;
    CLEF_TRY(clef_outfile_begin(&o, path));
    clef_outfile_abort(&o);
    return CLEF_OK;
}

/* Copy the finished temporary file into the descriptor, device or pipe. */
static int stream_out(const clef_outfile *o)
{
    int out = named_descriptor(o->path);
    const int own = out < 0;
    if (own)
        out = open(o->path, O_WRONLY | O_APPEND);
    else if (out == STDOUT_FILENO)
        fflush(stdout); /* keep the order of what the caller printed before */
    if (out < 0)
        CLEF_FAIL(CLEF_EIO, "cannot open '%s' for writing: %s", o->path, strerror(errno));
    const char *name = !strcmp(o->path, "-") ? "standard output" : o->path;
    const int in = open(o->tmp_path, O_RDONLY);
    int status = CLEF_OK;
    if (in < 0) {
        status = clef_fail(CLEF_EIO, "cannot reopen '%s': %s", o->tmp_path, strerror(errno));
    } else {
        char buf[65536];
        ssize_t k;
        while (status == CLEF_OK && (k = read(in, buf, sizeof buf)) != 0) {
            if (k < 0 && errno == EINTR)
                continue;
            if (k < 0) {
                status = clef_fail(CLEF_EIO, "cannot read '%s': %s", o->tmp_path, strerror(errno));
                break;
            }
            for (ssize_t done = 0; done < k;) {
                const ssize_t w = write(out, buf + done, (size_t)(k - done));
                if (w < 0 && errno == EINTR)
                    continue;
                if (w < 0) {
                    status = clef_fail(CLEF_EIO, "cannot write '%s': %s", name, strerror(errno));
                    break;
                }
                done += w;
            }
        }
        close(in);
    }
    if (own && close(out) != 0 && status == CLEF_OK)
        status = clef_fail(CLEF_EIO, "cannot write '%s': %s", name, strerror(errno));
    return status;
}

int clef_outfile_commit(clef_outfile *o)
{
    if (!o->active)
        CLEF_FAIL(CLEF_EINVAL, "output file '%s' was not begun", o->path);
    if (o->stream) {
        const int status = stream_out(o);
        unlink(o->tmp_path);
        o->active = 0;
        return status;
    }
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
