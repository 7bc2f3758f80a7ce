#!/usr/bin/python3
"""Checks a `slicewarden export` CSV against the database, read with Python's sqlite3 module.

usage: check_export.py DB CSV [--scanner S] [--from D] [--to D] [--metric M] [--verdict a,b]
                              [--all-runs]
Parses CSV with Python's csv module (RFC 4180 dialect: CRLF records, quoted fields), computes the
expected rows with its own SQL, and compares every field. Prints the number of rows; exits 1 on
the first difference.
"""
import argparse
import csv
import io
import math
import sqlite3
import sys

# The columns the accreditation export must carry (docs/export.md), in the program's order.
REQUIRED = ["station_name", "series_instance_uid", "acquired_at", "series_type", "echo", "metric",
            "slice", "value", "uncertainty", "unit", "nominal", "limit_lo", "limit_hi",
            "verdict", "program_version", "run_id"]

SQL = """
SELECT sc.station_name, sc.device_serial, sc.manufacturer, sc.model, sc.institution,
       sc.site_alias, s.series_instance_uid, s.study_instance_uid, s.series_number,
       s.acquired_at, s.description, s.protocol, s.series_type, r.id, r.program_version,
       r.config_hash, r.phantom_model, r.tolerance_set, r.finished_at, m.metric, m.slice, m.echo,
       m.value, m.uncertainty, m.unit, m.nominal, m.limit_lo, m.limit_hi, m.verdict, m.reason,
       m.details
FROM measurements m JOIN runs r ON r.id = m.run_id JOIN series s ON s.id = r.series_id
JOIN scanners sc ON sc.id = s.scanner_id
WHERE r.status = 'done'
"""
NAMES = ["station_name", "device_serial", "manufacturer", "model", "institution", "site_alias",
         "series_instance_uid", "study_instance_uid", "series_number", "acquired_at",
         "series_description", "protocol", "series_type", "run_id", "program_version",
         "config_hash", "phantom_model", "tolerance_set", "run_finished_at", "metric", "slice",
         "echo", "value", "uncertainty", "unit", "nominal", "limit_lo", "limit_hi", "verdict",
         "reason", "details"]
NUMERIC = {"value", "uncertainty", "nominal", "limit_lo", "limit_hi"}
INTEGER = {"series_number", "run_id", "slice", "echo"}


def fail(msg):
    print("check_export: " + msg, file=sys.stderr)
    sys.exit(1)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("db")
    ap.add_argument("csv")
    ap.add_argument("--scanner")
    ap.add_argument("--from", dest="frm")
    ap.add_argument("--to")
    ap.add_argument("--metric")
    ap.add_argument("--verdict")
    ap.add_argument("--all-runs", action="store_true")
    a = ap.parse_args()

    sql, args = SQL, []
    if not a.all_runs:
        sql += (" AND r.id = (SELECT max(id) FROM runs WHERE series_id = s.id"
                " AND status = 'done')")
    if a.scanner:
        sql += " AND sc.station_name = ?"
        args.append(a.scanner)
    if a.frm:
        sql += " AND s.acquired_at >= ?"
        args.append(a.frm)
    if a.to:
        sql += " AND s.acquired_at < ?"
        args.append(a.to)
    if a.metric:
        sql += " AND m.metric = ?"
        args.append(a.metric)
    if a.verdict:
        vs = a.verdict.split(",")
        sql += " AND m.verdict IN (%s)" % ",".join("?" * len(vs))
        args += vs
    sql += " ORDER BY s.acquired_at, s.id, r.id, m.id"
    con = sqlite3.connect("file:%s?mode=ro" % a.db, uri=True)
    want = con.execute(sql, args).fetchall()

    raw = open(a.csv, "rb").read()
    if b"\r\n" not in raw and want:
        fail("records must end with CRLF (RFC 4180)")
    text = raw.decode("utf-8")  # must be UTF-8
    rows = list(csv.reader(io.StringIO(text, newline="")))
    if not rows:
        fail("no header row")
    header = rows[0]
    if header != NAMES:
        fail("header differs: %r" % header)
    for col in REQUIRED:
        if col not in header:
            fail("required column %s missing" % col)
    body = rows[1:]
    if len(body) != len(want):
        fail("%d rows in the CSV, %d in the database" % (len(body), len(want)))
    for i, (got, exp) in enumerate(zip(body, want)):
        if len(got) != len(NAMES):
            fail("row %d has %d fields" % (i + 1, len(got)))
        for name, g, e in zip(NAMES, got, exp):
            if e is None or (name in ("series_number",) and e == 0):
                if g != "":
                    fail("row %d %s: %r for NULL" % (i + 1, name, g))
            elif name in NUMERIC:
                if float(g) != float(e) or math.isnan(float(g)):
                    fail("row %d %s: %r vs %r" % (i + 1, name, g, e))
            elif name in INTEGER:
                if int(g) != int(e):
                    fail("row %d %s: %r vs %r" % (i + 1, name, g, e))
            elif g != str(e):
                fail("row %d %s: %r vs %r" % (i + 1, name, g, e))
    print(len(body))


if __name__ == "__main__":
    main()
