#!/usr/bin/python3
"""e2e_renames.py: files renamed or moved within the watch folder while their series is being
collected, as a receiver does that renames its study folder when the study ends (DCMTK's storescp
--rename-on-eostudy) or a person tidying up. The service follows each file: the series is measured
once with all its images, every file is archived exactly once, nothing is filed as a duplicate or
left behind."""
import os
import shutil
import time

from swe2e import (Daemon, check, cleanup, files_under, finish, query, simulate, sha256,
                   stored_series, tmpdir, tree_hashes, wait_for)

base = tmpdir("sw-e2e-renames-")
inbox = os.path.join(base, "incoming")
db = os.path.join(base, "qa.sqlite")
os.makedirs(inbox)
files, _ = simulate(os.path.join(base, "src", "s"), seed=81, station="ALDMR1")
t2, _ = simulate(os.path.join(base, "src", "t2"), series="t2", seed=82, station="ALDMR2")

d = Daemon(inbox, db, "--quiet", "600")
time.sleep(0.4)
# 1. A study folder renamed half-way through its series (as storescp -rns does at the end).
study = os.path.join(inbox, "study_20261201")
os.makedirs(study)
for f in files[:6]:
    shutil.copyfile(f, os.path.join(study, os.path.basename(f)))
wait_for(lambda: query(db, "SELECT count(*) FROM files WHERE state = 'parsed'")[0][0] == 6, 30,
         "six files parsed")
renamed = os.path.join(inbox, "ALDMR1_study_done")
os.rename(study, renamed)
# Touched as they were renamed, the six are still settling when the scan of the renamed folder
# finds them, while the five that follow arrive by events: the series is complete before its
# first six are followed, and measuring must wait for them rather than call them vanished.
for f in files[:6]:
    os.utime(os.path.join(renamed, os.path.basename(f)))
for f in files[6:]:
    shutil.copyfile(f, os.path.join(renamed, os.path.basename(f)))
wait_for(lambda: stored_series(db) == 1, 60, "the series stored after its folder was renamed")

# 2. Single files renamed and moved between subfolders while a T2 series collects.
a = os.path.join(inbox, "a")
b = os.path.join(inbox, "b")
os.makedirs(a)
os.makedirs(b)
for f in t2[:10]:
    shutil.copyfile(f, os.path.join(a, os.path.basename(f)))
wait_for(lambda: query(db, "SELECT count(*) FROM files WHERE state = 'parsed'")[0][0] == 10, 30,
         "ten T2 files parsed")
for k, f in enumerate(t2[:4]):
    src = os.path.join(a, os.path.basename(f))
    os.rename(src, os.path.join(b if k % 2 else a, "renamed-%d" % k))
time.sleep(0.5)
for f in t2[10:]:
    shutil.copyfile(f, os.path.join(b, os.path.basename(f)))
wait_for(lambda: stored_series(db) == 2, 60, "the T2 series stored")
wait_for(lambda: not [p for p in files_under(inbox) if os.path.isfile(p)], 30, "folder emptied")
rc = d.stop()
check(rc == 0, "SIGTERM: status 0")

arch = tree_hashes(os.path.join(base, "archive"))
for f in files + t2:
    check(len(arch.get(sha256(f), [])) == 1, "%s archived exactly once" % os.path.basename(f))
check(not files_under(os.path.join(base, "ignored")), "nothing filed as a duplicate")
check(not os.path.exists(os.path.join(base, "quarantine")) or
      not files_under(os.path.join(base, "quarantine")), "nothing quarantined")
runs = query(db, "SELECT r.status, count(m.id) FROM runs r JOIN measurements m ON m.run_id = r.id "
                 "GROUP BY r.id")
check(len(runs) == 2 and all(s == "done" for s, _ in runs), "one run per series: %s" % runs)
imgs = query(db, "SELECT s.series_instance_uid, count(*) FROM files f JOIN series s "
                 "ON s.id = f.series_id WHERE f.state = 'stored' GROUP BY s.id")
check(sorted(n for _, n in imgs) == [11, 22], "all images measured: %s" % imgs)
follow = query(db, "SELECT count(*) FROM files WHERE reason LIKE 'the same file as file %'")[0][0]
check(follow == 6 + 4, "each sighting after a move recorded as the same file (%d)" % follow)
check(not query(db, "SELECT id FROM files WHERE state = 'quarantined'"), "none vanished")
cleanup(base)
finish()
