/* config.c: one field table per file kind drives defaults, parsing, validation and printing. */
#include "config.h"

#include <errno.h>
#include <ini.h>
#include <math.h>
#include <stddef.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "trends.h"
#include "wd.h"

typedef enum ftype { F_STR, F_INT, F_DBL, F_BOOL, F_ENUM } ftype;

typedef struct field {
    const char *section, *key;
    ftype type;
    size_t off, size;          /* target offset in the struct; size for strings */
    const char *def;           /* default, as text; NULL: the struct's own default (analysis/) */
    double min, max;           /* range for numbers */
    const char *const *choices; /* F_ENUM: names, index is the value; NULL-terminated */
    const char *help;
} field;

static const char *const half_levels[] = {"zero", "floor", "background", NULL};
static const char *const log_levels[] = {"debug", "info", "warning", "error", NULL};

#define S(sec, k, st, member, d, h) {sec, k, F_STR, offsetof(st, member), sizeof(((st *)0)->member), d, 0, 0, NULL, h}
#define I(sec, k, st, member, d, lo, hi, h) {sec, k, F_INT, offsetof(st, member), 0, d, lo, hi, NULL, h}
#define D(sec, k, st, member, d, lo, hi, h) {sec, k, F_DBL, offsetof(st, member), 0, d, lo, hi, NULL, h}
#define B(sec, k, st, member, d, h) {sec, k, F_BOOL, offsetof(st, member), 0, d, 0, 1, NULL, h}
#define E(sec, k, st, member, d, ch, h) {sec, k, F_ENUM, offsetof(st, member), 0, d, 0, 0, ch, h}

static const field config_fields[] = {
    S("watch", "folder", wd_config, folder, "/var/lib/slicewarden/incoming", "folder where series arrive"),
    S("watch", "database", wd_config, database, "/var/lib/slicewarden/slicewarden.sqlite", "SQLite database"),
    S("watch", "archive", wd_config, archive, "", "measured files go here (empty: 'archive' beside the folder)"),
    S("watch", "quarantine", wd_config, quarantine, "", "bad files go here with their reason (empty: 'quarantine' beside the folder)"),
    S("watch", "ignored", wd_config, ignored, "", "files that are not phantom series (empty: 'ignored' beside the folder)"),
    S("watch", "images", wd_config, images, "", "annotated PNGs of each measured series (empty: 'images' beside the folder)"),
    B("watch", "move_files", wd_config, move_files, "yes", "move files when done (no: leave them in place)"),
    D("watch", "quiet_seconds", wd_config, quiet_seconds, "30", 1, 86400, "analyse an incomplete series after this long without a new image"),
    S("phantom", "model_file", wd_config, model_file, "", "phantom model file (empty: built-in large phantom)"),
    S("phantom", "tolerance_file", wd_config, tolerance_file, "", "tolerance file (empty: built-in default set)"),
    S("match", "t1", wd_config, t1_match, "*T1*|*t1*", "patterns on SeriesDescription/ProtocolName for the T1 series ('|' separated)"),
    S("match", "t2", wd_config, t2_match, "*T2*|*t2*", "patterns for the double-echo T2 series"),
    B("match", "by_content", wd_config, match_by_content, "yes", "measure unmatched series whose image count fits the phantom"),
    E("analysis", "half_level", wd_config, half_level, "floor", half_levels, "half level of a ramp profile: zero, floor or background (floor: the analysis default)"),
    S("alert", "command", wd_config, alert_command, "", "command run for each alert, facts in SLICEWARDEN_* variables"),
    D("alert", "retry_seconds", wd_config, alert_retry_seconds, "300", 1, 86400, "retry a failed alert command after this long"),
    D("alert", "timeout_seconds", wd_config, alert_timeout_seconds, "30", 1, 3600, "kill an alert command that runs longer than this"),
    I("alert", "max_attempts", wd_config, alert_max_attempts, "10", 1, 1000, "give an alert up after this many failed attempts"),
    D("drift", "lambda", wd_config, drift.p.lambda, NULL, 0.01, 1, "EWMA weight of the newest result"),
    D("drift", "ewma_L", wd_config, drift.p.L, NULL, 0.5, 10, "EWMA limits in standard deviations"),
    D("drift", "cusum_k", wd_config, drift.p.k, NULL, 0, 10, "CUSUM allowance (standard deviations)"),
    D("drift", "cusum_h", wd_config, drift.p.h, NULL, 0.1, 50, "CUSUM decision interval (standard deviations)"),
    I("drift", "baseline_results", wd_config, drift.p.baseline_n, NULL, 2, 10000, "the baseline is the first N accepted results ..."),
    S("drift", "baseline_from", wd_config, drift.baseline_from, NULL, "... or those acquired from this date (ISO 8601)"),
    S("drift", "baseline_to", wd_config, drift.baseline_to, NULL, "... until before this date"),
    I("drift", "close_after", wd_config, drift.p.close_after, NULL, 1, 1000, "a drift episode ends after this many results in control"),
    D("drift", "confidence", wd_config, drift.p.confidence, NULL, 0.5, 0.999, "confidence of the trend's intervals"),
    D("drift", "sigma_floor", wd_config, drift.sigma_floor_fraction, NULL, 0, 1, "sigma is at least this fraction of the tolerance half-width"),
    E("log", "level", wd_config, log_level, "info", log_levels, "debug, info, warning or error"),
    D("hints", "thickness_fraction", wd_config, drift.hints.thickness_fraction, "0.05", 0.001, 1, "a thickness this far from its reference (fraction) counts as off for the cause hints"),
    D("hints", "scale_percent", wd_config, drift.hints.scale_percent, "0.5", 0.01, 100, "a position scale this large (per cent) counts as off"),
    D("hints", "shift_mm", wd_config, drift.hints.shift_mm, "1.0", 0.01, 100, "a wedge slice displaced this far counts as off"),
    D("hints", "tilt_deg", wd_config, drift.hints.tilt_deg, "2.0", 0.1, 45, "a ramp tilt this large: phantom not level"),
    D("hints", "k_sigma", wd_config, drift.hints.k_sigma, "2", 0, 10, "... and beyond this many standard uncertainties"),
    D("hints", "gradient_mT_per_m", wd_config, drift.hints.gradient_mt_per_m, "0", 0, 1000, "slice-select gradient of the QA protocol, for the centre-frequency figure (0: unknown)"),
    D("hints", "rf_bandwidth_hz", wd_config, drift.hints.rf_bandwidth_hz, "0", 0, 1e6, "excitation bandwidth of the QA protocol; gives the gradient when it is unknown (0: unknown)"),
};

/* The phantom model file's table lives with the model in analysis/model_file.c, so that the
 * built-in model, the simulator and the daemon read a model file by one parser. */

/* Tolerance sets: the same fields in [default] and in each [rule NAME]. */
static const field tol_fields[] = {
    S("", "name", an_tolerance, name, NULL, "tolerance set name, stored with every result"),
    B("", "thickness_relative", an_tolerance, thickness_relative, NULL, "limits are fractions of the nominal thickness"),
    D("", "thickness_fail", an_tolerance, thickness_fail, NULL, 0, 50, "|thickness - nominal| above this fails (mm or fraction)"),
    D("", "thickness_warn", an_tolerance, thickness_warn, NULL, 0, 50, "above this warns"),
    D("", "bar_difference_fail", an_tolerance, bar_difference_fail, NULL, 0, 100, "|bar length difference| above this fails (mm)"),
    D("", "bar_difference_warn", an_tolerance, bar_difference_warn, NULL, 0, 100, "above this warns"),
    D("", "min_snr", an_tolerance, min_snr, NULL, 0, 10000, "below this SNR results are unmeasurable"),
};

#define NFIELDS(t) (sizeof(t) / sizeof((t)[0]))

/* Sets one field from text; returns 0 and a reason in why on a bad value. */
static int set_value(const field *f, void *base, const char *value, char *why, size_t nwhy)
{
    char *p = (char *)base + f->off;
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

static void apply_defaults(const field *t, size_t n, void *base)
{
    char why[256];
    for (size_t i = 0; i < n; i++)
        if (t[i].def)
            (void)set_value(&t[i], base, t[i].def, why, sizeof why);
}

static const field *find_field(const field *t, size_t n, const char *section, const char *key)
{
    for (size_t i = 0; i < n; i++)
        if ((!section || !strcmp(t[i].section, section)) && !strcmp(t[i].key, key))
            return &t[i];
    return NULL;
}

static void print_value(const field *f, const void *base, FILE *out)
{
    const char *p = (const char *)base + f->off;
    switch (f->type) {
    case F_STR: fprintf(out, "%s = %s", f->key, p); break;
    case F_INT: fprintf(out, "%s = %d", f->key, *(const int *)p); break;
    case F_DBL: fprintf(out, "%s = %.10g", f->key, *(const double *)p); break;
    case F_BOOL: fprintf(out, "%s = %s", f->key, *(const int *)p ? "yes" : "no"); break;
    case F_ENUM: fprintf(out, "%s = %s", f->key, f->choices[*(const int *)p]); break;
    }
    if (f->help && f->help[0])
        fprintf(out, "    ; %s", f->help);
    fputc('\n', out);
}

static void print_table(const field *t, size_t n, const void *base, FILE *out, const char *only)
{
    const char *section = NULL;
    for (size_t i = 0; i < n; i++) {
        if (only) {
            if (i == 0)
                fprintf(out, "[%s]\n", only);
        } else if (!section || strcmp(section, t[i].section)) {
            section = t[i].section;
            fprintf(out, "%s[%s]\n", i ? "\n" : "", section);
        }
        print_value(&t[i], base, out);
    }
}

/* ---- parsing with inih: the handler records the first reason; inih returns its line ---- */

typedef struct parse_ctx {
    char why[256];
    int kind; /* 0 config, 1 model, 2 tolerance */
    void *target;
    wd_tol_rule *rule; /* tolerance: the rule being filled, NULL in [default] */
} parse_ctx;

static int config_handler(void *user, const char *section, const char *key, const char *value)
{
    parse_ctx *ctx = user;
    if (ctx->why[0])
        return 0;
    wd_config *c = ctx->target;
    if (!strcmp(section, "aliases")) {
        if (c->n_aliases == WD_MAX_ALIASES) {
            snprintf(ctx->why, sizeof ctx->why, "more than %d aliases", WD_MAX_ALIASES);
            return 0;
        }
        if (strlen(key) >= sizeof c->alias[0].station || strlen(value) >= sizeof c->alias[0].alias) {
            snprintf(ctx->why, sizeof ctx->why, "alias '%s' is too long", key);
            return 0;
        }
        wd_alias *a = &c->alias[c->n_aliases++];
        sw_strlcpy(a->station, key, sizeof a->station);
        sw_strlcpy(a->alias, value, sizeof a->alias);
        return 1;
    }
    const field *f = find_field(config_fields, NFIELDS(config_fields), section, key);
    if (!f) {
        snprintf(ctx->why, sizeof ctx->why, "unknown setting '%s' in [%s]", key, section);
        return 0;
    }
    return set_value(f, c, value, ctx->why, sizeof ctx->why);
}

static int tol_handler(void *user, const char *section, const char *key, const char *value)
{
    parse_ctx *ctx = user;
    if (ctx->why[0])
        return 0;
    wd_tolerances *t = ctx->target;
    an_tolerance *dst;
    if (!strcmp(section, "default")) {
        dst = &t->base;
    } else if (!strncmp(section, "rule ", 5) && section[5]) {
        const char *name = section + 5;
        wd_tol_rule *r = ctx->rule;
        if (!r || strcmp(r->tol.name, name)) {
            if (t->n_rules == WD_MAX_TOL_RULES) {
                snprintf(ctx->why, sizeof ctx->why, "more than %d rules", WD_MAX_TOL_RULES);
                return 0;
            }
            r = &t->rule[t->n_rules++];
            r->tol = t->base; /* a rule starts from the default set read so far */
            if (strlen(name) >= sizeof r->tol.name) {
                snprintf(ctx->why, sizeof ctx->why, "rule name '%s' is too long", name);
                return 0;
            }
            sw_strlcpy(r->tol.name, name, sizeof r->tol.name);
            sw_strlcpy(r->station, "*", sizeof r->station);
            sw_strlcpy(r->series_type, "*", sizeof r->series_type);
            ctx->rule = r;
        }
        if (!strcmp(key, "station")) {
            if (strlen(value) >= sizeof r->station) {
                snprintf(ctx->why, sizeof ctx->why, "station '%s' is too long", value);
                return 0;
            }
            sw_strlcpy(r->station, value, sizeof r->station);
            return 1;
        }
        if (!strcmp(key, "series_type")) {
            if (strcmp(value, "t1") && strcmp(value, "t2") && strcmp(value, "3d") &&
                strcmp(value, "*")) {
                snprintf(ctx->why, sizeof ctx->why, "series_type must be t1, t2, 3d or *");
                return 0;
            }
            sw_strlcpy(r->series_type, value, sizeof r->series_type);
            return 1;
        }
        if (!strcmp(key, "name")) {
            snprintf(ctx->why, sizeof ctx->why, "a rule is named by its section");
            return 0;
        }
        dst = &r->tol;
    } else {
        snprintf(ctx->why, sizeof ctx->why, "unknown section [%s] (use [default] or [rule NAME])",
                 section);
        return 0;
    }
    const field *f = find_field(tol_fields, NFIELDS(tol_fields), NULL, key);
    if (!f) {
        snprintf(ctx->why, sizeof ctx->why, "unknown setting '%s' in [%s]", key, section);
        return 0;
    }
    return set_value(f, dst, value, ctx->why, sizeof ctx->why);
}

/* inih reads at most INI_MAX_LINE - 1 bytes of a line and treats the rest as a new line: refuse
 * longer lines here, naming them, instead of misreading them. */
static sw_status check_line_lengths(const char *path, sw_error *err)
{
    FILE *f = fopen(path, "r");
    if (!f)
        return sw_error_set(err, SW_EIO, "%s: cannot open: %s", path, strerror(errno));
    int line = 1, len = 0, c;
    sw_status st = SW_OK;
    while ((c = getc(f)) != EOF) {
        if (c == '\n') {
            line++;
            len = 0;
        } else if (++len > INI_MAX_LINE - 2) {
            st = sw_error_set(err, SW_EINVAL, "%s:%d: line longer than %d characters", path, line,
                              INI_MAX_LINE - 2);
            break;
        }
    }
    fclose(f);
    return st;
}

static sw_status parse(const char *path, ini_handler h, parse_ctx *ctx, sw_error *err)
{
    sw_status st = check_line_lengths(path, err);
    if (st != SW_OK)
        return st;
    int line = ini_parse(path, h, ctx);
    if (line == -1)
        return sw_error_set(err, SW_EIO, "%s: cannot open: %s", path, strerror(errno));
    if (line == -2)
        return sw_error_set(err, SW_ENOMEM, "%s: out of memory", path);
    if (line > 0)
        return sw_error_set(err, SW_EINVAL, "%s:%d: %s", path, line,
                            ctx->why[0] ? ctx->why : "syntax error");
    return SW_OK;
}

/* ---- the main configuration ---- */

void wd_config_default(wd_config *c)
{
    memset(c, 0, sizeof *c);
    wd_drift_opts_default(&c->drift); /* the [drift] fields' defaults live in drift.c and analysis/ */
    apply_defaults(config_fields, NFIELDS(config_fields), c);
}

sw_status wd_config_load(wd_config *c, const char *path, sw_error *err)
{
    wd_config *tmp = malloc(sizeof *tmp);
    if (!tmp)
        return sw_error_set(err, SW_ENOMEM, "%s: out of memory", path);
    wd_config_default(tmp);
    parse_ctx ctx = {.kind = 0, .target = tmp};
    sw_status st = parse(path, config_handler, &ctx, err);
    if (st == SW_OK && !tmp->folder[0])
        st = sw_error_set(err, SW_EINVAL, "%s: [watch] folder must not be empty", path);
    if (st == SW_OK && !tmp->database[0])
        st = sw_error_set(err, SW_EINVAL, "%s: [watch] database must not be empty", path);
    if (st == SW_OK) {
        sw_error e2;
        sw_error_clear(&e2);
        if (wd_drift_opts_check(&tmp->drift, &e2) != SW_OK)
            st = sw_error_set(err, SW_EINVAL, "%s: [drift]: %s", path, e2.msg);
    }
    if (st == SW_OK) {
        sw_strlcpy(tmp->path, path, sizeof tmp->path);
        *c = *tmp;
    } else {
        wd_config_default(c);
    }
    free(tmp);
    return st;
}

static void beside(char *dst, size_t n, const char *folder, const char *name)
{
    char parent[PATH_MAX];
    sw_strlcpy(parent, folder, sizeof parent);
    size_t len = strlen(parent);
    while (len > 1 && parent[len - 1] == '/')
        parent[--len] = '\0';
    char *slash = strrchr(parent, '/');
    if (!slash)
        snprintf(dst, n, "%s", name);
    else if (slash == parent)
        snprintf(dst, n, "/%s", name);
    else {
        *slash = '\0';
        snprintf(dst, n, "%s/%s", parent, name);
    }
}

void wd_config_resolve(wd_config *c)
{
    if (!c->archive[0])
        beside(c->archive, sizeof c->archive, c->folder, "archive");
    if (!c->quarantine[0])
        beside(c->quarantine, sizeof c->quarantine, c->folder, "quarantine");
    if (!c->ignored[0])
        beside(c->ignored, sizeof c->ignored, c->folder, "ignored");
    if (!c->images[0])
        beside(c->images, sizeof c->images, c->folder, "images");
}

void wd_config_print(const wd_config *c, FILE *f)
{
    fprintf(f, "; slicewarden %s effective configuration (%s)\n", SW_VERSION,
            c->path[0] ? c->path : "built-in defaults");
    print_table(config_fields, NFIELDS(config_fields), c, f, NULL);
    fprintf(f, "\n[aliases]\n");
    for (int i = 0; i < c->n_aliases; i++)
        fprintf(f, "%s = %s\n", c->alias[i].station, c->alias[i].alias);
}

const char *wd_config_alias(const wd_config *c, const char *station)
{
    for (int i = 0; i < c->n_aliases; i++)
        if (!strcmp(c->alias[i].station, station))
            return c->alias[i].alias;
    return station;
}

/* ---- phantom model ---- */

sw_status wd_model_load(an_model *m, const char *path, sw_error *err)
{
    enum { MODEL_MAX_BYTES = 1 << 20 }; /* a model file is a few kilobytes */
    char *text = NULL;
    sw_status st = SW_OK;
    FILE *f = fopen(path, "rb");
    if (!f) {
        st = sw_error_set(err, SW_EIO, "%s: cannot open: %s", path, strerror(errno));
        goto out;
    }
    if (!(text = malloc(MODEL_MAX_BYTES + 1))) {
        st = sw_error_set(err, SW_ENOMEM, "%s: out of memory", path);
        goto out;
    }
    size_t n = fread(text, 1, MODEL_MAX_BYTES + 1, f);
    if (ferror(f)) {
        st = sw_error_set(err, SW_EIO, "%s: cannot read: %s", path, strerror(errno));
        goto out;
    }
    if (n > MODEL_MAX_BYTES) {
        st = sw_error_set(err, SW_EINVAL, "%s: larger than %d bytes: not a model file", path,
                          MODEL_MAX_BYTES);
        goto out;
    }
    if (memchr(text, '\0', n)) {
        st = sw_error_set(err, SW_EINVAL, "%s: holds a NUL byte: not a model file", path);
        goto out;
    }
    text[n] = '\0';
    /* over the built-in large phantom: keys the file leaves out keep its values */
    an_model tmp;
    if ((st = an_model_large(&tmp)) != SW_OK) {
        st = sw_error_set(err, st, "%s: the built-in model could not be read (%s)", path,
                          tmp.name);
        goto out;
    }
    st = an_model_parse(&tmp, text, path, err);
    if (st == SW_OK)
        *m = tmp;
out:
    if (f)
        fclose(f);
    free(text);
    return st;
}

void wd_model_print(const an_model *m, FILE *f)
{
    char *t = an_model_format(m);
    fputs(t ? t : "; (out of memory)\n", f);
    free(t);
}

/* ---- tolerances ---- */

void wd_tolerances_default(wd_tolerances *t)
{
    memset(t, 0, sizeof *t);
    an_tolerance_default(&t->base);
    /* 3D acquisitions have their own entry: the ramp slice's measurement is a partition's
     * thickness, which the 2D guidance does not cover. Until a site sets its own, the built-in
     * entry has the 2D figures under its own name, so results say which entry judged them. A
     * tolerance file replaces it (a file without a 3d rule judges 3D series by its [default]). */
    wd_tol_rule *r = &t->rule[t->n_rules++];
    sw_strlcpy(r->station, "*", sizeof r->station);
    sw_strlcpy(r->series_type, "3d", sizeof r->series_type);
    r->tol = t->base;
    snprintf(r->tol.name, sizeof r->tol.name, "%s", "partition-3d-default");
}

static const char *tol_check(const an_tolerance *t)
{
    if (t->thickness_warn > t->thickness_fail)
        return "thickness_warn must not exceed thickness_fail";
    if (t->bar_difference_warn > t->bar_difference_fail)
        return "bar_difference_warn must not exceed bar_difference_fail";
    if (t->thickness_relative && t->thickness_fail >= 1)
        return "a relative thickness_fail is a fraction below 1";
    return NULL;
}

sw_status wd_tolerances_load(wd_tolerances *t, const char *path, sw_error *err)
{
    wd_tolerances *tmp = malloc(sizeof *tmp);
    if (!tmp)
        return sw_error_set(err, SW_ENOMEM, "%s: out of memory", path);
    wd_tolerances_default(tmp);
    tmp->n_rules = 0; /* the file's rules only */
    parse_ctx ctx = {.kind = 2, .target = tmp};
    sw_status st = parse(path, tol_handler, &ctx, err);
    for (int i = -1; st == SW_OK && i < tmp->n_rules; i++) {
        const an_tolerance *x = i < 0 ? &tmp->base : &tmp->rule[i].tol;
        const char *why = tol_check(x);
        if (why)
            st = sw_error_set(err, SW_EINVAL, "%s: [%s%s]: %s", path, i < 0 ? "default" : "rule ",
                              i < 0 ? "" : x->name, why);
    }
    if (st == SW_OK)
        *t = *tmp;
    free(tmp);
    return st;
}

static int matches(const char *pattern, const char *value)
{
    return !strcmp(pattern, "*") || !strcmp(pattern, value);
}

const an_tolerance *wd_tolerances_for(const wd_tolerances *t, const char *station,
                                      const char *series_type)
{
    for (int i = t->n_rules - 1; i >= 0; i--)
        if (matches(t->rule[i].station, station) && matches(t->rule[i].series_type, series_type))
            return &t->rule[i].tol;
    return &t->base;
}

void wd_tolerances_print(const wd_tolerances *t, FILE *f)
{
    print_table(tol_fields, NFIELDS(tol_fields), &t->base, f, "default");
    for (int i = 0; i < t->n_rules; i++) {
        char sec[96];
        snprintf(sec, sizeof sec, "rule %s", t->rule[i].tol.name);
        fprintf(f, "\n");
        print_table(tol_fields + 1, NFIELDS(tol_fields) - 1, &t->rule[i].tol, f, sec);
        fprintf(f, "station = %s\nseries_type = %s\n", t->rule[i].station, t->rule[i].series_type);
    }
}
