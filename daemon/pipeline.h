/* pipeline.h: from the images of one series to measured results per echo; shared by analyze and watch. */
#ifndef WD_PIPELINE_H
#define WD_PIPELINE_H

#include <jansson.h>
#include <stdio.h>

#include "analysis.h"
#include "dicom.h"
#include "hints.h"

#define WD_MAX_ECHOES 8

/* The measurement settings in force: model, tolerance set, method parameters. */
typedef struct wd_method {
    an_model model;
    an_tolerance tol;
    an_params params;
    wd_hint_settings hints; /* when a number counts as off for the cause hints */
} wd_method;

void wd_method_default(wd_method *m);

/* The analysis view of a decoded image: its pixels (borrowed), geometry, spacing, SliceThickness
 * and whether the patient lay feet first. */
void wd_image_view(const dcm_image *d, an_image *v);

/* One echo of a series: the images (borrowed), their views, and the result (owned). */
typedef struct wd_echo {
    int echo_number;
    double echo_time_ms;
    int n;
    const dcm_image *img[AN_MAX_IMAGES];
    an_image view[AN_MAX_IMAGES];
    an_series_result *res;
    int n_hints; /* cause hints of this echo's result (docs/hints.md) */
    wd_hint hint[WD_MAX_HINTS];
} wd_echo;

typedef struct wd_measured {
    const dcm_image *first; /* attributes of the series (borrowed) */
    int n_duplicates;        /* images dropped as repeated SOP instance (and frame) */
    int partition;           /* 1: MRAcquisitionType 3D: the ramp slice's thickness is a 3D
                                partition's thickness, labelled so and judged by the 3d set */
    int n_echoes;
    wd_echo echo[WD_MAX_ECHOES];
} wd_measured;

/* Splits the images of one series by echo (duplicates by SOP instance UID and frame dropped), and
 * analyses each echo. The images must outlive out. On failure out holds nothing to free beyond what
 * wd_measured_free releases; err names the series and the reason. */
sw_status wd_measure(const dcm_image *const *imgs, int n, const wd_method *method, wd_measured *out,
                     sw_error *err);
void wd_measured_free(wd_measured *m);

/* "partition thickness" for a 3D acquisition, else "slice thickness"; the stored metric's name
 * ("partition_thickness" or "slice_thickness"). */
const char *wd_thickness_label(const wd_measured *m);
const char *wd_thickness_metric(const wd_measured *m);

/* The worst verdict over all echoes. */
an_verdict wd_measured_verdict(const wd_measured *m);

/* Output: one JSON object per echo appended to array (the documented contract), and the text block. */
sw_status wd_measured_json(const wd_measured *m, json_t *array);
void wd_measured_text(const wd_measured *m, FILE *f);

/* Writes an annotated PNG for each slice worth one (ramp and wedge slices) of each echo into dir,
 * named SERIES_eECHO_sSLICE.png (the series UID made safe). scanner labels the images. When paths
 * is not NULL, the path of the first PNG of the worst verdict goes there (size n), for alerts. */
sw_status wd_measured_pngs(const wd_measured *m, const char *dir, const char *scanner, char *paths,
                           size_t n, sw_error *err);

#endif
