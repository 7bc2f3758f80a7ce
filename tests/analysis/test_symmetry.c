/* test_symmetry.c: storage-order invariance. The same physical images stored with their rows or
 * columns reversed, transposed, or turned by 90 or 180 degrees (pixels moved, and
 * ImageOrientationPatient, ImagePositionPatient and PixelSpacing rewritten so that every pixel
 * keeps its place in the patient frame: DICOM PS3.3 C.7.6.2.1.1) describe the same phantom, so
 * every number the analysis reports must agree to rounding. The series come from the simulator
 * (sim/) and are rearranged here in memory, so the pixels are exactly the same values. */
#include <criterion/criterion.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "analysis.h"
#include "sim.h"

enum { V_FLIP_ROWS, V_FLIP_COLS, V_TRANSPOSE, V_ROT180, V_ROT90, V_N };
static const char *VNAME[V_N] = {"rows flipped", "columns flipped", "transposed",
                                 "turned 180 degrees", "turned 90 degrees"};

/* Rewrites image in as stored differently (a new pixel array px of the same size): stored pixel
 * (x, y) of the input lies at P = ipp + x col_mm r + y row_mm c (r, c the row and column direction
 * cosines); the output keeps every P. */
static void variant(const an_image *in, float *px, an_image *out, int kind)
{
    int w = in->width, h = in->height;
    *out = *in;
    out->px = px;
    double r[3] = {in->iop[0], in->iop[1], in->iop[2]}, c[3] = {in->iop[3], in->iop[4], in->iop[5]};
    int tr = kind == V_TRANSPOSE || kind == V_ROT90;
    out->width = tr ? h : w;
    out->height = tr ? w : h;
    out->stride = out->width;
    if (tr) {
        out->col_mm = in->row_mm;
        out->row_mm = in->col_mm;
    }
    for (int y = 0; y < out->height; y++)
        for (int x = 0; x < out->width; x++) {
            int sx = x, sy = y; /* source pixel */
            switch (kind) {
            case V_FLIP_ROWS: sy = h - 1 - y; break;
            case V_FLIP_COLS: sx = w - 1 - x; break;
            case V_TRANSPOSE: sx = y, sy = x; break;
            case V_ROT180: sx = w - 1 - x, sy = h - 1 - y; break;
            case V_ROT90:
                sx = y, sy = h - 1 - x;
                break; /* transposed, then rows of the input
                           reversed */
            }
            px[(size_t)y * out->width + x] = in->px[(ptrdiff_t)sy * in->stride + sx];
        }
    for (int q = 0; q < 3; q++) {
        double lastx = (w - 1) * in->col_mm * r[q], lasty = (h - 1) * in->row_mm * c[q];
        switch (kind) {
        case V_FLIP_ROWS:
            out->ipp[q] = in->ipp[q] + lasty;
            out->iop[3 + q] = -c[q];
            break;
        case V_FLIP_COLS:
            out->ipp[q] = in->ipp[q] + lastx;
            out->iop[q] = -r[q];
            break;
        case V_TRANSPOSE:
            out->iop[q] = c[q];
            out->iop[3 + q] = r[q];
            break;
        case V_ROT180:
            out->ipp[q] = in->ipp[q] + lastx + lasty;
            out->iop[q] = -r[q];
            out->iop[3 + q] = -c[q];
            break;
        case V_ROT90: /* output x runs along -c from the last input row, output y along +r */
            out->ipp[q] = in->ipp[q] + lasty;
            out->iop[q] = -c[q];
            out->iop[3 + q] = r[q];
            break;
        }
    }
}

/* The reported numbers of a result, named, for comparison. */
#define NV_MAX 96
typedef struct vals {
    int n;
    const char *name[NV_MAX];
    double v[NV_MAX];
} vals;

static void put(vals *s, const char *name, double v)
{
    cr_assert_lt(s->n, NV_MAX);
    s->name[s->n] = name;
    s->v[s->n++] = v;
}

static void put_strip(vals *s, const an_strip *t, int top)
{
    put(s, top ? "top.length" : "bottom.length", t->length_mm);
    put(s, top ? "top.length_unc" : "bottom.length_unc", t->length_unc_mm);
    put(s, top ? "top.fwtm" : "bottom.fwtm", t->fwtm_mm);
    put(s, top ? "top.centre_u" : "bottom.centre_u", t->centre_u_mm);
    put(s, top ? "top.centre_unc" : "bottom.centre_unc", t->centre_unc_mm);
    put(s, top ? "top.plateau" : "bottom.plateau", t->plateau);
    put(s, top ? "top.plateau_unc" : "bottom.plateau_unc", t->plateau_unc);
    put(s, top ? "top.half_level" : "bottom.half_level", t->half_level);
    put(s, top ? "top.cross_lo" : "bottom.cross_lo", t->cross_lo_mm);
    put(s, top ? "top.cross_hi" : "bottom.cross_hi", t->cross_hi_mm);
    put(s, top ? "top.half_width" : "bottom.half_width", t->half_width_mm);
}

static void put_bar(vals *s, const an_bar *b, int k, int right)
{
    static const char *nl[2][2] = {{"pos1.left.length", "pos1.right.length"},
                                   {"pos11.left.length", "pos11.right.length"}};
    static const char *nu[2][2] = {{"pos1.left.unc", "pos1.right.unc"},
                                   {"pos11.left.unc", "pos11.right.unc"}};
    put(s, nl[k][right], b->length_mm);
    put(s, nu[k][right], b->unc_mm);
}

static void collect(const an_series_result *r, vals *s)
{
    s->n = 0;
    put(s, "noise_sd", r->noise_sd);
    put(s, "snr", r->snr);
    put(s, "rotation", r->rotation_deg);
    const an_thickness *t = &r->thickness;
    put(s, "T.corrected", t->corrected_mm);
    put(s, "T.acr", t->acr_mm);
    put(s, "T.unc", t->uncertainty_mm);
    put(s, "T.tilt", t->tilt_deg);
    put(s, "T.tilt_unc", t->tilt_unc_deg);
    put(s, "T.fwtm", t->fwtm_mm);
    put_strip(s, &t->top, 1);
    put_strip(s, &t->bottom, 0);
    static const char *pn[2][6] = {
        {"pos1.bld", "pos1.unc", "pos1.displacement", "pos1.ramp_d", "pos1.ramp_d_unc", "pos1.z"},
        {"pos11.bld", "pos11.unc", "pos11.displacement", "pos11.ramp_d", "pos11.ramp_d_unc",
         "pos11.z"}};
    for (int k = 0; k < 2; k++) {
        const an_position *p = &r->position[k];
        put(s, pn[k][0], p->bar_difference_mm);
        put(s, pn[k][1], p->uncertainty_mm);
        put(s, pn[k][2], p->displacement_mm);
        put(s, pn[k][3], p->ramp_displacement_mm);
        put(s, pn[k][4], p->ramp_displacement_unc_mm);
        put(s, pn[k][5], p->z_mm);
        put_bar(s, &p->left, k, 0);
        put_bar(s, &p->right, k, 1);
    }
    put(s, "model.offset", r->position_model.offset_mm);
    put(s, "model.scale", r->position_model.scale_percent);
    put(s, "model.offset_unc", r->position_model.offset_unc_mm);
    put(s, "model.scale_unc", r->position_model.scale_unc_percent);
    put(s, "pitch", r->pitch_deg);
    put(s, "pitch_unc", r->pitch_unc_deg);
    for (int i = 0; i < r->n_images && s->n < NV_MAX; i++)
        put(s, "phantom.radius", r->phantom[i].radius_mm);
}

/* Agreement to rounding: 1e-6 relative, with an absolute floor of 1e-9 (in the value's unit) for
 * values that are differences near zero. */
#define REL_TOL 1e-6
#define ABS_TOL 1e-9

static an_series_result *analyse(const an_image *v, int n)
{
    an_model m;
    an_model_large(&m);
    an_tolerance t;
    an_tolerance_default(&t);
    an_params pa;
    an_params_default(&pa);
    an_series_result *r = malloc(sizeof *r);
    cr_assert_not_null(r);
    sw_error e = {0};
    cr_assert_eq(an_analyze_series(v, n, &m, &t, &pa, r, &e), SW_OK, "%s", e.msg);
    return r;
}

static void check_variants(const sim_params *p, const char *what)
{
    sim_series *s = NULL;
    sw_error e = {0};
    cr_assert_eq(sim_series_render(p, &s, &e), SW_OK, "%s", e.msg);
    an_image v[AN_MAX_IMAGES];
    int n = 0;
    for (int i = 0; i < s->n_images; i++)
        if (s->echo[i] == 1)
            sim_image_view(s, i, &v[n++]);
    an_series_result *ref = analyse(v, n);
    cr_assert(ref->thickness.measured, "%s: %s", what, ref->thickness.reason);
    cr_assert(ref->position[0].measured && ref->position[1].measured, "%s", what);
    vals a, b;
    collect(ref, &a);
    float *px[AN_MAX_IMAGES];
    for (int kind = 0; kind < V_N; kind++) {
        an_image w[AN_MAX_IMAGES];
        for (int i = 0; i < n; i++) {
            px[i] = malloc(sizeof(float) * (size_t)v[i].width * v[i].height);
            cr_assert_not_null(px[i]);
            variant(&v[i], px[i], &w[i], kind);
        }
        an_series_result *r = analyse(w, n);
        collect(r, &b);
        cr_assert_eq(a.n, b.n);
        char bad[1024] = "";
        size_t len = 0;
        int nbad = 0;
        for (int k = 0; k < a.n; k++) {
            double x = a.v[k], y = b.v[k];
            int ok = (isnan(x) && isnan(y)) ||
                     fabs(x - y) <= REL_TOL * 0.5 * (fabs(x) + fabs(y)) + ABS_TOL;
            if (!ok) {
                nbad++;
                if (len < sizeof bad - 80)
                    len += (size_t)snprintf(bad + len, sizeof bad - len, " %s %.9g vs %.9g;",
                                            a.name[k], x, y);
            }
        }
        cr_expect_eq(nbad, 0, "%s, %s: %d values differ:%s", what, VNAME[kind], nbad, bad);
        for (int i = 0; i < n; i++)
            cr_expect_eq(r->ordinal[i], ref->ordinal[i], "%s, %s: ordinal of image %d", what,
                         VNAME[kind], i);
        cr_expect_eq(r->verdict, ref->verdict, "%s, %s: verdict", what, VNAME[kind]);
        cr_expect_eq(r->thickness.measured, ref->thickness.measured);
        free(r);
        for (int i = 0; i < n; i++)
            free(px[i]);
    }
    free(ref);
    sim_series_free(s);
}

/* The case of tests/cli/test_analyze.py's reference series (SNR 50, rotation 2 degrees, tilt 1
 * degree about v, position error 1 mm + 0.5 %). */
Test(symmetry, cli_reference_case)
{
    sim_params p;
    sim_params_default(&p);
    p.snr = 50;
    p.pose.rot_deg = 2;
    p.pose.tilt_v_deg = 1;
    p.position_offset_mm = 1.0;
    p.position_scale = 0.005;
    p.seed = 7;
    check_variants(&p, "reference");
}

/* Off-centre, turned the other way, with receive shading, a thick Gaussian profile and a low SNR
 * (the strips near their noise): every step, including the shading correction and the Rician
 * levels, must be order-free. */
Test(symmetry, off_centre_shaded_low_snr)
{
    sim_params p;
    sim_params_default(&p);
    p.snr = 20;
    p.pose.rot_deg = -4;
    p.pose.du_mm = 13;
    p.pose.dv_mm = -9;
    p.pose.tilt_u_deg = 1.2;
    p.coil_shading = 0.3;
    p.profile.kind = SIM_PROFILE_GAUSS;
    p.profile.thickness_mm = 7;
    p.position_offset_mm = -1.3;
    p.seed = 31;
    check_variants(&p, "off-centre");
}
