"""One event through every stage that exists, into an :class:`EventResult`.

Each stage is a function of plain data; this module only orders them, turns
bad input into a ``failed`` result with a one-line reason, and flags each stage
that has not produced output (``stage_missing:<stage>``).
"""

from __future__ import annotations

import hashlib
from dataclasses import asdict
from pathlib import Path

import numpy as np

from .background import estimate_background
from .config import Station, find_station_file, load_event, load_station
from .errors import InputError
from .extract import FrameSpectra, extract_spectra
from .optics import SpectralGeometry
from .result import STAGES, EventResult, FrameTimes, InputRecord
from .track import Track, find_track
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
    n_sat = np.array([int(np.count_nonzero(frame.saturated)) for frame in stack])
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
    return {
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


def _calibration_from_station(station: Station) -> dict[str, object]:
    """``/calibration`` when no refinement has run: the station values, flagged as such."""
    g, ln = station.grating, station.lens
    attrs: dict[str, object] = {
        "source": "station",
        "grooves_per_mm": g.grooves_per_mm,
        "dispersion_angle_deg": g.dispersion_angle_deg,
        "tilt_deg": g.tilt_deg,
        "tilt_azimuth_deg": g.tilt_azimuth_deg,
        "projection": ln.projection,
        "focal_px": ln.focal_px,
        "cx": ln.cx,
        "cy": ln.cy,
        "k1": ln.k1,
        "k2": ln.k2,
        "rms_nm": float("nan"),
        "n_lines": 0,
    }
    return {"attrs": attrs}


def process_event(event_path: str | Path, *, stations_dir: str | Path | None = None,
                  run_root: str | Path | None = None) -> EventResult:
    """Run every available stage on one event.

    Parameters
    ----------
    event_path : str or Path
        An event folder or its ``event.toml``.
    stations_dir : str or Path, optional
        Folder holding ``<station>.toml``; default: search the event folder and its parents.
    run_root : str or Path, optional
        Where the parent search stops.

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
        stack = read_stack(event, station)
        result.frames = frame_times(stack)
    except InputError as exc:
        result.status = "failed"
        result.error = str(exc)
        return result

    if result.frames.n_saturated_px.any():
        result.add_flag("saturated")
    camera = station.camera
    geometry = SpectralGeometry.from_station(station)
    orders = [o for o in station.grating.orders if o != 0]
    background = estimate_background(stack, camera=camera, seed=0)
    track = find_track(stack, background, geometry, camera=camera, orders=orders, seed=0)
    result.parts["track"] = track_part(track)
    for flag in track.flags:
        result.add_flag(flag)
    if track:
        spectra = extract_spectra(stack, background, track, geometry, camera=camera, order=orders[0])
        for flag in spectra.flags:
            result.add_flag(flag)
        result.parts["spectrum"] = spectrum_part(spectra, flux_unit="adu")
    else:
        result.add_flag("no_meteor")
    result.parts["calibration"] = _calibration_from_station(station)
    result.add_flag("calibration_from_station")
    for stage in STAGES:
        if stage not in result.parts or stage == "calibration":
            # calibration from station values is a fallback, not the refinement stage
            result.add_flag(f"stage_missing:{stage}")
    result.status = "partial" if any(f.startswith("stage_missing:") for f in result.flags) else "ok"
    return result
