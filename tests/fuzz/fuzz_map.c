/* HEALPix FITS maps: clef_map_read through a CFITSIO memory file, with the
 * default options and with an ordering stated (the path taken for files
 * without ORDERING), plus a column chosen by name. */
#include "fuzz.h"

#include "clef/map.h"
#include "map_impl.h"

FUZZ_INIT

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    static const clef_map_read_opts opts[3] = {
        {0}, {.ordering = "NESTED"}, {.hdu = "2", .column = "PIXEL"}};
    for (int i = 0; i < 3; i++) {
        clef_map *m = NULL;
        if (clef_map_read_memory(&m, data, size, "fuzz.fits", &opts[i]) == CLEF_OK) {
            clef_map_stats st;
            clef_map_stats_compute(m, &st);
        }
        clef_map_free(m);
    }
    return 0;
}
