/* store.c: one measured series into the store: the run, its measurement rows (every echo's results
 * flattened, unmeasurable values with their reason), alerts for warn and fail rows, and the
 * annotated PNGs the alerts and reports point at. */
#include "watch.h"

#include <jansson.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "report.h"
#include "wd.h"

db_verdict wd_db_verdict(an_verdict v)
{
    switch (v) {
    case AN_PASS: return DB_PASS;
    case AN_WARN: return DB_WARN;
    case AN_FAIL: return DB_FAIL;
    case AN_UNMEASURABLE: return DB_UNMEASURABLE;
    }
    return DB_UNMEASURABLE;
}

/* ---- flattening ---- */

typedef struct flat {
    wd_row_fn fn;
    void *ctx;
    sw_error *err;
    sw_status rc;
    int echo;
} flat;

static json_t *jnum(double v)
{
    return isfinite(v) ? json_real(v) : json_null();
}

/* Emits one row. A value that is not finite, or a verdict of unmeasurable, makes an unmeasurable
 * row that carries why (never a number); a measured row carries note (the analysis' own remark, ""
 * when it made none). details (may be NULL) is consumed. */
static void row_note(flat *f, const char *metric, int slice, double value, double unc,
                     const char *unit, db_verdict verdict, const char *why, const char *note,
                     double nominal, double lo, double hi, json_t *details)
{
    if (f->rc != SW_OK) {
        json_decref(details);
        return;
    }
    db_measurement m;
    memset(&m, 0, sizeof m);
    m.metric = metric;
    m.slice = slice > 0 ? slice : 0;
    m.echo = f->echo;
    m.unit = unit;
    m.nominal = isfinite(nominal) ? nominal : NAN;
    m.limit_lo = isfinite(lo) ? lo : NAN;
    m.limit_hi = isfinite(hi) ? hi : NAN;
    if (verdict == DB_UNMEASURABLE || !isfinite(value)) {
        m.verdict = DB_UNMEASURABLE;
        m.value = NAN;
        m.uncertainty = NAN;
        m.reason = why && *why ? why : "not measured";
    } else {
        m.verdict = verdict;
        m.value = value;
        m.uncertainty = isfinite(unc) && unc >= 0 ? unc : NAN;
        m.reason = note ? note : "";
    }
    char *text = details ? json_dumps(details, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
    m.details_json = text;
    f->rc = f->fn(f->ctx, &m, f->err);
    free(text);
    json_decref(details);
}

static void row(flat *f, const char *metric, int slice, double value, double unc, const char *unit,
                db_verdict verdict, const char *why, double nominal, double lo, double hi,
                json_t *details)
{
    row_note(f, metric, slice, value, unc, unit, verdict, why, "", nominal, lo, hi, details);
}

static void info(flat *f, const char *metric, int slice, double value, double unc, const char *unit,
                 const char *why)
{
    row(f, metric, slice, value, unc, unit, DB_INFO, why, NAN, NAN, NAN, NULL);
}

static json_t *strip_details(const an_strip *s)
{
    json_t *o = json_object();
    json_object_set_new(o, "centre_u_mm", jnum(s->centre_u_mm));
    json_object_set_new(o, "fwtm_mm", jnum(s->fwtm_mm));
    json_object_set_new(o, "plateau", jnum(s->plateau));
    json_object_set_new(o, "plateau_sd", jnum(s->plateau_sd));
    json_object_set_new(o, "half_level", jnum(s->half_level));
    json_object_set_new(o, "floor", jnum(s->floor));
    json_object_set_new(o, "cross_lo_mm", jnum(s->cross_lo_mm));
    json_object_set_new(o, "cross_hi_mm", jnum(s->cross_hi_mm));
    json_object_set_new(o, "half_width_mm", jnum(s->half_width_mm));
    return o;
}

/* The warn band of the thickness: relative sets scale with the nominal thickness. */
static void thickness_warn_limits(const an_tolerance *tol, double nominal, double *lo, double *hi)
{
    double w = tol->thickness_relative ? tol->thickness_warn * nominal : tol->thickness_warn;
    *lo = nominal - w;
    *hi = nominal + w;
}

static void flatten_thickness(flat *f, const an_thickness *t, const wd_method *method,
                              const char *metric)
{
    const an_tolerance *tol = &method->tol;
    const char *why = t->reason[0] ? t->reason : "slice thickness not measured";
    int two = method->model.method == AN_METHOD_CROSSED_RAMPS && method->model.n_ramps >= 2;
    double wlo = NAN, whi = NAN;
    if (isfinite(t->nominal_mm))
        thickness_warn_limits(tol, t->nominal_mm, &wlo, &whi);
    json_t *d = json_object();
    json_object_set_new(d, "method",
                        json_string(two ? "tilt-corrected crossed ramps"
                                    : method->model.method == AN_METHOD_SINGLE_RAMP
                                        ? "single ramp (NEMA MS 5)"
                                        : "single wedge (NEMA MS 5)"));
    json_object_set_new(d, "acr_mm", jnum(t->acr_mm));
    json_object_set_new(d, "tilt_deg", jnum(t->tilt_deg));
    json_object_set_new(d, "warn_low_mm", jnum(wlo));
    json_object_set_new(d, "warn_high_mm", jnum(whi));
    json_object_set_new(d, "tolerance_set", json_string(tol->name));
    row_note(f, metric, t->slice, t->measured ? t->corrected_mm : NAN, t->uncertainty_mm,
             "mm", t->measured ? wd_db_verdict(t->verdict) : DB_UNMEASURABLE, why, t->reason,
             t->nominal_mm, t->limit_lo_mm, t->limit_hi_mm, d);
    const char *top_why = t->top.reason[0] ? t->top.reason : why;
    row(f, "ramp_length_top", t->slice, t->top.measured ? t->top.length_mm : NAN,
        t->top.length_unc_mm, "mm", DB_INFO, top_why, NAN, NAN, NAN,
        t->top.measured ? strip_details(&t->top) : NULL);
    info(f, "ramp_thickness_top", t->slice, t->top.measured ? t->top_thickness_mm : NAN, NAN, "mm",
         top_why);
    if (two) {
        const char *bot_why = t->bottom.reason[0] ? t->bottom.reason : why;
        row(f, "ramp_length_bottom", t->slice, t->bottom.measured ? t->bottom.length_mm : NAN,
            t->bottom.length_unc_mm, "mm", DB_INFO, bot_why, NAN, NAN, NAN,
            t->bottom.measured ? strip_details(&t->bottom) : NULL);
        info(f, "ramp_thickness_bottom", t->slice,
             t->bottom.measured ? t->bottom_thickness_mm : NAN, NAN, "mm", bot_why);
        info(f, "slice_thickness_acr", t->slice, t->measured ? t->acr_mm : NAN, NAN, "mm", why);
        info(f, "tilt_angle", t->slice, t->measured ? t->tilt_deg : NAN, t->tilt_unc_deg, "deg",
             why);
    }
    info(f, "slice_profile_fwtm", t->slice, t->measured ? t->fwtm_mm : NAN, NAN, "mm", why);
}

static void flatten_position(flat *f, const an_position *p, int k, const an_series_result *r,
                             const wd_method *method)
{
    const an_tolerance *tol = &method->tol;
    int slice = p->slice > 0 ? p->slice : method->model.wedge_slice[k];
    char why_buf[AN_REASON_MAX + 48];
    const char *why = p->reason[0] ? p->reason : NULL;
    if (!why) {
        snprintf(why_buf, sizeof why_buf, "%s",
                 p->slice > 0   ? "bar ends not found"
                 : r->reason[0] ? r->reason
                                : "wedge slice not identified");
        why = why_buf;
    }
    double lim = isfinite(p->limit_mm) ? p->limit_mm : tol->bar_difference_fail;
    json_t *d = json_object();
    json_object_set_new(d, "warn_mm", jnum(tol->bar_difference_warn));
    json_object_set_new(d, "z_mm", jnum(p->z_mm));
    json_object_set_new(d, "tolerance_set", json_string(tol->name));
    row_note(f, "bar_length_difference", slice, p->measured ? p->bar_difference_mm : NAN,
             p->uncertainty_mm, "mm", p->measured ? wd_db_verdict(p->verdict) : DB_UNMEASURABLE,
             why, p->reason, 0, -lim, lim, d);
    /* d = -(bar difference) / 2, so its uncertainty is half the difference's. */
    info(f, "slice_displacement", slice, p->measured ? p->displacement_mm : NAN,
         p->uncertainty_mm / 2, "mm", why);
    info(f, "bar_length_left", slice, p->measured && p->left.measured ? p->left.length_mm : NAN,
         p->left.unc_mm, "mm", why);
    info(f, "bar_length_right", slice, p->measured && p->right.measured ? p->right.length_mm : NAN,
         p->right.unc_mm, "mm", why);
    if (slice == method->model.ramp_slice)
        info(f, "ramp_displacement", slice, p->ramp_displacement_mm, p->ramp_displacement_unc_mm,
             "mm", r->thickness.reason[0] ? r->thickness.reason : "ramp centres not found");
}

sw_status wd_flatten(const wd_measured *m, const wd_method *method, wd_row_fn fn, void *ctx,
                     sw_error *err)
{
    flat f = {.fn = fn, .ctx = ctx, .err = err, .rc = SW_OK};
    for (int i = 0; i < m->n_echoes && f.rc == SW_OK; i++) {
        const an_series_result *r = m->echo[i].res;
        f.echo = m->echo[i].echo_number > 0 ? m->echo[i].echo_number : 1;
        if (!r)
            continue;
        flatten_thickness(&f, &r->thickness, method, wd_thickness_metric(m));
        if (method->model.has_wedges)
            for (int k = 0; k < 2; k++)
                flatten_position(&f, &r->position[k], k, r, method);
        const an_position_model *pm = &r->position_model;
        const char *pm_why = "needs both wedge slices measured";
        info(&f, "position_offset", 0, pm->measured ? pm->offset_mm : NAN, pm->offset_unc_mm, "mm",
             pm_why);
        info(&f, "position_scale", 0, pm->measured ? pm->scale_percent : NAN, pm->scale_unc_percent,
             "%", pm_why);
        info(&f, "phantom_pitch", 0, r->pitch_measured ? r->pitch_deg : NAN, r->pitch_unc_deg,
             "deg", "needs the ramp and the wedge displacement on the ramp slice");
        const char *why = r->reason[0] ? r->reason : "not measured";
        info(&f, "snr", 0, r->snr, NAN, "", why);
        info(&f, "noise_sd", 0, r->noise_sd, NAN, "", why);
        info(&f, "rotation", 0, r->rotation_deg, NAN, "deg", why);
    }
    return f.rc;
}

/* ---- the run ---- */

typedef struct pending_alert {
    db_alert_kind kind;
    char metric[48];
    int slice, echo;
    double value, limit;
    db_verdict verdict;
    char message[480];
} pending_alert;

#define MAX_ALERTS 32

typedef struct sink {
    db *d;
    int64_t run_id;
    const wd_method *method;
    int n_rows;
    int n_alerts;
    pending_alert alert[MAX_ALERTS];
} sink;

static int is_thickness(const char *metric)
{
    return !strcmp(metric, "slice_thickness") || !strcmp(metric, "partition_thickness");
}

static double crossed_limit(const db_measurement *m, int warn, const an_tolerance *tol)
{
    if (!warn)
        return m->value > m->nominal ? m->limit_hi : m->limit_lo;
    if (is_thickness(m->metric)) {
        double lo, hi;
        thickness_warn_limits(tol, m->nominal, &lo, &hi);
        return m->value > m->nominal ? hi : lo;
    }
    return m->value > 0 ? tol->bar_difference_warn : -tol->bar_difference_warn;
}

static sw_status sink_row(void *ctx, const db_measurement *m, sw_error *err)
{
    sink *s = ctx;
    sw_status rc = db_measurement_add(s->d, s->run_id, m, err);
    if (rc != SW_OK)
        return rc;
    s->n_rows++;
    int warn = m->verdict == DB_WARN, fail = m->verdict == DB_FAIL;
    /* A result that could not be measured is worth one notice per run, not one per row. */
    int unmeasurable =
        m->verdict == DB_UNMEASURABLE &&
        (is_thickness(m->metric) || !strcmp(m->metric, "bar_length_difference"));
    if (unmeasurable)
        for (int i = 0; i < s->n_alerts; i++)
            if (s->alert[i].verdict == DB_UNMEASURABLE)
                unmeasurable = 0;
    if ((!warn && !fail && !unmeasurable) || s->n_alerts == MAX_ALERTS)
        return SW_OK;
    pending_alert *a = &s->alert[s->n_alerts++];
    memset(a, 0, sizeof *a);
    a->kind = fail ? DB_ALERT_BREACH : DB_ALERT_WARN;
    sw_strlcpy(a->metric, m->metric, sizeof a->metric);
    a->slice = m->slice;
    a->echo = m->echo;
    a->value = m->value;
    a->verdict = m->verdict;
    a->limit = unmeasurable ? NAN : crossed_limit(m, warn, &s->method->tol);
    if (unmeasurable)
        snprintf(a->message, sizeof a->message, "%s on slice %d, echo %d: unmeasurable: %s",
                 m->metric, m->slice, m->echo, m->reason);
    else
        snprintf(a->message, sizeof a->message, "%s on slice %d, echo %d: %.2f %s %s (limit %.2f)",
                 m->metric, m->slice, m->echo, m->value, m->unit, db_verdict_name(m->verdict),
                 a->limit);
    return SW_OK;
}

char *wd_series_dir_name(const char *date, int number, const char *uid, char *out, size_t n)
{
    char raw[DCM_UID_MAX + 48];
    snprintf(raw, sizeof raw, "%s_%d_%s", date && *date ? date : "nodate", number,
             uid && *uid ? uid : "nouid");
    return wd_safe_component(raw, "series", out, n);
}

static void write_pngs(const wd_series_ctx *ctx, const wd_measured *m, int64_t run_id,
                       wd_store_result *out)
{
    char scanner[96], series[160], dir[PATH_MAX];
    const dcm_image *d = m->first;
    /* The same folder names as the archive's (watch.c): StationName, else serial-SERIAL, and
     * the series date, else the acquisition date. */
    if (ctx->station && *ctx->station) {
        wd_safe_component(ctx->station, "unknown-scanner", scanner, sizeof scanner);
    } else {
        char raw[DCM_STR_MAX + 8];
        snprintf(raw, sizeof raw, "serial-%s", d->device_serial);
        wd_safe_component(d->device_serial[0] ? raw : NULL, "unknown-scanner", scanner,
                          sizeof scanner);
    }
    wd_series_dir_name(d->series_date[0] ? d->series_date : d->acquisition_date, d->series_number,
                       d->series_instance_uid, series, sizeof series);
    if (snprintf(dir, sizeof dir, "%s/%s/%s", ctx->images_dir, scanner, series) >= (int)sizeof dir)
        return;
    sw_error err;
    sw_error_clear(&err);
    if (wd_mkdirs(dir, &err) != SW_OK) {
        wd_warn("images: %s", err.msg);
        return;
    }
    char number[16], date[32];
    snprintf(number, sizeof number, "%d", d->series_number);
    /* "2026-09-07 08:10:00" for people; the raw DICOM text when it is malformed */
    if (db_dicom_datetime(d->series_date, d->series_time, date, sizeof date) == 0) {
        char *t = strchr(date, 'T');
        if (t)
            *t = ' ';
    } else {
        snprintf(date, sizeof date, "%s %s", d->series_date, d->series_time);
    }
    for (int i = 0; i < m->n_echoes; i++) {
        const wd_echo *e = &m->echo[i];
        int idx[8];
        int n = e->res ? rp_slices_to_annotate(e->res, idx, 8) : 0;
        for (int k = 0; k < n && out->n_pngs < WD_MAX_PNGS; k++) {
            if (idx[k] < 0 || idx[k] >= e->n)
                continue;
            wd_png *p = &out->png[out->n_pngs];
            p->echo = e->echo_number;
            p->slice = e->res->ordinal[idx[k]];
            p->image = idx[k];
            if (snprintf(p->path, sizeof p->path, "%s/run%lld_e%d_s%02d.png", dir,
                         (long long)run_id, p->echo, p->slice) >= (int)sizeof p->path)
                continue;
            rp_labels labels = {.scanner = ctx->scanner_label,
                                .series = number,
                                .description = d->series_description,
                                .date = date,
                                .echo = e->echo_number};
            sw_error_clear(&err);
            if (rp_annotate_slice_png(p->path, &e->view[idx[k]], idx[k], e->res, &labels, NULL,
                                      &err) != SW_OK) {
                wd_warn("images: %s", err.msg);
                continue;
            }
            out->n_pngs++;
        }
    }
}

static const char *png_for(const wd_store_result *out, int echo, int slice)
{
    for (int i = 0; i < out->n_pngs; i++)
        if (out->png[i].echo == echo && out->png[i].slice == slice)
            return out->png[i].path;
    for (int i = 0; i < out->n_pngs; i++)
        if (out->png[i].echo == echo)
            return out->png[i].path;
    return NULL;
}

static void summarize(const wd_measured *m, char *buf, size_t n)
{
    size_t len = 0;
    buf[0] = '\0';
#define PUT(...)                                                                                   \
    do {                                                                                           \
        if (len < n)                                                                               \
            len += (size_t)snprintf(buf + len, n - len, __VA_ARGS__);                              \
    } while (0)
    for (int i = 0; i < m->n_echoes; i++) {
        const an_series_result *r = m->echo[i].res;
        if (!r)
            continue;
        PUT("%secho %d: ", i ? "; " : "", m->echo[i].echo_number);
        const an_thickness *t = &r->thickness;
        const char *tk = m->partition ? "partition thickness" : "thickness";
        if (t->measured)
            PUT("%s %.2f\u00b1%.2f mm %s", tk, t->corrected_mm, t->uncertainty_mm,
                an_verdict_name(t->verdict));
        else
            PUT("%s unmeasurable (%s)", tk, t->reason[0] ? t->reason : "no reason");
        for (int k = 0; k < 2; k++) {
            const an_position *p = &r->position[k];
            if (p->measured)
                PUT(", bar difference slice %d %+.2f mm %s", p->slice, p->bar_difference_mm,
                    an_verdict_name(p->verdict));
            else if (p->slice > 0 || p->reason[0])
                PUT(", position slice %d unmeasurable", p->slice);
        }
        if (r->position_model.measured)
            PUT(", offset %+.2f mm scale %+.2f %%", r->position_model.offset_mm,
                r->position_model.scale_percent);
        PUT(", SNR %.0f", r->snr);
        if (m->echo[i].n_hints)
            PUT(", hint: %s", m->echo[i].hint[0].brief);
    }
#undef PUT
}

sw_status wd_store_run(db *d, const wd_series_ctx *ctx, const wd_method *method,
                       const wd_measured *m, const char *fail_reason, wd_store_result *out,
                       sw_error *err)
{
    sw_status rc = SW_OK;
    sink *s = NULL;
    memset(out, 0, sizeof *out);
    db_run_info ri = {.program_version = SW_VERSION,
                      .config_hash = ctx->config_hash,
                      .phantom_model = method->model.name[0] ? method->model.name : "unnamed",
                      .tolerance_set = method->tol.name[0] ? method->tol.name : "unnamed"};
    if ((rc = db_run_begin(d, ctx->series_id, &ri, &out->run_id, err)) != SW_OK)
        goto out;
    if (!m) {
        out->verdict = DB_UNMEASURABLE;
        snprintf(out->summary, sizeof out->summary, "not measured: %s",
                 fail_reason && *fail_reason ? fail_reason : "no reason");
        rc = db_run_finish(d, out->run_id, 0, DB_UNMEASURABLE,
                           fail_reason && *fail_reason ? fail_reason : "not measured", err);
        goto out;
    }
    if (ctx->images_dir && *ctx->images_dir)
        write_pngs(ctx, m, out->run_id, out);
    if (!(s = calloc(1, sizeof *s))) {
        rc = sw_error_set(err, SW_ENOMEM, "store: out of memory");
        goto out;
    }
    s->d = d;
    s->run_id = out->run_id;
    s->method = method;
    if ((rc = wd_flatten(m, method, sink_row, s, err)) != SW_OK)
        goto out;
    out->n_rows = s->n_rows;
    out->verdict = wd_db_verdict(wd_measured_verdict(m));
    if ((rc = db_run_finish(d, out->run_id, 1, out->verdict, NULL, err)) != SW_OK)
        goto out;
    /* The cause hints of each echo, beside the run; the first one also goes with the echo's
     * alerts, so that whoever reads the alert reads the hint. */
    for (int i = 0; i < m->n_echoes; i++) {
        const wd_echo *e = &m->echo[i];
        for (int h = 0; h < e->n_hints; h++) {
            db_hint_info hi = {.run_id = out->run_id,
                               .echo = e->echo_number > 0 ? e->echo_number : 1,
                               .code = wd_hint_name(e->hint[h].code),
                               .brief = e->hint[h].brief,
                               .text = e->hint[h].text};
            if ((rc = db_hint_add(d, &hi, err)) != SW_OK)
                goto out;
        }
        for (int k = 0; e->n_hints && k < s->n_alerts; k++) {
            pending_alert *a = &s->alert[k];
            if (a->echo != (e->echo_number > 0 ? e->echo_number : 1))
                continue;
            size_t len = strlen(a->message);
            snprintf(a->message + len, sizeof a->message - len, "; hint: %s", e->hint[0].brief);
        }
    }
    for (int i = 0; ctx->alerts && i < s->n_alerts; i++) {
        const pending_alert *a = &s->alert[i];
        db_alert_info ai = {.kind = a->kind,
                            .scanner_id = ctx->scanner_id,
                            .series_id = ctx->series_id,
                            .run_id = out->run_id,
                            .metric = a->metric,
                            .value = a->value,
                            .limit = a->limit,
                            .verdict = a->verdict,
                            .message = a->message,
                            .png_path = png_for(out, a->echo, a->slice)};
        int64_t id = 0;
        if ((rc = db_alert_add(d, &ai, &id, err)) != SW_OK)
            goto out;
        out->n_alerts++;
    }
    summarize(m, out->summary, sizeof out->summary);
out:
    free(s);
    return rc;
}
