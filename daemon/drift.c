/* drift.c: drift alarms from the store's history: histories per scanner, protocol, slice and
 * metric, the statistics over them, and episodes (one alert per episode, kept in the store).
 *
 * An episode's life, per key (db_drift_key), evaluated after every stored run:
 *   no episode --(latest point out of control: db_alert_add + db_drift_episode_open)--> open
 *   open --(the latest close_after points in control: db_drift_episode_close)--> closed
 *   open --(still out of control)--> open (no new alert)
 * A key without a complete baseline changes nothing. */
#include "trends.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

void wd_drift_opts_default(wd_drift_opts *o)
{
    memset(o, 0, sizeof *o);
    an_drift_params_default(&o->p);
    /* A shift of a tenth of the tolerance is the smallest worth an alarm: a baseline that happens
     * to be tighter than that must not make smaller, clinically meaningless shifts signal. */
    o->sigma_floor_fraction = 0.1;
    wd_hint_settings_default(&o->hints);
}

double wd_iso_days(const char *iso)
{
    int y, mo = 1, d = 1, h = 0, mi = 0, n = 0;
    double s = 0;
    if (!iso)
        return NAN;
    /* The prefixes the period filters take: YYYY and YYYY-MM start at the period's first day. */
    size_t len = strlen(iso);
    if (len == 4 && sscanf(iso, "%4d%n", &y, &n) == 1 && n == 4)
        iso = NULL;
    else if (len == 7 && sscanf(iso, "%4d-%2d%n", &y, &mo, &n) == 2 && n == 7)
        iso = NULL;
    else if (sscanf(iso, "%4d-%2d-%2d%n", &y, &mo, &d, &n) != 3 || n != 10)
        return NAN;
    if (!iso)
        goto civil;
    if (iso[10] == 'T' || iso[10] == ' ') {
        int m2 = 0;
        if (sscanf(iso + 11, "%2d:%2d%n", &h, &mi, &m2) != 2)
            return NAN;
        if (iso[11 + m2] == ':' && sscanf(iso + 12 + m2, "%lf", &s) != 1)
            return NAN;
    } else if (iso[10] != '\0') {
        return NAN;
    }
civil:
    if (mo < 1 || mo > 12 || d < 1 || d > 31 || h < 0 || h > 23 || mi < 0 || mi > 59 || s < 0 ||
        s >= 61)
        return NAN;
    struct tm tm;
    memset(&tm, 0, sizeof tm);
    tm.tm_year = y - 1900;
    tm.tm_mon = mo - 1;
    tm.tm_mday = d;
    time_t t = timegm(&tm);
    return (double)t / 86400.0 + (h + (mi + s / 60.0) / 60.0) / 24.0;
}

char *wd_days_iso(double days, char *buf, size_t n)
{
    if (n)
        buf[0] = '\0';
    if (!isfinite(days) || fabs(days) > 1e7 || n < 11)
        return buf;
    time_t t = (time_t)floor(days) * 86400;
    struct tm tm;
    if (gmtime_r(&t, &tm))
        strftime(buf, n, "%Y-%m-%d", &tm);
    return buf;
}

sw_status wd_drift_opts_check(const wd_drift_opts *o, sw_error *err)
{
    if (!o)
        return sw_error_set(err, SW_EINVAL, "drift: no settings");
    an_drift_params p = o->p;
    int hf = o->baseline_from[0] != '\0', ht = o->baseline_to[0] != '\0';
    if (hf != ht)
        return sw_error_set(err, SW_EINVAL, "drift: a baseline period needs both its dates");
    p.baseline_from = hf ? wd_iso_days(o->baseline_from) : NAN;
    p.baseline_to = ht ? wd_iso_days(o->baseline_to) : NAN;
    if (hf && !isfinite(p.baseline_from))
        return sw_error_set(err, SW_EINVAL, "drift: baseline start '%s' is not an ISO 8601 date",
                            o->baseline_from);
    if (ht && !isfinite(p.baseline_to))
        return sw_error_set(err, SW_EINVAL, "drift: baseline end '%s' is not an ISO 8601 date",
                            o->baseline_to);
    return an_drift_params_check(&p, err);
}

/* ---- history ---- */

void wd_history_free(wd_history *h)
{
    if (!h)
        return;
    free(h->pt);
    memset(h, 0, sizeof *h);
}

static int key_matches(const db_drift_key *k, const db_row *r)
{
    const char *type = k->series_type ? k->series_type : "";
    return !strcmp(r->series_type, type) && r->echo == k->echo && r->slice == k->slice;
}

/* Ownership: on success h owns h->pt; on failure h is empty. */
sw_status wd_history_load(db *d, const db_drift_key *k, wd_history *h, sw_error *err)
{
    sw_status rc = SW_OK;
    db_cursor *c = NULL;
    const db_row *r = NULL;
    db_filter f;
    memset(h, 0, sizeof *h);
    if (!d || !k || k->scanner_id <= 0 || !k->metric || !*k->metric)
        return sw_error_set(err, SW_EINVAL, "drift: history: bad key");
    db_filter_init(&f);
    f.scanner_id = k->scanner_id;
    f.metric = k->metric;
    f.verdict_mask = (1u << DB_PASS) | (1u << DB_WARN) | (1u << DB_FAIL) | (1u << DB_INFO);
    if ((rc = db_cursor_open(d, &f, &c, err)) != SW_OK)
        goto out;
    while ((rc = db_cursor_next(c, &r, err)) == SW_OK && r) {
        if (!key_matches(k, r) || !isfinite(r->value))
            continue;
        double t = wd_iso_days(r->acquired_at);
        if (!isfinite(t)) {
            h->n_skipped++;
            continue;
        }
        if (h->n == h->cap) {
            int cap = h->cap ? h->cap * 2 : 64;
            size_t bytes;
            wd_hpoint *np = NULL;
            if (cap < h->cap || sw_mul_size((size_t)cap, sizeof *np, &bytes) != 0 ||
                !(np = realloc(h->pt, bytes))) {
                rc = sw_error_set(err, SW_ENOMEM, "drift: out of memory for the history");
                goto out;
            }
            h->pt = np;
            h->cap = cap;
        }
        wd_hpoint *p = &h->pt[h->n++];
        memset(p, 0, sizeof *p);
        p->series_id = r->series_id;
        p->run_id = r->run_id;
        sw_strlcpy(p->acquired_at, r->acquired_at, sizeof p->acquired_at);
        p->t = t;
        p->value = r->value;
        p->uncertainty = r->uncertainty;
        p->nominal = r->nominal;
        p->limit_lo = r->limit_lo;
        p->limit_hi = r->limit_hi;
        p->verdict = r->verdict;
        p->accepted = r->verdict == DB_PASS || r->verdict == DB_WARN || r->verdict == DB_INFO;
        sw_strlcpy(h->unit, r->unit, sizeof h->unit);
    }
out:
    db_cursor_close(c);
    if (rc != SW_OK)
        wd_history_free(h);
    return rc;
}

/* ---- statistics ---- */

void wd_drift_eval_free(wd_drift_eval *e)
{
    if (!e)
        return;
    free(e->track.z);
    free(e->track.lcl);
    free(e->track.ucl);
    free(e->track.cp);
    free(e->track.cm);
    free(e->track.flags);
    memset(e, 0, sizeof *e);
}

/* Ownership: on success e owns the track arrays; on failure e holds nothing. */
sw_status wd_drift_evaluate(const wd_history *h, const wd_drift_opts *o, wd_drift_eval *e,
                            sw_error *err)
{
    sw_status rc = SW_OK;
    double *t = NULL, *x = NULL, *u = NULL;
    int *acc = NULL;
    memset(e, 0, sizeof *e);
    e->limit_lo = e->limit_hi = NAN;
    if (!h || !o)
        return sw_error_set(err, SW_EINVAL, "drift: evaluate: bad arguments");
    if ((rc = wd_drift_opts_check(o, err)) != SW_OK)
        return rc;
    an_drift_params p = o->p;
    p.baseline_from = o->baseline_from[0] ? wd_iso_days(o->baseline_from) : NAN;
    p.baseline_to = o->baseline_to[0] ? wd_iso_days(o->baseline_to) : NAN;
    if (h->n > 0 && o->sigma_floor_fraction > 0) {
        double lo = h->pt[h->n - 1].limit_lo, hi = h->pt[h->n - 1].limit_hi;
        double half = isfinite(lo) && isfinite(hi) ? 0.5 * (hi - lo) : NAN;
        if (isfinite(half) && half > 0)
            p.sigma_floor = o->sigma_floor_fraction * half;
    }
    size_t n = (size_t)(h->n > 0 ? h->n : 1), bd, bi, bu;
    if (sw_mul_size(n, sizeof(double), &bd) || sw_mul_size(n, sizeof(int), &bi) ||
        sw_mul_size(n, sizeof(unsigned), &bu)) {
        rc = sw_error_set(err, SW_ENOMEM, "drift: history too long");
        goto out;
    }
    t = malloc(bd);
    x = malloc(bd);
    u = malloc(bd);
    acc = malloc(bi);
    e->track.z = malloc(bd);
    e->track.lcl = malloc(bd);
    e->track.ucl = malloc(bd);
    e->track.cp = malloc(bd);
    e->track.cm = malloc(bd);
    e->track.flags = malloc(bu);
    if (!t || !x || !u || !acc || !e->track.z || !e->track.lcl || !e->track.ucl || !e->track.cp ||
        !e->track.cm || !e->track.flags) {
        rc = sw_error_set(err, SW_ENOMEM, "drift: out of memory for %d points", h->n);
        goto out;
    }
    for (int i = 0; i < h->n; i++) {
        t[i] = h->pt[i].t;
        x[i] = h->pt[i].value;
        u[i] = h->pt[i].uncertainty;
        acc[i] = h->pt[i].accepted;
    }
    an_drift_input in = {.n = h->n, .t = t, .x = x, .u = u, .accepted = acc};
    if ((rc = an_drift_evaluate(&in, &p, &e->track, &e->sum, err)) != SW_OK)
        goto out;
    if (h->n > 0) {
        e->limit_lo = h->pt[h->n - 1].limit_lo;
        e->limit_hi = h->pt[h->n - 1].limit_hi;
    }
    if (e->sum.have_trend && (isfinite(e->limit_lo) || isfinite(e->limit_hi))) {
        an_trend_crossing(&e->sum.trend, e->limit_lo, e->limit_hi, &e->crossing);
        e->have_crossing = e->crossing.side != 0;
    }
out:
    free(t);
    free(x);
    free(u);
    free(acc);
    if (rc != SW_OK)
        wd_drift_eval_free(e);
    return rc;
}

char *wd_drift_flags_text(unsigned flags, char *buf, size_t n)
{
    static const struct {
        unsigned bit;
        const char *name;
    } names[] = {{AN_DRIFT_F_EWMA_HI, "ewma-high"},
                 {AN_DRIFT_F_EWMA_LO, "ewma-low"},
                 {AN_DRIFT_F_CUSUM_HI, "cusum-high"},
                 {AN_DRIFT_F_CUSUM_LO, "cusum-low"}};
    size_t len = 0;
    if (n)
        buf[0] = '\0';
    for (size_t i = 0; i < sizeof names / sizeof names[0]; i++)
        if ((flags & names[i].bit) && len < n)
            len += (size_t)snprintf(buf + len, n - len, "%s%s", len ? "," : "", names[i].name);
    return buf;
}

/* ---- the alarm ---- */

typedef struct episode_ref {
    int64_t id;
} episode_ref;

static int episode_cb(void *ctx, const db_drift_episode *e)
{
    ((episode_ref *)ctx)->id = e->id;
    return 1;
}

/* The one line for people: what signalled, against which baseline, and where the trend goes. */
static void describe(const db_drift_key *k, const wd_history *h, const wd_drift_eval *e, char *buf,
                     size_t n)
{
    const an_drift_summary *s = &e->sum;
    int last = h->n - 1;
    unsigned f = s->last_flags;
    const char *u = h->unit;
    size_t len = 0;
#define PUT(...)                                                                                   \
    do {                                                                                           \
        if (len < n)                                                                               \
            len += (size_t)snprintf(buf + len, n - len, __VA_ARGS__);                              \
    } while (0)
    PUT("drift of %s (%s", k->metric, k->series_type && *k->series_type ? k->series_type : "-");
    if (k->echo)
        PUT(", echo %d", k->echo);
    if (k->slice)
        PUT(", slice %d", k->slice);
    PUT("):");
    if (f & (AN_DRIFT_F_EWMA_HI | AN_DRIFT_F_EWMA_LO)) {
        int hi = (f & AN_DRIFT_F_EWMA_HI) != 0;
        PUT(" EWMA %.3f %s %s its limit %.3f %s;", e->track.z[last], u, hi ? "above" : "below",
            hi ? e->track.ucl[last] : e->track.lcl[last], u);
    }
    if (f & AN_DRIFT_F_CUSUM_HI)
        PUT(" CUSUM C+ %.3f %s > H %.3f %s;", e->track.cp[last], u, s->H, u);
    if (f & AN_DRIFT_F_CUSUM_LO)
        PUT(" CUSUM C- %.3f %s > H %.3f %s;", e->track.cm[last], u, s->H, u);
    PUT(" baseline %.3f %s, sigma %.3f %s (%s of %d results)", s->base.mean, u, s->base.sigma, u,
        s->base.source == AN_SIGMA_SD            ? "SD"
        : s->base.source == AN_SIGMA_UNCERTAINTY ? "uncertainty"
                                                 : "floor",
        s->base.n);
    if (s->have_trend) {
        PUT("; trend %+.3f %s/year", s->trend.slope * 365.25, u);
        if (e->have_crossing) {
            char d0[16];
            wd_days_iso(e->crossing.t, d0, sizeof d0);
            PUT(", reaches %.3f %s about %s", e->crossing.limit, u, d0);
            if (e->crossing.bounded) {
                char d1[16], d2[16];
                PUT(" (%.0f %% interval %s to %s)", s->trend.confidence * 100,
                    wd_days_iso(e->crossing.t_lo, d1, sizeof d1),
                    wd_days_iso(e->crossing.t_hi, d2, sizeof d2));
            }
        }
    }
#undef PUT
}

/* What a drift alarm's hint reads from the same run: which metric and slice hold the thickness,
 * and which slices are the wedge slices (from the run's own rows). */
typedef struct hint_ctx {
    char thickness_metric[48];
    int thickness_slice;
    int n_wedges;
    int wedge_slice[2];
} hint_ctx;

/* A companion metric of the alarm's key (same scanner, protocol and echo) on one slice: its
 * baseline's mean and SD (the baseline period, else the first baseline_n accepted results) and its
 * value in run `run`. Returns 1 when both exist. */
static int companion(db *d, const db_drift_key *k, const char *metric, int slice,
                     const wd_drift_opts *o, int64_t run, double *latest, double *latest_unc,
                     double *mean, double *sd)
{
    db_drift_key ck = *k;
    ck.metric = metric;
    ck.slice = slice;
    wd_history h;
    sw_error e;
    sw_error_clear(&e);
    if (wd_history_load(d, &ck, &h, &e) != SW_OK)
        return 0;
    double from = o->baseline_from[0] ? wd_iso_days(o->baseline_from) : NAN;
    double to = o->baseline_to[0] ? wd_iso_days(o->baseline_to) : NAN;
    double s1 = 0, s2 = 0;
    int n = 0, found = 0;
    for (int i = 0; i < h.n; i++) {
        const wd_hpoint *p = &h.pt[i];
        if (p->run_id == run) {
            *latest = p->value;
            *latest_unc = isfinite(p->uncertainty) ? p->uncertainty : 0;
            found = 1;
        }
        int in_base = p->accepted && p->run_id != run &&
                      (isfinite(from) ? p->t >= from && (!isfinite(to) || p->t < to)
                                      : n < o->p.baseline_n);
        if (in_base) {
            s1 += p->value;
            s2 += p->value * p->value;
            n++;
        }
    }
    wd_history_free(&h);
    if (!found || n < 2)
        return 0;
    *mean = s1 / n;
    double var = (s2 - s1 * s1 / n) / (n - 1);
    *sd = var > 0 ? sqrt(var) : 0;
    return 1;
}

/* The cause hints of a drift: each companion's change since its baseline, judged against the
 * baseline's spread. */
static int drift_hints(db *d, const db_drift_key *k, int64_t run, const wd_drift_opts *o,
                       const hint_ctx *c, wd_hint *out, int max)
{
    if (!c)
        return 0;
    wd_hint_input in;
    memset(&in, 0, sizeof in);
    in.since_baseline = 1;
    double v, u, mean, sd;
    if (c->thickness_metric[0]) {
        in.partition = !strcmp(c->thickness_metric, "partition_thickness");
        if (companion(d, k, c->thickness_metric, c->thickness_slice, o, run, &v, &u, &mean, &sd) &&
            mean > 0) {
            in.has_thickness = 1;
            in.thickness_mm = v - mean;
            in.thickness_unc_mm = sd;
            in.thickness_ref_mm = mean;
        }
        if (companion(d, k, "tilt_angle", c->thickness_slice, o, run, &v, &u, &mean, &sd)) {
            in.has_tilt = 1;
            in.tilt_deg = v;
            in.tilt_unc_deg = u;
        }
    }
    if (companion(d, k, "position_scale", 0, o, run, &v, &u, &mean, &sd)) {
        in.has_scale = 1;
        in.scale_percent = v - mean;
        in.scale_unc_percent = sd;
    }
    if (companion(d, k, "position_offset", 0, o, run, &v, &u, &mean, &sd)) {
        in.has_offset = 1;
        in.offset_mm = v - mean;
        in.offset_unc_mm = sd;
    }
    for (int j = 0; j < c->n_wedges && j < 2; j++)
        if (companion(d, k, "slice_displacement", c->wedge_slice[j], o, run, &v, &u, &mean, &sd)) {
            in.has_shift[j] = 1;
            in.shift_slice[j] = c->wedge_slice[j];
            in.shift_mm[j] = v - mean;
            in.shift_unc_mm[j] = sd;
        }
    return wd_hints(&in, &o->hints, out, max);
}

static sw_status drift_check(db *d, const db_drift_key *k, const wd_drift_opts *o,
                             const char *png_path, const hint_ctx *hc, wd_drift_outcome *out,
                             sw_error *err);

sw_status wd_drift_check(db *d, const db_drift_key *k, const wd_drift_opts *o, const char *png_path,
                         wd_drift_outcome *out, sw_error *err)
{
    return drift_check(d, k, o, png_path, NULL, out, err);
}

static sw_status drift_check(db *d, const db_drift_key *k, const wd_drift_opts *o,
                             const char *png_path, const hint_ctx *hc, wd_drift_outcome *out,
                             sw_error *err)
{
    wd_hint hints[WD_MAX_HINTS];
    int n_hints = 0;
    sw_status rc = SW_OK;
    wd_history h;
    wd_drift_eval e;
    int own_tx = 0;
    memset(&h, 0, sizeof h);
    memset(&e, 0, sizeof e);
    memset(out, 0, sizeof *out);
    if ((rc = wd_history_load(d, k, &h, err)) != SW_OK)
        goto out;
    if ((rc = wd_drift_evaluate(&h, o, &e, err)) != SW_OK)
        goto out;
    out->status = e.sum.status;
    if (e.sum.status == AN_DRIFT_NO_BASELINE) {
        snprintf(out->message, sizeof out->message, "%s: baseline not complete (%d results)",
                 k->metric, h.n);
        goto out;
    }
    if (!db_in_transaction(d)) {
        if ((rc = db_begin(d, err)) != SW_OK)
            goto out;
        own_tx = 1;
    }
    episode_ref ep = {0};
    int found = 0;
    if ((rc = db_drift_open_get(d, k, episode_cb, &ep, &found, err)) != SW_OK)
        goto out;
    const wd_hpoint *last = &h.pt[h.n - 1];
    if (e.sum.status == AN_DRIFT_OUT && !found) {
        char stat[64];
        describe(k, &h, &e, out->message, sizeof out->message);
        n_hints = drift_hints(d, k, last->run_id, o, hc, hints, WD_MAX_HINTS);
        if (n_hints) {
            size_t len = strlen(out->message);
            snprintf(out->message + len, sizeof out->message - len, "; hint: %s",
                     hints[0].brief);
        }
        wd_drift_flags_text(e.sum.last_flags, stat, sizeof stat);
        unsigned f = e.sum.last_flags;
        double limit = f & AN_DRIFT_F_EWMA_HI   ? e.track.ucl[h.n - 1]
                       : f & AN_DRIFT_F_EWMA_LO ? e.track.lcl[h.n - 1]
                                                : NAN;
        db_alert_info a = {.kind = DB_ALERT_DRIFT,
                           .scanner_id = k->scanner_id,
                           .series_id = last->series_id,
                           .run_id = last->run_id,
                           .metric = k->metric,
                           .value = last->value,
                           .limit = limit,
                           .verdict = last->verdict,
                           .message = out->message,
                           .png_path = png_path};
        if ((rc = db_alert_add(d, &a, &out->alert_id, err)) != SW_OK)
            goto out;
        for (int i = 0; i < n_hints; i++) {
            db_hint_info hi = {.run_id = last->run_id,
                               .alert_id = out->alert_id,
                               .echo = k->echo,
                               .code = wd_hint_name(hints[i].code),
                               .brief = hints[i].brief,
                               .text = hints[i].text};
            if ((rc = db_hint_add(d, &hi, err)) != SW_OK)
                goto out;
        }
        if ((rc = db_drift_episode_open(d, k, stat, last->series_id, last->acquired_at,
                                        out->alert_id, &out->episode_id, err)) != SW_OK)
            goto out;
        out->started = 1;
    } else if (e.sum.status == AN_DRIFT_IN_CONTROL && found &&
               e.sum.in_control_run >= o->p.close_after) {
        if ((rc = db_drift_episode_close(d, ep.id, last->series_id, last->acquired_at, err)) !=
            SW_OK)
            goto out;
        out->episode_id = ep.id;
        out->ended = 1;
        snprintf(out->message, sizeof out->message, "%s: back in control for %d results, to %s",
                 k->metric, e.sum.in_control_run, last->acquired_at);
    } else {
        out->episode_id = found ? ep.id : 0;
        snprintf(out->message, sizeof out->message, "%s: %s%s", k->metric,
                 an_drift_status_name(e.sum.status), found ? " (episode open)" : "");
    }
    if (own_tx) {
        own_tx = 0;
        rc = db_commit(d, err);
    }
out:
    if (own_tx)
        db_rollback(d, NULL);
    if (rc != SW_OK) {
        out->started = out->ended = 0;
        out->alert_id = 0;
    }
    wd_drift_eval_free(&e);
    wd_history_free(&h);
    return rc;
}

#define MAX_KEYS 64

typedef struct run_key {
    char series_type[32], metric[48];
    int echo, slice;
} run_key;

sw_status wd_drift_check_run(db *d, int64_t scanner_id, int64_t run_id, const wd_drift_opts *o,
                             const char *png_path, int *started, int *ended, sw_error *err)
{
    sw_status rc = SW_OK;
    db_cursor *c = NULL;
    const db_row *r = NULL;
    run_key *keys = NULL;
    int nk = 0;
    db_filter f;
    if (started)
        *started = 0;
    if (ended)
        *ended = 0;
    if (!d || scanner_id <= 0 || run_id <= 0 || !o)
        return sw_error_set(err, SW_EINVAL, "drift: check_run: bad arguments");
    if (!(keys = calloc(MAX_KEYS, sizeof *keys)))
        return sw_error_set(err, SW_ENOMEM, "drift: out of memory");
    db_filter_init(&f);
    f.scanner_id = scanner_id;
    f.verdict_mask = (1u << DB_PASS) | (1u << DB_WARN) | (1u << DB_FAIL);
    if ((rc = db_cursor_open(d, &f, &c, err)) != SW_OK)
        goto out;
    /* The metrics of this run that carry pass limits: the ones with a tolerance to drift from. */
    while ((rc = db_cursor_next(c, &r, err)) == SW_OK && r) {
        if (r->run_id != run_id || !(isfinite(r->limit_lo) || isfinite(r->limit_hi)))
            continue;
        if (nk == MAX_KEYS)
            break;
        run_key *q = &keys[nk++];
        sw_strlcpy(q->series_type, r->series_type, sizeof q->series_type);
        sw_strlcpy(q->metric, r->metric, sizeof q->metric);
        q->echo = r->echo;
        q->slice = r->slice;
    }
    db_cursor_close(c);
    c = NULL;
    if (rc != SW_OK)
        goto out;
    hint_ctx hc;
    memset(&hc, 0, sizeof hc);
    for (int i = 0; i < nk; i++) {
        if (!strcmp(keys[i].metric, "slice_thickness") ||
            !strcmp(keys[i].metric, "partition_thickness")) {
            sw_strlcpy(hc.thickness_metric, keys[i].metric, sizeof hc.thickness_metric);
            hc.thickness_slice = keys[i].slice;
        } else if (!strcmp(keys[i].metric, "bar_length_difference") && hc.n_wedges < 2) {
            int dup = 0;
            for (int j = 0; j < hc.n_wedges; j++)
                dup |= hc.wedge_slice[j] == keys[i].slice;
            if (!dup)
                hc.wedge_slice[hc.n_wedges++] = keys[i].slice;
        }
    }
    for (int i = 0; i < nk; i++) {
        db_drift_key k = {.scanner_id = scanner_id,
                          .series_type = keys[i].series_type,
                          .echo = keys[i].echo,
                          .slice = keys[i].slice,
                          .metric = keys[i].metric};
        wd_drift_outcome oc;
        if ((rc = drift_check(d, &k, o, png_path, &hc, &oc, err)) != SW_OK)
            goto out;
        if (started)
            *started += oc.started;
        if (ended)
            *ended += oc.ended;
    }
out:
    db_cursor_close(c);
    free(keys);
    return rc;
}
