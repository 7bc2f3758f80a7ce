/* drift.c: baseline, EWMA and CUSUM control charts, least-squares trend with Student-t intervals
 * and the projected tolerance crossing (formulas and sources in drift.h and docs/trends.md). */
#include "drift.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

void an_drift_params_default(an_drift_params *p)
{
    if (!p)
        return;
    memset(p, 0, sizeof *p);
    p->lambda = 0.2;
    p->L = 3.0;
    p->k = 0.5;
    p->h = 5.0;
    p->baseline_n = 8;
    p->baseline_from = NAN;
    p->baseline_to = NAN;
    p->confidence = 0.95;
    p->cusum_restart = 1;
    p->close_after = 3;
}

sw_status an_drift_params_check(const an_drift_params *p, sw_error *err)
{
    if (!p)
        return sw_error_set(err, SW_EINVAL, "drift: no parameters");
    if (!(p->lambda > 0 && p->lambda <= 1))
        return sw_error_set(err, SW_EINVAL, "drift: lambda %g is not in (0, 1]", p->lambda);
    if (!(p->L > 0 && isfinite(p->L)))
        return sw_error_set(err, SW_EINVAL, "drift: L %g is not a positive number", p->L);
    if (!(p->k >= 0 && isfinite(p->k)))
        return sw_error_set(err, SW_EINVAL, "drift: k %g is not a number >= 0", p->k);
    if (!(p->h > 0 && isfinite(p->h)))
        return sw_error_set(err, SW_EINVAL, "drift: h %g is not a positive number", p->h);
    if (p->baseline_n < 2)
        return sw_error_set(err, SW_EINVAL, "drift: a baseline needs at least 2 results, not %d",
                            p->baseline_n);
    if (isfinite(p->baseline_from) != isfinite(p->baseline_to))
        return sw_error_set(err, SW_EINVAL, "drift: a baseline period needs both ends");
    if (isfinite(p->baseline_from) && !(p->baseline_to > p->baseline_from))
        return sw_error_set(err, SW_EINVAL, "drift: the baseline period ends before it starts");
    if (!(p->confidence > 0 && p->confidence < 1))
        return sw_error_set(err, SW_EINVAL, "drift: confidence %g is not in (0, 1)", p->confidence);
    if (!(p->sigma_floor >= 0 && isfinite(p->sigma_floor)))
        return sw_error_set(err, SW_EINVAL, "drift: sigma floor %g is not a number >= 0",
                            p->sigma_floor);
    if (p->close_after < 1 || p->close_after > 1000)
        return sw_error_set(err, SW_EINVAL, "drift: close_after %d is not in 1 to 1000",
                            p->close_after);
    return SW_OK;
}

const char *an_drift_status_name(an_drift_status s)
{
    switch (s) {
    case AN_DRIFT_NO_BASELINE: return "no baseline";
    case AN_DRIFT_IN_CONTROL: return "in control";
    case AN_DRIFT_OUT: return "drift";
    }
    return "unknown";
}

/* ---- baseline ---- */

sw_status an_baseline_compute(const double *x, const double *u, int n, an_baseline *out,
                              sw_error *err)
{
    if (!x || !out || n < 2)
        return sw_error_set(err, SW_EINVAL, "drift: a baseline needs at least 2 values");
    memset(out, 0, sizeof *out);
    double sum = 0, su2 = 0;
    int nu = 0;
    for (int i = 0; i < n; i++) {
        if (!isfinite(x[i]))
            return sw_error_set(err, SW_EINVAL, "drift: baseline value %d is not finite", i + 1);
        sum += x[i];
        if (u && isfinite(u[i]) && u[i] >= 0) {
            su2 += u[i] * u[i];
            nu++;
        }
    }
    double mean = sum / n, ss = 0;
    /* Two passes: the sum of squared deviations, not the difference of large sums. */
    for (int i = 0; i < n; i++)
        ss += (x[i] - mean) * (x[i] - mean);
    out->n = n;
    out->mean = mean;
    out->sd = sqrt(ss / (n - 1));
    out->u_rms = nu ? sqrt(su2 / nu) : NAN;
    out->source = AN_SIGMA_SD;
    out->sigma = out->sd;
    if (nu && out->u_rms > out->sd) {
        out->sigma = out->u_rms;
        out->source = AN_SIGMA_UNCERTAINTY;
    }
    if (!(out->sigma > 0))
        return sw_error_set(err, SW_EMEASURE,
                            "drift: the baseline has no spread and no known uncertainty");
    return SW_OK;
}

/* ---- EWMA and CUSUM ---- */

sw_status an_ewma(const double *x, int n, double mu0, double sigma, double lambda, double L,
                  double *z, double *lcl, double *ucl, sw_error *err)
{
    if ((n > 0 && !x) || n < 0 || !isfinite(mu0) || !(sigma > 0) || !(lambda > 0 && lambda <= 1) ||
        !(L > 0))
        return sw_error_set(err, SW_EINVAL, "drift: bad EWMA arguments");
    double zi = mu0, q = 1.0 - lambda, q2i = 1.0;
    for (int i = 0; i < n; i++) {
        zi = lambda * x[i] + q * zi;
        q2i *= q * q; /* (1 - lambda)^(2 i), i = index + 1 */
        double w = L * sigma * sqrt(lambda / (2.0 - lambda) * (1.0 - q2i));
        if (z)
            z[i] = zi;
        if (lcl)
            lcl[i] = mu0 - w;
        if (ucl)
            ucl[i] = mu0 + w;
    }
    return SW_OK;
}

sw_status an_cusum(const double *x, int n, double mu0, double sigma, double k, double *cp,
                   double *cm, sw_error *err)
{
    if ((n > 0 && !x) || n < 0 || !isfinite(mu0) || !(sigma > 0) || !(k >= 0))
        return sw_error_set(err, SW_EINVAL, "drift: bad CUSUM arguments");
    double K = k * sigma, p = 0, m = 0;
    for (int i = 0; i < n; i++) {
        p = fmax(0.0, x[i] - (mu0 + K) + p);
        m = fmax(0.0, (mu0 - K) - x[i] + m);
        if (cp)
            cp[i] = p;
        if (cm)
            cm[i] = m;
    }
    return SW_OK;
}

/* ---- Student t ---- */

/* Continued fraction of the incomplete beta function (DLMF 8.17.22), by the modified Lentz
 * method; converges fast for x < (a + 1) / (a + b + 2). */
static double beta_cf(double a, double b, double x)
{
    const double tiny = 1e-300, eps = 1e-16;
    double c = 1.0, d = 1.0 - (a + b) * x / (a + 1.0);
    if (fabs(d) < tiny)
        d = tiny;
    d = 1.0 / d;
    double h = d;
    for (int m = 1; m <= 500; m++) {
        double m2 = 2.0 * m;
        double aa = m * (b - m) * x / ((a - 1.0 + m2) * (a + m2));
        d = 1.0 + aa * d;
        d = fabs(d) < tiny ? 1.0 / tiny : 1.0 / d;
        c = 1.0 + aa / c;
        if (fabs(c) < tiny)
            c = tiny;
        h *= d * c;
        aa = -(a + m) * (a + b + m) * x / ((a + m2) * (a + 1.0 + m2));
        d = 1.0 + aa * d;
        d = fabs(d) < tiny ? 1.0 / tiny : 1.0 / d;
        c = 1.0 + aa / c;
        if (fabs(c) < tiny)
            c = tiny;
        double del = d * c;
        h *= del;
        if (fabs(del - 1.0) < eps)
            break;
    }
    return h;
}

/* Regularized incomplete beta I_x(a, b), with y = 1 - x given separately so that neither loses
 * digits when the other is small. */
static double beta_inc(double a, double b, double x, double y)
{
    if (x <= 0)
        return 0.0;
    if (y <= 0)
        return 1.0;
    double lf = lgamma(a + b) - lgamma(a) - lgamma(b) + a * log(x) + b * log(y);
    if (x < (a + 1.0) / (a + b + 2.0))
        return exp(lf) * beta_cf(a, b, x) / a;
    return 1.0 - exp(lf) * beta_cf(b, a, y) / b;
}

/* P(T > t) for t >= 0: I_{df / (df + t^2)}(df / 2, 1 / 2) / 2. */
static double t_upper_tail(double t, double df)
{
    double d = df + t * t;
    return 0.5 * beta_inc(df / 2.0, 0.5, df / d, t * t / d);
}

double an_student_t_cdf(double t, double df)
{
    if (isnan(t) || !(df > 0))
        return NAN;
    if (isinf(t))
        return t > 0 ? 1.0 : 0.0;
    double tail = t_upper_tail(fabs(t), df);
    return t > 0 ? 1.0 - tail : tail;
}

double an_student_t_quantile(double p, double df)
{
    if (!(p > 0 && p < 1) || !(df > 0))
        return NAN;
    if (p == 0.5)
        return 0.0;
    double q = p < 0.5 ? p : 1.0 - p; /* the upper tail wanted for |t| */
    double lo = 0.0, hi = 1.0;
    while (t_upper_tail(hi, df) > q && hi < 1e300)
        hi *= 2.0;
    /* Bisection: the tail falls monotonically in t; 200 halvings reach the double's resolution. */
    for (int i = 0; i < 200 && hi - lo > 1e-15 * hi; i++) {
        double mid = 0.5 * (lo + hi);
        if (t_upper_tail(mid, df) > q)
            lo = mid;
        else
            hi = mid;
    }
    double t = 0.5 * (lo + hi);
    return p < 0.5 ? -t : t;
}

/* ---- trend ---- */

sw_status an_trend_fit(const double *t, const double *y, int n, double confidence, an_trend *out,
                       sw_error *err)
{
    if (!t || !y || !out || !(confidence > 0 && confidence < 1))
        return sw_error_set(err, SW_EINVAL, "drift: bad trend arguments");
    memset(out, 0, sizeof *out);
    if (n < 3)
        return sw_error_set(err, SW_EMEASURE, "drift: a trend needs at least 3 results, not %d", n);
    double st = 0, sy = 0;
    for (int i = 0; i < n; i++) {
        if (!isfinite(t[i]) || !isfinite(y[i]))
            return sw_error_set(err, SW_EINVAL, "drift: trend point %d is not finite", i + 1);
        st += t[i];
        sy += y[i];
    }
    double tm = st / n, ym = sy / n, sxx = 0, sxy = 0, syy = 0;
    for (int i = 0; i < n; i++) {
        double dt = t[i] - tm, dy = y[i] - ym;
        sxx += dt * dt;
        sxy += dt * dy;
        syy += dy * dy;
    }
    if (!(sxx > 0))
        return sw_error_set(err, SW_EMEASURE, "drift: a trend needs results at different times");
    double b = sxy / sxx, a = ym - b * tm, sse = 0;
    for (int i = 0; i < n; i++) {
        double e = y[i] - (a + b * t[i]);
        sse += e * e;
    }
    out->n = n;
    out->slope = b;
    out->intercept = a;
    out->s = sqrt(sse / (n - 2));
    out->slope_se = out->s / sqrt(sxx);
    out->intercept_se = out->s * sqrt(1.0 / n + tm * tm / sxx);
    out->r = syy > 0 ? sxy / sqrt(sxx * syy) : 0.0;
    out->t_mean = tm;
    out->sxx = sxx;
    out->confidence = confidence;
    out->tq = an_student_t_quantile(0.5 + confidence / 2.0, n - 2);
    out->slope_lo = b - out->tq * out->slope_se;
    out->slope_hi = b + out->tq * out->slope_se;
    out->significant = out->slope_lo > 0 || out->slope_hi < 0;
    return SW_OK;
}

double an_trend_band(const an_trend *tr, double t)
{
    if (!tr || tr->n < 3)
        return NAN;
    double dt = t - tr->t_mean;
    return tr->tq * tr->s * sqrt(1.0 / tr->n + dt * dt / tr->sxx);
}

void an_trend_crossing(const an_trend *tr, double lo, double hi, an_crossing *out)
{
    memset(out, 0, sizeof *out);
    out->limit = out->t = out->t_lo = out->t_hi = NAN;
    if (!tr || tr->n < 3 || tr->slope == 0 || !isfinite(tr->slope))
        return;
    double limit = tr->slope > 0 ? hi : lo;
    if (!isfinite(limit))
        return;
    out->side = tr->slope > 0 ? 1 : -1;
    out->limit = limit;
    out->t = (limit - tr->intercept) / tr->slope;
    /* (c - b t)^2 = g (1/n + (t - tm)^2 / sxx) with c = limit - a, g = (tq s)^2:
     * (b^2 - g / sxx) t^2 + (-2 b c + 2 g tm / sxx) t + (c^2 - g / n - g tm^2 / sxx) = 0. */
    double b = tr->slope, c = limit - tr->intercept, g = tr->tq * tr->s * tr->tq * tr->s;
    double tm = tr->t_mean, sxx = tr->sxx;
    double A = b * b - g / sxx, B = -2.0 * b * c + 2.0 * g * tm / sxx,
           C = c * c - g / tr->n - g * tm * tm / sxx;
    double disc = B * B - 4.0 * A * C;
    if (!(A > 0) || !(disc >= 0)) /* slope not significant: the band never closes around it */
        return;
    double sq = sqrt(disc);
    /* The numerically stable pair of roots. */
    double qv = -0.5 * (B + (B >= 0 ? sq : -sq));
    double r1 = qv / A, r2 = qv != 0 ? C / qv : r1;
    out->t_lo = fmin(r1, r2);
    out->t_hi = fmax(r1, r2);
    out->bounded = 1;
}

/* ---- a whole history ---- */

sw_status an_drift_evaluate(const an_drift_input *in, const an_drift_params *p,
                            an_drift_track *track, an_drift_summary *out, sw_error *err)
{
    sw_status rc = SW_OK;
    double *bx = NULL, *bu = NULL;
    an_drift_track none;
    memset(&none, 0, sizeof none);
    if (!track)
        track = &none;
    if (!in || !out || in->n < 0 || (in->n > 0 && (!in->t || !in->x)))
        return sw_error_set(err, SW_EINVAL, "drift: bad history arguments");
    if ((rc = an_drift_params_check(p, err)) != SW_OK)
        return rc;
    memset(out, 0, sizeof *out);
    out->first = -1;
    out->status = AN_DRIFT_NO_BASELINE;
    out->H = NAN;
    int n = in->n;
    for (int i = 0; i < n; i++) {
        if (!isfinite(in->t[i]) || !isfinite(in->x[i]))
            return sw_error_set(err, SW_EINVAL, "drift: point %d is not finite", i + 1);
        if (i > 0 && in->t[i] < in->t[i - 1])
            return sw_error_set(err, SW_EINVAL, "drift: point %d is earlier than point %d", i + 1,
                                i);
    }
    for (int i = 0; i < n; i++) {
        if (track->z)
            track->z[i] = NAN;
        if (track->lcl)
            track->lcl[i] = NAN;
        if (track->ucl)
            track->ucl[i] = NAN;
        if (track->cp)
            track->cp[i] = NAN;
        if (track->cm)
            track->cm[i] = NAN;
        if (track->flags)
            track->flags[i] = 0;
    }
    if (n == 0)
        goto out;
    size_t bytes;
    if (sw_mul_size((size_t)n, sizeof(double), &bytes) != 0 || !(bx = malloc(bytes)) ||
        !(bu = malloc(bytes))) {
        rc = sw_error_set(err, SW_ENOMEM, "drift: out of memory for %d points", n);
        goto out;
    }
    /* The baseline: the accepted points of the period, or the first baseline_n accepted. */
    int period = isfinite(p->baseline_from), nb = 0, first = -1;
    for (int i = 0; i < n; i++) {
        if (in->accepted && !in->accepted[i])
            continue;
        if (period ? !(in->t[i] >= p->baseline_from && in->t[i] < p->baseline_to)
                   : nb == p->baseline_n)
            continue;
        if (first < 0)
            first = i;
        bx[nb] = in->x[i];
        bu[nb] = in->u ? in->u[i] : NAN;
        nb++;
        if (track->flags)
            track->flags[i] |= AN_DRIFT_F_BASELINE;
    }
    if (nb < (period ? 2 : p->baseline_n)) {
        for (int i = 0; track->flags && i < n; i++)
            track->flags[i] = 0;
        goto out;
    }
    if ((rc = an_baseline_compute(bx, bu, nb, &out->base, err)) != SW_OK)
        goto out;
    if (p->sigma_floor > out->base.sigma) {
        out->base.sigma = p->sigma_floor;
        out->base.source = AN_SIGMA_FLOOR;
    }
    out->first = first;
    int m = n - first;
    out->n_monitored = m;
    double mu = out->base.mean, sg = out->base.sigma;
    out->H = p->h * sg;
    /* The charts run over the monitored points only, which are contiguous from first. */
    double *z = track->z ? track->z + first : NULL, *lcl = track->lcl ? track->lcl + first : NULL;
    double *ucl = track->ucl ? track->ucl + first : NULL;
    double *cp = track->cp ? track->cp + first : NULL, *cm = track->cm ? track->cm + first : NULL;
    /* Scratch for the flags: the caller's arrays may be absent. bx and bu are free again. */
    if ((rc = an_ewma(in->x + first, m, mu, sg, p->lambda, p->L, bx, NULL, NULL, err)) != SW_OK)
        goto out;
    if (z)
        memcpy(z, bx, (size_t)m * sizeof *z);
    if ((rc = an_ewma(in->x + first, m, mu, sg, p->lambda, p->L, NULL, lcl, ucl, err)) != SW_OK)
        goto out;
    double zi = mu, q2i = 1.0, cpi = 0, cmi = 0, K = p->k * sg;
    for (int j = 0; j < m; j++) {
        int i = first + j;
        double x = in->x[i];
        zi = bx[j];
        q2i *= (1.0 - p->lambda) * (1.0 - p->lambda);
        double w = p->L * sg * sqrt(p->lambda / (2.0 - p->lambda) * (1.0 - q2i));
        cpi = fmax(0.0, x - (mu + K) + cpi);
        cmi = fmax(0.0, (mu - K) - x + cmi);
        if (cp)
            cp[j] = cpi;
        if (cm)
            cm[j] = cmi;
        unsigned f = AN_DRIFT_F_MONITORED;
        if (zi > mu + w)
            f |= AN_DRIFT_F_EWMA_HI;
        if (zi < mu - w)
            f |= AN_DRIFT_F_EWMA_LO;
        if (cpi > out->H)
            f |= AN_DRIFT_F_CUSUM_HI;
        if (cmi > out->H)
            f |= AN_DRIFT_F_CUSUM_LO;
        if (track->flags)
            track->flags[i] |= f;
        out->last_flags = f;
        out->in_control_run = f & AN_DRIFT_F_OUT ? 0 : out->in_control_run + 1;
        /* The restart: the signal stays on this point; the next one sums from zero. */
        if (p->cusum_restart && cpi > out->H)
            cpi = 0;
        if (p->cusum_restart && cmi > out->H)
            cmi = 0;
    }
    out->status = out->last_flags & AN_DRIFT_F_OUT ? AN_DRIFT_OUT : AN_DRIFT_IN_CONTROL;
    sw_error terr;
    sw_error_clear(&terr);
    if (m >= 3 &&
        an_trend_fit(in->t + first, in->x + first, m, p->confidence, &out->trend, &terr) == SW_OK)
        out->have_trend = 1;
out:
    free(bx);
    free(bu);
    return rc;
}
