/* dbint.h: the store's internals: the handle, the statement cache, errors, savepoints and the
 * fault-injection hook that tests use. Not part of the public interface. */
#ifndef DBINT_H
#define DBINT_H

#include <sqlite3.h>

#include "db.h"

/* Every statement the store runs, prepared once per handle on first use (db_stmt). */
typedef enum db_stmt_id {
    ST_BEGIN = 0,
    ST_COMMIT,
    ST_ROLLBACK,
    ST_SAVEPOINT,
    ST_RELEASE,
    ST_ROLLBACK_TO,
    ST_META_GET,
    ST_META_SET,
    ST_SCANNER_FIND,
    ST_SCANNER_INSERT,
    ST_SCANNER_TOUCH,
    ST_SCANNERS_ALL,
    ST_SERIES_FIND,
    ST_SERIES_INSERT,
    ST_SERIES_STATE_GET,
    ST_SERIES_STATE_SET,
    ST_SERIES_STORED_RUN,
    ST_SERIES_BY_UID,
    ST_SERIES_BY_ID,
    ST_SERIES_PENDING,
    ST_FILE_FIND_PATH,
    ST_FILE_FIND_SOP,
    ST_FILE_INSERT,
    ST_FILE_STATE_GET,
    ST_FILE_PARSED,
    ST_FILE_STATE_SET,
    ST_SERIES_FILES_STATE_SET,
    ST_FILE_LOCATION,
    ST_FILE_BY_ID,
    ST_FILES_PENDING,
    ST_SERIES_FILE_LIST,
    ST_RUN_INSERT,
    ST_RUN_STATUS,
    ST_RUN_FINISH,
    ST_MEASUREMENT_INSERT,
    ST_ALERT_INSERT,
    ST_ALERT_STATUS,
    ST_ALERT_MARK,
    ST_ALERTS_PENDING,
    ST_CURSOR,
    ST_COUNT
} db_stmt_id;

struct db {
    sqlite3 *sql;
    char *path;
    int readonly;
    int savepoint_depth; /* nesting of internal savepoints */
    int txn_open;        /* the caller's db_begin is in force (until db_commit or db_rollback) */
    sqlite3_stmt *stmt[ST_COUNT];
    /* Fault injection (tests): when fault_at > 0, the fault_at-th call of db_step on this handle
     * (counting from the open) fails with SQLITE_IOERR without running. steps counts every call.
     * When the options give none, SLICEWARDEN_TEST_DB_FAULT_AT in the environment sets it (a test
     * facility for whole-program sweeps, tests/fault; read only when set). */
    long steps;
    long fault_at;
    int fault_fired; /* the last failure was injected */
};

/* Options of db_open_ex; db_open uses the defaults (zeros). */
typedef struct db_open_opts {
    int target_version; /* migrate only up to this version (tests of migrations); 0: the newest */
    long fault_at;      /* see struct db */
} db_open_opts;
sw_status db_open_ex(const char *path, int flags, const db_open_opts *o, db **out, sw_error *err);

/* The schema: migration steps in order; step k brings user_version from k - 1 to k. */
typedef struct db_migration {
    int version;
    const char *description;
    const char *sql; /* one or more statements */
} db_migration;
extern const db_migration DB_MIGRATIONS[];
extern const int DB_NMIGRATIONS;
/* Applies every step above the file's user_version up to target, in one transaction. */
sw_status db_migrate(db *d, int target, sw_error *err);

/* The prepared statement for id (prepared on first use), reset and unbound. */
sw_status db_stmt(db *d, db_stmt_id id, sqlite3_stmt **out, sw_error *err);
/* For selects that feed callbacks: the cached statement, or a fresh one (*owned = 1) when the
 * cached one is still stepping for an outer iteration on this handle. Release with db_stmt_done. */
sw_status db_stmt_iter(db *d, db_stmt_id id, sqlite3_stmt **out, int *owned, sw_error *err);
void db_stmt_done(sqlite3_stmt *st, int owned);
/* sqlite3_step through the fault-injection hook. */
int db_step(db *d, sqlite3_stmt *st);
/* Sets err from SQLite's last error on the handle ("db: PATH: message"), mapping rc to a status. */
sw_status db_sqlerr(db *d, int rc, sw_error *err);
/* Runs a statement that returns no rows to completion and resets it. */
sw_status db_exec_stmt(db *d, sqlite3_stmt *st, sw_error *err);
/* Prepares, runs and finalizes each statement of sql (migrations, pragmas). */
sw_status db_exec_script(db *d, const char *sql, sw_error *err);
sw_status db_refuse_readonly(db *d, sw_error *err);

/* An atomic group of statements: a transaction when none is open (BEGIN IMMEDIATE), else a
 * savepoint inside the caller's. db_atomic_end commits (ok) or undoes (failure) the group. */
sw_status db_atomic_begin(db *d, sw_error *err);
sw_status db_atomic_end(db *d, sw_status st, sw_error *err);

/* Binding helpers: NULL or "" text and NAN doubles bind NULL where allowed. */
int db_bind_text(sqlite3_stmt *st, int i, const char *s);         /* NULL binds NULL, "" binds "" */
int db_bind_text_or_null(sqlite3_stmt *st, int i, const char *s); /* NULL and "" bind NULL */
int db_bind_double_or_null(sqlite3_stmt *st, int i, double v);
int db_bind_id_or_null(sqlite3_stmt *st, int i, int64_t id); /* 0 binds NULL */
const char *db_col_text(sqlite3_stmt *st, int i);            /* "" for NULL */
double db_col_double(sqlite3_stmt *st, int i);               /* NAN for NULL */

#endif
