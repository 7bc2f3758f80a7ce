/* store.c: writes and lookups of scanners, series, files, runs, measurements and alerts, with the
 * state machines of series and files (drawn in db.h). Every write is atomic (db_atomic_begin). */
#include <jansson.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "dbint.h"

/* The edges of the two state machines; schema.c holds the same rows for the triggers, and a test
 * checks that both agree on every pair. */
/* clang-format off */
static const unsigned char SERIES_EDGE[DB_SERIES_NSTATES][DB_SERIES_NSTATES] = {
    /* to:                   coll compl quiet meas stored failed */
    [DB_SERIES_COLLECTING] = {0,   1,    1,    0,   0,     1},
    [DB_SERIES_COMPLETE]   = {0,   0,    0,    1,   0,     1},
    [DB_SERIES_QUIET]      = {1,   1,    0,    1,   0,     1},
    [DB_SERIES_MEASURED]   = {0,   0,    0,    0,   1,     1},
    [DB_SERIES_STORED]     = {0,   0,    0,    0,   0,     0},
    [DB_SERIES_FAILED]     = {0,   0,    0,    1,   0,     0},
};

static const unsigned char FILE_EDGE[DB_FILE_NSTATES][DB_FILE_NSTATES] = {
    /* to:                  seen parsed meas stored quar ign */
    [DB_FILE_SEEN]        = {0,   1,     0,   0,     1,   1},
    [DB_FILE_PARSED]      = {0,   0,     1,   0,     1,   1},
    [DB_FILE_MEASURED]    = {0,   0,     0,   1,     1,   1},
    [DB_FILE_STORED]      = {0,   0,     0,   0,     0,   0},
    [DB_FILE_QUARANTINED] = {0,   0,     0,   0,     0,   0},
    [DB_FILE_IGNORED]     = {0,   0,     0,   0,     0,   0},
};
/* clang-format on */

int db_series_transition_legal(db_series_state from, db_series_state to)
{
    if ((unsigned)from >= DB_SERIES_NSTATES || (unsigned)to >= DB_SERIES_NSTATES)
        return 0;
    return SERIES_EDGE[from][to];
}

int db_file_transition_legal(db_file_state from, db_file_state to)
{
    if ((unsigned)from >= DB_FILE_NSTATES || (unsigned)to >= DB_FILE_NSTATES)
        return 0;
    return FILE_EDGE[from][to];
}

int db_file_state_final(db_file_state s)
{
    return s == DB_FILE_STORED || s == DB_FILE_QUARANTINED || s == DB_FILE_IGNORED;
}

static const char *nz(const char *s)
{
    return s ? s : "";
}

static int empty(const char *s)
{
    return !s || !*s;
}

/* Runs a select expected to give at most one row with one integer column: *v = the value, or 0
 * when there is no row or it is NULL. */
static sw_status one_id(db *d, sqlite3_stmt *st, int64_t *v, sw_error *err)
{
    sw_status rc = SW_OK;
    *v = 0;
    int r = db_step(d, st);
    if (r == SQLITE_ROW)
        *v = sqlite3_column_int64(st, 0);
    else if (r != SQLITE_DONE)
        rc = db_sqlerr(d, r, err);
    sqlite3_reset(st);
    return rc;
}

/* Runs a select of one text column for one id into buf; SW_ENOTFOUND when there is no row. */
static sw_status one_text(db *d, db_stmt_id id, int64_t key, const char *what, char *buf, size_t n,
                          sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = db_stmt(d, id, &st, err);
    if (rc != SW_OK)
        return rc;
    sqlite3_bind_int64(st, 1, key);
    int r = db_step(d, st);
    if (r == SQLITE_ROW)
        sw_strlcpy(buf, db_col_text(st, 0), n);
    else if (r == SQLITE_DONE)
        rc = sw_error_set(err, SW_ENOTFOUND, "db: %s: no %s %lld", d->path, what, (long long)key);
    else
        rc = db_sqlerr(d, r, err);
    sqlite3_reset(st);
    return rc;
}

/* ---- scanners ---- */

sw_status db_scanner_upsert(db *d, const db_scanner_info *s, int64_t *id, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32];
    int64_t found = 0;
    if (!d || !s || !id)
        return sw_error_set(err, SW_EINVAL, "db: scanner_upsert: bad arguments");
    *id = 0;
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    db_now_iso(now, sizeof now);
    if ((rc = db_stmt(d, ST_SCANNER_FIND, &st, err)) != SW_OK)
        goto out;
    db_bind_text(st, 1, nz(s->station_name));
    db_bind_text(st, 2, nz(s->device_serial));
    if ((rc = one_id(d, st, &found, err)) != SW_OK)
        goto out;
    if (found) {
        if ((rc = db_stmt(d, ST_SCANNER_TOUCH, &st, err)) != SW_OK)
            goto out;
        sqlite3_bind_int64(st, 1, found);
        db_bind_text(st, 2, now);
        db_bind_text(st, 3, nz(s->manufacturer));
        db_bind_text(st, 4, nz(s->model));
        db_bind_text(st, 5, nz(s->institution));
        db_bind_text(st, 6, nz(s->site_alias));
        rc = db_exec_stmt(d, st, err);
    } else {
        if ((rc = db_stmt(d, ST_SCANNER_INSERT, &st, err)) != SW_OK)
            goto out;
        db_bind_text(st, 1, nz(s->station_name));
        db_bind_text(st, 2, nz(s->device_serial));
        db_bind_text(st, 3, nz(s->manufacturer));
        db_bind_text(st, 4, nz(s->model));
        db_bind_text(st, 5, nz(s->institution));
        db_bind_text(st, 6, nz(s->site_alias));
        db_bind_text(st, 7, now);
        if ((rc = db_exec_stmt(d, st, err)) == SW_OK)
            found = sqlite3_last_insert_rowid(d->sql);
    }
out:
    rc = db_atomic_end(d, rc, err);
    if (rc == SW_OK)
        *id = found;
    return rc;
}

static void scanner_row(sqlite3_stmt *st, db_scanner_rec *r)
{
    r->id = sqlite3_column_int64(st, 0);
    r->info.station_name = db_col_text(st, 1);
    r->info.device_serial = db_col_text(st, 2);
    r->info.manufacturer = db_col_text(st, 3);
    r->info.model = db_col_text(st, 4);
    r->info.institution = db_col_text(st, 5);
    r->info.site_alias = db_col_text(st, 6);
    r->first_seen = db_col_text(st, 7);
    r->last_seen = db_col_text(st, 8);
}

/* Steps an iteration statement, calling row() to fill a record and cb with it, until the end or
 * until cb returns nonzero. Releases the statement. */
typedef int (*row_fn)(void *ctx, sqlite3_stmt *st, void *cb, void *cb_ctx);
static sw_status iterate(db *d, sqlite3_stmt *st, int owned, row_fn row, void *cb, void *cb_ctx,
                         int *rows, sw_error *err)
{
    sw_status rc = SW_OK;
    int r, n = 0;
    while ((r = db_step(d, st)) == SQLITE_ROW) {
        n++;
        if (row(NULL, st, cb, cb_ctx))
            break;
    }
    if (r != SQLITE_ROW && r != SQLITE_DONE)
        rc = db_sqlerr(d, r, err);
    db_stmt_done(st, owned);
    if (rows)
        *rows = n;
    return rc;
}

static int scanner_cb(void *unused, sqlite3_stmt *st, void *cb, void *ctx)
{
    (void)unused;
    db_scanner_rec r;
    scanner_row(st, &r);
    return ((db_scanner_cb)cb)(ctx, &r);
}

sw_status db_scanners_each(db *d, db_scanner_cb cb, void *ctx, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    int owned = 0;
    if (!d || !cb)
        return sw_error_set(err, SW_EINVAL, "db: scanners_each: bad arguments");
    sw_status rc = db_stmt_iter(d, ST_SCANNERS_ALL, &st, &owned, err);
    if (rc != SW_OK)
        return rc;
    return iterate(d, st, owned, scanner_cb, (void *)cb, ctx, NULL, err);
}

/* ---- series ---- */

sw_status db_series_upsert(db *d, const db_series_info *s, int64_t *id, int *created, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32], when[40];
    int64_t found = 0;
    int made = 0;
    if (!d || !s || !id)
        return sw_error_set(err, SW_EINVAL, "db: series_upsert: bad arguments");
    *id = 0;
    if (created)
        *created = 0;
    if (empty(s->series_instance_uid) || empty(s->study_instance_uid) || s->scanner_id <= 0 ||
        s->images_expected < 0 || s->echoes_expected < 0)
        return sw_error_set(err, SW_EINVAL,
                            "db: %s: a series needs its UID, its study UID and a scanner", d->path);
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_SERIES_FIND, &st, err)) != SW_OK)
        goto out;
    db_bind_text(st, 1, s->series_instance_uid);
    int r = db_step(d, st);
    if (r == SQLITE_ROW) {
        found = sqlite3_column_int64(st, 0);
        int same_study = !strcmp(db_col_text(st, 1), s->study_instance_uid);
        int64_t scanner = sqlite3_column_int64(st, 2);
        sqlite3_reset(st);
        if (!same_study || scanner != s->scanner_id) {
            rc = sw_error_set(err, SW_EINVAL, "db: %s: series %s is already held by another %s",
                              d->path, s->series_instance_uid, same_study ? "scanner" : "study");
            found = 0;
        }
        goto out;
    }
    sqlite3_reset(st);
    if (r != SQLITE_DONE) {
        rc = db_sqlerr(d, r, err);
        goto out;
    }
    db_now_iso(now, sizeof now);
    int have_when = db_dicom_datetime(s->series_date, s->series_time, when, sizeof when) == 0;
    if ((rc = db_stmt(d, ST_SERIES_INSERT, &st, err)) != SW_OK)
        goto out;
    db_bind_text(st, 1, s->series_instance_uid);
    db_bind_text(st, 2, s->study_instance_uid);
    sqlite3_bind_int64(st, 3, s->scanner_id);
    if (s->series_number)
        sqlite3_bind_int(st, 4, s->series_number);
    db_bind_text(st, 5, nz(s->series_date));
    db_bind_text(st, 6, nz(s->series_time));
    db_bind_text_or_null(st, 7, have_when ? when : NULL);
    db_bind_text(st, 8, nz(s->description));
    db_bind_text(st, 9, nz(s->protocol));
    db_bind_text(st, 10, nz(s->series_type));
    sqlite3_bind_int(st, 11, s->images_expected);
    sqlite3_bind_int(st, 12, s->echoes_expected);
    db_bind_text(st, 13, now);
    if ((rc = db_exec_stmt(d, st, err)) == SW_OK) {
        found = sqlite3_last_insert_rowid(d->sql);
        made = 1;
    }
out:
    rc = db_atomic_end(d, rc, err);
    if (rc == SW_OK) {
        *id = found;
        if (created)
            *created = made;
    }
    return rc;
}

sw_status db_series_set_state(db *d, int64_t id, db_series_state from, db_series_state to,
                              const char *reason, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32], cur[32];
    if (!d)
        return sw_error_set(err, SW_EINVAL, "db: series_set_state: no handle");
    if (!db_series_transition_legal(from, to))
        return sw_error_set(err, SW_EINVAL, "db: %s: series %lld: illegal transition %s -> %s",
                            d->path, (long long)id, nz(db_series_state_name(from)),
                            nz(db_series_state_name(to)));
    if (to == DB_SERIES_FAILED && empty(reason))
        return sw_error_set(err, SW_EINVAL, "db: %s: series %lld: failed needs a reason", d->path,
                            (long long)id);
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    db_now_iso(now, sizeof now);
    if ((rc = db_stmt(d, ST_SERIES_STATE_SET, &st, err)) != SW_OK)
        goto out;
    sqlite3_bind_int64(st, 1, id);
    db_bind_text(st, 2, db_series_state_name(from));
    db_bind_text(st, 3, db_series_state_name(to));
    db_bind_text(st, 4, nz(reason));
    db_bind_text(st, 5, now);
    if ((rc = db_exec_stmt(d, st, err)) != SW_OK)
        goto out;
    if (sqlite3_changes(d->sql) == 1)
        goto out;
    /* Nothing moved: say why. */
    if ((rc = one_text(d, ST_SERIES_STATE_GET, id, "series", cur, sizeof cur, err)) == SW_OK)
        rc = sw_error_set(err, SW_EINVAL, "db: %s: series %lld is %s, not %s", d->path,
                          (long long)id, cur, db_series_state_name(from));
out:
    return db_atomic_end(d, rc, err);
}

static void series_row(sqlite3_stmt *st, db_series_rec *r)
{
    memset(r, 0, sizeof *r);
    r->id = sqlite3_column_int64(st, 0);
    r->scanner_id = sqlite3_column_int64(st, 1);
    r->info.scanner_id = r->scanner_id;
    r->info.series_instance_uid = db_col_text(st, 2);
    r->info.study_instance_uid = db_col_text(st, 3);
    r->info.series_number = sqlite3_column_int(st, 4);
    r->info.series_date = db_col_text(st, 5);
    r->info.series_time = db_col_text(st, 6);
    r->info.description = db_col_text(st, 7);
    r->info.protocol = db_col_text(st, 8);
    r->info.series_type = db_col_text(st, 9);
    r->info.images_expected = sqlite3_column_int(st, 10);
    r->info.echoes_expected = sqlite3_column_int(st, 11);
    r->acquired_at = db_col_text(st, 12);
    db_series_state s = DB_SERIES_FAILED;
    db_series_state_parse(db_col_text(st, 13), &s); /* the schema's foreign key keeps it valid */
    r->state = s;
    r->reason = db_col_text(st, 14);
    r->created_at = db_col_text(st, 15);
    r->updated_at = db_col_text(st, 16);
    r->n_files = sqlite3_column_int(st, 17);
}

static int series_cb(void *unused, sqlite3_stmt *st, void *cb, void *ctx)
{
    (void)unused;
    db_series_rec r;
    series_row(st, &r);
    return ((db_series_cb)cb)(ctx, &r);
}

static sw_status series_query(db *d, db_stmt_id id, const char *uid, int64_t key, db_series_cb cb,
                              void *ctx, int must_find, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    int owned = 0, rows = 0;
    if (!d || !cb)
        return sw_error_set(err, SW_EINVAL, "db: series query: bad arguments");
    sw_status rc = db_stmt_iter(d, id, &st, &owned, err);
    if (rc != SW_OK)
        return rc;
    if (uid)
        db_bind_text(st, 1, uid);
    else if (key)
        sqlite3_bind_int64(st, 1, key);
    rc = iterate(d, st, owned, series_cb, (void *)cb, ctx, &rows, err);
    if (rc == SW_OK && must_find && rows == 0) {
        if (uid)
            rc = sw_error_set(err, SW_ENOTFOUND, "db: %s: no series %s", d->path, uid);
        else
            rc = sw_error_set(err, SW_ENOTFOUND, "db: %s: no series %lld", d->path, (long long)key);
    }
    return rc;
}

sw_status db_series_by_uid(db *d, const char *series_uid, db_series_cb cb, void *ctx, sw_error *err)
{
    if (empty(series_uid))
        return sw_error_set(err, SW_EINVAL, "db: series_by_uid: no UID");
    return series_query(d, ST_SERIES_BY_UID, series_uid, 0, cb, ctx, 1, err);
}

sw_status db_series_get(db *d, int64_t id, db_series_cb cb, void *ctx, sw_error *err)
{
    if (id <= 0)
        return sw_error_set(err, SW_ENOTFOUND, "db: no series %lld", (long long)id);
    return series_query(d, ST_SERIES_BY_ID, NULL, id, cb, ctx, 1, err);
}

sw_status db_series_pending(db *d, db_series_cb cb, void *ctx, sw_error *err)
{
    return series_query(d, ST_SERIES_PENDING, NULL, 0, cb, ctx, 0, err);
}

sw_status db_series_stored_run(db *d, int64_t series_id, int64_t *run_id, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    if (!d || !run_id)
        return sw_error_set(err, SW_EINVAL, "db: series_stored_run: bad arguments");
    *run_id = 0;
    sw_status rc = db_stmt(d, ST_SERIES_STORED_RUN, &st, err);
    if (rc != SW_OK)
        return rc;
    sqlite3_bind_int64(st, 1, series_id);
    return one_id(d, st, run_id, err);
}

/* ---- files ---- */

sw_status db_file_by_sop(db *d, const char *sop_instance_uid, int64_t *id, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    if (!d || !id || empty(sop_instance_uid))
        return sw_error_set(err, SW_EINVAL, "db: file_by_sop: bad arguments");
    *id = 0;
    sw_status rc = db_stmt(d, ST_FILE_FIND_SOP, &st, err);
    if (rc != SW_OK)
        return rc;
    db_bind_text(st, 1, sop_instance_uid);
    return one_id(d, st, id, err);
}

static sw_status insert_file(db *d, const db_file_info *f, db_file_state state, const char *reason,
                             int64_t *id, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    char now[32];
    sw_status rc = db_stmt(d, ST_FILE_INSERT, &st, err);
    if (rc != SW_OK)
        return rc;
    db_now_iso(now, sizeof now);
    db_bind_text(st, 1, f->path);
    db_bind_text(st, 2, f->content_hash);
    sqlite3_bind_int64(st, 3, f->size);
    db_bind_text_or_null(st, 4, f->sop_instance_uid);
    db_bind_text(st, 5, db_file_state_name(state));
    db_bind_text(st, 6, nz(reason));
    db_bind_text(st, 7, now);
    if ((rc = db_exec_stmt(d, st, err)) == SW_OK)
        *id = sqlite3_last_insert_rowid(d->sql);
    return rc;
}

sw_status db_file_add(db *d, const db_file_info *f, int64_t *id, db_file_outcome *outcome,
                      int64_t *original, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    int64_t known = 0, holder = 0, made = 0;
    db_file_outcome how = DB_FILE_ADDED;
    char reason[64];
    if (!d || !f || !id || !outcome)
        return sw_error_set(err, SW_EINVAL, "db: file_add: bad arguments");
    *id = 0;
    if (original)
        *original = 0;
    if (empty(f->path) || empty(f->content_hash) || f->size < 0)
        return sw_error_set(err, SW_EINVAL,
                            "db: %s: a file needs a path, a content hash and a size", d->path);
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_FILE_FIND_PATH, &st, err)) != SW_OK)
        goto out;
    db_bind_text(st, 1, f->path);
    db_bind_text(st, 2, f->content_hash);
    if ((rc = one_id(d, st, &known, err)) != SW_OK)
        goto out;
    if (known) {
        how = DB_FILE_KNOWN;
        made = known;
        goto out;
    }
    if (!empty(f->sop_instance_uid) &&
        (rc = db_file_by_sop(d, f->sop_instance_uid, &holder, err)) != SW_OK)
        goto out;
    if (holder) {
        how = DB_FILE_DUPLICATE;
        snprintf(reason, sizeof reason, "duplicate of file %lld", (long long)holder);
        rc = insert_file(d, f, DB_FILE_IGNORED, reason, &made, err);
    } else {
        /* A seen row that already carries its SOP UID is live: files_live_sop keeps it unique. */
        rc = insert_file(d, f, DB_FILE_SEEN, NULL, &made, err);
    }
out:
    rc = db_atomic_end(d, rc, err);
    if (rc == SW_OK) {
        *id = made;
        *outcome = how;
        if (original)
            *original = holder;
    }
    return rc;
}

/* Explains why an UPDATE ... WHERE id = ? AND state = ? changed nothing. */
static sw_status file_not_in(db *d, int64_t id, db_file_state from, sw_error *err)
{
    char cur[32];
    sw_status rc = one_text(d, ST_FILE_STATE_GET, id, "file", cur, sizeof cur, err);
    if (rc == SW_OK)
        rc = sw_error_set(err, SW_EINVAL, "db: %s: file %lld is %s, not %s", d->path, (long long)id,
                          cur, db_file_state_name(from));
    return rc;
}

sw_status db_file_parsed(db *d, int64_t id, const char *sop_instance_uid, int64_t series_id,
                         sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32];
    int64_t holder = 0;
    if (!d || empty(sop_instance_uid) || series_id <= 0)
        return sw_error_set(err, SW_EINVAL,
                            "db: file_parsed: needs a SOP instance UID and a series");
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = db_file_by_sop(d, sop_instance_uid, &holder, err)) != SW_OK)
        goto out;
    if (holder && holder != id) {
        rc = sw_error_set(err, SW_EINVAL, "db: %s: file %lld: SOP instance %s is already file %lld",
                          d->path, (long long)id, sop_instance_uid, (long long)holder);
        goto out;
    }
    if ((rc = db_stmt(d, ST_FILE_PARSED, &st, err)) != SW_OK)
        goto out;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, id);
    db_bind_text(st, 2, sop_instance_uid);
    sqlite3_bind_int64(st, 3, series_id);
    db_bind_text(st, 4, now);
    if ((rc = db_exec_stmt(d, st, err)) != SW_OK)
        goto out;
    if (sqlite3_changes(d->sql) != 1)
        rc = file_not_in(d, id, DB_FILE_SEEN, err);
out:
    return db_atomic_end(d, rc, err);
}

static sw_status check_file_edge(db *d, const char *who, db_file_state from, db_file_state to,
                                 const char *reason, sw_error *err)
{
    if (!db_file_transition_legal(from, to) || (from == DB_FILE_SEEN && to == DB_FILE_PARSED))
        return sw_error_set(err, SW_EINVAL, "db: %s: %s: illegal transition %s -> %s%s", d->path,
                            who, nz(db_file_state_name(from)), nz(db_file_state_name(to)),
                            from == DB_FILE_SEEN && to == DB_FILE_PARSED ? " (use db_file_parsed)"
                                                                         : "");
    if ((to == DB_FILE_QUARANTINED || to == DB_FILE_IGNORED) && empty(reason))
        return sw_error_set(err, SW_EINVAL, "db: %s: %s: %s needs a reason", d->path, who,
                            db_file_state_name(to));
    return SW_OK;
}

sw_status db_file_transition(db *d, int64_t id, db_file_state from, db_file_state to,
                             const char *reason, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32], who[48];
    if (!d)
        return sw_error_set(err, SW_EINVAL, "db: file_transition: no handle");
    snprintf(who, sizeof who, "file %lld", (long long)id);
    if ((rc = check_file_edge(d, who, from, to, reason, err)) != SW_OK)
        return rc;
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_FILE_STATE_SET, &st, err)) != SW_OK)
        goto out;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, id);
    db_bind_text(st, 2, db_file_state_name(from));
    db_bind_text(st, 3, db_file_state_name(to));
    db_bind_text(st, 4, nz(reason));
    db_bind_text(st, 5, now);
    if ((rc = db_exec_stmt(d, st, err)) != SW_OK)
        goto out;
    if (sqlite3_changes(d->sql) != 1)
        rc = file_not_in(d, id, from, err);
out:
    return db_atomic_end(d, rc, err);
}

sw_status db_series_files_transition(db *d, int64_t series_id, db_file_state from, db_file_state to,
                                     const char *reason, int *n, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32], who[48];
    int moved = 0;
    if (n)
        *n = 0;
    if (!d)
        return sw_error_set(err, SW_EINVAL, "db: series_files_transition: no handle");
    snprintf(who, sizeof who, "files of series %lld", (long long)series_id);
    if ((rc = check_file_edge(d, who, from, to, reason, err)) != SW_OK)
        return rc;
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_SERIES_FILES_STATE_SET, &st, err)) != SW_OK)
        goto out;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, series_id);
    db_bind_text(st, 2, db_file_state_name(from));
    db_bind_text(st, 3, db_file_state_name(to));
    db_bind_text(st, 4, nz(reason));
    db_bind_text(st, 5, now);
    if ((rc = db_exec_stmt(d, st, err)) == SW_OK)
        moved = sqlite3_changes(d->sql);
out:
    rc = db_atomic_end(d, rc, err);
    if (rc == SW_OK && n)
        *n = moved;
    return rc;
}

sw_status db_file_set_location(db *d, int64_t id, const char *location, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32];
    if (!d || empty(location))
        return sw_error_set(err, SW_EINVAL, "db: file_set_location: bad arguments");
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_FILE_LOCATION, &st, err)) != SW_OK)
        goto out;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, id);
    db_bind_text(st, 2, location);
    db_bind_text(st, 3, now);
    if ((rc = db_exec_stmt(d, st, err)) != SW_OK)
        goto out;
    if (sqlite3_changes(d->sql) != 1)
        rc = sw_error_set(err, SW_ENOTFOUND, "db: %s: no file %lld", d->path, (long long)id);
out:
    return db_atomic_end(d, rc, err);
}

static int file_cb(void *unused, sqlite3_stmt *st, void *cb, void *ctx)
{
    (void)unused;
    db_file_rec r;
    memset(&r, 0, sizeof r);
    r.id = sqlite3_column_int64(st, 0);
    r.series_id = sqlite3_column_int64(st, 1);
    r.path = db_col_text(st, 2);
    r.content_hash = db_col_text(st, 3);
    r.sop_instance_uid = db_col_text(st, 4);
    r.size = sqlite3_column_int64(st, 5);
    db_file_state s = DB_FILE_QUARANTINED;
    db_file_state_parse(db_col_text(st, 6), &s);
    r.state = s;
    r.reason = db_col_text(st, 7);
    r.location = db_col_text(st, 8);
    r.seen_at = db_col_text(st, 9);
    r.updated_at = db_col_text(st, 10);
    return ((db_file_cb)cb)(ctx, &r);
}

static sw_status file_query(db *d, db_stmt_id id, int64_t key, db_file_cb cb, void *ctx,
                            int must_find, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    int owned = 0, rows = 0;
    if (!d || !cb)
        return sw_error_set(err, SW_EINVAL, "db: file query: bad arguments");
    sw_status rc = db_stmt_iter(d, id, &st, &owned, err);
    if (rc != SW_OK)
        return rc;
    if (key)
        sqlite3_bind_int64(st, 1, key);
    rc = iterate(d, st, owned, file_cb, (void *)cb, ctx, &rows, err);
    if (rc == SW_OK && must_find && rows == 0)
        rc = sw_error_set(err, SW_ENOTFOUND, "db: %s: no file %lld", d->path, (long long)key);
    return rc;
}

sw_status db_file_get(db *d, int64_t id, db_file_cb cb, void *ctx, sw_error *err)
{
    if (id <= 0)
        return sw_error_set(err, SW_ENOTFOUND, "db: no file %lld", (long long)id);
    return file_query(d, ST_FILE_BY_ID, id, cb, ctx, 1, err);
}

sw_status db_files_pending(db *d, db_file_cb cb, void *ctx, sw_error *err)
{
    return file_query(d, ST_FILES_PENDING, 0, cb, ctx, 0, err);
}

sw_status db_series_files(db *d, int64_t series_id, db_file_cb cb, void *ctx, sw_error *err)
{
    if (series_id <= 0)
        return sw_error_set(err, SW_EINVAL, "db: series_files: bad series id");
    return file_query(d, ST_SERIES_FILE_LIST, series_id, cb, ctx, 0, err);
}

/* ---- runs and measurements ---- */

sw_status db_run_begin(db *d, int64_t series_id, const db_run_info *ri, int64_t *run_id,
                       sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32];
    int64_t made = 0;
    if (!d || !ri || !run_id)
        return sw_error_set(err, SW_EINVAL, "db: run_begin: bad arguments");
    *run_id = 0;
    if (empty(ri->program_version) || empty(ri->config_hash) || empty(ri->phantom_model) ||
        empty(ri->tolerance_set))
        return sw_error_set(err, SW_EINVAL,
                            "db: %s: a run needs the program version, config hash, phantom model "
                            "and tolerance set",
                            d->path);
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_RUN_INSERT, &st, err)) != SW_OK)
        goto out;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, series_id);
    db_bind_text(st, 2, ri->program_version);
    db_bind_text(st, 3, ri->config_hash);
    db_bind_text(st, 4, ri->phantom_model);
    db_bind_text(st, 5, ri->tolerance_set);
    db_bind_text(st, 6, now);
    if ((rc = db_exec_stmt(d, st, err)) == SW_OK)
        made = sqlite3_last_insert_rowid(d->sql);
out:
    rc = db_atomic_end(d, rc, err);
    if (rc == SW_OK)
        *run_id = made;
    return rc;
}

sw_status db_run_finish(db *d, int64_t run_id, int ok, db_verdict verdict, const char *reason,
                        sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32], cur[32];
    if (!d || !db_verdict_name(verdict))
        return sw_error_set(err, SW_EINVAL, "db: run_finish: bad arguments");
    if (!ok && empty(reason))
        return sw_error_set(err, SW_EINVAL, "db: %s: run %lld: a failed run needs a reason",
                            d->path, (long long)run_id);
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_RUN_FINISH, &st, err)) != SW_OK)
        goto out;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, run_id);
    db_bind_text(st, 2, ok ? "done" : "failed");
    db_bind_text(st, 3, db_verdict_name(verdict));
    db_bind_text(st, 4, nz(reason));
    db_bind_text(st, 5, now);
    if ((rc = db_exec_stmt(d, st, err)) != SW_OK)
        goto out;
    if (sqlite3_changes(d->sql) != 1 &&
        (rc = one_text(d, ST_RUN_STATUS, run_id, "run", cur, sizeof cur, err)) == SW_OK)
        rc = sw_error_set(err, SW_EINVAL, "db: %s: run %lld is %s, not running", d->path,
                          (long long)run_id, cur);
out:
    return db_atomic_end(d, rc, err);
}

sw_status db_measurement_add(db *d, int64_t run_id, const db_measurement *m, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    if (!d || !m)
        return sw_error_set(err, SW_EINVAL, "db: measurement_add: bad arguments");
    const char *metric = nz(m->metric);
    if (!*metric || !db_verdict_name(m->verdict) || m->slice < 0 || m->echo < 0)
        return sw_error_set(err, SW_EINVAL,
                            "db: %s: run %lld: a measurement needs a metric and a "
                            "verdict",
                            d->path, (long long)run_id);
    if (isinf(m->value) || isinf(m->uncertainty) || isinf(m->nominal) || isinf(m->limit_lo) ||
        isinf(m->limit_hi) || (!isnan(m->uncertainty) && m->uncertainty < 0))
        return sw_error_set(err, SW_EINVAL, "db: %s: run %lld: %s: infinite or negative numbers",
                            d->path, (long long)run_id, metric);
    if ((m->verdict == DB_UNMEASURABLE) != (isnan(m->value) != 0))
        return sw_error_set(err, SW_EINVAL,
                            "db: %s: run %lld: %s: a value is absent exactly when unmeasurable",
                            d->path, (long long)run_id, metric);
    if (m->verdict == DB_UNMEASURABLE && empty(m->reason))
        return sw_error_set(err, SW_EINVAL, "db: %s: run %lld: %s: unmeasurable needs a reason",
                            d->path, (long long)run_id, metric);
    if (m->details_json) {
        json_error_t je;
        json_t *j = json_loads(m->details_json, JSON_REJECT_DUPLICATES, &je);
        int object = j && json_is_object(j);
        json_decref(j);
        if (!object)
            return sw_error_set(err, SW_EINVAL,
                                "db: %s: run %lld: %s: details are not a JSON object (%s)", d->path,
                                (long long)run_id, metric, j ? "not an object" : je.text);
    }
    if ((rc = db_refuse_readonly(d, err)) != SW_OK)
        return rc;
    /* One statement: atomic by itself, no savepoint needed on this hot path. */
    if ((rc = db_stmt(d, ST_MEASUREMENT_INSERT, &st, err)) != SW_OK)
        return rc;
    sqlite3_bind_int64(st, 1, run_id);
    db_bind_text(st, 2, metric);
    if (m->slice)
        sqlite3_bind_int(st, 3, m->slice);
    if (m->echo)
        sqlite3_bind_int(st, 4, m->echo);
    db_bind_double_or_null(st, 5, m->value);
    db_bind_double_or_null(st, 6, m->uncertainty);
    db_bind_text(st, 7, nz(m->unit));
    db_bind_text(st, 8, db_verdict_name(m->verdict));
    db_bind_text(st, 9, nz(m->reason));
    db_bind_double_or_null(st, 10, m->nominal);
    db_bind_double_or_null(st, 11, m->limit_lo);
    db_bind_double_or_null(st, 12, m->limit_hi);
    db_bind_text_or_null(st, 13, m->details_json);
    return db_exec_stmt(d, st, err);
}

/* ---- alerts ---- */

sw_status db_alert_add(db *d, const db_alert_info *a, int64_t *id, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32];
    if (!d || !a || !id)
        return sw_error_set(err, SW_EINVAL, "db: alert_add: bad arguments");
    *id = 0;
    if (!db_alert_kind_name(a->kind) || a->scanner_id <= 0 || empty(a->metric) ||
        !db_verdict_name(a->verdict) || isinf(a->value) || isinf(a->limit))
        return sw_error_set(err, SW_EINVAL,
                            "db: %s: an alert needs a kind, a scanner, a metric and a verdict",
                            d->path);
    if ((rc = db_refuse_readonly(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_ALERT_INSERT, &st, err)) != SW_OK)
        return rc;
    db_now_iso(now, sizeof now);
    db_bind_text(st, 1, db_alert_kind_name(a->kind));
    sqlite3_bind_int64(st, 2, a->scanner_id);
    db_bind_id_or_null(st, 3, a->series_id);
    db_bind_id_or_null(st, 4, a->run_id);
    db_bind_text(st, 5, a->metric);
    db_bind_double_or_null(st, 6, a->value);
    db_bind_double_or_null(st, 7, a->limit);
    db_bind_text(st, 8, db_verdict_name(a->verdict));
    db_bind_text(st, 9, nz(a->message));
    db_bind_text(st, 10, nz(a->png_path));
    db_bind_text(st, 11, now);
    if ((rc = db_exec_stmt(d, st, err)) == SW_OK)
        *id = sqlite3_last_insert_rowid(d->sql);
    return rc;
}

static int alert_cb(void *unused, sqlite3_stmt *st, void *cb, void *ctx)
{
    (void)unused;
    db_alert_rec r;
    memset(&r, 0, sizeof r);
    r.id = sqlite3_column_int64(st, 0);
    const char *kind = db_col_text(st, 1);
    r.info.kind = !strcmp(kind, "breach") ? DB_ALERT_BREACH
                  : !strcmp(kind, "warn") ? DB_ALERT_WARN
                                          : DB_ALERT_DRIFT;
    r.info.scanner_id = sqlite3_column_int64(st, 2);
    r.info.series_id = sqlite3_column_int64(st, 3);
    r.info.run_id = sqlite3_column_int64(st, 4);
    r.info.metric = db_col_text(st, 5);
    r.info.value = db_col_double(st, 6);
    r.info.limit = db_col_double(st, 7);
    db_verdict v = DB_INFO;
    db_verdict_parse(db_col_text(st, 8), &v);
    r.info.verdict = v;
    r.info.message = db_col_text(st, 9);
    r.info.png_path = db_col_text(st, 10);
    r.created_at = db_col_text(st, 11);
    const char *status = db_col_text(st, 12);
    r.status = !strcmp(status, "pending") ? DB_ALERT_PENDING
               : !strcmp(status, "sent")  ? DB_ALERT_SENT
                                          : DB_ALERT_FAILED;
    r.attempts = sqlite3_column_int(st, 13);
    r.last_error = db_col_text(st, 14);
    r.last_attempt_at = db_col_text(st, 15);
    return ((db_alert_cb)cb)(ctx, &r);
}

sw_status db_alerts_pending(db *d, int max_attempts, db_alert_cb cb, void *ctx, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    int owned = 0;
    if (!d || !cb || max_attempts < 1)
        return sw_error_set(err, SW_EINVAL, "db: alerts_pending: bad arguments");
    sw_status rc = db_stmt_iter(d, ST_ALERTS_PENDING, &st, &owned, err);
    if (rc != SW_OK)
        return rc;
    sqlite3_bind_int(st, 1, max_attempts);
    return iterate(d, st, owned, alert_cb, (void *)cb, ctx, NULL, err);
}

sw_status db_alert_mark(db *d, int64_t id, int ok, const char *error, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32], cur[32];
    if (!d)
        return sw_error_set(err, SW_EINVAL, "db: alert_mark: no handle");
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_ALERT_MARK, &st, err)) != SW_OK)
        goto out;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, id);
    db_bind_text(st, 2, ok ? "sent" : "failed");
    db_bind_text(st, 3, ok ? "" : (empty(error) ? "failed (no detail)" : error));
    db_bind_text(st, 4, now);
    if ((rc = db_exec_stmt(d, st, err)) != SW_OK)
        goto out;
    if (sqlite3_changes(d->sql) != 1 &&
        (rc = one_text(d, ST_ALERT_STATUS, id, "alert", cur, sizeof cur, err)) == SW_OK)
        rc = sw_error_set(err, SW_EINVAL, "db: %s: alert %lld was already sent", d->path,
                          (long long)id);
out:
    return db_atomic_end(d, rc, err);
}
