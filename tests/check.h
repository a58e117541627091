/* Shared test helpers: cmocka, tolerance checks that print the expected
 * value, the actual value and the source, a scratch folder, and paths to
 * the clef binary and the reference Python. */
#ifndef CLEF_TEST_CHECK_H
#define CLEF_TEST_CHECK_H

#define _GNU_SOURCE
#include <float.h>
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>
#include <sys/stat.h>
#include <sys/wait.h>

#include <cmocka.h>

/* Relative check: |actual - expected| <= rtol * |expected|. */
#define check_rel(actual, expected, rtol, source)                                        \
    do {                                                                                 \
        double a_ = (actual), e_ = (expected), t_ = (rtol);                              \
        if (!(fabs(a_ - e_) <= t_ * fabs(e_))) {                                         \
            fail_msg("%s: expected %.17g, got %.17g (rel err %.3g > %.3g) [%s]", #actual, \
                     e_, a_, e_ != 0 ? fabs(a_ - e_) / fabs(e_) : INFINITY, t_, source);  \
        }                                                                                \
    } while (0)

/* Absolute check: |actual - expected| <= atol. */
#define check_abs(actual, expected, atol, source)                                      \
    do {                                                                               \
        double a_ = (actual), e_ = (expected), t_ = (atol);                            \
        if (!(fabs(a_ - e_) <= t_)) {                                                  \
            fail_msg("%s: expected %.17g, got %.17g (abs err %.3g > %.3g) [%s]", #actual, \
                     e_, a_, fabs(a_ - e_), t_, source);                               \
        }                                                                              \
    } while (0)

/* A scratch folder for this test program, made once, removed by run.sh's
 * parent folder cleanup.  Returns "<dir>/<name>" in a static buffer ring. */
static inline const char *test_path(const char *name)
{
    static char dir[512];
    static char bufs[8][1024];
    static int next;
    if (!dir[0]) {
        const char *base = getenv("CLEF_TEST_TMP");
        snprintf(dir, sizeof dir, "%s/clef-test-XXXXXX", base && *base ? base : "/tmp");
        if (!mkdtemp(dir)) {
            perror("mkdtemp");
            abort();
        }
    }
    char *b = bufs[next++ % 8];
    snprintf(b, 1024, "%s/%s", dir, name);
    return b;
}

static inline int file_exists(const char *path)
{
    struct stat st;
    return stat(path, &st) == 0;
}

/* The clef binary under test and the Python with Debian's astropy/numpy. */
static inline const char *clef_bin(void)
{
    const char *b = getenv("CLEF_BIN");
    return b && *b ? b : "build/clef";
}
static inline const char *ref_python(void)
{
    const char *p = getenv("CLEF_PYTHON");
    return p && *p ? p : "/usr/bin/python3";
}

/* Run a shell command; return its exit status (or -1). */
static inline int run_cmd(const char *fmt, ...)
{
    char cmd[8192];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(cmd, sizeof cmd, fmt, ap);
    va_end(ap);
    int st = system(cmd);
    if (st == -1)
        return -1;
    return WIFEXITED(st) ? WEXITSTATUS(st) : -1;
}

/* 1 when the long tests are asked for (make check-long). */
static inline int test_long(void) { return getenv("CLEF_LONG") != NULL; }
/* 1 under the sanitizer build: heavy statistical tests shrink. */
static inline int test_sanitize(void) { return getenv("CLEF_SANITIZE") != NULL; }

#endif
