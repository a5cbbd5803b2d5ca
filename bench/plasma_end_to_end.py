"""End-to-end composition check on the sample events: video -> ... -> plasma fit vs truth.

Usage (from the top of the repository)::

    OPENBLAS_NUM_THREADS=1 python bench/plasma_end_to_end.py [--events DIR] [EVENT_ID ...]

For every event folder: read the video, background, track, event calibration
(``calibrate.calibrate_event``), curved extraction, response correction, whole-flight
spectrum, instrument FWHM from the refined geometry at the middle of the track
(``lines.instrument_fwhm_nm``, PSF FWHM = 2.355 x the track's PSF sigma), then
``plasma.fit_plasma`` and ``lines.identify_lines``. With ``--true-geometry`` the
extraction uses the geometry the simulator rendered with (perfect calibration), which
judges the plasma stage alone. Prints fitted na, mg, fe against the
simulator's truth (``truth/<event id>.json``). No assertions: it reports what the chain
delivers today; the stages before the plasma fit belong to other modules.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from meteorspec import plasma  # noqa: E402
from meteorspec.background import estimate_background  # noqa: E402
from meteorspec.calibrate import apply_response, calibrate_event  # noqa: E402
from meteorspec.config import find_station_file, load_event, load_station  # noqa: E402
from meteorspec.extract import extract_spectra  # noqa: E402
from meteorspec.lines import identify_lines, instrument_fwhm_nm  # noqa: E402
from meteorspec.optics import GratingModel, LensModel, SpectralGeometry  # noqa: E402
from meteorspec.track import find_track  # noqa: E402
from meteorspec.video import read_stack  # noqa: E402


def true_geometry(truth: dict) -> SpectralGeometry:
    """The geometry the simulator rendered with (``geometry_true`` of the truth file)."""
    lens, grating = truth["geometry_true"]["lens"], truth["geometry_true"]["grating"]
    return SpectralGeometry(
        LensModel(lens["projection"], lens["focal_px"], lens["cx"], lens["cy"], lens["k1"],
                  lens["k2"]),
        GratingModel(grating["grooves_per_mm"], grating["dispersion_angle_deg"],
                     grating["tilt_deg"], grating["tilt_azimuth_deg"]))


def run(folder: Path, truth_dir: Path, *, use_true_geometry: bool = False) -> None:
    t0 = time.perf_counter()
    event = load_event(folder)
    station = load_station(find_station_file(event, run_root=folder.parent))
    stack = read_stack(event, station)
    camera = station.camera
    start = SpectralGeometry.from_station(station)
    order = [o for o in station.grating.orders if o != 0][0]
    background = estimate_background(stack, camera=camera, seed=0)
    track = find_track(stack, background, start, camera=camera, orders=[order], seed=0)
    if not track:
        print(f"{event.id}: no track ({track.reason})")
        return
    truth = json.loads((truth_dir / f"{event.id}.json").read_text())
    if use_true_geometry:
        geometry = true_geometry(truth)
        sol = SimpleNamespace(source="truth", rms_nm=0.0)
    else:
        sol = calibrate_event(stack, background, track, start, camera=camera, order=order,
                              event=event.id)
        geometry = sol.geometry
    spectra = extract_spectra(stack, background, track, geometry, camera=camera, order=order)
    spectra, _ = apply_response(spectra, station.response)
    whole = spectra.whole_flight()
    ok = np.isfinite(track.x_px) & np.isfinite(track.y_px)
    mid = np.flatnonzero(ok)[ok.sum() // 2]
    psf_sigma = float(getattr(track, "psf_sigma_px", math.nan))
    psf_sigma = psf_sigma if np.isfinite(psf_sigma) and psf_sigma > 0 else 1.5
    fwhm = instrument_fwhm_nm(geometry, track.x_px[mid], track.y_px[mid], whole.wavelength_nm,
                              psf_fwhm_px=2.3548 * psf_sigma, order=order)
    speed = getattr(event, "speed_km_s", None)
    t1 = time.perf_counter()
    fit = plasma.fit_plasma(whole, fwhm_nm=fwhm, speed_km_s=speed)
    t2 = time.perf_counter()
    comp_true = np.array([truth["composition"][g] for g in plasma.GROUPS])
    if not fit:
        print(f"{event.id}: plasma fit failed: {fit.reason}")
        return
    g = np.array([max(fit.group_intensity[k], 0.0) for k in plasma.GROUPS])
    comp = g / g.sum()
    table = identify_lines(whole, fwhm_nm=fwhm, plasma_fit=fit)
    print(f"{event.id}: calibration {sol.source} rms {sol.rms_nm:.2f} nm; "
          f"T {fit.temperature_k:.0f}+-{fit.temperature_err_k:.0f} K (truth "
          f"{truth['temperature_k']:.0f}), chi2r {fit.chi2_reduced:.1f}, shift "
          f"{fit.shift_nm:+.2f} nm, width x{fit.width_scale:.2f}")
    print(f"   na/mg/fe fit {comp[0]:.3f}/{comp[1]:.3f}/{comp[2]:.3f}  truth "
          f"{comp_true[0]:.3f}/{comp_true[1]:.3f}/{comp_true[2]:.3f}  max|d| "
          f"{np.abs(comp - comp_true).max():.3f}; {len(table)} peaks "
          f"({int(np.sum(table.status == 'identified'))} identified, "
          f"{int(np.sum(table.status == 'blend'))} blends); chain {t1 - t0:.0f} s, "
          f"fit {t2 - t1:.1f} s")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", type=Path, default=REPO / "sample_events")
    ap.add_argument("--true-geometry", action="store_true",
                    help="extract with the simulator's true geometry (perfect wavelength "
                         "calibration), to judge the plasma stage alone")
    ap.add_argument("ids", nargs="*")
    args = ap.parse_args(argv)
    folders = sorted(p.parent for p in args.events.glob("*/event.toml"))
    if args.ids:
        folders = [f for f in folders if f.name in args.ids]
    for folder in folders:
        try:
            run(folder, args.events / "truth", use_true_geometry=args.true_geometry)
        except Exception as exc:  # report and go on: other stages are still being written
            print(f"{folder.name}: {type(exc).__name__}: {exc}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
