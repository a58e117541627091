/* Shared helpers of the fuzz harnesses (libFuzzer; tests/fuzz/README.md).
 *
 * Parsers that take a path get one that names an anonymous in-memory file
 * (memfd_create; "/proc/self/fd/N"), rewritten for every input, so the
 * harnesses touch no disk.  The FITS map reader is driven through a CFITSIO
 * memory file directly (clef_map_read_memory). */
#ifndef CLEF_FUZZ_H
#define CLEF_FUZZ_H

#define _GNU_SOURCE
#include <omp.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/mman.h>
#include <unistd.h>

#include "clef/clef.h"

/* The path of an in-memory file holding exactly data[0..size). */
static inline const char *fuzz_file(const uint8_t *data, size_t size)
{
    static int fd = -1;
    static char path[64];
    if (fd < 0) {
        fd = memfd_create("clef-fuzz-input", 0);
        if (fd < 0) {
            perror("memfd_create");
            abort();
        }
        snprintf(path, sizeof path, "/proc/self/fd/%d", fd);
    }
    if (ftruncate(fd, 0) != 0 || (size && pwrite(fd, data, size, 0) != (ssize_t)size)) {
        perror("memfd write");
        abort();
    }
    return path;
}

/* One thread: findings must not depend on OpenMP scheduling, and the
 * machine is shared. */
static inline void fuzz_init(void) { omp_set_num_threads(1); }

#define FUZZ_INIT                                                   \
    int LLVMFuzzerInitialize(int *argc, char ***argv)               \
    {                                                               \
        (void)argc;                                                 \
        (void)argv;                                                 \
        fuzz_init();                                                \
        return 0;                                                   \
    }

int LLVMFuzzerInitialize(int *argc, char ***argv);
int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

#endif
