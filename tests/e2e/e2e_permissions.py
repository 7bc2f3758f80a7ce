#!/usr/bin/python3
"""e2e_permissions.py: the service as an unprivileged user meets files and folders it may not
touch. When the test runs as root (as CI does, where every permission check would pass
vacuously), the daemon runs as `nobody` through util-linux's setpriv; otherwise it runs as the
calling user, who is unprivileged already. Checked: an unreadable file is quarantined with the
reason (and moved, since its folder is writable); an archive folder the service may not write
leaves the files where they are (status 1, nothing lost), and a later run moves them once the
folder is fixed; a database the service may not write is refused with a message naming it, and no
file is touched."""
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

cleanup(base)
finish()
