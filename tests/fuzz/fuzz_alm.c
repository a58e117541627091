/* a_lm files (FITS, docs/formats-alm.md): clef_alm_read. */
#include "fuzz.h"

#include <complex.h>

#include "clef/sht.h"

FUZZ_INIT

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    const char *path = fuzz_file(data, size);
    int lmax = 0, mmax = 0;
    double complex *alm = NULL;
    if (clef_alm_read(path, &lmax, &mmax, &alm) == CLEF_OK) {
        static double cl[4097];
        if (lmax <= 4096)
            clef_alm_cl(lmax, mmax, alm, NULL, cl);
    }
    free(alm);
    return 0;
}
