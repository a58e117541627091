/* Spectrum, noise, beam and transfer text tables: clef_theory_read_cl (the
 * --covariance-model / --noise-spectrum / --cl reader) and clef_beam_read (--beam table and
 * --transfer), at a small and a larger lmax. */
#include "fuzz.h"

#include "clef/beam.h"
#include "clef/theory.h"

FUZZ_INIT

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    const char *path = fuzz_file(data, size);
    static double v[1025];
    const int lmaxes[2] = {8, 1024};
    for (int i = 0; i < 2; i++) {
        int last = -1;
        clef_theory_read_cl(path, lmaxes[i], v, &last);
        clef_beam_read(path, lmaxes[i], v);
    }
    return 0;
}
