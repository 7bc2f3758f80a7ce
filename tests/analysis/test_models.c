/* test_models.c: phantom models defined only by their files. The built-in large phantom is
 * config/large-phantom.model itself and holds the published outer figures; the model parser
 * refuses bad files naming the line; and the second model, config/small-single-ramp.model (one
 * 10:1 ramp, the NEMA MS 5 single-ramp method), is simulated and measured by the same code:
 * several thicknesses, SNRs and small in-plane rotations within stated limits, the single-ramp
 * formula on a rectangular profile, its known tilt sensitivity, and a wedge face slope other than
 * 45 degrees. */
#include <criterion/criterion.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "analysis.h"
#include "sim.h"

#define SMALL_MODEL SW_SOURCE_DIR "/config/small-single-ramp.model"
#define LARGE_MODEL SW_SOURCE_DIR "/config/large-phantom.model"

static char *slurp(const char *path)
{
    FILE *f = fopen(path, "rb");
    cr_assert_not_null(f, "cannot open %s", path);
    cr_assert_eq(fseek(f, 0, SEEK_END), 0);
    long n = ftell(f);
    cr_assert(n > 0 && n < (1 << 20));
    rewind(f);
    char *t = malloc((size_t)n + 1);
    cr_assert_not_null(t);
    cr_assert_eq(fread(t, 1, (size_t)n, f), (size_t)n);
    t[n] = '\0';
    fclose(f);
    return t;
}

/* A model file read alone (no base model): every key must be in it. */
static void load_complete(const char *path, an_model *m)
{
    char *t = slurp(path);
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(an_model_parse_complete(m, t, path, &e), SW_OK, "%s", e.msg);
    free(t);
}

/* ---- the built-in model is the shipped file ---- */

Test(models, built_in_is_the_shipped_file)
{
    char *t = slurp(LARGE_MODEL);
    cr_assert_str_eq(an_model_large_text, t,
                     "the build embeds config/large-phantom.model as it is");
    free(t);
    an_model a, b;
    cr_assert_eq(an_model_large(&a), SW_OK);
    load_complete(LARGE_MODEL, &b);
    cr_assert_eq(memcmp(&a, &b, sizeof a), 0);
}

/* The outer figures of the large phantom as published descriptions of the ACR large phantom give
 * them (../shared/phantom-large.md, from memory): inside diameter 190 mm, inside length 148 mm,
 * 10:1 ramps, 45-degree wedges, 11 slices of 5 mm 10 mm apart, wedge vertices on slices 1 and 11
 * 100 mm apart. */
Test(models, large_model_has_the_published_outer_figures)
{
    an_model m;
    an_model_large(&m);
    cr_assert_float_eq(2 * m.radius_mm, 190.0, 1e-9);
    cr_assert_float_eq(m.cyl_w_max - m.cyl_w_min, 148.0, 1e-9);
    cr_assert_eq(m.method, AN_METHOD_CROSSED_RAMPS);
    cr_assert_eq(m.n_ramps, 2);
    cr_assert_float_eq(m.ramp[0].slope, 0.1, 1e-12);
    cr_assert_float_eq(m.ramp[1].slope, -0.1, 1e-12);
    cr_assert_float_eq(atan(m.bar_face_slope) * 180 / M_PI, 45.0, 1e-9);
    cr_assert_eq(m.n_slices, 11);
    cr_assert_float_eq(m.nominal_thickness_mm, 5.0, 1e-12);
    cr_assert_float_eq(m.slice_gap_mm, 10.0, 1e-12);
    cr_assert_eq(m.wedge_slice[0], 1);
    cr_assert_eq(m.wedge_slice[1], 11);
    cr_assert_float_eq(m.wedge_w[1] - m.wedge_w[0], 100.0, 1e-12);
    cr_assert_float_eq((m.wedge_slice[1] - m.wedge_slice[0]) * m.slice_gap_mm,
                       m.wedge_w[1] - m.wedge_w[0], 1e-12);
}

/* Both shipped models read alone (complete), are self-consistent, and survive their printed form:
 * an_model_format's text read back gives the same model. */
Test(models, shipped_models_complete_and_round_trip)
{
    const char *paths[] = {LARGE_MODEL, SMALL_MODEL};
    for (int i = 0; i < 2; i++) {
        an_model m, back;
        load_complete(paths[i], &m);
        char *t = an_model_format(&m);
        cr_assert_not_null(t);
        sw_error e;
        sw_error_clear(&e);
        cr_assert_eq(an_model_parse_complete(&back, t, "printed", &e), SW_OK, "%s: %s", paths[i],
                     e.msg);
        cr_assert_eq(memcmp(&m, &back, sizeof m), 0, "%s: round trip", paths[i]);
        free(t);
    }
    an_model s;
    load_complete(SMALL_MODEL, &s);
    cr_assert_eq(s.method, AN_METHOD_SINGLE_RAMP);
    cr_assert_eq(s.n_ramps, 1);
    cr_assert_eq(s.n_slices, 7);
    cr_assert_str_eq(s.name, "small-single-ramp");
}

/* Bad model text is refused whole, naming the origin, the line and the reason; the model passed in
 * is left as it was. */
Test(models, bad_text_names_line_and_reason)
{
    static const struct {
        const char *text, *want;
    } bad[] = {
        {"[phantom]\nradius_mm = 80\nslices = 0\n", "small:3: slices must be an integer"},
        {"[phantom]\nradius = 80\n", "small:2: unknown setting 'radius' in [phantom]"},
        {"[wedges]\nface_slope = 1\nface_slope = 2\n",
         "small:3: 'face_slope' in [wedges] given twice"},
        {"[wedges]\nface_slope = -1\n", "small:2: face_slope must be a number"},
        {"[phantom]\nmethod = wedge\n", "small:2: method must be one of crossed-ramps"},
        {"[phantom]\nslice_gap_mm = 10 mm\n", "small:2: slice_gap_mm must be a number"},
        {"[insert]\nramps = 1\n", "crossed ramps need two ramps"},
        {"[wedges]\nw_last_mm = 90\n", "small: phantom model large-ramp-wedge: a wedge vertex"},
        {"[phantom]\nradius_mm = 60\n", "the thickness insert reaches outside the fluid cylinder"},
        {"[phantom\n", "small:1: syntax error"},
    };
    for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++) {
        an_model m, ref;
        an_model_large(&m);
        ref = m;
        sw_error e;
        sw_error_clear(&e);
        cr_assert_eq(an_model_parse(&m, bad[i].text, "small", &e), SW_EINVAL, "case %zu", i);
        cr_assert(strstr(e.msg, bad[i].want) != NULL, "case %zu: '%s'", i, e.msg);
        cr_assert_eq(memcmp(&m, &ref, sizeof m), 0, "case %zu: model unchanged", i);
    }
    /* a line longer than inih reads is refused, not split */
    char longline[400];
    memset(longline, 'x', sizeof longline);
    memcpy(longline, "[phantom]\nname = ", 17);
    longline[sizeof longline - 1] = '\0';
    an_model m;
    an_model_large(&m);
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(an_model_parse(&m, longline, "long", &e), SW_EINVAL);
    cr_assert(strstr(e.msg, "long:2: line longer than") != NULL, "%s", e.msg);
    /* complete mode names the first missing key */
    sw_error_clear(&e);
    cr_assert_eq(an_model_parse_complete(&m, "[phantom]\nname = x\n", "partial", &e), SW_EINVAL);
    cr_assert(strstr(e.msg, "partial: [phantom] radius_mm is missing") != NULL, "%s", e.msg);
}

/* ---- the second model, simulated and measured ---- */

typedef struct outcome {
    an_series_result r;
    sim_truth truth;
} outcome;

static void run(const an_model *m, const sim_params *p, outcome *o)
{
    sim_series *s = NULL;
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(sim_series_render(p, &s, &e), SW_OK, "%s", e.msg);
    o->truth = s->truth;
    an_image v[AN_MAX_IMAGES];
    int n = 0;
    for (int i = 0; i < s->n_images && n < AN_MAX_IMAGES; i++)
        if (s->echo[i] == 1)
            sim_image_view(s, i, &v[n++]);
    an_tolerance t;
    an_tolerance_default(&t);
    an_params pa;
    an_params_default(&pa);
    cr_assert_eq(an_analyze_series(v, n, m, &t, &pa, &o->r, &e), SW_OK, "%s", e.msg);
    sim_series_free(s);
}

static sim_params small_params(const an_model *m, double thickness, double snr, double rot,
                               uint64_t seed)
{
    sim_params p;
    sim_params_default(&p);
    p.model = m;
    p.profile.thickness_mm = thickness;
    p.snr = snr;
    p.pose.rot_deg = rot;
    p.seed = seed;
    p.shuffle = 1;
    return p;
}

/* Thickness 3 to 7 mm, SNR 30 and 100, in-plane rotations up to 4 degrees, in-plane offsets and
 * slice position errors: the single-ramp thickness within 0.15 mm (0.3 mm at SNR 30, where a 7 mm
 * slice's strip SNR is about 4) of the profile's FWHM (the truth) plus three reported standard
 * uncertainties, and each wedge slice's bar length difference
 * within 0.2 mm plus three uncertainties of the geometric truth. The limits are the project's own
 * stated accuracy for this model (docs/models.md): the thickness limit is looser than the large
 * phantom's because one strip has no partner to average its slot widening and edge blur with, and
 * the 1 mm slot widens a smooth profile's strip by up to +0.05 mm (phantom-large.md). */
Test(models, small_single_ramp_measured_against_truth, .timeout = 120)
{
    an_model m;
    load_complete(SMALL_MODEL, &m);
    static const struct {
        double t, snr, rot, du, dv, offset;
    } cases[] = {
        {3.0, 100, 0.0, 0, 0, 0.0},   {4.0, 100, 2.5, 3, -2, 0.8},   {5.0, 100, -3.0, -4, 3, -1.2},
        {6.0, 100, 1.0, 2, 5, 0.5},   {7.0, 100, -1.5, 0, -3, -0.6}, {5.0, 30, 4.0, 5, 0, 1.5},
        {3.0, 30, -2.0, -3, 2, -0.4}, {7.0, 30, 0.5, 1, 1, 0.3},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        sim_params p = small_params(&m, cases[i].t, cases[i].snr, cases[i].rot, 100 + i);
        p.pose.du_mm = cases[i].du;
        p.pose.dv_mm = cases[i].dv;
        p.position_offset_mm = cases[i].offset;
        p.prescribed_mm = 5.0;
        outcome o;
        run(&m, &p, &o);
        const an_thickness *t = &o.r.thickness;
        cr_assert(t->measured, "case %zu: thickness not measured: %s", i, t->reason);
        cr_assert_eq(t->slice, 1);
        double truth = o.truth.thickness_mm[0], err = t->corrected_mm - truth;
        double lim = (cases[i].snr >= 50 ? 0.15 : 0.3) + 3 * t->uncertainty_mm;
        cr_assert(fabs(err) <= lim, "case %zu: T %.3f vs FWHM %.3f (limit %.3f)", i,
                  t->corrected_mm, truth, lim);
        cr_log_info("case %zu: T %.2f SNR %.0f rot %+.1f: error %+.3f mm (u %.3f); bar "
                    "differences %+.3f %+.3f mm vs %+.3f %+.3f",
                    i, truth, cases[i].snr, cases[i].rot, err, t->uncertainty_mm,
                    o.r.position[0].bar_difference_mm, o.r.position[1].bar_difference_mm,
                    o.truth.wedge[0].difference_mm, o.truth.wedge[1].difference_mm);
        cr_assert(!t->bottom.measured && isnan(t->tilt_deg), "case %zu: one ramp, no tilt", i);
        cr_assert(fabs(o.r.rotation_deg - cases[i].rot) < 0.3, "case %zu: rotation %.2f vs %.2f", i,
                  o.r.rotation_deg, cases[i].rot);
        for (int k = 0; k < 2; k++) {
            const an_position *q = &o.r.position[k];
            const sim_wedge_truth *w = &o.truth.wedge[k];
            cr_assert_eq(q->slice, k == 0 ? 1 : 7);
            cr_assert(q->measured, "case %zu slice %d: %s", i, q->slice, q->reason);
            double lb = 0.2 + 3 * q->uncertainty_mm;
            cr_assert(fabs(q->bar_difference_mm - w->difference_mm) <= lb,
                      "case %zu slice %d: bar difference %.3f vs %.3f (limit %.3f)", i, q->slice,
                      q->bar_difference_mm, w->difference_mm, lb);
            double d = o.truth.displacement_mm[q->slice - 1];
            cr_assert(fabs(q->displacement_mm - d) <= 0.5 * lb,
                      "case %zu slice %d: displacement %.3f vs %.3f", i, q->slice,
                      q->displacement_mm, d);
        }
        /* 5 mm prescribed; the default tolerance (5.0 +- 0.7 mm, warn at 0.5) */
        double dv = fabs(truth - 5.0);
        an_verdict want = dv > 0.7 ? AN_FAIL : dv > 0.5 ? AN_WARN : AN_PASS;
        cr_assert_eq(t->verdict, want, "case %zu: verdict %s for %.2f mm", i,
                     an_verdict_name(t->verdict), truth);
    }
}

/* The NEMA MS 5 single-ramp relation on its own terms: a rectangular slice profile of width T and a
 * ramp of slope tan(theta) = 0.1 give a strip whose FWHM is T / tan(theta) (the 1 mm slot, a box
 * narrower than T, leaves the FWHM of a rectangle unchanged), so the reading is T. Noise-free. */
Test(models, single_ramp_formula_on_a_rectangular_profile)
{
    an_model m;
    load_complete(SMALL_MODEL, &m);
    const double T[] = {4.0, 6.0};
    for (int i = 0; i < 2; i++) {
        sim_params p = small_params(&m, T[i], 0, 0, 7);
        p.profile.kind = SIM_PROFILE_RECT;
        outcome o;
        run(&m, &p, &o);
        const an_thickness *t = &o.r.thickness;
        cr_assert(t->measured, "%s", t->reason);
        cr_assert(fabs(t->top.length_mm - T[i] / 0.1) < 0.5, "strip %.2f mm vs %.2f mm",
                  t->top.length_mm, T[i] / 0.1);
        cr_assert(fabs(t->corrected_mm - T[i]) < 0.05, "T %.3f vs %.3f", t->corrected_mm, T[i]);
    }
}

/* A single ramp cannot tell a tilt from a thickness change (NEMA MS 5 asks for an aligned phantom):
 * a tilt delta about v lowers the ramp's angle to the slice from theta to theta - delta, so the
 * reading becomes T tan(theta) / tan(theta - delta), 21 % high at 1 degree for a 10:1 ramp. The
 * analysis must show exactly that geometric error (within 2 %), not hide it. */
Test(models, single_ramp_tilt_error_is_the_geometric_one)
{
    an_model m;
    load_complete(SMALL_MODEL, &m);
    sim_params p = small_params(&m, 5.0, 0, 0, 9);
    p.pose.tilt_v_deg = 1.0;
    outcome o;
    run(&m, &p, &o);
    const an_thickness *t = &o.r.thickness;
    cr_assert(t->measured, "%s", t->reason);
    double th = atan(0.1), dl = 1.0 * M_PI / 180;
    double want = o.truth.thickness_mm[0] * tan(th) / tan(th - dl);
    cr_assert(fabs(t->corrected_mm / want - 1) < 0.02, "T %.3f vs %.3f", t->corrected_mm, want);
    cr_assert(t->corrected_mm > 1.15 * o.truth.thickness_mm[0]);
}

/* The wedges' face slope comes from the model: with end faces of slope k = 2 (63.4 degrees), a
 * slice displaced by d shows L_left - L_right = 2 k d (the bars' geometry: L = L0 +- k d), and the
 * analysis reports d from it. */
Test(models, wedge_face_slope_from_the_model)
{
    an_model m;
    load_complete(SMALL_MODEL, &m);
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(an_model_parse(&m, "[wedges]\nface_slope = 2\n", "steep", &e), SW_OK, "%s", e.msg);
    cr_assert_float_eq(m.bar_face_slope, 2.0, 1e-12);
    sim_params p = small_params(&m, 5.0, 100, 0, 5);
    p.position_offset_mm = 1.5;
    outcome o;
    run(&m, &p, &o);
    for (int k = 0; k < 2; k++) {
        const an_position *q = &o.r.position[k];
        cr_assert(q->measured, "%s", q->reason);
        double d = o.truth.displacement_mm[q->slice - 1];
        cr_assert_float_eq(o.truth.wedge[k].difference_mm, -2 * 2.0 * d, 1e-6);
        cr_assert(fabs(q->displacement_mm - d) < 0.1, "slice %d: d %.3f vs %.3f", q->slice,
                  q->displacement_mm, d);
    }
}

/* The small model through every stored orientation and feet first, shuffled with instance numbers
 * reversed: the slices are told apart by the model's content (the ramp slice, then the geometry),
 * so each orientation gives the standard one's numbers. DICOM PS3.3 C.7.6.2.1.1 defines how the
 * stored orientations map to the patient frame; the simulator writes them (tests/sim). */
Test(models, small_model_every_orientation, .timeout = 60)
{
    an_model m;
    load_complete(SMALL_MODEL, &m);
    static const sim_orientation ors[] = {SIM_ORIENT_STANDARD, SIM_ORIENT_FLIP_ROWS,
                                          SIM_ORIENT_FLIP_COLUMNS, SIM_ORIENT_TRANSPOSED,
                                          SIM_ORIENT_FEET_FIRST};
    static outcome ref, o; /* about 60 kB each: off the stack */
    for (size_t i = 0; i < sizeof ors / sizeof ors[0]; i++) {
        sim_params p = small_params(&m, 4.5, 100, -2.0, 8);
        p.position_offset_mm = -1.0;
        p.orientation = ors[i];
        p.reverse_instances = 1;
        run(&m, &p, &o);
        const an_thickness *t = &o.r.thickness;
        cr_assert(t->measured && t->slice == 1, "orientation %zu: %s", i, t->reason);
        cr_assert(o.r.position[0].measured && o.r.position[1].measured, "orientation %zu", i);
        cr_assert_eq(o.r.position[1].slice, 7);
        if (i == 0) {
            ref = o;
            continue;
        }
        /* the same noise realisation, resampled: rounding-level differences only */
        cr_assert(fabs(t->corrected_mm - ref.r.thickness.corrected_mm) < 0.03,
                  "orientation %zu: T %.4f vs %.4f", i, t->corrected_mm,
                  ref.r.thickness.corrected_mm);
        for (int k = 0; k < 2; k++)
            cr_assert(fabs(o.r.position[k].bar_difference_mm -
                           ref.r.position[k].bar_difference_mm) < 0.05,
                      "orientation %zu slice %d: %.4f vs %.4f", i, o.r.position[k].slice,
                      o.r.position[k].bar_difference_mm, ref.r.position[k].bar_difference_mm);
    }
}
