/* test_sim.c: simulated series (sim/, a forward model with its own truth) analysed end to end at
 * SNR 50: rotation, tilt about both axes, off-centre, shuffled files, every stored orientation and
 * feet first, two echoes, a position error model; and the reported uncertainty against the scatter
 * over noise realisations. Tolerances are the accuracy goals of the analysis (thickness 0.05 mm,
 * bar length difference 0.1 mm) plus three reported standard uncertainties, so a single noisy case
 * can pass only when the uncertainty is honest too (checked separately below). */
#include <criterion/criterion.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "analysis.h"
#include "sim.h"

typedef struct run_out {
    an_series_result r[SIM_MAX_ECHOES];
    sim_truth truth;
    int slice[SIM_MAX_IMAGES];
    int n_echo_images[SIM_MAX_ECHOES];
} run_out;

static sim_params base(void)
{
    sim_params p;
    sim_params_default(&p);
    p.snr = 50;
    p.shuffle = 1;
    p.seed = 11;
    return p;
}

/* Renders, splits by echo, analyses each echo; out->slice[i] is the true ordinal of echo 1's image
 * i. */
static void render_and_analyse(const sim_params *p, run_out *o)
{
    sim_series *s = NULL;
    sw_error e = {0};
    cr_assert_eq(sim_series_render(p, &s, &e), SW_OK, "%s", e.msg);
    o->truth = s->truth;
    an_model m;
    an_model_large(&m);
    an_tolerance t;
    an_tolerance_default(&t);
    an_params pa;
    an_params_default(&pa);
    for (int ec = 1; ec <= s->truth.n_echoes; ec++) {
        an_image v[AN_MAX_IMAGES];
        int n = 0;
        for (int i = 0; i < s->n_images; i++)
            if (s->echo[i] == ec) {
                if (ec == 1)
                    o->slice[n] = s->slice[i];
                sim_image_view(s, i, &v[n++]);
            }
        o->n_echo_images[ec - 1] = n;
        cr_assert_eq(an_analyze_series(v, n, &m, &t, &pa, &o->r[ec - 1], &e), SW_OK, "%s", e.msg);
    }
    sim_series_free(s);
}

static void check_truth(const run_out *o, int echo, const sim_params *p, const char *what)
{
    const an_series_result *r = &o->r[echo];
    const sim_truth *tr = &o->truth;
    for (int i = 0; i < o->n_echo_images[0] && echo == 0; i++)
        cr_assert_eq(r->ordinal[i], o->slice[i], "%s: image %d ordinal %d, truth %d", what, i,
                     r->ordinal[i], o->slice[i]);
    const an_thickness *t = &r->thickness;
    cr_assert(t->measured, "%s: %s", what, t->reason);
    double T = tr->thickness_mm[echo];
    cr_assert(fabs(t->corrected_mm - T) < 0.05 + 3 * t->uncertainty_mm,
              "%s: T %.4f +- %.4f, truth %.4f", what, t->corrected_mm, t->uncertainty_mm, T);
    /* strip lengths against the simulator's expected ramp lengths */
    cr_assert(fabs(t->top.length_mm - tr->ramp[echo].length_mm[0]) < 0.5 + 3 * t->top.length_unc_mm,
              "%s: top %.3f truth %.3f", what, t->top.length_mm, tr->ramp[echo].length_mm[0]);
    cr_assert(fabs(t->bottom.length_mm - tr->ramp[echo].length_mm[1]) <
                  0.5 + 3 * t->bottom.length_unc_mm,
              "%s: bottom %.3f truth %.3f", what, t->bottom.length_mm, tr->ramp[echo].length_mm[1]);
    /* tilt about v, with phantom-large.md's sign (positive: top strip longer) */
    cr_assert(fabs(t->tilt_deg - p->pose.tilt_v_deg) < 0.15 + 3 * t->tilt_unc_deg,
              "%s: tilt %.3f +- %.3f, pose %.3f", what, t->tilt_deg, t->tilt_unc_deg,
              p->pose.tilt_v_deg);
    cr_assert(fabs(r->rotation_deg - p->pose.rot_deg) < 0.1, "%s: rotation %.3f, pose %.3f", what,
              r->rotation_deg, p->pose.rot_deg);
    for (int k = 0; k < 2; k++) {
        const an_position *q = &r->position[k];
        cr_assert(q->measured, "%s: %s", what, q->reason);
        cr_assert_eq(q->slice, tr->wedge[k].ordinal);
        cr_assert(fabs(q->bar_difference_mm - tr->wedge[k].difference_mm) <
                      0.1 + 3 * q->uncertainty_mm,
                  "%s: BLD slice %d %.3f +- %.3f, truth %.3f", what, q->slice, q->bar_difference_mm,
                  q->uncertainty_mm, tr->wedge[k].difference_mm);
    }
    /* the ramps see the displacement at the axis of slice 1 */
    const an_position *q = &r->position[0];
    int k1 = tr->ramp_ordinal - 1;
    cr_assert(fabs(q->ramp_displacement_mm - tr->displacement_mm[k1]) <
                  0.05 + 3 * q->ramp_displacement_unc_mm +
                      0.02 * fabs(p->pose.tilt_v_deg * p->pose.tilt_u_deg),
              "%s: ramp d %.3f +- %.3f, truth %.3f", what, q->ramp_displacement_mm,
              q->ramp_displacement_unc_mm, tr->displacement_mm[k1]);
    if (r->pitch_measured)
        cr_assert(fabs(r->pitch_deg - p->pose.tilt_u_deg) < 0.15 + 3 * r->pitch_unc_deg,
                  "%s: pitch %.3f +- %.3f, pose %.3f", what, r->pitch_deg, r->pitch_unc_deg,
                  p->pose.tilt_u_deg);
    /* SNR: the simulator's is for the first echo; later echoes scale with their fluid signal */
    double snr = tr->snr * tr->fluid_signal[echo] / tr->fluid_signal[0];
    cr_assert(fabs(r->snr / snr - 1) < 0.1, "%s: SNR %.1f, truth %.1f", what, r->snr, snr);
}

Test(sim, standard)
{
    sim_params p = base();
    run_out *o = malloc(sizeof *o);
    render_and_analyse(&p, o);
    check_truth(o, 0, &p, "standard");
    cr_assert_eq(o->r[0].verdict, AN_PASS);
    free(o);
}

Test(sim, rotated_off_centre)
{
    sim_params p = base();
    p.pose.rot_deg = 4.0;
    p.pose.du_mm = 15;
    p.pose.dv_mm = -12;
    p.position_offset_mm = 1.5;
    run_out *o = malloc(sizeof *o);
    render_and_analyse(&p, o);
    check_truth(o, 0, &p, "rotated, off-centre");
    free(o);
}

Test(sim, tilted_both_axes)
{
    sim_params p = base();
    p.pose.tilt_v_deg = 2.0;
    p.pose.tilt_u_deg = -1.5;
    p.pose.rot_deg = -3.0;
    p.position_offset_mm = -0.8;
    run_out *o = malloc(sizeof *o);
    render_and_analyse(&p, o);
    check_truth(o, 0, &p, "tilted");
    cr_assert(o->r[0].pitch_measured);
    /* the tilt moves the strips: the uncorrected ACR form is lower than the corrected one */
    cr_assert(o->r[0].thickness.acr_mm < o->r[0].thickness.corrected_mm);
    free(o);
}

Test(sim, pitch_sign)
{
    sim_params p = base();
    p.pose.tilt_u_deg = 2.0;
    run_out *o = malloc(sizeof *o);
    render_and_analyse(&p, o);
    check_truth(o, 0, &p, "pitch +2");
    cr_assert(o->r[0].pitch_measured && o->r[0].pitch_deg > 1.0, "pitch %f", o->r[0].pitch_deg);
    free(o);
}

Test(sim, orientations)
{
    sim_orientation kinds[4] = {SIM_ORIENT_FLIP_ROWS, SIM_ORIENT_FLIP_COLUMNS,
                                SIM_ORIENT_TRANSPOSED, SIM_ORIENT_FEET_FIRST};
    const char *names[4] = {"rows flipped", "columns flipped", "transposed", "feet first"};
    for (int k = 0; k < 4; k++) {
        sim_params p = base();
        p.orientation = kinds[k];
        p.pose.rot_deg = 2.5;
        p.position_offset_mm = 1.0;
        p.pose.tilt_v_deg = -1.0;
        p.reverse_instances = k % 2;
        run_out *o = malloc(sizeof *o);
        render_and_analyse(&p, o);
        check_truth(o, 0, &p, names[k]);
        free(o);
    }
}

Test(sim, double_echo)
{
    sim_params p = base();
    p.kind = SIM_SERIES_T2;
    p.position_offset_mm = 0.7;
    run_out *o = malloc(sizeof *o);
    render_and_analyse(&p, o);
    cr_assert_eq(o->truth.n_echoes, 2);
    cr_assert_eq(o->n_echo_images[0], 11);
    cr_assert_eq(o->n_echo_images[1], 11);
    check_truth(o, 0, &p, "echo 1");
    check_truth(o, 1, &p, "echo 2");
    free(o);
}

/* e(z) = offset + scale z: the simulator's position error model, recovered from the two wedge
 * slices (z from ImagePositionPatient along the normal toward slice 11). */
Test(sim, position_model)
{
    sim_params p = base();
    p.position_offset_mm = 1.0;
    p.position_scale = 0.01;
    run_out *o = malloc(sizeof *o);
    render_and_analyse(&p, o);
    const an_position_model *pm = &o->r[0].position_model;
    cr_assert(pm->measured);
    cr_assert(fabs(pm->scale_percent - 1.0) < 0.01 + 3 * pm->scale_unc_percent,
              "scale %.4f +- %.4f", pm->scale_percent, pm->scale_unc_percent);
    cr_assert(fabs(pm->offset_mm - 1.0) < 0.05 + 3 * pm->offset_unc_mm, "offset %.4f +- %.4f",
              pm->offset_mm, pm->offset_unc_mm);
    free(o);
}

/* The reported uncertainty against the observed SD over 20 noise realisations of one case: within
 * 30 % (the goal of the uncertainty propagation). 20 samples give the SD itself to about 16 %. */
Test(sim, uncertainty_matches_scatter, .timeout = 240)
{
    enum { N = 20 };
    double T[N], uT[N], B[N], uB[N];
    for (int k = 0; k < N; k++) {
        sim_params p = base();
        p.seed = 1000 + k;
        p.oversample = 2;
        p.shuffle = 0;
        p.position_offset_mm = 0.5;
        run_out *o = malloc(sizeof *o);
        render_and_analyse(&p, o);
        cr_assert(o->r[0].thickness.measured && o->r[0].position[0].measured);
        T[k] = o->r[0].thickness.corrected_mm;
        uT[k] = o->r[0].thickness.uncertainty_mm;
        B[k] = o->r[0].position[0].bar_difference_mm;
        uB[k] = o->r[0].position[0].uncertainty_mm;
        free(o);
    }
    double mT = 0, mB = 0, vT = 0, vB = 0, muT = 0, muB = 0;
    for (int k = 0; k < N; k++) {
        mT += T[k] / N;
        mB += B[k] / N;
        muT += uT[k] / N;
        muB += uB[k] / N;
    }
    for (int k = 0; k < N; k++) {
        vT += (T[k] - mT) * (T[k] - mT) / (N - 1);
        vB += (B[k] - mB) * (B[k] - mB) / (N - 1);
    }
    double rT = muT / sqrt(vT), rB = muB / sqrt(vB);
    cr_assert(rT > 0.7 && rT < 1.3, "thickness: reported %.4f, observed SD %.4f", muT, sqrt(vT));
    cr_assert(rB > 0.7 && rB < 1.3, "bar length difference: reported %.4f, observed SD %.4f", muB,
              sqrt(vB));
    /* and the accuracy goals at SNR 50 on the mean (thickness SD <= 0.05 mm, BLD SD <= 0.2 mm) */
    cr_assert(sqrt(vT) <= 0.05 * 1.3, "thickness SD %.4f", sqrt(vT));
    cr_assert(sqrt(vB) <= 0.2, "BLD SD %.4f", sqrt(vB));
}

/* The slot's widening: a 1 mm slot blurs a Gaussian slice profile of 5 mm FWHM by about +0.05 mm
 * (variances add: sigma^2 + s^2 / 12, phantom-large.md); the local correction (slot_correction)
 * must bring the measurement nearer the profile's own FWHM, and must leave a rectangle (whose
 * trapezoidal strip edges have no curvature at the half level) alone. Noise-free renders. */
Test(sim, slot_correction)
{
    sim_profile_kind kinds[2] = {SIM_PROFILE_GAUSS, SIM_PROFILE_RECT};
    for (int k = 0; k < 2; k++) {
        sim_params p = base();
        p.snr = 0;
        p.profile.kind = kinds[k];
        sim_series *s = NULL;
        sw_error e = {0};
        cr_assert_eq(sim_series_render(&p, &s, &e), SW_OK, "%s", e.msg);
        an_image v[AN_MAX_IMAGES];
        int n = 0;
        for (int i = 0; i < s->n_images; i++)
            if (s->echo[i] == 1)
                sim_image_view(s, i, &v[n++]);
        an_model m;
        an_model_large(&m);
        an_tolerance t;
        an_tolerance_default(&t);
        an_params pa;
        an_params_default(&pa);
        cr_assert_eq(pa.slot_correction, 0); /* off by default */
        an_series_result *r = malloc(sizeof *r);
        cr_assert_eq(an_analyze_series(v, n, &m, &t, &pa, r, &e), SW_OK);
        double plain = r->thickness.corrected_mm;
        pa.slot_correction = 1;
        cr_assert_eq(an_analyze_series(v, n, &m, &t, &pa, r, &e), SW_OK);
        double corr = r->thickness.corrected_mm, truth = s->truth.thickness_mm[0];
        if (k == 0) {
            cr_assert(plain - truth > 0.03, "Gaussian: the slot should widen (%.4f vs %.4f)", plain,
                      truth);
            cr_assert(fabs(corr - truth) < 0.6 * fabs(plain - truth),
                      "Gaussian: corrected %.4f, plain %.4f, truth %.4f", corr, plain, truth);
        } else {
            cr_assert(fabs(corr - plain) < 0.01, "rectangle: corrected %.4f, plain %.4f", corr,
                      plain);
        }
        free(r);
        sim_series_free(s);
    }
}

/* Weak strips: a strip carries slot / thickness of the fluid signal (phantom-large.md, SNR), so at
 * SNR 10 a 7 mm rectangular profile gives strips of SNR 10 / 7 = 1.4, whose half level lies in the
 * magnitude's noise floor. They lie well inside the insert (d = 0: crossings 35 mm from the
 * middle, 35 mm from the ends), so the reason must be their signal, not the insert's end; the bars
 * (full contrast) are still measured. At SNR 50 and 5 mm the strip SNR is 50 / 5 = 10, which
 * an_strip.snr must report within 10 % (it is the plateau through the Rician model). */
Test(sim, weak_strips_reason)
{
    sim_params p = base();
    p.profile.kind = SIM_PROFILE_RECT;
    p.profile.thickness_mm = 7;
    p.snr = 10;
    p.seed = 23;
    run_out *o = malloc(sizeof *o);
    render_and_analyse(&p, o);
    const an_thickness *t = &o->r[0].thickness;
    cr_assert(!t->measured);
    cr_assert(strstr(t->reason, "strip signal too low for its noise"), "%s", t->reason);
    cr_assert(!strstr(t->reason, "end of the insert"), "%s", t->reason);
    const an_strip *st[2] = {&t->top, &t->bottom};
    for (int k = 0; k < 2; k++)
        if (!st[k]->measured)
            cr_assert(st[k]->snr > 0.7 && st[k]->snr < 2.3, "strip %d SNR %.2f (truth 1.43)", k,
                      st[k]->snr);
    for (int k = 0; k < 2; k++)
        cr_assert(o->r[0].position[k].measured, "%s", o->r[0].position[k].reason);
    free(o);

    p = base();
    p.profile.kind = SIM_PROFILE_RECT;
    p.profile.thickness_mm = 5;
    o = malloc(sizeof *o);
    render_and_analyse(&p, o);
    t = &o->r[0].thickness;
    cr_assert(t->measured, "%s", t->reason);
    st[0] = &t->top;
    st[1] = &t->bottom;
    for (int k = 0; k < 2; k++)
        cr_assert(fabs(st[k]->snr / 10.0 - 1) < 0.1, "strip %d SNR %.2f (truth 10)", k, st[k]->snr);
    free(o);
}

/* The ramp insert missing: slice 1's insert region (and 5 mm around it) is replaced by the same
 * pixels of slice 6, a plain fluid disc at the same in-plane pose, so slice 1 shows the wedges
 * only. The wedges must still be measured against the simulator's truth (bar length differences
 * from the geometry, position model), slices counted from the inferior wedge slice (head first);
 * the thickness is unmeasurable for want of a ramp slice. */
Test(sim, ramp_insert_missing)
{
    sim_params p = base();
    p.pose.rot_deg = 3.5;
    p.pose.du_mm = -8;
    p.pose.dv_mm = 6;
    p.position_offset_mm = -1.1;
    p.position_scale = 0.006;
    p.shuffle = 0;
    sim_series *s = NULL;
    sw_error e = {0};
    cr_assert_eq(sim_series_render(&p, &s, &e), SW_OK, "%s", e.msg);
    int i1 = -1, i6 = -1;
    for (int i = 0; i < s->n_images; i++) {
        if (s->slice[i] == 1)
            i1 = i;
        if (s->slice[i] == 6)
            i6 = i;
    }
    cr_assert(i1 >= 0 && i6 >= 0);
    /* display frame of the simulator (docs/simulator.md): column j at x = -h + j D, row i at
     * y = h - i D, h = (N - 1) D / 2; the phantom point (u, v) at (du, dv) + Rz(rot) (u, v) */
    dcm_image *im1 = &s->images[i1];
    const dcm_image *im6 = &s->images[i6];
    int N = im1->columns;
    double D = im1->pixel_spacing[0], h = 0.5 * (N - 1) * D, a = p.pose.rot_deg * M_PI / 180;
    int blanked = 0;
    for (int i = 0; i < N; i++)
        for (int j = 0; j < N; j++) {
            double x = -h + j * D - p.pose.du_mm, y = h - i * D - p.pose.dv_mm;
            double u = cos(a) * x + sin(a) * y, v = -sin(a) * x + cos(a) * y;
            if (fabs(u) <= 75 && fabs(v) <= 15) {
                im1->pixels[(size_t)i * N + j] = im6->pixels[(size_t)i * N + j];
                blanked++;
            }
        }
    cr_assert_gt(blanked, 4000); /* 150 x 30 mm at 0.95 mm^2 a pixel */
    an_image v[AN_MAX_IMAGES];
    int n = 0, truth_slice[AN_MAX_IMAGES];
    for (int i = 0; i < s->n_images; i++) {
        truth_slice[n] = s->slice[i];
        sim_image_view(s, i, &v[n++]);
    }
    an_model m;
    an_model_large(&m);
    an_tolerance t;
    an_tolerance_default(&t);
    an_params pa;
    an_params_default(&pa);
    an_series_result *r = malloc(sizeof *r);
    cr_assert_eq(an_analyze_series(v, n, &m, &t, &pa, r, &e), SW_OK, "%s", e.msg);
    cr_assert(!r->thickness.measured);
    cr_assert(strstr(r->thickness.reason, "ramp slice not found"), "%s", r->thickness.reason);
    cr_assert(fabs(r->rotation_deg - p.pose.rot_deg) < 0.3, "rotation %.3f", r->rotation_deg);
    for (int i = 0; i < n; i++)
        cr_assert_eq(r->ordinal[i], truth_slice[i], "image %d: ordinal %d, truth %d", i,
                     r->ordinal[i], truth_slice[i]);
    const sim_truth *tr = &s->truth;
    for (int k = 0; k < 2; k++) {
        const an_position *q = &r->position[k];
        cr_assert(q->measured, "slice %d: %s", q->slice, q->reason);
        cr_assert_eq(q->slice, tr->wedge[k].ordinal);
        cr_assert(fabs(q->bar_difference_mm - tr->wedge[k].difference_mm) <
                      0.1 + 3 * q->uncertainty_mm,
                  "BLD slice %d %.3f +- %.3f, truth %.3f", q->slice, q->bar_difference_mm,
                  q->uncertainty_mm, tr->wedge[k].difference_mm);
    }
    const an_position_model *pm = &r->position_model;
    cr_assert(pm->measured);
    cr_assert(fabs(pm->scale_percent - 0.6) < 0.01 + 3 * pm->scale_unc_percent, "scale %.4f",
              pm->scale_percent);
    cr_assert(fabs(pm->offset_mm + 1.1) < 0.05 + 3 * pm->offset_unc_mm, "offset %.4f",
              pm->offset_mm);
    free(r);
    sim_series_free(s);
}

/* Full width at `frac` of the strip that a 1 mm slot shows, along the normal: the magnitude of the
 * complex profile integrated over the slot, |cum(z + s/2) - cum(z - s/2)| (the accuracy bench's
 * truth of the slot-widened profile, docs/accuracy.md). */
static double slot_width(const sim_profile *pr, double slot_mm, double frac)
{
    int n = pr->n + (int)ceil(2 * slot_mm / pr->dz_mm) + 2;
    double *g = malloc((size_t)n * sizeof *g), gmax = 0, w = NAN;
    cr_assert_not_null(g);
    for (int i = 0; i < n; i++) {
        double z = pr->z0_mm - slot_mm + i * pr->dz_mm, re, im;
        sim_profile_integral(pr, z - 0.5 * slot_mm, z + 0.5 * slot_mm, &re, &im);
        g[i] = hypot(re, im);
        gmax = fmax(gmax, g[i]);
    }
    double width;
    if (sim_width_at_level(g, n, frac * gmax, &width, NULL) == 0)
        w = width * pr->dz_mm;
    free(g);
    return w;
}

/* The combined slice profile along the normal and the FWTM, on a case whose long strip's foot lies
 * 6 mm inside the insert's end (a 6.15 mm rectangle, tilted, off-centre; shading on): the zprofile
 * must show the slice profile only (peak 1 near z = 0, its FWHM the reported thickness, no values
 * from the fluid beyond the insert's ends, which are five times the strip), and both strips'
 * FWTMs must be measured (the end's ringing must not hide the long strip's tenth-level point).
 * The FWTM truth is the slot-widened profile's; the analysis reads the tails high by the insert's
 * edge ringing (docs/accuracy.md: +0.2 mm on average at SNR >= 50), hence 15 %. */
Test(sim, slice_profile_and_fwtm)
{
    sim_params p = base();
    p.profile.kind = SIM_PROFILE_RECT;
    p.profile.thickness_mm = 6.1484;
    p.pose.tilt_v_deg = -1.3603;
    p.pose.tilt_u_deg = -1.8586;
    p.pose.rot_deg = -1.2795;
    p.pose.du_mm = 0.302;
    p.pose.dv_mm = 2.8938;
    p.position_offset_mm = 0.59319;
    p.position_scale = -0.009404;
    p.snr = 148;
    p.coil_shading = 0.3;
    p.seed = 106;
    sim_series *s = NULL;
    sw_error e = {0};
    cr_assert_eq(sim_series_render(&p, &s, &e), SW_OK, "%s", e.msg);
    an_image v[AN_MAX_IMAGES];
    int n = 0;
    for (int i = 0; i < s->n_images; i++)
        sim_image_view(s, i, &v[n++]);
    an_model m;
    an_model_large(&m);
    an_tolerance t;
    an_tolerance_default(&t);
    an_params pa;
    an_params_default(&pa);
    an_series_result *r = malloc(sizeof *r);
    cr_assert_eq(an_analyze_series(v, n, &m, &t, &pa, r, &e), SW_OK, "%s", e.msg);
    const an_thickness *th = &r->thickness;
    cr_assert(th->measured, "%s", th->reason);
    cr_assert(isfinite(th->top.fwtm_mm) && isfinite(th->bottom.fwtm_mm), "FWTM top %f bottom %f",
              th->top.fwtm_mm, th->bottom.fwtm_mm);
    double fw = slot_width(s->profile[0], m.slot_mm, 0.1);
    cr_assert(fabs(th->fwtm_mm / fw - 1) < 0.15, "FWTM %.3f, slot-widened truth %.3f", th->fwtm_mm,
              fw);
    const an_profile *z = &th->zprofile;
    cr_assert_gt(z->n, 10);
    int ipk = -1, nfin = 0;
    for (int i = 0; i < z->n; i++) {
        if (!isfinite(z->v[i]))
            continue;
        nfin++;
        double zz = z->start_mm + i * z->step_mm;
        cr_assert(z->v[i] < 1.2, "zprofile %.3f at z = %.2f mm", z->v[i], zz);
        if (fabs(zz) > 0.6 * fw + 1.0)
            cr_assert(z->v[i] < 0.2, "zprofile %.3f at z = %.2f mm, beyond the profile's tail",
                      z->v[i], zz);
        if (ipk < 0 || z->v[i] > z->v[ipk])
            ipk = i;
    }
    cr_assert_gt(nfin, z->n / 2);
    double lo, hi;
    cr_assert_eq(an_width_at_level(z->v, z->n, ipk, 0.5, &lo, &hi), 0);
    double zw = (hi - lo) * z->step_mm;
    cr_assert(fabs(zw - th->corrected_mm) < 0.2, "zprofile FWHM %.3f, thickness %.3f", zw,
              th->corrected_mm);
    free(r);
    sim_series_free(s);
}

/* The bar length difference has no error that stays when the noise goes: noise-free renders of the
 * phantom moved by a fraction of a pixel and turned by a degree or two, where the bars' sides and
 * the bridge's edge fall on the pixel grid differently (their Gibbs ringing, rectified by the
 * magnitude, used to move the bars' 50 % levels and the bridge line's slope by up to 0.05 mm).
 * The truth is the simulator's geometry along each bar's centre line; 0.03 mm is our bound (the
 * residual of this method on this simulator is about 0.01 mm RMS), each case, and 0.015 mm RMS. */
Test(sim, bar_difference_without_noise)
{
    struct {
        sim_profile_kind kind;
        double T, rot, du, d;
    } cs[] = {
        {SIM_PROFILE_RECT, 5, 0, -0.6, 0},      {SIM_PROFILE_RECT, 5, 0, -0.5, 0},
        {SIM_PROFILE_RECT, 5, 0, 0.3, 0},       {SIM_PROFILE_RECT, 5, -1.5, 0, 0},
        {SIM_PROFILE_RECT, 5, 1.5, 0, 0},       {SIM_PROFILE_RECT, 3, -2.5, 0.2, 0.4},
        {SIM_PROFILE_BLOCH_SINC, 5, 2, 0.4, 0}, {SIM_PROFILE_GAUSS, 6, -1, -0.3, 1.0},
    };
    int nc = (int)(sizeof cs / sizeof cs[0]);
    double ss = 0;
    int m = 0;
    for (int c = 0; c < nc; c++) {
        sim_params p = base();
        p.snr = 0;
        p.shuffle = 0;
        p.profile.kind = cs[c].kind;
        p.profile.thickness_mm = cs[c].T;
        p.pose.rot_deg = cs[c].rot;
        p.pose.du_mm = cs[c].du;
        p.position_offset_mm = cs[c].d;
        run_out *o = malloc(sizeof *o);
        render_and_analyse(&p, o);
        for (int k = 0; k < 2; k++) {
            const an_position *q = &o->r[0].position[k];
            cr_assert(q->measured, "case %d: %s", c, q->reason);
            double e = q->bar_difference_mm - o->truth.wedge[k].difference_mm;
            cr_expect(fabs(e) < 0.03,
                      "case %d (T %.0f, rot %.1f, du %.1f) slice %d: BLD error %.4f", c, cs[c].T,
                      cs[c].rot, cs[c].du, q->slice, e);
            ss += e * e;
            m++;
        }
        free(o);
    }
    cr_assert(sqrt(ss / m) < 0.015, "RMS BLD error %.4f mm", sqrt(ss / m));
}

/* A sharp, noise-free bridge edge on a slightly turned phantom: the crossings of neighbouring
 * columns differ by Gibbs ringing sampled at different grid phases (about 0.1 mm), and a 0.05 mm
 * floor on the outlier limit once dropped all but two columns on a side ("bridge not found"). The
 * bench's Python reference measured this series; the bar length difference must come back within
 * 0.1 mm of the simulator's geometry on both wedge slices (truth from sim_truth). */
Test(sim, bridge_sharp_edge_turned)
{
    sim_params p;
    sim_params_default(&p);
    p.snr = 0;
    p.pose.rot_deg = 0.5;
    p.pose.du_mm = -2;
    p.pose.dv_mm = 1; /* image up: --offset -2,-1 of the bench puts it 1 mm down; both fail alike */
    p.pose.tilt_v_deg = 1.0;
    p.position_offset_mm = 1.0;
    for (int pass = 0; pass < 2; pass++) {
        if (pass == 1)
            p.pose.dv_mm = -1;
        run_out *o = malloc(sizeof *o);
        render_and_analyse(&p, o);
        for (int k = 0; k < 2; k++) {
            const an_position *q = &o->r[0].position[k];
            cr_assert(q->measured, "pass %d slice %d: %s", pass, q->slice, q->reason);
            double want = NAN;
            for (int j = 0; j < 2; j++)
                if (o->truth.wedge[j].ordinal == q->slice)
                    want = o->truth.wedge[j].difference_mm;
            cr_assert(fabs(q->bar_difference_mm - want) < 0.1, "pass %d slice %d: %.3f vs %.3f",
                      pass, q->slice, q->bar_difference_mm, want);
        }
        free(o);
    }
}
