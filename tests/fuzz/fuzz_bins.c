/* Bin-edge files: clef_bins_read with both weightings and two lmax. */
#include "fuzz.h"

#include "clef/bins.h"

FUZZ_INIT

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    const char *path = fuzz_file(data, size);
    const int lmaxes[2] = {30, 3000};
    const int weights[2] = {CLEF_BINS_FLAT, CLEF_BINS_DL};
    for (int i = 0; i < 2; i++) {
        clef_bins *b = NULL;
        if (clef_bins_read(&b, path, lmaxes[i], weights[i]) == CLEF_OK)
            clef_bins_destroy(b);
    }
    return 0;
}
