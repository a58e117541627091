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

#endif
