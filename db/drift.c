/* drift.c: the store's side of drift alarms: episodes (schema step 3), one open per scanner,
 * protocol, slice and metric, and the alert listing that reports use. */
#include <math.h>
#include <string.h>

#include "dbint.h"

static const char *nz(const char *s)
{
    return s ? s : "";
}

static sw_status check_key(db *d, const db_drift_key *k, sw_error *err)
{
    if (!k || k->scanner_id <= 0 || !k->metric || !*k->metric || k->echo < 0 || k->slice < 0)
        return sw_error_set(err, SW_EINVAL,
                            "db: %s: a drift key needs a scanner, a metric, echo and slice >= 0",
                            d ? d->path : "?");
    return SW_OK;
}

/* Ownership: *out is a statement the caller finalizes (NULL on failure). */
static sw_status prepare(db *d, const char *sql, sqlite3_stmt **out, sw_error *err)
{
    int r = sqlite3_prepare_v2(d->sql, sql, -1, out, NULL);
    if (r != SQLITE_OK) {
        sqlite3_finalize(*out);
        *out = NULL;
        return db_sqlerr(d, r, err);
    }
    return SW_OK;
}

#define EPISODE_COLUMNS                                                                            \
    "id, scanner_id, series_type, echo, slice, metric, statistic, opened_at, "                     \
    "coalesce(opened_series_id, 0), coalesce(opened_acquired_at, ''), coalesce(alert_id, 0), "     \
    "coalesce(closed_at, ''), coalesce(closed_series_id, 0), coalesce(closed_acquired_at, '')"

static void episode_row(sqlite3_stmt *st, db_drift_episode *e)
{
    memset(e, 0, sizeof *e);
    e->id = sqlite3_column_int64(st, 0);
    e->key.scanner_id = sqlite3_column_int64(st, 1);
    e->key.series_type = db_col_text(st, 2);
    e->key.echo = sqlite3_column_int(st, 3);
    e->key.slice = sqlite3_column_int(st, 4);
    e->key.metric = db_col_text(st, 5);
    e->statistic = db_col_text(st, 6);
    e->opened_at = db_col_text(st, 7);
    e->opened_series_id = sqlite3_column_int64(st, 8);
    e->opened_acquired_at = db_col_text(st, 9);
    e->alert_id = sqlite3_column_int64(st, 10);
    e->closed_at = db_col_text(st, 11);
    e->closed_series_id = sqlite3_column_int64(st, 12);
    e->closed_acquired_at = db_col_text(st, 13);
}

/* Steps st to the end, giving each row to cb (which may stop by returning non-zero). */
static sw_status each_episode(db *d, sqlite3_stmt *st, db_drift_cb cb, void *ctx, int *rows,
                              sw_error *err)
{
    int r, n = 0;
    db_drift_episode e;
    while ((r = db_step(d, st)) == SQLITE_ROW) {
        n++;
        episode_row(st, &e);
        if (cb && cb(ctx, &e))
            break;
    }
    if (rows)
        *rows = n;
    if (r != SQLITE_ROW && r != SQLITE_DONE)
        return db_sqlerr(d, r, err);
    return SW_OK;
}

sw_status db_drift_open_get(db *d, const db_drift_key *k, db_drift_cb cb, void *ctx, int *found,
                            sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    int n = 0;
    if (found)
        *found = 0;
    if (!d)
        return sw_error_set(err, SW_EINVAL, "db: drift_open_get: no handle");
    if ((rc = check_key(d, k, err)) != SW_OK)
        goto out;
    if ((rc = prepare(d,
                      "SELECT " EPISODE_COLUMNS " FROM drift_episodes WHERE scanner_id = ?1 "
                      "AND series_type = ?2 AND echo = ?3 AND slice = ?4 AND metric = ?5 "
                      "AND closed_at IS NULL",
                      &st, err)) != SW_OK)
        goto out;
    sqlite3_bind_int64(st, 1, k->scanner_id);
    db_bind_text(st, 2, nz(k->series_type));
    sqlite3_bind_int(st, 3, k->echo);
    sqlite3_bind_int(st, 4, k->slice);
    db_bind_text(st, 5, k->metric);
    if ((rc = each_episode(d, st, cb, ctx, &n, err)) != SW_OK)
        goto out;
    if (found)
        *found = n > 0;
out:
    sqlite3_finalize(st);
    return rc;
}

sw_status db_drift_episode_open(db *d, const db_drift_key *k, const char *statistic,
                                int64_t series_id, const char *acquired_at, int64_t alert_id,
                                int64_t *id, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    char now[32];
    if (id)
        *id = 0;
    if (!d || !id || !statistic || !*statistic)
        return sw_error_set(err, SW_EINVAL, "db: drift_episode_open: bad arguments");
    if ((rc = check_key(d, k, err)) != SW_OK)
        return rc;
    if ((rc = db_refuse_readonly(d, err)) != SW_OK)
        return rc;
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    int found = 0;
    if ((rc = db_drift_open_get(d, k, NULL, NULL, &found, err)) != SW_OK)
        goto out;
    if (found) {
        rc = sw_error_set(err, SW_EINVAL, "db: %s: a drift episode of %s is already open", d->path,
                          k->metric);
        goto out;
    }
    if ((rc = prepare(d,
                      "INSERT INTO drift_episodes(scanner_id, series_type, echo, slice, metric, "
                      "statistic, opened_at, opened_series_id, opened_acquired_at, alert_id) "
                      "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
                      &st, err)) != SW_OK)
        goto out;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, k->scanner_id);
    db_bind_text(st, 2, nz(k->series_type));
    sqlite3_bind_int(st, 3, k->echo);
    sqlite3_bind_int(st, 4, k->slice);
    db_bind_text(st, 5, k->metric);
    db_bind_text(st, 6, statistic);
    db_bind_text(st, 7, now);
    db_bind_id_or_null(st, 8, series_id);
    db_bind_text_or_null(st, 9, acquired_at);
    db_bind_id_or_null(st, 10, alert_id);
    if ((rc = db_exec_stmt(d, st, err)) == SW_OK)
        *id = sqlite3_last_insert_rowid(d->sql);
out:
    sqlite3_finalize(st);
    return db_atomic_end(d, rc, err);
}

sw_status db_drift_episode_close(db *d, int64_t id, int64_t series_id, const char *acquired_at,
                                 sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    char now[32];
    if (!d || id <= 0)
        return sw_error_set(err, SW_EINVAL, "db: drift_episode_close: bad arguments");
    if ((rc = db_refuse_readonly(d, err)) != SW_OK)
        return rc;
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = prepare(d, "SELECT closed_at IS NOT NULL FROM drift_episodes WHERE id = ?1", &st,
                      err)) != SW_OK)
        goto out;
    sqlite3_bind_int64(st, 1, id);
    int r = db_step(d, st);
    if (r == SQLITE_DONE) {
        rc = sw_error_set(err, SW_ENOTFOUND, "db: %s: no drift episode %lld", d->path,
                          (long long)id);
        goto out;
    }
    if (r != SQLITE_ROW) {
        rc = db_sqlerr(d, r, err);
        goto out;
    }
    if (sqlite3_column_int(st, 0)) {
        rc = sw_error_set(err, SW_EINVAL, "db: %s: drift episode %lld is closed already", d->path,
                          (long long)id);
        goto out;
    }
    sqlite3_finalize(st);
    st = NULL;
    if ((rc = prepare(d,
                      "UPDATE drift_episodes SET closed_at = ?2, closed_series_id = ?3, "
                      "closed_acquired_at = ?4 WHERE id = ?1",
                      &st, err)) != SW_OK)
        goto out;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, id);
    db_bind_text(st, 2, now);
    db_bind_id_or_null(st, 3, series_id);
    db_bind_text_or_null(st, 4, acquired_at);
    rc = db_exec_stmt(d, st, err);
out:
    sqlite3_finalize(st);
    return db_atomic_end(d, rc, err);
}

sw_status db_drift_episodes_each(db *d, int64_t scanner_id, int open_only, db_drift_cb cb,
                                 void *ctx, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    if (!d || !cb)
        return sw_error_set(err, SW_EINVAL, "db: drift_episodes_each: bad arguments");
    if ((rc = prepare(d,
                      "SELECT " EPISODE_COLUMNS " FROM drift_episodes WHERE "
                      "(?1 IS NULL OR scanner_id = ?1) AND (?2 = 0 OR closed_at IS NULL) "
                      "ORDER BY opened_at, id",
                      &st, err)) != SW_OK)
        goto out;
    db_bind_id_or_null(st, 1, scanner_id);
    sqlite3_bind_int(st, 2, open_only ? 1 : 0);
    rc = each_episode(d, st, cb, ctx, NULL, err);
out:
    sqlite3_finalize(st);
    return rc;
}

sw_status db_alerts_each(db *d, int64_t scanner_id, const char *from, const char *to,
                         db_alert_cb cb, void *ctx, sw_error *err)
{
    sqlite3_stmt *st = NULL;
    sw_status rc = SW_OK;
    int r;
    if (!d || !cb)
        return sw_error_set(err, SW_EINVAL, "db: alerts_each: bad arguments");
    if ((rc = prepare(
             d,
             "SELECT a.id, a.kind, a.scanner_id, coalesce(a.series_id, 0), coalesce(a.run_id, 0), "
             "a.metric, a.value, a.limit_value, a.verdict, a.message, a.png_path, a.created_at, "
             "a.command_status, a.attempts, a.last_error, coalesce(a.last_attempt_at, '') "
             "FROM alerts a LEFT JOIN series s ON s.id = a.series_id "
             "WHERE (?1 IS NULL OR a.scanner_id = ?1) "
             "AND (?2 IS NULL OR coalesce(s.acquired_at, a.created_at) >= ?2) "
             "AND (?3 IS NULL OR coalesce(s.acquired_at, a.created_at) < ?3) "
             "ORDER BY coalesce(s.acquired_at, a.created_at), a.id",
             &st, err)) != SW_OK)
        goto out;
    db_bind_id_or_null(st, 1, scanner_id);
    db_bind_text_or_null(st, 2, from);
    db_bind_text_or_null(st, 3, to);
    while ((r = db_step(d, st)) == SQLITE_ROW) {
        db_alert_rec a;
        memset(&a, 0, sizeof a);
        a.id = sqlite3_column_int64(st, 0);
        const char *kind = db_col_text(st, 1);
        a.info.kind = !strcmp(kind, "breach") ? DB_ALERT_BREACH
                      : !strcmp(kind, "warn") ? DB_ALERT_WARN
                                              : DB_ALERT_DRIFT;
        a.info.scanner_id = sqlite3_column_int64(st, 2);
        a.info.series_id = sqlite3_column_int64(st, 3);
        a.info.run_id = sqlite3_column_int64(st, 4);
        a.info.metric = db_col_text(st, 5);
        a.info.value = db_col_double(st, 6);
        a.info.limit = db_col_double(st, 7);
        db_verdict v = DB_INFO;
        db_verdict_parse(db_col_text(st, 8), &v);
        a.info.verdict = v;
        a.info.message = db_col_text(st, 9);
        a.info.png_path = db_col_text(st, 10);
        a.created_at = db_col_text(st, 11);
        const char *status = db_col_text(st, 12);
        a.status = !strcmp(status, "pending") ? DB_ALERT_PENDING
                   : !strcmp(status, "sent")  ? DB_ALERT_SENT
                                              : DB_ALERT_FAILED;
        a.attempts = sqlite3_column_int(st, 13);
        a.last_error = db_col_text(st, 14);
        a.last_attempt_at = db_col_text(st, 15);
        if (cb(ctx, &a))
            break;
    }
    if (r != SQLITE_ROW && r != SQLITE_DONE)
        rc = db_sqlerr(d, r, err);
out:
    sqlite3_finalize(st);
    return rc;
}
