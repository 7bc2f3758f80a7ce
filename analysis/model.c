/* model.c: the phantom model's consistency check, the default tolerance set and method parameters,
 * and the closed-form thickness formulas (the model file itself: model_file.c). */
#include <math.h>
#include <string.h>

#include "analysis.h"

sw_status an_model_check(const an_model *m, sw_error *err)
{
#define NEED(cond, what)                                                                           \
    do {                                                                                           \
        if (!(cond))                                                                               \
            return sw_error_set(err, SW_EINVAL, "phantom model %s: %s", m->name, what);            \
    } while (0)
    NEED(m->radius_mm > 0 && isfinite(m->radius_mm), "radius must be positive");
    NEED(m->n_slices >= 1 && m->n_slices <= AN_MAX_IMAGES, "slice count out of range");
    NEED(m->slice_gap_mm > 0, "slice gap must be positive");
    NEED(m->nominal_thickness_mm > 0, "nominal thickness must be positive");
    NEED(m->insert_u_min < m->insert_u_max && m->insert_v_min < m->insert_v_max,
         "thickness insert extent is empty");
    NEED(m->n_ramps >= 0 && m->n_ramps <= 2, "ramp count must be 0, 1 or 2");
    NEED(m->method != AN_METHOD_CROSSED_RAMPS || m->n_ramps == 2, "crossed ramps need two ramps");
    NEED(m->method != AN_METHOD_SINGLE_RAMP || m->n_ramps == 1,
         "a single-ramp phantom needs one ramp");
    for (int i = 0; i < m->n_ramps; i++) {
        NEED(m->ramp[i].v_min < m->ramp[i].v_max, "ramp extent is empty");
        NEED(m->ramp[i].slope != 0 && isfinite(m->ramp[i].slope), "ramp slope must be non-zero");
    }
    NEED(m->method != AN_METHOD_SINGLE_WEDGE || m->wedge_slope > 0, "wedge slope must be positive");
    NEED(m->ramp_slice >= 1 && m->ramp_slice <= m->n_slices, "ramp slice out of range");
    if (m->has_wedges) {
        NEED(m->wedge_slice[0] >= 1 && m->wedge_slice[0] <= m->n_slices && m->wedge_slice[1] >= 1 &&
                 m->wedge_slice[1] <= m->n_slices && m->wedge_slice[0] != m->wedge_slice[1],
             "wedge slices out of range");
        NEED(m->bar_len0_mm > 0, "bar length must be positive");
        NEED(m->bar_face_slope > 0 && isfinite(m->bar_face_slope),
             "bar end faces need a positive slope");
        /* the vertices lie on their slices of the standard series (slice k at w = (k - ramp
         * slice) gap), or the series' wedge slices would miss the bars */
        for (int i = 0; i < 2; i++)
            NEED(fabs(m->wedge_w[i] - (m->wedge_slice[i] - m->ramp_slice) * m->slice_gap_mm) <=
                     0.25 * m->slice_gap_mm,
                 "a wedge vertex (w_first_mm, w_last_mm) is not on its slice (slice_first, "
                 "slice_last, at (slice - ramp_slice) x slice_gap_mm)");
        for (int i = 0; i < 2; i++)
            NEED(m->bar_u_min[i] < m->bar_u_max[i], "bar extent is empty");
    }
    if (m->n_ramps > 0)
        NEED(hypot(fmax(fabs(m->insert_u_min), fabs(m->insert_u_max)),
                   fmax(fabs(m->insert_v_min), fabs(m->insert_v_max))) < m->radius_mm,
             "the thickness insert reaches outside the fluid cylinder");
#undef NEED
    return SW_OK;
}

void an_tolerance_default(an_tolerance *t)
{
    memset(t, 0, sizeof *t);
    sw_strlcpy(t->name, "acr-large-default", sizeof t->name);
    t->thickness_relative = 0;
    t->thickness_fail = 0.7;
    t->thickness_warn = 0.5;
    t->bar_difference_fail = 5.0;
    t->bar_difference_warn = 4.0;
    t->min_snr = 5.0;
}

void an_params_default(an_params *p)
{
    memset(p, 0, sizeof *p);
    /* The Rician-consistent half level: half of the plateau above the true zero, taken in signal
     * space and mapped back through the magnitude's mean. It equals the ACR convention (plateau /
     * 2) at high SNR and removes the magnitude bias of the half-level crossing at low strip SNR
     * (docs/methods.md, "Half level"); without a noise estimate it falls back to plateau / 2. */
    p->half_level = AN_HALF_FLOOR_MODEL;
    p->slot_correction = 0;
    p->sample_step_mm = 0.1;
}

const char *an_verdict_name(an_verdict v)
{
    switch (v) {
    case AN_PASS: return "pass";
    case AN_WARN: return "warn";
    case AN_FAIL: return "fail";
    case AN_UNMEASURABLE: return "unmeasurable";
    }
    return "unmeasurable";
}

/* For two ramps at angle theta to the slice, each gives T = L tan(theta); the ACR guidance combines
 * them as 2 tan(theta) a b / (a + b), which is 0.2 a b / (a + b) for 10:1 ramps. */
double an_acr_thickness(double a_mm, double b_mm, double tan_theta)
{
    if (!(a_mm > 0) || !(b_mm > 0))
        return NAN;
    return 2.0 * tan_theta * a_mm * b_mm / (a_mm + b_mm);
}

/* Two ramps whose angles to the slice add to phi, tilted by an unknown angle: with T = a tan(t1)
 * and T = b tan(phi - t1), eliminating t1 gives T^2 tan(phi) + T (a + b) - a b tan(phi) = 0. */
double an_corrected_thickness(double a_mm, double b_mm, double tan_phi)
{
    if (!(a_mm > 0) || !(b_mm > 0) || !(tan_phi > 0))
        return NAN;
    if (isinf(tan_phi))
        return sqrt(a_mm * b_mm);
    double s = a_mm + b_mm;
    return (-s + sqrt(s * s + 4.0 * a_mm * b_mm * tan_phi * tan_phi)) / (2.0 * tan_phi);
}

double an_tilt_deg(double t_mm, double a_mm, double tan_theta)
{
    if (!(a_mm > 0) || !isfinite(t_mm))
        return NAN;
    return (atan(t_mm / a_mm) - atan(tan_theta)) * 180.0 / M_PI;
}

/* Outermost crossings: the first and last samples at or above the level on each side of the peak,
 * each interpolated linearly with its outer neighbour below the level. */
int an_width_at_level(const float *v, int n, int peak, double level, double *lo, double *hi)
{
    if (!v || n < 3 || peak <= 0 || peak >= n - 1 || !(v[peak] >= level))
        return -1;
    int a = peak, b = peak;
    for (int i = 0; i < peak; i++)
        if (v[i] >= level) {
            a = i;
            break;
        }
    for (int i = n - 1; i > peak; i--)
        if (v[i] >= level) {
            b = i;
            break;
        }
    if (a == 0 || b == n - 1)
        return -1;
    *lo = (a - 1) + (level - v[a - 1]) / ((double)v[a] - v[a - 1]);
    *hi = b + (v[b] - level) / ((double)v[b] - v[b + 1]);
    return 0;
}
