/* placeholder until the simulator lands */
#include <stdio.h>
#include "wd.h"
int wd_cmd_simulate(int argc, char **argv) { (void)argc; (void)argv; fprintf(stderr, "simulate: not built yet\n"); return 2; }
