/* Compute kernels chosen at run time.
 *
 * The hot loops (the Legendre stage of the transforms, the coupling
 * matrix rows) are built once per vector width: AVX-512 (8 doubles),
 * AVX2 + FMA (4 doubles) and a portable baseline (2 doubles; the only one
 * on other architectures).  A plan picks one when it is made:
 *   1. the plan option, if not CLEF_KERNEL_AUTO;
 *   2. else the environment variable CLEF_KERNEL = avx512 | avx2 | base
 *      (or auto), read at plan creation;
 *   3. else the widest kernel that was built and that this CPU (and its
 *      operating system) supports.
 * Forcing a kernel the CPU cannot run is an error (CLEF_EUNSUP), not a
 * silent fallback.  All kernels give the same results to rounding (1e-14
 * relative); one kernel gives the same bits for any thread count.
 */
#ifndef CLEF_KERNEL_H
#define CLEF_KERNEL_H

#include "clef/clef.h"

#ifdef __cplusplus
extern "C" {
#endif

typedef enum clef_kernel {
    CLEF_KERNEL_AUTO = 0,
    CLEF_KERNEL_BASE = 1,
    CLEF_KERNEL_AVX2 = 2,
    CLEF_KERNEL_AVX512 = 3
} clef_kernel;

#define CLEF_KERNEL_COUNT 4

/* "auto", "base", "avx2", "avx512"; "?" for other values. */
const char *clef_kernel_name(clef_kernel k);

/* Parse a name as above (case-sensitive).  CLEF_EINVAL for anything else. */
int clef_kernel_parse(const char *name, clef_kernel *out);

/* 1 if kernel k was built into this library and this CPU can run it
 * (BASE always; AUTO counts as available). */
int clef_kernel_available(clef_kernel k);

/* The kernel a plan made with option `request` uses, by the rules above.
 * CLEF_EINVAL for a bad CLEF_KERNEL value, CLEF_EUNSUP for a kernel this
 * build or CPU lacks (the message names it and where it was asked for). */
int clef_kernel_resolve(clef_kernel request, clef_kernel *out);

#ifdef __cplusplus
}
#endif
#endif
