/* throughput.c: the throughput benchmark (docs/performance.md): a simulated archive, then in one
 * run `watch --once`, `analyze`, cat, dcmdump and the Python reference over the same files, the
 * ratios between them, the agreement of the reference with our measurement, and the speed goals.
 *
 *   bench_throughput [--series N] [--keep] [--no-callgrind]
 *
 * Run it through bench/throughput/run BUILD_DIR. The archive (N series, half T1 of 11 images,
 * half double-echo T2 of 22, each also as a JPEG-LS lossless copy made with DCMTK's dcmcjpls) is
 * cached under the build directory and made again only when missing or incomplete. Every child is
 * timed by the wall clock and by wait4's rusage (user and system CPU, peak RSS). The page cache is
 * warmed before each timed command the same way: one `cat` of the files it reads.
 */
#include <errno.h>
#include <fcntl.h>
#include <ftw.h>
#include <jansson.h>
#include <math.h>
#include <sqlite3.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/resource.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#ifndef BENCH_BINARY_DIR
#error "BENCH_BINARY_DIR must be defined by the build"
#endif

#define ARCHIVE_VERSION "archive-v1"

typedef struct meas {
    double wall, user, sys;
    long maxrss_kib;
    int status; /* exit code, or 128 + signal */
} meas;

typedef struct strv {
    char **v;
    int n, cap;
} strv;

static char g_sw[4096], g_ref[4096], g_cost[4096], g_work[4096], g_arch[4096];

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

static void die(const char *fmt, ...) __attribute__((format(printf, 1, 2), noreturn));
static void die(const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    fputs("bench_throughput: ", stderr);
    vfprintf(stderr, fmt, ap);
    fputc('\n', stderr);
    va_end(ap);
    exit(1);
}

/* snprintf that stops the benchmark rather than truncate a path or a command. */
static void xsnprintf(char *buf, size_t n, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));
static void xsnprintf(char *buf, size_t n, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    int k = vsnprintf(buf, n, fmt, ap);
    va_end(ap);
    if (k < 0 || (size_t)k >= n)
        die("a path or command is too long");
}

static void strv_push(strv *s, const char *x)
{
    if (s->n + 2 > s->cap) {
        s->cap = s->cap ? 2 * s->cap : 64;
        s->v = realloc(s->v, (size_t)s->cap * sizeof *s->v);
        if (!s->v)
            die("out of memory");
    }
    s->v[s->n] = strdup(x);
    if (!s->v[s->n])
        die("out of memory");
    s->n++;
    s->v[s->n] = NULL;
}

static void strv_free(strv *s)
{
    for (int i = 0; i < s->n; i++)
        free(s->v[i]);
    free(s->v);
    memset(s, 0, sizeof *s);
}

static int cmp_str(const void *a, const void *b)
{
    return strcmp(*(char *const *)a, *(char *const *)b);
}

/* ---- children ---- */

/* Starts argv with stdout to out_path (NULL: /dev/null) and stderr to err_path (NULL: inherit). */
static pid_t spawn(char *const argv[], const char *out_path, const char *err_path)
{
    fflush(stdout);
    fflush(stderr);
    pid_t pid = fork();
    if (pid < 0)
        die("fork: %s", strerror(errno));
    if (pid == 0) {
        int fd = open(out_path ? out_path : "/dev/null", O_WRONLY | O_CREAT | O_TRUNC, 0644);
        if (fd < 0 || dup2(fd, 1) < 0)
            _exit(126);
        close(fd);
        if (err_path) {
            fd = open(err_path, O_WRONLY | O_CREAT | O_APPEND, 0644);
            if (fd < 0 || dup2(fd, 2) < 0)
                _exit(126);
            close(fd);
        }
        execvp(argv[0], argv);
        _exit(127);
    }
    return pid;
}

static int status_code(int st)
{
    return WIFEXITED(st) ? WEXITSTATUS(st) : 128 + (WIFSIGNALED(st) ? WTERMSIG(st) : 0);
}

/* Runs argv to its end and measures it. */
static meas run(char *const argv[], const char *out_path, const char *err_path)
{
    meas m = {0};
    struct rusage ru;
    int st = 0;
    double t0 = now_s();
    pid_t pid = spawn(argv, out_path, err_path);
    while (wait4(pid, &st, 0, &ru) < 0)
        if (errno != EINTR)
            die("wait4: %s", strerror(errno));
    m.wall = now_s() - t0;
    m.user = (double)ru.ru_utime.tv_sec + 1e-6 * (double)ru.ru_utime.tv_usec;
    m.sys = (double)ru.ru_stime.tv_sec + 1e-6 * (double)ru.ru_stime.tv_usec;
    m.maxrss_kib = ru.ru_maxrss;
    m.status = status_code(st);
    return m;
}

/* The least wall time of n runs (the others' noise is the machine's); CPU and RSS of that run. */
static meas run_best(int n, char *const argv[], const char *out_path, const char *err_path)
{
    meas best = {0};
    best.wall = INFINITY;
    for (int i = 0; i < n; i++) {
        meas m = run(argv, out_path, err_path);
        if (m.status != 0)
            return m;
        if (m.wall < best.wall)
            best = m;
    }
    return best;
}

static void must(const meas *m, const char *what)
{
    if (m->status != 0)
        die("%s failed with status %d (its log is under %s)", what, m->status, g_work);
}

/* Runs a list of commands, at most jobs at a time. */
static void run_pool(strv *cmds, int jobs, const char *log)
{
    int running = 0, next = 0, failed = 0;
    while (next < cmds->n || running) {
        while (running < jobs && next < cmds->n) {
            char *argv[] = {"/bin/sh", "-c", cmds->v[next++], NULL};
            spawn(argv, NULL, log);
            running++;
        }
        int st;
        if (wait(&st) > 0) {
            running--;
            failed += status_code(st) != 0;
        }
    }
    if (failed)
        die("%d of %d archive commands failed (see %s)", failed, cmds->n, log);
}

static void sh(const char *fmt, ...) __attribute__((format(printf, 1, 2)));
static void sh(const char *fmt, ...)
{
    char cmd[16384];
    va_list ap;
    va_start(ap, fmt);
    int k = vsnprintf(cmd, sizeof cmd, fmt, ap);
    va_end(ap);
    if (k < 0 || (size_t)k >= sizeof cmd)
        die("command too long");
    char *argv[] = {"/bin/sh", "-c", cmd, NULL};
    meas m = run(argv, NULL, NULL);
    if (m.status != 0)
        die("'%s' failed with status %d", cmd, m.status);
}

/* ---- files ---- */

static strv *g_collect;
static long long g_bytes;

static int collect_cb(const char *path, const struct stat *st, int type, struct FTW *ftw)
{
    (void)ftw;
    size_t n = strlen(path);
    if (type == FTW_F && n > 4 && !strcmp(path + n - 4, ".dcm")) {
        strv_push(g_collect, path);
        g_bytes += st->st_size;
    }
    return 0;
}

static long long collect(const char *dir, strv *out)
{
    g_collect = out;
    g_bytes = 0;
    if (nftw(dir, collect_cb, 16, FTW_PHYS) != 0)
        die("%s: cannot be listed: %s", dir, strerror(errno));
    qsort(out->v, (size_t)out->n, sizeof *out->v, cmp_str);
    return g_bytes;
}

/* argv = prefix..., then count files from index from (a new array of borrowed strings). */
static char **argv_with(const char *const *prefix, const strv *files, int from, int count)
{
    int np = 0;
    while (prefix[np])
        np++;
    char **argv = calloc((size_t)(np + count + 1), sizeof *argv);
    if (!argv)
        die("out of memory");
    for (int i = 0; i < np; i++)
        argv[i] = (char *)prefix[i];
    for (int i = 0; i < count; i++)
        argv[np + i] = files->v[from + i];
    return argv;
}

/* One cat of the files: the page cache warmed the same way before every timed command. */
static void warm(const strv *files)
{
    const char *p[] = {"cat", NULL};
    char **argv = argv_with(p, files, 0, files->n);
    run(argv, NULL, NULL);
    free(argv);
}

/* ---- the archive ---- */

static const char *const stations[] = {"ALDMR1", "ALDMR2", "ALDMR3"};
static const char *const serials[] = {"SWS-0001", "SWS-0002", "SWS-0003"};
static const char *const models[] = {"SW-SIM 1.5T", "SW-SIM 3T", "SW-SIM 1.5T"};
static const char *const fields[] = {"1.5", "3", "1.5"};

static void make_archive(int nseries)
{
    char stamp[4200], log[4200];
    xsnprintf(stamp, sizeof stamp, "%s/COMPLETE", g_arch);
    xsnprintf(log, sizeof log, "%s.log", g_arch);
    FILE *f = fopen(stamp, "r");
    if (f) {
        int n = 0;
        if (fscanf(f, ARCHIVE_VERSION " %d", &n) == 1 && n == nseries) {
            fclose(f);
            printf("archive: cached in %s\n", g_arch);
            return;
        }
        fclose(f);
    }
    printf("archive: simulating %d series into %s (2 at a time)\n", nseries, g_arch);
    fflush(stdout);
    double t0 = now_s();
    sh("rm -rf '%s' '%s' && mkdir -p '%s/plain' '%s/jpegls' '%s/truth'", g_arch, log, g_arch,
       g_arch, g_arch);
    strv cmds = {0};
    for (int i = 0; i < nseries; i++) {
        char cmd[8192];
        int t2 = i % 2, s = i % 3;
        struct tm tm = {.tm_year = 126, .tm_mon = 0, .tm_mday = 5 + i / 3, .tm_hour = 12};
        mktime(&tm);
        char date[16];
        strftime(date, sizeof date, "%Y%m%d", &tm);
        /* a varied but measurable archive: thickness 4-6 mm, SNR 60-149, rotation +-2.5 deg,
           offsets, tilt +-1 deg, slice position errors +-1 mm */
        xsnprintf(cmd, sizeof cmd,
                  "'%s' simulate --quiet --series %s --seed %d --thickness %.1f --snr %d "
                  "--rotation %.1f --offset %d,%d --tilt-v %.1f --position-offset %.2f "
                  "--station %s --serial %s --scanner-model '%s' --field %s --date %s "
                  "--series-number %d '%s/plain/s%03d' && mv '%s/plain/s%03d/truth.json' "
                  "'%s/truth/s%03d.json'",
                  g_sw, t2 ? "t2" : "t1", 7001 + i, 4.0 + 0.1 * ((i * 7) % 21), 60 + (i * 17) % 90,
                  0.5 * ((i * 13) % 11 - 5), (i * 5) % 7 - 3, (i * 3) % 5 - 2,
                  0.5 * ((i * 7) % 5 - 2), 0.25 * ((i * 11) % 9 - 4), stations[s], serials[s],
                  models[s], fields[s], date, 100 + i, g_arch, i, g_arch, i, g_arch, i);
        strv_push(&cmds, cmd);
    }
    run_pool(&cmds, 2, log);
    strv_free(&cmds);
    double t1 = now_s();
    strv plain = {0};
    char dir[4200];
    xsnprintf(dir, sizeof dir, "%s/plain", g_arch);
    collect(dir, &plain);
    for (int i = 0; i < plain.n; i++) {
        const char *rel = plain.v[i] + strlen(dir); /* "/sNNN/IMxxxx.dcm" */
        char cmd[9000];
        xsnprintf(cmd, sizeof cmd,
                  "mkdir -p \"$(dirname '%s/jpegls%s')\" && dcmcjpls '%s' '%s/jpegls%s'", g_arch,
                  rel, plain.v[i], g_arch, rel);
        strv_push(&cmds, cmd);
    }
    printf("archive: %d series simulated in %.0f s; %d files to JPEG-LS lossless\n", nseries,
           t1 - t0, plain.n);
    fflush(stdout);
    run_pool(&cmds, 2, log);
    strv_free(&cmds);
    strv_free(&plain);
    f = fopen(stamp, "w");
    if (!f || fprintf(f, ARCHIVE_VERSION " %d\n", nseries) < 0 || fclose(f) != 0)
        die("%s: cannot be written", stamp);
    printf("archive: ready in %.0f s\n", now_s() - t0);
}

/* ---- watch --once ---- */

static int stored_series(const char *db)
{
    sqlite3 *h = NULL;
    sqlite3_stmt *st = NULL;
    int n = -1;
    if (sqlite3_open_v2(db, &h, SQLITE_OPEN_READONLY, NULL) == SQLITE_OK &&
        sqlite3_prepare_v2(h, "SELECT count(*) FROM series WHERE state = 'stored'", -1, &st,
                           NULL) == SQLITE_OK &&
        sqlite3_step(st) == SQLITE_ROW)
        n = sqlite3_column_int(st, 0);
    sqlite3_finalize(st);
    sqlite3_close(h);
    return n;
}

/* watch --once over a fresh hard-linked copy of src (files are moved by watch, never changed). */
static meas watch_once(const char *name, const char *src, int png, int expect_series)
{
    char root[4200], conf[4300], db[4300], errlog[4300];
    xsnprintf(root, sizeof root, "%s/watch-%s", g_work, name);
    xsnprintf(conf, sizeof conf, "%s/bench.conf", root);
    xsnprintf(db, sizeof db, "%s/store.sqlite", root);
    xsnprintf(errlog, sizeof errlog, "%s/watch.log", root);
    sh("rm -rf '%s' && mkdir -p '%s' && cp -al '%s' '%s/incoming'", root, root, src, root);
    FILE *f = fopen(conf, "w");
    if (!f)
        die("%s: cannot be written", conf);
    fprintf(
        f,
        "[watch]\nfolder = %s/incoming\ndatabase = %s\nquiet_seconds = 1\n[log]\nlevel = warning\n",
        root, db);
    fclose(f);
    strv files = {0};
    char in[4300];
    xsnprintf(in, sizeof in, "%s/incoming", root);
    collect(in, &files);
    warm(&files);
    strv_free(&files);
    /* cp -al changed the files' ctime: watch holds a scanned file changed in the last second
       (SETTLE_S in daemon/watch.c) as still being written. A backlog is older than that. */
    struct timespec settle = {1, 200000000};
    nanosleep(&settle, NULL);
    char *argv[] = {g_sw, "watch", "-c", conf, "--once", "--no-progress", png ? NULL : "--no-png",
                    NULL};
    meas m = run(argv, NULL, errlog);
    must(&m, name);
    int n = stored_series(db);
    if (n != expect_series)
        die("watch %s stored %d series of %d (see %s)", name, n, expect_series, errlog);
    return m;
}

/* ---- agreement of the reference with ours ---- */

typedef struct stat_acc {
    int n;
    double sum, sum2, maxabs;
    int over;     /* beyond the per-series limit */
    int one_only; /* measured by one of the two programs only */
} stat_acc;

static void acc_add(stat_acc *a, double d, double limit)
{
    if (isnan(d)) {
        a->one_only++;
        return;
    }
    a->n++;
    a->sum += d;
    a->sum2 += d * d;
    if (fabs(d) > a->maxabs)
        a->maxabs = fabs(d);
    if (!(fabs(d) <= limit))
        a->over++;
}

static double acc_mean(const stat_acc *a)
{
    return a->n ? a->sum / a->n : NAN;
}

static double acc_sd(const stat_acc *a)
{
    if (a->n < 2)
        return NAN;
    double m = acc_mean(a);
    return sqrt(fmax(0, (a->sum2 - a->n * m * m) / (a->n - 1)));
}

static const char *str_or(const char *s, const char *dflt)
{
    return s ? s : dflt;
}

static double jnum(json_t *o, const char *k)
{
    json_t *v = json_object_get(o, k);
    return json_is_number(v) ? json_number_value(v) : NAN;
}

/* Limits of the agreement (docs/performance.md explains them): per series and echo, thickness
 * within 0.05 mm + 3 combined standard uncertainties (ours, reported, taken for both), bar
 * length difference the same; the mean difference within 0.03 mm. */
#define AGREE_FIXED_MM 0.05
#define AGREE_K 3.0
#define AGREE_MEAN_MM 0.03

static int agreement(const char *ours_path, const char *ref_path, int expect)
{
    json_error_t je;
    json_t *ours = json_load_file(ours_path, 0, &je);
    if (!ours)
        die("%s: %s (line %d)", ours_path, je.text, je.line);
    json_t *series = json_object_get(ours, "series");
    FILE *f = fopen(ref_path, "r");
    if (!f)
        die("%s: cannot be read", ref_path);
    stat_acc th = {0}, bld = {0};
    int matched = 0, ref_lines = 0;
    char line[65536];
    while (fgets(line, sizeof line, f)) {
        json_t *r = json_loads(line, 0, &je);
        if (!r)
            continue;
        ref_lines++;
        const char *uid = json_string_value(json_object_get(r, "series_instance_uid"));
        int echo = (int)json_integer_value(json_object_get(r, "echo_number"));
        size_t i;
        json_t *s;
        json_array_foreach(series, i, s)
        {
            const char *su = json_string_value(json_object_get(s, "series_instance_uid"));
            if (!uid || !su || strcmp(uid, su) ||
                json_integer_value(json_object_get(s, "echo_number")) != echo)
                continue;
            matched++;
            json_t *t = json_object_get(s, "slice_thickness");
            double u = jnum(t, "uncertainty_mm");
            double d = jnum(r, "corrected_mm") - jnum(t, "corrected_mm");
            if (isnan(d))
                printf("  measured by one only: series %s echo %d thickness (ours: %s)\n", uid,
                       echo, str_or(json_string_value(json_object_get(t, "reason")), "measured"));
            acc_add(&th, d, AGREE_FIXED_MM + AGREE_K * sqrt(2.0) * u);
            size_t k;
            json_t *p;
            json_array_foreach(json_object_get(s, "slice_position"), k, p)
            {
                int sl = (int)json_integer_value(json_object_get(p, "slice"));
                json_t *rp = json_object_get(r, sl == 1 ? "slice1" : "slice11");
                double ub = jnum(p, "uncertainty_mm");
                double d = jnum(rp, "bar_difference_mm") - jnum(p, "bar_difference_mm");
                if (isnan(d))
                    printf("  measured by one only: series %s echo %d slice %d bar length "
                           "difference (ours: %s; reference: %.3f mm)\n",
                           uid, echo, sl,
                           str_or(json_string_value(json_object_get(p, "reason")), "measured"),
                           jnum(rp, "bar_difference_mm"));
                acc_add(&bld, d, AGREE_FIXED_MM + AGREE_K * sqrt(2.0) * ub);
            }
        }
        json_decref(r);
    }
    fclose(f);
    json_decref(ours);
    printf("\nagreement of the Python reference with ours (reference - ours), %d series-echoes "
           "matched of %d expected (%d reference lines)\n",
           matched, expect, ref_lines);
    printf("  per-series limit: %.2f mm + %.0f x sqrt(2) x our reported uncertainty; mean within "
           "%.2f mm\n",
           AGREE_FIXED_MM, AGREE_K, AGREE_MEAN_MM);
    printf("  %-24s n %4d  mean %+.4f mm  SD %.4f mm  max |d| %.3f mm  beyond limit %d  "
           "measured by one only %d\n",
           "thickness (corrected)", th.n, acc_mean(&th), acc_sd(&th), th.maxabs, th.over,
           th.one_only);
    printf("  %-24s n %4d  mean %+.4f mm  SD %.4f mm  max |d| %.3f mm  beyond limit %d  "
           "measured by one only %d\n",
           "bar length difference", bld.n, acc_mean(&bld), acc_sd(&bld), bld.maxabs, bld.over,
           bld.one_only);
    int ok = matched == expect && th.over == 0 && bld.over == 0 && th.one_only == 0 &&
             bld.one_only == 0 && fabs(acc_mean(&th)) <= AGREE_MEAN_MM &&
             fabs(acc_mean(&bld)) <= AGREE_MEAN_MM;
    printf("  agreement: %s\n", ok ? "within the limits" : "NOT within the limits");
    return ok;
}

/* ---- callgrind ---- */

static double callgrind_ir(const char *toggle, const strv *files, int from, int count)
{
    char out[4300], cmd_out[4400];
    xsnprintf(out, sizeof out, "%s/callgrind.%s.out", g_work, toggle);
    xsnprintf(cmd_out, sizeof cmd_out, "--callgrind-out-file=%s", out);
    char tog[256];
    xsnprintf(tog, sizeof tog, "--toggle-collect=%s", toggle);
    const char *p[] = {"valgrind", "--tool=callgrind", tog, cmd_out, g_cost, "--repeat", "1", NULL};
    char **argv = argv_with(p, files, from, count);
    char log[4400];
    xsnprintf(log, sizeof log, "%s/callgrind.log", g_work);
    meas m = run(argv, NULL, log);
    free(argv);
    if (m.status != 0)
        return NAN;
    FILE *f = fopen(out, "r");
    double ir = NAN;
    char line[1024];
    while (f && fgets(line, sizeof line, f))
        if (!strncmp(line, "summary:", 8) || !strncmp(line, "totals:", 7))
            ir = atof(strchr(line, ':') + 1);
    if (f)
        fclose(f);
    return ir;
}

/* ---- report ---- */

static void row(const char *name, const meas *m, double items, const char *unit)
{
    double cpu = m->user + m->sys;
    printf("  %-44s %8.3f %8.3f %8.3f %8.1f", name, m->wall, m->user, m->sys,
           (double)m->maxrss_kib / 1024.0);
    if (items > 0)
        printf("  %8.0f %s/s wall, %8.0f %s/s CPU", items / m->wall, unit, items / cpu, unit);
    printf("\n");
}

static void goal(const char *what, int met, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));
static void goal(const char *what, int met, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    printf("  [%s] %s: ", met ? "met    " : "NOT met", what);
    vprintf(fmt, ap);
    printf("\n");
    va_end(ap);
}

/* analyze_cost output: "read_decode_ms X" and "analyze_ms Y" */
static void cost_of(const strv *files, int from, int count, double *read_ms, double *an_ms)
{
    char out[4300];
    xsnprintf(out, sizeof out, "%s/cost.txt", g_work);
    const char *p[] = {g_cost, "--repeat", "20", NULL};
    char **argv = argv_with(p, files, from, count);
    meas m = run(argv, out, NULL);
    free(argv);
    must(&m, "bench_analysis_cost");
    FILE *f = fopen(out, "r");
    char line[512];
    *read_ms = *an_ms = NAN;
    while (f && fgets(line, sizeof line, f)) {
        sscanf(line, "read_decode_ms %lf", read_ms);
        sscanf(line, "analyze_ms %lf", an_ms);
    }
    if (f)
        fclose(f);
}

/* The index range of series sNNN's files in a sorted list. */
static void series_range(const strv *files, int s, int *from, int *count)
{
    char key[32];
    xsnprintf(key, sizeof key, "/s%03d/", s);
    *from = -1;
    *count = 0;
    for (int i = 0; i < files->n; i++)
        if (strstr(files->v[i], key)) {
            if (*from < 0)
                *from = i;
            (*count)++;
        }
    if (*from < 0)
        die("series s%03d not found in the archive", s);
}

int main(int argc, char **argv)
{
    int nseries = 200, callgrind = 1, keep = 0;
    for (int i = 1; i < argc; i++) {
        if (!strcmp(argv[i], "--series") && i + 1 < argc)
            nseries = atoi(argv[++i]);
        else if (!strcmp(argv[i], "--no-callgrind"))
            callgrind = 0;
        else if (!strcmp(argv[i], "--keep"))
            keep = 1;
        else {
            fprintf(stderr, "usage: bench_throughput [--series N (even, 20-400; 200)] [--keep] "
                            "[--no-callgrind]\n");
            return 2;
        }
    }
    /* cat, dcmdump and analyze get every file (or folder) on one command line: 400 series of
       paths stay well inside the kernel's argument limit. */
    if (nseries < 20 || nseries > 400 || nseries % 2)
        die("--series must be even, from 20 to 400");
    const char *bin =
        getenv("SW_BENCH_BINARY_DIR") ? getenv("SW_BENCH_BINARY_DIR") : BENCH_BINARY_DIR;
    const char *src =
        getenv("SW_BENCH_SOURCE_DIR") ? getenv("SW_BENCH_SOURCE_DIR") : BENCH_SOURCE_DIR;
    xsnprintf(g_sw, sizeof g_sw, "%s/daemon/slicewarden", bin);
    xsnprintf(g_cost, sizeof g_cost, "%s/bench/throughput/bench_analysis_cost", bin);
    xsnprintf(g_ref, sizeof g_ref, "%s/bench/reference/slicethick.py", src);
    xsnprintf(g_arch, sizeof g_arch, "%s/bench/throughput/" ARCHIVE_VERSION "-%d", bin, nseries);
    xsnprintf(g_work, sizeof g_work, "%s/bench/throughput/work", bin);
    if (access(g_sw, X_OK) || access(g_cost, X_OK) || access(g_ref, R_OK))
        die("%s, %s or %s is missing: build the project first", g_sw, g_cost, g_ref);
    sh("rm -rf '%s' && mkdir -p '%s'", g_work, g_work);

    /* the machine */
    char host[256] = "";
    gethostname(host, sizeof host);
    double load[3] = {0};
    getloadavg(load, 3);
    printf("slicewarden throughput benchmark\n");
    printf("machine: %ld online CPUs, load average %.2f %.2f %.2f at start\n",
           sysconf(_SC_NPROCESSORS_ONLN), load[0], load[1], load[2]);
    fflush(stdout);
    sh("grep -m1 'model name' /proc/cpuinfo; uname -sr; git -C '%s' rev-parse --short HEAD "
       "2>/dev/null || true",
       src);

    make_archive(nseries);
    char plain_dir[4200], jls_dir[4200];
    xsnprintf(plain_dir, sizeof plain_dir, "%s/plain", g_arch);
    xsnprintf(jls_dir, sizeof jls_dir, "%s/jpegls", g_arch);
    strv plain = {0}, jls = {0};
    long long plain_bytes = collect(plain_dir, &plain);
    long long jls_bytes = collect(jls_dir, &jls);
    int nimages = plain.n;
    printf("archive: %d series (%d T1 x 11 images, %d T2 x 22), %d files, plain %.1f MiB, JPEG-LS "
           "%.1f MiB\n",
           nseries, nseries / 2, nseries / 2, nimages, plain_bytes / 1048576.0,
           jls_bytes / 1048576.0);
    if (jls.n != plain.n)
        die("the JPEG-LS copy has %d files, the plain archive %d", jls.n, plain.n);

    printf("\n  %-44s %8s %8s %8s %8s\n", "command (least wall of its runs)", "wall s", "user s",
           "sys s", "RSS MiB");
    /* I/O floor: one cat over all files, after the same warming */
    const char *pcat[] = {"cat", NULL};
    char **a_cat = argv_with(pcat, &plain, 0, plain.n);
    warm(&plain);
    meas cat_plain = run_best(3, a_cat, NULL, NULL);
    must(&cat_plain, "cat");
    row("cat, plain (I/O floor)", &cat_plain, nimages, "img");
    free(a_cat);
    a_cat = argv_with(pcat, &jls, 0, jls.n);
    warm(&jls);
    meas cat_jls = run_best(3, a_cat, NULL, NULL);
    must(&cat_jls, "cat");
    row("cat, JPEG-LS (I/O floor)", &cat_jls, nimages, "img");
    free(a_cat);

    /* dcmdump: one process over all files (as watch --once is one process) */
    const char *pdump[] = {"dcmdump", NULL};
    char **a_dump = argv_with(pdump, &plain, 0, plain.n);
    warm(&plain);
    meas dump_plain = run_best(2, a_dump, NULL, NULL);
    must(&dump_plain, "dcmdump");
    row("dcmdump, one process, plain", &dump_plain, nimages, "img");
    free(a_dump);
    a_dump = argv_with(pdump, &jls, 0, jls.n);
    warm(&jls);
    meas dump_jls = run_best(2, a_dump, NULL, NULL);
    must(&dump_jls, "dcmdump");
    row("dcmdump, one process, JPEG-LS", &dump_jls, nimages, "img");
    free(a_dump);
    /* and one process per file over the first two series, for the per-process share */
    int f0, c0, f1, c1;
    series_range(&plain, 0, &f0, &c0);
    series_range(&plain, 1, &f1, &c1);
    double per_file = 0;
    warm(&plain);
    for (int i = f0; i < f0 + c0 + c1; i++) {
        char *a1[] = {"dcmdump", plain.v[i], NULL};
        meas m = run(a1, NULL, NULL);
        must(&m, "dcmdump");
        per_file += m.wall;
    }
    printf("  %-44s %8.3f  (%d files: %.2f ms a file)\n", "dcmdump, one process per file, 2 series",
           per_file, c0 + c1, 1e3 * per_file / (c0 + c1));

    /* watch --once */
    meas w_plain = watch_once("plain-png", plain_dir, 1, nseries);
    row("watch --once, plain, with PNGs", &w_plain, nimages, "img");
    meas w_plain_np = watch_once("plain-nopng", plain_dir, 0, nseries);
    row("watch --once, plain, --no-png", &w_plain_np, nimages, "img");
    meas w_jls = watch_once("jpegls-png", jls_dir, 1, nseries);
    row("watch --once, JPEG-LS, with PNGs", &w_jls, nimages, "img");
    meas w_jls_np = watch_once("jpegls-nopng", jls_dir, 0, nseries);
    row("watch --once, JPEG-LS, --no-png", &w_jls_np, nimages, "img");
    /* a tenth of the backlog: does the peak RSS depend on it? */
    char small_dir[4300];
    xsnprintf(small_dir, sizeof small_dir, "%s/small", g_work);
    sh("mkdir -p '%s' && for i in $(seq 0 %d); do cp -al \"%s/s$(printf %%03d $i)\" '%s/'; done",
       small_dir, nseries / 10 - 1, plain_dir, small_dir);
    meas w_small = watch_once("plain-tenth", small_dir, 1, nseries / 10);
    row("watch --once, plain, with PNGs, 1/10 backlog", &w_small, 0, "");

    /* one series as a whole process: analyze against the Python reference */
    char s0[4300], s1[4300];
    xsnprintf(s0, sizeof s0, "%s/s000", plain_dir);
    xsnprintf(s1, sizeof s1, "%s/s001", plain_dir);
    strv one = {0};
    collect(s0, &one);
    warm(&one);
    char *a_an1[] = {g_sw, "analyze", "--json", s0, NULL};
    meas an1 = run_best(5, a_an1, NULL, NULL);
    if (an1.status > 1)
        must(&an1, "analyze");
    row("analyze, one T1 series (11 images)", &an1, 0, "");
    char *a_an2[] = {g_sw, "analyze", "--json", s1, NULL};
    meas an2 = run_best(5, a_an2, NULL, NULL);
    if (an2.status > 1)
        must(&an2, "analyze");
    row("analyze, one T2 series (22 images)", &an2, 0, "");
    char *a_py1[] = {"/usr/bin/python3", g_ref, s0, NULL};
    meas py1 = run_best(3, a_py1, NULL, "/dev/null");
    must(&py1, "the Python reference");
    row("python reference, one T1 series", &py1, 0, "");
    strv_free(&one);

    /* steady state: every plain series in one process, both programs */
    char ours_json[4300], ref_json[4300], ours_err[4300], ref_err[4300];
    xsnprintf(ours_json, sizeof ours_json, "%s/ours.json", g_work);
    xsnprintf(ref_json, sizeof ref_json, "%s/reference.jsonl", g_work);
    xsnprintf(ours_err, sizeof ours_err, "%s/analyze.log", g_work);
    xsnprintf(ref_err, sizeof ref_err, "%s/reference.log", g_work);
    strv dirs = {0};
    for (int i = 0; i < nseries; i++) {
        char d[4300];
        xsnprintf(d, sizeof d, "%s/s%03d", plain_dir, i);
        strv_push(&dirs, d);
    }
    const char *pan[] = {g_sw, "analyze", "--json", NULL};
    char **a_anall = argv_with(pan, &dirs, 0, dirs.n);
    warm(&plain);
    meas an_all = run(a_anall, ours_json, ours_err);
    if (an_all.status > 1)
        must(&an_all, "analyze over the archive");
    row("analyze, every plain series", &an_all, nseries, "ser");
    const char *ppy[] = {"/usr/bin/python3", g_ref, NULL};
    char **a_pyall = argv_with(ppy, &dirs, 0, dirs.n);
    warm(&plain);
    meas py_all = run(a_pyall, ref_json, ref_err);
    must(&py_all, "the Python reference over the archive");
    row("python reference, every plain series", &py_all, nseries, "ser");
    free(a_anall);
    free(a_pyall);
    strv_free(&dirs);

    /* per-series cost in one process: reading and decoding against measuring */
    double rd_t1, an_t1, rd_t2, an_t2, rd_j1, an_j1;
    cost_of(&plain, f0, c0, &rd_t1, &an_t1);
    cost_of(&plain, f1, c1, &rd_t2, &an_t2);
    int j0, jc0;
    series_range(&jls, 0, &j0, &jc0);
    cost_of(&jls, j0, jc0, &rd_j1, &an_j1);
    printf("\nper series in one process (least of 20 passes, bench_analysis_cost):\n");
    printf("  T1 plain:   read and decode %7.2f ms, measure %6.2f ms\n", rd_t1, an_t1);
    printf("  T2 plain:   read and decode %7.2f ms, measure %6.2f ms (two echoes)\n", rd_t2, an_t2);
    printf("  T1 JPEG-LS: read and decode %7.2f ms, measure %6.2f ms\n", rd_j1, an_j1);
    double ir_read = NAN, ir_an = NAN, ir_jread = NAN;
    if (callgrind) {
        ir_read = callgrind_ir("dcm_read_file", &plain, f0, c0);
        ir_an = callgrind_ir("an_analyze_series", &plain, f0, c0);
        ir_jread = callgrind_ir("dcm_read_file", &jls, j0, jc0);
        printf("  callgrind, T1 series: read and decode %.1f M instructions (JPEG-LS %.1f M), "
               "measure %.1f M\n",
               ir_read / 1e6, ir_jread / 1e6, ir_an / 1e6);
    }

    int agree = agreement(ours_json, ref_json, nseries / 2 * 3);

    /* ratios and goals */
    double steady_ours = (an_all.wall - an1.wall) / (nseries - 1);
    double steady_py = (py_all.wall - py1.wall) / (nseries - 1);
    double cpu_ours = (an_all.user + an_all.sys) / nseries,
           cpu_py = (py_all.user + py_all.sys) / nseries;
    printf("\nratios (wall clock)\n");
    printf("  ours / I/O floor, plain:     watch %.1f (with PNGs), %.1f (--no-png)\n",
           w_plain.wall / cat_plain.wall, w_plain_np.wall / cat_plain.wall);
    printf("  ours / I/O floor, JPEG-LS:   watch %.1f (with PNGs), %.1f (--no-png)\n",
           w_jls.wall / cat_jls.wall, w_jls_np.wall / cat_jls.wall);
    printf("  ours / dcmdump, plain:       watch %.2f (with PNGs), %.2f (--no-png)\n",
           w_plain.wall / dump_plain.wall, w_plain_np.wall / dump_plain.wall);
    printf("  ours / dcmdump, JPEG-LS:     watch %.2f (with PNGs), %.2f (--no-png)\n",
           w_jls.wall / dump_jls.wall, w_jls_np.wall / dump_jls.wall);
#define CPU(m) ((m).user + (m).sys)
    printf("ratios (CPU time, user + system: what the machine's other load inflates less)\n");
    printf("  ours / I/O floor, plain:     watch %.1f (with PNGs), %.1f (--no-png)\n",
           CPU(w_plain) / CPU(cat_plain), CPU(w_plain_np) / CPU(cat_plain));
    printf("  ours / dcmdump, plain:       watch %.2f (with PNGs), %.2f (--no-png)\n",
           CPU(w_plain) / CPU(dump_plain), CPU(w_plain_np) / CPU(dump_plain));
    printf("  ours / dcmdump, JPEG-LS:     watch %.2f (with PNGs), %.2f (--no-png)\n",
           CPU(w_jls) / CPU(dump_jls), CPU(w_jls_np) / CPU(dump_jls));
    printf("  python / ours, one series as a whole process: %.1f\n", CPU(py1) / CPU(an1));
    printf("ratios, both\n");
    printf("  python / ours, one series as a whole process: %.1f (%.3f s / %.3f s)\n",
           py1.wall / an1.wall, py1.wall, an1.wall);
    printf("  python / ours, steady state per series:       %.1f (%.1f ms / %.1f ms; CPU %.1f / "
           "%.1f ms)\n",
           steady_py / steady_ours, 1e3 * steady_py, 1e3 * steady_ours, 1e3 * cpu_py,
           1e3 * cpu_ours);
    printf("  PNG writing: %.1f ms a series (watch plain with PNGs - --no-png, CPU), %.0f %% of "
           "the run\n",
           1e3 * ((w_plain.user + w_plain.sys) - (w_plain_np.user + w_plain_np.sys)) / nseries,
           100.0 * (1.0 - (w_plain_np.user + w_plain_np.sys) / (w_plain.user + w_plain.sys)));

    double peak = (double)w_plain.maxrss_kib;
    const meas *ws[] = {&w_plain_np, &w_jls, &w_jls_np, &w_small};
    for (int i = 0; i < 4; i++)
        if (ws[i]->maxrss_kib > peak)
            peak = (double)ws[i]->maxrss_kib;
    double rate_cpu = nimages / (w_plain.user + w_plain.sys);
    printf("\ngoals (issue 6)\n");
    goal("watch --once within 2x of dcmdump, plain", w_plain.wall <= 2 * dump_plain.wall,
         "%.2f x (%.2f s against %.2f s; --no-png %.2f x; by CPU time %.2f x, --no-png %.2f x)",
         w_plain.wall / dump_plain.wall, w_plain.wall, dump_plain.wall,
         w_plain_np.wall / dump_plain.wall, CPU(w_plain) / CPU(dump_plain),
         CPU(w_plain_np) / CPU(dump_plain));
    goal("watch --once within 2x of dcmdump, JPEG-LS", w_jls.wall <= 2 * dump_jls.wall,
         "%.2f x (%.2f s against %.2f s; dcmdump does not decode the pixels)",
         w_jls.wall / dump_jls.wall, w_jls.wall, dump_jls.wall);
    goal("at least 2,000 images/s on one core, plain", rate_cpu >= 2000,
         "%.0f images/s per CPU second (%.0f by the wall clock; watch is one thread; --no-png "
         "%.0f per CPU second)",
         rate_cpu, nimages / w_plain.wall, nimages / CPU(w_plain_np));
    goal("analysis no more than reading and decoding, per series", an_t1 <= rd_t1 && an_t2 <= rd_t2,
         "T1 %.2f <= %.2f ms, T2 %.2f <= %.2f ms (plain; JPEG-LS %.2f <= %.2f ms)", an_t1, rd_t1,
         an_t2, rd_t2, an_j1, rd_j1);
    goal("peak RSS under 64 MiB whatever the backlog", peak < 64 * 1024,
         "%.1f MiB at most (full backlog %.1f MiB, a tenth %.1f MiB)", peak / 1024.0,
         w_plain.maxrss_kib / 1024.0, w_small.maxrss_kib / 1024.0);
    goal("python / ours at least 10, one series as a whole process", py1.wall >= 10 * an1.wall,
         "%.1f", py1.wall / an1.wall);
    goal("python / ours at least 3, steady state", steady_py >= 3 * steady_ours, "%.1f",
         steady_py / steady_ours);
    goal("the Python reference agrees with ours", agree, "see above");
    getloadavg(load, 3);
    printf("load average at the end: %.2f %.2f %.2f\n", load[0], load[1], load[2]);

    if (!keep)
        sh("rm -rf '%s'/watch-* '%s'", g_work, small_dir);
    strv_free(&plain);
    strv_free(&jls);
    (void)host;
    return 0;
}
