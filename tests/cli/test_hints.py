#!/usr/bin/python3
"""Cause hints on simulated series that carry each cause (docs/hints.md), through `analyze --json`
and through `watch --once` with the hints stored in the database, plus the physics of the
centre-frequency figure: for a series simulated with a centre-frequency error df, the hint's
df = gamma-bar x G x shift, with the protocol's gradient G given in [hints], must give df back.
Also: a 3D series (MRAcquisitionType set to 3D with Debian's pydicom) is reported as partition
thickness, stored under its own metric and judged by the 3D tolerance entry.

The causes and how the simulator makes them (the physics in docs/hints.md):
  gradient calibration  a gradient a fraction k weak: every slice 1/(1-k) wider and every
                        position 1/(1-k) farther from the centre (--thickness, --position-scale)
  RF bandwidth          the thickness alone off (--thickness with --prescribed at the nominal)
  common shift          a centre-frequency error (--cf-offset): both wedge slices move one way
  gradient scaling      positions scaled about the centre, thickness right (--position-scale)
  phantom tilt          the phantom tilted about v (--tilt-v)
usage: test_hints.py PATH_TO_SLICEWARDEN
"""
import json
import os
import re
import shutil
import sqlite3
import subprocess
import sys
import tempfile

import pydicom

BIN = sys.argv[1]
FAILED = []
SMALL = ["--oversample", "3"]
GAMMA_BAR = 42.577478  # Hz per microtesla (CODATA 2018), i.e. Hz per (mT/m x mm)


def check(cond, what):
    print(("ok    " if cond else "FAIL  ") + what)
    if not cond:
        FAILED.append(what)
    return cond


def sim(out, *args, station="ALDMR1", seed=1):
    subprocess.run([BIN, "simulate", "--quiet", "--station", station, "--seed", str(seed)] +
                   SMALL + list(args) + [out], check=True)
    with open(os.path.join(out, "truth.json")) as f:
        return json.load(f)


def analyze(folder, *extra):
    r = subprocess.run([BIN, "analyze", "--json"] + list(extra) + [folder], capture_output=True,
                       text=True)
    return json.loads(r.stdout)["series"][0]


tmp = tempfile.mkdtemp(prefix="sw-hints-")
CF_HZ = 300.0
cases = {
    # name: (simulator arguments, expected hint codes)
    "none": ([], set()),
    "gradient": (["--thickness", "5.3", "--prescribed", "5", "--position-scale", "5"],
                 {"gradient-calibration"}),
    "rf": (["--thickness", "5.5", "--prescribed", "5"], {"rf-bandwidth"}),
    "shift": (["--cf-offset", str(CF_HZ)], {"common-shift"}),
    "scaling": (["--position-scale", "3"], {"gradient-scaling"}),
    "tilt": (["--tilt-v", "2.6"], {"phantom-tilt"}),
    # The same at a coarse matrix (1.3 mm pixels): the long top strip's blurred flank once stood
    # in for the short bottom strip's peak, the ramp slice was refused, and its neighbour taken
    # for it shifted every slice ordinal by one (a regression check as much as a hint check).
    "tiltcoarse": (["--tilt-v", "2.6", "--matrix", "192"], {"phantom-tilt"}),
}
truths = {}
for i, (name, (args, want)) in enumerate(sorted(cases.items())):
    folder = os.path.join(tmp, "src", name)
    truths[name] = sim(folder, *args, station="CASE%s" % name.upper(), seed=10 + i)
    e = analyze(folder)
    got = {h["code"] for h in e.get("hints", [])}
    check(got == want, "%s: analyze gives hints %s (want %s)" % (name, sorted(got), sorted(want)))
    for h in e.get("hints", []):
        check("not a diagnosis" in h["text"] or "before acting" in h["text"],
              "%s: the %s hint is worded as a hint" % (name, h["code"]))

# The same series through the service, with the protocol's gradient known: the stored hints.
g = truths["shift"]["profile"]["gradient_mT_per_m"]
conf = os.path.join(tmp, "sw.conf")
with open(conf, "w") as f:
    f.write("[hints]\ngradient_mT_per_m = %.6f\n" % g)
inbox = os.path.join(tmp, "in")
shutil.copytree(os.path.join(tmp, "src"), inbox)
for name in cases:
    os.remove(os.path.join(inbox, name, "truth.json"))
db = os.path.join(tmp, "qa.sqlite")
r = subprocess.run([BIN, "watch", "--once", "--no-progress", "--no-png", "-c", conf, "--folder",
                    inbox, "--db", db], capture_output=True, text=True, timeout=600)
check(r.returncode == 0, "watch --once: exit %d %s" % (r.returncode, r.stderr[-400:]))
con = sqlite3.connect(db)
stored = {}
for station, code, text in con.execute(
        "SELECT sc.station_name, h.code, h.text FROM hints h JOIN runs r ON r.id = h.run_id "
        "JOIN series s ON s.id = r.series_id JOIN scanners sc ON sc.id = s.scanner_id"):
    stored.setdefault(station[4:].lower(), {})[code] = text
for name, (_, want) in cases.items():
    check(set(stored.get(name, {})) == want,
          "%s: stored hints %s" % (name, sorted(stored.get(name, {}))))
# df = gamma-bar G shift: the hint's figure gives back the centre-frequency error applied.
text = stored.get("shift", {}).get("common-shift", "")
m = re.search(r"([+-]\d+) Hz at a slice-select gradient of ([\d.]+) mT/m", text)
if check(m is not None, "the common-shift hint states df at the configured gradient"):
    df = float(m.group(1))
    check(abs(abs(df) - CF_HZ) < 0.05 * CF_HZ,
          "df %.0f Hz recovers the simulated centre-frequency error %.0f Hz within 5 %%"
          % (df, CF_HZ))
# The alerts of a failing or warning series carry the first hint.
alerts = [m for (m,) in con.execute("SELECT message FROM alerts")]
check(any("hint: gradient calibration?" in a for a in alerts),
      "an alert of the gradient series carries its hint: %s" % alerts[:2])
con.close()

# 3D: partition thickness, labelled so, its own metric and tolerance entry.
src3 = os.path.join(tmp, "src3d")
sim(src3, station="ALDMR3D", seed=40)
os.remove(os.path.join(src3, "truth.json"))
for fn in os.listdir(src3):
    p = os.path.join(src3, fn)
    ds = pydicom.dcmread(p)
    ds.MRAcquisitionType = "3D"
    ds.save_as(p)
e = analyze(src3)
check(e.get("thickness_kind") == "partition", "3D: thickness_kind partition in analyze's JSON")
check(e.get("tolerance_set") == "partition-3d-default",
      "3D: analyze judges by the built-in 3d entry (%s)" % e.get("tolerance_set"))
txt = subprocess.run([BIN, "analyze", src3], capture_output=True, text=True).stdout
check("partition thickness, slice 1" in txt, "3D: the text says partition thickness")
tol = os.path.join(tmp, "tol.conf")
with open(tol, "w") as f:
    f.write("[default]\nname = site-2d\n\n[rule site-3d-partition]\nstation = *\n"
            "series_type = 3d\nthickness_fail = 0.3\nthickness_warn = 0.2\n")
conf3 = os.path.join(tmp, "sw3.conf")
with open(conf3, "w") as f:
    f.write("[phantom]\ntolerance_file = %s\n" % tol)
inbox3 = os.path.join(tmp, "in3")
shutil.copytree(src3, inbox3)
db3 = os.path.join(tmp, "qa3.sqlite")
r = subprocess.run([BIN, "watch", "--once", "--no-progress", "--no-png", "-c", conf3, "--folder",
                    inbox3, "--db", db3], capture_output=True, text=True, timeout=600)
check(r.returncode == 0, "3D watch: exit %d %s" % (r.returncode, r.stderr[-300:]))
con = sqlite3.connect(db3)
rows = con.execute("SELECT m.metric, m.limit_lo, m.limit_hi, r.tolerance_set FROM measurements m "
                   "JOIN runs r ON r.id = m.run_id WHERE m.metric LIKE '%thickness'").fetchall()
con.close()
check([x[0] for x in rows] == ["partition_thickness"],
      "3D: stored as partition_thickness only: %s" % [x[0] for x in rows])
if rows:
    check(rows[0][3] == "site-3d-partition", "3D: judged by the 3d entry (%s)" % rows[0][3])
    check(abs(rows[0][2] - rows[0][1] - 0.6) < 1e-9,
          "3D: its limits are the entry's +-0.3 mm (%s to %s)" % (rows[0][1], rows[0][2]))

if not os.environ.get("SW_KEEP_TMP"):
    shutil.rmtree(tmp, ignore_errors=True)
print("%d checks failed" % len(FAILED) if FAILED else "all checks passed")
sys.exit(1 if FAILED else 0)
