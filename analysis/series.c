/* series.c: one series and echo from images in any order to the result: geometry, phantom on every
 * slice, the ramp and wedge slices by position and content, rotation, noise and SNR, thickness,
 * positions, the position model, pitch, and the verdicts. */
#include <stdio.h> /* snprintf only: no I/O here */
#include <stdlib.h>
#include <string.h>

#include "an_int.h"

static void set_reason(char *dst, const char *msg)
{
    sw_strlcpy(dst, msg, AN_REASON_MAX);
}

/* dst = a followed by b, cut to fit. */
static void reason2(char *dst, const char *a, const char *b)
{
    size_t k = sw_strlcpy(dst, a, AN_REASON_MAX);
    sw_strlcpy(dst + k, b, AN_REASON_MAX - k);
}

static void strip_clear(an_strip *s, const char *why)
{
    memset(s, 0, sizeof *s);
    s->length_mm = s->length_unc_mm = s->fwtm_mm = s->centre_u_mm = s->centre_unc_mm = NAN;
    s->plateau = s->plateau_sd = s->plateau_unc = s->half_level = s->floor = NAN;
    s->half_width_mm = s->cross_lo_mm = s->cross_hi_mm = NAN;
    set_reason(s->reason, why);
}

static void thickness_clear(an_thickness *t, const char *why)
{
    an_strip top = t->top, bottom = t->bottom;
    int keep = t->top.profile.n || t->bottom.profile.n;
    memset(t, 0, sizeof *t);
    if (keep) { /* keep the strips' own diagnosis and profiles for the report */
        t->top = top;
        t->bottom = bottom;
    } else {
        strip_clear(&t->top, why);
        strip_clear(&t->bottom, why);
    }
    t->slice = 0;
    t->image = -1;
    t->top_thickness_mm = t->bottom_thickness_mm = t->acr_mm = t->corrected_mm = NAN;
    t->tilt_deg = t->tilt_unc_deg = t->fwtm_mm = t->uncertainty_mm = NAN;
    t->nominal_mm = t->limit_lo_mm = t->limit_hi_mm = NAN;
    t->verdict = AN_UNMEASURABLE;
    set_reason(t->reason, why);
}

static void bar_clear(an_bar *b)
{
    memset(b, 0, sizeof *b);
    b->length_mm = b->unc_mm = b->level_hi = b->level_lo = NAN;
}

static void position_clear(an_position *p, const char *why)
{
    memset(p, 0, sizeof *p);
    bar_clear(&p->left);
    bar_clear(&p->right);
    p->image = -1;
    p->bar_difference_mm = p->displacement_mm = p->uncertainty_mm = NAN;
    p->ramp_displacement_mm = p->ramp_displacement_unc_mm = p->z_mm = p->limit_mm = NAN;
    p->verdict = AN_UNMEASURABLE;
    set_reason(p->reason, why);
}

static void result_init(an_series_result *r, int n)
{
    memset(r, 0, sizeof *r);
    r->n_images = n;
    for (int i = 0; i < AN_MAX_IMAGES; i++) {
        r->phantom[i].centre.x = r->phantom[i].centre.y = NAN;
        r->phantom[i].radius_mm = r->phantom[i].rotation_deg = NAN;
    }
    r->rotation_deg = r->noise_sd = r->snr = r->noise_corr = NAN;
    thickness_clear(&r->thickness, "not analysed");
    position_clear(&r->position[0], "not analysed");
    position_clear(&r->position[1], "not analysed");
    r->position_model.offset_mm = r->position_model.scale_percent = NAN;
    r->position_model.offset_unc_mm = r->position_model.scale_unc_percent = NAN;
    r->pitch_deg = r->pitch_unc_deg = NAN;
    r->verdict = AN_UNMEASURABLE;
}

/* Every part unmeasurable for one reason (the series as a whole could not be placed). */
static void all_unmeasurable(an_series_result *r, const char *why)
{
    thickness_clear(&r->thickness, why);
    position_clear(&r->position[0], why);
    position_clear(&r->position[1], why);
    set_reason(r->reason, why);
}

/* Darkness of the bridge (1 - bridge / fluid below the bars) at a pose; NAN when not sampled. */
static double bridge_score(const an_image *im, const an_pose *p, const an_model *m)
{
    double dk = 0, fl = 0;
    int nd = 0, nf = 0;
    for (double u = m->bridge_u_min + 3; u <= m->bridge_u_max - 3; u += 1.0) {
        for (double v = m->bridge_v_min + 3; v <= m->bridge_v_max - 4; v += 1.0) {
            double x, y;
            an_pose_to_px(p, u, v, &x, &y);
            double s = an_bilinear(im, x, y);
            if (isfinite(s))
                dk += s, nd++;
        }
        /* the fluid 10 to 20 mm below the bars' ends at the vertex */
        double vf = m->bar_top_v - m->bar_len0_mm;
        for (double v = vf - 20; v <= vf - 10; v += 1.0) {
            double x, y;
            an_pose_to_px(p, u, v, &x, &y);
            double s = an_bilinear(im, x, y);
            if (isfinite(s))
                fl += s, nf++;
        }
    }
    if (!nd || !nf || !(fl > 0))
        return NAN;
    return 1 - (dk / nd) / (fl / nf);
}

/* The rotation (degrees) at which the bridge region is darkest on the images k[0..nk), each posed
 * on its own disc: a scan of the full turn in 2-degree steps, then 0.2-degree steps around the
 * best. Returns the least of the images' scores there (NAN when the bridge is never sampled). */
static double bridge_search(const an_image *imgs, const an_geom *geo, const an_disc *disc,
                            const int *k, int nk, const an_model *m, double *rot)
{
    double best = -INFINITY, brot = 0;
    for (int pass = 0; pass < 2; pass++) {
        double c = brot, st = pass ? 0.2 : 2.0;
        int nstep = pass ? 21 : 180;
        for (int i = 0; i < nstep; i++) {
            double r = pass ? c + (i - 10) * st : i * st, sum = 0;
            int ok = 1;
            for (int q = 0; q < nk && ok; q++) {
                an_pose p;
                an_pose_make(&geo[k[q]], disc[k[q]].xc, disc[k[q]].yc, r, &p);
                double sb = bridge_score(&imgs[k[q]], &p, m);
                ok = isfinite(sb);
                sum += sb;
            }
            if (ok && sum > best) {
                best = sum;
                brot = r;
            }
        }
    }
    if (!isfinite(best))
        return NAN;
    double least = INFINITY;
    for (int q = 0; q < nk; q++) {
        an_pose p;
        an_pose_make(&geo[k[q]], disc[k[q]].xc, disc[k[q]].yc, brot, &p);
        least = fmin(least, bridge_score(&imgs[k[q]], &p, m));
    }
    *rot = brot;
    return least;
}

static an_verdict worst(an_verdict a, an_verdict b)
{
    return a > b ? a : b;
}

/* The phantom on image i, searched at most once per level (1: centre and radius from the mask; 2:
 * with the sub-pixel circle fit, which makes its own mask) and only when a step needs it; the
 * result's phantom fit follows the latest search. Returns -1 on allocation failure. */
static int disc_need(const an_image *imgs, int i, int lvl, const an_model *m, an_work *wk,
                     an_disc *disc, int *level, an_series_result *out)
{
    if (level[i] >= lvl)
        return 0;
    if (an_find_disc(&imgs[i], m, lvl >= 2, wk, &disc[i]))
        return -1;
    level[i] = lvl;
    an_phantom_fit *pf = &out->phantom[i];
    pf->searched = 1;
    pf->found = disc[i].found;
    pf->centre.x = disc[i].found ? disc[i].xc : NAN;
    pf->centre.y = disc[i].found ? disc[i].yc : NAN;
    pf->radius_mm = disc[i].found ? disc[i].r_mm : NAN;
    return 0;
}

/* Slice 1 of a pair of wedge slices a, b without the ramps to tell: w toward the last slice is +z
 * of the patient frame for a phantom lying head first, -z feet first (phantom-large.md), so slice
 * 1 is the inferior one head first. Without geometry or for a stack whose normal is far from the
 * patient's z axis, the first in the given order. Sets *first, *other and *wsign. */
static void order_by_patient_frame(const an_image *imgs, const an_geom *geo, int has_geo, int a,
                                   int b, int *first, int *other, int *wsign)
{
    *first = a;
    *other = b;
    if (has_geo && fabs(geo[a].n[2]) > 0.5) {
        double dz = (geo[b].z_n - geo[a].z_n) * geo[a].n[2]; /* patient z of b minus a's */
        int a_first = imgs[a].feet_first ? dz < 0 : dz > 0;
        *first = a_first ? a : b;
        *other = a_first ? b : a;
    }
    *wsign = !has_geo || geo[*other].z_n >= geo[*first].z_n ? 1 : -1;
}

/* The median spacing along the normal between neighbours of the stack in order (gaps under
 * 1 micrometre, repeated positions, left out); 0 without geometry or without a gap. */
static double median_gap(const an_geom *geo, const int *order, int n, int has_geo)
{
    float gf[AN_MAX_IMAGES];
    int ng = 0;
    for (int k = 1; k < n && has_geo; k++) {
        double dz = fabs(geo[order[k]].z_n - geo[order[k - 1]].z_n);
        if (dz > 1e-3)
            gf[ng++] = (float)dz;
    }
    return ng ? an_median(gf, (size_t)ng) : 0;
}

/* Without a ramp slice the wedges may still be there (a phantom without its thickness insert, or
 * one whose insert is damaged): the wedge slices are two images the wedges' distance apart (the
 * ends of a standard stack) that both show the bridge at one rotation; when several pairs do (a
 * stack longer than the wedges' distance), the pair whose bars are the most nearly equal, as they
 * are at the wedges' vertices. The rotation comes from the bridge (a scan of the full turn, then
 * the slope of its lower edge beside the bars). On success *first (slice 1), *other, *wsign and
 * *rot are set and geo is remade with *wsign; *first is -1 when no pair qualifies. Returns -1 on
 * allocation failure. */
static int find_wedge_slices(const an_image *imgs, int n, const int *order, int has_geo,
                             const an_model *m, an_work *wk, an_geom *geo, an_disc *disc,
                             int *level, an_series_result *out, int *first, int *other, int *wsign,
                             double *rot)
{
    int rc = 0;
    an_position *pos = NULL;
    an_geom g2[2];
    *first = *other = -1;
    if (!m->has_wedges || n < 2)
        return 0;
    double gap = median_gap(geo, order, n, has_geo);
    double dist = fabs(m->wedge_w[1] - m->wedge_w[0]), tol = fmax(2.0, 0.3 * gap);
    double best_bld = INFINITY;
    for (int ka = 0; ka < n; ka++)
        for (int kb = n - 1; kb > ka; kb--) {
            int a = order[ka], b = order[kb];
            int ends = ka == 0 && kb == n - 1;
            if (has_geo ? fabs(fabs(geo[b].z_n - geo[a].z_n) - dist) > tol : !ends)
                continue;
            int pr[2] = {a, b};
            int bad = 0;
            for (int q = 0; q < 2 && !bad; q++) {
                if (disc_need(imgs, pr[q], 2, m, wk, disc, level, out)) {
                    rc = -1;
                    goto out;
                }
                bad = !disc[pr[q]].found;
            }
            if (bad)
                continue;
            int f, o, ws;
            order_by_patient_frame(imgs, geo, has_geo, a, b, &f, &o, &ws);
            int k2[2] = {f, o};
            an_geom gg[AN_MAX_IMAGES];
            for (int q = 0; q < 2; q++)
                if (an_geom_make(&imgs[k2[q]], ws, &gg[k2[q]]))
                    bad = 1;
            double r = 0;
            if (bad || !(bridge_search(imgs, gg, disc, k2, 2, m, &r) > 0.5))
                continue;
            /* the bridge's lower edge: two rounds, the mean of both slices */
            for (int it = 0; it < 2; it++) {
                double dsum = 0;
                int dn = 0;
                for (int q = 0; q < 2; q++) {
                    an_pose p;
                    an_pose_make(&gg[k2[q]], disc[k2[q]].xc, disc[k2[q]].yc, r, &p);
                    double dr;
                    if (an_bridge_turn(&imgs[k2[q]], &p, m, &dr)) {
                        rc = -1;
                        goto out;
                    }
                    if (isfinite(dr) && fabs(dr) < 5) {
                        dsum += dr;
                        dn++;
                    }
                }
                if (dn)
                    r += dsum / dn;
            }
            double bld = 0;
            if (*first >= 0 || !(ka == 0 && kb == n - 1)) {
                /* more than one pair may qualify: the bars tell the vertex planes */
                if (!pos && !(pos = malloc(sizeof *pos))) {
                    rc = -1;
                    goto out;
                }
                for (int q = 0; q < 2 && isfinite(bld); q++) {
                    an_pose p;
                    an_pose_make(&gg[k2[q]], disc[k2[q]].xc, disc[k2[q]].yc, r, &p);
                    double ve;
                    if (an_bars_measure(&imgs[k2[q]], &p, m, NAN, m->nominal_thickness_mm, pos,
                                        &ve)) {
                        rc = -1;
                        goto out;
                    }
                    bld = pos->measured ? fmax(bld, fabs(pos->bar_difference_mm)) : NAN;
                }
                if (!isfinite(bld))
                    continue;
            }
            if (*first < 0 || bld < best_bld) {
                best_bld = bld;
                *first = f;
                *other = o;
                *wsign = ws;
                *rot = r;
                g2[0] = gg[f];
                g2[1] = gg[o];
            }
        }
    if (*first >= 0) {
        for (int k = 0; k < n; k++)
            an_geom_make(&imgs[k], *wsign, &geo[k]);
        double r = fmod(*rot, 360.0);
        *rot = r > 180 ? r - 360 : r <= -180 ? r + 360 : r;
    }
    (void)g2;
out:
    free(pos);
    return rc;
}

/* Numerical partial derivatives of the thickness formulas. */
static double corrected(double a, double b, double tphi, int crossed, double tt)
{
    return crossed ? an_corrected_thickness(a, b, tphi) : a * tt;
}

static void measure_thickness(const an_image *im, const an_pose *pose, const an_insert *ins,
                              const an_model *m, const an_params *par, double sigma,
                              an_thickness *t, int *fail_alloc)
{
    int crossed = m->method == AN_METHOD_CROSSED_RAMPS;
    *fail_alloc = 0;
    if (m->method == AN_METHOD_SINGLE_WEDGE) {
        if (an_wedge_edge_measure(im, pose, ins, sigma, par, &t->top)) {
            *fail_alloc = 1;
            return;
        }
    } else if (an_strip_measure(im, pose, ins, 0, sigma, par, &t->top)) {
        *fail_alloc = 1;
        return;
    }
    if (crossed && an_strip_measure(im, pose, ins, 1, sigma, par, &t->bottom)) {
        *fail_alloc = 1;
        return;
    }
    if (!crossed)
        strip_clear(&t->bottom, "single-ramp or wedge method: no second strip");
    if (!t->top.measured || (crossed && !t->bottom.measured)) {
        const char *why = !t->top.measured ? t->top.reason : t->bottom.reason;
        reason2(t->reason, crossed ? (!t->top.measured ? "top: " : "bottom: ") : "", why);
        return;
    }
    double tt = m->method == AN_METHOD_SINGLE_WEDGE ? m->wedge_slope : fabs(m->ramp[0].slope);
    double tb = crossed ? fabs(m->ramp[1].slope) : tt;
    double th_t = atan(tt), th_b = atan(tb), tphi = tan(th_t + th_b);
    double a = t->top.length_mm, b = crossed ? t->bottom.length_mm : NAN;
    double sa = t->top.length_unc_mm, sbb = crossed ? t->bottom.length_unc_mm : 0;
    if (par->slot_correction && m->slot_mm > 0) {
        /* The slot (thickness s along the normal) is a box of width k = s / tan(angle) along each
         * strip, the angle the strip's own (T / L); its widening of the FWHM is kappa k^2 with the
         * curvature term of the strip's two crossings (an_strip.slot_kappa_per_mm). Two passes, as
         * T depends on the corrected lengths. A flat-sided (trapezoidal) edge has no curvature at
         * its half level and gets no correction; a Gaussian-like one gets its quadrature widening.
         */
        double a0 = a, b0 = b;
        for (int pass = 0; pass < 2; pass++) {
            double T0 = crossed ? an_corrected_thickness(a, b, tphi) : a * tt;
            if (!(T0 > 0))
                break;
            double ka = m->slot_mm * a / T0, kb = crossed ? m->slot_mm * b / T0 : 0;
            if (isfinite(t->top.slot_kappa_per_mm))
                a = a0 + t->top.slot_kappa_per_mm * ka * ka;
            if (crossed && isfinite(t->bottom.slot_kappa_per_mm))
                b = b0 + t->bottom.slot_kappa_per_mm * kb * kb;
        }
    }
    t->top_thickness_mm = a * tt;
    t->bottom_thickness_mm = crossed ? b * tb : NAN;
    double T = corrected(a, b, tphi, crossed, tt);
    t->corrected_mm = T;
    t->acr_mm = crossed ? an_acr_thickness(a, b, tt) : NAN;
    double ea = 1e-4 * a, eb = crossed ? 1e-4 * b : 0;
    double dTa =
        (corrected(a + ea, b, tphi, crossed, tt) - corrected(a - ea, b, tphi, crossed, tt)) /
        (2 * ea);
    double dTb =
        crossed
            ? (corrected(a, b + eb, tphi, crossed, tt) - corrected(a, b - eb, tphi, crossed, tt)) /
                  (2 * eb)
            : 0;
    t->uncertainty_mm = sqrt(dTa * dTa * sa * sa + dTb * dTb * sbb * sbb);
    if (crossed) {
        /* Tilt about v, signed as phantom-large.md defines it by its effect on the image: a
         * positive tilt lowers the top ramp's angle to the slice, so the top strip gets longer. */
#define TILT(A, B) ((th_t - atan(corrected((A), (B), tphi, 1, tt) / (A))) * AN_DEG)
        t->tilt_deg = TILT(a, b);
        double g1 = (TILT(a + ea, b) - TILT(a - ea, b)) / (2 * ea);
        double g2 = (TILT(a, b + eb) - TILT(a, b - eb)) / (2 * eb);
#undef TILT
        t->tilt_unc_deg = sqrt(g1 * g1 * sa * sa + g2 * g2 * sbb * sbb);
    } else {
        t->tilt_deg = t->tilt_unc_deg = NAN;
    }
    /* FWTM along the normal: each strip's FWTM mapped by its own effective angle (T / L), the
     * mean of the two, or the one strip's whose tenth-level points both lie inside the insert. */
    double ft = t->top.fwtm_mm * T / a, fb = crossed ? t->bottom.fwtm_mm * T / b : NAN;
    t->fwtm_mm = isfinite(ft) && isfinite(fb) ? 0.5 * (ft + fb) : isfinite(ft) ? ft : fb;
    /* The slice profile: both strips mapped to the normal (z toward slice 11) and averaged, each
     * only over its samples inside the insert (clear of its ends' blur: beyond them the sampled
     * line reaches the fluid past the insert); NAN where neither strip reaches. The single-wedge
     * method's profile is an edge response, not a slice profile: no zprofile (n = 0). */
    if (m->method != AN_METHOD_SINGLE_WEDGE) {
        const an_strip *st[2] = {&t->top, &t->bottom};
        double sg[2] = {m->ramp[0].slope >= 0 ? 1 : -1, crossed && m->ramp[1].slope < 0 ? -1 : 1};
        double kk[2] = {T / a, crossed ? T / b : NAN};
        int ns = crossed ? 2 : 1;
        double zmax = 1.5 * T, dz = 0;
        for (int i = 0; i < ns; i++)
            dz = fmax(dz, st[i]->profile.step_mm * kk[i]);
        int nz = (int)(2 * zmax / dz) + 1;
        if (nz > AN_PROFILE_MAX)
            nz = AN_PROFILE_MAX, dz = 2 * zmax / (nz - 1);
        an_profile *zp = &t->zprofile;
        zp->n = nz;
        zp->start_mm = -zmax;
        zp->step_mm = dz;
        for (int j = 0; j < nz; j++) {
            double z = -zmax + j * dz, s = 0;
            int c = 0;
            for (int i = 0; i < ns; i++) {
                const an_strip *q = st[i];
                double base =
                    par->half_level == AN_HALF_BACKGROUND && isfinite(q->floor) ? q->floor : 0;
                double u = q->centre_u_mm + sg[i] * z / kk[i];
                double f = (u - q->profile.start_mm) / q->profile.step_mm;
                int i0 = (int)floor(f);
                if (i0 < q->inside_lo || i0 + 1 > q->inside_hi)
                    continue;
                double fr = f - i0, val = (1 - fr) * q->profile.v[i0] + fr * q->profile.v[i0 + 1];
                s += (val - base) / (q->plateau - base);
                c++;
            }
            zp->v[j] = c ? (float)(s / c) : NAN;
        }
    }
    t->measured = 1;
    if (!crossed)
        return;
}

sw_status an_analyze_series(const an_image *imgs, int n, const an_model *model,
                            const an_tolerance *tol, const an_params *params, an_series_result *out,
                            sw_error *err)
{
    sw_status st = SW_OK;
    an_work wk = {0};
    float *scratch = NULL;
    an_geom geo[AN_MAX_IMAGES];
    an_disc disc[AN_MAX_IMAGES];
    int order[AN_MAX_IMAGES];

    if (!imgs || !model || !tol || !params || !out || n < 1 || n > AN_MAX_IMAGES)
        return sw_error_set(err, SW_EINVAL, "analysis: bad arguments (%d images)", n);
    for (int i = 0; i < n; i++)
        if (!imgs[i].px || imgs[i].width < 1 || imgs[i].height < 1 ||
            imgs[i].stride < imgs[i].width)
            return sw_error_set(err, SW_EINVAL, "analysis: image %d has no valid pixel view", i);
    st = an_model_check(model, err);
    if (st != SW_OK)
        return st;
    result_init(out, n);

    size_t maxpx = 0;
    for (int i = 0; i < n; i++) {
        size_t np;
        if (sw_mul_size((size_t)imgs[i].width, (size_t)imgs[i].height, &np))
            return sw_error_set(err, SW_EINVAL, "analysis: image %d is too large", i);
        if (np > maxpx)
            maxpx = np;
    }
    size_t sbytes;
    if (sw_mul_size(maxpx, sizeof(float), &sbytes) || !(scratch = malloc(sbytes)) ||
        an_work_reserve(&wk, maxpx)) {
        st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory for %zu pixels", maxpx);
        goto out;
    }

    /* 1. Geometry: one plane orientation for the whole series. */
    int has_geo = 1;
    for (int i = 0; i < n; i++) {
        if (an_geom_make(&imgs[i], +1, &geo[i])) {
            all_unmeasurable(out, "slice not found: degenerate ImageOrientationPatient");
            goto verdicts;
        }
        has_geo &= geo[i].has_geometry;
    }
    if (has_geo)
        for (int i = 1; i < n; i++)
            if (fabs(geo[i].n[0] * geo[0].n[0] + geo[i].n[1] * geo[0].n[1] +
                     geo[i].n[2] * geo[0].n[2]) < 0.9998) {
                all_unmeasurable(out, "slice not found: the images are not parallel slices");
                goto verdicts;
            }
    /* 2. Order along the normal (input order without geometry). */
    for (int i = 0; i < n; i++)
        order[i] = i;
    if (has_geo)
        for (int i = 1; i < n; i++)
            for (int j = i; j > 0 && geo[order[j]].z_n < geo[order[j - 1]].z_n; j--) {
                int t = order[j];
                order[j] = order[j - 1];
                order[j - 1] = t;
            }
    /* 3. The phantom, on the slices that need it: the two ends of the stack (the candidates for the
     * wedge and ramp slices) with the full sub-pixel circle fit; the others when a step below
     * uses them (a uniform slice for the SNR, interior candidates). Without a phantom on either
     * end, the first slice in order that has one shows that the series holds a phantom at all. */
    int level[AN_MAX_IMAGES] = {0}, nfound = 0;
    for (int e = 0; e < (n > 1 ? 2 : 1); e++) {
        int i = e == 0 ? order[0] : order[n - 1];
        if (disc_need(imgs, i, 2, model, &wk, disc, level, out)) {
            st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
            goto out;
        }
        nfound += disc[i].found;
    }
    for (int k = 1; k < n - 1 && !nfound; k++) {
        if (disc_need(imgs, order[k], 1, model, &wk, disc, level, out)) {
            st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
            goto out;
        }
        nfound += disc[order[k]].found;
    }
    if (nfound == 0) {
        all_unmeasurable(out,
                         disc[order[0]].reason[0] ? disc[order[0]].reason : "phantom not found");
        goto verdicts;
    }
    /* 4. The ramp slice: the end of the stack that holds the insert with its strips. The ends are
     * screened by the dark region near the centre (an elongated block of about the insert's area);
     * the full insert search (edges, ends, strips) then runs in the final frame of the candidate.
     */
    int ends[2] = {order[0], order[n - 1]}, nends = n > 1 ? 2 : 1, ramp = -1, other = -1, wsign = 1;
    int cand[AN_MAX_IMAGES], ncand = 0;
    an_insert ins;
    memset(&ins, 0, sizeof ins);
    char why[AN_REASON_MAX] = "ramp slice not found: no insert at either end of the stack";
    double area_model =
        (model->insert_u_max - model->insert_u_min) * (model->insert_v_max - model->insert_v_min);
    double elong[AN_MAX_IMAGES];
    /* The ends first (the standard series), then, should neither hold the insert, any slice (a
     * stack that runs past the wedges); within each group the most elongated dark region first.
     * The other slices are screened only when no end holds the insert. */
    for (int pass = 0; pass < 2 && ramp < 0; pass++) {
        int c0 = ncand;
        for (int k = 0; k < n; k++) {
            int i = order[k], is_end = i == ends[0] || i == ends[nends - 1];
            if (pass == 0 ? !is_end : is_end)
                continue;
            double ang, el, area, off;
            if (disc_need(imgs, i, 1, model, &wk, disc, level, out)) {
                st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
                goto out;
            }
            int da = disc[i].found
                         ? an_dark_axis(&imgs[i], &geo[i], &disc[i], &ang, &el, &area, &off)
                         : -1;
            if (da == -2) {
                st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
                goto out;
            }
            if (da || el < 2.5 ||
                area < 0.25 * area_model || area > 3 * area_model || off > 0.25 * disc[i].r_mm)
                continue;
            int j = ncand++;
            for (; j > c0 && elong[j - 1] < el; j--) {
                elong[j] = elong[j - 1];
                cand[j] = cand[j - 1];
            }
            elong[j] = el;
            cand[j] = i;
        }
        for (int c = c0; c < ncand && ramp < 0; c++) {
            int i = cand[c];
            /* An interior slice can hold the ramps only when the stack runs past the phantom's
             * standard series: the model's slices must fit between it and the far end. A
             * neighbour of the ramp slice that cuts the insert's end otherwise passes for it and
             * shifts every ordinal by one (seen on tilted phantoms at coarse matrices). */
            if (i != ends[0] && i != ends[nends - 1]) {
                int rank = 0;
                for (int k = 0; k < n; k++)
                    if (order[k] == i)
                        rank = k;
                int beyond = rank > n - 1 - rank ? rank : n - 1 - rank;
                if (n <= model->n_slices || beyond < model->n_slices - 1)
                    continue;
            }
            /* the other wedge slice lies toward the far end of the stack */
            int oth = -1;
            if (nends == 2)
                oth = i == ends[0]   ? ends[1]
                      : i == ends[1] ? ends[0]
                      : !has_geo     ? ends[1]
                      : fabs(geo[ends[1]].z_n - geo[i].z_n) >= fabs(geo[ends[0]].z_n - geo[i].z_n)
                          ? ends[1]
                          : ends[0];
            /* an interior candidate gets the full circle fit too */
            if (i != ends[0] && i != ends[nends - 1]) {
                if (disc_need(imgs, i, 2, model, &wk, disc, level, out)) {
                    st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
                    goto out;
                }
                if (!disc[i].found)
                    continue;
            }
            /* 5. w toward slice 11: the ramp slice is slice 1 whatever the patient orientation. */
            wsign = oth >= 0 && has_geo && geo[i].z_n > geo[oth].z_n ? -1 : 1;
            for (int k = 0; k < n; k++)
                an_geom_make(&imgs[k], wsign, &geo[k]);
            /* 6. Rotation: the insert's axis (modulo 180 degrees), the bridge telling up from down,
             * then the long edges. */
            double ang, el, area, off;
            int da = an_dark_axis(&imgs[i], &geo[i], &disc[i], &ang, &el, &area, &off);
            if (da == -2) {
                st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
                goto out;
            }
            if (da)
                ang = 0;
            double sc[2] = {0, 0};
            for (int f = 0; f < 2; f++) {
                int ims[2] = {i, oth};
                for (int q = 0; q < 2; q++) {
                    int k = ims[q];
                    if (k < 0 || !disc[k].found || !model->has_wedges)
                        continue;
                    an_pose p;
                    an_pose_make(&geo[k], disc[k].xc, disc[k].yc, ang + 180.0 * f, &p);
                    double sb = bridge_score(&imgs[k], &p, model);
                    if (isfinite(sb))
                        sc[f] += sb;
                }
            }
            if (sc[1] > sc[0] + 0.2)
                ang += 180.0;
            if (an_insert_find(&imgs[i], &geo[i], &disc[i], model, ang, 1, &ins)) {
                st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
                goto out;
            }
            if (!ins.found) {
                reason2(why, "ramp slice not found: ", ins.reason);
                continue;
            }
            ramp = i;
            other = oth;
            double r = fmod(ins.rot_deg, 360.0);
            if (r > 180)
                r -= 360;
            if (r <= -180)
                r += 360;
            ins.rot_deg = r;
            out->rotation_deg = r;
        }
    }
    /* first: the image of slice 1 (the ramp slice, or without it a wedge slice) */
    int first = ramp;
    if (ramp < 0) {
        double rw = 0;
        if (find_wedge_slices(imgs, n, order, has_geo, model, &wk, geo, disc, level, out, &first,
                              &other, &wsign, &rw)) {
            st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
            goto out;
        }
        if (first >= 0) {
            out->rotation_deg = rw;
            out->order_from_patient_frame = 1;
            size_t k = strlen(why);
            snprintf(why + k, sizeof why - k, "; slice 1 of the wedges told by %s",
                     !has_geo || fabs(geo[first].n[2]) <= 0.5 ? "the stack's order"
                     : imgs[first].feet_first                 ? "the patient frame (feet first)"
                                                              : "the patient frame (head first)");
        } else {
            wsign = 1;
            for (int k = 0; k < n; k++)
                an_geom_make(&imgs[k], wsign, &geo[k]);
        }
    }
    /* Ordinals by position from the slice-1 end. */
    if (first >= 0) {
        double gap = median_gap(geo, order, n, has_geo);
        int rank_of_first = 0, rank_of_other = n - 1;
        for (int k = 0; k < n; k++) {
            if (order[k] == first)
                rank_of_first = k;
            if (order[k] == other)
                rank_of_other = k;
        }
        int dir = rank_of_other >= rank_of_first ? 1 : -1;
        for (int k = 0; k < n; k++) {
            int i = order[k], ord;
            if (gap > 0)
                ord = 1 + (int)lround(wsign * (geo[i].z_n - geo[first].z_n) / gap);
            else
                ord = 1 + dir * (k - rank_of_first);
            out->ordinal[i] = ord >= 1 && ord <= model->n_slices ? ord : 0;
        }
        /* The ramp slice (or without it the first wedge slice) is the model's ordinal for it;
         * shift the count when the model says so. */
        int base = ramp >= 0 ? model->ramp_slice : model->wedge_slice[0];
        if (base != 1)
            for (int i = 0; i < n; i++)
                if (out->ordinal[i])
                    out->ordinal[i] += base - 1;
    }
    for (int i = 0; i < n; i++) {
        an_phantom_fit *pf = &out->phantom[i];
        const double *d = geo[i].d;
        pf->transpose = fabs(d[1]) > fabs(d[0]);
        pf->flip_u = pf->transpose ? d[1] < 0 : d[0] < 0;
        pf->flip_v = pf->transpose ? d[2] > 0 : d[3] > 0;
        pf->rotation_deg = out->rotation_deg;
    }
    /* 7. Noise (air around slice 1 and a uniform slice) and SNR on a uniform slice. */
    {
        /* the uniform slice: nearest the middle of the series (the first image of a tie) among
         * those that show the phantom, searched nearest first */
        int uni = -1, mid = (model->n_slices + 1) / 2;
        unsigned char tried[AN_MAX_IMAGES] = {0};
        for (;;) {
            int best = 1 << 30, pick = -1;
            for (int i = 0; i < n; i++) {
                int o = out->ordinal[i];
                if (tried[i] || i == first || o == model->wedge_slice[0] ||
                    o == model->wedge_slice[1] || o == 0)
                    continue;
                if (abs(o - mid) < best) {
                    best = abs(o - mid);
                    pick = i;
                }
            }
            if (pick < 0)
                break;
            tried[pick] = 1;
            if (disc_need(imgs, pick, 1, model, &wk, disc, level, out)) {
                st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
                goto out;
            }
            if (disc[pick].found) {
                uni = pick;
                break;
            }
        }
        if (uni < 0)
            uni = other >= 0 && disc[other].found ? other : first >= 0 ? first : order[n / 2];
        if (disc_need(imgs, uni, 1, model, &wk, disc, level, out)) {
            st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
            goto out;
        }
        double s1 = first >= 0 ? an_noise_air(&imgs[first], &disc[first], scratch) : NAN;
        double s2 = disc[uni].found ? an_noise_air(&imgs[uni], &disc[uni], scratch) : NAN;
        double sig = isfinite(s1) && isfinite(s2) ? 0.5 * (s1 + s2) : isfinite(s1) ? s1 : s2;
        if (!isfinite(sig) && disc[uni].found)
            sig = an_noise_fluid(&imgs[uni], &disc[uni], scratch);
        out->noise_sd = sig;
        out->noise_corr = disc[uni].found ? an_noise_corr(&imgs[uni], &disc[uni]) : NAN;
        if (disc[uni].found) {
            double frac = uni == first || uni == other ? 0.55 : 0.75;
            double fm = an_fluid_mean(&imgs[uni], &disc[uni], frac, scratch);
            out->snr = sig > 0 ? fm / sig : NAN;
        }
    }
    /* 8. Thickness on the ramp slice. */
    if (ramp < 0) {
        thickness_clear(&out->thickness, why);
    } else {
        an_thickness *t = &out->thickness;
        thickness_clear(t, "not measured");
        t->slice = out->ordinal[ramp];
        t->image = ramp;
        an_pose pose;
        an_pose_make(&geo[ramp], disc[ramp].xc, disc[ramp].yc, ins.rot_deg, &pose);
        int fa;
        measure_thickness(&imgs[ramp], &pose, &ins, model, params, out->noise_sd, t, &fa);
        if (fa) {
            st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
            goto out;
        }
        double nom = imgs[ramp].nominal_thickness_mm;
        t->nominal_mm = isfinite(nom) && nom > 0 ? nom : model->nominal_thickness_mm;
        double f = tol->thickness_fail, w = tol->thickness_warn;
        if (tol->thickness_relative) {
            f *= t->nominal_mm;
            w *= t->nominal_mm;
        }
        t->limit_lo_mm = t->nominal_mm - f;
        t->limit_hi_mm = t->nominal_mm + f;
        if (t->measured) {
            double dv = fabs(t->corrected_mm - t->nominal_mm);
            t->verdict = dv > f ? AN_FAIL : dv > w ? AN_WARN : AN_PASS;
            t->reason[0] = '\0';
        } else {
            t->verdict = AN_UNMEASURABLE;
        }
    }
    /* 9. Slice position on both wedge slices (slice 1 first). */
    if (!model->has_wedges) {
        position_clear(&out->position[0], "the phantom model has no wedges");
        position_clear(&out->position[1], "the phantom model has no wedges");
    } else {
        for (int k = 0; k < 2; k++) {
            an_position *p = &out->position[k];
            int want = model->wedge_slice[k], img = -1;
            for (int i = 0; i < n && first >= 0; i++) {
                if (out->ordinal[i] != want)
                    continue;
                if (disc_need(imgs, i, 2, model, &wk, disc, level, out)) {
                    st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
                    goto out;
                }
                if (disc[i].found)
                    img = i;
            }
            if (first < 0) {
                position_clear(p, why);
                continue;
            }
            if (img < 0) {
                char b[AN_REASON_MAX];
                snprintf(b, sizeof b, "slice not found: no image at slice %d", want);
                position_clear(p, b);
                p->slice = want;
                continue;
            }
            position_clear(p, "not measured");
            p->slice = want;
            p->image = img;
            p->z_mm = has_geo ? wsign * geo[img].z_n : NAN;
            p->limit_mm = tol->bar_difference_fail;
            an_pose pose;
            an_pose_make(&geo[img], disc[img].xc, disc[img].yc, out->rotation_deg, &pose);
            double nom =
                isfinite(imgs[img].nominal_thickness_mm) && imgs[img].nominal_thickness_mm > 0
                    ? imgs[img].nominal_thickness_mm
                    : model->nominal_thickness_mm;
            double vend;
            if (an_bars_measure(&imgs[img], &pose, model, out->noise_sd, nom, p, &vend)) {
                st = sw_error_set(err, SW_ENOMEM, "analysis: out of memory");
                goto out;
            }
            if (p->measured) {
                double a = fabs(p->bar_difference_mm);
                p->verdict = a > tol->bar_difference_fail   ? AN_FAIL
                             : a > tol->bar_difference_warn ? AN_WARN
                                                            : AN_PASS;
                p->reason[0] = '\0';
            }
            /* 10. On the ramp slice: displacement from the strip centres, and the pitch that
             * explains a disagreement with the wedges (the bar ends sit at v_end, the strips near v
             * = 0). */
            const an_thickness *t = &out->thickness;
            if (img == ramp && t->measured && model->method == AN_METHOD_CROSSED_RAMPS) {
                double s = t->top.centre_u_mm - t->bottom.centre_u_mm, a = t->top.length_mm;
                double b = t->bottom.length_mm, T = t->corrected_mm;
                double sg = model->ramp[0].slope >= 0 ? 1 : -1;
                p->ramp_displacement_mm = sg * s * T / (a + b);
                double vs = t->top.centre_unc_mm * t->top.centre_unc_mm +
                            t->bottom.centre_unc_mm * t->bottom.centre_unc_mm;
                double k1 = T / (a + b), dT = t->uncertainty_mm;
                p->ramp_displacement_unc_mm =
                    sqrt(k1 * k1 * vs + pow(s / (a + b) * dT, 2) +
                         pow(s * T / ((a + b) * (a + b)), 2) *
                             (pow(t->top.length_unc_mm, 2) + pow(t->bottom.length_unc_mm, 2)));
                /* A pitch p makes the slice meet the phantom at w = d - v tan p: the bar ends (at
                 * v_end) report d - v_end tan p; the strips (at +-h) report d + h tan p (b - a) /
                 * (a + b) through the formula above, which is exact in d only without tilt about v.
                 */
                double hs = 0.5 * (ins.strip_v[0] - ins.strip_v[1]);
                double den = isfinite(vend) ? vend + hs * (b - a) / (a + b) : NAN;
                if (p->measured && isfinite(den) && fabs(den) > 10) {
                    double dd = p->ramp_displacement_mm - p->displacement_mm;
                    out->pitch_deg = atan(dd / den) * AN_DEG;
                    double sd =
                        sqrt(pow(p->ramp_displacement_unc_mm, 2) +
                             pow(0.5 * p->uncertainty_mm / model->bar_face_slope, 2));
                    out->pitch_unc_deg = sd / fabs(den) * AN_DEG;
                    out->pitch_measured = 1;
                }
            }
        }
        /* 11. Position model e(z) = offset + scale z from the two wedge slices. */
        const an_position *p0 = &out->position[0], *p1 = &out->position[1];
        if (p0->measured && p1->measured && isfinite(p0->z_mm) && isfinite(p1->z_mm) &&
            fabs(p1->z_mm - p0->z_mm) > 1) {
            an_position_model *pm = &out->position_model;
            double dz = p1->z_mm - p0->z_mm;
            double sc = (p1->displacement_mm - p0->displacement_mm) / dz;
            pm->scale_percent = 100 * sc;
            pm->offset_mm = p0->displacement_mm - sc * p0->z_mm;
            /* the displacements' uncertainties: d = -(difference) / (2 k) */
            double s0 = 0.5 * p0->uncertainty_mm / model->bar_face_slope,
                   s1 = 0.5 * p1->uncertainty_mm / model->bar_face_slope;
            pm->scale_unc_percent = 100 * sqrt(s0 * s0 + s1 * s1) / fabs(dz);
            /* offset = (d0 z1 - d1 z0) / dz */
            pm->offset_unc_mm = sqrt(pow(p1->z_mm * s0, 2) + pow(p0->z_mm * s1, 2)) / fabs(dz);
            pm->measured = 1;
        }
    }
    /* 11b. Correlated noise (k-space filters, zero-filled interpolation): the propagation above
     * treats pixels as independent; each uncertainty is a smooth weighted sum's, so it scales by
     * the square root of the measured variance factor (never below 1). */
    if (isfinite(out->noise_corr) && out->noise_corr > 1) {
        double k = sqrt(fmin(out->noise_corr, 25.0));
        an_thickness *t = &out->thickness;
        an_strip *st2[2] = {&t->top, &t->bottom};
        for (int q = 0; q < 2; q++) {
            st2[q]->length_unc_mm *= k;
            st2[q]->centre_unc_mm *= k;
            st2[q]->plateau_unc *= k;
        }
        t->uncertainty_mm *= k;
        t->tilt_unc_deg *= k;
        for (int q = 0; q < 2; q++) {
            an_position *p = &out->position[q];
            p->left.unc_mm *= k;
            p->right.unc_mm *= k;
            p->uncertainty_mm *= k;
            p->ramp_displacement_unc_mm *= k;
        }
        out->position_model.offset_unc_mm *= k;
        out->position_model.scale_unc_percent *= k;
        out->pitch_unc_deg *= k;
    }
    /* 12. Too little signal: nothing is trusted. */
    if (isfinite(out->snr) && out->snr < tol->min_snr) {
        char b[AN_REASON_MAX];
        snprintf(b, sizeof b, "SNR too low (%.1f < %.1f)", out->snr, tol->min_snr);
        int keep0 = out->position[0].slice, keep1 = out->position[1].slice;
        thickness_clear(&out->thickness, b);
        position_clear(&out->position[0], b);
        position_clear(&out->position[1], b);
        out->position[0].slice = keep0;
        out->position[1].slice = keep1;
        out->position_model.measured = 0;
        out->position_model.offset_mm = out->position_model.scale_percent = NAN;
        out->position_model.offset_unc_mm = out->position_model.scale_unc_percent = NAN;
        out->pitch_measured = 0;
        out->pitch_deg = out->pitch_unc_deg = NAN;
        set_reason(out->reason, b);
    }
verdicts:
    out->verdict = out->thickness.verdict;
    if (model->has_wedges)
        out->verdict =
            worst(out->verdict, worst(out->position[0].verdict, out->position[1].verdict));
    if (out->verdict == AN_UNMEASURABLE && !out->reason[0]) {
        const char *r = out->thickness.verdict == AN_UNMEASURABLE     ? out->thickness.reason
                        : out->position[0].verdict == AN_UNMEASURABLE ? out->position[0].reason
                                                                      : out->position[1].reason;
        set_reason(out->reason, r);
    }
out:
    an_work_free(&wk);
    free(scratch);
    return st;
}
