/* test_watch.c: the watch service's pieces: content hash, names, moves that never overwrite (same
 * file system, across file systems, and by fault injection), classification, the flattening of
 * results into rows as the store's own constraints accept them, and the alert runner with real
 * processes. The end-to-end runs of the daemon are the Python scripts beside this file. */
#include <criterion/criterion.h>
#include <dirent.h>
#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include "watch.h"

static char tmp[256];

static void rm_rf(const char *path)
{
    char cmd[600];
    snprintf(cmd, sizeof cmd, "rm -rf '%s'", path);
    (void)system(cmd);
}

static void make_tmp(void)
{
    const char *base = getenv("TMPDIR");
    snprintf(tmp, sizeof tmp, "%s/swwatch-test-XXXXXX", base && *base ? base : "/tmp");
    cr_assert_not_null(mkdtemp(tmp), "mkdtemp: %s", strerror(errno));
}

static void remove_tmp(void)
{
    rm_rf(tmp);
}

TestSuite(watch, .init = make_tmp, .fini = remove_tmp);

static void write_file(const char *path, const void *data, size_t n)
{
    FILE *f = fopen(path, "wb");
    cr_assert_not_null(f, "%s: %s", path, strerror(errno));
    cr_assert_eq(fwrite(data, 1, n, f), n);
    cr_assert_eq(fclose(f), 0);
}

static int file_exists(const char *path)
{
    struct stat st;
    return lstat(path, &st) == 0;
}

/* Runs a shell command and returns its first output line (newline removed). */
static void shell_line(const char *cmd, char *out, size_t n)
{
    FILE *p = popen(cmd, "r");
    cr_assert_not_null(p, "%s", cmd);
    out[0] = '\0';
    if (!fgets(out, (int)n, p))
        out[0] = '\0';
    out[strcspn(out, "\n")] = '\0';
    pclose(p);
}

/* ---- SHA-256 ---- */

/* The example messages and digests of FIPS 180-2, appendix B (SHA-256 examples), which FIPS 180-4
 * keeps in NIST's example documents. */
Test(watch, sha256_fips_examples)
{
    static const struct {
        const char *msg;
        const char *hex;
    } cases[] = {
        {"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"},
        {"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq",
         "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"},
        /* the empty message: a widely published value (common practice, e.g. sha256sum of an
         * empty file) */
        {"", "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        char out[WD_HASH_MAX], want[WD_HASH_MAX];
        wd_sha256_text(cases[i].msg, strlen(cases[i].msg), out);
        snprintf(want, sizeof want, "sha256:%s", cases[i].hex);
        cr_expect_str_eq(out, want, "message %zu", i);
    }
    /* FIPS 180-2 B.3: one million 'a', fed in uneven pieces to exercise the buffering. */
    wd_sha256 s;
    wd_sha256_init(&s);
    char chunk[997];
    memset(chunk, 'a', sizeof chunk);
    size_t left = 1000000;
    for (size_t k = 1; left; k = k % 997 + 1) {
        size_t n = k < left ? k : left;
        wd_sha256_update(&s, chunk, n);
        left -= n;
    }
    unsigned char dig[32];
    wd_sha256_final(&s, dig);
    static const unsigned char want[32] = {0xcd, 0xc7, 0x6e, 0x5c, 0x99, 0x14, 0xfb, 0x92,
                                           0x81, 0xa1, 0xc7, 0xe2, 0x84, 0xd7, 0x3e, 0x67,
                                           0xf1, 0x80, 0x9a, 0x48, 0xa4, 0x97, 0x20, 0x0e,
                                           0x04, 0x6d, 0x39, 0xcc, 0xc7, 0x11, 0x2c, 0xd0};
    cr_expect_eq(memcmp(dig, want, 32), 0, "one million 'a'");
}

/* The whole-file paths against coreutils' sha256sum on data of every length around a block. */
Test(watch, sha256_files_match_sha256sum)
{
    unsigned char buf[300];
    unsigned seed = 12345;
    for (int len = 0; len < 200; len += 7) {
        for (int i = 0; i < len; i++)
            buf[i] = (unsigned char)((seed = seed * 1103515245u + 12345u) >> 16);
        char path[400], cmd[600], line[200], mine[WD_HASH_MAX], whole[WD_HASH_MAX];
        snprintf(path, sizeof path, "%s/h%d", tmp, len);
        write_file(path, buf, (size_t)len);
        snprintf(cmd, sizeof cmd, "sha256sum '%s'", path);
        shell_line(cmd, line, sizeof line);
        line[64] = '\0';
        sw_error err;
        sw_error_clear(&err);
        cr_assert_eq(wd_file_hash(path, mine, &err), SW_OK, "%s", err.msg);
        cr_expect_str_eq(mine + 7, line, "length %d", len);
        wd_blob b;
        cr_assert_eq(wd_blob_read(path, &b, NULL, &err), SW_OK, "%s", err.msg);
        sw_strlcpy(whole, b.hash, sizeof whole);
        cr_expect_eq(b.len, (size_t)len);
        cr_expect_str_eq(whole, mine);
        wd_blob_free(&b);
    }
}

Test(watch, blob_refuses_links_and_missing)
{
    char target[400], link_path[400];
    snprintf(target, sizeof target, "%s/t", tmp);
    snprintf(link_path, sizeof link_path, "%s/l", tmp);
    write_file(target, "x", 1);
    cr_assert_eq(symlink(target, link_path), 0);
    wd_blob b;
    sw_error err;
    sw_error_clear(&err);
    cr_expect_eq(wd_blob_read(link_path, &b, NULL, &err), SW_EINVAL,
                 "a symbolic link is not taken");
    sw_error_clear(&err);
    char gone[400];
    snprintf(gone, sizeof gone, "%s/none", tmp);
    cr_expect_eq(wd_blob_read(gone, &b, NULL, &err), SW_ENOTFOUND);
    cr_expect_null(b.data);
}

/* ---- names ---- */

Test(watch, temporary_names)
{
    /* Names receivers and copy tools use while writing (common practice, from memory), and
     * ordinary DICOM file names that must be taken. */
    static const char *const temp[] = {
        ".IM0001.dcm",
        "IM0001.dcm.part",
        "IM0001.PART",
        "x.tmp",
        "x.TMP",
        "x.partial",
        "x.filepart",
        "x.crdownload",
        "IM0001~",
        "#IM#",
        "~$lock",
        ".swp",
        "x.dcm.inprogress",
        "",
    };
    static const char *const real[] = {
        "IM0001.dcm", "MR.2.25.1234", "0CEA50AA",    "1.3.12.2.1107.5.2.dcm",
        "tmp",        "part",         "IM~0001.dcm", "a.temperature",
    };
    for (size_t i = 0; i < sizeof temp / sizeof temp[0]; i++)
        cr_expect(wd_name_is_temporary(temp[i]), "'%s' is a name used while writing", temp[i]);
    for (size_t i = 0; i < sizeof real / sizeof real[0]; i++)
        cr_expect(!wd_name_is_temporary(real[i]), "'%s' is a finished file's name", real[i]);
}

Test(watch, safe_components)
{
    static const char *const hostile[] = {
        "../../etc/passwd",
        "..",
        ".",
        "/",
        "a/b",
        "-rf",
        ".hidden",
        "ALDMR1\n",
        "caf\xc3\xa9",
        "with space",
        "2.25.1234567890",
        "",
        NULL,
    };
    for (size_t i = 0; i < sizeof hostile / sizeof hostile[0]; i++) {
        char out[64];
        wd_safe_component(hostile[i], "fallback", out, sizeof out);
        cr_expect(out[0] != '\0', "never empty (%zu)", i);
        cr_expect(strcmp(out, ".") && strcmp(out, ".."), "never . or .. (%zu)", i);
        cr_expect(out[0] != '.' && out[0] != '-', "no leading dot or dash: '%s'", out);
        for (const char *p = out; *p; p++)
            cr_expect(strchr("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789._-",
                             *p) != NULL,
                      "'%s' holds only portable file name characters (POSIX)", out);
    }
    char out[64];
    cr_expect_str_eq(wd_safe_component("2.25.1234567890", "x", out, sizeof out), "2.25.1234567890",
                     "a UID passes unchanged");
    cr_expect_str_eq(wd_safe_component("", "fallback", out, sizeof out), "fallback");
    char small[8];
    wd_safe_component("abcdefghijklmnop", "x", small, sizeof small);
    cr_expect_eq(strlen(small), 7u, "bounded by the buffer");
    /* Made into a path under a folder, nothing escapes it. */
    char path[200];
    snprintf(path, sizeof path, "%.150s/%.40s", tmp,
             wd_safe_component("../../x", "x", out, sizeof out));
    cr_expect(wd_path_inside(path, tmp));
}

Test(watch, path_inside)
{
    char a[400], b[400];
    snprintf(a, sizeof a, "%s/in", tmp);
    snprintf(b, sizeof b, "%s/in2", tmp);
    mkdir(a, 0755);
    mkdir(b, 0755);
    char sub[420];
    snprintf(sub, sizeof sub, "%s/archive", a);
    cr_expect(wd_path_inside(sub, a));
    cr_expect(wd_path_inside(a, a));
    cr_expect(!wd_path_inside(b, a), "a sibling with a common prefix is outside");
    char dots[420];
    snprintf(dots, sizeof dots, "%s/../in2", a);
    cr_expect(!wd_path_inside(dots, a), "resolved before comparing");
}

/* ---- moves ---- */

static void hash_of(const char *path, char out[WD_HASH_MAX])
{
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(wd_file_hash(path, out, &err), SW_OK, "%s", err.msg);
}

Test(watch, pick_target_skips_taken_names)
{
    char dir[400], p[500], got[PATH_MAX];
    snprintf(dir, sizeof dir, "%s/q/deeper", tmp);
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(wd_pick_target(dir, "IM1", got, sizeof got, &err), SW_OK, "%s", err.msg);
    snprintf(p, sizeof p, "%s/IM1", dir);
    cr_expect_str_eq(got, p, "the name itself when free (folder created)");
    write_file(p, "a", 1);
    snprintf(p, sizeof p, "%s/IM1.1.reason.txt", dir); /* a reason file alone also takes a name */
    write_file(p, "r", 1);
    cr_assert_eq(wd_pick_target(dir, "IM1", got, sizeof got, &err), SW_OK);
    snprintf(p, sizeof p, "%s/IM1.2", dir);
    cr_expect_str_eq(got, p);
    cr_assert_eq(wd_pick_target(dir, "../evil", got, sizeof got, &err), SW_OK);
    cr_expect(wd_path_inside(got, dir), "%s stays inside", got);
}

static void move_case(int force_copy, const char *src_dir, const char *dst_dir)
{
    char src[500], dst[500], h0[WD_HASH_MAX], h1[WD_HASH_MAX];
    unsigned char data[200000];
    for (size_t i = 0; i < sizeof data; i++)
        data[i] = (unsigned char)(i * 7 + 3);
    snprintf(src, sizeof src, "%s/move-src", src_dir);
    snprintf(dst, sizeof dst, "%s/move-dst", dst_dir);
    write_file(src, data, sizeof data);
    struct timespec old[2] = {{1000000000, 0}, {1000000000, 0}};
    cr_assert_eq(utimensat(AT_FDCWD, src, old, 0), 0);
    hash_of(src, h0);
    wd_move_force_copy = force_copy;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(wd_move_noreplace(src, dst, &err), SW_OK, "%s", err.msg);
    cr_expect(!file_exists(src), "the source is gone after the move");
    hash_of(dst, h1);
    cr_expect_str_eq(h0, h1, "the bytes arrived whole");
    struct stat st;
    cr_assert_eq(stat(dst, &st), 0);
    cr_expect_eq(st.st_mtim.tv_sec, 1000000000, "the modification time is kept");
    /* A second file onto the same name: refused, both intact. */
    write_file(src, "other", 5);
    sw_error_clear(&err);
    cr_expect_eq(wd_move_noreplace(src, dst, &err), SW_EBUSY, "never overwrites");
    cr_expect(file_exists(src));
    hash_of(dst, h1);
    cr_expect_str_eq(h0, h1, "the target is untouched");
    /* No temporary file is left in the target folder. */
    DIR *d = opendir(dst_dir);
    struct dirent *e;
    while ((e = readdir(d)))
        cr_expect(strstr(e->d_name, ".swpart") == NULL, "leftover %s", e->d_name);
    closedir(d);
    wd_move_force_copy = 0;
    unlink(src);
    unlink(dst);
}

Test(watch, move_same_file_system)
{
    move_case(0, tmp, tmp);
}

/* Fault injection: the copy path as if the target were on another file system. */
Test(watch, move_copy_path_by_injection)
{
    move_case(1, tmp, tmp);
}

/* A real second file system when the machine has one (/dev/shm is tmpfs on Debian). */
Test(watch, move_across_file_systems)
{
    struct stat a, b;
    if (stat("/dev/shm", &b) != 0 || stat(tmp, &a) != 0 || a.st_dev == b.st_dev)
        cr_skip_test("no second file system at /dev/shm (the injected copy path is tested)");
    char other[100];
    snprintf(other, sizeof other, "/dev/shm/swwatch-XXXXXX");
    cr_assert_not_null(mkdtemp(other));
    move_case(0, other, tmp);
    rm_rf(other);
}

Test(watch, atomic_text)
{
    char p[400];
    snprintf(p, sizeof p, "%s/r.reason.txt", tmp);
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(wd_write_text_atomic(p, "first\n", &err), SW_OK, "%s", err.msg);
    cr_assert_eq(wd_write_text_atomic(p, "second\n", &err), SW_OK, "%s", err.msg);
    char line[64];
    char cmd[1000];
    snprintf(cmd, sizeof cmd, "cat '%s'; ls -a '%s' | grep -c swtmp", p, tmp);
    FILE *f = popen(cmd, "r");
    cr_assert(fgets(line, sizeof line, f));
    cr_expect_str_eq(line, "second\n");
    cr_assert(fgets(line, sizeof line, f));
    cr_expect_str_eq(line, "0\n", "no temporary file left");
    pclose(f);
}

/* ---- classification ---- */

Test(watch, classify_by_name)
{
    wd_config *c = malloc(sizeof *c);
    wd_config_default(c);
    dcm_image *d = calloc(1, sizeof *d);
    static const struct {
        const char *desc, *proto;
        int by_content;
        wd_match want;
    } cases[] = {
        {"QA large phantom T1 axial", "", 1, WD_MATCH_T1},
        {"", "ACR t2 dual echo", 1, WD_MATCH_T2},
        {"localizer", "scout", 1, WD_MATCH_CONTENT},
        {"localizer", "scout", 0, WD_MATCH_NONE},
        {"", "", 0, WD_MATCH_NONE},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        sw_strlcpy(d->series_description, cases[i].desc, sizeof d->series_description);
        sw_strlcpy(d->protocol_name, cases[i].proto, sizeof d->protocol_name);
        c->match_by_content = cases[i].by_content;
        cr_expect_eq(wd_classify(c, d), cases[i].want, "case %zu", i);
    }
    sw_strlcpy(c->t1_match, " ACR_SAG | phantom*T1* ", sizeof c->t1_match);
    sw_strlcpy(d->series_description, "phantom weekly T1", sizeof d->series_description);
    cr_expect_eq(wd_classify(c, d), WD_MATCH_T1, "patterns are trimmed and '|' separated");
    cr_expect_eq(wd_match_echoes(WD_MATCH_T1), 1);
    cr_expect_eq(wd_match_echoes(WD_MATCH_T2), 2);
    cr_expect_eq(wd_match_echoes(WD_MATCH_CONTENT), 0, "unknown: the quiet period decides");
    sw_strlcpy(d->mr_acquisition_type, "3D", sizeof d->mr_acquisition_type);
    cr_expect_str_eq(wd_tolerance_key(WD_MATCH_T1, d), "3d");
    free(c);
    free(d);
}

/* ---- flattening into rows that the store accepts ---- */

typedef struct rows {
    db *d;
    int64_t run;
    int n;
} rows;

static sw_status add_row(void *ctx, const db_measurement *m, sw_error *err)
{
    rows *r = ctx;
    r->n++;
    return db_measurement_add(r->d, r->run, m, err);
}

static db *fresh_db(const char *name, int64_t *scanner, int64_t *series)
{
    char path[400];
    snprintf(path, sizeof path, "%s/%s", tmp, name);
    db *d = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_open(path, DB_OPEN_RW | DB_OPEN_CREATE, &d, &err), SW_OK, "%s", err.msg);
    db_scanner_info si = {.station_name = "ALDMR1",
                          .device_serial = "SWS-0001",
                          .site_alias = "Alderbrook North 1.5T"};
    cr_assert_eq(db_scanner_upsert(d, &si, scanner, &err), SW_OK, "%s", err.msg);
    db_series_info se = {.series_instance_uid = "2.25.1",
                         .study_instance_uid = "2.25.2",
                         .scanner_id = *scanner,
                         .series_number = 3,
                         .description = "T1",
                         .series_type = "t1",
                         .images_expected = 11,
                         .echoes_expected = 1};
    cr_assert_eq(db_series_upsert(d, &se, series, NULL, &err), SW_OK, "%s", err.msg);
    return d;
}

Test(watch, flatten_rows_meet_the_schema)
{
    int64_t scanner, series, run;
    db *d = fresh_db("flat.sqlite", &scanner, &series);
    sw_error err;
    sw_error_clear(&err);
    db_run_info ri = {"test", "sha256:0", "large", "acr"};
    cr_assert_eq(db_run_begin(d, series, &ri, &run, &err), SW_OK, "%s", err.msg);
    an_series_result *r = calloc(1, sizeof *r);
    r->thickness.measured = 1;
    r->thickness.slice = 1;
    r->thickness.corrected_mm = 5.1;
    r->thickness.uncertainty_mm = 0.05;
    r->thickness.top.measured = 1;
    r->thickness.top.length_mm = 51;
    r->thickness.bottom.measured = 0; /* an odd half-measured case */
    sw_strlcpy(r->thickness.bottom.reason, "bottom strip not found", AN_REASON_MAX);
    r->thickness.bottom.length_mm = NAN;
    r->thickness.bottom_thickness_mm = NAN;
    r->thickness.nominal_mm = 5;
    r->thickness.limit_lo_mm = 4.3;
    r->thickness.limit_hi_mm = 5.7;
    r->thickness.acr_mm = 5.05;
    r->thickness.tilt_deg = NAN; /* not finite: must become an unmeasurable row, not a number */
    r->thickness.fwtm_mm = 7;
    r->position[0].measured = 1;
    r->position[0].slice = 1;
    r->position[0].bar_difference_mm = 5.5;
    r->position[0].limit_mm = 5;
    r->position[0].verdict = AN_FAIL;
    r->position[0].left.measured = r->position[0].right.measured = 1;
    r->position[0].ramp_displacement_mm = NAN;
    r->position[1].slice = 11;
    sw_strlcpy(r->position[1].reason, "bridge not found", AN_REASON_MAX);
    r->snr = 80;
    r->noise_sd = NAN;
    wd_measured m;
    memset(&m, 0, sizeof m);
    m.n_echoes = 1;
    m.echo[0].echo_number = 1;
    m.echo[0].res = r;
    wd_method method;
    wd_method_default(&method);
    rows rr = {d, run, 0};
    cr_assert_eq(wd_flatten(&m, &method, add_row, &rr, &err), SW_OK, "%s", err.msg);
    cr_assert_eq(db_run_finish(d, run, 1, DB_FAIL, NULL, &err), SW_OK, "%s", err.msg);
    db_close(d);
    /* Debian's sqlite3 shell as the outside witness of what the rows say. */
    char cmd[800], line[200];
    snprintf(cmd, sizeof cmd,
             "sqlite3 '%s/flat.sqlite' \"SELECT count(*), "
             "sum(verdict='unmeasurable' AND value IS NULL AND length(reason)>0), "
             "sum(verdict='unmeasurable') FROM measurements\"",
             tmp);
    shell_line(cmd, line, sizeof line);
    int n = 0, good = 0, unm = 0;
    cr_assert_eq(sscanf(line, "%d|%d|%d", &n, &good, &unm), 3, "%s", line);
    cr_expect_eq(n, rr.n, "every row was stored");
    cr_expect_eq(good, unm, "every unmeasurable row has no value and a reason");
    cr_expect_geq(unm, 6, "bottom strip, tilt, slice 11 rows, position model, pitch, noise");
    snprintf(cmd, sizeof cmd,
             "sqlite3 '%s/flat.sqlite' \"SELECT verdict||' '||reason FROM measurements WHERE "
             "metric='bar_length_difference' AND slice=11\"",
             tmp);
    shell_line(cmd, line, sizeof line);
    cr_expect_str_eq(line, "unmeasurable bridge not found", "the analysis' reason is kept");
    snprintf(cmd, sizeof cmd,
             "sqlite3 '%s/flat.sqlite' \"SELECT verdict||' '||limit_lo||' '||limit_hi FROM "
             "measurements WHERE metric='bar_length_difference' AND slice=1\"",
             tmp);
    shell_line(cmd, line, sizeof line);
    cr_expect_str_eq(line, "fail -5.0 5.0");
    snprintf(cmd, sizeof cmd,
             "sqlite3 '%s/flat.sqlite' \"SELECT verdict||' '||value||' '||reason FROM "
             "measurements WHERE metric='slice_thickness'\"",
             tmp);
    shell_line(cmd, line, sizeof line);
    cr_expect_str_eq(line, "pass 5.1 ", "a measured value carries no made-up reason");
    free(r);
}

/* ---- the alert runner with real processes ---- */

static int64_t add_alert(db *d, int64_t scanner, int64_t series, const char *metric, double value)
{
    db_alert_info a = {.kind = DB_ALERT_BREACH,
                       .scanner_id = scanner,
                       .series_id = series,
                       .metric = metric,
                       .value = value,
                       .limit = 5.7,
                       .verdict = DB_FAIL,
                       .message = "thick\nslice",
                       .png_path = "/x/y.png"};
    int64_t id = 0;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_alert_add(d, &a, &id, &err), SW_OK, "%s", err.msg);
    return id;
}

typedef struct alert_look {
    int64_t id;
    db_alert_status status;
    int attempts;
    char error[200];
} alert_look;

static int alert_cb(void *ctx, const db_alert_rec *r)
{
    alert_look *a = ctx;
    if (r->id == a->id) {
        a->status = r->status;
        a->attempts = r->attempts;
        sw_strlcpy(a->error, r->last_error, sizeof a->error);
    }
    return 0;
}

/* Status as the store has it (sent alerts are not pending, so absence means sent). */
static alert_look look(db *d, int64_t id)
{
    alert_look a = {.id = id, .status = DB_ALERT_SENT};
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(db_alerts_pending(d, 1000, alert_cb, &a, &err), SW_OK, "%s", err.msg);
    return a;
}

static void step_until_idle(wd_alerts *a, db *d, double max_s)
{
    double end = wd_now_mono() + max_s;
    wd_alerts_step(a, d);
    while (wd_alerts_running(a) && wd_now_mono() < end) {
        struct timespec ts = {0, 20000000};
        nanosleep(&ts, NULL);
        wd_alerts_step(a, d);
    }
    wd_alerts_step(a, d); /* records the outcome */
}

Test(watch, alert_command_gets_the_facts)
{
    int64_t scanner, series;
    db *d = fresh_db("alert.sqlite", &scanner, &series);
    int64_t id = add_alert(d, scanner, series, "slice_thickness", 6.42);
    char out[400], cmd[800];
    snprintf(out, sizeof out, "%s/env.txt", tmp);
    snprintf(cmd, sizeof cmd, "env | grep ^SLICEWARDEN_ | sort > '%s'", out);
    wd_alert_opts o = {
        .command = cmd, .timeout_s = 10, .retry_s = 60, .max_attempts = 3, .max_running = 2};
    wd_alerts *a = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(wd_alerts_new(&o, &a, &err), SW_OK);
    step_until_idle(a, d, 10);
    cr_expect_eq(look(d, id).status, DB_ALERT_SENT);
    FILE *f = fopen(out, "r");
    cr_assert_not_null(f);
    char line[300], all[4000] = "";
    while (fgets(line, sizeof line, f))
        strncat(all, line, sizeof all - strlen(all) - 1);
    fclose(f);
    cr_expect(strstr(all, "SLICEWARDEN_KIND=breach\n"), "%s", all);
    cr_expect(strstr(all, "SLICEWARDEN_METRIC=slice_thickness\n"));
    cr_expect(strstr(all, "SLICEWARDEN_VALUE=6.42\n"));
    cr_expect(strstr(all, "SLICEWARDEN_LIMIT=5.7\n"));
    cr_expect(strstr(all, "SLICEWARDEN_VERDICT=fail\n"));
    cr_expect(strstr(all, "SLICEWARDEN_PNG=/x/y.png\n"));
    cr_expect(strstr(all, "SLICEWARDEN_SCANNER=Alderbrook North 1.5T\n"), "the site's alias");
    cr_expect(strstr(all, "SLICEWARDEN_STATION=ALDMR1\n"));
    cr_expect(strstr(all, "SLICEWARDEN_SERIES=2.25.1\n"));
    cr_expect(strstr(all, "SLICEWARDEN_MESSAGE=thick slice\n"), "control characters made blanks");
    /* Sent once: another step does not run it again. */
    unlink(out);
    step_until_idle(a, d, 2);
    cr_expect(!file_exists(out), "a sent alert is not sent again");
    wd_alerts_free(a);
    db_close(d);
}

Test(watch, alert_failure_is_retried_later)
{
    int64_t scanner, series;
    db *d = fresh_db("fail.sqlite", &scanner, &series);
    int64_t id = add_alert(d, scanner, series, "bar_length_difference", 5.5);
    wd_alert_opts o = {
        .command = "exit 3", .timeout_s = 10, .retry_s = 1, .max_attempts = 2, .max_running = 1};
    wd_alerts *a = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(wd_alerts_new(&o, &a, &err), SW_OK);
    step_until_idle(a, d, 10);
    alert_look l = look(d, id);
    cr_expect_eq(l.status, DB_ALERT_FAILED);
    cr_expect_eq(l.attempts, 1);
    cr_expect_str_eq(l.error, "exit status 3");
    /* Not before retry_s ... */
    wd_alerts_step(a, d);
    cr_expect_eq(wd_alerts_running(a), 0, "not retried at once");
    /* ... and after it (the store's time stamps have second resolution here: wait past two). */
    sleep(2);
    step_until_idle(a, d, 10);
    sleep(1);
    step_until_idle(a, d, 10);
    l = look(d, id);
    cr_expect_eq(l.attempts, 2, "retried once more, then given up (max_attempts 2)");
    sleep(2);
    step_until_idle(a, d, 10);
    cr_expect_eq(look(d, id).attempts, 2, "no attempt beyond the limit");
    wd_alerts_free(a);
    db_close(d);
}

Test(watch, alert_time_limit_kills_and_never_blocks)
{
    int64_t scanner, series;
    db *d = fresh_db("slow.sqlite", &scanner, &series);
    int64_t id = add_alert(d, scanner, series, "slice_thickness", 7);
    /* A pipeline: the whole process group must go, not only the shell. */
    wd_alert_opts o = {.command = "sleep 30 | cat",
                       .timeout_s = 1,
                       .retry_s = 600,
                       .max_attempts = 3,
                       .max_running = 1};
    wd_alerts *a = NULL;
    sw_error err;
    sw_error_clear(&err);
    cr_assert_eq(wd_alerts_new(&o, &a, &err), SW_OK);
    double t0 = wd_now_mono();
    wd_alerts_step(a, d);
    cr_expect_lt(wd_now_mono() - t0, 0.5, "a step never waits for the command");
    cr_expect_eq(wd_alerts_running(a), 1);
    step_until_idle(a, d, 10);
    double took = wd_now_mono() - t0;
    cr_expect_lt(took, 4, "killed at its time limit (took %.1f s)", took);
    alert_look l = look(d, id);
    cr_expect_eq(l.status, DB_ALERT_FAILED);
    cr_expect(strstr(l.error, "killed") != NULL, "%s", l.error);
    wd_alerts_free(a);
    db_close(d);
}
