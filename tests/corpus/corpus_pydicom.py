#!/usr/bin/python3
"""corpus_pydicom.py: every file of Debian's python3-pydicom test data (test_files and the folders
below it: explicit and implicit VR, big endian, deflated, RLE, JPEG, JPEG-LS, JPEG 2000, no meta
header, bad VRs, truncated files, DICOMDIR trees, text files) through `slicewarden analyze` (file by
file, then folder by folder) and `slicewarden watch --once` (one watch folder holding them all).

Each input must be read, ignored or quarantined with a reason that names the file; no run may die
of a signal or print a sanitizer report, none may pass its time limit; the watch run's summary must
add up, and every input's bytes must exist afterwards exactly once in archive/, quarantine/ or
ignored/ (SHA-256 by Python's hashlib). pydicom (the independent reader) says what each file is:
its Modality must be the one our reason names for a non-MR image, and a JPEG 2000 transfer syntax
must be the reason a JPEG 2000 MR image is refused (transfer syntax UIDs: DICOM PS3.5 Annex A,
1.2.840.10008.1.2.4.90 to .93). Exit 77 (skipped) only when pydicom is absent."""
import glob
import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import warnings

SW = os.environ.get("SW_BIN", "slicewarden")
PER_FILE_TIMEOUT = 120  # seconds; a whole file under ASan takes well under one
try:
    import pydicom
except ImportError:
    print("python3-pydicom is not installed: skipped")
    sys.exit(77)
CORPUS = os.path.join(os.path.dirname(pydicom.__file__), "data", "test_files")
if not os.path.isdir(CORPUS):
    print("pydicom's test data is not installed: skipped")
    sys.exit(77)

warnings.simplefilter("ignore")  # pydicom's notes on odd files; its answers are what we compare
SANITIZER = re.compile(r"AddressSanitizer|LeakSanitizer|UndefinedBehaviorSanitizer|runtime error:")
J2K = {"1.2.840.10008.1.2.4.90", "1.2.840.10008.1.2.4.91", "1.2.840.10008.1.2.4.92",
       "1.2.840.10008.1.2.4.93"}
failures = []
checks = 0


def check(cond, what):
    global checks
    checks += 1
    if not cond:
        failures.append(what)
        print("FAIL:", what, file=sys.stderr)
    return cond


def sha256(path):
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 16), b""):
            h.update(chunk)
    return h.hexdigest()


def pydicom_view(path):
    """(modality, transfer syntax, has pixel data) as pydicom reads the file, or None."""
    try:
        ds = pydicom.dcmread(path, force=True, stop_before_pixels=False)
        modality = str(ds.get("Modality", ""))
        ts = str(ds.file_meta.get("TransferSyntaxUID", "")) if hasattr(ds, "file_meta") else ""
        return modality, ts, "PixelData" in ds
    except Exception:  # pydicom cannot read it either
        return None


def run(cmd, timeout):
    """A run of the program: (returncode, stdout, stderr), or None when it timed out."""
    try:
        r = subprocess.run(cmd, capture_output=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        return None
    return r.returncode, r.stdout.decode("utf-8", "replace"), r.stderr.decode("utf-8", "replace")


def healthy(res, what):
    """No time-out, no signal, no sanitizer report, a documented exit status."""
    if not check(res is not None, "%s: finishes within its time limit" % what):
        return False
    rc, _, err = res
    ok = check(rc >= 0, "%s: no signal (status %d)" % (what, rc))
    ok &= check(not SANITIZER.search(err), "%s: no sanitizer report:\n%s" % (what, err[-3000:]))
    ok &= check(rc in (0, 1, 2), "%s: exit status 0, 1 or 2 (got %d)" % (what, rc))
    return ok


inputs = sorted(p for p in glob.glob(os.path.join(CORPUS, "**"), recursive=True)
                if os.path.isfile(p) and not os.path.islink(p))
check(len(inputs) >= 100, "the corpus has its files (%d)" % len(inputs))
view = {p: pydicom_view(p) for p in inputs}

# ---- 1. analyze, file by file ----
outcome = {}  # path -> "measured" or the reason given
for p in inputs:
    rel = os.path.relpath(p, CORPUS)
    res = run([SW, "analyze", "--json", p], PER_FILE_TIMEOUT)
    if not healthy(res, "analyze %s" % rel):
        continue
    rc, out, err = res
    if rc == 2:
        lines = [ln for ln in err.splitlines() if p in ln]
        if check(lines, "analyze %s: the error names the file: %r" % (rel, err)):
            reason = lines[0].split(p, 1)[1].lstrip(": ").strip()
            check(len(reason) >= 5, "analyze %s: a reason after the name: %r" % (rel, lines[0]))
            outcome[p] = reason
        continue
    try:
        doc = json.loads(out)
    except ValueError:
        check(False, "analyze %s: status %d with JSON on stdout: %r" % (rel, rc, out[:200]))
        continue
    series = doc.get("series", [])
    check(series, "analyze %s: status %d reports a series" % (rel, rc))
    for s in series:
        check(s.get("verdict") in ("pass", "warn", "fail", "unmeasurable"),
              "analyze %s: a verdict for each echo (%r)" % (rel, s.get("verdict")))
    outcome[p] = "measured"
    v = view[p]
    check(v is not None and v[0] == "MR",
          "analyze %s: measured only what pydicom reads as an MR image (%r)" % (rel, v))

for p, reason in outcome.items():
    v, rel = view[p], os.path.relpath(p, CORPUS)
    if v is None or reason == "measured":
        continue
    modality, ts, _ = v
    m = re.search(r"not an MR image \([Mm]odality '([^']*)'\)", reason)
    if m:
        check(m.group(1) == modality, "%s: the reason names pydicom's Modality %r: %s" %
              (rel, modality, reason))
    elif modality == "MR" and ts in J2K:
        check("JPEG 2000" in reason, "%s: a JPEG 2000 MR image is refused as such: %s" %
              (rel, reason))
check(sum(1 for r in outcome.values() if r == "measured") >= 1, "some MR image is measured")

# ---- 2. analyze, folder by folder ----
folders = [CORPUS] + sorted(d for d in glob.glob(os.path.join(CORPUS, "**/"), recursive=True)
                            if os.path.normpath(d) != CORPUS)
for d in folders:
    d = os.path.normpath(d)
    rel = os.path.relpath(d, CORPUS)
    res = run([SW, "analyze", "--json", d], 600)
    if not healthy(res, "analyze folder %s" % rel):
        continue
    rc, out, err = res
    below = [p for p in inputs if p.startswith(d + os.sep)]
    # A file refused on its own (not for being alone in its series) is named in the folder's run.
    for p in below:
        r = outcome.get(p)
        if r and r != "measured" and "phantom" not in r and "series" not in r:
            check(p in err, "analyze folder %s names %s" % (rel, os.path.relpath(p, CORPUS)))
    check(rc == 2 or any(outcome.get(p) == "measured" for p in below),
          "analyze folder %s: status %d only with something measured" % (rel, rc))

# ---- 3. watch --once over a folder holding them all ----
base = tempfile.mkdtemp(prefix="sw-corpus-")
inbox = os.path.join(base, "incoming")
db = os.path.join(base, "qa.sqlite")
shutil.copytree(CORPUS, inbox, symlinks=False)
arrived = {}  # incoming path -> sha256
for p in inputs:
    q = os.path.join(inbox, os.path.relpath(p, CORPUS))
    arrived[q] = sha256(q)
res = run([SW, "watch", "--once", "--quiet", "0", "--no-png", "--folder", inbox, "--db", db], 900)
if healthy(res, "watch --once"):
    rc, out, err = res
    check(rc == 0, "watch --once: status 0 (got %d): %s" % (rc, err[-2000:]))
    m = re.search(r"(\d+) files \((\d+) stored, (\d+) quarantined, (\d+) ignored; (\d+) moved, "
                  r"(\d+) not moved\), (\d+) series measured \((\d+) pass, (\d+) warn, (\d+) fail, "
                  r"(\d+) unmeasurable\), (\d+) not measured, (\d+) still collecting, .*?"
                  r"(\d+) files left", out + err)
    if check(m, "watch --once prints its summary: %r" % (out + err)[-500:]):
        (nf, st, qu, ig, mv, nmv, sm, pas, wrn, fl, un, nm, coll, left) = map(int, m.groups())
        check(nf == len(inputs), "summary: %d files (inputs %d)" % (nf, len(inputs)))
        check(st + qu + ig == nf, "summary: stored + quarantined + ignored = files (%d + %d + %d, "
              "%d)" % (st, qu, ig, nf))
        check(mv == nf and nmv == 0 and left == 0, "summary: all moved, none left (%d, %d, %d)" %
              (mv, nmv, left))
        check(pas + wrn + fl + un == sm, "summary: verdicts add up to the series measured")
        check(coll == 0, "summary: nothing still collecting with --quiet 0 (%d)" % coll)
    import sqlite3
    con = sqlite3.connect("file:%s?mode=ro" % db, uri=True)
    rows = con.execute("SELECT path, content_hash, state, reason, location FROM files").fetchall()
    nseries = con.execute("SELECT count(*) FROM series").fetchone()[0]
    con.close()
    if m:
        check(sm + nm == nseries, "summary: measured + not measured = series stored (%d + %d, %d)"
              % (sm, nm, nseries))
        states = [r[2] for r in rows]
        check((states.count("stored"), states.count("quarantined"), states.count("ignored")) ==
              (st, qu, ig), "summary counts match the database")
    by_path = {r[0]: r for r in rows}
    check(len(rows) == len(arrived), "one database row per input (%d, %d)" % (len(rows),
                                                                               len(arrived)))
    folder_of = {"stored": "archive", "quarantined": "quarantine", "ignored": "ignored"}
    for q, digest in sorted(arrived.items()):
        rel = os.path.relpath(q, inbox)
        r = by_path.get(q)
        if not check(r is not None, "watch: %s is recorded" % rel):
            continue
        _, chash, state, reason, loc = r
        check(chash == "sha256:" + digest, "watch: %s: the recorded hash is the file's" % rel)
        if not check(state in folder_of, "watch: %s ends stored, quarantined or ignored (%s)" %
                     (rel, state)):
            continue
        check(loc.startswith(os.path.join(base, folder_of[state]) + os.sep),
              "watch: %s is in %s/ (%s)" % (rel, folder_of[state], loc))
        check(os.path.isfile(loc) and sha256(loc) == digest,
              "watch: %s: its bytes are where the database says (%s)" % (rel, loc))
        if state == "stored":
            continue
        check(len(reason) >= 5, "watch: %s: a reason is stored (%r)" % (rel, reason))
        # The log names the file with its fate and reason; the reason file beside it too.
        line = [ln for ln in err.splitlines() if q + ":" in ln and state in ln]
        check(line and reason in line[0], "watch: %s: the log names the file, %s and the reason"
              % (rel, state))
        try:
            with open(loc + ".reason.txt") as f:
                text = f.read()
        except OSError:
            text = ""
        check("reason: " + reason in text and "original path: " + q in text,
              "watch: %s: the reason file names the file and the reason" % rel)
        v = view[os.path.join(CORPUS, rel)]
        mm = re.search(r"not an MR image \([Mm]odality '([^']*)'\)", reason)
        if mm and v is not None:
            check(mm.group(1) == v[0], "watch: %s: the reason names pydicom's Modality %r: %s" %
                  (rel, v[0], reason))
    # What each kind of file does (for docs/hardening.md): the reasons without the file names.
    kinds = {}
    for q, r in by_path.items():
        k = "%s: %s" % (r[2], r[3].replace(q, "FILE"))
        k = re.sub(r"duplicate of file \d+ \(same SOPInstanceUID [0-9.]+\)",
                   "duplicate of file N (same SOPInstanceUID)", k)
        kinds[k] = kinds.get(k, 0) + 1
    for k in sorted(kinds, key=lambda k: (-kinds[k], k)):
        print("%4d  %s" % (kinds[k], k))
    # Nothing lost, nothing doubled: each input's bytes once in the three folders (inputs with
    # the same bytes count as many times as they arrived).
    want = {}
    for digest in arrived.values():
        want[digest] = want.get(digest, 0) + 1
    got = {}
    for sub in ("archive", "quarantine", "ignored"):
        for dpath, _, names in os.walk(os.path.join(base, sub)):
            for n in names:
                if n.endswith(".reason.txt"):
                    continue
                digest = sha256(os.path.join(dpath, n))
                got[digest] = got.get(digest, 0) + 1
    for digest, k in want.items():
        check(got.get(digest, 0) == k, "watch: bytes %s... kept %d times, arrived %d times" %
              (digest[:12], got.get(digest, 0), k))
    extra = set(got) - set(want)
    check(not extra, "watch: no file in the folders that did not arrive (%d)" % len(extra))
    left = [os.path.join(dp, n) for dp, _, ns in os.walk(inbox) for n in ns]
    check(not left, "watch: the watch folder is empty afterwards: %s" % left[:5])

if os.environ.get("SW_KEEP"):
    print("kept:", base)
else:
    shutil.rmtree(base, ignore_errors=True)
print("corpus: %d inputs, %d folders" % (len(inputs), len(folders)))
print("%d passed, %d failed" % (checks - len(failures), len(failures)))
sys.exit(1 if failures else 0)
