/* Private helpers shared by the library's modules: error reporting, logging
 * and progress.  Not installed. */
#ifndef CLEF_CORE_IMPL_H
#define CLEF_CORE_IMPL_H

#include "clef/clef.h"

#if defined(__GNUC__)
#define CLEF_PRINTF(a, b) __attribute__((format(printf, a, b)))
#else
#define CLEF_PRINTF(a, b)
#endif

/* Record `msg` as this thread's last error, pass it to the log hook, and
 * return `status`. */
int clef_fail(int status, const char *fmt, ...) CLEF_PRINTF(2, 3);
void clef_log(int level, const char *fmt, ...) CLEF_PRINTF(2, 3);
void clef_progress(const char *stage, double fraction);

/* malloc for arrays of many MB (maps, matrices): huge pages where the
 * system offers them.  Release with free(). */
void *clef_alloc_large(size_t bytes);

/* Record a failure to write `target` (never the temporary): "cannot write
 * '<target>': no space left on device" (or read-only file system, quota,
 * folder gone) when the file system explains it, else "cannot write
 * '<target>': <what> (<lib_text>)".  Reads errno; call it before removing
 * the temporary.  Returns `code`. */
int clef_write_fail(int code, const char *target, const char *what, const char *lib_text);

/* CLEF_FAIL(code, fmt, ...): format the message, log it, return the code. */
#define CLEF_FAIL(code, ...) return clef_fail((code), __VA_ARGS__)

/* CLEF_TRY(call): return early with the call's status if it failed.  The
 * callee has already recorded the message. */
#define CLEF_TRY(call)                       \
    do {                                     \
        int clef_try_status_ = (call);       \
        if (clef_try_status_ != CLEF_OK)     \
            return clef_try_status_;         \
    } while (0)

/* CLEF_CHECK(call): inside a function with a `fail:` label and a local
 * `int status`, jump there on failure. */
#define CLEF_CHECK(call)                     \
    do {                                     \
        status = (call);                     \
        if (status != CLEF_OK)               \
            goto fail;                       \
    } while (0)

#endif
