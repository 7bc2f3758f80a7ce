/* test_alarm.c: drift alarms through the store: one alert per episode, a new one only after the
 * statistic has been back in control; the expected episodes come from drift_ref.py (numpy and
 * scipy), evaluating the same history after each result as the watch service does. */
#include <time.h>

#include "helpers.h"
#include "trends.h"

#define WEEKS 72

typedef struct history {
    double t[WEEKS], thick[WEEKS], bar1[WEEKS], bar11[WEEKS];
    char acquired[WEEKS][32];
} history;

/* Weekly thickness around 5.00 mm (SD 0.04) with a +0.30 mm shift in weeks 12-21 and a -0.25 mm
 * shift in weeks 46-54; the bar length differences stay in control. */
static void make_history(history *h)
{
    rng r = {2026};
    for (int i = 0; i < WEEKS; i++) {
        double shift = i >= 12 && i < 22 ? 0.30 : i >= 46 && i < 55 ? -0.25 : 0.0;
        h->thick[i] = 5.0 + 0.04 * rng_normal(&r) + shift;
        h->bar1[i] = 0.1 + 0.3 * rng_normal(&r);
        h->bar11[i] = -0.2 + 0.3 * rng_normal(&r);
    }
}

static void date_of_week(int i, char *da, size_t n)
{
    struct tm tm;
    memset(&tm, 0, sizeof tm);
    tm.tm_year = 2025 - 1900;
    tm.tm_mon = 0;
    tm.tm_mday = 6 + 7 * i;
    time_t t = timegm(&tm);
    gmtime_r(&t, &tm);
    strftime(da, n, "%Y%m%d", &tm);
}

static json_t *reference_episodes(const double *t, const double *x, int n, const double *u,
                                  const an_drift_params *p)
{
    json_t *jt = json_array(), *jx = json_array(), *ju = json_array();
    for (int i = 0; i < n; i++) {
        json_array_append_new(jt, json_real(t[i]));
        json_array_append_new(jx, json_real(x[i]));
        json_array_append_new(ju, json_real(u[i]));
    }
    json_t *c = json_pack("{s:o,s:o,s:o,s:f,s:f,s:f,s:f,s:i,s:f,s:b,s:i,s:b}", "t", jt, "x", jx,
                          "u", ju, "lambda", p->lambda, "L", p->L, "k", p->k, "h", p->h,
                          "baseline_n", p->baseline_n, "confidence", p->confidence, "cusum_restart",
                          p->cusum_restart, "close_after", p->close_after, "episodes", 1);
    json_t *ref = run_reference("drift_ref.py", c);
    json_decref(c);
    json_t *e = json_incref(json_object_get(ref, "episodes"));
    json_decref(ref);
    cr_assert(json_is_object(e));
    return e;
}

typedef struct seen {
    int n_drift, n_other;
    char opened_series[16][72];
    char metric[16][48];
} seen;

static int alert_cb(void *ctx, const db_alert_rec *a)
{
    seen *s = ctx;
    if (a->info.kind != DB_ALERT_DRIFT) {
        s->n_other++;
        return 0;
    }
    cr_assert(strstr(a->info.message, "drift of "), "%s", a->info.message);
    cr_assert(a->info.series_id > 0 && a->info.run_id > 0);
    if (s->n_drift < 16)
        sw_strlcpy(s->metric[s->n_drift], a->info.metric, sizeof s->metric[0]);
    s->n_drift++;
    return 0;
}

typedef struct episodes {
    int n, n_open;
    db_drift_episode e[16];
    char opened[16][32], closed[16][32], metric[16][48], type[16][32];
} episodes;

static int episode_cb(void *ctx, const db_drift_episode *e)
{
    episodes *s = ctx;
    cr_assert(s->n < 16);
    s->e[s->n] = *e;
    sw_strlcpy(s->opened[s->n], e->opened_acquired_at, sizeof s->opened[0]);
    sw_strlcpy(s->closed[s->n], e->closed_acquired_at, sizeof s->closed[0]);
    sw_strlcpy(s->metric[s->n], e->key.metric, sizeof s->metric[0]);
    sw_strlcpy(s->type[s->n], e->key.series_type, sizeof s->type[0]);
    s->n_open += e->closed_at[0] == '\0';
    s->n++;
    return 0;
}

Test(alarm, one_alert_per_episode_as_numpy_says)
{
    char dir[64], path[128];
    make_tmpdir(dir, sizeof dir, "alarm");
    snprintf(path, sizeof path, "%s/qa.sqlite", dir);
    db *d = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_open(path, DB_OPEN_RW | DB_OPEN_CREATE, &d, &err), SW_OK, "%s", err.msg);
    int64_t sc = add_scanner(d, "ALDMR1", "SWS-0001", "SW-SIM 1.5T", "MR1 Alderbrook");
    static history h;
    make_history(&h);
    wd_drift_opts o;
    wd_drift_opts_default(&o);
    o.sigma_floor_fraction = 0; /* the numpy reference has no floor; the floor has its own test */
    double u[WEEKS];
    int started = 0, ended = 0;
    for (int i = 0; i < WEEKS; i++) {
        char da[16], uid[64];
        date_of_week(i, da, sizeof da);
        snprintf(uid, sizeof uid, "2.25.4242%d", 1000 + i);
        int64_t sid = 0;
        int64_t run = add_series_run(d, sc, uid, da, "081500", "t1", "ACR T1", 3, &sid);
        db_verdict v =
            add_row(d, run, "slice_thickness", 1, 1, h.thick[i], 0.03, 5.0, 4.3, 5.7, 4.5, 5.5);
        add_row(d, run, "bar_length_difference", 1, 1, h.bar1[i], 0.2, 0, -5, 5, -4, 4);
        add_row(d, run, "bar_length_difference", 11, 1, h.bar11[i], 0.2, 0, -5, 5, -4, 4);
        /* A row without limits is not a drift key. */
        add_row(d, run, "ramp_length_top", 1, 1, 50.0 + i, NAN, NAN, NAN, NAN, NAN, NAN);
        finish_run(d, run, sid, v);
        snprintf(h.acquired[i], sizeof h.acquired[i], "%.4s-%.2s-%.2sT08:15:00", da, da + 4,
                 da + 6);
        h.t[i] = wd_iso_days(h.acquired[i]);
        u[i] = 0.03;
        int s1 = 0, e1 = 0, s2 = 0, e2 = 0;
        cr_assert_eq(wd_drift_check_run(d, sc, run, &o, NULL, &s1, &e1, &err), SW_OK, "%s",
                     err.msg);
        /* Checking again with nothing new changes nothing: the episode state is in the store. */
        cr_assert_eq(wd_drift_check_run(d, sc, run, &o, NULL, &s2, &e2, &err), SW_OK, "%s",
                     err.msg);
        cr_assert(s2 == 0 && e2 == 0, "a second check of week %d opened or closed again", i);
        started += s1;
        ended += e1;
    }
    json_t *ref = reference_episodes(h.t, h.thick, WEEKS, u, &o.p);
    json_t *op = json_object_get(ref, "opened"), *cl = json_object_get(ref, "closed");
    size_t n_open_ref = json_array_size(op), n_closed_ref = json_array_size(cl);
    /* The scenario has two shifts: the reference must see two episodes, or the test proves
     * nothing. */
    cr_assert_eq(n_open_ref, 2, "reference episodes: %zu", n_open_ref);
    cr_assert_eq(n_closed_ref, 2);
    for (int i = 0; i < 2; i++) {
        double bu[WEEKS];
        for (int k = 0; k < WEEKS; k++)
            bu[k] = 0.2;
        json_t *rb = reference_episodes(h.t, i ? h.bar11 : h.bar1, WEEKS, bu, &o.p);
        n_open_ref += json_array_size(json_object_get(rb, "opened"));
        n_closed_ref += json_array_size(json_object_get(rb, "closed"));
        json_decref(rb);
    }
    seen s;
    memset(&s, 0, sizeof s);
    cr_assert_eq(db_alerts_each(d, sc, NULL, NULL, alert_cb, &s, &err), SW_OK, "%s", err.msg);
    cr_assert_eq((size_t)s.n_drift, n_open_ref, "drift alerts %d, reference episodes %zu",
                 s.n_drift, n_open_ref);
    cr_assert_eq((size_t)started, n_open_ref);
    cr_assert_eq((size_t)ended, n_closed_ref);
    episodes ep;
    memset(&ep, 0, sizeof ep);
    cr_assert_eq(db_drift_episodes_each(d, sc, 0, episode_cb, &ep, &err), SW_OK);
    cr_assert_eq((size_t)ep.n, n_open_ref);
    cr_assert_eq((size_t)ep.n_open, n_open_ref - n_closed_ref);
    /* The thickness episodes open and close on the very results numpy says. */
    int k = 0;
    for (int i = 0; i < ep.n; i++) {
        if (strcmp(ep.metric[i], "slice_thickness"))
            continue;
        int oi = (int)json_integer_value(json_array_get(op, k));
        int ci = (int)json_integer_value(json_array_get(cl, k));
        cr_assert_str_eq(ep.opened[i], h.acquired[oi], "episode %d opened", k);
        cr_assert_str_eq(ep.closed[i], h.acquired[ci], "episode %d closed", k);
        cr_assert(oi >= 12 && oi < 22 + (k ? 34 : 0), "opened in week %d", oi);
        cr_assert(ep.e[i].alert_id > 0 && !strcmp(ep.type[i], "t1") && ep.e[i].key.echo == 1 &&
                  ep.e[i].key.slice == 1);
        k++;
    }
    cr_assert_eq(k, 2);
    /* The store refuses a second open episode of one key. */
    db_drift_key key = {
        .scanner_id = sc, .series_type = "t1", .echo = 1, .slice = 1, .metric = "slice_thickness"};
    int64_t id1 = 0, id2 = 0;
    cr_assert_eq(db_drift_episode_open(d, &key, "ewma-high", 0, NULL, 0, &id1, &err), SW_OK, "%s",
                 err.msg);
    sw_error_clear(&err);
    cr_assert_eq(db_drift_episode_open(d, &key, "ewma-high", 0, NULL, 0, &id2, &err), SW_EINVAL);
    cr_assert_eq(db_drift_episode_close(d, id1, 0, NULL, &err), SW_OK);
    sw_error_clear(&err);
    cr_assert_eq(db_drift_episode_close(d, id1, 0, NULL, &err), SW_EINVAL, "closed is final");
    json_decref(ref);
    db_close(d);
}

/* A read-only handle can read histories but never opens an episode. */
Test(alarm, read_only_store_is_not_written)
{
    char dir[64], path[128];
    make_tmpdir(dir, sizeof dir, "alarm-ro");
    snprintf(path, sizeof path, "%s/qa.sqlite", dir);
    db *d = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_open(path, DB_OPEN_RW | DB_OPEN_CREATE, &d, &err), SW_OK, "%s", err.msg);
    int64_t sc = add_scanner(d, "ALDMR2", "SWS-0002", "SW-SIM 3T", "");
    int64_t last_run = 0;
    for (int i = 0; i < 12; i++) {
        char da[16], uid[64];
        date_of_week(i, da, sizeof da);
        snprintf(uid, sizeof uid, "2.25.5151%d", 100 + i);
        int64_t sid;
        int64_t run = add_series_run(d, sc, uid, da, "090000", "t1", "ACR T1", 5, &sid);
        /* In control for 8, then far off: a drift on the read-write handle would start. */
        db_verdict v = add_row(d, run, "slice_thickness", 1, 1, i < 8 ? 5.0 + 0.01 * (i % 3) : 5.6,
                               0.02, 5.0, 4.3, 5.7, 4.5, 5.5);
        finish_run(d, run, sid, v);
        last_run = run;
    }
    db_close(d);
    cr_assert_eq(db_open(path, DB_OPEN_RO, &d, &err), SW_OK, "%s", err.msg);
    wd_drift_opts o;
    wd_drift_opts_default(&o);
    int st = 0;
    sw_error_clear(&err);
    cr_assert_neq(wd_drift_check_run(d, sc, last_run, &o, NULL, &st, NULL, &err), SW_OK);
    cr_assert_eq(st, 0);
    db_drift_key key = {
        .scanner_id = sc, .series_type = "t1", .echo = 1, .slice = 1, .metric = "slice_thickness"};
    wd_history h;
    cr_assert_eq(wd_history_load(d, &key, &h, &err), SW_OK, "%s", err.msg);
    cr_assert_eq(h.n, 12);
    wd_drift_eval e;
    cr_assert_eq(wd_drift_evaluate(&h, &o, &e, &err), SW_OK, "%s", err.msg);
    cr_assert_eq(e.sum.status, AN_DRIFT_OUT);
    wd_drift_eval_free(&e);
    wd_history_free(&h);
    int found = 1;
    cr_assert_eq(db_drift_open_get(d, &key, NULL, NULL, &found, &err), SW_OK);
    cr_assert_eq(found, 0);
    db_close(d);
}

/* The sigma floor (our own rule, docs/trends.md): a baseline far tighter than the tolerance must not
 * make a shift of a few hundredths of a millimetre an alarm. The same history alarms without the
 * floor and stays quiet with the default floor of a tenth of the tolerance half-width (0.07 mm). */
Test(alarm, sigma_floor_keeps_tiny_shifts_quiet)
{
    for (int with_floor = 0; with_floor < 2; with_floor++) {
        char dir[64], path[128];
        make_tmpdir(dir, sizeof dir, with_floor ? "floor1" : "floor0");
        snprintf(path, sizeof path, "%s/qa.sqlite", dir);
        db *d = NULL;
        sw_error err;
        sw_error_clear(&err);
        cr_assert_eq(db_open(path, DB_OPEN_RW | DB_OPEN_CREATE, &d, &err), SW_OK, "%s", err.msg);
        int64_t sc = add_scanner(d, "ALDMR3", "SWS-0003", "SW-SIM 1.5T", "MR3 Alderbrook");
        wd_drift_opts o;
        wd_drift_opts_default(&o);
        cr_assert_float_eq(o.sigma_floor_fraction, 0.1, 1e-12);
        if (!with_floor)
            o.sigma_floor_fraction = 0;
        int started = 0;
        for (int i = 0; i < 20; i++) {
            char da[16], uid[64];
            date_of_week(i, da, sizeof da);
            snprintf(uid, sizeof uid, "2.25.5151%d", 1000 + i);
            int64_t sid = 0;
            int64_t run = add_series_run(d, sc, uid, da, "081500", "t1", "ACR T1", 3, &sid);
            /* baseline 5.000 +- 0.005, then a steady shift of +0.03 mm (6 sigma of the baseline,
             * under half the floor) */
            double v = 5.0 + (i % 2 ? 0.005 : -0.005) + (i >= 8 ? 0.03 : 0.0);
            db_verdict vd = add_row(d, run, "slice_thickness", 1, 1, v, 0.004, 5.0, 4.3, 5.7, 4.5,
                                    5.5);
            finish_run(d, run, sid, vd);
            int s1 = 0, e1 = 0;
            cr_assert_eq(wd_drift_check_run(d, sc, run, &o, NULL, &s1, &e1, &err), SW_OK, "%s",
                         err.msg);
            started += s1;
        }
        if (with_floor)
            cr_assert_eq(started, 0, "with the floor a 0.03 mm shift raised %d alarms", started);
        else
            cr_assert_geq(started, 1, "without the floor the 6-sigma shift raised no alarm");
        db_close(d);
    }
}
