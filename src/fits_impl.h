/* Checks of FITS headers made before CFITSIO interprets them.  Shared by the
 * FITS readers of the map, table and a_lm modules.  Not installed. */
#ifndef CLEF_FITS_IMPL_H
#define CLEF_FITS_IMPL_H

#include <fitsio.h>

/* Walk every HDU header of an open file from its raw bytes and refuse what
 * Debian's CFITSIO (4.2) would overflow a buffer on when it moves to that
 * HDU: a TTYPEn value that is not a quoted string (CFITSIO copies up to 71
 * bytes into a 70-byte field; found by tests/fuzz/fuzz_map), and, in the
 * same spirit, any string-valued structural keyword (XTENSION, EXTNAME,
 * TTYPEn, TFORMn, TUNITn, TDIMn, TDISPn) not given as a quoted string, and
 * bytes outside printable ASCII in value cards (FITS 4.0 section 4.1).
 * Returns CLEF_OK or CLEF_EFORMAT naming `name`, the HDU and the card.
 * Only the primary header has been parsed by CFITSIO when this runs. */
int clef_fits_check_headers(fitsfile *f, const char *name);

/* A gzip stream whose trailer (ISIZE) claims more than deflate can expand
 * to: CLEF_EFORMAT before CFITSIO allocates that much.  The _file form reads
 * the first 2 and last 4 bytes of `path`; call it before fits_open_*. */
int clef_fits_check_gzip(const unsigned char *head, size_t nhead, const unsigned char tail[4],
                         long long size, const char *name);
int clef_fits_check_gzip_file(const char *path);

#endif
