/* fit.c: local quadratic fits and level crossings on sampled profiles, smoothing, order statistics
 * and the Rician magnitude model. */
#include <stdlib.h>
#include <string.h>

#include "an_int.h"

int an_quad_fit(const double *p, int i0, int i1, double ic, double step, double c[3], double tq,
                double *g)
{
    /* Normal equations in a scaled abscissa s = t / hs for conditioning. */
    double hs = fmax(fabs(i0 - ic), fabs(i1 - ic)) * step;
    if (!(hs > 0))
        return -1;
    double S[5] = {0}, B[3] = {0};
    int cnt = 0;
    for (int i = i0; i <= i1; i++) {
        if (!isfinite(p[i]))
            continue;
        double s = (i - ic) * step / hs, s2 = s * s;
        S[0] += 1;
        S[1] += s;
        S[2] += s2;
        S[3] += s2 * s;
        S[4] += s2 * s2;
        B[0] += p[i];
        B[1] += s * p[i];
        B[2] += s2 * p[i];
        cnt++;
    }
    if (cnt < 3)
        return -1;
    /* Inverse of the symmetric matrix [[S0 S1 S2][S1 S2 S3][S2 S3 S4]] by cofactors. */
    double a = S[0], b = S[1], cc = S[2], d = S[3], e = S[4];
    double A00 = cc * e - d * d, A01 = -(b * e - cc * d), A02 = b * d - cc * cc;
    double A11 = a * e - cc * cc, A12 = -(a * d - b * cc), A22 = a * cc - b * b;
    double det = a * A00 + b * A01 + cc * A02;
    if (!(fabs(det) > 1e-12 * fmax(1.0, a * a * a)))
        return -1;
    double inv[3][3] = {{A00 / det, A01 / det, A02 / det},
                        {A01 / det, A11 / det, A12 / det},
                        {A02 / det, A12 / det, A22 / det}};
    double k[3];
    for (int r = 0; r < 3; r++)
        k[r] = inv[r][0] * B[0] + inv[r][1] * B[1] + inv[r][2] * B[2];
    c[0] = k[0];
    c[1] = k[1] / hs;
    c[2] = k[2] / (hs * hs);
    if (g) {
        double sq = tq / hs, e3[3] = {1, sq, sq * sq}, h[3];
        for (int r = 0; r < 3; r++)
            h[r] = e3[0] * inv[0][r] + e3[1] * inv[1][r] + e3[2] * inv[2][r];
        for (int i = i0; i <= i1; i++) {
            if (!isfinite(p[i])) {
                g[i - i0] = 0;
                continue;
            }
            double s = (i - ic) * step / hs;
            g[i - i0] = h[0] + h[1] * s + h[2] * s * s;
        }
    }
    return 0;
}

/* Root of c0 + c1 t + c2 t^2 = level nearest t = 0 with the slope's sign; NAN if none. */
static double quad_root(const double c[3], double level, int sign)
{
    double a = c[2], b = c[1], k = c[0] - level;
    double best = NAN;
    if (fabs(a) < 1e-12 * (fabs(b) + 1e-300)) {
        if (b != 0 && (b > 0) == (sign > 0))
            best = -k / b;
        return best;
    }
    double disc = b * b - 4 * a * k;
    if (disc < 0)
        return NAN;
    double sq = sqrt(disc);
    double q = -0.5 * (b + (b >= 0 ? sq : -sq));
    double r[2] = {q / a, q != 0 ? k / q : NAN};
    for (int i = 0; i < 2; i++) {
        if (!isfinite(r[i]))
            continue;
        double sl = b + 2 * a * r[i];
        if ((sl > 0) != (sign > 0))
            continue;
        if (isnan(best) || fabs(r[i]) < fabs(best))
            best = r[i];
    }
    return best;
}

int an_xing_find(const an_line *l, const double *p, int n, double guess, double level, double h_mm,
                 int sign, an_xing *x)
{
    memset(x, 0, sizeof *x);
    double step = l ? l->step : 1.0;
    if (!isfinite(guess) || n < 5)
        return -1;
    int hn = (int)lround(h_mm / step);
    if (hn < 2)
        hn = 2;
    double c[3], t = NAN, ic = guess;
    int i0 = 0, i1 = 0, conv = 0;
    for (int it = 0; it < 6 && !conv; it++) {
        int icn = (int)lround(ic);
        i0 = icn - hn < 0 ? 0 : icn - hn;
        i1 = icn + hn > n - 1 ? n - 1 : icn + hn;
        if (i1 - i0 < 4)
            return -1;
        if (an_quad_fit(p, i0, i1, ic, step, c, 0, NULL))
            return -1;
        t = quad_root(c, level, sign);
        if (!isfinite(t) || fabs(t) > 2.0 * hn * step)
            return -1;
        double nic = ic + t / step;
        conv = fabs(t) < 0.5 * step;
        if (nic < 0 || nic > n - 1)
            return -1;
        if (!conv)
            ic = nic; /* re-centre; once converged, t stays relative to this window */
    }
    if (!conv)
        return -1;
    int m = i1 - i0 + 1;
    double *g = malloc((size_t)m * sizeof *g);
    if (!g)
        return -1;
    if (an_quad_fit(p, i0, i1, ic, step, c, t, g)) {
        free(g);
        return -1;
    }
    x->idx = ic + t / step;
    x->slope = c[1] + 2 * c[2] * t;
    x->ss = l ? an_line_weight_ss(l, i0, m, g) : NAN;
    x->i0 = i0;
    x->i1 = i1;
    x->ok = 1;
    free(g);
    return 0;
}

double an_walk_cross(const double *p, int n, int start, int dir, double level, int below)
{
    if (start < 0 || start >= n || !isfinite(p[start]))
        return NAN;
    for (int i = start + dir; i >= 0 && i < n; i += dir) {
        if (!isfinite(p[i]))
            return NAN;
        int hit = below ? p[i] < level : p[i] >= level;
        if (hit) {
            double a = p[i - dir], b = p[i];
            double f = (b != a) ? (level - a) / (b - a) : 0.5;
            return (i - dir) + dir * f;
        }
    }
    return NAN;
}

void an_smooth(const double *p, int n, int w, double *q)
{
    int h = w / 2;
    for (int i = 0; i < n; i++) {
        double s = 0;
        int c = 0;
        for (int j = i - h; j <= i + h; j++)
            if (j >= 0 && j < n && isfinite(p[j])) {
                s += p[j];
                c++;
            }
        q[i] = c ? s / c : NAN;
    }
}

double an_mean_range(const double *p, int n, int i0, int i1)
{
    if (i0 < 0)
        i0 = 0;
    if (i1 > n - 1)
        i1 = n - 1;
    double s = 0;
    int c = 0;
    for (int i = i0; i <= i1; i++)
        if (isfinite(p[i])) {
            s += p[i];
            c++;
        }
    return c ? s / c : NAN;
}

float an_select(float *v, size_t n, size_t k)
{
    size_t lo = 0, hi = n - 1;
    while (lo < hi) {
        float piv = v[lo + (hi - lo) / 2];
        size_t i = lo, j = hi;
        while (i <= j) {
            while (v[i] < piv)
                i++;
            while (v[j] > piv)
                j--;
            if (i <= j) {
                float t = v[i];
                v[i] = v[j];
                v[j] = t;
                i++;
                if (j == 0)
                    break;
                j--;
            }
        }
        if (k <= j)
            hi = j;
        else if (k >= i)
            lo = i;
        else
            return v[k];
    }
    return v[k];
}

double an_median(float *v, size_t n)
{
    if (n == 0)
        return NAN;
    float a = an_select(v, n, n / 2);
    if (n % 2)
        return a;
    float b = an_select(v, n, n / 2 - 1);
    return 0.5 * ((double)a + b);
}

/* Exponentially scaled modified Bessel functions I0(x) e^-x and I1(x) e^-x, x >= 0, by the
 * polynomial approximations of Abramowitz and Stegun 9.8.1-9.8.4 (relative error below 2e-7). */
static double i0e(double x)
{
    if (x < 3.75) {
        double t = x / 3.75, y = t * t;
        return exp(-x) *
               (1.0 + y * (3.5156229 + y * (3.0899424 + y * (1.2067492 +
                y * (0.2659732 + y * (0.0360768 + y * 0.0045813))))));
    }
    double t = 3.75 / x;
    return (0.39894228 + t * (0.01328592 + t * (0.00225319 + t * (-0.00157565 +
            t * (0.00916281 + t * (-0.02057706 + t * (0.02635537 + t * (-0.01647633 +
            t * 0.00392377)))))))) / sqrt(x);
}

static double i1e(double x)
{
    if (x < 3.75) {
        double t = x / 3.75, y = t * t;
        return exp(-x) * x *
               (0.5 + y * (0.87890594 + y * (0.51498869 + y * (0.15084934 +
                y * (0.02658733 + y * (0.00301532 + y * 0.00032411))))));
    }
    double t = 3.75 / x;
    return (0.39894228 + t * (-0.03988024 + t * (-0.00362018 + t * (0.00163801 +
            t * (-0.01031555 + t * (0.02282967 + t * (-0.02895312 + t * (0.01787654 -
            t * 0.00420059)))))))) / sqrt(x);
}

/* Mean of the Rice distribution: sigma sqrt(pi/2) L_1/2(-a^2 / 2 sigma^2), written with the scaled
 * Bessel functions so that it does not overflow. */
double an_rice_mean(double a, double sigma)
{
    if (!(sigma > 0))
        return fabs(a);
    a = fabs(a);
    double r = a / sigma;
    if (r > 40)
        return a + sigma * sigma / (2 * a);
    double nu = 0.5 * r * r;
    return sigma * sqrt(M_PI / 2) * ((1 + nu) * i0e(nu / 2) + nu * i1e(nu / 2));
}

double an_rice_sd(double a, double sigma)
{
    if (!(sigma > 0))
        return 0;
    double m = an_rice_mean(a, sigma);
    double v = a * a + 2 * sigma * sigma - m * m;
    return v > 0 ? sqrt(v) : 0;
}

double an_rice_invert(double m, double sigma)
{
    if (!(sigma > 0))
        return m;
    if (!(m > sigma * sqrt(M_PI / 2)))
        return 0;
    double lo = 0, hi = m; /* the mean exceeds a, so a < m */
    for (int i = 0; i < 60; i++) {
        double mid = 0.5 * (lo + hi);
        if (an_rice_mean(mid, sigma) < m)
            lo = mid;
        else
            hi = mid;
    }
    return 0.5 * (lo + hi);
}
