/* test_report.c: `slicewarden report` on a store that the real watch service filled from simulated
 * series (with annotated PNGs and a failing series), plus a drifting history added through the
 * daemon's own drift check; the page is loaded in headless chromium (--dump-dom) and its DOM is
 * compared with the database (check_report.py); a screenshot is left in the build folder for a
 * person to look at. */
#include <sys/wait.h>
#include <time.h>

#include "helpers.h"
#include "trends.h"

static int run(const char *cmd)
{
    int st = system(cmd);
    return WIFEXITED(st) ? WEXITSTATUS(st) : 128;
}

static const char *chromium(void)
{
    static const char *const paths[] = {"/usr/bin/chromium", "/usr/bin/chromium-browser"};
    for (size_t i = 0; i < sizeof paths / sizeof paths[0]; i++)
        if (access(paths[i], X_OK) == 0)
            return paths[i];
    return NULL;
}

/* ALDMR3: 30 weekly t1 results from 2024-09-02, in control for 12 weeks, then rising 0.03 mm a
 * week; each stored run followed by the daemon's drift check, as the watch service does. */
static int add_drifting_scanner(db *d)
{
    int64_t sc = add_scanner(d, "ALDMR3", "SWS-0003", "SW-SIM 3T", "MR3 Alderbrook");
    rng r = {31};
    wd_drift_opts o;
    wd_drift_opts_default(&o);
    int started = 0;
    for (int i = 0; i < 30; i++) {
        struct tm tm;
        memset(&tm, 0, sizeof tm);
        tm.tm_year = 2024 - 1900;
        tm.tm_mon = 8;
        tm.tm_mday = 2 + 7 * i;
        time_t t = timegm(&tm);
        gmtime_r(&t, &tm);
        char da[16], uid[64];
        strftime(da, sizeof da, "%Y%m%d", &tm);
        snprintf(uid, sizeof uid, "2.25.93%d", 100 + i);
        int64_t sid = 0;
        int64_t run = add_series_run(d, sc, uid, da, "071000", "t1", "ACR T1", 2, &sid);
        double th = 5.0 + 0.04 * rng_normal(&r) + (i >= 12 ? 0.03 * (i - 12) : 0);
        db_verdict v = add_row(d, run, "slice_thickness", 1, 1, th, 0.03, 5.0, 4.3, 5.7, 4.5, 5.5);
        add_row(d, run, "bar_length_difference", 1, 1, 0.3 * rng_normal(&r), 0.2, 0, -5, 5, -4, 4);
        add_row(d, run, "bar_length_difference", 11, 1, i == 20 ? NAN : 0.3 * rng_normal(&r), 0.2,
                0, -5, 5, -4, 4);
        finish_run(d, run, sid, v);
        int s = 0;
        sw_error err;
        sw_error_clear(&err);
        cr_assert_eq(wd_drift_check_run(d, sc, run, &o, NULL, &s, NULL, &err), SW_OK, "%s",
                     err.msg);
        started += s;
    }
    return started;
}

Test(report, chromium_sees_every_point_of_the_store, .timeout = 240)
{
    const char *browser = chromium();
    cr_assert(browser, "chromium is not installed (apt-get install chromium; quickstart does)");
    char dir[64], cmd[4096], conf[128], dbpath[128];
    make_tmpdir(dir, sizeof dir, "report");
    snprintf(conf, sizeof conf, "%s/slicewarden.conf", dir);
    snprintf(dbpath, sizeof dbpath, "%s/qa.sqlite", dir);
    FILE *f = fopen(conf, "w");
    cr_assert(f);
    fprintf(f, "[watch]\nfolder = %s/incoming\ndatabase = %s\nquiet_seconds = 1\n", dir, dbpath);
    fclose(f);
    snprintf(cmd, sizeof cmd, "mkdir -p %s/incoming", dir);
    cr_assert_eq(run(cmd), 0);
    /* Three weekly T1 series on ALDMR1 (the third with a slice position error that fails the bar
     * length difference), one double-echo T2 series on ALDMR2. */
    static const char *const sims[] = {
        "--station ALDMR1 --serial SWS-0001 --date 20250106 --seed 1 incoming/a",
        "--station ALDMR1 --serial SWS-0001 --date 20250113 --seed 2 incoming/b",
        "--station ALDMR1 --serial SWS-0001 --date 20250120 --seed 3 --position-offset 3.2 "
        "incoming/c",
        "--station ALDMR2 --serial SWS-0002 --scanner-model 'SW-SIM 3T' --field 3 --series t2 "
        "--date 20250108 --seed 4 incoming/d",
    };
    for (size_t i = 0; i < sizeof sims / sizeof sims[0]; i++) {
        snprintf(cmd, sizeof cmd,
                 "cd %s && " SLICEWARDEN " simulate --quiet --time 083000 --institution "
                 "'Alderbrook Regional Hospital' %s",
                 dir, sims[i]);
        cr_assert_eq(run(cmd), 0, "%s", cmd);
    }
    snprintf(cmd, sizeof cmd,
             SLICEWARDEN " watch -c %s --once --quiet 0 --no-progress 2>%s/watch.log", conf, dir);
    run(cmd); /* exit 1 is fine: the truth.json files beside the series are quarantined */
    db *d = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_open(dbpath, DB_OPEN_RW, &d, &err), SW_OK, "%s (watch log in %s)", err.msg,
                 dir);
    int drift_alerts = add_drifting_scanner(d);
    db_close(d);
    cr_assert_geq(drift_alerts, 1, "the drifting scanner must raise a drift alarm");

    char html[192], dom[192], shot[256], prof[128];
    snprintf(html, sizeof html, "%s/report.html", dir);
    snprintf(dom, sizeof dom, "%s/dom.html", dir);
    snprintf(prof, sizeof prof, "%s/chromium-profile", dir);
    snprintf(cmd, sizeof cmd,
             SLICEWARDEN " report -c %s --from 2024-08 --to 2026 -o %s 2>%s/report.log", conf, html,
             dir);
    cr_assert_eq(run(cmd), 0, "%s", cmd);
    const char *flags = "--headless --no-sandbox --disable-gpu --disable-background-networking "
                        "--no-first-run --disable-component-update --disable-sync "
                        "--disable-extensions --mute-audio";
    snprintf(cmd, sizeof cmd,
             "timeout 90 %s %s --user-data-dir=%s --dump-dom file://%s >%s 2>%s/chromium.log",
             browser, flags, prof, html, dom, dir);
    cr_assert_eq(run(cmd), 0, "%s", cmd);
    snprintf(cmd, sizeof cmd,
             PY " %s/tests/trends/check_report.py %s %s --from 2024-08 --to 2026 --drift ALDMR3 "
                "> %s/check.txt",
             SW_SOURCE_DIR, dbpath, dom, dir);
    cr_assert_eq(run(cmd), 0, "%s (files in %s)", cmd, dir);
    /* The page embeds the watch service's annotated PNGs (ALDMR1: latest series and the failing
     * one), and the DOM the browser built says they decoded. */
    FILE *df = fopen(dom, "r");
    cr_assert(df);
    static char buf[1 << 16];
    size_t n = fread(buf, 1, sizeof buf - 1, df);
    buf[n] = '\0';
    fclose(df);
    char *img = strstr(buf, "data-images-rendered=\"");
    cr_assert(img, "no image count on body");
    cr_assert_geq(atoi(img + strlen("data-images-rendered=\"")), 3, "images rendered");
    /* A screenshot for a person (not compared: fonts and versions differ between machines). */
    snprintf(shot, sizeof shot, "%s/tests/trends/report-screenshot.png", SW_BINARY_DIR);
    snprintf(cmd, sizeof cmd,
             "timeout 90 %s %s --user-data-dir=%s --hide-scrollbars --window-size=1200,2600 "
             "--screenshot=%s file://%s >/dev/null 2>&1",
             browser, flags, prof, shot, html);
    cr_assert_eq(run(cmd), 0, "%s", cmd);
    struct stat st;
    cr_assert(stat(shot, &st) == 0 && st.st_size > 10000, "screenshot %s", shot);
}
