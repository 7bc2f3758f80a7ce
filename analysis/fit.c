/* fit.c: local quadratic fits and level crossings on sampled profiles, smoothing, order statistics
 * and the Rician magnitude model. */
#include <stdlib.h>
#include <string.h>

#include "an_int.h"

int an_poly_fit(const double *p, int i0, int i1, double ic, double step, int deg, double *c,
                double tq, double *g)
{
    if (deg < 1 || deg > 3)
        return -1;
    int m = deg + 1;
    double hs = fmax(fabs(i0 - ic), fabs(i1 - ic)) * step;
    if (!(hs > 0))
        return -1;
    /* Normal equations in s = t / hs; A is m x m, augmented with the identity to get the inverse.
     */
    double S[7] = {0}, A[4][8];
    int cnt = 0;
    for (int i = i0; i <= i1; i++) {
        if (!isfinite(p[i]))
            continue;
        double s1 = (i - ic) * step / hs, pw = 1;
        for (int k = 0; k < 2 * m - 1; k++) {
            S[k] += pw;
            pw *= s1;
        }
        cnt++;
    }
    if (cnt < m + 1)
        return -1;
    for (int r = 0; r < m; r++)
        for (int q = 0; q < 2 * m; q++)
            A[r][q] = q < m ? S[r + q] : (q - m == r);
    for (int k = 0; k < m; k++) {
        int piv = k;
        for (int r = k + 1; r < m; r++)
            if (fabs(A[r][k]) > fabs(A[piv][k]))
                piv = r;
        if (!(fabs(A[piv][k]) > 1e-12 * S[0]))
            return -1;
        for (int q = 0; q < 2 * m; q++) {
            double t = A[k][q];
            A[k][q] = A[piv][q];
            A[piv][q] = t;
        }
        double d = A[k][k];
        for (int q = 0; q < 2 * m; q++)
            A[k][q] /= d;
        for (int r = 0; r < m; r++) {
            if (r == k)
                continue;
            double f = A[r][k];
            for (int q = 0; q < 2 * m; q++)
                A[r][q] -= f * A[k][q];
        }
    }
    /* inv = A[.][m..2m); coefficients k = inv B with B_r = sum s^r p. */
    double B[4] = {0};
    for (int i = i0; i <= i1; i++) {
        if (!isfinite(p[i]))
            continue;
        double s1 = (i - ic) * step / hs, pw = 1;
        for (int r = 0; r < m; r++) {
            B[r] += pw * p[i];
            pw *= s1;
        }
    }
    double sc = 1;
    for (int r = 0; r < m; r++) {
        double k = 0;
        for (int q = 0; q < m; q++)
            k += A[r][m + q] * B[q];
        c[r] = k / sc;
        sc *= hs;
    }
    for (int r = m; r < 4; r++)
        c[r] = 0;
    if (g) {
        double sq = tq / hs, e[4], h[4] = {0}, pw = 1;
        for (int r = 0; r < m; r++) {
            e[r] = pw;
            pw *= sq;
        }
        for (int q = 0; q < m; q++)
            for (int r = 0; r < m; r++)
                h[q] += e[r] * A[r][m + q];
        for (int i = i0; i <= i1; i++) {
            if (!isfinite(p[i])) {
                g[i - i0] = 0;
                continue;
            }
            double s1 = (i - ic) * step / hs, v = 0;
            pw = 1;
            for (int q = 0; q < m; q++) {
                v += h[q] * pw;
                pw *= s1;
            }
            g[i - i0] = v;
        }
    }
    return 0;
}

int an_quad_fit(const double *p, int i0, int i1, double ic, double step, double c[3], double tq,
                double *g)
{
    double c4[4];
    int rc = an_poly_fit(p, i0, i1, ic, step, 2, c4, tq, g);
    if (!rc)
        memcpy(c, c4, 3 * sizeof *c);
    return rc;
}

/* Root of the polynomial c (degree <= 3) = level nearest t = 0 whose slope has the given sign, by
 * Newton's method from several starts within +-lim; NAN if none. */
static double poly_root(const double c[4], double level, int sign, double lim)
{
    double best = NAN;
    double starts[5] = {0, -0.5 * lim, 0.5 * lim, -lim, lim};
    for (int k = 0; k < 5; k++) {
        double t = starts[k];
        for (int it = 0; it < 40; it++) {
            double f = c[0] - level + t * (c[1] + t * (c[2] + t * c[3]));
            double d = c[1] + t * (2 * c[2] + 3 * t * c[3]);
            if (d == 0)
                break;
            double nt = t - f / d;
            if (!isfinite(nt) || fabs(nt) > 3 * lim)
                break;
            if (fabs(nt - t) < 1e-9 * (1 + lim)) {
                t = nt;
                double sl = c[1] + t * (2 * c[2] + 3 * t * c[3]);
                if ((sl > 0) == (sign > 0) && (isnan(best) || fabs(t) < fabs(best)))
                    best = t;
                break;
            }
            t = nt;
        }
    }
    return best;
}

int an_xing_find_in(const an_line *l, const double *p, int lim0, int lim1, double guess,
                    double level, double h_mm, int sign, an_xing *x)
{
    memset(x, 0, sizeof *x);
    double step = l ? l->step : 1.0;
    if (!isfinite(guess) || lim1 - lim0 < 4)
        return -1;
    int hn = (int)lround(h_mm / step);
    if (hn < 2)
        hn = 2;
    double c[4], t = NAN, ic = guess;
    int i0 = 0, i1 = 0, conv = 0, deg = 3;
    /* A cubic follows an edge's sigmoid shape through the crossing; its value at the window's
     * centre has the same noise as a quadratic's. Fall back to lower degrees when it has no clean
     * root. */
    for (; deg >= 1; deg--) {
        ic = guess;
        for (int it = 0; it < 8 && !conv; it++) {
            int icn = (int)lround(ic);
            i0 = icn - hn < lim0 ? lim0 : icn - hn;
            i1 = icn + hn > lim1 ? lim1 : icn + hn;
            if (i1 - i0 < 2 * deg + 1 || an_poly_fit(p, i0, i1, ic, step, deg, c, 0, NULL))
                break;
            t = poly_root(c, level, sign, hn * step);
            if (!isfinite(t) || fabs(t) > 1.5 * hn * step)
                break;
            double nic = ic + t / step;
            if (nic < lim0 || nic > lim1)
                break;
            conv = fabs(t) < 0.5 * step || it == 7;
            if (!conv)
                ic = nic; /* re-centre; once converged, t stays relative to this window */
        }
        if (conv)
            break;
    }
    if (!conv) {
        /* Last resort: a straight line over the window at the first guess, not re-centred. */
        deg = 1;
        ic = guess;
        int icn = (int)lround(ic);
        i0 = icn - hn < lim0 ? lim0 : icn - hn;
        i1 = icn + hn > lim1 ? lim1 : icn + hn;
        if (i1 - i0 < 3 || an_poly_fit(p, i0, i1, ic, step, 1, c, 0, NULL) || c[1] == 0 ||
            (c[1] > 0) != (sign > 0))
            return -1;
        t = (level - c[0]) / c[1];
        /* a root beyond the window (a noisy, shallow edge): keep the first guess, whose noise the
         * line's value there carries */
        if (!(fabs(t) <= hn * step) || ic + t / step < lim0 || ic + t / step > lim1)
            t = 0;
    }
    int m = i1 - i0 + 1;
    double *g = malloc((size_t)m * sizeof *g);
    if (!g)
        return -1;
    if (an_poly_fit(p, i0, i1, ic, step, deg, c, t, g)) {
        free(g);
        return -1;
    }
    x->idx = ic + t / step;
    x->slope = c[1] + t * (2 * c[2] + 3 * t * c[3]);
    x->curv = 2 * c[2] + 6 * c[3] * t;
    x->ss = l ? an_line_weight_ss(l, i0, m, g) : NAN;
    x->i0 = i0;
    x->i1 = i1;
    x->ok = 1;
    free(g);
    return 0;
}

int an_xing_find(const an_line *l, const double *p, int n, double guess, double level, double h_mm,
                 int sign, an_xing *x)
{
    return an_xing_find_in(l, p, 0, n - 1, guess, level, h_mm, sign, x);
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
    /* Running sums over the finite samples: O(n) whatever the width. */
    int h = w / 2, c = 0;
    double s = 0;
    for (int j = 0; j < h && j < n; j++)
        if (isfinite(p[j]))
            s += p[j], c++;
    for (int i = 0; i < n; i++) {
        int in = i + h, out = i - h - 1;
        if (in < n && isfinite(p[in]))
            s += p[in], c++;
        if (out >= 0 && isfinite(p[out]))
            s -= p[out], c--;
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
    /* after the selection everything below index n / 2 is at most a: the other middle value is
     * the largest of those */
    float b = v[0];
    for (size_t i = 1; i < n / 2; i++)
        if (v[i] > b)
            b = v[i];
    return 0.5 * ((double)a + b);
}

/* Exponentially scaled modified Bessel functions I0(x) e^-x and I1(x) e^-x, x >= 0, by the
 * polynomial approximations of Abramowitz and Stegun 9.8.1-9.8.4 (relative error below 2e-7). */
static double i0e(double x)
{
    if (x < 3.75) {
        double t = x / 3.75, y = t * t;
        return exp(-x) *
               (1.0 +
                y * (3.5156229 +
                     y * (3.0899424 +
                          y * (1.2067492 + y * (0.2659732 + y * (0.0360768 + y * 0.0045813))))));
    }
    double t = 3.75 / x;
    return (0.39894228 +
            t * (0.01328592 +
                 t * (0.00225319 +
                      t * (-0.00157565 +
                           t * (0.00916281 +
                                t * (-0.02057706 +
                                     t * (0.02635537 + t * (-0.01647633 + t * 0.00392377)))))))) /
           sqrt(x);
}

static double i1e(double x)
{
    if (x < 3.75) {
        double t = x / 3.75, y = t * t;
        return exp(-x) * x *
               (0.5 + y * (0.87890594 +
                           y * (0.51498869 +
                                y * (0.15084934 +
                                     y * (0.02658733 + y * (0.00301532 + y * 0.00032411))))));
    }
    double t = 3.75 / x;
    return (0.39894228 +
            t * (-0.03988024 +
                 t * (-0.00362018 +
                      t * (0.00163801 +
                           t * (-0.01031555 +
                                t * (0.02282967 +
                                     t * (-0.02895312 + t * (0.01787654 - t * 0.00420059)))))))) /
           sqrt(x);
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
