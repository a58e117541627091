/* The geometry JSON that `clef plot curvature` reads back:
 * clef_plot_geometry_read. */
#include "fuzz.h"

#include "clef/plot.h"

FUZZ_INIT

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    const char *path = fuzz_file(data, size);
    clef_plot_geometry *g = NULL;
    if (clef_plot_geometry_read(&g, path) == CLEF_OK)
        clef_plot_geometry_free(g);
    return 0;
}
