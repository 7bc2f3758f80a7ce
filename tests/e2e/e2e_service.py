#!/usr/bin/python3
"""e2e_service.py: the service's side toward systemd and people, without needing a running
systemd. (1) Debian's `systemd-analyze verify` accepts config/slicewarden.service (with the program's
path put in). (2) The sd_notify protocol (systemd's sd_notify(3) and sd_watchdog_enabled(3)):
with NOTIFY_SOCKET and WATCHDOG_USEC set, as systemd sets them for Type=notify, the daemon sends
READY=1, WATCHDOG=1 at least every half period, RELOADING=1 then READY=1 around a SIGHUP, and
STOPPING=1 on SIGTERM, after which it exits 0. (3) `watch --once` draws a progress bar only when
stderr is a terminal (a pseudo-terminal here), and prints its one-line summary either way."""
import os
import pty
import re
import shutil
import signal
import socket
import subprocess
import sys
import time

from swe2e import SW, Daemon, check, cleanup, finish, simulate, tmpdir

base = tmpdir("sw-e2e-service-")
src = os.path.dirname(os.path.abspath(__file__))
unit = os.path.join(src, "..", "..", "config", "slicewarden.service")

# ---- (1) the unit file ----
if shutil.which("systemd-analyze"):
    with open(unit) as f:
        text = f.read()
    check("Type=notify" in text and "WatchdogSec=" in text and "User=" in text and
          "ProtectSystem=strict" in text, "notify, watchdog, own user, read-only system")
    local = os.path.join(base, "slicewarden.service")
    with open(local, "w") as f:
        f.write(text.replace("/usr/bin/slicewarden", os.path.abspath(SW)))
    r = subprocess.run(["systemd-analyze", "verify", local], capture_output=True, text=True)
    out = (r.stdout + r.stderr).strip()
    check(r.returncode == 0 and not out, "systemd-analyze verify is silent: %s" % out)
else:
    print("systemd-analyze not installed: the unit file is not verified here")

# ---- (2) the notify protocol ----
have_systemd = os.environ.get("SW_HAVE_SYSTEMD") == "1"
inbox = os.path.join(base, "incoming")
os.makedirs(inbox)
db = os.path.join(base, "qa.sqlite")
if have_systemd:
    sock_path = os.path.join(base, "notify.sock")
    s = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    s.bind(sock_path)
    s.settimeout(0.2)
    msgs = []

    def collect(seconds):
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            try:
                data = s.recv(4096).decode()
                msgs.append((time.monotonic(), data))
            except socket.timeout:
                pass

    d = Daemon(inbox, db, env={"NOTIFY_SOCKET": sock_path, "WATCHDOG_USEC": "1000000"})
    collect(3.2)
    ready = [t for t, m in msgs if "READY=1" in m.split("\n")]
    check(len(ready) == 1, "READY=1 once at start (%d)" % len(ready))
    dogs = [t for t, m in msgs if "WATCHDOG=1" in m.split("\n")]
    check(len(dogs) >= 5, "WATCHDOG=1 every half period (%d in 3 s)" % len(dogs))
    gaps = [b - a for a, b in zip(dogs, dogs[1:])]
    check(gaps and max(gaps) < 1.0, "never more than the period between pings: %s" %
          ["%.2f" % g for g in gaps])
    check(any(m.startswith("STATUS=") for _, m in msgs), "STATUS= lines for systemctl status")
    n = len(msgs)
    d.p.send_signal(signal.SIGHUP)
    collect(1.0)
    after = [m for _, m in msgs[n:]]
    at = [i for i, m in enumerate(after) if "RELOADING=1" in m]
    check(at and any("READY=1" in m for m in after[at[0]:]),
          "RELOADING=1 then READY=1 on SIGHUP: %s" % after)
    n = len(msgs)
    d.p.send_signal(signal.SIGTERM)
    collect(1.0)
    check(any("STOPPING=1" in m for _, m in msgs[n:]), "STOPPING=1 on SIGTERM")
    rc = d.stop()
    check(rc == 0, "exit 0 after SIGTERM (%s)" % rc)
    s.close()
else:
    print("built without libsystemd: the notify protocol is not tested here")

# ---- (3) the progress bar, only on a terminal ----
files, _ = simulate(os.path.join(base, "src", "s"), seed=61)
for p in files:
    shutil.copyfile(p, os.path.join(inbox, os.path.basename(p)))
db2 = os.path.join(base, "once.sqlite")
pid, fd = pty.fork()
if pid == 0:
    os.execv(SW, [SW, "watch", "--once", "--folder", inbox, "--db", db2])
out = b""
while True:
    try:
        chunk = os.read(fd, 4096)
    except OSError:
        break
    if not chunk:
        break
    out += chunk
_, status = os.waitpid(pid, 0)
text = out.decode("utf-8", "replace")
check(os.waitstatus_to_exitcode(status) == 0, "--once on a terminal: status 0")
check(re.search(r"\[[#.]{24}\] \d+/\d+ files, \d+ series, [0-9.]+ files/s", text) is not None,
      "a progress bar with files, series and rate: %r" % text[-300:])
check("slicewarden watch: 11 files (11 stored" in text, "and the one-line summary")
for p in files:
    shutil.copyfile(p, os.path.join(inbox, "again-" + os.path.basename(p)))
r = subprocess.run([SW, "watch", "--once", "--folder", inbox, "--db", db2], capture_output=True,
                   text=True)
check("\r" not in r.stderr and "files/s" not in r.stderr, "no bar when stderr is not a terminal")
check(r.stdout.startswith("slicewarden watch: 11 files (0 stored, 0 quarantined, 11 ignored"),
      "the summary of a run of duplicates: %s" % r.stdout)

# ---- (4) folders that would feed the service its own files are refused ----
r = subprocess.run([SW, "watch", "--once", "--folder", inbox, "--db",
                    os.path.join(inbox, "qa.sqlite")], capture_output=True, text=True)
check(r.returncode == 2 and "inside the watch folder" in r.stderr,
      "a database inside the watch folder is refused: %s" % r.stderr)
inside = os.path.join(base, "inside.conf")
with open(inside, "w") as f:
    f.write("[watch]\nfolder = %s\narchive = %s/archive\n" % (inbox, inbox))
r = subprocess.run([SW, "watch", "--once", "-c", inside, "--db", db2], capture_output=True,
                   text=True)
check(r.returncode == 2 and "archive folder" in r.stderr,
      "an archive inside the watch folder is refused: %s" % r.stderr)

cleanup(base)
finish()
