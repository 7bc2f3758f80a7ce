#!/usr/bin/python3
"""e2e_alerts.py: a tolerance breach (a simulated slice of 6.5 mm where 5 mm were prescribed)
runs the alert command once, with the facts in SLICEWARDEN_* variables that agree with what the
store recorded; a slow alert command does not hold up ingestion. Then the service's signals: a bad
configuration on SIGHUP is refused (the line named) and the running one kept, a good one is taken,
SIGTERM ends with status 0. Then `slicewarden reanalyze` adds a run and changes nothing stored, and
`slicewarden check` validates the same configuration file. The limits come from the default
tolerance set (slice thickness 5.0 +/- 0.7 mm: the ACR large-phantom guidance as remembered, see
config/tolerances.conf)."""
import json
import math
import os
import shutil
import subprocess
import sys
import time

from swe2e import (SW, Daemon, check, cleanup, finish, query, simulate, stored_series, tmpdir,
                   wait_for, write_config)

base = tmpdir("sw-e2e-alerts-")
inbox = os.path.join(base, "incoming")
db = os.path.join(base, "qa.sqlite")
os.makedirs(inbox)
facts = os.path.join(base, "alerts.jsonl")
hook = os.path.join(base, "hook.py")
with open(hook, "w") as f:
    f.write("import json, os, sys, time\n"
            "time.sleep(float(sys.argv[2]))\n"
            "env = {k: v for k, v in os.environ.items() if k.startswith('SLICEWARDEN_')}\n"
            "with open(sys.argv[1], 'a') as out:\n"
            "    out.write(json.dumps(env) + '\\n')\n")


def config(path, delay, extra_line=None):
    write_config(path,
                 watch={"folder": inbox, "database": db, "quiet_seconds": 600},
                 alert={"command": "/usr/bin/python3 '%s' '%s' %s" % (hook, facts, delay),
                        "timeout_seconds": 20, "retry_seconds": 1},
                 aliases={"ALDMR2": "Alderbrook South 3T"})
    if extra_line:
        with open(path, "a") as f:
            f.write(extra_line + "\n")
    return path


conf = config(os.path.join(base, "slicewarden.conf"), 2.0)
r = subprocess.run([SW, "check", "-c", conf], capture_output=True, text=True)
check(r.returncode == 0 and "timeout_seconds = 20" in r.stdout and "images = " in r.stdout,
      "check accepts the configuration and prints the alert time limit and the images folder")

# 6.5 mm slices where 5 mm were prescribed (SliceThickness says 5).
thick, _ = simulate(os.path.join(base, "src", "thick"), "--thickness", "6.5", "--prescribed", "5",
                    seed=41, station="ALDMR2")
normal, _ = simulate(os.path.join(base, "src", "normal"), seed=42, station="ALDMR1")

d = Daemon(inbox, db, "-c", conf)
time.sleep(0.4)
for p in thick:
    shutil.copyfile(p, os.path.join(inbox, "a-" + os.path.basename(p)))
wait_for(lambda: stored_series(db) == 1, 60, "the thick series stored")
t_stored = time.monotonic()
for p in normal:
    shutil.copyfile(p, os.path.join(inbox, "b-" + os.path.basename(p)))
wait_for(lambda: stored_series(db) == 2, 60, "the second series stored")
t_second = time.monotonic()
check(not os.path.exists(facts) or t_second - t_stored < 2.0,
      "ingestion went on while the alert command ran (second series after %.1f s)" %
      (t_second - t_stored))
wait_for(lambda: os.path.exists(facts), 30, "the alert command's output")
time.sleep(1.5)  # a second (wrong) run would have written by now: retry_seconds is 1

with open(facts) as f:
    lines = [json.loads(x) for x in f if x.strip()]
check(len(lines) == 1, "the command ran once (%d times)" % len(lines))
uid = query(db, "SELECT s.series_instance_uid FROM series s JOIN scanners c ON c.id = s.scanner_id "
                "WHERE c.station_name = 'ALDMR2'")[0][0]
row = query(db, """SELECT m.value, m.limit_hi, m.verdict FROM measurements m JOIN runs r
                   ON r.id = m.run_id JOIN series s ON s.id = r.series_id
                   WHERE s.series_instance_uid = ? AND m.metric = 'slice_thickness'""", (uid,))[0]
check(row[2] == "fail" and row[0] > 5.7, "stored: thickness %.3f mm, %s" % (row[0], row[2]))
alerts = query(db, "SELECT kind, metric, value, limit_value, verdict, png_path, command_status, "
                   "attempts FROM alerts")
check(len(alerts) == 1, "one alert recorded: %s" % alerts)
if lines and alerts:
    e = lines[0]
    a = alerts[0]
    check(e.get("SLICEWARDEN_KIND") == "breach", "kind breach: %s" % e.get("SLICEWARDEN_KIND"))
    check(e.get("SLICEWARDEN_METRIC") == "slice_thickness", "metric")
    check(math.isclose(float(e.get("SLICEWARDEN_VALUE", "nan")), row[0], rel_tol=1e-5),
          "value %s = stored %.6g" % (e.get("SLICEWARDEN_VALUE"), row[0]))
    check(math.isclose(float(e.get("SLICEWARDEN_LIMIT", "nan")), 5.7, rel_tol=1e-9),
          "limit 5.7 mm (5.0 + 0.7)")
    check(e.get("SLICEWARDEN_VERDICT") == "fail", "verdict fail")
    check(e.get("SLICEWARDEN_SCANNER") == "Alderbrook South 3T", "the site's alias")
    check(e.get("SLICEWARDEN_STATION") == "ALDMR2", "station")
    check(e.get("SLICEWARDEN_SERIES") == uid, "series UID")
    png = e.get("SLICEWARDEN_PNG", "")
    check(png == a[5] and png.endswith("_s01.png"), "the ramp slice's PNG: %s" % png)
    with open(png, "rb") as f:
        check(f.read(8) == b"\x89PNG\r\n\x1a\n", "the PNG is a PNG (signature, RFC 2083)")
    check(a[6] == "sent" and a[7] == 1, "recorded as sent after one attempt: %s" % (a,))

# ---- SIGHUP: a bad configuration is refused, a good one taken ----
config(conf, 0, "[alert]\ntimeout_seconds = soon")  # the last line is bad
with open(conf) as f:
    n_lines = sum(1 for _ in f)
d.p.send_signal(1)
wait_for(lambda: "reload refused" in d.text(), 10, "the bad configuration refused")
check(("%s:%d" % (conf, n_lines)) in d.text() or ":%d:" % n_lines in d.text(),
      "the refusal names the bad line %d" % n_lines)
check(d.alive(), "still running on the old configuration")
config(conf, 0)
d.p.send_signal(1)
wait_for(lambda: "configuration reloaded" in d.text(), 10, "the good configuration taken")
rc = d.stop()
check(rc == 0, "SIGTERM: exit status 0 (%s)" % rc)

# ---- reanalyze: a new run; the stored one is unchanged ----
before = query(db, "SELECT id, run_id, metric, slice, echo, value, verdict FROM measurements "
                   "ORDER BY id")
r = subprocess.run([SW, "reanalyze", "-c", conf, "--series", uid], capture_output=True, text=True)
check(r.returncode == 0, "reanalyze status 0: %s %s" % (r.stdout, r.stderr))
after = query(db, "SELECT id, run_id, metric, slice, echo, value, verdict FROM measurements "
                  "ORDER BY id")
check(after[:len(before)] == before, "every stored row is unchanged")
runs = query(db, "SELECT r.id, r.status FROM runs r JOIN series s ON s.id = r.series_id "
                 "WHERE s.series_instance_uid = ? ORDER BY r.id", (uid,))
check(len(runs) == 2 and runs[1][1] == "done", "a second run was added: %s" % runs)
new = [x for x in after if x[1] == runs[-1][0]]
old = [x for x in before if x[1] == runs[0][0]]
check([x[2:] for x in new] == [x[2:] for x in old],
      "the same files give the same rows (same settings, same code)")
check(len(query(db, "SELECT id FROM alerts")) == 1, "a re-analysis pages nobody by default")
r = subprocess.run([SW, "reanalyze", "-c", conf, "--since", "2000-01-01"], capture_output=True,
                   text=True)
check(r.returncode == 0 and "2 series" in r.stdout, "--since finds both series: %s" % r.stdout)
check(query(db, "SELECT count(*) FROM runs")[0][0] == 5, "one more run per series")

cleanup(base)
finish()
