/* SHA-256 as specified in FIPS 180-4 (NIST, August 2015), sections 4.1.2
 * (functions), 4.2.2 (constants), 5.1.1 (padding), 5.3.3 (initial value)
 * and 6.2.2 (hash computation). */
#include "clef/hash.h"

#include <errno.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"

/* FIPS 180-4 section 4.2.2: first 32 bits of the fractional parts of the
 * cube roots of the first 64 primes. */
static const uint32_t K256[64] = {
    0x428a2f98, 0x71374491, 0xb5c0fbcf, 0xe9b5dba5, 0x3956c25b, 0x59f111f1, 0x923f82a4,
    0xab1c5ed5, 0xd807aa98, 0x12835b01, 0x243185be, 0x550c7dc3, 0x72be5d74, 0x80deb1fe,
    0x9bdc06a7, 0xc19bf174, 0xe49b69c1, 0xefbe4786, 0x0fc19dc6, 0x240ca1cc, 0x2de92c6f,
    0x4a7484aa, 0x5cb0a9dc, 0x76f988da, 0x983e5152, 0xa831c66d, 0xb00327c8, 0xbf597fc7,
    0xc6e00bf3, 0xd5a79147, 0x06ca6351, 0x14292967, 0x27b70a85, 0x2e1b2138, 0x4d2c6dfc,
    0x53380d13, 0x650a7354, 0x766a0abb, 0x81c2c92e, 0x92722c85, 0xa2bfe8a1, 0xa81a664b,
    0xc24b8b70, 0xc76c51a3, 0xd192e819, 0xd6990624, 0xf40e3585, 0x106aa070, 0x19a4c116,
    0x1e376c08, 0x2748774c, 0x34b0bcb5, 0x391c0cb3, 0x4ed8aa4a, 0x5b9cca4f, 0x682e6ff3,
    0x748f82ee, 0x78a5636f, 0x84c87814, 0x8cc70208, 0x90befffa, 0xa4506ceb, 0xbef9a3f7,
    0xc67178f2};

static inline uint32_t rotr(uint32_t x, int n) { return (x >> n) | (x << (32 - n)); }

/* One 512-bit block, FIPS 180-4 section 6.2.2 steps 1-4. */
static void sha256_block(uint32_t h[8], const unsigned char *p)
{
    uint32_t w[64];
    for (int t = 0; t < 16; t++)
        w[t] = (uint32_t)p[4 * t] << 24 | (uint32_t)p[4 * t + 1] << 16 |
               (uint32_t)p[4 * t + 2] << 8 | (uint32_t)p[4 * t + 3];
    for (int t = 16; t < 64; t++) {
        const uint32_t s0 = rotr(w[t - 15], 7) ^ rotr(w[t - 15], 18) ^ (w[t - 15] >> 3);
        const uint32_t s1 = rotr(w[t - 2], 17) ^ rotr(w[t - 2], 19) ^ (w[t - 2] >> 10);
        w[t] = w[t - 16] + s0 + w[t - 7] + s1;
    }
    uint32_t a = h[0], b = h[1], c = h[2], d = h[3], e = h[4], f = h[5], g = h[6], k = h[7];
    for (int t = 0; t < 64; t++) {
        const uint32_t S1 = rotr(e, 6) ^ rotr(e, 11) ^ rotr(e, 25);
        const uint32_t ch = (e & f) ^ (~e & g);
        const uint32_t t1 = k + S1 + ch + K256[t] + w[t];
        const uint32_t S0 = rotr(a, 2) ^ rotr(a, 13) ^ rotr(a, 22);
        const uint32_t maj = (a & b) ^ (a & c) ^ (b & c);
        const uint32_t t2 = S0 + maj;
        k = g;
        g = f;
        f = e;
        e = d + t1;
        d = c;
        c = b;
        b = a;
        a = t1 + t2;
    }
    h[0] += a;
    h[1] += b;
    h[2] += c;
    h[3] += d;
    h[4] += e;
    h[5] += f;
    h[6] += g;
    h[7] += k;
}

#if defined(__x86_64__) && defined(__GNUC__)
#include <cpuid.h>
#include <immintrin.h>
#define CLEF_HAVE_SHA_NI 1

/* The same compression with the x86 SHA extensions (Intel, "Intel SHA
 * Extensions", 2013: SHA256RNDS2 does two rounds, SHA256MSG1/MSG2 the
 * message schedule of section 6.2.2 step 1).  The state is kept as the
 * register pairs ABEF and CDGH that SHA256RNDS2 expects.  Several blocks
 * per call, so the state shuffles happen once. */
__attribute__((target("sha,sse4.1"))) static void sha256_blocks_ni(uint32_t h[8],
                                                                    const unsigned char *p,
                                                                    size_t nblocks)
{
    const __m128i bswap = _mm_set_epi64x(0x0c0d0e0f08090a0bLL, 0x0405060700010203LL);
    __m128i tmp = _mm_loadu_si128((const __m128i *)&h[0]);  /* DCBA */
    __m128i st1 = _mm_loadu_si128((const __m128i *)&h[4]);  /* HGFE */
    tmp = _mm_shuffle_epi32(tmp, 0xB1);                      /* CDAB */
    st1 = _mm_shuffle_epi32(st1, 0x1B);                      /* EFGH */
    __m128i st0 = _mm_alignr_epi8(tmp, st1, 8);              /* ABEF */
    st1 = _mm_blend_epi16(st1, tmp, 0xF0);                   /* CDGH */
    for (; nblocks; nblocks--, p += 64) {
        const __m128i save0 = st0, save1 = st1;
        __m128i w[4];
        for (int i = 0; i < 4; i++)
            w[i] = _mm_shuffle_epi8(_mm_loadu_si128((const __m128i *)(p + 16 * i)), bswap);
        /* 16 groups of 4 rounds; group i uses schedule words w[i % 4]. */
#pragma GCC unroll 16
        for (int i = 0; i < 16; i++) {
            __m128i cur = w[i & 3];
            __m128i msg = _mm_add_epi32(cur, _mm_loadu_si128((const __m128i *)&K256[4 * i]));
            st1 = _mm_sha256rnds2_epu32(st1, st0, msg);
            if (i >= 3 && i <= 14) {
                /* W[t] for the next-but-two group: finish with MSG2 */
                __m128i nxt = _mm_add_epi32(w[(i + 1) & 3], _mm_alignr_epi8(cur, w[(i + 3) & 3], 4));
                w[(i + 1) & 3] = _mm_sha256msg2_epu32(nxt, cur);
            }
            msg = _mm_shuffle_epi32(msg, 0x0E);
            st0 = _mm_sha256rnds2_epu32(st0, st1, msg);
            if (i >= 1 && i <= 12)
                w[(i + 3) & 3] = _mm_sha256msg1_epu32(w[(i + 3) & 3], cur);
        }
        st0 = _mm_add_epi32(st0, save0);
        st1 = _mm_add_epi32(st1, save1);
    }
    tmp = _mm_shuffle_epi32(st0, 0x1B);       /* FEBA */
    st1 = _mm_shuffle_epi32(st1, 0xB1);       /* DCHG */
    st0 = _mm_blend_epi16(tmp, st1, 0xF0);    /* DCBA */
    st1 = _mm_alignr_epi8(st1, tmp, 8);       /* HGFE */
    _mm_storeu_si128((__m128i *)&h[0], st0);
    _mm_storeu_si128((__m128i *)&h[4], st1);
}

/* CPUID leaf 7 EBX bit 29 (SHA), leaf 1 ECX bits 9 (SSSE3) and 19 (SSE4.1). */
static int cpu_has_sha_ni(void)
{
    unsigned a, b, c, d;
    if (!__get_cpuid(1, &a, &b, &c, &d) || !(c & (1u << 9)) || !(c & (1u << 19)))
        return 0;
    if (!__get_cpuid_count(7, 0, &a, &b, &c, &d))
        return 0;
    return (b >> 29) & 1;
}
#endif

/* Compress whole blocks with the fastest code the CPU supports.  The
 * detection result is cached; a race on it is benign (same value). */
static void sha256_blocks(uint32_t h[8], const unsigned char *p, size_t nblocks)
{
#ifdef CLEF_HAVE_SHA_NI
    static volatile int have = -1;
    if (have < 0)
        have = cpu_has_sha_ni() && !getenv("CLEF_NO_SHA_NI");
    if (have) {
        sha256_blocks_ni(h, p, nblocks);
        return;
    }
#endif
    for (; nblocks; nblocks--, p += 64)
        sha256_block(h, p);
}

void clef_sha256_init(clef_sha256 *ctx)
{
    /* FIPS 180-4 section 5.3.3. */
    static const uint32_t h0[8] = {0x6a09e667, 0xbb67ae85, 0x3c6ef372, 0xa54ff53a,
                                   0x510e527f, 0x9b05688c, 0x1f83d9ab, 0x5be0cd19};
    memcpy(ctx->h, h0, sizeof h0);
    ctx->nbytes = 0;
    ctx->nblock = 0;
}

void clef_sha256_update(clef_sha256 *ctx, const void *data, size_t len)
{
    const unsigned char *p = data;
    ctx->nbytes += len;
    if (ctx->nblock) {
        const size_t take = len < 64 - ctx->nblock ? len : 64 - ctx->nblock;
        memcpy(ctx->block + ctx->nblock, p, take);
        ctx->nblock += take;
        p += take;
        len -= take;
        if (ctx->nblock < 64)
            return;
        sha256_blocks(ctx->h, ctx->block, 1);
        ctx->nblock = 0;
    }
    const size_t whole = len / 64;
    sha256_blocks(ctx->h, p, whole);
    p += 64 * whole;
    len -= 64 * whole;
    memcpy(ctx->block, p, len);
    ctx->nblock = len;
}

void clef_sha256_final(clef_sha256 *ctx, unsigned char digest[CLEF_SHA256_BYTES])
{
    /* Padding, FIPS 180-4 section 5.1.1: a 1 bit, zeros, then the message
     * length in bits as a 64-bit big-endian integer. */
    const uint64_t bits = ctx->nbytes * 8;
    unsigned char pad[72] = {0x80};
    const size_t npad = ctx->nblock < 56 ? 56 - ctx->nblock : 120 - ctx->nblock;
    for (int i = 0; i < 8; i++)
        pad[npad + i] = (unsigned char)(bits >> (56 - 8 * i));
    clef_sha256_update(ctx, pad, npad + 8);
    for (int i = 0; i < 8; i++) {
        digest[4 * i] = (unsigned char)(ctx->h[i] >> 24);
        digest[4 * i + 1] = (unsigned char)(ctx->h[i] >> 16);
        digest[4 * i + 2] = (unsigned char)(ctx->h[i] >> 8);
        digest[4 * i + 3] = (unsigned char)ctx->h[i];
    }
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
