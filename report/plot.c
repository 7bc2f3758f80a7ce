/* plot.c: a plot frame for profiles and trend charts: nice ticks, axes, lines, markers, spans. */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "rp_int.h"

static const rp_font TICK_FONT = {11.0, 0};
static const rp_font AXIS_FONT = {12.0, 0};
static const rp_font LABEL_FONT = {11.5, 0};

int rp_nice_ticks(double lo, double hi, int target, double *first, double *step)
{
    if (!isfinite(lo) || !isfinite(hi) || !(hi > lo) || target < 1)
        return 0;
    double raw = (hi - lo) / target;
    double mag = pow(10.0, floor(log10(raw)));
    double norm = raw / mag;
    double nice = norm < 1.5 ? 1 : norm < 3 ? 2 : norm < 7 ? 5 : 10;
    double s = nice * mag;
    double f = ceil(lo / s - 1e-9) * s;
    int n = (int)floor((hi - f) / s + 1e-9) + 1;
    if (n < 0)
        n = 0;
    *first = f;
    *step = s;
    return n;
}

void rp_nice_range(double *lo, double *hi, int target)
{
    double first, step;
    if (!isfinite(*lo) || !isfinite(*hi))
        return;
    if (!(*hi > *lo)) {
        double d = fabs(*lo) > 0 ? fabs(*lo) * 0.1 : 1.0;
        *lo -= d;
        *hi += d;
    }
    if (rp_nice_ticks(*lo, *hi, target, &first, &step) > 0) {
        *lo = floor(*lo / step + 1e-9) * step;
        *hi = ceil(*hi / step - 1e-9) * step;
    }
}

void rp_plot_init(rp_plot *p, rp_canvas *cv, double x, double y, double w, double h, double x0,
                  double x1, double y0, double y1)
{
    p->cv = cv;
    p->x = x;
    p->y = y;
    p->w = w;
    p->h = h;
    p->x0 = x0;
    p->x1 = x1 > x0 ? x1 : x0 + 1;
    p->y0 = y0;
    p->y1 = y1 > y0 ? y1 : y0 + 1;
}

double rp_plot_px(const rp_plot *p, double xv)
{
    return p->x + (xv - p->x0) / (p->x1 - p->x0) * p->w;
}

double rp_plot_py(const rp_plot *p, double yv)
{
    return p->y + p->h - (yv - p->y0) / (p->y1 - p->y0) * p->h;
}

/* Decimals that show a tick step exactly (0.5 -> 1, 0.25 -> 2, 20 -> 0). */
static int decimals(double step)
{
    int d = 0;
    while (d < 6 && fabs(step * pow(10, d) - round(step * pow(10, d))) > 1e-6 * pow(10, d))
        d++;
    return d;
}

static void tick_label(char *buf, size_t n, double v, double step)
{
    if (fabs(v) < step * 1e-6)
        v = 0; /* no "-0" */
    snprintf(buf, n, "%.*f", decimals(step), v);
}

void rp_plot_axes(rp_plot *p, const char *xlabel, const char *ylabel)
{
    cairo_t *cr = p->cv->cr;
    rp_rgb grid = RP_C_GRID, rule = RP_C_RULE, ink2 = RP_C_INK2, white = RP_C_PAGE;
    double first, step;
    char buf[32];

    cairo_save(cr);
    cairo_rectangle(cr, p->x, p->y, p->w, p->h);
    cairo_set_source_rgb(cr, white.r, white.g, white.b);
    cairo_fill(cr);
    cairo_set_line_width(cr, 1.0);

    int n = rp_nice_ticks(p->x0, p->x1, (int)fmax(3, p->w / 75), &first, &step);
    for (int i = 0; i < n; i++) {
        double v = first + i * step;
        double X = round(rp_plot_px(p, v)) + 0.5;
        cairo_set_source_rgb(cr, grid.r, grid.g, grid.b);
        cairo_move_to(cr, X, p->y);
        cairo_line_to(cr, X, p->y + p->h);
        cairo_stroke(cr);
        cairo_set_source_rgb(cr, rule.r, rule.g, rule.b);
        cairo_move_to(cr, X, p->y + p->h);
        cairo_line_to(cr, X, p->y + p->h + 4);
        cairo_stroke(cr);
        tick_label(buf, sizeof buf, v, step);
        rp_text(p->cv, X, p->y + p->h + 16, TICK_FONT, ink2, RP_CENTRE, RP_ROLE_AXIS, buf);
    }
    n = rp_nice_ticks(p->y0, p->y1, (int)fmax(2, p->h / 40), &first, &step);
    for (int i = 0; i < n; i++) {
        double v = first + i * step;
        double Y = round(rp_plot_py(p, v)) + 0.5;
        cairo_set_source_rgb(cr, grid.r, grid.g, grid.b);
        cairo_move_to(cr, p->x, Y);
        cairo_line_to(cr, p->x + p->w, Y);
        cairo_stroke(cr);
        cairo_set_source_rgb(cr, rule.r, rule.g, rule.b);
        cairo_move_to(cr, p->x - 4, Y);
        cairo_line_to(cr, p->x, Y);
        cairo_stroke(cr);
        tick_label(buf, sizeof buf, v, step);
        rp_text(p->cv, p->x - 7, Y + 4, TICK_FONT, ink2, RP_RIGHT, RP_ROLE_AXIS, buf);
    }
    cairo_set_source_rgb(cr, rule.r, rule.g, rule.b);
    cairo_rectangle(cr, round(p->x) + 0.5, round(p->y) + 0.5, round(p->w) - 1, round(p->h) - 1);
    cairo_stroke(cr);
    cairo_restore(cr);

    if (xlabel)
        rp_text(p->cv, p->x + p->w / 2, p->y + p->h + 32, AXIS_FONT, ink2, RP_CENTRE, RP_ROLE_AXIS,
                xlabel);
    if (ylabel) {
        /* Rotated a quarter turn; logged with its upright box. */
        double w = rp_text_width(p->cv, AXIS_FONT, ylabel);
        cairo_save(cr);
        cairo_translate(cr, p->x - 44, p->y + p->h / 2 + w / 2);
        cairo_rotate(cr, -M_PI / 2);
        cairo_set_source_rgb(cr, ink2.r, ink2.g, ink2.b);
        cairo_move_to(cr, 0, 0);
        cairo_show_text(cr, ylabel);
        cairo_new_path(cr);
        cairo_restore(cr);
        if (p->cv->log && p->cv->log->n_text < RP_TEXT_MAX) {
            rp_text_item *t = &p->cv->log->text[p->cv->log->n_text++];
            sw_strlcpy(t->text, ylabel, sizeof t->text);
            t->role = RP_ROLE_AXIS;
            t->x = p->x - 44 - AXIS_FONT.size;
            t->y = p->y + p->h / 2 - w / 2;
            t->w = AXIS_FONT.size * 1.2;
            t->h = w;
        } else if (p->cv->log) {
            p->cv->log->text_truncated = 1;
        }
    }
}

static void clip_frame(rp_plot *p)
{
    cairo_rectangle(p->cv->cr, p->x, p->y, p->w, p->h);
    cairo_clip(p->cv->cr);
}

void rp_plot_line(rp_plot *p, const double *x, const double *y, int n, rp_rgb c, double width)
{
    cairo_t *cr = p->cv->cr;
    int pen = 0;
    cairo_save(cr);
    clip_frame(p);
    cairo_set_line_join(cr, CAIRO_LINE_JOIN_ROUND);
    for (int i = 0; i < n; i++) {
        if (!isfinite(x[i]) || !isfinite(y[i])) {
            pen = 0;
            continue;
        }
        if (pen)
            cairo_line_to(cr, rp_plot_px(p, x[i]), rp_plot_py(p, y[i]));
        else
            cairo_move_to(cr, rp_plot_px(p, x[i]), rp_plot_py(p, y[i]));
        pen = 1;
    }
    cairo_set_source_rgb(cr, c.r, c.g, c.b);
    cairo_set_line_width(cr, width);
    cairo_stroke(cr);
    cairo_restore(cr);
}

void rp_plot_samples(rp_plot *p, double start, double step, const float *v, int n, rp_rgb c,
                     double width)
{
    cairo_t *cr = p->cv->cr;
    int pen = 0;
    cairo_save(cr);
    clip_frame(p);
    cairo_set_line_join(cr, CAIRO_LINE_JOIN_ROUND);
    for (int i = 0; i < n; i++) {
        double X = rp_plot_px(p, start + i * step);
        if (!isfinite(v[i])) {
            pen = 0;
            continue;
        }
        if (pen)
            cairo_line_to(cr, X, rp_plot_py(p, v[i]));
        else
            cairo_move_to(cr, X, rp_plot_py(p, v[i]));
        pen = 1;
    }
    cairo_set_source_rgb(cr, c.r, c.g, c.b);
    cairo_set_line_width(cr, width);
    cairo_stroke(cr);
    cairo_restore(cr);
}

static const double DASH[] = {5.0, 3.5};

/* A label on a white backing so that grid and curves never run through it. */
static void backed_label(rp_canvas *cv, double x, double y, rp_align a, rp_rgb c, const char *s)
{
    double w = rp_text_width(cv, LABEL_FONT, s);
    double x0 = a == RP_LEFT ? x : a == RP_CENTRE ? x - w / 2 : x - w;
    cairo_save(cv->cr);
    cairo_rectangle(cv->cr, x0 - 3, y - LABEL_FONT.size, w + 6, LABEL_FONT.size + 4);
    cairo_set_source_rgba(cv->cr, 1, 1, 1, 0.9);
    cairo_fill(cv->cr);
    cairo_restore(cv->cr);
    rp_text(cv, x, y, LABEL_FONT, c, a, RP_ROLE_LABEL, s);
}

void rp_plot_hline(rp_plot *p, double yv, rp_rgb c, double width, int dashed, const char *label)
{
    cairo_t *cr = p->cv->cr;
    if (!isfinite(yv) || yv < p->y0 || yv > p->y1)
        return;
    double Y = rp_plot_py(p, yv);
    cairo_save(cr);
    clip_frame(p);
    if (dashed)
        cairo_set_dash(cr, DASH, 2, 0);
    cairo_move_to(cr, p->x, Y);
    cairo_line_to(cr, p->x + p->w, Y);
    cairo_set_source_rgb(cr, c.r, c.g, c.b);
    cairo_set_line_width(cr, width);
    cairo_stroke(cr);
    cairo_restore(cr);
    if (label)
        backed_label(p->cv, p->x + p->w - 4, Y - 3, RP_RIGHT, c, label);
}

void rp_plot_vline(rp_plot *p, double xv, rp_rgb c, double width, int dashed, const char *label)
{
    cairo_t *cr = p->cv->cr;
    if (!isfinite(xv) || xv < p->x0 || xv > p->x1)
        return;
    double X = rp_plot_px(p, xv);
    cairo_save(cr);
    clip_frame(p);
    if (dashed)
        cairo_set_dash(cr, DASH, 2, 0);
    cairo_move_to(cr, X, p->y);
    cairo_line_to(cr, X, p->y + p->h);
    cairo_set_source_rgb(cr, c.r, c.g, c.b);
    cairo_set_line_width(cr, width);
    cairo_stroke(cr);
    cairo_restore(cr);
    if (label)
        backed_label(p->cv, X + 4, p->y + 14, RP_LEFT, c, label);
}

void rp_plot_marker(rp_plot *p, double xv, double yv, rp_marker m, double s, rp_rgb c)
{
    if (!isfinite(xv) || !isfinite(yv))
        return;
    rp_draw_marker(p->cv->cr, rp_plot_px(p, xv), rp_plot_py(p, yv), s, m, c);
}

static void arrow_head(cairo_t *cr, double x, double y, double dir)
{
    cairo_move_to(cr, x, y);
    cairo_line_to(cr, x - dir * 7, y - 3.5);
    cairo_line_to(cr, x - dir * 7, y + 3.5);
    cairo_close_path(cr);
    cairo_fill(cr);
}

void rp_plot_span(rp_plot *p, double xa, double xb, double yv, rp_rgb c, const char *label)
{
    cairo_t *cr = p->cv->cr;
    if (!isfinite(xa) || !isfinite(xb) || !isfinite(yv))
        return;
    double A = rp_plot_px(p, fmin(xa, xb)), B = rp_plot_px(p, fmax(xa, xb)), Y = rp_plot_py(p, yv);
    cairo_save(cr);
    clip_frame(p);
    cairo_set_source_rgb(cr, c.r, c.g, c.b);
    cairo_set_line_width(cr, 1.3);
    cairo_move_to(cr, A + 6, Y);
    cairo_line_to(cr, B - 6, Y);
    cairo_stroke(cr);
    arrow_head(cr, A, Y, -1);
    arrow_head(cr, B, Y, +1);
    cairo_restore(cr);
    if (label)
        backed_label(p->cv, (A + B) / 2, Y - 6, RP_CENTRE, c, label);
}

void rp_plot_note(rp_plot *p, rp_rgb c, const char *text)
{
    static const rp_font NOTE_FONT = {13.0, 1};
    double max_w = p->w - 24, line_h = NOTE_FONT.size * 1.35;
    /* Measure first (on a scratch log-free pass) to centre the block vertically. */
    rp_slice_info *log = p->cv->log;
    p->cv->log = NULL;
    cairo_save(p->cv->cr);
    cairo_push_group(p->cv->cr);
    int n =
        rp_text_wrap(p->cv, 0, 0, NOTE_FONT, c, RP_CENTRE, RP_ROLE_NOTE, max_w, line_h, 3, text);
    cairo_pattern_destroy(cairo_pop_group(p->cv->cr));
    cairo_restore(p->cv->cr);
    p->cv->log = log;
    double y = p->y + p->h / 2 - (n - 1) * line_h / 2 + NOTE_FONT.size / 3;
    double w = fmin(rp_text_width(p->cv, NOTE_FONT, text), max_w);
    cairo_save(p->cv->cr);
    cairo_rectangle(p->cv->cr, p->x + p->w / 2 - w / 2 - 8, y - NOTE_FONT.size - 4, w + 16,
                    (n - 1) * line_h + NOTE_FONT.size + 10);
    cairo_set_source_rgba(p->cv->cr, 1, 1, 1, 0.92);
    cairo_fill(p->cv->cr);
    cairo_restore(p->cv->cr);
    rp_text_wrap(p->cv, p->x + p->w / 2, y, NOTE_FONT, c, RP_CENTRE, RP_ROLE_NOTE, max_w, line_h, 3,
                 text);
}
