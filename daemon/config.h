/* config.h: the configuration file, the phantom model file and the tolerance file. Each is an INI
 * file read with inih through one table of fields (name, type, default, range, target) that parses,
 * validates and prints the effective values; a bad file is rejected whole, naming the line. */
#ifndef WD_CONFIG_H
#define WD_CONFIG_H

#include <limits.h>
#include <stdio.h>

#include "analysis.h"
#include "drift.h"
#include "hints.h"
#include "sw.h"

#define WD_DEFAULT_CONFIG "/etc/slicewarden/slicewarden.conf"
#define WD_MAX_ALIASES 256
#define WD_MAX_TOL_RULES 64

typedef struct wd_alias {
    char station[65];
    char alias[129];
} wd_alias;

/* A tolerance set that applies to one scanner (station name, "*" any) and series type. */
typedef struct wd_tol_rule {
    char station[65];
    char series_type[16]; /* "t1", "t2", "3d" or "*" */
    an_tolerance tol;
} wd_tol_rule;

/* Drift statistics' settings ([drift]; the report's command line may override them). */
typedef struct wd_drift_opts {
    an_drift_params p;      /* lambda, L, k, h, baseline_n, confidence, close_after */
    char baseline_from[32]; /* ISO 8601 date or date-time; with baseline_to: the baseline period */
    char baseline_to[32];   /* [from, to); both empty: the first p.baseline_n accepted results */
    double sigma_floor_fraction; /* sigma >= this fraction of the pass limits' half-width (0.1) */
    /* [hints] (additive): when a number counts as off for the cause hints, beside results (the
     * measurement takes them from here too) and beside drift alarms */
    wd_hint_settings hints;
} wd_drift_opts;

typedef struct wd_config {
    /* [watch] */
    char folder[PATH_MAX];
    char database[PATH_MAX];
    char archive[PATH_MAX];    /* empty: the folder "archive" beside the watch folder */
    char quarantine[PATH_MAX]; /* empty: "quarantine" beside the watch folder */
    char ignored[PATH_MAX];    /* empty: "ignored" beside the watch folder */
    int move_files;            /* 1: move files when done; 0: leave them in place */
    double quiet_seconds;      /* a series with no new image for this long is analysed */
    /* [phantom] */
    char model_file[PATH_MAX];     /* empty: the built-in large phantom */
    char tolerance_file[PATH_MAX]; /* empty: the built-in default set */
    /* [match] */
    char t1_match[256]; /* glob patterns on SeriesDescription or ProtocolName, '|' separated */
    char t2_match[256];
    int match_by_content; /* 1: a series not matched by name is still measured when it has 11*k images */
    /* [analysis] */
    int half_level;       /* an_half_level */
    /* [alert] */
    char alert_command[1024];
    double alert_retry_seconds;
    /* added for the watch service (additive): */
    double alert_timeout_seconds; /* a command running longer is killed */
    int alert_max_attempts;       /* failed attempts before an alert is given up */
    char images[PATH_MAX];        /* annotated PNGs; empty: "images" beside the watch folder */
    /* [drift] */
    wd_drift_opts drift;
    /* [log] */
    int log_level;        /* wd_log_level */
    /* [aliases] station = alias */
    int n_aliases;
    wd_alias alias[WD_MAX_ALIASES];
    char path[PATH_MAX];  /* the file read, empty for defaults */
} wd_config;

/* Defaults: every field as the table says. */
void wd_config_default(wd_config *c);
/* Reads path over the defaults into c. On failure c is left with the defaults only and err names
 * the file, the line and the reason. */
sw_status wd_config_load(wd_config *c, const char *path, sw_error *err);
/* Fills the archive/quarantine/ignored/images folders left empty from the watch folder. */
void wd_config_resolve(wd_config *c);
/* Prints the effective configuration as an INI file that wd_config_load reads back. */
void wd_config_print(const wd_config *c, FILE *f);
/* The alias of a station, or the station name itself. */
const char *wd_config_alias(const wd_config *c, const char *station);

/* Phantom model file: [phantom] and [insert] / [ramp.top] / [ramp.bottom] / [wedges] over
 * an_model_large(). */
sw_status wd_model_load(an_model *m, const char *path, sw_error *err);
void wd_model_print(const an_model *m, FILE *f);

/* Tolerance file: [default] and [rule NAME] sections with station and series_type keys. */
typedef struct wd_tolerances {
    an_tolerance base;
    int n_rules;
    wd_tol_rule rule[WD_MAX_TOL_RULES];
} wd_tolerances;
void wd_tolerances_default(wd_tolerances *t);
sw_status wd_tolerances_load(wd_tolerances *t, const char *path, sw_error *err);
/* The set for a station and series type: the last matching rule, else the default. */
const an_tolerance *wd_tolerances_for(const wd_tolerances *t, const char *station,
                                      const char *series_type);
void wd_tolerances_print(const wd_tolerances *t, FILE *f);

#endif
