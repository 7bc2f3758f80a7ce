#!/usr/bin/python3
"""e2e_arrivals.py: series arriving the ways receivers and people deliver them, into a running
`slicewarden watch` (real inotify, real files, real SQLite): slowly and in pieces (files written in
chunks), out of order, under temporary names then renamed, into new subfolders, one series twice
(the second copy after it was stored) and some files twice at once. Every series is measured once,
when complete, and its stored results equal those of `slicewarden analyze --json` on the same
files (the program's own documented JSON contract as the reference, to the 6 significant digits it
prints)."""
import math
import os
import random
import shutil
import time

from swe2e import (Daemon, analyze_json, check, cleanup, copy_slowly, finish, query, simulate,
                   stored_series, tmpdir, tree_hashes, wait_for, sha256)

random.seed(7)
base = tmpdir("sw-e2e-arrivals-")
src = os.path.join(base, "src")
inbox = os.path.join(base, "incoming")
db = os.path.join(base, "qa.sqlite")
os.makedirs(inbox)

t1, _ = simulate(os.path.join(src, "t1"), seed=11, station="ALDMR1")
t2, _ = simulate(os.path.join(src, "t2"), "--shuffle", series="t2", seed=12, station="ALDMR2")
mf, _ = simulate(os.path.join(src, "mf"), "--enhanced", seed=13, station="ALDMR3")
check(len(t1) == 11 and len(t2) == 22 and len(mf) == 1, "simulated 11 + 22 + 1 files")

# A long quiet period: a series is measured because it is complete, never because it went quiet.
d = Daemon(inbox, db, "--quiet", "600")
time.sleep(0.5)

# T1: one file at a time, each written in three pieces with pauses (taken at IN_CLOSE_WRITE only).
for f in t1:
    copy_slowly(f, os.path.join(inbox, os.path.basename(f)), pieces=3, pause=0.02)

# T2: into a subfolder made now, out of order, in two batches, under temporary names then renamed
# (half as dot-files, half as NAME.part); three of its files are delivered twice at once.
sub = os.path.join(inbox, "study-0002")
os.makedirs(sub)
order = t2[:]
random.shuffle(order)
twice = order[:3]
for k, f in enumerate(order):
    name = os.path.basename(f)
    tmp = os.path.join(sub, "." + name if k % 2 else name + ".part")
    shutil.copyfile(f, tmp)
    os.rename(tmp, os.path.join(sub, name))
    if f in twice:
        shutil.copyfile(f, os.path.join(sub, name + "-copy"))
    if k == len(order) // 2:
        time.sleep(1.0)  # a pause within the series

# The Enhanced MR file: a single multi-frame object with all eleven slices.
shutil.copyfile(mf[0], os.path.join(inbox, "enhanced.dcm"))

wait_for(lambda: stored_series(db) == 3, 120, "three series stored")
check(d.alive(), "the daemon runs")

# The T1 series a second time, after it was stored, into another new subfolder.
again = os.path.join(inbox, "again")
os.makedirs(again)
for f in t1:
    shutil.copyfile(f, os.path.join(again, os.path.basename(f)))


def settled():
    left = [os.path.join(r, n) for r, _, ns in os.walk(inbox) for n in ns]
    return not left


wait_for(settled, 60, "the watch folder emptied")
time.sleep(0.5)
rc = d.stop()
check(rc == 0, "SIGTERM ends the daemon with status 0 (got %s)" % rc)
log = d.text()

# ---- every series measured once ----
series = query(db, "SELECT id, series_instance_uid, state, series_type FROM series ORDER BY id")
check(len(series) == 3, "three series known, got %d" % len(series))
for sid, uid, state, stype in series:
    check(state == "stored", "series %s stored (is %s)" % (uid, state))
    runs = query(db, "SELECT status FROM runs WHERE series_id = ?", (sid,))
    check(runs == [("done",)], "series %s has exactly one run, done (has %s)" % (uid, runs))
check(log.count("verdict") >= 3 and all(log.count(u) >= 1 for _, u, _, _ in series),
      "one log line per measured series")
check("[complete" in log and "[quiet" not in log, "measured because complete, not quiet")

# ---- results equal to analyze --json on the same files ----
ref = analyze_json([os.path.join(src, "t1"), os.path.join(src, "t2"), os.path.join(src, "mf")])


def close(a, b):
    if a is None or b is None:
        return a is None and b is None
    return math.isclose(a, b, rel_tol=2e-5, abs_tol=1e-6)


compared = 0
for e in ref["series"]:
    uid, echo = e["series_instance_uid"], e["echo_number"]
    rows = query(db, """SELECT m.metric, m.slice, m.value, m.verdict FROM measurements m
                        JOIN runs r ON r.id = m.run_id JOIN series s ON s.id = r.series_id
                        WHERE s.series_instance_uid = ? AND m.echo = ?""", (uid, echo))
    got = {(m, s): (v, ver) for m, s, v, ver in rows}
    t = e["slice_thickness"]
    pairs = [(("slice_thickness", t["slice"]), t["corrected_mm"], t["verdict"]),
             (("slice_thickness_acr", t["slice"]), t["acr_mm"], None),
             (("ramp_length_top", t["slice"]), t["top_mm"], None),
             (("ramp_length_bottom", t["slice"]), t["bottom_mm"], None),
             (("tilt_angle", t["slice"]), t["tilt_deg"], None),
             (("snr", None), e["snr"], None),
             (("position_offset", None), e["position_model"]["offset_mm"], None),
             (("position_scale", None), e["position_model"]["scale_percent"], None)]
    for p in e["slice_position"]:
        pairs.append((("bar_length_difference", p["slice"]), p["bar_difference_mm"], p["verdict"]))
        pairs.append((("slice_displacement", p["slice"]), p["displacement_mm"], None))
    for key, want, verdict in pairs:
        have = got.get(key)
        if not check(have is not None, "%s echo %d: row %s stored" % (uid, echo, key)):
            continue
        check(close(have[0], want), "%s echo %d %s: stored %r, analyze %r" %
              (uid, echo, key, have[0], want))
        if verdict:
            check(have[1] == verdict, "%s %s verdict %s vs %s" % (uid, key, have[1], verdict))
        compared += 1
check(compared >= 4 * 12, "compared %d values over four echoes" % compared)

# ---- every file accounted for, none overwritten, none lost ----
archive = tree_hashes(os.path.join(base, "archive"))
ignored = tree_hashes(os.path.join(base, "ignored"))
for f in t1 + t2 + mf:
    h = sha256(f)
    check(len(archive.get(h, [])) == 1, "%s archived exactly once" % os.path.basename(f))
dups = sum(len(v) for v in ignored.values())
check(dups == len(t1) + len(twice), "the %d second copies are in ignored/ (found %d)" %
      (len(t1) + len(twice), dups))
for paths in ignored.values():
    for p in paths:
        with open(p + ".reason.txt") as f:
            check("duplicate of file" in f.read(), "%s has its reason beside it" % p)
states = dict(query(db, "SELECT state, count(*) FROM files GROUP BY state"))
check(states == {"stored": 34, "ignored": dups}, "file states %s" % states)
check(not query(db, "SELECT id FROM files WHERE state = 'stored' AND location = ''"),
      "every stored file's location is recorded")
for (loc,) in query(db, "SELECT location FROM files"):
    check(os.path.isfile(loc), "recorded location %s exists" % loc)
pngs = [n for r, _, ns in os.walk(os.path.join(base, "images")) for n in ns if n.endswith(".png")]
check(len(pngs) == 2 + 4 + 2, "annotated PNGs: ramp and wedge slice per echo (found %d)" % len(pngs))

cleanup(base)
finish()
