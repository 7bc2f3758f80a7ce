/* analysis_cost.c: the cost of one series in one process: reading and decoding its files against
 * measuring them, timed in-process and ready for callgrind (docs/performance.md).
 *
 *   bench_analysis_cost [--repeat N] FILE...
 *
 * The files are one series (one or more echoes). Each pass reads and decodes every file
 * (dcm_read_file) and then measures each echo (an_analyze_series) with the default model,
 * tolerances and parameters, as `slicewarden analyze` does. It prints the least time of the
 * passes for each phase, per series, and the measured values as a sanity check. Under callgrind,
 * --toggle-collect=dcm_read_file or --toggle-collect=an_analyze_series counts one phase only
 * (run with --repeat 1).
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "analysis.h"
#include "dicom.h"
#include "pipeline.h"

#define MAX_ECHOES 4

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

static void free_files(dcm_file **files, int n)
{
    for (int i = 0; i < n; i++) {
        dcm_file_free(files[i]);
        files[i] = NULL;
    }
}

int main(int argc, char **argv)
{
    int rc = 2, repeat = 5, first = 1, nfiles = 0;
    dcm_file **files = NULL;
    an_image *views = NULL;
    an_series_result *res = NULL;
    sw_error err;
    sw_error_clear(&err);

    if (argc > 2 && !strcmp(argv[1], "--repeat")) {
        repeat = atoi(argv[2]);
        first = 3;
    }
    if (repeat < 1 || first >= argc) {
        fprintf(stderr,
                "usage: bench_analysis_cost [--repeat N] FILE... (the files of one series)\n");
        goto out;
    }
    nfiles = argc - first;
    files = calloc((size_t)nfiles, sizeof *files);
    res = calloc(MAX_ECHOES, sizeof *res);
    if (!files || !res) {
        fprintf(stderr, "bench_analysis_cost: out of memory\n");
        goto out;
    }
    if (dcm_init(&err) != SW_OK) {
        fprintf(stderr, "bench_analysis_cost: %s\n", err.msg);
        goto out;
    }
    an_model model;
    an_tolerance tol;
    an_params params;
    an_model_large(&model);
    an_tolerance_default(&tol);
    an_params_default(&params);

    double best_read = INFINITY, best_analyze = INFINITY;
    int nimages = 0, echoes[MAX_ECHOES], n_echoes = 0;
    for (int pass = 0; pass < repeat; pass++) {
        free_files(files, nfiles);
        double t0 = now_s();
        for (int i = 0; i < nfiles; i++) {
            if (dcm_read_file(argv[first + i], NULL, &files[i], &err) != SW_OK) {
                fprintf(stderr, "bench_analysis_cost: %s\n", err.msg);
                rc = 1;
                goto out;
            }
        }
        double t1 = now_s();
        if (!views) {
            for (int i = 0; i < nfiles; i++)
                nimages += files[i]->nframes;
            views = calloc((size_t)nimages, sizeof *views);
            if (!views) {
                fprintf(stderr, "bench_analysis_cost: out of memory\n");
                rc = 1;
                goto out;
            }
        }
        /* the echoes in order of first appearance; each echo's views contiguous */
        n_echoes = 0;
        int nv = 0;
        for (int pick = 0; pick < MAX_ECHOES + 1; pick++) {
            int echo = -1;
            for (int i = 0; i < nfiles && echo < 0; i++)
                for (int f = 0; f < files[i]->nframes && echo < 0; f++) {
                    int e =
                        files[i]->frames[f].echo_number > 0 ? files[i]->frames[f].echo_number : 1;
                    int seen = 0;
                    for (int k = 0; k < n_echoes; k++)
                        seen |= echoes[k] == e;
                    if (!seen)
                        echo = e;
                }
            if (echo < 0)
                break;
            if (n_echoes == MAX_ECHOES) {
                fprintf(stderr, "bench_analysis_cost: more than %d echoes\n", MAX_ECHOES);
                rc = 1;
                goto out;
            }
            echoes[n_echoes++] = echo;
        }
        double t_an = 0;
        for (int k = 0; k < n_echoes; k++) {
            int start = nv;
            for (int i = 0; i < nfiles; i++)
                for (int f = 0; f < files[i]->nframes; f++) {
                    const dcm_image *d = &files[i]->frames[f];
                    if ((d->echo_number > 0 ? d->echo_number : 1) == echoes[k])
                        wd_image_view(d, &views[nv++]);
                }
            double ta = now_s();
            if (an_analyze_series(views + start, nv - start, &model, &tol, &params, &res[k],
                                  &err) != SW_OK) {
                fprintf(stderr, "bench_analysis_cost: echo %d: %s\n", echoes[k], err.msg);
                rc = 1;
                goto out;
            }
            t_an += now_s() - ta;
        }
        if (t1 - t0 < best_read)
            best_read = t1 - t0;
        if (t_an < best_analyze)
            best_analyze = t_an;
    }
    printf("files %d images %d echoes %d passes %d\n", nfiles, nimages, n_echoes, repeat);
    printf("read_decode_ms %.3f\nanalyze_ms %.3f\n", 1e3 * best_read, 1e3 * best_analyze);
    for (int k = 0; k < n_echoes; k++) {
        const an_series_result *r = &res[k];
        printf("echo %d: thickness %.3f mm, bar difference %.3f / %.3f mm, verdict %s\n", echoes[k],
               r->thickness.corrected_mm, r->position[0].bar_difference_mm,
               r->position[1].bar_difference_mm, an_verdict_name(r->verdict));
    }
    rc = 0;
out:
    if (files)
        free_files(files, nfiles);
    free(files);
    free(views);
    free(res);
    dcm_shutdown();
    return rc;
}
