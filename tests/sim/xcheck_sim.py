#!/usr/bin/python3
"""xcheck_sim.py: the simulator's output checked with tools from outside the project.

  profile FILE   FILE holds a profile from sim_profile_make (header line: tbw duration_ms flip_deg
                 spin_echo gradient_mT_per_m steps refocus_ratio; then "z re im" lines). The profile is recomputed
                 here with an independent Bloch method, Cayley-Klein spinors (the SLR parametrisation
                 of Pauly, Le Roux, Nishimura and Macovski 1991), and, at small flip angles, compared
                 with the Fourier transform of the pulse (the small-tip approximation of Pauly,
                 Nishimura and Macovski 1989) computed with numpy's FFT routines.
  series DIR     DIR holds series folders written by sim_series_write (std, flip-rows, flip-columns,
                 transposed, feet-first, enhanced) of the same acquisition. Every file is read with
                 pydicom; each variant is brought back to the phantom frame from
                 ImageOrientationPatient, ImagePositionPatient and PatientPosition alone (DICOM PS3.3
                 C.7.6.2.1.1) and must equal the standard series pixel for pixel.
  cli BIN DIR    runs `BIN simulate` into DIR (emptied first) with options and checks with pydicom
                 that the files and truth.json carry what the options asked for.
  model BIN DIR MODEL
                 simulates the phantom of model file MODEL (a single-ramp model) with
                 `BIN simulate --model`, reads the files with pydicom, measures the ramp strip's FWHM
                 on slice 1 with numpy alone (NEMA MS 5 single ramp: T = FWHM x tan(theta)), and
                 checks it and `BIN analyze --model` against truth.json; `BIN watch --once` with
                 [phantom] model_file measures the series once, complete at the model's slice count,
                 as analyze does; a bad model file is refused by simulate and analyze naming the line.
Exit status 0 when every check holds; the first failure is printed."""
import glob
import json
import os
import shutil
import subprocess
import sys

import numpy as np

GAMMA_BAR = 42.577478e6  # Hz/T, CODATA 2018


def fail(msg):
    print("FAIL:", msg)
    sys.exit(1)


def pulse(tbw, dur, flip, ns):
    t = -dur / 2 + (np.arange(ns) + 0.5) * dur / ns
    b = (0.54 + 0.46 * np.cos(2 * np.pi * t / dur)) * np.sinc(tbw * t / dur)
    return t, b * flip / (b.sum() * dur / ns)


def cayley_klein(w1, dt, f):
    """Spinor product of the step rotations: each step rotates by phi = |Omega| dt about
    n = Omega / |Omega|, Omega = (w1, 0, 2 pi f); returns (alpha, beta) per offset."""
    a = np.ones(f.shape, dtype=complex)
    b = np.zeros(f.shape, dtype=complex)
    oz = 2 * np.pi * f
    for w in w1:
        om = np.sqrt(w * w + oz * oz)
        c, s = np.cos(om * dt / 2), np.sin(om * dt / 2)
        aj = c - 1j * (oz / om) * s
        bj = -1j * (w / om) * s
        a, b = aj * a - np.conj(bj) * b, bj * a + np.conj(aj) * b
    return a, b


def check_profile(path):
    with open(path) as fh:
        head = fh.readline().split()
        tbw, dur_ms, flip, se, g_mt, ns, ratio = (float(head[0]), float(head[1]), float(head[2]),
                                                  int(head[3]), float(head[4]), int(head[5]),
                                                  float(head[6]))
        data = np.loadtxt(fh)
    z, re, im = data[:, 0], data[:, 1], data[:, 2]
    dur = dur_ms * 1e-3
    f = GAMMA_BAR * g_mt * 1e-3 * z * 1e-3  # offset of each sample (Hz)
    t, w1 = pulse(tbw, dur, np.deg2rad(flip), ns)
    a, b = cayley_klein(w1, dur / ns, f)
    mxy = 2 * np.conj(a) * b  # transverse magnetisation from M0 = z
    mag = np.abs(mxy)
    if se:
        _, w180 = pulse(tbw * ratio, dur, np.pi, ns)  # same duration, ratio x the bandwidth
        _, b2 = cayley_klein(w180, dur / ns, f)
        mag = mag * np.abs(b2) ** 2
    cmag = np.hypot(re, im)
    err = np.max(np.abs(cmag - mag))
    print("profile: max |C - spinor| = %.2e (peak %.4f)" % (err, mag.max()))
    if not err < 1e-6 * max(1.0, mag.max()) + 1e-9:
        fail("rotation-matrix and spinor Bloch profiles differ by %.3e" % err)
    # after a rephasing lobe of half the pulse's area the small-tip profile of a symmetric pulse
    # has no linear phase left (Pauly et al. 1989): the C profile's phase is flat in the slice
    if flip <= 30 and not se:
        inside = cmag > 0.5 * cmag.max()
        ph = np.angle((re + 1j * im)[inside])
        if np.max(np.abs(ph)) > 0.02:
            fail("residual phase after rephasing %.3f rad" % np.max(np.abs(ph)))
        # small tip: |Mxy(f)| ~ sin(flip) |FT(pulse)(f)| / FT(0); FT by numpy on a zero-padded grid
        npad = 1 << 18
        dt = dur / ns
        spec = np.fft.fftshift(np.fft.fft(w1 * dt, npad))
        freqs = np.fft.fftshift(np.fft.fftfreq(npad, dt))
        ft = np.interp(f, freqs, np.abs(spec))
        ft = ft / ft.max() * np.sin(np.deg2rad(flip))
        e2 = np.max(np.abs(cmag - ft)) / cmag.max()
        print("profile: max |C - Fourier| / peak = %.2e" % e2)
        if not e2 < 0.01:
            fail("small-tip profile differs from the pulse's Fourier transform by %.3f" % e2)


def load_series(d):
    import pydicom
    with open(os.path.join(d, "truth.json")) as fh:
        truth = json.load(fh)
    out = {}
    files = {e["name"]: e for e in truth["files"]}
    on_disk = sorted(n for n in os.listdir(d) if n != "truth.json" and not n.startswith("."))
    if sorted(files) != on_disk:
        fail("%s: truth.json names %s, folder has %s" % (d, sorted(files), on_disk))
    for name in on_disk:
        ds = pydicom.dcmread(os.path.join(d, name))
        if ds.StationName != "ALDMR1" or ds.Manufacturer != "Slicewarden Simulator":
            fail("%s: identity %s / %s" % (name, ds.StationName, ds.Manufacturer))
        if int(ds.BitsStored) != 12 or int(ds.pixel_array.max()) > 4095:
            fail("%s: not 12-bit" % name)
        pp = ds.PatientPosition
        if "PerFrameFunctionalGroupsSequence" in ds:
            sh = ds.SharedFunctionalGroupsSequence[0]
            iop = [float(v) for v in sh.PlaneOrientationSequence[0].ImageOrientationPatient]
            ps = [float(v) for v in sh.PixelMeasuresSequence[0].PixelSpacing]
            arr = ds.pixel_array
            for k, fr in enumerate(ds.PerFrameFunctionalGroupsSequence):
                ipp = [float(v) for v in fr.PlanePositionSequence[0].ImagePositionPatient]
                stack = int(fr.FrameContentSequence[0].InStackPositionNumber)
                te = float(fr.MREchoSequence[0].EffectiveEchoTime)
                echo = 1 if te == truth["echoes"][0]["te_ms"] else 2
                out[(stack, echo)] = (arr[k], iop, ipp, ps, pp)
        else:
            e = files[name]
            if int(ds.EchoNumbers) != e["echo"] or int(ds.InstanceNumber) != e["instance"]:
                fail("%s: echo/instance %s/%s vs truth %s" % (name, ds.EchoNumbers,
                                                              ds.InstanceNumber, e))
            te = truth["echoes"][e["echo"] - 1]["te_ms"]
            if abs(float(ds.EchoTime) - te) > 1e-6:
                fail("%s: EchoTime %s vs %s" % (name, ds.EchoTime, te))
            if abs(float(ds.SliceThickness) - truth["profile"]["requested_thickness_mm"]) > 1e-6:
                fail("%s: SliceThickness %s" % (name, ds.SliceThickness))
            out[(e["slice"], e["echo"])] = (ds.pixel_array, [float(v) for v in ds.ImageOrientationPatient],
                                            [float(v) for v in ds.ImagePositionPatient],
                                            [float(v) for v in ds.PixelSpacing], pp)
    return truth, out


def to_phantom_frame(arr, iop, ipp, ps, pp):
    """Display image (u right, v up) from the stored one, using the DICOM geometry only."""
    n = arr.shape[0]
    row, col = np.array(iop[:3]), np.array(iop[3:])
    r, c = np.mgrid[0:n, 0:n]
    P = (np.array(ipp)[None, None, :] + c[..., None] * ps[1] * row + r[..., None] * ps[0] * col)
    if pp == "HFS":
        u, v = P[..., 0], -P[..., 1]
    elif pp == "FFS":
        u, v = -P[..., 0], -P[..., 1]
    else:
        fail("unexpected PatientPosition %s" % pp)
    D = ps[1]
    h = 0.5 * (n - 1) * D
    j = np.rint((u + h) / D).astype(int)
    i = np.rint((h - v) / D).astype(int)
    disp = np.zeros_like(arr)
    disp[i, j] = arr
    if len(set(zip(i.ravel().tolist(), j.ravel().tolist()))) != n * n:
        fail("geometry does not map the image onto the display grid one to one")
    return disp, (P[0, 0, 2] if pp == "HFS" else -P[0, 0, 2])


def check_series(root):
    truth_std, std = load_series(os.path.join(root, "std"))
    zs = {s["ordinal"]: s["z_mm"] for s in truth_std["slices"]}
    ref = {}
    for key, (arr, iop, ipp, ps, pp) in std.items():
        ref[key], _ = to_phantom_frame(arr, iop, ipp, ps, pp)
    checked = 0
    for d in sorted(glob.glob(os.path.join(root, "*"))):
        name = os.path.basename(d)
        truth, ser = load_series(d)
        if set(ser) != set(std):
            fail("%s: images %s differ from the standard's" % (name, sorted(ser)))
        want_pp = "FFS" if name == "feet-first" else "HFS"
        for key, (arr, iop, ipp, ps, pp) in ser.items():
            if pp != want_pp:
                fail("%s: PatientPosition %s" % (name, pp))
            disp, zn = to_phantom_frame(arr, iop, ipp, ps, pp)
            if not np.array_equal(disp, ref[key]):
                fail("%s: slice %d echo %d differs from the standard after reorientation (%d pixels)"
                     % (name, key[0], key[1], int(np.sum(disp != ref[key]))))
            if abs(zn - zs[key[0]]) > 1e-4:
                fail("%s: slice %d along the normal at %.4f, truth %.4f" % (name, key[0], zn,
                                                                           zs[key[0]]))
            checked += 1
        print("series %s: %d images agree with the standard" % (name, len(ser)))
    if checked == 0:
        fail("no series found under %s" % root)


def run(binary, *args):
    p = subprocess.run([binary, "simulate"] + list(args), capture_output=True, text=True,
                       timeout=120)
    return p.returncode, p.stdout, p.stderr


def check_cli(binary, root):
    import pydicom
    shutil.rmtree(root, ignore_errors=True)
    os.makedirs(root)
    rc, out, _ = run(binary, "--help")
    if rc != 0 or "usage: slicewarden simulate" not in out:
        fail("--help: status %d" % rc)
    rc, _, err = run(binary, "--snr", "ten", os.path.join(root, "bad"))
    if rc != 2 or "--snr" not in err:
        fail("a bad number gave status %d, message %r" % (rc, err))
    rc, _, err = run(binary, "--orientation", "sideways", os.path.join(root, "bad"))
    if rc != 2:
        fail("an unknown orientation gave status %d" % rc)
    d = os.path.join(root, "t2")
    args = ["--series", "t2", "--thickness", "4", "--station", "ALDMR2", "--serial", "SWS-0002",
            "--scanner-model", "SW-SIM 3T", "--field", "3", "--position-offset", "1.5",
            "--orientation", "feet-first", "--shuffle", "--seed", "42", "--snr", "50",
            "--date", "20260105", "--time", "083000", d]
    rc, out, err = run(binary, *args)
    if rc != 0:
        fail("simulate failed (%d): %s" % (rc, err))
    with open(os.path.join(d, "truth.json")) as fh:
        t = json.load(fh)
    names = [n for n in os.listdir(d) if n != "truth.json"]
    if len(names) != 22:
        fail("%d files for a T2 series" % len(names))
    echoes = set()
    for n in names:
        ds = pydicom.dcmread(os.path.join(d, n))
        want = {"StationName": "ALDMR2", "DeviceSerialNumber": "SWS-0002",
                "ManufacturerModelName": "SW-SIM 3T", "PatientPosition": "FFS",
                "SeriesDate": "20260105", "InstitutionName": "Alderbrook Regional Hospital"}
        for k, v in want.items():
            if str(getattr(ds, k)) != v:
                fail("%s: %s is %r, asked %r" % (n, k, getattr(ds, k), v))
        if not str(ds.SeriesTime).startswith("083000"):
            fail("%s: SeriesTime %s" % (n, ds.SeriesTime))
        if abs(float(ds.MagneticFieldStrength) - 3) > 1e-9:
            fail("%s: field %s" % (n, ds.MagneticFieldStrength))
        if abs(float(ds.ImagingFrequency) - GAMMA_BAR * 3 * 1e-6) > 1e-5:
            fail("%s: ImagingFrequency %s, gamma-bar B0 %.6f" % (n, ds.ImagingFrequency,
                                                                GAMMA_BAR * 3e-6))
        if abs(float(ds.SliceThickness) - 4) > 1e-9:
            fail("%s: SliceThickness %s" % (n, ds.SliceThickness))
        echoes.add(int(ds.EchoNumbers))
    if echoes != {1, 2}:
        fail("echo numbers %s" % sorted(echoes))
    if t["seed"] != "42" or t["profile"]["requested_thickness_mm"] != 4:
        fail("truth.json does not carry the options: %s" % t["profile"])
    if abs(t["echoes"][0]["thickness_fwhm_mm"] - 4) > 0.05:
        fail("echo 1 FWHM %.4f for a 4 mm request" % t["echoes"][0]["thickness_fwhm_mm"])
    for sl in t["slices"]:
        if abs(sl["displacement_mm"] - 1.5) > 1e-9:
            fail("slice %d displacement %.4f, asked 1.5" % (sl["ordinal"], sl["displacement_mm"]))
    if abs(t["noise"]["sigma"] * 50 - t["echoes"][0]["fluid_signal"]) > 1e-6 * t["noise"]["sigma"]:
        fail("noise sigma %.4f does not give SNR 50" % t["noise"]["sigma"])
    if "22 images" not in out or ("%.3f mm" % t["echoes"][0]["thickness_fwhm_mm"]) not in out:
        fail("summary does not state the files and the truth thickness:\n" + out)
    rc, _, err = run(binary, *args)
    if rc != 2 or "already" not in err:
        fail("a second run into %s gave status %d (%s)" % (d, rc, err))
    d = os.path.join(root, "mf")
    rc, out, err = run(binary, "--enhanced", "--slices", "5", "--quiet", d)
    if rc != 0 or out:
        fail("--enhanced --quiet: status %d, output %r, %s" % (rc, out, err))
    names = [n for n in os.listdir(d) if n != "truth.json"]
    if len(names) != 1 or int(pydicom.dcmread(os.path.join(d, names[0])).NumberOfFrames) != 5:
        fail("enhanced output %s" % names)
    print("cli: options reach the files and truth.json")


def read_model(path):
    """The model file's keys by section, read with Python's own INI parser (inline ';' comments)."""
    import configparser
    cp = configparser.ConfigParser(inline_comment_prefixes=(";",))
    cp.read(path)
    return cp


def check_model(binary, root, model):
    import pydicom
    shutil.rmtree(root, ignore_errors=True)
    os.makedirs(root)
    m = read_model(model)
    n_slices = m.getint("phantom", "slices")
    slope = m.getfloat("ramp.top", "slope")
    v0, v1 = m.getfloat("ramp.top", "v_min_mm"), m.getfloat("ramp.top", "v_max_mm")
    d = os.path.join(root, "s")
    rc, out, err = run(binary, "--model", model, "--thickness", "6", "--prescribed", "5",
                       "--position-offset", "0.5", "--seed", "3", "--snr", "200", d)
    if rc != 0:
        fail("simulate --model failed (%d): %s" % (rc, err))
    with open(os.path.join(d, "truth.json")) as fh:
        t = json.load(fh)
    if t["model"] != m.get("phantom", "name"):
        fail("truth.json model %r, file %r" % (t["model"], m.get("phantom", "name")))
    names = sorted(n for n in os.listdir(d) if n != "truth.json")
    if len(names) != n_slices:
        fail("%d files for a %d-slice model" % (len(names), n_slices))
    ds = [pydicom.dcmread(os.path.join(d, n)) for n in names]
    ds.sort(key=lambda x: float(x.ImagePositionPatient[2]))
    z = [float(x.ImagePositionPatient[2]) for x in ds]
    gap = m.getfloat("phantom", "slice_gap_mm")
    if max(abs(b - a - gap) for a, b in zip(z, z[1:])) > 1e-6:
        fail("slice positions %s, the model's gap %.1f mm" % (z, gap))
    if m.get("phantom", "name") not in str(ds[0].SeriesDescription):
        fail("SeriesDescription %r does not name the model" % ds[0].SeriesDescription)
    # Slice 1 (head first: the inferior end, smallest z) holds the ramp. Standard orientation, no
    # pose: u along the columns, v up (rows run down); the phantom centred in the image.
    img = ds[0].pixel_array.astype(float)
    ps = [float(x) for x in ds[0].PixelSpacing]
    rows, cols = img.shape
    rc_ = (rows - 1) / 2 - np.arange(rows)  # v of each row, mm / spacing
    vmid = 0.5 * (v0 + v1)
    band = np.abs(rc_ * ps[0] - vmid) <= 0.25 * (v1 - v0)
    prof = img[band, :].mean(axis=0)
    u = (np.arange(cols) - (cols - 1) / 2) * ps[1]
    ui0, ui1 = m.getfloat("insert", "u_min_mm"), m.getfloat("insert", "u_max_mm")
    inside = (u > ui0 + 3) & (u < ui1 - 3)
    pk = prof[inside]
    uu = u[inside]
    # the plateau: the highest 5-pixel running mean (the strip is the slice profile stretched ten
    # times, so its top is as rounded as the profile's)
    top = np.convolve(pk, np.ones(5) / 5, mode="valid").max()
    above = np.nonzero(pk >= 0.5 * top)[0]
    a, b = above[0], above[-1]
    # linear interpolation of the outermost half-level crossings
    ua = uu[a - 1] + (0.5 * top - pk[a - 1]) / (pk[a] - pk[a - 1]) * (uu[a] - uu[a - 1])
    ub = uu[b] + (pk[b] - 0.5 * top) / (pk[b] - pk[b + 1]) * (uu[b + 1] - uu[b])
    length = ub - ua
    want = t["echoes"][0]["ramps"]["top_length_mm"]
    if abs(length - want) > 1.5:
        fail("strip FWHM %.2f mm by numpy, truth %.2f mm" % (length, want))
    T = length * abs(slope)
    truth = t["echoes"][0]["thickness_fwhm_mm"]
    if abs(T - truth) > 0.15:
        fail("numpy's single-ramp thickness %.3f mm, truth %.3f mm" % (T, truth))
    # the program's own measurement of the same files with the same model
    p = subprocess.run([binary, "analyze", "--json", "--model", model, d], capture_output=True,
                       text=True, timeout=120)
    if p.returncode not in (0, 1):
        fail("analyze --model failed (%d): %s" % (p.returncode, p.stderr))
    res = json.loads(p.stdout)["series"][0]
    th = res["slice_thickness"]
    if th["bottom_mm"] is not None or abs(th["corrected_mm"] - truth) > 0.1:
        fail("analyze: %s vs truth %.3f" % (th, truth))
    if abs(th["corrected_mm"] - T) > 0.2:
        fail("analyze %.3f mm and numpy %.3f mm disagree" % (th["corrected_mm"], T))
    pos = res["slice_position"]
    if [q["slice"] for q in pos] != [m.getint("wedges", "slice_first"),
                                     m.getint("wedges", "slice_last")]:
        fail("position slices %s" % [q["slice"] for q in pos])
    for q, w in zip(pos, t["wedges"]):
        if abs(q["bar_difference_mm"] - w["bar_difference_mm"]) > 0.2:
            fail("slice %d bar difference %.3f, truth %.3f" % (q["slice"], q["bar_difference_mm"],
                                                              w["bar_difference_mm"]))
    # the watch service with [phantom] model_file: the series is complete at the model's slice
    # count and measured with the same numbers as analyze
    w = os.path.join(root, "watch")
    inc = os.path.join(w, "incoming")
    shutil.copytree(d, os.path.join(inc, "s"), ignore=shutil.ignore_patterns("truth.json"))
    conf = os.path.join(w, "sw.conf")
    with open(conf, "w") as fh:
        fh.write("[watch]\nfolder = %s\ndatabase = %s\n[phantom]\nmodel_file = %s\n"
                 % (inc, os.path.join(w, "qa.sqlite"), model))
    p = subprocess.run([binary, "watch", "-c", conf, "--once", "--no-png", "--no-progress"],
                       capture_output=True, text=True, timeout=120)
    if p.returncode != 0:
        fail("watch with model_file: status %d: %s" % (p.returncode, p.stderr[-2000:]))
    import sqlite3
    con = sqlite3.connect("file:%s?mode=ro" % os.path.join(w, "qa.sqlite"), uri=True)
    got = con.execute("SELECT phantom_model FROM runs").fetchall()
    if got != [(m.get("phantom", "name"),)]:
        fail("watch runs %s, one run with model %s expected" % (got, m.get("phantom", "name")))
    if ("complete, %d images" % n_slices) not in p.stderr:
        fail("watch did not see a complete %d-image series:\n%s" % (n_slices, p.stderr[-2000:]))
    if ("thickness %.2f" % th["corrected_mm"]) not in p.stderr:
        fail("watch and analyze differ (analyze %.2f mm):\n%s" % (th["corrected_mm"],
                                                                  p.stderr[-2000:]))
    con.close()
    # a bad model file: both commands refuse it, naming the file and the line
    bad = os.path.join(root, "bad.model")
    with open(bad, "w") as fh:
        fh.write("[phantom]\nname = x\nslices = many\n")
    for cmd in (["simulate", "--model", bad, os.path.join(root, "never")],
                ["analyze", "--model", bad, d]):
        p = subprocess.run([binary] + cmd, capture_output=True, text=True, timeout=60)
        if p.returncode != 2 or (bad + ":3:") not in p.stderr:
            fail("%s with a bad model: status %d, %r" % (cmd[0], p.returncode, p.stderr))
    if os.path.exists(os.path.join(root, "never")):
        fail("simulate wrote files for a refused model")
    print("model: %s simulated and measured: numpy %.3f mm, analyze %.3f mm, truth %.3f mm"
          % (m.get("phantom", "name"), T, th["corrected_mm"], truth))


def main():
    if len(sys.argv) == 5 and sys.argv[1] == "model":
        check_model(sys.argv[2], sys.argv[3], sys.argv[4])
        print("ok")
        return 0
    if len(sys.argv) == 4 and sys.argv[1] == "cli":
        check_cli(sys.argv[2], sys.argv[3])
        print("ok")
        return 0
    if len(sys.argv) != 3 or sys.argv[1] not in ("profile", "series"):
        print(__doc__)
        return 2
    if sys.argv[1] == "profile":
        check_profile(sys.argv[2])
    else:
        check_series(sys.argv[2])
    print("ok")
    return 0


if __name__ == "__main__":
    sys.exit(main())
