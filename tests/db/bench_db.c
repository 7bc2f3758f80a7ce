/* bench_db.c: speed of the store at archive scale: series written one transaction each (11 files,
 * one run, 30 rows), then a full cursor pass, a filtered query and a CSV export.
 * usage: bench_db DB_PATH [N_SERIES]   (DB_PATH must not exist) */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <sys/stat.h>
#include <time.h>

#include "db.h"

static double now_s(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + t.tv_nsec * 1e-9;
}

static int fail(const sw_error *e)
{
    fprintf(stderr, "bench_db: %s\n", e->msg);
    return 1;
}

int main(int argc, char **argv)
{
    sw_error e;
    db *d = NULL;
    struct stat sb;
    sw_error_clear(&e);
    if (argc < 2 || stat(argv[1], &sb) == 0) {
        fprintf(stderr, "usage: bench_db NEW_DB_PATH [N_SERIES]\n");
        return 2;
    }
    int n = argc > 2 ? atoi(argv[2]) : 2000;
    if (db_open(argv[1], DB_OPEN_RW | DB_OPEN_CREATE, &d, &e) != SW_OK)
        return fail(&e);
    const char *stations[] = {"ALDMR1", "ALDMR2", "ALDMR3"};
    db_run_info ri = {SW_VERSION, "sha256:bench", "large-ramp-wedge", "acr-default"};
    double t0 = now_s();
    for (int s = 0; s < n; s++) {
        char uid[64], sop[80], path[96], hash[32], date[24];
        int64_t sc = 0, se = 0, f = 0, run = 0;
        db_file_outcome how;
        snprintf(uid, sizeof uid, "2.25.4711.9.%d", s);
        /* one series a week per station, from 2015 */
        int day = (s / 3) * 7;
        snprintf(date, sizeof date, "%04d%02d%02d", 2015 + day / 365, 1 + (day % 365) / 31 % 12,
                 1 + day % 28);
        db_scanner_info si = {stations[s % 3],
                              "SWS-0001",
                              "Slicewarden Simulator",
                              "SW-SIM 3T",
                              "Alderbrook Regional Hospital",
                              ""};
        if (db_begin(d, &e) || db_scanner_upsert(d, &si, &sc, &e))
            return fail(&e);
        db_series_info ser = {uid, "1.2.3", sc, 1, date, "090000", "ACR T1", "ACR_T1", "t1", 11, 1};
        if (db_series_upsert(d, &ser, &se, NULL, &e))
            return fail(&e);
        for (int i = 0; i < 11; i++) {
            snprintf(path, sizeof path, "in/%d/%d.dcm", s, i);
            snprintf(hash, sizeof hash, "sha256:%x", s * 11 + i);
            snprintf(sop, sizeof sop, "%s.%d", uid, i);
            db_file_info fi = {path, hash, 133000, NULL};
            if (db_file_add(d, &fi, &f, &how, NULL, &e) || db_file_parsed(d, f, sop, se, &e))
                return fail(&e);
        }
        if (db_series_set_state(d, se, DB_SERIES_COLLECTING, DB_SERIES_COMPLETE, NULL, &e) ||
            db_run_begin(d, se, &ri, &run, &e))
            return fail(&e);
        for (int k = 0; k < 30; k++) {
            db_measurement m = {k ? "strip_fwtm" : "slice_thickness",
                                1,
                                1,
                                5.0 + 0.01 * (s % 50),
                                0.05,
                                "mm",
                                k ? DB_INFO : DB_PASS,
                                "",
                                5.0,
                                4.3,
                                5.7,
                                k ? NULL : "{\"top_mm\":50.1,\"bottom_mm\":49.8}"};
            if (db_measurement_add(d, run, &m, &e))
                return fail(&e);
        }
        if (db_run_finish(d, run, 1, DB_PASS, NULL, &e) ||
            db_series_files_transition(d, se, DB_FILE_PARSED, DB_FILE_MEASURED, NULL, NULL, &e) ||
            db_series_set_state(d, se, DB_SERIES_COMPLETE, DB_SERIES_MEASURED, NULL, &e) ||
            db_series_files_transition(d, se, DB_FILE_MEASURED, DB_FILE_STORED, NULL, NULL, &e) ||
            db_series_set_state(d, se, DB_SERIES_MEASURED, DB_SERIES_STORED, NULL, &e) ||
            db_commit(d, &e))
            return fail(&e);
    }
    double t1 = now_s();
    db_close(d);
    if (db_open(argv[1], DB_OPEN_RO, &d, &e) != SW_OK)
        return fail(&e);

    db_cursor *c = NULL;
    const db_row *r = NULL;
    long rows = 0;
    double t2 = now_s();
    if (db_cursor_open(d, NULL, &c, &e))
        return fail(&e);
    while (db_cursor_next(c, &r, &e) == SW_OK && r)
        rows++;
    db_cursor_close(c);
    double t3 = now_s();

    db_filter f;
    db_filter_init(&f);
    f.station_name = "ALDMR2";
    f.metric = "slice_thickness";
    f.from = "2016-01-01";
    f.to = "2017-01-01";
    long frows = 0;
    if (db_cursor_open(d, &f, &c, &e))
        return fail(&e);
    while (db_cursor_next(c, &r, &e) == SW_OK && r)
        frows++;
    db_cursor_close(c);
    double t4 = now_s();

    FILE *null = fopen("/dev/null", "w");
    long crows = 0;
    if (!null || db_export_csv(d, NULL, null, &crows, &e))
        return fail(&e);
    fclose(null);
    double t5 = now_s();
    db_close(d);
    stat(argv[1], &sb);
    printf("series written: %d in %.2f s (%.1f series/s, one transaction each, synchronous=FULL)\n",
           n, t1 - t0, n / (t1 - t0));
    printf("cursor, every row: %ld rows in %.3f s\n", rows, t3 - t2);
    printf("cursor, one station, metric and year: %ld rows in %.4f s\n", frows, t4 - t3);
    printf("CSV export, every row: %ld rows in %.3f s\n", crows, t5 - t4);
    printf("database: %.1f MB (%.0f bytes per series)\n", sb.st_size / 1e6, (double)sb.st_size / n);
    return 0;
}
