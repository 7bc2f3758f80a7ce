/* query.c: the measurement cursor for exports and reports: rows joined with their run, series and
 * scanner, filtered by scanner, protocol, acquisition period, metric and verdict. */
#include <stdlib.h>
#include <string.h>

#include "dbint.h"

struct db_cursor {
    db *d;
    sqlite3_stmt *st;
    int owned; /* st is a private copy, finalized on close */
    int done;
    db_row row;
};

void db_filter_init(db_filter *f)
{
    if (f)
        memset(f, 0, sizeof *f);
}

/* Ownership: on success *out is a new cursor the caller closes with db_cursor_close (before
 * db_close); on failure *out is NULL. */
sw_status db_cursor_open(db *d, const db_filter *f, db_cursor **out, sw_error *err)
{
    sw_status rc = SW_OK;
    db_cursor *c = NULL;
    db_filter all;
    if (out)
        *out = NULL;
    if (!d || !out)
        return sw_error_set(err, SW_EINVAL, "db: cursor_open: bad arguments");
    if (!f) {
        db_filter_init(&all);
        f = &all;
    }
    if (f->verdict_mask >> DB_NVERDICTS)
        return sw_error_set(err, SW_EINVAL, "db: %s: verdict mask 0x%x names no verdict", d->path,
                            f->verdict_mask);
    if (!(c = calloc(1, sizeof *c)))
        return sw_error_set(err, SW_ENOMEM, "db: %s: out of memory", d->path);
    c->d = d;
    if ((rc = db_stmt_iter(d, ST_CURSOR, &c->st, &c->owned, err)) != SW_OK)
        goto out;
    if (f->scanner_id > 0)
        sqlite3_bind_int64(c->st, 1, f->scanner_id);
    db_bind_text(c->st, 2, f->station_name);
    db_bind_text(c->st, 3, f->protocol);
    db_bind_text_or_null(c->st, 4, f->from);
    db_bind_text_or_null(c->st, 5, f->to);
    db_bind_text(c->st, 6, f->metric);
    sqlite3_bind_int(c->st, 7, (int)f->verdict_mask);
    sqlite3_bind_int(c->st, 8, f->all_runs ? 1 : 0);
out:
    if (rc != SW_OK) {
        free(c);
        c = NULL;
    }
    *out = c;
    return rc;
}

static db_verdict verdict_of(const char *s)
{
    db_verdict v = DB_UNMEASURABLE;
    db_verdict_parse(s, &v); /* the schema's CHECK keeps it one of the names */
    return v;
}

sw_status db_cursor_next(db_cursor *c, const db_row **row, sw_error *err)
{
    if (!c || !row)
        return sw_error_set(err, SW_EINVAL, "db: cursor_next: bad arguments");
    *row = NULL;
    if (c->done)
        return SW_OK;
    int r = db_step(c->d, c->st);
    if (r == SQLITE_DONE) {
        c->done = 1;
        return SW_OK;
    }
    if (r != SQLITE_ROW) {
        c->done = 1;
        return db_sqlerr(c->d, r, err);
    }
    sqlite3_stmt *st = c->st;
    db_row *w = &c->row;
    int i = 0;
    w->measurement_id = sqlite3_column_int64(st, i++);
    w->run_id = sqlite3_column_int64(st, i++);
    w->series_id = sqlite3_column_int64(st, i++);
    w->scanner_id = sqlite3_column_int64(st, i++);
    w->station_name = db_col_text(st, i++);
    w->device_serial = db_col_text(st, i++);
    w->manufacturer = db_col_text(st, i++);
    w->model = db_col_text(st, i++);
    w->institution = db_col_text(st, i++);
    w->site_alias = db_col_text(st, i++);
    w->series_instance_uid = db_col_text(st, i++);
    w->study_instance_uid = db_col_text(st, i++);
    w->acquired_at = db_col_text(st, i++);
    w->series_description = db_col_text(st, i++);
    w->protocol = db_col_text(st, i++);
    w->series_type = db_col_text(st, i++);
    w->series_number = sqlite3_column_int(st, i++);
    w->program_version = db_col_text(st, i++);
    w->config_hash = db_col_text(st, i++);
    w->phantom_model = db_col_text(st, i++);
    w->tolerance_set = db_col_text(st, i++);
    w->run_started_at = db_col_text(st, i++);
    w->run_finished_at = db_col_text(st, i++);
    w->run_verdict = verdict_of(db_col_text(st, i++));
    w->metric = db_col_text(st, i++);
    w->unit = db_col_text(st, i++);
    w->reason = db_col_text(st, i++);
    w->details_json = db_col_text(st, i++);
    w->slice = sqlite3_column_int(st, i++);
    w->echo = sqlite3_column_int(st, i++);
    w->value = db_col_double(st, i++);
    w->uncertainty = db_col_double(st, i++);
    w->nominal = db_col_double(st, i++);
    w->limit_lo = db_col_double(st, i++);
    w->limit_hi = db_col_double(st, i++);
    w->verdict = verdict_of(db_col_text(st, i++));
    *row = w;
    return SW_OK;
}

void db_cursor_close(db_cursor *c)
{
    if (!c)
        return;
    db_stmt_done(c->st, c->owned);
    free(c);
}
