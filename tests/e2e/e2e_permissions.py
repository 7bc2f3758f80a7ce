#!/usr/bin/python3
"""e2e_permissions.py: the service as an unprivileged user meets files and folders it may not
touch. When the test runs as root (as CI does, where every permission check would pass
vacuously), the daemon runs as `nobody` through util-linux's setpriv; otherwise it runs as the
calling user, who is unprivileged already. Checked: an unreadable file is quarantined with the
reason (and moved, since its folder is writable); an archive folder the service may not write
leaves the files where they are (status 1, nothing lost), and a later run moves them once the
folder is fixed; a database the service may not write is refused with a message naming it, and no
file is touched. Also: a read-only watch folder (files read and measured, none moved or lost, status
1 with the path; moved once writable), a quarantine folder the service may not write (the file
stays, its state and reason recorded, the message names the folder), and a database whose folder
the service may not write (no lock, no -wal: refused with the path, nothing touched)."""
import os
import pwd
import shutil
import subprocess
import sys

from swe2e import (SW, check, cleanup, files_under, finish, query, run_once, simulate, sha256,
                   tmpdir)

root = os.geteuid() == 0
if root:
    who = pwd.getpwnam("nobody")
    uid, gid = who.pw_uid, who.pw_gid
    prefix = ["setpriv", "--reuid=%d" % uid, "--regid=%d" % gid, "--clear-groups", "--"]
    if subprocess.run(prefix + [SW, "--version"], capture_output=True).returncode != 0:
        print("the program cannot run as nobody here (its path is not readable to others)")
        sys.exit(77)
else:
    uid, gid = os.getuid(), os.getgid()
    prefix = []
print("daemon runs as uid %d%s" % (uid, " (nobody, via setpriv)" if root else ""))

base = tmpdir("sw-e2e-perm-")
os.chmod(base, 0o755)


def owned(path, mode=0o755):
    os.makedirs(path, exist_ok=True)
    os.chown(path, uid, gid)
    os.chmod(path, mode)
    return path


inbox = owned(os.path.join(base, "incoming"))
state = owned(os.path.join(base, "state"))  # the database's folder
for sub in ("quarantine", "ignored", "images"):
    owned(os.path.join(base, sub))
archive = os.path.join(base, "archive")
os.makedirs(archive)
os.chmod(archive, 0o755)  # owned by the test's user (root in CI): not writable by the service
db = os.path.join(state, "qa.sqlite")

files, _ = simulate(os.path.join(base, "src", "s"), seed=51, station="ALDMR1")
for p in files:
    dst = os.path.join(inbox, os.path.basename(p))
    shutil.copyfile(p, dst)
    os.chown(dst, uid, gid)
secret = os.path.join(inbox, "secret.dcm")
shutil.copyfile(files[0], secret)
os.chmod(secret, 0)  # nobody may read it (the test's user owns it; root in CI)
if not root:
    try:
        open(secret, "rb").close()
        print("this user can read a mode-000 file: no unprivileged user to test with")
        sys.exit(77)
    except PermissionError:
        pass
hashes = {sha256(p) for p in files}

# ---- 1. the archive is not writable: everything is kept in place, status 1 ----
r = run_once(inbox, db, prefix=prefix)
check(r.returncode == 1, "status 1 when files cannot be moved (%d): %s" % (r.returncode, r.stdout))
check("cannot create" in r.stderr or "Permission denied" in r.stderr,
      "the failure is logged: %s" % r.stderr[-300:])
left = {os.path.basename(p) for p in files_under(inbox)}
check(left >= {os.path.basename(p) for p in files}, "every series file is still in the folder")
check(query(db, "SELECT count(*) FROM series WHERE state = 'stored'")[0][0] == 1,
      "the results are stored even so")
row = query(db, "SELECT state, reason, location FROM files WHERE path = ?", (secret,))
check(row and row[0][0] == "quarantined" and "Permission denied" in row[0][1],
      "the unreadable file is quarantined with the reason: %s" % row)
check(row and os.path.exists(row[0][2]) and not os.path.exists(secret),
      "and moved to quarantine/ (its folder is writable)")
check(row and os.path.isfile(row[0][2] + ".reason.txt"), "its reason beside it")

# ---- 2. the archive fixed: a second run moves the files, nothing lost ----
os.chown(archive, uid, gid)
r = run_once(inbox, db, prefix=prefix)
check(r.returncode == 0, "status 0 once the archive is writable (%d): %s" %
      (r.returncode, r.stderr[-300:]))
check(not files_under(inbox), "the folder is empty")
got = {sha256(p) for p in files_under(archive)}
check(got == hashes, "every file arrived in the archive, none lost or changed")
check(query(db, "SELECT count(*) FROM runs")[0][0] == 1, "the series was not measured again")

# ---- 3. a database the service may not write ----
ro_state = os.path.join(base, "ro-state")
os.makedirs(ro_state)
os.chmod(ro_state, 0o755)
ro_db = os.path.join(ro_state, "qa.sqlite")
shutil.copyfile(db, ro_db)
os.chmod(ro_db, 0o644)
inbox2 = owned(os.path.join(base, "incoming2"))
for p in files[:2]:
    dst = os.path.join(inbox2, os.path.basename(p))
    shutil.copyfile(p, dst)
    os.chown(dst, uid, gid)
before = sorted(files_under(inbox2))
r = run_once(inbox2, ro_db, prefix=prefix)
check(r.returncode != 0, "a read-only database is refused (status %d)" % r.returncode)
check(ro_db in r.stderr or "qa.sqlite" in r.stderr, "the message names it: %s" % r.stderr[-200:])
check(sorted(files_under(inbox2)) == before, "no file was touched")


# ---- 4. a read-only watch folder: read and measured, nothing moved, nothing lost ----
inbox4 = os.path.join(base, "incoming4")
os.makedirs(inbox4)
files4, _ = simulate(os.path.join(base, "src4", "s"), seed=54, station="ALDMR2")
for p in files4:
    shutil.copyfile(p, os.path.join(inbox4, os.path.basename(p)))
os.chmod(inbox4, 0o755)  # the test's user owns it (root in CI): the service may read, not write
state4 = owned(os.path.join(base, "state4"))
outs4 = {k: owned(os.path.join(base, "%s4" % k)) for k in ("archive", "quarantine", "ignored",
                                                          "images")}
cfg4 = os.path.join(state4, "sw.conf")
with open(cfg4, "w") as f:
    f.write("[watch]\n" + "".join("%s = %s\n" % kv for kv in outs4.items()))
os.chmod(cfg4, 0o644)
db4 = os.path.join(state4, "qa.sqlite")
before4 = {sha256(p) for p in files_under(inbox4)}
r = run_once(inbox4, db4, "-c", cfg4, prefix=prefix)
check(r.returncode == 1, "a read-only watch folder: status 1 (%d): %s" % (r.returncode,
                                                                        r.stderr[-300:]))
check(inbox4 in r.stderr and "Permission denied" in r.stderr,
      "the failure names the watch folder's file and the reason: %s" % r.stderr[-300:])
check({sha256(p) for p in files_under(inbox4)} == before4, "every file is still there, unchanged")
check(query(db4, "SELECT count(*) FROM series WHERE state = 'stored'")[0][0] == 1,
      "the series is measured and stored even so")
os.chown(inbox4, uid, gid)
r = run_once(inbox4, db4, "-c", cfg4, prefix=prefix)
check(r.returncode == 0 and not files_under(inbox4),
      "once writable, a second run moves the files (%d): %s" % (r.returncode, r.stderr[-300:]))
check({sha256(p) for p in files_under(outs4["archive"])} == before4,
      "every file arrived in the archive once")
check(query(db4, "SELECT count(*) FROM runs")[0][0] == 1, "and the series was measured once")

# ---- 5. a quarantine folder the service may not write ----
inbox5 = owned(os.path.join(base, "incoming5"))
junk = os.path.join(inbox5, "notes.txt")
with open(junk, "w") as f:
    f.write("not DICOM\n")
os.chown(junk, uid, gid)
state5 = owned(os.path.join(base, "state5"))
q5 = os.path.join(base, "quarantine5")
os.makedirs(q5)
os.chmod(q5, 0o755)  # not the service's
cfg5 = os.path.join(state5, "sw.conf")
with open(cfg5, "w") as f:
    f.write("[watch]\nquarantine = %s\narchive = %s\nignored = %s\nimages = %s\n" %
            (q5, owned(os.path.join(base, "archive5")), owned(os.path.join(base, "ignored5")),
             owned(os.path.join(base, "images5"))))
os.chmod(cfg5, 0o644)
db5 = os.path.join(state5, "qa.sqlite")
r = run_once(inbox5, db5, "-c", cfg5, prefix=prefix)
check(r.returncode == 1, "an unwritable quarantine: status 1 (%d)" % r.returncode)
check(q5 in r.stderr and "Permission denied" in r.stderr,
      "the message names the quarantine folder and the reason: %s" % r.stderr[-300:])
check(os.path.exists(junk), "the file stays in the watch folder")
row = query(db5, "SELECT state, reason FROM files WHERE path = ?", (junk,))
check(row and row[0][0] == "quarantined" and "not a DICOM file" in row[0][1],
      "its state and reason are recorded: %s" % row)

# ---- 6. a database in a folder the service may not write ----
ro6 = os.path.join(base, "ro-state6")
os.makedirs(ro6)
db6 = os.path.join(ro6, "qa.sqlite")
shutil.copyfile(db4, db6)
os.chown(db6, uid, gid)  # the file is the service's; its folder is not (no -wal, no .lock)
os.chmod(ro6, 0o755)
inbox6 = owned(os.path.join(base, "incoming6"))
for p in files[:3]:
    dst = os.path.join(inbox6, os.path.basename(p))
    shutil.copyfile(p, dst)
    os.chown(dst, uid, gid)
before6 = sorted(files_under(inbox6))
r = run_once(inbox6, db6, prefix=prefix)
check(r.returncode in (1, 2), "a database in a read-only folder is refused (%d)" % r.returncode)
check(ro6 in r.stderr and ("Permission denied" in r.stderr or "unable to open" in r.stderr
                           or "readonly" in r.stderr),
      "the message names the database's path and the reason: %s" % r.stderr[-300:])
check(sorted(files_under(inbox6)) == before6, "no file was touched")
lock6 = db6 + ".lock"
with open(lock6, "w"):
    pass
os.chown(lock6, uid, gid)  # the lock can be taken; SQLite still cannot make its -wal and -shm
r = run_once(inbox6, db6, prefix=prefix)
check(r.returncode in (1, 2) and ro6 in r.stderr,
      "with its lock file there, still refused with the path (%d): %s" %
      (r.returncode, r.stderr[-300:]))
check(sorted(files_under(inbox6)) == before6, "and no file was touched")

cleanup(base)
finish()
