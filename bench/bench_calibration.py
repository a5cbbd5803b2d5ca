"""Acceptance measurement of issue 4: self-calibration of seeded simulator events.

For each seeded random event (all five lens projections, the all-sky camera with meteors up
to 70 deg off axis) the station file is written with perturbed grating values (up to
+-3 % grooves, +-4 deg dispersion angle, +-2 deg tilt; truth kept apart), and the event
goes through video -> background -> track -> calibrate_event -> extraction with the refined
geometry -> response correction. Printed per event and summarised:

* line-position error: |refined wavelength - true wavelength| of the true spectrum curve
  at 390-850 nm for every luminous frame (median and max);
* grooves_per_mm error (%) and dispersion angle error (deg) against the truth;
* response-corrected flux ratio Na I D (589) / O I 777 (188 nm apart) against the truth: the
  energy in the same two windows of an *expected* spectrum built from the simulator's truth
  (every line, N2 band and continuum component, spread by the line-spread function of the PSF
  and motion exactly as bench/extract_acceptance.py does), so blends count on both sides.
  The simulator renders the atmosphere when the station has ``[pointing]`` (all Quillmere
  stations do) and the truth is above it, so the measured spectrum is corrected as the
  pipeline does (meteorspec.pipeline: per frame, ``extinction_correction`` at
  ``pixel_altaz`` of the track, default ``ExtinctionModel``) before the ratio is taken;
  ``ratio_err_no_ext_pct`` is the same ratio without that correction.
  ``window_snr`` is each window's energy over its 1-sigma (the extraction's covariance),
  ``ratio_sigma_pct`` the ratio's 1-sigma and ``ratio_err_z`` the error in those sigmas;
  ``ratio_testable`` marks events where 5 % is at least a 2-sigma test (1-sigma <= 2.5 %).
  Where a window of the whole-flight spectrum is masked (a line saturated beyond recovery in
  the brightest frames, whose share of the light is then unknown), the ratio is taken over the
  frames that measure both windows (``ratio_frames``); the truth's ratio is the same for any
  frames, since every line follows one light curve in the simulator.
  A faint O I 777 on a bright sky is not: seed-4 events 19 and 29 (O I 777 window at SNR 4.9
  and 7.2, ratio 1-sigma 21 % and 15 %) read +39 % and +21 % on the bench's noise draw
  (+1.4 and +1.2 sigma), -0.2 % and +4.7 % on the same scenes rendered noise-free (029: the
  integer rounding of faint pixels without a sky), and over 20 fresh noise draws their
  O I 777 energy (true geometry, a 760-795 nm window) averages 0.94 +- 0.03 and 1.00 +- 0.03
  of the truth and scatters by 14 % and 12 %, as the extraction's own errors state.

The issue asks for meteors up to 70 deg off axis; random events that reach farther are run
and listed but left out of the acceptance figures (``--max-off-axis``).

The random set bins its all-sky camera 2 x 2 (7-9 nm per pixel, where the calibrator falls
back to the station values, flag ``calibration_unresolved``). ``--allsky N`` runs instead N
seeded events on the all-sky camera QM02 read out UNBINNED (1024 x 1024, f = 355 px,
4.7-6 nm/px), alternately with its equisolid lens and an equidistant one (f = 325 px, the same
180 deg field), with meteors kept 20-70 deg off axis for their whole flight and the same
perturbed station files (+-3 % grooves, +-4 deg angle, +-2 deg tilt).

Run:  python bench/bench_calibration.py --n 30 --seed 4
      python bench/bench_calibration.py --allsky 8 --seed 7
      python bench/bench_calibration.py --n 30 --seed 4 --truth-track   (isolates calibration
      from the tracker: uses the simulator's zeroth-order positions)
      ... --whole-spectrum off   (the feature method alone, as before meteorspec.calfit)
      ... --only 5,8 --verbose   (a subset, with the whole-spectrum fit's diagnostics)
      ... --station-mask-only   (skip what the pipeline does after a refined calibration: the
      background masked again along the refined geometry, meteorspec.pipeline.remasked_background;
      the station values can miss the red end of a long spectrum by many pixels)

calibrate_event gets the station response (its whole-spectrum fit needs it); ``tilt_err_deg``
is listed per event.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import sys
import tempfile
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np

from meteorspec.background import estimate_background, refine_background
from meteorspec.calibrate import apply_response, calibrate_event
from meteorspec.config import load_event, load_station
from meteorspec.extinction import ExtinctionModel, extinction_correction, pixel_altaz
from meteorspec.extract import extract_spectra
from meteorspec.optics import SpectralGeometry
from meteorspec.pipeline import locate_meteor, remasked_background
from meteorspec.simulate import (FIRST_ORDER_SHARE, EventSpec, NuisanceStrengths, peak_for_line_snr, random_specs,
                                 render_event, simulate_event, true_geometry)
from meteorspec.video import read_stack

sys.path.insert(0, str(Path(__file__).resolve().parent))
import extract_acceptance as EA  # noqa: E402  (expected spectrum from the truth, shared with issue 3)

RATIO_WINDOWS_NM = {"Na I 589": (585.0, 594.0), "O I 777": (773.0, 781.5)}
#: Largest 1-sigma (%) of the measured ratio at which its 5 % acceptance is a >= 2-sigma test.
RATIO_TESTABLE_SIGMA_PCT = 2.5


def perturbed_specs(n: int, seed: int) -> list:
    rng = np.random.default_rng([seed, 4])
    specs = []
    for spec in random_specs(n, seed=seed):
        specs.append(dataclasses.replace(
            spec, delta_grooves_frac=float(rng.uniform(-0.03, 0.03)),
            delta_dispersion_deg=float(rng.uniform(-4.0, 4.0)), delta_tilt_deg=float(rng.uniform(-2.0, 2.0))))
    return specs


def allsky_specs(n: int, seed: int, *, off_axis_deg: tuple[float, float] = (20.0, 70.0),
                 n_frames: int = 24) -> list:
    """``n`` seeded events on the unbinned all-sky camera QM02, meteors within ``off_axis_deg``.

    Start and end of the flight are drawn as directions (off-axis angle, azimuth) and written
    as pixels of the true lens, so the great circle between them stays inside the range (both
    ends are inside and the arc is short: 5-30 deg/s, as the random set, for 0.45-0.75 s).
    Placements whose first order at 390-850 nm does not exist or leaves the sensor are drawn
    again: beyond ~40 deg off axis on the side the grating disperses towards, the diffracted
    direction passes the horizon (contract 2.2, ``|w_t| >= 1``), so there the issue's far
    off-axis meteors lie on the other sides. Brightness: strongest group line SNR 40-150 at
    the peak (as the random set's ordinary events).
    """
    rng = np.random.default_rng([seed, 70])
    lo, hi = (math.radians(v) for v in off_axis_deg)
    specs = []
    for k in range(n):
        proj = ("equisolid", "equidistant")[k % 2]
        overrides = {"lens.projection": proj}
        if proj == "equidistant":
            overrides["lens.focal_px"] = 325.0  # 90 deg at 510 px: the same full-sky field
        probe = EventSpec("QM02", overrides=overrides)
        st = probe.true_station()
        geo = SpectralGeometry.from_station(st)
        lens, w, h = geo.lens, st.camera.width, st.camera.height
        wl_probe = np.linspace(390.0, 850.0, 24)
        duration = min(float(rng.uniform(0.45, 0.75)), n_frames / 25.0 - 0.16)
        # angular speed as the random set's (5-30 deg/s)
        arc = math.radians(float(rng.uniform(5.0, 30.0)) * duration)
        # an arc whose ends are both within [lo, hi]: start anywhere, then head in a direction
        # that keeps the end inside (rejection, seeded)
        for _ in range(1000):
            # start angles stratified over the range so that a few events cover all of it
            th0 = lo + (hi - lo) * (k + float(rng.uniform())) / n
            ph0 = float(rng.uniform(-math.pi, math.pi))
            u0 = np.array([math.sin(th0) * math.cos(ph0), math.sin(th0) * math.sin(ph0), math.cos(th0)])
            b = np.cross(u0, [0.0, 0.0, 1.0])
            b /= np.linalg.norm(b)
            c = np.cross(u0, b)
            head = float(rng.uniform(-math.pi, math.pi))
            e = math.cos(head) * b + math.sin(head) * c
            a = np.linspace(0.0, arc, 9)
            path = np.cos(a)[:, None] * u0 + np.sin(a)[:, None] * e
            th = np.arccos(np.clip(path[:, 2], -1.0, 1.0))
            if not (th.min() >= lo and th.max() <= hi):
                continue
            x0, y0 = lens.direction_to_pixel(path[0])
            x1, y1 = lens.direction_to_pixel(path[-1])
            # the first order of 390-850 nm must exist and fall on the sensor at both ends: far
            # off axis on the side the grating disperses towards, |w_t| >= 1 (contract 2.2, no
            # light) or the curve runs off the sensor, and there is nothing to calibrate on
            xs, ys = geo.spectrum_pixel(np.array([[x0], [x1]]), np.array([[y0], [y1]]), wl_probe[None, :])
            if np.all(np.isfinite(xs)) and np.all((xs >= 0) & (xs <= w - 1) & (ys >= 0) & (ys <= h - 1)):
                break
        else:
            raise RuntimeError(f"no placement found for all-sky event {k}")
        a3, b3, _ = rng.dirichlet([1.0, 1.0, 1.0])
        na, mg = round(float(a3), 3), round(float(b3), 3)
        fe = round(1.0 - na - mg, 3)
        if fe < 0.0:
            fe, mg = 0.0, round(1.0 - na, 3)
        spec = EventSpec(
            station="QM02", station_id=f"QM02-A{seed}-{k:03d}", overrides=overrides,
            start_utc=f"2026-11-15T01:{k // 60:02d}:{k % 60:02d}.000Z", video_form="fits", fps=25.0,
            n_frames=n_frames, meteor_start_s=0.08, meteor_duration_s=duration,
            start_px=(float(x0), float(y0)), end_px=(float(x1), float(y1)), peak_energy_adu_s=1.0,
            peak_time_frac=float(rng.uniform(0.35, 0.7)), na=na, mg=mg, fe=fe,
            temperature_k=float(rng.uniform(4000.0, 5000.0)), speed_km_s=float(rng.uniform(11.0, 72.0)),
            nuisance=NuisanceStrengths(**{f.name: float(rng.uniform(0.5, 1.5))
                                          for f in dataclasses.fields(NuisanceStrengths)}),
            n_stars=int(rng.integers(10, 40)), sky_adu=float(rng.uniform(2.0, 8.0)),
            delta_grooves_frac=float(rng.uniform(-0.03, 0.03)), delta_dispersion_deg=float(rng.uniform(-4.0, 4.0)),
            delta_tilt_deg=float(rng.uniform(-2.0, 2.0)), seed=int(seed) * 7919 + k)
        snr = float(rng.uniform(40.0, 150.0))
        specs.append(dataclasses.replace(spec, peak_energy_adu_s=peak_for_line_snr(spec, snr)))
    return specs


def _line_errors(sol_geo, true_geo, x0, y0, camera) -> np.ndarray:
    wl = np.linspace(390.0, 850.0, 93)
    xs, ys = true_geo.spectrum_pixel(x0[:, None], y0[:, None], wl[None, :])
    on = (xs >= 0) & (xs <= camera.width - 1) & (ys >= 0) & (ys <= camera.height - 1)
    lam, _ = sol_geo.locate(x0[:, None], y0[:, None], xs, ys)
    err = np.abs(lam - wl[None, :])
    return err[on & np.isfinite(err)]


def _window_energy(spec, lo: float, hi: float) -> float:
    """Energy of the response-corrected spectrum in [lo, hi] (NaN if a bin is masked)."""
    return _window_energy_err(spec, lo, hi)[0]


def _window_energy_err(spec, lo: float, hi: float) -> tuple[float, float]:
    """Energy in [lo, hi] and its 1-sigma from the spectrum's covariance (bins share pixels:
    neighbours correlate at ~0.9, so a plain quadrature sum would be 1.5-3x too small)."""
    wl, f = spec.wavelength_nm, spec.flux
    sel = (wl >= lo) & (wl <= hi)
    if sel.sum() < 2 or np.any(spec.mask[sel]) or not np.all(np.isfinite(f[sel])):
        return math.nan, math.nan
    w = spec.bin_width_nm[sel]
    return float(np.sum(f[sel] * w)), float(np.sqrt(max(w @ spec.covariance(sel) @ w, 0.0)))


def _expected_window_energy(spec, r, spec_out, lo: float, hi: float, x0: float, y0: float, *,
                            weight=None) -> float:
    """The same window of the spectrum expected from the truth (emitted first-order energy, LSF-spread);
    each emission component optionally times ``weight`` (e.g. the response or a transmission)."""
    m = r.emission
    total = sum(t.emitted_energy_adu for t in r.truths)
    # response-corrected: the response divides out
    emitted = FIRST_ORDER_SHARE * m.share * total * (1.0 if weight is None else weight)
    grid = spec_out.wavelength_nm
    edges = np.concatenate([[grid[0] - 0.5 * spec_out.bin_width_nm[0]], grid + 0.5 * spec_out.bin_width_nm])
    probe = np.linspace(grid[0], grid[-1], 24)
    var_px = EA.lsf_sigma_px2(r, spec, probe)
    disp = np.asarray(r.geometry.dispersion_nm_per_px(x0, y0, probe), float)
    sig = np.sqrt(var_px * disp**2 + np.median(spec_out.bin_width_nm) ** 2 / 12.0)
    ok = np.isfinite(sig)
    expected = EA.expected_spectrum(edges, m.wavelength_nm, emitted, np.interp(m.wavelength_nm, probe[ok], sig[ok]))
    sel = (grid >= lo) & (grid <= hi)
    return float(expected[sel].sum())


def _whole_flight_corrected(fs, station, geometry, track, *, extinction: bool = True, windows=None):
    """Whole-flight spectrum, divided by the atmosphere towards the meteor per frame (as
    meteorspec.pipeline does, when the station has [pointing]) and by the response.

    With ``windows`` ((lo, hi) nm pairs): only the frames of known brightness whose bins in
    every window are measured (:func:`_frames_measuring`), or None when there are none.
    """
    if extinction and station.pointing is not None:
        alt, _ = pixel_altaz(geometry.lens, station.pointing, track.x_px, track.y_px)
        # frames without a position carry no meteor light (the pipeline's rule)
        alt = np.where(np.isfinite(alt), alt, np.nanmedian(alt))
        fs, _ = extinction_correction(fs, alt, model=ExtinctionModel.for_station(station))
    if windows is not None:
        keep = _frames_measuring(fs, windows)
        if not keep.any():
            return None
        fs = fs.select_frames(keep)
    spec, _ = apply_response(fs.whole_flight(), station.response)
    return spec


def _frames_measuring(fs, windows) -> np.ndarray:
    """Frames of known brightness (finite ``frame_weight``, > 0) with every bin of every window unmasked."""
    keep = np.isfinite(fs.frame_weight) & (np.nan_to_num(fs.frame_weight) > 0)
    for lo, hi in windows:
        sel = (fs.wavelength_nm >= lo) & (fs.wavelength_nm <= hi)
        keep &= ~fs.mask[:, sel].any(axis=1)
    return keep


def add_interpolated_motion(track) -> None:
    """Give a truth track ``position(t)`` and ``velocity_px_s(t)``, interpolated between its
    luminous frames (what the extraction and calibration ask of a track)."""
    tt = np.asarray(track.time_s, float)

    def position(t, _x=track.x_px, _y=track.y_px):
        ok = np.isfinite(_x)
        return np.interp(t, tt[ok], _x[ok]), np.interp(t, tt[ok], _y[ok])

    def velocity_px_s(t, h=1e-3):
        (xp, yp), (xm, ym) = position(np.asarray(t) + h), position(np.asarray(t) - h)
        return (xp - xm) / (2 * h), (yp - ym) / (2 * h)

    track.position, track.velocity_px_s = position, velocity_px_s


def run_event(spec, work: Path, *, truth_track: bool, whole_spectrum: str = "fallback",
              whole_spectrum_tilt: bool = True, tilt_sigma_deg: float | None = None,
              max_tilt_err_deg: float | None = None, station_mask_only: bool = False) -> dict:
    t0 = time.perf_counter()
    sim = simulate_event(spec, work / "events", truth_dir=work / "truth")
    event_dir = work / "events" / spec.event_id(spec.true_station().id)
    event = load_event(event_dir)
    station = load_station(work / "events" / "stations" / f"{event.station}.toml")
    truth = json.loads((work / "truth" / f"{event.id}.json").read_text())
    stack = read_stack(event, station)
    geo = SpectralGeometry.from_station(station)
    true_geo = true_geometry(geo, truth)
    rendered = render_event(spec)  # the truth's emission model, exposures and trajectory (nothing written)
    fr = truth["frames"]
    xt, yt = np.array(fr["x_mid_px"], float), np.array(fr["y_mid_px"], float)
    lum = np.array(fr["energy_fraction"], float) > 0
    if truth_track:
        track = SimpleNamespace(x_px=np.where(lum, xt, np.nan), y_px=np.where(lum, yt, np.nan),
                                flux_adu=np.array(fr["energy_fraction"], float), psf_sigma_px=truth["psf_sigma_px"],
                                time_s=np.array(fr["time_s"], float), luminous=lum,
                                exposure_s=float(stack.exposure_s), trajectory=rendered.trajectory)
        add_interpolated_motion(track)
        # as meteorspec.pipeline.locate_meteor: the background re-estimated with the meteor masked
        # (the first estimate keeps faint lines such as O I 777 below its clip: 5-14 % of them,
        # bench/flux_ratio.py)
        bg = estimate_background(stack, camera=station.camera, seed=0)
        bg = refine_background(stack, bg, track, geo, camera=station.camera,
                               orders=[o for o in station.grating.orders if o != 0])
    else:
        bg, track = locate_meteor(stack, station)
    t1 = time.perf_counter()
    c1 = time.process_time()
    sol = calibrate_event(stack, bg, track, geo, camera=station.camera, event=event.id,
                          whole_spectrum=whole_spectrum, response=station.response,
                          whole_spectrum_tilt=whole_spectrum_tilt, whole_spectrum_tilt_sigma_deg=tilt_sigma_deg,
                          **({} if max_tilt_err_deg is None else {"whole_spectrum_max_tilt_err_deg": max_tilt_err_deg}))
    t2 = time.perf_counter()
    c2 = time.process_time()
    out = {"event": event.id, "projection": station.lens.projection, "source": sol.source,
           "flags": list(sol.flags), "n_lines": sol.n_lines, "rms_nm": sol.rms_nm,
           "seconds_calibrate": t2 - t1, "cpu_seconds_calibrate": c2 - c1, "seconds_total": 0.0}
    g_true = truth["geometry_true"]["grating"]
    out["grooves_err_pct"] = 100 * (sol.values["grooves_per_mm"] / g_true["grooves_per_mm"] - 1)
    out["angle_err_deg"] = sol.values["dispersion_angle_deg"] - g_true["dispersion_angle_deg"]
    out["tilt_err_deg"] = sol.values["tilt_deg"] - g_true["tilt_deg"]
    # the tilt as a vector (tilt_deg along tilt_azimuth_deg): a small tilt's azimuth matters too

    def _tilt_vec(t, a):
        return np.array([t * math.cos(math.radians(a)), t * math.sin(math.radians(a))])

    out["tilt_vec_err_deg"] = float(np.hypot(*(_tilt_vec(sol.values["tilt_deg"], sol.values["tilt_azimuth_deg"])
                                               - _tilt_vec(g_true["tilt_deg"], g_true["tilt_azimuth_deg"]))))
    # off-axis angle reached by the meteor
    u = geo.lens.pixel_to_direction(xt[lum], yt[lum])
    out["max_off_axis_deg"] = float(np.degrees(np.nanmax(np.arccos(np.clip(u[..., 2], -1, 1)))))
    out["min_off_axis_deg"] = float(np.degrees(np.nanmin(np.arccos(np.clip(u[..., 2], -1, 1)))))
    out["nm_per_px_589"] = float(np.nanmedian(true_geo.dispersion_nm_per_px(xt[lum], yt[lum], 589.0)))
    err = _line_errors(sol.geometry, true_geo, xt[lum], yt[lum], station.camera)
    out["line_median_nm"] = float(np.median(err)) if err.size else math.nan
    out["line_max_nm"] = float(np.max(err)) if err.size else math.nan
    if not station_mask_only and sol.source == "event":
        # as the pipeline: the meteor's light masked where the refined geometry puts it (the station
        # values can put the red end of a long spectrum many pixels beside its mask)
        bg = remasked_background(stack, bg, track, sol.geometry, station)
    try:
        fs = extract_spectra(stack, bg, track, sol.geometry, camera=station.camera)
        spec_c = _whole_flight_corrected(fs, station, sol.geometry, track)
        spec_raw = _whole_flight_corrected(fs, station, sol.geometry, track, extinction=False)
        xm, ym = float(np.median(xt[lum])), float(np.median(yt[lum]))
        # windows hold the whole line-spread function (+-3 sigma of the PSF and motion smear,
        # at least the nominal window), so that its shape (box-like for long streaks, not
        # Gaussian) does not matter: both spectra count the same components
        wins = []
        for lo, hi in RATIO_WINDOWS_NM.values():
            c = 0.5 * (lo + hi)
            s = float(np.sqrt(EA.lsf_sigma_px2(rendered, spec, np.array([c]))[0])
                      * true_geo.dispersion_nm_per_px(xm, ym, c))
            half = max(0.5 * (hi - lo), 3.0 * s) if np.isfinite(s) else 0.5 * (hi - lo)
            wins.append((c - half, c + half))
        e, e_sd = (list(v) for v in zip(*[_window_energy_err(spec_c, *w) for w in wins]))
        et = [_expected_window_energy(spec, rendered, spec_c, *w, xm, ym) for w in wins]
        out["ratio_frames"] = "all"
        if not all(np.isfinite(e)):
            # a line lost in the brightest frames (saturated beyond recovery: their share of the
            # light is unknown) leaves the whole-flight window masked; the ratio is then taken
            # over the frames that measure both windows. The truth's ratio is the same for any
            # frames: every line follows one light curve in the simulator, and the atmosphere
            # is divided out per frame as for the whole flight
            spec_f = _whole_flight_corrected(fs, station, sol.geometry, track, windows=wins)
            if spec_f is not None:
                e, e_sd = (list(v) for v in zip(*[_window_energy_err(spec_f, *w) for w in wins]))
                # (window_energy_rel stays against the whole flight's truth: a share of it here)
                out["ratio_frames"] = f"{int(_frames_measuring(fs, wins).sum())} measuring both"
        out["ratio_err_pct"] = 100 * ((e[0] / e[1]) / (et[0] / et[1]) - 1) if et[1] > 0 and e[1] > 0 else math.nan
        # each window's energy against the truth's, to tell which line moved a ratio
        out["window_energy_rel"] = [float(x / y) if y > 0 else math.nan for x, y in zip(e, et)]
        # the noise of that test: each window's SNR (its 1-sigma from the extraction's covariance),
        # the ratio's 1-sigma (% of the ratio; the windows' pixels do not overlap, so their errors
        # add in quadrature) and the error in those sigmas. A faint red window on a bright sky
        # (seed-4 events 19, 29: O I 777 at SNR 6-8) cannot test 5 %: over 10-20 fresh noise
        # draws of the same scene its energy scatters by the 1-sigma stated here
        out["window_snr"] = [float(x / s) if s > 0 else math.nan for x, s in zip(e, e_sd)]
        out["ratio_sigma_pct"] = float(100 * math.hypot(e_sd[0] / e[0], e_sd[1] / e[1])) if e[0] > 0 and e[1] > 0 \
            else math.nan
        out["ratio_err_z"] = (out["ratio_err_pct"] / (100 + out["ratio_err_pct"]) * 100 / out["ratio_sigma_pct"]
                              if out["ratio_sigma_pct"] > 0 else math.nan)
        e_raw = [_window_energy(spec_raw, *w) for w in wins]
        out["ratio_err_no_ext_pct"] = (100 * ((e_raw[0] / e_raw[1]) / (et[0] / et[1]) - 1)
                                       if et[1] > 0 and e_raw[1] > 0 else math.nan)
        airmass = np.array(fr.get("airmass", [math.nan] * lum.size), float)
        out["airmass_median"] = float(np.nanmedian(airmass[lum]))
        # the expected energies are positive (both windows on the grid): NOT a signal-to-noise test,
        # see ratio_sigma_pct / ratio_testable for that
        out["ratio_expected_ok"] = bool(et[0] > 0 and et[1] > 0)
        # a 5 % test is at least a 2-sigma one only when the ratio's 1-sigma is <= 2.5 %
        out["ratio_testable"] = bool(out["ratio_sigma_pct"] <= RATIO_TESTABLE_SIGMA_PCT)
        # the same with the TRUE geometry: what extraction and response alone give, so that the
        # calibration's share of the ratio error can be told apart
        fs_t = extract_spectra(stack, bg, track, true_geo, camera=station.camera)
        spec_t = _whole_flight_corrected(fs_t, station, true_geo, track)
        e_t = [_window_energy(spec_t, *w) for w in wins]
        if not all(np.isfinite(e_t)):
            spec_t = _whole_flight_corrected(fs_t, station, true_geo, track, windows=wins)
            e_t = [_window_energy(spec_t, *w) if spec_t is not None else math.nan for w in wins]
        out["ratio_err_true_geo_pct"] = (100 * ((e_t[0] / e_t[1]) / (et[0] / et[1]) - 1)
                                         if et[1] > 0 and e_t[1] > 0 else math.nan)
    except Exception as exc:  # extraction failures are reported, not fatal for the bench
        out["ratio_err_pct"] = math.nan
        out["extract_error"] = f"{exc.__class__.__name__}: {exc}"
    out["seconds_total"] = time.perf_counter() - t0
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=30)
    ap.add_argument("--seed", type=int, default=4)
    ap.add_argument("--truth-track", action="store_true")
    ap.add_argument("--allsky", type=int, default=0, metavar="N",
                    help="instead of the random set: N events on the unbinned all-sky camera, 20-70 deg off axis")
    ap.add_argument("--frames", type=int, default=24, help="frames per --allsky event")
    ap.add_argument("--max-off-axis", type=float, default=70.0,
                    help="events reaching farther off axis (deg) are left out of the figures (issue 4: 70)")
    ap.add_argument("--json", type=Path, default=None, help="write per-event rows here")
    ap.add_argument("--whole-spectrum", choices=("fallback", "off", "always"), default="fallback",
                    help="calibrate_event's whole-spectrum fit: where the feature method falls back (default), "
                         "never, or instead of it")
    ap.add_argument("--hold-tilt", action="store_true", help="the whole-spectrum fit holds the station's tilt")
    ap.add_argument("--tilt-sigma", type=float, default=None, metavar="DEG",
                    help="1-sigma of the whole-spectrum fit's tilt prior about the station value "
                         "(default: calibrate_event's)")
    ap.add_argument("--max-tilt-err", type=float, default=None, metavar="DEG",
                    help="the whole-spectrum fit frees the tilt only where it fixes it to this (1-sigma); "
                         "'inf' always frees it (as before); default: calibrate_event's")
    ap.add_argument("--only", type=str, default=None, metavar="I,J,...",
                    help="run only these event indices of the set (development subsets)")
    ap.add_argument("--verbose", action="store_true", help="log the calibrator's whole-spectrum fit diagnostics")
    ap.add_argument("--station-mask-only", action="store_true",
                    help="extract with the background masked along the station geometry only (the pipeline masks "
                         "it again along the refined geometry)")
    args = ap.parse_args(argv)
    if args.verbose:
        import logging
        logging.basicConfig(level=logging.WARNING, format="%(name)s: %(message)s")
        logging.getLogger("meteorspec.calibrate").setLevel(logging.DEBUG)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        specs = (allsky_specs(args.allsky, args.seed, n_frames=args.frames) if args.allsky > 0
                 else perturbed_specs(args.n, args.seed))
        if args.only is not None:
            keep = {int(v) for v in args.only.split(",") if v.strip()}
            specs = [sp for k, sp in enumerate(specs) if k in keep]
        for spec in specs:
            try:
                row = run_event(spec, Path(tmp), truth_track=args.truth_track, whole_spectrum=args.whole_spectrum,
                                whole_spectrum_tilt=not args.hold_tilt, tilt_sigma_deg=args.tilt_sigma,
                                max_tilt_err_deg=args.max_tilt_err,
                                station_mask_only=args.station_mask_only)
            except Exception as exc:
                row = {"event": spec.event_id(spec.true_station().id), "error": f"{exc.__class__.__name__}: {exc}"}
            rows.append(row)
            print(json.dumps({k: (round(v, 3) if isinstance(v, float) else v) for k, v in row.items()}), flush=True)
    beyond = [r for r in rows if "error" not in r and r["max_off_axis_deg"] > args.max_off_axis]
    ok = [r for r in rows if "error" not in r and r["max_off_axis_deg"] <= args.max_off_axis]
    ev = [r for r in ok if r["source"] == "event"]

    def stat(key, f):
        v = np.array([r[key] for r in ok if np.isfinite(r.get(key, math.nan))], float)
        return f(v) if v.size else math.nan

    print("\n== issue 4 acceptance ==")
    print(f"events: {len(rows)}, errors: {sum('error' in r for r in rows)}, beyond {args.max_off_axis:.0f} deg "
          f"off axis (left out): {len(beyond)} {[r['event'] for r in beyond]}")
    print(f"in scope: {len(ok)}, refined from the event: {len(ev)}, station fallback: {len(ok) - len(ev)}")
    for proj in sorted({r["projection"] for r in ok}):
        rp = [r for r in ok if r["projection"] == proj]
        print(f"  {proj:14s} n={len(rp):2d} refined={sum(r['source'] == 'event' for r in rp):2d} "
              f"line median<=0.5: {sum(r['line_median_nm'] <= 0.5 for r in rp):2d} "
              f"max<=1.0: {sum(r['line_max_nm'] <= 1.0 for r in rp):2d} "
              f"grooves<=0.3%: {sum(abs(r['grooves_err_pct']) <= 0.3 for r in rp):2d} "
              f"angle<=0.3deg: {sum(abs(r['angle_err_deg']) <= 0.3 for r in rp):2d} "
              f"ratio<=5%: {sum(abs(r.get('ratio_err_pct', math.nan)) <= 5 for r in rp):2d}")
    print(f"max off-axis angle reached: {stat('max_off_axis_deg', np.max):.1f} deg; projections: "
          f"{sorted({r['projection'] for r in ok})}")
    print(f"line positions 390-850 nm: median of event medians {stat('line_median_nm', np.median):.3f} nm "
          f"(target 0.5), events with median <= 0.5: {sum(r['line_median_nm'] <= 0.5 for r in ok)}/{len(ok)}; "
          f"max over events {stat('line_max_nm', np.max):.3f} nm, events with max <= 1.0: "
          f"{sum(r['line_max_nm'] <= 1.0 for r in ok)}/{len(ok)}")
    print(f"grooves: |err| median {stat('grooves_err_pct', lambda v: np.median(np.abs(v))):.3f} %, "
          f"within 0.3 %: {sum(abs(r['grooves_err_pct']) <= 0.3 for r in ok)}/{len(ok)}")
    print(f"dispersion angle: |err| median {stat('angle_err_deg', lambda v: np.median(np.abs(v))):.3f} deg, "
          f"within 0.3 deg: {sum(abs(r['angle_err_deg']) <= 0.3 for r in ok)}/{len(ok)}")
    print(f"flux ratio Na 589 / O I 777: |err| median {stat('ratio_err_pct', lambda v: np.median(np.abs(v))):.1f} %, "
          f"within 5 %: {sum(abs(r.get('ratio_err_pct', math.nan)) <= 5 for r in ok)}/{len(ok)}; "
          f"with the true geometry: |err| median {stat('ratio_err_true_geo_pct', lambda v: np.median(np.abs(v))):.1f} %, "
          f"within 5 %: {sum(abs(r.get('ratio_err_true_geo_pct', math.nan)) <= 5 for r in ok)}/{len(ok)}; "
          f"without the extinction correction: |err| median "
          f"{stat('ratio_err_no_ext_pct', lambda v: np.median(np.abs(v))):.1f} %, within 5 %: "
          f"{sum(abs(r.get('ratio_err_no_ext_pct', math.nan)) <= 5 for r in ok)}/{len(ok)}")
    every = [r for r in ok if r["line_median_nm"] <= 0.5 and r["line_max_nm"] <= 1.0
             and abs(r["grooves_err_pct"]) <= 0.3 and abs(r["angle_err_deg"]) <= 0.3
             and abs(r.get("ratio_err_pct", math.nan)) <= 5]
    print(f"every figure at once (a ratio that cannot be measured fails): {len(every)}/{len(ok)}")
    testable = [r for r in ok if r.get("ratio_testable")]
    noisy = [r for r in ok if np.isfinite(r.get("ratio_sigma_pct", math.nan)) and not r.get("ratio_testable")]
    print(f"flux ratio, by its noise: {len(testable)} events with the ratio's 1-sigma <= "
          f"{RATIO_TESTABLE_SIGMA_PCT} % (5 % is >= 2 sigma), within 5 %: "
          f"{sum(abs(r['ratio_err_pct']) <= 5 for r in testable)}/{len(testable)}, within 2 sigma: "
          f"{sum(abs(r['ratio_err_z']) <= 2 for r in testable)}/{len(testable)}; {len(noisy)} noisier (1-sigma "
          f"{', '.join('%.0f' % r['ratio_sigma_pct'] for r in noisy)} %), within 2 sigma: "
          f"{sum(abs(r['ratio_err_z']) <= 2 for r in noisy)}/{len(noisy)}")
    if ev:
        med = np.array([r["line_median_nm"] for r in ev])
        print(f"refined events only ({len(ev)}): median of line medians {np.median(med):.3f} nm, median <= 0.5: "
              f"{int(np.sum(med <= 0.5))}, max <= 1.0: {sum(r['line_max_nm'] <= 1.0 for r in ev)}, grooves <= 0.3 %: "
              f"{sum(abs(r['grooves_err_pct']) <= 0.3 for r in ev)}, angle <= 0.3 deg: "
              f"{sum(abs(r['angle_err_deg']) <= 0.3 for r in ev)}, ratio <= 5 %: "
              f"{sum(abs(r.get('ratio_err_pct', math.nan)) <= 5 for r in ev)} of "
              f"{sum(np.isfinite(r.get('ratio_err_pct', math.nan)) for r in ev)} with both lines unmasked")
    fallback = [r for r in ok if r["source"] != "event"]
    if fallback:
        print("station fallbacks: " + ", ".join(f"{r['event'][-12:]} {'+'.join(f for f in r['flags'] if f != 'calibration_from_station')}"
                                                for r in fallback))
    print(f"calibrate_event time: median {stat('seconds_calibrate', np.median):.1f} s; CPU time (the process's, "
          f"independent of other load): median {stat('cpu_seconds_calibrate', np.median):.2f} s, "
          f"total {stat('cpu_seconds_calibrate', np.sum):.1f} s over {len(ok)} events")
    if args.json is not None:
        args.json.write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
