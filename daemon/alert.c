/* alert.c: runs the configured alert command for each alert the store recorded, with the facts in
 * SLICEWARDEN_* environment variables; spawned, reaped without blocking, killed at its time limit,
 * retried after a failure. Ingestion never waits for it.
 *
 * An alert's life (db.h draws the store's side):
 *   db_alert_add (store.c) -> pending --start()--> running --reap()--> db_alert_mark(ok) -> sent
 *                                                     |        `------> db_alert_mark(failed) ->
 * failed
 *                                                     `- over time: killed, then as failed
 *   failed --(retry_s after last_attempt_at, attempts < max_attempts)--> start() again.
 * A crash between the command's end and db_alert_mark runs the command again after the restart:
 * delivery is at least once. */
#include "watch.h"

#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <signal.h>
#include <spawn.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include "wd.h"

extern char **environ;

#define MAX_RUNNING 16
#define MAX_DONE 64
#define MAX_CANDIDATES 32

typedef struct running {
    int64_t id;
    pid_t pid;
    double started; /* monotonic */
    int killed;
} running;

typedef struct done {
    int64_t id;
    int ok;
    char error[160];
} done;

struct wd_alerts {
    wd_alert_opts o;
    char command[1024];
    int n_running;
    running run[MAX_RUNNING];
    int n_done;
    done fin[MAX_DONE];
    double next_query; /* monotonic: earliest time for the next look at the pending alerts */
    int draining;      /* 1: start only alerts never tried (the exit of --once) */
    int started, ok, failed;
};

sw_status wd_alerts_configure(wd_alerts *a, const wd_alert_opts *opts, sw_error *err)
{
    if (!opts || opts->timeout_s <= 0 || opts->retry_s < 0 || opts->max_attempts < 1)
        return sw_error_set(err, SW_EINVAL, "alert: bad options");
    if (opts->command && strlen(opts->command) >= sizeof a->command)
        return sw_error_set(err, SW_EINVAL, "alert: command longer than %zu characters",
                            sizeof a->command - 1);
    a->o = *opts;
    sw_strlcpy(a->command, opts->command ? opts->command : "", sizeof a->command);
    a->o.command = a->command;
    if (a->o.max_running < 1)
        a->o.max_running = 1;
    if (a->o.max_running > MAX_RUNNING)
        a->o.max_running = MAX_RUNNING;
    a->next_query = 0;
    return SW_OK;
}

/* Ownership: on success *out is a new runner freed with wd_alerts_free; on failure *out is NULL. */
sw_status wd_alerts_new(const wd_alert_opts *opts, wd_alerts **out, sw_error *err)
{
    wd_alerts *a = calloc(1, sizeof *a);
    *out = NULL;
    if (!a)
        return sw_error_set(err, SW_ENOMEM, "alert: out of memory");
    sw_status rc = wd_alerts_configure(a, opts, err);
    if (rc != SW_OK) {
        free(a);
        return rc;
    }
    *out = a;
    return SW_OK;
}

void wd_alerts_free(wd_alerts *a)
{
    if (!a)
        return;
    for (int i = 0; i < a->n_running; i++) {
        kill(-a->run[i].pid, SIGKILL);
        (void)waitpid(a->run[i].pid, NULL, 0);
    }
    free(a);
}

int wd_alerts_running(const wd_alerts *a)
{
    return a ? a->n_running : 0;
}

void wd_alerts_counts(const wd_alerts *a, int *started, int *ok, int *failed)
{
    *started = a ? a->started : 0;
    *ok = a ? a->ok : 0;
    *failed = a ? a->failed : 0;
}

double wd_alerts_next_s(const wd_alerts *a)
{
    if (!a)
        return -1;
    if (a->n_running || a->n_done)
        return 0.2;
    if (!a->command[0])
        return -1;
    double d = a->next_query - wd_now_mono();
    return d < 0 ? 0 : d;
}

static void finish(wd_alerts *a, int64_t id, int ok, const char *error)
{
    if (ok)
        a->ok++;
    else
        a->failed++;
    if (a->n_done == MAX_DONE) {
        /* The outcome cannot be kept; the alert stays as it is in the store and is sent again. */
        wd_warn("alert %lld: outcome not recorded (too many waiting); it will run again",
                (long long)id);
        return;
    }
    done *f = &a->fin[a->n_done++];
    f->id = id;
    f->ok = ok;
    sw_strlcpy(f->error, error ? error : "", sizeof f->error);
}

static void reap(wd_alerts *a)
{
    double now = wd_now_mono();
    for (int i = 0; i < a->n_running;) {
        running *r = &a->run[i];
        int status = 0;
        pid_t p = waitpid(r->pid, &status, WNOHANG);
        if (p == 0) {
            if (!r->killed && now - r->started > a->o.timeout_s) {
                /* The command runs in its own process group: end the whole pipeline. */
                kill(-r->pid, SIGKILL);
                r->killed = 1;
                wd_warn("alert %lld: command killed after %.0f s", (long long)r->id,
                        a->o.timeout_s);
            }
            i++;
            continue;
        }
        char why[160];
        int ok = 0;
        if (p < 0)
            snprintf(why, sizeof why, "lost track of the command: %s", strerror(errno));
        else if (r->killed)
            snprintf(why, sizeof why, "killed after the %.0f s time limit", a->o.timeout_s);
        else if (WIFEXITED(status) && WEXITSTATUS(status) == 0)
            ok = 1, why[0] = '\0';
        else if (WIFEXITED(status))
            snprintf(why, sizeof why, "exit status %d", WEXITSTATUS(status));
        else if (WIFSIGNALED(status))
            snprintf(why, sizeof why, "ended by signal %d", WTERMSIG(status));
        else
            snprintf(why, sizeof why, "ended abnormally (status %d)", status);
        if (ok)
            wd_info("alert %lld: command done", (long long)r->id);
        else
            wd_warn("alert %lld: command failed: %s; retried in %.0f s", (long long)r->id, why,
                    a->o.retry_s);
        finish(a, r->id, ok, why);
        a->run[i] = a->run[--a->n_running];
    }
}

static void record(wd_alerts *a, db *d)
{
    for (int i = 0; i < a->n_done;) {
        sw_error err;
        sw_error_clear(&err);
        sw_status st = db_alert_mark(d, a->fin[i].id, a->fin[i].ok, a->fin[i].error, &err);
        if (st == SW_EBUSY) {
            i++; /* the store is locked: try again at the next step */
            continue;
        }
        if (st != SW_OK)
            wd_warn("alert %lld: %s", (long long)a->fin[i].id, err.msg);
        a->fin[i] = a->fin[--a->n_done];
    }
}

/* ---- starting ---- */

typedef struct candidate {
    db_alert_rec rec;
    char metric[64], message[320], png[PATH_MAX], created[40];
} candidate;

typedef struct collect {
    wd_alerts *a;
    double now_real;
    int n, max;
    candidate *c;
} collect;

static double iso_to_epoch(const char *s)
{
    struct tm tm;
    memset(&tm, 0, sizeof tm);
    if (!s || !*s)
        return NAN;
    const char *end = strptime(s, "%Y-%m-%dT%H:%M:%S", &tm);
    if (!end)
        return NAN;
    return (double)timegm(&tm);
}

static int is_busy(const wd_alerts *a, int64_t id)
{
    for (int i = 0; i < a->n_running; i++)
        if (a->run[i].id == id)
            return 1;
    for (int i = 0; i < a->n_done; i++)
        if (a->fin[i].id == id)
            return 1;
    return 0;
}

static int collect_cb(void *ctx, const db_alert_rec *r)
{
    collect *c = ctx;
    if (c->n == c->max)
        return 1;
    if (is_busy(c->a, r->id))
        return 0;
    if (r->status == DB_ALERT_FAILED) {
        if (c->a->draining)
            return 0;
        double last = iso_to_epoch(r->last_attempt_at);
        if (isfinite(last) && c->now_real < last + c->a->o.retry_s)
            return 0;
    }
    candidate *k = &c->c[c->n++];
    k->rec = *r;
    sw_strlcpy(k->metric, r->info.metric, sizeof k->metric);
    sw_strlcpy(k->message, r->info.message, sizeof k->message);
    sw_strlcpy(k->png, r->info.png_path, sizeof k->png);
    sw_strlcpy(k->created, r->created_at, sizeof k->created);
    k->rec.info.metric = k->metric;
    k->rec.info.message = k->message;
    k->rec.info.png_path = k->png;
    k->rec.created_at = k->created;
    return 0;
}

/* Facts looked up for the environment. */
typedef struct facts {
    char station[136], serial[136], alias[136];
    char uid[72], description[136], acquired[40], number[16];
} facts;

static int series_cb(void *ctx, const db_series_rec *r)
{
    facts *f = ctx;
    sw_strlcpy(f->uid, r->info.series_instance_uid, sizeof f->uid);
    sw_strlcpy(f->description, r->info.description, sizeof f->description);
    sw_strlcpy(f->acquired, r->acquired_at, sizeof f->acquired);
    snprintf(f->number, sizeof f->number, "%d", r->info.series_number);
    return 0;
}

typedef struct scanner_find {
    int64_t id;
    facts *f;
} scanner_find;

static int scanner_cb(void *ctx, const db_scanner_rec *r)
{
    scanner_find *s = ctx;
    if (r->id != s->id)
        return 0;
    sw_strlcpy(s->f->station, r->info.station_name, sizeof s->f->station);
    sw_strlcpy(s->f->serial, r->info.device_serial, sizeof s->f->serial);
    sw_strlcpy(s->f->alias, r->info.site_alias, sizeof s->f->alias);
    return 1;
}

/* NAME=value with control characters made blanks: values come from untrusted DICOM headers. */
static char *env_entry(const char *name, const char *value)
{
    size_t n = strlen(name) + strlen(value ? value : "") + 2;
    char *s = malloc(n);
    if (!s)
        return NULL;
    snprintf(s, n, "%s=%s", name, value ? value : "");
    for (char *p = s + strlen(name) + 1; *p; p++)
        if ((unsigned char)*p < 0x20 || *p == 0x7f)
            *p = ' ';
    return s;
}

static void fmt_num(char *buf, size_t n, double v)
{
    if (isfinite(v))
        snprintf(buf, n, "%.6g", v);
    else
        buf[0] = '\0';
}

static void start(wd_alerts *a, db *d, const candidate *k)
{
    facts f;
    memset(&f, 0, sizeof f);
    sw_error err;
    sw_error_clear(&err);
    if (k->rec.info.series_id > 0)
        (void)db_series_get(d, k->rec.info.series_id, series_cb, &f, &err);
    scanner_find sf = {.id = k->rec.info.scanner_id, .f = &f};
    sw_error_clear(&err);
    (void)db_scanners_each(d, scanner_cb, &sf, &err);
    char id[24], run[24], value[40], limit[40], attempt[16];
    snprintf(id, sizeof id, "%lld", (long long)k->rec.id);
    snprintf(run, sizeof run, "%lld", (long long)k->rec.info.run_id);
    snprintf(attempt, sizeof attempt, "%d", k->rec.attempts + 1);
    fmt_num(value, sizeof value, k->rec.info.value);
    fmt_num(limit, sizeof limit, k->rec.info.limit);
    const char *pairs[][2] = {
        {"SLICEWARDEN_ALERT_ID", id},
        {"SLICEWARDEN_KIND", db_alert_kind_name(k->rec.info.kind)},
        {"SLICEWARDEN_SCANNER", f.alias[0] ? f.alias : f.station},
        {"SLICEWARDEN_STATION", f.station},
        {"SLICEWARDEN_SERIAL", f.serial},
        {"SLICEWARDEN_SERIES", f.uid},
        {"SLICEWARDEN_SERIES_NUMBER", f.number},
        {"SLICEWARDEN_SERIES_DESCRIPTION", f.description},
        {"SLICEWARDEN_ACQUIRED_AT", f.acquired},
        {"SLICEWARDEN_RUN_ID", run},
        {"SLICEWARDEN_METRIC", k->rec.info.metric},
        {"SLICEWARDEN_VALUE", value},
        {"SLICEWARDEN_LIMIT", limit},
        {"SLICEWARDEN_VERDICT", db_verdict_name(k->rec.info.verdict)},
        {"SLICEWARDEN_PNG", k->rec.info.png_path},
        {"SLICEWARDEN_MESSAGE", k->rec.info.message},
        {"SLICEWARDEN_CREATED_AT", k->rec.created_at},
        {"SLICEWARDEN_ATTEMPT", attempt},
    };
    size_t npairs = sizeof pairs / sizeof pairs[0], nenv = 0, cap;
    for (char **e = environ; e && *e; e++)
        nenv++;
    cap = nenv + npairs + 1;
    char **envp = calloc(cap, sizeof *envp);
    char **mine = calloc(npairs, sizeof *mine);
    posix_spawnattr_t attr;
    posix_spawn_file_actions_t fa;
    int have_attr = 0, have_fa = 0, rc;
    pid_t pid = -1;
    char why[160] = "";
    if (!envp || !mine) {
        snprintf(why, sizeof why, "out of memory");
        goto out;
    }
    size_t k2 = 0;
    for (char **e = environ; e && *e; e++)
        if (strncmp(*e, "SLICEWARDEN_", 12) != 0) /* ours replace any inherited ones */
            envp[k2++] = *e;
    for (size_t i = 0; i < npairs; i++) {
        if (!(mine[i] = env_entry(pairs[i][0], pairs[i][1]))) {
            snprintf(why, sizeof why, "out of memory");
            goto out;
        }
        envp[k2++] = mine[i];
    }
    envp[k2] = NULL;
    if ((rc = posix_spawnattr_init(&attr)) != 0) {
        snprintf(why, sizeof why, "cannot start: %s", strerror(rc));
        goto out;
    }
    have_attr = 1;
    sigset_t none, defaults;
    sigemptyset(&none);
    sigemptyset(&defaults);
    int sigs[] = {SIGTERM, SIGINT, SIGHUP, SIGCHLD, SIGPIPE, SIGQUIT, SIGUSR1, SIGUSR2};
    for (size_t i = 0; i < sizeof sigs / sizeof sigs[0]; i++)
        sigaddset(&defaults, sigs[i]);
    posix_spawnattr_setsigmask(&attr, &none);
    posix_spawnattr_setsigdefault(&attr, &defaults);
    posix_spawnattr_setpgroup(&attr, 0);
    posix_spawnattr_setflags(&attr, POSIX_SPAWN_SETSIGMASK | POSIX_SPAWN_SETSIGDEF |
                                        POSIX_SPAWN_SETPGROUP);
    if ((rc = posix_spawn_file_actions_init(&fa)) != 0) {
        snprintf(why, sizeof why, "cannot start: %s", strerror(rc));
        goto out;
    }
    have_fa = 1;
    /* No input; its output goes where ours goes (the journal under systemd). */
    posix_spawn_file_actions_addopen(&fa, 0, "/dev/null", O_RDONLY, 0);
    posix_spawn_file_actions_adddup2(&fa, 2, 1);
    char *argv[] = {"/bin/sh", "-c", a->command, NULL};
    rc = posix_spawn(&pid, "/bin/sh", &fa, &attr, argv, envp);
    if (rc != 0) {
        snprintf(why, sizeof why, "cannot start /bin/sh: %s", strerror(rc));
        pid = -1;
        goto out;
    }
    running *r = &a->run[a->n_running++];
    r->id = k->rec.id;
    r->pid = pid;
    r->started = wd_now_mono();
    r->killed = 0;
    a->started++;
    wd_info("alert %lld: %s %s on %s, series %s: command started (attempt %d)",
            (long long)k->rec.id, db_alert_kind_name(k->rec.info.kind), k->rec.info.metric,
            f.alias[0] ? f.alias : f.station, f.uid, k->rec.attempts + 1);
out:
    if (pid < 0) {
        a->started++;
        wd_warn("alert %lld: %s", (long long)k->rec.id, why);
        finish(a, k->rec.id, 0, why);
    }
    if (have_fa)
        posix_spawn_file_actions_destroy(&fa);
    if (have_attr)
        posix_spawnattr_destroy(&attr);
    if (mine)
        for (size_t i = 0; i < npairs; i++)
            free(mine[i]);
    free(mine);
    free(envp);
}

static int start_due(wd_alerts *a, db *d)
{
    double now = wd_now_mono();
    int free_slots = a->o.max_running - a->n_running;
    if (!a->command[0] || free_slots <= 0 || now < a->next_query || a->n_done == MAX_DONE)
        return 0;
    candidate *c = calloc(MAX_CANDIDATES, sizeof *c);
    if (!c)
        return 0;
    collect col = {.a = a,
                   .now_real = wd_now_real(),
                   .n = 0,
                   .max = free_slots < MAX_CANDIDATES ? free_slots : MAX_CANDIDATES,
                   .c = c};
    sw_error err;
    sw_error_clear(&err);
    sw_status st = db_alerts_pending(d, a->o.max_attempts, collect_cb, &col, &err);
    if (st != SW_OK && st != SW_EBUSY)
        wd_warn("alert: %s", err.msg);
    for (int i = 0; i < col.n; i++)
        start(a, d, &c[i]);
    /* Look again soon while commands run or wait; else at the retry horizon, capped so that new
     * alerts from the store are taken within a second. */
    a->next_query = now + 1.0;
    int n = col.n;
    free(c);
    return n;
}

void wd_alerts_step(wd_alerts *a, db *d)
{
    if (!a)
        return;
    reap(a);
    if (d) {
        record(a, d);
        start_due(a, d);
    }
}

void wd_alerts_drain(wd_alerts *a, db *d, int start_new)
{
    if (!a)
        return;
    /* Every command is bounded by its time limit; a bound on the whole wait keeps a store that
     * stays locked from holding the exit for ever. Without new starts (a service stopping) the
     * wait is one time limit, within systemd's TimeoutStopSec. */
    double deadline = wd_now_mono() + (start_new ? a->o.timeout_s * 4 + 5 : a->o.timeout_s + 2);
    a->draining = 1;
    while (wd_now_mono() < deadline) {
        reap(a);
        if (d)
            record(a, d);
        int started = 0;
        if (d && start_new) {
            a->next_query = 0;
            started = start_due(a, d);
        }
        if (!a->n_running && !a->n_done && !started)
            break;
        struct timespec ts = {0, 20 * 1000 * 1000};
        nanosleep(&ts, NULL);
    }
    a->draining = 0;
    if (a->n_running || a->n_done)
        wd_warn("alert: %d commands still running and %d outcomes unrecorded at exit", a->n_running,
                a->n_done);
}
