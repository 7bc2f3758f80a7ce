/* helpers.h: shared by the trends tests: running the Python references, deterministic noise, and
 * a store filled through the db/ API with the rows the watch service writes. */
#ifndef TRENDS_HELPERS_H
#define TRENDS_HELPERS_H

#include <criterion/criterion.h>
#include <jansson.h>
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "db.h"

#define PY "/usr/bin/python3" /* Debian's interpreter, which sees numpy and scipy */
#define SLICEWARDEN SW_BINARY_DIR "/daemon/slicewarden"

/* Runs SW_SOURCE_DIR/tests/trends/<script> with in as JSON on stdin; returns its JSON output. */
static inline json_t *run_reference(const char *script, json_t *in)
{
    char inpath[] = "/tmp/sw-trends-in-XXXXXX";
    int fd = mkstemp(inpath);
    cr_assert(fd >= 0);
    FILE *f = fdopen(fd, "w");
    cr_assert(f);
    cr_assert_eq(json_dumpf(in, f, JSON_REAL_PRECISION(17)), 0);
    fclose(f);
    char cmd[4096];
    snprintf(cmd, sizeof cmd, PY " %s/tests/trends/%s < %s", SW_SOURCE_DIR, script, inpath);
    FILE *p = popen(cmd, "r");
    cr_assert(p, "cannot run %s", cmd);
    json_error_t je;
    json_t *out = json_loadf(p, 0, &je);
    int st = pclose(p);
    unlink(inpath);
    cr_assert_eq(st, 0, "%s failed (status %d)", script, st);
    cr_assert(out, "%s: bad JSON: %s", script, je.text);
    return out;
}

static inline double jnum_at(json_t *o, const char *key)
{
    json_t *v = json_object_get(o, key);
    cr_assert(v && json_is_number(v), "reference has no number '%s'", key);
    return json_number_value(v);
}

static inline double jarr_at(json_t *o, const char *key, size_t i)
{
    json_t *a = json_object_get(o, key);
    cr_assert(a && json_is_array(a) && i < json_array_size(a), "reference has no %s[%zu]", key, i);
    return json_number_value(json_array_get(a, i));
}

/* |a - b| <= tol * max(1, |b|) */
#define assert_close(a, b, tol, ...)                                                               \
    cr_assert(fabs((a) - (b)) <= (tol)*fmax(1.0, fabs(b)), __VA_ARGS__)

/* Deterministic normal deviates (a 64-bit LCG and Box-Muller), so runs repeat exactly. */
typedef struct rng {
    uint64_t s;
} rng;
static inline double rng_unif(rng *r)
{
    r->s = r->s * 6364136223846793005ULL + 1442695040888963407ULL;
    return ((r->s >> 11) + 0.5) / 9007199254740992.0;
}
static inline double rng_normal(rng *r)
{
    double u = rng_unif(r), v = rng_unif(r);
    return sqrt(-2.0 * log(u)) * cos(2.0 * M_PI * v);
}

/* A fresh temporary folder (left for inspection when a test fails; removed by the OS's tmp). */
static inline void make_tmpdir(char *buf, size_t n, const char *tag)
{
    snprintf(buf, n, "/tmp/sw-trends-%s-XXXXXX", tag);
    cr_assert(mkdtemp(buf), "mkdtemp");
}

/* ---- a store filled with the rows the watch service writes ---- */

static inline int64_t add_scanner(db *d, const char *station, const char *serial, const char *model,
                                  const char *alias)
{
    db_scanner_info s = {.station_name = station,
                         .device_serial = serial,
                         .manufacturer = "Slicewarden Simulator",
                         .model = model,
                         .institution = "Alderbrook Regional Hospital",
                         .site_alias = alias};
    int64_t id = 0;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_scanner_upsert(d, &s, &id, &err), SW_OK, "%s", err.msg);
    return id;
}

/* A stored series acquired on date (YYYYMMDD) at time (HHMMSS) with one finished run; returns the
 * run id (series id in *series_id). */
static inline int64_t add_series_run(db *d, int64_t scanner, const char *uid, const char *date,
                                     const char *time, const char *type, const char *description,
                                     int number, int64_t *series_id)
{
    sw_error err;
    sw_error_clear(&err);
    char study[80];
    snprintf(study, sizeof study, "%s.1", uid);
    db_series_info si = {.series_instance_uid = uid,
                         .study_instance_uid = study,
                         .scanner_id = scanner,
                         .series_number = number,
                         .series_date = date,
                         .series_time = time,
                         .description = description,
                         .protocol = description,
                         .series_type = type,
                         .images_expected = 11,
                         .echoes_expected = strcmp(type, "t2") ? 1 : 2};
    int64_t sid = 0, run = 0;
    cr_assert_eq(db_series_upsert(d, &si, &sid, NULL, &err), SW_OK, "%s", err.msg);
    cr_assert_eq(db_series_set_state(d, sid, DB_SERIES_COLLECTING, DB_SERIES_COMPLETE, NULL, &err),
                 SW_OK, "%s", err.msg);
    cr_assert_eq(db_series_set_state(d, sid, DB_SERIES_COMPLETE, DB_SERIES_MEASURED, NULL, &err),
                 SW_OK, "%s", err.msg);
    db_run_info ri = {.program_version = "0.1.0",
                      .config_hash = "sha256:test",
                      .phantom_model = "large",
                      .tolerance_set = "default"};
    cr_assert_eq(db_run_begin(d, sid, &ri, &run, &err), SW_OK, "%s", err.msg);
    if (series_id)
        *series_id = sid;
    return run;
}

static inline void finish_run(db *d, int64_t run, int64_t sid, db_verdict v)
{
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_run_finish(d, run, 1, v, NULL, &err), SW_OK, "%s", err.msg);
    cr_assert_eq(db_series_set_state(d, sid, DB_SERIES_MEASURED, DB_SERIES_STORED, NULL, &err),
                 SW_OK, "%s", err.msg);
}

/* One measurement row as daemon/store.c writes it; the verdict is set from the limits. */
static inline db_verdict add_row(db *d, int64_t run, const char *metric, int slice, int echo,
                                 double value, double unc, double nominal, double lo, double hi,
                                 double warn_lo, double warn_hi)
{
    db_measurement m;
    memset(&m, 0, sizeof m);
    m.metric = metric;
    m.slice = slice;
    m.echo = echo;
    m.value = value;
    m.uncertainty = unc;
    m.unit = "mm";
    m.nominal = nominal;
    m.limit_lo = lo;
    m.limit_hi = hi;
    if (isnan(value)) {
        m.verdict = DB_UNMEASURABLE;
        m.reason = "strip not found";
    } else if (value < lo || value > hi) {
        m.verdict = DB_FAIL;
    } else if (value < warn_lo || value > warn_hi) {
        m.verdict = DB_WARN;
    } else {
        m.verdict = DB_PASS;
    }
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_measurement_add(d, run, &m, &err), SW_OK, "%s", err.msg);
    return m.verdict;
}

#endif
