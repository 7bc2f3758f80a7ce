/* an_tool.c: a line-oriented front end to a few analysis functions, so that an external script can
 * cross-check them against reference libraries (see check_scipy.py). Reads commands on stdin:
 *   W level peak v0 v1 ... vN-1   full width at level: prints "lo hi" (fractional indices) or
 * "fail" R a sigma                     Rician mean and SD of a signal a with per-channel noise
 * sigma V m sigma                     the signal whose Rician mean is m */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "an_int.h"

int main(void)
{
    static char line[1 << 20];
    static float v[AN_PROFILE_MAX];
    while (fgets(line, sizeof line, stdin)) {
        char *p = line, *end;
        char cmd = *p++;
        if (cmd == 'W') {
            double level = strtod(p, &end);
            p = end;
            int peak = (int)strtol(p, &end, 10), n = 0;
            p = end;
            for (;;) {
                double x = strtod(p, &end);
                if (end == p || n >= AN_PROFILE_MAX)
                    break;
                v[n++] = (float)x;
                p = end;
            }
            double lo, hi;
            if (an_width_at_level(v, n, peak, level, &lo, &hi))
                printf("fail\n");
            else
                printf("%.9f %.9f\n", lo, hi);
        } else if (cmd == 'R') {
            double a = strtod(p, &end), s = strtod(end, NULL);
            printf("%.12g %.12g\n", an_rice_mean(a, s), an_rice_sd(a, s));
        } else if (cmd == 'V') {
            double m = strtod(p, &end), s = strtod(end, NULL);
            printf("%.12g\n", an_rice_invert(m, s));
        } else {
            continue;
        }
        fflush(stdout);
    }
    return 0;
}
