/* db.c: the handle: opening with WAL, foreign keys and migrations, the statement cache, errors,
 * transactions and savepoints, metadata, names of the enums and time stamps. */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>

#include "dbint.h"

/* The statement cache: one text per db_stmt_id, prepared on first use with
 * SQLITE_PREPARE_PERSISTENT. Selects that feed callbacks are here too; db_stmt_iter gives a fresh
 * copy when the cached one is in use by an outer iteration on the same handle. */
static const char *const SQL[ST_COUNT] = {
    [ST_BEGIN] = "BEGIN IMMEDIATE",
    [ST_COMMIT] = "COMMIT",
    [ST_ROLLBACK] = "ROLLBACK",
    [ST_SAVEPOINT] = "SAVEPOINT db_atomic",
    [ST_RELEASE] = "RELEASE db_atomic",
    [ST_ROLLBACK_TO] = "ROLLBACK TO db_atomic",
    [ST_META_GET] = "SELECT value FROM meta WHERE key = ?1",
    [ST_META_SET] = "INSERT INTO meta(key, value, updated_at) VALUES (?1, ?2, ?3) "
                    "ON CONFLICT(key) DO UPDATE SET value = ?2, updated_at = ?3",
    [ST_SCANNER_FIND] = "SELECT id FROM scanners WHERE station_name = ?1 AND device_serial = ?2",
    [ST_SCANNER_INSERT] = "INSERT INTO scanners(station_name, device_serial, manufacturer, model, "
                          "institution, site_alias, first_seen, last_seen) "
                          "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?7)",
    [ST_SCANNER_TOUCH] =
        "UPDATE scanners SET last_seen = ?2, "
        "manufacturer = CASE WHEN ?3 <> '' THEN ?3 ELSE manufacturer END, "
        "model = CASE WHEN ?4 <> '' THEN ?4 ELSE model END, "
        "institution = CASE WHEN ?5 <> '' THEN ?5 ELSE institution END, "
        "site_alias = CASE WHEN ?6 <> '' THEN ?6 ELSE site_alias END WHERE id = ?1",
    [ST_SCANNERS_ALL] = "SELECT id, station_name, device_serial, manufacturer, model, institution, "
                        "site_alias, first_seen, last_seen FROM scanners ORDER BY id",
    [ST_SERIES_FIND] = "SELECT id, study_instance_uid, scanner_id FROM series "
                       "WHERE series_instance_uid = ?1",
    [ST_SERIES_INSERT] =
        "INSERT INTO series(series_instance_uid, study_instance_uid, scanner_id, series_number, "
        "series_date, series_time, acquired_at, description, protocol, series_type, "
        "images_expected, echoes_expected, created_at, updated_at) "
        "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?13)",
    [ST_SERIES_STATE_GET] = "SELECT state FROM series WHERE id = ?1",
    [ST_SERIES_STATE_SET] = "UPDATE series SET state = ?3, reason = ?4, updated_at = ?5 "
                            "WHERE id = ?1 AND state = ?2",
    [ST_SERIES_STORED_RUN] = "SELECT max(id) FROM runs WHERE series_id = ?1 AND status = 'done'",
#define SERIES_COLS                                                                                \
    "SELECT s.id, s.scanner_id, s.series_instance_uid, s.study_instance_uid, s.series_number, "    \
    "s.series_date, s.series_time, s.description, s.protocol, s.series_type, s.images_expected, "  \
    "s.echoes_expected, s.acquired_at, s.state, s.reason, s.created_at, s.updated_at, "            \
    "(SELECT count(*) FROM files f WHERE f.series_id = s.id "                                      \
    "AND f.state NOT IN ('quarantined', 'ignored')) FROM series s "
    [ST_SERIES_BY_UID] = SERIES_COLS "WHERE s.series_instance_uid = ?1",
    [ST_SERIES_BY_ID] = SERIES_COLS "WHERE s.id = ?1",
    /* The condition is the partial index's own, so that the index serves it. */
    [ST_SERIES_PENDING] = SERIES_COLS "WHERE s.state NOT IN ('stored', 'failed') ORDER BY s.id",
#undef SERIES_COLS
    [ST_FILE_FIND_PATH] = "SELECT id FROM files WHERE path = ?1 AND content_hash = ?2",
    [ST_FILE_FIND_SOP] = "SELECT id FROM files WHERE sop_instance_uid = ?1 "
                         "AND state NOT IN ('quarantined', 'ignored')",
    [ST_FILE_INSERT] = "INSERT INTO files(path, content_hash, size, sop_instance_uid, state, "
                       "reason, seen_at, updated_at) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?7)",
    [ST_FILE_STATE_GET] = "SELECT state FROM files WHERE id = ?1",
    [ST_FILE_PARSED] = "UPDATE files SET state = 'parsed', sop_instance_uid = ?2, series_id = ?3, "
                       "updated_at = ?4 WHERE id = ?1 AND state = 'seen'",
    [ST_FILE_STATE_SET] = "UPDATE files SET state = ?3, reason = ?4, updated_at = ?5 "
                          "WHERE id = ?1 AND state = ?2",
    [ST_SERIES_FILES_STATE_SET] = "UPDATE files SET state = ?3, reason = ?4, updated_at = ?5 "
                                  "WHERE series_id = ?1 AND state = ?2",
    [ST_FILE_LOCATION] = "UPDATE files SET location = ?2, updated_at = ?3 WHERE id = ?1",
#define FILE_COLS                                                                                  \
    "SELECT id, series_id, path, content_hash, sop_instance_uid, size, state, reason, location, "  \
    "seen_at, updated_at FROM files "
    [ST_FILE_BY_ID] = FILE_COLS "WHERE id = ?1",
    [ST_FILES_PENDING] = FILE_COLS "WHERE state IN ('seen', 'parsed', 'measured') ORDER BY id",
    [ST_SERIES_FILE_LIST] = FILE_COLS "WHERE series_id = ?1 ORDER BY id",
#undef FILE_COLS
    [ST_RUN_INSERT] = "INSERT INTO runs(series_id, program_version, config_hash, phantom_model, "
                      "tolerance_set, started_at) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
    [ST_RUN_STATUS] = "SELECT status FROM runs WHERE id = ?1",
    [ST_RUN_FINISH] = "UPDATE runs SET status = ?2, verdict = ?3, reason = ?4, finished_at = ?5 "
                      "WHERE id = ?1 AND status = 'running'",
    [ST_MEASUREMENT_INSERT] =
        "INSERT INTO measurements(run_id, metric, slice, echo, value, uncertainty, unit, verdict, "
        "reason, nominal, limit_lo, limit_hi, details) "
        "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13)",
    [ST_ALERT_INSERT] =
        "INSERT INTO alerts(kind, scanner_id, series_id, run_id, metric, value, limit_value, "
        "verdict, message, png_path, created_at) "
        "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
    [ST_ALERT_STATUS] = "SELECT command_status FROM alerts WHERE id = ?1",
    [ST_ALERT_MARK] = "UPDATE alerts SET command_status = ?2, attempts = attempts + 1, "
                      "last_error = ?3, last_attempt_at = ?4 "
                      "WHERE id = ?1 AND command_status <> 'sent'",
    [ST_ALERTS_PENDING] =
        "SELECT id, kind, scanner_id, series_id, run_id, metric, value, limit_value, verdict, "
        "message, png_path, created_at, command_status, attempts, last_error, last_attempt_at "
        "FROM alerts WHERE command_status <> 'sent' "
        "AND (command_status = 'pending' OR attempts < ?1) ORDER BY id",
    /* The measurement cursor: every filter is a parameter (NULL or 0: no filter), so one prepared
     * statement serves every query. Latest run: the highest id of the series' finished runs. */
    [ST_CURSOR] =
        "SELECT m.id, m.run_id, s.id, sc.id, "
        "sc.station_name, sc.device_serial, sc.manufacturer, sc.model, sc.institution, "
        "sc.site_alias, s.series_instance_uid, s.study_instance_uid, s.acquired_at, "
        "s.description, s.protocol, s.series_type, s.series_number, "
        "r.program_version, r.config_hash, r.phantom_model, r.tolerance_set, r.started_at, "
        "r.finished_at, r.verdict, "
        "m.metric, m.unit, m.reason, m.details, m.slice, m.echo, m.value, m.uncertainty, "
        "m.nominal, m.limit_lo, m.limit_hi, m.verdict "
        "FROM series s "
        "JOIN scanners sc ON sc.id = s.scanner_id "
        "JOIN runs r ON r.series_id = s.id "
        "JOIN measurements m ON m.run_id = r.id "
        "WHERE r.status = 'done' "
        "AND (?1 IS NULL OR sc.id = ?1) "
        "AND (?2 IS NULL OR sc.station_name = ?2) "
        "AND (?3 IS NULL OR s.protocol = ?3) "
        "AND (?4 IS NULL OR s.acquired_at >= ?4) "
        "AND (?5 IS NULL OR s.acquired_at < ?5) "
        "AND (?6 IS NULL OR m.metric = ?6) "
        "AND (?7 = 0 OR ((?7 >> CASE m.verdict WHEN 'pass' THEN 0 WHEN 'warn' THEN 1 "
        "WHEN 'fail' THEN 2 WHEN 'unmeasurable' THEN 3 ELSE 4 END) & 1) = 1) "
        "AND (?8 = 1 OR r.id = (SELECT max(r2.id) FROM runs r2 "
        "WHERE r2.series_id = s.id AND r2.status = 'done')) "
        "ORDER BY s.acquired_at, s.id, r.id, m.id",
};

/* ---- errors ---- */

static sw_status map_rc(int rc)
{
    switch (rc & 0xff) {
    case SQLITE_BUSY:
    case SQLITE_LOCKED: return SW_EBUSY;
    case SQLITE_NOMEM: return SW_ENOMEM;
    case SQLITE_CONSTRAINT: return SW_EINVAL; /* the store's rules refused the change */
    case SQLITE_READONLY: return SW_EINVAL;
    case SQLITE_NOTADB: return SW_EFORMAT;
    case SQLITE_CANTOPEN:
    case SQLITE_IOERR:
    case SQLITE_FULL: return SW_EIO;
    default: return SW_EDB;
    }
}

sw_status db_sqlerr(db *d, int rc, sw_error *err)
{
    const char *path = d && d->path ? d->path : "?";
    if (d && d->fault_fired)
        return sw_error_set(err, SW_EIO, "db: %s: injected fault at step %ld", path, d->fault_at);
    const char *msg = d && d->sql ? sqlite3_errmsg(d->sql) : sqlite3_errstr(rc);
    /* A step that failed reports its own code; an OK code here means a misuse by this file. */
    if (rc == SQLITE_OK || rc == SQLITE_ROW || rc == SQLITE_DONE)
        return sw_error_set(err, SW_EDB, "db: %s: unexpected result %d", path, rc);
    return sw_error_set(err, map_rc(rc), "db: %s: %s", path, msg);
}

sw_status db_refuse_readonly(db *d, sw_error *err)
{
    if (d->readonly)
        return sw_error_set(err, SW_EINVAL, "db: %s: opened read-only", d->path);
    return SW_OK;
}

/* ---- statements ---- */

/* The first failed bind since the statement was taken (db_stmt): binding text copies it, which
 * can fail for want of memory, and a statement run with a parameter left NULL would answer another
 * question (a lookup that finds nothing, an insert that breaks a constraint). db_step returns the
 * bind's failure instead of running. One statement is bound and run at a time per thread. */
static _Thread_local int bind_failed;


int db_step(db *d, sqlite3_stmt *st)
{
    d->steps++;
    d->fault_fired = 0;
    if (bind_failed) {
        int rc = bind_failed;
        bind_failed = 0;
        return rc;
    }
    if (d->fault_at > 0 && d->steps == d->fault_at) {
        d->fault_fired = 1;
        return SQLITE_IOERR;
    }
    return sqlite3_step(st);
}

sw_status db_stmt(db *d, db_stmt_id id, sqlite3_stmt **out, sw_error *err)
{
    *out = NULL;
    if ((unsigned)id >= ST_COUNT || !SQL[id])
        return sw_error_set(err, SW_EINVAL, "db: %s: no statement %d", d->path, (int)id);
    if (!d->stmt[id]) {
        int rc =
            sqlite3_prepare_v3(d->sql, SQL[id], -1, SQLITE_PREPARE_PERSISTENT, &d->stmt[id], NULL);
        if (rc != SQLITE_OK) {
            d->stmt[id] = NULL;
            return db_sqlerr(d, rc, err);
        }
    }
    sqlite3_reset(d->stmt[id]);
    sqlite3_clear_bindings(d->stmt[id]);
    bind_failed = 0;
    *out = d->stmt[id];
    return SW_OK;
}

sw_status db_stmt_iter(db *d, db_stmt_id id, sqlite3_stmt **out, int *owned, sw_error *err)
{
    *owned = 0;
    *out = NULL;
    if ((unsigned)id >= ST_COUNT || !SQL[id])
        return sw_error_set(err, SW_EINVAL, "db: %s: no statement %d", d->path, (int)id);
    if (d->stmt[id] && sqlite3_stmt_busy(d->stmt[id])) {
        int rc = sqlite3_prepare_v2(d->sql, SQL[id], -1, out, NULL);
        if (rc != SQLITE_OK) {
            *out = NULL;
            return db_sqlerr(d, rc, err);
        }
        *owned = 1;
        bind_failed = 0;
        return SW_OK;
    }
    return db_stmt(d, id, out, err);
}

void db_stmt_done(sqlite3_stmt *st, int owned)
{
    if (!st)
        return;
    if (owned) {
        sqlite3_finalize(st);
    } else {
        sqlite3_reset(st);
        sqlite3_clear_bindings(st);
    }
}

sw_status db_exec_stmt(db *d, sqlite3_stmt *st, sw_error *err)
{
    sw_status rc = SW_OK;
    int r;
    while ((r = db_step(d, st)) == SQLITE_ROW)
        ;
    if (r != SQLITE_DONE)
        rc = db_sqlerr(d, r, err);
    sqlite3_reset(st);
    return rc;
}

sw_status db_set_durable(db *d, int durable, sw_error *err)
{
    if (d->txn_open || d->savepoint_depth)
        return sw_error_set(err, SW_EINVAL, "%s: commit durability changed inside a transaction",
                            d->path);
    return db_exec_script(d, durable ? "PRAGMA synchronous = FULL" : "PRAGMA synchronous = NORMAL",
                          err);
}

sw_status db_sync_log(db *d, sw_error *err)
{
    sqlite3_file *f = NULL;
    int r = sqlite3_file_control(d->sql, "main", SQLITE_FCNTL_JOURNAL_POINTER, &f);
    if (r != SQLITE_OK)
        return db_sqlerr(d, r, err);
    if (!f || !f->pMethods)
        return SW_OK; /* no log open: nothing was written since the last durable point */
    if ((r = f->pMethods->xSync(f, SQLITE_SYNC_NORMAL)) != SQLITE_OK)
        return sw_error_set(err, SW_EIO, "%s: the write-ahead log could not be synced (%s)",
                            d->path, sqlite3_errstr(r));
    return SW_OK;
}

sw_status db_exec_script(db *d, const char *sql, sw_error *err)
{
    sw_status rc = SW_OK;
    const char *p = sql;
    while (p && *p) {
        sqlite3_stmt *st = NULL;
        const char *tail = NULL;
        int r = sqlite3_prepare_v2(d->sql, p, -1, &st, &tail);
        if (r != SQLITE_OK) {
            rc = db_sqlerr(d, r, err);
            sqlite3_finalize(st);
            break;
        }
        if (st) { /* NULL for trailing white space and comments */
            rc = db_exec_stmt(d, st, err);
            sqlite3_finalize(st);
            if (rc != SW_OK)
                break;
        }
        p = tail;
    }
    return rc;
}

/* ---- binding and columns ---- */

static int bound(int rc)
{
    if (rc != SQLITE_OK && !bind_failed)
        bind_failed = rc;
    return rc;
}

int db_bind_text(sqlite3_stmt *st, int i, const char *s)
{
    return bound(s ? sqlite3_bind_text(st, i, s, -1, SQLITE_TRANSIENT) : sqlite3_bind_null(st, i));
}

int db_bind_text_or_null(sqlite3_stmt *st, int i, const char *s)
{
    return bound(s && *s ? sqlite3_bind_text(st, i, s, -1, SQLITE_TRANSIENT)
                         : sqlite3_bind_null(st, i));
}

int db_bind_double_or_null(sqlite3_stmt *st, int i, double v)
{
    return bound(isnan(v) ? sqlite3_bind_null(st, i) : sqlite3_bind_double(st, i, v));
}

int db_bind_id_or_null(sqlite3_stmt *st, int i, int64_t id)
{
    return bound(id ? sqlite3_bind_int64(st, i, id) : sqlite3_bind_null(st, i));
}

const char *db_col_text(sqlite3_stmt *st, int i)
{
    const unsigned char *s = sqlite3_column_text(st, i);
    return s ? (const char *)s : "";
}

double db_col_double(sqlite3_stmt *st, int i)
{
    return sqlite3_column_type(st, i) == SQLITE_NULL ? NAN : sqlite3_column_double(st, i);
}

/* ---- transactions ---- */

static sw_status run_fixed(db *d, db_stmt_id id, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = db_stmt(d, id, &st, err);
    if (rc == SW_OK)
        rc = db_exec_stmt(d, st, err);
    return rc;
}

int db_in_transaction(const db *d)
{
    return d && d->sql && !sqlite3_get_autocommit(d->sql);
}

sw_status db_begin(db *d, sw_error *err)
{
    if (!d)
        return sw_error_set(err, SW_EINVAL, "db: no handle");
    if (d->readonly)
        return db_refuse_readonly(d, err);
    if (db_in_transaction(d))
        return sw_error_set(err, SW_EINVAL, "db: %s: a transaction is already open", d->path);
    sw_status rc = run_fixed(d, ST_BEGIN, err);
    d->txn_open = rc == SW_OK;
    d->savepoint_depth = 0;
    return rc;
}

/* SQLite rolls a transaction back by itself after some failures (SQLITE_FULL, SQLITE_IOERR,
 * SQLITE_NOMEM, SQLITE_BUSY in a statement): the statements after that would each commit on
 * their own, so that half of a series' transaction lands. Refused instead. */
static sw_status lost_transaction(db *d, sw_error *err)
{
    if (d->txn_open && !db_in_transaction(d))
        return sw_error_set(err, SW_EIO,
                            "db: %s: the transaction was rolled back after an earlier failure; "
                            "nothing more is written in it",
                            d->path);
    return SW_OK;
}

sw_status db_rollback(db *d, sw_error *err)
{
    if (!d)
        return sw_error_set(err, SW_EINVAL, "db: no handle");
    d->txn_open = 0;
    if (!db_in_transaction(d))
        return SW_OK;
    d->savepoint_depth = 0;
    return run_fixed(d, ST_ROLLBACK, err);
}

sw_status db_commit(db *d, sw_error *err)
{
    if (!d)
        return sw_error_set(err, SW_EINVAL, "db: no handle");
    sw_status lost = lost_transaction(d, err);
    d->txn_open = 0;
    if (lost != SW_OK)
        return lost;
    if (!db_in_transaction(d))
        return sw_error_set(err, SW_EINVAL, "db: %s: no transaction is open", d->path);
    sw_status rc = run_fixed(d, ST_COMMIT, err);
    if (rc != SW_OK && db_in_transaction(d)) {
        /* The contract: a failed commit leaves nothing half-done. */
        d->savepoint_depth = 0;
        run_fixed(d, ST_ROLLBACK, NULL);
    }
    return rc;
}

sw_status db_atomic_begin(db *d, sw_error *err)
{
    sw_status rc;
    if ((rc = db_refuse_readonly(d, err)) != SW_OK || (rc = lost_transaction(d, err)) != SW_OK)
        return rc;
    if (!db_in_transaction(d)) {
        if ((rc = run_fixed(d, ST_BEGIN, err)) != SW_OK)
            return rc;
        d->savepoint_depth = 0;
        return SW_OK;
    }
    if ((rc = run_fixed(d, ST_SAVEPOINT, err)) != SW_OK)
        return rc;
    d->savepoint_depth++;
    return SW_OK;
}

sw_status db_atomic_end(db *d, sw_status st, sw_error *err)
{
    if (d->savepoint_depth > 0) {
        d->savepoint_depth--;
        if (st == SW_OK) {
            sw_status rc = run_fixed(d, ST_RELEASE, err);
            if (rc != SW_OK) {
                /* The savepoint is still there: undo it so the caller's transaction stays whole. */
                run_fixed(d, ST_ROLLBACK_TO, NULL);
                run_fixed(d, ST_RELEASE, NULL);
            }
            return rc;
        }
        /* ROLLBACK TO keeps the savepoint open; RELEASE then drops it. */
        run_fixed(d, ST_ROLLBACK_TO, NULL);
        run_fixed(d, ST_RELEASE, NULL);
        return st;
    }
    if (!db_in_transaction(d))
        return st; /* SQLite already rolled back (for example after SQLITE_FULL) */
    if (st == SW_OK)
        return db_commit(d, err);
    run_fixed(d, ST_ROLLBACK, NULL);
    return st;
}

/* ---- open and close ---- */

static sw_status pragma_int(db *d, const char *sql, int *out, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    int r = sqlite3_prepare_v2(d->sql, sql, -1, &st, NULL);
    if (r != SQLITE_OK) {
        rc = db_sqlerr(d, r, err);
        goto out;
    }
    r = db_step(d, st);
    if (r == SQLITE_ROW) {
        if (out)
            *out = sqlite3_column_int(st, 0);
    } else if (r != SQLITE_DONE) {
        rc = db_sqlerr(d, r, err);
    }
out:
    sqlite3_finalize(st);
    return rc;
}

static sw_status pragma_text(db *d, const char *sql, char *buf, size_t n, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    buf[0] = '\0';
    int r = sqlite3_prepare_v2(d->sql, sql, -1, &st, NULL);
    if (r != SQLITE_OK) {
        rc = db_sqlerr(d, r, err);
        goto out;
    }
    r = db_step(d, st);
    if (r == SQLITE_ROW)
        sw_strlcpy(buf, db_col_text(st, 0), n);
    else if (r != SQLITE_DONE)
        rc = db_sqlerr(d, r, err);
out:
    sqlite3_finalize(st);
    return rc;
}

/* Refuses files that are someone else's SQLite database, or newer than this program. */
static sw_status check_identity(db *d, int *version, sw_error *err)
{
    sw_status rc;
    int app = 0, objects = 0;
    if ((rc = pragma_int(d, "PRAGMA application_id", &app, err)) != SW_OK ||
        (rc = pragma_int(d, "PRAGMA user_version", version, err)) != SW_OK ||
        (rc = pragma_int(d, "SELECT count(*) FROM sqlite_schema", &objects, err)) != SW_OK)
        return rc;
    if ((app != 0 && app != DB_APPLICATION_ID) || (app == 0 && (objects > 0 || *version != 0)))
        return sw_error_set(err, SW_EFORMAT, "db: %s: not a slicewarden database", d->path);
    if (*version > DB_SCHEMA_VERSION)
        return sw_error_set(err, SW_EUNSUPPORTED,
                            "db: %s: schema version %d is newer than this program's (%d)", d->path,
                            *version, DB_SCHEMA_VERSION);
    return SW_OK;
}

void db_close(db *d)
{
    if (!d)
        return;
    for (int i = 0; i < ST_COUNT; i++)
        sqlite3_finalize(d->stmt[i]);
    if (d->sql) {
        if (!sqlite3_get_autocommit(d->sql))
            sqlite3_exec(d->sql, "ROLLBACK", NULL, NULL, NULL);
        sqlite3_close_v2(d->sql);
    }
    free(d->path);
    free(d);
}

/* Ownership: on success *out is a new handle the caller closes with db_close; on failure *out is
 * NULL and no handle or open file is left. */
sw_status db_open_ex(const char *path, int flags, const db_open_opts *o, db **out, sw_error *err)
{
    sw_status rc = SW_OK;
    db *d = NULL;
    int version = 0, fk = 0;
    char mode[16];
    struct stat sb;

    if (out)
        *out = NULL;
    if (!path || !*path || !out)
        return sw_error_set(err, SW_EINVAL, "db: no path given");
    int ro = (flags & DB_OPEN_RO) != 0, rw = (flags & DB_OPEN_RW) != 0;
    if (ro == rw || (ro && (flags & DB_OPEN_CREATE)) ||
        (flags & ~(DB_OPEN_RO | DB_OPEN_RW | DB_OPEN_CREATE)))
        return sw_error_set(err, SW_EINVAL, "db: %s: open needs one of read-only or read-write",
                            path);
    if (!(flags & DB_OPEN_CREATE) && stat(path, &sb) != 0) {
        int e = errno;
        return sw_error_set(err, e == ENOENT ? SW_ENOTFOUND : SW_EIO, "db: %s: %s", path,
                            strerror(e));
    }
    if (!(d = calloc(1, sizeof *d)) || !(d->path = strdup(path))) {
        rc = sw_error_set(err, SW_ENOMEM, "db: %s: out of memory", path);
        goto out;
    }
    d->readonly = ro;
    d->fault_at = o ? o->fault_at : 0;
    /* A test facility (tests/fault): the environment may ask for the same fault in a whole
     * program. Read only when set; a value that is not a positive number is ignored. */
    const char *fault_env = d->fault_at ? NULL : getenv("SLICEWARDEN_TEST_DB_FAULT_AT");
    if (fault_env && *fault_env) {
        char *end = NULL;
        long v = strtol(fault_env, &end, 10);
        if (end && !*end && v > 0)
            d->fault_at = v;
    }
    int oflags = (ro ? SQLITE_OPEN_READONLY : SQLITE_OPEN_READWRITE) |
                 ((flags & DB_OPEN_CREATE) ? SQLITE_OPEN_CREATE : 0) | SQLITE_OPEN_NOMUTEX |
                 SQLITE_OPEN_EXRESCODE;
    int r = sqlite3_open_v2(path, &d->sql, oflags, NULL);
    if (r != SQLITE_OK) {
        rc = db_sqlerr(d, r, err);
        goto out;
    }
    /* Defence against a crafted file (databases from other sites are merged): schema code may not
     * call functions with side effects, and the schema cannot be edited behind SQLite's back. */
    sqlite3_db_config(d->sql, SQLITE_DBCONFIG_TRUSTED_SCHEMA, 0, (int *)NULL);
    sqlite3_db_config(d->sql, SQLITE_DBCONFIG_DEFENSIVE, 1, (int *)NULL);
    sqlite3_extended_result_codes(d->sql, 1);
    sqlite3_busy_timeout(d->sql, DB_BUSY_TIMEOUT_MS);

    if ((rc = db_exec_script(d, "PRAGMA foreign_keys = ON", err)) != SW_OK ||
        (rc = pragma_int(d, "PRAGMA foreign_keys", &fk, err)) != SW_OK)
        goto out;
    if (fk != 1) {
        rc = sw_error_set(err, SW_EUNSUPPORTED, "db: %s: SQLite without foreign keys", path);
        goto out;
    }
    if ((rc = check_identity(d, &version, err)) != SW_OK)
        goto out;
    if (ro) {
        if (version < DB_SCHEMA_VERSION) {
            rc = sw_error_set(err, SW_EUNSUPPORTED,
                              "db: %s: schema version %d is older than this program's (%d); "
                              "open it read-write once to upgrade",
                              path, version, DB_SCHEMA_VERSION);
            goto out;
        }
        rc = db_exec_script(d, "PRAGMA query_only = ON", err);
        goto out;
    }
    /* WAL: readers (reports) work while the daemon writes. FULL: a commit survives power loss. */
    if ((rc = pragma_text(d, "PRAGMA journal_mode = WAL", mode, sizeof mode, err)) != SW_OK)
        goto out;
    if (strcmp(mode, "wal") != 0) {
        rc = sw_error_set(err, SW_EUNSUPPORTED, "db: %s: WAL mode refused (journal mode %s)", path,
                          mode);
        goto out;
    }
    if ((rc = db_exec_script(d, "PRAGMA synchronous = FULL", err)) != SW_OK)
        goto out;
    rc = db_migrate(d, o ? o->target_version : 0, err);
out:
    if (rc != SW_OK) {
        db_close(d);
        d = NULL;
    }
    *out = d;
    return rc;
}

sw_status db_open(const char *path, int flags, db **out, sw_error *err)
{
    return db_open_ex(path, flags, NULL, out, err);
}

sw_status db_set_busy_timeout(db *d, int ms, sw_error *err)
{
    if (!d || ms < 0)
        return sw_error_set(err, SW_EINVAL, "db: busy timeout must be >= 0 ms");
    int r = sqlite3_busy_timeout(d->sql, ms);
    return r == SQLITE_OK ? SW_OK : db_sqlerr(d, r, err);
}

const char *db_path(const db *d)
{
    return d ? d->path : NULL;
}

int db_readonly(const db *d)
{
    return d ? d->readonly : 0;
}

/* ---- metadata ---- */

sw_status db_meta_get(db *d, const char *key, char *buf, size_t n, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc;
    if (!d || !key || !buf || n == 0)
        return sw_error_set(err, SW_EINVAL, "db: meta_get: bad arguments");
    buf[0] = '\0';
    if ((rc = db_stmt(d, ST_META_GET, &st, err)) != SW_OK)
        return rc;
    db_bind_text(st, 1, key);
    int r = db_step(d, st);
    if (r == SQLITE_ROW)
        sw_strlcpy(buf, db_col_text(st, 0), n);
    else if (r == SQLITE_DONE)
        rc = sw_error_set(err, SW_ENOTFOUND, "db: %s: no setting '%s'", d->path, key);
    else
        rc = db_sqlerr(d, r, err);
    db_stmt_done(st, 0);
    return rc;
}

sw_status db_meta_set(db *d, const char *key, const char *value, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc;
    char now[32];
    if (!d || !key || !*key || !value)
        return sw_error_set(err, SW_EINVAL, "db: meta_set: bad arguments");
    if ((rc = db_refuse_readonly(d, err)) != SW_OK)
        return rc;
    if ((rc = db_stmt(d, ST_META_SET, &st, err)) != SW_OK)
        return rc;
    db_now_iso(now, sizeof now);
    db_bind_text(st, 1, key);
    db_bind_text(st, 2, value);
    db_bind_text(st, 3, now);
    return db_exec_stmt(d, st, err);
}

/* ---- names ---- */

static const char *const SERIES_STATE[DB_SERIES_NSTATES] = {"collecting", "complete", "quiet",
                                                            "measured",   "stored",   "failed"};
static const char *const FILE_STATE[DB_FILE_NSTATES] = {"seen",   "parsed",      "measured",
                                                        "stored", "quarantined", "ignored"};
static const char *const VERDICT[DB_NVERDICTS] = {"pass", "warn", "fail", "unmeasurable", "info"};

static int parse_name(const char *const *names, int n, const char *s)
{
    for (int i = 0; s && i < n; i++)
        if (!strcmp(names[i], s))
            return i;
    return -1;
}

const char *db_series_state_name(db_series_state s)
{
    return (unsigned)s < DB_SERIES_NSTATES ? SERIES_STATE[s] : NULL;
}

int db_series_state_parse(const char *name, db_series_state *out)
{
    int i = parse_name(SERIES_STATE, DB_SERIES_NSTATES, name);
    if (i >= 0 && out)
        *out = (db_series_state)i;
    return i >= 0 ? 0 : -1;
}

const char *db_file_state_name(db_file_state s)
{
    return (unsigned)s < DB_FILE_NSTATES ? FILE_STATE[s] : NULL;
}

int db_file_state_parse(const char *name, db_file_state *out)
{
    int i = parse_name(FILE_STATE, DB_FILE_NSTATES, name);
    if (i >= 0 && out)
        *out = (db_file_state)i;
    return i >= 0 ? 0 : -1;
}

const char *db_verdict_name(db_verdict v)
{
    return (unsigned)v < DB_NVERDICTS ? VERDICT[v] : NULL;
}

int db_verdict_parse(const char *name, db_verdict *out)
{
    int i = parse_name(VERDICT, DB_NVERDICTS, name);
    if (i >= 0 && out)
        *out = (db_verdict)i;
    return i >= 0 ? 0 : -1;
}

const char *db_alert_kind_name(db_alert_kind k)
{
    static const char *const names[] = {"breach", "warn", "drift"};
    return (unsigned)k < 3 ? names[k] : NULL;
}

const char *db_alert_status_name(db_alert_status s)
{
    static const char *const names[] = {"pending", "sent", "failed"};
    return (unsigned)s < 3 ? names[s] : NULL;
}

/* ---- time ---- */

void db_now_iso(char *buf, size_t n)
{
    struct timespec ts;
    struct tm tm;
    if (!buf || n == 0)
        return;
    clock_gettime(CLOCK_REALTIME, &ts);
    gmtime_r(&ts.tv_sec, &tm);
    snprintf(buf, n, "%04d-%02d-%02dT%02d:%02d:%02d.%03ldZ", tm.tm_year + 1900, tm.tm_mon + 1,
             tm.tm_mday, tm.tm_hour, tm.tm_min, tm.tm_sec, ts.tv_nsec / 1000000L);
}

static int all_digits(const char *s, size_t n)
{
    for (size_t i = 0; i < n; i++)
        if (s[i] < '0' || s[i] > '9')
            return 0;
    return 1;
}

static int num(const char *s, size_t n)
{
    int v = 0;
    for (size_t i = 0; i < n; i++)
        v = v * 10 + (s[i] - '0');
    return v;
}

/* DA is YYYYMMDD; TM is HH[MM[SS[.F{1,6}]]] (PS3.5 6.2; the old "HH:MM:SS" form is accepted too),
 * with trailing spaces as padding. */
int db_dicom_datetime(const char *da, const char *tm, char *buf, size_t n)
{
    char t[32];
    size_t len, k = 0;
    int hh, mm = 0, ss = 0;
    const char *frac = "";
    size_t nfrac = 0;

    if (!buf || n == 0)
        return -1;
    buf[0] = '\0';
    if (!da || !tm)
        return -1;
    len = strlen(da);
    while (len > 0 && da[len - 1] == ' ')
        len--;
    if (len != 8 || !all_digits(da, 8))
        return -1;
    int y = num(da, 4), mo = num(da + 4, 2), dd = num(da + 6, 2);
    static const int mdays[12] = {31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
    if (y < 1 || mo < 1 || mo > 12 || dd < 1 || dd > mdays[mo - 1])
        return -1;
    int leap = (y % 4 == 0 && y % 100 != 0) || y % 400 == 0;
    if (mo == 2 && dd == 29 && !leap)
        return -1;
    /* strip colons of the old form and trailing padding */
    for (const char *p = tm; *p && k + 1 < sizeof t; p++)
        if (*p != ':')
            t[k++] = *p;
    t[k] = '\0';
    while (k > 0 && t[k - 1] == ' ')
        t[--k] = '\0';
    char *dot = strchr(t, '.');
    size_t nint = dot ? (size_t)(dot - t) : k;
    if (dot) {
        frac = dot + 1;
        nfrac = strlen(frac);
        if (nfrac < 1 || nfrac > 6 || !all_digits(frac, nfrac) || nint != 6)
            return -1;
    }
    if ((nint != 2 && nint != 4 && nint != 6) || !all_digits(t, nint))
        return -1;
    hh = num(t, 2);
    if (nint >= 4)
        mm = num(t + 2, 2);
    if (nint == 6)
        ss = num(t + 4, 2);
    if (hh > 23 || mm > 59 || ss > 60) /* 60: a leap second */
        return -1;
    int w = snprintf(buf, n, "%04d-%02d-%02dT%02d:%02d:%02d%s%.*s", y, mo, dd, hh, mm, ss,
                     nfrac ? "." : "", (int)nfrac, frac);
    if (w < 0 || (size_t)w >= n) {
        buf[0] = '\0';
        return -1;
    }
    return 0;
}
