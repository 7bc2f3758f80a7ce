/* hints.c: the rules of docs/hints.md. Physics: a 2D slice's thickness is the excitation bandwidth
 * over gamma-bar times the slice-select gradient (T = BW / (gamma-bar G)), and a slice excited at
 * frequency offset f lies at z = f / (gamma-bar G). A gradient a fraction k weaker than nominal
 * therefore widens every slice by 1 / (1 - k) and moves every slice away from the gradient's centre
 * by the same factor (thickness and position scale off together); a bandwidth error changes the
 * thickness alone; a centre-frequency error df moves every slice by df / (gamma-bar G) (both wedge
 * slices the same way). A 3D acquisition's partition thickness is set by the partition encoding
 * (field of view over partitions), not by the RF pulse, which only selects the slab. */
#include "hints.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#define GAMMA_BAR_HZ_PER_UT 42.577478 /* proton gamma / 2 pi, CODATA 2018: Hz per microtesla */

const char *wd_hint_name(wd_hint_code c)
{
    switch (c) {
    case WD_HINT_GRADIENT_CALIBRATION: return "gradient-calibration";
    case WD_HINT_RF_BANDWIDTH: return "rf-bandwidth";
    case WD_HINT_COMMON_SHIFT: return "common-shift";
    case WD_HINT_GRADIENT_SCALING: return "gradient-scaling";
    case WD_HINT_PHANTOM_TILT: return "phantom-tilt";
    }
    return "unknown";
}

void wd_hint_settings_default(wd_hint_settings *s)
{
    memset(s, 0, sizeof *s);
    s->thickness_fraction = 0.05;
    s->scale_percent = 0.5;
    s->shift_mm = 1.0;
    s->tilt_deg = 2.0;
    s->k_sigma = 2.0;
}

void wd_hint_input_from_result(const an_series_result *r, int partition, wd_hint_input *in)
{
    memset(in, 0, sizeof *in);
    in->partition = partition;
    const an_thickness *t = &r->thickness;
    if (t->measured && isfinite(t->corrected_mm) && isfinite(t->nominal_mm) && t->nominal_mm > 0) {
        in->has_thickness = 1;
        in->thickness_mm = t->corrected_mm;
        in->thickness_unc_mm = isfinite(t->uncertainty_mm) ? t->uncertainty_mm : 0;
        in->thickness_ref_mm = t->nominal_mm;
    }
    const an_position_model *pm = &r->position_model;
    if (pm->measured && isfinite(pm->scale_percent)) {
        in->has_scale = 1;
        in->scale_percent = pm->scale_percent;
        in->scale_unc_percent = isfinite(pm->scale_unc_percent) ? pm->scale_unc_percent : 0;
    }
    if (pm->measured && isfinite(pm->offset_mm)) {
        in->has_offset = 1;
        in->offset_mm = pm->offset_mm;
        in->offset_unc_mm = isfinite(pm->offset_unc_mm) ? pm->offset_unc_mm : 0;
    }
    for (int k = 0; k < 2; k++) {
        const an_position *p = &r->position[k];
        if (!p->measured || !isfinite(p->displacement_mm))
            continue;
        in->has_shift[k] = 1;
        in->shift_slice[k] = p->slice;
        in->shift_mm[k] = p->displacement_mm;
        in->shift_unc_mm[k] = isfinite(p->uncertainty_mm) ? p->uncertainty_mm / 2 : 0;
    }
    if (t->measured && isfinite(t->tilt_deg)) {
        in->has_tilt = 1;
        in->tilt_deg = t->tilt_deg;
        in->tilt_unc_deg = isfinite(t->tilt_unc_deg) ? t->tilt_unc_deg : 0;
    }
}

/* Beyond a threshold and beyond k standard uncertainties. */
static int off(double v, double unc, double threshold, double k)
{
    return isfinite(v) && fabs(v) >= threshold && fabs(v) >= k * (isfinite(unc) ? unc : 0);
}

static int sign_of(double v)
{
    return v > 0 ? 1 : v < 0 ? -1 : 0;
}

/* The gradient the centre-frequency sentence uses: the configured one, else from the excitation
 * bandwidth and the reference thickness (G = BW / (gamma-bar T)), else 0 (unknown). */
static double gradient_of(const wd_hint_input *in, const wd_hint_settings *s)
{
    if (s->gradient_mt_per_m > 0)
        return s->gradient_mt_per_m;
    if (s->rf_bandwidth_hz > 0 && in->has_thickness && in->thickness_ref_mm > 0)
        return s->rf_bandwidth_hz / (GAMMA_BAR_HZ_PER_UT * in->thickness_ref_mm);
    return 0;
}

typedef struct out_list {
    wd_hint *v;
    int n, max;
} out_list;

static wd_hint *add(out_list *o, wd_hint_code c)
{
    if (o->n >= o->max)
        return NULL;
    wd_hint *h = &o->v[o->n++];
    memset(h, 0, sizeof *h);
    h->code = c;
    return h;
}

/* "Since the baseline, the slice thickness ..." or "The slice thickness ...". */
static void lead_in(const wd_hint_input *in, const char *subject, char *buf, size_t n)
{
    if (in->since_baseline)
        snprintf(buf, n, "Since the baseline, the %s", subject);
    else
        snprintf(buf, n, "The %s", subject);
}

int wd_hints(const wd_hint_input *in, const wd_hint_settings *s, wd_hint *out, int max)
{
    out_list o = {.v = out, .n = 0, .max = max};
    const double k = s->k_sigma;
    const char *what = in->partition ? "partition thickness" : "slice thickness";
    const char *changed = in->since_baseline ? "changed by" : "is off by";
    char lead[96];

    /* Thickness against its reference, in per cent. */
    int t_off = 0;
    double e_t = NAN;
    if (in->has_thickness && in->thickness_ref_mm > 0) {
        e_t = in->thickness_mm / in->thickness_ref_mm - 1;
        double dt = in->since_baseline ? in->thickness_mm : in->thickness_mm - in->thickness_ref_mm;
        if (in->since_baseline) /* the value is a change; the ratio is to the baseline's level */
            e_t = in->thickness_mm / in->thickness_ref_mm;
        /* A drift alarm has already judged the change significant: against the baseline's
         * spread it counts, whatever its size; a single result must also pass the threshold. */
        t_off = in->since_baseline
                    ? fabs(dt) > 0 && fabs(dt) >= k * in->thickness_unc_mm
                    : fabs(e_t) >= s->thickness_fraction && fabs(dt) >= k * in->thickness_unc_mm;
    }
    int s_off = in->has_scale && off(in->scale_percent, in->scale_unc_percent, s->scale_percent, k);
    int s_normal = in->has_scale && !s_off && !(sign_of(in->scale_percent) == sign_of(e_t) &&
                                                 fabs(in->scale_percent) >= 0.5 * s->scale_percent);
    int gradient_given = 0;

    /* 1. Thickness and position scale off together, in the same sense. A 3D partition thickness
     *    follows the partition-encoding gradient whatever the scale says. */
    if (t_off && (in->partition || (s_off && sign_of(e_t) == sign_of(in->scale_percent)))) {
        wd_hint *h = add(&o, WD_HINT_GRADIENT_CALIBRATION);
        if (h) {
            double g = (1 / (1 + e_t) - 1) * 100; /* G / G0 - 1, per cent */
            lead_in(in, what, lead, sizeof lead);
            if (in->partition)
                snprintf(h->text, sizeof h->text,
                         "%s %s %+.1f %% (%.2f mm against %.2f mm). A 3D acquisition's partition "
                         "thickness is set by the partition encoding, not by the RF pulse, which "
                         "only selects the slab: this points to the calibration of the gradient "
                         "along the partition direction (about %.1f %% %s than nominal would give "
                         "it), or to a partition count or slab prescribed differently. A hint to "
                         "check, not a diagnosis.",
                         lead, changed, e_t * 100,
                         in->since_baseline ? in->thickness_ref_mm * (1 + e_t)
                                            : in->thickness_mm,
                         in->thickness_ref_mm, fabs(g), g < 0 ? "weaker" : "stronger");
            else
                snprintf(h->text, sizeof h->text,
                         "%s %s %+.1f %% and the position scale by %+.2f \u00b1 %.2f %%, in the "
                         "same sense: consistent with a slice-select gradient calibration error "
                         "(a gradient about %.1f %% %s than nominal widens or narrows every slice "
                         "and moves every slice from the centre by the same factor). Slices "
                         "planned on a localizer made with the same gradient hide part of a scale "
                         "error, so the scale seen may understate it. A hint to check the "
                         "gradient calibration, not a diagnosis.",
                         lead, changed, e_t * 100, in->scale_percent, in->scale_unc_percent,
                         fabs(g), g < 0 ? "weaker" : "stronger");
            snprintf(h->brief, sizeof h->brief, "gradient calibration? %s %+.1f %%%s", what,
                     e_t * 100, in->partition ? "" : ", position scale same sense");
            if (!in->partition) {
                size_t len = strlen(h->brief);
                snprintf(h->brief + len, sizeof h->brief - len, " %+.2f %%", in->scale_percent);
            }
            gradient_given = 1;
        }
    }
    /* 2. Thickness off, position scale normal: the RF pulse rather than the gradient. */
    else if (t_off && s_normal && !in->partition) {
        wd_hint *h = add(&o, WD_HINT_RF_BANDWIDTH);
        if (h) {
            lead_in(in, what, lead, sizeof lead);
            snprintf(h->text, sizeof h->text,
                     "%s %s %+.1f %% while the position scale is normal (%+.2f \u00b1 %.2f %%): "
                     "the slice-select gradient, which would move both, looks right, and this "
                     "points rather to the RF pulse: its transmit bandwidth (about %.1f %% %s "
                     "than nominal would explain it), its shape or duration, or the flip angle "
                     "and the refocusing pulses that shape the profile. A hint to check, not a "
                     "diagnosis.",
                     lead, changed, e_t * 100, in->scale_percent, in->scale_unc_percent,
                     fabs(e_t) * 100, e_t > 0 ? "wider" : "narrower");
            snprintf(h->brief, sizeof h->brief,
                     "RF pulse or transmit bandwidth? %s %+.1f %%, position scale normal", what,
                     e_t * 100);
        }
    }

    /* Both wedge slices. */
    if (in->has_shift[0] && in->has_shift[1]) {
        double d0 = in->shift_mm[0], d1 = in->shift_mm[1];
        int sig0 = off(d0, in->shift_unc_mm[0], 0, k) && fabs(d0) > 0;
        int sig1 = off(d1, in->shift_unc_mm[1], 0, k) && fabs(d1) > 0;
        /* 3. The same way, both beyond the threshold: the whole stack moved. */
        if (sig0 && sig1 && sign_of(d0) == sign_of(d1) && fabs(d0) >= s->shift_mm &&
            fabs(d1) >= s->shift_mm) {
            wd_hint *h = add(&o, WD_HINT_COMMON_SHIFT);
            if (h) {
                double shift = in->has_offset ? in->offset_mm : (d0 + d1) / 2;
                double g = gradient_of(in, s);
                char df[200];
                if (g > 0)
                    snprintf(df, sizeof df, "%+.0f Hz at a slice-select gradient of %.2f mT/m",
                             GAMMA_BAR_HZ_PER_UT * g * shift, g);
                else
                    snprintf(df, sizeof df,
                             "%+.0f Hz per mT/m of slice-select gradient (%+.0f Hz at 10 mT/m; "
                             "set [hints] gradient_mT_per_m or rf_bandwidth_hz for the figure of "
                             "this protocol)",
                             GAMMA_BAR_HZ_PER_UT * shift, GAMMA_BAR_HZ_PER_UT * 10 * shift);
                snprintf(h->text, sizeof h->text,
                         "%sboth wedge slices are displaced the same way (slice %d %+.2f mm, "
                         "slice %d %+.2f mm toward the last slice): the whole stack sits %+.2f mm "
                         "off, consistent with a landmark or table-position error or a centre "
                         "frequency error rather than the gradient. A centre-frequency error of "
                         "df = gamma-bar x G x shift would explain it: %s (its sign depends on "
                         "the gradient's polarity). A hint to check, not a diagnosis.",
                         in->since_baseline ? "Since the baseline, " : "", in->shift_slice[0], d0,
                         in->shift_slice[1], d1, shift, df);
                if (!in->since_baseline && h->text[0] >= 'a' && h->text[0] <= 'z')
                    h->text[0] = (char)(h->text[0] - 'a' + 'A');
                snprintf(h->brief, sizeof h->brief,
                         "landmark, table or centre frequency? both wedge slices %+.2f mm", shift);
            }
        }
        /* 4. In opposite senses: the positions stretched or compressed about the centre. */
        else if (sig0 && sig1 && sign_of(d0) != sign_of(d1) && !gradient_given &&
                 (s_off || (fabs(d0) >= s->shift_mm && fabs(d1) >= s->shift_mm))) {
            wd_hint *h = add(&o, WD_HINT_GRADIENT_SCALING);
            if (h) {
                char scale[96] = "";
                double g = NAN;
                if (in->has_scale) {
                    g = (1 / (1 + in->scale_percent / 100) - 1) * 100;
                    snprintf(scale, sizeof scale, "; position scale %+.2f \u00b1 %.2f %%",
                             in->scale_percent, in->scale_unc_percent);
                }
                char grad[96] = "";
                if (isfinite(g))
                    snprintf(grad, sizeof grad, " (a slice-select gradient about %.2f %% %s than "
                                                "nominal)",
                             fabs(g), g < 0 ? "weaker" : "stronger");
                snprintf(h->text, sizeof h->text,
                         "%sthe wedge slices are displaced in opposite senses (slice %d %+.2f mm, "
                         "slice %d %+.2f mm%s): the slice positions are stretched or compressed "
                         "about the centre, consistent with gradient scaling%s. The thickness "
                         "%s. A hint to check, not a diagnosis.",
                         in->since_baseline ? "Since the baseline, " : "", in->shift_slice[0], d0,
                         in->shift_slice[1], d1, scale, grad,
                         t_off ? "is off too, in the other sense: check both the gradient and "
                                 "the RF pulse"
                               : "looks right, so the excitation bandwidth may be compensating "
                                 "or the scale error is small for the thickness to show");
                if (!in->since_baseline && h->text[0] >= 'a' && h->text[0] <= 'z')
                    h->text[0] = (char)(h->text[0] - 'a' + 'A');
                snprintf(h->brief, sizeof h->brief,
                         "gradient scaling? wedge slices %+.2f and %+.2f mm, opposite senses", d0,
                         d1);
            }
        }
    }

    /* 5. A large tilt read from the ramps (always the latest value, never a change). */
    if (in->has_tilt && off(in->tilt_deg, in->tilt_unc_deg, s->tilt_deg, k)) {
        wd_hint *h = add(&o, WD_HINT_PHANTOM_TILT);
        if (h) {
            snprintf(h->text, sizeof h->text,
                     "The ramps read a tilt of %+.1f \u00b1 %.2f degrees: the phantom is probably "
                     "not level. The tilt-corrected thickness removes most of a tilt's effect, but "
                     "re-position the phantom and repeat the series before acting on this result.",
                     in->tilt_deg, in->tilt_unc_deg);
            snprintf(h->brief, sizeof h->brief,
                     "phantom not level? ramp tilt %+.1f deg: re-position and repeat", in->tilt_deg);
        }
    }
    return o.n;
}
