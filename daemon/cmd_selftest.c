/* cmd_selftest.c: `slicewarden selftest`: a fixed, seeded sweep of simulated series through the
 * very path the service uses (DICOM files written, read back whole, decoded, measured by
 * wd_measure with the configured method), compared with the simulator's truth. It reports bias,
 * SD and the fraction measured per phantom model, quantity and condition against the accuracy
 * the project guarantees (docs/accuracy.md, "Guaranteed accuracy") and, for information, against
 * the accuracy bench's goals; it stores each run with the program version in the database, where
 * the HTML report shows it as software validation evidence. Exit 0 when every guaranteed limit
 * holds, 1 when one is broken, 2 on a usage or set-up error. */
#include <errno.h>
#include <getopt.h>
#include <jansson.h>
#include <math.h>
#include <pthread.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "config.h"
#include "db.h"
#include "files.h"
#include "pipeline.h"
#include "sim.h"
#include "watch.h"
#include "wd.h"

#define ST_SEED 20261201u
#define ST_MAX_MODELS 4
#define ST_MAX_CASES 256

/* Conditions of the sweep. */
enum { G_HIGH = 0, G_LOW, G_SHAPES, G_COUNT };
static const char *const group_name[G_COUNT] = {
    /* parenthesised: one element split over two lines (clang's -Wstring-concatenation) */
    ("SNR 50-100; thickness 0.6-1.4 x nominal; rotation +-5 deg, tilt +-1.5 deg, pitch +-0.5 deg, "
     "offsets"),
    "SNR 15-20; nominal thickness; small pose",
    "rect, Gaussian and blurred-rect profiles; nominal thickness; SNR 100",
};

/* The same conditions for a phantom with one ramp or a wedge, swept level about v. */
static const char *const group_name_level[G_COUNT] = {
    ("SNR 50-100; thickness 0.6-1.4 x nominal; rotation +-5 deg, level (one ramp), "
     "pitch +-0.5 deg, offsets"),
    "SNR 15-20; nominal thickness; small pose, level (one ramp)",
    "rect, Gaussian and blurred-rect profiles; nominal thickness; SNR 100",
};

static const char *condition_of(const an_model *m, int group)
{
    int crossed = m->method == AN_METHOD_CROSSED_RAMPS && m->n_ramps >= 2;
    return crossed ? group_name[group] : group_name_level[group];
}

/* Quantities compared with the truth. */
enum { Q_THICKNESS = 0, Q_BAR, Q_TILT, Q_COUNT };
static const char *const q_name[Q_COUNT] = {"slice thickness", "bar length difference",
                                            "ramp tilt"};
static const char *const q_unit[Q_COUNT] = {"mm", "mm", "deg"};

/* The accuracy the project guarantees (gates the exit status) and the bench's goals (reported
 * only). NAN: no limit. docs/accuracy.md states both; change them there and here together. */
typedef struct limits {
    double bias, sd, fraction; /* guaranteed: |bias| <=, SD <=, measured >= */
    double goal_bias, goal_sd;
} limits;
static const limits LIMITS[G_COUNT][Q_COUNT] = {
    [G_HIGH] = {[Q_THICKNESS] = {0.10, 0.10, 0.95, 0.05, 0.05},
                [Q_BAR] = {0.30, 0.30, 0.95, 0.10, 0.20},
                [Q_TILT] = {0.30, 0.30, 0.95, NAN, NAN}},
    [G_LOW] = {[Q_THICKNESS] = {0.25, 0.40, 0.85, NAN, 0.15},
               [Q_BAR] = {0.50, 0.60, 0.85, NAN, NAN},
               [Q_TILT] = {NAN, NAN, NAN, NAN, NAN}},
    [G_SHAPES] = {[Q_THICKNESS] = {0.15, 0.15, 0.95, NAN, NAN},
                  [Q_BAR] = {0.30, 0.30, 0.95, NAN, NAN},
                  [Q_TILT] = {NAN, NAN, NAN, NAN, NAN}},
};

typedef struct st_case {
    int model; /* index into the models */
    int group;
    sim_params p;
    /* results (filled by a worker) */
    int done;
    char fail[SW_ERROR_MAX + 32];
    int got[Q_COUNT][2];    /* measured per quantity (two wedge slices for Q_BAR) */
    double err[Q_COUNT][2]; /* measured minus truth */
    int want[Q_COUNT][2];   /* the truth has it */
} st_case;

typedef struct st_model {
    an_model m;
    char label[80]; /* model name and file */
} st_model;

typedef struct st_run {
    st_case *cases;
    int n_cases;
    st_model models[ST_MAX_MODELS];
    int n_models;
    wd_method method; /* the configured method; the model is each case's */
    char tmp[4096];
    int keep; /* 1: the simulated series stay in tmp (--keep), each with its truth.json */
    pthread_mutex_t lock;
    int next;
} st_run;

static double uniform(uint64_t *s, double lo, double hi)
{
    return lo + (hi - lo) * ((double)(sim_splitmix64(s) >> 11) / 9007199254740992.0);
}

static void add_case(st_run *r, int model, int group, const sim_params *p)
{
    if (r->n_cases >= ST_MAX_CASES)
        return;
    st_case *c = &r->cases[r->n_cases++];
    memset(c, 0, sizeof *c);
    c->model = model;
    c->group = group;
    c->p = *p;
    c->p.model = &r->models[model].m;
    c->p.seed = ST_SEED + (uint64_t)r->n_cases;
    c->p.scratch = 1;
    snprintf(c->p.id.station_name, sizeof c->p.id.station_name, "SELFTEST");
    snprintf(c->p.id.series_description, sizeof c->p.id.series_description,
             "slicewarden self-test T1");
}

/* The sweep: per model, the conditions above, drawn from the fixed seed. Thickness values stay
 * inside what each model's ramps can show (the strip must fit in the insert). */
static void build_sweep(st_run *r)
{
    uint64_t s = ST_SEED;
    for (int mi = 0; mi < r->n_models; mi++) {
        const an_model *m = &r->models[mi].m;
        double t0 = m->nominal_thickness_mm > 0 ? m->nominal_thickness_mm : 5;
        int first = mi == 0;
        int crossed = m->method == AN_METHOD_CROSSED_RAMPS && m->n_ramps >= 2;
        int n_high = first ? 16 : 8, n_low = first ? 8 : 4, n_shapes = first ? 6 : 3;
        for (int i = 0; i < n_high; i++) {
            sim_params p;
            sim_params_default(&p);
            p.profile.thickness_mm = t0 * uniform(&s, 0.6, 1.4);
            p.prescribed_mm = t0;
            p.snr = uniform(&s, 50, 100);
            p.pose.rot_deg = uniform(&s, -5, 5);
            /* One ramp (or a wedge) cannot tell a tilt about v from a thickness error: its
             * guarantee holds for a level phantom, so its sweep is level about v. */
            double tilt = uniform(&s, -1.5, 1.5);
            p.pose.tilt_v_deg = crossed ? tilt : 0;
            p.pose.tilt_u_deg = uniform(&s, -0.5, 0.5);
            p.pose.du_mm = uniform(&s, -5, 5);
            p.pose.dv_mm = uniform(&s, -5, 5);
            p.position_offset_mm = uniform(&s, -1.5, 1.5);
            p.position_scale = uniform(&s, -0.01, 0.01);
            add_case(r, mi, G_HIGH, &p);
        }
        for (int i = 0; i < n_low; i++) {
            sim_params p;
            sim_params_default(&p);
            p.profile.thickness_mm = t0;
            p.snr = uniform(&s, 15, 20);
            p.pose.rot_deg = uniform(&s, -2, 2);
            double tilt = uniform(&s, -1, 1);
            p.pose.tilt_v_deg = crossed ? tilt : 0;
            p.position_offset_mm = uniform(&s, -1, 1);
            add_case(r, mi, G_LOW, &p);
        }
        static const sim_profile_kind kinds[] = {SIM_PROFILE_RECT, SIM_PROFILE_GAUSS,
                                                 SIM_PROFILE_RECT_GAUSS};
        for (int i = 0; i < n_shapes; i++) {
            sim_params p;
            sim_params_default(&p);
            p.profile.kind = kinds[i % 3];
            p.profile.thickness_mm = t0;
            p.snr = 100;
            p.pose.rot_deg = uniform(&s, -2, 2);
            add_case(r, mi, G_SHAPES, &p);
        }
    }
}

/* One case: simulate, write the files, read them back whole, decode, measure, compare. */
static void run_case(st_run *r, st_case *c, int index)
{
    sw_error err;
    sw_error_clear(&err);
    sim_series *ss = NULL;
    dcm_file *files[SIM_MAX_IMAGES] = {0};
    int nf = 0;
    const dcm_image *imgs[SIM_MAX_IMAGES];
    int n = 0;
    wd_measured *m = NULL;
    char dir[4200];
    snprintf(dir, sizeof dir, "%s/case%03d", r->tmp, index);
    if (sim_series_render(&c->p, &ss, &err) != SW_OK || sim_series_write(ss, dir, &err) != SW_OK) {
        snprintf(c->fail, sizeof c->fail, "simulation: %s", err.msg);
        goto out;
    }
    int n_files = c->p.enhanced ? 1 : ss->n_images;
    for (int i = 0; i < n_files; i++) {
        char path[4300];
        snprintf(path, sizeof path, "%s/%s", dir, ss->file_name[i]);
        wd_blob b;
        if (wd_blob_read(path, &b, NULL, &err) != SW_OK) {
            snprintf(c->fail, sizeof c->fail, "%s", err.msg);
            goto out;
        }
        sw_status rd = dcm_read_buffer(b.data, b.len, path, NULL, &files[nf], &err);
        wd_blob_free(&b);
        if (rd != SW_OK) {
            snprintf(c->fail, sizeof c->fail, "%s", err.msg);
            goto out;
        }
        for (int k = 0; k < files[nf]->nframes && n < SIM_MAX_IMAGES; k++)
            imgs[n++] = &files[nf]->frames[k];
        nf++;
    }
    if (!(m = calloc(1, sizeof *m))) {
        snprintf(c->fail, sizeof c->fail, "out of memory");
        goto out;
    }
    wd_method method = r->method;
    method.model = r->models[c->model].m;
    if (wd_measure(imgs, n, &method, m, &err) != SW_OK || m->n_echoes < 1) {
        snprintf(c->fail, sizeof c->fail, "measurement: %s", err.msg);
        goto out;
    }
    const an_series_result *res = m->echo[0].res;
    const sim_truth *t = &ss->truth;
    const an_model *md = &r->models[c->model].m;
    c->want[Q_THICKNESS][0] = t->has_ramps;
    c->got[Q_THICKNESS][0] = res->thickness.measured;
    c->err[Q_THICKNESS][0] = res->thickness.corrected_mm - t->thickness_mm[0];
    int two = md->method == AN_METHOD_CROSSED_RAMPS && md->n_ramps >= 2;
    c->want[Q_TILT][0] = t->has_ramps && two;
    c->got[Q_TILT][0] = two && res->thickness.measured && isfinite(res->thickness.tilt_deg);
    c->err[Q_TILT][0] = res->thickness.tilt_deg - c->p.pose.tilt_v_deg;
    for (int k = 0; k < 2; k++) {
        const sim_wedge_truth *w = &t->wedge[k];
        c->want[Q_BAR][k] = t->has_wedges && w->ordinal > 0;
        /* the result's position k is the wedge slice of that ordinal */
        for (int j = 0; j < 2; j++)
            if (res->position[j].slice == w->ordinal && res->position[j].measured) {
                c->got[Q_BAR][k] = 1;
                c->err[Q_BAR][k] = res->position[j].bar_difference_mm - w->difference_mm;
            }
    }
out:
    if (m) {
        wd_measured_free(m);
        free(m);
    }
    for (int i = 0; i < nf; i++)
        dcm_file_free(files[i]);
    sim_series_free(ss);
    if (!r->keep)
        (void)wd_remove_tree(dir);
    c->done = 1;
}

static void *worker(void *arg)
{
    st_run *r = arg;
    for (;;) {
        pthread_mutex_lock(&r->lock);
        int i = r->next < r->n_cases ? r->next++ : -1;
        pthread_mutex_unlock(&r->lock);
        if (i < 0)
            return NULL;
        run_case(r, &r->cases[i], i);
    }
}

/* The statistics of one model, condition and quantity. */
static void row_of(const st_run *r, int model, int group, int q, db_selftest_row *row)
{
    memset(row, 0, sizeof *row);
    double s1 = 0, s2 = 0, mx = 0;
    int n = 0, got = 0;
    for (int i = 0; i < r->n_cases; i++) {
        const st_case *c = &r->cases[i];
        if (c->model != model || c->group != group)
            continue;
        for (int k = 0; k < 2; k++) {
            if (!c->want[q][k])
                continue;
            n++;
            if (!c->got[q][k] || !isfinite(c->err[q][k]))
                continue;
            got++;
            double e = c->err[q][k];
            s1 += e;
            s2 += e * e;
            if (fabs(e) > mx)
                mx = fabs(e);
        }
    }
    const limits *l = &LIMITS[group][q];
    row->model = r->models[model].label;
    row->quantity = q_name[q];
    row->condition = condition_of(&r->models[model].m, group);
    row->unit = q_unit[q];
    row->n = n;
    row->n_measured = got;
    row->bias = got ? s1 / got : NAN;
    double var = got > 1 ? (s2 - s1 * s1 / got) / (got - 1) : NAN;
    row->sd = got > 1 ? sqrt(var > 0 ? var : 0) : NAN;
    row->max_abs_error = got ? mx : NAN;
    row->limit_bias = l->bias;
    row->limit_sd = l->sd;
    row->min_fraction = l->fraction;
    row->goal_bias = l->goal_bias;
    row->goal_sd = l->goal_sd;
    row->guaranteed = isfinite(l->bias) || isfinite(l->sd) || isfinite(l->fraction);
    int ok = 1;
    if (isfinite(l->fraction))
        ok &= n > 0 && (double)got / n >= l->fraction;
    if (isfinite(l->bias))
        ok &= got > 0 && fabs(row->bias) <= l->bias;
    if (isfinite(l->sd))
        ok &= got > 1 && row->sd <= l->sd;
    row->passed = ok;
}

static void lim_text(double v, char *buf, size_t n, const char *fmt)
{
    if (isfinite(v))
        snprintf(buf, n, fmt, v);
    else
        snprintf(buf, n, "-");
}

static void print_rows(const db_selftest_row *rows, int n, FILE *f)
{
    fprintf(f, "%-36s %-22s %4s %5s %8s %7s %7s  %-18s %-11s %s\n", "model", "quantity", "n",
            "meas", "bias", "SD", "max|e|", "guaranteed b/SD/f", "goal b/SD", "result");
    const char *last_cond = "";
    for (int i = 0; i < n; i++) {
        const db_selftest_row *r = &rows[i];
        if (strcmp(r->condition, last_cond)) {
            fprintf(f, "  condition: %s\n", r->condition);
            last_cond = r->condition;
        }
        char b[16], s[16], m[16], lb[12], ls[12], lf[12], gb[12], gs[12], g[40], gl[28];
        lim_text(r->bias, b, sizeof b, "%+.3f");
        lim_text(r->sd, s, sizeof s, "%.3f");
        lim_text(r->max_abs_error, m, sizeof m, "%.3f");
        lim_text(r->limit_bias, lb, sizeof lb, "%.2f");
        lim_text(r->limit_sd, ls, sizeof ls, "%.2f");
        lim_text(r->min_fraction, lf, sizeof lf, "%.2f");
        lim_text(r->goal_bias, gb, sizeof gb, "%.2f");
        lim_text(r->goal_sd, gs, sizeof gs, "%.2f");
        snprintf(g, sizeof g, "%s/%s/%s", lb, ls, lf);
        snprintf(gl, sizeof gl, "%s/%s", gb, gs);
        fprintf(f, "%-36.36s %-22s %4d %5d %8s %7s %7s  %-18s %-11s %s %s\n", r->model,
                r->quantity, r->n, r->n_measured, b, s, m, g, gl,
                !r->guaranteed ? "info" : r->passed ? "pass" : "FAIL", r->unit);
    }
}

static void usage(FILE *f)
{
    fprintf(f,
            "usage: slicewarden selftest [-c FILE] [--db FILE] [--no-store] [--model FILE]...\n"
            "                            [--jobs N]\n"
            "Measures a fixed, seeded sweep of simulated series (thickness, displacement, tilt,\n"
            "rotation, SNR, profile shapes) through the service's own path, and reports bias, SD\n"
            "and the fraction measured against the accuracy the project guarantees\n"
            "(docs/accuracy.md). Each run is stored with the program version in the database and\n"
            "shown in the HTML report as software validation evidence.\n"
            "  -c, --config FILE  configuration: its database, method and phantom model (default\n"
            "                     %s when it exists)\n"
            "  --db FILE          the database (overrides [watch] database; created if absent)\n"
            "  --no-store         report only; store nothing\n"
            "  --model FILE       also sweep this phantom model file (repeatable)\n"
            "  --jobs N           worker threads [the processors online, at most 4]\n"
            "  --keep DIR         keep the simulated series in DIR/caseNNN, each with truth.json\n"
            "Exit status: 0 every guaranteed limit holds; 1 one is broken; 2 usage or set-up "
            "error.\n"
            "Results support, and never replace, a qualified medical physicist's review.\n",
            WD_DEFAULT_CONFIG);
}

/* config/small-single-ramp.model as it was at build time (daemon/CMakeLists.txt). */
extern const char wd_small_model_text[];

static int add_model_text(st_run *r, const char *text, const char *label, sw_error *err)
{
    if (r->n_models >= ST_MAX_MODELS) {
        sw_error_set(err, SW_EINVAL, "selftest: at most %d models", ST_MAX_MODELS);
        return -1;
    }
    st_model *sm = &r->models[r->n_models];
    if (an_model_large(&sm->m) != SW_OK || an_model_parse(&sm->m, text, label, err) != SW_OK)
        return -1;
    char name[sizeof sm->m.name];
    sw_strlcpy(name, sm->m.name, sizeof name);
    snprintf(sm->label, sizeof sm->label, "%s (built-in)", name);
    r->n_models++;
    return 0;
}

static int add_model(st_run *r, const char *path, sw_error *err)
{
    if (r->n_models >= ST_MAX_MODELS) {
        sw_error_set(err, SW_EINVAL, "selftest: at most %d models", ST_MAX_MODELS);
        return -1;
    }
    st_model *sm = &r->models[r->n_models];
    if (path) {
        if (wd_model_load(&sm->m, path, err) != SW_OK)
            return -1;
        const char *base = strrchr(path, '/');
        char name[sizeof sm->m.name];
        sw_strlcpy(name, sm->m.name, sizeof name);
        snprintf(sm->label, sizeof sm->label, "%s (%s)", name, base ? base + 1 : path);
    } else {
        an_model_large(&sm->m);
        char name[sizeof sm->m.name];
        sw_strlcpy(name, sm->m.name, sizeof name);
        snprintf(sm->label, sizeof sm->label, "%s (built-in)", name);
    }
    for (int i = 0; i < r->n_models; i++)
        if (!strcmp(r->models[i].m.name, sm->m.name))
            return 0; /* the same model twice: swept once */
    r->n_models++;
    return 0;
}

int wd_cmd_selftest(int argc, char **argv)
{
    static const struct option opts[] = {{"config", required_argument, NULL, 'c'},
                                         {"db", required_argument, NULL, 'd'},
                                         {"no-store", no_argument, NULL, 'n'},
                                         {"model", required_argument, NULL, 'm'},
                                         {"jobs", required_argument, NULL, 'j'},
                                         {"keep", required_argument, NULL, 'k'},
                                         {"help", no_argument, NULL, 'h'},
                                         {NULL, 0, NULL, 0}};
    const char *config_path = NULL, *db_path = NULL, *keep = NULL;
    const char *extra[ST_MAX_MODELS];
    int n_extra = 0, store = 1, jobs = 0, status = 2;
    st_run *r = NULL;
    db *d = NULL;
    db_selftest_row *rows = NULL;
    sw_error err;
    sw_error_clear(&err);
    int c;
    optind = 1;
    while ((c = getopt_long(argc, argv, "c:h", opts, NULL)) != -1) {
        switch (c) {
        case 'c': config_path = optarg; break;
        case 'd': db_path = optarg; break;
        case 'n': store = 0; break;
        case 'k': keep = optarg; break;
        case 'm':
            if (n_extra == ST_MAX_MODELS - 1) {
                fprintf(stderr, "slicewarden selftest: at most %d --model\n", ST_MAX_MODELS - 1);
                return 2;
            }
            extra[n_extra++] = optarg;
            break;
        case 'j': {
            char *end = NULL;
            long v = strtol(optarg, &end, 10);
            if (!end || *end || v < 1 || v > 64) {
                fprintf(stderr, "slicewarden selftest: --jobs wants 1 to 64, not '%s'\n", optarg);
                return 2;
            }
            jobs = (int)v;
            break;
        }
        case 'h': usage(stdout); return 0;
        default: usage(stderr); return 2;
        }
    }
    if (optind < argc) {
        fprintf(stderr, "slicewarden selftest: unexpected argument '%s'\n", argv[optind]);
        usage(stderr);
        return 2;
    }
    if (dcm_init(&err) != SW_OK) {
        fprintf(stderr, "slicewarden selftest: %s\n", err.msg);
        return 2;
    }
    wd_config cfg;
    wd_config_default(&cfg);
    if (!config_path && access(WD_DEFAULT_CONFIG, F_OK) == 0)
        config_path = WD_DEFAULT_CONFIG;
    if (config_path && wd_config_load(&cfg, config_path, &err) != SW_OK) {
        fprintf(stderr, "slicewarden selftest: %s\n", err.msg);
        return 2;
    }
    if (db_path)
        sw_strlcpy(cfg.database, db_path, sizeof cfg.database);
    if (!(r = calloc(1, sizeof *r)) || !(r->cases = calloc(ST_MAX_CASES, sizeof *r->cases))) {
        fprintf(stderr, "slicewarden selftest: out of memory\n");
        goto out;
    }
    pthread_mutex_init(&r->lock, NULL);
    wd_method_default(&r->method);
    r->method.params.half_level = cfg.half_level;
    r->method.hints = cfg.drift.hints;
    if (add_model(r, NULL, &err) != 0 ||
        add_model_text(r, wd_small_model_text, "config/small-single-ramp.model (built in)",
                       &err) != 0 ||
        (cfg.model_file[0] && add_model(r, cfg.model_file, &err) != 0)) {
        fprintf(stderr, "slicewarden selftest: %s\n", err.msg);
        goto out;
    }
    for (int i = 0; i < n_extra; i++)
        if (add_model(r, extra[i], &err) != 0) {
            fprintf(stderr, "slicewarden selftest: %s\n", err.msg);
            goto out;
        }
    /* The store first: a database that cannot be written is found before the work. */
    if (store && db_open(cfg.database, DB_OPEN_RW | DB_OPEN_CREATE, &d, &err) != SW_OK) {
        fprintf(stderr, "slicewarden selftest: %s (use --db FILE, or --no-store)\n", err.msg);
        goto out;
    }
    const char *tmpdir = getenv("TMPDIR");
    if (keep) {
        r->keep = 1;
        if (snprintf(r->tmp, sizeof r->tmp, "%s", keep) >= (int)sizeof r->tmp ||
            wd_mkdirs(r->tmp, &err) != SW_OK) {
            fprintf(stderr, "slicewarden selftest: --keep %s: %s\n", keep,
                    err.msg[0] ? err.msg : "path too long");
            r->tmp[0] = '\0';
            goto out;
        }
    } else if (snprintf(r->tmp, sizeof r->tmp, "%s/slicewarden-selftest-XXXXXX",
                        tmpdir && *tmpdir ? tmpdir : "/tmp") >= (int)sizeof r->tmp ||
               !mkdtemp(r->tmp)) {
        fprintf(stderr, "slicewarden selftest: %s: cannot make a scratch folder: %s\n", r->tmp,
                strerror(errno));
        r->tmp[0] = '\0';
        goto out;
    }
    build_sweep(r);
    char started[32], finished[32];
    db_now_iso(started, sizeof started);
    double t0 = wd_now_mono();
    if (jobs <= 0) {
        long cpus = sysconf(_SC_NPROCESSORS_ONLN);
        jobs = cpus < 1 ? 1 : cpus > 4 ? 4 : (int)cpus;
    }
    pthread_t th[64];
    int started_threads = 0;
    for (int i = 0; i < jobs - 1; i++)
        if (pthread_create(&th[started_threads], NULL, worker, r) == 0)
            started_threads++;
    worker(r);
    for (int i = 0; i < started_threads; i++)
        pthread_join(th[i], NULL);
    double seconds = wd_now_mono() - t0;
    db_now_iso(finished, sizeof finished);

    if (r->keep) {
        /* What each kept folder is: the model and condition of its row. */
        json_t *list = json_array();
        for (int i = 0; list && i < r->n_cases; i++) {
            char name[32];
            snprintf(name, sizeof name, "case%03d", i);
            json_array_append_new(
                list, json_pack("{s:s, s:s, s:s, s:b}", "folder", name, "model",
                                r->models[r->cases[i].model].label, "condition",
                                condition_of(&r->models[r->cases[i].model].m,
                                             r->cases[i].group),
                                "ok", !r->cases[i].fail[0]));
        }
        char path[4200];
        snprintf(path, sizeof path, "%s/cases.json", r->tmp);
        if (!list || json_dump_file(list, path, JSON_INDENT(1)) != 0)
            fprintf(stderr, "slicewarden selftest: %s: cannot write\n", path);
        json_decref(list);
    }
    int n_failed_cases = 0;
    for (int i = 0; i < r->n_cases; i++)
        if (r->cases[i].fail[0]) {
            n_failed_cases++;
            fprintf(stderr, "slicewarden selftest: case %d: %s\n", i + 1, r->cases[i].fail);
        }
    if (!(rows = calloc((size_t)r->n_models * G_COUNT * Q_COUNT, sizeof *rows)))
        goto out;
    int nrows = 0, broken = 0;
    for (int mi = 0; mi < r->n_models; mi++)
        for (int g = 0; g < G_COUNT; g++)
            for (int q = 0; q < Q_COUNT; q++) {
                db_selftest_row row;
                row_of(r, mi, g, q, &row);
                if (row.n == 0)
                    continue;
                rows[nrows++] = row;
                broken += row.guaranteed && !row.passed;
            }
    int passed = !broken && !n_failed_cases;
    char summary[256];
    snprintf(summary, sizeof summary,
             "%d simulated series, %d model%s, %d rows: %s%s", r->n_cases, r->n_models,
             r->n_models == 1 ? "" : "s", nrows,
             passed ? "every guaranteed limit holds" : "a guaranteed limit is broken",
             n_failed_cases ? " (some series could not be simulated or measured)" : "");
    printf("slicewarden %s self-test: %d simulated series (seed %u), %.1f s, %d worker%s\n",
           SW_VERSION, r->n_cases, ST_SEED, seconds, jobs, jobs == 1 ? "" : "s");
    print_rows(rows, nrows, stdout);
    printf("%s\n", summary);
    printf("Results support, and never replace, a qualified medical physicist's review.\n");
    if (store) {
        char host[256] = "";
        if (gethostname(host, sizeof host - 1) != 0)
            host[0] = '\0';
        db_selftest_info info = {.program_version = SW_VERSION,
                                 .started_at = started,
                                 .finished_at = finished,
                                 .host = host,
                                 .summary = summary,
                                 .seconds = seconds,
                                 .seed = ST_SEED,
                                 .n_series = r->n_cases,
                                 .passed = passed};
        int64_t id = 0;
        if (db_selftest_add(d, &info, rows, nrows, &id, &err) != SW_OK) {
            fprintf(stderr, "slicewarden selftest: not stored: %s\n", err.msg);
            goto out;
        }
        printf("stored as self-test %lld in %s\n", (long long)id, cfg.database);
    }
    status = passed ? 0 : 1;
out:
    if (r && r->tmp[0] && !r->keep)
        (void)wd_remove_tree(r->tmp);
    db_close(d);
    free(rows);
    if (r) {
        pthread_mutex_destroy(&r->lock);
        free(r->cases);
        free(r);
    }
    return status;
}
