/* pipeline.c: series images -> per-echo analysis -> JSON and text. */
#include "pipeline.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "files.h"
#include "report.h"

void wd_method_default(wd_method *m)
{
    an_model_large(&m->model);
    an_tolerance_default(&m->tol);
    an_params_default(&m->params);
    wd_hint_settings_default(&m->hints);
}

const char *wd_thickness_label(const wd_measured *m)
{
    return m && m->partition ? "partition thickness" : "slice thickness";
}

const char *wd_thickness_metric(const wd_measured *m)
{
    return m && m->partition ? "partition_thickness" : "slice_thickness";
}

void wd_image_view(const dcm_image *d, an_image *v)
{
    memset(v, 0, sizeof *v);
    v->px = d->pixels;
    v->width = d->columns;
    v->height = d->rows;
    v->stride = d->columns;
    v->col_mm = d->pixel_spacing[1];
    v->row_mm = d->pixel_spacing[0];
    memcpy(v->ipp, d->ipp, sizeof v->ipp);
    memcpy(v->iop, d->iop, sizeof v->iop);
    v->has_geometry = d->has_geometry;
    v->nominal_thickness_mm = d->slice_thickness_mm;
    v->feet_first = !strncmp(d->patient_position, "FF", 2);
}

static int same_instance(const dcm_image *a, const dcm_image *b)
{
    return a->frame == b->frame && !strcmp(a->sop_instance_uid, b->sop_instance_uid);
}

static wd_echo *echo_slot(wd_measured *m, int echo_number)
{
    for (int i = 0; i < m->n_echoes; i++)
        if (m->echo[i].echo_number == echo_number)
            return &m->echo[i];
    if (m->n_echoes == WD_MAX_ECHOES)
        return NULL;
    wd_echo *e = &m->echo[m->n_echoes++];
    memset(e, 0, sizeof *e);
    e->echo_number = echo_number;
    e->echo_time_ms = NAN;
    return e;
}

static int cmp_echo(const void *a, const void *b)
{
    const wd_echo *x = a, *y = b;
    return (x->echo_number > y->echo_number) - (x->echo_number < y->echo_number);
}

sw_status wd_measure(const dcm_image *const *imgs, int n, const wd_method *method, wd_measured *out,
                     sw_error *err)
{
    memset(out, 0, sizeof *out);
    if (n < 1 || !imgs)
        return sw_error_set(err, SW_EINVAL, "series: no images");
    out->first = imgs[0];
    out->partition = !strcasecmp(imgs[0]->mr_acquisition_type, "3D");
    const char *uid = imgs[0]->series_instance_uid;
    for (int i = 0; i < n; i++) {
        const dcm_image *d = imgs[i];
        if (!d->pixels)
            return sw_error_set(err, SW_EINVAL, "series %s: image without pixels", uid);
        int dup = 0;
        for (int k = 0; k < i && !dup; k++)
            dup = same_instance(imgs[k], d);
        if (dup) {
            out->n_duplicates++;
            continue;
        }
        wd_echo *e = echo_slot(out, d->echo_number > 0 ? d->echo_number : 1);
        if (!e)
            return sw_error_set(err, SW_EUNSUPPORTED, "series %s: more than %d echoes", uid,
                                WD_MAX_ECHOES);
        if (e->n == AN_MAX_IMAGES)
            return sw_error_set(err, SW_EUNSUPPORTED, "series %s: more than %d images in echo %d",
                                uid, AN_MAX_IMAGES, e->echo_number);
        if (isnan(e->echo_time_ms))
            e->echo_time_ms = d->echo_time_ms;
        e->img[e->n] = d;
        wd_image_view(d, &e->view[e->n]);
        e->n++;
    }
    qsort(out->echo, (size_t)out->n_echoes, sizeof out->echo[0], cmp_echo);
    for (int i = 0; i < out->n_echoes; i++) {
        wd_echo *e = &out->echo[i];
        e->res = calloc(1, sizeof *e->res);
        if (!e->res)
            return sw_error_set(err, SW_ENOMEM, "series %s: out of memory", uid);
        sw_status st = an_analyze_series(e->view, e->n, &method->model, &method->tol,
                                         &method->params, e->res, err);
        if (st != SW_OK)
            return st;
        wd_hint_input hi;
        wd_hint_input_from_result(e->res, out->partition, &hi);
        e->n_hints = wd_hints(&hi, &method->hints, e->hint, WD_MAX_HINTS);
    }
    return SW_OK;
}

void wd_measured_free(wd_measured *m)
{
    if (!m)
        return;
    for (int i = 0; i < m->n_echoes; i++) {
        free(m->echo[i].res);
        m->echo[i].res = NULL;
    }
    m->n_echoes = 0;
}

an_verdict wd_measured_verdict(const wd_measured *m)
{
    an_verdict worst = AN_PASS;
    for (int i = 0; i < m->n_echoes; i++)
        if (m->echo[i].res && m->echo[i].res->verdict > worst)
            worst = m->echo[i].res->verdict;
    return m->n_echoes ? worst : AN_UNMEASURABLE;
}

/* ---- JSON ---- */

static json_t *num(double v)
{
    return isfinite(v) ? json_real(v) : json_null();
}

static json_t *reason_or_null(const char *r)
{
    return r && r[0] ? json_string(r) : json_null();
}

/* jansson reports a failed allocation only by a return value (or a NULL value): a document with a
 * key missing would be printed as if whole. Every set and append of the JSON output goes through
 * these, and wd_measured_json fails when one failed. */
static _Thread_local int json_failed;

static void set_new(json_t *o, const char *key, json_t *v)
{
    if (!v || json_object_set_new(o, key, v) != 0)
        json_failed = 1;
}

static void append_new(json_t *a, json_t *v)
{
    if (!v || json_array_append_new(a, v) != 0)
        json_failed = 1;
}

static json_t *thickness_json(const an_thickness *t)
{
    json_t *o = json_object();
    set_new(o, "slice", t->slice > 0 ? json_integer(t->slice) : json_null());
    set_new(o, "top_mm", num(t->top.length_mm));
    set_new(o, "bottom_mm", num(t->bottom.length_mm));
    set_new(o, "top_uncertainty_mm", num(t->top.length_unc_mm));
    set_new(o, "bottom_uncertainty_mm", num(t->bottom.length_unc_mm));
    set_new(o, "top_thickness_mm", num(t->top_thickness_mm));
    set_new(o, "bottom_thickness_mm", num(t->bottom_thickness_mm));
    set_new(o, "acr_mm", num(t->acr_mm));
    set_new(o, "corrected_mm", num(t->corrected_mm));
    set_new(o, "tilt_deg", num(t->tilt_deg));
    set_new(o, "tilt_uncertainty_deg", num(t->tilt_unc_deg));
    set_new(o, "fwtm_mm", num(t->fwtm_mm));
    set_new(o, "uncertainty_mm", num(t->uncertainty_mm));
    set_new(o, "nominal_mm", num(t->nominal_mm));
    set_new(o, "limit_low_mm", num(t->limit_lo_mm));
    set_new(o, "limit_high_mm", num(t->limit_hi_mm));
    set_new(o, "verdict", json_string(an_verdict_name(t->verdict)));
    set_new(o, "reason", reason_or_null(t->reason));
    return o;
}

static json_t *position_json(const an_position *p)
{
    json_t *o = json_object();
    set_new(o, "slice", p->slice > 0 ? json_integer(p->slice) : json_null());
    set_new(o, "bar_difference_mm", num(p->bar_difference_mm));
    set_new(o, "left_bar_mm", num(p->left.length_mm));
    set_new(o, "right_bar_mm", num(p->right.length_mm));
    set_new(o, "displacement_mm", num(p->displacement_mm));
    set_new(o, "ramp_displacement_mm", num(p->ramp_displacement_mm));
    set_new(o, "ramp_displacement_uncertainty_mm", num(p->ramp_displacement_unc_mm));
    set_new(o, "uncertainty_mm", num(p->uncertainty_mm));
    set_new(o, "z_mm", num(p->z_mm));
    set_new(o, "limit_mm", num(p->limit_mm));
    set_new(o, "verdict", json_string(an_verdict_name(p->verdict)));
    set_new(o, "reason", reason_or_null(p->reason));
    return o;
}

sw_status wd_measured_json(const wd_measured *m, json_t *array)
{
    const dcm_image *d = m->first;
    json_failed = 0;
    for (int i = 0; i < m->n_echoes; i++) {
        const wd_echo *e = &m->echo[i];
        const an_series_result *r = e->res;
        json_t *o = json_object();
        if (!o)
            return SW_ENOMEM;
        set_new(o, "series_instance_uid", json_string(d->series_instance_uid));
        set_new(o, "station_name", json_string(d->station_name));
        set_new(o, "series_description", json_string(d->series_description));
        set_new(o, "protocol_name", json_string(d->protocol_name));
        set_new(o, "device_serial_number", json_string(d->device_serial));
        set_new(o, "acquisition_date", json_string(d->acquisition_date[0]
                                                                    ? d->acquisition_date
                                                                    : d->series_date));
        set_new(o, "echo_number", json_integer(e->echo_number));
        set_new(o, "echo_time_ms", num(e->echo_time_ms));
        set_new(o, "images", json_integer(e->n));
        set_new(o, "snr", num(r->snr));
        set_new(o, "noise_sd", num(r->noise_sd));
        set_new(o, "noise_correlation", num(r->noise_corr));
        set_new(o, "rotation_deg", num(r->rotation_deg));
        set_new(o, "slice_thickness", thickness_json(&r->thickness));
        set_new(o, "thickness_kind", json_string(m->partition ? "partition" : "slice"));
        json_t *pos = json_array();
        for (int k = 0; k < 2; k++)
            if (r->position[k].slice > 0 || r->position[k].measured)
                append_new(pos, position_json(&r->position[k]));
        set_new(o, "slice_position", pos);
        json_t *pm = json_object();
        const an_position_model *model = &r->position_model;
        set_new(pm, "offset_mm", num(model->measured ? model->offset_mm : NAN));
        set_new(pm, "scale_percent", num(model->measured ? model->scale_percent : NAN));
        set_new(pm, "offset_uncertainty_mm",
                            num(model->measured ? model->offset_unc_mm : NAN));
        set_new(pm, "scale_uncertainty_percent",
                            num(model->measured ? model->scale_unc_percent : NAN));
        set_new(o, "position_model", pm);
        set_new(o, "pitch_deg", num(r->pitch_measured ? r->pitch_deg : NAN));
        set_new(o, "pitch_uncertainty_deg",
                            num(r->pitch_measured ? r->pitch_unc_deg : NAN));
        set_new(o, "verdict", json_string(an_verdict_name(r->verdict)));
        set_new(o, "reason", reason_or_null(r->reason));
        json_t *hints = json_array();
        for (int h = 0; h < e->n_hints; h++) {
            json_t *ho = json_object();
            set_new(ho, "code", json_string(wd_hint_name(e->hint[h].code)));
            set_new(ho, "brief", json_string(e->hint[h].brief));
            set_new(ho, "text", json_string(e->hint[h].text));
            append_new(hints, ho);
        }
        set_new(o, "hints", hints);
        if (json_failed) {
            json_decref(o);
            return SW_ENOMEM;
        }
        if (json_array_append_new(array, o))
            return SW_ENOMEM;
    }
    return SW_OK;
}

/* ---- text ---- */

static void fmt_value(char *buf, size_t n, double v, double u, const char *unit)
{
    if (!isfinite(v))
        snprintf(buf, n, "-");
    else if (isfinite(u))
        snprintf(buf, n, "%+.2f \u00b1 %.2f %s", v, u, unit);
    else
        snprintf(buf, n, "%+.2f %s", v, unit);
}

static void verdict_note(FILE *f, an_verdict v, const char *reason)
{
    if (v == AN_UNMEASURABLE)
        fprintf(f, "unmeasurable: %s\n", reason && reason[0] ? reason : "no reason given");
    else
        fprintf(f, "%s\n", an_verdict_name(v));
}

void wd_measured_text(const wd_measured *m, FILE *f)
{
    const dcm_image *d = m->first;
    for (int i = 0; i < m->n_echoes; i++) {
        const wd_echo *e = &m->echo[i];
        const an_series_result *r = e->res;
        const an_thickness *t = &r->thickness;
        char a[64];
        fprintf(f, "Series %s\n", d->series_instance_uid);
        fprintf(f, "  scanner %s (%s %s, serial %s)  \"%s\"  date %s\n",
                d->station_name[0] ? d->station_name : "?", d->manufacturer, d->model,
                d->device_serial[0] ? d->device_serial : "?", d->series_description,
                d->acquisition_date[0] ? d->acquisition_date : d->series_date);
        fprintf(f, "  echo %d (TE %.1f ms), %d images, SNR %.0f, rotation %.2f deg\n",
                e->echo_number, e->echo_time_ms, e->n, r->snr, r->rotation_deg);
        if (t->measured) {
            fprintf(f, "  %s, slice %d:  %.2f \u00b1 %.2f mm  (limits %.2f to %.2f)  ",
                    wd_thickness_label(m), t->slice, t->corrected_mm, t->uncertainty_mm, t->limit_lo_mm,
                    t->limit_hi_mm);
            verdict_note(f, t->verdict, t->reason);
            if (!t->bottom.measured) /* a single-ramp or single-wedge model: one strip */
                fprintf(f, "    one strip %.2f mm long (single-ramp or wedge method, no tilt "
                           "correction); FWTM %.2f mm\n",
                        t->top.length_mm, t->fwtm_mm);
            else
                fprintf(f, "    ramps %.2f and %.2f mm long; per ramp %.2f and %.2f mm; ACR formula "
                           "%.2f mm; tilt %+.2f deg; FWTM %.2f mm\n",
                        t->top.length_mm, t->bottom.length_mm, t->top_thickness_mm,
                        t->bottom_thickness_mm, t->acr_mm, t->tilt_deg, t->fwtm_mm);
        } else {
            fprintf(f, "  %s:  ", wd_thickness_label(m));
            verdict_note(f, AN_UNMEASURABLE, t->reason);
        }
        for (int k = 0; k < 2; k++) {
            const an_position *p = &r->position[k];
            if (!p->measured && p->slice <= 0 && !p->reason[0])
                continue;
            if (p->measured) {
                fmt_value(a, sizeof a, p->bar_difference_mm, p->uncertainty_mm, "mm");
                fprintf(f, "  slice position, slice %d:  bar difference %s  (limit \u00b1%.1f)  ",
                        p->slice, a, p->limit_mm);
                verdict_note(f, p->verdict, p->reason);
                fprintf(f, "    displacement %+.2f mm", p->displacement_mm);
                if (isfinite(p->ramp_displacement_mm))
                    fprintf(f, "; from the ramps %+.2f \u00b1 %.2f mm", p->ramp_displacement_mm,
                            p->ramp_displacement_unc_mm);
                fputc('\n', f);
            } else {
                fprintf(f, "  slice position, slice %d:  ", p->slice);
                verdict_note(f, AN_UNMEASURABLE, p->reason);
            }
        }
        const an_position_model *pm = &r->position_model;
        if (pm->measured)
            fprintf(f, "  position model:  offset %+.2f \u00b1 %.2f mm, scale %+.2f \u00b1 %.2f %%\n",
                    pm->offset_mm, pm->offset_unc_mm, pm->scale_percent, pm->scale_unc_percent);
        if (r->pitch_measured)
            fprintf(f, "  phantom pitch (ramps vs wedges):  %+.2f \u00b1 %.2f deg\n", r->pitch_deg,
                    r->pitch_unc_deg);
        fprintf(f, "  verdict: ");
        verdict_note(f, r->verdict, r->reason);
        for (int h = 0; h < e->n_hints; h++)
            fprintf(f, "  hint (%s): %s\n", wd_hint_name(e->hint[h].code), e->hint[h].text);
        fputc('\n', f);
    }
}

/* ---- annotated images ---- */

sw_status wd_measured_pngs(const wd_measured *m, const char *dir, const char *scanner, char *first,
                           size_t nfirst, sw_error *err)
{
    const dcm_image *d = m->first;
    char uid[DCM_UID_MAX], path[4096], series[32], date[32];
    an_verdict worst = AN_PASS;
    wd_safe_component(d->series_instance_uid, "series", uid, sizeof uid);
    snprintf(series, sizeof series, "%d", d->series_number);
    const char *dt = d->acquisition_date[0] ? d->acquisition_date : d->series_date;
    snprintf(date, sizeof date, "%.4s-%.2s-%.2s", dt, strlen(dt) >= 6 ? dt + 4 : "",
             strlen(dt) >= 8 ? dt + 6 : "");
    if (first && nfirst)
        first[0] = '\0';
    for (int i = 0; i < m->n_echoes; i++) {
        const wd_echo *e = &m->echo[i];
        int idx[AN_MAX_IMAGES];
        int k = rp_slices_to_annotate(e->res, idx, AN_MAX_IMAGES);
        for (int j = 0; j < k; j++) {
            int slice = e->res->ordinal[idx[j]];
            snprintf(path, sizeof path, "%s/%s_e%d_s%02d.png", dir, uid, e->echo_number, slice);
            rp_labels labels = {.scanner = scanner && scanner[0] ? scanner : d->station_name,
                                .series = series,
                                .description = d->series_description,
                                .date = date,
                                .echo = e->echo_number};
            sw_status st = rp_annotate_slice_png(path, &e->view[idx[j]], idx[j], e->res, &labels,
                                                 NULL, err);
            if (st != SW_OK)
                return st;
            if (first && nfirst && (!first[0] || e->res->verdict > worst)) {
                sw_strlcpy(first, path, nfirst);
                worst = e->res->verdict;
            }
        }
    }
    return SW_OK;
}
