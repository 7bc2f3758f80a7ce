#!/usr/bin/python3
"""e2e_drift.py: a slow fault that never breaches. One scanner's weekly T1 series: eight at the
prescribed 5 mm (the baseline the [drift] defaults ask for), then four whose slices are 0.45 mm
thicker, inside the tolerance (5.0 +/- 0.7 mm) and its warn band. The watch service stores each
series, checks drift after each run (EWMA, Roberts 1959; CUSUM, Page 1954, as docs/trends.md
describes), and raises exactly one drift alert for the episode, which its alert command receives;
no breach and no warn alert is raised."""
import json
import os
import shutil
import time

from swe2e import (Daemon, check, cleanup, finish, query, simulate, stored_series, tmpdir,
                   wait_for, write_config)

base = tmpdir("sw-e2e-drift-")
inbox = os.path.join(base, "incoming")
db = os.path.join(base, "qa.sqlite")
os.makedirs(inbox)
facts = os.path.join(base, "alerts.jsonl")
conf = write_config(os.path.join(base, "slicewarden.conf"),
                    watch={"folder": inbox, "database": db, "quiet_seconds": 600},
                    alert={"command": "/usr/bin/python3 -c \"import json, os; open('%s', 'a')"
                                      ".write(json.dumps({k: v for k, v in os.environ.items() "
                                      "if k.startswith('SLICEWARDEN_')}) + '\\\\n')\"" % facts})
weeks = []
for i in range(12):
    thick = 5.0 if i < 8 else 5.45
    files, _ = simulate(os.path.join(base, "src", "w%02d" % i), "--thickness", str(thick),
                        "--prescribed", "5", "--date", "202601%02d" % (5 + 2 * i), "--time",
                        "080000", seed=100 + i, station="ALDMR1")
    weeks.append(files)

d = Daemon(inbox, db, "-c", conf)
time.sleep(0.4)
for i, files in enumerate(weeks):
    sub = os.path.join(inbox, "w%02d" % i)
    os.makedirs(sub)
    for f in files:
        shutil.copyfile(f, os.path.join(sub, os.path.basename(f)))
    wait_for(lambda: stored_series(db) == i + 1, 60, "week %d stored" % i)
wait_for(lambda: os.path.exists(facts), 30, "the alert command ran")
time.sleep(1.0)
rc = d.stop()
check(rc == 0, "SIGTERM: status 0")

verdicts = query(db, "SELECT verdict, count(*) FROM measurements WHERE metric = 'slice_thickness' "
                     "GROUP BY verdict")
check(verdicts == [("pass", 12)], "every thickness passes its tolerance: %s" % verdicts)
alerts = query(db, "SELECT kind, metric, command_status FROM alerts")
check([a[0] for a in alerts] == ["drift"], "exactly one alert, a drift alert: %s" % alerts)
check(alerts and alerts[0][1] == "slice_thickness" and alerts[0][2] == "sent",
      "about the slice thickness, and sent: %s" % alerts)
episodes = query(db, "SELECT metric, statistic, closed_at FROM drift_episodes")
check(len(episodes) >= 1 and all(e[0] == "slice_thickness" for e in episodes),
      "the episode is the thickness's: %s" % episodes)
with open(facts) as f:
    got = [json.loads(x) for x in f if x.strip()]
check(len(got) == 1 and got[0].get("SLICEWARDEN_KIND") == "drift" and
      got[0].get("SLICEWARDEN_METRIC") == "slice_thickness" and
      got[0].get("SLICEWARDEN_STATION") == "ALDMR1",
      "the command got the drift alert's facts: %s" % got)
# The cause hint of the drift alarm: the thickness rose by 9 % while the slice positions did not
# move (the simulator changed the profile, not the gradient), which reads as the RF pulse.
hints = query(db, "SELECT h.code, h.text FROM hints h JOIN alerts a ON a.id = h.alert_id "
                  "WHERE a.kind = 'drift'")
check([h[0] for h in hints] == ["rf-bandwidth"] and "Since the baseline" in hints[0][1],
      "the drift alarm's hint reads the RF pulse, since the baseline: %s" % hints)
msg = query(db, "SELECT message FROM alerts WHERE kind = 'drift'")
check(msg and "hint: RF pulse or transmit bandwidth?" in msg[0][0],
      "the drift alert's message carries the hint: %s" % (msg[0][0][-160:] if msg else msg))
cleanup(base)
finish()
