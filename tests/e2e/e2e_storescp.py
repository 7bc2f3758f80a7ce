#!/usr/bin/python3
"""e2e_storescp.py: the pairing docs/operations.md recommends, end to end: DCMTK's storescp (Debian's
dcmtk package) receives a simulated T1 series and a double-echo T2 series over the network from
DCMTK's storescu, writing into the watch folder with a subfolder per study (-su); a running
`slicewarden watch` takes each file as storescp closes it, and stores both series. Reports
"skipped" (exit 77) when the dcmtk tools are not installed."""
import os
import shutil
import socket
import subprocess
import sys
import time

from swe2e import (Daemon, check, cleanup, files_under, finish, query, simulate, sha256,
                   stored_series, tmpdir, tree_hashes, wait_for)

if not (shutil.which("storescp") and shutil.which("storescu")):
    print("storescp/storescu (Debian's dcmtk package) not installed")
    sys.exit(77)

base = tmpdir("sw-e2e-storescp-")
inbox = os.path.join(base, "incoming")
db = os.path.join(base, "qa.sqlite")
os.makedirs(inbox)
t1, _ = simulate(os.path.join(base, "src", "t1"), seed=71, station="ALDMR1")
t2, _ = simulate(os.path.join(base, "src", "t2"), series="t2", seed=72, station="ALDMR2")

with socket.socket() as s:  # a free port on the loopback interface
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
scp_log = open(os.path.join(base, "storescp.log"), "wb")
scp = subprocess.Popen(["storescp", "-aet", "SLICEWARDEN", "-od", inbox, "-su", "study",
                        "+uf", str(port)], stdout=scp_log, stderr=scp_log)
d = Daemon(inbox, db, "--quiet", "600")


def listening(port):
    with socket.socket() as c:
        c.settimeout(0.5)
        return c.connect_ex(("127.0.0.1", port)) == 0


# storescp takes a moment to listen (longer on a loaded machine): wait for it, bounded.
deadline = time.monotonic() + 30
while not listening(port) and time.monotonic() < deadline and scp.poll() is None:
    time.sleep(0.1)
check(listening(port), "storescp listens on port %d" % port)
try:
    for name, files in (("T1", t1), ("T2", t2)):
        r = subprocess.run(["storescu", "-aet", "ALDMR1", "-aec", "SLICEWARDEN", "127.0.0.1",
                            str(port)] + files, capture_output=True, text=True, timeout=120)
        check(r.returncode == 0, "storescu sent the %s series: %s" % (name, r.stderr[-300:]))
    wait_for(lambda: stored_series(db) == 2, 120, "both series stored")
    wait_for(lambda: not [p for p in files_under(inbox) if os.path.isfile(p)], 30,
             "storescp's files all taken")
finally:
    scp.terminate()
    scp.wait(10)
    scp_log.close()
rc = d.stop()
check(rc == 0, "SIGTERM: status 0")
runs = query(db, "SELECT count(*), sum(status = 'done') FROM runs")[0]
check(runs == (2, 2), "one run per series: %s" % (runs,))
states = dict(query(db, "SELECT state, count(*) FROM files GROUP BY state"))
check(states == {"stored": 33}, "33 files stored, none quarantined or ignored: %s" % states)
# storescp rewrites the meta header (its own implementation UID), so the bytes differ from the
# sender's files: compare the images by their SOP instance UIDs instead.
sops = {r[0] for r in query(db, "SELECT sop_instance_uid FROM files WHERE state = 'stored'")}
import pydicom  # noqa: E402  (Debian's python3-pydicom reads the sender's files)
sent = {str(pydicom.dcmread(p, stop_before_pixels=True).SOPInstanceUID) for p in t1 + t2}
check(sops == sent, "every sent SOP instance arrived and was stored")
check(len(sum(tree_hashes(os.path.join(base, "archive")).values(), [])) == 33,
      "33 files in the archive")
cleanup(base)
finish()
