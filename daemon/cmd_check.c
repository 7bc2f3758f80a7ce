/* cmd_check.c: `slicewarden check [-c FILE]`: validate the configuration and the files it names,
 * then print the effective settings. */
#include <getopt.h>
#include <stdio.h>
#include <string.h>
#include <unistd.h>

#include "config.h"
#include "wd.h"

int wd_cmd_check(int argc, char **argv)
{
    static const struct option opts[] = {
        {"config", required_argument, NULL, 'c'},
        {"help", no_argument, NULL, 'h'},
        {NULL, 0, NULL, 0},
    };
    const char *path = NULL;
    int c;
    optind = 1;
    while ((c = getopt_long(argc, argv, "c:h", opts, NULL)) != -1) {
        switch (c) {
        case 'c': path = optarg; break;
        case 'h':
            printf("usage: slicewarden check [-c FILE]\n"
                   "Validates the configuration (default %s), the phantom model and tolerance\n"
                   "files it names, and prints the effective settings. Exit 0 when valid, 2 if not.\n",
                   WD_DEFAULT_CONFIG);
            return 0;
        default: return 2;
        }
    }
    if (optind < argc) {
        fprintf(stderr, "slicewarden check: unexpected argument '%s'\n", argv[optind]);
        return 2;
    }
    static wd_config cfg;
    static wd_tolerances tol;
    an_model model;
    sw_error err;
    sw_error_clear(&err);
    wd_config_default(&cfg);
    if (!path && access(WD_DEFAULT_CONFIG, F_OK) == 0)
        path = WD_DEFAULT_CONFIG;
    if (path && wd_config_load(&cfg, path, &err) != SW_OK) {
        fprintf(stderr, "slicewarden: %s\n", err.msg);
        return 2;
    }
    wd_config_resolve(&cfg);
    an_model_large(&model);
    if (cfg.model_file[0] && wd_model_load(&model, cfg.model_file, &err) != SW_OK) {
        fprintf(stderr, "slicewarden: %s\n", err.msg);
        return 2;
    }
    wd_tolerances_default(&tol);
    if (cfg.tolerance_file[0] && wd_tolerances_load(&tol, cfg.tolerance_file, &err) != SW_OK) {
        fprintf(stderr, "slicewarden: %s\n", err.msg);
        return 2;
    }
    wd_config_print(&cfg, stdout);
    printf("\n; phantom model (%s)\n", cfg.model_file[0] ? cfg.model_file : "built-in");
    wd_model_print(&model, stdout);
    printf("\n; tolerances (%s)\n", cfg.tolerance_file[0] ? cfg.tolerance_file : "built-in");
    wd_tolerances_print(&tol, stdout);
    return 0;
}
