/* placeholder until the analysis lands */
#include <stdio.h>
#include "wd.h"
int wd_cmd_analyze(int argc, char **argv) { (void)argc; (void)argv; fprintf(stderr, "analyze: not built yet\n"); return 2; }
