/* Inputs that change under a running job.  Each input's identity and
 * modification state (device, inode, size, mtime and ctime to the
 * nanosecond) is recorded before it is read, and compared again just
 * before the outputs are written: a file replaced (new inode, e.g. by a
 * rename), truncated, appended to or rewritten while clef ran makes the run
 * fail with exit 4 and write nothing, rather than publish a result (and an
 * input checksum) that belongs to no single version of the file. */
#define _POSIX_C_SOURCE 200809L
#include <stdio.h>
#include <string.h>
#include <sys/stat.h>

#include "cli.h"

#define MAX_WATCHED 16

static struct watched {
    const char *path;
    int exists;
    struct stat st;
} watched[MAX_WATCHED];
static int nwatched;

void cli_watch_input(const char *path)
{
    if (!path || nwatched == MAX_WATCHED)
        return;
    for (int i = 0; i < nwatched; i++)
        if (!strcmp(watched[i].path, path))
            return;
    struct watched *w = &watched[nwatched++];
    w->path = path;
    w->exists = stat(path, &w->st) == 0;
}

static int same_time(struct timespec a, struct timespec b)
{
    return a.tv_sec == b.tv_sec && a.tv_nsec == b.tv_nsec;
}

int cli_check_inputs(void)
{
    for (int i = 0; i < nwatched; i++) {
        const struct watched *w = &watched[i];
        struct stat now;
        const int exists = stat(w->path, &now) == 0;
        if (!w->exists)
            continue; /* it was not read (the read reported it) */
        const char *what = NULL;
        char buf[160];
        if (!exists)
            what = "it was removed";
        else if (now.st_dev != w->st.st_dev || now.st_ino != w->st.st_ino)
            what = "it was replaced by another file";
        else if (now.st_size != w->st.st_size) {
            snprintf(buf, sizeof buf, "its size went from %lld to %lld bytes",
                     (long long)w->st.st_size, (long long)now.st_size);
            what = buf;
        } else if (!same_time(now.st_mtim, w->st.st_mtim) ||
                   !same_time(now.st_ctim, w->st.st_ctim))
            what = "it was modified";
        if (what) {
            fprintf(stderr,
                    "clef: error: input '%s' changed while clef was running (%s); the result "
                    "may mix two versions of it, so nothing was written\n",
                    w->path, what);
            return CLI_EXIT_IO;
        }
    }
    return CLI_EXIT_OK;
}
