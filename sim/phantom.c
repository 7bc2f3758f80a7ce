/* phantom.c: the phantom of an an_model as signed analytic primitives (convex polytopes as
 * intersections of half-spaces, and the fluid cylinder), placed with a pose, and the exact
 * profile-weighted integral of the object along each ray parallel to the slice normal. */
#include <math.h>
#include <string.h>

#include "sim_int.h"

static const double DEG = M_PI / 180.0;

/* p = t + M q with M = Rz(rot) Ry(tilt_v) Rx(tilt_u) in (u, v, w) components; each factor's sign is
 * the one phantom-large.md defines by the image (and tests/sim checks on images):
 *   Rz(a): (u, v) -> (u cos a - v sin a, u sin a + v cos a)  counter-clockwise as displayed;
 *   Ry(b): (u, w) -> (u cos b + w sin b, -u sin b + w cos b) the slope 0.1 of the top ramp
 *          becomes tan(atan 0.1 - b): a smaller angle to the slice, a longer strip;
 *   Rx(c): (v, w) -> (v cos c - w sin c, v sin c + w cos c) anterior (v > 0) toward larger w. */
static void pose_matrix(const sim_pose *ps, double M[3][3])
{
    double a = ps->rot_deg * DEG, b = ps->tilt_v_deg * DEG, c = ps->tilt_u_deg * DEG;
    double Rz[3][3] = {{cos(a), -sin(a), 0}, {sin(a), cos(a), 0}, {0, 0, 1}};
    double Ry[3][3] = {{cos(b), 0, sin(b)}, {0, 1, 0}, {-sin(b), 0, cos(b)}};
    double Rx[3][3] = {{1, 0, 0}, {0, cos(c), -sin(c)}, {0, sin(c), cos(c)}};
    double T[3][3];
    for (int i = 0; i < 3; i++)
        for (int j = 0; j < 3; j++) {
            T[i][j] = 0;
            for (int k = 0; k < 3; k++)
                T[i][j] += Ry[i][k] * Rx[k][j];
        }
    for (int i = 0; i < 3; i++)
        for (int j = 0; j < 3; j++) {
            M[i][j] = 0;
            for (int k = 0; k < 3; k++)
                M[i][j] += Rz[i][k] * T[k][j];
        }
}

void sim_scene_to_scanner(const sim_scene *sc, const double q[3], double p[3])
{
    for (int i = 0; i < 3; i++)
        p[i] = sc->t[i] + sc->M[i][0] * q[0] + sc->M[i][1] * q[1] + sc->M[i][2] * q[2];
}

void sim_scene_to_phantom(const sim_scene *sc, const double p[3], double q[3])
{
    double d[3] = {p[0] - sc->t[0], p[1] - sc->t[1], p[2] - sc->t[2]};
    for (int i = 0; i < 3; i++)
        q[i] = sc->M[0][i] * d[0] + sc->M[1][i] * d[1] + sc->M[2][i] * d[2];
}

/* Adds the phantom-frame half-space a . q <= b to pr, as n . p <= b + n . t with n = M a. */
static void add_half(const sim_scene *sc, sim_prim *pr, double au, double av, double aw, double b)
{
    sim_halfspace *h = &pr->h[pr->nh++];
    double a[3] = {au, av, aw};
    for (int i = 0; i < 3; i++)
        h->n[i] = sc->M[i][0] * a[0] + sc->M[i][1] * a[1] + sc->M[i][2] * a[2];
    h->b = b + h->n[0] * sc->t[0] + h->n[1] * sc->t[1] + h->n[2] * sc->t[2];
}

/* A phantom-frame box as six half-spaces, and its scanner-frame bounding box. */
static sim_prim *add_box(sim_scene *sc, double sign, double u0, double u1, double v0, double v1,
                         double w0, double w1)
{
    sim_prim *pr = &sc->p[sc->n++];
    memset(pr, 0, sizeof *pr);
    pr->sign = sign;
    add_half(sc, pr, 1, 0, 0, u1);
    add_half(sc, pr, -1, 0, 0, -u0);
    add_half(sc, pr, 0, 1, 0, v1);
    add_half(sc, pr, 0, -1, 0, -v0);
    add_half(sc, pr, 0, 0, 1, w1);
    add_half(sc, pr, 0, 0, -1, -w0);
    for (int i = 0; i < 3; i++) {
        pr->lo[i] = INFINITY;
        pr->hi[i] = -INFINITY;
    }
    for (int c = 0; c < 8; c++) {
        double q[3] = {c & 1 ? u1 : u0, c & 2 ? v1 : v0, c & 4 ? w1 : w0}, p[3];
        sim_scene_to_scanner(sc, q, p);
        for (int i = 0; i < 3; i++) {
            pr->lo[i] = fmin(pr->lo[i], p[i]);
            pr->hi[i] = fmax(pr->hi[i], p[i]);
        }
    }
    return pr;
}

sw_status sim_scene_build(const an_model *m, const sim_pose *pose, double shift_x, sim_scene *sc,
                          sw_error *err)
{
    memset(sc, 0, sizeof *sc);
    if (m->method == AN_METHOD_SINGLE_WEDGE)
        return sw_error_set(err, SW_EUNSUPPORTED,
                            "simulator: phantom model %s: a single-wedge thickness insert is not "
                            "modelled",
                            m->name);
    if (!(m->cyl_w_max > m->cyl_w_min))
        return sw_error_set(err, SW_EINVAL, "simulator: phantom model %s: cylinder length not set",
                            m->name);
    if (m->has_wedges && !(m->wedge_w_half > 0))
        return sw_error_set(err, SW_EINVAL, "simulator: phantom model %s: wedge extent not set",
                            m->name);
    pose_matrix(pose, sc->M);
    sc->t[0] = pose->du_mm + shift_x;
    sc->t[1] = pose->dv_mm;
    sc->t[2] = 0;

    /* the fluid cylinder: its w extent as half-spaces, the radius separately */
    double r = m->radius_mm;
    sim_prim *cyl = add_box(sc, +1, -r, r, -r, r, m->cyl_w_min, m->cyl_w_max);
    cyl->cylinder = 1;
    cyl->radius = r;
    cyl->nh = 0;
    add_half(sc, cyl, 0, 0, 1, m->cyl_w_max);
    add_half(sc, cyl, 0, 0, -1, -m->cyl_w_min);
    for (int i = 0; i < 3; i++) {
        cyl->eu[i] = sc->M[i][0];
        cyl->ev[i] = sc->M[i][1];
    }

    /* the thickness insert (centred on w = 0, where the ramps cross) and its fluid slots */
    if (m->n_ramps > 0) {
        double wh = m->insert_w_half;
        add_box(sc, -1, m->insert_u_min, m->insert_u_max, m->insert_v_min, m->insert_v_max, -wh,
                wh);
        for (int k = 0; k < m->n_ramps; k++) {
            const an_ramp_def *rd = &m->ramp[k];
            sim_prim *s =
                add_box(sc, +1, m->insert_u_min, m->insert_u_max, rd->v_min, rd->v_max, -wh, wh);
            /* |w - slope u| <= slot / 2: the slot's thickness measured along w */
            add_half(sc, s, -rd->slope, 0, 1, 0.5 * m->slot_mm);
            add_half(sc, s, rd->slope, 0, -1, 0.5 * m->slot_mm);
        }
    }
    /* the position wedges: a bridge and two bars under it at each vertex plane; the bars end on
     * faces of slope k (the model's face_slope; 1: 45 degrees): L_left = L0 + k (w - w_v),
     * L_right = L0 - k (w - w_v) */
    if (m->has_wedges) {
        double k = m->bar_face_slope;
        for (int j = 0; j < 2; j++) {
            double wv = m->wedge_w[j], wh = m->wedge_w_half;
            add_box(sc, -1, m->bridge_u_min, m->bridge_u_max, m->bridge_v_min, m->bridge_v_max,
                    wv - wh, wv + wh);
            double vbot = m->bar_top_v - m->bar_len0_mm - k * wh;
            sim_prim *l = add_box(sc, -1, m->bar_u_min[0], m->bar_u_max[0], vbot, m->bar_top_v,
                                  wv - wh, wv + wh);
            /* v >= top - L0 - k (w - wv)  <=>  -v - k w <= L0 - top - k wv */
            add_half(sc, l, 0, -1, -k, m->bar_len0_mm - m->bar_top_v - k * wv);
            sim_prim *rr = add_box(sc, -1, m->bar_u_min[1], m->bar_u_max[1], vbot, m->bar_top_v,
                                   wv - wh, wv + wh);
            /* v >= top - L0 + k (w - wv)  <=>  -v + k w <= L0 - top + k wv */
            add_half(sc, rr, 0, -1, k, m->bar_len0_mm - m->bar_top_v + k * wv);
        }
    }
    return SW_OK;
}

/* Interval of z on the ray (x, y, z) inside all half-spaces of pr, intersected with [lo, hi]. */
static inline int halfspace_interval(const sim_prim *pr, double x, double y, double *lo, double *hi)
{
    double a = *lo, b = *hi;
    for (int k = 0; k < pr->nh; k++) {
        const sim_halfspace *h = &pr->h[k];
        double rhs = h->b - h->n[0] * x - h->n[1] * y;
        if (h->n[2] > 1e-12) {
            double z = rhs / h->n[2];
            if (z < b)
                b = z;
        } else if (h->n[2] < -1e-12) {
            double z = rhs / h->n[2];
            if (z > a)
                a = z;
        } else if (rhs < 0) {
            return 0;
        }
        if (a >= b)
            return 0;
    }
    *lo = a;
    *hi = b;
    return 1;
}

/* The cylinder's interval on the ray: (q_u(z))^2 + (q_v(z))^2 <= R^2 and its w ends. */
static inline int cylinder_interval(const sim_prim *c, const double t[3], double x, double y,
                                    double *lo, double *hi)
{
    double dx = x - t[0], dy = y - t[1], dz0 = -t[2];
    double u0 = c->eu[0] * dx + c->eu[1] * dy + c->eu[2] * dz0;
    double v0 = c->ev[0] * dx + c->ev[1] * dy + c->ev[2] * dz0;
    double du = c->eu[2], dv = c->ev[2];
    double A = du * du + dv * dv, B = u0 * du + v0 * dv,
           C = u0 * u0 + v0 * v0 - c->radius * c->radius;
    if (A < 1e-18) {
        if (C > 0)
            return 0;
    } else {
        double disc = B * B - A * C;
        if (disc <= 0)
            return 0;
        double sq = sqrt(disc);
        double z1 = (-B - sq) / A, z2 = (-B + sq) / A;
        if (z1 > *lo)
            *lo = z1;
        if (z2 < *hi)
            *hi = z2;
        if (*lo >= *hi)
            return 0;
    }
    return halfspace_interval(c, x, y, lo, hi);
}

/* Running integral of profile pr at z (slice frame), interpolated; 0 below, total above. */
static inline void cum_at(const sim_profile *pr, double z, double *re, double *im)
{
    double x = (z - pr->z0_mm) / pr->dz_mm;
    int last = pr->n - 1;
    if (!(x > 0)) {
        *re = *im = 0;
    } else if (x >= last) {
        *re = pr->cum_re[last];
        *im = pr->cum_im[last];
    } else {
        int i = (int)x;
        double f = x - i;
        *re = pr->cum_re[i] + f * (pr->cum_re[i + 1] - pr->cum_re[i]);
        *im = pr->cum_im[i] + f * (pr->cum_im[i + 1] - pr->cum_im[i]);
    }
}

static void pixel_range(const sim_grid *g, const double lo[3], const double hi[3], int *i0, int *i1,
                        int *j0, int *j1)
{
    double a = ceil((lo[0] - g->x0) / g->step), b = floor((hi[0] - g->x0) / g->step);
    double c = ceil((g->y0 - hi[1]) / g->step), d = floor((g->y0 - lo[1]) / g->step);
    *j0 = a < 0 ? 0 : a > g->nf ? g->nf : (int)a;
    *j1 = b < -1 ? -1 : b > g->nf - 1 ? g->nf - 1 : (int)b;
    *i0 = c < 0 ? 0 : c > g->nf ? g->nf : (int)c;
    *i1 = d < -1 ? -1 : d > g->nf - 1 ? g->nf - 1 : (int)d;
}

void sim_scene_integrate(const sim_scene *sc, double zc, sim_profile *const *pr, int ne,
                         const sim_grid *g, float *const *acc)
{
    /* the profile's support, shared by all echoes (one frequency grid) */
    double zlo = zc + pr[0]->z0_mm, zhi = zc + pr[0]->z0_mm + (pr[0]->n - 1) * pr[0]->dz_mm;
    double total_re[SIM_MAX_ECHOES], total_im[SIM_MAX_ECHOES];
    for (int e = 0; e < ne; e++) {
        total_re[e] = pr[e]->cum_re[pr[e]->n - 1];
        total_im[e] = pr[e]->cum_im[pr[e]->n - 1];
    }
    const sim_prim *cyl = &sc->p[0];
    for (int k = 0; k < sc->n; k++) {
        const sim_prim *p = &sc->p[k];
        if (p->hi[2] <= zlo || p->lo[2] >= zhi)
            continue;
        int i0, i1, j0, j1;
        pixel_range(g, p->lo, p->hi, &i0, &i1, &j0, &j1);
        for (int i = i0; i <= i1; i++) {
            double y = g->y0 - i * g->step;
            float *const *row = acc;
            size_t base = (size_t)i * g->nf;
            for (int j = j0; j <= j1; j++) {
                double x = g->x0 + j * g->step;
                double lo = zlo, hi = zhi;
                /* every primitive lies inside the fluid: clip to the cylinder first */
                if (!cylinder_interval(cyl, sc->t, x, y, &lo, &hi))
                    continue;
                if (k > 0 && !halfspace_interval(p, x, y, &lo, &hi))
                    continue;
                size_t ix = 2 * (base + (size_t)j);
                if (lo <= zlo && hi >= zhi) {
                    for (int e = 0; e < ne; e++) {
                        row[e][ix] += (float)(p->sign * total_re[e]);
                        row[e][ix + 1] += (float)(p->sign * total_im[e]);
                    }
                    continue;
                }
                for (int e = 0; e < ne; e++) {
                    double r1, m1, r2, m2;
                    cum_at(pr[e], lo - zc, &r1, &m1);
                    cum_at(pr[e], hi - zc, &r2, &m2);
                    row[e][ix] += (float)(p->sign * (r2 - r1));
                    row[e][ix + 1] += (float)(p->sign * (m2 - m1));
                }
            }
        }
    }
}
