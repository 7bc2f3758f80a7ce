#!/usr/bin/python3
"""xsim: an independent renderer of the large ramp-and-wedge phantom (numpy and pydicom only).

Written from the team's phantom description (shared/phantom-large.md) alone, sharing no code or
constants with sim/ or analysis/: a perturbed phantom with the extra structures real phantoms have,
a pose, a slice profile integrated along the normal, k-space cropping (Gibbs), optional k-space
filters and zero-filled interpolation, receive shading, Rician noise, vendor-like DICOM, and the
truth of every case in truth.json.

    xsim.py render OUTDIR --seed N [--snr X] [--profile K] [--fwhm MM] [--series t1|t2] ...
    xsim.py selfcheck [--workdir DIR]

Sign conventions (phantom-large.md, each defined by its effect on the image): plan frame x = image
right, y = image up, z = along the slice normal toward slice 11. A phantom point q = (u, v, w) sits at
p = t + Rz(rot) Ry(tilt) Rx(pitch) q, t = (du, dv, 0):
  Rz(a): (u, v) -> (u cos a - v sin a, u sin a + v cos a)          counter-clockwise as displayed
  Ry(b): (u, w) -> (u cos b + w sin b, -u sin b + w cos b)         top ramp slope 0.1 -> tan(atan 0.1 - b)
  Rx(c): (v, w) -> (v cos c - w sin c, v sin c + w cos c)          anterior side toward slice 11
"""

import argparse
import json
import math
import os
import sys

import numpy as np

THETA = math.atan(0.1)          # 10:1 ramps (phantom-large.md; the ACR guidance's ramp slope)
SLICES = 11
GAP = 10.0                      # mm between slice centres; slices 1 and 11 on the wedge vertices
WEDGE_VERTICES = (0.0, 100.0)

# ----------------------------------------------------------------------------------------------
# Case parameters, all drawn from one seeded Generator


def draw_case(seed, over=None):
    """Every parameter of one case as a JSON-serialisable dict. `over` replaces drawn values."""
    over = over or {}
    g = np.random.default_rng([int(seed), 0x78511])
    U = g.uniform
    c = {'seed': int(seed)}
    c['series'] = 't2' if g.random() < 0.35 else 't1'

    # -- phantom as manufactured (dimensions differ from the description by millimetres)
    R = 95.0 + U(-1, 1)
    geo = {'radius': R, 'cyl_w0': -24.0 + U(-1, 1), 'cyl_w1': 124.0 + U(-1, 1)}
    geo['block'] = [-70.0 + U(-2, 2), 70.0 + U(-2, 2), -10.0 + U(-1, 1), 10.0 + U(-1, 1),
                    -12.0 + U(-1.5, 1.5), 12.0 + U(-1.5, 1.5)]
    geo['slot_mm'] = U(0.8, 1.2)
    geo['top_v'] = [1.5 + U(-0.4, 0.4), 5.5 + U(-0.4, 0.4)]
    geo['bottom_v'] = [-5.5 + U(-0.4, 0.4), -1.5 + U(-0.4, 0.4)]
    wedges = []
    for wv in WEDGE_VERTICES:
        half = 15.0 + U(-1, 1)
        vt = 80.0 + U(-1, 1)
        lu0, lu1 = -6.0 + U(-1, 1), -1.0 + U(-0.5, 0.4)
        ru0, ru1 = 1.0 + U(-0.4, 0.5), 6.0 + U(-1, 1)
        wedges.append({'w_v': wv, 'bridge_u': [-half + U(-0.5, 0.5), half + U(-0.5, 0.5)],
                       'bar_top_v': vt, 'L0': 15.0 + U(-1, 1), 'w_half': 12.0 + U(-1, 1),
                       'left_u': [lu0, lu1], 'right_u': [ru0, ru1]})
    geo['wedges'] = wedges
    # extra structures
    geo['resolution'] = None
    if g.random() < 0.8:
        vc = U(-40, -30)
        geo['resolution'] = {'v_c': vc, 'u_half': U(28, 36), 'v_half': U(6, 9),
                             'w': [-U(5, 7), U(5, 7)], 'diam': [1.1, 1.0, 0.9]}
    extras = {}
    for k in range(3, 10):
        if g.random() < 0.4:
            kind = ['discs', 'grid', 'lowcontrast'][g.integers(3)]
            wk = GAP * (k - 1)
            e = {'kind': kind, 'w_c': wk + U(-0.5, 0.5)}
            if kind == 'discs':
                discs = []
                for _ in range(80):
                    if len(discs) >= int(g.integers(3, 8)):
                        break
                    r = U(2, 6)
                    rho, ang = U(0, 70 - r), U(0, 2 * math.pi)
                    uc, vc = rho * math.cos(ang), rho * math.sin(ang)
                    if all(math.hypot(uc - d[0], vc - d[1]) > r + d[2] + 2 for d in discs):
                        discs.append([uc, vc, r])
                e['discs'] = discs
                e['w_half'] = U(2, 4)
            elif kind == 'grid':
                e['half'] = U(35, 55)
                e['pitch'] = U(10, 15)
                e['wall'] = U(1, 2)
                e['w_half'] = U(1.5, 3)
            else:
                e['radius'] = U(45, 60)
                e['w_half'] = U(0.5, 1.0)
                e['turn'] = U(0, 2 * math.pi)
            extras[str(k)] = e
    geo['extras'] = extras
    geo['bubble'] = None
    if g.random() < 0.3:
        wa = U(-24, 100)
        geo['bubble'] = {'depth': U(1.5, 5), 'w': [wa, min(124.0, wa + U(20, 150))]}
    c['geometry'] = geo

    # -- slice profile
    kind = ['gauss', 'sinc', 'rect-gauss', 'trapezoid'][g.integers(4)]
    presc = 5.0 if g.random() < 0.7 else float(g.choice([3.0, 4.0, 6.0, 7.0, 8.0]))
    fwhm = float(np.clip(presc * U(0.92, 1.08), 3.0, 8.0))
    prof = {'kind': kind, 'fwhm': fwhm, 'prescribed': presc,
            'tbw': float(g.choice([2.0, 3.0, 4.0, 6.0, 8.0])),
            'blur': U(0.5, 2.0), 'ramp_frac': U(0.15, 0.6)}
    prof['fwhm_echo2'] = float(max(3.0, fwhm * U(0.9, 1.0)))
    c['profile'] = prof

    # -- acquisition
    n = int(g.choice([256, 192, 320, 384, 512], p=[0.55, 0.1, 0.1, 0.1, 0.15]))
    fov = U(220, 260)
    acq = {'matrix': n, 'fov': fov, 'phase_frac': 1.0, 'phase_dir': 'COL',
           'interp2x': bool(n <= 320 and g.random() < 0.25),
           'filter': str(g.choice(['none', 'hamming', 'fermi'], p=[0.4, 0.3, 0.3])),
           'filter_strength': U(0.3, 1.0),
           'snr': float(math.exp(U(math.log(15), math.log(200)))),
           'shading': 0.0 if g.random() < 0.2 else U(0.05, 0.3),
           'coil_elements': int(g.integers(2, 9)), 'coil_seed': int(g.integers(1 << 30)),
           'T2_ms': U(80, 120), 'TE_ms': [20.0, 80.0] if c['series'] == 't2' else [20.0],
           'TR_ms': 2000.0 if c['series'] == 't2' else 500.0}
    if g.random() < 0.2:
        acq['phase_frac'] = float(g.choice([0.75, 0.8125, 0.875]))
        acq['phase_dir'] = str(g.choice(['COL', 'ROW']))
    c['acq'] = acq

    # -- pose and slice position error
    pose = {'rot': U(-5, 5), 'tilt': U(-3, 3), 'pitch': U(-2, 2)}
    rr, aa = 20.0 * math.sqrt(g.random()), U(0, 2 * math.pi)
    pose['du'], pose['dv'] = rr * math.cos(aa), rr * math.sin(aa)
    c['pose'] = pose
    c['position'] = {'offset': U(-3, 3), 'scale_pct': U(-1, 1), 'stack_centre': U(-15, 15)}

    # -- storage
    st = {'bits': 12 if g.random() < 0.6 else 16,
          'rescale': str(g.choice(['none', 'slope', 'slope+intercept'], p=[0.5, 0.25, 0.25])),
          'slope': U(0.5, 2.0), 'intercept': -float(g.integers(1, 200)),
          'level': U(0.25, 0.6), 'explicit': bool(g.random() < 0.5),
          'vendor': int(g.integers(4)), 'feet_first': bool(g.random() < 0.3),
          'iop': str(g.choice(['standard', 'flip-rows', 'flip-columns', 'transposed',
                               'transposed-flipped'], p=[0.6, 0.1, 0.1, 0.1, 0.1])),
          'instances': str(g.choice(['ascending', 'descending'])),
          'echo_major': bool(g.random() < 0.5),
          'names': str(g.choice(['IM', 'hex', 'uid', 'plain'])),
          'enhanced': bool(g.random() < 0.15), 'name_seed': int(g.integers(1 << 30))}
    c['storage'] = st
    c['noise_seed'] = int(g.integers(1 << 62))

    for key, val in over.items():       # "acq.snr": 40 etc.
        d = c
        parts = key.split('.')
        for p in parts[:-1]:
            d = d[p]
        d[parts[-1]] = val
    fix_case(c)
    return c


def fix_case(c):
    """Keep a drawn case physically possible: the phantom inside the FOV with air around it."""
    geo, acq, pose = c['geometry'], c['acq'], c['pose']
    R = geo['radius']
    fov = acq['fov']
    n = acq['matrix']
    need = 2 * (R + 12.0)               # phantom plus air bands on both sides
    if acq['phase_frac'] < 1.0:
        fr = acq['phase_frac']
        # round the phase lines to an even count; drop the rectangular FOV if it cannot hold it
        nph = int(round(n * fr / 2)) * 2
        if nph * fov / n < need:
            acq['phase_frac'] = 1.0
        else:
            acq['phase_frac'] = nph / n
    fx = fov
    fy = fov * acq['phase_frac']
    if acq['phase_dir'] == 'ROW':
        fx, fy = fy, fx
    # offset limited so the phantom (tilt widens it a little) keeps 10 mm of air to the FOV edge
    mx = fx / 2 - R - 13.0
    my = fy / 2 - R - 13.0
    pose['du'] = float(np.clip(pose['du'], -max(mx, 0), max(mx, 0)))
    pose['dv'] = float(np.clip(pose['dv'], -max(my, 0), max(my, 0)))


# ----------------------------------------------------------------------------------------------
# Slice profiles (peak 1, symmetric about 0), sampled finely along the normal

PROFILE_STEP = 0.02   # mm


def fwhm_of(z, p, frac=0.5):
    """Width at `frac` of the peak of |p| between the outermost crossings (linear interpolation)."""
    a = np.abs(p)
    lev = frac * a.max()
    idx = np.nonzero(a >= lev)[0]
    i0, i1 = idx[0], idx[-1]
    zl = z[i0 - 1] + (lev - a[i0 - 1]) * (z[i0] - z[i0 - 1]) / (a[i0] - a[i0 - 1])
    zr = z[i1] + (a[i1] - lev) * (z[i1 + 1] - z[i1]) / (a[i1] - a[i1 + 1])
    return zr - zl


def _shape(kind, x, prof):
    """Unscaled shape on x (arbitrary units), used to find the scale for the wanted FWHM."""
    from scipy.special import erf
    if kind == 'gauss':
        return np.exp(-0.5 * x * x)
    if kind == 'sinc':
        # small-tip slice profile: the Fourier transform of a Hamming-windowed sinc pulse of
        # time-bandwidth product n (pulse on t in [-1/2, 1/2], frequency x in units of 1 / T)
        n = prof['tbw']
        t = np.linspace(-0.5, 0.5, 2001)
        b = (0.54 + 0.46 * np.cos(2 * np.pi * t)) * np.sinc(n * t)
        dt = t[1] - t[0]
        out = np.empty_like(x)
        for i in range(0, x.size, 512):
            xs = x[i:i + 512]
            out[i:i + 512] = (b[None, :] * np.cos(2 * np.pi * xs[:, None] * t[None, :])).sum(1) * dt
        return out
    if kind == 'rect-gauss':
        w, s = prof['_w'], prof['blur'] / (2 * math.sqrt(2 * math.log(2)))
        return 0.5 * (erf((x + w / 2) / (s * math.sqrt(2))) - erf((x - w / 2) / (s * math.sqrt(2))))
    if kind == 'trapezoid':
        a, r = prof['_a'], prof['_r']       # flat top width, ramp width (FWHM = a + r)
        return np.clip((a / 2 + r - np.abs(x)) / r, 0, 1)
    raise ValueError(kind)


def make_profile(prof, fwhm):
    """Return (tau, P) with tau in mm, P peak 1, FWHM of |P| = fwhm."""
    kind = prof['kind']
    p = dict(prof)
    if kind == 'gauss':
        sig = fwhm / (2 * math.sqrt(2 * math.log(2)))
        tau = np.arange(-4 * fwhm, 4 * fwhm + 1e-9, PROFILE_STEP)
        return tau, np.exp(-0.5 * (tau / sig) ** 2)
    if kind == 'rect-gauss':
        from scipy.optimize import brentq
        blur = min(prof['blur'], 0.6 * fwhm)
        p['blur'] = blur
        zz = np.arange(-3 * fwhm, 3 * fwhm, 0.002)

        def err(w):
            p['_w'] = w
            return fwhm_of(zz, _shape(kind, zz, p)) - fwhm
        p['_w'] = brentq(err, 0.05 * fwhm, 1.5 * fwhm, xtol=1e-7)
        tau = np.arange(-3 * fwhm, 3 * fwhm + 1e-9, PROFILE_STEP)
        v = _shape(kind, tau, p)
        return tau, v / v.max()
    if kind == 'trapezoid':
        r = prof['ramp_frac'] * fwhm
        p['_a'], p['_r'] = fwhm - r, r
        tau = np.arange(-fwhm, fwhm + 1e-9, PROFILE_STEP)
        return tau, _shape(kind, tau, p)
    if kind == 'sinc':
        x = np.linspace(-4 * prof['tbw'], 4 * prof['tbw'], 8001)
        y = _shape(kind, x, p)
        y = y / y.max()
        sc = fwhm / fwhm_of(x, y)       # mm per unit of x
        tau = np.arange(-4 * fwhm, 4 * fwhm + 1e-9, PROFILE_STEP)
        v = np.interp(tau / sc, x, y, left=0.0, right=0.0)
        return tau, v / v.max()
    raise ValueError(kind)


class Profile:
    """A profile with its running integral C(tau) (trapezoid rule), for the z-integration."""

    def __init__(self, tau, p):
        self.tau, self.p = tau, p
        self.cum = np.concatenate([[0.0], np.cumsum(0.5 * (p[1:] + p[:-1]) * np.diff(tau))])
        self.total = self.cum[-1]
        self.support = max(-tau[0], tau[-1])
        self.fwhm = fwhm_of(tau, p)
        self.fwtm = fwhm_of(tau, p, 0.1)

    def C(self, x):
        return np.interp(x, self.tau, self.cum, left=0.0, right=self.total)

    def slot_fwhm(self, t):
        """FWHM of what a slot of thickness t (along the normal) shows: P convolved with a box."""
        h = t / 2
        return fwhm_of(self.tau, self.C(self.tau + h) - self.C(self.tau - h))


# ----------------------------------------------------------------------------------------------
# Pose


def rot_matrix(pose):
    a, b, c = (math.radians(pose[k]) for k in ('rot', 'tilt', 'pitch'))
    Rz = np.array([[math.cos(a), -math.sin(a), 0], [math.sin(a), math.cos(a), 0], [0, 0, 1]])
    Ry = np.array([[math.cos(b), 0, math.sin(b)], [0, 1, 0], [-math.sin(b), 0, math.cos(b)]])
    Rx = np.array([[1, 0, 0], [0, math.cos(c), -math.sin(c)], [0, math.sin(c), math.cos(c)]])
    return Rz @ Ry @ Rx


class Pose:
    def __init__(self, pose):
        self.R = rot_matrix(pose)
        self.t = np.array([pose['du'], pose['dv'], 0.0])

    def to_plan(self, q):
        return self.t + self.R @ np.asarray(q, float)

    def to_phantom(self, p):
        return self.R.T @ (np.asarray(p, float) - self.t)


# ----------------------------------------------------------------------------------------------
# Shapes: convex solids in the phantom frame. Along a ray (x, y) of the plan frame the phantom
# coordinates are q(z) = q0 + z d (d = R^T e_z), so each solid occupies one interval of z.

INF = 1e30


class Poly:
    """Intersection of half-spaces n . q <= b (phantom frame), with its bounding box."""

    def __init__(self, planes, box):
        self.planes = [(np.asarray(n, float), float(b)) for n, b in planes]
        self.box = box      # (u0, u1, v0, v1, w0, w1)

    @staticmethod
    def box_(u0, u1, v0, v1, w0, w1, extra=()):
        pl = [((1, 0, 0), u1), ((-1, 0, 0), -u0), ((0, 1, 0), v1), ((0, -1, 0), -v0),
              ((0, 0, 1), w1), ((0, 0, -1), -w0)]
        return Poly(pl + list(extra), (u0, u1, v0, v1, w0, w1))

    def interval(self, q0, d, lo, hi):
        for n, b in self.planes:
            a = float(n @ d)
            c = b - (n[0] * q0[0] + n[1] * q0[1] + n[2] * q0[2])
            if a > 1e-12:
                np.minimum(hi, c / a, out=hi)
            elif a < -1e-12:
                np.maximum(lo, c / a, out=lo)
            else:
                lo[c < 0] = INF


class ZCyl:
    """Circular cylinder parallel to the phantom axis: (u-uc)^2 + (v-vc)^2 <= r^2, w in [w0, w1]."""

    def __init__(self, uc, vc, r, w0, w1):
        self.uc, self.vc, self.r, self.w0, self.w1 = uc, vc, r, w0, w1
        self.box = (uc - r, uc + r, vc - r, vc + r, w0, w1)

    def interval(self, q0, d, lo, hi):
        u0 = q0[0] - self.uc
        v0 = q0[1] - self.vc
        A = d[0] * d[0] + d[1] * d[1]
        B = 2 * (u0 * d[0] + v0 * d[1])
        Cc = u0 * u0 + v0 * v0 - self.r * self.r
        if A < 1e-14:
            lo[Cc > 0] = INF
        else:
            disc = B * B - 4 * A * Cc
            out = disc < 0
            sq = np.sqrt(np.where(out, 0, disc))
            qq = -0.5 * (B + np.where(B >= 0, sq, -sq))
            with np.errstate(divide='ignore', invalid='ignore'):
                z1 = qq / A
                z2 = np.where(qq != 0, Cc / qq, -z1)
            np.maximum(lo, np.minimum(z1, z2), out=lo)
            np.minimum(hi, np.maximum(z1, z2), out=hi)
            lo[out] = INF
        # w limits
        if abs(d[2]) > 1e-12:
            za = (self.w0 - q0[2]) / d[2]
            zb = (self.w1 - q0[2]) / d[2]
            np.maximum(lo, np.minimum(za, zb), out=lo)
            np.minimum(hi, np.maximum(za, zb), out=hi)
        else:
            lo[(q0[2] < self.w0) | (q0[2] > self.w1)] = INF


def build_object(case, pose):
    """The phantom as signed terms: (sign, [solids to intersect]); fluid 1, plastic and air 0.
    Plastic parts are disjoint from each other and every hole lies inside its own part, so the
    fluid is  cyl - sum(cyl & part) + sum(cyl & part & hole) - bubble terms (inclusion-exclusion)."""
    geo = case['geometry']
    R = geo['radius']
    cyl = ZCyl(0.0, 0.0, R, geo['cyl_w0'], geo['cyl_w1'])
    parts = []          # (solid, [holes])
    b = geo['block']
    u0, u1, v0, v1, w0, w1 = b
    h = geo['slot_mm'] / 2
    # slots: |w - s u| <= h inside the block's u and w extents, in the ramp's v range
    slots = []
    for s, vr in ((0.1, geo['top_v']), (-0.1, geo['bottom_v'])):
        pl = [((-s, 0, 1), h), ((s, 0, -1), h)]
        wlo = min(s * u0, s * u1) - h - 0.1
        whi = max(s * u0, s * u1) + h + 0.1
        slots.append(Poly.box_(u0, u1, vr[0], vr[1], max(w0, wlo), min(w1, whi), pl))
    parts.append((Poly.box_(u0, u1, v0, v1, w0, w1), slots))
    for wd in geo['wedges']:
        wv, wh, vt = wd['w_v'], wd['w_half'], wd['bar_top_v']
        parts.append((Poly.box_(wd['bridge_u'][0], wd['bridge_u'][1], vt, R + 1.0,
                                wv - wh, wv + wh), []))
        L0 = wd['L0']
        bot = vt - L0 - wh - 0.5
        # left bar: v >= vt - L0 - (w - wv)  <=>  -v - w <= -(vt - L0 + wv)
        parts.append((Poly.box_(wd['left_u'][0], wd['left_u'][1], bot, vt, wv - wh, wv + wh,
                                [((0, -1, -1), -(vt - L0 + wv))]), []))
        # right bar: v >= vt - L0 + (w - wv)  <=>  -v + w <= -(vt - L0 - wv)
        parts.append((Poly.box_(wd['right_u'][0], wd['right_u'][1], bot, vt, wv - wh, wv + wh,
                                [((0, -1, 1), -(vt - L0 - wv))]), []))
    res = geo.get('resolution')
    if res:
        vc, uh, vh = res['v_c'], res['u_half'], res['v_half']
        blk = Poly.box_(-uh, uh, vc - vh, vc + vh, res['w'][0], res['w'][1])
        holes = []
        for gi, dia in enumerate(res['diam']):
            uc = (gi - 1) * (2 * uh / 3.2)
            pitch = 2 * dia
            for ai, (du, dv) in enumerate(((-1, 1), (1, -1))):    # two 4 x 4 arrays per size
                ox = uc + du * 2.6 * pitch
                oy = vc + dv * 2.6 * pitch * 0.55
                for i in range(4):
                    for j in range(4):
                        holes.append(ZCyl(ox + (i - 1.5) * pitch, oy + (j - 1.5) * pitch,
                                          dia / 2, res['w'][0], res['w'][1]))
        parts.append((blk, holes))
    for k, e in geo['extras'].items():
        wc, wh = e['w_c'], e['w_half']
        if e['kind'] == 'discs':
            for uc, vc, r in e['discs']:
                parts.append((ZCyl(uc, vc, r, wc - wh, wc + wh), []))
        elif e['kind'] == 'grid':
            hf, pt, wall = e['half'], e['pitch'], e['wall']
            plate = Poly.box_(-hf, hf, -hf, hf, wc - wh, wc + wh)
            n = int(2 * hf // pt)
            start = -n * pt / 2
            holes = []
            for i in range(n):
                for j in range(n):
                    a0 = start + i * pt + wall / 2
                    b0 = start + j * pt + wall / 2
                    holes.append(Poly.box_(a0, a0 + pt - wall, b0, b0 + pt - wall,
                                           wc - wh, wc + wh))
            parts.append((plate, holes))
        else:   # low-contrast: a thin plastic disc with spokes of holes of falling diameter
            rad = e['radius']
            disc = ZCyl(0.0, 0.0, rad, wc - wh, wc + wh)
            holes = []
            for sp in range(10):
                dia = 7.0 - 0.5 * sp
                ang = e['turn'] + sp * 2 * math.pi / 10
                for j, rr in enumerate((0.35, 0.55, 0.75)):
                    holes.append(ZCyl(rr * rad * math.cos(ang), rr * rad * math.sin(ang),
                                      dia / 2, wc - wh, wc + wh))
            parts.append((disc, holes))
    terms = [(1.0, [cyl])]
    for solid, holes in parts:
        terms.append((-1.0, [cyl, solid]))
        for hl in holes:
            terms.append((1.0, [cyl, solid, hl]))
    bub = geo.get('bubble')
    if bub:
        # air gathers under the top of the cylinder: plan y above a horizontal plane, within a
        # w range; the plane sits `depth` below the top of the axis at the bubble's middle
        wm = 0.5 * (bub['w'][0] + bub['w'][1])
        axis_y = pose.to_plan([0, 0, wm])[1]
        yb = axis_y + R - bub['depth']
        # plan y >= yb  <=>  -(R[1,:] . q) <= t_y - yb
        n = -pose.R[1, :]
        hs = Poly([(n, pose.t[1] - yb), ((0, 0, 1), bub['w'][1]), ((0, 0, -1), -bub['w'][0])],
                  (-R, R, R - bub['depth'] - 20, R, bub['w'][0], bub['w'][1]))
        terms.append((-1.0, [cyl, hs]))
        for solid, holes in parts:
            terms.append((1.0, [cyl, hs, solid]))
            for hl in holes:
                terms.append((-1.0, [cyl, hs, solid, hl]))
    return terms


def term_extent(shapes, pose):
    """Bounding box in the plan frame (x0, x1, y0, y1, z0, z1) of the intersection of the shapes."""
    ext = [-INF, INF, -INF, INF, -INF, INF]
    for s in shapes:
        b = s.box
        pts = np.array([pose.to_plan((u, v, w)) for u in b[0:2] for v in b[2:4] for w in b[4:6]])
        mn, mx = pts.min(0), pts.max(0)
        for i in range(3):
            ext[2 * i] = max(ext[2 * i], mn[i])
            ext[2 * i + 1] = min(ext[2 * i + 1], mx[i])
    return ext


# ----------------------------------------------------------------------------------------------
# Rendering


class Grid:
    """Acquisition geometry in the plan frame. Display pixel (column a, row b) is centred at
    x = (a - nx/2) D, y = (ny/2 - b) D. The object is sampled on a grid os times finer whose every
    os-th sample is a pixel centre, each fine sample the mean of 2 x 2 sub-samples at +-delta/4."""

    def __init__(self, case):
        acq = case['acq']
        n = acq['matrix']
        self.D = acq['fov'] / n
        nx = ny = n
        if acq['phase_frac'] < 1.0:
            if acq['phase_dir'] == 'COL':
                ny = int(round(n * acq['phase_frac']))
            else:
                nx = int(round(n * acq['phase_frac']))
        self.nx, self.ny = nx, ny
        self.os = max(2, int(round(self.D / 0.245)))
        self.delta = self.D / self.os
        self.mx, self.my = self.os * nx, self.os * ny
        self.x0 = -nx / 2 * self.D          # x of fine column 0
        self.y0 = ny / 2 * self.D           # y of fine row 0 (rows go down)

    def fine_x(self):
        return self.x0 + np.arange(self.mx) * self.delta

    def fine_y(self):
        return self.y0 - np.arange(self.my) * self.delta


def slice_centres(case):
    """Nominal plan z, patient-frame coordinate along the normal, and true centre of each slice."""
    pos = case['position']
    zn = GAP * np.arange(SLICES)
    zpos = zn - GAP * (SLICES - 1) / 2 + pos['stack_centre']
    e = pos['offset'] + pos['scale_pct'] / 100 * zpos
    return zn, zpos, zn + e


def render_object(case, profiles, progress=False):
    """Noise-free object integrated over each echo's profile, on the fine grid:
    out[e][k] (fine rows, fine columns), plus the cylinder alone on the middle slice (for S)."""
    pose = Pose(case['pose'])
    grid = Grid(case)
    terms = build_object(case, pose)
    _, _, zc = slice_centres(case)
    ne = len(profiles)
    out = [[np.zeros((grid.my, grid.mx)) for _ in range(SLICES)] for _ in range(ne)]
    ref = [np.zeros((grid.my, grid.mx)) for _ in range(ne)]
    kref = SLICES // 2
    S = max(p.support for p in profiles)
    d = pose.R[2, :]            # phantom-frame direction of plan +z
    Rt = pose.R.T
    h = grid.delta / 2
    for ti, (sign, shapes) in enumerate(terms):
        ext = term_extent(shapes, pose)
        if ext[0] >= ext[1] or ext[2] >= ext[3]:
            continue
        ks = [k for k in range(SLICES) if zc[k] - S < ext[5] and zc[k] + S > ext[4]]
        if not ks:
            continue
        ma = max(0, int(math.floor((ext[0] - grid.x0) / grid.delta)) - 1)
        mb = min(grid.mx, int(math.ceil((ext[1] - grid.x0) / grid.delta)) + 2)
        ra = max(0, int(math.floor((grid.y0 - ext[3]) / grid.delta)) - 1)
        rb = min(grid.my, int(math.ceil((grid.y0 - ext[2]) / grid.delta)) + 2)
        if ma >= mb or ra >= rb:
            continue
        xs = grid.x0 - grid.delta / 4 + np.arange(2 * ma, 2 * mb) * h
        chunk = max(2, (400000 // xs.size) // 2 * 2)
        for r0 in range(2 * ra, 2 * rb, chunk):
            r1 = min(2 * rb, r0 + chunk)
            ys = grid.y0 + grid.delta / 4 - np.arange(r0, r1) * h
            X = xs[None, :] - pose.t[0]
            Y = ys[:, None] - pose.t[1]
            q0 = [Rt[i, 0] * X + Rt[i, 1] * Y for i in range(3)]
            lo = np.full(np.broadcast(X, Y).shape, -INF)
            hi = np.full_like(lo, INF)
            for s in shapes:
                s.interval(q0, d, lo, hi)
            valid = hi > lo
            if not valid.any():
                continue
            lo_v = np.where(valid, lo, 0.0)
            hi_v = np.where(valid, hi, 0.0)
            for k in ks:
                full = valid & (lo_v <= zc[k] - S) & (hi_v >= zc[k] + S)
                part = valid & ~full
                for e, prof in enumerate(profiles):
                    mu = np.where(full, prof.total, 0.0)
                    if part.any():
                        mu[part] = prof.C(hi_v[part] - zc[k]) - prof.C(lo_v[part] - zc[k])
                    m = mu.reshape((r1 - r0) // 2, 2, mb - ma, 2).mean(axis=(1, 3))
                    out[e][k][r0 // 2:r1 // 2, ma:mb] += sign * m
                    if ti == 0 and k == kref:
                        ref[e][r0 // 2:r1 // 2, ma:mb] += m
        if progress and ti % 50 == 0:
            print(f'  term {ti}/{len(terms)}', file=sys.stderr)
    return out, ref, grid


def coil_field(case, grid):
    """Receive sensitivity on the fine grid: the sum of a few Gaussian coil-element lobes around the
    phantom, scaled so it departs from its phantom mean by at most `shading` (fraction)."""
    acq = case['acq']
    xs, ys = grid.fine_x(), grid.fine_y()
    if acq['shading'] <= 0:
        return np.ones((grid.my, grid.mx))
    g = np.random.default_rng(acq['coil_seed'])
    R = case['geometry']['radius']
    cx, cy = case['pose']['du'], case['pose']['dv']
    f = np.zeros((grid.my, grid.mx))
    ne = acq['coil_elements']
    a0 = g.uniform(0, 2 * math.pi)
    for i in range(ne):
        ang = a0 + 2 * math.pi * i / ne + g.uniform(-0.3, 0.3)
        rho = R + g.uniform(15, 45)
        w = g.uniform(60, 130)
        ex = cx + rho * math.cos(ang)
        ey = cy + rho * math.sin(ang)
        f += g.uniform(0.6, 1.4) * np.exp(-((xs[None, :] - ex) ** 2) / (2 * w * w)) \
            * np.exp(-((ys[:, None] - ey) ** 2) / (2 * w * w))
    inside = (xs[None, :] - cx) ** 2 + (ys[:, None] - cy) ** 2 <= R * R
    f /= f[inside].mean()
    dev = np.abs(f[inside] - 1).max()
    return 1 + acq['shading'] * (f - 1) / dev


def kspace_crop(fine, grid):
    """The acquired k-space (ny x nx, centred order) of the fine image: the band of frequencies
    -n/2 .. n/2-1 per axis, scaled so that its inverse DFT gives image values, and the 2 x 2
    sub-sample averaging undone (its transfer function cos(pi k / 2M) per axis)."""
    nx, ny, mx, my = grid.nx, grid.ny, grid.mx, grid.my
    F = np.fft.rfft2(fine)                      # (my, mx//2 + 1)
    ky = np.arange(-ny // 2, ny - ny // 2)
    kx = np.arange(-nx // 2, nx - nx // 2)
    K = np.empty((ny, nx), complex)
    pos = kx >= 0
    K[:, pos] = F[np.ix_(ky % my, kx[pos])]
    K[:, ~pos] = np.conj(F[np.ix_((-ky) % my, -kx[~pos])])
    hx = np.cos(np.pi * kx / (2 * mx))
    hy = np.cos(np.pi * ky / (2 * my))
    K /= hy[:, None] * hx[None, :]
    return K * (nx * ny) / (mx * my)


def kfilter(case, grid):
    acq = case['acq']
    ky = np.arange(-grid.ny // 2, grid.ny - grid.ny // 2) / (grid.ny / 2)
    kx = np.arange(-grid.nx // 2, grid.nx - grid.nx // 2) / (grid.nx / 2)
    if acq['filter'] == 'hamming':
        s = acq['filter_strength']
        wx = 1 - s * 0.46 * (1 - np.cos(np.pi * kx))
        wy = 1 - s * 0.46 * (1 - np.cos(np.pi * ky))
        return wy[:, None] * wx[None, :]
    if acq['filter'] == 'fermi':
        kr = np.sqrt(kx[None, :] ** 2 + ky[:, None] ** 2)
        k0 = 1.0 - 0.25 * acq['filter_strength']
        w = 1 / (1 + np.exp((kr - k0) / 0.04))
        return w / (1 / (1 + math.exp(-k0 / 0.04)))
    return np.ones((grid.ny, grid.nx))


def to_image(K, W, zf):
    """Filtered k-space to a complex image, zero-filled to zf times the matrix."""
    ny, nx = K.shape
    Kf = K * W
    if zf > 1:
        Z = np.zeros((ny * zf, nx * zf), complex)
        oy, ox = (ny * zf) // 2 - ny // 2, (nx * zf) // 2 - nx // 2
        Z[oy:oy + ny, ox:ox + nx] = Kf
        return np.fft.ifft2(np.fft.ifftshift(Z)) * zf * zf
    return np.fft.ifft2(np.fft.ifftshift(Kf))


# ----------------------------------------------------------------------------------------------
# Truth from the geometry (never from the images)


def _line_in_slice(pose, zc, axis, value):
    """The image line of the slice plane z = zc on which the phantom coordinate `axis` (0 u, 1 v)
    equals `value`: returns (point (x, y), unit direction) with the direction along the other
    in-plane phantom axis (+v for axis 0, +u for axis 1)."""
    R, t = pose.R, pose.t
    # phantom coordinate i of plan point p: R[:, i] . (p - t)
    gi = R[:2, axis]
    other = 1 - axis
    go = R[:2, other]
    dirv = np.array([gi[1], -gi[0]])
    dirv /= np.linalg.norm(dirv)
    if dirv @ go < 0:
        dirv = -dirv
    # a point: solve gi . (xy - t_xy) + R[2, axis] (zc - t_z) = value, nearest the phantom centre
    c0 = t[:2]
    rhs = value - R[2, axis] * (zc - t[2])
    pt = c0 + gi * (rhs - gi @ (c0 - t[:2])) / (gi @ gi)
    return pt, dirv


def _plane_hit(pose, zc, pt, dirv, n, b):
    """Parameter s along pt + s dirv (slice plane z = zc) where the phantom plane n . q = b lies."""
    q0 = pose.to_phantom([pt[0], pt[1], zc])
    q1 = pose.to_phantom([pt[0] + dirv[0], pt[1] + dirv[1], zc])
    f0, f1 = n @ q0 - b, n @ q1 - b
    return -f0 / (f1 - f0)


def truth_strips(case, pose, prof, zc1):
    """The two strips on slice 1: true lengths (FWHM of the profile mapped along each strip's centre
    line), centres, and the distance of their half and tenth points from the insert's ends."""
    geo = case['geometry']
    b = geo['block']
    out = {}
    for name, s, vr in (('top', 0.1, geo['top_v']), ('bottom', -0.1, geo['bottom_v'])):
        vs = 0.5 * (vr[0] + vr[1])
        pt, dirv = _line_in_slice(pose, zc1, 1, vs)     # along +u at v = vs
        # along this line, where does the ray's slot centre (w - s u = 0) sit in z?
        def zstar(sp):
            x, y = pt + sp * dirv
            q0 = pose.to_phantom([x, y, 0.0])
            d = pose.R[2, :]
            n = np.array([-s, 0.0, 1.0])
            return -(n @ q0) / (n @ d)
        z0, z1 = zstar(0.0), zstar(1.0)
        m = z1 - z0                         # mm of z per mm along the strip
        sc = (zc1 - z0) / m                 # the strip's centre
        L = prof.fwhm / abs(m)
        Ltenth = prof.fwtm / abs(m)
        e0 = _plane_hit(pose, zc1, pt, dirv, np.array([1.0, 0, 0]), b[0])
        e1 = _plane_hit(pose, zc1, pt, dirv, np.array([1.0, 0, 0]), b[1])
        lo_end, hi_end = min(e0, e1), max(e0, e1)
        half_margin = min(sc - L / 2 - lo_end, hi_end - (sc + L / 2))
        tenth_margin = min(sc - Ltenth / 2 - lo_end, hi_end - (sc + Ltenth / 2))
        centre_u = float(sc)   # along the line from its point nearest the phantom centre
        out[name] = {'length_mm': float(L), 'thickness_mm': float(L * math.tan(THETA)),
                     'angle_deg': float(math.degrees(math.atan(abs(m)))),
                     'centre_mm': centre_u, 'half_margin_mm': float(half_margin),
                     'tenth_margin_mm': float(tenth_margin),
                     'slot_length_mm': float(prof.slot_fwhm(geo['slot_mm']) / abs(m))}
    return out


def truth_bars(case, pose, zc, k_index):
    """Bar lengths on a wedge slice from the geometry: in the slice's centre plane, along each bar's
    centre line, from the bridge's lower face to the bar's 45-degree end face."""
    wd = case['geometry']['wedges'][0 if k_index == 0 else 1]
    vt, L0, wv = wd['bar_top_v'], wd['L0'], wd['w_v']
    res = {}
    for name, ur, sgn in (('left', wd['left_u'], -1.0), ('right', wd['right_u'], 1.0)):
        uc = 0.5 * (ur[0] + ur[1])
        pt, dirv = _line_in_slice(pose, zc, 0, uc)        # along +v at u = uc
        s_top = _plane_hit(pose, zc, pt, dirv, np.array([0, 1.0, 0]), vt)
        # end face: left v + (w - wv) = vt - L0 ; right v - (w - wv) = vt - L0
        n = np.array([0, 1.0, -sgn])
        s_end = _plane_hit(pose, zc, pt, dirv, n, vt - L0 - sgn * wv)
        res[name] = float(s_top - s_end)
    res['difference_mm'] = res['right'] - res['left']
    return res


def make_truth(case, profiles, S_list, sigma):
    pose = Pose(case['pose'])
    zn, zpos, zc = slice_centres(case)
    d = []
    for k in range(SLICES):
        axis_pt = pose.to_plan([0, 0, zn[k]])
        d.append(float(zc[k] - axis_pt[2]))
    echoes = []
    for e, prof in enumerate(profiles):
        bars = {}
        for ki, k in ((0, 0), (1, SLICES - 1)):
            bars[str(k + 1)] = truth_bars(case, pose, zc[k], ki)
        b1, b11 = bars['1']['difference_mm'], bars[str(SLICES)]['difference_mm']
        e1, e11 = -b1 / 2, -b11 / 2
        scale = (e11 - e1) / (zpos[-1] - zpos[0])
        strips = truth_strips(case, pose, prof, zc[0])
        a, bb = strips['top']['length_mm'], strips['bottom']['length_mm']
        echoes.append({
            'echo': e + 1, 'te_ms': case['acq']['TE_ms'][e],
            'thickness_fwhm_mm': float(prof.fwhm), 'thickness_fwtm_mm': float(prof.fwtm),
            'slot_fwhm_mm': float(prof.slot_fwhm(case['geometry']['slot_mm'])),
            'snr': float(S_list[e] / sigma), 'fluid_signal': float(S_list[e]),
            'strips': strips,
            'acr_formula_on_true_lengths_mm': float(0.2 * a * bb / (a + bb)),
            'tilt_effective_deg': float(math.degrees(THETA) - strips['top']['angle_deg']),
            'bars': bars,
            'position_model': {'offset_mm': float(e1 - scale * zpos[0]),
                               'scale_percent': float(100 * scale)}})
    return {'generator': 'xsim (tests/xsim/xsim.py)', 'case': case,
            'noise_sigma': float(sigma),
            'slice_z_mm': [float(z) for z in zpos],
            'displacement_mm': d,
            'applied_error_mm': [float(x) for x in (zc - zn)],
            'tilt_deg': case['pose']['tilt'], 'pitch_deg': case['pose']['pitch'],
            'rotation_deg': case['pose']['rot'], 'echoes': echoes}


# ----------------------------------------------------------------------------------------------
# Acquisition: images per echo and slice


def acquire(case, progress=False):
    """Returns (images[e][k] float magnitude in scanner units (display orientation), truth, meta)."""
    prof_cfg = case['profile']
    fw = [prof_cfg['fwhm'], prof_cfg['fwhm_echo2']][:len(case['acq']['TE_ms'])]
    profiles = [Profile(*make_profile(prof_cfg, f)) for f in fw]
    obj, ref, grid = render_object(case, profiles, progress)
    acq = case['acq']
    coil = coil_field(case, grid)
    W = kfilter(case, grid)
    zf = 2 if acq['interp2x'] else 1
    g = np.random.default_rng(case['noise_seed'])
    # echo amplitude: T2 decay between the echoes (the first echo's scale is arbitrary)
    amp = [math.exp(-(te - acq['TE_ms'][0]) / acq['T2_ms']) for te in acq['TE_ms']]
    # S: mean noise-free fluid signal of a uniform slice (the fluid cylinder alone at the middle
    # slice), over a disc of 0.75 radii about the phantom's centre
    R = case['geometry']['radius']
    pose = Pose(case['pose'])
    zn, _, zc = slice_centres(case)
    cen = pose.to_plan([0, 0, zn[SLICES // 2]])
    S = []
    for e in range(len(profiles)):
        im = np.abs(to_image(kspace_crop(ref[e] * coil, grid), W, zf)) * amp[e]
        D = grid.D / zf
        a = np.arange(im.shape[1])
        b = np.arange(im.shape[0])
        x = grid.x0 + a * D
        y = grid.y0 - b * D
        inside = (x[None, :] - cen[0]) ** 2 + (y[:, None] - cen[1]) ** 2 <= (0.75 * R) ** 2
        S.append(float(im[inside].mean()))
    sigma = S[0] / acq['snr']
    sigma0 = sigma / math.sqrt(np.mean(W * W))      # white noise before the filter
    phase = g.uniform(0, 2 * math.pi)
    images = []
    for e in range(len(profiles)):
        per = []
        for k in range(SLICES):
            K = kspace_crop(obj[e][k] * coil, grid) * amp[e] * np.exp(1j * phase)
            noise = (g.normal(0, sigma0, K.shape) + 1j * g.normal(0, sigma0, K.shape))
            K = K + np.fft.fftshift(np.fft.fft2(noise))
            per.append(np.abs(to_image(K, W, zf)))
        images.append(per)
    truth = make_truth(case, profiles, S, sigma)
    meta = {'pixel_mm': grid.D / zf, 'x0': grid.x0, 'y0': grid.y0,
            'rows': images[0][0].shape[0], 'cols': images[0][0].shape[1]}
    return images, truth, meta


# ----------------------------------------------------------------------------------------------
# DICOM

VENDORS = [
    {'Manufacturer': 'Northwind Imaging', 'ManufacturerModelName': 'Aurora 15',
     'SoftwareVersions': 'NW-R7.2', 'field': 1.5, 'desc': 'QA ACR-style T{w} AX',
     'station': 'NWMR01'},
    {'Manufacturer': 'Corvane Medical Systems', 'ManufacturerModelName': 'Lumen 3T',
     'SoftwareVersions': 'LM 11.0.4', 'field': 3.0, 'desc': 'phantom sl thick T{w}',
     'station': 'CRV-MR-A'},
    {'Manufacturer': 'Halvorsen MR', 'ManufacturerModelName': 'Fjord One',
     'SoftwareVersions': '4.18', 'field': 1.5, 'desc': 'SLICE_POS_T{w}_QA', 'station': 'HMR2'},
    {'Manufacturer': 'Brightmere Diagnostics', 'ManufacturerModelName': 'BM-1500 Open',
     'SoftwareVersions': 'V9', 'field': 1.0, 'desc': 'QA Phantom T{w} axial',
     'station': 'BRIGHT1'},
]


def _uid(seed, *parts):
    from pydicom.uid import generate_uid
    return generate_uid(prefix=None, entropy_srcs=[str(seed)] + [str(p) for p in parts])


def store_orientation(case):
    """Patient-frame unit vectors of display right (ex), display up (ey), toward slice 11 (ez), and
    the stored row and column directions as choices among +-ex, +-ey."""
    st = case['storage']
    if st['feet_first']:
        ex, ey, ez = np.array([-1.0, 0, 0]), np.array([0, -1.0, 0]), np.array([0, 0, -1.0])
    else:
        ex, ey, ez = np.array([1.0, 0, 0]), np.array([0, -1.0, 0]), np.array([0, 0, 1.0])
    # stored orientation relative to the scanner's usual axial IOP (row = +X, column = +Y)
    base_r, base_c = np.array([1.0, 0, 0]), np.array([0, 1.0, 0])
    v = st['iop']
    if v == 'standard':
        r, c = base_r, base_c
    elif v == 'flip-rows':
        r, c = base_r, -base_c
    elif v == 'flip-columns':
        r, c = -base_r, base_c
    elif v == 'transposed':
        r, c = base_c, base_r
    else:
        r, c = -base_c, base_r
    return ex, ey, ez, r, c


def display_to_stored(img, ex, ey, r, c):
    """Stored array and the display index (a, b) of stored pixel (0, 0)."""
    ny, nx = img.shape
    if abs(r @ ex) > 0.5:           # rows of the stored image run along display x
        s = img
        if r @ ex < 0:
            s = s[:, ::-1]
        if c @ ey > 0:              # stored rows go up the display
            s = s[::-1, :]
        a0 = 0 if r @ ex > 0 else nx - 1
        b0 = 0 if c @ ey < 0 else ny - 1
    else:                           # transposed: stored columns run along display y
        s = img.T                   # s[i_col_display, j_row_display]
        if r @ ey > 0:              # stored column index goes up the display
            s = s[:, ::-1]
        if c @ ex < 0:
            s = s[::-1, :]
        b0 = 0 if r @ ey < 0 else ny - 1
        a0 = 0 if c @ ex > 0 else nx - 1
    return np.ascontiguousarray(s), a0, b0


def write_series(case, images, truth, meta, outdir):
    import pydicom
    from pydicom.dataset import Dataset, FileDataset, FileMetaDataset
    from pydicom.sequence import Sequence
    st = case['storage']
    acq = case['acq']
    ven = VENDORS[st['vendor']]
    seed = case['seed']
    ex, ey, ez, r, c = store_orientation(case)
    D = meta['pixel_mm']
    zn, zpos, _ = slice_centres(case)
    ne = len(images)
    # scaling: fluid S of echo 1 to `level` of the stored range
    maxv = (1 << st['bits']) - 1
    S = truth['echoes'][0]['fluid_signal']
    gain = st['level'] * maxv / S
    slope, inter = 1.0, 0.0
    if st['rescale'] != 'none':
        slope = round(st['slope'], 6)
        if st['rescale'] == 'slope+intercept':
            inter = float(st['intercept'])
    # real value = gain * magnitude = stored * slope + intercept
    study_uid, series_uid = _uid(seed, 'study'), _uid(seed, 'series')
    for_uid = _uid(seed, 'frame-of-reference')
    weight = '2' if case['series'] == 't2' else '1'
    desc = ven['desc'].format(w=weight) + (' DE' if ne > 1 else '')
    freq = 42.577478 * ven['field']

    def common(ds):
        ds.SpecificCharacterSet = 'ISO_IR 100'
        ds.PatientName = 'QA^PHANTOM^LARGE'
        ds.PatientID = 'QA-PH-%04d' % (seed % 10000)
        ds.PatientBirthDate = ''
        ds.PatientSex = 'O'
        ds.StudyInstanceUID = study_uid
        ds.SeriesInstanceUID = series_uid
        ds.FrameOfReferenceUID = for_uid
        ds.PositionReferenceIndicator = ''
        ds.StudyDate = ds.SeriesDate = ds.AcquisitionDate = ds.ContentDate = '20250314'
        ds.StudyTime = '081500'
        ds.SeriesTime = ds.AcquisitionTime = ds.ContentTime = '082233'
        ds.StudyID = '1'
        ds.AccessionNumber = ''
        ds.ReferringPhysicianName = ''
        ds.Modality = 'MR'
        ds.SeriesNumber = 3 + (seed % 7)
        ds.Manufacturer = ven['Manufacturer']
        ds.ManufacturerModelName = ven['ManufacturerModelName']
        ds.SoftwareVersions = ven['SoftwareVersions']
        ds.InstitutionName = 'Eastfold Valley Clinic'
        ds.StationName = ven['station']
        ds.DeviceSerialNumber = 'XS%05d' % (seed % 100000)
        ds.SeriesDescription = desc
        ds.ProtocolName = desc.replace(' ', '_')
        ds.BodyPartExamined = 'HEAD'
        ds.PatientPosition = 'FFS' if st['feet_first'] else 'HFS'
        ds.MagneticFieldStrength = ven['field']
        ds.SamplesPerPixel = 1
        ds.PhotometricInterpretation = 'MONOCHROME2'
        ds.Rows, ds.Columns = stored_shape
        ds.BitsAllocated = 16
        ds.BitsStored = st['bits']
        ds.HighBit = st['bits'] - 1
        ds.PixelRepresentation = 0

    stored = []
    ipps = []
    for e in range(ne):
        row = []
        for k in range(SLICES):
            val = np.rint((images[e][k] * gain - inter) / slope)
            val = np.clip(val, 0, maxv).astype(np.uint16)
            s, a0, b0 = display_to_stored(val, ex, ey, r, c)
            x = meta['x0'] + a0 * D
            y = meta['y0'] - b0 * D
            ipp = x * ex + y * ey + zpos[k] * ez
            row.append(s)
            if e == 0:
                ipps.append(ipp)
        stored.append(row)
    stored_shape = stored[0][0].shape
    iop = [float(v) for v in list(r) + list(c)]
    names_rng = np.random.default_rng(st['name_seed'])
    ddir = os.path.join(outdir, 'dicom')
    os.makedirs(ddir, exist_ok=True)
    ts = pydicom.uid.ExplicitVRLittleEndian if st['explicit'] else pydicom.uid.ImplicitVRLittleEndian
    wc, ww = gain * S / slope * 0.6, gain * S / slope * 1.4

    def ds_meta(sop_class, sop_uid):
        fm = FileMetaDataset()
        fm.MediaStorageSOPClassUID = sop_class
        fm.MediaStorageSOPInstanceUID = sop_uid
        fm.TransferSyntaxUID = ts
        fm.ImplementationClassUID = '2.25.1234567890123456789'
        fm.ImplementationVersionName = 'XSIM_TEST'
        return fm

    if not st['enhanced']:
        order = [(e, k) for e in range(ne) for k in range(SLICES)] if st['echo_major'] else \
            [(e, k) for k in range(SLICES) for e in range(ne)]
        if st['instances'] == 'descending':
            order = order[::-1]
        perm = names_rng.permutation(len(order))
        for idx, (e, k) in enumerate(order):
            sop = _uid(seed, 'image', e, k)
            ds = FileDataset(None, {}, file_meta=ds_meta(pydicom.uid.MRImageStorage, sop),
                             preamble=b'\0' * 128)
            ds.SOPClassUID = pydicom.uid.MRImageStorage
            ds.SOPInstanceUID = sop
            ds.ImageType = ['ORIGINAL', 'PRIMARY', 'M', 'ND']
            common(ds)
            ds.InstanceNumber = idx + 1
            ds.AcquisitionNumber = 1
            ds.ScanningSequence = 'SE'
            ds.SequenceVariant = 'SK' if st['vendor'] % 2 else 'NONE'
            ds.ScanOptions = ''
            ds.MRAcquisitionType = '2D'
            ds.SequenceName = 'se2d' + str(ne)
            ds.SliceThickness = case['profile']['prescribed']
            ds.SpacingBetweenSlices = GAP
            ds.RepetitionTime = acq['TR_ms']
            ds.EchoTime = acq['TE_ms'][e]
            ds.EchoNumbers = e + 1
            ds.EchoTrainLength = 1
            ds.NumberOfAverages = 1
            ds.ImagingFrequency = round(freq, 6)
            ds.ImagedNucleus = '1H'
            ds.FlipAngle = 90
            ds.PixelBandwidth = 130
            ds.AcquisitionMatrix = [0, acq['matrix'], acq['matrix'], 0]
            ds.InPlanePhaseEncodingDirection = acq['phase_dir']
            ds.ImagePositionPatient = [round(float(v), 6) for v in ipps[k]]
            ds.ImageOrientationPatient = iop
            ds.SliceLocation = round(float(zpos[k] * (ez @ np.array([0, 0, 1.0]))), 6)
            ds.PixelSpacing = [round(D, 8), round(D, 8)]
            ds.WindowCenter = round(wc, 1)
            ds.WindowWidth = round(ww, 1)
            if st['rescale'] != 'none':
                ds.RescaleIntercept = inter
                ds.RescaleSlope = slope
                ds.RescaleType = 'US'
            ds.PixelData = stored[e][k].tobytes()
            ds.is_little_endian = True
            ds.is_implicit_VR = not st['explicit']
            ds.save_as(os.path.join(ddir, file_name(st, perm[idx], sop)), write_like_original=False)
        return
    # Enhanced MR Image Storage: one multi-frame file
    sop = _uid(seed, 'enhanced')
    ds = FileDataset(None, {}, file_meta=ds_meta(pydicom.uid.EnhancedMRImageStorage, sop),
                     preamble=b'\0' * 128)
    ds.SOPClassUID = pydicom.uid.EnhancedMRImageStorage
    ds.SOPInstanceUID = sop
    common(ds)
    ds.ImageType = ['ORIGINAL', 'PRIMARY', 'M_SE', 'NONE']
    ds.InstanceNumber = 1
    ds.ContentQualification = 'PRODUCT'
    ds.AcquisitionDateTime = '20250314082233'
    ds.PulseSequenceName = 'se2d'
    ds.MRAcquisitionType = '2D'
    ds.EchoPulseSequence = 'SPIN'
    ds.MultipleSpinEcho = 'YES' if ne > 1 else 'NO'
    ds.ImagingFrequency = round(freq, 6)
    ds.BurnedInAnnotation = 'NO'
    ds.LossyImageCompression = '00'
    ds.PresentationLUTShape = 'IDENTITY'
    dim_uid = _uid(seed, 'dimensions')
    ds.DimensionOrganizationSequence = Sequence([Dataset()])
    ds.DimensionOrganizationSequence[0].DimensionOrganizationUID = dim_uid
    dims = []
    for ptr, fg in ((0x00209056, 0x00209111), (0x00209057, 0x00209111), (0x00189082, 0x00189114)):
        it = Dataset()
        it.DimensionOrganizationUID = dim_uid
        it.DimensionIndexPointer = ptr
        it.FunctionalGroupPointer = fg
        dims.append(it)
    ds.DimensionIndexSequence = Sequence(dims)
    sh = Dataset()
    pm = Dataset()
    pm.PixelSpacing = [round(D, 8), round(D, 8)]
    pm.SliceThickness = case['profile']['prescribed']
    pm.SpacingBetweenSlices = GAP
    sh.PixelMeasuresSequence = Sequence([pm])
    po = Dataset()
    po.ImageOrientationPatient = iop
    sh.PlaneOrientationSequence = Sequence([po])
    tm = Dataset()
    tm.RepetitionTime = acq['TR_ms']
    tm.FlipAngle = 90
    tm.EchoTrainLength = 1
    sh.MRTimingAndRelatedParametersSequence = Sequence([tm])
    pv = Dataset()
    pv.RescaleIntercept = inter
    pv.RescaleSlope = slope
    pv.RescaleType = 'US'
    sh.PixelValueTransformationSequence = Sequence([pv])
    ft = Dataset()
    ft.FrameType = ['ORIGINAL', 'PRIMARY', 'M_SE', 'NONE']
    ft.PixelPresentation = 'MONOCHROME'
    ft.VolumetricProperties = 'VOLUME'
    ft.VolumeBasedCalculationTechnique = 'NONE'
    ft.ComplexImageComponent = 'MAGNITUDE'
    ft.AcquisitionContrast = 'T2_WEIGHTED' if ne > 1 else 'T1_WEIGHTED'
    sh.MRImageFrameTypeSequence = Sequence([ft])
    ds.SharedFunctionalGroupsSequence = Sequence([sh])
    frames = [(e, k) for e in range(ne) for k in range(SLICES)] if st['echo_major'] else \
        [(e, k) for k in range(SLICES) for e in range(ne)]
    if st['instances'] == 'descending':
        frames = frames[::-1]
    per = []
    pix = []
    for e, k in frames:
        f = Dataset()
        pp = Dataset()
        pp.ImagePositionPatient = [round(float(v), 6) for v in ipps[k]]
        f.PlanePositionSequence = Sequence([pp])
        fc = Dataset()
        fc.StackID = '1'
        fc.InStackPositionNumber = k + 1
        fc.DimensionIndexValues = [1, k + 1, e + 1]
        fc.FrameAcquisitionDateTime = '20250314082233'
        f.FrameContentSequence = Sequence([fc])
        me = Dataset()
        me.EffectiveEchoTime = acq['TE_ms'][e]
        f.MREchoSequence = Sequence([me])
        per.append(f)
        pix.append(stored[e][k])
    ds.PerFrameFunctionalGroupsSequence = Sequence(per)
    ds.NumberOfFrames = len(frames)
    ds.PixelData = np.stack(pix).tobytes()
    ds.is_little_endian = True
    ds.is_implicit_VR = not st['explicit']
    ds.save_as(os.path.join(ddir, file_name(st, 0, sop)), write_like_original=False)


def file_name(st, i, sop):
    rng = np.random.default_rng([st['name_seed'], int(i)])
    if st['names'] == 'IM':
        return 'IM_%04d' % (i + 1)
    if st['names'] == 'hex':
        return ''.join('%02x' % v for v in rng.integers(0, 256, 8)) + '.dcm'
    if st['names'] == 'uid':
        return 'MR.' + sop
    return '%d' % (1000 + i * 7)


def render(outdir, case, progress=False):
    images, truth, meta = acquire(case, progress)
    os.makedirs(outdir, exist_ok=True)
    write_series(case, images, truth, meta, outdir)
    with open(os.path.join(outdir, 'truth.json'), 'w') as f:
        json.dump(truth, f, indent=1)
    return images, truth, meta


# ----------------------------------------------------------------------------------------------
# Self-check: the renderer against numbers from outside it


def nominal_case(seed=1, **over):
    """The phantom exactly as phantom-large.md describes it, no pose, no extras, no noise."""
    c = draw_case(seed)
    geo = c['geometry']
    geo.update({'radius': 95.0, 'cyl_w0': -24.0, 'cyl_w1': 124.0,
                'block': [-70.0, 70.0, -10.0, 10.0, -12.0, 12.0], 'slot_mm': 1.0,
                'top_v': [1.5, 5.5], 'bottom_v': [-5.5, -1.5], 'resolution': None,
                'extras': {}, 'bubble': None})
    for wd in geo['wedges']:
        wd.update({'bridge_u': [-15.0, 15.0], 'bar_top_v': 80.0, 'L0': 15.0, 'w_half': 12.0,
                   'left_u': [-6.0, -1.0], 'right_u': [1.0, 6.0]})
    c['series'] = 't1'
    c['profile'].update({'kind': 'gauss', 'fwhm': 5.0, 'prescribed': 5.0})
    c['acq'].update({'matrix': 256, 'fov': 250.0, 'phase_frac': 1.0, 'phase_dir': 'COL',
                     'interp2x': False, 'filter': 'none', 'shading': 0.0, 'snr': 1e9,
                     'TE_ms': [20.0], 'TR_ms': 500.0})
    c['pose'] = {'rot': 0.0, 'tilt': 0.0, 'pitch': 0.0, 'du': 0.0, 'dv': 0.0}
    c['position'] = {'offset': 0.0, 'scale_pct': 0.0, 'stack_centre': 0.0}
    c['storage'].update({'feet_first': False, 'iop': 'standard', 'enhanced': False,
                         'rescale': 'none', 'bits': 16})
    for k, v in over.items():
        d = c
        parts = k.split('.')
        for p in parts[:-1]:
            d = d[p]
        d[parts[-1]] = v
    return c


def _crossings(x, y, level):
    """Outermost crossings of `level` by linear interpolation."""
    idx = np.nonzero(y >= level)[0]
    i0, i1 = idx[0], idx[-1]
    xl = x[i0 - 1] + (level - y[i0 - 1]) * (x[i0] - x[i0 - 1]) / (y[i0] - y[i0 - 1])
    xr = x[i1] + (y[i1] - level) * (x[i1 + 1] - x[i1]) / (y[i1] - y[i1 + 1])
    return xl, xr


def _sample(img, meta, xs, ys):
    """Bilinear samples of a display-orientation image at plan (x, y)."""
    from scipy.ndimage import map_coordinates
    a = (np.asarray(xs) - meta['x0']) / meta['pixel_mm']
    b = (meta['y0'] - np.asarray(ys)) / meta['pixel_mm']
    return map_coordinates(img, [b, a], order=1)


def selfcheck(workdir):
    import pydicom
    from scipy.special import erf
    ok = []

    def check(cond, what):
        print(('ok   ' if cond else 'FAIL ') + what)
        ok.append(bool(cond))

    # 1. Profiles: FWHM of each kind equals the wanted value (measured on the samples here) and the
    # Gaussian's integral is sigma sqrt(2 pi) (a handbook value: the Gaussian integral).
    for kind in ('gauss', 'sinc', 'rect-gauss', 'trapezoid'):
        for f in (3.0, 5.0, 8.0):
            prof = Profile(*make_profile({'kind': kind, 'tbw': 4.0, 'blur': 1.0,
                                          'ramp_frac': 0.3}, f))
            check(abs(prof.fwhm - f) < 0.002, f'{kind} profile FWHM {prof.fwhm:.4f} = {f}')
    pg = Profile(*make_profile({'kind': 'gauss'}, 5.0))
    sig = 5.0 / (2 * math.sqrt(2 * math.log(2)))
    check(abs(pg.total - sig * math.sqrt(2 * math.pi)) < 1e-4,
          f'Gaussian profile area {pg.total:.5f} = sigma sqrt(2 pi) {sig * math.sqrt(2 * math.pi):.5f}')
    # a Gaussian convolved with a 1 mm box: FWHM from the closed form with erf (handbook)
    zz = np.linspace(-10, 10, 200001)
    box = 0.5 * (erf((zz + 0.5) / (sig * math.sqrt(2))) - erf((zz - 0.5) / (sig * math.sqrt(2))))
    ref_slot = fwhm_of(zz, box)
    check(abs(pg.slot_fwhm(1.0) - ref_slot) < 1e-3,
          f'slot-widened Gaussian FWHM {pg.slot_fwhm(1.0):.4f} = erf form {ref_slot:.4f} '
          f'(+{ref_slot - 5:.3f} mm, phantom-large.md says about +0.05)')
    # the Hamming-windowed sinc's small-tip profile: TBW n gives a bandwidth close to n / T
    # (the time-bandwidth product's meaning, common practice): FWHM in units of 1/T within 10 %
    for n in (4.0, 8.0):
        x = np.linspace(-3 * n, 3 * n, 6001)
        y = _shape('sinc', x, {'tbw': n})
        fw = fwhm_of(x, y / y.max())
        check(abs(fw / n - 1) < 0.1, f'sinc TBW {n:g}: FWHM {fw:.3f} / T against bandwidth {n:g} / T')

    # 2. A noiseless, untilted, unshifted 5 mm Gaussian case with a known displacement of the slice
    # stack: strips 50 mm (x the slot's widening) centred at u = +-10 d; bars 15 -+ d.
    # The strips are checked on the object integrated over the profile (before k-space: exact), and
    # on the image of a Hamming-filtered acquisition; without a filter the Gibbs ringing of the
    # other strip and of the block's long edges (3 to 10 mm away in v) moves each strip's ends by up
    # to about 0.5 mm, which is physics of a band-limited image, not of the renderer: checked
    # within 1 mm there.
    dd = 1.5
    case = nominal_case(position={'offset': dd, 'scale_pct': 0.0, 'stack_centre': 0.0})
    obj, _, grid = render_object(case, [pg])
    expect = pg.slot_fwhm(1.0) / 0.1
    xs_f, ys_f = grid.fine_x(), grid.fine_y()
    for name, v, sgn in (('top', 3.5, 1), ('bottom', -3.5, -1)):
        row = obj[0][0][np.argmin(abs(ys_f - v))]
        sel = abs(xs_f) < 69
        xl, xr = _crossings(xs_f[sel], row[sel], row[sel].max() / 2)
        check(abs(xr - xl - expect) < 0.02 and abs(0.5 * (xl + xr) - sgn * 10 * dd) < 0.01,
              f'{name} strip of the object: FWHM {xr - xl:.3f} mm = slot-widened FWHM / tan(theta) '
              f'{expect:.3f} (50 mm x {pg.slot_fwhm(1.0) / 5:.4f}), centre {0.5 * (xl + xr):+.3f} = '
              f'{sgn * 10 * dd:+.1f} (10 d)')
    u = np.arange(-60.0, 60.0, 0.1)
    for filt, tol_l, tol_c in (('hamming', 0.2, 0.05), ('none', 1.0, 0.3)):
        cf = nominal_case(position=case['position'], acq={**case['acq'], 'filter': filt,
                                                           'filter_strength': 1.0})
        imf, trf, mtf = acquire(cf)
        for name, v, sgn in (('top', 3.5, 1), ('bottom', -3.5, -1)):
            prof = np.mean([_sample(imf[0][0], mtf, u, np.full_like(u, v + dv))
                            for dv in (-1, -0.5, 0, 0.5, 1)], 0)
            xl, xr = _crossings(u, prof, prof.max() / 2)
            check(abs(xr - xl - expect) < tol_l and abs(0.5 * (xl + xr) - sgn * 10 * dd) < tol_c,
                  f'{name} strip on the image ({filt} filter): FWHM {xr - xl:.3f} mm = {expect:.3f} '
                  f'+- {tol_l}, centre {0.5 * (xl + xr):+.3f} = {sgn * 10 * dd:+.1f} +- {tol_c}')
            check(abs(trf['echoes'][0]['strips'][name]['length_mm'] - 50.0) < 1e-6,
                  f'  truth {name} strip length {trf["echoes"][0]["strips"][name]["length_mm"]:.4f} = 50')
    images, truth, meta = imf, trf, mtf
    fluid = truth['echoes'][0]['fluid_signal']
    check(abs(fluid / pg.total - 1) < 0.003,
          f'fluid signal {fluid:.4f} = profile area {pg.total:.4f} (no shading)')
    for k, wv in ((0, 0.0), (SLICES - 1, 100.0)):
        img = images[0][k]
        for name, uc, expect in (('left', -3.5, 15 + dd), ('right', 3.5, 15 - dd)):
            vv = np.arange(50.0, 86.0, 0.05)
            prof = np.mean([_sample(img, meta, np.full_like(vv, uc + du), vv) for du in (-0.6, 0, 0.6)], 0)
            half = fluid / 2
            # bar top: the bridge's lower face, from above the bar's end; the end: where the fluid
            # below the bar rises through half
            below = vv < 80
            ii = np.nonzero(prof[below] < half)[0]
            i = ii[0]
            end = vv[i - 1] + (half - prof[i - 1]) * (vv[i] - vv[i - 1]) / (prof[i] - prof[i - 1])
            Lm = 80.0 - end
            check(abs(Lm - expect) < 0.15, f'slice {k + 1} {name} bar {Lm:.3f} mm = 15 {"+" if name == "left" else "-"} d = {expect:.2f}')
        tb = truth['echoes'][0]['bars'][str(k + 1)]
        check(abs(tb['difference_mm'] + 2 * dd) < 1e-9, f'truth bar difference {tb["difference_mm"]:.4f} = -2 d')
    check(all(abs(x - dd) < 1e-9 for x in truth['displacement_mm']), 'truth displacement = d on every slice')

    # 3. Tilt: the strips' truth lengths T / tan(theta -+ b) (phantom-large.md's formulas), and the
    # tilt-corrected formula recovers T and b from them.
    b = 2.0
    ct = nominal_case(pose={'rot': 0.0, 'tilt': b, 'pitch': 0.0, 'du': 0.0, 'dv': 0.0})
    tr = make_truth(ct, [pg], [1.0], 1.0)
    a_, b_ = tr['echoes'][0]['strips']['top']['length_mm'], tr['echoes'][0]['strips']['bottom']['length_mm']
    # (the pose section's sign: tilt > 0 makes the top strip longer; the formulas section's
    # check values list the same pair as a = 36.929 (top), b = 77.098, i.e. the other sign)
    check(abs(a_ - 77.098) < 0.002 and abs(b_ - 36.929) < 0.002,
          f'2-degree tilt strips top {a_:.3f}, bottom {b_:.3f} mm = 77.098, 36.929 '
          f'(phantom-large.md check values)')
    PHI = 2 * THETA
    T = (-(a_ + b_) + math.sqrt((a_ + b_) ** 2 + 4 * a_ * b_ * math.tan(PHI) ** 2)) / (2 * math.tan(PHI))
    check(abs(T - 5.0) < 1e-3, f'tilt-corrected formula on the truth lengths {T:.4f} = 5')

    # 4. Pitch: a slice 1 bar reports d - v tan(p) at the bar end (v about 65-80 mm)
    p = 1.5
    cp = nominal_case(pose={'rot': 0.0, 'tilt': 0.0, 'pitch': p, 'du': 0.0, 'dv': 0.0})
    tr = make_truth(cp, [pg], [1.0], 1.0)
    bd = tr['echoes'][0]['bars']['1']['difference_mm']
    check(-bd / 2 < -60 * math.tan(math.radians(p)) and -bd / 2 > -82 * math.tan(math.radians(p)),
          f'pitch {p} deg: slice 1 bars report {-bd / 2:+.3f} mm, between -82 and -60 tan(p)')

    # 5. Noise: Rician statistics in air (Rice; Gudbjartsson and Patz 1995): mean sigma sqrt(pi/2),
    # and the SNR of the definition measured back on a uniform slice
    cn = nominal_case(acq={'matrix': 256, 'fov': 250.0, 'phase_frac': 1.0, 'phase_dir': 'COL',
                           'interp2x': False, 'filter': 'fermi', 'filter_strength': 0.6,
                           'shading': 0.0, 'snr': 40.0, 'TE_ms': [20.0], 'TR_ms': 500.0,
                           'T2_ms': 100.0, 'coil_elements': 4, 'coil_seed': 1})
    images, truth, meta = acquire(cn)
    img = images[0][5]
    sigma = truth['noise_sigma']
    air = img[:12, :].ravel()
    check(abs(air.mean() / (sigma * math.sqrt(math.pi / 2)) - 1) < 0.03,
          f'air mean {air.mean():.4f} = sigma sqrt(pi/2) {sigma * math.sqrt(math.pi / 2):.4f} (filtered noise)')
    # the same after zero-filled interpolation to 2x a 192 matrix (the per-pixel noise is kept)
    cz = nominal_case(acq={**cn['acq'], 'matrix': 192, 'interp2x': True, 'filter': 'hamming'})
    imz, trz, mtz = acquire(cz)
    airz = imz[0][5][:int(12 / mtz['pixel_mm']), :].ravel()
    sz = trz['noise_sigma']
    check(abs(airz.mean() / (sz * math.sqrt(math.pi / 2)) - 1) < 0.04,
          f'air mean, 192 zero-filled to 384, Hamming: {airz.mean():.4f} = sigma sqrt(pi/2) '
          f'{sz * math.sqrt(math.pi / 2):.4f}')
    cen = Pose(cn['pose']).to_plan([0, 0, 50])
    xs = meta['x0'] + np.arange(img.shape[1]) * meta['pixel_mm']
    ys = meta['y0'] - np.arange(img.shape[0]) * meta['pixel_mm']
    ins = (xs[None, :] - cen[0]) ** 2 + (ys[:, None] - cen[1]) ** 2 <= (0.75 * 95) ** 2
    snr = img[ins].mean() / sigma
    check(abs(snr / 40 - 1) < 0.01, f'SNR measured on slice 6: {snr:.2f} = 40')

    # 6. DICOM: orientation variants read back with pydicom and mapped through IOP/IPP land every
    # pixel where the display image has it; dciodvfy (dicom3tools) finds no error.
    base = None
    for ff, iop, enh in ((False, 'standard', False), (True, 'standard', False),
                         (False, 'flip-rows', False), (True, 'transposed', True),
                         (False, 'transposed-flipped', False), (False, 'flip-columns', True)):
        cd = nominal_case(storage={**case['storage'], 'feet_first': ff, 'iop': iop,
                                   'enhanced': enh, 'rescale': 'slope+intercept', 'slope': 1.5,
                                   'intercept': -20.0, 'bits': 12, 'level': 0.5})
        od = os.path.join(workdir, f'orient-{iop}-{int(ff)}-{int(enh)}')
        ims, tr, mt = render(od, cd)
        files = sorted(os.listdir(os.path.join(od, 'dicom')))
        got = {}
        for fn in files:
            ds = pydicom.dcmread(os.path.join(od, 'dicom', fn))
            if enh:
                n = int(ds.NumberOfFrames)
                arr = ds.pixel_array.reshape(n, ds.Rows, ds.Columns)
                sh = ds.SharedFunctionalGroupsSequence[0]
                iopv = np.array(sh.PlaneOrientationSequence[0].ImageOrientationPatient, float)
                pvt = sh.PixelValueTransformationSequence[0]
                sl, ic = float(pvt.RescaleSlope), float(pvt.RescaleIntercept)
                ps = float(sh.PixelMeasuresSequence[0].PixelSpacing[0])
                for i in range(n):
                    ipp = np.array(ds.PerFrameFunctionalGroupsSequence[i].PlanePositionSequence[0].ImagePositionPatient, float)
                    got[round(float(ipp @ np.cross(iopv[:3], iopv[3:])), 3)] = (arr[i] * sl + ic, ipp, iopv, ps)
            else:
                iopv = np.array(ds.ImageOrientationPatient, float)
                ipp = np.array(ds.ImagePositionPatient, float)
                got[round(float(ipp @ np.cross(iopv[:3], iopv[3:])), 3)] = (
                    ds.pixel_array * float(ds.RescaleSlope) + float(ds.RescaleIntercept), ipp, iopv,
                    float(ds.PixelSpacing[0]))
        # the slice 1 image: the one whose position along w is smallest (w = +z head first, -z feet first)
        ez = np.array([0, 0, -1.0 if ff else 1.0])
        first = min(got.values(), key=lambda g_: g_[1] @ ez)
        arr, ipp, iopv, ps = first
        rr, cc = iopv[:3], iopv[3:]
        # map each stored pixel to the patient frame, then to the plan frame (x = u, y = v)
        jj, ii = np.mgrid[0:arr.shape[0], 0:arr.shape[1]]
        P = ipp[None, None, :] + ii[..., None] * ps * rr + jj[..., None] * ps * cc
        exv = np.array([-1.0 if ff else 1.0, 0, 0])
        eyv = np.array([0, -1.0, 0])
        X, Y = P @ exv, P @ eyv
        a = np.rint((X - mt['x0']) / mt['pixel_mm']).astype(int)
        bq = np.rint((mt['y0'] - Y) / mt['pixel_mm']).astype(int)
        disp = np.zeros_like(arr, dtype=float) if base is None else np.zeros(base.shape)
        disp[bq, a] = arr
        if base is None:
            base = disp
        # the strips are where the description puts them: the top strip above v = 0
        check(np.allclose(disp, base, atol=1.5 * 1.5 + 1e-6) and len(got) == SLICES,
              f'DICOM {iop} {"FFS" if ff else "HFS"}{" enhanced" if enh else ""}: '
              f'{len(got)} slices, pixels land where the display image has them')
        # the ramp slice's top strip (fluid in the insert at v = +3.5) is bright, the block dark
        vals = _sample(disp, mt, [0.0, 0.0], [3.5, 8.0])
        check(vals[0] > 3 * vals[1] + 10, f'  top strip at v = +3.5 bright ({vals[0]:.0f}), block at v = 8 dark ({vals[1]:.0f})')
        for fn in files[:1]:
            import subprocess
            try:
                r = subprocess.run(['dciodvfy', os.path.join(od, 'dicom', fn)], capture_output=True,
                                   text=True, timeout=60)
                errs = [ln for ln in (r.stdout + r.stderr).splitlines() if ln.startswith('Error')]
                check(not errs or enh, f'  dciodvfy: {len(errs)} errors' +
                      (' (enhanced, reported only): ' + '; '.join(errs[:3]) if errs and enh else ''))
            except FileNotFoundError:
                print('skip dciodvfy (not installed)')
    print(f'{sum(ok)}/{len(ok)} checks passed')
    return all(ok)


# ----------------------------------------------------------------------------------------------


def parse_over(items):
    over = {}
    for it in items or []:
        k, v = it.split('=', 1)
        try:
            v = json.loads(v)
        except ValueError:
            pass
        over[k] = v
    return over


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split('\n\n')[0])
    sub = ap.add_subparsers(dest='cmd', required=True)
    r = sub.add_parser('render', help='write one series and truth.json into OUTDIR')
    r.add_argument('outdir')
    r.add_argument('--seed', type=int, required=True)
    r.add_argument('--snr', type=float)
    r.add_argument('--fwhm', type=float)
    r.add_argument('--profile', choices=['gauss', 'sinc', 'rect-gauss', 'trapezoid'])
    r.add_argument('--series', choices=['t1', 't2'])
    r.add_argument('--set', action='append', metavar='KEY=JSON',
                   help='override a drawn parameter, e.g. pose.tilt=0 or acq.matrix=256')
    r.add_argument('--print-case', action='store_true')
    s = sub.add_parser('selfcheck', help='check the renderer against values from outside it')
    s.add_argument('--workdir', default=None)
    a = ap.parse_args(argv)
    if a.cmd == 'render':
        over = parse_over(a.set)
        if a.snr is not None:
            over['acq.snr'] = a.snr
        if a.fwhm is not None:
            over['profile.fwhm'] = a.fwhm
        if a.profile:
            over['profile.kind'] = a.profile
        case = draw_case(a.seed, over)
        if a.series:
            case['series'] = a.series
            case['acq']['TE_ms'] = [20.0, 80.0] if a.series == 't2' else [20.0]
            case['acq']['TR_ms'] = 2000.0 if a.series == 't2' else 500.0
        if a.print_case:
            print(json.dumps(case, indent=1))
        render(a.outdir, case)
        return 0
    import tempfile
    wd = a.workdir or tempfile.mkdtemp(prefix='xsim-check-')
    return 0 if selfcheck(wd) else 1


if __name__ == '__main__':
    sys.exit(main())
