"""One event through every stage that exists, into an :class:`EventResult`.

Each stage is a function of plain data; this module only orders them, turns
bad input into a ``failed`` result with a one-line reason, and flags each stage
that has not produced output (``stage_missing:<stage>``).
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np

from .atomic import load_line_list
from .background import (Background, BinnedFrames, StoredFrameBinner, bin_frames, estimate_background,
                         refine_background)
from .calibrate import apply_response, calibrate_event, ridge_angle, station_solution
from .classify import (DEEP_SATURATED_SHARE, FITS_DISAGREE_SIGMA, LIGHT_CURVE_BANDS_NM, Composition, TimeResolved,
                       classify, composition_from_groups, cover_other_fit, deep_wing_peak, light_curve_from_spectra,
                       time_resolved_from_fits, weak_line_curves, window_light_curves)
from .config import Camera, Event, Station, find_station_file, load_event, load_station
from .errors import InputError
from .extinction import ExtinctionModel, extinction_correction, pixel_altaz
from .extract import SHEAR_PSF_SIGMA_PX, FrameSpectra, Spectrum, extract_spectra
from .lines import identify_lines, instrument_fwhm_nm, line_smear_px, line_streak_px
from .optics import SpectralGeometry
from .plasma import (WIDTH_SCALE_BOUNDS, PlasmaFit, ScaleScan, effective_response, fit_plasma, fit_plasma_per_frame,
                     group_templates)
from .result import STAGES, EventResult, FrameTimes, InputRecord
from .track import Track, find_track, remeasure_light_curve, unless_a_line
from .wavesol import WavelengthSolution, geometry_values
from .version import software_version
from .video import FrameStack, read_stack


def file_sha256(path: Path, *, chunk_bytes: int = 1 << 20) -> str:
    """SHA-256 of a file, or of every file in a frame folder (sorted by name)."""
    digest = hashlib.sha256()
    files = sorted(p for p in path.iterdir() if p.is_file()) if path.is_dir() else [path]
    for file in files:
        if path.is_dir():
            digest.update(file.name.encode())
        with open(file, "rb") as fh:
            while block := fh.read(chunk_bytes):
                digest.update(block)
    return digest.hexdigest()


def _input_record(role: str, path: Path) -> InputRecord:
    size = sum(p.stat().st_size for p in path.iterdir()) if path.is_dir() else path.stat().st_size
    return InputRecord(role=role, path=str(path), sha256=file_sha256(path), size_bytes=size)


def station_values(station: Station) -> dict[str, object]:
    """Camera, lens and grating values as flat ``"section.key"`` entries for the output."""
    values: dict[str, object] = {"station.id": station.id, "station.path": str(station.path)}
    for section in ("camera", "lens", "grating"):
        for key, value in asdict(getattr(station, section)).items():
            if value is None:
                continue
            values[f"{section}.{key}"] = list(value) if isinstance(value, tuple) else value
    if station.pointing is not None:
        for key, value in asdict(station.pointing).items():
            values[f"pointing.{key}"] = value
    if station.response is not None:
        values["response.file"] = str(station.response.path)
    return values


def frame_times(stack: FrameStack) -> FrameTimes:
    """Frame (or field) times and saturated-pixel counts of a decoded video."""
    n_sat = stack.saturated_px_counts()
    return FrameTimes(time_s=stack.time_s, exposure_s=stack.exposure_s, n_saturated_px=n_sat,
                      interlaced=stack.camera.interlaced)


def _strings(values: np.ndarray) -> np.ndarray:
    return np.array([str(v).encode() for v in values], dtype=object)


def track_part(track: Track) -> dict[str, object]:
    """``/track`` of contract section 5 plus the measurements behind the fit."""
    datasets = {
        "time_s": (track.time_s, "s"),
        "x": (track.x_px, "px"),
        "y": (track.y_px, "px"),
        "flux": (track.flux_adu, "adu"),
        "flux_err": (track.flux_err_adu, "adu"),
        "x_measured": (track.x_meas_px, "px"),
        "y_measured": (track.y_meas_px, "px"),
        "snr": (track.snr, "1"),
        "frame_index": (track.frame_index, "1"),
        "status": (_strings(track.status), "1"),
    }
    attrs = {"found": bool(track), "reason": track.reason, "flags": list(track.flags),
             "exposure_s": track.exposure_s, "psf_sigma_px": track.psf_sigma_px,
             "position_convention": "fitted zeroth-order centroid at mid-exposure"}
    if track.trajectory is not None:
        attrs["trajectory_pole"] = np.asarray(track.trajectory.pole, float)
    return {"attrs": attrs, "datasets": datasets}


def spectrum_part(spectra: FrameSpectra, *, flux_unit: str) -> dict[str, object]:
    """``/spectrum``: whole-flight spectrum and the per-frame spectra on the same grid."""
    whole = spectra.whole_flight()
    density = f"{flux_unit}/nm"
    per_frame_err = np.sqrt(np.where(np.isfinite(spectra.variance), spectra.variance, np.nan))
    part: dict[str, dict] = {
        "attrs": {"flags": list(spectra.flags), "optimal_extraction": bool(spectra.optimal),
                  "flux_kind": "spectral density; sum(flux * bin_width_nm) over a line is its energy"},
        "datasets": {
            "wavelength_nm": (whole.wavelength_nm, "nm"),
            "bin_width_nm": (whole.bin_width_nm, "nm"),
            "flux": (whole.flux, density),
            "flux_err": (whole.flux_err, density),
            "mask": (whole.mask, "1"),
            "per_frame": (spectra.flux, density),
            "per_frame_err": (per_frame_err, density),
            "per_frame_mask": (spectra.mask, "1"),
            "time_s": (spectra.time_s, "s"),
        },
    }
    if spectra.frame_weight.size:  # NaN: a lit frame whose every bin saturated (its share is unknown)
        part["datasets"]["frame_weight"] = (spectra.frame_weight, "1")
    if whole.correlation.size:  # column d-1: correlation of bin j with bin j+d (shared pixels)
        part["datasets"]["flux_correlation"] = (whole.correlation, "1")
    if whole.common_share.size:  # errors common to bins far apart (twinkling star light), share of flux_err
        part["datasets"]["flux_common_share"] = (whole.common_share, "1")
    if spectra.twinkle_share.shape == spectra.flux.shape and np.any(spectra.twinkle_share > 0):
        part["datasets"]["per_frame_twinkle_share"] = (spectra.twinkle_share, "1")
    if spectra.light_time_s.size:
        part["datasets"]["light_time_s"] = (spectra.light_time_s, "s")
    if spectra.light_spread.size:  # RMS spread of each exposure's light in time, in exposures
        part["datasets"]["light_spread"] = (spectra.light_spread, "1")
    if spectra.recovered.shape == spectra.flux.shape and spectra.recovered.any():
        # bins scaled up from the unsaturated wings, and the profile-shape share of their error
        # (relative; common to the frames, so a re-derived whole flight adds it coherently)
        part["datasets"]["per_frame_recovered"] = (spectra.recovered, "1")
        part["datasets"]["per_frame_shape_rel_err"] = (spectra.shape_rel_err, "1")
    return part


def process_event(event_path: str | Path, *, stations_dir: str | Path | None = None,
                  run_root: str | Path | None = None, refine_geometry: bool = True) -> EventResult:
    """Run every available stage on one event.

    Parameters
    ----------
    event_path : str or Path
        An event folder or its ``event.toml``.
    stations_dir : str or Path, optional
        Folder holding ``<station>.toml``; default: search the event folder and its parents.
    run_root : str or Path, optional
        Where the parent search stops.
    refine_geometry : bool
        True (default): refine the grating from the event's own lines (contract section 3);
        where that falls back to the station file, the plasma fit may still measure the groove
        density from the lines' wavelength scale (flag ``wavelength_scale_from_plasma_fit``,
        :func:`scaled_solution`).
        False: use the station file's values as they are (flag ``calibration_from_station``),
        for a station whose geometry is known better than one event can tell, and to judge
        the later stages alone.

    Returns
    -------
    EventResult
        ``failed`` with a one-line ``error`` for bad input; never raises
        :class:`InputError`.
    """
    event_path = Path(event_path)
    try:
        event = load_event(event_path)
    except InputError as exc:
        folder = event_path if event_path.is_dir() else event_path.parent
        return EventResult(event_id=folder.name, station="", start_utc="", software_version=software_version(),
                           status="failed", error=str(exc))
    result = EventResult(event_id=event.id, station=event.station,
                         start_utc=event.start_utc.strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z",
                         software_version=software_version())
    try:
        station = load_station(find_station_file(event, stations_dir=stations_dir, run_root=run_root))
        result.station_values = station_values(station)
        result.inputs = [_input_record("event", event.path), _input_record("station", station.path),
                         _input_record("video", event.video)]
        if station.response is not None:
            result.inputs.append(_input_record("response", station.response.path))
        else:
            result.add_flag("uncalibrated_flux")
        binner = StoredFrameBinner(station.camera, float(event.fps))
        stack = read_stack(event, station, on_frame=binner.add)  # binned while the decoder runs ahead
        result.frames = frame_times(stack)
    except InputError as exc:
        result.status = "failed"
        result.error = str(exc)
        return result

    if result.frames.n_saturated_px.any():
        result.add_flag("saturated")
    _reduce(result, event, station, stack, refine_geometry=refine_geometry, binned=binner.result())
    result.status = "partial" if any(f.startswith("stage_missing:") for f in result.flags) else "ok"
    return result


def poorly_covered_groups(fit: PlasmaFit) -> list[str]:
    """The groups of ``fit`` whose model light fell less than half on usable bins.

    Such a group rests mostly on the model of other lines (the whole flight then gives way to
    the frames that record every group, :func:`fit_unsaturated_frames`). A NaN coverage, none of
    the group's lines in the fitted range, counts too: seed-7 events 006 and 030 of
    ``bench/plasma_end_to_end.py`` (fireballs with 24 usable bins in the whole flight) kept a
    whole-flight fit without any group, and no composition, while their first and last frames
    record every group unsaturated.
    """
    return [g for g, share in fit.group_coverage.items() if not share >= 0.5]


def recorded_orders(station: Station) -> list[int]:
    """Non-zero diffraction orders on the sensor; the first is the one extracted."""
    return [o for o in station.grating.orders if o != 0]


def locate_meteor(stack: FrameStack, station: Station, *,
                  binned: BinnedFrames | None = None) -> tuple[Background, Track]:
    """Background and zeroth-order track of a decoded event (the stages before calibration).

    One binned copy (``binned``, made while decoding, or one pass here) feeds both the
    background model and the tracker; when a meteor is found, the background is
    re-estimated with its light masked frame by frame and the meteor is tracked again
    against it (centroids, trajectory and light curve). A tracked source with first-order
    light where a zeroth order's own spectrum is dark is a line of the spectrum: the track is
    then empty, flagged ``zeroth_order_not_found`` (:func:`~meteorspec.track.unless_a_line`).

    Notes
    -----
    The first background of a slow meteor holds its light along the track (the same
    pixels are lit in many of the frames it is built from), most where the meteor is
    brightest; a centroid measured against it is pushed away from that hump, outwards
    along the track, and the fitted trajectory comes out too fast. Seed-5 event 035 of
    ``bench/plasma_end_to_end.py`` (0.9 px per frame, saturated): the first background
    held up to 137 ADU along the track, centroids were off by up to 1.3 px and the fitted
    path ran from -1.0 to +1.0 px of the truth (11 % fast); tracked again against the
    refined background, within 0.02 px. Keeping the first track's positions and
    measuring only its light curve again (:func:`remeasure_light_curve`) is the fallback
    when the second tracking does not find the same meteor.
    """
    camera = station.camera
    geometry = SpectralGeometry.from_station(station)
    orders = recorded_orders(station)
    if binned is None or len(binned) != len(stack):
        binned = bin_frames(stack, camera=camera)  # the one full pass, shared by background and tracker
    background = estimate_background(stack, camera=camera, seed=0, binned=binned)
    track = find_track(stack, background, geometry, camera=camera, orders=orders, seed=0, binned=binned)
    if track:
        refined = refine_background(stack, background, track, geometry, camera=camera, orders=orders)
        if refined is not background:
            again = find_track(stack, refined, geometry, camera=camera, orders=orders, seed=0, binned=binned)
            track = again if same_path(track, again) else remeasure_light_curve(stack, refined, track)
            background = refined
    # against the final background: a first one that holds a fireball's spectrum dims its
    # 400-800 nm light (seed-6 event 17 of bench/plasma_end_to_end.py: ratio 1.1, then 0.015)
    track = unless_a_line(track, background, geometry, binned, order=orders[0])
    return background, track


def same_path(first: Track, again: Track, *, tol_px: float = 3.0) -> bool:
    """Whether ``again`` follows the meteor of ``first``: over at least half of ``first``'s
    luminous frames, its fitted positions lie within ``tol_px`` (median) of ``first``'s.

    The meteor's light in the first background moves a centroid by about a pixel (up to
    1.3 px on seed-5 event 035 of ``bench/plasma_end_to_end.py``); another source, or a line
    of the spectrum linked instead of the zeroth order, lies many pixels away.
    """
    if not again:
        return False
    t = first.time_s[first.luminous]
    x0, y0 = first.position(t)
    x1, y1 = again.position(t)
    d = np.hypot(x1 - x0, y1 - y0)
    d = d[np.isfinite(d)]
    return d.size >= 0.5 * t.size and float(np.median(d)) <= tol_px


def remasked_background(stack: FrameStack, background: Background, track: Track, geometry: SpectralGeometry,
                        station: Station) -> Background:
    """The background again, with the meteor's light masked where ``geometry`` puts it.

    :func:`locate_meteor` masks the meteor's spectrum along the station's grating values;
    after the event's own calibration the spectrum may lie elsewhere: a groove density off
    by 3 % moves a line by about 3 % of its distance from the zeroth order, tens of pixels
    at the red end of a resolved spectrum, beside the mask, and the temporal statistics
    there keep part of the meteor's light, which the extraction then subtracts. On 29
    seeded simulator events with perturbed station files (``bench/bench_calibration.py
    --n 30 --seed 4 --truth-track``, and with ``--station-mask-only`` for the mask along
    the station values alone) the Na 589 / O I 777 ratio met 5 % on 16 events against 13
    (the red window of event 4 had kept 21-35 % of its light). Pixels outside both masks
    keep their values.
    """
    return refine_background(stack, background, track, geometry, camera=station.camera,
                             orders=recorded_orders(station))


def _reduce(result: EventResult, event: Event, station: Station, stack: FrameStack, *,
            refine_geometry: bool = True, binned: BinnedFrames | None = None) -> None:
    """The science stages in data-flow order; each adds its part and flags to ``result``.

    A stage that cannot run (no meteor, failed plasma fit) leaves its part out and
    flags ``stage_missing:<stage>`` plus the reason; nothing here raises for a
    difficult event.
    """
    camera = station.camera
    station_geometry = SpectralGeometry.from_station(station)
    order = recorded_orders(station)[0]
    background, track = locate_meteor(stack, station, binned=binned)
    del binned  # the binned copy (1/16 of the video) is not needed after tracking
    result.parts["track"] = track_part(track)
    _add_flags(result, track.flags)
    if not track:
        result.add_flag("no_meteor")
        result.parts["calibration"] = {"attrs": station_solution(station_geometry).to_attrs()}
        result.add_flag("calibration_from_station")
        _flag_missing(result)
        return

    if refine_geometry:
        solution = calibrate_event(stack, background, track, station_geometry, camera=camera, order=order,
                                   event=event.id, response=station.response)
    else:
        solution = station_solution(station_geometry)
    result.parts["calibration"] = calibration_part(solution)
    _add_flags(result, solution.flags)
    if solution.source == "event":
        remasked = remasked_background(stack, background, track, solution.geometry, station)
        if remasked is not background:
            background, track = remasked, remeasure_light_curve(stack, remasked, track)

    spectra = extract_spectra(stack, background, track, solution.geometry, camera=camera, order=order)
    if refine_geometry and solution.source == "station":
        moved = aperture_from_light(stack, background, track, solution, spectra, camera=camera, order=order)
        if moved is not None:
            solution, spectra = moved
            result.parts["calibration"] = calibration_part(solution)
            result.add_flag(APERTURE_FROM_LIGHT)
    flux_unit = _flux_unit(station)
    measured = _measured_spectra(result, spectra, solution, station, track, order=order)
    spectra, whole, fwhm_nm, station_response, response_nm, frame_altitude_deg, box_nm = measured
    # a station fallback of the calibration: its groove density may be off (the event could not
    # measure it), so the plasma fit first scans the wavelength scale that the lines prefer;
    # a measured scale corrects the groove density, and the spectra are extracted again on it
    scale_kw = {"scale_search": STATION_SCALE_SEARCH} if refine_geometry and solution.source == "station" else {}
    fit = fit_plasma(whole, fwhm_nm=fwhm_nm, box_nm=box_nm, speed_km_s=event.speed_km_s, response_nm=response_nm,
                     **scale_kw)
    scan = fit.config.get("wavelength_scale_scan") if fit else None
    if scan is not None and not scan.reason:
        solution = scaled_solution(solution, scan)
        result.parts["calibration"] = calibration_part(solution)
        result.add_flag(SCALE_FROM_PLASMA)
        spectra = extract_spectra(stack, background, track, solution.geometry, camera=camera, order=order)
        measured = _measured_spectra(result, spectra, solution, station, track, order=order)
        spectra, whole, fwhm_nm, station_response, response_nm, frame_altitude_deg, box_nm = measured
        fit = fit_plasma(whole, fwhm_nm=fwhm_nm, box_nm=box_nm, speed_km_s=event.speed_km_s, response_nm=response_nm)
        if fit:  # the HDF5 keeps what the scan found (the refit's axis carries it)
            fit = dataclasses.replace(fit, config=fit.config | {"wavelength_scale_scan": scan})
    subset_attrs: dict[str, object] = {}
    why_not_subset: list[str] = []
    other_fit: tuple[PlasmaFit, str] | None = None  # the composition fit not kept, and its source
    if not fit or poorly_covered_groups(fit):
        # saturated (or off-sensor) group lines in the brightest frames: the whole-flight sum
        # cannot hold them, so measure the composition on the frames that record every group
        subset_kw = dict(speed_km_s=event.speed_km_s, response_nm=station_response, altitude_deg=frame_altitude_deg,
                         extinction=ExtinctionModel.for_station(station))
        # a station fallback whose whole-flight fit could not scan the scale scans it on the subset
        search = scale_kw.get("scale_search", 0.0) if scan is None else 0.0
        # the lines' width without motion: a subset of frames has its own streaks (the lit part
        # of an exposure where the meteor lights up or goes out inside it)
        psf_fwhm_nm = _instrument_fwhm(solution.geometry, track, whole.wavelength_nm, order=order, streak_scale=0.0)
        # Gaussian lines here: the frames that qualify are mostly partly lit (the first and last),
        # whose smear is neither the whole flight's nor even, and the box profile moved such fits
        # farther from the truth (fireballs of bench/plasma_end_to_end.py --clean, seed 8 event
        # 003 0.018 -> 0.125 off, seed 5 event 030 0.009 -> 0.179; sample event QM04 0.10 -> 0.35)
        fallback = fit_unsaturated_frames(spectra, fwhm_nm=fwhm_nm, why=why_not_subset, scale_search=search,
                                          psf_fwhm_nm=psf_fwhm_nm, **subset_kw)
        # the whole-flight fit may still measure a group from the unsaturated wings of its
        # lines; keep whichever composition is the more precise
        if fallback is not None and (not fit or _composition_error(fallback[1]) <= _composition_error(fit)):
            other_fit = (fit, "whole flight") if fit else None
            whole, fit, subset_attrs = fallback
            sub_scan = fit.config.get("wavelength_scale_scan")
            if sub_scan is not None and not sub_scan.reason:
                # the composition rests on the scanned scale; the spectra are not extracted again
                # (unlike the whole flight's): the calibration keeps the station's axis
                result.add_flag(SUBSET_SCALE_FROM_PLASMA)
            result.add_flag("composition_from_least_saturated_frames" if subset_attrs["group_lines_saturated"]
                            else "composition_from_unsaturated_frames")
        elif fallback is not None and fallback[1]:
            other_fit = (fallback[1], "least saturated frames" if fallback[2]["group_lines_saturated"]
                         else "unsaturated frames")
    table = identify_lines(whole, fwhm_nm=fwhm_nm, plasma_fit=fit if fit else None)
    result.parts["lines"] = {"table": (table.to_records(), flux_unit + " nm"),
                             "attrs": {"columns_unit": "lab_nm, measured_nm: nm; intensity: flux x nm"}}
    if not fit:
        result.add_flag("plasma_fit_failed")
        reason = fit.reason if not why_not_subset else f"whole flight: {fit.reason}; {why_not_subset[0]}"
        result.parts["plasma"] = {"attrs": {"success": False, "reason": reason}}
        _flag_missing(result)
        return
    result.parts["plasma"] = plasma_part(fit, whole, flux_unit=flux_unit)
    result.parts["plasma"]["datasets"]["instrument_fwhm_nm"] = (np.asarray(fwhm_nm, float), "nm")
    if fit.config.get("box_nm") is not None:  # the line profile's motion smear (the review refits with it)
        result.parts["plasma"]["datasets"]["instrument_box_nm"] = (np.asarray(fit.config["box_nm"], float), "nm")
    if response_nm is not None:  # the review refits with the same response-aware line model
        result.parts["plasma"]["datasets"]["response_wavelength_nm"] = (np.asarray(response_nm[0], float), "nm")
        result.parts["plasma"]["datasets"]["response"] = (np.asarray(response_nm[1], float), "1")
    for group in poorly_covered_groups(fit):
        result.add_flag(f"group_poorly_covered:{group}")

    group_cov, other_attrs, flags = composition_covariance(fit, other_fit)
    _add_flags(result, flags)
    composition = classify(fit.group_intensity, group_cov, speed_km_s=event.speed_km_s,
                           speed_err_km_s=event.speed_err_km_s, seed=0)
    _add_flags(result, composition.flags)
    if _composition_error(fit, group_cov) > COMPOSITION_UNCERTAIN:
        # e.g. Mg I 517 and Fe I 526-546 unresolved at a coarse dispersion, or Na I D lost in N2
        result.add_flag("composition_uncertain")
    frame_fits = fit_plasma_per_frame(spectra, fit, fwhm_nm=fwhm_nm)
    centre_nm, half_width_nm = LIGHT_CURVE_BANDS_NM["O I 777"]
    try:
        o777, o777_err = light_curve_from_spectra(spectra, center_nm=centre_nm, half_width_nm=half_width_nm)
    except ValueError:  # the spectrum does not sample the O I 777 band
        o777 = o777_err = None
    # monochromatic group light curves (line profile over the rest, per frame) give the peak times
    # (with the bias bound of saturated bins scaled up from their wings: it widens the peak sigma)
    window = window_light_curves(spectra, group_templates(fit, spectra.wavelength_nm, spectra.bin_width_nm,
                                                          fwhm_nm=fwhm_nm), fwhm_nm=fwhm_nm, shape_errors=True)
    # where Na I D saturates over the top, the weaker Na I lines (818/819 nm, ...) may time it
    timeline = time_resolved_from_fits(spectra.time_s, frame_fits, o777_per_frame=o777, o777_err=o777_err,
                                       window_curves=window,
                                       weak_curves=weak_line_curves(spectra, fit, fwhm_nm=fwhm_nm))
    if "na_peak_unbounded_saturated" in timeline.flags:
        # D saturated over the top: time it from a deeper scale-up of its bins (peak time only)
        deep, _ = _flux_corrected(extract_spectra(stack, background, track, solution.geometry, camera=camera,
                                                  order=order, max_saturated_fraction=DEEP_SATURATED_SHARE),
                                  station, frame_altitude_deg)
        templates = group_templates(fit, deep.wavelength_nm, deep.bin_width_nm, fwhm_nm=fwhm_nm)
        deep_window = window_light_curves(deep, {"na": templates["na"]}, fwhm_nm=fwhm_nm)
        if "na" in deep_window:
            timeline = deep_wing_peak(timeline, "na", deep_window["na"], window["na"][2])
    if na_peak_saturated(spectra, fwhm_nm, timeline.peak_time_s.get("Na I", np.nan)):
        timeline = dataclasses.replace(timeline, flags=tuple(timeline.flags) + ("na_peak_saturated",))
    _add_flags(result, timeline.flags)
    result.parts["composition"] = composition_part(composition, timeline)
    source = {"source": "whole flight"}
    if subset_attrs:
        label = "least saturated frames" if subset_attrs["group_lines_saturated"] else "unsaturated frames"
        source = {"source": label} | {f"source_{k}": v for k, v in subset_attrs.items()}
    result.parts["composition"]["attrs"].update(source | other_attrs)
    _flag_missing(result)


def _flux_unit(station: Station) -> str:
    """Unit of the spectra's flux: ADU, or ADU per unit response when the station has one."""
    return "adu" if station.response is None else "adu/response"


def _measured_spectra(result: EventResult, spectra: FrameSpectra, solution: WavelengthSolution, station: Station,
                      track: Track, *, order: int) -> tuple:
    """Extracted spectra made physical, for the plasma fit; adds their flags and ``/spectrum``.

    Returns ``(spectra, whole, fwhm_nm, station_response, response_nm, frame_altitude_deg, box_nm)``:
    the spectra divided by the station response and the atmosphere, their whole-flight sum, the
    instrument FWHM on its grid, the station response as ``(wavelength_nm, response)`` (or
    None), the curve the spectra were divided by (the plasma model skews blurred lines as the
    divisions did), the meteor's altitude per frame (or None) and the motion smear inside the
    FWHM (nm, on the grid; the plasma fit's line profile).
    """
    _add_flags(result, spectra.flags)
    frame_altitude_deg = _frame_altitude_deg(solution.geometry, station, track)
    spectra, flags = _flux_corrected(spectra, station, frame_altitude_deg)
    _add_flags(result, flags)
    result.parts["spectrum"] = spectrum_part(spectra, flux_unit=_flux_unit(station))
    whole = spectra.whole_flight()
    fwhm_nm, box_nm = _instrument_fwhm(solution.geometry, track, whole.wavelength_nm, order=order, with_box=True)
    station_response = None if station.response is None else (station.response.wavelength_nm,
                                                               station.response.response)
    response_nm = effective_response(spectra, response_nm=station_response, altitude_deg=frame_altitude_deg,
                                     extinction=ExtinctionModel.for_station(station))
    return spectra, whole, fwhm_nm, station_response, response_nm, frame_altitude_deg, box_nm


def scaled_solution(solution: WavelengthSolution, scan: ScaleScan) -> WavelengthSolution:
    """The station fallback with its groove density corrected by the plasma fit's scale scan.

    Lab wavelengths read ``(1 + s)`` times longer on the station's axis when the grating has
    ``(1 + s)`` times the station's groove density (contract 2.2: a pixel's wavelength goes as
    ``1 / (m G)`` on a fixed curve), so the groove density becomes ``G (1 + s)``, its 1-sigma
    ``G`` times the scan's. The solution keeps ``source = "station"``: no line was measured on
    the event's frames.
    """
    geo = solution.geometry
    grooves = geo.grating.grooves_per_mm * (1.0 + scan.chosen)
    geo = geo.with_grating(grooves_per_mm=grooves)
    errors = dict(solution.errors) | {"grooves_per_mm": grooves * scan.best_err}
    return dataclasses.replace(solution, geometry=geo, values=geometry_values(geo), errors=errors)


def _frame_altitude_deg(geometry: SpectralGeometry, station: Station, track: Track) -> np.ndarray | None:
    """Altitude (deg) of the meteor in each frame, or None when the station has no ``[pointing]``."""
    if station.pointing is None:
        return None
    altitude_deg, _ = pixel_altaz(geometry.lens, station.pointing, track.x_px, track.y_px)
    # frames outside the luminous span have no position and carry no meteor light;
    # give them the span's median altitude so they are not reported below the horizon
    return np.where(np.isfinite(altitude_deg), altitude_deg, np.nanmedian(altitude_deg))


def _flux_corrected(spectra: FrameSpectra, station: Station,
                    altitude_deg: np.ndarray | None) -> tuple[FrameSpectra, tuple[str, ...]]:
    """Spectra divided by the station response, then by the atmosphere's transmission towards
    each frame (given its altitudes; the station's elevation sets the Rayleigh pressure)."""
    spectra, flags = apply_response(spectra, station.response)
    if altitude_deg is not None:
        spectra, more = extinction_correction(spectra, altitude_deg, model=ExtinctionModel.for_station(station))
        flags = tuple(flags) + tuple(more)
    return spectra, tuple(flags)


APERTURE_FROM_LIGHT = "aperture_angle_from_light"
"""Flag: the station's wavelength scale kept, the aperture's dispersion angle measured on the light."""
_MIN_RIDGE_POINTS = 20
"""Fewest saturated-core middles the angle is fitted to (as the calibration's fireball start,
``calibrate._saturated_start``): fewer come from one or two short cores and leave it loose."""


APERTURE_LIGHT_GAIN = 2.0
"""Factor of first-order light by which the extraction along the measured ridge must exceed the
station aperture's to replace it when the station's extraction did recover saturated bins (a
round value: an aperture beside the spectrum loses most of it, 170x on the case in
:func:`aperture_from_light`; 1.0-1.02x for apertures 0-1 deg off the seeded test event's)."""


def _clean_light(a: FrameSpectra, b: FrameSpectra) -> tuple[float, float]:
    """Light (flux x nm, summed over frames) of two extractions where both record the spectrum
    unsaturated: each sums its own unmasked, unrecovered bins whose nearest bin of the other
    (the grids differ a little with the angle) is so too. Masked or recovered bins would
    measure how each aperture's saturation was handled, not where it sits (a station aperture
    1-2 deg off the seeded test event's spectrum summed 1.3-3.5 times the light of the one on
    it when they counted). NaN when the frames differ."""
    def clean(s: FrameSpectra) -> np.ndarray:
        flux = np.asarray(s.flux, dtype=float)
        ok = ~np.asarray(s.mask, dtype=bool) & np.isfinite(flux)
        rec = np.asarray(getattr(s, "recovered", np.zeros((0, 0), bool)), dtype=bool)
        return ok & ~rec if rec.shape == ok.shape else ok

    if np.shape(a.flux)[0] != np.shape(b.flux)[0]:
        return math.nan, math.nan
    ca, cb = clean(a), clean(b)
    wa, wb = np.asarray(a.wavelength_nm, dtype=float), np.asarray(b.wavelength_nm, dtype=float)
    near_b = np.clip(np.searchsorted(wb, wa), 1, wb.size - 1)
    near_b = np.where(np.abs(wb[near_b - 1] - wa) < np.abs(wb[near_b] - wa), near_b - 1, near_b)
    near_a = np.clip(np.searchsorted(wa, wb), 1, wa.size - 1)
    near_a = np.where(np.abs(wa[near_a - 1] - wb) < np.abs(wa[near_a] - wb), near_a - 1, near_a)
    ba = np.broadcast_to(np.asarray(a.bin_width_nm, dtype=float), wa.shape)
    bb = np.broadcast_to(np.asarray(b.bin_width_nm, dtype=float), wb.shape)
    # a bin beyond the other grid's end has no counterpart (its nearest bin does not overlap it)
    over_a = np.abs(wb[near_b] - wa) < 0.5 * (ba + bb[near_b])
    over_b = np.abs(wa[near_a] - wb) < 0.5 * (bb + ba[near_a])
    both_a, both_b = ca & cb[:, near_b] & over_a, cb & ca[:, near_a] & over_b
    light = [float(np.sum(np.where(m, np.asarray(s.flux, dtype=float), 0.0)
                          * np.broadcast_to(np.asarray(s.bin_width_nm, dtype=float), m.shape)))
             for s, m in ((a, both_a), (b, both_b))]
    return light[0], light[1]


def aperture_from_light(stack: FrameStack, background: Background, track: Track, solution: WavelengthSolution,
                        spectra: FrameSpectra, *, camera: Camera, order: int, max_frames: int = 40
                        ) -> tuple[WavelengthSolution, FrameSpectra] | None:
    """The station fallback's aperture turned onto the saturated spectrum's ridge, or None.

    Where the calibration falls back to the station file, the station's dispersion angle
    places the extraction aperture. When that angle is off, the aperture runs beside the
    spectrum, rotated about the zeroth order: its cross-sections cut the profile's flank, a
    saturated core sits off their middle, and too few unsaturated cross-sections remain to
    weigh the saturated bins by (``extract._MIN_CLEAN_SECTIONS``): they are masked, not
    recovered (flag ``saturated`` without ``saturation_recovered``), and the fireball's
    brightest lines are lost. The light itself says where the spectrum lies: the middles of
    the saturated cores lie on the first-order curve whatever the wavelength scale
    (:func:`meteorspec.satlines.saturated_ridge`), and they fix the dispersion angle
    (:func:`meteorspec.satlines.fit_ridge_angle`, within 6 deg of the station's, the
    calibration's search range). The angle is taken only if the extraction along it recovers
    saturated bins from a clean profile, i.e. the aperture then sits on the spectrum. The
    wavelength scale stays the station's (the solution keeps ``source = "station"``); only the
    angle, and its error from the fit, change.

    A blanket rule (the searched angle of every station fallback) moved seeded fireballs
    whose aperture was already on the spectrum, and made their compositions worse
    (``bench/plasma_end_to_end.py --seed 5 --modes perturbed``: 005, 017, 029, 034), so the
    angle is only replaced where the station's aperture demonstrably misses the light: its
    saturated bins could not be recovered, or the extraction along the ridge records at
    least :data:`APERTURE_LIGHT_GAIN` times its light on the bins both record unsaturated
    (:func:`_clean_light`). The second case: a meteor moving along
    the dispersion (few lines, station fallback) with the station's angle 3.5 deg off, seed-6
    event 030 of the same bench, whose station aperture recovered a few bins at its zeroth
    order end and recorded 1/170 of the ridge's light on the bins both record unsaturated
    (composition 0.35 off, flagged uncertain; on the ridge 0.016 off).

    Returns
    -------
    (solution, spectra) or None
        The solution with the measured angle and the extraction along it; None when the
        station's extraction already holds a clean profile and at least half the ridge's
        light on the bins both record unsaturated (or nothing saturates), when too
        few ridge points are found, when the fit fails or reaches its bound, or when the
        extraction along the measured angle still lacks a clean profile.
    """
    if "saturated" not in spectra.flags:
        return None
    profile_lost = "saturation_recovered" not in spectra.flags
    station = solution.geometry
    ridge = ridge_angle(stack, background, track, station, order=order, max_frames=max_frames,
                        min_points=_MIN_RIDGE_POINTS)
    if ridge is None:
        return None
    geo, err = ridge
    angle_deg = geo.grating.dispersion_angle_deg
    if not np.isfinite(err) or abs(angle_deg - station.grating.dispersion_angle_deg) >= 6.0 - 1e-6:
        return None
    moved = extract_spectra(stack, background, track, geo, camera=camera, order=order)
    if "saturation_recovered" not in moved.flags:
        return None
    if not profile_lost:
        station_light, moved_light = _clean_light(spectra, moved)
        if not moved_light >= APERTURE_LIGHT_GAIN * station_light:
            return None
    errors = dict(solution.errors) | {"dispersion_angle_deg": err}
    return dataclasses.replace(solution, geometry=geo, values=geometry_values(geo), errors=errors), moved


STATION_SCALE_SEARCH = 0.06
"""Half range of the plasma fit's wavelength-scale scan on a station fallback: the calibration's
own groove-density search (``calibrate_event(grooves_range_frac=0.06)``), twice the +-3 % by
which the issue expects a station file's groove density to be off."""
FITS_DISAGREE = "composition_fits_disagree"
"""Flag: the whole-flight fit and the fit of the unsaturated (or least saturated) frames both
measured the composition and differ by more than :data:`meteorspec.classify.FITS_DISAGREE_SIGMA` combined
sigma; the kept one's errors are widened to reach the other's value
(:func:`meteorspec.classify.cover_other_fit`), and ``/composition`` ``other_fit_*`` give it."""
SCALE_FROM_PLASMA = "wavelength_scale_from_plasma_fit"
"""Flag: the calibration fell back to the station file, and the plasma fit measured the
wavelength scale (:func:`meteorspec.plasma.fit_plasma` ``scale_search``)."""
SUBSET_SCALE_FROM_PLASMA = "wavelength_scale_in_subset_fit"
"""Flag: the calibration fell back to the station file, the whole-flight spectrum could not be
fitted (saturated), and the plasma fit of the unsaturated or least saturated frames measured
the wavelength scale and used it; ``/calibration`` and ``/spectrum`` keep the station's axis.
The spectra are not extracted again on the corrected groove density, as the whole flight's are:
on perturbed fireball 027 of bench/plasma_end_to_end.py --seed 5 the scan's fit gave
0.611/0.190/0.198 (truth 0.619/0.185/0.196), the refit after the re-extraction 0.652/0.153/0.195
with its stretch at its 1 % bound (the station's tilt is off too, which a scale does not
absorb); without the scan 0.662/0.088/0.249."""


COMPOSITION_UNCERTAIN = 0.1
"""A 1-sigma error of na, mg or fe above this flags ``composition_uncertain``: more than the
spread of a class region across the ternary in most directions (invented, round value)."""


def composition_covariance(fit: Any, other_fit: tuple[Any, str] | None
                           ) -> tuple[np.ndarray, dict[str, object], tuple[str, ...]]:
    """The group covariance the composition is given, with the other fit's record.

    Parameters
    ----------
    fit : PlasmaFit-like
        The kept fit (``group_intensity``, ``group_covariance``).
    other_fit : (PlasmaFit-like, str) or None
        The composition fit not kept (the whole flight's, or that of the unsaturated or least
        saturated frames) and its source label; None where only one fit measured it.

    Returns
    -------
    covariance : ndarray of shape (3, 3)
        ``fit.group_covariance``, widened where the two fits disagree beyond
        :data:`~meteorspec.classify.FITS_DISAGREE_SIGMA` combined sigma
        (:func:`~meteorspec.classify.cover_other_fit`: at least one of them carries an error
        its covariance does not hold, and the data do not say which). A meteoroid that
        ablates differentially (Na early) can make a subset of frames differ from the whole
        flight for real; as an estimate of the meteor's composition the subset then carries
        that difference as well.
    attrs : dict
        ``other_fit_source``, ``other_fit_composition`` (na, mg, fe) and
        ``other_fit_disagreement_sigma`` for ``/composition``; empty without ``other_fit``.
    flags : tuple of str
        ``(FITS_DISAGREE,)`` when widened, else empty.
    """
    cov = np.asarray(fit.group_covariance, dtype=float)
    if other_fit is None:
        return cov, {}, ()
    other, label = other_fit
    widened, disagreement = cover_other_fit(fit.group_intensity, cov, other.group_intensity,
                                            other.group_covariance)
    values, _ = composition_from_groups(other.group_intensity, other.group_covariance)
    attrs = {"other_fit_source": label, "other_fit_composition": np.asarray(values, dtype=float),
             "other_fit_disagreement_sigma": float(disagreement)}
    return widened, attrs, ((FITS_DISAGREE,) if disagreement > FITS_DISAGREE_SIGMA else ())


def _composition_error(fit: PlasmaFit, covariance: np.ndarray | None = None) -> float:
    """Largest 1-sigma error of na, mg, fe (contract section 6) from a fit's group covariance
    (or ``covariance`` in its place)."""
    intensity = np.array([fit.group_intensity[g] for g in ("na", "mg", "fe")], dtype=float)
    _, errors = composition_from_groups(intensity, fit.group_covariance if covariance is None else covariance)
    worst = float(np.max(errors))
    return worst if np.isfinite(worst) else np.inf


def na_peak_saturated(spectra: FrameSpectra, fwhm_nm: np.ndarray, peak_time_s: float) -> bool:
    """Whether the Na I D lines are saturated in a frame next to the Na peak.

    Saturated means masked, or holding saturated pixels that the extraction scaled up from
    their unsaturated wings (``FrameSpectra.recovered``). Either way the Na light curve there
    rests on the wings of a profile, the cross-dispersion one of the extraction or the
    spectral one of :func:`meteorspec.classify.window_light_curves` (up to 80 % of the
    light lost), or is bridged over the frames that lost more; the profile's shape error is
    common to neighbouring frames and grows with the lost share, so it can tilt the top of
    the curve and the peak time is uncertain by more than the per-frame noise suggests.
    On bench/plasma_end_to_end.py --n 36 --seed 5 --modes true the two timed events whose
    Na error is more than twice its sigma against the sub-frame truth (events 31 and 35:
    -1.1 and +1.9 exposures) both have such D bins next to the peak; event 35's are all
    scaled-up bins, none masked (it was not flagged while only masked bins counted).
    """
    if not np.isfinite(peak_time_s) or spectra.n_frames == 0:
        return False
    wl = spectra.wavelength_nm
    lo, hi = group_windows_nm(fwhm_nm, wl, margin_fwhm=0.5)[0]
    na = (wl >= lo) & (wl <= hi)
    if not na.any():
        return False
    k = int(np.argmin(np.abs(spectra.time_s - peak_time_s)))
    near = slice(max(k - 1, 0), min(k + 2, spectra.n_frames))
    weight = np.asarray(spectra.frame_weight, dtype=float)
    lit = ~(weight == 0) if weight.shape == (spectra.n_frames,) else np.ones(spectra.n_frames, bool)
    lost = np.asarray(spectra.mask, dtype=bool)
    recovered = np.asarray(spectra.recovered, dtype=bool)
    if recovered.shape == lost.shape:  # empty: the extraction recorded no scaled-up bins
        lost = lost | recovered
    return bool(np.any(lost[near][:, na].any(axis=1) & lit[near]))


def group_windows_nm(fwhm_nm: np.ndarray, wavelength_nm: np.ndarray, *,
                     margin_fwhm: float = 1.0) -> list[tuple[float, float]]:
    """Wavelength ranges that hold each composition group's light (contract section 6).

    From the bluest to the reddest group line, widened by ``margin_fwhm`` instrument FWHM
    on each side (the line profile's wings).
    """
    lines = _group_lines_nm()
    out = []
    for group in ("na", "mg", "fe"):
        lo, hi = float(lines[group].min()), float(lines[group].max())
        w_lo = float(np.interp(lo, wavelength_nm, fwhm_nm))
        w_hi = float(np.interp(hi, wavelength_nm, fwhm_nm))
        out.append((lo - margin_fwhm * w_lo, hi + margin_fwhm * w_hi))
    return out


def _group_lines_nm() -> dict[str, np.ndarray]:
    lines = load_line_list()
    return {g: lines.wavelength_nm[lines.group == g] for g in ("na", "mg", "fe")}


def unsaturated_frames(spectra: FrameSpectra, fwhm_nm: np.ndarray, *,
                       least_saturated: bool = False, max_lost_share: float = 0.85) -> np.ndarray:
    """Frames (or fields) whose spectrum records every composition group in full.

    A frame qualifies when no bin within one instrument FWHM of any group line is masked
    (saturated, off the sensor, bad pixels) and its light-curve weight is known and positive.

    With ``least_saturated``, for a meteor whose group lines saturate in every frame (a
    fireball bright from its first frame): the frame that loses the least of its worst
    group's light, and every other frame whose masked group bins are among that frame's, so
    that their sum loses no group bin the frame itself keeps. Where a frame records every
    group in full this is the same set as without the option. A group's lost light is
    estimated with its lines at equal energy and a Gaussian profile of the instrument FWHM;
    frames that lose more than ``max_lost_share`` of a group's light this way do not count.
    The estimate is within 0.1 of the plasma fit's own ``group_coverage`` on the cases
    checked (event 29 of bench/plasma_end_to_end.py --seed 5, true and perturbed station:
    Mg 0.37 and 0.55 against 0.31 and 0.62; tests/test_pipeline.py's fixtures 0.445 and
    0.127 against 0.44 and 0.13), so the default 0.85 keeps every frame set that can pass
    the 0.25 coverage of :func:`fit_unsaturated_frames`.

    Returns
    -------
    ndarray of int
        Frame indices, increasing; empty if none.
    """
    wl = spectra.wavelength_nm
    if spectra.n_frames == 0 or wl.size == 0:
        return np.zeros(0, dtype=np.int64)
    need = np.zeros(wl.size, bool)
    for lo, hi in group_windows_nm(fwhm_nm, wl):
        if hi < wl[0] or lo > wl[-1]:  # a group outside the recorded range: no frame has it
            return np.zeros(0, dtype=np.int64)
        need |= (wl >= lo) & (wl <= hi)
    usable = ~spectra.mask[:, need] & np.isfinite(spectra.flux[:, need])
    weight = np.asarray(spectra.frame_weight, dtype=float)
    if weight.shape != (spectra.n_frames,):
        weight = np.ones(spectra.n_frames)
    lit = np.isfinite(weight) & (weight > 0)
    if not least_saturated:
        return np.flatnonzero(usable.all(axis=1) & lit).astype(np.int64)
    lost = np.zeros(spectra.n_frames)  # per frame, the largest share of a group's light masked
    bad = spectra.mask | ~np.isfinite(spectra.flux)
    fwhm = np.broadcast_to(np.asarray(fwhm_nm, dtype=float), wl.shape)
    for lines in _group_lines_nm().values():
        # equal energies: the true line ratios are what the fit is after; enough to rank frames
        sigma = np.interp(lines, wl, fwhm)[:, None] / (2.0 * np.sqrt(2.0 * np.log(2.0)))
        light = (np.exp(-0.5 * ((wl[None, :] - lines[:, None]) / sigma) ** 2) / sigma).sum(axis=0)
        light = light * spectra.bin_width_nm
        lost = np.maximum(lost, (light[None, :] * bad).sum(axis=1) / light.sum())
    candidates = np.flatnonzero(lit & (lost <= max_lost_share))
    if candidates.size == 0:
        return np.zeros(0, dtype=np.int64)
    # ties (e.g. several frames without a lost bin) go to the brightest: the most signal
    best = candidates[np.lexsort((-weight[candidates], lost[candidates]))[0]]
    keeps_best = (usable | ~usable[best]).all(axis=1)  # masked only where the best frame is
    return np.flatnonzero(keeps_best & lit).astype(np.int64)


_EVERY_FRAME = 1.0 - 1e-9
"""``min_coverage`` of a bin every frame records (its light share is 1 up to the round-off of
the weights' sum)."""


def fit_unsaturated_frames(spectra: FrameSpectra, *, fwhm_nm: np.ndarray, speed_km_s: float | None,
                           min_share: float = 0.0, response_nm: tuple | None = None,
                           altitude_deg: np.ndarray | None = None, extinction: ExtinctionModel | None = None,
                           min_coverage_saturated: float = 0.25, why: list[str] | None = None,
                           scale_search: float = 0.0, psf_fwhm_nm: np.ndarray | None = None,
                           box_nm: np.ndarray | None = None) -> tuple[Spectrum, PlasmaFit, dict] | None:
    """Plasma fit of the sum of the frames that record every group unsaturated.

    Used when the whole-flight spectrum has lost a group's lines (saturated or off the
    sensor in the bright frames). The sum covers part of the flight only, so the result is the
    composition of those frames (reported with their times and light share), not of the
    whole flight; a meteoroid whose composition changes along the flight (differential
    ablation) can differ.

    When no frame records every group (a fireball whose strongest group lines saturate from
    its first lit frame), the least saturated frames are fitted instead
    (:func:`unsaturated_frames` with ``least_saturated``): the fit then measures the
    saturated group from the unmasked wings of its lines' spectral profile (the instrument
    profile is known up to one width factor, fitted on all lines at once), and is kept if
    each group still has ``min_coverage_saturated`` of its model light on measured bins.
    Below a quarter the group would rest mostly on its far wings, beyond about one sigma of
    the profile, and on the LTE tie to other multiplets (invented, round value; the
    pipeline flags any group below one half ``group_poorly_covered``).

    ``scale_search`` is passed to :func:`meteorspec.plasma.fit_plasma` (a station fallback
    whose whole-flight spectrum could not scan the wavelength scale).

    ``fwhm_nm`` is the lines' width over the whole flight (``psf_fwhm_nm``: without motion).
    With ``psf_fwhm_nm`` the fit gets the frames' own width where the fit's width factor
    (:data:`meteorspec.plasma.WIDTH_SCALE_BOUNDS`) cannot reach it: their motion streak is that
    of a whole exposure times :func:`streak_share` of the frames (a meteor that lights up late
    in its first exposure draws a short streak there). ``box_nm``: the motion smear inside
    ``fwhm_nm`` (``fit_plasma(box_nm=...)``), shortened with the streak where the frames' own
    width replaces ``fwhm_nm``; the pipeline passes none (Gaussian lines, see ``_reduce``).

    Returns
    -------
    (Spectrum, PlasmaFit, dict) or None
        The summed spectrum, its successful fit with every group covered, and attributes
        (``frames``, ``time_s``, ``light_share``, ``method``, ``group_lines_saturated``
        (True: the least saturated frames), ``group_coverage`` (na, mg, fe)); None when no
        frame qualifies or the fit fails, and then the reason is appended to ``why`` (when
        given): the event's report says why it has no composition.
    """
    why = [] if why is None else why
    frames = unsaturated_frames(spectra, fwhm_nm)
    saturated = frames.size == 0
    # the lost-share estimate is good to ~0.1 (unsaturated_frames): skip sets the fit would reject
    max_lost = min(1.1 - min_coverage_saturated, 1.0)
    if saturated:
        frames = unsaturated_frames(spectra, fwhm_nm, least_saturated=True, max_lost_share=max_lost)
    if frames.size == 0:
        why.append(f"no lit frame records every group line unsaturated, nor keeps "
                   f"{1.0 - max_lost:.0%} of each group's light (saturated or masked bins)")
        return None
    weight = np.asarray(spectra.frame_weight, dtype=float)
    known = np.isfinite(weight) & (weight > 0)
    total = float(weight[known].sum())
    share = float(weight[frames].sum() / total) if total > 0 else float("nan")
    # frames whose share is unknown (saturated in full) are lit: the share is an upper bound
    if not share >= min_share:
        why.append(f"the frames that record every group carry {share:.0%} of the light (< {min_share:.0%})")
        return None
    subset = dataclasses.replace(spectra.select_frames(frames), frame_weight=weight[frames])
    # Frames that record every group: their sum is measured on the bins they all record (a
    # plain sum, c = 1 in FrameSpectra.whole_flight). A bin masked in some of a few frames would
    # be scaled up by the others' share of the light, which rests on frame weights known to a few
    # per cent (not in the bins' variance) and on the spectrum keeping its shape between the
    # rise and the end of the flight; from a few frames that share is small (a factor 2.4 on
    # the UV Fe I bins of bench/plasma_end_to_end.py --seed 5 event 35, whose group split
    # moved by 0.1 when its frame weights moved by 3-9 %). The least saturated frames keep the
    # scaling: their saturated group is measured from whatever the frames record of it.
    whole = subset.whole_flight(min_coverage=0.1 if saturated else _EVERY_FRAME)
    # response_nm: the station response; with the frames' altitudes the subset's own
    # light-weighted transmission joins it (see plasma.effective_response)
    response_nm = effective_response(subset, response_nm=response_nm, extinction=extinction,
                                     altitude_deg=None if altitude_deg is None
                                     else np.asarray(altitude_deg, dtype=float)[frames])
    fit_fwhm_nm = np.asarray(fwhm_nm, dtype=float)
    fit_box_nm = box_nm
    streak = streak_share(subset)
    if psf_fwhm_nm is not None and np.isfinite(streak):
        psf = np.asarray(psf_fwhm_nm, dtype=float)
        streak2 = np.clip(fit_fwhm_nm**2 - psf**2, 0.0, None)
        own = np.sqrt(psf**2 + streak**2 * streak2)
        # only beyond the reach of the fit's own width factor: within it the fit finds the width
        # itself, and a faint frame's fit given another starting width can settle elsewhere
        # (plasma_end_to_end.py --seed 5 --modes perturbed event 028, one exposure with a streak
        # 0.88 of a whole one's: 0.026 -> 0.102 off, stated 0.03); beyond it the factor stops
        # at its bound (seed 6 event 015, lit over its first exposure's last quarter: 0.29)
        if np.any(own < WIDTH_SCALE_BOUNDS[0] * fit_fwhm_nm):
            fit_fwhm_nm = own
            fit_box_nm = None if box_nm is None else np.asarray(box_nm, dtype=float) * streak
    fit = fit_plasma(whole, fwhm_nm=fit_fwhm_nm, box_nm=fit_box_nm, speed_km_s=speed_km_s, response_nm=response_nm,
                     scale_search=scale_search)
    min_coverage = min_coverage_saturated if saturated else 0.5
    which = "least saturated" if saturated else "unsaturated"
    if not fit:
        why.append(f"{which} frames {frames.tolist()}: {fit.reason}")
        return None
    # the worst-covered group; NaN (none of its lines in the fitted range) is the worst
    group, coverage = min(fit.group_coverage.items(), key=lambda kv: kv[1] if kv[1] >= 0.0 else -math.inf,
                          default=("any", 0.0))
    if not coverage >= min_coverage:
        why.append(f"{which} frames {frames.tolist()}: only {coverage:.2f} of the {group} group's model light "
                   f"on measured bins (< {min_coverage:.2f})")
        return None
    attrs = {"frames": frames, "time_s": spectra.time_s[frames], "light_share": share,
             "light_share_note": "share of the light of the frames whose brightness is known; "
                                 "frames saturated in full are not counted",
             "method": "whole-flight composition from the frames in which no bin within one "
                       "instrument FWHM of a group line is saturated or masked, on the bins that "
                       "every one of them records",
             "group_lines_saturated": saturated,
             "group_coverage": np.array([fit.group_coverage.get(g, np.nan) for g in ("na", "mg", "fe")])}
    if saturated:
        attrs["method"] = ("no frame records every group line unsaturated: composition from the frame "
                           "that loses the least of a group's light, with the frames masked only where "
                           "it is; saturated lines measured from the unmasked wings of their profile "
                           "(group_coverage: share of each group's model light on measured bins)")
    return whole, fit, attrs


def streak_share(spectra: FrameSpectra) -> float:
    """Light-weighted motion streak of these frames' lines over that of a whole evenly lit exposure.

    The extraction records each frame's line at its light's centroid, spread along the streak
    as the light spreads in time (``FrameSpectra.light_spread``, ``1 / sqrt(12)`` of an exposure
    for even light): summed over frames, the variances add with the frames' light
    (``frame_weight``). 1 for evenly lit exposures; NaN when the frames carry no spread or no
    known light.
    """
    spread = np.asarray(spectra.light_spread, dtype=float)
    weight = np.asarray(spectra.frame_weight, dtype=float)
    if spread.shape != weight.shape or spread.size == 0:
        return math.nan
    ok = np.isfinite(spread) & np.isfinite(weight) & (weight > 0)
    if not ok.any():
        return math.nan
    var = float(np.sum(weight[ok] * spread[ok] ** 2) / np.sum(weight[ok]))
    return math.sqrt(12.0 * var)


def _add_flags(result: EventResult, flags) -> None:
    for flag in flags:
        result.add_flag(str(flag))


def _flag_missing(result: EventResult) -> None:
    for stage in STAGES:
        if stage not in result.parts:
            result.add_flag(f"stage_missing:{stage}")


def _instrument_fwhm(geometry: SpectralGeometry, track: Track, wavelength_nm: np.ndarray, *,
                     order: int, streak_scale: float = 1.0, with_box: bool = False):
    """Instrument FWHM per wavelength bin at the middle of the luminous track.

    The PSF comes from the tracker; the motion streak along the dispersion widens lines
    (median over the luminous frames). The streak is that of each line's own image: the
    first-order pixel of a wavelength is a nonlinear function of the zeroth-order pixel
    (lens projection and grating equation), so away from the optical axis a line image moves
    more or less than the zeroth order. On a rectilinear lens (x = f tan theta) and a grating
    (sin theta = sin theta_0 + m lambda N) the image of a line at theta moves by
    cos^3(theta_0) / cos^3(theta) times the zeroth order's motion along the dispersion: on the
    seed-5 bench event 034 (rectilinear, 512 px, f = 240 px) 1.6x at 777 nm, and the
    zeroth-order streak left the lines 10-35 % wider than the FWHM the fit was given.
    Where a wavelength's image leaves the lens field at either end of the streak, the
    zeroth order's streak is used. ``streak_scale`` multiplies the streak (0: the PSF alone).
    ``with_box``: return ``(fwhm_nm, box_nm)``, the second the length in nm of the uniform smear
    inside that width (:func:`meteorspec.lines.line_smear_px`; the plasma fit's line profile,
    ``fit_plasma(box_nm=...)``).
    """
    lum = track.luminous & np.isfinite(track.x_px)
    x0, y0 = float(np.median(track.x_px[lum])), float(np.median(track.y_px[lum]))
    vx, vy = track.velocity_px_s(track.time_s[lum])
    # the spectrum's direction at 550 nm, or at the recorded wavelength nearest it when 550 nm
    # from the track's middle falls beyond the lens field (NaN; bench/plasma_end_to_end.py
    # --seed 4 --only 20 stopped here with a ValueError)
    wl = np.asarray(wavelength_nm, dtype=float)
    dx, dy = geometry.direction(x0, y0, 550.0, order)
    if not (np.isfinite(dx) and np.isfinite(dy)):
        dx_all, dy_all = (np.broadcast_to(np.asarray(v, dtype=float), wl.shape)
                          for v in geometry.direction(x0, y0, wl, order))
        ok = np.flatnonzero(np.isfinite(dx_all) & np.isfinite(dy_all))
        j = int(ok[np.argmin(np.abs(wl[ok] - 550.0))]) if ok.size else -1
        dx, dy = (dx_all[j], dy_all[j]) if ok.size else (0.0, 0.0)  # none: the PSF alone
    zeroth_px = float(np.nanmedian(np.abs(vx * dx + vy * dy))) * track.exposure_s
    zeroth_px = zeroth_px if np.isfinite(zeroth_px) else 0.0
    psf_sigma_px = track.psf_sigma_px if np.isfinite(track.psf_sigma_px) else 1.3
    # the blur along the dispersion that the extraction's shear towards the motion leaves
    line_streak = line_streak_px(geometry, x0, y0, vx, vy, track.exposure_s, wl, order=order,
                                 psf_sigma_px=psf_sigma_px, shear_sigma_px=SHEAR_PSF_SIGMA_PX)
    streak_px = np.where(np.isfinite(line_streak), line_streak, zeroth_px)
    fwhm = instrument_fwhm_nm(geometry, x0, y0, wavelength_nm, psf_fwhm_px=2.3548 * psf_sigma_px,
                              streak_px=streak_px * float(streak_scale), order=order)
    if not with_box:
        return fwhm
    smear = line_smear_px(geometry, x0, y0, vx, vy, track.exposure_s, wl, order=order,
                          psf_sigma_px=psf_sigma_px, shear_sigma_px=SHEAR_PSF_SIGMA_PX)
    smear = np.where(np.isfinite(smear), smear, zeroth_px) * float(streak_scale)
    box = smear * np.asarray(geometry.dispersion_nm_per_px(x0, y0, wl, order), dtype=float)
    return fwhm, np.where(np.isfinite(box), box, 0.0)


def calibration_part(solution: WavelengthSolution) -> dict[str, object]:
    """``/calibration``: values used with errors, and the line-position residuals."""
    res = solution.residuals
    datasets = {}
    for name, unit in (("frame", "1"), ("lab_nm", "nm"), ("measured_nm", "nm"), ("residual_nm", "nm"),
                       ("cross_px", "px"), ("used", "1")):
        if hasattr(res, name):
            datasets[f"residuals/{name}"] = (np.asarray(getattr(res, name)), unit)
    return {"attrs": solution.to_attrs(), "datasets": datasets}


def plasma_part(fit: PlasmaFit, whole: Spectrum, *, flux_unit: str) -> dict[str, object]:
    """``/plasma``: temperatures, column densities, group intensities and the model spectrum."""
    attrs: dict[str, object] = {
        "temperature_k": fit.temperature_k, "temperature_err_k": fit.temperature_err_k,
        "hot_temperature_k": fit.hot_temperature_k, "hot_temperature_err_k": fit.hot_temperature_err_k,
        "chi2_reduced": fit.chi2_reduced, "shift_nm": fit.shift_nm, "width_scale": fit.width_scale,
        "method": "two-component LTE (Borovicka 1993) with self-absorption",
        # which estimate the group errors are: linearised covariance or parametric bootstrap
        "group_error_method": fit.group_error_method,
    }
    scan = fit.config.get("wavelength_scale_scan")
    if scan is not None:
        # a station fallback: the scale lab wavelengths read on the station's axis (1 + this),
        # and whether it replaced the station's groove density (then "taken")
        attrs |= {"wavelength_scale_best": scan.best, "wavelength_scale_best_err": scan.best_err,
                  "wavelength_scale_note": scan.reason or "taken"}
    for group in ("na", "mg", "fe"):
        attrs[f"{group}_intensity"] = fit.group_intensity[group]
        attrs[f"{group}_intensity_err"] = fit.group_intensity_err[group]
        attrs[f"{group}_coverage"] = fit.group_coverage.get(group, float("nan"))
    for species, value in fit.column_density_m2.items():
        attrs[f"column_density_m2:{species}"] = value
        attrs[f"column_density_err_m2:{species}"] = fit.column_density_err_m2.get(species, float("nan"))
    return {"attrs": attrs, "datasets": {
        "group_covariance": (fit.group_covariance, f"({flux_unit} nm)^2"),
        "model_flux": (fit.model_flux, f"{flux_unit}/nm"),
        "wavelength_nm": (whole.wavelength_nm, "nm"),
    }}


def composition_part(composition: Composition, timeline: TimeResolved) -> dict[str, object]:
    """``/composition`` (contract sections 5 and 6) and its time-resolved companion."""
    attrs: dict[str, object] = {
        "na": composition.na, "mg": composition.mg, "fe": composition.fe,
        "na_err": composition.na_err, "mg_err": composition.mg_err, "fe_err": composition.fe_err,
        "class": composition.class_name, "class_confidence": composition.class_confidence,
        "class_reason": composition.class_reason, "speed_km_s": composition.speed_km_s,
        "speed_used_km_s": composition.speed_used_km_s, "flags": list(composition.flags),
        "expected_normal_na_mg_fe": np.asarray(composition.expected_normal, float),
    }
    datasets = {"time_s": (timeline.time_s, "s")}
    for name in ("na", "mg", "fe", "na_err", "mg_err", "fe_err"):
        datasets[f"per_frame/{name}"] = (getattr(timeline, name), "1")
    for name, curve in timeline.light_curves.items():
        key = name.replace(" ", "_")
        datasets[f"light_curves/{key}"] = (curve, "flux x nm")
        datasets[f"light_curves/{key}_err"] = (timeline.light_curve_errs[name], "flux x nm")
    timeline_attrs = {"na_peak_lead_s": timeline.na_peak_lead_s,
                      "na_peak_lead_fraction": timeline.na_peak_lead_fraction,
                      "duration_s": timeline.duration_s, "flags": list(timeline.flags),
                      "method": "differential ablation: Na peak minus mean of Mg and Fe peaks "
                                "(Vojacek et al. 2019)"}
    for name, t in timeline.peak_time_s.items():
        timeline_attrs[f"peak_time_s:{name}"] = t
    for name, t in timeline.peak_time_err_s.items():
        timeline_attrs[f"peak_time_err_s:{name}"] = t
    return {"attrs": attrs, "datasets": datasets, "groups": {"timeline": {"attrs": timeline_attrs}}}
