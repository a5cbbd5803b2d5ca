"""Where the error of the response-corrected flux ratio Na I 589 / O I 777 comes from (issue 4).

bench/bench_calibration.py measures the ratio of the Na I D and O I 777 window energies of the
whole-flight spectrum (after response division and the pipeline's per-frame extinction
correction) against the simulator's truth. This script takes its seeded events (same generator,
same windows, same expected energies) and isolates the stages with the TRUE geometry and the TRUE
zeroth-order track (``--tracker``: the pipeline's own background and track), so that
calibration plays no part. Each event is rendered three times from the same scene:

==============  ========  ==========  =====  ===================================================
render          response  atmosphere  noise  rows
==============  ========  ==========  =====  ===================================================
response        station   no          no     ``err_extract``: the extracted spectrum before any
                                             division against the truth times the response the
                                             render applied; ``err_response``: after division
atmosphere      station   yes         no     ``err_raw`` (not corrected), ``err_pipe``,
                                             ``err_bench``, ``err_ideal`` (below)
full            station   yes         yes    the same with sky, photon and read noise and star
                                             scintillation (``*_full``): bench_calibration's event
==============  ========  ==========  =====  ===================================================

The atmosphere renders are corrected three ways: as the pipeline does (``err_pipe``: per frame,
:func:`meteorspec.extinction.extinction_correction` at :func:`pixel_altaz` of the track with
``ExtinctionModel.for_station``), as bench_calibration.py does (``err_bench``: default
``ExtinctionModel()``, sea-level pressure) and with the render's own per-exposure,
energy-weighted transmission of every component interpolated to the bins (``err_ideal``: what a
perfect correction divides by). ``err_pipe - err_ideal`` is the correction's airmass/model error;
``err_ideal - err_response`` what is left of the atmosphere after a perfect division.
``atm_truth_pct`` is what the atmosphere does to the ratio by the truth (light-weighted
transmission at 589.3 and 777.2 nm) and ``atm_measured*_pct`` what the correction changed.

Noise: the 1-sigma of each window energy from the whole-flight covariance
(:meth:`Spectrum.covariance`) gives the ratio's own statistical error ``sigma_stat_pct``;
``--draws N`` re-renders the scene with N fresh photon/read-noise draws (same scene, stars and
scintillation) and gives the mean and scatter of the ratio error over the N + 1 draws.

Background: by default re-estimated with the meteor masked (:func:`refine_background`, as
:func:`meteorspec.pipeline.locate_meteor` does); ``--first-background`` keeps the first estimate,
as bench_calibration.py does (its true track has no ``trajectory``, so it could not refine).

``--optimal on|off`` forces the extraction method (default: the extractor's own choice).

Run::

    OPENBLAS_NUM_THREADS=1 python bench/flux_ratio.py --n 30 --seed 4 --draws 3
    OPENBLAS_NUM_THREADS=1 python bench/flux_ratio.py --n 30 --seed 4 --first-background
    OPENBLAS_NUM_THREADS=1 python bench/flux_ratio.py --n 30 --seed 4 --tracker
    OPENBLAS_NUM_THREADS=1 python bench/flux_ratio.py --n 30 --seed 4 --only 1 4 --draws 6
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np

from meteorspec.background import estimate_background, refine_background
from meteorspec.calibrate import apply_response
from meteorspec.extinction import ExtinctionModel, extinction_correction, pixel_altaz
from meteorspec.extract import extract_spectra
from meteorspec.pipeline import locate_meteor
from meteorspec.simulate import render_event

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_calibration as BC  # noqa: E402  (event generator, windows and expected energies of issue 4)
import extract_acceptance as EA  # noqa: E402  (line-spread function and fresh-noise draws)

TOL_PCT = 5.0
STAT_LIMIT_PCT = 2.0


def truth_track(r):
    """The simulator's zeroth-order positions and light curve, as bench_calibration --truth-track."""
    tr = r.truths
    lum = np.array([t.emitted_energy_adu > 0 for t in tr])
    xt = np.array([t.x_mid_px for t in tr], float)
    yt = np.array([t.y_mid_px for t in tr], float)
    tt = np.array([t.time_s for t in tr], float)
    energy = np.array([t.emitted_energy_adu for t in tr], float)
    total = energy.sum()
    track = SimpleNamespace(x_px=np.where(lum, xt, np.nan), y_px=np.where(lum, yt, np.nan),
                            flux_adu=energy / total if total > 0 else energy, psf_sigma_px=None,
                            time_s=tt, luminous=lum, trajectory=r.trajectory,
                            exposure_s=float(r.exposures[0].t_end_s - r.exposures[0].t_start_s))
    BC.add_interpolated_motion(track)
    return track


def windows(spec, r, xm, ym):
    """bench_calibration's ratio windows: nominal, widened to +-3 LSF sigma."""
    out = []
    for lo, hi in BC.RATIO_WINDOWS_NM.values():
        c = 0.5 * (lo + hi)
        s = float(np.sqrt(EA.lsf_sigma_px2(r, spec, np.array([c]))[0]) * r.geometry.dispersion_nm_per_px(xm, ym, c))
        half = max(0.5 * (hi - lo), 3.0 * s) if np.isfinite(s) else 0.5 * (hi - lo)
        out.append((c - half, c + half))
    return out


def window_energy(spec_out, lo, hi):
    """Energy and its 1-sigma (bins' covariance) in [lo, hi]; NaN if a bin is masked."""
    wl = spec_out.wavelength_nm
    sel = (wl >= lo) & (wl <= hi)
    if sel.sum() < 2 or np.any(spec_out.mask[sel]) or not np.all(np.isfinite(spec_out.flux[sel])):
        return math.nan, math.nan
    w = spec_out.bin_width_nm[sel]
    e = float(np.sum(spec_out.flux[sel] * w))
    v = float(w @ spec_out.covariance(sel) @ w)
    return e, math.sqrt(max(v, 0.0))


def ideal_correction(fs, r):
    """Per-frame division by the render's own energy-weighted transmission (interpolated to the bins)."""
    lam = r.emission.wavelength_nm
    order = np.argsort(lam)
    trans = np.array([np.interp(fs.wavelength_nm, lam[order], row[order]) for row in r.transmission])
    if trans.shape[0] != fs.n_frames:
        raise ValueError("exposures and frames differ")
    return dataclasses.replace(fs, flux=fs.flux / trans, variance=fs.variance / trans**2)


def ratio_and_sigma(spec_out, wins):
    (e0, s0), (e1, s1) = (window_energy(spec_out, *w) for w in wins)
    if not (e0 > 0 and e1 > 0):
        return math.nan, math.nan, (e0, e1)
    # the two windows are 190 nm apart: no shared bins, independent
    return e0 / e1, (e0 / e1) * math.hypot(s0 / e0, s1 / e1), (e0, e1)


def expected_window_energy(spec, r, spec_out, lo, hi, x0, y0, *, weight=None):
    """bench_calibration's expected window energy, each component optionally times ``weight``."""
    return BC._expected_window_energy(spec, r, spec_out, lo, hi, x0, y0, weight=weight)


def extract(r, *, refine: bool, tracker: bool = False, optimal: bool | None = None):
    """Background, track and per-frame spectra with the true geometry.

    ``tracker``: background and track as :func:`meteorspec.pipeline.locate_meteor` finds them
    (first estimate, tracker, background re-estimated with the meteor masked, light curve
    re-measured); otherwise the true track, with the background refined as the pipeline does
    (``refine``) or left at the first estimate (as bench_calibration.py does).
    """
    stack = r.frame_stack()
    cam = r.station.camera
    if tracker:
        bg, track = locate_meteor(stack, r.station)
        if not track:
            raise RuntimeError(f"tracker found no meteor: {track.reason}")
    else:
        bg = estimate_background(stack, camera=cam, seed=0)
        track = truth_track(r)
        if refine:
            bg = refine_background(stack, bg, track, r.geometry, camera=cam, orders=[1])
    return extract_spectra(stack, bg, track, r.geometry, camera=cam, optimal=optimal), track


def whole(fs, response):
    spec_out, _ = apply_response(fs.whole_flight(), response)
    return spec_out


def run_event(spec, *, refine: bool, draws: int, tracker: bool = False, optimal: bool | None = None) -> dict:
    t0 = time.perf_counter()
    base = spec.true_station()
    response = base.response
    out = {"event": spec.event_id(base.id)}
    variants = {
        "response": dataclasses.replace(spec, noise=False, atmosphere=False),
        "atmosphere": dataclasses.replace(spec, noise=False),
        "full": spec,
    }
    r_full = render_event(spec)
    tr = r_full.truths
    lum = np.array([t.emitted_energy_adu > 0 for t in tr])
    xt = np.array([t.x_mid_px for t in tr], float)[lum]
    yt = np.array([t.y_mid_px for t in tr], float)[lum]
    xm, ym = float(np.median(xt)), float(np.median(yt))
    wins = windows(spec, r_full, xm, ym)
    out["windows"] = [[round(a, 2), round(b, 2)] for a, b in wins]
    alt = np.array([t.altitude_deg for t in tr], float)
    out["alt_min_deg"] = float(np.nanmin(alt[lum])) if np.isfinite(alt[lum]).any() else math.nan
    out["alt_max_deg"] = float(np.nanmax(alt[lum])) if np.isfinite(alt[lum]).any() else math.nan
    u = r_full.geometry.lens.pixel_to_direction(xt, yt)
    out["max_off_axis_deg"] = float(np.degrees(np.nanmax(np.arccos(np.clip(u[..., 2], -1, 1)))))

    truth_ratio = math.nan
    er = None

    def err(ratio):
        return 100.0 * (ratio / truth_ratio - 1.0) if np.isfinite(ratio) else math.nan

    for name, v in variants.items():
        r = r_full if name == "full" else render_event(v)
        fs, track = extract(r, refine=refine, tracker=tracker, optimal=optimal)
        resp = response
        if er is None:
            # bench_calibration's expectation (whole flight, all exposures, LSF-spread truth) on the
            # extraction's grid (the same for every variant: true geometry and track)
            wf = fs.whole_flight()
            if wf.wavelength_nm.size == 0:
                out["error"] = "no first-order spectrum on the sensor"
                break
            et = [BC._expected_window_energy(spec, r_full, wf, *w, xm, ym) for w in wins]
            if not (et[0] > 0 and et[1] > 0):
                out["error"] = "a ratio window is off the extracted grid"
                break
            truth_ratio = et[0] / et[1]
            out["truth_ratio"] = truth_ratio
            # the same with every component weighted by the response the render applied: what the
            # extraction alone should give before any division
            er = [expected_window_energy(spec, r_full, wf, *w, xm, ym, weight=r_full.response) for w in wins]
        if name == "response":
            q_x, _, _ = ratio_and_sigma(fs.whole_flight(), wins)
            out["err_extract"] = 100.0 * (q_x / (er[0] / er[1]) - 1.0) if np.isfinite(q_x) else math.nan
            q, _, _ = ratio_and_sigma(whole(fs, resp), wins)
            out["err_response"] = err(q)
            continue
        st = r.station
        alt_trk, _ = pixel_altaz(r.geometry.lens, st.pointing, track.x_px, track.y_px)
        alt_trk = np.where(np.isfinite(alt_trk), alt_trk, np.nanmedian(alt_trk))
        fs_pipe, _ = extinction_correction(fs, alt_trk, model=ExtinctionModel.for_station(st))
        fs_bench, _ = extinction_correction(fs, alt_trk)
        q_raw, _, _ = ratio_and_sigma(whole(fs, resp), wins)
        q_pipe, s_pipe, e_pipe = ratio_and_sigma(whole(fs_pipe, resp), wins)
        q_bench, _, _ = ratio_and_sigma(whole(fs_bench, resp), wins)
        q_ideal, _, _ = ratio_and_sigma(whole(ideal_correction(fs, r), resp), wins)
        tag = "" if name == "atmosphere" else "_full"
        if name == "atmosphere":
            # what the atmosphere does to the ratio by the truth: light-weighted transmission at
            # the two lines over the flight (the render's own per-exposure table)
            e_k = np.array([t.emitted_energy_adu for t in r.truths], float)
            lam = r.emission.wavelength_nm
            o = np.argsort(lam)
            t_na, t_o = (np.array([np.interp(c, lam[o], row[o]) for row in r.transmission]) for c in (589.3, 777.2))
            out["atm_truth_pct"] = 100.0 * ((e_k @ t_na) / (e_k @ t_o) - 1.0)
        out[f"err_raw{tag}"] = err(q_raw)
        out[f"err_pipe{tag}"] = err(q_pipe)
        out[f"err_bench{tag}"] = err(q_bench)
        out[f"err_ideal{tag}"] = err(q_ideal)
        if name == "full":
            wf_full = whole(fs_pipe, resp)
            masked = [bool(np.any(wf_full.mask[(wf_full.wavelength_nm >= lo) & (wf_full.wavelength_nm <= hi)]))
                      for lo, hi in wins]
            if any(masked):
                out["masked"] = [n for n, m in zip(BC.RATIO_WINDOWS_NM, masked) if m]
                out["flags"] = list(fs.flags)
                out["saturated_frames"] = int(sum(t.saturated for t in r.truths))
            out["sigma_stat_pct"] = 100.0 * s_pipe / q_pipe if np.isfinite(q_pipe) else math.nan
            out["snr_na"], out["snr_o"] = (e / max(window_energy(whole(fs_pipe, resp), *w)[1], 1e-300)
                                           for e, w in zip(e_pipe, wins))
            if draws > 0:
                qs = [q_pipe]
                for d in range(draws):
                    rd = EA.renoise(r_full, spec, d)
                    fsd, trk = extract(rd, refine=refine, tracker=tracker, optimal=optimal)
                    fsd, _ = extinction_correction(fsd, alt_trk, model=ExtinctionModel.for_station(st))
                    qs.append(ratio_and_sigma(whole(fsd, resp), wins)[0])
                qs = np.array([100.0 * (q / truth_ratio - 1.0) for q in qs])
                qs = qs[np.isfinite(qs)]
                out["draws_mean_pct"] = float(qs.mean()) if qs.size else math.nan
                out["draws_sd_pct"] = float(qs.std(ddof=1)) if qs.size > 2 else math.nan
    for tag in ("", "_full"):
        raw, pipe = out.get(f"err_raw{tag}", math.nan), out.get(f"err_pipe{tag}", math.nan)
        out[f"atm_measured{tag}_pct"] = 100.0 * ((1 + raw / 100) / (1 + pipe / 100) - 1.0)
    out["seconds"] = time.perf_counter() - t0
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=30)
    ap.add_argument("--seed", type=int, default=4)
    ap.add_argument("--only", type=int, nargs="*", help="event positions to run")
    ap.add_argument("--draws", type=int, default=0, help="fresh-noise renders per event for the ratio's scatter")
    ap.add_argument("--first-background", action="store_true",
                    help="keep the first background estimate (as bench_calibration.py does), not the one "
                         "re-estimated with the meteor masked (as the pipeline does)")
    ap.add_argument("--tracker", action="store_true",
                    help="background and track from meteorspec.pipeline.locate_meteor instead of the true track")
    ap.add_argument("--optimal", choices=("auto", "on", "off"), default="auto",
                    help="extraction method: the extractor's choice (auto), or profile-weighted / boxcar forced")
    ap.add_argument("--max-off-axis", type=float, default=70.0)
    ap.add_argument("--json", type=Path, default=None)
    args = ap.parse_args(argv)
    rows = []
    for k, spec in enumerate(BC.perturbed_specs(args.n, args.seed)):
        if args.only and k not in args.only:
            continue
        try:
            row = run_event(spec, refine=not args.first_background, draws=args.draws, tracker=args.tracker,
                            optimal={"auto": None, "on": True, "off": False}[args.optimal])
        except Exception as exc:  # reported, not fatal
            row = {"event": spec.event_id(spec.true_station().id), "error": f"{exc.__class__.__name__}: {exc}"}
        row["k"] = k
        rows.append(row)
        print(json.dumps({a: (round(b, 3) if isinstance(b, float) else b) for a, b in row.items()}), flush=True)
    ok = [r for r in rows if "error" not in r and r["max_off_axis_deg"] <= args.max_off_axis]
    keys = ["err_extract", "err_response", "err_raw", "err_ideal", "err_pipe", "err_bench",
            "err_raw_full", "err_ideal_full", "err_pipe_full", "err_bench_full"]
    print(f"\n== flux ratio Na I 589 / O I 777, true geometry and track: {len(ok)} events "
          f"(errors {sum('error' in r for r in rows)}) ==")

    def line(sel, label):
        print(f"{label} (n={len(sel)})")
        for key in keys:
            v = np.array([r.get(key, math.nan) for r in sel], float)
            f = v[np.isfinite(v)]
            if f.size:
                print(f"  {key:16s} median {np.median(f):+6.2f} %  median|.| {np.median(np.abs(f)):5.2f} %  "
                      f"within {TOL_PCT:g} %: {int(np.sum(np.abs(f) <= TOL_PCT)):2d}/{f.size} measured "
                      f"({len(sel) - f.size} without a ratio)")

    line(ok, "all events")
    good = [r for r in ok if r.get("sigma_stat_pct", math.inf) < STAT_LIMIT_PCT]
    line(good, f"events whose ratio's own 1-sigma < {STAT_LIMIT_PCT:g} %")
    print("stage steps (percentage points, median |.| over all events):")
    steps = {"extraction (noise-free, no atmosphere, before response)": ("err_extract", None),
             "response division": ("err_response", "err_extract"),
             "atmosphere after a perfect per-frame division": ("err_ideal", "err_response"),
             "pipeline's correction vs perfect (airmass/model)": ("err_pipe", "err_ideal"),
             "noise, sky and stars": ("err_pipe_full", "err_pipe")}
    for label, (a, b) in steps.items():
        v = np.array([r.get(a, math.nan) - (0.0 if b is None else r.get(b, math.nan)) for r in ok], float)
        v = v[np.isfinite(v)]
        if v.size:
            print(f"  {label:56s} median {np.median(v):+6.2f}  median|.| {np.median(np.abs(v)):5.2f}  "
                  f"max|.| {np.max(np.abs(v)):5.2f}")
    no_ratio = [r for r in ok if not np.isfinite(r.get("err_pipe_full", math.nan))]
    if no_ratio:
        print("without a ratio (a window's bins masked in the whole-flight sum): "
              + ", ".join(f"{r['k']}:{'+'.join(r.get('masked', ['?']))}"
                          f"({','.join(r.get('flags', []))}; saturated frames {r.get('saturated_frames', 0)})"
                          for r in no_ratio))
    d = np.array([[r.get("draws_mean_pct", math.nan), r.get("draws_sd_pct", math.nan), r.get("sigma_stat_pct", math.nan)]
                  for r in ok], float)
    d = d[np.all(np.isfinite(d), axis=1)]
    if d.size:
        print(f"fresh-noise draws ({d.shape[0]} events): median of (draw scatter / stated sigma) "
              f"{np.median(d[:, 1] / d[:, 2]):.2f}; events whose draws' mean is within {TOL_PCT:g} %: "
              f"{int(np.sum(np.abs(d[:, 0]) <= TOL_PCT))}/{d.shape[0]}")
    s = np.array([r.get("sigma_stat_pct", math.nan) for r in ok], float)
    if np.isfinite(s).any():
        print(f"ratio's own 1-sigma (covariance): median {np.nanmedian(s):.2f} %, below {STAT_LIMIT_PCT:g} %: "
              f"{int(np.sum(s < STAT_LIMIT_PCT))}/{len(ok)}")
    if args.json is not None:
        args.json.write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
