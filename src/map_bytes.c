/* A map as one block of bytes and back (clef_map_export, clef_map_import;
 * map.h): clef sims reads a mask once, on rank 0, and sends it to the
 * other processes rather than having each read the file (docs/
 * performance.md, scaling model).  Native byte order: the processes of a
 * job run on one machine family.
 *
 * Layout: "CLEFMAP1", a byte-order word, int64 nside, nmissing, nbad,
 * int32 file_ordering, hdu, the four text fields at their sizes in
 * clef_map, npix doubles of values, npix validity bytes. */
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "clef/map.h"
#include "core_impl.h"

static const char MAGIC[8] = {'C', 'L', 'E', 'F', 'M', 'A', 'P', '1'};
static const uint32_t ORDER = 0x01020304u;

#define HEAD_BYTES                                                                             \
    (sizeof MAGIC + sizeof ORDER + 3 * sizeof(int64_t) + 2 * sizeof(int32_t) +                 \
     sizeof(((clef_map *)0)->coordsys) + sizeof(((clef_map *)0)->unit) +                       \
     sizeof(((clef_map *)0)->column) + sizeof(((clef_map *)0)->polcconv))

int clef_map_export(const clef_map *m, void **buf, size_t *n)
{
    if (!buf || !n)
        CLEF_FAIL(CLEF_EINVAL, "map export: no output");
    *buf = NULL;
    *n = 0;
    if (!m || !m->pix || !m->valid || m->npix != clef_nside_npix(m->nside))
        CLEF_FAIL(CLEF_EINVAL, "map export: no map, or a map whose size is not 12 nside^2");
    const size_t np = (size_t)m->npix, total = HEAD_BYTES + np * (sizeof(double) + 1);
    unsigned char *p = clef_alloc_large(total);
    if (!p)
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for a map's bytes (%zu)", total);
    unsigned char *q = p;
#define PUT(v, bytes) (memcpy(q, (v), (bytes)), q += (bytes))
    const int64_t h64[3] = {m->nside, m->nmissing, m->nbad};
    const int32_t h32[2] = {m->file_ordering, m->hdu};
    PUT(MAGIC, sizeof MAGIC);
    PUT(&ORDER, sizeof ORDER);
    PUT(h64, sizeof h64);
    PUT(h32, sizeof h32);
    PUT(m->coordsys, sizeof m->coordsys);
    PUT(m->unit, sizeof m->unit);
    PUT(m->column, sizeof m->column);
    PUT(m->polcconv, sizeof m->polcconv);
    PUT(m->pix, np * sizeof *m->pix);
    PUT(m->valid, np);
#undef PUT
    *buf = p;
    *n = total;
    return CLEF_OK;
}

int clef_map_import(clef_map **out, const void *buf, size_t n)
{
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "map import: no output handle");
    *out = NULL;
    const unsigned char *q = buf;
    uint32_t order = 0;
    int64_t h64[3];
    int32_t h32[2];
    if (!buf || n < HEAD_BYTES || memcmp(q, MAGIC, sizeof MAGIC))
        CLEF_FAIL(CLEF_EFORMAT, "map import: %zu bytes are not a map written by clef_map_export",
                  n);
    q += sizeof MAGIC;
#define GET(v, bytes) (memcpy((v), q, (bytes)), q += (bytes))
    GET(&order, sizeof order);
    GET(h64, sizeof h64);
    GET(h32, sizeof h32);
    if (order != ORDER || !clef_nside_valid(h64[0]) ||
        n != HEAD_BYTES + (size_t)clef_nside_npix(h64[0]) * (sizeof(double) + 1))
        CLEF_FAIL(CLEF_EFORMAT, "map import: %zu bytes are not a map written by clef_map_export "
                  "on this machine (byte order, nside or length)", n);
    clef_map *m = NULL;
    CLEF_TRY(clef_map_alloc(&m, h64[0]));
    m->nmissing = h64[1];
    m->nbad = h64[2];
    m->file_ordering = h32[0];
    m->hdu = h32[1];
    GET(m->coordsys, sizeof m->coordsys);
    GET(m->unit, sizeof m->unit);
    GET(m->column, sizeof m->column);
    GET(m->polcconv, sizeof m->polcconv);
    m->coordsys[sizeof m->coordsys - 1] = m->unit[sizeof m->unit - 1] = 0;
    m->column[sizeof m->column - 1] = m->polcconv[sizeof m->polcconv - 1] = 0;
    const size_t np = (size_t)m->npix;
    GET(m->pix, np * sizeof *m->pix);
    GET(m->valid, np);
#undef GET
    *out = m;
    return CLEF_OK;
}
