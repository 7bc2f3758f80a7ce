/* test_drawn.c: the analysis on analytically drawn phantoms (draw.c) whose truths are closed-form:
 * a rectangular slice profile of thickness T seen through 10:1 ramps gives strips of FWHM length
 * T / 0.1 (the ramp geometry of phantom-large.md; the 1 mm slot does not widen a rectangle wider
 * than itself), 45-degree wedges give a bar length difference of -2 d. Also the same image stored
 * flipped, transposed or described in a feet-first patient frame must give the same result, and bad
 * input must give clear reasons. */
#include <criterion/criterion.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "an_int.h"
#include "draw.h"

#define NS 11

typedef struct series {
    an_image v[NS];
    float *px[NS];
    int n;
} series;

static void draw_series(const dr_params *p, series *s)
{
    s->n = NS;
    for (int k = 0; k < NS; k++) {
        s->px[k] = malloc(sizeof(float) * p->matrix * p->matrix);
        cr_assert_not_null(s->px[k]);
        dr_slice(p, k + 1, s->px[k], &s->v[k]);
    }
}

static void free_series(series *s)
{
    for (int k = 0; k < NS; k++)
        free(s->px[k]);
}

static an_series_result *run(const an_image *v, int n, const an_model *m, const an_params *pa)
{
    an_tolerance t;
    an_tolerance_default(&t);
    an_params def;
    an_params_default(&def);
    an_series_result *r = malloc(sizeof *r);
    cr_assert_not_null(r);
    sw_error e = {0};
    cr_assert_eq(an_analyze_series(v, n, m, &t, pa ? pa : &def, r, &e), SW_OK, "%s", e.msg);
    return r;
}

/* The disc fit on a drawn disc: centre and radius by construction (sub-pixel, 0.05 px / 0.05 mm,
 * our own accuracy requirement for a noise-free anti-aliased disc). */
Test(drawn, disc_centre_and_radius)
{
    dr_params p;
    dr_defaults(&p);
    p.uniform = 1;
    p.cx_mm = 12.3;
    p.cy_mm = -7.9;
    float *px = malloc(sizeof(float) * 256 * 256);
    an_image v;
    dr_slice(&p, 6, px, &v);
    an_model m;
    an_model_large(&m);
    an_work w = {0};
    an_disc d;
    cr_assert_eq(an_find_disc(&v, &m, 1, &w, &d), 0);
    cr_assert(d.found, "%s", d.reason);
    double dx = 250.0 / 256;
    cr_assert(fabs(d.xc - (127.5 + 12.3 / dx)) < 0.05, "xc %f", d.xc);
    cr_assert(fabs(d.yc - (127.5 + 7.9 / dx)) < 0.05, "yc %f", d.yc);
    cr_assert(fabs(d.r_mm - 95.0) < 0.05, "r %f", d.r_mm);
    /* the coarse mode (no rays) is good to about a pixel */
    cr_assert_eq(an_find_disc(&v, &m, 0, &w, &d), 0);
    cr_assert(d.found, "%s", d.reason);
    cr_assert(fabs(d.xc - (127.5 + 12.3 / dx)) < 1.0, "coarse xc %f", d.xc);
    cr_assert(fabs(d.yc - (127.5 + 7.9 / dx)) < 1.0, "coarse yc %f", d.yc);
    cr_assert(fabs(d.r_mm - 95.0) < 1.5, "coarse r %f", d.r_mm);
    an_work_free(&w);
    free(px);
}

/* Noise from air: the magnitude of complex Gaussian noise is Rayleigh with median
 * sigma sqrt(2 ln 2) (a standard result; see Gudbjartsson and Patz 1995 for MR magnitude images);
 * with ~20000 air pixels the estimate is good to a few per cent. */
Test(drawn, noise_from_air)
{
    dr_params p;
    dr_defaults(&p);
    p.uniform = 1;
    p.sigma = 20;
    float *px = malloc(sizeof(float) * 256 * 256);
    an_image v;
    dr_slice(&p, 6, px, &v);
    an_model m;
    an_model_large(&m);
    an_work w = {0};
    an_disc d;
    cr_assert_eq(an_find_disc(&v, &m, 1, &w, &d), 0);
    cr_assert(d.found);
    float *scratch = malloc(sizeof(float) * 256 * 256);
    double s = an_noise_air(&v, &d, scratch);
    cr_assert(fabs(s / 20 - 1) < 0.04, "sigma %f", s);
    /* the fluid fallback (neighbour differences, Gaussian regime at SNR 50) agrees */
    double s2 = an_noise_fluid(&v, &d, scratch);
    cr_assert(fabs(s2 / 20 - 1) < 0.06, "sigma from fluid %f", s2);
    an_work_free(&w);
    free(scratch);
    free(px);
}

/* A whole series with known truth: T = 5 mm rectangle, d = +1.2 mm, rotation 3 degrees, off-centre,
 * SNR 100; checked within the accuracy goals plus three reported uncertainties. */
Test(drawn, series_truth)
{
    dr_params p;
    dr_defaults(&p);
    p.d_mm = 1.2;
    p.rot_deg = 3.0;
    p.cx_mm = 8;
    p.cy_mm = -5;
    p.sigma = p.fluid / 100;
    series s;
    draw_series(&p, &s);
    /* shuffle: the analysis must not care about the input order */
    an_image v[NS];
    int perm[NS] = {7, 2, 10, 0, 5, 9, 1, 4, 8, 3, 6};
    for (int i = 0; i < NS; i++)
        v[i] = s.v[perm[i]];
    an_model m;
    an_model_large(&m);
    an_series_result *r = run(v, NS, &m, NULL);
    for (int i = 0; i < NS; i++)
        cr_assert_eq(r->ordinal[i], perm[i] + 1, "image %d: ordinal %d", i, r->ordinal[i]);
    const an_thickness *t = &r->thickness;
    cr_assert(t->measured, "%s", t->reason);
    cr_assert_eq(t->slice, 1);
    cr_assert(fabs(t->corrected_mm - 5.0) < 0.05 + 3 * t->uncertainty_mm, "T %f +- %f",
              t->corrected_mm, t->uncertainty_mm);
    cr_assert(fabs(t->top.length_mm - 50.0) < 0.5 + 3 * t->top.length_unc_mm);
    cr_assert(fabs(t->tilt_deg) < 0.1 + 3 * t->tilt_unc_deg);
    cr_assert(fabs(r->rotation_deg - 3.0) < 0.1, "rotation %f", r->rotation_deg);
    /* strips centred at +-10 d (phantom-large.md) */
    cr_assert(fabs(t->top.centre_u_mm - 12.0) < 0.3 + 3 * t->top.centre_unc_mm, "%f",
              t->top.centre_u_mm);
    cr_assert(fabs(t->bottom.centre_u_mm + 12.0) < 0.3 + 3 * t->bottom.centre_unc_mm);
    for (int k = 0; k < 2; k++) {
        const an_position *q = &r->position[k];
        cr_assert(q->measured, "%s", q->reason);
        cr_assert(fabs(q->bar_difference_mm + 2.4) < 0.1 + 3 * q->uncertainty_mm, "BLD %f +- %f",
                  q->bar_difference_mm, q->uncertainty_mm);
        cr_assert(fabs(q->displacement_mm - 1.2) < 0.05 + 3 * q->uncertainty_mm);
        cr_assert_eq(q->verdict, AN_PASS);
    }
    cr_assert_eq(r->position[0].slice, 1);
    cr_assert_eq(r->position[1].slice, 11);
    /* the ramp estimate of d on slice 1 */
    const an_position *q = &r->position[0];
    cr_assert(fabs(q->ramp_displacement_mm - 1.2) < 0.05 + 3 * q->ramp_displacement_unc_mm);
    /* same displacement on both wedge slices: no scale error; offset = d (z from IPP, mm) */
    cr_assert(r->position_model.measured);
    cr_assert(fabs(r->position_model.scale_percent) < 0.2);
    cr_assert(fabs(r->position_model.offset_mm - 1.2) < 0.1);
    /* no pitch drawn */
    cr_assert(r->pitch_measured);
    cr_assert(fabs(r->pitch_deg) < 0.2 + 3 * r->pitch_unc_deg);
    cr_assert(fabs(r->snr - 100) < 5, "SNR %f", r->snr);
    cr_assert_eq(r->verdict, AN_PASS);
    free(r);
    free_series(&s);
}

/* Rewrites image v as stored with rows flipped, columns flipped or transposed (pixels moved, and
 * IOP/IPP changed to describe the same physical image), or in a feet-first patient frame (the same
 * pixels; x and z of the patient frame reversed). */
enum { V_FLIP_ROWS, V_FLIP_COLS, V_TRANSPOSE, V_FEET_FIRST };
static void variant(const an_image *in, float *px, an_image *out, int kind)
{
    int n = in->width;
    *out = *in;
    out->px = px;
    double r[3] = {in->iop[0], in->iop[1], in->iop[2]}, c[3] = {in->iop[3], in->iop[4], in->iop[5]};
    double d = in->col_mm;
    for (int j = 0; j < n; j++)
        for (int i = 0; i < n; i++) {
            int si = i, sj = j;
            if (kind == V_FLIP_ROWS)
                sj = n - 1 - j;
            else if (kind == V_FLIP_COLS)
                si = n - 1 - i;
            else if (kind == V_TRANSPOSE)
                si = j, sj = i;
            px[(size_t)j * n + i] = in->px[(size_t)sj * n + si];
        }
    for (int q = 0; q < 3; q++) {
        switch (kind) {
        case V_FLIP_ROWS:
            out->ipp[q] = in->ipp[q] + (n - 1) * d * c[q];
            out->iop[3 + q] = -c[q];
            break;
        case V_FLIP_COLS:
            out->ipp[q] = in->ipp[q] + (n - 1) * d * r[q];
            out->iop[q] = -r[q];
            break;
        case V_TRANSPOSE:
            out->iop[q] = c[q];
            out->iop[3 + q] = r[q];
            break;
        case V_FEET_FIRST: {
            double sgn = q == 1 ? 1 : -1;
            out->ipp[q] = sgn * in->ipp[q];
            out->iop[q] = sgn * r[q];
            out->iop[3 + q] = sgn * c[q];
            break;
        }
        }
    }
}

Test(drawn, orientation_variants_agree)
{
    dr_params p;
    dr_defaults(&p);
    p.d_mm = -1.5;
    p.rot_deg = -2.0;
    p.sigma = p.fluid / 80;
    series s;
    draw_series(&p, &s);
    an_model m;
    an_model_large(&m);
    an_series_result *ref = run(s.v, NS, &m, NULL);
    cr_assert(ref->thickness.measured && ref->position[0].measured && ref->position[1].measured);
    const char *names[4] = {"rows flipped", "columns flipped", "transposed", "feet first"};
    for (int kind = 0; kind < 4; kind++) {
        an_image v[NS];
        float *px[NS];
        for (int k = 0; k < NS; k++) {
            px[k] = malloc(sizeof(float) * 256 * 256);
            variant(&s.v[k], px[k], &v[k], kind);
        }
        an_series_result *r = run(v, NS, &m, NULL);
        /* The same physical image in the phantom frame: the same numbers (bilinear sampling is
         * symmetric under these index maps, so only rounding differs). */
        cr_assert(r->thickness.measured, "%s: %s", names[kind], r->thickness.reason);
        cr_assert(fabs(r->thickness.corrected_mm - ref->thickness.corrected_mm) < 1e-3,
                  "%s: %f vs %f", names[kind], r->thickness.corrected_mm,
                  ref->thickness.corrected_mm);
        cr_assert(fabs(r->thickness.tilt_deg - ref->thickness.tilt_deg) < 1e-2, "%s", names[kind]);
        cr_assert(fabs(r->rotation_deg - ref->rotation_deg) < 1e-3, "%s: rotation %f vs %f",
                  names[kind], r->rotation_deg, ref->rotation_deg);
        for (int q = 0; q < 2; q++) {
            cr_assert(r->position[q].measured, "%s: %s", names[kind], r->position[q].reason);
            cr_assert(fabs(r->position[q].bar_difference_mm - ref->position[q].bar_difference_mm) <
                          1e-3,
                      "%s: BLD %f vs %f", names[kind], r->position[q].bar_difference_mm,
                      ref->position[q].bar_difference_mm);
            cr_assert(fabs(r->position[q].z_mm - ref->position[q].z_mm) < 1e-6, "%s: z",
                      names[kind]);
        }
        cr_assert(fabs(r->position[0].ramp_displacement_mm -
                       ref->position[0].ramp_displacement_mm) < 1e-3);
        for (int k = 0; k < NS; k++)
            cr_assert_eq(r->ordinal[k], ref->ordinal[k], "%s: ordinal of image %d", names[kind], k);
        /* and the truth: BLD = -2 d = +3 mm */
        cr_assert(fabs(r->position[0].bar_difference_mm - 3.0) <
                  0.1 + 3 * r->position[0].uncertainty_mm);
        free(r);
        for (int k = 0; k < NS; k++)
            free(px[k]);
    }
    free(ref);
    free_series(&s);
}

/* NEMA MS 5 single ramp: thickness = FWHM x tan(angle), here 50 mm x 0.1. */
Test(drawn, nema_single_ramp)
{
    dr_params p;
    dr_defaults(&p);
    p.insert = DR_SINGLE_RAMP;
    p.sigma = p.fluid / 100;
    series s;
    draw_series(&p, &s);
    an_model m;
    an_model_large(&m);
    m.method = AN_METHOD_SINGLE_RAMP;
    m.n_ramps = 1;
    an_series_result *r = run(s.v, NS, &m, NULL);
    cr_assert(r->thickness.measured, "%s", r->thickness.reason);
    cr_assert(fabs(r->thickness.corrected_mm - 5.0) < 0.05 + 3 * r->thickness.uncertainty_mm,
              "T %f", r->thickness.corrected_mm);
    cr_assert(isnan(r->thickness.acr_mm)); /* no second ramp: no combination */
    cr_assert(!r->thickness.bottom.measured);
    free(r);
    free_series(&s);
}

/* NEMA MS 5 single wedge: the edge response differentiated gives the profile; its FWHM x tan(angle)
 * is the thickness (a 1:2 wedge face here, so the 5 mm slab spreads over 10 mm). */
Test(drawn, nema_single_wedge)
{
    dr_params p;
    dr_defaults(&p);
    p.insert = DR_SINGLE_WEDGE;
    p.wedge_slope = 0.5;
    p.sigma = p.fluid / 200;
    series s;
    draw_series(&p, &s);
    an_model m;
    an_model_large(&m);
    m.method = AN_METHOD_SINGLE_WEDGE;
    m.n_ramps = 1;
    m.wedge_slope = 0.5;
    an_series_result *r = run(s.v, NS, &m, NULL);
    cr_assert(r->thickness.measured, "%s", r->thickness.reason);
    cr_assert(fabs(r->thickness.corrected_mm - 5.0) < 0.15, "T %f", r->thickness.corrected_mm);
    free(r);
    free_series(&s);
}

/* A strip that runs into the end of the insert is reported with that reason and not measured
 * (d = 6 mm puts the top strip's centre at u = 60 mm, its half-maximum end at 85 mm > 70 mm). */
Test(drawn, strip_runs_into_end)
{
    dr_params p;
    dr_defaults(&p);
    p.d_mm = 6.0;
    p.sigma = p.fluid / 100;
    series s;
    draw_series(&p, &s);
    an_model m;
    an_model_large(&m);
    an_series_result *r = run(s.v, NS, &m, NULL);
    cr_assert(!r->thickness.measured);
    cr_assert_eq(r->thickness.verdict, AN_UNMEASURABLE);
    cr_assert(isnan(r->thickness.corrected_mm));
    cr_assert(strstr(r->thickness.reason, "end of the insert"), "%s", r->thickness.reason);
    /* the wedges are still measured: BLD = -12 mm, a failure */
    cr_assert(r->position[0].measured);
    cr_assert_eq(r->position[0].verdict, AN_FAIL);
    cr_assert_eq(r->verdict, AN_UNMEASURABLE);
    free(r);
    free_series(&s);
}

/* Bad input: each gives an unmeasurable verdict with a clear reason, and never a number. */
static void expect_unmeasurable(const dr_params *p, const char *want)
{
    series s;
    draw_series(p, &s);
    an_model m;
    an_model_large(&m);
    an_series_result *r = run(s.v, NS, &m, NULL);
    cr_assert_eq(r->verdict, AN_UNMEASURABLE);
    cr_assert(!r->thickness.measured && isnan(r->thickness.corrected_mm));
    cr_assert(strstr(r->thickness.reason, want), "reason '%s' lacks '%s'", r->thickness.reason,
              want);
    cr_assert(strstr(r->reason, want), "series reason '%s'", r->reason);
    for (int k = 0; k < 2; k++)
        cr_assert(!r->position[k].measured && isnan(r->position[k].bar_difference_mm));
    cr_assert(!r->position_model.measured && isnan(r->position_model.offset_mm));
    free(r);
    free_series(&s);
}

Test(drawn, uniform_disc_is_not_a_phantom)
{
    dr_params p;
    dr_defaults(&p);
    p.uniform = 1;
    p.sigma = 10;
    expect_unmeasurable(&p, "ramp slice not found");
}

Test(drawn, noise_only)
{
    dr_params p;
    dr_defaults(&p);
    p.noise_only = 1;
    p.sigma = 10;
    expect_unmeasurable(&p, "phantom not found");
}

/* A phantom without its thickness insert: no thickness, but the wedges are intact and measured
 * (BLD = -2 d on both wedge slices, phantom-large.md), at any rotation (the bridge gives it), with
 * slice 1 told from slice 11 by the patient frame (head first: slice 1 the inferior one, as drawn;
 * feet first, the same images described in a feet-first frame, give the same numbers). */
Test(drawn, ramp_insert_missing)
{
    double rots[3] = {0.0, 27.0, -150.0};
    for (int c = 0; c < 3; c++) {
        dr_params p;
        dr_defaults(&p);
        p.insert = DR_NONE;
        p.sigma = 10;
        p.d_mm = 0.9;
        p.rot_deg = rots[c];
        series s;
        draw_series(&p, &s);
        an_model m;
        an_model_large(&m);
        for (int ff = 0; ff < 2; ff++) {
            an_image v[NS];
            float *px[NS];
            for (int k = 0; k < NS; k++) {
                v[k] = s.v[k];
                px[k] = NULL;
                if (ff) {
                    px[k] = malloc(sizeof(float) * 256 * 256);
                    variant(&s.v[k], px[k], &v[k], V_FEET_FIRST);
                    v[k].feet_first = 1;
                }
            }
            an_series_result *r = run(v, NS, &m, NULL);
            cr_assert(!r->thickness.measured);
            cr_assert(strstr(r->thickness.reason, "ramp slice not found"), "%s",
                      r->thickness.reason);
            cr_assert(r->order_from_patient_frame);
            cr_assert_eq(r->verdict, AN_UNMEASURABLE);
            double dr = fmod(r->rotation_deg - rots[c] + 540.0, 360.0) - 180.0;
            cr_assert(fabs(dr) < 0.3, "rotation %.1f: measured %.3f", rots[c], r->rotation_deg);
            for (int k = 0; k < NS; k++)
                cr_assert_eq(r->ordinal[k], k + 1, "rotation %.1f, ff %d: image %d ordinal %d",
                             rots[c], ff, k, r->ordinal[k]);
            for (int q = 0; q < 2; q++) {
                const an_position *pq = &r->position[q];
                cr_assert(pq->measured, "rotation %.1f, ff %d: %s", rots[c], ff, pq->reason);
                cr_assert_eq(pq->slice, q ? 11 : 1);
                cr_assert(fabs(pq->bar_difference_mm + 1.8) < 0.1 + 3 * pq->uncertainty_mm,
                          "rotation %.1f, ff %d: BLD %.3f +- %.3f", rots[c], ff,
                          pq->bar_difference_mm, pq->uncertainty_mm);
                cr_assert(isnan(pq->ramp_displacement_mm));
            }
            cr_assert(r->position_model.measured);
            cr_assert(fabs(r->position_model.offset_mm - 0.9) < 0.1);
            cr_assert(!r->pitch_measured);
            free(r);
            for (int k = 0; k < NS; k++)
                free(px[k]);
        }
        free_series(&s);
    }
}

Test(drawn, snr_too_low)
{
    dr_params p;
    dr_defaults(&p);
    p.sigma = p.fluid / 3; /* SNR 3 < the default minimum of 5 */
    series s;
    draw_series(&p, &s);
    an_model m;
    an_model_large(&m);
    an_series_result *r = run(s.v, NS, &m, NULL);
    cr_assert_eq(r->verdict, AN_UNMEASURABLE);
    cr_assert(!r->thickness.measured);
    cr_assert(strstr(r->reason, "SNR too low") || strstr(r->reason, "not found"), "%s", r->reason);
    free(r);
    free_series(&s);
}

/* Too few slices: only the ramp slice. Thickness and slice 1's position are measured; slice 11 is
 * not found and the position model cannot be made. */
Test(drawn, single_slice)
{
    dr_params p;
    dr_defaults(&p);
    p.sigma = p.fluid / 100;
    float *px = malloc(sizeof(float) * 256 * 256);
    an_image v;
    dr_slice(&p, 1, px, &v);
    an_model m;
    an_model_large(&m);
    an_series_result *r = run(&v, 1, &m, NULL);
    cr_assert(r->thickness.measured, "%s", r->thickness.reason);
    cr_assert(r->position[0].measured, "%s", r->position[0].reason);
    cr_assert(!r->position[1].measured);
    cr_assert(strstr(r->position[1].reason, "slice not found"), "%s", r->position[1].reason);
    cr_assert(!r->position_model.measured);
    cr_assert_eq(r->verdict, AN_UNMEASURABLE);
    free(r);
    free(px);
}

Test(drawn, bad_arguments)
{
    an_model m;
    an_model_large(&m);
    an_tolerance t;
    an_tolerance_default(&t);
    an_params pa;
    an_params_default(&pa);
    an_series_result *r = malloc(sizeof *r);
    sw_error e = {0};
    an_image v = {0};
    cr_assert_eq(an_analyze_series(&v, 0, &m, &t, &pa, r, &e), SW_EINVAL);
    sw_error_clear(&e);
    cr_assert_eq(an_analyze_series(&v, 1, &m, &t, &pa, r, &e), SW_EINVAL); /* no pixels */
    cr_assert(strlen(e.msg) > 0);
    sw_error_clear(&e);
    cr_assert_eq(an_analyze_series(NULL, 1, &m, &t, &pa, r, &e), SW_EINVAL);
    free(r);
}

/* Any in-plane rotation: the insert's axis gives it modulo 180 degrees and the bridge tells up from
 * down (the phantom may lie turned in the coil). Truth by construction: rotation as drawn,
 * BLD = -2 d. */
Test(drawn, any_rotation)
{
    double rots[5] = {37.0, 90.0, 180.0, -120.0, -90.0};
    for (int k = 0; k < 5; k++) {
        dr_params p;
        dr_defaults(&p);
        p.rot_deg = rots[k];
        p.d_mm = 0.8;
        p.sigma = p.fluid / 100;
        series s;
        draw_series(&p, &s);
        an_model m;
        an_model_large(&m);
        an_series_result *r = run(s.v, NS, &m, NULL);
        double dr = fmod(r->rotation_deg - rots[k] + 540.0, 360.0) - 180.0;
        cr_assert(fabs(dr) < 0.1, "rotation %.1f: measured %.3f", rots[k], r->rotation_deg);
        cr_assert(r->thickness.measured, "rotation %.1f: %s", rots[k], r->thickness.reason);
        cr_assert(fabs(r->thickness.corrected_mm - 5.0) < 0.05 + 3 * r->thickness.uncertainty_mm);
        for (int q = 0; q < 2; q++)
            cr_assert(fabs(r->position[q].bar_difference_mm + 1.6) <
                          0.1 + 3 * r->position[q].uncertainty_mm,
                      "rotation %.1f: BLD %.3f", rots[k], r->position[q].bar_difference_mm);
        free(r);
        free_series(&s);
    }
}

/* Some scanners set the air to zero: the noise then comes from neighbour differences in the fluid
 * (Gaussian regime at SNR 100: the SD of a difference of two independent samples is sigma sqrt 2).
 */
Test(drawn, masked_background)
{
    dr_params p;
    dr_defaults(&p);
    p.sigma = p.fluid / 100;
    series s;
    draw_series(&p, &s);
    double dx = 250.0 / 256;
    for (int k = 0; k < NS; k++)
        for (int j = 0; j < 256; j++)
            for (int i = 0; i < 256; i++) {
                double x = (i - 127.5) * dx, y = (j - 127.5) * dx;
                if (x * x + y * y > 100.0 * 100.0)
                    s.px[k][(size_t)j * 256 + i] = 0;
            }
    an_model m;
    an_model_large(&m);
    an_series_result *r = run(s.v, NS, &m, NULL);
    cr_assert(fabs(r->noise_sd / p.sigma - 1) < 0.1, "noise %.3f, drawn %.3f", r->noise_sd,
              p.sigma);
    cr_assert(r->thickness.measured, "%s", r->thickness.reason);
    cr_assert(isfinite(r->thickness.uncertainty_mm) && r->thickness.uncertainty_mm > 0);
    free(r);
    free_series(&s);
}

/* A stack that runs past the wedges (13 slices, one beyond each wedge slice): the ramp slice is
 * found inside the stack by content, slices 1..11 are counted from it, and the extra slices are
 * left unplaced (ordinal 0). */
Test(drawn, stack_beyond_the_wedges)
{
    dr_params p;
    dr_defaults(&p);
    p.d_mm = -0.6;
    p.sigma = p.fluid / 100;
    an_image v[13];
    float *px[13];
    for (int k = 0; k < 13; k++) {
        px[k] = malloc(sizeof(float) * 256 * 256);
        dr_slice(&p, k, px[k], &v[k]); /* slice k = 0 lies 10 mm before slice 1 */
    }
    an_model m;
    an_model_large(&m);
    an_series_result *r = run(v, 13, &m, NULL);
    for (int k = 0; k < 13; k++)
        cr_assert_eq(r->ordinal[k], k >= 1 && k <= 11 ? k : 0, "image %d: ordinal %d", k,
                     r->ordinal[k]);
    cr_assert(r->thickness.measured, "%s", r->thickness.reason);
    cr_assert(r->position[0].measured && r->position[1].measured);
    cr_assert(fabs(r->position[1].bar_difference_mm - 1.2) <
              0.1 + 3 * r->position[1].uncertainty_mm);
    free(r);
    for (int k = 0; k < 13; k++)
        free(px[k]);
}
