/* clef: entry point and subcommand dispatch. */
#define _POSIX_C_SOURCE 200809L
#include <signal.h>
#include <stdio.h>
#include <string.h>
#include <unistd.h>

#include "clef/clef.h"
#include "clef/kernel.h"
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
    {"sims", "simulation ensemble: transfer function, covariance, bias, calibration (MPI)", cmd_sims},
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
            "6 numerical failure, 7 unsupported, 8 out of memory, 9 no peak found (peak --require),\n"
            "10 run folder of another run description (sims);\n"
            "killed by SIGINT/SIGTERM/SIGHUP after removing temporaries: 130/143/129.\n");
}

/* SIGINT, SIGTERM, SIGHUP: remove every registered temporary, say so, and
 * die of the same signal (default action re-raised), so a shell or batch
 * system sees the usual status: 130, 143, 129 (docs/exit-codes.md).  Only
 * async-signal-safe calls: unlink (in clef_temp_remove_all), write,
 * sigaction, raise. */
static void on_signal(int sig)
{
    clef_temp_remove_all();
    static const char msg[] = "clef: interrupted by a signal; temporary files removed\n";
    ssize_t ignored = write(STDERR_FILENO, msg, sizeof msg - 1);
    (void)ignored;
    struct sigaction sa;
    memset(&sa, 0, sizeof sa);
    sa.sa_handler = SIG_DFL;
    sigemptyset(&sa.sa_mask);
    sigaction(sig, &sa, NULL);
    raise(sig);
}

static void install_signal_handlers(void)
{
    static const int sigs[] = {SIGINT, SIGTERM, SIGHUP};
    struct sigaction sa;
    memset(&sa, 0, sizeof sa);
    sa.sa_handler = on_signal;
    sigfillset(&sa.sa_mask); /* no second handler on top of the first */
    for (size_t i = 0; i < sizeof sigs / sizeof *sigs; i++) {
        struct sigaction old;
        /* A signal ignored by the parent (nohup, a batch system) stays ignored. */
        if (sigaction(sigs[i], NULL, &old) == 0 && old.sa_handler == SIG_IGN)
            continue;
        sigaction(sigs[i], &sa, NULL);
    }
}

int main(int argc, char **argv)
{
    install_signal_handlers();
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
        /* Kernels this binary can run here (include/clef/kernel.h), widest
         * first, then the one plans use by default (CLEF_KERNEL or auto). */
        printf("kernels:");
        for (int k = CLEF_KERNEL_COUNT - 1; k > CLEF_KERNEL_AUTO; k--)
            if (clef_kernel_available((clef_kernel)k))
                printf(" %s", clef_kernel_name((clef_kernel)k));
        clef_kernel k;
        if (clef_kernel_resolve(CLEF_KERNEL_AUTO, &k) == CLEF_OK)
            printf(" (in use: %s)\n", clef_kernel_name(k));
        else
            printf(" (in use: none: %s)\n", clef_last_error());
        return CLI_EXIT_OK;
    }
    for (int i = 0; commands[i].name; i++)
        if (!strcmp(name, commands[i].name))
            return commands[i].run(argc - 1, argv + 1);
    fprintf(stderr, "clef: unknown command '%s'\n\n", name);
    usage(stderr);
    return CLI_EXIT_USAGE;
}
