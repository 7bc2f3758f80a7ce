/* draw.c: the analytic phantom drawing of draw.h. */
#include "draw.h"

#include <math.h>
#include <string.h>

void dr_defaults(dr_params *p)
{
    memset(p, 0, sizeof *p);
    p->matrix = 256;
    p->fov_mm = 250;
    p->thickness_mm = 5;
    p->fluid = 1000;
    p->insert = DR_CROSSED;
    p->wedge_slope = 1.0;
    p->wedges = 1;
    p->seed = 7;
}

static uint64_t next(uint64_t *s)
{
    uint64_t x = *s ? *s : 0x9E3779B97F4A7C15ull;
    x ^= x << 13;
    x ^= x >> 7;
    x ^= x << 17;
    *s = x;
    return x;
}

double dr_gauss(uint64_t *s)
{
    double u1 = ((next(s) >> 11) + 0.5) / 9007199254740992.0,
           u2 = ((next(s) >> 11) + 0.5) / 9007199254740992.0;
    return sqrt(-2 * log(u1)) * cos(2 * M_PI * u2);
}

/* Length of [a, b] inside [lo, hi]. */
static double overlap(double a, double b, double lo, double hi)
{
    double x = fmax(a, lo), y = fmin(b, hi);
    return y > x ? y - x : 0;
}

/* Fluid fraction of the slab [w0, w1] at phantom point (u, v); wv is the local wedge vertex. */
static double fluid_at(const dr_params *p, double u, double v, double w0, double w1, int k)
{
    double T = w1 - w0;
    if (u * u + v * v > 95.0 * 95.0)
        return 0;
    if (p->uniform)
        return 1;
    if (k == 1 && p->insert != DR_NONE && fabs(u) <= 70 && fabs(v) <= 10) {
        if (p->insert == DR_SINGLE_WEDGE) {
            if (v >= 1.5 && v <= 5.5) /* fluid where w < slope u */
                return overlap(w0, w1, -1e9, p->wedge_slope * u) / T;
            return 0;
        }
        if (v >= 1.5 && v <= 5.5)
            return overlap(w0, w1, 0.1 * u - 0.5, 0.1 * u + 0.5) / T;
        if (p->insert == DR_CROSSED && v >= -5.5 && v <= -1.5)
            return overlap(w0, w1, -0.1 * u - 0.5, -0.1 * u + 0.5) / T;
        return 0;
    }
    if (p->wedges && (k == 1 || k == 11)) {
        double wv = k == 1 ? 0 : 100, a = w0 - wv, b = w1 - wv;
        if (fabs(u) <= 15 && v >= 80 && v <= 95)
            return 0;
        if (u >= -6 && u <= -1 && v < 80) /* left bar: plastic where w - wv >= 65 - v */
            return overlap(a, b, -1e9, 65 - v) / T;
        if (u >= 1 && u <= 6 && v < 80) /* right bar: plastic where w - wv <= v - 65 */
            return overlap(a, b, v - 65, 1e9) / T;
    }
    return 1;
}

void dr_slice(const dr_params *p, int k, float *px, an_image *view)
{
    int n = p->matrix;
    double dx = p->fov_mm / n, c = cos(p->rot_deg * M_PI / 180), s = sin(p->rot_deg * M_PI / 180);
    double wc = 10.0 * (k - 1) + p->d_mm, w0 = wc - 0.5 * p->thickness_mm,
           w1 = wc + 0.5 * p->thickness_mm;
    uint64_t rng = p->seed * 1000003u + (uint64_t)k;
    const int ss = 4;
    for (int j = 0; j < n; j++)
        for (int i = 0; i < n; i++) {
            double acc = 0;
            if (!p->noise_only)
                for (int sj = 0; sj < ss; sj++)
                    for (int si = 0; si < ss; si++) {
                        double x = (i - 0.5 * (n - 1) + (si + 0.5) / ss - 0.5) * dx;
                        double y = (j - 0.5 * (n - 1) + (sj + 0.5) / ss - 0.5) * dx;
                        /* display: a right = x, b up = -y; phantom = R(-rot) (display - centre) */
                        double a = x - p->cx_mm, b = -y - p->cy_mm;
                        double u = c * a + s * b, v = -s * a + c * b;
                        acc += fluid_at(p, u, v, w0, w1, k);
                    }
            double sig = p->fluid * acc / (ss * ss);
            if (p->sigma > 0) {
                double re = sig + p->sigma * dr_gauss(&rng), im = p->sigma * dr_gauss(&rng);
                sig = sqrt(re * re + im * im);
            }
            px[(size_t)j * n + i] = (float)sig;
        }
    memset(view, 0, sizeof *view);
    view->px = px;
    view->width = view->height = n;
    view->stride = n;
    view->col_mm = view->row_mm = dx;
    view->has_geometry = 1;
    double iop[6] = {1, 0, 0, 0, 1, 0};
    memcpy(view->iop, iop, sizeof iop);
    view->ipp[0] = -0.5 * (n - 1) * dx;
    view->ipp[1] = -0.5 * (n - 1) * dx;
    view->ipp[2] = 10.0 * (k - 1) - 50.0; /* nominal plane, the stack centred on the isocentre */
    view->nominal_thickness_mm = p->thickness_mm;
}
