#!/usr/bin/python3
"""compare_pydicom.py: check what slicewarden's DICOM reader returned against pydicom's reading.

Usage: compare_pydicom.py MANIFEST.json
       compare_pydicom.py --make-enhanced OUT.dcm

The manifest (written by test_dicom.c) lists DICOM files, each with the attributes our reader
returned per frame and a raw float32 dump of the rescaled pixels. This script reads every file
with pydicom (Debian's python3-pydicom, with python3-gdcm for JPEG and JPEG-LS), looks the same
attributes up on its own (functional groups per PS3.3 C.7.6.16: per-frame item, then shared
item, then top level) and compares. Exit status 0 when everything agrees, 1 otherwise; one line
per disagreement, and a closing 'N passed, N failed' line.
"""
import json
import math
import sys
import warnings

import numpy as np
import pydicom
from pydicom.tag import Tag

warnings.simplefilter("ignore")

EFFECTIVE_ECHO_TIME = Tag(0x0018, 0x9082)


def fg_value(ds, frame, macro, keyword):
    """Value of keyword inside functional group macro for a frame (0-based), else top level."""
    for groups in ("PerFrameFunctionalGroupsSequence", "SharedFunctionalGroupsSequence"):
        seq = ds.get(groups)
        if not seq:
            continue
        item = seq[frame] if groups.startswith("PerFrame") else seq[0]
        m = item.get(macro)
        if m and len(m) > 0 and keyword in m[0] and m[0][keyword].value not in (None, ""):
            return m[0][keyword].value
    if keyword in ds and ds[keyword].value not in (None, ""):
        return ds[keyword].value
    return None


def echo_number(ds, frame):
    """Enhanced: the dimension index value of the EffectiveEchoTime dimension; classic: EchoNumbers."""
    dims = ds.get("DimensionIndexSequence")
    if dims and "PerFrameFunctionalGroupsSequence" in ds:
        for j, d in enumerate(dims):
            if Tag(d.DimensionIndexPointer) == EFFECTIVE_ECHO_TIME:
                fc = ds.PerFrameFunctionalGroupsSequence[frame].FrameContentSequence[0]
                return int(fc.DimensionIndexValues[j])
    v = ds.get("EchoNumbers")
    if v is None or v == "":
        return 1
    if isinstance(v, pydicom.multival.MultiValue):
        v = v[0]
    return int(v)


def floats(v):
    if v is None:
        return None
    if isinstance(v, (list, pydicom.multival.MultiValue)):
        return [float(x) for x in v]
    return [float(v)]


class Checker:
    def __init__(self):
        self.passed = 0
        self.failed = 0

    def check(self, ok, what):
        if ok:
            self.passed += 1
        else:
            self.failed += 1
            print("MISMATCH " + what)

    def close_nums(self, name, ours, theirs, rel=1e-9):
        if theirs is None:
            self.check(ours is None, f"{name}: pydicom has none, ours {ours}")
            return
        ok = ours is not None and len(ours) == len(theirs) and all(
            abs(a - b) <= rel * max(1.0, abs(b)) for a, b in zip(ours, theirs))
        self.check(ok, f"{name}: ours {ours}, pydicom {theirs}")


def num_or_none(x):
    return None if x is None or (isinstance(x, float) and math.isnan(x)) else x


def compare(entry, c):
    path = entry["dicom"]
    ds = pydicom.dcmread(path)
    frames = entry["frames"]
    nf = int(ds.get("NumberOfFrames", 1) or 1)
    c.check(len(frames) == nf, f"{path}: {len(frames)} frames, pydicom {nf}")
    tsuid = str(ds.file_meta.TransferSyntaxUID) if "TransferSyntaxUID" in ds.file_meta else None
    arr = ds.pixel_array.astype(np.float64)
    if nf == 1 and arr.ndim == 2:
        arr = arr[np.newaxis]
    raw = np.fromfile(entry["raw"], dtype="<f4")
    rows, cols = int(ds.Rows), int(ds.Columns)
    c.check(raw.size == nf * rows * cols, f"{path}: raw dump has {raw.size} values")
    if raw.size != nf * rows * cols:
        return
    raw = raw.reshape(nf, rows, cols).astype(np.float64)
    tol = float(entry.get("pixel_tol", 0.0))
    for i, fr in enumerate(frames):
        tag = f"{path} frame {i + 1}"
        for key, kw in (("sop_class_uid", "SOPClassUID"), ("sop_instance_uid", "SOPInstanceUID"),
                        ("study_instance_uid", "StudyInstanceUID"),
                        ("series_instance_uid", "SeriesInstanceUID"),
                        ("frame_of_reference_uid", "FrameOfReferenceUID"),
                        ("modality", "Modality")):
            theirs = str(ds.get(kw, "") or "")
            c.check(fr[key] == theirs, f"{tag}: {key} ours '{fr[key]}', pydicom '{theirs}'")
        if tsuid:
            c.check(fr["transfer_syntax_uid"] == tsuid,
                    f"{tag}: transfer syntax ours {fr['transfer_syntax_uid']}, pydicom {tsuid}")
        c.check(fr["rows"] == rows and fr["columns"] == cols, f"{tag}: size")
        c.close_nums(f"{tag}: ImagePositionPatient", fr.get("ipp"),
                     floats(fg_value(ds, i, "PlanePositionSequence", "ImagePositionPatient")))
        c.close_nums(f"{tag}: ImageOrientationPatient", fr.get("iop"),
                     floats(fg_value(ds, i, "PlaneOrientationSequence", "ImageOrientationPatient")))
        c.close_nums(f"{tag}: PixelSpacing", fr.get("pixel_spacing"),
                     floats(fg_value(ds, i, "PixelMeasuresSequence", "PixelSpacing")))
        st = fg_value(ds, i, "PixelMeasuresSequence", "SliceThickness")
        ours_st = num_or_none(fr.get("slice_thickness_mm"))
        c.close_nums(f"{tag}: SliceThickness", None if ours_st is None else [ours_st], floats(st))
        c.check(fr["echo_number"] == echo_number(ds, i),
                f"{tag}: echo number ours {fr['echo_number']}, pydicom {echo_number(ds, i)}")
        te = fg_value(ds, i, "MREchoSequence", "EffectiveEchoTime")
        if te is None:
            te = ds.get("EchoTime")
        ours_te = num_or_none(fr.get("echo_time_ms"))
        c.close_nums(f"{tag}: echo time", None if ours_te is None else [ours_te],
                     floats(te if te != "" else None))
        slope = fg_value(ds, i, "PixelValueTransformationSequence", "RescaleSlope")
        icept = fg_value(ds, i, "PixelValueTransformationSequence", "RescaleIntercept")
        slope = 1.0 if slope is None else float(slope)
        icept = 0.0 if icept is None else float(icept)
        c.close_nums(f"{tag}: rescale", [fr["rescale_slope"], fr["rescale_intercept"]],
                     [slope, icept])
        for key in entry.get("text", []):
            kw = {"patient_name": "PatientName", "institution": "InstitutionName",
                  "station_name": "StationName", "series_description": "SeriesDescription"}[key]
            theirs = str(ds.get(kw, "") or "")
            c.check(fr[key] == theirs, f"{tag}: {key} ours '{fr[key]}', pydicom '{theirs}'")
        expect = arr[i] * slope + icept
        diff = np.abs(raw[i] - expect)
        limit = tol + 1e-6 * np.maximum(1.0, np.abs(expect))
        bad = int(np.count_nonzero(diff > limit))
        c.check(bad == 0, f"{tag}: {bad} pixels differ (max {diff.max():.6g}, tolerance {tol})")


def make_enhanced(path):
    """Writes, with pydicom, an Enhanced MR file laid out unlike ours: the echo dimension first,
    pixel measures and rescale per frame, orientation shared, timing at the top of the shared
    item, 2 echoes x 2 positions in echo-major order, signed 16-bit pixels."""
    from pydicom.dataset import Dataset, FileMetaDataset
    from pydicom.sequence import Sequence
    from pydicom.uid import ExplicitVRLittleEndian, generate_uid

    rows, cols, n = 6, 5, 4
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = "1.2.840.10008.5.1.4.1.1.4.1"
    meta.MediaStorageSOPInstanceUID = generate_uid(prefix="2.25.")
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds = Dataset()
    ds.file_meta = meta
    ds.preamble = b"\0" * 128
    ds.is_little_endian = True
    ds.is_implicit_VR = False
    ds.SOPClassUID = meta.MediaStorageSOPClassUID
    ds.SOPInstanceUID = meta.MediaStorageSOPInstanceUID
    ds.StudyInstanceUID = generate_uid(prefix="2.25.")
    ds.SeriesInstanceUID = generate_uid(prefix="2.25.")
    ds.FrameOfReferenceUID = generate_uid(prefix="2.25.")
    ds.Modality = "MR"
    ds.StationName = "ALDMR3"
    ds.Manufacturer = "Slicewarden Simulator"
    ds.ManufacturerModelName = "SW-SIM 3T"
    ds.MagneticFieldStrength = 3
    ds.NumberOfFrames = n
    ds.Rows, ds.Columns = rows, cols
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.BitsAllocated, ds.BitsStored, ds.HighBit, ds.PixelRepresentation = 16, 16, 15, 1
    ds.DimensionIndexSequence = Sequence()
    for ptr, grp in ((0x00189082, 0x00189114), (0x00209057, 0x00209111)):
        d = Dataset()
        d.DimensionIndexPointer = ptr
        d.FunctionalGroupPointer = grp
        ds.DimensionIndexSequence.append(d)
    shared = Dataset()
    po = Dataset()
    po.ImageOrientationPatient = [0, 1, 0, 0, 0, -1]
    shared.PlaneOrientationSequence = Sequence([po])
    tim = Dataset()
    tim.RepetitionTime = 1200
    tim.FlipAngle = 70
    shared.MRTimingAndRelatedParametersSequence = Sequence([tim])
    ds.SharedFunctionalGroupsSequence = Sequence([shared])
    ds.PerFrameFunctionalGroupsSequence = Sequence()
    pix = []
    for i in range(n):
        echo, pos = i // 2 + 1, i % 2 + 1
        f = Dataset()
        fc = Dataset()
        fc.InStackPositionNumber = pos
        fc.DimensionIndexValues = [echo, pos]
        f.FrameContentSequence = Sequence([fc])
        pp = Dataset()
        pp.ImagePositionPatient = [-3.5 + 7.0 * pos, -120.25, 88.0]
        f.PlanePositionSequence = Sequence([pp])
        pm = Dataset()
        pm.PixelSpacing = [1.5, 1.25]
        pm.SliceThickness = 3
        f.PixelMeasuresSequence = Sequence([pm])
        me = Dataset()
        me.EffectiveEchoTime = 15.0 * echo
        f.MREchoSequence = Sequence([me])
        pv = Dataset()
        pv.RescaleSlope = 0.75 + 0.5 * i
        pv.RescaleIntercept = -2.25 * i
        pv.RescaleType = "US"
        f.PixelValueTransformationSequence = Sequence([pv])
        ds.PerFrameFunctionalGroupsSequence.append(f)
        pix.append((np.arange(rows * cols, dtype=np.int16) * (i + 3) - 40).reshape(rows, cols))
    ds.PixelData = np.stack(pix).astype("<i2").tobytes()
    ds.save_as(path, write_like_original=False)


def main():
    if len(sys.argv) == 3 and sys.argv[1] == "--make-enhanced":
        make_enhanced(sys.argv[2])
        return 0
    with open(sys.argv[1], encoding="utf-8") as fp:
        manifest = json.load(fp)
    c = Checker()
    for entry in manifest:
        try:
            compare(entry, c)
        except Exception as exc:  # a file pydicom cannot read counts as a failure, named
            c.check(False, f"{entry['dicom']}: pydicom failed: {exc!r}")
    print(f"{c.passed} passed, {c.failed} failed")
    return 0 if c.failed == 0 and c.passed > 0 else 1


if __name__ == "__main__":
    sys.exit(main())
