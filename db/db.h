/* db.h: the SQLite store: scanners, series, files with their life cycle, analysis runs, measurement
 * rows and alerts, with the queries that exports and reports need. One handle per thread. */
#ifndef DB_H
#define DB_H

#include <stdint.h>
#include <stdio.h>

#include "sw.h"

/* The newest schema this program writes (PRAGMA user_version); docs/schema.md describes it. */
#define DB_SCHEMA_VERSION 4
/* PRAGMA application_id of a slicewarden database: 'SWDB'. */
#define DB_APPLICATION_ID 0x53574442
#define DB_BUSY_TIMEOUT_MS 5000 /* default wait for another connection's lock */

typedef struct db db;

/* ---- opening ----
 * DB_OPEN_RW opens for writing and brings the schema up to DB_SCHEMA_VERSION (forward migrations,
 * all pending steps in one transaction); DB_OPEN_CREATE also creates a missing file. DB_OPEN_RO
 * opens read-only (SQLITE_OPEN_READONLY): readers see committed rows while a writer works (WAL);
 * the schema must already be current. */
enum { DB_OPEN_RO = 1, DB_OPEN_RW = 2, DB_OPEN_CREATE = 4 };

/* Opens path. On success *out is a new handle the caller closes with db_close; on failure *out is
 * NULL, nothing was created or changed (a failed migration rolls back whole), and err names the
 * file and the reason ("db: /x/y.sqlite: database is locked"). SQLITE_BUSY maps to SW_EBUSY (retry
 * later); a missing file without DB_OPEN_CREATE to SW_ENOTFOUND; a file that is not a slicewarden
 * database, or a schema newer than this program, to SW_EFORMAT / SW_EUNSUPPORTED. */
sw_status db_open(const char *path, int flags, db **out, sw_error *err);
/* Finalizes the cached statements and closes; an open transaction is rolled back. Accepts NULL. */
void db_close(db *d);
/* How long a statement waits for another connection's lock before SW_EBUSY (ms, >= 0). */
sw_status db_set_busy_timeout(db *d, int ms, sw_error *err);
const char *db_path(const db *d);
int db_readonly(const db *d);

/* ---- transactions ----
 * db_begin takes the write lock at once (BEGIN IMMEDIATE), so contention shows as SW_EBUSY here and
 * not half-way through a series. The daemon writes one series per transaction. Write calls made
 * outside a transaction are atomic on their own. When a write call fails inside a transaction, its
 * own changes are undone and the caller decides: db_rollback (the usual) or go on. db_commit that
 * fails rolls the whole transaction back, so the store is always whole. */
sw_status db_begin(db *d, sw_error *err);
sw_status db_commit(db *d, sw_error *err);
sw_status db_rollback(db *d, sw_error *err); /* a no-op when no transaction is open */
int db_in_transaction(const db *d);
/* Whether the next commits wait for the disk (synchronous = FULL, db_open's setting) or only for
 * the operating system (synchronous = NORMAL: in WAL mode the process may die at any point without
 * a loss; a power failure may lose the latest commits, never leaving the store half-written). A
 * later durable commit, or db_sync_log, makes every earlier commit durable too. SQLite refuses the
 * change inside a transaction: SW_EINVAL then. */
sw_status db_set_durable(db *d, int durable, sw_error *err);
/* Makes the commits so far durable now (fdatasync of the write-ahead log). */
sw_status db_sync_log(db *d, sw_error *err);

/* ---- settings and metadata (table meta) ----
 * Keys written by the store: "application", "created_by_version", "created_at",
 * "last_migrated_by_version", "last_migrated_at". Others are the program's to use.
 * db_meta_get copies the value into buf (truncating; n > 0) or returns SW_ENOTFOUND. */
sw_status db_meta_get(db *d, const char *key, char *buf, size_t n, sw_error *err);
sw_status db_meta_set(db *d, const char *key, const char *value, sw_error *err);

/* ---- scanners ----
 * A scanner is identified by (station_name, device_serial), either of which may be empty. */
typedef struct db_scanner_info {
    const char *station_name;  /* StationName */
    const char *device_serial; /* DeviceSerialNumber */
    const char *manufacturer;
    const char *model;       /* ManufacturerModelName */
    const char *institution; /* InstitutionName */
    const char *site_alias;  /* the site's own name (config); NULL or "" keeps the stored one */
} db_scanner_info;

/* Finds or creates the scanner; refreshes last_seen, and manufacturer, model, institution and alias
 * when the new value is not empty. *id is its row id. */
sw_status db_scanner_upsert(db *d, const db_scanner_info *s, int64_t *id, sw_error *err);

typedef struct db_scanner_rec {
    int64_t id;
    db_scanner_info info;
    const char *first_seen, *last_seen; /* ISO 8601 UTC */
} db_scanner_rec;

/* Callbacks receive records whose strings stay valid during the call only; they return 0 to go on,
 * anything else to stop (the iteration then returns SW_OK). They may call any db_ function on the
 * same handle, including writes. */
typedef int (*db_scanner_cb)(void *ctx, const db_scanner_rec *r);
sw_status db_scanners_each(db *d, db_scanner_cb cb, void *ctx, sw_error *err);

/* ---- series and their life cycle ----
 * Every move is made by db_series_set_state(id, from, to, reason); the new series by
 * db_series_upsert.
 *
 *   db_series_upsert
 *   ----------------> collecting ---(all images x echoes arrived)---> complete
 *                       |    ^                                     ^     |
 *       (quiet period)  |    | (a late image)                      |     |
 *                       v    |                                     |     v
 *                       quiet ---(late images complete it)---------'   measured ----> stored
 *                         |                                              ^   ^
 *                         `------------(measured as it is)---------------'   |
 *   collecting | quiet | complete | measured --(a reason)--> failed --(re-analysis)--'
 *
 * Legal: collecting -> complete | quiet | failed; quiet -> collecting | complete | measured |
 * failed; complete -> measured | failed; measured -> stored | failed; failed -> measured. stored is
 * final: a re-analysis adds a run (db_run_begin) and never changes or overwrites what is stored. A
 * trigger in the database enforces the same table (series_transitions). */
typedef enum db_series_state {
    DB_SERIES_COLLECTING = 0,
    DB_SERIES_COMPLETE,
    DB_SERIES_QUIET,
    DB_SERIES_MEASURED,
    DB_SERIES_STORED,
    DB_SERIES_FAILED,
} db_series_state;
#define DB_SERIES_NSTATES 6
const char *db_series_state_name(db_series_state s); /* "collecting", ...; NULL when out of range */
int db_series_state_parse(const char *name, db_series_state *out); /* 0 or -1 */
int db_series_transition_legal(db_series_state from, db_series_state to);

typedef struct db_series_info {
    const char *series_instance_uid; /* required */
    const char *study_instance_uid;  /* required */
    int64_t scanner_id;              /* required (db_scanner_upsert) */
    int series_number;               /* 0 when absent */
    const char *series_date;         /* DICOM DA "YYYYMMDD" as received, NULL or "" when absent */
    const char *series_time;         /* DICOM TM "HHMMSS.ffffff" as received */
    const char *description;         /* SeriesDescription */
    const char *protocol;            /* ProtocolName */
    const char *series_type;         /* the daemon's classification, e.g. "t1", "t2-dual-echo" */
    int images_expected;             /* slices per echo expected, 0 when unknown */
    int echoes_expected;             /* echoes expected, 0 when unknown */
} db_series_info;

/* Finds the series by its UID or creates it in state collecting. *created (may be NULL) is 1 when
 * it was new. A known UID is returned as it is (the first file's attributes stand), except that a
 * different study UID or scanner is refused (SW_EINVAL): a UID collision or a mixed-up file. */
sw_status db_series_upsert(db *d, const db_series_info *s, int64_t *id, int *created,
                           sw_error *err);

/* Moves a series from state `from` to `to`. reason is required for DB_SERIES_FAILED and stored (or
 * cleared) otherwise. SW_EINVAL for an illegal transition or when the series is not in `from` (the
 * message says which state it is in); SW_ENOTFOUND for an unknown id. */
sw_status db_series_set_state(db *d, int64_t id, db_series_state from, db_series_state to,
                              const char *reason, sw_error *err);

typedef struct db_series_rec {
    int64_t id, scanner_id;
    db_series_info info;     /* strings never NULL ("" when absent) */
    const char *acquired_at; /* "YYYY-MM-DDTHH:MM:SS[.ffffff]" scanner-local time from the DICOM
                                date and time, "" when they were absent or malformed */
    db_series_state state;
    const char *reason;
    const char *created_at, *updated_at; /* ISO 8601 UTC */
    int n_files;                         /* files of the series not quarantined or ignored */
} db_series_rec;

/* Looks a series up by UID: SW_ENOTFOUND when unknown. cb is called once. */
typedef int (*db_series_cb)(void *ctx, const db_series_rec *r);
sw_status db_series_by_uid(db *d, const char *series_uid, db_series_cb cb, void *ctx,
                           sw_error *err);
sw_status db_series_get(db *d, int64_t id, db_series_cb cb, void *ctx, sw_error *err);
/* Series not in a final state (collecting, quiet, complete, measured), oldest first: what a restart
 * must finish. */
sw_status db_series_pending(db *d, db_series_cb cb, void *ctx, sw_error *err);
/* The series' latest run that finished successfully: *run_id > 0, or 0 when there is none (so the
 * daemon never measures a series twice after a restart; a re-analysis asks for a new run anyway).
 */
sw_status db_series_stored_run(db *d, int64_t series_id, int64_t *run_id, sw_error *err);

/* ---- files and their life cycle ----
 *
 *   db_file_add          db_file_parsed          db_file_transition        db_file_transition
 *   -----------> seen -----------------> parsed -------------------> measured ---------------->
 * stored |                       |      (or db_series_files_     |  (or db_series_files_ | |
 * transition)            |   transition)
 *                  `-----------------------+------------------------------'
 *                           db_file_transition (with a reason)
 *                                          |
 *                                          v
 *                             quarantined  |  ignored
 *   db_file_add of a duplicate SOP instance --> ignored ("duplicate of file N")
 *
 * seen: the file is known (path, content hash, size). parsed: its header was read; it has a SOP
 * instance UID and a series. measured: its series was measured. stored: the results are committed.
 * quarantined: unreadable or refused (with the reason). ignored: not for us (not MR, not a phantom
 * series, a duplicate). stored, quarantined and ignored are final. The trigger on files enforces
 * the same edges (file_transitions). */
typedef enum db_file_state {
    DB_FILE_SEEN = 0,
    DB_FILE_PARSED,
    DB_FILE_MEASURED,
    DB_FILE_STORED,
    DB_FILE_QUARANTINED,
    DB_FILE_IGNORED,
} db_file_state;
#define DB_FILE_NSTATES 6
const char *db_file_state_name(db_file_state s); /* "seen", ...; NULL when out of range */
int db_file_state_parse(const char *name, db_file_state *out);
int db_file_transition_legal(db_file_state from, db_file_state to);
int db_file_state_final(db_file_state s);

typedef struct db_file_info {
    const char *path;             /* where the file was found (required) */
    const char *content_hash;     /* e.g. "sha256:<hex>" (required, the caller's algorithm) */
    int64_t size;                 /* bytes, >= 0 */
    const char *sop_instance_uid; /* NULL or "" when not parsed yet */
} db_file_info;

typedef enum db_file_outcome {
    DB_FILE_ADDED = 0, /* a new row in state seen */
    DB_FILE_KNOWN,     /* this path with this content is already known: *id is that row, which
                          may be in a final state (the file came back); see db_file_get */
    DB_FILE_DUPLICATE, /* the SOP instance is already held by another file: *id is a new row in
                          state ignored, *original that file */
} db_file_outcome;

/* Idempotent: a file seen again after a restart (same path and content hash) returns its existing
 * row. When f->sop_instance_uid is given and a live file (not quarantined or ignored) already holds
 * it, the new file is recorded as ignored, a duplicate. original may be NULL. */
sw_status db_file_add(db *d, const db_file_info *f, int64_t *id, db_file_outcome *outcome,
                      int64_t *original, sw_error *err);

/* seen -> parsed: records the SOP instance UID and the series. When another live file already holds
 * that SOP instance, nothing changes and SW_EINVAL says which file (de-duplicate with
 * db_file_by_sop first and move the newcomer to ignored). */
sw_status db_file_parsed(db *d, int64_t id, const char *sop_instance_uid, int64_t series_id,
                         sw_error *err);
/* Moves a file from `from` to `to` (any legal edge but seen -> parsed). reason is required for
 * quarantined and ignored. SW_EINVAL for an illegal edge or a file not in `from`. */
sw_status db_file_transition(db *d, int64_t id, db_file_state from, db_file_state to,
                             const char *reason, sw_error *err);
/* Moves every file of the series that is in `from` to `to`; *n (may be NULL) is how many. */
sw_status db_series_files_transition(db *d, int64_t series_id, db_file_state from, db_file_state to,
                                     const char *reason, int *n, sw_error *err);
/* Records where the file is now (after a move to archive/, quarantine/ or ignored/). */
sw_status db_file_set_location(db *d, int64_t id, const char *location, sw_error *err);

typedef struct db_file_rec {
    int64_t id;
    int64_t series_id;                                  /* 0 before parsed */
    const char *path, *content_hash, *sop_instance_uid; /* "" when absent */
    int64_t size;
    db_file_state state;
    const char *reason;
    const char *location; /* "" until db_file_set_location */
    const char *seen_at, *updated_at;
} db_file_rec;
typedef int (*db_file_cb)(void *ctx, const db_file_rec *r);

/* The live file holding this SOP instance (de-duplication): *id > 0, or 0 when none. */
sw_status db_file_by_sop(db *d, const char *sop_instance_uid, int64_t *id, sw_error *err);
sw_status db_file_get(db *d, int64_t id, db_file_cb cb, void *ctx, sw_error *err);
/* Files not in a final state (seen, parsed, measured), in the order they were seen. */
sw_status db_files_pending(db *d, db_file_cb cb, void *ctx, sw_error *err);
/* The files of one series, in the order they were seen. */
sw_status db_series_files(db *d, int64_t series_id, db_file_cb cb, void *ctx, sw_error *err);

/* ---- analysis runs and measurement rows ---- */
typedef enum db_verdict {
    DB_PASS = 0,
    DB_WARN,
    DB_FAIL,
    DB_UNMEASURABLE, /* value absent; reason says why */
    DB_INFO,         /* a value without a tolerance (tilt angle, FWTM, SNR ...) */
} db_verdict;
#define DB_NVERDICTS 5
const char *db_verdict_name(db_verdict v); /* "pass", "warn", "fail", "unmeasurable", "info" */
int db_verdict_parse(const char *name, db_verdict *out);

typedef struct db_run_info {
    const char *program_version; /* required */
    const char *config_hash;     /* required: hash of the effective configuration */
    const char *phantom_model;   /* required: the model's name */
    const char *tolerance_set;   /* required: the tolerance set's name */
} db_run_info;

/* A new run (status running) of the series; any earlier runs stay as they are. */
sw_status db_run_begin(db *d, int64_t series_id, const db_run_info *r, int64_t *run_id,
                       sw_error *err);
/* running -> done (ok = 1) or failed (ok = 0, reason required). verdict is the run's worst. */
sw_status db_run_finish(db *d, int64_t run_id, int ok, db_verdict verdict, const char *reason,
                        sw_error *err);

/* One measured quantity. NAN numbers are stored as NULL. */
typedef struct db_measurement {
    const char *metric; /* required, e.g. "slice_thickness", "bar_length_difference" */
    int slice;          /* slice ordinal, 0 when the value is not of one slice */
    int echo;           /* echo number, 0 when not per echo */
    double value;       /* NAN only when unmeasurable */
    double uncertainty; /* standard uncertainty, same unit, or NAN */
    const char *unit;   /* "mm", "deg", "%", "" ... */
    db_verdict verdict;
    const char *reason;        /* required when unmeasurable */
    double nominal;            /* the value expected, or NAN */
    double limit_lo, limit_hi; /* the verdict's pass limits, or NAN */
    const char *details_json;  /* NULL or a JSON text (crossings, levels ...) */
} db_measurement;

/* Adds a row to a running run. SW_EINVAL for a bad row (missing metric, NAN value that is not
 * unmeasurable, infinite numbers, bad JSON) or a run that is not running; a run id that does not
 * exist fails on the foreign key. */
sw_status db_measurement_add(db *d, int64_t run_id, const db_measurement *m, sw_error *err);

/* ---- queries for exports and reports ---- */
typedef struct db_filter {
    int64_t scanner_id;       /* 0: every scanner */
    const char *station_name; /* NULL: every station */
    const char *protocol;     /* NULL: every protocol */
    const char *from, *to;    /* acquired_at in [from, to): ISO 8601 prefixes ("2024-01-01"); NULL:
                                 open. Series without an acquisition time match only open ranges. */
    const char *metric;       /* NULL: every metric */
    unsigned verdict_mask;    /* bit (1u << verdict) per verdict wanted; 0: every verdict */
    int all_runs;             /* 0: each series' latest finished run only; 1: every finished run */
} db_filter;
void db_filter_init(db_filter *f); /* everything, latest runs */

typedef struct db_row {
    int64_t measurement_id, run_id, series_id, scanner_id;
    /* scanner */
    const char *station_name, *device_serial, *manufacturer, *model, *institution, *site_alias;
    /* series */
    const char *series_instance_uid, *study_instance_uid, *acquired_at, *series_description,
        *protocol, *series_type;
    int series_number;
    /* run */
    const char *program_version, *config_hash, *phantom_model, *tolerance_set, *run_started_at,
        *run_finished_at;
    db_verdict run_verdict;
    /* measurement (NAN for NULL numbers, "" for NULL strings) */
    const char *metric, *unit, *reason, *details_json;
    int slice, echo;
    double value, uncertainty, nominal, limit_lo, limit_hi;
    db_verdict verdict;
} db_row;

/* A cursor over measurement rows joined with their run, series and scanner, ordered by acquisition
 * time, series, run and row. db_cursor_next sets *row to the next row (valid until the next call)
 * or to NULL at the end. The cursor holds a read snapshot until closed; close it before db_close.
 */
typedef struct db_cursor db_cursor;
sw_status db_cursor_open(db *d, const db_filter *f, db_cursor **out, sw_error *err);
sw_status db_cursor_next(db_cursor *c, const db_row **row, sw_error *err);
void db_cursor_close(db_cursor *c); /* accepts NULL */

/* CSV for accreditation: RFC 4180 (CRLF, quoting), a header line, then one record per row of the
 * cursor (columns in docs/schema.md); empty fields for absent values; numbers in the shortest form
 * that reads back exactly. *rows (may be NULL) counts the records. db_export_csv writes to a stream
 * the caller owns; db_export_csv_file writes beside path, syncs and renames over it (atomic). */
sw_status db_export_csv(db *d, const db_filter *f, FILE *out, long *rows, sw_error *err);
sw_status db_export_csv_file(db *d, const db_filter *f, const char *path, long *rows,
                             sw_error *err);

/* ---- alerts ----
 *   db_alert_add --> pending --db_alert_mark(ok)--> sent
 *                       |                            ^
 *          db_alert_mark(failed)                      | db_alert_mark(ok)
 *                       v                            |
 *                     failed ------------------------'  (retried while attempts < the limit)
 */
typedef enum db_alert_kind { DB_ALERT_BREACH = 0, DB_ALERT_WARN, DB_ALERT_DRIFT } db_alert_kind;
typedef enum db_alert_status {
    DB_ALERT_PENDING = 0,
    DB_ALERT_SENT,
    DB_ALERT_FAILED
} db_alert_status;
const char *db_alert_kind_name(db_alert_kind k);     /* "breach", "warn", "drift" */
const char *db_alert_status_name(db_alert_status s); /* "pending", "sent", "failed" */

typedef struct db_alert_info {
    db_alert_kind kind;
    int64_t scanner_id; /* required */
    int64_t series_id;  /* 0 when the alert is not about one series */
    int64_t run_id;     /* 0 when not about one run */
    const char *metric; /* required */
    double value;       /* or NAN */
    double limit;       /* the limit crossed, or NAN */
    db_verdict verdict;
    const char *message;  /* one line for people */
    const char *png_path; /* NULL or the chart or annotated image to attach */
} db_alert_info;
sw_status db_alert_add(db *d, const db_alert_info *a, int64_t *id, sw_error *err);

typedef struct db_alert_rec {
    int64_t id;
    db_alert_info info; /* strings never NULL */
    const char *created_at;
    db_alert_status status;
    int attempts;
    const char *last_error, *last_attempt_at;
} db_alert_rec;
typedef int (*db_alert_cb)(void *ctx, const db_alert_rec *r);
/* Alerts whose command has not run yet, or failed fewer than max_attempts times, oldest first. */
sw_status db_alerts_pending(db *d, int max_attempts, db_alert_cb cb, void *ctx, sw_error *err);
/* Records one attempt to run the alert command: sent (ok = 1) or failed with error text. An alert
 * already sent is refused (SW_EINVAL). */
sw_status db_alert_mark(db *d, int64_t id, int ok, const char *error, sw_error *err);

/* ISO 8601 UTC with milliseconds, "2024-05-01T12:34:56.789Z", into buf (at least 25 bytes). */
void db_now_iso(char *buf, size_t n);
/* DICOM DA and TM to "YYYY-MM-DDTHH:MM:SS[.ffffff]" (local time, no zone). Returns 0, or -1 when
 * either is malformed (buf is then ""). time may be NULL or "" (midnight is not assumed: -1). */
int db_dicom_datetime(const char *da, const char *tm, char *buf, size_t n);

/* ---- drift episodes and alert listings (added for trends; schema step 3) ----
 * A drift episode is one stretch during which a drift statistic of one scanner, protocol (series
 * type and echo), slice and metric is out of control. At most one is open per key (a unique index
 * refuses a second): the daemon raises one drift alert when an episode opens and closes the
 * episode when the statistic is back in control, so an alarm comes once per episode. */
typedef struct db_drift_key {
    int64_t scanner_id;      /* required */
    const char *series_type; /* NULL is taken as "" */
    int echo;                /* 0 when not per echo */
    int slice;               /* 0 when not of one slice */
    const char *metric;      /* required */
} db_drift_key;

typedef struct db_drift_episode {
    int64_t id;
    db_drift_key key;
    const char *statistic; /* what signalled, e.g. "ewma-high,cusum-high" */
    int64_t opened_series_id, alert_id, closed_series_id; /* 0 when absent */
    const char *opened_at, *closed_at;                    /* UTC; closed_at "" while open */
    const char *opened_acquired_at, *closed_acquired_at;  /* of the series; "" when absent */
} db_drift_episode;
typedef int (*db_drift_cb)(void *ctx, const db_drift_episode *e);

/* The open episode of k, if any: cb (may be NULL) is called once; *found (may be NULL) is 1 or 0. */
sw_status db_drift_open_get(db *d, const db_drift_key *k, db_drift_cb cb, void *ctx, int *found,
                            sw_error *err);
/* Opens an episode of k (series_id and alert_id 0 when none). SW_EINVAL when one is open. */
sw_status db_drift_episode_open(db *d, const db_drift_key *k, const char *statistic,
                                int64_t series_id, const char *acquired_at, int64_t alert_id,
                                int64_t *id, sw_error *err);
/* Closes an open episode; SW_EINVAL when it is closed already, SW_ENOTFOUND when unknown. */
sw_status db_drift_episode_close(db *d, int64_t id, int64_t series_id, const char *acquired_at,
                                 sw_error *err);
/* Episodes of one scanner (0: every scanner), only the open ones when open_only, oldest first. */
sw_status db_drift_episodes_each(db *d, int64_t scanner_id, int open_only, db_drift_cb cb,
                                 void *ctx, sw_error *err);
/* Alerts of one scanner (0: every scanner), oldest first, whose series was acquired in [from, to)
 * (ISO 8601 prefixes, NULL: open); an alert without a series is placed by its created_at. */
sw_status db_alerts_each(db *d, int64_t scanner_id, const char *from, const char *to,
                         db_alert_cb cb, void *ctx, sw_error *err);

/* ---- cause hints and self-test evidence (schema step 4; db/evidence.c) ---- */

/* A cause hint beside a result (run_id) or a drift alarm (alert_id too). Hints are history: never
 * changed once written. */
typedef struct db_hint_info {
    int64_t run_id;   /* required */
    int64_t alert_id; /* 0 when the hint is about the result, not an alert */
    int echo;         /* 0 when not about one echo */
    const char *code; /* e.g. "gradient-calibration" (docs/hints.md) */
    const char *brief, *text;
} db_hint_info;
typedef int (*db_hint_cb)(void *ctx, const db_hint_info *h, const char *created_at);
sw_status db_hint_add(db *d, const db_hint_info *h, sw_error *err);
/* The hints of one run (oldest first); alert_id > 0: only that alert's. */
sw_status db_hints_each(db *d, int64_t run_id, int64_t alert_id, db_hint_cb cb, void *ctx,
                        sw_error *err);

/* One self-test: the program version that ran it, when, the seed, and one row per quantity and
 * condition with the bias, SD and fraction measured against the stated limits. */
typedef struct db_selftest_row {
    const char *model, *quantity, *condition, *unit;
    int n, n_measured;
    double bias, sd, max_abs_error;           /* NAN when nothing was measured */
    double limit_bias, limit_sd, min_fraction; /* the guaranteed limits (NAN: none) */
    double goal_bias, goal_sd;                 /* the accuracy bench's goals, reported only */
    int guaranteed;                            /* 1: the row gates the self-test */
    int passed;
} db_selftest_row;
typedef struct db_selftest_info {
    const char *program_version, *started_at, *finished_at, *host, *summary;
    double seconds;
    int64_t seed;
    int n_series, passed;
} db_selftest_info;
/* Stores a self-test and its rows in one transaction; *id its id. */
sw_status db_selftest_add(db *d, const db_selftest_info *s, const db_selftest_row *rows, int n,
                          int64_t *id, sw_error *err);
typedef int (*db_selftest_cb)(void *ctx, int64_t id, const db_selftest_info *s);
typedef int (*db_selftest_row_cb)(void *ctx, const db_selftest_row *r);
/* Self-tests newest first (at most limit, 0: all); the rows of one, in the order stored. */
sw_status db_selftests_each(db *d, int limit, db_selftest_cb cb, void *ctx, sw_error *err);
sw_status db_selftest_rows_each(db *d, int64_t id, db_selftest_row_cb cb, void *ctx,
                                sw_error *err);

#endif
