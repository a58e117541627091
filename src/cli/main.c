/* clef: entry point and subcommand dispatch. */
#include <stdio.h>
#include <string.h>

#include "clef/clef.h"
#include "cli.h"

/* One line per subcommand; the table ends with an empty entry. */
static const cli_command commands[] = {
    {"inspect", "summarise a HEALPix map file", cmd_inspect},
    {"convert", "rewrite a HEALPix map in clef's RING layout", cmd_convert},
    {"simulate", "draw a Gaussian sky with beam, pixel window and noise", cmd_simulate},
    {"peak", "locate the first acoustic peak in a band-power table", cmd_peak},
    {"spectrum", "band powers, errors and first peak of a map (or two) and a mask", cmd_spectrum},
    {"model", "analytic CMB temperature spectrum for cosmological parameters", cmd_model},
    {"geometry", "curvature and acoustic scale from the first peak", cmd_geometry},
    {"mask", "build, cut, apodize and report a mask", cmd_mask},
    {"plot", "draw band powers, a map view or the curvature posterior", cmd_plot},
    {NULL, NULL, NULL},
};

static void usage(FILE *f)
{
    fprintf(f,
            "Usage: clef [--version] [--help] COMMAND [OPTIONS] [ARGS]\n\n"
            "clef turns HEALPix sky maps into angular power spectra.\n\n"
            "Commands:\n");
    for (int i = 0; commands[i].name; i++)
        fprintf(f, "  %-10s %s\n", commands[i].name, commands[i].summary);
    fprintf(f,
            "\nEvery command takes --help, --quiet, --verbose.\n"
            "Exit codes: 0 ok, 2 usage, 3 invalid input, 4 I/O error, 5 bad file format,\n"
            "6 numerical failure, 7 unsupported, 8 out of memory, 9 no peak found (peak --require).\n");
}

int main(int argc, char **argv)
{
    if (argc < 2) {
        usage(stderr);
        return CLI_EXIT_USAGE;
    }
    const char *name = argv[1];
    if (!strcmp(name, "--help") || !strcmp(name, "-h") || !strcmp(name, "help")) {
        usage(stdout);
        return CLI_EXIT_OK;
    }
    if (!strcmp(name, "--version") || !strcmp(name, "-V")) {
        printf("clef %s\n", CLEF_VERSION);
        return CLI_EXIT_OK;
    }
    for (int i = 0; commands[i].name; i++)
        if (!strcmp(name, commands[i].name))
            return commands[i].run(argc - 1, argv + 1);
    fprintf(stderr, "clef: unknown command '%s'\n\n", name);
    usage(stderr);
    return CLI_EXIT_USAGE;
}
