/* watch.c: `slicewarden watch`: the unattended service. Watches the folder (inotify, subfolders
 * too), takes each finished file, groups files into series, measures a series when it is complete
 * or quiet, stores the results in one transaction, moves the files, and runs the alert command.
 * Every step is recorded in the database first, so that a restart after a crash resumes exactly.
 *
 * A file's life (states in the database, db.h; the function that makes each move):
 *
 *   take_file: db_file_add            parse: db_file_parsed           measure_series (one txn):
 *   ---------------------------> seen ----------------------> parsed ----------------------->
 * stored |                            |     db_series_files_transition parse: to_final           |
 * |     (parsed -> measured -> stored) (unreadable, not DICOM, ...)   v v quarantined (reason) <---
 * measure_series: unreadable pixels, series failed ignored (reason)     <--- parse: not MR, not a
 * phantom series, duplicate SOP instance, late for a measured series; measure_series: content check
 * failed The transaction that makes a state final also records the file's target (reserve:
 *   db_file_set_location); after the commit, finish_move writes NAME.reason.txt beside quarantined
 *   and ignored files and moves the file (never overwriting). What take_file learns of one file is
 *   one transaction (txn_begin .. txn_commit, with its mirror in memory undone on a rollback); a
 *   series' measurement is another.
 *
 * Resumption: the start-up scan meets every file still in the folder again; db_file_add knows it
 * by path and content and take_file continues from its state (a final file still in the folder is
 * moved; a recorded target that already holds the same bytes means the move had finished and only
 * the source is left). Series not yet stored are rebuilt from the database (rebuild). */
#include <dirent.h>
#include <errno.h>
#include <fcntl.h>
#include <getopt.h>
#include <math.h>
#include <poll.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/file.h>
#include <sys/inotify.h>
#include <sys/signalfd.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#ifdef SW_HAVE_SYSTEMD
#include <systemd/sd-daemon.h>
#endif

#include "config.h"
#include "trends.h"
#include "watch.h"
#include "wd.h"

/* ---- settings: everything a reload replaces ---- */

typedef struct overrides {
    const char *folder, *database;
    double quiet; /* < 0: from the file */
} overrides;

typedef wd_settings settings;

static void settings_hash(settings *s)
{
    char *text = NULL;
    size_t len = 0;
    FILE *f = open_memstream(&text, &len);
    if (!f) {
        sw_strlcpy(s->hash, "sha256:unknown", sizeof s->hash);
        return;
    }
    wd_config_print(&s->cfg, f);
    wd_model_print(&s->model, f);
    wd_tolerances_print(&s->tol, f);
    fprintf(f, "half_level=%d slot_correction=%d step=%g\n", s->params.half_level,
            s->params.slot_correction, s->params.sample_step_mm);
    fclose(f);
    /* The first line names the file read; the hash is of the settings, not of where they were. */
    const char *body = strchr(text, '\n');
    body = body ? body + 1 : text;
    wd_sha256_text(body, strlen(body), s->hash);
    free(text);
}

/* Makes a relative path (not empty) absolute against the working folder, in place. */
static sw_status absolute(char *p, size_t n, sw_error *err)
{
    char cwd[PATH_MAX], buf[PATH_MAX * 2];
    if (!p[0] || p[0] == '/')
        return SW_OK;
    if (!getcwd(cwd, sizeof cwd))
        return sw_error_set(err, SW_EIO, "working folder: %s", strerror(errno));
    snprintf(buf, sizeof buf, "%s/%s", cwd, p);
    if (strlen(buf) >= n)
        return sw_error_set(err, SW_EINVAL, "%s: path too long", p);
    sw_strlcpy(p, buf, n);
    return SW_OK;
}

sw_status wd_settings_load(const char *path, const char *folder, const char *database, double quiet,
                           wd_settings *s, sw_error *err)
{
    sw_status rc = SW_OK;
    wd_config_default(&s->cfg);
    if (path && (rc = wd_config_load(&s->cfg, path, err)) != SW_OK)
        return rc;
    if (folder &&
        sw_strlcpy(s->cfg.folder, folder, sizeof s->cfg.folder) >= sizeof s->cfg.folder - 1)
        return sw_error_set(err, SW_EINVAL, "--folder: path too long");
    if (database &&
        sw_strlcpy(s->cfg.database, database, sizeof s->cfg.database) >= sizeof s->cfg.database - 1)
        return sw_error_set(err, SW_EINVAL, "--db: path too long");
    if (quiet >= 0)
        s->cfg.quiet_seconds = quiet;
    /* Paths are stored in the database: make them absolute, so that they mean the same after a
     * restart from another working folder. */
    char real[PATH_MAX];
    if (realpath(s->cfg.folder, real))
        sw_strlcpy(s->cfg.folder, real, sizeof s->cfg.folder);
    char *const rel[] = {s->cfg.database, s->cfg.archive, s->cfg.quarantine, s->cfg.ignored,
                         s->cfg.images};
    for (size_t i = 0; i < sizeof rel / sizeof rel[0]; i++)
        if ((rc = absolute(rel[i], sizeof s->cfg.folder, err)) != SW_OK)
            return rc;
    wd_config_resolve(&s->cfg);
    if ((rc = an_model_large(&s->model)) != SW_OK)
        return sw_error_set(err, rc, "the built-in phantom model could not be read (%s)",
                            s->model.name);
    if (s->cfg.model_file[0] && (rc = wd_model_load(&s->model, s->cfg.model_file, err)) != SW_OK)
        return rc;
    wd_tolerances_default(&s->tol);
    if (s->cfg.tolerance_file[0] &&
        (rc = wd_tolerances_load(&s->tol, s->cfg.tolerance_file, err)) != SW_OK)
        return rc;
    an_params_default(&s->params);
    s->params.half_level = (an_half_level)s->cfg.half_level;
    /* The output folders must not be inside the watch folder: their files would come back in. */
    const char *outs[][2] = {{"archive", s->cfg.archive},
                             {"quarantine", s->cfg.quarantine},
                             {"ignored", s->cfg.ignored},
                             {"images", s->cfg.images}};
    for (size_t i = 0; i < sizeof outs / sizeof outs[0]; i++)
        if ((s->cfg.move_files || i == 3) && wd_path_inside(outs[i][1], s->cfg.folder))
            return sw_error_set(err, SW_EINVAL, "%s folder %s is inside the watch folder %s",
                                outs[i][0], outs[i][1], s->cfg.folder);
    /* Nor the database: the service would take its own files (and its -wal, -shm and .lock) for
     * arrivals. */
    char dbdir[PATH_MAX];
    sw_strlcpy(dbdir, s->cfg.database, sizeof dbdir);
    char *slash = strrchr(dbdir, '/');
    if (slash)
        *slash = '\0';
    if (wd_path_inside(s->cfg.database, s->cfg.folder) ||
        (slash && wd_path_inside(dbdir, s->cfg.folder)))
        return sw_error_set(err, SW_EINVAL, "the database %s is inside the watch folder %s",
                            s->cfg.database, s->cfg.folder);
    settings_hash(s);
    return SW_OK;
}

static sw_status settings_load(const char *path, const overrides *o, settings *s, sw_error *err)
{
    return wd_settings_load(path, o->folder, o->database, o->quiet, s, err);
}

/* ---- a set of strings (paths queued), open addressing with backward-shift deletion ---- */

typedef struct strset {
    const char **slot;
    size_t cap, n; /* cap is a power of two */
} strset;

static size_t str_hash(const char *s)
{
    size_t h = 1469598103934665603ull; /* FNV-1a */
    for (; *s; s++)
        h = (h ^ (unsigned char)*s) * 1099511628211ull;
    return h;
}

static int set_grow(strset *t)
{
    size_t cap = t->cap ? t->cap * 2 : 1024;
    const char **slot = calloc(cap, sizeof *slot);
    if (!slot)
        return -1;
    for (size_t i = 0; i < t->cap; i++)
        if (t->slot[i]) {
            size_t j = str_hash(t->slot[i]) & (cap - 1);
            while (slot[j])
                j = (j + 1) & (cap - 1);
            slot[j] = t->slot[i];
        }
    free(t->slot);
    t->slot = slot;
    t->cap = cap;
    return 0;
}

static int set_has(const strset *t, const char *s)
{
    if (!t->cap)
        return 0;
    for (size_t j = str_hash(s) & (t->cap - 1); t->slot[j]; j = (j + 1) & (t->cap - 1))
        if (!strcmp(t->slot[j], s))
            return 1;
    return 0;
}

static int set_add(strset *t, const char *s)
{
    if ((t->n + 1) * 2 > t->cap && set_grow(t))
        return -1;
    size_t j = str_hash(s) & (t->cap - 1);
    while (t->slot[j])
        j = (j + 1) & (t->cap - 1);
    t->slot[j] = s;
    t->n++;
    return 0;
}

static void set_del(strset *t, const char *s)
{
    if (!t->cap)
        return;
    size_t m = t->cap - 1, j = str_hash(s) & m;
    while (t->slot[j] && strcmp(t->slot[j], s))
        j = (j + 1) & m;
    if (!t->slot[j])
        return;
    t->slot[j] = NULL;
    t->n--;
    /* Shift back the entries of the run after the hole that no longer find their way. */
    for (size_t k = (j + 1) & m; t->slot[k]; k = (k + 1) & m) {
        size_t home = str_hash(t->slot[k]) & m;
        int between = j <= k ? (home > j && home <= k) : (home > j || home <= k);
        if (!between) {
            t->slot[j] = t->slot[k];
            t->slot[k] = NULL;
            j = k;
        }
    }
}

/* ---- the queue of paths to look at ---- */

typedef struct qitem {
    char *path;
    double due; /* monotonic */
    int tries;
    int scanned; /* found by listing a folder, not announced finished by inotify */
} qitem;

typedef struct queue {
    qitem *ready;
    size_t head, n, cap; /* ready[head .. n) */
    qitem *late;
    size_t nlate, caplate;
    strset set;
} queue;

static size_t queue_len(const queue *q)
{
    return q->n - q->head + q->nlate;
}

static int push_item(qitem **v, size_t *n, size_t *cap, qitem it)
{
    if (*n == *cap) {
        size_t c = *cap ? *cap * 2 : 256;
        qitem *nv = realloc(*v, c * sizeof *nv);
        if (!nv)
            return -1;
        *v = nv;
        *cap = c;
    }
    (*v)[(*n)++] = it;
    return 0;
}

/* Queues a copy of path (once: a path already queued is not queued again). */
static int enqueue_item(queue *q, const char *path, double delay, int tries, int scanned)
{
    if (set_has(&q->set, path))
        return 0;
    qitem it = {
        .path = strdup(path), .due = wd_now_mono() + delay, .tries = tries, .scanned = scanned};
    if (!it.path)
        return -1;
    int rc = delay > 0 ? push_item(&q->late, &q->nlate, &q->caplate, it)
                       : push_item(&q->ready, &q->n, &q->cap, it);
    if (rc || set_add(&q->set, it.path)) {
        /* Keep what was pushed consistent: an item in a vector must be in the set. */
        if (!rc) {
            if (delay > 0)
                q->nlate--;
            else
                q->n--;
        }
        free(it.path);
        return -1;
    }
    return 0;
}

static int enqueue(queue *q, const char *path, double delay, int tries)
{
    return enqueue_item(q, path, delay, tries, 0);
}

static void promote_due(queue *q)
{
    double now = wd_now_mono();
    for (size_t i = 0; i < q->nlate;) {
        if (q->late[i].due <= now && !push_item(&q->ready, &q->n, &q->cap, q->late[i])) {
            q->late[i] = q->late[--q->nlate];
            continue;
        }
        i++;
    }
}

static double next_due(const queue *q)
{
    double t = INFINITY;
    for (size_t i = 0; i < q->nlate; i++)
        if (q->late[i].due < t)
            t = q->late[i].due;
    return t;
}

/* Takes the next ready item; the caller owns it->path. */
static int dequeue(queue *q, qitem *it)
{
    if (q->head == q->n)
        return 0;
    *it = q->ready[q->head++];
    set_del(&q->set, it->path);
    if (q->head == q->n)
        q->head = q->n = 0;
    else if (q->head > 4096 && q->head * 2 > q->n) {
        memmove(q->ready, q->ready + q->head, (q->n - q->head) * sizeof *q->ready);
        q->n -= q->head;
        q->head = 0;
    }
    return 1;
}

static void queue_free(queue *q)
{
    for (size_t i = q->head; i < q->n; i++)
        free(q->ready[i].path);
    for (size_t i = 0; i < q->nlate; i++)
        free(q->late[i].path);
    free(q->ready);
    free(q->late);
    free(q->set.slot);
    memset(q, 0, sizeof *q);
}

/* ---- series being collected ---- */

#define ECHO_SLOTS (WD_MAX_ECHOES + 2) /* [1..WD_MAX_ECHOES], the last counts any other number */

typedef struct wfile {
    int64_t id;
    char *path;
    char hash[WD_HASH_MAX];
    int count[ECHO_SLOTS]; /* images per echo number */
} wfile;

typedef struct wseries {
    int64_t id, scanner_id;
    char uid[DCM_UID_MAX];
    char station[DCM_STR_MAX], serial[DCM_STR_MAX], label[DCM_STR_MAX];
    char date[9];
    int number;
    char acq_type[17];
    wd_match match;
    db_series_state state;
    int echoes_expected; /* 0: unknown (the quiet period decides) */
    int nfiles, cap;
    wfile *files;
    double last_arrival; /* epoch seconds */
    double retry_at;     /* monotonic; after a busy store, or while looking for moved files */
    int looks;           /* times measuring waited for files missing from their recorded paths */
    int retries;         /* measurements of it that failed for want of memory, I/O or the store */
} wseries;

static void series_free(wseries *s)
{
    if (!s)
        return;
    for (int i = 0; i < s->nfiles; i++)
        free(s->files[i].path);
    free(s->files);
    free(s);
}

/* ---- the watcher ---- */

typedef struct wmap {
    int wd;
    char *path;
} wmap;

typedef struct stats {
    long files_done, stored, quarantined, ignored, moved, removed_copies, move_failures;
    long series_measured, series_failed, verdict[DB_NVERDICTS];
    long alerts_recorded;
} stats;

typedef struct watcher {
    settings *s;
    const char *config_path;
    overrides ov;
    int once, progress, tty, no_png;
    db *d;
    int ifd, sfd, lockfd;
    wmap *map;
    size_t nmap, capmap;
    int watch_failed; /* watches could not all be set: rescan now and then */
    int listing_lost; /* a folder or a file of a listing was dropped (out of memory, unreadable) */
    char **dirs;      /* folders waiting to be scanned */
    size_t ndirs, capdirs;
    queue q;
    wseries **series;
    int nseries, capseries;
    wd_alerts *alerts;
    stats st;
    int stop, reload;
    double started, last_draw, watchdog_every, last_ping, last_status, next_rescan;
    long files_total; /* --once progress: files found at the start */
    /* Moves wait until the database says where each file goes (jobs, run_jobs). Within one of
     * take_file's transactions, what changed in memory is noted so that a rollback undoes it. */
    struct job *jobs;
    size_t njobs, capjobs, jobs_mark;
    int in_txn;
    struct undo *undo;
    size_t nundo, capundo;
} watcher;

typedef struct job {
    int64_t id, series_id;
    char *path, *reason, *location;
    char hash[WD_HASH_MAX];
    db_file_state state;
} job;

typedef struct undo {
    int64_t series_id, file_id; /* file_id 0: the series itself was added */
} undo;

static void notify(const char *what)
{
#ifdef SW_HAVE_SYSTEMD
    sd_notify(0, what);
#else
    (void)what;
#endif
}

/* ---- progress (only --once on a terminal) ---- */

static void progress_clear(watcher *w)
{
    if (w->progress)
        fputs("\r\033[K", stderr);
}

static void progress_draw(watcher *w, int force)
{
    if (!w->progress)
        return;
    double now = wd_now_mono();
    if (!force && now - w->last_draw < 0.1)
        return;
    w->last_draw = now;
    double el = now - w->started;
    double rate = el > 0 ? w->st.files_done / el : 0;
    long total = w->files_total > w->st.files_done ? w->files_total : w->st.files_done;
    int width = 24, fill = total ? (int)(width * w->st.files_done / total) : 0;
    char bar[32];
    for (int i = 0; i < width; i++)
        bar[i] = i < fill ? '#' : '.';
    bar[width] = '\0';
    char left[32] = "--:--";
    if (rate > 0 && total > w->st.files_done) {
        long sec = (long)((total - w->st.files_done) / rate + 0.5);
        snprintf(left, sizeof left, "%ld:%02ld", sec / 60, sec % 60);
    }
    fprintf(stderr, "\r\033[K[%s] %ld/%ld files, %ld series, %.1f files/s, %s left", bar,
            w->st.files_done, total, w->st.series_measured + w->st.series_failed, rate, left);
    fflush(stderr);
}

/* ---- folders and inotify ---- */

static const char *map_path(const watcher *w, int wd)
{
    size_t lo = 0, hi = w->nmap;
    while (lo < hi) {
        size_t mid = (lo + hi) / 2;
        if (w->map[mid].wd == wd)
            return w->map[mid].path;
        if (w->map[mid].wd < wd)
            lo = mid + 1;
        else
            hi = mid;
    }
    return NULL;
}

static void map_set(watcher *w, int wd, const char *path)
{
    size_t lo = 0, hi = w->nmap;
    while (lo < hi) {
        size_t mid = (lo + hi) / 2;
        if (w->map[mid].wd < wd)
            lo = mid + 1;
        else
            hi = mid;
    }
    char *copy = strdup(path);
    if (!copy)
        return;
    if (lo < w->nmap && w->map[lo].wd == wd) {
        free(w->map[lo].path); /* the same folder under a new name (moved) */
        w->map[lo].path = copy;
        return;
    }
    if (w->nmap == w->capmap) {
        size_t c = w->capmap ? w->capmap * 2 : 64;
        wmap *m = realloc(w->map, c * sizeof *m);
        if (!m) {
            free(copy);
            return;
        }
        w->map = m;
        w->capmap = c;
    }
    memmove(w->map + lo + 1, w->map + lo, (w->nmap - lo) * sizeof *w->map);
    w->map[lo].wd = wd;
    w->map[lo].path = copy;
    w->nmap++;
}

static void map_del(watcher *w, int wd)
{
    for (size_t i = 0; i < w->nmap; i++)
        if (w->map[i].wd == wd) {
            free(w->map[i].path);
            memmove(w->map + i, w->map + i + 1, (w->nmap - i - 1) * sizeof *w->map);
            w->nmap--;
            return;
        }
}

static void add_watch(watcher *w, const char *dir)
{
    if (w->ifd < 0)
        return;
    int wd = inotify_add_watch(w->ifd, dir,
                               IN_CLOSE_WRITE | IN_MOVED_TO | IN_CREATE | IN_DELETE_SELF |
                                   IN_MOVE_SELF | IN_ONLYDIR | IN_DONT_FOLLOW | IN_EXCL_UNLINK);
    if (wd < 0) {
        if (!w->watch_failed)
            wd_error("%s: cannot watch: %s; the folder is scanned every minute instead%s", dir,
                     strerror(errno),
                     errno == ENOSPC ? " (raise fs.inotify.max_user_watches)" : "");
        w->watch_failed = 1;
        return;
    }
    map_set(w, wd, dir);
}

/* What a listing could not keep (out of memory, a folder that cannot be read) is not lost: the
 * service lists the whole folder again every minute from then on (as when watches run out), and
 * --once says so and exits 1, so that the next run takes it. */
static void listing_lost(watcher *w, const char *what)
{
    if (!w->listing_lost)
        wd_error("%s: not listed now (%s); %s", what, strerror(errno),
                 w->once ? "left for the next run" : "the folder is listed again every minute");
    w->listing_lost = 1;
    w->watch_failed = 1;
}

/* Queues path again; a path that cannot be queued (out of memory) is left to the next listing. */
static void requeue(watcher *w, const char *path, double delay, int tries)
{
    if (enqueue(&w->q, path, delay, tries) != 0)
        listing_lost(w, path);
}

static void push_dir(watcher *w, const char *dir)
{
    if (w->ndirs == w->capdirs) {
        size_t c = w->capdirs ? w->capdirs * 2 : 32;
        char **v = realloc(w->dirs, c * sizeof *v);
        if (!v) {
            listing_lost(w, dir);
            return;
        }
        w->dirs = v;
        w->capdirs = c;
    }
    char *copy = strdup(dir);
    if (copy)
        w->dirs[w->ndirs++] = copy;
    else
        listing_lost(w, dir);
}

/* Lists one folder: files are queued, subfolders watched and scanned later. The watch is set
 * before the listing, so that a file arriving meanwhile is seen one way or the other. */
/* Lists dir in name order (files queued in order, sub-folders taken in order from the stack), so a
 * backlog laid out by date or series is taken in that order, and runs are repeatable. */
static void scan_dir(watcher *w, const char *dir)
{
    add_watch(w, dir);
    struct dirent **list = NULL;
    int n = scandir(dir, &list, NULL, alphasort);
    if (n < 0) {
        if (errno != ENOENT)
            listing_lost(w, dir);
        return;
    }
    unsigned char *type = calloc((size_t)n + 1, 1);
    char path[PATH_MAX];
    for (int i = 0; i < n; i++) {
        const char *name = list[i]->d_name;
        if (!type || name[0] == '.') /* ".", "..", hidden folders and dot-files of receivers */
            continue;
        if (snprintf(path, sizeof path, "%s/%s", dir, name) >= (int)sizeof path) {
            wd_warn("%s/%s: path too long; left in place", dir, name);
            continue;
        }
        unsigned char t = list[i]->d_type;
        if (t == DT_UNKNOWN) {
            struct stat st;
            if (lstat(path, &st) != 0)
                continue;
            t = S_ISDIR(st.st_mode) ? DT_DIR : S_ISREG(st.st_mode) ? DT_REG : DT_LNK;
        }
        type[i] = t;
        /* Links are queued too: they are recorded (and never followed), see take_link. */
        if ((t == DT_REG || t == DT_LNK) && !wd_name_is_temporary(name))
            if (enqueue_item(&w->q, path, 0, 0, 1) != 0)
                listing_lost(w, path);
    }
    /* The folder stack is last in, first out: push in reverse name order. */
    for (int i = n - 1; i >= 0; i--)
        if (type && type[i] == DT_DIR &&
            snprintf(path, sizeof path, "%s/%s", dir, list[i]->d_name) < (int)sizeof path)
            push_dir(w, path);
    if (!type)
        listing_lost(w, dir);
    for (int i = 0; i < n; i++)
        free(list[i]);
    free(list);
    free(type);
}

static void scan_next_dir(watcher *w)
{
    if (!w->ndirs)
        return;
    char *dir = w->dirs[--w->ndirs];
    scan_dir(w, dir);
    free(dir);
}

static void rescan_all(watcher *w)
{
    push_dir(w, w->s->cfg.folder);
}

static long count_files(const char *dir, int depth)
{
    long n = 0;
    DIR *dp = opendir(dir);
    if (!dp || depth > 64) {
        if (dp)
            closedir(dp);
        return 0;
    }
    struct dirent *de;
    char path[PATH_MAX];
    while ((de = readdir(dp))) {
        if (de->d_name[0] == '.')
            continue;
        if (snprintf(path, sizeof path, "%s/%s", dir, de->d_name) >= (int)sizeof path)
            continue;
        struct stat st;
        if (lstat(path, &st) != 0)
            continue;
        if (S_ISDIR(st.st_mode))
            n += count_files(path, depth + 1);
        else if (S_ISREG(st.st_mode) && !wd_name_is_temporary(de->d_name))
            n++;
    }
    closedir(dp);
    return n;
}

static void read_events(watcher *w)
{
    char buf[16384] __attribute__((aligned(__alignof__(struct inotify_event))));
    char path[PATH_MAX];
    for (;;) {
        ssize_t len = read(w->ifd, buf, sizeof buf);
        if (len <= 0)
            return; /* EAGAIN: drained */
        for (char *p = buf; p < buf + len;) {
            const struct inotify_event *ev = (const struct inotify_event *)p;
            p += sizeof *ev + ev->len;
            if (ev->mask & IN_Q_OVERFLOW) {
                wd_warn("inotify queue overflowed; scanning the whole folder");
                rescan_all(w);
                continue;
            }
            const char *dir = map_path(w, ev->wd);
            if (ev->mask & IN_IGNORED) {
                map_del(w, ev->wd);
                continue;
            }
            if (!dir)
                continue;
            if (ev->mask & (IN_DELETE_SELF | IN_MOVE_SELF)) {
                if (!strcmp(dir, w->s->cfg.folder)) {
                    wd_error("%s: the watch folder was %s", dir,
                             ev->mask & IN_DELETE_SELF ? "deleted" : "moved");
                    w->stop = 2;
                }
                continue;
            }
            if (!ev->len || snprintf(path, sizeof path, "%s/%s", dir, ev->name) >= (int)sizeof path)
                continue;
            if (ev->name[0] == '.')
                continue;
            if (ev->mask & IN_ISDIR) {
                if (ev->mask & (IN_CREATE | IN_MOVED_TO))
                    push_dir(w, path); /* watched and listed: files may be in it already */
                continue;
            }
            struct stat lst;
            if ((ev->mask & IN_CREATE) && !wd_name_is_temporary(ev->name) &&
                lstat(path, &lst) == 0 && S_ISLNK(lst.st_mode))
                requeue(w, path, 0, 0); /* a new symbolic link: recorded, not followed */
            if ((ev->mask & (IN_CLOSE_WRITE | IN_MOVED_TO)) && !wd_name_is_temporary(ev->name))
                requeue(w, path, 0, 0);
        }
    }
}

/* ---- scanners ---- */

typedef struct scanner_look {
    int64_t id;
    char station[DCM_STR_MAX], serial[DCM_STR_MAX], alias[DCM_STR_MAX];
    int found;
} scanner_look;

static int scanner_cb(void *ctx, const db_scanner_rec *r)
{
    scanner_look *s = ctx;
    if (r->id != s->id)
        return 0;
    sw_strlcpy(s->station, r->info.station_name, sizeof s->station);
    sw_strlcpy(s->serial, r->info.device_serial, sizeof s->serial);
    sw_strlcpy(s->alias, r->info.site_alias, sizeof s->alias);
    s->found = 1;
    return 1;
}

static void scanner_dir(const char *station, const char *serial, char *out, size_t n)
{
    if (station && *station)
        wd_safe_component(station, "unknown-scanner", out, n);
    else if (serial && *serial) {
        char raw[DCM_STR_MAX + 8];
        snprintf(raw, sizeof raw, "serial-%s", serial);
        wd_safe_component(raw, "unknown-scanner", out, n);
    } else
        wd_safe_component(NULL, "unknown-scanner", out, n);
}

/* ---- moves ---- */

typedef struct fmove {
    int64_t id;
    const char *path;
    const char *hash;    /* of the bytes at path now (verified by the caller) */
    db_file_state state; /* final */
    const char *reason;
    const char *location; /* recorded target, "" when none */
    int64_t series_id;
} fmove;

static wseries *series_find(watcher *w, int64_t id)
{
    for (int i = 0; i < w->nseries; i++)
        if (w->series[i]->id == id)
            return w->series[i];
    return NULL;
}

typedef struct series_look {
    char uid[DCM_UID_MAX], date[9];
    int number;
    int64_t scanner_id;
    db_series_state state;
    char type[16];
    int echoes_expected;
    int found;
} series_look;

static int series_look_cb(void *ctx, const db_series_rec *r)
{
    series_look *s = ctx;
    sw_strlcpy(s->uid, r->info.series_instance_uid, sizeof s->uid);
    sw_strlcpy(s->date, r->info.series_date, sizeof s->date);
    sw_strlcpy(s->type, r->info.series_type, sizeof s->type);
    s->number = r->info.series_number;
    s->scanner_id = r->scanner_id;
    s->state = r->state;
    s->echoes_expected = r->info.echoes_expected;
    s->found = 1;
    return 0;
}

/* The folder a final file goes to. */
static sw_status target_dir(watcher *w, const fmove *m, char *out, size_t n, sw_error *err)
{
    const wd_config *c = &w->s->cfg;
    if (m->state == DB_FILE_QUARANTINED) {
        snprintf(out, n, "%s", c->quarantine);
        return SW_OK;
    }
    if (m->state == DB_FILE_IGNORED) {
        snprintf(out, n, "%s", c->ignored);
        return SW_OK;
    }
    char scanner[96], series[160];
    wseries *s = series_find(w, m->series_id);
    if (s) {
        scanner_dir(s->station, s->serial, scanner, sizeof scanner);
        wd_series_dir_name(s->date, s->number, s->uid, series, sizeof series);
    } else {
        series_look sl;
        memset(&sl, 0, sizeof sl);
        sw_status rc = db_series_get(w->d, m->series_id, series_look_cb, &sl, err);
        if (rc != SW_OK)
            return rc;
        scanner_look sc;
        memset(&sc, 0, sizeof sc);
        sc.id = sl.scanner_id;
        if ((rc = db_scanners_each(w->d, scanner_cb, &sc, err)) != SW_OK)
            return rc;
        scanner_dir(sc.station, sc.serial, scanner, sizeof scanner);
        wd_series_dir_name(sl.date, sl.number, sl.uid, series, sizeof series);
    }
    if (snprintf(out, n, "%s/%s/%s", c->archive, scanner, series) >= (int)n)
        return sw_error_set(err, SW_EINVAL, "archive path too long for %s", m->path);
    return SW_OK;
}

static const char *base_name(const char *path)
{
    const char *s = strrchr(path, '/');
    return s ? s + 1 : path;
}

static void count_final(watcher *w, db_file_state st)
{
    if (st == DB_FILE_STORED)
        w->st.stored++;
    else if (st == DB_FILE_QUARANTINED)
        w->st.quarantined++;
    else if (st == DB_FILE_IGNORED)
        w->st.ignored++;
}

/* Moves a file in a final state out of the watch folder (when moves are configured). SW_EBUSY:
 * the store was locked, try again; SW_EIO: the move failed, the file stays where it is. */
static sw_status finish_move(watcher *w, const fmove *m, sw_error *err)
{
    sw_status rc = SW_OK;
    char dir[PATH_MAX], target[PATH_MAX], reason_path[PATH_MAX + 16], have[WD_HASH_MAX];
    if (!w->s->cfg.move_files)
        return SW_OK;
    target[0] = '\0';
    struct stat at_path, at_loc;
    int same_inode = m->location && *m->location && stat(m->path, &at_path) == 0 &&
                     stat(m->location, &at_loc) == 0 && at_path.st_dev == at_loc.st_dev &&
                     at_path.st_ino == at_loc.st_ino;
    if (m->location && *m->location && !same_inode) {
        sw_error e2;
        sw_error_clear(&e2);
        if (wd_file_hash(m->location, have, &e2) == SW_OK) {
            if (!strcmp(have, m->hash)) {
                /* The move finished before (a copy across file systems that was killed before
                 * the unlink, or the same bytes sent again): the bytes are safe at the target. */
                if (unlink(m->path) != 0 && errno != ENOENT)
                    return sw_error_set(err, SW_EIO, "%s: cannot remove the copy of %s: %s",
                                        m->path, m->location, strerror(errno));
                wd_info("%s: identical to %s, which holds it already; removed", m->path,
                        m->location);
                w->st.removed_copies++;
                return SW_OK;
            }
            /* Someone else's file took the name: pick another. */
        } else if (e2.status == SW_ENOTFOUND) {
            sw_strlcpy(target, m->location, sizeof target);
        }
    }
    for (int attempt = 0; attempt < 8; attempt++) {
        if (!target[0]) {
            if ((rc = target_dir(w, m, dir, sizeof dir, err)) != SW_OK)
                return rc;
            if ((rc = wd_pick_target(dir, base_name(m->path), target, sizeof target, err)) != SW_OK)
                return rc;
            /* Recorded before the move, so that a crash in between finds where it was going. */
            if ((rc = db_file_set_location(w->d, m->id, target, err)) != SW_OK)
                return rc;
        } else {
            char tdir[PATH_MAX];
            sw_strlcpy(tdir, target, sizeof tdir);
            char *slash = strrchr(tdir, '/');
            if (slash && slash != tdir) {
                *slash = '\0';
                if ((rc = wd_mkdirs(tdir, err)) != SW_OK)
                    return rc;
            }
        }
        if (m->state != DB_FILE_STORED) {
            char *text = NULL;
            char now[32];
            db_now_iso(now, sizeof now);
            if (asprintf(&text,
                         "slicewarden %s: %s\nreason: %s\noriginal path: %s\ncontent: %s\n"
                         "file id: %lld\nwhen: %s\n",
                         SW_VERSION, db_file_state_name(m->state), m->reason ? m->reason : "",
                         m->path, m->hash, (long long)m->id, now) < 0)
                return sw_error_set(err, SW_ENOMEM, "out of memory");
            snprintf(reason_path, sizeof reason_path, "%s.reason.txt", target);
            rc = wd_write_text_atomic(reason_path, text, err);
            free(text);
            if (rc != SW_OK)
                return rc;
        }
        sw_error e3;
        sw_error_clear(&e3);
        rc = wd_move_noreplace(m->path, target, &e3);
        if (rc == SW_EBUSY) { /* the name was taken meanwhile: never overwrite, pick again */
            if (m->state != DB_FILE_STORED)
                (void)unlink(reason_path);
            target[0] = '\0';
            continue;
        }
        if (rc == SW_ENOTFOUND) {
            if (m->state != DB_FILE_STORED)
                (void)unlink(reason_path);
            return SW_OK; /* already gone: nothing left to move */
        }
        if (rc != SW_OK) {
            if (m->state != DB_FILE_STORED)
                (void)unlink(reason_path);
            return sw_error_set(err, rc, "%s", e3.msg);
        }
        wd_debug("%s -> %s", m->path, target);
        w->st.moved++;
        return SW_OK;
    }
    return sw_error_set(err, SW_EIO, "%s: no free name in the target folder", m->path);
}

/* A move that failed is tried again later; the file stays where it is, nothing is lost. */
static int move_or_report(watcher *w, const fmove *m)
{
    sw_error err;
    sw_error_clear(&err);
    sw_status rc = finish_move(w, m, &err);
    if (rc == SW_OK)
        return 0;
    if (rc == SW_EBUSY) {
        requeue(w, m->path, 1.0, 1);
        return -1;
    }
    w->st.move_failures++;
    if (w->once) {
        /* --once does not wait for a folder to be fixed: the next run moves it. */
        wd_error("%s: %s; left in place for the next run", m->path, err.msg);
        return -1;
    }
    wd_error("%s: %s; left in place, tried again in 30 s", m->path, err.msg);
    requeue(w, m->path, 30.0, 1);
    return -1;
}

/* A move for later (when no transaction is open); strings are copied. */
static void push_job(watcher *w, const fmove *m)
{
    if (w->njobs == w->capjobs) {
        size_t c = w->capjobs ? w->capjobs * 2 : 64;
        job *v = realloc(w->jobs, c * sizeof *v);
        if (!v)
            goto lost;
        w->jobs = v;
        w->capjobs = c;
    }
    job *j = &w->jobs[w->njobs];
    memset(j, 0, sizeof *j);
    j->id = m->id;
    j->series_id = m->series_id;
    j->state = m->state;
    sw_strlcpy(j->hash, m->hash, sizeof j->hash);
    j->path = strdup(m->path);
    j->reason = strdup(m->reason ? m->reason : "");
    j->location = strdup(m->location ? m->location : "");
    if (!j->path || !j->reason || !j->location) {
        free(j->path);
        free(j->reason);
        free(j->location);
        goto lost;
    }
    w->njobs++;
    return;
lost:
    /* Out of memory: the file stays in the folder in its final state; the next listing moves it. */
    wd_error("%s: out of memory; moved at the next start", m->path);
}

static void job_free(job *j)
{
    free(j->path);
    free(j->reason);
    free(j->location);
}

static int move_or_report(watcher *w, const fmove *m);

static void run_jobs(watcher *w)
{
    if (w->in_txn)
        return;
    /* Taken one by one from the front: a move may queue nothing here, but keep it simple. */
    for (size_t i = 0; i < w->njobs; i++) {
        job *j = &w->jobs[i];
        fmove m = {.id = j->id,
                   .path = j->path,
                   .hash = j->hash,
                   .state = j->state,
                   .reason = j->reason,
                   .location = j->location,
                   .series_id = j->series_id};
        (void)move_or_report(w, &m);
        job_free(j);
    }
    w->njobs = 0;
}

/* Picks the target of a file in a final state and records it, in the caller's transaction, so
 * that the move after the commit is already known to the store. Best effort: when no target can
 * be picked now (a folder not writable), the move picks again and reports. */
static void reserve(watcher *w, fmove *m, char *target, size_t n)
{
    char dir[PATH_MAX];
    sw_error err;
    sw_error_clear(&err);
    target[0] = '\0';
    m->location = target;
    if (!w->s->cfg.move_files)
        return;
    if (target_dir(w, m, dir, sizeof dir, &err) != SW_OK ||
        wd_pick_target(dir, base_name(m->path), target, n, &err) != SW_OK ||
        db_file_set_location(w->d, m->id, target, &err) != SW_OK) {
        wd_debug("%s: no target yet: %s", m->path, err.msg);
        target[0] = '\0';
    }
}

/* Moves a file to a final state with a reason; its move follows when no transaction is open. */
static sw_status to_final(watcher *w, int64_t id, const char *path, const char *hash,
                          db_file_state from, db_file_state to, const char *reason,
                          int64_t series_id, sw_error *err)
{
    sw_status rc = db_file_transition(w->d, id, from, to, reason, err);
    if (rc != SW_OK)
        return rc;
    if (to == DB_FILE_QUARANTINED)
        wd_warn("%s: quarantined: %s", path, reason);
    else
        wd_info("%s: ignored: %s", path, reason);
    count_final(w, to);
    char target[PATH_MAX];
    fmove m = {.id = id,
               .path = path,
               .hash = hash,
               .state = to,
               .reason = reason,
               .location = "",
               .series_id = series_id};
    reserve(w, &m, target, sizeof target);
    push_job(w, &m);
    return SW_OK;
}

/* ---- take_file's transaction: the store's changes and their mirror in memory ---- */

static void note_undo(watcher *w, int64_t series_id, int64_t file_id)
{
    if (!w->in_txn)
        return;
    if (w->nundo == w->capundo) {
        size_t c = w->capundo ? w->capundo * 2 : 16;
        undo *v = realloc(w->undo, c * sizeof *v);
        if (!v)
            return;
        w->undo = v;
        w->capundo = c;
    }
    w->undo[w->nundo].series_id = series_id;
    w->undo[w->nundo].file_id = file_id;
    w->nundo++;
}

static sw_status txn_begin(watcher *w, sw_error *err)
{
    sw_status rc = db_begin(w->d, err);
    if (rc == SW_OK) {
        w->in_txn = 1;
        w->nundo = 0;
        w->jobs_mark = w->njobs;
    }
    return rc;
}

static void series_remove(watcher *w, struct wseries *s);
static struct wseries *series_find(watcher *w, int64_t id);

/* Rolls back, and takes back what the transaction did in memory and queued. */
static void txn_rollback(watcher *w)
{
    (void)db_rollback(w->d, NULL);
    w->in_txn = 0;
    for (size_t i = w->nundo; i-- > 0;) {
        struct wseries *s = series_find(w, w->undo[i].series_id);
        if (!s)
            continue;
        if (!w->undo[i].file_id) {
            series_remove(w, s);
            continue;
        }
        for (int k = 0; k < s->nfiles; k++)
            if (s->files[k].id == w->undo[i].file_id) {
                free(s->files[k].path);
                s->files[k] = s->files[--s->nfiles];
                break;
            }
    }
    w->nundo = 0;
    while (w->njobs > w->jobs_mark)
        job_free(&w->jobs[--w->njobs]);
}

static sw_status txn_commit(watcher *w, sw_error *err)
{
    sw_status rc = db_commit(w->d, err);
    if (rc != SW_OK) {
        w->in_txn = 1; /* db_commit rolled the store back; take back memory as well */
        txn_rollback(w);
        return rc;
    }
    w->in_txn = 0;
    w->nundo = 0;
    return SW_OK;
}

/* ---- series assembly ---- */

static int slot_of(int echo)
{
    if (echo <= 0)
        return 1; /* absent EchoNumbers: the pipeline counts it as echo 1 */
    return echo <= WD_MAX_ECHOES ? echo : WD_MAX_ECHOES + 1;
}

static int max_echo(const wfile *f)
{
    for (int e = ECHO_SLOTS - 1; e >= 1; e--)
        if (f->count[e])
            return e;
    return 0;
}

static int series_complete(const watcher *w, const wseries *s)
{
    int n_slices = w->s->model.n_slices, E = s->echoes_expected;
    if (E <= 0)
        return 0;
    int total[ECHO_SLOTS] = {0};
    for (int i = 0; i < s->nfiles; i++)
        for (int e = 1; e < ECHO_SLOTS; e++)
            total[e] += s->files[i].count[e];
    for (int e = 1; e <= E; e++)
        if (total[e] < n_slices)
            return 0;
    return 1;
}

/* Whether a series matched on content only looks like the phantom series: every echo from 1 has
 * exactly the model's number of slices. why says what it has otherwise. */
static int content_fits(const watcher *w, const wseries *s, char *why, size_t n)
{
    int n_slices = w->s->model.n_slices, total[ECHO_SLOTS] = {0}, echoes = 0;
    for (int i = 0; i < s->nfiles; i++)
        for (int e = 1; e < ECHO_SLOTS; e++)
            total[e] += s->files[i].count[e];
    for (int e = 1; e < ECHO_SLOTS; e++)
        if (total[e])
            echoes = e;
    for (int e = 1; e <= echoes; e++)
        if (total[e] != n_slices || e == ECHO_SLOTS - 1) {
            snprintf(why, n,
                     "not a phantom series: its name matches no [match] pattern and echo %d has "
                     "%d images, not %d",
                     e, total[e], n_slices);
            return 0;
        }
    if (!echoes) {
        snprintf(why, n, "not a phantom series: no images");
        return 0;
    }
    return 1;
}

static void file_counts(const dcm_file *f, wfile *wf)
{
    memset(wf->count, 0, sizeof wf->count);
    for (int i = 0; i < f->nframes; i++)
        wf->count[slot_of(f->frames[i].echo_number)]++;
}

static double arrival_of(const struct timespec *mt, const struct timespec *ct)
{
    double a = (double)mt->tv_sec + mt->tv_nsec * 1e-9;
    double b = (double)ct->tv_sec + ct->tv_nsec * 1e-9;
    return a > b ? a : b;
}

static wseries *series_add(watcher *w, int64_t id)
{
    wseries *s = series_find(w, id);
    if (s)
        return s;
    if (w->nseries == w->capseries) {
        int c = w->capseries ? w->capseries * 2 : 16;
        wseries **v = realloc(w->series, (size_t)c * sizeof *v);
        if (!v)
            return NULL;
        w->series = v;
        w->capseries = c;
    }
    if (!(s = calloc(1, sizeof *s)))
        return NULL;
    s->id = id;
    s->state = DB_SERIES_COLLECTING;
    w->series[w->nseries++] = s;
    note_undo(w, id, 0);
    return s;
}

static void series_remove(watcher *w, wseries *s)
{
    for (int i = 0; i < w->nseries; i++)
        if (w->series[i] == s) {
            w->series[i] = w->series[--w->nseries];
            break;
        }
    series_free(s);
}

static void series_fill(wseries *s, const dcm_image *d, int64_t scanner_id, const char *label)
{
    s->scanner_id = scanner_id;
    sw_strlcpy(s->uid, d->series_instance_uid, sizeof s->uid);
    sw_strlcpy(s->station, d->station_name, sizeof s->station);
    sw_strlcpy(s->serial, d->device_serial, sizeof s->serial);
    sw_strlcpy(s->label, label, sizeof s->label);
    sw_strlcpy(s->date, d->series_date[0] ? d->series_date : d->acquisition_date, sizeof s->date);
    sw_strlcpy(s->acq_type, d->mr_acquisition_type, sizeof s->acq_type);
    s->number = d->series_number;
}

/* Adds a parsed file to its series in memory (once). */
static int attach(watcher *w, wseries *s, int64_t id, const char *path, const char *hash,
                  const dcm_file *f, double arrival)
{
    for (int i = 0; i < s->nfiles; i++)
        if (s->files[i].id == id)
            return 0;
    if (s->nfiles == s->cap) {
        int c = s->cap ? s->cap * 2 : 16;
        wfile *v = realloc(s->files, (size_t)c * sizeof *v);
        if (!v)
            return -1;
        s->files = v;
        s->cap = c;
    }
    wfile *wf = &s->files[s->nfiles];
    memset(wf, 0, sizeof *wf);
    if (!(wf->path = strdup(path)))
        return -1;
    wf->id = id;
    sw_strlcpy(wf->hash, hash, sizeof wf->hash);
    file_counts(f, wf);
    s->nfiles++;
    note_undo(w, s->id, id);
    int me = max_echo(wf);
    if (s->echoes_expected > 0 && me > s->echoes_expected)
        s->echoes_expected = me > WD_MAX_ECHOES ? WD_MAX_ECHOES : me;
    if (w->once)
        arrival = arrival > 0 ? arrival : wd_now_real();
    else
        arrival = wd_now_real() > arrival ? wd_now_real() : arrival;
    if (arrival > s->last_arrival)
        s->last_arrival = arrival;
    return 0;
}

/* ---- a crash while reading a file or measuring a series ----
 * A file or series that makes the program crash (a decoder or analysis fault on odd input) would
 * crash it again at every restart and stop the QA of every scanner. So, while such work is in
 * hand, a note names it; a handler for the fatal signals writes the note beside the database
 * (DATABASE.crash) and lets the signal take its course. The next start quarantines that file, or
 * fails that series, with the reason. kill -9 cannot be caught and leaves no note: an interrupted
 * series is simply measured again. */

static char crash_note[PATH_MAX + 160];
static char crash_file[PATH_MAX + 8];
static struct sigaction crash_old[NSIG];
static const int crash_sigs[] = {SIGSEGV, SIGBUS, SIGFPE, SIGILL, SIGABRT};

static void on_crash(int sig)
{
    if (crash_note[0] && crash_file[0]) {
        int fd = open(crash_file, O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0640);
        if (fd >= 0) {
            char num[16];
            int k = (int)sizeof num;
            unsigned v = (unsigned)sig;
            num[--k] = '\n';
            do
                num[--k] = (char)('0' + v % 10);
            while ((v /= 10) && k > 0);
            (void)!write(fd, num + k, sizeof num - (size_t)k);
            (void)!write(fd, crash_note, strlen(crash_note));
            (void)fsync(fd);
            close(fd);
        }
    }
    /* Whoever handled it before (the default, or a sanitizer) takes it from here. */
    sigaction(sig, &crash_old[sig], NULL);
    raise(sig);
}

static void crash_guard(const char *database)
{
    snprintf(crash_file, sizeof crash_file, "%s.crash", database);
    struct sigaction sa;
    memset(&sa, 0, sizeof sa);
    sa.sa_handler = on_crash;
    sigemptyset(&sa.sa_mask);
    for (size_t i = 0; i < sizeof crash_sigs / sizeof crash_sigs[0]; i++)
        sigaction(crash_sigs[i], &sa, &crash_old[crash_sigs[i]]);
}

/* Test hook (fault injection for tests/e2e/e2e_crash.py): a crash on purpose where a faulty
 * decoder or analysis would crash, when the environment names the file or the series. */
static void crash_test_hook(const char *what, const char *name)
{
    const char *want = getenv(!strcmp(what, "series") ? "SLICEWARDEN_TEST_CRASH_SERIES"
                                                      : "SLICEWARDEN_TEST_CRASH_FILE");
    if (want && *want && name && strstr(name, want))
        raise(SIGSEGV);
}

static void note_file(const char *path, const char *hash)
{
    snprintf(crash_note, sizeof crash_note, "file %s %s\n", hash, path);
}

static void note_series(int64_t id)
{
    snprintf(crash_note, sizeof crash_note, "series %lld\n", (long long)id);
}

static void note_clear(void)
{
    crash_note[0] = '\0';
}

typedef struct crash_info {
    int sig;
    int64_t series_id;
    char hash[WD_HASH_MAX];
    char path[PATH_MAX];
    int have;
} crash_info;

/* Reads and removes the note a crash left. */
static void crash_read(crash_info *ci)
{
    memset(ci, 0, sizeof *ci);
    FILE *f = fopen(crash_file, "r");
    if (!f)
        return;
    char line[PATH_MAX + 200];
    if (fgets(line, sizeof line, f))
        ci->sig = atoi(line);
    if (fgets(line, sizeof line, f)) {
        line[strcspn(line, "\n")] = '\0';
        long long id = 0;
        if (sscanf(line, "series %lld", &id) == 1 && id > 0) {
            ci->series_id = id;
            ci->have = 1;
        } else if (!strncmp(line, "file ", 5)) {
            char *sp = strchr(line + 5, ' ');
            if (sp) {
                *sp = '\0';
                sw_strlcpy(ci->hash, line + 5, sizeof ci->hash);
                sw_strlcpy(ci->path, sp + 1, sizeof ci->path);
                ci->have = 1;
            }
        }
    }
    fclose(f);
    (void)unlink(crash_file);
}

/* ---- taking one file ---- */

enum { TAKEN = 0, RETRY, SKIPPED, SETTLE };

/* A file or series that fails for a reason of this machine's (out of memory, a full disk, an I/O
 * error: the reader buffers a file in an anonymous memory file), not of its content, is tried
 * again this many times before it is quarantined or failed with the reason: a transient fault
 * never quarantines a good file, and a fault that persists never loops for ever. */
#define TRANSIENT_TRIES 4

static int transient(sw_status st)
{
    return st == SW_ENOMEM || st == SW_EIO;
}

/* Reads a file's bytes as DICOM. DCMTK reports an allocation that failed inside its parser as a
 * malformed-data condition ("Virtual Memory exhausted"), which cannot be told from a damaged file
 * by its status: a refusal is confirmed by a second read of the same bytes before the file is
 * quarantined for it. A damaged file costs one read more; a good one nothing. */
static sw_status read_dicom(const unsigned char *data, size_t len, const char *path, dcm_file **out,
                            sw_error *err)
{
    sw_status rc = dcm_read_buffer(data, len, path, NULL, out, err);
    if (rc == SW_OK || transient(rc))
        return rc;
    sw_error again;
    sw_error_clear(&again);
    dcm_file *f = NULL;
    if (dcm_read_buffer(data, len, path, NULL, &f, &again) != SW_OK) {
        dcm_file_free(f);
        return rc;
    }
    wd_warn("%s; a second read of the same bytes succeeded", err ? err->msg : path);
    if (err)
        sw_error_clear(err);
    *out = f;
    return SW_OK;
}

/* A file found by listing a folder that changed less than this long ago may still be written by
 * a receiver that writes under its final name (storescp does): it waits until it has settled, or
 * until inotify says it was closed. */
#define SETTLE_S 1.0
/* Looking for a series' missing files: how many times, and how long each look waits (longer than
 * a scanned file takes to settle). */
#define MAX_LOOKS 2
#define LOOK_S (2 * SETTLE_S + 0.5)

typedef struct series_state_look {
    db_series_state state;
    int found;
} series_state_look;

static int state_cb(void *ctx, const db_series_rec *r)
{
    series_state_look *s = ctx;
    s->state = r->state;
    s->found = 1;
    return 0;
}

static int db_retryable(sw_status st)
{
    return st == SW_EBUSY || st == SW_EDB || st == SW_EIO;
}

typedef struct file_look {
    db_file_state state;
    int64_t series_id;
    char path[PATH_MAX];
    char hash[WD_HASH_MAX];
    char location[PATH_MAX];
    char reason[512];
    int found;
} file_look;

/* A known file in a final state: only its move is left (TAKEN, or SKIPPED when the move waits). */
static int move_known(watcher *w, int64_t id, const char *path, const char *hash,
                      const file_look *fl, int64_t series_id)
{
    fmove m = {.id = id,
               .path = path,
               .hash = hash,
               .state = fl->state,
               .reason = fl->reason,
               .location = fl->location,
               .series_id = series_id};
    return move_or_report(w, &m) == 0 ? TAKEN : SKIPPED;
}

static int file_cb(void *ctx, const db_file_rec *r)
{
    file_look *f = ctx;
    f->state = r->state;
    f->series_id = r->series_id;
    sw_strlcpy(f->path, r->path, sizeof f->path);
    sw_strlcpy(f->hash, r->content_hash, sizeof f->hash);
    sw_strlcpy(f->location, r->location, sizeof f->location);
    sw_strlcpy(f->reason, r->reason, sizeof f->reason);
    f->found = 1;
    return 0;
}

/* The reason of a row recorded for a file that another row already owns (renamed within the
 * watch folder): such a row's file is never moved on its own. */
#define SAME_FILE "the same file as file "

/* The file at path is file `holder`'s, renamed or moved within the watch folder (a receiver that
 * renames its study folder at the end, or a person tidying up): the holder follows it, and the new
 * row only records the sighting. */
static sw_status follow_rename(watcher *w, int64_t id, const char *path, const char *hash,
                               int64_t holder, const file_look *hl, const char *was, sw_error *err)
{
    char why[PATH_MAX + 96];
    snprintf(why, sizeof why, SAME_FILE "%lld, moved here from %s", (long long)holder, was);
    sw_status rc = db_file_transition(w->d, id, DB_FILE_SEEN, DB_FILE_IGNORED, why, err);
    if (rc == SW_OK)
        rc = db_file_set_location(w->d, holder, path, err);
    if (rc != SW_OK)
        return rc;
    wd_info("%s: file %lld moved within the watch folder (was %s); followed", path,
            (long long)holder, was);
    wseries *s = series_find(w, hl->series_id);
    for (int i = 0; s && i < s->nfiles; i++)
        if (s->files[i].id == holder) {
            char *copy = strdup(path);
            if (copy) {
                free(s->files[i].path);
                s->files[i].path = copy;
            }
        }
    if (hl->state == DB_FILE_STORED) {
        /* Measured and stored, but its move had not happened: it happens from here. */
        fmove m = {.id = holder,
                   .path = path,
                   .hash = hash,
                   .state = DB_FILE_STORED,
                   .reason = "",
                   .location = "",
                   .series_id = hl->series_id};
        push_job(w, &m);
    }
    return SW_OK;
}

/* seen -> parsed (or a final state): reads the file's header and pixels, files it in its series. */
static int parse(watcher *w, int64_t id, const char *path, const wd_blob *b, int tries)
{
    sw_error err;
    sw_error_clear(&err);
    dcm_file *f = NULL;
    sw_status st = SW_OK;
    int result = TAKEN;
    char why[512];
    const char *hash = b->hash;
    sw_status rd = read_dicom(b->data, b->len, path, &f, &err);
    if (rd != SW_OK && transient(rd) && tries < TRANSIENT_TRIES) {
        st = rd; /* the machine's fault, not the file's: nothing recorded, tried again */
        goto out;
    }
    if (rd != SW_OK) {
        /* Still being written? Then the bytes read were not the file's: never quarantine those. */
        char now_hash[WD_HASH_MAX];
        sw_error e2;
        sw_error_clear(&e2);
        if (wd_file_hash(path, now_hash, &e2) == SW_OK && strcmp(now_hash, hash) != 0) {
            sw_error_clear(&err);
            st = db_file_transition(w->d, id, DB_FILE_SEEN, DB_FILE_IGNORED,
                                    "changed while it was read; its new content is taken as a "
                                    "new file",
                                    &err);
            if (st == SW_OK) {
                wd_info("%s: changed while it was read; taken again", path);
                requeue(w, path, SETTLE_S, 0);
            }
            goto out;
        }
        /* Well-formed but not ours (an RT plan, a colour CT): when its header reads and names
         * another modality, it is ignored as such rather than quarantined as damaged. */
        if (rd == SW_EUNSUPPORTED) {
            dcm_file *h = NULL;
            sw_error he;
            sw_error_clear(&he);
            const dcm_read_opts ho = {.header_only = 1};
            int other = dcm_read_buffer(b->data, b->len, path, &ho, &h, &he) == SW_OK && h &&
                        strcmp(h->frames[0].modality, "MR") != 0;
            if (other)
                snprintf(why, sizeof why, "not an MR image (Modality '%s')", h->frames[0].modality);
            dcm_file_free(h);
            if (other) {
                sw_error_clear(&err);
                st = to_final(w, id, path, hash, DB_FILE_SEEN, DB_FILE_IGNORED, why, 0, &err);
                goto out;
            }
        }
        /* dcm_ messages begin with the path already */
        st = to_final(w, id, path, hash, DB_FILE_SEEN, DB_FILE_QUARANTINED, err.msg, 0, &err);
        goto out;
    }
    const dcm_image *d = &f->frames[0];
    if (strcmp(d->modality, "MR") != 0) {
        snprintf(why, sizeof why, "not an MR image (Modality '%s')", d->modality);
        st = to_final(w, id, path, hash, DB_FILE_SEEN, DB_FILE_IGNORED, why, 0, &err);
        goto out;
    }
    if (!d->sop_instance_uid[0] || !d->series_instance_uid[0] || !d->study_instance_uid[0]) {
        snprintf(why, sizeof why, "no %s",
                 !d->sop_instance_uid[0]      ? "SOPInstanceUID"
                 : !d->series_instance_uid[0] ? "SeriesInstanceUID"
                                              : "StudyInstanceUID");
        st = to_final(w, id, path, hash, DB_FILE_SEEN, DB_FILE_QUARANTINED, why, 0, &err);
        goto out;
    }
    wd_match match = wd_classify(&w->s->cfg, d);
    if (match == WD_MATCH_NONE) {
        snprintf(why, sizeof why,
                 "not a phantom series: SeriesDescription '%.128s' and ProtocolName '%.128s' "
                 "match no [match] pattern",
                 d->series_description, d->protocol_name);
        st = to_final(w, id, path, hash, DB_FILE_SEEN, DB_FILE_IGNORED, why, 0, &err);
        goto out;
    }
    int64_t holder = 0;
    if ((st = db_file_by_sop(w->d, d->sop_instance_uid, &holder, &err)) != SW_OK)
        goto out;
    if (holder && holder != id) {
        file_look hl;
        memset(&hl, 0, sizeof hl);
        if ((st = db_file_get(w->d, holder, file_cb, &hl, &err)) != SW_OK)
            goto out;
        const char *was = hl.location[0] ? hl.location : hl.path;
        struct stat gone;
        int live = hl.state == DB_FILE_PARSED || hl.state == DB_FILE_MEASURED ||
                   hl.state == DB_FILE_STORED;
        /* The same bytes, and the holder's file is neither where it was found nor where it was
         * recorded to be: it is this one, under a new name. */
        int missing = lstat(hl.path, &gone) != 0 && errno == ENOENT &&
                      (!hl.location[0] || (lstat(hl.location, &gone) != 0 && errno == ENOENT));
        if (live && !strcmp(hl.hash, hash) && missing) {
            st = follow_rename(w, id, path, hash, holder, &hl, was, &err);
            goto out;
        }
        snprintf(why, sizeof why, "duplicate of file %lld (same SOPInstanceUID %s)",
                 (long long)holder, d->sop_instance_uid);
        st = to_final(w, id, path, hash, DB_FILE_SEEN, DB_FILE_IGNORED, why, 0, &err);
        goto out;
    }
    const char *alias = wd_config_alias(&w->s->cfg, d->station_name);
    db_scanner_info si = {.station_name = d->station_name,
                          .device_serial = d->device_serial,
                          .manufacturer = d->manufacturer,
                          .model = d->model,
                          .institution = d->institution,
                          .site_alias = strcmp(alias, d->station_name) ? alias : NULL};
    int64_t scanner_id = 0, series_id = 0;
    if ((st = db_scanner_upsert(w->d, &si, &scanner_id, &err)) != SW_OK)
        goto out;
    int echoes = wd_match_echoes(match);
    int me = 0;
    for (int i = 0; i < f->nframes; i++)
        if (f->frames[i].echo_number > me)
            me = f->frames[i].echo_number;
    if (echoes > 0 && me > echoes)
        echoes = me > WD_MAX_ECHOES ? WD_MAX_ECHOES : me;
    db_series_info ser = {.series_instance_uid = d->series_instance_uid,
                          .study_instance_uid = d->study_instance_uid,
                          .scanner_id = scanner_id,
                          .series_number = d->series_number,
                          .series_date = d->series_date[0] ? d->series_date : d->acquisition_date,
                          .series_time = d->series_date[0] ? d->series_time : d->acquisition_time,
                          .description = d->series_description,
                          .protocol = d->protocol_name,
                          .series_type = wd_match_name(match),
                          .images_expected = w->s->model.n_slices,
                          .echoes_expected = echoes};
    st = db_series_upsert(w->d, &ser, &series_id, NULL, &err);
    if (st == SW_EINVAL) {
        sw_strlcpy(why, err.msg, sizeof why);
        sw_error_clear(&err);
        st = to_final(w, id, path, hash, DB_FILE_SEEN, DB_FILE_QUARANTINED, why, 0, &err);
        goto out;
    }
    if (st != SW_OK)
        goto out;
    wseries *s = series_find(w, series_id);
    if (!s) {
        series_state_look sl = {0};
        if ((st = db_series_get(w->d, series_id, state_cb, &sl, &err)) != SW_OK)
            goto out;
        if (sl.state == DB_SERIES_STORED || sl.state == DB_SERIES_FAILED) {
            /* Its series was measured already: recorded in it, but not measured again. */
            if ((st = db_file_parsed(w->d, id, d->sop_instance_uid, series_id, &err)) != SW_OK)
                goto out;
            snprintf(why, sizeof why, "arrived after its series %s was %s", d->series_instance_uid,
                     db_series_state_name(sl.state));
            st = to_final(w, id, path, hash, DB_FILE_PARSED, DB_FILE_IGNORED, why, series_id, &err);
            goto out;
        }
        if (!(s = series_add(w, series_id))) {
            st = sw_error_set(&err, SW_ENOMEM, "out of memory");
            goto out;
        }
        series_fill(s, d, scanner_id, alias);
        s->match = match;
        s->state = sl.state;
        s->echoes_expected = echoes;
    }
    if ((st = db_file_parsed(w->d, id, d->sop_instance_uid, series_id, &err)) != SW_OK)
        goto out;
    if (attach(w, s, id, path, hash, f, arrival_of(&b->mtime, &b->ctime)) != 0)
        st = sw_error_set(&err, SW_ENOMEM, "out of memory");
out:
    if (st != SW_OK) {
        if (db_retryable(st) || st == SW_ENOMEM) {
            if (st != SW_EBUSY)
                wd_error("%s: %s; tried again later", path, err.msg);
            result = RETRY;
        } else {
            wd_error("%s: %s", path, err.msg);
            result = RETRY;
        }
    }
    dcm_file_free(f);
    return result;
}

/* A known file in state parsed: back into its series in memory (after a restart, or an event for
 * a file already filed). */
static int reattach(watcher *w, int64_t id, const char *path, const wd_blob *b, int64_t series_id,
                    int tries)
{
    wseries *s = series_find(w, series_id);
    if (s) {
        for (int i = 0; i < s->nfiles; i++)
            if (s->files[i].id == id)
                return TAKEN;
    }
    sw_error err;
    sw_error_clear(&err);
    dcm_file *f = NULL;
    int result = TAKEN;
    sw_status rd = read_dicom(b->data, b->len, path, &f, &err);
    if (rd != SW_OK && transient(rd) && tries < TRANSIENT_TRIES) {
        wd_error("%s; tried again later", err.msg);
        return RETRY;
    }
    if (rd != SW_OK) {
        if (to_final(w, id, path, b->hash, DB_FILE_PARSED, DB_FILE_QUARANTINED, err.msg, 0, &err) !=
            SW_OK)
            result = RETRY;
        return result;
    }
    if (!s) {
        /* The series is known to the store (rebuild did not find it in memory: it was measured,
         * or this file's series is new to this process). */
        series_look sl;
        memset(&sl, 0, sizeof sl);
        scanner_look sc;
        memset(&sc, 0, sizeof sc);
        sw_status st = db_series_get(w->d, series_id, series_look_cb, &sl, &err);
        if (st == SW_OK) {
            sc.id = sl.scanner_id;
            st = db_scanners_each(w->d, scanner_cb, &sc, &err);
        }
        if (st != SW_OK) {
            dcm_file_free(f);
            return RETRY;
        }
        if (sl.state == DB_SERIES_STORED || sl.state == DB_SERIES_FAILED) {
            char why[256];
            snprintf(why, sizeof why, "arrived after its series %s was %s", sl.uid,
                     db_series_state_name(sl.state));
            if (to_final(w, id, path, b->hash, DB_FILE_PARSED, DB_FILE_IGNORED, why, series_id,
                         &err) != SW_OK)
                result = RETRY;
            dcm_file_free(f);
            return result;
        }
        if (!(s = series_add(w, series_id))) {
            dcm_file_free(f);
            return RETRY;
        }
        series_fill(s, &f->frames[0], sl.scanner_id,
                    sc.alias[0] ? sc.alias : wd_config_alias(&w->s->cfg, sc.station));
        s->state = sl.state;
        s->match = !strcmp(sl.type, "t1")   ? WD_MATCH_T1
                   : !strcmp(sl.type, "t2") ? WD_MATCH_T2
                                            : WD_MATCH_CONTENT;
        s->echoes_expected = sl.echoes_expected;
    }
    if (attach(w, s, id, path, b->hash, f, arrival_of(&b->mtime, &b->ctime)) != 0)
        result = RETRY;
    dcm_file_free(f);
    return result;
}

/* A symbolic link in the watch folder is never followed: a link to a file outside would let
 * anyone who can write the folder make the service read (and archive) any file it can read, and a
 * link inside names bytes that are taken where they lie. It is recorded as ignored with its target
 * in the reason, and moved to ignored/ like any ignored file (the link itself; its target is not
 * touched). Links to folders, and loops, are links like any other. */
static int take_link(watcher *w, const char *path)
{
    sw_error err;
    sw_error_clear(&err);
    char target[PATH_MAX], hash[WD_HASH_MAX], why[PATH_MAX + 200];
    ssize_t n = readlink(path, target, sizeof target - 1);
    if (n < 0)
        return errno == ENOENT ? SKIPPED : RETRY;
    target[n] = '\0';
    char resolved[PATH_MAX];
    const char *where = !realpath(path, resolved) ? "which names nothing that exists (or a loop)"
                        : wd_path_inside(resolved, w->s->cfg.folder)
                            ? "inside the watch folder, taken where it lies"
                            : "outside the watch folder";
    /* Known by path and target: "link:" and the SHA-256 of the target's text. */
    char th[WD_HASH_MAX];
    wd_sha256_text(target, (size_t)n, th);
    snprintf(hash, sizeof hash, "link:%s", th + 7);
    snprintf(why, sizeof why, "a symbolic link to %s (%s); links are not followed", target, where);
    db_file_info fi = {.path = path, .content_hash = hash, .size = 0};
    int64_t id = 0;
    db_file_outcome how;
    int result = TAKEN;
    sw_status rc = txn_begin(w, &err);
    if (rc == SW_OK)
        rc = db_file_add(w->d, &fi, &id, &how, NULL, &err);
    file_look fl;
    memset(&fl, 0, sizeof fl);
    fl.state = DB_FILE_SEEN;
    if (rc == SW_OK && how == DB_FILE_KNOWN)
        rc = db_file_get(w->d, id, file_cb, &fl, &err);
    if (rc == SW_OK && db_file_state_final(fl.state)) {
        txn_rollback(w); /* known: only its move is left */
        result = move_known(w, id, path, hash, &fl, 0);
        goto out;
    }
    if (rc == SW_OK)
        rc = to_final(w, id, path, hash, fl.state, DB_FILE_IGNORED, why, 0, &err);
    if (rc == SW_OK)
        rc = txn_commit(w, &err);
    if (rc != SW_OK) {
        if (w->in_txn)
            txn_rollback(w);
        if (rc != SW_EBUSY)
            wd_error("%s: %s; tried again later", path, err.msg);
        result = RETRY;
    }
out:
    run_jobs(w);
    return result;
}

static int take_file(watcher *w, const char *path, int scanned, int tries)
{
    sw_error err;
    sw_error_clear(&err);
    wd_blob b;
    int eno = 0, result = TAKEN;
    char hash[WD_HASH_MAX];
    struct stat st;
    if (wd_name_is_temporary(base_name(path)))
        return SKIPPED;
    if (lstat(path, &st) != 0)
        return SKIPPED; /* gone (moved on, or a temporary file renamed) */
    if (S_ISLNK(st.st_mode))
        return take_link(w, path);
    if (!S_ISREG(st.st_mode)) {
        wd_debug("%s: not a regular file; left in place", path);
        return SKIPPED;
    }
    if (scanned && wd_now_real() - arrival_of(&st.st_mtim, &st.st_ctim) < SETTLE_S)
        return SETTLE;
    sw_status rs = wd_blob_read(path, &b, &eno, &err);
    if (rs == SW_ENOTFOUND)
        return SKIPPED;
    if (rs == SW_EBUSY)
        return RETRY; /* still growing: its IN_CLOSE_WRITE comes */
    if (rs == SW_EINVAL) {
        wd_debug("%s", err.msg);
        return SKIPPED;
    }
    if ((rs == SW_ENOMEM || (rs == SW_EIO && eno != EACCES && eno != EPERM)) &&
        tries < TRANSIENT_TRIES) {
        /* Out of memory, out of file descriptors, a read error: perhaps not the file's fault. */
        wd_error("%s; tried again later", err.msg);
        return RETRY;
    }
    int unreadable = rs != SW_OK;
    char unreadable_why[SW_ERROR_MAX];
    if (unreadable) {
        /* No content to hash: the file is known by its identity on disk instead. */
        snprintf(hash, sizeof hash, "unreadable:%llx:%llx:%lld:%lld", (unsigned long long)st.st_dev,
                 (unsigned long long)st.st_ino, (long long)st.st_size,
                 (long long)st.st_mtim.tv_sec);
        sw_strlcpy(unreadable_why, err.msg, sizeof unreadable_why);
        sw_error_clear(&err);
    } else {
        sw_strlcpy(hash, b.hash, sizeof hash);
    }
    db_file_info fi = {.path = path,
                       .content_hash = hash,
                       .size = unreadable ? (int64_t)st.st_size : (int64_t)b.len};
    int64_t id = 0;
    db_file_outcome how;
    /* One transaction for what the store learns of this file: one commit, one fsync. */
    /* What a take learns of a file need not wait for the disk: the file stays in the folder until
     * its series' commit, which is durable and makes this one durable too, and a start-up after a
     * power failure takes it again. A take that queues a move (a final state) syncs the log before
     * the move. One fdatasync a file was most of the wall time of a backlog. */
    int lazy = db_set_durable(w->d, 0, NULL) == SW_OK, hold = 0;
    sw_status s2 = txn_begin(w, &err);
    if (s2 == SW_OK)
        s2 = db_file_add(w->d, &fi, &id, &how, NULL, &err);
    if (s2 != SW_OK) {
        if (s2 != SW_EBUSY)
            wd_error("%s: %s; tried again later", path, err.msg);
        result = RETRY;
        goto out;
    }
    file_look fl;
    memset(&fl, 0, sizeof fl);
    fl.state = DB_FILE_SEEN;
    if (how == DB_FILE_KNOWN) {
        if ((s2 = db_file_get(w->d, id, file_cb, &fl, &err)) != SW_OK) {
            result = RETRY;
            goto out;
        }
    }
    if (db_file_state_final(fl.state) && !strncmp(fl.reason, SAME_FILE, strlen(SAME_FILE))) {
        wd_debug("%s: %s", path, fl.reason); /* its owner moves it */
        result = SKIPPED;
        goto out;
    }
    if (db_file_state_final(fl.state)) {
        txn_rollback(w); /* nothing was written: the file is known */
        result = move_known(w, id, path, hash, &fl, fl.series_id); /* a retry is queued */
        goto out;
    }
    if (unreadable) {
        if (fl.state != DB_FILE_SEEN && fl.state != DB_FILE_PARSED) {
            result = RETRY;
            goto out;
        }
        if (to_final(w, id, path, hash, fl.state, DB_FILE_QUARANTINED, unreadable_why, 0, &err) !=
            SW_OK)
            result = RETRY;
        goto out;
    }
    note_file(path, hash);
    crash_test_hook("file", path);
    if (fl.state == DB_FILE_SEEN)
        result = parse(w, id, path, &b, tries);
    else if (fl.state == DB_FILE_PARSED)
        result = reattach(w, id, path, &b, fl.series_id, tries);
    else
        wd_debug("%s: file %lld is %s; its series finishes it", path, (long long)id,
                 db_file_state_name(fl.state));
    note_clear();
out:
    if (w->in_txn) {
        if (result == RETRY) {
            txn_rollback(w);
        } else if (txn_commit(w, &err) != SW_OK) {
            wd_error("%s: %s; tried again later", path, err.msg);
            result = RETRY;
        } else if (lazy && w->njobs > 0 && db_sync_log(w->d, &err) != SW_OK) {
            /* The moves wait: run only once the store knows them durably (the next take syncs
             * the log again before it runs them, as does any durable commit). */
            wd_error("%s: %s; its move waits until the store's log is on disk", path, err.msg);
            hold = 1;
        }
    }
    if (lazy && db_set_durable(w->d, 1, &err) != SW_OK)
        wd_error("%s: %s", path, err.msg);
    if (!hold)
        run_jobs(w);
    wd_blob_free(&b);
    return result;
}

/* ---- measuring a series ---- */

typedef struct loaded {
    dcm_file *f;
    db_file_state fate; /* DB_FILE_STORED when measured, else quarantined or ignored */
    char why[SW_ERROR_MAX + 64];
} loaded;

/* Whether a file leaves the folder after its series: not when it vanished, nor when the bytes at
 * its path are a newer file's now. */
static int needs_move(const loaded *l)
{
    if (l->fate == DB_FILE_IGNORED && strstr(l->why, "content changed"))
        return 0;
    if (l->fate == DB_FILE_QUARANTINED && !l->f && strstr(l->why, "vanished"))
        return 0;
    return 1;
}

static void log_series(watcher *w, const wseries *s, const char *how, const wd_store_result *r,
                       int n_images)
{
    (void)w;
    wd_info("series %s #%d %s [%s, %d images, run %lld]: %s; verdict %s",
            s->label[0]     ? s->label
            : s->station[0] ? s->station
                            : "?",
            s->number, s->uid, how, n_images, (long long)r->run_id, r->summary,
            db_verdict_name(r->verdict));
}

/* Measures series s (complete, or quiet when quiet is 1) and stores everything in one
 * transaction, then moves its files. Returns RETRY when the store was busy (nothing changed). */
static int measure_series(watcher *w, wseries *s, int quiet)
{
    sw_error err;
    sw_error_clear(&err);
    sw_status st = SW_OK;
    int result = TAKEN, began = 0, n_img = 0;
    loaded *ld = NULL;
    char(*targets)[PATH_MAX] = NULL;
    const dcm_image **imgs = NULL;
    wd_measured m;
    memset(&m, 0, sizeof m);
    wd_store_result res;
    memset(&res, 0, sizeof res);
    char fail_why[SW_ERROR_MAX + 32] = "";
    const char *how = quiet ? "quiet" : "complete";
    const int nfiles = s->nfiles;
    int drift_started = 0;

    /* 1. The series' state says why it is measured (its own commit). */
    if (s->state == DB_SERIES_COLLECTING) {
        db_series_state to = quiet ? DB_SERIES_QUIET : DB_SERIES_COMPLETE;
        if ((st = db_series_set_state(w->d, s->id, DB_SERIES_COLLECTING, to, NULL, &err)) != SW_OK)
            goto out;
        s->state = to;
    }
    how = s->state == DB_SERIES_QUIET ? "quiet" : "complete";

    /* 2. Files not at their recorded paths have most often been renamed or moved within the
     * folder (a receiver renaming its study folder, files that came back by another name and are
     * still settling): the folder is scanned again and the measurement waits for them, twice, before
     * they are recorded as vanished. Nothing has changed in the store meanwhile but the state. */
    if (s->looks < MAX_LOOKS) {
        int missing = 0;
        for (int i = 0; i < s->nfiles; i++) {
            struct stat here;
            if (lstat(s->files[i].path, &here) != 0 && errno == ENOENT)
                missing++;
        }
        if (missing) {
            s->looks++;
            wd_info("series %s: %d of its files are not where they were found; looking for them "
                    "in the watch folder before measuring",
                    s->uid, missing);
            rescan_all(w);
            s->retry_at = wd_now_mono() + LOOK_S;
            result = RETRY;
            goto out;
        }
    }

    /* 3. A series taken on content alone must look like the phantom series. */
    int not_phantom =
        s->match == WD_MATCH_CONTENT && !content_fits(w, s, fail_why, sizeof fail_why);

    /* 4. Pixels, checked against the content seen at arrival. */
    note_series(s->id);
    crash_test_hook("series", s->uid);
    if (!(ld = calloc((size_t)s->nfiles + 1, sizeof *ld))) {
        st = sw_error_set(&err, SW_ENOMEM, "out of memory");
        goto out;
    }
    int cap = 0;
    for (int i = 0; i < s->nfiles && !not_phantom; i++) {
        wd_blob b;
        sw_error e2;
        sw_error_clear(&e2);
        ld[i].fate = DB_FILE_STORED;
        int eno = 0;
        sw_status rs = wd_blob_read(s->files[i].path, &b, &eno, &e2);
        if (((rs == SW_EIO && eno != EACCES && eno != EPERM) || rs == SW_ENOMEM) &&
            s->retries < TRANSIENT_TRIES) {
            st = sw_error_set(&err, rs, "%s", e2.msg); /* nothing recorded: measured again later */
            goto out;
        }
        if (rs != SW_OK) {
            ld[i].fate = DB_FILE_QUARANTINED;
            snprintf(ld[i].why, sizeof ld[i].why, "%s before its series was measured",
                     rs == SW_ENOTFOUND ? "vanished from the watch folder" : e2.msg);
            continue;
        }
        if (strcmp(b.hash, s->files[i].hash) != 0) {
            ld[i].fate = DB_FILE_IGNORED;
            snprintf(ld[i].why, sizeof ld[i].why,
                     "its content changed after it was seen; the new content is taken as a new "
                     "file");
            requeue(w, s->files[i].path, 0.5, 0);
            wd_blob_free(&b);
            continue;
        }
        sw_status rd = read_dicom(b.data, b.len, s->files[i].path, &ld[i].f, &e2);
        if (rd != SW_OK && transient(rd) && s->retries < TRANSIENT_TRIES) {
            wd_blob_free(&b);
            st = sw_error_set(&err, rd, "%s", e2.msg);
            goto out;
        }
        if (rd != SW_OK) {
            ld[i].fate = DB_FILE_QUARANTINED;
            sw_strlcpy(ld[i].why, e2.msg, sizeof ld[i].why);
        } else {
            cap += ld[i].f->nframes;
        }
        wd_blob_free(&b);
    }
    if (!not_phantom) {
        if (!(imgs = calloc((size_t)cap + 1, sizeof *imgs))) {
            st = sw_error_set(&err, SW_ENOMEM, "out of memory");
            goto out;
        }
        for (int i = 0; i < s->nfiles; i++)
            for (int k = 0; ld[i].f && k < ld[i].f->nframes; k++)
                imgs[n_img++] = &ld[i].f->frames[k];
        if (n_img == 0)
            snprintf(fail_why, sizeof fail_why, "no readable image");
    }

    /* 5. Measure (no store access: the write lock is not held while computing). */
    wd_method method;
    method.model = w->s->model;
    method.params = w->s->params;
    method.hints = w->s->cfg.drift.hints;
    const dcm_image *first = n_img ? imgs[0] : NULL;
    method.tol = *wd_tolerances_for(&w->s->tol, s->station, wd_tolerance_key(s->match, first));
    int measured = 0;
    if (!not_phantom && n_img) {
        sw_error e3;
        sw_error_clear(&e3);
        sw_status ms = wd_measure(imgs, n_img, &method, &m, &e3);
        if (ms == SW_ENOMEM && s->retries < TRANSIENT_TRIES) {
            st = sw_error_set(&err, ms, "%s", e3.msg); /* not the series' fault: measured again */
            goto out;
        }
        if (ms == SW_OK)
            measured = 1;
        else
            snprintf(fail_why, sizeof fail_why, "not measurable: %s", e3.msg);
    }

    note_clear();
    /* 6. One transaction: file fates, the run and its rows, alerts, the series' final state. */
    if ((st = db_begin(w->d, &err)) != SW_OK)
        goto out;
    began = 1;
    for (int i = 0; i < s->nfiles; i++) {
        if (not_phantom) {
            ld[i].fate = DB_FILE_IGNORED;
            sw_strlcpy(ld[i].why, fail_why, sizeof ld[i].why);
        }
        if (ld[i].fate != DB_FILE_STORED &&
            (st = db_file_transition(w->d, s->files[i].id, DB_FILE_PARSED, ld[i].fate, ld[i].why,
                                     &err)) != SW_OK)
            goto out;
    }
    if (not_phantom) {
        if ((st = db_series_set_state(w->d, s->id, s->state, DB_SERIES_FAILED, fail_why, &err)) !=
            SW_OK)
            goto out;
    } else {
        wd_series_ctx ctx = {.series_id = s->id,
                             .scanner_id = s->scanner_id,
                             .scanner_label = s->label,
                             .station = s->station,
                             .images_dir = w->no_png ? NULL : w->s->cfg.images,
                             .config_hash = w->s->hash,
                             .tolerance_key = wd_tolerance_key(s->match, first),
                             .alerts = 1};
        if ((st = wd_store_run(w->d, &ctx, &method, measured ? &m : NULL, fail_why, &res, &err)) !=
            SW_OK)
            goto out;
        if (measured) {
            /* Drift: the new result against the key's history (docs/trends.md), in the same
             * transaction. Its failure is logged and does not cost the measurement. */
            sw_error e4;
            sw_error_clear(&e4);
            if (wd_drift_check_run(w->d, s->scanner_id, res.run_id, &w->s->cfg.drift,
                                   res.n_pngs ? res.png[0].path : NULL, &drift_started, NULL,
                                   &e4) != SW_OK)
                wd_error("series %s: drift check: %s", s->uid, e4.msg);
            if (s->state != DB_SERIES_MEASURED &&
                (st = db_series_set_state(w->d, s->id, s->state, DB_SERIES_MEASURED, NULL, &err)) !=
                    SW_OK)
                goto out;
            if ((st = db_series_files_transition(w->d, s->id, DB_FILE_PARSED, DB_FILE_MEASURED,
                                                 NULL, NULL, &err)) != SW_OK ||
                (st = db_series_files_transition(w->d, s->id, DB_FILE_MEASURED, DB_FILE_STORED,
                                                 NULL, NULL, &err)) != SW_OK ||
                (st = db_series_set_state(w->d, s->id, DB_SERIES_MEASURED, DB_SERIES_STORED, NULL,
                                          &err)) != SW_OK)
                goto out;
        } else {
            char why[SW_ERROR_MAX + 32];
            snprintf(why, sizeof why, "its series could not be measured: %s", fail_why);
            for (int i = 0; i < s->nfiles; i++)
                if (ld[i].fate == DB_FILE_STORED) {
                    ld[i].fate = DB_FILE_QUARANTINED;
                    sw_strlcpy(ld[i].why, why, sizeof ld[i].why);
                }
            if ((st = db_series_files_transition(w->d, s->id, DB_FILE_PARSED, DB_FILE_QUARANTINED,
                                                 why, NULL, &err)) != SW_OK ||
                (st = db_series_set_state(w->d, s->id, s->state, DB_SERIES_FAILED, fail_why,
                                          &err)) != SW_OK)
                goto out;
        }
    }
    /* Where each file goes, recorded in the same transaction: the moves after it are known. */
    if (!(targets = calloc((size_t)nfiles + 1, sizeof *targets))) {
        st = sw_error_set(&err, SW_ENOMEM, "out of memory");
        goto out;
    }
    for (int i = 0; i < nfiles; i++)
        if (needs_move(&ld[i])) {
            fmove mv = {.id = s->files[i].id,
                        .path = s->files[i].path,
                        .hash = s->files[i].hash,
                        .state = ld[i].fate,
                        .series_id = s->id};
            reserve(w, &mv, targets[i], sizeof targets[i]);
        }
    if ((st = db_commit(w->d, &err)) != SW_OK)
        goto out;
    began = 0;

    /* 7. Committed: report, then move the files. */
    if (not_phantom) {
        wd_info("series %s #%d %s: %s", s->label, s->number, s->uid, fail_why);
        w->st.series_failed++;
    } else {
        log_series(w, s, how, &res, n_img);
        if (measured) {
            w->st.series_measured++;
            w->st.verdict[res.verdict]++;
        } else {
            w->st.series_failed++;
        }
        w->st.alerts_recorded += res.n_alerts + drift_started;
        if (drift_started)
            wd_warn("series %s %s: drift: %d episode%s opened, with an alert each", s->label,
                    s->uid, drift_started, drift_started == 1 ? "" : "s");
        if (res.n_alerts)
            wd_warn("series %s %s: %d alert%s recorded", s->label, s->uid, res.n_alerts,
                    res.n_alerts == 1 ? "" : "s");
    }
    for (int i = 0; i < s->nfiles; i++) {
        if (ld[i].fate != DB_FILE_STORED)
            wd_warn("%s: %s: %s", s->files[i].path, db_file_state_name(ld[i].fate), ld[i].why);
        count_final(w, ld[i].fate);
        if (!needs_move(&ld[i]))
            continue;
        fmove mv = {.id = s->files[i].id,
                    .path = s->files[i].path,
                    .hash = s->files[i].hash,
                    .state = ld[i].fate,
                    .reason = ld[i].why,
                    .location = targets[i],
                    .series_id = s->id};
        push_job(w, &mv);
    }
    run_jobs(w);
    series_remove(w, s);
    s = NULL;
out:
    note_clear();
    if (began)
        (void)db_rollback(w->d, NULL);
    if (st != SW_OK) {
        /* The run was rolled back: its PNGs name a run that does not exist, whose number the
         * next run (of any series) gets. */
        for (int i = 0; i < res.n_pngs; i++)
            if (unlink(res.png[i].path) != 0 && errno != ENOENT)
                wd_warn("%s: cannot remove the image of a run rolled back: %s", res.png[i].path,
                        strerror(errno));
        if (st != SW_EBUSY)
            wd_error("series %s: %s; tried again later", s ? s->uid : "?", err.msg);
        if (s) {
            if (st != SW_EBUSY)
                s->retries++;
            /* --once tries a few times within its run (then leaves the series to the next run
             * and exits 1); the service every 30 s. */
            double delay = st == SW_EBUSY                                ? 1.0
                           : w->once && s->retries < TRANSIENT_TRIES ? 1.0 * s->retries
                                                                     : 30.0;
            s->retry_at = wd_now_mono() + delay;
        }
        result = RETRY;
    }
    wd_measured_free(&m);
    if (ld)
        for (int i = 0; i < nfiles; i++)
            dcm_file_free(ld[i].f);
    free(ld);
    free(targets);
    free(imgs);
    return result;
}

/* ---- rebuilding the series in hand after a restart ---- */

typedef struct pend_series {
    int64_t id, scanner_id;
    db_series_state state;
    char type[16];
    int echoes_expected;
} pend_series;

typedef struct pend_list {
    pend_series *v;
    int n, cap;
} pend_list;

static int pend_series_cb(void *ctx, const db_series_rec *r)
{
    pend_list *p = ctx;
    if (p->n == p->cap) {
        int c = p->cap ? p->cap * 2 : 16;
        pend_series *v = realloc(p->v, (size_t)c * sizeof *v);
        if (!v)
            return 1;
        p->v = v;
        p->cap = c;
    }
    pend_series *s = &p->v[p->n++];
    s->id = r->id;
    s->scanner_id = r->scanner_id;
    s->state = r->state;
    sw_strlcpy(s->type, r->info.series_type, sizeof s->type);
    s->echoes_expected = r->info.echoes_expected;
    return 0;
}

typedef struct pend_file {
    int64_t id;
    char *path;
    char hash[WD_HASH_MAX];
    db_file_state state;
} pend_file;

typedef struct pend_files {
    pend_file *v;
    int n, cap;
    int only_seen; /* db_files_pending: keep the seen ones */
} pend_files;

static int pend_file_cb(void *ctx, const db_file_rec *r)
{
    pend_files *p = ctx;
    if (p->only_seen ? r->state != DB_FILE_SEEN
                     : (r->state != DB_FILE_PARSED && r->state != DB_FILE_MEASURED))
        return 0;
    if (p->n == p->cap) {
        int c = p->cap ? p->cap * 2 : 32;
        pend_file *v = realloc(p->v, (size_t)c * sizeof *v);
        if (!v)
            return 1;
        p->v = v;
        p->cap = c;
    }
    pend_file *f = &p->v[p->n];
    /* Where it is now: a file followed through a rename in the folder has its location set. */
    const char *where = r->path;
    struct stat st;
    if (r->location[0] && stat(r->location, &st) == 0)
        where = r->location;
    if (!(f->path = strdup(where)))
        return 1;
    f->id = r->id;
    f->state = r->state;
    sw_strlcpy(f->hash, r->content_hash, sizeof f->hash);
    p->n++;
    return 0;
}

static void pend_files_free(pend_files *p)
{
    for (int i = 0; i < p->n; i++)
        free(p->v[i].path);
    free(p->v);
    memset(p, 0, sizeof *p);
}

/* Series not yet stored come back into memory with their parsed files; files seen but never parsed
 * are queued. What vanished meanwhile is recorded as such. */
static sw_status rebuild(watcher *w, sw_error *err)
{
    sw_status rc = SW_OK;
    pend_list pl = {0};
    pend_files pf = {0};
    if ((rc = db_series_pending(w->d, pend_series_cb, &pl, err)) != SW_OK)
        goto out;
    for (int i = 0; i < pl.n; i++) {
        pend_series *ps = &pl.v[i];
        pend_files_free(&pf);
        if ((rc = db_series_files(w->d, ps->id, pend_file_cb, &pf, err)) != SW_OK)
            goto out;
        scanner_look sc;
        memset(&sc, 0, sizeof sc);
        sc.id = ps->scanner_id;
        if ((rc = db_scanners_each(w->d, scanner_cb, &sc, err)) != SW_OK)
            goto out;
        wseries *s = series_add(w, ps->id);
        if (!s) {
            rc = sw_error_set(err, SW_ENOMEM, "out of memory");
            goto out;
        }
        s->scanner_id = ps->scanner_id;
        s->state = ps->state;
        s->match = !strcmp(ps->type, "t1")   ? WD_MATCH_T1
                   : !strcmp(ps->type, "t2") ? WD_MATCH_T2
                                             : WD_MATCH_CONTENT;
        s->echoes_expected = ps->echoes_expected;
        sw_strlcpy(s->station, sc.station, sizeof s->station);
        sw_strlcpy(s->serial, sc.serial, sizeof s->serial);
        sw_strlcpy(s->label, sc.alias[0] ? sc.alias : wd_config_alias(&w->s->cfg, sc.station),
                   sizeof s->label);
        int filled = 0;
        for (int k = 0; k < pf.n; k++) {
            pend_file *f = &pf.v[k];
            wd_blob b;
            sw_error e2;
            sw_error_clear(&e2);
            int eno = 0;
            sw_status rs = wd_blob_read(f->path, &b, &eno, &e2);
            if (rs == SW_ENOMEM || (rs == SW_EIO && eno != EACCES && eno != EPERM)) {
                /* Not the file's fault, and its series must not be measured without it: the
                 * start fails (nothing was recorded for the file) and the next one resumes. */
                rc = sw_error_set(err, rs, "%s", e2.msg);
                goto out;
            }
            if (rs == SW_ENOTFOUND || (rs == SW_OK && strcmp(b.hash, f->hash))) {
                int changed = rs == SW_OK;
                wd_blob_free(&b);
                const char *why = changed ? "its content changed after it was seen; the new "
                                            "content is taken as a new file"
                                          : "vanished from the watch folder before its series "
                                            "was measured";
                if ((rc = db_file_transition(w->d, f->id, f->state,
                                             changed ? DB_FILE_IGNORED : DB_FILE_QUARANTINED, why,
                                             err)) != SW_OK)
                    goto out;
                wd_warn("%s: %s", f->path, why);
                if (changed)
                    requeue(w, f->path, 0, 0);
                continue;
            }
            dcm_file *df = NULL;
            note_file(f->path, f->hash);
            sw_status rd = rs != SW_OK ? rs : read_dicom(b.data, b.len, f->path, &df, &e2);
            note_clear();
            if (rs == SW_OK && transient(rd)) {
                wd_blob_free(&b);
                rc = sw_error_set(err, rd, "%s", e2.msg);
                goto out;
            }
            if (rd != SW_OK) {
                char why[SW_ERROR_MAX];
                sw_strlcpy(why, e2.msg, sizeof why);
                sw_status r2 = to_final(w, f->id, f->path, f->hash, f->state, DB_FILE_QUARANTINED,
                                        why, ps->id, err);
                wd_blob_free(&b);
                if (r2 != SW_OK) {
                    rc = r2;
                    goto out;
                }
                continue;
            }
            if (!filled) {
                series_fill(s, &df->frames[0], ps->scanner_id, s->label);
                filled = 1;
            }
            int a = attach(w, s, f->id, f->path, f->hash, df, arrival_of(&b.mtime, &b.ctime));
            dcm_file_free(df);
            wd_blob_free(&b);
            if (a != 0) {
                rc = sw_error_set(err, SW_ENOMEM, "out of memory");
                goto out;
            }
        }
        if (!s->last_arrival)
            s->last_arrival = wd_now_real();
        wd_info("resuming series %s (%s, %d files, %s)", s->uid[0] ? s->uid : "?", s->label,
                s->nfiles, db_series_state_name(s->state));
    }
    /* Files seen but not yet read. */
    pend_files_free(&pf);
    pf.only_seen = 1;
    if ((rc = db_files_pending(w->d, pend_file_cb, &pf, err)) != SW_OK)
        goto out;
    for (int k = 0; k < pf.n; k++) {
        struct stat st;
        if (lstat(pf.v[k].path, &st) == 0) {
            (void)enqueue_item(&w->q, pf.v[k].path, 0, 0, 1);
            continue;
        }
        const char *why = "vanished from the watch folder before it was read";
        if ((rc = db_file_transition(w->d, pf.v[k].id, DB_FILE_SEEN, DB_FILE_QUARANTINED, why,
                                     err)) != SW_OK)
            goto out;
        wd_warn("%s: %s", pf.v[k].path, why);
    }
out:
    pend_files_free(&pf);
    free(pl.v);
    run_jobs(w);
    return rc;
}

/* ---- after a crash: the note's file or series is taken out of the way ---- */

static sw_status quarantine_crashed_file(watcher *w, const crash_info *ci, sw_error *err)
{
    char why[160], hash[WD_HASH_MAX];
    snprintf(why, sizeof why,
             "the program stopped with signal %d while reading this file; quarantined so that "
             "it cannot stop the service again",
             ci->sig);
    if (wd_file_hash(ci->path, hash, err) != SW_OK || strcmp(hash, ci->hash) != 0) {
        sw_error_clear(err); /* gone or changed: nothing to hold back */
        return SW_OK;
    }
    wd_error("%s: %s", ci->path, why);
    db_file_info fi = {.path = ci->path, .content_hash = hash, .size = 0};
    struct stat st;
    if (stat(ci->path, &st) == 0)
        fi.size = st.st_size;
    int64_t id = 0;
    db_file_outcome how;
    file_look fl;
    memset(&fl, 0, sizeof fl);
    fl.state = DB_FILE_SEEN;
    sw_status rc = txn_begin(w, err);
    if (rc == SW_OK)
        rc = db_file_add(w->d, &fi, &id, &how, NULL, err);
    if (rc == SW_OK && how == DB_FILE_KNOWN)
        rc = db_file_get(w->d, id, file_cb, &fl, err);
    if (rc == SW_OK && (fl.state == DB_FILE_SEEN || fl.state == DB_FILE_PARSED))
        rc = to_final(w, id, ci->path, hash, fl.state, DB_FILE_QUARANTINED, why, fl.series_id, err);
    if (rc == SW_OK)
        rc = txn_commit(w, err);
    else if (w->in_txn)
        txn_rollback(w);
    run_jobs(w);
    return rc;
}

static sw_status fail_crashed_series(watcher *w, const crash_info *ci, sw_error *err)
{
    char why[200];
    snprintf(why, sizeof why,
             "the program stopped with signal %d while measuring this series; its files are "
             "quarantined so that they cannot stop the service again",
             ci->sig);
    series_look sl;
    memset(&sl, 0, sizeof sl);
    pend_files pf = {0};
    sw_status rc = db_series_get(w->d, ci->series_id, series_look_cb, &sl, err);
    if (rc != SW_OK || sl.state == DB_SERIES_STORED || sl.state == DB_SERIES_FAILED) {
        sw_error_clear(err);
        return SW_OK;
    }
    wd_error("series %s: %s", sl.uid, why);
    if ((rc = db_series_files(w->d, ci->series_id, pend_file_cb, &pf, err)) != SW_OK)
        goto out;
    if ((rc = txn_begin(w, err)) != SW_OK)
        goto out;
    for (int i = 0; i < pf.n && rc == SW_OK; i++)
        rc = to_final(w, pf.v[i].id, pf.v[i].path, pf.v[i].hash, pf.v[i].state, DB_FILE_QUARANTINED,
                      why, ci->series_id, err);
    if (rc == SW_OK)
        rc = db_series_set_state(w->d, ci->series_id, sl.state, DB_SERIES_FAILED, why, err);
    if (rc == SW_OK)
        rc = txn_commit(w, err);
    else
        txn_rollback(w);
    run_jobs(w);
out:
    pend_files_free(&pf);
    return rc;
}

/* ---- which series to measure now ---- */

/* The next series to measure: complete ones (and ones the store marked complete or quiet) at any
 * time; quiet ones only when allow_quiet (nothing else is queued, so no file of theirs waits). */
/* The ready series acquired first (by SeriesDate): a backlog is measured in acquisition order, so
 * that each series' drift check sees the history before it, as it would have live. */
static wseries *next_ready(watcher *w, int allow_quiet, int *quiet)
{
    double mono = wd_now_mono(), real = wd_now_real();
    wseries *best = NULL;
    int best_quiet = 0;
    for (int i = 0; i < w->nseries; i++) {
        wseries *s = w->series[i];
        if (s->retry_at > mono)
            continue;
        int ready = 0, q = 0;
        if (s->state == DB_SERIES_COMPLETE || s->state == DB_SERIES_MEASURED ||
            (s->state == DB_SERIES_COLLECTING && series_complete(w, s))) {
            ready = 1;
        } else if (allow_quiet) {
            if (s->last_arrival > real)
                s->last_arrival = real; /* the clock went back */
            if (s->state == DB_SERIES_QUIET || real - s->last_arrival >= w->s->cfg.quiet_seconds)
                ready = q = 1;
        }
        if (ready && (!best || strcmp(s->date, best->date) < 0)) {
            best = s;
            best_quiet = q;
        }
    }
    if (best)
        *quiet = best_quiet;
    return best;
}

/* Whether a series waits while the folder is searched for its moved files. */
static int looking(const watcher *w)
{
    double mono = wd_now_mono();
    for (int i = 0; i < w->nseries; i++)
        if ((w->series[i]->looks > 0 ||
             (w->series[i]->retries > 0 && w->series[i]->retries < TRANSIENT_TRIES)) &&
            w->series[i]->retry_at > mono)
            return 1;
    return 0;
}

/* Series whose measurement failed and is still to be done (--once exits 1 for them). */
static int failed_to_measure(const watcher *w)
{
    int n = 0;
    for (int i = 0; i < w->nseries; i++)
        n += w->series[i]->retries > 0;
    return n;
}

static double next_quiet_s(const watcher *w)
{
    double real = wd_now_real(), t = INFINITY;
    for (int i = 0; i < w->nseries; i++) {
        double d = w->series[i]->last_arrival + w->s->cfg.quiet_seconds - real;
        if (d < t)
            t = d;
    }
    return t;
}

/* ---- signals, reload, status ---- */

static void read_signals(watcher *w)
{
    struct signalfd_siginfo si;
    while (read(w->sfd, &si, sizeof si) == (ssize_t)sizeof si) {
        if (si.ssi_signo == SIGTERM || si.ssi_signo == SIGINT) {
            if (!w->stop)
                wd_info("%s: finishing the series in hand, then stopping",
                        si.ssi_signo == SIGTERM ? "SIGTERM" : "SIGINT");
            w->stop = 1;
        } else if (si.ssi_signo == SIGHUP) {
            w->reload = 1;
        }
        /* SIGCHLD only wakes the loop: the alert runner reaps its own children. */
    }
}

static wd_alert_opts alert_opts(const wd_config *c)
{
    wd_alert_opts o = {.command = c->alert_command,
                       .timeout_s = c->alert_timeout_seconds,
                       .retry_s = c->alert_retry_seconds,
                       .max_attempts = c->alert_max_attempts,
                       .max_running = 4};
    return o;
}

static void do_reload(watcher *w)
{
    w->reload = 0;
    notify("RELOADING=1");
    sw_error err;
    sw_error_clear(&err);
    settings *n = malloc(sizeof *n);
    if (!n) {
        wd_error("reload refused: out of memory; the running configuration stays");
        goto out;
    }
    if (settings_load(w->config_path, &w->ov, n, &err) != SW_OK) {
        wd_error("reload refused: %s; the running configuration stays", err.msg);
        goto out;
    }
    if (strcmp(n->cfg.folder, w->s->cfg.folder) || strcmp(n->cfg.database, w->s->cfg.database)) {
        wd_error("reload refused: a new [watch] folder or database needs a restart; the running "
                 "configuration stays");
        goto out;
    }
    wd_alert_opts ao = alert_opts(&n->cfg);
    if (wd_alerts_configure(w->alerts, &ao, &err) != SW_OK) {
        wd_error("reload refused: %s; the running configuration stays", err.msg);
        goto out;
    }
    settings *old = w->s;
    w->s = n;
    n = old;
    wd_log_set_level((wd_log_level)w->s->cfg.log_level);
    wd_info("configuration reloaded from %s (settings %.19s...)",
            w->config_path ? w->config_path : "built-in defaults", w->s->hash);
out:
    free(n);
    notify("READY=1");
}

static void ping(watcher *w, int force)
{
    double now = wd_now_mono();
    if (w->watchdog_every > 0 && (force || now - w->last_ping >= w->watchdog_every)) {
        notify("WATCHDOG=1");
        w->last_ping = now;
    }
#ifdef SW_HAVE_SYSTEMD
    if (force || now - w->last_status >= 5) {
        char buf[160];
        snprintf(buf, sizeof buf, "STATUS=%ld files done, %zu queued, %d series collecting",
                 w->st.files_done, queue_len(&w->q), w->nseries);
        notify(buf);
        w->last_status = now;
    }
#endif
}

/* ---- the loop ---- */

static void after_take(watcher *w, const qitem *it, int r)
{
    if (r == SETTLE) {
        (void)enqueue_item(&w->q, it->path, SETTLE_S / 2, it->tries, 1);
        return;
    }
    if (r == RETRY) {
        /* 1, 2, 4, then every 4 s: a lock held by another writer is brief, and each try waits
         * for it a second anyway. */
        int tries = it->tries + 1;
        double delay = tries < 3 ? (double)(1 << (tries - 1)) : 4.0;
        requeue(w, it->path, delay, tries);
        return;
    }
    w->st.files_done++;
}

static int loop(watcher *w)
{
    double last_progress = wd_now_mono();
    for (;;) {
        read_signals(w);
        if (w->stop)
            break;
        if (w->reload)
            do_reload(w);
        if (w->ifd >= 0)
            read_events(w);
        promote_due(&w->q);
        while (w->q.head == w->q.n && w->ndirs)
            scan_next_dir(w);
        qitem it;
        if (dequeue(&w->q, &it)) {
            progress_clear(w);
            int r = take_file(w, it.path, it.scanned, it.tries);
            after_take(w, &it, r);
            if (r == TAKEN)
                last_progress = wd_now_mono();
            free(it.path);
            int quiet = 0;
            wseries *s = next_ready(w, 0, &quiet);
            if (s && measure_series(w, s, quiet) != RETRY)
                last_progress = wd_now_mono();
            wd_alerts_step(w->alerts, w->d);
            ping(w, 0);
            progress_draw(w, 0);
            continue;
        }
        /* Nothing ready to take: series first, then waiting. */
        int quiet = 0;
        int allow_quiet = w->q.head == w->q.n && !w->ndirs;
        wseries *s = next_ready(w, allow_quiet && !w->once, &quiet);
        if (!s && w->once && allow_quiet && !w->q.nlate) {
            /* --once: the folder is done; measure what has been quiet long enough (after the
             * looks for moved files that are under way). */
            s = next_ready(w, 1, &quiet);
            if (!s && !looking(w))
                break;
        }
        if (s) {
            progress_clear(w);
            if (measure_series(w, s, quiet) != RETRY)
                last_progress = wd_now_mono();
            progress_draw(w, 0);
            continue;
        }
        wd_alerts_step(w->alerts, w->d);
        ping(w, 0);
        if (w->once && wd_now_mono() - last_progress > 120) {
            wd_error("no progress for two minutes (the store stays locked?); stopping with %zu "
                     "files left",
                     queue_len(&w->q));
            break;
        }
        /* Sleep until something is due: a delayed file, a quiet series, an alert, the watchdog. */
        double t = 5.0, d;
        if ((d = next_due(&w->q) - wd_now_mono()) < t)
            t = d;
        if (!w->once && (d = next_quiet_s(w)) < t)
            t = d;
        for (int i = 0; i < w->nseries; i++)
            if (w->series[i]->retry_at > 0 && (d = w->series[i]->retry_at - wd_now_mono()) < t)
                t = d;
        if ((d = wd_alerts_next_s(w->alerts)) >= 0 && d < t)
            t = d;
        if (w->watchdog_every > 0 && (d = w->last_ping + w->watchdog_every - wd_now_mono()) < t)
            t = d;
        if (w->watch_failed && !w->once) {
            if (wd_now_mono() >= w->next_rescan) {
                rescan_all(w);
                w->next_rescan = wd_now_mono() + 60;
                continue;
            }
            if ((d = w->next_rescan - wd_now_mono()) < t)
                t = d;
        }
        if (t < 0.01)
            t = 0.01;
        struct pollfd pfd[2] = {{.fd = w->sfd, .events = POLLIN}, {.fd = w->ifd, .events = POLLIN}};
        (void)poll(pfd, w->ifd >= 0 ? 2 : 1, (int)(t * 1000 + 0.5));
    }
    return 0;
}

/* ---- the command ---- */

static void usage(FILE *f)
{
    fprintf(
        f,
        "usage: slicewarden watch [-c FILE] [--folder DIR] [--db FILE] [--once] [--quiet SECONDS]\n"
        "                         [--no-progress] [--no-png] [-v]\n"
        "Watches the folder where phantom series arrive, measures each series when it is\n"
        "complete or quiet, stores the results and moves the files on.\n"
        "  -c, --config FILE  configuration (default %s when it exists, else built-in defaults)\n"
        "  --folder DIR       the watch folder (overrides [watch] folder)\n"
        "  --db FILE          the database (overrides [watch] database)\n"
        "  --once             process what is in the folder now and exit\n"
        "  --quiet SECONDS    quiet period (overrides [watch] quiet_seconds; 0 allowed)\n"
        "  --no-progress      no progress bar with --once (it shows only on a terminal)\n"
        "  --no-png           no annotated PNGs (a backfill: they take half the time)\n"
        "  -v, --verbose      debug log\n"
        "Signals: SIGTERM finishes the series in hand and exits 0; SIGHUP reloads the\n"
        "configuration (a bad one is refused and the running one kept).\n"
        "Exit status: 0 done; 1 files or series left to retry, or a fatal error; 2 usage or\n"
        "configuration error.\n",
        WD_DEFAULT_CONFIG);
}

static void summary(watcher *w, FILE *f)
{
    int started = 0, ok = 0, failed = 0;
    wd_alerts_counts(w->alerts, &started, &ok, &failed);
    const stats *s = &w->st;
    fprintf(f,
            "slicewarden watch: %ld files (%ld stored, %ld quarantined, %ld ignored; %ld moved, "
            "%ld not moved), %ld series measured (%ld pass, %ld warn, %ld fail, %ld "
            "unmeasurable), %ld not measured, %d still collecting, %ld alerts (%d sent, %d "
            "failed), %zu files left; %.1f s\n",
            s->files_done, s->stored, s->quarantined, s->ignored, s->moved, s->move_failures,
            s->series_measured, s->verdict[DB_PASS], s->verdict[DB_WARN], s->verdict[DB_FAIL],
            s->verdict[DB_UNMEASURABLE], s->series_failed, w->nseries, s->alerts_recorded, ok,
            failed, queue_len(&w->q), wd_now_mono() - w->started);
}

static int open_db(watcher *w, sw_error *err)
{
    double until = wd_now_mono() + 60;
    for (;;) {
        sw_error_clear(err);
        sw_status rc = db_open(w->s->cfg.database, DB_OPEN_RW | DB_OPEN_CREATE, &w->d, err);
        if (rc == SW_OK)
            break;
        if (rc != SW_EBUSY || wd_now_mono() > until)
            return -1;
        wd_warn("%s; retrying", err->msg);
        sleep(1);
    }
    /* Short waits for a lock: the loop retries, and stays responsive to signals meanwhile. */
    return db_set_busy_timeout(w->d, 1000, err) == SW_OK ? 0 : -1;
}

int wd_cmd_watch(int argc, char **argv)
{
    static const struct option opts[] = {
        {"config", required_argument, NULL, 'c'}, {"folder", required_argument, NULL, 'F'},
        {"db", required_argument, NULL, 'D'},     {"once", no_argument, NULL, 'o'},
        {"quiet", required_argument, NULL, 'q'},  {"no-progress", no_argument, NULL, 'P'},
        {"verbose", no_argument, NULL, 'v'},      {"help", no_argument, NULL, 'h'},
        {"no-png", no_argument, NULL, 'N'},       {NULL, 0, NULL, 0},
    };
    int rc = 1, c, verbose = 0, no_progress = 0, dcm_ready = 0;
    watcher *w = calloc(1, sizeof *w);
    sigset_t mask, old_mask;
    sigemptyset(&mask);
    if (!w) {
        fprintf(stderr, "slicewarden watch: out of memory\n");
        return 1;
    }
    w->ifd = w->sfd = w->lockfd = -1;
    w->ov.quiet = -1;
    optind = 1;
    while ((c = getopt_long(argc, argv, "c:vh", opts, NULL)) != -1) {
        switch (c) {
        case 'c': w->config_path = optarg; break;
        case 'F': w->ov.folder = optarg; break;
        case 'D': w->ov.database = optarg; break;
        case 'o': w->once = 1; break;
        case 'q': {
            char *end = NULL;
            w->ov.quiet = strtod(optarg, &end);
            if (!end || *end || !(w->ov.quiet >= 0 && w->ov.quiet <= 86400)) {
                fprintf(stderr, "slicewarden watch: --quiet takes seconds from 0 to 86400\n");
                rc = 2;
                goto out;
            }
            break;
        }
        case 'P': no_progress = 1; break;
        case 'N': w->no_png = 1; break;
        case 'v': verbose = 1; break;
        case 'h':
            usage(stdout);
            rc = 0;
            goto out;
        default:
            usage(stderr);
            rc = 2;
            goto out;
        }
    }
    if (optind < argc) {
        fprintf(stderr, "slicewarden watch: unexpected argument '%s'\n", argv[optind]);
        rc = 2;
        goto out;
    }
    if (!w->config_path && access(WD_DEFAULT_CONFIG, F_OK) == 0)
        w->config_path = WD_DEFAULT_CONFIG;
    sw_error err;
    sw_error_clear(&err);
    if (!(w->s = malloc(sizeof *w->s))) {
        fprintf(stderr, "slicewarden watch: out of memory\n");
        goto out;
    }
    if (settings_load(w->config_path, &w->ov, w->s, &err) != SW_OK) {
        fprintf(stderr, "slicewarden: %s\n", err.msg);
        rc = 2;
        goto out;
    }
    wd_log_set_level(verbose ? WD_LOG_DEBUG : (wd_log_level)w->s->cfg.log_level);
    struct stat st;
    if (stat(w->s->cfg.folder, &st) != 0 || !S_ISDIR(st.st_mode)) {
        wd_error("%s: the watch folder %s", w->s->cfg.folder,
                 errno == ENOENT ? "does not exist" : "is not a folder");
        rc = 2;
        goto out;
    }
    w->started = wd_now_mono();
    w->tty = isatty(2);
    w->progress = w->once && w->tty && !no_progress;

    /* One service per database: a second instance would race for the same files. */
    char lock[PATH_MAX + 8];
    snprintf(lock, sizeof lock, "%s.lock", w->s->cfg.database);
    if ((w->lockfd = open(lock, O_RDWR | O_CREAT | O_CLOEXEC, 0660)) < 0) {
        wd_error("%s: %s", lock, strerror(errno));
        goto out;
    }
    if (flock(w->lockfd, LOCK_EX | LOCK_NB) != 0) {
        wd_error("%s: another slicewarden watch is using %s", lock, w->s->cfg.database);
        goto out;
    }
    if (dcm_init(&err) != SW_OK) {
        wd_error("%s", err.msg);
        goto out;
    }
    dcm_ready = 1;
    if (open_db(w, &err) != 0) {
        wd_error("%s", err.msg);
        goto out;
    }
    wd_alert_opts ao = alert_opts(&w->s->cfg);
    if (wd_alerts_new(&ao, &w->alerts, &err) != SW_OK) {
        wd_error("%s", err.msg);
        goto out;
    }
    sigaddset(&mask, SIGTERM);
    sigaddset(&mask, SIGINT);
    sigaddset(&mask, SIGHUP);
    sigaddset(&mask, SIGCHLD);
    sigprocmask(SIG_BLOCK, &mask, &old_mask);
    signal(SIGPIPE, SIG_IGN);
    if ((w->sfd = signalfd(-1, &mask, SFD_NONBLOCK | SFD_CLOEXEC)) < 0) {
        wd_error("signalfd: %s", strerror(errno));
        goto out;
    }
    if (!w->once && (w->ifd = inotify_init1(IN_NONBLOCK | IN_CLOEXEC)) < 0) {
        wd_error("inotify: %s", strerror(errno));
        goto out;
    }
#ifdef SW_HAVE_SYSTEMD
    uint64_t usec = 0;
    if (!w->once && sd_watchdog_enabled(0, &usec) > 0)
        w->watchdog_every = (double)usec / 2e6;
#endif
    /* A crash last time? Take what it was working on out of the way first. */
    crash_guard(w->s->cfg.database);
    crash_info ci;
    crash_read(&ci);
    if (ci.have) {
        sw_error_clear(&err);
        sw_status rs = ci.series_id ? fail_crashed_series(w, &ci, &err)
                                    : quarantine_crashed_file(w, &ci, &err);
        if (rs != SW_OK) {
            wd_error("after a crash: %s", err.msg);
            goto out;
        }
    }
    /* Another writer may hold the store for a while (a re-analysis, a merge): wait for it. */
    for (double until = wd_now_mono() + 120;;) {
        sw_error_clear(&err);
        sw_status rs = rebuild(w, &err);
        if (rs == SW_OK)
            break;
        if (rs != SW_EBUSY || wd_now_mono() > until) {
            wd_error("resuming: %s", err.msg);
            goto out;
        }
        for (int i = 0; i < w->nseries; i++)
            series_free(w->series[i]);
        w->nseries = 0;
        sleep(1);
    }
    if (w->progress)
        w->files_total = count_files(w->s->cfg.folder, 0);
    rescan_all(w);
    wd_info("watching %s (database %s, %s; settings %.19s...)", w->s->cfg.folder,
            w->s->cfg.database, w->once ? "once" : "until stopped", w->s->hash);
    if (!w->once)
        notify("READY=1");
    ping(w, 1);
    loop(w);
    notify("STOPPING=1");
    progress_clear(w);
    wd_alerts_drain(w->alerts, w->d, w->once);
    if (w->once)
        summary(w, stdout);
    else
        summary(w, stderr);
    rc = w->stop == 2 ? 1 : 0;
    if (w->once &&
        (queue_len(&w->q) || w->st.move_failures || failed_to_measure(w) || w->listing_lost))
        rc = 1;
out:
    if (w->alerts)
        wd_alerts_free(w->alerts);
    db_close(w->d);
    if (dcm_ready)
        dcm_shutdown();
    if (w->ifd >= 0)
        close(w->ifd);
    if (w->sfd >= 0)
        close(w->sfd);
    if (w->lockfd >= 0)
        close(w->lockfd);
    for (int i = 0; i < w->nseries; i++)
        series_free(w->series[i]);
    free(w->series);
    for (size_t i = 0; i < w->nmap; i++)
        free(w->map[i].path);
    free(w->map);
    for (size_t i = 0; i < w->ndirs; i++)
        free(w->dirs[i]);
    free(w->dirs);
    queue_free(&w->q);
    for (size_t i = 0; i < w->njobs; i++)
        job_free(&w->jobs[i]);
    free(w->jobs);
    free(w->undo);
    free(w->s);
    free(w);
    return rc;
}
