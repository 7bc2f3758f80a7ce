/* draw.c: the drawing kit: palette, canvas and text log, markers, greyscale image, PNG output. */
#include <fontconfig/fontconfig.h>
#include <math.h>
#include <png.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "rp_int.h"

/* ---- palette ---- */

rp_rgb rp_verdict_colour(an_verdict v)
{
    switch (v) {
    case AN_PASS: return RP_C_PASS;
    case AN_WARN: return RP_C_WARN;
    case AN_FAIL: return RP_C_FAIL;
    case AN_UNMEASURABLE: break;
    }
    return RP_C_UNMEAS;
}

const char *rp_verdict_word(an_verdict v)
{
    switch (v) {
    case AN_PASS: return "PASS";
    case AN_WARN: return "WARN";
    case AN_FAIL: return "FAIL";
    case AN_UNMEASURABLE: break;
    }
    return "UNMEASURABLE";
}

static double lin(double c)
{
    return c <= 0.04045 ? c / 12.92 : pow((c + 0.055) / 1.055, 2.4);
}

double rp_luminance(rp_rgb c)
{
    return 0.2126 * lin(c.r) + 0.7152 * lin(c.g) + 0.0722 * lin(c.b);
}

double rp_contrast(rp_rgb a, rp_rgb b)
{
    double la = rp_luminance(a), lb = rp_luminance(b);
    return la > lb ? (la + 0.05) / (lb + 0.05) : (lb + 0.05) / (la + 0.05);
}

rp_rgb rp_text_on(rp_rgb bg)
{
    rp_rgb white = {1, 1, 1}, black = RP_C_INK;
    return rp_contrast(bg, white) >= rp_contrast(bg, black) ? white : black;
}

void rp_cleanup(void)
{
    cairo_debug_reset_static_data(); /* drops cairo's font faces, which hold fontconfig patterns */
    FcFini();
}

/* ---- canvas ---- */

sw_status rp_canvas_init(rp_canvas *cv, int w, int h, sw_error *err)
{
    sw_status st = SW_OK;
    cairo_font_options_t *fo = NULL;

    memset(cv, 0, sizeof *cv);
    /* cairo's image surfaces are limited to 32767 px a side. */
    if (w < 1 || h < 1 || w > 32767 || h > 32767) {
        st = sw_error_set(err, SW_EINVAL, "report: canvas of %d x %d px is out of range", w, h);
        goto out;
    }
    cv->surface = cairo_image_surface_create(CAIRO_FORMAT_ARGB32, w, h);
    if (cairo_surface_status(cv->surface) != CAIRO_STATUS_SUCCESS) {
        st = sw_error_set(err, SW_ENOMEM, "report: canvas of %d x %d px: %s", w, h,
                          cairo_status_to_string(cairo_surface_status(cv->surface)));
        goto out;
    }
    cv->cr = cairo_create(cv->surface);
    if (cairo_status(cv->cr) != CAIRO_STATUS_SUCCESS) {
        st = sw_error_set(err, SW_ENOMEM, "report: drawing context: %s",
                          cairo_status_to_string(cairo_status(cv->cr)));
        goto out;
    }
    cv->width = w;
    cv->height = h;
    /* Greyscale antialiasing: colour fringes of subpixel text would read as overlay colours. */
    fo = cairo_font_options_create();
    cairo_font_options_set_antialias(fo, CAIRO_ANTIALIAS_GRAY);
    cairo_font_options_set_hint_style(fo, CAIRO_HINT_STYLE_SLIGHT);
    cairo_font_options_set_hint_metrics(fo, CAIRO_HINT_METRICS_ON);
    cairo_set_font_options(cv->cr, fo);
    rp_rgb page = RP_C_PAGE;
    cairo_set_source_rgb(cv->cr, page.r, page.g, page.b);
    cairo_paint(cv->cr);
out:
    if (fo)
        cairo_font_options_destroy(fo);
    if (st != SW_OK)
        rp_canvas_free(cv);
    return st;
}

void rp_canvas_free(rp_canvas *cv)
{
    if (!cv)
        return;
    if (cv->cr)
        cairo_destroy(cv->cr);
    if (cv->surface)
        cairo_surface_destroy(cv->surface);
    cv->cr = NULL;
    cv->surface = NULL;
}

/* ---- PNG output (libpng into memory, then the atomic writer) ---- */

typedef struct png_sink {
    unsigned char *p;
    size_t n, cap;
    char msg[128]; /* libpng's complaint, if any */
} png_sink;

static void sink_write(png_structp png, png_bytep data, size_t len)
{
    png_sink *s = png_get_io_ptr(png);
    if (len > SIZE_MAX / 2 - s->n)
        png_error(png, "PNG larger than memory");
    if (s->n + len > s->cap) {
        size_t cap = s->cap ? s->cap : 65536;
        while (cap < s->n + len)
            cap *= 2;
        unsigned char *p = realloc(s->p, cap);
        if (!p)
            png_error(png, "out of memory");
        s->p = p;
        s->cap = cap;
    }
    memcpy(s->p + s->n, data, len);
    s->n += len;
}

static void sink_flush(png_structp png)
{
    (void)png;
}

static void png_fail(png_structp png, png_const_charp msg)
{
    png_sink *s = png_get_error_ptr(png);
    sw_strlcpy(s->msg, msg, sizeof s->msg);
    png_longjmp(png, 1);
}

static void png_quiet(png_structp png, png_const_charp msg)
{
    (void)png;
    (void)msg; /* library code never prints */
}

static int is_ascii(const char *s)
{
    for (; *s; s++)
        if ((unsigned char)*s >= 0x80)
            return 0;
    return 1;
}

static void set_text(png_text *t, int *n, const char *key, const char *value)
{
    if (!value || !*value)
        return;
    memset(&t[*n], 0, sizeof t[*n]);
    t[*n].compression = is_ascii(value) ? PNG_TEXT_COMPRESSION_NONE : PNG_ITXT_COMPRESSION_NONE;
    t[*n].key = (png_charp)key;
    t[*n].text = (png_charp)value;
    (*n)++;
}

/* The libpng calls; libpng reports errors by longjmp back here, and this returns -1. Nothing
 * changed after setjmp is read after a longjmp. */
static int png_body(png_structp png, png_infop info, rp_canvas *cv, png_sink *s, unsigned char *row,
                    png_text *text, int n_text)
{
    if (setjmp(png_jmpbuf(png)))
        return -1;
    png_set_write_fn(png, s, sink_write, sink_flush);
    /* Flat areas and straight lines dominate these images: the "up" filter and a fast zlib level
     * give files within a few per cent of the default's size in a fraction of the time, which
     * matters when a backlog of series is annotated. */
    png_set_filter(png, PNG_FILTER_TYPE_BASE, PNG_FILTER_UP);
    png_set_compression_level(png, 2);
    png_set_IHDR(png, info, (png_uint_32)cv->width, (png_uint_32)cv->height, 8, PNG_COLOR_TYPE_RGB,
                 PNG_INTERLACE_NONE, PNG_COMPRESSION_TYPE_DEFAULT, PNG_FILTER_TYPE_DEFAULT);
    png_set_sRGB_gAMA_and_cHRM(png, info, PNG_sRGB_INTENT_PERCEPTUAL);
    png_set_text(png, info, text, n_text);
    png_write_info(png, info);

    cairo_surface_flush(cv->surface);
    const unsigned char *data = cairo_image_surface_get_data(cv->surface);
    int stride = cairo_image_surface_get_stride(cv->surface);
    for (int y = 0; y < cv->height; y++) {
        const uint32_t *src = (const uint32_t *)(const void *)(data + (size_t)y * (size_t)stride);
        for (int x = 0; x < cv->width; x++) {
            /* Premultiplied ARGB over the white page: out = c + (255 - a). */
            uint32_t p = src[x];
            unsigned a = p >> 24;
            row[3 * x + 0] = (unsigned char)(((p >> 16) & 0xff) + (255 - a));
            row[3 * x + 1] = (unsigned char)(((p >> 8) & 0xff) + (255 - a));
            row[3 * x + 2] = (unsigned char)((p & 0xff) + (255 - a));
        }
        png_write_row(png, row);
    }
    png_write_end(png, info);
    return 0;
}

/* Encodes the canvas into s (which the caller frees). */
static sw_status encode_png(rp_canvas *cv, const rp_png_meta *meta, png_sink *s, sw_error *err)
{
    sw_status st = SW_OK;
    png_structp png = NULL;
    png_infop info = NULL;
    unsigned char *row = NULL;
    size_t row_bytes;
    png_text text[4];
    int n_text = 0;

    if (sw_mul_size((size_t)cv->width, 3, &row_bytes) != 0 || !(row = malloc(row_bytes))) {
        st = sw_error_set(err, SW_ENOMEM, "report: PNG row of %d px: out of memory", cv->width);
        goto out;
    }
    png = png_create_write_struct(PNG_LIBPNG_VER_STRING, s, png_fail, png_quiet);
    if (png)
        info = png_create_info_struct(png);
    if (!png || !info) {
        st = sw_error_set(err, SW_ENOMEM, "report: PNG encoder: out of memory");
        goto out;
    }
    set_text(text, &n_text, "Software", "slicewarden " SW_VERSION);
    if (meta) {
        set_text(text, &n_text, "Title", meta->title);
        set_text(text, &n_text, "Description", meta->description);
        set_text(text, &n_text, "Disclaimer", meta->disclaimer);
    }
    if (png_body(png, info, cv, s, row, text, n_text) != 0)
        st = sw_error_set(err, SW_ENOMEM, "report: PNG encoder: %s", s->msg);
out:
    if (png)
        png_destroy_write_struct(&png, info ? &info : NULL);
    free(row);
    return st;
}

sw_status rp_canvas_write_png(rp_canvas *cv, const char *path, const rp_png_meta *meta,
                              sw_error *err)
{
    png_sink s = {0};
    sw_status st = encode_png(cv, meta, &s, err);
    if (st == SW_OK)
        st = rp_atomic_write_file(path, s.p, s.n, err);
    free(s.p);
    return st;
}

/* ---- text ---- */

static void set_font(cairo_t *cr, rp_font f)
{
    cairo_select_font_face(cr, RP_FONT_FAMILY, CAIRO_FONT_SLANT_NORMAL,
                           f.bold ? CAIRO_FONT_WEIGHT_BOLD : CAIRO_FONT_WEIGHT_NORMAL);
    cairo_set_font_size(cr, f.size);
}

double rp_text_width(rp_canvas *cv, rp_font f, const char *s)
{
    cairo_text_extents_t te;
    set_font(cv->cr, f);
    cairo_text_extents(cv->cr, s, &te);
    return te.x_advance;
}

static void log_text(rp_canvas *cv, const char *s, rp_text_role role, double x, double y, double w,
                     double h)
{
    rp_slice_info *log = cv->log;
    if (!log)
        return;
    if (log->n_text >= RP_TEXT_MAX) {
        log->text_truncated = 1;
        return;
    }
    rp_text_item *t = &log->text[log->n_text++];
    sw_strlcpy(t->text, s, sizeof t->text);
    t->role = role;
    t->x = x;
    t->y = y;
    t->w = w;
    t->h = h;
}

double rp_text(rp_canvas *cv, double x, double y, rp_font f, rp_rgb c, rp_align a,
               rp_text_role role, const char *s)
{
    cairo_t *cr = cv->cr;
    cairo_font_extents_t fe;
    double w = rp_text_width(cv, f, s); /* also selects the font */
    cairo_font_extents(cr, &fe);
    double x0 = a == RP_LEFT ? x : a == RP_CENTRE ? x - w / 2 : x - w;
    cairo_set_source_rgb(cr, c.r, c.g, c.b);
    cairo_move_to(cr, x0, y);
    cairo_show_text(cr, s);
    cairo_new_path(cr);
    log_text(cv, s, role, x0, y - fe.ascent, w, fe.ascent + fe.descent);
    return w;
}

/* Cuts s at a UTF-8 character boundary so that s + "…" fits max_w; writes into buf. */
static const char *fit(rp_canvas *cv, rp_font f, double max_w, const char *s, char *buf, size_t n)
{
    if (rp_text_width(cv, f, s) <= max_w)
        return s;
    size_t len = sw_strlcpy(buf, s, n > 4 ? n - 4 : n);
    while (len > 0) {
        while (len > 0 && ((unsigned char)buf[len - 1] & 0xC0) == 0x80)
            len--; /* continuation bytes */
        if (len > 0)
            len--;                            /* the character's lead byte */
        memcpy(buf + len, "\xE2\x80\xA6", 4); /* U+2026 */
        if (rp_text_width(cv, f, buf) <= max_w)
            break;
    }
    if (len == 0)
        memcpy(buf, "\xE2\x80\xA6", 4);
    return buf;
}

double rp_text_fit(rp_canvas *cv, double x, double y, rp_font f, rp_rgb c, rp_align a,
                   rp_text_role role, double max_w, const char *s)
{
    char buf[RP_TEXT_LEN];
    return rp_text(cv, x, y, f, c, a, role, fit(cv, f, max_w, s, buf, sizeof buf));
}

int rp_text_wrap(rp_canvas *cv, double x, double y, rp_font f, rp_rgb c, rp_align a,
                 rp_text_role role, double max_w, double line_h, int max_lines, const char *s)
{
    char line[RP_TEXT_LEN];
    int lines = 0;
    const char *p = s;

    while (lines < max_lines) {
        while (*p == ' ')
            p++;
        if (!*p)
            break;
        if (lines == max_lines - 1) { /* the last line takes the rest, shortened if need be */
            rp_text_fit(cv, x, y + lines * line_h, f, c, a, role, max_w, p);
            lines++;
            break;
        }
        /* The longest run of whole words from p that fits; at least one word. */
        const char *end = NULL, *q = p;
        while (*q) {
            const char *w = q;
            while (*w && *w != ' ')
                w++;
            size_t take = (size_t)(w - p);
            if (take >= sizeof line)
                break;
            memcpy(line, p, take);
            line[take] = '\0';
            if (end && rp_text_width(cv, f, line) > max_w)
                break;
            end = w;
            q = w;
            while (*q == ' ')
                q++;
        }
        if (!end) { /* a first word longer than a line buffer */
            end = p;
            while (*end && *end != ' ')
                end++;
        }
        size_t take = (size_t)(end - p) < sizeof line ? (size_t)(end - p) : sizeof line - 1;
        memcpy(line, p, take);
        line[take] = '\0';
        rp_text_fit(cv, x, y + lines * line_h, f, c, a, role, max_w, line);
        lines++;
        p = end;
    }
    return lines;
}

static void rounded_rect(cairo_t *cr, double x, double y, double w, double h, double r)
{
    cairo_new_sub_path(cr);
    cairo_arc(cr, x + w - r, y + r, r, -M_PI / 2, 0);
    cairo_arc(cr, x + w - r, y + h - r, r, 0, M_PI / 2);
    cairo_arc(cr, x + r, y + h - r, r, M_PI / 2, M_PI);
    cairo_arc(cr, x + r, y + r, r, M_PI, 3 * M_PI / 2);
    cairo_close_path(cr);
}

double rp_verdict_chip(rp_canvas *cv, double x, double baseline, rp_font f, an_verdict v)
{
    cairo_t *cr = cv->cr;
    cairo_font_extents_t fe;
    const char *word = rp_verdict_word(v);
    rp_rgb bg = rp_verdict_colour(v);
    double w = rp_text_width(cv, f, word);
    cairo_font_extents(cr, &fe);
    double pad = 0.6 * f.size, top = baseline - fe.ascent - 3, h = fe.ascent + fe.descent + 6;
    rounded_rect(cr, x, top, w + 2 * pad, h, 4);
    cairo_set_source_rgb(cr, bg.r, bg.g, bg.b);
    cairo_fill(cr);
    rp_text(cv, x + pad, baseline, f, rp_text_on(bg), RP_LEFT, RP_ROLE_VERDICT, word);
    return w + 2 * pad;
}

/* ---- shapes ---- */

void rp_draw_marker(cairo_t *cr, double x, double y, double s, rp_marker m, rp_rgb c)
{
    cairo_save(cr);
    cairo_new_path(cr);
    switch (m) {
    case RP_MARK_OPEN_DIAMOND:
    case RP_MARK_DIAMOND:
        cairo_move_to(cr, x, y - s);
        cairo_line_to(cr, x + s, y);
        cairo_line_to(cr, x, y + s);
        cairo_line_to(cr, x - s, y);
        cairo_close_path(cr);
        break;
    case RP_MARK_CIRCLE: cairo_arc(cr, x, y, s, 0, 2 * M_PI); break;
    case RP_MARK_SQUARE: cairo_rectangle(cr, x - s, y - s, 2 * s, 2 * s); break;
    case RP_MARK_CROSS: {
        double t = s / 3;
        cairo_move_to(cr, x - t, y - s);
        cairo_line_to(cr, x + t, y - s);
        cairo_line_to(cr, x + t, y - t);
        cairo_line_to(cr, x + s, y - t);
        cairo_line_to(cr, x + s, y + t);
        cairo_line_to(cr, x + t, y + t);
        cairo_line_to(cr, x + t, y + s);
        cairo_line_to(cr, x - t, y + s);
        cairo_line_to(cr, x - t, y + t);
        cairo_line_to(cr, x - s, y + t);
        cairo_line_to(cr, x - s, y - t);
        cairo_line_to(cr, x - t, y - t);
        cairo_close_path(cr);
        break;
    }
    }
    if (m == RP_MARK_OPEN_DIAMOND) {
        cairo_set_line_join(cr, CAIRO_LINE_JOIN_MITER);
        cairo_set_source_rgba(cr, 0, 0, 0, 0.7);
        cairo_set_line_width(cr, 4.0);
        cairo_stroke_preserve(cr);
        cairo_set_source_rgb(cr, c.r, c.g, c.b);
        cairo_set_line_width(cr, 2.0);
        cairo_stroke(cr);
    } else {
        cairo_set_source_rgb(cr, c.r, c.g, c.b);
        cairo_fill_preserve(cr);
        cairo_set_source_rgba(cr, 0, 0, 0, 0.85);
        cairo_set_line_width(cr, 1.0);
        cairo_stroke(cr);
    }
    cairo_restore(cr);
}

void rp_draw_halo_line(cairo_t *cr, double x0, double y0, double x1, double y1, double w, rp_rgb c,
                       int dashed)
{
    static const double dash[] = {6.0, 4.0};
    cairo_save(cr);
    cairo_set_line_cap(cr, CAIRO_LINE_CAP_BUTT);
    if (dashed)
        cairo_set_dash(cr, dash, 2, 0);
    cairo_move_to(cr, x0, y0);
    cairo_line_to(cr, x1, y1);
    cairo_set_source_rgba(cr, 0, 0, 0, 0.65);
    cairo_set_line_width(cr, w + 2.0);
    cairo_stroke_preserve(cr);
    cairo_set_source_rgb(cr, c.r, c.g, c.b);
    cairo_set_line_width(cr, w);
    cairo_stroke(cr);
    cairo_restore(cr);
}

/* ---- image ---- */

sw_status rp_image_check(const an_image *img, sw_error *err)
{
    size_t n;
    if (!img || !img->px)
        return sw_error_set(err, SW_EINVAL, "report: image: no pixels");
    /* Sizes come from file headers: keep them within what a slice image can be and what cairo
     * can hold, and check the stride arithmetic before any pixel is touched. */
    if (img->width < 1 || img->height < 1 || img->width > 16384 || img->height > 16384)
        return sw_error_set(err, SW_EINVAL, "report: image of %d x %d px is out of range",
                            img->width, img->height);
    if (img->stride < img->width ||
        sw_mul_size((size_t)img->stride, (size_t)img->height, &n) != 0 || n > PTRDIFF_MAX / 4)
        return sw_error_set(err, SW_EINVAL, "report: image stride %td for width %d is invalid",
                            img->stride, img->width);
    if (!(img->col_mm > 0 && img->row_mm > 0 && isfinite(img->col_mm) && isfinite(img->row_mm)))
        return sw_error_set(err, SW_EINVAL, "report: image pixel spacing %g x %g mm is invalid",
                            img->row_mm, img->col_mm);
    return SW_OK;
}

static void swap(float *a, float *b)
{
    float t = *a;
    *a = *b;
    *b = t;
}

/* Hoare selection: on return a[k] is the k-th smallest and a[i] <= a[k] <= a[j] for i < k < j. */
static void select_k(float *a, size_t n, size_t k)
{
    size_t lo = 0, hi = n - 1;
    while (lo < hi) {
        size_t mid = lo + (hi - lo) / 2;
        /* median of three as the pivot */
        if (a[mid] < a[lo])
            swap(&a[mid], &a[lo]);
        if (a[hi] < a[lo])
            swap(&a[hi], &a[lo]);
        if (a[hi] < a[mid])
            swap(&a[hi], &a[mid]);
        float pivot = a[mid];
        size_t i = lo, j = hi;
        for (;;) {
            while (a[i] < pivot)
                i++;
            while (pivot < a[j])
                j--;
            if (i >= j)
                break;
            swap(&a[i], &a[j]);
            i++;
            j--;
        }
        /* a[lo..j] <= pivot <= a[j+1..hi] */
        if (k <= j)
            hi = j;
        else
            lo = j + 1;
    }
}

/* The q-quantile of a (n finite values, reordered) with linear interpolation between order
 * statistics at q (n - 1), the definition numpy.percentile uses by default. */
static double quantile(float *a, size_t n, double q)
{
    double pos = q * (double)(n - 1);
    size_t k = (size_t)floor(pos);
    if (k >= n - 1)
        k = n - 1;
    select_k(a, n, k);
    double lo = a[k], frac = pos - (double)k;
    if (k + 1 >= n || frac <= 0)
        return lo;
    float next = a[k + 1];
    for (size_t i = k + 2; i < n; i++)
        if (a[i] < next)
            next = a[i];
    return lo + frac * (next - lo);
}

sw_status rp_window(const an_image *img, double q_lo, double q_hi, double *lo, double *hi,
                    sw_error *err)
{
    sw_status st = SW_OK;
    float *a = NULL;
    size_t n = 0, cap;

    st = rp_image_check(img, err);
    if (st != SW_OK)
        goto out;
    if (!(q_lo >= 0 && q_lo < q_hi && q_hi <= 1)) {
        st =
            sw_error_set(err, SW_EINVAL, "report: window quantiles %g..%g are invalid", q_lo, q_hi);
        goto out;
    }
    sw_mul_size((size_t)img->width, (size_t)img->height, &cap); /* bounded by rp_image_check */
    a = malloc(cap * sizeof *a);
    if (!a) {
        st = sw_error_set(err, SW_ENOMEM, "report: window: out of memory");
        goto out;
    }
    for (int y = 0; y < img->height; y++) {
        const float *row = img->px + (ptrdiff_t)y * img->stride;
        for (int x = 0; x < img->width; x++)
            if (isfinite(row[x]))
                a[n++] = row[x];
    }
    if (n == 0) {
        *lo = 0;
        *hi = 1;
        goto out;
    }
    double h = quantile(a, n, q_hi);
    double l = quantile(a, n, q_lo);
    if (!(h > l)) { /* a flat image: show it mid-grey rather than divide by zero */
        l -= 0.5;
        h = l + 1.0;
    }
    *lo = l;
    *hi = h;
out:
    free(a);
    return st;
}

sw_status rp_image_surface(const an_image *img, double lo, double hi, cairo_surface_t **out,
                           sw_error *err)
{
    sw_status st = SW_OK;
    cairo_surface_t *s = NULL;

    *out = NULL;
    st = rp_image_check(img, err);
    if (st != SW_OK)
        goto out;
    s = cairo_image_surface_create(CAIRO_FORMAT_RGB24, img->width, img->height);
    if (cairo_surface_status(s) != CAIRO_STATUS_SUCCESS) {
        st = sw_error_set(err, SW_ENOMEM, "report: image surface: %s",
                          cairo_status_to_string(cairo_surface_status(s)));
        goto out;
    }
    cairo_surface_flush(s);
    unsigned char *data = cairo_image_surface_get_data(s);
    int stride = cairo_image_surface_get_stride(s);
    double scale = hi > lo ? 255.0 / (hi - lo) : 0;
    for (int y = 0; y < img->height; y++) {
        const float *src = img->px + (ptrdiff_t)y * img->stride;
        uint32_t *dst = (uint32_t *)(void *)(data + (size_t)y * (size_t)stride);
        for (int x = 0; x < img->width; x++) {
            double g = isfinite(src[x]) ? (src[x] - lo) * scale : 0;
            unsigned v = g <= 0 ? 0 : g >= 255 ? 255 : (unsigned)lround(g);
            dst[x] = 0xff000000u | v << 16 | v << 8 | v;
        }
    }
    cairo_surface_mark_dirty(s);
    *out = s;
    s = NULL;
out:
    if (s)
        cairo_surface_destroy(s);
    return st;
}
