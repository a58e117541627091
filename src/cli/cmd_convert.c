/* clef convert IN OUT: read a HEALPix map in any layout clef understands
 * and write it in clef's own layout (RING, implicit, full sky, missing
 * pixels as the bad-pixel value), atomically. */
#define _GNU_SOURCE
#include <getopt.h>
#include <stdio.h>
#include <string.h>
#include <strings.h>

#include "clef/map.h"
#include "cli.h"

static void help(FILE *f)
{
    fprintf(f,
            "Usage: clef convert [OPTIONS] INPUT OUTPUT\n\n"
            "Rewrite a HEALPix map (RING or NESTED, implicit or explicit index, any numeric\n"
            "column type, plain or gzip) as a full-sky RING table: PIXTYPE, ORDERING,\n"
            "NSIDE, FIRSTPIX, LASTPIX, INDXSCHM, OBJECT, COORDSYS, BAD_DATA, TUNIT and\n"
            "CLEFVERS keywords; missing pixels are written as -1.6375e30.  An OUTPUT\n"
            "name ending in .gz gives a gzip-compressed file.  OUTPUT is written to a\n"
            "temporary file and renamed on success; it is replaced if it exists (through a\n"
            "symbolic link, its target), but never when it is INPUT itself under any name\n"
            "(exit 3); '-' writes to standard output.  On any error nothing is written.\n\n"
            "Options:\n"
            "  --hdu HDU          input table: extension number (1 = first after the\n"
            "                     primary) or EXTNAME; default: the first binary table\n"
            "  --column COL       input column: number (1-based) or name; default: the\n"
            "                     first value column\n"
            "  --ordering ORD     RING or NESTED, for inputs without an ORDERING keyword\n"
            "  --row-length N     values per output row (must divide 12 nside^2);\n"
            "                     default 1024 when it divides, else 1\n"
            "  --float32          write 32-bit floats (default: 64-bit)\n"
            "  --name NAME        output column name (default: the input column's name)\n"
            "  --quiet            print errors only (OUTPUT is still written)\n"
            "  --verbose          report what is read and written\n"
            "  --help             show this help\n\n"
            "Exit codes: 0 ok, 2 usage, 3 invalid option value, 4 cannot read or write a\n"
            "file, 5 malformed input, 8 out of memory.\n"
            "Example: clef convert --float32 sky_nested.fits.gz sky_ring.fits\n");
}

int cmd_convert(int argc, char **argv)
{
    static const struct option longopts[] = {
        {"hdu", required_argument, NULL, 'H'},      {"column", required_argument, NULL, 'c'},
        {"ordering", required_argument, NULL, 'o'}, {"row-length", required_argument, NULL, 'r'},
        {"float32", no_argument, NULL, 'f'},        {"name", required_argument, NULL, 'n'},
        {"quiet", no_argument, NULL, 'q'},          {"verbose", no_argument, NULL, 'v'},
        {"help", no_argument, NULL, 'h'},           {NULL, 0, NULL, 0},
    };
    clef_map_read_opts ro = {0};
    clef_map_write_opts wo = {0};
    long rowlen = 0;
    int c;
    opterr = 0;
    optind = 1;
    while ((c = getopt_long(argc, argv, "", longopts, NULL)) != -1) {
        switch (c) {
        case 'H': ro.hdu = optarg; break;
        case 'c': ro.column = optarg; break;
        case 'o': ro.ordering = optarg; break;
        case 'r':
            if (cli_parse_long("convert", "--row-length", optarg, &rowlen))
                return CLI_EXIT_USAGE;
            if (rowlen < 1 || rowlen > 1 << 20)
                return cli_usage_error("convert", "--row-length must be in [1, 1048576], got %ld",
                                       rowlen);
            break;
        case 'f': wo.single_precision = 1; break;
        case 'n': wo.column = optarg; break;
        case 'q': cli_verbosity = 0; break;
        case 'v': cli_verbosity = 2; break;
        case 'h': help(stdout); return CLI_EXIT_OK;
        default:
            return cli_usage_error("convert", "unknown option or missing value: '%s'",
                                   argv[optind - 1]);
        }
    }
    if (optind != argc - 2)
        return cli_usage_error("convert", "expected INPUT and OUTPUT, got %d arguments",
                               argc - optind);
    if (cli_check_ordering("convert", ro.ordering))
        return CLI_EXIT_USAGE;
    cli_setup_logging();
    const char *in = argv[optind], *out = argv[optind + 1];
    const char *inputs[1] = {in}, *outputs[1] = {out};
    const int rc_out = cli_check_outputs(inputs, 1, outputs, 1);
    if (rc_out != CLI_EXIT_OK)
        return rc_out;

    clef_map *m;
    int status = clef_map_read(&m, in, &ro);
    if (status != CLEF_OK)
        return cli_fail(status);
    if (rowlen == 0)
        rowlen = m->npix % 1024 == 0 ? 1024 : 1;
    wo.row_length = (int)rowlen;
    if (!wo.column)
        wo.column = m->column[0] ? m->column : NULL;
    char history[512];
    snprintf(history, sizeof history, "clef convert from %.400s", in);
    wo.history = history;
    cli_verbose("writing %s: nside %lld, %ld values per row, %s", out, (long long)m->nside,
                rowlen, wo.single_precision ? "float32" : "float64");
    status = clef_map_write(m, out, &wo);
    clef_map_free(m);
    if (status != CLEF_OK)
        return cli_fail(status);
    return CLI_EXIT_OK;
}
