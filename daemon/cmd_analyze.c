/* cmd_analyze.c: `slicewarden analyze PATH...`: measure the phantom series found in files or folders. */
#include <errno.h>
#include <getopt.h>
#include <jansson.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "config.h"
#include "dicom.h"
#include "files.h"
#include "pipeline.h"
#include "watch.h"
#include "wd.h"

/* One file's header, kept until its series is measured. */
typedef struct entry {
    const char *path;
    dcm_file *head; /* header only */
    int series;     /* index into the series table */
} entry;

typedef struct series_ref {
    char uid[DCM_UID_MAX];
    int first_entry;
} series_ref;

static void usage(FILE *f)
{
    fprintf(f,
            "usage: slicewarden analyze [--json] [--png DIR] [--half-level zero|floor|background]\n"
            "                           [--model FILE] PATH...\n"
            "Measures slice thickness and slice position in the phantom series found in the given\n"
            "files and folders (folders are searched recursively).\n"
            "  --json        one JSON document on stdout instead of text\n"
            "  --png DIR     write an annotated PNG per measured slice into DIR\n"
            "  --half-level  how the half level of a ramp profile is set: floor (the default: half\n"
            "                the plateau above the true zero, through the Rician model of the\n"
            "                noise floor), zero (half the plateau as measured, the ACR\n"
            "                convention) or background (half-way to the background; biased)\n"
            "  --model FILE  phantom model file (docs/models.md) [the built-in large phantom]\n"
            "Exit status: 0 all pass, 1 a warn, fail or unmeasurable result, 2 an input or usage error.\n"
            "Results support, and never replace, a qualified medical physicist's review.\n");
}

/* dcm_read_file, with a refusal confirmed by a second read: DCMTK reports an allocation that
 * failed inside its parser as malformed data, which would leave a good file out of its series. */
static sw_status read_checked(const char *path, const dcm_read_opts *o, dcm_file **out,
                              sw_error *err)
{
    sw_status rs = dcm_read_file(path, o, out, err);
    if (rs == SW_OK || rs == SW_ENOMEM || rs == SW_EIO)
        return rs;
    sw_error again;
    sw_error_clear(&again);
    dcm_file *f = NULL;
    sw_status r2 = dcm_read_file(path, o, &f, &again);
    if (r2 == SW_OK) {
        sw_error_clear(err);
        *out = f;
        return SW_OK;
    }
    dcm_file_free(f);
    if (r2 == SW_ENOMEM || r2 == SW_EIO) {
        sw_error_clear(err);
        sw_error_set(err, r2, "%s", again.msg);
        return r2;
    }
    return rs;
}

static int find_series(series_ref *s, int n, const char *uid)
{
    for (int i = 0; i < n; i++)
        if (!strcmp(s[i].uid, uid))
            return i;
    return -1;
}

/* Says on stderr, naming a file of the series, what could not be measured and why. */
static void report_unmeasurable(const wd_measured *m, const char *path)
{
    for (int i = 0; i < m->n_echoes; i++) {
        const an_series_result *r = m->echo[i].res;
        const char *uid = m->first->series_instance_uid;
        int echo = m->echo[i].echo_number;
        if (r->reason[0])
            fprintf(stderr, "slicewarden: %s: series %s echo %d: unmeasurable: %s\n", path, uid,
                    echo, r->reason);
        if (r->thickness.verdict == AN_UNMEASURABLE && strcmp(r->thickness.reason, r->reason))
            fprintf(stderr, "slicewarden: %s: series %s echo %d: slice thickness unmeasurable: %s\n",
                    path, uid, echo, r->thickness.reason);
        for (int k = 0; k < 2; k++) {
            const an_position *p = &r->position[k];
            if (p->verdict == AN_UNMEASURABLE && p->reason[0] && strcmp(p->reason, r->reason))
                fprintf(stderr,
                        "slicewarden: %s: series %s echo %d: slice position (slice %d) "
                        "unmeasurable: %s\n",
                        path, uid, echo, p->slice, p->reason);
        }
    }
}

/* Reads the pixels of every file of series k and measures it; prints or appends the results. */
static int measure_series(entry *e, int ne, int k, const wd_method *method, json_t *out_json,
                          const char *png_dir, an_verdict *worst)
{
    int rc = 0, nimg = 0, cap = 0;
    dcm_file **files = calloc((size_t)ne, sizeof *files);
    const dcm_image **imgs = NULL;
    wd_measured m;
    memset(&m, 0, sizeof m);
    int first = -1;
    for (int i = 0; i < ne && first < 0; i++)
        if (e[i].series == k)
            first = i;
    if (!files)
        goto oom;
    int lost = 0;
    for (int i = 0; i < ne; i++) {
        if (e[i].series != k)
            continue;
        sw_error err;
        sw_error_clear(&err);
        sw_status rs = read_checked(e[i].path, NULL, &files[i], &err);
        if (rs != SW_OK) {
            fprintf(stderr, "slicewarden: %s\n", err.msg);
            rc = 2;
            /* Out of memory or an I/O error: the file is not known to be bad, and a series
             * measured without it would print numbers of another series. */
            lost |= rs == SW_ENOMEM || rs == SW_EIO;
            continue;
        }
        cap += files[i]->nframes;
    }
    if (lost) {
        fprintf(stderr, "slicewarden: %s: series %s not measured: a file of it could not be read\n",
                e[first].path, e[first].head->frames[0].series_instance_uid);
        goto out;
    }
    imgs = calloc((size_t)cap + 1, sizeof *imgs);
    if (!imgs)
        goto oom;
    for (int i = 0; i < ne; i++)
        for (int f = 0; files[i] && f < files[i]->nframes; f++)
            imgs[nimg++] = &files[i]->frames[f];
    if (nimg == 0)
        goto out;
    sw_error err;
    sw_error_clear(&err);
    /* The built-in tolerance set, as the service applies it: a 3D series is judged by its own
     * entry (partition-3d-default), a 2D one by the default. */
    wd_method judged = *method;
    wd_tolerances tols;
    wd_tolerances_default(&tols);
    judged.tol = *wd_tolerances_for(&tols, imgs[0]->station_name,
                                    wd_tolerance_key(WD_MATCH_NONE, imgs[0]));
    if (wd_measure(imgs, nimg, &judged, &m, &err) != SW_OK) {
        fprintf(stderr, "slicewarden: %s\n", err.msg);
        rc = 2;
        goto out;
    }
    if (out_json) {
        json_t *arr = json_object_get(out_json, "series");
        size_t before = json_array_size(arr);
        int bad = wd_measured_json(&m, arr) != SW_OK;
        /* which tolerance entry judged each echo just appended */
        for (size_t j = before; !bad && j < json_array_size(arr); j++)
            bad = json_object_set_new(json_array_get(arr, j), "tolerance_set",
                                      json_string(judged.tol.name)) != 0;
        if (bad) {
            /* none of this series' echoes, rather than some without all their fields */
            while (json_array_size(arr) > before)
                json_array_remove(arr, json_array_size(arr) - 1);
            fprintf(stderr, "slicewarden: %s: out of memory while writing the results of series %s\n",
                    e[first].path, m.first->series_instance_uid);
            rc = 2;
        }
    } else {
        wd_measured_text(&m, stdout);
    }
    report_unmeasurable(&m, e[first].path);
    if (png_dir) {
        sw_error_clear(&err);
        if (wd_measured_pngs(&m, png_dir, NULL, NULL, 0, &err) != SW_OK) {
            fprintf(stderr, "slicewarden: %s\n", err.msg);
            rc = 2;
        }
    }
    an_verdict v = wd_measured_verdict(&m);
    if (v > *worst)
        *worst = v;
    goto out;
oom:
    fprintf(stderr, "slicewarden: out of memory\n");
    rc = 2;
out:
    wd_measured_free(&m);
    if (files)
        for (int i = 0; i < ne; i++)
            dcm_file_free(files[i]);
    free(files);
    free(imgs);
    return rc;
}

int wd_cmd_analyze(int argc, char **argv)
{
    static const struct option opts[] = {
        {"json", no_argument, NULL, 'j'},
        {"png", required_argument, NULL, 'p'},
        {"half-level", required_argument, NULL, 'H'},
        {"model", required_argument, NULL, 'm'},
        {"help", no_argument, NULL, 'h'},
        {NULL, 0, NULL, 0},
    };
    int json = 0, rc = 0, ns = 0;
    const char *unread = NULL; /* a file whose header failed for want of memory or an I/O error */
    const char *png_dir = NULL;
    wd_method method;
    wd_method_default(&method);
    wd_paths paths = {0};
    entry *e = NULL;
    series_ref *s = NULL;
    json_t *doc = NULL;
    an_verdict worst = AN_PASS;
    int c;
    optind = 1;
    while ((c = getopt_long(argc, argv, "", opts, NULL)) != -1) {
        switch (c) {
        case 'j': json = 1; break;
        case 'p': png_dir = optarg; break;
        case 'H':
            if (!strcmp(optarg, "zero"))
                method.params.half_level = AN_HALF_TRUE_ZERO;
            else if (!strcmp(optarg, "floor"))
                method.params.half_level = AN_HALF_FLOOR_MODEL;
            else if (!strcmp(optarg, "background"))
                method.params.half_level = AN_HALF_BACKGROUND;
            else {
                fprintf(stderr, "slicewarden analyze: unknown half level '%s'\n", optarg);
                return 2;
            }
            break;
        case 'm': {
            sw_error merr;
            sw_error_clear(&merr);
            if (wd_model_load(&method.model, optarg, &merr) != SW_OK) {
                fprintf(stderr, "slicewarden analyze: %s\n", merr.msg);
                return 2;
            }
            break;
        }
        case 'h': usage(stdout); return 0;
        default: usage(stderr); return 2;
        }
    }
    if (optind >= argc) {
        usage(stderr);
        return 2;
    }
    sw_error err;
    sw_error_clear(&err);
    if (dcm_init(&err) != SW_OK) {
        fprintf(stderr, "slicewarden: %s\n", err.msg);
        return 2;
    }
    for (int i = optind; i < argc; i++) {
        sw_error_clear(&err);
        size_t before = paths.n;
        if (wd_paths_collect(&paths, argv[i], &err) != SW_OK) {
            fprintf(stderr, "slicewarden: %s\n", err.msg);
            rc = 2;
        } else if (paths.n == before) {
            fprintf(stderr, "slicewarden: %s: no files found\n", argv[i]);
            rc = 2;
        }
    }
    if (png_dir && wd_mkdir_p(png_dir) != 0) {
        fprintf(stderr, "slicewarden: %s: cannot create the folder: %s\n", png_dir,
                strerror(errno));
        rc = 2;
        goto out;
    }
    e = calloc(paths.n + 1, sizeof *e);
    s = calloc(paths.n + 1, sizeof *s);
    if (!e || !s) {
        fprintf(stderr, "slicewarden: out of memory\n");
        rc = 2;
        goto out;
    }
    /* Pass 1: headers only, to group files into series without holding pixels. */
    const dcm_read_opts head = {.header_only = 1};
    for (size_t i = 0; i < paths.n; i++) {
        e[i].path = paths.v[i];
        e[i].series = -1;
        sw_error_clear(&err);
        sw_status rs = read_checked(paths.v[i], &head, &e[i].head, &err);
        if (rs == SW_ENOMEM || rs == SW_EIO) {
            /* Not known to be bad, and of no known series: any series measured now might be
             * measured without it. */
            fprintf(stderr, "slicewarden: %s\n", err.msg);
            unread = paths.v[i];
            rc = 2;
            continue;
        }
        if (rs != SW_OK) {
            if (!paths.named[i] && !wd_has_dicom_magic(paths.v[i])) {
                /* Found in a folder and not DICOM at all (a note, a truth file): say so, go on. */
                fprintf(stderr, "slicewarden: %s: skipped, not a DICOM file\n", paths.v[i]);
                continue;
            }
            fprintf(stderr, "slicewarden: %s\n", err.msg);
            rc = 2;
            continue;
        }
        const dcm_image *d = &e[i].head->frames[0];
        if (strcmp(d->modality, "MR") != 0) {
            fprintf(stderr, "slicewarden: %s: not an MR image (modality '%s')\n", paths.v[i],
                    d->modality);
            rc = 2;
            continue;
        }
        if (!d->series_instance_uid[0]) {
            fprintf(stderr, "slicewarden: %s: no SeriesInstanceUID\n", paths.v[i]);
            rc = 2;
            continue;
        }
        int k = find_series(s, ns, d->series_instance_uid);
        if (k < 0) {
            k = ns++;
            sw_strlcpy(s[k].uid, d->series_instance_uid, sizeof s[k].uid);
            s[k].first_entry = (int)i;
        }
        e[i].series = k;
    }
    if (json) {
        doc = json_object();
        json_object_set_new(doc, "program", json_string("slicewarden " SW_VERSION));
        json_object_set_new(doc, "series", json_array());
    }
    /* Pass 2: one series at a time, pixels read, measured and released. */
    if (unread) {
        fprintf(stderr, "slicewarden: no series measured: %s could not be read, and may belong to "
                        "any of them\n", unread);
        ns = 0;
    }
    for (int k = 0; k < ns; k++) {
        int r = measure_series(e, (int)paths.n, k, &method, doc, png_dir, &worst);
        if (r > rc)
            rc = r;
    }
    if (json) {
        /* Dumped whole into memory first: a failed dump never prints half a document. */
        char *text = json_dumps(doc, JSON_INDENT(2) | JSON_REAL_PRECISION(6));
        if (!text || json_object_size(doc) != 2) {
            fprintf(stderr, "slicewarden: out of memory while writing the results\n");
            rc = 2;
        } else {
            fputs(text, stdout);
            fputc('\n', stdout);
        }
        free(text);
    }
    if (fflush(stdout) != 0 || ferror(stdout)) {
        fprintf(stderr, "slicewarden: cannot write the results: %s\n", strerror(errno));
        rc = 2;
    }
    if (rc == 0 && ns == 0) {
        fprintf(stderr, "slicewarden: no MR series found\n");
        rc = 2;
    }
    if (rc == 0 && worst != AN_PASS)
        rc = 1;
out:
    json_decref(doc);
    if (e)
        for (size_t i = 0; i < paths.n; i++)
            dcm_file_free(e[i].head);
    free(e);
    free(s);
    wd_paths_free(&paths);
    dcm_shutdown();
    return rc;
}
