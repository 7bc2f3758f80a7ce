/* export.c: CSV export of measurement rows for accreditation (RFC 4180: CRLF records, fields quoted
 * when they hold a comma, a quote or a line break, quotes doubled); columns in docs/schema.md. */
#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "dbint.h"

static const char *const COLUMNS[] = {
    "station_name",
    "device_serial",
    "manufacturer",
    "model",
    "institution",
    "site_alias",
    "series_instance_uid",
    "study_instance_uid",
    "series_number",
    "acquired_at",
    "series_description",
    "protocol",
    "series_type",
    "run_id",
    "program_version",
    "config_hash",
    "phantom_model",
    "tolerance_set",
    "run_finished_at",
    "metric",
    "slice",
    "echo",
    "value",
    "uncertainty",
    "unit",
    "nominal",
    "limit_lo",
    "limit_hi",
    "verdict",
    "reason",
    "details",
};
#define NCOLUMNS (sizeof COLUMNS / sizeof COLUMNS[0])

static void put_text(FILE *f, const char *s)
{
    if (!strpbrk(s, ",\"\r\n")) {
        fputs(s, f);
        return;
    }
    fputc('"', f);
    for (; *s; s++) {
        if (*s == '"')
            fputc('"', f);
        fputc(*s, f);
    }
    fputc('"', f);
}

/* The shortest decimal that reads back as the same double; empty for NULL. */
static void put_double(FILE *f, double v)
{
    char buf[32];
    if (isnan(v))
        return;
    for (int p = 1; p <= 17; p++) {
        snprintf(buf, sizeof buf, "%.*g", p, v);
        if (strtod(buf, NULL) == v)
            break;
    }
    fputs(buf, f);
}

static void put_int(FILE *f, long long v, int null_if_zero)
{
    if (!(null_if_zero && v == 0))
        fprintf(f, "%lld", v);
}

static void put_row(FILE *f, const db_row *r)
{
    const char *text[] = {
        r->station_name, r->device_serial, r->manufacturer,        r->model,
        r->institution,  r->site_alias,    r->series_instance_uid, r->study_instance_uid};
    for (size_t i = 0; i < sizeof text / sizeof text[0]; i++) {
        put_text(f, text[i]);
        fputc(',', f);
    }
    put_int(f, r->series_number, 1);
    fputc(',', f);
    const char *text2[] = {r->acquired_at, r->series_description, r->protocol, r->series_type};
    for (size_t i = 0; i < sizeof text2 / sizeof text2[0]; i++) {
        put_text(f, text2[i]);
        fputc(',', f);
    }
    put_int(f, r->run_id, 0);
    fputc(',', f);
    const char *text3[] = {r->program_version, r->config_hash,     r->phantom_model,
                           r->tolerance_set,   r->run_finished_at, r->metric};
    for (size_t i = 0; i < sizeof text3 / sizeof text3[0]; i++) {
        put_text(f, text3[i]);
        fputc(',', f);
    }
    put_int(f, r->slice, 1);
    fputc(',', f);
    put_int(f, r->echo, 1);
    fputc(',', f);
    put_double(f, r->value);
    fputc(',', f);
    put_double(f, r->uncertainty);
    fputc(',', f);
    put_text(f, r->unit);
    fputc(',', f);
    put_double(f, r->nominal);
    fputc(',', f);
    put_double(f, r->limit_lo);
    fputc(',', f);
    put_double(f, r->limit_hi);
    fputc(',', f);
    put_text(f, db_verdict_name(r->verdict));
    fputc(',', f);
    put_text(f, r->reason);
    fputc(',', f);
    put_text(f, r->details_json);
    fputs("\r\n", f);
}

sw_status db_export_csv(db *d, const db_filter *flt, FILE *out, long *rows, sw_error *err)
{
    sw_status rc = SW_OK;
    db_cursor *c = NULL;
    const db_row *r = NULL;
    long n = 0;
    if (rows)
        *rows = 0;
    if (!d || !out)
        return sw_error_set(err, SW_EINVAL, "db: export_csv: bad arguments");
    if ((rc = db_cursor_open(d, flt, &c, err)) != SW_OK)
        goto out;
    for (size_t i = 0; i < NCOLUMNS; i++) {
        fputs(COLUMNS[i], out);
        fputs(i + 1 < NCOLUMNS ? "," : "\r\n", out);
    }
    while ((rc = db_cursor_next(c, &r, err)) == SW_OK && r) {
        put_row(out, r);
        n++;
    }
    if (rc == SW_OK && (fflush(out) != 0 || ferror(out)))
        rc = sw_error_set(err, SW_EIO, "db: %s: CSV export: %s", d->path, strerror(errno));
out:
    db_cursor_close(c);
    if (rc == SW_OK && rows)
        *rows = n;
    return rc;
}

/* Written to a temporary file beside path, synced, then renamed over it: a reader of path sees the
 * old export or the new one, never a part. */
sw_status db_export_csv_file(db *d, const db_filter *flt, const char *path, long *rows,
                             sw_error *err)
{
    sw_status rc = SW_OK;
    char *tmp = NULL;
    FILE *f = NULL;
    int fd = -1;
    if (rows)
        *rows = 0;
    if (!d || !path || !*path)
        return sw_error_set(err, SW_EINVAL, "db: export_csv_file: bad arguments");
    size_t len = strlen(path);
    if (len > SIZE_MAX - 16 || !(tmp = malloc(len + 16))) {
        rc = sw_error_set(err, SW_ENOMEM, "db: %s: out of memory", path);
        goto out;
    }
    snprintf(tmp, len + 16, "%s.tmp-XXXXXX", path);
    if ((fd = mkstemp(tmp)) < 0) {
        rc = sw_error_set(err, SW_EIO, "db: %s: %s", path, strerror(errno));
        free(tmp);
        tmp = NULL;
        goto out;
    }
    if (!(f = fdopen(fd, "w"))) {
        rc = sw_error_set(err, SW_EIO, "db: %s: %s", path, strerror(errno));
        goto out;
    }
    fd = -1; /* f owns it now */
    if ((rc = db_export_csv(d, flt, f, rows, err)) != SW_OK)
        goto out;
    if (fsync(fileno(f)) != 0) {
        rc = sw_error_set(err, SW_EIO, "db: %s: fsync: %s", path, strerror(errno));
        goto out;
    }
    if (fclose(f) != 0) {
        f = NULL;
        rc = sw_error_set(err, SW_EIO, "db: %s: close: %s", path, strerror(errno));
        goto out;
    }
    f = NULL;
    if (rename(tmp, path) != 0) {
        rc = sw_error_set(err, SW_EIO, "db: %s: rename: %s", path, strerror(errno));
        goto out;
    }
    free(tmp);
    tmp = NULL;
out:
    if (f)
        fclose(f);
    if (fd >= 0)
        close(fd);
    if (tmp) {
        unlink(tmp);
        free(tmp);
    }
    if (rc != SW_OK && rows)
        *rows = 0;
    return rc;
}
