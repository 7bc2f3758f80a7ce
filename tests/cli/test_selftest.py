#!/usr/bin/python3
"""End-to-end test of `slicewarden selftest`: the real program's sweep, its rows in the database
(read with Python's sqlite3 module over Debian's libsqlite3), and its statistics recomputed
independently: the kept series are measured again by `slicewarden analyze --json`, compared with
their truth.json, and bias and SD are recomputed with numpy. A biased method (the half level
between the plateau and the raw background, which the accuracy bench shows to be biased) must
break a guaranteed limit: exit status 1 and passed = 0 in the store.

usage: test_selftest.py PATH_TO_SLICEWARDEN
"""
import json
import os
import shutil
import sqlite3
import subprocess
import sys
import tempfile

import numpy as np

BIN = sys.argv[1] if len(sys.argv) > 1 else os.environ.get("SW_SLICEWARDEN", "")
REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
FAILED = []


def check(cond, what):
    print(("ok    " if cond else "FAIL  ") + what)
    if not cond:
        FAILED.append(what)
    return cond


tmp = tempfile.mkdtemp(prefix="sw-selftest-")
db = os.path.join(tmp, "qa.sqlite")
keep = os.path.join(tmp, "kept")
r = subprocess.run([BIN, "selftest", "--db", db, "--keep", keep], capture_output=True, text=True,
                   timeout=900)
print(r.stdout)
print(r.stderr, file=sys.stderr)
check(r.returncode == 0, "selftest exits 0 (every guaranteed limit holds): %d" % r.returncode)
version = subprocess.run([BIN, "--version"], capture_output=True, text=True).stdout.split()[-1]

con = sqlite3.connect(db)
tests = con.execute("SELECT id, program_version, passed, n_series, seed FROM selftests").fetchall()
check(len(tests) == 1, "one self-test stored: %s" % (tests,))
sid, ver, passed, n_series, seed = tests[0]
check(ver == version, "stored with the program version %s (%s)" % (version, ver))
check(passed == 1, "stored as passed")
rows = con.execute("SELECT model, quantity, condition, n, n_measured, bias, sd, max_abs_error, "
                   "limit_bias, limit_sd, limit_fraction, guaranteed, passed FROM selftest_rows "
                   "WHERE selftest_id = ?", (sid,)).fetchall()
check(len(rows) >= 6, "at least six rows (%d)" % len(rows))
quantities = {q for _, q, *_ in rows}
check({"slice thickness", "bar length difference"} <= quantities,
      "thickness and bar difference rows: %s" % sorted(quantities))
# Every stored verdict agrees with its own numbers and limits.
for (model, q, cond, n, nm, bias, sd, mx, lb, ls, lf, guaranteed, ok) in rows:
    want = True
    if lf is not None:
        want &= n > 0 and nm / n >= lf
    if lb is not None:
        want &= bias is not None and abs(bias) <= lb
    if ls is not None:
        want &= sd is not None and sd <= ls
    check(bool(ok) == bool(want), "row %s / %s / %s: verdict follows its limits" % (model, q,
                                                                                   cond[:20]))

# Independent recomputation: analyze each kept series, compare with its truth, group as the rows.
cases = json.load(open(os.path.join(keep, "cases.json")))
check(len(cases) == n_series, "every case kept (%d of %d)" % (len(cases), n_series))
errs = {}
for c in cases:
    folder = os.path.join(keep, c["folder"])
    truth = json.load(open(os.path.join(folder, "truth.json")))
    # The built-in second model is the shipped file: analyze it with that file.
    model = []
    if c["model"].startswith("small-single-ramp"):
        model = ["--model", os.path.join(REPO, "config", "small-single-ramp.model")]
    a = subprocess.run([BIN, "analyze", "--json"] + model + [folder], capture_output=True,
                       text=True)
    doc = json.loads(a.stdout)
    echo = doc["series"][0]  # the first echo (the sweep's series are T1: one echo)
    key = (c["model"], c["condition"])
    t = echo["slice_thickness"]
    if t.get("corrected_mm") is not None:
        errs.setdefault(key + ("slice thickness",), []).append(
            t["corrected_mm"] - truth["echoes"][0]["thickness_fwhm_mm"])
    for p in echo["slice_position"]:
        bd = p.get("bar_difference_mm")
        want = [w for w in truth.get("wedges", []) if w.get("slice") == p["slice"]]
        if bd is not None and want:
            errs.setdefault(key + ("bar length difference",), []).append(
                bd - want[0]["bar_difference_mm"])
checked = 0
for (model, q, cond, n, nm, bias, sd, *_rest) in rows:
    e = errs.get((model, cond, q))
    if not e or q == "ramp tilt":
        continue
    e = np.array(e)
    checked += 1
    check(len(e) == nm, "%s / %s / %s: analyze measured %d, selftest %d" % (model, q, cond[:20],
                                                                           len(e), nm))
    check(abs(e.mean() - bias) < 1e-3,
          "%s / %s: bias %.4f recomputed with numpy from analyze and truth.json (%.4f)"
          % (q, cond[:20], e.mean(), bias))
    if len(e) > 1:
        check(abs(e.std(ddof=1) - sd) < 1e-3,
              "%s / %s: SD %.4f recomputed (%.4f)" % (q, cond[:20], e.std(ddof=1), sd))
check(checked >= 8, "at least eight rows recomputed independently, both models (%d)" % checked)

# A biased method must be caught.
conf = os.path.join(tmp, "biased.conf")
with open(conf, "w") as f:
    f.write("[analysis]\nhalf_level = background\n")
r2 = subprocess.run([BIN, "selftest", "-c", conf, "--db", db], capture_output=True, text=True,
                    timeout=900)
check(r2.returncode == 1, "the background half level breaks a guaranteed limit: exit %d"
      % r2.returncode)
last = con.execute("SELECT passed FROM selftests ORDER BY id DESC LIMIT 1").fetchone()
check(last == (0,), "stored as not passed: %s" % (last,))
failing = con.execute("SELECT count(*) FROM selftest_rows WHERE selftest_id = (SELECT max(id) "
                      "FROM selftests) AND guaranteed = 1 AND passed = 0").fetchone()[0]
check(failing >= 1, "its failing rows are stored (%d)" % failing)
con.close()

# Immutability of the evidence.
con = sqlite3.connect(db)
try:
    con.execute("UPDATE selftests SET passed = 1")
    con.commit()
    check(False, "a stored self-test cannot be changed")
except sqlite3.DatabaseError:
    check(True, "a stored self-test cannot be changed")
con.close()

if not os.environ.get("SW_KEEP_TMP"):
    shutil.rmtree(tmp, ignore_errors=True)
print("%d checks failed" % len(FAILED) if FAILED else "all checks passed")
sys.exit(1 if FAILED else 0)
