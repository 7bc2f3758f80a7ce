#!/usr/bin/python3
"""e2e_paths.py: odd paths and names in the watch folder, and DICOM identities that would make
unsafe folder names.

- File and folder names with spaces, UTF-8, leading dashes (also a file named --help), and
  newlines: taken, measured, archived; their paths recorded exactly as they were.
- Symbolic links: to a file and to a folder inside the watch folder, to a file and to a folder
  outside it, a dangling one and two loops: none is followed; each is recorded as ignored with its
  target in the reason and moved to ignored/ as a link; the series outside is never read, the bytes
  inside are taken once, where they lie.
- SeriesInstanceUID and StationName values with '..', '/', control characters, 300 characters, or
  empty (written with pydicom): every archive and images folder name keeps to the POSIX portable
  file name characters (POSIX.1-2017, 3.282), does not begin with '.' or '-', is at most 255 bytes
  (the common NAME_MAX of Linux file systems), and every path stays inside its folder.
- `slicewarden analyze` on files named with leading dashes, spaces, UTF-8 and newlines (after
  `--`) gives the results it gives for the same files under plain names."""
import json
import os
import warnings
import re
import shutil
import subprocess
import sys

import pydicom
import pydicom.config

from swe2e import SW, check, cleanup, finish, query, run_once, sha256, simulate, tmpdir

pydicom.config.settings.writing_validation_mode = pydicom.config.IGNORE \
    if hasattr(pydicom.config, "settings") and hasattr(pydicom.config, "IGNORE") else None
os.environ.setdefault("LC_ALL", "C.UTF-8")
warnings.filterwarnings("ignore", module="pydicom")  # the invalid values are the point

base = tmpdir("sw-e2e-paths-")
src = os.path.join(base, "src")
inbox = os.path.join(base, "incoming")
outside = os.path.join(base, "outside")  # beside the watch folder: must never be read
db = os.path.join(base, "state", "qa.sqlite")
os.makedirs(inbox)
os.makedirs(os.path.dirname(db))

a_files, _ = simulate(os.path.join(src, "a"), seed=61, station="ALDMR1")
b_files, _ = simulate(os.path.join(src, "b"), series="t2", seed=62, station="ALDMR2")
c_files, _ = simulate(os.path.join(outside, "c"), seed=63, station="ALDMR3")
with open(os.path.join(outside, "secret.dcm"), "wb") as f:
    with open(c_files[0], "rb") as g:
        f.write(g.read())

# ---- series A under odd names ----
ODD = ["Study ünïcødé/IM 0001.dcm", "Study ünïcødé/-0002.dcm", "Study ünïcødé/--help",
       "Study ünïcødé/line\nbreak 0004.dcm", "Study ünïcødé/é\tü 0005.dcm", "-dash folder/0006.dcm",
       "new\nline folder/0007.dcm", "-dash folder/ 0008 .dcm", "日本語/画像 0009.dcm",
       "Study ünïcødé/-- 0010.dcm", "Study ünïcødé/'quote\" 0011.dcm"]
odd_paths = []
for p, rel in zip(a_files, ODD):
    dst = os.path.join(inbox, rel)
    os.makedirs(os.path.dirname(dst), exist_ok=True)
    shutil.copyfile(p, dst)
    odd_paths.append(dst)

# ---- series B plain, with links around it ----
bdir = os.path.join(inbox, "b")
os.makedirs(bdir)
for p in b_files:
    shutil.copyfile(p, os.path.join(bdir, os.path.basename(p)))
links = {
    "link-inside.dcm": os.path.join(bdir, os.path.basename(b_files[0])),
    "link-inside-dir": bdir,
    "link-outside.dcm": os.path.join(outside, "secret.dcm"),
    "link-outside-dir": os.path.join(outside, "c"),
    "link-relative-up.dcm": "../outside/secret.dcm",
    "dangling.dcm": os.path.join(base, "nothing-here"),
    "loop": "loop",
    "loop-a": "loop-b",
    "loop-b": "loop-a",
}
for name, target in links.items():
    os.symlink(target, os.path.join(inbox, name))

# ---- series with identities that would make unsafe folder names ----
def rewrite(files, outdir, uid, station, serial=None):
    os.makedirs(outdir)
    for p in files:
        ds = pydicom.dcmread(p)
        ds.SeriesInstanceUID = uid
        ds.StationName = station
        if serial is not None:
            ds.DeviceSerialNumber = serial
        ds.save_as(os.path.join(outdir, os.path.basename(p)))


UNSAFE = [("../../../../tmp/evil", "../../etc"),
          ("1.2.3/4/" + "9" * 40, "ALD/MR\x07\x1b[31m"),
          ("1.2\x01.3\x1f.4", ""),
          ("..", "A" * 300),
          ("1." + "7" * 200, ".hidden"),
          ("-1.2.3", "-rf")]
unsafe_srcs = []
for i, (uid, station) in enumerate(UNSAFE):
    files, _ = simulate(os.path.join(src, "u%d" % i), seed=70 + i, station="ALDMR1")
    d = os.path.join(inbox, "unsafe-%d" % i)
    rewrite(files, d, uid, station, serial="../serial" if station == "" else None)
    unsafe_srcs.append(d)

inputs = {}
for d, _, names in os.walk(inbox):
    for n in names:
        p = os.path.join(d, n)
        if not os.path.islink(p):
            inputs[sha256(p)] = p
outside_hashes = {sha256(os.path.join(d, n)) for d, _, ns in os.walk(outside) for n in ns}

# ---- analyze on odd names, before the service moves them ----
odd_copy = os.path.join(base, "odd-analyze")
os.makedirs(odd_copy)
copies = []
for p, rel in zip(a_files, ODD):
    dst = os.path.join(odd_copy, os.path.basename(rel))
    shutil.copyfile(p, dst)
    copies.append(os.path.basename(rel))
plain = subprocess.run([SW, "analyze", "--json"] + a_files, capture_output=True, text=True)
odd = subprocess.run([SW, "analyze", "--json", "--"] + copies, capture_output=True, text=True,
                     cwd=odd_copy)
check(plain.returncode in (0, 1) and odd.returncode == plain.returncode,
      "analyze on odd names exits %d, on plain names %d: %s" %
      (odd.returncode, plain.returncode, odd.stderr[-400:]))
try:
    same = json.loads(odd.stdout)["series"] == json.loads(plain.stdout)["series"]
except (ValueError, KeyError):
    same = False
check(same, "analyze gives the same results for the same files under odd names")
dash = subprocess.run([SW, "analyze", "--", "-0002.dcm"], capture_output=True, text=True,
                      cwd=odd_copy)
check("unknown option" not in dash.stderr and "usage" not in dash.stderr,
      "a file named -0002.dcm after -- is a file, not an option: %s" % dash.stderr[-300:])
check("-0002.dcm" in dash.stderr or dash.returncode in (0, 1),
      "and a message about it names it: %s" % dash.stderr[-300:])

# ---- the service ----
r = run_once(inbox, db, "--quiet", "0")
check(r.returncode == 0, "watch --once exit status %d: %s" % (r.returncode, r.stderr[-1500:]))
series = dict(query(db, "SELECT series_instance_uid, state FROM series"))
check(all(s == "stored" for s in series.values()), "every series stored: %s" % series)
n_ok = 2 + len([u for u, _ in UNSAFE if len(u) <= 64])
check(len(series) == n_ok, "%d series, %d expected: %s" % (len(series), n_ok, sorted(series)))
for uid, _ in UNSAFE:
    if len(uid) > 64:
        # DICOM PS3.5 6.2: a UI value is at most 64 characters: refused with the reason.
        rows = query(db, "SELECT state, reason FROM files WHERE path LIKE ?",
                     (os.path.join(inbox, "unsafe-%d" % [u for u, _ in UNSAFE].index(uid)) + "/%",))
        check(rows and all(s == "quarantined" and "longer than 64" in r for s, r in rows),
              "the series with a %d-character UID is quarantined with the reason: %s" %
              (len(uid), rows[:1]))
        continue
    # The reader makes control characters blanks (docs/dicom.md).
    shown = re.sub(r"[\x00-\x1f\x7f]", " ", uid)
    check(series.get(shown) == "stored", "the series with UID %r is stored" % uid)

# Odd names: their rows hold the exact paths.
paths = {p for (p,) in query(db, "SELECT path FROM files")}
for p in odd_paths:
    check(p in paths, "the file %r is recorded under its exact path" % p)

# Links: recorded, ignored with the target in the reason, moved as links; nothing outside read.
for name, target in links.items():
    p = os.path.join(inbox, name)
    row = query(db, "SELECT state, reason, location FROM files WHERE path = ?", (p,))
    if not check(len(row) == 1, "the link %s is recorded once: %s" % (name, row)):
        continue
    state, reason, loc = row[0]
    check(state == "ignored" and "symbolic link" in reason and target in reason,
          "the link %s is ignored with its target in the reason: %s %r" % (name, state, reason))
    check(loc and os.path.islink(loc) and os.readlink(loc) == target,
          "the link %s was moved to ignored/ as a link: %r" % (name, loc))
    check(not os.path.lexists(p), "the link %s left the watch folder" % name)
bad = query(db, "SELECT path FROM files WHERE path NOT LIKE ?", (inbox + "/%",))
check(not bad, "no file outside the watch folder is recorded: %s" % bad)
check(not query(db, "SELECT id FROM scanners WHERE station_name = 'ALDMR3'"),
      "the series outside the watch folder (ALDMR3) was never read")
check({sha256(os.path.join(d, n)) for d, _, ns in os.walk(outside) for n in ns} ==
      outside_hashes and os.path.exists(os.path.join(outside, "secret.dcm")),
      "the files outside are untouched")

# Bytes: every input file exactly once in archive/ or quarantine/ (reason files apart).
archive = os.path.join(base, "archive")
found = {}
for sub in ("archive", "quarantine", "ignored"):
    for d, _, names in os.walk(os.path.join(base, sub)):
        for n in names:
            p = os.path.join(d, n)
            if not n.endswith(".reason.txt") and not os.path.islink(p):
                found.setdefault(sha256(p), []).append(p)
for h, p in inputs.items():
    check(len(found.get(h, [])) == 1, "%r is kept once: %s" % (p, found.get(h)))
# The images folder of each series is the archive folder's name (one rule for both).
arch_dirs = {os.path.relpath(d, archive) for d, _, ns in os.walk(archive) if ns}
img_root = os.path.join(base, "images")
img_dirs = {os.path.relpath(d, img_root) for d, _, ns in os.walk(img_root) if ns}
check(img_dirs <= arch_dirs, "images/ folders that are no archive folder: %s" %
      sorted(img_dirs - arch_dirs))
left = [os.path.join(d, n) for d, _, ns in os.walk(inbox) for n in ns]
check(not left, "the watch folder holds no file: %s" % left)

# Folder names made from DICOM values (and file names made safe).
SAFE = re.compile(r"^[A-Za-z0-9._-]+$")
for root in (archive, os.path.join(base, "images"), os.path.join(base, "ignored"),
             os.path.join(base, "quarantine")):
    real_root = os.path.realpath(root)
    for d, dirs, names in os.walk(root):
        for n in dirs + names:
            p = os.path.join(d, n)
            check(SAFE.match(n) and n[0] not in ".-" and len(n.encode()) <= 255,
                  "a safe name: %r in %s" % (n, d))
            check(os.path.realpath(os.path.dirname(p)).startswith(real_root),
                  "%r stays inside %s" % (p, root))
for (loc,) in query(db, "SELECT location FROM files WHERE state = 'stored'"):
    check(os.path.realpath(loc).startswith(os.path.realpath(archive) + "/"),
          "a stored file's location is inside the archive: %r" % loc)

cleanup(base)
finish()
