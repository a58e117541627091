/* SHA-256 message digests (FIPS 180-4, "Secure Hash Standard", NIST 2015),
 * used for input checksums in run summaries and for coupling-cache keys.
 *
 * The digest itself comes from GNU Nettle (Debian package nettle-dev), a
 * maintained, widely reviewed implementation: input checksums and cache
 * keys are integrity features, so clef does not carry SHA-256 code of its
 * own.  Nettle picks the x86 SHA extensions at load time when the CPU has
 * them (its "fat" build; NETTLE_FAT_OVERRIDE selects the portable code).
 *
 * Incremental use: clef_hash_sha256_init, any number of _update calls, then
 * _final.  One-shot helpers hash a buffer or a whole file.  Digests are 32
 * bytes; the hex form is 64 lower-case characters plus a terminating NUL.
 *
 * Thread safety: no shared state; a context must not be used by two
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

/* Streaming state.  Opaque storage large enough for the library's context
 * (checked at compile time in src/hash.c), so that callers can keep it on
 * the stack without including Nettle's headers. */
typedef struct clef_sha256 {
    union {
        unsigned char bytes[192];
        uint64_t align_;
    } opaque_;
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
