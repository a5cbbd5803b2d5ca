"""Track accuracy against simulator truth: the sample presets plus a seeded random set.

Usage::

    python bench/track_accuracy.py [--n-random 32] [--seed 7] [--jobs 2]

Each event is rendered in memory (:func:`meteorspec.simulate.render_event`),
held as the video reader holds a decoded video (``Rendered.frame_stack()``, a
:class:`meteorspec.video.FrameStack`: same linearisation, fields split by rows), then :func:`estimate_background` and :func:`find_track`
run on it. Reported per event: RMS and max distance (px) between the fitted
track and the truth's mid-exposure zeroth-order position over the frames the
track covers, split into unsaturated frames (acceptance <= 0.3 px) and frames
whose zeroth order is saturated (acceptance <= 1.0 px); the frames the truth
says are luminous but the track misses; and the stage time.
"""

from __future__ import annotations

import argparse
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from meteorspec.background import estimate_background  # noqa: E402
from meteorspec.optics import SpectralGeometry  # noqa: E402
from meteorspec.simulate import SAMPLE_SPECS, random_specs, render_event  # noqa: E402
from meteorspec.track import find_track  # noqa: E402


def evaluate(name: str, spec) -> dict:
    rendered = render_event(spec)
    frames = rendered.frame_stack()
    cam = rendered.station.camera
    geo = SpectralGeometry.from_station(rendered.station)
    t0 = time.perf_counter()
    bg = estimate_background(frames, camera=cam)
    t1 = time.perf_counter()
    track = find_track(frames, bg, geo, camera=cam, orders=rendered.station.grating.orders)
    t2 = time.perf_counter()
    tx = np.array([t.x_mid_px for t in rendered.truths])
    ty = np.array([t.y_mid_px for t in rendered.truths])
    lit = np.array([t.zeroth_flux_adu > 0 for t in rendered.truths])
    d = np.hypot(track.x_px - tx, track.y_px - ty)
    cov = np.isfinite(d)
    sat = track.status == "saturated"
    spec_loc = track.status == "from_spectrum"
    def rms(m):
        return float(np.sqrt(np.mean(d[m] ** 2))) if m.any() else float("nan")
    return dict(
        name=name, found=bool(track), reason=track.reason, flags=",".join(track.flags),
        interlaced=cam.interlaced, projection=rendered.station.lens.projection,
        n_lit=int(lit.sum()), n_cov=int(cov.sum()), missed=int((lit & ~cov).sum()),
        rms=rms(cov & ~sat & ~spec_loc),
        max=float(np.max(d[cov & ~sat & ~spec_loc])) if (cov & ~sat & ~spec_loc).any() else float("nan"),
        rms_spec=rms(cov & spec_loc), n_spec=int((cov & spec_loc).sum()),
        rms_sat=rms(cov & sat), n_sat=int((cov & sat).sum()),
        max_sat=float(np.max(d[cov & sat])) if (cov & sat).any() else float("nan"),
        statuses=",".join(f"{s}:{int(np.sum(track.status == s))}" for s in
                          ("measured", "saturated", "from_spectrum", "off_frame", "interpolated")
                          if np.any(track.status == s)),
        t_bg=t1 - t0, t_track=t2 - t1, n_frames=len(frames))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n-random", type=int, default=32)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--only", default=None, help="comma-separated event names to run")
    args = ap.parse_args(argv)
    jobs = [(name, spec) for name, spec in SAMPLE_SPECS.items()]
    jobs += [(f"random{k:02d}", s) for k, s in enumerate(random_specs(args.n_random, seed=args.seed))]
    if args.only:
        keep = set(args.only.split(","))
        jobs = [j for j in jobs if j[0] in keep]
    with ProcessPoolExecutor(max_workers=args.jobs) as pool:
        results = list(pool.map(evaluate, *zip(*jobs)))
    print(f"{'event':20s} {'proj':13s} il  lit cov miss  rms_px  max_px  rms_sat max_sat nsat  "
          f"rms_spc nspc  t_bg  t_trk  flags / status")
    for r in results:
        print(f"{r['name']:20s} {r['projection']:13s} {'y' if r['interlaced'] else 'n'} {r['n_lit']:4d} "
              f"{r['n_cov']:3d} {r['missed']:4d} {r['rms']:7.3f} {r['max']:7.3f} {r['rms_sat']:7.3f} "
              f"{r['max_sat']:7.3f} {r['n_sat']:4d} {r['rms_spec']:7.3f} {r['n_spec']:4d} "
              f"{r['t_bg']:5.2f} {r['t_track']:6.2f}  "
              f"{r['flags'] or '-'} | {r['statuses']} {r['reason']}")
    found = [r for r in results if r["found"]]
    rms_all = np.array([r["rms"] for r in found])
    sat_all = np.array([r["rms_sat"] for r in found if r["n_sat"]])
    print(f"\nfound {len(found)}/{len(results)}; unsaturated measured/interpolated RMS per event: median {np.nanmedian(rms_all):.3f}, "
          f"max {np.nanmax(rms_all):.3f} px (limit 0.3); saturated RMS per event: "
          f"max {np.nanmax(sat_all) if sat_all.size else float('nan'):.3f} px (limit 1.0) over {sat_all.size} events")
    spec_all = np.array([r["rms_spec"] for r in found if r["n_spec"]])
    if spec_all.size:
        print(f"zeroth order located from the spectrum: RMS per event max {np.max(spec_all):.3f} px over "
              f"{spec_all.size} events (reported, no limit in the issue; 1.0 px is the saturated limit)")
    bad = [r["name"] for r in found if r["rms"] > 0.3 or (r["n_sat"] and r["rms_sat"] > 1.0)]
    print("over the limit:", ", ".join(bad) if bad else "none")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
