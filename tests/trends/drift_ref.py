#!/usr/bin/python3
"""Independent reference for the drift statistics, computed with numpy and scipy.

Reads one JSON case on stdin, prints the reference results as JSON on stdout:
- baseline: mean (numpy.mean), SD (numpy.std, ddof=1), RMS uncertainty, sigma = max of the two;
- EWMA (Roberts 1959) by scipy.signal.lfilter, z_i = lambda x_i + (1 - lambda) z_{i-1}, z_0 = mu0,
  with the exact limits mu0 +/- L sigma sqrt(lambda/(2-lambda) (1-(1-lambda)^(2i)));
- tabular CUSUM (Page 1954; the form in Montgomery's textbook, from memory), a plain loop, with
  or without the restart after a signal;
- least-squares trend by scipy.stats.linregress; its t quantile by inverting scipy.stats.t.cdf with
  brentq (scipy.stats.t.ppf itself is good to about 1e-9 relative only: both are reported);
- the crossing time of a tolerance limit and its inverse-prediction interval: the roots of
  (limit - line(t))^2 - (tq s)^2 (1/n + (t - tbar)^2 / Sxx), found by scipy.optimize.brentq;
- the episodes the alarm logic should produce when the history is evaluated after each result.
"""
import json
import sys

import numpy as np
from scipy import optimize, signal, stats


def t_quantile(p, df):
    """The quantile by root-finding on scipy's CDF (upper tail for p > 1/2), started at t.ppf."""
    guess = float(stats.t.ppf(p, df))
    if p == 0.5:
        return 0.0
    if p > 0.5:
        f = lambda t: stats.t.sf(t, df) - (1.0 - p)
    else:
        f = lambda t: stats.t.cdf(t, df) - p
    d = abs(guess) * 1e-6 + 1e-12
    return optimize.brentq(f, guess - d, guess + d, xtol=1e-300, rtol=1e-15, maxiter=200)


def baseline(x, u, acc, t, case):
    idx = []
    period = case.get("baseline_from") is not None
    for i in range(len(x)):
        if not acc[i]:
            continue
        if period:
            if case["baseline_from"] <= t[i] < case["baseline_to"]:
                idx.append(i)
        elif len(idx) < case["baseline_n"]:
            idx.append(i)
    need = 2 if period else case["baseline_n"]
    if len(idx) < need:
        return None
    bx = np.array([x[i] for i in idx])
    bu = np.array([u[i] for i in idx if u[i] is not None])
    mean = float(np.mean(bx))
    sd = float(np.std(bx, ddof=1))
    urms = float(np.sqrt(np.mean(bu ** 2))) if bu.size else None
    sigma = max(sd, urms) if urms is not None else sd
    return {"first": idx[0], "n": len(idx), "mean": mean, "sd": sd, "u_rms": urms,
            "sigma": sigma, "source": "uncertainty" if urms is not None and urms > sd else "sd"}


def charts(x, mu, sigma, case):
    lam, L, k = case["lambda"], case["L"], case["k"]
    x = np.asarray(x, dtype=float)
    # lfilter with initial state gives z_i = lam x_i + (1 - lam) z_{i-1}, z_0 = mu.
    zi = signal.lfiltic([lam], [1.0, -(1.0 - lam)], y=[mu])
    z, _ = signal.lfilter([lam], [1.0, -(1.0 - lam)], x, zi=zi)
    i = np.arange(1, x.size + 1)
    w = L * sigma * np.sqrt(lam / (2.0 - lam) * (1.0 - (1.0 - lam) ** (2 * i)))
    K = k * sigma
    H = case["h"] * sigma
    restart = case.get("cusum_restart", True)
    cp, cm = [], []
    p = m = 0.0
    for v in x:
        p = max(0.0, v - (mu + K) + p)
        m = max(0.0, (mu - K) - v + m)
        cp.append(p)
        cm.append(m)
        # After a signal the sum starts again from zero at the next result.
        if restart and p > H:
            p = 0.0
        if restart and m > H:
            m = 0.0
    out = [bool(z[j] > mu + w[j] or z[j] < mu - w[j] or cp[j] > H or cm[j] > H)
           for j in range(x.size)]
    return {"z": z.tolist(), "lcl": (mu - w).tolist(), "ucl": (mu + w).tolist(), "cp": cp,
            "cm": cm, "H": H, "out": out}


def trend(t, y, conf, lo, hi):
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    n = t.size
    if n < 3:
        return None
    r = stats.linregress(t, y)
    resid = y - (r.intercept + r.slope * t)
    s = float(np.sqrt(np.sum(resid ** 2) / (n - 2)))
    tq = t_quantile(0.5 + conf / 2.0, n - 2)
    res = {"slope": r.slope, "intercept": r.intercept, "slope_se": r.stderr,
           "intercept_se": r.intercept_stderr, "r": r.rvalue, "s": s, "tq": tq,
           "slope_lo": r.slope - tq * r.stderr, "slope_hi": r.slope + tq * r.stderr}
    limit = hi if r.slope > 0 else lo
    if limit is None or r.slope == 0:
        return res
    res["cross_t"] = (limit - r.intercept) / r.slope
    tbar = float(np.mean(t))
    sxx = float(np.sum((t - tbar) ** 2))

    def f(tt):
        return (limit - r.intercept - r.slope * tt) ** 2 - (tq * s) ** 2 * (
            1.0 / n + (tt - tbar) ** 2 / sxx)

    # With a significant slope f is an upward parabola whose minimum sits near the crossing;
    # bracket each root from there outwards.
    if r.slope ** 2 > (tq * s) ** 2 / sxx:
        c = res["cross_t"]
        span = max(1.0, abs(c - tbar)) * 10 + 1e4
        res["cross_lo"] = optimize.brentq(f, c - span, c, xtol=1e-10, rtol=1e-14)
        res["cross_hi"] = optimize.brentq(f, c, c + span, xtol=1e-10, rtol=1e-14)
    return res


def evaluate(case, n=None):
    t, x, u, acc = case["t"], case["x"], case["u"], case["accepted"]
    if n is not None:
        t, x, u, acc = t[:n], x[:n], u[:n], acc[:n]
    b = baseline(x, u, acc, t, case)
    if b is None:
        return None, None, None
    f = b["first"]
    c = charts(x[f:], b["mean"], b["sigma"], case)
    tr = trend(t[f:], x[f:], case["confidence"], case.get("lo"), case.get("hi"))
    return b, c, tr


def episodes(case):
    """Evaluates after each result: an episode opens when the latest point is out of control and
    none is open, and closes when the latest close_after points are all in control."""
    opened, closed = [], []
    is_open = False
    m = case.get("close_after", 3)
    for n in range(1, len(case["x"]) + 1):
        b, c, _ = evaluate(case, n)
        if b is None:
            continue
        out = c["out"][-1]
        if out and not is_open:
            opened.append(n - 1)
            is_open = True
        elif is_open and len(c["out"]) >= m and not any(c["out"][-m:]):
            closed.append(n - 1)
            is_open = False
    return {"opened": opened, "closed": closed}


def main():
    case = json.load(sys.stdin)
    n = len(case["x"])
    case.setdefault("u", [None] * n)
    case.setdefault("accepted", [True] * n)
    b, c, tr = evaluate(case)
    out = {"baseline": b, "charts": c, "trend": tr}
    if case.get("episodes"):
        out["episodes"] = episodes(case)
    if "t_table" in case:
        out["t_ppf"] = [float(stats.t.ppf(p, df)) for p, df in case["t_table"]]
        out["t_inv"] = [t_quantile(p, df) for p, df in case["t_table"]]
        out["t_cdf"] = [float(stats.t.cdf(q, df)) for q, df in case.get("t_cdf_table", [])]
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
