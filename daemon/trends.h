/* trends.h: drift alarms and trend data from the store's history: the history of one scanner,
 * protocol (series type and echo), slice and metric; the drift statistics over it (analysis/
 * drift.h); and the check the watch service runs after storing a series, which opens a drift
 * episode with one alert, or closes it. Used by watch, report and the tests (daemon/drift.c). */
#ifndef WD_TRENDS_H
#define WD_TRENDS_H

#include <stdint.h>

#include "config.h"
#include "db.h"
#include "drift.h"
#include "sw.h"

/* ---- settings ---- */
/* wd_drift_opts is in config.h: the [drift] section of the configuration. */
void wd_drift_opts_default(wd_drift_opts *o);
/* Checks the parameters and the period's dates; err names the bad one. */
sw_status wd_drift_opts_check(const wd_drift_opts *o, sw_error *err);

/* Days since 1970-01-01T00:00 of "YYYY-MM-DD[THH:MM[:SS[.f]]]", "YYYY-MM" or "YYYY" (the first day
 * of the month or year), read as UTC: differences are what counts. NAN when malformed. */
double wd_iso_days(const char *iso);
/* The date "YYYY-MM-DD" of a day number (floor), into buf (>= 11 bytes); "" when not finite. */
char *wd_days_iso(double days, char *buf, size_t n);

/* ---- history ---- */
typedef struct wd_hpoint {
    int64_t series_id, run_id;
    char acquired_at[32];
    double t; /* wd_iso_days(acquired_at) */
    double value, uncertainty, nominal, limit_lo, limit_hi;
    db_verdict verdict;
    int accepted; /* may form a baseline: measured and not failing (pass, warn or info) */
} wd_hpoint;

typedef struct wd_history {
    int n, cap;
    wd_hpoint *pt; /* owned */
    char unit[16];
    int n_skipped; /* measured rows without an acquisition time (left out) */
} wd_history;

/* The measured rows of one key from each series' latest finished run, in acquisition order
 * (unmeasurable rows have no value and are left out). On success h owns its points (free with
 * wd_history_free); on failure h is empty. */
sw_status wd_history_load(db *d, const db_drift_key *k, wd_history *h, sw_error *err);
void wd_history_free(wd_history *h);

/* ---- statistics over a history ---- */
typedef struct wd_drift_eval {
    an_drift_summary sum;
    an_drift_track track; /* arrays of h->n, owned */
    int have_crossing;
    an_crossing crossing; /* of the trend with the latest point's pass limits */
    double limit_lo, limit_hi;
} wd_drift_eval;
/* On success e owns its arrays (wd_drift_eval_free); on failure e holds nothing. */
sw_status wd_drift_evaluate(const wd_history *h, const wd_drift_opts *o, wd_drift_eval *e,
                            sw_error *err);
void wd_drift_eval_free(wd_drift_eval *e);
/* "ewma-high,cusum-high" and so on, from AN_DRIFT_F_* flags; "" when in control. */
char *wd_drift_flags_text(unsigned flags, char *buf, size_t n);

/* ---- the alarm ----
 * Evaluates the key's history; when its latest point is out of control and no episode is open,
 * opens one with a drift alert (one per episode); when its latest o->p.close_after points are in
 * control, closes the open episode (no alert). Without a complete baseline nothing changes. Runs in
 * the caller's transaction when one is open, else in its own. png_path (may be NULL) goes with the
 * alert. */
typedef struct wd_drift_outcome {
    an_drift_status status;
    int started, ended; /* an episode opened (with its alert) / closed by this check */
    int64_t episode_id, alert_id;
    char message[640]; /* the alert's text, or a note on the state */
} wd_drift_outcome;
sw_status wd_drift_check(db *d, const db_drift_key *k, const wd_drift_opts *o, const char *png_path,
                         wd_drift_outcome *out, sw_error *err);

/* What the watch service calls after storing a run: wd_drift_check for every metric of that run
 * that has pass limits (slice thickness and bar length difference per echo and slice). Counts go
 * to *started and *ended (either may be NULL). */
sw_status wd_drift_check_run(db *d, int64_t scanner_id, int64_t run_id, const wd_drift_opts *o,
                             const char *png_path, int *started, int *ended, sw_error *err);

/* ---- shared by export and report (cmd_export.c) ---- */
/* Loads the configuration (the file given, else the default file when it exists, else defaults),
 * overrides its database with db_path when not NULL, and opens the store read-only. On success *out
 * is a handle the caller closes; on failure *out is NULL and err says why. */
sw_status wd_open_store_ro(const char *config_path, const char *db_path, wd_config *cfg, db **out,
                           sw_error *err);
/* 1 when s is an ISO 8601 prefix the period filter takes: YYYY, YYYY-MM, YYYY-MM-DD, then THH,
 * :MM, :SS. */
int wd_iso_prefix_ok(const char *s);
/* "pass,fail" into a verdict mask (1u << db_verdict); 0 with a message in bad on an unknown name.
 */
unsigned wd_verdict_mask(const char *list, char *bad, size_t nbad);

#endif
