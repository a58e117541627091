/* SHA-256 against the FIPS 180-4 example vectors (NIST "Secure Hash
 * Standard" examples, SHA256.pdf) and against Python's hashlib on a file. */
#include "check.h"

#include "clef/hash.h"

/* The portable code and the x86 SHA-extension code (when the CPU has it)
 * agree on random data of many lengths.  Runs first: the code path is
 * chosen once per process, so the child picks the portable one through
 * CLEF_NO_SHA_NI before anything is hashed. */
static void test_portable_vs_accelerated(void **state)
{
    (void)state;
    enum { N = 300000 };
    static unsigned char buf[N];
    uint64_t x = 88172645463325252ull; /* Marsaglia 2003 xorshift64, fixed seed */
    for (int i = 0; i < N; i++) {
        x ^= x << 13;
        x ^= x >> 7;
        x ^= x << 17;
        buf[i] = (unsigned char)(x >> 32);
    }
    const size_t lens[] = {0, 1, 55, 56, 63, 64, 65, 127, 128, 1000, 4095, N};
    enum { NL = sizeof lens / sizeof lens[0] };
    int fd[2];
    assert_int_equal(pipe(fd), 0);
    const pid_t pid = fork();
    assert_true(pid >= 0);
    if (pid == 0) {
        setenv("CLEF_NO_SHA_NI", "1", 1);
        for (int i = 0; i < NL; i++) {
            char hex[65];
            clef_sha256_buffer(buf, lens[i], hex);
            if (write(fd[1], hex, 64) != 64)
                _exit(1);
        }
        _exit(0);
    }
    close(fd[1]);
    for (int i = 0; i < NL; i++) {
        char hex[65], other[65] = {0};
        clef_sha256_buffer(buf, lens[i], hex);
        assert_int_equal(read(fd[0], other, 64), 64);
        assert_string_equal(hex, other);
    }
    close(fd[0]);
    int st;
    assert_int_equal(waitpid(pid, &st, 0), pid);
    assert_true(WIFEXITED(st) && WEXITSTATUS(st) == 0);
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

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_portable_vs_accelerated),
        cmocka_unit_test(test_abc),
        cmocka_unit_test(test_two_block),
        cmocka_unit_test(test_million_a),
        cmocka_unit_test(test_file_vs_python),
        cmocka_unit_test(test_file_errors),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
