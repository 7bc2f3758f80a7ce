/* reanalyze.c: `slicewarden reanalyze`: measure stored series again from their archived files,
 * with the settings in force now. Each series gets a new run; nothing stored is changed. */
#include <getopt.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "trends.h"
#include "watch.h"
#include "wd.h"

static void usage(FILE *f)
{
    fprintf(
        f,
        "usage: slicewarden reanalyze [-c FILE] [--db FILE] [--no-png] [--alerts]\n"
        "                             (--series UID... | --since DATE [--until DATE])\n"
        "Measures stored series again from their files (archived location, else the path they\n"
        "arrived under) with the current settings. Each series gets a new run; earlier runs\n"
        "stay as they are.\n"
        "  -c, --config FILE  configuration (default %s when it exists)\n"
        "  --db FILE          the database (overrides [watch] database)\n"
        "  --series UID       a SeriesInstanceUID (repeatable)\n"
        "  --since DATE       series acquired on or after DATE (YYYY-MM-DD[THH:MM:SS])\n"
        "  --until DATE       ... and before DATE\n"
        "  --no-png           do not write annotated PNGs\n"
        "  --alerts           record alerts for warn and fail results (off: a re-analysis of\n"
        "                     history does not page anyone)\n"
        "Exit status: 0 every series measured, 1 some could not be, 2 usage or configuration.\n",
        WD_DEFAULT_CONFIG);
}

typedef struct idlist {
    int64_t *v;
    int n, cap;
} idlist;

static int id_add(idlist *l, int64_t id)
{
    for (int i = 0; i < l->n; i++)
        if (l->v[i] == id)
            return 0;
    if (l->n == l->cap) {
        int c = l->cap ? l->cap * 2 : 32;
        int64_t *v = realloc(l->v, (size_t)c * sizeof *v);
        if (!v)
            return -1;
        l->v = v;
        l->cap = c;
    }
    l->v[l->n++] = id;
    return 0;
}

static int uid_cb(void *ctx, const db_series_rec *r)
{
    return id_add(ctx, r->id) ? 1 : 0;
}

typedef struct one_series {
    db_series_rec rec;
    char uid[DCM_UID_MAX], type[16];
    int64_t scanner_id;
    db_series_state state;
} one_series;

static int series_cb(void *ctx, const db_series_rec *r)
{
    one_series *s = ctx;
    sw_strlcpy(s->uid, r->info.series_instance_uid, sizeof s->uid);
    sw_strlcpy(s->type, r->info.series_type, sizeof s->type);
    s->scanner_id = r->scanner_id;
    s->state = r->state;
    return 0;
}

typedef struct scan_look {
    int64_t id;
    char station[DCM_STR_MAX], alias[DCM_STR_MAX];
} scan_look;

static int scanner_cb(void *ctx, const db_scanner_rec *r)
{
    scan_look *s = ctx;
    if (r->id != s->id)
        return 0;
    sw_strlcpy(s->station, r->info.station_name, sizeof s->station);
    sw_strlcpy(s->alias, r->info.site_alias, sizeof s->alias);
    return 1;
}

typedef struct file_ref {
    char *where;
    char hash[WD_HASH_MAX];
} file_ref;

typedef struct file_refs {
    file_ref *v;
    int n, cap;
    int series_failed; /* the series was never stored */
} file_refs;

static int file_cb(void *ctx, const db_file_rec *r)
{
    file_refs *l = ctx;
    /* The files measured (stored) and those refused with their series (quarantined after they
     * were parsed). Of a series that failed (for example "not a phantom series" before a match
     * rule was added), its ignored files too, but never a duplicate of another file. */
    int take = r->state == DB_FILE_STORED || r->state == DB_FILE_QUARANTINED ||
               (l->series_failed && r->state == DB_FILE_IGNORED &&
                strncmp(r->reason, "duplicate", 9) != 0);
    if (!take)
        return 0;
    const char *where = r->location[0] && access(r->location, F_OK) == 0 ? r->location : r->path;
    if (l->n == l->cap) {
        int c = l->cap ? l->cap * 2 : 32;
        file_ref *v = realloc(l->v, (size_t)c * sizeof *v);
        if (!v)
            return 1;
        l->v = v;
        l->cap = c;
    }
    if (!(l->v[l->n].where = strdup(where)))
        return 1;
    sw_strlcpy(l->v[l->n].hash, r->content_hash, sizeof l->v[l->n].hash);
    l->n++;
    return 0;
}

/* Measures one series again; 0 when a run was stored. */
static int redo(db *d, const wd_settings *s, int64_t series_id, int png, int alerts)
{
    sw_error err;
    sw_error_clear(&err);
    one_series os;
    memset(&os, 0, sizeof os);
    scan_look sc;
    memset(&sc, 0, sizeof sc);
    file_refs fr = {0};
    dcm_file **files = NULL;
    const dcm_image **imgs = NULL;
    wd_measured m;
    memset(&m, 0, sizeof m);
    int rc = 1, n_img = 0, cap = 0, began = 0;
    if (db_series_get(d, series_id, series_cb, &os, &err) != SW_OK)
        goto fail;
    sc.id = os.scanner_id;
    fr.series_failed = os.state == DB_SERIES_FAILED;
    if (db_scanners_each(d, scanner_cb, &sc, &err) != SW_OK ||
        db_series_files(d, series_id, file_cb, &fr, &err) != SW_OK)
        goto fail;
    if (!(files = calloc((size_t)fr.n + 1, sizeof *files))) {
        sw_error_set(&err, SW_ENOMEM, "out of memory");
        goto fail;
    }
    for (int i = 0; i < fr.n; i++) {
        wd_blob b;
        sw_error e2;
        sw_error_clear(&e2);
        if (wd_blob_read(fr.v[i].where, &b, NULL, &e2) != SW_OK) {
            wd_warn("series %s: %s; left out", os.uid, e2.msg);
            continue;
        }
        if (strcmp(b.hash, fr.v[i].hash) != 0) {
            wd_warn("series %s: %s: content differs from what was stored (%s); left out", os.uid,
                    fr.v[i].where, fr.v[i].hash);
            wd_blob_free(&b);
            continue;
        }
        if (dcm_read_buffer(b.data, b.len, fr.v[i].where, NULL, &files[i], &e2) != SW_OK)
            wd_warn("series %s: %s; left out", os.uid, e2.msg);
        else
            cap += files[i]->nframes;
        wd_blob_free(&b);
    }
    if (!(imgs = calloc((size_t)cap + 1, sizeof *imgs))) {
        sw_error_set(&err, SW_ENOMEM, "out of memory");
        goto fail;
    }
    for (int i = 0; i < fr.n; i++)
        for (int k = 0; files[i] && k < files[i]->nframes; k++)
            imgs[n_img++] = &files[i]->frames[k];
    if (!n_img) {
        sw_error_set(&err, SW_ENOTFOUND, "no readable file of the series is left");
        goto fail;
    }
    wd_match match = !strcmp(os.type, "t1")   ? WD_MATCH_T1
                     : !strcmp(os.type, "t2") ? WD_MATCH_T2
                                              : WD_MATCH_CONTENT;
    wd_method method = {.model = s->model, .params = s->params, .hints = s->cfg.drift.hints};
    method.tol = *wd_tolerances_for(&s->tol, sc.station, wd_tolerance_key(match, imgs[0]));
    sw_error e3;
    sw_error_clear(&e3);
    char fail_why[SW_ERROR_MAX + 32] = "";
    int measured = wd_measure(imgs, n_img, &method, &m, &e3) == SW_OK;
    if (!measured)
        snprintf(fail_why, sizeof fail_why, "not measurable: %s", e3.msg);
    const char *label = sc.alias[0] ? sc.alias : wd_config_alias(&s->cfg, sc.station);
    wd_series_ctx ctx = {.series_id = series_id,
                         .scanner_id = os.scanner_id,
                         .scanner_label = label,
                         .station = sc.station,
                         .images_dir = png ? s->cfg.images : NULL,
                         .config_hash = s->hash,
                         .tolerance_key = wd_tolerance_key(match, imgs[0]),
                         .alerts = alerts};
    wd_store_result res;
    /* The service may hold the store for a moment (a series of its own): wait for it. */
    for (int tries = 0;; tries++) {
        sw_error_clear(&err);
        sw_status bs = db_begin(d, &err);
        if (bs == SW_OK)
            break;
        if (bs != SW_EBUSY || tries == 12)
            goto fail;
    }
    began = 1;
    if (wd_store_run(d, &ctx, &method, measured ? &m : NULL, fail_why, &res, &err) != SW_OK)
        goto fail;
    /* With --alerts, drift is checked too (the new run is now the series' latest). */
    if (alerts && measured) {
        sw_error e4;
        sw_error_clear(&e4);
        if (wd_drift_check_run(d, os.scanner_id, res.run_id, &s->cfg.drift,
                               res.n_pngs ? res.png[0].path : NULL, NULL, NULL, &e4) != SW_OK)
            wd_error("series %s: drift check: %s", os.uid, e4.msg);
    }
    /* A series that had failed and now measures is stored at last; a stored one stays stored. */
    if (measured && os.state == DB_SERIES_FAILED &&
        (db_series_set_state(d, series_id, DB_SERIES_FAILED, DB_SERIES_MEASURED, NULL, &err) !=
             SW_OK ||
         db_series_set_state(d, series_id, DB_SERIES_MEASURED, DB_SERIES_STORED, NULL, &err) !=
             SW_OK))
        goto fail;
    if (db_commit(d, &err) != SW_OK)
        goto fail;
    began = 0;
    wd_info("series %s #%d %s [re-analysis, %d images, run %lld]: %s; verdict %s", label,
            m.first ? m.first->series_number : 0, os.uid, n_img, (long long)res.run_id, res.summary,
            db_verdict_name(res.verdict));
    rc = measured ? 0 : 1;
    goto out;
fail:
    wd_error("series %s: %s", os.uid[0] ? os.uid : "?", err.msg);
out:
    if (began)
        (void)db_rollback(d, NULL);
    wd_measured_free(&m);
    if (files)
        for (int i = 0; i < fr.n; i++)
            dcm_file_free(files[i]);
    free(files);
    free(imgs);
    for (int i = 0; i < fr.n; i++)
        free(fr.v[i].where);
    free(fr.v);
    return rc;
}

int wd_cmd_reanalyze(int argc, char **argv)
{
    static const struct option opts[] = {
        {"config", required_argument, NULL, 'c'}, {"db", required_argument, NULL, 'D'},
        {"series", required_argument, NULL, 'S'}, {"since", required_argument, NULL, 's'},
        {"until", required_argument, NULL, 'u'},  {"no-png", no_argument, NULL, 'P'},
        {"alerts", no_argument, NULL, 'a'},       {"verbose", no_argument, NULL, 'v'},
        {"help", no_argument, NULL, 'h'},         {NULL, 0, NULL, 0},
    };
    const char *config = NULL, *dbpath = NULL, *since = NULL, *until = NULL;
    const char **uids = NULL;
    int n_uids = 0, png = 1, alerts = 0, verbose = 0, rc = 2, c, dcm_ready = 0;
    wd_settings *s = NULL;
    db *d = NULL;
    idlist ids = {0};
    db_cursor *cur = NULL;
    if (!(uids = calloc((size_t)argc + 1, sizeof *uids)))
        return 2;
    optind = 1;
    while ((c = getopt_long(argc, argv, "c:vh", opts, NULL)) != -1) {
        switch (c) {
        case 'c': config = optarg; break;
        case 'D': dbpath = optarg; break;
        case 'S': uids[n_uids++] = optarg; break;
        case 's': since = optarg; break;
        case 'u': until = optarg; break;
        case 'P': png = 0; break;
        case 'a': alerts = 1; break;
        case 'v': verbose = 1; break;
        case 'h':
            usage(stdout);
            rc = 0;
            goto out;
        default: usage(stderr); goto out;
        }
    }
    if (optind < argc || (!n_uids && !since) || (n_uids && since)) {
        usage(stderr);
        goto out;
    }
    if (!config && access(WD_DEFAULT_CONFIG, F_OK) == 0)
        config = WD_DEFAULT_CONFIG;
    sw_error err;
    sw_error_clear(&err);
    if (!(s = malloc(sizeof *s)) || wd_settings_load(config, NULL, dbpath, -1, s, &err) != SW_OK) {
        fprintf(stderr, "slicewarden: %s\n", s ? err.msg : "out of memory");
        goto out;
    }
    wd_log_set_level(verbose ? WD_LOG_DEBUG : (wd_log_level)s->cfg.log_level);
    rc = 1;
    if (dcm_init(&err) != SW_OK) {
        wd_error("%s", err.msg);
        goto out;
    }
    dcm_ready = 1;
    if (db_open(s->cfg.database, DB_OPEN_RW, &d, &err) != SW_OK) {
        wd_error("%s", err.msg);
        goto out;
    }
    for (int i = 0; i < n_uids; i++) {
        sw_error_clear(&err);
        if (db_series_by_uid(d, uids[i], uid_cb, &ids, &err) != SW_OK)
            wd_error("%s", err.msg);
    }
    if (since) {
        /* Every series with a stored measurement acquired in the period (latest runs). */
        db_filter f;
        db_filter_init(&f);
        f.from = since;
        f.to = until;
        const db_row *row = NULL;
        if (db_cursor_open(d, &f, &cur, &err) != SW_OK) {
            wd_error("%s", err.msg);
            goto out;
        }
        while (db_cursor_next(cur, &row, &err) == SW_OK && row)
            if (id_add(&ids, row->series_id)) {
                wd_error("out of memory");
                goto out;
            }
        if (err.status != SW_OK) {
            wd_error("%s", err.msg);
            goto out;
        }
        db_cursor_close(cur);
        cur = NULL;
    }
    int bad = n_uids > ids.n;
    for (int i = 0; i < ids.n; i++)
        if (redo(d, s, ids.v[i], png, alerts) != 0)
            bad = 1;
    printf("slicewarden reanalyze: %d series%s\n", ids.n,
           bad ? ", some could not be measured" : "");
    rc = bad ? 1 : 0;
out:
    db_cursor_close(cur);
    db_close(d);
    if (dcm_ready)
        dcm_shutdown();
    free(ids.v);
    free(uids);
    free(s);
    return rc;
}
