/* SHA-256 against the FIPS 180-4 example vectors (NIST "Secure Hash
 * Standard" examples, SHA256.pdf) and against Python's hashlib on files.
 * The digest is GNU Nettle's (src/hash.c); these tests guard the wrapper
 * (incremental updates, hex form, file reading) and the library build. */
#include "check.h"

#include "clef/hash.h"

/* Nettle's portable code and its x86 SHA-extension code (chosen at load
 * time; NETTLE_FAT_OVERRIDE=vendor:other selects the portable one) both
 * match Python's hashlib on pseudo-random data of many lengths around the
 * 64-byte block boundaries.  The portable run is this program re-executed
 * with the override set, because Nettle reads it when it is loaded. */
enum { RAND_N = 300000 };
static const size_t rand_lens[] = {0, 1, 55, 56, 63, 64, 65, 127, 128, 1000, 4095, RAND_N};
enum { RAND_NL = sizeof rand_lens / sizeof rand_lens[0] };

static void fill_random(unsigned char *buf)
{
    uint64_t x = 88172645463325252ull; /* Marsaglia 2003 xorshift64, fixed seed */
    for (int i = 0; i < RAND_N; i++) {
        x ^= x << 13;
        x ^= x >> 7;
        x ^= x << 17;
        buf[i] = (unsigned char)(x >> 32);
    }
}

/* "--digests": print the digest of each prefix, one per line. */
static int print_digests(void)
{
    static unsigned char buf[RAND_N];
    fill_random(buf);
    for (int i = 0; i < RAND_NL; i++) {
        char hex[65];
        clef_sha256_buffer(buf, rand_lens[i], hex);
        printf("%s\n", hex);
    }
    return 0;
}

static void read_lines(const char *path, char out[RAND_NL][65])
{
    FILE *f = fopen(path, "r");
    assert_non_null(f);
    char line[128];
    for (int i = 0; i < RAND_NL; i++) {
        assert_non_null(fgets(line, sizeof line, f));
        line[64] = '\0';
        memcpy(out[i], line, 65);
    }
    fclose(f);
}

static void test_paths_vs_python(void **state)
{
    (void)state;
    static unsigned char buf[RAND_N];
    fill_random(buf);
    const char *data = test_path("hash-random.bin");
    FILE *f = fopen(data, "wb");
    assert_non_null(f);
    assert_int_equal(fwrite(buf, 1, RAND_N, f), RAND_N);
    fclose(f);
    /* Python hashlib.sha256 of each prefix */
    const char *ref = test_path("hash-random-ref.txt");
    assert_int_equal(run_cmd("%s -c \"import hashlib,sys; b=open(sys.argv[1],'rb').read(); "
                             "[print(hashlib.sha256(b[:int(n)]).hexdigest()) for n in "
                             "sys.argv[2:]]\" %s 0 1 55 56 63 64 65 127 128 1000 4095 %d > %s",
                             ref_python(), data, RAND_N, ref),
                     0);
    const char *portable = test_path("hash-portable.txt");
    char self[4096];
    const ssize_t n = readlink("/proc/self/exe", self, sizeof self - 1);
    assert_true(n > 0);
    self[n] = '\0';
    assert_int_equal(run_cmd("NETTLE_FAT_OVERRIDE=vendor:other '%s' --digests > %s", self, portable),
                     0);
    char want[RAND_NL][65], other[RAND_NL][65];
    read_lines(ref, want);
    read_lines(portable, other);
    for (int i = 0; i < RAND_NL; i++) {
        char hex[65];
        clef_sha256_buffer(buf, rand_lens[i], hex);
        assert_string_equal(hex, want[i]);   /* default code path vs hashlib */
        assert_string_equal(other[i], want[i]); /* portable code path vs hashlib */
    }
}

static void test_abc(void **state)
{
    (void)state;
    char hex[65];
    /* FIPS 180-4 example, one-block message "abc" */
    clef_sha256_buffer("abc", 3, hex);
    assert_string_equal(hex, "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
    /* Empty message: NIST CAVP SHA256ShortMsg.rsp, Len = 0 */
    clef_sha256_buffer("", 0, hex);
    assert_string_equal(hex, "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855");
}

static void test_two_block(void **state)
{
    (void)state;
    char hex[65];
    /* FIPS 180-4 example, 448-bit two-block message */
    const char *m = "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq";
    clef_sha256_buffer(m, strlen(m), hex);
    assert_string_equal(hex, "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1");
}

static void test_million_a(void **state)
{
    (void)state;
    /* FIPS 180-4 example, one million 'a', fed in uneven pieces to
     * exercise the incremental path across block boundaries. */
    clef_sha256 ctx;
    clef_sha256_init(&ctx);
    char buf[997];
    memset(buf, 'a', sizeof buf);
    size_t left = 1000000;
    size_t piece = 1;
    while (left) {
        const size_t n = piece < left ? piece : left;
        clef_sha256_update(&ctx, buf, n);
        left -= n;
        piece = (piece * 7 + 13) % 997 + 1;
    }
    unsigned char d[CLEF_SHA256_BYTES];
    char hex[65];
    clef_sha256_final(&ctx, d);
    clef_sha256_hex(d, hex);
    assert_string_equal(hex, "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0");
}

static void test_file_vs_python(void **state)
{
    (void)state;
    const char *path = test_path("hash-input.bin");
    FILE *f = fopen(path, "wb");
    assert_non_null(f);
    /* 200003 bytes of a simple sequence: not a multiple of 64 */
    for (int i = 0; i < 200003; i++)
        fputc((i * 131 + i / 7) & 255, f);
    fclose(f);
    char hex[65];
    assert_int_equal(clef_sha256_file(path, hex), CLEF_OK);
    const char *ref = test_path("hash-ref.txt");
    assert_int_equal(run_cmd("%s -c \"import hashlib,sys; print(hashlib.sha256(open(sys.argv[1],"
                             "'rb').read()).hexdigest())\" %s > %s",
                             ref_python(), path, ref),
                     0);
    char want[80] = {0};
    f = fopen(ref, "r");
    assert_non_null(f);
    assert_non_null(fgets(want, sizeof want, f));
    fclose(f);
    want[64] = '\0';
    /* Python hashlib.sha256 */
    assert_string_equal(hex, want);
}

static void test_file_errors(void **state)
{
    (void)state;
    char hex[65];
    assert_int_equal(clef_sha256_file(test_path("no-such-file"), hex), CLEF_EIO);
    assert_non_null(strstr(clef_last_error(), "no-such-file"));
    assert_int_equal(clef_sha256_file(NULL, hex), CLEF_EINVAL);
    /* a folder opens but cannot be read */
    assert_int_equal(clef_sha256_file("/", hex), CLEF_EIO);
}

int main(int argc, char **argv)
{
    if (argc > 1 && !strcmp(argv[1], "--digests"))
        return print_digests();
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_paths_vs_python),
        cmocka_unit_test(test_abc),
        cmocka_unit_test(test_two_block),
        cmocka_unit_test(test_million_a),
        cmocka_unit_test(test_file_vs_python),
        cmocka_unit_test(test_file_errors),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
