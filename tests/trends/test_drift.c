/* test_drift.c: the drift statistics (analysis/drift.c) against printed table values, closed forms
 * of the formulas, a hand-worked CUSUM, and numpy/scipy on worked examples (drift_ref.py). */
#include "drift.h"
#include "helpers.h"

/* ---- Student t ---- */

/* Two-sided 95 % and other quantiles as printed in standard t tables (for example the
 * NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.6.7.2), to the 3 decimals printed.
 */
Test(student_t, printed_table_values)
{
    static const struct {
        double p, df, t;
    } table[] = {
        {0.975, 1, 12.706}, {0.975, 2, 4.303}, {0.975, 5, 2.571}, {0.975, 10, 2.228},
        {0.975, 30, 2.042}, {0.95, 10, 1.812}, {0.995, 5, 4.032}, {0.9, 20, 1.325},
    };
    for (size_t i = 0; i < sizeof table / sizeof table[0]; i++) {
        double t = an_student_t_quantile(table[i].p, table[i].df);
        cr_assert(fabs(t - table[i].t) < 6e-4, "t(%g, %g) = %.5f, table %.3f", table[i].p,
                  table[i].df, t, table[i].t);
        cr_assert(fabs(an_student_t_quantile(1 - table[i].p, table[i].df) + t) < 1e-12, "symmetry");
    }
    /* df = 1 is the Cauchy distribution: F(t) = 1/2 + atan(t)/pi (a closed form). */
    for (double t = -30; t <= 30; t += 0.7)
        cr_assert(fabs(an_student_t_cdf(t, 1) - (0.5 + atan(t) / M_PI)) < 1e-13, "Cauchy %g", t);
    /* df = 2: F(t) = 1/2 + t / (2 sqrt(2 + t^2)) (closed form). */
    for (double t = -30; t <= 30; t += 0.7)
        cr_assert(fabs(an_student_t_cdf(t, 2) - (0.5 + t / (2 * sqrt(2 + t * t)))) < 1e-13,
                  "df 2 at %g", t);
    cr_assert(isnan(an_student_t_quantile(0, 3)) && isnan(an_student_t_quantile(1, 3)) &&
              isnan(an_student_t_quantile(0.5, 0)));
}

Test(student_t, against_scipy)
{
    json_t *in =
        json_pack("{s:[f],s:[f],s:i,s:f,s:f,s:f,s:f,s:f}", "t", 0.0, "x", 0.0, "baseline_n", 8,
                  "lambda", 0.2, "L", 3.0, "k", 0.5, "h", 5.0, "confidence", 0.95);
    json_t *tab = json_array(), *ctab = json_array();
    static const double ps[] = {0.5005, 0.6, 0.8, 0.9, 0.95, 0.975, 0.99, 0.995, 0.9995, 0.001};
    static const double dfs[] = {1, 2, 3, 4, 7, 13, 28, 60, 250, 1e4};
    for (size_t i = 0; i < 10; i++)
        for (size_t j = 0; j < 10; j++) {
            json_array_append_new(tab, json_pack("[f,f]", ps[i], dfs[j]));
            json_array_append_new(ctab, json_pack("[f,f]", (double)i * 0.9 - 3.1, dfs[j]));
        }
    json_object_set_new(in, "t_table", tab);
    json_object_set_new(in, "t_cdf_table", ctab);
    json_t *ref = run_reference("drift_ref.py", in);
    for (size_t i = 0; i < 100; i++) {
        double p = ps[i / 10], df = dfs[i % 10];
        /* scipy's t.ppf is good to about 1e-9 relative; the inverse of its CDF to 1e-15. */
        double ppf = json_number_value(json_array_get(json_object_get(ref, "t_ppf"), i));
        double inv = json_number_value(json_array_get(json_object_get(ref, "t_inv"), i));
        double got = an_student_t_quantile(p, df);
        cr_assert(fabs(got - ppf) <= 1e-8 * fmax(1e-3, fabs(ppf)), "t.ppf(%g, %g): %.15g vs %.15g",
                  p, df, got, ppf);
        /* For df in the thousands, lgamma(a + 1/2) - lgamma(a) cancels ~4 of 16 digits. */
        double rel = df > 1000 ? 1e-10 : 1e-12;
        cr_assert(fabs(got - inv) <= rel * fabs(inv) + 1e-14,
                  "t quantile (%g, %g): %.15g vs inverse of scipy's CDF %.15g", p, df, got, inv);
        double q = (double)(i / 10) * 0.9 - 3.1;
        double wc = json_number_value(json_array_get(json_object_get(ref, "t_cdf"), i));
        cr_assert(fabs(an_student_t_cdf(q, df) - wc) < (df > 1000 ? 1e-11 : 1e-13), "t.cdf(%g, %g)",
                  q, df);
    }
    json_decref(in);
    json_decref(ref);
}

/* ---- closed forms and hand-worked values ---- */

/* The EWMA limit half-width L sigma sqrt(lambda/(2-lambda) (1-(1-lambda)^(2i))): at i = 1 it is
 * exactly L sigma lambda, and it tends to L sigma sqrt(lambda/(2-lambda)) (Roberts 1959), which
 * for lambda 0.2 and L 3 is exactly 1 sigma. */
Test(ewma, limits_closed_forms)
{
    double x[400], lcl[400], ucl[400], z[400];
    for (int i = 0; i < 400; i++)
        x[i] = 10.0;
    cr_assert_eq(an_ewma(x, 400, 10.0, 2.0, 0.2, 3.0, z, lcl, ucl, NULL), SW_OK);
    cr_assert(fabs(ucl[0] - 10.0 - 3.0 * 2.0 * 0.2) < 1e-12, "first limit %.15g", ucl[0]);
    cr_assert(fabs(ucl[399] - 12.0) < 1e-12 && fabs(lcl[399] - 8.0) < 1e-12, "asymptote");
    for (int i = 1; i < 400; i++)
        cr_assert(ucl[i] > ucl[i - 1] - 1e-15 && z[i] == 10.0, "limits widen, z stays at mu0");
    /* lambda = 1 is the Shewhart chart: z = x and the limits are mu0 +/- L sigma at once. */
    double y[3] = {1, 5, -2};
    cr_assert_eq(an_ewma(y, 3, 0.0, 1.0, 1.0, 3.0, z, lcl, ucl, NULL), SW_OK);
    for (int i = 0; i < 3; i++)
        cr_assert(z[i] == y[i] && fabs(ucl[i] - 3.0) < 1e-15 && fabs(lcl[i] + 3.0) < 1e-15);
}

/* Worked by hand from the definition: mu0 10, sigma 1, k 0.5 (K = 0.5).
 * x = 10.5: C+ = max(0, 10.5 - 10.5 + 0) = 0,    C- = max(0, 9.5 - 10.5 + 0) = 0
 * x = 11.6: C+ = 11.6 - 10.5 + 0 = 1.1,          C- = max(0, 9.5 - 11.6) = 0
 * x = 9.0:  C+ = max(0, 9.0 - 10.5 + 1.1) = 0,   C- = 9.5 - 9.0 = 0.5
 * x = 8.7:  C+ = 0,                               C- = 9.5 - 8.7 + 0.5 = 1.3 */
Test(cusum, hand_worked)
{
    double x[] = {10.5, 11.6, 9.0, 8.7}, cp[4], cm[4];
    double want_p[] = {0, 1.1, 0, 0}, want_m[] = {0, 0, 0.5, 1.3};
    cr_assert_eq(an_cusum(x, 4, 10.0, 1.0, 0.5, cp, cm, NULL), SW_OK);
    for (int i = 0; i < 4; i++)
        cr_assert(fabs(cp[i] - want_p[i]) < 1e-12 && fabs(cm[i] - want_m[i]) < 1e-12,
                  "point %d: C+ %g C- %g", i + 1, cp[i], cm[i]);
}

/* An exact line: slope and intercept come back, the residual SD is 0, the crossing is exact. */
Test(trend, exact_line)
{
    double t[6], y[6];
    for (int i = 0; i < 6; i++) {
        t[i] = 100.0 + 7.0 * i;
        y[i] = 5.0 + 0.01 * t[i];
    }
    an_trend tr;
    cr_assert_eq(an_trend_fit(t, y, 6, 0.95, &tr, NULL), SW_OK);
    cr_assert(fabs(tr.slope - 0.01) < 1e-14 && fabs(tr.intercept - 5.0) < 1e-11);
    cr_assert(tr.s < 1e-12 && fabs(tr.r - 1.0) < 1e-12 && tr.significant);
    an_crossing c;
    an_trend_crossing(&tr, 4.3, 7.5, &c);
    cr_assert(c.side == 1 && fabs(c.t - 250.0) < 1e-8, "crossing %g", c.t);
    /* A flat line never crosses; too few points are refused. */
    for (int i = 0; i < 6; i++)
        y[i] = 5.0;
    cr_assert_eq(an_trend_fit(t, y, 6, 0.95, &tr, NULL), SW_OK);
    an_trend_crossing(&tr, 4.3, 5.7, &c);
    cr_assert_eq(c.side, 0);
    cr_assert_eq(an_trend_fit(t, y, 2, 0.95, &tr, NULL), SW_EMEASURE);
    for (int i = 0; i < 6; i++)
        t[i] = 3.0;
    cr_assert_eq(an_trend_fit(t, y, 6, 0.95, &tr, NULL), SW_EMEASURE);
}

Test(drift, refuses_bad_input)
{
    an_drift_params p;
    an_drift_params_default(&p);
    cr_assert_eq(an_drift_params_check(&p, NULL), SW_OK);
    cr_assert(p.lambda == 0.2 && p.L == 3 && p.k == 0.5 && p.h == 5 && p.baseline_n == 8 &&
              p.cusum_restart == 1 && p.close_after == 3);
    an_drift_params q = p;
    q.lambda = 0;
    cr_assert_eq(an_drift_params_check(&q, NULL), SW_EINVAL);
    q = p;
    q.L = -1;
    cr_assert_eq(an_drift_params_check(&q, NULL), SW_EINVAL);
    q = p;
    q.baseline_n = 1;
    cr_assert_eq(an_drift_params_check(&q, NULL), SW_EINVAL);
    q = p;
    q.baseline_from = 10;
    cr_assert_eq(an_drift_params_check(&q, NULL), SW_EINVAL, "a period needs both ends");
    double t[3] = {1, 0, 2}, x[3] = {1, 2, 3};
    an_drift_input in = {.n = 3, .t = t, .x = x};
    an_drift_summary s;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(an_drift_evaluate(&in, &p, NULL, &s, &err), SW_EINVAL);
    cr_assert(strstr(err.msg, "earlier"), "%s", err.msg);
    /* No spread and no uncertainty: sigma would be 0. */
    double t2[8], x2[8];
    for (int i = 0; i < 8; i++)
        t2[i] = i, x2[i] = 5.0;
    an_drift_input flat = {.n = 8, .t = t2, .x = x2};
    cr_assert_eq(an_drift_evaluate(&flat, &p, NULL, &s, NULL), SW_EMEASURE);
    /* Too few results: no baseline, no statistics, no error. */
    flat.n = 7;
    cr_assert_eq(an_drift_evaluate(&flat, &p, NULL, &s, NULL), SW_OK);
    cr_assert_eq(s.status, AN_DRIFT_NO_BASELINE);
}

/* ---- worked examples against numpy and scipy ---- */

typedef struct example {
    int n;
    double t[80], x[80], u[80];
    int acc[80];
} example;

static json_t *case_json(const example *e, const an_drift_params *p, double lo, double hi)
{
    json_t *t = json_array(), *x = json_array(), *u = json_array(), *a = json_array();
    for (int i = 0; i < e->n; i++) {
        json_array_append_new(t, json_real(e->t[i]));
        json_array_append_new(x, json_real(e->x[i]));
        json_array_append_new(u, isfinite(e->u[i]) ? json_real(e->u[i]) : json_null());
        json_array_append_new(a, json_boolean(e->acc[i]));
    }
    json_t *c =
        json_pack("{s:o,s:o,s:o,s:o,s:f,s:f,s:f,s:f,s:i,s:f,s:f,s:f}", "t", t, "x", x, "u", u,
                  "accepted", a, "lambda", p->lambda, "L", p->L, "k", p->k, "h", p->h, "baseline_n",
                  p->baseline_n, "confidence", p->confidence, "lo", lo, "hi", hi);
    json_object_set_new(c, "cusum_restart", json_boolean(p->cusum_restart));
    json_object_set_new(c, "close_after", json_integer(p->close_after));
    if (isfinite(p->baseline_from)) {
        json_object_set_new(c, "baseline_from", json_real(p->baseline_from));
        json_object_set_new(c, "baseline_to", json_real(p->baseline_to));
    }
    return c;
}

/* Runs the C statistics and the reference on one example and compares every number. */
static void compare(const example *e, const an_drift_params *p, double lo, double hi,
                    int want_source)
{
    double z[80], lcl[80], ucl[80], cp[80], cm[80];
    unsigned flags[80];
    an_drift_track tr = {z, lcl, ucl, cp, cm, flags};
    an_drift_input in = {.n = e->n, .t = e->t, .x = e->x, .u = e->u, .accepted = e->acc};
    an_drift_summary s;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(an_drift_evaluate(&in, p, &tr, &s, &err), SW_OK, "%s", err.msg);
    json_t *c = case_json(e, p, lo, hi);
    json_t *ref = run_reference("drift_ref.py", c);
    json_t *b = json_object_get(ref, "baseline"), *ch = json_object_get(ref, "charts"),
           *trj = json_object_get(ref, "trend");
    cr_assert(json_is_object(b) && json_is_object(ch) && json_is_object(trj));
    cr_assert_eq(s.first, (int)jnum_at(b, "first"));
    cr_assert_eq(s.base.n, (int)jnum_at(b, "n"));
    assert_close(s.base.mean, jnum_at(b, "mean"), 1e-13, "mean");
    assert_close(s.base.sd, jnum_at(b, "sd"), 1e-12, "sd %.15g", s.base.sd);
    assert_close(s.base.sigma, jnum_at(b, "sigma"), 1e-12, "sigma");
    cr_assert_eq((int)s.base.source, want_source, "sigma source");
    cr_assert_eq(!strcmp(json_string_value(json_object_get(b, "source")), "uncertainty"),
                 want_source == AN_SIGMA_UNCERTAINTY);
    assert_close(s.H, jnum_at(ch, "H"), 1e-12, "H");
    for (int j = 0; j < s.n_monitored; j++) {
        int i = s.first + j;
        assert_close(z[i], jarr_at(ch, "z", j), 1e-12, "EWMA %d", i);
        assert_close(lcl[i], jarr_at(ch, "lcl", j), 1e-12, "LCL %d", i);
        assert_close(ucl[i], jarr_at(ch, "ucl", j), 1e-12, "UCL %d", i);
        assert_close(cp[i], jarr_at(ch, "cp", j), 1e-11, "C+ %d", i);
        assert_close(cm[i], jarr_at(ch, "cm", j), 1e-11, "C- %d", i);
        int out = json_is_true(json_array_get(json_object_get(ch, "out"), j));
        cr_assert_eq((flags[i] & AN_DRIFT_F_OUT) != 0, out, "out-of-control flag at %d", i);
    }
    for (int i = 0; i < s.first; i++)
        cr_assert(isnan(z[i]) && flags[i] == 0, "point %d before the baseline", i);
    cr_assert(s.have_trend);
    assert_close(s.trend.slope, jnum_at(trj, "slope"), 1e-9, "slope");
    assert_close(s.trend.intercept, jnum_at(trj, "intercept"), 1e-9, "intercept");
    assert_close(s.trend.slope_se, jnum_at(trj, "slope_se"), 1e-9, "slope stderr");
    assert_close(s.trend.intercept_se, jnum_at(trj, "intercept_se"), 1e-9, "intercept stderr");
    assert_close(s.trend.r, jnum_at(trj, "r"), 1e-9, "r");
    assert_close(s.trend.tq, jnum_at(trj, "tq"), 1e-10, "t quantile %.15g vs %.15g", s.trend.tq,
                 jnum_at(trj, "tq"));
    assert_close(s.trend.slope_lo, jnum_at(trj, "slope_lo"), 1e-9, "slope CI low");
    assert_close(s.trend.slope_hi, jnum_at(trj, "slope_hi"), 1e-9, "slope CI high");
    an_crossing cr;
    an_trend_crossing(&s.trend, lo, hi, &cr);
    assert_close(cr.t, jnum_at(trj, "cross_t"), 1e-9, "crossing %.10g", cr.t);
    json_t *clo = json_object_get(trj, "cross_lo");
    cr_assert_eq(cr.bounded, clo != NULL, "interval bounded when the slope is significant");
    if (clo) {
        assert_close(cr.t_lo, jnum_at(trj, "cross_lo"), 1e-8, "crossing low %.10g", cr.t_lo);
        assert_close(cr.t_hi, jnum_at(trj, "cross_hi"), 1e-8, "crossing high %.10g", cr.t_hi);
        cr_assert(cr.t_lo < cr.t && cr.t < cr.t_hi);
    }
    json_decref(c);
    json_decref(ref);
}

/* Weekly slice thickness: 20 weeks in control around 5.0 mm (SD 0.05), then a ramp of +0.02 mm a
 * week; the drift must show on both charts and in a significant trend that crosses 5.7 mm. */
Test(drift, ramp_against_numpy)
{
    example e;
    memset(&e, 0, sizeof e);
    rng r = {12345};
    e.n = 60;
    for (int i = 0; i < e.n; i++) {
        e.t[i] = 20000.0 + 7.0 * i + 0.3 * rng_unif(&r);
        e.x[i] = 5.0 + 0.05 * rng_normal(&r) + (i >= 20 ? 0.02 * (i - 20) : 0.0);
        e.u[i] = 0.02;
        e.acc[i] = 1;
    }
    an_drift_params p;
    an_drift_params_default(&p);
    compare(&e, &p, 4.3, 5.7, AN_SIGMA_SD);
    an_drift_input in = {.n = e.n, .t = e.t, .x = e.x, .u = e.u};
    an_drift_summary s;
    cr_assert_eq(an_drift_evaluate(&in, &p, NULL, &s, NULL), SW_OK);
    cr_assert_eq(s.status, AN_DRIFT_OUT);
    cr_assert(s.last_flags & AN_DRIFT_F_EWMA_HI && s.last_flags & AN_DRIFT_F_CUSUM_HI);
    cr_assert(s.trend.significant && s.trend.slope > 0);
}

/* A baseline period set by the physicist, points not accepted inside it (fails), an uncertainty
 * larger than the baseline's SD (so sigma comes from it), other parameters, a falling trend. */
Test(drift, period_uncertainty_and_rejects_against_numpy)
{
    example e;
    memset(&e, 0, sizeof e);
    rng r = {777};
    e.n = 45;
    for (int i = 0; i < e.n; i++) {
        e.t[i] = 19000.0 + 10.0 * i;
        e.x[i] = 0.4 + 0.08 * rng_normal(&r) - (i >= 25 ? 0.05 * (i - 25) : 0.0);
        e.u[i] = i % 7 == 3 ? NAN : 0.3;
        e.acc[i] = !(i == 6 || i == 9);
    }
    e.x[6] = 6.0; /* the rejected ones are far off: they must not move the baseline */
    e.x[9] = -6.0;
    an_drift_params p;
    an_drift_params_default(&p);
    p.lambda = 0.1;
    p.L = 2.7;
    p.k = 0.25;
    p.h = 4;
    p.confidence = 0.9;
    p.cusum_restart = 0;       /* Page's CUSUM as it is, without the restart */
    p.baseline_from = 19030.0; /* points 3 .. 14 */
    p.baseline_to = 19150.0;
    compare(&e, &p, -5.0, 5.0, AN_SIGMA_UNCERTAINTY);
}

/* Short noisy history: the slope is not significant, so no bounded crossing interval. */
Test(drift, flat_noisy_against_numpy)
{
    example e;
    memset(&e, 0, sizeof e);
    rng r = {99};
    e.n = 12;
    for (int i = 0; i < e.n; i++) {
        e.t[i] = 21000.0 + 7.0 * i;
        e.x[i] = 5.02 + 0.1 * rng_normal(&r);
        e.u[i] = NAN;
        e.acc[i] = 1;
    }
    an_drift_params p;
    an_drift_params_default(&p);
    p.baseline_n = 5;
    compare(&e, &p, 4.3, 5.7, AN_SIGMA_SD);
}

/* The restart after a signal, worked by hand: a baseline of -1, +1, ... (mean 0, SD sqrt(8/7) =
 * 1.0690), k 0.5 (K = 0.5345), h 2 (H = 2.1381), then 1.5, 1.5, 1.5, 0:
 * C+ at the last baseline point (+1, after a -1 that left 0) = 0.4655; then 1.4310, 2.3964 (> H:
 * a signal, and the restart), 0.9655, 0.4310: the last two points are in control. Without the
 * restart: 2.3964, 3.3619, 2.8274: the alarm holds to the end. */
Test(cusum, restart_after_signal)
{
    double t[12], x[12], cp[12];
    unsigned fl[12];
    for (int i = 0; i < 8; i++)
        t[i] = i, x[i] = i % 2 ? 1.0 : -1.0; /* baseline: mean 0, SD 1.069 */
    double tail[] = {1.5, 1.5, 1.5, 0.0};
    for (int i = 0; i < 4; i++)
        t[8 + i] = 8 + i, x[8 + i] = tail[i];
    an_drift_params p;
    an_drift_params_default(&p);
    p.h = 2;
    p.L = 100; /* keep the EWMA quiet: this is about the CUSUM */
    an_drift_input in = {.n = 12, .t = t, .x = x};
    an_drift_track tr = {.cp = cp, .flags = fl};
    an_drift_summary s;
    cr_assert_eq(an_drift_evaluate(&in, &p, &tr, &s, NULL), SW_OK);
    double sg = s.base.sd, K = 0.5 * sg;
    cr_assert(fabs(sg - sqrt(8.0 / 7.0)) < 1e-12, "baseline SD %g", sg);
    /* The baseline points sum to zero in C+ only when each +1 stays under K + C+: check them
     * directly, then the tail. */
    double c = 0;
    for (int i = 0; i < 11; i++) {
        c = fmax(0, x[i] - K + c);
        cr_assert(fabs(cp[i] - c) < 1e-12, "C+ at %d: %g vs %g", i, cp[i], c);
        if (c > 2 * sg) {
            cr_assert(fl[i] & AN_DRIFT_F_CUSUM_HI);
            c = 0;
        }
    }
    cr_assert(fl[9] & AN_DRIFT_F_CUSUM_HI, "the signal");
    cr_assert(fabs(cp[9] - 2.3964) < 1e-4 && fabs(cp[10] - 0.9655) < 1e-4 &&
                  fabs(cp[11] - 0.4310) < 1e-4,
              "C+ %g %g %g", cp[9], cp[10], cp[11]);
    cr_assert_eq(fl[10] & AN_DRIFT_F_OUT, 0u, "after the restart the sum is small again");
    cr_assert_eq(s.in_control_run, 2);
    p.cusum_restart = 0;
    cr_assert_eq(an_drift_evaluate(&in, &p, &tr, &s, NULL), SW_OK);
    cr_assert(fl[11] & AN_DRIFT_F_CUSUM_HI && fabs(cp[11] - 2.8274) < 1e-4,
              "without the restart the alarm holds: %x %g", fl[11], cp[11]);
    cr_assert_eq(s.in_control_run, 0);
}
