/* hints.h: short physics-based readings of a result or of a drift, for the physicist: which part
 * of the slice selection the numbers most likely point to, with the numbers they rest on. Worded as
 * hints, never as diagnoses. Pure computation (no I/O); docs/hints.md gives each rule, its
 * thresholds and the physics behind it. */
#ifndef WD_HINTS_H
#define WD_HINTS_H

#include "analysis.h"

#define WD_HINT_TEXT_MAX 640
#define WD_HINT_SHORT_MAX 160
#define WD_MAX_HINTS 6

typedef enum wd_hint_code {
    WD_HINT_GRADIENT_CALIBRATION = 0, /* thickness and position scale off together */
    WD_HINT_RF_BANDWIDTH,             /* thickness off, position scale normal */
    WD_HINT_COMMON_SHIFT,             /* both wedge slices displaced the same way */
    WD_HINT_GRADIENT_SCALING,         /* wedge slices displaced in opposite senses */
    WD_HINT_PHANTOM_TILT,             /* a large ramp tilt: phantom not level */
} wd_hint_code;

const char *wd_hint_name(wd_hint_code c); /* "gradient-calibration", ... (stored, exported) */

/* When a number counts as "off" (the [hints] section of the configuration; defaults in
 * wd_hint_settings_default, our own choice, documented in docs/hints.md). A number is off when it
 * is beyond its threshold AND beyond k_sigma standard uncertainties. */
typedef struct wd_hint_settings {
    double thickness_fraction; /* |thickness / reference - 1| (0.05) */
    double scale_percent;      /* |position scale| (0.5 %) */
    double shift_mm;           /* |displacement| of a wedge slice (1.0 mm) */
    double tilt_deg;           /* |ramp tilt| (2.0 degrees) */
    double k_sigma;            /* (2) */
    double gradient_mt_per_m;  /* slice-select gradient, when known or assumed (0: unknown) */
    double rf_bandwidth_hz;    /* excitation bandwidth, when known (0: unknown); with the nominal
                                  thickness it gives the gradient when gradient_mt_per_m is 0 */
} wd_hint_settings;

void wd_hint_settings_default(wd_hint_settings *s);

/* What the rules read. For one result the references are the nominal thickness and zero; for a
 * drift (since_baseline 1) the values are changes since the baseline and thickness_ref_mm is the
 * baseline's thickness. A field is used only when its has_ flag is set. */
typedef struct wd_hint_input {
    int since_baseline;
    int partition; /* 1: a 3D acquisition's partition thickness */
    int has_thickness;
    double thickness_mm, thickness_unc_mm, thickness_ref_mm;
    int has_scale;
    double scale_percent, scale_unc_percent;
    int has_offset;
    double offset_mm, offset_unc_mm;
    int has_shift[2];
    int shift_slice[2];
    double shift_mm[2], shift_unc_mm[2]; /* wedge slices' displacement toward the last slice */
    int has_tilt;
    double tilt_deg, tilt_unc_deg;
} wd_hint_input;

/* The input of one echo's result (nominal thickness from SliceThickness). */
void wd_hint_input_from_result(const an_series_result *r, int partition, wd_hint_input *in);

typedef struct wd_hint {
    wd_hint_code code;
    char text[WD_HINT_TEXT_MAX];   /* the reading with its numbers, for reports */
    char brief[WD_HINT_SHORT_MAX]; /* one clause, for log lines and alert messages */
} wd_hint;

/* Applies the rules; writes up to max hints to out (most specific first) and returns how many. */
int wd_hints(const wd_hint_input *in, const wd_hint_settings *s, wd_hint *out, int max);

#endif
