/* Band-power tables: clef_bandpowers_read (FITS, CSV or plain text, chosen
 * by content), then the covariance text reader on the same bytes against
 * the table read (or a 3-bin table). */
#include "fuzz.h"

#include "clef/table.h"

FUZZ_INIT

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    const char *path = fuzz_file(data, size);
    clef_bandpowers *bp = NULL;
    if (clef_bandpowers_read(&bp, path) != CLEF_OK) {
        if (clef_bandpowers_alloc(&bp, 3, 0) != CLEF_OK)
            return 0;
    }
    clef_bandpowers_read_cov(bp, path);
    clef_bandpowers_free(bp);
    return 0;
}
