#!/usr/bin/python3
"""e2e_storescp.py: the pairing docs/operations.md recommends, end to end: DCMTK's storescp (Debian's
dcmtk package) receives a simulated T1 series and a double-echo T2 series over the network from
DCMTK's storescu, one image per association, the two series interleaved, with pauses, writing into
the watch folder with a subfolder per study (-su); a running `slicewarden watch` takes each file as
storescp closes it, measures each series once as soon as it is complete, and stores the same
results as `slicewarden analyze` gives on the files sent. Reports
"skipped" (exit 77) when the dcmtk tools are not installed."""
import json
import os
import shutil
import socket
import subprocess
import sys
import time

from swe2e import (SW, Daemon, check, cleanup, files_under, finish, query, simulate, sha256,
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
sent_at = {}
try:
    # One image per association, the two series interleaved, with pauses: the way a scanner that
    # sends as it reconstructs, or two consoles sending at once, deliver.
    order = []
    for k in range(max(len(t1), len(t2))):
        if k < len(t1):
            order.append(("T1", t1[k]))
        if k < len(t2):
            order.append(("T2", t2[k]))
    sends_ok = 0
    t1_done_at = None
    for name, f in order:
        r = subprocess.run(["storescu", "-aet", "ALDMR1", "-aec", "SLICEWARDEN", "127.0.0.1",
                            str(port), f], capture_output=True, text=True, timeout=60)
        sends_ok += r.returncode == 0
        if r.returncode != 0:
            print("storescu:", r.stderr[-300:], file=sys.stderr)
        if name == "T1" and f == t1[-1]:
            t1_done_at = time.time()
        time.sleep(0.15)
    last_sent_at = time.time()
    check(sends_ok == len(order), "storescu sent every image, one association each (%d of %d)"
          % (sends_ok, len(order)))
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
# Each series measured once, as soon as it was complete: the T1 series (its last image sent
# while eleven T2 images were still to come) stored before the last T2 image was sent, and by its
# completeness, not the quiet period (600 s here).
import datetime  # noqa: E402


def epoch(iso):
    return datetime.datetime.fromisoformat(iso.replace("Z", "+00:00")).timestamp()


t1_uid = str(pydicom.dcmread(t1[0], stop_before_pixels=True).SeriesInstanceUID)
fin = query(db, "SELECT r.finished_at FROM runs r JOIN series s ON s.id = r.series_id "
                "WHERE s.series_instance_uid = ?", (t1_uid,))
check(len(fin) == 1, "the T1 series has exactly one run: %s" % fin)
if fin and t1_done_at:
    check(epoch(fin[0][0]) < last_sent_at,
          "the T1 series was stored before the T2 series finished arriving (%.1f s after its "
          "last image, %.1f s before the T2's last)"
          % (epoch(fin[0][0]) - t1_done_at, last_sent_at - epoch(fin[0][0])))
# The same results as `analyze` on the files as they were sent.
res = subprocess.run([SW, "analyze", "--json", os.path.join(base, "src", "t1"),
                      os.path.join(base, "src", "t2")], capture_output=True, text=True)
ref = {}
for e in json.loads(res.stdout)["series"]:
    key = (e["series_instance_uid"], e["echo_number"])
    ref[key + ("slice_thickness", e["slice_thickness"]["slice"])] = \
        e["slice_thickness"]["corrected_mm"]
    for p in e["slice_position"]:
        ref[key + ("bar_length_difference", p["slice"])] = p["bar_difference_mm"]
got = {}
for uid, echo, metric, sl, value in query(
        db, "SELECT s.series_instance_uid, m.echo, m.metric, m.slice, m.value FROM measurements m "
            "JOIN runs r ON r.id = m.run_id JOIN series s ON s.id = r.series_id WHERE m.metric IN "
            "('slice_thickness', 'bar_length_difference')"):
    got[(uid, echo, metric, sl)] = value
check(len(ref) == 9 and set(got) == set(ref),
      "the stored results cover what analyze reports (%d keys: T1 and two T2 echoes, each a "
      "thickness and two bar differences)" % len(ref))
same = [k for k in ref if k in got and ref[k] is not None and got[k] is not None and
        abs(ref[k] - got[k]) < 1e-4]
check(len(same) == len(ref), "every stored value equals analyze's on the sent files "
      "(%d of %d)" % (len(same), len(ref)))
cleanup(base)
finish()
