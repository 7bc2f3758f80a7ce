/* cmd_report.c: `slicewarden report`: a self-contained HTML report for one scanner or all over a
 * period: summary, latest results, alarms, trend charts with the drift statistics, annotated
 * images. Reads the store read-only; the statistics are analysis/drift.c's over each key's whole
 * history (the chart shows the period); report/html.c renders. */
#include <dirent.h>
#include <getopt.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "report.h"
#include "trends.h"
#include "watch.h"
#include "wd.h"

/* ---- an allocation pool: everything the report model points at, freed at once ---- */
typedef struct pool {
    void **p;
    size_t n, cap;
    int failed;
} pool;

static void *pool_calloc(pool *pl, size_t n, size_t size)
{
    if (pl->failed)
        return NULL;
    if (pl->n == pl->cap) {
        size_t cap = pl->cap ? pl->cap * 2 : 256;
        void **np = realloc(pl->p, cap * sizeof *np);
        if (!np) {
            pl->failed = 1;
            return NULL;
        }
        pl->p = np;
        pl->cap = cap;
    }
    void *q = calloc(n ? n : 1, size ? size : 1); /* calloc checks n * size for overflow */
    if (!q) {
        pl->failed = 1;
        return NULL;
    }
    pl->p[pl->n++] = q;
    return q;
}

static char *pool_printf(pool *pl, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
static char *pool_printf(pool *pl, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    int n = vsnprintf(NULL, 0, fmt, ap);
    va_end(ap);
    if (n < 0)
        return NULL;
    char *s = pool_calloc(pl, (size_t)n + 1, 1);
    if (!s)
        return NULL;
    va_start(ap, fmt);
    vsnprintf(s, (size_t)n + 1, fmt, ap);
    va_end(ap);
    return s;
}

static char *pool_strdup(pool *pl, const char *s)
{
    return pool_printf(pl, "%s", s ? s : "");
}

static void pool_free(pool *pl)
{
    for (size_t i = 0; i < pl->n; i++)
        free(pl->p[i]);
    free(pl->p);
    memset(pl, 0, sizeof *pl);
}

/* ---- gathering ---- */

#define MAX_SCANNERS 512
#define MAX_KEYS 64
#define MAX_ALARMS 40

typedef struct scanner {
    int64_t id;
    char *station, *serial, *manufacturer, *model, *institution, *alias;
} scanner;

typedef struct scanners {
    pool *pl;
    const char *only; /* station name, or NULL */
    int n;
    scanner s[MAX_SCANNERS];
} scanners;

static int scanner_cb(void *ctx, const db_scanner_rec *r)
{
    scanners *ss = ctx;
    if (ss->only && strcmp(ss->only, r->info.station_name) != 0)
        return 0;
    if (ss->n == MAX_SCANNERS)
        return 1;
    scanner *s = &ss->s[ss->n++];
    s->id = r->id;
    s->station = pool_strdup(ss->pl, r->info.station_name);
    s->serial = pool_strdup(ss->pl, r->info.device_serial);
    s->manufacturer = pool_strdup(ss->pl, r->info.manufacturer);
    s->model = pool_strdup(ss->pl, r->info.model);
    s->institution = pool_strdup(ss->pl, r->info.institution);
    s->alias = pool_strdup(ss->pl, r->info.site_alias);
    return 0;
}

/* One toleranced quantity of a scanner seen in the period. */
typedef struct qkey {
    char series_type[32], metric[48], unit[16];
    int echo, slice;
    int n_unmeas; /* unmeasurable results in the period */
    /* the latest result in the period */
    char date[32], verdict[16], reason[AN_REASON_MAX];
    double value, unc;
} qkey;

/* The latest series of each series type in the period (for the images). */
#define MAX_TYPES 8
typedef struct latest_series {
    char series_type[32];
    int64_t series_id, run_id;
    char date[32];
    db_verdict run_verdict;
} latest_series;

typedef struct period_scan {
    int n_series;
    int64_t last_series;
    char last_date[32];
    db_verdict last_verdict;
    int n_pass, n_warn, n_fail, n_unmeas;
    int nk;
    qkey key[MAX_KEYS];
    int nt;
    latest_series type[MAX_TYPES];
} period_scan;

static qkey *find_key(period_scan *ps, const db_row *r)
{
    for (int i = 0; i < ps->nk; i++) {
        qkey *k = &ps->key[i];
        if (!strcmp(k->series_type, r->series_type) && !strcmp(k->metric, r->metric) &&
            k->echo == r->echo && k->slice == r->slice)
            return k;
    }
    if (ps->nk == MAX_KEYS)
        return NULL;
    qkey *k = &ps->key[ps->nk++];
    memset(k, 0, sizeof *k);
    sw_strlcpy(k->series_type, r->series_type, sizeof k->series_type);
    sw_strlcpy(k->metric, r->metric, sizeof k->metric);
    sw_strlcpy(k->unit, r->unit, sizeof k->unit);
    k->echo = r->echo;
    k->slice = r->slice;
    return k;
}

static sw_status scan_period(db *d, int64_t scanner_id, const char *from, const char *to,
                             period_scan *ps, sw_error *err)
{
    sw_status rc;
    db_cursor *c = NULL;
    const db_row *r = NULL;
    db_filter f;
    memset(ps, 0, sizeof *ps);
    db_filter_init(&f);
    f.scanner_id = scanner_id;
    f.from = from;
    f.to = to;
    if ((rc = db_cursor_open(d, &f, &c, err)) != SW_OK)
        return rc;
    while ((rc = db_cursor_next(c, &r, err)) == SW_OK && r) {
        if (r->series_id != ps->last_series) {
            ps->n_series++;
            ps->last_series = r->series_id;
            sw_strlcpy(ps->last_date, r->acquired_at, sizeof ps->last_date);
            ps->last_verdict = r->run_verdict;
            latest_series *t = NULL;
            for (int i = 0; i < ps->nt; i++)
                if (!strcmp(ps->type[i].series_type, r->series_type))
                    t = &ps->type[i];
            if (!t && ps->nt < MAX_TYPES) {
                t = &ps->type[ps->nt++];
                sw_strlcpy(t->series_type, r->series_type, sizeof t->series_type);
            }
            if (t) {
                t->series_id = r->series_id;
                t->run_id = r->run_id;
                t->run_verdict = r->run_verdict;
                sw_strlcpy(t->date, r->acquired_at, sizeof t->date);
            }
        }
        if (!(isfinite(r->limit_lo) || isfinite(r->limit_hi)))
            continue; /* only toleranced quantities are counted and charted */
        switch (r->verdict) {
        case DB_PASS: ps->n_pass++; break;
        case DB_WARN: ps->n_warn++; break;
        case DB_FAIL: ps->n_fail++; break;
        case DB_UNMEASURABLE: ps->n_unmeas++; break;
        case DB_INFO: break;
        }
        qkey *k = find_key(ps, r);
        if (!k)
            continue;
        if (r->verdict == DB_UNMEASURABLE)
            k->n_unmeas++;
        sw_strlcpy(k->date, r->acquired_at, sizeof k->date);
        sw_strlcpy(k->verdict, db_verdict_name(r->verdict), sizeof k->verdict);
        sw_strlcpy(k->reason, r->verdict == DB_UNMEASURABLE ? r->reason : "", sizeof k->reason);
        k->value = r->value;
        k->unc = r->uncertainty;
        if (r->unit[0])
            sw_strlcpy(k->unit, r->unit, sizeof k->unit);
    }
    db_cursor_close(c);
    return rc;
}

static int key_order(const void *a, const void *b)
{
    const qkey *x = a, *y = b;
    int c = strcmp(x->series_type, y->series_type);
    if (c)
        return c;
    /* Slice thickness before bar length difference, then by name. */
    int tx = strcmp(x->metric, "slice_thickness") && strcmp(x->metric, "partition_thickness"),
        ty = strcmp(y->metric, "slice_thickness") && strcmp(y->metric, "partition_thickness");
    if (tx != ty)
        return tx - ty;
    if ((c = strcmp(x->metric, y->metric)))
        return c;
    if (x->echo != y->echo)
        return x->echo - y->echo;
    return x->slice - y->slice;
}

static const char *metric_title(const char *m)
{
    if (!strcmp(m, "slice_thickness"))
        return "Slice thickness";
    if (!strcmp(m, "partition_thickness"))
        return "Partition thickness (3D)";
    if (!strcmp(m, "bar_length_difference"))
        return "Bar length difference";
    return m;
}

static char *key_label(pool *pl, const qkey *k)
{
    char echo[24] = "", slice[24] = "";
    if (k->echo)
        snprintf(echo, sizeof echo, ", echo %d", k->echo);
    if (k->slice)
        snprintf(slice, sizeof slice, ", slice %d", k->slice);
    return pool_printf(pl, "%s (%s%s%s)", metric_title(k->metric),
                       k->series_type[0] ? k->series_type : "-", echo, slice);
}

static int in_period(const char *acq, const char *from, const char *to)
{
    return (!from || strcmp(acq, from) >= 0) && (!to || strcmp(acq, to) < 0);
}

/* One chart: the key's whole history through the statistics; the points of the period shown. */
static sw_status build_chart(db *d, pool *pl, int64_t scanner_id, const qkey *k,
                             const wd_drift_opts *o, const char *from, const char *to,
                             const char *id, rp_chart *c, sw_error *err)
{
    sw_status rc;
    wd_history h;
    wd_drift_eval e;
    memset(&e, 0, sizeof e);
    db_drift_key dk = {.scanner_id = scanner_id,
                       .series_type = k->series_type,
                       .echo = k->echo,
                       .slice = k->slice,
                       .metric = k->metric};
    memset(c, 0, sizeof *c);
    if ((rc = wd_history_load(d, &dk, &h, err)) != SW_OK)
        return rc;
    if ((rc = wd_drift_evaluate(&h, o, &e, err)) != SW_OK) {
        /* A baseline without spread is a fact about the data, not a reason to give up. */
        if (rc != SW_EMEASURE)
            goto out;
        sw_error_clear(err);
        rc = SW_OK;
        memset(&e, 0, sizeof e);
        e.sum.status = AN_DRIFT_NO_BASELINE;
        e.sum.first = -1;
    }
    rp_tpoint *pt = pool_calloc(pl, (size_t)(h.n > 0 ? h.n : 1), sizeof *pt);
    if (!pt) {
        rc = sw_error_set(err, SW_ENOMEM, "report: out of memory");
        goto out;
    }
    int n = 0;
    for (int i = 0; i < h.n; i++) {
        const wd_hpoint *p = &h.pt[i];
        if (!in_period(p->acquired_at, from, to))
            continue;
        rp_tpoint *q = &pt[n++];
        q->date = pool_strdup(pl, p->acquired_at);
        q->t = p->t;
        q->value = p->value;
        q->unc = p->uncertainty;
        q->verdict = db_verdict_name(p->verdict);
        unsigned fl = e.track.flags ? e.track.flags[i] : 0;
        q->z = e.track.z ? e.track.z[i] : NAN;
        q->lcl = e.track.lcl ? e.track.lcl[i] : NAN;
        q->ucl = e.track.ucl ? e.track.ucl[i] : NAN;
        q->baseline = (fl & AN_DRIFT_F_BASELINE) != 0;
        q->out = (fl & AN_DRIFT_F_OUT) != 0;
        c->tol_lo = p->limit_lo;
        c->tol_hi = p->limit_hi;
        c->nominal = p->nominal;
    }
    if (n == 0)
        c->tol_lo = c->tol_hi = c->nominal = NAN;
    c->id = pool_strdup(pl, id);
    c->title = key_label(pl, k);
    c->metric = pool_strdup(pl, k->metric);
    c->unit = pool_strdup(pl, h.unit[0] ? h.unit : k->unit);
    c->n = n;
    c->pt = pt;
    c->t_min = from ? wd_iso_days(from) : NAN;
    c->t_max = to ? wd_iso_days(to) : NAN;
    if (!isfinite(c->t_min) || !isfinite(c->t_max))
        c->t_min = c->t_max = NAN; /* an open end: the range comes from the points */
    c->n_hidden = k->n_unmeas;
    c->series_type = pool_strdup(pl, k->series_type);
    c->echo = k->echo;
    c->slice = k->slice;
    c->status = pool_strdup(pl, an_drift_status_name(e.sum.status));
    const char *u = c->unit;
    if (e.sum.status == AN_DRIFT_NO_BASELINE) {
        c->base_mean = c->base_sigma = NAN;
        c->summary = pool_printf(pl,
                                 "No drift statistics yet: the baseline needs %d accepted "
                                 "results%s (%d measured so far).",
                                 o->p.baseline_n, o->baseline_from[0] ? " in its period" : "", h.n);
        goto out;
    }
    c->base_mean = e.sum.base.mean;
    c->base_sigma = e.sum.base.sigma;
    c->base_n = e.sum.base.n;
    int last = h.n - 1;
    char trend[400] = "";
    if (e.sum.have_trend) {
        const an_trend *t = &e.sum.trend;
        c->have_trend = 1;
        c->trend_slope = t->slope;
        c->trend_intercept = t->intercept;
        c->trend_t0 = h.pt[e.sum.first].t;
        c->trend_t1 = h.pt[last].t;
        int len = snprintf(
            trend, sizeof trend, " Trend %+.3f %s/year (%.0f %% interval %+.3f to %+.3f), %s.",
            t->slope * 365.25, u, t->confidence * 100, t->slope_lo * 365.25, t->slope_hi * 365.25,
            t->significant ? "significant" : "not significant");
        if (e.have_crossing && len > 0 && (size_t)len < sizeof trend) {
            char d0[16], d1[16], d2[16];
            wd_days_iso(e.crossing.t, d0, sizeof d0);
            if (e.crossing.bounded)
                snprintf(trend + len, sizeof trend - (size_t)len,
                         " The line reaches the %s limit %.3f %s about %s (%.0f %% interval %s to "
                         "%s).",
                         e.crossing.side > 0 ? "upper" : "lower", e.crossing.limit, u, d0,
                         t->confidence * 100, wd_days_iso(e.crossing.t_lo, d1, sizeof d1),
                         wd_days_iso(e.crossing.t_hi, d2, sizeof d2));
            else
                snprintf(trend + len, sizeof trend - (size_t)len,
                         " Projected, the line would reach the %s limit %.3f %s about %s, but "
                         "the slope is not significant.",
                         e.crossing.side > 0 ? "upper" : "lower", e.crossing.limit, u, d0);
        }
    }
    char flags[64];
    wd_drift_flags_text(e.sum.last_flags, flags, sizeof flags);
    c->summary = pool_printf(
        pl,
        "Baseline %.3f %s, sigma %.3f %s (%s, %d results). Latest EWMA %.3f %s, limits %.3f to "
        "%.3f; CUSUM C+ %.3f, C- %.3f, H %.3f %s%s%s.%s",
        e.sum.base.mean, u, e.sum.base.sigma, u,
        e.sum.base.source == AN_SIGMA_SD ? "SD of the baseline"
        : e.sum.base.source == AN_SIGMA_UNCERTAINTY
            ? "measurement uncertainty, larger than the SD"
            : "the floor set from the tolerance, larger than SD and uncertainty",
        e.sum.base.n, e.track.z[last], u, e.track.lcl[last], e.track.ucl[last], e.track.cp[last],
        e.track.cm[last], e.sum.H, u, flags[0] ? "; out of control: " : "", flags, trend);
out:
    wd_drift_eval_free(&e);
    wd_history_free(&h);
    return rc;
}

typedef struct alarm_collect {
    pool *pl;
    rp_alarm *a;
    int n, total;
    char (*png)[4096]; /* PNGs of failing results, for the images */
    int npng, max_png;
} alarm_collect;

static int episode_cb(void *ctx, const db_drift_episode *e)
{
    alarm_collect *ac = ctx;
    ac->total++;
    if (ac->n == MAX_ALARMS)
        return 0;
    rp_alarm *a = &ac->a[ac->n++];
    char echo[24] = "", slice[24] = "";
    if (e->key.echo)
        snprintf(echo, sizeof echo, ", echo %d", e->key.echo);
    if (e->key.slice)
        snprintf(slice, sizeof slice, ", slice %d", e->key.slice);
    a->kind = "drift";
    a->open = 1;
    a->date = pool_strdup(ac->pl, e->opened_acquired_at[0] ? e->opened_acquired_at : e->opened_at);
    a->text = pool_printf(
        ac->pl, "%s (%s%s%s) out of control since this series (%s)", metric_title(e->key.metric),
        e->key.series_type[0] ? e->key.series_type : "-", echo, slice, e->statistic);
    return 0;
}

static int alert_cb(void *ctx, const db_alert_rec *r)
{
    alarm_collect *ac = ctx;
    ac->total++;
    if (r->info.kind == DB_ALERT_BREACH && r->info.png_path[0] && ac->npng < ac->max_png) {
        int dup = 0;
        for (int i = 0; i < ac->npng; i++)
            dup |= !strcmp(ac->png[i], r->info.png_path);
        if (!dup)
            sw_strlcpy(ac->png[ac->npng++], r->info.png_path, sizeof ac->png[0]);
    }
    if (ac->n == MAX_ALARMS)
        return 0;
    rp_alarm *a = &ac->a[ac->n++];
    a->kind = db_alert_kind_name(r->info.kind);
    a->open = 0;
    a->date = pool_printf(ac->pl, "raised %s", r->created_at);
    a->text = pool_strdup(ac->pl, r->info.message);
    return 0;
}

typedef struct series_facts {
    char date[16], uid[72], description[136];
    int number;
} series_facts;

static int series_cb(void *ctx, const db_series_rec *r)
{
    series_facts *f = ctx;
    sw_strlcpy(f->date, r->info.series_date, sizeof f->date);
    sw_strlcpy(f->uid, r->info.series_instance_uid, sizeof f->uid);
    sw_strlcpy(f->description, r->info.description, sizeof f->description);
    f->number = r->info.series_number;
    return 0;
}

static int name_order(const void *a, const void *b)
{
    return strcmp(*(char *const *)a, *(char *const *)b);
}

/* The annotated PNGs the watch service wrote for one run: IMAGES/STATION/SERIES/runN_eE_sSS.png
 * (daemon/store.c). */
static void run_images(db *d, pool *pl, const char *images, const scanner *s,
                       const latest_series *ls, rp_image *out, int *n, int max)
{
    series_facts f;
    memset(&f, 0, sizeof f);
    sw_error err;
    sw_error_clear(&err);
    if (!images || !*images || db_series_get(d, ls->series_id, series_cb, &f, &err) != SW_OK)
        return;
    char station[96], series[160], dir[4096], prefix[40];
    wd_safe_component(s->station, "unknown-scanner", station, sizeof station);
    wd_series_dir_name(f.date, f.number, f.uid, series, sizeof series);
    if (snprintf(dir, sizeof dir, "%s/%s/%s", images, station, series) >= (int)sizeof dir)
        return;
    snprintf(prefix, sizeof prefix, "run%lld_", (long long)ls->run_id);
    DIR *dd = opendir(dir);
    if (!dd)
        return;
    char *names[32];
    int nn = 0;
    struct dirent *de;
    while ((de = readdir(dd)) && nn < 32) {
        size_t len = strlen(de->d_name);
        if (!strncmp(de->d_name, prefix, strlen(prefix)) && len > 4 &&
            !strcmp(de->d_name + len - 4, ".png"))
            names[nn++] = pool_strdup(pl, de->d_name);
    }
    closedir(dd);
    qsort(names, (size_t)nn, sizeof names[0], name_order);
    for (int i = 0; i < nn && *n < max; i++) {
        if (!names[i])
            continue;
        long long run = 0;
        int echo = 0, slice = 0;
        sscanf(names[i], "run%lld_e%d_s%d", &run, &echo, &slice);
        rp_image *im = &out[(*n)++];
        im->path = pool_printf(pl, "%s/%s", dir, names[i]);
        im->caption = pool_printf(pl,
                                  "Latest %s series %d (%s), acquired %s: echo %d, slice %d; "
                                  "run %lld, worst verdict %s.",
                                  ls->series_type, f.number, f.description, ls->date, echo, slice,
                                  run, db_verdict_name(ls->run_verdict));
    }
}

typedef struct hint_collect {
    pool *pl;
    const latest_series *ls;
    const char **v;
    int n, max;
} hint_collect;

static int hint_cb(void *ctx, const db_hint_info *h, const char *created_at)
{
    (void)created_at;
    hint_collect *c = ctx;
    if (c->n >= c->max)
        return 1;
    c->v[c->n++] = pool_printf(c->pl, "%s series acquired %s, echo %d%s: %s", c->ls->series_type,
                               c->ls->date, h->echo, h->alert_id ? " (drift alarm)" : "",
                               h->text);
    return 0;
}

static sw_status build_section(db *d, pool *pl, const scanner *s, int index, const wd_drift_opts *o,
                               const char *from, const char *to, const char *images, int max_images,
                               rp_scanner_section *sec, sw_error *err)
{
    sw_status rc;
    period_scan *ps = pool_calloc(pl, 1, sizeof *ps);
    if (!ps)
        return sw_error_set(err, SW_ENOMEM, "report: out of memory");
    if ((rc = scan_period(d, s->id, from, to, ps, err)) != SW_OK)
        return rc;
    qsort(ps->key, (size_t)ps->nk, sizeof ps->key[0], key_order);
    sec->name = s->alias[0] ? s->alias : s->station;
    sec->station = s->station;
    sec->serial = s->serial;
    sec->manufacturer = s->manufacturer;
    sec->model = s->model;
    sec->institution = s->institution;
    sec->n_series = ps->n_series;
    sec->last_date = ps->n_series ? pool_strdup(pl, ps->last_date) : NULL;
    sec->last_verdict = ps->n_series ? db_verdict_name(ps->last_verdict) : NULL;
    sec->n_pass = ps->n_pass;
    sec->n_warn = ps->n_warn;
    sec->n_fail = ps->n_fail;
    sec->n_unmeas = ps->n_unmeas;
    rp_result_line *res = pool_calloc(pl, (size_t)ps->nk + 1, sizeof *res);
    rp_chart *charts = pool_calloc(pl, (size_t)ps->nk + 1, sizeof *charts);
    if (!res || !charts)
        return sw_error_set(err, SW_ENOMEM, "report: out of memory");
    for (int i = 0; i < ps->nk; i++) {
        const qkey *k = &ps->key[i];
        rp_result_line *l = &res[i];
        l->label = key_label(pl, k);
        l->date = pool_strdup(pl, k->date);
        l->value = k->value;
        l->unc = k->unc;
        l->unit = pool_strdup(pl, k->unit);
        l->verdict = pool_strdup(pl, k->verdict);
        l->note = k->reason[0] ? pool_strdup(pl, k->reason) : NULL;
        char id[48];
        snprintf(id, sizeof id, "s%d-c%d", index + 1, i + 1);
        if ((rc = build_chart(d, pl, s->id, k, o, from, to, id, &charts[i], err)) != SW_OK)
            return rc;
    }
    sec->n_results = ps->nk;
    sec->results = res;
    sec->n_charts = ps->nk;
    sec->charts = charts;
    /* Alarms: open drift episodes first, then the period's alerts. */
    alarm_collect ac = {.pl = pl, .max_png = max_images};
    ac.a = pool_calloc(pl, MAX_ALARMS, sizeof *ac.a);
    ac.png = pool_calloc(pl, (size_t)(max_images > 0 ? max_images : 1), sizeof *ac.png);
    if (!ac.a || !ac.png)
        return sw_error_set(err, SW_ENOMEM, "report: out of memory");
    if ((rc = db_drift_episodes_each(d, s->id, 1, episode_cb, &ac, err)) != SW_OK)
        return rc;
    sec->n_open_alarms = ac.total;
    if ((rc = db_alerts_each(d, s->id, from, to, alert_cb, &ac, err)) != SW_OK)
        return rc;
    sec->n_alarms = ac.n;
    sec->alarms = ac.a;
    /* Images: the latest series of each type, then the failing ones the alerts point at. */
    rp_image *im = pool_calloc(pl, (size_t)(max_images > 0 ? max_images : 1), sizeof *im);
    if (!im)
        return sw_error_set(err, SW_ENOMEM, "report: out of memory");
    int ni = 0;
    for (int i = 0; i < ps->nt; i++)
        run_images(d, pl, images, s, &ps->type[i], im, &ni, max_images);
    for (int i = 0; i < ac.npng && ni < max_images; i++) {
        int dup = 0;
        for (int j = 0; j < ni; j++)
            dup |= !strcmp(im[j].path, ac.png[i]);
        if (dup)
            continue;
        im[ni].path = pool_strdup(pl, ac.png[i]);
        im[ni].caption = pool_printf(pl, "A failing result: %s", ac.png[i]);
        ni++;
    }
    sec->n_images = ni;
    sec->images = im;
    /* Cause hints of the latest series of each type (its results and its drift alarms). */
    hint_collect hc = {.pl = pl, .max = 24};
    if (!(hc.v = pool_calloc(pl, (size_t)hc.max, sizeof *hc.v)))
        return sw_error_set(err, SW_ENOMEM, "report: out of memory");
    for (int i = 0; i < ps->nt; i++) {
        hc.ls = &ps->type[i];
        if ((rc = db_hints_each(d, ps->type[i].run_id, 0, hint_cb, &hc, err)) != SW_OK)
            return rc;
    }
    sec->n_hints = hc.n;
    sec->hints = hc.v;
    return pl->failed ? sw_error_set(err, SW_ENOMEM, "report: out of memory") : SW_OK;
}

/* ---- software validation ---- */

typedef struct selftest_collect {
    db *d;
    pool *pl;
    rp_selftest v[20];
    int n;
} selftest_collect;

typedef struct row_collect {
    pool *pl;
    rp_selftest_row *v;
    int n, max;
} row_collect;

static int row_cb(void *ctx, const db_selftest_row *r)
{
    row_collect *c = ctx;
    if (c->n >= c->max)
        return 1;
    rp_selftest_row *w = &c->v[c->n++];
    w->model = pool_strdup(c->pl, r->model);
    w->quantity = pool_strdup(c->pl, r->quantity);
    w->condition = pool_strdup(c->pl, r->condition);
    w->unit = pool_strdup(c->pl, r->unit);
    w->n = r->n;
    w->n_measured = r->n_measured;
    w->bias = r->bias;
    w->sd = r->sd;
    w->max_abs_error = r->max_abs_error;
    w->limit_bias = r->limit_bias;
    w->limit_sd = r->limit_sd;
    w->min_fraction = r->min_fraction;
    w->guaranteed = r->guaranteed;
    w->passed = r->passed;
    return 0;
}

/* Newest first; the rows of the newest self-test of each program version. */
static int selftest_cb(void *ctx, int64_t id, const db_selftest_info *s)
{
    selftest_collect *c = ctx;
    if (c->n >= (int)(sizeof c->v / sizeof c->v[0]))
        return 1;
    rp_selftest *t = &c->v[c->n];
    memset(t, 0, sizeof *t);
    t->program_version = pool_strdup(c->pl, s->program_version);
    t->started_at = pool_strdup(c->pl, s->started_at);
    t->host = pool_strdup(c->pl, s->host);
    t->summary = pool_strdup(c->pl, s->summary);
    t->seconds = s->seconds;
    t->n_series = s->n_series;
    t->passed = s->passed;
    int newest_of_version = 1;
    for (int i = 0; i < c->n; i++)
        if (!strcmp(c->v[i].program_version, s->program_version))
            newest_of_version = 0;
    c->n++;
    if (newest_of_version) {
        row_collect rc = {.pl = c->pl, .max = 64};
        sw_error err;
        sw_error_clear(&err);
        if ((rc.v = pool_calloc(c->pl, (size_t)rc.max, sizeof *rc.v)) &&
            db_selftest_rows_each(c->d, id, row_cb, &rc, &err) == SW_OK) {
            t->rows = rc.v;
            t->n_rows = rc.n;
        }
    }
    return 0;
}

/* ---- the command ---- */

static void usage(FILE *f)
{
    fprintf(
        f,
        "usage: slicewarden report [-c FILE] [--db PATH] [--images DIR] [--scanner STATION]\n"
        "                          [--from DATE] [--to DATE] [--title TEXT] [--max-images N]\n"
        "                          [drift options] -o FILE\n"
        "Writes one self-contained HTML file: per scanner a summary, the latest results,\n"
        "alarms, a trend chart per toleranced quantity (tolerance band, baseline, EWMA limits,\n"
        "trend) and the annotated images of the latest and of failing series. The database is\n"
        "opened read-only.\n"
        "  -c, --config FILE    configuration naming the database and images (default %s)\n"
        "  --db PATH            the database (overrides the configuration)\n"
        "  --images DIR         the annotated images folder (overrides the configuration)\n"
        "  --scanner STATION    only this StationName\n"
        "  --from DATE, --to DATE  acquisition period [from, to), ISO 8601 (2025, 2025-03-01)\n"
        "  --max-images N       images per scanner (default 8)\n"
        "  -o, --output FILE    the HTML file, written atomically\n"
        "drift options (defaults in brackets; docs/trends.md):\n"
        "  --lambda X [0.2]  --ewma-L X [3]  --cusum-k X [0.5]  --cusum-h X [5]\n"
        "  --baseline-results N [8]  --baseline-from DATE --baseline-to DATE\n"
        "  --confidence X [0.95]\n"
        "Results support, and never replace, a qualified medical physicist's review.\n",
        WD_DEFAULT_CONFIG);
}

static int parse_double(const char *s, double *out)
{
    char *end = NULL;
    double v = strtod(s, &end);
    if (end == s || *end || !isfinite(v))
        return 0;
    *out = v;
    return 1;
}

int wd_cmd_report(int argc, char **argv)
{
    enum {
        O_DB = 256,
        O_IMAGES,
        O_SCANNER,
        O_FROM,
        O_TO,
        O_TITLE,
        O_MAXIMG,
        O_LAMBDA,
        O_L,
        O_K,
        O_H,
        O_BN,
        O_BFROM,
        O_BTO,
        O_CONF
    };
    static const struct option opts[] = {
        {"config", required_argument, NULL, 'c'},
        {"db", required_argument, NULL, O_DB},
        {"images", required_argument, NULL, O_IMAGES},
        {"scanner", required_argument, NULL, O_SCANNER},
        {"from", required_argument, NULL, O_FROM},
        {"to", required_argument, NULL, O_TO},
        {"title", required_argument, NULL, O_TITLE},
        {"max-images", required_argument, NULL, O_MAXIMG},
        {"lambda", required_argument, NULL, O_LAMBDA},
        {"ewma-L", required_argument, NULL, O_L},
        {"cusum-k", required_argument, NULL, O_K},
        {"cusum-h", required_argument, NULL, O_H},
        {"baseline-results", required_argument, NULL, O_BN},
        {"baseline-from", required_argument, NULL, O_BFROM},
        {"baseline-to", required_argument, NULL, O_BTO},
        {"confidence", required_argument, NULL, O_CONF},
        {"output", required_argument, NULL, 'o'},
        {"help", no_argument, NULL, 'h'},
        {NULL, 0, NULL, 0},
    };
    const char *config = NULL, *dbpath = NULL, *images = NULL, *only = NULL, *from = NULL,
               *to = NULL, *title = NULL, *output = NULL;
    int max_images = 8;
    /* Drift settings: the configuration's [drift], with what the command line sets over it. */
    wd_drift_opts o, cli;
    memset(&cli, 0, sizeof cli);
    cli.p.lambda = cli.p.L = cli.p.k = cli.p.h = cli.p.confidence = NAN;
    int c;
    double v;
    optind = 1;
    while ((c = getopt_long(argc, argv, "c:o:h", opts, NULL)) != -1) {
        switch (c) {
        case 'c': config = optarg; break;
        case O_DB: dbpath = optarg; break;
        case O_IMAGES: images = optarg; break;
        case O_SCANNER: only = optarg; break;
        case O_FROM:
        case O_TO:
            if (!wd_iso_prefix_ok(optarg)) {
                fprintf(stderr, "slicewarden report: '%s' is not an ISO 8601 date (2025-03-01)\n",
                        optarg);
                return 2;
            }
            *(c == O_FROM ? &from : &to) = optarg;
            break;
        case O_TITLE: title = optarg; break;
        case O_MAXIMG:
            if (!parse_double(optarg, &v) || v < 0 || v > 200 || v != floor(v)) {
                fprintf(stderr, "slicewarden report: --max-images takes 0 to 200\n");
                return 2;
            }
            max_images = (int)v;
            break;
        case O_LAMBDA:
        case O_L:
        case O_K:
        case O_H:
        case O_CONF:
        case O_BN:
            if (!parse_double(optarg, &v)) {
                fprintf(stderr, "slicewarden report: '%s' is not a number\n", optarg);
                return 2;
            }
            if (c == O_LAMBDA)
                cli.p.lambda = v;
            else if (c == O_L)
                cli.p.L = v;
            else if (c == O_K)
                cli.p.k = v;
            else if (c == O_H)
                cli.p.h = v;
            else if (c == O_CONF)
                cli.p.confidence = v;
            else if (v != floor(v) || v < 2 || v > 10000) {
                fprintf(stderr, "slicewarden report: --baseline-results takes 2 to 10000\n");
                return 2;
            } else
                cli.p.baseline_n = (int)v;
            break;
        case O_BFROM: sw_strlcpy(cli.baseline_from, optarg, sizeof cli.baseline_from); break;
        case O_BTO: sw_strlcpy(cli.baseline_to, optarg, sizeof cli.baseline_to); break;
        case 'o': output = optarg; break;
        case 'h': usage(stdout); return 0;
        default: usage(stderr); return 2;
        }
    }
    if (optind < argc) {
        fprintf(stderr, "slicewarden report: unexpected argument '%s'\n", argv[optind]);
        return 2;
    }
    if (!output) {
        fprintf(stderr, "slicewarden report: -o FILE is required\n");
        return 2;
    }
    if (from && to && strcmp(from, to) >= 0) {
        fprintf(stderr, "slicewarden report: --from %s is not before --to %s\n", from, to);
        return 2;
    }
    sw_error err;
    sw_error_clear(&err);
    static wd_config cfg;
    static scanners ss;
    pool pl = {0};
    db *d = NULL;
    int status = 2;
    rp_scanner_section *sec = NULL;
    if (wd_open_store_ro(config, dbpath, &cfg, &d, &err) != SW_OK)
        goto out;
    o = cfg.drift;
    if (isfinite(cli.p.lambda))
        o.p.lambda = cli.p.lambda;
    if (isfinite(cli.p.L))
        o.p.L = cli.p.L;
    if (isfinite(cli.p.k))
        o.p.k = cli.p.k;
    if (isfinite(cli.p.h))
        o.p.h = cli.p.h;
    if (isfinite(cli.p.confidence))
        o.p.confidence = cli.p.confidence;
    if (cli.p.baseline_n)
        o.p.baseline_n = cli.p.baseline_n;
    if (cli.baseline_from[0] || cli.baseline_to[0]) {
        sw_strlcpy(o.baseline_from, cli.baseline_from, sizeof o.baseline_from);
        sw_strlcpy(o.baseline_to, cli.baseline_to, sizeof o.baseline_to);
    }
    if (wd_drift_opts_check(&o, &err) != SW_OK)
        goto out;
    if (!images)
        images = cfg.images;
    memset(&ss, 0, sizeof ss);
    ss.pl = &pl;
    ss.only = only;
    if (db_scanners_each(d, scanner_cb, &ss, &err) != SW_OK)
        goto out;
    if (only && ss.n == 0) {
        sw_error_set(&err, SW_ENOTFOUND, "no scanner with station name '%s' in %s", only,
                     cfg.database);
        goto out;
    }
    if (!(sec = pool_calloc(&pl, (size_t)(ss.n > 0 ? ss.n : 1), sizeof *sec))) {
        sw_error_set(&err, SW_ENOMEM, "out of memory");
        goto out;
    }
    const char *site = NULL;
    for (int i = 0; i < ss.n; i++) {
        if (build_section(d, &pl, &ss.s[i], i, &o, from, to, images, max_images, &sec[i], &err) !=
            SW_OK)
            goto out;
        if (!site && ss.s[i].institution[0])
            site = ss.s[i].institution;
    }
    char now[32];
    db_now_iso(now, sizeof now);
    char *settings = pool_printf(
        &pl,
        "EWMA lambda %g, L %g; CUSUM k %g, h %g (sigma units); baseline: %s; sigma is the "
        "larger of the baseline SD and the RMS measurement uncertainty; trend interval %g %%.",
        o.p.lambda, o.p.L, o.p.k, o.p.h,
        o.baseline_from[0] ? pool_printf(&pl, "the accepted results acquired from %s before %s",
                                         o.baseline_from, o.baseline_to)
                           : pool_printf(&pl, "the first %d accepted results", o.p.baseline_n),
        o.p.confidence * 100);
    selftest_collect stc = {.d = d, .pl = &pl};
    if (db_selftests_each(d, 20, selftest_cb, &stc, &err) != SW_OK)
        goto out;
    if (pl.failed) {
        sw_error_set(&err, SW_ENOMEM, "out of memory");
        goto out;
    }
    rp_report r = {
        .n_selftests = stc.n,
        .selftests = stc.v,
        .title = title ? title
                       : (only ? pool_printf(&pl, "Slice thickness and position QA: %s",
                                             ss.n ? sec[0].name : only)
                               : "Slice thickness and position QA"),
        .site = site,
        .period_from = from,
        .period_to = to,
        .generated_at = now,
        .program_version = SW_VERSION,
        .settings = settings,
        .n_sections = ss.n,
        .sec = sec,
    };
    if (pl.failed) {
        sw_error_set(&err, SW_ENOMEM, "out of memory");
        goto out;
    }
    rp_html_info info;
    if (rp_html_write(output, &r, &info, &err) != SW_OK)
        goto out;
    fprintf(stderr,
            "slicewarden report: %d scanners, %d charts, %d points, %d images (%d missing), %zu "
            "bytes to %s\n",
            ss.n, info.n_charts, info.n_points, info.n_images, info.n_images_missing, info.bytes,
            output);
    status = 0;
out:
    if (status != 0)
        fprintf(stderr, "slicewarden report: %s\n", err.msg[0] ? err.msg : "failed");
    db_close(d);
    pool_free(&pl);
    return status;
}
