/* test_export.c: `slicewarden export` read back with Python's csv module and compared, field by
 * field, with the database read by Python's sqlite3 module (check_export.py), under each filter. */
#include <sys/wait.h>

#include "helpers.h"

static char dir[64], dbpath[128];

/* Two scanners, three months, text that needs quoting (comma, quote, line break, UTF-8), a series
 * analysed twice, an unmeasurable row, rows without limits. */
static void build(void)
{
    make_tmpdir(dir, sizeof dir, "export");
    snprintf(dbpath, sizeof dbpath, "%s/qa.sqlite", dir);
    db *d = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_open(dbpath, DB_OPEN_RW | DB_OPEN_CREATE, &d, &err), SW_OK, "%s", err.msg);
    int64_t a = add_scanner(d, "ALDMR1", "SWS-0001", "SW-SIM 1.5T", "MR1, \"north\" wing");
    int64_t b = add_scanner(d, "ALDMR2", "SWS-0002", "SW-SIM 3T", "");
    static const char *const desc[] = {"ACR T1", "T1, axial \"QA\"", "T2 double\necho",
                                       "Qualit\u00e4t T1 \u00ab5 mm\u00bb"};
    for (int i = 0; i < 12; i++) {
        char da[16], uid[64];
        snprintf(da, sizeof da, "2025%02d%02d", 1 + i / 4, 3 + 7 * (i % 4));
        snprintf(uid, sizeof uid, "2.25.7000%d", 10 + i);
        int64_t sc = i % 3 == 2 ? b : a;
        const char *type = i % 3 == 2 ? "t2" : "t1";
        int64_t sid = 0;
        int64_t run = add_series_run(d, sc, uid, da, "101500.25", type, desc[i % 4], 3 + i, &sid);
        for (int e = 1; e <= (strcmp(type, "t2") ? 1 : 2); e++) {
            add_row(d, run, "slice_thickness", 1, e, 5.0 + 0.1 * (i % 8) - 0.3 + 0.1 / 3.0, 0.021,
                    5.0, 4.3, 5.7, 4.5, 5.5);
            add_row(d, run, "bar_length_difference", 11, e, i == 5 ? NAN : -0.3 + 0.7 * i, 0.1, 0,
                    -5, 5, -4, 4);
            add_row(d, run, "snr", 0, e, 101.5 + i, NAN, NAN, NAN, NAN, NAN, NAN);
        }
        finish_run(d, run, sid, DB_PASS);
        if (i == 4) { /* a re-analysis: a second run; the default export gives only this one */
            db_run_info ri = {.program_version = "0.1.1",
                              .config_hash = "sha256:other",
                              .phantom_model = "large",
                              .tolerance_set = "site"};
            int64_t r2 = 0;
            cr_assert_eq(db_run_begin(d, sid, &ri, &r2, &err), SW_OK, "%s", err.msg);
            add_row(d, r2, "slice_thickness", 1, 1, 5.05, 0.02, 5.0, 4.3, 5.7, 4.5, 5.5);
            cr_assert_eq(db_run_finish(d, r2, 1, DB_PASS, NULL, &err), SW_OK);
        }
    }
    db_close(d);
}

/* Runs the export with args into a file, then the checker with the same filters; returns the
 * checker's row count. */
static long export_and_check(const char *args)
{
    char csv[192], cmd[1024], out[64] = "";
    snprintf(csv, sizeof csv, "%s/export-%08x.csv", dir, (unsigned)rand());
    snprintf(cmd, sizeof cmd, SLICEWARDEN " export --db %s %s -o %s 2>/dev/null", dbpath, args,
             csv);
    int st = system(cmd);
    cr_assert(WIFEXITED(st) && WEXITSTATUS(st) == 0, "%s: status %d", cmd, st);
    snprintf(cmd, sizeof cmd, PY " %s/tests/trends/check_export.py %s %s %s", SW_SOURCE_DIR, dbpath,
             csv, args);
    FILE *p = popen(cmd, "r");
    cr_assert(p);
    if (!fgets(out, sizeof out, p))
        out[0] = '\0';
    st = pclose(p);
    cr_assert(WIFEXITED(st) && WEXITSTATUS(st) == 0, "check_export failed for '%s'", args);
    return strtol(out, NULL, 10);
}

Test(export, every_filter_matches_sqlite)
{
    build();
    /* 12 series: 8 t1 x 3 rows + 4 t2 x 6 rows, less series 4 whose latest run has 1 row of 3. */
    cr_assert_eq(export_and_check(""), 46);
    cr_assert_eq(export_and_check("--all-runs"), 49);
    cr_assert_eq(export_and_check("--scanner ALDMR2"), 24);
    cr_assert_eq(export_and_check("--from 2025-02 --to 2025-03"), 1 + 2 * 3 + 6); /* i 4 to 7 */
    cr_assert_gt(export_and_check("--metric slice_thickness --verdict pass,warn"), 0);
    cr_assert_eq(export_and_check("--verdict unmeasurable"), 2); /* series 5, both echoes */
    cr_assert_eq(export_and_check("--verdict fail --metric bar_length_difference"), 6);
    cr_assert_eq(export_and_check("--scanner ALDMR1 --from 2025-01-10 --metric snr"), 6);
}

Test(export, reads_while_a_writer_holds_the_lock_and_refuses_bad_input)
{
    build();
    db *w = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_open(dbpath, DB_OPEN_RW, &w, &err), SW_OK, "%s", err.msg);
    cr_assert_eq(db_begin(w, &err), SW_OK, "%s", err.msg); /* the write lock, as the daemon */
    cr_assert_eq(export_and_check(""), 46);
    db_rollback(w, NULL);
    db_close(w);
    char cmd[512];
    static const char *const bad[] = {"--from 2025-13", "--from 2025-1-1", "--verdict maybe",
                                      "--from 2025-03 --to 2025-02", "stray"};
    for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++) {
        snprintf(cmd, sizeof cmd, SLICEWARDEN " export --db %s %s >/dev/null 2>&1", dbpath, bad[i]);
        int st = system(cmd);
        cr_assert(WIFEXITED(st) && WEXITSTATUS(st) == 2, "'%s' gave status %d", bad[i], st);
    }
    snprintf(cmd, sizeof cmd, SLICEWARDEN " export --db %s/missing.sqlite >/dev/null 2>&1", dir);
    int st = system(cmd);
    cr_assert(WIFEXITED(st) && WEXITSTATUS(st) == 2, "a missing database is an error");
}
