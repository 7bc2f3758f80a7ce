/* analysis.h: slice thickness and slice position from images of a ramp-and-wedge phantom. Pure
 * computation: const image views and parameters in, result structs the caller owns out; no I/O, no
 * logging, no globals. Every value carries an uncertainty and a verdict, or the reason it is
 * absent. */
#ifndef ANALYSIS_H
#define ANALYSIS_H

#include <stddef.h>

#include "drift.h"
#include "sw.h"

#define AN_MAX_IMAGES 64    /* images of one series and echo */
#define AN_PROFILE_MAX 2048 /* samples of a stored profile (a 140 mm insert at 0.1 mm) */
#define AN_REASON_MAX 160

/* ---- phantom model (defaults: the large ramp-and-wedge phantom; a site file may change them) ----
 * Frame: u to image right, v to image up (anterior), w along the axis toward the last slice, mm. */
typedef enum an_thickness_method {
    AN_METHOD_CROSSED_RAMPS = 0, /* two ramps of opposite slope (ACR-style) */
    AN_METHOD_SINGLE_RAMP,       /* NEMA MS 5: one inclined slot, FWHM x tan(angle) */
    AN_METHOD_SINGLE_WEDGE,      /* NEMA MS 5: one wedge, edge response differentiated */
} an_thickness_method;

typedef struct an_ramp_def {
    double v_min, v_max; /* strip's extent across the insert (phantom v, mm) */
    double slope;        /* dw/du of the slot's centre plane: +0.1 top ramp, -0.1 bottom ramp */
} an_ramp_def;

typedef struct an_model {
    char name[64];
    double radius_mm;            /* fluid cylinder radius */
    int n_slices;                /* slices of the standard series (11) */
    double slice_gap_mm;         /* centre-to-centre spacing of the standard series (10) */
    double nominal_thickness_mm; /* of the standard series (5) */
    /* thickness insert: a plastic block holding the slots */
    an_thickness_method method;
    double insert_u_min, insert_u_max, insert_v_min, insert_v_max, insert_w_half;
    int n_ramps;
    an_ramp_def ramp[2]; /* [0] top, [1] bottom for crossed ramps */
    double slot_mm;      /* slot thickness along w (1.0) */
    double wedge_slope;  /* single-wedge method: dw/du of the wedge face */
    /* slice-position wedges */
    int has_wedges;
    double wedge_w[2]; /* vertex planes (0 and 100) */
    double bridge_u_min, bridge_u_max, bridge_v_min, bridge_v_max;
    double bar_u_min[2], bar_u_max[2]; /* [0] left bar, [1] right bar */
    double bar_top_v;                  /* bars hang from here (80) */
    double bar_len0_mm;                /* bar length at the vertex (15) */
    int ramp_slice;                    /* ordinal of the slice holding the ramps (1) */
    int wedge_slice[2];                /* ordinals of the wedge slices (1, 11) */
    /* added for the simulator (additive): extents it needs to build the whole object */
    double cyl_w_min, cyl_w_max; /* fluid cylinder's ends along w (-24, +124) */
    double wedge_w_half;         /* bridge and bars extend |w - wedge_w| <= this (12) */
    /* added (additive) */
    double bar_face_slope; /* dL/dw of each bar's end face: a slice displaced by d along w shows
                              L_left = L0 + k d, L_right = L0 - k d (1: 45-degree wedges) */
} an_model;

/* Fills m with the large phantom's model: config/large-phantom.model, compiled in as text and read
 * by an_model_parse_complete (docs/models.md). Returns SW_OK; SW_ENOMEM when inih's line buffer
 * could not be had (or SW_EINVAL on a broken build): m is then a model that an_model_check refuses,
 * its name saying why, so a caller that ignores the status still measures nothing against it. */
sw_status an_model_large(an_model *m);
/* The text of config/large-phantom.model as it was at build time (NUL-terminated). */
extern const char an_model_large_text[];
/* Reads a model file's text (INI, docs/models.md) over *m: keys the text leaves out keep m's
 * values. origin names the text in messages (a path). On success *m is the new model, checked by
 * an_model_check; on failure *m is unchanged and err names origin, the line and the reason (an
 * unknown key, a key given twice, a value out of range, an inconsistent model). */
sw_status an_model_parse(an_model *m, const char *text, const char *origin, sw_error *err);
/* The same, but every key without a format default must be in the text (no base model): how the
 * built-in model is read, and how a site can check that its file is complete. */
sw_status an_model_parse_complete(an_model *m, const char *text, const char *origin,
                                  sw_error *err);
/* m as model-file text that an_model_parse reads back (numbers to 10 significant digits, each key
 * with its one-line help). The caller frees it with free(); NULL when memory ran out. */
char *an_model_format(const an_model *m);
/* Checks that a model is self-consistent; names the first bad field in err. */
sw_status an_model_check(const an_model *m, sw_error *err);

/* ---- tolerances ---- */
typedef struct an_tolerance {
    char name[64];
    int thickness_relative;     /* 1: limits are fractions of the nominal thickness */
    double thickness_fail;      /* |measured - nominal| above this fails (0.7 mm) */
    double thickness_warn;      /* above this warns (0.5 mm) */
    double bar_difference_fail; /* |bar length difference| above this fails (5 mm) */
    double bar_difference_warn; /* (4 mm) */
    double min_snr;             /* below this a result is unmeasurable ("SNR too low") */
} an_tolerance;

/* Fills t with the default set (ACR large-phantom guidance, values from memory, to be confirmed).
 */
void an_tolerance_default(an_tolerance *t);

/* ---- parameters of the method ---- */
typedef enum an_half_level {
    AN_HALF_TRUE_ZERO = 0, /* half of the plateau above zero (the plastic gives no signal) */
    AN_HALF_FLOOR_MODEL,   /* the same half level in signal space, through the Rician model of the
                              magnitude with the noise measured in air (the default) */
    AN_HALF_BACKGROUND, /* half between the plateau and the raw background mean (biased; bench only)
                         */
} an_half_level;

typedef struct an_params {
    an_half_level half_level;
    int slot_correction;   /* 1: remove the slot's widening of smooth profiles (off by default) */
    double sample_step_mm; /* profile sampling step along a strip (0.1 mm) */
} an_params;

void an_params_default(an_params *p);

/* ---- input: one image of a series and echo ---- */
typedef struct an_image {
    const float *px;   /* row-major, stride floats per row */
    int width, height; /* columns, rows */
    ptrdiff_t stride;
    double col_mm; /* spacing between columns (DICOM PixelSpacing[1]) */
    double row_mm; /* spacing between rows (DICOM PixelSpacing[0]) */
    double ipp[3], iop[6];
    int has_geometry;
    double nominal_thickness_mm; /* SliceThickness, or NAN */
    /* added (additive) */
    int feet_first; /* 1: PatientPosition begins with "FF". Consulted only to tell slice 1 from the
                       last wedge slice when no ramp insert can (head first when 0) */
} an_image;

/* ---- results ---- */
typedef enum an_verdict { AN_PASS = 0, AN_WARN, AN_FAIL, AN_UNMEASURABLE } an_verdict;
const char *an_verdict_name(an_verdict v); /* "pass", "warn", "fail", "unmeasurable" */

typedef struct an_point {
    double x, y;
} an_point; /* stored-image pixels: column, row (centres) */

typedef struct an_profile {
    int n;
    double start_mm, step_mm; /* abscissa of sample i: start_mm + i * step_mm */
    float v[AN_PROFILE_MAX];
} an_profile;

typedef struct an_strip {
    int measured;
    char reason[AN_REASON_MAX];
    double length_mm, length_unc_mm; /* FWHM along the strip */
    double fwtm_mm;
    double centre_u_mm; /* mid-point of the half-level crossings, phantom u */
    double plateau, plateau_sd, half_level, floor;
    double half_width_mm;            /* across-strip averaging half width */
    an_point line0, line1;           /* ends of the sampled line */
    an_point cross_lo, cross_hi;     /* half-level crossings */
    double cross_lo_mm, cross_hi_mm; /* the crossings on the profile's abscissa */
    an_profile profile;              /* along the strip */
    /* added (additive) */
    double centre_unc_mm;     /* of centre_u_mm */
    double plateau_unc;       /* standard uncertainty of the plateau level (plateau_sd is the
                                 SD of the profile samples about the fitted top) */
    double slot_kappa_per_mm; /* (q''/q' at the high crossing - at the low one) / 24, from
                                 the local fits: a box of width k along the strip changes the
                                 FWHM by kappa k^2 (docs/methods.md, slot correction) */
    double snr; /* strip SNR: the plateau's signal (through the Rician model) over the per-channel
                   noise there; NAN without a noise estimate */
    int inside_lo, inside_hi; /* samples of profile inside the insert (clear of its ends' blur) */
} an_strip;

typedef struct an_thickness {
    int measured;
    int slice, image;     /* ordinal, index into the input images */
    an_strip top, bottom; /* bottom unused for single-ramp and wedge methods */
    double top_thickness_mm, bottom_thickness_mm;
    double acr_mm;                 /* 0.2 a b / (a + b) */
    double corrected_mm;           /* tilt-corrected; the reported thickness */
    double tilt_deg, tilt_unc_deg; /* about v; > 0 lowers the top ramp's angle (top strip longer) */
    double fwtm_mm; /* along the normal: the strips' FWTMs mapped by their own angles, averaged (one
                       strip's when only its tenth-level points lie inside the insert) */
    double uncertainty_mm; /* of corrected_mm */
    double nominal_mm, limit_lo_mm, limit_hi_mm;
    an_profile zprofile; /* slice profile vs position along the normal, peak 1; NAN where neither
                            strip has samples inside the insert */
    an_verdict verdict;
    char reason[AN_REASON_MAX];
} an_thickness;

typedef struct an_bar {
    int measured;
    double length_mm, unc_mm;
    an_point top, end;         /* bar top and found 50 % end */
    double level_hi, level_lo; /* levels either side of the end */
    an_profile profile;        /* along the bar from its top downwards */
} an_bar;

typedef struct an_position {
    int measured;
    int slice, image;
    an_bar left, right;
    double bar_difference_mm; /* right minus left */
    double displacement_mm;   /* -(bar difference) / 2, toward the last slice */
    double uncertainty_mm;    /* of bar_difference_mm */
    double ramp_displacement_mm, ramp_displacement_unc_mm; /* ramp slice only, else NAN */
    double z_mm; /* slice centre along the normal (from ImagePositionPatient) */
    double limit_mm;
    an_verdict verdict;
    char reason[AN_REASON_MAX];
} an_position;

typedef struct an_phantom_fit {
    int found;
    an_point centre; /* stored-image pixels */
    double radius_mm;
    double rotation_deg; /* in-plane, counter-clockwise as displayed in the phantom frame */
    int flip_u, flip_v, transpose; /* how the stored image maps to the phantom frame */
    /* added (additive) */
    int searched; /* 1: the phantom was searched on this image; 0: no step needed it (a middle
                     slice of the series), and found, centre and radius mean nothing */
} an_phantom_fit;

typedef struct an_position_model {
    int measured;
    double offset_mm, scale_percent, offset_unc_mm, scale_unc_percent;
} an_position_model;

typedef struct an_series_result {
    int n_images;
    int ordinal[AN_MAX_IMAGES]; /* per input image: slice ordinal 1..n_slices, 0 if unplaced */
    an_phantom_fit phantom[AN_MAX_IMAGES];
    double rotation_deg; /* the series' in-plane rotation estimate */
    double noise_sd;     /* per-channel Gaussian SD estimated from air */
    double snr;          /* as the phantom file defines it */
    an_thickness thickness;
    an_position position[2]; /* the two wedge slices, ramp slice first */
    an_position_model position_model;
    int pitch_measured;
    double pitch_deg, pitch_unc_deg; /* from ramp vs wedge displacement on the ramp slice */
    /* added (additive) */
    int order_from_patient_frame; /* 1: no ramp slice was found, and slice 1 was told from the last
                                     wedge slice by the patient frame (head first: slice 1 the
                                     inferior one; an_image.feet_first reverses it) */
    an_verdict verdict;           /* the worst verdict */
    char reason[AN_REASON_MAX];   /* why the series is unmeasurable, if it is */
    double noise_corr; /* variance factor of the noise's correlation between neighbouring pixels
                          (1: white; measured in the fluid of the uniform slice); every reported
                          uncertainty carries its square root. NAN when it could not be measured
                          (the uncertainties then assume white noise) */
} an_series_result;

/* Analyses the images of one series and one echo (any order). out is filled completely even when a
 * part is unmeasurable (its verdict says so, with the reason). Returns SW_OK when the analysis ran,
 * SW_EINVAL on bad arguments (n < 1 or > AN_MAX_IMAGES, NULL views), SW_ENOMEM when scratch memory
 * could not be had (out is then incomplete). Nothing is kept after the call: the images are only
 * read, and out (about 60 kB: keep it off small thread stacks) owns no memory. The method, step by
 * step with its sources, is docs/methods.md. */
sw_status an_analyze_series(const an_image *imgs, int n, const an_model *model,
                            const an_tolerance *tol, const an_params *params, an_series_result *out,
                            sw_error *err);

/* ---- formulas (exposed for tests and the report) ---- */
double an_acr_thickness(double a_mm, double b_mm, double tan_theta); /* 0.2 a b / (a + b) at 0.1 */
/* Tilt-corrected crossed-ramp thickness for ramps whose angles to the slice add to phi. */
double an_corrected_thickness(double a_mm, double b_mm, double tan_phi);
/* atan(T / a) - theta, the formula of phantom-large.md (its check values: +2.00 degrees for
 * a = 36.929, b = 77.098). an_thickness.tilt_deg is signed by the pose instead: its negative. */
double an_tilt_deg(double t_mm, double a_mm, double tan_theta);

/* Full width at a given level of a sampled profile: linear interpolation of the outermost crossings
 * around the sample at index peak. Returns 0 and the crossings (fractional indices) on success, -1
 * if the profile does not fall below the level on both sides. */
int an_width_at_level(const float *v, int n, int peak, double level, double *lo, double *hi);

#endif
