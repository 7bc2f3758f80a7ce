/* evidence.c: cause hints beside results and alarms, and the self-test runs that show which program
 * version was checked (schema step 4). These run a few times per series or per self-test, so their
 * statements are prepared per call rather than cached. */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "dbint.h"

static sw_status prepare(db *d, const char *sql, sqlite3_stmt **st, sw_error *err)
{
    int r = sqlite3_prepare_v2(d->sql, sql, -1, st, NULL);
    if (r != SQLITE_OK) {
        *st = NULL;
        return db_sqlerr(d, r, err);
    }
    return SW_OK;
}

/* Runs a prepared insert through the fault hook and finalizes it. */
static sw_status run_insert(db *d, sqlite3_stmt *st, int64_t *id, sw_error *err)
{
    int r = db_step(d, st);
    sw_status rc = r == SQLITE_DONE ? SW_OK : db_sqlerr(d, r, err);
    if (rc == SW_OK && id)
        *id = sqlite3_last_insert_rowid(d->sql);
    sqlite3_finalize(st);
    return rc;
}

sw_status db_hint_add(db *d, const db_hint_info *h, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    char now[32];
    if (!d || !h || h->run_id <= 0 || !h->code || !*h->code || !h->text || !*h->text)
        return sw_error_set(err, SW_EINVAL, "db: hint_add: a hint needs a run, a code and a text");
    if ((rc = db_refuse_readonly(d, err)) != SW_OK)
        return rc;
    if ((rc = prepare(d,
                      "INSERT INTO hints(run_id, alert_id, echo, code, brief, text, created_at) "
                      "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
                      &st, err)) != SW_OK)
        return rc;
    db_now_iso(now, sizeof now);
    sqlite3_bind_int64(st, 1, h->run_id);
    db_bind_id_or_null(st, 2, h->alert_id);
    if (h->echo > 0)
        sqlite3_bind_int(st, 3, h->echo);
    else
        sqlite3_bind_null(st, 3);
    db_bind_text(st, 4, h->code);
    db_bind_text(st, 5, h->brief ? h->brief : "");
    db_bind_text(st, 6, h->text);
    db_bind_text(st, 7, now);
    return run_insert(d, st, NULL, err);
}

sw_status db_hints_each(db *d, int64_t run_id, int64_t alert_id, db_hint_cb cb, void *ctx,
                        sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    if (!d || !cb)
        return sw_error_set(err, SW_EINVAL, "db: hints_each: bad arguments");
    if ((rc = prepare(d,
                      "SELECT run_id, alert_id, echo, code, brief, text, created_at FROM hints "
                      "WHERE run_id = ?1 AND (?2 = 0 OR alert_id = ?2) ORDER BY id",
                      &st, err)) != SW_OK)
        return rc;
    sqlite3_bind_int64(st, 1, run_id);
    sqlite3_bind_int64(st, 2, alert_id);
    int r;
    while ((r = db_step(d, st)) == SQLITE_ROW) {
        db_hint_info h = {.run_id = sqlite3_column_int64(st, 0),
                          .alert_id = sqlite3_column_int64(st, 1),
                          .echo = sqlite3_column_int(st, 2),
                          .code = db_col_text(st, 3),
                          .brief = db_col_text(st, 4),
                          .text = db_col_text(st, 5)};
        if (cb(ctx, &h, db_col_text(st, 6)))
            break;
    }
    rc = (r == SQLITE_ROW || r == SQLITE_DONE) ? SW_OK : db_sqlerr(d, r, err);
    sqlite3_finalize(st);
    return rc;
}

sw_status db_selftest_add(db *d, const db_selftest_info *s, const db_selftest_row *rows, int n,
                          int64_t *id, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    if (!d || !s || !id || n < 0 || (n && !rows) || !s->program_version || !*s->program_version ||
        !s->started_at || !s->finished_at)
        return sw_error_set(err, SW_EINVAL, "db: selftest_add: bad arguments");
    *id = 0;
    if ((rc = db_refuse_readonly(d, err)) != SW_OK)
        return rc;
    if ((rc = db_atomic_begin(d, err)) != SW_OK)
        return rc;
    if ((rc = prepare(d,
                      "INSERT INTO selftests(program_version, started_at, finished_at, seconds, "
                      "seed, n_series, passed, summary, host) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, "
                      "?8, ?9)",
                      &st, err)) != SW_OK)
        goto out;
    db_bind_text(st, 1, s->program_version);
    db_bind_text(st, 2, s->started_at);
    db_bind_text(st, 3, s->finished_at);
    sqlite3_bind_double(st, 4, isfinite(s->seconds) && s->seconds >= 0 ? s->seconds : 0);
    sqlite3_bind_int64(st, 5, s->seed);
    sqlite3_bind_int(st, 6, s->n_series);
    sqlite3_bind_int(st, 7, s->passed ? 1 : 0);
    db_bind_text(st, 8, s->summary ? s->summary : "");
    db_bind_text(st, 9, s->host ? s->host : "");
    if ((rc = run_insert(d, st, id, err)) != SW_OK)
        goto out;
    for (int i = 0; i < n; i++) {
        const db_selftest_row *r = &rows[i];
        if (!r->quantity || !*r->quantity || r->n < 0 || r->n_measured < 0 ||
            r->n_measured > r->n) {
            rc = sw_error_set(err, SW_EINVAL, "db: %s: self-test row %d is malformed", d->path,
                              i + 1);
            goto out;
        }
        if ((rc = prepare(d,
                          "INSERT INTO selftest_rows(selftest_id, model, quantity, condition, "
                          "unit, n, n_measured, bias, sd, max_abs_error, limit_bias, limit_sd, "
                          "limit_fraction, goal_bias, goal_sd, guaranteed, passed) VALUES (?1, "
                          "?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, "
                          "?17)",
                          &st, err)) != SW_OK)
            goto out;
        sqlite3_bind_int64(st, 1, *id);
        db_bind_text(st, 2, r->model ? r->model : "");
        db_bind_text(st, 3, r->quantity);
        db_bind_text(st, 4, r->condition ? r->condition : "");
        db_bind_text(st, 5, r->unit ? r->unit : "");
        sqlite3_bind_int(st, 6, r->n);
        sqlite3_bind_int(st, 7, r->n_measured);
        db_bind_double_or_null(st, 8, r->bias);
        db_bind_double_or_null(st, 9, r->sd);
        db_bind_double_or_null(st, 10, r->max_abs_error);
        db_bind_double_or_null(st, 11, r->limit_bias);
        db_bind_double_or_null(st, 12, r->limit_sd);
        db_bind_double_or_null(st, 13, r->min_fraction);
        db_bind_double_or_null(st, 14, r->goal_bias);
        db_bind_double_or_null(st, 15, r->goal_sd);
        sqlite3_bind_int(st, 16, r->guaranteed ? 1 : 0);
        sqlite3_bind_int(st, 17, r->passed ? 1 : 0);
        if ((rc = run_insert(d, st, NULL, err)) != SW_OK)
            goto out;
    }
out:
    rc = db_atomic_end(d, rc, err);
    if (rc != SW_OK)
        *id = 0;
    return rc;
}

sw_status db_selftests_each(db *d, int limit, db_selftest_cb cb, void *ctx, sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    if (!d || !cb || limit < 0)
        return sw_error_set(err, SW_EINVAL, "db: selftests_each: bad arguments");
    if ((rc = prepare(d,
                      "SELECT id, program_version, started_at, finished_at, seconds, seed, "
                      "n_series, passed, summary, host FROM selftests ORDER BY id DESC LIMIT ?1",
                      &st, err)) != SW_OK)
        return rc;
    sqlite3_bind_int(st, 1, limit ? limit : -1);
    int r;
    while ((r = db_step(d, st)) == SQLITE_ROW) {
        db_selftest_info s = {.program_version = db_col_text(st, 1),
                              .started_at = db_col_text(st, 2),
                              .finished_at = db_col_text(st, 3),
                              .seconds = sqlite3_column_double(st, 4),
                              .seed = sqlite3_column_int64(st, 5),
                              .n_series = sqlite3_column_int(st, 6),
                              .passed = sqlite3_column_int(st, 7),
                              .summary = db_col_text(st, 8),
                              .host = db_col_text(st, 9)};
        if (cb(ctx, sqlite3_column_int64(st, 0), &s))
            break;
    }
    rc = (r == SQLITE_ROW || r == SQLITE_DONE) ? SW_OK : db_sqlerr(d, r, err);
    sqlite3_finalize(st);
    return rc;
}

sw_status db_selftest_rows_each(db *d, int64_t id, db_selftest_row_cb cb, void *ctx,
                                sw_error *err)
{
    sw_status rc;
    sqlite3_stmt *st = NULL;
    if (!d || !cb)
        return sw_error_set(err, SW_EINVAL, "db: selftest_rows_each: bad arguments");
    if ((rc = prepare(d,
                      "SELECT model, quantity, condition, unit, n, n_measured, bias, sd, "
                      "max_abs_error, limit_bias, limit_sd, limit_fraction, goal_bias, goal_sd, "
                      "guaranteed, passed FROM selftest_rows WHERE selftest_id = ?1 ORDER BY id",
                      &st, err)) != SW_OK)
        return rc;
    sqlite3_bind_int64(st, 1, id);
    int r;
    while ((r = db_step(d, st)) == SQLITE_ROW) {
        db_selftest_row row = {.model = db_col_text(st, 0),
                               .quantity = db_col_text(st, 1),
                               .condition = db_col_text(st, 2),
                               .unit = db_col_text(st, 3),
                               .n = sqlite3_column_int(st, 4),
                               .n_measured = sqlite3_column_int(st, 5),
                               .bias = db_col_double(st, 6),
                               .sd = db_col_double(st, 7),
                               .max_abs_error = db_col_double(st, 8),
                               .limit_bias = db_col_double(st, 9),
                               .limit_sd = db_col_double(st, 10),
                               .min_fraction = db_col_double(st, 11),
                               .goal_bias = db_col_double(st, 12),
                               .goal_sd = db_col_double(st, 13),
                               .guaranteed = sqlite3_column_int(st, 14),
                               .passed = sqlite3_column_int(st, 15)};
        if (cb(ctx, &row))
            break;
    }
    rc = (r == SQLITE_ROW || r == SQLITE_DONE) ? SW_OK : db_sqlerr(d, r, err);
    sqlite3_finalize(st);
    return rc;
}
