/* main.c: the slicewarden program: one binary, one subcommand per job. */
#include <stdio.h>
#include <string.h>

#include "report.h"
#include "sim.h"
#include "sw.h"
#include "wd.h"

typedef struct command {
    const char *name;
    int (*run)(int argc, char **argv);
    const char *summary;
} command;

static const command commands[] = {
    {"demo", wd_cmd_demo, "build and measure an invented hospital's six months of phantom QA"},
    {"check", wd_cmd_check, "validate the configuration and print the effective settings"},
    {"analyze", wd_cmd_analyze, "measure slice thickness and position in files or folders"},
    {"simulate", wd_cmd_simulate, "write a simulated phantom series with its truth"},
    {"export", wd_cmd_export, "write stored measurements as CSV for accreditation"},
    {"report", wd_cmd_report, "write a self-contained HTML report with trends and drift"},
    {"watch", wd_cmd_watch, "watch a folder: measure, store, archive and alert, unattended"},
    {"reanalyze", wd_cmd_reanalyze, "measure stored series again from their archived files (a new run)"},
    {"selftest", wd_cmd_selftest, "measure a fixed sweep of simulated series against the guaranteed accuracy"},
};

static void usage(FILE *f)
{
    fprintf(f, "usage: slicewarden COMMAND [OPTIONS]\n\ncommands:\n");
    for (size_t i = 0; i < sizeof commands / sizeof commands[0]; i++)
        fprintf(f, "  %-10s %s\n", commands[i].name, commands[i].summary);
    fprintf(f, "\n'slicewarden COMMAND --help' describes a command's options.\n"
               "Results support, and never replace, a qualified medical physicist's review.\n");
}

int main(int argc, char **argv)
{
    if (argc < 2) {
        usage(stderr);
        return 2;
    }
    if (!strcmp(argv[1], "--help") || !strcmp(argv[1], "-h") || !strcmp(argv[1], "help")) {
        usage(stdout);
        return 0;
    }
    if (!strcmp(argv[1], "--version")) {
        printf("slicewarden %s\n", SW_VERSION);
        return 0;
    }
    for (size_t i = 0; i < sizeof commands / sizeof commands[0]; i++)
        if (!strcmp(argv[1], commands[i].name)) {
            int rc = commands[i].run(argc - 1, argv + 1);
            /* Release the libraries' process-wide caches, so leak checkers see only real leaks. */
            rp_cleanup();
            sim_cleanup();
            return rc;
        }
    fprintf(stderr, "slicewarden: unknown command '%s'\n", argv[1]);
    usage(stderr);
    return 2;
}
