#!/usr/bin/python3
"""e2e_kill.py [same-fs|cross-fs]: kill -9 of `slicewarden watch` at random points while a backlog
is ingested, at least 20 times, then a restart that finishes the work. Afterwards every series is
in the database exactly once with exactly one run, no result is duplicated, every file is in
archive/, quarantine/ or ignored/ exactly once (by SHA-256), each recorded location holds the
recorded content, and Debian's sqlite3 shell finds the database intact (PRAGMA integrity_check).
cross-fs puts the watch folder on /dev/shm (tmpfs) so that every move is a copy, fsync and unlink;
it reports "skipped" (exit 77) on a machine without a second file system there."""
import os
import random
import shutil
import signal
import sys
import time

from swe2e import (Daemon, check, cleanup, files_under, finish, integrity_ok, query, run_once,
                   simulate, sha256, tmpdir, tree_hashes, write_config)

mode = sys.argv[1] if len(sys.argv) > 1 else "same-fs"
random.seed(int(os.environ.get("SW_SEED", "20240501")))
base = tmpdir("sw-e2e-kill-")
if mode == "cross-fs":
    if not os.path.isdir("/dev/shm") or os.stat("/dev/shm").st_dev == os.stat(base).st_dev:
        print("no second file system at /dev/shm: cannot test moves across file systems here")
        cleanup(base)
        sys.exit(77)
    inbox = tmpdir("sw-e2e-kill-in-", "/dev/shm")
else:
    inbox = os.path.join(base, "incoming")
    os.makedirs(inbox)
src = os.path.join(base, "src")
db = os.path.join(base, "qa.sqlite")
alerts = os.path.join(base, "alerts.txt")
conf = write_config(os.path.join(base, "slicewarden.conf"),
                    watch={"folder": inbox, "database": db,
                           "archive": os.path.join(base, "archive"),
                           "quarantine": os.path.join(base, "quarantine"),
                           "ignored": os.path.join(base, "ignored"),
                           "images": os.path.join(base, "images"), "quiet_seconds": 600},
                    alert={"command": "echo \"$SLICEWARDEN_METRIC $SLICEWARDEN_SERIES\" >> '%s'"
                                      % alerts})

# The backlog: six series (one with 6.5 mm slices where 5 mm were prescribed: a breach), a truncated file, a text file
# and a second copy of one file.
specs = [("t1", 21, "ALDMR1", []), ("t1", 22, "ALDMR2", ["--thickness", "6.5", "--prescribed", "5"]),
         ("t2", 23, "ALDMR3", ["--shuffle"]), ("t1", 24, "ALDMR1", ["--enhanced"]),
         ("t1", 25, "ALDMR2", []), ("t2", 26, "ALDMR1", [])]
# A reserve of series fed in whenever the backlog runs dry before enough kills have landed.
reserve = [("t1", 27 + k, "ALDMR%d" % (k % 3 + 1), []) for k in range(45)]  # simulated on use only
originals = []
delivered = []


def deliver(i, spec):
    kind, seed, station, extra = spec
    files, truth = simulate(os.path.join(src, "s%d" % i), *extra, series=kind, seed=seed,
                            station=station)
    for f in files:
        dst = os.path.join(inbox, "s%d" % i, os.path.basename(f))
        os.makedirs(os.path.dirname(dst), exist_ok=True)
        shutil.copyfile(f, dst)
        originals.append(dst)
        want.setdefault(sha256(dst), 0)
        want[sha256(dst)] += 1
    delivered.append(spec)


want = {}
for i, spec in enumerate(specs):
    deliver(i, spec)
with open(originals[3], "rb") as f:
    head = f.read()
bad = {os.path.join(inbox, "cut.dcm"): head[:len(head) // 3],
       os.path.join(inbox, "notes.txt"): b"not an image\n"}
for p, data in bad.items():
    with open(p, "wb") as f:
        f.write(data)
dup = os.path.join(inbox, "s0", "second-copy")
shutil.copyfile(originals[0], dup)
for p in list(bad) + [dup]:
    originals.append(p)
    want.setdefault(sha256(p), 0)
    want[sha256(p)] += 1


def stored_count():
    if not os.path.exists(db):
        return 0
    try:
        return query(db, "SELECT count(*) FROM series WHERE state = 'stored'")[0][0]
    except Exception:  # the store is being created by the daemon just killed
        return 0


def remaining():
    return [p for p in files_under(inbox) if not os.path.basename(p).startswith(".")]


time.sleep(1.2)  # files younger than a second wait to settle (they may still be written)
# Random points, on the time scale of this build: a start of the program on an empty folder takes
# about 30 ms in an optimised build (several times that under the sanitizers); the delays below are
# in those units, so that the kills land in every phase on a slow build too.
empty = tmpdir("sw-e2e-kill-empty-")
os.makedirs(os.path.join(empty, "in"))
t0 = []
for _ in range(3):
    t = time.monotonic()
    run_once(os.path.join(empty, "in"), os.path.join(empty, "t.sqlite"))
    t0.append(time.monotonic() - t)
scale = min(10.0, max(1.0, min(t0) / 0.03))
print("start-up %.3f s: kill delays scaled by %.1f" % (min(t0), scale))
kills = 0
starts = 0
while kills < 24:
    if not remaining():
        if not reserve:
            break
        for _ in range(3):
            deliver(len(delivered), reserve.pop(0))
        time.sleep(1.2)
    d = Daemon(inbox, db, "-c", conf)
    starts += 1
    # Mostly short lives (kills while files are taken), every fifth a longer one (kills while a
    # series is measured and stored); when a slow build has stored nothing after a dozen kills,
    # longer lives until it has, so that the kills reach the storing on any build.
    if kills % 5 and not (kills >= 12 and stored_count() == 0):
        life = random.uniform(0.005, 0.08)
    elif stored_count() == 0 and kills >= 12:
        life = random.uniform(0.3, 1.0)
    else:
        life = random.uniform(0.08, 0.2)
    time.sleep(scale * life)
    left = remaining()
    d.p.send_signal(signal.SIGKILL)
    d.p.wait()
    d.log.close()
    if left:
        kills += 1
    else:
        # The daemon finished the whole backlog within its life: lives are too long for this
        # build's speed; shorten them so that the kills land while there is work.
        scale = max(0.3, scale * 0.7)
print("%d kills with work left, %d starts, %d series" % (kills, starts, len(delivered)))
check(kills >= 20, "at least 20 kills landed while the backlog was ingested (%d)" % kills)

mid = query(db, "SELECT count(*) FROM series WHERE state = 'stored'")[0][0]
print("%d of %d series stored during the kills" % (mid, len(delivered)))
check(mid >= 1, "the kills reached the measuring and storing (a series stored meanwhile)")

# The restart that finishes the work.
r = run_once(inbox, db, "-c", conf)
check(r.returncode == 0, "the final run ends with status 0 (%d): %s" % (r.returncode, r.stdout))
check(not remaining(), "the watch folder is empty: %s" % remaining()[:3])

# ---- the database: each series once, one run each, no duplicate result ----
series = query(db, "SELECT id, series_instance_uid, state FROM series")
check(len(series) == len(delivered), "%d series known (%d)" % (len(delivered), len(series)))
for sid, uid, state in series:
    check(state == "stored", "series %s stored (%s)" % (uid, state))
    runs = query(db, "SELECT id, status FROM runs WHERE series_id = ?", (sid,))
    check(len(runs) == 1 and runs[0][1] == "done", "series %s: exactly one run, done: %s" %
          (uid, runs))
dups = query(db, """SELECT run_id, metric, slice, echo, count(*) FROM measurements
                    GROUP BY run_id, metric, slice, echo HAVING count(*) > 1""")
check(not dups, "no measurement row twice: %s" % dups[:3])
per_run = query(db, "SELECT run_id, count(*) FROM measurements GROUP BY run_id")
check(len(per_run) == len(delivered), "rows for every run")
open_files = query(db, "SELECT path, state FROM files WHERE state IN ('seen','parsed','measured')")
check(not open_files, "no file left in an open state: %s" % open_files[:3])
alert_rows = query(db, "SELECT metric FROM alerts")
check(alert_rows == [("slice_thickness",)], "the one breach recorded once: %s" % alert_rows)
check(os.path.exists(alerts), "its command ran (at least once: delivery survives kills)")

# ---- the files: each exactly once in archive/, quarantine/ or ignored/, nothing lost ----
found = {}
for sub in ("archive", "quarantine", "ignored"):
    for h, paths in tree_hashes(os.path.join(base, sub)).items():
        found.setdefault(h, []).extend(paths)
for h, n in want.items():
    check(len(found.get(h, [])) == n, "content %s… present %d time(s), expected %d" %
          (h[7:19], len(found.get(h, [])), n))
extra = set(found) - set(want)
check(not extra, "nothing but the originals in the output folders")
for sub in ("archive", "quarantine", "ignored"):
    hidden = [p for p in files_under(os.path.join(base, sub)) if os.path.basename(p)[0] == "."]
    check(not hidden, "no temporary file left in %s/: %s" % (sub, hidden[:3]))
for loc, h, state in query(db, "SELECT location, content_hash, state FROM files"):
    if check(loc != "", "every file has a recorded location (%s)" % state):
        check(os.path.isfile(loc) and sha256(loc) == h,
              "%s holds the recorded content" % loc)
q = query(db, "SELECT count(*) FROM files WHERE state = 'quarantined'")[0][0]
check(q == 2, "the truncated and the text file quarantined (%d)" % q)
for p in files_under(os.path.join(base, "quarantine")):
    if not p.endswith(".reason.txt"):
        check(os.path.isfile(p + ".reason.txt"), "%s has its reason beside it" % p)

ok, text = integrity_ok(db)
check(ok, "sqlite3 PRAGMA integrity_check: %s" % text)

cleanup(base, inbox, empty)
finish()
