/* ramps.c: the thickness insert on the ramp slice: its rotation from the long edges, its ends, the
 * strips found inside it, and each strip's FWHM and FWTM with their uncertainties. */
#include <stdio.h> /* snprintf only: no I/O here */
#include <stdlib.h>
#include <string.h>

#include "an_int.h"

int an_dark_axis(const an_image *im, const an_geom *g, const an_disc *d, double *angle_deg,
                 double *elong, double *area_mm2, double *off_mm)
{
    if (!d->found)
        return -1;
    double col = im->col_mm > 0 ? im->col_mm : 1, row = im->row_mm > 0 ? im->row_mm : 1;
    double R = d->r_mm, lim = 0.5 * d->fluid;
    /* Two bands through the centre, one along each display axis (|b| < R / 2 and |a| < R / 2),
     * so that the wedges' bridge and bars near the rim stay out whatever the rotation. In each
     * band the largest connected dark region is taken (a phantom may hold other plastic near the
     * ramps, such as a resolution block of hole arrays beside the insert on the same slice: the
     * moments of all dark points together would describe neither); the band whose region is the
     * more elongated wins. */
    /* Samples on a lattice of pitch 2 centred on the image (an_lattice_t), each the mean of the
     * pixels around its point, so that the moments do not depend on the storage order; the
     * moments need no more than a quarter of the points. */
    int kx = an_lattice_k(im->width, 2), ky = an_lattice_k(im->height, 2);
    int jx0 = (int)fmax(-kx, floor((d->xc - R / col - an_lattice_t(im->width, 2, 0)) / 2));
    int jx1 = (int)fmin(kx, ceil((d->xc + R / col - an_lattice_t(im->width, 2, 0)) / 2));
    int jy0 = (int)fmax(-ky, floor((d->yc - R / row - an_lattice_t(im->height, 2, 0)) / 2));
    int jy1 = (int)fmin(ky, ceil((d->yc + R / row - an_lattice_t(im->height, 2, 0)) / 2));
    int nx = jx1 - jx0 + 1, ny = jy1 - jy0 + 1;
    /* the points' pixels along x: the same for every row */
    int xa[AN_LATTICE_MAX], xb[AN_LATTICE_MAX];
    if (nx > AN_LATTICE_MAX || nx <= 0 || ny <= 0 || ny > AN_LATTICE_MAX)
        return -1;
    size_t np = (size_t)nx * (size_t)ny;
    /* per point: bit k set when it is dark and inside band k; a, b its display coordinates */
    unsigned char *flag = calloc(np, 1);
    float *pa = malloc(np * sizeof *pa), *pb = malloc(np * sizeof *pb);
    int *stack = malloc(np * sizeof *stack);
    int rc = -2;
    if (!flag || !pa || !pb || !stack)
        goto out;
    for (int jx = jx0; jx <= jx1; jx++) {
        double tx = an_lattice_t(im->width, 2, jx);
        xa[jx - jx0] = (int)floor(tx);
        xb[jx - jx0] = (int)ceil(tx);
    }
    for (int jy = jy0; jy <= jy1; jy++) {
        double ty = an_lattice_t(im->height, 2, jy), dy = ty - d->yc;
        int ya = (int)floor(ty), yb = (int)ceil(ty);
        const float *r0 = im->px + (ptrdiff_t)ya * im->stride,
                    *r1 = im->px + (ptrdiff_t)yb * im->stride;
        for (int jx = jx0; jx <= jx1; jx++) {
            /* the pixels first: most points are fluid, brighter than the limit */
            int qa = xa[jx - jx0], qb = xb[jx - jx0];
            double val = 0.25 * ((double)r0[qa] + r0[qb] + r1[qa] + r1[qb]);
            if (!(val < lim))
                continue;
            double dx = an_lattice_t(im->width, 2, jx) - d->xc;
            double a = g->d[0] * dx + g->d[1] * dy, b = g->d[2] * dx + g->d[3] * dy;
            if (a * a + b * b > 0.64 * R * R)
                continue;
            size_t at = (size_t)(jy - jy0) * (size_t)nx + (size_t)(jx - jx0);
            pa[at] = (float)a;
            pb[at] = (float)b;
            for (int k = 0; k < 2; k++)
                if (fabs(k ? a : b) <= 0.5 * R)
                    flag[at] |= (unsigned char)(1u << k);
        }
    }
    int found = 0;
    for (int k = 0; k < 2; k++) {
        unsigned char bit = (unsigned char)(1u << k), seen = (unsigned char)(4u << k);
        double best[6] = {0};
        /* 4-connected regions of the band's dark points, by an explicit stack */
        for (size_t start = 0; start < np; start++) {
            if (!(flag[start] & bit) || (flag[start] & seen))
                continue;
            double q[6] = {0};
            int top = 0;
            stack[top++] = (int)start;
            flag[start] |= seen;
            while (top > 0) {
                int at = stack[--top], x = at % nx, y = at / nx;
                double a = pa[at], b = pb[at];
                q[0] += 1;
                q[1] += a;
                q[2] += b;
                q[3] += a * a;
                q[4] += b * b;
                q[5] += a * b;
                int nb[4] = {x > 0 ? at - 1 : -1, x < nx - 1 ? at + 1 : -1, y > 0 ? at - nx : -1,
                             y < ny - 1 ? at + nx : -1};
                for (int e = 0; e < 4; e++)
                    if (nb[e] >= 0 && (flag[nb[e]] & bit) && !(flag[nb[e]] & seen)) {
                        flag[nb[e]] |= seen;
                        stack[top++] = nb[e];
                    }
            }
            if (q[0] > best[0])
                memcpy(best, q, sizeof best);
        }
        double s0 = best[0];
        if (s0 < 10)
            continue;
        double ma = best[1] / s0, mb = best[2] / s0;
        double caa = best[3] / s0 - ma * ma, cbb = best[4] / s0 - mb * mb,
               cab = best[5] / s0 - ma * mb;
        double tr = caa + cbb, det = caa * cbb - cab * cab, disc = sqrt(fmax(0, tr * tr / 4 - det));
        double l1 = tr / 2 + disc, l2 = tr / 2 - disc;
        double el = l2 > 1e-9 ? sqrt(l1 / l2) : 1e9;
        if (found && el <= *elong)
            continue;
        *angle_deg = 0.5 * atan2(2 * cab, caa - cbb) * AN_DEG;
        *elong = el;
        *area_mm2 = 4 * s0 * col * row; /* each sample stands for four pixels */
        *off_mm = hypot(ma, mb);
        found = 1;
    }
    rc = found ? 0 : -1;
out:
    free(flag);
    free(pa);
    free(pb);
    free(stack);
    return rc;
}

/* Robust straight-line fit y = a + b x (two rounds of rejecting residuals above 3 MADs). */
static int line_fit(const double *x, const double *y, int n, double *a, double *b, double *sb,
                    double *rms)
{
    unsigned char use[256];
    if (n > 256)
        n = 256;
    for (int i = 0; i < n; i++)
        use[i] = isfinite(x[i]) && isfinite(y[i]);
    for (int round = 0; round < 3; round++) {
        double s0 = 0, sx = 0, sy = 0, sxx = 0, sxy = 0;
        for (int i = 0; i < n; i++)
            if (use[i]) {
                s0++;
                sx += x[i];
                sy += y[i];
                sxx += x[i] * x[i];
                sxy += x[i] * y[i];
            }
        double den = s0 * sxx - sx * sx;
        if (s0 < 5 || !(den > 0))
            return -1;
        *b = (s0 * sxy - sx * sy) / den;
        *a = (sy - *b * sx) / s0;
        float ab[256];
        int m = 0;
        double ss = 0;
        for (int i = 0; i < n; i++)
            if (use[i]) {
                double r = y[i] - *a - *b * x[i];
                ab[m++] = (float)fabs(r);
                ss += r * r;
            }
        *rms = sqrt(ss / (s0 > 2 ? s0 - 2 : 1));
        *sb = *rms * sqrt(s0 / den);
        if (round == 2)
            break;
        double lim = fmax(3 * 1.4826 * an_median(ab, (size_t)m), 0.3);
        for (int i = 0; i < n; i++)
            if (use[i] && fabs(y[i] - *a - *b * x[i]) > lim)
                use[i] = 0;
    }
    return 0;
}

#ifndef H_RISE
#define H_RISE 0.8
#endif
#ifndef H_LEN
#define H_LEN 0.3
#endif
#define EDGE_MAX 128
#define EDGE_BLUR 1.5 /* mm inside an edge of the insert still lit by its blur and ringing */

/* The two long edges along u at the current pose: fitted lines v = a + b u. */
static int long_edges(const an_image *im, const an_pose *pose, const an_model *m, double fluid,
                      double *at, double *bt, double *sbt, double *ab, double *bb, double *sbb,
                      double *buf)
{
    double U = 0.5 * (m->insert_u_max - m->insert_u_min),
           uc = 0.5 * (m->insert_u_max + m->insert_u_min);
    double Vh = 0.5 * (m->insert_v_max - m->insert_v_min),
           vc = 0.5 * (m->insert_v_max + m->insert_v_min);
    double ut[EDGE_MAX], vt[EDGE_MAX], ub[EDGE_MAX], vb[EDGE_MAX];
    int nt = 0, nb = 0;
    double span = Vh + 14, step = 0.5;
    int n = (int)(2 * span / step) + 1;
    if (n > 2048)
        return -1;
    double *sm = buf + 2048;
    /* Each line across the insert is walked inward from the brightest point beyond each of the
     * model's long edges (smoothed over 1.5 mm), to half that level. Taking the fluid level at the
     * line's ends instead failed when another block lies beside the insert (a resolution insert
     * on the same slice): the line's end then falls in that block's plastic. */
    int ia1 = (int)floor((span - Vh - 2.0) / step), ib0 = (int)ceil((span + Vh + 2.0) / step);
    if (ia1 < 2 || ib0 > n - 3)
        return -1;
    for (double u = uc - 0.75 * U; u <= uc + 0.75 * U + 1e-9 && nt < EDGE_MAX; u += 4.0) {
        an_line l;
        an_line_init(&l, im, pose, u, vc - span, 0, 1, step, n);
        if (an_line_sample(&l, buf))
            continue;
        an_smooth(buf, n, 3, sm);
        int jb = 0, jt = n - 1;
        for (int j = 0; j <= ia1; j++)
            if (sm[j] > sm[jb])
                jb = j;
        for (int j = ib0; j < n; j++)
            if (sm[j] > sm[jt])
                jt = j;
        if (!(sm[jb] > 0.5 * fluid && sm[jt] > 0.5 * fluid))
            continue; /* no fluid beyond an edge here */
        double e[2] = {an_walk_cross(sm, n, jb, +1, 0.5 * sm[jb], 1),
                       an_walk_cross(sm, n, jt, -1, 0.5 * sm[jt], 1)};
        if (!isfinite(e[0]) || !isfinite(e[1]))
            continue;
        double vtop = vc - span + e[1] * step, vbot = vc - span + e[0] * step;
        if (!(vtop - vbot > 0.4 * 2 * Vh && vtop - vbot < 2.5 * 2 * Vh))
            continue;
        ut[nt] = u;
        vt[nt++] = vtop;
        ub[nb] = u;
        vb[nb++] = vbot;
    }
    double r1, r2;
    if (line_fit(ut, vt, nt, at, bt, sbt, &r1) || line_fit(ub, vb, nb, ab, bb, sbb, &r2))
        return -1;
    return 0;
}

int an_insert_find(const an_image *im, const an_geom *g, const an_disc *d, const an_model *m,
                   double rot0, int want_strips, an_insert *ins)
{
    memset(ins, 0, sizeof *ins);
    ins->rot_deg = rot0;
    int rc = 0;
    double *buf = NULL, *grid = NULL;
    buf = malloc(4096 * sizeof *buf);
    if (!buf) {
        rc = -1;
        goto out;
    }
    an_pose pose;
    double rot = rot0, at = NAN, bt = NAN, sbt = NAN, ab = NAN, bb = NAN, sbb = NAN;
    for (int it = 0; it < 3; it++) {
        an_pose_make(g, d->xc, d->yc, rot, &pose);
        if (long_edges(im, &pose, m, d->fluid, &at, &bt, &sbt, &ab, &bb, &sbb, buf)) {
            sw_strlcpy(ins->reason, "insert not found: no straight long edges", sizeof ins->reason);
            goto out;
        }
        double slope = 0.5 * (bt + bb);
        rot += atan(slope) * AN_DEG;
        if (fabs(slope) < 1e-5)
            break;
    }
    an_pose_make(g, d->xc, d->yc, rot, &pose);
    if (long_edges(im, &pose, m, d->fluid, &at, &bt, &sbt, &ab, &bb, &sbb, buf)) {
        sw_strlcpy(ins->reason, "insert not found: no straight long edges", sizeof ins->reason);
        goto out;
    }
    rot += atan(0.5 * (bt + bb)) * AN_DEG;
    an_pose_make(g, d->xc, d->yc, rot, &pose);
    ins->rot_deg = rot;
    ins->rot_unc_deg = 0.5 * hypot(sbt, sbb) * AN_DEG;
    ins->v_top = at;
    ins->v_bot = ab;
    double Vh = 0.5 * (at - ab), vc = 0.5 * (at + ab);
    if (!(Vh > 1.0)) {
        sw_strlcpy(ins->reason, "insert not found: edges too close", sizeof ins->reason);
        goto out;
    }
    /* Ends: rows inside the plastic (between the strips and beside them); median of the rows. */
    double U = 0.5 * (m->insert_u_max - m->insert_u_min),
           uc = 0.5 * (m->insert_u_max + m->insert_u_min);
    double reach = fmin(U + 25, 0.92 * d->r_mm), step = 0.25;
    int n = (int)(2 * reach / step) + 1;
    if (n > 4096)
        n = 4096, step = 2 * reach / (n - 1);
    float los[3], his[3];
    int ne = 0;
    double fr[3] = {-0.7, 0.0, 0.7};
    for (int r = 0; r < 3; r++) {
        an_line l;
        an_line_init(&l, im, &pose, uc - reach, vc + fr[r] * Vh, 1, 0, step, n);
        an_line_offsets(&l, 0.5, 0.5);
        if (an_line_sample(&l, buf) > n / 10)
            continue;
        int i0 = (int)lround(reach / step);
        double lo = an_walk_cross(buf, n, i0, -1, 0.5 * d->fluid, 0);
        double hi = an_walk_cross(buf, n, i0, +1, 0.5 * d->fluid, 0);
        if (isfinite(lo) && isfinite(hi)) {
            los[ne] = (float)(uc - reach + lo * step);
            his[ne++] = (float)(uc - reach + hi * step);
        }
    }
    if (ne == 0) {
        sw_strlcpy(ins->reason, "insert not found: its ends are not visible", sizeof ins->reason);
        goto out;
    }
    ins->u_lo = an_median(los, (size_t)ne);
    ins->u_hi = an_median(his, (size_t)ne);
    if (!(ins->u_hi - ins->u_lo > 4 * Vh)) {
        sw_strlcpy(ins->reason, "insert not found: too short for its width", sizeof ins->reason);
        goto out;
    }
    ins->found = 1;
    if (!want_strips)
        goto out;
    if (m->method == AN_METHOD_SINGLE_WEDGE) {
        /* The wedge's band holds an edge, not a peak: take it from the model relative to the
         * found insert (or the insert's middle when the model gives none). */
        double mc = 0.5 * (m->insert_v_max + m->insert_v_min);
        if (m->n_ramps >= 1) {
            ins->strip_v[0] = vc + 0.5 * (m->ramp[0].v_min + m->ramp[0].v_max) - mc;
            ins->strip_w[0] = m->ramp[0].v_max - m->ramp[0].v_min;
        } else {
            ins->strip_v[0] = vc;
            ins->strip_w[0] = Vh;
        }
        ins->n_strips = 1;
        goto out;
    }
    /* Strips: the mean over u of the insert's interior, as a function of v, peaks at each strip. */
    double ga = ins->u_lo + 3, gb = ins->u_hi - 3, vs = 0.25;
    int nu = (int)((gb - ga) / 1.0) + 1, nv = (int)((at - ab - 2 * EDGE_BLUR) / vs) + 1;
    if (nu < 5 || nv < 8 || nv > 4096) {
        ins->found = 0;
        sw_strlcpy(ins->reason, "insert not found: interior too small", sizeof ins->reason);
        goto out;
    }
    double A[4096];
    for (int j = 0; j < nv; j++) {
        an_line l;
        an_line_init(&l, im, &pose, ga, ab + EDGE_BLUR + j * vs, 1, 0, 1.0, nu);
        an_line_sample(&l, buf);
        A[j] = an_mean_range(buf, nu, 0, nu - 1);
    }
    double As[4096];
    an_smooth(A, nv, 3, As);
    double floor = INFINITY;
    for (int j = 0; j < nv; j++)
        floor = fmin(floor, As[j]);
    int jc = (int)((vc - ab - EDGE_BLUR) / vs);
    int want = m->n_ramps >= 2 ? 2 : 1;
    ins->n_strips = 0;
    for (int s = 0; s < want; s++) {
        int j0 = want == 1 ? 0
                 : s == 0  ? jc + 2
                           : 0,
            j1 = want == 1 ? nv - 1
                 : s == 0  ? nv - 1
                           : jc - 2;
        /* The highest local maximum inside the half: the other strip's blurred flank (a long
         * strip beside a short one, on a tilted phantom at a coarse matrix) rises toward the
         * range's end and must not stand in for this strip's peak. */
        int jp = -1;
        for (int j = j0 + 2; j <= j1 - 2; j++)
            if (As[j] >= As[j - 1] && As[j] >= As[j + 1] && (jp < 0 || As[j] > As[jp]))
                jp = j;
        if (jp < 0 || !(As[jp] - floor > 0.02 * d->fluid)) {
            ins->found = 0;
            snprintf(ins->reason, sizeof ins->reason, "strip not found: no %s strip in the insert",
                     want == 1 ? ""
                     : s == 0  ? "top"
                               : "bottom");
            goto out;
        }
        double vpk = ab + EDGE_BLUR + jp * vs;
        /* Extent along u at the peak row, then the across profile over the strip's middle. */
        double ustep = 0.5;
        double ul = ins->u_lo + 3, uh = ins->u_hi - 3; /* clear of the ends' blur */
        int nu2 = (int)((uh - ul) / ustep) + 1;
        if (nu2 > 4096)
            nu2 = 4096;
        an_line l;
        an_line_init(&l, im, &pose, ul, vpk, 1, 0, ustep, nu2);
        an_line_offsets(&l, 0.75, 0.5);
        an_line_sample(&l, buf);
        double sm[4096];
        an_smooth(buf, nu2, 9, sm);
        int ip = 0;
        for (int i = 1; i < nu2; i++)
            if (sm[i] > sm[ip])
                ip = i;
        double half = 0.5 * (sm[ip] + floor);
        double ia = an_walk_cross(sm, nu2, ip, -1, half, 1),
               ib = an_walk_cross(sm, nu2, ip, +1, half, 1);
        if (!isfinite(ia))
            ia = 0;
        if (!isfinite(ib))
            ib = nu2 - 1;
        double ua = ul + ia * ustep, ub = ul + ib * ustep, len = ub - ua;
        /* Across window: from the insert's middle to 1.5 mm inside its edge (the edge's blur). */
        double wa = s == 0 && want == 2 ? vc : ab + 1.5;
        double wb = s == 1 || want == 1 ? (want == 1 ? at - 1.5 : vc) : at - 1.5;
        int nvv = (int)((wb - wa) / 0.1) + 1;
        int nuu = (int)(0.5 * len / 1.0) + 1;
        if (nvv < 5 || nvv > 4096) {
            ins->found = 0;
            sw_strlcpy(ins->reason, "strip not found: no room across the strip",
                       sizeof ins->reason);
            goto out;
        }
        double Bv[4096];
        for (int j = 0; j < nvv; j++) {
            an_line lu;
            an_line_init(&lu, im, &pose, ua + 0.25 * len, wa + j * 0.1, 1, 0, 1.0, nuu);
            an_line_sample(&lu, buf);
            Bv[j] = an_mean_range(buf, nuu, 0, nuu - 1);
        }
        double Bs[4096];
        an_smooth(Bv, nvv, 5, Bs);
        int kp = 0;
        double bmin = INFINITY;
        for (int j = 0; j < nvv; j++) {
            if (Bs[j] > Bs[kp])
                kp = j;
            bmin = fmin(bmin, Bs[j]);
        }
        double hb = 0.5 * (Bs[kp] + bmin);
        double ja = an_walk_cross(Bs, nvv, kp, -1, hb, 1),
               jb = an_walk_cross(Bs, nvv, kp, +1, hb, 1);
        double cen, wid;
        if (isfinite(ja) && isfinite(jb)) {
            cen = wa + 0.5 * (ja + jb) * 0.1;
            wid = (jb - ja) * 0.1;
        } else {
            cen = vpk;
            wid = m->ramp[s < m->n_ramps ? s : 0].v_max - m->ramp[s < m->n_ramps ? s : 0].v_min;
        }
        ins->strip_v[s] = cen;
        ins->strip_w[s] = wid;
        ins->n_strips++;
    }
out:
    free(buf);
    free(grid);
    return rc;
}

/* The half level of a profile whose plateau is P (and whose background beside the strip is B) by
 * the chosen method, with its derivative with respect to P. frac is 0.5 for FWHM, 0.1 for FWTM. */
static double level_for(an_half_level how, double P, double B, double sigma, double sigma_x,
                        double frac, double *dldp)
{
    switch (how) {
    case AN_HALF_FLOOR_MODEL:
        if (sigma > 0 && sigma_x > 0) {
            /* The magnitude of a signal a has mean M(a); the profile shows M(a(u)), so the crossing
             * of a = frac A_P is where the profile equals M(frac M^-1(P)). sigma is the noise at
             * the plateau, sigma_x at the crossing (they differ after the shading correction). */
            double ap = an_rice_invert(P, sigma), l = an_rice_mean(frac * ap, sigma_x);
            double e = 1e-4 * fmax(P, sigma);
            double ap2 = an_rice_invert(P + e, sigma);
            *dldp = (an_rice_mean(frac * ap2, sigma_x) - l) / e;
            return l;
        }
        break;
    case AN_HALF_BACKGROUND:
        if (isfinite(B)) {
            *dldp = frac;
            return B + frac * (P - B);
        }
        return NAN;
    case AN_HALF_TRUE_ZERO: break;
    }
    *dldp = frac;
    return frac * P;
}

/* Effective SD of a magnitude sample whose mean is m. */
static double sd_at(double m, double sigma)
{
    if (!(sigma > 0))
        return NAN;
    return an_rice_sd(an_rice_invert(m, sigma), sigma);
}

/* Below this strip SNR (plateau signal over the per-channel noise) the half level's signal is under
 * the noise SD, where a magnitude image shows mostly its noise floor: a strip that fails a step
 * there is reported as too weak rather than by the step's symptom (docs/methods.md, section 5). */
#define STRIP_SNR_MIN 2.0

/* The strip is not measured: the reason is the step's own, unless the strip is too weak for any
 * step to be trusted: its SNR under STRIP_SNR_MIN, or (floor = 1) half its peak at or below the
 * noise floor, the mean magnitude of pure noise sigma sqrt(pi / 2) (Rice), so that no walk from the
 * peak can find where the strip ends. */
static void strip_fail(an_strip *out, const char *why, int floor)
{
    if (floor)
        snprintf(out->reason, sizeof out->reason,
                 "strip signal too low for its noise (strip SNR %.2f: half its peak lies in the "
                 "noise floor)",
                 out->snr);
    else if (out->snr < STRIP_SNR_MIN)
        snprintf(out->reason, sizeof out->reason,
                 "strip signal too low for its noise (strip SNR %.2f < %.0f)", out->snr,
                 STRIP_SNR_MIN);
    else
        sw_strlcpy(out->reason, why, sizeof out->reason);
}

/* Gain g(u) = F(u_ref) / F(u) along the strip at v_s from the fluid bands beside the insert's long
 * edges (2.5 to 5.5 mm outside each), each fitted by a quartic in u, interpolated linearly in v;
 * u_ref is the insert's middle. All ones when the bands are not usable (leave the image, too dark).
 */
static void shading_gain(const an_image *im, const an_pose *pose, const an_insert *ins, double vs,
                         double step, int n, double *gain)
{
    for (int i = 0; i < n; i++)
        gain[i] = 1.0;
    double span = ins->u_hi - ins->u_lo, ustep = 1.0;
    int nu = (int)(span / ustep) + 1;
    if (nu < 10 || nu > 4096)
        return;
    double band[2][4096], c[2][5], vc[2] = {ins->v_top + 4.0, ins->v_bot - 4.0};
    for (int b = 0; b < 2; b++) {
        an_line l;
        an_line_init(&l, im, pose, ins->u_lo, vc[b], 1, 0, ustep, nu);
        an_line_offsets(&l, 1.5, 0.5);
        if (an_line_sample(&l, band[b]))
            return;
        /* quartic least squares in s = (u - um) / half-span (normal equations, 5 x 5) */
        double A[5][6] = {{0}};
        for (int i = 0; i < nu; i++) {
            double sx = 2.0 * i / (nu - 1) - 1, pw[9];
            pw[0] = 1;
            for (int k = 1; k < 9; k++)
                pw[k] = pw[k - 1] * sx;
            for (int r = 0; r < 5; r++) {
                for (int q = 0; q < 5; q++)
                    A[r][q] += pw[r + q];
                A[r][5] += pw[r] * band[b][i];
            }
        }
        for (int k = 0; k < 5; k++) {
            int pv = k;
            for (int r = k + 1; r < 5; r++)
                if (fabs(A[r][k]) > fabs(A[pv][k]))
                    pv = r;
            if (!(fabs(A[pv][k]) > 1e-12))
                return;
            for (int q = 0; q < 6; q++) {
                double t = A[k][q];
                A[k][q] = A[pv][q];
                A[pv][q] = t;
            }
            for (int r = 0; r < 5; r++) {
                if (r == k)
                    continue;
                double f = A[r][k] / A[k][k];
                for (int q = k; q < 6; q++)
                    A[r][q] -= f * A[k][q];
            }
        }
        for (int k = 0; k < 5; k++)
            c[b][k] = A[k][5] / A[k][k];
    }
    double f = (vs - vc[1]) / (vc[0] - vc[1]);
    double Fmid = (1 - f) * c[1][0] + f * c[0][0];
    if (!(Fmid > 0))
        return;
    double tmp[AN_PROFILE_MAX];
    for (int i = 0; i < n && i < AN_PROFILE_MAX; i++) {
        double u = ins->u_lo + i * step, sx = 2.0 * (u - ins->u_lo) / span - 1, F[2];
        for (int b = 0; b < 2; b++)
            F[b] = c[b][0] + sx * (c[b][1] + sx * (c[b][2] + sx * (c[b][3] + sx * c[b][4])));
        double Fv = (1 - f) * F[1] + f * F[0];
        /* a band that is not plain fluid (another insert, the phantom's edge) is not a reference */
        if (!(Fv > 0.5 * Fmid && Fv < 2 * Fmid))
            return;
        tmp[i] = Fmid / Fv;
    }
    /* the middle of the insert as reference: gain 1 there */
    double um = 0.5 * (ins->u_lo + ins->u_hi);
    (void)um;
    for (int i = 0; i < n; i++)
        gain[i] = tmp[i];
}

int an_strip_measure(const an_image *im, const an_pose *pose, const an_insert *ins, int s,
                     double sigma, const an_params *par, an_strip *out)
{
    int rc = 0;
    double *p = NULL, *ps = NULL, *ps4 = NULL, *g = NULL, *gain = NULL;
    memset(out, 0, sizeof *out);
    out->length_mm = out->length_unc_mm = out->fwtm_mm = out->centre_u_mm = NAN;
    out->plateau = out->plateau_sd = out->half_level = out->floor = NAN;
    out->cross_lo_mm = out->cross_hi_mm = out->plateau_unc = out->slot_kappa_per_mm = NAN;
    out->snr = NAN;
    double step = par->sample_step_mm > 0 ? par->sample_step_mm : 0.1;
    double span = ins->u_hi - ins->u_lo;
    if (span / step + 1 > AN_PROFILE_MAX)
        step = span / (AN_PROFILE_MAX - 1);
    int n = (int)(span / step) + 1;
    if (n > AN_PROFILE_MAX)
        n = AN_PROFILE_MAX;
    p = malloc((size_t)n * sizeof *p);
    ps = malloc((size_t)n * sizeof *ps);
    ps4 = malloc((size_t)n * sizeof *ps4);
    g = malloc((size_t)n * sizeof *g);
    gain = malloc((size_t)n * sizeof *gain);
    if (!p || !ps || !ps4 || !g || !gain) {
        rc = -1;
        goto out;
    }
    an_line l;
    an_line_init(&l, im, pose, ins->u_lo, ins->strip_v[s], 1, 0, step, n);
    double hw = fmin(fmax(0.4 * ins->strip_w[s], 0.5), 3.0);
    an_line_offsets(&l, hw, 0.5);
    out->half_width_mm = hw;
    an_pose_to_px(pose, ins->u_lo, ins->strip_v[s], &out->line0.x, &out->line0.y);
    an_pose_to_px(pose, ins->u_lo + (n - 1) * step, ins->strip_v[s], &out->line1.x, &out->line1.y);
    if (an_line_sample(&l, p)) {
        sw_strlcpy(out->reason, "strip not measurable: its line leaves the image",
                   sizeof out->reason);
        goto out;
    }
    /* Receive shading: the fluid just outside the insert's long edges shows the coil's sensitivity
     * along u; a smooth (quartic) fit of it, interpolated to the strip's v, divides the profile, so
     * that a sensitivity rising toward the rim does not lengthen the strip. The noise of each
     * sample is scaled by the same gain (an_line.gain). */
    shading_gain(im, pose, ins, ins->strip_v[s], step, n, gain);
    for (int i = 0; i < n; i++)
        p[i] *= gain[i];
    l.gain = gain;
    out->profile.n = n;
    out->profile.start_mm = ins->u_lo;
    out->profile.step_mm = step;
    for (int i = 0; i < n; i++)
        out->profile.v[i] = (float)p[i];
    /* The smoothed copy only gives first guesses (peak, crossings, rise); 4 mm keeps noise from
     * stopping a walk early at low SNR. */
    int w = (int)(4.0 / step) | 1;
    an_smooth(p, n, w, ps);
    memcpy(ps4, ps, (size_t)n * sizeof *ps4);
    /* Samples within 2.5 mm of an end of the insert carry its edge's blur and ringing. */
    int edge = (int)ceil(2.5 / step);
    if (n < 4 * edge) {
        sw_strlcpy(out->reason, "strip not measurable: the insert is too short",
                   sizeof out->reason);
        goto out;
    }
    out->inside_lo = edge;
    out->inside_hi = n - 1 - edge;
    int ip = edge;
    for (int i = edge; i < n - edge; i++)
        if (ps[i] > ps[ip])
            ip = i;
    double pmax = ps[ip];
    /* A provisional strip SNR from the smoothed peak (the plateau's replaces it below): the peak
     * of a noisy profile lies above its plateau, so this errs toward a stronger strip. */
    double sgp = sigma > 0 ? sigma * gain[ip] : NAN;
    out->snr = sgp > 0 ? an_rice_invert(pmax, sgp) / sgp : NAN;
    double lo0 = an_walk_cross(ps, n, ip, -1, 0.5 * pmax, 1);
    double hi0 = an_walk_cross(ps, n, ip, +1, 0.5 * pmax, 1);
    if (!isfinite(lo0) || !isfinite(hi0) || lo0 < edge || hi0 > n - 1 - edge) {
        strip_fail(out, "strip runs into the end of the insert",
                   sgp > 0 && 0.5 * pmax <= sgp * sqrt(M_PI / 2));
        goto out;
    }
    /* Second pass: smoothing over an eighth of the strip, so that at low SNR a noise dip does not
     * stop the walks inside the plateau (the crossings themselves come from the raw profile). The
     * ends' zones are left out of the smoothing so that their brightness does not leak inward. */
    if (0.12 * (hi0 - lo0) * step > 4.0) {
        for (int i = 0; i < n; i++)
            g[i] = i < edge || i > n - 1 - edge ? NAN : p[i];
        an_smooth(g, n, (int)(0.12 * (hi0 - lo0)) | 1, ps);
        for (int i = 0; i < n; i++)
            if (i < edge || i > n - 1 - edge)
                ps[i] = p[i];
        ip = edge;
        for (int i = edge; i < n - edge; i++)
            if (ps[i] > ps[ip])
                ip = i;
        pmax = ps[ip];
        sgp = sigma > 0 ? sigma * gain[ip] : NAN;
        out->snr = sgp > 0 ? an_rice_invert(pmax, sgp) / sgp : NAN;
        lo0 = an_walk_cross(ps, n, ip, -1, 0.5 * pmax, 1);
        hi0 = an_walk_cross(ps, n, ip, +1, 0.5 * pmax, 1);
        if (!isfinite(lo0) || !isfinite(hi0) || lo0 < edge || hi0 > n - 1 - edge) {
            strip_fail(out, "strip runs into the end of the insert",
                       sgp > 0 && 0.5 * pmax <= sgp * sqrt(M_PI / 2));
            goto out;
        }
    }
    double c0 = 0.5 * (lo0 + hi0), L0 = (hi0 - lo0) * step;
    if (!(L0 > 3.0) || !(pmax > 0)) {
        strip_fail(out, "profile malformed: no strip plateau", 0);
        goto out;
    }
    /* Plateau: a quadratic fitted over the middle 60 % of the strip, evaluated at its centre, so
     * that neither a noisy maximum nor the rounded top of a smooth profile biases it. */
    int a0 = (int)floor(c0 - 0.3 * L0 / step), a1 = (int)ceil(c0 + 0.3 * L0 / step);
    double cq[3];
    if (an_quad_fit(p, a0, a1, c0, step, cq, 0, g)) {
        strip_fail(out, "profile malformed: plateau fit failed", 0);
        goto out;
    }
    double P = cq[0], ssP = an_line_weight_ss(&l, a0, a1 - a0 + 1, g), sres = 0;
    for (int i = a0; i <= a1; i++) {
        double t = (i - c0) * step, r = p[i] - (cq[0] + cq[1] * t + cq[2] * t * t);
        sres += r * r;
    }
    out->plateau = P;
    out->plateau_sd = sqrt(sres / (a1 - a0 - 2 > 0 ? a1 - a0 - 2 : 1));
    double sdP = sd_at(P / gain[(int)lround(c0)], sigma); /* raw units; ssP carries the gain */
    out->plateau_unc = sdP * sqrt(ssP);
    double gc = gain[(int)lround(c0)];
    out->snr = sigma > 0 ? an_rice_invert(P, sigma * gc) / (sigma * gc) : NAN;
    if (!(P > 0)) {
        strip_fail(out, "profile malformed: plateau at or below zero", 0);
        goto out;
    }
    /* Background beside the strip (the floor), beyond its tenth-maximum points. */
    double lo10 = an_walk_cross(ps, n, ip, -1, 0.1 * pmax, 1);
    double hi10 = an_walk_cross(ps, n, ip, +1, 0.1 * pmax, 1);
    int mg = (int)(2.0 / step);
    double bs = 0;
    int bc = 0;
    if (isfinite(lo10))
        for (int i = 2 * edge; i < (int)lo10 - mg; i++)
            bs += p[i], bc++;
    if (isfinite(hi10))
        for (int i = (int)hi10 + mg; i < n - 2 * edge; i++)
            bs += p[i], bc++;
    double B = bc >= 10 ? bs / bc : NAN;
    out->floor = B;
    double dldp, dldp_hi, h = 1.0;
    /* first guesses of the crossings, for the noise there after the shading correction */
    double g0 = an_walk_cross(ps, n, ip, -1, 0.5 * P, 1),
           g1 = an_walk_cross(ps, n, ip, +1, 0.5 * P, 1);
    double glo_gain = isfinite(g0) ? gain[(int)g0] : gc,
           ghi_gain = isfinite(g1) ? gain[(int)g1] : gc;
    double lvl = level_for(par->half_level, P, B, sigma * gc, sigma * glo_gain, 0.5, &dldp);
    double lvl_hi = level_for(par->half_level, P, B, sigma * gc, sigma * ghi_gain, 0.5, &dldp_hi);
    if (!isfinite(lvl) || !isfinite(lvl_hi)) {
        sw_strlcpy(out->reason, "profile malformed: no background beside the strip",
                   sizeof out->reason);
        goto out;
    }
    out->half_level = 0.5 * (lvl + lvl_hi);
    an_xing xl, xh;
    double glo = an_walk_cross(ps, n, ip, -1, lvl, 1),
           ghi = an_walk_cross(ps, n, ip, +1, lvl_hi, 1);
    if (!isfinite(glo) || !isfinite(ghi)) {
        strip_fail(out, "strip runs into the end of the insert", 0);
        goto out;
    }
    /* Edge windows: a first fit over +-4 mm gives each edge's slope at its half level, and the
     * 25-75 % rise of a straight edge, P / (2 |slope|), averaged over the strip's two edges (one
     * shape for a symmetric slice profile), sets the final half width. Every edge is at least the
     * slot's thickness over tan(theta) wide (10 mm for 1 mm at 10:1), so 4 mm never overreaches; a
     * rise read off the smoothed profile instead would be stretched by noise on the plateau and on
     * the Rician floor. */
    {
        an_xing f0, f1;
        double h0 = fmin(4.0, H_LEN * L0);
        double e0 = fmin(h0, (glo - edge) * step), e1 = fmin(h0, (n - 1 - edge - ghi) * step);
        double ks = 0;
        int kn = 0;
        if (e0 >= 1.0 &&
            !an_xing_find_in(NULL, p, edge, n - 1 - edge, glo, lvl, e0 / step, +1, &f0) &&
            f0.slope > 0)
            ks += f0.slope / step, kn++;
        if (e1 >= 1.0 &&
            !an_xing_find_in(NULL, p, edge, n - 1 - edge, ghi, lvl_hi, e1 / step, -1, &f1) &&
            f1.slope < 0)
            ks -= f1.slope / step, kn++;
        double rise = kn && ks > 0 ? 0.5 * P / (ks / kn) : 8.0;
        h = fmin(fmax(H_RISE * rise, 3.0), H_LEN * L0);
    }
    /* Near an end of the insert the fit window shrinks (to 0.3 mm) rather than reach into it. */
    double hlo = fmin(h, (glo - edge) * step), hhi = fmin(h, (n - 1 - edge - ghi) * step);
    if (hlo < 0.3 || hhi < 0.3) {
        strip_fail(out, "strip runs into the end of the insert", 0);
        goto out;
    }
    if (an_xing_find_in(&l, p, edge, n - 1 - edge, glo, lvl, hlo, +1, &xl) ||
        an_xing_find_in(&l, p, edge, n - 1 - edge, ghi, lvl_hi, hhi, -1, &xh)) {
        strip_fail(out, "profile malformed: no clean half-level crossing", 0);
        goto out;
    }
    if (xl.i0 < edge || xh.i1 > n - 1 - edge) {
        strip_fail(out, "strip runs into the end of the insert", 0);
        goto out;
    }
    if (!(xh.idx > xl.idx)) {
        strip_fail(out, "profile malformed: crossings out of order", 0);
        goto out;
    }
    /* The crossings must be the profile's only ones: away from them (beyond twice the fit window)
     * the smoothed profile stays above the level inside and below it outside. A noisy or irregular
     * profile that fails this is not measured rather than measured wrongly. */
    {
        int mg2 = (int)ceil(fmax(2 * fmax(hlo, hhi), 0.05 * L0) / step),
            wide = (int)(0.25 * L0 / step);
        int bad_in = 0, n_in = 0, bad_out = 0, n_out = 0;
        for (int i = (int)xl.idx + mg2; i <= (int)xh.idx - mg2; i++, n_in++)
            bad_in += ps[i] < (i < c0 ? lvl : lvl_hi);
        for (int i = (int)xl.idx - wide; i <= (int)xl.idx - mg2; i++)
            if (i >= edge) {
                n_out++;
                bad_out += ps[i] > lvl;
            }
        for (int i = (int)xh.idx + mg2; i <= (int)xh.idx + wide; i++)
            if (i <= n - 1 - edge) {
                n_out++;
                bad_out += ps[i] > lvl_hi;
            }
        if ((n_in > 0 && bad_in > 0.1 * n_in) || (n_out > 0 && bad_out > 0.1 * n_out)) {
            strip_fail(out, "profile malformed: the strip crosses its half level more than twice",
                       0);
            goto out;
        }
    }
    out->cross_lo_mm = ins->u_lo + xl.idx * step;
    out->cross_hi_mm = ins->u_lo + xh.idx * step;
    out->length_mm = (xh.idx - xl.idx) * step;
    /* Box widening: g = f (*) box(k) = f + k^2 f'' / 24 + ..., both at the crossing and at the
     * plateau (P_f = P_g - k^2 g''(c) / 24, so the level moves by dl/dP times that). Solving
     * f(x_f) = l(P_f) to first order: x_f = x_g + (k^2 / 24) [g''(x_g) - l'(P) g''(c)] / g'(x_g),
     * so the FWHM of f is L_g + kappa k^2 with kappa the difference of those terms / 24. */
    {
        double pc = 2 * cq[2];
        out->slot_kappa_per_mm =
            ((xh.curv - dldp_hi * pc) / xh.slope - (xl.curv - dldp * pc) / xl.slope) / 24.0;
    }
    out->centre_u_mm = 0.5 * (out->cross_lo_mm + out->cross_hi_mm);
    an_pose_to_px(pose, out->cross_lo_mm, ins->strip_v[s], &out->cross_lo.x, &out->cross_lo.y);
    an_pose_to_px(pose, out->cross_hi_mm, ins->strip_v[s], &out->cross_hi.x, &out->cross_hi.y);
    /* Uncertainty: each crossing's own noise over its slope, plus the level's (shared) noise. */
    /* ss already carries the gain; the Rician SD is that of the uncorrected sample */
    double sdl = sd_at(lvl / glo_gain, sigma), sdh = sd_at(lvl_hi / ghi_gain, sigma);
    double vlo = sdl * sdl * xl.ss / (xl.slope * xl.slope),
           vhi = sdh * sdh * xh.ss / (xh.slope * xh.slope);
    double vlev = dldp * dldp * sdP * sdP * ssP;
    if (par->half_level == AN_HALF_BACKGROUND)
        vlev +=
            0.25 * sdl * sdl / (bc > 0 ? bc * step : 1); /* about one independent sample per mm */
    double k = 1 / fabs(xl.slope) + dldp_hi / dldp / fabs(xh.slope);
    out->length_unc_mm = sqrt(vlo + vhi + vlev * k * k);
    out->centre_unc_mm =
        0.5 * sqrt(vlo + vhi + vlev * pow(1 / xl.slope + dldp_hi / dldp / xh.slope, 2));
    /* FWTM on the same profile (NAN when the tenth-level points are not both inside). The tenth
     * level lies near the noise floor, so it is always taken through the Rician model when the
     * noise is known (a true-zero tenth level may sit below the floor and never be crossed). */
    double dl10;
    double l10 =
        level_for(par->half_level == AN_HALF_BACKGROUND ? AN_HALF_BACKGROUND : AN_HALF_FLOOR_MODEL,
                  P, B, sigma * gc, sigma * gc, 0.1, &dl10);
    /* First guesses walk outward from the half-level crossings on the 4 mm copy: the second
     * pass's wider smoothing spreads the tails, and near an end of the insert its edge's ringing
     * (the fluid beyond is several times the strip) stays above a tenth of the plateau. */
    double t0 = an_walk_cross(ps4, n, (int)floor(xl.idx), -1, l10, 1),
           t1 = an_walk_cross(ps4, n, (int)ceil(xh.idx), +1, l10, 1);
    an_xing tl, th;
    double h0 = isfinite(t0) ? fmin(h, (t0 - edge) * step) : 0,
           h1 = isfinite(t1) ? fmin(h, (n - 1 - edge - t1) * step) : 0;
    if (isfinite(l10) && h0 >= 1.0 && h1 >= 1.0 &&
        !an_xing_find_in(&l, p, edge, n - 1 - edge, t0, l10, h0, +1, &tl) &&
        !an_xing_find_in(&l, p, edge, n - 1 - edge, t1, l10, h1, -1, &th))
        out->fwtm_mm = (th.idx - tl.idx) * step;
    out->measured = 1;
out:
    free(p);
    free(ps);
    free(ps4);
    free(g);
    free(gain);
    return rc;
}

/* NEMA MS 5 single wedge: along u in the wedge's band the signal is the integral of the slice
 * profile (an edge response); its derivative is the profile stretched by 1 / tan(angle). The
 * derivative is taken by a local quadratic (Savitzky-Golay) fit over +-1 mm, and its FWHM found
 * with the same crossing fits as a strip. The uncertainty uses the derivative's own scatter
 * measured away from the edge, with neighbouring samples treated as independent over 1 mm. */
int an_wedge_edge_measure(const an_image *im, const an_pose *pose, const an_insert *ins,
                          double sigma, const an_params *par, an_strip *out)
{
    int rc = 0;
    double *p = NULL, *dp = NULL, *ds = NULL;
    memset(out, 0, sizeof *out);
    out->length_mm = out->length_unc_mm = out->fwtm_mm = out->centre_u_mm = NAN;
    out->plateau = out->plateau_sd = out->half_level = out->floor = NAN;
    out->cross_lo_mm = out->cross_hi_mm = out->plateau_unc = out->centre_unc_mm = NAN;
    (void)sigma;
    double step = par->sample_step_mm > 0 ? par->sample_step_mm : 0.1;
    double span = ins->u_hi - ins->u_lo - 2.0;
    if (span / step + 1 > AN_PROFILE_MAX)
        step = span / (AN_PROFILE_MAX - 1);
    int n = (int)(span / step) + 1;
    if (n > AN_PROFILE_MAX)
        n = AN_PROFILE_MAX;
    p = malloc((size_t)n * sizeof *p);
    dp = malloc((size_t)n * sizeof *dp);
    ds = malloc((size_t)n * sizeof *ds);
    if (!p || !dp || !ds) {
        rc = -1;
        goto out;
    }
    an_line l;
    an_line_init(&l, im, pose, ins->u_lo + 1.0, ins->strip_v[0], 1, 0, step, n);
    double hw = fmin(fmax(0.3 * ins->strip_w[0], 0.5), 3.0);
    an_line_offsets(&l, hw, 0.5);
    out->half_width_mm = hw;
    an_pose_to_px(pose, l.u0, l.v0, &out->line0.x, &out->line0.y);
    an_pose_to_px(pose, l.u0 + (n - 1) * step, l.v0, &out->line1.x, &out->line1.y);
    if (an_line_sample(&l, p)) {
        sw_strlcpy(out->reason, "wedge not measurable: its line leaves the image",
                   sizeof out->reason);
        goto out;
    }
    out->profile.n = n;
    out->profile.start_mm = l.u0;
    out->profile.step_mm = step;
    for (int i = 0; i < n; i++)
        out->profile.v[i] = (float)p[i];
    int hn = (int)lround(1.0 / step);
    if (hn < 2)
        hn = 2;
    for (int i = 0; i < n; i++) {
        double c[3];
        int i0 = i - hn < 0 ? 0 : i - hn, i1 = i + hn > n - 1 ? n - 1 : i + hn;
        dp[i] = an_quad_fit(p, i0, i1, i, step, c, 0, NULL) ? NAN : c[1];
    }
    /* The edge may rise either way along u; use the derivative's sign at its largest magnitude. */
    int edge = (int)ceil(2.5 / step); /* clear of the insert's ends */
    if (n < 4 * edge) {
        sw_strlcpy(out->reason, "wedge not measurable: the insert is too short",
                   sizeof out->reason);
        goto out;
    }
    int ip = edge;
    for (int i = edge; i < n - edge; i++)
        if (fabs(dp[i]) > fabs(dp[ip]))
            ip = i;
    double sgn = dp[ip] >= 0 ? 1 : -1;
    for (int i = 0; i < n; i++)
        dp[i] *= sgn;
    an_smooth(dp, n, (int)(1.0 / step) | 1, ds);
    double pk = ds[ip];
    double lo0 = an_walk_cross(ds, n, ip, -1, 0.5 * pk, 1),
           hi0 = an_walk_cross(ds, n, ip, +1, 0.5 * pk, 1);
    if (!isfinite(lo0) || !isfinite(hi0) || lo0 < edge || hi0 > n - 1 - edge) {
        sw_strlcpy(out->reason, "wedge edge runs into the end of the insert", sizeof out->reason);
        goto out;
    }
    double c0 = 0.5 * (lo0 + hi0), L0 = (hi0 - lo0) * step, cq[3];
    int a0 = (int)floor(c0 - 0.3 * L0 / step), a1 = (int)ceil(c0 + 0.3 * L0 / step);
    if (a1 - a0 < 4 || an_quad_fit(dp, a0, a1, c0, step, cq, 0, NULL) || !(cq[0] > 0)) {
        sw_strlcpy(out->reason, "profile malformed: no peak in the wedge's derivative",
                   sizeof out->reason);
        goto out;
    }
    double P = cq[0], lvl = 0.5 * P;
    out->plateau = P;
    out->half_level = lvl;
    out->floor = 0;
    double h = fmin(fmax(0.25 * L0, 1.0), 5.0);
    an_xing xl, xh;
    if (an_xing_find(NULL, dp, n, lo0, lvl, h / step, +1, &xl) ||
        an_xing_find(NULL, dp, n, hi0, lvl, h / step, -1, &xh) || !(xh.idx > xl.idx)) {
        sw_strlcpy(out->reason, "profile malformed: no clean half-level crossing",
                   sizeof out->reason);
        goto out;
    }
    out->length_mm = (xh.idx - xl.idx) * step;
    out->cross_lo_mm = l.u0 + xl.idx * step;
    out->cross_hi_mm = l.u0 + xh.idx * step;
    out->centre_u_mm = 0.5 * (out->cross_lo_mm + out->cross_hi_mm);
    an_pose_to_px(pose, out->cross_lo_mm, l.v0, &out->cross_lo.x, &out->cross_lo.y);
    an_pose_to_px(pose, out->cross_hi_mm, l.v0, &out->cross_hi.x, &out->cross_hi.y);
    /* Scatter of the derivative away from the edge (beyond three widths on either side). */
    double ss = 0;
    int cnt = 0;
    for (int i = 0; i < n; i++)
        if (fabs(i - c0) * step > 1.5 * L0 + 3 && isfinite(dp[i])) {
            ss += dp[i] * dp[i];
            cnt++;
        }
    if (cnt > 20) {
        double sd = sqrt(ss / cnt), nind = 2.0 * h; /* about one independent sample per mm */
        double sx = sd / sqrt(nind);
        double sl = xl.slope / step, sh = xh.slope / step; /* per mm */
        double vlo = sx * sx / (sl * sl), vhi = sx * sx / (sh * sh);
        double vp = sd * sd / fmax(1.0, 0.6 * L0);
        double k = 1 / fabs(sl) + 1 / fabs(sh);
        out->length_unc_mm = sqrt(vlo + vhi + 0.25 * vp * k * k);
        out->centre_unc_mm = 0.5 * sqrt(vlo + vhi);
        out->plateau_unc = sqrt(vp);
    }
    double t0 = an_walk_cross(ds, n, ip, -1, 0.1 * P, 1),
           t1 = an_walk_cross(ds, n, ip, +1, 0.1 * P, 1);
    if (isfinite(t0) && isfinite(t1))
        out->fwtm_mm = (t1 - t0) * step;
    out->measured = 1;
out:
    free(p);
    free(dp);
    free(ds);
    return rc;
}
