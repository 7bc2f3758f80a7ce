/* svg.c: a trend chart as inline SVG: the tolerance band, the baseline, the EWMA with its limits,
 * the trend line, and one element per result (class "pt") carrying its date, value and verdict. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "html.h"
#include "rp_html_int.h"
#include "rp_int.h"

/* Geometry of the chart in SVG user units. */
#define W 760.0
#define H 290.0
#define PX0 66.0  /* plot area left */
#define PX1 744.0 /* right */
#define PY0 14.0  /* top */
#define PY1 238.0 /* bottom */

/* Colours: the report's palette (rp_int.h), as hex for SVG. */
#define C_PASS "#1F6DB0"
#define C_WARN "#E59A1A"
#define C_FAIL "#C24A0E"
#define C_INFO "#6B6B6B"
#define C_BAND "#E3EEF8"
#define C_LIMIT "#7A9CC0"
#define C_EWMA "#8E3F7E" /* reddish purple, darker than the bar overlay for contrast on white */
#define C_TREND "#3A3A3A"
#define C_BASE "#0B7A5D" /* bluish green */
#define C_GRID "#EBEBEB"
#define C_INK "#1B1B1B"
#define C_INK2 "#555555"

typedef struct frame {
    double t0, t1, y0, y1;
} frame;

static double fx(const frame *f, double t)
{
    return PX0 + (t - f->t0) / (f->t1 - f->t0) * (PX1 - PX0);
}
static double fy(const frame *f, double v)
{
    return PY1 - (v - f->y0) / (f->y1 - f->y0) * (PY1 - PY0);
}

static void widen(double *lo, double *hi, double v)
{
    if (!isfinite(v))
        return;
    if (!isfinite(*lo) || v < *lo)
        *lo = v;
    if (!isfinite(*hi) || v > *hi)
        *hi = v;
}

static int verdict_rank(const char *v)
{
    if (!v)
        return 3;
    if (!strcmp(v, "pass"))
        return 0;
    if (!strcmp(v, "warn"))
        return 1;
    if (!strcmp(v, "fail"))
        return 2;
    return 3;
}

static const char *verdict_colour(const char *v)
{
    static const char *const c[] = {C_PASS, C_WARN, C_FAIL, C_INFO};
    return c[verdict_rank(v)];
}

static void hline(rp_buf *b, const frame *f, double v, const char *cls, const char *colour,
                  const char *dash, const char *label)
{
    if (!isfinite(v))
        return;
    double y = fy(f, v);
    rp_buf_printf(
        b,
        "<line class=\"%s\" x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\" stroke=\"%s\" "
        "stroke-width=\"1.2\"%s%s%s/>",
        cls, PX0, y, PX1, y, colour, dash ? " stroke-dasharray=\"" : "", dash ? dash : "",
        dash ? "\"" : "");
    if (label) {
        rp_buf_printf(b,
                      "<text x=\"%.1f\" y=\"%.1f\" font-size=\"10.5\" fill=\"%s\" "
                      "text-anchor=\"end\">",
                      PX1 - 3, y - 3, colour);
        rp_buf_esc(b, label);
        rp_buf_put(b, "</text>");
    }
}

/* A polyline through the finite (t, v) pairs; gaps break it. */
static void polyline(rp_buf *b, const frame *f, const rp_chart *c, int which, const char *cls,
                     const char *colour, const char *dash, double width)
{
    int open = 0;
    for (int i = 0; i <= c->n; i++) {
        double v = NAN;
        if (i < c->n)
            v = which == 0 ? c->pt[i].z : which == 1 ? c->pt[i].lcl : c->pt[i].ucl;
        if (isfinite(v)) {
            if (!open) {
                rp_buf_printf(b,
                              "<polyline class=\"%s\" fill=\"none\" stroke=\"%s\" "
                              "stroke-width=\"%.1f\"%s%s%s points=\"",
                              cls, colour, width, dash ? " stroke-dasharray=\"" : "",
                              dash ? dash : "", dash ? "\"" : "");
                open = 1;
            }
            rp_buf_printf(b, "%.1f,%.1f ", fx(f, c->pt[i].t), fy(f, v));
        } else if (open) {
            rp_buf_put(b, "\"/>");
            open = 0;
        }
    }
}

/* Ticks on the time axis: months (1, 2, 3, 6, 12 or 24 apart) for long periods, days for short. */
static void time_axis(rp_buf *b, const frame *f)
{
    double span = f->t1 - f->t0;
    char label[16];
    if (span > 62) {
        static const int steps[] = {1, 2, 3, 6, 12, 24, 60, 120};
        int step = 120;
        for (size_t i = 0; i < sizeof steps / sizeof steps[0]; i++)
            if (span / (30.44 * steps[i]) <= 8) {
                step = steps[i];
                break;
            }
        time_t t0 = (time_t)floor(f->t0) * 86400;
        struct tm tm;
        gmtime_r(&t0, &tm);
        int y = tm.tm_year + 1900, m = tm.tm_mon; /* first month start after t0 */
        m = (m / step + 1) * step;
        for (int guard = 0; guard < 64; guard++, m += step) {
            struct tm s;
            memset(&s, 0, sizeof s);
            s.tm_year = y - 1900 + m / 12;
            s.tm_mon = m % 12;
            s.tm_mday = 1;
            double d = (double)timegm(&s) / 86400.0;
            if (d > f->t1)
                break;
            if (d < f->t0)
                continue;
            double x = fx(f, d);
            strftime(label, sizeof label, "%Y-%m", &s);
            rp_buf_printf(b,
                          "<line x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\" stroke=\"%s\"/>"
                          "<text class=\"xt\" x=\"%.1f\" y=\"%.1f\" font-size=\"10.5\" "
                          "fill=\"%s\" text-anchor=\"middle\">%s</text>",
                          x, PY0, x, PY1, C_GRID, x, PY1 + 15, C_INK2, label);
        }
        return;
    }
    double first, step;
    int n = rp_nice_ticks(f->t0, f->t1, 6, &first, &step);
    if (step < 1)
        step = 1, first = ceil(f->t0), n = (int)(f->t1 - first) + 1;
    for (int i = 0; i < n && i < 32; i++) {
        double d = first + i * step;
        double x = fx(f, d);
        time_t tt = (time_t)floor(d) * 86400;
        struct tm tm;
        gmtime_r(&tt, &tm);
        strftime(label, sizeof label, "%Y-%m-%d", &tm);
        rp_buf_printf(b,
                      "<line x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\" stroke=\"%s\"/>"
                      "<text class=\"xt\" x=\"%.1f\" y=\"%.1f\" font-size=\"10.5\" fill=\"%s\" "
                      "text-anchor=\"middle\">%s</text>",
                      x, PY0, x, PY1, C_GRID, x, PY1 + 15, C_INK2, label);
    }
}

static void value_axis(rp_buf *b, const frame *f, const char *unit)
{
    double first, step;
    int n = rp_nice_ticks(f->y0, f->y1, 6, &first, &step);
    int dec = 0;
    while (dec < 6 && fabs(step * pow(10, dec) - round(step * pow(10, dec))) > 1e-6)
        dec++;
    for (int i = 0; i < n && i < 32; i++) {
        double v = first + i * step, y = fy(f, v);
        rp_buf_printf(b,
                      "<line x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\" stroke=\"%s\"/>"
                      "<text class=\"yt\" x=\"%.1f\" y=\"%.1f\" font-size=\"10.5\" fill=\"%s\" "
                      "text-anchor=\"end\">%.*f</text>",
                      PX0, y, PX1, y, C_GRID, PX0 - 5, y + 3.5, C_INK2, dec, v);
    }
    rp_buf_printf(b,
                  "<text x=\"14\" y=\"%.1f\" font-size=\"11\" fill=\"%s\" text-anchor=\"middle\" "
                  "transform=\"rotate(-90 14 %.1f)\">",
                  (PY0 + PY1) / 2, C_INK2, (PY0 + PY1) / 2);
    rp_buf_esc(b, unit && *unit ? unit : "value");
    rp_buf_put(b, "</text>");
}

/* One result: its marker (shape and colour by verdict), with the facts as data attributes. */
static void point(rp_buf *b, const frame *f, const rp_tpoint *p, const char *unit)
{
    double x = fx(f, p->t), y = fy(f, p->value), r = 4.6;
    int rank = verdict_rank(p->verdict);
    const char *col = verdict_colour(p->verdict);
    if (isfinite(p->unc) && p->unc > 0)
        rp_buf_printf(b,
                      "<line class=\"err\" x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\" "
                      "stroke=\"%s\" stroke-width=\"1\"/>",
                      x, fy(f, p->value - p->unc), x, fy(f, p->value + p->unc), col);
    if (p->out)
        rp_buf_printf(b,
                      "<circle class=\"ooc\" cx=\"%.1f\" cy=\"%.1f\" r=\"8.5\" fill=\"none\" "
                      "stroke=\"%s\" stroke-width=\"1.6\"/>",
                      x, y, C_EWMA);
    static const char *const cls[] = {"pass", "warn", "fail", "info"};
    switch (rank) {
    case 0: rp_buf_printf(b, "<circle cx=\"%.1f\" cy=\"%.1f\" r=\"%.1f\"", x, y, r); break;
    case 1:
        rp_buf_printf(b, "<path d=\"M%.1f %.1fL%.1f %.1fL%.1f %.1fZ\"", x, y - r * 1.25,
                      x + r * 1.15, y + r * 0.85, x - r * 1.15, y + r * 0.85);
        break;
    case 2:
        rp_buf_printf(b, "<rect x=\"%.1f\" y=\"%.1f\" width=\"%.1f\" height=\"%.1f\"", x - r, y - r,
                      2 * r, 2 * r);
        break;
    default:
        rp_buf_printf(b, "<path d=\"M%.1f %.1fL%.1f %.1fL%.1f %.1fL%.1f %.1fZ\"", x, y - r * 1.3,
                      x + r * 1.3, y, x, y + r * 1.3, x - r * 1.3, y);
        break;
    }
    rp_buf_printf(b, " class=\"pt pt-%s\" fill=\"%s\" stroke=\"#FFFFFF\" stroke-width=\"1\"",
                  cls[rank], col);
    rp_buf_put(b, " data-date=\"");
    rp_buf_esc(b, p->date);
    rp_buf_put(b, "\" data-value=\"");
    rp_buf_num(b, p->value, 17);
    rp_buf_put(b, "\" data-unc=\"");
    rp_buf_num(b, p->unc, 17);
    rp_buf_put(b, "\" data-verdict=\"");
    rp_buf_esc(b, p->verdict ? p->verdict : "info");
    rp_buf_printf(b, "\" data-baseline=\"%d\" data-out=\"%d\"", p->baseline ? 1 : 0,
                  p->out ? 1 : 0);
    if (p->series_uid) {
        rp_buf_put(b, " data-series=\"");
        rp_buf_esc(b, p->series_uid);
        rp_buf_put(b, "\"");
    }
    /* The tooltip says the verdict in words: colour and shape are never the only carriers. */
    rp_buf_put(b, "><title>");
    rp_buf_esc(b, p->date);
    rp_buf_printf(b, ": %.3f", p->value);
    if (isfinite(p->unc))
        rp_buf_printf(b, " \u00b1 %.3f", p->unc);
    rp_buf_put(b, " ");
    rp_buf_esc(b, unit);
    rp_buf_printf(b, ", %s%s%s</title>", rank == 3 ? "INFO" : rp_verdict_word((an_verdict)rank),
                  p->baseline ? ", baseline" : "", p->out ? ", out of control" : "");
    rp_buf_put(b, rank == 0 ? "</circle>" : rank == 2 ? "</rect>" : "</path>");
}

static int id_ok(const char *id)
{
    if (!id || !*id)
        return 0;
    for (const char *p = id; *p; p++)
        if (!((*p >= 'a' && *p <= 'z') || (*p >= 'A' && *p <= 'Z') || (*p >= '0' && *p <= '9') ||
              *p == '-' || *p == '_'))
            return 0;
    return 1;
}

sw_status rp_svg_chart(const rp_chart *c, char **out, sw_error *err)
{
    rp_buf b = {0};
    if (out)
        *out = NULL;
    if (!c || !out || (c->n > 0 && !c->pt) || c->n < 0)
        return sw_error_set(err, SW_EINVAL, "report: svg chart: bad arguments");
    if (!id_ok(c->id))
        return sw_error_set(err, SW_EINVAL,
                            "report: chart id '%s' has characters other than "
                            "letters, digits, '-' and '_'",
                            c->id ? c->id : "");
    frame f = {NAN, NAN, NAN, NAN};
    f.t0 = c->t_min;
    f.t1 = c->t_max;
    for (int i = 0; i < c->n; i++) {
        const rp_tpoint *p = &c->pt[i];
        if (!isfinite(c->t_min) || !isfinite(c->t_max))
            widen(&f.t0, &f.t1, p->t);
        widen(&f.y0, &f.y1, p->value);
        if (isfinite(p->unc)) {
            widen(&f.y0, &f.y1, p->value - p->unc);
            widen(&f.y0, &f.y1, p->value + p->unc);
        }
        widen(&f.y0, &f.y1, p->lcl);
        widen(&f.y0, &f.y1, p->ucl);
        widen(&f.y0, &f.y1, p->z);
    }
    widen(&f.y0, &f.y1, c->tol_lo);
    widen(&f.y0, &f.y1, c->tol_hi);
    widen(&f.y0, &f.y1, c->base_mean);
    if (!isfinite(f.t0) || !isfinite(f.t1)) {
        f.t0 = 0;
        f.t1 = 1;
    }
    if (!(f.t1 - f.t0 >= 1)) {
        double mid = 0.5 * (f.t0 + f.t1);
        f.t0 = mid - 7;
        f.t1 = mid + 7;
    }
    double pad_t = (f.t1 - f.t0) * 0.03;
    f.t0 -= pad_t;
    f.t1 += pad_t;
    if (!isfinite(f.y0)) {
        f.y0 = 0;
        f.y1 = 1;
    }
    double pad = (f.y1 - f.y0) * 0.06;
    if (!(pad > 0))
        pad = fabs(f.y0) > 0 ? fabs(f.y0) * 0.05 : 0.5;
    f.y0 -= pad;
    f.y1 += pad;
    rp_nice_range(&f.y0, &f.y1, 6);

    rp_buf_printf(&b,
                  "<svg class=\"trend\" xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 %.0f "
                  "%.0f\" width=\"%.0f\" height=\"%.0f\" role=\"img\" font-family=\"DejaVu Sans, "
                  "Verdana, sans-serif\" data-chart=\"%s\" data-expected=\"%d\" data-metric=\"",
                  W, H, W, H, c->id, c->n);
    rp_buf_esc(&b, c->metric);
    rp_buf_put(&b, "\" data-series-type=\"");
    rp_buf_esc(&b, c->series_type ? c->series_type : "");
    rp_buf_printf(&b, "\" data-echo=\"%d\" data-slice=\"%d", c->echo, c->slice);
    rp_buf_put(&b, "\" data-status=\"");
    rp_buf_esc(&b, c->status ? c->status : "");
    rp_buf_put(&b, "\" aria-label=\"");
    rp_buf_esc(&b, c->title);
    rp_buf_put(&b, "\"><title>");
    rp_buf_esc(&b, c->title);
    rp_buf_put(&b, "</title>");
    rp_buf_printf(&b, "<rect x=\"0\" y=\"0\" width=\"%.0f\" height=\"%.0f\" fill=\"#FFFFFF\"/>", W,
                  H);
    /* Tolerance band first, everything else over it. */
    if (isfinite(c->tol_lo) || isfinite(c->tol_hi)) {
        double top = isfinite(c->tol_hi) ? fy(&f, c->tol_hi) : PY0;
        double bot = isfinite(c->tol_lo) ? fy(&f, c->tol_lo) : PY1;
        rp_buf_printf(&b,
                      "<rect class=\"band\" x=\"%.1f\" y=\"%.1f\" width=\"%.1f\" height=\"%.1f\" "
                      "fill=\"%s\"/>",
                      PX0, top, PX1 - PX0, bot - top, C_BAND);
    }
    /* The baseline's time span, lightly shaded. */
    double bt0 = NAN, bt1 = NAN;
    for (int i = 0; i < c->n; i++)
        if (c->pt[i].baseline)
            widen(&bt0, &bt1, c->pt[i].t);
    if (isfinite(bt0)) {
        double x0 = fx(&f, bt0) - 6, x1 = fx(&f, bt1) + 6;
        rp_buf_printf(&b,
                      "<rect class=\"bl-span\" x=\"%.1f\" y=\"%.1f\" width=\"%.1f\" height=\"7\" "
                      "fill=\"%s\" opacity=\"0.35\"/><text x=\"%.1f\" y=\"%.1f\" font-size=\"9.5\" "
                      "fill=\"%s\">baseline</text>",
                      x0, PY0, x1 - x0, C_BASE, x0 + 2, PY0 + 17, C_BASE);
    }
    time_axis(&b, &f);
    value_axis(&b, &f, c->unit);
    rp_buf_printf(&b,
                  "<rect x=\"%.1f\" y=\"%.1f\" width=\"%.1f\" height=\"%.1f\" fill=\"none\" "
                  "stroke=\"#C8C8C8\"/>",
                  PX0, PY0, PX1 - PX0, PY1 - PY0);
    hline(&b, &f, c->tol_hi, "tol", C_LIMIT, "6 3", "upper limit");
    hline(&b, &f, c->tol_lo, "tol", C_LIMIT, "6 3", "lower limit");
    hline(&b, &f, c->nominal, "nominal", C_INK2, "1 3", NULL);
    hline(&b, &f, c->base_mean, "base", C_BASE, "8 3 2 3", "baseline mean");
    polyline(&b, &f, c, 1, "ewma-lcl", C_EWMA, "3 2", 1.1);
    polyline(&b, &f, c, 2, "ewma-ucl", C_EWMA, "3 2", 1.1);
    polyline(&b, &f, c, 0, "ewma", C_EWMA, NULL, 1.8);
    if (c->have_trend && isfinite(c->trend_slope) && isfinite(c->trend_intercept)) {
        double a = fmax(c->trend_t0, f.t0), z = fmin(c->trend_t1, f.t1);
        if (z > a)
            rp_buf_printf(&b,
                          "<line class=\"trend-line\" x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" "
                          "y2=\"%.1f\" stroke=\"%s\" stroke-width=\"1.3\" "
                          "stroke-dasharray=\"2 2\"/>",
                          fx(&f, a), fy(&f, c->trend_intercept + c->trend_slope * a), fx(&f, z),
                          fy(&f, c->trend_intercept + c->trend_slope * z), C_TREND);
    }
    rp_buf_put(&b, "<g class=\"points\">");
    for (int i = 0; i < c->n; i++)
        point(&b, &f, &c->pt[i], c->unit ? c->unit : "");
    rp_buf_put(&b, "</g>");
    if (c->n == 0)
        rp_buf_printf(&b,
                      "<text x=\"%.1f\" y=\"%.1f\" font-size=\"13\" fill=\"%s\" "
                      "text-anchor=\"middle\">no measured results in this period</text>",
                      (PX0 + PX1) / 2, (PY0 + PY1) / 2, C_INK2);
    rp_buf_printf(&b,
                  "<text x=\"%.1f\" y=\"%.1f\" font-size=\"10.5\" fill=\"%s\" "
                  "text-anchor=\"middle\">acquisition date</text>",
                  (PX0 + PX1) / 2, H - 10, C_INK2);
    rp_buf_put(&b, "</svg>");
    if (b.failed) {
        rp_buf_free(&b);
        return sw_error_set(err, SW_ENOMEM, "report: out of memory for chart %s", c->id);
    }
    *out = b.s;
    return SW_OK;
}
