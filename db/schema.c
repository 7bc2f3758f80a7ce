/* schema.c: the schema as forward migration steps, and the code that applies them. Never edit a
 * step that has shipped: add a new one. docs/schema.md documents the result. */
#include <stdio.h>
#include <string.h>

#include "dbint.h"

/* Step 1: the tables and the state machines (edges as rows, enforced by triggers, so that no other
 * writer, the sqlite3 shell included, can make an illegal move). Step 2: the indexes the queries of
 * the daemon (resume), the exports and the reports use. */
static const char STEP1[] =
    "PRAGMA application_id = 1398228034;\n" /* DB_APPLICATION_ID, 'SWDB' */
    "CREATE TABLE meta (\n"
    "  key TEXT PRIMARY KEY NOT NULL,\n"
    "  value TEXT NOT NULL,\n"
    "  updated_at TEXT NOT NULL\n"
    ") STRICT;\n"
    "CREATE TABLE migrations (\n"
    "  version INTEGER PRIMARY KEY,\n"
    "  description TEXT NOT NULL,\n"
    "  program_version TEXT NOT NULL,\n"
    "  applied_at TEXT NOT NULL\n"
    ") STRICT;\n"
    "CREATE TABLE scanners (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  station_name TEXT NOT NULL,\n"
    "  device_serial TEXT NOT NULL,\n"
    "  manufacturer TEXT NOT NULL DEFAULT '',\n"
    "  model TEXT NOT NULL DEFAULT '',\n"
    "  institution TEXT NOT NULL DEFAULT '',\n"
    "  site_alias TEXT NOT NULL DEFAULT '',\n"
    "  first_seen TEXT NOT NULL,\n"
    "  last_seen TEXT NOT NULL,\n"
    "  UNIQUE (station_name, device_serial)\n"
    ") STRICT;\n"
    "CREATE TABLE series_states (name TEXT PRIMARY KEY NOT NULL, final INTEGER NOT NULL) STRICT;\n"
    "INSERT INTO series_states VALUES ('collecting',0),('complete',0),('quiet',0),\n"
    "  ('measured',0),('stored',1),('failed',0);\n"
    "CREATE TABLE series_transitions (\n"
    "  from_state TEXT NOT NULL REFERENCES series_states(name),\n"
    "  to_state TEXT NOT NULL REFERENCES series_states(name),\n"
    "  PRIMARY KEY (from_state, to_state)\n"
    ") STRICT, WITHOUT ROWID;\n"
    "INSERT INTO series_transitions VALUES\n"
    "  ('collecting','complete'),('collecting','quiet'),('collecting','failed'),\n"
    "  ('quiet','collecting'),('quiet','complete'),('quiet','measured'),('quiet','failed'),\n"
    "  ('complete','measured'),('complete','failed'),\n"
    "  ('measured','stored'),('measured','failed'),\n"
    "  ('failed','measured');\n"
    "CREATE TABLE series (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  series_instance_uid TEXT NOT NULL UNIQUE CHECK (length(series_instance_uid) BETWEEN 1 AND "
    "64),\n"
    "  study_instance_uid TEXT NOT NULL CHECK (length(study_instance_uid) BETWEEN 1 AND 64),\n"
    "  scanner_id INTEGER NOT NULL REFERENCES scanners(id),\n"
    "  series_number INTEGER,\n"
    "  series_date TEXT NOT NULL DEFAULT '',\n"
    "  series_time TEXT NOT NULL DEFAULT '',\n"
    "  acquired_at TEXT,\n"
    "  description TEXT NOT NULL DEFAULT '',\n"
    "  protocol TEXT NOT NULL DEFAULT '',\n"
    "  series_type TEXT NOT NULL DEFAULT '',\n"
    "  images_expected INTEGER NOT NULL DEFAULT 0 CHECK (images_expected >= 0),\n"
    "  echoes_expected INTEGER NOT NULL DEFAULT 0 CHECK (echoes_expected >= 0),\n"
    "  state TEXT NOT NULL DEFAULT 'collecting' REFERENCES series_states(name),\n"
    "  reason TEXT NOT NULL DEFAULT '',\n"
    "  created_at TEXT NOT NULL,\n"
    "  updated_at TEXT NOT NULL\n"
    ") STRICT;\n"
    "CREATE TRIGGER series_state_guard BEFORE UPDATE OF state ON series\n"
    "  WHEN NEW.state IS NOT OLD.state AND NOT EXISTS (SELECT 1 FROM series_transitions\n"
    "    WHERE from_state = OLD.state AND to_state = NEW.state)\n"
    "BEGIN SELECT RAISE(ABORT, 'illegal series state transition'); END;\n"
    "CREATE TRIGGER series_insert_guard BEFORE INSERT ON series WHEN NEW.state <> 'collecting'\n"
    "BEGIN SELECT RAISE(ABORT, 'a new series starts collecting'); END;\n"
    "CREATE TABLE file_states (name TEXT PRIMARY KEY NOT NULL, final INTEGER NOT NULL) STRICT;\n"
    "INSERT INTO file_states VALUES ('seen',0),('parsed',0),('measured',0),('stored',1),\n"
    "  ('quarantined',1),('ignored',1);\n"
    "CREATE TABLE file_transitions (\n"
    "  from_state TEXT NOT NULL REFERENCES file_states(name),\n"
    "  to_state TEXT NOT NULL REFERENCES file_states(name),\n"
    "  PRIMARY KEY (from_state, to_state)\n"
    ") STRICT, WITHOUT ROWID;\n"
    "INSERT INTO file_transitions VALUES\n"
    "  ('seen','parsed'),('seen','quarantined'),('seen','ignored'),\n"
    "  ('parsed','measured'),('parsed','quarantined'),('parsed','ignored'),\n"
    "  ('measured','stored'),('measured','quarantined'),('measured','ignored');\n"
    "CREATE TABLE files (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  path TEXT NOT NULL CHECK (length(path) > 0),\n"
    "  content_hash TEXT NOT NULL CHECK (length(content_hash) > 0),\n"
    "  size INTEGER NOT NULL CHECK (size >= 0),\n"
    "  sop_instance_uid TEXT CHECK (sop_instance_uid IS NULL OR\n"
    "    length(sop_instance_uid) BETWEEN 1 AND 64),\n"
    "  series_id INTEGER REFERENCES series(id),\n"
    "  state TEXT NOT NULL DEFAULT 'seen' REFERENCES file_states(name),\n"
    "  reason TEXT NOT NULL DEFAULT '',\n"
    "  location TEXT NOT NULL DEFAULT '',\n"
    "  seen_at TEXT NOT NULL,\n"
    "  updated_at TEXT NOT NULL,\n"
    "  CHECK (state IN ('seen','quarantined','ignored') OR\n"
    "    (sop_instance_uid IS NOT NULL AND series_id IS NOT NULL)),\n"
    "  CHECK (state NOT IN ('quarantined','ignored') OR length(reason) > 0)\n"
    ") STRICT;\n"
    /* Two live files never hold one SOP instance (de-duplication); dropped copies keep theirs. */
    "CREATE UNIQUE INDEX files_live_sop ON files(sop_instance_uid)\n"
    "  WHERE sop_instance_uid IS NOT NULL AND state NOT IN ('quarantined','ignored');\n"
    "CREATE UNIQUE INDEX files_path_hash ON files(path, content_hash);\n"
    "CREATE TRIGGER file_state_guard BEFORE UPDATE OF state ON files\n"
    "  WHEN NEW.state IS NOT OLD.state AND NOT EXISTS (SELECT 1 FROM file_transitions\n"
    "    WHERE from_state = OLD.state AND to_state = NEW.state)\n"
    "BEGIN SELECT RAISE(ABORT, 'illegal file state transition'); END;\n"
    "CREATE TRIGGER file_insert_guard BEFORE INSERT ON files\n"
    "  WHEN NEW.state NOT IN ('seen','ignored')\n"
    "BEGIN SELECT RAISE(ABORT, 'a new file starts seen (or ignored)'); END;\n"
    "CREATE TABLE runs (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  series_id INTEGER NOT NULL REFERENCES series(id),\n"
    "  program_version TEXT NOT NULL CHECK (length(program_version) > 0),\n"
    "  config_hash TEXT NOT NULL CHECK (length(config_hash) > 0),\n"
    "  phantom_model TEXT NOT NULL CHECK (length(phantom_model) > 0),\n"
    "  tolerance_set TEXT NOT NULL CHECK (length(tolerance_set) > 0),\n"
    "  status TEXT NOT NULL DEFAULT 'running' CHECK (status IN ('running','done','failed')),\n"
    "  verdict TEXT CHECK (verdict IS NULL OR\n"
    "    verdict IN ('pass','warn','fail','unmeasurable','info')),\n"
    "  reason TEXT NOT NULL DEFAULT '',\n"
    "  started_at TEXT NOT NULL,\n"
    "  finished_at TEXT,\n"
    "  CHECK ((status = 'running') = (finished_at IS NULL)),\n"
    "  CHECK (status <> 'failed' OR length(reason) > 0)\n"
    ") STRICT;\n"
    /* A run that has finished is history: it never changes again. */
    "CREATE TRIGGER run_finished_guard BEFORE UPDATE ON runs WHEN OLD.status <> 'running'\n"
    "BEGIN SELECT RAISE(ABORT, 'a finished run is never changed'); END;\n"
    "CREATE TABLE measurements (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  run_id INTEGER NOT NULL REFERENCES runs(id),\n"
    "  metric TEXT NOT NULL CHECK (length(metric) > 0),\n"
    "  slice INTEGER CHECK (slice IS NULL OR slice > 0),\n"
    "  echo INTEGER CHECK (echo IS NULL OR echo > 0),\n"
    "  value REAL,\n"
    "  uncertainty REAL CHECK (uncertainty IS NULL OR uncertainty >= 0),\n"
    "  unit TEXT NOT NULL DEFAULT '',\n"
    "  verdict TEXT NOT NULL CHECK (verdict IN ('pass','warn','fail','unmeasurable','info')),\n"
    "  reason TEXT NOT NULL DEFAULT '',\n"
    "  nominal REAL,\n"
    "  limit_lo REAL,\n"
    "  limit_hi REAL,\n"
    /* JSON checked by the store (jansson): SQLite 3.40 deems json_valid() unsafe in a schema
     * read with trusted_schema off. */
    "  details TEXT,\n"
    "  CHECK (verdict = 'unmeasurable' OR value IS NOT NULL),\n"
    "  CHECK (verdict <> 'unmeasurable' OR (value IS NULL AND length(reason) > 0))\n"
    ") STRICT;\n"
    "CREATE TRIGGER measurement_run_guard BEFORE INSERT ON measurements\n"
    "  WHEN (SELECT status FROM runs WHERE id = NEW.run_id) IS NOT 'running'\n"
    "    AND EXISTS (SELECT 1 FROM runs WHERE id = NEW.run_id)\n"
    "BEGIN SELECT RAISE(ABORT, 'measurements are added to a running run only'); END;\n"
    "CREATE TRIGGER measurement_immutable BEFORE UPDATE ON measurements\n"
    "BEGIN SELECT RAISE(ABORT, 'measurements are never changed'); END;\n"
    "CREATE TABLE alerts (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  kind TEXT NOT NULL CHECK (kind IN ('breach','warn','drift')),\n"
    "  scanner_id INTEGER NOT NULL REFERENCES scanners(id),\n"
    "  series_id INTEGER REFERENCES series(id),\n"
    "  run_id INTEGER REFERENCES runs(id),\n"
    "  metric TEXT NOT NULL CHECK (length(metric) > 0),\n"
    "  value REAL,\n"
    "  limit_value REAL,\n"
    "  verdict TEXT NOT NULL CHECK (verdict IN ('pass','warn','fail','unmeasurable','info')),\n"
    "  message TEXT NOT NULL DEFAULT '',\n"
    "  png_path TEXT NOT NULL DEFAULT '',\n"
    "  created_at TEXT NOT NULL,\n"
    "  command_status TEXT NOT NULL DEFAULT 'pending'\n"
    "    CHECK (command_status IN ('pending','sent','failed')),\n"
    "  attempts INTEGER NOT NULL DEFAULT 0 CHECK (attempts >= 0),\n"
    "  last_error TEXT NOT NULL DEFAULT '',\n"
    "  last_attempt_at TEXT\n"
    ") STRICT;\n"
    "CREATE TRIGGER alert_sent_guard BEFORE UPDATE ON alerts WHEN OLD.command_status = 'sent'\n"
    "BEGIN SELECT RAISE(ABORT, 'an alert that was sent is never changed'); END;\n";

static const char STEP2[] =
    "CREATE INDEX series_scanner_time ON series(scanner_id, acquired_at);\n"
    "CREATE INDEX series_time ON series(acquired_at);\n"
    "CREATE INDEX series_open ON series(state) WHERE state NOT IN ('stored','failed');\n"
    "CREATE INDEX files_series ON files(series_id);\n"
    "CREATE INDEX files_open ON files(state) WHERE state IN ('seen','parsed','measured');\n"
    "CREATE INDEX runs_series ON runs(series_id, status);\n"
    "CREATE INDEX measurements_run ON measurements(run_id);\n"
    "CREATE INDEX measurements_metric ON measurements(metric);\n"
    "CREATE INDEX alerts_open ON alerts(command_status) WHERE command_status <> 'sent';\n"
    "CREATE INDEX alerts_scanner ON alerts(scanner_id, created_at);\n";

/* Step 3 (added for trends): drift episodes. One row per stretch during which a drift statistic of
 * one scanner, protocol (series type, echo), slice and metric is out of control; at most one open
 * per key (partial unique index), so a drift alarm is raised once per episode. A closed episode is
 * history and never changes. db/drift.c holds the queries. */
static const char STEP3[] =
    "CREATE TABLE drift_episodes (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  scanner_id INTEGER NOT NULL REFERENCES scanners(id),\n"
    "  series_type TEXT NOT NULL,\n"
    "  echo INTEGER NOT NULL CHECK (echo >= 0),\n"
    "  slice INTEGER NOT NULL CHECK (slice >= 0),\n"
    "  metric TEXT NOT NULL CHECK (length(metric) > 0),\n"
    "  statistic TEXT NOT NULL CHECK (length(statistic) > 0),\n"
    "  opened_at TEXT NOT NULL,\n"
    "  opened_series_id INTEGER REFERENCES series(id),\n"
    "  opened_acquired_at TEXT,\n"
    "  alert_id INTEGER REFERENCES alerts(id),\n"
    "  closed_at TEXT,\n"
    "  closed_series_id INTEGER REFERENCES series(id),\n"
    "  closed_acquired_at TEXT\n"
    ") STRICT;\n"
    "CREATE UNIQUE INDEX drift_episodes_open ON drift_episodes(scanner_id, series_type, echo, "
    "slice, metric) WHERE closed_at IS NULL;\n"
    "CREATE INDEX drift_episodes_scanner ON drift_episodes(scanner_id, opened_at);\n"
    "CREATE TRIGGER drift_episode_closed_guard BEFORE UPDATE ON drift_episodes\n"
    "  WHEN OLD.closed_at IS NOT NULL\n"
    "BEGIN SELECT RAISE(ABORT, 'a closed drift episode is never changed'); END;\n";

/* Step 4 (added for cause hints and self-validation): the hints beside results and drift alarms,
 * and the self-test runs with their rows, all history that never changes. db/evidence.c holds the
 * queries. */
static const char STEP4[] =
    "CREATE TABLE hints (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  run_id INTEGER NOT NULL REFERENCES runs(id),\n"
    "  alert_id INTEGER REFERENCES alerts(id),\n"
    "  echo INTEGER CHECK (echo IS NULL OR echo > 0),\n"
    "  code TEXT NOT NULL CHECK (length(code) > 0),\n"
    "  brief TEXT NOT NULL DEFAULT '',\n"
    "  text TEXT NOT NULL CHECK (length(text) > 0),\n"
    "  created_at TEXT NOT NULL\n"
    ") STRICT;\n"
    "CREATE INDEX hints_run ON hints(run_id);\n"
    "CREATE TRIGGER hint_immutable BEFORE UPDATE ON hints\n"
    "BEGIN SELECT RAISE(ABORT, 'hints are never changed'); END;\n"
    "CREATE TABLE selftests (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  program_version TEXT NOT NULL CHECK (length(program_version) > 0),\n"
    "  started_at TEXT NOT NULL,\n"
    "  finished_at TEXT NOT NULL,\n"
    "  seconds REAL NOT NULL CHECK (seconds >= 0),\n"
    "  seed INTEGER NOT NULL,\n"
    "  n_series INTEGER NOT NULL CHECK (n_series >= 0),\n"
    "  passed INTEGER NOT NULL CHECK (passed IN (0, 1)),\n"
    "  summary TEXT NOT NULL DEFAULT '',\n"
    "  host TEXT NOT NULL DEFAULT ''\n"
    ") STRICT;\n"
    "CREATE TABLE selftest_rows (\n"
    "  id INTEGER PRIMARY KEY,\n"
    "  selftest_id INTEGER NOT NULL REFERENCES selftests(id),\n"
    "  model TEXT NOT NULL,\n"
    "  quantity TEXT NOT NULL CHECK (length(quantity) > 0),\n"
    "  condition TEXT NOT NULL DEFAULT '',\n"
    "  unit TEXT NOT NULL DEFAULT '',\n"
    "  n INTEGER NOT NULL CHECK (n >= 0),\n"
    "  n_measured INTEGER NOT NULL CHECK (n_measured BETWEEN 0 AND n),\n"
    "  bias REAL,\n"
    "  sd REAL CHECK (sd IS NULL OR sd >= 0),\n"
    "  max_abs_error REAL CHECK (max_abs_error IS NULL OR max_abs_error >= 0),\n"
    "  limit_bias REAL,\n"
    "  limit_sd REAL,\n"
    "  limit_fraction REAL CHECK (limit_fraction IS NULL OR limit_fraction BETWEEN 0 AND 1),\n"
    "  goal_bias REAL,\n"
    "  goal_sd REAL,\n"
    "  guaranteed INTEGER NOT NULL CHECK (guaranteed IN (0, 1)),\n"
    "  passed INTEGER NOT NULL CHECK (passed IN (0, 1))\n"
    ") STRICT;\n"
    "CREATE INDEX selftest_rows_test ON selftest_rows(selftest_id);\n"
    "CREATE TRIGGER selftest_immutable BEFORE UPDATE ON selftests\n"
    "BEGIN SELECT RAISE(ABORT, 'a self-test is never changed'); END;\n"
    "CREATE TRIGGER selftest_row_immutable BEFORE UPDATE ON selftest_rows\n"
    "BEGIN SELECT RAISE(ABORT, 'a self-test row is never changed'); END;\n";

const db_migration DB_MIGRATIONS[] = {
    {1, "tables, state machines and their guards", STEP1},
    {2, "indexes for resume, exports and reports", STEP2},
    {3, "drift episodes", STEP3},
    {4, "cause hints and self-test evidence", STEP4},
};
const int DB_NMIGRATIONS = (int)(sizeof DB_MIGRATIONS / sizeof DB_MIGRATIONS[0]);

_Static_assert(sizeof DB_MIGRATIONS / sizeof DB_MIGRATIONS[0] == DB_SCHEMA_VERSION,
               "DB_SCHEMA_VERSION is the last migration step");
_Static_assert(DB_APPLICATION_ID == 1398228034, "application_id in STEP1 matches");

static sw_status read_int_pragma(db *d, const char *sql, int *out, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    int r = sqlite3_prepare_v2(d->sql, sql, -1, &st, NULL);
    if (r != SQLITE_OK) {
        rc = db_sqlerr(d, r, err);
        goto out;
    }
    r = db_step(d, st);
    if (r != SQLITE_ROW) {
        rc = db_sqlerr(d, r, err);
        goto out;
    }
    *out = sqlite3_column_int(st, 0);
out:
    sqlite3_finalize(st);
    return rc;
}

static sw_status record_step(db *d, const db_migration *m, const char *now, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    int r = sqlite3_prepare_v2(d->sql,
                               "INSERT INTO migrations(version, description, program_version, "
                               "applied_at) VALUES (?1, ?2, ?3, ?4)",
                               -1, &st, NULL);
    if (r != SQLITE_OK) {
        rc = db_sqlerr(d, r, err);
        goto out;
    }
    sqlite3_bind_int(st, 1, m->version);
    sqlite3_bind_text(st, 2, m->description, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 3, SW_VERSION, -1, SQLITE_STATIC);
    db_bind_text(st, 4, now);
    rc = db_exec_stmt(d, st, err);
out:
    sqlite3_finalize(st);
    return rc;
}

static sw_status set_meta(db *d, const char *key, const char *value, int keep, const char *now,
                          sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    const char *sql = keep ? "INSERT OR IGNORE INTO meta(key, value, updated_at) VALUES (?1,?2,?3)"
                           : "INSERT INTO meta(key, value, updated_at) VALUES (?1,?2,?3) "
                             "ON CONFLICT(key) DO UPDATE SET value = ?2, updated_at = ?3";
    int r = sqlite3_prepare_v2(d->sql, sql, -1, &st, NULL);
    if (r != SQLITE_OK) {
        rc = db_sqlerr(d, r, err);
        goto out;
    }
    sqlite3_bind_text(st, 1, key, -1, SQLITE_STATIC);
    db_bind_text(st, 2, value);
    db_bind_text(st, 3, now);
    rc = db_exec_stmt(d, st, err);
out:
    sqlite3_finalize(st);
    return rc;
}

sw_status db_migrate(db *d, int target, sw_error *err)
{
    sw_status rc = SW_OK;
    int have = 0, began = 0;
    char now[32], pragma[48];
    if (target <= 0 || target > DB_SCHEMA_VERSION)
        target = DB_SCHEMA_VERSION;
    /* A current schema needs no lock: opening must not wait for the daemon's transaction. */
    if ((rc = read_int_pragma(d, "PRAGMA user_version", &have, err)) != SW_OK || have >= target)
        goto out;
    /* Then the write lock, and look again: two processes opening an old file at once must not
     * both migrate it. */
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        goto out;
    began = 1;
    if ((rc = read_int_pragma(d, "PRAGMA user_version", &have, err)) != SW_OK)
        goto out;
    if (have >= target)
        goto out;
    db_now_iso(now, sizeof now);
    for (int i = 0; i < DB_NMIGRATIONS; i++) {
        const db_migration *m = &DB_MIGRATIONS[i];
        if (m->version <= have || m->version > target)
            continue;
        if ((rc = db_exec_script(d, m->sql, err)) != SW_OK)
            goto out;
        if ((rc = record_step(d, m, now, err)) != SW_OK)
            goto out;
    }
    /* PRAGMA takes no parameters; target is our own integer. */
    snprintf(pragma, sizeof pragma, "PRAGMA user_version = %d", target);
    if ((rc = db_exec_script(d, pragma, err)) != SW_OK)
        goto out;
    if ((rc = set_meta(d, "application", "slicewarden", 1, now, err)) != SW_OK ||
        (rc = set_meta(d, "created_by_version", SW_VERSION, 1, now, err)) != SW_OK ||
        (rc = set_meta(d, "created_at", now, 1, now, err)) != SW_OK ||
        (rc = set_meta(d, "last_migrated_by_version", SW_VERSION, 0, now, err)) != SW_OK ||
        (rc = set_meta(d, "last_migrated_at", now, 0, now, err)) != SW_OK)
        goto out;
out:
    if (began)
        rc = db_atomic_end(d, rc, err);
    return rc;
}
