/* test_db.c: the store: migrations, state machines, de-duplication and resume, WAL readers, locks,
 * fault injection and a crash mid-series, queries, CSV, and the sqlite3 shell's view of it. */
#include <criterion/criterion.h>
#include <dirent.h>
#include <errno.h>
#include <math.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include "db.h"
#include "dbint.h"

/* ---- fixtures: a fresh temporary folder per test ---- */

static char tmpdir[256];
static char dbfile[300];

static void make_tmp(void)
{
    const char *base = getenv("TMPDIR");
    snprintf(tmpdir, sizeof tmpdir, "%s/swdb-test-XXXXXX", base && *base ? base : "/tmp");
    cr_assert_not_null(mkdtemp(tmpdir), "mkdtemp: %s", strerror(errno));
    snprintf(dbfile, sizeof dbfile, "%s/qa.sqlite", tmpdir);
}

static void remove_tmp(void)
{
    DIR *dir = opendir(tmpdir);
    struct dirent *e;
    char p[600];
    if (!dir)
        return;
    while ((e = readdir(dir))) {
        if (!strcmp(e->d_name, ".") || !strcmp(e->d_name, ".."))
            continue;
        snprintf(p, sizeof p, "%s/%s", tmpdir, e->d_name);
        unlink(p);
    }
    closedir(dir);
    rmdir(tmpdir);
}

TestSuite(db, .init = make_tmp, .fini = remove_tmp);

static db *open_rw(void)
{
    db *d = NULL;
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(db_open(dbfile, DB_OPEN_RW | DB_OPEN_CREATE, &d, &e), SW_OK, "%s", e.msg);
    return d;
}

/* An independent connection through SQLite's own API, for looking behind the store's back. */
static sqlite3 *raw_open(void)
{
    sqlite3 *s = NULL;
    cr_assert_eq(sqlite3_open_v2(dbfile, &s, SQLITE_OPEN_READWRITE, NULL), SQLITE_OK);
    return s;
}

static long long raw_int(sqlite3 *s, const char *sql)
{
    sqlite3_stmt *st = NULL;
    long long v = -1;
    cr_assert_eq(sqlite3_prepare_v2(s, sql, -1, &st, NULL), SQLITE_OK, "%s: %s", sql,
                 sqlite3_errmsg(s));
    if (sqlite3_step(st) == SQLITE_ROW)
        v = sqlite3_column_int64(st, 0);
    sqlite3_finalize(st);
    return v;
}

static long long count(db *d, const char *sql)
{
    return raw_int(d->sql, sql);
}

/* ---- a series as the daemon writes it (UIDs in the 2.25 scheme of DICOM PS3.5 B.2) ---- */

#define N_IMAGES 11
#define N_ROWS 14

static const db_scanner_info SCANNER1 = {
    "ALDMR1", "SWS-0001", "Slicewarden Simulator", "SW-SIM 1.5T", "Alderbrook Regional Hospital",
    "MR1"};
static const db_scanner_info SCANNER2 = {
    "ALDMR2", "SWS-0002", "Slicewarden Simulator", "SW-SIM 3T", "Alderbrook Regional Hospital",
    "MR2"};
static const db_run_info RUN = {SW_VERSION, "sha256:0f1e2d", "large-ramp-wedge", "acr-default"};

typedef struct series_spec {
    const db_scanner_info *scanner;
    const char *uid;
    const char *date, *time;
    const char *protocol;
    int runs;         /* 1, or 2 for a re-analysis */
    double thickness; /* the first run's value; a re-analysis adds 0.1 mm */
} series_spec;

static db_verdict thickness_verdict(double t)
{
    /* ACR large-phantom guidance: 5.0 +/- 0.7 mm (from memory); warn band at 0.5 mm is ours. */
    double e = fabs(t - 5.0);
    return e > 0.7 ? DB_FAIL : e > 0.5 ? DB_WARN : DB_PASS;
}

/* The N_ROWS rows of one run: a thickness, two bar differences, per-echo widths, one unmeasurable
 * and one informational row. value_of gives each its value so that queries can be checked. */
static void run_rows(double thickness, db_measurement *m)
{
    for (int i = 0; i < N_ROWS; i++) {
        memset(&m[i], 0, sizeof m[i]);
        m[i].uncertainty = 0.05;
        m[i].nominal = m[i].limit_lo = m[i].limit_hi = NAN;
        m[i].unit = "mm";
        if (i == 0) {
            m[i].metric = "slice_thickness";
            m[i].slice = 1;
            m[i].echo = 1;
            m[i].value = thickness;
            m[i].nominal = 5.0;
            m[i].limit_lo = 4.3;
            m[i].limit_hi = 5.7;
            m[i].verdict = thickness_verdict(thickness);
            m[i].details_json = "{\"top_mm\":50.1,\"bottom_mm\":49.8,\"crossings\":[12.5,62.6]}";
        } else if (i <= 2) {
            m[i].metric = "bar_length_difference";
            m[i].slice = i == 1 ? 1 : 11;
            m[i].echo = 1;
            m[i].value = i == 1 ? -1.2 : 5.6;
            m[i].limit_lo = -5;
            m[i].limit_hi = 5;
            m[i].verdict = fabs(m[i].value) > 5 ? DB_FAIL : DB_PASS;
        } else if (i == 3) {
            m[i].metric = "ramp_displacement";
            m[i].slice = 1;
            m[i].echo = 2;
            m[i].value = NAN;
            m[i].uncertainty = NAN;
            m[i].verdict = DB_UNMEASURABLE;
            m[i].reason = "SNR too low";
        } else if (i == 4) {
            m[i].metric = "tilt";
            m[i].unit = "deg";
            m[i].slice = 1;
            m[i].value = 1.5;
            m[i].verdict = DB_INFO;
        } else {
            m[i].metric = "strip_fwtm";
            m[i].slice = 1;
            m[i].echo = 1 + (i % 2);
            m[i].value = 90.0 + i;
            m[i].verdict = DB_INFO;
        }
    }
}

/* Writes one series the way the daemon does: one transaction, from scanner to stored. Stops at the
 * first failure, rolls back and returns its status. */
static sw_status write_series(db *d, const series_spec *sp, sw_error *e)
{
    sw_status rc;
    int64_t scanner = 0, series = 0, run = 0, file = 0, orig = 0;
    db_file_outcome how;
    char path[128], sop[80], hash[40];
    db_measurement m[N_ROWS];

    if ((rc = db_begin(d, e)) != SW_OK)
        return rc;
    if ((rc = db_scanner_upsert(d, sp->scanner, &scanner, e)) != SW_OK)
        goto out;
    db_series_info si = {sp->uid,  "2.25.4711.1.1", scanner, 3,        sp->date, sp->time,
                         "ACR T1", sp->protocol,    "t1",    N_IMAGES, 1};
    if ((rc = db_series_upsert(d, &si, &series, NULL, e)) != SW_OK)
        goto out;
    for (int i = 0; i < N_IMAGES; i++) {
        snprintf(path, sizeof path, "incoming/%s-%02d.dcm", sp->uid, i);
        snprintf(sop, sizeof sop, "%s.%d", sp->uid, i + 1);
        snprintf(hash, sizeof hash, "sha256:%08x", (unsigned)(i * 2654435761u));
        db_file_info fi = {path, hash, 133000 + i, NULL};
        if ((rc = db_file_add(d, &fi, &file, &how, &orig, e)) != SW_OK)
            goto out;
        if ((rc = db_file_parsed(d, file, sop, series, e)) != SW_OK)
            goto out;
    }
    if ((rc = db_series_set_state(d, series, DB_SERIES_COLLECTING, DB_SERIES_COMPLETE, NULL, e)) !=
        SW_OK)
        goto out;
    for (int k = 0; k < sp->runs; k++) {
        if ((rc = db_run_begin(d, series, &RUN, &run, e)) != SW_OK)
            goto out;
        run_rows(sp->thickness + 0.1 * k, m);
        for (int i = 0; i < N_ROWS; i++)
            if ((rc = db_measurement_add(d, run, &m[i], e)) != SW_OK)
                goto out;
        if ((rc = db_run_finish(d, run, 1, m[0].verdict, NULL, e)) != SW_OK)
            goto out;
    }
    if ((rc = db_series_files_transition(d, series, DB_FILE_PARSED, DB_FILE_MEASURED, NULL, NULL,
                                         e)) != SW_OK ||
        (rc = db_series_set_state(d, series, DB_SERIES_COMPLETE, DB_SERIES_MEASURED, NULL, e)) !=
            SW_OK ||
        (rc = db_series_files_transition(d, series, DB_FILE_MEASURED, DB_FILE_STORED, NULL, NULL,
                                         e)) != SW_OK ||
        (rc = db_series_set_state(d, series, DB_SERIES_MEASURED, DB_SERIES_STORED, NULL, e)) !=
            SW_OK)
        goto out;
    rc = db_commit(d, e);
out:
    if (rc != SW_OK)
        db_rollback(d, NULL);
    return rc;
}

static const series_spec SPEC1 = {&SCANNER1, "2.25.4711.2.1", "20240105", "101530.25", "ACR_T1", 1,
                                  5.1};

static long long rows_total(db *d)
{
    return count(d, "SELECT (SELECT count(*) FROM scanners) + (SELECT count(*) FROM series) + "
                    "(SELECT count(*) FROM files) + (SELECT count(*) FROM runs) + "
                    "(SELECT count(*) FROM measurements) + (SELECT count(*) FROM alerts)");
}

/* ---- running the sqlite3 shell ---- */

/* Runs argv, returns its exit status and its standard output (and error) in out. */
static int run_capture(char *const argv[], char *out, size_t n)
{
    int fd[2];
    size_t len = 0;
    cr_assert_eq(pipe(fd), 0);
    pid_t pid = fork();
    cr_assert_neq(pid, -1);
    if (pid == 0) {
        dup2(fd[1], 1);
        dup2(fd[1], 2);
        close(fd[0]);
        close(fd[1]);
        execvp(argv[0], argv);
        _exit(127);
    }
    close(fd[1]);
    ssize_t r;
    while (len + 1 < n && (r = read(fd[0], out + len, n - 1 - len)) > 0)
        len += (size_t)r;
    out[len] = '\0';
    close(fd[0]);
    int status = 0;
    waitpid(pid, &status, 0);
    return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
}

static int shell(const char *sql, char *out, size_t n)
{
    char *argv[] = {"sqlite3", "-batch", dbfile, (char *)sql, NULL};
    int st = run_capture(argv, out, n);
    cr_assert_neq(st, 127,
                  "Debian's sqlite3 shell is needed for this check (apt-get install "
                  "sqlite3)");
    return st;
}

/* ================================================================================================
 * migrations
 * ============================================================================================== */

Test(db, migrates_an_empty_file)
{
    db *d = open_rw();
    char v[64];
    cr_assert_eq(count(d, "PRAGMA user_version"), DB_SCHEMA_VERSION);
    cr_assert_eq(count(d, "PRAGMA application_id"), DB_APPLICATION_ID);
    cr_assert_eq(count(d, "SELECT count(*) FROM migrations"), DB_NMIGRATIONS);
    cr_assert_eq(count(d, "SELECT max(version) FROM migrations"), DB_SCHEMA_VERSION);
    cr_assert_eq(count(d, "PRAGMA foreign_keys"), 1);
    cr_assert_eq(db_meta_get(d, "created_by_version", v, sizeof v, NULL), SW_OK);
    cr_assert_str_eq(v, SW_VERSION);
    cr_assert_eq(db_meta_get(d, "application", v, sizeof v, NULL), SW_OK);
    cr_assert_str_eq(v, "slicewarden");
    db_close(d);
}

Test(db, reopening_is_idempotent)
{
    db *d = open_rw();
    char created[64], again[64];
    int64_t id = 0;
    cr_assert_eq(db_meta_get(d, "created_at", created, sizeof created, NULL), SW_OK);
    cr_assert_eq(db_scanner_upsert(d, &SCANNER1, &id, NULL), SW_OK);
    db_close(d);
    for (int i = 0; i < 3; i++) {
        d = open_rw();
        cr_assert_eq(count(d, "SELECT count(*) FROM migrations"), DB_NMIGRATIONS);
        cr_assert_eq(count(d, "SELECT count(*) FROM scanners"), 1);
        cr_assert_eq(db_meta_get(d, "created_at", again, sizeof again, NULL), SW_OK);
        cr_assert_str_eq(again, created);
        db_close(d);
    }
}

Test(db, migrates_forward_step_by_step)
{
    db *d = NULL;
    sw_error e;
    sw_error_clear(&e);
    db_open_opts o = {.target_version = 1};
    cr_assert_eq(db_open_ex(dbfile, DB_OPEN_RW | DB_OPEN_CREATE, &o, &d, &e), SW_OK, "%s", e.msg);
    cr_assert_eq(count(d, "PRAGMA user_version"), 1);
    cr_assert_eq(count(d, "SELECT count(*) FROM sqlite_schema WHERE name = 'series_time'"), 0);
    int64_t id = 0;
    cr_assert_eq(db_scanner_upsert(d, &SCANNER1, &id, NULL), SW_OK);
    db_close(d);

    /* A reader refuses an old schema rather than guess. */
    cr_assert_eq(db_open(dbfile, DB_OPEN_RO, &d, &e), SW_EUNSUPPORTED);
    cr_assert_null(d);

    d = open_rw();
    cr_assert_eq(count(d, "PRAGMA user_version"), DB_SCHEMA_VERSION);
    cr_assert_eq(count(d, "SELECT count(*) FROM sqlite_schema WHERE name = 'series_time'"), 1);
    cr_assert_eq(count(d, "SELECT count(*) FROM migrations"), DB_NMIGRATIONS);
    cr_assert_eq(count(d, "SELECT count(*) FROM scanners"), 1, "rows survive a migration");
    db_close(d);
}

/* A fault at any step of the migration leaves the file without a schema, and a later open succeeds.
 */
Test(db, a_failed_migration_leaves_nothing)
{
    db *d = open_rw();
    long total = d->steps;
    db_close(d);
    remove_tmp();
    make_tmp();
    cr_assert_gt(total, 10);
    for (long n = 1; n <= total; n++) {
        sw_error e;
        sw_error_clear(&e);
        db_open_opts o = {.fault_at = n};
        sw_status st = db_open_ex(dbfile, DB_OPEN_RW | DB_OPEN_CREATE, &o, &d, &e);
        cr_assert_neq(st, SW_OK, "step %ld of %ld", n, total);
        cr_assert_null(d);
        cr_assert(strstr(e.msg, "injected fault"), "%s", e.msg);
        sqlite3 *s = raw_open();
        cr_assert_eq(raw_int(s, "PRAGMA user_version"), 0, "step %ld", n);
        cr_assert_eq(raw_int(s, "SELECT count(*) FROM sqlite_schema"), 0, "step %ld", n);
        sqlite3_close(s);
    }
    d = open_rw();
    cr_assert_eq(count(d, "PRAGMA user_version"), DB_SCHEMA_VERSION);
    db_close(d);
}

Test(db, refuses_foreign_and_newer_files)
{
    sqlite3 *s = NULL;
    db *d = NULL;
    sw_error e;
    cr_assert_eq(sqlite3_open(dbfile, &s), SQLITE_OK);
    cr_assert_eq(sqlite3_exec(s, "CREATE TABLE other(x)", NULL, NULL, NULL), SQLITE_OK);
    sqlite3_close(s);
    sw_error_clear(&e);
    cr_assert_eq(db_open(dbfile, DB_OPEN_RW, &d, &e), SW_EFORMAT);
    cr_assert(strstr(e.msg, dbfile) && strstr(e.msg, "not a slicewarden database"), "%s", e.msg);
    unlink(dbfile);

    d = open_rw();
    db_close(d);
    s = raw_open();
    cr_assert_eq(sqlite3_exec(s, "PRAGMA user_version = 99", NULL, NULL, NULL), SQLITE_OK);
    sqlite3_close(s);
    sw_error_clear(&e);
    cr_assert_eq(db_open(dbfile, DB_OPEN_RW, &d, &e), SW_EUNSUPPORTED);
    cr_assert(strstr(e.msg, "newer"), "%s", e.msg);

    sw_error_clear(&e);
    cr_assert_eq(db_open("/nonexistent-dir/x.sqlite", DB_OPEN_RW, &d, &e), SW_ENOTFOUND);
    cr_assert_eq(db_open(dbfile, DB_OPEN_RO | DB_OPEN_CREATE, &d, NULL), SW_EINVAL);
    cr_assert_eq(db_open(dbfile, DB_OPEN_RO | DB_OPEN_RW, &d, NULL), SW_EINVAL);
    cr_assert_null(d);
}

/* ================================================================================================
 * integrity rules
 * ============================================================================================== */

Test(db, foreign_keys_are_enforced)
{
    db *d = open_rw();
    sw_error e;
    sw_error_clear(&e);
    db_measurement rows[N_ROWS];
    run_rows(5.0, rows);
    cr_assert_eq(db_measurement_add(d, 4242, &rows[0], &e), SW_EINVAL);
    cr_assert(strstr(e.msg, "FOREIGN KEY"), "%s", e.msg);

    int64_t id = 0;
    db_series_info si = {"1.2.3.4", "1.2.3", 77, 0, NULL, NULL, NULL, NULL, NULL, 11, 1};
    sw_error_clear(&e);
    cr_assert_eq(db_series_upsert(d, &si, &id, NULL, &e), SW_EINVAL, "a missing scanner");
    cr_assert(strstr(e.msg, "FOREIGN KEY"), "%s", e.msg);

    db_file_info fi = {"a.dcm", "sha256:aa", 10, NULL};
    db_file_outcome how;
    cr_assert_eq(db_file_add(d, &fi, &id, &how, NULL, NULL), SW_OK);
    sw_error_clear(&e);
    cr_assert_eq(db_file_parsed(d, id, "1.2.3.4.5", 999, &e), SW_EINVAL, "a missing series");
    cr_assert_eq(db_run_begin(d, 999, &RUN, &id, NULL), SW_EINVAL);
    cr_assert_eq(count(d, "SELECT count(*) FROM measurements") +
                     count(d, "SELECT count(*) FROM "
                              "series") +
                     count(d, "SELECT count(*) FROM runs"),
                 0);
    cr_assert_eq(count(d, "SELECT count(*) FROM files WHERE state = 'seen'"), 1);
    db_close(d);
}

Test(db, measurement_rows_are_validated)
{
    db *d = open_rw();
    cr_assert_eq(write_series(d, &SPEC1, NULL), SW_OK);
    int64_t series = count(d, "SELECT id FROM series"), run = 0;
    cr_assert_eq(db_run_begin(d, series, &RUN, &run, NULL), SW_OK);
    db_measurement rows[N_ROWS], m;
    run_rows(5.0, rows);
    long long before = count(d, "SELECT count(*) FROM measurements");

    m = rows[0];
    m.value = NAN; /* a pass without a value */
    cr_assert_eq(db_measurement_add(d, run, &m, NULL), SW_EINVAL);
    m = rows[3];
    m.reason = NULL; /* unmeasurable without a reason */
    cr_assert_eq(db_measurement_add(d, run, &m, NULL), SW_EINVAL);
    m = rows[0];
    m.value = INFINITY;
    cr_assert_eq(db_measurement_add(d, run, &m, NULL), SW_EINVAL);
    m = rows[0];
    m.details_json = "{\"top_mm\": 50.1,"; /* truncated JSON (RFC 8259) */
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(db_measurement_add(d, run, &m, &e), SW_EINVAL);
    cr_assert(strstr(e.msg, "not a JSON object"), "%s", e.msg);
    m.details_json = "[1, 2]"; /* valid JSON, but details are an object of named values */
    cr_assert_eq(db_measurement_add(d, run, &m, NULL), SW_EINVAL);
    m = rows[0];
    m.metric = "";
    cr_assert_eq(db_measurement_add(d, run, &m, NULL), SW_EINVAL);
    cr_assert_eq(count(d, "SELECT count(*) FROM measurements"), before);

    /* A finished run takes no more rows, and never changes (the shell cannot change it either). */
    cr_assert_eq(db_run_finish(d, run, 1, DB_PASS, NULL, NULL), SW_OK);
    sw_error_clear(&e);
    cr_assert_eq(db_measurement_add(d, run, &rows[0], &e), SW_EINVAL);
    cr_assert(strstr(e.msg, "running run"), "%s", e.msg);
    cr_assert_eq(db_run_finish(d, run, 0, DB_FAIL, "again", NULL), SW_EINVAL);
    cr_assert_neq(sqlite3_exec(d->sql, "UPDATE runs SET config_hash = 'x'", NULL, NULL, NULL),
                  SQLITE_OK);
    cr_assert_neq(sqlite3_exec(d->sql, "UPDATE measurements SET value = 0", NULL, NULL, NULL),
                  SQLITE_OK);
    db_close(d);
}

/* The life cycles the brief defines, written out here independently of db/: every pair of states
 * is tried through the C table, the API and the database's own trigger. */
static int file_edge_spec(db_file_state a, db_file_state b)
{
    int live = a == DB_FILE_SEEN || a == DB_FILE_PARSED || a == DB_FILE_MEASURED;
    if (!live)
        return 0;
    if (b == DB_FILE_QUARANTINED || b == DB_FILE_IGNORED)
        return 1;
    return (int)b == (int)a + 1 && b <= DB_FILE_STORED;
}

static int series_edge_spec(db_series_state a, db_series_state b)
{
    static const int edges[][2] = {
        {DB_SERIES_COLLECTING, DB_SERIES_COMPLETE}, {DB_SERIES_COLLECTING, DB_SERIES_QUIET},
        {DB_SERIES_QUIET, DB_SERIES_COLLECTING},    {DB_SERIES_QUIET, DB_SERIES_COMPLETE},
        {DB_SERIES_QUIET, DB_SERIES_MEASURED},      {DB_SERIES_COMPLETE, DB_SERIES_MEASURED},
        {DB_SERIES_MEASURED, DB_SERIES_STORED},     {DB_SERIES_FAILED, DB_SERIES_MEASURED},
    };
    if (b == DB_SERIES_FAILED)
        return a != DB_SERIES_STORED && a != DB_SERIES_FAILED;
    for (size_t i = 0; i < sizeof edges / sizeof edges[0]; i++)
        if ((int)a == edges[i][0] && (int)b == edges[i][1])
            return 1;
    return 0;
}

Test(db, file_state_machine)
{
    db *d = open_rw();
    int64_t scanner = 0, series = 0, id = 0;
    db_file_outcome how;
    char path[64], sop[64], sql[200];
    sw_error e;
    cr_assert_eq(db_scanner_upsert(d, &SCANNER1, &scanner, NULL), SW_OK);
    db_series_info si = {"1.2.3.9", "1.2.3", scanner, 0, NULL, NULL, NULL, NULL, NULL, 11, 1};
    cr_assert_eq(db_series_upsert(d, &si, &series, NULL, NULL), SW_OK);
    int k = 0;
    for (int a = 0; a < DB_FILE_NSTATES; a++) {
        for (int b = 0; b < DB_FILE_NSTATES; b++) {
            int want = file_edge_spec(a, b);
            cr_assert_eq(db_file_transition_legal(a, b), want, "%s -> %s", db_file_state_name(a),
                         db_file_state_name(b));
            /* Bring a new file to state a through legal moves (the database keeps the path). */
            snprintf(path, sizeof path, "f%d.dcm", k);
            snprintf(sop, sizeof sop, "1.2.3.9.%d", ++k);
            db_file_info fi = {path, "sha256:ab", 1, NULL};
            cr_assert_eq(db_file_add(d, &fi, &id, &how, NULL, NULL), SW_OK);
            cr_assert_eq(how, DB_FILE_ADDED);
            if (a != DB_FILE_SEEN && a != DB_FILE_QUARANTINED && a != DB_FILE_IGNORED)
                cr_assert_eq(db_file_parsed(d, id, sop, series, NULL), SW_OK);
            if (a == DB_FILE_MEASURED || a == DB_FILE_STORED)
                cr_assert_eq(
                    db_file_transition(d, id, DB_FILE_PARSED, DB_FILE_MEASURED, NULL, NULL), SW_OK);
            if (a == DB_FILE_STORED)
                cr_assert_eq(
                    db_file_transition(d, id, DB_FILE_MEASURED, DB_FILE_STORED, NULL, NULL), SW_OK);
            if (a == DB_FILE_QUARANTINED || a == DB_FILE_IGNORED)
                cr_assert_eq(db_file_transition(d, id, DB_FILE_SEEN, a, "set up", NULL), SW_OK);
            /* The trigger: a raw UPDATE succeeds exactly on the legal edges. */
            snprintf(sql, sizeof sql,
                     "SAVEPOINT t; UPDATE files SET state = '%s', reason = 'r', "
                     "sop_instance_uid = coalesce(sop_instance_uid, '%s'), "
                     "series_id = %lld WHERE id = %lld;",
                     db_file_state_name(b), sop, (long long)series, (long long)id);
            int raw = sqlite3_exec(d->sql, sql, NULL, NULL, NULL);
            sqlite3_exec(d->sql, "ROLLBACK TO t; RELEASE t;", NULL, NULL, NULL);
            if (a != b)
                cr_assert_eq(raw == SQLITE_OK, want, "trigger on %s -> %s: %s",
                             db_file_state_name(a), db_file_state_name(b), sqlite3_errmsg(d->sql));
            /* The API: legal edges move (seen -> parsed has its own call), illegal ones fail and
             * leave the row as it was. */
            if (a == DB_FILE_SEEN && b == DB_FILE_PARSED)
                continue;
            snprintf(sql, sizeof sql, "SELECT state = '%s' FROM files WHERE id = %lld",
                     db_file_state_name(a), (long long)id);
            sw_error_clear(&e);
            sw_status st = db_file_transition(d, id, a, b, "because", &e);
            cr_assert_eq(st == SW_OK, want, "%s -> %s: %s", db_file_state_name(a),
                         db_file_state_name(b), e.msg);
            if (!want) {
                cr_assert_eq(st, SW_EINVAL);
                cr_assert(strstr(e.msg, "illegal transition"), "%s", e.msg);
                cr_assert_eq(count(d, sql), 1, "state unchanged");
            }
        }
    }
    /* A wrong `from` is refused and named; quarantine needs a reason. */
    db_file_info fi = {"last.dcm", "sha256:cd", 1, NULL};
    cr_assert_eq(db_file_add(d, &fi, &id, &how, NULL, NULL), SW_OK);
    sw_error_clear(&e);
    cr_assert_eq(db_file_transition(d, id, DB_FILE_PARSED, DB_FILE_MEASURED, NULL, &e), SW_EINVAL);
    cr_assert(strstr(e.msg, "is seen, not parsed"), "%s", e.msg);
    cr_assert_eq(db_file_transition(d, id, DB_FILE_SEEN, DB_FILE_QUARANTINED, "", NULL), SW_EINVAL);
    cr_assert_eq(db_file_transition(d, id, DB_FILE_SEEN, DB_FILE_QUARANTINED,
                                    "JPEG 2000 is not supported", NULL),
                 SW_OK);
    cr_assert_eq(db_file_transition(d, 99999, DB_FILE_SEEN, DB_FILE_IGNORED, "x", NULL),
                 SW_ENOTFOUND);
    db_close(d);
}

Test(db, series_state_machine)
{
    db *d = open_rw();
    int64_t scanner = 0, id = 0;
    char uid[64], sql[200];
    sw_error e;
    cr_assert_eq(db_scanner_upsert(d, &SCANNER1, &scanner, NULL), SW_OK);
    /* The legal paths from collecting to each state, through the API. */
    static const db_series_state path_to[DB_SERIES_NSTATES][4] = {
        [DB_SERIES_COLLECTING] = {DB_SERIES_COLLECTING},
        [DB_SERIES_COMPLETE] = {DB_SERIES_COLLECTING, DB_SERIES_COMPLETE},
        [DB_SERIES_QUIET] = {DB_SERIES_COLLECTING, DB_SERIES_QUIET},
        [DB_SERIES_MEASURED] = {DB_SERIES_COLLECTING, DB_SERIES_COMPLETE, DB_SERIES_MEASURED},
        [DB_SERIES_STORED] = {DB_SERIES_COLLECTING, DB_SERIES_COMPLETE, DB_SERIES_MEASURED,
                              DB_SERIES_STORED},
        [DB_SERIES_FAILED] = {DB_SERIES_COLLECTING, DB_SERIES_FAILED},
    };
    static const int path_len[DB_SERIES_NSTATES] = {1, 2, 2, 3, 4, 2};
    int k = 0;
    for (int a = 0; a < DB_SERIES_NSTATES; a++) {
        for (int b = 0; b < DB_SERIES_NSTATES; b++) {
            int want = series_edge_spec(a, b);
            cr_assert_eq(db_series_transition_legal(a, b), want, "%s -> %s",
                         db_series_state_name(a), db_series_state_name(b));
            snprintf(uid, sizeof uid, "1.2.3.100.%d", ++k);
            db_series_info si = {uid, "1.2.3", scanner, 0, NULL, NULL, NULL, NULL, NULL, 11, 1};
            cr_assert_eq(db_series_upsert(d, &si, &id, NULL, NULL), SW_OK);
            for (int i = 1; i < path_len[a]; i++)
                cr_assert_eq(
                    db_series_set_state(d, id, path_to[a][i - 1], path_to[a][i], "why", NULL),
                    SW_OK);
            snprintf(sql, sizeof sql,
                     "SAVEPOINT t; UPDATE series SET state = '%s' WHERE id = %lld;",
                     db_series_state_name(b), (long long)id);
            int raw = sqlite3_exec(d->sql, sql, NULL, NULL, NULL);
            sqlite3_exec(d->sql, "ROLLBACK TO t; RELEASE t;", NULL, NULL, NULL);
            if (a != b)
                cr_assert_eq(raw == SQLITE_OK, want, "trigger on %s -> %s", db_series_state_name(a),
                             db_series_state_name(b));
            sw_error_clear(&e);
            sw_status st = db_series_set_state(d, id, a, b, "a reason", &e);
            cr_assert_eq(st == SW_OK, want, "%s -> %s: %s", db_series_state_name(a),
                         db_series_state_name(b), e.msg);
            snprintf(sql, sizeof sql, "SELECT state = '%s' FROM series WHERE id = %lld",
                     db_series_state_name(want ? b : a), (long long)id);
            cr_assert_eq(count(d, sql), 1);
        }
    }
    snprintf(uid, sizeof uid, "1.2.3.100.%d", ++k);
    db_series_info si = {uid, "1.2.3", scanner, 0, NULL, NULL, NULL, NULL, NULL, 11, 1};
    cr_assert_eq(db_series_upsert(d, &si, &id, NULL, NULL), SW_OK);
    cr_assert_eq(db_series_set_state(d, id, DB_SERIES_COLLECTING, DB_SERIES_FAILED, NULL, NULL),
                 SW_EINVAL, "failed needs a reason");
    sw_error_clear(&e);
    cr_assert_eq(db_series_set_state(d, id, DB_SERIES_COMPLETE, DB_SERIES_MEASURED, NULL, &e),
                 SW_EINVAL);
    cr_assert(strstr(e.msg, "is collecting, not complete"), "%s", e.msg);
    db_close(d);
}

/* ================================================================================================
 * de-duplication and resume
 * ============================================================================================== */

static int collect_ids(void *ctx, const db_file_rec *r)
{
    int64_t *ids = ctx;
    ids[++ids[0]] = r->id;
    return 0;
}

static int collect_series(void *ctx, const db_series_rec *r)
{
    int64_t *ids = ctx;
    ids[++ids[0]] = r->id;
    return 0;
}

Test(db, files_are_deduplicated)
{
    db *d = open_rw();
    int64_t scanner = 0, series = 0, a = 0, b = 0, c = 0, orig = 0, found = 0;
    db_file_outcome how;
    sw_error e;
    cr_assert_eq(db_scanner_upsert(d, &SCANNER1, &scanner, NULL), SW_OK);
    db_series_info si = {"1.2.5", "1.2", scanner, 0, NULL, NULL, NULL, NULL, NULL, 11, 1};
    cr_assert_eq(db_series_upsert(d, &si, &series, NULL, NULL), SW_OK);

    db_file_info fa = {"in/a.dcm", "sha256:11", 100, NULL};
    cr_assert_eq(db_file_add(d, &fa, &a, &how, NULL, NULL), SW_OK);
    cr_assert_eq(how, DB_FILE_ADDED);
    cr_assert_eq(db_file_add(d, &fa, &b, &how, NULL, NULL), SW_OK, "the same file again");
    cr_assert_eq(how, DB_FILE_KNOWN);
    cr_assert_eq(b, a);
    cr_assert_eq(db_file_parsed(d, a, "1.2.5.1", series, NULL), SW_OK);
    cr_assert_eq(db_file_by_sop(d, "1.2.5.1", &found, NULL), SW_OK);
    cr_assert_eq(found, a);
    cr_assert_eq(db_file_by_sop(d, "1.2.5.404", &found, NULL), SW_OK);
    cr_assert_eq(found, 0);

    /* The same SOP instance under another name: recorded, as a duplicate, and ignored. */
    db_file_info fb = {"in/copy-of-a.dcm", "sha256:11", 100, "1.2.5.1"};
    cr_assert_eq(db_file_add(d, &fb, &b, &how, &orig, NULL), SW_OK);
    cr_assert_eq(how, DB_FILE_DUPLICATE);
    cr_assert_eq(orig, a);
    cr_assert_neq(b, a);
    char sql[160];
    snprintf(sql, sizeof sql,
             "SELECT state = 'ignored' AND reason LIKE 'duplicate of file %lld' "
             "FROM files WHERE id = %lld",
             (long long)a, (long long)b);
    cr_assert_eq(count(d, sql), 1);

    /* A copy found only when parsed cannot take the SOP instance either. */
    db_file_info fc = {"in/late.dcm", "sha256:22", 100, NULL};
    cr_assert_eq(db_file_add(d, &fc, &c, &how, NULL, NULL), SW_OK);
    sw_error_clear(&e);
    cr_assert_eq(db_file_parsed(d, c, "1.2.5.1", series, &e), SW_EINVAL);
    cr_assert(strstr(e.msg, "already file"), "%s", e.msg);
    /* and the database refuses it by itself (files_live_sop) */
    snprintf(sql, sizeof sql,
             "UPDATE files SET state = 'parsed', sop_instance_uid = '1.2.5.1', "
             "series_id = %lld WHERE id = %lld",
             (long long)series, (long long)c);
    cr_assert_neq(sqlite3_exec(d->sql, sql, NULL, NULL, NULL), SQLITE_OK);
    cr_assert_eq(db_file_transition(d, c, DB_FILE_SEEN, DB_FILE_IGNORED, "duplicate", NULL), SW_OK);

    /* A quarantined file releases its SOP instance: a good copy may then be taken. */
    cr_assert_eq(db_file_transition(d, a, DB_FILE_PARSED, DB_FILE_QUARANTINED, "truncated", NULL),
                 SW_OK);
    db_file_info fd = {"in/resent.dcm", "sha256:33", 100, NULL};
    cr_assert_eq(db_file_add(d, &fd, &c, &how, NULL, NULL), SW_OK);
    cr_assert_eq(db_file_parsed(d, c, "1.2.5.1", series, NULL), SW_OK);

    /* A series UID is never moved to another study or scanner. */
    db_series_info other = si;
    other.study_instance_uid = "9.9";
    cr_assert_eq(db_series_upsert(d, &other, &found, NULL, NULL), SW_EINVAL);
    int created = -1;
    cr_assert_eq(db_series_upsert(d, &si, &found, &created, NULL), SW_OK);
    cr_assert_eq(found, series);
    cr_assert_eq(created, 0);
    db_close(d);
}

/* A writer killed (SIGKILL) in the middle of a series' transaction: a restart sees exactly what was
 * committed before, and the resume lists give the work left. */
Test(db, resumes_exactly_after_kill_9)
{
    db *d = open_rw();
    int64_t scanner = 0, series = 0, f1 = 0, f2 = 0;
    db_file_outcome how;
    cr_assert_eq(db_scanner_upsert(d, &SCANNER1, &scanner, NULL), SW_OK);
    db_series_info si = {"1.2.7", "1.2", scanner, 0, "20240301", "080000", NULL, NULL, NULL, 2, 1};
    cr_assert_eq(db_series_upsert(d, &si, &series, NULL, NULL), SW_OK);
    db_file_info a = {"in/1.dcm", "sha256:a1", 10, NULL}, b = {"in/2.dcm", "sha256:b2", 10, NULL};
    cr_assert_eq(db_file_add(d, &a, &f1, &how, NULL, NULL), SW_OK);
    cr_assert_eq(db_file_add(d, &b, &f2, &how, NULL, NULL), SW_OK);
    cr_assert_eq(db_file_parsed(d, f1, "1.2.7.1", series, NULL), SW_OK);
    db_close(d);

    pid_t pid = fork();
    cr_assert_neq(pid, -1);
    if (pid == 0) {
        db *c = NULL;
        int64_t run = 0;
        if (db_open(dbfile, DB_OPEN_RW, &c, NULL) != SW_OK || db_begin(c, NULL) != SW_OK ||
            db_file_parsed(c, f2, "1.2.7.2", series, NULL) != SW_OK ||
            db_series_set_state(c, series, DB_SERIES_COLLECTING, DB_SERIES_COMPLETE, NULL, NULL) !=
                SW_OK ||
            db_run_begin(c, series, &RUN, &run, NULL) != SW_OK)
            _exit(3);
        db_measurement rows[N_ROWS];
        run_rows(5.0, rows);
        for (int i = 0; i < N_ROWS; i++)
            db_measurement_add(c, run, &rows[i], NULL);
        /* Force the uncommitted pages into the WAL file, as a long transaction would. */
        sqlite3_db_cacheflush(c->sql);
        raise(SIGKILL);
        _exit(4);
    }
    int status = 0;
    waitpid(pid, &status, 0);
    cr_assert(WIFSIGNALED(status) && WTERMSIG(status) == SIGKILL, "the writer died by SIGKILL");

    d = open_rw();
    int64_t ids[16] = {0}, run = -1;
    cr_assert_eq(db_files_pending(d, collect_ids, ids, NULL), SW_OK);
    cr_assert_eq(ids[0], 2);
    cr_assert_eq(ids[1], f1);
    cr_assert_eq(ids[2], f2);
    cr_assert_eq(count(d, "SELECT count(*) FROM files WHERE state = 'seen'"), 1);
    memset(ids, 0, sizeof ids);
    cr_assert_eq(db_series_pending(d, collect_series, ids, NULL), SW_OK);
    cr_assert_eq(ids[0], 1);
    cr_assert_eq(ids[1], series);
    cr_assert_eq(count(d, "SELECT count(*) FROM series WHERE state = 'collecting'"), 1);
    cr_assert_eq(count(d, "SELECT count(*) FROM runs") + count(d, "SELECT count(*) FROM "
                                                                  "measurements"),
                 0);
    cr_assert_eq(db_series_stored_run(d, series, &run, NULL), SW_OK);
    cr_assert_eq(run, 0, "nothing stored: the series is measured again");
    sqlite3_stmt *st = NULL;
    cr_assert_eq(sqlite3_prepare_v2(d->sql, "PRAGMA integrity_check", -1, &st, NULL), SQLITE_OK);
    cr_assert_eq(sqlite3_step(st), SQLITE_ROW);
    cr_assert_str_eq((const char *)sqlite3_column_text(st, 0), "ok");
    sqlite3_finalize(st);
    db_close(d);
}

Test(db, a_stored_run_is_never_measured_twice)
{
    db *d = open_rw();
    series_spec sp = SPEC1;
    sp.runs = 2; /* a re-analysis in the same transaction as the first, for brevity */
    cr_assert_eq(write_series(d, &sp, NULL), SW_OK);
    int64_t series = count(d, "SELECT id FROM series"), run = 0;
    cr_assert_eq(db_series_stored_run(d, series, &run, NULL), SW_OK);
    cr_assert_eq(run, count(d, "SELECT max(id) FROM runs"));
    cr_assert_eq(count(d, "SELECT count(*) FROM runs"), 2, "re-analysis adds, never overwrites");
    cr_assert_eq(count(d, "SELECT count(*) FROM measurements"), 2 * N_ROWS);
    /* A run started later but not finished does not count. */
    int64_t r3 = 0, latest = 0;
    cr_assert_eq(db_run_begin(d, series, &RUN, &r3, NULL), SW_OK);
    cr_assert_eq(db_series_stored_run(d, series, &latest, NULL), SW_OK);
    cr_assert_eq(latest, run);
    cr_assert_eq(db_run_finish(d, r3, 0, DB_UNMEASURABLE, NULL, NULL), SW_EINVAL, "needs a reason");
    cr_assert_eq(db_run_finish(d, r3, 0, DB_UNMEASURABLE, "phantom not found", NULL), SW_OK);
    cr_assert_eq(db_series_stored_run(d, series, &latest, NULL), SW_OK);
    cr_assert_eq(latest, run);
    db_close(d);
}

/* ================================================================================================
 * concurrency: WAL readers and lock contention
 * ============================================================================================== */

static int count_series_cb(void *ctx, const db_series_rec *r)
{
    (void)r;
    ++*(int *)ctx;
    return 0;
}

Test(db, a_reader_sees_committed_rows_while_a_writer_works)
{
    db *w = open_rw();
    cr_assert_eq(write_series(w, &SPEC1, NULL), SW_OK);
    char mode[16] = "";
    sqlite3_stmt *st = NULL;
    cr_assert_eq(sqlite3_prepare_v2(w->sql, "PRAGMA journal_mode", -1, &st, NULL), SQLITE_OK);
    cr_assert_eq(sqlite3_step(st), SQLITE_ROW);
    sw_strlcpy(mode, (const char *)sqlite3_column_text(st, 0), sizeof mode);
    sqlite3_finalize(st);
    cr_assert_str_eq(mode, "wal");

    /* The writer opens a transaction and adds a second series, uncommitted. */
    series_spec sp2 = SPEC1;
    sp2.uid = "2.25.4711.2.2";
    int64_t scanner = 0, s2 = 0;
    cr_assert_eq(db_begin(w, NULL), SW_OK);
    cr_assert_eq(db_scanner_upsert(w, &SCANNER1, &scanner, NULL), SW_OK);
    db_series_info si = {sp2.uid, "1.2", scanner, 0, NULL, NULL, NULL, NULL, NULL, 11, 1};
    cr_assert_eq(db_series_upsert(w, &si, &s2, NULL, NULL), SW_OK);

    db *r = NULL;
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(db_open(dbfile, DB_OPEN_RO, &r, &e), SW_OK, "%s", e.msg);
    cr_assert(db_readonly(r));
    int n = 0;
    cr_assert_eq(db_series_by_uid(r, SPEC1.uid, count_series_cb, &n, NULL), SW_OK);
    cr_assert_eq(n, 1, "the committed series is visible");
    cr_assert_eq(db_series_by_uid(r, sp2.uid, count_series_cb, &n, NULL), SW_ENOTFOUND,
                 "the uncommitted one is not");
    db_cursor *c = NULL;
    const db_row *row = NULL;
    int rows = 0;
    cr_assert_eq(db_cursor_open(r, NULL, &c, NULL), SW_OK);
    while (db_cursor_next(c, &row, NULL) == SW_OK && row)
        rows++;
    db_cursor_close(c);
    cr_assert_eq(rows, N_ROWS);

    /* The reader cannot write: the API refuses, and so does SQLite underneath. */
    int64_t id = 0;
    sw_error_clear(&e);
    cr_assert_eq(db_scanner_upsert(r, &SCANNER2, &id, &e), SW_EINVAL);
    cr_assert(strstr(e.msg, "read-only"), "%s", e.msg);
    cr_assert_eq(db_begin(r, NULL), SW_EINVAL);
    cr_assert_eq(db_meta_set(r, "k", "v", NULL), SW_EINVAL);
    int raw = sqlite3_exec(r->sql, "INSERT INTO meta VALUES ('k', 'v', 'now')", NULL, NULL, NULL);
    cr_assert_neq(raw, SQLITE_OK);

    cr_assert_eq(db_commit(w, NULL), SW_OK);
    cr_assert_eq(db_series_by_uid(r, sp2.uid, count_series_cb, &n, NULL), SW_OK,
                 "committed now, and a new read sees it");
    db_close(r);
    db_close(w);
}

static double now_s(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + t.tv_nsec * 1e-9;
}

Test(db, a_held_write_lock_surfaces_as_busy)
{
    db *a = open_rw();
    db *b = open_rw();
    cr_assert_eq(db_begin(a, NULL), SW_OK);
    int64_t id = 0;
    cr_assert_eq(db_scanner_upsert(a, &SCANNER1, &id, NULL), SW_OK);

    /* Opening a current database needs no lock. */
    db *c = NULL;
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(db_open(dbfile, DB_OPEN_RW, &c, &e), SW_OK, "%s", e.msg);
    db_close(c);

    cr_assert_eq(db_set_busy_timeout(b, 100, NULL), SW_OK);
    sw_error_clear(&e);
    double t0 = now_s();
    cr_assert_eq(db_begin(b, &e), SW_EBUSY, "%s", e.msg);
    double waited = now_s() - t0;
    char want[400];
    snprintf(want, sizeof want, "db: %s: database is locked", dbfile);
    cr_assert_str_eq(e.msg, want);
    cr_assert_geq(waited, 0.09, "waited the busy timeout (%.3f s)", waited);
    sw_error_clear(&e);
    cr_assert_eq(db_scanner_upsert(b, &SCANNER2, &id, &e), SW_EBUSY, "%s", e.msg);
    cr_assert(!db_in_transaction(b));

    cr_assert_eq(db_commit(a, NULL), SW_OK);
    cr_assert_eq(db_scanner_upsert(b, &SCANNER2, &id, NULL), SW_OK, "free again");
    cr_assert_eq(count(b, "SELECT count(*) FROM scanners"), 2);
    db_close(a);
    db_close(b);
}

/* ================================================================================================
 * fault injection
 * ============================================================================================== */

/* A fault at every step of a series' transaction, one at a time: each leaves no row behind; with
 * no fault the whole series is there. */
Test(db, a_fault_anywhere_in_a_series_leaves_no_partial_rows)
{
    db *d = open_rw();
    long before = d->steps;
    cr_assert_eq(write_series(d, &SPEC1, NULL), SW_OK);
    long total = d->steps - before;
    db_close(d);
    unlink(dbfile);
    char wal[320];
    snprintf(wal, sizeof wal, "%s-wal", dbfile);
    unlink(wal);

    d = open_rw();
    cr_assert_gt(total, 2 * N_IMAGES + N_ROWS);
    for (long n = 1; n <= total; n++) {
        sw_error e;
        sw_error_clear(&e);
        d->fault_at = d->steps + n;
        sw_status st = write_series(d, &SPEC1, &e);
        cr_assert_neq(st, SW_OK, "a fault at step %ld of %ld went unnoticed", n, total);
        cr_assert(strstr(e.msg, "injected fault"), "step %ld: %s", n, e.msg);
        cr_assert(!db_in_transaction(d), "step %ld", n);
        cr_assert_eq(rows_total(d), 0, "step %ld of %ld left rows", n, total);
    }
    d->fault_at = 0;
    cr_assert_eq(write_series(d, &SPEC1, NULL), SW_OK);
    cr_assert_eq(count(d, "SELECT count(*) FROM files WHERE state = 'stored'"), N_IMAGES);
    cr_assert_eq(count(d, "SELECT count(*) FROM measurements"), N_ROWS);
    cr_assert_eq(count(d, "SELECT count(*) FROM series WHERE state = 'stored'"), 1);
    db_close(d);
}

/* A commit that fails rolls back by itself: the caller finds no transaction and no rows. */
Test(db, a_failed_commit_rolls_back)
{
    db *d = open_rw();
    int64_t id = 0;
    sw_error e;
    cr_assert_eq(db_begin(d, NULL), SW_OK);
    cr_assert_eq(db_scanner_upsert(d, &SCANNER1, &id, NULL), SW_OK);
    d->fault_at = d->steps + 1; /* the COMMIT itself */
    sw_error_clear(&e);
    cr_assert_eq(db_commit(d, &e), SW_EIO);
    cr_assert(strstr(e.msg, "injected fault"), "%s", e.msg);
    cr_assert(!db_in_transaction(d));
    cr_assert_eq(count(d, "SELECT count(*) FROM scanners"), 0);
    cr_assert_eq(db_commit(d, NULL), SW_EINVAL, "nothing left to commit");
    db_close(d);
}

/* Inside the caller's transaction a failed call undoes only itself. */
Test(db, a_failed_call_in_a_transaction_undoes_only_itself)
{
    db *d = open_rw();
    int64_t id = 0;
    db_file_outcome how;
    cr_assert_eq(db_begin(d, NULL), SW_OK);
    db_file_info a = {"a.dcm", "sha256:a", 1, NULL}, b = {"b.dcm", "sha256:b", 1, "1.9.9"};
    cr_assert_eq(db_file_add(d, &a, &id, &how, NULL, NULL), SW_OK);
    for (long n = 1; n <= 4; n++) {
        d->fault_at = d->steps + n; /* savepoint, find by path, find by SOP, insert */
        cr_assert_eq(db_file_add(d, &b, &id, &how, NULL, NULL), SW_EIO, "step %ld", n);
        cr_assert(db_in_transaction(d));
        cr_assert_eq(count(d, "SELECT count(*) FROM files"), 1, "step %ld", n);
    }
    d->fault_at = 0;
    /* The mechanism itself: a group that wrote and then failed is undone, the transaction stays. */
    cr_assert_eq(db_atomic_begin(d, NULL), SW_OK);
    cr_assert_eq(
        sqlite3_exec(d->sql, "INSERT INTO meta VALUES ('x', '1', 'now')", NULL, NULL, NULL),
        SQLITE_OK);
    cr_assert_eq(db_atomic_end(d, SW_EIO, NULL), SW_EIO);
    cr_assert(db_in_transaction(d));
    cr_assert_eq(count(d, "SELECT count(*) FROM meta WHERE key = 'x'"), 0);
    cr_assert_eq(db_atomic_begin(d, NULL), SW_OK);
    cr_assert_eq(
        sqlite3_exec(d->sql, "INSERT INTO meta VALUES ('y', '1', 'now')", NULL, NULL, NULL),
        SQLITE_OK);
    cr_assert_eq(db_atomic_end(d, SW_OK, NULL), SW_OK);
    cr_assert_eq(db_commit(d, NULL), SW_OK);
    cr_assert_eq(count(d, "SELECT count(*) FROM files"), 1);
    cr_assert_eq(count(d, "SELECT count(*) FROM files WHERE path = 'a.dcm'"), 1);
    cr_assert_eq(count(d, "SELECT count(*) FROM meta WHERE key = 'y'"), 1);
    db_close(d);
}

/* ================================================================================================
 * queries
 * ============================================================================================== */

static const series_spec FIXTURE[] = {
    {&SCANNER1, "2.25.4711.3.1", "20240105", "101530", "ACR_T1", 1, 5.1},
    {&SCANNER1, "2.25.4711.3.2", "20240112", "093000", "ACR_T1", 2, 5.6},
    {&SCANNER2, "2.25.4711.3.3", "20240112", "110000", "ACR_T1", 1, 4.2},
    {&SCANNER2, "2.25.4711.3.4", "20240201", "070000", "ACR_T2", 1, 5.0},
    {&SCANNER1, "2.25.4711.3.5", "", "", "ACR_T1", 1, 5.8},
};
#define N_FIXTURE (int)(sizeof FIXTURE / sizeof FIXTURE[0])

/* What a filter should give, by brute force over the fixture and run_rows. */
static int expected_rows(const db_filter *f)
{
    int n = 0;
    db_measurement m[N_ROWS];
    char when[40];
    for (int s = 0; s < N_FIXTURE; s++) {
        const series_spec *sp = &FIXTURE[s];
        int has_when = db_dicom_datetime(sp->date, sp->time, when, sizeof when) == 0;
        if (f->station_name && strcmp(f->station_name, sp->scanner->station_name))
            continue;
        if (f->protocol && strcmp(f->protocol, sp->protocol))
            continue;
        if ((f->from && (!has_when || strcmp(when, f->from) < 0)) ||
            (f->to && (!has_when || strcmp(when, f->to) >= 0)))
            continue;
        for (int k = f->all_runs ? 0 : sp->runs - 1; k < sp->runs; k++) {
            run_rows(sp->thickness + 0.1 * k, m);
            for (int i = 0; i < N_ROWS; i++) {
                if (f->metric && strcmp(f->metric, m[i].metric))
                    continue;
                if (f->verdict_mask && !(f->verdict_mask & (1u << m[i].verdict)))
                    continue;
                n++;
            }
        }
    }
    return n;
}

Test(db, the_cursor_filters_rows)
{
    db *d = open_rw();
    for (int s = 0; s < N_FIXTURE; s++)
        cr_assert_eq(write_series(d, &FIXTURE[s], NULL), SW_OK);
    db_close(d);
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(db_open(dbfile, DB_OPEN_RO, &d, &e), SW_OK, "%s", e.msg);

    struct {
        const char *name;
        db_filter f;
    } cases[] = {
        {"everything, latest runs", {0}},
        {"every run", {.all_runs = 1}},
        {"one station", {.station_name = "ALDMR2"}},
        {"one protocol", {.protocol = "ACR_T2"}},
        {"January", {.from = "2024-01-01", .to = "2024-02-01"}},
        {"from the 12th", {.from = "2024-01-12"}},
        {"up to the 12th at 10:00", {.to = "2024-01-12T10:00"}},
        {"one metric", {.metric = "slice_thickness"}},
        {"failures", {.verdict_mask = 1u << DB_FAIL}},
        {"warn or fail, all runs",
         {.verdict_mask = (1u << DB_WARN) | (1u << DB_FAIL), .all_runs = 1}},
        {"thickness on ALDMR1 in January",
         {.station_name = "ALDMR1",
          .metric = "slice_thickness",
          .from = "2024-01",
          .to = "2024-02"}},
        {"no such metric", {.metric = "nothing"}},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        db_cursor *c = NULL;
        const db_row *row = NULL;
        int n = 0;
        char last[64] = "";
        cr_assert_eq(db_cursor_open(d, &cases[i].f, &c, NULL), SW_OK);
        for (;;) {
            cr_assert_eq(db_cursor_next(c, &row, NULL), SW_OK);
            if (!row)
                break;
            n++;
            cr_assert_geq(strcmp(row->acquired_at, last), 0, "%s: ordered by time", cases[i].name);
            sw_strlcpy(last, row->acquired_at, sizeof last);
            if (cases[i].f.metric)
                cr_assert_str_eq(row->metric, cases[i].f.metric);
            if (row->verdict == DB_UNMEASURABLE)
                cr_assert(isnan(row->value) && *row->reason);
        }
        db_cursor_close(c);
        cr_assert_eq(n, expected_rows(&cases[i].f), "%s", cases[i].name);
    }

    /* The joined row carries what was written: scanner, series, run and the measurement. */
    db_filter f;
    db_filter_init(&f);
    f.metric = "slice_thickness";
    f.station_name = "ALDMR1";
    f.from = "2024-01-12";
    f.to = "2024-01-13";
    db_cursor *c = NULL;
    const db_row *row = NULL;
    cr_assert_eq(db_cursor_open(d, &f, &c, NULL), SW_OK);
    cr_assert_eq(db_cursor_next(c, &row, NULL), SW_OK);
    cr_assert_not_null(row);
    cr_assert_str_eq(row->series_instance_uid, FIXTURE[1].uid);
    cr_assert_str_eq(row->acquired_at, "2024-01-12T09:30:00");
    cr_assert_str_eq(row->site_alias, "MR1");
    cr_assert_str_eq(row->model, "SW-SIM 1.5T");
    cr_assert_str_eq(row->tolerance_set, RUN.tolerance_set);
    cr_assert_float_eq(row->value, FIXTURE[1].thickness + 0.1, 1e-12, "the re-analysis' value");
    cr_assert_eq(row->verdict, thickness_verdict(FIXTURE[1].thickness + 0.1));
    cr_assert_float_eq(row->limit_hi, 5.7, 1e-12);
    cr_assert_eq(row->slice, 1);
    cr_assert(strstr(row->details_json, "crossings"));
    cr_assert_eq(db_cursor_next(c, &row, NULL), SW_OK);
    cr_assert_null(row, "one row: the latest run only");
    db_cursor_close(c);

    f.verdict_mask = 1u << DB_NVERDICTS;
    cr_assert_eq(db_cursor_open(d, &f, &c, NULL), SW_EINVAL);
    db_close(d);
}

static int nested_cb(void *ctx, const db_series_rec *r)
{
    db *d = ctx;
    int64_t ids[64] = {0};
    /* Re-entrant: the same iteration from inside, and a write. */
    cr_assert_eq(db_series_pending(d, collect_series, ids, NULL), SW_OK);
    cr_assert_geq(ids[0], 1);
    return db_series_set_state(d, r->id, DB_SERIES_COLLECTING, DB_SERIES_QUIET, NULL, NULL) !=
           SW_OK;
}

Test(db, callbacks_may_reenter_and_write)
{
    db *d = open_rw();
    int64_t scanner = 0, id = 0;
    char uid[32];
    cr_assert_eq(db_scanner_upsert(d, &SCANNER1, &scanner, NULL), SW_OK);
    for (int i = 0; i < 5; i++) {
        snprintf(uid, sizeof uid, "1.2.40.%d", i);
        db_series_info si = {uid, "1.2", scanner, 0, NULL, NULL, NULL, NULL, NULL, 11, 1};
        cr_assert_eq(db_series_upsert(d, &si, &id, NULL, NULL), SW_OK);
    }
    cr_assert_eq(db_series_pending(d, nested_cb, d, NULL), SW_OK);
    cr_assert_eq(count(d, "SELECT count(*) FROM series WHERE state = 'quiet'"), 5);
    db_close(d);
}

/* ================================================================================================
 * alerts, settings, scanners
 * ============================================================================================== */

typedef struct alert_seen {
    int n;
    int64_t id[8];
    int attempts[8];
} alert_seen;

static int collect_alert(void *ctx, const db_alert_rec *r)
{
    alert_seen *s = ctx;
    s->id[s->n] = r->id;
    s->attempts[s->n++] = r->attempts;
    return 0;
}

Test(db, alert_commands_are_retried_then_given_up)
{
    db *d = open_rw();
    cr_assert_eq(write_series(d, &SPEC1, NULL), SW_OK);
    int64_t scanner = count(d, "SELECT id FROM scanners"),
            series = count(d, "SELECT id FROM series");
    int64_t a1 = 0, a2 = 0, bad = -1;
    db_alert_info ai = {DB_ALERT_BREACH,
                        scanner,
                        series,
                        0,
                        "slice_thickness",
                        5.9,
                        5.7,
                        DB_FAIL,
                        "ALDMR1: slice thickness 5.9 mm above 5.7 mm",
                        "alerts/1.png"};
    cr_assert_eq(db_alert_add(d, &ai, &a1, NULL), SW_OK);
    ai.kind = DB_ALERT_DRIFT;
    ai.series_id = 0;
    ai.value = NAN;
    cr_assert_eq(db_alert_add(d, &ai, &a2, NULL), SW_OK);
    ai.scanner_id = 0;
    cr_assert_eq(db_alert_add(d, &ai, &bad, NULL), SW_EINVAL, "an alert names its scanner");
    cr_assert_eq(bad, 0);
    cr_assert_eq(db_alert_mark(d, 999, 1, NULL, NULL), SW_ENOTFOUND);

    alert_seen s = {0};
    cr_assert_eq(db_alerts_pending(d, 3, collect_alert, &s, NULL), SW_OK);
    cr_assert_eq(s.n, 2);
    cr_assert_eq(db_alert_mark(d, a1, 0, "exit status 1", NULL), SW_OK);
    cr_assert_eq(db_alert_mark(d, a1, 0, "exit status 1", NULL), SW_OK);
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(db_alert_mark(d, a2, 1, NULL, &e), SW_OK, "%s", e.msg);
    memset(&s, 0, sizeof s);
    cr_assert_eq(db_alerts_pending(d, 3, collect_alert, &s, NULL), SW_OK);
    cr_assert_eq(s.n, 1);
    cr_assert_eq(s.id[0], a1);
    cr_assert_eq(s.attempts[0], 2);
    memset(&s, 0, sizeof s);
    cr_assert_eq(db_alerts_pending(d, 2, collect_alert, &s, NULL), SW_OK);
    cr_assert_eq(s.n, 0, "given up after two attempts");
    cr_assert_eq(db_alert_mark(d, a2, 0, "late", NULL), SW_EINVAL, "a sent alert stays sent");
    cr_assert_eq(count(d, "SELECT count(*) FROM alerts WHERE last_error = 'exit status 1' "
                          "AND command_status = 'failed' AND attempts = 2"),
                 1);
    db_close(d);
}

static int collect_scanner(void *ctx, const db_scanner_rec *r)
{
    char *buf = ctx;
    strcat(buf, r->info.station_name);
    strcat(buf, "/");
    strcat(buf, r->info.site_alias);
    strcat(buf, ";");
    return 0;
}

Test(db, scanners_and_settings)
{
    db *d = open_rw();
    int64_t a = 0, b = 0;
    char v[64], list[256] = "";
    cr_assert_eq(db_scanner_upsert(d, &SCANNER1, &a, NULL), SW_OK);
    db_scanner_info again = {"ALDMR1", "SWS-0001", "", "", "", "MR one"};
    cr_assert_eq(db_scanner_upsert(d, &again, &b, NULL), SW_OK);
    cr_assert_eq(a, b);
    cr_assert_eq(count(d, "SELECT count(*) FROM scanners WHERE model = 'SW-SIM 1.5T'"), 1,
                 "an empty value keeps the stored one");
    cr_assert_eq(db_scanner_upsert(d, &SCANNER2, &b, NULL), SW_OK);
    cr_assert_neq(a, b);
    cr_assert_eq(db_scanners_each(d, collect_scanner, list, NULL), SW_OK);
    cr_assert_str_eq(list, "ALDMR1/MR one;ALDMR2/MR2;");

    cr_assert_eq(db_meta_get(d, "site", v, sizeof v, NULL), SW_ENOTFOUND);
    cr_assert_eq(db_meta_set(d, "site", "Alderbrook Medical Physics", NULL), SW_OK);
    cr_assert_eq(db_meta_get(d, "site", v, 11, NULL), SW_OK); /* 10 characters and the NUL */
    cr_assert_str_eq(v, "Alderbrook", "truncated to the buffer");
    db_close(d);
}

/* DICOM DA and TM (PS3.5 section 6.2, value representations DA and TM); the leap-year rule is the
 * Gregorian calendar's. */
Test(db, dicom_dates_and_times)
{
    static const struct {
        const char *da, *tm, *want; /* want NULL: refused */
    } cases[] = {
        {"20240105", "101530", "2024-01-05T10:15:30"},
        {"20240105", "101530.25", "2024-01-05T10:15:30.25"},
        {"20240105", "101530.123456", "2024-01-05T10:15:30.123456"},
        {"20240105", "1015", "2024-01-05T10:15:00"},
        {"20240105", "10", "2024-01-05T10:00:00"},
        {"20240105", "10:15:30", "2024-01-05T10:15:30"}, /* the retired ACR-NEMA form */
        {"20240105 ", "101530 ", "2024-01-05T10:15:30"}, /* padding to even length */
        {"20240229", "000000", "2024-02-29T00:00:00"},
        {"20000229", "000000", "2000-02-29T00:00:00"},
        {"20230229", "000000", NULL},
        {"19000229", "000000", NULL},
        {"20241301", "000000", NULL},
        {"20240431", "000000", NULL},
        {"2024-01-05", "101530", NULL},
        {"20240105", "241530", NULL},
        {"20240105", "106030", NULL},
        {"20240105", "101530.1234567", NULL},
        {"20240105", "101530.", NULL},
        {"20240105", "1015.5", NULL},
        {"20240105", "", NULL},
        {"", "101530", NULL},
    };
    char buf[40];
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        int r = db_dicom_datetime(cases[i].da, cases[i].tm, buf, sizeof buf);
        if (cases[i].want) {
            cr_assert_eq(r, 0, "%s %s", cases[i].da, cases[i].tm);
            cr_assert_str_eq(buf, cases[i].want);
        } else {
            cr_assert_eq(r, -1, "%s %s gave %s", cases[i].da, cases[i].tm, buf);
            cr_assert_str_eq(buf, "");
        }
    }
    /* ISO 8601 UTC, as the store writes it: the form, and now within a second of time(). */
    db_now_iso(buf, sizeof buf);
    cr_assert_eq(strlen(buf), 24);
    struct tm tm = {0};
    char *end = strptime(buf, "%Y-%m-%dT%H:%M:%S", &tm);
    cr_assert(end && end[0] == '.' && end[4] == 'Z', "%s", buf);
    cr_assert_leq(fabs(difftime(timegm(&tm), time(NULL))), 2.0);
}

/* ================================================================================================
 * the sqlite3 shell as witness
 * ============================================================================================== */

Test(db, the_sqlite3_shell_agrees)
{
    db *d = open_rw();
    for (int s = 0; s < N_FIXTURE; s++)
        cr_assert_eq(write_series(d, &FIXTURE[s], NULL), SW_OK);
    db_close(d);

    char out[4096], want[4096] = "";
    cr_assert_eq(shell("PRAGMA integrity_check;", out, sizeof out), 0, "%s", out);
    cr_assert_str_eq(out, "ok\n");
    cr_assert_eq(shell("PRAGMA foreign_key_check;", out, sizeof out), 0);
    cr_assert_str_eq(out, "", "no dangling references: %s", out);
    cr_assert_eq(shell("PRAGMA user_version; PRAGMA journal_mode;", out, sizeof out), 0);
    snprintf(want, sizeof want, "%d\nwal\n", DB_SCHEMA_VERSION);
    cr_assert_str_eq(out, want);

    cr_assert_eq(shell("SELECT series_instance_uid FROM series ORDER BY id;", out, sizeof out), 0);
    want[0] = '\0';
    for (int s = 0; s < N_FIXTURE; s++) {
        strcat(want, FIXTURE[s].uid);
        strcat(want, "\n");
    }
    cr_assert_str_eq(out, want);

    /* The latest thickness per series, as the shell computes it from the raw tables, against the
     * fixture (printf keeps the shell's number formatting out of it). */
    cr_assert_eq(shell("SELECT s.series_instance_uid, printf('%.3f', m.value), m.verdict "
                       "FROM series s JOIN runs r ON r.series_id = s.id "
                       "JOIN measurements m ON m.run_id = r.id "
                       "WHERE m.metric = 'slice_thickness' AND r.id = (SELECT max(id) FROM runs "
                       "WHERE series_id = s.id AND status = 'done') ORDER BY s.id;",
                       out, sizeof out),
                 0, "%s", out);
    want[0] = '\0';
    for (int s = 0; s < N_FIXTURE; s++) {
        char line[200];
        double t = FIXTURE[s].thickness + 0.1 * (FIXTURE[s].runs - 1);
        snprintf(line, sizeof line, "%s|%.3f|%s\n", FIXTURE[s].uid, t,
                 db_verdict_name(thickness_verdict(t)));
        strcat(want, line);
    }
    cr_assert_str_eq(out, want);

    /* details is JSON that SQLite's own JSON functions read. */
    cr_assert_eq(shell("SELECT DISTINCT json_extract(details, '$.crossings[1]') FROM measurements "
                       "WHERE details IS NOT NULL;",
                       out, sizeof out),
                 0);
    cr_assert_str_eq(out, "62.6\n");

    /* Another writer cannot break the life cycle: the trigger refuses, the row stays. */
    int st = shell("UPDATE files SET state = 'seen' WHERE state = 'stored';", out, sizeof out);
    cr_assert_neq(st, 0);
    cr_assert(strstr(out, "illegal file state transition"), "%s", out);
    cr_assert_eq(shell("SELECT count(*) FROM files WHERE state = 'stored';", out, sizeof out), 0);
    snprintf(want, sizeof want, "%d\n", N_FIXTURE * N_IMAGES);
    cr_assert_str_eq(out, want);
}

/* ================================================================================================
 * CSV export, read back by Python's csv module (an RFC 4180 reader outside the project)
 * ============================================================================================== */

static const char CSV_READER[] =
    "import csv, sys\n"
    "raw = open(sys.argv[1], 'rb').read()\n"
    "assert raw.endswith(b'\\r\\n'), 'records end in CRLF'\n"
    "with open(sys.argv[1], newline='') as f:\n"
    "    rows = list(csv.reader(f, strict=True))\n"
    "head = rows[0]\n"
    "print(len(head), len(rows) - 1)\n"
    "ix = {n: i for i, n in enumerate(head)}\n"
    "for r in rows[1:]:\n"
    "    assert len(r) == len(head), r\n"
    "    print('\\t'.join([r[ix['series_instance_uid']], r[ix['metric']], r[ix['value']] or "
    "'NULL',\n"
    "                     r[ix['verdict']], r[ix['slice']] or '0', r[ix['echo']] or '0',\n"
    "                     repr(r[ix['series_description']])]))\n";

Test(db, csv_export_reads_back)
{
    db *d = open_rw();
    for (int s = 0; s < N_FIXTURE; s++)
        cr_assert_eq(write_series(d, &FIXTURE[s], NULL), SW_OK);
    /* A description that needs quoting: comma, quote and a line break. */
    int64_t scanner = 0, series = 0, run = 0;
    cr_assert_eq(db_scanner_upsert(d, &SCANNER2, &scanner, NULL), SW_OK);
    db_series_info si = {
        "1.2.99", "1.2", scanner, 7, "20240301", "120000", "QA, \"weekly\"\nsecond line",
        "ACR_T1", "t1",  11,      1};
    cr_assert_eq(db_series_upsert(d, &si, &series, NULL, NULL), SW_OK);
    cr_assert_eq(db_run_begin(d, series, &RUN, &run, NULL), SW_OK);
    db_measurement rows[N_ROWS];
    run_rows(4.9, rows);
    rows[0].value = 0.1 + 0.2; /* needs 17 digits to read back exactly */
    rows[0].verdict = DB_FAIL;
    cr_assert_eq(db_measurement_add(d, run, &rows[0], NULL), SW_OK);
    cr_assert_eq(db_run_finish(d, run, 1, DB_FAIL, NULL, NULL), SW_OK);

    char csv[400], script[400], out[1 << 16];
    snprintf(csv, sizeof csv, "%s/export.csv", tmpdir);
    snprintf(script, sizeof script, "%s/read.py", tmpdir);
    FILE *f = fopen(script, "w");
    cr_assert_not_null(f);
    fputs(CSV_READER, f);
    fclose(f);
    long n = 0;
    sw_error e;
    sw_error_clear(&e);
    cr_assert_eq(db_export_csv_file(d, NULL, csv, &n, &e), SW_OK, "%s", e.msg);
    char *argv[] = {"/usr/bin/python3", script, csv, NULL};
    int st = run_capture(argv, out, sizeof out);
    cr_assert_eq(st, 0, "python3 csv: %s", out);

    /* The reader's view, line by line, against the cursor's rows. */
    char *save = NULL, *line = strtok_r(out, "\n", &save);
    int ncol = 0, nrec = 0;
    cr_assert_eq(sscanf(line, "%d %d", &ncol, &nrec), 2);
    cr_assert_eq(ncol, 31);
    cr_assert_eq(nrec, n);
    db_cursor *c = NULL;
    const db_row *r = NULL;
    cr_assert_eq(db_cursor_open(d, NULL, &c, NULL), SW_OK);
    int k = 0, tricky = 0;
    while (db_cursor_next(c, &r, NULL) == SW_OK && r) {
        line = strtok_r(NULL, "\n", &save);
        cr_assert_not_null(line, "record %d missing", k);
        char uid[80], metric[64], value[64], verdict[32], desc[128];
        int slice = -1, echo = -1;
        cr_assert_eq(sscanf(line, "%79[^\t]\t%63[^\t]\t%63[^\t]\t%31[^\t]\t%d\t%d\t%127[^\n]", uid,
                            metric, value, verdict, &slice, &echo, desc),
                     7, "%s", line);
        cr_assert_str_eq(uid, r->series_instance_uid);
        cr_assert_str_eq(metric, r->metric);
        cr_assert_str_eq(verdict, db_verdict_name(r->verdict));
        cr_assert_eq(slice, r->slice);
        cr_assert_eq(echo, r->echo);
        if (isnan(r->value))
            cr_assert_str_eq(value, "NULL");
        else
            cr_assert_eq(strtod(value, NULL), r->value, "%s reads back exactly", value);
        if (!strcmp(uid, "1.2.99")) {
            tricky = 1;
            cr_assert_str_eq(desc, "'QA, \"weekly\"\\nsecond line'", "quoting survives: %s", desc);
        }
        k++;
    }
    db_cursor_close(c);
    cr_assert_eq(k, n);
    cr_assert(tricky);
    db_close(d);
}
