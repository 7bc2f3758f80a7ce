#!/usr/bin/python3
"""e2e_inputs.py: what a running `slicewarden watch` does with input that is not a phantom series,
and with a store that another writer locks. Corrupt, truncated, empty and non-DICOM files are
quarantined with the reason beside them; CT images (pydicom's CT_small.dcm), MR images of another
series (pydicom's MR_small.dcm) and pydicom's odd-input corpus are quarantined or ignored, each with
its reason; JPEG 2000 (which Debian's DCMTK cannot decode) is quarantined. The service keeps
running and still measures a phantom series afterwards. Then the database is held by another
writer (Python's sqlite3, BEGIN EXCLUSIVE) for 10 s while a series arrives: nothing is lost, the
series is stored once the lock goes."""
import glob
import os
import shutil
import sqlite3
import time

from swe2e import (Daemon, check, cleanup, files_under, finish, query, simulate, stored_series,
                   tmpdir, wait_for)

CORPUS = "/usr/lib/python3/dist-packages/pydicom/data/test_files"
base = tmpdir("sw-e2e-inputs-")
inbox = os.path.join(base, "incoming")
db = os.path.join(base, "qa.sqlite")
os.makedirs(inbox)
good, _ = simulate(os.path.join(base, "src", "good"), seed=31, station="ALDMR1")
later, _ = simulate(os.path.join(base, "src", "later"), seed=32, station="ALDMR2")
with open(good[0], "rb") as f:
    sample = f.read()
other, _ = simulate(os.path.join(base, "src", "other"), seed=33, station="ALDMR3")
# A series with a station name that would climb out of the archive if used as it is, and one
# series of which a slice never arrives (measured when quiet).
hostile, _ = simulate(os.path.join(base, "src", "hostile"), seed=34, station="../../x/ALD")
partial, _ = simulate(os.path.join(base, "src", "partial"), seed=35, station="ALDMR1")
with open(other[0], "rb") as f:
    other0 = f.read()

# A short quiet period: MR_small.dcm (one image, a name no pattern matches) is judged on content.
d = Daemon(inbox, db, "--quiet", "2")
time.sleep(0.4)

expect = {}  # name -> (state, words expected in the reason)


def put(name, data, state, words):
    with open(os.path.join(inbox, name), "wb") as f:
        f.write(data)
    expect[name] = (state, words)


put("empty.dcm", b"", "quarantined", ["empty"])
put("notes.txt", b"meeting at ten\n", "quarantined", ["not a DICOM"])
put("image.png", b"\x89PNG\r\n\x1a\n" + b"\0" * 64, "quarantined", ["not a DICOM"])
put("cut-in-pixels.dcm", other0[:len(other0) - 5000], "quarantined", [])
put("cut-in-header.dcm", other0[:200], "quarantined", [])
mangled = bytearray(other0)
mangled[128:132] = b"XXXX"  # the DICM prefix gone, then nonsense where the meta header was
for i in range(132, 400):
    mangled[i] = 0xFF
put("mangled.dcm", bytes(mangled), "quarantined", [])
shutil.copyfile(os.path.join(CORPUS, "CT_small.dcm"), os.path.join(inbox, "ct.dcm"))
expect["ct.dcm"] = ("ignored", ["not an MR image", "CT"])
shutil.copyfile(os.path.join(CORPUS, "MR_small_jp2klossless.dcm"), os.path.join(inbox, "j2k.dcm"))
expect["j2k.dcm"] = ("quarantined", [])
shutil.copyfile(os.path.join(CORPUS, "MR_small.dcm"), os.path.join(inbox, "mr-small.dcm"))
expect["mr-small.dcm"] = ("ignored", ["not a phantom series"])
# The rest of pydicom's corpus (explicit and implicit VR, big endian, deflated, RLE, JPEG, JPEG-LS,
# no meta header, bad VRs, DICOMDIR trees): whatever each is, it must end quarantined or ignored.
corpus_dir = os.path.join(inbox, "corpus")
os.makedirs(corpus_dir)
corpus = [p for p in sorted(glob.glob(os.path.join(CORPUS, "*.dcm")))
          if os.path.getsize(p) < 2_000_000]
for p in corpus:
    shutil.copyfile(p, os.path.join(corpus_dir, os.path.basename(p)))
for p in good:  # and a phantom series among them
    shutil.copyfile(p, os.path.join(inbox, "good-" + os.path.basename(p)))
for p in hostile:
    shutil.copyfile(p, os.path.join(inbox, "hostile-" + os.path.basename(p)))
for p in partial[1:]:
    shutil.copyfile(p, os.path.join(inbox, "partial-" + os.path.basename(p)))
# Three files of one name for the quarantine, one of them there already: none may replace another.
os.makedirs(os.path.join(base, "quarantine"), exist_ok=True)
with open(os.path.join(base, "quarantine", "same.txt"), "w") as f:
    f.write("a file that was there before\n")
for k, sub in enumerate(("x", "y")):
    os.makedirs(os.path.join(inbox, sub))
    with open(os.path.join(inbox, sub, "same.txt"), "w") as f:
        f.write("not DICOM either, %d\n" % k)


def drained():
    return not files_under(inbox)


wait_for(drained, 180, "every odd file handled")
check(d.alive(), "the service keeps running through odd input")
check(stored_series(db) == 3, "the phantom series among them are stored (%d)" % stored_series(db))
qd = os.path.join(base, "quarantine")
with open(os.path.join(qd, "same.txt")) as f:
    check(f.read() == "a file that was there before\n", "the file already there is untouched")
texts = set()
for n in ("same.txt.1", "same.txt.2"):
    if check(os.path.isfile(os.path.join(qd, n)) and
             os.path.isfile(os.path.join(qd, n + ".reason.txt")), "%s kept beside it" % n):
        with open(os.path.join(qd, n)) as f:
            texts.add(f.read())
check(texts == {"not DICOM either, 0\n", "not DICOM either, 1\n"}, "both arrivals kept")
arch = os.path.realpath(os.path.join(base, "archive"))
for (loc,) in query(db, "SELECT location FROM files WHERE state = 'stored'"):
    check(os.path.realpath(loc).startswith(arch + os.sep), "%s is inside archive/" % loc)
check(not os.path.exists(os.path.join(base, "x")) and not os.path.exists("/x/ALD"),
      "the hostile station name made no folder outside")
q = query(db, "SELECT state FROM series WHERE series_instance_uid = (SELECT s.series_instance_uid "
              "FROM series s JOIN files f ON f.series_id = s.id WHERE f.path LIKE '%partial-%' "
              "LIMIT 1)")
check(q == [("stored",)], "the series missing a slice is measured when quiet: %s" % q)
check("[quiet, 10 images" in d.text(), "and logged as measured quiet with its 10 images")

rows = {os.path.basename(p): (s, r, loc) for p, s, r, loc in
        query(db, "SELECT path, state, reason, location FROM files")}
for name, (state, words) in expect.items():
    got = rows.get(name)
    if not check(got is not None, "%s is recorded" % name):
        continue
    check(got[0] == state, "%s: %s (got %s: %s)" % (name, state, got[0], got[1]))
    check(got[1] != "", "%s: a reason is stored" % name)
    for w in words:
        check(w in got[1], "%s: reason '%s' mentions '%s'" % (name, got[1], w))
    check(os.path.isfile(got[2]), "%s moved to %s" % (name, got[2]))
    with open(got[2] + ".reason.txt") as f:
        text = f.read()
    check(got[1] in text, "%s: the reason is written beside it" % name)
    check(("/%s/" % state.replace("quarantined", "quarantine")) in got[2],
          "%s is in the %s folder" % (name, state))
for p in corpus:
    n = os.path.basename(p)
    got = rows.get(n)
    if check(got is not None, "corpus file %s recorded" % n):
        check(got[0] in ("quarantined", "ignored") and got[1] != "",
              "corpus file %s: %s with a reason (%s)" % (n, got[0], got[1]))
check(sum(1 for s, _, _ in rows.values() if s == "stored") ==
      len(good) + len(hostile) + len(partial) - 1, "only the phantom series' files are stored")

# ---- a writer holds the store for 10 s while a series arrives ----
con = sqlite3.connect(db, timeout=30, isolation_level=None)
con.execute("BEGIN EXCLUSIVE")
t0 = time.monotonic()
for p in later:
    shutil.copyfile(p, os.path.join(inbox, os.path.basename(p)))
while time.monotonic() - t0 < 10:
    time.sleep(0.5)
    check(d.alive(), "alive while the store is locked")
check(stored_series(db) == 3, "nothing could be stored while locked")
con.execute("ROLLBACK")
con.close()
wait_for(lambda: stored_series(db) == 4, 60, "the series stored after the lock")
wait_for(drained, 30, "its files archived")
stored = query(db, "SELECT count(*) FROM files WHERE state = 'stored'")[0][0]
check(stored == len(good) + len(hostile) + len(partial) - 1 + len(later),
      "no file lost under the lock (%d stored)" % stored)
q = query(db, "SELECT path FROM files f JOIN series s ON s.id = f.series_id "
              "WHERE s.scanner_id = (SELECT id FROM scanners WHERE station_name = 'ALDMR2') "
              "AND f.state <> 'stored'")
check(not q, "no file of the locked-out series was refused: %s" % q)
rc = d.stop()
check(rc == 0, "SIGTERM: status 0 (%s)" % rc)
cleanup(base)
finish()
