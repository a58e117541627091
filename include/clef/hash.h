/* SHA-256 message digests (FIPS 180-4, "Secure Hash Standard", NIST 2015),
 * used for input checksums in run summaries and for coupling-cache keys.
 *
 * Incremental use: clef_hash_sha256_init, any number of _update calls, then
 * _final.  One-shot helpers hash a buffer or a whole file.  Digests are 32
 * bytes; the hex form is 64 lower-case characters plus a terminating NUL.
 *
 * On x86-64 CPUs with the SHA extensions the block function uses them
 * (several times faster); setting the environment variable CLEF_NO_SHA_NI
 * before the first digest forces the portable code.
 *
 * Thread safety: no shared state (apart from a CPU-feature flag set once,
 * benignly); a context must not be used by two
 * threads at once.
 */
#ifndef CLEF_HASH_H
#define CLEF_HASH_H

#include <stddef.h>
#include <stdint.h>

#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

#define CLEF_SHA256_BYTES 32

/* Streaming state.  Plain struct so that callers can keep it on the stack;
 * its fields are private. */
typedef struct clef_sha256 {
    uint32_t h[8];
    uint64_t nbytes;      /* message length so far, in bytes */
    unsigned char block[64];
    size_t nblock;        /* bytes waiting in `block` */
} clef_sha256;

void clef_sha256_init(clef_sha256 *ctx);
void clef_sha256_update(clef_sha256 *ctx, const void *data, size_t len);
/* Write the 32-byte digest; the context must be re-initialised for reuse. */
void clef_sha256_final(clef_sha256 *ctx, unsigned char digest[CLEF_SHA256_BYTES]);

/* Digest as 64 lower-case hex characters and a NUL. */
void clef_sha256_hex(const unsigned char digest[CLEF_SHA256_BYTES], char hex[65]);

/* One-shot digest of a buffer, as hex. */
void clef_sha256_buffer(const void *data, size_t len, char hex[65]);

/* Digest of a file's bytes, as hex.  Errors: CLEF_EINVAL (NULL path),
 * CLEF_EIO (the file cannot be opened or read; the message names it). */
int clef_sha256_file(const char *path, char hex[65]);

#ifdef __cplusplus
}
#endif
#endif
