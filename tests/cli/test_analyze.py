#!/usr/bin/python3
"""End-to-end tests of `slicewarden analyze`: the real program on series written by its own
`simulate` command into a temporary folder, checked against the simulator's truth.json, against the
published formulas, against pydicom's reading of the same files, and across copies converted by
DCMTK's command-line tools.

usage: test_analyze.py PATH_TO_SLICEWARDEN        (or SW_SLICEWARDEN=... test_analyze.py)
Exit status 0 when every check passed, 1 otherwise. Set SW_KEEP_TMP=1 to keep the folder.
"""

import json
import math
import os
import re
import shutil
import struct
import subprocess
import sys
import tempfile
import time
import zlib

import numpy as np
import pydicom
from pydicom.uid import generate_uid

BIN = sys.argv[1] if len(sys.argv) > 1 else os.environ.get("SW_SLICEWARDEN", "")
PYDICOM_CT = os.path.join(os.path.dirname(pydicom.__file__), "data", "test_files", "CT_small.dcm")

# ---- tiny check harness ------------------------------------------------------------------------

FAILED = []
COUNT = [0]


def check(cond, what, detail=""):
    """One assertion: printed either way, remembered when it fails."""
    COUNT[0] += 1
    if cond:
        print("ok    " + what)
    else:
        print("FAIL  " + what + (": " + detail if detail else ""))
        FAILED.append(what)
    return bool(cond)


def section(name, fn, *args):
    """Runs one group of checks; an exception fails the group instead of the whole run."""
    print("--- " + name)
    try:
        return fn(*args)
    except Exception as e:  # a broken group must not hide the others
        check(False, name + " ran to the end", "%s: %s" % (type(e).__name__, e))
        return None


def run(argv, timeout=180):
    p = subprocess.run(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, timeout=timeout)
    return p.returncode, p.stdout.decode("utf-8", "replace"), p.stderr.decode("utf-8", "replace")


def analyze(*args):
    return run([BIN, "analyze"] + list(args))


def analyze_json(*args):
    rc, out, err = analyze("--json", *args)
    doc = None
    try:
        doc = json.loads(out)
    except ValueError:
        pass
    return rc, doc, err


SANITIZER = re.compile(r"runtime error:|AddressSanitizer|LeakSanitizer|UndefinedBehaviorSanitizer")


def not_a_signal(rc, what, err=""):
    """Death by a signal (negative status: a crash, an abort) or a sanitizer report (the build with
    -DSW_SANITIZE=ON) is a defect whatever the exit status says."""
    ok = check(rc >= 0, what + ": exited normally", "killed by signal %d" % -rc)
    m = SANITIZER.search(err)
    line = err[max(0, err.rfind("\n", 0, m.start()) + 1):].split("\n")[0] if m else ""
    return check(m is None, what + ": no sanitizer report", line[:300]) and ok


# ---- series ------------------------------------------------------------------------------------

# The plain T1 series: SNR 50 (the accuracy goals' lower band), a small rotation and tilt, and a
# slice position error, so that every measured value has something to find.
BASE = ["--snr", "50", "--rotation", "2", "--tilt-v", "1", "--position-offset", "1.0",
        "--position-scale", "0.5", "--seed", "7"]


def simulate(root, name, extra):
    d = os.path.join(root, name)
    rc, out, err = run([BIN, "simulate", "--quiet"] + BASE + extra + [d])
    if rc != 0:
        raise RuntimeError("simulate %s failed (%d): %s" % (" ".join(extra), rc, err.strip()))
    with open(os.path.join(d, "truth.json")) as f:
        return d, json.load(f)


def dicom_files(d):
    return sorted(os.path.join(d, f) for f in os.listdir(d) if f != "truth.json")


# ---- the JSON contract (issue 3), keys and types -----------------------------------------------

NUM = (int, float)
THICKNESS_KEYS = ["top_mm", "bottom_mm", "top_thickness_mm", "bottom_thickness_mm", "acr_mm",
                  "corrected_mm", "tilt_deg", "fwtm_mm", "uncertainty_mm"]
POSITION_KEYS = ["bar_difference_mm", "displacement_mm", "uncertainty_mm"]
MODEL_KEYS = ["offset_mm", "scale_percent", "offset_uncertainty_mm", "scale_uncertainty_percent"]
VERDICTS = ("pass", "warn", "fail", "unmeasurable")


def is_num(v):
    return isinstance(v, NUM) and not isinstance(v, bool) and math.isfinite(v)


def is_int(v):
    return isinstance(v, int) and not isinstance(v, bool)


def contract(doc, label, measured=True):
    """Checks the documented keys and their types; with measured, every value must be a number."""
    ok = check(isinstance(doc, dict) and isinstance(doc.get("series"), list) and doc["series"],
               label + ": a document with a non-empty 'series' array")
    if not ok:
        return False
    for s in doc["series"]:
        e = "%s echo %s" % (label, s.get("echo_number"))
        for k in ("series_instance_uid", "station_name", "series_description"):
            check(isinstance(s.get(k), str), e + ": %s is a string" % k, repr(s.get(k)))
        check(is_int(s.get("echo_number")), e + ": echo_number is an integer")
        check(is_num(s.get("echo_time_ms")), e + ": echo_time_ms is a number")
        t = s.get("slice_thickness")
        if check(isinstance(t, dict), e + ": slice_thickness is an object"):
            check(is_int(t.get("slice")), e + ": slice_thickness.slice is an integer")
            for k in THICKNESS_KEYS:
                good = is_num(t.get(k)) if measured else (k in t and (t[k] is None or is_num(t[k])))
                check(good, e + ": slice_thickness.%s is a number" % k, repr(t.get(k)))
            check(t.get("verdict") in VERDICTS, e + ": slice_thickness.verdict is a verdict")
            check("reason" in t and (t["reason"] is None or isinstance(t["reason"], str)),
                  e + ": slice_thickness.reason is null or a string")
        pos = s.get("slice_position")
        if check(isinstance(pos, list) and len(pos) == 2, e + ": slice_position holds 2 slices"):
            for p in pos:
                pe = e + " slice %s" % p.get("slice")
                check(is_int(p.get("slice")), pe + ": slice is an integer")
                for k in POSITION_KEYS:
                    good = is_num(p.get(k)) if measured else (k in p and (p[k] is None or is_num(p[k])))
                    check(good, pe + ": %s is a number" % k, repr(p.get(k)))
                # the ramps sit on slice 1 only: a number there, null elsewhere
                rd = p.get("ramp_displacement_mm")
                want = is_num(rd) if (measured and p.get("slice") == 1) else (rd is None or is_num(rd))
                check("ramp_displacement_mm" in p and want, pe + ": ramp_displacement_mm", repr(rd))
                check(p.get("verdict") in VERDICTS, pe + ": verdict is a verdict")
                check("reason" in p and (p["reason"] is None or isinstance(p["reason"], str)),
                      pe + ": reason is null or a string")
        m = s.get("position_model")
        if check(isinstance(m, dict), e + ": position_model is an object"):
            for k in MODEL_KEYS:
                good = is_num(m.get(k)) if measured else (k in m and (m[k] is None or is_num(m[k])))
                check(good, e + ": position_model.%s is a number" % k, repr(m.get(k)))
    return True


def by_slice(s):
    return {p["slice"]: p for p in s["slice_position"]}


# ---- 1. the plain T1 series ----------------------------------------------------------------------

def test_plain(d, truth):
    rc, doc, err = analyze_json(d)
    not_a_signal(rc, "analyze --json plain", err)
    check(rc == 0, "analyze --json plain: exit 0 (all pass)", "exit %d, stderr %s" % (rc, err))
    contract(doc, "plain")
    s = doc["series"][0]
    check(len(doc["series"]) == 1, "plain: one element for a single-echo series")
    # identity, as pydicom reads it from the files
    ds = pydicom.dcmread(dicom_files(d)[0], stop_before_pixels=True)
    check(s["series_instance_uid"] == ds.SeriesInstanceUID, "plain: series_instance_uid as in the files")
    check(s["station_name"] == ds.StationName, "plain: station_name as in the files")
    check(s["series_description"] == ds.SeriesDescription, "plain: series_description as in the files")
    check(s["echo_number"] == 1 and abs(s["echo_time_ms"] - float(ds.EchoTime)) < 1e-6,
          "plain: echo 1 with the files' EchoTime", "%s %s" % (s["echo_number"], s["echo_time_ms"]))

    t, te = s["slice_thickness"], truth["echoes"][0]
    fwhm = te["thickness_fwhm_mm"]
    # Accuracy goals of the project at SNR >= 50: |bias| <= 0.05 and SD <= 0.05 mm; one series is
    # checked at twice the SD goal.
    check(abs(t["corrected_mm"] - fwhm) <= 0.1, "plain: tilt-corrected thickness within 0.1 mm of "
          "the profile FWHM", "%.4f vs %.4f" % (t["corrected_mm"], fwhm))
    # the strip lengths: the thickness goal mapped along a 10:1 ramp (x 10), tilt included
    for k, tk in (("top_mm", "top_length_mm"), ("bottom_mm", "bottom_length_mm")):
        check(abs(t[k] - te["ramps"][tk]) <= 1.0, "plain: %s within 1 mm of the expected length" % k,
              "%.3f vs %.3f" % (t[k], te["ramps"][tk]))
    tilt = truth["pose"]["tilt_v_deg"]
    check(abs(t["tilt_deg"] - tilt) <= max(0.2, 4 * t.get("tilt_uncertainty_deg", 0)),
          "plain: tilt about v within 0.2 deg of the pose", "%.3f vs %.3f" % (t["tilt_deg"], tilt))
    check(t["slice"] == 1 and t["verdict"] == "pass" and t["reason"] is None,
          "plain: thickness on slice 1, pass, no reason")
    check(0 < t["uncertainty_mm"] < 0.2, "plain: thickness uncertainty is positive and small",
          str(t["uncertainty_mm"]))
    # Formulas (phantom-large.md; the ACR large-phantom guidance for 0.2 a b / (a + b); the tilt-
    # corrected crossed-ramp form whose 90-degree case is NEMA MS 5's sqrt(a b)).
    a, b, tan_th = t["top_mm"], t["bottom_mm"], 0.1
    check(abs(t["top_thickness_mm"] - a * tan_th) < 1e-3 and abs(t["bottom_thickness_mm"] - b * tan_th) < 1e-3,
          "plain: per-ramp thickness = length x tan(atan 0.1)")
    check(abs(t["acr_mm"] - 0.2 * a * b / (a + b)) < 1e-3, "plain: ACR formula 0.2 a b / (a + b)",
          "%.5f vs %.5f" % (t["acr_mm"], 0.2 * a * b / (a + b)))
    tphi = math.tan(2 * math.atan(0.1))
    tc = (-(a + b) + math.sqrt((a + b) ** 2 + 4 * a * b * tphi ** 2)) / (2 * tphi)
    check(abs(t["corrected_mm"] - tc) < 1e-3, "plain: tilt-corrected formula from a and b",
          "%.5f vs %.5f" % (t["corrected_mm"], tc))
    # Sign by the image (phantom-large.md, "Pose and its signs"): a positive tilt lowers the top
    # ramp's angle to the slice, atan(T / a) = theta - tilt. (The formula line of that file,
    # tilt = atan(T / a) - theta, and its check values use the opposite sign.)
    tilt_f = math.degrees(math.atan(0.1) - math.atan(tc / a))
    check(abs(t["tilt_deg"] - tilt_f) < 1e-3, "plain: tilt = theta - atan(T / a)",
          "%.5f vs %.5f" % (t["tilt_deg"], tilt_f))
    check(t["fwtm_mm"] > t["corrected_mm"], "plain: FWTM wider than FWHM")

    pos = by_slice(s)
    check(sorted(pos) == [1, 11], "plain: slice position on slices 1 and 11", str(sorted(pos)))
    wedges = {w["slice"]: w for w in truth["wedges"]}
    for k in (1, 11):
        p = pos.get(k)
        if not p:
            continue
        want = wedges[k]["bar_difference_mm"]
        # goal at SNR >= 50: |bias| <= 0.1, SD <= 0.2 mm
        check(abs(p["bar_difference_mm"] - want) <= 0.2, "slice %d: bar difference within 0.2 mm of "
              "the geometry" % k, "%.3f vs %.3f" % (p["bar_difference_mm"], want))
        # 45-degree wedges: displacement = -(bar difference) / 2 (ACR guidance, slice position)
        check(abs(p["displacement_mm"] + 0.5 * p["bar_difference_mm"]) < 1e-4,
              "slice %d: displacement = -(bar difference) / 2" % k)
        check(p["verdict"] == "pass" and p["reason"] is None, "slice %d: pass, no reason" % k)
    p1 = pos.get(1)
    if p1:
        want = truth["slices"][0]["displacement_mm"]
        check(abs(p1["ramp_displacement_mm"] - want) <= 0.1, "slice 1: displacement from the ramps "
              "within 0.1 mm of the truth", "%.3f vs %.3f" % (p1["ramp_displacement_mm"], want))
    # position model through the two wedge slices: truth from the geometry's bar differences
    m = s["position_model"]
    if 1 in pos and 11 in pos:
        z = {sl["ordinal"]: sl["z_mm"] for sl in truth["slices"]}
        d1, d11 = -0.5 * wedges[1]["bar_difference_mm"], -0.5 * wedges[11]["bar_difference_mm"]
        scale = (d11 - d1) / (z[11] - z[1])
        off = d1 - scale * z[1]
        check(abs(m["offset_mm"] - off) <= 0.1, "position model offset within 0.1 mm",
              "%.3f vs %.3f" % (m["offset_mm"], off))
        check(abs(m["scale_percent"] - 100 * scale) <= 0.2, "position model scale within 0.2 %",
              "%.3f vs %.3f" % (m["scale_percent"], 100 * scale))
        # and the simulated error itself (no pitch here, so the bars see the applied error)
        pe = truth["position_error"]
        check(abs(m["offset_mm"] - pe["offset_mm"]) <= 0.15 and
              abs(m["scale_percent"] - 100 * pe["scale"]) <= 0.25,
              "position model finds the applied e(z) = offset + scale z",
              "%.3f mm %.3f %% vs %.3f mm %.3f %%" % (m["offset_mm"], m["scale_percent"],
                                                    pe["offset_mm"], 100 * pe["scale"]))
    check(s.get("verdict") == "pass", "plain: series verdict pass")

    rc, out, err = analyze(d)
    not_a_signal(rc, "analyze (text) plain", err)
    check(rc == 0, "analyze (text) plain: exit 0", "exit %d" % rc)
    mt = re.search(r"slice thickness, slice 1:\s+([0-9.]+)\s", out)
    check(mt is not None and abs(float(mt.group(1)) - t["corrected_mm"]) <= 0.0051,
          "text: the thickness line gives the JSON's thickness", out[:300])
    check(re.search(r"^\s*verdict: pass\s*$", out, re.M) is not None, "text: a 'verdict: pass' line")
    check(re.search(r"slice position, slice 11:\s+bar difference", out) is not None,
          "text: a slice position line for slice 11")
    return doc


# ---- 2. the same series, rearranged and converted -------------------------------------------------

def values(s):
    """The measured numbers and verdicts of one element, flattened (identity and z excluded)."""
    v = {}
    for k, x in s["slice_thickness"].items():
        v["thickness." + k] = x
    for p in s["slice_position"]:
        for k, x in p.items():
            if k != "z_mm":  # the patient-frame coordinate flips with feet first, by design
                v["position%d.%s" % (p["slice"], k)] = x
    for k, x in s["position_model"].items():
        v["model." + k] = x
    for k in ("snr", "noise_sd", "rotation_deg", "pitch_deg", "pitch_uncertainty_deg", "verdict",
              "reason", "images", "echo_number", "echo_time_ms"):
        v[k] = s.get(k)
    return v


# Values that follow from the noise estimate (the air's SD): the same image stored another way has the
# same noise, so they too must agree; they are checked apart so that a failure says which part moved.
def noise_derived(k):
    return k in ("noise_sd", "snr") or "uncertainty" in k or k == "thickness.fwtm_mm"


def same(ref, got, label, exact):
    a, b = values(ref), values(got)
    bad = {False: [], True: []}
    for k in sorted(set(a) | set(b)):
        x, y = a.get(k), b.get(k)
        if exact or not (is_num(x) and is_num(y)):
            if x != y:
                bad[noise_derived(k)].append("%s %r != %r" % (k, x, y))
        elif abs(x - y) > 2e-3 + 1e-4 * abs(x):  # tight: far below any value's uncertainty
            bad[noise_derived(k)].append("%s %.6g vs %.6g" % (k, x, y))
    what = ": identical" if exact else ": same"
    check(not bad[False], label + what + " measurements and verdicts", "; ".join(bad[False][:6]))
    check(not bad[True], label + what + " noise estimate, uncertainties and FWTM",
          "; ".join(bad[True][:6]))


def test_variants(root, ref_doc):
    ref = ref_doc["series"][0]
    for name, extra in (("shuffled", ["--shuffle"]), ("reversed", ["--reverse-instances"]),
                        ("flip-rows", ["--orientation", "flip-rows"]),
                        ("flip-columns", ["--orientation", "flip-columns"]),
                        ("transposed", ["--orientation", "transposed"]),
                        ("feet-first", ["--orientation", "feet-first"]),
                        ("enhanced", ["--enhanced"])):
        d, _ = simulate(root, name, extra)
        if name == "enhanced":
            files = dicom_files(d)
            ds = pydicom.dcmread(files[0], stop_before_pixels=True)
            check(len(files) == 1 and int(ds.NumberOfFrames) == 11 and
                  ds.SOPClassUID == "1.2.840.10008.5.1.4.1.1.4.1",
                  "enhanced: one Enhanced MR file of 11 frames (pydicom)")
        rc, doc, err = analyze_json(d)
        not_a_signal(rc, "analyze " + name, err)
        check(rc == 0 and doc is not None and len(doc["series"]) == 1, name + ": exit 0, one element",
              "exit %d %s" % (rc, err.strip()[:200]))
        if doc and doc["series"]:
            same(ref, doc["series"][0], name, exact=False)


def convert(src, dst, tool_argv):
    os.makedirs(dst)
    for f in dicom_files(src):
        out = os.path.join(dst, os.path.basename(f))
        rc, _, err = run(tool_argv + [f, out])
        if rc != 0:
            raise RuntimeError("%s failed on %s: %s" % (tool_argv[0], f, err.strip()))
    return dst


def test_conversions(root, plain, ref_doc):
    ref = ref_doc["series"][0]
    # DCMTK's converters: JPEG-LS lossless (dcmcjpls default +el), JPEG lossless SV1 (dcmcjpeg
    # default +e1), implicit VR little endian (dcmconv +ti).
    for name, argv, ts in (("jpeg-ls", ["dcmcjpls"], "1.2.840.10008.1.2.4.80"),
                           ("jpeg-lossless", ["dcmcjpeg"], "1.2.840.10008.1.2.4.70"),
                           ("implicit", ["dcmconv", "+ti"], "1.2.840.10008.1.2")):
        if shutil.which(argv[0]) is None:
            check(False, name + ": DCMTK's %s is installed" % argv[0])
            continue
        d = convert(plain, os.path.join(root, name), argv)
        ds = pydicom.dcmread(dicom_files(d)[0], stop_before_pixels=True)
        check(ds.file_meta.TransferSyntaxUID == ts, name + ": copies carry transfer syntax " + ts,
              str(ds.file_meta.TransferSyntaxUID))
        rc, doc, err = analyze_json(d)
        not_a_signal(rc, "analyze " + name, err)
        check(rc == 0 and doc is not None and len(doc["series"]) == 1, name + ": exit 0, one element",
              "exit %d %s" % (rc, err.strip()[:200]))
        if doc and doc["series"]:
            same(ref, doc["series"][0], name, exact=True)


# ---- 3. the double-echo T2 series ----------------------------------------------------------------

def test_t2(root):
    d, truth = simulate(root, "t2", ["--series", "t2", "--snr", "100", "--seed", "11"])
    rc, doc, err = analyze_json(d)
    not_a_signal(rc, "analyze t2", err)
    check(rc == 0, "t2: exit 0", "exit %d %s" % (rc, err.strip()[:200]))
    contract(doc, "t2")
    ser = doc["series"]
    check(len(ser) == 2 and [s["echo_number"] for s in ser] == [1, 2],
          "t2: two elements, echo 1 then echo 2", str([s.get("echo_number") for s in ser]))
    tes = [e["te_ms"] for e in truth["echoes"]]
    check([s["echo_time_ms"] for s in ser] == tes and tes == [20.0, 80.0],
          "t2: echo times 20 and 80 ms", str([s.get("echo_time_ms") for s in ser]))
    check(len(set(s["series_instance_uid"] for s in ser)) == 1, "t2: one series UID for both echoes")
    for s, te in zip(ser, truth["echoes"]):
        t = s["slice_thickness"]
        # echo 2 has the first echo's SNR times exp(-60 / 130), about 63 here: the SNR >= 50 goals
        check(abs(t["corrected_mm"] - te["thickness_fwhm_mm"]) <= 0.1,
              "t2 echo %d: thickness within 0.1 mm of its profile's FWHM" % s["echo_number"],
              "%.4f vs %.4f" % (t["corrected_mm"], te["thickness_fwhm_mm"]))
        check(s["images"] == 11, "t2 echo %d: 11 images" % s["echo_number"], str(s.get("images")))


# ---- 4. annotated PNGs ---------------------------------------------------------------------------

PNG_SIG = b"\x89PNG\r\n\x1a\n"
# PNG (ISO/IEC 15948:2004, W3C PNG 2nd edition) 11.2.2: allowed bit depths per colour type, and the
# samples per pixel of each colour type.
PNG_DEPTHS = {0: (1, 2, 4, 8, 16), 2: (8, 16), 3: (1, 2, 4, 8), 4: (8, 16), 6: (8, 16)}
PNG_SAMPLES = {0: 1, 2: 3, 3: 1, 4: 2, 6: 4}


def png_problem(path):
    """None for a valid non-interlaced PNG, else what is wrong (signature, chunk CRC-32, IHDR, the
    decompressed image data size and each scanline's filter type)."""
    data = open(path, "rb").read()
    if data[:8] != PNG_SIG:
        return "bad signature"
    pos, types, idat, ihdr = 8, [], b"", None
    while pos < len(data):
        if pos + 12 > len(data):
            return "truncated chunk at %d" % pos
        length, ctype = struct.unpack(">I4s", data[pos:pos + 8])
        body = data[pos + 8:pos + 8 + length]
        if len(body) != length or pos + 12 + length > len(data):
            return "chunk %r runs past the end" % ctype
        (crc,) = struct.unpack(">I", data[pos + 8 + length:pos + 12 + length])
        if zlib.crc32(ctype + body) & 0xFFFFFFFF != crc:
            return "CRC mismatch in %r" % ctype
        types.append(ctype)
        if ctype == b"IHDR":
            if length != 13:
                return "IHDR length %d" % length
            ihdr = struct.unpack(">IIBBBBB", body)
        elif ctype == b"IDAT":
            idat += body
        pos += 12 + length
    if not types or types[0] != b"IHDR" or types[-1] != b"IEND":
        return "chunk order %r" % types[:3]
    w, h, depth, ctype, comp, filt, inter = ihdr
    if w < 1 or h < 1 or ctype not in PNG_DEPTHS or depth not in PNG_DEPTHS[ctype]:
        return "IHDR %r" % (ihdr,)
    if comp != 0 or filt != 0 or inter not in (0, 1):
        return "IHDR methods %r" % (ihdr,)
    if ctype == 3 and b"PLTE" not in types:
        return "palette image without PLTE"
    raw = zlib.decompress(idat)
    if inter == 0:
        stride = 1 + (w * PNG_SAMPLES[ctype] * depth + 7) // 8
        if len(raw) != h * stride:
            return "image data %d bytes, expected %d" % (len(raw), h * stride)
        if any(raw[i * stride] > 4 for i in range(h)):
            return "a scanline filter type above 4"
    return None


def test_png(root, plain, ref_doc):
    out = os.path.join(root, "png")
    rc, doc, err = analyze_json("--png", out, plain)
    not_a_signal(rc, "analyze --png", err)
    check(rc == 0, "--png: exit 0", "exit %d %s" % (rc, err.strip()[:200]))
    pngs = sorted(f for f in os.listdir(out)) if os.path.isdir(out) else []
    check(any(f.endswith("_e1_s01.png") for f in pngs) and any(f.endswith("_e1_s11.png") for f in pngs),
          "--png: a PNG for slice 1 and for slice 11 of echo 1", str(pngs))
    for f in pngs:
        prob = png_problem(os.path.join(out, f))
        check(prob is None, "--png: %s is a valid PNG" % f, prob or "")
    if pngs:
        # the checker itself must catch damage: one flipped byte inside the image data
        src = os.path.join(out, pngs[0])
        blob = bytearray(open(src, "rb").read())
        blob[len(blob) // 2] ^= 0xFF
        bad = os.path.join(root, "damaged.png")
        open(bad, "wb").write(bytes(blob))
        check(png_problem(bad) is not None, "--png: the PNG checker rejects a damaged copy")
    if doc and ref_doc:
        same(ref_doc["series"][0], doc["series"][0], "--png run", exact=True)


# ---- 5. a thick slice ----------------------------------------------------------------------------

def test_thick(root):
    # A scanner whose slice comes out 6.0 mm when 5.0 mm was prescribed (SliceThickness 5.0).
    d, truth = simulate(root, "thick", ["--thickness", "6.0", "--prescribed", "5.0", "--seed", "3"])
    ds = pydicom.dcmread(dicom_files(d)[0], stop_before_pixels=True)
    check(abs(float(ds.SliceThickness) - 5.0) < 1e-6, "thick: the files prescribe 5.0 mm (pydicom)",
          str(ds.SliceThickness))
    rc, doc, err = analyze_json(d)
    not_a_signal(rc, "analyze thick", err)
    check(rc == 1, "thick: exit 1 (a fail)", "exit %d" % rc)
    if doc and doc.get("series"):
        s = doc["series"][0]
        t = s["slice_thickness"]
        check(t["verdict"] == "fail" and s["verdict"] == "fail", "thick: verdict fail",
              "%s / %s" % (t.get("verdict"), s.get("verdict")))
        check(abs(t["corrected_mm"] - truth["echoes"][0]["thickness_fwhm_mm"]) <= 0.1,
              "thick: 6 mm measured within 0.1 mm", str(t.get("corrected_mm")))
        check(t["nominal_mm"] == 5.0 and t["corrected_mm"] > t["limit_high_mm"],
              "thick: nominal 5 mm, above the upper limit", "%s %s" % (t.get("nominal_mm"),
                                                                   t.get("limit_high_mm")))


# ---- 6. bad input --------------------------------------------------------------------------------

def write_variant(src, dst, mutate):
    ds = pydicom.dcmread(src)
    mutate(ds)
    os.makedirs(os.path.dirname(dst), exist_ok=True)
    ds.save_as(dst)
    return dst


def new_series(ds):
    ds.SeriesInstanceUID = generate_uid()
    ds.SOPInstanceUID = generate_uid()
    ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID


def set_pixels(ds, a):
    ds.PixelData = np.clip(np.rint(a), 0, 4095).astype(np.uint16).tobytes()


def bad_inputs(root, plain):
    """(label, path given to analyze, names that stderr must mention)."""
    first = dicom_files(plain)[0]
    cases = []

    def uniform(ds):
        new_series(ds)
        set_pixels(ds, np.full(ds.pixel_array.shape, 1500.0))

    p = write_variant(first, os.path.join(root, "bad-uniform", "IM0001.dcm"), uniform)
    cases.append(("uniform MR image", os.path.dirname(p), [p]))

    def noise(ds):
        new_series(ds)
        rng = np.random.default_rng(5)
        shape = ds.pixel_array.shape
        set_pixels(ds, np.hypot(rng.normal(0, 30, shape), rng.normal(0, 30, shape)))

    p = write_variant(first, os.path.join(root, "bad-noise", "IM0001.dcm"), noise)
    cases.append(("noise MR image", os.path.dirname(p), [p]))

    def ct(ds):
        new_series(ds)
        ds.Modality = "CT"
        ds.SOPClassUID = "1.2.840.10008.5.1.4.1.1.2"  # CT Image Storage (PS3.4 B.5)
        ds.file_meta.MediaStorageSOPClassUID = ds.SOPClassUID

    p = write_variant(first, os.path.join(root, "bad-ct", "CT0001.dcm"), ct)
    cases.append(("CT copy of a phantom image", os.path.dirname(p), [p]))
    d = os.path.join(root, "bad-ct-small")
    os.makedirs(d)
    shutil.copy(PYDICOM_CT, d)
    cases.append(("pydicom's CT_small.dcm", d, [os.path.join(d, "CT_small.dcm")]))

    d = os.path.join(root, "bad-empty")
    os.makedirs(d)
    cases.append(("empty folder", d, [d]))

    d = os.path.join(root, "bad-truncated")
    os.makedirs(d)
    blob = open(dicom_files(plain)[5], "rb").read()
    p = os.path.join(d, "IM0006.dcm")
    open(p, "wb").write(blob[:len(blob) // 2])
    cases.append(("truncated file", p, [p]))
    cases.append(("truncated file in a folder", d, [p]))

    # The ramp insert missing: on slice 1, the insert's region filled with the fluid level around it.
    d = os.path.join(root, "bad-no-insert")
    shutil.copytree(plain, d)
    os.remove(os.path.join(d, "truth.json"))
    slice1 = None
    for f in dicom_files(d):
        if int(pydicom.dcmread(f, stop_before_pixels=True).InstanceNumber) == 1:
            slice1 = f

    def blank(ds):
        a = ds.pixel_array.astype(float)
        rows, cols = a.shape
        sp = float(ds.PixelSpacing[0])
        y, x = np.mgrid[0:rows, 0:cols]
        u, v = (x - (cols - 1) / 2) * sp, ((rows - 1) / 2 - y) * sp
        # the insert (u +-70, v +-10 mm) with a margin for the small rotation and the edges' blur
        region = (np.abs(u) <= 76) & (np.abs(v) <= 16)
        fluid = (np.hypot(u, v) < 85) & ~region & (np.abs(v) > 20) & (np.abs(v) < 60)
        a[region] = np.median(a[fluid])
        set_pixels(ds, a)

    write_variant(slice1, slice1, blank)
    cases.append(("ramp insert missing", d, [slice1, d]))
    return cases


def test_bad(root, plain):
    for label, path, names in bad_inputs(root, plain):
        rc, doc, err = analyze_json(path)
        not_a_signal(rc, label, err)
        check(rc in (1, 2), label + ": exit 1 (unmeasurable) or 2 (input error)", "exit %d" % rc)
        if rc == 1:
            ser = doc.get("series", []) if doc else []
            check(bool(ser) and all(s["verdict"] == "unmeasurable" and s["reason"] for s in ser),
                  label + ": verdict unmeasurable with a reason", json.dumps(ser)[:300])
            # with or without the pixels, no number may be reported for what was not measured
            for s in ser:
                t = s["slice_thickness"]
                check(t["verdict"] != "unmeasurable" or t["corrected_mm"] is None,
                      label + ": no thickness when unmeasurable")
            if label == "ramp insert missing":
                r = (ser[0]["slice_thickness"]["reason"] or "") if ser else ""
                check("insert" in r or "ramp" in r, label + ": the reason names the missing insert",
                      repr(r))
        check(err.strip() != "", label + ": a reason on stderr", "stderr empty")
        named = [n for n in names if n in err or os.path.basename(n) in err]
        check(bool(named), label + ": stderr names the file", "stderr: %r" % err.strip()[:300])
    # a truncated file beside an otherwise complete series: reported, and the rest still measured
    d = os.path.join(root, "bad-truncated-in-series")
    shutil.copytree(plain, d)
    victim = dicom_files(d)[5]
    blob = open(victim, "rb").read()
    open(victim, "wb").write(blob[:len(blob) // 3])
    rc, doc, err = analyze_json(d)
    not_a_signal(rc, "truncated file in a series", err)
    check(rc == 2 and os.path.basename(victim) in err, "truncated file in a series: exit 2, named",
          "exit %d %r" % (rc, err.strip()[:200]))
    ser = doc.get("series", []) if doc else []
    check(len(ser) == 1 and ser[0]["images"] == 10 and ser[0]["slice_thickness"]["verdict"] == "pass",
          "truncated file in a series: the other 10 images still measured",
          json.dumps(ser)[:200])


# ---- 7. usage -----------------------------------------------------------------------------------

def test_usage(plain):
    for label, argv in (("unknown option", ["--no-such-option", plain]), ("no path", []),
                        ("no path with --json", ["--json"]),
                        ("bad --half-level", ["--half-level", "median", plain]),
                        ("--png without a folder", ["--png"])):
        rc, out, err = analyze(*argv)
        not_a_signal(rc, "usage: " + label, err)
        check(rc == 2, "usage: %s: exit 2" % label, "exit %d" % rc)
        check("usage" in err or "unknown" in err or "unrecognized" in err or "requires" in err,
              "usage: %s: says why on stderr" % label, repr(err[:200]))
    rc, out, err = analyze("--help")
    check(rc == 0 and "usage: slicewarden analyze" in out, "usage: --help on stdout, exit 0")


def main():
    if not BIN or not os.access(BIN, os.X_OK):
        print("FAIL  the slicewarden program is given (argument or SW_SLICEWARDEN): %r" % BIN)
        return 1
    t0 = time.monotonic()
    root = tempfile.mkdtemp(prefix="sw-cli-")
    try:
        print("--- simulate")
        plain, truth = simulate(root, "plain", [])
        check(len(dicom_files(plain)) == 11, "simulate: 11 files for the T1 series")
        ref = section("plain T1 series", test_plain, plain, truth)
        if ref:
            section("rearranged copies", test_variants, root, ref)
            section("DCMTK conversions", test_conversions, root, plain, ref)
        section("T2 double echo", test_t2, root)
        section("annotated PNGs", test_png, root, plain, ref)
        section("thick slice", test_thick, root)
        section("bad input", test_bad, root, plain)
        section("usage", test_usage, plain)
    except Exception as e:
        check(False, "the test ran to the end", "%s: %s" % (type(e).__name__, e))
    finally:
        keep = FAILED or os.environ.get("SW_KEEP_TMP")
        if keep:
            print("files kept in " + root)
        else:
            shutil.rmtree(root, ignore_errors=True)
    print("%d checks, %d failed, %.1f s" % (COUNT[0], len(FAILED), time.monotonic() - t0))
    for f in FAILED:
        print("  failed: " + f)
    return 1 if FAILED else 0


if __name__ == "__main__":
    sys.exit(main())
