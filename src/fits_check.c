/* Raw header checks before CFITSIO moves to an HDU (src/fits_impl.h).
 * Card layout: FITS Standard 4.0 (Pence et al. 2010, A&A 524, A42 and the
 * IAU FITS Working Group's 2016 text), sections 4.1 (cards, ASCII 32-126)
 * and 4.4 (data size from BITPIX, NAXISn, PCOUNT, GCOUNT). */
#define _POSIX_C_SOURCE 200809L
#include "fits_impl.h"

#include <fitsio2.h>
#include <stdio.h>
#include <sys/stat.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"

#define BLOCK 2880
#define CARD 80

/* Integer value of a value card ("KEY     = 123 / comment"), or 0 when the
 * value is not an integer. */
static int card_int(const char *c, long long *v)
{
    char val[72];
    memcpy(val, c + 10, 70);
    val[70] = '\0';
    char *slash = strchr(val, '/');
    if (slash)
        *slash = '\0';
    /* The leading integer, as a lenient reader would take it. */
    char *end;
    const long long x = strtoll(val, &end, 10);
    if (end == val)
        return 0;
    *v = x;
    return 1;
}

/* CFITSIO takes any card with '=' in column 9 as a value card. */
static int is_value_card(const char *c) { return c[8] == '='; }

static int key_is(const char *c, const char *key)
{
    const size_t n = strlen(key);
    if (memcmp(c, key, n))
        return 0;
    for (size_t i = n; i < 8; i++)
        if (c[i] != ' ')
            return 0;
    return 1;
}

/* "TTYPE12 " etc.: the root followed by digits and blanks. */
static int key_indexed(const char *c, const char *root)
{
    const size_t n = strlen(root);
    if (memcmp(c, root, n) || c[n] < '1' || c[n] > '9')
        return 0;
    size_t i = n + 1;
    while (i < 8 && c[i] >= '0' && c[i] <= '9')
        i++;
    while (i < 8 && c[i] == ' ')
        i++;
    return i == 8;
}

/* Length of the keyword name in columns 1-8 (trailing blanks dropped). */
static int key_len(const char *c)
{
    int n = 8;
    while (n > 0 && c[n - 1] == ' ')
        n--;
    return n;
}

static int string_valued(const char *c)
{
    static const char *const indexed[] = {"TTYPE", "TFORM", "TUNIT", "TDIM", "TDISP"};
    if (key_is(c, "XTENSION") || key_is(c, "EXTNAME"))
        return 1;
    for (size_t i = 0; i < sizeof indexed / sizeof *indexed; i++)
        if (key_indexed(c, indexed[i]))
            return 1;
    return 0;
}

/* The last, partial block of an uncompressed file, read with stdio from the
 * file CFITSIO opened (its size equals CFITSIO's file size; a compressed
 * file, decompressed by CFITSIO into memory, is read through CFITSIO). */
static int read_tail(fitsfile *f, long long pos, long long n, char *out)
{
    FILE *fp = fopen(f->Fptr->filename, "rb");
    if (!fp)
        return 0;
    struct stat st;
    int ok = fstat(fileno(fp), &st) == 0 && (long long)st.st_size == f->Fptr->logfilesize &&
             fseeko(fp, (off_t)pos, SEEK_SET) == 0 && fread(out, 1, (size_t)n, fp) == (size_t)n;
    fclose(fp);
    return ok;
}

/* Read the 2880-byte block at `pos` (blank-padded when cut short).
 * 0 when it cannot be read. */
static int read_block(fitsfile *f, long long pos, long long size, char *block)
{
    const long long avail = size - pos < BLOCK ? size - pos : BLOCK;
    memset(block, ' ', BLOCK);
    /* A last block cut short is still parsed by CFITSIO (found by fuzz_alm),
     * but CFITSIO's own reads of it fail: read it directly. */
    if (avail < BLOCK && read_tail(f, pos, avail, block))
        return 1;
    int st = 0;
    ffmbyt(f, pos, REPORT_EOF, &st);
    if (!st)
        ffgbyt(f, avail, block, &st);
    if (st) {
        fits_clear_errmsg();
        return 0;
    }
    return 1;
}

/* Check the header that starts at *pos (HDU number hdu); on return *pos is
 * just past its END block and *data the size of the data that follows, or
 * -1 when the structural keywords do not give it. */
static int check_header(fitsfile *f, const char *name, int hdu, long long *pos, long long size,
                        long long *data)
{
    char block[BLOCK];
    long long bitpix = 0, naxis = -1, pcount = 0, gcount = 1, prod = 1, naxis1 = -1;
    int ended = 0, ok_size = 1, card_no = 0, groups = 0;
    *data = -1;
    while (!ended) {
        if (*pos >= size || !read_block(f, *pos, size, block))
            return CLEF_OK; /* no END: CFITSIO reports it */
        *pos += BLOCK;
        for (int k = 0; k < BLOCK / CARD && !ended; k++) {
            const char *c = block + k * CARD;
            card_no++;
            if (key_is(c, "END")) {
                ended = 1;
                break;
            }
            /* COMMENT, HISTORY and blank keywords are free text. */
            if (key_is(c, "COMMENT") || key_is(c, "HISTORY") || key_is(c, ""))
                continue;
            for (int i = 0; i < CARD; i++) {
                const unsigned char ch = (unsigned char)c[i];
                if (ch < 32 || ch > 126)
                    CLEF_FAIL(CLEF_EFORMAT,
                              "'%s' HDU %d header card %d (%.*s): byte 0x%02x at column %d "
                              "is not printable ASCII (FITS standard, section 4.1)",
                              name, hdu, card_no, key_len(c), c, ch, i + 1);
            }
            if (!is_value_card(c))
                continue;
            if (string_valued(c)) {
                int i = 9;
                while (i < CARD && c[i] == ' ')
                    i++;
                if (i == CARD || c[i] != '\'')
                    CLEF_FAIL(CLEF_EFORMAT,
                              "'%s' HDU %d header card %d: keyword %.*s is not a quoted "
                              "string: %.70s", name, hdu, card_no, key_len(c), c, c + 10);
            }
            long long v;
            if (key_is(c, "BITPIX")) {
                ok_size &= card_int(c, &bitpix);
            } else if (key_is(c, "NAXIS")) {
                ok_size &= card_int(c, &naxis);
            } else if (key_is(c, "GROUPS")) {
                groups = c[29] == 'T';
            } else if (key_indexed(c, "NAXIS") && !card_int(c, &v)) {
                /* CFITSIO misreads such a value and may then allocate
                 * gigabytes for the table (fuzz_map finding); the standard
                 * asks for an integer (section 4.4.1). */
                CLEF_FAIL(CLEF_EFORMAT, "'%s' HDU %d header card %d: keyword %.*s is not an "
                          "integer: %.70s", name, hdu, card_no, key_len(c), c, c + 10);
            } else if (key_is(c, "NAXIS1")) {
                if (!card_int(c, &naxis1) || naxis1 < 0)
                    ok_size = 0;
            } else if (key_indexed(c, "NAXIS")) {
                if (!card_int(c, &v) || v < 0)
                    ok_size = 0;
                else if (v == 0)
                    prod = 0;
                else if (prod > size / v)
                    prod = size + 1; /* more than the file */
                else
                    prod *= v;
            } else if (key_is(c, "PCOUNT")) {
                ok_size &= card_int(c, &pcount);
            } else if (key_is(c, "GCOUNT")) {
                ok_size &= card_int(c, &gcount);
            }
        }
    }
    /* Data size, section 4.4.1.1: |BITPIX|/8 GCOUNT (PCOUNT + NAXIS1 ... NAXISn);
     * random groups (section 6): NAXIS1 = 0 is not a factor. */
    if (!ok_size || naxis < 0 || pcount < 0 || gcount < 0 || bitpix == 0)
        return CLEF_OK;
    if (naxis1 >= 0 && !(groups && naxis1 == 0)) {
        if (naxis1 == 0)
            prod = 0;
        else if (prod > size / naxis1)
            prod = size + 1;
        else
            prod *= naxis1;
    }
    if (naxis == 0)
        prod = 0;
    if (prod > size || pcount > size || gcount > size)
        return CLEF_OK;
    if (bitpix != 8 && bitpix != 16 && bitpix != 32 && bitpix != 64 && bitpix != -32 &&
        bitpix != -64)
        return CLEF_OK; /* CFITSIO refuses it */
    /* Overflow-checked (fuzz_table finding: GCOUNT x NAXIS overflowed). */
    long long bytes;
    if (!__builtin_mul_overflow(llabs(bitpix) / 8 * gcount, pcount + prod, &bytes) &&
        bytes <= size)
        *data = bytes;
    return CLEF_OK;
}

int clef_fits_check_gzip(const unsigned char *head, size_t nhead, const unsigned char tail[4],
                         long long size, const char *name)
{
    if (nhead < 2 || head[0] != 0x1f || head[1] != 0x8b)
        return CLEF_OK;
    /* 10 bytes of header and 8 of trailer at least (RFC 1952 section 2.3);
     * CFITSIO would take 4 bytes of the header for the size field (fuzz
     * finding: a 10-byte file made it ask for 4 GB). */
    if (size < 18 || !tail)
        CLEF_FAIL(CLEF_EFORMAT, "'%s' is a truncated gzip file (%lld bytes)", name, size);
    /* RFC 1952 section 2.3.1: ISIZE, the last 4 bytes, little-endian, is the
     * uncompressed size mod 2^32.  Deflate expands at most 1032:1 (zlib's
     * technical notes), so a larger claim is impossible; CFITSIO would
     * allocate it before reading a byte (fuzz_spectrum_text finding: a
     * 67-byte file made it ask for 4 GB). */
    const unsigned long long isize = (unsigned long long)tail[0] | (unsigned long long)tail[1] << 8 |
                                     (unsigned long long)tail[2] << 16 |
                                     (unsigned long long)tail[3] << 24;
    if (isize > 1032ULL * (unsigned long long)size + 4096)
        CLEF_FAIL(CLEF_EFORMAT, "'%s' is truncated or not a valid gzip file: its last 4 bytes "
                  "(the gzip size field) claim %llu bytes uncompressed from %lld compressed, "
                  "more than deflate's 1032:1", name, isize, size);
    return CLEF_OK;
}

int clef_fits_check_gzip_file(const char *path)
{
    FILE *fp = fopen(path, "rb");
    if (!fp)
        return CLEF_OK; /* the reader reports it */
    unsigned char head[2] = {0, 0}, tail[4] = {0, 0, 0, 0};
    const size_t nh = fread(head, 1, 2, fp);
    long long size = -1;
    if (fseeko(fp, 0, SEEK_END) == 0)
        size = (long long)ftello(fp);
    const int ok = size >= 4 && fseeko(fp, -4, SEEK_END) == 0 && fread(tail, 1, 4, fp) == 4;
    fclose(fp);
    return size < 0 ? CLEF_OK : clef_fits_check_gzip(head, nh, ok ? tail : NULL, size, path);
}

int clef_fits_check_headers(fitsfile *f, const char *name)
{
    const long long size = f->Fptr->logfilesize;
    long long pos = 0, data;
    CLEF_TRY(check_header(f, name, 1, &pos, size, &data));
    int hdu = 2, lost = data < 0;
    if (!lost)
        pos += (data + BLOCK - 1) / BLOCK * BLOCK;
    char block[BLOCK];
    /* Follow the data sizes from header to header; when they cannot be
     * trusted (a keyword clef does not parse but CFITSIO might, a next
     * header that is not where it should be), check every block of the
     * rest of the file that begins an extension header instead. */
    while (pos < size && hdu <= 100000) {
        if (!read_block(f, pos, size, block))
            return CLEF_OK;
        if (!key_is(block, "XTENSION")) {
            lost = 1;
            pos += BLOCK;
            continue;
        }
        CLEF_TRY(check_header(f, name, hdu++, &pos, size, &data));
        if (data < 0)
            lost = 1;
        if (!lost)
            pos += (data + BLOCK - 1) / BLOCK * BLOCK;
    }
    return CLEF_OK;
}
