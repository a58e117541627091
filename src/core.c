/* Status codes, last-error messages, log and progress hooks, atomic output
 * files, and the wall clock. */
#define _GNU_SOURCE /* madvise, mkstemps */
#include "core_impl.h"

#include <dirent.h>
#include <errno.h>
#include <fcntl.h>
#include <pthread.h>
#include <signal.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <sys/mman.h>
#include <sys/stat.h>
#include <sys/statvfs.h>
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

/* ------------------------------------------------------------------------
 * Temporary files
 *
 * Every temporary clef creates is named
 *     <folder>/.<label>.clef-tmp.<pid>.<host>.<6 random characters><suffix>
 * (label: the target's base name, possibly shortened; omitted for gzip
 * scratch files, whose names must hold ".gz" only at the end), so that
 *  - a signal handler can remove the live ones (clef_temp_remove_all: the
 *    registry below, read without locks, unlink() only), and
 *  - a later run removes stale ones of its own: those of this host whose
 *    process is gone (kill(pid, 0) fails with ESRCH), found when it next
 *    creates a temporary in that folder.  Temporaries of other hosts (a
 *    shared file system) are left alone: their process cannot be checked.
 * ------------------------------------------------------------------------ */

#define TEMP_TAG ".clef-tmp."
#define MAX_TEMPS 64

static struct temp_slot {
    volatile sig_atomic_t used;
    char path[4096];
} temps[MAX_TEMPS];
static pthread_mutex_t temps_lock = PTHREAD_MUTEX_INITIALIZER;

/* Folders already swept for stale temporaries by this process. */
#define MAX_SWEPT 16
static char swept[MAX_SWEPT][512];
static int nswept;

static void temp_register(const char *path)
{
    pthread_mutex_lock(&temps_lock);
    for (int i = 0; i < MAX_TEMPS; i++)
        if (!temps[i].used) {
            snprintf(temps[i].path, sizeof temps[i].path, "%s", path);
            __atomic_store_n(&temps[i].used, 1, __ATOMIC_RELEASE);
            break;
        }
    pthread_mutex_unlock(&temps_lock);
}

void clef_temp_forget(const char *path)
{
    pthread_mutex_lock(&temps_lock);
    for (int i = 0; i < MAX_TEMPS; i++)
        if (temps[i].used && !strcmp(temps[i].path, path)) {
            __atomic_store_n(&temps[i].used, 0, __ATOMIC_RELEASE);
            break;
        }
    pthread_mutex_unlock(&temps_lock);
}

void clef_temp_remove_all(void)
{
    for (int i = 0; i < MAX_TEMPS; i++)
        if (__atomic_load_n(&temps[i].used, __ATOMIC_ACQUIRE))
            unlink(temps[i].path);
}

/* This host's name reduced to [A-Za-z0-9-] (at most 40 characters), so a
 * temporary name parses back unambiguously. */
static void host_tag(char *out, size_t n)
{
    char h[256] = "";
    if (gethostname(h, sizeof h - 1) != 0 || !h[0])
        snprintf(h, sizeof h, "localhost");
    size_t k = 0;
    for (size_t i = 0; h[i] && k + 1 < n && k < 40; i++) {
        const char ch = h[i];
        const int ok = (ch >= 'a' && ch <= 'z') || (ch >= 'A' && ch <= 'Z') ||
                       (ch >= '0' && ch <= '9') || ch == '-';
        out[k++] = ok ? ch : '-';
    }
    out[k] = '\0';
}

int clef_temp_parse(const char *name, long *pid, char *host, size_t hostn)
{
    /* The last tag: a temporary made next to another temporary carries both. */
    const char *t = NULL;
    for (const char *p = strstr(name, TEMP_TAG); p; p = strstr(p + 1, TEMP_TAG))
        t = p;
    if (!t)
        return 0;
    const char *p = t + strlen(TEMP_TAG);
    char *end;
    errno = 0;
    const long v = strtol(p, &end, 10);
    if (errno || end == p || v <= 0 || *end != '.')
        return 0;
    const char *h = end + 1;
    const char *dot = strchr(h, '.');
    if (!dot || dot == h || (size_t)(dot - h) >= hostn)
        return 0;
    for (const char *q = h; q < dot; q++)
        if (!((*q >= 'a' && *q <= 'z') || (*q >= 'A' && *q <= 'Z') || (*q >= '0' && *q <= '9') ||
              *q == '-'))
            return 0;
    const char *rnd = dot + 1;
    for (int i = 0; i < 6; i++)
        if (!rnd[i] || rnd[i] == '.' || rnd[i] == '/')
            return 0;
    if (rnd[6] && strcmp(rnd + 6, ".gz"))
        return 0;
    memcpy(host, h, (size_t)(dot - h));
    host[dot - h] = '\0';
    *pid = v;
    return 1;
}

int clef_temp_sweep(const char *dir)
{
    char me[64];
    host_tag(me, sizeof me);
    DIR *d = opendir(dir && *dir ? dir : ".");
    if (!d)
        return 0;
    int removed = 0;
    struct dirent *e;
    while ((e = readdir(d))) {
        long pid;
        char host[64];
        if (e->d_name[0] != '.' || !clef_temp_parse(e->d_name, &pid, host, sizeof host))
            continue;
        if (strcmp(host, me) || pid == (long)getpid())
            continue;
        if (kill((pid_t)pid, 0) == 0 || errno != ESRCH)
            continue; /* alive (or not ours to signal): in use */
        char path[4608];
        snprintf(path, sizeof path, "%s/%s", dir && *dir ? dir : ".", e->d_name);
        struct stat st;
        if (lstat(path, &st) != 0 || !S_ISREG(st.st_mode))
            continue;
        if (unlink(path) == 0) {
            removed++;
            clef_log(CLEF_LOG_INFO, "removed stale temporary '%s' (process %ld has ended)", path,
                     pid);
        }
    }
    closedir(d);
    return removed;
}

/* Sweep each folder once per process. */
static void sweep_once(const char *dir)
{
    pthread_mutex_lock(&temps_lock);
    for (int i = 0; i < nswept; i++)
        if (!strcmp(swept[i], dir)) {
            pthread_mutex_unlock(&temps_lock);
            return;
        }
    /* A folder name too long for the table is swept again next time: harmless. */
    size_t len = strlen(dir);
    if (len < sizeof swept[0]) {
        memcpy(swept[nswept % MAX_SWEPT], dir, len + 1);
        if (nswept < MAX_SWEPT)
            nswept++;
    }
    pthread_mutex_unlock(&temps_lock);
    clef_temp_sweep(dir);
}

int clef_temp_make(char *out, size_t n, const char *next_to, const char *label, const char *suffix)
{
    if (!next_to || !*next_to)
        CLEF_FAIL(CLEF_EINVAL, "output path is empty");
    suffix = suffix ? suffix : "";
    const char *slash = strrchr(next_to, '/');
    const size_t dirlen = slash ? (size_t)(slash - next_to) + 1 : 0;
    char dir[4096];
    snprintf(dir, sizeof dir, "%.*s", dirlen > 1 ? (int)dirlen - 1 : (int)dirlen, next_to);
    char host[64];
    host_tag(host, sizeof host);
    char tail[160];
    snprintf(tail, sizeof tail, "%s%ld.%s.XXXXXX%s", TEMP_TAG, (long)getpid(), host, suffix);
    /* One file name is at most NAME_MAX (255) bytes: shorten the label. */
    size_t lablen = label ? strlen(label) : 0;
    const size_t room = 255 - 1 - strlen(tail);
    if (lablen > room)
        lablen = room;
    const int len = label ? snprintf(out, n, "%.*s.%.*s%s", (int)dirlen, next_to, (int)lablen,
                                     label, tail)
                          : snprintf(out, n, "%.*s%s", (int)dirlen, next_to, tail);
    if (len < 0 || (size_t)len >= n)
        CLEF_FAIL(CLEF_EINVAL, "output path too long: '%s'", next_to);
    sweep_once(dirlen ? dir : ".");
    const int fd = mkstemps(out, (int)strlen(suffix));
    if (fd < 0) {
        const int e = errno;
        CLEF_FAIL(CLEF_EIO, "cannot create a temporary file next to '%s': %s", next_to,
                  strerror(e));
    }
    temp_register(out);
    /* mkstemp creates mode 0600; give the output the usual umask-based mode. */
    mode_t mask = umask(0);
    umask(mask);
    fchmod(fd, 0666 & ~mask);
    close(fd);
    return CLEF_OK;
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
        char where[4096];
        if (snprintf(where, sizeof where, "%s/stream", dir && *dir ? dir : "/tmp") >=
            (int)sizeof where)
            CLEF_FAIL(CLEF_EINVAL, "TMPDIR too long: '%s'", dir);
        CLEF_TRY(clef_temp_make(o->tmp_path, sizeof o->tmp_path, where, "clef-stream", NULL));
    } else {
        CLEF_TRY(resolve_target(path, o->path, sizeof o->path - 32));
        /* Temporary in the target's folder, so the final rename cannot
         * cross file systems. */
        const char *slash = strrchr(o->path, '/');
        const char *base = slash ? slash + 1 : o->path;
        CLEF_TRY(clef_temp_make(o->tmp_path, sizeof o->tmp_path, o->path, base, NULL));
    }
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
        clef_temp_forget(o->tmp_path);
        o->active = 0;
        return status;
    }
    if (rename(o->tmp_path, o->path) != 0) {
        int e = errno;
        char why[160];
        clef_write_reason(o->path, e, why, sizeof why);
        unlink(o->tmp_path);
        clef_temp_forget(o->tmp_path);
        o->active = 0;
        CLEF_FAIL(CLEF_EIO, "cannot write '%s': %s", o->path, why);
    }
    clef_temp_forget(o->tmp_path);
    o->active = 0;
    return CLEF_OK;
}

void clef_outfile_abort(clef_outfile *o)
{
    if (o && o->active) {
        unlink(o->tmp_path);
        clef_temp_forget(o->tmp_path);
        o->active = 0;
    }
}

/* Why writing `target` failed, in words: the condition of its folder's file
 * system when it explains the failure (full, read-only, folder gone), else
 * the errno text, else "". */
const char *clef_write_reason(const char *target, int err, char *buf, size_t n)
{
    char dir[4096];
    const char *slash = target ? strrchr(target, '/') : NULL;
    if (slash == target)
        snprintf(dir, sizeof dir, "/");
    else if (slash)
        snprintf(dir, sizeof dir, "%.*s", (int)(slash - target), target);
    else
        snprintf(dir, sizeof dir, ".");
    struct statvfs fs;
    struct stat st;
    if (err == ENOSPC || err == EDQUOT || err == EROFS || err == EFBIG)
        snprintf(buf, n, "%s", strerror(err));
    else if (stat(dir, &st) != 0 || !S_ISDIR(st.st_mode))
        snprintf(buf, n, "its folder '%s' no longer exists", dir);
    else if (statvfs(dir, &fs) == 0 && (fs.f_flag & ST_RDONLY))
        snprintf(buf, n, "%s", strerror(EROFS));
    else if (statvfs(dir, &fs) == 0 && (fs.f_bavail == 0 || (fs.f_files && fs.f_favail == 0)))
        snprintf(buf, n, "%s", strerror(ENOSPC));
    else if (err)
        snprintf(buf, n, "%s", strerror(err));
    else
        snprintf(buf, n, "%s", "");
    /* "No space left on device" -> lower case, as in the rest of clef's messages */
    if (buf[0] >= 'A' && buf[0] <= 'Z' && buf[1] >= 'a' && buf[1] <= 'z')
        buf[0] = (char)(buf[0] - 'A' + 'a');
    return buf;
}

int clef_write_fail(int code, const char *target, const char *what, const char *lib_text)
{
    const int e = errno;
    char why[256];
    clef_write_reason(target, e == ENOSPC || e == EDQUOT || e == EROFS || e == EFBIG ? e : 0, why,
                      sizeof why);
    if (*why)
        return clef_fail(code, "cannot write '%s': %s", target, why);
    if (lib_text && *lib_text)
        return clef_fail(code, "cannot write '%s': %s (%s)", target, what, lib_text);
    return clef_fail(code, "cannot write '%s': %s%s%s", target, what, e ? ": " : "",
                     e ? strerror(e) : "");
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
