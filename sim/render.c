/* render.c: a simulated series in memory: parameters, the per-slice forward model (object integral,
 * coil shading, k-space crop, noise, magnitude, 12-bit scaling), orientation, file attributes and
 * the truth. */
#include <complex.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "sim_int.h"

static const double GAMMA_BAR_HZ_PER_T = SIM_GAMMA_BAR_MHZ_PER_T * 1e6;

#define TARGET_FLUID                                                                               \
    1500.0 /* stored value of the mean fluid signal: headroom for shading, Gibbs                   \
              overshoot and noise below the 12-bit ceiling */
#define STORED_MAX 4095.0
#define SNR_ROI_FRACTION 0.75 /* SNR region: a disc of 0.75 phantom radii about the axis */

/* PRNG stream purposes */
enum { STREAM_NOISE = 1, STREAM_ORDER = 2, STREAM_NAMES = 3 };

void sim_params_default(sim_params *p)
{
    memset(p, 0, sizeof *p);
    p->model = NULL;
    p->profile.kind = SIM_PROFILE_BLOCH_SINC;
    p->profile.thickness_mm = 0; /* the model's nominal thickness */
    p->profile.tbw = 4.0;
    p->profile.duration_ms = 3.2;
    p->profile.flip_deg = 90.0;
    p->profile.spin_echo = 1;
    /* a refocusing slab wider than the excitation's keeps the second echo's profile near the
     * first's (a common design choice, from memory; the factor is our assumption) */
    p->profile.refocus_ratio = 2.0;
    p->profile.nominal_gradient = 0;
    p->profile.steady_state = 1;
    p->profile.blur_mm = 1.0;
    p->profile.steps = 0;
    p->kind = SIM_SERIES_T1;
    /* fluid relaxation: plausible for a nickel-doped saline near 10 mmol/L at 1.5 T (from memory,
     * not a measurement of any phantom) */
    p->t1_ms = 150.0;
    p->t2_ms = 130.0;
    p->matrix = 256;
    p->fov_mm = 250.0;
    p->oversample = 4;
    p->snr = 100.0;
    p->readout_bw_hz_per_px = 130.0;
    p->orientation = SIM_ORIENT_STANDARD;
    p->seed = 1;
    sim_identity *id = &p->id;
    sw_strlcpy(id->institution, "Alderbrook Regional Hospital", sizeof id->institution);
    sw_strlcpy(id->station_name, "ALDMR1", sizeof id->station_name);
    sw_strlcpy(id->manufacturer, "Slicewarden Simulator", sizeof id->manufacturer);
    sw_strlcpy(id->model, "SW-SIM 1.5T", sizeof id->model);
    sw_strlcpy(id->device_serial, "SWS-0001", sizeof id->device_serial);
    sw_strlcpy(id->patient_name, "ALDERBROOK^QA PHANTOM", sizeof id->patient_name);
    sw_strlcpy(id->patient_id, "ALD-QA-LARGE", sizeof id->patient_id);
    id->field_t = 1.5;
}

/* The timing of p (defaults from the series kind: TR 500 / TE 20, or TR 2000 / TE 20 and 80). */
static void timing_of(const sim_params *p, sim_timing *t)
{
    memset(t, 0, sizeof *t);
    if (p->kind == SIM_SERIES_T2) {
        t->n_echoes = 2;
        t->tr_ms = p->tr_ms > 0 ? p->tr_ms : 2000.0;
        t->te_ms[0] = p->te_ms[0] > 0 ? p->te_ms[0] : 20.0;
        t->te_ms[1] = p->te_ms[1] > 0 ? p->te_ms[1] : 80.0;
    } else {
        t->n_echoes = 1;
        t->tr_ms = p->tr_ms > 0 ? p->tr_ms : 500.0;
        t->te_ms[0] = p->te_ms[0] > 0 ? p->te_ms[0] : 20.0;
    }
    t->t1_ms = p->t1_ms;
    t->t2_ms = p->t2_ms;
}

sw_status sim_params_check(const sim_params *p, sw_error *err)
{
    an_model large;
    const an_model *m = p->model;
    if (!m) {
        an_model_large(&large);
        m = &large;
    }
    sw_status st = an_model_check(m, err);
    if (st != SW_OK)
        return st;
#define NEED(cond, ...)                                                                            \
    do {                                                                                           \
        if (!(cond))                                                                               \
            return sw_error_set(err, SW_EINVAL, "simulator: " __VA_ARGS__);                        \
    } while (0)
    int n = p->n_slices > 0 ? p->n_slices : m->n_slices;
    NEED(p->n_slices >= 0 && n >= 1 && n <= SIM_MAX_SLICES, "slice count %d out of range (1..%d)",
         n, SIM_MAX_SLICES);
    NEED(p->gap_mm >= 0 && isfinite(p->gap_mm), "slice gap %g mm is invalid", p->gap_mm);
    NEED(p->prescribed_mm >= 0 && p->prescribed_mm <= 50, "prescribed thickness %g mm is invalid",
         p->prescribed_mm);
    NEED(p->kind == SIM_SERIES_T1 || p->kind == SIM_SERIES_T2, "unknown series kind %d",
         (int)p->kind);
    NEED(p->matrix >= 16 && p->matrix <= 1024 && p->matrix % 2 == 0,
         "matrix %d must be even and in 16..1024", p->matrix);
    NEED(p->oversample >= 1 && p->oversample <= 8, "oversampling %d out of range (1..8)",
         p->oversample);
    NEED((long)p->matrix * p->oversample <= 2048, "matrix x oversampling %d exceeds 2048",
         p->matrix * p->oversample);
    NEED(p->fov_mm >= 10 && p->fov_mm <= 1000, "field of view %g mm out of range (10..1000)",
         p->fov_mm);
    NEED(p->snr >= 0 && isfinite(p->snr), "SNR %g is invalid (0 for no noise)", p->snr);
    NEED(p->coil_shading >= 0 && p->coil_shading <= 1, "coil shading %g out of range (0..1)",
         p->coil_shading);
    NEED(fabs(p->position_offset_mm) <= 50, "position offset %g mm out of range (+-50)",
         p->position_offset_mm);
    NEED(fabs(p->position_scale) <= 0.2, "position scale %g out of range (+-0.2)",
         p->position_scale);
    NEED(isfinite(p->centre_z_mm) && fabs(p->centre_z_mm) <= 500, "stack centre %g mm invalid",
         p->centre_z_mm);
    NEED(fabs(p->cf_offset_hz) <= 5000, "centre frequency offset %g Hz out of range (+-5000)",
         p->cf_offset_hz);
    NEED(p->readout_bw_hz_per_px > 0 && p->readout_bw_hz_per_px <= 10000,
         "readout bandwidth %g Hz/pixel out of range", p->readout_bw_hz_per_px);
    NEED(p->orientation >= SIM_ORIENT_STANDARD && p->orientation <= SIM_ORIENT_FEET_FIRST,
         "unknown orientation %d", (int)p->orientation);
    NEED(fabs(p->pose.rot_deg) <= 180 && fabs(p->pose.tilt_v_deg) <= 20 &&
             fabs(p->pose.tilt_u_deg) <= 20,
         "pose angles out of range (rotation +-180, tilts +-20 degrees)");
    NEED(isfinite(p->pose.du_mm) && isfinite(p->pose.dv_mm), "pose offset is invalid");
    double shift_x = p->cf_offset_hz / p->readout_bw_hz_per_px * (p->fov_mm / p->matrix);
    double reach =
        hypot(p->pose.du_mm + shift_x, p->pose.dv_mm) +
        m->radius_mm / cos(fmax(fabs(p->pose.tilt_u_deg), fabs(p->pose.tilt_v_deg)) * M_PI / 180.0);
    NEED(reach <= 0.5 * p->fov_mm - 2.0, "the phantom leaves the field of view (no wrap-around "
                                         "is modelled)");
    NEED(p->t1_ms > 0 && p->t2_ms > 0, "relaxation times must be positive");
    NEED(p->id.field_t > 0 && p->id.field_t <= 20, "field strength %g T out of range",
         p->id.field_t);
#undef NEED
    return SW_OK; /* the timing and the profile are checked where they are built */
}

/* ---- orientation: where the stored image's pixels come from ----
 * Display frame: column j at x = -h + j D, row i at y = +h - i D (h = FOV/2 - D/2), the phantom as
 * the plan frame shows it. Patient frame (LPS) for head-first supine: (x, -y, z_n); feet-first
 * supine: (-x, -y, -z_n), z_n the coordinate along the normal toward the last slice. */
typedef struct orient {
    double row[3], col[3]; /* ImageOrientationPatient */
    int ffs;
} orient;

static void orient_of(sim_orientation o, orient *ori)
{
    memset(ori, 0, sizeof *ori);
    switch (o) {
    case SIM_ORIENT_FLIP_ROWS:
        ori->row[0] = 1;
        ori->col[1] = -1;
        break;
    case SIM_ORIENT_FLIP_COLUMNS:
        ori->row[0] = -1;
        ori->col[1] = 1;
        break;
    case SIM_ORIENT_TRANSPOSED:
        ori->row[1] = 1;
        ori->col[0] = 1;
        break;
    case SIM_ORIENT_FEET_FIRST:
        ori->ffs = 1;
        ori->row[0] = 1;
        ori->col[1] = 1;
        break;
    default:
        ori->row[0] = 1;
        ori->col[1] = 1;
        break;
    }
}

static void plan_to_patient(const orient *ori, double x, double y, double zn, double P[3])
{
    if (ori->ffs) {
        P[0] = -x;
        P[1] = -y;
        P[2] = -zn;
    } else {
        P[0] = x;
        P[1] = -y;
        P[2] = zn;
    }
}

static double dot3(const double a[3], const double b[3])
{
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2];
}

/* map[r * n + c] = display index of stored pixel (r, c); ipp0 = ImagePositionPatient at
 * z_n = 0. */
static sw_status orient_map(const orient *ori, int n, double D, int *map, double ipp0[3],
                            sw_error *err)
{
    double h = 0.5 * (n - 1) * D;
    /* stored (0, 0) is the display corner whose patient position is least along row and col */
    double best_r = INFINITY, best_c = INFINITY;
    for (int c = 0; c < 4; c++) {
        double x = c & 1 ? h : -h, y = c & 2 ? h : -h, P[3];
        plan_to_patient(ori, x, y, 0, P);
        double pr = dot3(P, ori->row), pc = dot3(P, ori->col);
        if (pr < best_r - 1e-9 || (pr < best_r + 1e-9 && pc < best_c - 1e-9)) {
            best_r = pr;
            best_c = pc;
            memcpy(ipp0, P, sizeof P);
        }
    }
    for (int r = 0; r < n; r++)
        for (int c = 0; c < n; c++) {
            double P[3];
            for (int k = 0; k < 3; k++)
                P[k] = ipp0[k] + c * D * ori->row[k] + r * D * ori->col[k];
            double x = ori->ffs ? -P[0] : P[0], y = -P[1];
            double fj = (x + h) / D, fi = (h - y) / D;
            long j = lround(fj), i = lround(fi);
            if (fabs(fj - j) > 1e-6 || fabs(fi - i) > 1e-6 || i < 0 || j < 0 || i >= n || j >= n)
                return sw_error_set(err, SW_EINVAL,
                                    "simulator: orientation map is not a "
                                    "permutation (internal error)");
            map[(size_t)r * n + c] = (int)(i * n + j);
        }
    return SW_OK;
}

/* ---- small linear algebra for the truth ---- */
static int solve3(const double A[3][3], const double b[3], double x[3])
{
    double det = A[0][0] * (A[1][1] * A[2][2] - A[1][2] * A[2][1]) -
                 A[0][1] * (A[1][0] * A[2][2] - A[1][2] * A[2][0]) +
                 A[0][2] * (A[1][0] * A[2][1] - A[1][1] * A[2][0]);
    if (fabs(det) < 1e-14)
        return -1;
    for (int k = 0; k < 3; k++) {
        double B[3][3];
        memcpy(B, A, sizeof B);
        for (int i = 0; i < 3; i++)
            B[i][k] = b[i];
        x[k] = (B[0][0] * (B[1][1] * B[2][2] - B[1][2] * B[2][1]) -
                B[0][1] * (B[1][0] * B[2][2] - B[1][2] * B[2][0]) +
                B[0][2] * (B[1][0] * B[2][1] - B[1][1] * B[2][0])) /
               det;
    }
    return 0;
}

/* Point q (phantom frame) with a1 . q = b1, a2 . q = b2 on the scanner plane z = zc. */
static int plane_point(const sim_scene *sc, const double a1[3], double b1, const double a2[3],
                       double b2, double zc, double q[3])
{
    /* scanner z = t_z + M[2] . q */
    double A[3][3] = {
        {a1[0], a1[1], a1[2]}, {a2[0], a2[1], a2[2]}, {sc->M[2][0], sc->M[2][1], sc->M[2][2]}};
    double b[3] = {b1, b2, zc - sc->t[2]};
    return solve3(A, b, q);
}

/* Bar lengths in the slice centre plane zc along each bar's centre line (u = bar centre): from the
 * bar's top (v = bar_top_v) to its end face (slope face_slope; 1: 45 degrees). */
static void wedge_truth(const sim_scene *sc, const an_model *m, int j, double zc,
                        sim_wedge_truth *wt)
{
    double wv = m->wedge_w[j];
    double len[2];
    for (int b = 0; b < 2; b++) {
        double uc = 0.5 * (m->bar_u_min[b] + m->bar_u_max[b]);
        double eu[3] = {1, 0, 0}, ev[3] = {0, 1, 0};
        /* end faces: left -v - k w = L0 - top - k wv; right -v + k w = L0 - top + k wv */
        double k = m->bar_face_slope;
        double face[3] = {0, -1, b == 0 ? -k : k};
        double fb = b == 0 ? m->bar_len0_mm - m->bar_top_v - k * wv
                           : m->bar_len0_mm - m->bar_top_v + k * wv;
        double qa[3], qb[3];
        if (plane_point(sc, eu, uc, ev, m->bar_top_v, zc, qa) != 0 ||
            plane_point(sc, eu, uc, face, fb, zc, qb) != 0) {
            len[b] = NAN;
            continue;
        }
        double d = sqrt((qa[0] - qb[0]) * (qa[0] - qb[0]) + (qa[1] - qb[1]) * (qa[1] - qb[1]) +
                        (qa[2] - qb[2]) * (qa[2] - qb[2]));
        len[b] = qb[1] < qa[1] ? d : -d; /* a bar that ends above its top has negative length */
    }
    wt->left_mm = len[0];
    wt->right_mm = len[1];
    wt->difference_mm = len[1] - len[0];
}

/* Expected strip length and centre for ramp k on the slice centred at zc with profile pr. */
static void ramp_truth(const sim_scene *sc, const an_model *m, const sim_pose *pose, int k,
                       double zc, const sim_profile *pr, double *length, double *centre_u)
{
    const an_ramp_def *rd = &m->ramp[k];
    double(*M)[3] = (double(*)[3])sc->M;
    const double *t = sc->t;
    /* slot centre plane w - slope u = 0 in the scanner frame: mv . (p - t) = 0 */
    double a[3] = {-rd->slope, 0, 1}, mv[3];
    for (int i = 0; i < 3; i++)
        mv[i] = M[i][0] * a[0] + M[i][1] * a[1] + M[i][2] * a[2];
    double mt = dot3(mv, t);
    /* in-plane gradient of the plane's z over (x, y) */
    double gx = -mv[0] / mv[2], gy = -mv[1] / mv[2];
    /* strip centre line: phantom v = v_mid on the plane z = zc */
    double cv[3] = {M[0][1], M[1][1], M[2][1]}, cu[3] = {M[0][0], M[1][0], M[2][0]};
    double vmid = 0.5 * (rd->v_min + rd->v_max);
    double dx = -cv[1], dy = cv[0], dn = hypot(dx, dy);
    dx /= dn;
    dy /= dn;
    if (dx * cu[0] + dy * cu[1] < 0) {
        dx = -dx;
        dy = -dy;
    }
    double slope_along = gx * dx + gy * dy;
    *length = pr->fwhm_mm / fabs(slope_along);
    /* centre: on the line, where the slot plane sits at the profile's centre */
    double a11 = cv[0], a12 = cv[1], b1 = vmid + dot3(cv, t) - cv[2] * zc;
    double a21 = mv[0], a22 = mv[1], b2 = mt - mv[2] * (zc + pr->centre_mm);
    double det = a11 * a22 - a12 * a21;
    double x = (b1 * a22 - a12 * b2) / det, y = (a11 * b2 - a21 * b1) / det;
    /* in-plane coordinates from the axis crossing, rotated back by the in-plane rotation */
    double cw[3] = {M[0][2], M[1][2], M[2][2]};
    double wax = (zc - t[2]) / cw[2];
    double ax = t[0] + wax * cw[0], ay = t[1] + wax * cw[1];
    double rot = pose->rot_deg * M_PI / 180.0;
    *centre_u = (x - ax) * cos(rot) + (y - ay) * sin(rot);
}

/* ---- the series ---- */
void sim_series_free(sim_series *s)
{
    if (!s)
        return;
    if (s->images)
        for (int i = 0; i < s->n_images; i++)
            free(s->images[i].pixels);
    free(s->images);
    free(s->slice);
    free(s->echo);
    free(s->file_name);
    for (int e = 0; e < SIM_MAX_ECHOES; e++)
        sim_profile_free(s->profile[e]);
    free(s);
}

void sim_image_view(const sim_series *s, int i, an_image *out)
{
    const dcm_image *im = &s->images[i];
    memset(out, 0, sizeof *out);
    out->px = im->pixels;
    out->width = im->columns;
    out->height = im->rows;
    out->stride = im->columns;
    out->col_mm = im->pixel_spacing[1];
    out->row_mm = im->pixel_spacing[0];
    memcpy(out->ipp, im->ipp, sizeof out->ipp);
    memcpy(out->iop, im->iop, sizeof out->iop);
    out->has_geometry = im->has_geometry;
    out->nominal_thickness_mm = im->slice_thickness_mm;
    out->feet_first = !strncmp(im->patient_position, "FF", 2); /* as daemon/pipeline.c reads it */
}

static void now_strings(const sim_identity *id, char date[9], char tm[17])
{
    if (id->date[0]) {
        sw_strlcpy(date, id->date, 9);
    } else {
        time_t now = time(NULL);
        struct tm lt;
        localtime_r(&now, &lt);
        strftime(date, 9, "%Y%m%d", &lt);
    }
    if (id->time[0]) {
        sw_strlcpy(tm, id->time, 17);
    } else {
        time_t now = time(NULL);
        struct tm lt;
        localtime_r(&now, &lt);
        strftime(tm, 17, "%H%M%S", &lt);
    }
}

/* Fills the attributes shared by every image of the series. */
static void fill_common(const sim_series *s, const sim_timing *tm, const char *study_uid,
                        const char *series_uid, const char *for_uid, dcm_image *im)
{
    const sim_params *p = &s->params;
    const sim_identity *id = &p->id;
    char date[9], tstr[17];
    now_strings(id, date, tstr);
    sw_strlcpy(im->sop_class_uid,
               p->enhanced ? "1.2.840.10008.5.1.4.1.1.4.1" : "1.2.840.10008.5.1.4.1.1.4",
               sizeof im->sop_class_uid);
    sw_strlcpy(im->study_instance_uid, study_uid, sizeof im->study_instance_uid);
    sw_strlcpy(im->series_instance_uid, series_uid, sizeof im->series_instance_uid);
    sw_strlcpy(im->frame_of_reference_uid, for_uid, sizeof im->frame_of_reference_uid);
    sw_strlcpy(im->modality, "MR", sizeof im->modality);
    sw_strlcpy(im->station_name, id->station_name, sizeof im->station_name);
    sw_strlcpy(im->device_serial, id->device_serial, sizeof im->device_serial);
    sw_strlcpy(im->manufacturer, id->manufacturer, sizeof im->manufacturer);
    sw_strlcpy(im->model, id->model, sizeof im->model);
    sw_strlcpy(im->institution, id->institution, sizeof im->institution);
    /* the defaults name the phantom model, so that series of different phantoms differ */
    char dbuf[DCM_STR_MAX], pbuf[DCM_STR_MAX];
    snprintf(dbuf, sizeof dbuf, "QA %.40s %s", s->model.name,
             p->kind == SIM_SERIES_T2 ? "T2 double echo axial" : "T1 axial");
    snprintf(pbuf, sizeof pbuf, "ALD_QA_%.40s_%s", s->model.name,
             p->kind == SIM_SERIES_T2 ? "T2" : "T1");
    const char *desc = id->series_description[0] ? id->series_description : dbuf;
    const char *prot = id->protocol_name[0] ? id->protocol_name : pbuf;
    sw_strlcpy(im->series_description, desc, sizeof im->series_description);
    sw_strlcpy(im->protocol_name, prot, sizeof im->protocol_name);
    sw_strlcpy(im->patient_name, id->patient_name, sizeof im->patient_name);
    sw_strlcpy(im->patient_id, id->patient_id, sizeof im->patient_id);
    sw_strlcpy(im->mr_acquisition_type, "2D", sizeof im->mr_acquisition_type);
    sw_strlcpy(im->study_date, date, sizeof im->study_date);
    sw_strlcpy(im->series_date, date, sizeof im->series_date);
    sw_strlcpy(im->acquisition_date, date, sizeof im->acquisition_date);
    sw_strlcpy(im->content_date, date, sizeof im->content_date);
    sw_strlcpy(im->study_time, tstr, sizeof im->study_time);
    sw_strlcpy(im->series_time, tstr, sizeof im->series_time);
    sw_strlcpy(im->acquisition_time, tstr, sizeof im->acquisition_time);
    sw_strlcpy(im->content_time, tstr, sizeof im->content_time);
    im->series_number = id->series_number > 0      ? id->series_number
                        : p->kind == SIM_SERIES_T2 ? 4
                                                   : 3;
    im->acquisition_number = 1;
    im->repetition_time_ms = tm->tr_ms;
    im->slice_thickness_mm = p->prescribed_mm > 0 ? p->prescribed_mm : p->profile.thickness_mm;
    im->spacing_between_slices_mm = p->gap_mm;
    im->magnetic_field_t = id->field_t;
    /* the frequency the scanner used: gamma-bar B0 plus the simulated centre-frequency error */
    im->imaging_frequency_mhz = SIM_GAMMA_BAR_MHZ_PER_T * id->field_t + p->cf_offset_hz * 1e-6;
    im->pixel_bandwidth_hz = p->readout_bw_hz_per_px;
    im->flip_angle_deg = p->profile.kind == SIM_PROFILE_BLOCH_SINC ? p->profile.flip_deg : 90.0;
    im->rows = im->columns = p->matrix;
    im->pixel_spacing[0] = im->pixel_spacing[1] = p->fov_mm / p->matrix;
    im->has_geometry = 1;
    im->bits_stored = 12;
    im->bits_allocated = 16;
    im->high_bit = 11;
    im->pixel_representation = 0;
    im->rescale_slope = 1.0;
    im->rescale_intercept = 0.0;
    sw_strlcpy(im->photometric, "MONOCHROME2", sizeof im->photometric);
    /* Enhanced MR: value 3 is the image flavour and 4 the derived pixel contrast (defined terms
     * of PS3.3 C.8.16.1); classic MR leaves value 3 to the implementation */
    sw_strlcpy(im->image_type,
               p->enhanced ? "ORIGINAL\\PRIMARY\\VOLUME\\NONE" : "ORIGINAL\\PRIMARY\\OTHER",
               sizeof im->image_type);
    sw_strlcpy(im->scanning_sequence, "SE", sizeof im->scanning_sequence);
    sw_strlcpy(im->sequence_variant, "NONE", sizeof im->sequence_variant);
    snprintf(im->software_versions, sizeof im->software_versions, "slicewarden-sim %s", SW_VERSION);
    sw_strlcpy(im->receive_coil, "SW-HEAD-8", sizeof im->receive_coil);
    sw_strlcpy(im->patient_position, p->orientation == SIM_ORIENT_FEET_FIRST ? "FFS" : "HFS",
               sizeof im->patient_position);
}

/* Coil sensitivity: smooth, positive, brighter toward the rim and the anterior side:
 * s = 1 + a ((r / R)^2 + 0.5 y / R), minimum 1 - a / 16 at x = 0, y = -R / 4. */
static inline double shading(double a, double R, double x, double y)
{
    return 1.0 + a * ((x * x + y * y) / (R * R) + 0.5 * y / R);
}

sw_status sim_series_render(const sim_params *pin, sim_series **out, sw_error *err)
{
    sw_status st = SW_OK;
    sim_series *s = NULL;
    float *acc[SIM_MAX_ECHOES] = {NULL, NULL};
    float *coarse = NULL;
    float *mags = NULL;
    int *map = NULL, *order = NULL;
    sim_timing tm;
    sim_scene sc;

    if (!pin || !out)
        return sw_error_set(err, SW_EINVAL, "simulator: NULL argument");
    *out = NULL;
    st = sim_params_check(pin, err);
    if (st != SW_OK)
        goto out;
    s = calloc(1, sizeof *s);
    if (!s) {
        st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the series");
        goto out;
    }
    s->params = *pin;
    if (pin->model)
        s->model = *pin->model;
    else
        an_model_large(&s->model);
    s->params.model = &s->model;
    sim_params *p = &s->params;
    const an_model *m = &s->model;
    if (p->n_slices == 0)
        p->n_slices = m->n_slices;
    if (p->gap_mm == 0)
        p->gap_mm = m->slice_gap_mm;
    if (p->profile.thickness_mm == 0)
        p->profile.thickness_mm = m->nominal_thickness_mm;
    timing_of(p, &tm);
    p->tr_ms = tm.tr_ms;
    for (int e = 0; e < tm.n_echoes; e++)
        p->te_ms[e] = tm.te_ms[e];
    const int ns = p->n_slices, ne = tm.n_echoes, ni = ns * ne, n = p->matrix;
    const int nf = n * p->oversample;
    const double D = p->fov_mm / n;

    st = sim_profile_make_series(&p->profile, &tm, s->profile, err);
    if (st != SW_OK)
        goto out;
    sim_truth *tr = &s->truth;
    tr->n_slices = ns;
    tr->n_echoes = ne;
    for (int e = 0; e < ne; e++) {
        tr->thickness_mm[e] = s->profile[e]->fwhm_mm;
        tr->fwtm_mm[e] = s->profile[e]->fwtm_mm;
        tr->profile_centre_mm[e] = s->profile[e]->centre_mm;
    }
    tr->gradient_mt_per_m = s->profile[0]->gradient_mt_per_m;
    tr->bandwidth_hz = s->profile[0]->bandwidth_hz;
    tr->nominal_thickness_mm = s->profile[0]->nominal_thickness_mm;
    /* a centre-frequency error df moves the excited slab by df / (gamma-bar G) along the slice
     * gradient (taken positive toward the last slice) and the image by df / (Hz per pixel) along
     * the readout (taken along +x) */
    tr->cf_shift_mm = p->cf_offset_hz / (GAMMA_BAR_HZ_PER_T * tr->gradient_mt_per_m * 1e-3) * 1e3;
    tr->cf_shift_x_mm = p->cf_offset_hz / p->readout_bw_hz_per_px * D;
    st = sim_scene_build(m, &p->pose, tr->cf_shift_x_mm, &sc, err);
    if (st != SW_OK)
        goto out;

    /* slice geometry: nominal plane w_k = (k - ramp slice) gap; z_n along the normal */
    double wn[SIM_MAX_SLICES], zt[SIM_MAX_SLICES];
    double w_mid = 0.5 * ((1 - m->ramp_slice) * p->gap_mm + (ns - m->ramp_slice) * p->gap_mm);
    for (int k = 0; k < ns; k++) {
        wn[k] = (k + 1 - m->ramp_slice) * p->gap_mm;
        tr->z_mm[k] = wn[k] - w_mid + p->centre_z_mm;
        tr->error_mm[k] = p->position_offset_mm + p->position_scale * tr->z_mm[k] + tr->cf_shift_mm;
        zt[k] = wn[k] + tr->error_mm[k];
        /* d_k: along the normal at the phantom axis, from the nominal plane's axis point */
        double q[3] = {0, 0, wn[k]}, pp[3];
        sim_scene_to_scanner(&sc, q, pp);
        tr->displacement_mm[k] = zt[k] - pp[2];
    }
    tr->has_ramps = m->n_ramps > 0 && m->ramp_slice <= ns;
    tr->ramp_ordinal = m->ramp_slice;
    if (tr->has_ramps)
        for (int e = 0; e < ne; e++)
            for (int r = 0; r < m->n_ramps; r++)
                ramp_truth(&sc, m, &p->pose, r, zt[m->ramp_slice - 1], s->profile[e],
                           &tr->ramp[e].length_mm[r], &tr->ramp[e].centre_u_mm[r]);
    tr->has_wedges = m->has_wedges;
    for (int j = 0; j < 2; j++) {
        if (m->has_wedges && m->wedge_slice[j] <= ns) {
            tr->wedge[j].ordinal = m->wedge_slice[j];
            wedge_truth(&sc, m, j, zt[m->wedge_slice[j] - 1], &tr->wedge[j]);
        } else { /* not in this series */
            tr->wedge[j].ordinal = 0;
            tr->wedge[j].left_mm = tr->wedge[j].right_mm = tr->wedge[j].difference_mm = NAN;
        }
    }

    /* SNR reference: mean fluid signal of a uniform slice over the central disc (with shading) */
    double sh_mean = 0;
    {
        int cnt = 0;
        double R = SNR_ROI_FRACTION * m->radius_mm;
        double cx = sc.t[0], cy = sc.t[1];
        for (int i = 0; i < n; i++)
            for (int j = 0; j < n; j++) {
                double x = -0.5 * (n - 1) * D + j * D, y = 0.5 * (n - 1) * D - i * D;
                if (hypot(x - cx, y - cy) <= R) {
                    sh_mean += shading(p->coil_shading, m->radius_mm, x, y);
                    cnt++;
                }
            }
        sh_mean = cnt ? sh_mean / cnt : 1.0;
    }
    double fluid[SIM_MAX_ECHOES];
    for (int e = 0; e < ne; e++) {
        const sim_profile *pr = s->profile[e];
        fluid[e] = hypot(pr->cum_re[pr->n - 1], pr->cum_im[pr->n - 1]) * sh_mean;
    }
    double sigma = p->snr > 0 ? fluid[0] / p->snr : 0;

    /* render every image into display order (slice-major, echo-minor), in model units */
    size_t npx = (size_t)n * n, nfpx = (size_t)nf * nf, nmag = 0;
    if (sw_mul_size(npx, (size_t)ni, &nmag) != 0) {
        st = sw_error_set(err, SW_EINVAL, "simulator: image size overflows");
        goto out;
    }
    mags = malloc(nmag * sizeof *mags);
    coarse = sim_fft_alloc(npx);
    for (int e = 0; e < ne; e++)
        acc[e] = sim_fft_alloc(nfpx);
    if (!mags || !coarse || !acc[0] || (ne > 1 && !acc[1])) {
        st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the image grids");
        goto out;
    }
    sim_grid g = {.nf = nf,
                  .x0 = -0.5 * p->fov_mm + 0.5 * D,
                  .y0 = 0.5 * p->fov_mm - 0.5 * D,
                  .step = p->fov_mm / nf};
    double maxmag = 0;
    for (int k = 0; k < ns; k++) {
        for (int e = 0; e < ne; e++)
            memset(acc[e], 0, nfpx * 2 * sizeof(float));
        sim_scene_integrate(&sc, zt[k], s->profile, ne, &g, acc);
        if (p->coil_shading > 0)
            for (int i = 0; i < nf; i++) {
                double y = g.y0 - i * g.step;
                for (int j = 0; j < nf; j++) {
                    float f = (float)shading(p->coil_shading, m->radius_mm, g.x0 + j * g.step, y);
                    for (int e = 0; e < ne; e++) {
                        acc[e][2 * ((size_t)i * nf + j)] *= f;
                        acc[e][2 * ((size_t)i * nf + j) + 1] *= f;
                    }
                }
            }
        for (int e = 0; e < ne; e++) {
            st = sim_fft_crop(acc[e], nf, n, coarse, err);
            if (st != SW_OK)
                goto out;
            sim_rng rng;
            sim_rng_stream(&rng, p->seed, STREAM_NOISE, (uint64_t)k * SIM_MAX_ECHOES + e);
            float *dst = mags + (size_t)(k * ne + e) * npx;
            for (size_t q = 0; q < npx; q++) {
                double re = coarse[2 * q], im = coarse[2 * q + 1];
                if (sigma > 0) {
                    double a, b;
                    sim_rng_normal2(&rng, &a, &b);
                    re += sigma * a;
                    im += sigma * b;
                }
                double mg = sqrt(re * re + im * im);
                dst[q] = (float)mg;
                if (mg > maxmag)
                    maxmag = mg;
            }
        }
    }
    /* 12-bit scaling with headroom: the mean fluid signal at TARGET_FLUID unless the brightest
     * pixel would then clip */
    double gain = fluid[0] > 0 ? TARGET_FLUID / fluid[0] : 1.0;
    if (maxmag * gain > STORED_MAX)
        gain = STORED_MAX / (maxmag * 1.0001);
    tr->gain = gain;
    tr->snr = p->snr;
    tr->noise_sigma = sigma * gain;
    for (int e = 0; e < ne; e++)
        tr->fluid_signal[e] = fluid[e] * gain;

    /* orientation, order, names, attributes */
    orient orn;
    double ipp0[3];
    orient_of(p->orientation, &orn);
    map = malloc(npx * sizeof *map);
    order = malloc((size_t)ni * sizeof *order);
    s->images = calloc((size_t)ni, sizeof *s->images);
    s->slice = calloc((size_t)ni, sizeof *s->slice);
    s->echo = calloc((size_t)ni, sizeof *s->echo);
    s->file_name = calloc((size_t)ni, sizeof *s->file_name);
    if (!map || !order || !s->images || !s->slice || !s->echo || !s->file_name) {
        st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the images");
        goto out;
    }
    s->n_images = ni;
    st = orient_map(&orn, n, D, map, ipp0, err);
    if (st != SW_OK)
        goto out;
    for (int i = 0; i < ni; i++)
        order[i] = i;
    if (p->shuffle) { /* Fisher-Yates (Knuth's Algorithm P) */
        sim_rng rng;
        sim_rng_stream(&rng, p->seed, STREAM_ORDER, 0);
        for (int i = ni - 1; i > 0; i--) {
            int j = (int)(sim_rng_next(&rng) % (uint64_t)(i + 1));
            int t = order[i];
            order[i] = order[j];
            order[j] = t;
        }
    }
    char study_uid[DCM_UID_MAX], series_uid[DCM_UID_MAX], for_uid[DCM_UID_MAX];
    dcm_new_uid(study_uid, "study");
    dcm_new_uid(series_uid, "series");
    dcm_new_uid(for_uid, "for");
    sim_rng name_rng;
    sim_rng_stream(&name_rng, p->seed, STREAM_NAMES, 0);
    for (int pos = 0; pos < ni; pos++) {
        int idx = order[pos], k = idx / ne, e = idx % ne;
        dcm_image *im = &s->images[pos];
        fill_common(s, &tm, study_uid, series_uid, for_uid, im);
        dcm_new_uid(im->sop_instance_uid, "image");
        im->instance_number = p->reverse_instances ? ni - idx : idx + 1;
        im->echo_number = e + 1;
        im->echo_time_ms = tm.te_ms[e];
        im->frame = p->enhanced ? pos + 1 : 0;
        im->frame_count = p->enhanced ? ni : 1;
        sw_strlcpy(im->stack_id, p->enhanced ? "1" : "", sizeof im->stack_id);
        im->in_stack_position = p->enhanced ? k + 1 : 0;
        memcpy(im->iop, orn.row, sizeof orn.row);
        memcpy(im->iop + 3, orn.col, sizeof orn.col);
        double P[3];
        plan_to_patient(&orn, 0, 0, tr->z_mm[k], P);
        im->ipp[0] = ipp0[0];
        im->ipp[1] = ipp0[1];
        im->ipp[2] = P[2];
        im->pixels = malloc(npx * sizeof(float));
        if (!im->pixels) {
            st = sw_error_set(err, SW_ENOMEM, "simulator: no memory for the images");
            goto out;
        }
        const float *src = mags + (size_t)idx * npx;
        for (size_t q = 0; q < npx; q++) {
            double v = nearbyint(src[map[q]] * gain);
            im->pixels[q] = (float)(v > STORED_MAX ? STORED_MAX : v);
        }
        s->slice[pos] = k + 1;
        s->echo[pos] = e + 1;
        if (p->enhanced)
            snprintf(s->file_name[pos], sizeof s->file_name[pos], "%s", "MF0001.dcm");
        else if (p->shuffle) /* random names without an extension, redrawn until unique */
            for (int dup = 1; dup;) {
                snprintf(s->file_name[pos], sizeof s->file_name[pos], "%08llX",
                         (unsigned long long)(sim_rng_next(&name_rng) >> 32));
                dup = 0;
                for (int q = 0; q < pos && !dup; q++)
                    dup = !strcmp(s->file_name[q], s->file_name[pos]);
            }
        else
            snprintf(s->file_name[pos], sizeof s->file_name[pos], "IM%04d.dcm",
                     im->instance_number);
    }
    *out = s;
    s = NULL;
out:
    for (int e = 0; e < SIM_MAX_ECHOES; e++)
        sim_fft_free(acc[e]);
    sim_fft_free(coarse);
    free(mags);
    free(map);
    free(order);
    sim_series_free(s);
    return st;
}
