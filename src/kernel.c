/* Choosing a compute kernel at run time (include/clef/kernel.h).  CPU
 * features come from the compiler's __builtin_cpu_supports, which reads
 * cpuid and, for AVX and AVX-512, checks that the operating system saves
 * the wider registers (XGETBV), so a kernel is never chosen on a CPU or
 * virtual machine that would fault on it. */
#include <stdlib.h>
#include <string.h>

#include "clef/kernel.h"
#include "core_impl.h"
#include "sht_impl.h"

static const char *const names[CLEF_KERNEL_COUNT] = {"auto", "base", "avx2", "avx512"};

const char *clef_kernel_name(clef_kernel k)
{
    return (unsigned)k < CLEF_KERNEL_COUNT ? names[k] : "?";
}

int clef_kernel_parse(const char *name, clef_kernel *out)
{
    for (int k = 0; name && k < CLEF_KERNEL_COUNT; k++)
        if (!strcmp(name, names[k])) {
            *out = (clef_kernel)k;
            return CLEF_OK;
        }
    CLEF_FAIL(CLEF_EINVAL, "kernel '%s' unknown (expected auto, base, avx2 or avx512)",
              name ? name : "(null)");
}

/* Built: the per-width objects carry code only where the compiler targeted
 * the width (the Legendre kernel's descriptor stands for all of them). */
static int built(clef_kernel k)
{
    switch (k) {
    case CLEF_KERNEL_AVX512:
        return clef_sht_avx512_kernel.analysis != NULL;
    case CLEF_KERNEL_AVX2:
        return clef_sht_avx2_kernel.analysis != NULL;
    default:
        return 1;
    }
}

static int cpu_has(clef_kernel k)
{
#if (defined(__x86_64__) || defined(__i386__)) && defined(__GNUC__)
    __builtin_cpu_init();
    switch (k) {
    case CLEF_KERNEL_AVX512:
        return __builtin_cpu_supports("avx512f") && __builtin_cpu_supports("avx512dq") &&
               __builtin_cpu_supports("fma");
    case CLEF_KERNEL_AVX2:
        return __builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma");
    default:
        return 1;
    }
#else
    return k == CLEF_KERNEL_BASE || k == CLEF_KERNEL_AUTO;
#endif
}

int clef_kernel_available(clef_kernel k)
{
    if ((unsigned)k >= CLEF_KERNEL_COUNT)
        return 0;
    return built(k) && cpu_has(k);
}

int clef_kernel_resolve(clef_kernel request, clef_kernel *out)
{
    const char *from = "plan option";
    if ((unsigned)request >= CLEF_KERNEL_COUNT)
        CLEF_FAIL(CLEF_EINVAL, "kernel %d unknown (plan option)", (int)request);
    if (request == CLEF_KERNEL_AUTO) {
        const char *env = getenv("CLEF_KERNEL");
        if (env && *env) {
            if (clef_kernel_parse(env, &request) != CLEF_OK)
                CLEF_FAIL(CLEF_EINVAL, "environment variable CLEF_KERNEL = '%s': unknown kernel "
                          "(expected auto, base, avx2 or avx512)", env);
            from = "environment variable CLEF_KERNEL";
        }
    }
    if (request == CLEF_KERNEL_AUTO) {
        for (int k = CLEF_KERNEL_COUNT - 1; k > CLEF_KERNEL_BASE; k--)
            if (clef_kernel_available((clef_kernel)k)) {
                *out = (clef_kernel)k;
                return CLEF_OK;
            }
        *out = CLEF_KERNEL_BASE;
        return CLEF_OK;
    }
    if (!built(request))
        CLEF_FAIL(CLEF_EUNSUP, "kernel %s (%s) was not built into this library (compiler "
                  "target without it)", names[request], from);
    if (!cpu_has(request))
        CLEF_FAIL(CLEF_EUNSUP, "kernel %s (%s) needs CPU features this machine lacks",
                  names[request], from);
    *out = request;
    return CLEF_OK;
}
