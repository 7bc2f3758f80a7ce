/* fuzz_one.c: bytes -> dicom -> the daemon's views -> analysis -> JSON and text, all freed. */
#include "fuzz_one.h"

#include <jansson.h>
#include <stdio.h>

#include "dicom.h"
#include "pipeline.h"

static FILE *sink; /* /dev/null: the text report is formatted, not kept */

int fz_init(sw_error *err)
{
    if (dcm_init(err) != SW_OK)
        return -1;
    sink = fopen("/dev/null", "w");
    if (!sink) {
        sw_error_set(err, SW_EIO, "fuzz: /dev/null: cannot open");
        return -1;
    }
    return 0;
}

sw_status fz_one(const uint8_t *data, size_t len, const char *name, int *was_read,
                 sw_error *err)
{
    dcm_file *head = NULL, *f = NULL;
    const dcm_image **imgs = NULL;
    json_t *arr = NULL;
    wd_measured *m = NULL;
    wd_method *method = NULL;
    sw_error herr = {0};
    dcm_read_opts ho = {.header_only = 1};
    sw_status st;

    *was_read = 0;

    /* The daemon's first pass (assembly) reads attributes only; its result does not gate the
     * full read here, so both paths see every input. */
    if (dcm_read_buffer(data, len, name, &ho, &head, &herr) == SW_OK && head) {
        for (int i = 0; i < head->nframes; i++)
            if (head->frames[i].pixels)
                __builtin_trap(); /* header_only promises no pixels */
    }
    st = dcm_read_buffer(data, len, name, NULL, &f, err);
    if (st != SW_OK)
        goto out;
    if (!f || f->nframes < 1) {
        st = sw_error_set(err, SW_EFORMAT, "%s: read succeeded with no frames", name);
        goto out;
    }
    *was_read = 1;
    imgs = calloc((size_t)f->nframes, sizeof *imgs);
    m = calloc(1, sizeof *m);
    method = calloc(1, sizeof *method);
    arr = json_array();
    if (!imgs || !m || !method || !arr) {
        st = sw_error_set(err, SW_ENOMEM, "%s: out of memory", name);
        goto out;
    }
    for (int i = 0; i < f->nframes; i++)
        imgs[i] = &f->frames[i];
    wd_method_default(method);
    st = wd_measure(imgs, f->nframes, method, m, err);
    if (st == SW_OK) {
        (void)wd_measured_verdict(m);
        (void)wd_measured_json(m, arr);
        wd_measured_text(m, sink);
    }
    wd_measured_free(m);
out:
    json_decref(arr);
    free(method);
    free(m);
    free(imgs);
    dcm_file_free(f);
    dcm_file_free(head);
    return st;
}
