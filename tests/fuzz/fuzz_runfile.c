/* Run files of clef spectrum --run (docs/run-files.md): clef_run_parse on
 * the bytes directly (libyaml, then the layout checks), and clef_run_read
 * through a file. */
#include "fuzz.h"

#include "clef/run.h"

FUZZ_INIT

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    clef_run *r = NULL;
    if (clef_run_parse(&r, (const char *)data, size, "dir/run.yaml") == CLEF_OK)
        clef_run_free(r);
    const char *path = fuzz_file(data, size);
    if (clef_run_read(&r, path) == CLEF_OK)
        clef_run_free(r);
    return 0;
}
