#!/usr/bin/python3
"""fault_sweep.py KIND: runs `slicewarden watch --once` (or `analyze`, for KIND analyze) on a small
watch folder again and again, making the Nth call of one kind fail (tests/fault/faultshim.c, or the
store's own step hook for KIND sqlite), and checks after every run what docs/faults.md lists:

- the exit status is clean (0 or 1; analyze 0, 1 or 2), no signal, no sanitizer report, no hang;
- the database passes PRAGMA integrity_check and foreign_key_check (Debian's sqlite3 shell), and
  holds no half-written result (the invariants of docs/schema.md: every run finished, every done
  run with all its measurement rows, every stored series with its run and its files, ...);
- every input file's bytes exist exactly once (watch folder, archive/, quarantine/ or ignored/,
  by SHA-256), and no PNG names a run that does not exist;
- a second run without faults finishes the job: each series measured exactly once, with the same
  values as a run that never saw a fault, nothing lost, the watch folder empty.

KIND: malloc, write, fsync, rename, open (the shim), sqlite (SLICEWARDEN_TEST_DB_FAULT_AT), or
analyze (malloc, write and open faults in `slicewarden analyze --json --png`).
N runs over every call of that kind that the run makes (counted by a run without faults) when
there are at most SW_FAULT_MAX_RUNS of them (default 25; 10 under ASan); otherwise over SW_FAULT_MAX_RUNS values
in equal strata of 1..count, one drawn in each (seeded: SW_FAULT_SEED, default 1), plus the first
and the last call. SW_FAULT_FULL=1 sweeps every call. Exit status 77: cannot run here."""
import hashlib
import json
import os
import random
import re
import shutil
import sqlite3
import subprocess
import sys
import tempfile
import time

SW = os.environ.get("SW_BIN", "slicewarden")
SHIM = os.environ.get("SW_FAULTSHIM", "")
ASAN = os.environ.get("SW_FAULT_ASAN", "")  # libasan's path when the program is built with ASan
KIND = sys.argv[1] if len(sys.argv) > 1 else "write"
# Under ASan each run costs about three times as much: fewer samples there.
MAX_RUNS = int(os.environ.get("SW_FAULT_MAX_RUNS", "10" if os.environ.get("SW_FAULT_ASAN") else
                              "25"))
FULL = os.environ.get("SW_FAULT_FULL") == "1"
SEED = int(os.environ.get("SW_FAULT_SEED", "1"))
VERBOSE = os.environ.get("SW_FAULT_VERBOSE") == "1"
SMALL = ["--matrix", "128", "--oversample", "2"]
SANITIZER = re.compile(r"AddressSanitizer|LeakSanitizer|UndefinedBehaviorSanitizer|runtime error:")
# The faults each kind injects: a full disk, an I/O error, a full quota (the three a store meets).
ERRNOS = {"write": ["ENOSPC", "EIO", "EDQUOT"], "fsync": ["EIO", "ENOSPC"],
          "rename": ["EIO", "EXDEV", "ENOSPC"], "open": ["EACCES", "ENOSPC", "EDQUOT"]}

failures = []
# Known open bugs, outside this folder. The analysis (analysis/fit.c an_xing_find_in, geom.c
# an_line_weight_ss) takes a failed allocation for a failed crossing or an unknown weight and goes
# on, so that a malloc fault there changes a measured value without an error (docs/faults.md). Such
# outcomes are counted and printed as KNOWN, and fail the test with SW_FAULT_STRICT=1. Everything
# else about those runs (rows, files, states) is still checked strictly. And DCMTK's logger at
# exit (exit_time_abort).
STRICT = os.environ.get("SW_FAULT_STRICT") == "1"
known = []


def exit_time_abort(r):
    """DCMTK's logger (log4cplus inside liboflog) allocates in a static destructor at process exit
    and lets std::bad_alloc end the program there, after the store is closed: an abort outside the
    project's code, recognised by the shim's backtrace."""
    return r.returncode == -6 and "log4cplus" in r.stderr and "__cxa_finalize" in r.stderr


def known_bug(cond, what):
    if cond:
        return True
    if STRICT or KIND != "malloc":
        return check(False, what)
    known.append(what)
    print("KNOWN:", what, file=sys.stderr)
    return False


def check(cond, what):
    if not cond:
        failures.append(what)
        print("FAIL:", what, file=sys.stderr)
    return cond


if not os.path.exists(SHIM) and KIND != "sqlite":
    print("no fault shim at %r" % SHIM)
    sys.exit(77)
if ASAN and KIND == "malloc":
    # ASan's allocator owns malloc: interposing it as well would pair one allocator's malloc with
    # the other's free. The malloc sweep runs in the plain build.
    print("the malloc sweep does not run under AddressSanitizer (its allocator owns malloc)")
    sys.exit(77)


def sha256(path):
    h = hashlib.sha256()
    with open(path, "rb") as f:
        h.update(f.read())
    return h.hexdigest()


def scratch_base():
    """tmpfs when there is one: thousands of fsyncs cost nothing there, and the code paths are the
    same (faults come from the shim, not from the disk)."""
    for d in ("/dev/shm", None):
        try:
            return tempfile.mkdtemp(prefix="sw-fault-%s-" % KIND, dir=d)
        except OSError:
            continue
    raise SystemExit("no scratch folder")


base = scratch_base()
os.chmod(base, 0o755)
src = os.path.join(base, "src")


def simulate(sub, series, seed, station):
    out = os.path.join(src, sub)
    subprocess.run([SW, "simulate", "--quiet", "--series", series, "--seed", str(seed),
                    "--station", station] + SMALL + [out], check=True)
    os.unlink(os.path.join(out, "truth.json"))


# Two series (a T1 and a double-echo T2 from two scanners) and one file that is not DICOM, so that
# the run stores, quarantines (with a reason file) and archives.
simulate("study1", "t1", 11, "ALDMR1")
simulate("study2", "t2", 12, "ALDMR2")
with open(os.path.join(src, "study1", "notes.txt"), "w") as f:
    f.write("not a DICOM file\n")
inputs = {}
for d, _, names in os.walk(src):
    for n in names:
        p = os.path.join(d, n)
        inputs[sha256(p)] = os.path.relpath(p, src)


class Layout:
    """A watch folder with a fresh copy of the inputs, its database folder and output folders."""
    serial = 0

    def __init__(self, name=None):
        if name is None:
            Layout.serial += 1
            name = "run%d" % Layout.serial
        self.root = os.path.join(base, name)
        shutil.rmtree(self.root, ignore_errors=True)
        os.makedirs(self.root)
        self.inbox = os.path.join(self.root, "incoming")
        shutil.copytree(src, self.inbox)
        self.made = time.monotonic()
        self.state = os.path.join(self.root, "state")
        os.makedirs(self.state)
        self.db = os.path.join(self.state, "qa.sqlite")
        self.images = os.path.join(self.root, "images")
        self.archive = os.path.join(self.root, "archive")

    def cleanup(self):
        shutil.rmtree(self.root, ignore_errors=True)

    def settle(self):
        """The service leaves a listed file alone until it has not changed for a second (a
        receiver may still write it): layouts are made a few runs ahead, and this waits for the
        rest of that second."""
        wait = self.made + 1.1 - time.monotonic()
        if wait > 0:
            time.sleep(wait)


class Pool:
    AHEAD = 3

    def __init__(self):
        self.ready = []

    def take(self):
        while len(self.ready) < self.AHEAD + 1:
            self.ready.append(Layout())
        lay = self.ready.pop(0)
        lay.settle()
        return lay

    def close(self):
        for lay in self.ready:
            lay.cleanup()


def env_for(fault, n=0, err="ENOSPC", times=1, arm=None, report=None):
    env = dict(os.environ)
    for k in list(env):
        if (k.startswith("SW_FAULT_") and k != "SW_FAULT_BACKTRACE") or \
                k == "SLICEWARDEN_TEST_DB_FAULT_AT":
            del env[k]
    if fault:
        pre = ([ASAN] if ASAN else []) + [SHIM]
        env["SW_FAULT_BACKTRACE"] = "1"  # only at the fault: tells third-party aborts apart
        env["LD_PRELOAD"] = ":".join(pre)
        if ASAN:
            # The shim is not instrumented and is preloaded after libasan on purpose.
            env["ASAN_OPTIONS"] = env.get("ASAN_OPTIONS", "") + ":verify_asan_link_order=0"
        if fault in ("malloc", "write", "fsync", "rename", "open") and n:
            env["SW_FAULT_KIND"] = fault
            env["SW_FAULT_N"] = str(n)
            env["SW_FAULT_ERRNO"] = err
            env["SW_FAULT_TIMES"] = str(times)
        if fault == "sqlite" and n:
            env["SLICEWARDEN_TEST_DB_FAULT_AT"] = str(n)
        if arm:
            env["SW_FAULT_ARM"] = arm
        if report:
            env["SW_FAULT_REPORT"] = report
    return env


def run(cmd, env, timeout=120):
    t0 = time.monotonic()
    try:
        r = subprocess.run(cmd, capture_output=True, text=True, errors="replace", env=env,
                           timeout=timeout)
    except subprocess.TimeoutExpired:
        return None, time.monotonic() - t0
    return r, time.monotonic() - t0


# Debian's fontconfig (2.14, reached through cairo at the first text drawn on a PNG) dies with
# SIGSEGV when a malloc fails while it parses its XML configuration: a fault outside the project
# (docs/faults.md). The malloc sweeps therefore run without PNGs; every other kind draws them.
NO_PNG = ["--no-png"] if KIND == "malloc" else []


def watch(lay, env):
    return run([SW, "watch", "--once", "--no-progress", "--folder", lay.inbox, "--db", lay.db] +
               NO_PNG, env)


def query(db, sql, args=()):
    con = sqlite3.connect("file:%s?mode=ro" % db, uri=True, timeout=30)
    try:
        return con.execute(sql, args).fetchall()
    finally:
        con.close()


def shell(db, sql):
    r = subprocess.run(["sqlite3", "-readonly", db, sql], capture_output=True, text=True)
    return r.returncode, r.stdout.strip() + r.stderr.strip()


def visible_hashes(lay):
    """{sha: [paths]} of the files in the watch folder and the three output folders, reason files
    apart; and the hidden files found there (leftover temporary names)."""
    out, hidden = {}, []
    for sub in ("incoming", "archive", "quarantine", "ignored"):
        for d, _, names in os.walk(os.path.join(lay.root, sub)):
            for n in names:
                p = os.path.join(d, n)
                if n.startswith("."):
                    hidden.append(p)
                    continue
                if n.endswith(".reason.txt"):
                    continue
                out.setdefault(sha256(p), []).append(p)
    return out, hidden


def baseline_rows(db):
    """Per series UID: the measurement rows of its one done run (metric, slice, echo, verdict,
    value rounded to 1e-9), for comparing a run that met faults with one that met none."""
    rows = query(db, "SELECT s.series_instance_uid, m.metric, m.slice, m.echo, m.verdict, m.value "
                     "FROM measurements m JOIN runs r ON r.id = m.run_id "
                     "JOIN series s ON s.id = r.series_id WHERE r.status = 'done'")
    out = {}
    for uid, metric, sl, echo, verdict, value in rows:
        out.setdefault(uid, []).append(
            (metric, sl, echo, verdict, None if value is None else round(value, 9)))
    return {k: sorted(v, key=repr) for k, v in out.items()}


def invariants(lay, ref, where):
    """The store's promises (docs/schema.md) after any run, faulted or not."""
    db = lay.db
    if not os.path.exists(db):
        return
    rc, text = shell(db, "PRAGMA integrity_check;")
    check(rc == 0 and text == "ok", "%s: integrity_check: %s" % (where, text))
    rc, text = shell(db, "PRAGMA foreign_key_check;")
    check(rc == 0 and text == "", "%s: foreign_key_check: %s" % (where, text))
    try:
        query(db, "SELECT count(*) FROM runs")
    except sqlite3.OperationalError as e:
        # A database whose first transaction (the schema) never committed has no tables.
        check("no such table" in str(e), "%s: %s" % (where, e))
        return
    # Every run finished: a committed 'running' run is a half-written result.
    bad = query(db, "SELECT id, status FROM runs WHERE status NOT IN ('done', 'failed') OR "
                    "finished_at IS NULL OR (status = 'failed' AND reason = '')")
    check(not bad, "%s: unfinished or unexplained runs %s" % (where, bad))
    # Every done run has every row a run without faults has, and the same values.
    for rid, uid in query(db, "SELECT r.id, s.series_instance_uid FROM runs r "
                              "JOIN series s ON s.id = r.series_id WHERE r.status = 'done'"):
        got = sorted(((m, s, e, v, None if x is None else round(x, 9)) for m, s, e, v, x in
                      query(db, "SELECT metric, slice, echo, verdict, value FROM measurements "
                                "WHERE run_id = ?", (rid,))), key=repr)
        want = ref.get(uid, [])
        check(sorted(r[:3] for r in got) == sorted(r[:3] for r in want),
              "%s: run %d of %s has %d rows, %d expected" % (where, rid, uid, len(got), len(want)))
        known_bug(got == want, "%s: run %d of %s has other values than a run without faults" %
                  (where, rid, uid))
    bad = query(db, "SELECT r.id FROM runs r WHERE r.status = 'failed' AND EXISTS "
                    "(SELECT 1 FROM measurements m WHERE m.run_id = r.id)")
    check(not bad, "%s: failed runs with measurement rows: %s" % (where, bad))
    # Every stored series has a done run, and all its files stored; a failed one has its reason.
    for sid, uid, state, reason in query(db, "SELECT id, series_instance_uid, state, reason "
                                             "FROM series"):
        runs = query(db, "SELECT status FROM runs WHERE series_id = ?", (sid,))
        if state == "stored":
            check(("done",) in runs, "%s: series %s stored without a done run" % (where, uid))
            nfiles = query(db, "SELECT count(*) FROM files WHERE series_id = ? AND state = "
                               "'stored'", (sid,))[0][0]
            want = 11 * len({r[2] for r in ref.get(uid, [])})  # 11 slices per echo
            check(nfiles == want, "%s: series %s stored with %d files, %d expected" %
                  (where, uid, nfiles, want))
        elif state == "failed":
            check(reason != "", "%s: series %s failed without a reason" % (where, uid))
        else:
            check(not [r for r in runs if r[0] == "done"],
                  "%s: series %s is %s but has a done run" % (where, uid, state))
    # Files: final states carry their reasons; files past 'seen' know their SOP instance and
    # series; stored files belong to stored series.
    bad = query(db, "SELECT id, state FROM files WHERE state IN ('quarantined', 'ignored') AND "
                    "reason = ''")
    check(not bad, "%s: final files without a reason: %s" % (where, bad))
    bad = query(db, "SELECT id, state FROM files WHERE state IN ('parsed', 'measured', 'stored') "
                    "AND (sop_instance_uid IS NULL OR series_id IS NULL)")
    check(not bad, "%s: parsed files without SOP instance or series: %s" % (where, bad))
    bad = query(db, "SELECT f.id FROM files f JOIN series s ON s.id = f.series_id WHERE "
                    "f.state = 'stored' AND s.state != 'stored'")
    check(not bad, "%s: stored files of a series not stored: %s" % (where, bad))
    bad = query(db, "SELECT sop_instance_uid, count(*) FROM files WHERE state NOT IN "
                    "('quarantined', 'ignored') AND sop_instance_uid IS NOT NULL "
                    "GROUP BY sop_instance_uid HAVING count(*) > 1")
    check(not bad, "%s: SOP instances held twice: %s" % (where, bad))
    bad = query(db, "SELECT a.id FROM alerts a JOIN runs r ON r.id = a.run_id "
                    "WHERE r.status != 'done'")
    check(not bad, "%s: alerts of unfinished runs: %s" % (where, bad))
    # Each PNG names a done run whose series is filed in the archive folder of the same name.
    runs = {r: (st, sid) for r, st, sid in query(db, "SELECT id, status, series_id FROM runs")}
    for d, _, names in os.walk(lay.images):
        for n in names:
            m = re.match(r"run(\d+)_e\d+_s\d+\.png$", n)
            if not m:
                check(False, "%s: a file in images/ that is no run's PNG: %s" %
                      (where, os.path.join(d, n)))
                continue
            rid = int(m.group(1))
            info = runs.get(rid)
            if not check(info is not None and info[0] == "done",
                         "%s: %s names run %d, which is %s" % (where, os.path.join(d, n), rid,
                                                                info[0] if info else "absent")):
                continue
            rel = os.path.relpath(d, lay.images)
            locs = [l for (l,) in query(db, "SELECT location FROM files WHERE series_id = ? AND "
                                            "state = 'stored'", (info[1],))]
            check(any(os.path.relpath(os.path.dirname(l), lay.archive) == rel for l in locs if l),
                  "%s: %s is not the folder of run %d's series" % (where, d, rid))


def bytes_once(lay, where, final):
    got, hidden = visible_hashes(lay)
    for h, rel in inputs.items():
        n = len(got.get(h, []))
        check(n == 1, "%s: %s is found %d times: %s" % (where, rel, n, got.get(h, [])))
    extra = [p for h, ps in got.items() if h not in inputs for p in ps]
    check(not extra, "%s: files that are no input: %s" % (where, extra))
    if final:
        check(not hidden, "%s: temporary files left behind: %s" % (where, hidden))


def clean_run(lay, ref, where):
    """The run after the faulted one: it must finish the job."""
    r, secs = watch(lay, env_for(None))
    if not check(r is not None, "%s: the clean run hung" % where):
        return
    check(r.returncode == 0, "%s: the clean run exited %d: %s" % (where, r.returncode,
                                                                  r.stderr[-800:]))
    check(not SANITIZER.search(r.stderr), "%s: sanitizer report: %s" % (where, r.stderr[-2000:]))
    invariants(lay, ref, where + " then clean")
    if not os.path.exists(lay.db):
        check(False, "%s: no database after the clean run" % where)
        return
    series = query(lay.db, "SELECT series_instance_uid, state FROM series")
    check(sorted(u for u, _ in series) == sorted(ref),
          "%s: series %s, %s expected" % (where, series, sorted(ref)))
    check(all(s == "stored" for _, s in series), "%s: series not all stored: %s" % (where, series))
    for uid in ref:
        n = query(lay.db, "SELECT count(*) FROM runs r JOIN series s ON s.id = r.series_id WHERE "
                          "s.series_instance_uid = ?", (uid,))[0][0]
        check(n == 1, "%s: series %s measured %d times" % (where, uid, n))
    got = baseline_rows(lay.db)
    check({k: sorted(r[:3] for r in v) for k, v in got.items()} ==
          {k: sorted(r[:3] for r in v) for k, v in ref.items()},
          "%s: the rows differ from a run without faults" % where)
    known_bug(got == ref, "%s: the values differ from a run without faults" % where)
    left = [os.path.join(d, n) for d, _, ns in os.walk(lay.inbox) for n in ns]
    check(not left, "%s: files left in the watch folder: %s" % (where, left))
    bytes_once(lay, where + " then clean", final=True)


def pick(count):
    if os.environ.get("SW_FAULT_ONLY"):  # diagnosis: the given N values only
        return [int(x) for x in os.environ["SW_FAULT_ONLY"].split(",")]
    if FULL or count <= MAX_RUNS:
        return list(range(1, count + 1))
    rng = random.Random(SEED * 1000003 + sum(map(ord, KIND)) % 1000)  # str hash is salted per process
    k = MAX_RUNS - 2
    picks = {1, count}
    for i in range(k):
        lo = 1 + (count * i) // k
        hi = max(lo, (count * (i + 1)) // k)
        picks.add(rng.randint(lo, hi))
    return sorted(picks)


def sweep_watch():
    # A run without faults: the reference results and the number of calls of each kind.
    lay = Layout("reference")
    lay.settle()
    report = os.path.join(base, "counts")
    r, secs = watch(lay, env_for("count", arm=lay.db, report=report) if SHIM else
                    env_for(None))
    check(r is not None and r.returncode == 0, "reference run: %s" % (r and r.stderr[-800:]))
    ref = baseline_rows(lay.db)
    check(len(ref) == 2, "reference run stored %d series" % len(ref))
    counts = {}
    if SHIM:
        with open(report) as f:
            for line in f:
                k, v = line.split()
                counts[k] = int(v)
    lay.cleanup()
    total = counts.get(KIND, 0)
    check(total > 0, "the reference run makes no %s call" % KIND)
    ns = pick(total)
    print("%s: %d calls in a run; %d runs: N = %s%s (%.1f s each without faults)" %
          (KIND, total, len(ns), ns[:12], " ..." if len(ns) > 12 else "", secs))
    errnos = ERRNOS.get(KIND, ["ENOMEM"])
    fired = statuses = 0
    outcomes = {}
    pool = Pool()
    for i, n in enumerate(ns):
        err = os.environ.get("SW_FAULT_ERR") or errnos[i % len(errnos)]
        where = "%s N=%d %s" % (KIND, n, err)
        lay = pool.take()
        r, secs = watch(lay, env_for(KIND, n, err, arm=lay.db))
        if not check(r is not None, "%s: hung (over 120 s)" % where):
            lay.cleanup()
            continue
        hit = ("faultshim: %s call %d fails" % (KIND, n)) in r.stderr or \
            ("injected fault at step %d" % n) in r.stderr
        # Runs differ a little in their number of calls (timing: settling files, checkpoints),
        # so the last few N may lie beyond a run's end.
        fired += hit or n > 0.95 * total
        outcomes[r.returncode] = outcomes.get(r.returncode, 0) + 1
        if VERBOSE:
            print("%s: exit %d, %.1f s%s" % (where, r.returncode, secs,
                                            "" if hit else " (no trace of the fault in the log)"))
        if exit_time_abort(r):
            known_bug(False, "%s: DCMTK's logger aborted at exit (std::bad_alloc in a static "
                      "destructor), after the work was done" % where)
        else:
            check(r.returncode in (0, 1), "%s: exit status %d: %s" % (where, r.returncode,
                                                                       r.stderr[-1500:]))
        check(not SANITIZER.search(r.stderr), "%s: sanitizer report: %s" %
              (where, r.stderr[-2000:]))
        if os.environ.get("SW_KEEP"):
            with open(os.path.join(lay.root, "faulted.log"), "w") as f:
                f.write(r.stderr)
        invariants(lay, ref, where)
        bytes_once(lay, where, final=False)
        clean_run(lay, ref, where)
        if not os.environ.get("SW_KEEP"):
            lay.cleanup()
        statuses += 1
    pool.close()
    print("%s: %d faulted runs checked (exit statuses %s; %d with the fault named in the log)" %
          (KIND, statuses, outcomes, fired))
    # The sqlite hook names every fault it fires when the error reaches the log; the shim always.
    if KIND != "sqlite":
        check(fired == len(ns), "%s: the fault fired in %d of %d runs" % (KIND, fired, len(ns)))


def sweep_analyze():
    """`slicewarden analyze --json --png DIR` on the T2 series under malloc, write and open faults:
    exit 2 with a message naming the problem, or results equal to a run without faults; never a
    signal."""
    folder = os.path.join(src, "study2")
    pngs = os.path.join(base, "pngs")
    report = os.path.join(base, "counts")

    def analyze(env):
        shutil.rmtree(pngs, ignore_errors=True)
        os.makedirs(pngs)
        png = ["--png", pngs] if KIND != "malloc" else []  # fontconfig: see NO_PNG
        return run([SW, "analyze", "--json"] + png + ["--", folder], env)

    global KIND
    kinds = ["write", "open"] + ([] if ASAN else ["malloc"])
    for kind in kinds:
        KIND = kind
        r, secs = analyze(env_for("count", arm="/IM0001.dcm", report=report))
        check(r is not None and r.returncode == 0, "analyze without faults: %s" %
              (r and r.stderr))
        ref = r.stdout
        counts = {}
        with open(report) as f:
            for line in f:
                k, v = line.split()
                counts[k] = int(v)
        ns = pick(counts[kind])
        print("analyze, %s: %d calls; %d runs" % (kind, counts[kind], len(ns)))
        out = {}
        for n in ns:
            where = "analyze %s N=%d" % (kind, n)
            r, secs = analyze(env_for(kind, n, "ENOSPC" if kind != "open" else "EACCES",
                                      arm="/IM0001.dcm"))
            if not check(r is not None, "%s: hung" % where):
                continue
            out[r.returncode] = out.get(r.returncode, 0) + 1
            check(not SANITIZER.search(r.stderr), "%s: sanitizer: %s" % (where, r.stderr[-2000:]))
            if r.returncode == 2:
                lines = [l for l in r.stderr.splitlines() if l.startswith("slicewarden")]
                check(lines and all(len(l) > 20 for l in lines),
                      "%s: exit 2 without a clear message: %r" % (where, r.stderr[-600:]))
                # Whatever it printed before giving up is what a run without faults prints: no
                # results of a series measured without one of its files.
                try:
                    printed = json.loads(r.stdout)["series"] if r.stdout.strip() else []
                except (ValueError, KeyError, TypeError):
                    printed = None
                check(printed is not None, "%s: exit 2 with output that is not a whole JSON "
                      "document: %r" % (where, r.stdout[:200]))
                want = json.loads(ref)["series"]
                check(printed is None or all(p in want for p in printed),
                          "%s: exit 2 with results that differ from a run without faults" % where)
            elif exit_time_abort(r):
                known_bug(False, "%s: DCMTK's logger aborted at exit (std::bad_alloc in a static "
                          "destructor)" % where)
            elif r.returncode in (0, 1):
                # A fault that did not stop the run must not have changed a number.
                known_bug(r.stdout == ref, "%s: exit %d with results that differ from a run "
                          "without faults" % (where, r.returncode))
            else:
                check(False, "%s: exit status %d: %s" % (where, r.returncode, r.stderr[-1500:]))
        print("analyze, %s: exit statuses %s" % (kind, out))


t0 = time.monotonic()
try:
    if KIND == "analyze":
        sweep_analyze()
    else:
        sweep_watch()
finally:
    if os.environ.get("SW_KEEP"):
        print("kept:", base)
    else:
        shutil.rmtree(base, ignore_errors=True)
print("%.0f s" % (time.monotonic() - t0))
if known:
    print("%d outcomes of known bugs outside this folder (KNOWN above, docs/faults.md; "
          "SW_FAULT_STRICT=1 fails on them)" % len(known))
if failures:
    print("%d checks failed" % len(failures), file=sys.stderr)
    sys.exit(1)
print("all checks passed")
