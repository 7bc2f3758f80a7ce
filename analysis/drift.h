/* drift.h: drift statistics for QA trends, per scanner, protocol and metric: a baseline, an EWMA
 * control chart (Roberts 1959), a two-sided tabular CUSUM (Page 1954) and a least-squares trend
 * with its Student-t confidence interval and the projected date of a tolerance crossing. Pure
 * computation: arrays in, caller-owned results out; no I/O, no logging, no globals. docs/trends.md
 * gives every formula with its source. */
#ifndef AN_DRIFT_H
#define AN_DRIFT_H

#include "sw.h"

/* ---- parameters ----
 * Defaults (an_drift_params_default): lambda 0.2 and L 3 for the EWMA, k 0.5 and h 5 (sigma
 * units) for the CUSUM: common choices in Montgomery's textbook on statistical quality control
 * (from memory); 8 baseline results; a 95 % interval for the trend. Without a restart a CUSUM that
 * signalled decays by only K a point after the process is back, so it would hold an alarm for
 * months; restarting after a signal (as after corrective action) lets the charts say "back in
 * control", and close_after consecutive in-control points end an episode (hysteresis). */
typedef struct an_drift_params {
    double lambda;  /* EWMA weight of the newest result, 0 < lambda <= 1 */
    double L;       /* EWMA limit half-width in standard deviations of the statistic, > 0 */
    double k;       /* CUSUM reference value (allowance), sigma units, >= 0 */
    double h;       /* CUSUM decision interval, sigma units, > 0 */
    int baseline_n; /* the baseline is the first N accepted results (>= 2) ... */
    double baseline_from, baseline_to; /* ... or the accepted results with t in [from, to), when
                                          both are finite (days, the caller's time axis) */
    double confidence;                 /* of the trend's intervals, 0 < confidence < 1 (0.95) */
    int cusum_restart; /* 1: a sum that signalled restarts from 0 at the next point (default) */
    int close_after;   /* an episode ends after this many consecutive in-control points (3) */
    double sigma_floor; /* sigma is never taken below this (value's unit; 0: no floor) */
} an_drift_params;

void an_drift_params_default(an_drift_params *p);
/* Checks every field's range; names the first bad one in err (SW_EINVAL). */
sw_status an_drift_params_check(const an_drift_params *p, sw_error *err);

/* ---- baseline ----
 * mean and sample SD (n - 1 divisor) of the baseline values; u_rms the root mean square of their
 * standard uncertainties (NAN when none is known). sigma = max(sd, u_rms): a short baseline can
 * show less spread than the measurement's own uncertainty by chance, and limits tighter than that
 * would signal noise (docs/trends.md). */
typedef enum an_sigma_source { AN_SIGMA_SD = 0, AN_SIGMA_UNCERTAINTY, AN_SIGMA_FLOOR } an_sigma_source;
typedef struct an_baseline {
    int n;
    double mean, sd, u_rms, sigma;
    an_sigma_source source;
} an_baseline;

/* u may be NULL (no uncertainties) and may hold NAN entries (unknown). Needs n >= 2 finite values;
 * SW_EMEASURE when sigma comes out 0 (no spread and no uncertainty). */
sw_status an_baseline_compute(const double *x, const double *u, int n, an_baseline *out,
                              sw_error *err);

/* ---- EWMA (Roberts 1959) ----
 * z_0 = mu0, z_i = lambda x_i + (1 - lambda) z_{i-1}, i = 1..n (x[0] is x_1);
 * limits mu0 -/+ L sigma sqrt(lambda / (2 - lambda) (1 - (1 - lambda)^(2 i))), the exact
 * time-varying limits. Any of z, lcl, ucl may be NULL. */
sw_status an_ewma(const double *x, int n, double mu0, double sigma, double lambda, double L,
                  double *z, double *lcl, double *ucl, sw_error *err);

/* ---- two-sided tabular CUSUM (Page 1954) ----
 * C+_i = max(0, x_i - (mu0 + K) + C+_{i-1}), C-_i = max(0, (mu0 - K) - x_i + C-_{i-1}), C_0 = 0,
 * K = k sigma; a signal when C+ or C- exceeds H = h sigma (the caller compares). In the value's
 * unit. Either output may be NULL. */
sw_status an_cusum(const double *x, int n, double mu0, double sigma, double k, double *cp,
                   double *cm, sw_error *err);

/* ---- Student t ---- */
/* The CDF of Student's t with df > 0 degrees of freedom, from the regularized incomplete beta. */
double an_student_t_cdf(double t, double df);
/* The quantile: t with P(T <= t) = p, 0 < p < 1; NAN for bad arguments. */
double an_student_t_quantile(double p, double df);

/* ---- least-squares trend ----
 * y = intercept + slope t by ordinary least squares; s the residual SD (n - 2 degrees of freedom);
 * standard errors s / sqrt(Sxx) and s sqrt(1/n + tbar^2 / Sxx); tq the Student t quantile at
 * (1 + confidence) / 2 with n - 2 degrees of freedom; slope_lo/hi = slope -/+ tq slope_se. */
typedef struct an_trend {
    int n;
    double slope, intercept, slope_se, intercept_se, r, s;
    double t_mean, sxx, tq, confidence;
    double slope_lo, slope_hi;
    int significant; /* the slope's interval excludes 0 */
} an_trend;

/* Needs n >= 3 finite pairs and t not all equal (SW_EMEASURE otherwise). */
sw_status an_trend_fit(const double *t, const double *y, int n, double confidence, an_trend *out,
                       sw_error *err);
/* Half-width of the confidence band of the mean response at t: tq s sqrt(1/n + (t - tbar)^2 / Sxx).
 */
double an_trend_band(const an_trend *tr, double t);

/* Where the fitted line meets a tolerance limit. side: +1 the upper limit hi (rising line), -1 the
 * lower limit lo (falling line), 0 none (flat line, or no finite limit on that side). t is the
 * point estimate (limit - intercept) / slope (it may lie in the past: the line is already beyond).
 * [t_lo, t_hi] is the inverse-prediction (Fieller) interval: the times at which the limit lies
 * inside the confidence band of the line, the roots of
 *   (limit - intercept - slope t)^2 = tq^2 s^2 (1/n + (t - tbar)^2 / Sxx);
 * bounded = 1 only when the slope is significant, else the interval is unbounded (NAN ends). */
typedef struct an_crossing {
    int side;
    double limit, t, t_lo, t_hi;
    int bounded;
} an_crossing;
void an_trend_crossing(const an_trend *tr, double lo, double hi, an_crossing *out);

/* ---- a whole history ----
 * Points in time order (t ascending, days). accepted marks results that may form a baseline (the
 * caller's rule: measured and not failing). Monitoring starts at the baseline's first point: the
 * EWMA, the CUSUM and the trend use the points from there on (earlier ones are "before baseline").
 */
typedef struct an_drift_input {
    int n;
    const double *t, *x, *u; /* u may be NULL */
    const int *accepted;     /* NULL: every point */
} an_drift_input;

/* Arrays of n the caller owns (any may be NULL): per point, EWMA and its limits, CUSUM sums (with
 * the restart after a signal when p->cusum_restart), and flags (AN_DRIFT_F_*). Points before the
 * first monitored one get NAN and flag 0. */
#define AN_DRIFT_F_BASELINE 1u  /* the point is in the baseline */
#define AN_DRIFT_F_MONITORED 2u /* the point is at or after the baseline's first */
#define AN_DRIFT_F_EWMA_HI 4u   /* z above the upper limit */
#define AN_DRIFT_F_EWMA_LO 8u   /* z below the lower limit */
#define AN_DRIFT_F_CUSUM_HI 16u /* C+ > H */
#define AN_DRIFT_F_CUSUM_LO 32u /* C- > H */
#define AN_DRIFT_F_OUT                                                                             \
    (AN_DRIFT_F_EWMA_HI | AN_DRIFT_F_EWMA_LO | AN_DRIFT_F_CUSUM_HI | AN_DRIFT_F_CUSUM_LO)
typedef struct an_drift_track {
    double *z, *lcl, *ucl, *cp, *cm;
    unsigned *flags;
} an_drift_track;

typedef enum an_drift_status {
    AN_DRIFT_NO_BASELINE = 0, /* too few accepted results (or none in the baseline period) */
    AN_DRIFT_IN_CONTROL,      /* the latest point is inside the EWMA limits and both CUSUMs <= H */
    AN_DRIFT_OUT,             /* the latest point is out of control on either chart */
} an_drift_status;
const char *an_drift_status_name(an_drift_status s); /* "no baseline", "in control", "drift" */

typedef struct an_drift_summary {
    an_drift_status status;
    an_baseline base;
    int first; /* index of the first monitored point, -1 without a baseline */
    int n_monitored;
    unsigned last_flags; /* flags of the latest point */
    int in_control_run;  /* consecutive in-control points at the end of the history */
    double H;            /* h sigma, in the value's unit */
    int have_trend;      /* trend fitted over the monitored points (needs 3) */
    an_trend trend;
} an_drift_summary;

/* Runs the baseline, both charts and the trend over a history. SW_OK with status
 * AN_DRIFT_NO_BASELINE when the baseline is not complete; SW_EINVAL for bad arguments (t not
 * ascending, non-finite values, bad parameters); SW_EMEASURE when the baseline has no spread. */
sw_status an_drift_evaluate(const an_drift_input *in, const an_drift_params *p,
                            an_drift_track *track, an_drift_summary *out, sw_error *err);

#endif
