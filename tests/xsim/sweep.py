#!/usr/bin/python3
"""sweep: render N independent phantom series with xsim.py, measure each with `slicewarden analyze
--json`, and compare every reported value with the renderer's truth.

    sweep.py BIN --cases N --seed S [--keep DIR] [--jobs 2] [--worst 15] [--records FILE] [--limits]

Prints the bias and SD of (measured - truth) per quantity and SNR band, the fraction measured, the
z-scores (error / reported uncertainty), and the worst cases with all their parameters and the
analysis's reasons for whatever it did not measure. With --limits it also checks the accuracy limits
of docs/xsim.md and exits 1 when one is missed (the CTest test xsim_sweep)."""

import argparse
import json
import math
import multiprocessing
import os
import shutil
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

# Limits (docs/xsim.md says where each comes from), applied to echoes whose true SNR >= LIM_SNR
LIM_SNR = 40.0
LIM_THICKNESS = 0.25        # mm, tilt-corrected thickness against the profile's FWHM
LIM_BAR = 0.5               # mm, bar length difference against the geometry
INSIDE_HALF = 5.0           # a strip is inside the insert: half-level points >= 5 mm from its ends
INSIDE_TENTH = 2.5          # ... and tenth-level points >= 2.5 mm
LEAVING_HALF = 3.0          # a strip leaves the insert: a half-level point < 3 mm from an end

BANDS = [(0, 15), (15, 25), (25, 40), (40, 80), (80, 1e9)]


def band_name(b):
    lo, hi = b
    return f'<{hi:g}' if lo == 0 else (f'>={lo:g}' if hi > 1e8 else f'{lo:g}-{hi:g}')


def strip_class(e):
    st = e['strips']
    if any(st[s]['half_margin_mm'] < LEAVING_HALF for s in ('top', 'bottom')):
        return 'leaving'
    if all(st[s]['half_margin_mm'] >= INSIDE_HALF and st[s]['tenth_margin_mm'] >= INSIDE_TENTH
           for s in ('top', 'bottom')):
        return 'inside'
    return 'grey'


def num(x):
    return None if x is None else float(x)


def compare(truth, doc):
    """One record per echo: truth, measured value, error and z for each quantity."""
    out = []
    series = doc.get('series', []) if doc else []
    for e in truth['echoes']:
        rec = {'echo': e['echo'], 'snr': e['snr'], 'strips': strip_class(e), 'q': {},
               'reasons': [], 'found': False}
        m = [s for s in series if s.get('echo_number') == e['echo']]
        if len(series) and not m and len(truth['echoes']) == 1 and len(series) == 1:
            m = series
        q = rec['q']

        def put(name, meas, unc, tru, eligible=True):
            meas, unc = num(meas), num(unc)
            d = {'truth': tru, 'meas': meas, 'unc': unc, 'eligible': eligible}
            if meas is not None:
                d['err'] = meas - tru
                d['z'] = (meas - tru) / unc if unc and unc > 0 else None
            q[name] = d
        if not m:
            rec['reasons'].append('echo not reported')
            for name in ('thickness', 'bld1', 'bld11'):
                q[name] = {'truth': None, 'meas': None, 'eligible': True}
            out.append(rec)
            continue
        s = m[0]
        rec['found'] = True
        rec['snr_reported'] = s.get('snr')
        if s.get('reason'):
            rec['reasons'].append('series: ' + s['reason'])
        th = s.get('slice_thickness') or {}
        if th.get('reason'):
            rec['reasons'].append('thickness: ' + th['reason'])
        inside = rec['strips'] == 'inside'
        put('thickness', th.get('corrected_mm'), th.get('uncertainty_mm'),
            e['thickness_fwhm_mm'], inside)
        put('thickness_acr', th.get('acr_mm'), th.get('uncertainty_mm'), e['thickness_fwhm_mm'],
            inside)
        for side in ('top', 'bottom'):
            t_len = e['strips'][side]['length_mm']
            u = th.get(side + '_uncertainty_mm')
            put('ramp_' + side, th.get(side + '_thickness_mm'),
                None if u is None else 0.1 * u, 0.1 * t_len, inside)
        put('tilt', th.get('tilt_deg'), th.get('tilt_uncertainty_deg'), e['tilt_effective_deg'],
            inside)
        pos = {p.get('slice'): p for p in s.get('slice_position') or []}
        for k in (1, 11):
            p = pos.get(k, {})
            if p.get('reason'):
                rec['reasons'].append(f'position slice {k}: ' + p['reason'])
            put(f'bld{k}', p.get('bar_difference_mm'), p.get('uncertainty_mm'),
                e['bars'][str(k)]['difference_mm'])
        p1 = pos.get(1, {})
        put('ramp_displacement', p1.get('ramp_displacement_mm'),
            p1.get('ramp_displacement_uncertainty_mm'), truth['displacement_mm'][0], inside)
        pm = s.get('position_model') or {}
        put('offset', pm.get('offset_mm'), pm.get('offset_uncertainty_mm'),
            e['position_model']['offset_mm'])
        put('scale', pm.get('scale_percent'), pm.get('scale_uncertainty_percent'),
            e['position_model']['scale_percent'])
        put('pitch', s.get('pitch_deg'), s.get('pitch_uncertainty_deg'), truth['pitch_deg'],
            inside)
        out.append(rec)
    return out


def run_case(job):
    import xsim
    i, seed, binary, keep, over = job
    t0 = time.time()
    case = xsim.draw_case(seed, over)
    d = tempfile.mkdtemp(prefix=f'xsim-{seed}-')
    res = {'index': i, 'seed': seed, 'case': case}
    try:
        _, truth, _ = xsim.render(d, case)
        res['render_s'] = time.time() - t0
        t1 = time.time()
        p = subprocess.run([binary, 'analyze', '--json', d], capture_output=True, text=True,
                           timeout=300)
        res['analyze_s'] = time.time() - t1
        res['rc'] = p.returncode
        res['stderr'] = [ln for ln in p.stderr.splitlines() if 'truth.json' not in ln][:20]
        try:
            doc = json.loads(p.stdout)
        except ValueError:
            doc = None
            res['stderr'].append('analyze printed no JSON')
        res['truth'] = {k: truth[k] for k in ('displacement_mm', 'tilt_deg', 'pitch_deg',
                                             'rotation_deg', 'slice_z_mm', 'noise_sigma')}
        res['truth']['echoes'] = truth['echoes']
        res['echoes'] = compare(truth, doc)
    except Exception as ex:    # a renderer failure is reported, not hidden
        res['error'] = f'{type(ex).__name__}: {ex}'
        res['echoes'] = []
    res['score'], res['why'] = score(res)
    res['dir'] = None
    if keep and (res['score'] >= 1 or res.get('error')):
        dst = os.path.join(keep, f'case-{seed}')
        shutil.rmtree(dst, ignore_errors=True)
        shutil.move(d, dst)
        res['dir'] = dst
    else:
        shutil.rmtree(d, ignore_errors=True)
    return res


def score(res):
    """How badly a case missed (>= 1: a limit missed at any SNR, scaled to the limits), and why."""
    worst, why = 0.0, []
    if res.get('error'):
        return 99.0, ['renderer: ' + res['error']]
    for e in res['echoes']:
        q = e['q']
        t = q.get('thickness', {})
        tag = f'echo {e["echo"]} (SNR {e["snr"]:.0f}, strips {e["strips"]})'
        if t.get('eligible') and t.get('meas') is None:
            worst = max(worst, 3.0)
            why.append(f'{tag}: thickness not measured')
        if t.get('err') is not None and (t.get('eligible') or e['strips'] != 'leaving'):
            s = abs(t['err']) / LIM_THICKNESS
            if s >= 1:
                why.append(f'{tag}: thickness error {t["err"]:+.3f} mm')
            worst = max(worst, s)
        elif t.get('err') is not None and e['strips'] == 'leaving':
            s = abs(t['err']) / LIM_THICKNESS
            if s >= 1:
                why.append(f'{tag}: thickness of a strip leaving the insert reported, error '
                           f'{t["err"]:+.3f} mm')
                worst = max(worst, s)
        for k in ('bld1', 'bld11'):
            b = q.get(k, {})
            if b.get('meas') is None:
                worst = max(worst, 3.0)
                why.append(f'{tag}: bar difference slice {k[3:]} not measured')
            else:
                s = abs(b['err']) / LIM_BAR
                if s >= 1:
                    why.append(f'{tag}: bar difference slice {k[3:]} error {b["err"]:+.3f} mm')
                worst = max(worst, s)
    return worst, why


# ----------------------------------------------------------------------------------------------
# Tables

QUANT = [('thickness', 'thickness, tilt-corrected (mm)', 'profile FWHM'),
         ('thickness_acr', 'thickness, ACR formula (mm)', 'profile FWHM'),
         ('ramp_top', 'thickness, top ramp (mm)', '0.1 x true strip length'),
         ('ramp_bottom', 'thickness, bottom ramp (mm)', '0.1 x true strip length'),
         ('tilt', 'tilt about v (deg)', 'theta - top ramp angle'),
         ('bld1', 'bar difference, slice 1 (mm)', 'geometry, centre plane'),
         ('bld11', 'bar difference, slice 11 (mm)', 'geometry, centre plane'),
         ('ramp_displacement', 'displacement from ramps (mm)', 'd_1 at the axis'),
         ('offset', 'position model offset (mm)', 'line through true bars'),
         ('scale', 'position model scale (%)', 'line through true bars'),
         ('pitch', 'pitch, ramps vs wedges (deg)', 'pose tilt about u')]


def stats(xs):
    n = len(xs)
    if n == 0:
        return n, float('nan'), float('nan')
    m = sum(xs) / n
    sd = math.sqrt(sum((x - m) ** 2 for x in xs) / (n - 1)) if n > 1 else float('nan')
    return n, m, sd


def fmt(n, m, sd):
    if n == 0:
        return f'{0:4d}       -      -'
    return f'{n:4d} {m:+7.3f} {sd:6.3f}' if not math.isnan(sd) else f'{n:4d} {m:+7.3f}      -'


def tables(results, out):
    echoes = [e for r in results for e in r['echoes']]

    def inband(e, b):
        return b[0] <= e['snr'] < b[1]
    hdr = 'quantity                         truth                    |' + \
        '|'.join(f' SNR {band_name(b):<15}' for b in BANDS) + '| all'
    print('\n1. Error (measured - truth) by true SNR band: n, bias, SD. Strip-based rows: echoes whose '
          'strips lie inside the insert.', file=out)
    print(hdr, file=out)
    for key, label, tr in QUANT:
        cells = []
        for b in BANDS + [(0, 1e12)]:
            xs = [e['q'][key]['err'] for e in echoes if inband(e, b) and key in e['q']
                  and e['q'][key].get('eligible') and e['q'][key].get('err') is not None]
            cells.append(fmt(*stats(xs)))
        print(f'{label:<32} {tr:<24} |' + '|'.join(f' {c} ' for c in cells), file=out)
    print('\n2. Fraction measured (measured / eligible) by SNR band', file=out)
    for key, label in (('thickness', 'thickness, strips inside'), ('bld1', 'bar difference, slice 1'),
                       ('bld11', 'bar difference, slice 11'), ('offset', 'position model')):
        cells = []
        for b in BANDS + [(0, 1e12)]:
            el = [e for e in echoes if inband(e, b) and key in e['q'] and e['q'][key].get('eligible')]
            ms = [e for e in el if e['q'][key].get('meas') is not None]
            cells.append(f'{len(ms):4d}/{len(el):<4d}')
        print(f'{label:<32} |' + '|'.join(f' {c:<19} ' for c in cells), file=out)
    for cls in ('leaving', 'grey'):
        el = [e for e in echoes if e['strips'] == cls]
        ms = [e for e in el if e['q'].get('thickness', {}).get('meas') is not None]
        bad = [e for e in ms if abs(e['q']['thickness']['err']) > LIM_THICKNESS]
        print(f'thickness, strips {cls:<8}        | {len(ms)}/{len(el)} measured anyway, '
              f'{len(bad)} of those off by more than {LIM_THICKNESS} mm', file=out)
    print('\n3. z = (measured - truth) / reported uncertainty: n, mean z, SD z (1 for an honest '
          'uncertainty)', file=out)
    for key, label, _ in QUANT:
        cells = []
        for b in BANDS + [(0, 1e12)]:
            zs = [e['q'][key]['z'] for e in echoes if inband(e, b) and key in e['q']
                  and e['q'][key].get('eligible') and e['q'][key].get('z') is not None]
            n, m, sd = stats(zs)
            cells.append(f'{n:4d} {m:+6.2f} {sd:6.2f}' if n > 1 else f'{n:4d}      -      -')
        print(f'{label:<32} |' + '|'.join(f' {c} ' for c in cells), file=out)
    # reasons
    reasons = {}
    for e in echoes:
        for r in e['reasons']:
            key = r.split(';')[0]
            reasons[key] = reasons.get(key, 0) + 1
    print('\n4. Reasons given for what was not measured (echoes)', file=out)
    for r, n in sorted(reasons.items(), key=lambda t: -t[1]):
        print(f'  {n:4d}  {r}', file=out)


def describe(case):
    g, p, a, po, st = case['geometry'], case['profile'], case['acq'], case['pose'], case['storage']
    pr = case['position']
    extras = ','.join(f'{k}:{v["kind"]}' for k, v in sorted(g['extras'].items(), key=lambda t: int(t[0])))
    s = (f'{case["series"]} {p["kind"]}' + (f' tbw {p["tbw"]:g}' if p['kind'] == 'sinc' else '') +
         f' FWHM {p["fwhm"]:.2f}' + (f'/{p["fwhm_echo2"]:.2f}' if case['series'] == 't2' else '') +
         f' (presc {p["prescribed"]:g}); matrix {a["matrix"]}'
         + (f' phase {a["phase_frac"]:.3f} {a["phase_dir"]}' if a['phase_frac'] < 1 else '')
         + f' FOV {a["fov"]:.0f}' + (' zf2x' if a['interp2x'] else '') +
         f' filter {a["filter"]}' + (f' {a["filter_strength"]:.2f}' if a['filter'] != 'none' else '') +
         f'; SNR {a["snr"]:.0f}, shading {a["shading"]:.2f}\n'
         f'      pose rot {po["rot"]:+.2f} tilt {po["tilt"]:+.2f} pitch {po["pitch"]:+.2f} '
         f'offset ({po["du"]:+.1f}, {po["dv"]:+.1f}); position error {pr["offset"]:+.2f} mm '
         f'{pr["scale_pct"]:+.2f} % (stack centre {pr["stack_centre"]:+.1f})\n'
         f'      phantom R {g["radius"]:.1f} block u [{g["block"][0]:.1f}, {g["block"][1]:.1f}] '
         f'v [{g["block"][2]:.1f}, {g["block"][3]:.1f}] slot {g["slot_mm"]:.2f}; resolution block '
         f'{"yes" if g["resolution"] else "no"}; bubble '
         f'{"%.1f mm" % g["bubble"]["depth"] if g["bubble"] else "no"}; extras {extras or "none"}\n'
         f'      storage {"FFS" if st["feet_first"] else "HFS"} {st["iop"]} '
         f'{"enhanced" if st["enhanced"] else "classic"} {"explicit" if st["explicit"] else "implicit"} '
         f'{st["bits"]}-bit rescale {st["rescale"]} instances {st["instances"]}')
    return s


def print_case(r, out):
    print(f'\n  seed {r["seed"]}  score {r["score"]:.2f}' +
          (f'  kept: {r["dir"]}' if r.get('dir') else ''), file=out)
    print('      ' + describe(r['case']), file=out)
    for e in r['echoes']:
        q = e['q']

        def v(key):
            d = q.get(key, {})
            if d.get('meas') is None:
                return f'- / {d["truth"]:.3f}' if d.get('truth') is not None else '-'
            return f'{d["meas"]:.3f} / {d["truth"]:.3f}'
        print(f'      echo {e["echo"]}: SNR {e["snr"]:.0f} (reported {e.get("snr_reported") or 0:.0f}), '
              f'strips {e["strips"]}; T {v("thickness")}; top {v("ramp_top")} bottom '
              f'{v("ramp_bottom")}; tilt {v("tilt")}; BLD1 {v("bld1")}; BLD11 {v("bld11")}; '
              f'pitch {v("pitch")}', file=out)
        for rs in dict.fromkeys(x.split(': ', 1)[1] for x in e['reasons']):
            print(f'        reason: {rs}', file=out)
    for w in r['why']:
        print(f'      -> {w}', file=out)


def worst_list(results, k, out):
    """The worst measured errors first; then the unmeasured ones grouped by reason."""
    wrong = [r for r in results if any('error' in w or 'renderer' in w for w in r['why'])]
    print(f'\n5. The {k} worst cases with a measured value beyond its limit, at any SNR (score = '
          f'largest error over its limit: thickness {LIM_THICKNESS} mm, bar difference {LIM_BAR} mm)',
          file=out)
    for r in sorted(wrong, key=lambda r: -r['score'])[:k]:
        print_case(r, out)
    groups = {}
    for r in results:
        for e in r['echoes']:
            if e['strips'] == 'inside' and e['q'].get('thickness', {}).get('meas') is None:
                key = (e['reasons'][-1].split(': ', 1)[1] if e['reasons'] else 'no reason given')
                key = key.split(';')[0]
                groups.setdefault(key, []).append((r, e))
    print('\n6. Thickness not measured although both strips lie inside the insert, by reason', file=out)
    for key, lst in sorted(groups.items(), key=lambda t: -len(t[1])):
        hi = [x for x in lst if x[1]['snr'] >= LIM_SNR]
        print(f'\n  {len(lst)} echoes ({len(hi)} at SNR >= {LIM_SNR:g}): {key}', file=out)
        print('    seeds: ' + ' '.join(sorted({str(r['seed']) for r, _ in lst})), file=out)
        shown = []
        for r, _ in lst:
            if r['seed'] not in shown and len(shown) < 2:
                shown.append(r['seed'])
                print_case(r, out)


def conditions(results, out):
    """Which conditions go with the misses: per condition, inside strips measured, thickness error
    at SNR >= LIM_SNR, bar difference error at SNR >= LIM_SNR, and SD of z for the bars."""
    conds = [('resolution block', lambda c: 'yes' if c['geometry']['resolution'] else 'no'),
             ('bubble', lambda c: 'yes' if c['geometry']['bubble'] else 'no'),
             ('k-space filter', lambda c: c['acq']['filter']),
             ('zero-filled 2x', lambda c: 'yes' if c['acq']['interp2x'] else 'no'),
             ('white noise (no filter, no zero-fill)',
              lambda c: 'yes' if c['acq']['filter'] == 'none' and not c['acq']['interp2x'] else 'no'),
             ('matrix', lambda c: str(c['acq']['matrix'])),
             ('profile', lambda c: c['profile']['kind']),
             ('Enhanced MR', lambda c: 'yes' if c['storage']['enhanced'] else 'no'),
             ('feet first', lambda c: 'yes' if c['storage']['feet_first'] else 'no'),
             ('orientation', lambda c: c['storage']['iop'])]
    print(f'\n7. By condition: inside strips measured; thickness error and bar difference error at '
          f'SNR >= {LIM_SNR:g} (n, bias, SD); SD of z for the bars at every SNR', file=out)
    for name, f in conds:
        groups = {}
        for r in results:
            if r.get('error'):
                continue
            for e in r['echoes']:
                groups.setdefault(f(r['case']), []).append(e)
        for k, es in sorted(groups.items()):
            ins = [e for e in es if e['strips'] == 'inside']
            ms = [e for e in ins if e['q']['thickness'].get('meas') is not None]
            te = [e['q']['thickness']['err'] for e in ms if e['snr'] >= LIM_SNR]
            be = [e['q'][b]['err'] for e in es for b in ('bld1', 'bld11')
                  if e['q'][b].get('err') is not None and e['snr'] >= LIM_SNR]
            bz = [e['q'][b]['z'] for e in es for b in ('bld1', 'bld11')
                  if e['q'][b].get('z') is not None]
            n, m, sd = stats(bz)
            print(f'  {name + " " + k:<44} inside measured {len(ms):3d}/{len(ins):<3d} | thickness '
                  f'{fmt(*stats(te))} | bars {fmt(*stats(be))} | SD z bars {sd:5.2f} (n {n})',
                  file=out)


def check_limits(results, out):
    """The CTest limits (docs/xsim.md); returns the list of misses."""
    miss = []
    for r in results:
        if r.get('error'):
            miss.append(f'seed {r["seed"]}: renderer failed: {r["error"]}')
            continue
        for e in r['echoes']:
            q = e['q']
            tag = f'seed {r["seed"]} echo {e["echo"]} (SNR {e["snr"]:.0f})'
            for key in ('thickness', 'bld1', 'bld11'):
                d = q.get(key, {})
                if d.get('meas') is None and not e['reasons'] and d.get('eligible'):
                    miss.append(f'{tag}: {key} not measured and no reason given')
            if e['snr'] < LIM_SNR:
                continue
            t = q.get('thickness', {})
            if e['strips'] == 'inside':
                if t.get('meas') is None:
                    miss.append(f'{tag}: strips inside the insert, thickness not measured: '
                                + '; '.join(e['reasons']))
                elif abs(t['err']) > LIM_THICKNESS:
                    miss.append(f'{tag}: thickness {t["meas"]:.3f} mm, truth {t["truth"]:.3f} '
                                f'(error {t["err"]:+.3f}, limit {LIM_THICKNESS})')
            for key in ('bld1', 'bld11'):
                b = q.get(key, {})
                if b.get('meas') is None:
                    miss.append(f'{tag}: {key} not measured: ' + '; '.join(e['reasons']))
                elif abs(b['err']) > LIM_BAR:
                    miss.append(f'{tag}: {key} {b["meas"]:.3f} mm, truth {b["truth"]:.3f} '
                                f'(error {b["err"]:+.3f}, limit {LIM_BAR})')
    return miss


def main():
    ap = argparse.ArgumentParser(description=__doc__.split('\n\n')[0])
    ap.add_argument('binary')
    ap.add_argument('--cases', type=int, default=20)
    ap.add_argument('--seed', type=int, default=1)
    ap.add_argument('--keep', help='keep the folders of failed cases here')
    ap.add_argument('--jobs', type=int, default=1)
    ap.add_argument('--worst', type=int, default=15)
    ap.add_argument('--records', help='write every case record as JSON here')
    ap.add_argument('--limits', action='store_true', help='exit 1 when a limit is missed')
    ap.add_argument('--set', action='append', metavar='KEY=JSON',
                    help='the same override for every case, e.g. geometry.resolution=null')
    ap.add_argument('--from-records', metavar='FILE',
                    help='print the tables of a sweep saved with --records (renders nothing)')
    a = ap.parse_args()
    os.environ.setdefault('OMP_NUM_THREADS', '1')
    if a.keep:
        os.makedirs(a.keep, exist_ok=True)
    import xsim
    over = xsim.parse_over(a.set)
    jobs = [(i, a.seed * 100000 + i, os.path.abspath(a.binary), a.keep, over)
            for i in range(a.cases)]
    t0 = time.time()
    results = []
    if a.from_records:
        with open(a.from_records) as f:
            results = json.load(f)
        a.cases = len(results)
    elif a.jobs > 1:
        with multiprocessing.Pool(a.jobs) as pool:
            for r in pool.imap_unordered(run_case, jobs):
                results.append(r)
                print(f'  case {len(results)}/{a.cases} seed {r["seed"]} score {r["score"]:.2f}',
                      file=sys.stderr, flush=True)
    else:
        for j in jobs:
            results.append(run_case(j))
            r = results[-1]
            print(f'  case {len(results)}/{a.cases} seed {r["seed"]} score {r["score"]:.2f}',
                  file=sys.stderr, flush=True)
    results.sort(key=lambda r: r['index'])
    wall = time.time() - t0
    out = sys.stdout
    ne = sum(len(r['echoes']) for r in results)
    rs = [r['render_s'] for r in results if 'render_s' in r]
    an = [r['analyze_s'] for r in results if 'analyze_s' in r]
    print(f'xsim sweep: {a.cases} cases ({ne} echoes), seed {a.seed}, {a.jobs} job(s), {wall:.0f} s '
          f'wall; render {sum(rs) / max(1, len(rs)):.1f} s, analyze {sum(an) / max(1, len(an)):.2f} s '
          f'per case' + (f'; overrides: {" ".join(a.set)}' if a.set else ''), file=out)
    cls = {}
    for r in results:
        for e in r['echoes']:
            cls[e['strips']] = cls.get(e['strips'], 0) + 1
    print('strips (from the truth): ' + ', '.join(f'{n} {c}' for c, n in sorted(cls.items())) +
          f' (inside: half-level points >= {INSIDE_HALF} mm and tenth-level points >= '
          f'{INSIDE_TENTH} mm from the insert ends; leaving: a half-level point < {LEAVING_HALF} mm)',
          file=out)
    tables(results, out)
    worst_list(results, a.worst, out)
    conditions(results, out)
    if a.records:
        with open(a.records, 'w') as f:
            json.dump(results, f)
    if a.limits:
        miss = check_limits(results, out)
        print(f'\n8. Limits at true SNR >= {LIM_SNR:g}: thickness within {LIM_THICKNESS} mm '
              f'(strips inside), bar difference within {LIM_BAR} mm, inside strips measured, '
              f'every unmeasured value with a reason: {len(miss)} misses', file=out)
        for m in miss:
            print('  MISS ' + m, file=out)
        return 1 if miss else 0
    return 0


if __name__ == '__main__':
    sys.exit(main())
