/* Coupling-cache files (src/cache_impl.h): clef_cache_load.  The expected
 * kind, shape and key are taken from the input's own header where it has
 * one (shape capped), so the fuzzer reaches the payload and checksum code
 * as well as every header refusal; the same bytes are also loaded against
 * fixed expectations. */
#include "fuzz.h"

#include "cache_impl.h"

FUZZ_INIT

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    const char *path = fuzz_file(data, size);
    static double out[64 * 64];
    uint32_t kind = CLEF_CACHE_K;
    uint64_t rows = 3, cols = 3;
    char key[65];
    memset(key, '0', 64);
    key[64] = '\0';
    if (size >= 104) {
        memcpy(&kind, data + 16, 4);
        memcpy(&rows, data + 24, 8);
        memcpy(&cols, data + 32, 8);
        memcpy(key, data + 40, 64);
    }
    if (rows == 0 || rows > 64)
        rows = 1 + rows % 64;
    if (cols == 0 || cols > 64)
        cols = 1 + cols % 64;
    clef_cache_load(path, (int)kind, key, (size_t)rows, (size_t)cols, out);
    clef_cache_load(path, CLEF_CACHE_MASK_SPECTRA, key, 2, 9, out);
    return 0;
}
