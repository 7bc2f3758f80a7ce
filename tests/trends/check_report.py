#!/usr/bin/python3
"""Checks the DOM that headless chromium dumped for a `slicewarden report` page against the
database, read with Python's sqlite3 module.

usage: check_report.py DB DOM.html [--from D] [--to D]
- the page's own check script ran in the browser (data-check="ok" on body) and its counts agree
  with what this parser counts;
- each scanner has one chart per toleranced quantity measured in the period, and each chart one
  point element per measured result of the latest runs, with the same dates, values and verdicts;
- every embedded image was decoded by the browser; the review caution is on the page.
Prints a one-line summary; exits 1 on the first difference.
"""
import argparse
import sqlite3
import sys
from html.parser import HTMLParser


def fail(msg):
    print("check_report: " + msg, file=sys.stderr)
    sys.exit(1)


class Dom(HTMLParser):
    def __init__(self):
        super().__init__()
        self.body = {}
        self.sections = []  # [{station, charts: [{attrs, points: [attrs]}]}]
        self.imgs = 0
        self.in_pt_title = None
        self.text = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        cls = (a.get("class") or "").split()
        if tag == "body":
            self.body = a
        elif tag == "section" and "scanner" in cls:
            self.sections.append({"station": a.get("data-station"), "charts": []})
        elif tag == "svg" and "trend" in cls:
            self.sections[-1]["charts"].append({"attrs": a, "points": []})
        elif "pt" in cls:
            self.sections[-1]["charts"][-1]["points"].append(a)
            self.in_pt_title = a
        elif tag == "title" and self.in_pt_title is not None:
            self.in_pt_title["_title"] = ""
        elif tag == "img":
            self.imgs += 1

    def handle_endtag(self, tag):
        if tag in ("circle", "rect", "path"):
            self.in_pt_title = None

    def handle_data(self, data):
        self.text.append(data)
        if self.in_pt_title is not None and "_title" in self.in_pt_title:
            self.in_pt_title["_title"] += data


LATEST = ("r.status = 'done' AND r.id = (SELECT max(id) FROM runs WHERE series_id = s.id "
          "AND status = 'done')")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("db")
    ap.add_argument("dom")
    ap.add_argument("--from", dest="frm")
    ap.add_argument("--to")
    ap.add_argument("--drift", action="append", default=[],
                    help="a station that must show a chart in drift")
    a = ap.parse_args()
    con = sqlite3.connect("file:%s?mode=ro" % a.db, uri=True)
    dom = Dom()
    dom.feed(open(a.dom, encoding="utf-8").read())
    if dom.body.get("data-check") != "ok":
        fail("the page's check script did not report ok: %r" % dom.body.get("data-check"))
    charts = [c for s in dom.sections for c in s["charts"]]
    points = sum(len(c["points"]) for c in charts)
    if int(dom.body.get("data-checked-charts", -1)) != len(charts):
        fail("script counted %s charts, the DOM has %d" % (dom.body.get("data-checked-charts"),
                                                          len(charts)))
    if int(dom.body.get("data-checked-points", -1)) != points:
        fail("script counted %s points, the DOM has %d" % (dom.body.get("data-checked-points"),
                                                          points))
    if int(dom.body.get("data-images-rendered", -1)) != dom.imgs:
        fail("%s of %d images rendered" % (dom.body.get("data-images-rendered"), dom.imgs))
    if "qualified medical physicist" not in " ".join(dom.text):
        fail("the review caution is missing")
    period = ""
    args = []
    if a.frm:
        period += " AND s.acquired_at >= ?"
        args.append(a.frm)
    if a.to:
        period += " AND s.acquired_at < ?"
        args.append(a.to)
    stations = [r[0] for r in con.execute("SELECT station_name FROM scanners ORDER BY id")]
    if [s["station"] for s in dom.sections] != stations:
        fail("sections %r, scanners %r" % ([s["station"] for s in dom.sections], stations))
    for sec in dom.sections:
        keys = con.execute(
            "SELECT DISTINCT s.series_type, m.metric, coalesce(m.echo, 0), coalesce(m.slice, 0) "
            "FROM measurements m JOIN runs r ON r.id = m.run_id JOIN series s ON s.id = "
            "r.series_id JOIN scanners sc ON sc.id = s.scanner_id WHERE sc.station_name = ? AND "
            + LATEST + " AND (m.limit_lo IS NOT NULL OR m.limit_hi IS NOT NULL)" + period,
            [sec["station"]] + args).fetchall()
        got_keys = sorted((c["attrs"]["data-series-type"], c["attrs"]["data-metric"],
                           int(c["attrs"]["data-echo"]), int(c["attrs"]["data-slice"]))
                          for c in sec["charts"])
        if got_keys != sorted(keys):
            fail("%s: charts %r, toleranced quantities %r" % (sec["station"], got_keys,
                                                             sorted(keys)))
        for c in sec["charts"]:
            at = c["attrs"]
            rows = con.execute(
                "SELECT s.acquired_at, m.value, m.verdict FROM measurements m JOIN runs r ON "
                "r.id = m.run_id JOIN series s ON s.id = r.series_id JOIN scanners sc ON sc.id = "
                "s.scanner_id WHERE sc.station_name = ? AND s.series_type = ? AND m.metric = ? "
                "AND coalesce(m.echo, 0) = ? AND coalesce(m.slice, 0) = ? AND m.value IS NOT "
                "NULL AND s.acquired_at IS NOT NULL AND " + LATEST + period +
                " ORDER BY s.acquired_at, s.id",
                [sec["station"], at["data-series-type"], at["data-metric"], int(at["data-echo"]),
                 int(at["data-slice"])] + args).fetchall()
            pts = c["points"]
            if not (int(at["data-expected"]) == int(at["data-counted"]) == len(pts) == len(rows)):
                fail("%s %s: expected %s, counted %s, DOM %d, database %d" % (
                    sec["station"], at["data-chart"], at["data-expected"], at["data-counted"],
                    len(pts), len(rows)))
            for p, (date, value, verdict) in zip(pts, rows):
                if p["data-date"] != date or float(p["data-value"]) != value or \
                        p["data-verdict"] != verdict:
                    fail("%s %s: point %r vs %r" % (sec["station"], at["data-chart"],
                                                    (p["data-date"], p["data-value"],
                                                     p["data-verdict"]), (date, value, verdict)))
                if verdict.upper() not in p.get("_title", ""):
                    fail("point %s has no verdict in words: %r" % (date, p.get("_title")))
    for st in a.drift:
        sec = [x for x in dom.sections if x["station"] == st]
        if not sec or not any(c["attrs"].get("data-status") == "drift" for c in sec[0]["charts"]):
            fail("%s shows no chart in drift" % st)
    print("%d scanners, %d charts, %d points, %d images" % (len(dom.sections), len(charts),
                                                            points, dom.imgs))


if __name__ == "__main__":
    main()
