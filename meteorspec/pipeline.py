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

from . import __version__
from .config import Event, Station, find_station_file, load_event, load_station
from .errors import InputError
from .result import STAGES, EventResult, FrameTimes, InputRecord
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
        return EventResult(event_id=folder.name, station="", start_utc="", software_version=__version__,
                           status="failed", error=str(exc))
    result = EventResult(event_id=event.id, station=event.station,
                         start_utc=event.start_utc.strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z",
                         software_version=__version__)
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
    result.parts["calibration"] = _calibration_from_station(station)
    result.add_flag("calibration_from_station")
    for stage in STAGES:
        if stage not in result.parts or stage == "calibration":
            # calibration from station values is a fallback, not the refinement stage
            result.add_flag(f"stage_missing:{stage}")
    result.status = "partial" if any(f.startswith("stage_missing:") for f in result.flags) else "ok"
    return result
