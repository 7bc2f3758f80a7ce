/* test_report.c: annotated slice PNGs read back with libpng and an independent decoder; the atomic
 * writer's success and failure paths; palette contrast and colour-vision checks; plot ticks. */
#include <cairo-ft.h>
#include <criterion/criterion.h>
#include <dirent.h>
#include <errno.h>
#include <ft2build.h>
#include FT_FREETYPE_H
#include <math.h>
#include <png.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "report.h"
#include "rp_int.h"

/* ---- scratch folder per test (Criterion runs each test in its own process) ---- */

static char tmpdir[512];

static void rm_tree(const char *dir)
{
    DIR *d = opendir(dir);
    struct dirent *e;
    char p[1024];
    if (!d)
        return;
    while ((e = readdir(d))) {
        if (!strcmp(e->d_name, ".") || !strcmp(e->d_name, ".."))
            continue;
        snprintf(p, sizeof p, "%s/%s", dir, e->d_name);
        struct stat st;
        if (lstat(p, &st) == 0 && S_ISDIR(st.st_mode))
            rm_tree(p);
        else
            unlink(p);
    }
    closedir(d);
    rmdir(dir);
}

static void setup(void)
{
    snprintf(tmpdir, sizeof tmpdir, "%s/report-test-XXXXXX", SW_BINARY_DIR);
    cr_assert_not_null(mkdtemp(tmpdir), "mkdtemp: %s", strerror(errno));
}

static void teardown(void)
{
    rp_cleanup();
    if (!getenv("RP_KEEP"))
        rm_tree(tmpdir);
}

static void path_in(char *buf, size_t n, const char *name)
{
    snprintf(buf, n, "%s/%s", tmpdir, name);
}

static int count_entries(const char *dir)
{
    DIR *d = opendir(dir);
    struct dirent *e;
    int n = 0;
    if (!d)
        return -1;
    while ((e = readdir(d)))
        if (strcmp(e->d_name, ".") && strcmp(e->d_name, ".."))
            n++;
    closedir(d);
    return n;
}

static char *slurp(const char *path, size_t *n)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return NULL;
    fseek(f, 0, SEEK_END);
    long len = ftell(f);
    fseek(f, 0, SEEK_SET);
    char *b = malloc((size_t)len + 1);
    *n = fread(b, 1, (size_t)len, f);
    b[*n] = '\0';
    fclose(f);
    return b;
}

/* ---- a synthetic phantom image and a hand-filled result (no analysis involved) ---- */

#define W 256
#define H 256
#define PX 0.9765625 /* 250 mm / 256 */
#define CX 127.5
#define CY 127.5

static float pix[W * H];

/* phantom frame (u right, v up, mm) to stored pixels */
static an_point to_px(double u, double v)
{
    return (an_point){CX + u / PX, CY - v / PX};
}

/* Deterministic noise so that the window sees a realistic spread. */
static double noise(unsigned *s)
{
    *s = *s * 1664525u + 1013904223u;
    return ((*s >> 8) / 16777216.0 - 0.5) * 20.0;
}

static void make_image(an_image *img)
{
    unsigned seed = 12345;
    for (int y = 0; y < H; y++)
        for (int x = 0; x < W; x++) {
            double u = (x - CX) * PX, v = (CY - y) * PX;
            double s = hypot(u, v) <= 95 ? 1000 : 15;
            if (fabs(u) <= 70 && fabs(v) <= 10)
                s = 15; /* insert */
            if (fabs(u) <= 25 && ((v >= 1.5 && v <= 5.5) || (v >= -5.5 && v <= -1.5)))
                s = 200; /* strips */
            if (fabs(u) <= 15 && v >= 80 && v <= 95)
                s = 15; /* bridge */
            if (((u >= -6 && u <= -1) || (u >= 1 && u <= 6)) && v >= 65 && v <= 80)
                s = 15; /* bars */
            pix[y * W + x] = (float)(s + noise(&seed));
        }
    /* a lone bright pixel in the air, to locate the displayed image independently */
    pix[240 * W + 12] = 5000.0f;
    memset(img, 0, sizeof *img);
    img->px = pix;
    img->width = W;
    img->height = H;
    img->stride = W;
    img->col_mm = img->row_mm = PX;
    img->nominal_thickness_mm = 5.0;
}

/* Profile with edges at lo and hi (mm) blurred over sd: level between, base outside. */
static void edge_profile(an_profile *p, double start, double step, int n, double lo, double hi,
                         double level, double base, double sd)
{
    p->n = n;
    p->start_mm = start;
    p->step_mm = step;
    for (int i = 0; i < n; i++) {
        double x = start + i * step;
        double f = 0.5 * (erf((x - lo) / sd) - erf((x - hi) / sd));
        p->v[i] = (float)(base + (level - base) * f);
    }
}

static void make_strip(an_strip *s, double v_mm, double length)
{
    memset(s, 0, sizeof *s);
    s->measured = 1;
    s->length_mm = length;
    s->length_unc_mm = 0.31;
    s->fwtm_mm = length * 1.22;
    s->plateau = 200;
    s->plateau_sd = 4;
    s->half_level = 100;
    s->floor = 0;
    s->half_width_mm = 1.5;
    s->line0 = to_px(-60, v_mm);
    s->line1 = to_px(60, v_mm);
    s->cross_lo_mm = -length / 2;
    s->cross_hi_mm = length / 2;
    s->cross_lo = to_px(-length / 2, v_mm);
    s->cross_hi = to_px(length / 2, v_mm);
    edge_profile(&s->profile, -60, 0.15, 801, -length / 2, length / 2, 200, 0, 1.5);
}

static void make_bar(an_bar *b, double u_mm, double length)
{
    memset(b, 0, sizeof *b);
    b->measured = 1;
    b->length_mm = length;
    b->unc_mm = 0.2;
    b->top = to_px(u_mm, 80);
    b->end = to_px(u_mm, 80 - length);
    b->level_hi = 1000;
    b->level_lo = 15;
    /* from 3 mm above the top (in the bridge) down to 30 mm below it */
    edge_profile(&b->profile, -3, 0.1, 331, length, 1e9, 1000, 15, 2.0);
}

static an_series_result *make_result(void)
{
    an_series_result *r = calloc(1, sizeof *r);
    cr_assert_not_null(r);
    r->n_images = 11;
    for (int i = 0; i < 11; i++) {
        r->ordinal[i] = i + 1;
        r->phantom[i] = (an_phantom_fit){.found = 1, .centre = {CX, CY}, .radius_mm = 95.0};
    }
    r->rotation_deg = 0.2;
    r->noise_sd = 5;
    r->snr = 200;
    an_thickness *t = &r->thickness;
    t->measured = 1;
    t->slice = 1;
    t->image = 0;
    make_strip(&t->top, 3.5, 50.0);
    make_strip(&t->bottom, -3.5, 50.0);
    t->top_thickness_mm = t->bottom_thickness_mm = 5.0;
    t->acr_mm = 5.0;
    t->corrected_mm = 5.0;
    t->tilt_deg = 0.0;
    t->tilt_unc_deg = 0.2;
    t->uncertainty_mm = 0.05;
    t->nominal_mm = 5.0;
    t->limit_lo_mm = 4.3;
    t->limit_hi_mm = 5.7;
    t->fwtm_mm = 6.1;
    edge_profile(&t->zprofile, -7.5, 0.05, 301, -2.5, 2.5, 1.0, 0.0, 0.6);
    t->verdict = AN_PASS;
    for (int k = 0; k < 2; k++) {
        an_position *p = &r->position[k];
        p->measured = 1;
        p->slice = k == 0 ? 1 : 11;
        p->image = k == 0 ? 0 : 10;
        make_bar(&p->left, -3.5, 15.0);
        make_bar(&p->right, 3.5, 15.0);
        p->bar_difference_mm = 0;
        p->uncertainty_mm = 0.28;
        p->ramp_displacement_mm = k == 0 ? 0.02 : NAN;
        p->ramp_displacement_unc_mm = k == 0 ? 0.1 : NAN;
        p->limit_mm = 5.0;
        p->verdict = AN_PASS;
    }
    r->position_model = (an_position_model){1, 0.1, 0.05, 0.2, 0.1};
    r->verdict = AN_PASS;
    return r;
}

static const rp_labels LABELS = {.scanner = "ALDMR1",
                                 .series = "7",
                                 .description = "ACR T1 axial (Slicewarden Simulator SW-SIM 1.5T)",
                                 .date = "2024-03-05 08:14",
                                 .echo = 1};

/* ---- PNG read-back with libpng ---- */

typedef struct png_img {
    int w, h;
    unsigned char *rgb; /* w * h * 3 */
    char software[64];
} png_img;

static int read_png(const char *path, png_img *out)
{
    FILE *f = fopen(path, "rb");
    memset(out, 0, sizeof *out);
    if (!f)
        return -1;
    png_structp png = png_create_read_struct(PNG_LIBPNG_VER_STRING, NULL, NULL, NULL);
    png_infop info = png_create_info_struct(png);
    if (setjmp(png_jmpbuf(png))) {
        png_destroy_read_struct(&png, &info, NULL);
        fclose(f);
        return -1;
    }
    png_init_io(png, f);
    png_read_info(png, info);
    out->w = (int)png_get_image_width(png, info);
    out->h = (int)png_get_image_height(png, info);
    cr_assert_eq(png_get_bit_depth(png, info), 8);
    cr_assert_eq(png_get_color_type(png, info), PNG_COLOR_TYPE_RGB);
    out->rgb = malloc((size_t)out->w * out->h * 3);
    for (int y = 0; y < out->h; y++)
        png_read_row(png, out->rgb + (size_t)y * out->w * 3, NULL);
    png_read_end(png, info);
    png_textp text;
    int n_text = 0;
    png_get_text(png, info, &text, &n_text);
    for (int i = 0; i < n_text; i++)
        if (!strcmp(text[i].key, "Software"))
            snprintf(out->software, sizeof out->software, "%s", text[i].text);
    png_destroy_read_struct(&png, &info, NULL);
    fclose(f);
    return 0;
}

static const unsigned char *at(const png_img *p, int x, int y)
{
    cr_assert(x >= 0 && y >= 0 && x < p->w && y < p->h, "pixel (%d, %d) outside", x, y);
    return p->rgb + ((size_t)y * p->w + x) * 3;
}

static int same_colour(const unsigned char *px, rp_rgb c, int tol)
{
    return abs(px[0] - (int)lround(c.r * 255)) <= tol &&
           abs(px[1] - (int)lround(c.g * 255)) <= tol && abs(px[2] - (int)lround(c.b * 255)) <= tol;
}

/* Is colour c found within rad px of (x, y)? */
static int colour_near(const png_img *p, double x, double y, int rad, rp_rgb c, int tol)
{
    for (int dy = -rad; dy <= rad; dy++)
        for (int dx = -rad; dx <= rad; dx++) {
            int X = (int)floor(x) + dx, Y = (int)floor(y) + dy;
            if (X >= 0 && Y >= 0 && X < p->w && Y < p->h && same_colour(at(p, X, Y), c, tol))
                return 1;
        }
    return 0;
}

/* An open diamond of half size 6 centred on (x, y): its left and right corners carry colour c,
 * its centre shows the image (not c). */
static int open_diamond_at(const png_img *p, double x, double y, rp_rgb c)
{
    return colour_near(p, x - 6, y, 1, c, 4) && colour_near(p, x + 6, y, 1, c, 4) &&
           colour_near(p, x, y - 6, 1, c, 4) && colour_near(p, x, y + 6, 1, c, 4) &&
           !colour_near(p, x, y, 1, c, 40);
}

/* Is there, within rad px of (x, y), a pixel that is colour c at coverage a >= min_a over black
 * (an antialiased thin line on a dark background)? */
static int colour_over_dark(const png_img *p, double x, double y, int rad, rp_rgb c, double min_a)
{
    double cv[3] = {c.r * 255, c.g * 255, c.b * 255};
    double cc = cv[0] * cv[0] + cv[1] * cv[1] + cv[2] * cv[2];
    for (int dy = -rad; dy <= rad; dy++)
        for (int dx = -rad; dx <= rad; dx++) {
            const unsigned char *px = at(p, (int)floor(x) + dx, (int)floor(y) + dy);
            double a = (px[0] * cv[0] + px[1] * cv[1] + px[2] * cv[2]) / cc, res = 0;
            for (int k = 0; k < 3; k++)
                res = fmax(res, fabs(px[k] - a * cv[k]));
            if (a >= min_a && a <= 1.05 && res <= 12)
                return 1;
        }
    return 0;
}

static const rp_text_item *find_text(const rp_slice_info *info, rp_text_role role,
                                     const char *needle)
{
    for (int i = 0; i < info->n_text; i++)
        if ((int)role < 0 || info->text[i].role == role)
            if (strstr(info->text[i].text, needle))
                return &info->text[i];
    return NULL;
}

/* Occurrences of needle in the notes, with wrapped lines joined again by spaces. */
static int count_in_notes(const rp_slice_info *info, const char *needle)
{
    static char all[RP_TEXT_MAX * (RP_TEXT_LEN + 1)];
    all[0] = '\0';
    for (int i = 0; i < info->n_text; i++)
        if (info->text[i].role == RP_ROLE_NOTE) {
            strcat(all, " ");
            strcat(all, info->text[i].text);
        }
    int n = 0;
    for (const char *p = strstr(all, needle); p; p = strstr(p + 1, needle))
        n++;
    return n;
}

static int count_text(const rp_slice_info *info, const char *needle)
{
    int n = 0;
    for (int i = 0; i < info->n_text; i++)
        n += strstr(info->text[i].text, needle) != NULL;
    return n;
}

/* Fraction of pixels in a text box that differ from the page white: glyphs were drawn. */
static double ink_fraction(const png_img *p, const rp_text_item *t)
{
    int ink = 0, n = 0;
    for (int y = (int)t->y; y < (int)(t->y + t->h); y++)
        for (int x = (int)t->x; x < (int)(t->x + t->w); x++) {
            const unsigned char *px = at(p, x, y);
            ink += px[0] + px[1] + px[2] < 3 * 200;
            n++;
        }
    return n ? (double)ink / n : 0;
}

static double disp_x(const rp_slice_info *i, double x)
{
    return i->image_x0 + (x + 0.5) * i->scale_x;
}

static double disp_y(const rp_slice_info *i, double y)
{
    return i->image_y0 + (y + 0.5) * i->scale_y;
}

static void render(const char *name, const an_image *img, int index, const an_series_result *r,
                   rp_slice_info *info, png_img *png)
{
    char path[1024];
    sw_error err;
    sw_error_clear(&err);
    path_in(path, sizeof path, name);
    sw_status st = rp_annotate_slice_png(path, img, index, r, &LABELS, info, &err);
    cr_assert_eq(st, SW_OK, "%s", err.msg);
    cr_assert_eq(read_png(path, png), 0, "libpng could not read %s", path);
}

TestSuite(report, .init = setup, .fini = teardown);

/* ---- the annotated ramp slice ---- */

Test(report, ramp_slice_layout_and_pixels)
{
    an_image img;
    make_image(&img);
    an_series_result *r = make_result();
    rp_slice_info *info = calloc(1, sizeof *info);
    png_img png;
    render("slice01.png", &img, 0, r, info, &png);

    /* the file is what the info says */
    cr_assert_eq(png.w, info->width);
    cr_assert_eq(png.h, info->height);
    cr_assert(png.w >= 1200 && png.w <= 2000 && png.h >= 800 && png.h <= 1400, "%d x %d", png.w,
              png.h);
    cr_assert_str_eq(png.software, "slicewarden " SW_VERSION);

    /* a 256-pixel image is enlarged x3 by pixel replication */
    cr_assert_eq(info->scale_x, 3.0);
    cr_assert_eq(info->scale_y, 3.0);
    cr_assert_eq(info->nearest, 1);

    /* Independent location of the image: the lone 5000 pixel lies above the 99.5 percentile, so
     * its 3 x 3 block is white, and the air around it (at most 15 + 10) is near black. */
    cr_assert(info->window_hi < 5000 && info->window_lo < 30);
    for (int dy = 0; dy < 3; dy++)
        for (int dx = 0; dx < 3; dx++) {
            const unsigned char *p =
                at(&png, (int)info->image_x0 + 12 * 3 + dx, (int)info->image_y0 + 240 * 3 + dy);
            cr_assert(p[0] == 255 && p[1] == 255 && p[2] == 255, "block pixel %d,%d = %d", dx, dy,
                      p[0]);
        }
    const unsigned char *dark =
        at(&png, (int)info->image_x0 + 14 * 3 + 1, (int)info->image_y0 + 240 * 3 + 1);
    cr_assert(dark[0] < 40 && dark[0] == dark[1] && dark[1] == dark[2], "air = %d", dark[0]);
    /* fluid (1000 +- 10) maps to the top of the window: a light grey */
    const unsigned char *fluid = at(&png, (int)disp_x(info, 100), (int)disp_y(info, 160));
    cr_assert(fluid[0] > 200 && fluid[0] == fluid[1], "fluid = %d", fluid[0]);

    /* overlay colours where the result puts them */
    rp_rgb cross = RP_C_CROSS, outline = RP_C_OUTLINE, strip = RP_C_STRIP, bar = RP_C_BAR;
    const an_strip *top = &r->thickness.top;
    cr_assert(
        open_diamond_at(&png, disp_x(info, top->cross_lo.x), disp_y(info, top->cross_lo.y), cross),
        "crossing marker missing at the low crossing");
    cr_assert(
        open_diamond_at(&png, disp_x(info, top->cross_hi.x), disp_y(info, top->cross_hi.y), cross),
        "crossing marker missing at the high crossing");
    /* the sampled line, half way between the low crossing and the line's start */
    double mx = (top->line0.x + top->cross_lo.x) / 2, my = top->line0.y;
    /* a 1 px dashed, antialiased line over the dark insert: its colour at partial coverage */
    cr_assert(colour_over_dark(&png, disp_x(info, mx), disp_y(info, my), 4, strip, 0.4));
    /* the phantom outline, 95 mm right of the centre */
    cr_assert(colour_near(&png, disp_x(info, CX + 95 / PX), disp_y(info, CY), 2, outline, 6),
              "phantom outline missing");
    /* bar ends: a 50 % marker at each; the bar line half way down */
    for (int k = 0; k < 2; k++) {
        const an_bar *b = k ? &r->position[0].right : &r->position[0].left;
        cr_assert(open_diamond_at(&png, disp_x(info, b->end.x), disp_y(info, b->end.y), cross));
        cr_assert(colour_near(&png, disp_x(info, b->top.x), disp_y(info, (b->top.y + b->end.y) / 2),
                              1, bar, 6));
    }
    /* nothing of the crossing colour far from any marker (centre of the phantom) */
    cr_assert(!colour_near(&png, disp_x(info, CX), disp_y(info, CY - 40 / PX), 6, cross, 10));

    /* the texts: results with uncertainty and verdict, profiles' widths, the footer */
    cr_assert_not_null(find_text(info, RP_ROLE_RESULT, "Slice thickness 5.00 \xC2\xB1 0.05 mm"));
    cr_assert_not_null(
        find_text(info, RP_ROLE_RESULT, "Bar length difference +0.00 \xC2\xB1 0.28 mm"));
    cr_assert_eq(count_text(info, "FWHM 50.00 \xC2\xB1 0.31 mm"), 2);
    cr_assert_eq(count_text(info, "length 15.00 \xC2\xB1 0.20 mm"), 2);
    cr_assert_eq(count_text(info, "end 15.00 mm"), 2);
    cr_assert_not_null(find_text(info, RP_ROLE_TITLE, "Slice profile from the ramps"));
    cr_assert_not_null(find_text(info, RP_ROLE_RESULT, "thickness 5.00 \xC2\xB1 0.05 mm"));
    cr_assert_eq(count_text(info, "PASS"), 2);
    cr_assert_not_null(find_text(info, RP_ROLE_FOOTER,
                                 "Supports, does not replace, review by a qualified medical "
                                 "physicist."));
    cr_assert_not_null(find_text(info, RP_ROLE_FOOTER, SW_VERSION));
    cr_assert_not_null(find_text(info, RP_ROLE_TITLE, "ALDMR1"));
    cr_assert_not_null(find_text(info, RP_ROLE_TITLE, "echo 1"));
    cr_assert_eq(info->text_truncated, 0);
    cr_assert_null(find_text(info, -1, "not measured"));
    cr_assert_null(find_text(info, -1, "enlarged")); /* no room for the inset on the ramp slice */

    /* every logged line lies on the canvas, is of a legible size, and has ink in its box */
    for (int i = 0; i < info->n_text; i++) {
        const rp_text_item *t = &info->text[i];
        cr_assert(t->x >= 0 && t->y >= 0 && t->x + t->w <= png.w && t->y + t->h <= png.h,
                  "text '%s' off the canvas", t->text);
        cr_assert(t->h >= 11.0, "text '%s' too small", t->text);
    }
    const rp_text_item *foot = find_text(info, RP_ROLE_FOOTER, "Supports");
    cr_assert(ink_fraction(&png, foot) > 0.05, "footer has no visible glyphs");
    free(png.rgb);
    free(info);
    free(r);
}

Test(report, wedge_slice_only_bars)
{
    an_image img;
    make_image(&img);
    an_series_result *r = make_result();
    rp_slice_info *info = calloc(1, sizeof *info);
    png_img png;
    render("slice11.png", &img, 10, r, info, &png);
    cr_assert_null(find_text(info, -1, "Slice thickness"));
    cr_assert_null(find_text(info, -1, "ramp profile"));
    cr_assert_not_null(find_text(info, RP_ROLE_TITLE, "Left bar"));
    cr_assert_null(find_text(info, -1, "Slice profile"));
    /* the bars again, enlarged, in the room the missing ramp panels leave */
    cr_assert_not_null(find_text(info, RP_ROLE_TITLE, "Wedge bars, enlarged \xC3\x97"));
    cr_assert_not_null(find_text(info, RP_ROLE_TITLE, "Slice 11"));
    cr_assert_not_null(find_text(info, RP_ROLE_RESULT, "Position model"));
    rp_rgb cross = RP_C_CROSS;
    const an_bar *b = &r->position[1].left;
    cr_assert(open_diamond_at(&png, disp_x(info, b->end.x), disp_y(info, b->end.y), cross));
    /* no strip overlay on this slice: its crossing place is plain image */
    const an_strip *top = &r->thickness.top;
    cr_assert(!colour_near(&png, disp_x(info, top->cross_lo.x), disp_y(info, top->cross_lo.y), 3,
                           cross, 10));
    free(png.rgb);
    free(info);
    free(r);
}

/* ---- unmeasured parts say why instead of showing numbers ---- */

Test(report, unmeasured_strip_shows_reason)
{
    an_image img;
    make_image(&img);
    an_series_result *r = make_result();
    an_strip *top = &r->thickness.top;
    top->measured = 0;
    snprintf(top->reason, sizeof top->reason, "strip edge outside the insert");
    r->thickness.measured = 0;
    r->thickness.verdict = AN_PASS; /* stale verdict: must not be shown as a pass */
    snprintf(r->thickness.reason, sizeof r->thickness.reason, "top ramp not measured");
    rp_slice_info *info = calloc(1, sizeof *info);
    png_img png;
    render("unmeasured.png", &img, 0, r, info, &png);

    const rp_text_item *note =
        find_text(info, RP_ROLE_NOTE, "not measured: strip edge outside the insert");
    cr_assert_not_null(note, "no 'not measured: reason' note in the top ramp panel");
    cr_assert(ink_fraction(&png, note) > 0.03, "the note's glyphs are not visible");
    cr_assert_not_null(
        find_text(info, RP_ROLE_NOTE, "Slice thickness not measured: top ramp not measured"));
    cr_assert_null(find_text(info, -1, "Slice thickness 5.00"));
    /* only the bottom ramp still has a width; the header chip says UNMEASURABLE, not PASS */
    cr_assert_eq(count_text(info, "FWHM"), 1);
    cr_assert_not_null(find_text(info, RP_ROLE_VERDICT, "UNMEASURABLE"));
    cr_assert_eq(count_text(info, "PASS"), 1); /* the bar difference's */
    /* no crossing markers on the unmeasured strip; the bottom one keeps its markers */
    rp_rgb cross = RP_C_CROSS;
    cr_assert(!colour_near(&png, disp_x(info, top->cross_lo.x), disp_y(info, top->cross_lo.y), 3,
                           cross, 10));
    const an_strip *bot = &r->thickness.bottom;
    cr_assert(
        open_diamond_at(&png, disp_x(info, bot->cross_lo.x), disp_y(info, bot->cross_lo.y), cross));
    free(png.rgb);
    free(info);
    free(r);
}

Test(report, unmeasured_bar_and_phantom_not_found)
{
    an_image img;
    make_image(&img);
    an_series_result *r = make_result();
    an_position *p = &r->position[1];
    p->measured = 0;
    p->left.measured = 0;
    p->right.measured = 0;
    p->right.profile.n = 0;
    p->verdict = AN_UNMEASURABLE;
    snprintf(p->reason, sizeof p->reason, "bridge not found");
    r->phantom[10].found = 0;
    rp_slice_info *info = calloc(1, sizeof *info);
    png_img png;
    render("nobar.png", &img, 10, r, info, &png);
    cr_assert_eq(count_in_notes(info, "not measured: bridge not found"), 3); /* header, 2 panels */
    cr_assert_not_null(find_text(info, RP_ROLE_NOTE, "phantom not found"));
    cr_assert_null(find_text(info, -1, "end "));
    cr_assert_null(find_text(info, -1, "length "));
    cr_assert_null(find_text(info, -1, "Bar length difference"));
    rp_rgb outline = RP_C_OUTLINE;
    cr_assert(!colour_near(&png, disp_x(info, CX + 95 / PX), disp_y(info, CY), 3, outline, 10));
    free(png.rgb);
    free(info);
    free(r);
}

Test(report, fail_verdict_chip_colour)
{
    an_image img;
    make_image(&img);
    an_series_result *r = make_result();
    r->thickness.corrected_mm = 6.1;
    r->thickness.verdict = AN_FAIL;
    r->position[0].bar_difference_mm = -4.4;
    r->position[0].verdict = AN_WARN;
    rp_slice_info *info = calloc(1, sizeof *info);
    png_img png;
    render("fail.png", &img, 0, r, info, &png);
    const rp_text_item *f = find_text(info, RP_ROLE_VERDICT, "FAIL");
    const rp_text_item *w = find_text(info, RP_ROLE_VERDICT, "WARN");
    cr_assert_not_null(f);
    cr_assert_not_null(w);
    cr_assert_not_null(find_text(info, RP_ROLE_RESULT, "Slice thickness 6.10"));
    cr_assert_not_null(find_text(info, RP_ROLE_RESULT, "Bar length difference -4.40"));
    /* the chip's background, just left of its word */
    rp_rgb fail = RP_C_FAIL, warn = RP_C_WARN;
    cr_assert(same_colour(at(&png, (int)f->x - 3, (int)(f->y + f->h / 2)), fail, 2));
    cr_assert(same_colour(at(&png, (int)w->x - 3, (int)(w->y + w->h / 2)), warn, 2));
    free(png.rgb);
    free(info);
    free(r);
}

Test(report, anisotropic_pixels_keep_proportions)
{
    /* 256 columns of 0.977 mm, 128 rows of 1.953 mm: the same 250 mm square field */
    static float half[W * 128];
    an_image img;
    make_image(&img);
    for (int y = 0; y < 128; y++)
        memcpy(half + y * W, pix + (2 * y) * W, sizeof(float) * W);
    img.px = half;
    img.height = 128;
    img.row_mm = 2 * PX;
    an_series_result *r = make_result();
    r->phantom[3].centre = (an_point){CX, CY / 2};
    rp_slice_info *info = calloc(1, sizeof *info);
    png_img png;
    render("aniso.png", &img, 3, r, info, &png);
    cr_assert_eq(info->nearest, 0);
    cr_assert_float_eq(info->scale_y / info->scale_x, 2.0, 1e-9);
    cr_assert_float_eq(W * info->scale_x, 768.0, 1e-6);
    /* a circle: the outline 95 mm right of and 95 mm above the centre (row pitch doubled) */
    rp_rgb outline = RP_C_OUTLINE;
    cr_assert(colour_near(&png, disp_x(info, CX + 95 / PX), disp_y(info, CY / 2), 3, outline, 8));
    cr_assert(
        colour_near(&png, disp_x(info, CX), disp_y(info, CY / 2 - 95 / (2 * PX)), 3, outline, 8));
    /* image 4 has no measurement: the note says so */
    cr_assert_not_null(find_text(info, RP_ROLE_NOTE, "no thickness or position measurement"));
    free(png.rgb);
    free(info);
    free(r);
}

/* ---- the PNG checked by a tool outside the project ---- */

Test(report, png_verified_externally)
{
    an_image img;
    make_image(&img);
    an_series_result *r = make_result();
    rp_slice_info *info = calloc(1, sizeof *info);
    png_img png;
    char path[1024], cmd[4096], line[512];
    render("ext.png", &img, 0, r, info, &png);
    path_in(path, sizeof path, "ext.png");

    if (access("/usr/bin/pngcheck", X_OK) == 0) {
        snprintf(cmd, sizeof cmd, "/usr/bin/pngcheck -q '%s'", path);
        cr_assert_eq(system(cmd), 0, "pngcheck rejected %s", path);
    }
    if (access("/usr/bin/python3", X_OK) != 0)
        cr_skip_test("/usr/bin/python3 is absent: the independent decoder did not run");
    /* A few points: the lone white block, the crossing marker, the footer, a corner. */
    int pts[4][2] = {{(int)info->image_x0 + 12 * 3 + 1, (int)info->image_y0 + 240 * 3 + 1},
                     {(int)disp_x(info, r->thickness.top.cross_lo.x),
                      (int)disp_y(info, r->thickness.top.cross_lo.y)},
                     {png.w / 2, png.h - 5},
                     {png.w - 1, 0}};
    int len = snprintf(cmd, sizeof cmd, "/usr/bin/python3 '%s/tests/report/pngverify.py' '%s'",
                       SW_SOURCE_DIR, path);
    for (int i = 0; i < 4; i++)
        len += snprintf(cmd + len, sizeof cmd - len, " %d,%d", pts[i][0], pts[i][1]);
    FILE *pp = popen(cmd, "r");
    cr_assert_not_null(pp);
    int got_size = 0, got_px = 0, got_sw = 0, got_disc = 0;
    while (fgets(line, sizeof line, pp)) {
        int a, b, c, d, e;
        cr_assert(strncmp(line, "error", 5) != 0, "pngverify: %s", line);
        if (sscanf(line, "size %d %d", &a, &b) == 2) {
            cr_assert_eq(a, png.w);
            cr_assert_eq(b, png.h);
            got_size = 1;
        } else if (sscanf(line, "pixel %d %d %d %d %d", &a, &b, &c, &d, &e) == 5) {
            const unsigned char *p = at(&png, a, b);
            cr_assert(p[0] == c && p[1] == d && p[2] == e,
                      "pixel (%d, %d): libpng %d %d %d, independent decoder %d %d %d", a, b, p[0],
                      p[1], p[2], c, d, e);
            got_px++;
        } else if (!strncmp(line, "text Software slicewarden", 25)) {
            got_sw = 1;
        } else if (!strncmp(line, "text Disclaimer Supports, does not replace", 42)) {
            got_disc = 1;
        }
    }
    cr_assert_eq(pclose(pp), 0, "pngverify.py failed");
    cr_assert(got_size && got_sw && got_disc);
    cr_assert_eq(got_px, 4);
    free(png.rgb);
    free(info);
    free(r);
}

/* ---- bad input and failed output leave nothing behind ---- */

Test(report, bad_arguments)
{
    an_image img;
    make_image(&img);
    an_series_result *r = make_result();
    char path[1024];
    sw_error err;
    path_in(path, sizeof path, "bad.png");
    sw_error_clear(&err);
    cr_assert_eq(rp_annotate_slice_png(path, &img, 11, r, &LABELS, NULL, &err), SW_EINVAL);
    cr_assert(strstr(err.msg, "bad.png") != NULL, "%s", err.msg);
    img.stride = W - 1;
    sw_error_clear(&err);
    cr_assert_eq(rp_annotate_slice_png(path, &img, 0, r, &LABELS, NULL, &err), SW_EINVAL);
    img.stride = W;
    img.col_mm = NAN;
    sw_error_clear(&err);
    cr_assert_eq(rp_annotate_slice_png(path, &img, 0, r, &LABELS, NULL, &err), SW_EINVAL);
    img.col_mm = PX;
    img.width = 1 << 20;
    sw_error_clear(&err);
    cr_assert_eq(rp_annotate_slice_png(path, &img, 0, r, &LABELS, NULL, &err), SW_EINVAL);
    cr_assert_eq(count_entries(tmpdir), 0);
    free(r);
}

Test(report, failed_render_keeps_existing_file)
{
    an_image img;
    make_image(&img);
    an_series_result *r = make_result();
    char path[1024];
    size_t n;
    sw_error err;
    path_in(path, sizeof path, "keep.png");
    cr_assert_eq(rp_atomic_write_file(path, "old", 3, NULL), SW_OK);
    img.px = NULL;
    sw_error_clear(&err);
    cr_assert_neq(rp_annotate_slice_png(path, &img, 0, r, &LABELS, NULL, &err), SW_OK);
    char *b = slurp(path, &n);
    cr_assert(n == 3 && !memcmp(b, "old", 3));
    cr_assert_eq(count_entries(tmpdir), 1);
    free(b);
    free(r);
}

Test(report, atomic_success_leaves_no_temp)
{
    char path[1024];
    size_t n;
    path_in(path, sizeof path, "a.txt");
    cr_assert_eq(rp_atomic_write_file(path, "first", 5, NULL), SW_OK);
    cr_assert_eq(rp_atomic_write_file(path, "second", 6, NULL), SW_OK); /* replaces */
    char *b = slurp(path, &n);
    cr_assert(n == 6 && !memcmp(b, "second", 6));
    cr_assert_eq(count_entries(tmpdir), 1, "a temporary file was left behind");
    /* the umask applies, as for any file the program makes */
    struct stat st;
    mode_t um = umask(0);
    umask(um);
    cr_assert_eq(stat(path, &st), 0);
    cr_assert_eq(st.st_mode & 0777, 0666 & ~um);
    free(b);
}

Test(report, atomic_failure_names_path)
{
    char blocker[1024], path[1100];
    sw_error err;
    path_in(blocker, sizeof blocker, "plain-file");
    cr_assert_eq(rp_atomic_write_file(blocker, "x", 1, NULL), SW_OK);
    /* its parent is a regular file: fails even for root */
    snprintf(path, sizeof path, "%s/out.png", blocker);
    sw_error_clear(&err);
    cr_assert_eq(rp_atomic_write_file(path, "y", 1, &err), SW_EIO);
    cr_assert(strstr(err.msg, path) != NULL, "message does not name the path: %s", err.msg);
    cr_assert(strstr(err.msg, "Not a directory") != NULL, "no reason: %s", err.msg);
    cr_assert_eq(count_entries(tmpdir), 1);

    /* the same through the slice renderer */
    an_image img;
    make_image(&img);
    an_series_result *r = make_result();
    sw_error_clear(&err);
    cr_assert_eq(rp_annotate_slice_png(path, &img, 0, r, &LABELS, NULL, &err), SW_EIO);
    cr_assert(strstr(err.msg, path) != NULL, "%s", err.msg);
    free(r);
}

Test(report, atomic_abort_and_failed_rename_keep_target)
{
    char path[1024], dir[1024];
    size_t n;
    rp_atomic *a = NULL;
    sw_error err;
    path_in(path, sizeof path, "keep.txt");
    cr_assert_eq(rp_atomic_write_file(path, "original", 8, NULL), SW_OK);
    cr_assert_eq(rp_atomic_open(path, &a, NULL), SW_OK);
    cr_assert_eq(rp_atomic_write(a, "partial", 7, NULL), SW_OK);
    cr_assert_eq(count_entries(tmpdir), 2); /* target and temporary file */
    rp_atomic_abort(a);
    char *b = slurp(path, &n);
    cr_assert(n == 8 && !memcmp(b, "original", 8));
    free(b);
    cr_assert_eq(count_entries(tmpdir), 1);

    /* the target is a non-empty folder: rename fails, the folder and its file survive */
    path_in(dir, sizeof dir, "folder");
    cr_assert_eq(mkdir(dir, 0755), 0);
    char inner[1100];
    snprintf(inner, sizeof inner, "%s/inside", dir);
    cr_assert_eq(rp_atomic_write_file(inner, "z", 1, NULL), SW_OK);
    sw_error_clear(&err);
    cr_assert_eq(rp_atomic_write_file(dir, "new", 3, &err), SW_EIO);
    cr_assert(strstr(err.msg, dir) != NULL, "%s", err.msg);
    cr_assert_eq(count_entries(tmpdir), 2);
    cr_assert_eq(count_entries(dir), 1);
    sw_error_clear(&err);
    cr_assert_eq(rp_atomic_open(NULL, &a, &err), SW_EINVAL);
    cr_assert_null(a);
    path_in(path, sizeof path, "");
    cr_assert_eq(rp_atomic_open(path, &a, NULL), SW_EINVAL); /* ends in '/' */
    rp_atomic_abort(NULL);
}

/* ---- which images get a PNG ---- */

Test(report, slices_to_annotate)
{
    an_series_result *r = make_result();
    int idx[4];
    /* ramp slice and first wedge slice are the same image: it appears once */
    r->thickness.image = r->position[0].image = 4;
    r->position[1].image = 2;
    r->position[1].slice = 11;
    cr_assert_eq(rp_slices_to_annotate(r, idx, 4), 2);
    cr_assert_eq(idx[0], 4); /* slice 1 first */
    cr_assert_eq(idx[1], 2);
    cr_assert_eq(rp_slices_to_annotate(r, idx, 1), 1);
    /* an unidentified slice (ordinal 0) or an index outside the series is left out */
    r->position[1].slice = 0;
    cr_assert_eq(rp_slices_to_annotate(r, idx, 4), 1);
    r->thickness.image = r->position[0].image = 11;
    cr_assert_eq(rp_slices_to_annotate(r, idx, 4), 0);
    memset(r, 0, sizeof *r);
    r->n_images = 11;
    cr_assert_eq(rp_slices_to_annotate(r, idx, 4), 0);
    free(r);
}

/* ---- palette: contrast and colour-vision deficiency ---- */

/* WCAG 2.1 (W3C Recommendation, 2018), definitions of relative luminance and contrast ratio;
 * success criterion 1.4.3 asks 4.5:1 for normal text. Black on white is 21:1 by definition. */
Test(report, wcag_contrast)
{
    rp_rgb white = {1, 1, 1}, black = {0, 0, 0};
    cr_assert_float_eq(rp_contrast(black, white), 21.0, 1e-9);
    /* #767676 on white is widely quoted as the lightest grey passing 4.5:1 (common practice,
     * value from memory: 4.54); #777777 just fails (4.48). */
    cr_assert_float_eq(rp_contrast(RP_HEX(0x767676), white), 4.54, 0.01);
    cr_assert(rp_contrast(RP_HEX(0x777777), white) < 4.5);
    for (int v = AN_PASS; v <= AN_UNMEASURABLE; v++) {
        rp_rgb bg = rp_verdict_colour((an_verdict)v);
        cr_assert(rp_contrast(bg, rp_text_on(bg)) >= 4.5, "%s chip text contrast %.2f",
                  rp_verdict_word((an_verdict)v), rp_contrast(bg, rp_text_on(bg)));
    }
    rp_rgb texts[] = {RP_C_INK, RP_C_INK2, RP_C_UNMEAS, RP_C_PROFILE, RP_C_LEVEL};
    for (size_t i = 0; i < sizeof texts / sizeof texts[0]; i++)
        cr_assert(rp_contrast(texts[i], white) >= 4.5, "text colour %zu: %.2f", i,
                  rp_contrast(texts[i], white));
}

static double lin_c(double c)
{
    return c <= 0.04045 ? c / 12.92 : pow((c + 0.055) / 1.055, 2.4);
}

static double gam_c(double c)
{
    c = c < 0 ? 0 : c > 1 ? 1 : c;
    return c <= 0.0031308 ? 12.92 * c : 1.055 * pow(c, 1 / 2.4) - 0.055;
}

/* sRGB (IEC 61966-2-1) to CIE L*a*b* (D65). */
static void to_lab(rp_rgb c, double lab[3])
{
    double r = lin_c(c.r), g = lin_c(c.g), b = lin_c(c.b);
    double X = (0.4124 * r + 0.3576 * g + 0.1805 * b) / 0.95047;
    double Y = 0.2126 * r + 0.7152 * g + 0.0722 * b;
    double Z = (0.0193 * r + 0.1192 * g + 0.9505 * b) / 1.08883;
    double f[3], t[3] = {X, Y, Z};
    for (int i = 0; i < 3; i++)
        f[i] = t[i] > 216.0 / 24389 ? cbrt(t[i]) : (24389.0 / 27 * t[i] + 16) / 116;
    lab[0] = 116 * f[1] - 16;
    lab[1] = 500 * (f[0] - f[1]);
    lab[2] = 200 * (f[1] - f[2]);
}

static rp_rgb simulate(rp_rgb c, const double m[3][3])
{
    double l[3] = {lin_c(c.r), lin_c(c.g), lin_c(c.b)}, o[3];
    for (int i = 0; i < 3; i++)
        o[i] = m[i][0] * l[0] + m[i][1] * l[1] + m[i][2] * l[2];
    return (rp_rgb){gam_c(o[0]), gam_c(o[1]), gam_c(o[2])};
}

static double delta_e(rp_rgb a, rp_rgb b)
{
    double la[3], lb[3];
    to_lab(a, la);
    to_lab(b, lb);
    return sqrt(pow(la[0] - lb[0], 2) + pow(la[1] - lb[1], 2) + pow(la[2] - lb[2], 2));
}

/* Dichromat simulation matrices (severity 1.0, linear RGB) of Machado, Oliveira and Fernandes,
 * IEEE TVCG 15(6), 2009; the values are from memory. The four verdict colours, and the overlay
 * colours among themselves, must stay apart (CIE76 delta E >= 12) for protans, deutans and tritans
 * as for normal vision. */
Test(report, palette_survives_colour_vision_deficiency)
{
    static const double M[4][3][3] = {
        {{1, 0, 0}, {0, 1, 0}, {0, 0, 1}},
        {{0.152286, 1.052583, -0.204868},
         {0.114503, 0.786281, 0.099216},
         {-0.003882, -0.048116, 1.051998}},
        {{0.367322, 0.860646, -0.227968},
         {0.280085, 0.672501, 0.047413},
         {-0.011820, 0.042940, 0.968881}},
        {{1.255528, -0.076749, -0.178779},
         {-0.078411, 0.930809, 0.148370},
         {0.004733, 0.691367, 0.303900}},
    };
    static const char *names[4] = {"normal", "protan", "deutan", "tritan"};
    rp_rgb verdicts[4] = {RP_C_PASS, RP_C_WARN, RP_C_FAIL, RP_C_UNMEAS};
    rp_rgb overlays[4] = {RP_C_OUTLINE, RP_C_STRIP, RP_C_CROSS, RP_C_BAR};
    for (int k = 0; k < 4; k++)
        for (int i = 0; i < 4; i++)
            for (int j = i + 1; j < 4; j++) {
                double dv = delta_e(simulate(verdicts[i], M[k]), simulate(verdicts[j], M[k]));
                cr_assert(dv >= 12, "%s: verdict colours %d and %d too close (dE %.1f)", names[k],
                          i, j, dv);
                double dov = delta_e(simulate(overlays[i], M[k]), simulate(overlays[j], M[k]));
                cr_assert(dov >= 12, "%s: overlay colours %d and %d too close (dE %.1f)", names[k],
                          i, j, dov);
            }
}

/* ---- plot helpers ---- */

/* Worked examples of the 1-2-5 tick rule: step = nice((hi - lo) / target). */
Test(report, nice_ticks)
{
    static const struct {
        double lo, hi;
        int target;
        double first, step;
        int n;
    } cases[] = {
        {0, 1, 5, 0, 0.2, 6},             /* raw 0.2 -> 2 x 10^-1 */
        {0, 47.3, 5, 0, 10, 5},           /* raw 9.46 -> 10: 0..40 */
        {-3, 7, 4, -2, 2, 5},             /* raw 2.5 -> 2: -2..6 */
        {-60, 60, 6, -60, 20, 7},         /* raw 20 */
        {0.013, 0.087, 3, 0.02, 0.02, 4}, /* raw 0.0247 -> 0.02: 0.02..0.08 */
        {100, 1100, 5, 200, 200, 5},      /* raw 200: 200..1000 (100 and 1100 are not multiples) */
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        double first, step;
        int n = rp_nice_ticks(cases[i].lo, cases[i].hi, cases[i].target, &first, &step);
        cr_assert_eq(n, cases[i].n, "case %zu: %d ticks", i, n);
        cr_assert_float_eq(step, cases[i].step, 1e-12, "case %zu", i);
        cr_assert_float_eq(first, cases[i].first, 1e-12, "case %zu", i);
    }
    double first, step;
    cr_assert_eq(rp_nice_ticks(1, 1, 5, &first, &step), 0);
    cr_assert_eq(rp_nice_ticks(0, NAN, 5, &first, &step), 0);
    double lo = 3, hi = 212;
    rp_nice_range(&lo, &hi, 5);
    cr_assert_float_eq(lo, 0, 1e-12);
    cr_assert_float_eq(hi, 250, 1e-12); /* raw 41.8 -> 50 */
}

/* The display window against numpy.percentile (linear interpolation, numpy's default), run on
 * the same pixels through /usr/bin/python3. */
Test(report, window_matches_numpy)
{
    an_image img;
    make_image(&img);
    pix[5] = NAN; /* non-finite pixels are ignored, as numpy.nanpercentile does */
    pix[7] = INFINITY;
    double lo, hi;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(rp_window(&img, 0.005, 0.995, &lo, &hi, &err), SW_OK, "%s", err.msg);
    if (access("/usr/bin/python3", X_OK) != 0)
        cr_skip_test("/usr/bin/python3 is absent: no reference for the percentiles");
    char raw[1024], cmd[2048];
    path_in(raw, sizeof raw, "pix.f32");
    FILE *f = fopen(raw, "wb");
    cr_assert_eq(fwrite(pix, sizeof pix[0], W * H, f), (size_t)W * H);
    fclose(f);
    snprintf(cmd, sizeof cmd,
             "/usr/bin/python3 -c \"import numpy as n; a=n.fromfile('%s', dtype=n.float32)"
             ".astype(n.float64); a=a[n.isfinite(a)]; print('%%.9g %%.9g' %% tuple(n.percentile(a,"
             " [0.5, 99.5])))\"",
             raw);
    FILE *pp = popen(cmd, "r");
    double nlo = NAN, nhi = NAN;
    cr_assert_eq(fscanf(pp, "%lf %lf", &nlo, &nhi), 2);
    cr_assert_eq(pclose(pp), 0);
    cr_assert_float_eq(lo, nlo, 1e-6 * fabs(nlo) + 1e-9, "low %.9g vs numpy %.9g", lo, nlo);
    cr_assert_float_eq(hi, nhi, 1e-6 * fabs(nhi) + 1e-9, "high %.9g vs numpy %.9g", hi, nhi);
    /* a small image, where the interpolation between order statistics shows */
    static float small[15] = {9, 2, 14, 7, 7, 1, 12, 30, 5, 3, 11, 8, 6, 13, 4};
    an_image sm = {.px = small, .width = 5, .height = 3, .stride = 5, .col_mm = 1, .row_mm = 1};
    static const double qs[3][2] = {{0.005, 0.995}, {0.1, 0.9}, {0.25, 0.6}};
    for (int k = 0; k < 3; k++) {
        cr_assert_eq(rp_window(&sm, qs[k][0], qs[k][1], &lo, &hi, NULL), SW_OK);
        snprintf(cmd, sizeof cmd,
                 "/usr/bin/python3 -c \"import numpy as n; a=[9,2,14,7,7,1,12,30,5,3,11,8,6,13,4];"
                 " print('%%.12g %%.12g' %% tuple(n.percentile(a, [%g, %g])))\"",
                 100 * qs[k][0], 100 * qs[k][1]);
        pp = popen(cmd, "r");
        cr_assert_eq(fscanf(pp, "%lf %lf", &nlo, &nhi), 2);
        cr_assert_eq(pclose(pp), 0);
        cr_assert_float_eq(lo, nlo, 1e-9, "q %g: %.12g vs numpy %.12g", qs[k][0], lo, nlo);
        cr_assert_float_eq(hi, nhi, 1e-9, "q %g: %.12g vs numpy %.12g", qs[k][1], hi, nhi);
    }
    /* flat image: a valid window all the same */
    for (int i = 0; i < W * H; i++)
        pix[i] = 7;
    cr_assert_eq(rp_window(&img, 0.005, 0.995, &lo, &hi, NULL), SW_OK);
    cr_assert(hi > lo && lo <= 7 && hi >= 7);
}

/* The toy font API resolves our family through fontconfig to a real outline font. */
Test(report, font_is_dejavu_sans)
{
    cairo_surface_t *s = cairo_image_surface_create(CAIRO_FORMAT_ARGB32, 8, 8);
    cairo_t *cr = cairo_create(s);
    cairo_select_font_face(cr, RP_FONT_FAMILY, CAIRO_FONT_SLANT_NORMAL, CAIRO_FONT_WEIGHT_NORMAL);
    cairo_scaled_font_t *sf = cairo_get_scaled_font(cr);
    cr_assert_eq(cairo_scaled_font_get_type(sf), CAIRO_FONT_TYPE_FT, "not a FreeType font");
    FT_Face face = cairo_ft_scaled_font_lock_face(sf);
    cr_assert_not_null(face);
    cr_assert_str_eq(face->family_name, "DejaVu Sans");
    cr_assert(FT_IS_SCALABLE(face));
    cairo_ft_scaled_font_unlock_face(sf);
    cairo_destroy(cr);
    cairo_surface_destroy(s);
}
