/* rp_int.h: report/'s internal drawing kit: palette, canvas with text log, plot frame, PNG output.
 * Shared by the slice images and (later) the trend charts; not part of the public API. */
#ifndef RP_INT_H
#define RP_INT_H

#include <cairo.h>

#include "report.h"

/* ---- palette (ours; hues spaced for colour-vision deficiencies, each verdict also printed) ----
 */
typedef struct rp_rgb {
    double r, g, b;
} rp_rgb;

#define RP_HEX(h)                                                                                  \
    ((rp_rgb){((h) >> 16 & 0xff) / 255.0, ((h) >> 8 & 0xff) / 255.0, ((h)&0xff) / 255.0})

/* Verdict colours (chips and result text accents). */
#define RP_C_PASS RP_HEX(0x1F6DB0)   /* blue */
#define RP_C_WARN RP_HEX(0xE59A1A)   /* orange */
#define RP_C_FAIL RP_HEX(0xC24A0E)   /* vermilion */
#define RP_C_UNMEAS RP_HEX(0x6B6B6B) /* grey */
/* Overlay colours on the greyscale image. */
#define RP_C_OUTLINE RP_HEX(0x5CB6E6) /* sky blue: phantom outline */
#define RP_C_STRIP RP_HEX(0xF0DE3C)   /* yellow: ramp strip line and band */
#define RP_C_CROSS RP_HEX(0x0FA57E)   /* bluish green: half-level (50 %) points */
#define RP_C_BAR RP_HEX(0xD584B8)     /* reddish purple: wedge bar, top to end */
/* Page and plots. */
#define RP_C_INK RP_HEX(0x1B1B1B)
#define RP_C_INK2 RP_HEX(0x555555) /* secondary text */
#define RP_C_RULE RP_HEX(0xC8C8C8) /* separators, plot frames */
#define RP_C_GRID RP_HEX(0xEBEBEB)
#define RP_C_PAGE RP_HEX(0xFFFFFF)
#define RP_C_PROFILE RP_HEX(0x1A4F86) /* measured profile curve */
#define RP_C_RAW RP_HEX(0x9A9A9A)     /* profile of an unmeasured part */
#define RP_C_LEVEL RP_HEX(0x9C5A00)   /* half level (dark orange, dashed) */
#define RP_C_PLATEAU RP_HEX(0x555555) /* plateau / far levels (grey, dashed) */

rp_rgb rp_verdict_colour(an_verdict v);
/* Text colour that reads on a chip of colour bg (black or white, whichever contrasts more). */
rp_rgb rp_text_on(rp_rgb bg);
/* WCAG 2.x relative luminance of an sRGB colour, and the contrast ratio of two colours. */
double rp_luminance(rp_rgb c);
double rp_contrast(rp_rgb a, rp_rgb b);

/* ---- canvas: an ARGB32 cairo surface, a context, and the log of the text drawn ---- */
typedef struct rp_canvas {
    cairo_surface_t *surface;
    cairo_t *cr;
    int width, height;
    rp_slice_info *log; /* may be NULL; receives every text line drawn */
} rp_canvas;

/* Makes a w x h canvas painted with the page colour. On success cv owns a surface and a context
 * (release with rp_canvas_free); on failure cv holds nothing. */
sw_status rp_canvas_init(rp_canvas *cv, int w, int h, sw_error *err);
void rp_canvas_free(rp_canvas *cv); /* accepts a zeroed or freed canvas */

/* Encodes the canvas as an 8-bit RGB PNG with tEXt chunks (Software, Title, Description,
 * Disclaimer; NULL ones are left out) and writes it atomically to path. */
typedef struct rp_png_meta {
    const char *title, *description, *disclaimer;
} rp_png_meta;
sw_status rp_canvas_write_png(rp_canvas *cv, const char *path, const rp_png_meta *meta,
                              sw_error *err);

/* ---- text ---- */
typedef enum rp_align { RP_LEFT = 0, RP_CENTRE, RP_RIGHT } rp_align;
typedef struct rp_font {
    double size; /* px */
    int bold;
} rp_font;

#define RP_FONT_FAMILY "DejaVu Sans"

/* Width of s in font f. */
double rp_text_width(rp_canvas *cv, rp_font f, const char *s);
/* Draws s with its baseline at y, aligned on x; logs it with role. Returns the width drawn. */
double rp_text(rp_canvas *cv, double x, double y, rp_font f, rp_rgb c, rp_align a,
               rp_text_role role, const char *s);
/* Like rp_text, but shortens s with an ellipsis to fit max_w. */
double rp_text_fit(rp_canvas *cv, double x, double y, rp_font f, rp_rgb c, rp_align a,
                   rp_text_role role, double max_w, const char *s);
/* Draws s word-wrapped into lines of at most max_w, line_h apart, the first baseline at y; the last
 * of max_lines takes the rest, shortened. Returns the number of lines drawn. */
int rp_text_wrap(rp_canvas *cv, double x, double y, rp_font f, rp_rgb c, rp_align a,
                 rp_text_role role, double max_w, double line_h, int max_lines, const char *s);
/* A rounded chip with the verdict's word; returns its width. */
double rp_verdict_chip(rp_canvas *cv, double x, double baseline, rp_font f, an_verdict v);

/* ---- shapes ---- */
typedef enum rp_marker {
    RP_MARK_DIAMOND = 0,
    RP_MARK_CIRCLE,
    RP_MARK_SQUARE,
    RP_MARK_CROSS,
    RP_MARK_OPEN_DIAMOND, /* outline only: the image stays visible inside */
} rp_marker;
/* A marker of half size s centred on (x, y): filled with a dark rim, or (open) a coloured outline
 * over a dark halo, for contrast on any background. */
void rp_draw_marker(cairo_t *cr, double x, double y, double s, rp_marker m, rp_rgb c);
/* A line drawn over a wider dark halo, so that it reads on both black and white. */
void rp_draw_halo_line(cairo_t *cr, double x0, double y0, double x1, double y1, double w, rp_rgb c,
                       int dashed);

/* ---- plot frame: data coordinates mapped into a device rectangle ---- */
typedef struct rp_plot {
    rp_canvas *cv;
    double x, y, w, h;     /* data area in device px */
    double x0, x1, y0, y1; /* data range shown */
} rp_plot;

/* Picks about target ticks in [lo, hi] with steps 1, 2 or 5 x 10^k. Sets *first and *step and
 * returns the tick count (0 if the range is empty or not finite). */
int rp_nice_ticks(double lo, double hi, int target, double *first, double *step);
/* Widens [*lo, *hi] outward to whole steps of a nice tick spacing (a zero-width range is opened).
 */
void rp_nice_range(double *lo, double *hi, int target);

void rp_plot_init(rp_plot *p, rp_canvas *cv, double x, double y, double w, double h, double x0,
                  double x1, double y0, double y1);
double rp_plot_px(const rp_plot *p, double xv);
double rp_plot_py(const rp_plot *p, double yv);
/* Frame, grid, ticks with labels, axis titles (either may be NULL). */
void rp_plot_axes(rp_plot *p, const char *xlabel, const char *ylabel);
/* Polyline through (x[i], y[i]); non-finite points break the line. Clipped to the frame. */
void rp_plot_line(rp_plot *p, const double *x, const double *y, int n, rp_rgb c, double width);
/* Polyline through samples v[i] at start + i * step. */
void rp_plot_samples(rp_plot *p, double start, double step, const float *v, int n, rp_rgb c,
                     double width);
/* Horizontal / vertical reference lines, optionally dashed, with an optional label at the right
 * end (hline) or the top (vline). */
void rp_plot_hline(rp_plot *p, double yv, rp_rgb c, double width, int dashed, const char *label);
void rp_plot_vline(rp_plot *p, double xv, rp_rgb c, double width, int dashed, const char *label);
void rp_plot_marker(rp_plot *p, double xv, double yv, rp_marker m, double s, rp_rgb c);
/* A double-headed arrow from xa to xb at yv, with label centred above it. */
void rp_plot_span(rp_plot *p, double xa, double xb, double yv, rp_rgb c, const char *label);
/* A note centred in the frame (for example "not measured: reason"). */
void rp_plot_note(rp_plot *p, rp_rgb c, const char *text);

/* ---- image ---- */
/* The 0.5 and 99.5 percentiles (fractions q_lo, q_hi) of the finite pixels of img. */
sw_status rp_window(const an_image *img, double q_lo, double q_hi, double *lo, double *hi,
                    sw_error *err);
/* Checks an image view: sizes, stride, spacing, pointer. Names the image in err. */
sw_status rp_image_check(const an_image *img, sw_error *err);
/* A greyscale ARGB32 surface of img's stored pixels under the window; caller destroys it. */
sw_status rp_image_surface(const an_image *img, double lo, double hi, cairo_surface_t **out,
                           sw_error *err);

#endif
