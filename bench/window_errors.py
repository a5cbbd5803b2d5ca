"""Do the stated errors of whole-flight window sums hold over fresh noise draws? (issues 4 and 5)

Takes bench_calibration.py's seeded events (same generator) with the TRUE geometry and the TRUE
zeroth-order track, and renders each scene ``--draws`` times with fresh photon, read and
twinkle noise. Each draw is extracted twice from the same frames:

- ``estimated``: the background as the pipeline estimates it (first estimate, then
  re-estimated with the meteor masked, :func:`refine_background`);
- ``true level``: the same, with the level replaced by the simulator's true mean background
  (sky plus stars without twinkle, ``Rendered.background_adu``; its own noise then 0).

For each window (the issue's Na I 589 / O I 777 ratio windows, and three broad ones) the
whole-flight sum after the response is compared with its stated 1-sigma (from
:meth:`Spectrum.covariance`) over the draws: ``scatter`` (sample sd, % of the mean) against
``stated`` (median over draws). The difference of the two extractions of one draw is the
background level's own share of the window's error: its scatter against the stated share
``sqrt(var_estimated - var_true_level)``. The sample sd of N draws has a relative standard
error of about ``1 / sqrt(2 (N - 1))`` (normal samples, common practice): 20 % for 14 draws.

Run::

    OPENBLAS_NUM_THREADS=1 python bench/window_errors.py --seed 4 --only 5 --draws 14
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import sys
from pathlib import Path

import numpy as np

from meteorspec.background import estimate_background, refine_background
from meteorspec.calibrate import apply_response
from meteorspec.extract import extract_spectra
from meteorspec.simulate import render_event

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_calibration as BC  # noqa: E402  (the seeded events of issue 4)
import flux_ratio as FR  # noqa: E402  (true track and the ratio windows)

BROAD_WINDOWS_NM = ((545.0, 635.0), (650.0, 720.0), (735.0, 820.0))


def _sums(spectrum, windows) -> tuple[np.ndarray, np.ndarray]:
    """Window sums (NaN where a bin is masked) and their covariance matrix."""
    wl = spectrum.wavelength_nm
    rows = []
    for lo, hi in windows:
        sel = (wl >= lo) & (wl <= hi)
        ok = sel.sum() >= 2 and not np.any(spectrum.mask[sel])
        rows.append(np.where(sel, spectrum.bin_width_nm, 0.0) if ok else np.full(wl.size, np.nan))
    g = np.array(rows)
    good = ~spectrum.mask
    flux = np.where(good, spectrum.flux, 0.0)
    cov = np.nan_to_num(spectrum.covariance())
    return g @ flux, g @ cov @ g.T


def run_event(spec, draws: int) -> dict:
    base = spec.true_station()
    out: dict = {"event": spec.event_id(base.id)}
    r0 = render_event(spec)
    tr = r0.truths
    lum = np.array([t.emitted_energy_adu > 0 for t in tr])
    xm = float(np.median(np.array([t.x_mid_px for t in tr], float)[lum]))
    ym = float(np.median(np.array([t.y_mid_px for t in tr], float)[lum]))
    windows = [tuple(w) for w in FR.windows(spec, r0, xm, ym)] + list(BROAD_WINDOWS_NM)
    out["windows_nm"] = [[round(a, 1), round(b, 1)] for a, b in windows]
    cam = base.camera
    sums = {"estimated": [], "true level": []}
    var = {"estimated": [], "true level": []}
    for d in range(draws):
        r = r0 if d == 0 else render_event(dataclasses.replace(spec, noise_draw=d))
        stack = r.frame_stack()
        track = FR.truth_track(r)
        bg = estimate_background(stack, camera=cam, seed=0)
        bg = refine_background(stack, bg, track, r.geometry, camera=cam, orders=[1])
        truth = dataclasses.replace(bg, level_adu=r.background_adu, level_count=None)
        for name, b in (("estimated", bg), ("true level", truth)):
            fs = extract_spectra(stack, b, track, r.geometry, camera=cam)
            spectrum, _ = apply_response(fs.whole_flight(), base.response)
            s, c = _sums(spectrum, windows)
            sums[name].append(s)
            var[name].append(np.diag(c))
    est, tru = np.array(sums["estimated"]), np.array(sums["true level"])
    v_est, v_tru = np.array(var["estimated"]), np.array(var["true level"])
    mean = np.mean(est, axis=0)
    with np.errstate(invalid="ignore"):
        rows = []
        for i, w in enumerate(windows):
            pct = 100.0 / mean[i] if mean[i] > 0 else math.nan
            rows.append({
                "window_nm": [round(w[0], 1), round(w[1], 1)],
                "scatter_pct": float(np.std(est[:, i], ddof=1) * pct),
                "stated_pct": float(np.median(np.sqrt(v_est[:, i])) * pct),
                "true_level_scatter_pct": float(np.std(tru[:, i], ddof=1) * pct),
                "true_level_stated_pct": float(np.median(np.sqrt(v_tru[:, i])) * pct),
                "level_scatter_pct": float(np.std(est[:, i] - tru[:, i], ddof=1) * pct),
                "level_stated_pct": float(np.median(np.sqrt(np.clip(v_est[:, i] - v_tru[:, i], 0.0, None))) * pct),
            })
    out["draws"] = draws
    out["windows"] = rows
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=30)
    ap.add_argument("--seed", type=int, default=4)
    ap.add_argument("--only", type=int, nargs="*", help="event positions to run")
    ap.add_argument("--draws", type=int, default=14, help="noise draws per event (draw 0 is the scene's own)")
    ap.add_argument("--json", type=Path, default=None)
    args = ap.parse_args(argv)
    if args.draws < 3:
        ap.error("--draws must be at least 3")
    rows = []
    for k, spec in enumerate(BC.perturbed_specs(args.n, args.seed)):
        if args.only and k not in args.only:
            continue
        row = run_event(spec, args.draws)
        rows.append(row)
        print(f"{row['event']} ({row['draws']} draws): window, scatter / stated (%), with the true level, "
              "the level's share")
        for w in row["windows"]:
            print(f"  {w['window_nm'][0]:6.1f}-{w['window_nm'][1]:6.1f} nm  {w['scatter_pct']:5.2f} / "
                  f"{w['stated_pct']:5.2f}   true level {w['true_level_scatter_pct']:5.2f} / "
                  f"{w['true_level_stated_pct']:5.2f}   level {w['level_scatter_pct']:5.2f} / "
                  f"{w['level_stated_pct']:5.2f}", flush=True)
    if args.json:
        args.json.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
