/* accuracy.c: the analysis against the simulator's truth over a seeded sweep of acquisitions and
 * phantom poses: bias and SD of every reported quantity by SNR band and profile kind, the reported
 * uncertainty against the observed scatter, the half-level methods side by side, the slot's own
 * widening, and the accuracy goals with PASS or MISS. docs/accuracy.md explains the method.
 *
 * Each case is rendered in memory (sim_series_render) and its images go to an_analyze_series
 * through the same view as daemon/pipeline.c builds from a dcm_image, once per half-level method.
 * Cases are drawn from a seeded generator of their own (case i depends on the seed and i only), so
 * a run is the same whatever --threads says. */
#include <errno.h>
#include <getopt.h>
#include <math.h>
#include <pthread.h>
#include <stdatomic.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "analysis.h"
#include "dicom.h"
#include "sim.h"
#include "sw.h"

#define DEFAULT_CASES 250
#define DEFAULT_SEED 20240601u

/* ---- the sweep ---- */

/* Slice profile kinds of the sweep. */
enum { PK_SINC2, PK_SINC4, PK_SINC8, PK_RECT, PK_GAUSS, PK_RECTGAUSS, PK_N };
static const char *const PK_NAME[PK_N] = {"sinc TBW 2", "sinc TBW 4", "sinc TBW 8",
                                          "rect",       "Gaussian",   "rect*Gauss"};

/* Half-level methods compared (the first three in an_half_level's order; the last one is the
 * default method with the analysis's slot correction). */
enum { HM_ZERO, HM_FLOOR, HM_BACKGROUND, HM_SLOT, HM_N };
static const char *const HM_NAME[HM_N] = {"true zero", "Rician floor model", "background mean",
                                          "default + slot corr."};
static const an_half_level HM_LEVEL[HM_SLOT] = {AN_HALF_TRUE_ZERO, AN_HALF_FLOOR_MODEL,
                                                AN_HALF_BACKGROUND};

/* SNR bands (per echo: the second echo of a T2 series has less than the requested SNR). */
enum { SB_LOW, SB_15, SB_30, SB_50, SB_N };
static const char *const SB_NAME[SB_N] = {"<15", "15-30", "30-50", ">=50"};

/* Where the strips lie, from the truth: the distance of each strip's half-level crossings (and of
 * its tenth-level points, the profile's FWTM mapped along the strip) to the nearer end of the
 * insert. The analysis leaves out 2.5 mm at each end (the end's edge blur) and needs at least 1 mm
 * of fit window beyond a crossing, so a crossing 3.5 mm from an end is the least it can measure. A
 * strip leaves the insert when a crossing is nearer than 3 mm; it is inside when its crossings are
 * at least 5 mm and its tenth-level points at least 2.5 mm from the ends; the grey zone between is
 * reported apart. */
enum { IN_OUTSIDE, IN_EDGE, IN_INSIDE };
#define EDGE_ZONE_MM 2.5
#define MARGIN_OUTSIDE_MM 3.0
#define MARGIN_INSIDE_MM 5.0

typedef struct bcase {
    int index;
    sim_series_kind kind;
    int prof;
    double thickness_mm, blur_mm;
    double offset_mm, scale; /* slice position error e(z) = offset + scale z */
    double tilt_v_deg, tilt_u_deg, rot_deg, du_mm, dv_mm;
    double snr, shading;
    int shuffle;
} bcase;

/* One echo of one case: parameters, truth and what the analysis said. */
typedef struct brow {
    int used; /* 1 when this slot holds an echo */
    int ran;  /* render and analysis returned SW_OK */
    char error[SW_ERROR_MAX];
    bcase c;
    int echo;
    double te_ms, snr_echo;
    int band, inside;
    double margin_mm; /* least distance of a strip's half-level crossing to an end of the insert */
    double margin10_mm; /* the same for the tenth-level points */
    /* truth */
    double t_fwhm, t_fwtm, t_len[2], t_centre[2], t_disp1, t_diff[2], t_off, t_scale;
    double t_acr_true_len, slot_widening, t_fwtm_slot;
    /* measured with an_params_default() */
    int th_ok;
    char th_reason[AN_REASON_MAX];
    double corr, unc, acr, top_th, bot_th, tilt, tilt_unc, fwtm;
    int pos_ok[2];
    char pos_reason[2][AN_REASON_MAX];
    double diff[2], diff_unc[2];
    double rdisp, rdisp_unc;
    int pm_ok;
    double off, off_unc, scl, scl_unc;
    int pitch_ok;
    double pitch, pitch_unc;
    an_verdict verdict;
    char reason[AN_REASON_MAX];
    /* thickness by half-level method */
    int m_ok[HM_N];
    double m_corr[HM_N];
} brow;

/* splitmix64 (Steele, Lea and Flood 2014): a small, well-mixed generator for the case draws. */
static uint64_t mix_next(uint64_t *s)
{
    uint64_t z = (*s += 0x9E3779B97F4A7C15ull);
    z = (z ^ (z >> 30)) * 0xBF58476D1CE4E5B9ull;
    z = (z ^ (z >> 27)) * 0x94D049BB133111EBull;
    return z ^ (z >> 31);
}

static double uni(uint64_t *s, double a, double b)
{
    return a + (b - a) * ((double)(mix_next(s) >> 11) * 0x1.0p-53);
}

static void draw_case(uint64_t seed, int i, bcase *c)
{
    uint64_t s = seed ^ (0xD1B54A32D192ED03ull * (uint64_t)(i + 1));
    mix_next(&s);
    memset(c, 0, sizeof *c);
    c->index = i;
    c->kind = uni(&s, 0, 1) < 1.0 / 3.0 ? SIM_SERIES_T2 : SIM_SERIES_T1;
    c->prof = (int)uni(&s, 0, PK_N);
    if (c->prof >= PK_N)
        c->prof = PK_N - 1;
    c->thickness_mm = uni(&s, 3.0, 8.0);
    c->blur_mm = uni(&s, 0.5, 2.0);
    c->offset_mm = uni(&s, -2.5, 2.5);
    c->scale = uni(&s, -0.01, 0.01); /* with z = +-50 mm: |d| <= 3 mm */
    c->tilt_v_deg = uni(&s, -2.5, 2.5);
    c->tilt_u_deg = uni(&s, -2.0, 2.0);
    c->rot_deg = uni(&s, -5.0, 5.0);
    double r = 20.0 * sqrt(uni(&s, 0, 1)), a = uni(&s, 0, 2 * M_PI);
    c->du_mm = r * cos(a);
    c->dv_mm = r * sin(a);
    c->snr = 15.0 * exp(uni(&s, 0, 1) * log(200.0 / 15.0)); /* log-uniform 15..200 */
    c->shading = uni(&s, 0, 1) < 0.5 ? 0.0 : 0.3;
    c->shuffle = uni(&s, 0, 1) < 0.5;
}

static void params_of(const bcase *c, uint64_t seed, sim_params *p)
{
    sim_params_default(p);
    p->kind = c->kind;
    sim_profile_params *pr = &p->profile;
    pr->thickness_mm = c->thickness_mm;
    switch (c->prof) {
    case PK_SINC2:
        pr->kind = SIM_PROFILE_BLOCH_SINC;
        pr->tbw = 2;
        break;
    case PK_SINC4:
        pr->kind = SIM_PROFILE_BLOCH_SINC;
        pr->tbw = 4;
        break;
    case PK_SINC8:
        pr->kind = SIM_PROFILE_BLOCH_SINC;
        pr->tbw = 8;
        break;
    case PK_RECT: pr->kind = SIM_PROFILE_RECT; break;
    case PK_GAUSS: pr->kind = SIM_PROFILE_GAUSS; break;
    default:
        pr->kind = SIM_PROFILE_RECT_GAUSS;
        pr->blur_mm = c->blur_mm;
        break;
    }
    p->position_offset_mm = c->offset_mm;
    p->position_scale = c->scale;
    p->pose.tilt_v_deg = c->tilt_v_deg;
    p->pose.tilt_u_deg = c->tilt_u_deg;
    p->pose.rot_deg = c->rot_deg;
    p->pose.du_mm = c->du_mm;
    p->pose.dv_mm = c->dv_mm;
    p->snr = c->snr;
    p->coil_shading = c->shading;
    p->shuffle = c->shuffle;
    p->seed = seed + 1000003ull * (uint64_t)c->index;
}

/* Full width at `frac` of the maximum of the strip a slot of thickness slot_mm shows: the magnitude
 * of the complex profile integrated over the slot, |cum(z + s/2) - cum(z - s/2)|, against z. NAN on
 * failure. */
static double slot_width(const sim_profile *pr, double slot_mm, double frac)
{
    double dz = pr->dz_mm, z0 = pr->z0_mm - slot_mm, width = NAN;
    int n = pr->n + (int)ceil(2 * slot_mm / dz) + 2;
    double *g = malloc((size_t)n * sizeof *g), gmax = 0;
    if (!g)
        goto out;
    for (int i = 0; i < n; i++) {
        double z = z0 + i * dz, re, im;
        sim_profile_integral(pr, z - 0.5 * slot_mm, z + 0.5 * slot_mm, &re, &im);
        g[i] = hypot(re, im);
        if (g[i] > gmax)
            gmax = g[i];
    }
    double w;
    if (gmax > 0 && sim_width_at_level(g, n, frac * gmax, &w, NULL) == 0)
        width = w * dz;
out:
    free(g);
    return width;
}

static int band_of(double snr)
{
    return snr < 15 ? SB_LOW : snr < 30 ? SB_15 : snr < 50 ? SB_30 : SB_50;
}

static void fill_truth(const sim_series *s, int e, const an_model *m, brow *r)
{
    const sim_truth *t = &s->truth;
    r->t_fwhm = t->thickness_mm[e];
    r->t_fwtm = t->fwtm_mm[e];
    double margin = INFINITY, margin10 = INFINITY;
    for (int k = 0; k < 2; k++) {
        r->t_len[k] = t->ramp[e].length_mm[k];
        r->t_centre[k] = t->ramp[e].centre_u_mm[k];
        /* the strip is the profile stretched by 1 / slope: the tenth-level length scales alike */
        double h50 = 0.5 * r->t_len[k], h10 = h50 * t->fwtm_mm[e] / t->thickness_mm[e];
        double c = r->t_centre[k];
        margin = fmin(margin, fmin(c - h50 - m->insert_u_min, m->insert_u_max - c - h50));
        margin10 = fmin(margin10, fmin(c - h10 - m->insert_u_min, m->insert_u_max - c - h10));
    }
    r->margin_mm = margin;
    r->margin10_mm = margin10;
    r->inside = margin < MARGIN_OUTSIDE_MM                               ? IN_OUTSIDE
                : margin >= MARGIN_INSIDE_MM && margin10 >= EDGE_ZONE_MM ? IN_INSIDE
                                                                         : IN_EDGE;
    double tt = fabs(m->ramp[0].slope);
    r->t_acr_true_len = an_acr_thickness(r->t_len[0], r->t_len[1], tt);
    r->t_disp1 = t->displacement_mm[m->ramp_slice - 1];
    /* Position model truth: what the bars show by the geometry (d_k = -difference_k / 2, phantom-
     * large.md), fitted through the two wedge slices' z as the analysis does. */
    double d[2], z[2];
    for (int j = 0; j < 2; j++) {
        r->t_diff[j] = t->wedge[j].difference_mm;
        d[j] = -0.5 * t->wedge[j].difference_mm;
        z[j] = t->z_mm[t->wedge[j].ordinal - 1];
    }
    r->t_scale = (d[1] - d[0]) / (z[1] - z[0]);
    r->t_off = d[0] - r->t_scale * z[0];
    r->t_scale *= 100.0;
    r->snr_echo = t->noise_sigma > 0 ? t->fluid_signal[e] / t->noise_sigma : INFINITY;
    r->band = band_of(r->snr_echo);
    r->slot_widening = slot_width(s->profile[e], m->slot_mm, 0.5) - s->profile[e]->fwhm_mm;
    r->t_fwtm_slot = slot_width(s->profile[e], m->slot_mm, 0.1);
}

static void fill_measured(const an_series_result *res, brow *r)
{
    const an_thickness *t = &res->thickness;
    r->th_ok = t->measured;
    sw_strlcpy(r->th_reason, t->reason, sizeof r->th_reason);
    r->corr = t->corrected_mm;
    r->unc = t->uncertainty_mm;
    r->acr = t->acr_mm;
    r->top_th = t->top_thickness_mm;
    r->bot_th = t->bottom_thickness_mm;
    r->tilt = t->tilt_deg;
    r->tilt_unc = t->tilt_unc_deg;
    r->fwtm = t->fwtm_mm;
    r->rdisp = r->rdisp_unc = NAN;
    for (int k = 0; k < 2; k++) {
        const an_position *p = &res->position[k];
        r->pos_ok[k] = p->measured;
        sw_strlcpy(r->pos_reason[k], p->reason, sizeof r->pos_reason[k]);
        r->diff[k] = p->bar_difference_mm;
        r->diff_unc[k] = p->uncertainty_mm;
        if (isfinite(p->ramp_displacement_mm)) {
            r->rdisp = p->ramp_displacement_mm;
            r->rdisp_unc = p->ramp_displacement_unc_mm;
        }
    }
    const an_position_model *pm = &res->position_model;
    r->pm_ok = pm->measured;
    r->off = pm->offset_mm;
    r->off_unc = pm->offset_unc_mm;
    r->scl = pm->scale_percent;
    r->scl_unc = pm->scale_unc_percent;
    r->pitch_ok = res->pitch_measured;
    r->pitch = res->pitch_deg;
    r->pitch_unc = res->pitch_unc_deg;
    r->verdict = res->verdict;
    sw_strlcpy(r->reason, res->reason, sizeof r->reason);
}

/* Renders case c and analyses each echo with every half-level method; fills rows[0..1]. */
static void run_case(const bcase *c, uint64_t seed, brow rows[2])
{
    sim_params p;
    sim_series *s = NULL;
    an_series_result *res = NULL;
    an_model model;
    an_tolerance tol;
    sw_error err;
    sw_error_clear(&err);
    memset(rows, 0, 2 * sizeof *rows);
    rows[0].used = 1;
    rows[0].c = *c;
    params_of(c, seed, &p);
    an_model_large(&model);
    an_tolerance_default(&tol);
    p.model = &model;
    res = malloc(sizeof *res);
    if (!res) {
        snprintf(rows[0].error, sizeof rows[0].error, "out of memory");
        goto out;
    }
    if (sim_series_render(&p, &s, &err) != SW_OK) {
        sw_strlcpy(rows[0].error, err.msg, sizeof rows[0].error);
        goto out;
    }
    for (int e = 0; e < s->truth.n_echoes && e < 2; e++) {
        brow *r = &rows[e];
        r->used = 1;
        r->c = *c;
        r->echo = e + 1;
        r->te_ms = s->params.te_ms[e];
        fill_truth(s, e, &model, r);
        an_image views[SIM_MAX_IMAGES];
        int n = 0;
        for (int i = 0; i < s->n_images; i++)
            if (s->echo[i] == e + 1)
                sim_image_view(s, i, &views[n++]); /* as daemon/pipeline.c builds it */
        /* The default parameters give the main results; each half level and the default with the
         * slot correction give a thickness for table 4. */
        an_params def;
        an_params_default(&def);
        for (int h = 0; h < HM_N; h++) {
            an_params par = def;
            if (h < HM_SLOT)
                par.half_level = HM_LEVEL[h];
            else
                par.slot_correction = 1;
            sw_error_clear(&err);
            if (an_analyze_series(views, n, &model, &tol, &par, res, &err) != SW_OK) {
                sw_strlcpy(r->error, err.msg, sizeof r->error);
                goto out;
            }
            if (h < HM_SLOT && par.half_level == def.half_level && !def.slot_correction)
                fill_measured(res, r);
            r->m_ok[h] = res->thickness.measured;
            r->m_corr[h] = res->thickness.corrected_mm;
        }
        r->ran = 1;
    }
out:
    free(res);
    sim_series_free(s);
}

/* ---- workers ---- */

typedef struct job {
    int n;
    uint64_t seed;
    const bcase *cases;
    brow *rows;
    atomic_int next, done;
    int progress;
} job;

static void *worker(void *arg)
{
    job *j = arg;
    for (;;) {
        int i = atomic_fetch_add(&j->next, 1);
        if (i >= j->n)
            break;
        run_case(&j->cases[i], j->seed, &j->rows[2 * i]);
        int d = atomic_fetch_add(&j->done, 1) + 1;
        if (j->progress && (d % 20 == 0 || d == j->n))
            fprintf(stderr, "bench_accuracy: %d of %d cases\n", d, j->n);
    }
    return NULL;
}

/* ---- statistics ---- */

typedef struct stat {
    int n;
    double mean, sd, rms, max_abs;
} stat;

/* The values of one table cell, kept so that the SD is taken about the mean in a second pass. */
typedef struct acc {
    int n, cap;
    double *v;
} acc;

static void acc_add(acc *a, double x)
{
    if (a->n == a->cap) {
        int cap = a->cap ? 2 * a->cap : 64;
        double *v = realloc(a->v, (size_t)cap * sizeof *v);
        if (!v)
            return; /* statistics of what fitted; reported n says how many */
        a->v = v;
        a->cap = cap;
    }
    a->v[a->n++] = x;
}

static stat acc_stat(acc *a)
{
    stat s = {.n = a->n, .mean = NAN, .sd = NAN, .rms = NAN, .max_abs = NAN};
    if (a->n < 1)
        goto out;
    double sum = 0, sq = 0, mx = 0;
    for (int i = 0; i < a->n; i++) {
        sum += a->v[i];
        sq += a->v[i] * a->v[i];
        mx = fmax(mx, fabs(a->v[i]));
    }
    s.mean = sum / a->n;
    s.rms = sqrt(sq / a->n);
    s.max_abs = mx;
    if (a->n > 1) {
        double m2 = 0;
        for (int i = 0; i < a->n; i++)
            m2 += (a->v[i] - s.mean) * (a->v[i] - s.mean);
        s.sd = sqrt(m2 / (a->n - 1));
    }
out:
    free(a->v);
    memset(a, 0, sizeof *a);
    return s;
}

/* A reported quantity: its error (measured - truth) and reported uncertainty for part k. */
typedef struct quantity {
    const char *name;
    const char *truth;
    int nk;          /* parts per echo (2 for the two wedge slices) */
    int strip_based; /* needs the strips inside the insert */
    int (*get)(const brow *r, int k, double *err, double *unc);
} quantity;

#define OK_ALL(r) ((r)->used && (r)->ran)

static int q_corr(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->corr - r->t_fwhm;
    *u = r->unc;
    return r->th_ok && isfinite(*e);
}

static int q_acr(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->acr - r->t_fwhm;
    *u = NAN;
    return r->th_ok && isfinite(*e);
}

static int q_acr_len(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->acr - r->t_acr_true_len;
    *u = NAN;
    return r->th_ok && isfinite(*e);
}

static int q_top(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->top_th - 0.1 * r->t_len[0];
    *u = NAN;
    return r->th_ok && isfinite(*e);
}

static int q_bottom(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->bot_th - 0.1 * r->t_len[1];
    *u = NAN;
    return r->th_ok && isfinite(*e);
}

static int q_fwtm(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->fwtm - r->t_fwtm;
    *u = NAN;
    return r->th_ok && isfinite(*e);
}

static int q_fwtm_slot(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->fwtm - r->t_fwtm_slot;
    *u = NAN;
    return r->th_ok && isfinite(*e);
}

static int q_diff(const brow *r, int k, double *e, double *u)
{
    *e = r->diff[k] - r->t_diff[k];
    *u = r->diff_unc[k];
    return r->pos_ok[k] && isfinite(*e);
}

static int q_diff1(const brow *r, int k, double *e, double *u)
{
    (void)k;
    return q_diff(r, 0, e, u);
}

static int q_diff11(const brow *r, int k, double *e, double *u)
{
    (void)k;
    return q_diff(r, 1, e, u);
}

static int q_rdisp(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->rdisp - r->t_disp1;
    *u = r->rdisp_unc;
    return r->th_ok && isfinite(*e);
}

static int q_off(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->off - r->t_off;
    *u = r->off_unc;
    return r->pm_ok && isfinite(*e);
}

static int q_scale(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->scl - r->t_scale;
    *u = r->scl_unc;
    return r->pm_ok && isfinite(*e);
}

static int q_tilt(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->tilt - r->c.tilt_v_deg;
    *u = r->tilt_unc;
    return r->th_ok && isfinite(*e);
}

static int q_pitch(const brow *r, int k, double *e, double *u)
{
    (void)k;
    *e = r->pitch - r->c.tilt_u_deg;
    *u = r->pitch_unc;
    return r->pitch_ok && isfinite(*e);
}

enum {
    Q_CORR,
    Q_ACR,
    Q_ACR_LEN,
    Q_TOP,
    Q_BOTTOM,
    Q_FWTM,
    Q_FWTM_SLOT,
    Q_DIFF,
    Q_DIFF1,
    Q_DIFF11,
    Q_RDISP,
    Q_OFF,
    Q_SCALE,
    Q_TILT,
    Q_PITCH,
    Q_N
};

static const quantity QUANT[Q_N] = {
    [Q_CORR] = {"thickness, tilt-corrected (mm)", "profile FWHM", 1, 1, q_corr},
    [Q_ACR] = {"thickness, ACR formula (mm)", "profile FWHM", 1, 1, q_acr},
    [Q_ACR_LEN] = {"  ACR formula, length error only", "formula on true a, b", 1, 1, q_acr_len},
    [Q_TOP] = {"thickness, top ramp (mm)", "0.1 x true length", 1, 1, q_top},
    [Q_BOTTOM] = {"thickness, bottom ramp (mm)", "0.1 x true length", 1, 1, q_bottom},
    [Q_FWTM] = {"FWTM along the normal (mm)", "profile FWTM", 1, 1, q_fwtm},
    [Q_FWTM_SLOT] = {"  FWTM", "FWTM through the slot", 1, 1, q_fwtm_slot},
    [Q_DIFF] = {"bar length difference (mm)", "geometry, both", 2, 0, q_diff},
    [Q_DIFF1] = {"  bar difference, slice 1", "geometry", 1, 0, q_diff1},
    [Q_DIFF11] = {"  bar difference, slice 11", "geometry", 1, 0, q_diff11},
    [Q_RDISP] = {"displacement from ramps (mm)", "d_1 at the axis", 1, 1, q_rdisp},
    [Q_OFF] = {"position model offset (mm)", "fit of true bars", 1, 0, q_off},
    [Q_SCALE] = {"position model scale (%)", "fit of true bars", 1, 0, q_scale},
    [Q_TILT] = {"tilt about v (deg)", "pose tilt_v", 1, 1, q_tilt},
    [Q_PITCH] = {"pitch, ramps vs wedges (deg)", "pose tilt_u", 1, 1, q_pitch},
};

/* Row filter: band, profile kind, coil shading (-1 any), SNR range [lo, hi). */
typedef struct filter {
    int band, prof, shading; /* shading: -1 any, 0 off, 1 on */
    double snr_lo, snr_hi;
} filter;

static const filter ANY = {-1, -1, -1, 0, INFINITY};

static int pass_filter(const brow *r, const filter *f)
{
    return OK_ALL(r) && (f->band < 0 || r->band == f->band) &&
           (f->prof < 0 || r->c.prof == f->prof) &&
           (f->shading < 0 || (r->c.shading > 0) == f->shading) && r->snr_echo >= f->snr_lo &&
           r->snr_echo < f->snr_hi;
}

/* Errors (kind 0), z-scores (kind 1) of quantity q over the rows that pass f; strip-based
 * quantities only where the strips lie inside the insert. eligible and measured count parts. */
static stat q_stat(const brow *rows, int n, int q, const filter *f, int zscore, int *eligible,
                   int *measured)
{
    acc a = {0};
    int el = 0, me = 0;
    const quantity *Q = &QUANT[q];
    for (int i = 0; i < n; i++) {
        const brow *r = &rows[i];
        if (!pass_filter(r, f))
            continue;
        if (Q->strip_based && r->inside != IN_INSIDE)
            continue;
        for (int k = 0; k < Q->nk; k++) {
            double e, u;
            el++;
            if (!Q->get(r, k, &e, &u))
                continue;
            me++;
            if (zscore) {
                if (isfinite(u) && u > 0)
                    acc_add(&a, e / u);
            } else {
                acc_add(&a, e);
            }
        }
    }
    if (eligible)
        *eligible = el;
    if (measured)
        *measured = me;
    return acc_stat(&a);
}

/* Thickness error (corrected - FWHM) for half-level method h. */
static stat m_stat(const brow *rows, int n, int h, const filter *f, int minus_slot)
{
    acc a = {0};
    for (int i = 0; i < n; i++) {
        const brow *r = &rows[i];
        if (!pass_filter(r, f) || r->inside != IN_INSIDE || !r->m_ok[h])
            continue;
        double e = r->m_corr[h] - r->t_fwhm - (minus_slot ? r->slot_widening : 0);
        if (isfinite(e))
            acc_add(&a, e);
    }
    return acc_stat(&a);
}

/* ---- output ---- */

static void cell(FILE *f, stat s)
{
    if (s.n == 0)
        fprintf(f, " | %4s %7s %6s", "0", "-", "-");
    else if (s.n == 1)
        fprintf(f, " | %4d %+7.3f %6s", s.n, s.mean, "-");
    else
        fprintf(f, " | %4d %+7.3f %6.3f", s.n, s.mean, s.sd);
}

static void csv_str(FILE *f, const char *s)
{
    fputc('"', f);
    for (; *s; s++) {
        if (*s == '"')
            fputc('"', f);
        fputc(*s, f);
    }
    fputc('"', f);
}

static int write_csv(const char *path, const brow *rows, int n)
{
    FILE *f = fopen(path, "w");
    if (!f)
        return -1;
    fprintf(f,
            "case,series,echo,te_ms,profile,thickness_set_mm,blur_mm,offset_mm,scale,tilt_v_deg,"
            "tilt_u_deg,rot_deg,du_mm,dv_mm,snr_requested,snr_echo,shading,shuffled,"
            "strip_margin_mm,strip_margin_tenth_mm,strips,truth_fwhm_mm,truth_fwtm_mm,truth_top_"
            "length_mm,"
            "truth_bottom_length_mm,truth_top_centre_mm,truth_bottom_centre_mm,"
            "truth_displacement_1_mm,truth_bar_difference_1_mm,truth_bar_difference_11_mm,"
            "truth_offset_mm,truth_scale_percent,slot_widening_mm,truth_fwtm_slot_mm,"
            "thickness_measured,"
            "corrected_mm,uncertainty_mm,acr_mm,top_thickness_mm,bottom_thickness_mm,tilt_deg,"
            "tilt_uncertainty_deg,fwtm_mm,ramp_displacement_mm,ramp_displacement_uncertainty_mm,"
            "bar_difference_1_mm,bar_difference_1_uncertainty_mm,bar_difference_11_mm,"
            "bar_difference_11_uncertainty_mm,offset_mm,offset_uncertainty_mm,scale_percent,"
            "scale_uncertainty_percent,pitch_deg,pitch_uncertainty_deg,corrected_true_zero_mm,"
            "corrected_floor_mm,corrected_background_mm,corrected_default_slot_mm,verdict,reason,"
            "thickness_reason,position_1_reason,position_11_reason,error\n");
    static const char *const inside[] = {"outside", "edge", "inside"};
    for (int i = 0; i < n; i++) {
        const brow *r = &rows[i];
        if (!r->used)
            continue;
        const bcase *c = &r->c;
        fprintf(f, "%d,%s,%d,%.1f,", c->index, c->kind == SIM_SERIES_T2 ? "T2" : "T1", r->echo,
                r->te_ms);
        csv_str(f, PK_NAME[c->prof]);
        fprintf(f,
                ",%.4f,%.4f,%.4f,%.6f,%.4f,%.4f,%.4f,%.4f,%.4f,%.3f,%.3f,%.2f,%d,%.3f,%.3f,%s,"
                "%.5f,%.5f,%.4f,%.4f,%.4f,%.4f,%.5f,%.5f,%.5f,%.5f,%.5f,%.5f,%.5f,%d,",
                c->thickness_mm, c->blur_mm, c->offset_mm, c->scale, c->tilt_v_deg, c->tilt_u_deg,
                c->rot_deg, c->du_mm, c->dv_mm, c->snr, r->snr_echo, c->shading, c->shuffle,
                r->margin_mm, r->margin10_mm, inside[r->inside], r->t_fwhm, r->t_fwtm, r->t_len[0],
                r->t_len[1], r->t_centre[0], r->t_centre[1], r->t_disp1, r->t_diff[0], r->t_diff[1],
                r->t_off, r->t_scale, r->slot_widening, r->t_fwtm_slot, r->th_ok);
        const double v[] = {r->corr,
                            r->unc,
                            r->acr,
                            r->top_th,
                            r->bot_th,
                            r->tilt,
                            r->tilt_unc,
                            r->fwtm,
                            r->rdisp,
                            r->rdisp_unc,
                            r->diff[0],
                            r->diff_unc[0],
                            r->diff[1],
                            r->diff_unc[1],
                            r->off,
                            r->off_unc,
                            r->scl,
                            r->scl_unc,
                            r->pitch,
                            r->pitch_unc,
                            r->m_corr[HM_ZERO],
                            r->m_corr[HM_FLOOR],
                            r->m_corr[HM_BACKGROUND],
                            r->m_corr[HM_SLOT]};
        for (size_t k = 0; k < sizeof v / sizeof v[0]; k++) {
            if (isfinite(v[k]))
                fprintf(f, "%.5f", v[k]);
            fputc(',', f);
        }
        fprintf(f, "%s,", r->ran ? an_verdict_name(r->verdict) : "");
        csv_str(f, r->reason);
        fputc(',', f);
        csv_str(f, r->th_reason);
        fputc(',', f);
        csv_str(f, r->pos_reason[0]);
        fputc(',', f);
        csv_str(f, r->pos_reason[1]);
        fputc(',', f);
        csv_str(f, r->error);
        fputc('\n', f);
    }
    int bad = ferror(f);
    if (fclose(f) != 0 || bad)
        return -1;
    return 0;
}

static void case_line(FILE *f, const brow *r)
{
    const bcase *c = &r->c;
    fprintf(
        f,
        "    case %d %s echo %d: %s T %.2f mm (FWHM %.3f), SNR %.1f, tilt_v %+.2f, tilt_u %+.2f, "
        "rot %+.2f, offset (%+.1f, %+.1f) mm, e(z) %+.2f mm %+.3f %%, shading %.1f, margins "
        "%.1f (half) %.1f (tenth) mm\n",
        c->index, c->kind == SIM_SERIES_T2 ? "T2" : "T1", r->echo, PK_NAME[c->prof],
        c->thickness_mm, r->t_fwhm, r->snr_echo, c->tilt_v_deg, c->tilt_u_deg, c->rot_deg, c->du_mm,
        c->dv_mm, c->offset_mm, 100 * c->scale, c->shading, r->margin_mm, r->margin10_mm);
}

static const char *mark(int ok)
{
    return ok ? "PASS" : "MISS";
}

static void usage(FILE *f)
{
    fprintf(f,
            "usage: bench_accuracy [--cases N] [--seed S] [--threads T] [--csv FILE] [--quiet]\n"
            "Renders N simulated series (default %d) over a seeded sweep of thickness, slice\n"
            "position, tilt, rotation, offset, SNR, slice profile, coil shading and series type,\n"
            "analyses every echo, and prints bias and SD of (measured - truth) per quantity, the\n"
            "uncertainty calibration, the half-level methods and the accuracy goals.\n"
            "  --csv FILE   one row per case and echo with parameters, truth and results\n",
            DEFAULT_CASES);
}

int main(int argc, char **argv)
{
    static const struct option opts[] = {
        {"cases", required_argument, NULL, 'n'},
        {"seed", required_argument, NULL, 's'},
        {"threads", required_argument, NULL, 't'},
        {"csv", required_argument, NULL, 'c'},
        {"quiet", no_argument, NULL, 'q'},
        {"help", no_argument, NULL, 'h'},
        {NULL, 0, NULL, 0},
    };
    int ncases = DEFAULT_CASES, nthreads = 1, quiet = 0, rc = 0, c;
    uint64_t seed = DEFAULT_SEED;
    const char *csv = NULL;
    bcase *cases = NULL;
    brow *rows = NULL;
    pthread_t *tid = NULL;
    while ((c = getopt_long(argc, argv, "", opts, NULL)) != -1) {
        char *end = NULL;
        errno = 0;
        switch (c) {
        case 'n':
            ncases = (int)strtol(optarg, &end, 10);
            if (errno || *end || ncases < 1 || ncases > 1000000) {
                fprintf(stderr, "bench_accuracy: bad --cases '%s'\n", optarg);
                return 2;
            }
            break;
        case 's':
            seed = strtoull(optarg, &end, 0);
            if (errno || *end) {
                fprintf(stderr, "bench_accuracy: bad --seed '%s'\n", optarg);
                return 2;
            }
            break;
        case 't':
            nthreads = (int)strtol(optarg, &end, 10);
            if (errno || *end || nthreads < 1 || nthreads > 64) {
                fprintf(stderr, "bench_accuracy: bad --threads '%s'\n", optarg);
                return 2;
            }
            break;
        case 'c': csv = optarg; break;
        case 'q': quiet = 1; break;
        case 'h': usage(stdout); return 0;
        default: usage(stderr); return 2;
        }
    }
    if (optind != argc) {
        usage(stderr);
        return 2;
    }
    cases = calloc((size_t)ncases, sizeof *cases);
    rows = calloc((size_t)ncases * 2, sizeof *rows);
    tid = calloc((size_t)nthreads, sizeof *tid);
    if (!cases || !rows || !tid) {
        fprintf(stderr, "bench_accuracy: out of memory\n");
        rc = 2;
        goto out;
    }
    for (int i = 0; i < ncases; i++)
        draw_case(seed, i, &cases[i]);

    struct timespec t0, t1;
    clock_gettime(CLOCK_MONOTONIC, &t0);
    job j = {.n = ncases, .seed = seed, .cases = cases, .rows = rows, .progress = !quiet};
    atomic_init(&j.next, 0);
    atomic_init(&j.done, 0);
    int started = 0;
    for (int t = 0; t < nthreads; t++) {
        if (pthread_create(&tid[t], NULL, worker, &j) != 0)
            break;
        started++;
    }
    if (started == 0)
        worker(&j);
    for (int t = 0; t < started; t++)
        pthread_join(tid[t], NULL);
    clock_gettime(CLOCK_MONOTONIC, &t1);
    double wall = (double)(t1.tv_sec - t0.tv_sec) + 1e-9 * (double)(t1.tv_nsec - t0.tv_nsec);
    const int nr = 2 * ncases;

    /* ---- counts ---- */
    int n_echo = 0, n_fail = 0, n_t2 = 0, n_class[3] = {0, 0, 0};
    for (int i = 0; i < nr; i++) {
        if (!rows[i].used)
            continue;
        n_echo++;
        if (!rows[i].ran) {
            n_fail++;
            continue;
        }
        n_class[rows[i].inside]++;
        if (rows[i].c.kind == SIM_SERIES_T2)
            n_t2++;
    }
    FILE *o = stdout;
    fprintf(o,
            "slicewarden accuracy bench: %d cases (%d echoes analysed, %d of them T2), seed %llu, "
            "%d thread%s, %.1f s (%.2f s per case per thread)\n",
            ncases, n_echo - n_fail, n_t2, (unsigned long long)seed, started ? started : 1,
            started > 1 ? "s" : "", wall, wall * (started ? started : 1) / ncases);
    fprintf(o,
            "sweep: thickness 3-8 mm; position error offset +-2.5 mm, scale +-1 %% (|d| <= 3 "
            "mm); tilt_v +-2.5 deg; tilt_u +-2 deg; rotation +-5 deg; centre offset <= 20 mm;\n"
            "       SNR 15-200 (log-uniform, first echo); profiles %s, %s, %s, %s, %s, %s;\n"
            "       coil shading 0 or 0.3; T1 (2/3) and T2 double echo (1/3), every echo "
            "analysed; half the series shuffled\n",
            PK_NAME[0], PK_NAME[1], PK_NAME[2], PK_NAME[3], PK_NAME[4], PK_NAME[5]);
    fprintf(o,
            "strips (from the truth): %d inside the insert (half-level crossings >= %.1f mm and "
            "tenth-level points >= %.1f mm from its ends), %d leaving it (a crossing < %.1f mm "
            "from an end), %d between\n",
            n_class[IN_INSIDE], MARGIN_INSIDE_MM, EDGE_ZONE_MM, n_class[IN_OUTSIDE],
            MARGIN_OUTSIDE_MM, n_class[IN_EDGE]);
    if (n_fail) {
        fprintf(o, "render or analysis errors: %d\n", n_fail);
        for (int i = 0, shown = 0; i < nr && shown < 10; i++)
            if (rows[i].used && !rows[i].ran) {
                fprintf(o, "    case %d: %s\n", rows[i].c.index, rows[i].error);
                shown++;
            }
    }
    fprintf(o,
            "\nGoals: thickness (tilt-corrected) |bias| <= 0.05 mm and SD <= 0.05 mm at SNR >= 50, "
            "SD <= 0.15 mm at SNR 15 (15-20);\n"
            "       bar length difference |bias| <= 0.1 mm and SD <= 0.2 mm at SNR >= 50;\n"
            "       100 %% measured at SNR >= 15 with the strips inside the insert (the others "
            "with that reason);\n"
            "       reported uncertainty within 30 %% of the observed scatter (SD of the z-score "
            "(measured - truth) / uncertainty in 0.7..1.3).\n");

    an_params def;
    an_params_default(&def);
    int hm_def = HM_ZERO;
    for (int h = 0; h < HM_SLOT; h++)
        if (HM_LEVEL[h] == def.half_level)
            hm_def = h;

    /* ---- table 1: bias and SD by SNR band ---- */
    fprintf(o,
            "\n1. Error (measured - truth) by SNR band: n, bias, SD. Strip-based rows: strips "
            "inside the insert only. Default parameters (half level: %s%s).\n",
            HM_NAME[hm_def], def.slot_correction ? ", slot correction on" : "");
    fprintf(o, "%-34s %-21s", "quantity", "truth");
    for (int b = 0; b < SB_N; b++)
        fprintf(o, " | %-19s", b == SB_LOW ? "SNR <15 (echo 2)" : SB_NAME[b]);
    fprintf(o, " | %-19s\n", "all");
    for (int q = 0; q < Q_N; q++) {
        fprintf(o, "%-34s %-21s", QUANT[q].name, QUANT[q].truth);
        for (int b = 0; b < SB_N; b++) {
            filter f = ANY;
            f.band = b;
            cell(o, q_stat(rows, nr, q, &f, 0, NULL, NULL));
        }
        cell(o, q_stat(rows, nr, q, &ANY, 0, NULL, NULL));
        fputc('\n', o);
    }
    /* fraction measured */
    fprintf(o, "%-56s", "measured / eligible (thickness; bars; position model)");
    for (int b = 0; b <= SB_N; b++) {
        filter f = ANY;
        if (b < SB_N)
            f.band = b;
        int e1, m1, e2, m2, e3, m3;
        stat s1 = q_stat(rows, nr, Q_CORR, &f, 0, &e1, &m1);
        stat s2 = q_stat(rows, nr, Q_DIFF, &f, 0, &e2, &m2);
        stat s3 = q_stat(rows, nr, Q_OFF, &f, 0, &e3, &m3);
        (void)s1, (void)s2, (void)s3;
        char buf[64];
        snprintf(buf, sizeof buf, "%d/%d; %d/%d; %d/%d", m1, e1, m2, e2, m3, e3);
        fprintf(o, " | %-19s", buf);
    }
    fputc('\n', o);

    /* ---- table 2: by profile kind and coil shading ---- */
    fprintf(o,
            "\n2. By slice profile kind and coil shading (n, bias, SD; z = error / reported "
            "uncertainty); slot = FWHM of the profile integrated over the 1 mm slot minus the "
            "profile's FWHM (mean); measured = thickness measured / strips inside, SNR >= 15.\n");
    fprintf(o, "%-12s %-7s | %-19s | %-19s | %-9s | %-19s | %-19s | %8s | %8s\n", "profile",
            "shading", "thickness, SNR>=50", "thickness, SNR>=15", "SD z >=15",
            "bar diff., SNR>=15", "displ. ramps >=15", "slot +mm", "measured");
    for (int k = 0; k < PK_N; k++)
        for (int sh = 0; sh < 2; sh++) {
            filter f = ANY, fh;
            f.prof = k;
            f.shading = sh;
            f.snr_lo = 15;
            fh = f;
            fh.band = SB_50;
            fprintf(o, "%-12s %-7s", PK_NAME[k], sh ? "0.3" : "off");
            cell(o, q_stat(rows, nr, Q_CORR, &fh, 0, NULL, NULL));
            cell(o, q_stat(rows, nr, Q_CORR, &f, 0, NULL, NULL));
            stat z = q_stat(rows, nr, Q_CORR, &f, 1, NULL, NULL);
            if (z.n > 1)
                fprintf(o, " | %9.2f", z.sd);
            else
                fprintf(o, " | %9s", "-");
            cell(o, q_stat(rows, nr, Q_DIFF, &f, 0, NULL, NULL));
            cell(o, q_stat(rows, nr, Q_RDISP, &f, 0, NULL, NULL));
            acc a = {0};
            for (int i = 0; i < nr; i++)
                if (pass_filter(&rows[i], &f) && isfinite(rows[i].slot_widening))
                    acc_add(&a, rows[i].slot_widening);
            stat sw = acc_stat(&a);
            if (sw.n)
                fprintf(o, " | %+8.4f", sw.mean);
            else
                fprintf(o, " | %8s", "-");
            int el, me;
            stat d = q_stat(rows, nr, Q_CORR, &f, 0, &el, &me);
            (void)d;
            char buf[32];
            snprintf(buf, sizeof buf, "%d/%d", me, el);
            fprintf(o, " | %8s\n", buf);
        }

    /* ---- table 3: uncertainty calibration ---- */
    fprintf(o, "\n3. Reported uncertainty vs observed scatter: z = (measured - truth) / reported "
               "uncertainty; n, mean z, SD z (1 when the uncertainty is right), RMS z.\n");
    fprintf(o, "%-34s", "quantity");
    for (int b = SB_15; b < SB_N; b++)
        fprintf(o, " | %-26s", SB_NAME[b]);
    fprintf(o, " | %-26s\n", "all >= 15");
    const int zq[] = {Q_CORR, Q_DIFF, Q_RDISP, Q_OFF, Q_SCALE, Q_TILT, Q_PITCH};
    stat zs[sizeof zq / sizeof zq[0]][SB_N + 1];
    for (size_t i = 0; i < sizeof zq / sizeof zq[0]; i++) {
        fprintf(o, "%-34s", QUANT[zq[i]].name);
        for (int b = SB_15; b <= SB_N; b++) {
            filter f = ANY;
            if (b < SB_N)
                f.band = b;
            else
                f.snr_lo = 15;
            stat s = q_stat(rows, nr, zq[i], &f, 1, NULL, NULL);
            zs[i][b] = s;
            if (s.n < 2)
                fprintf(o, " | %4d %6s %6s %6s", s.n, "-", "-", "-");
            else
                fprintf(o, " | %4d %+6.2f %6.2f %6.2f", s.n, s.mean, s.sd, s.rms);
        }
        fputc('\n', o);
    }

    /* ---- table 4: half-level methods ---- */
    fprintf(o, "\n4. Thickness (tilt-corrected) bias by half-level method and SNR band (n, bias, "
               "SD), strips inside the insert.\n");
    fprintf(o, "%-30s", "method");
    for (int b = 0; b < SB_N; b++)
        fprintf(o, " | %-19s", SB_NAME[b]);
    fprintf(o, " | %-19s\n", "all");
    stat ms[HM_N][SB_N];
    for (int h = 0; h < HM_N; h++) {
        char name[64];
        snprintf(name, sizeof name, "%s%s", HM_NAME[h], h == hm_def ? " (default)" : "");
        fprintf(o, "%-30s", name);
        for (int b = 0; b < SB_N; b++) {
            filter f = ANY;
            f.band = b;
            ms[h][b] = m_stat(rows, nr, h, &f, 0);
            cell(o, ms[h][b]);
        }
        cell(o, m_stat(rows, nr, h, &ANY, 0));
        fputc('\n', o);
    }
    fprintf(o, "%-30s", "least |bias| (of the 3 levels)");
    for (int b = 0; b < SB_N; b++) {
        int best = -1;
        for (int h = 0; h < HM_SLOT; h++)
            if (ms[h][b].n > 0 && (best < 0 || fabs(ms[h][b].mean) < fabs(ms[best][b].mean)))
                best = h;
        fprintf(o, " | %-19s", best < 0 ? "-" : HM_NAME[best]);
    }
    fputc('\n', o);

    /* ---- table 5: the slot's share ---- */
    fprintf(o,
            "\n5. The slot's own widening (truth stays the profile FWHM): expected widening vs the "
            "measured bias at SNR >= 50, per profile kind (default method); what the analysis's "
            "slot correction removes (paired, same cases) should equal the expected widening.\n");
    fprintf(o, "%-12s | %4s | %9s | %9s | %10s | %11s | %9s\n", "profile", "n", "expected", "bias",
            "bias-exp.", "slot corr.", "removed");
    for (int k = 0; k < PK_N; k++) {
        filter f = ANY;
        f.prof = k;
        f.band = SB_50;
        acc a = {0}, rm = {0};
        for (int i = 0; i < nr; i++) {
            const brow *r = &rows[i];
            if (!pass_filter(r, &f) || r->inside != IN_INSIDE)
                continue;
            if (isfinite(r->slot_widening))
                acc_add(&a, r->slot_widening);
            if (r->m_ok[hm_def] && r->m_ok[HM_SLOT])
                acc_add(&rm, r->m_corr[hm_def] - r->m_corr[HM_SLOT]);
        }
        stat ex = acc_stat(&a), removed = acc_stat(&rm);
        stat bz = m_stat(rows, nr, hm_def, &f, 0), bzm = m_stat(rows, nr, hm_def, &f, 1);
        stat bs = m_stat(rows, nr, HM_SLOT, &f, 0);
        fprintf(o, "%-12s | %4d", PK_NAME[k], bz.n);
        const double v[] = {ex.mean, bz.mean, bzm.mean, bs.mean, removed.mean};
        const int w[] = {9, 9, 10, 11, 9};
        for (int i = 0; i < 5; i++)
            if (bz.n)
                fprintf(o, " | %+*.4f", w[i], v[i]);
            else
                fprintf(o, " | %*s", w[i], "-");
        fputc('\n', o);
    }

    /* ---- table 6: strips at and beyond the insert's ends ---- */
    fprintf(o, "\n6. Strips near or beyond the insert's ends (SNR >= 15): measured, or unmeasured "
               "with the reason 'end of the insert'.\n");
    int cls_n[3] = {0}, cls_meas[3] = {0}, cls_reason[3] = {0};
    for (int i = 0; i < nr; i++) {
        const brow *r = &rows[i];
        if (!OK_ALL(r) || r->snr_echo < 15)
            continue;
        cls_n[r->inside]++;
        if (r->th_ok)
            cls_meas[r->inside]++;
        else if (strstr(r->th_reason, "end of the insert"))
            cls_reason[r->inside]++;
    }
    static const char *const cls_name[3] = {"leaving", "grey zone", "inside"};
    for (int k = 0; k < 3; k++)
        fprintf(o, "  %-10s %4d cases: %4d measured, %4d unmeasured with that reason, %4d other\n",
                cls_name[k], cls_n[k], cls_meas[k], cls_reason[k],
                cls_n[k] - cls_meas[k] - cls_reason[k]);

    /* ---- goals ---- */
    fprintf(o, "\nGoals\n");
    filter hi = ANY, s15 = ANY, ge15 = ANY;
    hi.band = SB_50;
    s15.snr_lo = 15;
    s15.snr_hi = 20;
    ge15.snr_lo = 15;
    stat th_hi = q_stat(rows, nr, Q_CORR, &hi, 0, NULL, NULL);
    stat th_15 = q_stat(rows, nr, Q_CORR, &s15, 0, NULL, NULL);
    stat bd_hi = q_stat(rows, nr, Q_DIFF, &hi, 0, NULL, NULL);
    int e_th, m_th, e_bd, m_bd, e_pm, m_pm;
    stat d1 = q_stat(rows, nr, Q_CORR, &ge15, 0, &e_th, &m_th);
    stat d2 = q_stat(rows, nr, Q_DIFF, &ge15, 0, &e_bd, &m_bd);
    stat d3 = q_stat(rows, nr, Q_OFF, &ge15, 0, &e_pm, &m_pm);
    (void)d1, (void)d2, (void)d3;
    int g1 = th_hi.n > 1 && fabs(th_hi.mean) <= 0.05, g2 = th_hi.n > 1 && th_hi.sd <= 0.05;
    int g3 = th_15.n > 1 && th_15.sd <= 0.15;
    int g4 = bd_hi.n > 1 && fabs(bd_hi.mean) <= 0.1, g5 = bd_hi.n > 1 && bd_hi.sd <= 0.2;
    int g6 = e_th > 0 && m_th == e_th && m_bd == e_bd && m_pm == e_pm;
    int g7 = cls_n[IN_OUTSIDE] == cls_reason[IN_OUTSIDE];
    fprintf(o, "  %s thickness |bias| at SNR >= 50: %.4f mm (goal <= 0.05, n %d)\n", mark(g1),
            fabs(th_hi.mean), th_hi.n);
    fprintf(o, "  %s thickness SD at SNR >= 50: %.4f mm (goal <= 0.05)\n", mark(g2), th_hi.sd);
    fprintf(o, "  %s thickness SD at SNR 15-20: %.4f mm (goal <= 0.15, n %d)\n", mark(g3), th_15.sd,
            th_15.n);
    fprintf(o, "  %s bar difference |bias| at SNR >= 50: %.4f mm (goal <= 0.1, n %d)\n", mark(g4),
            fabs(bd_hi.mean), bd_hi.n);
    fprintf(o, "  %s bar difference SD at SNR >= 50: %.4f mm (goal <= 0.2)\n", mark(g5), bd_hi.sd);
    fprintf(o,
            "  %s measured at SNR >= 15, strips inside: thickness %d/%d, bars %d/%d, position "
            "model %d/%d\n",
            mark(g6), m_th, e_th, m_bd, e_bd, m_pm, e_pm);
    fprintf(o, "  %s strips leaving the insert reported with that reason: %d/%d\n", mark(g7),
            cls_reason[IN_OUTSIDE], cls_n[IN_OUTSIDE]);
    int gz = 1;
    for (int b = SB_15; b <= SB_N; b++)
        for (int i = 0; i < 2; i++) {
            stat s = zs[i][b];
            int ok = s.n > 1 && s.sd >= 0.7 && s.sd <= 1.3;
            gz &= ok;
            fprintf(o, "  %s uncertainty of %s at SNR %s: SD of z %.2f (goal 0.7..1.3, n %d)\n",
                    mark(ok), i == 0 ? "thickness" : "bar difference",
                    b < SB_N ? SB_NAME[b] : ">= 15", s.sd, s.n);
        }
    int all = g1 && g2 && g3 && g4 && g5 && g6 && g7 && gz;
    fprintf(o, "  overall: %s\n", all ? "all goals met" : "goals missed (see MISS above)");

    /* ---- the cases that need a look ---- */
    int shown = 0;
    for (int i = 0; i < nr; i++) {
        const brow *r = &rows[i];
        if (!OK_ALL(r) || r->snr_echo < 15 || r->inside != IN_INSIDE)
            continue;
        if (r->th_ok && r->pos_ok[0] && r->pos_ok[1] && r->pm_ok)
            continue;
        if (!shown++)
            fprintf(o, "\nUnmeasured at SNR >= 15 with the strips inside the insert:\n");
        if (shown > 25)
            continue;
        case_line(o, r);
        fprintf(o, "      thickness: %s; slice 1: %s; slice 11: %s\n",
                r->th_ok ? "measured" : r->th_reason, r->pos_ok[0] ? "measured" : r->pos_reason[0],
                r->pos_ok[1] ? "measured" : r->pos_reason[1]);
    }
    if (shown > 25)
        fprintf(o, "    ... %d more\n", shown - 25);
    shown = 0;
    for (int i = 0; i < nr; i++) {
        const brow *r = &rows[i];
        if (!OK_ALL(r) || r->snr_echo < 15 || r->inside != IN_OUTSIDE || r->th_ok ||
            strstr(r->th_reason, "end of the insert"))
            continue;
        if (!shown++)
            fprintf(o, "\nStrips leaving the insert reported with another reason:\n");
        if (shown > 10)
            continue;
        case_line(o, r);
        fprintf(o, "      thickness: %s\n", r->th_reason);
    }
    shown = 0;
    for (int i = 0; i < nr; i++) {
        const brow *r = &rows[i];
        double e, u;
        if (!OK_ALL(r) || r->snr_echo < 15 || r->inside != IN_OUTSIDE || !q_corr(r, 0, &e, &u))
            continue;
        if (!shown++)
            fprintf(o, "\nStrips leaving the insert, measured all the same:\n");
        if (shown > 10)
            continue;
        case_line(o, r);
        fprintf(o,
                "      corrected %.3f +- %.3f mm vs FWHM %.3f (error %+.3f); strips %.2f, %.2f mm "
                "vs %.2f, %.2f\n",
                r->corr, r->unc, r->t_fwhm, e, r->top_th / 0.1, r->bot_th / 0.1, r->t_len[0],
                r->t_len[1]);
    }
    shown = 0;
    for (int i = 0; i < nr; i++) {
        const brow *r = &rows[i];
        double e, u;
        if (!OK_ALL(r) || r->inside != IN_INSIDE || !q_corr(r, 0, &e, &u))
            continue;
        if (!(fabs(e) > 4 * u && fabs(e) > 0.1))
            continue;
        if (!shown++)
            fprintf(o, "\nThickness errors beyond 4 reported uncertainties and 0.1 mm:\n");
        if (shown > 15)
            continue;
        case_line(o, r);
        fprintf(o,
                "      corrected %.3f +- %.3f mm vs FWHM %.3f (error %+.3f); strips %.2f, %.2f mm "
                "vs %.2f, %.2f\n",
                r->corr, r->unc, r->t_fwhm, e, r->top_th / 0.1, r->bot_th / 0.1, r->t_len[0],
                r->t_len[1]);
    }
    if (shown > 15)
        fprintf(o, "    ... %d more\n", shown - 15);
    shown = 0;
    for (int i = 0; i < nr; i++) {
        const brow *r = &rows[i];
        for (int k = 0; k < 2; k++) {
            double e, u;
            if (!OK_ALL(r) || !q_diff(r, k, &e, &u))
                continue;
            if (!(fabs(e) > 4 * u && fabs(e) > 0.2))
                continue;
            if (!shown++)
                fprintf(o, "\nBar difference errors beyond 4 reported uncertainties and 0.2 mm:\n");
            if (shown > 15)
                continue;
            case_line(o, r);
            fprintf(o, "      slice %d: %.3f +- %.3f mm vs %.3f (error %+.3f)\n", k ? 11 : 1,
                    r->diff[k], r->diff_unc[k], r->t_diff[k], e);
        }
    }
    if (shown > 15)
        fprintf(o, "    ... %d more\n", shown - 15);

    if (csv && write_csv(csv, rows, nr) != 0) {
        fprintf(stderr, "bench_accuracy: %s: cannot write: %s\n", csv, strerror(errno));
        rc = 2;
    }
    if (n_fail)
        rc = 2;
out:
    free(cases);
    free(rows);
    free(tid);
    sim_cleanup();
    return rc;
}
