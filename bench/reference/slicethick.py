#!/usr/bin/python3
"""slicethick.py: an independent reference measurement of slice thickness (crossed 10:1 ramps) and
slice position (crossed 45-degree wedges) on the large ramp-and-wedge phantom, written the way a
physicist's in-house script would be: pydicom to read, numpy for every pixel operation (no Python
loop over pixels), the same method as docs/methods.md in simplified form.

Method (docs/methods.md and ../shared/phantom-large.md give the geometry and the formulas):
  1. images grouped by SeriesInstanceUID and EchoNumbers, sorted along the slice normal
     (ImagePositionPatient . (row x column));
  2. phantom: Otsu threshold (Otsu 1979), the edge of the disc on every row at the threshold,
     linearly interpolated, an algebraic circle fit (Kasa 1976) with outliers (the bridge) dropped;
  3. slice 1 is the end of the stack with the dark thickness insert at its centre; the other end is
     the second wedge slice;
  4. rotation from the insert's two long edges (half the fluid level, lines fitted over 100 mm);
  5. the strips: the across-insert mean profile's peaks above and below the middle; each strip's
     profile along u every 0.1 mm, averaged across the central 80 % of its width (bilinear samples);
     the plateau a quadratic fit over the middle 60 %, the half level half the plateau (the ACR
     convention, the true zero), each crossing refined by a local cubic fit over +-3 mm;
     T = 0.2 a b / (a + b) (ACR guidance) and the tilt-corrected form (AAPM Report 100);
  6. the wedges on slices 1 and 11: the bars' columns 4 mm below the bridge, a profile down each bar
     (central 40 % of its width), its end where it crosses half the fluid's signal, the common top
     the median of the bridge's lower edge on 16 columns beside the bars; BLD = right - left.

Only the standard axial orientation (ImageOrientationPatient 1\\0\\0\\0\\1\\0) is handled, as in
most in-house scripts; anything else is refused with the reason.

Output: one JSON object per line per series and echo on stdout; errors on stderr (exit 1 when any
series could not be measured, 2 on a usage error).
"""
import json
import os
import sys
import time

import numpy as np
import pydicom

TAN_THETA = 0.1  # the 10:1 ramps (phantom-large.md)


class Unmeasurable(Exception):
    pass


def read_series(paths):
    """{(series uid, echo): [(position along the normal, dataset, float pixels)]}."""
    groups = {}
    for p in paths:
        try:
            ds = pydicom.dcmread(p)
        except Exception as e:  # not DICOM (truth.json and the like): skipped, as analyze does
            print(f"slicethick: {p}: skipped ({e.__class__.__name__})", file=sys.stderr)
            continue
        if "PixelData" not in ds:
            continue
        iop = np.array([float(x) for x in ds.ImageOrientationPatient])
        ipp = np.array([float(x) for x in ds.ImagePositionPatient])
        px = ds.pixel_array.astype(np.float32)
        slope = float(getattr(ds, "RescaleSlope", 1.0) or 1.0)
        icpt = float(getattr(ds, "RescaleIntercept", 0.0) or 0.0)
        if slope != 1.0 or icpt != 0.0:
            px = px * slope + icpt
        echo = int(getattr(ds, "EchoNumbers", 1) or 1)
        z = float(np.dot(ipp, np.cross(iop[:3], iop[3:])))
        groups.setdefault((ds.SeriesInstanceUID, echo), []).append((z, ds, px, iop))
    for k in groups:
        groups[k].sort(key=lambda t: t[0])
    return groups


def otsu(img):
    hist, edges = np.histogram(img, bins=256)
    mids = 0.5 * (edges[:-1] + edges[1:])
    w0 = np.cumsum(hist)
    w1 = w0[-1] - w0
    m0 = np.cumsum(hist * mids)
    mu0 = m0 / np.maximum(w0, 1)
    mu1 = (m0[-1] - m0) / np.maximum(w1, 1)
    between = w0 * w1 * (mu0 - mu1) ** 2
    return mids[np.argmax(between)]


def find_disc(img, dx):
    """Centre (column, row) in pixels and radius in mm of the phantom."""
    thr = otsu(img)
    mask = img > thr
    rows = np.nonzero(mask.sum(axis=1) >= 3)[0]
    if rows.size < 20:
        raise Unmeasurable("phantom not found")
    sub = mask[rows]
    first = np.argmax(sub, axis=1)
    last = sub.shape[1] - 1 - np.argmax(sub[:, ::-1], axis=1)
    ok = (first > 0) & (last < sub.shape[1] - 1)
    rows, first, last = rows[ok], first[ok], last[ok]
    # sub-pixel: the threshold crossing between the last air pixel and the first phantom pixel
    a0, a1 = img[rows, first - 1], img[rows, first]
    xl = first - 1 + (thr - a0) / np.maximum(a1 - a0, 1e-6)
    b0, b1 = img[rows, last], img[rows, last + 1]
    xr = last + (b0 - thr) / np.maximum(b0 - b1, 1e-6)
    x = np.concatenate([xl, xr])
    y = np.concatenate([rows, rows]).astype(float)
    keep = np.ones(x.size, bool)
    for _ in range(3):
        A = np.column_stack([x[keep], y[keep], np.ones(keep.sum())])
        c = np.linalg.lstsq(A, x[keep] ** 2 + y[keep] ** 2, rcond=None)[0]
        cx, cy = c[0] / 2, c[1] / 2
        rad = np.sqrt(c[2] + cx * cx + cy * cy)
        res = np.abs(np.hypot(x - cx, y - cy) - rad)
        keep = res < max(3 * 1.4826 * np.median(res[keep]), 0.3)
    return cx, cy, rad * dx


def bilinear(img, col, row):
    """Bilinear samples of img at (col, row) arrays of any shape (points outside: clamped)."""
    h, w = img.shape
    col = np.clip(col, 0, w - 1.000001)
    row = np.clip(row, 0, h - 1.000001)
    c0 = np.floor(col).astype(np.intp)
    r0 = np.floor(row).astype(np.intp)
    fc = col - c0
    fr = row - r0
    return ((img[r0, c0] * (1 - fc) + img[r0, c0 + 1] * fc) * (1 - fr)
            + (img[r0 + 1, c0] * (1 - fc) + img[r0 + 1, c0 + 1] * fc) * fr)


class Pose:
    """Phantom frame (u right, v up, mm) to stored pixels: standard axial orientation."""

    def __init__(self, cx, cy, rot_deg, dx, dy):
        self.cx, self.cy, self.dx, self.dy = cx, cy, dx, dy
        self.set_rotation(rot_deg)

    def set_rotation(self, rot_deg):
        self.rot = rot_deg
        t = np.radians(rot_deg)
        self.c, self.s = np.cos(t), np.sin(t)

    def sample(self, img, u, v):
        a = u * self.c - v * self.s
        b = u * self.s + v * self.c
        return bilinear(img, self.cx + a / self.dx, self.cy - b / self.dy)


def first_below(prof, level):
    """Index of the first sample below level along the last axis, and whether there is one."""
    below = prof < level
    return np.argmax(below, axis=-1), below.any(axis=-1)


def walk_crossing(x, p, level, start, step):
    """From index start, walking by step (+1/-1), the linearly interpolated crossing of level by
    the profile p (sampled at x), taken from the first sample on the other side."""
    side = p[start] > level
    idx = np.arange(start, len(p) if step > 0 else -1, step)
    other = (p[idx] > level) != side
    if not other.any():
        return np.nan
    k = idx[np.argmax(other)]
    j = k - step
    t = (level - p[j]) / (p[k] - p[j])
    return x[j] + t * (x[k] - x[j])


def refine_crossing(x, p, level, guess, half_window):
    """A local least-squares cubic over guess +- half_window; the root nearest the guess."""
    for _ in range(3):
        sel = np.abs(x - guess) <= half_window
        if sel.sum() < 8:
            return guess
        xs = x[sel] - guess
        coef = np.polyfit(xs, p[sel] - level, 3)
        roots = np.roots(coef)
        roots = roots[np.abs(roots.imag) < 1e-9].real
        roots = roots[np.abs(roots) <= half_window]
        if roots.size == 0:
            return guess
        new = guess + roots[np.argmin(np.abs(roots))]
        if abs(new - guess) < 0.05:
            return new
        guess = new
    return guess


def fluid_level(img, pose, r_mm):
    """The mean fluid signal in a disc of 0.4 R below the insert (slice 1) or at the centre."""
    g = np.linspace(-0.4 * r_mm, 0.4 * r_mm, 41)
    u, v = np.meshgrid(g, g - 0.45 * r_mm)
    inside = np.hypot(u, v + 0.45 * r_mm) <= 0.4 * r_mm
    vals = pose.sample(img, u[inside], v[inside])
    return float(np.median(vals))


def measure_rotation(img, pose, fluid):
    """The insert's long edges: rotation refined three times, degrees."""
    us = np.arange(-50.0, 50.01, 4.0)
    vs = np.arange(-20.0, 20.01, 0.25)
    level = fluid / 2
    for _ in range(3):
        U, V = np.meshgrid(us, vs, indexing="ij")
        prof = pose.sample(img, U, V)  # (columns, v samples), v from -20 up to +20
        # top edge: walking down from v = +20; bottom edge: walking up from v = -20
        kt, okt = first_below(prof[:, ::-1], level)
        kb, okb = first_below(prof, level)
        ok = okt & okb & (kt > 0) & (kb > 0)
        if ok.sum() < 8:
            raise Unmeasurable("thickness insert not found")
        n = len(vs)
        it = n - 1 - kt  # index of the first sample below the level from the top
        p_hi, p_lo = prof[np.arange(len(us)), it + 1], prof[np.arange(len(us)), it]
        vt = vs[it] + 0.25 * (level - p_lo) / np.where(p_hi != p_lo, p_hi - p_lo, 1)
        ib = kb
        q_lo, q_hi = prof[np.arange(len(us)), ib - 1], prof[np.arange(len(us)), ib]
        vb = vs[ib - 1] + 0.25 * (level - q_lo) / np.where(q_hi != q_lo, q_hi - q_lo, 1)
        st = np.polyfit(us[ok], vt[ok], 1)[0]
        sb = np.polyfit(us[ok], vb[ok], 1)[0]
        pose.set_rotation(pose.rot + np.degrees(np.arctan(0.5 * (st + sb))))
    return pose.rot


def measure_strip(img, pose, v_centre, width):
    """FWHM length (mm) of the strip centred at v_centre."""
    x = np.arange(-68.0, 68.0001, 0.1)
    offs = np.linspace(-0.4 * width, 0.4 * width, 9)
    U, V = np.meshgrid(x, v_centre + offs, indexing="ij")
    prof = pose.sample(img, U, V).mean(axis=1)
    # first pass: a 4 mm running mean, the peak, half of it, crossings walked from the peak
    k = 41
    smooth = np.convolve(prof, np.ones(k) / k, mode="same")
    mid = np.abs(x) <= 55
    peak = np.argmax(np.where(mid, smooth, -np.inf))
    lo = walk_crossing(x, smooth, smooth[peak] / 2, peak, -1)
    hi = walk_crossing(x, smooth, smooth[peak] / 2, peak, +1)
    if not (np.isfinite(lo) and np.isfinite(hi)):
        raise Unmeasurable("strip runs into the end of the insert")
    # plateau: quadratic over the middle 60 %, at the centre
    c = 0.5 * (lo + hi)
    sel = np.abs(x - c) <= 0.3 * (hi - lo)
    plateau = float(np.polyval(np.polyfit(x[sel] - c, prof[sel], 2), 0.0))
    level = plateau / 2
    lo = walk_crossing(x, smooth, level, int(np.argmin(np.abs(x - c))), -1)
    hi = walk_crossing(x, smooth, level, int(np.argmin(np.abs(x - c))), +1)
    lo = refine_crossing(x, prof, level, lo, 3.0)
    hi = refine_crossing(x, prof, level, hi, 3.0)
    if lo < -65.5 or hi > 65.5:
        raise Unmeasurable("strip runs into the end of the insert")
    return hi - lo, 0.5 * (lo + hi)


def find_strips(img, pose):
    """v centres and widths (mm) of the top and bottom strips."""
    vs = np.arange(-8.5, 8.501, 0.1)
    us = np.arange(-50.0, 50.01, 0.5)
    U, V = np.meshgrid(us, vs, indexing="ij")
    across = pose.sample(img, U, V).mean(axis=0)
    out = []
    for side in (vs > 0.3, vs < -0.3):
        idx = np.nonzero(side)[0]
        k = idx[np.argmax(across[idx])]
        half = 0.5 * (across[k] + np.median(across))  # halfway to the insert's dark interior
        lo = walk_crossing(vs, across, half, k, -1)
        hi = walk_crossing(vs, across, half, k, +1)
        if not (np.isfinite(lo) and np.isfinite(hi)):
            raise Unmeasurable("strip not found")
        out.append((0.5 * (lo + hi), hi - lo))
    return out


def measure_bars(img, pose, fluid):
    """(left bar, right bar, bar length difference) in mm on a wedge slice."""
    level = fluid / 2
    # the bars across, 4 mm below the bridge's nominal lower edge at v = 80
    ua = np.arange(-12.0, 12.001, 0.1)
    Ua, Va = np.meshgrid(ua, 76.0 + np.linspace(-0.5, 0.5, 5), indexing="ij")
    across = pose.sample(img, Ua, Va).mean(axis=1)
    centres = []
    for sign in (-1, +1):
        start = int(np.argmin(np.abs(ua - sign * 12.0)))
        outer = walk_crossing(ua, across, level, start, -sign)
        gap = np.abs(ua) <= 1.5
        g = np.nonzero(gap)[0][np.argmax(across[gap])]
        inner = walk_crossing(ua, across, level, g, sign)
        if not np.isfinite(inner) or across[g] < level:
            inner = ua[g]
        if not np.isfinite(outer):
            raise Unmeasurable("bars not found")
        centres.append(0.5 * (outer + inner))
    # the common top: the bridge's lower edge on 8 columns beside each bar
    cols = np.concatenate([-np.arange(7.0, 14.01, 1.0), np.arange(7.0, 14.01, 1.0)])
    vt = np.arange(66.0, 90.001, 0.1)
    Ut, Vt = np.meshgrid(cols, vt, indexing="ij")
    Ut = Ut[:, :, None] + np.linspace(-0.4, 0.4, 5)[None, None, :]
    top_prof = pose.sample(img, Ut, np.broadcast_to(Vt[:, :, None], Ut.shape)).mean(axis=2)
    tops = np.array([refine_crossing(vt, p, level, walk_crossing(vt, p, level, 0, +1), 1.0)
                     for p in top_prof])
    tops = tops[np.isfinite(tops)]
    if tops.size < 8:
        raise Unmeasurable("bridge not found")
    top = float(np.median(tops))
    # each bar down its centre line, central 40 % of its 5 mm width
    vd = np.arange(top - 1.0, top - 45.0, -0.1)
    lengths = []
    for uc in centres:
        Ud, Vd = np.meshgrid(uc + np.linspace(-1.0, 1.0, 11), vd, indexing="ij")
        prof = pose.sample(img, Ud, Vd).mean(axis=0)
        guess = walk_crossing(vd, prof, level, 0, +1)
        if not np.isfinite(guess):
            raise Unmeasurable("bar end not found")
        end = refine_crossing(vd, prof, level, guess, 2.0)
        lengths.append(top - end)
    left, right = lengths
    return left, right, right - left


def corrected_thickness(a, b, tan_phi):
    """Tilt-corrected crossed-ramp thickness (AAPM Report 100; phantom-large.md's form)."""
    s = a + b
    return (-s + np.sqrt(s * s + 4 * a * b * tan_phi * tan_phi)) / (2 * tan_phi)


def measure(stack):
    z, ds0, _, iop = stack[0]
    if np.max(np.abs(iop - np.array([1, 0, 0, 0, 1, 0]))) > 1e-3:
        raise Unmeasurable("only the standard axial orientation is handled")
    dy, dx = (float(x) for x in ds0.PixelSpacing)
    ends = [stack[0], stack[-1]]
    fits = []
    dark = []
    for (_, _, img, _) in ends:
        cx, cy, r = find_disc(img, dx)
        pose = Pose(cx, cy, 0.0, dx, dy)
        f = fluid_level(img, pose, r)
        g = np.linspace(-40, 40, 81)
        U, V = np.meshgrid(g, np.linspace(-4, 4, 9))
        dark.append(float(np.mean(pose.sample(img, U, V))) / f)
        fits.append((pose, f, r))
    if min(dark) > 0.5:
        raise Unmeasurable("ramp slice not found")
    if dark[1] < dark[0]:  # slice 1 is the end with the insert
        ends.reverse()
        fits.reverse()
    img1, img11 = ends[0][2], ends[1][2]
    (pose1, f1, r1), (pose11, f11, _) = fits
    rot = measure_rotation(img1, pose1, f1)
    pose11.set_rotation(rot)
    (vt, wt), (vb, wb) = find_strips(img1, pose1)
    a, ut = measure_strip(img1, pose1, vt, wt)
    b, ub = measure_strip(img1, pose1, vb, wb)
    acr = 2 * TAN_THETA * a * b / (a + b)
    tan_phi = np.tan(2 * np.arctan(TAN_THETA))
    corr = corrected_thickness(a, b, tan_phi)
    out = {
        "series_instance_uid": ds0.SeriesInstanceUID,
        "echo_number": int(getattr(ds0, "EchoNumbers", 1) or 1),
        "images": len(stack),
        "rotation_deg": rot,
        "radius_mm": r1,
        "top_mm": a,
        "bottom_mm": b,
        "acr_mm": acr,
        "corrected_mm": corr,
        "tilt_deg": np.degrees(np.arctan(corr / a) - np.arctan(TAN_THETA)),
        "ramp_displacement_mm": (ut - ub) * corr / (a + b),
    }
    for name, img, pose, f in (("slice1", img1, pose1, f1), ("slice11", img11, pose11, f11)):
        left, right, bld = measure_bars(img, pose, f)
        out[name] = {"left_bar_mm": left, "right_bar_mm": right, "bar_difference_mm": bld}
    return out


def expand(args):
    for a in args:
        if os.path.isdir(a):
            for root, dirs, files in os.walk(a):
                dirs.sort()
                for f in sorted(files):
                    yield os.path.join(root, f)
        else:
            yield a


def main(argv):
    if len(argv) < 2 or argv[1] in ("-h", "--help"):
        print("usage: slicethick.py PATH...  (files or folders; one JSON line per series and echo)",
              file=sys.stderr)
        return 2
    bad = n = 0
    t_read = t_measure = 0.0
    for arg in argv[1:]:  # one argument at a time, so memory stays that of one folder
        t0 = time.perf_counter()
        groups = read_series(list(expand([arg])))
        t_read += time.perf_counter() - t0
        for key in sorted(groups):
            t1 = time.perf_counter()
            n += 1
            try:
                res = measure(groups[key])
            except Unmeasurable as e:
                print(f"slicethick: series {key[0]} echo {key[1]}: {e}", file=sys.stderr)
                bad += 1
                continue
            res["measure_s"] = time.perf_counter() - t1
            t_measure += res["measure_s"]
            print(json.dumps(res, default=float))
    print(f"slicethick: {n} series-echoes, read {t_read:.3f} s, measured {t_measure:.3f} s",
          file=sys.stderr)
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
