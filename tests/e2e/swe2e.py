"""swe2e.py: helpers of the end-to-end tests of `slicewarden watch`: simulated series, a daemon in a
temporary folder, the database seen through Python's sqlite3 module (Debian's libsqlite3), and
files identified by their SHA-256 (Python's hashlib)."""
import hashlib
import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time

SW = os.environ.get("SW_BIN", "slicewarden")
# Small images keep the suite fast also under ASan; the analysis is exact enough at 128 x 128 over
# 250 mm (about 2 mm pixels) for verdicts and for comparing two runs of the same code.
SMALL = ["--matrix", "128", "--oversample", "2"]

failures = []


def check(cond, what):
    """Records a failed expectation (the test goes on, and fails at the end)."""
    if not cond:
        failures.append(what)
        print("FAIL:", what, file=sys.stderr)
    return cond


def finish():
    if failures:
        print("%d checks failed" % len(failures), file=sys.stderr)
        sys.exit(1)
    print("all checks passed")
    sys.exit(0)


def tmpdir(prefix, base=None):
    d = tempfile.mkdtemp(prefix=prefix, dir=base)
    os.chmod(d, 0o755)
    return d


def simulate(outdir, *args, series="t1", seed=1, station="ALDMR1"):
    """Writes one simulated series into outdir (which must not exist) and returns its files (not
    truth.json) and the truth."""
    os.makedirs(os.path.dirname(outdir), exist_ok=True)
    cmd = [SW, "simulate", "--quiet", "--series", series, "--seed", str(seed), "--station",
           station] + SMALL + list(args) + [outdir]
    subprocess.run(cmd, check=True)
    files = sorted(os.path.join(outdir, f) for f in os.listdir(outdir) if f != "truth.json")
    with open(os.path.join(outdir, "truth.json")) as f:
        truth = json.load(f)
    return files, truth


def sha256(path):
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 16), b""):
            h.update(chunk)
    return "sha256:" + h.hexdigest()


def tree_hashes(root):
    """{hash: [paths]} of the regular files under root, reason files and hidden files apart."""
    out = {}
    if not os.path.isdir(root):
        return out
    for d, _, names in os.walk(root):
        for n in names:
            if n.endswith(".reason.txt") or n.startswith("."):
                continue
            p = os.path.join(d, n)
            out.setdefault(sha256(p), []).append(p)
    return out


def files_under(root):
    out = []
    for d, _, names in os.walk(root):
        for n in names:
            out.append(os.path.join(d, n))
    return sorted(out)


def write_config(path, **sections):
    """An INI file from {section: {key: value}}."""
    with open(path, "w") as f:
        for sec, kv in sections.items():
            f.write("[%s]\n" % sec)
            for k, v in kv.items():
                f.write("%s = %s\n" % (k, v))
            f.write("\n")
    return path


class Daemon:
    """`slicewarden watch` in the background, its stderr kept in a file."""

    def __init__(self, folder, db, *extra, env=None, prefix=None):
        self.log_path = db + ".log"
        self.log = open(self.log_path, "ab")
        cmd = (prefix or []) + [SW, "watch", "--folder", folder, "--db", db] + list(extra)
        self.p = subprocess.Popen(cmd, stdout=self.log, stderr=self.log,
                                  env=dict(os.environ, **(env or {})))

    def alive(self):
        return self.p.poll() is None

    def stop(self, sig=signal.SIGTERM, timeout=60):
        if self.alive():
            self.p.send_signal(sig)
        try:
            rc = self.p.wait(timeout)
        except subprocess.TimeoutExpired:
            self.p.kill()
            rc = self.p.wait()
        self.log.close()
        return rc

    def text(self):
        with open(self.log_path, "rb") as f:
            return f.read().decode("utf-8", "replace")


def run_once(folder, db, *extra, env=None, prefix=None, timeout=300):
    cmd = (prefix or []) + [SW, "watch", "--once", "--folder", folder, "--db", db] + list(extra)
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout,
                          env=dict(os.environ, **(env or {})))


def query(db, sql, args=()):
    """Rows of a read-only query (a new connection each time: never holds a lock)."""
    con = sqlite3.connect("file:%s?mode=ro" % db, uri=True, timeout=30)
    try:
        return con.execute(sql, args).fetchall()
    finally:
        con.close()


def wait_for(cond, timeout, what, step=0.1):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        try:
            if cond():
                return True
        except sqlite3.OperationalError:
            pass  # the database may not exist yet, or be locked for a moment
        time.sleep(step)
    return check(False, "timed out after %.0f s waiting for %s" % (timeout, what))


def stored_series(db):
    try:
        return query(db, "SELECT count(*) FROM series WHERE state = 'stored'")[0][0]
    except sqlite3.OperationalError:
        return 0


def analyze_json(paths):
    r = subprocess.run([SW, "analyze", "--json"] + list(paths), capture_output=True, text=True)
    check(r.returncode in (0, 1), "analyze exit status %d: %s" % (r.returncode, r.stderr))
    return json.loads(r.stdout)


def copy_slowly(src, dst, pieces=3, pause=0.05):
    """Writes dst in pieces with pauses between them, as a receiver writing a large file does."""
    with open(src, "rb") as f:
        data = f.read()
    step = max(1, len(data) // pieces)
    with open(dst, "wb") as f:
        for i in range(0, len(data), step):
            f.write(data[i:i + step])
            f.flush()
            time.sleep(pause)


def integrity_ok(db):
    """Debian's sqlite3 shell as the outside witness of the file's integrity."""
    r = subprocess.run(["sqlite3", db, "PRAGMA integrity_check;"], capture_output=True, text=True)
    return r.stdout.strip() == "ok", r.stdout.strip() + r.stderr.strip()


def cleanup(*dirs):
    if os.environ.get("SW_KEEP"):
        print("kept:", *dirs)
        return
    for d in dirs:
        shutil.rmtree(d, ignore_errors=True)
