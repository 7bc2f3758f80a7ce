/* model_file.c: the phantom model file (INI, docs/models.md): one table of keys parses, checks and
 * prints a model, and the built-in large phantom is config/large-phantom.model itself, compiled in
 * as text (analysis/CMakeLists.txt), read by the same parser. No files are opened here. */
#include <errno.h>
#include <ini.h>
#include <math.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "analysis.h"

typedef enum ftype { F_STR, F_INT, F_DBL, F_BOOL, F_ENUM } ftype;

typedef struct field {
    const char *section, *key;
    ftype type;
    size_t off, size;           /* target offset in an_model; size for strings */
    const char *def;            /* default for a file that leaves the key out before a base model
                                   is applied (keys added to the format later); NULL: none */
    double min, max;            /* range for numbers */
    const char *const *choices; /* F_ENUM: names, index is the value; NULL-terminated */
    const char *help;
} field;

static const char *const methods[] = {"crossed-ramps", "single-ramp", "single-wedge", NULL};

/* clang-format off */
#define S(sec, k, member, h) {sec, k, F_STR, offsetof(an_model, member), sizeof(((an_model *)0)->member), NULL, 0, 0, NULL, h}
#define I(sec, k, member, d, lo, hi, h) {sec, k, F_INT, offsetof(an_model, member), 0, d, lo, hi, NULL, h}
#define D(sec, k, member, d, lo, hi, h) {sec, k, F_DBL, offsetof(an_model, member), 0, d, lo, hi, NULL, h}
#define B(sec, k, member, d, h) {sec, k, F_BOOL, offsetof(an_model, member), 0, d, 0, 1, NULL, h}
#define E(sec, k, member, d, ch, h) {sec, k, F_ENUM, offsetof(an_model, member), 0, d, 0, 0, ch, h}

static const field model_fields[] = {
    S("phantom", "name", name, "model name, stored with every result"),
    D("phantom", "radius_mm", radius_mm, NULL, 10, 500, "fluid cylinder radius"),
    D("phantom", "w_min_mm", cyl_w_min, NULL, -1000, 1000, "fluid cylinder's end toward the first slice"),
    D("phantom", "w_max_mm", cyl_w_max, NULL, -1000, 1000, "fluid cylinder's end toward the last slice"),
    I("phantom", "slices", n_slices, NULL, 1, AN_MAX_IMAGES, "slices of the standard series"),
    D("phantom", "slice_gap_mm", slice_gap_mm, NULL, 0.1, 100, "centre-to-centre spacing"),
    D("phantom", "nominal_thickness_mm", nominal_thickness_mm, NULL, 0.1, 50, "nominal slice thickness"),
    E("phantom", "method", method, NULL, methods, "crossed-ramps, single-ramp or single-wedge"),
    I("phantom", "ramp_slice", ramp_slice, NULL, 1, AN_MAX_IMAGES, "ordinal of the slice with the ramps"),
    D("insert", "u_min_mm", insert_u_min, NULL, -500, 500, "thickness insert extent"),
    D("insert", "u_max_mm", insert_u_max, NULL, -500, 500, ""),
    D("insert", "v_min_mm", insert_v_min, NULL, -500, 500, ""),
    D("insert", "v_max_mm", insert_v_max, NULL, -500, 500, ""),
    D("insert", "w_half_mm", insert_w_half, NULL, 0.1, 500, ""),
    I("insert", "ramps", n_ramps, NULL, 0, 2, "number of ramps"),
    D("insert", "slot_mm", slot_mm, NULL, 0, 20, "slot thickness along the axis"),
    D("insert", "wedge_slope", wedge_slope, NULL, 0.01, 100, "single-wedge method: dw/du of the wedge face"),
    D("ramp.top", "v_min_mm", ramp[0].v_min, NULL, -500, 500, "first ramp's extent across"),
    D("ramp.top", "v_max_mm", ramp[0].v_max, NULL, -500, 500, ""),
    D("ramp.top", "slope", ramp[0].slope, NULL, -10, 10, "dw/du of the slot's centre plane"),
    D("ramp.bottom", "v_min_mm", ramp[1].v_min, NULL, -500, 500, "second ramp's extent across"),
    D("ramp.bottom", "v_max_mm", ramp[1].v_max, NULL, -500, 500, ""),
    D("ramp.bottom", "slope", ramp[1].slope, NULL, -10, 10, ""),
    B("wedges", "present", has_wedges, NULL, "the phantom has crossed slice-position wedges"),
    D("wedges", "w_first_mm", wedge_w[0], NULL, -1000, 1000, "vertex plane on the ramp side"),
    D("wedges", "w_last_mm", wedge_w[1], NULL, -1000, 1000, "vertex plane on the far side"),
    D("wedges", "w_half_mm", wedge_w_half, NULL, 0.1, 500, "bridge and bars extent along the axis"),
    I("wedges", "slice_first", wedge_slice[0], NULL, 1, AN_MAX_IMAGES, "ordinal of the first wedge slice"),
    I("wedges", "slice_last", wedge_slice[1], NULL, 1, AN_MAX_IMAGES, "ordinal of the second wedge slice"),
    D("wedges", "bridge_u_min_mm", bridge_u_min, NULL, -500, 500, "bridge extent"),
    D("wedges", "bridge_u_max_mm", bridge_u_max, NULL, -500, 500, ""),
    D("wedges", "bridge_v_min_mm", bridge_v_min, NULL, -500, 500, ""),
    D("wedges", "bridge_v_max_mm", bridge_v_max, NULL, -500, 500, ""),
    D("wedges", "left_u_min_mm", bar_u_min[0], NULL, -500, 500, "left bar extent"),
    D("wedges", "left_u_max_mm", bar_u_max[0], NULL, -500, 500, ""),
    D("wedges", "right_u_min_mm", bar_u_min[1], NULL, -500, 500, "right bar extent"),
    D("wedges", "right_u_max_mm", bar_u_max[1], NULL, -500, 500, ""),
    D("wedges", "bar_top_v_mm", bar_top_v, NULL, -500, 500, "bars hang from here"),
    D("wedges", "bar_length_mm", bar_len0_mm, NULL, 0.1, 500, "bar length at the vertex"),
    /* added to the format (a file without it keeps the value of its base model; the built-in one
     * states it) */
    D("wedges", "face_slope", bar_face_slope, "1", 0.05, 20, "dL/dw of each bar's end face (1: 45 degrees)"),
};
/* clang-format on */

#define NFIELDS (sizeof model_fields / sizeof model_fields[0])

/* Sets one field from text; returns 0 and a reason in why on a bad value. */
static int set_value(const field *f, an_model *m, const char *value, char *why, size_t nwhy)
{
    char *p = (char *)m + f->off;
    char *end = NULL;
    switch (f->type) {
    case F_STR:
        if (strlen(value) >= f->size) {
            snprintf(why, nwhy, "%s is longer than %zu characters", f->key, f->size - 1);
            return 0;
        }
        sw_strlcpy(p, value, f->size);
        return 1;
    case F_INT: {
        errno = 0;
        long v = strtol(value, &end, 10);
        if (errno || end == value || *end || v < f->min || v > f->max) {
            snprintf(why, nwhy, "%s must be an integer from %g to %g, not '%s'", f->key, f->min,
                     f->max, value);
            return 0;
        }
        *(int *)p = (int)v;
        return 1;
    }
    case F_DBL: {
        errno = 0;
        double v = strtod(value, &end);
        if (errno || end == value || *end || !isfinite(v) || v < f->min || v > f->max) {
            snprintf(why, nwhy, "%s must be a number from %g to %g, not '%s'", f->key, f->min,
                     f->max, value);
            return 0;
        }
        *(double *)p = v;
        return 1;
    }
    case F_BOOL:
        if (!strcasecmp(value, "yes") || !strcasecmp(value, "true") || !strcmp(value, "1") ||
            !strcasecmp(value, "on"))
            *(int *)p = 1;
        else if (!strcasecmp(value, "no") || !strcasecmp(value, "false") || !strcmp(value, "0") ||
                 !strcasecmp(value, "off"))
            *(int *)p = 0;
        else {
            snprintf(why, nwhy, "%s must be yes or no, not '%s'", f->key, value);
            return 0;
        }
        return 1;
    case F_ENUM:
        for (int i = 0; f->choices[i]; i++)
            if (!strcasecmp(value, f->choices[i])) {
                *(int *)p = i;
                return 1;
            }
        snprintf(why, nwhy, "%s must be one of", f->key);
        for (int i = 0; f->choices[i]; i++) {
            size_t len = strlen(why);
            snprintf(why + len, nwhy - len, "%s %s", i ? "," : "", f->choices[i]);
        }
        return 0;
    }
    return 0;
}

typedef struct parse_ctx {
    char why[256];
    an_model *target;
    unsigned char seen[NFIELDS];
} parse_ctx;

static int handler(void *user, const char *section, const char *key, const char *value)
{
    parse_ctx *ctx = user;
    if (ctx->why[0])
        return 0;
    for (size_t i = 0; i < NFIELDS; i++) {
        const field *f = &model_fields[i];
        if (strcmp(f->section, section) || strcmp(f->key, key))
            continue;
        if (ctx->seen[i]) {
            snprintf(ctx->why, sizeof ctx->why, "'%s' in [%s] given twice", key, section);
            return 0;
        }
        ctx->seen[i] = 1;
        return set_value(f, ctx->target, value, ctx->why, sizeof ctx->why);
    }
    snprintf(ctx->why, sizeof ctx->why, "unknown setting '%s' in [%s]", key, section);
    return 0;
}

/* inih reads at most INI_MAX_LINE - 1 bytes of a line and takes the rest as a new line: refuse
 * longer lines, naming them, instead of misreading them. Returns the bad line or 0. */
static int long_line(const char *text)
{
    int line = 1, len = 0;
    for (const char *c = text; *c; c++) {
        if (*c == '\n') {
            line++;
            len = 0;
        } else if (++len > INI_MAX_LINE - 2) {
            return line;
        }
    }
    return 0;
}

/* Reads text over *m; only inih allocates (its line buffer). */
static sw_status parse_over(an_model *m, const char *text, const char *origin, int complete,
                            sw_error *err)
{
    parse_ctx ctx;
    memset(&ctx, 0, sizeof ctx);
    an_model tmp = *m;
    ctx.target = &tmp;
    int bad = long_line(text);
    if (bad)
        return sw_error_set(err, SW_EINVAL, "%s:%d: line longer than %d characters", origin, bad,
                            INI_MAX_LINE - 2);
    int line = ini_parse_string(text, handler, &ctx);
    if (line == -2)
        return sw_error_set(err, SW_ENOMEM, "%s: out of memory", origin);
    if (line != 0)
        return sw_error_set(err, SW_EINVAL, "%s:%d: %s", origin, line,
                            ctx.why[0] ? ctx.why : "syntax error");
    for (size_t i = 0; complete && i < NFIELDS; i++)
        if (!ctx.seen[i] && !model_fields[i].def)
            return sw_error_set(err, SW_EINVAL, "%s: [%s] %s is missing", origin,
                                model_fields[i].section, model_fields[i].key);
    sw_error e2;
    sw_error_clear(&e2);
    if (an_model_check(&tmp, &e2) != SW_OK)
        return sw_error_set(err, SW_EINVAL, "%s: %s", origin, e2.msg);
    *m = tmp;
    return SW_OK;
}

sw_status an_model_parse(an_model *m, const char *text, const char *origin, sw_error *err)
{
    if (!m || !text)
        return sw_error_set(err, SW_EINVAL, "phantom model: no text");
    return parse_over(m, text, origin ? origin : "phantom model", 0, err);
}

sw_status an_model_parse_complete(an_model *m, const char *text, const char *origin, sw_error *err)
{
    if (!m || !text)
        return sw_error_set(err, SW_EINVAL, "phantom model: no text");
    an_model base;
    memset(&base, 0, sizeof base);
    char why[256];
    for (size_t i = 0; i < NFIELDS; i++)
        if (model_fields[i].def)
            (void)set_value(&model_fields[i], &base, model_fields[i].def, why, sizeof why);
    sw_status st = parse_over(&base, text, origin ? origin : "phantom model", 1, err);
    if (st == SW_OK)
        *m = base;
    return st;
}

sw_status an_model_large(an_model *m)
{
    sw_error err;
    sw_error_clear(&err);
    sw_status st =
        an_model_parse_complete(m, an_model_large_text, "built-in large-phantom.model", &err);
    if (st != SW_OK) {
        /* Out of memory for inih's line buffer, or a broken build (tests/analysis parses the same
         * text): leave a model that an_model_check refuses, named for the reason, so that nothing
         * is measured against it. */
        memset(m, 0, sizeof *m);
        sw_strlcpy(m->name,
                   st == SW_ENOMEM ? "built-in-model-unread-out-of-memory" : "invalid-built-in-model",
                   sizeof m->name);
    }
    return st;
}

/* Appends to a growing buffer; returns 0, or -1 when memory ran out (the buffer is then freed). */
static int append(char **buf, size_t *len, size_t *cap, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));
static int append(char **buf, size_t *len, size_t *cap, const char *fmt, ...)
{
    for (;;) {
        va_list ap;
        va_start(ap, fmt);
        int k = vsnprintf(*buf ? *buf + *len : NULL, *buf ? *cap - *len : 0, fmt, ap);
        va_end(ap);
        if (k < 0)
            goto fail;
        if (*buf && (size_t)k < *cap - *len) {
            *len += (size_t)k;
            return 0;
        }
        size_t ncap = (*cap ? 2 * *cap : 1024) + (size_t)k;
        char *nb = realloc(*buf, ncap);
        if (!nb)
            goto fail;
        *buf = nb;
        *cap = ncap;
    }
fail:
    free(*buf);
    *buf = NULL;
    return -1;
}

char *an_model_format(const an_model *m)
{
    char *buf = NULL;
    size_t len = 0, cap = 0;
    const char *section = NULL;
    for (size_t i = 0; i < NFIELDS; i++) {
        const field *f = &model_fields[i];
        const char *p = (const char *)m + f->off;
        if (!section || strcmp(section, f->section)) {
            section = f->section;
            if (append(&buf, &len, &cap, "%s[%s]\n", i ? "\n" : "", section))
                return NULL;
        }
        int rc = 0;
        switch (f->type) {
        case F_STR: rc = append(&buf, &len, &cap, "%s = %s", f->key, p); break;
        case F_INT: rc = append(&buf, &len, &cap, "%s = %d", f->key, *(const int *)p); break;
        case F_DBL: rc = append(&buf, &len, &cap, "%s = %.10g", f->key, *(const double *)p); break;
        case F_BOOL:
            rc = append(&buf, &len, &cap, "%s = %s", f->key, *(const int *)p ? "yes" : "no");
            break;
        case F_ENUM: {
            int v = *(const int *)p;
            rc = append(&buf, &len, &cap, "%s = %s", f->key,
                        v >= 0 && v < (int)(sizeof methods / sizeof methods[0]) - 1 ? f->choices[v]
                                                                                    : "invalid");
            break;
        }
        }
        if (rc || (f->help[0] && append(&buf, &len, &cap, "    ; %s", f->help)) ||
            append(&buf, &len, &cap, "\n"))
            return NULL;
    }
    return buf;
}
