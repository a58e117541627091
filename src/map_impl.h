/* Private declarations of the map module (src/map*.c).  Not installed. */
#ifndef CLEF_MAP_IMPL_H
#define CLEF_MAP_IMPL_H

#include <stddef.h>
#include <stdint.h>

#include "clef/map.h"
#include "core_impl.h"

/* Values moved per CFITSIO call when reading or writing (8 MiB of doubles). */
#define CLEF_MAP_CHUNK ((int64_t)1 << 20)

/* "CFITSIO status N: text (first message of CFITSIO's stack)" into buf;
 * clears CFITSIO's message stack so later messages carry no stale text. */
void clef_map_fits_status(int fstatus, char *buf, size_t n);

/* clef_map_read on a FITS file held in memory (CFITSIO memory file; the
 * bytes are read in place, never written).  `name` is used in messages.
 * Used by the fuzz harness (tests/fuzz/fuzz_map.c), so no disk is touched. */
int clef_map_read_memory(clef_map **out, const void *data, size_t size, const char *name,
                         const clef_map_read_opts *opts);

#endif
