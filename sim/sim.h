/* sim.h: the phantom simulator, a forward model of a 2D multi-slice spin-echo acquisition of a
 * ramp-and-wedge phantom, so that the analysis can be tested against known truth.
 *
 * Model, in order (docs/simulator.md gives every formula and its source):
 *   slice profile   Bloch simulation of a Hamming-windowed sinc pulse (optionally times the
 *                   refocusing pulse's |beta|^2 and the local T1 steady state), or a simple shape;
 *   object          the phantom of an an_model as analytic primitives, placed with a pose;
 *   per pixel       the object integrated along the slice normal, weighted by the complex profile,
 *                   exactly per ray from the cumulative profile, on a grid oversampled in-plane;
 *   acquisition     FFT, k-space cropped to the matrix (Gibbs ringing), complex Gaussian noise,
 *                   magnitude (Rician), optional receive-coil shading, 12-bit stored values;
 *   geometry        slice position errors, centre-frequency offset, orientation variants, HFS/FFS,
 *                   classic or Enhanced MR files, shuffled order and names.
 * Deterministic for a given seed (own PRNG; UIDs are the only thing that differ run to run).
 * Thread-safe for distinct parameter structs; FFTW plans are created once per size under an
 * internal mutex and executed with the thread-safe new-array interface. Library code never
 * prints. */
#ifndef SIM_H
#define SIM_H

#include <stdint.h>

#include "analysis.h"
#include "dicom.h"
#include "sw.h"

#define SIM_GAMMA_BAR_MHZ_PER_T 42.577478 /* proton gyromagnetic ratio / 2 pi, CODATA 2018 */
#define SIM_MAX_ECHOES 2
#define SIM_MAX_SLICES AN_MAX_IMAGES
#define SIM_MAX_IMAGES (SIM_MAX_SLICES * SIM_MAX_ECHOES)

/* ---- slice profile ---- */
typedef enum sim_profile_kind {
    SIM_PROFILE_BLOCH_SINC = 0, /* Bloch simulation of a Hamming-windowed sinc pulse */
    SIM_PROFILE_RECT,           /* ideal rectangle of width thickness_mm */
    SIM_PROFILE_GAUSS,          /* Gaussian of FWHM thickness_mm */
    SIM_PROFILE_RECT_GAUSS,     /* rectangle blurred by a Gaussian of FWHM blur_mm; the rectangle's
                                   width is chosen so that the result's FWHM is thickness_mm */
} sim_profile_kind;

typedef struct sim_profile_params {
    sim_profile_kind kind;
    double thickness_mm; /* wanted FWHM; with nominal_gradient, bandwidth / (gamma-bar G) instead */
    double tbw;          /* time-bandwidth product of the sinc pulse (4) */
    double duration_ms;  /* pulse duration (3.2) */
    double flip_deg;     /* excitation flip angle (90) */
    int spin_echo;       /* 1: a 180-degree sinc pulse multiplies in |beta|^2 per echo */
    double refocus_ratio; /* the 180's bandwidth over the excitation's, same duration and gradient,
                             so its slab is this much wider (0: 1, the same pulse) */
    int nominal_gradient; /* 1: G = bandwidth / (gamma-bar thickness) instead of calibrating the
                             FWHM */
    int steady_state;     /* 1: weight by the local T1 steady state of Mz (flip varies across z);
                             needs the sequence timing (sim_profile_make_series) */
    double blur_mm;       /* RECT_GAUSS: the Gaussian's FWHM */
    int steps;            /* Bloch time steps (0: 500) */
} sim_profile_params;

/* A sampled complex slice profile along the slice normal z (mm, 0 at the slice centre, positive
 * toward the last slice): sample i is at z0_mm + i * dz_mm; re/im is the signal per unit length of
 * fluid at that z (transverse magnetisation per M0 after ideal rephasing, times refocusing and
 * relaxation factors); mag = |re + i im|; cum_re/cum_im the running integrals (trapezoid, mm), so
 * that the signal of fluid between z1 and z2 is cum(z2) - cum(z1). Outside the sampled range the
 * profile is zero. fwhm_mm is measured on mag (linear interpolation of the half-maximum crossings,
 * outermost crossings around the peak); centre_mm is the mid-point of those crossings. */
typedef struct sim_profile {
    int n;
    double z0_mm, dz_mm;
    double *re, *im, *mag, *cum_re, *cum_im;
    double peak;                 /* max of mag */
    double fwhm_mm, fwtm_mm;     /* full widths at half and tenth maximum of mag */
    double centre_mm;            /* mid-point of the half-maximum crossings */
    double gradient_mt_per_m;    /* slice-select gradient used */
    double bandwidth_hz;         /* pulse bandwidth tbw / duration */
    double nominal_thickness_mm; /* bandwidth / (gamma-bar G) */
} sim_profile;

/* Sequence timing that the steady state and the relaxation factors need. */
typedef struct sim_timing {
    double tr_ms;
    int n_echoes; /* 1 or 2 */
    double te_ms[SIM_MAX_ECHOES];
    double t1_ms, t2_ms; /* of the fluid */
} sim_timing;

/* The profile of the first echo without relaxation (M0 = 1, steady_state ignored).
 * On success *out is a new profile the caller frees with sim_profile_free; on failure *out is NULL
 * and err says why (bad parameters). */
sw_status sim_profile_make(const sim_profile_params *p, sim_profile **out, sw_error *err);
/* The profile of each echo of a spin-echo series with timing t: out[e] for e < t->n_echoes, with
 * T2 decay exp(-TE/T2), the T1 steady state (per z when steady_state and kind is BLOCH_SINC, else
 * the ideal-pulse spin-echo value) and, with spin_echo, e+1 refocusing factors. The gradient is
 * calibrated on the profile of sim_profile_make. On success out[0..n_echoes-1] are new profiles
 * the caller frees; on failure all are NULL. */
sw_status sim_profile_make_series(const sim_profile_params *p, const sim_timing *t,
                                  sim_profile *out[SIM_MAX_ECHOES], sw_error *err);
void sim_profile_free(sim_profile *pr);
/* Signal of fluid between z1 and z2 (mm, slice frame): cum(z2) - cum(z1), interpolated. */
void sim_profile_integral(const sim_profile *pr, double z1, double z2, double *re, double *im);

/* Full width of samples v[0..n) at `level`, outermost linear-interpolated crossings around the
 * maximum; returns 0 and the width in samples, -1 when v does not fall below level on both
 * sides. */
int sim_width_at_level(const double *v, int n, double level, double *width, double *mid);

/* ---- pose ----
 * Phantom frame (u, v, w) of analysis.h. Scanner plan frame (x, y, z): x image right, y image up,
 * z along the slice normal toward the last slice, origin at the phantom origin's unrotated place;
 * nominal slice k is the plane z = w of slice k. A phantom point q is placed at
 *     p = t + Rz(rot) Ry(tilt_v) Rx(tilt_u) q,   t = (du, dv, 0),
 * with the signs defined by what the image shows (phantom-large.md): rot > 0 turns the phantom
 * counter-clockwise as displayed; tilt_v > 0 lowers the top ramp's angle to the slice (top strip
 * longer); tilt_u (pitch) > 0 moves the anterior side (v > 0) toward the last slice. */
typedef struct sim_pose {
    double du_mm, dv_mm; /* in-plane offset: image right, image up */
    double rot_deg;
    double tilt_v_deg;
    double tilt_u_deg;
} sim_pose;

/* ---- series ---- */
typedef enum sim_series_kind {
    SIM_SERIES_T1 = 0, /* spin echo TR 500, TE 20: one echo */
    SIM_SERIES_T2,     /* double-echo spin echo TR 2000, TE 20 and 80: two echoes in one series */
} sim_series_kind;

typedef enum sim_orientation {
    SIM_ORIENT_STANDARD = 0, /* head-first supine axial, rows along +x, columns along +y */
    SIM_ORIENT_FLIP_ROWS,    /* row order reversed: first row at the bottom (columns along -y) */
    SIM_ORIENT_FLIP_COLUMNS, /* column order reversed (rows along -x) */
    SIM_ORIENT_TRANSPOSED,   /* rows along +y, columns along +x */
    SIM_ORIENT_FEET_FIRST,   /* feet-first supine: patient frame turned, u = -x, v = -y, w = -z */
} sim_orientation;

/* Identity written into the files (our invented scenario by default). */
typedef struct sim_identity {
    char institution[DCM_STR_MAX];
    char station_name[DCM_STR_MAX];
    char manufacturer[DCM_STR_MAX];
    char model[DCM_STR_MAX];
    char device_serial[DCM_STR_MAX];
    char patient_name[DCM_STR_MAX];
    char patient_id[DCM_STR_MAX];
    char series_description[DCM_STR_MAX]; /* empty: from the series kind */
    char protocol_name[DCM_STR_MAX];      /* empty: from the series kind */
    char date[9];                         /* YYYYMMDD; empty: today (local time) */
    char time[17];                        /* HHMMSS; empty: now */
    int series_number;                    /* 0: 3 for T1, 4 for T2 */
    double field_t;                       /* B0 (1.5) */
} sim_identity;

typedef struct sim_params {
    const an_model *model; /* the phantom; NULL: an_model_large() (config/large-phantom.model,
                              built in). Not owned; must outlive calls. */
    sim_profile_params profile; /* thickness_mm 0: the model's nominal thickness */
    sim_pose pose;
    sim_series_kind kind;
    double tr_ms;                 /* 0: from kind */
    double te_ms[SIM_MAX_ECHOES]; /* 0: from kind */
    double t1_ms, t2_ms;          /* fluid relaxation times (defaults in docs/simulator.md) */
    int n_slices;                 /* 0: model->n_slices */
    double gap_mm;                /* centre-to-centre; 0: model->slice_gap_mm */
    int matrix;                   /* square acquisition matrix (256), even, 16..1024 */
    double fov_mm;                /* square field of view (250) */
    int oversample;               /* in-plane oversampling of the object grid (4), 1..8 */
    double snr;          /* as phantom-large.md defines it, for the first echo; 0: no noise */
    double coil_shading; /* relative rise of the receive sensitivity at the phantom's rim (0) */
    double prescribed_mm; /* SliceThickness written (what was prescribed); 0: profile's thickness */
    /* slice position error e(z) = offset + scale z, z along the normal (patient frame) */
    double position_offset_mm;
    double position_scale; /* dimensionless (0.01 = 1 %) */
    double centre_z_mm;    /* patient-frame coordinate along the normal of the stack's centre (0) */
    double cf_offset_hz;   /* centre frequency error: slices shift by df / (gamma-bar G) toward the
                              last slice, the image by df / readout_bw_hz_per_px pixels along +x */
    double readout_bw_hz_per_px; /* receiver bandwidth per pixel (130) */
    sim_orientation orientation;
    uint64_t seed;
    int shuffle;           /* 1: files written in random order with random names */
    int reverse_instances; /* 1: InstanceNumber runs from the last slice to the first */
    int enhanced;          /* 1: one Enhanced MR multi-frame file instead of one file per image */
    int scratch;           /* 1: files are scratch data, written without fsync (still whole by rename) */
    sim_identity id;
} sim_params;

/* The default acquisition of phantom-large.md: large phantom, T1 series, 11 slices of 5 mm 10 mm
 * apart, 256 x 256 over 250 mm, 4x oversampling, Bloch sinc (time-bandwidth 4, 3.2 ms, 90 deg, spin
 * echo with a refocusing slab twice as wide, calibrated gradient, steady state), SNR 100, no error,
 * standard orientation, seed 1. */
void sim_params_default(sim_params *p);
/* Checks p; names the first bad field in err. */
sw_status sim_params_check(const sim_params *p, sw_error *err);

/* What a simulated series carries as truth (also written as truth.json beside the files). */
typedef struct sim_ramp_truth {
    double length_mm[2];   /* expected FWHM length of [0] top and [1] bottom strip (in-plane mm) */
    double centre_u_mm[2]; /* strip centre: in-plane distance from where the phantom axis crosses
                              the slice centre plane, along u rotated by rot (+-10 d untilted) */
} sim_ramp_truth;

typedef struct sim_wedge_truth {
    int ordinal;              /* slice ordinal; 0 when that slice is not in the series (NANs) */
    double left_mm, right_mm; /* bar lengths along each bar's centre line in the centre plane */
    double difference_mm;     /* right minus left */
} sim_wedge_truth;

typedef struct sim_truth {
    int n_slices, n_echoes;
    double thickness_mm[SIM_MAX_ECHOES]; /* FWHM of the profile used for each echo */
    double fwtm_mm[SIM_MAX_ECHOES];
    double profile_centre_mm[SIM_MAX_ECHOES];
    double gradient_mt_per_m, bandwidth_hz, nominal_thickness_mm;
    double z_mm[SIM_MAX_SLICES];     /* nominal slice centre along the normal (patient frame) */
    double error_mm[SIM_MAX_SLICES]; /* applied position error e_k (incl. the cf shift) */
    double displacement_mm[SIM_MAX_SLICES]; /* d_k of phantom-large.md */
    double cf_shift_mm;                     /* slice shift from cf_offset_hz */
    double cf_shift_x_mm;                   /* in-plane shift along +x from cf_offset_hz */
    int has_ramps, has_wedges;
    int ramp_ordinal;
    sim_ramp_truth ramp[SIM_MAX_ECHOES];
    sim_wedge_truth wedge[2];
    double snr;                          /* requested, first echo */
    double fluid_signal[SIM_MAX_ECHOES]; /* mean noise-free fluid signal, stored units */
    double noise_sigma;                  /* per-channel Gaussian SD, stored units (0: none) */
    double gain;                         /* stored units per unit of profile integral (mm) */
} sim_truth;

/* A rendered series: images in the order they are written (shuffled when asked), each a complete
 * dcm_image (attributes, geometry and float pixels holding the 12-bit stored values), and the
 * truth. slice[i] (1-based ordinal) and echo[i] (1-based) say what image i is; file_name[i] its
 * name. */
typedef struct sim_series {
    sim_params params; /* a copy; params.model points at `model` below */
    an_model model;
    int n_images;
    dcm_image *images;
    int *slice, *echo;
    char (*file_name)[64];
    sim_profile *profile[SIM_MAX_ECHOES];
    sim_truth truth;
} sim_series;

/* Renders a series in memory: the entry point for self-tests and benches (docs/models.md, "In-memory
 * simulation for self-tests"). The truth to impose is p: p->model (any phantom model, for example
 * from a model file), p->seed, p->profile.thickness_mm, p->position_offset_mm / position_scale
 * (displacement), p->pose (tilt_v_deg, tilt_u_deg, rot_deg) and p->snr; (*out)->truth holds what
 * the analysis should find, and sim_image_view gives each image the daemon's analysis view. On
 * success *out is a new series the caller frees with sim_series_free; on failure *out is NULL and
 * err says why. */
sw_status sim_series_render(const sim_params *p, sim_series **out, sw_error *err);
/* Writes the series into dir (created if absent; must not already hold a truth.json): one file per
 * image, or one Enhanced MR file, and truth.json. On failure files already written are left. */
sw_status sim_series_write(const sim_series *s, const char *dir, sw_error *err);
/* The truth as a JSON text (what truth.json holds); the caller frees it with free(). NULL on
 * allocation failure. */
char *sim_truth_json(const sim_series *s);
void sim_series_free(sim_series *s);
/* An analysis view of image i of s, as daemon/pipeline.c builds one from a DICOM image (pixels
 * borrowed from s; valid while s lives). */
void sim_image_view(const sim_series *s, int i, an_image *out);

/* splitmix64 (Steele, Lea and Flood 2014): the next value of a 64-bit stream whose whole state is
 * *state; the simulator seeds its generator with it, and other seeded sweeps may draw from it. */
uint64_t sim_splitmix64(uint64_t *state);
/* Releases the cached FFTW plans (optional, at exit, when no render runs). */
void sim_cleanup(void);

#endif
