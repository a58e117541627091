/* Hole lists for `clef mask --holes` (lon lat radius per line):
 * clef_mask_holes_read. */
#include "fuzz.h"

#include "clef/mask.h"

FUZZ_INIT

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    const char *path = fuzz_file(data, size);
    clef_mask_hole *h = NULL;
    size_t n = 0;
    if (clef_mask_holes_read(path, &h, &n) == CLEF_OK)
        free(h);
    return 0;
}
