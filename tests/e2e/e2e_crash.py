#!/usr/bin/python3
"""e2e_crash.py: a file or a series on which the program crashes (a fault in a decoder or in the
analysis on odd input) must not crash it again at every restart and so stop the QA of every
scanner. Fault injection: SLICEWARDEN_TEST_CRASH_FILE / _SERIES make the daemon raise SIGSEGV
while it reads that file or measures that series, as such a fault would. The crash is seen to kill
the daemon; after a restart (without the fault) the file is quarantined, or the series failed with
its files quarantined, each with the reason, and everything else is measured and stored."""
import os
import shutil
import signal
import time

from swe2e import (Daemon, check, cleanup, finish, query, run_once, simulate, stored_series,
                   tmpdir, wait_for)

base = tmpdir("sw-e2e-crash-")
inbox = os.path.join(base, "incoming")
db = os.path.join(base, "qa.sqlite")
os.makedirs(inbox)
a, _ = simulate(os.path.join(base, "src", "a"), seed=91, station="ALDMR1")
b, _ = simulate(os.path.join(base, "src", "b"), seed=92, station="ALDMR2")
c, _ = simulate(os.path.join(base, "src", "c"), seed=93, station="ALDMR3")
import pydicom  # noqa: E402  (Debian's python3-pydicom: the UID of the series to crash on)
uid_b = str(pydicom.dcmread(b[0], stop_before_pixels=True).SeriesInstanceUID)

# The hook raises SIGSEGV; under AddressSanitizer (abort_on_error=1) the sanitizer catches it and
# aborts, so the process ends with SIGABRT and the note names signal 6.
FATAL = (-signal.SIGSEGV, -signal.SIGABRT, 1)
SIGNAL_NOTES = ("signal 11", "signal 6")

# ---- a crash while reading one file ----
for f in a:
    shutil.copyfile(f, os.path.join(inbox, "a-" + os.path.basename(f)))
shutil.copyfile(a[0], os.path.join(inbox, "poison.dcm"))  # any file: the hook picks it by name
d = Daemon(inbox, db, env={"SLICEWARDEN_TEST_CRASH_FILE": "poison.dcm"})
rc = d.p.wait(60)
d.log.close()
check(rc in FATAL, "the daemon died of the fault (status %s)" % rc)
check(os.path.exists(db + ".crash"), "it left a note of what it was reading")
r = run_once(inbox, db)
check(r.returncode == 0, "the restart finishes: %s" % r.stderr[-300:])
row = query(db, "SELECT state, reason, location FROM files WHERE path LIKE '%poison.dcm'")
check(row and row[0][0] == "quarantined" and any(n in row[0][1] for n in SIGNAL_NOTES),
      "the file it crashed on is quarantined with the reason: %s" % row)
check(row and os.path.isfile(row[0][2]), "and moved to quarantine/")
check(not os.path.exists(db + ".crash"), "the note is used up")
check(stored_series(db) == 1, "the series beside it is stored")

# ---- a crash while measuring one series ----
for f in b:
    shutil.copyfile(f, os.path.join(inbox, "b-" + os.path.basename(f)))
d = Daemon(inbox, db, env={"SLICEWARDEN_TEST_CRASH_SERIES": uid_b})
rc = d.p.wait(60)
d.log.close()
check(rc in FATAL, "the daemon died of the fault (status %s)" % rc)
for f in c:
    shutil.copyfile(f, os.path.join(inbox, "c-" + os.path.basename(f)))
d = Daemon(inbox, db)
wait_for(lambda: stored_series(db) == 2, 60, "the next series stored after the restart")
time.sleep(0.5)
check(d.alive(), "the restarted service runs")
rc = d.stop()
check(rc == 0, "SIGTERM: status 0")
st = query(db, "SELECT state, reason FROM series WHERE series_instance_uid = ?", (uid_b,))
check(st and st[0][0] == "failed" and any(n in st[0][1] for n in SIGNAL_NOTES),
      "the series it crashed on failed with the reason: %s" % st)
q = query(db, "SELECT count(*) FROM files f JOIN series s ON s.id = f.series_id "
              "WHERE s.series_instance_uid = ? AND f.state = 'quarantined'", (uid_b,))[0][0]
check(q == len(b), "its %d files quarantined (%d)" % (len(b), q))
check(not query(db, "SELECT id FROM runs WHERE status = 'running'"), "no run left running")
cleanup(base)
finish()
