/* wedges.c: the two dark bars under the bridge on a wedge slice: the bridge's lower edge (the bars'
 * top), each bar's place across, and each bar's end at the 50 % level of its own edge. */
#include <stdio.h> /* snprintf only: no I/O here */
#include <stdlib.h>
#include <string.h>

#include "an_int.h"

static double sd_at(double m, double sigma)
{
    if (!(sigma > 0))
        return NAN;
    return an_rice_sd(an_rice_invert(m, sigma), sigma);
}

/* Variance gain of the mean of samples i0..i1 of l. */
static double mean_ss(const an_line *l, int i0, int i1, double *g)
{
    if (i0 < 0)
        i0 = 0;
    if (i1 > l->n - 1)
        i1 = l->n - 1;
    if (i1 < i0)
        return NAN;
    for (int i = i0; i <= i1; i++)
        g[i - i0] = 1.0 / (i1 - i0 + 1);
    return an_line_weight_ss(l, i0, i1 - i0 + 1, g);
}

#define NMAX 1024
/* Across a bar its profile is the mean of bilinear samples 0.2 mm apart over the central 40 % of
 * its width: the bar's sides ring into its interior (Gibbs ringing of a 5 mm dark band between
 * fluid, rectified by the magnitude), by an amount that depends on where the sides fall on the
 * pixel grid and differs between the two bars, and a band nearer the sides, or samples sparse
 * enough to alias that ringing, carry it into the end's profile (docs/methods.md, section 8). */
#define BAR_OFF_STEP 0.2
#define BAR_BAND 0.2 /* half width of the band, as a fraction of the bar's width */

/* The 50 % level of an edge between plastic and fluid of level fl: half the fluid's signal above
 * the true zero, in signal space through the Rician model when the noise is known (M(M^-1(fl) / 2),
 * Rice), fl / 2 otherwise. The plastic gives no signal: what a magnitude image shows in it is the
 * noise floor and the rectified ringing of nearby edges, which differs between the two bars with
 * their places on the pixel grid and does not sit under the edge as an additive background
 * (docs/methods.md, section 8). *dldf is the level's derivative with respect to fl. */
static double half_level(double fl, double sigma, double *dldf)
{
    if (!(sigma > 0)) {
        *dldf = 0.5;
        return 0.5 * fl;
    }
    double l = an_rice_mean(0.5 * an_rice_invert(fl, sigma), sigma);
    double e = 1e-4 * fmax(fabs(fl), sigma);
    *dldf = (an_rice_mean(0.5 * an_rice_invert(fl + e, sigma), sigma) - l) / e;
    return l;
}

/* The bridge's lower edge at column u: walking up from the fluid under the bridge. Returns v or
 * NAN; *var its variance. */
static double bridge_edge(const an_image *im, const an_pose *pose, const an_model *m, double u,
                          double hw, double sigma, double *var, double *buf, double *g)
{
    /* from 15 mm below the bars' top: room for the fluid level (10 mm) under the edge */
    double v0 = m->bar_top_v - 15, v1 = m->bar_top_v + 0.5 * (m->bridge_v_max - m->bar_top_v);
    double step = 0.1;
    int n = (int)((v1 - v0) / step) + 1;
    if (n > NMAX || n < 50)
        return NAN;
    an_line l;
    an_line_init(&l, im, pose, u, v0, 0, 1, step, n);
    an_line_offsets(&l, hw, 0.5);
    if (an_line_sample(&l, buf))
        return NAN;
    double sm[NMAX];
    an_smooth(buf, n, 11, sm);
    double fl = an_mean_range(buf, n, 0, (int)(10 / step)),
           dk = an_mean_range(buf, n, n - (int)(3 / step), n - 1);
    if (!(fl - dk > 0.3 * fl))
        return NAN;
    double lev = 0.5 * (fl + dk);
    double gi = an_walk_cross(sm, n, 0, +1, lev, 1);
    if (!isfinite(gi))
        return NAN;
    /* Refine the fluid level below the found edge, then the crossing of half of it. */
    int e = (int)gi, f0 = e - (int)(10 / step), f1 = e - (int)(3 / step);
    if (f0 < 0)
        f0 = 0;
    if (f1 - f0 < (int)(2 / step))
        return NAN;
    fl = an_mean_range(buf, n, f0, f1);
    double dldf;
    lev = half_level(fl, sigma, &dldf);
    gi = an_walk_cross(sm, n, 0, +1, lev, 1);
    an_xing x;
    /* the pixel weights (for the variance) only when the noise is known; without the line the
     * fit works in samples */
    const an_line *lw = sigma > 0 ? &l : NULL;
    if (!isfinite(gi) || an_xing_find_in(lw, buf, 0, n - 1, gi, lev, lw ? 1.0 : 1.0 / step, -1, &x))
        return NAN;
    if (lw) {
        double sd = sd_at(lev, sigma), sdf = sd_at(fl, sigma);
        *var = (sd * sd * x.ss + dldf * dldf * sdf * sdf * mean_ss(&l, f0, f1, g)) /
               (x.slope * x.slope);
    } else {
        *var = NAN;
    }
    return v0 + x.idx * step;
}

/* One bar's end along -v at column u below the top; fills b. */
static int bar_end(const an_image *im, const an_pose *pose, double u, double hw, double top,
                   double reach, double sigma, an_bar *b, double *buf, double *g, double *var_end)
{
    double step = 0.1;
    /* reach grows with the file's SliceThickness: test it as a double before it becomes a count
     * (an absurd thickness such as 1e300 mm would overflow the int, which is undefined) */
    if (!(reach > 0))
        return -1;
    double nd = floor(reach / step) + 1;
    int n = nd > NMAX ? NMAX + 1 : (int)nd;
    if (n > NMAX)
        n = NMAX, step = reach / (n - 1);
    an_line l;
    an_line_init(&l, im, pose, u, top - 1.0, 0, -1, step, n);
    an_line_offsets(&l, hw, BAR_OFF_STEP);
    if (an_line_sample(&l, buf))
        return -1;
    b->profile.n = n;
    b->profile.start_mm = 1.0;
    b->profile.step_mm = step;
    for (int i = 0; i < n; i++)
        b->profile.v[i] = (float)buf[i];
    double sm[NMAX];
    an_smooth(buf, n, (int)(1.0 / step) | 1, sm);
    double dk = an_mean_range(buf, n, 0, (int)(4 / step)),
           fl = an_mean_range(buf, n, n - (int)(8 / step), n - 1);
    if (!(fl - dk > 0.3 * fl))
        return -1;
    double lev = 0.5 * (dk + fl);
    double e0 = an_walk_cross(sm, n, 0, +1, lev, 0);
    if (!isfinite(e0))
        return -1;
    double r25 = an_walk_cross(sm, n, 0, +1, dk + 0.25 * (fl - dk), 0);
    double r75 = an_walk_cross(sm, n, 0, +1, dk + 0.75 * (fl - dk), 0);
    double rise = isfinite(r25) && isfinite(r75) ? (r75 - r25) * step : 3.0;
    int ie = (int)e0, mg = (int)((1.5 * rise + 1.0) / step);
    int d0 = 0, d1 = ie - mg, f0 = ie + mg, f1 = ie + mg + (int)(8 / step);
    if (d1 - d0 < (int)(1 / step))
        d1 = d0 + (int)(1 / step);
    if (f1 > n - 1)
        f1 = n - 1;
    if (f1 - f0 < (int)(2 / step))
        return -1;
    dk = an_mean_range(buf, n, d0, d1);
    fl = an_mean_range(buf, n, f0, f1);
    double dldf;
    lev = half_level(fl, sigma, &dldf);
    double gi = an_walk_cross(sm, n, 0, +1, lev, 0);
    double h = fmin(fmax(0.6 * rise, 1.0), 4.0);
    an_xing x;
    if (!isfinite(gi) || an_xing_find(&l, buf, n, gi, lev, h, +1, &x))
        return -1;
    double vend = top - 1.0 - x.idx * step;
    double sdl = sd_at(lev, sigma), sdf = sd_at(fl, sigma);
    double vlev = dldf * dldf * sdf * sdf * mean_ss(&l, f0, f1, g);
    *var_end = (sdl * sdl * x.ss + vlev) / (x.slope * x.slope);
    b->level_lo = dk;
    b->level_hi = fl;
    an_pose_to_px(pose, u, vend, &b->end.x, &b->end.y);
    b->length_mm = top - vend;
    return 0;
}

/* The bridge's lower edge as a line v = a + b u (phantom mm): its crossing at columns 1 mm apart on
 * both sides of the bars (1 mm clear of the bars' outer edges and of the bridge's ends), each
 * averaged over +-0.4 mm, fitted by weighted least squares (points beyond 3 MADs of the first fit
 * dropped). Many columns, each crossing the pixel grid at its own place when the phantom is turned,
 * average the sub-pixel error of a sharp edge's crossing that two columns would keep. cov = the
 * covariance of (a, b): caa, cab, cbb (NAN without a noise estimate). Returns 0, or -1 when fewer
 * than three columns on either side give a crossing. */
#define BRIDGE_COLS 64
typedef struct bridge_line {
    double a, b, caa, cab, cbb;
    double mean, var_mean; /* weighted mean of the kept crossings and its variance */
} bridge_line;

static int bridge_fit(const an_image *im, const an_pose *pose, const an_model *m, double sigma,
                      bridge_line *bl, double *buf, double *g)
{
    double u[BRIDGE_COLS], v[BRIDGE_COLS], var[BRIDGE_COLS];
    int n = 0, side[2] = {0, 0};
    double ranges[2][2] = {{m->bridge_u_min + 1, m->bar_u_min[0] - 1},
                           {m->bar_u_max[1] + 1, m->bridge_u_max - 1}};
    for (int sd = 0; sd < 2; sd++)
        for (double uu = ranges[sd][0]; uu <= ranges[sd][1] + 1e-9 && n < BRIDGE_COLS; uu += 1.0) {
            double vr = NAN, e = bridge_edge(im, pose, m, uu, 0.4, sigma, &vr, buf, g);
            if (!isfinite(e))
                continue;
            u[n] = uu;
            v[n] = e;
            var[n] = vr;
            n++;
            side[sd]++;
        }
    if (side[0] < 3 || side[1] < 3)
        return -1;
    int weighted = 1;
    for (int i = 0; i < n; i++)
        weighted &= isfinite(var[i]) && var[i] > 0;
    unsigned char use[BRIDGE_COLS];
    memset(use, 1, sizeof use);
    for (int round = 0; round < 2; round++) {
        double S = 0, Su = 0, Suu = 0, Sv = 0, Suv = 0;
        for (int i = 0; i < n; i++) {
            if (!use[i])
                continue;
            double w = weighted ? 1 / var[i] : 1;
            S += w;
            Su += w * u[i];
            Suu += w * u[i] * u[i];
            Sv += w * v[i];
            Suv += w * u[i] * v[i];
        }
        double det = S * Suu - Su * Su;
        if (!(det > 0))
            return -1;
        bl->b = (S * Suv - Su * Sv) / det;
        bl->a = (Sv - bl->b * Su) / S;
        bl->caa = weighted ? Suu / det : NAN;
        bl->cab = weighted ? -Su / det : NAN;
        bl->cbb = weighted ? S / det : NAN;
        bl->mean = Sv / S;
        bl->var_mean = weighted ? 1 / S : NAN;
        if (round == 1)
            break;
        float ab[BRIDGE_COLS];
        for (int i = 0; i < n; i++)
            ab[i] = (float)fabs(v[i] - bl->a - bl->b * u[i]);
        /* At least 0.2 mm: on a sharp, noise-free edge the columns' crossings differ by the
         * ringing sampled at different grid phases (about 0.1 mm), which is no outlier. */
        double lim = fmax(3 * 1.4826 * an_median(ab, (size_t)n), 0.2);
        int keep[2] = {0, 0};
        for (int i = 0; i < n; i++) {
            use[i] = fabs(v[i] - bl->a - bl->b * u[i]) <= lim;
            keep[u[i] > 0] += use[i];
        }
        if (keep[0] < 3 || keep[1] < 3)
            return -1;
    }
    return 0;
}

int an_bridge_turn(const an_image *im, const an_pose *pose, const an_model *m, double *drot_deg)
{
    int rc = 0;
    double *buf = malloc(NMAX * sizeof *buf), *g = malloc(NMAX * sizeof *g);
    *drot_deg = NAN;
    if (!buf || !g) {
        rc = -1;
        goto out;
    }
    /* the line of an_bars_measure's bar tops; a lower edge that rises to the right is a phantom
     * turned further counter-clockwise */
    bridge_line bl;
    if (!bridge_fit(im, pose, m, NAN, &bl, buf, g))
        *drot_deg = atan(bl.b) * AN_DEG;
out:
    free(buf);
    free(g);
    return rc;
}

int an_bars_measure(const an_image *im, const an_pose *pose, const an_model *m, double sigma,
                    double nominal_mm, an_position *out, double *v_end_mm)
{
    int rc = 0;
    double *buf = malloc(NMAX * sizeof *buf), *g = malloc(NMAX * sizeof *g);
    an_bar *bars[2] = {&out->left, &out->right};
    for (int i = 0; i < 2; i++) {
        memset(bars[i], 0, sizeof *bars[i]);
        bars[i]->length_mm = bars[i]->unc_mm = bars[i]->level_hi = bars[i]->level_lo = NAN;
    }
    *v_end_mm = NAN;
    if (!buf || !g) {
        rc = -1;
        goto out;
    }
    /* Bar tops: the bridge's lower edge on both sides, outside the bars, one level for both bars:
     * the pose's rotation (from the insert's long edges, 140 mm long) is far better known than
     * the slope of this 21 mm baseline, whose sharp edge reads up to 0.1 mm apart in neighbouring
     * columns when the phantom is turned (Gibbs ringing, rectified by the magnitude, sampled
     * across the pixel grid): a slope would add that to the bar length difference, a common top
     * cancels from it. */
    bridge_line bl;
    if (bridge_fit(im, pose, m, sigma, &bl, buf, g)) {
        sw_strlcpy(out->reason, "bridge not found: no lower edge beside the bars",
                   sizeof out->reason);
        goto out;
    }
    double top_mid = bl.mean;
    /* Bars across: dark runs under the bridge, 4 mm below its edge. */
    double ua = m->bridge_u_min, ub = m->bridge_u_max, step = 0.1;
    int n = (int)((ub - ua) / step) + 1;
    if (n > NMAX) {
        sw_strlcpy(out->reason, "bars not found: bridge too wide", sizeof out->reason);
        goto out;
    }
    an_line l;
    an_line_init(&l, im, pose, ua, top_mid - 4.0, 1, 0, step, n);
    an_line_offsets(&l, 1.0, 0.5);
    if (an_line_sample(&l, buf)) {
        sw_strlcpy(out->reason, "bars not found: outside the image", sizeof out->reason);
        goto out;
    }
    double sm[NMAX];
    an_smooth(buf, n, 5, sm);
    double fl = 0.5 * (an_mean_range(buf, n, 0, (int)(3 / step)) +
                       an_mean_range(buf, n, n - 1 - (int)(3 / step), n - 1));
    double dk = INFINITY;
    for (int i = 0; i < n; i++)
        dk = fmin(dk, sm[i]);
    double lev = 0.5 * (fl + dk);
    int imid = (int)((0.5 * (m->bar_u_max[0] + m->bar_u_min[1]) - ua) / step);
    double outer[2], inner[2];
    outer[0] = an_walk_cross(sm, n, 0, +1, lev, 1);
    outer[1] = an_walk_cross(sm, n, n - 1, -1, lev, 1);
    /* The gap between the bars: its brightest sample, if it rises above the level. */
    int gs = imid - (int)(2 / step), ge = imid + (int)(2 / step), gm = imid;
    for (int i = gs; i <= ge; i++)
        if (i >= 0 && i < n && sm[i] > sm[gm])
            gm = i;
    if (sm[gm] > lev) {
        inner[0] = an_walk_cross(sm, n, gm, -1, lev, 1);
        inner[1] = an_walk_cross(sm, n, gm, +1, lev, 1);
    } else {
        inner[0] = inner[1] = gm;
    }
    double uc[2], wid[2];
    for (int s = 0; s < 2; s++) {
        if (!isfinite(outer[s]) || !isfinite(inner[s])) {
            snprintf(out->reason, sizeof out->reason, "bars not found: no %s bar under the bridge",
                     s ? "right" : "left");
            goto out;
        }
        uc[s] = ua + 0.5 * (outer[s] + inner[s]) * step;
        wid[s] = fabs(outer[s] - inner[s]) * step;
        if (!(wid[s] > 1.0)) {
            snprintf(out->reason, sizeof out->reason, "bars not found: %s bar too narrow",
                     s ? "right" : "left");
            goto out;
        }
    }
    /* Ends: each bar's own edge; the length from the common top. */
    double var_end[2], var_top[2], reach = m->bar_len0_mm + 3 * nominal_mm + 20;
    for (int s = 0; s < 2; s++) {
        double top = bl.mean;
        var_top[s] = bl.var_mean;
        double hw = fmax(0.25, BAR_BAND * wid[s]);
        an_pose_to_px(pose, uc[s], top, &bars[s]->top.x, &bars[s]->top.y);
        if (bar_end(im, pose, uc[s], hw, top, reach, sigma, bars[s], buf, g, &var_end[s])) {
            snprintf(out->reason, sizeof out->reason, "bar end not found: %s bar",
                     s ? "right" : "left");
            goto out;
        }
        bars[s]->unc_mm = sqrt(var_end[s] + var_top[s]);
        bars[s]->measured = 1;
    }
    out->bar_difference_mm = out->right.length_mm - out->left.length_mm;
    /* L_left = L0 + k d, L_right = L0 - k d: the difference is -2 k d */
    out->displacement_mm = -0.5 * out->bar_difference_mm / m->bar_face_slope;
    /* The two bars share their top, which cancels from the difference. */
    out->uncertainty_mm = sqrt(var_end[0] + var_end[1]);
    {
        double u, v0, v1;
        an_pose_to_ph(pose, out->left.end.x, out->left.end.y, &u, &v0);
        an_pose_to_ph(pose, out->right.end.x, out->right.end.y, &u, &v1);
        *v_end_mm = 0.5 * (v0 + v1);
    }
    out->measured = 1;
out:
    free(buf);
    free(g);
    return rc;
}
