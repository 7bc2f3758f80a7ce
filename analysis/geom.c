/* geom.c: from ImageOrientationPatient to the phantom frame, bilinear sampling, and profiles along
 * lines with their exact pixel weights (for the noise propagation). */
#include <stdlib.h>
#include <string.h>

#include "an_int.h"

static double dot3(const double *a, const double *b)
{
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2];
}

static void cross3(const double *a, const double *b, double *o)
{
    o[0] = a[1] * b[2] - a[2] * b[1];
    o[1] = a[2] * b[0] - a[0] * b[2];
    o[2] = a[0] * b[1] - a[1] * b[0];
}

static int unit3(double *a)
{
    double n = sqrt(dot3(a, a));
    if (!(n > 1e-9))
        return -1;
    a[0] /= n;
    a[1] /= n;
    a[2] /= n;
    return 0;
}

static int invert2(const double *d, double *di)
{
    double det = d[0] * d[3] - d[1] * d[2];
    if (!(fabs(det) > 1e-12))
        return -1;
    di[0] = d[3] / det;
    di[1] = -d[1] / det;
    di[2] = -d[2] / det;
    di[3] = d[0] / det;
    return 0;
}

int an_geom_make(const an_image *im, int wsign, an_geom *g)
{
    memset(g, 0, sizeof *g);
    g->wsign = wsign >= 0 ? 1 : -1;
    double col = im->col_mm > 0 ? im->col_mm : 1.0, row = im->row_mm > 0 ? im->row_mm : 1.0;
    double r[3] = {im->iop[0], im->iop[1], im->iop[2]};
    double c[3] = {im->iop[3], im->iop[4], im->iop[5]};
    if (!im->has_geometry || unit3(r) || unit3(c) || fabs(dot3(r, c)) > 0.01) {
        /* As displayed: columns to the right, rows downwards; the stack's order is unknown. */
        g->d[0] = col;
        g->d[3] = -row;
        g->z_n = NAN;
        g->has_geometry = 0;
        g->uhat[0] = 1;
        g->vhat[1] = -1;
        g->n[2] = 1;
        return invert2(g->d, g->di);
    }
    g->has_geometry = 1;
    cross3(r, c, g->n);
    if (unit3(g->n))
        return -1;
    /* Anterior is -y in LPS; planes holding the y axis (coronal) fall back to superior (+z). */
    double ant[3] = {0, -1, 0}, sup[3] = {0, 0, 1};
    const double *up = fabs(dot3(ant, g->n)) < 0.8 ? ant : sup;
    double k = dot3(up, g->n);
    for (int i = 0; i < 3; i++)
        g->vhat[i] = up[i] - k * g->n[i];
    if (unit3(g->vhat))
        return -1;
    double w[3] = {g->wsign * g->n[0], g->wsign * g->n[1], g->wsign * g->n[2]};
    cross3(w, g->vhat, g->uhat); /* left-handed frame: u = w x v (head first: u = +x) */
    g->d[0] = col * dot3(r, g->uhat);
    g->d[1] = row * dot3(c, g->uhat);
    g->d[2] = col * dot3(r, g->vhat);
    g->d[3] = row * dot3(c, g->vhat);
    g->z_n = dot3(im->ipp, g->n);
    return invert2(g->d, g->di);
}

void an_pose_make(const an_geom *g, double xc, double yc, double rot_deg, an_pose *p)
{
    double c = cos(rot_deg / AN_DEG), s = sin(rot_deg / AN_DEG);
    const double *di = g->di;
    /* (x, y) = (xc, yc) + DI R(rot) (u, v): rotating first in the display plane, then to pixels. */
    double m11 = di[0] * c + di[1] * s, m12 = -di[0] * s + di[1] * c;
    double m21 = di[2] * c + di[3] * s, m22 = -di[2] * s + di[3] * c;
    p->m[0] = xc;
    p->m[1] = m11;
    p->m[2] = m12;
    p->m[3] = yc;
    p->m[4] = m21;
    p->m[5] = m22;
    double det = m11 * m22 - m12 * m21;
    p->inv[0] = 0;
    p->inv[1] = m22 / det;
    p->inv[2] = -m12 / det;
    p->inv[3] = 0;
    p->inv[4] = -m21 / det;
    p->inv[5] = m11 / det;
}

void an_pose_to_px(const an_pose *p, double u, double v, double *x, double *y)
{
    *x = p->m[0] + p->m[1] * u + p->m[2] * v;
    *y = p->m[3] + p->m[4] * u + p->m[5] * v;
}

void an_pose_to_ph(const an_pose *p, double x, double y, double *u, double *v)
{
    double dx = x - p->m[0], dy = y - p->m[3];
    *u = p->inv[1] * dx + p->inv[2] * dy;
    *v = p->inv[4] * dx + p->inv[5] * dy;
}

void an_line_offsets(an_line *l, double half, double spacing)
{
    if (!(half > 0) || !(spacing > 0)) {
        l->k = 1;
        l->off[0] = 0;
        return;
    }
    int k = (int)ceil(2 * half / spacing) + 1;
    if (k > AN_LINE_MAX_OFF)
        k = AN_LINE_MAX_OFF;
    if (k < 2)
        k = 2;
    l->k = k;
    for (int j = 0; j < k; j++)
        l->off[j] = -half + 2 * half * j / (k - 1);
}

void an_line_point(const an_line *l, double t, double *u, double *v)
{
    *u = l->u0 + t * l->step * l->du;
    *v = l->v0 + t * l->step * l->dv;
}

int an_line_sample(const an_line *l, double *out)
{
    int bad = 0, n = l->n, k = l->k;
    const an_image *im = l->img;
    const double *m = l->pose.m;
    double m0 = m[0], m1 = m[1], m2 = m[2], m3 = m[3], m4 = m[4], m5 = m[5];
    double u0 = l->u0, v0 = l->v0, step = l->step, du = l->du, dv = l->dv;
    double opu[AN_LINE_MAX_OFF], opv[AN_LINE_MAX_OFF];
    for (int j = 0; j < k; j++) {
        opu[j] = l->off[j] * l->pu;
        opv[j] = l->off[j] * l->pv;
    }
    /* A line whose corners (first and last sample at the outermost offsets) lie inside the image
     * by a margin is inside at every sample (the map is affine): no bounds checks there. */
    int inside = n > 0;
    for (int c = 0; c < 4 && inside; c++) {
        int i = c & 1 ? n - 1 : 0, j = c & 2 ? k - 1 : 0;
        double uu = (u0 + i * step * du) + opu[j], vv = (v0 + i * step * dv) + opv[j];
        double x = m0 + m1 * uu + m2 * vv, y = m3 + m4 * uu + m5 * vv;
        inside = x > 1e-6 && y > 1e-6 && x < im->width - 1 - 1e-6 && y < im->height - 1 - 1e-6;
    }
    for (int i = 0; i < n; i++) {
        double u = u0 + i * step * du, v = v0 + i * step * dv, s = 0;
        if (inside) {
            for (int j = 0; j < k; j++) {
                double uu = u + opu[j], vv = v + opv[j];
                double x = m0 + m1 * uu + m2 * vv, y = m3 + m4 * uu + m5 * vv;
                int x0 = (int)x, y0 = (int)y;
                double fx = x - x0, fy = y - y0;
                const float *r0 = im->px + (ptrdiff_t)y0 * im->stride + x0, *r1 = r0 + im->stride;
                s += (1 - fy) * ((1 - fx) * r0[0] + fx * r0[1]) +
                     fy * ((1 - fx) * r1[0] + fx * r1[1]);
            }
        } else {
            for (int j = 0; j < k; j++) {
                double uu = u + opu[j], vv = v + opv[j];
                s += an_bilinear(im, m0 + m1 * uu + m2 * vv, m3 + m4 * uu + m5 * vv);
            }
        }
        out[i] = s / k;
        if (!isfinite(out[i])) {
            out[i] = NAN;
            bad++;
        }
    }
    return bad;
}

double an_line_weight_ss(const an_line *l, int i0, int m, const double *c)
{
    if (m <= 0 || i0 < 0 || i0 + m > l->n)
        return NAN;
    const an_image *im = l->img;
    const double *pm = l->pose.m;
    double xmin = INFINITY, xmax = -INFINITY, ymin = INFINITY, ymax = -INFINITY;
    int ends[2] = {i0, i0 + m - 1}, offs[2] = {0, l->k - 1};
    for (int a = 0; a < 2; a++)
        for (int b = 0; b < 2; b++) {
            double u, v;
            an_line_point(l, ends[a], &u, &v);
            u += l->off[offs[b]] * l->pu;
            v += l->off[offs[b]] * l->pv;
            double x = pm[0] + pm[1] * u + pm[2] * v, y = pm[3] + pm[4] * u + pm[5] * v;
            xmin = fmin(xmin, x);
            xmax = fmax(xmax, x);
            ymin = fmin(ymin, y);
            ymax = fmax(ymax, y);
        }
    if (!(xmin >= 0 && ymin >= 0 && xmax <= im->width - 1 && ymax <= im->height - 1))
        return NAN;
    int gx0 = (int)floor(xmin) - 1, gy0 = (int)floor(ymin) - 1;
    int gw = (int)ceil(xmax) - gx0 + 3, gh = (int)ceil(ymax) - gy0 + 3;
    if (gw <= 0 || gh <= 0 || (double)gw * gh > 4e6)
        return NAN;
    double *grid = calloc((size_t)gw * (size_t)gh, sizeof *grid);
    if (!grid)
        return NAN;
    for (int i = i0; i < i0 + m; i++) {
        double wi = c[i - i0] / l->k * (l->gain ? l->gain[i] : 1.0);
        if (wi == 0)
            continue;
        double u0, v0;
        an_line_point(l, i, &u0, &v0);
        for (int j = 0; j < l->k; j++) {
            double u = u0 + l->off[j] * l->pu, v = v0 + l->off[j] * l->pv;
            double x = pm[0] + pm[1] * u + pm[2] * v, y = pm[3] + pm[4] * u + pm[5] * v;
            int x0 = (int)x, y0 = (int)y;
            if (x0 >= im->width - 1)
                x0 = im->width - 2;
            if (y0 >= im->height - 1)
                y0 = im->height - 2;
            double fx = x - x0, fy = y - y0;
            double *g = grid + (size_t)(y0 - gy0) * gw + (x0 - gx0);
            g[0] += wi * (1 - fx) * (1 - fy);
            g[1] += wi * fx * (1 - fy);
            g[gw] += wi * (1 - fx) * fy;
            g[gw + 1] += wi * fx * fy;
        }
    }
    double ss = 0;
    for (size_t q = 0; q < (size_t)gw * gh; q++)
        ss += grid[q] * grid[q];
    free(grid);
    return ss;
}

void an_line_init(an_line *l, const an_image *im, const an_pose *p, double u0, double v0,
                  double du, double dv, double step, int n)
{
    memset(l, 0, sizeof *l);
    l->img = im;
    l->pose = *p;
    l->u0 = u0;
    l->v0 = v0;
    l->du = du;
    l->dv = dv;
    l->pu = -dv;
    l->pv = du;
    l->step = step;
    l->n = n;
    l->k = 1;
}
