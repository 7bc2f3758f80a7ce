/* html.h: the self-contained HTML report: per scanner a summary, trend charts as inline SVG (each
 * data point an element with data attributes), annotated images embedded as data: URIs, the review
 * caution, and a small inline script that counts the chart points into the DOM. Rendered from the
 * caller's numbers and strings (the daemon reads the store and runs the statistics); the only files
 * read are the PNGs named. Included from report.h. */
#ifndef RP_HTML_H
#define RP_HTML_H

#include <stddef.h>

#include "sw.h"

/* One result on a trend chart. Strings are borrowed for the call. */
typedef struct rp_tpoint {
    const char *date;       /* acquisition time as stored, ISO 8601 */
    const char *series_uid; /* shown in the point's tooltip */
    double t;               /* x position: days on the caller's axis */
    double value, unc;      /* value and standard uncertainty (NAN: unknown) */
    const char *verdict;    /* "pass", "warn", "fail" or "info" */
    double z, lcl, ucl;     /* EWMA and its limits at this point, NAN where not monitored */
    int baseline;           /* 1: the point is in the drift baseline */
    int out;                /* 1: out of control at this point (EWMA or CUSUM) */
} rp_tpoint;

typedef struct rp_chart {
    const char *id;    /* unique in the page: letters, digits, '-' and '_' */
    const char *title; /* "Slice thickness, t1, echo 1" */
    const char *metric, *unit;
    int n;
    const rp_tpoint *pt;            /* in time order */
    double t_min, t_max;            /* x range (the report period), NAN: from the points */
    double tol_lo, tol_hi, nominal; /* pass limits and nominal value (NAN: none) */
    double base_mean, base_sigma;   /* NAN when there is no baseline */
    int base_n;
    int have_trend; /* the trend line value = intercept + slope t over [trend_t0, trend_t1] */
    double trend_slope, trend_intercept, trend_t0, trend_t1;
    const char *status;      /* "in control", "drift", "no baseline" */
    const char *summary;     /* one line with the statistics (may be NULL) */
    int n_hidden;            /* unmeasurable results in the period (they have no value to plot) */
    const char *series_type; /* the protocol the chart is of (data attributes for programs) */
    int echo, slice;         /* 0 when not per echo / not of one slice */
} rp_chart;

typedef struct rp_result_line {
    const char *label; /* "Slice thickness (t1, echo 1)" */
    const char *date;
    double value, unc; /* NAN when unmeasurable */
    const char *unit;
    const char *verdict; /* "pass", "warn", "fail", "unmeasurable" */
    const char *note;    /* the reason when unmeasurable, or NULL */
} rp_result_line;

typedef struct rp_alarm {
    const char *kind; /* "drift", "breach", "warn" */
    const char *date;
    const char *text;
    int open; /* 1: an open drift episode */
} rp_alarm;

typedef struct rp_image {
    const char *path;    /* PNG file to embed */
    const char *caption; /* what it shows */
} rp_image;

typedef struct rp_scanner_section {
    const char *name; /* site alias or station name */
    const char *station, *serial, *manufacturer, *model, *institution;
    int n_series;                         /* series measured in the period */
    const char *last_date;                /* latest series in the period, or NULL */
    const char *last_verdict;             /* its worst verdict */
    int n_pass, n_warn, n_fail, n_unmeas; /* results with a tolerance in the period */
    int n_open_alarms;                    /* open drift episodes */
    int n_results;
    const rp_result_line *results; /* the latest value of each toleranced quantity */
    int n_alarms;
    const rp_alarm *alarms;
    int n_charts;
    const rp_chart *charts;
    int n_images;
    const rp_image *images;
    /* added (additive): the cause hints of the latest series, each one reading */
    int n_hints;
    const char *const *hints;
} rp_scanner_section;

/* Software validation evidence: one stored self-test and its rows. */
typedef struct rp_selftest_row {
    const char *model, *quantity, *condition, *unit;
    int n, n_measured;
    double bias, sd, max_abs_error;
    double limit_bias, limit_sd, min_fraction; /* NAN: none */
    int guaranteed, passed;
} rp_selftest_row;

typedef struct rp_selftest {
    const char *program_version, *started_at, *host, *summary;
    double seconds;
    int n_series, passed;
    int n_rows; /* rows are given for the newest self-test of each version only (0 else) */
    const rp_selftest_row *rows;
} rp_selftest;

typedef struct rp_report {
    const char *title;
    const char *site;                    /* may be NULL */
    const char *period_from, *period_to; /* as given, NULL: open */
    const char *generated_at;            /* UTC */
    const char *program_version;
    const char *settings; /* the drift settings in one line */
    int n_sections;
    const rp_scanner_section *sec;
    /* added (additive): self-tests, newest first (the section says whether the version writing
     * the report has a passing one) */
    int n_selftests;
    const rp_selftest *selftests;
} rp_report;

typedef struct rp_html_info {
    int n_charts, n_points, n_images, n_images_missing;
    size_t bytes;
} rp_html_info;

/* Writes the report to path atomically. Images that cannot be read (or are not PNG, or larger than
 * RP_HTML_MAX_IMAGE bytes) are replaced by a note naming them. info may be NULL. SW_EINVAL for bad
 * arguments (a chart id with other characters), SW_ENOMEM, SW_EIO naming path. */
#define RP_HTML_MAX_IMAGE (16u << 20)
sw_status rp_html_write(const char *path, const rp_report *r, rp_html_info *info, sw_error *err);

/* The inline SVG of one chart (exposed for tests): a NUL-terminated string the caller frees. */
sw_status rp_svg_chart(const rp_chart *c, char **out, sw_error *err);

#endif
