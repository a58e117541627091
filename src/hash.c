/* SHA-256 (FIPS 180-4) through GNU Nettle's sha256_* functions.
 *
 * Why Nettle: of the three maintained implementations Debian ships (Nettle,
 * libgcrypt, OpenSSL's libcrypto), Nettle is the smallest dependency with a
 * plain context-on-the-stack interface: no library initialisation call
 * (libgcrypt needs gcry_check_version before first use), no heap-allocated
 * digest objects or provider loading (OpenSSL 3's EVP interface), and it
 * selects the x86 SHA extensions itself.  The hand-written code this
 * replaces was removed; the FIPS 180-4 example vectors stay in
 * tests/test_hash.c. */
#include "clef/hash.h"

#include <errno.h>
#include <stdio.h>
#include <string.h>

#include <nettle/sha2.h>

#include "core_impl.h"

_Static_assert(sizeof(struct sha256_ctx) <= sizeof(((clef_sha256 *)0)->opaque_.bytes),
               "clef_sha256 too small for Nettle's sha256_ctx");
_Static_assert(_Alignof(struct sha256_ctx) <= _Alignof(clef_sha256),
               "clef_sha256 under-aligned for Nettle's sha256_ctx");

static struct sha256_ctx *nctx(clef_sha256 *ctx) { return (struct sha256_ctx *)ctx->opaque_.bytes; }

void clef_sha256_init(clef_sha256 *ctx) { sha256_init(nctx(ctx)); }

void clef_sha256_update(clef_sha256 *ctx, const void *data, size_t len)
{
    if (len)
        sha256_update(nctx(ctx), len, data);
}

void clef_sha256_final(clef_sha256 *ctx, unsigned char digest[CLEF_SHA256_BYTES])
{
    sha256_digest(nctx(ctx), CLEF_SHA256_BYTES, digest);
}

void clef_sha256_hex(const unsigned char digest[CLEF_SHA256_BYTES], char hex[65])
{
    static const char digits[] = "0123456789abcdef";
    for (int i = 0; i < CLEF_SHA256_BYTES; i++) {
        hex[2 * i] = digits[digest[i] >> 4];
        hex[2 * i + 1] = digits[digest[i] & 15];
    }
    hex[64] = '\0';
}

void clef_sha256_buffer(const void *data, size_t len, char hex[65])
{
    clef_sha256 ctx;
    unsigned char d[CLEF_SHA256_BYTES];
    clef_sha256_init(&ctx);
    clef_sha256_update(&ctx, data, len);
    clef_sha256_final(&ctx, d);
    clef_sha256_hex(d, hex);
}

int clef_sha256_file(const char *path, char hex[65])
{
    if (!path)
        CLEF_FAIL(CLEF_EINVAL, "sha256: file path is NULL");
    FILE *f = fopen(path, "rb");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "sha256: cannot open '%s': %s", path, strerror(errno));
    clef_sha256 ctx;
    clef_sha256_init(&ctx);
    unsigned char buf[1 << 16];
    size_t n;
    while ((n = fread(buf, 1, sizeof buf, f)) > 0)
        clef_sha256_update(&ctx, buf, n);
    const int bad = ferror(f);
    const int e = errno;
    fclose(f);
    if (bad)
        CLEF_FAIL(CLEF_EIO, "sha256: read error on '%s': %s", path, strerror(e));
    unsigned char d[CLEF_SHA256_BYTES];
    clef_sha256_final(&ctx, d);
    clef_sha256_hex(d, hex);
    return CLEF_OK;
}
