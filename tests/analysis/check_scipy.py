#!/usr/bin/python3
"""Cross-checks of analysis/ against Debian's scipy (python3-scipy), run by CTest.

1. Full width at a level: scipy.signal.peak_widths (rel_height 0.5) on profiles with a zero baseline,
   and our an_width_at_level set to the same absolute level (the width_heights scipy reports),
   within 0.02 sample.
2. The Rician magnitude model: mean and SD against scipy.stats.rice (b = a / sigma, scale = sigma),
   and the inversion of the mean.
Usage: check_scipy.py PATH_TO_an_tool
"""
import subprocess
import sys

import numpy as np
from scipy import signal, stats

tool = sys.argv[1]
proc = subprocess.Popen([tool], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)


def ask(line):
    proc.stdin.write(line + "\n")
    proc.stdin.flush()
    return proc.stdout.readline().split()


failures = []


def check(cond, what):
    if not cond:
        failures.append(what)


# Profiles with a zero baseline: Gaussian, a trapezoid (rectangle convolved with a box, as a strip of a
# rectangular slice seen through a slot), an asymmetric skewed shape and a Hamming-windowed sinc's
# squared magnitude main lobe; sampled off the grid so the crossings fall between samples.
x = np.arange(400, dtype=float)
profiles = {
    "gauss": np.exp(-0.5 * ((x - 201.37) / 23.1) ** 2),
    "trapezoid": np.clip(np.minimum((x - 120.3) / 15.0, (280.8 - x) / 15.0), 0, 1),
    "skewed": np.where(x < 190.2, np.exp(-0.5 * ((x - 190.2) / 12.0) ** 2),
                       np.exp(-0.5 * ((x - 190.2) / 31.0) ** 2)),
    "sinc2": np.where(np.abs(x - 199.6) < 99, np.sinc((x - 199.6) / 99.0) ** 2, 0.0),
}
for name, p in profiles.items():
    p = 1000.0 * p
    peak = int(np.argmax(p))
    widths, heights, left, right = signal.peak_widths(p, [peak], rel_height=0.5)
    line = "W %.12g %d " % (heights[0], peak) + " ".join("%.9g" % v for v in p)
    ans = ask(line)
    check(ans[0] != "fail", "%s: our width failed" % name)
    if ans[0] == "fail":
        continue
    lo, hi = float(ans[0]), float(ans[1])
    # peak_widths' left_ips/right_ips are interpolated crossing positions (scipy docs)
    check(abs(lo - left[0]) <= 0.02, "%s: left crossing %.4f vs scipy %.4f" % (name, lo, left[0]))
    check(abs(hi - right[0]) <= 0.02, "%s: right crossing %.4f vs scipy %.4f" % (name, hi, right[0]))
    check(abs((hi - lo) - widths[0]) <= 0.02, "%s: width %.4f vs scipy %.4f" % (name, hi - lo, widths[0]))
    # zero baseline: scipy's half height is half the peak (prominence = peak)
    check(abs(heights[0] - 0.5 * p[peak]) < 1e-6 * p[peak], "%s: baseline not zero" % name)
    print("%-10s ours %.4f scipy %.4f" % (name, hi - lo, widths[0]))

# A profile that never falls below the level on one side must fail, not invent a width.
p = np.concatenate([np.linspace(0, 1000, 50), np.full(50, 1000.0)])
check(ask("W 500 60 " + " ".join("%.9g" % v for v in p))[0] == "fail", "open profile: width returned")

# Rice distribution: mean and SD (scipy.stats.rice with shape b = a / sigma and scale sigma).
# (scipy's rice moments overflow beyond b ~ 35; our large-signal branch is checked in test_formulas.c)
for a in [0.0, 0.3, 1.0, 1.5, 2.5, 4.0, 7.0, 12.0, 20.0, 30.0]:
    sigma = 1.7
    m, sd = map(float, ask("R %.12g %.12g" % (a * sigma, sigma)))
    rm, rv = stats.rice.stats(a, scale=sigma, moments="mv")
    check(abs(m - rm) <= 1e-5 * rm, "rice mean a=%g: %.8g vs scipy %.8g" % (a, m, rm))
    check(abs(sd - np.sqrt(rv)) <= 2e-4 * np.sqrt(rv) + 1e-6,
          "rice sd a=%g: %.8g vs scipy %.8g" % (a, sd, np.sqrt(rv)))
    if a >= 0.3:
        inv = float(ask("V %.12g %.12g" % (rm, sigma))[0])
        check(abs(inv - a * sigma) <= 1e-4 * sigma, "rice inverse a=%g: %.8g" % (a, inv / sigma))

proc.stdin.close()
proc.wait()
if failures:
    print("FAILED:\n  " + "\n  ".join(failures))
    sys.exit(1)
print("all scipy cross-checks passed")
