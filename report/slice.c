/* slice.c: the annotated PNG of one measured slice: image with overlays, profiles, results. */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "rp_int.h"

/* Layout, in PNG pixels. */
#define MARGIN 18
#define DISP_TARGET 768 /* longer side of the displayed image */
#define LEFT_MIN 440    /* the left column holds at least the caption and the legend */
#define GAP 30
#define RIGHT_W 660
#define PANEL_MIN_H 190
#define PANEL_MAX_H 400
#define RP_OPEN_S 6.0 /* half size of the open diamonds that mark 50 % points on the image */

static const rp_font F_TITLE = {20.0, 1};
static const rp_font F_DATE = {14.0, 0};
static const rp_font F_SUB = {13.5, 0};
static const rp_font F_CHIP = {12.5, 1};
static const rp_font F_RESULT = {14.5, 1};
static const rp_font F_REST = {13.5, 0};
static const rp_font F_PANEL = {13.5, 1};
static const rp_font F_SMALL = {12.0, 0};
static const rp_font F_ONIMG = {12.0, 1};

#define NOTICE "Supports, does not replace, review by a qualified medical physicist."

/* ---- what this image shows ---- */

typedef enum panel_kind { P_STRIP, P_ZPROFILE, P_BAR } panel_kind;
typedef struct panel {
    panel_kind kind;
    const char *title;
    const an_strip *strip;
    const an_bar *bar;
    const an_position *pos;
    const an_thickness *th;
    double part_thickness_mm; /* L tan(theta) of this strip */
} panel;

typedef struct scene {
    const an_image *img;
    const an_series_result *r;
    int index;
    const an_thickness *th; /* NULL unless this image is the ramp slice */
    const an_position *pos[2];
    int n_pos;
    panel panels[6];
    int n_panels;
    /* display of the stored image */
    double x0, y0, sx, sy, disp_w, disp_h;
    int nearest;
    double lo, hi;
} scene;

static int placed(int slice, int image, const an_series_result *r)
{
    return slice >= 1 && image >= 0 && image < r->n_images;
}

/* An unused part (single-ramp method's bottom strip): no data and nothing to say. */
static int strip_unused(const an_strip *s)
{
    return !s->measured && s->profile.n <= 0 && !s->reason[0];
}

static int profile_ok(const an_profile *p)
{
    return p->n >= 2 && p->n <= AN_PROFILE_MAX && isfinite(p->start_mm) && isfinite(p->step_mm) &&
           p->step_mm > 0;
}

static int point_ok(an_point p)
{
    return isfinite(p.x) && isfinite(p.y);
}

static const char *reason_or(const char *a, const char *b, const char *fallback)
{
    if (a && a[0])
        return a;
    if (b && b[0])
        return b;
    return fallback;
}

/* "5.02 ± 0.08 mm"; the uncertainty is left out when unknown. */
static void fmt_pm(char *buf, size_t n, const char *fmt_v, double v, double u, const char *unit)
{
    char vb[48], ub[48] = "";
    if (!isfinite(v)) {
        snprintf(buf, n, "n/a");
        return;
    }
    snprintf(vb, sizeof vb, fmt_v, v);
    if (isfinite(u) && u >= 0)
        snprintf(ub, sizeof ub, " \xC2\xB1 %.2f", u);
    snprintf(buf, n, "%s%s%s%s", vb, ub, unit[0] && strcmp(unit, "\xC2\xB0") ? " " : "", unit);
}

/* ---- geometry of the displayed image ---- */

static void place_image(scene *sc, double x0, double y0)
{
    const an_image *img = sc->img;
    double m = fmin(img->col_mm, img->row_mm);
    double ax = img->col_mm / m, ay = img->row_mm / m; /* physical aspect */
    double longer = fmax(img->width * ax, img->height * ay);
    int iso = fabs(img->col_mm - img->row_mm) <= 1e-6 * m;
    int k = (int)floor(DISP_TARGET / longer);
    if (iso && k >= 1) {
        /* Whole-number enlargement by pixel replication: every stored pixel stays visible. */
        if (k > 4)
            k = 4;
        sc->sx = sc->sy = k;
        sc->nearest = 1;
    } else {
        double s = DISP_TARGET / longer;
        sc->sx = s * ax;
        sc->sy = s * ay;
        sc->nearest = 0;
    }
    sc->x0 = x0;
    sc->y0 = y0;
    sc->disp_w = ceil(img->width * sc->sx);
    sc->disp_h = ceil(img->height * sc->sy);
}

static double DX(const scene *sc, double x)
{
    return sc->x0 + (x + 0.5) * sc->sx;
}

static double DY(const scene *sc, double y)
{
    return sc->y0 + (y + 0.5) * sc->sy;
}

/* ---- image and overlays ---- */

/* A white label on a dark backing, for text over the image. */
static void image_label(rp_canvas *cv, double x, double y, rp_align a, rp_rgb c, rp_text_role role,
                        const char *s)
{
    double w = rp_text_width(cv, F_ONIMG, s);
    double xl = a == RP_LEFT ? x : a == RP_CENTRE ? x - w / 2 : x - w;
    cairo_save(cv->cr);
    cairo_rectangle(cv->cr, xl - 3, y - F_ONIMG.size + 0.5, w + 6, F_ONIMG.size + 4);
    cairo_set_source_rgba(cv->cr, 0, 0, 0, 0.7);
    cairo_fill(cv->cr);
    cairo_restore(cv->cr);
    rp_text(cv, x, y, F_ONIMG, c, a, role, s);
}

static void draw_strip_overlay(rp_canvas *cv, const scene *sc, const an_strip *s, const char *name)
{
    cairo_t *cr = cv->cr;
    rp_rgb strip = RP_C_STRIP, cross = RP_C_CROSS;
    if (!point_ok(s->line0) || !point_ok(s->line1))
        return;
    double X0 = DX(sc, s->line0.x), Y0 = DY(sc, s->line0.y);
    double X1 = DX(sc, s->line1.x), Y1 = DY(sc, s->line1.y);
    double len = hypot(X1 - X0, Y1 - Y0);
    if (len < 1)
        return;
    /* The averaging band: +-half_width_mm across the line, in physical units per axis. */
    double ux = (s->line1.x - s->line0.x) * sc->img->col_mm;
    double uy = (s->line1.y - s->line0.y) * sc->img->row_mm;
    double ul = hypot(ux, uy);
    /* Thin lines only, no fill: the strip itself must stay visible between them. */
    if (isfinite(s->half_width_mm) && s->half_width_mm > 0 && ul > 0) {
        double nx = -uy / ul * s->half_width_mm / sc->img->col_mm * sc->sx;
        double ny = ux / ul * s->half_width_mm / sc->img->row_mm * sc->sy;
        cairo_save(cr);
        cairo_move_to(cr, X0 + nx, Y0 + ny);
        cairo_line_to(cr, X1 + nx, Y1 + ny);
        cairo_move_to(cr, X1 - nx, Y1 - ny);
        cairo_line_to(cr, X0 - nx, Y0 - ny);
        cairo_set_source_rgba(cr, strip.r, strip.g, strip.b, 0.9);
        cairo_set_line_width(cr, 1.0);
        cairo_stroke(cr);
        cairo_restore(cr);
    }
    {
        static const double dash[] = {5.0, 4.0};
        cairo_save(cr);
        cairo_set_dash(cr, dash, 2, 0);
        cairo_move_to(cr, X0, Y0);
        cairo_line_to(cr, X1, Y1);
        cairo_set_source_rgb(cr, strip.r, strip.g, strip.b);
        cairo_set_line_width(cr, 1.0);
        cairo_stroke(cr);
        cairo_restore(cr);
    }
    if (s->measured) {
        if (point_ok(s->cross_lo))
            rp_draw_marker(cr, DX(sc, s->cross_lo.x), DY(sc, s->cross_lo.y), RP_OPEN_S,
                           RP_MARK_OPEN_DIAMOND, cross);
        if (point_ok(s->cross_hi))
            rp_draw_marker(cr, DX(sc, s->cross_hi.x), DY(sc, s->cross_hi.y), RP_OPEN_S,
                           RP_MARK_OPEN_DIAMOND, cross);
    }
    /* Name the strip beyond its right-hand end, outside the band. */
    int right_is_1 = X1 >= X0;
    double ex = right_is_1 ? X1 : X0, ey = right_is_1 ? Y1 : Y0;
    char label[64];
    snprintf(label, sizeof label, "%s%s", name, s->measured ? "" : " (not measured)");
    image_label(cv, ex + 8, ey + 4, RP_LEFT, strip, RP_ROLE_LABEL, label);
}

static void draw_bar_overlay(rp_canvas *cv, const scene *sc, const an_bar *b, const char *name)
{
    cairo_t *cr = cv->cr;
    rp_rgb bar = RP_C_BAR, cross = RP_C_CROSS;
    if (!point_ok(b->top))
        return;
    double XT = DX(sc, b->top.x), YT = DY(sc, b->top.y);
    if (b->measured && point_ok(b->end)) {
        double XE = DX(sc, b->end.x), YE = DY(sc, b->end.y);
        rp_draw_halo_line(cr, XT, YT, XE, YE, 2.0, bar, 0);
        /* a short tick across the bar at its top */
        double dx = XE - XT, dy = YE - YT, l = hypot(dx, dy);
        if (l > 0) {
            double nx = -dy / l * 5, ny = dx / l * 5;
            rp_draw_halo_line(cr, XT - nx, YT - ny, XT + nx, YT + ny, 2.0, bar, 0);
        }
        rp_draw_marker(cr, XE, YE, RP_OPEN_S, RP_MARK_OPEN_DIAMOND, cross);
        image_label(cv, XE, YE + 22, RP_CENTRE, bar, RP_ROLE_LABEL, name);
    } else {
        rp_draw_marker(cr, XT, YT, 4, RP_MARK_SQUARE, bar);
        image_label(cv, XT, YT - 10, RP_CENTRE, bar, RP_ROLE_LABEL, name);
    }
}

/* A scale bar in the lower right corner of the view rectangle (rx, ry, rw, rh). */
static void draw_scale_bar(rp_canvas *cv, const scene *sc, double rx, double ry, double rw,
                           double rh)
{
    double px_per_mm = sc->sx / sc->img->col_mm, fov_mm = rw / px_per_mm;
    double mm = fov_mm >= 150 ? 50 : fov_mm >= 40 ? 10 : 5;
    double len = mm * px_per_mm;
    double xr = rx + rw - 14, yb = ry + rh - 14;
    rp_rgb white = {1, 1, 1};
    rp_draw_halo_line(cv->cr, xr - len, yb, xr, yb, 3.0, white, 0);
    char buf[32];
    snprintf(buf, sizeof buf, "%.0f mm", mm);
    image_label(cv, xr - len / 2, yb - 9, RP_CENTRE, white, RP_ROLE_LABEL, buf);
}

/* The image with sc's mapping, clipped to the rectangle (rx, ry, rw, rh), and its overlays. The
 * main view has everything; an inset (main == 0) only what lies near the wedge bars. */
static void draw_view(rp_canvas *cv, const scene *sc, cairo_surface_t *surf, double rx, double ry,
                      double rw, double rh, int main)
{
    cairo_t *cr = cv->cr;
    cairo_save(cr);
    cairo_rectangle(cr, rx, ry, rw, rh);
    cairo_set_source_rgb(cr, 0, 0, 0);
    cairo_fill_preserve(cr);
    cairo_clip(cr);
    cairo_translate(cr, sc->x0, sc->y0);
    cairo_scale(cr, sc->sx, sc->sy);
    cairo_set_source_surface(cr, surf, 0, 0);
    cairo_pattern_set_filter(cairo_get_source(cr),
                             sc->nearest ? CAIRO_FILTER_NEAREST : CAIRO_FILTER_GOOD);
    cairo_pattern_set_extend(cairo_get_source(cr), CAIRO_EXTEND_PAD);
    cairo_paint(cr);
    cairo_restore(cr);

    /* Overlays, clipped to the view. */
    cairo_save(cr);
    cairo_rectangle(cr, rx, ry, rw, rh);
    cairo_clip(cr);
    const an_phantom_fit *ph = &sc->r->phantom[sc->index];
    rp_rgb outline = RP_C_OUTLINE, white = {1, 1, 1};
    if (ph->found && point_ok(ph->centre) && isfinite(ph->radius_mm) && ph->radius_mm > 0) {
        double cx = DX(sc, ph->centre.x), cy = DY(sc, ph->centre.y);
        double rx_ = ph->radius_mm / sc->img->col_mm * sc->sx;
        double ry_ = ph->radius_mm / sc->img->row_mm * sc->sy;
        for (int pass = 0; pass < 2; pass++) { /* dark halo, then the colour */
            cairo_save(cr);
            cairo_translate(cr, cx, cy);
            cairo_scale(cr, rx_, ry_);
            cairo_arc(cr, 0, 0, 1, 0, 2 * M_PI);
            cairo_restore(cr);
            if (pass == 0)
                cairo_set_source_rgba(cr, 0, 0, 0, 0.6);
            else
                cairo_set_source_rgb(cr, outline.r, outline.g, outline.b);
            cairo_set_line_width(cr, pass == 0 ? 4.5 : 2.25);
            cairo_stroke(cr);
        }
        rp_draw_halo_line(cr, cx - 6, cy, cx + 6, cy, 1.5, outline, 0);
        rp_draw_halo_line(cr, cx, cy - 6, cx, cy + 6, 1.5, outline, 0);
    } else if (main) {
        image_label(cv, rx + 10, ry + 22, RP_LEFT, white, RP_ROLE_NOTE, "phantom not found");
    }
    if (sc->th && main) {
        draw_strip_overlay(cv, sc, &sc->th->top, "top ramp");
        if (!strip_unused(&sc->th->bottom))
            draw_strip_overlay(cv, sc, &sc->th->bottom, "bottom ramp");
    }
    for (int k = 0; k < sc->n_pos; k++) {
        draw_bar_overlay(cv, sc, &sc->pos[k]->left, "L");
        draw_bar_overlay(cv, sc, &sc->pos[k]->right, "R");
    }
    draw_scale_bar(cv, sc, rx, ry, rw, rh);
    cairo_restore(cr);
}

/* Centre (stored pixels) of the wedge bars' found points, for the enlarged inset. */
static int bars_centre(const scene *sc, double *x, double *y)
{
    double sx = 0, sy = 0;
    int n = 0;
    for (int k = 0; k < sc->n_pos; k++) {
        const an_bar *b[2] = {&sc->pos[k]->left, &sc->pos[k]->right};
        for (int i = 0; i < 2; i++) {
            if (point_ok(b[i]->top)) {
                sx += b[i]->top.x, sy += b[i]->top.y, n++;
            }
            if (b[i]->measured && point_ok(b[i]->end)) {
                sx += b[i]->end.x, sy += b[i]->end.y, n++;
            }
        }
    }
    if (n == 0)
        return 0;
    *x = sx / n;
    *y = sy / n;
    return 1;
}

/* The wedge bars enlarged, in a square of side `side` at (x, y): only with square pixels, and only
 * if it shows them at least twice as large as the main view. Returns the height used (0: none). */
static double draw_bar_inset(rp_canvas *cv, const scene *sc, cairo_surface_t *surf, double x,
                             double y, double side)
{
    rp_rgb ink = RP_C_INK;
    double cx, cy;
    const double region_mm = 40;
    if (sc->n_pos == 0 || !sc->nearest || side < 200 || !bars_centre(sc, &cx, &cy))
        return 0;
    int k = (int)floor(side / (region_mm / sc->img->col_mm));
    if (k < 2 * sc->sx)
        return 0;
    scene in = *sc;
    in.sx = in.sy = k;
    double vy = y + 24;
    in.x0 = round(x + side / 2 - (cx + 0.5) * k);
    in.y0 = round(vy + side / 2 - (cy + 0.5) * k);
    char buf[96];
    snprintf(buf, sizeof buf, "Wedge bars, enlarged \xC3\x97%d", k);
    rp_text(cv, x, y + 15, F_PANEL, ink, RP_LEFT, RP_ROLE_TITLE, buf);
    draw_view(cv, &in, surf, x, vy, side, side, 0);
    return side + 24;
}

/* ---- legend and caption under the image ---- */

typedef enum swatch { SW_CIRCLE, SW_BAND, SW_POINT, SW_BAR } swatch;

static void draw_swatch(cairo_t *cr, swatch s, double x, double yc)
{
    rp_rgb outline = RP_C_OUTLINE, strip = RP_C_STRIP, cross = RP_C_CROSS, bar = RP_C_BAR;
    cairo_save(cr);
    cairo_rectangle(cr, x, yc - 9, 26, 18);
    cairo_set_source_rgb(cr, 0.12, 0.12, 0.12);
    cairo_fill(cr);
    switch (s) {
    case SW_CIRCLE:
        cairo_arc(cr, x + 13, yc, 6, 0, 2 * M_PI);
        cairo_set_source_rgb(cr, outline.r, outline.g, outline.b);
        cairo_set_line_width(cr, 1.5);
        cairo_stroke(cr);
        break;
    case SW_BAND: {
        static const double dash[] = {5.0, 4.0};
        cairo_set_source_rgba(cr, strip.r, strip.g, strip.b, 0.9);
        cairo_set_line_width(cr, 1.0);
        cairo_move_to(cr, x + 2, yc - 4.5);
        cairo_line_to(cr, x + 24, yc - 4.5);
        cairo_move_to(cr, x + 2, yc + 4.5);
        cairo_line_to(cr, x + 24, yc + 4.5);
        cairo_stroke(cr);
        cairo_set_dash(cr, dash, 2, 0);
        cairo_move_to(cr, x + 2, yc + 0.5);
        cairo_line_to(cr, x + 24, yc + 0.5);
        cairo_stroke(cr);
        break;
    }
    case SW_POINT: rp_draw_marker(cr, x + 13, yc, 5.0, RP_MARK_OPEN_DIAMOND, cross); break;
    case SW_BAR:
        rp_draw_halo_line(cr, x + 4, yc, x + 20, yc, 2.0, bar, 0);
        rp_draw_marker(cr, x + 20, yc, 4, RP_MARK_OPEN_DIAMOND, cross);
        break;
    }
    cairo_restore(cr);
}

/* Returns the height used. */
static double draw_legend(rp_canvas *cv, const scene *sc, double x, double y, double w)
{
    struct item {
        swatch s;
        const char *text;
    } items[4];
    int n = 0;
    if (sc->r->phantom[sc->index].found)
        items[n++] = (struct item){SW_CIRCLE, "phantom outline (fit)"};
    if (sc->th)
        items[n++] = (struct item){SW_BAND, "ramp strip: sampled line (dashed), averaging band"};
    if (sc->th || sc->n_pos)
        items[n++] = (struct item){SW_POINT, "half-level (50 %) point"};
    if (sc->n_pos)
        items[n++] = (struct item){SW_BAR, "wedge bar: top to found end"};
    rp_rgb ink = RP_C_INK;
    double cx = x, cy = y + 9, row_h = 24;
    for (int i = 0; i < n; i++) {
        double tw = rp_text_width(cv, F_SMALL, items[i].text);
        double iw = 26 + 7 + tw + 20;
        if (cx > x && cx + iw - 20 > x + w) {
            cx = x;
            cy += row_h;
        }
        draw_swatch(cv->cr, items[i].s, cx, cy);
        rp_text(cv, cx + 33, cy + 4.5, F_SMALL, ink, RP_LEFT, RP_ROLE_LABEL, items[i].text);
        cx += iw;
    }
    return cy - y + 9;
}

/* ---- profile panels ---- */

static void profile_range(const an_profile *p, double *vmin, double *vmax)
{
    *vmin = INFINITY;
    *vmax = -INFINITY;
    for (int i = 0; i < p->n; i++) {
        if (isfinite(p->v[i])) {
            *vmin = fmin(*vmin, p->v[i]);
            *vmax = fmax(*vmax, p->v[i]);
        }
    }
}

/* Sets up the plot of a profile (axes drawn) and returns 1, or returns 0 if it has no data. */
/* extra_hi: a level that must show; cap (if finite): the top of the range at most. */
static int profile_plot(rp_plot *pl, rp_canvas *cv, const an_profile *pr, double extra_hi,
                        double cap, double x, double y, double w, double h, const char *xlabel)
{
    double vmin, vmax;
    if (!profile_ok(pr))
        return 0;
    profile_range(pr, &vmin, &vmax);
    if (!isfinite(vmin))
        return 0;
    if (isfinite(extra_hi))
        vmax = fmax(vmax, extra_hi);
    if (isfinite(cap) && vmax > cap)
        vmax = cap;
    double y0 = fmin(0, vmin), y1 = vmax + 0.12 * (vmax - y0);
    rp_nice_range(&y0, &y1, 5);
    double x0 = pr->start_mm, x1 = pr->start_mm + (pr->n - 1) * pr->step_mm;
    rp_plot_init(pl, cv, x, y, w, h, x0, x1, y0, y1);
    rp_plot_axes(pl, xlabel, "signal");
    return 1;
}

static void empty_frame(rp_plot *pl, rp_canvas *cv, double x, double y, double w, double h)
{
    rp_rgb rule = RP_C_RULE;
    rp_plot_init(pl, cv, x, y, w, h, 0, 1, 0, 1);
    cairo_save(cv->cr);
    cairo_rectangle(cv->cr, round(x) + 0.5, round(y) + 0.5, round(w) - 1, round(h) - 1);
    cairo_set_source_rgb(cv->cr, rule.r, rule.g, rule.b);
    cairo_set_line_width(cv->cr, 1);
    cairo_stroke(cv->cr);
    cairo_restore(cv->cr);
}

static void draw_strip_panel(rp_canvas *cv, const panel *pn, double x, double y, double w, double h)
{
    const an_strip *s = pn->strip;
    rp_rgb ink = RP_C_INK, ink2 = RP_C_INK2, prof = RP_C_PROFILE, raw = RP_C_RAW,
           level = RP_C_LEVEL, plateau = RP_C_PLATEAU, cross = RP_C_CROSS, grey = RP_C_UNMEAS;
    char buf[RP_TEXT_LEN], a[64], b[64];
    rp_plot pl;
    double dx = x + 62, dy = y + 28, dw = w - 62 - 12, dh = h - 28 - 44;

    rp_text(cv, x, y + 15, F_PANEL, ink, RP_LEFT, RP_ROLE_TITLE, pn->title);
    if (s->measured) {
        fmt_pm(a, sizeof a, "%.1f", s->fwtm_mm, NAN, "mm");
        fmt_pm(b, sizeof b, "%.2f", pn->part_thickness_mm, NAN, "mm");
        snprintf(buf, sizeof buf, "FWTM %s \xC2\xB7 L \xC3\x97 tan \xCE\xB8 = %s", a, b);
        rp_text(cv, x + w - 12, y + 15, F_SMALL, ink2, RP_RIGHT, RP_ROLE_RESULT, buf);
    }
    /* Scaled to the strip, not to fluid that the line may reach beyond the insert (clipped). */
    double cap = s->measured && isfinite(s->plateau) && s->plateau > 0 ? 1.6 * s->plateau : NAN;
    int has = profile_plot(&pl, cv, &s->profile, s->measured ? s->plateau : NAN, cap, dx, dy, dw,
                           dh, "position along the strip (mm)");
    if (!has)
        empty_frame(&pl, cv, dx, dy, dw, dh);
    if (!s->measured) {
        if (has)
            rp_plot_samples(&pl, s->profile.start_mm, s->profile.step_mm, s->profile.v,
                            s->profile.n, raw, 1.2);
        snprintf(buf, sizeof buf, "not measured: %s",
                 reason_or(s->reason, pn->th->reason, "no reason given"));
        rp_plot_note(&pl, grey, buf);
        return;
    }
    if (!has) {
        rp_plot_note(&pl, grey, "profile not stored");
        return;
    }
    snprintf(buf, sizeof buf, "plateau %.4g", s->plateau);
    rp_plot_hline(&pl, s->plateau, plateau, 1.0, 1, buf);
    if (isfinite(s->floor) && s->floor > 0 && s->floor < s->half_level) {
        snprintf(buf, sizeof buf, "floor %.3g", s->floor);
        rp_plot_hline(&pl, s->floor, plateau, 1.0, 1, buf);
    }
    rp_plot_samples(&pl, s->profile.start_mm, s->profile.step_mm, s->profile.v, s->profile.n, prof,
                    1.6);
    snprintf(buf, sizeof buf, "half level %.4g", s->half_level);
    rp_plot_hline(&pl, s->half_level, level, 1.2, 1, NULL);
    /* the half-level label sits at the left end, clear of the FWHM label in the middle */
    {
        double Y = rp_plot_py(&pl, s->half_level);
        if (isfinite(Y))
            rp_text(cv, pl.x + 6, Y - 4, F_SMALL, level, RP_LEFT, RP_ROLE_LABEL, buf);
    }
    rp_plot_vline(&pl, s->cross_lo_mm, cross, 1.0, 1, NULL);
    rp_plot_vline(&pl, s->cross_hi_mm, cross, 1.0, 1, NULL);
    fmt_pm(a, sizeof a, "%.2f", s->length_mm, s->length_unc_mm, "mm");
    snprintf(buf, sizeof buf, "FWHM %s", a);
    rp_plot_span(&pl, s->cross_lo_mm, s->cross_hi_mm, s->half_level, ink, buf);
    rp_plot_marker(&pl, s->cross_lo_mm, s->half_level, RP_MARK_DIAMOND, 5.5, cross);
    rp_plot_marker(&pl, s->cross_hi_mm, s->half_level, RP_MARK_DIAMOND, 5.5, cross);
}

static void draw_bar_panel(rp_canvas *cv, const panel *pn, double x, double y, double w, double h)
{
    const an_bar *b = pn->bar;
    rp_rgb ink = RP_C_INK, ink2 = RP_C_INK2, prof = RP_C_PROFILE, raw = RP_C_RAW,
           level = RP_C_LEVEL, plateau = RP_C_PLATEAU, cross = RP_C_CROSS, grey = RP_C_UNMEAS;
    char buf[RP_TEXT_LEN], a[64];
    rp_plot pl;
    double dx = x + 62, dy = y + 28, dw = w - 62 - 12, dh = h - 28 - 44;

    rp_text(cv, x, y + 15, F_PANEL, ink, RP_LEFT, RP_ROLE_TITLE, pn->title);
    if (b->measured) {
        fmt_pm(a, sizeof a, "%.2f", b->length_mm, b->unc_mm, "mm");
        snprintf(buf, sizeof buf, "length %s", a);
        rp_text(cv, x + w - 12, y + 15, F_SMALL, ink2, RP_RIGHT, RP_ROLE_RESULT, buf);
    }
    double top_level = b->measured ? fmax(b->level_hi, b->level_lo) : NAN;
    int has =
        profile_plot(&pl, cv, &b->profile, top_level, NAN, dx, dy, dw, dh, "from the bar top (mm)");
    if (!has)
        empty_frame(&pl, cv, dx, dy, dw, dh);
    if (!b->measured) {
        if (has)
            rp_plot_samples(&pl, b->profile.start_mm, b->profile.step_mm, b->profile.v,
                            b->profile.n, raw, 1.2);
        snprintf(buf, sizeof buf, "not measured: %s",
                 reason_or(pn->pos->measured ? NULL : pn->pos->reason, NULL, "bar end not found"));
        rp_plot_note(&pl, grey, buf);
        return;
    }
    if (!has) {
        rp_plot_note(&pl, grey, "profile not stored");
        return;
    }
    double mid = 0.5 * (b->level_hi + b->level_lo);
    rp_plot_hline(&pl, b->level_hi, plateau, 1.0, 1, NULL);
    rp_plot_hline(&pl, b->level_lo, plateau, 1.0, 1, NULL);
    rp_plot_vline(&pl, 0.0, plateau, 1.0, 1, "bar top");
    rp_plot_samples(&pl, b->profile.start_mm, b->profile.step_mm, b->profile.v, b->profile.n, prof,
                    1.6);
    rp_plot_hline(&pl, mid, level, 1.2, 1, NULL);
    {
        double Y = rp_plot_py(&pl, mid);
        if (isfinite(Y))
            rp_text(cv, pl.x + 6, Y - 4, F_SMALL, level, RP_LEFT, RP_ROLE_LABEL, "50 % level");
    }
    rp_plot_vline(&pl, b->length_mm, cross, 1.0, 1, NULL);
    rp_plot_marker(&pl, b->length_mm, mid, RP_MARK_DIAMOND, 5.5, cross);
    /* short: the panel's title line carries the value with its uncertainty */
    snprintf(buf, sizeof buf, "end %.2f mm", b->length_mm);
    double X = rp_plot_px(&pl, b->length_mm), Y = rp_plot_py(&pl, mid);
    if (isfinite(X) && isfinite(Y)) {
        double tw = rp_text_width(cv, F_SMALL, buf);
        int left = X + 10 + tw > pl.x + pl.w - 4; /* no room on the right */
        rp_text(cv, left ? X - 10 : X + 10, Y + 18, F_SMALL, ink, left ? RP_RIGHT : RP_LEFT,
                RP_ROLE_LABEL, buf);
    }
}

/* The slice profile along the normal that the analysis combined from the ramps (peak 1). */
static void draw_zprofile_panel(rp_canvas *cv, const panel *pn, double x, double y, double w,
                                double h)
{
    const an_thickness *t = pn->th;
    const an_profile *z = &t->zprofile;
    rp_rgb ink = RP_C_INK, ink2 = RP_C_INK2, prof = RP_C_PROFILE, level = RP_C_LEVEL,
           plateau = RP_C_PLATEAU;
    char buf[RP_TEXT_LEN], a[64], b[64];
    rp_plot pl;
    double dx = x + 62, dy = y + 28, dw = w - 62 - 12, dh = h - 28 - 44;

    rp_text(cv, x, y + 15, F_PANEL, ink, RP_LEFT, RP_ROLE_TITLE, pn->title);
    fmt_pm(a, sizeof a, "%.2f", t->corrected_mm, t->uncertainty_mm, "mm");
    fmt_pm(b, sizeof b, "%.2f", t->fwtm_mm, NAN, "mm");
    snprintf(buf, sizeof buf, "thickness %s \xC2\xB7 FWTM %s", a, b);
    rp_text(cv, x + w - 12, y + 15, F_SMALL, ink2, RP_RIGHT, RP_ROLE_RESULT, buf);
    double x0 = z->start_mm, x1 = z->start_mm + (z->n - 1) * z->step_mm, y0 = 0, y1 = 1.1;
    double vmin, vmax;
    profile_range(z, &vmin, &vmax);
    if (isfinite(vmin)) {
        y0 = fmin(0, vmin);
        y1 = fmax(1.1, vmax * 1.05);
    }
    rp_plot_init(&pl, cv, dx, dy, dw, dh, x0, x1, y0, y1);
    rp_plot_axes(&pl, "position along the slice normal (mm)", "relative");
    rp_plot_hline(&pl, 1.0, plateau, 1.0, 1, NULL);
    rp_plot_hline(&pl, 0.1, plateau, 1.0, 1, "10 %");
    rp_plot_samples(&pl, z->start_mm, z->step_mm, z->v, z->n, prof, 1.6);
    rp_plot_hline(&pl, 0.5, level, 1.2, 1, NULL);
    double Y = rp_plot_py(&pl, 0.5);
    rp_text(cv, pl.x + 6, Y - 4, F_SMALL, level, RP_LEFT, RP_ROLE_LABEL, "50 %");
}

/* Rows of panels: a wedge slice's two bars share a row. */
static int panel_rows(const scene *sc)
{
    int rows = 0;
    for (int i = 0; i < sc->n_panels; i++) {
        if (sc->panels[i].kind == P_BAR && i + 1 < sc->n_panels &&
            sc->panels[i + 1].kind == P_BAR && sc->panels[i + 1].pos == sc->panels[i].pos)
            i++;
        rows++;
    }
    return rows;
}

static void draw_panel(rp_canvas *cv, const panel *pn, double x, double y, double w, double h)
{
    switch (pn->kind) {
    case P_STRIP: draw_strip_panel(cv, pn, x, y, w, h); break;
    case P_ZPROFILE: draw_zprofile_panel(cv, pn, x, y, w, h); break;
    case P_BAR: draw_bar_panel(cv, pn, x, y, w, h); break;
    }
}

/* Returns the height used. */
static double draw_panels(rp_canvas *cv, const scene *sc, double x, double y, double w, double h)
{
    rp_rgb grey = RP_C_UNMEAS;
    if (sc->n_panels == 0) {
        rp_plot pl;
        empty_frame(&pl, cv, x + 62, y + 28, w - 74, fmin(h, PANEL_MAX_H) - 72);
        rp_plot_note(&pl, grey, "no thickness or position measurement on this slice");
        return fmin(h, PANEL_MAX_H);
    }
    double ph = fmin(PANEL_MAX_H, h / panel_rows(sc)), py = y;
    for (int i = 0; i < sc->n_panels; i++) {
        const panel *pn = &sc->panels[i];
        if (pn->kind == P_BAR && i + 1 < sc->n_panels && sc->panels[i + 1].kind == P_BAR &&
            sc->panels[i + 1].pos == pn->pos) {
            double hw = (w - 16) / 2;
            draw_panel(cv, pn, x, py, hw, ph - 8);
            draw_panel(cv, &sc->panels[++i], x + hw + 16, py, hw, ph - 8);
        } else {
            draw_panel(cv, pn, x, py, w, ph - 8);
        }
        py += ph;
    }
    return py - y;
}

/* ---- header ---- */

/* One key result: verdict chip, the value in bold, details after it. */
static void result_line(rp_canvas *cv, double x, double y, double w, an_verdict v, int measured,
                        const char *main, const char *rest)
{
    rp_rgb ink = RP_C_INK, ink2 = RP_C_INK2;
    double x1 = x + w;
    x += rp_verdict_chip(cv, x, y, F_CHIP, measured ? v : AN_UNMEASURABLE) + 10;
    x += rp_text_fit(cv, x, y, F_RESULT, ink, RP_LEFT, measured ? RP_ROLE_RESULT : RP_ROLE_NOTE,
                     x1 - x, main) +
         12;
    if (rest && rest[0] && x < x1 - 40)
        rp_text_fit(cv, x, y, F_REST, ink2, RP_LEFT, RP_ROLE_RESULT, x1 - x, rest);
}

typedef struct hline {
    int chip;
    an_verdict v;
    int measured;
    char main[RP_TEXT_LEN], rest[RP_TEXT_LEN];
} hline;

/* Composes the result lines of the header; returns how many. */
static int compose_results(const scene *sc, hline *L, int max)
{
    const an_series_result *r = sc->r;
    char a[64], b[64], c[96];
    int n = 0;
    if (sc->th && n < max) {
        const an_thickness *t = sc->th;
        hline *h = &L[n++];
        h->chip = 1;
        h->v = t->verdict;
        h->measured = t->measured;
        if (t->measured) {
            fmt_pm(a, sizeof a, "%.2f", t->corrected_mm, t->uncertainty_mm, "mm");
            snprintf(h->main, sizeof h->main, "Slice thickness %s", a);
            fmt_pm(b, sizeof b, "%+.2f", t->tilt_deg, t->tilt_unc_deg, "\xC2\xB0");
            if (!t->bottom.measured) /* single-ramp or single-wedge model: one strip */
                snprintf(h->rest, sizeof h->rest,
                         "nominal %.2f mm, limits %.2f\xE2\x80\x93%.2f mm \xC2\xB7 one strip, "
                         "no tilt correction",
                         t->nominal_mm, t->limit_lo_mm, t->limit_hi_mm);
            else
                snprintf(h->rest, sizeof h->rest,
                         "nominal %.2f mm, limits %.2f\xE2\x80\x93%.2f mm \xC2\xB7 ACR formula "
                         "%.2f mm \xC2\xB7 tilt %s",
                         t->nominal_mm, t->limit_lo_mm, t->limit_hi_mm, t->acr_mm, b);
        } else {
            snprintf(h->main, sizeof h->main, "Slice thickness not measured: %s",
                     reason_or(t->reason, r->reason, "no reason given"));
        }
    }
    for (int k = 0; k < sc->n_pos && n < max; k++) {
        const an_position *p = sc->pos[k];
        hline *h = &L[n++];
        h->chip = 1;
        h->v = p->verdict;
        h->measured = p->measured;
        if (p->measured) {
            fmt_pm(a, sizeof a, "%+.2f", p->bar_difference_mm, p->uncertainty_mm, "mm");
            snprintf(h->main, sizeof h->main, "Bar length difference %s", a);
            snprintf(b, sizeof b, "%+.2f mm", p->displacement_mm);
            c[0] = '\0';
            if (isfinite(p->ramp_displacement_mm)) {
                char d[48];
                fmt_pm(d, sizeof d, "%+.2f", p->ramp_displacement_mm, p->ramp_displacement_unc_mm,
                       "mm");
                snprintf(c, sizeof c, " \xC2\xB7 from the ramps %s", d);
            }
            snprintf(h->rest, sizeof h->rest,
                     "limit \xC2\xB1%.1f mm \xC2\xB7 slice displacement %s%s", p->limit_mm, b, c);
        } else {
            snprintf(h->main, sizeof h->main, "Slice position not measured: %s",
                     reason_or(p->reason, r->reason, "no reason given"));
        }
    }
    if (sc->th && r->pitch_measured && n < max) {
        hline *h = &L[n++];
        fmt_pm(a, sizeof a, "%+.2f", r->pitch_deg, r->pitch_unc_deg, "\xC2\xB0");
        snprintf(h->rest, sizeof h->rest,
                 "Pitch %s, from the ramp and wedge displacements on this slice", a);
    }
    if (sc->n_pos && r->position_model.measured && n < max) {
        const an_position_model *m = &r->position_model;
        hline *h = &L[n++];
        fmt_pm(a, sizeof a, "%+.2f", m->offset_mm, m->offset_unc_mm, "mm");
        fmt_pm(b, sizeof b, "%+.3f", m->scale_percent, m->scale_unc_percent, "%");
        snprintf(h->rest, sizeof h->rest,
                 "Position model from both wedge slices: offset %s, scale %s", a, b);
    }
    return n;
}

static void join(char *dst, size_t n, const char *sep, const char *s)
{
    if (!s || !s[0])
        return;
    size_t len = strlen(dst);
    if (len >= n - 1)
        return;
    snprintf(dst + len, n - len, "%s%s", len ? sep : "", s);
}

static void compose_title(const rp_labels *lb, char *buf, size_t n)
{
    char series[96] = "";
    buf[0] = '\0';
    if (lb && lb->series && lb->series[0])
        snprintf(series, sizeof series, "series %s", lb->series);
    join(buf, n, " \xC2\xB7 ", lb ? lb->scanner : NULL);
    join(buf, n, " \xC2\xB7 ", series);
    join(buf, n, " \xC2\xB7 ", lb ? lb->description : NULL);
    if (!buf[0])
        sw_strlcpy(buf, "Slice review", n);
}

static void compose_subtitle(const scene *sc, const rp_labels *lb, char *buf, size_t n)
{
    const an_series_result *r = sc->r;
    const an_phantom_fit *ph = &r->phantom[sc->index];
    char part[160];
    buf[0] = '\0';
    int ord = r->ordinal[sc->index];
    if (ord >= 1)
        snprintf(part, sizeof part, "Slice %d", ord);
    else
        snprintf(part, sizeof part, "Slice not identified");
    join(buf, n, " \xC2\xB7 ", part);
    if (lb && lb->echo > 0) {
        snprintf(part, sizeof part, "echo %d", lb->echo);
        join(buf, n, " \xC2\xB7 ", part);
    }
    snprintf(part, sizeof part, "image %d of %d", sc->index + 1, r->n_images);
    join(buf, n, " \xC2\xB7 ", part);
    if (ph->found)
        snprintf(part, sizeof part,
                 "phantom centre (%.1f, %.1f) px, radius %.1f mm, rotation %+.2f\xC2\xB0",
                 ph->centre.x, ph->centre.y, ph->radius_mm, r->rotation_deg);
    else
        snprintf(part, sizeof part, "phantom not found");
    join(buf, n, " \xC2\xB7 ", part);
}

/* ---- the whole image ---- */

static void build_scene(scene *sc)
{
    const an_series_result *r = sc->r;
    if (placed(r->thickness.slice, r->thickness.image, r) && r->thickness.image == sc->index)
        sc->th = &r->thickness;
    for (int k = 0; k < 2; k++)
        if (placed(r->position[k].slice, r->position[k].image, r) &&
            r->position[k].image == sc->index)
            sc->pos[sc->n_pos++] = &r->position[k];
    if (sc->th) {
        sc->panels[sc->n_panels++] = (panel){.kind = P_STRIP,
                                             .title = "Top ramp profile",
                                             .strip = &sc->th->top,
                                             .th = sc->th,
                                             .part_thickness_mm = sc->th->top_thickness_mm};
        if (!strip_unused(&sc->th->bottom))
            sc->panels[sc->n_panels++] = (panel){.kind = P_STRIP,
                                                 .title = "Bottom ramp profile",
                                                 .strip = &sc->th->bottom,
                                                 .th = sc->th,
                                                 .part_thickness_mm = sc->th->bottom_thickness_mm};
    }
    if (sc->th && sc->th->measured && profile_ok(&sc->th->zprofile))
        sc->panels[sc->n_panels++] =
            (panel){.kind = P_ZPROFILE, .title = "Slice profile from the ramps", .th = sc->th};
    for (int k = 0; k < sc->n_pos; k++) {
        sc->panels[sc->n_panels++] = (panel){
            .kind = P_BAR, .title = "Left bar", .bar = &sc->pos[k]->left, .pos = sc->pos[k]};
        sc->panels[sc->n_panels++] = (panel){
            .kind = P_BAR, .title = "Right bar", .bar = &sc->pos[k]->right, .pos = sc->pos[k]};
    }
}

static void rule(cairo_t *cr, double x0, double x1, double y)
{
    rp_rgb c = RP_C_RULE;
    cairo_save(cr);
    cairo_set_source_rgb(cr, c.r, c.g, c.b);
    cairo_set_line_width(cr, 1);
    cairo_move_to(cr, x0, round(y) + 0.5);
    cairo_line_to(cr, x1, round(y) + 0.5);
    cairo_stroke(cr);
    cairo_restore(cr);
}

sw_status rp_annotate_slice_png(const char *path, const an_image *img, int image_index,
                                const an_series_result *r, const rp_labels *labels,
                                rp_slice_info *info, sw_error *err)
{
    sw_status st = SW_OK;
    rp_canvas cv = {0};
    scene sc = {0};
    cairo_surface_t *surf = NULL;
    hline lines[6] = {{0}};
    char title[RP_TEXT_LEN], sub[RP_TEXT_LEN], buf[RP_TEXT_LEN], desc[4 * RP_TEXT_LEN];
    rp_rgb ink = RP_C_INK, ink2 = RP_C_INK2;

    if (!path || !r) {
        st =
            sw_error_set(err, SW_EINVAL, "report: annotate slice: no %s", path ? "result" : "path");
        goto out;
    }
    if (r->n_images < 1 || r->n_images > AN_MAX_IMAGES || image_index < 0 ||
        image_index >= r->n_images) {
        st = sw_error_set(err, SW_EINVAL, "report: %s: image %d is not in a result of %d images",
                          path, image_index, r->n_images);
        goto out;
    }
    st = rp_image_check(img, err);
    if (st != SW_OK)
        goto out;
    sc.img = img;
    sc.r = r;
    sc.index = image_index;
    build_scene(&sc);
    st = rp_window(img, 0.005, 0.995, &sc.lo, &sc.hi, err);
    if (st != SW_OK)
        goto out;

    /* Layout: header lines first, since their number sets where the body starts. */
    int n_lines = compose_results(&sc, lines, 6);
    double y_title = MARGIN + 20, y_sub = y_title + 25;
    double y_res = y_sub + 32, res_h = 28;
    double header_h = y_res + (n_lines > 0 ? (n_lines - 1) * res_h : -res_h) + 16;
    place_image(&sc, MARGIN, round(header_h + 16));
    double left_w = fmax(sc.disp_w, LEFT_MIN);
    double right_x = MARGIN + left_w + GAP;
    int width = (int)(right_x + RIGHT_W + MARGIN);
    double legend_top = sc.y0 + sc.disp_h + 30;
    double left_h = sc.disp_h + 30 + 58;
    double right_h = sc.n_panels > 0 ? panel_rows(&sc) * PANEL_MIN_H : PANEL_MIN_H;
    double body_h = fmax(left_h, right_h);
    double footer_y = sc.y0 + body_h + 14;
    int height = (int)(footer_y + 40);

    st = rp_canvas_init(&cv, width, height, err);
    if (st != SW_OK)
        goto out;
    if (info) {
        memset(info, 0, sizeof *info);
        cv.log = info;
    }

    /* header */
    compose_title(labels, title, sizeof title);
    double date_w = 0;
    if (labels && labels->date && labels->date[0])
        date_w = rp_text(&cv, width - MARGIN, y_title, F_DATE, ink2, RP_RIGHT, RP_ROLE_TITLE,
                         labels->date);
    rp_text_fit(&cv, MARGIN, y_title, F_TITLE, ink, RP_LEFT, RP_ROLE_TITLE,
                width - 2 * MARGIN - date_w - 24, title);
    compose_subtitle(&sc, labels, sub, sizeof sub);
    rp_text_fit(&cv, MARGIN, y_sub, F_SUB, ink2, RP_LEFT, RP_ROLE_TITLE, width - 2 * MARGIN, sub);
    for (int i = 0; i < n_lines; i++) {
        double y = y_res + i * res_h;
        if (lines[i].chip)
            result_line(&cv, MARGIN, y, width - 2 * MARGIN, lines[i].v, lines[i].measured,
                        lines[i].main, lines[i].rest);
        else
            rp_text_fit(&cv, MARGIN, y, F_REST, ink2, RP_LEFT, RP_ROLE_RESULT, width - 2 * MARGIN,
                        lines[i].rest);
    }
    if (n_lines == 0)
        rp_text(&cv, MARGIN, y_res, F_REST, ink2, RP_LEFT, RP_ROLE_NOTE,
                "No thickness or position measurement on this slice.");
    rule(cv.cr, MARGIN, width - MARGIN, header_h + 2);

    /* body */
    st = rp_image_surface(img, sc.lo, sc.hi, &surf, err);
    if (st != SW_OK)
        goto out;
    draw_view(&cv, &sc, surf, sc.x0, sc.y0, sc.disp_w, sc.disp_h, 1);
    snprintf(buf, sizeof buf,
             "Window %.4g\xE2\x80\x93%.4g (0.5\xE2\x80\x93"
             "99.5 percentile) \xC2\xB7 %d \xC3\x97 %d px"
             " of %.3g \xC3\x97 %.3g mm \xC2\xB7 shown as stored, \xC3\x97%.3g",
             sc.lo, sc.hi, img->width, img->height, img->col_mm, img->row_mm, sc.sx);
    rp_text_fit(&cv, MARGIN, sc.y0 + sc.disp_h + 17, F_SMALL, ink2, RP_LEFT, RP_ROLE_LABEL, left_w,
                buf);
    draw_legend(&cv, &sc, MARGIN, legend_top, left_w);
    double used = draw_panels(&cv, &sc, right_x, sc.y0, RIGHT_W, body_h);
    if (!sc.th && body_h - used >= 260)
        draw_bar_inset(&cv, &sc, surf, right_x + 62, sc.y0 + used + 8,
                       fmin(RIGHT_W - 74, body_h - used - 40));

    /* footer */
    rule(cv.cr, MARGIN, width - MARGIN, footer_y);
    rp_text(&cv, MARGIN, footer_y + 24, F_SMALL, ink2, RP_LEFT, RP_ROLE_FOOTER, NOTICE);
    rp_text(&cv, width - MARGIN, footer_y + 24, F_SMALL, ink2, RP_RIGHT, RP_ROLE_FOOTER,
            "slicewarden " SW_VERSION);

    if (cairo_status(cv.cr) != CAIRO_STATUS_SUCCESS) {
        st = sw_error_set(err, SW_ENOMEM, "report: %s: drawing failed: %s", path,
                          cairo_status_to_string(cairo_status(cv.cr)));
        goto out;
    }
    desc[0] = '\0';
    join(desc, sizeof desc, "; ", sub);
    for (int i = 0; i < n_lines; i++) {
        char one[2 * RP_TEXT_LEN + 24];
        if (lines[i].chip)
            snprintf(one, sizeof one, "%s: %s%s%s",
                     rp_verdict_word(lines[i].measured ? lines[i].v : AN_UNMEASURABLE),
                     lines[i].main, lines[i].rest[0] ? ", " : "", lines[i].rest);
        else
            sw_strlcpy(one, lines[i].rest, sizeof one);
        join(desc, sizeof desc, "; ", one);
    }
    rp_png_meta meta = {.title = title, .description = desc, .disclaimer = NOTICE};
    st = rp_canvas_write_png(&cv, path, &meta, err);
    if (st != SW_OK)
        goto out;
    if (info) {
        info->width = width;
        info->height = height;
        info->image_x0 = sc.x0;
        info->image_y0 = sc.y0;
        info->scale_x = sc.sx;
        info->scale_y = sc.sy;
        info->nearest = sc.nearest;
        info->window_lo = sc.lo;
        info->window_hi = sc.hi;
    }
out:
    if (surf)
        cairo_surface_destroy(surf);
    rp_canvas_free(&cv);
    return st;
}

int rp_slices_to_annotate(const an_series_result *r, int *idx, int max)
{
    int cand[3][2], n = 0, out = 0; /* (slice, image) */
    if (!r || !idx || max < 1 || r->n_images < 1 || r->n_images > AN_MAX_IMAGES)
        return 0;
    if (placed(r->thickness.slice, r->thickness.image, r))
        cand[n][0] = r->thickness.slice, cand[n][1] = r->thickness.image, n++;
    for (int k = 0; k < 2; k++)
        if (placed(r->position[k].slice, r->position[k].image, r))
            cand[n][0] = r->position[k].slice, cand[n][1] = r->position[k].image, n++;
    /* ascending slice, then image; each image once */
    for (int i = 1; i < n; i++)
        for (int j = i; j > 0 && (cand[j][0] < cand[j - 1][0] ||
                                  (cand[j][0] == cand[j - 1][0] && cand[j][1] < cand[j - 1][1]));
             j--) {
            int s0 = cand[j][0], s1 = cand[j][1];
            cand[j][0] = cand[j - 1][0];
            cand[j][1] = cand[j - 1][1];
            cand[j - 1][0] = s0;
            cand[j - 1][1] = s1;
        }
    for (int i = 0; i < n && out < max; i++) {
        int dup = 0;
        for (int j = 0; j < out; j++)
            dup |= idx[j] == cand[i][1];
        if (!dup)
            idx[out++] = cand[i][1];
    }
    return out;
}
