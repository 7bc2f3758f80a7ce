/* report.h: rendering of results for people: annotated slice PNGs (later trend charts and the HTML
 * report). Renders from analysis results and the caller's strings, never from DICOM; writes every
 * file atomically; never prints (errors go into the caller's sw_error). */
#ifndef REPORT_H
#define REPORT_H

#include <stddef.h>

#include "analysis.h"
#include "sw.h"

/* ---- atomic file output ----
 * A temporary file is made in the target's folder, filled, fsync'ed, renamed over the target, and
 * the folder is fsync'ed: readers see the old file or the whole new one, never a partial one. */
typedef struct rp_atomic rp_atomic;

/* Creates a temporary file beside path (mode 0666 less the umask). On success *out owns it: pass
 * it to rp_atomic_commit or rp_atomic_abort exactly once. On failure *out is NULL, nothing is left
 * on disk, and err names path and the reason. */
sw_status rp_atomic_open(const char *path, rp_atomic **out, sw_error *err);
/* Appends n bytes. On failure the handle stays valid (commit will refuse; abort cleans up). */
sw_status rp_atomic_write(rp_atomic *a, const void *buf, size_t n, sw_error *err);
/* fsync, rename over the target, fsync the folder; frees a whatever happens. On failure before the
 * rename the temporary file is removed and the target is untouched. */
sw_status rp_atomic_commit(rp_atomic *a, sw_error *err);
/* Removes the temporary file and frees a. Accepts NULL. */
void rp_atomic_abort(rp_atomic *a);
/* The three steps for a buffer held in memory. */
sw_status rp_atomic_write_file(const char *path, const void *buf, size_t n, sw_error *err);

/* ---- annotated slice PNG ---- */

/* What the caller knows of the series (from its own records; any pointer may be NULL). */
typedef struct rp_labels {
    const char *scanner;     /* station name or site alias, e.g. "ALDMR1" */
    const char *series;      /* series number or identifier */
    const char *description; /* series description / protocol */
    const char *date;        /* acquisition date and time as the caller wants it shown */
    int echo;                /* echo number (1-based); 0 if not known */
} rp_labels;

/* A line of text the renderer drew, with its box in PNG pixels (top-left origin). */
#define RP_TEXT_MAX 160
#define RP_TEXT_LEN 224
typedef enum rp_text_role {
    RP_ROLE_TITLE = 0, /* header lines */
    RP_ROLE_RESULT,    /* a key result (value, uncertainty, verdict) */
    RP_ROLE_VERDICT,   /* a verdict chip's word */
    RP_ROLE_NOTE,      /* "not measured: reason" and similar notes */
    RP_ROLE_AXIS,      /* tick labels and axis titles */
    RP_ROLE_LABEL,     /* labels inside plots and on the image, legend entries */
    RP_ROLE_FOOTER,
} rp_text_role;

typedef struct rp_text_item {
    char text[RP_TEXT_LEN];
    rp_text_role role;
    double x, y, w, h;
} rp_text_item;

/* What a slice PNG shows; filled on success for tests, logs and the HTML report's text
 * alternative. A stored pixel centre (x, y) is drawn at PNG (image_x0 + (x + 0.5) * scale_x,
 * image_y0 + (y + 0.5) * scale_y). */
typedef struct rp_slice_info {
    int width, height;           /* of the PNG */
    double image_x0, image_y0;   /* PNG position of the stored image's top-left corner */
    double scale_x, scale_y;     /* PNG pixels per stored pixel */
    int nearest;                 /* 1: enlarged by pixel replication, 0: interpolated */
    double window_lo, window_hi; /* stored values shown as black and white */
    int n_text;
    int text_truncated; /* more lines were drawn than RP_TEXT_MAX */
    rp_text_item text[RP_TEXT_MAX];
} rp_slice_info;

/* Writes one annotated PNG for image image_index of r (img is that image). Left: the image as
 * stored (window from the 0.5 and 99.5 percentiles), the found phantom outline, the ramp strips'
 * sampled lines with their averaging bands and half-level crossings, the wedge bars with their
 * found ends, a legend and a scale bar. Right: the ramp and bar profiles with their levels and
 * widths. Top: labels and the key results with uncertainty and verdict; bottom: the review notice
 * and the program version. Parts that were not measured show "not measured: reason" instead of
 * numbers. Overlay coordinates are the stored image's pixels (x column, y row, centres at
 * integers). info may be NULL. Returns SW_EINVAL for bad arguments, SW_ENOMEM, or SW_EIO naming
 * path; on failure an existing file at path is left untouched. */
sw_status rp_annotate_slice_png(const char *path, const an_image *img, int image_index,
                                const an_series_result *r, const rp_labels *labels,
                                rp_slice_info *info, sw_error *err);

/* Fills idx (room for max) with the indices of the images that deserve an annotated PNG: the
 * ramp (thickness) slice and the wedge slices that the analysis identified, measured or not, each
 * once, in ascending slice order. Returns how many (0 when no such slice was identified). */
int rp_slices_to_annotate(const an_series_result *r, int *idx, int max);

/* Releases the process-wide caches of cairo and fontconfig that text drawing fills (optional: at
 * exit, when no other thread draws, so that leak checkers see a clean exit). Drawing after it works
 * and fills them again. */
void rp_cleanup(void);

/* The verdict's word as the report prints it ("PASS", "WARN", "FAIL", "UNMEASURABLE"). */
const char *rp_verdict_word(an_verdict v);

/* ---- the HTML report with trend charts (added for trends): html.h ---- */
#include "html.h"

#endif
